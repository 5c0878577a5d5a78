"""`check` is the gate: static conditions that a later command or the env would trip over are
refused when the config is read, on one line naming the key; whatever passes runs."""
import math
import os

import gymnasium as gym
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import muscle_sim  # noqa: F401  (registers the env id)
from controllers.feedforward import FeedforwardController, model_only_profile
from muscle_sim.config import load, plant_params
from muscle_sim.errors import ConfigError
from muscle_sim.plant import holding_pressures
from muscle_sim.runs import run_trial
from muscle_sim.simulation import Setup

from conftest import demo_config


def _refused(**keys) -> str:
    with pytest.raises(ConfigError) as info:
        load(demo_config(**keys))
    message = str(info.value)
    assert "\n" not in message
    return message


def test_a_muscle_going_slack_inside_the_stop_range_is_refused():
    # derived: contraction eps = eps0 -/+ r q / L (joint.contractions); the demo's 20 mm pulley,
    # 45 deg stops and 250 mm rest length need eps0 > 0.02 * (pi / 4) / 0.25 = 0.0628
    message = _refused(plant__joint__pre_contraction="3 %")
    assert message.startswith("plant.joint.pre_contraction: 0.03") and "0.0628" in message
    load(demo_config(plant__joint__pre_contraction="6.5 %"))


def test_a_home_pressure_that_needs_more_than_the_supply_to_hold_home_is_refused():
    # derived from the static torque balance of plant.holding_pressures: the largest
    # co-contraction the message offers holds home within the 6 bar supply, a little more does not
    message = _refused(task__home_pressure="4.5 bar")
    assert message.startswith("task.home_pressure: 4.5 bar") and "6.77 bar" in message
    offered = float(message.split("must be at most ")[1].split(" bar")[0]) * 1e5
    plant = plant_params(load(demo_config()))
    home = math.radians(-30.0)
    assert max(holding_pressures(plant, home, offered)) <= 6e5
    assert max(holding_pressures(plant, home, offered * 1.01)) > 6e5


@pytest.mark.parametrize("key, value", [("task__trial_length", "1e300 ms"), ("task__control_rate", "1e-300 Hz"),
                                        ("task__control_rate", "1e9 Hz")])
def test_trial_length_and_control_rate_stay_within_stated_bounds(key, value):
    # common practice: a strike trial lasts seconds at a control rate of tens of Hz to kHz
    assert _refused(**{key: value}).startswith(key.replace("__", ".") + ": ")


@settings(max_examples=int(20 * float(os.environ.get("PAMJOINT_FUZZ_SCALE", "1"))), deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(pre=st.floats(0.02, 0.2), home_bar=st.floats(0.5, 4.5), pulley_mm=st.floats(8.0, 30.0),
       home_deg=st.floats(-40.0, 0.0), payload=st.floats(0.0, 1.0), supply_bar=st.floats(3.0, 6.0))
def test_whatever_check_accepts_runs_and_resets(pre, home_bar, pulley_mm, home_deg, payload, supply_bar):
    # the gate's promise (issue of record): no config that loads may crash a trial or the env's
    # reset afterwards; refusals are one line naming a key
    raw = demo_config(plant__joint__pre_contraction=pre, task__home_pressure=f"{home_bar} bar",
                      plant__joint__pulley_radius=f"{pulley_mm} mm", task__home_angle=f"{home_deg} deg",
                      plant__joint__payload_mass=f"{payload} kg",
                      plant__pneumatics__supply_pressure=f"{supply_bar} bar")
    try:
        load(raw)
    except ConfigError as exc:
        message = str(exc)
        assert "\n" not in message and message.split(":")[0].count(".") >= 1
        return
    setup = Setup.from_config(raw)
    _, metrics = run_trial(setup, FeedforwardController(model_only_profile(setup)), 0, np.random.default_rng(0))
    assert np.isfinite(metrics["rms_error_deg"])
    env = gym.make("pamjoint/FlipperStrike-v1", config=raw)
    obs, _ = env.reset(seed=0)
    assert np.all(np.isfinite(obs))
    env.close()
