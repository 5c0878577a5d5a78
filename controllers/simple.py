"""Open-loop pressure controllers for trials: hold, step, and replay of a PressureProfile."""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .base import PressureProfile


@dataclass
class HoldPressures:
    """Constant commands; ``None`` holds the pressures that keep the joint at home."""

    pressures: tuple[float, float] | None = None
    name: str = "hold"

    def reset(self, setup) -> None:
        from muscle_sim.simulation import home_pressures

        self._u = tuple(self.pressures) if self.pressures is not None else home_pressures(setup.prior, setup.task)

    def command(self, k, t, reading):
        return self._u


@dataclass
class StepPressures:
    """Home-holding commands (of the prior model) until ``at`` [s], then ``pressures`` [Pa]."""

    pressures: tuple[float, float]
    at: float
    name: str = "step"

    def reset(self, setup) -> None:
        from muscle_sim.simulation import home_pressures

        self._before = home_pressures(setup.prior, setup.task)

    def command(self, k, t, reading):
        return tuple(self.pressures) if t >= self.at - 1e-12 else self._before


@dataclass
class ReplayProfile:
    """Replays a feedforward :class:`PressureProfile` sample by sample (grid checked on reset)."""

    profile: PressureProfile
    name: str = "replay"
    source: str = "profile"

    def reset(self, setup) -> None:
        self.profile.check_grid(setup.task.dt, setup.task.n_steps, self.source)
        self._rows = np.asarray(self.profile.commands, dtype=float)

    def command(self, k, t, reading):
        a, b = self._rows[k]
        return float(a), float(b)


OPEN_LOOP = ("hold", "step", "replay")


def open_loop_controller(kind: str, pressures=None, step_at: float | None = None, profile=None,
                         source: str = "profile"):
    """The open-loop controller ``kind`` of `pamjoint run` and sweep run jobs (values checked by
    the caller, SI): ``hold`` (``pressures`` or those holding home), ``step`` (to ``pressures`` at
    ``step_at`` [s]) or ``replay`` (the :class:`PressureProfile` ``profile`` read from ``source``)."""
    if kind == "hold":
        return HoldPressures(tuple(pressures) if pressures is not None else None)
    if kind == "step":
        return StepPressures(tuple(pressures), step_at)
    if kind == "replay":
        return ReplayProfile(profile, source=source)
    raise ValueError(f"controller: {kind!r} is not allowed; must be one of {', '.join(OPEN_LOOP)}")
