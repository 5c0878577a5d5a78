"""rgb_array frames of the joint: paddle, pulley, both muscles inflated by their pressure."""
from __future__ import annotations

import math

import numpy as np

from . import joint as _joint
from . import muscle as _muscle
from .tasks import reference


def draw_joint(setup, params, x, t: float, size=(480, 320)) -> np.ndarray:
    """Draw state ``x`` at time ``t`` into an (H, W, 3) uint8 array (matplotlib, Agg canvas)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.patches import Circle, Rectangle

    fig = Figure(figsize=(size[0] / 80, size[1] / 80), dpi=80)
    canvas = FigureCanvasAgg(fig)
    ax = fig.add_axes([0, 0, 1, 1])
    ax.set_xlim(-0.45, 0.45)
    ax.set_ylim(-0.32, 0.45)
    ax.set_aspect("equal")
    ax.axis("off")
    q = float(x[0])
    m, j = params.muscle, params.joint
    eps_a, eps_b = _joint.contractions(j, m.rest_length, q)
    top = setup.rated_pressure
    for side, eps, p, name in ((-1, eps_a, x[2], "A (+angle)"), (1, eps_b, x[3], "B (-angle)")):
        length = m.rest_length * (1.0 - float(eps)) * 0.8
        width = 2 * m.rest_radius * math.sin(float(_muscle.braid_angle(m, eps))) / math.sin(m.rest_braid_angle)
        shade = min(max(float(p) / top, 0.0), 1.0)
        ax.add_patch(Rectangle((side * 0.06 - width * 2, -0.22), width * 4, length, color=(shade, 0.3, 1 - shade)))
        ax.text(side * 0.13, -0.12, f"muscle {name}\n{float(p) / 1e5:.2f} bar", fontsize=7,
                ha="right" if side < 0 else "left", va="center")
    length = 0.3

    def ray(angle, **style):
        return ax.plot([0, length * math.sin(angle)], [0.05, 0.05 + length * math.cos(angle)], **style)

    for stop in (j.lower_stop, j.upper_stop):
        ray(stop, color="firebrick", lw=1.5, ls=":")
        ax.text(1.08 * length * math.sin(stop), 0.05 + 1.08 * length * math.cos(stop), "stop", fontsize=7,
                color="firebrick", ha="center")
    task = setup.task
    ray(task.strike_angle, color="tab:green", lw=1.5, ls="--")
    ax.text(1.15 * length * math.sin(task.strike_angle), 0.05 + 1.15 * length * math.cos(task.strike_angle),
            f"strike target\n{math.degrees(task.strike_angle):.0f} deg at {task.strike_time * 1e3:.0f} ms",
            fontsize=7, color="tab:green", ha="center")
    ray(float(reference(task, t)[0]), color="0.8", lw=4, label="reference now")
    ray(q, color="k", lw=5, label="paddle")
    ax.add_patch(Circle((0, 0.05), j.pulley_radius * 2, color="0.4"))
    ax.text(-0.44, 0.41, f"t = {t:.3f} s   angle = {math.degrees(q):6.1f} deg", fontsize=9)
    ax.legend(loc="upper right", fontsize=7, frameon=False)
    canvas.draw()
    return np.asarray(canvas.buffer_rgba())[..., :3].copy()
