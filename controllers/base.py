"""Controller protocol and the feedforward PressureProfile (commands on the control time grid)."""
from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Protocol

import numpy as np

from muscle_sim.errors import DataError
from muscle_sim.records import read_unit_table, write_text_atomic

PROFILE_COLUMNS = ("time [s]", "command_a [kPa]", "command_b [kPa]")


class Controller(Protocol):
    """Decides the two pressure commands [Pa] at each control step from the readings."""

    name: str

    def reset(self, setup) -> None:
        """Prepare for a new trial of ``setup`` (a :class:`muscle_sim.simulation.Setup`)."""

    def command(self, k: int, t: float, reading) -> tuple[float, float]:
        """Commands for step ``k`` at time ``t`` [s] given readings [angle, rate, p_a, p_b]."""


@dataclass
class PressureProfile:
    """Feedforward pressure commands of both muscles on a uniform time grid (SI units).

    ``t`` (N,) sample times starting at 0; ``commands`` (N, 2) gauge pressures [Pa]; row k acts
    from ``t[k]`` to ``t[k+1]``.
    """

    t: np.ndarray
    commands: np.ndarray
    metadata: dict = field(default_factory=dict)

    def __post_init__(self) -> None:
        self.t = np.asarray(self.t, dtype=float)
        self.commands = np.asarray(self.commands, dtype=float)
        if self.commands.shape != (self.t.size, 2):
            raise DataError(f"profile: commands of shape {self.commands.shape} do not match {self.t.size} times")

    def check_grid(self, dt: float, n_steps: int, source: str = "profile") -> None:
        """Raise DataError unless the profile covers ``n_steps`` samples on the step ``dt``."""
        if self.t.size < n_steps:
            raise DataError(f"{source}: {self.t.size} rows is not allowed; the trial needs {n_steps} "
                            f"(one per control step of {dt * 1e3:g} ms)")
        expected = np.arange(self.t.size) * dt
        bad = np.nonzero(np.abs(self.t - expected) > 1e-6 * max(dt, 1e-12) + 1e-9)[0]
        if bad.size:
            row = int(bad[0])
            raise DataError(f"{source}: row {row + 2}, column 'time [s]': {self.t[row]:g} is not allowed; "
                            f"must be {expected[row]:g} (a uniform grid of {dt * 1e3:g} ms from 0)")

    def to_csv_text(self) -> str:
        """CSV text with unit-named columns (kPa gauge) and a '# ' JSON metadata line."""
        lines = ["# " + json.dumps(self.metadata, sort_keys=True), ",".join(PROFILE_COLUMNS)]
        lines += [f"{t:.9g},{a / 1e3:.9g},{b / 1e3:.9g}" for t, (a, b) in zip(self.t, self.commands)]
        return "\n".join(lines) + "\n"

    def write_csv(self, path) -> Path:
        """Write atomically as CSV."""
        return write_text_atomic(path, self.to_csv_text())

    @classmethod
    def read_csv(cls, path) -> "PressureProfile":
        """Read a profile CSV (``time [s|ms]``, ``command_a``/``command_b`` in ``kPa|bar|Pa``);
        a bad file gives a one-line DataError naming row and column."""
        pressure = {"kPa": 1e3, "bar": 1e5, "Pa": 1.0}
        table = read_unit_table(path, {"time": {"s": 1.0, "ms": 1e-3}, "command_a": pressure,
                                       "command_b": pressure}, "profile")
        if len(table.columns) != 3:
            raise DataError(f"{path}: columns {', '.join(table.headers)} are not allowed; must be "
                            f"{', '.join(PROFILE_COLUMNS)}")
        if table.data.shape[0] == 0:
            raise DataError(f"{path}: no data rows")
        for name in ("command_a", "command_b"):
            bad = np.nonzero(table.si(name) < 0)[0]
            if bad.size:
                table.fail(name, int(bad[0]), "gauge commands must be >= 0")
        t = table.si("time")
        back = np.nonzero(np.diff(t) <= 0)[0]
        if back.size:
            table.fail("time", int(back[0]) + 1, "time must increase")
        return cls(t=t, commands=np.column_stack([table.si("command_a"), table.si("command_b")]),
                   metadata=table.meta)
