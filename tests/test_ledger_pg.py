"""The shared ledger on a real PostgreSQL server: the same rules as the SQLite ledger, site
ids, views, triggers, migrations, and concurrent closes that come out right.

A throwaway cluster is started for this module (initdb, pg_ctl, a Unix socket in a temporary
folder, no TCP) and stopped after it. The tests skip, saying why, when the server binaries
are not installed (Debian: ``apt-get install postgresql``; ``.ci/ensure-tools`` does it) or
when they cannot run here (initdb refuses root, so as root they run as the ``postgres`` user).
"""

from __future__ import annotations

import glob
import itertools
import os
import shutil
import subprocess
import tempfile
import threading
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from inventory.errors import LedgerError, PeriodLockedError
from inventory.ledger.schema import SCHEMA_VERSION, VIEW_NAMES
from inventory.ledger.store import Ledger
from inventory.model.results import PILE_COLUMNS

psycopg = pytest.importorskip("psycopg", reason="psycopg 3 is not installed (pip install 'psycopg[binary]')")

pytestmark = pytest.mark.tools  # a PostgreSQL server (initdb, pg_ctl)

INPUTS = {"surveys/2026-01-28/scan.laz": "1" * 64, "movements/2026-01/weighbridge.csv": "2" * 64}


def _bindir() -> Path | None:
    for cand in sorted(glob.glob("/usr/lib/postgresql/*/bin"), reverse=True):
        if Path(cand, "initdb").is_file() and Path(cand, "pg_ctl").is_file():
            return Path(cand)
    found = shutil.which("initdb")
    if found and shutil.which("pg_ctl"):
        return Path(found).parent
    return None


@pytest.fixture(scope="module")
def cluster():
    """``(admin URL, make_db)``: a throwaway PostgreSQL cluster on a socket in a temp folder."""
    bindir = _bindir()
    if bindir is None:
        pytest.skip("no PostgreSQL server binaries (initdb, pg_ctl): apt-get install postgresql "
                    "(.ci/ensure-tools does it as root)")
    run_as: list[str] = []
    if os.geteuid() == 0:
        # initdb refuses to run as root (PostgreSQL docs, "Creating a Database Cluster")
        if shutil.which("runuser") is None or subprocess.run(["id", "postgres"], capture_output=True).returncode:
            pytest.skip("running as root without a 'postgres' user to run initdb as")
        run_as = ["runuser", "-u", "postgres", "--"]
    root = Path(tempfile.mkdtemp(prefix="inv-pg-"))
    if run_as:
        shutil.chown(root, user="postgres")
    data = root / "data"
    init = subprocess.run([*run_as, str(bindir / "initdb"), "-D", str(data), "-A", "trust", "-U", "postgres",
                           "--no-sync", "-E", "UTF8"], capture_output=True, text=True)
    if init.returncode:
        shutil.rmtree(root, ignore_errors=True)
        pytest.skip(f"initdb failed here: {init.stderr.strip()[:300]}")
    opts = f"-k {root} -c listen_addresses='' -F -c max_connections=40"
    start = subprocess.run([*run_as, str(bindir / "pg_ctl"), "-D", str(data), "-o", opts, "-l",
                            str(root / "server.log"), "-w", "-t", "60", "start"], capture_output=True, text=True)
    if start.returncode:
        log = (root / "server.log").read_text(errors="replace")[-300:] if (root / "server.log").exists() else ""
        shutil.rmtree(root, ignore_errors=True)
        pytest.skip(f"pg_ctl could not start a cluster here: {start.stderr.strip()[:200]} {log}")
    admin = f"postgresql://postgres@/postgres?host={root}"
    counter = itertools.count()

    def make_db() -> str:
        name = f"ledger_{next(counter)}"
        with psycopg.connect(admin, autocommit=True) as con:
            con.execute(f"CREATE DATABASE {name}")
        return f"postgresql://postgres@/{name}?host={root}"

    try:
        yield admin, make_db
    finally:
        subprocess.run([*run_as, str(bindir / "pg_ctl"), "-D", str(data), "-m", "immediate", "-w", "stop"],
                       capture_output=True)
        shutil.rmtree(root, ignore_errors=True)


@pytest.fixture
def url(cluster):
    return cluster[1]()


def _same(a: pd.DataFrame, b: pd.DataFrame) -> None:
    for col in PILE_COLUMNS:
        for u, v in zip(a[col].tolist(), b[col].tolist()):
            if isinstance(u, float) and np.isnan(u):
                assert v is None or (isinstance(v, float) and np.isnan(v)), (col, u, v)
            else:
                assert u == v, (col, u, v)


def test_round_trip_is_exact_and_equal_to_sqlite(make_close_result, url, tmp_path):
    from inventory.ledger.pg import PgLedger

    res = make_close_result("2026-01")
    with PgLedger(url, "yard-a") as led:
        close_id = led.record_close(res, INPUTS, "0.1.0", who="controller")
        assert led.schema_version() == SCHEMA_VERSION
        back = led.adopted("2026-01")
        assert led.inputs("2026-01") == INPUTS
        journal = led.journal("2026-01")
        hist = led.history()
        closes = led.closes()
    with Ledger(tmp_path / "ledger.sqlite") as lite:
        lite.record_close(res, INPUTS, "0.1.0", who="controller")
        lite_hist = lite.history()
    _same(res.piles, back)
    assert close_id == 1 and closes.loc[0, "site_id"] == "yard-a"
    assert journal["adjustment_t"].tolist() == res.journal["adjustment_t"].tolist()
    # the same history, with the site named
    assert hist["site_id"].tolist() == ["yard-a"] * len(res.piles)
    # (closed when the test ran: the two clocks may differ by a second)
    pd.testing.assert_frame_equal(hist.drop(columns=["site_id", "closed_utc"]), lite_hist.drop(columns="closed_utc"))


def test_two_sites_share_the_database_but_not_their_periods(make_close_result, url):
    from inventory.ledger.pg import PgLedger

    a, b = PgLedger(url, "yard-a"), PgLedger(url, "yard-b")
    with a, b:
        a.record_close(make_close_result("2026-01"), INPUTS, "0.1.0")
        assert not b.is_locked("2026-01") and b.opening_for("2026-01") is None
        b.record_close(make_close_result("2026-01"), INPUTS, "0.1.0")
        a.record_close(make_close_result("2026-02", opening=a.opening_for("2026-02"), period_index=1),
                       INPUTS, "0.1.0")
        assert a.closed_periods() == ["2026-01", "2026-02"] and b.closed_periods() == ["2026-01"]
        with pytest.raises(PeriodLockedError):
            b.record_close(make_close_result("2026-01"), INPUTS, "0.1.0")
        b.reopen("2026-01", "late tickets", who="b")
        assert a.is_locked("2026-01") and not b.is_locked("2026-01")
        assert len(a.reopenings()) == 0 and len(b.reopenings()) == 1
    with PgLedger(url, None) as every:
        hist = every.history()
        assert sorted(set(zip(hist["site_id"], hist["period"]))) == [
            ("yard-a", "2026-01"), ("yard-a", "2026-02")]  # yard-b's only close was reopened
        assert every.site_ids() == ["yard-a", "yard-b"]
        with pytest.raises(LedgerError, match="every site"):
            every.record_close(make_close_result("2026-03"), INPUTS, "0.1.0")
    with psycopg.connect(url) as con:
        rows = con.execute("SELECT site_id, period, material, piles FROM variance_by_material_month "
                           "ORDER BY site_id, period, material").fetchall()
        assert rows == [("yard-a", "2026-01", "coal", 2), ("yard-a", "2026-01", "limestone", 1),
                        ("yard-a", "2026-02", "coal", 2), ("yard-a", "2026-02", "limestone", 1)]
        hist = con.execute("SELECT site_id, status, reopen_reason FROM close_history ORDER BY close_id").fetchall()
        assert hist == [("yard-a", "adopted", None), ("yard-b", "superseded", "late tickets"),
                        ("yard-a", "adopted", None)]
        views = {r[0] for r in con.execute(
            "SELECT table_name FROM information_schema.views WHERE table_schema = 'public'")}
        assert set(VIEW_NAMES) | {"periods"} <= views


def test_triggers_refuse_deletes_edits_and_truncation(make_close_result, url):
    from inventory.ledger.pg import PgLedger

    with PgLedger(url, "yard-a") as led:
        led.record_close(make_close_result("2026-01"), INPUTS, "0.1.0")
        led.reopen("2026-01", "rescan", who="b")
    for sql, text in [
        ("DELETE FROM closes", "closes are kept forever"),
        ("TRUNCATE balances CASCADE", "balances are kept forever"),
        ("UPDATE balances SET survey_t = 0", "balances cannot be edited"),
        ("UPDATE closes SET status = 'adopted'", "a close can only be superseded"),
        ("UPDATE closes SET site_id = 'yard-z'", "a close can only be superseded"),
        ("DELETE FROM reopenings", "reopenings are kept forever"),
        ("UPDATE journal SET adjustment_t = 0", "journal lines cannot be edited"),
        ("DELETE FROM inputs", "input hashes are kept forever"),
        ("INSERT INTO closes (site_id, period, site_name, crs, survey_date, survey_instant_utc, "
         "software_version, closed_utc, closed_by, status) VALUES ('yard-a', '26-01', 'x', 'x', 'x', "
         "'x', 'x', 'x', 'x', 'adopted')", "closes_period_check"),
    ]:
        with psycopg.connect(url) as con:
            with pytest.raises(psycopg.Error, match=text):
                con.execute(sql)


def test_a_failed_close_leaves_nothing(make_close_result, url):
    from inventory.ledger.pg import PgLedger

    with PgLedger(url, "yard-a") as led:
        with pytest.raises(RuntimeError, match="outputs failed"):
            with led.closing(make_close_result("2026-01"), INPUTS, "0.1.0"):
                raise RuntimeError("outputs failed")
        assert not led.is_locked("2026-01")
    with psycopg.connect(url) as con:
        for table in ("closes", "balances", "journal", "inputs"):
            assert con.execute(f"SELECT COUNT(*) FROM {table}").fetchone()[0] == 0


def test_two_sites_closing_at_once_both_succeed(make_close_result, url):
    from inventory.ledger.pg import PgLedger

    inside = threading.Barrier(2, timeout=30)
    out: dict[str, object] = {}

    def close(site: str) -> None:
        try:
            with PgLedger(url, site) as led:
                with led.closing(make_close_result("2026-01"), INPUTS, "0.1.0") as cid:
                    inside.wait()  # both hold their site's lock at the same moment
                    out[site] = cid
        except BaseException as err:  # reported below
            out[site] = err

    threads = [threading.Thread(target=close, args=(s,)) for s in ("yard-a", "yard-b")]
    for t in threads:
        t.start()
    for t in threads:
        t.join(60)
    assert sorted(map(str, out.values())) == ["1", "2"], out
    with PgLedger(url, None) as every:
        assert sorted(every.history()["site_id"].unique()) == ["yard-a", "yard-b"]


def test_same_site_closed_twice_at_once_one_waits_then_is_refused(make_close_result, url):
    from inventory.ledger.pg import PgLedger

    events: list[str] = []
    holding = threading.Event()
    out: dict[str, object] = {}

    def first() -> None:
        with PgLedger(url, "yard-a") as led:
            with led.closing(make_close_result("2026-01"), INPUTS, "0.1.0") as cid:
                holding.set()
                time.sleep(1.0)  # writing outputs while the second close tries
                events.append("first commits")
                out["first"] = cid

    def second() -> None:
        holding.wait(30)
        with PgLedger(url, "yard-a") as led:
            try:
                led.record_close(make_close_result("2026-01"), INPUTS, "0.1.0")
                out["second"] = "closed"
            except PeriodLockedError as err:
                out["second"] = err
            events.append("second answered")

    threads = [threading.Thread(target=first), threading.Thread(target=second)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(60)
    assert out["first"] == 1
    assert isinstance(out["second"], PeriodLockedError), out
    assert events == ["first commits", "second answered"]  # it waited for the lock
    with psycopg.connect(url) as con:
        assert con.execute("SELECT COUNT(*) FROM closes").fetchone()[0] == 1
        assert con.execute("SELECT COUNT(DISTINCT close_id) FROM balances").fetchone()[0] == 1


def test_an_older_shared_ledger_is_upgraded_and_a_newer_one_refused(make_close_result, url):
    from inventory.ledger.pg import PgLedger

    with PgLedger(url, "yard-a") as led:
        led.record_close(make_close_result("2026-01"), INPUTS, "0.1.0")
    with psycopg.connect(url, autocommit=True) as con:
        # back to the layout of schema 2: no finance views (3), no parts of the volume sigma (4)
        con.execute("DROP VIEW adopted_balances, adopted_journal, variance_by_material_month, close_history")
        for col in ("sigma_random_m3", "sigma_correlated_m3", "sigma_interpolated_m3", "sigma_base_m3"):
            con.execute(f"ALTER TABLE balances DROP COLUMN {col}")
        con.execute("DELETE FROM schema_version WHERE version IN (3, 4)")
    with PgLedger(url, "yard-a") as led:
        assert led.schema_version() == SCHEMA_VERSION == 4
        assert len(led.adopted("2026-01")) == 3
    with psycopg.connect(url, autocommit=True) as con:
        assert con.execute("SELECT COUNT(*) FROM adopted_balances").fetchone()[0] == 3
        con.execute("INSERT INTO schema_version VALUES (99, 'later')")
    with pytest.raises(LedgerError, match="newer than this tool"):
        PgLedger(url, "yard-a").open()


def test_site_toml_and_the_command_line_choose_the_shared_ledger(make_close_result, url, tmp_path, capsys):
    from inventory.cli import main
    from inventory.close import open_ledger
    from inventory.ledger.pg import PgLedger

    site = tmp_path / "site"
    site.mkdir()
    (site / "site.toml").write_text(f'name = "North Yard"\n[ledger]\nurl = "{url}"\n', encoding="utf-8")
    chosen = open_ledger(site)
    assert isinstance(chosen, PgLedger) and chosen.site_id == "North Yard"
    assert isinstance(open_ledger(tmp_path), Ledger) and not isinstance(open_ledger(tmp_path), PgLedger)
    with chosen as led:
        led.record_close(make_close_result("2026-01"), INPUTS, "0.1.0")
    with PgLedger(url, "South Yard") as led:
        led.record_close(make_close_result("2026-01"), INPUTS, "0.1.0")
    # history across all sites of the shared ledger, with or without a site folder
    assert main(["history", "--ledger", url, "--format", "csv"]) == 0
    lines = capsys.readouterr().out.strip().splitlines()
    assert lines[0].startswith("site_id,period,pile_id") and len(lines) == 1 + 6
    assert main(["history", str(site), "--by", "material", "--format", "csv"]) == 0
    by = pd.read_csv(__import__("io").StringIO(capsys.readouterr().out))
    assert by["material"].tolist() == ["coal", "limestone", "Total"]
    assert by.loc[0, "piles"] == 4  # two coal piles at each of two sites
    assert main(["history", "--ledger", url, "--site-id", "South Yard", "--format", "csv"]) == 0
    assert len(capsys.readouterr().out.strip().splitlines()) == 1 + 3
    assert main(["history", "--ledger", url, "--site-id", "south yard"]) == 2
    assert "did you mean 'South Yard'?" in capsys.readouterr().err
    # reopen through the site's own ledger choice
    assert main(["reopen", str(site), "--period", "2026-01", "--reason", "rescan"]) == 0
    with PgLedger(url, "North Yard") as led:
        assert not led.is_locked("2026-01")
    with PgLedger(url, "South Yard") as led:
        assert led.is_locked("2026-01")


@pytest.mark.slow
def test_two_sample_sites_close_into_one_shared_ledger(url, sample_site_path, survey_cache, tmp_path, capsys):
    from inventory.cli import main

    if not (sample_site_path / "site.toml").is_file():
        pytest.skip("sample_site/ has not been generated yet (inventory sample sample_site)")
    sites = []
    for site_id in ("oxbow", "beacon"):
        site = tmp_path / site_id
        shutil.copytree(sample_site_path, site, ignore=shutil.ignore_patterns("closes", "ledger.sqlite*"))
        with open(site / "site.toml", "a", encoding="utf-8") as fh:
            fh.write(f'\n[ledger]\nurl = "{url}"\nsite_id = "{site_id}"\n')
        sites.append(site)
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr("inventory.survey.measure.measure_survey", survey_cache)
        assert main(["close", str(sites[0]), "--period", "2026-09", "--quiet"]) == 0
        assert main(["close", str(sites[1]), "--period", "2026-09", "--quiet"]) == 0
        assert main(["close", str(sites[0]), "--period", "2026-10", "--quiet"]) == 0
        # locked in the shared ledger, not in a file of the site folder
        assert main(["close", str(sites[0]), "--period", "2026-10", "--quiet"]) == 2
    capsys.readouterr()
    assert not (sites[0] / "ledger.sqlite").exists()
    assert main(["history", "--ledger", url, "--by", "month", "--format", "csv"]) == 0
    import io

    by = pd.read_csv(io.StringIO(capsys.readouterr().out))
    assert by["period"].tolist() == ["2026-09", "2026-10", "Total"]
    assert by["piles"].tolist() == [14, 7, 14]
    # the two sites' September closes are the same books and the same survey
    with psycopg.connect(url) as con:
        rows = con.execute("SELECT site_id, SUM(variance_t) FROM adopted_balances WHERE period = '2026-09' "
                           "GROUP BY site_id ORDER BY site_id").fetchall()
    assert [r[0] for r in rows] == ["beacon", "oxbow"] and rows[0][1] == pytest.approx(rows[1][1])
    assert by.loc[0, "variance_t"] == pytest.approx(2 * rows[0][1])
