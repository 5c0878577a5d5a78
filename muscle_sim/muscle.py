"""McKibben muscle static model: braid kinematics, volume, force, stiffness and braid friction.

Each law is written once as a compiled function on floats (``@law``; the plant kernel calls
these) and exposed as a numpy function that takes a :class:`~muscle_sim.params.McKibbenParams`
and arrays (or floats) broadcasting against each other; SI units throughout (m, Pa gauge, rad, N).
Contraction is ``eps = (l0 - l) / l0``, relative to the REST length ``l0`` (Tondu & Lopez 2000).

Model (Chou & Hannaford 1996, IEEE Trans. Robot. Autom. 12(1); Tondu & Lopez 2000, IEEE Control
Syst. Mag. 20(2)): a braid of thread length ``b = l0 / cos(alpha0)`` and diameter
``D = D0 sin(theta)``, ``D0 = 2 r0 / sin(alpha0)``, with ``cos(theta) = (1 - k eps) cos(alpha0)``
where ``k`` is the Tondu–Lopez end correction. The force follows from virtual work,
``F = -P dV/dL``, on the volume inside a bladder wall of thickness ``t``; with ``t = 0, k = 1``
this is exactly the ideal Chou–Hannaford / Tondu–Lopez force.
"""
from __future__ import annotations

import functools
import math
from typing import TYPE_CHECKING

import numpy as np

from .compiled import broadcast, law

if TYPE_CHECKING:   # params imports this module (max_contraction) to validate, never the reverse
    from .params import McKibbenParams

_SQRT3 = math.sqrt(3.0)


# ---- the laws (floats) -------------------------------------------------------------------------
@law
def braid_cosine(contraction, end_correction, cos_rest, eps_max):
    """``cos(theta) = (1 - k eps) cos(alpha0)`` (Tondu & Lopez 2000); a slack muscle (eps < 0)
    keeps the rest shape, one past ``eps_max`` the last shape."""
    eps = min(max(contraction, 0.0), eps_max)
    return (1.0 - end_correction * eps) * cos_rest


@law
def pulling_area(c, neutral_diameter, wall):
    """Net pulling area ``-dV/dL`` [m^2] at braid cosine ``c``: Chou & Hannaford (1996) thick-wall
    form ``pi D0^2 (3 c^2 - 1) / 4 + pi (D0 t (2 s - 1/s) - t^2)``, ``s = sin(theta)``; the first
    term alone for ``t = 0``."""
    s = math.sqrt(1.0 - c * c)
    area = 0.25 * math.pi * neutral_diameter * neutral_diameter * (3.0 * c * c - 1.0)
    if wall > 0.0:
        area = area + math.pi * (neutral_diameter * wall * (2.0 * s - 1.0 / s) - wall * wall)
    return area


@law
def bladder_volume(c, neutral_diameter, wall, rest_length, cos_rest, end_correction):
    """Gas volume [m^3] ``V = pi (D0 s - 2t)^2 L_e / (4 k)``, ``L_e = l0 c / cos(alpha0)`` the
    equivalent cylinder's length (Chou & Hannaford 1996 with the 1/k scaling that keeps
    ``F = -P dV/dL`` exact under the Tondu & Lopez end correction)."""
    s = math.sqrt(1.0 - c * c)
    inner = neutral_diameter * s - 2.0 * wall
    return 0.25 * math.pi * inner * inner * (rest_length * c / cos_rest) / end_correction


@law
def active_area(contraction, end_correction, cos_rest, eps_max, neutral_diameter, wall):
    """Force per unit pressure [m^2]: :func:`pulling_area`, zero when slack or past ``eps_max``."""
    if contraction < 0.0 or contraction > eps_max:
        return 0.0
    area = pulling_area(braid_cosine(contraction, end_correction, cos_rest, eps_max), neutral_diameter, wall)
    return area if area > 0.0 else 0.0


@law
def muscle_chamber(pressure, contraction, friction_factor, end_correction, cos_rest, eps_max,
                   neutral_diameter, wall, rest_length, threshold, friction, force_scale):
    """``(tension [N], pulling area [m^2], volume [m^3])`` of one muscle in one pass.

    Tension ``F = s_F max(P_n A - mu pi r0^2 P_n g, 0)`` with net pressure ``P_n = max(P - P_th, 0)``
    (bladder threshold after Klute & Hannaford 2000), ``A`` the :func:`active_area`, and braid
    friction (Tondu 2012) of level ``friction = mu pi r0^2`` [m^2] and signed factor
    ``g`` in [-1, 1]: ``tanh(deps/dt / s)`` for the smooth law, or minus the Maxwell-slip elements'
    state; never pushing; ``s_F`` the force scale.
    """
    c = braid_cosine(contraction, end_correction, cos_rest, eps_max)
    vol = bladder_volume(c, neutral_diameter, wall, rest_length, cos_rest, end_correction)
    area = active_area(contraction, end_correction, cos_rest, eps_max, neutral_diameter, wall)
    if area <= 0.0 or pressure <= threshold:
        return 0.0, area, vol
    p_net = pressure - threshold
    pull = p_net * area - friction * p_net * friction_factor
    return (force_scale * pull if pull > 0.0 else 0.0), area, vol


@law
def pulling_area_slope(c, neutral_diameter, wall):
    """``d(pulling area)/dc`` [m^2] of :func:`pulling_area`: ``3 pi D0^2 c / 2`` and, with a wall,
    ``- pi D0 t (2 + 1/s^2) c / s`` (derived from Chou & Hannaford 1996 by ``ds/dc = -c/s``)."""
    slope = 1.5 * math.pi * neutral_diameter * neutral_diameter * c
    if wall > 0.0:
        s = math.sqrt(1.0 - c * c)
        slope = slope - math.pi * neutral_diameter * wall * (2.0 + 1.0 / (s * s)) * c / s
    return slope


@law
def muscle_chamber_partials(pressure, contraction, friction_factor, end_correction, cos_rest, eps_max,
                            neutral_diameter, wall, rest_length, threshold, friction, force_scale):
    """:func:`muscle_chamber` and its partial derivatives, for the exact Jacobian of the plant:
    ``(F, dF/dP, dF/deps, dF/dg, area, d area/deps, volume, d volume/deps)``. On each branch of
    the law the derivative of that branch (the clipped braid cosine is constant outside
    ``[0, eps_max]``, a slack or non-pulling muscle has no force slope)."""
    force, area, vol = muscle_chamber(pressure, contraction, friction_factor, end_correction, cos_rest, eps_max,
                                      neutral_diameter, wall, rest_length, threshold, friction, force_scale)
    c = braid_cosine(contraction, end_correction, cos_rest, eps_max)
    dc = -end_correction * cos_rest if 0.0 <= contraction <= eps_max else 0.0
    s = math.sqrt(1.0 - c * c)
    inner = neutral_diameter * s - 2.0 * wall
    # dV/dc = V/c + (pi L_e / 4k) 2 inner D0 ds/dc with L_e = l0 c / cos(alpha0), ds/dc = -c/s
    dvol = (vol / c - 0.5 * math.pi * rest_length / (cos_rest * end_correction) * inner * neutral_diameter
            * c * c / s) * dc
    darea = pulling_area_slope(c, neutral_diameter, wall) * dc if area > 0.0 else 0.0
    if force <= 0.0:                  # slack, below the threshold, or friction outweighs the pull
        return 0.0, 0.0, 0.0, 0.0, area, darea, vol, dvol
    p_net = pressure - threshold      # F = s_F (P_n A - mu pi r0^2 P_n g) on this branch
    return (force, force_scale * (area - friction * friction_factor), force_scale * p_net * darea,
            -force_scale * friction * p_net, area, darea, vol, dvol)


# ---- numpy face ---------------------------------------------------------------------------------
def _tension_one(pressure, contraction, contraction_rate, end_correction, cos_rest, eps_max,
                 neutral_diameter, wall, rest_length, threshold, friction, rate_scale, force_scale):
    g = math.tanh(contraction_rate / rate_scale) if friction > 0.0 else 0.0
    return muscle_chamber(pressure, contraction, g, end_correction, cos_rest, eps_max, neutral_diameter,
                          wall, rest_length, threshold, friction, force_scale)[0]


def _volume_one(contraction, end_correction, cos_rest, eps_max, neutral_diameter, wall, rest_length):
    return bladder_volume(braid_cosine(contraction, end_correction, cos_rest, eps_max), neutral_diameter, wall,
                          rest_length, cos_rest, end_correction)


_tension_u = broadcast(law(_tension_one), 13)
_volume_u = broadcast(law(_volume_one), 7)
_area_u = broadcast(active_area, 6)
_cos_u = broadcast(braid_cosine, 4)
_slope_u = broadcast(pulling_area_slope, 3)


def _geometry(params: "McKibbenParams"):
    return (params.end_correction, math.cos(params.rest_braid_angle), max_contraction(params))


@functools.lru_cache(maxsize=256)
def _zero_force_cos(params: "McKibbenParams") -> float:
    """Braid-angle cosine at which the net area vanishes (the end of contraction)."""
    if params.wall_thickness == 0.0:
        return 1.0 / _SQRT3
    lo, hi = 1e-12, math.cos(params.rest_braid_angle)   # area < 0 at lo, > 0 at hi
    d0, wall = params.neutral_diameter, params.wall_thickness
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        if pulling_area(mid, d0, wall) > 0.0:
            hi = mid
        else:
            lo = mid
    return 0.5 * (lo + hi)


def max_contraction(params: "McKibbenParams") -> float:
    """Contraction at which the muscle stops pulling, ``eps_max`` [-].

    Ideal case: ``eps_max = 1 - 1 / (sqrt(3) cos(alpha0))`` (derived from Tondu & Lopez 2000,
    eq. for F = 0); the end correction divides it by ``k``. With a wall it is found numerically.
    """
    c_rest = math.cos(params.rest_braid_angle)
    return (1.0 - _zero_force_cos(params) / c_rest) / params.end_correction


def braid_angle(params: "McKibbenParams", contraction):
    """Braid angle ``theta`` [rad] from ``cos(theta) = (1 - k eps) cos(alpha0)`` (Tondu & Lopez 2000)."""
    return np.arccos(_cos_u(contraction, *_geometry(params)))


def effective_area(params: "McKibbenParams", contraction):
    """Force per unit pressure ``-dV/dL`` [m^2]; zero when slack or past ``eps_max``."""
    return _area_u(contraction, *_geometry(params), params.neutral_diameter, params.wall_thickness)


def volume(params: "McKibbenParams", contraction):
    """Gas volume inside the bladder [m^3] (:func:`bladder_volume`).

    With ``k = 1, t = 0`` this is ``pi D^2 L / 4 = L (b^2 - L^2) / (4 pi n^2)`` (Chou & Hannaford 1996).
    """
    return _volume_u(contraction, *_geometry(params), params.neutral_diameter, params.wall_thickness,
                     params.rest_length)


def net_pressure(params: "McKibbenParams", pressure):
    """Gauge pressure left to pull the braid after the bladder threshold [Pa] (never negative)."""
    return np.maximum(np.asarray(pressure, dtype=float) - params.threshold_pressure, 0.0)


def tension(params: "McKibbenParams", pressure, contraction, contraction_rate):
    """Force the muscle pulls with [N]: static force less the smooth braid friction, never pushing
    (:func:`muscle_chamber` with ``g = tanh(rate / friction_rate_scale)``).

    Shortening (positive contraction rate) lowers the tension, lengthening raises it, which is
    the measured hysteresis loop's sense (Tondu 2012).
    """
    return _tension_u(pressure, contraction, contraction_rate, *_geometry(params), params.neutral_diameter,
                      params.wall_thickness, params.rest_length, params.threshold_pressure,
                      params.braid_friction * math.pi * params.rest_radius ** 2, params.friction_rate_scale,
                      params.force_scale)


def static_force(params: "McKibbenParams", pressure, contraction):
    """Static pulling force [N] at gauge ``pressure`` [Pa] and ``contraction`` [-], no friction.

    ``F = P (-dV/dL)``: Chou & Hannaford (1996) eq. for the ideal and thick-wall muscle;
    identical to Tondu & Lopez (2000) ``F = pi r0^2 P [a (1 - k eps)^2 - b]`` with
    ``a = 3 / tan^2(alpha0)``, ``b = 1 / sin^2(alpha0)`` when ``t = 0``. Zero when slack
    (eps < 0), past the maximum contraction, or at zero pressure. The plant's :func:`tension` at
    zero contraction rate.
    """
    return tension(params, pressure, contraction, 0.0)


def stiffness(params: "McKibbenParams", pressure, contraction):
    """Derivative of the static force with respect to muscle length, ``dF/dL`` [N/m].

    :func:`pulling_area_slope` through ``dc/dL = k cos(alpha0) / l0``;
    zero where the force is identically zero (slack, past eps_max).
    """
    eps = np.asarray(contraction, dtype=float)
    darea_dc = _slope_u(_cos_u(eps, *_geometry(params)), params.neutral_diameter, params.wall_thickness)
    dc_dl = params.end_correction * math.cos(params.rest_braid_angle) / params.rest_length
    inside = (eps >= 0.0) & (eps <= max_contraction(params))
    return np.where(inside, params.force_scale * net_pressure(params, pressure) * darea_dc * dc_dl, 0.0)


def braid_friction_force(params: "McKibbenParams", pressure, contraction_rate):
    """Smooth braid friction [N], signed like the contraction rate (what :func:`tension` subtracts
    while the muscle pulls): ``f = mu pi r0^2 P_n tanh(deps/dt / s)`` (Tondu 2012, smoothed so the
    right-hand side stays Lipschitz)."""
    scale = params.braid_friction * math.pi * params.rest_radius ** 2
    rate = np.asarray(contraction_rate, dtype=float) / params.friction_rate_scale
    return scale * net_pressure(params, pressure) * np.tanh(rate)
