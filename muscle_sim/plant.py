"""The coupled pneumatic–mechanical plant: state layout and the pure right-hand side.

State ``x = [angle, rate, p_a, p_b, spool_a, spool_b]`` (rad, rad/s, Pa gauge, Pa gauge, -, -);
input ``u = [p_cmd_a, p_cmd_b]`` [Pa gauge], the pressure commands as they reach the valves
(after the transport delay, which the integrator applies). :func:`rhs` works on a leading batch
axis with numpy; :func:`rhs_f` is its Python-float twin for the single environment, tested to agree.
"""
from __future__ import annotations

import math

import numpy as np

from . import joint as _joint
from . import muscle as _muscle
from .pneumatics import (chamber_pressure_rate, iso6358_mass_flow, iso6358_mass_flow_f,
                         regulator_pressure_rate, R_AIR)
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
    fill = iso6358_mass_flow(pn.sonic_conductance * np.maximum(s, 0.0), pn.critical_ratio,
                             pn.supply_pressure + pn.atmosphere, p_abs, pn.temperature, pn.subsonic_index)
    vent = iso6358_mass_flow(pn.sonic_conductance * np.maximum(-s, 0.0), pn.critical_ratio,
                             p_abs, pn.atmosphere, pn.temperature, pn.subsonic_index)
    dp = chamber_pressure_rate(p, vol, vol_rate, fill - vent, pn.temperature, pn.atmosphere,
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


def _pressure_rates_f(params: PlantParams, p: float, s: float, u: float, vol: float, vol_rate: float):
    pn = params.pneumatics
    if pn.model == "lag":
        target = min(max(u, 0.0), pn.supply_pressure)
        dp = (target - p) / pn.lag_time_constant
        return min(max(dp, -pn.max_pressure_rate), pn.max_pressure_rate), 0.0
    target = min(max(pn.valve_gain * (u - p) / _BAR, -1.0), 1.0)
    ds = (target - s) / pn.valve_time_constant
    p_abs = p + pn.atmosphere
    mdot = 0.0
    if s > 0.0:
        mdot = iso6358_mass_flow_f(pn.sonic_conductance * s, pn.critical_ratio, pn.supply_pressure + pn.atmosphere,
                                   p_abs, pn.temperature, pn.subsonic_index)
    elif s < 0.0:
        mdot = -iso6358_mass_flow_f(-pn.sonic_conductance * s, pn.critical_ratio, p_abs, pn.atmosphere,
                                    pn.temperature, pn.subsonic_index)
    weighted = pn.k_in * mdot if mdot >= 0.0 else pn.k_out * mdot
    dp = (R_AIR * pn.temperature * weighted - pn.k_chamber * p_abs * vol_rate) / vol
    return dp, ds


def rhs_f(t: float, x, u, params: PlantParams) -> list:
    """Python-float twin of :func:`rhs` for one state (a sequence of 6 floats)."""
    m, j = params.muscle, params.joint
    q, qd, pa, pb, sa, sb = x
    shift = j.pulley_radius * q / m.rest_length
    eps_rate = j.pulley_radius * qd / m.rest_length
    fa, area_a, vol_a = _muscle.chamber_terms_f(m, pa, j.pre_contraction + shift, eps_rate)
    fb, area_b, vol_b = _muscle.chamber_terms_f(m, pb, j.pre_contraction - shift, -eps_rate)
    torque = j.pulley_radius * (fa - fb) + _joint.passive_torque_f(j, q, qd) + _joint.stop_torque_f(j, q, qd)
    dead = params.pneumatics.dead_volume
    v_rate = j.pulley_radius * qd
    dpa, dsa = _pressure_rates_f(params, pa, sa, u[0], vol_a + dead, area_a * v_rate)
    dpb, dsb = _pressure_rates_f(params, pb, sb, u[1], vol_b + dead, -area_b * v_rate)
    return [qd, torque / j.total_inertia, dpa, dpb, dsa, dsb]


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
