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
    (:func:`~muscle_sim.pneumatics.regulator_pressure_rate`).

    Every operation runs in the batched core's order (only constants of ``params`` are computed
    ahead, as the batched code computes them), so the two agree bit for bit except where libm and
    numpy round ``tanh``, ``sin`` or ``**`` differently in the last place. That matters: near
    equilibrium the chamber's valve-flow and volume-change terms nearly cancel, and regrouped
    products would show there as relative differences far above 1e-12. ``tests/test_scalar_path.py``
    holds the two together. Cached per (frozen, hashable) ``params``.
    """
    m, j, pn = params.muscle, params.joint, params.pneumatics
    rp, l0, eps0 = j.pulley_radius, m.rest_length, j.pre_contraction
    # muscle: braid cosine c = (1 - k eps) cos(alpha0) with eps clipped to [0, eps_max]
    eps_max = _muscle.max_contraction(m)
    k_end, cos0 = m.end_correction, math.cos(m.rest_braid_angle)
    c_last = (1.0 - k_end * eps_max) * cos0
    # (c, sin) of the rest shape, held while slack, and of the last shape, held past eps_max
    rest_shape = (cos0, math.sqrt(1.0 - cos0 * cos0))
    last_shape = (c_last, math.sqrt(1.0 - c_last * c_last))
    # area -dV/dL = pi D0^2 (3 c^2 - 1) / 4 [+ pi (D0 t (2 s - 1/s) - t^2) with a wall]
    d0, wall = m.neutral_diameter, m.wall_thickness
    area_ideal, d0_wall, wall_sq, has_wall = 0.25 * math.pi * d0 * d0, d0 * wall, wall * wall, wall > 0.0
    pi = math.pi
    # volume pi (D0 s - 2 t)^2 (l0 c / cos(alpha0)) / (4 k)
    quarter_pi, two_wall = 0.25 * math.pi, 2.0 * wall
    thr = m.threshold_pressure
    fric = m.braid_friction * math.pi * m.rest_radius ** 2      # mu pi r0^2
    fric_rate = m.friction_rate_scale
    has_fric = fric > 0.0
    force_scale = m.force_scale
    # joint
    inertia = j.total_inertia
    visc, coul, coul_rate = j.viscous_damping, j.coulomb_torque, j.coulomb_rate_scale
    grav, grav_off = j.gravity_moment, j.gravity_offset
    has_coul, has_grav = coul > 0.0, grav > 0.0
    lo_stop, hi_stop, k_stop, c_stop = j.lower_stop, j.upper_stop, j.stop_stiffness, j.stop_damping
    # pneumatics
    dead = pn.dead_volume
    lag = pn.model == "lag"
    supply, atm, max_rate = pn.supply_pressure, pn.atmosphere, pn.max_pressure_rate
    tau_lag, valve_gain, tau_v = pn.lag_time_constant, pn.valve_gain, pn.valve_time_constant
    supply_abs = supply + atm
    C, b, m_sub = pn.sonic_conductance, pn.critical_ratio, pn.subsonic_index
    one_b, sqrt_sub = 1.0 - b, m_sub == 0.5
    sqrt_to = LINEAR_FROM if sqrt_sub else -1.0        # ratios up to here: the sqrt ellipse inline
    x_lin = (LINEAR_FROM - b) / (1.0 - b)
    shape_lin = (1.0 - x_lin * x_lin) ** m_sub          # ISO 6358 shape where the straight line starts
    one_lin = 1.0 - LINEAR_FROM
    sqrt_t = math.sqrt(T0 / pn.temperature)
    rt = R_AIR * pn.temperature
    k_in, k_out, k_ch = pn.k_in, pn.k_out, pn.k_chamber
    sqrt, tanh, sin = math.sqrt, math.tanh, math.sin

    def shape_of(ratio):
        """ISO 6358 flow shape at pressure ratio ``p_down / p_up <= 1``."""
        if ratio <= b:
            return 1.0
        if ratio <= LINEAR_FROM:
            x = (ratio - b) / one_b
            return sqrt(1.0 - x * x) if sqrt_sub else (1.0 - x * x) ** m_sub
        return shape_lin * (1.0 - ratio) / one_lin

    def inflow(s, p_abs):
        """``R T k mdot``: the valve's part of ``V dp/dt`` through spool opening ``s`` (signed:
        > 0 to supply, < 0 to exhaust) at chamber pressure ``p_abs``, either way round."""
        if s > 0.0:
            up, down, filling = supply_abs, p_abs, True
        else:
            up, down, filling = p_abs, atm, False
        hi, lo, forward = (up, down, True) if up >= down else (down, up, False)
        q = C * abs(s) * RHO0 * hi * sqrt_t * shape_of(lo / hi)
        mdot = q if forward == filling else -q
        return rt * (k_in * mdot if mdot >= 0.0 else k_out * mdot)

    def f(q, qd, pa, pb, sa, sb, ua, ub):
        shift = rp * q / l0
        # braid friction's rate factor; tanh is odd, so muscle B (rate of the other sign) takes -th
        th = tanh(rp * qd / l0 / fric_rate) if has_fric else 0.0
        # ---- muscle A (contraction eps0 + shift): tension >= 0 with rate-signed friction, area
        eps = eps0 + shift
        if eps >= 0.0 and eps <= eps_max:
            c_a = (1.0 - k_end * eps) * cos0
            sin_a = sqrt(1.0 - c_a * c_a)
            area_a = area_ideal * (3.0 * c_a * c_a - 1.0)
            if has_wall:
                area_a = area_a + pi * (d0_wall * (2.0 * sin_a - 1.0 / sin_a) - wall_sq)
            if area_a > 0.0:
                if pa > thr:
                    p_net = pa - thr
                    fa = p_net * area_a
                    if has_fric:
                        fa = fa - fric * p_net * th
                        if fa < 0.0:
                            fa = 0.0
                else:
                    fa = 0.0
            else:
                area_a = fa = 0.0
        else:          # slack (rest shape) or past eps_max (last shape): no pull, no area
            area_a = fa = 0.0
            c_a, sin_a = rest_shape if eps < 0.0 else last_shape
        # ---- muscle B (contraction eps0 - shift, contraction rate of the opposite sign)
        eps = eps0 - shift
        if eps >= 0.0 and eps <= eps_max:
            c_b = (1.0 - k_end * eps) * cos0
            sin_b = sqrt(1.0 - c_b * c_b)
            area_b = area_ideal * (3.0 * c_b * c_b - 1.0)
            if has_wall:
                area_b = area_b + pi * (d0_wall * (2.0 * sin_b - 1.0 / sin_b) - wall_sq)
            if area_b > 0.0:
                if pb > thr:
                    p_net = pb - thr
                    fb = p_net * area_b
                    if has_fric:
                        fb = fb + fric * p_net * th
                        if fb < 0.0:
                            fb = 0.0
                else:
                    fb = 0.0
            else:
                area_b = fb = 0.0
        else:
            area_b = fb = 0.0
            c_b, sin_b = rest_shape if eps < 0.0 else last_shape
        fa, fb = force_scale * fa, force_scale * fb
        # ---- joint: muscles, viscous + smoothed Coulomb friction, gravity, Hunt-Crossley end
        # stops that never pull the paddle into the stop
        passive = visc * qd
        if has_coul:
            passive = passive + coul * tanh(qd / coul_rate)
        passive = -passive
        if has_grav:
            passive = passive - grav * sin(q + grav_off)
        torque = rp * (fa - fb) + passive
        if q > hi_stop:
            d = q - hi_stop
            tau = -k_stop * d - c_stop * d * qd
            if tau < 0.0:
                torque = torque + tau
        elif q < lo_stop:
            d = q - lo_stop
            tau = -k_stop * d - c_stop * -d * qd
            if tau > 0.0:
                torque = torque + tau
        qdd = torque / inertia
        # ---- chambers
        if lag:   # first-order regulator, command clipped to [0, supply], rate to max_rate
            target = 0.0 if ua < 0.0 else (supply if ua > supply else ua)
            dpa = (target - pa) / tau_lag
            dpa = max_rate if dpa > max_rate else (-max_rate if dpa < -max_rate else dpa)
            target = 0.0 if ub < 0.0 else (supply if ub > supply else ub)
            dpb = (target - pb) / tau_lag
            dpb = max_rate if dpb > max_rate else (-max_rate if dpb < -max_rate else dpb)
            return qd, qdd, dpa, dpb, 0.0, 0.0
        # spools: first-order lag towards the inner loop's opening gain (p_cmd - p) / 1 bar in [-1, 1]
        target = valve_gain * (ua - pa) / _BAR
        if target > 1.0:
            target = 1.0
        elif target < -1.0:
            target = -1.0
        dsa = (target - sa) / tau_v
        target = valve_gain * (ub - pb) / _BAR
        if target > 1.0:
            target = 1.0
        elif target < -1.0:
            target = -1.0
        dsb = (target - sb) / tau_v
        # chambers: dp/dt = (R T k mdot - k_ch p_abs dV/dt) / V with dV/dt = +-A r_p qd and
        # V = muscle + dead volume. The usual ISO 6358 flows (from supply, or to exhaust, choked or
        # on the sqrt ellipse) are written out; mdot = C |s| rho0 p_up sqrt(T0/T) shape
        vr = rp * qd
        p_abs = pa + atm
        dpa = -k_ch * p_abs * (area_a * vr)
        if sa > 0.0 and p_abs <= supply_abs:                 # filling
            ratio = p_abs / supply_abs
            if ratio <= b:
                dpa += rt * (k_in * (C * sa * RHO0 * supply_abs * sqrt_t))
            elif ratio <= sqrt_to:
                x = (ratio - b) / one_b
                dpa += rt * (k_in * (C * sa * RHO0 * supply_abs * sqrt_t * sqrt(1.0 - x * x)))
            else:
                dpa += inflow(sa, p_abs)
        elif sa < 0.0 and p_abs >= atm:                      # exhausting
            ratio = atm / p_abs
            if ratio <= b:
                dpa -= rt * (k_out * (C * -sa * RHO0 * p_abs * sqrt_t))
            elif ratio <= sqrt_to:
                x = (ratio - b) / one_b
                dpa -= rt * (k_out * (C * -sa * RHO0 * p_abs * sqrt_t * sqrt(1.0 - x * x)))
            else:
                dpa += inflow(sa, p_abs)
        elif sa != 0.0:
            dpa += inflow(sa, p_abs)
        di = d0 * sin_a - two_wall
        dpa = dpa / (quarter_pi * di * di * (l0 * c_a / cos0) / k_end + dead)
        p_abs = pb + atm
        dpb = k_ch * p_abs * (area_b * vr)               # dV/dt of B is -A r_p qd
        if sb > 0.0 and p_abs <= supply_abs:
            ratio = p_abs / supply_abs
            if ratio <= b:
                dpb += rt * (k_in * (C * sb * RHO0 * supply_abs * sqrt_t))
            elif ratio <= sqrt_to:
                x = (ratio - b) / one_b
                dpb += rt * (k_in * (C * sb * RHO0 * supply_abs * sqrt_t * sqrt(1.0 - x * x)))
            else:
                dpb += inflow(sb, p_abs)
        elif sb < 0.0 and p_abs >= atm:
            ratio = atm / p_abs
            if ratio <= b:
                dpb -= rt * (k_out * (C * -sb * RHO0 * p_abs * sqrt_t))
            elif ratio <= sqrt_to:
                x = (ratio - b) / one_b
                dpb -= rt * (k_out * (C * -sb * RHO0 * p_abs * sqrt_t * sqrt(1.0 - x * x)))
            else:
                dpb += inflow(sb, p_abs)
        elif sb != 0.0:
            dpb += inflow(sb, p_abs)
        di = d0 * sin_b - two_wall
        dpb = dpb / (quarter_pi * di * di * (l0 * c_b / cos0) / k_end + dead)
        return qd, qdd, dpa, dpb, dsa, dsb

    return f
