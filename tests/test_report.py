"""report.html: one self-contained page with table, figures, config, cautions and next step."""
import base64
import re

import pytest

from muscle_sim import safety
from muscle_sim.report import config_text, render_report, write_report
from muscle_sim.plotting import new_figure
from muscle_sim.records import save_figure_atomic

from conftest import DEMO, check_report


def _png(tmp_path, name="fig.png"):
    fig, axes = new_figure()
    axes[0, 0].plot([0, 1], [0, 1])
    return save_figure_atomic(fig, tmp_path / name)


def test_page_embeds_figures_and_carries_the_cautions(tmp_path):
    png = _png(tmp_path)
    rows = [["controller", "rms [deg]"], ["learned", "0.055"], ["<b>odd</b>", "–"]]
    path = write_report(tmp_path, "a <title>", rows, config_text(type("C", (), {"source": str(DEMO),
                        "digest": "abc"})()), ["CAUTION: 7 bar exceeds the rated pressure"], "tune it", [png])
    page = check_report(tmp_path)
    assert path.name == "report.html" and not list(tmp_path.glob("*.part"))
    embedded = re.search(r'src="data:image/png;base64,([^"]+)"', page).group(1)
    assert base64.b64decode(embedded) == png.read_bytes()
    assert "CAUTION: 7 bar exceeds" in page and "tune it" in page
    assert "&lt;b&gt;odd&lt;/b&gt;" in page and "<b>odd</b>" not in page
    assert "rest_radius: 8 mm" in page          # the config as written
    assert "a &lt;title&gt;" in page


def test_safety_wording_is_added_once_and_dict_rows_are_accepted():
    page = render_report("t", [{"trial": 0, "rms [deg]": 0.1234}], "x: 1", [safety.GENERAL], "next", [])
    assert page.count(safety.GENERAL.replace("'", "&#x27;")) == 1
    assert "<th>trial</th>" in page and "<td>0.1234</td>" in page


def test_the_check_fails_on_an_external_link(tmp_path):
    write_report(tmp_path, "t", [["a"], ["1"]], "x: 1", [], "next", [_png(tmp_path)])
    page = (tmp_path / "report.html").read_text()
    (tmp_path / "report.html").write_text(page.replace("</body>", '<img src="http://example.org/x.png"></body>'))
    with pytest.raises(AssertionError):
        check_report(tmp_path)


def test_config_without_a_file_lists_resolved_values():
    cfg = type("C", (), {"source": "<mapping>", "digest": "d", "values": {"task": {"strike_time": 17.5 * 0.01}}})()
    text = config_text(cfg)
    assert "task.strike_time = 0.175" in text and "resolved values" in text
