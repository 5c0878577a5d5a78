"""What a strike trial is made of, resolved from one config: plant, prior, sensors, drift, task.

The trials themselves are stepped by :class:`muscle_sim.trial.TrialBatch`, behind the envs and
the run commands alike.
"""
from __future__ import annotations

from dataclasses import dataclass

from . import config as _config
from .drift import DriftParams
from .params import PlantParams
from .plant import holding_pressures
from .sensors import SensorParams
from .tasks import StrikeTask


@dataclass(frozen=True)
class Setup:
    """Everything a trial needs, resolved from one config."""

    plant: PlantParams
    prior: PlantParams
    sensors: SensorParams
    drift: DriftParams
    task: StrikeTask
    config: _config.Config

    @classmethod
    def from_config(cls, source) -> "Setup":
        """Load a config (path, mapping or :class:`~muscle_sim.config.Config`)."""
        cfg = source if isinstance(source, _config.Config) else _config.load(source)
        return cls(_config.plant_params(cfg), _config.prior_params(cfg), _config.sensor_params(cfg),
                   _config.drift_params(cfg), _config.strike_task(cfg), cfg)

    @property
    def rated_pressure(self) -> float:
        """The muscles' rated gauge pressure [Pa]."""
        return self.plant.muscle.rated_pressure

    @property
    def over_rated(self) -> bool:
        """Whether the supply exceeds the rated pressure (only with an explicit override)."""
        return self.plant.pneumatics.supply_pressure > self.rated_pressure


def home_pressures(params: PlantParams, task: StrikeTask):
    """Pressures holding the joint at the task's home angle with the task's co-contraction."""
    return holding_pressures(params, task.home_angle, task.home_pressure)
