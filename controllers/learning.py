"""Physics-informed gradient learner: trial-to-trial updates of a feedforward pressure profile from
a measured trial, with gradients of the PRIOR model linearised along the MEASURED trajectory.

Update rules:
- ``gradient``: ``theta+ = theta + beta G^T Q e`` with ``beta = 1 / lambda_max(G^T Q G)``, inside the
  monotone range ``0 < beta < 2 / ||G||^2`` (Owens, Hatonen & Daley 2009, Int. J. Robust Nonlinear
  Control, "Robust monotone gradient-based discrete-time iterative learning control");
- ``norm-optimal``: ``theta+ = theta + (G^T Q G + S)^-1 G^T Q e`` (Amann, Owens & Rogers 1996, IEE
  Proc. Control Theory Appl. 143(2)).
``G^T Q e`` comes from the adjoint pass, ``G`` on the profile basis from forward sensitivity passes.
Limits: the step is the minimiser of the update's quadratic within the pressure box (an exact
box-constrained QP); the joint angle is kept within the stops by the velocity-level constraint
method of Muehlebach & Jordan (2022, JMLR 23(256), "On constraints in first-order optimization"):
only constraints violated in the measured trial enter, as ``grad g_i^T v + alpha g_i >= 0``.
A divergence guard rejects an update after a trial whose cost grew beyond ``guard_factor`` times
that of the last trial it passed and falls back to that profile with half the step.
The learner sees only a Rollout and the prior model, exactly what a rig gives.
"""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field

import numpy as np
from scipy.linalg import cho_factor, cho_solve, eigh
from scipy.linalg.lapack import dpocon

from muscle_sim.threads import single_blas_thread

from .base import PressureProfile
from .basis import HatBasis
from .identification import prior_from_values, select_pressure_law, update_prior
from .sensitivity import linearise, measured_states

#: Muehlebach & Jordan (2022) use alpha T = 0.4; the learner's step is T = 1.
CONSTRAINT_ALPHA = 0.4

#: A violated angle limit counts as met by a step when its velocity-level condition
#: ``grad g_i^T d + alpha T g_i >= 0`` holds to this [rad] (0.01 deg).
ANGLE_CONDITION_TOLERANCE = math.radians(0.01)

#: Samples this close to an angle limit [rad] (1 deg) also carry its velocity-level condition: for
#: ``g_i >= 0`` the condition ``grad g_i^T d >= -alpha T g_i`` lets the step approach the limit but,
#: to first order, not cross it, so a swing inside the limit is not pushed past it by the next
#: step (the active set of Muehlebach & Jordan widened by a band against the prior's error).
LIMIT_BAND = math.radians(1.0)

#: Solves of one step, each adding the samples its predecessor was predicted to carry past a
#: limit (constraint screening; the first solve has only the trial's own near or broken limits).
SCREEN_ROUNDS = 3

#: The trust region's ratio test never shrinks the step scale below this (the guard may).
MIN_RATIO_SCALE = 1.0 / 16
#: Achieved-over-predicted error change below which the step scale halves, and above which it
#: doubles. Nocedal & Wright use 1/4 and 3/4 for a fixed function; between trials the plant also
#: changes (drift works against a correction and, near the goal, outweighs the step), so only a
#: step after which the errors moved the wrong way by more than the prior's prediction shrinks the
#: scale, and one that did at least half of what the prior said regrows it.
SHRINK_BELOW = -1.0
GROW_ABOVE = 0.5

#: Least learning gain on the measured error. The gain is the share of the trial's cost that
#: repeats from trial to trial, ``1 - c_n / c`` with ``c_n`` the cost of the non-repetitive part
#: (sensor noise, drift spread) estimated from how far each trial's error change missed the
#: prediction: a steady-state form of the Kalman gain of repetitive-error estimation (Schoellig,
#: Mueller & D'Andrea 2012, Autonomous Robots 33, "Optimization-based iterative learning for
#: precise quadrocopter trajectory tracking"), with the noise of two trials in each miss. It
#: applies once a rerun has shown the plant drifting: on a plant that holds still the miss is
#: mostly what the prior gets wrong, which the trust region already answers, and the full step
#: is kept.
MIN_LEARNING_GAIN = 0.25

#: Penalty weight of the angle constraints in the step QP (rows of unit norm, steps in STEP_UNIT).
PENALTY = 1e6
#: The step QP is solved in units of 10 kPa [Pa], its matrix scaled to unit mean diagonal.
STEP_UNIT = 1e4

#: The active-set iterations of :func:`box_qp` solve each subproblem on the Cholesky factor of the
#: whole matrix, bordered by the fixed bounds (a Schur complement of their rows of ``A^-1``),
#: while at most this share of the variables is fixed; beyond it they factor the free block.
BORDERED_SHARE = 1.0 / 3.0
#: ... and only for a matrix whose reciprocal condition number (LAPACK's estimate) is at least
#: this: the bordered solve's error grows with the condition of the whole matrix, and the
#: active-set test reads the signs of small multipliers (the penalised pieces, with their
#: 1e6 weights, are solved on the free block).
BORDERED_RCOND = 1e-6

#: Update outcomes; ``success`` (the step is sound) is True for 0 and 1 only.
STATUS_MESSAGES = {
    0: "update applied",
    1: "update applied within active limits",
    2: "trial cost grew beyond the guard factor: fell back to the last good profile with half the step",
    3: "update applied, but the step is not sound: it misses a violated angle limit's condition "
       "(or its solver did not converge)",
    4: "the prior's linearisation along this trial is not finite: profile kept",
    5: "the prior predicts no decrease for any step size tried: profile kept, step halved",
}


@dataclass(frozen=True)
class LearningSettings:
    """Learner settings (SI); see the ``learning`` section of the config."""

    method: str = "norm-optimal"
    knot_spacing: float = 0.008
    strike_weight: float = 20.0
    strike_window: float = 0.02
    speed_weight: float = math.radians(0.1)
    regularisation: float = 0.05
    guard_factor: float = 2.0
    guard_floor: float = math.radians(0.5)
    angle_margin: float = math.radians(3.0)
    min_pressure: float = 0.0
    max_pressure: float | None = None
    update_prior: bool = True
    prior_blend: float = 0.5
    pressure_law: str = "keep"
    spsa_step: float = 2e4
    spsa_perturbation: float = 1e4

    @classmethod
    def from_config(cls, cfg) -> "LearningSettings":
        values = dict(cfg.get("learning"))
        values.pop("trials", None)
        return cls(**values)


@dataclass
class LearnerState:
    """What the learner carries from one trial to the next (saved beside each profile)."""

    theta: list                 # knot values of the profile to run next [Pa]
    best_theta: list | None = None
    best_cost: float | None = None
    step_scale: float = 1.0
    trial: int = 0
    extra: dict = field(default_factory=dict)   # method-specific (SPSA phase, perturbation, ...)

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, data: dict) -> "LearnerState":
        return cls(**data)


@dataclass
class UpdateResult:
    """Outcome of one update, in the manner of scipy's result objects.

    ``success``: the step is sound: its quadratic subproblem was solved exactly and every violated
    angle limit's velocity-level condition holds (to :data:`ANGLE_CONDITION_TOLERANCE`); such a
    step never raises the prior's predicted cost unless an angle limit asks it to.
    ``accepted``: the profile changed by this update's step (False after the guard or a
    non-finite linearisation).
    """

    success: bool
    status: int
    message: str
    cost: float
    predicted_cost: float
    step_norm_kpa: float
    active_constraints: int
    step_scale: float
    accepted: bool
    diagnosis: dict = field(default_factory=dict)


def gradient_step(H, grad, scale: float = 1.0):
    """Gradient ILC step ``beta G^T Q e`` with ``beta = scale / lambda_max(G^T Q G)``: for
    ``0 < scale < 2`` inside the monotone range of Owens, Hatonen & Daley (2009)."""
    lam_max = float(eigh(H, eigvals_only=True, subset_by_index=[H.shape[0] - 1] * 2, check_finite=False)[0])
    return scale * grad / lam_max if lam_max > 0 else np.zeros_like(grad)


def norm_optimal_step(H, grad, regularisation: float):
    """Norm-optimal ILC step ``(G^T Q G + S)^-1 G^T Q e`` with ``S = r mean(diag H) I``
    (Amann, Owens & Rogers 1996)."""
    reg = regularisation * float(np.trace(H)) / H.shape[0]
    return cho_solve(cho_factor(H + reg * np.eye(H.shape[0]), check_finite=False), grad, check_finite=False)


def box_qp(A, b, low, high, start=None, max_iterations: int | None = None, factor=None,
           condition: float | None = None):
    """``argmin 1/2 z^T A z - b^T z`` subject to ``low <= z <= high`` for a symmetric positive
    definite ``A``: the primal active-set method for convex QP (Nocedal & Wright 2006, Numerical
    Optimization, 2nd ed., Algorithm 16.3) on bound constraints, started from ``start`` (default:
    the unconstrained minimiser) clipped to the box, with the bounds it lies on as the working
    set. Each iteration fixes one more bound (the first met on the way to the subproblem's
    minimiser) or frees the bound with the most negative multiplier. Returns ``(z, converged)``;
    at convergence the free components have zero gradient and the gradient points out of the box
    at every bound (KKT up to rounding).

    Each subproblem fixes the working set ``F`` at its bounds ``v``: its minimiser is
    ``z0 + Y mu`` with ``z0 = A^-1 b``, ``Y`` the columns ``F`` of ``A^-1`` and
    ``Y_F mu = v - z0_F`` (the KKT system of the equality-constrained QP solved by the
    Schur-complement method, Nocedal & Wright section 16.2). One factorisation of
    ``A`` (``factor``, from :func:`scipy.linalg.cho_factor`, when the caller has it) then serves
    every iteration; a column of ``A^-1`` is solved once, when its bound first enters the set.
    With more than :data:`BORDERED_SHARE` of the variables fixed, or a matrix conditioned worse
    than :data:`BORDERED_RCOND`, the free block is factored instead (cheaper there, and as
    accurate as the free block's own condition allows). ``condition``: an upper bound of ``A``'s
    condition number when the caller knows one; else LAPACK's estimate (``dpocon``) is taken.
    """
    n = b.size
    limit = 10 * n + 50 if max_iterations is None else max_iterations
    factor = cho_factor(A, check_finite=False) if factor is None else factor
    z0 = cho_solve(factor, b, check_finite=False)
    if start is None:
        if np.all((z0 > low) & (z0 < high)):
            return z0, True
        z = z0
    else:
        z = np.asarray(start, dtype=float)
    z = np.clip(z, low, high)
    at_low, at_high = z <= low, z >= high
    tol = 1e-12 * max(1.0, float(np.max(np.abs(b))))
    inverse_columns = {}                  # bound index -> that column of A^-1
    if condition is None:
        rcond, info = dpocon(factor[0], float(np.max(np.sum(np.abs(A), axis=0))), uplo="L" if factor[1] else "U")
        well_conditioned = info == 0 and rcond >= BORDERED_RCOND
    else:
        well_conditioned = condition * BORDERED_RCOND <= 1.0
    bordered_limit = int(BORDERED_SHARE * n) if well_conditioned else 0
    for _ in range(limit):
        fixed = at_low | at_high
        free = ~fixed
        idx = np.flatnonzero(fixed)
        if idx.size == 0:
            target = z0.copy()
        elif idx.size <= bordered_limit:
            new = [i for i in idx if i not in inverse_columns]
            if new:
                unit = np.zeros((n, len(new)))
                unit[new, np.arange(len(new))] = 1.0
                for i, column in zip(new, cho_solve(factor, unit, check_finite=False).T):
                    inverse_columns[i] = column
            Y = np.column_stack([inverse_columns[i] for i in idx])
            shift = z[idx] - z0[idx]
            target = z0 + Y @ (shift / Y[idx[0], 0] if idx.size == 1 else np.linalg.solve(Y[idx], shift))
            target[idx] = z[idx]
        else:
            target = z.copy()
            if free.any():
                rhs = b[free] - A[np.ix_(free, fixed)] @ z[fixed]
                target[free] = cho_solve(cho_factor(A[np.ix_(free, free)], check_finite=False), rhs,
                                         check_finite=False)
        p = target - z
        with np.errstate(divide="ignore", invalid="ignore"):
            reach = np.where(free & (p < 0), (low - z) / p, np.where(free & (p > 0), (high - z) / p, np.inf))
        block = int(np.argmin(reach))
        if reach[block] >= 1.0:                       # the subproblem's minimiser is feasible
            z = target
            gradient = A @ z - b
            multiplier = np.where(at_low, gradient, np.where(at_high, -gradient, np.inf))
            worst = int(np.argmin(multiplier))
            if multiplier[worst] >= -tol:
                return z, True
            at_low[worst] = at_high[worst] = False
        else:                                         # stop at the first bound met and fix it
            z = z + max(float(reach[block]), 0.0) * p
            if p[block] < 0:
                z[block], at_low[block] = low[block], True
            else:
                z[block], at_high[block] = high[block], True
    return z, False


def penalised_box_qp(A, b, low, high, M, h, rho: float, max_iterations: int = 100, factor=None):
    """``argmin 1/2 z^T A z - b^T z + rho/2 |min(M z - h, 0)|^2`` subject to ``low <= z <= high``
    (``A`` symmetric positive definite): the quadratic penalty form of the constraints
    ``M z >= h``, which also gives the least violation when the box does not let every constraint
    hold. The objective is convex and piecewise quadratic; each iteration minimises, by
    :func:`box_qp`, the quadratic of the piece the current point lies on (the rows violated
    there), which matches the objective's value and gradient at that point, then backtracks
    (Armijo) on the objective along the way there: a semismooth Newton method (Qi & Sun 1993,
    Math. Program. 58, "A nonsmooth version of Newton's method"). It has converged when the
    minimiser of a piece lies on that piece (then it meets the objective's KKT conditions).
    ``factor``: the Cholesky factor of ``A`` when the caller has it. Returns ``(z, converged)``."""

    def objective(z):
        short = np.minimum(M @ z - h, 0.0)
        return 0.5 * z @ A @ z - b @ z + 0.5 * rho * short @ short, A @ z - b + rho * (M.T @ short)

    factor = cho_factor(A, check_finite=False) if factor is None else factor
    z = np.clip(cho_solve(factor, b, check_finite=False), low, high)
    for _ in range(max_iterations):
        rows = M @ z - h < 0.0
        piece_A = A + rho * M[rows].T @ M[rows]
        piece_b = b + rho * M[rows].T @ h[rows]
        target, solved = box_qp(piece_A, piece_b, low, high, start=z)
        if not solved:
            return z, False
        if np.array_equal(M @ target - h < 0.0, rows):
            return target, True
        value, gradient = objective(z)
        p, t = target - z, 1.0
        slope = float(gradient @ p)
        while t > 1e-12 and objective(z + t * p)[0] > value + 1e-4 * t * slope:
            t *= 0.5
        z = np.clip(z + t * p, low, high)
    return z, False


class StrikeObjective:
    """Weighted strike error of a trial: ``J = 1/2 sum w_k e_k^2 + 1/2 w_r e_r^2`` with the angle
    error at every sample (emphasised in the strike window) and the strike-rate error.

    ``reference`` (N+1,) [rad], when given, is the swing to track instead of the rollout's own
    reference column (the task's): a planned swing, so tuning from a plan learns toward it."""

    def __init__(self, task, settings: LearningSettings, reference=None):
        self.task = task
        n = task.n_steps + 1
        if reference is not None:
            reference = np.asarray(reference, dtype=float)
            if reference.shape != (n,) or not np.all(np.isfinite(reference)):
                raise ValueError(f"reference: shape {reference.shape} is not allowed; must be {n} finite angles")
        self.reference = reference
        t = np.arange(n) * task.dt
        window = np.abs(t - task.strike_time) <= settings.strike_window + 1e-12
        self.w_angle = (1.0 + settings.strike_weight * window) / n
        window_weight = float(np.sum(self.w_angle[window])) if window.any() else 1.0 / n
        # 1 % speed error weighs like `speed_weight` of angle error over the window
        self.w_rate = window_weight * (settings.speed_weight / (0.01 * task.strike_speed)) ** 2

    def errors(self, rollout):
        """``(e_angle (N+1,), e_rate)``: reference minus measured."""
        measured = np.asarray(rollout.measured[:, 0])
        ref = np.asarray(rollout.reference) if self.reference is None else self.reference[: measured.size]
        e = ref - measured
        k = self.task.strike_index
        e_rate = self.task.strike_speed - float(rollout.measured[k, 1]) if k < len(e) else 0.0
        return e, e_rate

    def cost(self, rollout) -> float:
        e, e_rate = self.errors(rollout)
        if e.size != self.w_angle.size:        # an aborted trial: charge what is missing heavily
            pad = self.w_angle.size - e.size
            e = np.concatenate([e, np.full(pad, e[-1] if e.size else 1.0)])
        return 0.5 * float(np.sum(self.w_angle * e * e) + self.w_rate * e_rate * e_rate)


class GradientLearner:
    """Model-gradient learner over a hat-function profile basis (methods gradient, norm-optimal)."""

    def __init__(self, setup, settings: LearningSettings):
        self.setup = setup
        self.settings = settings
        self.task = setup.task
        self.basis = HatBasis.for_grid(self.task.n_steps, self.task.dt, settings.knot_spacing)
        self.phi = self.basis.matrix()
        self.objective = StrikeObjective(self.task, settings)
        top = setup.rated_pressure if settings.max_pressure is None else settings.max_pressure
        self.p_low, self.p_high = settings.min_pressure, min(top, setup.rated_pressure)
        j = setup.prior.joint
        self.angle_low = j.lower_stop + settings.angle_margin
        self.angle_high = j.upper_stop - settings.angle_margin
        self._limit_stride = max(1, int(round(0.004 / self.task.dt)))   # a sample every 4 ms
        self._priors = {}
        self._work = {}              # arrays each update overwrites (see _buffer)
        # the cost of an error of guard_floor at every sample: below it no trial counts as diverged
        self._guard_floor = 0.5 * float(np.sum(self.objective.w_angle)) * settings.guard_floor ** 2
        t = np.arange(self.phi.shape[0]) * self.task.dt
        window = np.abs(t - self.task.strike_time) <= settings.strike_window + 1e-12
        near = np.any(self.phi[window] > 0.0, axis=0)            # knots that shape the strike window
        self._strike_knots = np.concatenate([near, near])

    # -- profiles ----------------------------------------------------------------------------
    def profile(self, theta, **meta) -> PressureProfile:
        """The profile of knot values ``theta`` on the trial's control grid."""
        t = np.arange(self.task.n_steps) * self.task.dt
        return PressureProfile(t, self.basis.expand(theta), metadata=meta)

    def initial_state(self, start: PressureProfile) -> LearnerState:
        """State for a first trial with (the basis projection of) ``start``, kept within limits."""
        theta = np.clip(self.basis.project_commands(start.commands), self.p_low, self.p_high)
        return LearnerState(theta=theta.tolist())

    # -- linear algebra on the basis ---------------------------------------------------------
    def _buffer(self, name: str, shape: tuple, order: str = "C") -> np.ndarray:
        """A work array of the update, kept from one update to the next: its matrices are as
        large as the trial, and fresh memory for each costs the operating system's page faults
        every trial (a third of a short trial's update on a virtual machine). Nothing an update
        returns refers to one, so a learner runs one update at a time."""
        array = self._work.get(name)
        if array is None or array.shape != shape or not array.flags[f"{order}_CONTIGUOUS"]:
            array = self._work[name] = np.empty(shape, order=order)
        return array

    def _columns(self, lin):
        """``G`` on the basis by forward passes: angle rows (n+1, P) and strike-rate row (P,)
        over the ``n`` steps the linearisation covers."""
        p = 2 * self.phi.shape[1]
        return lin.forward_on_basis(self.phi, out=(self._buffer("g_angle", (lin.n_steps + 1, p)),
                                                   self._buffer("g_rate", (p,))))

    def _violated(self, g_angle, y):
        """Rows ``M v >= h`` of the Muehlebach–Jordan velocity-level constraints for the angle
        limits the measured trial violated or came within :data:`LIMIT_BAND` of (``g_i >= 0``
        form; a sample every 4 ms is enough at the knot spacing), and whether any was violated;
        ``None`` when no sample came near a limit."""
        idx = np.arange(len(y))[:: self._limit_stride]
        lo = idx[y[idx] < self.angle_low + LIMIT_BAND]
        hi = idx[y[idx] > self.angle_high - LIMIT_BAND]
        if lo.size + hi.size == 0:
            return None
        M, g = self._limit_rows(g_angle, y, lo, hi)
        return M, -CONSTRAINT_ALPHA * g, bool(np.any(g < 0.0))

    def _limit_rows(self, g_angle, y, lo, hi):
        """``(M, g)`` of the lower-limit samples ``lo`` and upper-limit samples ``hi``: the
        predicted angle margins are ``g + M d`` (``g >= 0`` inside the limit)."""
        return (np.vstack([g_angle[lo], -g_angle[hi]]),
                np.concatenate([y[lo] - self.angle_low, self.angle_high - y[hi]]))

    def _step_problem(self, H, grad):
        """The step QP at unit step scale, ``argmin 1/2 d^T A d - c^T d``, as ``(quadratic, c)``:
        norm-optimal ``A = G^T W G + S``, ``c = G^T W e``; gradient ``A = I``, ``c`` the gradient
        step. A step scale ``s`` is the same QP with ``s c`` (for norm-optimal the change penalty
        ``S / s``), so one :meth:`_factored` quadratic serves every scale tried."""
        if self.settings.method == "gradient":
            return self._factored(np.eye(H.shape[0]), condition=1.0), gradient_step(H, grad)
        reg = self.settings.regularisation * float(np.trace(H)) / H.shape[0]
        A = self._buffer("step_matrix", H.shape)
        np.copyto(A, H)
        A.flat[:: A.shape[0] + 1] += reg
        # H is positive semidefinite with largest eigenvalue at most trace(H) = n reg / r, so the
        # condition of H + reg I is at most 1 + n / r (r the regularisation setting)
        bound = 1.0 + H.shape[0] / self.settings.regularisation if self.settings.regularisation > 0 else None
        return self._factored(A, overwrite=True, condition=bound), grad

    def _factored(self, A, overwrite: bool = False, condition: float | None = None):
        """``(A_n, factor, unit, condition)``: ``A`` scaled to unit mean diagonal (``A_n = A / unit``;
        ``overwrite``: in place; the step's unit :data:`STEP_UNIT` enters on the right-hand side),
        the Cholesky factor of ``A_n``, and the bound of its condition number the caller knows
        (None: unknown)."""
        unit = max(float(np.trace(A)) / A.shape[0], 1e-300)
        A_n = np.divide(A, unit, out=A if overwrite else None)
        upper = self._buffer("step_factor", A.shape, order="F")     # LAPACK's order: factored in place
        np.copyto(upper, A_n)
        return A_n, cho_factor(upper, overwrite_a=True, check_finite=False), unit, condition

    def _solve_step(self, quadratic, c, theta, limits):
        """``argmin 1/2 d^T A d - c^T d`` (``A`` as :meth:`_factored`) with ``theta + d`` in the
        pressure box and the violated angle constraints ``M d >= h``. With the box alone this QP
        is solved exactly by :func:`box_qp`; with angle constraints its quadratic penalty form
        (weight :data:`PENALTY` on rows scaled to unit norm) by :func:`penalised_box_qp`. Returns
        the step, how many angle constraints bind, and whether the step is sound: the solver
        converged and every constraint holds to :data:`ANGLE_CONDITION_TOLERANCE`."""
        sigma = STEP_UNIT
        As, factor, unit, condition = quadratic
        bs = c / (sigma * unit)
        lo, hi = (self.p_low - theta) / sigma, (self.p_high - theta) / sigma
        if limits is not None:
            M, h = limits
            rows = np.linalg.norm(M * sigma, axis=1)
            keep = rows > 1e-6 * rows.max() if rows.size and rows.max() > 0 else np.zeros(rows.size, bool)
            # samples the profile cannot move (before the first command acts) carry no constraint
            M, h, rows = M[keep], h[keep], rows[keep]
            limits = (M * sigma / rows[:, None], h / rows) if keep.any() else None   # unit rows: O(1)
        if limits is None:
            z, converged = box_qp(As, bs, lo, hi, factor=factor, condition=condition)
            return z * sigma, 0, converged
        z, converged = penalised_box_qp(As, bs, lo, hi, limits[0], limits[1], PENALTY, factor=factor)
        slack = limits[0] @ z - limits[1]              # per unit row; times the row norm: [rad]
        met = bool(np.all(slack * rows >= -ANGLE_CONDITION_TOLERANCE))
        return z * sigma, int(np.count_nonzero(slack < 1e-4)), converged and met

    # -- the prior the learner believes ---------------------------------------------------------
    def prior_for(self, state: LearnerState):
        """The prior of this state: the config's, with the identified values the state carries."""
        values = state.extra.get("prior_values") or {}
        key = tuple(sorted(values.items()))
        if key not in self._priors:
            self._priors[key] = prior_from_values(self.setup, values)
        return self._priors[key]

    def _reidentify(self, rollout, state: LearnerState):
        """Cautious model update (Koc, Maeda & Peters 2018, "Optimizing the execution of dynamic
        robot movements with learning control", IEEE Trans. Robotics: model-updating ILC): fit
        the prior to this trial, then move each parameter the trial identifies ``prior_blend`` of
        the way from its current value to the estimate. Returns ``(values, changed names)``."""
        values = dict(state.extra.get("prior_values") or {})
        if not self.settings.update_prior or len(rollout.t) < self.task.n_steps + 1:
            return values, []
        changed = []
        try:
            if self.settings.pressure_law == "select" and "pressure_model" not in values:
                # the first full trial also decides the pressure law, once: the state keeps it
                law, _, result = select_pressure_law(self.setup, [rollout], self.prior_for(state))
                values["pressure_model"] = law
                if law != self.setup.prior.pneumatics.model:
                    changed.append("pressure_model")
            else:
                _, result = update_prior(self.setup, [rollout], self.prior_for(state))
        except (ValueError, ArithmeticError):
            return values, changed
        if result is None or not result.success:
            return values, changed
        blend = self.settings.prior_blend
        for name, estimate in result.values().items():
            old = result.parameters[name].prior
            if math.isfinite(estimate) and estimate != old:
                values[name] = float(old + blend * (estimate - old))
                changed.append(name)
        return values, changed

    # -- the update ----------------------------------------------------------------------------
    def _achieved_ratio(self, extra, e, e_rate):
        """How much of the error change the prior predicted for the last step the trial showed:
        the W-weighted projection of the achieved change ``e_k - e_(k-1)`` on the predicted one
        ``-G d`` (1: as predicted, 0: nothing happened, < 0: the other way). A change of the plant
        between trials (drift, noise) adds to it, which is why only a clearly wrong-way change
        shrinks the step (:data:`SHRINK_BELOW`). None when the last update made no step."""
        change = extra.get("predicted_change")
        if change is None or len(change) != len(e):
            return None
        W, w_rate = self.objective.w_angle, self.objective.w_rate
        d_pred, d_rate = np.asarray(change), extra["predicted_rate_change"]
        denom = float(np.sum(W * d_pred * d_pred) + w_rate * d_rate * d_rate)
        if not denom > 0.0:
            return None
        d_act = e - np.asarray(extra["last_error"])
        d_act_rate = e_rate - extra["last_rate_error"]
        return float(np.sum(W * d_act * d_pred) + w_rate * d_act_rate * d_rate) / denom

    def _prediction_miss_cost(self, extra, e, e_rate):
        """Half the weighted cost of how far the error change since the last trial missed what
        the learner predicted for its step: the noise of two trials, plus what
        the model got wrong. None when the last update made no step."""
        change = extra.get("predicted_change")
        if change is None or len(change) != len(e):
            return None
        miss = e - np.asarray(extra["last_error"]) - np.asarray(change)
        miss_rate = e_rate - extra["last_rate_error"] - extra["predicted_rate_change"]
        W, w_rate = self.objective.w_angle, self.objective.w_rate
        return 0.25 * float(np.sum(W * miss * miss) + w_rate * miss_rate * miss_rate)

    def _screened(self, g_angle, y, applied):
        """Rows ``M d >= h`` (position level: the predicted angle stays inside) for the samples that
        the last trial kept clear of the limits by more than :data:`LIMIT_BAND` but that the step
        ``applied`` is predicted to carry past one; ``None`` when none is."""
        rows = slice(0, min(len(y), g_angle.shape[0]), self._limit_stride)      # a view: no copy of G
        idx = np.arange(rows.stop)[rows]
        y0 = y[idx]
        new = y0 + g_angle[rows] @ applied
        lo = idx[(y0 >= self.angle_low + LIMIT_BAND) & (new < self.angle_low)]
        hi = idx[(y0 <= self.angle_high - LIMIT_BAND) & (new > self.angle_high)]
        if lo.size + hi.size == 0:
            return None
        M, g = self._limit_rows(g_angle, y, lo, hi)
        return M, -g

    def _step_for(self, problem, theta, scale, limits0, g_angle, y):
        """Step at ``scale`` of the step QP ``problem`` (:meth:`_step_problem`; norm-optimal: the
        change penalty grows as the scale shrinks).

        The angle limits: the velocity-level rows of the samples the trial brought near or past a
        limit (the step is ``d = T v``, so a broken limit is restored by ``alpha T g_i``), plus,
        screened from the step's own prediction for up to :data:`SCREEN_ROUNDS` solves, a
        position-level row for each sample the step would carry past a limit: the first-order
        condition guards only the samples it is written for, and a step may lift another part of
        the swing past the limit."""
        quadratic, c = problem
        rows = None if limits0 is None else (limits0[0], scale * limits0[1])   # d = T v: alpha T g_i
        for _ in range(SCREEN_ROUNDS):
            step, active, solved = self._solve_step(quadratic, scale * c, theta, rows)
            if not solved:      # the trial's own limits cannot be met: no more rows to weigh against
                break
            extra = self._screened(g_angle, y, np.clip(theta + step, self.p_low, self.p_high) - theta)
            if extra is None:
                break
            rows = extra if rows is None else (np.vstack([rows[0], extra[0]]), np.concatenate([rows[1], extra[1]]))
        return step, active, solved

    @single_blas_thread
    def update(self, rollout, profile: PressureProfile, state: LearnerState):
        """Next profile and state from the trial ``rollout`` run with ``profile`` (= state.theta).

        Guard: a trial whose cost exceeds ``guard_factor`` times that of the last trial that
        passed the guard, and that of a ``guard_floor`` error at every sample (noise and drift
        move small costs by large factors), or that aborted, falls back to that trial's profile with half the step;
        the rerun is measured afresh and becomes the reference, so the guard follows a drifting
        plant and cannot lock. A rerun that comes back clearly worse than the same profile did
        before (by more than the square root of the guard factor) shows the plant drifting: the
        halving is undone and from then on worse trials are learned from, not rerun (a trial that
        slammed a stop is still rerun). Step size: a trust region on the prior's predicted
        decrease (Nocedal & Wright 2006, Algorithm 4.1): the ratio of achieved to predicted
        decrease of the last step halves the step scale below 1/4 and doubles it above 3/4; a
        step is applied only where the prior predicts a decrease, halving the scale up to four
        times to find one. On a drifting plant the step is further scaled by the learning gain
        (:data:`MIN_LEARNING_GAIN`): the share of the trial's error that repeats.
        """
        theta = np.asarray(state.theta, dtype=float)
        cost = self.objective.cost(rollout)
        extra = state.extra
        aborted = len(rollout.t) < self.task.n_steps + 1
        ref_cost, ref_theta, rerun = extra.get("ref_cost"), extra.get("ref_theta"), extra.get("rerun", False)
        drifting = bool(extra.get("drifting", False))
        scale = state.step_scale
        if rerun and ref_cost is not None and cost > math.sqrt(self.settings.guard_factor) * ref_cost:
            # the very profile that passed before came back clearly worse: the plant drifted, the
            # rejection was the plant's doing, not the step's; undo its halving and from now on
            # learn from worse trials instead of rerunning profiles measured on an older plant
            drifting = True
            scale = extra.get("scale_before_guard", scale)
        guard_level = max(self.settings.guard_factor * ref_cost, self._guard_floor) if ref_cost is not None else None
        if ref_cost is not None and not rerun and (aborted or (cost > guard_level and not drifting)):
            new_state = LearnerState(theta=list(ref_theta), best_theta=state.best_theta, best_cost=state.best_cost,
                                     step_scale=max(0.5 * state.step_scale, 1.0 / 64), trial=state.trial + 1,
                                     extra={"rerun": True, "ref_cost": ref_cost, "ref_theta": ref_theta,
                                            "scale_before_guard": state.step_scale, "drifting": drifting,
                                            "noise_cost": extra.get("noise_cost"),
                                            "prior_values": extra.get("prior_values") or {}})
            result = UpdateResult(False, 2, STATUS_MESSAGES[2], cost, ref_cost, 0.0, 0, new_state.step_scale,
                                  False, diagnosis={"guard": True, "reference_cost": ref_cost, "drifting": drifting})
            return self.profile(new_state.theta), new_state, result
        # this trial passed the guard: it is the reference the next one is judged by (re-measured
        # every trial, so a drifting plant moves the reference with it)
        ref_cost, ref_theta = cost, theta.tolist()
        e, e_rate = self.objective.errors(rollout)
        achieved_ratio = self._achieved_ratio(extra, e, e_rate)
        if achieved_ratio is not None:
            if achieved_ratio < SHRINK_BELOW:
                scale = max(scale * 0.5, MIN_RATIO_SCALE)
            elif achieved_ratio > GROW_ABOVE:
                scale = min(scale * 2.0, 1.0)
        miss_cost = self._prediction_miss_cost(extra, e, e_rate)
        noise_cost = extra.get("noise_cost")
        if miss_cost is not None:
            noise_cost = miss_cost if noise_cost is None else 0.5 * (noise_cost + miss_cost)
        learning_gain = 1.0 if noise_cost is None or not cost > 0 or not drifting else \
            min(max(1.0 - noise_cost / cost, MIN_LEARNING_GAIN), 1.0)
        best_cost, best_theta = state.best_cost, state.best_theta
        if best_cost is None or cost < best_cost:
            best_cost, best_theta = cost, theta.tolist()
        prior_values, reidentified = self._reidentify(rollout, state)
        prior = self.prior_for(LearnerState(theta=[], extra={"prior_values": prior_values}))
        x = measured_states(rollout, prior, self.task)
        lin = linearise(prior, x, rollout.command[:-1], self.task)
        n_avail = len(e)          # an aborted first trial: learn from the part that ran
        W = self.objective.w_angle[:n_avail]
        w_rate = self.objective.w_rate if self.task.strike_index < n_avail else 0.0
        # G^T W e on the basis (rows of phi past an aborted trial get no gradient)
        grad = (self.phi[:lin.n_steps].T @ lin.adjoint(W * e, w_rate * e_rate)).T.reshape(-1)
        g_angle, g_rate = self._columns(lin)
        # G^T W G as one symmetric product: the angle rows weighted by sqrt(W), the rate row last
        g_weighted = self._buffer("g_weighted", (g_angle.shape[0] + 1, g_angle.shape[1]))
        np.multiply(g_angle, np.sqrt(W)[:, None], out=g_weighted[:-1])
        np.multiply(g_rate, math.sqrt(w_rate), out=g_weighted[-1])
        H = np.matmul(g_weighted.T, g_weighted, out=self._buffer("H", (g_angle.shape[1],) * 2))
        limits = self._violated(g_angle, rollout.measured[:, 0])
        finite = bool(np.all(np.isfinite(H)) and np.all(np.isfinite(grad)))

        def predict(applied):
            pred_e = e - g_angle @ applied
            pred_r = e_rate - g_rate @ applied
            return 0.5 * float(np.sum(W * pred_e * pred_e) + w_rate * pred_r * pred_r)


        def acceptable(predicted_cost, sound):
            # a decrease; or, while the trial broke an angle limit, the step that restores the
            # limit (or violates it least) at a tracking price below the guard factor: feasibility
            # first, the limits keep the paddle off the stops
            return predicted_cost < cost or (limits is not None and limits[2]
                                                 and predicted_cost <= self.settings.guard_factor * cost)

        step, active, solved, predicted, tries = 0.0, 0, False, cost, 0
        new_theta = theta
        problem = self._step_problem(H, grad) if finite else None
        while finite and tries < 5:
            step, active, solved = self._step_for(problem, theta, scale * learning_gain, limits, g_angle,
                                                  rollout.measured[:, 0])
            new_theta = np.clip(theta + step, self.p_low, self.p_high)
            predicted = predict(new_theta - theta)
            tries += 1
            if acceptable(predicted, solved) or scale <= 1.0 / 64:
                break
            scale = max(scale * 0.5, 1.0 / 64)
        decreasing = finite and acceptable(predicted, solved)
        if not decreasing:
            new_theta, predicted = theta, cost
        applied = new_theta - theta
        at_box = (new_theta <= self.p_low) | (new_theta >= self.p_high)
        boxed = int(np.count_nonzero(at_box))
        if not finite:
            status = 4
        elif not decreasing:
            status = 5
        elif not solved:
            status = 3
        else:
            status = 1 if (active or boxed) else 0
        new_state = LearnerState(theta=new_theta.tolist(), best_theta=best_theta, best_cost=best_cost,
                                 step_scale=scale, trial=state.trial + 1,
                                 extra={"ref_cost": ref_cost, "ref_theta": ref_theta, "prior_values": prior_values,
                                        "drifting": drifting, "noise_cost": noise_cost})
        if finite and n_avail == self.task.n_steps + 1:
            # what the prior says this step will do to the errors, for the next trial's ratio
            new_state.extra.update({"last_error": e.tolist(), "last_rate_error": float(e_rate),
                                    "predicted_change": (-(g_angle @ applied)).tolist(),
                                    "predicted_rate_change": float(-(g_rate @ applied))})
        diagnosis = {"boxed_knots": boxed, "knots": int(new_theta.size),
                     "boxed_in_strike_window": int(np.count_nonzero(at_box & self._strike_knots)),
                     "angle_limits": int(limits[0].shape[0]) if limits is not None else 0,
                     "achieved_over_predicted": achieved_ratio, "reidentified": reidentified,
                     "prior_values": prior_values, "step_tries": tries, "drifting": drifting,
                     "learning_gain": learning_gain}
        result = UpdateResult(status in (0, 1), status, STATUS_MESSAGES[status], cost,
                              predicted if finite else cost, float(np.max(np.abs(applied))) / 1e3,
                              active + boxed, scale, finite and decreasing, diagnosis=diagnosis)
        return self.profile(new_state.theta), new_state, result
