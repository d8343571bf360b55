"""The ledger's finance views: adopted balances, journal lines, variance by material and month,
closes with their reopen history; on a new ledger and on one migrated from schema 2."""

from __future__ import annotations

import sqlite3

import pytest

from inventory.ledger.schema import VIEW_NAMES
from inventory.ledger.store import SCHEMA_VERSION, Ledger
from inventory.model.results import VOLUME_SIGMA_COLUMNS

INPUTS = {"surveys/2026-01-28/scan.laz": "1" * 64}


@pytest.fixture
def two_months(make_close_result, tmp_path):
    """Jan closed, reopened and closed again (survey of P-COAL-1 +1.5 t); Feb closed."""
    path = tmp_path / "ledger.sqlite"
    jan, feb = make_close_result("2026-01"), make_close_result("2026-02", period_index=1)
    jan2 = make_close_result("2026-01")
    jan2.piles.loc[0, "survey_t"] += 1.5
    jan2.piles.loc[0, "variance_t"] += 1.5
    with Ledger(path) as led:
        led.record_close(jan, INPUTS, "0.1.0", who="a")
        led.reopen("2026-01", "late tickets", who="b")
        led.record_close(jan2, INPUTS, "0.1.1", who="c")
        led.record_close(feb, INPUTS, "0.1.1", who="c")
    return path, jan, jan2, feb


def _rows(path, sql, params=()):
    con = sqlite3.connect(path)
    con.row_factory = sqlite3.Row
    try:
        return [dict(r) for r in con.execute(sql, params).fetchall()]
    finally:
        con.close()


def test_adopted_balances_skip_superseded_closes(two_months):
    path, jan, jan2, feb = two_months
    rows = _rows(path, "SELECT period, pile_id, survey_t FROM adopted_balances ORDER BY period, pile_id")
    assert len(rows) == len(jan.piles) + len(feb.piles)
    got = {(r["period"], r["pile_id"]): r["survey_t"] for r in rows}
    for res in (jan2, feb):
        for pid, s in zip(res.piles["pile_id"], res.piles["survey_t"]):
            assert got[(res.period, pid)] == pytest.approx(s, abs=1e-9)


def test_journal_lines_per_period(two_months):
    path, jan, jan2, feb = two_months
    rows = _rows(path, "SELECT period, pile_id, adjustment_t, reason_code FROM adopted_journal "
                       "ORDER BY period, line")
    want = [(r.period, p, a, c) for r in (jan2, feb)
            for p, a, c in zip(r.journal["pile_id"], r.journal["adjustment_t"], r.journal["reason_code"])]
    assert [(r["period"], r["pile_id"], r["adjustment_t"], r["reason_code"]) for r in rows] == want
    assert len(rows) > 0


def test_variance_by_material_and_month_sums_the_adopted_piles(two_months):
    path, jan, jan2, feb = two_months
    rows = _rows(path, "SELECT * FROM variance_by_material_month ORDER BY period, material")
    assert [(r["period"], r["material"]) for r in rows] == [
        ("2026-01", "coal"), ("2026-01", "limestone"), ("2026-02", "coal"), ("2026-02", "limestone")]
    for r in rows:
        res = jan2 if r["period"] == "2026-01" else feb
        g = res.piles[res.piles["material"] == r["material"]]
        assert r["piles"] == len(g)
        assert r["variance_t"] == pytest.approx(g["variance_t"].sum(), abs=1e-9)
        assert r["book_t"] == pytest.approx(g["book_t"].sum(), abs=1e-9)
        assert r["variance_pct"] == pytest.approx(100 * g["variance_t"].sum() / g["book_t"].sum())
        assert r["piles_out_of_tolerance"] == int(g["out_of_tolerance"].sum())


def test_close_history_names_the_reopening_and_the_replacement(two_months):
    path, *_ = two_months
    rows = _rows(path, "SELECT close_id, period, status, reopened_by, reopen_reason, "
                       "superseded_by_close_id FROM close_history ORDER BY close_id")
    assert rows == [
        {"close_id": 1, "period": "2026-01", "status": "superseded", "reopened_by": "b",
         "reopen_reason": "late tickets", "superseded_by_close_id": 2},
        {"close_id": 2, "period": "2026-01", "status": "adopted", "reopened_by": None,
         "reopen_reason": None, "superseded_by_close_id": None},
        {"close_id": 3, "period": "2026-02", "status": "adopted", "reopened_by": None,
         "reopen_reason": None, "superseded_by_close_id": None},
    ]


def test_schema_2_ledger_gets_the_views_on_open(make_close_result, tmp_path):
    path = tmp_path / "ledger.sqlite"
    with Ledger(path) as led:
        led.record_close(make_close_result("2026-01"), INPUTS, "0.1.0")
    con = sqlite3.connect(path)
    # the layout of schema 2: no views, no parts of the volume sigma (schema 4)
    con.executescript("".join(f"DROP VIEW {v};" for v in VIEW_NAMES)
                      + "".join(f"ALTER TABLE balances DROP COLUMN {c};" for c in VOLUME_SIGMA_COLUMNS)
                      + "UPDATE schema_version SET version = 2;")
    con.commit()
    con.close()
    assert not _rows(path, "SELECT name FROM sqlite_master WHERE type = 'view' AND name = 'close_history'")
    with Ledger(path) as led:
        assert led.schema_version() == SCHEMA_VERSION == 4
    views = {r["name"] for r in _rows(path, "SELECT name FROM sqlite_master WHERE type = 'view'")}
    assert set(VIEW_NAMES) <= views
    assert len(_rows(path, "SELECT * FROM adopted_balances")) == 3
