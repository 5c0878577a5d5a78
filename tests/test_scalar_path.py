"""The scalar fast path (bound kernel on Python floats) against the batched numpy core.

The scalar twins (``plant.rhs_f``/``scalar_kernel``, ``integrate.rk4_step_f``, the scalar
``Stepper``, ``sensors.measure_f``) must give the batched core's numbers: same equations, only
rounding may differ.
"""
import math
from dataclasses import replace

import numpy as np
import pytest

from muscle_sim import config
from muscle_sim.errors import SimulationDiverged
from muscle_sim.integrate import Stepper, _command_offsets, rk4_step, rk4_step_f
from muscle_sim.params import JointParams, McKibbenParams, PlantParams, PneumaticParams
from muscle_sim.plant import rhs, rhs_f, scalar_kernel
from muscle_sim.sensors import SensorParams, measure, measure_f

from conftest import DEMO, strike_commands

_IDEAL_MUSCLE = McKibbenParams(rest_length=0.25, rest_radius=0.008, rest_braid_angle=math.radians(22.0))
_THICK_MUSCLE = McKibbenParams(rest_length=0.25, rest_radius=0.008, rest_braid_angle=math.radians(20.0),
                               wall_thickness=1.2e-3, end_correction=1.4, threshold_pressure=3e4,
                               braid_friction=0.08, friction_rate_scale=0.2)
_GRAVITY_JOINT = JointParams(pulley_radius=0.02, pre_contraction=0.08, inertia=0.02, payload_inertia=0.006,
                             gravity_moment=0.7, gravity_offset=0.3, viscous_damping=0.02, coulomb_torque=0.05)


def _variants():
    """Plants covering every branch of the kernel: (name, params)."""
    demo = config.plant_params(config.load(DEMO))   # valve, wall, end correction, friction, no gravity
    prior = config.prior_params(config.load(DEMO))  # lag regulator, ideal muscle
    pn = demo.pneumatics
    return [
        ("demo valve", demo),
        ("prior lag", prior),
        ("ideal muscle, valve, gravity", PlantParams(_IDEAL_MUSCLE, _GRAVITY_JOINT, PneumaticParams(6e5))),
        ("thick wall, friction, lag with rate limit, gravity",
         PlantParams(_THICK_MUSCLE, _GRAVITY_JOINT, PneumaticParams(6e5, model="lag", lag_time_constant=0.01,
                                                                    max_pressure_rate=2e7))),
        ("valve, subsonic index 0.7, b = 0, no pivot friction",
         PlantParams(demo.muscle, replace(demo.joint, coulomb_torque=0.0, viscous_damping=0.0),
                     replace(pn, subsonic_index=0.7, critical_ratio=0.0))),
        ("valve, b = 0.5, other polytropes, small dead volume, 4 bar supply",
         PlantParams(_THICK_MUSCLE, _GRAVITY_JOINT,
                     replace(pn, supply_pressure=4e5, critical_ratio=0.5, k_in=1.2, k_out=1.1, k_chamber=1.0,
                             dead_volume=1e-6, temperature=310.0))),
    ]


_VARIANTS = _variants()


def _random_states(params, rng, n=200):
    """States and commands over (and past) the whole range, with the edge cases placed explicitly."""
    supply = params.pneumatics.supply_pressure
    x = np.column_stack([rng.uniform(-2.5, 2.5, n),                  # past the stops, slack, past eps_max
                         rng.uniform(-30.0, 30.0, n),
                         rng.uniform(-2e4, supply + 2e4, n),         # RK4 stages can leave [0, supply]
                         rng.uniform(-2e4, supply + 2e4, n),
                         rng.uniform(-1.3, 1.3, n), rng.uniform(-1.3, 1.3, n)])
    u = rng.uniform(-1e5, supply + 1e5, (n, 2))                      # commands outside [0, supply] too
    x[:10, 2:4] = [[0.0, supply], [supply, 0.0]] * 5                 # at atmosphere and at supply
    x[10:20, 0] = [1.2, -1.2, 0.9, -0.9, 0.79, -0.79, 1.5, -1.5, 0.0, 0.5]   # in the stops, slack
    x[20:30, 4:6] = 0.0                                              # both spools closed
    x[30:35, 4] = 0.0                                                # one spool closed
    x[35:40, 2:4] = rng.uniform(0.0, 3e3, (5, 2))                    # near atmosphere
    x[40:45, 2:4] = supply - rng.uniform(0.0, 3e3, (5, 2))           # near supply
    x[45:50, 1] = 0.0                                                # at rest
    return x, u


@pytest.mark.parametrize("name, params", _VARIANTS, ids=[v[0] for v in _VARIANTS])
def test_scalar_rhs_equals_batched_rhs(name, params):
    rng = np.random.default_rng(11)
    x, u = _random_states(params, rng)
    want = rhs(0.0, x, u, params)
    f = scalar_kernel(params)
    for xi, ui, wi in zip(x.tolist(), u.tolist(), want):
        got = rhs_f(0.0, xi, ui, params)
        assert isinstance(got, list) and len(got) == 6 and all(type(v) is float for v in got)
        # reference: the batched numpy rhs, same equations; tolerance rel 1e-12 (abs 1e-9)
        np.testing.assert_allclose(got, wi, rtol=1e-12, atol=1e-9, err_msg=f"{name}: x = {xi}, u = {ui}")
        # reference: the batched numpy rhs, same equations (the kernel called directly); rel 1e-12 (abs 1e-9)
        np.testing.assert_allclose(f(*xi, *ui), wi, rtol=1e-12, atol=1e-9)


@pytest.mark.parametrize("name, params", _VARIANTS, ids=[v[0] for v in _VARIANTS])
def test_scalar_rk4_step_equals_batched_rk4_step(name, params):
    rng = np.random.default_rng(12)
    x, u = _random_states(params, rng, n=50)
    x[:, 0] = np.clip(x[:, 0], -1.5, 1.5)
    h = 1e-3
    want = rk4_step(0.0, x, u, h, params)
    for xi, ui, wi in zip(x.tolist(), u.tolist(), want):
        # reference: the batched numpy RK4 step (rk4_step on rhs), same equations; rel 1e-12 (abs 1e-9)
        np.testing.assert_allclose(rk4_step_f(0.0, xi, ui, h, params), wi, rtol=1e-12, atol=1e-9)


def _trajectory_variants(demo_setup):
    p = demo_setup.plant
    return [("demo plant", p, 2), ("prior", demo_setup.prior, 2),
            ("gravity, valve", PlantParams(_IDEAL_MUSCLE, _GRAVITY_JOINT, replace(p.pneumatics)), 2),
            ("thick wall, lag, 3 sub-steps", PlantParams(_THICK_MUSCLE, _GRAVITY_JOINT,
                                                         replace(p.pneumatics, model="lag")), 3),
            ("demo, no delay, 1 sub-step", PlantParams(p.muscle, p.joint, replace(p.pneumatics, delay=0.0)), 1),
            ("demo, long delay, 3 sub-steps", PlantParams(p.muscle, p.joint, replace(p.pneumatics, delay=0.0117)), 3)]


def test_scalar_stepper_equals_batched_stepper(demo_setup):
    x0, hold, cmd = strike_commands(demo_setup, n_steps=400)
    task = demo_setup.task
    scale = np.array([0.1, 1.0, 1e5, 1e5, 1.0, 1.0])   # rad, rad/s, Pa, Pa, -, -: the floor of "relative"
    for name, params, n_sub in _trajectory_variants(demo_setup):
        a = Stepper(params, task.dt, n_sub)
        b = Stepper(params, task.dt, n_sub, batch=1)
        a.reset(x0, hold)
        b.reset(x0[None, :], hold)
        for k, u in enumerate(cmd):
            xa = np.array(a.step(u))
            xb = b.step(u[None, :])[0]
            # reference: Stepper(batch=1) on the batched numpy core, same equations and commands;
            # 400 control steps of a strike, tolerance 1e-9 relative (to max(|x|, scale))
            assert np.all(np.abs(xa - xb) <= 1e-9 * np.maximum(np.abs(xb), scale)), (name, k, xa, xb)
        assert a.t == b.t and a.k == b.k == len(cmd)


@pytest.mark.parametrize("n_delay", [0, 1, 2, 3, 5, 8, 12])
@pytest.mark.parametrize("n_substeps", [1, 2, 3, 4])
def test_command_offsets_match_command_for(n_delay, n_substeps):
    dt = 0.002
    pneumatics = PneumaticParams(6e5, delay=n_delay * dt / n_substeps)
    stepper = Stepper(PlantParams(_IDEAL_MUSCLE, _GRAVITY_JOINT, pneumatics), dt, n_substeps)
    assert stepper.n_delay == n_delay
    for i in range(20):                                  # a history of distinct commands
        stepper._history.append((float(i), -float(i)))
    # reference: Stepper._command_for (the batched path's delay lookup); exact
    assert [stepper._history[i] for i in _command_offsets(n_delay, n_substeps)] == [
        stepper._command_for(j) for j in range(n_substeps)]


def test_scalar_stepper_raises_on_nan_and_runaway_states(demo_setup):
    p, task = demo_setup.plant, demo_setup.task
    stepper = Stepper(p, task.dt, task.n_substeps)
    stepper.reset([0.0, 0.0, 1e5, 1e5, math.nan, 0.0])
    with pytest.raises(SimulationDiverged):
        stepper.step((1e5, 1e5))
    stepper.reset([25.0, 0.0, 1e5, 1e5, 0.0, 0.0])          # past ANGLE_LIMIT
    with pytest.raises(SimulationDiverged):
        stepper.step((1e5, 1e5))


@pytest.mark.parametrize("sensors", [
    SensorParams(angle_counts=16384, angle_noise=3e-4, rate_noise=0.01, pressure_noise=1e3, pressure_lag=1e-3),
    SensorParams(),
    SensorParams(pressure_noise=500.0),
    SensorParams(angle_counts=4096, angle_noise=1e-3),
    SensorParams(rate_noise=0.02, pressure_lag=5e-3),
    SensorParams(angle_noise=1e-3, pressure_noise=200.0)], ids=lambda s: repr(s))
def test_measure_f_equals_batched_measure(sensors):
    rng_s, rng_b = np.random.default_rng(3), np.random.default_rng(3)
    x = [0.3, -2.0, 2.5e5, 1.2e5, 0.1, -0.2]
    filt = (2.0e5, 1.0e5)
    for _ in range(20):
        y_s, filt_s = measure_f(sensors, x, filt, rng_s, 0.002)
        y_b, filt_b = measure(sensors, np.array([x]), np.array([filt]), rng_b, 0.002)
        # reference: the batched numpy measure with a batch of one, same seed; rel 1e-15
        np.testing.assert_allclose(y_s, y_b[0], rtol=1e-15, atol=0.0)
        np.testing.assert_allclose(filt_s, filt_b[0], rtol=1e-15, atol=0.0)
        filt = filt_s
    # reference: the same generator stream, so both drew the same numbers; exact
    assert rng_s.standard_normal() == rng_b.standard_normal()
