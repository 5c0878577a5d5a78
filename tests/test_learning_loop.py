"""The learner's loop around the step: guard, trust region, model updating and the verdict."""
import pytest
import yaml

import numpy as np

from controllers.tuning import tune, verdict
from muscle_sim.simulation import Setup

from conftest import DEMO
from test_learning import _first_trial


def test_the_guard_re_measures_its_reference_after_a_fallback():
    # derived from the guard's rule: after a fallback the rerun is judged by nothing and becomes
    # the new reference, so a plant that got worse between trials cannot lock the guard
    learner, state, profile, rollout = _first_trial(DEMO)
    _, first, result = learner.update(rollout, profile, state)
    stale = type(state)(theta=state.theta, extra={"ref_cost": result.cost / 100, "ref_theta": state.theta})
    _, after, guarded = learner.update(rollout, profile, stale)
    assert guarded.status == 2 and after.extra["rerun"] and after.theta == state.theta
    _, next_state, rerun = learner.update(rollout, learner.profile(after.theta), after)
    assert rerun.status != 2                                  # the rerun is never rejected ...
    assert next_state.extra["ref_cost"] == rerun.cost        # ... and sets the new reference
    assert next_state.extra["ref_cost"] > stale.extra["ref_cost"]


def test_on_a_mismatched_plant_applied_steps_are_predicted_to_lower_the_cost(tmp_path):
    # derived: outside angle-limit restoration every applied step is predicted by the prior to
    # lower the trial cost (the exact minimiser of the step's quadratic, which equals the cost at
    # zero step), and the run improves 5x in 6 trials. A plant the prior gets wrong: 4 m tubes
    # and a stronger end effect, the prior's delay 6 ms short.
    raw = yaml.safe_load(DEMO.read_text())
    raw["plant"]["pneumatics"]["tube_length"] = "4 m"
    raw["plant"]["muscle"]["end_correction"] = 1.4
    raw["prior"]["pressure_delay"] = "8 ms"
    summary = tune(Setup.from_config(raw), "norm-optimal", 6, 1, tmp_path)
    for row in summary["trials"]:
        if row["update_status"] in (0, 1, 3) and not row["angle_limits"]:
            assert row["predicted_cost"] < row["cost"], row
    assert summary["trials"][-1]["rms_error_deg"] < summary["trials"][0]["rms_error_deg"] / 5


def _prior_class_plant(payload):
    """The demo config with a plant of the prior's own model class (ideal muscle, first-order
    pressure lag, no pivot friction) carrying a payload the prior does not know."""
    raw = yaml.safe_load(DEMO.read_text())
    m, pn, j = raw["plant"]["muscle"], raw["plant"]["pneumatics"], raw["plant"]["joint"]
    m.update(wall_thickness="0 mm", end_correction=1.0, braid_friction=0.0, threshold_pressure="0 bar")
    pn.update(model="lag", lag_time_constant="15 ms", valve_dead_time="0 ms")
    j.update(viscous_damping="0 N m s/rad", coulomb_torque="0 N m", payload_mass=payload)
    raw["prior"]["pressure_delay"] = "5.83 ms"
    return raw


def test_model_updating_moves_the_prior_toward_the_plant(tmp_path):
    # Reference: the plant's configured payload, 0.2 kg at 250 mm; the plant is of the prior's own
    # model class, so the prior can represent it exactly (derived). Each trial the identified
    # payload moves part of the way (prior_blend 1/2) from the prior's 0 kg toward it; a trial the
    # guard rejects (a rerun of the last good profile) re-identifies nothing and keeps it.
    import json

    tune(Setup.from_config(_prior_class_plant("0.2 kg")), "norm-optimal", 3, 0, tmp_path / "on")
    masses = [json.loads((tmp_path / "on" / "profiles" / f"state-{i:04d}.json").read_text())["extra"]
              ["prior_values"].get("payload_mass", 0.0) for i in (1, 2, 3)]
    assert 0.0 < masses[0] <= masses[1] <= masses[2] < 0.2 + 0.01 and masses[0] < masses[2]
    assert masses[-1] > 0.12
    # the switch turns it off: the prior stays the config's
    raw = yaml.safe_load(DEMO.read_text())
    raw["learning"]["update_prior"] = False
    tune(Setup.from_config(raw), "norm-optimal", 2, 0, tmp_path / "off")
    state = json.loads((tmp_path / "off" / "profiles" / "state-0002.json").read_text())
    assert state["extra"]["prior_values"] == {}


def _row(trial, strike=-3.0, speed=-5.0, cost=1e-3, predicted=5e-4, **extra):
    return {"trial": trial, "strike_angle_error_deg": strike, "strike_speed_error_pct": speed, "cost": cost,
            "predicted_cost": predicted, "update_status": 1, "boxed_in_strike_window": 0,
            "achieved_over_predicted": 0.9, "guard": False, **extra}


def test_the_verdict_names_the_cause():
    # derived from the verdict's rules, one synthetic run per cause
    assert verdict([_row(0), _row(1, strike=0.1, speed=0.5)])["first_trial"] == 1
    saturated = [_row(i, boxed_in_strike_window=3) for i in range(6)]
    assert verdict(saturated)["cause"] == "actuator-saturation"
    drift = [_row(0, cost=1e-4), _row(1, cost=5e-4, guard=True), _row(2, cost=3e-4), _row(3), _row(4)]
    assert verdict(drift)["cause"] == "drift"
    mismatch = [_row(i, achieved_over_predicted=0.05) for i in range(6)]
    assert verdict(mismatch)["cause"] == "prior-mismatch"
    floor = [_row(i, cost=1e-4, predicted=0.99e-4) for i in range(6)]
    assert verdict(floor)["cause"] == "noise-floor"
    assert verdict([_row(i, cost=10.0 ** -i, predicted=0.5 * 10.0 ** -i) for i in range(6)])["cause"] == "converging"
    assert all(v["next_action"] for v in (verdict(saturated), verdict(drift), verdict(mismatch), verdict(floor)))
    assert np.isfinite(len(verdict([])["message"]))


def test_a_rerun_that_came_back_worse_marks_the_plant_as_drifting():
    # derived from the guard's rule: the rerun profile measured clearly worse than before
    # (beyond sqrt(guard_factor) times its reference) shows drift; the halving is undone and a
    # later bad trial is learned from, not rerun
    learner, state, profile, rollout = _first_trial(DEMO)
    _, first, result = learner.update(rollout, profile, state)
    stale = type(state)(theta=state.theta, step_scale=1.0,
                        extra={"ref_cost": result.cost / 100, "ref_theta": state.theta})
    _, after, guarded = learner.update(rollout, profile, stale)
    assert guarded.status == 2 and after.step_scale == 0.5
    _, drifting, rerun = learner.update(rollout, learner.profile(after.theta), after)
    assert drifting.extra["drifting"] and rerun.step_scale == 1.0
    worse = type(state)(theta=drifting.theta, step_scale=drifting.step_scale,
                        extra={**drifting.extra, "ref_cost": result.cost / 100})
    _, _, learned = learner.update(rollout, learner.profile(worse.theta), worse)
    assert learned.status != 2


def test_on_a_drifting_plant_the_step_shrinks_by_the_share_of_the_error_that_repeats():
    # derived from the steady-state Kalman gain of repetitive-error estimation (Schoellig, Mueller
    # & D'Andrea 2012): gain = 1 - c_n / c, with the non-repetitive cost c_n = half the cost of the
    # miss between the achieved and the predicted error change (two trials' noise). A miss set to
    # carry half the trial's cost gives gain 1/2; without evidence of drift the full step is kept
    learner, state, profile, rollout = _first_trial(DEMO)
    e, e_rate = learner.objective.errors(rollout)
    cost = learner.objective.cost(rollout)
    W = learner.objective.w_angle
    n = np.sin(np.arange(e.size) * 0.7)
    n *= np.sqrt(0.5 * cost / (0.25 * float(np.sum(W * n * n))))        # 0.25 sum W n^2 = cost / 2
    record = {"last_error": (e - n).tolist(), "last_rate_error": float(e_rate),
              "predicted_change": np.zeros(e.size).tolist(), "predicted_rate_change": 0.0}
    results = {}
    for drifting in (False, True):
        start = type(state)(theta=state.theta, extra={**record, "drifting": drifting})
        _, after, results[drifting] = learner.update(rollout, profile, start)
        assert after.extra["noise_cost"] == pytest.approx(cost / 2, rel=1e-9)
    assert results[False].diagnosis["learning_gain"] == 1.0
    assert results[True].diagnosis["learning_gain"] == pytest.approx(0.5, rel=1e-9)
    assert results[True].step_norm_kpa < 0.75 * results[False].step_norm_kpa
