"""Text a spreadsheet would run as a formula is neutralised in every CSV the tool writes
(``inventory history --format csv``) and stored as text in the workbook; numbers stay numbers.

The characters that start a formula are those of OWASP's "CSV Injection" page
(= + - @, tab, carriage return).
"""

from __future__ import annotations

import csv
import io

import pandas as pd
import pytest
from openpyxl import load_workbook

from inventory.cli import main
from inventory.export import write_workbook
from inventory.export.cells import FORMULA_STARTS, looks_like_formula, neutralised_frame
from inventory.ledger.store import Ledger

#: pile ids from an input file that a spreadsheet would run, and the text the CSV must hold
HOSTILE = {
    "P-COAL-1": "=1+1",
    "P-COAL-2": "+cmd|' /C calc'!A0",
    "P-LIME-1": "@SUM(A1:A9)",
}


@pytest.fixture
def hostile_site(tmp_path, make_close_result):
    """A site folder whose ledger holds one close with formula-like pile ids and materials."""
    res = make_close_result("2026-01")
    res.piles["pile_id"] = res.piles["pile_id"].map(HOSTILE)
    res.piles["material"] = ["-2+3", "\t=HYPERLINK(\"x\")", "limestone"]
    res.journal["pile_id"] = res.journal["pile_id"].map(HOSTILE)
    res.footprints["pile_id"] = res.footprints["pile_id"].map(HOSTILE)
    site = tmp_path / "site"
    site.mkdir()
    with Ledger(site / "ledger.sqlite") as led:
        led.record_close(res, {"piles.gpkg": "b" * 64}, "0.1.0")
    return site, res


def _history_csv(site, capsys) -> list[dict[str, str]]:
    assert main(["history", str(site), "--format", "csv"]) == 0
    return list(csv.DictReader(io.StringIO(capsys.readouterr().out)))


def test_history_csv_neutralises_formula_text(hostile_site, capsys):
    site, res = hostile_site
    rows = _history_csv(site, capsys)
    assert len(rows) == 3
    assert sorted(r["pile_id"] for r in rows) == sorted("'" + v for v in HOSTILE.values())
    assert {r["material"] for r in rows} == {"'-2+3", "'\t=HYPERLINK(\"x\")", "limestone"}
    for row in rows:
        for col, text in row.items():
            assert not text.startswith(FORMULA_STARTS) or _plain_number(text), (col, text)
    # negative figures are still plain negative numbers, equal to the close's
    by_pile = {r["pile_id"]: r for r in rows}
    coal2 = res.piles.set_index("pile_id").loc["+cmd|' /C calc'!A0"]
    assert coal2["variance_t"] < 0
    assert float(by_pile["'+cmd|' /C calc'!A0"]["variance_t"]) == coal2["variance_t"]
    assert by_pile["'+cmd|' /C calc'!A0"]["variance_t"].startswith("-")


def _plain_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def test_workbook_stores_formula_text_as_text(hostile_site, tmp_path):
    _, res = hostile_site
    path = write_workbook(res, tmp_path / "v.xlsx")
    ws = load_workbook(path)["Piles"]
    cells = [ws.cell(row=r, column=1) for r in range(2, 5)]
    assert [c.value for c in cells] == list(HOSTILE.values())
    assert all(c.data_type == "s" for c in cells)
    # the figures beside them are numbers, negative ones too
    header = [c.value for c in ws[1]]
    variance = [ws.cell(row=r, column=header.index("variance_t") + 1).value for r in range(2, 5)]
    assert variance == res.piles["variance_t"].to_list() and min(variance) < 0


def test_only_text_cells_change():
    frame = pd.DataFrame({
        "id": ["=A1", "-5", "-2+3", "@x", "ok", None, "\rx"],
        "tonnes": [-1.5, -2.0, 3.0, 0.0, 1.0, float("nan"), -0.0],
        "count": [-1, 2, 3, 4, 5, 6, 7],
    })
    out = neutralised_frame(frame)
    assert out["id"].to_list()[:5] == ["'=A1", "-5", "'-2+3", "'@x", "ok"]
    assert pd.isna(out["id"].iloc[5]) and out["id"].iloc[6] == "'\rx"
    pd.testing.assert_series_equal(out["tonnes"], frame["tonnes"])
    pd.testing.assert_series_equal(out["count"], frame["count"])
    assert not looks_like_formula(-3.0) and not looks_like_formula("1e-3")
