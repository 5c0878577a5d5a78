"""`pamjoint sweep`: spec checks, what sample i depends on, local processes against a Dask
LocalCluster, kill -9 and resume, a lost worker, failed samples, the table and the figures."""
import csv
import io
import json
import math
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import yaml

from muscle_sim import cli
from muscle_sim.sweep import (MAX_ATTEMPTS, METRICS, SweepError, load_spec, noise_seed, run_sweep, sample_plan,
                              samples_csv)

from conftest import DEMO, ROOT

SAMPLES = 4
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


def _spec(**changes) -> dict:
    """A small tune sweep over the demo: payload drawn, tube length on a grid of two."""
    spec = {"base": str(DEMO), "seed": 5, "samples": SAMPLES, "job": {"kind": "tune", "trials": 2},
            "vary": {"plant.joint.payload_mass": {"uniform": ["0.05 kg", "0.3 kg"]},
                     "plant.pneumatics.tube_length": {"grid": ["1 m", "3 m"]},
                     # a grid of one value: a quicker learner (no prior re-identification) for the tests
                     "learning.update_prior": {"grid": [False]}}}
    spec.update(changes)
    return spec


def _write(folder: Path, spec: dict, name: str = "spec.yaml") -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / name
    path.write_text(yaml.safe_dump(spec, sort_keys=False), encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """The small sweep run on 2 local worker processes: (spec path, sweep folder)."""
    root = tmp_path_factory.mktemp("sweep")
    path = _write(root, _spec())
    out = root / "two-processes"
    result = run_sweep(load_spec(str(path)), out, workers=2)
    assert sorted(result.ran) == list(range(SAMPLES))
    return path, out


def _sweep_cli(path, out, *extra):
    return [sys.executable, "-m", "muscle_sim.cli", "sweep", str(path), "--out", str(out), *extra]


def _records(out: Path) -> list:
    return sorted((out / "samples").glob("sample-*.json"))


def _wait_for_records(out: Path, count: int, proc, limit: float = 120.0) -> None:
    deadline = time.time() + limit
    while len(_records(out)) < count:
        assert proc.poll() is None, "the sweep ended before it could be interrupted"
        assert time.time() < deadline, "no sample finished in time"
        time.sleep(0.02)


# --- spec checks -----------------------------------------------------------------------------

BAD_SPECS = [
    ({"vary": {"plant.joint.payload_mas": {"grid": ["0.1 kg"]}}}, "vary.plant.joint.payload_mas",
     "did you mean 'plant.joint.payload_mass'"),
    ({"vary": {"plant.joint.payload_mass": {"uniform": [0.05, 0.3]}}}, "vary.plant.joint.payload_mass.uniform[0]",
     "has no unit"),
    ({"vary": {"plant.joint.payload_mass": {"uniform": ["-1 kg", "1 kg"]}}},
     "vary.plant.joint.payload_mass.uniform[0]", "must be >= 0 kg"),
    ({"vary": {"plant.joint.payload_mass": {"uniform": ["0.3 kg", "0.1 kg"]}}},
     "vary.plant.joint.payload_mass.uniform", "low end must be below the high end"),
    ({"vary": {"plant.joint.payload_mass": {"uniform": ["0.3 kg"]}}}, "vary.plant.joint.payload_mass.uniform",
     "must be [low, high]"),
    ({"vary": {"plant.joint.payload_mass": {"gaussian": ["0.1 kg", "1 g"]}}}, "vary.plant.joint.payload_mass.gaussian",
     "allowed: grid, uniform, log_uniform, normal"),
    ({"vary": {"plant.pneumatics.tube_length": {"log_uniform": ["0 m", "5 m"]}}},
     "vary.plant.pneumatics.tube_length.log_uniform[0]", "low end > 0"),
    ({"vary": {"plant.joint.payload_mass": {"normal": {"mean": "0.1 kg", "std": "-5 g"}}}},
     "vary.plant.joint.payload_mass.normal.std", "must be > 0"),
    ({"vary": {"plant.muscle.friction_model": {"uniform": ["tanh", "maxwell-slip"]}}},
     "vary.plant.muscle.friction_model.uniform", "use grid"),
    ({"vary": {"plant.pneumatics.tube_length": {"grid": ["1 m", "2 bar"]}}},
     "vary.plant.pneumatics.tube_length.grid[1]", "unit 'bar' is not one of"),
    ({"vary": {"plant.joint": {"grid": ["1 m"]}}}, "vary.plant.joint", "is not a config key"),
    ({"job": {"trials": 2}}, "job.kind", "missing"),
    ({"job": {"kind": "train"}}, "job.kind", "must be one of tune, compare, run"),
    ({"job": {"kind": "tune", "episodes": 3}}, "job.episodes", "not allowed for kind tune"),
    ({"job": {"kind": "compare", "method": "spsa"}}, "job.method", "not allowed for kind compare"),
    ({"job": {"kind": "run", "controller": "step"}}, "job.pressures", "missing"),
    ({"job": {"kind": "tune", "trials": 0}}, "job.trials", "must be >= 1"),
    ({"samples": None}, "samples", "missing"),
    ({"samples": 0}, "samples", "must be >= 1"),
    ({"sampels": 3}, "sampels", "did you mean 'samples'"),
    ({"seed": -1}, "seed", "must be >= 0"),
    ({"base": "no-such-config.yaml"}, "base", "cannot read"),
    ({"scenario": "random"}, "scenario", "must be one of random-mismatch"),
]


@pytest.mark.parametrize("changes, key, why", BAD_SPECS, ids=[c[1] + ":" + c[2][:18] for c in BAD_SPECS])
def test_bad_spec_gives_one_line_error_naming_the_key(tmp_path, capsys, changes, key, why):
    spec = _spec(**changes)
    spec = {k: v for k, v in spec.items() if v is not None}
    code = cli.main(["sweep", str(_write(tmp_path, spec)), "--out", str(tmp_path / "out")])
    err = capsys.readouterr().err
    assert code == 2
    assert err.count("\n") == 1 and err.startswith("pamjoint sweep: error: ")
    assert f"{key}:" in err and why in err
    assert not (tmp_path / "out" / "spec.json").exists()


def test_resume_of_another_spec_and_reuse_of_a_sweep_folder_are_refused(reference, tmp_path, capsys):
    path, out = reference
    other = _write(tmp_path, _spec(seed=6))
    assert cli.main(["sweep", str(other), "--out", str(out), "--resume"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "--resume:" in err and "another spec" in err
    assert cli.main(["sweep", str(path), "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "--out:" in err and "is not empty" in err
    assert cli.main(["sweep", str(path), "--out", str(tmp_path / "new"), "--workers", "-1"]) == 2
    assert "--workers: -1 is not allowed" in capsys.readouterr().err


# --- what a sample depends on ----------------------------------------------------------------

def test_sample_i_depends_only_on_seed_and_i(tmp_path):
    spec = load_spec(_write(tmp_path, _spec(samples=40)))
    fewer = load_spec(_write(tmp_path, _spec(samples=7), "fewer.yaml"))
    more_keys = _spec(samples=40)
    more_keys["vary"] = {"plant.muscle.braid_friction": {"log_uniform": [0.01, 0.1]}, **more_keys["vary"]}
    wider = load_spec(_write(tmp_path, more_keys, "wider.yaml"))
    reseeded = load_spec(_write(tmp_path, _spec(samples=40, seed=6), "reseeded.yaml"))
    values = [sample_plan(spec, i)[1] for i in range(40)]
    for i in range(7):
        assert sample_plan(fewer, i)[1] == values[i]
        assert noise_seed(fewer, i) == noise_seed(spec, i)
    for i in range(40):
        # adding a drawn key leaves the draws of the other keys as they were
        assert {k: v for k, v in sample_plan(wider, i)[1].items() if k in values[i]} == values[i]
    payload = np.array([v["plant.joint.payload_mass"] for v in values])
    tubes = [v["plant.pneumatics.tube_length"] for v in values]
    assert np.all((payload >= 0.05) & (payload <= 0.3)) and len(set(payload)) == 40
    # grid point i mod 2 (derived: a grid of two values, in the order written)
    assert tubes == [1.0, 3.0] * 20
    assert len({noise_seed(spec, i) for i in range(40)}) == 40
    other = [sample_plan(reseeded, i)[1]["plant.joint.payload_mass"] for i in range(40)]
    assert not np.any(np.isclose(other, payload))
    friction = np.array([sample_plan(wider, i)[1]["plant.muscle.braid_friction"] for i in range(40)])
    assert np.all((friction >= 0.01) & (friction <= 0.1))


def test_grid_product_and_normal_draws(tmp_path):
    spec = load_spec(_write(tmp_path, _spec(samples=None, vary={
        "plant.joint.payload_mass": ["0.1 kg", "0.2 kg", "0.3 kg"],
        "plant.muscle.friction_model": {"grid": ["tanh", "maxwell-slip"]}})))
    # derived: the product of a 3-value and a 2-value grid, the first key varying slowest
    assert spec["samples"] == 6
    points = [tuple(sample_plan(spec, i)[1].values()) for i in range(6)]
    assert points == [(0.1, "tanh"), (0.1, "maxwell-slip"), (0.2, "tanh"), (0.2, "maxwell-slip"),
                      (0.3, "tanh"), (0.3, "maxwell-slip")]
    raw, _ = sample_plan(spec, 1)
    assert raw["plant"]["muscle"]["friction_model"] == "maxwell-slip" and raw["plant"]["joint"]["payload_mass"] == "0.1 kg"
    normal = load_spec(_write(tmp_path, _spec(samples=400, vary={
        "task.strike_speed": {"normal": {"mean": "12 rad/s", "std": "0.5 rad/s"}}}), "normal.yaml"))
    draws = np.array([sample_plan(normal, i)[1]["task.strike_speed"] for i in range(400)])
    # derived: the mean of 400 normal draws lies within 4 standard errors (0.5 / sqrt(400)) of 12
    assert abs(draws.mean() - 12.0) < 4 * 0.5 / math.sqrt(400)
    # derived: the sample standard deviation of 400 draws is within 15 % of 0.5
    assert abs(draws.std(ddof=1) - 0.5) < 0.075


def test_mismatch_spec_samples_are_the_learning_benchmarks_draws():
    from muscle_sim.scenarios import draw_scenario

    spec = load_spec(ROOT / "configs" / "sweep-mismatch.yaml")
    demo = yaml.safe_load(DEMO.read_text(encoding="utf-8"))
    assert spec["samples"] >= 50 and spec["job"]["kind"] == "tune" and noise_seed(spec, 7) == 1
    for i in (0, 3):
        raw, values = sample_plan(spec, i)
        assert raw == draw_scenario(demo, np.random.default_rng(i))
        # the benchmark's draw description names the tube length it drew
        assert f"tube {values['plant.pneumatics.tube_length']:.3g} m" in raw["description"]


def test_demo_spec_varies_payload_and_tube_length_with_tune():
    spec = load_spec(ROOT / "configs" / "sweep-demo.yaml")
    assert spec["samples"] >= 8 and spec["job"]["kind"] == "tune"
    keys = {e["key"] for e in spec["vary"]}
    assert keys == {"plant.joint.payload_mass", "plant.pneumatics.tube_length"}
    payloads = {sample_plan(spec, i)[1]["plant.joint.payload_mass"] for i in range(spec["samples"])}
    assert len(payloads) >= 4


# --- running ---------------------------------------------------------------------------------

def test_two_local_processes_and_a_dask_cluster_give_equal_samples(reference, tmp_path):
    from dask.distributed import LocalCluster

    path, out = reference
    data = json.loads((out / "sweep.json").read_text())
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=False, dashboard_address=None) as cluster:
        result = run_sweep(load_spec(str(path)), tmp_path / "dask", scheduler=cluster.scheduler_address)
    assert result.data["samples"] == data["samples"]
    assert (tmp_path / "dask" / "sweep.json").read_bytes() == (out / "sweep.json").read_bytes()
    samples = data["samples"]
    assert [s["sample"] for s in samples] == list(range(SAMPLES))
    assert all(s["status"] == "ok" and s["error"] is None for s in samples)
    for s in samples:
        m = s["metrics"]
        assert 0.05 <= s["values"]["plant.joint.payload_mass"] <= 0.3
        assert m["trials"] == 2 and m["faults"] == 0
        # trial 0 runs the model-only feedforward, the last trial the learned profile
        assert m["rms_by_trial"] == [m["model_only_rms_deg"], m["learned_rms_deg"]]
        assert m["rms_ratio"] == pytest.approx(m["learned_rms_deg"] / m["model_only_rms_deg"], rel=1e-12)
    assert "SAFETY" in data["safety"] and data["summary"]["done"] == SAMPLES


def test_samples_table_is_plain_csv_and_the_figures_are_written(reference):
    _, out = reference
    data = json.loads((out / "sweep.json").read_text())
    text = (out / "samples.csv").read_text()
    rows = list(csv.reader(io.StringIO(text)))
    head, body = rows[0], rows[1:]
    assert head[:4] == ["sample", "status", "plant.joint.payload_mass [kg]", "plant.pneumatics.tube_length [m]"]
    assert all(h in head for h in METRICS) and len(body) == SAMPLES and all(len(r) == len(head) for r in body)
    assert not text.startswith("#")
    column = {h: [r[i] for r in body] for i, h in enumerate(head)}
    assert [float(v) for v in column["plant.joint.payload_mass [kg]"]] == \
        [s["values"]["plant.joint.payload_mass"] for s in data["samples"]]
    assert [float(v) for v in column["learned_rms_deg"]] == [s["metrics"]["learned_rms_deg"] for s in data["samples"]]
    try:
        import pandas
    except ImportError:
        pandas = None
    if pandas is not None:
        frame = pandas.read_csv(out / "samples.csv")
        assert list(frame.columns) == head and len(frame) == SAMPLES
    for name in ("success_by_key.png", "rms_ratio.png", "trials_to_strike.png"):
        assert (out / name).read_bytes()[:8] == PNG_MAGIC


def test_kill_9_mid_sweep_then_resume_gives_the_same_sweep_json(reference, tmp_path):
    path, full = reference
    cut = tmp_path / "cut"
    proc = subprocess.Popen(_sweep_cli(path, cut, "--workers", "2"), stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL, start_new_session=True)
    try:
        _wait_for_records(cut, 1, proc)
    finally:
        os.killpg(proc.pid, signal.SIGKILL)
        proc.wait()
    before = {p.name: p.read_bytes() for p in _records(cut)}
    assert 1 <= len(before) < SAMPLES and not (cut / "sweep.json").exists()
    run = subprocess.run(_sweep_cli(path, cut, "--workers", "2", "--resume"), capture_output=True, text=True)
    assert run.returncode == 0, run.stderr
    assert (cut / "sweep.json").read_bytes() == (full / "sweep.json").read_bytes()
    assert all((cut / "samples" / name).read_bytes() == body for name, body in before.items())
    assert f"sweep: {SAMPLES}/{SAMPLES} done, 0 failed" in run.stderr and "SAFETY" in run.stdout
    assert not list(cut.rglob("*.part")) and not (cut / "work").exists()


def _spawned_workers(pid: int) -> list:
    """Worker processes a pool of ``pid`` spawned (not its resource tracker)."""
    found = []
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            stat = (entry / "stat").read_text()
            command = (entry / "cmdline").read_bytes()
        except OSError:
            continue
        if int(stat.rsplit(")", 1)[1].split()[1]) == pid and b"spawn_main" in command:
            found.append(int(entry.name))
    return found


@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="finds the worker processes through /proc")
def test_a_lost_workers_sample_is_run_again(reference, tmp_path):
    path, full = reference
    out = tmp_path / "lost"
    proc = subprocess.Popen(_sweep_cli(path, out, "--workers", "2"), stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL)
    _wait_for_records(out, 1, proc)
    workers = _spawned_workers(proc.pid)
    assert workers and len(_records(out)) < SAMPLES
    os.kill(workers[0], signal.SIGKILL)
    assert proc.wait(timeout=180) == 0
    records = [json.loads(p.read_text()) for p in _records(out)]
    assert len(records) == SAMPLES and all(r["status"] == "ok" for r in records)
    assert any(1 < r["attempts"] <= MAX_ATTEMPTS for r in records)
    assert (out / "sweep.json").read_bytes() == (full / "sweep.json").read_bytes()


def test_a_failing_sample_is_recorded_and_the_sweep_goes_on(tmp_path, capsys):
    # a payload drawn below zero is an invalid config for that sample only; with seed 3 the draws of
    # samples 0-2 are about 0.096, -0.009 and 0.090 kg (numpy default_rng([3, i, crc32(key)]))
    spec = _spec(samples=3, seed=3, job={"kind": "run", "episodes": 1},
                 vary={"plant.joint.payload_mass": {"normal": {"mean": "0 kg", "std": "0.1 kg"}}})
    path = _write(tmp_path, spec)
    drawn = [sample_plan(load_spec(path), i)[1]["plant.joint.payload_mass"] for i in range(3)]
    assert any(v < 0 for v in drawn) and any(v >= 0 for v in drawn)
    assert cli.main(["sweep", str(path), "--out", str(tmp_path / "out"), "--workers", "0"]) == 0
    printed = capsys.readouterr()
    data = json.loads((tmp_path / "out" / "sweep.json").read_text())
    for sample, value in zip(data["samples"], drawn):
        assert sample["values"]["plant.joint.payload_mass"] == value
        if value < 0:
            assert sample["status"] == "failed" and sample["metrics"] is None
            assert sample["error"].startswith("ConfigError: plant.joint.payload_mass:") and "\n" not in sample["error"]
        else:
            assert sample["status"] == "ok" and sample["metrics"]["trials"] == 1
    failed = sum(v < 0 for v in drawn)
    assert data["summary"]["failed"] == failed and f"{failed} failed" in printed.out
    assert "failed" in printed.err and "plant.joint.payload_mass" in printed.err
    table = list(csv.DictReader(io.StringIO((tmp_path / "out" / "samples.csv").read_text())))
    assert [r["status"] for r in table] == [s["status"] for s in data["samples"]]
    assert all(r["error"] for r in table if r["status"] == "failed")


def test_local_path_runs_without_dask(tmp_path):
    path = _write(tmp_path, _spec(samples=1, job={"kind": "run"}))
    script = f"""
import sys
sys.modules["dask"] = sys.modules["distributed"] = None        # as if the cluster extra were not installed
from muscle_sim.sweep import SweepError, load_spec, run_sweep
spec = load_spec({str(path)!r})
assert run_sweep(spec, {str(tmp_path / 'local')!r}, workers=0).data["summary"]["ok"] == 1
try:
    run_sweep(spec, {str(tmp_path / 'cluster')!r}, scheduler="tcp://127.0.0.1:1")
except SweepError as exc:
    print(exc)
"""
    run = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True)
    assert run.returncode == 0, run.stderr
    assert "--scheduler: dask.distributed is not installed" in run.stdout and "cluster extra" in run.stdout


def test_unreachable_scheduler_is_a_one_line_error(tmp_path, capsys, monkeypatch):
    monkeypatch.setattr("muscle_sim.sweep.CONNECT_TIMEOUT", 1.0)
    path = _write(tmp_path, _spec(samples=1, job={"kind": "run"}))
    code = cli.main(["sweep", str(path), "--out", str(tmp_path / "o"), "--scheduler", "tcp://127.0.0.1:1"])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1 and "--scheduler: 'tcp://127.0.0.1:1' does not answer" in err


def test_table_of_a_failed_sample_leaves_its_metrics_empty():
    samples = [{"sample": 0, "status": "failed", "values": {"plant.joint.payload_mass": -0.01}, "metrics": None,
                "error": "ConfigError: plant.joint.payload_mass: '-0.01 kg' is not allowed, must be >= 0 kg"}]
    rows = list(csv.reader(io.StringIO(samples_csv(samples, ["plant.joint.payload_mass"]))))
    assert rows[1][:3] == ["0", "failed", "-0.01"] and rows[1][3:-1] == [""] * len(METRICS)
    # the comma inside the message is quoted, so the row keeps its cells
    assert rows[1][-1].endswith("must be >= 0 kg") and len(rows[1]) == len(rows[0])



def test_the_sweep_folder_holds_its_report(reference):
    # the run-folder contract of every command: a self-contained page with the table, the base
    # config, the three figures and the cautions
    from conftest import check_report
    _, out = reference
    page = check_report(out, figures=3)
    assert "samples done" in page
