"""Sweep speed benchmark: samples/s of `pamjoint sweep` on 2 local worker processes against 1, and
the scheduling overhead per sample.

The same spec (SAMPLES tune jobs of TRIALS trials on the demo flipper, payload and tube length
drawn) runs once on 1 worker process and once on 2, each into a fresh folder, so both runs do
identical work (the per-sample records are compared). Samples/s counts the whole `run_sweep` call
(worker start-up, per-sample records, sweep.json, table and figures). The scheduling overhead of
a sample is the time from handing it to a worker until its record is written, less the job's own
time inside the worker; it is given as the median over the samples of the 1-worker run, as a
fraction of the median sample's work, and also as the whole run's time not spent in jobs
(start-up and outputs included) per sample. BLAS is pinned to one thread inside every sample
(muscle_sim.threads.single_blas_thread) and in this process with threadpoolctl.
Writes benchmarks/results/sweep_speed.json. Goals: 2 workers >= 1.7x one; overhead <= 5 %.
"""
from __future__ import annotations

import json
import os
import platform
import statistics
import sys
import tempfile
from pathlib import Path

import numpy as np
from threadpoolctl import threadpool_limits

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from muscle_sim.records import write_json_atomic  # noqa: E402
from muscle_sim.sweep import load_spec, run_sweep  # noqa: E402

SAMPLES = 8
TRIALS = 4
SPEC = {"base": str(ROOT / "configs" / "flipper.yaml"), "seed": 0, "samples": SAMPLES,
        "job": {"kind": "tune", "trials": TRIALS, "method": "norm-optimal"},
        "vary": {"plant.joint.payload_mass": {"uniform": ["0.05 kg", "0.3 kg"]},
                 "plant.pneumatics.tube_length": {"uniform": ["0.5 m", "3 m"]}}}


def _run(workers: int, folder: Path) -> dict:
    spec = load_spec(SPEC)
    result = run_sweep(spec, folder / f"workers-{workers}", workers=workers)
    work = [result.sample_seconds[i] for i in sorted(result.ran)]
    overhead = [result.latency_seconds[i] - result.sample_seconds[i] for i in sorted(result.ran)]
    return {"workers": workers, "wall_s": result.wall_seconds, "samples_per_s": SAMPLES / result.wall_seconds,
            "median_sample_work_s": statistics.median(work), "total_sample_work_s": sum(work),
            "median_overhead_s": statistics.median(overhead), "output_s": result.output_seconds,
            "samples": [{k: s[k] for k in ("sample", "status", "values", "metrics")} for s in result.data["samples"]]}


def main() -> int:
    with threadpool_limits(limits=1, user_api="blas"), tempfile.TemporaryDirectory() as tmp:
        one = _run(1, Path(tmp))
        two = _run(2, Path(tmp))
    speedup = two["samples_per_s"] / one["samples_per_s"]
    overhead_fraction = one["median_overhead_s"] / one["median_sample_work_s"]
    whole_run_fraction = (one["wall_s"] - one["total_sample_work_s"]) / one["total_sample_work_s"]
    same = one.pop("samples") == two.pop("samples")
    out = {"benchmark": "sweep_speed", "python": platform.python_version(), "numpy": np.__version__,
           "cpu_count": os.cpu_count(), "samples": SAMPLES, "job": SPEC["job"],
           "timing": "one run_sweep call per worker count, fresh folders, the 1-worker run first; the machine is "
                     "shared, so other load shows in the numbers",
           "blas_threads": "pinned to 1 inside every sample (muscle_sim.threads) and in this process with "
                           "threadpoolctl.threadpool_limits(limits=1, user_api='blas')",
           "goal": {"speedup_2_over_1": ">= 1.7", "overhead_fraction": "<= 0.05 of a sample's work"},
           "speedup_2_over_1": speedup, "overhead_fraction": overhead_fraction,
           "whole_run_overhead_fraction": whole_run_fraction,
           "goal_met": {"speedup": speedup >= 1.7, "overhead": overhead_fraction <= 0.05},
           "same_samples_on_1_and_2_workers": same, "runs": [one, two]}
    write_json_atomic(ROOT / "benchmarks" / "results" / "sweep_speed.json", out)
    print(json.dumps({k: out[k] for k in ("speedup_2_over_1", "overhead_fraction", "whole_run_overhead_fraction",
                                          "goal_met", "same_samples_on_1_and_2_workers")}, indent=1))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
