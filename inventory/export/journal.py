"""The posting journal of a close (``journal-<period>.csv``, the workbook's Journal sheet, the
report's journal table), the line every output gives about the ledger close it holds, and the
"superseded" mark put on a close's outputs when a later close of the period replaces them.

A journal line is ready to post: the period, the posting date (the period's last day), the
ledger's close id, pile, material, quantity and unit, value (quantity x the material's unit
cost), account and location codes, a reason code and sentence, and a status: ``post`` lines
are what this close put on book stock, ``hold`` lines are listed but not posted (the site's
adjustment policy, or a variance to investigate first).
"""

from __future__ import annotations

import csv
import io
import re
import shutil
import sqlite3
import zipfile
from datetime import date
from pathlib import Path

import numpy as np
import pandas as pd

from inventory.export.cells import write_csv
from inventory.io.atomic import atomic_path
from inventory.model.period import Period
from inventory.model.results import JOURNAL_COLUMNS, POSTING_COLUMNS, CloseResult

__all__ = ["close_status_text", "posting_journal", "write_journal_csv", "mark_superseded",
           "superseded_text"]

#: The status line as :func:`close_status_text` writes it (what :func:`mark_superseded` finds).
_STATUS = re.compile(r"Ledger close (\d+) of ([0-9]{4}-[0-9]{2}), recorded ([0-9T:+\-.Z]+)")


def close_status_text(result: CloseResult) -> str:
    """What every output says about the ledger close it holds; :func:`mark_superseded`
    replaces it when a later close of the period supersedes it.

    >>> from types import SimpleNamespace as R
    >>> close_status_text(R(close_id=3, closed_utc="2026-11-02T08:00:00+00:00", period="2026-10"))
    'Ledger close 3 of 2026-10, recorded 2026-11-02T08:00:00+00:00'
    >>> close_status_text(R(close_id=None, closed_utc=None, period="2026-10"))
    'Not recorded in a ledger (preview)'
    """
    if result.close_id is None:
        return "Not recorded in a ledger (preview)"
    return f"Ledger close {result.close_id} of {result.period}, recorded {result.closed_utc}"


def superseded_text(held: int, period: str, by_close: int, by_utc: str) -> str:
    """The mark that replaces the status line of a superseded close.

    >>> superseded_text(1, "2026-10", 3, "2026-11-05T09:00:00+00:00")
    'SUPERSEDED by ledger close 3 (recorded 2026-11-05T09:00:00+00:00): these are the figures of ledger close 1 of 2026-10; do not post from them'
    """
    return (f"SUPERSEDED by ledger close {by_close} (recorded {by_utc}): these are the figures of "
            f"ledger close {held} of {period}; do not post from them")


def _posting_date(period: str) -> date | None:
    try:
        return Period.parse(period).last_day()
    except (ValueError, TypeError):
        return None


def posting_journal(result: CloseResult) -> pd.DataFrame:
    """The posting journal of a close (:data:`~inventory.model.results.POSTING_COLUMNS`):
    ``result.posting`` with the period, the posting date (the period's last day) and the
    ledger's close id in front.

    A result without ``posting`` (built by hand, or by an older version) gets one posted line
    per line of ``result.journal``, without value or codes.
    """
    lines = result.posting
    if lines is None:
        j = result.journal if result.journal is not None else pd.DataFrame(columns=JOURNAL_COLUMNS)
        lines = pd.DataFrame({
            "line": np.arange(1, len(j) + 1), "pile_id": j["pile_id"].to_numpy(), "to_pile_id": None,
            "material": j["material"].to_numpy(), "quantity_t": j["adjustment_t"].to_numpy(dtype=float),
            "unit": "t", "unit_cost": np.nan, "value": np.nan, "currency": None, "account": None,
            "location": None, "to_location": None, "reason_code": j["reason_code"].to_numpy(),
            "reason": j["reason"].to_numpy(), "status": "post",
        })
    out = pd.DataFrame(lines).copy()
    out["period"] = result.period
    out["posting_date"] = _posting_date(result.period)
    out["close_id"] = pd.array([result.close_id] * len(out), dtype="Int64")
    return out.reindex(columns=POSTING_COLUMNS).reset_index(drop=True)


def write_journal_csv(result: CloseResult, path: str | Path) -> Path:
    """Write ``journal-<period>.csv``: the posting journal, one line per row, UTF-8, comma
    separated, ISO dates, numbers unrounded; text a spreadsheet would run as a formula is
    neutralised (:func:`inventory.export.cells.write_csv`)."""
    frame = posting_journal(result)
    frame["posting_date"] = frame["posting_date"].map(lambda d: d.isoformat() if isinstance(d, date) else "")
    dest = Path(path)
    with atomic_path(dest) as tmp:
        with open(tmp, "w", encoding="utf-8", newline="") as fh:
            write_csv(frame, fh, index=False, float_format="%.17g", lineterminator="\n")
    return dest


# -- superseded ---------------------------------------------------------------------------------

def _mark_xlsx(path: Path, mark) -> bool:
    """Replace the status line in every XML part of a workbook (shared strings, page
    headers, document properties), entry by entry, keeping every other byte."""
    with zipfile.ZipFile(path) as zin:
        entries = [(info, zin.read(info.filename)) for info in zin.infolist()]
    changed = False
    out: list[tuple[zipfile.ZipInfo, bytes]] = []
    for info, data in entries:
        if info.filename.endswith(".xml"):
            text = data.decode("utf-8")
            new = _STATUS.sub(mark, text)
            if new != text:
                changed, data = True, new.encode("utf-8")
        out.append((info, data))
    if changed:
        with atomic_path(path) as tmp:
            with zipfile.ZipFile(tmp, "w") as zout:
                for info, data in out:
                    zout.writestr(info, data)
    return changed


def _mark_html(path: Path, mark) -> bool:
    text = path.read_text(encoding="utf-8")
    new = _STATUS.sub(mark, text).replace('<p class="status">', '<p class="status superseded">', 1)
    if new == text:
        return False
    with atomic_path(path) as tmp:
        tmp.write_text(new, encoding="utf-8")
    return True


def _mark_csv(path: Path, by_close: int) -> bool:
    """A superseded journal's lines get status ``superseded by close N``: an import that
    posts ``post`` lines posts none of them."""
    rows = list(csv.reader(io.StringIO(path.read_text(encoding="utf-8"))))
    if not rows or "status" not in rows[0]:
        return False
    k = rows[0].index("status")
    for r in rows[1:]:
        if len(r) > k:
            r[k] = f"superseded by close {by_close}"
    buf = io.StringIO()
    csv.writer(buf, lineterminator="\n").writerows(rows)
    with atomic_path(path) as tmp:
        tmp.write_text(buf.getvalue(), encoding="utf-8")
    return True


def mark_superseded(folder: str | Path, by_close: int, by_utc: str) -> list[Path]:
    """Mark the outputs in ``folder`` as superseded by ledger close ``by_close``.

    The workbook's and the report's status line ("Ledger close M of <period>, recorded ...")
    becomes :func:`superseded_text`; the journal CSV's status column says ``superseded by
    close N``; each GeoPackage layer's description (``gpkg_contents``) starts with
    "SUPERSEDED by ledger close N". Files are rewritten atomically; a file that cannot be
    read is left as it is. (The GeoTIFFs keep their tags: rewriting a Cloud Optimized
    GeoTIFF's tags in place would break its layout; the folder's SUPERSEDED.txt and run.json
    say it for them.)

    Returns
    -------
    list of Path
        The files marked.
    """
    folder = Path(folder)

    def mark(m: re.Match) -> str:
        return superseded_text(int(m.group(1)), m.group(2), by_close, by_utc)

    done: list[Path] = []
    for path in sorted(folder.glob("variance-*.xlsx")):
        try:
            if _mark_xlsx(path, mark):
                done.append(path)
        except (OSError, zipfile.BadZipFile, UnicodeDecodeError):
            continue
    for path in sorted(folder.glob("report-*.html")):
        try:
            if _mark_html(path, mark):
                done.append(path)
        except (OSError, UnicodeDecodeError):
            continue
    for path in sorted(folder.glob("journal-*.csv")):
        try:
            if _mark_csv(path, by_close):
                done.append(path)
        except (OSError, UnicodeDecodeError, csv.Error):
            continue
    for path in sorted(folder.glob("*.gpkg")):
        try:
            if _mark_gpkg(path, by_close, by_utc):
                done.append(path)
        except (OSError, sqlite3.Error):
            continue
    return done


def _mark_gpkg(path: Path, by_close: int, by_utc: str) -> bool:
    """Prefix every layer description in ``gpkg_contents`` with the superseded mark, on a copy
    renamed over the file."""
    mark = f"SUPERSEDED by ledger close {by_close} (recorded {by_utc}); do not use these figures. "
    with atomic_path(path) as tmp:
        shutil.copyfile(path, tmp)
        con = sqlite3.connect(tmp)
        try:
            with con:
                cur = con.execute(
                    "UPDATE gpkg_contents SET description = ? || COALESCE(description, '') "
                    "WHERE COALESCE(description, '') NOT LIKE 'SUPERSEDED%'", (mark,))
                changed = cur.rowcount > 0
        finally:
            con.close()
    return changed
