"""Plot functions: each takes ``ax=`` (created when None) and returns its artists; never shows."""
from __future__ import annotations

import numpy as np


def _axes(ax):
    if ax is None:
        import matplotlib.pyplot as plt

        _, ax = plt.subplots()
    return ax


def plot_force_curves(mmap, ax=None):
    """Static force against contraction, one line per tabulated pressure; usable range shaded."""
    ax = _axes(ax)
    artists = []
    eps = np.linspace(0.0, mmap.max_contraction, 200)
    from . import muscle

    for pa, over in zip(mmap.pressures, mmap.over_rated):
        (line,) = ax.plot(100 * eps, muscle.static_force(mmap.params, pa, eps),
                          linestyle="--" if over else "-", label=f"{pa / 1e5:g} bar")
        artists.append(line)
    artists.append(ax.axvspan(0, 100 * mmap.usable_contraction, color="0.92", zorder=0,
                              label="usable range"))
    ax.set_xlabel("contraction [%]")
    ax.set_ylabel("static force [N]")
    ax.set_xlim(0, 100 * mmap.max_contraction)
    ax.set_ylim(bottom=0)
    ax.legend(fontsize="small", ncol=2)
    return artists


def plot_force_map(mmap, ax=None):
    """Filled contours of force over (contraction, pressure); the rated pressure as a line."""
    ax = _axes(ax)
    from . import muscle

    eps = np.linspace(0.0, mmap.max_contraction, 120)
    top = max(mmap.pressures.max(), mmap.params.rated_pressure)
    pressure = np.linspace(0.0, top, 100)
    force = muscle.static_force(mmap.params, pressure[:, None], eps[None, :])
    filled = ax.contourf(100 * eps, pressure / 1e5, force, levels=14, cmap="viridis")
    lines = ax.contour(100 * eps, pressure / 1e5, force, levels=7, colors="k", linewidths=0.5)
    ax.clabel(lines, fmt="%.0f N", fontsize="x-small")
    rated = ax.axhline(mmap.params.rated_pressure / 1e5, color="tab:red", lw=1.2, label="rated pressure")
    usable = ax.axvline(100 * mmap.usable_contraction, color="w", lw=1.0, ls=":", label="usable limit")
    ax.set_xlabel("contraction [%]")
    ax.set_ylabel("gauge pressure [bar]")
    ax.legend(loc="upper right", fontsize="small")
    ax.figure.colorbar(filled, ax=ax, label="static force [N]")
    return [filled, lines, rated, usable]


def plot_angle(rollouts, ax=None, labels=None):
    """Measured joint angle of one or more rollouts against the planned reference [deg]."""
    ax = _axes(ax)
    rollouts = rollouts if isinstance(rollouts, (list, tuple)) else [rollouts]
    artists = [ax.plot(rollouts[0].t, np.degrees(rollouts[0].reference), color="k", lw=2.5, alpha=0.35,
                       label="reference")[0]]
    for i, r in enumerate(rollouts):
        label = labels[i] if labels else f"trial {r.metadata.get('trial', i)}"
        artists.append(ax.plot(r.t, np.degrees(r.measured[:, 0]), lw=1.2, label=label)[0])
    ax.set_xlabel("time [s]")
    ax.set_ylabel("joint angle [deg]")
    ax.legend(fontsize="small")
    return artists


def plot_pressures(rollout, ax=None, rated_pressure=None):
    """Measured muscle pressures [bar gauge], with the rated pressure as a line."""
    ax = _axes(ax)
    artists = [ax.plot(rollout.t, rollout.measured[:, 2] / 1e5, label="muscle A")[0],
               ax.plot(rollout.t, rollout.measured[:, 3] / 1e5, label="muscle B")[0]]
    if rated_pressure is not None:
        artists.append(ax.axhline(rated_pressure / 1e5, color="tab:red", lw=1, ls="--", label="rated"))
    ax.set_xlabel("time [s]")
    ax.set_ylabel("pressure [bar gauge]")
    ax.legend(fontsize="small")
    return artists


def plot_commands(rollout, ax=None):
    """Pressure commands of both muscles [bar gauge] as steps (each acts until the next sample)."""
    ax = _axes(ax)
    artists = [ax.step(rollout.t, rollout.command[:, 0] / 1e5, where="post", label="command A")[0],
               ax.step(rollout.t, rollout.command[:, 1] / 1e5, where="post", label="command B")[0]]
    ax.set_xlabel("time [s]")
    ax.set_ylabel("command [bar gauge]")
    ax.legend(fontsize="small")
    return artists


def plot_learning_curve(rows, ax=None):
    """Swing RMS error and |strike angle error| per trial [deg] on a log scale."""
    ax = _axes(ax)
    trials = [r["trial"] for r in rows]
    rms = [r["rms_error_deg"] for r in rows]
    strike = [abs(r["strike_angle_error_deg"]) if r["strike_angle_error_deg"] is not None else np.nan for r in rows]
    artists = [ax.semilogy(trials, rms, marker="o", label="swing RMS error")[0],
               ax.semilogy(trials, strike, marker="s", label="|strike angle error|")[0]]
    ax.set_xlabel("trial")
    ax.set_ylabel("error [deg]")
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize="small")
    return artists
