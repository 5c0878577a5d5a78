"""One table formatter for every command: the same headers, signs and number formats everywhere.

A missing value (None, NaN, inf) is shown as :data:`MISSING`; signed quantities (errors) carry
their sign, magnitudes do not; each column has its meaningful precision. The same columns give
the console text, the Markdown of ``comparison.md`` and the cells of ``report.html``.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

#: How a value that was not measured or does not exist is shown.
MISSING = "–"


@dataclass(frozen=True)
class Column:
    """One column: the row key, its header (with unit) and its format spec (``+`` for signed)."""

    key: str
    header: str
    spec: str = ""
    width: int = 0          # console width; 0: the header's (at least 8)


#: The first column of each command's table.
TRIAL = Column("trial", "trial", "d")
EPISODE = Column("episode", "episode", "d")
CONTROLLER = Column("controller", "controller", "", 20)

#: The strike metrics every command reports, in this order.
METRIC_COLUMNS = (
    Column("rms_error_deg", "rms [deg]", ".3f"),
    Column("strike_angle_error_deg", "strike angle err [deg]", "+.3f"),
    Column("strike_speed_error_pct", "strike speed err [%]", "+.2f"),
    Column("peak_pressure_kpa", "peak [kPa]", ".1f"),
)


def metric_words(row: dict) -> str:
    """The strike metrics of one row in a sentence, formatted as in the tables."""
    return (f"rms {cell(row.get('rms_error_deg'), '.3f')} deg, strike angle err "
            f"{cell(row.get('strike_angle_error_deg'), '+.3f')} deg, strike speed err "
            f"{cell(row.get('strike_speed_error_pct'), '+.2f')} %")


def cell(value, spec: str = "") -> str:
    """``value`` formatted by ``spec``; :data:`MISSING` for None, NaN and inf."""
    if value is None:
        return MISSING
    if isinstance(value, bool) or isinstance(value, str):
        return str(value)
    if hasattr(value, "item"):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return MISSING
    if isinstance(value, (int, float)):
        out = format(value, spec) if spec else number(value)
        if out.startswith("-") and float(out) == 0.0:      # a rounded -0.000 reads as a sign error
            out = ("+" if "+" in spec else "") + out[1:]
        return out
    return str(value)


def number(value) -> str:
    """A config or derived number at its meaningful precision (6 significant digits, no float
    noise such as 0.17500000000000002); integers as they are."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return str(value)
    if isinstance(value, int):
        return str(value)
    if not math.isfinite(value):
        return MISSING
    return f"{value:.6g}"


def value_text(value) -> str:
    """A config value for people: numbers by :func:`number`, lists item by item, None as
    :data:`MISSING`, strings as they are."""
    if value is None:
        return MISSING
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(value_text(v) for v in value) + "]"
    if isinstance(value, str):
        return value.strip()
    return number(value)


def cells(rows, columns, label: Column) -> list[list[str]]:
    """Header and body cells: the first row is the headers, then one row per ``rows`` item
    (dicts keyed by the columns' keys); a row's ``fault`` goes into a last 'fault' column."""
    columns = (label,) + tuple(columns)
    faults = any(r.get("fault") for r in rows)
    head = [c.header for c in columns] + (["fault"] if faults else [])
    body = [[cell(r.get(c.key), c.spec) for c in columns] + ([r.get("fault") or ""] if faults else [])
            for r in rows]
    return [head] + body


def _widths(columns, label: Column) -> list[int]:
    return [c.width or max(len(c.header), 8) for c in (label,) + tuple(columns)]


def header_line(columns, label: Column) -> str:
    """The header of a console table."""
    return " ".join(c.header.rjust(w) for c, w in zip((label,) + tuple(columns), _widths(columns, label)))


def row_line(row: dict, columns, label: Column) -> str:
    """One console row (right-aligned under :func:`header_line`); a fault is appended."""
    texts = [cell(row.get(c.key), c.spec) for c in (label,) + tuple(columns)]
    line = " ".join(t.rjust(w) for t, w in zip(texts, _widths(columns, label)))
    return line + (f"  FAULT: {row['fault']}" if row.get("fault") else "")


def text_table(rows, columns, label: Column) -> list[str]:
    """A console table: header line, then one line per row."""
    return [header_line(columns, label)] + [row_line(r, columns, label) for r in rows]


def markdown_table(rows, columns, label: Column) -> list[str]:
    """The same table as Markdown lines (numbers right-aligned)."""
    table = cells(rows, columns, label)
    align = ["---"] + ["---:"] * (len(table[0]) - 1)
    return ["| " + " | ".join(r) + " |" for r in [table[0], align] + table[1:]]
