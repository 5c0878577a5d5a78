"""One strike trial on the simulated plant: plant + sensors + drift + task, stepped by commands.

The scalar environment, the vector environment and the command-line runs all use this core, so a
trial means the same thing everywhere. ``batch=None`` runs one joint on Python floats.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import config as _config
from .drift import DriftParams, drifted
from .integrate import Stepper
from .params import PlantParams
from .plant import holding_pressures, initial_state
from .records import Rollout
from .sensors import SensorParams, measure, measure_f
from .tasks import StrikeTask, reference


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


class StrikeTrial:
    """Steps one trial (or a batch of identical-config trials) and records it."""

    def __init__(self, setup: Setup, batch: int | None = None):
        self.setup = setup
        self.batch = batch
        self.task = setup.task
        self.params = setup.plant
        self.stepper = Stepper(setup.plant, setup.task.dt, setup.task.n_substeps, batch)
        self.trial_index = 0

    def start(self, rng: np.random.Generator, trial: int = 0):
        """Begin trial number ``trial`` (drift applies per trial) at rest at home; returns the
        first readings [angle, rate, p_a, p_b]."""
        self.trial_index = trial
        self.params = drifted(self.setup.plant, self.setup.drift, trial, rng)
        if self.params is not self.setup.plant:
            self.stepper = Stepper(self.params, self.task.dt, self.task.n_substeps, self.batch)
        self.rng = rng
        p_hold = home_pressures(self.params, self.task)
        self.u_hold = np.array(p_hold)
        x0 = initial_state(self.params, self.task.home_angle, p_hold, self.batch)
        self.stepper.reset(x0, p_hold)
        self.k = 0
        self._filter = tuple(p_hold) if self.batch is None else np.tile(np.array(p_hold), (self.batch, 1))
        y = self._measure(self.stepper.x)
        self._log_x, self._log_y, self._log_u = [self._copy(self.stepper.x)], [y], []
        return y

    def _copy(self, x):
        return list(x) if self.batch is None else x.copy()

    def _measure(self, x):
        if self.batch is None:
            y, self._filter = measure_f(self.setup.sensors, x, self._filter, self.rng, self.task.dt)
        else:
            y, self._filter = measure(self.setup.sensors, x, self._filter, self.rng, self.task.dt)
        return y

    def advance(self, command):
        """Apply pressure ``command`` [Pa] for one control step; returns the new readings."""
        x = self.stepper.step(command)
        self.k += 1
        y = self._measure(x)
        self._log_x.append(self._copy(x))
        self._log_y.append(y)
        self._log_u.append(tuple(command) if self.batch is None else np.array(command, dtype=float))
        return y

    @property
    def state(self):
        """The true plant state now (simulation only; a rig cannot give it)."""
        return self.stepper.x

    @property
    def done(self) -> bool:
        """Whether the trial has reached its last sample."""
        return self.k >= self.task.n_steps

    def rollout(self, controller: str = "", seed=None) -> Rollout:
        """The recorded (single) trial as a :class:`~muscle_sim.records.Rollout`."""
        if self.batch is not None:
            raise ValueError("rollout: only a single trial (batch=None) is recorded as a Rollout")
        t = np.arange(len(self._log_y)) * self.task.dt
        u = np.array(self._log_u + self._log_u[-1:] if self._log_u else [tuple(self.u_hold)], dtype=float)
        ref, _, _ = reference(self.task, t)
        meta = {"config_hash": self.setup.config.digest, "seed": seed, "controller": controller,
                "trial": self.trial_index,
                "supply_pressure_kpa": self.params.pneumatics.supply_pressure / 1e3}
        return Rollout(t=t, measured=np.array(self._log_y, dtype=float), command=u,
                       true_state=np.array(self._log_x, dtype=float), reference=ref, metadata=meta)

