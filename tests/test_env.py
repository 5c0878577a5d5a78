"""Gymnasium environments: API contract, determinism, and scalar/batched agreement."""
import warnings

import gymnasium as gym
import numpy as np
import pytest
from gymnasium.utils.env_checker import check_env

import muscle_sim  # noqa: F401  (registers the ids)
from muscle_sim.env import FlipperStrikeEnv
from muscle_sim.vector_env import FlipperStrikeVectorEnv

from conftest import DEMO, DRIFT, strike_commands
from muscle_sim.simulation import Setup

ENV_ID = "pamjoint/FlipperStrike-v0"


def _strike_actions(n=400):
    # the fixture's strike commands (clear of the stops) as actions in [-1, 1]
    setup = Setup.from_config(DEMO)
    _, _, cmd = strike_commands(setup, n_steps=n)
    return (cmd / (0.5 * setup.rated_pressure) - 1.0).astype(np.float32)


def test_check_env_passes_without_warnings():
    # Reference: Gymnasium's own env checker (gymnasium.utils.env_checker.check_env).
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        check_env(gym.make(ENV_ID).unwrapped)
        check_env(gym.make(ENV_ID, render_mode="rgb_array").unwrapped)


def test_make_and_make_vec_accept_config():
    env = gym.make(ENV_ID, config=str(DEMO))
    obs, info = env.reset(seed=3)
    assert env.observation_space.contains(obs)
    venv = gym.make_vec(ENV_ID, num_envs=3, vectorization_mode="vector_entry_point", config=str(DRIFT))
    obs, info = venv.reset(seed=3)
    assert obs.shape == (3, 5) and obs.dtype == np.float32
    assert isinstance(venv.unwrapped, FlipperStrikeVectorEnv)


def _episode(env, actions, seed):
    obs, _ = env.reset(seed=seed)
    out = [obs]
    rewards = []
    for a in actions:
        obs, r, term, trunc, info = env.step(a)
        out.append(obs)
        rewards.append(r)
        if term or trunc:
            break
    return np.array(out), np.array(rewards), info


def test_same_seed_same_bits_and_episode_end_carries_metrics():
    env = FlipperStrikeEnv(DEMO)
    obs1, r1, info1 = _episode(env, _strike_actions(), seed=11)
    obs2, r2, info2 = _episode(env, _strike_actions(), seed=11)
    assert obs1.tobytes() == obs2.tobytes() and r1.tobytes() == r2.tobytes()
    obs3, _, _ = _episode(env, _strike_actions(), seed=12)
    assert obs3.tobytes() != obs1.tobytes()          # the sensor noise depends on the seed
    assert len(r1) == 400                           # truncated at the trial end
    for key in ("rms_error_deg", "strike_angle_error_deg", "strike_speed_error_pct", "peak_pressure_kpa"):
        assert np.isfinite(info1["metrics"][key])
    assert type(r1[0].item()) is float


def test_rewards_and_flags_are_python_types():
    env = FlipperStrikeEnv(DEMO)
    env.reset(seed=0)
    obs, r, term, trunc, info = env.step(np.zeros(2, dtype=np.float32))
    assert type(r) is float and type(term) is bool and type(trunc) is bool


def test_bad_actions_raise_and_out_of_range_are_clipped_and_counted():
    env = FlipperStrikeEnv(DEMO)
    env.reset(seed=0)
    with pytest.raises(ValueError, match="action"):
        env.step(np.array([np.nan, 0.0]))
    with pytest.raises(ValueError, match="action"):
        env.step(np.array([np.inf, 0.0]))
    _, _, _, _, info = env.step(np.array([3.0, -2.0]))
    assert info["clipped_actions"] == 2
    venv = FlipperStrikeVectorEnv(2, DEMO)
    venv.reset(seed=0)
    with pytest.raises(ValueError, match="action"):
        venv.step(np.array([[0.0, np.nan], [0.0, 0.0]]))


def test_scalar_env_matches_batched_env_step_for_step():
    # Reference: the numpy-batched core (vector env, B = 1) vs the Python-float scalar path,
    # same seed and actions: observations equal to float32 resolution (rtol 1e-6), rewards 1e-6.
    actions = _strike_actions()
    env = FlipperStrikeEnv(DEMO)
    venv = FlipperStrikeVectorEnv(1, DEMO)
    obs_s, _ = env.reset(seed=5)
    obs_v, _ = venv.reset(seed=5)
    np.testing.assert_allclose(obs_s, obs_v[0], rtol=1e-6, atol=1e-6)
    for a in actions:
        obs_s, r_s, term_s, trunc_s, info_s = env.step(a)
        obs_v, r_v, term_v, trunc_v, info_v = venv.step(a[None, :])
        scale = np.maximum(np.abs(obs_s), [1e-3, 1e-2, 1e2, 1e2, 1e-3])
        assert np.all(np.abs(obs_s - obs_v[0]) <= 2e-6 * scale + 1e-7), (obs_s, obs_v[0])
        assert r_s == pytest.approx(r_v[0], rel=1e-5, abs=1e-9)
        assert (term_s, trunc_s) == (bool(term_v[0]), bool(trunc_v[0]))
        if term_s or trunc_s:
            break
    for key in ("rms_error_deg", "strike_angle_error_deg", "peak_pressure_kpa"):
        assert info_v[key][0] == pytest.approx(info_s["metrics"][key], rel=1e-5)


def test_vector_env_autoresets_on_the_next_step():
    venv = FlipperStrikeVectorEnv(2, DEMO, max_episode_steps=5)
    obs0, _ = venv.reset(seed=1)
    for _ in range(5):
        obs, r, term, trunc, info = venv.step(np.zeros((2, 2), dtype=np.float32))
    assert trunc.all() and "_rms_error_deg" in info
    obs, r, term, trunc, info = venv.step(np.ones((2, 2), dtype=np.float32))
    assert np.all(r == 0.0) and not trunc.any()
    assert obs[:, 4] == pytest.approx(obs0[:, 4])          # time to strike is back at the start


def test_drift_changes_the_plant_between_trials():
    env = FlipperStrikeEnv(DRIFT)
    env.reset(seed=0)
    supply0 = env.trial.params.pneumatics.supply_pressure
    env.reset(options={"trial": 20})
    assert env.trial.params.pneumatics.supply_pressure < supply0
    assert env.trial.params.muscle.braid_friction > env.setup.plant.muscle.braid_friction


def test_render_returns_an_image():
    env = FlipperStrikeEnv(DEMO, render_mode="rgb_array")
    env.reset(seed=0)
    frame = env.render()
    assert frame.dtype == np.uint8 and frame.ndim == 3 and frame.shape[2] == 3
