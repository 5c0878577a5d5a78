"""Controller protocol and the feedforward PressureProfile (commands on the control time grid)."""
from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Protocol

import numpy as np

from muscle_sim.errors import DataError
from muscle_sim.records import write_text_atomic

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

    @property
    def dt(self) -> float:
        """Sample step of the profile [s]."""
        return float(self.t[1] - self.t[0]) if self.t.size > 1 else 0.0

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
        """Read a profile CSV; a bad file gives a one-line DataError naming row and column."""
        try:
            lines = Path(path).read_text(encoding="utf-8").splitlines()
        except OSError as exc:
            raise DataError(f"profile: cannot read {str(path)!r}: {exc.strerror or exc}") from None
        meta = {}
        if lines and lines[0].startswith("#"):
            try:
                meta = json.loads(lines[0][1:].strip() or "{}")
            except json.JSONDecodeError:
                meta = {}
            lines = lines[1:]
        if not lines:
            raise DataError(f"{path}: empty; must have the header {', '.join(PROFILE_COLUMNS)}")
        header = tuple(h.strip() for h in lines[0].split(","))
        if header != PROFILE_COLUMNS:
            raise DataError(f"{path}: header {', '.join(header)} is not allowed; must be "
                            f"{', '.join(PROFILE_COLUMNS)}")
        rows = []
        for i, line in enumerate(lines[1:], start=2):
            cells = [c.strip() for c in line.split(",")]
            if len(cells) != 3:
                raise DataError(f"{path}: row {i} has {len(cells)} cells; must have 3")
            values = []
            for name, cell in zip(PROFILE_COLUMNS, cells):
                try:
                    v = float(cell)
                except ValueError:
                    raise DataError(f"{path}: row {i}, column '{name}': {cell!r} is not a number") from None
                if not np.isfinite(v):
                    raise DataError(f"{path}: row {i}, column '{name}': {cell!r} is not allowed; must be finite")
                if name != "time [s]" and v < 0:
                    raise DataError(f"{path}: row {i}, column '{name}': {v:g} kPa is not allowed; gauge "
                                    f"commands must be >= 0")
                values.append(v)
            rows.append(values)
        if not rows:
            raise DataError(f"{path}: no data rows")
        data = np.array(rows)
        if np.any(np.diff(data[:, 0]) <= 0):
            i = int(np.nonzero(np.diff(data[:, 0]) <= 0)[0][0]) + 3
            raise DataError(f"{path}: row {i}, column 'time [s]': time must increase")
        return cls(t=data[:, 0], commands=data[:, 1:] * 1e3, metadata=meta)
