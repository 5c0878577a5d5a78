"""Cost of identifying the prior from logged trials (``controllers.identification``): wall time of
one identification against the time of one simulation of the prior over the same trial, measured
in the same run, for the demo's 400-sample strike (0.8 s at 500 Hz).

Cases:
- ``plant, pressures logged``: the demo's first trial (model-only feedforward on the valve plant),
  fitted with the demo's prior (two stages: pressure response, then mechanics);
- ``plant, angle only``: the same log without rate and pressures (one stage with the dead-time
  search over all parameters);
- ``prior x2 payload, noisy``: the prior itself with payload x2, delay x1.5, time constant x1.3 and
  pivot friction, the demo's sensor noise (the tests' case);
- ``plant, 3 trials``: the first three trials of a tune run fitted together.
Each identification runs REPEATS times (median); one simulation of the prior is timed as the
median of SIM_REPEATS. One process, BLAS pinned to one thread with threadpoolctl; the first call
(numba cache load) is not timed. Writes benchmarks/results/identify_cost.json.
Goal: one 400-sample trial identified in at most 2 s (the learner calls it after each trial).
"""
from __future__ import annotations

import copy
import dataclasses
import platform
import sys
import tempfile
from pathlib import Path

import numpy as np
import yaml
from threadpoolctl import threadpool_limits

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from controllers.identification import apply_prior_values, update_prior  # noqa: E402
from controllers.simple import ReplayProfile  # noqa: E402
from controllers.tuning import start_profile, tune  # noqa: E402
from muscle_sim.integrate import simulate  # noqa: E402
from muscle_sim.records import read_log, write_json_atomic  # noqa: E402
from muscle_sim.runs import run_trial  # noqa: E402
from muscle_sim.simulation import Setup  # noqa: E402

REPEATS = 3
SIM_REPEATS = 50
GOAL_S = 2.0


from _timing import median_time as _median_time  # noqa: E402  (benchmarks/ is on sys.path)


def _cases():
    demo_raw = yaml.safe_load((ROOT / "configs" / "flipper.yaml").read_text())
    demo = Setup.from_config(demo_raw)
    first, _ = run_trial(demo, ReplayProfile(start_profile(demo)), 0, np.random.default_rng(0))
    bare = dataclasses.replace(first, measured=first.measured.copy())
    bare.measured[:, 1:] = np.nan
    raw = copy.deepcopy(demo_raw)
    raw["prior"]["payload_known"] = True
    known = Setup.from_config(raw)
    truth = apply_prior_values(known.prior, {"payload_mass": 0.2, "pressure_delay": 0.009,
                                             "pressure_time_constant": 0.0195, "viscous_damping": 0.02,
                                             "coulomb_torque": 0.05}, payload_radius=0.25)
    own, _ = run_trial(dataclasses.replace(known, plant=truth), ReplayProfile(start_profile(known)), 0,
                       np.random.default_rng(0))
    with tempfile.TemporaryDirectory() as tmp:
        tune(demo, "norm-optimal", 3, 0, tmp)
        tuned = [read_log(Path(tmp) / "rollouts" / f"trial-{i:04d}.csv", demo.task) for i in range(3)]
    return [("plant, pressures logged", demo, [first]), ("plant, angle only", demo, [bare]),
            ("prior x2 payload, noisy", known, [own]), ("plant, 3 trials", demo, tuned)]


def _simulation_time(setup, log) -> float:
    x0 = np.r_[log.measured[0, 0], 0.0, log.command[0], 0.0, 0.0]
    return _median_time(lambda: simulate(setup.prior, x0, log.command[:-1], setup.task.dt, setup.task.n_substeps,
                                         u_before=log.command[0]), SIM_REPEATS)[0]


def main() -> dict:
    rows = []
    with threadpool_limits(limits=1, user_api="blas"):
        cases = _cases()
        update_prior(cases[0][1], cases[0][2])             # numba cache load, untimed
        for name, setup, logs in cases:
            t_sim = _simulation_time(setup, logs[0])
            t_id, (_, result) = _median_time(lambda: update_prior(setup, logs), REPEATS)
            row = {"case": name, "trials": len(logs), "samples": int(sum(len(r.t) for r in logs)),
                   "identify_s": t_id, "simulation_s": t_sim, "identify_over_simulation": t_id / t_sim,
                   "simulations": result.n_simulations, "success": result.success, "message": result.message,
                   "excited": [n for n, p in result.parameters.items() if p.excited],
                   "angle_rms_deg": [float(np.degrees(v)) for v in result.angle_rms]}
            rows.append(row)
            print(f"{name:26s} {t_id:6.2f} s = {row['identify_over_simulation']:6.0f} simulations of "
                  f"{t_sim * 1e3:.2f} ms ({result.n_simulations} run); angle rms "
                  f"{row['angle_rms_deg'][0]:.2f} -> {row['angle_rms_deg'][1]:.2f} deg")
    single = [r for r in rows if r["trials"] == 1]
    out = {"benchmark": "identify_cost", "python": platform.python_version(), "numpy": np.__version__,
           "timing": f"median of {REPEATS} identifications; one simulation of the prior over the same trial as the "
                     f"median of {SIM_REPEATS}; first call untimed; one process",
           "blas_threads": "pinned to 1 with threadpoolctl.threadpool_limits(limits=1, user_api='blas')",
           "goal": {"identify_s": f"<= {GOAL_S:g} s for one 400-sample trial"},
           "goal_met": all(r["identify_s"] <= GOAL_S for r in single), "rows": rows}
    write_json_atomic(ROOT / "benchmarks" / "results" / "identify_cost.json", out)
    return out


if __name__ == "__main__":
    main()
