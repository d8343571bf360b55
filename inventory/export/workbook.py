"""The close workbook (``variance-<period>.xlsx``) and the history workbook, with XlsxWriter.

Sheets of the close workbook:

Summary      site, period, ledger close id and time; the stock bridge (book at survey +
             adjustments posted = adjusted book; + net movements after the survey = closing
             stock) as formulas over the Piles sheet; the variance; the 1 sigma of the survey,
             book and variance totals (shared density, floor and scale errors counted once)
             and the variance in sigmas, as formulas over the ``Site totals`` sheet, beside the
             piles' variance sigmas in quadrature and :data:`TOTAL_SIGMA_IN_WORDS`; the sign
             convention, the legend of row colours and the cautions.
Piles        one row per pile with every figure of the close (the ledger's columns), a totals
             row of SUM formulas.
Variance     book and survey side by side with their sigmas; the variance sigma with its parts
             (the quadrature sum of book and survey sigma, the shared terms removed) and the
             formula in words; 2-sigma, the tolerance in tonnes, ``survey - book``.
Movements    every weighbridge ticket, belt-scale interval and transfer that touched the books.
Journal      the posting journal: period, posting date, close id, pile, material, quantity,
             unit, value, account and location codes, reason, status post or hold.
Scales       scale diagnostics.
Duplicates   exact and suspected duplicate records.
(further)    one sheet per table of ``CloseResult.tables`` (materials, measured change, ...);
             ``Site totals`` and ``Materials`` with a ``variance_z`` formula column (variance /
             its 1 sigma) and the note :data:`TOTAL_SIGMA_IN_WORDS`.
Columns      every column of every table: sheet, name, unit, meaning.
Run          inputs with SHA-256, parameters, versions, timings.

Numbers: stored values are the float64 figures of the close, unrounded and written to the
last bit, so the workbook holds the numbers the ledger holds; number formats carry the unit
(t, m³, %) and only change how a number is shown. Every formula cell also stores its
computed value, so a script (pandas, openpyxl with ``data_only``) or a previewer that does not
recalculate reads the same number as a spreadsheet program that does.

Percentages: every percentage in the workbook is a spreadsheet percentage, stored as a
fraction of one and shown with the % format (0.025 shows as 2.5 %), so ``=B2*C2`` gives
tonnes. The ledger, the GeoPackage and the CSV files keep ``_pct`` columns in percent
points (2.5 = 2.5 %), as their column dictionary says; the workbook divides by 100.

Print: every sheet is set up for A4, landscape (Summary portrait), fitted to one page
width, with the header row repeated on each page, and the site, period and ledger close in
the page header. Notes under a table wrap within the table's width.

Out-of-tolerance rows are filled red, significant rows amber, by conditional formatting.
"""

from __future__ import annotations

import math
import re
from datetime import date, datetime, timezone
from pathlib import Path
from typing import Any, Callable, Iterable, Mapping
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd

from inventory.export.journal import close_status_text, posting_journal
from inventory.model.columns import FIELDS, unit_of
from inventory.model.results import PILE_COLUMNS, POSTING_COLUMNS, SCALE_COLUMNS, CloseResult
from inventory.model.texts import CAUTIONS, ROW_LEGEND, SIGN_CONVENTION
from inventory.io.atomic import atomic_path

__all__ = [
    "write_workbook", "write_history_workbook", "SHEETS", "FILL_OUT_OF_TOLERANCE", "FILL_SIGNIFICANT", "VARIANCE_SIGMA_IN_WORDS",
    "TOTAL_SIGMA_IN_WORDS", "write_tables_workbook",
]

#: Sheets of a close whose ``tables`` are empty, in order.
SHEETS = ("Summary", "Piles", "Variance", "Movements", "Journal", "Scales", "Duplicates",
          "Columns", "Run")

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
_FMT_M = '#,##0.000 "m"'
_FMT_PCT = "0.00%"                          # fractions: 0.025 shows as 2.50%
_FMT_PCT_SIGNED = "+0.00%;-0.00%;0.00%"
_FMT_FRACTION = "0.0%"
_FMT_DENSITY = '0.000 "t/m³"'
_FMT_SECONDS = '0.00 "s"'
_FMT_DATETIME = "yyyy-mm-dd hh:mm:ss"
_FMT_DATE = "yyyy-mm-dd"
_FMT_INT = "0"
_FMT_MONEY = "#,##0.00"
_FMT_Z = '+0.00 "sigma";-0.00 "sigma";0.00 "sigma"'   # a variance in sigmas (z)

_PILE_FORMATS = {
    "area_m2": _FMT_M2, "scanned_fraction": _FMT_FRACTION, "density_t_m3": _FMT_DENSITY,
    "variance_t": _FMT_T_SIGNED, "adjustment_t": _FMT_T_SIGNED, "after_survey_net_t": _FMT_T_SIGNED,
    "quantity_t": _FMT_T_SIGNED, "survey_minus_book_t": _FMT_T_SIGNED, "tonnes": _FMT_T_SIGNED,
    "variance_pct": _FMT_PCT_SIGNED, "bias_pct": _FMT_PCT_SIGNED, "history_bias_pct": _FMT_PCT_SIGNED,
    "history_months": _FMT_INT, "line": _FMT_INT, "close_id": _FMT_INT, "piles": _FMT_INT,
    "unit_cost": _FMT_MONEY, "value": _FMT_MONEY, "share": _FMT_FRACTION,
    "posting_date": _FMT_DATE,
}

#: Pile columns whose total is a plain sum (sigmas and ratios are not additive).
_ADDITIVE = [
    "area_m2", "volume_m3", "volume_tin_m3", "below_base_m3", "survey_t", "survey_dry_t",
    "opening_t", "receipts_t", "dispatches_t", "transfers_in_t", "transfers_out_t", "book_t",
    "variance_t", "adjustment_t", "after_survey_net_t", "closing_t",
]

#: How the Variance sheet's sigma columns fit together, in words (also in docs/uncertainty.md).
VARIANCE_SIGMA_IN_WORDS = (
    "variance_sigma_t = square root of (book_sigma_t squared + survey_sigma_t squared - "
    "shared_sigma_t squared). quadrature_sigma_t is the square root of (book_sigma_t squared + "
    "survey_sigma_t squared), what the sigma would be if book and survey erred independently. "
    "shared_sigma_t is what the errors common to both take off: when the opening stock was an "
    "earlier survey, the same table bulk density and the same fixed base (floor raster or level) "
    "erred in that survey and in this one, so these errors cancel in survey - book instead of "
    "adding twice (shared_sigma_t squared = 2 x the density part of this survey x that of the "
    "opening + 2 x the same for the base)."
)

#: How a total's sigma (Summary, Site totals and Materials sheets) differs from the piles'
#: sigmas added in quadrature, and why (also in docs/ledger.md).
TOTAL_SIGMA_IN_WORDS = (
    "A total's 1 sigma is not the piles' sigmas added in quadrature: an error common to several "
    "piles (one material's table bulk density in all its piles, the surveyed floor raster under "
    "every pile on it, one weighbridge's or belt scale's error in every pile it weighed for) is "
    "one error, so its parts are added before squaring and it is counted once, while the rest of "
    "each pile's error (scan noise, filled gaps, a toe plane fitted anew, its own level base) is "
    "its own and adds in quadrature; shared errors push every pile the same way, so the total's "
    "sigma is larger than the quadrature sum, except where a shared density or floor error of "
    "this survey cancels against the same error in an opening that was an earlier survey."
)

_MAX_WIDTH = 50
_NOTE_WIDTH = 110          # characters a wrapped note spans at most
#: Excel's limit on the characters in one cell (Excel specifications and limits).
_MAX_CELL_CHARS = 32767
#: Characters XML 1.0 does not allow in a document (control characters but tab, LF, CR).
_ILLEGAL_XML = re.compile(r"[\x00-\x08\x0b\x0c\x0e-\x1f]")


def _fmt_for(col: str) -> str | None:
    """Number format by column name: explicit map first, then the unit suffix."""
    if col in _PILE_FORMATS:
        return _PILE_FORMATS[col]
    if col.endswith("_t_m3"):
        return _FMT_DENSITY
    if col.endswith("_t"):
        return _FMT_T
    if col.endswith("_m3"):
        return _FMT_M3
    if col.endswith("_m2"):
        return _FMT_M2
    if col.endswith("_m"):
        return _FMT_M
    if col.endswith("_pct"):
        return _FMT_PCT
    if col.endswith("_s"):
        return _FMT_SECONDS
    if col.endswith("_z"):
        return _FMT_Z
    return None


def _as_fraction(frame: pd.DataFrame) -> pd.DataFrame:
    """``frame`` with every ``_pct`` column (percent points) divided by 100: a spreadsheet
    percentage (the module docstring says why)."""
    out = frame.copy()
    for col in out.columns:
        if str(col).endswith("_pct"):
            out[col] = pd.to_numeric(out[col], errors="coerce") / 100.0
    return out


def _cell_value(value: Any, tz: ZoneInfo | None = None) -> Any:
    """A value a cell can hold (no NaN, no tz-aware datetimes, plain Python types)."""
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
    if isinstance(value, date):
        return datetime(value.year, value.month, value.day)
    if isinstance(value, str):
        # control characters are not allowed in the XML; an over-long cell makes Excel repair
        return _ILLEGAL_XML.sub("\ufffd", value)[:_MAX_CELL_CHARS]
    return value


def _shown_len(value: Any, fmt: str | None) -> int:
    """Roughly how many characters a value takes when shown in its format."""
    if value is None:
        return 0
    if isinstance(value, bool):
        return 5
    if isinstance(value, datetime):
        return 10 if fmt == _FMT_DATE else 19
    if isinstance(value, (int, float)):
        if fmt and "%" in fmt:
            return len(f"{value * 100:+.2f}") + 2
        text = f"{value:,.2f}" if fmt and "0.00" in fmt else f"{value:,.3f}"
        unit = fmt.rsplit('"', 2)[-2] if fmt and fmt.count('"') >= 2 else ""
        return len(text) + len(unit) + 2
    return max(len(line) for line in str(value).split("\n"))


# -- the writer ---------------------------------------------------------------------------------

def _exact_worksheet_class():
    """An XlsxWriter worksheet that writes every float to the last bit.

    XlsxWriter formats numbers with ``"%.16G"``, which loses the 17th significant digit some
    doubles need, so the workbook would not hold exactly the ledger's numbers; ``repr`` of a
    float is the shortest text that reads back as the same double. (Formula results are
    already written with ``str``, which is the same.)
    """
    from xlsxwriter.worksheet import Worksheet

    class ExactWorksheet(Worksheet):
        def _xml_number_element(self, number, attributes=[]):  # noqa: B006 - XlsxWriter's signature
            attr = "".join(f' {k}="{self._escape_attributes(v)}"' for k, v in attributes)
            text = repr(float(number)) if isinstance(number, float) else str(number)
            self.fh.write(f"<c{attr}><v>{text}</v></c>")

    return ExactWorksheet


class _Book:
    """An XlsxWriter workbook with a cache of cell formats and the page header of a close."""

    def __init__(self, path: Path, header: str = "") -> None:
        import xlsxwriter

        self.wb = xlsxwriter.Workbook(str(path), {"nan_inf_to_errors": False})
        self._cls = _exact_worksheet_class()
        self._formats: dict[tuple, Any] = {}
        self.header = header

    def fmt(self, num: str | None = None, *, bold: bool = False, fill: str | None = None,
            total: bool = False, wrap: bool = False, left: bool = False, size: int | None = None,
            bottom: bool = False, valign_top: bool = False):
        key = (num, bold, fill, total, wrap, left, size, bottom, valign_top)
        if key not in self._formats:
            props: dict[str, Any] = {"font_name": "Calibri", "font_size": size or 11}
            if num:
                props["num_format"] = num
            if bold:
                props["bold"] = True
            if fill:
                props.update(pattern=1, fg_color="#" + fill[2:])
            if total:
                props.update(top=1, bottom=6)
            if bottom:
                props["bottom"] = 1
            if wrap:
                props["text_wrap"] = True
            if wrap or valign_top:
                props["valign"] = "top"
            if left:
                props["align"] = "left"
            self._formats[key] = self.wb.add_format(props)
        return self._formats[key]

    def row_fill(self, argb: str):
        """A conditional-format fill (a differential format: background only)."""
        key = ("cf", argb)
        if key not in self._formats:
            self._formats[key] = self.wb.add_format({"bg_color": "#" + argb[2:]})
        return self._formats[key]

    def sheet(self, name: str, *, landscape: bool = True) -> _Sheet:
        ws = self.wb.add_worksheet(name[:31], worksheet_class=self._cls)
        ws.set_paper(9)  # A4
        if landscape:
            ws.set_landscape()
        else:
            ws.set_portrait()
        ws.fit_to_pages(1, 0)
        ws.set_margins(left=0.5, right=0.5, top=0.8, bottom=0.6)
        if self.header:
            ws.set_header(f"&L&8{self.header}&R&8{_hf(name)}", {"margin": 0.3})
        ws.set_footer("&R&8page &P of &N", {"margin": 0.3})
        return _Sheet(self, ws)


def _hf(text: str) -> str:
    """Text for a page header: ``&`` is a control character there."""
    return str(text).replace("&", "&&")


class _Sheet:
    """One worksheet, addressed with 1-based rows and columns like a spreadsheet's A1."""

    def __init__(self, book: _Book, ws) -> None:
        self.book, self.ws = book, ws
        self.widths: dict[int, int] = {}
        self.fixed: dict[int, int] = {}

    def _track(self, c: int, value: Any, fmt: str | None) -> None:
        n = _shown_len(value, fmt)
        if n > self.widths.get(c, 0):
            self.widths[c] = n

    def put(self, r: int, c: int, value: Any, num: str | None = None, tz: ZoneInfo | None = None,
            **style) -> Any:
        """Write a value as its own type: text is always text (never run as a formula)."""
        v = _cell_value(value, tz)
        ws, row, col = self.ws, r - 1, c - 1
        if v is None or v == "":  # empty text is an empty cell
            if style:
                ws.write_blank(row, col, None, self.book.fmt(num, **style))
            return None
        if isinstance(v, bool):
            ws.write_boolean(row, col, v, self.book.fmt(None, **style) if style else None)
        elif isinstance(v, (int, float)):
            ws.write_number(row, col, v, self.book.fmt(num, **style) if (num or style) else None)
        elif isinstance(v, datetime):
            num = num if num in (_FMT_DATE, _FMT_DATETIME) else _FMT_DATETIME
            ws.write_datetime(row, col, v, self.book.fmt(num, **style))
        else:
            v = str(v)
            # write_string never reads "=..." as a formula: text from an input file stays text
            ws.write_string(row, col, v, self.book.fmt(None, **style) if style else None)
        self._track(c, v, num)
        return v

    def formula(self, r: int, c: int, formula: str, value: Any, num: str | None = None, **style) -> None:
        """A formula with its computed value stored beside it (read by pandas and openpyxl
        with ``data_only``; a spreadsheet program recalculates it)."""
        v = _cell_value(value)
        self.ws.write_formula(r - 1, c - 1, formula, self.book.fmt(num, **style) if (num or style) else None,
                              "" if v is None else v)
        self._track(c, v if v is not None else "", num)

    def header(self, r: int, names: Iterable[str]) -> None:
        f = self.book.fmt(None, bold=True, fill=_HEADER_FILL, bottom=True)
        for j, name in enumerate(names, start=1):
            self.ws.write_string(r - 1, j - 1, str(name), f)
            self._track(j, str(name), None)

    def note(self, r: int, text: str, ncols: int, bold: bool = False, col: int = 1) -> None:
        """A note over the table's width (at most :data:`_NOTE_WIDTH` characters), wrapped,
        with a row height for the lines it takes; from column ``col`` on."""
        cols = max(1, ncols)
        width = sum(self._width(j) for j in range(col, cols + 1))
        width = max(min(width, _NOTE_WIDTH), 40)
        text = _cell_value(text)
        lines = sum(max(1, math.ceil(len(part) * 1.1 / width)) for part in str(text).split("\n"))
        f = self.book.fmt(None, wrap=True, bold=bold)
        last = col
        while last < cols and sum(self._width(j) for j in range(col, last + 1)) < width:
            last += 1
        if last > col:
            self.ws.merge_range(r - 1, col - 1, r - 1, last - 1, text, f)
        else:
            self.ws.write_string(r - 1, col - 1, text, f)
        self.ws.set_row(r - 1, 15 * lines)

    def _width(self, c: int) -> int:
        if c in self.fixed:
            return self.fixed[c]
        return min(max(self.widths.get(c, 0) + 2, 8), _MAX_WIDTH)

    def fit(self) -> None:
        for c in sorted(set(self.widths) | set(self.fixed)):
            self.ws.set_column(c - 1, c - 1, self._width(c))


def _col(c: int) -> str:
    from xlsxwriter.utility import xl_col_to_name

    return xl_col_to_name(c - 1)


def _num(v: Any) -> float | None:
    v = _cell_value(v)
    return float(v) if isinstance(v, (int, float)) and not isinstance(v, bool) else None


def _sum(values: Iterable[Any]) -> float:
    """What a spreadsheet's SUM gives: numbers added, text, booleans and blanks left out."""
    return float(sum(x for x in (_num(v) for v in values) if x is not None))


def _table(sh: _Sheet, df: pd.DataFrame, columns: list[str], *, formats: Mapping[str, str] | None = None,
           tz: ZoneInfo | None = None, freeze: tuple[int, int] = (1, 0),
           computed: Mapping[str, Callable[[int, dict], tuple[str, Any]]] | None = None,
           wrap: Mapping[str, int] | None = None) -> tuple[int, int]:
    """Header row 1, data from row 2; frozen header, auto-filter, header repeated on print.

    ``computed`` maps a column to ``f(row, values) -> (formula, value)`` for formula columns;
    ``wrap`` maps a text column to the width it wraps at. Returns (first, last) data row.
    """
    formats = dict(formats or {})
    computed = dict(computed or {})
    wrap = dict(wrap or {})
    for col, width in wrap.items():
        if col in columns:
            sh.fixed[columns.index(col) + 1] = width
    sh.header(1, columns)
    data = df.reindex(columns=columns) if len(df.columns) else pd.DataFrame(columns=columns)
    for i, row in enumerate(data.itertuples(index=False, name=None), start=2):
        values = dict(zip(columns, row))
        for j, col in enumerate(columns, start=1):
            if col in computed:
                formula, value = computed[col](i, values)
                sh.formula(i, j, formula, value, formats.get(col, _fmt_for(col)))
            elif col in wrap:
                sh.put(i, j, values[col], formats.get(col, _fmt_for(col)), tz, wrap=True)
            else:
                sh.put(i, j, values[col], formats.get(col, _fmt_for(col)), tz)
    last = 1 + len(data)
    sh.ws.freeze_panes(*freeze)
    sh.ws.autofilter(0, 0, max(last, 1) - 1, len(columns) - 1)
    sh.ws.repeat_rows(0)
    return 2, last


def _mark_rows(sh: _Sheet, first: int, last: int, ncols: int, oot_col: int | None, sig_col: int | None):
    """Fill out-of-tolerance rows red and significant rows amber (live conditional rules)."""
    if last < first:
        return
    for col, fill in ((oot_col, FILL_OUT_OF_TOLERANCE), (sig_col, FILL_SIGNIFICANT)):
        if col is None:
            continue
        sh.ws.conditional_format(first - 1, 0, last - 1, ncols - 1, {
            "type": "formula", "criteria": f"=${_col(col)}{first}=TRUE",
            "format": sh.book.row_fill(fill), "stop_if_true": True})


def _total_row(sh: _Sheet, row: int, label: str, sums: Mapping[int, tuple[int, int, float]],
               formats: Mapping[int, str | None]) -> None:
    """A totals row: ``sums`` maps a column to (first row, last row, the computed sum)."""
    sh.put(row, 1, label, bold=True)
    for col, (first, last, value) in sums.items():
        letter = _col(col)
        formula = f"=SUM({letter}{first}:{letter}{last})" if last >= first else "=0"
        sh.formula(row, col, formula, value if last >= first else 0, formats.get(col), bold=True,
                   fill=_TOTAL_FILL, total=True)


# -- sheets -------------------------------------------------------------------------------------

def _piles_sheet(book: _Book, result: CloseResult) -> dict[str, Any]:
    """Returns, by column name, (absolute reference of its total cell, its value) for Summary."""
    sh = book.sheet("Piles")
    cols = list(PILE_COLUMNS)
    piles = _as_fraction(result.piles.reindex(columns=cols))
    first, last = _table(sh, piles, cols, freeze=(1, 1), wrap={"flags": 40})
    _mark_rows(sh, first, last, len(cols), cols.index("out_of_tolerance") + 1, cols.index("significant") + 1)
    total_row = last + 2
    sums = {cols.index(c) + 1: (first, last, _sum(piles[c])) for c in _ADDITIVE}
    _total_row(sh, total_row, "Total", sums, {k: _fmt_for(cols[k - 1]) for k in sums})
    # the total variance as a share of total book, as a formula over the two totals
    v, b = _col(cols.index("variance_t") + 1), _col(cols.index("book_t") + 1)
    tv, tb = _sum(piles["variance_t"]), _sum(piles["book_t"])
    pct = tv / tb if tb != 0 else ""
    sh.formula(total_row, cols.index("variance_pct") + 1,
               f'=IF({b}{total_row}=0,"",{v}{total_row}/{b}{total_row})', pct, _FMT_PCT_SIGNED,
               bold=True, fill=_TOTAL_FILL, total=True)
    sh.fit()
    refs: dict[str, Any] = {
        c: (f"Piles!${_col(cols.index(c) + 1)}${total_row}", _sum(piles[c])) for c in _ADDITIVE}
    refs["variance_pct"] = (f"Piles!${_col(cols.index('variance_pct') + 1)}${total_row}", pct)
    for flag in ("out_of_tolerance", "significant"):
        L = _col(cols.index(flag) + 1)
        refs[flag] = (f"Piles!${L}${first}:${L}${max(last, first)}",
                      int(sum(1 for x in piles[flag] if _cell_value(x) is True)))
    # the surveyed piles' variance sigmas in quadrature (as the Site totals: surveyed piles
    # only; a blank sigma counts 0, as in the spreadsheet)
    L, S = _col(cols.index("variance_sigma_t") + 1), _col(cols.index("survey_t") + 1)
    hi = max(last, first)
    sigmas = [_num(x) or 0.0 for x, sv in zip(piles["variance_sigma_t"], piles["survey_t"]) if _num(sv) is not None]
    refs["variance_sigma_quadrature"] = (
        f"=SQRT(SUMPRODUCT(ISNUMBER(Piles!${S}${first}:${S}${hi})*Piles!${L}${first}:${L}${hi}^2))",
        math.sqrt(sum(x * x for x in sigmas)))
    return refs


_VARIANCE_COLUMNS = [
    "pile_id", "material", "book_t", "book_sigma_t", "survey_t", "survey_sigma_t",
    "variance_t", "quadrature_sigma_t", "shared_sigma_t", "variance_sigma_t", "variance_2sigma_t",
    "variance_pct", "tolerance_pct", "tolerance_t", "significant", "out_of_tolerance",
    "survey_minus_book_t", "scanned_fraction", "flags",
]


def _variance_sheet(book: _Book, result: CloseResult) -> None:
    sh = book.sheet("Variance")
    cols = _VARIANCE_COLUMNS
    L = {c: _col(i + 1) for i, c in enumerate(cols)}
    p = _as_fraction(result.piles.reindex(columns=PILE_COLUMNS))

    def f(v: dict, c: str) -> float | None:
        return _num(v.get(c))

    def quad(i, v):
        b, s = f(v, "book_sigma_t") or 0.0, f(v, "survey_sigma_t") or 0.0
        return (f"=SQRT({L['book_sigma_t']}{i}^2+{L['survey_sigma_t']}{i}^2)", math.sqrt(b * b + s * s))

    def shared(i, v):
        b, s, sv = f(v, "book_sigma_t") or 0.0, f(v, "survey_sigma_t") or 0.0, f(v, "variance_sigma_t") or 0.0
        return (f"=SQRT(MAX(0,{L['book_sigma_t']}{i}^2+{L['survey_sigma_t']}{i}^2-{L['variance_sigma_t']}{i}^2))",
                math.sqrt(max(0.0, b * b + s * s - sv * sv)))

    def two_sigma(i, v):
        return f"=2*{L['variance_sigma_t']}{i}", 2 * (f(v, "variance_sigma_t") or 0.0)

    def tol_t(i, v):
        return (f"=ABS({L['book_t']}{i})*{L['tolerance_pct']}{i}",
                abs(f(v, "book_t") or 0.0) * (f(v, "tolerance_pct") or 0.0))

    def s_minus_b(i, v):
        return f"={L['survey_t']}{i}-{L['book_t']}{i}", (f(v, "survey_t") or 0.0) - (f(v, "book_t") or 0.0)

    first, last = _table(sh, p, cols, freeze=(1, 1), wrap={"flags": 40}, computed={
        "quadrature_sigma_t": quad, "shared_sigma_t": shared, "variance_2sigma_t": two_sigma,
        "tolerance_t": tol_t, "survey_minus_book_t": s_minus_b})
    _mark_rows(sh, first, last, len(cols), cols.index("out_of_tolerance") + 1, cols.index("significant") + 1)
    tr = last + 2
    sums = {cols.index(c) + 1: (first, last, _sum(p[c])) for c in ("book_t", "survey_t", "variance_t")}
    _total_row(sh, tr, "Total", sums, {k: _fmt_for(cols[k - 1]) for k in sums})
    sh.formula(tr, cols.index("survey_minus_book_t") + 1, f"={L['survey_t']}{tr}-{L['book_t']}{tr}",
               _sum(p["survey_t"]) - _sum(p["book_t"]), _FMT_T_SIGNED, bold=True, fill=_TOTAL_FILL, total=True)
    sh.fixed[1] = max(sh._width(1), 12)
    sh.fit()
    ncols = len(cols)
    sh.note(tr + 2, SIGN_CONVENTION, ncols)
    sh.note(tr + 3, VARIANCE_SIGMA_IN_WORDS, ncols)
    sh.note(tr + 4, ("quadrature_sigma_t, shared_sigma_t, variance_2sigma_t, tolerance_t and "
                     "survey_minus_book_t are formulas; significant: |variance| > k x variance_sigma_t; "
                     "out_of_tolerance: |variance| > tolerance_t (tolerance_pct x |book|)."), ncols)


_MOVEMENT_SHEET_COLUMNS = [
    "kind", "reference", "time_utc", "time_local", "pile_id", "tonnes", "scale_id", "counted",
    "before_survey", "note", "source", "line",
]


def _movements_sheet(book: _Book, result: CloseResult) -> None:
    sh = book.sheet("Movements")
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
    sh.header(1, cols)
    for i, row in enumerate(mv[cols].itertuples(index=False, name=None), start=2):
        for j, (c, v) in enumerate(zip(cols, row), start=1):
            sh.put(i, j, v, _fmt_for(c), tz if c == "time_local" else None)
    first, last = 2, 1 + len(mv)
    sh.ws.freeze_panes(1, 0)
    sh.ws.autofilter(0, 0, max(last, 1) - 1, len(cols) - 1)
    sh.ws.repeat_rows(0)
    t, k, b = (_col(cols.index(c) + 1) for c in ("tonnes", "counted", "before_survey"))
    lo, hi = first, max(last, first)
    counted = [_cell_value(x) is True for x in mv["counted"]]
    before = [_cell_value(x) is True for x in mv["before_survey"]]
    tonnes = [_num(x) or 0.0 for x in mv["tonnes"]]
    r = last + 2
    tcol = cols.index("tonnes") + 1
    sh.put(r, 1, "Net counted (t)", bold=True)
    sh.formula(r, tcol, f"=SUMIFS({t}{lo}:{t}{hi},{k}{lo}:{k}{hi},TRUE)",
               float(sum(x for x, c in zip(tonnes, counted) if c)), _FMT_T_SIGNED, bold=True)
    sh.put(r + 1, 1, "Net counted up to the survey (t)", bold=True)
    sh.formula(r + 1, tcol, f"=SUMIFS({t}{lo}:{t}{hi},{k}{lo}:{k}{hi},TRUE,{b}{lo}:{b}{hi},TRUE)",
               float(sum(x for x, c, bb in zip(tonnes, counted, before) if c and bb)), _FMT_T_SIGNED, bold=True)
    sh.fixed[1] = max(sh._width(1), 12)
    sh.fit()
    sh.note(r + 3, f"Times: time_utc in UTC, time_local in {result.timezone}. "
                   "tonnes: + into the pile, - out of it.", len(cols))


def _journal_sheet(book: _Book, result: CloseResult) -> None:
    sh = book.sheet("Journal")
    j = posting_journal(result)
    cols = list(POSTING_COLUMNS)
    first, last = _table(sh, j, cols, freeze=(1, 5), wrap={"reason": 60})
    q, v, s, code = (_col(cols.index(c) + 1) for c in ("quantity_t", "value", "status", "reason_code"))
    lo, hi = first, max(last, first)
    not_transfer = j["reason_code"] != "TRANSFER"
    rows = [
        ("Posted to book stock (adjustment and residual lines)", "post", _FMT_T_SIGNED),
        ("Held, not posted (adjustment and residual lines)", "hold", _FMT_T_SIGNED),
    ]
    r = last + 2
    qcol, vcol = cols.index("quantity_t") + 1, cols.index("value") + 1
    for label, status, fmt in rows:
        sel = (j["status"] == status) & not_transfer
        sh.put(r, 1, label, bold=True)
        crit = f'{s}{lo}:{s}{hi},"{status}",{code}{lo}:{code}{hi},"<>TRANSFER"'
        sh.formula(r, qcol, f"=SUMIFS({q}{lo}:{q}{hi},{crit})", _sum(j.loc[sel, "quantity_t"]), fmt, bold=True)
        sh.formula(r, vcol, f"=SUMIFS({v}{lo}:{v}{hi},{crit})", _sum(j.loc[sel, "value"]), _FMT_MONEY, bold=True)
        r += 1
    sel = (j["status"] == "post") & ~not_transfer
    sh.put(r, 1, "Transfers proposed and posted (pile to pile, net zero)", bold=True)
    sh.formula(r, qcol, f'=SUMIFS({q}{lo}:{q}{hi},{s}{lo}:{s}{hi},"post",{code}{lo}:{code}{hi},"TRANSFER")',
               _sum(j.loc[sel, "quantity_t"]), _FMT_T, bold=True)
    sh.fixed[1] = max(sh._width(1), 10)
    sh.fit()
    ncols = len(cols)
    r += 2
    for text in (
        "quantity_t: + increases the pile's book stock, - decreases it; a TRANSFER line moves "
        "quantity_t from pile_id to to_pile_id. Lines with status hold are listed, not posted: "
        "the policy (site.toml [reconcile] adjust, hold_unexplained) does not post them.",
        "value = quantity_t x unit_cost (materials.csv unit_cost, in currency); account and location "
        "codes from site.toml [journal]. posting_date is the last day of the period.",
    ):
        sh.note(r, text, ncols)
        r += 1
    if result.reason_codes:
        r += 1
        sh.put(r, 1, "Reason codes", bold=True)
        for c, meaning in result.reason_codes.items():
            r += 1
            sh.put(r, 1, c)
            sh.put(r, 2, meaning)


_LISTS = (list, tuple, set, np.ndarray)

#: Tables of totals whose sheet gets a ``variance_z`` formula column after ``variance_sigma_t``
#: and the note :data:`TOTAL_SIGMA_IN_WORDS` under the table.
_TOTALS_TABLES = ("Site totals", "Materials")


def _z_value(var: Any, sigma: Any) -> float | None:
    """``var / sigma`` as the sheet's formula gives it: None (a blank) when either is not a
    number or the sigma is 0."""
    v, s = _num(var), _num(sigma)
    if v is None or s is None or s == 0:
        return None
    return v / s


def _extra_sheets(book: _Book, result: CloseResult) -> dict[str, list[str]]:
    """One sheet per further table of the close (belt split, measured change, materials);
    returns their columns by sheet title (for the Columns sheet)."""
    out: dict[str, list[str]] = {}
    for title, frame in (result.tables or {}).items():
        if frame is None:
            continue
        sh = book.sheet(str(title)[:31])
        if not len(frame.columns):
            sh.put(1, 1, "Nothing this period.")
            continue
        shown = _as_fraction(frame.rename(columns=str))
        for col in shown.columns:  # lists and sets (e.g. pile ids) as plain text
            # a plain loop: Series.any() refuses an empty (or any) datetime column
            if any(isinstance(v, _LISTS) for v in shown[col]):
                shown[col] = shown[col].map(lambda v: ", ".join(map(str, v)) if isinstance(v, _LISTS) else v)
        cols = list(shown.columns)
        computed = {}
        totals = str(title) in _TOTALS_TABLES and {"variance_t", "variance_sigma_t"} <= set(cols)
        if totals and "variance_z" not in cols:
            # the variance in sigmas, as a formula beside its two figures
            cols.insert(cols.index("variance_sigma_t") + 1, "variance_z")
            lv, ls = _col(cols.index("variance_t") + 1), _col(cols.index("variance_sigma_t") + 1)
            computed["variance_z"] = lambda i, v, lv=lv, ls=ls: (
                f'=IF(AND(ISNUMBER({lv}{i}),ISNUMBER({ls}{i})),IF({ls}{i}=0,"",{lv}{i}/{ls}{i}),"")',
                _z_value(v.get("variance_t"), v.get("variance_sigma_t")))
        first, last = _table(sh, shown, cols, tz=ZoneInfo(result.timezone) if result.timezone else None,
                             computed=computed)
        _mark_rows(sh, first, last, len(cols),
                   cols.index("out_of_tolerance") + 1 if "out_of_tolerance" in cols else None,
                   cols.index("significant") + 1 if "significant" in cols else None)
        sh.fit()
        if totals:
            sh.note(last + 2, TOTAL_SIGMA_IN_WORDS, len(cols))
        out[str(title)[:31]] = cols
    return out


def _scales_sheet(book: _Book, result: CloseResult) -> None:
    sh = book.sheet("Scales")
    sd = result.scale_diagnostics
    if sd is None:
        sd = pd.DataFrame(columns=SCALE_COLUMNS)
    sd = _as_fraction(sd.reindex(columns=SCALE_COLUMNS))
    sd["piles"] = sd["piles"].map(lambda v: ", ".join(map(str, v)) if isinstance(v, _LISTS) else v)
    _table(sh, sd, SCALE_COLUMNS, formats={"piles": None}, wrap={"message": 60, "piles": 24})
    _mark_rows(sh, 2, 1 + len(sd), len(SCALE_COLUMNS), SCALE_COLUMNS.index("flagged") + 1, None)
    sh.fit()


_DUPLICATE_COLUMNS = ["reference", "kind", "detail"]


def _duplicate_columns(result: CloseResult) -> list[str]:
    d = result.duplicates
    if d is None or not len(d.columns):
        return list(_DUPLICATE_COLUMNS)
    return [c for c in _DUPLICATE_COLUMNS if c in d.columns] + [c for c in d.columns if c not in _DUPLICATE_COLUMNS]


def _duplicates_sheet(book: _Book, result: CloseResult) -> None:
    sh = book.sheet("Duplicates")
    d = result.duplicates
    cols = _duplicate_columns(result)
    if d is None or not len(d.columns):
        d = pd.DataFrame(columns=cols)
    _table(sh, d, cols, wrap={"detail": 60})
    sh.fit()


#: Columns of the Run sheet, which are not output columns of the close (see
#: :data:`inventory.model.columns.FIELDS` for those): column -> (title, meaning).
_RUN_FIELDS: dict[str, tuple[str, str]] = {
    "fact": ("Fact", "Name of a fact of the run (dotted: section.key), or an input file."),
    "value": ("Value", "Its value: a parameter, a version, a timing in seconds, or the file's SHA-256."),
}


def _unit_words(col: str) -> str:
    if col.endswith("_pct") or col in ("scanned_fraction", "share"):
        return "% (stored as a fraction: 0.025 shows as 2.5 %)"
    if col in ("unit_cost",):
        return "currency per tonne"
    if col == "value":
        return "currency (column currency)"
    if col.endswith("_s"):
        return "s (seconds)"
    if col.endswith("_z"):
        return "sigma (the variance divided by its 1 sigma)"
    u = unit_of(col)
    return f"{u[0]} ({u[1]})" if u else ""


def _columns_sheet(book: _Book, tables: list[tuple[str, list[str]]]) -> None:
    sh = book.sheet("Columns")
    cols = ["sheet", "column", "unit", "meaning"]
    rows = []
    for sheet, names in tables:
        fields = _RUN_FIELDS if sheet == "Run" else FIELDS
        for name in names:
            title, meaning = fields.get(name, ("", ""))
            rows.append({"sheet": sheet, "column": name, "unit": "" if sheet == "Run" else _unit_words(name),
                         "meaning": f"{title}: {meaning}" if title else meaning})
    _table(sh, pd.DataFrame(rows, columns=cols), cols, wrap={"meaning": 80, "unit": 24})
    sh.fit()


def _flatten(prefix: str, value: Any, out: list[tuple[str, Any]]) -> None:
    if isinstance(value, Mapping):
        for k in sorted(value, key=str):
            _flatten(f"{prefix}.{k}" if prefix else str(k), value[k], out)
    elif isinstance(value, (list, tuple)):
        out.append((prefix, ", ".join(map(str, value))))
    else:
        out.append((prefix, value if isinstance(value, (int, float, str, bool)) or value is None
                    else str(value)))


def _run_sheet(book: _Book, result: CloseResult) -> None:
    from inventory.export.manifest import manifest_dict

    sh = book.sheet("Run", landscape=False)
    facts = manifest_dict(result)
    inputs = facts.pop("inputs", {})
    sh.header(1, ["fact", "value"])
    rows: list[tuple[str, Any]] = []
    _flatten("", facts, rows)
    wrap = book.fmt(None, wrap=True, left=True)
    r = 2
    for key, value in rows:
        sh.put(r, 1, key, valign_top=True)
        if isinstance(value, str):
            sh.put(r, 2, value, wrap=True, left=True)
        else:
            sh.put(r, 2, value, _FMT_SECONDS if key.startswith("timings_s.") else None, left=True)
        r += 1
    last_fact = r - 1
    r += 1
    sh.put(r, 1, "input file", bold=True)
    sh.put(r, 2, "sha256", bold=True)
    for path, digest in inputs.items():
        r += 1
        sh.put(r, 1, path, valign_top=True)
        sh.put(r, 2, digest, wrap=True, left=True)
    sh.ws.freeze_panes(1, 0)
    sh.ws.autofilter(0, 0, last_fact - 1, 1)
    sh.ws.repeat_rows(0)
    # names and values side by side on one page width: the value column wraps
    sh.fixed[1] = min(max(sh._width(1), 12), 40)
    sh.fixed[2] = 70
    sh.fit()
    sh.ws.set_column(1, 1, 70, wrap)


def _summary_sheet(sh: _Sheet, result: CloseResult, refs: Mapping[str, Any], journal: pd.DataFrame,
                   extra: Mapping[str, list[str]] | None = None) -> None:
    """The Summary, into the sheet made first (so it is the first tab) and written last (it
    refers to the other sheets' totals). ``extra``: the columns of the further sheets (the
    sigma lines refer to the ``Site totals`` sheet's cells)."""
    ws = sh.ws
    ws.fit_to_pages(1, 1)
    sh.fixed[1], sh.fixed[2], sh.fixed[3], sh.fixed[4] = 44, 22, 22, 22
    sh.put(1, 1, f"Stock close {result.period}: {result.site_name}", bold=True, size=14)
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
        ("Ledger close", result.close_id if result.close_id is not None else "not recorded", _FMT_INT),
        ("Closed at (UTC)", result.closed_utc or "not recorded", None),
        ("Status", close_status_text(result), None),
    ]
    r = 3
    for label, value, fmt in facts:
        sh.put(r, 1, label, bold=True)
        sh.put(r, 2, value, fmt, left=True)
        r += 1
    r += 1
    sh.put(r, 1, "Stock bridge (formulas over the Piles sheet)", bold=True)
    r += 1
    rows: dict[str, int] = {}

    def line(key: str, label: str, formula: str, value: Any, fmt: str, bold: bool = False) -> None:
        nonlocal r
        sh.put(r, 1, label, bold=bold)
        sh.formula(r, 2, formula, value, fmt, bold=bold, left=True)
        rows[key] = r
        r += 1

    book_ref, book_v = refs["book_t"]
    adj_ref, adj_v = refs["adjustment_t"]
    surv_ref, surv_v = refs["survey_t"]
    after_ref, after_v = refs["after_survey_net_t"]
    close_ref, close_v = refs["closing_t"]
    line("book", "Book stock at survey", f"={book_ref}", book_v, _FMT_T)
    line("adj", "+ Adjustments posted", f"={adj_ref}", adj_v, _FMT_T_SIGNED)
    adjusted = book_v + adj_v
    line("adjusted", "= Book stock after adjustments", f"=B{rows['book']}+B{rows['adj']}", adjusted, _FMT_T, True)
    line("survey", "Survey stock", f"={surv_ref}", surv_v, _FMT_T)
    line("left", "Left at book (held lines, midpoint, piles not surveyed)",
         f"=B{rows['adjusted']}-B{rows['survey']}", adjusted - surv_v, _FMT_T_SIGNED)
    line("after", "+ Net movements after the survey", f"={after_ref}", after_v, _FMT_T_SIGNED)
    line("closing", "= Closing stock", f"=B{rows['adjusted']}+B{rows['after']}", adjusted + after_v, _FMT_T, True)
    line("closing_piles", "Closing stock, Piles sheet total (check)", f"={close_ref}", close_v, _FMT_T)
    r += 1
    sh.put(r, 1, "Variance", bold=True)
    r += 1
    var_ref, var_v = refs["variance_t"]
    pct_ref, pct_v = refs["variance_pct"]
    line("var", "Variance (survey - book)", f"={var_ref}", var_v, _FMT_T_SIGNED)
    line("var_pct", "Variance, share of book", f"={pct_ref}", pct_v, _FMT_PCT_SIGNED)
    oot_ref, oot_n = refs["out_of_tolerance"]
    sig_ref, sig_n = refs["significant"]
    line("oot", "Piles out of tolerance", f"=COUNTIF({oot_ref},TRUE)", oot_n, _FMT_INT)
    line("sig", "Piles with a significant variance", f"=COUNTIF({sig_ref},TRUE)", sig_n, _FMT_INT)
    held = journal[(journal["status"] == "hold")]
    line("held", "Journal lines held, not posted", f'=COUNTIF(Journal!${_col(POSTING_COLUMNS.index("status") + 1)}:'
         f'${_col(POSTING_COLUMNS.index("status") + 1)},"hold")', int(len(held)), _FMT_INT)
    r += 1
    # the totals' 1 sigma, shared errors counted once (inventory.stock.totals.close_sigmas), as
    # formulas over the Site totals sheet; the piles' sigmas in quadrature beside them
    sh.put(r, 1, "Uncertainty of the totals (surveyed piles)", bold=True)
    r += 1
    tot = (result.tables or {}).get("Site totals")
    tcols = (extra or {}).get("Site totals") or []
    if tot is not None and len(tot) and {"survey_sigma_t", "book_sigma_t", "variance_t",
                                         "variance_sigma_t", "variance_z"} <= set(tcols):
        t0 = tot.iloc[0]

        def ref(c: str) -> str:
            return f"='Site totals'!${_col(tcols.index(c) + 1)}$2"

        line("survey_sigma", "Survey stock, 1 sigma", ref("survey_sigma_t"), t0["survey_sigma_t"], _FMT_T)
        line("book_sigma", "Book stock, 1 sigma", ref("book_sigma_t"), t0["book_sigma_t"], _FMT_T)
        line("var_sigma", "Variance, 1 sigma (shared density, floor and scale errors counted once)",
             ref("variance_sigma_t"), t0["variance_sigma_t"], _FMT_T)
        line("var_z", "Variance in sigmas (z = variance / its 1 sigma)", ref("variance_z"),
             _z_value(t0["variance_t"], t0["variance_sigma_t"]), _FMT_Z)
        q_formula, q_v = refs["variance_sigma_quadrature"]
        line("var_quad", "Variance, 1 sigma if every pile erred on its own (pile sigmas in quadrature)",
             q_formula, q_v, _FMT_T)
        sh.note(r, TOTAL_SIGMA_IN_WORDS, 4, col=1)
    else:
        sh.put(r, 1, "1 sigma of the totals")
        sh.put(r, 2, "not computed for this close (no Site totals table)", left=True)
    r += 2
    sh.fit()
    sh.put(r, 1, "Sign convention", bold=True, valign_top=True)
    sh.note(r, SIGN_CONVENTION.removeprefix("Sign convention: "), 4, col=2)
    r += 2
    sh.put(r, 1, "Legend", bold=True)
    r += 1
    for fill, text in ((FILL_OUT_OF_TOLERANCE, ROW_LEGEND["out_of_tolerance"]),
                       (FILL_SIGNIFICANT, ROW_LEGEND["significant"])):
        sh.put(r, 1, "row colour", fill=fill)
        sh.put(r, 2, text)
        r += 1
    r += 1
    sh.put(r, 1, "Cautions", bold=True, valign_top=True)
    for text in CAUTIONS:
        sh.note(r, text, 4, col=2)
        r += 1
    ws.activate()


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
    dest = Path(path)
    # Excel allows 255 characters in a page header, the superseded mark included
    site = result.site_name if len(result.site_name) <= 40 else result.site_name[:39] + "…"
    header = _hf(f"{site}, close {result.period}. {close_status_text(result)}")
    journal = posting_journal(result)
    with atomic_path(dest) as tmp:
        book = _Book(tmp, header)
        # Summary first in the tab order, written last (it refers to the others' totals)
        summary_ws = book.sheet("Summary", landscape=False)
        refs = _piles_sheet(book, result)
        _variance_sheet(book, result)
        _movements_sheet(book, result)
        _journal_sheet(book, result)
        _scales_sheet(book, result)
        _duplicates_sheet(book, result)
        extra = _extra_sheets(book, result)
        tables = [("Piles", list(PILE_COLUMNS)), ("Variance", list(_VARIANCE_COLUMNS)),
                  ("Movements", list(_MOVEMENT_SHEET_COLUMNS)), ("Journal", list(POSTING_COLUMNS)),
                  ("Scales", list(SCALE_COLUMNS)), ("Duplicates", _duplicate_columns(result)),
                  *extra.items(), ("Run", ["fact", "value"])]
        _columns_sheet(book, tables)
        _run_sheet(book, result)
        _summary_sheet(summary_ws, result, refs, journal, extra)
        book.wb.set_properties({
            "title": f"Stock close {result.period}", "subject": result.site_name,
            "author": "inventory", "comments": close_status_text(result),
            # fixed stamp: the same close gives the same workbook content
            "created": _stamp(result),
        })
        book.wb.close()
    return dest


def _stamp(result: CloseResult) -> datetime:
    instant = result.survey_instant
    if isinstance(instant, datetime):
        if instant.tzinfo is not None:
            instant = instant.astimezone(timezone.utc).replace(tzinfo=None)
        return instant.replace(microsecond=0)
    return datetime(2000, 1, 1)


# -- history ------------------------------------------------------------------------------------

def _variance_chart(book: _Book, sh: _Sheet, piles: int, periods: int) -> None:
    """A line chart of each pile's variance by month, from the ``By month`` cells (one
    series per pile row), placed below the table."""
    chart = book.wb.add_chart({"type": "line"})
    name = sh.ws.get_name()
    for i in range(1, piles + 1):
        chart.add_series({"name": [name, i, 0], "categories": [name, 0, 1, 0, periods],
                          "values": [name, i, 1, i, periods], "marker": {"type": "circle"}})
    chart.set_title({"name": "Variance per pile by month (t, survey - book)"})
    chart.set_y_axis({"name": "variance (t)"})
    chart.set_x_axis({"name": "period"})
    chart.set_size({"width": 680, "height": 300})
    sh.ws.insert_chart(f"A{piles + 4}", chart)


def write_tables_workbook(
    sheets: Iterable[tuple[str, pd.DataFrame, str, str | None]],
    about: Mapping[str, Any],
    title: str,
    path: str | Path,
) -> Path:
    """A plain workbook of tables, then an ``About`` sheet of facts and the cautions.

    Each of ``sheets`` is ``(sheet title, frame, text shown when the frame is empty, note
    under the table or None)``; a table has its header row frozen and filtered and each
    number its unit's format (from the column name). Written under a temporary name and
    renamed when complete.
    """
    dest = Path(path)
    with atomic_path(dest) as tmp:
        book = _Book(tmp, title)
        for name, frame, empty_text, note in sheets:
            sh = book.sheet(name)
            frame = frame.rename(columns=str)
            _, last = _table(sh, frame, list(frame.columns), freeze=(1, 1))
            if not len(frame) and empty_text:
                sh.put(2, 1, empty_text)
            if note:
                sh.put(last + 2, 1, note)
            sh.fit()
        ab = book.sheet("About", landscape=False)
        row = 1
        for key, value in about.items():
            ab.put(row, 1, str(key), bold=True)
            ab.put(row, 2, value)
            row += 1
        for text in CAUTIONS:
            ab.put(row + 1, 1, text)
            row += 1
        ab.fixed[1], ab.fixed[2] = 24, 60
        ab.fit()
        book.wb.set_properties({"title": title, "author": "inventory"})
        book.wb.close()
    return dest


def write_history_workbook(df: pd.DataFrame, path: str | Path, totals: pd.DataFrame | None = None,
                           by: str | None = None) -> Path:
    """Write ``inventory history`` as a workbook for finance.

    Sheets: ``History`` (the rows as given, with number formats, filters and the row marks),
    ``By month`` (variance tonnes, pile x period, with SUM formulas and their values for row
    and column totals, and a line chart of each pile's variance by month), ``Totals by <by>``
    when ``totals`` is given, and ``Notes`` (sign convention, legend, the percent convention).

    Parameters
    ----------
    df : DataFrame
        As returned by :meth:`inventory.ledger.store.Ledger.history`.
    path : str or Path
    totals : DataFrame, optional
        Totals of the same rows by a group (``inventory.ledger.history.aggregate_history``).
    by : str, optional
        What ``totals`` is grouped by (names its sheet).

    Returns
    -------
    Path
    """
    dest = Path(path)
    cols = [str(c) for c in df.columns]
    frame = _as_fraction(df.rename(columns=str))
    with atomic_path(dest) as tmp:
        book = _Book(tmp, "Stock history from the ledger")
        sh = book.sheet("History")
        first, last = _table(sh, frame, cols, freeze=(1, 2) if "pile_id" in cols else (1, 0))
        _mark_rows(sh, first, last, len(cols),
                   cols.index("out_of_tolerance") + 1 if "out_of_tolerance" in cols else None,
                   cols.index("significant") + 1 if "significant" in cols else None)
        sh.fit()

        pv = book.sheet("By month")
        if {"period", "pile_id", "variance_t"} <= set(cols) and len(df):
            adopted = df[df["status"] == "adopted"] if "status" in cols else df
            table = adopted.pivot_table(index="pile_id", columns="period", values="variance_t",
                                        aggfunc="sum", sort=True)
            periods = list(table.columns)
            pv.header(1, ["pile_id", *periods, "Total"])
            n = len(table)
            tcol = 2 + len(periods)
            for i, (pile, row) in enumerate(table.iterrows(), start=2):
                pv.put(i, 1, pile)
                for j, per in enumerate(periods, start=2):
                    pv.put(i, j, row[per], _FMT_T_SIGNED)
                pv.formula(i, tcol, f"=SUM(B{i}:{_col(tcol - 1)}{i})", _sum(row[p] for p in periods),
                           _FMT_T_SIGNED)
            sums = {j: (2, 1 + n, _sum(table[periods[j - 2]])) for j in range(2, tcol)}
            sums[tcol] = (2, 1 + n, _sum(_sum(row[p] for p in periods) for _, row in table.iterrows()))
            _total_row(pv, n + 2, "Total", sums, {j: _FMT_T_SIGNED for j in sums})
            pv.ws.freeze_panes(1, 1)
            pv.ws.autofilter(0, 0, n, tcol - 1)
            pv.ws.repeat_rows(0)
            pv.fit()
            _variance_chart(book, pv, n, len(periods))
        else:
            pv.put(1, 1, "No closed periods match.")

        if totals is not None:
            ts = book.sheet(f"Totals by {by or 'group'}"[:31])
            shown = _as_fraction(totals.rename(columns=str))
            tcols = list(shown.columns)
            _table(ts, shown, tcols, freeze=(1, 1))
            ts.fit()

        notes = book.sheet("Notes", landscape=False)
        notes.fixed[1], notes.fixed[2] = 14, 90
        notes.fit()
        notes.put(1, 1, "Variance history from the ledger (adopted closes unless status says otherwise)",
                  bold=True)
        notes.note(3, SIGN_CONVENTION, 2)
        notes.note(4, "Percentages (_pct columns) are stored as fractions and shown with the % format: "
                      "0.025 shows as 2.5 %. The ledger keeps them in percent points.", 2)
        notes.put(5, 1, "Legend", bold=True)
        notes.put(6, 1, "row colour", fill=FILL_OUT_OF_TOLERANCE)
        notes.put(6, 2, ROW_LEGEND["out_of_tolerance"])
        notes.put(7, 1, "row colour", fill=FILL_SIGNIFICANT)
        notes.put(7, 2, ROW_LEGEND["significant"])
        for i, text in enumerate(CAUTIONS, start=9):
            notes.note(i, text, 2)
        book.wb.close()
    return dest
