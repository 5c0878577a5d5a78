"""The strike task: planned reference swing (piecewise quintic), metrics and reward.

A strike starts at rest at the home angle, reaches the strike angle at the strike time with the
target speed, follows through, turns back, and returns to home where it must settle.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from functools import cached_property

import numpy as np

from .compiled import broadcast, law
from .errors import ConfigError


@dataclass(frozen=True)
class StrikeTask:
    """Numbers of one strike (SI units). See ``task`` in the config for their meaning."""

    home_angle: float
    strike_angle: float
    strike_time: float
    strike_speed: float
    follow_through: float
    return_time: float
    settle_time: float
    trial_length: float
    control_rate: float = 500.0
    settle_tolerance: float = math.radians(1.0)
    n_substeps: int = 2
    home_pressure: float = 2e5
    fault_depth: float = math.radians(3.0)

    @cached_property
    def dt(self) -> float:
        """Control step [s]."""
        return 1.0 / self.control_rate

    @cached_property
    def n_steps(self) -> int:
        """Control steps per trial."""
        return int(round(self.trial_length * self.control_rate))

    @cached_property
    def strike_index(self) -> int:
        """Sample index of the strike instant (samples are at ``k dt``, k = 0..n_steps)."""
        return int(round(self.strike_time * self.control_rate))

    @property
    def times(self) -> np.ndarray:
        """Sample times ``k dt``, k = 0..n_steps [s]."""
        return np.arange(self.n_steps + 1) * self.dt

    @property
    def swing_start(self) -> float:
        """When the reference leaves home: a quintic that ends at speed v with zero acceleration
        covers ``v T / 2`` (derived), so ``T = 2 (q_s - q_h) / v``."""
        return self.strike_time - 2.0 * (self.strike_angle - self.home_angle) / self.strike_speed

    @property
    def turn_time(self) -> float:
        """When the follow-through ends at rest: ``T = 2 follow_through / v`` (derived as above)."""
        return self.strike_time + 2.0 * self.follow_through / self.strike_speed


def task_from_config(values: dict) -> StrikeTask:
    """Build and check a :class:`StrikeTask` from the SI values of the config's ``task`` section."""
    task = StrikeTask(**values)
    if task.swing_start < 0.0:
        need = 2 * (task.strike_angle - task.home_angle) / task.strike_time
        raise ConfigError(f"task.strike_speed: {task.strike_speed:g} rad/s is not allowed; a smooth swing from "
                          f"home needs at least {need:.3g} rad/s to reach the strike angle by task.strike_time")
    if task.turn_time >= task.return_time:
        raise ConfigError(f"task.return_time: {task.return_time * 1e3:g} ms is not allowed; must be after the "
                          f"follow-through ends at {task.turn_time * 1e3:.1f} ms")
    return task


def _quintic(t, t0, t1, start, end):
    """Quintic polynomial through position/velocity/acceleration ``start`` at t0 and ``end`` at t1
    (the classical minimum-jerk boundary-value form); returns (q, qd, qdd) at ``t``."""
    T = t1 - t0
    q0, v0, a0 = start
    q1, v1, a1 = end
    c0, c1, c2 = q0, v0 * T, 0.5 * a0 * T * T
    dq = q1 - c0 - c1 - c2
    dv = v1 * T - c1 - 2 * c2
    da = a1 * T * T - 2 * c2
    c3 = 10 * dq - 4 * dv + 0.5 * da
    c4 = -15 * dq + 7 * dv - da
    c5 = 6 * dq - 3 * dv + 0.5 * da
    s = (t - t0) / T
    q = c0 + s * (c1 + s * (c2 + s * (c3 + s * (c4 + s * c5))))
    qd = (c1 + s * (2 * c2 + s * (3 * c3 + s * (4 * c4 + s * 5 * c5)))) / T
    qdd = (2 * c2 + s * (6 * c3 + s * (12 * c4 + s * 20 * c5))) / (T * T)
    return q, qd, qdd


def reference(task: StrikeTask, t):
    """Reference swing (angle, rate, acceleration) at times ``t`` [s]: hold, quintic to the strike,
    quintic follow-through to rest, quintic back home, hold. Continuous in acceleration."""
    t = np.asarray(t, dtype=float)
    q = np.full(t.shape, task.home_angle)
    qd = np.zeros(t.shape)
    qdd = np.zeros(t.shape)
    peak = task.strike_angle + task.follow_through
    pieces = [
        (task.swing_start, task.strike_time, (task.home_angle, 0, 0), (task.strike_angle, task.strike_speed, 0)),
        (task.strike_time, task.turn_time, (task.strike_angle, task.strike_speed, 0), (peak, 0, 0)),
        (task.turn_time, task.return_time, (peak, 0, 0), (task.home_angle, 0, 0)),
    ]
    for t0, t1, a, b in pieces:
        inside = (t >= t0) & (t < t1)
        if inside.any():
            q[inside], qd[inside], qdd[inside] = _quintic(t[inside], t0, t1, a, b)
    return q, qd, qdd


def strike_metrics(task: StrikeTask, angle, rate, pressures) -> dict:
    """Metrics of one trial from sampled signals (k dt, k = 0..n_steps).

    Returns ``rms_error_deg`` (swing tracking), ``strike_angle_error_deg``,
    ``strike_speed_error_pct``, ``peak_pressure_kpa``, ``settle_time_s`` (first time after the
    turn from which the angle stays within the tolerance of home; None if never) and ``settled``.
    """
    angle = np.asarray(angle, dtype=float)
    rate = np.asarray(rate, dtype=float)
    n = angle.shape[-1]
    t = np.arange(n) * task.dt
    ref, _, _ = reference(task, t)
    k = task.strike_index
    rms = math.degrees(float(np.sqrt(np.mean((angle - ref) ** 2))))
    out_of_band = np.abs(angle - task.home_angle) > task.settle_tolerance
    after_turn = t >= task.turn_time
    late = np.nonzero(out_of_band & after_turn)[0]
    if k >= n:
        strike_err, speed_err = float("nan"), float("nan")
    else:
        strike_err = math.degrees(float(angle[k] - task.strike_angle))
        speed_err = 100.0 * float(rate[k] - task.strike_speed) / task.strike_speed
    if late.size == 0:
        settle = float(task.turn_time)
    elif late[-1] + 1 < n:
        settle = float(t[late[-1] + 1])
    else:
        settle = None
    return {
        "rms_error_deg": rms,
        "strike_angle_error_deg": strike_err,
        "strike_speed_error_pct": speed_err,
        "peak_pressure_kpa": float(np.max(pressures)) / 1e3 if np.size(pressures) else 0.0,
        "settle_time_s": settle,
        "settled": settle is not None and settle <= task.settle_time + 1e-12,
    }


#: Reward weights: tracking (per deg^2, averaged over the trial), and at the strike instant
#: per deg^2 of angle error and per (10 %)^2 of speed error.
TRACK_WEIGHT = 1.0
STRIKE_ANGLE_WEIGHT = 1.0
STRIKE_SPEED_WEIGHT = 1.0
FAULT_PENALTY = 100.0


@law
def reward_at(k, angle, rate, ref_angle, n_steps, strike_index, strike_speed):
    """Reward of the sample at step ``k``: ``-TRACK (e/1deg)^2 / N`` every step, so the trial's
    tracking part sums to minus the mean squared error in deg^2; at the strike step additionally
    ``-(angle error/1 deg)^2 - (speed error/10 %)^2``."""
    err_deg = (angle - ref_angle) * (180.0 / math.pi)
    r = -TRACK_WEIGHT * err_deg * err_deg / n_steps
    if k == strike_index:
        speed_pct = 100.0 * (rate - strike_speed) / strike_speed
        r -= STRIKE_ANGLE_WEIGHT * err_deg * err_deg + STRIKE_SPEED_WEIGHT * (speed_pct / 10.0) ** 2
    return r


_reward_u = broadcast(reward_at, 7)


def step_reward(task: StrikeTask, k, angle, rate, ref_angle):
    """:func:`reward_at` of ``task`` over numpy arrays (broadcasting) given the reference angle."""
    return _reward_u(k, angle, rate, ref_angle, task.n_steps, task.strike_index, task.strike_speed)
