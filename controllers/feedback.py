"""PID feedback on the joint angle -> differential pressure, with anti-windup; alone or on top of a
feedforward profile. Gains default from the PRIOR model (inertia, torque per pascal)."""
from __future__ import annotations

import math

import numpy as np

from muscle_sim import joint as _joint
from muscle_sim import muscle as _muscle
from muscle_sim.tasks import reference


class PIDController:
    """``delta = kp e + ki int(e) + kd de/dt`` added to muscle A and taken from muscle B.

    ``e = r - angle``, ``de/dt = r' - rate`` from the measured angle and rate (readings
    [angle, rate, p_a, p_b]); commands ``base + (delta, -delta)`` clipped to [0, rated], where
    ``base`` is the feedforward row k (a :class:`PressureProfile` or a controller holding one as
    ``.profile``), else ``base_pressures`` [Pa], else the prior's home-holding pressures.

    Gains left ``None`` come from the PRIOR model (pole placement on the double integrator
    ``J qdd = k delta``, common practice): ``kp = J w^2 / k``, ``kd = 2 zeta J w / k``,
    ``ki = kp w / 10`` with ``w = 2 pi bandwidth_hz``, ``zeta = damping`` and
    ``k = r_p (A_a + A_b)`` the torque per pascal of differential pressure at the home angle. The
    bandwidth must stay well below what the prior's pressure delay and lag allow: the 6 Hz default
    costs ``w T_d + atan(w tau_p)`` = about 42 deg of phase on the demo prior (6 ms, 15 ms).

    Anti-windup: conditional integration (the error is integrated only while the output is not
    saturated in the direction the error would push it), and ``|ki I|`` is clamped to the rated
    pressure.
    """

    def __init__(self, kp=None, ki=None, kd=None, feedforward=None, base_pressures=None, name=None,
                 bandwidth_hz: float = 6.0, damping: float = 0.7):
        self.gains = (kp, ki, kd)
        self.feedforward = feedforward
        self.base_pressures = base_pressures
        self.bandwidth_hz = bandwidth_hz
        self.damping = damping
        self.name = name or ("model-only+feedback" if feedforward is not None else "feedback")

    def reset(self, setup) -> None:
        from muscle_sim.simulation import home_pressures

        prior, task = setup.prior, setup.task
        m, j = prior.muscle, prior.joint
        eps_a, eps_b = _joint.contractions(j, m.rest_length, task.home_angle)
        k_tau = j.pulley_radius * float(_muscle.effective_area(m, eps_a) + _muscle.effective_area(m, eps_b))
        w = 2 * math.pi * self.bandwidth_hz
        kp = j.total_inertia * w * w / k_tau
        defaults = (kp, kp * w / 10.0, 2 * self.damping * j.total_inertia * w / k_tau)
        self.kp, self.ki, self.kd = (d if g is None else g for g, d in zip(self.gains, defaults))
        t = np.arange(task.n_steps) * task.dt
        self._r, self._rd, _ = reference(task, t)
        if self.feedforward is not None:
            profile = getattr(self.feedforward, "profile", self.feedforward)
            profile.check_grid(task.dt, task.n_steps, "feedforward")
            self._base = np.asarray(profile.commands, dtype=float)
        else:
            base = self.base_pressures if self.base_pressures is not None else home_pressures(prior, task)
            self._base = np.tile(np.asarray(base, dtype=float), (task.n_steps, 1))
        self._dt = task.dt
        self._top = setup.rated_pressure
        self._integral = 0.0
        self.integral_limit = self._top / max(self.ki, 1e-12)

    def command(self, k, t, reading):
        e = self._r[k] - reading[0]
        ed = self._rd[k] - reading[1]
        delta = self.kp * e + self.ki * self._integral + self.kd * ed
        base = self._base[k]
        ua, ub = base[0] + delta, base[1] - delta
        saturated = (ua > self._top or ub < 0.0) if e > 0 else (ua < 0.0 or ub > self._top)
        if not saturated:
            self._integral = min(max(self._integral + e * self._dt, -self.integral_limit), self.integral_limit)
        return min(max(ua, 0.0), self._top), min(max(ub, 0.0), self._top)
