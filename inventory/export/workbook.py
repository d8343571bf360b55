"""The close workbook (``variance-<period>.xlsx``) and the history workbook, with openpyxl.

Sheets of the close workbook:

Summary      site, period and survey facts; totals as live formulas over the Piles sheet;
             the sign convention; the legend of row colours; the cautions.
Piles        one row per pile with every figure of the close (the ledger's columns), a
             totals row of SUM formulas.
Variance     book and survey side by side with their sigmas, the variance, 2-sigma, the
             tolerance in tonnes and a ``survey - book`` formula a controller can re-check.
Movements    every weighbridge ticket, belt-scale interval and transfer that touched the books.
Adjustments  the adjustment journal with a SUM formula.
Scales       scale diagnostics.
Duplicates   exact and suspected duplicate records.
Run          inputs with SHA-256, parameters, versions, timings.

Stored values are the float64 figures of the close, unrounded, so the workbook holds the
numbers the ledger holds; number formats (t, m3, %) only change how they are shown.
Out-of-tolerance rows are filled red, significant rows amber, by conditional formatting.
"""

from __future__ import annotations

import math
import threading
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Iterable, Mapping
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd

from inventory.export.cells import looks_like_formula
from inventory.model.results import JOURNAL_COLUMNS, PILE_COLUMNS, SCALE_COLUMNS, CloseResult
from inventory.model.texts import CAUTIONS, ROW_LEGEND, SIGN_CONVENTION
from inventory.io.atomic import atomic_path

__all__ = [
    "write_workbook", "write_history_workbook", "SHEETS", "FILL_OUT_OF_TOLERANCE",
    "FILL_SIGNIFICANT",
]

SHEETS = ("Summary", "Piles", "Variance", "Movements", "Adjustments", "Scales",
          "Duplicates", "Run")

#: Row fills (ARGB). Our own pair: a muted brick for out of tolerance, a sand for significant.
FILL_OUT_OF_TOLERANCE = "FFF2C4B8"
FILL_SIGNIFICANT = "FFF7E3AE"
_HEADER_FILL = "FFDDE3EA"
_TOTAL_FILL = "FFEEF1F4"

# Number formats: the unit is in the format, the stored number is the plain figure.
_FMT_T = '#,##0.00 "t"'
_FMT_T_SIGNED = '+#,##0.00 "t";-#,##0.00 "t";0.00 "t"'
_FMT_M3 = '#,##0.0 "m³"'
_FMT_M2 = '#,##0.0 "m²"'
_FMT_PCT = '0.00 "%"'                      # values already in percent (3.0 = 3 %)
_FMT_PCT_SIGNED = '+0.00 "%";-0.00 "%";0.00 "%"'
_FMT_FRACTION = "0.0%"                      # values are fractions (0.97 = 97 %)
_FMT_DENSITY = '0.000 "t/m³"'
_FMT_SECONDS = '0.00 "s"'
_FMT_DATETIME = "yyyy-mm-dd hh:mm:ss"
_FMT_INT = "0"

_PILE_FORMATS = {
    "area_m2": _FMT_M2, "scanned_fraction": _FMT_FRACTION,
    "volume_m3": _FMT_M3, "volume_sigma_m3": _FMT_M3, "volume_tin_m3": _FMT_M3,
    "below_base_m3": _FMT_M3, "density_t_m3": _FMT_DENSITY,
    "variance_t": _FMT_T_SIGNED, "adjustment_t": _FMT_T_SIGNED,
    "after_survey_net_t": _FMT_T_SIGNED, "variance_pct": _FMT_PCT_SIGNED,
    "tolerance_pct": _FMT_PCT,
}

#: Pile columns whose total is a plain sum (sigmas and ratios are not additive).
_ADDITIVE = [
    "area_m2", "volume_m3", "volume_tin_m3", "below_base_m3", "survey_t", "survey_dry_t",
    "opening_t", "receipts_t", "dispatches_t", "transfers_in_t", "transfers_out_t", "book_t",
    "variance_t", "adjustment_t", "after_survey_net_t", "closing_t",
]

_MAX_WIDTH = 60


def _fmt_for(col: str) -> str | None:
    """Number format by column name: explicit map first, then the unit suffix."""
    if col in _PILE_FORMATS:
        return _PILE_FORMATS[col]
    if col.endswith("_t"):
        return _FMT_T
    if col.endswith("_m3"):
        return _FMT_M3
    if col.endswith("_pct"):
        return _FMT_PCT
    if col.endswith("_s"):
        return _FMT_SECONDS
    return None


def _cell_value(value: Any, tz: ZoneInfo | None = None) -> Any:
    """A value openpyxl writes as a valid cell (no NaN, no tz-aware datetimes)."""
    if value is None or value is pd.NaT or value is pd.NA:
        return None
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, (float, np.floating)):
        f = float(value)
        # a NaN or inf would be written as text Excel rejects (the repair prompt)
        return f if math.isfinite(f) else None
    if isinstance(value, (pd.Timestamp, datetime)):
        ts = pd.Timestamp(value)
        if ts.tzinfo is not None:
            ts = ts.tz_convert(tz) if tz is not None else ts.tz_convert(timezone.utc)
            ts = ts.tz_localize(None)
        return ts.to_pydatetime()
    return value


#: Excel's limit on the characters in one cell (Excel specifications and limits).
_MAX_CELL_CHARS = 32767


def _put(ws, row: int, col: int, value: Any, fmt: str | None = None, tz: ZoneInfo | None = None):
    from openpyxl.cell.cell import ILLEGAL_CHARACTERS_RE

    cell = ws.cell(row=row, column=col)
    v = _cell_value(value, tz)
    if isinstance(v, str):
        # control characters are not allowed in the XML; an over-long cell makes Excel repair
        v = ILLEGAL_CHARACTERS_RE.sub("\ufffd", v)[:_MAX_CELL_CHARS]
    cell.value = v
    if looks_like_formula(v):
        cell.data_type = "s"  # text from an input file is never a formula
    if fmt and isinstance(v, (int, float)) and not isinstance(v, bool):
        cell.number_format = fmt
    elif isinstance(v, datetime):
        cell.number_format = _FMT_DATETIME
    return cell


def _formula(ws, row: int, col: int, formula: str, fmt: str | None = None):
    cell = ws.cell(row=row, column=col)
    cell.value = formula
    if fmt:
        cell.number_format = fmt
    return cell


def _header(ws, row: int, names: Iterable[str]) -> None:
    from openpyxl.styles import Alignment, Border, Font, PatternFill, Side

    fill = PatternFill("solid", fgColor=_HEADER_FILL)
    bottom = Border(bottom=Side(style="thin"))
    for j, name in enumerate(names, start=1):
        c = ws.cell(row=row, column=j, value=name)
        c.font = Font(name="Calibri", bold=True, size=11)
        c.fill = fill
        c.border = bottom
        c.alignment = Alignment(vertical="center")


def _print_setup(ws, landscape: bool = True, title_rows: str | None = None) -> None:
    """Print (and PDF export) on pages as wide as the sheet, header row repeated."""
    ws.page_setup.orientation = "landscape" if landscape else "portrait"
    ws.page_setup.paperSize = ws.PAPERSIZE_A4
    ws.sheet_properties.pageSetUpPr.fitToPage = True
    ws.page_setup.fitToWidth = 1
    ws.page_setup.fitToHeight = 0
    if title_rows:
        ws.print_title_rows = title_rows


def _shown_len(value: Any, fmt: str | None) -> int:
    """Roughly how many characters a value takes when shown in its format."""
    if value is None:
        return 0
    if isinstance(value, bool):
        return 5
    if isinstance(value, datetime):
        return 19
    if isinstance(value, (int, float)):
        text = f"{value:,.2f}" if fmt and "0.00" in fmt else f"{value:,.3f}"
        unit = fmt.rsplit('"', 2)[-2] if fmt and fmt.count('"') >= 2 else ""
        return len(text) + len(unit) + 2
    if isinstance(value, str) and value.startswith("=") and fmt is not None:
        return 14
    return len(str(value))


def _fit_columns(ws, min_width: int = 8) -> None:
    from openpyxl.utils import get_column_letter

    widths: dict[int, int] = {}
    for row in ws.iter_rows():
        for c in row:
            if c.value is None:
                continue
            n = _shown_len(c.value, c.number_format if c.number_format != "General" else None)
            widths[c.column] = max(widths.get(c.column, 0), n)
    for col, w in widths.items():
        ws.column_dimensions[get_column_letter(col)].width = min(max(w + 2, min_width), _MAX_WIDTH)


def _table(ws, df: pd.DataFrame, columns: list[str], *, formats: Mapping[str, str] | None = None,
           tz: ZoneInfo | None = None, freeze: str = "A2") -> tuple[int, int]:
    """Header row 1, data from row 2; frozen header, auto-filter. Returns (first, last) data row."""
    from openpyxl.utils import get_column_letter

    formats = dict(formats or {})
    _header(ws, 1, columns)
    data = df[columns] if len(df.columns) else pd.DataFrame(columns=columns)
    for i, row in enumerate(data.itertuples(index=False, name=None), start=2):
        for j, (col, v) in enumerate(zip(columns, row), start=1):
            _put(ws, i, j, v, formats.get(col, _fmt_for(col)), tz)
    last = 1 + len(data)
    ws.freeze_panes = freeze
    ws.auto_filter.ref = f"A1:{get_column_letter(len(columns))}{max(last, 1)}"
    _print_setup(ws, title_rows="1:1")
    return 2, last


def _mark_rows(ws, first: int, last: int, ncols: int, oot_col: int | None, sig_col: int | None):
    """Fill out-of-tolerance rows red and significant rows amber (live conditional rules)."""
    from openpyxl.formatting.rule import FormulaRule
    from openpyxl.styles import PatternFill
    from openpyxl.utils import get_column_letter

    if last < first:
        return
    rng = f"A{first}:{get_column_letter(ncols)}{last}"
    if oot_col is not None:
        letter = get_column_letter(oot_col)
        ws.conditional_formatting.add(rng, FormulaRule(
            formula=[f"${letter}{first}=TRUE"], stopIfTrue=True,
            fill=PatternFill("solid", start_color=FILL_OUT_OF_TOLERANCE,
                             end_color=FILL_OUT_OF_TOLERANCE, bgColor=FILL_OUT_OF_TOLERANCE)))
    if sig_col is not None:
        letter = get_column_letter(sig_col)
        ws.conditional_formatting.add(rng, FormulaRule(
            formula=[f"${letter}{first}=TRUE"], stopIfTrue=True,
            fill=PatternFill("solid", start_color=FILL_SIGNIFICANT,
                             end_color=FILL_SIGNIFICANT, bgColor=FILL_SIGNIFICANT)))


def _total_row(ws, row: int, label_col: int, label: str, sums: Mapping[int, tuple[int, int]],
               formats: Mapping[int, str | None]) -> None:
    from openpyxl.styles import Border, Font, PatternFill, Side
    from openpyxl.utils import get_column_letter

    fill = PatternFill("solid", fgColor=_TOTAL_FILL)
    top = Border(top=Side(style="thin"), bottom=Side(style="double"))
    c = ws.cell(row=row, column=label_col, value=label)
    c.font = Font(name="Calibri", bold=True, size=11)
    for col, (first, last) in sums.items():
        letter = get_column_letter(col)
        cell = _formula(ws, row, col, f"=SUM({letter}{first}:{letter}{max(last, first)})"
                        if last >= first else "=0", formats.get(col))
        cell.font = Font(name="Calibri", bold=True, size=11)
        cell.fill = fill
        cell.border = top


# -- sheets -------------------------------------------------------------------------------------

def _piles_sheet(wb, result: CloseResult) -> dict[str, str]:
    """Returns column name -> absolute reference of its total cell (for the Summary)."""
    from openpyxl.utils import get_column_letter

    ws = wb.create_sheet("Piles")
    cols = list(PILE_COLUMNS)
    piles = result.piles
    first, last = _table(ws, piles, cols, freeze="B2")
    _mark_rows(ws, first, last, len(cols), cols.index("out_of_tolerance") + 1,
               cols.index("significant") + 1)
    total_row = last + 2
    sums = {cols.index(c) + 1: (first, last) for c in _ADDITIVE}
    _total_row(ws, total_row, 1, "Total", sums, {k: _fmt_for(cols[k - 1]) for k in sums})
    # the total variance in % of total book, as a formula over the two totals
    vcol = get_column_letter(cols.index("variance_t") + 1)
    bcol = get_column_letter(cols.index("book_t") + 1)
    _formula(ws, total_row, cols.index("variance_pct") + 1,
             f"=IF({bcol}{total_row}=0,\"\",100*{vcol}{total_row}/{bcol}{total_row})",
             _FMT_PCT_SIGNED)
    _fit_columns(ws)
    refs = {c: f"Piles!${get_column_letter(cols.index(c) + 1)}${total_row}" for c in _ADDITIVE}
    refs["variance_pct"] = f"Piles!${get_column_letter(cols.index('variance_pct') + 1)}${total_row}"
    letter_oot = get_column_letter(cols.index("out_of_tolerance") + 1)
    letter_sig = get_column_letter(cols.index("significant") + 1)
    refs["_oot_range"] = f"Piles!${letter_oot}${first}:${letter_oot}${max(last, first)}"
    refs["_sig_range"] = f"Piles!${letter_sig}${first}:${letter_sig}${max(last, first)}"
    return refs


_VARIANCE_COLUMNS = [
    "pile_id", "material", "book_t", "book_sigma_t", "survey_t", "survey_sigma_t",
    "variance_t", "variance_sigma_t", "variance_2sigma_t", "variance_pct", "tolerance_pct",
    "tolerance_t", "significant", "out_of_tolerance", "survey_minus_book_t",
    "scanned_fraction", "flags",
]


def _variance_sheet(wb, result: CloseResult) -> None:
    from openpyxl.utils import get_column_letter

    ws = wb.create_sheet("Variance")
    cols = _VARIANCE_COLUMNS
    p = result.piles
    n = len(p)
    L = {c: get_column_letter(i + 1) for i, c in enumerate(cols)}
    _header(ws, 1, cols)
    for i, row in enumerate(p.itertuples(index=False), start=2):
        r = row._asdict()
        for c in cols:
            j = cols.index(c) + 1
            if c == "variance_2sigma_t":
                _formula(ws, i, j, f"=2*{L['variance_sigma_t']}{i}", _FMT_T)
            elif c == "tolerance_t":
                _formula(ws, i, j, f"=ABS({L['book_t']}{i})*{L['tolerance_pct']}{i}/100", _FMT_T)
            elif c == "survey_minus_book_t":
                _formula(ws, i, j, f"={L['survey_t']}{i}-{L['book_t']}{i}", _FMT_T_SIGNED)
            else:
                _put(ws, i, j, r[c], _fmt_for(c))
    first, last = 2, 1 + n
    ws.freeze_panes = "B2"
    ws.auto_filter.ref = f"A1:{get_column_letter(len(cols))}{max(last, 1)}"
    _print_setup(ws, title_rows="1:1")
    _mark_rows(ws, first, last, len(cols), cols.index("out_of_tolerance") + 1,
               cols.index("significant") + 1)
    sums = {cols.index(c) + 1: (first, last)
            for c in ("book_t", "survey_t", "variance_t", "survey_minus_book_t")}
    _total_row(ws, last + 2, 1, "Total", sums, {k: _fmt_for(cols[k - 1]) for k in sums})
    _formula(ws, last + 2, cols.index("survey_minus_book_t") + 1,
             f"={L['survey_t']}{last + 2}-{L['book_t']}{last + 2}", _FMT_T_SIGNED)
    ws.cell(row=last + 4, column=1, value=SIGN_CONVENTION)
    ws.cell(row=last + 5, column=1, value=(
        "variance_2sigma_t, tolerance_t and survey_minus_book_t are formulas; "
        "significant: |variance| > k x sigma; out_of_tolerance: |variance %| > tolerance %."))
    _fit_columns(ws)
    ws.column_dimensions["A"].width = max(ws.column_dimensions["A"].width or 8, 12)


_MOVEMENT_SHEET_COLUMNS = [
    "kind", "reference", "time_utc", "time_local", "pile_id", "tonnes", "scale_id", "counted",
    "before_survey", "note", "source", "line",
]


def _movements_sheet(wb, result: CloseResult) -> None:
    from openpyxl.utils import get_column_letter

    ws = wb.create_sheet("Movements")
    mv = result.movements.copy() if result.movements is not None else pd.DataFrame()
    for c in ("kind", "reference", "time", "pile_id", "tonnes", "scale_id", "counted",
              "before_survey", "note", "source", "line"):
        if c not in mv.columns:
            mv[c] = pd.Series(dtype=object)
    tz = ZoneInfo(result.timezone) if result.timezone else None
    times = pd.to_datetime(mv["time"], utc=True)
    mv["time_utc"] = times
    mv["time_local"] = times.dt.tz_convert(tz) if tz is not None else times
    cols = _MOVEMENT_SHEET_COLUMNS
    _header(ws, 1, cols)
    for i, row in enumerate(mv[cols].itertuples(index=False, name=None), start=2):
        for j, (c, v) in enumerate(zip(cols, row), start=1):
            zone = tz if c == "time_local" else None
            fmt = _FMT_T_SIGNED if c == "tonnes" else (_FMT_INT if c == "line" else None)
            _put(ws, i, j, v, fmt, zone)
    first, last = 2, 1 + len(mv)
    ws.freeze_panes = "A2"
    _print_setup(ws, title_rows="1:1")
    ws.auto_filter.ref = f"A1:{get_column_letter(len(cols))}{max(last, 1)}"
    t = get_column_letter(cols.index("tonnes") + 1)
    k = get_column_letter(cols.index("counted") + 1)
    b = get_column_letter(cols.index("before_survey") + 1)
    r = last + 2
    ws.cell(row=r, column=1, value="Net counted (t)")
    _formula(ws, r, cols.index("tonnes") + 1,
             f"=SUMIFS({t}{first}:{t}{max(last, first)},{k}{first}:{k}{max(last, first)},TRUE)",
             _FMT_T_SIGNED)
    ws.cell(row=r + 1, column=1, value="Net counted up to the survey (t)")
    _formula(ws, r + 1, cols.index("tonnes") + 1,
             f"=SUMIFS({t}{first}:{t}{max(last, first)},{k}{first}:{k}{max(last, first)},TRUE,"
             f"{b}{first}:{b}{max(last, first)},TRUE)", _FMT_T_SIGNED)
    ws.cell(row=r + 2, column=1, value=(
        f"Times: time_utc in UTC, time_local in {result.timezone}. "
        "tonnes: + into the pile, - out of it."))
    _fit_columns(ws)
    ws.column_dimensions["A"].width = max(ws.column_dimensions["A"].width or 8, 12)


def _journal_sheet(wb, result: CloseResult) -> None:
    ws = wb.create_sheet("Adjustments")
    j = result.journal if result.journal is not None else pd.DataFrame(columns=JOURNAL_COLUMNS)
    first, last = _table(ws, j, JOURNAL_COLUMNS)
    col = JOURNAL_COLUMNS.index("adjustment_t") + 1
    _total_row(ws, last + 2, 1, "Total", {col: (first, last)}, {col: _FMT_T_SIGNED})
    ws.cell(row=last + 4, column=1, value=(
        "A positive adjustment increases book stock (book + adjustment = adopted figure)."))
    from openpyxl.styles import Font

    r = last + 6
    if result.reason_codes:
        ws.cell(row=r, column=1, value="Reason codes").font = Font(name="Calibri", bold=True, size=11)
        for code, meaning in result.reason_codes.items():
            r += 1
            ws.cell(row=r, column=1, value=code)
            ws.cell(row=r, column=2, value=meaning)
    _fit_columns(ws)


_LISTS = (list, tuple, set, np.ndarray)


def _extra_sheets(wb, result: CloseResult) -> None:
    """One sheet per further table of the close (belt split, measured change, materials)."""
    for title, frame in (result.tables or {}).items():
        if frame is None:
            continue
        ws = wb.create_sheet(str(title)[:31])
        if not len(frame.columns):
            ws["A1"] = "Nothing this period."
            continue
        shown = frame.rename(columns=str).copy()
        for col in shown.columns:  # lists and sets (e.g. pile ids) as plain text
            # a plain loop: Series.any() refuses an empty (or any) datetime column
            if any(isinstance(v, _LISTS) for v in shown[col]):
                shown[col] = shown[col].map(lambda v: ", ".join(map(str, v)) if isinstance(v, _LISTS) else v)
        _table(ws, shown, list(shown.columns), tz=ZoneInfo(result.timezone) if result.timezone else None)
        _fit_columns(ws)


def _scales_sheet(wb, result: CloseResult) -> None:
    ws = wb.create_sheet("Scales")
    sd = result.scale_diagnostics
    if sd is None:
        sd = pd.DataFrame(columns=SCALE_COLUMNS)
    sd = sd.copy()
    if "piles" in sd.columns:
        sd["piles"] = sd["piles"].map(
            lambda v: ", ".join(map(str, v)) if isinstance(v, (list, tuple, set, np.ndarray))
            else v)
    _table(ws, sd, SCALE_COLUMNS, formats={"bias_pct": _FMT_PCT_SIGNED, "bias_sigma_pct": _FMT_PCT,
                                           "history_bias_pct": _FMT_PCT_SIGNED,
                                           "history_bias_sigma_pct": _FMT_PCT,
                                           "history_months": _FMT_INT})
    _mark_rows(ws, 2, 1 + len(sd), len(SCALE_COLUMNS), SCALE_COLUMNS.index("flagged") + 1, None)
    _fit_columns(ws)


def _duplicates_sheet(wb, result: CloseResult) -> None:
    ws = wb.create_sheet("Duplicates")
    d = result.duplicates
    cols = ["reference", "kind", "detail"]
    if d is None or not len(d.columns):
        d = pd.DataFrame(columns=cols)
    cols = [c for c in cols if c in d.columns] + [c for c in d.columns if c not in cols]
    _table(ws, d, cols)
    _fit_columns(ws)


def _flatten(prefix: str, value: Any, out: list[tuple[str, Any]]) -> None:
    if isinstance(value, Mapping):
        for k in sorted(value, key=str):
            _flatten(f"{prefix}.{k}" if prefix else str(k), value[k], out)
    elif isinstance(value, (list, tuple)):
        out.append((prefix, ", ".join(map(str, value))))
    else:
        out.append((prefix, value if isinstance(value, (int, float, str, bool)) or value is None
                    else str(value)))


def _run_sheet(wb, result: CloseResult) -> None:
    from inventory.export.manifest import manifest_dict

    ws = wb.create_sheet("Run")
    facts = manifest_dict(result)
    inputs = facts.pop("inputs", {})
    _header(ws, 1, ["fact", "value"])
    rows: list[tuple[str, Any]] = []
    _flatten("", facts, rows)
    r = 2
    for key, value in rows:
        fmt = _FMT_SECONDS if key.startswith("timings_s.") else None
        ws.cell(row=r, column=1, value=key)
        _put(ws, r, 2, value, fmt)
        r += 1
    r += 1
    _header_at(ws, r, ["input file", "sha256"])
    for path, digest in inputs.items():
        r += 1
        _put(ws, r, 1, path)
        _put(ws, r, 2, digest)
    ws.freeze_panes = "A2"
    ws.auto_filter.ref = f"A1:B{1 + len(rows)}"
    _fit_columns(ws)


def _header_at(ws, row: int, names: list[str]) -> None:
    from openpyxl.styles import Font

    for j, name in enumerate(names, start=1):
        ws.cell(row=row, column=j, value=name).font = Font(name="Calibri", bold=True, size=11)


def _summary_sheet(ws, result: CloseResult, refs: Mapping[str, str]) -> None:
    from openpyxl.styles import Alignment, Font, PatternFill

    ws.title = "Summary"
    ws["A1"] = f"Stock close {result.period}: {result.site_name}"
    ws["A1"].font = Font(name="Calibri", bold=True, size=14)
    instant = _cell_value(result.survey_instant)
    facts: list[tuple[str, Any, str | None]] = [
        ("Site", result.site_name, None),
        ("Period", result.period, None),
        ("Survey date", result.survey_date, None),
        ("Survey instant (UTC)", instant, _FMT_DATETIME),
        ("Previous survey", result.previous_survey_date or "none", None),
        ("Coordinate reference system", result.crs, None),
        ("Time zone", result.timezone, None),
        ("Piles", int(len(result.piles)), _FMT_INT),
    ]
    r = 3
    for label, value, fmt in facts:
        ws.cell(row=r, column=1, value=label).font = Font(name="Calibri", bold=True, size=11)
        _put(ws, r, 2, value, fmt)
        r += 1
    r += 1
    ws.cell(row=r, column=1, value="Totals (formulas over the Piles sheet)").font = Font(name="Calibri", bold=True, size=11)
    r += 1
    totals = [
        ("Opening", f"={refs['opening_t']}", _FMT_T),
        ("Receipts", f"={refs['receipts_t']}", _FMT_T),
        ("Dispatches", f"={refs['dispatches_t']}", _FMT_T),
        ("Book stock at survey", f"={refs['book_t']}", _FMT_T),
        ("Survey stock", f"={refs['survey_t']}", _FMT_T),
        ("Variance (survey - book)", f"={refs['variance_t']}", _FMT_T_SIGNED),
        ("Variance % of book", f"={refs['variance_pct']}", _FMT_PCT_SIGNED),
        ("Adjustments", f"={refs['adjustment_t']}", _FMT_T_SIGNED),
        ("Closing stock", f"={refs['closing_t']}", _FMT_T),
        ("Piles out of tolerance", f"=COUNTIF({refs['_oot_range']},TRUE)", _FMT_INT),
        ("Piles with a significant variance", f"=COUNTIF({refs['_sig_range']},TRUE)", _FMT_INT),
    ]
    for label, formula, fmt in totals:
        ws.cell(row=r, column=1, value=label)
        _formula(ws, r, 2, formula, fmt)
        r += 1
    r += 1
    ws.cell(row=r, column=1, value="Sign convention").font = Font(name="Calibri", bold=True, size=11)
    # long texts are left to run on into the empty cells to their right (no wrapping, so
    # no row-height guessing); figures stay in a column of their own width
    ws.cell(row=r, column=2, value=SIGN_CONVENTION.removeprefix("Sign convention: "))
    r += 2
    ws.cell(row=r, column=1, value="Legend").font = Font(name="Calibri", bold=True, size=11)
    r += 1
    for fill, text in ((FILL_OUT_OF_TOLERANCE, ROW_LEGEND["out_of_tolerance"]),
                       (FILL_SIGNIFICANT, ROW_LEGEND["significant"])):
        ws.cell(row=r, column=1, value="row colour").fill = PatternFill("solid", fgColor=fill)
        ws.cell(row=r, column=2, value=text)
        r += 1
    r += 1
    ws.cell(row=r, column=1, value="Cautions").font = Font(name="Calibri", bold=True, size=11)
    for text in CAUTIONS:
        ws.cell(row=r, column=2, value=text)
        r += 1
    ws.column_dimensions["A"].width = 36
    ws.column_dimensions["B"].width = 22
    for row in ws.iter_rows(min_row=3, min_col=2, max_col=2):
        for c in row:
            c.alignment = Alignment(horizontal="left")
    ws.page_setup.orientation = "portrait"
    ws.page_setup.paperSize = ws.PAPERSIZE_A4


def write_workbook(result: CloseResult, path: str | Path) -> Path:
    """Write the close workbook ``variance-<period>.xlsx``.

    Parameters
    ----------
    result : CloseResult
    path : str or Path
        Destination; written beside it under a temporary name, then renamed.

    Returns
    -------
    Path
    """
    from openpyxl import Workbook

    wb = Workbook()
    summary = wb.active
    refs = _piles_sheet(wb, result)
    _variance_sheet(wb, result)
    _movements_sheet(wb, result)
    _journal_sheet(wb, result)
    _scales_sheet(wb, result)
    _duplicates_sheet(wb, result)
    _extra_sheets(wb, result)
    _run_sheet(wb, result)
    _summary_sheet(summary, result, refs)
    wb.properties.title = f"Stock close {result.period}"
    wb.properties.subject = result.site_name
    wb.properties.creator = "inventory"
    # fixed stamps: the same close gives the same workbook content
    stamp = _stamp(result)
    wb.properties.created = stamp
    wb.properties.modified = stamp
    dest = Path(path)
    with atomic_path(dest) as tmp:
        _save(wb, tmp)
    return dest


_SAVE_LOCK = threading.Lock()


def _exact_number_text(value: Any) -> str:
    """openpyxl's number text, but round-trip exact: repr() of a float (17 digits at most)."""
    if isinstance(value, float) and math.isfinite(value):
        return repr(value)
    return _openpyxl_safe_string(value)


def _openpyxl_safe_string(value: Any) -> str:
    from openpyxl.compat.strings import safe_string

    return safe_string(value)


def _save(wb, path: Path) -> None:
    """Save with every float written to the last bit.

    openpyxl formats numbers with ``"%.16g"``, which loses the 17th significant digit some
    doubles need, so the workbook would not hold exactly the ledger's numbers. Excel itself
    writes up to 17 digits; we swap in ``repr`` for the duration of the save only.
    """
    try:
        from openpyxl.cell import _writer
    except ImportError:  # pragma: no cover - openpyxl layout changed; tests will notice
        wb.save(path)
        return
    with _SAVE_LOCK:
        original = getattr(_writer, "safe_string", None)
        if original is None:  # pragma: no cover
            wb.save(path)
            return
        _writer.safe_string = _exact_number_text
        try:
            wb.save(path)
        finally:
            _writer.safe_string = original


def _stamp(result: CloseResult) -> datetime:
    instant = result.survey_instant
    if isinstance(instant, datetime):
        if instant.tzinfo is not None:
            instant = instant.astimezone(timezone.utc).replace(tzinfo=None)
        return instant.replace(microsecond=0)
    return datetime(2000, 1, 1)


# -- history ------------------------------------------------------------------------------------

def _variance_chart(ws, piles: int, periods: int) -> None:
    """A line chart of each pile's variance by month, from the ``By month`` cells (one
    series per pile row), placed below the table."""
    from openpyxl.chart import LineChart, Reference

    chart = LineChart()
    chart.title = "Variance per pile by month (t, survey - book)"
    chart.y_axis.title = "variance (t)"
    chart.x_axis.title = "period"
    data = Reference(ws, min_col=1, max_col=1 + periods, min_row=2, max_row=1 + piles)
    chart.add_data(data, from_rows=True, titles_from_data=True)
    chart.set_categories(Reference(ws, min_col=2, max_col=1 + periods, min_row=1, max_row=1))
    chart.width, chart.height = 18, 8
    ws.add_chart(chart, f"A{piles + 4}")


def write_history_workbook(df: pd.DataFrame, path: str | Path, totals: pd.DataFrame | None = None,
                           by: str | None = None) -> Path:
    """Write ``inventory history`` as a workbook for finance.

    Sheets: ``History`` (the rows as given, with number formats, filters and the row marks),
    ``By month`` (variance tonnes, pile x period, with SUM formulas for row and column
    totals, and a line chart of each pile's variance by month), ``Totals by <by>`` when
    ``totals`` is given, and ``Notes`` (sign convention, legend).

    Parameters
    ----------
    df : DataFrame
        As returned by :meth:`inventory.ledger.store.Ledger.history`.
    path : str or Path
    totals : DataFrame, optional
        :func:`inventory.ledger.history.aggregate_history` of the same rows.
    by : str, optional
        What ``totals`` is grouped by (names its sheet).

    Returns
    -------
    Path
    """
    from openpyxl import Workbook
    from openpyxl.styles import Font, PatternFill
    from openpyxl.utils import get_column_letter

    wb = Workbook()
    ws = wb.active
    ws.title = "History"
    cols = list(df.columns)
    first, last = _table(ws, df, cols, freeze="C2" if "pile_id" in cols else "A2")
    _mark_rows(ws, first, last, len(cols),
               cols.index("out_of_tolerance") + 1 if "out_of_tolerance" in cols else None,
               cols.index("significant") + 1 if "significant" in cols else None)
    _fit_columns(ws)

    pv = wb.create_sheet("By month")
    if {"period", "pile_id", "variance_t"} <= set(cols) and len(df):
        if "status" in cols:
            adopted = df[df["status"] == "adopted"]
        else:
            adopted = df
        table = adopted.pivot_table(index="pile_id", columns="period", values="variance_t",
                                    aggfunc="sum", sort=True)
        periods = list(table.columns)
        _header(pv, 1, ["pile_id", *periods, "Total"])
        n = len(table)
        for i, (pile, row) in enumerate(table.iterrows(), start=2):
            _put(pv, i, 1, pile)
            for j, per in enumerate(periods, start=2):
                _put(pv, i, j, row[per], _FMT_T_SIGNED)
            lc = get_column_letter(1 + len(periods))
            _formula(pv, i, 2 + len(periods), f"=SUM(B{i}:{lc}{i})", _FMT_T_SIGNED)
        sums = {j: (2, 1 + n) for j in range(2, 3 + len(periods))}
        _total_row(pv, n + 2, 1, "Total", sums, {j: _FMT_T_SIGNED for j in sums})
        pv.freeze_panes = "B2"
        pv.auto_filter.ref = f"A1:{get_column_letter(2 + len(periods))}{1 + n}"
        _fit_columns(pv)
        _variance_chart(pv, n, len(periods))
    else:
        pv["A1"] = "No closed periods match."

    if totals is not None:
        ts = wb.create_sheet(f"Totals by {by or 'group'}"[:31])
        tcols = list(totals.columns)
        _table(ts, totals, tcols, freeze="B2")
        _fit_columns(ts)

    notes = wb.create_sheet("Notes")
    notes["A1"] = "Variance history from the ledger (adopted closes unless status says otherwise)"
    notes["A1"].font = Font(name="Calibri", bold=True, size=11)
    notes["A3"] = SIGN_CONVENTION
    notes["A5"] = "Legend"
    notes["A5"].font = Font(name="Calibri", bold=True, size=11)
    notes["A6"].fill = PatternFill("solid", fgColor=FILL_OUT_OF_TOLERANCE)
    notes["B6"] = ROW_LEGEND["out_of_tolerance"]
    notes["A7"].fill = PatternFill("solid", fgColor=FILL_SIGNIFICANT)
    notes["B7"] = ROW_LEGEND["significant"]
    for i, text in enumerate(CAUTIONS, start=9):
        notes.cell(row=i, column=1, value=text)
    notes.column_dimensions["A"].width = 14
    notes.column_dimensions["B"].width = 40
    dest = Path(path)
    with atomic_path(dest) as tmp:
        _save(wb, tmp)
    return dest
