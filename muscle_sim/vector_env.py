"""Natively batched Gymnasium VectorEnv of the strike task over the same pure plant core."""
from __future__ import annotations

import math

import numpy as np
from gymnasium import spaces
from gymnasium.vector import AutoresetMode, VectorEnv
from gymnasium.vector.utils import batch_space

from .compiled import law
from .env import DEMO_CONFIG, check_action, commands_into, observation_bounds, observations_into
from .integrate import Stepper
from .plant import initial_state
from .sensors import SensorModel
from .simulation import Setup, home_pressures
from .tasks import FAULT_PENALTY, reference, reward_at

_METRICS = ("rms_error_deg", "strike_angle_error_deg", "strike_speed_error_pct", "peak_pressure_kpa",
            "settle_time_s")


@law
def _account(y, x, k, live, ref, home, tolerance, turn_time, dt, strike_index, strike_angle, strike_speed,
             n_steps, max_steps, low_band, high_band, fault_penalty, sq_err, peak, last_out, strike_err,
             speed_err, reward, terminated, truncated):
    """Per member: running squared error, peak pressure, last sample out of the settle band after
    the turn, strike errors at the strike sample; reward (:func:`~muscle_sim.tasks.reward_at`) and
    the end flags (fault band of the TRUE angle, step limit)."""
    for i in range(y.shape[0]):
        if not live[i]:
            reward[i] = 0.0
            terminated[i] = truncated[i] = False
            continue
        ki = k[i]
        ref_angle = ref[min(ki, n_steps)]
        err = y[i, 0] - ref_angle
        sq_err[i] += err * err
        peak[i] = max(peak[i], y[i, 2], y[i, 3])
        if abs(y[i, 0] - home) > tolerance and ki * dt >= turn_time:
            last_out[i] = ki
        if ki == strike_index:
            strike_err[i] = math.degrees(y[i, 0] - strike_angle)
            speed_err[i] = 100.0 * (y[i, 1] - strike_speed) / strike_speed
        r = reward_at(ki, y[i, 0], y[i, 1], ref_angle, n_steps, strike_index, strike_speed)
        fault = x[i, 0] < low_band or x[i, 0] > high_band
        terminated[i] = fault
        truncated[i] = (not fault) and ki >= max_steps
        reward[i] = r - fault_penalty if fault else r


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
        self._started = False

    # -- per-member bookkeeping ------------------------------------------------------------------
    def _start(self, mask) -> None:
        self.stepper.reset_some(mask, self._x0, self._p_hold)
        self._k[mask] = 0
        self.sensors.filtered[mask] = self._p_hold
        self._sq_err[mask] = 0.0
        self._peak[mask] = 0.0
        self._last_out[mask] = -1
        self._strike_err[mask] = np.nan
        self._speed_err[mask] = np.nan
        self._clipped[mask] = 0

    def _observe(self, y, mask_all=None):
        task = self.setup.task
        obs = np.empty((self.num_envs, 5), dtype=np.float32)
        observations_into(y, self._k, task.strike_time, task.dt, self._low, self._high, obs)
        return obs

    def _accumulate(self, y, x, live) -> None:
        """Fold this step's readings into the running metrics; sets reward and done flags."""
        t = self.setup.task
        j = self.setup.plant.joint
        _account(y, x, self._k, live, self._ref, t.home_angle, t.settle_tolerance, t.turn_time, t.dt,
                 t.strike_index, t.strike_angle, t.strike_speed, t.n_steps, self.max_steps,
                 j.lower_stop - t.fault_depth, j.upper_stop + t.fault_depth, FAULT_PENALTY, self._sq_err,
                 self._peak, self._last_out, self._strike_err, self._speed_err, self._reward, self._terminated,
                 self._truncated)

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
        self._sq_err = np.zeros(n)
        self._peak = np.zeros(n)
        self._last_out = np.full(n, -1, dtype=np.int64)
        self._strike_err = np.full(n, np.nan)
        self._speed_err = np.full(n, np.nan)
        self._clipped = np.zeros(n, dtype=np.int64)
        self._needs_reset = np.zeros(n, dtype=bool)
        self._reward = np.zeros(n)
        self._command = np.zeros((n, 2))
        self._terminated = np.zeros(n, dtype=bool)
        self._truncated = np.zeros(n, dtype=bool)
        self._y = np.empty((n, 4))
        self.sensors = SensorModel(self.setup.sensors, self.setup.task.dt, n)
        self.sensors.filtered[...] = self._p_hold
        self.stepper.reset(np.tile(self._x0, (n, 1)), self._p_hold)
        y = self.sensors.read(self.stepper.x, self.np_random, self._y)
        self._accumulate(y, self.stepper.x, np.ones(n, dtype=bool))
        self._started = True
        return self._observe(y), {}

    def step(self, actions):
        if not self._started:
            raise RuntimeError("step: call reset() before step()")
        a = check_action(actions)
        if a.shape != (self.num_envs, 2):
            raise ValueError(f"actions: shape {a.shape} is not allowed; must be ({self.num_envs}, 2)")
        restart = self._needs_reset
        any_restart = restart.any()
        if any_restart:
            self._start(restart)
        command = self._command
        commands_into(a, self.setup.rated_pressure, self._clipped, command)
        if any_restart:
            command[restart] = self._p_hold
        x = self.stepper.step(command)
        if any_restart:
            x[restart] = self._x0
        live = ~restart
        self._k += live
        y = self.sensors.read(x, self.np_random, self._y)
        self._accumulate(y, x, live)
        reward, terminated, truncated = self._reward.copy(), self._terminated.copy(), self._truncated.copy()
        done = terminated | truncated
        self._needs_reset = done
        info = {"clipped_actions": self._clipped.copy(), "_clipped_actions": np.ones(self.num_envs, dtype=bool)}
        if done.any():
            info.update(self._metrics(done))
        return self._observe(y), reward.astype(np.float64), terminated, truncated, info

    def close_extras(self, **kwargs):
        self._started = False


