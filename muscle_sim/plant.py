"""The coupled pneumatic–mechanical plant: state layout and the pure right-hand side.

State ``x = [angle, rate, p_a, p_b, spool_a, spool_b]`` (rad, rad/s, Pa gauge, Pa gauge, -, -);
input ``u = [p_cmd_a, p_cmd_b]`` [Pa gauge], the pressure commands as they reach the valves
(after the transport delay, which the integrator applies). :func:`rhs` works on a leading batch
axis with numpy; :func:`rhs_f` is its Python-float twin for the single environment, tested to agree.
"""
from __future__ import annotations

import functools
import math

import numpy as np

from . import joint as _joint
from . import muscle as _muscle
from .pneumatics import (LINEAR_FROM, R_AIR, RHO0, T0, chamber_pressure_rate, iso6358_mass_flow,
                         regulator_pressure_rate)
from .params import PlantParams

STATE_NAMES = ("angle", "rate", "pressure_a", "pressure_b", "spool_a", "spool_b")
N_STATE = 6
_BAR = 1e5


def initial_state(params: PlantParams, angle: float = 0.0, pressures=(0.0, 0.0), batch: int | None = None):
    """A state at rest at ``angle`` with the given gauge ``pressures`` and closed spools."""
    x = np.array([angle, 0.0, pressures[0], pressures[1], 0.0, 0.0], dtype=float)
    return x if batch is None else np.tile(x, (batch, 1))


def _pressure_rates(params: PlantParams, p, s, u, vol, vol_rate):
    """(dp/dt, ds/dt) of one muscle's chamber for either pneumatic model (batched)."""
    pn = params.pneumatics
    if pn.model == "lag":
        return regulator_pressure_rate(p, u, pn.lag_time_constant, pn.supply_pressure,
                                       pn.max_pressure_rate), np.zeros_like(s)
    target = np.clip(pn.valve_gain * (u - p) / _BAR, -1.0, 1.0)
    ds = (target - s) / pn.valve_time_constant
    p_abs = p + pn.atmosphere
    # the spool connects the chamber to supply (s > 0) or to exhaust (s < 0), never both
    filling = s > 0.0
    upstream = np.where(filling, pn.supply_pressure + pn.atmosphere, p_abs)
    downstream = np.where(filling, p_abs, pn.atmosphere)
    flow = iso6358_mass_flow(pn.sonic_conductance * np.abs(s), pn.critical_ratio, upstream, downstream,
                             pn.temperature, pn.subsonic_index)
    dp = chamber_pressure_rate(p, vol, vol_rate, np.where(filling, flow, -flow), pn.temperature, pn.atmosphere,
                               pn.k_in, pn.k_out, pn.k_chamber)
    return dp, ds


def muscle_forces(params: PlantParams, x):
    """Tensions, pulling areas and chamber volumes of both muscles at state ``x`` (batched)."""
    m, j = params.muscle, params.joint
    q, qd = x[..., 0], x[..., 1]
    eps_a, eps_b = _joint.contractions(j, m.rest_length, q)
    eps_rate = j.pulley_radius * qd / m.rest_length
    fa, area_a, vol_a = _muscle.chamber_terms(m, x[..., 2], eps_a, eps_rate)
    fb, area_b, vol_b = _muscle.chamber_terms(m, x[..., 3], eps_b, -eps_rate)
    dead = params.pneumatics.dead_volume
    return (fa, fb), (area_a, area_b), (vol_a + dead, vol_b + dead)


def rhs(t, x, u, params: PlantParams):
    """Time derivative of the state (batched over leading axes).

    Joint: ``J qdd = r_p (F_a - F_b) - c qd - tau_c tanh(qd/w) - m g l sin(q + q_g) + tau_stop``
    with muscle tensions from :func:`muscle_sim.muscle.tension`. Chambers: Richer & Hurmuzlu
    (2000) polytropic pressure dynamics with ISO 6358 valve flow, volume = muscle volume + dead
    volume, ``dV/dt = A r_p qd`` (A = -dV/dL of the muscle), or the first-order regulator model.
    """
    x = np.asarray(x, dtype=float)
    u = np.asarray(u, dtype=float)
    j = params.joint
    q, qd = x[..., 0], x[..., 1]
    (fa, fb), (area_a, area_b), (vol_a, vol_b) = muscle_forces(params, x)
    torque = (j.pulley_radius * (fa - fb) + _joint.passive_torque(j, q, qd) + _joint.stop_torque(j, q, qd))
    out = np.empty(np.broadcast_shapes(x.shape, u.shape[:-1] + (N_STATE,)))
    out[..., 0] = qd
    out[..., 1] = torque / j.total_inertia
    v_rate = j.pulley_radius * qd
    out[..., 2], out[..., 4] = _pressure_rates(params, x[..., 2], x[..., 4], u[..., 0], vol_a, area_a * v_rate)
    out[..., 3], out[..., 5] = _pressure_rates(params, x[..., 3], x[..., 5], u[..., 1], vol_b, -area_b * v_rate)
    return out


def rhs_f(t: float, x, u, params: PlantParams) -> list:
    """Python-float twin of :func:`rhs` for one state (a sequence of 6 floats), through
    :func:`scalar_kernel`."""
    return list(scalar_kernel(params)(*x, u[0], u[1]))


def clamp_pressures(params: PlantParams, x):
    """Keep chamber pressures within [0, supply] gauge in place (a valve can never do more)."""
    np.clip(x[..., 2:4], 0.0, params.pneumatics.supply_pressure, out=x[..., 2:4])
    return x


def mechanical_power(params: PlantParams, x):
    """Power the muscles deliver to the joint, ``r_p (F_a - F_b) qd`` [W] (batched)."""
    (fa, fb), _, _ = muscle_forces(params, x)
    return params.joint.pulley_radius * (fa - fb) * x[..., 1]


def equilibrium_torque(params: PlantParams, angle, pressures):
    """Static muscle torque ``r_p (F_a - F_b)`` at rest [N m] (no friction)."""
    x = np.zeros(np.broadcast_shapes(np.shape(angle), np.shape(pressures[0])) + (N_STATE,))
    x[..., 0] = angle
    x[..., 2] = pressures[0]
    x[..., 3] = pressures[1]
    (fa, fb), _, _ = muscle_forces(params, x)
    return params.joint.pulley_radius * (fa - fb)




def holding_pressures(params: PlantParams, angle: float, base_pressure: float):
    """Gauge pressures ``(p_a, p_b)`` that hold the joint at rest at ``angle`` [Pa]: the weaker
    side gets ``base_pressure``, the other what the static torque balance
    ``r_p (F_a - F_b) = m g l sin(q + q_g)`` needs (friction aside)."""
    m, j = params.muscle, params.joint
    eps_a, eps_b = _joint.contractions(j, m.rest_length, angle)
    area_a = float(_muscle.effective_area(m, eps_a))
    area_b = float(_muscle.effective_area(m, eps_b))
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


@functools.lru_cache(maxsize=64)
def scalar_kernel(params: PlantParams):
    """The scalar right-hand side with every constant of ``params`` bound once: a function
    ``f(q, qd, pa, pb, sa, sb, ua, ub) -> 6-tuple``, the Python-float twin of :func:`rhs`.

    The same equations as the batched core, written out in one body for the single environment's
    speed: muscle :func:`~muscle_sim.muscle.chamber_terms` (Chou & Hannaford 1996 thick-wall area
    and volume, Tondu & Lopez 2000 end correction, Tondu 2012 braid friction), the joint's
    :func:`~muscle_sim.joint.passive_torque` and Hunt-Crossley :func:`~muscle_sim.joint.stop_torque`,
    ISO 6358 valve flow (:func:`~muscle_sim.pneumatics.iso6358_mass_flow`, skipped while a spool is
    exactly closed) into the Richer & Hurmuzlu (2000) chamber
    (:func:`~muscle_sim.pneumatics.chamber_pressure_rate`), or the regulator lag
    (:func:`~muscle_sim.pneumatics.regulator_pressure_rate`). Products of constants are folded
    once here, so results differ from :func:`rhs` by rounding only; ``tests/test_scalar_path.py``
    holds the two together to 1e-12. Cached per (frozen, hashable) ``params``.
    """
    m, j, pn = params.muscle, params.joint, params.pneumatics
    rp = j.pulley_radius
    per_rad = rp / m.rest_length                       # contraction per radian of joint angle
    eps0 = j.pre_contraction
    # muscle: braid cosine c = (1 - k eps) cos(alpha0), eps = eps0 +- per_rad q clipped to [0, eps_max]
    eps_max = _muscle.max_contraction(m)
    k_end, cos0 = m.end_correction, math.cos(m.rest_braid_angle)
    c_mid, c_per_rad = (1.0 - k_end * eps0) * cos0, k_end * cos0 * per_rad   # c = c_mid -+ c_per_rad q
    c_last = (1.0 - k_end * eps_max) * cos0
    # (c, c^2, sin) of the rest shape, held while slack, and of the last, held past eps_max
    rest_shape = (cos0, cos0 * cos0, math.sqrt(1.0 - cos0 * cos0))
    last_shape = (c_last, c_last * c_last, math.sqrt(1.0 - c_last * c_last))
    # joint angles where muscle A (eps0 + per_rad q) and B (eps0 - per_rad q) are taut and pulling
    q_taut_a, q_full_a = -eps0 / per_rad, (eps_max - eps0) / per_rad
    q_taut_b, q_full_b = eps0 / per_rad, -(eps_max - eps0) / per_rad
    d0, wall = m.neutral_diameter, m.wall_thickness
    # area -dV/dL = pi D0^2 (3 c^2 - 1) / 4 + pi (D0 t (2 s - 1/s) - t^2) = a3 c^2 + w2 s - w1/s - a0
    # (w1 = w2 = 0 without a wall: exactly the ideal area)
    a3 = 3.0 * 0.25 * math.pi * d0 * d0
    w2, w1 = 2.0 * math.pi * d0 * wall, math.pi * d0 * wall
    a0 = 0.25 * math.pi * d0 * d0 + math.pi * wall * wall
    # volume pi (D0 s - 2 t)^2 l0 c / (4 k cos(alpha0)) = c (v0 - v2 c^2 - v1 s), s^2 = 1 - c^2
    vol_scale = 0.25 * math.pi * m.rest_length / (cos0 * k_end)
    v0, v2, v1 = vol_scale * (d0 * d0 + 4.0 * wall * wall), vol_scale * d0 * d0, vol_scale * 4.0 * d0 * wall
    thr = m.threshold_pressure
    fric = m.braid_friction * math.pi * m.rest_radius ** 2      # mu pi r0^2
    fric_per_rate = per_rad / m.friction_rate_scale             # tanh argument per rad/s
    has_fric = fric > 0.0
    # joint, every torque divided by the inertia
    inv_j = 1.0 / j.total_inertia
    rp_j, visc_j = rp * inv_j, j.viscous_damping * inv_j
    coul_j, grav_j, grav_off = j.coulomb_torque * inv_j, j.gravity_moment * inv_j, j.gravity_offset
    inv_coul_rate = 1.0 / j.coulomb_rate_scale
    has_coul, has_grav = coul_j > 0.0, grav_j > 0.0
    lo_stop, hi_stop = j.lower_stop, j.upper_stop
    k_stop_j, c_stop_j = j.stop_stiffness * inv_j, j.stop_damping * inv_j
    # pneumatics
    dead = pn.dead_volume
    lag = pn.model == "lag"
    supply, atm, max_rate = pn.supply_pressure, pn.atmosphere, pn.max_pressure_rate
    inv_tau_lag = 1.0 / pn.lag_time_constant
    gain, inv_tau_v = pn.valve_gain / _BAR, 1.0 / pn.valve_time_constant
    supply_abs = supply + atm
    inv_supply_abs = 1.0 / supply_abs
    b, m_sub = pn.critical_ratio, pn.subsonic_index
    inv_one_b = 1.0 / (1.0 - b)
    x_lin = (LINEAR_FROM - b) / (1.0 - b)
    lin_slope = (1.0 - x_lin * x_lin) ** m_sub / (1.0 - LINEAR_FROM)   # shape = slope (1 - ratio)
    # ISO 6358 regimes as chamber pressures: filling (ratio p / p_supply) is choked up to fill_choked,
    # exhausting (ratio p_atm / p) from exhaust_choked; the sqrt ellipse (m = 1/2) is written out
    # up to ratio LINEAR_FROM, with x = (ratio - b) / (1 - b) = fill_x p - b_x or exhaust_x / p - b_x
    sqrt_to = LINEAR_FROM if m_sub == 0.5 else b
    fill_choked, fill_sqrt_to = b * supply_abs, sqrt_to * supply_abs
    exhaust_choked = atm / b if b > 0.0 else math.inf
    exhaust_sqrt_from = atm / sqrt_to if sqrt_to > 0.0 else math.inf
    fill_x, exhaust_x, b_x = inv_supply_abs * inv_one_b, atm * inv_one_b, b * inv_one_b
    # mdot = C |s| rho0 p_up sqrt(T0/T) shape; times R T k_in or k_out (Richer & Hurmuzlu) it is
    # the flow's part of V dp/dt: filling from supply (k_in), exhausting (k_out)
    flow = pn.sonic_conductance * RHO0 * math.sqrt(T0 / pn.temperature)
    rt = R_AIR * pn.temperature
    k_in, k_out, k_ch = pn.k_in, pn.k_out, pn.k_chamber
    k_ch_rp = k_ch * rp
    fill_gain = rt * k_in * flow * supply_abs
    exhaust_gain = rt * k_out * flow
    sqrt, tanh, sin = math.sqrt, math.tanh, math.sin

    def shape_of(ratio):
        """ISO 6358 flow shape at pressure ratio ``p_down / p_up <= 1``."""
        if ratio <= b:
            return 1.0
        if ratio <= LINEAR_FROM:
            x = (ratio - b) * inv_one_b
            return (1.0 - x * x) ** m_sub
        return lin_slope * (1.0 - ratio)

    def reverse_inflow(s, p_abs):
        """``R T k mdot`` into the chamber when the pressures run against the open spool ``s``
        (chamber above supply while filling, below atmosphere while exhausting): the ports swap
        roles and the flow runs backwards. Only inside RK4 stages, so kept out of line."""
        up, down = (supply_abs, p_abs) if s > 0.0 else (p_abs, atm)
        hi, lo = (down, up) if up < down else (up, down)
        sign = (1.0 if s > 0.0 else -1.0) * (1.0 if up >= down else -1.0)
        mdot = sign * flow * abs(s) * hi * shape_of(lo / hi)
        return rt * (k_in * mdot if mdot >= 0.0 else k_out * mdot)

    def f(q, qd, pa, pb, sa, sb, ua, ub):
        dc = c_per_rad * q
        friction = fric * tanh(qd * fric_per_rate) if has_fric else 0.0   # braid, per unit pressure
        # ---- muscle A (contraction eps0 + per_rad q): tension >= 0 with rate-signed friction, area
        if q >= q_taut_a and q <= q_full_a:
            c_a = c_mid - dc
            cc_a = c_a * c_a
            sin_a = sqrt(1.0 - cc_a)
            area_a = a3 * cc_a + w2 * sin_a - w1 / sin_a - a0
            if area_a > 0.0:
                fa = (pa - thr) * (area_a - friction) if pa > thr else 0.0
                if fa < 0.0:
                    fa = 0.0
            else:
                area_a = fa = 0.0
        else:          # slack (rest shape) or past eps_max (last shape): no pull, no area
            area_a = fa = 0.0
            c_a, cc_a, sin_a = rest_shape if q < q_taut_a else last_shape
        # ---- muscle B (contraction eps0 - per_rad q, contraction rate of the opposite sign)
        if q <= q_taut_b and q >= q_full_b:
            c_b = c_mid + dc
            cc_b = c_b * c_b
            sin_b = sqrt(1.0 - cc_b)
            area_b = a3 * cc_b + w2 * sin_b - w1 / sin_b - a0
            if area_b > 0.0:
                fb = (pb - thr) * (area_b + friction) if pb > thr else 0.0
                if fb < 0.0:
                    fb = 0.0
            else:
                area_b = fb = 0.0
        else:
            area_b = fb = 0.0
            c_b, cc_b, sin_b = rest_shape if q > q_taut_b else last_shape
        # ---- joint (per unit inertia): muscles, viscous + smoothed Coulomb friction, gravity,
        # Hunt-Crossley end stops that never pull into the stop
        qdd = rp_j * (fa - fb) - visc_j * qd
        if has_coul:
            qdd -= coul_j * tanh(qd * inv_coul_rate)
        if has_grav:
            qdd -= grav_j * sin(q + grav_off)
        if q > hi_stop:
            d = q - hi_stop
            tau = -k_stop_j * d - c_stop_j * d * qd
            if tau < 0.0:
                qdd += tau
        elif q < lo_stop:
            d = lo_stop - q
            tau = k_stop_j * d - c_stop_j * d * qd
            if tau > 0.0:
                qdd += tau
        # ---- chambers
        if lag:   # first-order regulator, command clipped to [0, supply], rate to max_rate
            target = 0.0 if ua < 0.0 else (supply if ua > supply else ua)
            dpa = (target - pa) * inv_tau_lag
            dpa = max_rate if dpa > max_rate else (-max_rate if dpa < -max_rate else dpa)
            target = 0.0 if ub < 0.0 else (supply if ub > supply else ub)
            dpb = (target - pb) * inv_tau_lag
            dpb = max_rate if dpb > max_rate else (-max_rate if dpb < -max_rate else dpb)
            return qd, qdd, dpa, dpb, 0.0, 0.0
        # spools: first-order lag towards the inner loop's opening gain (p_cmd - p) / 1 bar in [-1, 1]
        target = gain * (ua - pa)
        if target > 1.0:
            target = 1.0
        elif target < -1.0:
            target = -1.0
        dsa = (target - sa) * inv_tau_v
        target = gain * (ub - pb)
        if target > 1.0:
            target = 1.0
        elif target < -1.0:
            target = -1.0
        dsb = (target - sb) * inv_tau_v
        # chambers: dp/dt = (R T k mdot - k_ch p_abs dV/dt) / V with V = muscle + dead volume and
        # dV/dt = +-A r_p qd; the usual (forward) ISO 6358 flows written out, the rest out of line
        kv = k_ch_rp * qd
        p_abs = pa + atm
        dpa = -kv * area_a * p_abs
        if sa > 0.0:                                   # open to supply
            if p_abs <= fill_choked:
                dpa += sa * fill_gain
            elif p_abs <= fill_sqrt_to:
                x = fill_x * p_abs - b_x
                dpa += sa * fill_gain * sqrt(1.0 - x * x)
            elif p_abs <= supply_abs:
                dpa += sa * fill_gain * shape_of(p_abs * inv_supply_abs)
            else:
                dpa += reverse_inflow(sa, p_abs)
        elif sa < 0.0:                                 # open to exhaust
            if p_abs >= exhaust_choked:
                dpa += sa * exhaust_gain * p_abs
            elif p_abs >= exhaust_sqrt_from:
                x = exhaust_x / p_abs - b_x
                dpa += sa * exhaust_gain * p_abs * sqrt(1.0 - x * x)
            elif p_abs >= atm:
                dpa += sa * exhaust_gain * p_abs * shape_of(atm / p_abs)
            else:
                dpa += reverse_inflow(sa, p_abs)
        dpa /= c_a * (v0 - v2 * cc_a - v1 * sin_a) + dead
        p_abs = pb + atm
        dpb = kv * area_b * p_abs
        if sb > 0.0:
            if p_abs <= fill_choked:
                dpb += sb * fill_gain
            elif p_abs <= fill_sqrt_to:
                x = fill_x * p_abs - b_x
                dpb += sb * fill_gain * sqrt(1.0 - x * x)
            elif p_abs <= supply_abs:
                dpb += sb * fill_gain * shape_of(p_abs * inv_supply_abs)
            else:
                dpb += reverse_inflow(sb, p_abs)
        elif sb < 0.0:
            if p_abs >= exhaust_choked:
                dpb += sb * exhaust_gain * p_abs
            elif p_abs >= exhaust_sqrt_from:
                x = exhaust_x / p_abs - b_x
                dpb += sb * exhaust_gain * p_abs * sqrt(1.0 - x * x)
            elif p_abs >= atm:
                dpb += sb * exhaust_gain * p_abs * shape_of(atm / p_abs)
            else:
                dpb += reverse_inflow(sb, p_abs)
        dpb /= c_b * (v0 - v2 * cc_b - v1 * sin_b) + dead
        return qd, qdd, dpa, dpb, dsa, dsb

    return f
