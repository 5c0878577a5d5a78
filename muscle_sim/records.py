"""Run-folder I/O: atomic writes of text, JSON, CSV tables and figures, and new run folders."""
from __future__ import annotations

import datetime as _dt
import io
import json
import os
import tempfile
from pathlib import Path


def write_bytes_atomic(path, data: bytes) -> Path:
    """Write ``data`` to ``path`` through a temporary file and ``os.replace``: readers see the
    old file or the whole new one, never a half-written file (also after kill -9)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise
    return path


def write_text_atomic(path, text: str) -> Path:
    """Atomic text write (UTF-8); see :func:`write_bytes_atomic`."""
    return write_bytes_atomic(path, text.encode("utf-8"))


def json_safe(obj):
    """``obj`` with NaN/inf floats replaced by None and numpy scalars by Python ones (JSON has
    no NaN; readers get ``null`` for 'not measured')."""
    import math

    if isinstance(obj, dict):
        return {k: json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [json_safe(v) for v in obj]
    if hasattr(obj, "item") and not isinstance(obj, (str, bytes)):
        obj = obj.item()
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    return obj


def write_json_atomic(path, obj) -> Path:
    """Atomic JSON write, indented, keys in insertion order; NaN/inf written as null."""
    return write_text_atomic(path, json.dumps(json_safe(obj), indent=2, allow_nan=False) + "\n")


def save_figure_atomic(fig, path, dpi: int = 110) -> Path:
    """Render a matplotlib figure to PNG in memory, then write it atomically."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi)
    return write_bytes_atomic(path, buf.getvalue())


def new_run_dir(kind: str, root="runs") -> Path:
    """A fresh folder ``runs/<kind>-YYYYMMDD-HHMMSS[-n]`` (created, never reused)."""
    stamp = _dt.datetime.now().strftime("%Y%m%d-%H%M%S")
    root = Path(root)
    root.mkdir(parents=True, exist_ok=True)
    for n in range(1000):
        candidate = root / (f"{kind}-{stamp}" + (f"-{n}" if n else ""))
        try:
            candidate.mkdir()
            return candidate
        except FileExistsError:
            continue
    raise RuntimeError(f"could not create a new run folder under {root}")


# --- trial records ----------------------------------------------------------------------------

import math as _math  # noqa: E402
from dataclasses import dataclass, field  # noqa: E402

import numpy as _np  # noqa: E402

from .errors import DataError  # noqa: E402

#: Rollout CSV columns: (header with unit, SI -> column factor). Row k's command acts from t_k to
#: t_{k+1}; the last row repeats the previous command.
ROLLOUT_COLUMNS = (
    ("time [s]", 1.0), ("angle [deg]", 180.0 / _math.pi), ("rate [deg/s]", 180.0 / _math.pi),
    ("pressure_a [kPa]", 1e-3), ("pressure_b [kPa]", 1e-3), ("command_a [kPa]", 1e-3),
    ("command_b [kPa]", 1e-3), ("reference [deg]", 180.0 / _math.pi),
)


@dataclass
class Rollout:
    """One trial as a rig or the simulator records it (SI units).

    ``t`` (N+1,) sample times; ``measured`` (N+1, 4) readings [angle, rate, p_a, p_b];
    ``command`` (N+1, 2) pressure commands (row k acts from t_k to t_k+1); ``reference`` (N+1,)
    planned angle; ``true_state`` (N+1, 6) the simulator's state, None for a rig log.
    """

    t: _np.ndarray
    measured: _np.ndarray
    command: _np.ndarray
    reference: _np.ndarray
    true_state: _np.ndarray | None = None
    metadata: dict = field(default_factory=dict)

    def columns(self) -> _np.ndarray:
        """The CSV table in column units (deg, kPa, s)."""
        cols = [self.t, self.measured[:, 0], self.measured[:, 1], self.measured[:, 2], self.measured[:, 3],
                self.command[:, 0], self.command[:, 1], self.reference]
        return _np.column_stack([c * f for c, (_, f) in zip(cols, ROLLOUT_COLUMNS)])

    def to_csv_text(self) -> str:
        """CSV text: a '# ' JSON metadata line, the unit-named header, one row per sample."""
        lines = ["# " + json.dumps(self.metadata, sort_keys=True),
                 ",".join(name for name, _ in ROLLOUT_COLUMNS)]
        lines += [",".join(f"{v:.9g}" for v in row) for row in self.columns()]
        return "\n".join(lines) + "\n"

    def write_csv(self, path) -> Path:
        """Write atomically as CSV (see :meth:`to_csv_text`)."""
        return write_text_atomic(path, self.to_csv_text())

    @classmethod
    def read_csv(cls, path) -> "Rollout":
        """Read a rollout CSV written by :meth:`write_csv` (errors name the row and column)."""
        text = Path(path).read_text(encoding="utf-8").splitlines()
        meta = {}
        if text and text[0].startswith("#"):
            meta = json.loads(text[0][1:].strip() or "{}")
            text = text[1:]
        header = [h.strip() for h in text[0].split(",")]
        expected = [name for name, _ in ROLLOUT_COLUMNS]
        if header != expected:
            raise DataError(f"{path}: header {header} is not allowed; must be {expected}")
        rows = []
        for i, line in enumerate(text[1:], start=2):
            cells = line.split(",")
            if len(cells) != len(expected):
                raise DataError(f"{path}: row {i} has {len(cells)} cells; must have {len(expected)}")
            try:
                rows.append([float(c) for c in cells])
            except ValueError:
                raise DataError(f"{path}: row {i} holds a value that is not a number") from None
        data = _np.array(rows)
        si = data / _np.array([f for _, f in ROLLOUT_COLUMNS])
        return cls(t=si[:, 0], measured=si[:, 1:5], command=si[:, 5:7], reference=si[:, 7], metadata=meta)
