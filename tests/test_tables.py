"""One table formatter: missing values, signs, precision, the same headers in every command."""
import math

from muscle_sim import cli, tables
from muscle_sim.tables import METRIC_COLUMNS, TRIAL, cell

from conftest import DEMO


def test_missing_values_show_a_dash_and_signs_follow_the_quantity():
    assert cell(None) == cell(math.nan, "+.3f") == cell(math.inf, ".1f") == "–"
    assert cell(0.0172, "+.3f") == "+0.017" and cell(0.0172, ".3f") == "0.017"
    # a value that rounds to zero must not read as a negative error
    assert cell(-0.0001, "+.3f") == "+0.000" and cell(-0.0001, ".3f") == "0.000"


def test_numbers_print_at_meaningful_precision():
    noisy = 17.5 * 0.01          # "17.5 cm" converted to m, as config.py does
    # derived: IEEE 754 double rounding makes 17.5 * 0.01 print as 0.17500000000000002
    assert repr(noisy) == "0.17500000000000002"
    assert tables.number(noisy) == "0.175"
    assert tables.value_text([noisy, 2, None]) == "[0.175, 2, –]"


def test_console_and_markdown_share_headers_and_cells():
    rows = [{"trial": 0, "rms_error_deg": 1.23456, "strike_angle_error_deg": -0.5, "strike_speed_error_pct": None,
             "peak_pressure_kpa": 401.25, "fault": None}]
    text = tables.text_table(rows, METRIC_COLUMNS, TRIAL)
    md = tables.markdown_table(rows, METRIC_COLUMNS, TRIAL)
    for column in METRIC_COLUMNS:
        assert column.header in text[0] and column.header in md[0]
    assert text[1].split() == ["0", "1.235", "-0.500", "–", "401.2"]
    assert md[2] == "| 0 | 1.235 | -0.500 | – | 401.2 |"


def test_check_prints_no_float_noise(capsys):
    assert cli.main(["check", str(DEMO)]) == 0
    out = capsys.readouterr().out
    assert "0000000" not in out and "9999999" not in out
    assert "plant.muscle.rest_radius = 0.008" in out
