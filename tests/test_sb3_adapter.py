"""The optional Stable-Baselines3 adapter (skipped where that library is not installed)."""
import numpy as np
import pytest

sb3 = pytest.importorskip("stable_baselines3")

from muscle_sim.env import FlipperStrikeEnv  # noqa: E402
from muscle_sim.sb3_vec_env import StrikeVecEnv  # noqa: E402

from conftest import DRIFT  # noqa: E402


def test_the_adapter_follows_sb3_conventions_and_matches_single_envs():
    # Reference: Stable-Baselines3's VecEnv contract (same-step reset, terminal_observation,
    # TimeLimit.truncated) and, member by member, single envs seeded s + i
    venv = StrikeVecEnv(2, str(DRIFT), max_episode_steps=25)
    venv.seed(3)
    obs = venv.reset()
    singles = [FlipperStrikeEnv(str(DRIFT)) for _ in range(2)]
    ref = np.stack([e.reset(seed=3 + i)[0] for i, e in enumerate(singles)])
    np.testing.assert_allclose(obs, ref, rtol=1e-6)
    rng = np.random.default_rng(0)
    ends = 0
    for t in range(60):
        a = rng.uniform(-1, 1, size=(2, 2)).astype(np.float32)
        obs, reward, done, infos = venv.step(a)
        assert reward.dtype == np.float32 and done.dtype == bool and len(infos) == 2
        for i, e in enumerate(singles):
            o, r, term, trunc, info = e.step(a[i])
            cut = (t + 1) % 25 == 0
            if term or trunc or cut:
                assert done[i]
                np.testing.assert_allclose(infos[i]["terminal_observation"], o, rtol=1e-6)
                assert infos[i]["TimeLimit.truncated"] == (not term)
                assert infos[i]["metrics"]["rms_error_deg"] == pytest.approx(info["metrics"]["rms_error_deg"])
                o, _ = e.reset()
                ends += 1
            np.testing.assert_allclose(obs[i], o, rtol=1e-6)
            assert reward[i] == pytest.approx(r, rel=1e-5)
    assert ends >= 4


def test_a_stable_baselines3_agent_trains_on_the_adapter():
    from stable_baselines3 import PPO

    venv = StrikeVecEnv(2, max_episode_steps=50)
    model = PPO("MlpPolicy", venv, n_steps=64, batch_size=64, n_epochs=1, seed=0, device="cpu")
    model.learn(total_timesteps=256)
    action, _ = model.predict(venv.reset(), deterministic=True)
    assert action.shape == (2, 2)
