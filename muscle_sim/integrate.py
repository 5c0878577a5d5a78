"""Fixed-step RK4 with an integer number of sub-steps per control step, the command transport
delay, divergence checks, and a scipy ``solve_ivp`` reference path for tests.

The control step is one compiled call (:func:`advance_batch`) for one state or a batch of
4096: RK4 on :func:`muscle_sim.plant.plant_rate` for every sub-step, the delayed command
looked up per sub-step, each member with its own parameter row if given. Nothing clamps the
state afterwards: the right-hand side itself keeps pressures physical. :func:`step_with_jacobian`
is the same RK4 map with its exact derivatives (the tangent through every stage), for
linearising the prior.
"""
from __future__ import annotations

import math

import numpy as np

from .compiled import law
from .errors import ParameterError, SimulationDiverged
from .params import PlantParams
from .hysteresis import breakaways, engagement, update, weights as slip_weights
from .plant import K_PULLEY, N_STATE, pack, plant_jacobian, plant_rate, rhs

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


def delay_steps(delay: float, step: float) -> int:
    """A delay [s] as a whole number of steps of ``step`` [s], rounded half up: the one rounding
    every path uses (simulator sub-steps, learner and feedforward control steps)."""
    return int(math.floor(delay / step + 0.5 + 1e-9))


def delay_substeps(params: PlantParams, control_dt: float, n_substeps: int) -> int:
    """Command delay of ``params`` in whole physics sub-steps."""
    return delay_steps(params.pneumatics.delay, control_dt / n_substeps)


def command_slots(n_delay: int, n_substeps: int) -> np.ndarray:
    """For each sub-step of a control step, how many control steps back (0 = this step's
    command) the command acting there was given, for a delay of ``n_delay`` sub-steps."""
    back = [0 if n_delay - j <= 0 else -(-(n_delay - j) // n_substeps) for j in range(n_substeps)]
    return np.array(back, dtype=np.int64)


@law
def _rk4(x, ua, ub, h, P, slip_a, slip_b):
    """One classical RK4 step of :func:`~muscle_sim.plant.plant_rate` from the 6-tuple ``x``
    (Maxwell-slip engagements ``slip_a, slip_b`` held over the step)."""
    hh = 0.5 * h
    a = plant_rate(x[0], x[1], x[2], x[3], x[4], x[5], ua, ub, slip_a, slip_b, P)
    b = plant_rate(x[0] + hh * a[0], x[1] + hh * a[1], x[2] + hh * a[2], x[3] + hh * a[3], x[4] + hh * a[4],
                   x[5] + hh * a[5], ua, ub, slip_a, slip_b, P)
    c = plant_rate(x[0] + hh * b[0], x[1] + hh * b[1], x[2] + hh * b[2], x[3] + hh * b[3], x[4] + hh * b[4],
                   x[5] + hh * b[5], ua, ub, slip_a, slip_b, P)
    d = plant_rate(x[0] + h * c[0], x[1] + h * c[1], x[2] + h * c[2], x[3] + h * c[3], x[4] + h * c[4],
                   x[5] + h * c[5], ua, ub, slip_a, slip_b, P)
    h6 = h / 6.0
    return (x[0] + h6 * (a[0] + 2.0 * (b[0] + c[0]) + d[0]), x[1] + h6 * (a[1] + 2.0 * (b[1] + c[1]) + d[1]),
            x[2] + h6 * (a[2] + 2.0 * (b[2] + c[2]) + d[2]), x[3] + h6 * (a[3] + 2.0 * (b[3] + c[3]) + d[3]),
            x[4] + h6 * (a[4] + 2.0 * (b[4] + c[4]) + d[4]), x[5] + h6 * (a[5] + 2.0 * (b[5] + c[5]) + d[5]))


@law
def _rk4_into(x, u, P, h, out):
    for i in range(x.shape[0]):
        r = _rk4((x[i, 0], x[i, 1], x[i, 2], x[i, 3], x[i, 4], x[i, 5]), u[i, 0], u[i, 1], h, P, 0.0, 0.0)
        for k in range(N_STATE):
            out[i, k] = r[k]


@law
def _stage(x, t, u0, u1, P, nx, jac, work, dk, st):
    """One RK4 stage of the tangent: the rate at the stage's state ``x`` and, into ``dk[st]``, its
    tangent ``J_x t + [0 | J_u]`` for the stage's tangent ``t`` (6, 8) (``T + c h dk[st - 1]``), on
    the first ``nx`` states and the two commands (columns ``nx..5`` stay untouched)."""
    r = plant_jacobian(x[0], x[1], x[2], x[3], x[4], x[5], u0, u1, 0.0, 0.0, P, jac, work)
    for i in range(nx):
        for k in range(nx):
            acc = jac[i, 0] * t[0, k]
            for l in range(1, nx):
                acc += jac[i, l] * t[l, k]
            dk[st, i, k] = acc
        for k in range(N_STATE, N_STATE + 2):
            acc = jac[i, k]
            for l in range(nx):
                acc += jac[i, l] * t[l, k]
            dk[st, i, k] = acc
    return r


@law
def step_with_jacobian(x, u, P, h, n_sub, nx, out, jac):
    """``n_sub`` RK4 steps of length ``h`` of :func:`~muscle_sim.plant.plant_rate` from every row of
    ``x`` (M, 6) under its constant command ``u`` (M, 2): the end states into ``out`` (M, 6) and
    their exact derivatives with respect to ``(x, u)`` into ``jac`` (M, 6, 8) (the tangent of the
    RK4 map: each stage's Jacobian applied to the stage's own tangent, so the result is the
    derivative of the discrete map, not of the flow). Only the first ``nx`` states are
    differentiated (4 for a regulator-lag prior, whose spool states are inert: the other rows and
    columns of ``jac`` are left zero). The prior never models braid hysteresis."""
    J = np.empty((N_STATE, 8))
    work = np.empty(16)
    T = np.zeros((N_STATE, 8))
    Ts = np.zeros((N_STATE, 8))
    dk = np.zeros((4, N_STATE, 8))
    xs = np.empty(N_STATE)
    s = np.empty(N_STATE)
    rates = np.empty((4, N_STATE))
    h6 = h / 6.0
    for m in range(x.shape[0]):
        for i in range(N_STATE):
            s[i] = x[m, i]
            for k in range(8):
                T[i, k] = 1.0 if i == k else 0.0
        u0, u1 = u[m, 0], u[m, 1]
        for _ in range(n_sub):
            r = _stage(s, T, u0, u1, P, nx, J, work, dk, 0)
            for i in range(N_STATE):
                rates[0, i] = r[i]
            for st in range(1, 4):
                ch = 0.5 * h if st < 3 else h          # the same products as _rk4's
                for i in range(N_STATE):
                    xs[i] = s[i] + ch * rates[st - 1, i]
                for i in range(nx):
                    for k in range(8):
                        Ts[i, k] = T[i, k] + ch * dk[st - 1, i, k]
                r = _stage(xs, Ts, u0, u1, P, nx, J, work, dk, st)
                for i in range(N_STATE):
                    rates[st, i] = r[i]
            for i in range(N_STATE):
                s[i] = s[i] + h6 * (rates[0, i] + 2.0 * (rates[1, i] + rates[2, i]) + rates[3, i])
            for i in range(nx):
                for k in range(8):
                    T[i, k] += h6 * (dk[0, i, k] + 2.0 * (dk[1, i, k] + dk[2, i, k]) + dk[3, i, k])
        for i in range(N_STATE):
            out[m, i] = s[i]
            for k in range(8):
                jac[m, i, k] = T[i, k] if i < nx else 0.0


@law
def advance_batch(x, history, command, slots, rows, h, slip, breakaway, weights, bad):
    """Advance every member of ``x`` (B, 6) by one control step, in place.

    ``history`` (D, B, 2) holds the last D commands, oldest first; ``command`` (B, 2) is this
    step's, pushed in first; sub-step j uses ``history[D - 1 - slots[j]]``. ``rows`` (1 or B,
    N_PACKED) are the parameter rows. ``slip`` (B, 2, M) are the Maxwell-slip element states of
    both muscles (M = 0 without hysteresis), with ``breakaway`` and ``weights`` (M,): their
    engagement is held over each RK4 sub-step, then the elements follow the muscles' length
    change ``dL_a = -r_p dq``, ``dL_b = +r_p dq`` (operator splitting). ``bad`` (B,) is set true
    for each member that left the physical range (non-finite, |angle| >= ANGLE_LIMIT or |rate| >=
    RATE_LIMIT), false for the others; returns the index of the first such member, or -1.
    """
    depth, n = history.shape[0], x.shape[0]
    for i in range(n):
        for d in range(depth - 1):
            history[d, i, 0] = history[d + 1, i, 0]
            history[d, i, 1] = history[d + 1, i, 1]
        history[depth - 1, i, 0] = command[i, 0]
        history[depth - 1, i, 1] = command[i, 1]
    first = -1
    for i in range(n):
        P = rows[i if rows.shape[0] > 1 else 0]
        s = (x[i, 0], x[i, 1], x[i, 2], x[i, 3], x[i, 4], x[i, 5])
        hysteresis = breakaway.shape[0] > 0
        rp = P[K_PULLEY]
        for j in range(slots.shape[0]):
            src = depth - 1 - slots[j]
            if hysteresis:
                q_before = s[0]
                s = _rk4(s, history[src, i, 0], history[src, i, 1], h, P, engagement(slip[i, 0], breakaway, weights),
                         engagement(slip[i, 1], breakaway, weights))
                update(slip[i, 0], -rp * (s[0] - q_before), breakaway)
                update(slip[i, 1], rp * (s[0] - q_before), breakaway)
            else:
                s = _rk4(s, history[src, i, 0], history[src, i, 1], h, P, 0.0, 0.0)
        for k in range(N_STATE):
            x[i, k] = s[k]
        finite = True
        for k in range(N_STATE):
            if not math.isfinite(s[k]):
                finite = False
        bad[i] = not (finite and abs(s[0]) < ANGLE_LIMIT and abs(s[1]) < RATE_LIMIT)
        if bad[i] and first < 0:
            first = i
    return first


def rk4_step(t, x, u, h, params):
    """One classical RK4 step of :func:`muscle_sim.plant.rhs` (numpy face, batched (M, 6))."""
    x = np.asarray(x, dtype=float)
    shape = np.broadcast_shapes(x.shape[:-1], np.shape(u)[:-1])
    xs = np.ascontiguousarray(np.broadcast_to(x, shape + (N_STATE,))).reshape(-1, N_STATE)
    us = np.ascontiguousarray(np.broadcast_to(np.asarray(u, dtype=float), shape + (2,))).reshape(-1, 2)
    out = np.empty_like(xs)
    _rk4_into(xs, us, pack(params), float(h), out)
    return out.reshape(shape + (N_STATE,))


class Stepper:
    """Advances the plant one control step at a time, applying the command delay.

    ``batch=None`` runs one state (``x`` is then a (6,) view); an integer runs a batch of
    states (``x`` is (batch, 6)). ``params`` is one :class:`PlantParams` for all members, or a
    sequence of ``batch`` of them (one per member, e.g. drifted plants; all with the same delay).
    Commands are piecewise constant over each control step; the delay shifts them by a whole
    number of physics sub-steps.
    """

    def __init__(self, params, control_dt: float, n_substeps: int, batch: int | None = None):
        members = [params] if isinstance(params, PlantParams) else list(params)
        self.params = members[0]
        self.control_dt = float(control_dt)
        self.n_substeps = check_substeps(control_dt, n_substeps)
        self.h = self.control_dt / self.n_substeps
        self.batch = batch
        self._n = 1 if batch is None else int(batch)
        if len(members) not in (1, self._n):
            raise ValueError(f"params: {len(members)} parameter sets is not allowed; must be 1 or {self._n}")
        self.n_delay = delay_substeps(self.params, control_dt, self.n_substeps)
        if any(delay_substeps(p, control_dt, self.n_substeps) != self.n_delay for p in members):
            raise ValueError("params: members with different command delays cannot share one stepper")
        self._rows = np.ascontiguousarray(np.stack([pack(p) for p in members]))
        m = self.params.muscle
        if any((p.muscle.friction_model, p.muscle.friction_elements, p.muscle.slip_length)
               != (m.friction_model, m.friction_elements, m.slip_length) for p in members):
            raise ValueError("params: members with different braid friction models cannot share one stepper")
        n_slip = m.friction_elements if m.friction_model == "maxwell-slip" else 0
        self._breakaway = breakaways(n_slip, m.slip_length) if n_slip else np.zeros(0)
        self._slip_weights = slip_weights(n_slip) if n_slip else np.zeros(0)
        self._slip = np.zeros((self._n, 2, n_slip))
        self._slots = command_slots(self.n_delay, self.n_substeps)
        self._depth = int(self._slots.max()) + 1
        self._x = np.zeros((self._n, N_STATE))
        self._history = np.zeros((self._depth, self._n, 2))
        self._command = np.zeros((self._n, 2))
        self.diverged = np.zeros(self._n, dtype=np.bool_)
        self.reset(self._x.copy())

    @property
    def x(self):
        """The state now: (6,) for ``batch=None``, else (batch, 6) (the stepper's own array)."""
        return self._x[0] if self.batch is None else self._x

    def reset(self, x0, u_before=None, t0: float = 0.0) -> None:
        """Start from state ``x0``; ``u_before`` is the command assumed before ``t0``."""
        self._x[...] = np.asarray(x0, dtype=float).reshape(-1, N_STATE)
        self._history[...] = 0.0 if u_before is None else np.asarray(u_before, dtype=float).reshape(-1, 2)
        self._slip[...] = 0.0          # braid elements start unloaded (the virgin state)
        self.t = float(t0)
        self.k = 0

    def reset_some(self, mask, x0, u_before) -> None:
        """Restart the batch members where ``mask`` is true (vector autoreset): their state
        becomes ``x0`` and their command history ``u_before``; the others go on untouched."""
        mask = np.asarray(mask, dtype=bool)
        self._x[mask] = x0
        self._history[:, mask] = u_before
        self._slip[mask] = 0.0

    def set_member(self, i: int, params: PlantParams) -> None:
        """Give member ``i`` its own parameters (e.g. the plant of its trial under drift); the
        delay and the braid friction model must match the stepper's."""
        if (delay_substeps(params, self.control_dt, self.n_substeps) != self.n_delay
                or params.muscle.friction_model != self.params.muscle.friction_model
                or params.muscle.friction_elements != self.params.muscle.friction_elements
                or params.muscle.slip_length != self.params.muscle.slip_length):
            raise ValueError("params: a member with another command delay or braid friction model cannot share "
                             "this stepper")
        if self._rows.shape[0] != self._n:
            self._rows = np.ascontiguousarray(np.repeat(self._rows, self._n, axis=0))
        self._rows[i] = pack(params)

    def kernel_args(self) -> tuple:
        """What :func:`advance_batch` takes besides the state and the command: ``(history,
        slots, rows, h, slip, breakaway, weights, diverged)`` (for callers that fuse it into
        their own compiled step)."""
        return (self._history, self._slots, self._rows, self.h, self._slip, self._breakaway, self._slip_weights,
                self.diverged)

    def advance(self, u) -> int:
        """Advance one control step with command ``u`` [Pa] ((2,) or (batch, 2)) without raising:
        members that left the physical range are flagged in :attr:`diverged`; returns the index
        of the first of them, or -1."""
        self._command[...] = u
        first = advance_batch(self._x, self._history, self._command, self._slots, self._rows, self.h, self._slip,
                              self._breakaway, self._slip_weights, self.diverged)
        self.k += 1
        self.t = self.k * self.control_dt
        return first

    def step(self, u):
        """Advance one control step with command ``u`` [Pa] ((2,) or (batch, 2)); returns the new
        state (the stepper's own array: copy it to keep it). Raises
        :class:`~muscle_sim.errors.SimulationDiverged` if any member left the physical range."""
        bad = self.advance(u)
        if bad >= 0:
            raise SimulationDiverged(f"state left the physical range at t = {self.t:.4f} s: {self._x[bad]}")
        return self.x



def simulate(params: PlantParams, x0, commands, control_dt: float, n_substeps: int, u_before=None):
    """Fixed-step trajectory for a command sequence ``commands`` (N, 2) [Pa]; returns (N+1, 6)."""
    commands = np.asarray(commands, dtype=float)
    stepper = Stepper(params, control_dt, n_substeps)
    stepper.reset(x0, u_before)
    out = np.empty((len(commands) + 1, N_STATE))
    out[0] = stepper.x
    for k, u in enumerate(commands):
        out[k + 1] = stepper.step(u)
    return out


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
