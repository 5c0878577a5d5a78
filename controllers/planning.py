"""Offline swing planning on the PRIOR model: a feedforward profile that meets the strike while
minimising a stated cost under pressure, pressure-rate and joint-angle limits, and, where no
profile can, the fastest strike the limits allow at the strike angle.

Formulation. The decision variables are the profile's knots (the learner's hat basis,
:mod:`controllers.basis`) in bar; the first knot of each muscle is pinned to the prior's home
pressures, which is where the plant starts a trial. The cost is the stated one (peak pressure as
an epigraph variable, or the mean pressure) plus a small pull of every knot toward the home
pressures (:data:`REGULARISATION`), which makes the optimum unique where the cost alone leaves
knots free. Equalities: strike angle [deg] and speed [rad/s] at the strike sample. Inequalities,
in degrees and bar: the angle inside the stops less ``learning.angle_margin`` at every sample,
within the settling band of home from ``task.settle_time``, and the knot-to-knot pressure rate.
Angle rows far from their limit (:data:`SCREEN_ANGLE`) are left out of a round and checked after
every iterate; a round stopped by such a row violated is repeated with it from the last iterate
that kept every row (constraint screening), so the rows the optimiser sees are few and the limits
hold at every sample. The linear rows (peak epigraph, pressure rate) always take part. The start
is the least-squares fit of the model-only feedforward on the planning knots.

Gradients are the prior's own: the trajectory is simulated by the compiled kernel and linearised
along itself (:func:`controllers.sensitivity.linearise`, one batched call per knot vector), and
the forward sensitivity pass on the basis gives the Jacobian of the angle at every sample and the
strike rate with respect to every knot; the Jacobian is computed only where scipy's SLSQP (Kraft
1988, DFVLR-FB 88-28, sequential least squares) asks for one, not at line-search points.

``success`` means converged: SLSQP stopped on its own test, no screened-out row is violated, the
first-order (KKT) residual of the full problem, with multipliers fitted by bounded least squares
(Nocedal & Wright 2006, Numerical Optimization, 2nd ed., Theorem 12.1), is within
:data:`OPTIMALITY_TOLERANCE`, and the profile, simulated on the prior, meets the strike and every
limit at every sample. The limits with nonzero multipliers are the active ones, each with what
relaxing it by one unit is worth (the multiplier). When the strike is out of reach the fallback
problem maximises the strike speed at the strike angle, started inside the limits (where the main
problem stopped, if it kept them, else the model-only feedforward of a slower strike); its
profile is simulated on the prior and reported only with what that simulation reaches.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from muscle_sim.errors import DataError, SimulationDiverged
from muscle_sim.integrate import simulate
from muscle_sim.plant import initial_state
from muscle_sim.simulation import home_pressures
from muscle_sim.threads import single_blas_thread

from .learning import GradientLearner, LearningSettings
from .sensitivity import linearise

OBJECTIVES = ("peak-pressure", "mean-pressure")

#: What "the strike is met within the limits" means, checked on every sample of the planned swing
#: simulated on the prior: strike angle [rad] and speed [rad/s], the angle limits and the settling
#: band [rad], the pressure box and rate limit [Pa].
STRIKE_ANGLE_TOLERANCE = 1e-3
STRIKE_SPEED_TOLERANCE = 1e-2
ANGLE_TOLERANCE = 1e-3
PRESSURE_TOLERANCE = 100.0

#: First-order optimality: largest component of the KKT residual (gradient of the cost minus the
#: fitted multipliers times the constraint gradients), per bar of a knot, in units of the cost
#: (bar for peak and mean pressure; the strike speed over its target for the fallback).
OPTIMALITY_TOLERANCE = 1e-4
#: Feasibility in the optimality test [deg, rad/s, bar]: equalities within it, inequality rows no
#: further than it past their limit, and rows within it of their limit counted as active (their
#: multiplier times their slack, the complementarity, enters the residual). SLSQP holds nearly
#: active rows of a light paddle's late swing a few 1e-5 deg off their limit while it iterates.
FEASIBILITY_TOLERANCE = 1e-4
#: Weight of the pull toward the home pressures: the cost gains ``R/2 mean(((theta -
#: theta_home) / 1 bar)^2)``, at most 1.8 bar for knots 6 bar away (derived).
REGULARISATION = 1e-1
#: The same pull in the fallback, where the cost is the strike speed over its target.
FALLBACK_REGULARISATION = 1e-4
#: Spacing of the planning knots [s]: every few knots of the learner's basis, the learner's
#: knots between them interpolated linearly (SLSQP's subproblem grows with the cube of the
#: variables; the prior's pressure lag, 15 ms on the demo, smooths finer detail anyway).
PLAN_KNOT_SPACING = 0.016
#: Angle rows with more slack than this at the start of a round are left out of it.
SCREEN_ANGLE = math.radians(10.0)
#: Screening rounds before the plan gives up on closing the row set.
MAX_ROUNDS = 6
#: SLSQP's accuracy goal (on the cost and on the constraint values in deg, rad/s and bar).
SLSQP_ACCURACY = 1e-10
_BAR = 1e5
_DEG = math.pi / 180.0

#: Plan outcomes; ``success`` for 0 only.
PLAN_STATUS = {
    0: "converged: the strike is met within the limits at the least cost",
    1: "not converged: the profile meets the strike within the limits, but the optimiser stopped before "
       "its optimality test passed, so the cost may not be the least",
    2: "the strike cannot be met within the limits",
    3: "not converged: no profile meeting the strike within the limits was found",
}


@dataclass
class PlanResult:
    """Outcome of a plan, scipy-style, with the profile, the planned swing and the diagnosis.

    ``success``: converged (see the module docstring) and the prior, driven by ``profile``, meets
    the strike and every limit at every sample. ``misses`` says what the main problem's profile
    falls short of otherwise. When the strike is out of reach (``status`` 2 or 3 with a verified
    fallback) ``profile`` and ``swing`` are the fallback's: the fastest strike at the strike
    angle within the limits, simulated on the prior (``fallback`` holds its numbers)."""

    success: bool
    status: int
    message: str
    misses: list
    profile: object
    swing: np.ndarray           # planned angle (N+1,) [rad] of the prior model (the tuning reference)
    strike_angle: float         # reached [rad]
    strike_speed: float         # reached [rad/s]
    objective: str
    objective_value: float
    active_limits: list
    max_strike_speed: float | None
    suggestions: list
    converged: bool = False
    optimality: float = math.inf
    iterations: int = 0
    simulations: int = 0
    linearisations: int = 0
    home_pressures: tuple = ()   # commands holding home [Pa] (the profile's first row)
    home_pressure: float = 0.0   # co-contraction at home [Pa] (task.home_pressure)
    binding_limit: str | None = None
    fallback: dict | None = None
    optimiser_message: str = ""
    max_iterations: int = 0      # iteration budget of each problem (main, fallback)


class _Prior:
    """The prior's swing at one knot vector and, on request, its Jacobian on the basis (cached)."""

    def __init__(self, setup, basis, hold):
        self.prior, self.task, self.basis = setup.prior, setup.task, basis
        self.phi = basis.matrix()
        self.hold = np.asarray(hold, dtype=float)
        self.x0 = initial_state(self.prior, self.task.home_angle, self.hold)
        self._key = self._jac_key = None
        self.simulations = self.linearisations = 0

    def swing(self, theta) -> np.ndarray:
        """Prior trajectory (N+1, 6) for knots ``theta`` [Pa] (NaN where it diverged)."""
        key = theta.tobytes()
        if key != self._key:
            self._commands = self.basis.expand(theta)
            try:
                self._traj = simulate(self.prior, self.x0, self._commands, self.task.dt, self.task.n_substeps,
                                      u_before=self.hold)
            except SimulationDiverged:
                self._traj = np.full((self.task.n_steps + 1, 6), np.nan)
            self._key = key
            self.simulations += 1
        return self._traj

    def jacobian(self, theta):
        """``(G_angle (N+1, P), g_rate (P,))``: angle at every sample and strike-sample rate per
        knot [rad/Pa, rad/s/Pa], from the prior linearised along its own swing."""
        traj = self.swing(theta)
        if self._jac_key != self._key:
            lin = linearise(self.prior, traj, self._commands, self.task)
            self._jac = lin.forward_on_basis(self.phi)
            self._jac_key = self._key
            self.linearisations += 1
        return self._jac


@dataclass
class _Rows:
    """Inequality rows ``c(z) >= 0`` of one problem at one point, full set: values, Jacobian
    (on z) and, per row, its family and index (sample or knot)."""

    values: np.ndarray
    jac: np.ndarray
    family: np.ndarray
    index: np.ndarray


@dataclass
class _Solve:
    z: np.ndarray
    converged: bool
    optimality: float
    iterations: int
    message: str
    multipliers: dict = field(default_factory=dict)     # family -> [(index, multiplier)]


class _Grid:
    """The planning knots: every ``step``-th knot of the learner's basis (and its last), with the
    learner's knots between them interpolated linearly, so a planned profile is a profile on the
    learner's basis; the first knot of each muscle is pinned to the home pressures."""

    def __init__(self, n_knots: int, step: int, home):
        sel = np.unique(np.r_[np.arange(0, n_knots, max(1, step)), n_knots - 1])
        T = np.zeros((n_knots, sel.size))
        for j in range(sel.size - 1):
            a, b = sel[j], sel[j + 1]
            w = (np.arange(a, b + 1) - a) / (b - a)
            T[a:b + 1, j] = 1.0 - w
            T[a:b + 1, j + 1] = w
        self.K, self.Kc, self.sel = n_knots, sel.size, sel
        self.T = np.kron(np.eye(2), T)                        # (2K, 2Kc): learner knots of planning knots
        self.span = np.diff(sel).astype(float)                # learner intervals per planning interval
        self.home = np.repeat(np.asarray(home, dtype=float) / _BAR, self.Kc)   # [bar]
        self.free = np.ones(2 * self.Kc, dtype=bool)
        self.free[[0, self.Kc]] = False
        # rate rows: (c_{j+1} - c_j) / span_j [bar per learner interval], both muscles
        n = self.Kc - 1
        D = np.zeros((2 * n, 2 * self.Kc))
        for b in range(2):
            for j in range(n):
                D[b * n + j, b * self.Kc + j] = -1.0 / self.span[j]
                D[b * n + j, b * self.Kc + j + 1] = 1.0 / self.span[j]
        self.D = D

    def coarse(self, theta) -> np.ndarray:
        """Planning knot values [bar] closest to learner knots ``theta`` [Pa] in least squares, the
        pinned knots at home (exact for a profile on the planning grid). Sampling ``theta`` at the
        planning knots instead drops the detail between them, which on a fast strike moves the
        prior's swing by several degrees and past the angle limits."""
        theta = np.asarray(theta, dtype=float).reshape(-1) / _BAR
        c = self.home.copy()
        rhs = theta - self.T[:, ~self.free] @ c[~self.free]
        c[self.free] = np.linalg.lstsq(self.T[:, self.free], rhs, rcond=None)[0]
        return c


class _Problem:
    """One planning problem on the free planning knots [bar] (and the peak variable): cost,
    strike equalities, screened inequality rows, solved by SLSQP in rounds, with its own KKT check."""

    def __init__(self, model, learner, task, grid: _Grid, kind, regularisation, rate_step):
        self.model, self.learner, self.task, self.grid = model, learner, task, grid
        self.kind = kind
        self.free = grid.free
        self.nf = int(grid.free.sum())
        self.peak = kind == "peak-pressure"
        self.nz = self.nf + (1 if self.peak else 0)
        self.reg = regularisation
        self.rate_step = rate_step
        self.dtheta = grid.T[:, grid.free] * _BAR              # d theta / d z [Pa per bar]
        n = task.n_steps
        t = np.arange(n + 1) * task.dt
        self.samples = np.arange(1, n + 1)
        self.late = np.nonzero(t >= task.settle_time - 1e-12)[0]
        self.D = grid.D[:, grid.free]
        lb = np.full(self.nz, learner.p_low / _BAR)
        ub = np.full(self.nz, learner.p_high / _BAR)
        if self.peak:
            lb[-1] = 0.0
        self.bounds = list(zip(lb, ub))
        self.lb, self.ub = lb, ub

    # -- variables -----------------------------------------------------------------------------
    def knots(self, z) -> np.ndarray:
        """All planning knots [bar] (the pinned ones at home)."""
        c = self.grid.home.copy()
        c[self.free] = np.asarray(z[: self.nf])
        return c

    def theta(self, z) -> np.ndarray:
        """The learner's knots [Pa] of ``z``."""
        return self.grid.T @ self.knots(z) * _BAR

    def z_of(self, theta, peak=None) -> np.ndarray:
        c = self.grid.coarse(theta)
        z = c[self.free]
        if self.peak:
            z = np.concatenate([z, [np.max(c) if peak is None else peak]])
        return np.clip(z, self.lb, self.ub)

    # -- cost ----------------------------------------------------------------------------------
    def cost(self, z) -> float:
        dev = self.knots(z) - self.grid.home
        reg = 0.5 * self.reg * float(np.mean(dev * dev))
        if self.kind == "peak-pressure":
            return float(z[-1]) + reg
        if self.kind == "mean-pressure":
            return float(np.mean(self.theta(z))) / _BAR + reg
        traj = self.model.swing(self.theta(z))                      # "fastest": - v / v*
        return -float(traj[self.task.strike_index, 1]) / self.task.strike_speed + reg

    def cost_grad(self, z) -> np.ndarray:
        c = self.knots(z)
        g = np.zeros(self.nz)
        g_z = self.reg * (c - self.grid.home)[self.free] / c.size
        if self.kind == "peak-pressure":
            g[-1] = 1.0
        elif self.kind == "mean-pressure":
            g_z = g_z + self.dtheta.mean(axis=0) / _BAR
        else:
            g_z = g_z - (self.model.jacobian(self.theta(z))[1] @ self.dtheta) / self.task.strike_speed
        g[: self.nf] = g_z
        return g

    # -- strike equalities ---------------------------------------------------------------------
    def equalities(self, z) -> np.ndarray:
        traj = self.model.swing(self.theta(z))
        k = self.task.strike_index
        out = [(traj[k, 0] - self.task.strike_angle) / _DEG]
        if self.kind != "fastest":
            out.append(traj[k, 1] - self.task.strike_speed)
        return np.array(out)

    def equalities_jac(self, z) -> np.ndarray:
        G, g_rate = self.model.jacobian(self.theta(z))
        k = self.task.strike_index
        rows = [G[k] @ self.dtheta / _DEG]
        if self.kind != "fastest":
            rows.append(g_rate @ self.dtheta)
        jac = np.zeros((len(rows), self.nz))
        jac[:, : self.nf] = np.array(rows)
        return jac

    # -- inequality rows -----------------------------------------------------------------------
    def rows(self, z, with_jac: bool) -> _Rows:
        theta = self.theta(z)
        q = self.model.swing(theta)[:, 0]
        lr = self.learner
        home, tol = self.task.home_angle, self.task.settle_tolerance
        s, late = self.samples, self.late
        values = [(q[s] - lr.angle_low) / _DEG, (lr.angle_high - q[s]) / _DEG,
                  (tol - (q[late] - home)) / _DEG, (tol + (q[late] - home)) / _DEG]
        family = [np.full(s.size, 0), np.full(s.size, 1), np.full(late.size, 2), np.full(late.size, 3)]
        index = [s, s, late, late]
        knots = np.nonzero(self.free)[0]
        if self.peak:
            values.append(z[-1] - z[: self.nf])
            family.append(np.full(knots.size, 4))
            index.append(knots)
        if self.rate_step is not None:
            d = self.grid.D @ self.knots(z)
            step = self.rate_step / _BAR
            values += [step - d, step + d]
            family += [np.full(d.size, 5), np.full(d.size, 6)]
            index += [np.arange(d.size)] * 2
        jac = None
        if with_jac:
            G = self.model.jacobian(theta)[0] @ self.dtheta / _DEG
            blocks = [G[s], -G[s], -G[late], G[late]]
            if self.peak:
                blocks.append(-np.eye(self.nf))
            if self.rate_step is not None:
                blocks += [-self.D, self.D]
            blocks = [np.hstack([b, np.zeros((b.shape[0], self.nz - self.nf))]) for b in blocks]
            if self.peak:
                blocks[4][:, -1] = 1.0
            jac = np.vstack(blocks)
        return _Rows(np.concatenate(values), jac, np.concatenate(family), np.concatenate(index))

    @staticmethod
    def _screen(rows: _Rows) -> np.ndarray:
        # the linear rows (peak epigraph, pressure rate) cost no simulation and always take part:
        # without them one step can drop the peak variable below knots it no longer sees
        limit = np.where(rows.family <= 3, SCREEN_ANGLE / _DEG, np.inf)
        return rows.values < limit

    # -- solving -------------------------------------------------------------------------------
    def solve(self, z0, max_iterations: int) -> _Solve:
        from scipy.optimize import minimize

        z = np.clip(np.asarray(z0, dtype=float), self.lb, self.ub)
        chosen = self._screen(self.rows(z, False))
        iterations, res = 0, None
        for _ in range(MAX_ROUNDS):
            idx = np.nonzero(chosen)[0]
            cons = [{"type": "eq", "fun": self.equalities, "jac": self.equalities_jac}]
            if idx.size:
                cons.append({"type": "ineq", "fun": lambda v, i=idx: self.rows(v, False).values[i],
                             "jac": lambda v, i=idx: self.rows(v, True).jac[i]})
            left = max(1, max_iterations - iterations)
            verdict = {"kept": z}

            def check(xk, chosen=chosen, verdict=verdict):
                # stop the round as soon as the full problem's first-order conditions hold, or a
                # row left out of it is violated (then the round is repeated with it, from the last
                # iterate that kept every row: the violating one can lie far off, where the
                # linearisation the next round starts from no longer describes the swing)
                x = np.clip(xk, self.lb, self.ub)
                full = self.rows(x, False)
                missed = ~chosen & (full.values < 0.0)
                if missed.any():
                    verdict["missed"] = missed
                    raise StopIteration
                verdict["kept"] = x
                if self.feasible(x, full, chosen):
                    kkt = self.kkt(x, chosen)
                    if kkt[0] <= OPTIMALITY_TOLERANCE:
                        verdict["kkt"] = kkt
                        raise StopIteration

            res = minimize(self.cost, z, jac=self.cost_grad, bounds=self.bounds, constraints=cons, method="SLSQP",
                           callback=check, options={"maxiter": left, "ftol": SLSQP_ACCURACY})
            iterations += int(res.nit)
            z = np.clip(res.x, self.lb, self.ub)
            full = self.rows(z, False)
            missed = ~chosen & (full.values < 0.0)
            if not missed.any() or iterations >= max_iterations:
                break
            chosen |= self._screen(full) | missed
            z = verdict["kept"]
        full = self.rows(z, False)
        optimality, multipliers = self.kkt(z, chosen)
        closed = not (~chosen & (full.values < 0.0)).any()
        first_order = closed and self.feasible(z, full, chosen) and optimality <= OPTIMALITY_TOLERANCE
        converged = bool(first_order and (res.status in (0, 99) or "kkt" in verdict))
        if "kkt" in verdict:
            message = f"first-order optimality {optimality:.2g} within {OPTIMALITY_TOLERANCE:g}"
        elif "missed" in verdict or "StopIteration" in str(res.message):
            message = f"a limit left out of the optimiser's rows was still violated after {MAX_ROUNDS} screening rounds"
        else:
            message = str(res.message) + ("" if closed else "; a limit left out of the last round is violated")
        return _Solve(z, converged, optimality, iterations, message, multipliers)

    def feasible(self, z, full, chosen) -> bool:
        """Equalities within :data:`FEASIBILITY_TOLERANCE` (deg, rad/s) and every inequality row
        no further than it past its limit (deg, bar)."""
        tol = FEASIBILITY_TOLERANCE
        return bool(np.all(np.abs(self.equalities(z)) <= tol) and np.all(full.values >= -tol))

    def kkt(self, z, chosen):
        """First-order residual at ``z``: the larger of ``max |grad f - J_a^T lambda - nu|``
        (stationarity) and ``max lambda_i c_i`` over the active rows (complementarity, Nocedal &
        Wright 2006, (12.34)), with multipliers fitted by bounded least squares on the equalities
        (free sign), the inequality rows within :data:`FEASIBILITY_TOLERANCE` of their limit
        (>= 0) and the active bounds (>= 0); returns ``(residual, {family: [(index,
        multiplier)]})``. Families: 0/1 angle low/high, 2/3 settling band, 4 peak, 5/6 rate,
        "low"/"high" pressure bounds of knot i."""
        from scipy.optimize import lsq_linear

        g = self.cost_grad(z)
        rows = self.rows(z, True)
        act = np.nonzero(chosen & (rows.values <= FEASIBILITY_TOLERANCE))[0]
        Je = self.equalities_jac(z)
        at_low = np.nonzero(z <= self.lb + 1e-9)[0]
        at_high = np.nonzero(z >= self.ub - 1e-9)[0]
        cols = [Je.T, rows.jac[act].T]
        eye = np.eye(self.nz)
        cols += [eye[:, at_low], -eye[:, at_high]]
        A = np.hstack(cols)
        ne = Je.shape[0]
        low = np.concatenate([np.full(ne, -np.inf), np.zeros(A.shape[1] - ne)])
        if not (np.all(np.isfinite(A)) and np.all(np.isfinite(g))):
            return math.inf, {}
        lam = lsq_linear(A, g, bounds=(low, np.full(A.shape[1], np.inf)), method="bvls").x
        residual = float(np.max(np.abs(g - A @ lam))) if g.size else 0.0
        if act.size:
            slack = np.maximum(rows.values[act], 0.0)
            residual = max(residual, float(np.max(lam[ne:ne + act.size] * slack)))
        out = {}
        pos = ne
        for r in act:
            out.setdefault(int(rows.family[r]), []).append((int(rows.index[r]), float(lam[pos])))
            pos += 1
        knots = np.nonzero(self.free)[0]
        for name, where in (("low", at_low), ("high", at_high)):
            for i in where:
                if i < self.nf:           # planning knot index (muscle A below Kc)
                    out.setdefault(name, []).append((int(knots[i]), float(lam[pos])))
                pos += 1
        return residual, out


@single_blas_thread
def plan(setup, objective: str = "peak-pressure", max_pressure_rate: float | None = None,
         max_iterations: int = 150) -> PlanResult:
    """Plan the strike of ``setup`` on its prior model (see the module docstring).

    ``max_pressure_rate`` [Pa/s] limits the command rate (knot to knot); ``max_iterations`` is
    SLSQP's iteration budget of each problem (main, fallback), over all screening rounds."""
    from .feedforward import model_only_profile

    if objective not in OBJECTIVES:
        raise ValueError(f"objective: {objective!r} is not allowed; must be one of {', '.join(OBJECTIVES)}")
    if max_pressure_rate is not None and not (math.isfinite(max_pressure_rate) and max_pressure_rate > 0):
        raise ValueError(f"max_pressure_rate: {max_pressure_rate!r} Pa/s is not allowed; must be > 0")
    if isinstance(max_iterations, bool) or not isinstance(max_iterations, (int, np.integer)) or max_iterations < 1:
        raise ValueError(f"max_iterations: {max_iterations!r} is not allowed; must be a whole number >= 1")
    task = setup.task
    learner = GradientLearner(setup, LearningSettings.from_config(setup.config))
    basis = learner.basis
    K = basis.n_knots
    hold = np.array(home_pressures(setup.prior, task))
    model = _Prior(setup, basis, hold)
    knot_time = (basis.n_samples - 1) * task.dt / (K - 1)
    # the first knot of each muscle holds home, where the plant starts a trial
    grid = _Grid(K, int(round(PLAN_KNOT_SPACING / knot_time)), np.clip(hold, learner.p_low, learner.p_high))
    rate_step = None if max_pressure_rate is None else max_pressure_rate * knot_time
    theta0 = np.asarray(learner.initial_state(model_only_profile(setup)).theta)

    def problem(kind):
        reg = FALLBACK_REGULARISATION if kind == "fastest" else REGULARISATION
        return _Problem(model, learner, task, grid, kind, reg, rate_step)

    main = problem(objective)
    sol = main.solve(main.z_of(theta0), max_iterations)
    theta = main.theta(sol.z)
    traj = model.swing(theta)
    misses = _misses(theta, traj, learner, task, _late(task), rate_step, K)
    fallback = None
    if misses or not sol.converged:
        fast = problem("fastest")
        best = None
        kept = _kept_start(fast, setup, learner, rate_step, K, theta)
        # from a start that keeps every limit at the strike angle, else from where the main
        # problem stopped and afresh
        starts = [theta, theta0]
        if kept is not None:
            starts = [kept] + [t for t in starts if t is not kept]
        for start in starts:
            fsol = fast.solve(fast.z_of(start), max_iterations)
            report = _verify_fallback(fast, fsol, learner, task, rate_step, K)
            if report["verified"] and (best is None or report["strike_speed"] > best[1]["strike_speed"]):
                best = (fsol, report)
            if report["verified"] and fsol.converged:
                break
        if best is not None:
            fsol, fallback = best
            if fallback["strike_speed"] >= task.strike_speed - STRIKE_SPEED_TOLERANCE and misses:
                # the strike is within reach: plan again from the fallback's profile
                again = main.solve(main.z_of(fast.theta(fsol.z)), max_iterations)
                th2 = main.theta(again.z)
                m2 = _misses(th2, model.swing(th2), learner, task, _late(task), rate_step, K)
                if not m2:
                    sol, theta, misses = again, th2, m2
                    sol.iterations += fsol.iterations
                    traj = model.swing(theta)
    if not misses:
        status = 0 if sol.converged else 1
        shown_theta, shown_sol, shown_problem = theta, sol, main
    elif fallback is not None and fallback["strike_speed"] < task.strike_speed - STRIKE_SPEED_TOLERANCE:
        status = 2 if fallback["converged"] else 3
        shown_theta, shown_sol, shown_problem = fallback["theta"], fallback["solve"], fallback["problem"]
    else:
        status = 3
        shown_theta, shown_sol, shown_problem = theta, sol, main
    traj_shown = model.swing(shown_theta)
    active = _active_limits(shown_sol.multipliers, shown_problem, learner, task, max_pressure_rate)
    binding = active[0]["limit"] if active else None
    suggestions = _suggestions(active, task, fallback) if status >= 2 else []
    msg = PLAN_STATUS[status]
    if status in (1, 3):
        msg += f" ({sol.message}; {sol.iterations} of {max_iterations} iterations)"
    if misses:
        msg += f": {'; '.join(misses)}"
    if fallback is not None and status >= 2:
        word = "the fastest strike the limits allow" if fallback["converged"] else \
            "the fastest strike found within the limits (not shown to be the fastest)"
        msg += (f"; {word} at {math.degrees(fallback['strike_angle']):.2f} deg reaches "
                f"{fallback['strike_speed']:.3g} rad/s of {task.strike_speed:g} rad/s on the prior")
        if binding:
            msg += f", bound by {binding}"
    elif status >= 2:
        msg += "; no profile reaching the strike angle within the limits was found"
    profile = learner.profile(shown_theta, planned=True, objective=objective, status=status)
    fb_out = None
    if fallback is not None:
        fb_out = {k: v for k, v in fallback.items() if k not in ("theta", "solve", "problem")}
    # the stated objective of the profile itself [bar], without the pull toward home
    cost_value = float(_objective_value(objective, theta)) if status < 2 else float("nan")
    return PlanResult(status == 0, status, msg, misses, profile, traj_shown[:, 0].copy(),
                      float(traj_shown[task.strike_index, 0]), float(traj_shown[task.strike_index, 1]), objective,
                      cost_value, [a["text"] for a in active],
                      None if fallback is None else float(fallback["strike_speed"]), suggestions,
                      converged=bool(shown_sol.converged), optimality=float(shown_sol.optimality),
                      iterations=int(sol.iterations + (fallback["solve"].iterations if fallback else 0)),
                      simulations=model.simulations, linearisations=model.linearisations,
                      home_pressures=tuple(float(p) for p in hold), home_pressure=float(task.home_pressure),
                      binding_limit=binding, fallback=fb_out, optimiser_message=shown_sol.message,
                      max_iterations=int(max_iterations))


#: Ratio between the strike speeds whose model-only feedforward :func:`_kept_start` tries.
START_SPEED_RATIO = 0.75


def _kept_start(problem, setup, learner, rate_step, K, stopped):
    """A start for the fallback that keeps every limit and the strike angle on the prior (only the
    strike speed may miss), or None: where the main problem stopped, else the model-only
    feedforward of the fastest of the strikes ``v START_SPEED_RATIO^n`` slower than the task's
    (down to the slowest its reference allows, a swing from t = 0) whose fit on the planning
    knots does. SLSQP started outside the limits on a strike out of reach wanders off (the
    stopped main problem of a 40 rad/s demo strike swings past both stops); from inside them
    it climbs to the fastest strike they allow."""
    import dataclasses

    from .feedforward import model_only_profile

    task = setup.task
    late = _late(task)

    def keeps(theta) -> bool:
        theta = problem.theta(problem.z_of(theta))
        traj = problem.model.swing(theta)
        return not [m for m in _misses(theta, traj, learner, task, late, rate_step, K)
                    if not m.startswith("strike speed")]

    if keeps(stopped):
        return stopped
    slowest = 2.0 * abs(task.strike_angle - task.home_angle) / task.strike_time
    v = task.strike_speed * START_SPEED_RATIO
    while v >= slowest:
        slower = dataclasses.replace(setup, task=dataclasses.replace(task, strike_speed=v))
        try:
            theta = np.asarray(learner.initial_state(model_only_profile(slower)).theta)
        except ValueError:                   # a muscle cannot give that swing's torque
            theta = None
        if theta is not None and keeps(theta):
            return theta
        v *= START_SPEED_RATIO
    return None


def _objective_value(objective: str, theta) -> float:
    """Peak or mean of the profile's knots [bar] (the hat basis interpolates linearly between
    knots, so the peak knot is the peak command and the knot mean weighs as the cost does)."""
    theta = np.asarray(theta, dtype=float)
    return float(theta.max() if objective == "peak-pressure" else theta.mean()) / _BAR


def _late(task) -> np.ndarray:
    t = np.arange(task.n_steps + 1) * task.dt
    return t >= task.settle_time - 1e-12


def _verify_fallback(problem, sol, learner, task, rate_step, K) -> dict:
    """Simulate the fallback's profile on the prior: verified when it reaches the strike angle and
    keeps every limit at every sample (its speed is then what the simulation gives)."""
    theta = problem.theta(sol.z)
    traj = problem.model.swing(theta)
    misses = [m for m in _misses(theta, traj, learner, task, _late(task), rate_step, K)
              if not m.startswith("strike speed")]
    k = task.strike_index
    return {"verified": not misses and bool(np.all(np.isfinite(traj))), "converged": bool(sol.converged),
            "strike_angle": float(traj[k, 0]), "strike_speed": float(traj[k, 1]), "misses": misses,
            "optimality": float(sol.optimality), "theta": theta, "solve": sol, "problem": problem}


def _misses(theta, traj, learner, task, late, rate_step, K) -> list:
    """What the planned swing ``traj`` of knots ``theta`` misses beyond the tolerances: the strike
    angle and speed at the strike sample, the angle limits at every sample, the settling band from
    ``task.settle_time``, the pressure box and the knot-to-knot rate step ``rate_step`` [Pa]."""
    out = []
    k = task.strike_index
    q = traj[:, 0]
    if not np.all(np.isfinite(traj[:, :2])):
        return ["the prior's swing diverged"]
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


def _active_limits(multipliers, problem, learner, task, max_rate) -> list:
    """The limits with a positive multiplier, largest first: ``{"limit", "text", "worth"}``, where
    ``worth`` is the multiplier summed over the limit's rows (what relaxing it by one unit, deg or
    bar, on every row is worth to the cost, first order)."""
    K = learner.basis.n_knots
    dt = task.dt
    tiny = 1e-9
    out = []

    def times(entries):
        t = [i * dt for i, lam in entries if lam > tiny]
        return (f"{t[0] * 1e3:.0f} ms" if len(t) == 1 else f"{t[0] * 1e3:.0f} .. {t[-1] * 1e3:.0f} ms") if t else ""

    def knots(entries):
        return sorted({"A" if i < K else "B" for i, lam in entries if lam > tiny})

    per_unit = "rad/s per" if problem.kind == "fastest" else "bar of cost per"
    scale = task.strike_speed if problem.kind == "fastest" else 1.0
    names = {
        0: ("joint angle lower limit", f"joint angle at its lower limit ({np.degrees(learner.angle_low):.1f} deg)", "deg"),
        1: ("joint angle upper limit", f"joint angle at its upper limit ({np.degrees(learner.angle_high):.1f} deg)", "deg"),
        2: ("settling band", f"settling band ({np.degrees(task.settle_tolerance):g} deg above home from "
                             f"{task.settle_time * 1e3:g} ms)", "deg"),
        3: ("settling band", f"settling band ({np.degrees(task.settle_tolerance):g} deg below home from "
                             f"{task.settle_time * 1e3:g} ms)", "deg"),
        5: ("pressure rate limit", f"pressure rate at its limit ({(max_rate or 0) / 1e5:g} bar/s), rising", "bar"),
        6: ("pressure rate limit", f"pressure rate at its limit ({(max_rate or 0) / 1e5:g} bar/s), falling", "bar"),
        "high": ("upper pressure limit", f"pressure at its upper limit ({learner.p_high / 1e5:g} bar)", "bar"),
        "low": ("lower pressure limit", f"pressure at its lower limit ({learner.p_low / 1e5:g} bar)", "bar"),
    }
    for fam, (limit, text, unit) in names.items():
        entries = [(i, lam) for i, lam in multipliers.get(fam, []) if lam > tiny]
        if not entries:
            continue
        worth = scale * sum(lam for _, lam in entries)
        if fam in ("high", "low"):
            where = f" on {len(entries)} knots of muscle {' and '.join(knots(entries))}"
        elif fam in (5, 6):
            where = f" on {len(entries)} knot intervals"
        else:
            where = f" at {times(entries)}"
        out.append({"limit": limit, "text": f"{text}{where} ({worth:.3g} {per_unit} {unit})", "worth": worth})
    out.sort(key=lambda a: -a["worth"])
    return out


def _suggestions(active, task, fallback) -> list:
    """What would help a strike out of reach, from the limits that bind its fallback."""
    help_for = {
        "upper pressure limit": "more force: a higher learning.max_pressure (never above the rated pressure), or a "
                                "stronger muscle (force grows with the rest radius squared)",
        "joint angle upper limit": "more room past the strike: end stops further out or a smaller "
                                   "learning.angle_margin",
        "joint angle lower limit": "more room to wind up: end stops further out or a smaller learning.angle_margin",
        "settling band": "more time to settle: a later task.settle_time or a wider task.settle_tolerance",
        "pressure rate limit": "faster pressure changes: a higher --max-pressure-rate",
        "lower pressure limit": "a lower learning.min_pressure (within the valves' controllable range)",
    }
    out = []
    for a in active:
        text = help_for.get(a["limit"])
        if text and text not in out:
            out.append(text)
    reach = f" (the prior reaches {fallback['strike_speed']:.3g} rad/s)" if fallback else ""
    out.append(f"an easier strike: a lower task.strike_speed{reach}, a later task.strike_time or less travel "
               "from task.home_angle")
    return out


# -- tuning from a plan --------------------------------------------------------------------------
@dataclass(frozen=True)
class PlannedStart:
    """What ``tune --start PLAN`` starts from: the plan's profile, its planned swing (the reference
    the learner tracks instead of the task's) and its home co-contraction [Pa]."""

    profile: object
    reference: np.ndarray
    home_pressure: float
    source: str


#: Task numbers a plan must share with the config it is tuned on.
_PLAN_TASK_KEYS = ("home_angle", "strike_angle", "strike_time", "strike_speed", "trial_length", "control_rate")


def plan_task(task) -> dict:
    """The task numbers (SI) a plan records, checked again when tuning from it."""
    return {k: float(getattr(task, k)) for k in _PLAN_TASK_KEYS}


def read_plan(path, task) -> PlannedStart | None:
    """The plan folder of ``path`` (the folder, or its ``profile.csv``) as a :class:`PlannedStart`,
    checked against ``task``; None when ``path`` is a profile CSV without a plan beside it. A
    mismatch is a one-line DataError naming the file, the value and what is allowed."""
    import json
    from pathlib import Path

    from .base import PressureProfile

    path = Path(path)
    folder = path if path.is_dir() else path.parent
    report_path, ref_path = folder / "plan.json", folder / "reference.csv"
    profile_path = folder / "profile.csv" if path.is_dir() else path
    if not report_path.exists():
        if path.is_dir():
            raise DataError(f"--start: {str(path)!r} has no plan.json; give a plan folder or a profile CSV")
        return None
    try:
        report = json.loads(report_path.read_text())
    except (OSError, ValueError) as exc:
        raise DataError(f"{report_path}: not a plan report ({exc})") from None
    recorded = report.get("task") or {}
    for key, value in plan_task(task).items():
        got = recorded.get(key)
        if got is None or abs(float(got) - value) > 1e-9 * max(1.0, abs(value)):
            raise DataError(f"{report_path}: task.{key} {got!r} is not allowed; the config's is {value:g} "
                            f"(SI): plan again for this config")
    profile = PressureProfile.read_csv(profile_path)
    profile.check_grid(task.dt, task.n_steps, str(profile_path))
    try:
        table = np.loadtxt(ref_path, delimiter=",", comments="#", skiprows=2, ndmin=2)
    except (OSError, ValueError) as exc:
        raise DataError(f"{ref_path}: not a planned swing ({exc})") from None
    if table.shape != (task.n_steps + 1, 2):
        raise DataError(f"{ref_path}: {table.shape[0]} rows is not allowed; the trial has {task.n_steps + 1} samples")
    home = report.get("home_pressure_kpa")
    if home is None or not (math.isfinite(float(home)) and float(home) >= 0):
        raise DataError(f"{report_path}: home_pressure_kpa {home!r} is not allowed; must be a pressure >= 0 kPa")
    return PlannedStart(profile, np.radians(table[:, 1]), float(home) * 1e3, str(folder))
