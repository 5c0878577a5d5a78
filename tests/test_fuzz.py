"""Fuzzing the inputs a user or a rig hands to pamjoint (hypothesis, bounded for CI): configs,
trial logs, profiles and learner states give a result or a one-line error of the documented
kind, never another exception, a non-finite result or a half-written file."""
import json
import os

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from controllers.base import PressureProfile
from controllers.rig import learn_step, load_state
from muscle_sim.config import load
from muscle_sim.errors import ConfigError, DataError
from muscle_sim.records import read_log
from muscle_sim.simulation import Setup
from muscle_sim.yaml_input import parse_yaml_bytes

from conftest import DEMO

#: benchmarks/fuzz_campaign.py raises the example counts by this factor (1 in CI).
SCALE = float(os.environ.get("PAMJOINT_FUZZ_SCALE", "1"))
FUZZ = settings(max_examples=int(40 * SCALE), deadline=None, suppress_health_check=[HealthCheck.too_slow,
                                                                      HealthCheck.function_scoped_fixture])
SETUP = Setup.from_config(DEMO)
DEMO_TEXT = DEMO.read_bytes()


def _one_line(exc):
    message = str(exc)
    assert message and "\n" not in message and len(message) < 600, message


def _mutate(data: bytes, edits) -> bytes:
    out = bytearray(data)
    for kind, pos, value in edits:
        if not out:
            out.extend(value)
            continue
        i = pos % len(out)
        if kind == 0:
            out[i:i + 1] = value              # replace a byte by a few
        elif kind == 1:
            del out[i:i + len(value)]         # delete a run
        else:
            out[i:i] = value                  # insert
    return bytes(out)


EDITS = st.lists(st.tuples(st.integers(0, 2), st.integers(0, 10 ** 6), st.binary(min_size=1, max_size=6)),
                 min_size=1, max_size=6)


@FUZZ
@given(edits=EDITS)
def test_mutated_configs_load_or_give_one_line(edits, tmp_path_factory):
    path = tmp_path_factory.mktemp("cfg") / "c.yaml"
    path.write_bytes(_mutate(DEMO_TEXT, edits))
    try:
        cfg = load(path)
    except ConfigError as exc:
        _one_line(exc)
        return
    Setup.from_config(cfg)


@FUZZ
@given(text=st.text(max_size=300))
def test_arbitrary_yaml_text_parses_or_gives_one_line(text):
    try:
        parse_yaml_bytes(text.encode("utf-8", "surrogatepass"), "config 'x'")
    except ConfigError as exc:
        _one_line(exc)


def _log_bytes():
    t = np.arange(SETUP.task.n_steps + 1) * SETUP.task.dt
    rows = np.column_stack([t, np.full_like(t, -30.0), np.full_like(t, 200.0), np.full_like(t, 300.0)])
    return ("time [s],angle [deg],command_a [kPa],command_b [kPa]\n"
            + "\n".join(",".join(f"{v:.6g}" for v in r) for r in rows) + "\n").encode()


LOG = _log_bytes()


@FUZZ
@given(edits=EDITS, resample=st.booleans())
def test_mutated_logs_read_finite_or_give_one_line(edits, resample, tmp_path_factory):
    path = tmp_path_factory.mktemp("log") / "log.csv"
    path.write_bytes(_mutate(LOG, edits))
    try:
        log = read_log(path, SETUP.task, resample=resample, allow_short=True)
    except DataError as exc:
        _one_line(exc)
        return
    assert np.all(np.isfinite(log.measured[:, :2])) and np.all(np.isfinite(log.command))


@FUZZ
@given(edits=EDITS)
def test_mutated_profiles_read_finite_or_give_one_line(edits, tmp_path_factory):
    path = tmp_path_factory.mktemp("prof") / "p.csv"
    path.write_bytes(_mutate(LOG.replace(b",angle [deg]", b"").replace(b",-30", b""), edits))
    try:
        profile = PressureProfile.read_csv(path)
    except DataError as exc:
        _one_line(exc)
        return
    assert np.all(np.isfinite(profile.commands)) and np.all(profile.commands >= 0)


STATE_VALUES = st.recursive(st.none() | st.booleans() | st.floats() | st.integers() | st.text(max_size=5),
                            lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=8), inner,
                                                                                       max_size=4), max_leaves=12)


@pytest.fixture(scope="module")
def first_trial():
    from test_learning import _first_trial
    learner, state, profile, rollout = _first_trial(DEMO)
    return state, profile, rollout


@settings(max_examples=int(12 * SCALE), deadline=None, suppress_health_check=[HealthCheck.too_slow,
                                                                 HealthCheck.function_scoped_fixture])
@given(key=st.sampled_from(["theta", "best_theta", "best_cost", "step_scale", "trial", "extra"]),
       value=STATE_VALUES)
def test_damaged_state_files_learn_or_give_one_line(key, value, first_trial, tmp_path_factory):
    state, profile, rollout = first_trial
    data = state.to_dict()
    data[key] = value
    path = tmp_path_factory.mktemp("state") / "s.json"
    path.write_text(json.dumps(data))
    try:
        loaded = load_state(path)
        new_profile, new_state, _ = learn_step(SETUP, rollout, profile, loaded)
    except DataError as exc:
        _one_line(exc)
        return
    assert np.all(np.isfinite(new_profile.commands)) and np.all(np.isfinite(new_state.theta))
    # never a command above the rating for the rig, whatever the state held
    assert new_profile.commands.max() <= SETUP.rated_pressure + 1.0


# -- actions handed to the environments ------------------------------------------------------

#: Env steps of each adversarial-action example (an episode chunk); the steps actually taken are
#: counted and, with PAMJOINT_FUZZ_COUNTS set to a file, written there for the fuzz campaign.
ACTION_CHUNK = 100
#: Members of the vector env under test.
MEMBERS = 3
ENV_STEPS = {"single_env_steps": 0, "vector_env_steps": 0, "vector_member_steps": 0,
             "actions_refused": 0, "episodes_ended": 0}
#: Envs reset at least once (each stays in an episode from then on: a chunk resets on its end).
STARTED = []

SCALARS = st.one_of(st.floats(-1.5, 1.5), st.floats(), st.integers(-2 ** 70, 2 ** 70), st.booleans(), st.none(),
                    st.text(max_size=3), st.binary(max_size=3), st.complex_numbers(),
                    st.sampled_from([float("nan"), float("inf"), -float("inf"), 10 ** 400, 1e308, 5e-324]))
NESTED = st.recursive(SCALARS, lambda inner: st.lists(inner, max_size=4) | st.tuples(inner, inner)
                      | st.dictionaries(st.text(max_size=2), inner, max_size=2), max_leaves=10)
DTYPES = ["?", "i1", "i2", "i4", "i8", "u1", "u2", "u4", "u8", "f2", "f4", "f8", ">f8", ">f4", "<i8", ">i4",
          "c8", "c16", "U3", "S3", "M8[s]", "m8[s]"]


@st.composite
def _arrays(draw, shape):
    """numpy arrays of every kind of dtype (long double and object ones too), of ``shape`` or
    another shape, with extreme values among ordinary ones."""
    from hypothesis.extra import numpy as npst

    wanted = draw(st.sampled_from([shape, shape, (2, 1), (1, 2), (3,), (), (shape[0] + 1,) + shape[1:],
                                   shape + (1,), shape[::-1], (0,) + shape[1:]]))
    kind = draw(st.sampled_from(DTYPES + ["longdouble", "clongdouble", "object"]))
    if kind == "object":
        return draw(npst.arrays(object, wanted, elements=SCALARS))
    if kind in ("longdouble", "clongdouble"):
        base = draw(npst.arrays("f8" if kind == "longdouble" else "c16", wanted))
        scale = draw(st.sampled_from([1.0, 1e-300, np.longdouble("1e4000")]))
        with np.errstate(invalid="ignore", over="ignore"):     # inf * 0 and overflow are wanted inputs
            return base.astype(kind) * scale
    dtype = np.dtype(kind)
    elements = st.floats(-1.5, 1.5, width=8 * dtype.itemsize) if dtype.kind == "f" and draw(st.booleans()) else None
    array = draw(npst.arrays(dtype, wanted, elements=elements))
    return array[::-1] if array.ndim and draw(st.booleans()) else array       # a strided view


def _actions(shape):
    """What a caller may hand to ``step``: valid actions (inside and outside [-1, 1]) and
    anything else: nested lists, arrays of every dtype, huge ints, NaN and inf, None, dicts,
    wrong shapes."""
    valid = st.lists(st.floats(-3.0, 3.0), min_size=int(np.prod(shape)), max_size=int(np.prod(shape))).map(
        lambda v: np.reshape(v, shape).tolist())
    return st.one_of(valid, _arrays(shape), NESTED, st.lists(NESTED, min_size=shape[0], max_size=shape[0]))


@pytest.fixture(scope="module")
def envs():
    import gymnasium as gym

    import muscle_sim  # noqa: F401  (registers the env ids)

    single = gym.make("pamjoint/FlipperStrike-v1", config=str(DEMO))
    vector = gym.make_vec("pamjoint/FlipperStrike-v1", num_envs=MEMBERS, vectorization_mode="vector_entry_point",
                          config=str(DEMO))
    yield {"single": single, "vector": vector}
    single.close()
    vector.close()
    counts = os.environ.get("PAMJOINT_FUZZ_COUNTS")
    if counts:
        from muscle_sim.records import write_json_atomic
        write_json_atomic(counts, ENV_STEPS)


def _step_checked(env, action, vector: bool):
    """One step: a normal result (finite observation inside the space, finite float reward) or a
    one-line ValueError about the action (returns None then); never another exception."""
    try:
        obs, reward, terminated, truncated, info = env.step(action)
    except ValueError as exc:
        message = str(exc)
        assert message.startswith("action") and len(message.splitlines()) == 1 and len(message) < 600, message
        ENV_STEPS["actions_refused"] += 1
        return None
    assert np.all(np.isfinite(obs)) and env.observation_space.contains(obs), obs
    if vector:
        assert reward.shape == (MEMBERS,) and reward.dtype.kind == "f" and np.all(np.isfinite(reward))
        ENV_STEPS["vector_env_steps"] += 1
        ENV_STEPS["vector_member_steps"] += MEMBERS
        ended = np.logical_or(terminated, truncated)
        ENV_STEPS["episodes_ended"] += int(np.count_nonzero(ended))
        return False
    assert type(reward) is float and np.isfinite(reward)
    assert type(terminated) is bool and type(truncated) is bool
    ENV_STEPS["single_env_steps"] += 1
    ENV_STEPS["episodes_ended"] += int(terminated or truncated)
    return terminated or truncated


def _episode_chunk(env, vector: bool, seed, reset, odd, at, mode):
    """``ACTION_CHUNK`` valid steps (random, bang-bang or far outside [-1, 1]) with the odd
    actions ``odd`` handed over at the steps ``at``; the env keeps its episode across examples
    unless ``reset`` (episodes end inside chunks too: truncation, faults, autoreset)."""
    shape = (MEMBERS, 2) if vector else (2,)
    if reset or env not in STARTED:
        env.reset(seed=seed)
        STARTED.append(env)
    rng = np.random.default_rng(seed)
    pending = sorted(zip(at, range(len(odd))))
    for k in range(ACTION_CHUNK):
        while pending and pending[0][0] == k:
            _, j = pending.pop(0)
            if _step_checked(env, odd[j], vector):
                env.reset()
        if mode == "random":
            action = rng.uniform(-1.2, 1.2, shape).astype(np.float32)
        elif mode == "bang":
            action = np.where(rng.random(shape) < 0.5, -1.0, 1.0).astype(np.float32)
        else:
            action = rng.uniform(-1e6, 1e6, shape)
        done = _step_checked(env, action, vector)
        assert done is not None, "a valid action was refused"
        if done:
            env.reset()


def _chunk_args(shape):
    return dict(seed=st.integers(0, 2 ** 31 - 1), reset=st.booleans(),
                odd=st.lists(_actions(shape), min_size=1, max_size=6),
                at=st.lists(st.integers(0, ACTION_CHUNK - 1), min_size=6, max_size=6),
                mode=st.sampled_from(["random", "random", "bang", "far"]))


@FUZZ
@given(**_chunk_args((2,)))
def test_arbitrary_actions_step_the_env_or_give_one_line(envs, seed, reset, odd, at, mode):
    _episode_chunk(envs["single"], False, seed, reset, odd, at, mode)


@FUZZ
@given(**_chunk_args((MEMBERS, 2)))
def test_arbitrary_actions_step_the_vector_env_or_give_one_line(envs, seed, reset, odd, at, mode):
    _episode_chunk(envs["vector"], True, seed, reset, odd, at, mode)
