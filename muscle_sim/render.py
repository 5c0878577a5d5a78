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
    ax.set_ylim(-0.25, 0.4)
    ax.set_aspect("equal")
    ax.axis("off")
    q = float(x[0])
    m, j = params.muscle, params.joint
    eps_a, eps_b = _joint.contractions(j, m.rest_length, q)
    top = setup.rated_pressure
    for side, eps, p in ((-1, eps_a, x[2]), (1, eps_b, x[3])):
        length = m.rest_length * (1.0 - float(eps)) * 0.8
        width = 2 * m.rest_radius * math.sin(float(_muscle.braid_angle(m, eps))) / math.sin(m.rest_braid_angle)
        shade = min(max(float(p) / top, 0.0), 1.0)
        ax.add_patch(Rectangle((side * 0.06 - width * 2, -0.22), width * 4, length, color=(shade, 0.3, 1 - shade)))
    ref = float(reference(setup.task, t)[0])
    length = 0.3
    ax.plot([0, length * math.sin(ref)], [0.05, 0.05 + length * math.cos(ref)], color="0.8", lw=4)
    ax.plot([0, length * math.sin(q)], [0.05, 0.05 + length * math.cos(q)], color="k", lw=5)
    ax.add_patch(Circle((0, 0.05), j.pulley_radius * 2, color="0.4"))
    ax.text(-0.44, 0.36, f"t = {t:.3f} s   angle = {math.degrees(q):6.1f} deg", fontsize=9)
    canvas.draw()
    return np.asarray(canvas.buffer_rgba())[..., :3].copy()
