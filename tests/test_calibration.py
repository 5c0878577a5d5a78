"""Calibration of the muscle model from static bench data (scipy.optimize.least_squares)."""
import json
import math
import subprocess
import sys
from dataclasses import replace

import numpy as np
import pytest

from muscle_sim import cli
from muscle_sim.calibration import BenchData, calibrate, model_force
from muscle_sim.params import McKibbenParams

from conftest import DEMO, ROOT

TRUE = McKibbenParams(rest_length=0.25, rest_radius=0.008, rest_braid_angle=math.radians(22.6),
                      wall_thickness=0.0008, end_correction=1.22, braid_friction=0.035, threshold_pressure=1e4)


def _grid():
    p = np.repeat([1e5, 2e5, 3e5, 4e5, 5e5, 6e5], 26)
    eps = np.tile(np.linspace(0, 0.24, 13).repeat(2), 6)
    d = np.tile([1.0, -1.0], 78)
    return BenchData(p, eps, np.zeros_like(p), d)


def _guess():
    return replace(TRUE, end_correction=1.0, rest_braid_angle=math.radians(20.0), braid_friction=0.0)


def test_ideal_data_returns_the_ideal_parameters():
    # Reference: data made by the model itself without noise; the fit must return the generating
    # values (tolerance 1e-6 relative).
    data = _grid()
    data.force = model_force(TRUE, data, TRUE.end_correction, TRUE.rest_braid_angle, TRUE.braid_friction)
    res = calibrate(_guess(), data)
    assert res.success
    np.testing.assert_allclose(res.values, [1.22, math.radians(22.6), 0.035], rtol=1e-6)
    assert res.residual_rms < 1e-6


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_noisy_data_recovers_parameters_within_the_reported_uncertainty(seed):
    # Reference: generating values; each estimate within 3.5 reported standard deviations
    # (Gauss-Newton covariance s^2 (J^T J)^-1), and the residual rms near the 4 N noise.
    data = _grid()
    rng = np.random.default_rng(seed)
    clean = model_force(TRUE, data, TRUE.end_correction, TRUE.rest_braid_angle, TRUE.braid_friction)
    data.force = np.maximum(clean + rng.normal(0, 4.0, clean.size), 0.0)
    res = calibrate(_guess(), data)
    truth = np.array([1.22, math.radians(22.6), 0.035])
    assert np.all(np.abs(res.values - truth) <= 3.5 * res.std), (res.values, res.std)
    assert 3.0 < res.residual_rms < 5.0


def test_the_shipped_bench_data_fits(tmp_path, capsys):
    assert cli.main(["calibrate", str(ROOT / "examples" / "bench-muscle.csv"), "--config", str(DEMO),
                     "--out", str(tmp_path), "--json"]) == 0
    assert (tmp_path / "fitted_muscle.yaml").read_text().startswith("# fitted")
    assert (tmp_path / "calibration_fit.png").exists()


@pytest.mark.parametrize("text, expect", [
    ("pressure [bar],length [mm],force [N]\n" + "3,240,100\n" * 4 + "3,240,abc\n", "row 6, column 'force [N]'"),
    ("pressure [bar],length [mm],force [lbf]\n" + "3,240,100\n" * 6, "unit 'lbf' does not match"),
    ("pressure [bar],length [mm],force [N],colour [-]\n" + "3,240,100,1\n" * 6, "'colour [-]' is unknown"),
    ("pressure [bar],force [N]\n" + "3,100\n" * 6, "exactly one of length or contraction"),
    ("pressure [bar],length [mm],force [N]\n" + "3,240,100\n" * 5 + "-1,240,100\n", "row 7, column 'pressure [bar]'"),
    ("pressure [bar],length [mm],force [N]\n" + "3,240,100\n" * 5 + "3,240,nan\n", "must be finite"),
    ("pressure [bar],contraction [%],force [N]\n" + "3,10,100\n" * 5 + "3,120,100\n", "row 7, column 'contraction [%]'"),
])
def test_bad_bench_csvs_name_row_and_column(tmp_path, text, expect):
    bad = tmp_path / "bad.csv"
    bad.write_text(text)
    run = subprocess.run([sys.executable, "-m", "muscle_sim.cli", "calibrate", str(bad), "--config", str(DEMO),
                          "--out", str(tmp_path / "o")], capture_output=True, text=True)
    assert run.returncode == 2 and run.stderr.count("\n") == 1 and expect in run.stderr, run.stderr


def test_a_fit_at_a_bound_is_a_failure_and_the_geometry_is_recorded(tmp_path, capsys):
    # derived: newtons read as kilonewtons make every force 1000x too large; no end correction or
    # braid angle in the allowed range reaches them, so the fit ends at a bound and must fail
    text = (ROOT / "examples" / "bench-muscle.csv").read_text().replace("force [N]", "force [kN]")
    data = tmp_path / "kn.csv"
    data.write_text(text)
    code = cli.main(["calibrate", str(data), "--config", str(DEMO), "--out", str(tmp_path / "fit"), "--json"])
    report = json.loads(capsys.readouterr().out)
    assert code == 1 and report["success"] is False and "at the bound" in report["message"]
    assert report["geometry_assumed"]["rest_length_m"] == pytest.approx(0.25)
    # without a config the wall thickness can be given; it is recorded as assumed
    assert cli.main(["calibrate", str(ROOT / "examples" / "bench-muscle.csv"), "--rest-length", "250 mm",
                     "--rest-radius", "8 mm", "--wall-thickness", "1 mm", "--out", str(tmp_path / "w"),
                     "--json"]) in (0, 1)
    assert json.loads(capsys.readouterr().out)["geometry_assumed"]["wall_thickness_m"] == pytest.approx(1e-3)
