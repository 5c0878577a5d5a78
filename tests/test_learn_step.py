"""`pamjoint learn-step`: the rig loop runs the very code of `tune`; trial logs are validated."""
import json
import subprocess
import sys

import numpy as np
import pytest

from controllers.tuning import tune
from muscle_sim import cli
from muscle_sim.records import read_log
from muscle_sim.simulation import Setup

from conftest import DEMO


@pytest.fixture(scope="module")
def tune_dir(tmp_path_factory):
    out = tmp_path_factory.mktemp("tune")
    tune(Setup.from_config(DEMO), "norm-optimal", 4, 2, out)
    return out


@pytest.mark.parametrize("k", [0, 2])
def test_learn_step_reproduces_the_tune_runs_next_profile(tune_dir, tmp_path, k):
    nxt = tmp_path / "next.csv"
    args = ["learn-step", "--rollout", str(tune_dir / "rollouts" / f"trial-{k:04d}.csv"),
            "--profile", str(tune_dir / "profiles" / f"profile-{k:04d}.csv"),
            "--state", str(tune_dir / "profiles" / f"state-{k:04d}.json"),
            "--config", str(DEMO), "--out", str(nxt)]
    assert cli.main(args) == 0
    want = json.loads((tune_dir / "profiles" / f"state-{k + 1:04d}.json").read_text())
    got = json.loads((tmp_path / "next.state.json").read_text())
    assert got == want
    theirs = (tune_dir / "profiles" / f"profile-{k + 1:04d}.csv").read_text().splitlines()[1:]
    ours = nxt.read_text().splitlines()[1:]
    assert ours == theirs


def _write(path, header, rows):
    path.write_text(",".join(header) + "\n" + "\n".join(",".join(f"{v:.9g}" for v in r) for r in rows) + "\n")


def _rig_log(tune_dir, tmp_path, name="log.csv", drop=(), edit=None):
    """A rig-style log made from trial 0: only time, angle and commands (no rate, no pressures)."""
    r = read_log(tune_dir / "rollouts" / "trial-0000.csv", Setup.from_config(DEMO).task)
    rows = np.column_stack([r.t, np.degrees(r.measured[:, 0]), r.command / 1e3])
    header = ["time [s]", "angle [deg]", "command_a [kPa]", "command_b [kPa]"]
    if edit:
        header, rows = edit(header, rows)
    path = tmp_path / name
    _write(path, header, rows)
    return path


def test_a_log_without_rate_or_pressures_still_learns(tune_dir, tmp_path, capsys):
    log = _rig_log(tune_dir, tmp_path)
    assert cli.main(["learn-step", "--rollout", str(log), "--profile", str(tune_dir / "profiles" / "profile-0000.csv"),
                     "--config", str(DEMO), "--out", str(tmp_path / "n.csv"), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["predicted_cost"] < 0.2 * report["cost"]
    assert "reduced pressure" in report["safety"]


def _fails(args, expect):
    run = subprocess.run([sys.executable, "-m", "muscle_sim.cli", *args], capture_output=True, text=True)
    assert run.returncode == 2, run.stderr
    assert run.stderr.count("\n") == 1 and expect in run.stderr, run.stderr


def _edit_row(i, col, value):
    def edit(header, rows):
        rows = rows.copy()
        rows[i, col] = value
        return header, rows
    return edit


@pytest.mark.parametrize("edit, expect", [
    (_edit_row(10, 0, 0.0185), "row 12, column 'time [s]'"),                 # irregular sample
    (_edit_row(10, 0, 0.0150), "time does not increase"),                     # non-monotonic
    (lambda h, r: (h, np.delete(r, [50, 51, 52], axis=0)), "a gap"),          # missing samples
    (_edit_row(20, 1, np.nan), "row 22, column 'angle [deg]'"),               # NaN
    (lambda h, r: (["time [s]", "angle [grad]", *h[2:]], r), "unit 'grad'"),  # wrong unit
    (lambda h, r: (h[:3], r[:, :3]), "missing column(s) command_b"),
])
def test_bad_logs_give_one_line_errors(tune_dir, tmp_path, edit, expect):
    log = _rig_log(tune_dir, tmp_path, edit=edit)
    _fails(["learn-step", "--rollout", str(log), "--profile", str(tune_dir / "profiles" / "profile-0000.csv"),
            "--config", str(DEMO), "--out", str(tmp_path / "n.csv")], expect)
    assert not (tmp_path / "n.csv").exists()


def test_resampling_only_when_asked(tune_dir, tmp_path):
    def shifted(header, rows):
        rows = rows.copy()
        rows[1:-1, 0] += 0.0003          # jittered clock
        return header, rows

    log = _rig_log(tune_dir, tmp_path, edit=shifted)
    args = ["learn-step", "--rollout", str(log), "--profile", str(tune_dir / "profiles" / "profile-0000.csv"),
            "--config", str(DEMO), "--out", str(tmp_path / "n.csv")]
    _fails(args, "resample if intended")
    assert cli.main(args + ["--resample"]) == 0


def test_profile_not_on_the_grid_or_not_matching_the_state(tune_dir, tmp_path):
    bad = tmp_path / "p.csv"
    bad.write_text("time [s],command_a [kPa],command_b [kPa]\n0,200,300\n0.004,200,300\n")
    _fails(["learn-step", "--rollout", str(tune_dir / "rollouts" / "trial-0000.csv"), "--profile", str(bad),
            "--config", str(DEMO), "--out", str(tmp_path / "n.csv")], "--profile")
    _fails(["learn-step", "--rollout", str(tune_dir / "rollouts" / "trial-0001.csv"),
            "--profile", str(tune_dir / "profiles" / "profile-0001.csv"),
            "--state", str(tune_dir / "profiles" / "state-0003.json"),
            "--config", str(DEMO), "--out", str(tmp_path / "n.csv")], "does not match --state")


def test_realistic_rig_logs_are_accepted_with_notes(tune_dir, tmp_path, capsys):
    # common practice of data loggers: a clock that does not start at 0, +-50 us jitter whose last
    # stamp falls a few us short of the trial end, and channels the learner does not use. The
    # learner gets the same profile as from the clean log (the resampled values agree closely)
    rng = np.random.default_rng(3)

    def realistic(header, rows):
        rows = rows.copy()
        rows[:, 0] += 12.345 + rng.uniform(-50e-6, 50e-6, rows.shape[0])
        rows[0, 0], rows[-1, 0] = 12.345, 12.345 + 0.8 - 4e-6
        rows = np.column_stack([rows, np.full(rows.shape[0], 6.0)])
        return header + ["supply [bar]"], rows

    profile = str(tune_dir / "profiles" / "profile-0000.csv")
    clean = _rig_log(tune_dir, tmp_path, name="clean.csv")
    messy = _rig_log(tune_dir, tmp_path, name="messy.csv", edit=realistic)
    assert cli.main(["learn-step", "--rollout", str(clean), "--profile", profile, "--config", str(DEMO),
                     "--out", str(tmp_path / "a.csv"), "--json"]) == 0
    a = json.loads(capsys.readouterr().out)
    assert cli.main(["learn-step", "--rollout", str(messy), "--profile", profile, "--config", str(DEMO),
                     "--out", str(tmp_path / "b.csv"), "--resample"]) == 0
    out = capsys.readouterr().out
    assert "time shifted by -12.345 s" in out and "ignored column(s) supply [bar]" in out and "resampled" in out
    assert cli.main(["learn-step", "--rollout", str(messy), "--profile", profile, "--config", str(DEMO),
                     "--out", str(tmp_path / "c.csv"), "--resample", "--json"]) == 0
    c = json.loads(capsys.readouterr().out)
    assert abs(c["cost"] - a["cost"]) < 0.05 * a["cost"]


@pytest.mark.parametrize("value, column", [(1e300, "angle [deg]"), (-5e8, "command_a [kPa]")])
def test_an_outlier_sample_is_refused_naming_its_row(tune_dir, tmp_path, value, column):
    # common practice: a joint between end stops never turns half a revolution and no McKibben
    # rig sees 100 bar: such a sample is a logger fault; refusing it keeps the profile sound
    col = 1 if column.startswith("angle") else 2
    log = _rig_log(tune_dir, tmp_path, edit=_edit_row(30, col, value))
    _fails(["learn-step", "--rollout", str(log), "--profile", str(tune_dir / "profiles" / "profile-0000.csv"),
            "--config", str(DEMO), "--out", str(tmp_path / "n.csv")], f"row 32, column '{column}'")
    assert not (tmp_path / "n.csv").exists()


@pytest.mark.parametrize("text, expect", [("[1, 2]", "not a learner state"), ('{"theta": "abc"}', "--state"),
                                          ('{"theta": [NaN, 1]}', "finite knot values")])
def test_damaged_state_files_are_one_line_errors(tune_dir, tmp_path, text, expect):
    state = tmp_path / "s.json"
    state.write_text(text)
    _fails(["learn-step", "--rollout", str(tune_dir / "rollouts" / "trial-0000.csv"),
            "--profile", str(tune_dir / "profiles" / "profile-0000.csv"), "--state", str(state),
            "--config", str(DEMO), "--out", str(tmp_path / "n.csv")], expect)
    assert not (tmp_path / "n.csv").exists()


def _logged_pressures(tune_dir, tmp_path, name, above=()):
    """Trial 0's log with measured pressures; ``above``: (row, column, kPa) samples raised."""
    def edit(header, rows):
        r = read_log(tune_dir / "rollouts" / "trial-0000.csv", Setup.from_config(DEMO).task)
        rows = np.column_stack([rows, r.measured[:, 2:4] / 1e3])
        for i, c, v in above:
            rows[i, c] = v
        return header + ["pressure_a [kPa]", "pressure_b [kPa]"], rows
    return _rig_log(tune_dir, tmp_path, name=name, edit=edit)


def test_logged_samples_above_the_rating_carry_a_caution_counted_per_sample(tune_dir, tmp_path, capsys):
    # configs/flipper.yaml: rated pressure 6 bar = 600 kPa. Rows 100-102 read 6.3 bar on muscle A
    # (row 101 on both muscles: still one sample) and rows 200-201 command 6.5 bar on muscle B
    profile = str(tune_dir / "profiles" / "profile-0000.csv")
    raised = [(100, 4, 630.0), (101, 4, 615.0), (101, 5, 612.0), (102, 4, 601.0), (200, 3, 650.0), (201, 3, 620.0)]
    log = _logged_pressures(tune_dir, tmp_path, "hot.csv", raised)
    args = ["learn-step", "--rollout", str(log), "--profile", profile, "--config", str(DEMO)]
    assert cli.main(args + ["--out", str(tmp_path / "a.csv"), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["samples_above_rated"] == 5
    assert report["pressure_samples_above_rated"] == 3 and report["command_samples_above_rated"] == 2
    assert report["peak_logged_pressure_kpa"] == pytest.approx(630.0)
    assert report["peak_logged_command_kpa"] == pytest.approx(650.0)
    assert len(report["cautions"]) == 2
    pressure, command = report["cautions"]
    assert "measured pressures exceed the rated pressure 6 bar gauge in 3 sample(s) (peak 6.3 bar)" in pressure
    assert "commands exceed the rated pressure 6 bar gauge in 2 sample(s) (peak 6.5 bar)" in command
    assert all(c.startswith("CAUTION:") and "ISO 4414" in c and "\n" not in c for c in report["cautions"])
    assert cli.main(args + ["--out", str(tmp_path / "b.csv")]) == 0
    printed = capsys.readouterr().out.splitlines()
    assert [line for line in printed if line.startswith("CAUTION")] == report["cautions"]


def test_a_clean_log_carries_no_caution(tune_dir, tmp_path, capsys):
    log = _logged_pressures(tune_dir, tmp_path, "clean.csv")
    args = ["learn-step", "--rollout", str(log), "--profile", str(tune_dir / "profiles" / "profile-0000.csv"),
            "--config", str(DEMO)]
    assert cli.main(args + ["--out", str(tmp_path / "a.csv"), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["cautions"] == [] and report["samples_above_rated"] == 0
    assert report["pressure_samples_above_rated"] == 0 and report["command_samples_above_rated"] == 0
    assert 0 < report["peak_logged_pressure_kpa"] <= 600.0 and 0 < report["peak_logged_command_kpa"] <= 600.0
    assert cli.main(args + ["--out", str(tmp_path / "b.csv")]) == 0
    assert "CAUTION" not in capsys.readouterr().out


def test_the_next_profile_never_asks_above_the_rating(tune_dir, tmp_path):
    # a state whose guard reference holds knots at 7 bar (above the demo's 6 bar rating) and a
    # reference cost no trial meets: the guard falls back to those knots, which must not become
    # the next command for the rig
    state = json.loads((tune_dir / "profiles" / "state-0001.json").read_text())
    state["extra"].update({"ref_cost": 1e-12, "ref_theta": [7e5] * len(state["theta"]), "rerun": False})
    path = tmp_path / "s.json"
    path.write_text(json.dumps(state))
    _fails(["learn-step", "--rollout", str(tune_dir / "rollouts" / "trial-0001.csv"),
            "--profile", str(tune_dir / "profiles" / "profile-0001.csv"), "--state", str(path),
            "--config", str(DEMO), "--out", str(tmp_path / "n.csv")],
           "above the learner's upper pressure limit 6 bar")
    assert not (tmp_path / "n.csv").exists()
