"""Gymnasium environment ``pamjoint/FlipperStrike-v1``: one strike trial per episode, a thin
shell over the trial core (:class:`muscle_sim.trial.TrialBatch` with one member)."""
from __future__ import annotations

import gymnasium as gym
import numpy as np
from gymnasium import spaces

from .config import shipped_config
from .simulation import Setup
from .trial import (MAX_TRIAL, TrialBatch, actions_to_commands, check_trial,
                    observation_bounds)

DEMO_CONFIG = shipped_config("flipper.yaml")


class FlipperStrikeEnv(gym.Env):
    """A paddle on a joint driven by two antagonistic McKibben muscles must strike at a given
    instant, angle and speed, then swing home and settle (the sorting-line flipper demo).

    The simulated plant (ISO 6358 valves, polytropic chambers, end effects, braid friction,
    delays, payload, sensor noise, drift) comes from ``config`` (a YAML path or a mapping;
    default the shipped ``configs/flipper.yaml``). One episode is one trial of
    ``task.trial_length``.

    ## Action space: ``Box(-1, 1, (2,), float32)``

    | index | meaning | min | max | maps to |
    |---|---|---|---|---|
    | 0 | pressure command, muscle A (pulls towards +angle) | -1 | 1 | 0 .. rated pressure, linear |
    | 1 | pressure command, muscle B (pulls towards -angle) | -1 | 1 | 0 .. rated pressure, linear |

    Out-of-range actions are clipped (counted in ``info["clipped_actions"]``); anything that is
    not two real finite numbers (NaN, inf, complex, objects, another shape) raises ValueError.

    ## Observation space: ``Box(low, high, (6,), float32)`` (scaled for learning agents)

    | index | meaning | min | max | scale |
    |---|---|---|---|---|
    | 0 | joint angle (encoder) | -pi | pi | rad |
    | 1 | joint rate | -6 | 6 | per 10 rad/s (bound 60 rad/s) |
    | 2 | pressure in muscle A (gauge) | 0 | 1.2 x max(supply, rated) / rated | per rated pressure |
    | 3 | pressure in muscle B (gauge) | 0 | 1.2 x max(supply, rated) / rated | per rated pressure |
    | 4 | time to the strike instant | (strike_time - trial_length) / trial_length | strike_time / trial_length | per trial length |
    | 5 | reference angle of the planned swing at this sample | -pi | pi | rad |

    Values are clipped to the bounds. The physical readings, in SI (rad, rad/s, Pa, Pa), are in
    ``info["readings"]`` at every step.

    ## Reward
    Minus the squared tracking error of the planned swing in deg^2, averaged over the trial, and
    at the strike step minus (angle error / 1 deg)^2 + (speed error / 10 %)^2
    (:func:`muscle_sim.tasks.step_reward`). A hard fault costs 100.

    ## Start state
    At rest at the home angle, both muscles at the pressures that hold it with the configured
    co-contraction. The trial index is part of an episode's identity: with drift configured,
    trial k runs the plant as it has drifted after k trials. ``reset(seed=s)`` starts trial 0,
    ``reset(seed=s, options={"trial": k})`` trial k (0 .. 1,000,000), so either reproduces an
    episode exactly; a reset without either goes on to the next trial.

    ## Episode end
    ``truncated`` after ``task.trial_length`` or at a time limit given to ``gym.make(...,
    max_episode_steps=N)``; ``terminated`` on a hard fault: the paddle slams deeper than
    ``task.fault_depth`` into an end stop, or the simulation diverges (``info["fault"]`` says
    which). ``info["metrics"]`` holds the trial's metrics so far at every step, so also at the
    end whatever ends it, a wrapper's time limit included (rms_error_deg, strike_angle_error_deg,
    strike_speed_error_pct, peak_pressure_kpa, settle_time_s, settled, fault); settling is judged
    only once the log reaches ``task.settle_time``, and a trial that ends in a fault is never
    settled.

    ## Version history
    - v1: observations scaled (rate, pressures, time) and the reference angle added; readings
      in ``info``; drift and seeding shared with the vector env; metrics at a time limit.
    - v0: first release.
    """

    metadata = {"render_modes": ["rgb_array"], "render_fps": 50}

    def __init__(self, config=None, render_mode: str | None = None):
        self.setup = Setup.from_config(DEMO_CONFIG if config is None else config)
        if render_mode is not None and render_mode not in self.metadata["render_modes"]:
            raise ValueError(f"render_mode: {render_mode!r} is not allowed; must be None or 'rgb_array'")
        self.render_mode = render_mode
        self.action_space = spaces.Box(-1.0, 1.0, (2,), dtype=np.float32)
        self.observation_space = spaces.Box(*observation_bounds(self.setup), dtype=np.float32)
        self.core = TrialBatch(self.setup, 1)
        self._episode = -1
        self._started = False
        self._clipped = np.zeros(1, dtype=np.int64)
        self._command = np.zeros((1, 2))

    @property
    def plant_now(self):
        """The plant of the current (or last) episode's trial (drift applied)."""
        return self.core.params[0]

    def _observe(self) -> np.ndarray:
        return self.core.obs[0].copy()

    def _info(self) -> dict:
        return {"trial": self._episode, "clipped_actions": int(self._clipped[0]), "readings": self.core.y[0].copy()}

    def reset(self, *, seed=None, options=None):
        super().reset(seed=seed)
        options = {} if options is None else options
        if not isinstance(options, dict):
            raise ValueError(f"options: {type(options).__name__} is not allowed; must be a dict such as {{'trial': 3}}")
        if "trial" in options:
            self._episode = check_trial(options["trial"], "options['trial']")
        else:
            self._episode = 0 if seed is not None else min(self._episode + 1, MAX_TRIAL)
        # a time limit from gym.make(..., max_episode_steps=N) also ends the trial here, with metrics
        limit = self.spec.max_episode_steps if self.spec is not None else None
        self.core.set_limit(limit)
        self.core.begin([0], [self._episode], [self.np_random])
        self.core.read()
        self._clipped[0] = 0
        self._started = True
        return self._observe(), self._info()

    def step(self, action):
        if not self._started:
            raise RuntimeError("step: call reset() before step()")
        actions_to_commands(action, (2,), self.setup.rated_pressure, self._clipped, self._command)
        core = self.core
        core.step(self._command)
        core.read()
        terminated, truncated = bool(core.terminated[0]), bool(core.truncated[0])
        # the metrics so far at every step, so a wrapper's time limit also ends with them
        info = self._info()
        info["metrics"] = core.metrics(0)
        if terminated:
            info["fault"] = core.fault_text(0)
        if terminated or truncated:
            self._started = False
        return self._observe(), float(core.reward[0]), terminated, truncated, info

    def render(self):
        if self.render_mode != "rgb_array":
            return None
        from .render import draw_joint

        return draw_joint(self.setup, self.core.params[0], self.core.state(0), int(self.core.k[0]) * self.setup.task.dt)
