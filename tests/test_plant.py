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
from muscle_sim.params import JointParams, McKibbenParams, PneumaticParams
from muscle_sim.pneumatics import R_AIR, RHO0, iso6358_mass_flow, tube_delay

from conftest import strike_commands


def test_fixed_step_matches_solve_ivp_over_a_one_second_strike(demo_setup):
    # Reference: scipy.integrate.solve_ivp (DOP853, rtol 1e-10) on the same rhs with the same
    # piecewise-constant delayed commands. Tolerances (our fidelity goal, common practice for
    # control simulation at this step): 0.01 deg, 0.1 kPa.
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


@pytest.mark.parametrize("ratio, mass_flow", [(0.2, 7.110e-3), (0.65, 6.157e-3), (0.9, 3.662e-3)])
def test_iso6358_worked_values(ratio, mass_flow):
    # ISO 6358-1:2013 eq. (1)-(2) evaluated by hand with rho0 = 1.185 kg/m^3 (ISO 8778 ANR),
    # C = 1 dm^3/(s bar), b = 0.3, p1 = 6 bar absolute, T1 = T0: 7.110e-3 kg/s choked,
    # 6.157e-3 at p2/p1 = 0.65, 3.662e-3 at 0.9 (derived); tolerance 0.05 % (4 digits given)
    C = 1e-3 / 1e5
    assert float(iso6358_mass_flow(C, 0.3, 6e5, ratio * 6e5)) == pytest.approx(mass_flow, rel=5e-4)


def _locked_joint_plant(**pneumatics):
    """The demo muscles on a joint that cannot move (huge inertia), valve model."""
    m = McKibbenParams(rest_length=0.25, rest_radius=0.008, rest_braid_angle=math.radians(22.0))
    j = JointParams(pulley_radius=0.02, pre_contraction=0.08, inertia=1e12)
    return PlantParams(m, j, PneumaticParams(6e5, **pneumatics))


@pytest.mark.parametrize("p_gauge", [0.0, 0.5e5, 1.0e5])
def test_filling_a_fixed_volume_through_a_choked_valve(p_gauge):
    # Ideal-gas law for a fixed volume, d(pV) = R T dm (isothermal filling, k_in = 1): dp/dt =
    # R T mdot / V with mdot the ISO 6358-1 choked flow C rho0 p_supply,abs (p/p_supply <= b);
    # the plant's right-hand side with the spool wide open must give it. Tolerance 1e-12 relative.
    p = _locked_joint_plant(sonic_conductance=1e-8, critical_ratio=0.3, k_in=1.0)
    pn = p.pneumatics
    x = np.array([0.0, 0.0, p_gauge, p_gauge, 1.0, 1.0])
    dx = plant.rhs(0.0, x, np.array([6e5, 6e5]), p)
    vol = float(muscle.volume(p.muscle, p.joint.pre_contraction)) + pn.dead_volume
    assert (p_gauge + pn.atmosphere) / (pn.supply_pressure + pn.atmosphere) <= pn.critical_ratio + 0.01
    choked = 1e-8 * RHO0 * (pn.supply_pressure + pn.atmosphere)
    if (p_gauge + pn.atmosphere) / (pn.supply_pressure + pn.atmosphere) <= pn.critical_ratio:
        assert dx[2] == pytest.approx(R_AIR * pn.temperature * choked / vol, rel=1e-12)
    # the adiabatic charging coefficient k_in = 1.4 scales it (Richer & Hurmuzlu 2000, eq. 11)
    adiabatic = plant.rhs(0.0, x, np.array([6e5, 6e5]), PlantParams(p.muscle, p.joint, replace(pn, k_in=1.4)))
    assert adiabatic[2] == pytest.approx(1.4 * dx[2], rel=1e-12)


def test_closed_chamber_is_polytropic_under_volume_change(demo_setup):
    # Polytropic law (Richer & Hurmuzlu 2000, eq. 11 with no mass flow): a closed chamber keeps
    # P_abs V^k constant, k = k_chamber. The valves are shut (conductance 1e-30) and the joint
    # swings freely; solve_ivp (DOP853, rtol 1e-11) on the plant's rhs; tolerance 1e-7 relative.
    base = demo_setup.plant
    p = PlantParams(replace(base.muscle, braid_friction=0.0),
                    replace(base.joint, coulomb_torque=0.0),
                    replace(base.pneumatics, sonic_conductance=1e-30, delay=0.0))
    x0 = np.array([-0.3, 6.0, 3.0e5, 1.5e5, 0.0, 0.0])
    u = np.array([3.0e5, 1.5e5])
    sol = solve_ivp(lambda t, y: plant.rhs(t, y, u, p), (0.0, 0.08), x0, method="DOP853", rtol=1e-11,
                    atol=1e-9, t_eval=np.linspace(0.0, 0.08, 81))
    q = sol.y[0]
    assert np.ptp(q) > 0.1                                    # the volumes really change
    m, j, pn = p.muscle, p.joint, p.pneumatics
    for row, sign in ((2, 1.0), (3, -1.0)):
        vol = muscle.volume(m, j.pre_contraction + sign * j.pulley_radius * q / m.rest_length) + pn.dead_volume
        invariant = (sol.y[row] + pn.atmosphere) * vol ** pn.k_chamber
        assert np.max(np.abs(invariant / invariant[0] - 1.0)) < 1e-7
        assert np.ptp(sol.y[row]) > 1e3                       # and so do the pressures


def _bounce(speed, damping):
    """Free paddle (no pressure, no friction) thrown at the upper stop at ``speed``; returns
    (exit speed, peak penetration, torque just past first touch)."""
    m = McKibbenParams(rest_length=0.25, rest_radius=0.008, rest_braid_angle=math.radians(22.0))
    j = JointParams(pulley_radius=0.02, pre_contraction=0.08, inertia=0.02, upper_stop=0.5,
                    stop_stiffness=2000.0, stop_damping=damping)
    p = PlantParams(m, j, PneumaticParams(6e5, model="lag"))
    x0 = plant.initial_state(p, 0.5 - 1e-6, (0.0, 0.0))
    x0[1] = speed
    traj = simulate(p, x0, np.zeros((400, 2)), 1e-4, 4, u_before=(0.0, 0.0))
    back = np.nonzero((traj[:, 0] < 0.5) & (traj[:, 1] < 0))[0]
    return -traj[back[0], 1], traj[:, 0].max() - 0.5


def test_hunt_crossley_stop_is_continuous_and_dissipative():
    # Hunt & Crossley (1975): tau = -k d - lambda d qd is zero at first touch (continuous in d,
    # unlike a spring-damper), dissipates energy over a bounce (restitution < 1), and the
    # restitution falls as the impact speed rises (e ~ 1 - (2/3) lambda v / k for small v).
    touch = plant.rhs(0.0, np.array([0.5 + 1e-12, -8.0, 0, 0, 0, 0]), np.zeros(2),
                      PlantParams(McKibbenParams(0.25, 0.008, math.radians(22.0)),
                                  JointParams(0.02, 0.08, 0.02, upper_stop=0.5), PneumaticParams(6e5, model="lag")))
    assert abs(touch[1]) < 1e-6                               # N m / kg m^2: no jump at contact
    speeds = [0.5, 1.0, 2.0, 4.0]
    restitution = [_bounce(v, 50.0)[0] / v for v in speeds]
    assert all(0.0 < e < 1.0 for e in restitution)
    assert all(a > b for a, b in zip(restitution, restitution[1:]))
    # small-speed slope from the closed form (Hunt & Crossley 1975; derived for exponent 1 as
    # e = 1 - (2/3) lambda v / k to first order); tolerance 10 % of the loss
    assert 1.0 - restitution[0] == pytest.approx(2.0 / 3.0 * 50.0 * 0.5 / 2000.0, rel=0.1)
    # without damping the stop is elastic (energy returned, e = 1 within RK4 error 1e-4)
    assert _bounce(2.0, 0.0)[0] / 2.0 == pytest.approx(1.0, abs=1e-4)


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


def _bound_cases(demo_setup):
    demo = demo_setup.plant
    return [("demo valve", demo), ("prior lag", demo_setup.prior),
            ("valve, b = 0, m = 0.7", PlantParams(demo.muscle, demo.joint,
                                                  replace(demo.pneumatics, critical_ratio=0.0, subsonic_index=0.7))),
            ("lag, rate limit", PlantParams(demo.muscle, demo.joint,
                                            replace(demo.pneumatics, model="lag", max_pressure_rate=2e6)))]


def test_right_hand_side_keeps_pressures_between_atmosphere_and_supply(demo_setup):
    # Physics of the valve (ISO 6358: flow runs from the higher to the lower pressure) and of the
    # regulator: a chamber at or above supply cannot be driven higher, one at or below atmosphere
    # cannot be driven lower, whatever the command, spool or joint motion (common practice).
    rng = np.random.default_rng(0)
    for name, p in _bound_cases(demo_setup):
        supply = p.pneumatics.supply_pressure
        n = 400
        q = rng.uniform(-0.6, 0.6, n)
        qd = np.zeros(n)                      # at rest: the volume term is zero
        spool = rng.uniform(-1.0, 1.0, (n, 2))
        u = rng.uniform(-2e5, supply + 5e5, (n, 2))
        for level, sign in ((supply, -1.0), (supply + 2e3, -1.0), (0.0, 1.0), (-2e3, 1.0)):
            x = np.column_stack([q, qd, np.full(n, level), np.full(n, level), spool])
            dx = plant.rhs(0.0, x, u, p)
            assert np.all(sign * dx[:, 2:4] >= 0.0), (name, level)
            if level != supply and level != 0.0:  # strictly outside: pushed back inside where the valve is open
                open_ = np.abs(spool) > 1e-3 if p.pneumatics.model == "valve" else np.ones((n, 2), bool)
                assert np.all(sign * dx[:, 2:4][open_] > 0.0), (name, level)


def test_pressure_stays_between_atmosphere_and_supply_without_any_clamp():
    # The stepper does not clamp: with the joint held still (no compression of the chambers),
    # bang-bang commands beyond both ends keep the chambers inside [0, supply] by the law alone
    # (tolerance 1 Pa for the fixed-step error). A moving joint may compress a chamber above the
    # supply for a moment, as on a rig; the right-hand side test above covers that case's sign.
    p = _locked_joint_plant(delay=0.004)
    x0 = plant.initial_state(p, 0.0, (2e5, 2e5))
    extreme = np.where(np.arange(300)[:, None] % 50 < 25, [[9e5, -1e5]], [[-1e5, 9e5]])
    traj = simulate(p, x0, extreme, 0.002, 2, u_before=(2e5, 2e5))
    assert traj[:, 2:4].min() >= -1.0
    assert traj[:, 2:4].max() <= p.pneumatics.supply_pressure + 1.0
    assert traj[:, 2:4].max() > p.pneumatics.supply_pressure - 5e3     # it really reaches both ends
    assert traj[:, 2:4].min() < 0.7e5                                  # (exhaust slows near atmosphere)


def test_holding_pressures_hold_home(demo_setup):
    p, task = demo_setup.plant, demo_setup.task
    pa, pb = plant.holding_pressures(p, task.home_angle, task.home_pressure)
    assert min(pa, pb) == pytest.approx(task.home_pressure)
    assert float(plant.equilibrium_torque(p, task.home_angle, (pa, pb))) == pytest.approx(0.0, abs=1e-9)
