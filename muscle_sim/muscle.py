"""McKibben muscle static model: braid kinematics, volume, force, stiffness and braid friction.

Every function takes a :class:`~muscle_sim.params.McKibbenParams` and numpy arrays (or floats)
that broadcast against each other; SI units throughout (m, Pa gauge, rad, N). Contraction is
``eps = (l0 - l) / l0``, relative to the REST length ``l0`` (Tondu & Lopez 2000).

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

import numpy as np

from .params import McKibbenParams

_SQRT3 = math.sqrt(3.0)


def _area_at_cos(params: McKibbenParams, c):
    """Net pulling area ``-dV/dL`` [m^2] at braid-angle cosine ``c`` (Chou & Hannaford 1996,
    thick-wall form; reduces to ``pi D0^2 (3 cos^2 - 1) / 4`` for ``t = 0``)."""
    d0 = params.neutral_diameter
    t = params.wall_thickness
    s = np.sqrt(1.0 - c * c)
    area = 0.25 * math.pi * d0 * d0 * (3.0 * c * c - 1.0)
    if t > 0.0:
        area = area + math.pi * (d0 * t * (2.0 * s - 1.0 / s) - t * t)
    return area


@functools.lru_cache(maxsize=256)
def _zero_force_cos(params: McKibbenParams) -> float:
    """Braid-angle cosine at which the net area vanishes (the end of contraction)."""
    if params.wall_thickness == 0.0:
        return 1.0 / _SQRT3
    lo, hi = 1e-12, math.cos(params.rest_braid_angle)   # area < 0 at lo, > 0 at hi
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        if float(_area_at_cos(params, mid)) > 0.0:
            hi = mid
        else:
            lo = mid
    return 0.5 * (lo + hi)


def max_contraction(params: McKibbenParams) -> float:
    """Contraction at which the muscle stops pulling, ``eps_max`` [-].

    Ideal case: ``eps_max = 1 - 1 / (sqrt(3) cos(alpha0))`` (derived from Tondu & Lopez 2000,
    eq. for F = 0); the end correction divides it by ``k``. With a wall it is found numerically.
    """
    c_rest = math.cos(params.rest_braid_angle)
    return (1.0 - _zero_force_cos(params) / c_rest) / params.end_correction


def _braid_cos(params: McKibbenParams, contraction):
    """Cosine of the braid angle; slack (eps < 0) holds the rest shape, eps > eps_max the last."""
    eps = np.clip(np.asarray(contraction, dtype=float), 0.0, max_contraction(params))
    return (1.0 - params.end_correction * eps) * math.cos(params.rest_braid_angle)


def braid_angle(params: McKibbenParams, contraction):
    """Braid angle ``theta`` [rad] from ``cos(theta) = (1 - k eps) cos(alpha0)`` (Tondu & Lopez 2000)."""
    return np.arccos(_braid_cos(params, contraction))


def effective_area(params: McKibbenParams, contraction):
    """Force per unit pressure ``-dV/dL`` [m^2]; zero when slack or past ``eps_max``."""
    eps = np.asarray(contraction, dtype=float)
    area = _area_at_cos(params, _braid_cos(params, eps))
    inside = (eps >= 0.0) & (eps <= max_contraction(params))
    return np.where(inside, np.maximum(area, 0.0), 0.0)


def _volume_at_cos(params: McKibbenParams, c):
    s = np.sqrt(1.0 - c * c)
    d_inner = params.neutral_diameter * s - 2.0 * params.wall_thickness
    l_equiv = params.rest_length * c / math.cos(params.rest_braid_angle)
    return 0.25 * math.pi * d_inner * d_inner * l_equiv / params.end_correction


def volume(params: McKibbenParams, contraction):
    """Gas volume inside the bladder [m^3].

    ``V = pi (D - 2t)^2 L_e / (4 k)`` with ``L_e = l0 (1 - k eps)`` the length of the equivalent
    cylinder; with ``k = 1, t = 0`` this is ``pi D^2 L / 4 = L (b^2 - L^2) / (4 pi n^2)``
    (Chou & Hannaford 1996). The ``1/k`` scaling keeps ``F = -P dV/dL`` exact with the end
    correction, so pneumatic and mechanical work agree.
    """
    return _volume_at_cos(params, _braid_cos(params, contraction))


def net_pressure(params: McKibbenParams, pressure):
    """Gauge pressure left to pull the braid after the bladder threshold [Pa] (never negative)."""
    return np.maximum(np.asarray(pressure, dtype=float) - params.threshold_pressure, 0.0)


def static_force(params: McKibbenParams, pressure, contraction):
    """Static pulling force [N] at gauge ``pressure`` [Pa] and ``contraction`` [-].

    ``F = P (-dV/dL)``: Chou & Hannaford (1996) eq. for the ideal and thick-wall muscle;
    identical to Tondu & Lopez (2000) ``F = pi r0^2 P [a (1 - k eps)^2 - b]`` with
    ``a = 3 / tan^2(alpha0)``, ``b = 1 / sin^2(alpha0)`` when ``t = 0``. Zero when slack
    (eps < 0), past the maximum contraction, or at zero pressure.
    """
    return net_pressure(params, pressure) * effective_area(params, contraction)


def stiffness(params: McKibbenParams, pressure, contraction):
    """Derivative of the static force with respect to muscle length, ``dF/dL`` [N/m].

    Analytic derivative of :func:`static_force` through ``dc/dL = k cos(alpha0) / l0``;
    zero where the force is identically zero (slack, past eps_max).
    """
    eps = np.asarray(contraction, dtype=float)
    c = _braid_cos(params, eps)
    s = np.sqrt(1.0 - c * c)
    d0, t = params.neutral_diameter, params.wall_thickness
    darea_dc = 1.5 * math.pi * d0 * d0 * c
    if t > 0.0:
        darea_dc = darea_dc - math.pi * d0 * t * (2.0 + 1.0 / (s * s)) * c / s
    dc_dl = params.end_correction * math.cos(params.rest_braid_angle) / params.rest_length
    inside = (eps >= 0.0) & (eps <= max_contraction(params))
    return np.where(inside, net_pressure(params, pressure) * darea_dc * dc_dl, 0.0)


def braid_friction_force(params: McKibbenParams, pressure, contraction_rate):
    """Braid friction [N], signed like the contraction rate; subtract it from the static force.

    Pressure-proportional Coulomb-type friction from thread-on-thread contact (Tondu 2012,
    J. Intell. Mater. Syst. Struct., review), smoothed as ``tanh(rate / rate_scale)`` so the
    ODE right-hand side stays Lipschitz: ``f = mu pi r0^2 P tanh(deps/dt / s)``.
    """
    scale = params.braid_friction * math.pi * params.rest_radius ** 2
    rate = np.asarray(contraction_rate, dtype=float) / params.friction_rate_scale
    return scale * net_pressure(params, pressure) * np.tanh(rate)


def tension(params: McKibbenParams, pressure, contraction, contraction_rate):
    """Force the muscle pulls with [N]: static force less braid friction, never pushing.

    Shortening (positive contraction rate) lowers the tension, lengthening raises it, which is
    the measured hysteresis loop's sense (Tondu 2012).
    """
    pulling = effective_area(params, contraction) > 0.0
    f = static_force(params, pressure, contraction) - braid_friction_force(
        params, pressure, contraction_rate)
    return np.where(pulling, params.force_scale * np.maximum(f, 0.0), 0.0)


def chamber_terms(params: McKibbenParams, pressure, contraction, contraction_rate):
    """``(tension, effective_area, volume)`` in one pass, sharing the braid geometry.

    The same equations as :func:`tension`, :func:`effective_area` and :func:`volume`; the plant
    calls this on its hot path.
    """
    eps = np.asarray(contraction, dtype=float)
    eps_max = max_contraction(params)
    c = (1.0 - params.end_correction * np.clip(eps, 0.0, eps_max)) * math.cos(params.rest_braid_angle)
    inside = (eps >= 0.0) & (eps <= eps_max)
    area = np.where(inside, np.maximum(_area_at_cos(params, c), 0.0), 0.0)
    p_net = net_pressure(params, pressure)
    pull = p_net * area - braid_friction_force(params, pressure, contraction_rate)
    tension_ = np.where(area > 0.0, params.force_scale * np.maximum(pull, 0.0), 0.0)
    return tension_, area, _volume_at_cos(params, c)

