"""The ledger's table layout and its migrations.

The ledger is a file users keep for years, so its layout only moves forward: a change bumps
:data:`SCHEMA_VERSION`, changes :data:`SCHEMA` (what a new ledger gets) and adds the step from
the previous version to :data:`MIGRATIONS` (what an existing ledger gets, run by
:class:`~inventory.ledger.store.Ledger` in one transaction on open). A migration never edits
or deletes stored rows.
"""

from __future__ import annotations

from inventory.model.results import PILE_COLUMNS, VOLUME_SIGMA_COLUMNS

__all__ = [
    "BALANCE_COLUMNS", "BOOL_COLUMNS", "HISTORY_COLUMNS", "MIGRATIONS", "SCALE_FIT_COLUMNS", "SCHEMA",
    "SCHEMA_VERSION", "TEXT_COLUMNS", "VIEWS", "VIEW_NAMES",
]

#: Version of the table layout below; bumped on any change, checked on open. A ledger of an
#: older version is brought up to date on open by :data:`MIGRATIONS`, in one transaction.
SCHEMA_VERSION = 4

#: Pile columns stored per close, with their SQLite type (every figure of the close).
TEXT_COLUMNS = {"pile_id", "material", "base_method", "flags"}
BOOL_COLUMNS = {"significant", "out_of_tolerance"}
BALANCE_COLUMNS = list(PILE_COLUMNS)

#: Columns of :meth:`Ledger.history` (``reason_code`` and ``reason`` from the close's journal
#: line of the pile, blank when the pile was not adjusted).
HISTORY_COLUMNS = [
    "period", "pile_id", "material", "opening_t", "receipts_t", "dispatches_t",
    "transfers_in_t", "transfers_out_t", "book_t", "book_sigma_t", "survey_t",
    "survey_sigma_t", "variance_t", "variance_pct", "variance_sigma_t", "significant",
    "tolerance_pct", "out_of_tolerance", "adjustment_t", "reason_code", "reason", "closing_t", "status",
    "close_id", "closed_utc", "closed_by", "survey_date", "software_version",
]


def _sql_type(col: str) -> str:
    if col in TEXT_COLUMNS:
        return "TEXT"
    if col in BOOL_COLUMNS:
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


#: The views finance queries (schema 3), in SQL that SQLite and PostgreSQL both read. Every
#: one keeps to adopted closes except ``close_history``, which lists every close with the
#: reopening that superseded it. ``variance_by_material_month`` sums tonnes only: a sigma of
#: a total needs the shared terms (density, floor) that are not columns of the ledger; use
#: ``inventory history --by material`` for totals with their sigma.
VIEWS = """CREATE VIEW adopted_balances AS
    SELECT c.period, c.site_name, c.closed_utc, c.closed_by, c.survey_date, b.*
    FROM balances b JOIN closes c ON c.close_id = b.close_id
    WHERE c.status = 'adopted';
CREATE VIEW adopted_journal AS
    SELECT c.period, c.site_name, j.close_id, j.line, j.pile_id, j.material, j.adjustment_t,
           j.reason_code, j.reason
    FROM journal j JOIN closes c ON c.close_id = j.close_id
    WHERE c.status = 'adopted';
CREATE VIEW variance_by_material_month AS
    SELECT c.period, c.site_name, b.material,
           COUNT(*) AS piles,
           SUM(b.survey_t) AS survey_t,
           SUM(CASE WHEN b.survey_t IS NOT NULL THEN b.book_t END) AS book_t,
           SUM(b.variance_t) AS variance_t,
           100.0 * SUM(b.variance_t)
               / NULLIF(SUM(CASE WHEN b.survey_t IS NOT NULL THEN b.book_t END), 0) AS variance_pct,
           SUM(b.adjustment_t) AS adjustment_t,
           SUM(CASE WHEN b.out_of_tolerance = 1 THEN 1 ELSE 0 END) AS piles_out_of_tolerance,
           SUM(CASE WHEN b.significant = 1 THEN 1 ELSE 0 END) AS piles_significant
    FROM balances b JOIN closes c ON c.close_id = b.close_id
    WHERE c.status = 'adopted'
    GROUP BY c.period, c.site_name, b.material;
CREATE VIEW close_history AS
    SELECT c.close_id, c.period, c.site_name, c.status, c.closed_utc, c.closed_by,
           c.survey_date, c.software_version,
           r.reopen_id, r.reopened_utc, r.reopened_by, r.reason AS reopen_reason,
           (SELECT MIN(n.close_id) FROM closes n
             WHERE n.period = c.period AND n.close_id > c.close_id) AS superseded_by_close_id
    FROM closes c LEFT JOIN reopenings r ON r.close_id = c.close_id;
"""

#: Names of :data:`VIEWS`, in order.
VIEW_NAMES = ["adopted_balances", "adopted_journal", "variance_by_material_month", "close_history"]

SCHEMA = f"""
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
""" + VIEWS


#: Schema changes, from the version a ledger has to the next one. Each runs in one
#: transaction with the new version row, so a ledger is either migrated or untouched.
#: 1 -> 2: ``balances.base_sigma_t`` (the fixed-base part of the survey sigma, NULL for
#: closes made before: no shared part known) and the belt-scale fit rows of each close.
#: 2 -> 3: the finance views (:data:`VIEWS`); no table changes.
#: 3 -> 4: the parts of the volume sigma (``VOLUME_SIGMA_COLUMNS``: random, correlated,
#: interpolated, base), NULL for closes made before.
MIGRATIONS: dict[int, str] = {
    1: "ALTER TABLE balances ADD COLUMN base_sigma_t REAL;\n" + _SCALE_FIT_TABLE + _SCALE_FIT_TRIGGERS,
    2: VIEWS,
    3: "".join(f"ALTER TABLE balances ADD COLUMN {c} REAL;\n" for c in VOLUME_SIGMA_COLUMNS),
}

#: Columns of :meth:`Ledger.scale_fit_history` (as ``inventory.stock.reconcile.BIAS_ROW_COLUMNS``).
SCALE_FIT_COLUMNS = ["period", "pile_id", "scale_id", "signed_t", "variance_t", "noise_sigma_t"]
