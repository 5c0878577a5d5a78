"""`pamjoint muscle`: table, JSON, PNG, cautions and exit code 2 on bad input."""
import json
import subprocess
import sys
from pathlib import Path

import pytest

from muscle_sim import cli, muscle, config

DEMO = Path(__file__).resolve().parents[1] / "configs" / "flipper.yaml"


def test_json_numbers_are_the_model(tmp_path, capsys):
    assert cli.main(["muscle", str(DEMO), "--out", str(tmp_path), "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    p = config.muscle_params(config.load(DEMO))
    i, j = 4, data["pressures_bar"].index(5.0)
    assert data["force_n"][i][j] == pytest.approx(float(muscle.static_force(p, 5e5, data["contractions_pct"][i] / 100)),
                                                  abs=1e-3)
    assert data["max_contraction_pct"] == pytest.approx(100 * muscle.max_contraction(p))
    assert (tmp_path / "muscle_map.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert json.loads((tmp_path / "muscle_map.json").read_text())["config_hash"] == data["config_hash"]
    assert data["cautions"] == []


def test_table_marks_rated_pressure_and_cautions_above_it(tmp_path, capsys):
    assert cli.main(["muscle", str(DEMO), "--out", str(tmp_path), "--pressures", "3,6,7 bar"]) == 0
    out = capsys.readouterr().out
    assert "6 bar*" in out and "7 bar!" in out
    assert "CAUTION: 7 bar exceeds the rated pressure 6 bar" in out
    assert "SAFETY:" in out


def test_bad_config_exits_2_with_one_line(tmp_path):
    bad = tmp_path / "bad.yaml"
    bad.write_text(DEMO.read_text().replace("rest_radius: 8 mm", "rest_radius: 8 parsecs"))
    run = subprocess.run([sys.executable, "-m", "muscle_sim.cli", "muscle", str(bad), "--out", str(tmp_path / "o")],
                         capture_output=True, text=True)
    assert run.returncode == 2
    assert run.stderr.strip().count("\n") == 0
    assert "plant.muscle.rest_radius" in run.stderr and "parsecs" in run.stderr
    assert "Traceback" not in run.stderr


def test_bad_flag_exits_2(capsys):
    with pytest.raises(SystemExit) as info:
        cli.main(["muscle", str(DEMO), "--no-such-flag"])
    assert info.value.code == 2
    assert cli.main(["muscle", str(DEMO), "--pressures", "abc"]) == 2
