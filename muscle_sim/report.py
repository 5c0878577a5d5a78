"""``report.html``: one self-contained page per output folder (table, figures, config, cautions).

The page embeds its figures as base64 PNG and its style inline; it has no scripts and no links,
so it opens offline in any browser and can be mailed or archived as one file. Every page carries
the safety wording of :mod:`muscle_sim.safety`. Commands of every kind (run, tune, compare, plan,
joint, and sweeps) write theirs through :func:`write_report`.
"""
from __future__ import annotations

import base64
import html
from pathlib import Path

from . import safety
from .records import write_text_atomic
from .tables import value_text

_STYLE = """
body{font-family:sans-serif;max-width:72em;margin:1.5em auto;padding:0 1em;color:#222;line-height:1.4}
h1{font-size:1.4em;margin-bottom:.2em}h2{font-size:1.1em;margin-top:1.6em;border-bottom:1px solid #ccc}
table{border-collapse:collapse;font-size:.9em}td,th{border:1px solid #ccc;padding:.2em .6em}
td{text-align:right;font-variant-numeric:tabular-nums}td:first-child{text-align:left}th{background:#f2f2f2}
.caution{background:#fff4e0;border-left:.4em solid #e08a00;padding:.5em 1em;margin:.4em 0}
.next{background:#eaf5ea;border-left:.4em solid #3c8d3c;padding:.5em 1em}
figure{margin:1em 0}figcaption{font-size:.9em;color:#444}img{max-width:100%;border:1px solid #ddd}
pre{background:#f7f7f7;padding:.8em;overflow-x:auto;font-size:.85em}.meta{color:#666;font-size:.85em}
"""


def config_text(config) -> str:
    """The config a result was made from: the YAML file as written (with its hash), or the
    resolved SI values key by key when it did not come from a readable file."""
    source = getattr(config, "source", "")
    try:
        text = Path(source).read_text(encoding="utf-8")
    except (OSError, TypeError, ValueError):
        text = None
    head = f"# {source} (hash {getattr(config, 'digest', '')})\n"
    if text is not None:
        return head + text
    lines = []

    def walk(node, prefix=""):
        for key, value in node.items():
            if isinstance(value, dict):
                walk(value, f"{prefix}{key}.")
            else:
                lines.append(f"{prefix}{key} = {value_text(value)}")

    walk(getattr(config, "values", {}) or {})
    return head + "# resolved values in SI units\n" + "\n".join(lines) + "\n"


def _table_html(rows) -> str:
    """``rows``: a header row then body rows (sequences of cells), or a list of dicts."""
    rows = list(rows or [])
    if not rows:
        return "<p>–</p>"
    if isinstance(rows[0], dict):
        head = list(rows[0])
        rows = [head] + [[r.get(k, "–") for k in head] for r in rows]
    esc = lambda v: html.escape(value_text(v) if not isinstance(v, str) else v)  # noqa: E731
    out = ["<table>", "<tr>" + "".join(f"<th>{esc(h)}</th>" for h in rows[0]) + "</tr>"]
    out += ["<tr>" + "".join(f"<td>{esc(c)}</td>" for c in row) + "</tr>" for row in rows[1:]]
    return "\n".join(out + ["</table>"])


def _figure_html(item) -> str:
    path, caption = (item, None) if isinstance(item, (str, Path)) else item
    path = Path(path)
    data = base64.b64encode(path.read_bytes()).decode("ascii")
    caption = caption or path.name
    return (f'<figure><img alt="{html.escape(caption)}" src="data:image/png;base64,{data}">'
            f"<figcaption>{html.escape(caption)}</figcaption></figure>")


def render_report(title, table_rows, config_text, cautions, next_step, figures, notes=()) -> str:
    """The page of :func:`write_report` as a string."""
    cautions = [c for c in (cautions or []) if c]
    if safety.GENERAL not in cautions:
        cautions.append(safety.GENERAL)
    parts = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
             f"<title>{html.escape(title)}</title><style>{_STYLE}</style></head><body>",
             f"<h1>{html.escape(title)}</h1>", '<p class="meta">pamjoint report (the same inputs give the same page, byte for byte)</p>',
             "<h2>Cautions</h2>", *(f'<p class="caution">{html.escape(c)}</p>' for c in cautions),
             "<h2>Suggested next step</h2>", f'<p class="next">{html.escape(next_step or "–")}</p>',
             "<h2>Results</h2>", _table_html(table_rows)]
    if notes:
        parts.append("<pre>" + html.escape("\n".join(notes)) + "</pre>")
    if figures:
        parts += ["<h2>Figures</h2>", *(_figure_html(f) for f in figures)]
    parts += ["<h2>Config used</h2>", f"<pre>{html.escape(config_text or '–')}</pre>", "</body></html>"]
    return "\n".join(parts) + "\n"


def write_report(folder, title: str, table_rows, config_text: str, cautions, next_step: str, figures,
                 notes=()) -> Path:
    """Write ``folder/report.html`` atomically and return its path.

    Parameters
    ----------
    folder : path
        The output folder; the page is ``report.html`` in it.
    title : str
        Heading of the page.
    table_rows : sequence
        The results table: a header row then body rows (cells as strings, e.g.
        :func:`muscle_sim.tables.cells`), or a list of dicts keyed by header.
    config_text : str
        The config used (e.g. :func:`config_text`).
    cautions : sequence of str
        Cautions of this result; :data:`muscle_sim.safety.GENERAL` is always added.
    next_step : str
        What to do next, in one sentence.
    figures : sequence
        PNG paths, or ``(path, caption)`` pairs; each is embedded as base64.
    notes : sequence of str
        Further lines shown verbatim under the table.
    """
    page = render_report(title, table_rows, config_text, cautions, next_step, figures, notes)
    return write_text_atomic(Path(folder) / "report.html", page)
