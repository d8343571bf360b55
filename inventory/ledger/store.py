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

from inventory.errors import LedgerError, LedgerInputError, PeriodLockedError
from inventory.ledger.schema import (
    BALANCE_COLUMNS,
    BOOL_COLUMNS,
    HISTORY_COLUMNS,
    MIGRATIONS,
    SCALE_FIT_COLUMNS,
    SCHEMA,
    SCHEMA_VERSION,
    TEXT_COLUMNS,
)
from inventory.model.period import Period
from inventory.model.results import JOURNAL_COLUMNS, CloseResult

__all__ = ["Ledger", "SCHEMA_VERSION", "ledger_file_problem", "BALANCE_COLUMNS", "HISTORY_COLUMNS", "SCALE_FIT_COLUMNS"]

#: SQLite's words for a file that is not a database or is corrupt (sqlite3 error texts).
_DAMAGED = ("file is not a database", "database disk image is malformed")

#: How long a writer waits for another's transaction on the ledger to end, seconds (SQLite's
#: busy timeout); a close holds its write lock only while it records its rows.
BUSY_TIMEOUT_S = 30.0

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


def _damaged_pages(found: list[str]) -> str:
    """What ``PRAGMA quick_check`` found wrong, as the refusal says it."""
    return f"a damaged SQLite ledger ({'; '.join(found)}); restore it from a backup"


def _schema_problem(con: sqlite3.Connection) -> tuple[str | None, int | None]:
    """Why the SQLite file on ``con`` is not a ledger this tool can use, or ``None``, and its
    schema version (``None`` when it has none). Raises :class:`sqlite3.DatabaseError` when
    its catalogue cannot be read."""
    tables = {r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type='table'")}
    if "schema_version" not in tables:
        return "an SQLite file without a schema_version table is not a ledger", None
    row = con.execute("SELECT MAX(version) FROM schema_version").fetchone()
    version = row[0] if row else None
    if version is None:
        return "schema_version is empty", None
    if version > SCHEMA_VERSION:
        return f"ledger schema version {version} is newer than this tool's ({SCHEMA_VERSION}); upgrade the tool", version
    return None, version


def ledger_file_problem(path: str | Path) -> str | None:
    """Why the SQLite ledger file at ``path`` could not be used by a close, or ``None`` (also
    when there is no file: a close creates it). Reads the file without writing anything, not
    even SQLite's ``-wal`` and ``-shm`` files (opened read-only and immutable), for
    ``inventory check``: a folder of its name, a file that is not SQLite, damaged pages, a
    file without the ledger's tables, a ledger of a newer schema."""
    path = Path(path)
    if not path.exists() and not path.is_symlink():
        return None
    if path.is_dir():
        return "is a folder, not a ledger file; move it away (a close creates the file)"
    if not path.exists():
        return "a link that leads to no file"
    if path.stat().st_size == 0:
        return None   # reads as a new ledger (a close checks it against the outputs in closes/)
    try:
        con = sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro&immutable=1", uri=True)
    except sqlite3.Error as err:
        return f"cannot be read ({err})"
    try:
        found = [r[0] for r in con.execute("PRAGMA quick_check(3)")]
        if found != ["ok"]:
            return _damaged_pages(found)
        problem, _ = _schema_problem(con)
        if problem is not None:
            return problem
    except sqlite3.DatabaseError as err:
        if str(err) in _DAMAGED:
            return f"not a readable SQLite ledger ({err}); restore it from a backup"
        return f"cannot be read ({err})"
    finally:
        con.close()
    return None


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

    #: Columns naming the site of each history row (none in a one-site SQLite ledger).
    _site_columns: tuple[str, ...] = ()

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
        if self.path.exists() and not self.path.is_file():
            raise LedgerInputError(self.path, "is a folder, not a ledger file; move it away (a close creates the file)")
        if self.path.exists() and self.path.stat().st_size > 0:
            self._con = self._connect(self.path)
            self._pending_create = False
            try:
                self._check_pages()
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
                ":memory:" if path is None else str(path), timeout=BUSY_TIMEOUT_S, isolation_level=None
            )
            con.execute("PRAGMA foreign_keys = ON")
            if path is None:
                return con
            mode = con.execute("PRAGMA journal_mode = WAL").fetchone()[0]
            con.execute("PRAGMA synchronous = FULL")
        except sqlite3.Error as err:
            if path is not None and str(err) in _DAMAGED:
                # a damaged file or another file under the ledger's name: bad input, not a failed run
                raise LedgerInputError(path, f"not a readable SQLite ledger ({err}); restore it from a backup") from err
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
            for stmt in _split_sql(SCHEMA):
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
            if "locked" in str(err) or "busy" in str(err):
                raise LedgerError(
                    f"{self.path}: cannot start a transaction: {err} (another program has held a write "
                    f"transaction on it for over {BUSY_TIMEOUT_S:g} s: another close of this site, or a database tool with "
                    "changes not committed); nothing was written, run it again when that ends") from err
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

    def _check_pages(self) -> None:
        """Refuse a ledger file with damaged pages (a disk error, a partial copy): its first
        page reads, so the damage would surface as a failed query half-way through a command.
        SQLite's ``PRAGMA quick_check`` reads every page once (milliseconds for a ledger of
        years of closes) and writes nothing."""
        try:
            found = [r[0] for r in self._db.execute("PRAGMA quick_check(3)")]
        except sqlite3.DatabaseError as err:
            found = [str(err)]
        if found != ["ok"]:
            raise LedgerInputError(self.path, _damaged_pages(found))

    def _check_schema(self) -> None:
        try:
            problem, version = _schema_problem(self._db)
        except sqlite3.DatabaseError as err:
            raise LedgerError(f"{self.path}: not an SQLite ledger: {err}") from err
        if problem is not None:
            raise LedgerError(f"{self.path}: {problem}")
        assert version is not None
        if version < SCHEMA_VERSION:
            self._migrate(int(version))

    def _migrate(self, version: int) -> None:
        """Bring a ledger of an older schema up to :data:`SCHEMA_VERSION`, one step per
        transaction (the new version row is written in the same transaction)."""
        con = self._db
        while version < SCHEMA_VERSION:
            script = MIGRATIONS.get(version)
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

    def pile_ids(self) -> list[str]:
        """Every pile id the ledger has figures for (any close), sorted."""
        return [r[0] for r in self._db.execute(
            "SELECT DISTINCT pile_id FROM balances ORDER BY pile_id").fetchall()]

    def materials(self) -> list[str]:
        """Every material the ledger has figures for (any close), sorted."""
        return [r[0] for r in self._db.execute(
            "SELECT DISTINCT material FROM balances WHERE material IS NOT NULL ORDER BY material"
        ).fetchall()]

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
        all_columns: bool = False,
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
        all_columns : bool
            Also every other stored pile column and the site name (what totals with their
            sigma need: volumes, base parts, movements after the survey).

        Returns
        -------
        DataFrame
            ``HISTORY_COLUMNS`` (then the other ``BALANCE_COLUMNS`` and ``site_name`` with
            ``all_columns``), sorted by period, pile, close.
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
        columns = [*self._site_columns, *HISTORY_COLUMNS]
        if all_columns:
            columns += [c for c in BALANCE_COLUMNS if c not in columns] + ["site_name"]
        select = []
        for col in columns:
            if col in ("period", "status", "close_id", "closed_utc", "closed_by",
                       "survey_date", "software_version", "site_name", *self._site_columns):
                select.append(f"c.{col}")
            elif col in ("reason_code", "reason"):
                # the pile's journal line of that close (one per adjusted pile)
                select.append(f"(SELECT j.{col} FROM journal j WHERE j.close_id = b.close_id "
                              f"AND j.pile_id = b.pile_id ORDER BY j.line LIMIT 1)")
            else:
                select.append(f"b.{col}")
        sql = (
            f"SELECT {', '.join(select)} FROM balances b JOIN closes c USING (close_id) "
            f"WHERE {' AND '.join(where)} ORDER BY c.period, b.pile_id, c.close_id"
        )
        rows = self._db.execute(sql, params).fetchall()
        return _typed(pd.DataFrame(rows, columns=columns))

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
        *, who: str | None = None, closed_utc: str | None = None,
    ) -> Iterator[int]:
        """Record a close in one transaction that commits only when the block succeeds.

        The close id is known inside the ``with`` block, so the caller can write it into
        its outputs there and move them into place: if the block raises, nothing is
        committed and the ledger is exactly as before. The block holds the ledger's write
        lock; other writers wait (up to the connection timeout) until it ends.

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
            close_id = self._insert(result, inputs, version, who or getpass.getuser(),
                                    closed_utc or _utc_now())
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
        self, result: CloseResult, inputs: Mapping[str | Path, str], version: str, who: str,
        closed_utc: str,
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
                 str(version), closed_utc, who),
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
        if col in BOOL_COLUMNS:
            df[col] = df[col].map(lambda v: None if v is None else bool(v)).astype(object)
        elif col in TEXT_COLUMNS or col in ("period", "status", "closed_utc", "closed_by",
                                             "survey_date", "software_version", "site_name",
                                             "site_id", "reason_code", "reason"):
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
