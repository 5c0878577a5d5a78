"""Natively batched Gymnasium VectorEnv of the strike task over the same pure plant core."""
from __future__ import annotations


import numpy as np
from gymnasium import spaces
from gymnasium.vector import AutoresetMode, VectorEnv
from gymnasium.vector.utils import batch_space

from .env import DEMO_CONFIG, check_action, observation_bounds
from .integrate import Stepper
from .plant import initial_state
from .sensors import measure
from .simulation import Setup, home_pressures
from .tasks import FAULT_PENALTY, reference, step_reward

_METRICS = ("rms_error_deg", "strike_angle_error_deg", "strike_speed_error_pct", "peak_pressure_kpa",
            "settle_time_s")


class FlipperStrikeVectorEnv(VectorEnv):
    """``num_envs`` strike trials stepped together with numpy (see :class:`~muscle_sim.env.FlipperStrikeEnv`
    for the spaces, reward, start state and episode end; this class has the same, batched).

    Autoreset mode is next-step: the step after a sub-env ends resets it (its action is ignored,
    reward 0). Metrics are accumulated while stepping, so no trajectories are stored; at a sub-env's
    end ``info`` carries them as arrays with ``_name`` masks, as Gymnasium's vector envs do.
    Differences from the scalar env: plant drift across trials is not applied (every sub-env runs
    the configured plant), and a diverging simulation raises
    :class:`~muscle_sim.errors.SimulationDiverged` for the whole batch.
    """

    metadata = {"render_modes": [], "autoreset_mode": AutoresetMode.NEXT_STEP}

    def __init__(self, num_envs: int = 1, config=None, max_episode_steps: int | None = None,
                 render_mode: str | None = None):
        if isinstance(num_envs, bool) or not isinstance(num_envs, (int, np.integer)) or num_envs < 1:
            raise ValueError(f"num_envs: {num_envs!r} is not allowed; must be a whole number >= 1")
        if render_mode is not None:
            raise ValueError(f"render_mode: {render_mode!r} is not allowed; the vector env does not render "
                             f"(use FlipperStrikeEnv with render_mode='rgb_array')")
        self.setup = Setup.from_config(DEMO_CONFIG if config is None else config)
        self.num_envs = int(num_envs)
        self.render_mode = None
        task = self.setup.task
        self.max_steps = task.n_steps if max_episode_steps is None else min(int(max_episode_steps), task.n_steps)
        low, high = observation_bounds(self.setup)
        self.single_observation_space = spaces.Box(low, high, dtype=np.float32)
        self.single_action_space = spaces.Box(-1.0, 1.0, (2,), dtype=np.float32)
        self.observation_space = batch_space(self.single_observation_space, self.num_envs)
        self.action_space = batch_space(self.single_action_space, self.num_envs)
        self._low, self._high = low.astype(float), high.astype(float)
        self.stepper = Stepper(self.setup.plant, task.dt, task.n_substeps, batch=self.num_envs)
        self._p_hold = np.array(home_pressures(self.setup.plant, task))
        self._x0 = initial_state(self.setup.plant, task.home_angle, self._p_hold)
        self._ref = reference(task, task.times)[0]
        j = self.setup.plant.joint
        self._fault_band = (j.lower_stop - task.fault_depth, j.upper_stop + task.fault_depth)
        self._started = False

    # -- per-member bookkeeping ------------------------------------------------------------------
    def _start(self, mask) -> None:
        self.stepper.reset_some(mask, self._x0, self._p_hold)
        self._k[mask] = 0
        self._filter[mask] = self._p_hold
        self._sq_err[mask] = 0.0
        self._peak[mask] = 0.0
        self._last_out[mask] = -1
        self._strike_err[mask] = np.nan
        self._speed_err[mask] = np.nan
        self._clipped[mask] = 0

    def _observe(self, y, mask_all=None):
        task = self.setup.task
        obs = np.empty((self.num_envs, 5))
        obs[:, :4] = y
        obs[:, 4] = task.strike_time - self._k * task.dt
        np.clip(obs, self._low, self._high, out=obs)
        return obs.astype(np.float32)

    def _accumulate(self, y, live) -> None:
        task = self.setup.task
        k = self._k
        err = y[:, 0] - self._ref[np.minimum(k, task.n_steps)]
        self._sq_err += np.where(live, err * err, 0.0)
        self._peak = np.where(live, np.maximum(self._peak, y[:, 2:4].max(axis=1)), self._peak)
        out = (np.abs(y[:, 0] - task.home_angle) > task.settle_tolerance) & (k * task.dt >= task.turn_time)
        self._last_out = np.where(live & out, k, self._last_out)
        at = live & (k == task.strike_index)
        if at.any():
            self._strike_err[at] = np.degrees(y[at, 0] - task.strike_angle)
            self._speed_err[at] = 100.0 * (y[at, 1] - task.strike_speed) / task.strike_speed

    def _metrics(self, done) -> dict:
        task = self.setup.task
        n = self._k + 1
        settle = np.where(self._last_out < 0, task.turn_time, (self._last_out + 1) * task.dt)
        settle = np.where(self._last_out >= self._k, np.nan, settle)
        values = {
            "rms_error_deg": np.degrees(np.sqrt(self._sq_err / n)),
            "strike_angle_error_deg": self._strike_err.copy(),
            "strike_speed_error_pct": self._speed_err.copy(),
            "peak_pressure_kpa": self._peak / 1e3,
            "settle_time_s": settle,
        }
        info = {}
        for name in _METRICS:
            info[name] = np.where(done, values[name], 0.0)
            info["_" + name] = done.copy()
        return info

    # -- Gymnasium API ---------------------------------------------------------------------------
    def reset(self, *, seed=None, options=None):
        super().reset(seed=seed)
        n = self.num_envs
        self._k = np.zeros(n, dtype=np.int64)
        self._filter = np.tile(self._p_hold, (n, 1))
        self._sq_err = np.zeros(n)
        self._peak = np.zeros(n)
        self._last_out = np.full(n, -1, dtype=np.int64)
        self._strike_err = np.full(n, np.nan)
        self._speed_err = np.full(n, np.nan)
        self._clipped = np.zeros(n, dtype=np.int64)
        self._needs_reset = np.zeros(n, dtype=bool)
        self.stepper.reset(np.tile(self._x0, (n, 1)), self._p_hold)
        y, self._filter = measure(self.setup.sensors, self.stepper.x, self._filter, self.np_random,
                                  self.setup.task.dt)
        self._accumulate(y, np.ones(n, dtype=bool))
        self._started = True
        return self._observe(y), {}

    def step(self, actions):
        if not self._started:
            raise RuntimeError("step: call reset() before step()")
        a = check_action(actions)
        if a.shape != (self.num_envs, 2):
            raise ValueError(f"actions: shape {a.shape} is not allowed; must be ({self.num_envs}, 2)")
        task = self.setup.task
        clipped = np.clip(a, -1.0, 1.0)
        restart = self._needs_reset
        if restart.any():
            self._start(restart)
        self._clipped += np.count_nonzero(clipped != a, axis=1)
        command = (clipped + 1.0) * (0.5 * self.setup.rated_pressure)
        command[restart] = self._p_hold
        x = self.stepper.step(command)
        if restart.any():
            x[restart] = self._x0
        live = ~restart
        self._k += live
        y, self._filter = measure(self.setup.sensors, x, self._filter, self.np_random, task.dt)
        self._accumulate(y, live)
        reward = step_reward(task, self._k, y[:, 0], y[:, 1], self._ref[np.minimum(self._k, task.n_steps)])
        q = x[:, 0]
        terminated = live & ((q < self._fault_band[0]) | (q > self._fault_band[1]))
        truncated = live & ~terminated & (self._k >= self.max_steps)
        reward = np.where(terminated, reward - FAULT_PENALTY, reward)
        reward = np.where(restart, 0.0, reward)
        done = terminated | truncated
        self._needs_reset = done
        info = {"clipped_actions": self._clipped.copy(), "_clipped_actions": np.ones(self.num_envs, dtype=bool)}
        if done.any():
            info.update(self._metrics(done))
        return self._observe(y), reward.astype(np.float64), terminated, truncated, info

    def close_extras(self, **kwargs):
        self._started = False


