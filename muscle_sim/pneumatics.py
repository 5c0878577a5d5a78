"""Valve mass flow (ISO 6358), chamber pressure dynamics and the first-order regulator model.

Pure functions on numpy arrays (broadcasting) and their Python-float twins for the scalar fast
path (suffix ``_f``). Pressures named ``*_abs`` are absolute; all others are gauge [Pa].
"""
from __future__ import annotations

import math

import numpy as np

#: ISO 8778 standard reference atmosphere (ANR): density [kg/m^3] and temperature [K].
RHO0 = 1.185
T0 = 293.15
#: Specific gas constant of dry air [J/(kg K)] and its ratio of specific heats.
R_AIR = 287.05
GAMMA_AIR = 1.4
#: Pressure ratio above which the subsonic ellipse is replaced by a straight line to zero flow,
#: keeping the derivative finite at equal pressures (ISO 6358 itself has an infinite slope there).
LINEAR_FROM = 0.999


def iso6358_mass_flow(conductance, critical_ratio, p_up_abs, p_down_abs, temperature=T0,
                      subsonic_index=0.5):
    """Mass flow [kg/s] from the upstream to the downstream port, ISO 6358 (-1:2013).

    Choked for ``p2/p1 <= b``: ``q = C rho0 p1 sqrt(T0/T1)``; subsonic:
    ``q = C rho0 p1 sqrt(T0/T1) (1 - ((p2/p1 - b)/(1 - b))^2)^m``, with ``m = 1/2`` in the 1989
    edition. For ``p2/p1 > 0.999`` the flow falls linearly to zero. Negative when the pressures are
    reversed (flow runs the other way with the roles of the ports swapped).

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
    p1 = np.asarray(p_up_abs, dtype=float)
    p2 = np.asarray(p_down_abs, dtype=float)
    forward = p1 >= p2
    hi = np.where(forward, p1, p2)
    lo = np.where(forward, p2, p1)
    ratio = lo / hi
    x_lin = (LINEAR_FROM - critical_ratio) / (1.0 - critical_ratio)
    shape_lin = (1.0 - x_lin * x_lin) ** subsonic_index
    x = np.clip((ratio - critical_ratio) / (1.0 - critical_ratio), 0.0, x_lin)
    ellipse = 1.0 - x * x
    ellipse = np.sqrt(ellipse) if subsonic_index == 0.5 else ellipse ** subsonic_index
    shape = np.where(ratio <= LINEAR_FROM, ellipse, shape_lin * (1.0 - ratio) / (1.0 - LINEAR_FROM))
    q = conductance * RHO0 * hi * math.sqrt(T0 / temperature) * shape
    return np.where(forward, q, -q)


def iso6358_mass_flow_f(conductance: float, critical_ratio: float, p_up_abs: float, p_down_abs: float,
                        temperature: float = T0, subsonic_index: float = 0.5) -> float:
    """Python-float twin of :func:`iso6358_mass_flow` (same equations, for the scalar fast path)."""
    if p_up_abs >= p_down_abs:
        hi, lo, sign = p_up_abs, p_down_abs, 1.0
    else:
        hi, lo, sign = p_down_abs, p_up_abs, -1.0
    ratio = lo / hi
    if ratio <= critical_ratio:
        shape = 1.0
    elif ratio <= LINEAR_FROM:
        x = (ratio - critical_ratio) / (1.0 - critical_ratio)
        shape = (1.0 - x * x) ** subsonic_index
    else:
        x_lin = (LINEAR_FROM - critical_ratio) / (1.0 - critical_ratio)
        shape = (1.0 - x_lin * x_lin) ** subsonic_index * (1.0 - ratio) / (1.0 - LINEAR_FROM)
    return sign * conductance * RHO0 * hi * math.sqrt(T0 / temperature) * shape


def chamber_pressure_rate(pressure, volume, volume_rate, mass_flow_in, temperature=T0,
                          atmosphere_abs=101325.0, k_in=1.4, k_out=1.0, k_chamber=1.2):
    """Rate of change of a chamber's gauge pressure [Pa/s] (Richer & Hurmuzlu 2000, Part I).

    ``dP/dt = (R T / V)(k_in mdot_in - k_out mdot_out) - k P_abs Vdot / V`` with polytropic
    coefficients for charging, discharging and the volume change (their set 1.4, 1, 1.2).
    ``mass_flow_in`` is the net mass flow into the chamber (negative when it empties).
    """
    m = np.asarray(mass_flow_in, dtype=float)
    weighted = np.where(m >= 0.0, k_in * m, k_out * m)
    return (R_AIR * temperature * weighted - k_chamber * (pressure + atmosphere_abs) * volume_rate) / volume


def regulator_pressure_rate(pressure, command, time_constant, supply_pressure, max_rate=math.inf):
    """First-order proportional-regulator model ``tau dp/dt = p_cmd - p`` [Pa/s] (common practice),
    the command clipped to [0, supply] and the rate to ``max_rate``: the natural prior model."""
    target = np.clip(command, 0.0, supply_pressure)
    return np.clip((target - pressure) / time_constant, -max_rate, max_rate)


def tube_delay(tube_length, temperature=T0):
    """Transport delay of a pressure wave along a tube, ``L / c`` with ``c = sqrt(k R T)`` [s]
    (derived; 343.2 m/s at 293.15 K, about 2.9 ms per metre)."""
    return tube_length / math.sqrt(GAMMA_AIR * R_AIR * temperature)


def tube_volume(tube_length, bore):
    """Dead volume of a tube of inner diameter ``bore`` [m^3]."""
    return math.pi * bore * bore * tube_length / 4.0
