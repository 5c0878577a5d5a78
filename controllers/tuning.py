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
from muscle_sim.records import read_log, write_json_atomic, write_text_atomic
from muscle_sim.report import config_text, write_report
from muscle_sim.tables import METRIC_COLUMNS, TRIAL, Column, cells
from muscle_sim.runs import run_trial
from muscle_sim.threads import single_blas_thread

from .learning import GradientLearner, LearnerState, LearningSettings, StrikeObjective
from .modelfree import SPSALearner
from .simple import ReplayProfile

METHODS = ("norm-optimal", "gradient", "spsa")
#: File of a tune folder holding the planned swing the learner tracks (when tuned from a plan).
PLANNED_REFERENCE = "planned_reference.csv"
METRIC_KEYS = tuple(c.key for c in METRIC_COLUMNS)


def make_learner(setup, method: str, trials: int, seed: int, reference=None):
    """The learner of ``method`` for ``setup`` with settings from the config's learning section;
    ``reference`` (N+1,) [rad] replaces the task's reference swing (a planned one)."""
    settings = LearningSettings.from_config(setup.config)
    settings = LearningSettings(**{**asdict(settings), "method": method})
    if method == "spsa":
        learner = SPSALearner(setup, settings, budget_trials=trials, seed=seed)
    else:
        learner = GradientLearner(setup, settings)
    if reference is not None:
        learner.objective = StrikeObjective(setup.task, settings, reference)
    return learner


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
def tune(setup, method: str, trials: int, seed: int, out, resume: bool = False, start=None, callback=None,
         reference=None) -> dict:
    """Run ``trials`` learning trials (drift included); returns the summary written to ``out``.

    ``reference`` (N+1,) [rad]: the swing the learner tracks instead of the task's (a plan's,
    with ``start`` its profile); saved as ``planned_reference.csv`` and used again on resume.

    ``callback(row)`` is called after every trial with its summary row; returning True stops the
    run cleanly after that trial (status 1).
    """
    if method not in METHODS:
        raise ValueError(f"method: {method!r} is not allowed; must be one of {', '.join(METHODS)}")
    out = Path(out)
    ref_path = out / PLANNED_REFERENCE
    if resume and reference is None and ref_path.exists():
        reference = np.radians(np.loadtxt(ref_path, delimiter=",", skiprows=2, ndmin=2)[:, 1])
    learner = make_learner(setup, method, trials, seed, reference)
    rows = []
    fresh = not resume
    if resume and not (out / "summary.json").exists() and (out / "tune_options.json").exists():
        fresh = True          # killed before its first trial was set up: start it over
    if not fresh:
        summary_path = out / "summary.json"
        if not summary_path.exists():
            raise ValueError(f"--resume: {str(out)!r} has no summary.json; nothing to resume")
        previous = json.loads(summary_path.read_text())
        if previous.get("config_hash") != setup.config.digest or previous.get("method") != method \
                or previous.get("seed") != seed:
            raise ValueError(f"--resume: {str(out)!r} was run with another config, method or seed")
        rows = previous["trials"]
        _remove_stale_parts(out)
        state_path = _paths(out, len(rows))[1]
        if not state_path.exists() and rows:
            raise ValueError(f"--resume: {str(state_path)!r} is missing; the run folder is incomplete")
        fresh = not state_path.exists()
        if not fresh:
            state = LearnerState.from_dict(json.loads(state_path.read_text()))
    if fresh:
        if resume:
            _remove_stale_parts(out)
        profile0 = start if start is not None else start_profile(setup)
        if reference is not None:
            t = np.arange(setup.task.n_steps + 1) * setup.task.dt
            lines = ["# swing the learner tracks (planned on the prior)", "time [s],reference [deg]"]
            lines += [f"{a:.9g},{np.degrees(q):.9g}" for a, q in zip(t, reference)]
            write_text_atomic(ref_path, "\n".join(lines) + "\n")
        state = learner.initial_state(profile0)
        p, s, _ = _paths(out, 0)
        learner.profile(state.theta, trial=0, method=method).write_csv(p)
        write_json_atomic(s, state.to_dict())
        # a summary from the start: a run killed during its first trial can be resumed too
        write_json_atomic(out / "summary.json", _summary(setup, method, seed, trials, [], None, 1, "running"))
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
               "active_limits": result.active_constraints, **diagnosis_fields(result)}
        rows.append(row)
        best = int(np.nanargmin([r["cost"] for r in rows]))
        write_json_atomic(out / "summary.json", _summary(setup, method, seed, trials, rows, best, 1 if i + 1 < trials else 0,
                                                         "running" if i + 1 < trials else message))
        if callback is not None and callback(row):
            status, message = 1, f"stopped by the callback after trial {i}"
            break
    best = int(np.nanargmin([r["cost"] for r in rows])) if rows else None
    summary = _summary(setup, method, seed, trials, rows, best, status, message)
    summary["verdict"] = verdict(rows)
    theta = final_theta(learner, state)
    learner.profile(theta, method=method, final=True).write_csv(out / "final_profile.csv")
    figures = _plots(setup, out, rows)
    write_json_atomic(out / "summary.json", summary)
    _report(setup, out, summary, figures)
    return summary


def _remove_stale_parts(out: Path) -> None:
    """Remove the temp files (``.NAME.*.part``) of writes a kill cut short."""
    for stale in out.rglob(".*.part"):
        stale.unlink(missing_ok=True)


def _report(setup, out: Path, summary: dict, figures) -> None:
    """report.html of a tune folder: the trial table, verdict and next action, figures, config."""
    verdict_ = summary.get("verdict") or {}
    rows = [{**r, "rejected": "rejected" if r.get("guard") else ""} for r in summary["trials"]]
    columns = METRIC_COLUMNS + (Column("rejected", "rejected"),)
    title = (f"tune of {setup.config.source} with {summary['method']}: {len(rows)} of {summary['trials_planned']} "
             f"trials, seed {summary['seed']}")
    notes = [f"{summary['message']}; best trial {summary['best_trial']}"]
    if verdict_:
        notes.append(f"verdict: {verdict_['message']}")
    write_report(out, title, cells(rows, columns, TRIAL), config_text(setup.config),
                 summary["cautions"] + [safety.HARDWARE], verdict_.get("next_action", "–"), figures, notes=notes)


#: A strike counts as reached within these (the task's precision goal).
STRIKE_ANGLE_TOLERANCE_DEG = 0.2
STRIKE_SPEED_TOLERANCE_PCT = 1.0


def diagnosis_fields(result) -> dict:
    """What limited a trial's update, for its summary row."""
    d = result.diagnosis
    return {"boxed_knots": d.get("boxed_knots"), "boxed_in_strike_window": d.get("boxed_in_strike_window"),
            "angle_limits": d.get("angle_limits"), "achieved_over_predicted": d.get("achieved_over_predicted"),
            "reidentified": d.get("reidentified", []), "guard": bool(d.get("guard", False)),
            "learning_gain": d.get("learning_gain")}


def strike_reached(row) -> bool:
    """Whether a trial's strike is within the task's precision goal (0.2 deg, 1 %)."""
    a, v = row.get("strike_angle_error_deg"), row.get("strike_speed_error_pct")
    return a is not None and v is not None and abs(a) <= STRIKE_ANGLE_TOLERANCE_DEG \
        and abs(v) <= STRIKE_SPEED_TOLERANCE_PCT


def verdict(rows, window: int = 4) -> dict:
    """A plain verdict on a run and the next action, from its summary rows.

    When the strike was not reached, the last ``window`` trials are read for the usual causes,
    in this order: actuator saturation (the strike window's knots sit on the pressure box), drift
    faster than learning (guard fallbacks whose rerun came back worse than the profile's earlier
    trial), prior mismatch beyond what the updates absorb (the errors did not move as the prior
    predicted, or no sound step could be found), a noise floor (the prior predicts almost no
    decrease left while the strike is still off), and otherwise a run that is still converging.
    """
    if not rows:
        return {"reached": False, "cause": "no-trials", "message": "no trial ran", "next_action": "run trials"}
    reached = [r["trial"] for r in rows if strike_reached(r)]
    recent = rows[-window:]
    if reached:
        first = reached[0]
        tail_ok = strike_reached(rows[-1])
        return {"reached": True, "cause": "reached", "first_trial": first,
                "message": f"strike within {STRIKE_ANGLE_TOLERANCE_DEG:g} deg and {STRIKE_SPEED_TOLERANCE_PCT:g} % "
                           f"from trial {first}" + ("" if tail_ok else "; the last trial is outside again"),
                "next_action": "check the final profile on the rig at reduced pressure" if tail_ok else
                               "run more trials or raise learning.regularisation to steady the updates"}

    def share(pred):
        return sum(1 for r in recent if pred(r)) / len(recent)

    if share(lambda r: (r.get("boxed_in_strike_window") or 0) > 0) >= 0.5:
        return {"reached": False, "cause": "actuator-saturation",
                "message": "the strike needs more than the pressures allow: knots shaping the strike sit on the "
                           "learner's pressure limits",
                "next_action": "check what is reachable with `pamjoint plan`; raise learning.max_pressure (never above "
                               "the rating), use a stronger muscle or smaller pulley, or ask for a slower strike"}
    guards = [i for i, r in enumerate(rows) if r.get("guard")]
    drifted = [i for i in guards if i + 1 < len(rows) and i > 0 and rows[i + 1]["cost"] > 1.5 * rows[i - 1]["cost"]]
    if drifted and drifted[-1] >= len(rows) - 2 * window:
        return {"reached": False, "cause": "drift",
                "message": "the plant drifts faster than learning follows: a profile rerun after a guard fallback came "
                           "back worse than when it ran before",
                "next_action": "find what changes between trials (supply pressure, friction, temperature) and hold it "
                               "steady, or tune again from the current profile more often"}
    ratios = [r.get("achieved_over_predicted") for r in recent]
    poor = [x for x in ratios if x is not None and x < 0.25]
    unsound = share(lambda r: r.get("update_status") in (3, 5))
    if len(poor) >= max(1, len(recent) // 2) or unsound >= 0.5:
        return {"reached": False, "cause": "prior-mismatch",
                "message": "prior mismatch beyond what the updates absorb: the errors did not change as the prior "
                           "predicted" + (" (no sound step found)" if unsound >= 0.5 else ""),
                "next_action": "identify the prior from these trials (`pamjoint identify`), check payload, inertia and "
                               "pressure delay in the config, then tune again"}
    if share(lambda r: r["cost"] > 0 and (r["cost"] - r["predicted_cost"]) < 0.05 * r["cost"]) >= 0.5:
        return {"reached": False, "cause": "noise-floor",
                "message": "noise floor reached: the prior predicts almost no improvement left, yet the strike is off",
                "next_action": "reduce sensor noise or trial-to-trial variation, or accept the present precision"}
    return {"reached": False, "cause": "converging",
            "message": "still converging: errors are falling but the strike is not within the goal yet",
            "next_action": "run more trials (`pamjoint tune --resume`)"}


def _plots(setup, out: Path, rows) -> list:
    """learning_curve.png and trajectories.png (first, best and last trial); returns
    ``(path, caption)`` pairs for the report."""
    if not rows:
        return []
    from muscle_sim.plotting import new_figure, plot_learning_curve, plot_trial_stack
    from muscle_sim.records import Rollout, save_figure_atomic

    name = setup.config.get("name") or "tune"
    fig, axes = new_figure(3, 1, figsize=(7.5, 7), sharex=True)
    plot_learning_curve(rows, axes[:, 0], goals=(STRIKE_ANGLE_TOLERANCE_DEG, STRIKE_SPEED_TOLERANCE_PCT))
    fig.suptitle(f"{name}: errors per learning trial", fontsize="medium")
    curve = save_figure_atomic(fig, out / "learning_curve.png")
    best = int(np.nanargmin([r["cost"] for r in rows]))
    picks = sorted({0, best, len(rows) - 1})
    shown = [Rollout.read_csv(_paths(out, i)[2]) for i in picks]
    fig, _ = new_figure(0, figsize=(11, 8))
    j = setup.plant.joint
    plot_trial_stack(fig, shown, setup.task, (j.lower_stop, j.upper_stop), setup.rated_pressure,
                     labels=[f"trial {i}" + {(True, True): " (best, last)", (True, False): " (best)",
                                             (False, True): " (last)", (False, False): ""}[(i == best, i == len(rows) - 1)]
                             for i in picks],
                     detail=picks.index(best), detail_label=f"best trial {best}")
    fig.suptitle(f"{name}: trials {', '.join(map(str, picks))} of {len(rows)} (first, best, last)", fontsize="medium")
    traj = save_figure_atomic(fig, out / "trajectories.png")
    return [(curve, "learning_curve.png: swing RMS error, strike angle error and strike speed error per trial, "
                    "the precision goal shaded; rejected (guard) and faulted trials marked"),
            (traj, "trajectories.png: joint angle of the first, best and last trial against the reference, pressures "
                   "and commands of the best trial, the strike window enlarged on the right")]


def _summary(setup, method, seed, trials, rows, best, status, message) -> dict:
    cautions = []
    if setup.over_rated:
        cautions.append(safety.over_rated(setup.plant.pneumatics.supply_pressure / 1e5, setup.rated_pressure / 1e5))
    return {"status": status, "message": message, "method": method, "seed": seed, "trials_planned": trials,
            "config": setup.config.source, "config_hash": setup.config.digest, "best_trial": best,
            "trials": rows, "cautions": cautions, "safety": safety.GENERAL + " " + safety.HARDWARE}
