"""Gymnasium environments: API contract, determinism, and scalar/batched agreement."""
import warnings

import gymnasium as gym
import numpy as np
import pytest
from gymnasium.utils.env_checker import check_env
from gymnasium.vector import AutoresetMode

import muscle_sim  # noqa: F401  (registers the ids)
from muscle_sim.env import FlipperStrikeEnv
from muscle_sim.vector_env import FlipperStrikeVectorEnv

from conftest import DEMO, DRIFT, strike_commands
from muscle_sim.simulation import Setup

ENV_ID = "pamjoint/FlipperStrike-v1"


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
    assert obs.shape == (3, 6) and obs.dtype == np.float32
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


class _Weird:
    def __array__(self, *args, **kwargs):
        raise TypeError("no array here")


BAD_ACTIONS = [np.array([np.nan, 0.0]), np.array([np.inf, 0.0]), [0.0], [0.0, 0.0, 0.0], np.zeros((2, 1)),
               [[0.0, 0.0]], "ab", ["0.1", "0.2"], [None, 0.0], [{}, 0.0], {"a": 1}, None, 1.0, [1j, 0.0],
               np.array([1 + 0j, 0]), [True, False], [10 ** 400, 0], [[0.0], [0.0, 0.0]], _Weird(), object(),
               np.array(["x", "y"]), [float("nan")] * 2, np.zeros(2, dtype=object)]


def test_bad_actions_raise_one_line_value_errors_and_out_of_range_are_clipped_and_counted():
    # the documented contract: anything that is not two real finite numbers is a one-line ValueError
    env = FlipperStrikeEnv(DEMO)
    env.reset(seed=0)
    for bad in BAD_ACTIONS:
        with pytest.raises(ValueError, match="^action") as caught:
            env.step(bad)
        assert "\n" not in str(caught.value)
    _, _, _, _, info = env.step(np.array([3.0, -2.0]))
    assert info["clipped_actions"] == 2
    _, _, _, _, info = env.step([2, -1])             # plain ints are numbers too
    assert info["clipped_actions"] == 3
    venv = FlipperStrikeVectorEnv(2, DEMO)
    venv.reset(seed=0)
    for bad in [np.array([[0.0, np.nan], [0.0, 0.0]]), np.zeros((3, 2)), np.zeros(2), [[0, 0], [0]],
                np.zeros((2, 2), dtype=complex), [[None, 0], [0, 0]]]:
        with pytest.raises(ValueError, match="^action"):
            venv.step(bad)


def _slam_actions(n):
    # muscle A full, muscle B empty from the first step: the paddle slams the upper stop
    return np.tile(np.array([1.0, -1.0], dtype=np.float32), (n, 1))


def _run_both(config, n_envs, steps, actions_of, seed, max_episode_steps=None, same_step=False):
    # Reference: Gymnasium's own SyncVectorEnv (make_vec, vectorization_mode="sync"): n single
    # envs, env i seeded s + i, next-step (or same-step) autoreset. The native vector env must
    # match it.
    kw = {} if max_episode_steps is None else {"max_episode_steps": max_episode_steps}
    mode = AutoresetMode.SAME_STEP if same_step else AutoresetMode.NEXT_STEP
    sync = gym.make_vec(ENV_ID, num_envs=n_envs, vectorization_mode="sync", config=str(config),
                        vector_kwargs={"autoreset_mode": mode}, **kw)
    native = gym.make_vec(ENV_ID, num_envs=n_envs, vectorization_mode="vector_entry_point", config=str(config),
                          autoreset_mode=mode, **kw)
    assert isinstance(native.unwrapped, FlipperStrikeVectorEnv)
    out = []
    for venv in (sync, native):
        obs, info = venv.reset(seed=seed)
        record = {"obs": [obs], "reward": [], "term": [], "trunc": [], "trial": [info["trial"]], "metrics": [],
                  "final_obs": []}
        for t in range(steps):
            obs, r, term, trunc, info = venv.step(actions_of(t))
            record["obs"].append(obs)
            record["reward"].append(r)
            record["term"].append(term)
            record["trunc"].append(trunc)
            record["trial"].append(info["trial"])
            if same_step and (term | trunc).any():
                ended = info["_final_obs"]
                record["final_obs"].append((t, ended.copy(), np.stack([o for o, e in zip(info["final_obs"], ended)
                                                                        if e])))
                info = {**info["final_info"], "_metrics": info["final_info"]["_metrics"]}
            if (term | trunc).any():
                # at an end both carry the metrics in the same place (the sync env, whose single
                # envs report the metrics so far at every step, also elsewhere)
                m = info["metrics"]
                record["metrics"].append((t, info["_metrics"].copy(), m["_rms_error_deg"].copy(),
                                          np.where(m["_rms_error_deg"], m["rms_error_deg"], 0.0),
                                          np.where(m["_settled"], m["settled"], False)))
        out.append(record)
        venv.close()
    return out


def _assert_same(sync, native):
    # float32 observations to float32 rounding (rtol 1e-6), rewards to 1e-9 relative
    for key in ("obs", "reward"):
        np.testing.assert_allclose(np.array(native[key]), np.array(sync[key]), rtol=1e-6, atol=1e-9)
    for key in ("term", "trunc", "trial"):
        assert np.array_equal(np.array(native[key]), np.array(sync[key])), key
    assert len(native["final_obs"]) == len(sync["final_obs"])
    for (t1, e1, o1), (t2, e2, o2) in zip(sync["final_obs"], native["final_obs"]):
        assert t1 == t2 and np.array_equal(e1, e2)
        np.testing.assert_allclose(o2, o1, rtol=1e-6, atol=1e-9)
    assert len(native["metrics"]) == len(sync["metrics"]) > 0
    for (t1, d1, m1, v1, s1), (t2, d2, m2, v2, s2) in zip(sync["metrics"], native["metrics"]):
        ended = m2
        assert t1 == t2 and np.array_equal(d1 & ended, d2) and np.array_equal(m1 & ended, m2)
        assert np.array_equal(s1 & ended, s2)
        np.testing.assert_allclose(np.where(ended, v1, 0.0), v2, rtol=1e-9)


def test_native_vector_env_matches_the_sync_vector_env_with_noise_and_drift():
    # noisy sensors and per-trial drift with spread (flipper-drift.yaml); a short time limit so the
    # members autoreset into later trials (drifted plants, fresh drift draws) within the test;
    # random actions from one seeded generator
    rng = np.random.default_rng(7)
    actions = rng.uniform(-1.2, 1.2, size=(130, 3, 2)).astype(np.float32)
    sync, native = _run_both(DRIFT, 3, 130, lambda t: actions[t], seed=11, max_episode_steps=40)
    _assert_same(sync, native)
    assert np.array(native["trial"]).max() >= 3          # the members went through several trials


def test_native_vector_env_matches_the_sync_vector_env_through_faults():
    # member 1 slams the end stop (an early, terminated end; its noise block is rewound), the others
    # track the strike; the whole trial length, so the metrics at the end include settling
    strike = _strike_actions()
    slam = _slam_actions(400)

    def actions_of(t):
        k = t % 200
        return np.stack([strike[min(t, 399)], slam[k], strike[min(t, 399)]])

    sync, native = _run_both(DRIFT, 3, 460, actions_of, seed=4)
    _assert_same(sync, native)
    assert np.array(native["term"])[:, 1].any()


def test_native_vector_env_matches_the_sync_vector_env_in_same_step_mode():
    rng = np.random.default_rng(8)
    actions = rng.uniform(-1.0, 1.0, size=(100, 2, 2)).astype(np.float32)
    actions[:, 1] = _slam_actions(100)                  # member 1 faults early, again and again
    sync, native = _run_both(DRIFT, 2, 100, lambda t: actions[t], seed=5, max_episode_steps=30, same_step=True)
    _assert_same(sync, native)
    assert len(native["final_obs"]) >= 3


def test_a_trial_ending_in_a_fault_is_never_settled_on_any_path():
    # a stop slam reports fault and settled False in the single env, the vector env and `run`
    from muscle_sim.runs import run_trial

    env = FlipperStrikeEnv(DEMO)
    env.reset(seed=0)
    for a in _slam_actions(400):
        _, r, term, trunc, info = env.step(a)
        if term or trunc:
            break
    assert term and info["metrics"]["fault"] and info["metrics"]["settled"] is False and "end stop" in info["fault"]
    venv = FlipperStrikeVectorEnv(2, DEMO)
    venv.reset(seed=0)
    for a in _slam_actions(400):
        _, _, term, _, vinfo = venv.step(np.stack([a, a]))
        if term.any():
            break
    assert term.all() and not vinfo["metrics"]["settled"].any() and vinfo["_fault"].all()

    class Slam:
        name = "slam"

        def reset(self, setup):
            self.top = setup.rated_pressure

        def command(self, k, t, y):
            return (self.top, 0.0)

    setup = Setup.from_config(DEMO)
    _, metrics = run_trial(setup, Slam(), 0, np.random.default_rng(0))
    assert metrics["fault"] and metrics["settled"] is False


def test_a_time_limit_shorter_than_the_trial_still_ends_with_metrics():
    env = gym.make(ENV_ID, max_episode_steps=60)
    env.reset(seed=1)
    for i in range(60):
        _, _, term, trunc, info = env.step(np.zeros(2, dtype=np.float32))
    assert trunc and not term and i == 59
    m = info["metrics"]
    assert np.isfinite(m["rms_error_deg"]) and m["settled"] is False and m["settle_time_s"] is None


def test_reset_with_a_seed_and_a_trial_reproduces_an_episode_under_drift():
    env = FlipperStrikeEnv(DRIFT)
    actions = _strike_actions(120)

    def episode(**kw):
        obs, info = env.reset(**kw)
        out = [obs]
        for a in actions:
            out.append(env.step(a)[0])
        return np.array(out), info["trial"], env.plant_now

    a, trial_a, plant_a = episode(seed=3, options={"trial": 9})
    episode()                                           # the next trial in between
    b, trial_b, plant_b = episode(seed=3, options={"trial": 9})
    assert trial_a == trial_b == 9 and plant_a == plant_b and a.tobytes() == b.tobytes()
    c, trial_c, _ = episode(seed=3)
    assert trial_c == 0 and c.tobytes() != a.tobytes()
    for bad in (-1, 10 ** 7, 1.5, True, "3", None):
        with pytest.raises(ValueError, match="trial"):
            env.reset(options={"trial": bad})
    venv = FlipperStrikeVectorEnv(2, DRIFT)
    venv.reset(seed=0, options={"trial": [2, 5]})
    assert list(venv.core.trial) == [2, 5]
    with pytest.raises(ValueError, match="trial"):
        venv.reset(options={"trial": [1, 2, 3]})


def test_observations_are_scaled_and_the_readings_are_in_info():
    # every observation within +-10 over a strike and a slam; the SI readings in info match the
    # scaled observation (rate per 10 rad/s, pressures per rated pressure)
    env = FlipperStrikeEnv(DEMO)
    rated = env.setup.rated_pressure
    for actions in (_strike_actions(), _slam_actions(400)):
        obs, info = env.reset(seed=2)
        for a in actions:
            assert np.all(np.abs(obs) <= 10.0)
            y = info["readings"]
            np.testing.assert_allclose(obs[:4], [y[0], y[1] / 10.0, y[2] / rated, y[3] / rated], rtol=1e-6,
                                       atol=1e-6)
            obs, _, term, trunc, info = env.step(a)
            if term or trunc:
                break


def test_vector_env_autoresets_on_the_next_step():
    venv = FlipperStrikeVectorEnv(2, DEMO, max_episode_steps=5)
    obs0, _ = venv.reset(seed=1)
    for _ in range(5):
        obs, r, term, trunc, info = venv.step(np.zeros((2, 2), dtype=np.float32))
    assert trunc.all() and info["_metrics"].all() and "rms_error_deg" in info["metrics"]
    obs, r, term, trunc, info = venv.step(np.ones((2, 2), dtype=np.float32))
    assert np.all(r == 0.0) and not trunc.any()
    assert obs[:, 4] == pytest.approx(obs0[:, 4])          # time to strike is back at the start
    assert list(info["trial"]) == [1, 1]                   # the next trial


def test_drift_changes_the_plant_between_trials():
    env = FlipperStrikeEnv(DRIFT)
    env.reset(seed=0)
    supply0 = env.plant_now.pneumatics.supply_pressure
    env.reset(options={"trial": 20})
    assert env.plant_now.pneumatics.supply_pressure < supply0
    assert env.plant_now.muscle.braid_friction > env.setup.plant.muscle.braid_friction


def test_render_returns_an_image():
    env = FlipperStrikeEnv(DEMO, render_mode="rgb_array")
    env.reset(seed=0)
    frame = env.render()
    assert frame.dtype == np.uint8 and frame.ndim == 3 and frame.shape[2] == 3


@pytest.mark.parametrize("draw", [0, 1, 2, 3])
def test_native_and_sync_vector_envs_agree_on_randomly_drawn_plants(draw):
    # plants not in the repository (scenarios.draw_scenario: payload, delay, friction, noise,
    # force-model error, drift drawn over the mismatch ranges), same reference as above
    import yaml

    from muscle_sim.scenarios import draw_scenario

    raw = draw_scenario(yaml.safe_load(DEMO.read_text(encoding="utf-8")), np.random.default_rng(100 + draw))
    actions = np.random.default_rng(draw).uniform(-1.1, 1.1, size=(90, 2, 2)).astype(np.float32)
    out = []
    for mode in ("sync", "vector_entry_point"):
        venv = gym.make_vec(ENV_ID, num_envs=2, vectorization_mode=mode, config=raw, max_episode_steps=35)
        obs, _ = venv.reset(seed=draw)
        rows = [(obs, 0.0, False)]
        for a in actions:
            obs, r, term, trunc, _ = venv.step(a)
            rows.append((obs, r, term | trunc))
        venv.close()
        out.append(rows)
    for (o1, r1, d1), (o2, r2, d2) in zip(*out):
        np.testing.assert_allclose(o2, o1, rtol=1e-6, atol=1e-9)
        np.testing.assert_allclose(r2, r1, rtol=1e-9, atol=1e-12)
        assert np.array_equal(d1, d2)
