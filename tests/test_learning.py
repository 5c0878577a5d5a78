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


def test_adjoint_and_forward_sensitivity_agree_with_finite_differences_of_the_prior():
    # Reference: central finite differences of the prior model's simulation (integrate.simulate)
    # along its own noise-free trajectory; adjoint identity <G a, b> = <a, G^T b> to 1e-10.
    setup = Setup.from_config(DEMO)
    prior, task = setup.prior, setup.task
    n = 150
    hold = np.array(home_pressures(prior, task))
    _, _, cmd = strike_commands(setup, n_steps=n)
    x0 = initial_state(prior, task.home_angle, hold)
    traj = simulate(prior, x0, cmd, task.dt, task.n_substeps, u_before=hold)
    lin = linearise(prior, traj[:, :4], cmd, replace(task, strike_time=0.1))
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
    summary = tune(setup, "norm-optimal", 10, 0, tmp_path)
    last = Rollout.read_csv(tmp_path / "rollouts" / "trial-0009.csv")
    limit = setup.plant.joint.upper_stop - math.radians(15)
    assert np.degrees(last.measured[:, 0].max()) < np.degrees(limit) + 1.0
    assert any(r["active_limits"] > 0 for r in summary["trials"])


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
