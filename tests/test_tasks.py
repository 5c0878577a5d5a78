"""Strike task: the planned reference swing and the trial metrics."""
import math

import numpy as np
import pytest

from muscle_sim.tasks import StrikeTask, reference, step_reward, strike_metrics


def demo_task():
    return StrikeTask(home_angle=math.radians(-30), strike_angle=math.radians(20), strike_time=0.25,
                      strike_speed=12.0, follow_through=math.radians(15), return_time=0.6, settle_time=0.7,
                      trial_length=0.8)


def test_reference_meets_the_strike_and_is_smooth():
    task = demo_task()
    # boundary conditions of each quintic (closed form; tolerance 1e-9)
    q, qd, qdd = reference(task, np.array([0.0, task.swing_start, task.strike_time, task.turn_time,
                                           task.return_time, task.trial_length]))
    assert q[0] == pytest.approx(task.home_angle) and qd[0] == 0
    assert q[2] == pytest.approx(task.strike_angle, abs=1e-9)
    assert qd[2] == pytest.approx(task.strike_speed, abs=1e-9)
    assert q[3] == pytest.approx(task.strike_angle + task.follow_through, abs=1e-9)
    assert qd[3] == pytest.approx(0.0, abs=1e-9)
    assert q[4] == pytest.approx(task.home_angle, abs=1e-9)
    # continuity of position, rate and acceleration (numerical check on a fine grid)
    t = np.linspace(0, task.trial_length, 80001)
    q, qd, qdd = reference(task, t)
    h = t[1] - t[0]
    assert np.max(np.abs(np.diff(q))) < 13.0 * h
    assert np.max(np.abs(np.diff(qd))) < 500.0 * h
    assert np.max(np.abs(np.diff(qdd))) < 0.5
    # derivative consistency: qd is the derivative of q (central differences, tolerance 1e-3 rad/s)
    np.testing.assert_allclose(np.gradient(q, h)[1:-1], qd[1:-1], atol=1e-3)
    # the swing leaves home monotonically: a quintic ending at v with zero acceleration over
    # T = 2 dq / v has no undershoot (derived)
    swing = (t >= task.swing_start) & (t <= task.strike_time)
    assert np.all(qd[swing] >= -1e-9)


def test_metrics_of_a_perfect_trial_are_zero():
    task = demo_task()
    t = np.arange(task.n_steps + 1) * task.dt
    q, qd, _ = reference(task, t)
    m = strike_metrics(task, q, qd, np.full((t.size, 2), 3e5))
    assert m["rms_error_deg"] == pytest.approx(0.0, abs=1e-9)
    assert m["strike_angle_error_deg"] == pytest.approx(0.0, abs=1e-9)
    assert m["strike_speed_error_pct"] == pytest.approx(0.0, abs=1e-6)
    assert m["peak_pressure_kpa"] == pytest.approx(300.0)
    assert m["settled"]


def test_metrics_see_an_offset_and_a_late_settle():
    task = demo_task()
    t = np.arange(task.n_steps + 1) * task.dt
    q, qd, _ = reference(task, t)
    late = q + np.where(t < 0.72, math.radians(2.0), 0.0)
    m = strike_metrics(task, late, qd * 1.1, np.zeros((t.size, 2)))
    assert m["strike_angle_error_deg"] == pytest.approx(2.0)
    assert m["strike_speed_error_pct"] == pytest.approx(10.0)
    assert m["settle_time_s"] == pytest.approx(0.72)
    assert not m["settled"]


def test_reward_sums_to_minus_the_mean_squared_error_plus_the_strike_terms():
    # Derived from the reward's definition: the per-step tracking terms sum to minus the mean of
    # the squared error in deg^2 over the trial's N steps; the strike step adds (angle error in
    # deg)^2 + (speed error / 10 %)^2. The same function serves floats and arrays; rel 1e-12.
    task = demo_task()
    k = np.arange(1, task.n_steps + 1)
    ref = reference(task, k * task.dt)[0]
    angle = ref + 0.01 * np.sin(k)
    rate = np.full(k.shape, 11.0)
    batched = step_reward(task, k, angle, rate, ref)
    err = np.degrees(angle - ref)
    i = task.strike_index - 1
    strike = err[i] ** 2 + (100.0 * (11.0 - task.strike_speed) / task.strike_speed / 10.0) ** 2
    assert batched.sum() == pytest.approx(-np.mean(err ** 2) - strike, rel=1e-12)
    scalar = [step_reward(task, int(j), float(a), 11.0, float(r)) for j, a, r in zip(k, angle, ref)]
    np.testing.assert_allclose(batched, scalar, rtol=1e-12)
