"""The learner: ILC theory on lifted linear systems, model gradients, limits, demo, resume."""
import json
import math
from dataclasses import replace

import numpy as np
import pytest

from controllers.base import PressureProfile
from controllers.learning import gradient_step, norm_optimal_step
from controllers.sensitivity import linearise
from controllers.tuning import tune
from muscle_sim.integrate import simulate
from muscle_sim.plant import initial_state
from muscle_sim.records import Rollout
from muscle_sim.simulation import Setup, home_pressures

from conftest import DEMO, strike_commands


def _lifted(n=40, seed=0):
    """Lifted lower-triangular Toeplitz G of a stable second-order impulse response."""
    k = np.arange(n)
    h = 0.2 * np.exp(-0.15 * k) * np.sin(0.4 * (k + 1))
    h[0] = 0.3
    G = np.zeros((n, n))
    for i in range(n):
        G[i, : i + 1] = h[i::-1]
    e0 = np.random.default_rng(seed).standard_normal(n)
    return G, e0


@pytest.mark.parametrize("rule", ["norm-optimal", "gradient"])
def test_updates_contract_the_error_as_lifted_theory_predicts(rule):
    # Reference: e_k = (I - G L)^k e_0 with L the learning matrix, computed independently by an
    # eigendecomposition in numpy (Bristow, Tharayil & Alleyne 2006; Amann et al. 1996;
    # Owens et al. 2009); tolerance 1e-8 relative after 8 trials.
    G, e0 = _lifted()
    W = np.eye(G.shape[0])
    H = G.T @ W @ G
    e, u = e0.copy(), np.zeros_like(e0)
    for _ in range(8):
        step = norm_optimal_step(H, G.T @ W @ e, 0.1) if rule == "norm-optimal" else gradient_step(H, G.T @ W @ e)
        u = u + step
        e = e0 - G @ u
    if rule == "norm-optimal":
        L = np.linalg.solve(H + 0.1 * np.trace(H) / H.shape[0] * np.eye(H.shape[0]), G.T @ W)
    else:
        L = G.T @ W / np.linalg.eigvalsh(H)[-1]
    vals, vecs = np.linalg.eig(np.eye(G.shape[0]) - G @ L)
    predicted = np.real(vecs @ np.diag(vals ** 8) @ np.linalg.solve(vecs, e0))
    np.testing.assert_allclose(e, predicted, rtol=1e-8, atol=1e-10)
    assert np.linalg.norm(e) < np.linalg.norm(e0)


def test_robust_monotone_condition_predicts_both_sides_of_the_boundary():
    # Owens, Hatonen & Daley 2009: with G = G0 U, gradient ILC u+ = u + beta G0^T e is monotone iff
    # U + U^T > beta U^T G0^T G0 U. For U = gamma I this is gamma < 2 / (beta sigma_max^2).
    G0, e0 = _lifted(30, seed=1)
    beta = 1.0 / np.linalg.eigvalsh(G0.T @ G0)[-1]
    boundary = 2.0 / (beta * np.linalg.eigvalsh(G0.T @ G0)[-1])      # = 2 here
    v = np.linalg.svd(G0)[0][:, 0]                                   # excite the top singular direction
    e_start = e0 + 5 * v
    for gamma, converges in ((0.95 * boundary, True), (1.05 * boundary, False)):
        G = gamma * G0
        U = gamma * np.eye(G0.shape[0])
        cond = np.linalg.eigvalsh(U + U.T - beta * U.T @ G0.T @ G0 @ U)[0] > 0
        assert cond == converges
        e, u = e_start.copy(), np.zeros_like(e0)
        norms = [np.linalg.norm(e)]
        for _ in range(60):
            u = u + gradient_step(G0.T @ G0, G0.T @ e)
            e = e_start - G @ u
            norms.append(np.linalg.norm(e))
        assert (norms[-1] < norms[0]) == converges


def _prior_linearised(setup, n, strike_time):
    """(hold, commands, x0, linearisation) of the prior along its own noise-free strike of n steps."""
    prior, task = setup.prior, setup.task
    hold = np.array(home_pressures(prior, task))
    _, _, cmd = strike_commands(setup, n_steps=n)
    x0 = initial_state(prior, task.home_angle, hold)
    traj = simulate(prior, x0, cmd, task.dt, task.n_substeps, u_before=hold)
    return hold, cmd, x0, linearise(prior, traj, cmd, replace(task, strike_time=strike_time))


def _demo_with_prior_pressure_model(model: str) -> Setup:
    import yaml

    raw = yaml.safe_load(DEMO.read_text())
    raw["prior"]["pressure_model"] = model
    return Setup.from_config(raw)


def test_adjoint_and_forward_sensitivity_agree_with_finite_differences_of_the_prior():
    # Reference: central finite differences of the prior model's simulation (integrate.simulate)
    # along its own noise-free trajectory; adjoint identity <G a, b> = <a, G^T b> to 1e-10.
    # (The regulator-lag prior is smooth along it; the valve-flow prior's spools cross their
    # closed position, where the flow law has a kink, so its lifted map is checked step by step
    # in the next test.)
    setup = Setup.from_config(DEMO)
    prior, task = setup.prior, setup.task
    n = 150
    hold, cmd, x0, lin = _prior_linearised(setup, n, 0.1)
    rng = np.random.default_rng(3)
    a = rng.standard_normal((n, 2)) * 1e3
    b = rng.standard_normal(n + 1)
    ang, rate = lin.forward(a)
    g = lin.adjoint(b, 0.7)
    assert b @ ang + 0.7 * rate == pytest.approx(np.sum(g * a), rel=1e-10)
    h = 1.0
    plus = simulate(prior, x0, cmd + h * a, task.dt, task.n_substeps, u_before=hold)
    minus = simulate(prior, x0, cmd - h * a, task.dt, task.n_substeps, u_before=hold)
    fd = (plus[:, 0] - minus[:, 0]) / (2 * h)
    # tolerance: 1e-4 of the response (central differences of an RK4 map)
    assert np.max(np.abs(ang - fd)) < 1e-4 * np.max(np.abs(fd)) + 1e-12


def test_valve_prior_linearisation_carries_the_spools_the_simulator_carries():
    # Reference: the prior's own noise-free simulation (integrate.simulate, six states) and
    # central differences of its one-step map (integrate.Stepper, steps as in linearise) from the
    # FULL simulated state. The spool openings are not measured: measured_states must rebuild them
    # from the sampled pressures and delayed commands by the same spool law (to 0.01 of the full
    # opening: the pressure is interpolated linearly between samples), and the
    # linearisation must then equal the one-step map's derivatives (1e-6 relative: the same
    # differences of the same map). Linearising at closed spools, as if they were inert, misses
    # B by far more.
    from types import SimpleNamespace

    from controllers.sensitivity import measured_states, state_size
    from muscle_sim.integrate import Stepper

    setup = _demo_with_prior_pressure_model("valve")
    prior, task = setup.prior, setup.task
    assert state_size(prior) == 6 and state_size(Setup.from_config(DEMO).prior) == 4
    n = 150
    hold, cmd, x0, _ = _prior_linearised(setup, n, 0.1)
    traj = simulate(prior, x0, cmd, task.dt, task.n_substeps, u_before=hold)
    # the logged command column: the first command stands for the hold before it acts
    rollout = SimpleNamespace(measured=traj[:, :4], command=np.vstack([cmd, cmd[-1:]]))
    rebuilt = measured_states(rollout, prior, replace(task, strike_time=0.1))
    assert rebuilt.shape == (n + 1, 6)
    delay = round(prior.pneumatics.delay / task.dt)
    np.testing.assert_allclose(rebuilt[:, 4:], traj[:, 4:], rtol=0, atol=1e-2)
    lin = linearise(prior, traj, cmd, replace(task, strike_time=0.1))

    def one_step(x, u):
        stepper = Stepper(prior, task.dt, task.n_substeps)
        stepper.reset(x, u_before=u)
        return stepper.step(u).copy()

    steps = np.array([1e-6, 1e-5, 1.0, 1.0, 1e-6, 1e-6])
    for k in (70, 100, 130, 140):
        u = cmd[k - delay]
        assert abs(traj[k, 4]) + abs(traj[k, 5]) > 0.2          # spools open: the test can see them
        B = np.column_stack([(one_step(traj[k], u + e) - one_step(traj[k], u - e)) / 2.0 for e in np.eye(2)])
        A = np.column_stack([(one_step(traj[k] + s * e, u) - one_step(traj[k] - s * e, u)) / (2 * s)
                             for s, e in zip(steps, np.eye(6))])
        np.testing.assert_allclose(lin.B[k], B, rtol=1e-6, atol=1e-6 * np.max(np.abs(B)))
        np.testing.assert_allclose(lin.A[k], A, rtol=1e-6, atol=1e-6 * np.max(np.abs(A)))
        closed = traj[k].copy()
        closed[4:] = 0.0
        B_closed = np.column_stack([(one_step(closed, u + e) - one_step(closed, u - e)) / 2.0 for e in np.eye(2)])
        assert np.max(np.abs(B_closed[:4] - B[:4])) > 1e-3 * np.max(np.abs(B[:4]))


def test_learned_beats_model_only_on_the_demo_and_stays_within_limits(tmp_path):
    setup = Setup.from_config(DEMO)
    summary = tune(setup, "norm-optimal", 10, 0, tmp_path)
    first, best = summary["trials"][0], summary["trials"][summary["best_trial"]]
    for key in ("rms_error_deg", "strike_angle_error_deg", "strike_speed_error_pct"):
        assert abs(best[key]) < abs(first[key])
    assert best["rms_error_deg"] < 0.2 * first["rms_error_deg"]
    rated_kpa = setup.rated_pressure / 1e3
    for i in range(11):
        profile = PressureProfile.read_csv(tmp_path / "profiles" / f"profile-{i:04d}.csv")
        assert profile.commands.min() >= 0.0 and profile.commands.max() <= rated_kpa * 1e3 + 1e-6


def test_joint_limit_constraint_keeps_the_swing_inside(tmp_path):
    # The reference turns at 35 deg; a margin of 15 deg puts the learner's limit at 30 deg, so
    # the velocity-level constraint (Muehlebach & Jordan 2022) must hold the swing below it.
    import yaml

    raw = yaml.safe_load(DEMO.read_text())
    raw["learning"]["angle_margin"] = "15 deg"
    setup = Setup.from_config(raw)
    # Held on every trial from the third on (the first learned steps may overshoot while the
    # prior's first-order prediction of the peak is corrected by the measured excess), not only
    # on the last: a learner that lets the swing creep 2-3 deg past its limit on some trials fails.
    summary = tune(setup, "norm-optimal", 10, 0, tmp_path)
    limit = setup.plant.joint.upper_stop - math.radians(15)
    peaks = [np.degrees(Rollout.read_csv(tmp_path / "rollouts" / f"trial-{i:04d}.csv").measured[:, 0].max())
             for i in range(10)]
    assert max(peaks[3:]) < np.degrees(limit) + 1.0, peaks
    assert any(r["active_limits"] > 0 for r in summary["trials"])


def test_step_keeps_every_predicted_sample_inside_the_angle_limit():
    # A swing 2 deg inside the upper limit (clear of the 1 deg band, so no row of the trial's own)
    # and an error asking for 10 deg more: the unconstrained step lifts the peak past the limit;
    # the screened step must keep the linear prediction y + G d inside it at every 4 ms sample
    # (derived from the screening rule: each solve adds the samples its predecessor carried past
    # the limit; tolerance 0.01 deg, the learner's ANGLE_CONDITION_TOLERANCE).
    from controllers.tuning import make_learner

    setup = Setup.from_config(DEMO)
    learner = make_learner(setup, "norm-optimal", 10, 0)
    n, p = setup.task.n_steps + 1, learner.phi.shape[1] * 2
    t = np.arange(n) * setup.task.dt
    y = (learner.angle_high - math.radians(2.0)) * np.sin(np.pi * t / t[-1])
    rng = np.random.default_rng(4)
    g_angle = np.abs(rng.standard_normal((n, p))) * 2e-7 * (t[:, None] > 0.05)    # [rad/Pa], causal
    e = np.full(n, math.radians(10.0))
    grad, H = g_angle.T @ e, g_angle.T @ g_angle
    theta = np.full(p, 0.5 * (learner.p_low + learner.p_high))
    free, _, _ = learner._solve_step(learner._factored(H + 1e-3 * np.trace(H) / p * np.eye(p)), grad, theta,
                                     None)
    stride = learner._limit_stride
    assert np.max((y + g_angle @ free)[::stride]) > learner.angle_high + math.radians(1.0)   # the case bites
    step, _, solved = learner._step_for(learner._step_problem(H, grad), theta, 1.0, None, g_angle, y)
    applied = np.clip(theta + step, learner.p_low, learner.p_high) - theta
    assert solved
    assert np.max((y + g_angle @ applied)[::stride]) <= learner.angle_high + math.radians(0.01)


def test_resume_reproduces_the_uninterrupted_run_bit_for_bit(tmp_path):
    setup = Setup.from_config(DEMO)
    full, part = tmp_path / "full", tmp_path / "part"
    tune(setup, "norm-optimal", 5, 7, full)
    tune(setup, "norm-optimal", 5, 7, part, callback=lambda row: row["trial"] == 2)   # stop after trial 2
    assert len(json.loads((part / "summary.json").read_text())["trials"]) == 3
    tune(setup, "norm-optimal", 5, 7, part, resume=True)
    a = json.loads((full / "summary.json").read_text())
    b = json.loads((part / "summary.json").read_text())
    assert a["trials"] == b["trials"]
    for name in ("final_profile.csv", "profiles/state-0005.json", "rollouts/trial-0004.csv"):
        assert (full / name).read_bytes() == (part / name).read_bytes()


def test_box_qp_is_the_bounded_least_squares_minimiser():
    # reference: scipy.optimize.lsq_linear (bounded-variable least squares, Stark & Parker 1995) on
    # the same QP written as min |L^T z - L^-1 b|^2 with A = L L^T; tolerance 1e-9 absolute
    from scipy.optimize import lsq_linear

    from scipy.linalg import cho_factor

    from controllers.learning import box_qp

    rng = np.random.default_rng(11)
    for case in range(40):
        n = int(rng.integers(2, 40))
        Q = rng.standard_normal((n, n))
        A = Q @ Q.T + 0.05 * n * np.eye(n)
        b = 5 * rng.standard_normal(n)
        low, high = -rng.random(n), rng.random(n)
        start = None if case % 2 else rng.uniform(low, high)
        factor = cho_factor(A) if case % 3 == 0 else None            # the caller's factor, or its own
        z, converged = box_qp(A, b, low, high, start=start, factor=factor)
        L = np.linalg.cholesky(A)
        ref = lsq_linear(L.T, np.linalg.solve(L, b), bounds=(low, high), method="bvls", tol=1e-14).x
        assert converged
        np.testing.assert_allclose(z, ref, rtol=0, atol=1e-9)


def test_box_qp_meets_its_optimality_conditions_on_ill_conditioned_matrices():
    # KKT conditions of the bound-constrained convex QP (Nocedal & Wright 2006, ch. 16; cited from
    # memory): zero gradient on free components, the gradient pointing out of the box at every
    # bound; matrices of condition 1e4 ... 1e10 (a penalised piece of the step QP reaches 1e9),
    # on both sides of BORDERED_RCOND. Tolerance: 1e-7 of |b| (derived: rounding of order
    # cond * eps on the multipliers of the worst case).
    from controllers.learning import box_qp

    rng = np.random.default_rng(12)
    for case, decades in enumerate((4, 6, 8, 10)):
        n = 60
        Q, _ = np.linalg.qr(rng.standard_normal((n, n)))
        A = (Q * np.logspace(0, -decades, n)) @ Q.T
        A = 0.5 * (A + A.T)
        b = rng.standard_normal(n)
        low, high = -0.2 * np.ones(n), 0.2 * np.ones(n)
        z, converged = box_qp(A, b, low, high)
        assert converged, decades
        g = A @ z - b
        free = (z > low) & (z < high)
        tol = 1e-7 * np.linalg.norm(b)
        assert np.max(np.abs(g[free]), initial=0.0) < tol, decades
        assert np.all(g[z <= low] >= -tol) and np.all(g[z >= high] <= tol), decades


def test_penalised_box_qp_reaches_the_penalty_minimum():
    # reference: the same penalised objective minimised by scipy's L-BFGS-B with tight tolerances
    # (reference library); the exact method must reach a value no higher (to 1e-9 relative), meet
    # its optimality conditions, and hold feasible constraints to O(1/rho)
    from scipy.optimize import minimize

    from controllers.learning import penalised_box_qp

    rng = np.random.default_rng(5)
    n, m, rho = 12, 4, 1e6
    Q = rng.standard_normal((n, n))
    A, b = Q @ Q.T + n * np.eye(n), rng.standard_normal(n)
    low, high = -np.ones(n), np.ones(n)
    M = rng.standard_normal((m, n))
    M /= np.linalg.norm(M, axis=1)[:, None]
    h = M @ rng.uniform(-0.5, 0.5, n) + 0.2          # met by some point inside the box

    def objective(z):
        short = np.minimum(M @ z - h, 0.0)
        return 0.5 * z @ A @ z - b @ z + 0.5 * rho * short @ short, A @ z - b + rho * M.T @ short

    z, converged = penalised_box_qp(A, b, low, high, M, h, rho)
    ref = minimize(objective, np.zeros(n), jac=True, method="L-BFGS-B", bounds=list(zip(low, high)),
                   options={"maxiter": 100000, "ftol": 1e-15, "gtol": 1e-12}).x
    assert converged
    assert objective(z)[0] <= objective(ref)[0] + 1e-9 * abs(objective(ref)[0])
    grad = objective(z)[1]
    inside = (z > low + 1e-12) & (z < high - 1e-12)
    assert np.max(np.abs(grad[inside])) < 1e-8 * rho
    assert np.all(grad[z <= low + 1e-12] >= -1e-6) and np.all(grad[z >= high - 1e-12] <= 1e-6)
    assert np.min(M @ z - h) > -10.0 / rho * np.linalg.norm(b) - 1e-9


def test_forward_pass_on_the_basis_equals_the_general_forward_pass(demo_setup):
    # reference: Linearisation.forward of the dense basis columns (the general recursion);
    # tolerance 1e-12 of the largest response (the same sums in another order)
    task = demo_setup.task
    n = 200
    _, _, _, lin = _prior_linearised(demo_setup, n, 0.2)
    from controllers.basis import HatBasis

    phi = HatBasis.for_grid(n, task.dt, 0.008).matrix()
    kn = phi.shape[1]
    du = np.zeros((n, 2, 2 * kn))
    du[:, 0, :kn], du[:, 1, kn:] = phi, phi
    ang, rate = lin.forward_on_basis(phi)
    ang_ref, rate_ref = lin.forward(du)
    scale = np.max(np.abs(ang_ref))
    np.testing.assert_allclose(ang, ang_ref, rtol=0, atol=1e-12 * scale)
    np.testing.assert_allclose(rate, rate_ref, rtol=0, atol=1e-12 * np.max(np.abs(rate_ref)))


def _first_trial(raw_or_path, trials=3):
    from controllers.simple import ReplayProfile
    from controllers.tuning import make_learner, start_profile, trial_rng
    from muscle_sim.runs import run_trial

    setup = Setup.from_config(raw_or_path)
    learner = make_learner(setup, "norm-optimal", trials, 0)
    state = learner.initial_state(start_profile(setup))
    profile = learner.profile(state.theta)
    rollout, _ = run_trial(setup, ReplayProfile(profile), 0, np.random.default_rng([0, 0]))
    return learner, state, profile, rollout


def test_update_success_means_a_sound_step():
    # reference: the learner's own definition (derived): success only for an exactly solved step
    # that meets every violated angle limit's condition; without limits the prior then predicts a
    # lower cost (the exact minimiser of a quadratic that is the cost at zero step)
    import yaml

    learner, state, profile, rollout = _first_trial(DEMO)
    _, _, result = learner.update(rollout, profile, state)
    assert result.success and result.accepted and result.status in (0, 1)
    assert result.predicted_cost < result.cost
    # the guard: a trial far worse than the last good one is no sound step; that profile is rerun
    worse = replace(state, extra={"ref_cost": result.cost / 10, "ref_theta": state.theta})
    _, after, guarded = learner.update(rollout, profile, worse)
    assert (guarded.success, guarded.accepted, guarded.status) == (False, False, 2)
    assert after.theta == state.theta
    # a limit that cannot be met: with a margin of 16 deg the lower limit (-29 deg) lies above
    # the home angle (-30 deg, from the config), also where the commands cannot reach yet
    raw = yaml.safe_load(DEMO.read_text())
    raw["learning"]["angle_margin"] = "16 deg"
    learner16, state16, profile16, rollout16 = _first_trial(raw)
    _, _, missed = learner16.update(rollout16, profile16, state16)
    assert (missed.success, missed.accepted, missed.status) == (False, True, 3)
    # limits that can be met: a margin of 15 deg puts the lower limit at the home angle
    raw["learning"]["angle_margin"] = "15 deg"
    learner15, state15, profile15, rollout15 = _first_trial(raw)
    _, _, met = learner15.update(rollout15, profile15, state15)
    assert met.success and met.status == 1 and met.active_constraints > 0


def test_update_on_a_trial_the_prior_cannot_linearise_keeps_the_profile():
    # reference: derived: a NaN rate reading makes the prior's linearisation NaN; the update must
    # say so and keep the profile rather than return NaN commands
    learner, state, profile, rollout = _first_trial(DEMO)
    bad = replace(rollout, measured=rollout.measured.copy())
    bad.measured[40, 1] = np.nan
    new_profile, new_state, result = learner.update(bad, profile, state)
    assert (result.success, result.accepted, result.status) == (False, False, 4)
    assert new_state.theta == state.theta and np.all(np.isfinite(new_profile.commands))


def test_the_strike_objective_tracks_a_given_reference_instead_of_the_rollouts():
    # reference: e = reference - measured (derived from the objective's definition); a planned
    # swing offset 0.1 rad from the rollout's own reference column changes every angle error by 0.1
    from controllers.learning import LearningSettings, StrikeObjective

    setup = Setup.from_config(DEMO)
    task = setup.task
    n = task.n_steps + 1
    t = np.arange(n) * task.dt
    measured = np.zeros((n, 4))
    own = np.full(n, 0.2)
    roll = Rollout(t, measured, np.zeros((n, 2)), own)
    settings = LearningSettings.from_config(setup.config)
    e_task, _ = StrikeObjective(task, settings).errors(roll)
    e_plan, _ = StrikeObjective(task, settings, reference=own + 0.1).errors(roll)
    np.testing.assert_allclose(e_task, 0.2)
    np.testing.assert_allclose(e_plan, 0.3)
    with pytest.raises(ValueError, match="reference"):
        StrikeObjective(task, settings, reference=np.zeros(n - 1))
