"""Antagonistic pulley joint: angle -> muscle contractions, friction, gravity and end-stop torques.

Muscle A shortens as the angle grows: ``L_a = L_0 - r_p q``, ``L_b = L_0 + r_p q`` with
``L_0 = l0 (1 - eps0)`` (both pre-contracted by ``eps0``), so ``tau = r_p (F_a - F_b)``.
Each law is a compiled function on floats (``@law``, called by the plant kernel) with a numpy face.
"""
from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np

from .compiled import broadcast, law

if TYPE_CHECKING:
    from .params import JointParams


@law
def end_stop_torque(angle, rate, lower_stop, upper_stop, stiffness, damping):
    """Torque of the rubber end stops [N m], never pulling the paddle into a stop.

    Hunt & Crossley (1975, ASME J. Appl. Mech. 42(2), eq. for the impact force with exponent 1):
    ``tau = -k d - lambda |d| qd`` for penetration ``d``; the damping grows with the penetration,
    so the torque is continuous at first contact (a plain spring-damper jumps there) and the
    damping part always opposes the motion.
    """
    if angle > upper_stop:
        d = angle - upper_stop
        tau = -stiffness * d - damping * d * rate
        return tau if tau < 0.0 else 0.0
    if angle < lower_stop:
        d = angle - lower_stop
        tau = -stiffness * d + damping * d * rate
        return tau if tau > 0.0 else 0.0
    return 0.0


@law
def pivot_torque(angle, rate, viscous, coulomb, coulomb_rate_scale, gravity_moment, gravity_offset):
    """Viscous and smooth Coulomb friction plus gravity [N m] (all but muscles and stops):
    ``-c qd - tau_c tanh(qd / w) - m g l sin(q + q_g)`` (common practice; tanh smoothing keeps the
    right-hand side Lipschitz)."""
    tau = -viscous * rate
    if coulomb > 0.0:
        tau = tau - coulomb * math.tanh(rate / coulomb_rate_scale)
    if gravity_moment > 0.0:
        tau = tau - gravity_moment * math.sin(angle + gravity_offset)
    return tau


@law
def end_stop_partials(angle, rate, lower_stop, upper_stop, stiffness, damping):
    """:func:`end_stop_torque` and ``(d/dangle, d/drate)`` of it on the branch the law takes."""
    tau = end_stop_torque(angle, rate, lower_stop, upper_stop, stiffness, damping)
    if tau == 0.0:
        return 0.0, 0.0, 0.0
    if angle > upper_stop:
        return tau, -stiffness - damping * rate, -damping * (angle - upper_stop)
    return tau, -stiffness + damping * rate, damping * (angle - lower_stop)


@law
def pivot_partials(angle, rate, viscous, coulomb, coulomb_rate_scale, gravity_moment, gravity_offset):
    """:func:`pivot_torque` and ``(d/dangle, d/drate)`` of it."""
    d_rate = -viscous
    if coulomb > 0.0:
        t = math.tanh(rate / coulomb_rate_scale)
        d_rate = d_rate - coulomb * (1.0 - t * t) / coulomb_rate_scale
    d_angle = -gravity_moment * math.cos(angle + gravity_offset) if gravity_moment > 0.0 else 0.0
    return (pivot_torque(angle, rate, viscous, coulomb, coulomb_rate_scale, gravity_moment, gravity_offset), d_angle,
            d_rate)


@law
def _pivot_angle_slope(angle, rate, viscous, coulomb, coulomb_rate_scale, gravity_moment, gravity_offset):
    return pivot_partials(angle, rate, viscous, coulomb, coulomb_rate_scale, gravity_moment, gravity_offset)[1]


_stop_u = broadcast(end_stop_torque, 6)
_pivot_u = broadcast(pivot_torque, 7)
_pivot_slope_u = broadcast(_pivot_angle_slope, 7)


def contractions(joint: "JointParams", rest_length: float, angle):
    """Contractions ``(eps_a, eps_b)`` of the two muscles at joint ``angle`` [rad]."""
    shift = joint.pulley_radius * np.asarray(angle, dtype=float) / rest_length
    return joint.pre_contraction + shift, joint.pre_contraction - shift


def stop_torque(joint: "JointParams", angle, rate):
    """:func:`end_stop_torque` of ``joint`` over numpy arrays."""
    return _stop_u(angle, rate, joint.lower_stop, joint.upper_stop, joint.stop_stiffness, joint.stop_damping)


def passive_torque(joint: "JointParams", angle, rate):
    """:func:`pivot_torque` of ``joint`` over numpy arrays."""
    return _pivot_u(angle, rate, joint.viscous_damping, joint.coulomb_torque, joint.coulomb_rate_scale,
                    joint.gravity_moment, joint.gravity_offset)


def passive_torque_slope(joint: "JointParams", angle, rate):
    """``d tau / d angle`` of :func:`passive_torque` [N m/rad] (:func:`pivot_partials`)."""
    return _pivot_slope_u(angle, rate, joint.viscous_damping, joint.coulomb_torque, joint.coulomb_rate_scale,
                          joint.gravity_moment, joint.gravity_offset)
