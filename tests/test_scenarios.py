"""Mismatch scenarios: the named configs in configs/scenarios/ and the seeded random draw."""
import math
import re
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
import yaml

from controllers.feedforward import FeedforwardController, model_only_profile
from controllers.tuning import trial_rng
from muscle_sim import cli, config
from muscle_sim.pneumatics import tube_delay
from muscle_sim.runs import run_trial
from muscle_sim.scenarios import DRIFT_RANGES, DRIFT_SUPPLY_FLOOR, RANGES, draw_scenario, with_matched_prior
from muscle_sim.simulation import Setup

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "configs" / "flipper.yaml"
NAMED = sorted((ROOT / "configs" / "scenarios").glob("*.yaml"))
# values are written with four significant digits (derived from muscle_sim.scenarios._text)
ROUNDING = 1e-3


def _demo_raw():
    return yaml.safe_load(DEMO.read_text())


def _flat(node, prefix=""):
    out = {}
    for name, value in node.items():
        path = f"{prefix}{name}"
        out.update(_flat(value, path + ".") if isinstance(value, dict) else {path: value})
    return out


def _changed_keys(text):
    """Key paths of the lines marked CHANGED (two spaces of indent per level)."""
    stack, changed = [], set()
    for line in text.splitlines():
        m = re.match(r"^( *)([A-Za-z_]+):", line)
        if not m:
            continue
        stack = stack[: len(m.group(1)) // 2] + [m.group(2)]
        if "# CHANGED" in line:
            changed.add(".".join(stack))
    return changed


def _inside(value, low, high):
    return low - ROUNDING * abs(low) - 1e-9 <= value <= high + ROUNDING * abs(high) + 1e-9


def _loaded():
    return {path.stem: config.load(path) for path in NAMED}


def test_at_least_eight_named_scenarios_each_the_demo_with_its_marked_changes():
    # Each file is a complete config (loads on its own) and resolves to the demo's values except
    # at the lines it marks CHANGED (exact; name and description excepted).
    assert len(NAMED) >= 8
    demo = _flat(config.load(DEMO).values)
    for path in NAMED:
        text = path.read_text()
        assert "invented" in text.splitlines()[0]
        changed = _changed_keys(text)
        assert changed, path.name
        values = _flat(config.load(path).values)
        differ = {k for k in demo if values[k] != demo[k]} - {"name", "description"}
        assert differ <= changed, f"{path.name}: unmarked changes {sorted(differ - changed)}"


@pytest.mark.parametrize("path", NAMED, ids=[p.stem for p in NAMED])
def test_named_scenario_passes_check_and_runs_model_only_without_fault(path, capsys):
    assert cli.main(["check", str(path)]) == 0
    assert "valid" in capsys.readouterr().out
    setup = Setup.from_config(path)
    _, metrics = run_trial(setup, FeedforwardController(model_only_profile(setup)), 0, trial_rng(1, 0), 1)
    assert metrics["fault"] is None
    assert np.isfinite(metrics["rms_error_deg"])


def test_named_scenarios_span_the_mismatch_ranges():
    # The ranges the suite claims (configs/scenarios/*.yaml headers); closed-form ratios of config
    # values, tolerance 1 % for the rounded values written in the files.
    cfgs = _loaded()

    def ratios(fn):
        return [fn(c) for c in cfgs.values() if fn(c) is not None]

    def payload_ratio(c):
        believed = c.get("prior.payload_mass")
        return c.get("plant.joint.payload_mass") / believed if believed else None

    def delay_ratio(c):
        pn = c.get("plant.pneumatics")
        true = tube_delay(pn["tube_length"], pn["temperature"]) + pn["valve_dead_time"]
        return c.get("prior.pressure_delay") / true if c.get("prior.pressure_delay") is not None else None

    payload = ratios(payload_ratio)
    assert min(payload) == pytest.approx(0.5, rel=0.01) and max(payload) == pytest.approx(3.0, rel=0.01)
    inertia = ratios(lambda c: c.get("prior.inertia_error"))
    assert min(inertia) == pytest.approx(-0.5) and max(inertia) == pytest.approx(0.5)
    tubes = ratios(lambda c: c.get("plant.pneumatics.tube_length"))
    assert min(tubes) == pytest.approx(0.5) and max(tubes) == pytest.approx(5.0)
    delays = ratios(delay_ratio)
    assert min(delays) == pytest.approx(1 / 3, rel=0.01) and max(delays) == pytest.approx(2.9, rel=0.01)
    demo = config.load(DEMO)
    assert any(c.get("plant.muscle.braid_friction") == pytest.approx(4 * demo.get("plant.muscle.braid_friction"))
               and c.get("plant.sensors.angle_noise") == pytest.approx(5 * demo.get("plant.sensors.angle_noise"))
               for c in cfgs.values())
    # a +70 % force-model error: the plant pulls 1/1.7 of the law
    assert min(ratios(lambda c: c.get("plant.muscle.force_scale"))) == pytest.approx(1 / 1.7, rel=0.01)
    assert any(config.drift_params(c).active for c in cfgs.values())
    assert any(c.get("plant.joint.hanging_angle") is not None for c in cfgs.values())
    assert any(c.get("plant.muscle.friction_model") == "maxwell-slip" for c in cfgs.values())
    assert max(ratios(lambda c: c.get("task.strike_speed"))) > demo.get("task.strike_speed")


@pytest.mark.parametrize("seed", range(50))
def test_every_draw_validates_within_its_ranges(seed):
    base = _demo_raw()
    raw = draw_scenario(base, np.random.default_rng(seed))
    cfg = config.load(raw)
    demo = config.load(base)
    # each drawn value within RANGES (derived from the module's declaration), to the rounding
    believed = cfg.get("prior.payload_mass")
    assert believed == pytest.approx(demo.get("plant.joint.payload_mass"))
    assert _inside(cfg.get("plant.joint.payload_mass") / believed, *RANGES["payload_factor"][:2])
    assert _inside(cfg.get("prior.inertia_error"), *RANGES["inertia_error"][:2])
    pn = cfg.get("plant.pneumatics")
    assert _inside(pn["tube_length"], *RANGES["tube_length"][:2])
    assert _inside(pn["valve_dead_time"], *RANGES["valve_dead_time"][:2])
    true_delay = tube_delay(pn["tube_length"], pn["temperature"]) + pn["valve_dead_time"]
    assert _inside(cfg.get("prior.pressure_delay") / true_delay, *RANGES["delay_factor"][:2])
    friction = cfg.get("plant.muscle.braid_friction") / demo.get("plant.muscle.braid_friction")
    assert _inside(friction, *RANGES["friction_factor"][:2])
    noise = [cfg.get(f"plant.sensors.{k}") / demo.get(f"plant.sensors.{k}")
             for k in ("angle_noise", "rate_noise", "pressure_noise")]
    assert _inside(noise[0], *RANGES["noise_factor"][:2]) and np.allclose(noise, noise[0], rtol=2 * ROUNDING)
    force_error = 1 / cfg.get("plant.muscle.force_scale") - 1
    assert _inside(force_error, *RANGES["force_error"][:2])
    assert _inside(cfg.get("task.strike_speed"), *RANGES["strike_speed"][:2])
    drift = cfg.get("plant.drift")
    if config.drift_params(cfg).active:
        assert _inside(drift["friction_growth"], *DRIFT_RANGES["friction_growth"])
        assert _inside(drift["supply_sag"], *DRIFT_RANGES["supply_sag"])
        assert drift["supply_floor"] == pytest.approx(DRIFT_SUPPLY_FLOOR)
    else:
        assert (drift["friction_growth"], drift["supply_sag"], drift["spread"]) == (0.0, 0.0, 0.0)


def test_same_seed_same_config_and_seeds_differ():
    base = _demo_raw()
    untouched = _demo_raw()
    first = draw_scenario(base, np.random.default_rng(7))
    assert draw_scenario(base, np.random.default_rng(7)) == first
    assert config.load(draw_scenario(base, np.random.default_rng(7))).digest == config.load(first).digest
    assert draw_scenario(base, np.random.default_rng(8)) != first
    assert base == untouched


def test_draws_cover_the_ranges_and_drift_both_ways():
    # 50 draws of a uniform range fill it: the chance that none falls in the outer fifth at one end
    # is 0.8^50 = 1.4e-5 (derived), so spread over [low, high] must exceed 60 %.
    base = _demo_raw()
    cfgs = [config.load(draw_scenario(base, np.random.default_rng(s))) for s in range(50)]
    tubes = [c.get("plant.pneumatics.tube_length") for c in cfgs]
    low, high, _ = RANGES["tube_length"]
    assert max(tubes) - min(tubes) > 0.6 * (high - low)
    speeds = [c.get("task.strike_speed") for c in cfgs]
    low, high, _ = RANGES["strike_speed"]
    assert max(speeds) - min(speeds) > 0.6 * (high - low)
    drifting = sum(config.drift_params(c).active for c in cfgs)
    assert 0 < drifting < 50
    assert all(math.isfinite(c.get("prior.pressure_delay")) for c in cfgs)


@pytest.mark.parametrize("seed", [0, 3])
def test_matched_prior_is_the_plant_where_the_prior_can_be(seed):
    # Identity by construction: with the matched prior every parameter the prior models equals the
    # plant's (exact; braid hysteresis and drift are what the prior cannot model).
    raw = with_matched_prior(draw_scenario(_demo_raw(), np.random.default_rng(seed)))
    cfg = config.load(raw)
    plant, prior = config.plant_params(cfg), config.prior_params(cfg)
    assert prior.joint == plant.joint
    assert prior.muscle == plant.muscle          # the draws use the tanh law
    # the lag model's time constant is not used by the valve model
    assert replace(prior.pneumatics, lag_time_constant=plant.pneumatics.lag_time_constant) == plant.pneumatics


def _learning_benchmark():
    """benchmarks/learning.py as a module (it is a script, not part of the package)."""
    import importlib.util

    spec = importlib.util.spec_from_file_location("learning_benchmark", ROOT / "benchmarks" / "learning.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_learning_study_override_reaches_every_case_and_bad_input_is_one_line():
    bench = _learning_benchmark()
    todo = bench.select(bench.cases(3, False, False), "demo,scenario/finger,draw/2")
    assert [c[0] for c in todo] == ["demo", "scenario/finger", "draw/2"]
    override = bench.parse_override("learning.regularisation=0.02")
    assert override == (["learning", "regularisation"], 0.02)
    for _, raw, *_ in todo:
        changed = bench.with_overrides(raw, [override, bench.parse_override("task.strike_speed=11 rad/s")])
        setup = Setup.from_config(changed)
        assert setup.config.get("learning.regularisation") == 0.02
        assert setup.task.strike_speed == pytest.approx(11.0)
        assert raw["learning"]["regularisation"] == 0.05       # the case itself is left as it was
    for bad, flag in (("regularisation", "--set"), ("=1", "--set"), ("a..b=1", "--set")):
        with pytest.raises(ValueError, match=f"^{flag}: ") as info:
            bench.parse_override(bad)
        assert "\n" not in str(info.value)
    with pytest.raises(ValueError, match="^--only: 'draw/7' is not allowed"):
        bench.select(bench.cases(3, False, False), "demo,draw/7")


def test_learning_study_comparison_counts_verdict_changes():
    bench = _learning_benchmark()
    old = {"cases": [{"name": "a", "passed": True, "rms_after_10_trials_deg": 0.2},
                     {"name": "b", "passed": False, "rms_after_10_trials_deg": 0.8},
                     {"name": "c", "passed": False, "rms_after_10_trials_deg": 1.0}]}
    new = [{"name": "a", "passed": False, "rms_after_10_trials_deg": 0.4},
           {"name": "b", "passed": True, "rms_after_10_trials_deg": 0.4},
           {"name": "c", "passed": False, "rms_after_10_trials_deg": 1.0},
           {"name": "d", "passed": True, "rms_after_10_trials_deg": 0.1}]
    c = bench.comparison(new, old)
    # derived by hand: a, b and c are in both runs; ratios 2.0, 0.5 and 1.0, median 1.0 (mean 1.17)
    assert c == {"cases_in_both": 3, "passed_before": 1, "passed_now": 1, "now_passing": ["b"],
                 "now_failing": ["a"], "median_rms10_ratio_new_over_old": 1.0}
