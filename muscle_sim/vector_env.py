"""Natively batched Gymnasium VectorEnv of the strike task: a thin shell over the trial core
(:class:`muscle_sim.trial.TrialBatch` with ``num_envs`` members)."""
from __future__ import annotations

import numpy as np
from gymnasium import spaces
from gymnasium.utils import seeding
from gymnasium.vector import AutoresetMode, VectorEnv
from gymnasium.vector.utils import batch_space

from .env import DEMO_CONFIG
from .simulation import Setup
from .trial import MAX_TRIAL, TrialBatch, actions_to_commands, check_trial, observation_bounds


class FlipperStrikeVectorEnv(VectorEnv):
    """``num_envs`` strike trials stepped together (see :class:`~muscle_sim.env.FlipperStrikeEnv`
    for the spaces, reward, start state and episode end; this class has the same, batched).

    It behaves as ``gymnasium.make_vec(ID, num_envs, vectorization_mode="sync")`` does, member by
    member and step for step, noise and drift included: ``reset(seed=s)`` seeds member i with
    ``s + i`` and starts trial 0; ``options={"trial": k}`` (one index, or one per member) starts
    trial k; a reset without either goes on to each member's next trial. Autoreset mode is
    next-step: the step after a member ends restarts it on its next trial (its action is ignored,
    reward 0); with ``autoreset_mode=AutoresetMode.SAME_STEP`` a member that ends is restarted in
    the same step, its last observation and info in ``info["final_obs"]`` and
    ``info["final_info"]``, as Gymnasium's same-step mode has them. ``info`` holds ``trial``, ``clipped_actions`` and ``readings`` (SI) of every member
    with ``_name`` masks, and at a member's end ``metrics`` (a dict of arrays with masks) and,
    after a fault, ``fault``, laid out as the sync vector env lays them out. A member whose
    simulation diverges ends with a fault; the others go on.
    """

    metadata = {"render_modes": [], "autoreset_mode": AutoresetMode.NEXT_STEP}

    def __init__(self, num_envs: int = 1, config=None, max_episode_steps: int | None = None,
                 render_mode: str | None = None, autoreset_mode=AutoresetMode.NEXT_STEP):
        if isinstance(num_envs, bool) or not isinstance(num_envs, (int, np.integer)) or num_envs < 1:
            raise ValueError(f"num_envs: {num_envs!r} is not allowed; must be a whole number >= 1")
        if render_mode is not None:
            raise ValueError(f"render_mode: {render_mode!r} is not allowed; the vector env does not render "
                             f"(use FlipperStrikeEnv with render_mode='rgb_array')")
        if max_episode_steps is not None and (isinstance(max_episode_steps, bool) or not isinstance(
                max_episode_steps, (int, np.integer)) or max_episode_steps < 1):
            raise ValueError(f"max_episode_steps: {max_episode_steps!r} is not allowed; must be a whole number >= 1")
        modes = {m.value: m for m in (AutoresetMode.NEXT_STEP, AutoresetMode.SAME_STEP)}
        mode = modes.get(getattr(autoreset_mode, "value", autoreset_mode))
        if mode is None:
            raise ValueError(f"autoreset_mode: {autoreset_mode!r} is not allowed; must be 'NextStep' or 'SameStep'")
        self.autoreset_mode = mode
        self.metadata = {**self.metadata, "autoreset_mode": mode}
        self.setup = Setup.from_config(DEMO_CONFIG if config is None else config)
        self.num_envs = int(num_envs)
        self.render_mode = None
        low, high = observation_bounds(self.setup)
        self.single_observation_space = spaces.Box(low, high, dtype=np.float32)
        self.single_action_space = spaces.Box(-1.0, 1.0, (2,), dtype=np.float32)
        self.observation_space = batch_space(self.single_observation_space, self.num_envs)
        self.action_space = batch_space(self.single_action_space, self.num_envs)
        self.core = TrialBatch(self.setup, self.num_envs, limit=max_episode_steps)
        self.max_steps = self.core.limit
        n = self.num_envs
        self._clipped = np.zeros(n, dtype=np.int64)
        self._command = np.zeros((n, 2))
        self._needs_reset = np.zeros(n, dtype=bool)
        self._all = np.ones(n, dtype=bool)
        self._seeded = False
        self._started = False

    def _observe(self) -> np.ndarray:
        return self.core.obs.copy()

    def _info(self) -> dict:
        return {"trial": self.core.trial.copy(), "_trial": self._all.copy(),
                "clipped_actions": self._clipped.copy(), "_clipped_actions": self._all.copy(),
                "readings": self.core.y.copy(), "_readings": self._all.copy()}

    def _trials(self, options) -> np.ndarray:
        n = self.num_envs
        if options is not None and not isinstance(options, dict):
            raise ValueError(f"options: {type(options).__name__} is not allowed; must be a dict such as {{'trial': 3}}")
        if options and "trial" in options:
            given = options["trial"]
            values = list(given) if isinstance(given, (list, tuple, np.ndarray)) else [given] * n
            if len(values) != n:
                raise ValueError(f"options['trial']: {len(values)} values is not allowed; must be one index or "
                                 f"{n} (one per member)")
            return np.array([check_trial(v, "options['trial']") for v in values], dtype=np.int64)
        return None

    def reset(self, *, seed=None, options=None):
        super().reset(seed=seed)
        n = self.num_envs
        trials = self._trials(options)
        if seed is not None:
            if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
                raise ValueError(f"seed: {seed!r} is not allowed; must be a whole number >= 0 or None")
            rngs = [seeding.np_random(int(seed) + i)[0] for i in range(n)]
        elif not self._seeded:
            rngs = [seeding.np_random()[0] for _ in range(n)]
        else:
            rngs = None
        if trials is None:
            trials = (np.zeros(n, dtype=np.int64) if seed is not None or not self._seeded
                      else np.minimum(self.core.trial + 1, MAX_TRIAL))
        self._seeded = True
        self.core.begin(np.arange(n), trials, rngs)
        self.core.read()
        self._clipped[:] = 0
        self._needs_reset[:] = False
        self._started = True
        return self._observe(), self._info()

    def step(self, actions):
        if not self._started:
            raise RuntimeError("step: call reset() before step()")
        core = self.core
        actions_to_commands(actions, (self.num_envs, 2), self.setup.rated_pressure, self._clipped, self._command)
        core.step(self._command)
        same_step = self.autoreset_mode is AutoresetMode.SAME_STEP
        restart = self._needs_reset
        if not same_step and restart.any():
            self._restart(restart)
        core.read()
        reward, terminated, truncated = core.reward.copy(), core.terminated.copy(), core.truncated.copy()
        done = terminated | truncated
        info = self._info()
        ending = np.flatnonzero(done).tolist()
        if same_step and ending:
            final_obs = self._observe()
            infos = {}
            for i in ending:
                last = {"trial": int(core.trial[i]), "clipped_actions": int(self._clipped[i]),
                        "readings": core.y[i].copy(), "metrics": core.metrics(i)}
                if terminated[i]:
                    last["fault"] = core.fault_text(i)
                infos = self._add_info(infos, {"final_obs": final_obs[i], "final_info": last}, i)
            self._restart(done)
            core.read(done)
            info = {**infos, **self._info()}
        else:
            for i in ending:
                last = {"metrics": core.metrics(i)}
                if terminated[i]:
                    last["fault"] = core.fault_text(i)
                info = self._add_info(info, last, i)
            self._needs_reset = done
        return self._observe(), reward, terminated, truncated, info

    def _restart(self, mask) -> None:
        """Members where ``mask`` is true begin their next trial (autoreset)."""
        members = np.flatnonzero(mask)
        self.core.begin(members, np.minimum(self.core.trial[members] + 1, MAX_TRIAL))
        self._clipped[mask] = 0

    def close_extras(self, **kwargs):
        self._started = False
