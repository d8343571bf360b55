"""The close workbook: same numbers as the ledger, live formulas with stored values, formats,
the posting journal, the column dictionary, print set-up; LibreOffice recalculates the same."""

from __future__ import annotations

import csv
import math
import shutil
import subprocess
from datetime import datetime

import numpy as np
import pandas as pd
import pytest

from inventory.export.workbook import (
    FILL_OUT_OF_TOLERANCE,
    FILL_SIGNIFICANT,
    SHEETS,
    write_history_workbook,
    write_workbook,
)
from inventory.ledger.store import Ledger
from inventory.model.results import PILE_COLUMNS

INPUTS = {"piles.gpkg": "b" * 64}


@pytest.fixture
def result(make_close_result):
    return make_close_result("2026-01")


@pytest.fixture
def book(result, tmp_path):
    from openpyxl import load_workbook

    path = write_workbook(result, tmp_path / "variance-2026-01.xlsx")
    return load_workbook(path), path


def _pile_rows(ws, n):
    header = [c.value for c in ws[1]]
    rows = [[c.value for c in ws[i]] for i in range(2, 2 + n)]
    return header, rows


def _same(expected, got, col=""):
    """Exact equality; a NaN figure is an empty cell; a percentage is stored as a fraction."""
    if isinstance(expected, (float, np.floating)) and math.isnan(expected):
        return got is None
    if isinstance(expected, (bool, np.bool_)):
        return got is bool(expected)
    if expected == "" and got is None:
        return True
    if col.endswith("_pct"):
        return got == float(expected) / 100.0
    return expected == got


def test_sheets_and_pile_figures_exactly(book, result):
    wb, _ = book
    assert tuple(wb.sheetnames) == SHEETS
    header, rows = _pile_rows(wb["Piles"], len(result.piles))
    assert header == PILE_COLUMNS
    for exp, got in zip(result.piles[PILE_COLUMNS].itertuples(index=False), rows):
        for col, e, g in zip(PILE_COLUMNS, exp, got):
            assert _same(e, g, col), (col, e, g)


def test_workbook_holds_the_ledger_numbers(result, tmp_path):
    from openpyxl import load_workbook

    with Ledger(tmp_path / "ledger.sqlite") as led:
        led.record_close(result, INPUTS, "0.1.0")
        stored = led.adopted("2026-01")
    ws = load_workbook(write_workbook(result, tmp_path / "w.xlsx"))["Piles"]
    _, rows = _pile_rows(ws, len(stored))
    for exp, got in zip(stored.itertuples(index=False), rows):
        for col, e, g in zip(PILE_COLUMNS, exp, got):
            if e is None:
                e = float("nan") if col not in ("flags",) else ""
            assert _same(e, g, col), (col, e, g)


def test_totals_are_live_formulas(book, result):
    wb, _ = book
    ws = wb["Piles"]
    n = len(result.piles)
    total_row = n + 3
    assert ws.cell(row=total_row, column=1).value == "Total"
    col = PILE_COLUMNS.index("book_t") + 1
    from openpyxl.utils import get_column_letter

    L = get_column_letter(col)
    assert ws.cell(row=total_row, column=col).value == f"=SUM({L}2:{L}{n + 1})"
    summary = [str(c.value) for row in wb["Summary"].iter_rows() for c in row if c.value]
    assert any(v.startswith("=Piles!$") for v in summary)
    assert any(v.startswith("=COUNTIF(Piles!") for v in summary)
    var = wb["Variance"]
    assert str(var["Q2"].value).startswith("=E2-C2")  # survey - book, re-checkable
    jr = wb["Journal"]
    assert any(str(c.value).startswith("=SUMIFS(H2:H") for row in jr.iter_rows() for c in row)


def test_every_formula_cell_carries_its_value(book, result):
    """pandas and openpyxl (data_only) read numbers where a spreadsheet has formulas."""
    from openpyxl import load_workbook

    wb, path = book
    values = load_workbook(path, data_only=True)
    n = len(result.piles)
    formulas = 0
    for ws in wb.worksheets:
        for row in ws.iter_rows():
            for c in row:
                if isinstance(c.value, str) and c.value.startswith("=") and c.data_type == "f":
                    formulas += 1
                    v = values[ws.title][c.coordinate].value
                    assert v is not None or "IF(" in c.value, (ws.title, c.coordinate, c.value)
    assert formulas > 3 * n
    piles = pd.read_excel(path, sheet_name="Piles")
    total = piles[piles["pile_id"] == "Total"].iloc[0]
    for col in ("book_t", "survey_t", "variance_t", "adjustment_t", "after_survey_net_t", "closing_t"):
        assert total[col] == pytest.approx(result.piles[col].sum(), rel=1e-12), col
    assert total["variance_pct"] == pytest.approx(
        result.piles.variance_t.sum() / result.piles.book_t.sum(), rel=1e-12)
    summary = pd.read_excel(path, sheet_name="Summary", header=None, index_col=0)[1]
    p = result.piles
    assert summary["Book stock at survey"] == pytest.approx(p.book_t.sum(), rel=1e-12)
    assert summary["+ Adjustments posted"] == pytest.approx(p.adjustment_t.sum(), rel=1e-12)
    adjusted = p.book_t.sum() + p.adjustment_t.sum()
    assert summary["= Book stock after adjustments"] == pytest.approx(adjusted, rel=1e-12)
    assert summary["Survey stock"] == pytest.approx(p.survey_t.sum(), rel=1e-12)
    assert summary["Left at book (held lines, midpoint, piles not surveyed)"] == pytest.approx(
        adjusted - p.survey_t.sum(), rel=1e-9)
    assert summary["+ Net movements after the survey"] == pytest.approx(p.after_survey_net_t.sum())
    assert summary["= Closing stock"] == pytest.approx(p.closing_t.sum(), rel=1e-12)
    assert summary["Closing stock, Piles sheet total (check)"] == pytest.approx(p.closing_t.sum(), rel=1e-12)
    assert summary["Piles out of tolerance"] == int(p.out_of_tolerance.sum())


def test_variance_sigma_is_shown_with_its_parts(make_close_result, tmp_path):
    from openpyxl import load_workbook

    from inventory.export.workbook import VARIANCE_SIGMA_IN_WORDS

    res = make_close_result("2026-01")
    # a pile whose opening was a survey: book 41.50 t, survey 27.46 t, variance sigma 15.48 t
    res.piles.loc[0, ["book_sigma_t", "survey_sigma_t", "variance_sigma_t"]] = [41.50, 27.46, 15.48]
    path = write_workbook(res, tmp_path / "w.xlsx")
    ws = load_workbook(path, data_only=True)["Variance"]
    head = [c.value for c in ws[1]]
    row = {h: ws.cell(row=2, column=j + 1).value for j, h in enumerate(head)}
    assert row["quadrature_sigma_t"] == pytest.approx(math.hypot(41.50, 27.46))     # 49.76 t
    assert row["shared_sigma_t"] == pytest.approx(math.sqrt(41.50 ** 2 + 27.46 ** 2 - 15.48 ** 2))
    assert row["quadrature_sigma_t"] ** 2 - row["shared_sigma_t"] ** 2 == pytest.approx(15.48 ** 2)
    assert row["variance_2sigma_t"] == pytest.approx(2 * 15.48)
    texts = [c.value for r in ws.iter_rows() for c in r if isinstance(c.value, str)]
    assert VARIANCE_SIGMA_IN_WORDS in texts


def test_posting_journal_sheet(make_close_result, tmp_path):
    from openpyxl import load_workbook

    from inventory.model.results import POSTING_COLUMNS

    res = make_close_result("2026-01")
    res.close_id, res.closed_utc = 7, "2026-02-03T08:00:00+00:00"
    res.posting = pd.DataFrame([
        {"line": 1, "pile_id": "P-COAL-1", "to_pile_id": "P-COAL-2", "material": "coal", "quantity_t": 400.0,
         "unit": "t", "unit_cost": 80.0, "value": 32000.0, "currency": "EUR", "account": "1400",
         "location": "Y1", "to_location": "Y2", "reason_code": "TRANSFER", "reason": "=proposed", "status": "post"},
        {"line": 2, "pile_id": "P-COAL-1", "to_pile_id": None, "material": "coal", "quantity_t": -5.5,
         "unit": "t", "unit_cost": 80.0, "value": -440.0, "currency": "EUR", "account": "1400",
         "location": "Y1", "to_location": None, "reason_code": "TRANSFER_RESIDUAL", "reason": "rest",
         "status": "post"},
        {"line": 3, "pile_id": "P-LIME-1", "to_pile_id": None, "material": "lime", "quantity_t": 12.0,
         "unit": "t", "unit_cost": float("nan"), "value": float("nan"), "currency": "EUR", "account": None,
         "location": None, "to_location": None, "reason_code": "WITHIN_SIGMA", "reason": "noise",
         "status": "hold"},
    ])
    path = write_workbook(res, tmp_path / "w.xlsx")
    wb = load_workbook(path, data_only=True)
    ws = wb["Journal"]
    assert [c.value for c in ws[1]] == POSTING_COLUMNS
    rows = [[c.value for c in ws[i]] for i in (2, 3, 4)]
    line = dict(zip(POSTING_COLUMNS, rows[0]))
    assert line["period"] == "2026-01" and line["close_id"] == 7
    assert line["posting_date"] == datetime(2026, 1, 31)     # the period's last day
    assert line["reason"] == "=proposed" and ws["Q2"].data_type == "s"  # text, never a formula
    assert [r[POSTING_COLUMNS.index("status")] for r in rows] == ["post", "post", "hold"]
    totals = {r[0].value: r[POSTING_COLUMNS.index("quantity_t")].value for r in ws.iter_rows(min_row=6, max_row=8)}
    assert totals["Posted to book stock (adjustment and residual lines)"] == -5.5
    assert totals["Held, not posted (adjustment and residual lines)"] == 12.0
    assert totals["Transfers proposed and posted (pile to pile, net zero)"] == 400.0
    facts = {r[0].value: r[1].value for r in wb["Summary"].iter_rows(min_row=3, max_row=13)}
    assert facts["Ledger close"] == 7 and facts["Closed at (UTC)"] == "2026-02-03T08:00:00+00:00"
    assert facts["Status"] == "Ledger close 7 of 2026-01, recorded 2026-02-03T08:00:00+00:00"
    assert "Ledger close 7" in wb["Piles"].oddHeader.left.text


def test_journal_from_a_plain_result(book, result):
    wb, _ = book
    ws = wb["Journal"]
    n = len(result.journal)
    status = [ws.cell(row=i, column=18).value for i in range(2, 2 + n)]
    assert status == ["post"] * n and ws.cell(row=2, column=3).value is None  # no close id


def test_columns_sheet_explains_every_column(book, result):
    wb, _ = book
    ws = wb["Columns"]
    assert [c.value for c in ws[1]] == ["sheet", "column", "unit", "meaning"]
    listed = {(r[0].value, r[1].value): (r[2].value, r[3].value) for r in ws.iter_rows(min_row=2)}
    for name in ("Piles", "Variance", "Movements", "Journal", "Scales", "Duplicates", "Run"):
        for c in wb[name][1]:
            unit, meaning = listed[(name, c.value)]
            assert meaning, (name, c.value)
    assert listed[("Run", "value")] == (None, "Value: Its value: a parameter, a version, a timing in "
                                              "seconds, or the file's SHA-256.")
    assert listed[("Piles", "book_t")][0] == "t (tonnes)"
    assert listed[("Piles", "variance_pct")][0].startswith("% (stored as a fraction")
    assert listed[("Journal", "value")][0].startswith("currency")


def test_print_setup(book):
    wb, _ = book
    for ws in wb.worksheets:
        assert ws.sheet_properties.pageSetUpPr.fitToPage, ws.title
        assert ws.page_setup.fitToWidth in (None, 1) and ws.page_setup.paperSize in ("9", 9), ws.title
    for name in ("Piles", "Variance", "Movements", "Journal", "Columns", "Run"):
        assert wb[name].print_title_rows == "$1:$1", name
    assert wb["Summary"].page_setup.fitToHeight in (None, 1)
    assert wb["Summary"].page_setup.orientation == "portrait"
    # a long note wraps inside the table's width instead of widening a column
    var = wb["Variance"]
    assert var.column_dimensions["A"].width <= 50
    notes = [c for r in var.iter_rows() for c in r if isinstance(c.value, str) and len(c.value) > 200]
    assert notes and all(c.alignment.wrap_text for c in notes)


def test_frozen_headers_filters_and_formats(book, result):
    wb, _ = book
    ws = wb["Piles"]
    assert ws.freeze_panes == "B2"
    n = len(result.piles)
    from openpyxl.utils import get_column_letter

    assert ws.auto_filter.ref == f"A1:{get_column_letter(len(PILE_COLUMNS))}{n + 1}"
    fmt = {h: ws.cell(row=2, column=j + 1).number_format for j, h in enumerate(PILE_COLUMNS)}
    assert '"t"' in fmt["book_t"] and '"m³"' in fmt["volume_m3"]
    assert fmt["variance_pct"] == "+0.00%;-0.00%;0.00%" and fmt["tolerance_pct"] == "0.00%"
    assert fmt["scanned_fraction"] == "0.0%"
    for name in ("Movements", "Variance", "Journal", "Scales", "Run"):
        assert wb[name].freeze_panes in ("A2", "B2", "F2"), name
        assert wb[name].auto_filter.ref, name
    # widths fit the header at least
    # (a writer stores adjacent columns of one width as one <col min max> range; openpyxl keys
    # the range by its first column, so expand the ranges)
    widths = {}
    for dim in ws.column_dimensions.values():
        for j in range(dim.min or 0, (dim.max or 0) + 1):
            widths[j] = dim.width
    for j, h in enumerate(PILE_COLUMNS, start=1):
        assert widths.get(j, 0) >= len(h), h


def test_rows_are_marked_with_a_legend(book):
    wb, _ = book
    rules = [r for rng in wb["Piles"].conditional_formatting for r in rng.rules]
    fills = {r.dxf.fill.bgColor.rgb for r in rules}
    assert {FILL_OUT_OF_TOLERANCE, FILL_SIGNIFICANT} <= fills
    legend = {c.fill.fgColor.rgb for row in wb["Summary"].iter_rows() for c in row
              if c.value == "row colour"}
    assert legend == {FILL_OUT_OF_TOLERANCE, FILL_SIGNIFICANT}
    text = " ".join(str(c.value) for row in wb["Summary"].iter_rows() for c in row if c.value)
    assert "variance = survey - book" in text
    assert "licensed surveyors" in text


def test_movement_times_and_text_safety(book, result):
    wb, _ = book
    ws = wb["Movements"]
    header = [c.value for c in ws[1]]
    t_utc = header.index("time_utc") + 1
    t_loc = header.index("time_local") + 1
    first = result.movements["time"].iloc[0]
    assert ws.cell(row=2, column=t_utc).value == first.tz_convert("UTC").tz_localize(None)
    # Europe/Berlin is UTC+1 in January (IANA tz database)
    assert (ws.cell(row=2, column=t_loc).value - ws.cell(row=2, column=t_utc).value).seconds == 3600
    note = header.index("note") + 1
    cell = ws.cell(row=7, column=note)
    assert cell.value == "=duplicate of T1004" and cell.data_type == "s"


def test_summary_facts(book, result):
    wb, _ = book
    facts = {r[0].value: r[1].value for r in wb["Summary"].iter_rows(min_row=3, max_row=10)}
    assert facts["Period"] == "2026-01"
    assert facts["Survey instant (UTC)"] == datetime(2026, 1, 28, 11, 0)
    assert facts["Piles"] == 3


def test_nan_and_missing_values_become_empty_cells(make_close_result, tmp_path):
    from openpyxl import load_workbook

    res = make_close_result("2026-01")
    res.piles.loc[0, "variance_pct"] = float("inf")
    res.journal = res.journal.iloc[0:0]
    path = write_workbook(res, tmp_path / "w.xlsx")
    ws = load_workbook(path)["Piles"]
    assert ws.cell(row=2, column=PILE_COLUMNS.index("variance_pct") + 1).value is None
    assert ws.cell(row=3, column=PILE_COLUMNS.index("volume_tin_m3") + 1).value is None


def test_write_replaces_atomically(result, tmp_path, monkeypatch):
    import xlsxwriter

    path = tmp_path / "w.xlsx"
    write_workbook(result, path)
    before = path.read_bytes()

    def boom(self):
        raise OSError("disk full")

    monkeypatch.setattr(xlsxwriter.Workbook, "close", boom)
    with pytest.raises(OSError):
        write_workbook(result, path)
    assert path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["w.xlsx"]


def test_history_workbook(make_close_result, tmp_path):
    from openpyxl import load_workbook

    with Ledger(tmp_path / "ledger.sqlite") as led:
        m1 = make_close_result("2026-01")
        led.record_close(m1, INPUTS, "0.1.0")
        m2 = make_close_result("2026-02", opening=led.opening_for("2026-02"), period_index=1)
        led.record_close(m2, INPUTS, "0.1.0")
        df = led.history()
    wb = load_workbook(write_history_workbook(df, tmp_path / "history.xlsx"))
    assert wb.sheetnames == ["History", "By month", "Notes"]
    ws = wb["History"]
    header = [c.value for c in ws[1]]
    assert header == list(df.columns)
    vi = header.index("variance_t")
    assert [ws.cell(row=i, column=vi + 1).value for i in range(2, 2 + len(df))] == \
        df["variance_t"].tolist()
    pv = wb["By month"]
    assert [c.value for c in pv[1]] == ["pile_id", "2026-01", "2026-02", "Total"]
    assert pv["D2"].value == "=SUM(B2:C2)"
    assert pv.cell(row=2, column=2).value == df[(df.pile_id == pv["A2"].value)
                                                & (df.period == "2026-01")]["variance_t"].iloc[0]
    stored = load_workbook(tmp_path / "history.xlsx", data_only=True)["By month"]
    pile = df[df.pile_id == pv["A2"].value]
    assert stored["D2"].value == pytest.approx(pile["variance_t"].sum(), rel=1e-12)
    # one line per pile in the chart under the table (openpyxl reads the chart back)
    assert len(pv._charts) == 1 and len(pv._charts[0].series) == df["pile_id"].nunique()
    totals = pd.DataFrame({"material": ["coal", "lime", "Total"], "variance_t": [1.5, -2.0, -0.5],
                           "variance_pct": [0.25, -1.0, -0.1]})
    wb2 = load_workbook(write_history_workbook(df, tmp_path / "h2.xlsx", totals, "material"))
    assert wb2.sheetnames == ["History", "By month", "Totals by material", "Notes"]
    ts = wb2["Totals by material"]
    assert [c.value for c in ts[1]] == ["material", "variance_t", "variance_pct"]
    assert [ts.cell(row=i, column=1).value for i in (2, 3, 4)] == ["coal", "lime", "Total"]
    assert ts["C3"].value == -0.01 and ts["C3"].number_format == "+0.00%;-0.00%;0.00%"
    if "variance_pct" in header:   # a percentage as a fraction, like the close workbook
        j = header.index("variance_pct") + 1
        assert ws.cell(row=2, column=j).value == pytest.approx(df["variance_pct"].iloc[0] / 100, rel=1e-15)


# -- LibreOffice, an independent reader -------------------------------------------------------

def _soffice():
    return shutil.which("soffice") or shutil.which("libreoffice")


def _to_csv(xlsx, outdir):
    """Every sheet to CSV with LibreOffice headless.

    Filter options (LibreOffice wiki, "Filter Options" for CSV): 44 = comma, 34 = double
    quote, 76 = UTF-8, 1 = start row, then cell format, language, quoted-as-text=false,
    detect-special-numbers=true, save-as-shown=false (raw values), formulas=false,
    remove-space=false, -1 = all sheets into <name>-<Sheet>.csv (LibreOffice >= 7.2).
    """
    exe = _soffice()
    profile = outdir / "lo-profile"
    cmd = [exe, f"-env:UserInstallation=file://{profile}", "--headless", "--norestore",
           "--convert-to", "csv:Text - txt - csv (StarCalc):44,34,76,1,,0,false,true,false,"
           "false,false,-1", "--outdir", str(outdir), str(xlsx)]
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=240)
    assert proc.returncode == 0, proc.stderr
    sheets = {}
    for name in SHEETS:
        f = outdir / f"{xlsx.stem}-{name}.csv"
        assert f.exists(), (name, proc.stdout, proc.stderr)
        with open(f, newline="", encoding="utf-8") as fh:
            sheets[name] = list(csv.reader(fh))
    return sheets


def _lo_number(text):
    """LibreOffice writes 15 significant digits; a % format still shows as percent."""
    if text.endswith("%"):
        return float(text[:-1]) / 100.0
    return float(text)


@pytest.mark.tools
def test_libreoffice_reads_the_same_numbers(result, tmp_path):
    if not _soffice():
        pytest.skip("LibreOffice (soffice) not installed; `make tools` installs "
                    "libreoffice-calc-nogui when root with apt-get")
    xlsx = write_workbook(result, tmp_path / "variance-2026-01.xlsx")
    sheets = _to_csv(xlsx, tmp_path)
    for name, rows in sheets.items():
        for row in rows:
            for v in row:  # a broken formula shows as Err:nnn or #NAME? in Calc
                assert not v.startswith(("Err:", "#NAME", "#REF", "#VALUE", "#DIV")), (name, v)
    piles = sheets["Piles"]
    assert piles[0] == PILE_COLUMNS
    n = len(result.piles)
    for exp, got in zip(result.piles[PILE_COLUMNS].itertuples(index=False), piles[1:1 + n]):
        for col, e, g in zip(PILE_COLUMNS, exp, got):
            if isinstance(e, (bool, np.bool_)):
                assert g == ("TRUE" if e else "FALSE"), col
            elif isinstance(e, str):
                assert g == e, col
            elif math.isnan(e):
                assert g == "", col
            else:
                # Calc keeps the full double but writes 15 significant digits
                e = float(e) / 100 if col.endswith("_pct") else float(e)
                assert _lo_number(g) == pytest.approx(e, rel=1e-14, abs=1e-13), col
    # the totals row is computed by Calc itself from the formulas
    total = piles[n + 2]
    assert total[0] == "Total"
    for col in ("book_t", "survey_t", "variance_t", "adjustment_t", "closing_t"):
        j = PILE_COLUMNS.index(col)
        assert float(total[j]) == pytest.approx(result.piles[col].sum(), rel=1e-12), col
    summary = {r[0]: r[1] for r in sheets["Summary"] if len(r) >= 2 and r[0]}
    assert int(summary["Piles out of tolerance"]) == int(result.piles.out_of_tolerance.sum())
    assert int(summary["Piles with a significant variance"]) == int(result.piles.significant.sum())
    assert float(summary["Variance (survey - book)"]) == pytest.approx(
        result.piles.variance_t.sum(), rel=1e-12)
    var = sheets["Variance"]
    sb = var[0].index("survey_minus_book_t")
    for i, r in enumerate(result.piles.itertuples(index=False), start=1):
        assert float(var[i][sb]) == pytest.approx(r.survey_t - r.book_t, rel=1e-12, abs=1e-9)
    # every value the writer stored beside a formula is what Calc computes from the formula
    from openpyxl import load_workbook

    formulas, stored = load_workbook(xlsx), load_workbook(xlsx, data_only=True)
    checked = 0
    for ws in formulas.worksheets:
        rows = sheets[ws.title]
        for row in ws.iter_rows():
            for c in row:
                if c.data_type != "f":
                    continue
                mine, calc = stored[ws.title][c.coordinate].value, rows[c.row - 1][c.column - 1]
                if mine in (None, ""):
                    assert calc == "", (ws.title, c.coordinate)
                else:
                    assert _lo_number(calc) == pytest.approx(float(mine), rel=1e-12, abs=1e-9), \
                        (ws.title, c.coordinate, c.value, mine, calc)
                checked += 1
    assert checked > 20


def test_quiet_month_and_awkward_text(make_close_result, tmp_path):
    """No movements, no adjustments, no diagnostics; a control character in a note."""
    import pandas as pd
    from openpyxl import load_workbook

    res = make_close_result("2026-01")
    res.movements = res.movements.iloc[0:0]
    res.journal = res.journal.iloc[0:0]
    res.posting = None
    res.scale_diagnostics = res.scale_diagnostics.iloc[0:0]
    res.duplicates = pd.DataFrame()
    res.piles.loc[0, "flags"] = "bad\x07byte " + "x" * 40000
    wb = load_workbook(write_workbook(res, tmp_path / "w.xlsx"))
    flag = wb["Piles"].cell(row=2, column=PILE_COLUMNS.index("flags") + 1).value
    assert flag.startswith("bad\ufffdbyte") and len(flag) == 32767  # Excel's cell limit
    assert wb["Movements"].max_row >= 1 and [c.value for c in wb["Movements"][1]][0] == "kind"


def test_history_workbook_without_closes(tmp_path):
    from openpyxl import load_workbook

    with Ledger(tmp_path / "ledger.sqlite") as led:
        df = led.history()
    wb = load_workbook(write_history_workbook(df, tmp_path / "h.xlsx"))
    assert [c.value for c in wb["History"][1]] == list(df.columns)
    assert wb["History"].max_row == 1
    assert wb["By month"]["A1"].value == "No closed periods match."
    assert not (tmp_path / "ledger.sqlite").exists()  # reading never creates a ledger


# ----------------------------------------------------------------------------- totals' sigmas

#: Weighing instruments of the fixture close, as a share of each pile's book sigma: the
#: weighbridge WB1 weighed for all three piles, the belt scale BS-IN for the two coal piles.
_SCALE_SHARE = {"WB1": 0.3, "BS-IN": 0.5}


def _with_totals(result):
    """The fixture close with its ``Site totals`` and ``Materials`` tables, made by the close's
    own functions from a split of each pile's sigma: the fixture's survey sigma is
    hypot(volume sigma x density, volume x 1 % of the density), so its density part is
    ``volume x 0.01 x density``; the level bases are exact (base part 0); each pile's book
    sigma is its weighings (``_SCALE_SHARE``) and an opening part, in quadrature. Returns the
    close, the split per pile and the scale load."""
    import dataclasses
    from types import SimpleNamespace

    from inventory.stock.reconcile import _per_material
    from inventory.stock.totals import close_site_totals

    p = result.piles.copy()
    p["_d_survey"] = p["volume_m3"] * 0.01 * p["density_t_m3"]
    p["_g_survey"] = 0.0
    load = []
    for pid, mat, b in zip(p["pile_id"], p["material"], p["book_sigma_t"]):
        load.append({"pile_id": pid, "scale_id": "WB1", "sigma_t": _SCALE_SHARE["WB1"] * b})
        if mat == "coal":
            load.append({"pile_id": pid, "scale_id": "BS-IN", "sigma_t": _SCALE_SHARE["BS-IN"] * b})
    scale_load = pd.DataFrame(load)
    own = scale_load.groupby("pile_id")["sigma_t"].apply(lambda s: float((s ** 2).sum()))
    p["opening_sigma_t"] = np.sqrt(p["book_sigma_t"] ** 2 - p["pile_id"].map(own))
    p["opening_density_sigma_t"] = 0.0
    p["opening_base_sigma_t"] = 0.0
    site = close_site_totals(p, scale_load)
    materials = _per_material(p, SimpleNamespace(scale_load=scale_load), {}, 2.0, 1.0)
    tables = {**result.tables, "Materials": materials, "Site totals": site}
    return dataclasses.replace(result, tables=tables), p, scale_load


def _by_hand(p, scale_load, piles=None):
    """Sigmas of the survey, book and variance totals from the piles' covariance matrices,
    built term by term (JCGM 100:2008, GUM 5.2: var(sum) = 1' C 1; correlation 1 within a
    shared error, 0 otherwise): no code of the close is used."""
    p = p if piles is None else p[p["pile_id"].isin(piles)]
    ids, mats = list(p["pile_id"]), list(p["material"])
    s, d = p["survey_sigma_t"].to_numpy(), p["_d_survey"].to_numpy()
    o = p["opening_sigma_t"].to_numpy()
    n = len(ids)
    cs = np.zeros((n, n))
    cb = np.zeros((n, n))
    for i in range(n):
        cs[i, i] += s[i] ** 2 - d[i] ** 2          # the pile's own survey error
        cb[i, i] += o[i] ** 2                      # its opening
        for j in range(n):
            if mats[i] == mats[j]:                 # one table density per material
                cs[i, j] += d[i] * d[j]
            for sid in _SCALE_SHARE:               # one error per instrument
                wi = scale_load[(scale_load.pile_id == ids[i]) & (scale_load.scale_id == sid)]["sigma_t"].sum()
                wj = scale_load[(scale_load.pile_id == ids[j]) & (scale_load.scale_id == sid)]["sigma_t"].sum()
                cb[i, j] += wi * wj
    one = np.ones(n)
    # variance = survey - book; survey and book errors independent here (openings not surveys)
    return (float(np.sqrt(one @ cs @ one)), float(np.sqrt(one @ cb @ one)),
            float(np.sqrt(one @ (cs + cb) @ one)))


def test_summary_shows_the_site_total_sigmas(result, tmp_path):
    """The Summary's sigma lines are the Site totals table's figures to the last bit, read by
    pandas and by openpyxl (stored values), with units in their formats; they equal the
    covariance worked by hand and differ from the piles' sigmas in quadrature (two piles
    share the coal density and the belt scale, all three the weighbridge)."""
    from openpyxl import load_workbook

    res, p, scale_load = _with_totals(result)
    path = write_workbook(res, tmp_path / "variance-2026-01.xlsx")
    tot = res.tables["Site totals"].iloc[0]
    labels = {
        "Survey stock, 1 sigma": tot["survey_sigma_t"],
        "Book stock, 1 sigma": tot["book_sigma_t"],
        "Variance, 1 sigma (shared density, floor and scale errors counted once)": tot["variance_sigma_t"],
        "Variance in sigmas (z = variance / its 1 sigma)": tot["variance_t"] / tot["variance_sigma_t"],
    }
    summary = pd.read_excel(path, sheet_name="Summary", header=None, index_col=0)[1]
    for label, want in labels.items():
        assert summary[label] == want, label           # exactly: the same double
    ws = load_workbook(path, data_only=True)["Summary"]
    wf = load_workbook(path)["Summary"]
    rows = {c.value: c.row for c in ws["A"] if c.value}
    for label, want in labels.items():
        assert ws.cell(rows[label], 2).value == want, label
    # live formulas over the Site totals sheet, with the unit in the number format
    assert wf.cell(rows["Survey stock, 1 sigma"], 2).value.startswith("='Site totals'!$")
    for label in list(labels)[:3]:
        assert wf.cell(rows[label], 2).number_format == '#,##0.00 "t"', label
    assert '"sigma"' in wf.cell(rows["Variance in sigmas (z = variance / its 1 sigma)"], 2).number_format
    # the covariance by hand
    s_sv, s_bk, s_var = _by_hand(p, scale_load)
    assert tot["survey_sigma_t"] == pytest.approx(s_sv, rel=1e-12)
    assert tot["book_sigma_t"] == pytest.approx(s_bk, rel=1e-12)
    assert tot["variance_sigma_t"] == pytest.approx(s_var, rel=1e-12)
    # not the piles' variance sigmas in quadrature: the shared parts add before squaring
    quad = float(np.sqrt((p["variance_sigma_t"] ** 2).sum()))
    assert quad == pytest.approx(float(np.sqrt((p["survey_sigma_t"] ** 2).sum() + (p["book_sigma_t"] ** 2).sum())))
    q_label = "Variance, 1 sigma if every pile erred on its own (pile sigmas in quadrature)"
    assert summary[q_label] == pytest.approx(quad, rel=1e-14)
    assert wf.cell(rows[q_label], 2).value.startswith("=SQRT(SUMPRODUCT(ISNUMBER(Piles!$")
    coal = p[p["material"] == "coal"]
    # the excess is the two coal piles' density cross term and the instruments' cross terms
    cross = 2 * coal["_d_survey"].prod()
    sl = scale_load.pivot(index="pile_id", columns="scale_id", values="sigma_t").fillna(0.0)
    for sid in sl.columns:
        w = sl[sid].to_numpy()
        cross += w.sum() ** 2 - (w ** 2).sum()
    assert tot["variance_sigma_t"] ** 2 - quad ** 2 == pytest.approx(cross, rel=1e-9)
    assert tot["variance_sigma_t"] > quad * 1.05
    # the sentence saying how and why
    text = " ".join(str(c.value) for c in wf["A"] if c.value)
    assert "not the piles' sigmas added in quadrature" in text and "counted once" in text


def test_materials_sheet_has_sigmas_and_z(result, tmp_path):
    """Per material: survey, book and variance sigma equal the Materials table exactly, the
    variance in sigmas is a formula with its value, the coal sigma equals the covariance by
    hand for its two piles, and the sheet says why it is not the quadrature sum."""
    from openpyxl import load_workbook

    res, p, scale_load = _with_totals(result)
    path = write_workbook(res, tmp_path / "variance-2026-01.xlsx")
    mats = res.tables["Materials"].set_index("material")
    sheet = pd.read_excel(path, sheet_name="Materials")
    sheet = sheet[sheet["material"].isin(mats.index)].set_index("material")
    cols = list(pd.read_excel(path, sheet_name="Materials").columns)
    assert cols.index("variance_z") == cols.index("variance_sigma_t") + 1
    for m in mats.index:
        for c in ("survey_t", "survey_sigma_t", "book_sigma_t", "variance_t", "variance_sigma_t"):
            assert sheet.at[m, c] == mats.at[m, c], (m, c)
        assert sheet.at[m, "variance_z"] == mats.at[m, "variance_t"] / mats.at[m, "variance_sigma_t"]
    # by hand: the coal piles with the belt scale that fed only them and the weighbridge
    s_sv, s_bk, s_var = _by_hand(p, scale_load, piles=["P-COAL-1", "P-COAL-2"])
    assert mats.at["coal", "survey_sigma_t"] == pytest.approx(s_sv, rel=1e-12)
    assert mats.at["coal", "variance_sigma_t"] == pytest.approx(s_var, rel=1e-12)
    coal = p[p["material"] == "coal"]
    assert mats.at["coal", "variance_sigma_t"] > float(np.sqrt((coal["variance_sigma_t"] ** 2).sum())) * 1.05
    wb, values = load_workbook(path), load_workbook(path, data_only=True)
    ws = wb["Materials"]
    j = cols.index("variance_z") + 1
    assert str(ws.cell(2, j).value).startswith("=IF(AND(ISNUMBER(")
    assert values["Materials"].cell(2, j).value == sheet["variance_z"].iloc[0]
    assert '"sigma"' in ws.cell(2, j).number_format
    assert '"t"' in ws.cell(2, cols.index("variance_sigma_t") + 1).number_format
    text = " ".join(str(c.value) for row in ws.iter_rows() for c in row if isinstance(c.value, str))
    assert "not the piles' sigmas added in quadrature" in text
    # the Columns sheet gives z its unit and meaning
    listed = {(r[0].value, r[1].value): (r[2].value, r[3].value) for r in wb["Columns"].iter_rows(min_row=2)}
    assert listed[("Materials", "variance_z")][0].startswith("sigma")
    assert listed[("Site totals", "variance_z")][1].startswith("Variance in sigmas")


def test_a_pile_not_surveyed_is_in_neither_sigma(make_close_result, tmp_path):
    """The Site totals cover the surveyed piles; so does the quadrature line beside them."""
    res = make_close_result("2026-01")
    p = res.piles
    p.loc[2, ["survey_t", "survey_sigma_t", "variance_t", "variance_pct", "volume_m3"]] = np.nan
    p.loc[2, "variance_sigma_t"] = p.loc[2, "book_sigma_t"]  # as reconcile leaves it
    res, parts, scale_load = _with_totals(res)
    path = write_workbook(res, tmp_path / "variance-2026-01.xlsx")
    summary = pd.read_excel(path, sheet_name="Summary", header=None, index_col=0)[1]
    tot = res.tables["Site totals"].iloc[0]
    assert tot["piles"] == 2
    assert summary["Variance, 1 sigma (shared density, floor and scale errors counted once)"] == tot["variance_sigma_t"]
    quad = float(np.sqrt((p.loc[:1, "variance_sigma_t"] ** 2).sum()))
    assert summary["Variance, 1 sigma if every pile erred on its own (pile sigmas in quadrature)"] == \
        pytest.approx(quad, rel=1e-14)
    two = scale_load[scale_load["pile_id"].isin(p.loc[:1, "pile_id"])]
    assert tot["variance_sigma_t"] == pytest.approx(_by_hand(parts, two, piles=list(p.loc[:1, "pile_id"]))[2],
                                                    rel=1e-12)


def test_summary_without_site_totals_says_so(book):
    wb, _ = book
    text = [str(c.value) for row in wb["Summary"].iter_rows() for c in row if c.value]
    assert "not computed for this close (no Site totals table)" in text


@pytest.mark.tools
def test_libreoffice_recalculates_the_sigma_lines(result, tmp_path):
    if not _soffice():
        pytest.skip("LibreOffice (soffice) not installed; `make tools` installs "
                    "libreoffice-calc-nogui when root with apt-get")
    res, _, _ = _with_totals(result)
    xlsx = write_workbook(res, tmp_path / "variance-2026-01.xlsx")
    sheets = _to_csv(xlsx, tmp_path)
    summary = {r[0]: r[1] for r in sheets["Summary"] if len(r) >= 2 and r[0]}
    tot = res.tables["Site totals"].iloc[0]
    # Calc writes 15 significant digits
    assert _lo_number(summary["Variance, 1 sigma (shared density, floor and scale errors counted once)"]) \
        == pytest.approx(tot["variance_sigma_t"], rel=1e-13)
    assert _lo_number(summary["Variance in sigmas (z = variance / its 1 sigma)"]) == pytest.approx(
        tot["variance_t"] / tot["variance_sigma_t"], rel=1e-13)
    quad = float(np.sqrt((res.piles["variance_sigma_t"] ** 2).sum()))
    assert _lo_number(summary["Variance, 1 sigma if every pile erred on its own (pile sigmas in quadrature)"]) \
        == pytest.approx(quad, rel=1e-13)
    with open(tmp_path / f"{xlsx.stem}-Materials.csv", newline="", encoding="utf-8") as fh:
        mats = list(csv.reader(fh))
    z = mats[0].index("variance_z")
    t = res.tables["Materials"]
    for i, r in enumerate(t.itertuples(index=False), start=1):
        assert _lo_number(mats[i][z]) == pytest.approx(r.variance_t / r.variance_sigma_t, rel=1e-13)
