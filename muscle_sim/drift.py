"""Slow drift of plant parameters from one trial to the next (wear, supply sag), seeded."""
from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

from .params import PlantParams, _validate


#: Friction grows at most this many times its configured value, however many trials pass.
MAX_FRICTION_GROWTH = 1e3


@dataclass(frozen=True)
class DriftParams:
    """Drift per trial: friction grows by ``friction_growth`` (relative, compounding, at most
    :data:`MAX_FRICTION_GROWTH`-fold), the supply
    drops by ``supply_sag`` [Pa] down to ``supply_floor`` [Pa], both with a random relative
    ``spread`` drawn per trial."""

    friction_growth: float = 0.0
    supply_sag: float = 0.0
    supply_floor: float = 0.0
    spread: float = 0.0

    def __post_init__(self) -> None:
        _validate(self, {"friction_growth": (-0.5, 0.5, "", False), "supply_sag": (0, 1e6, "Pa", False),
                         "supply_floor": (0, 1e8, "Pa", False), "spread": (0, 0.2, "", False)})

    @property
    def active(self) -> bool:
        """Whether this drift changes anything."""
        return bool(self.friction_growth or self.supply_sag or self.spread)


def drifted(params: PlantParams, drift: DriftParams, trial: int, rng: np.random.Generator | None) -> PlantParams:
    """The plant as it is in trial ``trial`` (0 = as configured). ``rng`` supplies the spread."""
    if not drift.active or trial == 0:
        return params
    jitter = rng.standard_normal(2) * drift.spread if (drift.spread and rng is not None) else np.zeros(2)
    try:
        growth = (1.0 + drift.friction_growth) ** trial
    except OverflowError:           # a trial index far beyond any rig's life
        growth = math.inf
    friction = min(growth, MAX_FRICTION_GROWTH) * (1.0 + jitter[0])
    supply0 = params.pneumatics.supply_pressure
    supply = max(supply0 - drift.supply_sag * trial, min(drift.supply_floor, supply0)) * (1.0 + jitter[1])
    supply = min(supply, supply0)
    muscle = replace(params.muscle, braid_friction=min(params.muscle.braid_friction * max(friction, 0.0), 1.0))
    joint = replace(params.joint, coulomb_torque=params.joint.coulomb_torque * max(friction, 0.0),
                    viscous_damping=params.joint.viscous_damping * max(friction, 0.0))
    pneumatics = replace(params.pneumatics, supply_pressure=supply)
    return PlantParams(muscle, joint, pneumatics)
