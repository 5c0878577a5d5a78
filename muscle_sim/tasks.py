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


#: Columns of a trial's running totals (one row per trial): what its metrics are made of. The
#: totals are folded one sample at a time (:func:`fold_sample`), by the trial core while it steps
#: and by :func:`strike_metrics` over a logged trial, and turned into metrics by one function
#: (:func:`metrics_from_totals`): every path reports the same numbers the same way.
SUM_SQ, PEAK, LAST_OUT, STRIKE_ERR, SPEED_ERR, SAMPLES = range(6)
N_TOTALS = 6


def fresh_totals(members: int = 1) -> np.ndarray:
    """Running totals of ``members`` trials before their first sample."""
    totals = np.zeros((members, N_TOTALS))
    clear_totals(totals, np.ones(members, dtype=np.bool_))
    return totals


@law
def clear_totals(totals, mask):
    """Reset the rows of ``totals`` where ``mask`` is true (a trial starts)."""
    for i in range(totals.shape[0]):
        if mask[i]:
            totals[i, SUM_SQ] = 0.0
            totals[i, PEAK] = -math.inf
            totals[i, LAST_OUT] = -1.0
            totals[i, STRIKE_ERR] = math.nan
            totals[i, SPEED_ERR] = math.nan
            totals[i, SAMPLES] = 0.0


@law
def fold_sample(k, angle, rate, p_a, p_b, ref_angle, dt, home, tolerance, turn_time, strike_index,
                strike_angle, strike_speed, row):
    """Fold sample ``k`` (readings angle [rad], rate [rad/s], pressures [Pa]; the reference angle
    there) into one trial's totals ``row``: squared tracking error, peak pressure, the last sample
    after the turn outside the settling band of home, the strike errors at the strike sample."""
    err = angle - ref_angle
    row[SUM_SQ] += err * err
    if p_a == p_a:                      # a log without pressure channels holds NaN there
        row[PEAK] = max(row[PEAK], p_a)
    if p_b == p_b:
        row[PEAK] = max(row[PEAK], p_b)
    if abs(angle - home) > tolerance and k * dt >= turn_time:
        row[LAST_OUT] = k
    if k == strike_index:
        row[STRIKE_ERR] = (angle - strike_angle) * (180.0 / math.pi)
        row[SPEED_ERR] = 100.0 * (rate - strike_speed) / strike_speed
    row[SAMPLES] += 1.0


@law
def _fold_log(angle, rate, pressures, ref, dt, home, tolerance, turn_time, strike_index, strike_angle,
              strike_speed, row):
    for k in range(angle.shape[0]):
        fold_sample(k, angle[k], rate[k], pressures[k, 0], pressures[k, 1], ref[k], dt, home, tolerance, turn_time,
                    strike_index, strike_angle, strike_speed, row)


def metrics_from_totals(task: StrikeTask, row, fault: str | None = None) -> dict:
    """The metrics of one trial from its totals (see :func:`strike_metrics` for the keys).

    The settle time is the time of the first sample after the turn from which the angle stays
    within the tolerance of home (the turn itself if it never leaves); it is None when the log
    ends before ``task.settle_time`` (too short to tell) or is still outside at its last sample.
    A trial that ended in a ``fault`` is never settled.
    """
    sum_sq, peak, last_out, strike_err, speed_err, samples = row.tolist()
    n, last_out, dt = int(samples), int(last_out), task.dt
    if n == 0 or (n - 1) * dt < task.settle_time - 1e-12:
        settle = None
    elif last_out < 0:
        settle = float(task.turn_time)
    elif last_out + 1 < n:
        settle = (last_out + 1) * dt
    else:
        settle = None
    return {
        "rms_error_deg": math.degrees(math.sqrt(sum_sq / n)) if n else math.nan,
        "strike_angle_error_deg": None if strike_err != strike_err else strike_err,
        "strike_speed_error_pct": None if speed_err != speed_err else speed_err,
        "peak_pressure_kpa": peak / 1e3 if peak > -math.inf else None,
        "settle_time_s": settle,
        "settled": fault is None and settle is not None and settle <= task.settle_time + 1e-12,
        "fault": fault,
    }


def strike_metrics(task: StrikeTask, angle, rate, pressures, fault: str | None = None) -> dict:
    """Metrics of one logged trial from sampled signals (k dt, k = 0..n-1).

    Returns ``rms_error_deg`` (swing tracking), ``strike_angle_error_deg``,
    ``strike_speed_error_pct`` (None if the log ends before the strike), ``peak_pressure_kpa``
    (None without pressure readings; NaN samples are skipped),
    ``settle_time_s`` (:func:`metrics_from_totals`), ``settled`` and ``fault`` (as given).
    """
    angle = np.ascontiguousarray(angle, dtype=float)
    rate = np.ascontiguousarray(rate, dtype=float)
    pressures = np.ascontiguousarray(np.broadcast_to(np.asarray(pressures, dtype=float), angle.shape + (2,)))
    n = angle.shape[-1]
    ref, _, _ = reference(task, np.arange(n) * task.dt)
    row = fresh_totals(1)[0]
    _fold_log(angle, rate, pressures, ref, task.dt, task.home_angle, task.settle_tolerance, task.turn_time,
              task.strike_index, task.strike_angle, task.strike_speed, row)
    return metrics_from_totals(task, row, fault)


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
