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


def write_json_atomic(path, obj) -> Path:
    """Atomic JSON write, indented, keys in insertion order, NaN refused."""
    return write_text_atomic(path, json.dumps(obj, indent=2, allow_nan=False) + "\n")


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
