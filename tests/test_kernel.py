"""The compiled kernel as every path runs it: batches with one parameter row per member, the
command delay per sub-step, divergence, and the sensor models against their written-out laws."""
import math
from dataclasses import replace

import numpy as np
import pytest

from muscle_sim import config
from muscle_sim.errors import SimulationDiverged
from muscle_sim.integrate import Stepper, command_slots, delay_steps, simulate
from muscle_sim.params import JointParams, McKibbenParams, PlantParams, PneumaticParams
from muscle_sim.sensors import SensorParams, measure

from conftest import DEMO, strike_commands

_THICK_MUSCLE = McKibbenParams(rest_length=0.25, rest_radius=0.008, rest_braid_angle=math.radians(20.0),
                               wall_thickness=1.2e-3, end_correction=1.4, threshold_pressure=3e4,
                               braid_friction=0.08, friction_rate_scale=0.2)
_GRAVITY_JOINT = JointParams(pulley_radius=0.02, pre_contraction=0.08, inertia=0.02, payload_inertia=0.006,
                             gravity_moment=0.7, gravity_offset=0.3, viscous_damping=0.02, coulomb_torque=0.05)


def _members():
    demo = config.plant_params(config.load(DEMO))
    pn = demo.pneumatics
    return [demo,
            PlantParams(_THICK_MUSCLE, _GRAVITY_JOINT, pn),
            PlantParams(demo.muscle, replace(demo.joint, payload_inertia=0.03), replace(pn, supply_pressure=4e5)),
            PlantParams(_THICK_MUSCLE, demo.joint, replace(pn, critical_ratio=0.5, subsonic_index=0.7))]


def test_a_batch_of_different_plants_equals_each_plant_run_alone(demo_setup):
    # Reference: each plant simulated on its own (batch of one); the batch with one parameter row
    # per member must give the same numbers exactly (same compiled code, member by member).
    x0, hold, cmd = strike_commands(demo_setup, n_steps=200)
    members = _members()
    batch = Stepper(members, demo_setup.task.dt, demo_setup.task.n_substeps, batch=len(members))
    batch.reset(np.tile(x0, (len(members), 1)), hold)
    alone = [simulate(p, x0, cmd, demo_setup.task.dt, demo_setup.task.n_substeps, u_before=hold) for p in members]
    for k, u in enumerate(cmd):
        x = batch.step(np.tile(u, (len(members), 1)))
        for i in range(len(members)):
            np.testing.assert_array_equal(x[i], alone[i][k + 1])
    assert len({round(float(a[-1, 0]), 6) for a in alone}) == len(members)   # they really differ


def test_members_with_different_delays_are_refused(demo_setup):
    p = demo_setup.plant
    other = PlantParams(p.muscle, p.joint, replace(p.pneumatics, delay=p.pneumatics.delay + 0.004))
    with pytest.raises(ValueError, match="delay"):
        Stepper([p, other], 0.002, 2, batch=2)


@pytest.mark.parametrize("n_delay", [0, 1, 2, 3, 5, 8, 12])
@pytest.mark.parametrize("n_substeps", [1, 2, 3, 4])
def test_command_slots_follow_the_delayed_source_sample(n_delay, n_substeps):
    # Reference: the delay rule of simulate_reference: sub-step i (global) uses the command given
    # at control step floor((i - n_delay) / n_substeps); exact.
    slots = command_slots(n_delay, n_substeps)
    for k in range(10):
        for j in range(n_substeps):
            source = (k * n_substeps + j - n_delay) // n_substeps
            if source >= 0:                      # before that, the command held before the start
                assert k - slots[j] == source


def test_a_delay_is_rounded_half_up_to_whole_steps():
    # Derived: 2.5 steps of delay are 3 steps, 2.4999 are 2, exact multiples stay (one rule everywhere)
    assert delay_steps(0.005, 0.002) == 3
    assert delay_steps(0.0049998, 0.002) == 2
    assert delay_steps(0.006, 0.002) == 3
    assert delay_steps(0.0, 0.001) == 0


def test_a_diverging_member_raises_with_its_state(demo_setup):
    p, task = demo_setup.plant, demo_setup.task
    stepper = Stepper(p, task.dt, task.n_substeps, batch=3)
    x = np.tile([0.0, 0.0, 1e5, 1e5, 0.0, 0.0], (3, 1))
    x[1, 4] = math.nan
    stepper.reset(x, (1e5, 1e5))
    with pytest.raises(SimulationDiverged, match="nan"):
        stepper.step(np.full((3, 2), 1e5))
    stepper = Stepper(p, task.dt, task.n_substeps)
    stepper.reset([25.0, 0.0, 1e5, 1e5, 0.0, 0.0])          # past ANGLE_LIMIT
    with pytest.raises(SimulationDiverged):
        stepper.step((1e5, 1e5))


@pytest.mark.parametrize("sensors", [
    SensorParams(angle_counts=16384, angle_noise=3e-4, rate_noise=0.01, pressure_noise=1e3, pressure_lag=1e-3),
    SensorParams(),
    SensorParams(pressure_noise=500.0),
    SensorParams(angle_counts=4096, angle_noise=1e-3),
    SensorParams(rate_noise=0.02, pressure_lag=5e-3)], ids=lambda s: repr(s))
def test_sensor_readings_follow_their_laws(sensors):
    # Written-out reference (common practice for these sensors): angle + noise, then quantised to
    # 2 pi / counts; rate + noise; pressures through the discrete first-order lag
    # f <- f + (1 - exp(-dt / tau)) (p - f), then + noise; normals drawn member by member in the
    # order angle, rate, pressure A, pressure B (noisy channels only). Exact to 1e-12 relative.
    rng, ref_rng = np.random.default_rng(3), np.random.default_rng(3)
    x = np.array([[0.3, -2.0, 2.5e5, 1.2e5, 0.1, -0.2], [-0.1, 4.0, 1.0e5, 3.0e5, 0.0, 0.0]])
    filt = np.array([[2.0e5, 1.0e5], [1.5e5, 2.5e5]])
    blend = 1.0 if sensors.pressure_lag == 0 else 1.0 - math.exp(-0.002 / sensors.pressure_lag)
    levels = [sensors.angle_noise, sensors.rate_noise, sensors.pressure_noise, sensors.pressure_noise]
    for _ in range(5):
        y, new_filt = measure(sensors, x, filt, rng, 0.002)
        want_filt = filt + blend * (x[:, 2:4] - filt)
        z = ref_rng.standard_normal((2, sum(1 for v in levels if v)))
        want = np.column_stack([x[:, 0], x[:, 1], want_filt])
        col = 0
        for c, level in enumerate(levels):
            if level:
                want[:, c] += level * z[:, col]
                col += 1
        if sensors.angle_counts:
            step = 2 * math.pi / sensors.angle_counts
            want[:, 0] = np.round(want[:, 0] / step) * step
        np.testing.assert_allclose(new_filt, want_filt, rtol=1e-12)
        np.testing.assert_allclose(y, want, rtol=1e-12, atol=1e-12)
        filt = new_filt
    if not any(levels):
        # a noiseless sensor leaves the generator untouched
        assert rng.standard_normal() == np.random.default_rng(3).standard_normal()


def _slip_plant(demo_setup, model="maxwell-slip", friction=0.08):
    p = demo_setup.plant
    m = replace(p.muscle, friction_model=model, braid_friction=friction, friction_elements=8, slip_length=2e-3)
    return PlantParams(m, p.joint, p.pneumatics)


def test_braid_elements_in_the_plant_follow_the_muscle_lengths(demo_setup):
    # Reference: the Maxwell-slip law on its own (hysteresis.trace) along muscle A's length path
    # L_a = l0 (1 - eps0 - r_p q / l0) recorded at every sub-step (one sub-step per control step),
    # and muscle B's with the opposite shift; the plant's element states must equal it (1e-12 m).
    from muscle_sim import hysteresis

    p = _slip_plant(demo_setup)
    x0, hold, cmd = strike_commands(demo_setup, n_steps=150)
    stepper = Stepper(p, demo_setup.task.dt, 1)
    stepper.reset(x0, hold)
    q = [x0[0]] + [stepper.step(u)[0] for u in cmd]
    q = np.array(q)
    m, j = p.muscle, p.joint
    for row, sign in ((0, -1.0), (1, 1.0)):
        lengths = m.rest_length * (1 - j.pre_contraction) + sign * j.pulley_radius * q
        want = hysteresis.trace(m, lengths, 2e5).final_state
        np.testing.assert_allclose(stepper._slip[0, row], want, atol=1e-12)
    assert np.ptp(q) > 0.3                                         # a real swing, elements saturated
    assert np.all(np.abs(stepper._slip[0]) > 0.0)


def test_braid_hysteresis_dissipates_and_vanishes_without_friction(demo_setup):
    # Derived: with zero braid friction the Maxwell-slip plant is the tanh plant with zero braid
    # friction (exactly); with friction the elements only ever take energy out, so the same
    # commands give a smaller swing than without braid friction (Maxwell-slip elements are
    # passive: Lampaert, Al-Bender & Swevers 2003).
    x0, hold, cmd = strike_commands(demo_setup, n_steps=200)
    task = demo_setup.task
    run = lambda params: simulate(params, x0, cmd, task.dt, task.n_substeps, u_before=hold)  # noqa: E731
    np.testing.assert_array_equal(run(_slip_plant(demo_setup, friction=0.0)),
                                  run(_slip_plant(demo_setup, "tanh", friction=0.0)))
    free = run(_slip_plant(demo_setup, "tanh", friction=0.0))
    slip = run(_slip_plant(demo_setup, friction=0.15))
    assert np.ptp(slip[:, 0]) < np.ptp(free[:, 0])
    assert not np.allclose(slip, run(_slip_plant(demo_setup, "tanh", friction=0.15)))   # a different law
