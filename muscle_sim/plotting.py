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
