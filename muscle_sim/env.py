"""Gymnasium environment ``pamjoint/FlipperStrike-v0``: one strike trial per episode (thin shell)."""
from __future__ import annotations

import math

import gymnasium as gym
import numpy as np
from gymnasium import spaces

from .compiled import law
from .config import shipped_config
from .errors import SimulationDiverged
from .simulation import Setup, StrikeTrial
from .tasks import FAULT_PENALTY, reference, reward_at, strike_metrics

DEMO_CONFIG = shipped_config("flipper.yaml")
RATE_BOUND = 60.0  # rad/s, observation bound of the angular rate


def observation_bounds(setup: Setup):
    """Lower and upper observation bounds (float32) of the strike environments."""
    top = 1.2 * max(setup.plant.pneumatics.supply_pressure, setup.rated_pressure)
    span = setup.task.trial_length
    low = np.array([-math.pi, -RATE_BOUND, 0.0, 0.0, setup.task.strike_time - span], dtype=np.float32)
    high = np.array([math.pi, RATE_BOUND, top, top, setup.task.strike_time], dtype=np.float32)
    return low, high


@law
def observation_into(readings, time_to_strike, low, high, out):
    """Observation ``[angle, rate, p_a, p_b, time to strike]`` clipped to the space's bounds
    into ``out`` (float32)."""
    for c in range(5):
        v = readings[c] if c < 4 else time_to_strike
        out[c] = min(max(v, low[c]), high[c])


@law
def observations_into(readings, steps, strike_time, dt, low, high, out):
    """:func:`observation_into` for each member (readings (B, 4), steps (B,)) into ``out`` (B, 5)."""
    for i in range(readings.shape[0]):
        observation_into(readings[i], strike_time - steps[i] * dt, low, high, out[i])


@law
def commands_into(actions, full_scale, clipped_count, out):
    """Actions in [-1, 1] (clipped, clips counted per member) onto 0 .. ``full_scale`` [Pa]."""
    for i in range(actions.shape[0]):
        for c in range(2):
            a = actions[i, c]
            v = min(max(a, -1.0), 1.0)
            if v != a:
                clipped_count[i] += 1
            out[i, c] = (v + 1.0) * (0.5 * full_scale)


def check_action(action, shape_tail=(2,)):
    """Validate an action array: finite numbers of the right shape (one-line ValueError)."""
    a = np.asarray(action, dtype=float)
    if a.shape[-1:] != shape_tail:
        raise ValueError(f"action: shape {a.shape} is not allowed; must end in {shape_tail} "
                         f"(pressure commands of muscles A and B in [-1, 1])")
    if not np.all(np.isfinite(a)):
        raise ValueError(f"action: {np.array2string(a, threshold=6)} is not allowed; must be finite numbers in "
                         f"[-1, 1] (values outside are clipped, NaN and inf are refused)")
    return a


def _action_pair(action) -> tuple[float, float]:
    """Two Python floats from an action, validated like :func:`check_action` (fast path)."""
    try:
        a0, a1 = action
        a0, a1 = float(a0), float(a1)
    except (TypeError, ValueError):
        check_action(action)
        raise
    if not (math.isfinite(a0) and math.isfinite(a1)):
        check_action(action)
    return a0, a1


class FlipperStrikeEnv(gym.Env):
    """A paddle on a joint driven by two antagonistic McKibben muscles must strike at a given
    instant, angle and speed, then swing home and settle (the sorting-line flipper demo).

    The simulated plant (ISO 6358 valves, polytropic chambers, end effects, braid friction,
    delays, payload, sensor noise) comes from ``config`` (a YAML path or a mapping; default the
    shipped ``configs/flipper.yaml``). One episode is one trial of ``task.trial_length``.

    ## Action space: ``Box(-1, 1, (2,), float32)``

    | index | meaning | min | max | maps to |
    |---|---|---|---|---|
    | 0 | pressure command, muscle A (pulls towards +angle) | -1 | 1 | 0 .. rated pressure, linear |
    | 1 | pressure command, muscle B (pulls towards -angle) | -1 | 1 | 0 .. rated pressure, linear |

    Out-of-range actions are clipped (counted in ``info["clipped_actions"]``); NaN or inf raise.

    ## Observation space: ``Box(low, high, (5,), float32)`` (sensor readings, SI units)

    | index | meaning | min | max | unit |
    |---|---|---|---|---|
    | 0 | joint angle (encoder) | -pi | pi | rad |
    | 1 | joint rate | -60 | 60 | rad/s |
    | 2 | pressure in muscle A (gauge) | 0 | 1.2 x max(supply, rated) | Pa |
    | 3 | pressure in muscle B (gauge) | 0 | 1.2 x max(supply, rated) | Pa |
    | 4 | time to the strike instant | strike_time - trial_length | strike_time | s |

    ## Reward
    Minus the squared tracking error of the planned swing in deg^2, averaged over the trial, and
    at the strike step minus (angle error / 1 deg)^2 + (speed error / 10 %)^2
    (:func:`muscle_sim.tasks.step_reward`). A hard fault costs 100.

    ## Start state
    At rest at the home angle, both muscles at the pressures that hold it with the configured
    co-contraction. With drift configured, each reset starts the next trial of the drifted plant;
    ``reset(seed=s)`` starts a new seeded sequence at trial 0, ``options={"trial": k}`` sets the
    trial number.

    ## Episode end
    ``truncated`` after ``task.trial_length``; ``terminated`` on a hard fault: the paddle slams
    deeper than ``task.fault_depth`` into an end stop, or the simulation diverges.
    ``info["metrics"]`` holds the trial metrics at the end (rms_error_deg,
    strike_angle_error_deg, strike_speed_error_pct, peak_pressure_kpa, settle_time_s).

    ## Version history
    - v0: first release.
    """

    metadata = {"render_modes": ["rgb_array"], "render_fps": 50}

    def __init__(self, config=None, render_mode: str | None = None):
        self.setup = Setup.from_config(DEMO_CONFIG if config is None else config)
        if render_mode is not None and render_mode not in self.metadata["render_modes"]:
            raise ValueError(f"render_mode: {render_mode!r} is not allowed; must be None or 'rgb_array'")
        self.render_mode = render_mode
        self.action_space = spaces.Box(-1.0, 1.0, (2,), dtype=np.float32)
        low, high = observation_bounds(self.setup)
        self.observation_space = spaces.Box(low, high, dtype=np.float32)
        self._low, self._high = low.astype(float), high.astype(float)
        self._half_range = 0.5 * self.setup.rated_pressure
        self.trial = StrikeTrial(self.setup)
        self._episode = -1
        self._started = False
        self._ref = reference(self.setup.task, self.setup.task.times)[0].tolist()
        j = self.setup.plant.joint
        self._fault_band = (j.lower_stop - self.setup.task.fault_depth, j.upper_stop + self.setup.task.fault_depth)

    def _obs(self, y) -> np.ndarray:
        obs = np.empty(5, dtype=np.float32)
        observation_into(y, self.setup.task.strike_time - self.trial.k * self.setup.task.dt, self._low,
                         self._high, obs)
        return obs

    def reset(self, *, seed=None, options=None):
        super().reset(seed=seed)
        options = options or {}
        if "trial" in options:
            self._episode = int(options["trial"])
        else:
            self._episode = 0 if seed is not None else self._episode + 1
        y = self.trial.start(self.np_random, trial=self._episode)
        self._clipped = 0
        self._started = True
        self._reward_sum = 0.0
        return self._obs(y), {"trial": self._episode, "clipped_actions": 0}

    def step(self, action):
        if not self._started:
            raise RuntimeError("step: call reset() before step()")
        a0, a1 = _action_pair(action)
        c0, c1 = min(max(a0, -1.0), 1.0), min(max(a1, -1.0), 1.0)
        self._clipped += (c0 != a0) + (c1 != a1)
        half = self._half_range
        command = ((c0 + 1.0) * half, (c1 + 1.0) * half)
        task = self.setup.task
        info = {"trial": self._episode, "clipped_actions": self._clipped}
        try:
            y = self.trial.advance(command)
        except SimulationDiverged as exc:
            self._started = False
            info["fault"] = f"diverged: {exc}"
            return self._obs(self.trial.readings[-1]), -FAULT_PENALTY, True, False, info
        k = self.trial.k
        reward = reward_at(k, y[0], y[1], self._ref[k], task.n_steps, task.strike_index, task.strike_speed)
        q = self.trial.stepper._x[0, 0]
        terminated = not (self._fault_band[0] <= q <= self._fault_band[1])
        truncated = bool(self.trial.done and not terminated)
        if terminated:
            reward -= FAULT_PENALTY
            info["fault"] = "end stop struck deeper than task.fault_depth"
        if terminated or truncated:
            log = self.trial.readings
            info["metrics"] = strike_metrics(task, log[:, 0], log[:, 1], log[:, 2:4])
            self._started = False
        return self._obs(y), reward, terminated, truncated, info

    def rollout(self, controller: str = "", seed=None):
        """The current or last episode as a :class:`~muscle_sim.records.Rollout`."""
        return self.trial.rollout(controller, seed)

    def render(self):
        if self.render_mode != "rgb_array":
            return None
        from .render import draw_joint

        x = self.trial.state
        return draw_joint(self.setup, self.trial.params, x, self.trial.k * self.setup.task.dt)
