"""The ledger: one transaction per close, locked periods, reopenings kept, openings, history."""

from __future__ import annotations

import re
import sqlite3

import numpy as np
import pandas as pd
import pytest

from inventory.errors import LedgerError, PeriodLockedError
from inventory.ledger.store import BALANCE_COLUMNS, HISTORY_COLUMNS, SCHEMA_VERSION, Ledger
from inventory.model.results import PILE_COLUMNS, VOLUME_SIGMA_COLUMNS

INPUTS = {"surveys/2026-01-28/scan.laz": "1" * 64, "movements/2026-01/weighbridge.csv": "2" * 64}


def _dump(path) -> list[str]:
    """Every row of every table, for 'exactly as before' comparisons."""
    con = sqlite3.connect(path)
    try:
        return list(con.iterdump())
    finally:
        con.close()


def _same_frame(a: pd.DataFrame, b: pd.DataFrame, cols) -> None:
    """Exact equality, NaN equal to NaN/None (SQLite stores NaN as NULL)."""
    for col in cols:
        x, y = a[col].tolist(), b[col].tolist()
        assert len(x) == len(y), col
        for u, v in zip(x, y):
            if isinstance(u, float) and np.isnan(u):
                assert v is None or (isinstance(v, float) and np.isnan(v)), (col, u, v)
            else:
                assert u == v, (col, u, v)
                assert type(u) is type(v) or isinstance(u, (bool, np.bool_)), (col, u, v)


@pytest.fixture
def ledger_path(tmp_path):
    return tmp_path / "ledger.sqlite"


def test_record_and_read_back_exactly(make_close_result, ledger_path):
    res = make_close_result("2026-01")
    with Ledger(ledger_path) as led:
        close_id = led.record_close(res, INPUTS, "0.1.0", who="controller")
        assert close_id >= 1
        back = led.adopted("2026-01")
        assert led.inputs("2026-01") == INPUTS
        journal = led.journal("2026-01")
        closes = led.closes()
    assert list(back.columns) == BALANCE_COLUMNS == PILE_COLUMNS
    _same_frame(res.piles, back, PILE_COLUMNS)
    assert journal["adjustment_t"].tolist() == res.journal["adjustment_t"].tolist()
    assert closes.loc[0, "software_version"] == "0.1.0"
    assert closes.loc[0, "closed_by"] == "controller"
    assert closes.loc[0, "survey_instant_utc"] == "2026-01-28T11:00:00+00:00"


def test_file_is_wal_with_foreign_keys_and_schema_version(make_close_result, ledger_path):
    with Ledger(ledger_path) as led:
        led.record_close(make_close_result("2026-01"), INPUTS, "0.1.0")
        assert led.schema_version() == SCHEMA_VERSION
        assert led._db.execute("PRAGMA foreign_keys").fetchone()[0] == 1
    con = sqlite3.connect(ledger_path)
    # WAL is a property of the file: a fresh connection sees it (SQLite docs, "Write-Ahead Logging")
    assert con.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    with pytest.raises(sqlite3.IntegrityError):  # balances must belong to a close
        con.execute("PRAGMA foreign_keys = ON")
        con.execute("INSERT INTO balances (close_id, pile_id) VALUES (999, 'X')")
    con.close()


def test_who_defaults_to_the_logged_in_user(make_close_result, ledger_path, monkeypatch):
    import getpass

    monkeypatch.setattr(getpass, "getuser", lambda: "night-shift")
    with Ledger(ledger_path) as led:
        led.record_close(make_close_result("2026-01"), INPUTS, "0.1.0")
        led.reopen("2026-01", "density sample replaced")
        assert led.closes().loc[0, "closed_by"] == "night-shift"
        assert led.reopenings().loc[0, "reopened_by"] == "night-shift"


def test_closed_period_is_locked(make_close_result, ledger_path):
    res = make_close_result("2026-01")
    with Ledger(ledger_path) as led:
        assert not led.is_locked("2026-01")
        led.record_close(res, INPUTS, "0.1.0")
        assert led.is_locked("2026-01")
        before = _dump(ledger_path)
        with pytest.raises(PeriodLockedError, match="2026-01 is closed and locked; reopen"):
            led.record_close(res, INPUTS, "0.1.0")
    assert _dump(ledger_path) == before


def test_reopen_needs_a_reason_and_keeps_everything(make_close_result, ledger_path):
    res = make_close_result("2026-01")
    with Ledger(ledger_path) as led:
        led.record_close(res, INPUTS, "0.1.0", who="a")
        for blank in ("", "   ", None):
            with pytest.raises(LedgerError, match="reason is required"):
                led.reopen("2026-01", blank, who="b")  # type: ignore[arg-type]
        assert led.is_locked("2026-01")
        led.reopen("2026-01", "weighbridge tickets of the 14th were missing", who="b")
        assert not led.is_locked("2026-01")
        # the old figures stay, marked superseded; history hides them unless asked
        assert len(led.history()) == 0
        old = led.history(include_superseded=True)
        assert set(old["status"]) == {"superseded"}
        # closing again adopts new rows beside the superseded ones
        res2 = make_close_result("2026-01")
        res2.piles.loc[0, "survey_t"] += 1.5
        led.record_close(res2, INPUTS, "0.1.1", who="c")
        every = led.history(include_superseded=True)
        assert sorted(every["status"].unique()) == ["adopted", "superseded"]
        assert len(every) == 2 * len(res.piles)
        adopted = led.history()
        assert adopted["survey_t"].tolist() == res2.piles["survey_t"].tolist()
        view = led._db.execute("SELECT * FROM periods").fetchall()
        assert view == [("2026-01", 1, led.closes().close_id.max(), 2, 1)]
        reo = led.reopenings("2026-01")
        assert reo.loc[0, "reason"] == "weighbridge tickets of the 14th were missing"
        assert reo.loc[0, "reopened_by"] == "b"
    # kept forever: even a plain SQLite client cannot delete or edit them
    con = sqlite3.connect(ledger_path)
    for sql in ("DELETE FROM reopenings", "UPDATE reopenings SET reason = 'x'",
                "DELETE FROM balances", "UPDATE balances SET survey_t = 0",
                "DELETE FROM closes", "UPDATE closes SET status = 'adopted'"):
        with pytest.raises(sqlite3.DatabaseError, match="kept forever|cannot be edited|only be"):
            con.execute(sql)
    con.close()


def test_reopen_of_a_period_never_closed(make_close_result, ledger_path):
    with Ledger(ledger_path) as led:
        with pytest.raises(LedgerError, match="never closed"):
            led.reopen("2026-01", "why not")
        led.record_close(make_close_result("2026-01"), INPUTS, "0.1.0")
        with pytest.raises(LedgerError, match="2026-02 is not closed"):
            led.reopen("2026-02", "why not")


def test_opening_comes_from_the_adopted_closing_of_the_month_before(make_close_result, ledger_path):
    m1 = make_close_result("2026-01")
    with Ledger(ledger_path) as led:
        assert led.opening_for("2026-01") is None  # first close: opening.csv
        led.record_close(m1, INPUTS, "0.1.0")
        opening = led.opening_for("2026-02")
        assert opening == dict(zip(m1.piles["pile_id"], m1.piles["closing_t"]))
        # a reopened January is no base for February
        led.reopen("2026-01", "recount")
        with pytest.raises(LedgerError, match="2026-01 is not closed"):
            led.opening_for("2026-02")
        m1b = make_close_result("2026-01")
        m1b.piles["closing_t"] = m1b.piles["closing_t"] + 3.0
        led.record_close(m1b, INPUTS, "0.1.0")
        assert led.opening_for("2026-02") == dict(zip(m1b.piles["pile_id"],
                                                      m1b.piles["closing_t"]))
        # a skipped month is refused rather than silently bridged
        with pytest.raises(LedgerError, match="2026-02 is not closed"):
            led.opening_for("2026-03")


def test_year_boundary_opening(make_close_result, ledger_path):
    with Ledger(ledger_path) as led:
        led.record_close(make_close_result("2025-12"), INPUTS, "0.1.0")
        assert led.opening_for("2026-01") is not None


def test_order_of_closes_and_reopens(make_close_result, ledger_path):
    with Ledger(ledger_path) as led:
        led.record_close(make_close_result("2026-01"), INPUTS, "0.1.0")
        led.record_close(make_close_result("2026-02", period_index=1), INPUTS, "0.1.0")
        with pytest.raises(LedgerError, match="2026-02 is closed and opened from it"):
            led.reopen("2026-01", "late ticket")
        led.reopen("2026-02", "late ticket")
        led.reopen("2026-01", "late ticket")
        led.record_close(make_close_result("2026-01"), INPUTS, "0.1.0")
        assert led.closed_periods() == ["2026-01"]


def test_close_before_a_later_closed_period_is_refused(make_close_result, ledger_path):
    with Ledger(ledger_path) as led:
        led.record_close(make_close_result("2026-03"), INPUTS, "0.1.0")
        with pytest.raises(LedgerError, match="later period 2026-03 is already closed"):
            led.record_close(make_close_result("2026-02"), INPUTS, "0.1.0")


def test_failure_inside_the_transaction_leaves_the_ledger_as_before(make_close_result, ledger_path):
    with Ledger(ledger_path) as led:
        led.record_close(make_close_result("2026-01"), INPUTS, "0.1.0")
    before = _dump(ledger_path)
    m2 = make_close_result("2026-02", period_index=1)
    with Ledger(ledger_path) as led:
        # the caller's own step (moving outputs into place) fails after the rows are in
        with pytest.raises(RuntimeError, match="disk full"):
            with led.closing(m2, INPUTS, "0.1.0"):
                assert led.is_locked("2026-02")  # visible inside the transaction
                raise RuntimeError("disk full")
        assert not led.is_locked("2026-02")
    assert _dump(ledger_path) == before


def test_failure_halfway_through_the_rows(make_close_result, ledger_path, monkeypatch):
    import inventory.ledger.store as ledger_mod

    with Ledger(ledger_path) as led:
        led.record_close(make_close_result("2026-01"), INPUTS, "0.1.0")
    before = _dump(ledger_path)
    real = ledger_mod._to_sql
    calls = {"n": 0}

    def flaky(v):
        calls["n"] += 1
        if calls["n"] == 40:  # inside the second pile's balance row
            raise OSError("simulated crash")
        return real(v)

    monkeypatch.setattr(ledger_mod, "_to_sql", flaky)
    with Ledger(ledger_path) as led:
        with pytest.raises(OSError, match="simulated crash"):
            led.record_close(make_close_result("2026-02", period_index=1), INPUTS, "0.1.0")
    assert calls["n"] == 40
    assert _dump(ledger_path) == before


def test_failed_first_close_leaves_no_file(make_close_result, tmp_path):
    path = tmp_path / "ledger.sqlite"
    with Ledger(path) as led:
        assert led.history().empty
        with pytest.raises(RuntimeError):
            with led.closing(make_close_result("2026-01"), INPUTS, "0.1.0"):
                raise RuntimeError("interrupted")
        # and a second attempt through the same object still works
        led.record_close(make_close_result("2026-01"), INPUTS, "0.1.0")
    assert sorted(p.name for p in tmp_path.iterdir() if p.name == "ledger.sqlite") == [
        "ledger.sqlite"]
    path2 = tmp_path / "other.sqlite"
    with Ledger(path2) as led:
        with pytest.raises(RuntimeError):
            with led.closing(make_close_result("2026-01"), INPUTS, "0.1.0"):
                raise RuntimeError("interrupted")
    assert not any(p.name.startswith("other.sqlite") for p in tmp_path.iterdir())


def test_two_first_closes_of_one_site(make_close_result, tmp_path):
    path = tmp_path / "ledger.sqlite"
    first, second = Ledger(path).open(), Ledger(path).open()
    try:
        assert not path.exists()
        first.record_close(make_close_result("2026-01"), INPUTS, "0.1.0", who="a")
        # the second saw no ledger when it opened; it must find the first one's close now,
        # refuse, and leave the file alone
        with pytest.raises(PeriodLockedError):
            second.record_close(make_close_result("2026-01"), INPUTS, "0.1.0", who="b")
        assert path.exists()
        assert second.is_locked("2026-01")
    finally:
        first.close()
        second.close()
    with Ledger(path) as led:
        assert led.closes()["closed_by"].tolist() == ["a"]


def test_bad_input_hash_rolls_back(make_close_result, ledger_path):
    with Ledger(ledger_path) as led:
        with pytest.raises(LedgerError, match="not a SHA-256"):
            led.record_close(make_close_result("2026-01"), {"a.csv": "xyz"}, "0.1.0")
        assert not led.is_locked("2026-01")


def test_history_filters(make_close_result, ledger_path):
    with Ledger(ledger_path) as led:
        m1 = make_close_result("2026-01")
        led.record_close(m1, INPUTS, "0.1.0")
        opening = led.opening_for("2026-02")
        m2 = make_close_result("2026-02", opening=opening, period_index=1)
        led.record_close(m2, INPUTS, "0.1.0")
        everything = led.history()
        assert list(everything.columns) == HISTORY_COLUMNS
        assert len(everything) == 6
        assert everything["period"].tolist() == ["2026-01"] * 3 + ["2026-02"] * 3
        # February opens where January closed
        feb = everything[everything.period == "2026-02"].set_index("pile_id")
        jan = everything[everything.period == "2026-01"].set_index("pile_id")
        assert feb["opening_t"].to_dict() == jan["closing_t"].to_dict()
        one = led.history(pile="P-COAL-2")
        assert one["pile_id"].unique().tolist() == ["P-COAL-2"] and len(one) == 2
        lime = led.history(material="limestone")
        assert lime["material"].unique().tolist() == ["limestone"]
        assert led.history(start="2026-02")["period"].unique().tolist() == ["2026-02"]
        assert led.history(end="2026-01")["period"].unique().tolist() == ["2026-01"]
        assert led.history(start="2026-01", end="2026-02", pile="P-LIME-1",
                           material="limestone")["variance_t"].tolist() == [
            m1.piles.loc[2, "variance_t"], m2.piles.loc[2, "variance_t"]]
        assert led.history(pile="NOPE").empty
        with pytest.raises(LedgerError, match="after end"):
            led.history(start="2026-02", end="2026-01")
        with pytest.raises(LedgerError, match="YYYY-MM"):
            led.history(start="2026-13")
        assert everything["significant"].map(type).eq(bool).all()


def test_not_a_ledger(tmp_path):
    junk = tmp_path / "ledger.sqlite"
    junk.write_bytes(b"this is not sqlite" * 100)
    with pytest.raises(LedgerError, match="ledger"):
        Ledger(junk).open()
    other = tmp_path / "other.sqlite"
    con = sqlite3.connect(other)
    con.execute("CREATE TABLE t (x)")
    con.commit()
    con.close()
    with pytest.raises(LedgerError, match="schema_version"):
        Ledger(other).open()


def test_newer_schema_is_refused(make_close_result, ledger_path):
    with Ledger(ledger_path) as led:
        led.record_close(make_close_result("2026-01"), INPUTS, "0.1.0")
    con = sqlite3.connect(ledger_path)
    con.execute("INSERT INTO schema_version VALUES (?, 'later')", (SCHEMA_VERSION + 1,))
    con.commit()
    con.close()
    with pytest.raises(LedgerError, match="newer than this tool"):
        Ledger(ledger_path).open()


def test_period_format_is_checked(make_close_result, ledger_path):
    with Ledger(ledger_path) as led:
        for bad in ("2026-1", "2026-00", "26-01", "2026/01"):
            with pytest.raises(LedgerError, match="YYYY-MM"):
                led.is_locked(bad)
        res = make_close_result("2026-01")
        res.period = "2026-13"
        with pytest.raises(LedgerError, match="YYYY-MM"):
            led.record_close(res, INPUTS, "0.1.0")


def _as_version_3(path) -> None:
    """Turn a ledger into the layout of schema version 3 (before the parts of the volume
    sigma), as a file written by that release would be."""
    con = sqlite3.connect(path)
    con.executescript(
        "".join(f"ALTER TABLE balances DROP COLUMN {c};" for c in VOLUME_SIGMA_COLUMNS)
        + "UPDATE schema_version SET version = 3;"
    )
    con.commit()
    con.close()


def _as_version_1(path) -> None:
    """Turn a ledger into the layout of schema version 1 (before base_sigma_t and the scale
    fit rows; before the finance views of version 3), as a file written by the first
    release would be."""
    _as_version_3(path)
    con = sqlite3.connect(path)
    con.executescript(
        "DROP VIEW adopted_balances; DROP VIEW adopted_journal; DROP VIEW variance_by_material_month;"
        "DROP VIEW close_history;"
        "DROP TRIGGER scale_fit_rows_keep; DROP TRIGGER scale_fit_rows_frozen; DROP TABLE scale_fit_rows;"
        "ALTER TABLE balances DROP COLUMN base_sigma_t; UPDATE schema_version SET version = 1;"
    )
    con.commit()
    con.close()


def test_version_1_ledger_is_upgraded_in_place_keeping_every_close(make_close_result, ledger_path):
    res = make_close_result("2026-01")
    with Ledger(ledger_path) as led:
        led.record_close(res, INPUTS, "0.1.0")
    _as_version_1(ledger_path)
    before = [r for r in _dump(ledger_path) if r.startswith("INSERT INTO \"balances\"")]
    with Ledger(ledger_path) as led:
        assert led.schema_version() == SCHEMA_VERSION == 4
        back = led.adopted("2026-01")
        # the old close reads back with every figure; the new columns are unknown for it
        new = ["base_sigma_t", *VOLUME_SIGMA_COLUMNS]
        _same_frame(res.piles, back, [c for c in PILE_COLUMNS if c not in new])
        assert back[new].isna().all().all()
        assert led.scale_fit_history("2026-02").empty
        # and the next close keeps its scale fit rows
        nxt = make_close_result("2026-02")
        nxt.bias_rows = pd.DataFrame({"period": ["2026-02"], "pile_id": ["P1"], "scale_id": ["BC1"],
                                      "signed_t": [1200.0], "variance_t": [-15.0], "noise_sigma_t": [9.0]})
        led.record_close(nxt, INPUTS, "0.2.0")
        hist = led.scale_fit_history("2026-03")
    assert hist.values.tolist() == [["2026-02", "P1", "BC1", 1200.0, -15.0, 9.0]]
    # the old rows are still there, one more column at the end (NULL)
    after = [r for r in _dump(ledger_path) if r.startswith("INSERT INTO \"balances\"")]
    assert [re.sub(r"(,NULL){5}\);$", ");", a) for a in after[: len(before)]] == before


def test_version_3_ledger_gets_the_volume_sigma_parts(make_close_result, ledger_path):
    """3 -> 4 adds the four parts of the volume sigma; old closes keep every figure, NULL parts."""
    res = make_close_result("2026-01")
    res.piles["sigma_random_m3"] = 1.5
    with Ledger(ledger_path) as led:
        led.record_close(res, INPUTS, "0.1.0")
    _as_version_3(ledger_path)
    with Ledger(ledger_path) as led:
        assert led.schema_version() == 4
        back = led.adopted("2026-01")
        _same_frame(res.piles, back, [c for c in PILE_COLUMNS if c not in VOLUME_SIGMA_COLUMNS])
        assert back[VOLUME_SIGMA_COLUMNS].isna().all().all()
        nxt = make_close_result("2026-02")
        nxt.piles["sigma_random_m3"] = 2.25
        led.record_close(nxt, INPUTS, "0.2.0")
        assert led.adopted("2026-02")["sigma_random_m3"].tolist() == [2.25] * len(nxt.piles)


def test_upgrade_that_cannot_write_leaves_the_file_unchanged(make_close_result, ledger_path, tmp_path):
    with Ledger(ledger_path) as led:
        led.record_close(make_close_result("2026-01"), INPUTS, "0.1.0")
    _as_version_1(ledger_path)
    before = _dump(ledger_path)
    # an existing table of the new layout's name makes the upgrade fail half-way
    con = sqlite3.connect(ledger_path)
    con.execute("CREATE TABLE scale_fit_rows (x)")
    con.commit()
    con.close()
    with pytest.raises(LedgerError, match="cannot upgrade the ledger from schema version 1 to 2"):
        Ledger(ledger_path).open()
    con = sqlite3.connect(ledger_path)
    con.execute("DROP TABLE scale_fit_rows")
    con.commit()
    con.close()
    assert _dump(ledger_path) == before


def test_scale_fit_history_takes_adopted_closes_of_the_months_before(make_close_result, ledger_path):
    def close(period, variance):
        r = make_close_result(period)
        r.bias_rows = pd.DataFrame({"period": [period], "pile_id": ["P1"], "scale_id": ["BC1"],
                                    "signed_t": [1000.0], "variance_t": [variance], "noise_sigma_t": [5.0]})
        return r

    with Ledger(ledger_path) as led:
        for i, period in enumerate(("2026-01", "2026-02", "2026-03")):
            led.record_close(close(period, float(i)), INPUTS, "0.2.0")
        led.reopen("2026-03", "density corrected")
        led.record_close(close("2026-03", 9.0), INPUTS, "0.2.0")
        every = led.scale_fit_history("2026-04")
        last_two = led.scale_fit_history("2026-04", months=2)
        before_march = led.scale_fit_history("2026-03")
        with pytest.raises(sqlite3.DatabaseError, match="cannot be edited"):
            led._db.execute("UPDATE scale_fit_rows SET variance_t = 0")
    # the superseded March close (variance 2) is not pooled; its replacement (9) is
    assert every[["period", "variance_t"]].values.tolist() == [["2026-01", 0.0], ["2026-02", 1.0], ["2026-03", 9.0]]
    assert last_two["period"].tolist() == ["2026-02", "2026-03"]
    assert before_march["period"].tolist() == ["2026-01", "2026-02"]
