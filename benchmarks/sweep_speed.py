"""Sweep speed: samples/s on 2 local worker processes against 1, and the scheduling overhead per
sample against the sample's own work, in one process run. Writes benchmarks/results/sweep_speed.json.

Workload: a tune sweep over the demo (payload drawn, tube length on a grid), SAMPLES samples of
TRIALS trials each. BLAS runs on one thread in every worker (muscle_sim.threads: run_sample is
wrapped in single_blas_thread). samples/s counts from handing the first sample to a worker until
the last record is written (worker start-up included); the overhead of a sample is the time from
handing it to a worker until its record came back, less the job's own time measured inside the
worker, for the samples after each worker's first (whose hand-over includes the process start).

Usage: ``python benchmarks/sweep_speed.py [--samples N] [--trials T]``.
"""
from __future__ import annotations

import argparse
import os
import platform
import statistics
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from muscle_sim.records import write_json_atomic  # noqa: E402
from muscle_sim.sweep import load_spec, run_sweep  # noqa: E402


def _spec(samples: int, trials: int) -> dict:
    return load_spec({"base": str(ROOT / "configs" / "flipper.yaml"), "seed": 0, "samples": samples,
                      "job": {"kind": "tune", "trials": trials},
                      "vary": {"plant.joint.payload_mass": {"uniform": ["0.05 kg", "0.3 kg"]},
                               "plant.pneumatics.tube_length": {"grid": ["1 m", "2 m", "3 m"]}}})


def measure(spec: dict, workers: int) -> dict:
    with tempfile.TemporaryDirectory() as tmp:
        r = run_sweep(spec, Path(tmp) / "sweep", workers=workers)
    work = [r.sample_seconds[i] for i in sorted(r.ran)]
    latency = r.latency_seconds
    order = sorted(latency, key=lambda i: i)
    later = order[workers:]              # each worker's first sample includes its start
    overhead = [latency[i] - r.sample_seconds[i] for i in later]
    run_s = r.wall_seconds - r.output_seconds
    return {"workers": workers, "samples": len(work), "wall_s": r.wall_seconds, "outputs_s": r.output_seconds,
            "run_s": run_s, "samples_per_s": len(work) / run_s, "work_per_sample_s": statistics.fmean(work),
            "work_total_s": sum(work), "overhead_per_sample_s": statistics.median(overhead) if overhead else None,
            "overhead_over_work": (statistics.median(overhead) / statistics.fmean(work)) if overhead else None,
            "first_wave_startup_s": [latency[i] - r.sample_seconds[i] for i in order[:workers]]}


def main(argv=None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--samples", type=int, default=12)
    parser.add_argument("--trials", type=int, default=3)
    args = parser.parse_args(argv)
    spec = _spec(args.samples, args.trials)
    one = measure(spec, 1)
    two = measure(spec, 2)
    speedup = two["samples_per_s"] / one["samples_per_s"]
    share = max(x for x in (one["overhead_over_work"], two["overhead_over_work"]) if x is not None)
    out = {"benchmark": "sweep_speed", "python": platform.python_version(), "machine": platform.machine(),
           "cores": os.cpu_count(), "load_average_at_end": os.getloadavg(),
           "workload": f"tune sweep over the demo, {args.samples} samples x {args.trials} trials",
           "blas_threads": "1 in every worker (single_blas_thread around run_sample)",
           "note": "measured on a 2-core machine shared with other test runs; a quiet machine may show more",
           "one_worker": one, "two_workers": two, "speedup_2_over_1": speedup,
           "overhead_over_work": share,
           "goal": {"speedup_2_over_1": ">= 1.7", "overhead_over_work": "<= 0.05"},
           "goal_met": {"speedup": speedup >= 1.7, "overhead": share <= 0.05}}
    write_json_atomic(ROOT / "benchmarks" / "results" / "sweep_speed.json", out)
    print(f"samples/s: 1 worker {one['samples_per_s']:.3f}, 2 workers {two['samples_per_s']:.3f} "
          f"(x{speedup:.2f}); overhead per sample {share:.2%} of its work")
    return out


if __name__ == "__main__":
    main()
