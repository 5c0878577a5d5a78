"""Learning benchmark: trials to a precise strike, RMS after 10 trials against model-only control,
and the trials SPSA needs for the same precision. Writes benchmarks/results/learning.json.

Goals (issue): learned swing RMS after 10 trials >= 20x smaller than model-only; SPSA needs >= 20x
more trials for strike angle error <= 0.2 deg and speed error <= 1 %.
"""
from __future__ import annotations

import copy
import platform
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import yaml

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from controllers.feedforward import FeedforwardController, model_only_profile  # noqa: E402
from controllers.tuning import trial_rng, tune  # noqa: E402
from muscle_sim.records import write_json_atomic  # noqa: E402
from muscle_sim.runs import run_trial  # noqa: E402
from muscle_sim.simulation import Setup  # noqa: E402

ANGLE_GOAL, SPEED_GOAL = 0.2, 1.0
LEARN_TRIALS, SPSA_BUDGET = 30, 300


def scenarios():
    demo = yaml.safe_load((ROOT / "configs" / "flipper.yaml").read_text())
    heavy = copy.deepcopy(demo)
    heavy["plant"]["joint"]["payload_mass"] = "0.3 kg"          # triple the unknown payload
    heavy["prior"]["inertia_error"] = "-15 %"                   # and a paddle inertia 15 % low
    slow = copy.deepcopy(demo)
    slow["plant"]["pneumatics"]["tube_length"] = "4 m"          # 11.7 ms transport delay, 50 cm^3
    slow["plant"]["muscle"]["end_correction"] = 1.4             # stronger end effect than in the demo
    slow["prior"]["pressure_delay"] = "8 ms"                    # the prior's delay 6 ms short
    return {"demo": demo, "heavy-payload": heavy, "long-tube-end-effect": slow}


def first_reaching(rows):
    for r in rows:
        a, s = r["strike_angle_error_deg"], r["strike_speed_error_pct"]
        if a is not None and s is not None and abs(a) <= ANGLE_GOAL and abs(s) <= SPEED_GOAL:
            return r["trial"] + 1          # trials used, counting from one
    return None


def main() -> dict:
    results = {}
    for name, raw in scenarios().items():
        setup = Setup.from_config(raw)
        _, base = run_trial(setup, FeedforwardController(model_only_profile(setup)), 0, trial_rng(0, 0), 0)
        with tempfile.TemporaryDirectory() as tmp:
            t0 = time.perf_counter()
            learned = tune(setup, "norm-optimal", LEARN_TRIALS, 0, Path(tmp) / "learn")
            t_learn = time.perf_counter() - t0
            t0 = time.perf_counter()
            spsa = tune(setup, "spsa", SPSA_BUDGET, 0, Path(tmp) / "spsa")
            t_spsa = time.perf_counter() - t0
        rows = learned["trials"]
        rms10 = min(r["rms_error_deg"] for r in rows[:10])
        n_learn = first_reaching(rows)
        n_spsa = first_reaching(spsa["trials"])
        results[name] = {
            "model_only": {k: base[k] for k in ("rms_error_deg", "strike_angle_error_deg", "strike_speed_error_pct")},
            "learned_rms_after_10_trials_deg": rms10,
            "rms_ratio_model_only_over_learned": base["rms_error_deg"] / rms10,
            "learned_trials_to_goal": n_learn,
            "spsa_trials_to_goal": n_spsa,
            "spsa_budget": SPSA_BUDGET,
            "spsa_over_learned_trials": (n_spsa / n_learn) if (n_spsa and n_learn) else None,
            "spsa_over_learned_at_least": (SPSA_BUDGET / n_learn) if (n_learn and not n_spsa) else None,
            "learned_curve_rms_deg": [r["rms_error_deg"] for r in rows],
            "spsa_best_rms_deg": min(r["rms_error_deg"] for r in spsa["trials"]),
            "seconds": {"learn": t_learn, "spsa": t_spsa},
        }
        print(f"{name:22s} model-only rms {base['rms_error_deg']:7.3f} deg | learned rms@10 {rms10:6.3f} deg "
              f"(x{base['rms_error_deg'] / rms10:6.1f}) | trials to goal: learned {n_learn}, spsa {n_spsa} "
              f"(budget {SPSA_BUDGET})")
    out = {"benchmark": "learning", "python": platform.python_version(), "numpy": np.__version__,
           "goal": {"strike_angle_error_deg": ANGLE_GOAL, "strike_speed_error_pct": SPEED_GOAL,
                    "rms_ratio_after_10_trials": ">= 20", "spsa_over_learned_trials": ">= 20"},
           "scenarios": results}
    write_json_atomic(ROOT / "benchmarks" / "results" / "learning.json", out)
    return out


if __name__ == "__main__":
    main()
