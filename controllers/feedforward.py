"""Model-only feedforward: invert the PRIOR model along the planned reference swing.

Inverse dynamics gives the muscle torque the reference needs (common practice); the static muscle
model turns it into a pressure pair at a chosen co-contraction; inverting the prior's first-order
pressure lag and delay (physics.md section 3) gives the commands. Only ``setup.prior`` is read.
"""
from __future__ import annotations

import numpy as np

from muscle_sim import joint as _joint
from muscle_sim import muscle as _muscle
from muscle_sim.params import PlantParams
from muscle_sim.tasks import reference

from .base import PressureProfile
from .simple import ReplayProfile


def pressures_for_torque(prior: PlantParams, angle, torque, base_pressure):
    """Gauge pressures ``(p_a, p_b)`` [Pa] giving muscle torque ``torque`` [N m] at ``angle``
    [rad] by the static model: ``r_p (F_a - F_b) = torque`` with ``F = (p - p_th) A(eps)``; the
    side that needs less gets ``base_pressure`` (co-contraction). Vectorised."""
    m, j = prior.muscle, prior.joint
    eps_a, eps_b = _joint.contractions(j, m.rest_length, angle)
    area_a = np.maximum(_muscle.effective_area(m, eps_a), 1e-12)
    area_b = np.maximum(_muscle.effective_area(m, eps_b), 1e-12)
    thr = m.threshold_pressure
    base_net = np.maximum(np.asarray(base_pressure, dtype=float) - thr, 0.0)
    force = np.asarray(torque, dtype=float) / j.pulley_radius          # F_a - F_b needed
    pa_if_b_base = thr + (base_net * area_b + force) / area_a
    pb_if_a_base = thr + (base_net * area_a - force) / area_b
    a_is_base = pa_if_b_base < base_pressure
    pa = np.where(a_is_base, base_pressure, pa_if_b_base)
    pb = np.where(a_is_base, pb_if_a_base, base_pressure)
    return pa, pb


def required_torque(prior: PlantParams, q, qd, qdd):
    """Muscle torque the prior needs for the motion: ``J qdd - tau_passive - tau_stop`` [N m]."""
    j = prior.joint
    return j.total_inertia * qdd - _joint.passive_torque(j, q, qd) - _joint.stop_torque(j, q, qd)


def model_only_profile(setup, co_contraction: float | None = None) -> PressureProfile:
    """Feedforward profile from the prior model along the task's reference swing.

    The pressures follow the desired pressures ``p_d`` through the prior's pressure model: for the
    lag model ``p_cmd(t) = p_d(t + T_d) + tau dp_d/dt (t + T_d)``; for a valve prior only the delay
    ``T_d`` is inverted. Commands are clipped to [0, rated].
    """
    prior, task = setup.prior, setup.task
    n = task.n_steps
    t = np.arange(n + 1) * task.dt
    q, qd, qdd = reference(task, t)
    base = task.home_pressure if co_contraction is None else co_contraction
    pa, pb = pressures_for_torque(prior, q, required_torque(prior, q, qd, qdd), base)
    desired = np.column_stack([pa, pb])
    pn = prior.pneumatics
    if pn.model == "lag":
        desired = desired + pn.lag_time_constant * np.gradient(desired, task.dt, axis=0)
    shift = int(round(pn.delay / task.dt))
    index = np.minimum(np.arange(n) + shift, n)
    commands = np.clip(desired[index], 0.0, setup.rated_pressure)
    return PressureProfile(t[:n], commands, metadata={"controller": "model-only"})


class FeedforwardController(ReplayProfile):
    """Plays a feedforward profile (model-only or learned) as a controller."""

    def __init__(self, profile: PressureProfile, name: str = "model-only"):
        super().__init__(profile, name=name, source=name)
