"""``inventory history`` as text, CSV, JSON or one self-contained HTML page with a chart.

Every format carries the sign of a variance and an adjustment (variance = survey - book; a
positive adjustment increases book stock); the table and the HTML page print it (``+12.3``,
``-4.0``), CSV and JSON keep numbers as numbers. The chart draws each pile's variance month
by month (one line per pile, the zero line marked), with matplotlib, embedded as a PNG.
"""

from __future__ import annotations

import base64
import html
import io
import json
import math
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from inventory.io.atomic import atomic_path
from inventory.model.texts import SIGN_CONVENTION

__all__ = ["history_table", "history_json", "history_html", "variance_chart_png", "write_text"]

#: Columns shown by the plain-text table of pile rows (the CSV and JSON carry every column);
#: ``site_id`` only on a shared ledger.
TABLE_COLUMNS = ["site_id", "period", "pile_id", "material", "book_t", "survey_t", "variance_t", "variance_pct",
                 "variance_sigma_t", "significant", "out_of_tolerance", "adjustment_t", "reason_code"]

#: Columns printed with a sign (+ / -) in the table and on the HTML page.
SIGNED = {"variance_t", "variance_pct", "adjustment_t", "monthly_variance_t", "net_movement_t"}

_DPI = 110
_LITERAL = {"parse_math": False}  # pile ids are drawn as typed, never as mathtext
_PNG_META = {"Software": None}    # the same history draws a byte-identical image


def _cell(col: str, v: Any) -> str:
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return ""
    if isinstance(v, (bool, np.bool_)):
        return "yes" if v else "no"
    if isinstance(v, (int, np.integer)) and not col.endswith(("_t", "_pct")):
        return str(int(v))
    if isinstance(v, (float, np.floating, int, np.integer)):
        if col.endswith("_pct"):
            return f"{float(v):+.2f}" if col in SIGNED else f"{float(v):.2f}"
        if col.endswith("_t"):
            return f"{float(v):+,.1f}" if col in SIGNED else f"{float(v):,.1f}"
        return f"{float(v):g}"
    return str(v)


def _shown(frame: pd.DataFrame) -> pd.DataFrame:
    cols = [c for c in TABLE_COLUMNS if c in frame.columns] if "pile_id" in frame.columns \
        and "period" in frame.columns else list(frame.columns)
    out = frame[cols].copy().astype(object)
    for c in cols:
        out[c] = [_cell(c, v) for v in frame[c]]
    return out


def history_table(frame: pd.DataFrame) -> str:
    """The history (pile rows or an aggregate) as an aligned text table, signs shown."""
    if frame.empty:
        return "no closes in the ledger for that selection"
    return _shown(frame).to_string(index=False)


def history_json(frame: pd.DataFrame) -> str:
    """The history as a JSON array of records (NaN as null, numbers as numbers)."""
    records = json.loads(frame.to_json(orient="records", date_format="iso"))
    return json.dumps(records, indent=1, ensure_ascii=False) + "\n"


def variance_chart_png(rows: pd.DataFrame) -> str | None:
    """Each pile's variance (t) per month as lines, PNG as base64 text; None without data."""
    if rows.empty or not {"period", "pile_id", "variance_t"} <= set(rows.columns):
        return None
    table = rows.pivot_table(index="period", columns="pile_id", values="variance_t",
                             aggfunc="sum", sort=True)
    if table.empty:
        return None
    from matplotlib.figure import Figure

    fig = Figure(figsize=(8.0, 3.6))
    ax = fig.subplots()
    x = np.arange(len(table.index))
    for pile in table.columns:
        ax.plot(x, table[pile].to_numpy(float), marker="o", linewidth=1.4, label=str(pile))
    ax.axhline(0.0, color="#555555", linewidth=0.8)
    ax.set_xticks(x)
    ax.set_xticklabels([str(p) for p in table.index], **_LITERAL)
    ax.set_ylabel("variance, survey - book (t)")
    ax.set_title("Variance per pile by month", **_LITERAL)
    if len(table.columns) <= 20:
        leg = ax.legend(fontsize=7, ncol=2, loc="best")
        for t in leg.get_texts():
            t.set_parse_math(False)
    ax.grid(axis="y", linewidth=0.3)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=_DPI, metadata=_PNG_META, bbox_inches="tight")
    return base64.b64encode(buf.getvalue()).decode("ascii")


def _html_table(frame: pd.DataFrame) -> str:
    shown = _shown(frame)
    esc = html.escape
    head = "".join(f"<th>{esc(str(c))}</th>" for c in shown.columns)
    body = "".join(
        "<tr>" + "".join(
            f'<td class="n">{esc(v)}</td>' if c.endswith(("_t", "_pct")) else f"<td>{esc(v)}</td>"
            for c, v in zip(shown.columns, row)) + "</tr>"
        for row in shown.itertuples(index=False, name=None))
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def history_html(frame: pd.DataFrame, rows: pd.DataFrame, title: str = "Variance history") -> str:
    """One self-contained HTML page: the chart of variance per pile over months (``rows``,
    pile rows) and the table ``frame`` (the same rows or an aggregate of them)."""
    esc = html.escape
    png = variance_chart_png(rows)
    chart = (f'<img alt="variance per pile by month" src="data:image/png;base64,{png}">'
             if png else "<p>No closed periods match.</p>")
    table = _html_table(frame) if len(frame) else "<p>No closed periods match.</p>"
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<title>{esc(title)}</title>
<style>body{{font-family:sans-serif;margin:1.5em}}table{{border-collapse:collapse;font-size:.9em}}
td,th{{border:1px solid #ccc;padding:2px 6px}}td.n{{text-align:right}}img{{max-width:100%}}</style>
</head><body>
<h1>{esc(title)}</h1>
<p>{esc(SIGN_CONVENTION)}</p>
{chart}
{table}
</body></html>
"""


def write_text(text: str, path: str | Path) -> Path:
    """Write text output to ``path`` (temp file + rename: never half-written)."""
    dest = Path(path)
    with atomic_path(dest) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return dest
