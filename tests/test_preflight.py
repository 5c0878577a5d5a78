"""`pamjoint preflight`: a profile's limits, rate and predicted stop margin before hardware."""
import json

import numpy as np

from controllers.base import PressureProfile
from controllers.feedforward import model_only_profile
from controllers.preflight import preflight
from muscle_sim import cli
from muscle_sim.simulation import Setup

from conftest import DEMO


def test_the_model_only_profile_passes_and_its_prediction_is_the_priors_own_run(tmp_path):
    # derived: the model-only profile is the prior's inverse of the reference, so replayed on the
    # prior it keeps clear of the stops; the predicted strike equals that replay's metrics
    setup = Setup.from_config(DEMO)
    profile = model_only_profile(setup)
    report = preflight(setup, profile)
    assert report["passed"], report["findings"]
    assert report["predicted"]["stop_margin_deg"] > 3.0
    assert abs(report["predicted"]["strike_angle_error_deg"]) < 2.0


def test_samples_above_the_rating_and_a_fast_rate_are_findings(tmp_path, capsys):
    # common practice: never command above the rated pressure (the demo muscle: 6 bar); a step of
    # 5 bar within one 2 ms control step is 2500 bar/s, above a 150 bar/s bound
    setup = Setup.from_config(DEMO)
    base = model_only_profile(setup)
    u = base.commands.copy()
    u[200:210, 0] = 7e5
    path = tmp_path / "high.csv"
    PressureProfile(base.t, u).write_csv(path)
    code = cli.main(["preflight", str(path), "--config", str(DEMO), "--max-rate", "150 bar/s", "--json"])
    report = json.loads(capsys.readouterr().out)
    assert code == 1 and not report["passed"]
    assert report["samples_above_rated"] == 10
    assert any("above the rated pressure 6 bar" in f for f in report["findings"])
    assert any("above the bound 150 bar/s" in f for f in report["findings"])
    assert report["peak_rate_bar_per_s"] > 150


def test_reduce_to_writes_the_scaled_copy_and_bad_shares_are_one_line(tmp_path, capsys):
    setup = Setup.from_config(DEMO)
    base = model_only_profile(setup)
    path = tmp_path / "p.csv"
    base.write_csv(path)
    first = tmp_path / "first.csv"
    cli.main(["preflight", str(path), "--config", str(DEMO), "--reduce-to", "0.5", "--write", str(first)])
    out = capsys.readouterr().out
    assert "SAFETY" in out and "reduced to 0.5" in out
    # derived: every command halved (CSV rounding aside)
    assert np.allclose(PressureProfile.read_csv(first).commands, 0.5 * PressureProfile.read_csv(path).commands,
                       atol=1.0)
    assert cli.main(["preflight", str(path), "--config", str(DEMO), "--reduce-to", "1.5", "--write",
                     str(tmp_path / "x.csv")]) == 2
    err = capsys.readouterr().err
    assert "--reduce-to: 1.5 is not allowed" in err and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "x.csv").exists()
