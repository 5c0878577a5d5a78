"""Learner cost benchmark: wall time of one learner update / one simulated trial at N = 250 ... 4000
samples of the same 0.8 s strike (control rate N / 0.8 s, knots every 8 ms).
Writes benchmarks/results/learner_cost.json. Goals: ratio <= 2; growth <= 2.3x per doubling of N.
"""
from __future__ import annotations

import copy
import platform
import sys
import time
from pathlib import Path

import numpy as np
import yaml

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from controllers.simple import ReplayProfile  # noqa: E402
from controllers.tuning import make_learner, start_profile, trial_rng  # noqa: E402
from muscle_sim.records import write_json_atomic  # noqa: E402
from muscle_sim.runs import run_trial  # noqa: E402
from muscle_sim.simulation import Setup  # noqa: E402

SAMPLES = (250, 500, 1000, 2000, 4000)


def best_of(fn, repeats=3):
    best = float("inf")
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out


def main() -> dict:
    demo = yaml.safe_load((ROOT / "configs" / "flipper.yaml").read_text())
    rows = []
    for n in SAMPLES:
        raw = copy.deepcopy(demo)
        raw["task"]["control_rate"] = f"{n / 0.8:g} Hz"
        raw["task"]["strike_time"] = "256 ms"       # a whole number of steps at every rate
        setup = Setup.from_config(raw)
        learner = make_learner(setup, "norm-optimal", 10, 0)
        state = learner.initial_state(start_profile(setup))
        profile = learner.profile(state.theta)
        t_trial, (rollout, _) = best_of(lambda: run_trial(setup, ReplayProfile(profile), 0, trial_rng(0, 0)))
        t_update, _ = best_of(lambda: learner.update(rollout, profile, state))
        rows.append({"samples": n, "control_rate_hz": n / 0.8, "knots_per_muscle": learner.basis.n_knots,
                     "trial_s": t_trial, "update_s": t_update, "update_over_trial": t_update / t_trial})
        print(f"N = {n:5d}: trial {t_trial * 1e3:8.1f} ms, update {t_update * 1e3:8.1f} ms, "
              f"ratio {t_update / t_trial:5.2f}")
    for a, b in zip(rows, rows[1:]):
        b["update_growth_per_doubling"] = b["update_s"] / a["update_s"]
    out = {"benchmark": "learner_cost", "python": platform.python_version(), "numpy": np.__version__,
           "goal": {"update_over_trial": "<= 2", "update_growth_per_doubling": "<= 2.3"}, "rows": rows}
    write_json_atomic(ROOT / "benchmarks" / "results" / "learner_cost.json", out)
    return out


if __name__ == "__main__":
    main()
