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

#: What "the strike is met within the limits" means, checked on every sample of the planned swing
#: (the optimiser sees the angle limits every 4 ms only): strike angle [rad] and speed [rad/s] of
#: the prior, the angle limits and the settling band [rad], the pressure box and rate limit [Pa].
STRIKE_ANGLE_TOLERANCE = 1e-3
STRIKE_SPEED_TOLERANCE = 1e-2
ANGLE_TOLERANCE = 1e-3
PRESSURE_TOLERANCE = 100.0

#: Plan outcomes; ``success`` (the plan meets the strike within the limits) for 0 and 1.
PLAN_STATUS = {
    0: "strike met within the limits",
    1: "strike met within the limits; the optimiser stopped before converging, so the cost may not be the least",
    2: "strike not met within the limits",
}


@dataclass
class PlanResult:
    """Outcome of a plan, scipy-style, with the profile, the planned swing and the diagnosis.

    ``success``: the prior, driven by the planned profile, meets the strike angle and speed and
    stays within every limit at every sample, to the tolerances above; ``misses`` says what
    falls short otherwise."""

    success: bool
    status: int
    message: str
    misses: list
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
    rate_step = None if max_pressure_rate is None else max_pressure_rate * t[-1] / (K - 1)
    misses = _misses(theta, m.traj, learner, task, late, rate_step, K)
    max_speed = None
    suggestions = []
    if misses:
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
    if misses:
        if "pressure at its upper limit" in " ".join(active):
            suggestions.append("more force: a higher supply (within the rated pressure) or a larger muscle "
                               "radius (force grows with r0^2)")
        if any("angle" in a for a in active):
            suggestions.append("more travel: a smaller pulley radius (more angle per contraction) or a smaller "
                               "follow-through")
        suggestions.append("a larger pulley radius gives more torque per newton, at the cost of travel")
    profile = learner.profile(theta, planned=True, objective=objective)
    status = 2 if misses else (0 if res.success else 1)
    msg = PLAN_STATUS[status] + (f" ({res.message})" if status == 1 else "")
    if misses:
        msg += (f": {'; '.join(misses)}; highest reachable strike speed {max_speed:.3g} rad/s of "
                f"{task.strike_speed:g} rad/s")
    return PlanResult(status < 2, status, msg, misses, profile, m.traj[:, 0].copy(),
                      float(m.traj[k_s, 0]), float(m.traj[k_s, 1]), objective, float(cost(res.x)), active,
                      max_speed, suggestions)


def _misses(theta, traj, learner, task, late, rate_step, K) -> list:
    """What the planned swing ``traj`` of knots ``theta`` misses beyond the tolerances: the strike
    angle and speed at the strike sample, the angle limits at every sample, the settling band from
    ``task.settle_time``, the pressure box and the knot-to-knot rate step ``rate_step`` [Pa]."""
    out = []
    k = task.strike_index
    q = traj[:, 0]
    if abs(traj[k, 0] - task.strike_angle) > STRIKE_ANGLE_TOLERANCE:
        out.append(f"strike angle {np.degrees(traj[k, 0]):.3f} deg of {np.degrees(task.strike_angle):g} deg")
    if abs(traj[k, 1] - task.strike_speed) > STRIKE_SPEED_TOLERANCE:
        out.append(f"strike speed {traj[k, 1]:.3g} rad/s of {task.strike_speed:g} rad/s")
    if q.max() > learner.angle_high + ANGLE_TOLERANCE or q.min() < learner.angle_low - ANGLE_TOLERANCE:
        out.append(f"joint angle {np.degrees(q.min()):.1f} .. {np.degrees(q.max()):.1f} deg outside "
                   f"{np.degrees(learner.angle_low):.1f} .. {np.degrees(learner.angle_high):.1f} deg")
    if np.any(np.abs(q[late] - task.home_angle) > task.settle_tolerance + ANGLE_TOLERANCE):
        out.append(f"not settled within {np.degrees(task.settle_tolerance):g} deg of home from "
                   f"{task.settle_time * 1e3:g} ms")
    if theta.min() < learner.p_low - PRESSURE_TOLERANCE or theta.max() > learner.p_high + PRESSURE_TOLERANCE:
        out.append("pressure outside its limits")
    if rate_step is not None and np.max(np.abs(np.diff(theta.reshape(2, K), axis=1))) > rate_step + PRESSURE_TOLERANCE:
        out.append("pressure rate above its limit")
    return out


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


