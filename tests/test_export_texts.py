"""The workbook and the report say the same thing: one sign convention, one set of cautions,
one row-colour legend, all from inventory.model.texts; no exporter borrows another's texts."""

from __future__ import annotations

import ast
import html
import re
from pathlib import Path

import pytest

from inventory.export.report import write_report
from inventory.export.workbook import write_history_workbook, write_workbook
from inventory.model.texts import CAUTIONS, REASON_CODES, ROW_LEGEND, SIGN_CONVENTION

EXPORT = Path(__file__).resolve().parents[1] / "inventory" / "export"
LABEL = "Sign convention: "


@pytest.fixture(scope="module")
def written(make_close_result, tmp_path_factory):
    """The workbook (as openpyxl reads it back) and the report (as text) of one close."""
    from openpyxl import load_workbook

    out = tmp_path_factory.mktemp("texts")
    result = make_close_result("2026-02", period_index=1)
    wb = load_workbook(write_workbook(result, out / "variance-2026-02.xlsx"))
    text = write_report(result, out / "report-2026-02.html").read_text(encoding="utf-8")
    return wb, text


def _rows(ws) -> list[list]:
    return [[c.value for c in row] for row in ws.iter_rows()]


def _after_label(ws, label: str) -> list[str]:
    """Column B from the row whose column A is ``label`` down to the next blank B."""
    rows = _rows(ws)
    start = next(i for i, r in enumerate(rows) if r[0] == label)
    found = []
    for r in rows[start:]:
        if r[1] is None:
            break
        found.append(r[1])
    return found


def _report_sign_convention(text: str) -> list[str]:
    return [html.unescape(p) for p in re.findall(r"<p>([^<]*)</p>", text)
            if html.unescape(p).startswith(LABEL)]


def _report_cautions(text: str) -> list[str]:
    block = re.search(r'<div class="caution"><ul>(.*?)</ul></div>', text, flags=re.DOTALL)
    assert block, "the report has no cautions block"
    return [html.unescape(li) for li in re.findall(r"<li>(.*?)</li>", block.group(1), flags=re.DOTALL)]


def _report_legend(text: str) -> list[str]:
    block = re.search(r'<p class="legend">(.*?)</p>', text, flags=re.DOTALL)
    assert block, "the report has no row-colour legend"
    return [html.unescape(t).strip() for t in re.findall(r"</span>([^<]+)", block.group(1))]


def test_same_sign_convention_in_workbook_and_report(written):
    wb, text = written
    in_report = _report_sign_convention(text)
    summary = _after_label(wb["Summary"], "Sign convention")
    in_variance = [v for r in _rows(wb["Variance"]) for v in r
                   if isinstance(v, str) and v.startswith(LABEL)]
    assert in_report == [SIGN_CONVENTION]
    assert [LABEL + s for s in summary] == in_report
    assert in_variance == in_report
    # the wording states the direction and what each sign means
    assert "variance = survey - book" in SIGN_CONVENTION
    assert "positive variance" in SIGN_CONVENTION and "negative" in SIGN_CONVENTION


def test_same_cautions_in_workbook_and_report(written):
    wb, text = written
    in_report = _report_cautions(text)
    assert _after_label(wb["Summary"], "Cautions") == in_report
    assert in_report == list(CAUTIONS)
    joined = " ".join(CAUTIONS)
    assert "estimates" in joined and "legal metrology" in joined and "licensed surveyors" in joined
    assert "Never walk on stockpiles or under reclaim faces" in joined


def test_same_row_legend_in_workbook_and_report(written):
    wb, text = written
    rows = _rows(wb["Summary"])
    in_workbook = [r[1] for r in rows if r[0] == "row colour"]
    assert in_workbook == _report_legend(text)
    assert in_workbook == [ROW_LEGEND["out_of_tolerance"], ROW_LEGEND["significant"]]


def test_history_workbook_notes_use_the_same_texts(make_close_result, tmp_path):
    from openpyxl import load_workbook

    from inventory.ledger.store import Ledger

    with Ledger(tmp_path / "ledger.sqlite") as led:
        led.record_close(make_close_result("2026-01"), {"piles.gpkg": "b" * 64}, "0.1.0")
        df = led.history()
    path = write_history_workbook(df, tmp_path / "history.xlsx")
    notes = load_workbook(path)["Notes"]
    assert notes["A3"].value == SIGN_CONVENTION
    assert [notes["B6"].value, notes["B7"].value] == [ROW_LEGEND["out_of_tolerance"],
                                                      ROW_LEGEND["significant"]]
    assert [notes.cell(row=9 + i, column=1).value for i in range(len(CAUTIONS))] == list(CAUTIONS)


def test_reconcile_reexports_the_one_copy():
    from inventory.stock import reconcile

    assert reconcile.SIGN_CONVENTION is SIGN_CONVENTION
    assert reconcile.REASON_CODES is REASON_CODES


@pytest.mark.parametrize("path", sorted(EXPORT.glob("*.py")), ids=lambda p: p.name)
def test_no_exporter_borrows_another_exporters_constants(path):
    # shared texts live in inventory.model.texts; between exporters only functions are shared
    tree = ast.parse(path.read_text(encoding="utf-8"))
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and (node.module or "").startswith("inventory.export."):
            constants = [a.name for a in node.names if a.name.isupper()]
            assert not constants, f"{path.name}:{node.lineno} imports {constants} from {node.module}"
