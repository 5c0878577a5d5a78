"""Antagonistic pulley joint: angle -> muscle contractions, friction, gravity and end-stop torques.

Muscle A shortens as the angle grows: ``L_a = L_0 - r_p q``, ``L_b = L_0 + r_p q`` with
``L_0 = l0 (1 - eps0)`` (both pre-contracted by ``eps0``), so ``tau = r_p (F_a - F_b)``.
Pure functions over numpy arrays (the scalar fast path inlines them in ``plant.scalar_kernel``).
"""
from __future__ import annotations

import numpy as np

from .params import JointParams


def contractions(joint: JointParams, rest_length: float, angle):
    """Contractions ``(eps_a, eps_b)`` of the two muscles at joint ``angle`` [rad]."""
    shift = joint.pulley_radius * np.asarray(angle, dtype=float) / rest_length
    return joint.pre_contraction + shift, joint.pre_contraction - shift


def stop_torque(joint: JointParams, angle, rate):
    """Torque of the rubber end stops [N m], never pulling the paddle into a stop.

    Hunt & Crossley (1975, ASME J. Appl. Mech. 42(2)) contact with exponent 1:
    ``tau = -k d - lambda |d| qd`` for penetration ``d``; the damping grows with the penetration,
    so the torque is continuous at first contact (a plain spring-damper jumps there).
    """
    q = np.asarray(angle, dtype=float)
    into = np.maximum(q - joint.upper_stop, 0.0) + np.minimum(q - joint.lower_stop, 0.0)
    tau = -joint.stop_stiffness * into - joint.stop_damping * np.abs(into) * rate
    return np.where(into > 0.0, np.minimum(tau, 0.0), np.where(into < 0.0, np.maximum(tau, 0.0), 0.0))


def passive_torque(joint: JointParams, angle, rate):
    """Viscous and smooth Coulomb friction plus gravity [N m] (all but muscles and stops)."""
    friction = joint.viscous_damping * rate + joint.coulomb_torque * np.tanh(rate / joint.coulomb_rate_scale)
    gravity = joint.gravity_moment * np.sin(np.asarray(angle, dtype=float) + joint.gravity_offset)
    return -friction - gravity
