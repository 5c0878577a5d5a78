"""One strike trial on the simulated plant: plant + sensors + drift + task, stepped by commands.

The scalar environment and the command-line runs step trials through :class:`StrikeTrial`; the
vector environment steps the same compiled :class:`~muscle_sim.integrate.Stepper` and sensor
models over a batch.
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
from .sensors import SensorModel, SensorParams
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
    """Steps one trial and records it (readings and commands, preallocated)."""

    def __init__(self, setup: Setup):
        self.setup = setup
        self.task = setup.task
        self.params = setup.plant
        self.stepper = Stepper(setup.plant, setup.task.dt, setup.task.n_substeps)
        self.sensors = SensorModel(setup.sensors, setup.task.dt)
        n = setup.task.n_steps
        self._y_log = np.zeros((n + 1, 4))
        self._u_log = np.zeros((n + 1, 2))
        self.trial_index = 0
        self.k = 0

    def start(self, rng: np.random.Generator, trial: int = 0):
        """Begin trial number ``trial`` (drift applies per trial) at rest at home; returns the
        first readings [angle, rate, p_a, p_b] (a view into the log: copy to keep)."""
        self.trial_index = trial
        self.params = drifted(self.setup.plant, self.setup.drift, trial, rng)
        if self.params is not self.stepper.params:
            self.stepper = Stepper(self.params, self.task.dt, self.task.n_substeps)
        self.rng = rng
        p_hold = home_pressures(self.params, self.task)
        self.u_hold = np.array(p_hold)
        self.stepper.reset(initial_state(self.params, self.task.home_angle, p_hold), p_hold)
        self.k = 0
        self.sensors.filtered[0] = p_hold
        self._u_log[0] = p_hold
        return self.sensors.read(self.stepper._x, rng, self._y_log[0:1])[0]

    def advance(self, command):
        """Apply pressure ``command`` [Pa] for one control step; returns the new readings (a view
        into the log)."""
        if self.k >= self.task.n_steps:
            raise RuntimeError(f"advance: the trial ended after {self.task.n_steps} steps; call start()")
        self.stepper.step(command)
        self._u_log[self.k] = command
        self.k += 1
        k = self.k
        return self.sensors.read(self.stepper._x, self.rng, self._y_log[k:k + 1])[0]

    @property
    def state(self):
        """The true plant state now (simulation only; a rig cannot give it)."""
        return self.stepper.x

    @property
    def done(self) -> bool:
        """Whether the trial has reached its last sample."""
        return self.k >= self.task.n_steps

    @property
    def readings(self) -> np.ndarray:
        """Readings of samples 0..k so far (k+1, 4), a view."""
        return self._y_log[:self.k + 1]

    def rollout(self, controller: str = "", seed=None) -> Rollout:
        """The recorded trial as a :class:`~muscle_sim.records.Rollout`; the command of the last
        sample repeats the one before (it acts on nothing)."""
        n = self.k + 1
        t = np.arange(n) * self.task.dt
        u = self._u_log[:n].copy()
        if n > 1:
            u[n - 1] = u[n - 2]
        ref, _, _ = reference(self.task, t)
        meta = {"config_hash": self.setup.config.digest, "seed": seed, "controller": controller,
                "trial": self.trial_index,
                "supply_pressure_kpa": self.params.pneumatics.supply_pressure / 1e3}
        return Rollout(t=t, measured=self._y_log[:n].copy(), command=u,
                       reference=ref, metadata=meta)
