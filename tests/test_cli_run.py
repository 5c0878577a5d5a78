"""`pamjoint run` and `pamjoint check`: run folder contract, replay, bad input."""
import json
import subprocess
import sys

import numpy as np
import pytest
import yaml

from controllers.base import PressureProfile
from muscle_sim import cli
from muscle_sim.records import Rollout

from conftest import DEMO, DRIFT, check_report


def test_run_writes_the_run_folder(tmp_path, capsys):
    out = tmp_path / "run"
    assert cli.main(["run", str(DRIFT), "--episodes", "3", "--seed", "4", "--out", str(out)]) == 0
    summary = json.loads((out / "summary.json").read_text())
    assert summary["seed"] == 4 and len(summary["config_hash"]) == 16
    assert len(summary["episodes"]) == 3
    for row in summary["episodes"]:
        for key in ("rms_error_deg", "strike_angle_error_deg", "strike_speed_error_pct", "peak_pressure_kpa"):
            assert key in row
    assert (out / "episodes.png").read_bytes()[:4] == b"\x89PNG"
    page = check_report(out)
    assert "episode" in page and "strike angle err [deg]" in page
    r = Rollout.read_csv(out / "rollouts" / "episode-0002.csv")
    assert r.t.size == 401 and r.metadata["trial"] == 2
    assert not list(out.rglob("*.part"))
    assert "SAFETY" in capsys.readouterr().out


def test_run_is_reproducible_and_replay_reproduces_a_run(tmp_path):
    a, b = tmp_path / "a", tmp_path / "b"
    args = ["run", str(DEMO), "--controller", "step", "--pressures", "3.2,1.8 bar", "--step-at", "120 ms"]
    assert cli.main(args + ["--out", str(a)]) == 0
    assert cli.main(args + ["--out", str(b)]) == 0
    assert (a / "summary.json").read_text() == (b / "summary.json").read_text()
    rollout = Rollout.read_csv(a / "rollouts" / "episode-0000.csv")
    profile = PressureProfile(rollout.t[:-1], rollout.command[:-1])
    profile.write_csv(tmp_path / "profile.csv")
    c = tmp_path / "c"
    assert cli.main(["run", str(DEMO), "--controller", "replay", "--profile", str(tmp_path / "profile.csv"),
                     "--out", str(c)]) == 0
    ra = json.loads((a / "summary.json").read_text())["episodes"][0]
    rc = json.loads((c / "summary.json").read_text())["episodes"][0]
    assert rc["rms_error_deg"] == pytest.approx(ra["rms_error_deg"], rel=1e-6)


def _run_cli(*args):
    return subprocess.run([sys.executable, "-m", "muscle_sim.cli", *args], capture_output=True, text=True)


@pytest.mark.parametrize("args, expect", [
    (["run", str(DEMO), "--episodes", "0"], "--episodes"),
    (["run", str(DEMO), "--controller", "step"], "--pressures"),
    (["run", str(DEMO), "--controller", "step", "--pressures", "3 bar"], "two pressures"),
    (["run", str(DEMO), "--controller", "replay"], "--profile"),
    (["run", str(DEMO), "--controller", "fly"], "invalid choice"),
])
def test_bad_flags_exit_2_with_one_line(tmp_path, args, expect):
    run = _run_cli(*args, "--out", str(tmp_path / "o"))
    assert run.returncode == 2
    assert expect in run.stderr and run.stderr.strip().count("\n") == 0


def test_bad_profile_names_row_and_column(tmp_path):
    bad = tmp_path / "p.csv"
    bad.write_text("time [s],command_a [kPa],command_b [kPa]\n0,200,300\n0.002,abc,300\n")
    run = _run_cli("run", str(DEMO), "--controller", "replay", "--profile", str(bad), "--out", str(tmp_path / "o"))
    assert run.returncode == 2 and "row 3, column 'command_a [kPa]'" in run.stderr
    short = tmp_path / "s.csv"
    short.write_text("time [s],command_a [kPa],command_b [kPa]\n0,200,300\n0.002,200,300\n")
    run = _run_cli("run", str(DEMO), "--controller", "replay", "--profile", str(short), "--out", str(tmp_path / "o2"))
    assert run.returncode == 2 and "400" in run.stderr
    assert not (tmp_path / "o2" / "summary.json").exists()


def test_supply_above_rated_is_refused_unless_overridden(tmp_path, capsys):
    raw = yaml.safe_load(DEMO.read_text())
    raw["plant"]["pneumatics"]["supply_pressure"] = "7 bar"
    cfg = tmp_path / "hot.yaml"
    cfg.write_text(yaml.safe_dump(raw))
    run = _run_cli("check", str(cfg))
    assert run.returncode == 2 and "plant.pneumatics.supply_pressure: 7 bar" in run.stderr
    raw["plant"]["pneumatics"]["allow_supply_above_rated"] = True
    cfg.write_text(yaml.safe_dump(raw))
    assert cli.main(["run", str(cfg), "--out", str(tmp_path / "o")]) == 0
    assert "CAUTION: 7 bar exceeds the rated pressure" in capsys.readouterr().out
    assert json.loads((tmp_path / "o" / "summary.json").read_text())["cautions"]


def test_check_prints_si_values(capsys):
    assert cli.main(["check", str(DEMO), "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["values"]["plant"]["muscle"]["rest_length"] == pytest.approx(0.25)
    assert data["derived"]["control_steps"] == 400
    assert np.isclose(data["values"]["task"]["strike_speed"], 12.0)


def test_version_is_the_package_version():
    # reference: the distribution metadata written by pip from pyproject.toml (importlib.metadata)
    from importlib.metadata import version
    done = subprocess.run([sys.executable, "-m", "muscle_sim.cli", "--version"], capture_output=True, text=True,
                          timeout=120)
    assert done.returncode == 0 and done.stdout.strip() == f"pamjoint {version('pamjoint')}"


def test_pressures_above_the_rating_are_refused_or_counted_with_a_caution(tmp_path, capsys):
    # common practice (ISO 4414 spirit): never command a muscle above its rated pressure; the demo
    # muscle is rated 6 bar. A step to 8 bar is refused before anything is written ...
    code = cli.main(["run", str(DEMO), "--controller", "step", "--pressures", "8,1 bar", "--out",
                     str(tmp_path / "refused")])
    err = capsys.readouterr().err
    assert code == 2 and "--pressures: 8 bar is not allowed" in err and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "refused").exists()
    # ... a replayed profile asking 7 bar for 50 samples runs, each sample counted, with a caution
    t = np.arange(400) * 0.002
    commands = np.full((400, 2), 2e5)
    commands[100:150, 0] = 7e5
    PressureProfile(t, commands).write_csv(tmp_path / "high.csv")
    out = tmp_path / "run"
    assert cli.main(["run", str(DEMO), "--controller", "replay", "--profile", str(tmp_path / "high.csv"),
                     "--out", str(out)]) == 0
    summary = json.loads((out / "summary.json").read_text())
    row = summary["episodes"][0]
    assert row["commands_above_rated"] == 50 and abs(row["peak_command_requested_kpa"] - 700.0) < 1e-9
    assert any("50 sample(s) above the rated pressure 6 bar" in c for c in summary["cautions"])
    assert "CAUTION" in capsys.readouterr().out


def test_run_folders_are_never_mixed_and_files_honour_the_umask(tmp_path, capsys):
    # common practice: a results folder holds one run; files are created as open() would create
    # them (mode 0666 minus the umask), so a rig controller under another account can read them
    import os
    out = tmp_path / "run"
    old = os.umask(0o022)
    try:
        assert cli.main(["run", str(DEMO), "--out", str(out)]) == 0
    finally:
        os.umask(old)
    assert (out / "summary.json").stat().st_mode & 0o777 == 0o644
    capsys.readouterr()
    assert cli.main(["run", str(DEMO), "--out", str(out)]) == 2
    assert "is not empty" in capsys.readouterr().err
    (out / "stale.txt").write_text("from an earlier run")
    assert cli.main(["run", str(DEMO), "--out", str(out), "--overwrite"]) == 0
    assert not (out / "stale.txt").exists()
    other = tmp_path / "mine"
    other.mkdir()
    (other / "notes.txt").write_text("not a run")
    assert cli.main(["run", str(DEMO), "--out", str(other), "--overwrite"]) == 2
    assert (other / "notes.txt").exists()
    assert cli.main(["run", str(DEMO), "--out", str(other / "notes.txt")]) == 2
    err = capsys.readouterr().err
    assert "no summary.json" in err and "is a file" in err


def test_a_folder_the_system_refuses_gives_one_line(tmp_path, capsys):
    # derived: the operating system refuses to make the folder (a file stands where a parent
    # folder should be; a read-only folder or a full disk raise the same kind of error); the
    # command names it and exits 2
    blocker = tmp_path / "blocker"
    blocker.write_text("a file")
    assert cli.main(["run", str(DEMO), "--out", str(blocker / "run")]) == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and "cannot use" in err and "Traceback" not in err
