"""Fixed-step RK4 with an integer number of sub-steps per control step, the command transport
delay, divergence checks, and a scipy ``solve_ivp`` reference path for tests."""
from __future__ import annotations

import functools
import math
from collections import deque

import numpy as np

from .errors import ParameterError, SimulationDiverged
from .plant import N_STATE, clamp_pressures, rhs, scalar_kernel
from .params import PlantParams

#: Angle and rate magnitudes past which a state counts as diverged [rad], [rad/s].
ANGLE_LIMIT = 20.0
RATE_LIMIT = 2000.0


def check_substeps(control_dt: float, n_substeps) -> int:
    """Validate the sub-step count (an integer >= 1) and return it."""
    if isinstance(n_substeps, bool) or not isinstance(n_substeps, (int, np.integer)) or n_substeps < 1:
        raise ParameterError(f"n_substeps: {n_substeps!r} is not allowed; must be a whole number >= 1")
    if not (math.isfinite(control_dt) and control_dt > 0):
        raise ParameterError(f"control_dt: {control_dt!r} s is not allowed; must be > 0")
    return int(n_substeps)


def delay_substeps(params: PlantParams, control_dt: float, n_substeps: int) -> int:
    """Command delay rounded to whole physics sub-steps."""
    return int(round(params.pneumatics.delay / (control_dt / n_substeps)))


def rk4_step(t, x, u, h, params):
    """One classical RK4 step of :func:`muscle_sim.plant.rhs` (batched arrays)."""
    k1 = rhs(t, x, u, params)
    k2 = rhs(t + 0.5 * h, x + (0.5 * h) * k1, u, params)
    k3 = rhs(t + 0.5 * h, x + (0.5 * h) * k2, u, params)
    k4 = rhs(t + h, x + h * k3, u, params)
    return x + (h / 6.0) * (k1 + 2.0 * (k2 + k3) + k4)


def rk4_step_f(t, x, u, h, params):
    """One classical RK4 step on Python floats: the float twin of :func:`rk4_step`, through the
    bound scalar kernel (:func:`muscle_sim.plant.scalar_kernel`); returns a list of 6 floats."""
    return _rk4_kernel_step(scalar_kernel(params), x, u[0], u[1], 0.5 * h, h, h / 6.0)


def _rk4_kernel_step(f, x, ua, ub, hh, h, h6):
    """RK4 of the kernel ``f`` written out over the six states (step ``h``, ``hh = h/2``,
    ``h6 = h/6``): no lists, no loops."""
    x0, x1, x2, x3, x4, x5 = x
    a0, a1, a2, a3, a4, a5 = f(x0, x1, x2, x3, x4, x5, ua, ub)
    b0, b1, b2, b3, b4, b5 = f(x0 + hh * a0, x1 + hh * a1, x2 + hh * a2, x3 + hh * a3, x4 + hh * a4, x5 + hh * a5, ua, ub)
    c0, c1, c2, c3, c4, c5 = f(x0 + hh * b0, x1 + hh * b1, x2 + hh * b2, x3 + hh * b3, x4 + hh * b4, x5 + hh * b5, ua, ub)
    d0, d1, d2, d3, d4, d5 = f(x0 + h * c0, x1 + h * c1, x2 + h * c2, x3 + h * c3, x4 + h * c4, x5 + h * c5, ua, ub)
    return [x0 + h6 * (a0 + 2.0 * (b0 + c0) + d0), x1 + h6 * (a1 + 2.0 * (b1 + c1) + d1),
            x2 + h6 * (a2 + 2.0 * (b2 + c2) + d2), x3 + h6 * (a3 + 2.0 * (b3 + c3) + d3),
            x4 + h6 * (a4 + 2.0 * (b4 + c4) + d4), x5 + h6 * (a5 + 2.0 * (b5 + c5) + d5)]


@functools.lru_cache(maxsize=64)
def _command_offsets(n_delay: int, n_substeps: int) -> tuple:
    """Index into the command history of the command acting at each sub-step (as
    :meth:`Stepper._command_for`), for the scalar path."""
    out = []
    for j in range(n_substeps):
        lag = n_delay - j
        out.append(-1 - (0 if lag <= 0 else -(-lag // n_substeps)))
    return tuple(out)


def _diverged(x) -> bool:
    q, qd = x[..., 0], x[..., 1]
    return not (np.all(np.isfinite(x)) and np.all(np.abs(q) < ANGLE_LIMIT) and np.all(np.abs(qd) < RATE_LIMIT))


class Stepper:
    """Advances the plant one control step at a time, applying the command delay.

    ``batch=None`` runs one state on Python floats (the fast scalar path); an integer runs a
    batch of states with numpy. Commands are piecewise constant over each control step; the
    delay shifts them by a whole number of physics sub-steps.
    """

    def __init__(self, params: PlantParams, control_dt: float, n_substeps: int, batch: int | None = None):
        self.params = params
        self.control_dt = float(control_dt)
        self.n_substeps = check_substeps(control_dt, n_substeps)
        self.h = self.control_dt / self.n_substeps
        self.batch = batch
        self._kernel = scalar_kernel(params) if batch is None else None
        self.n_delay = delay_substeps(params, control_dt, self.n_substeps)
        self._history: deque = deque()
        self.reset(np.zeros(N_STATE) if batch is None else np.zeros((batch, N_STATE)))

    def reset(self, x0, u_before=None, t0: float = 0.0) -> None:
        """Start from state ``x0``; ``u_before`` is the command assumed before ``t0``."""
        if self.batch is None:
            self.x = [float(v) for v in np.asarray(x0, dtype=float)]
            fill = (0.0, 0.0) if u_before is None else tuple(float(v) for v in u_before)
        else:
            self.x = np.array(x0, dtype=float).reshape(self.batch, N_STATE)
            fill = np.zeros((self.batch, 2)) if u_before is None else np.broadcast_to(
                np.asarray(u_before, dtype=float), (self.batch, 2)).copy()
        depth = -(-self.n_delay // self.n_substeps) + 1   # control steps the delay can reach back
        self._history = deque([fill if self.batch is None else fill.copy() for _ in range(depth)], maxlen=depth)
        self.t = float(t0)
        self.k = 0

    def reset_some(self, mask, x0, u_before) -> None:
        """Restart the batch members where ``mask`` is true (vector autoreset): their state
        becomes ``x0`` and their command history ``u_before``; the others go on untouched."""
        mask = np.asarray(mask, dtype=bool)
        self.x[mask] = x0
        for past in self._history:
            past[mask] = u_before

    def _command_for(self, j: int):
        """Command acting at sub-step ``j`` of the current control step (after the delay)."""
        lag = self.n_delay - j                       # sub-steps back from the start of this step
        back = 0 if lag <= 0 else -(-lag // self.n_substeps)
        return self._history[-1 - back]

    def step(self, u):
        """Advance one control step with command ``u`` [Pa]; returns the new state."""
        if self.batch is None:
            # the scalar path on Python floats: same sub-steps, delay, clamp and checks as below
            history = self._history
            history.append((float(u[0]), float(u[1])))
            f, h = self._kernel, self.h
            hh, h6 = 0.5 * h, h / 6.0
            supply = self.params.pneumatics.supply_pressure
            x = self.x
            for back in _command_offsets(self.n_delay, self.n_substeps):
                ua, ub = history[back]
                x = _rk4_kernel_step(f, x, ua, ub, hh, h, h6)
                p = x[2]                              # clamp_pressures: [0, supply]
                if p < 0.0:
                    x[2] = 0.0
                elif p > supply:
                    x[2] = supply
                p = x[3]
                if p < 0.0:
                    x[3] = 0.0
                elif p > supply:
                    x[3] = supply
            self.k += 1
            self.t = self.k * self.control_dt          # t0_plus(k)
            q, qd = x[0], x[1]
            rest = x[2] + x[3] + x[4] + x[5]          # rest - rest == 0 unless inf or nan (or overflow)
            if not (abs(q) < ANGLE_LIMIT and abs(qd) < RATE_LIMIT
                    and (rest - rest == 0.0 or all(map(math.isfinite, x)))):
                raise SimulationDiverged(f"state left the physical range at t = {self.t:.4f} s: {x}")
            self.x = x
            return x
        u = np.broadcast_to(np.asarray(u, dtype=float), (self.batch, 2)).copy()
        self._history.append(u)
        h, p = self.h, self.params
        x, t = self.x, self.t
        for j in range(self.n_substeps):
            x = clamp_pressures(p, rk4_step(t, x, self._command_for(j), h, p))
            t += h
        self.k += 1
        self.t = self.t0_plus(self.k)
        if _diverged(x):
            raise SimulationDiverged(f"state left the physical range at t = {self.t:.4f} s")
        self.x = x
        return x

    def t0_plus(self, k: int) -> float:
        """Time after ``k`` control steps (exact multiple, no accumulated rounding)."""
        return k * self.control_dt


def simulate(params: PlantParams, x0, commands, control_dt: float, n_substeps: int, u_before=None):
    """Fixed-step trajectory for a command sequence ``commands`` (N, 2) [Pa]; returns (N+1, 6)."""
    stepper = Stepper(params, control_dt, n_substeps, batch=None)
    stepper.reset(x0, u_before)
    out = [list(stepper.x)]
    for u in np.asarray(commands, dtype=float):
        out.append(list(stepper.step(u)))
    return np.array(out)


def simulate_reference(params: PlantParams, x0, commands, control_dt: float, n_substeps: int,
                       u_before=None, rtol: float = 1e-10, atol=None):
    """The same trajectory by ``scipy.integrate.solve_ivp`` (DOP853) on each interval of
    constant delayed command; the reference path for tests of the fixed-step integrator."""
    from scipy.integrate import solve_ivp

    n_sub = check_substeps(control_dt, n_substeps)
    h = control_dt / n_sub
    n_delay = delay_substeps(params, control_dt, n_sub)
    commands = np.asarray(commands, dtype=float)
    u0 = np.zeros(2) if u_before is None else np.asarray(u_before, dtype=float)
    if atol is None:
        atol = np.array([1e-12, 1e-10, 1e-6, 1e-6, 1e-12, 1e-12])
    x = np.asarray(x0, dtype=float).copy()
    out = [x.copy()]
    total = len(commands) * n_sub
    i = 0
    while i < total:
        src = (i - n_delay) // n_sub
        u = commands[src] if src >= 0 else u0
        # extend the segment while the delayed command stays the same source sample
        j = i + 1
        while j < total and (j - n_delay) // n_sub == src and j % n_sub != 0:
            j += 1
        sol = solve_ivp(lambda t, y: rhs(t, y, u, params), (i * h, j * h), x, method="DOP853",
                        rtol=rtol, atol=atol)
        if not sol.success:
            raise SimulationDiverged(f"reference solver failed at t = {i * h:.4f} s: {sol.message}")
        x = sol.y[:, -1]
        i = j
        if i % n_sub == 0:
            out.append(x.copy())
    return np.array(out)
