"""Config loading: units converted to SI, one-line errors naming key path, value and what is allowed."""
import math
from pathlib import Path

import pytest
import yaml

from muscle_sim import config
from muscle_sim.errors import ConfigError
from muscle_sim.units import to_si, UnitError

DEMO = Path(__file__).resolve().parents[1] / "configs" / "flipper.yaml"


def demo_raw():
    return yaml.safe_load(DEMO.read_text())


def test_demo_config_loads_in_si():
    cfg = config.load(DEMO)
    m = config.muscle_params(cfg)
    assert m.rest_length == pytest.approx(0.25)
    assert m.rest_radius == pytest.approx(0.008)
    assert m.rest_braid_angle == pytest.approx(math.radians(22))
    assert m.rated_pressure == pytest.approx(6e5)
    assert cfg.get("muscle_map.contraction_step") == pytest.approx(0.025)


def test_unit_conversions():
    # Exact definitions: 1 bar = 1e5 Pa, 1 psi = 6894.757293168 Pa (NIST SP 811),
    # 1 dm^3/(s bar) = 1e-8 m^3/(s Pa) (ISO 6358-1).
    assert to_si("6 bar", "pressure") == 6e5
    assert to_si("14.5038 psi", "pressure") == pytest.approx(1e5, rel=1e-5)
    assert to_si("1.5 dm^3/(s bar)", "sonic_conductance") == pytest.approx(1.5e-8)
    assert to_si("22 deg", "angle") == pytest.approx(math.radians(22))
    assert to_si("2.5 %", "dimensionless") == pytest.approx(0.025)
    with pytest.raises(UnitError):
        to_si(250, "length")


def _error(raw):
    with pytest.raises(ConfigError) as info:
        config.load(raw)
    msg = str(info.value)
    assert "\n" not in msg
    return msg


def test_unknown_key_gets_a_did_you_mean():
    raw = demo_raw()
    raw["plant"]["muscle"]["rest_lenght"] = raw["plant"]["muscle"].pop("rest_length")
    msg = _error(raw)
    assert msg.startswith("plant.muscle.rest_lenght: unknown key") and "rest_length" in msg


@pytest.mark.parametrize("key, value, expect", [
    ("rest_length", "250 mn", "unit 'mn'"),
    ("rest_length", 250, "has no unit"),
    ("rest_length", "-5 mm", "must be > 0 mm"),
    ("rest_braid_angle", "60 deg", "must be > 0 deg and < 54.7356 deg"),
    ("end_correction", 0.8, ">= 1"),
    ("wall_thickness", "8 mm", "wall_thickness"),
    ("friction_model", "bouc-wen", "one of tanh, maxwell-slip"),
    ("friction_model", 3, "must be text"),
    ("friction_elements", 0, ">= 1"),
    ("friction_elements", 65, "<= 64"),
    ("friction_elements", 8.5, "whole number"),
    ("slip_length", "0 mm", "must be > 0 mm"),
    ("slip_length", 1, "has no unit"),
    ("slip_length", "300 mm", "<= rest_length (0.25 m)"),
    ("force_scale", 0.01, "must be >= 0.05 and <= 20"),
    ("force_scale", "2 N", "unit 'N'"),
])
def test_bad_values_are_one_line_with_path(key, value, expect):
    raw = demo_raw()
    raw["plant"]["muscle"][key] = value
    msg = _error(raw)
    assert msg.startswith(f"plant.muscle.{key}:")
    assert expect in msg


@pytest.mark.parametrize("key, value, expect", [
    ("payload_mass", "-0.1 kg", "must be >= 0 kg"),
    ("payload_mass", 0.1, "has no unit"),
    ("payload_radius", "250 kg", "unit 'kg'"),
    ("payload_radius", "-5 mm", "must be >= 0 mm"),
    ("viscous_damping", "-0.01 N m s/rad", "must be >= 0 N m s/rad"),
    ("coulomb_torque", "0.05 N", "unit 'N'"),
    ("force_scale", 0.01, "must be >= 0.05 and <= 20"),
    ("force_scale", "1 bar", "unit 'bar'"),
])
def test_bad_prior_values_are_one_line_with_path(key, value, expect):
    raw = demo_raw()
    raw["prior"][key] = value
    msg = _error(raw)
    assert msg.startswith(f"prior.{key}:")
    assert expect in msg


@pytest.mark.parametrize("key, value, expect", [
    ("proportional", "0.02 bar", "unit 'bar'"),
    ("proportional", 0.02, "has no unit"),
    ("proportional", "-0.01 bar/deg", "must be >= 0 bar/deg"),
    ("integral", "0.1 bar/deg", "unit 'bar/deg'"),
    ("integral", "-1 kPa/(deg s)", "must be >= 0 bar/(deg s)"),
    ("derivative", "2 ms", "unit 'ms'"),
    ("derivative", "-2 bar ms/deg", "must be >= 0 bar s/deg"),
    ("phase_margin", "90 deg", "must be > 0 deg and < 90 deg"),
    ("phase_margin", "0 deg", "must be > 0 deg and < 90 deg"),
    ("phase_margin", 30, "has no unit"),
    ("gain_margin", 1.0, "must be > 1 and <= 20"),
    ("gain_margin", "6 dB", "unit 'dB'"),
    ("gain_margin", None, "is not a quantity"),
])
def test_bad_feedback_values_are_one_line_with_path(key, value, expect):
    raw = demo_raw()
    raw.setdefault("feedback", {})[key] = value
    msg = _error(raw)
    assert msg.startswith(f"feedback.{key}:")
    assert expect in msg


def test_feedback_gains_and_targets_convert_to_si():
    raw = demo_raw()
    raw["feedback"] = {"proportional": "0.02 bar/deg", "integral": "5 kPa/(deg s)", "derivative": "2 bar ms/deg",
                       "phase_margin": "45 deg", "gain_margin": 3}
    fb = config.load(raw).get("feedback")
    # Reference: exact unit definitions (1 bar = 1e5 Pa, 1 deg = pi/180 rad); tolerance 1e-12 relative.
    per_deg = 180.0 / math.pi
    assert fb["proportional"] == pytest.approx(0.02e5 * per_deg, rel=1e-12)
    assert fb["integral"] == pytest.approx(5e3 * per_deg, rel=1e-12)
    assert fb["derivative"] == pytest.approx(2e2 * per_deg, rel=1e-12)
    assert fb["phase_margin"] == pytest.approx(math.pi / 4, rel=1e-12) and fb["gain_margin"] == 3


def test_the_demo_documents_the_feedback_defaults():
    # The demo shows the feedback section commented out; uncommented it must load to the defaults.
    lines = DEMO.read_text().splitlines()
    start = next(i for i, line in enumerate(lines) if line.startswith("# feedback:"))
    stop = next(i for i in range(start, len(lines)) if not lines[i].startswith("#"))
    documented = yaml.safe_load("\n".join(line[1:] for line in lines[start:stop]))
    raw = demo_raw()
    raw["feedback"] = documented["feedback"]
    assert config.load(raw).get("feedback") == config.load(DEMO).get("feedback")
    assert set(documented["feedback"]) == set(config.SCHEMA["feedback"])


@pytest.mark.parametrize("muscle_model", ["ideal", "plant"])
def test_prior_never_models_braid_hysteresis(muscle_model):
    # The plant may use Maxwell-slip braid friction; the prior keeps the simple tanh law (and with
    # muscle_model: plant the same friction level).
    raw = demo_raw()
    raw["plant"]["muscle"]["friction_model"] = "maxwell-slip"
    raw["plant"]["muscle"]["slip_length"] = "0.5 mm"
    raw["prior"]["muscle_model"] = muscle_model
    cfg = config.load(raw)
    plant, prior = config.plant_params(cfg).muscle, config.prior_params(cfg).muscle
    assert (plant.friction_model, plant.slip_length) == ("maxwell-slip", pytest.approx(5e-4))
    assert prior.friction_model == "tanh"
    assert prior.braid_friction == (plant.braid_friction if muscle_model == "plant" else 0.0)


@pytest.mark.parametrize("prior_scale, expect", [(None, 1.0), (0.8, 0.8)])
def test_plant_force_scale_stays_out_of_the_prior(prior_scale, expect):
    # The plant's force-model error is what the prior does not know: its force scale is
    # prior.force_scale, else 1 (the law as written), whatever the plant's (derived from the schema).
    raw = demo_raw()
    raw["plant"]["muscle"]["force_scale"] = 0.6
    raw["prior"]["force_scale"] = prior_scale
    cfg = config.load(raw)
    assert config.plant_params(cfg).muscle.force_scale == 0.6
    assert config.prior_params(cfg).muscle.force_scale == expect


def test_demo_keeps_the_tanh_braid_friction():
    assert config.muscle_params(config.load(DEMO)).friction_model == "tanh"


def test_missing_required_key():
    raw = demo_raw()
    del raw["plant"]["muscle"]["rest_radius"]
    assert _error(raw).startswith("plant.muscle.rest_radius: missing")


def test_bad_yaml_file(tmp_path):
    bad = tmp_path / "bad.yaml"
    bad.write_text("plant: [unclosed\n")
    assert "not valid YAML" in _error(bad)


def test_every_shipped_config_is_package_data():
    # reference: setuptools' package-dir / package-data tables in pyproject.toml (what a plain
    # `pip install .` copies); every YAML under configs/ must be covered so the env id and the
    # scenarios are found from any folder after installing
    tomllib = pytest.importorskip("tomllib")
    from pathlib import Path

    from muscle_sim.config import load, shipped_config
    root = Path(__file__).resolve().parents[1]
    tool = tomllib.loads((root / "pyproject.toml").read_text())["tool"]["setuptools"]
    folders = {Path(v) for k, v in tool["package-dir"].items() if tool["package-data"].get(k) == ["*.yaml"]}
    for path in (root / "configs").rglob("*.yaml"):
        assert path.parent.relative_to(root) in folders, path
        assert set(tool["package-dir"]) <= set(tool["packages"])
    assert shipped_config("flipper.yaml").is_file()
    load(shipped_config("flipper.yaml"))
