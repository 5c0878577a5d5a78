"""Linearisation of the PRIOR model along a measured trajectory: forward sensitivity (G0 v) and
adjoint (G0^T w) passes, O(N) each.

The prior's one-control-step map ``x_{k+1} = f(x_k, u_{k-d})`` (RK4 on the prior's right-hand
side, ``d`` its command delay in control steps) is linearised at the MEASURED states of a trial:
``x_k = [angle, rate, p_a, p_b]`` for the regulator-lag prior, and with the two valve spool
openings appended for a valve-flow prior (its spools carry the pressure response from one step to
the next; they are not measured, so :func:`measured_states` rebuilds them from the measured
pressures and the commands by the prior's own spool law). ``A_k = df/dx``, ``B_k = df/du`` are
the exact derivatives of that one-step map (the tangent of its RK4 steps on the chain rule of
each law's partials, :func:`muscle_sim.integrate.step_with_jacobian`), all samples in one
compiled call. The lifted map from
commands to outputs (angle at every sample, rate at the strike sample) then has the Jacobian
``G0`` whose products are computed by a forward (sensitivity) and a backward (adjoint) recursion:
the products ``G0 v`` and ``G0^T w`` that gradient and norm-optimal iterative learning control
need (Owens, Hatonen & Daley 2009, Int. J. Robust Nonlinear Control; Amann, Owens & Rogers 1996,
IEE Proc. Control Theory Appl. 143(2)). The recursions are compiled with numba; on a hat-function
profile basis the forward pass touches only the knots already excited (commands are two knots per
sample).
"""
from __future__ import annotations

from dataclasses import dataclass

import numba
import numpy as np

from muscle_sim.integrate import delay_steps as steps_of_delay, step_with_jacobian
from muscle_sim.params import PlantParams
from muscle_sim.plant import N_STATE, pack
from muscle_sim.pneumatics import spool_rate

_compile = numba.njit(cache=True, nogil=True)


def state_size(prior: PlantParams) -> int:
    """States the learner linearises the prior on: 4 (angle, rate, p_a, p_b) for the regulator
    lag, whose spool states are inert, and 6 (the two spool openings too) for valve flow."""
    return 6 if prior.pneumatics.model == "valve" else 4


@_compile
def _forward(A, B, delay, strike_index, du):
    """``dx_{k+1} = A_k dx_k + B_k du_{k-d}`` from ``dx_0 = 0`` for columns ``du`` (N, 2, M):
    angle rows (N+1, M) and the strike-sample rate row (M,)."""
    n, nx, m = A.shape[0], A.shape[1], du.shape[2]
    dx = np.zeros((nx, m))
    nxt = np.empty((nx, m))
    angles = np.zeros((n + 1, m))
    rate = np.zeros(m)
    for k in range(n):
        src = k - delay
        for i in range(nx):
            for p in range(m):
                acc = A[k, i, 0] * dx[0, p]
                for l in range(1, nx):
                    acc += A[k, i, l] * dx[l, p]
                nxt[i, p] = acc
            if src >= 0:
                b0, b1 = B[k, i, 0], B[k, i, 1]
                for p in range(m):
                    nxt[i, p] += b0 * du[src, 0, p] + b1 * du[src, 1, p]
        dx, nxt = nxt, dx
        angles[k + 1] = dx[0]
        if k + 1 == strike_index:
            rate[:] = dx[1]
    return angles, rate


@_compile
def _forward_on_basis(A, B, delay, strike_index, phi, angles, rate):
    """:func:`_forward` for the basis columns: muscle A's command ``phi[:, j]`` (column j) and
    muscle B's (column K + j) for every knot j of ``phi`` (N, K), into ``angles`` (N+1, 2K) and
    ``rate`` (2K,). ``phi`` is a hat basis (:class:`~controllers.basis.HatBasis`): each row's
    nonzeros are at most two adjacent knots, moving forward row by row. Columns of knots no
    command has reached yet are exactly zero and are skipped; each row of ``phi`` excites its
    nonzero knots."""
    n, nx, kn = A.shape[0], A.shape[1], phi.shape[1]
    dx = np.zeros((nx, 2 * kn))
    nxt = np.zeros((nx, 2 * kn))
    angles[:] = 0.0
    rate[:] = 0.0
    reached = 0                      # knots 0 .. reached-1 have been excited
    for k in range(n):
        src = k - delay
        if src >= 0:
            for j in range(kn - 1, reached - 1, -1):
                if phi[src, j] != 0.0:
                    reached = j + 1
                    break
        # nxt = A_k dx column by column, the knot index innermost (contiguous, vectorised); the
        # sum over l runs in the same order for every column
        if nx == 4:                  # the regulator-lag prior: one pass over the columns
            a = A[k]
            for side in range(2):
                for j in range(side * kn, side * kn + reached):
                    d0, d1, d2, d3 = dx[0, j], dx[1, j], dx[2, j], dx[3, j]
                    nxt[0, j] = a[0, 0] * d0 + a[0, 1] * d1 + a[0, 2] * d2 + a[0, 3] * d3
                    nxt[1, j] = a[1, 0] * d0 + a[1, 1] * d1 + a[1, 2] * d2 + a[1, 3] * d3
                    nxt[2, j] = a[2, 0] * d0 + a[2, 1] * d1 + a[2, 2] * d2 + a[2, 3] * d3
                    nxt[3, j] = a[3, 0] * d0 + a[3, 1] * d1 + a[3, 2] * d2 + a[3, 3] * d3
        else:
            for i in range(nx):
                for side in range(2):
                    lo = side * kn
                    a0 = A[k, i, 0]
                    for j in range(lo, lo + reached):
                        nxt[i, j] = a0 * dx[0, j]
                    for l in range(1, nx):
                        a1 = A[k, i, l]
                        for j in range(lo, lo + reached):
                            nxt[i, j] += a1 * dx[l, j]
        for i in range(nx):
            if src >= 0:
                b0, b1 = B[k, i, 0], B[k, i, 1]
                for j in range(max(reached - 2, 0), reached):     # a hat row's nonzeros: its last two
                    w = phi[src, j]
                    if w != 0.0:
                        nxt[i, j] += b0 * w
                        nxt[i, kn + j] += b1 * w
        dx, nxt = nxt, dx
        for side in range(2):
            for j in range(side * kn, side * kn + reached):
                angles[k + 1, j] = dx[0, j]
        if k + 1 == strike_index:
            rate[:] = dx[1]
    return angles, rate


@_compile
def _adjoint(A, B, delay, strike_index, w_angle, w_rate):
    """``lambda_k = A_k^T lambda_{k+1} + C_k^T w_k`` backwards; command gradient (N, 2)."""
    n, nx = A.shape[0], A.shape[1]
    lam = np.zeros(nx)
    nxt = np.zeros(nx)
    grad = np.zeros((n, 2))
    for k in range(n, 0, -1):
        lam[0] += w_angle[k]
        if k == strike_index:
            lam[1] += w_rate
        src = k - 1 - delay
        if src >= 0:
            for c in range(2):
                acc = B[k - 1, 0, c] * lam[0]
                for l in range(1, nx):
                    acc += B[k - 1, l, c] * lam[l]
                grad[src, c] = acc
        for i in range(nx):
            acc = A[k - 1, 0, i] * lam[0]
            for l in range(1, nx):
                acc += A[k - 1, l, i] * lam[l]
            nxt[i] = acc
        lam, nxt = nxt, lam
    return grad


@dataclass
class Linearisation:
    """``A`` (N, nx, nx), ``B`` (N, nx, 2) along a trajectory of N control steps; ``delay`` in steps;
    ``strike_index`` the sample whose rate is an output."""

    A: np.ndarray
    B: np.ndarray
    delay: int
    strike_index: int

    @property
    def n_steps(self) -> int:
        """Control steps N (commands); outputs are samples 0..N."""
        return self.A.shape[0]

    def forward(self, du) -> tuple[np.ndarray, np.ndarray]:
        """``G0 du``: angle changes (N+1, ...) and strike-rate change (...) for command changes
        ``du`` (N, 2, ...) (trailing axes are independent columns)."""
        du = np.asarray(du, dtype=float)
        tail = du.shape[2:]
        flat = np.ascontiguousarray(du.reshape(du.shape[0], 2, -1))
        angles, rate = _forward(self.A, self.B, self.delay, self.strike_index, flat)
        return angles.reshape((self.n_steps + 1,) + tail), rate.reshape(tail)

    def forward_on_basis(self, phi, out=None) -> tuple[np.ndarray, np.ndarray]:
        """``G0`` on a profile basis: the :meth:`forward` of the columns ``du[:, 0, j] = phi[:, j]``
        (muscle A, columns 0..K-1) and ``du[:, 1, K + j] = phi[:, j]`` (muscle B) for a basis
        matrix ``phi`` (N', K) with N' >= N, a hat basis (:meth:`controllers.basis.HatBasis.matrix`);
        returns angle rows (N+1, 2K) and the rate row (2K,), written into ``out`` (two C-contiguous
        arrays of those shapes) when given."""
        phi = np.ascontiguousarray(np.asarray(phi, dtype=float)[: self.n_steps])
        p = 2 * phi.shape[1]
        angles, rate = (np.empty((self.n_steps + 1, p)), np.empty(p)) if out is None else out
        if angles.shape != (self.n_steps + 1, p) or rate.shape != (p,) or not angles.flags.c_contiguous:
            raise ValueError(f"out: shapes {angles.shape}, {rate.shape} are not allowed; must be "
                             f"C-contiguous ({self.n_steps + 1}, {p}) and ({p},)")
        _forward_on_basis(self.A, self.B, self.delay, self.strike_index, phi, angles, rate)
        return angles, rate

    def adjoint(self, w_angle, w_rate: float = 0.0) -> np.ndarray:
        """``G0^T w``: command gradient (N, 2) for output weights ``w_angle`` (N+1,) on the angle
        samples and ``w_rate`` on the strike-sample rate."""
        w_angle = np.ascontiguousarray(w_angle, dtype=float)
        return _adjoint(self.A, self.B, self.delay, self.strike_index, w_angle, float(w_rate))


@_compile
def _spools_along(pressures, commands, delay, gain, time_constant, dt, n_sub):
    """Spool openings (N+1, 2) of a valve-flow prior along measured ``pressures`` (N+1, 2) under
    ``commands`` (N, 2) delayed by ``delay`` control steps: RK4 on
    :func:`~muscle_sim.pneumatics.spool_rate` with the pressure interpolated linearly between
    samples, from closed spools at the first sample (a trial starts at rest). Before the first
    command arrives the valves hold the starting pressure (the command before the trial)."""
    n = commands.shape[0]
    out = np.zeros((n + 1, 2))
    h = dt / n_sub
    for k in range(n):
        src = k - delay
        for c in range(2):
            u = commands[src, c] if src >= 0 else pressures[0, c]
            p0, slope = pressures[k, c], (pressures[k + 1, c] - pressures[k, c]) / n_sub
            s = out[k, c]
            for j in range(n_sub):
                pa, pm, pb = p0 + j * slope, p0 + (j + 0.5) * slope, p0 + (j + 1) * slope
                a = spool_rate(s, pa, u, gain, time_constant)
                b = spool_rate(s + 0.5 * h * a, pm, u, gain, time_constant)
                q = spool_rate(s + 0.5 * h * b, pm, u, gain, time_constant)
                r = spool_rate(s + h * q, pb, u, gain, time_constant)
                s = s + h / 6.0 * (a + 2.0 * (b + q) + r)
            out[k + 1, c] = s
    return out


def measured_states(rollout, prior: PlantParams, task) -> np.ndarray:
    """Prior states along a rollout (N+1, :func:`state_size`): measured angle and rate, and
    measured pressures; when the log has no pressures (NaN), the prior's pressure lag driven by
    the logged commands. A valve-flow prior's spool openings follow from those pressures and the
    delayed commands by its spool law."""
    y = np.asarray(rollout.measured, dtype=float)
    pn = prior.pneumatics
    d = steps_of_delay(pn.delay, task.dt)
    x = y[:, :4].copy()
    if not np.all(np.isfinite(x[:, 2:4])):
        p = x[0, 2:4] if np.all(np.isfinite(x[0, 2:4])) else rollout.command[0]
        alpha = 1.0 - np.exp(-task.dt / pn.lag_time_constant)
        for k in range(x.shape[0]):
            x[k, 2:4] = p
            u = rollout.command[max(k - d, 0)]
            p = p + alpha * (np.clip(u, 0.0, pn.supply_pressure) - p)
    if state_size(prior) == 4:
        return x
    commands = np.ascontiguousarray(np.asarray(rollout.command, dtype=float)[: x.shape[0] - 1])
    spools = _spools_along(np.ascontiguousarray(x[:, 2:4]), commands, d, pn.valve_gain, pn.valve_time_constant,
                           task.dt, task.n_substeps)
    return np.hstack([x, spools])


def linearise(prior: PlantParams, states, commands, task, delay_steps: int | None = None) -> Linearisation:
    """Linearise the prior's one-step map at ``states`` (N+1, :func:`state_size` or more columns;
    a full simulated state is cut to the linearised ones) under the delayed ``commands`` (N, 2):
    the exact Jacobians of the prior's one-step map, every sample in one compiled call."""
    nx = state_size(prior)
    states = np.asarray(states, dtype=float)
    if states.ndim != 2 or states.shape[1] < nx:
        raise ValueError(f"states: shape {states.shape} is not allowed; this prior needs (N+1, {nx}) "
                         f"(see measured_states)")
    states = states[:, :nx]
    commands = np.asarray(commands, dtype=float)
    n = commands.shape[0]
    d = steps_of_delay(prior.pneumatics.delay, task.dt) if delay_steps is None else delay_steps
    x = states[:n]
    u = np.vstack([np.repeat(commands[:1], d, axis=0), commands])[:n] if d else commands
    full = np.zeros((n, N_STATE))
    full[:, :nx] = x                 # a regulator-lag prior's spools are inert: closed
    end = np.empty((n, N_STATE))
    jac = np.empty((n, N_STATE, N_STATE + 2))
    step_with_jacobian(full, np.ascontiguousarray(u), pack(prior), task.dt / task.n_substeps, task.n_substeps, nx,
                       end, jac)
    A = np.ascontiguousarray(jac[:, :nx, :nx])
    B = np.ascontiguousarray(jac[:, :nx, N_STATE:])
    return Linearisation(A, B, d, task.strike_index)
