"""`pamjoint plan`: offline planning on the prior model meets the strike within the limits or says
by how much it cannot."""
import json
import math

import numpy as np
import pytest
import yaml

from controllers.planning import plan
from muscle_sim import cli
from muscle_sim.simulation import Setup

from conftest import DEMO


def test_plan_meets_the_strike_within_the_limits(tmp_path):
    setup = Setup.from_config(DEMO)
    res = plan(setup, "peak-pressure", max_pressure_rate=150e5, max_iterations=40)
    # reference: the task's strike numbers; tolerances 0.05 deg and 0.5 % (constraint tolerance of SLSQP)
    assert res.feasible
    assert math.degrees(res.strike_angle) == pytest.approx(math.degrees(setup.task.strike_angle), abs=0.05)
    assert res.strike_speed == pytest.approx(setup.task.strike_speed, rel=5e-3)
    c = res.profile.commands
    assert c.min() >= 0.3e5 - 1 and c.max() <= setup.rated_pressure + 1
    knots = c[:: 4]
    assert np.max(np.abs(np.diff(knots, axis=0))) <= 150e5 * 0.008 + 1e3
    margin = setup.prior.joint.upper_stop - math.radians(3.0)
    assert np.max(np.abs(res.swing)) <= margin + 1e-3
    assert res.objective_value <= 6.0


def test_an_impossible_strike_is_reported_with_its_shortfall(tmp_path, capsys):
    raw = yaml.safe_load(DEMO.read_text())
    raw["task"]["strike_speed"] = "40 rad/s"
    cfg = tmp_path / "fast.yaml"
    cfg.write_text(yaml.safe_dump(raw))
    assert cli.main(["plan", str(cfg), "--iterations", "25", "--out", str(tmp_path / "p"), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["feasible"] is False
    assert 0 < report["max_strike_speed_rad_s"] < 40.0
    assert report["suggestions"] and "reduced pressure" in report["safety"]
    assert (tmp_path / "p" / "profile.csv").exists() and (tmp_path / "p" / "plan.png").exists()


def test_bad_plan_flags_exit_2(tmp_path):
    assert cli.main(["plan", str(DEMO), "--max-pressure-rate", "fast", "--out", str(tmp_path)]) == 2
    assert cli.main(["plan", str(DEMO), "--iterations", "0", "--out", str(tmp_path)]) == 2
