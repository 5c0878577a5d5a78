"""Figures read at a glance: titles, axis labels, legends, stop and strike lines are present."""
import math
from types import SimpleNamespace

import numpy as np
import pytest

from controllers.simple import HoldPressures
from muscle_sim import plotting
from muscle_sim.plotting import LABEL_A, LABEL_B, new_figure, plot_learning_curve, plot_trial_stack
from muscle_sim.runs import run_trial, shown_episodes


@pytest.fixture(scope="module")
def rollouts(demo_setup):
    rng = np.random.default_rng(0)
    return [run_trial(demo_setup, HoldPressures(), i, rng)[0] for i in range(2)]


def _legend(ax):
    legend = ax.get_legend()
    assert legend is not None, ax.get_title(loc="left")
    return [t.get_text() for t in legend.get_texts()]


def _vertical_at(ax, x):
    return any(len(line.get_xdata()) == 2 and np.allclose(line.get_xdata(), [x, x]) for line in ax.get_lines())


def _horizontal_at(ax, y):
    return any(len(line.get_ydata()) == 2 and np.allclose(line.get_ydata(), [y, y]) for line in ax.get_lines())


def test_trial_stack_shares_time_and_marks_stops_strike_and_muscles(demo_setup, rollouts):
    task, j = demo_setup.task, demo_setup.plant.joint
    fig, _ = new_figure(0, figsize=(11, 8))
    axes = plot_trial_stack(fig, rollouts, task, (j.lower_stop, j.upper_stop), demo_setup.rated_pressure,
                            labels=["episode 0", "episode 1"], detail_label="episode 1 (last of 2)")
    angle = axes["angle"]
    assert set(_legend(angle)) >= {"episode 0", "episode 1", "reference", "end stop", "strike", "strike target"}
    assert _horizontal_at(angle, math.degrees(j.lower_stop)) and _horizontal_at(angle, math.degrees(j.upper_stop))
    assert set(_legend(axes["pressure"])) >= {LABEL_A, LABEL_B, "rated 6 bar"}
    assert "pulls toward +angle" in LABEL_A and "pulls toward −angle" in LABEL_B
    assert set(_legend(axes["command"])) == {"command A (+)", "command B (−)"}
    for name in ("angle", "pressure", "command", "angle_zoom", "pressure_zoom", "command_zoom"):
        assert _vertical_at(axes[name], task.strike_time), name
    assert axes["pressure"].get_shared_x_axes().joined(axes["angle"], axes["command"])
    zoom = axes["angle_zoom"].get_xlim()
    assert zoom[0] < task.strike_time < zoom[1] and zoom[1] - zoom[0] < 0.1 * task.trial_length
    assert "episode 1 (last of 2)" in axes["pressure"].get_title(loc="left")
    assert "strike window" in axes["angle_zoom"].get_title()
    assert axes["command"].get_xlabel() == "time [s]" and axes["angle"].get_ylabel() == "joint angle [deg]"
    # the reference is drawn above every trial, so a trial that tracks it cannot hide it
    ref = next(line for line in angle.get_lines() if line.get_label() == "reference")
    assert all(ref.get_zorder() > line.get_zorder() for line in angle.get_lines() if line.get_label().startswith("episode"))


def test_learning_curve_shows_strike_errors_and_marks_rejected_and_faulted_trials():
    rows = [{"trial": i, "rms_error_deg": 5.0 / (i + 1), "strike_angle_error_deg": -3.0 / (i + 1),
             "strike_speed_error_pct": -10.0 / (i + 1), "guard": i == 2, "fault": "end stop" if i == 3 else None}
            for i in range(5)]
    rows[3]["strike_angle_error_deg"] = None
    fig, axes = new_figure(3, 1, sharex=True)
    plot_learning_curve(rows, axes[:, 0], goals=(0.2, 1.0))
    ylabels = [ax.get_ylabel() for ax in axes[:, 0]]
    assert ylabels == ["swing RMS error [deg]", "strike angle error [deg]", "strike speed error [%]"]
    assert axes[0, 0].get_yscale() == "log" and axes[-1, 0].get_xlabel() == "trial"
    for ax in axes[:, 0]:
        labels = _legend(ax)
        assert "rejected (guard fell back)" in labels and "fault" in labels
        marks = {line.get_label(): line for line in ax.get_lines()}
        assert list(marks["rejected (guard fell back)"].get_xdata()) == [2]
        assert list(marks["fault"].get_xdata()) == [3]
    assert "goal ±0.2" in _legend(axes[1, 0]) and "goal ±1" in _legend(axes[2, 0])


def test_run_shows_every_episode_or_says_which():
    assert shown_episodes(5) == [0, 1, 2, 3, 4]
    many = shown_episodes(40)
    assert len(many) <= 8 and many[0] == 0 and many[-1] == 39


def test_compare_overlays_are_titled_by_what_they_show(demo_setup, rollouts, tmp_path):
    from controllers.comparison import _plots

    figures = _plots(demo_setup, {"model-only": rollouts[0], "learned": rollouts[1]}, tmp_path, trial=8)
    assert [p.name for p, _ in figures] == ["overlay_angle.png", "overlay_error.png"]
    assert all("2 controllers on evaluation trial 8" in caption for _, caption in figures)


def test_overlay_angle_keeps_the_reference_and_stops(demo_setup, rollouts):
    j, task = demo_setup.plant.joint, demo_setup.task
    fig, axes = new_figure()
    ax = axes[0, 0]
    plotting.plot_angle(rollouts, ax=ax, labels=["a", "b"], stops=(j.lower_stop, j.upper_stop),
                        strike=(task.strike_time, task.strike_angle), colors=plotting.category_colors(2))
    labels = [line.get_label() for line in ax.get_lines()]
    assert "reference" in labels and "end stop" in labels and "strike" in labels
    assert _horizontal_at(ax, math.degrees(j.upper_stop))


def test_plan_figure_has_a_command_legend_and_limits(demo_setup):
    from controllers.base import PressureProfile
    from muscle_sim.cli import _plan_figure

    task = demo_setup.task
    t = np.arange(task.n_steps + 1) * task.dt
    profile = PressureProfile(t[:-1], np.full((task.n_steps, 2), 2e5))
    result = SimpleNamespace(swing=np.full(t.size, task.home_angle), profile=profile, objective="peak-pressure")
    fig = _plan_figure(demo_setup, result, t)
    ax1, ax2 = fig.axes[:2]
    assert {"task reference", "planned swing (prior model)", "end stop", "strike",
            "angle limit (stop less margin)"} <= set(_legend(ax1))
    assert {"command A (pulls toward +angle)", "command B (pulls toward −angle)", "rated 6 bar"} <= set(_legend(ax2))
    assert _vertical_at(ax2, task.strike_time) and ax2.get_xlabel() == "time [s]"
    assert "prior model" in fig.get_suptitle()
