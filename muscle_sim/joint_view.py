"""What the antagonistic joint can do over its angle range: available torque and stiffness.

The numbers of ``pamjoint joint``: the net static torque of the muscle pair plus the pivot's
gravity term (:func:`plant.equilibrium_torque` + :func:`joint.passive_torque` at rest) when one
muscle is at a pressure level and the other vented, its stiffness ``-d tau / d q`` under
co-contraction (both muscles at the level), and the holding pressures of the task's home angle.
The single-muscle force table (:mod:`muscle_sim.muscle_map`) travels along in the table and JSON.
No law is written here: each number comes from the plant's own functions.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from . import joint as _joint
from . import muscle as _muscle
from .muscle_map import MuscleMap, build_map, map_to_dict
from .plant import equilibrium_torque
from .simulation import Setup, home_pressures
from .tables import Column, text_table
from .tasks import reference

def net_torque(params, angle, pressures):
    """Static torque on the paddle at rest [N m]: muscles ``r_p (F_a - F_b)`` plus the pivot term
    (gravity; friction is zero at rest). Positive turns toward +angle (muscle A's pull)."""
    angle = np.asarray(angle, dtype=float)
    return equilibrium_torque(params, angle, pressures) + _joint.passive_torque(params.joint, angle, 0.0)


def joint_stiffness(params, angle, pressures):
    """Stiffness ``-d tau / d q`` of :func:`net_torque` [N m/rad].

    Muscles: ``L_a = L_0 - r_p q``, ``L_b = L_0 + r_p q`` give ``r_p^2 (dF_a/dL + dF_b/dL)`` with
    the analytic :func:`muscle.stiffness`; the pivot's gravity term from the partials of its law
    (:func:`joint.passive_torque_slope`).
    """
    angle = np.asarray(angle, dtype=float)
    m, j = params.muscle, params.joint
    eps_a, eps_b = _joint.contractions(j, m.rest_length, angle)
    muscles = j.pulley_radius ** 2 * (_muscle.stiffness(m, pressures[0], eps_a) + _muscle.stiffness(m, pressures[1], eps_b))
    return muscles - _joint.passive_torque_slope(j, angle, 0.0)


@dataclass(frozen=True)
class JointView:
    """Torque and stiffness of the joint on an angle grid between the stops (SI units)."""

    angles: np.ndarray          # [rad], (A,)
    levels: np.ndarray          # pressure levels [Pa], (L,)
    torque_a: np.ndarray        # A at the level, B vented [N m], (L, A): the most toward +angle
    torque_b: np.ndarray        # B at the level, A vented [N m], (L, A): the most toward -angle
    stiffness: np.ndarray       # both at the level (co-contraction) [N m/rad], (L, A)
    contraction_a: np.ndarray   # [-], (A,)
    contraction_b: np.ndarray   # [-], (A,)
    force_a: np.ndarray         # muscle A alone at the rated pressure [N], (A,)
    force_b: np.ndarray         # muscle B alone at the rated pressure [N], (A,)
    hold_angle: float           # task home angle [rad]
    hold_pressures: tuple       # (p_a, p_b) holding it [Pa]
    hold_torque: np.ndarray     # net torque at the holding pressures [N m], (A,)
    hold_stiffness: float       # stiffness at home under the holding pressures [N m/rad]
    lower_stop: float           # [rad]
    upper_stop: float           # [rad]
    swing: tuple                # (lowest, highest) angle of the task's reference [rad]
    strike_angle: float         # [rad]
    rated_pressure: float       # [Pa]
    muscle_map: MuscleMap       # the single muscle's force table

    @property
    def over_rated(self) -> np.ndarray:
        """Mask of the levels above the rated pressure."""
        return self.levels > self.rated_pressure * (1 + 1e-12)


def default_levels(rated_pressure: float) -> np.ndarray:
    """A third, two thirds and all of the rated pressure [Pa]."""
    return rated_pressure * np.array([1 / 3, 2 / 3, 1.0])


def build_view(setup: Setup, levels=None, points: int = 181, muscle_pressures=None) -> JointView:
    """The joint view of ``setup``'s plant at pressure ``levels`` [Pa] (default
    :func:`default_levels`) on ``points`` angles from the lower to the upper stop."""
    params, task = setup.plant, setup.task
    m, j = params.muscle, params.joint
    levels = default_levels(m.rated_pressure) if levels is None else np.asarray(sorted(levels), dtype=float)
    q = np.linspace(j.lower_stop, j.upper_stop, points)
    lv = levels[:, None]
    zero = np.zeros_like(lv)
    eps_a, eps_b = _joint.contractions(j, m.rest_length, q)
    hold = tuple(float(p) for p in home_pressures(params, task))
    ref = reference(task, task.times)[0]
    settings = setup.config.get("muscle_map")
    mmap = build_map(m, muscle_pressures if muscle_pressures is not None else settings["pressures"],
                     settings["contraction_step"], settings["usable_fraction"])
    return JointView(
        angles=q, levels=levels,
        torque_a=net_torque(params, q[None, :], (lv, zero)), torque_b=net_torque(params, q[None, :], (zero, lv)),
        stiffness=joint_stiffness(params, q[None, :], (lv, lv)),
        contraction_a=eps_a, contraction_b=eps_b,
        force_a=_muscle.static_force(m, m.rated_pressure, eps_a), force_b=_muscle.static_force(m, m.rated_pressure, eps_b),
        hold_angle=task.home_angle, hold_pressures=hold, hold_torque=net_torque(params, q, hold),
        hold_stiffness=float(joint_stiffness(params, task.home_angle, hold)),
        lower_stop=j.lower_stop, upper_stop=j.upper_stop, swing=(float(ref.min()), float(ref.max())),
        strike_angle=task.strike_angle, rated_pressure=m.rated_pressure, muscle_map=mmap)


def _level_key(p: float) -> str:
    return f"{p / 1e5:g}"


def table_rows(view: JointView, step_deg: float = 5.0) -> list[dict]:
    """Rows of the joint table every ``step_deg`` between the stops (display units)."""
    deg = np.degrees(view.angles)
    picks = np.arange(math.ceil(deg[0] / step_deg) * step_deg, deg[-1] + 1e-9, step_deg)
    rows = []
    for a in picks:
        i = int(np.argmin(np.abs(deg - a)))
        row = {"angle": float(deg[i]), "eps_a": 100 * float(view.contraction_a[i]),
               "eps_b": 100 * float(view.contraction_b[i]), "force_a": float(view.force_a[i]),
               "force_b": float(view.force_b[i]), "torque_a": float(view.torque_a[-1, i]),
               "torque_b": float(view.torque_b[-1, i])}
        for k, p in enumerate(view.levels):
            row[f"k_{_level_key(p)}"] = float(view.stiffness[k, i])
        rows.append(row)
    return rows


def table_columns(view: JointView) -> tuple:
    """The columns of :func:`table_rows` (the first is the angle)."""
    top, rated = _level_key(view.levels[-1]), _level_key(view.rated_pressure)
    return (Column("eps_a", "A contr. [%]", ".1f"), Column("eps_b", "B contr. [%]", ".1f"),
            Column("force_a", f"A {rated} bar [N]", ".0f"), Column("force_b", f"B {rated} bar [N]", ".0f"),
            Column("torque_a", f"A {top} bar [N m]", "+.2f"), Column("torque_b", f"B {top} bar [N m]", "+.2f"),
            *(Column(f"k_{_level_key(p)}", f"K {_level_key(p)} bar [N m/rad]", ".1f") for p in view.levels))


ANGLE = Column("angle", "angle [deg]", "+.0f")


def format_table(view: JointView) -> str:
    """The joint table: per angle the contractions, each muscle's force and the torque with one
    muscle at the highest level (the other vented), and the co-contraction stiffness per level."""
    top = _level_key(view.levels[-1])
    lines = [f"joint between the stops: each muscle's force at the rated {_level_key(view.rated_pressure)} bar, the "
             f"torque with muscle A (or B) alone at {top} bar, the other vented, and the stiffness K with both at each "
             f"level; + turns toward +angle (A pulls that way)"]
    return "\n".join(lines + text_table(table_rows(view), table_columns(view), ANGLE))


def swing_extremes(view: JointView) -> dict:
    """The weakest torque toward each side within the swing band with one muscle at the highest
    level [N m] (what the strike and the return can count on)."""
    inside = (view.angles >= view.swing[0] - 1e-12) & (view.angles <= view.swing[1] + 1e-12)
    return {"toward_plus_nm": float(view.torque_a[-1, inside].min()),
            "toward_minus_nm": float(view.torque_b[-1, inside].max())}


def view_to_dict(view: JointView) -> dict:
    """JSON-ready numbers in the units people read (deg, bar, N m, N m/rad, %, N) and the single
    muscle's force table under ``muscle``."""
    levels = [_level_key(p) for p in view.levels]
    return {
        "angles_deg": np.round(np.degrees(view.angles), 6).tolist(),
        "levels_bar": (view.levels / 1e5).tolist(),
        "levels_over_rated": view.over_rated.tolist(),
        "rated_pressure_bar": view.rated_pressure / 1e5,
        "stops_deg": [math.degrees(view.lower_stop), math.degrees(view.upper_stop)],
        "swing_band_deg": [math.degrees(view.swing[0]), math.degrees(view.swing[1])],
        "strike_angle_deg": math.degrees(view.strike_angle),
        "torque_muscle_a_nm": {lv: np.round(row, 5).tolist() for lv, row in zip(levels, view.torque_a)},
        "torque_muscle_b_nm": {lv: np.round(row, 5).tolist() for lv, row in zip(levels, view.torque_b)},
        "stiffness_nm_per_rad": {lv: np.round(row, 5).tolist() for lv, row in zip(levels, view.stiffness)},
        "swing_weakest_torque_nm": swing_extremes(view),
        "holding": {"angle_deg": math.degrees(view.hold_angle),
                    "pressures_bar": [p / 1e5 for p in view.hold_pressures],
                    "stiffness_nm_per_rad": view.hold_stiffness,
                    "torque_nm": np.round(view.hold_torque, 5).tolist()},
        "contraction_a_pct": np.round(100 * view.contraction_a, 5).tolist(),
        "contraction_b_pct": np.round(100 * view.contraction_b, 5).tolist(),
        "muscle": map_to_dict(view.muscle_map),
    }
