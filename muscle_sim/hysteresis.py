"""Maxwell-slip braid hysteresis: parallel elasto-slide elements whose slip force follows pressure.

The braid of a McKibben muscle rubs thread on thread; its friction shows as a rate-independent
hysteresis loop in the force-length plane. Vo-Minh, Tjahjowidodo, Ramon & Van Brussel (2011),
"A new approach to modeling hysteresis in a pneumatic artificial muscle using the Maxwell-slip
model", IEEE/ASME Trans. Mechatronics 16(1): 177-186, model it with the Maxwell-slip structure:
``M`` elasto-slide elements (a linear spring in series with a Coulomb slider) acting in parallel,
each following the same length input; the hysteresis force is the sum of the element forces.
An element sticks while its spring force is below its slip force and slides, holding the slip
force, once it is reached. The structure is the rate-independent limit of the generalised
Maxwell-slip model of Lampaert, Al-Bender & Swevers (2003), "A generalized Maxwell-slip friction
model appropriate for control purposes", Proc. IEEE Int. Conf. Physics and Control, St Petersburg
(and Al-Bender, Lampaert & Swevers 2004, Chaos 14(2)): with the sliding dynamics of each element
made instantaneous, a sliding element holds exactly its slip force. It is also Iwan's (1966,
J. Appl. Mech. 33(4), "A distributed-element model for hysteresis and its steady-state dynamic
response") parallel-series model with a finite number of elements.

Bibliographic details (pages, proceedings) and the content of the papers are cited from memory
and could not be checked here; no equation numbers are given for that reason. From memory,
Vo-Minh et al. fit each element's stiffness and saturation force to measured loops and report the
loops growing with pressure; how exactly they let the elements depend on pressure is not checked.
Parametrisation used here (this module's choice):

- the total slip force follows the pressure-proportional braid friction of Tondu (2012, J. Intell.
  Mater. Syst. Struct., review): ``F_s = mu pi r0^2 p_net`` [N], ``p_net = max(p - p_th, 0)``;
- element ``i = 1..M`` carries the share ``w_i = 1 / M`` of it and breaks away after a stretch
  ``delta_i = s i / M`` [m], ``s`` the slip length (the stretch after which the whole friction has
  developed). Its stiffness is ``w_i F_s / delta_i``, so stiffness and slip force both scale with
  pressure and the element stretch ``e_i`` does not depend on pressure at all;
- the stretch is the stop operator of the length (Krasnosel'skii & Pokrovskii 1989, "Systems
  with Hysteresis"; Brokate & Sprekels 1996, "Hysteresis and Phase Transitions"):
  ``e_i <- clip(e_i + dl, -delta_i, delta_i)``; the slider position ``l - e_i`` is its
  complement, the play operator;
- the force ``F_h = F_s sum_i w_i e_i / delta_i`` [N] ADDS to the muscle tension: lengthening
  raises the tension, shortening lowers it, the sense of the tanh law
  :func:`muscle_sim.muscle.braid_friction_force`.

The virgin curve from ``e = 0`` is ``F_h(x) = F_s / M sum_i min(x / delta_i, 1)``: piecewise
linear, stiffness ``(F_s / s) sum_{i > k} 1 / i`` between the k-th and (k+1)-th breakaway, and
``F_s`` from ``x >= s`` on. A sum of stop operators is a Prandtl-Ishlinskii operator, so it has
return-point memory and the wiping-out property (Mayergoyz 1991, "Mathematical Models of
Hysteresis"; Brokate & Sprekels 1996): an inner loop closed inside the outer one leaves no trace.

The kernel functions (:func:`breakaways`, :func:`weights`, :func:`slip_force`, :func:`update`,
:func:`engagement`, :func:`force`) are compiled by numba (:func:`muscle_sim.compiled.law`) on
floats, ints and 1-D float64 arrays, for the compiled plant; :func:`braid_elements` and
:func:`trace` are their numpy face for tests and plots.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .compiled import law
from .errors import DataError
from .params import McKibbenParams


@law
def breakaways(n_elements, slip_length):
    """Breakaway stretch of each element [m]: ``delta_i = slip_length * i / n_elements``, i = 1..M.

    Evenly spread up to the slip length ``s`` (this module's distribution, see the module
    docstring): element ``M`` breaks away last, at ``s``, after which the Maxwell-slip force
    (Vo-Minh et al. 2011) has reached its full slip force.
    """
    out = np.empty(n_elements, dtype=np.float64)
    for i in range(n_elements):
        out[i] = slip_length * (i + 1) / n_elements
    return out


@law
def weights(n_elements):
    """Share of the total slip force carried by each element [-]: ``w_i = 1 / M`` (sum 1)."""
    out = np.empty(n_elements, dtype=np.float64)
    for i in range(n_elements):
        out[i] = 1.0 / n_elements
    return out


@law
def slip_force(braid_friction, rest_radius, threshold_pressure, pressure):
    """Total slip force of the braid [N]: ``F_s = mu pi r0^2 max(p - p_th, 0)``.

    Pressure-proportional thread-on-thread friction level of Tondu (2012, review), the same level
    as the tanh law of :func:`muscle_sim.muscle.braid_friction_force`; ``pressure`` gauge [Pa].
    """
    p_net = pressure - threshold_pressure
    if p_net < 0.0:
        p_net = 0.0
    return braid_friction * math.pi * rest_radius * rest_radius * p_net


@law
def update(state, length_change, breakaway):
    """Move every element by a muscle length change ``length_change`` [m] (in place).

    Stop operator of each elasto-slide element (Brokate & Sprekels 1996; the element of
    the Maxwell-slip model, Vo-Minh et al. 2011): ``e_i <- clip(e_i + dl, -delta_i, delta_i)``.
    The spring stretches with the length while it sticks; at ``|e_i| = delta_i`` the slider slides
    and the stretch stays. Rate independent: only the length change enters.
    """
    for i in range(state.shape[0]):
        limit = breakaway[i]
        stretch = state[i] + length_change
        if stretch > limit:
            stretch = limit
        elif stretch < -limit:
            stretch = -limit
        state[i] = stretch


@law
def engagement(state, breakaway, weights):
    """Share of the slip force the elements hold, ``g = sum_i w_i e_i / delta_i`` in [-1, 1] [-].

    +1 when every element slides after lengthening, -1 after shortening, 0 in the virgin state;
    :func:`force` is ``F_s g`` (Maxwell-slip sum, Vo-Minh et al. 2011).
    """
    total = 0.0
    for i in range(state.shape[0]):
        total += weights[i] * state[i] / breakaway[i]
    return total


@law
def force(state, breakaway, weights, slip_force):
    """Maxwell-slip braid friction [N] to ADD to the muscle tension.

    ``F_h = F_s sum_i w_i e_i / delta_i``: the sum of the element spring forces, element ``i``
    having stiffness ``w_i F_s / delta_i`` (Maxwell-slip sum, Vo-Minh et al. 2011; Lampaert,
    Al-Bender & Swevers 2003). Positive after lengthening, negative after shortening.
    """
    return slip_force * engagement(state, breakaway, weights)


@law
def _trace_into(state, lengths, slip_forces, breakaway, weight, forces, states):
    """Walk ``state`` along ``lengths``; force and state at every sample (the first without a move)."""
    for k in range(lengths.shape[0]):
        if k > 0:
            update(state, lengths[k] - lengths[k - 1], breakaway)
        forces[k] = force(state, breakaway, weight, slip_forces[k])
        for i in range(state.shape[0]):
            states[k, i] = state[i]


@dataclass(frozen=True)
class BraidElements:
    """The element table of a muscle's Maxwell-slip friction.

    Attributes
    ----------
    breakaway : numpy.ndarray
        Breakaway stretch ``delta_i`` of each element [m], shape ``(M,)``.
    weight : numpy.ndarray
        Share ``w_i`` of the total slip force of each element [-], shape ``(M,)``.
    """

    breakaway: np.ndarray
    weight: np.ndarray


def braid_elements(params: McKibbenParams) -> BraidElements:
    """Breakaway stretches and force shares of ``params``' friction elements (any friction model)."""
    return BraidElements(breakaways(params.friction_elements, params.slip_length),
                         weights(params.friction_elements))


@dataclass(frozen=True)
class BraidTrace:
    """Maxwell-slip friction along a sampled muscle length path.

    Attributes
    ----------
    length : numpy.ndarray
        Muscle length at each sample [m], shape ``(n,)``.
    pressure : numpy.ndarray
        Gauge pressure at each sample [Pa], shape ``(n,)``.
    force : numpy.ndarray
        Braid friction force to add to the tension at each sample [N], shape ``(n,)``.
    states : numpy.ndarray
        Element stretches ``e_i`` after each sample [m], shape ``(n, M)``.
    """

    length: np.ndarray
    pressure: np.ndarray
    force: np.ndarray
    states: np.ndarray

    @property
    def final_state(self) -> np.ndarray:
        """Element stretches after the last sample [m] (a copy, to continue a path from)."""
        return self.states[-1].copy()


def trace(params: McKibbenParams, lengths, pressure, state=None) -> BraidTrace:
    """Maxwell-slip braid friction of ``params`` along the length path ``lengths`` [m].

    ``pressure`` [Pa gauge] is one value or one per sample. ``state`` holds the element stretches
    at the first sample (default: the virgin state, all zero); it is not modified. Between samples
    the elements move by the length difference (:func:`update`), and the force at each sample is
    :func:`force` at that sample's pressure. Uses the element table of ``params`` whatever its
    ``friction_model``.
    """
    path = np.ascontiguousarray(lengths, dtype=np.float64)
    if path.ndim != 1 or path.size == 0 or not np.all(np.isfinite(path)):
        raise DataError(f"lengths: shape {path.shape} is not allowed; must be a non-empty 1-D array of "
                        f"finite lengths [m]")
    try:
        p = np.ascontiguousarray(np.broadcast_to(np.asarray(pressure, dtype=np.float64), path.shape))
    except ValueError:
        raise DataError(f"pressure: shape {np.shape(pressure)} is not allowed; must be one value or one "
                        f"per length sample ({path.size})") from None
    elements = braid_elements(params)
    n = elements.breakaway.size
    start = np.zeros(n) if state is None else np.array(state, dtype=np.float64)
    if start.shape != (n,) or np.any(np.abs(start) > elements.breakaway):
        raise DataError(f"state: {np.array2string(start, threshold=6)} is not allowed; must hold {n} "
                        f"stretches within their breakaways (+- slip_length * i / {n})")
    slip = np.array([slip_force(params.braid_friction, params.rest_radius, params.threshold_pressure, pk)
                     for pk in p])
    forces = np.empty_like(path)
    states = np.empty((path.size, n))
    _trace_into(start, path, slip, elements.breakaway, elements.weight, forces, states)
    return BraidTrace(length=path, pressure=p, force=forces, states=states)
