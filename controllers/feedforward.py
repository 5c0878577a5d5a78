"""Model-only feedforward: invert the PRIOR model along the planned reference swing.

Inverse dynamics gives the muscle torque the reference needs (common practice); the static muscle
model (Chou & Hannaford 1996 / Tondu & Lopez 2000, ``F = (p - p_th) A(eps)``) turns it into a
pressure pair at a chosen co-contraction; inverting the prior's first-order pressure lag and delay
(``tau_p dp/dt = p_cmd(t - T_d) - p``, common practice for proportional regulators) gives the commands. Only ``setup.prior`` is read, never the
simulated plant.
"""
from __future__ import annotations

import numpy as np

from muscle_sim import joint as _joint
from muscle_sim import muscle as _muscle
from muscle_sim.integrate import delay_steps
from muscle_sim.params import PlantParams
from muscle_sim.tasks import reference

from .base import PressureProfile
from .simple import ReplayProfile


def pressures_for_torque(prior: PlantParams, angle, torque, base_pressure):
    """Gauge pressures ``(p_a, p_b)`` [Pa] giving muscle torque ``torque`` [N m] at joint
    ``angle`` [rad] in the static muscle model (batched over broadcasting arrays).

    Solves ``r_p (F_a - F_b) = torque`` with ``F = (p - p_th) A(eps)`` (effective area ``A`` from
    :func:`muscle_sim.muscle.effective_area`, threshold ``p_th``); the side that needs less gets
    ``base_pressure`` [Pa] (the co-contraction), the other the rest. The torque-generalisation of
    :func:`muscle_sim.plant.holding_pressures`. Raises ValueError where a muscle cannot pull.
    """
    m, j = prior.muscle, prior.joint
    eps_a, eps_b = _joint.contractions(j, m.rest_length, angle)
    area_a = _muscle.effective_area(m, eps_a)
    area_b = _muscle.effective_area(m, eps_b)
    if np.any(area_a <= 0.0) or np.any(area_b <= 0.0):
        bad = np.broadcast_to(np.asarray(angle, dtype=float), np.shape(area_a))[(area_a <= 0) | (area_b <= 0)]
        raise ValueError(f"angle: {float(bad.flat[0]):g} rad leaves a muscle slack or fully contracted; "
                         f"cannot give a torque there")
    base = np.asarray(base_pressure, dtype=float)
    thr = m.threshold_pressure
    base_net = np.maximum(base - thr, 0.0)
    force = np.asarray(torque, dtype=float) / j.pulley_radius          # F_a - F_b needed
    pa_if_b_base = thr + (base_net * area_b + force) / area_a
    pb_if_a_base = thr + (base_net * area_a - force) / area_b
    a_is_base = pa_if_b_base < base          # A would need less than the base: A is the weaker side
    pa = np.where(a_is_base, base, pa_if_b_base)
    pb = np.where(a_is_base, pb_if_a_base, base)
    return pa, pb


def required_torque(prior: PlantParams, angle, rate, acceleration):
    """Muscle torque [N m] the prior joint needs for a motion (inverse dynamics, common practice):
    ``J qdd - tau_passive(q, qd) - tau_stop(q, qd)``, where :func:`muscle_sim.joint.passive_torque`
    (friction and gravity) and the end-stop torque act on the joint."""
    j = prior.joint
    return (j.total_inertia * np.asarray(acceleration, dtype=float) - _joint.passive_torque(j, angle, rate)
            - _joint.stop_torque(j, angle, rate))


def model_only_profile(setup, co_contraction: float | None = None) -> PressureProfile:
    """Feedforward :class:`PressureProfile` inverting ``setup.prior`` along the task's reference.

    Desired pressures ``p_d`` come from :func:`required_torque` and :func:`pressures_for_torque`
    with ``co_contraction`` [Pa] on the weaker side (default ``task.home_pressure``). Row k is held
    from ``t_k`` to ``t_k + dt``, so ``p_d`` is taken at the middle of that interval
    (zero-order-hold compensation, derived; without it the swing lags half a step). The prior's
    pressure model is inverted: for ``"lag"`` (first-order regulator, common practice)
    ``p_cmd(t) = p_d(t + T_d) + tau_p dp_d/dt (t + T_d)``, for ``"valve"`` only the delay ``T_d``;
    the shift is ``round(T_d / dt)`` samples, holding the last value. Commands are clipped to
    [0, rated pressure].
    """
    prior, task = setup.prior, setup.task
    n, dt = task.n_steps, task.dt
    t_hold = (np.arange(n + 1) + 0.5) * dt
    q, qd, qdd = reference(task, t_hold)
    base = task.home_pressure if co_contraction is None else float(co_contraction)
    pa, pb = pressures_for_torque(prior, q, required_torque(prior, q, qd, qdd), base)
    desired = np.column_stack([pa, pb])
    pn = prior.pneumatics
    if pn.model == "lag":
        desired = desired + pn.lag_time_constant * np.gradient(desired, dt, axis=0)
    shift = delay_steps(pn.delay, dt)
    index = np.minimum(np.arange(n) + shift, n)
    commands = np.clip(desired[index], 0.0, setup.rated_pressure)
    return PressureProfile(np.arange(n) * dt, commands, metadata={"controller": "model-only"})


class FeedforwardController(ReplayProfile):
    """Plays a feedforward :class:`PressureProfile` (model-only or learned) row by row; the grid
    is checked against the task on :meth:`reset`."""

    def __init__(self, profile: PressureProfile, name: str = "model-only"):
        super().__init__(profile, name=name, source=name)
