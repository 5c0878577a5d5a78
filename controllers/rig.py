"""The real-rig loop: one logged trial in, the next profile out, by the same learner code as tune."""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np

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
    expected = learner.profile(state.theta).commands
    if expected.shape != profile.commands.shape or np.max(np.abs(expected - profile.commands)) > 10.0:
        raise DataError("--profile: does not match --state (the state's knots give another profile); "
                        "pass the state saved beside this profile")
    if log.command.shape[0] - 1 > task.n_steps:
        raise DataError(f"--rollout: {log.command.shape[0]} rows is more than the task's {task.n_steps + 1}")
    return learner.update(log, profile, state)


def load_state(path) -> LearnerState:
    """Read a learner state JSON (one-line DataError if it is not one)."""
    try:
        return LearnerState.from_dict(json.loads(Path(path).read_text()))
    except (OSError, ValueError, TypeError) as exc:
        raise DataError(f"--state: {str(path)!r} is not a learner state file ({exc.__class__.__name__})") from None
