"""The real-rig loop: one logged trial in, the next profile out, by the same learner code as tune."""
from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np

from muscle_sim import safety
from muscle_sim.errors import DataError
from muscle_sim.threads import single_blas_thread

from .base import PressureProfile
from .learning import LearnerState
from .tuning import make_learner


def state_path_for(profile_path) -> Path:
    """Where the learner state of a profile CSV lives: ``NAME.csv`` -> ``NAME.state.json``; the
    tune folder's ``profile-NNNN.csv`` pairs with ``state-NNNN.json``."""
    p = Path(profile_path)
    if p.name.startswith("profile-") and p.suffix == ".csv":
        return p.with_name("state-" + p.name[len("profile-"):-4] + ".json")
    return p.with_suffix(".state.json")


@single_blas_thread
def learn_step(setup, log, profile: PressureProfile, state: LearnerState | None = None, method: str | None = None):
    """Next profile, state and result from a logged trial ``log`` that ran ``profile``.

    Exactly the update of ``pamjoint tune`` (same method options, limits and guard). Without a
    ``state`` the learner starts as on a first trial with ``profile``.
    """
    method = method or setup.config.get("learning.method")
    if method == "spsa":
        raise DataError("--method: 'spsa' is not allowed for learn-step; it needs paired trials "
                        "(use norm-optimal or gradient)")
    task = setup.task
    profile.check_grid(task.dt, task.n_steps, "--profile")
    learner = make_learner(setup, method, 1, 0)
    if state is None:
        state = learner.initial_state(profile)
    try:
        theta = np.asarray(state.theta, dtype=float) if isinstance(state.theta, list) else np.zeros(0)
    except (TypeError, ValueError):
        theta = np.zeros(0)
    if theta.shape != (learner.basis.n_params,) or not np.all(np.isfinite(theta)):
        raise DataError(f"--state: theta must be {learner.basis.n_params} finite knot values for this config's "
                        f"trial; this state holds {theta.size} (a state of another config, or damaged)")
    expected = learner.profile(state.theta).commands
    if expected.shape != profile.commands.shape or np.max(np.abs(expected - profile.commands)) > 10.0:
        raise DataError("--profile: does not match --state (the state's knots give another profile); "
                        "pass the state saved beside this profile")
    if log.command.shape[0] - 1 > task.n_steps:
        raise DataError(f"--rollout: {log.command.shape[0]} rows is more than the task's {task.n_steps + 1}")
    scale = state.step_scale
    if isinstance(scale, bool) or not isinstance(scale, (int, float)) or not 0.0 < scale <= 4.0:
        raise DataError(f"--state: step_scale {str(scale)[:40]!r} is not allowed; must be a number in (0, 4]")
    if isinstance(state.trial, bool) or not isinstance(state.trial, int) or state.trial < 0:
        raise DataError(f"--state: trial {str(state.trial)[:40]!r} is not allowed; must be a whole number >= 0")
    cost = state.best_cost
    if cost is not None and (isinstance(cost, bool) or not isinstance(cost, (int, float)) or not math.isfinite(cost)):
        raise DataError(f"--state: best_cost {str(cost)[:40]!r} is not allowed; must be a finite number or null")
    if not isinstance(state.extra, dict):
        raise DataError("--state: 'extra' must be an object (the learner's record); this state is damaged")
    try:
        new_profile, new_state, result = learner.update(log, profile, state)
    except (TypeError, KeyError, ValueError, ArithmeticError, np.linalg.LinAlgError) as exc:
        raise DataError(f"--state: the learner's record in it is damaged ({exc.__class__.__name__}); pass the "
                        f"state saved beside the profile") from None
    if not (np.all(np.isfinite(new_profile.commands)) and np.all(np.isfinite(new_state.theta))):
        raise DataError("--rollout: the update from this log is not finite; no profile written "
                        "(check the log for a faulty channel)")
    peak = float(new_profile.commands.max())
    if peak > learner.p_high + PRESSURE_SLACK:
        # the update clips its step to the box, but a guard fallback or a refused step keeps the
        # knots it was handed: a profile or state from elsewhere must not come back as a command
        raise DataError(f"--state: the next profile would ask up to {peak / 1e5:.4g} bar, above the learner's upper "
                        f"pressure limit {learner.p_high / 1e5:g} bar (rated pressure {setup.rated_pressure / 1e5:g} "
                        f"bar); no profile written (the profile and state passed in hold knots above it)")
    return new_profile, new_state, result


#: Rounding slack [Pa] of the profile's interpolation between knots held at the pressure limit.
PRESSURE_SLACK = 1.0


def logged_pressure_check(setup, log) -> dict:
    """Logged pressures and commands above the rated pressure, counted per sample.

    Returns ``samples_above_rated`` (samples where any logged pressure or command is above the
    rating), the same count per kind (``pressure_samples_above_rated``,
    ``command_samples_above_rated``), the peaks logged [kPa] (None where a channel is absent) and
    ``cautions``: one line per kind above the rating (:func:`muscle_sim.safety.logged_above_rated`).
    """
    rated = setup.rated_pressure
    pressures = np.asarray(log.measured[:, 2:4], dtype=float)
    commands = np.asarray(log.command, dtype=float)
    report, cautions, above = {}, [], np.zeros(commands.shape[0], dtype=bool)
    for kind, values in (("pressure", pressures), ("command", commands)):
        logged = values[np.isfinite(values)]        # pressures not logged are NaN: nothing to count
        rows = np.any(values > rated, axis=1)
        above |= rows
        peak = float(logged.max()) if logged.size else None
        report[f"{kind}_samples_above_rated"] = int(np.count_nonzero(rows))
        report[f"peak_logged_{kind}_kpa"] = None if peak is None else peak / 1e3
        if rows.any():
            cautions.append(safety.logged_above_rated(kind, int(np.count_nonzero(rows)), peak / 1e5, rated / 1e5))
    return {"samples_above_rated": int(np.count_nonzero(above)), **report, "rated_pressure_kpa": rated / 1e3,
            "cautions": cautions}


def load_state(path) -> LearnerState:
    """Read a learner state JSON (one-line DataError if it is not one)."""
    try:
        data = json.loads(Path(path).read_text(encoding="utf-8"))
        if not isinstance(data, dict):
            raise TypeError("not an object")
        return LearnerState.from_dict(data)
    except (OSError, ValueError, TypeError) as exc:
        raise DataError(f"--state: {str(path)!r} is not a learner state file ({exc.__class__.__name__})") from None
