"""Model-free baseline: SPSA over the same profile knots, two trials per gradient estimate.

Simultaneous perturbation stochastic approximation (Spall 1992, IEEE Trans. Autom. Control 37(3));
gains ``a_k = a / (A + k + 1)^0.602``, ``c_k = c / (k + 1)^0.101`` with ``A`` about 10 % of the
iteration budget (Spall 1998, IEEE Trans. Aerosp. Electron. Syst. 34(3)). Each estimate costs two
trials, ``theta + c_k Delta`` and ``theta - c_k Delta`` with a Rademacher ``Delta``; every trial is
counted.
"""
from __future__ import annotations

import numpy as np

from .learning import GradientLearner, LearnerState, UpdateResult

ALPHA, GAMMA = 0.602, 0.101


class SPSALearner(GradientLearner):
    """SPSA on the knots of the profile; uses the prior model for nothing but the start profile."""

    def __init__(self, setup, settings, budget_trials: int = 40, seed: int = 0):
        super().__init__(setup, settings)
        self.iterations = max(1, budget_trials // 2)
        self.A = 0.1 * self.iterations
        self.seed = seed

    def initial_state(self, start):
        base = super().initial_state(start)
        theta = np.asarray(base.theta)
        extra = {"center": base.theta, "k": 0, "phase": "plus", "delta": None, "cost_plus": None, "a": None}
        return self._perturbed(LearnerState(theta=theta.tolist(), extra=extra), +1)

    def _delta(self, k: int) -> np.ndarray:
        rng = np.random.default_rng([self.seed, 7919, k])
        return rng.choice([-1.0, 1.0], size=self.basis.n_params)

    def _c(self, k: int) -> float:
        return self.settings.spsa_perturbation / (k + 1) ** GAMMA

    def _perturbed(self, state: LearnerState, sign: int) -> LearnerState:
        ex = dict(state.extra)
        k = ex["k"]
        delta = self._delta(k)
        ex["delta"] = delta.tolist()
        ex["phase"] = "plus" if sign > 0 else "minus"
        theta = np.clip(np.asarray(ex["center"]) + sign * self._c(k) * delta, self.p_low, self.p_high)
        return LearnerState(theta=theta.tolist(), best_theta=state.best_theta, best_cost=state.best_cost,
                            step_scale=state.step_scale, trial=state.trial, extra=ex)

    def update(self, rollout, profile, state: LearnerState):
        cost = self.objective.cost(rollout)
        ex = dict(state.extra)
        best_theta, best_cost = state.best_theta, state.best_cost
        if best_cost is None or cost < best_cost:
            best_theta, best_cost = list(state.theta), cost
        if ex["phase"] == "plus":
            ex["cost_plus"] = cost
            nxt = LearnerState(theta=state.theta, best_theta=best_theta, best_cost=best_cost,
                               trial=state.trial + 1, extra=ex)
            nxt = self._perturbed(nxt, -1)
            result = UpdateResult(True, 0, "measured theta + c Delta; next: theta - c Delta", cost, cost, 0.0, 0,
                                  1.0, True)
            return self.profile(nxt.theta), nxt, result
        k = ex["k"]
        delta = np.asarray(ex["delta"])
        ghat = (ex["cost_plus"] - cost) / (2.0 * self._c(k)) * delta   # 1/Delta_i = Delta_i for +-1
        if ex["a"] is None:   # Spall 1998: choose a so that the first step has the wanted size
            size = float(np.max(np.abs(ghat)))
            ex["a"] = self.settings.spsa_step * (self.A + 1) ** ALPHA / size if size > 0 else 0.0
        a_k = ex["a"] / (self.A + k + 1) ** ALPHA
        center = np.clip(np.asarray(ex["center"]) - a_k * ghat, self.p_low, self.p_high)
        ex.update(center=center.tolist(), k=k + 1)
        nxt = LearnerState(theta=center.tolist(), best_theta=best_theta, best_cost=best_cost,
                           trial=state.trial + 1, extra=ex)
        nxt = self._perturbed(nxt, +1)
        result = UpdateResult(True, 0, "SPSA step applied; next: theta + c Delta", cost, cost,
                              float(np.max(np.abs(a_k * ghat))) / 1e3, 0, 1.0, True)
        return self.profile(nxt.theta), nxt, result

