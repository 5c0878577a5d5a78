"""`pamjoint joint`: torque and stiffness over the angle, table, JSON, figure, report, bad input."""
import argparse
import json
import math
import subprocess
import sys

import numpy as np
import pytest

from muscle_sim import cli, config, muscle
from muscle_sim.joint_view import build_view, joint_stiffness, net_torque
from muscle_sim.plant import equilibrium_torque
from muscle_sim.plotting import new_figure, plot_joint_stiffness, plot_joint_torque
from muscle_sim.simulation import Setup

from conftest import DEMO


@pytest.fixture(scope="module")
def setup():
    return Setup.from_config(DEMO)


def test_help_lists_the_joint_view_and_no_muscle_command():
    parser = cli.build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    assert "joint" in sub.choices and "muscle" not in sub.choices
    helps = {a.dest: a.help for a in sub._choices_actions}
    assert "torque" in helps["joint"]
    assert "torque" in parser.format_help()
    with pytest.raises(SystemExit) as info:
        cli.main(["muscle", str(DEMO)])
    assert info.value.code == 2


def test_stiffness_is_minus_the_torque_slope(setup):
    params = setup.plant
    q = np.linspace(params.joint.lower_stop, params.joint.upper_stop, 2001)
    for pressures in ((2e5, 2e5), (6e5, 6e5), (4e5, 1e5)):
        tau = net_torque(params, q, pressures)
        # reference: numpy.gradient (second-order central differences) of the torque itself
        numeric = -np.gradient(tau, q)
        assert joint_stiffness(params, q, pressures)[1:-1] == pytest.approx(numeric[1:-1], rel=1e-4, abs=1e-4)


def test_torque_is_the_plants_muscle_torque_plus_gravity(setup):
    params = setup.plant
    q = np.radians([-40.0, 0.0, 25.0])
    j = params.joint
    # closed form: r_p (F_a - F_b) (physics notes section 2) - m g l sin(q + q_g) at rest
    fa = muscle.static_force(params.muscle, 5e5, j.pre_contraction + j.pulley_radius * q / params.muscle.rest_length)
    fb = muscle.static_force(params.muscle, 1e5, j.pre_contraction - j.pulley_radius * q / params.muscle.rest_length)
    expect = j.pulley_radius * (fa - fb) - j.gravity_moment * np.sin(q + j.gravity_offset)
    assert net_torque(params, q, (5e5, 1e5)) == pytest.approx(expect, rel=1e-9)
    assert equilibrium_torque(params, q, (5e5, 1e5)) == pytest.approx(j.pulley_radius * (fa - fb), rel=1e-9)


def test_view_holds_at_home_and_orders_its_levels(setup):
    view = build_view(setup, [6e5, 2e5])
    assert list(view.levels) == [2e5, 6e5]
    i = int(np.argmin(np.abs(view.angles - view.hold_angle)))
    # derived: the holding pressures balance gravity at home, so the net torque crosses zero there
    assert abs(view.hold_torque[i]) < 0.05 * np.abs(view.torque_a[-1, i])
    assert np.all(view.torque_a[-1] > view.torque_a[0]) and np.all(view.torque_b[-1] < view.torque_b[0])
    assert view.angles[0] == pytest.approx(setup.plant.joint.lower_stop)
    assert view.angles[-1] == pytest.approx(setup.plant.joint.upper_stop)


def test_figure_draws_stops_swing_rated_and_holding(setup):
    view = build_view(setup)
    fig, axes = new_figure(2, 1, sharex=True)
    plot_joint_torque(view, ax=axes[0, 0])
    plot_joint_stiffness(view, ax=axes[1, 0])
    for ax in axes[:, 0]:
        labels = [t.get_text() for t in ax.get_legend().get_texts()]
        assert "end stop" in labels and "task swing band" in labels and "strike angle" in labels
        assert any("rated" in t for t in labels) and any("holding" in t for t in labels)
        xs = {round(float(line.get_xdata()[0]), 6) for line in ax.get_lines() if line.get_label() == "end stop"}
        assert round(math.degrees(setup.plant.joint.lower_stop), 6) in xs
        assert ax.get_title(loc="left")
    assert axes[0, 0].get_ylabel() == "static torque at rest [N m]"
    assert axes[1, 0].get_xlabel() == "joint angle [deg]" and "N m/rad" in axes[1, 0].get_ylabel()
    texts = " ".join(t.get_text() for t in axes[0, 0].texts)
    assert "A pulls" in texts and "B pulls" in texts


def test_json_table_and_report(tmp_path, capsys):
    assert cli.main(["joint", str(DEMO), "--out", str(tmp_path), "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    p = config.muscle_params(config.load(DEMO))
    single = data["muscle"]
    i, j = 4, single["pressures_bar"].index(5.0)
    assert single["force_n"][i][j] == pytest.approx(
        float(muscle.static_force(p, 5e5, single["contractions_pct"][i] / 100)), abs=1e-3)
    assert data["levels_bar"] == pytest.approx([2.0, 4.0, 6.0])
    assert data["stops_deg"] == pytest.approx([-45.0, 45.0])
    assert (tmp_path / "joint_view.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert json.loads((tmp_path / "joint_view.json").read_text())["config_hash"] == data["config_hash"]
    assert "data:image/png;base64," in (tmp_path / "report.html").read_text()
    assert data["cautions"] == []


def test_table_marks_rated_pressure_and_cautions_above_it(tmp_path, capsys):
    assert cli.main(["joint", str(DEMO), "--out", str(tmp_path), "--pressures", "3,6,7 bar"]) == 0
    out = capsys.readouterr().out
    assert "6 bar*" in out and "angle [deg]" in out and "K 7 bar [N m/rad]" in out
    assert "CAUTION: 7 bar exceeds the rated pressure 6 bar" in out
    assert "SAFETY:" in out


def test_bad_config_exits_2_with_one_line(tmp_path):
    bad = tmp_path / "bad.yaml"
    bad.write_text(DEMO.read_text().replace("rest_radius: 8 mm", "rest_radius: 8 parsecs"))
    run = subprocess.run([sys.executable, "-m", "muscle_sim.cli", "joint", str(bad), "--out", str(tmp_path / "o")],
                         capture_output=True, text=True)
    assert run.returncode == 2
    assert run.stderr.strip().count("\n") == 0
    assert "plant.muscle.rest_radius" in run.stderr and "parsecs" in run.stderr
    assert "Traceback" not in run.stderr


def test_bad_flag_exits_2(capsys):
    with pytest.raises(SystemExit) as info:
        cli.main(["joint", str(DEMO), "--no-such-flag"])
    assert info.value.code == 2
    assert cli.main(["joint", str(DEMO), "--pressures", "abc"]) == 2
    assert "--pressures" in capsys.readouterr().err
