"""Exact derivatives the learner and the planner linearise the prior with: the partials of each law,
the plant's Jacobian and the Jacobian of the RK4 one-step map, each against numerical
differentiation of the very function it differentiates (scipy.differentiate, an adaptive
finite-difference derivative with its own error estimate, or central differences where noted)."""
import math
from dataclasses import replace

import numpy as np
import pytest
from scipy.differentiate import derivative, jacobian

from muscle_sim import config
from muscle_sim.integrate import rk4_step, step_with_jacobian
from muscle_sim.joint import end_stop_partials, end_stop_torque, pivot_partials, pivot_torque
from muscle_sim.muscle import muscle_chamber, muscle_chamber_partials
from muscle_sim.params import JointParams, McKibbenParams, PlantParams
from muscle_sim.plant import N_STATE, pack, plant_jacobian, rhs
from muscle_sim.pneumatics import (T0, chamber_rate, chamber_rate_partials, iso6358_flow, iso6358_flow_partials,
                                   regulator_rate, regulator_rate_partials, spool_rate, spool_rate_partials,
                                   valve_flow, valve_flow_partials)

from conftest import DEMO

#: Relative agreement asked of an exact partial and scipy's numerical derivative of the law (the
#: latter is good to about 1e-9 relative on these smooth branches; 1e-6 leaves room for rounding).
RTOL = 1e-6


def _numeric(law, args, i, step, scale=0.0):
    """scipy.differentiate.derivative of ``law`` in its argument ``i`` at ``args`` (initial step
    ``step``, inside the branch the point lies on), converged to 1e-9 relative or to 1e-3 of the
    test's absolute tolerance ``RTOL * scale`` (a slope that is exactly zero)."""
    def f(x):
        return np.vectorize(lambda v: law(*args[:i], v, *args[i + 1:]))(x)

    res = derivative(f, args[i], initial_step=step, step_factor=2.0, maxiter=8,
                     tolerances={"rtol": 1e-9, "atol": 1e-3 * RTOL * scale})
    assert res.success, f"no converged numerical derivative of {law} in argument {i}"
    return float(res.df)


def _close(exact, numeric, scale):
    assert exact == pytest.approx(numeric, rel=RTOL, abs=RTOL * scale)


#: (end correction, rest braid angle [deg], wall [m]) of a thin-walled and a thick-walled muscle
_GEOM = {"thin": (1.25, 22.0, 0.0), "thick": (1.4, 20.0, 1.2e-3)}


@pytest.mark.parametrize("kind", ["thin", "thick"])
def test_muscle_partials_are_the_derivatives_of_the_muscle_law(kind):
    from muscle_sim import plant as P

    k, alpha0, wall = _GEOM[kind]
    demo = config.plant_params(config.load(DEMO))
    muscle = replace(demo.muscle, rest_braid_angle=math.radians(alpha0), wall_thickness=wall, end_correction=k,
                     threshold_pressure=1e4, braid_friction=0.05)
    row = pack(replace(demo, muscle=muscle))
    geometry = (row[P.K_END], row[P.K_COS0], row[P.K_EPS_MAX], row[P.K_D0], row[P.K_WALL], row[P.K_REST_LENGTH],
                row[P.K_THRESHOLD], row[P.K_FRICTION], 0.9)
    rng = np.random.default_rng(1)
    for _ in range(12):
        args = (rng.uniform(0.5e5, 6e5), rng.uniform(0.02, 0.8 * row[P.K_EPS_MAX]), rng.uniform(-1, 1)) + geometry
        value = muscle_chamber_partials(*args)
        assert value[0] == muscle_chamber(*args)[0] and value[4:7:2] == muscle_chamber(*args)[1:]
        force_of = lambda *a: muscle_chamber(*a)[0]       # noqa: E731
        area_of = lambda *a: muscle_chamber(*a)[1]        # noqa: E731
        volume_of = lambda *a: muscle_chamber(*a)[2]      # noqa: E731
        _close(value[1], _numeric(force_of, args, 0, 1e2), abs(value[0]) / args[0])
        _close(value[2], _numeric(force_of, args, 1, 1e-4), abs(value[0]))
        _close(value[3], _numeric(force_of, args, 2, 1e-3), abs(value[0]))
        _close(value[5], _numeric(area_of, args, 1, 1e-4), abs(value[4]))
        _close(value[7], _numeric(volume_of, args, 1, 1e-4), abs(value[6]))
    # slack and past the end of contraction: the clipped law is flat there, and so are its partials
    for eps in (-0.02, row[P.K_EPS_MAX] + 0.01):
        value = muscle_chamber_partials(3e5, eps, 0.0, *geometry)
        assert value[:4] == (0.0, 0.0, 0.0, 0.0) and value[5] == 0.0 and value[7] == 0.0


@pytest.mark.parametrize("m", [0.5, 0.7])
def test_iso6358_partials_on_every_branch_and_both_directions(m):
    # the choked branch (p2/p1 <= b), the subsonic ellipse, the linear end above 0.999, reversed flow
    C, b, T = 1.5e-8, 0.3, T0 + 20.0
    for p1, p2 in ((7e5, 1.5e5), (7e5, 4e5), (7e5, 6.5e5), (7e5, 0.9995 * 7e5), (3e5, 6e5), (5e5, 4.9e5)):
        args = (C, b, p1, p2, T, m)
        q, q_c, q_up, q_down = iso6358_flow_partials(*args)
        assert q == iso6358_flow(*args)
        scale = abs(q) / 1e5 + 1e-12
        _close(q_c, _numeric(iso6358_flow, args, 0, 1e-10), abs(q) / C)
        _close(q_up, _numeric(iso6358_flow, args, 2, 20.0, scale), scale)
        _close(q_down, _numeric(iso6358_flow, args, 3, 20.0, scale), scale)


def test_valve_flow_partials_and_the_closed_spool():
    pn = config.plant_params(config.load(DEMO)).pneumatics
    const = (pn.supply_pressure, pn.atmosphere, pn.sonic_conductance, pn.critical_ratio, pn.temperature,
             pn.subsonic_index)
    for spool, p in ((0.4, 2e5), (0.9, 5.5e5), (-0.3, 3e5), (-1.0, 0.5e5)):
        args = (spool, p) + const
        q, q_s, q_p = valve_flow_partials(*args)
        assert q == valve_flow(*args)
        _close(q_s, _numeric(valve_flow, args, 0, 1e-3), abs(q))
        _close(q_p, _numeric(valve_flow, args, 1, 20.0), abs(q) / 1e5)
    # at a closed spool the flow is linear in the opening on each side: a central difference
    # across the kink is exactly the mean of the one-sided slopes, which the partial returns
    h = 1e-4
    for p in (1e5, 4e5):
        _, q_s, q_p = valve_flow_partials(0.0, p, *const)
        central = (valve_flow(h, p, *const) - valve_flow(-h, p, *const)) / (2 * h)
        assert q_s == pytest.approx(central, rel=1e-9) and q_p == 0.0


def test_chamber_spool_regulator_stop_and_pivot_partials():
    for args in ((2e5, 1.2e-4, 3e-4, 2e-3, 293.15, 101325.0, 1.4, 1.0, 1.2),
                 (4e5, 0.8e-4, -5e-4, -1e-3, 293.15, 101325.0, 1.4, 1.0, 1.2)):
        r = chamber_rate_partials(*args)
        assert r[0] == chamber_rate(*args)
        for i, step in zip(range(4), (50.0, 1e-7, 1e-6, 1e-5)):
            _close(r[i + 1], _numeric(chamber_rate, args, i, step), abs(r[0]) / abs(args[i]))
    for args in ((0.2, 2e5, 2.3e5, 2.0, 0.004), (-0.5, 4e5, 3.6e5, 2.0, 0.004)):   # demand inside +-1
        r = spool_rate_partials(*args)
        assert r[0] == spool_rate(*args)
        for i, step in zip(range(3), (1e-3, 50.0, 50.0)):
            _close(r[i + 1], _numeric(spool_rate, args, i, step), abs(r[0]) / abs(args[i]) + 1e-9)
    assert spool_rate_partials(0.2, 1e5, 5e5, 2.0, 0.004)[2:] == (0.0, 0.0)          # demand limited
    for args in ((2e5, 3e5, 0.02, 6e5, 1e9), (5e5, 1e5, 0.03, 6e5, 1e9)):
        r = regulator_rate_partials(*args)
        assert r[0] == regulator_rate(*args)
        for i in range(2):
            _close(r[i + 1], _numeric(regulator_rate, args, i, 50.0), abs(r[0]) / 1e5)
    assert regulator_rate_partials(2e5, 3e5, 0.02, 6e5, 1e6)[1:] == (0.0, 0.0)        # rate limited
    # the command's slope from inside the range at the supply pressure (where a pressure box ends)
    assert regulator_rate_partials(2e5, 6e5, 0.02, 6e5, 1e9)[2] == pytest.approx(1 / 0.02)
    stops = (-0.7, 0.7, 2000.0, 50.0)
    for q, qd in ((0.72, 1.5), (0.75, -0.3), (-0.74, -2.0), (-0.71, 0.4)):
        args = (q, qd) + stops
        r = end_stop_partials(*args)
        assert r[0] == end_stop_torque(*args) != 0.0
        _close(r[1], _numeric(end_stop_torque, args, 0, 1e-5), abs(r[0]) / 0.01)
        _close(r[2], _numeric(end_stop_torque, args, 1, 1e-4), abs(r[0]))
    assert end_stop_partials(0.2, 3.0, *stops) == (0.0, 0.0, 0.0)
    for q, qd in ((0.3, 0.02), (-1.0, -4.0)):
        args = (q, qd, 0.02, 0.05, 0.05, 0.7, 0.3)
        r = pivot_partials(*args)
        assert r[0] == pivot_torque(*args)
        _close(r[1], _numeric(pivot_torque, args, 0, 1e-4), 1.0)
        _close(r[2], _numeric(pivot_torque, args, 1, 1e-4), 1.0)


def _plants():
    demo = config.plant_params(config.load(DEMO))
    thick = McKibbenParams(rest_length=0.25, rest_radius=0.008, rest_braid_angle=math.radians(20.0),
                           wall_thickness=1.2e-3, end_correction=1.4, threshold_pressure=3e4, braid_friction=0.08,
                           friction_rate_scale=0.2)
    gravity = JointParams(pulley_radius=0.02, pre_contraction=0.08, inertia=0.02, payload_inertia=0.006,
                          gravity_moment=0.7, gravity_offset=0.3, viscous_damping=0.02, coulomb_torque=0.05)
    return {"demo valve": demo, "thick muscle, gravity": PlantParams(thick, gravity, demo.pneumatics),
            "regulator lag": replace(demo, pneumatics=replace(demo.pneumatics, model="lag"))}


def _states(rng, n, spools=True):
    return np.column_stack([rng.uniform(-0.6, 0.6, n), rng.uniform(-12, 12, n), rng.uniform(0.3e5, 5.5e5, n),
                            rng.uniform(0.3e5, 5.5e5, n), rng.uniform(-0.9, 0.9, (n, 2)) * spools])


@pytest.mark.parametrize("name", list(_plants()))
def test_plant_jacobian_is_the_derivative_of_the_right_hand_side(name):
    # Reference: scipy.differentiate.jacobian of the plant's right-hand side (rhs, the compiled
    # law the simulator runs) in (state, command), at random states of the operating range
    params = _plants()[name]
    row = pack(params)
    rng = np.random.default_rng(7)
    jac, work = np.empty((N_STATE, 8)), np.empty(16)
    scale = np.array([1.0, 10.0, 1e5, 1e5, 1.0, 1.0, 1e5, 1e5])     # perturb every input on its own scale
    for x in _states(rng, 8):
        u = rng.uniform(0.5e5, 5.5e5, 2)
        rates = plant_jacobian(*x, *u, 0.0, 0.0, row, jac, work)
        assert np.array_equal(rates, rhs(0.0, x, u, params))

        def f(z):
            zz = np.moveaxis(z, 0, -1) * scale
            return np.moveaxis(rhs(0.0, zz[..., :6], zz[..., 6:], params), -1, 0)

        res = jacobian(f, np.concatenate([x, u]) / scale, initial_step=1e-4)
        numeric = res.df / scale
        for i in range(N_STATE):       # each rate to RTOL of its largest input-scaled slope
            size = float(np.max(np.abs(numeric[i]) * scale))
            np.testing.assert_allclose(jac[i], numeric[i], rtol=RTOL, atol=RTOL * size / scale.min(),
                                       err_msg=f"rate {i}")


@pytest.mark.parametrize("name", list(_plants()))
def test_rk4_tangent_is_the_derivative_of_the_one_step_map(name):
    # Reference: central differences (steps 1e-6 rad, 1e-5 rad/s, 1 Pa, 1e-6 of the opening, 1 Pa)
    # of the RK4 one-step map (integrate.rk4_step, the same sub-steps); they are good to about
    # 1e-7 of each column here, the tolerance asked. The end states are the RK4 steps' own.
    params = _plants()[name]
    nx = 4 if params.pneumatics.model == "lag" else 6
    rng = np.random.default_rng(11)
    x = _states(rng, 40, spools=nx == 6)
    u = rng.uniform(0.5e5, 5.5e5, (40, 2))
    h, n_sub = 1e-3, 2
    end, jac = np.empty((40, N_STATE)), np.empty((40, N_STATE, 8))
    step_with_jacobian(x, u, pack(params), h, n_sub, nx, end, jac)

    def one_step(xs, us):
        for _ in range(n_sub):
            xs = rk4_step(0.0, xs, us, h, params)
        return xs

    np.testing.assert_allclose(end, one_step(x, u), rtol=1e-14, atol=1e-9)
    steps = [1e-6, 1e-5, 1.0, 1.0, 1e-6, 1e-6][:nx] + [1.0, 1.0]
    cols = list(range(nx)) + [6, 7]
    for c, s in zip(cols, steps):
        dx = np.zeros(8)
        dx[c] = s
        fd = (one_step(x + dx[:6], u + dx[6:]) - one_step(x - dx[:6], u - dx[6:])) / (2 * s)
        size = np.max(np.abs(fd[:, :nx]), axis=0)
        np.testing.assert_allclose(jac[:, :nx, c], fd[:, :nx], rtol=1e-5, atol=1e-7 * np.max(size))


# --- over the ranges a rig may have (hypothesis), not only the shipped plants -------------------
from hypothesis import HealthCheck, given, settings, strategies as st  # noqa: E402

from muscle_sim.params import PneumaticParams  # noqa: E402


@st.composite
def _rig(draw):
    """A plant over the ranges of real rigs (common practice for small McKibben muscles, values
    from memory) and a state and command inside its operating range."""
    muscle = McKibbenParams(rest_length=draw(st.floats(0.15, 0.4)), rest_radius=draw(st.floats(0.004, 0.015)),
                            rest_braid_angle=math.radians(draw(st.floats(15.0, 35.0))),
                            wall_thickness=draw(st.sampled_from([0.0, 0.5e-3, 1.2e-3])),
                            end_correction=draw(st.floats(1.0, 1.6)), threshold_pressure=draw(st.floats(0.0, 3e4)),
                            braid_friction=draw(st.floats(0.0, 0.15)), friction_rate_scale=draw(st.floats(0.02, 0.5)),
                            force_scale=draw(st.floats(0.5, 1.2)))
    pulley = draw(st.floats(0.01, 0.025))
    taut = pulley * 0.5 / muscle.rest_length          # both muscles taut over stops at +-0.5 rad
    joint = JointParams(pulley_radius=pulley, pre_contraction=taut * draw(st.floats(1.05, 1.4)),
                        lower_stop=-0.5, upper_stop=0.5,
                        inertia=draw(st.floats(0.005, 0.1)), gravity_moment=draw(st.sampled_from([0.0, 0.3, 2.0])),
                        gravity_offset=draw(st.floats(-1.0, 1.0)), viscous_damping=draw(st.floats(0.0, 0.1)),
                        coulomb_torque=draw(st.floats(0.0, 0.2)))
    pn = PneumaticParams(supply_pressure=draw(st.floats(4e5, 8e5)), model=draw(st.sampled_from(["valve", "lag"])),
                         sonic_conductance=draw(st.floats(0.3e-8, 3e-8)), critical_ratio=draw(st.floats(0.15, 0.5)),
                         subsonic_index=draw(st.sampled_from([0.5, 0.7])),
                         valve_time_constant=draw(st.floats(0.001, 0.01)), valve_gain=draw(st.floats(1.0, 6.0)),
                         dead_volume=draw(st.floats(5e-6, 1e-4)), lag_time_constant=draw(st.floats(0.005, 0.05)))
    params = PlantParams(muscle, joint, pn)
    # angles that keep both muscles between slack and their end of contraction
    room = min(joint.pre_contraction, 0.8 * float(pack(params)[5]) - joint.pre_contraction)
    q_max = min(0.9 * room * muscle.rest_length / joint.pulley_radius, 0.45)   # clear of the stops
    # pressures clear of the bladder threshold and spools closed or clearly open: a law's kink
    # within the difference steps would make the numerical reference, not the partial, wrong
    p_low = muscle.threshold_pressure + 5e3

    def spool():
        return draw(st.sampled_from([-1.0, 1.0])) * draw(st.floats(0.01, 0.95)) if draw(st.booleans()) else 0.0

    x = [draw(st.floats(-q_max, q_max)), draw(st.floats(-15.0, 15.0)),
         draw(st.floats(p_low, 0.95 * pn.supply_pressure)), draw(st.floats(p_low, 0.95 * pn.supply_pressure)),
         spool(), spool()]
    if pn.model == "lag":
        x[4] = x[5] = 0.0
    u = [draw(st.floats(0.1e5, 0.95 * pn.supply_pressure)) for _ in range(2)]
    return params, np.array(x), np.array(u)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(_rig())
def test_plant_jacobian_over_the_ranges_of_real_rigs(rig):
    # Reference: scipy.differentiate.jacobian of rhs, as above, on random plants and states. An
    # entry whose numerical derivative changes between initial steps of 1e-4 and 1e-6 (a branch of a
    # law within the steps, e.g. the choked ratio) is not compared, and a point with more than a
    # fifth of such entries is skipped; every other entry must agree to 1e-5 of its row
    from hypothesis import assume

    params, x, u = rig
    jac, work = np.empty((N_STATE, 8)), np.empty(16)
    plant_jacobian(*x, *u, 0.0, 0.0, pack(params), jac, work)
    scale = np.array([1.0, 10.0, 1e5, 1e5, 1.0, 1.0, 1e5, 1e5])

    def f(z):
        zz = np.moveaxis(z, 0, -1) * scale
        return np.moveaxis(rhs(0.0, zz[..., :6], zz[..., 6:], params), -1, 0)

    z = np.concatenate([x, u]) / scale
    coarse = jacobian(f, z, initial_step=1e-4).df
    fine = jacobian(f, z, initial_step=1e-6).df
    size = np.max(np.abs(fine), axis=1, keepdims=True) + 1e-300
    smooth = np.abs(coarse - fine) <= 1e-6 * size        # no branch of a law within the steps
    assume(bool(np.mean(smooth) > 0.8))
    for i in range(N_STATE):
        row = smooth[i]
        np.testing.assert_allclose(jac[i][row] * scale[row], fine[i][row], rtol=1e-5, atol=1e-5 * float(size[i, 0]),
                                   err_msg=f"rate {i} of {params} at {x}, {u}")
