"""The coupled pneumatic–mechanical plant: state layout, packed parameters and the right-hand side.

State ``x = [angle, rate, p_a, p_b, spool_a, spool_b]`` (rad, rad/s, Pa gauge, Pa gauge, -, -);
input ``u = [p_cmd_a, p_cmd_b]`` [Pa gauge], the pressure commands as they reach the valves
(after the transport delay, which the integrator applies). :func:`plant_rate` is the compiled
right-hand side on floats that every path runs (single env, vector env, runs, learner, planner);
:func:`rhs` is its numpy face over a leading batch axis. Parameters travel into compiled code as
one float64 row built by :func:`pack`.
"""
from __future__ import annotations

import functools
import math

import numpy as np

from . import joint as _joint
from . import muscle as _muscle
from .compiled import law
from .joint import end_stop_partials, end_stop_torque, pivot_partials, pivot_torque
from .muscle import muscle_chamber, muscle_chamber_partials
from .params import PlantParams
from .pneumatics import (R_AIR, chamber_rate, chamber_rate_partials, closed_spool_slopes, regulator_rate,
                         regulator_rate_partials, spool_rate, spool_rate_partials, valve_flow, valve_flow_partials)

N_STATE = 6

# ---- packed parameter row: index of each constant -----------------------------------------------
(K_PULLEY, K_REST_LENGTH, K_PRE, K_END, K_COS0, K_EPS_MAX, K_D0, K_WALL, K_THRESHOLD, K_FRICTION,
 K_FRICTION_RATE, K_FORCE_SCALE, K_INERTIA, K_VISCOUS, K_COULOMB, K_COULOMB_RATE, K_GRAVITY,
 K_GRAVITY_OFFSET, K_LOWER_STOP, K_UPPER_STOP, K_STOP_K, K_STOP_C, K_LAG_MODEL, K_SUPPLY, K_ATM,
 K_TEMPERATURE, K_CONDUCTANCE, K_CRITICAL, K_SUBSONIC, K_VALVE_TAU, K_VALVE_GAIN, K_DEAD_VOLUME,
 K_K_IN, K_K_OUT, K_K_CHAMBER, K_LAG_TAU, K_MAX_RATE, K_SLIP_MODEL) = range(38)
N_PACKED = 38


@functools.lru_cache(maxsize=256)
def _packed(params: PlantParams) -> np.ndarray:
    m, j, pn = params.muscle, params.joint, params.pneumatics
    row = np.empty(N_PACKED)
    row[[K_PULLEY, K_REST_LENGTH, K_PRE]] = j.pulley_radius, m.rest_length, j.pre_contraction
    row[[K_END, K_COS0, K_EPS_MAX]] = m.end_correction, math.cos(m.rest_braid_angle), _muscle.max_contraction(m)
    row[[K_D0, K_WALL, K_THRESHOLD]] = m.neutral_diameter, m.wall_thickness, m.threshold_pressure
    row[[K_FRICTION, K_FRICTION_RATE]] = m.braid_friction * math.pi * m.rest_radius ** 2, m.friction_rate_scale
    row[K_FORCE_SCALE] = m.force_scale
    row[[K_INERTIA, K_VISCOUS, K_COULOMB, K_COULOMB_RATE]] = (j.total_inertia, j.viscous_damping,
                                                              j.coulomb_torque, j.coulomb_rate_scale)
    row[[K_GRAVITY, K_GRAVITY_OFFSET]] = j.gravity_moment, j.gravity_offset
    row[[K_LOWER_STOP, K_UPPER_STOP, K_STOP_K, K_STOP_C]] = (j.lower_stop, j.upper_stop, j.stop_stiffness,
                                                              j.stop_damping)
    row[[K_LAG_MODEL, K_SUPPLY, K_ATM, K_TEMPERATURE]] = (pn.model == "lag", pn.supply_pressure, pn.atmosphere,
                                                           pn.temperature)
    row[[K_CONDUCTANCE, K_CRITICAL, K_SUBSONIC]] = pn.sonic_conductance, pn.critical_ratio, pn.subsonic_index
    row[[K_VALVE_TAU, K_VALVE_GAIN, K_DEAD_VOLUME]] = pn.valve_time_constant, pn.valve_gain, pn.dead_volume
    row[[K_K_IN, K_K_OUT, K_K_CHAMBER]] = pn.k_in, pn.k_out, pn.k_chamber
    row[[K_LAG_TAU, K_MAX_RATE]] = pn.lag_time_constant, pn.max_pressure_rate
    row[K_SLIP_MODEL] = m.friction_model == "maxwell-slip"
    row.setflags(write=False)
    return row


def pack(params: PlantParams) -> np.ndarray:
    """The parameter row (read-only float64, cached per frozen ``params``) the kernel reads."""
    return _packed(params)


@law
def _muscle_terms(pressure, contraction, friction_factor, P):
    return muscle_chamber(pressure, contraction, friction_factor, P[K_END], P[K_COS0], P[K_EPS_MAX], P[K_D0],
                          P[K_WALL], P[K_REST_LENGTH], P[K_THRESHOLD], P[K_FRICTION], P[K_FORCE_SCALE])


@law
def _chamber(p, s, u, vol, vol_rate, P):
    """(dp/dt, ds/dt) of one muscle's chamber for either pneumatic model."""
    if P[K_LAG_MODEL] != 0.0:
        return regulator_rate(p, u, P[K_LAG_TAU], P[K_SUPPLY], P[K_MAX_RATE]), 0.0
    flow = valve_flow(s, p, P[K_SUPPLY], P[K_ATM], P[K_CONDUCTANCE], P[K_CRITICAL], P[K_TEMPERATURE],
                      P[K_SUBSONIC])
    dp = chamber_rate(p, vol + P[K_DEAD_VOLUME], vol_rate, flow, P[K_TEMPERATURE], P[K_ATM], P[K_K_IN],
                      P[K_K_OUT], P[K_K_CHAMBER])
    return dp, spool_rate(s, p, u, P[K_VALVE_GAIN], P[K_VALVE_TAU])


@law
def plant_rate(q, qd, pa, pb, sa, sb, ua, ub, slip_a, slip_b, P):
    """Time derivative of one state (6 floats) under commands ``ua, ub`` [Pa].

    Joint: ``J qdd = r_p (F_a - F_b) - c qd - tau_c tanh(qd/w) - m g l sin(q + q_g) + tau_stop``
    with muscle tensions from :func:`~muscle_sim.muscle.muscle_chamber`. Chambers: Richer &
    Hurmuzlu (2000) polytropic pressure dynamics with ISO 6358 valve flow, volume = muscle volume
    + dead volume, ``dV/dt = A r_p qd`` (A = -dV/dL of the muscle), or the first-order regulator
    model. Braid friction: the smooth tanh law, or (slip model) the Maxwell-slip elements' states
    ``slip_a, slip_b`` in [-1, 1] held over the sub-step.
    """
    rp, l0, eps0 = P[K_PULLEY], P[K_REST_LENGTH], P[K_PRE]
    shift = rp * q / l0
    if P[K_SLIP_MODEL] != 0.0:
        ga, gb = -slip_a, -slip_b
    elif P[K_FRICTION] > 0.0:
        ga = math.tanh(rp * qd / l0 / P[K_FRICTION_RATE])   # contraction rate of A; B's is opposite
        gb = -ga
    else:
        ga = gb = 0.0
    fa, area_a, vol_a = _muscle_terms(pa, eps0 + shift, ga, P)
    fb, area_b, vol_b = _muscle_terms(pb, eps0 - shift, gb, P)
    torque = rp * (fa - fb) + pivot_torque(q, qd, P[K_VISCOUS], P[K_COULOMB], P[K_COULOMB_RATE], P[K_GRAVITY],
                                           P[K_GRAVITY_OFFSET])
    torque += end_stop_torque(q, qd, P[K_LOWER_STOP], P[K_UPPER_STOP], P[K_STOP_K], P[K_STOP_C])
    v_rate = rp * qd
    dpa, dsa = _chamber(pa, sa, ua, vol_a, area_a * v_rate, P)
    dpb, dsb = _chamber(pb, sb, ub, vol_b, -area_b * v_rate, P)
    return qd, torque / P[K_INERTIA], dpa, dpb, dsa, dsb


@law
def _muscle_partials(pressure, contraction, friction_factor, P):
    return muscle_chamber_partials(pressure, contraction, friction_factor, P[K_END], P[K_COS0], P[K_EPS_MAX],
                                   P[K_D0], P[K_WALL], P[K_REST_LENGTH], P[K_THRESHOLD], P[K_FRICTION],
                                   P[K_FORCE_SCALE])


@law
def _chamber_partials(p, s, u, vol, vol_rate, P, row_p, row_s):
    """:func:`_chamber` with its partials: fills ``row_p`` with ``(d/dp, d/ds, d/du, d/dV,
    d/dVdot)`` of dp/dt and ``row_s`` with ``(d/dp, d/ds, d/du)`` of ds/dt; returns the rates."""
    if P[K_LAG_MODEL] != 0.0:
        dp, dp_p, dp_u = regulator_rate_partials(p, u, P[K_LAG_TAU], P[K_SUPPLY], P[K_MAX_RATE])
        row_p[0], row_p[1], row_p[2], row_p[3], row_p[4] = dp_p, 0.0, dp_u, 0.0, 0.0
        row_s[0], row_s[1], row_s[2] = 0.0, 0.0, 0.0
        return dp, 0.0
    flow, flow_s, flow_p = valve_flow_partials(s, p, P[K_SUPPLY], P[K_ATM], P[K_CONDUCTANCE], P[K_CRITICAL],
                                               P[K_TEMPERATURE], P[K_SUBSONIC])
    dp, c_p, c_v, c_vd, c_m = chamber_rate_partials(p, vol + P[K_DEAD_VOLUME], vol_rate, flow, P[K_TEMPERATURE],
                                                    P[K_ATM], P[K_K_IN], P[K_K_OUT], P[K_K_CHAMBER])
    if s != 0.0:
        spool_slope = c_m * flow_s
    else:
        # a closed spool: filling (charging coefficient k_in) on one side, venting (k_out) on the
        # other; the slope of dp/dt is the mean of its two one-sided slopes, as a central
        # difference across the closed position gives
        fill, vent = closed_spool_slopes(p, P[K_SUPPLY], P[K_ATM], P[K_CONDUCTANCE], P[K_CRITICAL],
                                         P[K_TEMPERATURE], P[K_SUBSONIC])
        heat = R_AIR * P[K_TEMPERATURE] / (vol + P[K_DEAD_VOLUME])
        spool_slope = 0.5 * heat * (P[K_K_IN] * fill + P[K_K_OUT] * vent)
    row_p[0], row_p[1], row_p[2], row_p[3], row_p[4] = c_p + c_m * flow_p, spool_slope, 0.0, c_v, c_vd
    ds, s_s, s_p, s_u = spool_rate_partials(s, p, u, P[K_VALVE_GAIN], P[K_VALVE_TAU])
    row_s[0], row_s[1], row_s[2] = s_p, s_s, s_u
    return dp, ds


@law
def plant_jacobian(q, qd, pa, pb, sa, sb, ua, ub, slip_a, slip_b, P, jac, work):
    """:func:`plant_rate` and its exact Jacobian: fills ``jac`` (6, 8) with the derivatives of the
    six rates with respect to ``(q, qd, p_a, p_b, s_a, s_b, u_a, u_b)`` (chain rule over the
    partials of each law; the Maxwell-slip engagements are held, as over a sub-step). ``work`` is
    scratch of at least 8 floats. Returns the rates."""
    rp, l0, eps0 = P[K_PULLEY], P[K_REST_LENGTH], P[K_PRE]
    shift = rp * q / l0
    e_q = rp / l0                                   # d eps_a / dq; eps_b has the opposite slope
    dga = 0.0
    if P[K_SLIP_MODEL] != 0.0:
        ga, gb = -slip_a, -slip_b
    elif P[K_FRICTION] > 0.0:
        ga = math.tanh(rp * qd / l0 / P[K_FRICTION_RATE])
        gb = -ga
        dga = (1.0 - ga * ga) * rp / l0 / P[K_FRICTION_RATE]
    else:
        ga = gb = 0.0
    fa, fa_p, fa_e, fa_g, area_a, area_a_e, vol_a, vol_a_e = _muscle_partials(pa, eps0 + shift, ga, P)
    fb, fb_p, fb_e, fb_g, area_b, area_b_e, vol_b, vol_b_e = _muscle_partials(pb, eps0 - shift, gb, P)
    pivot, pivot_q, pivot_qd = pivot_partials(q, qd, P[K_VISCOUS], P[K_COULOMB], P[K_COULOMB_RATE], P[K_GRAVITY],
                                              P[K_GRAVITY_OFFSET])
    stop, stop_q, stop_qd = end_stop_partials(q, qd, P[K_LOWER_STOP], P[K_UPPER_STOP], P[K_STOP_K], P[K_STOP_C])
    torque = rp * (fa - fb) + pivot + stop
    inv_j = 1.0 / P[K_INERTIA]
    for i in range(6):
        for k in range(8):
            jac[i, k] = 0.0
    jac[0, 1] = 1.0
    jac[1, 0] = (rp * e_q * (fa_e + fb_e) + pivot_q + stop_q) * inv_j
    jac[1, 1] = (rp * (fa_g + fb_g) * dga + pivot_qd + stop_qd) * inv_j      # dgb/dqd = -dga
    jac[1, 2] = rp * fa_p * inv_j
    jac[1, 3] = -rp * fb_p * inv_j
    v_rate = rp * qd
    row_p, row_s = work[0:5], work[5:8]
    dpa, dsa = _chamber_partials(pa, sa, ua, vol_a, area_a * v_rate, P, row_p, row_s)
    # muscle A: V(eps_a), Vdot = area_a(eps_a) r_p qd
    jac[2, 0] = row_p[3] * vol_a_e * e_q + row_p[4] * area_a_e * e_q * v_rate
    jac[2, 1] = row_p[4] * area_a * rp
    jac[2, 2], jac[2, 4], jac[2, 6] = row_p[0], row_p[1], row_p[2]
    jac[4, 2], jac[4, 4], jac[4, 6] = row_s[0], row_s[1], row_s[2]
    dpb, dsb = _chamber_partials(pb, sb, ub, vol_b, -area_b * v_rate, P, row_p, row_s)
    # muscle B: V(eps_b), Vdot = -area_b(eps_b) r_p qd, deps_b/dq = -e_q
    jac[3, 0] = -row_p[3] * vol_b_e * e_q + row_p[4] * area_b_e * e_q * v_rate
    jac[3, 1] = -row_p[4] * area_b * rp
    jac[3, 3], jac[3, 5], jac[3, 7] = row_p[0], row_p[1], row_p[2]
    jac[5, 3], jac[5, 5], jac[5, 7] = row_s[0], row_s[1], row_s[2]
    return qd, torque / P[K_INERTIA], dpa, dpb, dsa, dsb


@law
def _rates_into(x, u, P, out):
    for i in range(x.shape[0]):
        r = plant_rate(x[i, 0], x[i, 1], x[i, 2], x[i, 3], x[i, 4], x[i, 5], u[i, 0], u[i, 1], 0.0, 0.0, P)
        for k in range(N_STATE):
            out[i, k] = r[k]


def rhs(t, x, u, params: PlantParams):
    """Time derivative of the state (numpy face of :func:`plant_rate`, batched over leading axes)."""
    x = np.asarray(x, dtype=float)
    u = np.asarray(u, dtype=float)
    shape = np.broadcast_shapes(x.shape[:-1], u.shape[:-1])
    xs = np.ascontiguousarray(np.broadcast_to(x, shape + (N_STATE,))).reshape(-1, N_STATE)
    us = np.ascontiguousarray(np.broadcast_to(u, shape + (2,))).reshape(-1, 2)
    out = np.empty_like(xs)
    _rates_into(xs, us, pack(params), out)
    return out.reshape(shape + (N_STATE,))


def initial_state(params: PlantParams, angle: float = 0.0, pressures=(0.0, 0.0), batch: int | None = None):
    """A state at rest at ``angle`` with the given gauge ``pressures`` and closed spools."""
    x = np.array([angle, 0.0, pressures[0], pressures[1], 0.0, 0.0], dtype=float)
    return x if batch is None else np.tile(x, (batch, 1))


def muscle_forces(params: PlantParams, x):
    """Static tensions ``(F_a, F_b)`` of both muscles at state(s) ``x`` at rest [N]."""
    m, j = params.muscle, params.joint
    eps_a, eps_b = _joint.contractions(j, m.rest_length, x[..., 0])
    return _muscle.static_force(m, x[..., 2], eps_a), _muscle.static_force(m, x[..., 3], eps_b)


def equilibrium_torque(params: PlantParams, angle, pressures):
    """Static muscle torque ``r_p (F_a - F_b)`` at rest [N m] (no friction)."""
    x = np.zeros(np.broadcast_shapes(np.shape(angle), np.shape(pressures[0])) + (N_STATE,))
    x[..., 0] = angle
    x[..., 2] = pressures[0]
    x[..., 3] = pressures[1]
    fa, fb = muscle_forces(params, x)
    return params.joint.pulley_radius * (fa - fb)


def holding_pressures(params: PlantParams, angle: float, base_pressure: float):
    """Gauge pressures ``(p_a, p_b)`` that hold the joint at rest at ``angle`` [Pa]: the weaker
    side gets ``base_pressure``, the other what the static torque balance
    ``r_p (F_a - F_b) = m g l sin(q + q_g)`` needs (friction aside)."""
    m, j = params.muscle, params.joint
    eps_a, eps_b = _joint.contractions(j, m.rest_length, angle)
    scale = m.force_scale
    area_a = float(_muscle.effective_area(m, eps_a)) * scale
    area_b = float(_muscle.effective_area(m, eps_b)) * scale
    if area_a <= 0.0 or area_b <= 0.0:
        raise ValueError(f"angle: {angle:g} rad leaves a muscle slack or fully contracted; cannot hold it")
    load = j.gravity_moment * math.sin(angle + j.gravity_offset) / j.pulley_radius   # F_a - F_b needed
    thr = m.threshold_pressure
    base_net = max(base_pressure - thr, 0.0)
    f_b = base_net * area_b
    p_a = thr + (f_b + load) / area_a
    if p_a < base_pressure:   # muscle A is the weaker side: give B the base instead
        f_a = base_net * area_a
        return base_pressure, thr + max(f_a - load, 0.0) / area_b
    return p_a, base_pressure
