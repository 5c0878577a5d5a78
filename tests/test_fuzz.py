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
