"""Run-folder I/O: atomic writes of text, JSON, CSV tables and figures, and new run folders."""
from __future__ import annotations

import datetime as _dt
import io
import json
import os
import tempfile
from pathlib import Path


def _umask() -> int:
    """The process's file-creation mask (read by setting it and putting it back)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def write_bytes_atomic(path, data: bytes) -> Path:
    """Write ``data`` to ``path`` through a temporary file and ``os.replace``: readers see the
    old file or the whole new one, never a half-written file (also after kill -9)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    try:
        os.fchmod(fd, 0o666 & ~_umask())       # as open() would create it, not mkstemp's 0600
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
    planned angle: exactly what a rig can log as well.
    """

    t: _np.ndarray
    measured: _np.ndarray
    command: _np.ndarray
    reference: _np.ndarray
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
        allowed = {name.split(" [")[0]: {name.split("[")[1][:-1]: 1.0 / f} for name, f in ROLLOUT_COLUMNS}
        table = read_unit_table(path, allowed, "rollout")
        if len(table.columns) != len(ROLLOUT_COLUMNS):
            raise DataError(f"{path}: columns {', '.join(table.headers)} are not allowed; must be "
                            f"{', '.join(n for n, _ in ROLLOUT_COLUMNS)}")
        si = _np.column_stack([table.si(name) for name in allowed])
        meta = table.meta
        return cls(t=si[:, 0], measured=si[:, 1:5], command=si[:, 5:7], reference=si[:, 7], metadata=meta)


@dataclass
class UnitTable:
    """A CSV table whose header cells read ``name [unit]``: raw values, column index, unit factors.

    Row numbers in messages count the header as row 1 (comment lines starting with '#' aside)."""

    path: str
    meta: dict
    headers: list
    columns: dict           # name -> (index, factor to SI)
    data: "_np.ndarray"     # raw values as written, (rows, columns)

    def si(self, name: str) -> "_np.ndarray":
        """Column ``name`` in SI units."""
        i, factor = self.columns[name]
        return self.data[:, i] * factor

    def fail(self, name: str, row: int, why: str):
        """Raise a one-line DataError for the value in data row ``row`` (0-based) of column ``name``."""
        i = self.columns[name][0]
        raise DataError(f"{self.path}: row {row + 2}, column {self.headers[i]!r}: {self.data[row, i]:g} is not "
                        f"allowed; {why}")


def read_unit_table(path, allowed: dict, what: str = "table", ignore_unknown: bool = False) -> UnitTable:
    """Read a CSV with ``name [unit]`` headers; ``allowed`` maps each column name to its units
    (unit -> factor to SI). A first ``# {json}`` line is metadata; other '#' lines are comments.
    Unknown columns or units, short rows, non-numbers and non-finite values are one-line
    DataErrors naming the row and column; with ``ignore_unknown`` columns of other names are
    skipped (their headers listed in ``meta["ignored_columns"]``)."""
    try:
        lines = Path(path).read_text(encoding="utf-8").splitlines()
    except OSError as exc:
        raise DataError(f"{what}: cannot read {str(path)!r}: {exc.strerror or exc}") from None
    except UnicodeDecodeError as exc:
        raise DataError(f"{what}: {str(path)!r}: byte {exc.start} is not UTF-8 text") from None
    meta = {}
    if lines and lines[0].startswith("#"):
        try:
            meta = json.loads(lines[0][1:].strip() or "{}")
        except json.JSONDecodeError:
            meta = {}
    lines = [ln for ln in lines if not ln.startswith("#")]
    if not lines:
        raise DataError(f"{path}: empty {what}")
    headers = [h.strip() for h in lines[0].split(",")]
    columns, ignored = {}, []
    for i, cell in enumerate(headers):
        if ignore_unknown and (cell.split("[")[0].strip() not in allowed):
            ignored.append(i)
            continue
        if "[" not in cell or not cell.endswith("]"):
            raise DataError(f"{path}: column {i + 1} {cell!r} is not allowed; write 'name [unit]', e.g. 'angle [deg]'")
        name, unit = (x.strip() for x in cell[:-1].split("[", 1))
        if name not in allowed:
            raise DataError(f"{path}: column {cell!r} is unknown; allowed: {', '.join(allowed)}")
        if unit not in allowed[name]:
            raise DataError(f"{path}: column {cell!r}: unit '{unit}' does not match; must be one of "
                            f"{', '.join(allowed[name])}")
        if name in columns:
            raise DataError(f"{path}: column {name!r} appears twice")
        columns[name] = (i, allowed[name][unit])
    rows = []
    for r, line in enumerate(lines[1:], start=2):
        cells = line.split(",")
        if len(cells) != len(headers):
            raise DataError(f"{path}: row {r} has {len(cells)} cells; must have {len(headers)}")
        row = []
        for c, cell in enumerate(cells):
            if c in ignored:
                row.append(0.0)
                continue
            try:
                v = float(cell)
            except ValueError:
                raise DataError(f"{path}: row {r}, column {headers[c]!r}: {cell.strip()!r} is not a number") from None
            if not _math.isfinite(v):
                raise DataError(f"{path}: row {r}, column {headers[c]!r}: {cell.strip()!r} is not allowed; must be finite")
            row.append(v)
        rows.append(row)
    data = _np.array(rows, dtype=float).reshape(len(rows), len(headers))
    if ignored:
        meta = {**meta, "ignored_columns": [headers[i] for i in ignored]}
    return UnitTable(str(path), meta, headers, columns, data)



#: Trial-log columns a rig may give: name -> (allowed units with their factor to SI, required).
LOG_COLUMNS = {
    "time": ({"s": 1.0, "ms": 1e-3}, True),
    "angle": ({"deg": _math.pi / 180.0, "rad": 1.0}, True),
    "rate": ({"deg/s": _math.pi / 180.0, "rad/s": 1.0}, False),
    "pressure_a": ({"kPa": 1e3, "bar": 1e5, "Pa": 1.0}, False),
    "pressure_b": ({"kPa": 1e3, "bar": 1e5, "Pa": 1.0}, False),
    "command_a": ({"kPa": 1e3, "bar": 1e5, "Pa": 1.0}, True),
    "command_b": ({"kPa": 1e3, "bar": 1e5, "Pa": 1.0}, True),
    "reference": ({"deg": _math.pi / 180.0, "rad": 1.0}, False),
}


def read_log(path, task, resample: bool = False, allow_short: bool = False) -> "Rollout":
    """Read a trial log (simulator rollout or rig CSV) for the learner, checked against the task.

    Required columns ``time``, ``angle``, ``command_a``, ``command_b``; optional ``rate`` (else a
    central difference of the angle), ``pressure_a``/``pressure_b`` (else NaN: the learner then
    drives the prior's pressure model with the commands) and ``reference`` (else the task's). Each
    header names its unit, e.g. ``angle [deg]``. The time must start at 0 and follow the task's
    control grid; with ``resample=True`` an irregular log is linearly resampled onto it instead;
    ``allow_short=True`` accepts a trial that was stopped early (a prefix of the grid).
    Errors are one line naming the row and column.
    """
    table = read_unit_table(path, {n: units for n, (units, _) in LOG_COLUMNS.items()}, "log", ignore_unknown=True)
    notes = []
    if table.meta.get("ignored_columns"):
        notes.append(f"ignored column(s) {', '.join(table.meta['ignored_columns'])} (not used by the learner)")
    missing = [n for n, (_, req) in LOG_COLUMNS.items() if req and n not in table.columns]
    if missing:
        raise DataError(f"{path}: missing column(s) {', '.join(missing)}; required: time, angle, command_a, command_b")
    if table.data.shape[0] < 2:
        raise DataError(f"{path}: {table.data.shape[0]} data row(s); a trial needs {task.n_steps + 1}")
    cols, names, meta, col = table.columns, table.headers, table.meta, table.si
    _check_log_magnitudes(path, table)
    t = col("time")
    if abs(t[0]) > 1e-6 * task.dt + 1e-9:        # a logger clock that does not start at 0
        notes.append(f"time shifted by {-t[0]:+.6g} s so the log starts at 0 (logger clock offset)")
        t = t - t[0]
    dt = _np.diff(t)
    if _np.any(dt <= 0):
        r = int(_np.nonzero(dt <= 0)[0][0]) + 3
        raise DataError(f"{path}: row {r}, column {names[cols['time'][0]]!r}: time does not increase")
    grid = _np.arange(task.n_steps + 1) * task.dt
    off = _np.abs(t[: grid.size] - grid[: t.size]) > 1e-6 * task.dt + 1e-9
    on_grid = (t.size == grid.size or (allow_short and t.size < grid.size)) and not off.any()
    if not on_grid and not resample:
        if t.size != grid.size and not off.any():
            raise DataError(f"{path}: {t.size} rows is not allowed; the task's trial has {grid.size} samples "
                            f"({task.dt * 1e3:g} ms apart from 0 to {grid[-1]:g} s); use resampling if this is intended")
        r = int(_np.nonzero(off)[0][0])
        gap = " (a gap)" if r > 0 and dt[r - 1] > 1.5 * task.dt else ""
        raise DataError(f"{path}: row {r + 2}, column {names[cols['time'][0]]!r}: {t[r]:g} s is not allowed; must be "
                        f"{grid[r]:g} s on the {task.dt * 1e3:g} ms control grid{gap}; resample if intended")
    values = {}
    for name in LOG_COLUMNS:
        if name in cols and name != "time":
            values[name] = col(name)
    if not on_grid:
        if t[-1] < grid[-1] - 0.5 * task.dt:
            raise DataError(f"{path}: time spans {t[0]:g} to {t[-1]:g} s; resampling needs 0 to {grid[-1]:g} s "
                            f"(to within half a control step)")
        notes.append(f"resampled {t.size} rows onto the {task.dt * 1e3:g} ms control grid")
        for name, v in values.items():
            if name.startswith("command"):       # commands are held, not interpolated
                idx = _np.searchsorted(t, grid, side="right") - 1
                values[name] = v[_np.clip(idx, 0, t.size - 1)]
            else:
                values[name] = _np.interp(grid, t, v)
        t = grid
    angle = values["angle"]
    rate = values.get("rate")
    if rate is None:
        rate = _np.gradient(angle, t)
    pa = values.get("pressure_a", _np.full(t.size, _np.nan))
    pb = values.get("pressure_b", _np.full(t.size, _np.nan))
    ref = values.get("reference")
    if ref is None:
        from .tasks import reference as _reference

        ref = _reference(task, t)[0]
    measured = _np.column_stack([angle, rate, pa, pb])
    command = _np.column_stack([values["command_a"], values["command_b"]])
    if _np.any(command < 0):
        r, c = _np.argwhere(command < 0)[0]
        raise DataError(f"{path}: row {r + 2}, column 'command_{'ab'[c]}': negative gauge command is not allowed")
    if notes:
        meta = {**meta, "read_notes": notes}
    return Rollout(t=t, measured=measured, command=command, reference=ref, metadata=meta)


#: Largest magnitudes a trial log's values may have (SI): a joint between end stops never turns
#: half a revolution; pressures and rates far beyond any McKibben rig (common practice: muscles
#: are rated up to about 8 bar) are logger faults, not data.
LOG_LIMITS = {"time": 3600.0, "angle": _math.pi, "rate": 1000.0, "pressure_a": 1e7, "pressure_b": 1e7,
              "command_a": 1e7, "command_b": 1e7, "reference": _math.pi}


def _check_log_magnitudes(path, table: UnitTable) -> None:
    """A one-line DataError naming the first sample whose magnitude no rig produces."""
    for name in table.columns:
        bad = _np.nonzero(_np.abs(table.si(name)) > LOG_LIMITS[name])[0]
        if bad.size:
            i = table.columns[name][0]
            table.fail(name, int(bad[0]), f"must be within +-{LOG_LIMITS[name] / table.columns[name][1]:g} "
                                          f"{table.headers[i].split('[')[1][:-1]} (a logger fault, not data)")
