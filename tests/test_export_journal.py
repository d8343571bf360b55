"""The posting journal (CSV, report), the close status line and the superseded mark."""

from __future__ import annotations

import math

import pandas as pd
import pytest

from inventory.export import mark_superseded, posting_journal, write_journal_csv
from inventory.export.report import report_html, write_report
from inventory.export.workbook import write_workbook
from inventory.model.results import POSTING_COLUMNS

RECORDED = "2026-02-03T08:00:00+00:00"


@pytest.fixture
def result(make_close_result):
    res = make_close_result("2026-01")
    res.close_id, res.closed_utc = 4, RECORDED
    res.posting = pd.DataFrame([
        {"line": 1, "pile_id": "P-COAL-2", "to_pile_id": "P-COAL-1", "material": "coal",
         "quantity_t": 400.12345678901234, "unit": "t", "unit_cost": 95.0, "value": 400.12345678901234 * 95.0,
         "currency": "EUR", "account": "1410", "location": "Y2", "to_location": "Y1",
         "reason_code": "TRANSFER", "reason": "proposed transfer", "status": "post"},
        {"line": 2, "pile_id": "P-LIME-1", "to_pile_id": None, "material": "lime", "quantity_t": -12.5,
         "unit": "t", "unit_cost": float("nan"), "value": float("nan"), "currency": "EUR", "account": None,
         "location": None, "to_location": None, "reason_code": "UNEXPLAINED",
         "reason": "-12.5 t beyond tolerance; held: investigate before posting", "status": "hold"},
    ])
    return res


def test_journal_csv_is_posting_ready(result, tmp_path):
    path = write_journal_csv(result, tmp_path / "journal-2026-01.csv")
    back = pd.read_csv(path, keep_default_na=False)
    assert list(back.columns) == POSTING_COLUMNS
    assert back["period"].tolist() == ["2026-01"] * 2 and back["posting_date"].tolist() == ["2026-01-31"] * 2
    assert back["close_id"].tolist() == [4, 4] and back["status"].tolist() == ["post", "hold"]
    assert float(back.loc[0, "quantity_t"]) == 400.12345678901234          # unrounded, exact
    assert back.loc[1, "value"] == "" and back.loc[1, "account"] == ""
    assert back.loc[1, "reason"].startswith("'-12.5 t")                      # neutralised text


def test_a_result_without_posting_lines_posts_its_journal(make_close_result):
    res = make_close_result("2026-01")
    j = posting_journal(res)
    assert j["quantity_t"].tolist() == res.journal["adjustment_t"].tolist()
    assert set(j["status"]) <= {"post"} and j["close_id"].isna().all()


def test_report_headline_is_a_stock_bridge_and_names_the_close(result):
    text = report_html(result)
    p = result.piles
    assert '<p class="status">Ledger close 4 of 2026-01, recorded 2026-02-03T08:00:00+00:00</p>' in text
    book, adj, after = p.book_t.sum(), p.adjustment_t.sum(), p.after_survey_net_t.sum()
    assert f"<td>= Book stock after adjustments (t)</td><td class=\"n\">{book + adj:,.2f}</td>" in text
    assert f"<td>+ Net movements after the survey (t)</td><td class=\"n\">{after:+,.2f}</td>" in text
    assert f"<td>= Closing stock (t)</td><td class=\"n\">{p.closing_t.sum():,.2f}</td>" in text
    assert "does not add up" not in text
    assert '<tr class="hold">' in text and "UNEXPLAINED" in text and "38,011.73 EUR" in text
    broken = result.piles.copy()
    broken.loc[0, "closing_t"] += 1.0
    result.piles = broken
    assert "does not add up" in report_html(result)


def test_superseded_outputs_say_so(result, tmp_path):
    from openpyxl import load_workbook

    folder = tmp_path / "2026-01.superseded-close-4"
    wb = write_workbook(result, folder / "variance-2026-01.xlsx")
    report = write_report(result, folder / "report-2026-01.html")
    journal = write_journal_csv(result, folder / "journal-2026-01.csv")
    before = load_workbook(wb, data_only=True)
    marked = mark_superseded(folder, 6, "2026-02-10T09:00:00+00:00")
    assert sorted(p.name for p in marked) == sorted(p.name for p in (wb, report, journal))
    mark = ("SUPERSEDED by ledger close 6 (recorded 2026-02-10T09:00:00+00:00): these are the figures "
            "of ledger close 4 of 2026-01; do not post from them")
    after = load_workbook(wb, data_only=True)
    facts = {r[0]: r[1] for r in after["Summary"].iter_rows(min_row=3, max_row=13, values_only=True)}
    assert facts["Status"] == mark and facts["Ledger close"] == 4
    assert mark in after["Piles"].oddHeader.left.text and after.properties.description == mark
    header = after["Piles"].oddHeader
    assert len(header.left.text) + len(header.right.text) + 12 <= 255  # Excel's header limit
    # every other cell, stored formula values included, is as it was
    for ws in before.worksheets:
        for row in ws.iter_rows():
            for c in row:
                v = after[ws.title][c.coordinate].value
                if c.value != v:
                    assert ws.title == "Summary" and v == mark, (ws.title, c.coordinate)
                elif isinstance(v, float):
                    assert not math.isnan(v)
    html = report.read_text(encoding="utf-8")
    assert f'<p class="status superseded">{mark}</p>' in html
    back = pd.read_csv(journal)
    assert back["status"].tolist() == ["superseded by close 6"] * 2 and back["close_id"].tolist() == [4, 4]
    assert mark_superseded(folder, 6, "2026-02-10T09:00:00+00:00") == [journal]  # nothing left to mark but the CSV


def test_superseded_geopackage_says_so_in_every_layer_description(result, tmp_path):
    import sqlite3

    import pyogrio

    from inventory.export.layers import LAYER_NAMES, write_layers

    folder = tmp_path / "2026-01.superseded-close-4"
    gpkg = write_layers(result, folder / "piles-2026-01.gpkg")
    before = {name: pyogrio.read_dataframe(gpkg, layer=name) for name in LAYER_NAMES}
    assert mark_superseded(folder, 6, "2026-02-10T09:00:00+00:00") == [gpkg]
    con = sqlite3.connect(gpkg)
    rows = dict(con.execute("SELECT table_name, description FROM gpkg_contents").fetchall())
    con.close()
    assert set(LAYER_NAMES) <= set(rows)
    for name in LAYER_NAMES:
        assert rows[name].startswith("SUPERSEDED by ledger close 6 (recorded 2026-02-10T09:00:00+00:00)"), name
        assert "Ledger close 4" in rows[name], name     # the layer's own description follows
        # the features are untouched (OGC GeoPackage: gpkg_contents is metadata only)
        after = pyogrio.read_dataframe(gpkg, layer=name)
        pd.testing.assert_frame_equal(after.drop(columns="geometry"), before[name].drop(columns="geometry"))
    # marked once: a second pass changes nothing
    assert mark_superseded(folder, 7, "2026-03-01T09:00:00+00:00") == []
