"""Identification of the prior from logged trials: known changes recovered, noise within its sigma,
a detailed plant pulls the prior toward its values, unexcited parameters flagged, CLI and config.

Most logs here are made by simulating the PRIOR itself with known parameter changes: the reference
values are the generating values (a closed loop of our own simulator), so a correct fit must give
them back, to the optimiser's tolerance without noise and within its stated sigma with noise.
"""
import dataclasses
import json
import subprocess
import sys

import numpy as np
import pytest
import yaml

from controllers.base import PressureProfile
from controllers.identification import (LAW_PREFERENCE, apply_prior_values, config_snippet, identify_prior,
                                        select_pressure_law, update_prior, updated_prior, with_pressure_law)
from controllers.simple import HoldPressures, ReplayProfile
from controllers.tuning import start_profile
from muscle_sim import cli, config
from muscle_sim.runs import run_trial
from muscle_sim.sensors import SensorParams
from muscle_sim.simulation import Setup

from conftest import DEMO, strike_commands

RADIUS = 0.25          # the demo's payload radius [m] (configs/flipper.yaml)
#: Known changes of the prior (payload 0.1 -> 0.2 kg, delay 6 -> 9 ms, lag 15 -> 19.5 ms, pivot
#: friction from none): the generating values of the logs below.
CHANGES = {"payload_mass": 0.2, "pressure_delay": 0.009, "pressure_time_constant": 0.0195,
           "viscous_damping": 0.02, "coulomb_torque": 0.05}


def _raw(**prior):
    raw = yaml.safe_load(DEMO.read_text())
    raw["prior"].update(prior)
    return raw


@pytest.fixture(scope="module")
def known():
    """The demo with a prior that knows the payload (0.1 kg at 250 mm), so 'payload x2' means 0.2 kg."""
    return Setup.from_config(_raw(payload_known=True))


def _log(setup, truth, sensors=SensorParams(), seed=0, controller=None):
    """A trial of the model-only feedforward (or ``controller``) run on ``truth`` as the plant."""
    gen = dataclasses.replace(setup, plant=truth, sensors=sensors)
    rollout, metrics = run_trial(gen, controller or ReplayProfile(start_profile(setup)), 0,
                                 np.random.default_rng(seed))
    assert metrics["fault"] is None
    return rollout


@pytest.fixture(scope="module")
def clean_fit(known):
    truth = apply_prior_values(known.prior, CHANGES, payload_radius=RADIUS)
    log = _log(known, truth)
    return log, identify_prior([log], known.prior, known.task, payload_radius=RADIUS)


def test_known_changes_of_the_prior_are_recovered(clean_fit):
    _, result = clean_fit
    assert result.success, result.message
    for name, want in CHANGES.items():
        # reference: the generating value (closed loop of our own simulator); 2 % (required bound)
        assert result.parameters[name].value == pytest.approx(want, rel=0.02), name
        assert result.parameters[name].excited
    # the prior now predicts its own log: the noise floor is 0.01 deg (no sensor noise given)
    assert np.degrees(result.angle_rms[1]) < 1e-3 < np.degrees(result.angle_rms[0])


def test_unexcited_parameters_are_flagged_and_kept(clean_fit, known):
    _, result = clean_fit
    radius, scale = result.parameters["payload_radius"], result.parameters["force_scale"]
    # a horizontal swing shows m r^2 only, and force / inertia only as a ratio (derived)
    assert not radius.excited and "no gravity" in radius.note
    assert not scale.excited and "payload_mass" in scale.note
    assert radius.value == RADIUS and scale.value == known.prior.muscle.force_scale
    assert any(w.startswith("force_scale:") for w in result.warnings)


def test_force_scale_is_recovered_when_the_payload_is_held(known):
    truth = apply_prior_values(known.prior, {"force_scale": 0.8, "pressure_delay": 0.009}, payload_radius=RADIUS)
    result = identify_prior([_log(known, truth)], known.prior, known.task, payload_radius=RADIUS,
                            parameters=["force_scale", "pressure_delay", "pressure_time_constant"])
    # reference: the generating values (closed loop of our own simulator); 2 %
    assert result.parameters["force_scale"].value == pytest.approx(0.8, rel=0.02)
    assert result.parameters["pressure_delay"].value == pytest.approx(0.009, rel=0.02)
    assert result.parameters["pressure_time_constant"].value == pytest.approx(0.015, rel=0.02)


def test_a_log_without_pressures_or_rate_is_fitted_to_the_angle(clean_fit, known):
    log = dataclasses.replace(clean_fit[0], measured=clean_fit[0].measured.copy())
    log.measured[:, 1:] = np.nan
    result = identify_prior([log], known.prior, known.task, payload_radius=RADIUS)
    assert result.success, result.message
    assert np.isnan(result.pressure_rms[0])
    for name, want in CHANGES.items():
        # reference: the generating value (closed loop of our own simulator); 2 %
        assert result.parameters[name].value == pytest.approx(want, rel=0.02), name


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_noisy_logs_are_recovered_within_three_sigma(known, seed):
    truth = apply_prior_values(known.prior, CHANGES, payload_radius=RADIUS)
    log = _log(known, truth, known.sensors, seed)
    result = identify_prior([log], known.prior, known.task, sensors=known.sensors, payload_radius=RADIUS)
    assert result.success, result.message
    # the residuals are in sensor-noise units: about 1 when the model is right (derived)
    assert 0.9 < result.residual_rms < 1.1
    for name, want in CHANGES.items():
        p = result.parameters[name]
        # reference: the generating value (closed loop of our own simulator); 3 one-sigma bounds
        assert abs(p.value - want) <= 3.0 * p.std, (name, p.value, p.std)
        assert p.std < 0.1 * want


def test_gravity_separates_payload_mass_and_radius():
    raw = _raw(payload_known=True)
    raw["plant"]["joint"]["hanging_angle"] = "-30 deg"
    setup = Setup.from_config(raw)
    truth = apply_prior_values(setup.prior, {"payload_mass": 0.2, "payload_radius": 0.2}, payload_radius=RADIUS)
    _, result = update_prior(dataclasses.replace(setup, sensors=SensorParams()), [_log(setup, truth)],
                             parameters=["payload_mass", "payload_radius", "viscous_damping"])
    # reference: the generating values (closed loop of our own simulator); 2 %
    assert result.parameters["payload_mass"].value == pytest.approx(0.2, rel=0.02)
    assert result.parameters["payload_radius"].value == pytest.approx(0.2, rel=0.02)
    # m g r and m r^2 of the updated prior (closed form, g = 9.80665 m/s^2); 1e-6
    j0, j1 = setup.prior.joint, result.identified.joint
    assert j1.payload_inertia == pytest.approx(0.2 * 0.2 ** 2, rel=1e-6)
    assert j1.gravity_moment - j0.gravity_moment == pytest.approx(9.80665 * (0.2 * 0.2 - 0.1 * 0.25), rel=1e-6)


def test_a_hold_trial_excites_nothing_and_keeps_the_prior(known):
    truth = apply_prior_values(known.prior, CHANGES, payload_radius=RADIUS)
    log = _log(known, truth, known.sensors, 1, HoldPressures())
    result = identify_prior([log], known.prior, known.task, sensors=known.sensors, payload_radius=RADIUS)
    assert not result.success and result.status == -2
    assert not any(p.excited for p in result.parameters.values())
    assert result.identified == known.prior == updated_prior(result)


def test_the_detailed_plant_pulls_the_prior_toward_its_values():
    """The valve plant (ISO 6358 flow, polytropic chambers, tube delay) against a prior with the
    plant's muscle but a first-order pressure lag, no payload and no pivot friction."""
    setup = Setup.from_config(_raw(muscle_model="plant"))
    _, _, commands = strike_commands(setup, n_steps=setup.task.n_steps)
    profile = PressureProfile(np.arange(commands.shape[0]) * setup.task.dt, commands)
    log, _ = run_trial(setup, ReplayProfile(profile), 0, np.random.default_rng(0))
    prior, result = update_prior(setup, [log])
    assert result.success, result.message
    plant = setup.plant.joint
    # reference: the configured plant (payload 0.1 kg at 250 mm, pivot friction 0.02 N m s/rad and
    # 0.05 N m); the prior starts at 0 for each: the fit must get at least half way to the payload
    m = result.parameters["payload_mass"].value
    assert abs(m - plant.payload_inertia / RADIUS ** 2) < 0.5 * plant.payload_inertia / RADIUS ** 2
    assert prior.joint.viscous_damping > 0 and prior.joint.coulomb_torque > 0
    # the prediction of the logged swing improves tenfold or more (derived from the runs: 11 -> 0.5 deg)
    assert result.angle_rms[1] < 0.1 * result.angle_rms[0]
    assert result.pressure_rms[1] < result.pressure_rms[0]


def test_the_pressure_response_is_fitted_to_the_pressures(demo_setup):
    """The demo's ideal-muscle prior on its first trial: mechanics it cannot represent must not
    leak into the pressure response (fitted together, its lag grew fourfold and the pressure
    error with it)."""
    log, _ = run_trial(demo_setup, ReplayProfile(start_profile(demo_setup)), 0, np.random.default_rng(0))
    _, result = update_prior(demo_setup, [log])
    assert result.success, result.message
    assert result.pressure_rms[1] < result.pressure_rms[0]
    assert result.angle_rms[1] < 0.5 * result.angle_rms[0]


def test_updated_prior_changes_only_identified_fields(clean_fit, known):
    _, result = clean_fit
    new = updated_prior(result)
    assert new == result.identified
    assert new.muscle == known.prior.muscle
    assert dataclasses.replace(new.joint, payload_inertia=0.0, viscous_damping=0.0, coulomb_torque=0.0) == \
        dataclasses.replace(known.prior.joint, payload_inertia=0.0, viscous_damping=0.0, coulomb_torque=0.0)
    assert dataclasses.replace(new.pneumatics, delay=0.0, lag_time_constant=1.0) == \
        dataclasses.replace(known.prior.pneumatics, delay=0.0, lag_time_constant=1.0)


def test_the_snippet_pasted_into_the_config_builds_the_identified_prior(clean_fit):
    _, result = clean_fit
    raw = _raw(payload_known=True)
    raw["prior"].update(yaml.safe_load(config_snippet(result))["prior"])
    pasted = config.prior_params(config.load(raw))
    got, want = pasted.joint, result.identified.joint
    # the snippet rounds to 4 significant digits; the delay is a whole number of sub-steps
    assert got.payload_inertia == pytest.approx(want.payload_inertia, rel=1e-3)
    assert got.viscous_damping == pytest.approx(want.viscous_damping, rel=1e-3)
    assert got.coulomb_torque == pytest.approx(want.coulomb_torque, rel=1e-3)
    assert pasted.pneumatics.lag_time_constant == pytest.approx(result.identified.pneumatics.lag_time_constant,
                                                               rel=1e-3)
    assert pasted.pneumatics.delay == pytest.approx(result.identified.pneumatics.delay, rel=1e-9)


def test_new_prior_keys_set_the_prior_and_nulls_keep_todays():
    demo = yaml.safe_load(DEMO.read_text())
    for key in ("payload_mass", "payload_radius", "viscous_damping", "coulomb_torque", "force_scale"):
        demo["prior"].pop(key, None)
    assert config.prior_params(config.load(demo)) == config.prior_params(config.load(DEMO))
    p = config.prior_params(config.load(_raw(payload_mass="0.3 kg", payload_radius="200 mm", force_scale=0.9,
                                             viscous_damping="0.01 N m s/rad", coulomb_torque="0.02 N m")))
    # m r^2 (closed form)
    assert p.joint.payload_inertia == pytest.approx(0.3 * 0.2 ** 2)
    assert (p.muscle.force_scale, p.joint.viscous_damping, p.joint.coulomb_torque) == (0.9, 0.01, 0.02)


def test_bad_arguments_are_one_line_errors(known, clean_fit):
    from muscle_sim.errors import DataError, ParameterError

    with pytest.raises(ParameterError, match="^parameters: 'mass' is not allowed"):
        identify_prior([clean_fit[0]], known.prior, known.task, parameters=["mass"])
    with pytest.raises(DataError, match="^rollouts: none given"):
        identify_prior([], known.prior, known.task)
    short = dataclasses.replace(clean_fit[0], t=clean_fit[0].t * 2)
    with pytest.raises(DataError, match="^rollout 1: time step 0.004 s"):
        identify_prior([short], known.prior, known.task)


# --- the command line ---------------------------------------------------------------------------

@pytest.fixture(scope="module")
def log_file(clean_fit, tmp_path_factory):
    path = tmp_path_factory.mktemp("logs") / "trial.csv"
    clean_fit[0].write_csv(path)
    return path


def test_cli_identify_writes_report_snippet_and_plot(log_file, tmp_path, capsys):
    cfg = tmp_path / "known.yaml"
    cfg.write_text(yaml.safe_dump(_raw(payload_known=True)))
    out = tmp_path / "out"
    assert cli.main(["identify", "--config", str(cfg), "--rollout", str(log_file), "--out", str(out),
                     "--fit", "payload_mass,pressure_delay,pressure_time_constant,viscous_damping,"
                     "coulomb_torque"]) == 0
    text = capsys.readouterr().out
    assert "payload_mass" in text and "SAFETY" in text
    report = json.loads((out / "identification.json").read_text())
    # reference: the generating values (closed loop of our own simulator), in kg and ms; 2 %
    assert report["parameters"]["payload_mass"]["value"] == pytest.approx(0.2, rel=0.02)
    assert report["parameters"]["pressure_delay"]["value"] == pytest.approx(9.0, rel=0.02)
    assert "ISO 4414" in report["safety"]
    snippet = yaml.safe_load((out / "prior_fit.yaml").read_text())
    assert snippet["prior"]["pressure_delay"] == "9 ms"
    assert (out / "identification.png").stat().st_size > 1000


def _fails(args, expect):
    run = subprocess.run([sys.executable, "-m", "muscle_sim.cli", *args], capture_output=True, text=True)
    assert run.returncode == 2, run.stderr
    assert run.stderr.count("\n") == 1 and expect in run.stderr, run.stderr


def test_cli_bad_csv_and_flags_are_one_line_errors_with_exit_2(log_file, tmp_path):
    bad = tmp_path / "bad.csv"
    lines = log_file.read_text().splitlines()
    cells = lines[12].split(",")
    cells[1] = "nan"
    lines[12] = ",".join(cells)
    bad.write_text("\n".join(lines) + "\n")
    _fails(["identify", "--config", str(DEMO), "--rollout", str(bad), "--out", str(tmp_path / "o")],
           "row 12, column 'angle [deg]'")
    assert not (tmp_path / "o" / "identification.json").exists()
    _fails(["identify", "--config", str(DEMO), "--rollout", str(log_file), "--fit", "payload,delay"],
           "--fit: 'payload' is not allowed")


def test_valve_prior_sonic_conductance_and_delay_are_recovered_from_its_own_log(known):
    # reference: the generating values (closed loop of our own simulator): a valve-flow prior whose
    # valves pass 70 % of the datasheet's sonic conductance (ISO 6358 C) and 9 ms of dead time; 2 %
    prior = with_pressure_law(known.prior, "valve")
    c_true = 0.7 * prior.pneumatics.sonic_conductance
    truth = apply_prior_values(prior, {"sonic_conductance": c_true, "pressure_delay": 0.009}, payload_radius=RADIUS)
    result = identify_prior([_log(known, truth)], prior, known.task, payload_radius=RADIUS,
                            parameters=["sonic_conductance", "pressure_delay"])
    assert result.parameters["sonic_conductance"].value == pytest.approx(c_true, rel=0.02)
    assert result.parameters["pressure_delay"].value == pytest.approx(0.009, rel=0.02)
    # a lag prior has no valve flow to fit
    lag = identify_prior([_log(known, truth)], known.prior, known.task, payload_radius=RADIUS,
                         parameters=["sonic_conductance", "pressure_delay"])
    assert not lag.parameters["sonic_conductance"].fitted
    assert "no valve flow" in lag.parameters["sonic_conductance"].note


def test_pressure_law_is_chosen_by_the_law_that_made_the_pressures(known):
    # Reference: the law that generated the log. A lag prior's own log (lag 15 -> 19.5 ms, delay
    # 6 -> 9 ms) keeps the lag; a log of the valve-flow form of the same prior (ISO 6358 flow,
    # its valves at 70 % of the datasheet C) moves to the valve law.
    lag_truth = apply_prior_values(known.prior, {"pressure_time_constant": 0.0195, "pressure_delay": 0.009},
                                   payload_radius=RADIUS)
    law, _, result = select_pressure_law(known, [_log(known, lag_truth)], known.prior)
    assert law == "lag" and result.prior.pneumatics.model == "lag"
    valve = with_pressure_law(known.prior, "valve")
    valve_truth = apply_prior_values(valve, {"sonic_conductance": 0.7 * valve.pneumatics.sonic_conductance},
                                     payload_radius=RADIUS)
    law, prior, result = select_pressure_law(known, [_log(known, valve_truth)], known.prior)
    assert law == "valve" and prior.pneumatics.model == "valve"
    assert result.pressure_rms[1] < LAW_PREFERENCE * 5e2      # within the pressure noise floor (0.5 kPa)
