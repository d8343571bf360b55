"""The ledger: every close of a site, kept in one SQLite file beside the site folder.

One close is one transaction: the period, every pile's balances, the adjustment journal and
the SHA-256 of every input are written together or not at all. A closed period is locked;
closing it again needs :meth:`Ledger.reopen` with a reason. Reopening never deletes: the old
close is marked *superseded* and stays readable, and the reopening (who, when, why) is kept
for good (triggers refuse deletes and edits), so history can show what was adopted when.

The next period's opening balances are the adopted closing tonnes of the previous month.

Examples
--------
>>> import tempfile, pathlib
>>> with tempfile.TemporaryDirectory() as d:
...     with Ledger(pathlib.Path(d) / "ledger.sqlite") as led:
...         (led.is_locked("2026-01"), led.opening_for("2026-01"))
(False, None)
"""

from __future__ import annotations

import getpass
import math
import re
import sqlite3
from contextlib import contextmanager
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Iterator, Mapping

import numpy as np
import pandas as pd

from inventory.errors import LedgerError, PeriodLockedError
from inventory.model.period import Period
from inventory.model.results import JOURNAL_COLUMNS, PILE_COLUMNS, CloseResult

__all__ = ["Ledger", "SCHEMA_VERSION", "BALANCE_COLUMNS", "HISTORY_COLUMNS", "SCALE_FIT_COLUMNS"]

#: Version of the table layout below; bumped on any change, checked on open. A ledger of an
#: older version is brought up to date on open by :data:`_MIGRATIONS`, in one transaction.
SCHEMA_VERSION = 2

#: Pile columns stored per close, with their SQLite type (every figure of the close).
_TEXT_COLUMNS = {"pile_id", "material", "base_method", "flags"}
_BOOL_COLUMNS = {"significant", "out_of_tolerance"}
BALANCE_COLUMNS = list(PILE_COLUMNS)

#: Columns of :meth:`Ledger.history`.
HISTORY_COLUMNS = [
    "period", "pile_id", "material", "opening_t", "receipts_t", "dispatches_t",
    "transfers_in_t", "transfers_out_t", "book_t", "book_sigma_t", "survey_t",
    "survey_sigma_t", "variance_t", "variance_pct", "variance_sigma_t", "significant",
    "tolerance_pct", "out_of_tolerance", "adjustment_t", "closing_t", "status",
    "close_id", "closed_utc", "closed_by", "survey_date", "software_version",
]


def _sql_type(col: str) -> str:
    if col in _TEXT_COLUMNS:
        return "TEXT"
    if col in _BOOL_COLUMNS:
        return "INTEGER CHECK ({0} IN (0, 1) OR {0} IS NULL)".format(col)
    return "REAL"


_BALANCE_DDL = ",\n    ".join(
    f"{c} {_sql_type(c)}" + (" NOT NULL" if c == "pile_id" else "") for c in BALANCE_COLUMNS
)

# Deletes and edits are refused by triggers, not by convention, so that a tool other than
# ours (a DB browser) cannot quietly rewrite what was adopted.
#: The belt-scale fit rows of each close (schema 2), kept and read-only like the rest.
_SCALE_FIT_TABLE = """CREATE TABLE scale_fit_rows (
    close_id      INTEGER NOT NULL REFERENCES closes(close_id),
    line          INTEGER NOT NULL,
    pile_id       TEXT NOT NULL,
    scale_id      TEXT,
    signed_t      REAL NOT NULL,
    variance_t    REAL,
    noise_sigma_t REAL,
    PRIMARY KEY (close_id, line)
);
"""
_SCALE_FIT_TRIGGERS = """CREATE TRIGGER scale_fit_rows_keep BEFORE DELETE ON scale_fit_rows
    BEGIN SELECT RAISE(ABORT, 'scale fit rows are kept forever'); END;
CREATE TRIGGER scale_fit_rows_frozen BEFORE UPDATE ON scale_fit_rows
    BEGIN SELECT RAISE(ABORT, 'scale fit rows cannot be edited'); END;
"""

_SCHEMA = f"""
CREATE TABLE schema_version (
    version     INTEGER NOT NULL,
    applied_utc TEXT NOT NULL
);
CREATE TABLE closes (
    close_id             INTEGER PRIMARY KEY,
    period               TEXT NOT NULL CHECK (period GLOB '[0-9][0-9][0-9][0-9]-[0-1][0-9]'),
    site_name            TEXT NOT NULL,
    crs                  TEXT NOT NULL,
    survey_date          TEXT NOT NULL,
    survey_instant_utc   TEXT NOT NULL,
    previous_survey_date TEXT,
    software_version     TEXT NOT NULL,
    closed_utc           TEXT NOT NULL,
    closed_by            TEXT NOT NULL,
    status               TEXT NOT NULL CHECK (status IN ('adopted', 'superseded'))
);
-- at most one adopted close per period: the lock
CREATE UNIQUE INDEX closes_one_adopted ON closes(period) WHERE status = 'adopted';
CREATE TABLE balances (
    close_id INTEGER NOT NULL REFERENCES closes(close_id),
    {_BALANCE_DDL},
    PRIMARY KEY (close_id, pile_id)
);
CREATE TABLE journal (
    close_id     INTEGER NOT NULL REFERENCES closes(close_id),
    line         INTEGER NOT NULL,
    pile_id      TEXT NOT NULL,
    material     TEXT,
    adjustment_t REAL NOT NULL,
    reason_code  TEXT,
    reason       TEXT,
    PRIMARY KEY (close_id, line)
);
CREATE TABLE inputs (
    close_id INTEGER NOT NULL REFERENCES closes(close_id),
    path     TEXT NOT NULL,
    sha256   TEXT NOT NULL CHECK (length(sha256) = 64),
    PRIMARY KEY (close_id, path)
);
{_SCALE_FIT_TABLE}CREATE TABLE reopenings (
    reopen_id    INTEGER PRIMARY KEY,
    period       TEXT NOT NULL,
    close_id     INTEGER NOT NULL REFERENCES closes(close_id),
    reopened_utc TEXT NOT NULL,
    reopened_by  TEXT NOT NULL,
    reason       TEXT NOT NULL CHECK (length(trim(reason)) > 0)
);
-- one row per period ever closed: for a person browsing the file
CREATE VIEW periods AS
    SELECT period,
           MAX(status = 'adopted') AS locked,
           MAX(CASE WHEN status = 'adopted' THEN close_id END) AS adopted_close_id,
           COUNT(*) AS closes,
           (SELECT COUNT(*) FROM reopenings r WHERE r.period = c.period) AS reopenings
    FROM closes c GROUP BY period;
CREATE TRIGGER closes_keep BEFORE DELETE ON closes
    BEGIN SELECT RAISE(ABORT, 'closes are kept forever'); END;
CREATE TRIGGER closes_only_supersede BEFORE UPDATE ON closes
    WHEN NOT (OLD.status = 'adopted' AND NEW.status = 'superseded'
              AND NEW.close_id = OLD.close_id AND NEW.period = OLD.period
              AND NEW.closed_utc = OLD.closed_utc AND NEW.closed_by = OLD.closed_by)
    BEGIN SELECT RAISE(ABORT, 'a close can only be superseded, not edited'); END;
CREATE TRIGGER balances_keep BEFORE DELETE ON balances
    BEGIN SELECT RAISE(ABORT, 'balances are kept forever'); END;
CREATE TRIGGER balances_frozen BEFORE UPDATE ON balances
    BEGIN SELECT RAISE(ABORT, 'balances cannot be edited'); END;
CREATE TRIGGER journal_keep BEFORE DELETE ON journal
    BEGIN SELECT RAISE(ABORT, 'journal lines are kept forever'); END;
CREATE TRIGGER journal_frozen BEFORE UPDATE ON journal
    BEGIN SELECT RAISE(ABORT, 'journal lines cannot be edited'); END;
CREATE TRIGGER inputs_keep BEFORE DELETE ON inputs
    BEGIN SELECT RAISE(ABORT, 'input hashes are kept forever'); END;
CREATE TRIGGER inputs_frozen BEFORE UPDATE ON inputs
    BEGIN SELECT RAISE(ABORT, 'input hashes cannot be edited'); END;
{_SCALE_FIT_TRIGGERS}CREATE TRIGGER reopenings_keep BEFORE DELETE ON reopenings
    BEGIN SELECT RAISE(ABORT, 'reopenings are kept forever'); END;
CREATE TRIGGER reopenings_frozen BEFORE UPDATE ON reopenings
    BEGIN SELECT RAISE(ABORT, 'reopenings cannot be edited'); END;
"""


#: Schema changes, from the version a ledger has to the next one. Each runs in one
#: transaction with the new version row, so a ledger is either migrated or untouched.
#: 1 -> 2: ``balances.base_sigma_t`` (the fixed-base part of the survey sigma, NULL for
#: closes made before: no shared part known) and the belt-scale fit rows of each close.
_MIGRATIONS: dict[int, str] = {
    1: "ALTER TABLE balances ADD COLUMN base_sigma_t REAL;\n" + _SCALE_FIT_TABLE + _SCALE_FIT_TRIGGERS,
}

#: Columns of :meth:`Ledger.scale_fit_history` (as ``inventory.stock.reconcile.BIAS_ROW_COLUMNS``).
SCALE_FIT_COLUMNS = ["period", "pile_id", "scale_id", "signed_t", "variance_t", "noise_sigma_t"]


def _utc_now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


def _check_period(period: str | Period) -> str:
    """The period as the ledger stores it (``YYYY-MM`` text)."""
    try:
        return str(Period.parse(period))
    except ValueError as err:
        raise LedgerError(str(err)) from err


def _to_sql(value: Any) -> Any:
    """A pandas/numpy cell as a plain Python value SQLite stores exactly (NaN -> NULL)."""
    if value is None or value is pd.NA or value is pd.NaT:
        return None
    if isinstance(value, (bool, np.bool_)):
        return int(bool(value))
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        f = float(value)
        return f if math.isfinite(f) else None
    return value


def _instant_text(instant: Any) -> str:
    if isinstance(instant, datetime):
        if instant.tzinfo is None:
            raise LedgerError(f"survey instant {instant!r} has no time zone; expected UTC")
        return instant.astimezone(timezone.utc).isoformat()
    return str(instant)


class Ledger:
    """The site's ledger of closes, as a context manager over one SQLite file.

    Parameters
    ----------
    path : str or Path
        The SQLite file (``SITE/ledger.sqlite``); created with the current schema if absent.

    Raises
    ------
    LedgerError
        When the file is not a ledger, is from a newer version of the tool, or is unreadable.
    """

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        self._con: sqlite3.Connection | None = None
        self._pending_create = False

    # -- opening and closing -------------------------------------------------------------
    def __enter__(self) -> "Ledger":
        self.open()
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    def open(self) -> "Ledger":
        """Open the ledger and check its schema version.

        A ledger that does not exist yet is not created here: reads see an empty ledger, and
        the file appears with the first committed close, so a failed first close leaves no
        file behind.
        """
        if self._con is not None:
            return self
        if self.path.exists() and self.path.stat().st_size > 0:
            self._con = self._connect(self.path)
            self._pending_create = False
            try:
                self._check_schema()
            except BaseException:
                self.close()
                raise
        else:
            self._con = self._connect(None)
            self._pending_create = True
            self._create_schema()
        return self

    def _connect(self, path: Path | None) -> sqlite3.Connection:
        try:
            # isolation_level=None: we issue BEGIN/COMMIT ourselves, one transaction per close.
            con = sqlite3.connect(
                ":memory:" if path is None else str(path), timeout=30.0, isolation_level=None
            )
            con.execute("PRAGMA foreign_keys = ON")
            if path is None:
                return con
            mode = con.execute("PRAGMA journal_mode = WAL").fetchone()[0]
            con.execute("PRAGMA synchronous = FULL")
        except sqlite3.Error as err:
            raise LedgerError(f"{self.path}: cannot open the ledger: {err}") from err
        if str(mode).lower() != "wal":
            con.close()
            raise LedgerError(f"{self.path}: SQLite refused WAL journal mode (got {mode})")
        return con

    def close(self) -> None:
        """Close the connection (safe to call twice)."""
        if self._con is not None:
            self._con.close()
            self._con = None

    @property
    def _db(self) -> sqlite3.Connection:
        if self._con is None:
            raise LedgerError(f"{self.path}: the ledger is not open (use 'with Ledger(path)')")
        return self._con

    def _create_schema(self) -> None:
        """Create the tables; inside the caller's transaction when one is open."""
        con = self._db
        own_tx = not con.in_transaction
        if own_tx:
            con.execute("BEGIN IMMEDIATE")
        try:
            for stmt in _split_sql(_SCHEMA):
                con.execute(stmt)
            con.execute(
                "INSERT INTO schema_version (version, applied_utc) VALUES (?, ?)",
                (SCHEMA_VERSION, _utc_now()),
            )
        except sqlite3.Error as err:
            if own_tx:
                con.execute("ROLLBACK")
            raise LedgerError(f"{self.path}: cannot create the ledger tables: {err}") from err
        if own_tx:
            con.execute("COMMIT")

    def _begin_write(self) -> tuple[bool, bool]:
        """BEGIN IMMEDIATE on the real file, creating it if needed.

        Returns ``(was_pending, file_is_new)``: whether this object had not touched the file
        yet, and whether the file did not exist before (then a rollback removes it again).
        """
        was_pending = self._pending_create
        file_is_new = False
        if was_pending:
            file_is_new = not self.path.exists()
            self._con.close()  # type: ignore[union-attr]
            self._con = None
            self._con = self._connect(self.path)
        try:
            self._db.execute("BEGIN IMMEDIATE")  # the write lock, before any check
        except sqlite3.Error as err:
            raise LedgerError(f"{self.path}: cannot start a transaction: {err}") from err
        if was_pending:
            try:
                # another process may have created the ledger since we looked: check again
                # now that we hold the write lock
                has_tables = self._db.execute(
                    "SELECT COUNT(*) FROM sqlite_master WHERE type = 'table'").fetchone()[0]
                if has_tables:
                    self._check_schema()
                else:
                    self._create_schema()
            except BaseException:
                self._rollback((was_pending, file_is_new))
                raise
        return was_pending, file_is_new

    def _rollback(self, state: tuple[bool, bool]) -> None:
        was_pending, file_is_new = state
        if self._db.in_transaction:
            self._db.execute("ROLLBACK")
        if not was_pending:
            return
        if not file_is_new:
            has_tables = self._db.execute(
                "SELECT COUNT(*) FROM sqlite_master WHERE type = 'table'").fetchone()[0]
            if has_tables:  # someone else's ledger: keep reading it
                self._pending_create = False
                return
        self.close()
        if file_is_new:
            # we made the file for this transaction: leave the folder as it was
            for suffix in ("", "-wal", "-shm", "-journal"):
                Path(str(self.path) + suffix).unlink(missing_ok=True)
        self._con = self._connect(None)
        self._create_schema()

    def _commit(self, state: tuple[bool, bool]) -> None:
        self._db.execute("COMMIT")
        if state[0]:
            self._pending_create = False

    def _check_schema(self) -> None:
        con = self._db
        try:
            tables = {r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type='table'")}
        except sqlite3.DatabaseError as err:
            raise LedgerError(f"{self.path}: not an SQLite ledger: {err}") from err
        if "schema_version" not in tables:
            raise LedgerError(
                f"{self.path}: an SQLite file without a schema_version table is not a ledger"
            )
        row = con.execute("SELECT MAX(version) FROM schema_version").fetchone()
        version = row[0] if row else None
        if version is None:
            raise LedgerError(f"{self.path}: schema_version is empty")
        if version > SCHEMA_VERSION:
            raise LedgerError(
                f"{self.path}: ledger schema version {version} is newer than this tool's "
                f"({SCHEMA_VERSION}); upgrade the tool"
            )
        if version < SCHEMA_VERSION:
            self._migrate(int(version))

    def _migrate(self, version: int) -> None:
        """Bring a ledger of an older schema up to :data:`SCHEMA_VERSION`, one step per
        transaction (the new version row is written in the same transaction)."""
        con = self._db
        while version < SCHEMA_VERSION:
            script = _MIGRATIONS.get(version)
            if script is None:
                raise LedgerError(
                    f"{self.path}: ledger schema version {version} is older than this tool's "
                    f"({SCHEMA_VERSION}) and no migration exists"
                )
            try:
                con.execute("BEGIN IMMEDIATE")
                # another process may have migrated it since we looked
                now = int(con.execute("SELECT MAX(version) FROM schema_version").fetchone()[0])
                if now == version:
                    for stmt in _split_sql(script):
                        con.execute(stmt)
                    con.execute("INSERT INTO schema_version (version, applied_utc) VALUES (?, ?)",
                                (version + 1, _utc_now()))
                con.execute("COMMIT")
            except sqlite3.Error as err:
                if con.in_transaction:
                    con.execute("ROLLBACK")
                raise LedgerError(
                    f"{self.path}: cannot upgrade the ledger from schema version {version} to "
                    f"{version + 1}: {err} (the file is unchanged)"
                ) from err
            version = int(con.execute("SELECT MAX(version) FROM schema_version").fetchone()[0])

    # -- queries -------------------------------------------------------------------------
    def schema_version(self) -> int:
        """The schema version stored in the file."""
        return int(self._db.execute("SELECT MAX(version) FROM schema_version").fetchone()[0])

    def is_locked(self, period: str) -> bool:
        """True when ``period`` has an adopted close (a new close needs a reopen first)."""
        _check_period(period)
        row = self._db.execute(
            "SELECT 1 FROM closes WHERE period = ? AND status = 'adopted'", (period,)
        ).fetchone()
        return row is not None

    def closed_periods(self) -> list[str]:
        """Periods with an adopted close, oldest first."""
        rows = self._db.execute(
            "SELECT period FROM closes WHERE status = 'adopted' ORDER BY period"
        ).fetchall()
        return [r[0] for r in rows]

    def _later_adopted(self, period: str) -> str | None:
        """The first period after ``period`` with an adopted close, if any."""
        return self._db.execute(
            "SELECT MIN(period) FROM closes WHERE status = 'adopted' AND period > ?", (period,)
        ).fetchone()[0]

    def _adopted_close_id(self, period: str) -> int | None:
        row = self._db.execute(
            "SELECT close_id FROM closes WHERE period = ? AND status = 'adopted'", (period,)
        ).fetchone()
        return None if row is None else int(row[0])

    def opening_for(self, period: str) -> dict[str, float] | None:
        """Opening tonnes per pile for ``period``: the adopted closing of the month before.

        Returns ``None`` when no earlier period was ever closed (the first close of a site
        takes its opening from ``opening.csv``).

        Raises
        ------
        LedgerError
            When an earlier period was closed but the month before ``period`` is not
            (skipped or reopened and not closed again): its movements would be lost.
        """
        _check_period(period)
        prev = str(Period.parse(period).previous())
        close_id = self._adopted_close_id(prev)
        if close_id is None:
            earlier = self._db.execute(
                "SELECT MAX(period) FROM closes WHERE period < ?", (period,)
            ).fetchone()[0]
            if earlier is None:
                return None
            raise LedgerError(
                f"{self.path}: cannot open {period}: {prev} is not closed "
                f"(last close before it is {earlier}); close {prev} first"
            )
        rows = self._db.execute(
            "SELECT pile_id, closing_t FROM balances WHERE close_id = ? ORDER BY pile_id",
            (close_id,),
        ).fetchall()
        return {pid: (float("nan") if t is None else float(t)) for pid, t in rows}

    def adopted(self, period: str) -> pd.DataFrame:
        """The adopted pile balances of ``period`` (``BALANCE_COLUMNS``); empty when not closed."""
        _check_period(period)
        close_id = self._adopted_close_id(period)
        return self._balances(close_id)

    def _balances(self, close_id: int | None) -> pd.DataFrame:
        cols = ", ".join(BALANCE_COLUMNS)
        rows = self._db.execute(
            f"SELECT {cols} FROM balances WHERE close_id = ? ORDER BY rowid", (close_id,)
        ).fetchall()
        df = pd.DataFrame(rows, columns=BALANCE_COLUMNS)
        return _typed(df)

    def journal(self, period: str) -> pd.DataFrame:
        """The adopted adjustment journal of ``period`` (``JOURNAL_COLUMNS``)."""
        close_id = self._adopted_close_id(_check_period(period))
        rows = self._db.execute(
            f"SELECT {', '.join(JOURNAL_COLUMNS)} FROM journal WHERE close_id = ? ORDER BY line",
            (close_id,),
        ).fetchall()
        return pd.DataFrame(rows, columns=JOURNAL_COLUMNS)

    def inputs(self, period: str) -> dict[str, str]:
        """Input path -> SHA-256 recorded with the adopted close of ``period``."""
        close_id = self._adopted_close_id(_check_period(period))
        rows = self._db.execute(
            "SELECT path, sha256 FROM inputs WHERE close_id = ? ORDER BY path", (close_id,)
        ).fetchall()
        return dict(rows)

    def closes(self) -> pd.DataFrame:
        """Every close ever recorded, adopted and superseded, oldest first."""
        return pd.read_sql_query("SELECT * FROM closes ORDER BY close_id", self._db)

    def reopenings(self, period: str | None = None) -> pd.DataFrame:
        """Every reopening (who, when, why, which close it superseded), oldest first."""
        sql = "SELECT * FROM reopenings"
        params: tuple = ()
        if period is not None:
            sql += " WHERE period = ?"
            params = (_check_period(period),)
        return pd.read_sql_query(sql + " ORDER BY reopen_id", self._db, params=params)

    def history(
        self,
        pile: str | None = None,
        material: str | None = None,
        start: str | None = None,
        end: str | None = None,
        *,
        include_superseded: bool = False,
    ) -> pd.DataFrame:
        """Variance by pile and month, for finance.

        Parameters
        ----------
        pile, material : str, optional
            Keep only this pile / this material.
        start, end : str, optional
            First and last period (``YYYY-MM``), both included.
        include_superseded : bool
            Also list closes that a reopening replaced (``status`` tells which).

        Returns
        -------
        DataFrame
            ``HISTORY_COLUMNS``, sorted by period, pile, close.
        """
        where = ["1 = 1"]
        params: list[Any] = []
        if not include_superseded:
            where.append("c.status = 'adopted'")
        if pile is not None:
            where.append("b.pile_id = ?")
            params.append(pile)
        if material is not None:
            where.append("b.material = ?")
            params.append(material)
        if start is not None:
            where.append("c.period >= ?")
            params.append(_check_period(start))
        if end is not None:
            where.append("c.period <= ?")
            params.append(_check_period(end))
        if start is not None and end is not None and start > end:
            raise LedgerError(f"history: start {start} is after end {end}")
        select = []
        for col in HISTORY_COLUMNS:
            if col in ("period", "status", "close_id", "closed_utc", "closed_by",
                       "survey_date", "software_version"):
                select.append(f"c.{col}")
            else:
                select.append(f"b.{col}")
        sql = (
            f"SELECT {', '.join(select)} FROM balances b JOIN closes c USING (close_id) "
            f"WHERE {' AND '.join(where)} ORDER BY c.period, b.pile_id, c.close_id"
        )
        rows = self._db.execute(sql, params).fetchall()
        return _typed(pd.DataFrame(rows, columns=HISTORY_COLUMNS))

    def scale_fit_history(self, before: str, months: int = 12) -> pd.DataFrame:
        """The belt-scale fit rows of the adopted closes of up to ``months`` periods before
        ``before`` (``SCALE_FIT_COLUMNS``), oldest first: what reconcile pools over months."""
        _check_period(before)
        rows = self._db.execute(
            "SELECT c.period, f.pile_id, f.scale_id, f.signed_t, f.variance_t, f.noise_sigma_t "
            "FROM scale_fit_rows f JOIN closes c USING (close_id) "
            "WHERE c.status = 'adopted' AND c.period < ? AND c.period IN "
            "(SELECT period FROM closes WHERE status = 'adopted' AND period < ? "
            " ORDER BY period DESC LIMIT ?) ORDER BY c.period, f.line",
            (before, before, int(months)),
        ).fetchall()
        return pd.DataFrame(rows, columns=SCALE_FIT_COLUMNS)

    # -- writing -------------------------------------------------------------------------
    @contextmanager
    def closing(
        self, result: CloseResult, inputs: Mapping[str | Path, str], version: str,
        *, who: str | None = None,
    ) -> Iterator[int]:
        """Record a close in one transaction that commits only when the block succeeds.

        The caller can move its outputs into place inside the ``with`` block: if the
        block raises, nothing is committed and the ledger is exactly as before.

        Yields
        ------
        int
            The new close id.

        Raises
        ------
        PeriodLockedError
            When the period already has an adopted close.
        LedgerError
            When a later period is already closed, or the result cannot be stored.
        """
        period = _check_period(result.period)
        state = self._begin_write()
        try:
            if self.is_locked(period):
                raise PeriodLockedError(
                    f"{self.path}: period {period} is closed and locked; "
                    f"reopen it first (inventory reopen --period {period} --reason \"...\")"
                )
            later = self._later_adopted(period)
            if later is not None:
                raise LedgerError(
                    f"{self.path}: cannot close {period}: the later period {later} is already "
                    f"closed; reopen {later} first"
                )
            close_id = self._insert(result, inputs, version, who or getpass.getuser())
            yield close_id
        except BaseException:
            self._rollback(state)
            raise
        else:
            try:
                self._commit(state)
            except sqlite3.Error as err:
                self._rollback(state)
                raise LedgerError(f"{self.path}: commit of {period} failed: {err}") from err

    def record_close(
        self, result: CloseResult, inputs: Mapping[str | Path, str], version: str,
        *, who: str | None = None,
    ) -> int:
        """Record one close (balances, journal, input hashes) in one transaction.

        Parameters
        ----------
        result : CloseResult
        inputs : mapping of path -> SHA-256 hex digest
        version : str
            The software version that made the numbers.
        who : str, optional
            Defaults to the logged-in user.

        Returns
        -------
        int
            The close id.
        """
        with self.closing(result, inputs, version, who=who) as close_id:
            pass
        return close_id

    def _insert(
        self, result: CloseResult, inputs: Mapping[str | Path, str], version: str, who: str
    ) -> int:
        con = self._db
        piles = result.piles
        missing = [c for c in BALANCE_COLUMNS if c not in piles.columns]
        if missing:
            raise LedgerError(f"close {result.period}: pile table lacks columns {missing}")
        if piles["pile_id"].isna().any() or piles["pile_id"].duplicated().any():
            dup = piles["pile_id"][piles["pile_id"].duplicated()].tolist()
            raise LedgerError(f"close {result.period}: pile ids missing or repeated {dup}")
        try:
            cur = con.execute(
                "INSERT INTO closes (period, site_name, crs, survey_date, survey_instant_utc, "
                "previous_survey_date, software_version, closed_utc, closed_by, status) "
                "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, 'adopted')",
                (result.period, result.site_name, result.crs, result.survey_date,
                 _instant_text(result.survey_instant), result.previous_survey_date,
                 str(version), _utc_now(), who),
            )
            close_id = int(cur.lastrowid)
            placeholders = ", ".join("?" for _ in range(len(BALANCE_COLUMNS) + 1))
            con.executemany(
                f"INSERT INTO balances (close_id, {', '.join(BALANCE_COLUMNS)}) "
                f"VALUES ({placeholders})",
                [
                    (close_id, *(_to_sql(v) for v in row))
                    for row in piles[BALANCE_COLUMNS].itertuples(index=False, name=None)
                ],
            )
            journal = result.journal
            if journal is not None and len(journal):
                con.executemany(
                    "INSERT INTO journal (close_id, line, pile_id, material, adjustment_t, "
                    "reason_code, reason) VALUES (?, ?, ?, ?, ?, ?, ?)",
                    [
                        (close_id, i + 1, *(_to_sql(v) for v in row))
                        for i, row in enumerate(
                            journal[JOURNAL_COLUMNS].itertuples(index=False, name=None)
                        )
                    ],
                )
            fit = getattr(result, "bias_rows", None)
            if fit is not None and len(fit):
                con.executemany(
                    "INSERT INTO scale_fit_rows (close_id, line, pile_id, scale_id, signed_t, "
                    "variance_t, noise_sigma_t) VALUES (?, ?, ?, ?, ?, ?, ?)",
                    [
                        (close_id, i + 1, *(_to_sql(v) for v in row))
                        for i, row in enumerate(fit[SCALE_FIT_COLUMNS[1:]].itertuples(index=False, name=None))
                    ],
                )
            for path, digest in sorted((str(p), str(d)) for p, d in inputs.items()):
                if not re.fullmatch(r"[0-9a-f]{64}", digest):
                    raise LedgerError(f"input {path}: {digest!r} is not a SHA-256 hex digest")
                con.execute(
                    "INSERT INTO inputs (close_id, path, sha256) VALUES (?, ?, ?)",
                    (close_id, path, digest),
                )
        except sqlite3.Error as err:
            raise LedgerError(f"{self.path}: cannot record close {result.period}: {err}") from err
        return close_id

    def reopen(self, period: str, reason: str, who: str | None = None) -> int:
        """Unlock a closed period; its close is kept as superseded, the reason for good.

        Parameters
        ----------
        period : str
            ``YYYY-MM``, must be closed and the latest closed period.
        reason : str
            Why; required and non-blank.
        who : str, optional
            Defaults to the logged-in user.

        Returns
        -------
        int
            The reopening id.
        """
        _check_period(period)
        if not isinstance(reason, str) or not reason.strip():
            raise LedgerError(f"reopen {period}: a reason is required (it is kept for good)")
        who = who or getpass.getuser()
        if self._pending_create:
            raise LedgerError(f"{self.path}: no ledger yet; period {period} was never closed")
        state = self._begin_write()
        con = self._db
        try:
            close_id = self._adopted_close_id(period)
            if close_id is None:
                raise LedgerError(f"{self.path}: period {period} is not closed; nothing to reopen")
            later = self._later_adopted(period)
            if later is not None:
                # its opening came from this period's closing
                raise LedgerError(
                    f"{self.path}: cannot reopen {period}: {later} is closed and opened from "
                    f"it; reopen {later} first"
                )
            con.execute(
                "UPDATE closes SET status = 'superseded' WHERE close_id = ?", (close_id,)
            )
            cur = con.execute(
                "INSERT INTO reopenings (period, close_id, reopened_utc, reopened_by, reason) "
                "VALUES (?, ?, ?, ?, ?)",
                (period, close_id, _utc_now(), who, reason.strip()),
            )
            reopen_id = int(cur.lastrowid)
        except BaseException:
            self._rollback(state)
            raise
        self._commit(state)
        return reopen_id


def _typed(df: pd.DataFrame) -> pd.DataFrame:
    """SQLite hands back ints for booleans and None for NULL reals; restore the types."""
    for col in df.columns:
        if col in _BOOL_COLUMNS:
            df[col] = df[col].map(lambda v: None if v is None else bool(v)).astype(object)
        elif col in _TEXT_COLUMNS or col in ("period", "status", "closed_utc", "closed_by",
                                             "survey_date", "software_version"):
            continue
        elif col == "close_id":
            df[col] = df[col].astype("int64")
        else:
            df[col] = pd.to_numeric(df[col], errors="coerce").astype("float64")
    return df


def _split_sql(script: str) -> list[str]:
    """Statements of the schema script; triggers contain ';' so split on 'END;' too."""
    out: list[str] = []
    buf: list[str] = []
    in_trigger = False
    for line in script.splitlines():
        stripped = line.strip()
        if not stripped or stripped.startswith("--"):
            continue
        buf.append(line)
        if stripped.upper().startswith("CREATE TRIGGER"):
            in_trigger = True
        if in_trigger:
            if stripped.upper().endswith("END;"):
                out.append("\n".join(buf))
                buf, in_trigger = [], False
        elif stripped.endswith(";"):
            out.append("\n".join(buf))
            buf = []
    if buf:
        out.append("\n".join(buf))
    return out
