"""Plant fidelity: fixed-step RK4 against scipy's solve_ivp, ISO 6358 flow, statics and energy."""
import math
from dataclasses import replace

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.optimize import brentq

from muscle_sim import muscle, plant
from muscle_sim.errors import ParameterError, SimulationDiverged
from muscle_sim.integrate import Stepper, check_substeps, simulate, simulate_reference
from muscle_sim.params import PlantParams
from muscle_sim.pneumatics import RHO0, iso6358_mass_flow, iso6358_mass_flow_f, tube_delay

from conftest import strike_commands


def test_fixed_step_matches_solve_ivp_over_a_one_second_strike(demo_setup):
    # Reference: scipy.integrate.solve_ivp (DOP853, rtol 1e-10) on the same rhs with the same
    # piecewise-constant delayed commands. Tolerances from the design goal: 0.01 deg, 0.1 kPa.
    x0, hold, cmd = strike_commands(demo_setup, n_steps=500)
    task = demo_setup.task
    fixed = simulate(demo_setup.plant, x0, cmd, task.dt, task.n_substeps, u_before=hold)
    ref = simulate_reference(demo_setup.plant, x0, cmd, task.dt, task.n_substeps, u_before=hold, rtol=1e-10)
    assert np.degrees(fixed[:, 0]).max() > 15.0          # it is a real swing ...
    assert np.all(np.abs(fixed[:, 0]) < demo_setup.plant.joint.upper_stop)   # ... clear of the stops
    assert np.max(np.abs(np.degrees(fixed[:, 0] - ref[:, 0]))) < 0.01
    assert np.max(np.abs(fixed[:, 2:4] - ref[:, 2:4])) < 100.0


def test_iso6358_flow_is_continuous_at_the_critical_ratio_and_zero_at_equal_pressures():
    # ISO 6358: choked q = C rho0 p1 sqrt(T0/T1) for p2/p1 <= b; subsonic ellipse above; the two
    # meet at p2/p1 = b (tolerance 1e-9 relative). Zero flow at equal pressures (exact).
    C, b, p1 = 1.5e-8, 0.3, 7e5
    choked = C * RHO0 * p1
    assert float(iso6358_mass_flow(C, b, p1, 0.2 * p1)) == pytest.approx(choked, rel=1e-12)
    below = float(iso6358_mass_flow(C, b, p1, (b - 1e-9) * p1))
    above = float(iso6358_mass_flow(C, b, p1, (b + 1e-9) * p1))
    assert below == pytest.approx(above, rel=1e-6)
    assert float(iso6358_mass_flow(C, b, p1, p1)) == 0.0
    # subsonic value at p2/p1 = 0.65 from the ellipse (ISO 6358 eq.), tolerance 1e-12
    x = (0.65 - b) / (1 - b)
    assert float(iso6358_mass_flow(C, b, p1, 0.65 * p1)) == pytest.approx(choked * math.sqrt(1 - x * x), rel=1e-12)
    # continuous at the start of the linear branch and reversible
    r = np.linspace(0.99, 1.0, 2001)
    q = iso6358_mass_flow(C, b, p1, r * p1)
    assert np.max(np.abs(np.diff(q))) < 1e-3 * choked
    assert float(iso6358_mass_flow(C, b, 4e5, 5e5)) == -float(iso6358_mass_flow(C, b, 5e5, 4e5))
    for ratio in (0.1, 0.3, 0.5, 0.9, 0.9995):
        assert iso6358_mass_flow_f(C, b, p1, ratio * p1) == pytest.approx(float(iso6358_mass_flow(C, b, p1, ratio * p1)),
                                                                          rel=1e-12)


def test_tube_delay_is_length_over_speed_of_sound():
    # Derived: c = sqrt(1.4 * 287.05 * 293.15) = 343.2 m/s, about 2.9 ms per metre.
    assert tube_delay(1.0) == pytest.approx(1 / 343.2, rel=1e-3)


def test_static_equilibrium_matches_the_torque_balance(demo_setup):
    # Closed-form reference: the angle where r_p (F_a(q) - F_b(q)) = 0 from the muscle model,
    # found with scipy.optimize.brentq; the simulated joint (lag model holding the pressures,
    # no dry friction) must come to rest there (tolerance 0.01 deg).
    p = demo_setup.plant
    p = PlantParams(replace(p.muscle, braid_friction=0.0),
                    replace(p.joint, coulomb_torque=0.0, viscous_damping=0.3),
                    replace(p.pneumatics, model="lag", delay=0.0))
    pressures = (3.0e5, 2.2e5)
    q_star = brentq(lambda q: float(plant.equilibrium_torque(p, q, pressures)), -0.7, 0.7, xtol=1e-12)
    x0 = plant.initial_state(p, 0.0, pressures)
    traj = simulate(p, x0, np.tile(pressures, (2000, 1)), 0.002, 2, u_before=pressures)
    assert math.degrees(traj[-1, 0]) == pytest.approx(math.degrees(q_star), abs=0.01)
    assert abs(traj[-1, 1]) < 1e-4


def test_energy_balance_over_a_trial(demo_setup):
    # Energy conservation (first law for the joint): the gas's work on the muscles, integrated as
    # sum p_net dV from the VOLUME function along the trajectory, minus braid-friction, pivot and
    # stop dissipation, equals the change of kinetic energy; tolerance 1 % of the gas work.
    x0, hold, cmd = strike_commands(demo_setup, n_steps=400)
    p = demo_setup.plant
    task = demo_setup.task
    m, j = p.muscle, p.joint
    ts, xs = [], []
    x = x0.copy()
    for k, u in enumerate(cmd):
        n_delay = round(p.pneumatics.delay / task.dt)
        uk = cmd[k - n_delay] if k >= n_delay else hold
        sol = solve_ivp(lambda t, y: plant.rhs(t, y, uk, p), (k * task.dt, (k + 1) * task.dt), x,
                        method="DOP853", rtol=1e-10, atol=1e-9, dense_output=True)
        tt = np.linspace(k * task.dt, (k + 1) * task.dt, 21)[:-1]
        ts.append(tt)
        xs.append(sol.sol(tt).T)
        x = sol.y[:, -1]
    t = np.concatenate(ts)
    X = np.concatenate(xs)
    q, qd = X[:, 0], X[:, 1]
    eps_a, eps_b = j.pre_contraction + j.pulley_radius * q / m.rest_length, j.pre_contraction - j.pulley_radius * q / m.rest_length
    rate = j.pulley_radius * qd / m.rest_length

    def stieltjes(f, g):        # integral of f dg, trapezoid
        return float(np.sum(0.5 * (f[1:] + f[:-1]) * np.diff(g)))

    def integral(f):
        return float(np.sum(0.5 * (f[1:] + f[:-1]) * np.diff(t)))

    gas = sum(stieltjes(muscle.net_pressure(m, X[:, i]), muscle.volume(m, e)) for i, e in ((2, eps_a), (3, eps_b)))
    braid = integral(muscle.braid_friction_force(m, X[:, 2], rate) * rate
                     + muscle.braid_friction_force(m, X[:, 3], -rate) * (-rate)) * m.rest_length
    pivot = integral(-(j.viscous_damping * qd + j.coulomb_torque * np.tanh(qd / j.coulomb_rate_scale)) * qd)
    assert np.all(np.abs(q) < j.upper_stop)       # clear of the stops: they store nothing
    kinetic = 0.5 * j.total_inertia * (qd[-1] ** 2 - qd[0] ** 2)
    assert gas > 0.1                               # joules: a real swing
    assert kinetic == pytest.approx(gas - braid + pivot, abs=0.01 * gas)


def test_substeps_must_be_a_positive_integer():
    for bad in (0, 1.5, -2, True):
        with pytest.raises(ParameterError, match="n_substeps"):
            check_substeps(0.002, bad)


def test_divergence_raises_a_dedicated_error(demo_setup):
    p = demo_setup.plant
    p = PlantParams(p.muscle, replace(p.joint, inertia=1e-9, payload_inertia=0.0, stop_stiffness=0.0), p.pneumatics)
    stepper = Stepper(p, 0.002, 1)
    stepper.reset(plant.initial_state(p, 0.0, (5e5, 0.0)), (5e5, 0.0))
    with pytest.raises(SimulationDiverged):
        for _ in range(200):
            stepper.step((6e5, 0.0))


def test_pressure_never_leaves_atmosphere_to_supply(demo_setup):
    x0, hold, cmd = strike_commands(demo_setup, n_steps=300)
    extreme = np.where(np.arange(300)[:, None] % 50 < 25, [[6e5, 0.0]], [[0.0, 6e5]])
    traj = simulate(demo_setup.plant, x0, extreme, 0.002, 2, u_before=hold)
    assert traj[:, 2:4].min() >= 0.0
    assert traj[:, 2:4].max() <= demo_setup.plant.pneumatics.supply_pressure


def test_holding_pressures_hold_home(demo_setup):
    p, task = demo_setup.plant, demo_setup.task
    pa, pb = plant.holding_pressures(p, task.home_angle, task.home_pressure)
    assert min(pa, pb) == pytest.approx(task.home_pressure)
    assert float(plant.equilibrium_torque(p, task.home_angle, (pa, pb))) == pytest.approx(0.0, abs=1e-9)
