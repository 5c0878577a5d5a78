"""Plot functions: each takes ``ax=`` (or a figure) and returns its artists; never shows.

Figures are built with matplotlib's object API (:func:`new_figure`, no pyplot state), so plots
made in a loop or a worker process never leak into each other. One visual language throughout:
muscle A (pulls toward +angle) in teal, muscle B (pulls toward -angle) in brick red, the reference
as a dashed black line drawn above every trial, end stops as grey hatched bands, the strike as a
dotted vertical line.
"""
from __future__ import annotations

import math

import numpy as np

#: Colours of muscle A (pulls toward +angle) and B (pulls toward -angle).
COLOR_A, COLOR_B = "#1b7f79", "#b5483a"
LABEL_A, LABEL_B = "muscle A (pulls toward +angle)", "muscle B (pulls toward −angle)"
REFERENCE_STYLE = dict(color="k", lw=1.4, ls=(0, (5, 3)), zorder=10)
STRIKE_STYLE = dict(color="0.35", lw=0.9, ls=":")
#: Half width of the strike zoom [s].
STRIKE_ZOOM = 0.03


def new_figure(rows: int = 1, cols: int = 1, figsize=(7, 4), **kwargs):
    """A figure and its axes through the object API (constrained layout); ``(fig, axes)``, a 2-D
    array of axes (none with ``rows=0``, for figures that lay out their own grid)."""
    from matplotlib.figure import Figure

    fig = Figure(figsize=figsize, layout="constrained")
    return fig, (fig.subplots(rows, cols, squeeze=False, **kwargs) if rows else None)


def _axes(ax):
    if ax is None:
        ax = new_figure()[1][0, 0]
    return ax


#: Colours of named alternatives (controllers), in order; trials in a sequence use :func:`trial_colors`.
CATEGORY_COLORS = ("#4c5bd4", "#e08a00", "#8c4fa3", "#1f9e89", "#d1495b", "#7f8f00", "#8a6d1d", "#2b8cbe")


def category_colors(n: int):
    """``n`` distinct colours for named alternatives (they repeat after eight)."""
    return [CATEGORY_COLORS[i % len(CATEGORY_COLORS)] for i in range(n)]


def trial_colors(n: int):
    from matplotlib import colormaps

    cmap = colormaps["plasma"]
    return [cmap(0.08 + 0.72 * i / max(n - 1, 1)) for i in range(n)]


def mark_stops(ax, lower: float, upper: float, vertical: bool = False):
    """End stops at ``lower``/``upper`` [rad] as lines with hatched bands beyond them (on the
    y axis in degrees, or on the x axis with ``vertical``); returns the two lines."""
    lo, hi = math.degrees(lower), math.degrees(upper)
    span = (hi - lo) * 0.08
    line = ax.axvline if vertical else ax.axhline
    band = ax.axvspan if vertical else ax.axhspan
    artists = [line(lo, color="0.3", lw=1.0, label="end stop"), line(hi, color="0.3", lw=1.0)]
    for a, b in ((lo - span, lo), (hi, hi + span)):
        band(a, b, facecolor="none", edgecolor="0.6", hatch="///", lw=0, zorder=0)
    if vertical:
        ax.set_xlim(lo - span, hi + span)
    return artists


def mark_strike(ax, strike_time: float, label: bool = True):
    """The strike instant as a dotted vertical line."""
    return ax.axvline(strike_time, label="strike" if label else None, **STRIKE_STYLE)


def plot_angle(rollouts, ax=None, labels=None, stops=None, strike=None, colors=None):
    """Measured joint angle of one or more rollouts [deg], the reference dashed on top of them;
    ``stops`` (lower, upper) [rad] and ``strike`` (time [s], angle [rad]) are marked when given;
    ``colors`` default to a sequence of trial colours."""
    ax = _axes(ax)
    rollouts = rollouts if isinstance(rollouts, (list, tuple)) else [rollouts]
    artists = []
    for i, (r, color) in enumerate(zip(rollouts, colors or trial_colors(len(rollouts)))):
        label = labels[i] if labels else f"trial {r.metadata.get('trial', i)}"
        artists.append(ax.plot(r.t, np.degrees(r.measured[:, 0]), lw=1.2, color=color, label=label)[0])
    artists.insert(0, ax.plot(rollouts[0].t, np.degrees(rollouts[0].reference), label="reference",
                              **REFERENCE_STYLE)[0])
    if stops is not None:
        artists += mark_stops(ax, *stops)
    if strike is not None:
        artists.append(mark_strike(ax, strike[0]))
        artists.append(ax.plot([strike[0]], [math.degrees(strike[1])], marker="o", mfc="none", mec="k", ms=8,
                               ls="none", zorder=11, label="strike target")[0])
    ax.set_xlabel("time [s]")
    ax.set_ylabel("joint angle [deg]")
    return artists


def plot_pressures(rollout, ax=None, rated_pressure=None):
    """Measured muscle pressures [bar gauge], with the rated pressure as a line."""
    ax = _axes(ax)
    artists = [ax.plot(rollout.t, rollout.measured[:, 2] / 1e5, color=COLOR_A, label=LABEL_A)[0],
               ax.plot(rollout.t, rollout.measured[:, 3] / 1e5, color=COLOR_B, label=LABEL_B)[0]]
    if rated_pressure is not None:
        artists.append(ax.axhline(rated_pressure / 1e5, color="0.2", lw=1, ls="-.",
                                  label=f"rated {rated_pressure / 1e5:g} bar"))
    ax.set_xlabel("time [s]")
    ax.set_ylabel("pressure [bar gauge]")
    return artists


def plot_commands(rollout, ax=None):
    """Pressure commands of both muscles [bar gauge] as steps (each acts until the next sample)."""
    ax = _axes(ax)
    artists = [ax.step(rollout.t, rollout.command[:, 0] / 1e5, where="post", color=COLOR_A, label="command A (+)")[0],
               ax.step(rollout.t, rollout.command[:, 1] / 1e5, where="post", color=COLOR_B, label="command B (−)")[0]]
    ax.set_xlabel("time [s]")
    ax.set_ylabel("command [bar gauge]")
    return artists


def plot_trial_stack(fig, rollouts, task, stops, rated_pressure, labels=None, detail=-1, detail_label=None):
    """Angle, pressures and commands stacked on one time axis, a zoom of the strike window beside.

    ``rollouts`` all appear in the angle panels; the pressure and command panels show the one at
    index ``detail``, named in their titles by ``detail_label``. Returns ``{name: axes}``
    (``angle``, ``pressure``, ``command`` and the zooms ``angle_zoom``, ``pressure_zoom``,
    ``command_zoom``).
    """
    rollouts = rollouts if isinstance(rollouts, (list, tuple)) else [rollouts]
    grid = fig.add_gridspec(3, 2, width_ratios=(3, 1), height_ratios=(1.5, 1, 1))
    axes = {}
    for row, name in enumerate(("angle", "pressure", "command")):
        axes[name] = fig.add_subplot(grid[row, 0], sharex=axes.get("angle"))
        axes[name + "_zoom"] = fig.add_subplot(grid[row, 1], sharey=None if name == "angle" else axes[name])
    shown = rollouts[detail]
    which = detail_label or f"trial {shown.metadata.get('trial', '')}".strip()
    for suffix in ("", "_zoom"):
        plot_angle(rollouts, ax=axes["angle" + suffix], labels=labels, stops=stops,
                   strike=(task.strike_time, task.strike_angle))
        plot_pressures(shown, ax=axes["pressure" + suffix], rated_pressure=rated_pressure)
        plot_commands(shown, ax=axes["command" + suffix])
        for name in ("pressure", "command"):
            mark_strike(axes[name + suffix], task.strike_time, label=False)
    lo, hi = task.strike_time - STRIKE_ZOOM, task.strike_time + STRIKE_ZOOM
    for name in ("angle", "pressure", "command"):
        zoom = axes[name + "_zoom"]
        zoom.set_xlim(lo, hi)
        zoom.set_ylabel("")
        if name != "angle":
            zoom.tick_params(labelleft=False)
        axes[name].axvspan(lo, hi, color="0.5", alpha=0.08, lw=0)
        if name != "command":
            axes[name].set_xlabel("")
            zoom.set_xlabel("")
            axes[name].tick_params(labelbottom=False)
    # the zoom of the angle: a few degrees around the strike target
    span = max(3.0, 1.2 * max(float(np.max(np.abs(np.degrees(r.measured[:, 0] - r.reference)[
        (r.t >= lo) & (r.t <= hi)]), initial=0.0)) for r in rollouts))
    axes["angle_zoom"].set_ylim(math.degrees(task.strike_angle) - span, math.degrees(task.strike_angle) + span)
    axes["angle_zoom"].set_title(f"strike window ±{STRIKE_ZOOM * 1e3:g} ms", fontsize="small")
    axes["angle"].set_title("joint angle", fontsize="small", loc="left")
    axes["pressure"].set_title(f"measured muscle pressures: {which}", fontsize="small", loc="left")
    axes["command"].set_title(f"pressure commands: {which}", fontsize="small", loc="left")
    axes["angle"].legend(fontsize="x-small", loc="upper left", ncol=2)
    axes["pressure"].legend(fontsize="x-small", loc="upper left")
    axes["command"].legend(fontsize="x-small", loc="upper left")
    return axes


def plot_learning_curve(rows, axes, goals=None):
    """Per trial: swing RMS error (log), strike angle error [deg] and strike speed error [%].

    ``axes`` are three axes sharing the trial axis; ``goals`` (angle [deg], speed [%]) draws the
    precision goal as a band around zero. Rejected trials (the guard fell back to the last good
    profile, ``row['guard']``) and faulted trials (``row['fault']``) are marked on every panel.
    Returns the artists.
    """
    trials = np.array([r["trial"] for r in rows])

    def values(key):
        return np.array([np.nan if r.get(key) is None else r[key] for r in rows], dtype=float)

    panels = (("rms_error_deg", "swing RMS error [deg]", None),
              ("strike_angle_error_deg", "strike angle error [deg]", None if goals is None else goals[0]),
              ("strike_speed_error_pct", "strike speed error [%]", None if goals is None else goals[1]))
    rejected = np.array([bool(r.get("guard")) for r in rows])
    faulted = np.array([bool(r.get("fault")) for r in rows])
    artists = []
    for ax, (key, label, goal) in zip(axes, panels):
        y = values(key)
        artists.append(ax.plot(trials, y, marker="o", ms=4, color="#3b4cc0", lw=1.2, label=label.split(" [")[0])[0])
        if key == "rms_error_deg":
            ax.set_yscale("log")
        else:
            ax.axhline(0.0, color="0.4", lw=0.8)
            if goal is not None:
                artists.append(ax.axhspan(-goal, goal, color="#8fd18f", alpha=0.35, lw=0,
                                          label=f"goal ±{goal:g}"))
        if rejected.any():
            artists.append(ax.plot(trials[rejected], y[rejected], ls="none", marker="X", ms=9, color="#d62728",
                                   label="rejected (guard fell back)")[0])
        if faulted.any():
            artists.append(ax.plot(trials[faulted], np.where(np.isfinite(y[faulted]), y[faulted], 0.0), ls="none",
                                   marker="v", ms=9, color="k", label="fault")[0])
        ax.set_ylabel(label)
        ax.grid(True, which="both", alpha=0.3)
        ax.legend(fontsize="x-small", loc="best")
    axes[-1].set_xlabel("trial")
    return artists


def _swing_band(ax, swing):
    """The task's swing band: a light fill behind, amber edges and a bar along the top in front."""
    lo, hi = np.degrees(swing)
    artists = [ax.axvspan(lo, hi, color="#fde9a9", alpha=0.5, lw=0, zorder=0, label="task swing band")]
    for x in (lo, hi):
        ax.axvline(x, color="#d99a00", lw=1.0, ls="--", zorder=8)
    artists.append(ax.axvspan(lo, hi, ymin=0.975, ymax=1.0, color="#d99a00", lw=0, zorder=9))
    return artists


def _legend_beside(ax):
    return ax.legend(fontsize="x-small", loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0)


def plot_joint_torque(view, ax=None):
    """Torque the joint can give over its angle range: for each pressure level the band between
    muscle A alone (toward +) and muscle B alone (toward −), the other vented; the rated level
    outlined, the holding pressures' torque with the holding point, the swing band, the strike
    angle and the stops."""
    ax = _axes(ax)
    deg = np.degrees(view.angles)
    artists = _swing_band(ax, view.swing)
    greys = np.linspace(0.85, 0.6, len(view.levels))
    for k in reversed(range(len(view.levels))):
        p = view.levels[k]
        over = bool(view.over_rated[k])
        artists.append(ax.fill_between(deg, view.torque_b[k], view.torque_a[k], color=str(greys[k]), lw=0,
                                       alpha=0.75, label=f"reachable up to {p / 1e5:g} bar"
                                       + (" (above rated)" if over else "")))
    rated = int(np.argmin(np.abs(view.levels - view.rated_pressure)))
    if np.isclose(view.levels[rated], view.rated_pressure):
        artists.append(ax.plot(deg, view.torque_a[rated], color=COLOR_A, lw=2.0,
                               label=f"A alone at rated {view.rated_pressure / 1e5:g} bar")[0])
        artists.append(ax.plot(deg, view.torque_b[rated], color=COLOR_B, lw=2.0,
                               label=f"B alone at rated {view.rated_pressure / 1e5:g} bar")[0])
    pa, pb = view.hold_pressures
    artists.append(ax.plot(deg, view.hold_torque, color="k", lw=1.0, ls="-.",
                           label=f"holding pressures A {pa / 1e5:.2f}, B {pb / 1e5:.2f} bar")[0])
    artists.append(ax.plot([math.degrees(view.hold_angle)], [0.0], marker="D", color="k", ms=7, ls="none",
                           zorder=12, label=f"holding equilibrium {math.degrees(view.hold_angle):g} deg")[0])
    artists.append(ax.axvline(math.degrees(view.strike_angle), label="strike angle", **STRIKE_STYLE))
    artists.append(ax.axhline(0.0, color="0.25", lw=0.7))
    artists += mark_stops(ax, view.lower_stop, view.upper_stop, vertical=True)
    top = float(np.nanmax(view.torque_a))
    box = dict(boxstyle="round,pad=0.2", fc="w", ec="none", alpha=0.85)
    ax.annotate("▲ A pulls: torque toward +angle", (0.5, 0.93), xycoords="axes fraction", ha="center", va="top",
                fontsize="small", color=COLOR_A, bbox=box, zorder=13)
    ax.annotate("▼ B pulls: torque toward −angle", (0.5, 0.05), xycoords="axes fraction", ha="center",
                va="bottom", fontsize="small", color=COLOR_B, bbox=box, zorder=13)
    ax.set_ylim(-1.4 * top, 1.4 * top)
    ax.set_ylabel("static torque at rest [N m]")
    ax.set_title("available torque over the joint angle (one muscle at the level, the other vented)",
                 fontsize="small", loc="left")
    _legend_beside(ax)
    return artists


def plot_joint_stiffness(view, ax=None):
    """Joint stiffness ``-d tau / d q`` over the angle under co-contraction (both muscles at each
    level), the rated level bold, with the swing band, the holding point and the stops."""
    ax = _axes(ax)
    deg = np.degrees(view.angles)
    artists = _swing_band(ax, view.swing)
    for k, p in enumerate(view.levels):
        rated = bool(np.isclose(p, view.rated_pressure))
        over = bool(view.over_rated[k])
        shade = 0.15 + 0.7 * (1 - k / max(len(view.levels) - 1, 1))
        artists.append(ax.plot(deg, view.stiffness[k], color="k" if rated else str(shade), lw=2.0 if rated else 1.2,
                               ls="--" if over else "-",
                               label=f"both at {p / 1e5:g} bar" + (" (rated)" if rated else "")
                               + (" (above rated)" if over else ""))[0])
    artists.append(ax.plot([math.degrees(view.hold_angle)], [view.hold_stiffness], marker="D", color="k", ms=7,
                           ls="none", zorder=12, label="at the holding pressures")[0])
    artists.append(ax.axvline(math.degrees(view.strike_angle), label="strike angle", **STRIKE_STYLE))
    artists += mark_stops(ax, view.lower_stop, view.upper_stop, vertical=True)
    ax.set_xlabel("joint angle [deg]")
    ax.set_ylabel("stiffness −dτ/dq [N m/rad]")
    ax.set_ylim(0, 1.15 * float(np.nanmax(view.stiffness)))
    ax.set_title("stiffness under co-contraction (both muscles at the level)", fontsize="small", loc="left")
    _legend_beside(ax)
    return artists
