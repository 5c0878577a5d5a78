"""`pamjoint tune` and `pamjoint compare`: run folders, kill -9 and resume, comparison contract."""
import json
import os
import signal
import subprocess
import sys
import time


from muscle_sim import cli

from conftest import DEMO, check_report

METRICS = ("rms_error_deg", "strike_angle_error_deg", "strike_speed_error_pct", "peak_pressure_kpa")


def test_tune_writes_every_trial(tmp_path, capsys):
    out = tmp_path / "t"
    assert cli.main(["tune", str(DEMO), "--trials", "3", "--out", str(out)]) == 0
    printed = capsys.readouterr().out
    assert "SAFETY" in printed and "reduced pressure" in printed
    summary = json.loads((out / "summary.json").read_text())
    assert summary["status"] == 0 and summary["best_trial"] in (0, 1, 2)
    assert [r["trial"] for r in summary["trials"]] == [0, 1, 2]
    for row in summary["trials"]:
        assert all(k in row for k in METRICS)
    for i in range(3):
        assert (out / "profiles" / f"profile-{i:04d}.csv").exists()
        assert (out / "rollouts" / f"trial-{i:04d}.csv").exists()
    for name in ("final_profile.csv", "learning_curve.png", "trajectories.png"):
        assert (out / name).exists()
    page = check_report(out, figures=2)
    assert summary["verdict"]["next_action"] in page and "reduced pressure" in page


def _kill_when(command, ready, poll: float) -> None:
    """Start ``command`` and kill -9 it as soon as ``ready()`` holds (or after 60 s)."""
    proc = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.time() + 60
    while time.time() < deadline and not ready():
        time.sleep(poll)
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait()


def _differing_files(a, b) -> list:
    """Files of run folders ``a`` and ``b`` that differ byte for byte or exist in one only."""
    names = {p.relative_to(a) for p in a.rglob("*") if p.is_file()} | {p.relative_to(b) for p in b.rglob("*")
                                                                      if p.is_file()}
    return sorted(str(n) for n in names if not ((a / n).is_file() and (b / n).is_file()
                                                and (a / n).read_bytes() == (b / n).read_bytes()))


def _resume_alone_matches(full, cut) -> None:
    """``tune --resume CUT`` with nothing else gives the uninterrupted folder ``full``, file for
    file, and leaves no temp file behind."""
    subprocess.run([sys.executable, "-m", "muscle_sim.cli", "tune", "--resume", str(cut)], check=True,
                   capture_output=True)
    assert json.loads((full / "summary.json").read_text())["trials"] == \
        json.loads((cut / "summary.json").read_text())["trials"]
    assert (full / "final_profile.csv").read_bytes() == (cut / "final_profile.csv").read_bytes()
    assert not list(cut.rglob("*.part"))
    assert _differing_files(full, cut) == []


def test_kill_9_then_resume_matches_an_uninterrupted_run(tmp_path):
    full, cut = tmp_path / "full", tmp_path / "cut"
    args = [sys.executable, "-m", "muscle_sim.cli", "tune", str(DEMO), "--trials", "8", "--seed", "3"]
    subprocess.run(args + ["--out", str(full)], check=True, capture_output=True)
    _kill_when(args + ["--out", str(cut)], lambda: (cut / "summary.json").exists()
               and len(json.loads((cut / "summary.json").read_text())["trials"]) >= 3, 0.01)
    done = len(json.loads((cut / "summary.json").read_text())["trials"])
    assert 3 <= done
    assert not list(cut.rglob("*.part")) or all(p.name.startswith(".") for p in cut.rglob("*.part"))
    subprocess.run(args + ["--resume", str(cut)], check=True, capture_output=True)
    a = json.loads((full / "summary.json").read_text())
    b = json.loads((cut / "summary.json").read_text())
    assert a["trials"] == b["trials"]
    assert (full / "final_profile.csv").read_bytes() == (cut / "final_profile.csv").read_bytes()
    assert _differing_files(full, cut) == []


def test_a_run_killed_in_its_first_trial_resumes_from_its_folder_alone(tmp_path):
    # derived from the run-folder contract: the folder keeps its config and options, a summary
    # exists from the start, so `tune --resume DIR` with nothing else continues to the same result
    full, cut = tmp_path / "full", tmp_path / "cut"
    args = [sys.executable, "-m", "muscle_sim.cli", "tune", str(DEMO), "--trials", "3", "--seed", "5"]
    subprocess.run(args + ["--out", str(full)], check=True, capture_output=True)
    _kill_when(args + ["--out", str(cut)], lambda: (cut / "summary.json").exists(), 0.002)
    assert len(json.loads((cut / "summary.json").read_text())["trials"]) < 3
    (cut / "profiles" / ".state-0001.json.abc.part").write_text("cut short")
    _resume_alone_matches(full, cut)


def test_a_run_killed_as_it_starts_resumes_from_its_options_alone(tmp_path):
    # derived from the run-folder contract: the options file is written first and holds the
    # config's text, so a kill before the config copy is written (deleted here to stand for it),
    # with a temp file of a write it cut short, still resumes to the very same folder
    full, cut = tmp_path / "full", tmp_path / "cut"
    args = [sys.executable, "-m", "muscle_sim.cli", "tune", str(DEMO), "--trials", "2", "--seed", "4"]
    subprocess.run(args + ["--out", str(full)], check=True, capture_output=True)
    _kill_when(args + ["--out", str(cut)], lambda: (cut / "tune_options.json").exists(), 0.0005)
    for name in ("config.yaml", "summary.json"):
        (cut / name).unlink(missing_ok=True)
    (cut / ".summary.json.abc.part").write_text("cut short")
    _resume_alone_matches(full, cut)


def test_resume_of_a_foreign_folder_is_refused(tmp_path):
    run = subprocess.run([sys.executable, "-m", "muscle_sim.cli", "tune", str(DEMO), "--resume", str(tmp_path)],
                         capture_output=True, text=True)
    assert run.returncode == 2 and "--resume" in run.stderr and run.stderr.count("\n") == 1


def test_compare_writes_the_table_of_all_controllers(tmp_path, capsys):
    out = tmp_path / "c"
    assert cli.main(["compare", str(DEMO), "--trials", "8", "--out", str(out)]) == 0
    data = json.loads((out / "comparison.json").read_text())
    names = {"model-only", "feedback", "model-only+feedback", "learned", "learned+feedback", "spsa"}
    assert set(data["controllers"]) == names
    for m in data["controllers"].values():
        assert all(k in m for k in METRICS)
    learned, model = data["controllers"]["learned"], data["controllers"]["model-only"]
    for key in ("rms_error_deg", "strike_angle_error_deg", "strike_speed_error_pct"):
        assert abs(learned[key]) < abs(model[key])
    assert "| learned |" in (out / "comparison.md").read_text()
    assert (out / "overlay_angle.png").exists()
    assert "<td>learned</td>" in check_report(out, figures=2)
    check_report(out / "learned", figures=2)
    # the feedback's gains were placed on the prior identified from the last learning trial
    feedback = data["feedback"]
    assert feedback["prior"] == "identified" and feedback["identified_from_trials"] == [7]
    ident = feedback["identification"]
    assert ident["residual_rms"] < ident["residual_rms_before"]
    gains = feedback["gains"]
    assert gains["success"] and gains["stable_on_prior"] and gains["set_by_config"] == []
    # Common practice (defaults of the feedback section): at least 30 deg phase margin, gain margin 2.
    assert gains["phase_margin_deg"] >= 30.0 - 1e-6 and gains["gain_margin"] >= 2.0
    assert gains["proportional_bar_per_deg"] > 0 and gains["loop_delay_ms"] > 0
    line = "Feedback gains" + " " + f"{gains['proportional_bar_per_deg']:.3g} bar/deg"
    assert line in capsys.readouterr().out and line in (out / "comparison.md").read_text()


def test_tune_from_a_plan_tracks_its_swing_from_the_plant_home(tmp_path, capsys):
    # reference: the plan folder's reference.csv (what the learner must track, copied verbatim)
    # and the home angle of configs/flipper.yaml (-30 deg): trial 0 opens at rest there, the
    # first command being the plan's first row, the home pressures (simulation.home_pressures)
    import numpy as np

    from muscle_sim.simulation import Setup, home_pressures

    plan_dir, out = tmp_path / "p", tmp_path / "t"
    assert cli.main(["plan", str(DEMO), "--iterations", "3", "--out", str(plan_dir)]) == 0
    assert cli.main(["tune", str(DEMO), "--start", str(plan_dir / "profile.csv"), "--trials", "1",
                     "--out", str(out)]) == 0
    assert "learning toward its planned swing" in capsys.readouterr().out
    planned = np.loadtxt(plan_dir / "reference.csv", delimiter=",", skiprows=2)
    tracked = np.loadtxt(out / "planned_reference.csv", delimiter=",", skiprows=2)
    np.testing.assert_allclose(tracked, planned, atol=1e-6)
    setup = Setup.from_config(DEMO)
    log = np.loadtxt(out / "rollouts" / "trial-0000.csv", delimiter=",", skiprows=2)
    opening = log[:, 0] < 0.02
    # no opening transient: within 0.2 deg of home over the first 20 ms (sensor noise ~0.05 deg;
    # a plan holding other pressures than the plant's home swung the joint 20 deg there)
    assert opening.sum() >= 5 and np.max(np.abs(log[opening, 1] + 30.0)) < 0.2
    np.testing.assert_allclose(log[0, 5:7], np.array(home_pressures(setup.prior, setup.task)) / 1e3, rtol=1e-6)


def test_tune_from_a_plan_of_another_task_exits_2(tmp_path, capsys):
    import yaml

    from conftest import demo_config

    plan_dir = tmp_path / "p"
    assert cli.main(["plan", str(DEMO), "--iterations", "2", "--out", str(plan_dir)]) == 0
    other = tmp_path / "other.yaml"
    other.write_text(yaml.safe_dump(demo_config(task__strike_speed="11 rad/s")))
    capsys.readouterr()
    assert cli.main(["tune", str(other), "--start", str(plan_dir / "profile.csv"), "--trials", "1",
                     "--out", str(tmp_path / "t")]) == 2
    err = capsys.readouterr().err
    assert "task.strike_speed" in err and len(err.strip().splitlines()) == 1
