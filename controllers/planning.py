"""Offline swing planning on the PRIOR model: a feedforward profile that meets the strike while
minimising a stated cost under pressure, pressure-rate and joint-angle limits.

Decision variables are the profile's knots (the learner's basis). The prior is simulated for each
candidate and linearised along that trajectory (forward sensitivity passes on the basis), so the
constraint Jacobians are the model's own; scipy's SLSQP solves the problem. When the strike cannot
be met, a second problem finds the highest strike speed the limits allow, which measures the
shortfall.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from muscle_sim.integrate import simulate
from muscle_sim.plant import initial_state
from muscle_sim.simulation import home_pressures
from muscle_sim.threads import single_blas_thread

from .learning import GradientLearner, LearningSettings
from .sensitivity import linearise

OBJECTIVES = ("peak-pressure", "mean-pressure")


@dataclass
class PlanResult:
    """Outcome of a plan, scipy-style, with the profile, the planned swing and the diagnosis."""

    success: bool
    status: int
    message: str
    feasible: bool
    profile: object
    swing: np.ndarray           # planned angle (N+1,) [rad] of the prior model
    strike_angle: float         # reached [rad]
    strike_speed: float         # reached [rad/s]
    objective: str
    objective_value: float
    active_limits: list
    max_strike_speed: float | None
    suggestions: list


class _Model:
    """Prior simulation and basis Jacobian at one knot vector, cached for the optimiser."""

    def __init__(self, setup, learner):
        self.setup, self.learner = setup, learner
        self.task, self.prior = setup.task, setup.prior
        self.hold = np.array(home_pressures(self.prior, self.task))
        self.x0 = initial_state(self.prior, self.task.home_angle, self.hold)
        self._key = None

    def at(self, theta):
        key = np.asarray(theta).tobytes()
        if key != self._key:
            commands = self.learner.basis.expand(theta)
            traj = simulate(self.prior, self.x0, commands, self.task.dt, self.task.n_substeps, u_before=self.hold)
            lin = linearise(self.prior, traj[:, :4], commands, self.task)
            self.traj, (self.g_angle, self.g_rate) = traj, self.learner._columns(lin)
            self._key = key
        return self


@single_blas_thread
def plan(setup, objective: str = "peak-pressure", max_pressure_rate: float | None = None,
         max_iterations: int = 150) -> PlanResult:
    """Plan the strike of ``setup`` on its prior model (see the module docstring)."""
    from scipy.optimize import minimize

    from .feedforward import model_only_profile

    if objective not in OBJECTIVES:
        raise ValueError(f"objective: {objective!r} is not allowed; must be one of {', '.join(OBJECTIVES)}")
    task = setup.task
    settings = LearningSettings.from_config(setup.config)
    learner = GradientLearner(setup, settings)
    model = _Model(setup, learner)
    P, K = learner.basis.n_params, learner.basis.n_knots
    theta0 = np.asarray(learner.initial_state(model_only_profile(setup)).theta)
    k_s = task.strike_index
    t = np.arange(task.n_steps + 1) * task.dt
    late = t >= task.settle_time - 1e-12
    every = np.zeros(t.size, dtype=bool)
    every[:: max(1, int(round(0.004 / task.dt)))] = True   # angle limits checked every 4 ms
    scale_p = 1e5                              # optimise in bar for conditioning

    def unpack(z):
        return z[:P] * scale_p, z[P]

    def cost(z):
        theta, peak = unpack(z)
        if objective == "peak-pressure":
            return peak
        return float(np.mean(theta)) / scale_p

    def cost_jac(z):
        g = np.zeros(P + 1)
        if objective == "peak-pressure":
            g[P] = 1.0
        else:
            g[:P] = 1.0 / P
        return g

    def eq(z, speed_target):
        m = model.at(unpack(z)[0])
        return np.array([m.traj[k_s, 0] - task.strike_angle, (m.traj[k_s, 1] - speed_target) / 10.0])

    def eq_jac(z):
        m = model.at(unpack(z)[0])
        jac = np.zeros((2, P + 1))
        jac[0, :P] = m.g_angle[k_s] * scale_p
        jac[1, :P] = m.g_rate * scale_p / 10.0
        return jac

    low, high = learner.angle_low, learner.angle_high
    tol = task.settle_tolerance

    def ineq(z):
        theta, peak = unpack(z)
        m = model.at(theta)
        q = m.traj[:, 0]
        parts = [q[every] - low, high - q[every], tol - (q[late] - task.home_angle), tol + (q[late] - task.home_angle),
                 peak - theta / scale_p]
        if max_pressure_rate is not None:
            step = max_pressure_rate * (t[-1] - 0) / (K - 1) / scale_p
            d = np.diff(theta.reshape(2, K), axis=1).ravel() / scale_p
            parts += [step - d, step + d]
        return np.concatenate(parts)

    def ineq_jac(z):
        theta, _ = unpack(z)
        m = model.at(theta)
        G = m.g_angle * scale_p
        Ge = G[every]
        rows = [np.hstack([Ge, np.zeros((Ge.shape[0], 1))]), np.hstack([-Ge, np.zeros((Ge.shape[0], 1))]),
                np.hstack([-G[late], np.zeros((late.sum(), 1))]), np.hstack([G[late], np.zeros((late.sum(), 1))]),
                np.hstack([-np.eye(P), np.ones((P, 1))])]
        if max_pressure_rate is not None:
            D = np.zeros((2 * (K - 1), P))
            for b in range(2):
                for j in range(K - 1):
                    D[b * (K - 1) + j, b * K + j] = -1.0
                    D[b * (K - 1) + j, b * K + j + 1] = 1.0
            rows += [np.hstack([-D, np.zeros((D.shape[0], 1))]), np.hstack([D, np.zeros((D.shape[0], 1))])]
        return np.vstack(rows)

    bounds = [(learner.p_low / scale_p, learner.p_high / scale_p)] * P + [(0.0, learner.p_high / scale_p)]
    z0 = np.concatenate([theta0 / scale_p, [theta0.max() / scale_p]])

    def solve(speed_target, fun, jac, z_start):
        cons = [{"type": "eq", "fun": lambda z: eq(z, speed_target), "jac": eq_jac},
                {"type": "ineq", "fun": ineq, "jac": ineq_jac}]
        return minimize(fun, z_start, jac=jac, bounds=bounds, constraints=cons, method="SLSQP",
                        options={"maxiter": max_iterations, "ftol": 1e-9})

    res = solve(task.strike_speed, cost, cost_jac, z0)
    theta, _ = unpack(res.x)
    m = model.at(theta)
    violation = max(float(np.max(np.abs(eq(res.x, task.strike_speed)))), float(-min(ineq(res.x).min(), 0.0)))
    feasible = violation < 1e-3
    max_speed = None
    suggestions = []
    if not feasible:
        # how fast can the strike be within the limits? maximise the strike speed at the strike angle
        def neg_speed(z):
            return -model.at(unpack(z)[0]).traj[k_s, 1]

        def neg_speed_jac(z):
            g = np.zeros(P + 1)
            g[:P] = -model.at(unpack(z)[0]).g_rate * scale_p
            return g

        cons = [{"type": "eq", "fun": lambda z: eq(z, task.strike_speed)[:1], "jac": lambda z: eq_jac(z)[:1]},
                {"type": "ineq", "fun": ineq, "jac": ineq_jac}]
        fast = minimize(neg_speed, res.x, jac=neg_speed_jac, bounds=bounds, constraints=cons, method="SLSQP",
                        options={"maxiter": max_iterations, "ftol": 1e-9})
        max_speed = float(-neg_speed(fast.x))
    active = _active_limits(theta, m.traj[:, 0], learner, task, late, max_pressure_rate, K)
    if not feasible:
        if "pressure at its upper limit" in " ".join(active):
            suggestions.append("more force: a higher supply (within the rated pressure) or a larger muscle "
                               "radius (force grows with r0^2)")
        if any("angle" in a for a in active):
            suggestions.append("more travel: a smaller pulley radius (more angle per contraction) or a smaller "
                               "follow-through")
        suggestions.append("a larger pulley radius gives more torque per newton, at the cost of travel")
    profile = learner.profile(theta, planned=True, objective=objective)
    msg = ("strike met within the limits" + ("" if res.success else f"; optimiser stopped: {res.message}")) \
        if feasible else (f"strike not met within the limits: best violation {violation:.3g}; "
                                        f"highest reachable strike speed {max_speed:.3g} rad/s of "
                                        f"{task.strike_speed:g} rad/s")
    return PlanResult(feasible, int(res.status), str(msg), feasible, profile, m.traj[:, 0].copy(),
                      float(m.traj[k_s, 0]), float(m.traj[k_s, 1]), objective, float(cost(res.x)), active,
                      max_speed, suggestions)


def _active_limits(theta, q, learner, task, late, max_rate, K) -> list:
    out = []
    tol_p = 0.5e3
    if np.any(theta >= learner.p_high - tol_p):
        out.append(f"pressure at its upper limit ({learner.p_high / 1e5:g} bar) on {int(np.sum(theta >= learner.p_high - tol_p))} knots")
    if np.any(theta <= learner.p_low + tol_p):
        out.append(f"pressure at its lower limit ({learner.p_low / 1e5:g} bar) on {int(np.sum(theta <= learner.p_low + tol_p))} knots")
    if q.max() >= learner.angle_high - 1e-3:
        out.append(f"joint angle at its upper limit ({np.degrees(learner.angle_high):.1f} deg)")
    if q.min() <= learner.angle_low + 1e-3:
        out.append(f"joint angle at its lower limit ({np.degrees(learner.angle_low):.1f} deg)")
    if np.any(np.abs(q[late] - task.home_angle) >= task.settle_tolerance - 1e-4):
        out.append("settling band at home")
    if max_rate is not None:
        step = max_rate * task.trial_length / (K - 1)
        if np.any(np.abs(np.diff(theta.reshape(2, K), axis=1)) >= step - tol_p):
            out.append(f"pressure rate at its limit ({max_rate / 1e5:g} bar/s)")
    return out


