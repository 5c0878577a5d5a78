"""Valve mass flow (ISO 6358), chamber pressure dynamics, the spool, the regulator lag and tubes.

Each law is written once as a compiled function on floats (``@law``, called by the plant kernel)
with a numpy face that broadcasts. Pressures named ``*_abs`` are absolute; all others are gauge [Pa].
"""
from __future__ import annotations

import math

import numpy as np

from .compiled import broadcast, law

#: ISO 8778 standard reference atmosphere (ANR): density [kg/m^3] and temperature [K].
RHO0 = 1.185
T0 = 293.15
#: Specific gas constant of dry air [J/(kg K)] and its ratio of specific heats.
R_AIR = 287.05
GAMMA_AIR = 1.4
#: Pressure ratio above which the subsonic ellipse is replaced by a straight line to zero flow,
#: keeping the derivative finite at equal pressures (ISO 6358 itself has an infinite slope there).
LINEAR_FROM = 0.999
#: Pressure error that opens a proportional valve's spool by ``1 / valve_gain`` [Pa].
SPOOL_PRESSURE_UNIT = 1e5


@law
def iso6358_flow(conductance, critical_ratio, p_up_abs, p_down_abs, temperature, subsonic_index):
    """Mass flow [kg/s] from the upstream to the downstream port, ISO 6358-1:2013 eq. (1)-(2).

    Choked for ``p2/p1 <= b``: ``q = C rho0 p1 sqrt(T0/T1)``; subsonic:
    ``q = C rho0 p1 sqrt(T0/T1) (1 - ((p2/p1 - b)/(1 - b))^2)^m``, with ``m = 1/2`` in the 1989
    edition. For ``p2/p1 > 0.999`` the flow falls linearly to zero. Negative when the pressures are
    reversed (flow runs the other way with the roles of the ports swapped).
    """
    if p_up_abs >= p_down_abs:
        hi, lo, sign = p_up_abs, p_down_abs, 1.0
    else:
        hi, lo, sign = p_down_abs, p_up_abs, -1.0
    ratio = lo / hi
    if ratio <= critical_ratio:
        shape = 1.0
    elif ratio <= LINEAR_FROM:
        x = (ratio - critical_ratio) / (1.0 - critical_ratio)
        shape = math.sqrt(1.0 - x * x) if subsonic_index == 0.5 else (1.0 - x * x) ** subsonic_index
    else:
        x = (LINEAR_FROM - critical_ratio) / (1.0 - critical_ratio)
        ellipse = math.sqrt(1.0 - x * x) if subsonic_index == 0.5 else (1.0 - x * x) ** subsonic_index
        shape = ellipse * (1.0 - ratio) / (1.0 - LINEAR_FROM)
    return sign * conductance * RHO0 * hi * math.sqrt(T0 / temperature) * shape


@law
def chamber_rate(pressure, volume, volume_rate, mass_flow_in, temperature, atmosphere_abs, k_in, k_out,
                 k_chamber):
    """Rate of change of a chamber's gauge pressure [Pa/s] (Richer & Hurmuzlu 2000, Part I, eq. 11).

    ``dP/dt = (R T / V)(k_in mdot_in - k_out mdot_out) - k P_abs Vdot / V`` with polytropic
    coefficients for charging, discharging and the volume change (their set 1.4, 1, 1.2), the
    volume term on the ABSOLUTE pressure. ``mass_flow_in`` is the net flow into the chamber.
    """
    weighted = k_in * mass_flow_in if mass_flow_in >= 0.0 else k_out * mass_flow_in
    return (R_AIR * temperature * weighted - k_chamber * (pressure + atmosphere_abs) * volume_rate) / volume


@law
def valve_flow(spool, pressure, supply_pressure, atmosphere_abs, conductance, critical_ratio, temperature,
               subsonic_index):
    """Mass flow into a chamber [kg/s] through a 3/3 proportional valve whose spool opening
    ``spool`` in [-1, 1] connects it to the supply (> 0) or to the exhaust (< 0), never both; the
    opening scales the sonic conductance (ISO 6358 at each port, :func:`iso6358_flow`)."""
    if spool > 0.0:
        return iso6358_flow(conductance * spool, critical_ratio, supply_pressure + atmosphere_abs,
                            pressure + atmosphere_abs, temperature, subsonic_index)
    if spool < 0.0:
        return -iso6358_flow(-conductance * spool, critical_ratio, pressure + atmosphere_abs, atmosphere_abs,
                             temperature, subsonic_index)
    return 0.0


@law
def spool_rate(spool, pressure, command, valve_gain, time_constant):
    """Spool opening rate [1/s]: a first-order lag towards the inner loop's demand
    ``gain (p_cmd - p) / 1 bar`` limited to [-1, 1] (common practice for proportional pressure valves)."""
    target = valve_gain * (command - pressure) / SPOOL_PRESSURE_UNIT
    target = min(max(target, -1.0), 1.0)
    return (target - spool) / time_constant


@law
def regulator_rate(pressure, command, time_constant, supply_pressure, max_rate):
    """First-order proportional-regulator model ``tau dp/dt = p_cmd - p`` [Pa/s] (common practice),
    the command clipped to [0, supply] and the rate to ``max_rate``: the natural prior model."""
    target = min(max(command, 0.0), supply_pressure)
    rate = (target - pressure) / time_constant
    return min(max(rate, -max_rate), max_rate)


# ---- partial derivatives of the laws (the exact Jacobian the learner linearises the prior with) ---
@law
def iso6358_flow_partials(conductance, critical_ratio, p_up_abs, p_down_abs, temperature, subsonic_index):
    """:func:`iso6358_flow` ``q`` and ``(dq/dC, dq/dp_up, dq/dp_down)`` on the branch the law takes
    (derived from ISO 6358-1 eq. (1)-(2): ``q = C rho0 p1 sqrt(T0/T) f(p2/p1)``, so
    ``dq/dp1 = C rho0 sqrt(T0/T) (f - r f')`` and ``dq/dp2 = C rho0 sqrt(T0/T) f'``)."""
    if p_up_abs >= p_down_abs:
        hi, lo, sign = p_up_abs, p_down_abs, 1.0
    else:
        hi, lo, sign = p_down_abs, p_up_abs, -1.0
    ratio = lo / hi
    b = critical_ratio
    if ratio <= b:
        shape, slope = 1.0, 0.0
    elif ratio <= LINEAR_FROM:
        x = (ratio - b) / (1.0 - b)
        w = 1.0 - x * x
        shape = math.sqrt(w) if subsonic_index == 0.5 else w ** subsonic_index
        slope = -2.0 * subsonic_index * x * shape / w / (1.0 - b)
    else:
        x = (LINEAR_FROM - b) / (1.0 - b)
        ellipse = math.sqrt(1.0 - x * x) if subsonic_index == 0.5 else (1.0 - x * x) ** subsonic_index
        shape = ellipse * (1.0 - ratio) / (1.0 - LINEAR_FROM)
        slope = -ellipse / (1.0 - LINEAR_FROM)
    unit = sign * RHO0 * math.sqrt(T0 / temperature)
    d_hi = unit * conductance * (shape - ratio * slope)
    d_lo = unit * conductance * slope
    flow = iso6358_flow(conductance, critical_ratio, p_up_abs, p_down_abs, temperature, subsonic_index)
    if sign > 0.0:
        return flow, unit * hi * shape, d_hi, d_lo
    return flow, unit * hi * shape, d_lo, d_hi


@law
def valve_flow_partials(spool, pressure, supply_pressure, atmosphere_abs, conductance, critical_ratio,
                        temperature, subsonic_index):
    """:func:`valve_flow` and ``(dq/dspool, dq/dP)``. At a closed spool (the kink between the
    supply and exhaust ports) the spool slope is the mean of the two one-sided slopes, as a
    central difference across it gives."""
    flow = valve_flow(spool, pressure, supply_pressure, atmosphere_abs, conductance, critical_ratio, temperature,
                      subsonic_index)
    if spool != 0.0:
        if spool > 0.0:
            _, q_c, _, q_down = iso6358_flow_partials(conductance * spool, critical_ratio,
                                                      supply_pressure + atmosphere_abs, pressure + atmosphere_abs,
                                                      temperature, subsonic_index)
            return flow, q_c * conductance, q_down
        _, q_c, q_up, _ = iso6358_flow_partials(-conductance * spool, critical_ratio, pressure + atmosphere_abs,
                                                atmosphere_abs, temperature, subsonic_index)
        return flow, q_c * conductance, -q_up
    fill, vent = closed_spool_slopes(pressure, supply_pressure, atmosphere_abs, conductance, critical_ratio,
                                     temperature, subsonic_index)
    return flow, 0.5 * (fill + vent), 0.0


@law
def closed_spool_slopes(pressure, supply_pressure, atmosphere_abs, conductance, critical_ratio, temperature,
                        subsonic_index):
    """``dq/dspool`` [kg/s] of :func:`valve_flow` just past a closed spool toward the supply port
    and toward the exhaust port (the flow is linear in the opening on either side)."""
    _, fill, _, _ = iso6358_flow_partials(conductance, critical_ratio, supply_pressure + atmosphere_abs,
                                          pressure + atmosphere_abs, temperature, subsonic_index)
    _, vent, _, _ = iso6358_flow_partials(conductance, critical_ratio, pressure + atmosphere_abs, atmosphere_abs,
                                          temperature, subsonic_index)
    return fill * conductance, vent * conductance


@law
def chamber_rate_partials(pressure, volume, volume_rate, mass_flow_in, temperature, atmosphere_abs, k_in, k_out,
                          k_chamber):
    """:func:`chamber_rate` and ``(d/dP, d/dV, d/dVdot, d/dmdot)`` of it."""
    k = k_in if mass_flow_in >= 0.0 else k_out
    rate = chamber_rate(pressure, volume, volume_rate, mass_flow_in, temperature, atmosphere_abs, k_in, k_out,
                        k_chamber)
    return (rate, -k_chamber * volume_rate / volume, -rate / volume, -k_chamber * (pressure + atmosphere_abs) / volume,
            R_AIR * temperature * k / volume)


@law
def spool_rate_partials(spool, pressure, command, valve_gain, time_constant):
    """:func:`spool_rate` and ``(d/dspool, d/dP, d/dcommand)``; the demand has no slope where it
    is limited (at the limit itself, the slope from inside)."""
    target = valve_gain * (command - pressure) / SPOOL_PRESSURE_UNIT
    slope = valve_gain / SPOOL_PRESSURE_UNIT / time_constant if -1.0 <= target <= 1.0 else 0.0
    return spool_rate(spool, pressure, command, valve_gain, time_constant), -1.0 / time_constant, -slope, slope


@law
def regulator_rate_partials(pressure, command, time_constant, supply_pressure, max_rate):
    """:func:`regulator_rate` and ``(d/dP, d/dcommand)``; no slope where the rate or the command is
    limited (at a limit itself, the slope from inside: a command at the supply pressure, where the
    learner's and the planner's pressure box may end, still moves the pressure when lowered)."""
    rate = regulator_rate(pressure, command, time_constant, supply_pressure, max_rate)
    if not -max_rate < rate < max_rate:
        return rate, 0.0, 0.0
    return rate, -1.0 / time_constant, (1.0 / time_constant if 0.0 <= command <= supply_pressure else 0.0)


_flow_u = broadcast(iso6358_flow, 6)
_chamber_u = broadcast(chamber_rate, 9)
_regulator_u = broadcast(regulator_rate, 5)


def iso6358_mass_flow(conductance, critical_ratio, p_up_abs, p_down_abs, temperature=T0, subsonic_index=0.5):
    """:func:`iso6358_flow` over numpy arrays (broadcasting).

    Parameters
    ----------
    conductance : array_like
        Sonic conductance ``C`` [m^3/(s Pa)] (times the valve opening, if partly open).
    critical_ratio : float
        Critical pressure ratio ``b`` in [0, 1).
    p_up_abs, p_down_abs : array_like
        Absolute pressures at the two ports [Pa].
    temperature : float
        Upstream stagnation temperature [K].
    subsonic_index : float
        Exponent ``m`` of the subsonic ellipse.
    """
    return _flow_u(conductance, critical_ratio, p_up_abs, p_down_abs, temperature, subsonic_index)


def chamber_pressure_rate(pressure, volume, volume_rate, mass_flow_in, temperature=T0,
                          atmosphere_abs=101325.0, k_in=1.4, k_out=1.0, k_chamber=1.2):
    """:func:`chamber_rate` over numpy arrays (broadcasting)."""
    return _chamber_u(pressure, volume, volume_rate, mass_flow_in, temperature, atmosphere_abs, k_in, k_out,
                      k_chamber)


def regulator_pressure_rate(pressure, command, time_constant, supply_pressure, max_rate=math.inf):
    """:func:`regulator_rate` over numpy arrays (broadcasting)."""
    return _regulator_u(pressure, command, time_constant, supply_pressure, max_rate)


def tube_delay(tube_length, temperature=T0):
    """Transport delay of a pressure wave along a tube, ``L / c`` with ``c = sqrt(k R T)`` [s]
    (derived; 343.2 m/s at 293.15 K, about 2.9 ms per metre)."""
    return tube_length / math.sqrt(GAMMA_AIR * R_AIR * temperature)


def tube_volume(tube_length, bore):
    """Dead volume of a tube of inner diameter ``bore`` [m^3]."""
    return math.pi * bore * bore * tube_length / 4.0
