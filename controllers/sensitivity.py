"""Linearisation of the PRIOR model along a measured trajectory: forward sensitivity (G0 v) and
adjoint (G0^T w) passes, O(N) each.

The prior's one-control-step map ``x_{k+1} = f(x_k, u_{k-d})`` (RK4 on the prior's right-hand
side, ``d`` its command delay in control steps) is linearised at the MEASURED states
``x_k = [angle, rate, p_a, p_b]`` of a trial: ``A_k = df/dx``, ``B_k = df/du`` by central
differences of that one-step map, all samples in one batched call. The lifted map from commands
to outputs (angle at every sample, rate at the strike sample) then has the Jacobian ``G0`` whose
products are computed by a forward and a backward recursion (physics.md section 4).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from muscle_sim.integrate import delay_substeps, rk4_step
from muscle_sim.params import PlantParams

_NX = 4  # angle, rate, p_a, p_b (the prior's spool states are inert)
_STEP = np.array([1e-6, 1e-5, 1.0, 1.0])  # central-difference steps [rad, rad/s, Pa, Pa]
_STEP_U = 1.0                            # [Pa]


def _one_step(prior: PlantParams, x4, u, dt: float, n_sub: int):
    """The prior's map over one control step for states (M, 4) and constant commands (M, 2)."""
    x = np.zeros((x4.shape[0], 6))
    x[:, :4] = x4
    h = dt / n_sub
    for _ in range(n_sub):
        x = rk4_step(0.0, x, u, h, prior)
    return x[:, :4]


@dataclass
class Linearisation:
    """``A`` (N, 4, 4), ``B`` (N, 4, 2) along a trajectory of N control steps; ``delay`` in steps;
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
        dx = np.zeros((_NX,) + tail)
        angles = np.zeros((self.n_steps + 1,) + tail)
        rate = np.zeros(tail)
        flat = du.reshape(du.shape[0], 2, -1)
        dx = dx.reshape(_NX, -1)
        for k in range(self.n_steps):
            src = k - self.delay
            dx = self.A[k] @ dx
            if src >= 0:
                dx = dx + self.B[k] @ flat[src]
            angles[k + 1] = dx[0].reshape(tail)
            if k + 1 == self.strike_index:
                rate = dx[1].reshape(tail).copy()
        return angles, rate

    def adjoint(self, w_angle, w_rate: float = 0.0) -> np.ndarray:
        """``G0^T w``: command gradient (N, 2) for output weights ``w_angle`` (N+1,) on the angle
        samples and ``w_rate`` on the strike-sample rate."""
        w_angle = np.asarray(w_angle, dtype=float)
        lam = np.zeros(_NX)
        grad = np.zeros((self.n_steps, 2))
        for k in range(self.n_steps, 0, -1):
            lam[0] += w_angle[k]
            if k == self.strike_index:
                lam[1] += w_rate
            src = k - 1 - self.delay
            if src >= 0:
                grad[src] = self.B[k - 1].T @ lam
            lam = self.A[k - 1].T @ lam
        return grad


def measured_states(rollout, prior: PlantParams, task) -> np.ndarray:
    """Prior states along a rollout: measured angle and rate, and measured pressures; when the
    log has no pressures (NaN), the prior's pressure lag driven by the logged commands."""
    y = np.asarray(rollout.measured, dtype=float)
    x = y[:, :4].copy()
    if not np.all(np.isfinite(x[:, 2:4])):
        pn = prior.pneumatics
        d = int(round(pn.delay / task.dt))
        p = x[0, 2:4] if np.all(np.isfinite(x[0, 2:4])) else rollout.command[0]
        alpha = 1.0 - np.exp(-task.dt / pn.lag_time_constant)
        for k in range(x.shape[0]):
            x[k, 2:4] = p
            u = rollout.command[max(k - d, 0)]
            p = p + alpha * (np.clip(u, 0.0, pn.supply_pressure) - p)
    return x


def linearise(prior: PlantParams, states, commands, task, delay_steps: int | None = None) -> Linearisation:
    """Linearise the prior's one-step map at ``states`` (N+1, 4) under the delayed ``commands``
    (N, 2): central differences, every sample and direction in one batched RK4 call."""
    states = np.asarray(states, dtype=float)
    commands = np.asarray(commands, dtype=float)
    n = commands.shape[0]
    d = (delay_substeps(prior, task.dt, task.n_substeps) + task.n_substeps // 2) // task.n_substeps \
        if delay_steps is None else delay_steps
    x = states[:n]
    u = np.vstack([np.repeat(commands[:1], d, axis=0), commands])[:n] if d else commands
    m = 2 * (_NX + 2)
    X = np.repeat(x[:, None, :], m, axis=1)
    U = np.repeat(u[:, None, :], m, axis=1)
    for i in range(_NX):
        X[:, 2 * i, i] += _STEP[i]
        X[:, 2 * i + 1, i] -= _STEP[i]
    for i in range(2):
        U[:, 2 * (_NX + i), i] += _STEP_U
        U[:, 2 * (_NX + i) + 1, i] -= _STEP_U
    out = _one_step(prior, X.reshape(-1, _NX), U.reshape(-1, 2), task.dt, task.n_substeps).reshape(n, m, _NX)
    A = np.empty((n, _NX, _NX))
    B = np.empty((n, _NX, 2))
    for i in range(_NX):
        A[:, :, i] = (out[:, 2 * i] - out[:, 2 * i + 1]) / (2 * _STEP[i])
    for i in range(2):
        B[:, :, i] = (out[:, 2 * (_NX + i)] - out[:, 2 * (_NX + i) + 1]) / (2 * _STEP_U)
    return Linearisation(A, B, d, task.strike_index)
