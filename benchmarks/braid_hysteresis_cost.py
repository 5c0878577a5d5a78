"""Cost of the Maxwell-slip braid friction per muscle and sub-step, beside the tanh law.

The compiled plant calls :func:`muscle_sim.hysteresis.update` and :func:`~muscle_sim.hysteresis.force`
once per muscle and RK4 sub-step. This measures both inside one compiled loop over a swinging
length path for M = 1, 8, 32, 64 elements, and, in the same run and loop shape, the tanh law's
``F_s tanh(rate / scale)`` it replaces. Writes benchmarks/results/braid_hysteresis_cost.json with
nanoseconds per call and the ratio to the tanh law. One core, best of 5 repeats, warm-up first.
"""
from __future__ import annotations

import math
import os
import platform
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import numba  # noqa: E402
import numpy as np  # noqa: E402

from muscle_sim import hysteresis  # noqa: E402
from muscle_sim.records import write_json_atomic  # noqa: E402

OUT = ROOT / "benchmarks" / "results" / "braid_hysteresis_cost.json"
CALLS = 2_000_000
ELEMENT_COUNTS = (1, 8, 32, 64)
REPEATS = 5
SLIP_LENGTH = 1e-3       # [m]
SLIP_FORCE = 2.4         # [N], the demo muscle at 4 bar with braid_friction 0.03


@numba.njit(cache=True)
def _slip_loop(changes, breakaway, weight, slip):
    state = np.zeros(breakaway.shape[0])
    total = 0.0
    for k in range(changes.shape[0]):
        hysteresis.update(state, changes[k], breakaway)
        total += hysteresis.force(state, breakaway, weight, slip)
    return total


@numba.njit(cache=True)
def _tanh_loop(changes, rate_scale, slip):
    total = 0.0
    for k in range(changes.shape[0]):
        total += slip * math.tanh(changes[k] / rate_scale)
    return total


def _best_ns(fn, *args) -> float:
    fn(*args)                                  # compile or load, and warm up
    best = math.inf
    for _ in range(REPEATS):
        t0 = time.perf_counter()
        fn(*args)
        best = min(best, time.perf_counter() - t0)
    return best / CALLS * 1e9


def main() -> dict:
    try:
        os.sched_setaffinity(0, {min(os.sched_getaffinity(0))})
    except (AttributeError, OSError):
        pass
    # a length path swinging +-2 mm in 500 steps per cycle: elements stick, break away and slide
    changes = np.diff(2e-3 * np.sin(np.arange(CALLS + 1) * 2 * math.pi / 500))
    results = []
    for n in ELEMENT_COUNTS:
        args = (changes, hysteresis.breakaways(n, SLIP_LENGTH), hysteresis.weights(n), SLIP_FORCE)
        tanh_ns = _best_ns(_tanh_loop, changes, 1e-4, SLIP_FORCE)
        slip_ns = _best_ns(_slip_loop, *args)
        results.append({"elements": n, "maxwell_slip_ns_per_call": slip_ns, "tanh_ns_per_call": tanh_ns,
                        "ratio_to_tanh": slip_ns / tanh_ns})
        print(f"M = {n:2d}: Maxwell-slip {slip_ns:6.1f} ns per update+force, tanh law {tanh_ns:5.1f} ns "
              f"({slip_ns / tanh_ns:.1f}x)")
    out = {"benchmark": "braid_hysteresis_cost", "calls_per_repeat": CALLS, "repeats": REPEATS,
           "timing": "best of repeats, time.perf_counter, one core",
           "results": results,
           "machine": {"python": platform.python_version(), "numpy": np.__version__, "numba": numba.__version__,
                       "platform": platform.platform(), "cpu_count": os.cpu_count()}}
    write_json_atomic(OUT, out)
    return out


if __name__ == "__main__":
    main()
