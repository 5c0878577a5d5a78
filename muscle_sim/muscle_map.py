"""Force–contraction–pressure maps of one muscle for sizing: numbers, text table and JSON."""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from . import muscle
from .params import McKibbenParams


@dataclass(frozen=True)
class MuscleMap:
    """Static force on a grid (rows: contraction, columns: gauge pressure), SI units."""

    params: McKibbenParams
    pressures: np.ndarray        # [Pa], shape (P,)
    contractions: np.ndarray     # [-], shape (E,)
    force: np.ndarray            # [N], shape (E, P)
    max_contraction: float       # [-]
    usable_contraction: float    # [-]

    @property
    def over_rated(self) -> np.ndarray:
        """Mask of the tabulated pressures above the rated pressure."""
        return self.pressures > self.params.rated_pressure * (1 + 1e-12)


def build_map(params: McKibbenParams, pressures=None, contraction_step: float = 0.025,
              usable_fraction: float = 0.8) -> MuscleMap:
    """Tabulate :func:`muscle.static_force` from zero contraction to ``eps_max``.

    ``pressures`` default to 1 bar steps up to the rated pressure. The usable range is
    ``usable_fraction * eps_max``: force falls to zero at eps_max, so a joint designed to work up
    to there has no force margin left (common practice: stay well short of it).
    """
    if pressures is None:
        top = params.rated_pressure
        pressures = np.arange(1e5, top + 1.0, 1e5)
        if pressures.size == 0 or not math.isclose(pressures[-1], top):
            pressures = np.append(pressures, top)
    pressures = np.asarray(pressures, dtype=float)
    eps_max = muscle.max_contraction(params)
    grid = np.arange(0.0, eps_max + 1e-12, contraction_step)
    force = muscle.static_force(params, pressures[None, :], grid[:, None])
    return MuscleMap(params, pressures, grid, force, eps_max, usable_fraction * eps_max)


def map_to_dict(m: MuscleMap) -> dict:
    """JSON-ready numbers in the units people read (bar, %, N, cm^3)."""
    p = m.params
    return {
        "rated_pressure_bar": p.rated_pressure / 1e5,
        "max_contraction_pct": 100 * m.max_contraction,
        "usable_contraction_pct": 100 * m.usable_contraction,
        "rest_volume_cm3": float(muscle.volume(p, 0.0)) * 1e6,
        "max_volume_cm3": float(muscle.volume(p, m.max_contraction)) * 1e6,
        "pressures_bar": (m.pressures / 1e5).tolist(),
        "over_rated": m.over_rated.tolist(),
        "contractions_pct": (100 * m.contractions).tolist(),
        "usable": (m.contractions <= m.usable_contraction + 1e-12).tolist(),
        "force_n": np.round(m.force, 3).tolist(),
    }


def format_table(m: MuscleMap, working=None) -> str:
    """Readable force table of one muscle; '*' marks the rated pressure, '!' pressures above it,
    '|' the rows within ``working`` (lowest, highest contraction the joint uses between its stops)."""
    heads = []
    for pa, over in zip(m.pressures, m.over_rated):
        mark = "!" if over else ("*" if math.isclose(pa, m.params.rated_pressure) else "")
        heads.append(f"{pa / 1e5:g} bar{mark}")
    width = max(9, max(len(h) for h in heads) + 1)
    lines = ["one muscle: force [N] by contraction (rows) and gauge pressure (columns)",
             "contraction".ljust(13) + "".join(h.rjust(width) for h in heads)]
    step = m.contractions[1] - m.contractions[0] if m.contractions.size > 1 else 0.0
    for eps, row in zip(m.contractions, m.force):
        inside = working is not None and working[0] - step < eps < working[1] + step
        lines.append(f"{100 * eps:9.1f} % {'|' if inside else ' '} " + "".join(f"{f:{width}.1f}" for f in row))
    lines.append(f"* rated pressure {m.params.rated_pressure / 1e5:g} bar gauge; force is zero at "
                 f"{100 * m.max_contraction:.1f} % contraction"
                 + (f"; | rows the joint uses between its stops ({100 * working[0]:.1f} .. {100 * working[1]:.1f} %)"
                    if working is not None else ""))
    if m.over_rated.any():
        lines.append("! above the rated pressure")
    return "\n".join(lines)
