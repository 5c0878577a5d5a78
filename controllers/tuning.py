"""Tuning a swing trial by trial on the simulated plant, with a run folder that survives kill -9.

Per trial ``i`` the folder gets ``profiles/profile-i.csv`` (the profile trial i ran) with
``profiles/state-i.json`` (the learner state that produced it), ``rollouts/trial-i.csv``, and
``summary.json`` listing the completed trials. Every file is written atomically and the sensor
noise of trial i is seeded by ``(seed, i)``, so ``resume`` continues bit for bit.
"""
from __future__ import annotations

import json
from dataclasses import asdict
from pathlib import Path

import numpy as np

from muscle_sim import safety
from muscle_sim.records import read_log, write_json_atomic
from muscle_sim.runs import run_trial
from muscle_sim.threads import single_blas_thread

from .learning import GradientLearner, LearnerState, LearningSettings
from .modelfree import SPSALearner
from .simple import ReplayProfile

METHODS = ("norm-optimal", "gradient", "spsa")
METRIC_KEYS = ("rms_error_deg", "strike_angle_error_deg", "strike_speed_error_pct", "peak_pressure_kpa")


def make_learner(setup, method: str, trials: int, seed: int):
    """The learner of ``method`` for ``setup`` with settings from the config's learning section."""
    settings = LearningSettings.from_config(setup.config)
    settings = LearningSettings(**{**asdict(settings), "method": method})
    if method == "spsa":
        return SPSALearner(setup, settings, budget_trials=trials, seed=seed)
    return GradientLearner(setup, settings)


def start_profile(setup):
    """The model-only feedforward profile the learners start from."""
    from .feedforward import model_only_profile

    return model_only_profile(setup)


def trial_rng(seed: int, trial: int) -> np.random.Generator:
    """Generator of trial ``trial``'s noise and drift: independent of how the run was split."""
    return np.random.default_rng([seed, trial])


def _paths(out: Path, i: int):
    return (out / "profiles" / f"profile-{i:04d}.csv", out / "profiles" / f"state-{i:04d}.json",
            out / "rollouts" / f"trial-{i:04d}.csv")


def final_theta(learner, state: LearnerState):
    """The profile a run recommends: the SPSA centre, else the best measured profile."""
    if isinstance(learner, SPSALearner):
        return state.extra["center"]
    return state.best_theta if state.best_theta is not None else state.theta


@single_blas_thread
def tune(setup, method: str, trials: int, seed: int, out, resume: bool = False, start=None, callback=None) -> dict:
    """Run ``trials`` learning trials (drift included); returns the summary written to ``out``.

    ``callback(row)`` is called after every trial with its summary row; returning True stops the
    run cleanly after that trial (status 1).
    """
    if method not in METHODS:
        raise ValueError(f"method: {method!r} is not allowed; must be one of {', '.join(METHODS)}")
    out = Path(out)
    learner = make_learner(setup, method, trials, seed)
    rows = []
    if resume:
        summary_path = out / "summary.json"
        if not summary_path.exists():
            raise ValueError(f"--resume: {str(out)!r} has no summary.json; nothing to resume")
        previous = json.loads(summary_path.read_text())
        if previous.get("config_hash") != setup.config.digest or previous.get("method") != method \
                or previous.get("seed") != seed:
            raise ValueError(f"--resume: {str(out)!r} was run with another config, method or seed")
        rows = previous["trials"]
        state_path = _paths(out, len(rows))[1]
        if not state_path.exists():
            raise ValueError(f"--resume: {str(state_path)!r} is missing; the run folder is incomplete")
        state = LearnerState.from_dict(json.loads(state_path.read_text()))
    else:
        profile0 = start if start is not None else start_profile(setup)
        state = learner.initial_state(profile0)
        p, s, _ = _paths(out, 0)
        learner.profile(state.theta, trial=0, method=method).write_csv(p)
        write_json_atomic(s, state.to_dict())
    status, message = 0, "all trials done"
    for i in range(len(rows), trials):
        profile = learner.profile(state.theta, trial=i, method=method)
        rollout, metrics = run_trial(setup, ReplayProfile(profile, name=method), i, trial_rng(seed, i), seed)
        _, _, rpath = _paths(out, i)
        rollout.write_csv(rpath)
        # learn from the log as written, exactly as `pamjoint learn-step` reads it from a rig
        logged = read_log(rpath, setup.task, allow_short=True)
        next_profile, state, result = learner.update(logged, profile, state)
        p, s, _ = _paths(out, i + 1)
        learner.profile(state.theta, trial=i + 1, method=method).write_csv(p)
        write_json_atomic(s, state.to_dict())
        row = {"trial": i, **{k: metrics[k] for k in METRIC_KEYS}, "settle_time_s": metrics["settle_time_s"],
               "fault": metrics["fault"], "cost": result.cost, "predicted_cost": result.predicted_cost,
               "update_status": result.status, "update_message": result.message,
               "active_limits": result.active_constraints}
        rows.append(row)
        best = int(np.nanargmin([r["cost"] for r in rows]))
        write_json_atomic(out / "summary.json", _summary(setup, method, seed, trials, rows, best, 1 if i + 1 < trials else 0,
                                                         "running" if i + 1 < trials else message))
        if callback is not None and callback(row):
            status, message = 1, f"stopped by the callback after trial {i}"
            break
    best = int(np.nanargmin([r["cost"] for r in rows])) if rows else None
    summary = _summary(setup, method, seed, trials, rows, best, status, message)
    theta = final_theta(learner, state)
    learner.profile(theta, method=method, final=True).write_csv(out / "final_profile.csv")
    _plots(setup, out, rows)
    write_json_atomic(out / "summary.json", summary)
    return summary


def _plots(setup, out: Path, rows) -> None:
    """learning_curve.png and trajectories.png (first, best and last trial)."""
    if not rows:
        return
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from muscle_sim.plotting import plot_angle, plot_learning_curve
    from muscle_sim.records import Rollout, save_figure_atomic

    fig, ax = plt.subplots(figsize=(7, 4), layout="constrained")
    plot_learning_curve(rows, ax=ax)
    save_figure_atomic(fig, out / "learning_curve.png")
    plt.close(fig)
    best = int(np.nanargmin([r["cost"] for r in rows]))
    picks = sorted({0, best, len(rows) - 1})
    shown = [Rollout.read_csv(_paths(out, i)[2]) for i in picks]
    fig, ax = plt.subplots(figsize=(7, 4), layout="constrained")
    plot_angle(shown, ax=ax, labels=[f"trial {i}" + (" (best)" if i == best else "") for i in picks])
    save_figure_atomic(fig, out / "trajectories.png")
    plt.close(fig)


def _summary(setup, method, seed, trials, rows, best, status, message) -> dict:
    cautions = []
    if setup.over_rated:
        cautions.append(safety.over_rated(setup.plant.pneumatics.supply_pressure / 1e5, setup.rated_pressure / 1e5))
    return {"status": status, "message": message, "method": method, "seed": seed, "trials_planned": trials,
            "config": setup.config.source, "config_hash": setup.config.digest, "best_trial": best,
            "trials": rows, "cautions": cautions, "safety": safety.GENERAL + " " + safety.HARDWARE}
