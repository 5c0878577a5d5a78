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
