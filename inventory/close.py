"""The month close: every step of one period, then its outputs and its ledger row, all or nothing.

Steps, each a plain function of the modules named:

1. load and check the site (:mod:`inventory.site.load`);
2. process the period's survey into a surface (:mod:`inventory.survey.measure`);
3. measure every pile footprint (:mod:`inventory.volume.measure`);
4. roll the books to the survey instant (:mod:`inventory.stock.book`);
5. reconcile survey with book (:mod:`inventory.stock.reconcile`);
6. write the workbook, layers, rasters, their styles, report and run manifest into a temporary folder
   (:mod:`inventory.export`), then record the close in the ledger (:mod:`inventory.ledger.store`)
   and move the folder into place inside the same transaction.

A failure anywhere leaves ``ledger.sqlite`` and ``closes/`` exactly as they were: outputs
only appear under ``closes/<period>/`` once the ledger transaction is about to commit, and
the ledger commits only after they are in place.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import socket
import tempfile
import time
import warnings
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import TYPE_CHECKING, Any, Callable, Iterator

import numpy as np
import pandas as pd

from inventory._version import __version__
from inventory.errors import InputError, InventoryWarning, PeriodLockedError
from inventory.io.atomic import publishable
from inventory.io.rasters import read_raster
from inventory.model.grid import Surface
from inventory.model.period import Period
from inventory.model.results import MOVEMENT_COLUMNS, PILE_COLUMNS, CloseResult
from inventory.site.load import Site, SurveyRef, load_site

if TYPE_CHECKING:
    from inventory.ledger.store import Ledger
    from inventory.stock.book import BookResult
    from inventory.survey.measure import SurveyResult

__all__ = ["ClosedPeriod", "close_period", "reopen_period", "period_history", "open_ledger", "STEPS"]

#: Months of earlier adopted closes whose belt-scale fit rows are pooled with this month's
#: (a year: long enough to see a small persistent bias, short enough that a scale has
#: usually been recalibrated within it; common practice is a yearly verification).
BIAS_HISTORY_MONTHS = 12

#: The steps of a close, in order: the keys of :attr:`ClosedPeriod.timings`.
STEPS = ("load", "survey", "volumes", "book", "reconcile", "outputs", "ledger")

Progress = Callable[[str], None]


@dataclass
class ClosedPeriod:
    """What :func:`close_period` did: the result, where it went, and the ledger row."""

    result: CloseResult
    folder: Path
    files: dict[str, Path]
    close_id: int
    timings: dict[str, float] = field(default_factory=dict)

    def summary(self) -> str:
        piles = self.result.piles
        sig = int(piles["significant"].fillna(False).astype(bool).sum())
        oot = int(piles["out_of_tolerance"].fillna(False).astype(bool).sum())
        lines = [
            f"closed {self.result.period} for {self.result.site_name}: {len(piles)} piles, "
            f"survey {piles['survey_t'].sum():,.0f} t vs book {piles['book_t'].sum():,.0f} t, "
            f"{sig} significant, {oot} out of tolerance (ledger close {self.close_id})",
        ]
        width = max((len(key) for key in self.files), default=0) + 1
        for key, path in self.files.items():
            lines.append(f"  {key:<{width}} {path}")
        return "\n".join(lines)


# ----------------------------------------------------------------------------- helpers
def _sha256(path: Path) -> str:
    from inventory.export.manifest import sha256_file

    return sha256_file(path)


def _site_inputs(site: Site, survey_dates: list[str], period: str) -> list[Path]:
    root = site.root
    files = [root / "site.toml", root / "piles.gpkg", root / "materials.csv"]
    if site.opening is not None:
        files.append(root / "opening.csv")
    if site.config.base.floor_raster is not None:
        files.append(site.config.base.floor_raster)
    if site.config.survey.pipeline is not None:
        files.append(site.config.survey.pipeline)
    for d in survey_dates:
        ref = site.surveys[d]
        files.extend(ref.files)
        for table in ("stations.csv", "control.csv", "crs.prj"):
            if (ref.folder / table).is_file():
                files.append(ref.folder / table)
        files.extend(p.with_suffix(".prj") for p in ref.files if p.with_suffix(".prj").is_file())
    mv = root / "movements" / period
    if mv.is_dir():
        files.extend(sorted(mv.glob("*.csv")))
    return files


def _previous_survey(site: Site, date: str, ledger: Any = None, period: str | None = None) -> str | None:
    """The survey this close compares with (change raster, measured change).

    The survey of the previous period's adopted close when the ledger has one; else the
    latest survey of an earlier month. A survey earlier in the same month (a mid-month
    machine scan, say) is not the state the previous period closed on.
    """
    if ledger is not None and period is not None:
        closes = ledger.closes()
        prev = closes[(closes["period"] == str(Period.parse(period).previous())) & (closes["status"] == "adopted")]
        if len(prev):
            return str(prev["survey_date"].iloc[-1])
    earlier = [d for d in site.surveys if d[:7] < date[:7]]
    return max(earlier) if earlier else None


def _opening(site: Site, ledger: Any, period: str) -> tuple[Any, str]:
    from inventory.stock.book import opening_from_close

    # opening_for refuses when the month before was skipped or is reopened and not closed
    if ledger.opening_for(period) is not None:
        adopted = ledger.adopted(str(Period.parse(period).previous()))
        opening = opening_from_close(adopted, site.materials, site.config.reconcile.adjust_to)
        return opening, "ledger (adopted closing of the previous period)"
    if site.opening is not None:
        _check_opening_date(site, period)
        return site.opening, "opening.csv"
    raise InputError(
        site.root / "opening.csv", f"no opening balances for {period}: the ledger has no close of the "
        "previous period and the site has no opening.csv", field="tonnes",
    )


def _check_opening_date(site: Site, period: str) -> None:
    """Refuse opening.csv balances not dated within ``period`` when the ledger has no close of
    the month before: movements between the opening and the period's start would be skipped
    (an October close opened from a 1 September balance), or the opening is from a later month."""
    month = Period.parse(period)
    start, end = month.bounds(site.timezone)
    tz = site.timezone
    for row in site.opening.itertuples():
        as_of = getattr(row, "as_of", None)
        if as_of is None or pd.isna(as_of):
            continue
        as_of = pd.Timestamp(as_of)
        if start <= as_of < end:
            continue
        shown = as_of.tz_convert(tz).strftime("%Y-%m-%d %H:%M")
        first = start.tz_convert(tz).strftime("%Y-%m-%d %H:%M")
        if as_of < start:
            why = (f"the opening is dated {shown}, before the start of {period} ({first}), and the ledger has no "
                   f"close of {month.previous()}: the movements from {shown} to {first} would be skipped; close "
                   f"{Period.of(as_of.tz_convert(tz).date())} first, or give an opening dated at the start "
                   f"of {period}")
        else:
            why = (f"the opening is dated {shown}, after the end of {period}; give an opening dated at the start "
                   f"of {period}")
        line = getattr(row, "line", None)
        raise InputError(site.root / "opening.csv", why, line=int(line) if line is not None and pd.notna(line) else None,
                         field="as_of")


def _survey_extent(site: Site, surface: Surface, date: str, points: int):
    """The survey_extent layer: the scanned cells' outline (``scanned_outline``)."""
    import geopandas as gpd

    from inventory.volume.measure import scanned_outline

    geom = scanned_outline(surface, site.config.grid.max_fill_distance_m)
    return gpd.GeoDataFrame({"survey_date": [date], "points": [int(points)]}, geometry=[geom], crs=site.crs)


def _assemble_piles(vols: pd.DataFrame, rec_piles: pd.DataFrame) -> pd.DataFrame:
    table = rec_piles.copy()
    for col in PILE_COLUMNS:
        if col not in table.columns:
            table[col] = vols.set_index("pile_id")[col].reindex(table["pile_id"]).to_numpy() if col in vols.columns else np.nan
    return table[PILE_COLUMNS + [c for c in table.columns if c not in PILE_COLUMNS]]


def _host() -> str:
    """This machine's name as it goes into staging folder names (letters and digits only)."""
    return re.sub(r"[^A-Za-z0-9]", "", socket.gethostname()) or "host"


#: A staging folder of a close: ``.<period>.partial-<host>-<pid>-<random>`` (``_staging``);
#: without host and pid as named by earlier versions.
_STAGING_NAME = re.compile(
    r"^\.(?P<period>\d{4}-\d{2})\.partial-(?:(?P<host>[A-Za-z0-9]+)-(?P<pid>\d+)-)?[A-Za-z0-9_]+$"
)


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:  # exists but belongs to someone else
        return True
    return True


def _clear_stale_staging(root: Path) -> list[Path]:
    """Remove the staging folders that killed closes of this site left in ``closes/``.

    Only folders named as :func:`_staging` names them, and only those of a close that is no
    longer running: made on this machine by a process that has ended (a close running on
    another machine, or still running here, keeps its folder).
    """
    closes = root / "closes"
    if not closes.is_dir():
        return []
    removed = []
    for entry in sorted(closes.iterdir()):
        match = _STAGING_NAME.match(entry.name)
        if match is None or not entry.is_dir() or entry.is_symlink():
            continue
        if match["pid"] is not None and (match["host"] != _host() or _pid_alive(int(match["pid"]))):
            continue
        shutil.rmtree(entry)
        removed.append(entry)
    return removed


@contextmanager
def _staging(folder: Path) -> Iterator[Path]:
    made = not folder.parent.exists()
    folder.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{folder.name}.partial-{_host()}-{os.getpid()}-", dir=folder.parent))
    try:
        yield tmp
    finally:
        if tmp.exists():
            shutil.rmtree(tmp, ignore_errors=True)
        if made:
            # a failed first close leaves no empty closes/ behind (the site as it was)
            try:
                folder.parent.rmdir()
            except OSError:   # it holds the close's outputs, or anything else: kept
                pass


# ----------------------------------------------------------------------------- file names
# Every name a close gives a file or folder. The survey step names its own outputs
# (surface-<date>.tif, coverage-<date>.tif, classified-<date>.laz); the close takes those
# names from the survey's paths and looks for an earlier surface under the same name.
def _close_folder(root: Path, period: str) -> Path:
    return root / "closes" / period


def _held_close_id(ledger: Ledger, folder: Path) -> int | None:
    """Which close the outputs in ``folder`` are of: its run.json says so; for folders
    written before run.json carried it, the last close the ledger superseded for the period."""
    try:
        held = json.loads((folder / "run.json").read_text(encoding="utf-8")).get("close_id")
        if isinstance(held, int):
            return held
    except (OSError, ValueError, AttributeError):
        pass
    reopened = ledger.reopenings(folder.name)
    if len(reopened):
        return int(reopened["close_id"].iloc[-1])
    return None


def _superseded_folder(folder: Path, held: int | None) -> Path:
    """Where a period's earlier outputs are kept once a new close of it is published,
    named after the close they hold (``2026-10.superseded-close-1``)."""
    if held is None:
        stamp = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%SZ")
        return folder.with_name(f"{folder.name}.superseded-{stamp}")
    return folder.with_name(f"{folder.name}.superseded-close-{held}")


def _previous_surface_file(root: Path, prev_date: str) -> Path:
    """The surface GeoTIFF of the close that adopted the survey of ``prev_date``."""
    return _close_folder(root, prev_date[:7]) / f"surface-{prev_date}.tif"


def _output_names(result: CloseResult, survey: SurveyResult) -> dict[str, str]:
    """File name of every output of a close, by key (the order :meth:`ClosedPeriod.summary` lists)."""
    period, date = result.period, result.survey_date
    names = {
        "workbook": f"variance-{period}.xlsx",
        "journal": f"journal-{period}.csv",
        "layers": f"piles-{period}.gpkg",
        "thickness": f"thickness-{date}.tif",
        "report": f"report-{period}.html",
        "manifest": "run.json",
    }
    if result.change is not None:
        names["change"] = f"change-{result.previous_survey_date}_{date}.tif"
    names.update(_style_names(names))
    names["legend"] = f"legend-{period}.png"
    for key, path in (("surface", survey.surface_path), ("coverage", survey.coverage_path),
                      ("classified", survey.classified_path)):
        if path is not None:
            names[key] = Path(path).name
    return names


def _style_names(names: dict[str, str]) -> dict[str, str]:
    """File names of the SLD styles written beside the layers and rasters."""
    from inventory.export.styles import layer_style_name, raster_style_path

    styles = {f"{key}_sld": layer_style_name(names["layers"], layer).name
              for key, layer in (("piles", "piles"), ("gaps", "coverage_gaps"), ("extent", "survey_extent"),
                                      ("unassigned", "unassigned_stock"))}
    for key in ("thickness", "change"):
        if key in names:
            styles[f"{key}_sld"] = raster_style_path(names[key]).name
    return styles


# ----------------------------------------------------------------------------- the steps
@dataclass
class _Loaded:
    """What the load step found: the site, its survey of the period, the open ledger and
    what the ledger says about the opening and the previous survey."""

    period: str
    site: Site
    ref: SurveyRef
    ledger: Ledger
    opening: Any
    opening_source: str
    prev_date: str | None

    @property
    def folder(self) -> Path:
        return _close_folder(self.site.root, self.period)


@dataclass
class _Volumes:
    """What the volumes step measured on the survey grid."""

    table: pd.DataFrame
    thickness: np.ndarray
    gaps: Any
    unassigned: Any = None  # inventory.volume.unassigned.Unassigned


def _check_writable(root: Path, period: str) -> None:
    """Refuse, before any work, a site where the close could not write its ledger or outputs."""
    def refuse(path: Path, why: str) -> None:
        raise InputError(path, why)

    need = "the close writes ledger.sqlite and closes/ there"
    if not os.access(root, os.W_OK | os.X_OK):
        refuse(root, f"the site folder is not writable ({need}); give write permission or close a writable copy")
    for name in ("ledger.sqlite", "ledger.sqlite-wal", "ledger.sqlite-shm"):
        path = root / name
        if path.exists() and not os.access(path, os.R_OK | os.W_OK):
            refuse(path, "the ledger file is not writable; give write permission")
    closes = root / "closes"
    if closes.exists() or closes.is_symlink():
        if not closes.is_dir():
            refuse(closes, "is not a folder; the close keeps its outputs in the folder closes/")
        if not os.access(closes, os.W_OK | os.X_OK):
            refuse(closes, "the outputs folder is not writable; give write permission")
    folder = _close_folder(root, period)
    if (folder.exists() or folder.is_symlink()) and not folder.is_dir():
        refuse(folder, f"is not a folder; the outputs of {period} go into a folder of this name: move it away")
    if folder.is_dir() and not folder.is_symlink() and not os.access(folder, os.W_OK | os.X_OK):
        # the earlier outputs are kept aside by renaming this folder, which needs it writable
        # (else the run fails at the end, after the survey)
        refuse(folder, f"the earlier outputs of {period} are not writable, so they cannot be kept aside as "
                       "superseded; give write permission")


def _check_ledger_knows_outputs(root: Path, ledger: Ledger) -> None:
    """Refuse a site ledger with no close while ``closes/`` holds a period's published
    outputs of a ledger close: the ledger was emptied (a file cut to 0 bytes reads as a new
    ledger) or replaced, and a close now would start the books again from opening.csv."""
    if ledger.path != root / "ledger.sqlite" or len(ledger.closes()):
        return   # a shared ledger (a site moved onto one keeps its old outputs), or closes known
    closes = root / "closes"
    if not closes.is_dir():
        return
    for folder in sorted(closes.iterdir()):
        if not Period.is_period(folder.name) or not folder.is_dir():
            continue   # staging and superseded folders, stray files
        try:
            held = json.loads((folder / "run.json").read_text(encoding="utf-8")).get("close_id")
        except (OSError, ValueError, AttributeError):
            continue
        if isinstance(held, int):
            raise InputError(
                ledger.path, f"the ledger holds no close, but {closes.name}/{folder.name}/run.json holds the "
                f"outputs of ledger close {held}: the ledger was emptied or replaced; restore it from a backup "
                f"(or move {closes.name}/ away to start the books again)")


def _check_output_names(ledger: Ledger, folder: Path) -> None:
    """Refuse, before any work, a close whose earlier outputs could not be kept aside under
    ``<period>.superseded-close-<id>`` because something already has that name."""
    if not folder.is_dir():
        return
    held = _held_close_id(ledger, folder)
    aside = _superseded_folder(folder, held)
    if aside.exists() or aside.is_symlink():
        raise InputError(
            aside, f"already exists: this close keeps the current {folder.name}/ "
            f"(outputs of ledger close {held}) under this name; move it out of {folder.parent.name}/ first",
        )


def _toml(root: Path) -> dict:
    """site.toml read leniently (for history and reopen, which need only a few keys); {}
    when it cannot be read (``inventory check`` reports why)."""
    import tomllib

    try:
        raw = tomllib.loads((root / "site.toml").read_text(encoding="utf-8-sig"))
    except (OSError, ValueError):
        return {}
    return raw if isinstance(raw, dict) else {}


def open_ledger(root: Path, raw: dict | None = None, url: str | None = None,
                site_id: str | None = None, *, every_site: bool = False) -> "Ledger":
    """The site's ledger, not yet opened: the shared PostgreSQL ledger named by ``url``
    (``--ledger``) or by ``[ledger] url`` in site.toml, else ``SITE/ledger.sqlite``.

    On a shared ledger the site id is ``site_id``, else ``[ledger] site_id``, else the
    site's ``name``; ``every_site`` opens it for every site (reading only).
    """
    from inventory.ledger.store import Ledger

    from inventory.ledger.pg import PgLedger, is_url

    raw = _toml(root) if raw is None else raw
    table = raw.get("ledger") if isinstance(raw.get("ledger"), dict) else {}
    if url is not None and not is_url(url):
        raise InputError("--ledger", "not a PostgreSQL URL (postgresql://user@host:port/database)")
    given = url
    url = url or table.get("url")
    if not url:
        if site_id is not None:
            raise InputError("--site-id", "a site id needs a shared ledger (--ledger URL or [ledger] url)")
        return Ledger(root / "ledger.sqlite")
    if not is_url(url):
        raise InputError(root / "site.toml", "not a PostgreSQL URL (postgresql://user@host:port/database)",
                         field="ledger.url")
    source = ("--ledger", None) if url == given else (str(root / "site.toml"), "ledger.url")
    if every_site and site_id is None:
        return PgLedger(url, None, source=source)
    site_id = site_id or table.get("site_id") or raw.get("name")
    if not site_id:
        raise InputError(root / "site.toml", "a shared ledger needs the site's id: set [ledger] site_id or name",
                         field="ledger.site_id")
    return PgLedger(url, str(site_id), source=source)


def _load(site_path: str | Path, period: str, say: Progress, ledger_url: str | None = None) -> _Loaded:
    """Load and check the site, find the period's survey, check that the close can write
    what it will write, open the ledger (left open); then clear what killed closes left."""
    say(f"checking {site_path}")
    site = load_site(site_path, period)  # warns only about this period's movements
    ref = site.survey_for(period)
    if ref is None:
        raise InputError(site.root / "surveys", f"no survey dated in {period} (folders are named YYYY-MM-DD)", field="date")
    _check_writable(site.root, period)
    ledger = open_ledger(site.root, site.config.raw, ledger_url).open()
    ledger_path = ledger.path
    try:
        if ledger.is_locked(period):
            raise PeriodLockedError(
                f"{ledger_path}: period {period} is closed and locked; "
                f"reopen it first (inventory reopen {site.root} --period {period} --reason \"...\")"
            )
        _check_ledger_knows_outputs(site.root, ledger)
        opening, opening_source = _opening(site, ledger, period)
        prev_date = _previous_survey(site, ref.date, ledger, period)
        _check_output_names(ledger, _close_folder(site.root, period))
        removed = _clear_stale_staging(site.root)
        if removed:
            warnings.warn(InventoryWarning(
                f"removed {len(removed)} staging folder(s) left in {site.root / 'closes'} by interrupted closes: "
                + ", ".join(p.name for p in removed)), stacklevel=3)
    except BaseException:
        ledger.close()
        raise
    return _Loaded(period, site, ref, ledger, opening, opening_source, prev_date)


def _survey(run: _Loaded, staged: Path, progress: Progress | None, workers: int | None,
            scheduler: str | None, say: Progress) -> SurveyResult:
    """Process the period's survey into a surface; its files go into ``staged``."""
    from inventory.survey.measure import measure_survey

    say(f"survey {run.ref.date}: reading, cleaning, classifying, gridding")
    return measure_survey(run.site, run.ref.date, out_dir=staged, progress=progress, workers=workers,
                          scheduler=scheduler)


def _volumes(site: Site, surface: Surface, say: Progress) -> _Volumes:
    """Every pile's volume above its base, the thickness raster, the unscanned gaps and the
    stock outside every footprint (a warning for each region and each cut footprint)."""
    from inventory.volume import measure as _vol
    from inventory.volume.unassigned import find_unassigned

    say(f"volumes of {len(site.piles)} piles")
    base = _vol.BaseSurfaces.from_site(site, surface.grid)
    table = _vol.measure_piles(surface, site.piles, site.materials, base)
    _, thickness = _vol.thickness_raster(surface, site.piles, base)
    gaps = _vol.coverage_gaps(surface, site.piles)
    say("stock outside the footprints")
    cfg = site.config.unassigned
    unassigned = find_unassigned(surface, site.piles, base, min_thickness_m=cfg.min_thickness_m,
                                 min_area_m2=cfg.min_area_m2)
    if len(unassigned.edges):
        cut = set(unassigned.edges["pile_id"])
        table["flags"] = [
            ";".join(dict.fromkeys([f for f in str(fl or "").split(";") if f] + ["edge_cut"])) if pid in cut
            else fl for pid, fl in zip(table["pile_id"], table["flags"])
        ]
    for line in unassigned.messages():
        warnings.warn(InventoryWarning(line), stacklevel=2)
    return _Volumes(table, thickness, gaps, unassigned)


def _book(run: _Loaded, say: Progress) -> BookResult:
    """Book stock rolled from the opening to the survey instant."""
    from inventory.stock import book as _book

    say("book stock at the survey instant")
    site, period = run.site, run.period
    start, end = Period.parse(period).bounds(site.timezone)
    return _book.book_stock(
        site.movements_for(period), run.opening, at=run.ref.instant, scales=site.scales,
        piles=site.piles[["pile_id", "material"]], period_end=end, period_start=start,
        duplicate_window_min=site.config.reconcile.duplicate_window_min,
    )


def _change(run: _Loaded, surface: Surface) -> np.ndarray | None:
    """Surface change since the previous survey, when its close left a surface raster."""
    if run.prev_date is None:
        return None
    prev_tif = _previous_surface_file(run.site.root, run.prev_date)
    if not prev_tif.is_file():
        return None
    prev_z, _ = read_raster(prev_tif, onto=surface.grid, resampling="nearest")
    return surface.z - prev_z


def _reconcile(run: _Loaded, survey: SurveyResult, volumes: _Volumes, book: BookResult,
               timings: dict[str, float], say: Progress) -> CloseResult:
    """Reconcile survey with book and gather everything the outputs and the ledger need."""
    from inventory.stock import reconcile as _rec

    say("reconciling survey with book")
    site, period, ref, ledger, surface = run.site, run.period, run.ref, run.ledger, survey.surface
    previous = None
    prev_period = run.prev_date[:7] if run.prev_date else None
    if prev_period and ledger.is_locked(prev_period):
        adopted = ledger.adopted(prev_period)
        if len(adopted):
            previous = adopted[["pile_id", "material", "survey_t", "survey_sigma_t", "base_sigma_t",
                                "volume_m3", "after_survey_net_t"]]
    # earlier months' belt-scale fit rows: a bias too small for one month can show
    # over several
    history = ledger.scale_fit_history(period, months=BIAS_HISTORY_MONTHS)
    rec = _rec.reconcile(
        volumes.table, book, site.materials, site.config.reconcile, previous=previous,
        history=history, period=period, scales=site.scales,
    )
    change = _change(run, surface)
    movements = book.movements[MOVEMENT_COLUMNS] if len(book.movements) else pd.DataFrame(columns=MOVEMENT_COLUMNS)
    inputs = {
        # relative to the site folder; a file site.toml allows outside it shows as ../...
        Path(os.path.relpath(p, site.root)).as_posix(): _sha256(p)
        for p in _site_inputs(site, [ref.date], period)
    }
    return CloseResult(
        site_name=site.name, period=period, crs=site.crs, timezone=site.timezone.key,
        survey_date=ref.date, survey_instant=ref.instant, previous_survey_date=run.prev_date,
        piles=_assemble_piles(volumes.table, rec.piles), footprints=site.piles[["pile_id", "geometry"]].copy(),
        movements=movements, journal=rec.journal,
        posting=_rec.value_lines(rec.lines, site.materials, site.config.journal),
        scale_diagnostics=rec.scale_diagnostics, duplicates=book.duplicates,
        surface=surface, thickness=volumes.thickness, change=change, coverage_gaps=volumes.gaps,
        survey_extent=_survey_extent(site, surface, ref.date, survey.points_read),
        tables={
            "Materials": rec.materials,
            "Site totals": rec.site_totals,
            "Measured change": rec.change,
            "Belt split": book.belt_split,
            **({"Unassigned stock": volumes.unassigned.table()} if volumes.unassigned is not None else {}),
        },
        unassigned_stock=volumes.unassigned.regions if volumes.unassigned is not None else None,
        reason_codes=dict(rec.reason_codes),
        bias_rows=rec.bias_rows,
        vertical_reference=site.vertical_reference,
        run={
            "inputs": inputs,
            "parameters": {
                "opening_source": run.opening_source,
                "vertical_reference": site.vertical_reference,
                "grid": vars(site.config.grid),
                "base": {k: str(v) for k, v in vars(site.config.base).items()},
                "reconcile": vars(site.config.reconcile),
                "unassigned": vars(site.config.unassigned),
                "journal": vars(site.config.journal),
                "survey": {k: str(v) for k, v in vars(site.config.survey).items()},
            },
            # the close's own timings so far; _write_manifest stores the final copy
            "timings": timings,
            "survey_summary": survey.format_summary(),
            "survey_registration": (survey.registration.as_dict()
                                    if getattr(survey, "registration", None) is not None else None),
            "book_messages": list(book.messages),
            "software_version": __version__,
        },
    )


def _write_outputs(result: CloseResult, names: dict[str, str], staged: Path, say: Progress) -> None:
    """Workbook, layers, thickness and change rasters, report into ``staged`` (the survey
    step has already put its surface, coverage and classified cloud there)."""
    from inventory.export.layers import write_layers
    from inventory.export.rasters import write_change, write_thickness
    from inventory.export.report import write_report
    from inventory.export.journal import write_journal_csv
    from inventory.export.styles import write_legend, write_styles
    from inventory.export.workbook import write_workbook

    say("writing outputs")
    write_workbook(result, staged / names["workbook"])
    write_journal_csv(result, staged / names["journal"])
    write_layers(result, staged / names["layers"])
    write_thickness(result, staged / names["thickness"])
    if "change" in names:
        write_change(result, staged / names["change"])
    write_styles(result, staged / names["layers"], staged / names["thickness"],
                 staged / names["change"] if "change" in names else None)
    write_legend(result, staged / names["legend"])
    write_report(result, staged / names["report"])


def _write_manifest(result: CloseResult, names: dict[str, str], staged: Path, timings: dict[str, float]) -> None:
    """The run manifest, with the timings of every step up to the outputs; then the staged
    folder gets ordinary permissions, ready to publish."""
    from inventory.export.manifest import write_manifest

    result.run["timings"] = dict(timings)
    write_manifest(result, staged / names["manifest"])
    publishable(staged)


def _publish(staged: Path, folder: Path, aside: Path) -> None:
    """Move ``staged`` to ``folder``, an existing ``folder`` to ``aside`` first."""
    if folder.exists():
        os.replace(folder, aside)
    os.replace(staged, folder)


def _unpublish(staged: Path, folder: Path, aside: Path) -> None:
    """Undo what :func:`_publish` did, however far it got."""
    if folder.exists() and not staged.exists():
        os.replace(folder, staged)
    if aside.exists():
        os.replace(aside, folder)


def _mark_superseded(aside: Path, held: int | None, close_id: int, closed_utc: str) -> None:
    """Say in the set-aside folder which close replaced it: a SUPERSEDED.txt beside the
    outputs, ``superseded_by_close`` in its run.json, and a "superseded by close N" mark in
    the workbook, the report and the journal CSV themselves."""
    from inventory.export.journal import mark_superseded
    from inventory.io.atomic import atomic_path

    mark_superseded(aside, close_id, closed_utc)
    which = f"close {held}" if held is not None else "an earlier close"
    text = (
        f"The outputs in this folder are those of ledger {which} of {aside.name.split('.')[0]}.\n"
        f"They were superseded by ledger close {close_id}, recorded {closed_utc}, whose outputs "
        f"are in ../{aside.name.split('.')[0]}/.\nDo not post from these files.\n"
    )
    with atomic_path(aside / "SUPERSEDED.txt") as tmp:
        tmp.write_text(text, encoding="utf-8")
    manifest = aside / "run.json"
    try:
        data = json.loads(manifest.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return
    if isinstance(data, dict):
        data["superseded_by_close"] = close_id
        data["superseded_utc"] = closed_utc
        with atomic_path(manifest) as tmp:
            tmp.write_text(json.dumps(data, indent=2, sort_keys=True, ensure_ascii=False) + "\n",
                           encoding="utf-8")


def _record(run: _Loaded, result: CloseResult, names: dict[str, str], staged: Path,
            timings: dict[str, float], done: Callable[[str], None], say: Progress) -> int:
    """Reserve the close in the ledger, write every output with its close id, publish:
    all or nothing.

    The outputs are written and moved into place inside the ledger transaction, which
    commits after them; if anything fails before the commit is through, the outputs are
    moved back and the ledger is as it was.
    """
    ledger, folder = run.ledger, run.folder
    held = _held_close_id(ledger, folder) if folder.is_dir() else None
    aside = _superseded_folder(folder, held)
    closed_utc = datetime.now(timezone.utc).isoformat(timespec="seconds")
    published = False
    say("recording the close in the ledger")
    try:
        with ledger.closing(result, result.run["inputs"], __version__, closed_utc=closed_utc) as close_id:
            result.close_id, result.closed_utc = close_id, closed_utc
            _write_outputs(result, names, staged, say)
            done("outputs")
            _write_manifest(result, names, staged, timings)
            published = True
            _publish(staged, folder, aside)
    except BaseException:
        result.close_id = result.closed_utc = None
        if published:
            _unpublish(staged, folder, aside)
        raise
    if aside.is_dir():
        try:
            _mark_superseded(aside, held, close_id, closed_utc)
        except Exception as err:  # noqa: BLE001 - the close is recorded; only the marks are missing
            warnings.warn(InventoryWarning(f"{aside}: cannot mark it superseded: {err}"), stacklevel=2)
    return close_id


# ----------------------------------------------------------------------------- the close
def close_period(
    site_path: str | Path,
    period: str,
    *,
    progress: Progress | None = None,
    workers: int | None = None,
    scheduler: str | None = None,
    ledger_url: str | None = None,
) -> ClosedPeriod:
    """Close one period of a site: measure, reconcile, write every output, record the ledger.

    Parameters
    ----------
    site_path : str or Path
        The site folder.
    period : str
        ``YYYY-MM``.
    progress : callable, optional
        Called with a short text at each step.
    workers, scheduler : optional
        Run the survey step on a local Dask cluster of ``workers`` processes, or on the
        cluster at ``scheduler``.
    ledger_url : str, optional
        A shared PostgreSQL ledger (``postgresql://...``) instead of the one site.toml names
        (``[ledger] url``) or ``SITE/ledger.sqlite``.

    Raises
    ------
    InputErrors, InputError
        Bad input (nothing is written).
    PeriodLockedError
        The period is already closed (``reopen_period`` first).
    """
    try:
        period = str(Period.parse(period))
    except ValueError as err:
        raise InputError("--period", str(err), field="period") from None
    say = progress or (lambda text: None)
    timings: dict[str, float] = {}
    t0 = time.perf_counter()

    def done(name: str) -> None:
        nonlocal t0
        timings[name] = round(time.perf_counter() - t0, 3)
        t0 = time.perf_counter()

    run = _load(site_path, period, say, ledger_url)
    try:
        done("load")
        with _staging(run.folder) as staged:
            survey = _survey(run, staged, progress, workers, scheduler, say)
            done("survey")
            volumes = _volumes(run.site, survey.surface, say)
            done("volumes")
            book = _book(run, say)
            done("book")
            result = _reconcile(run, survey, volumes, book, timings, say)
            done("reconcile")
            names = _output_names(result, survey)
            close_id = _record(run, result, names, staged, timings, done, say)
            done("ledger")
    finally:
        run.ledger.close()
    files = {key: run.folder / name for key, name in names.items()}
    return ClosedPeriod(result, run.folder, files, close_id, timings)


def reopen_period(site_path: str | Path, period: str, reason: str, who: str | None = None,
                  ledger_url: str | None = None) -> int:
    """Unlock a closed period so it can be closed again; the reason is kept for good (in the
    site's ledger, or the shared one ``ledger_url`` or site.toml names)."""
    try:
        period = str(Period.parse(period))
    except ValueError as err:
        raise InputError("--period", str(err), field="period") from None
    if not isinstance(reason, str) or not reason.strip():
        raise InputError("--reason", "a reason is required (it is kept in the ledger for good); say why "
                         "the period is reopened")
    root = Path(site_path)
    if not root.is_dir():
        raise InputError(root, "the site folder does not exist")
    chosen = open_ledger(root, None, ledger_url)
    path = chosen.path
    if isinstance(path, Path) and not path.is_file():
        raise InputError(path, f"no ledger: period {period} was never closed", field="period")
    with chosen as ledger:
        if not ledger.is_locked(period):
            raise InputError(path, f"period {period} is not closed; nothing to reopen", field="period")
        later = [p for p in ledger.closed_periods() if p > period]
        if later:
            raise InputError(path, f"cannot reopen {period}: {later[0]} is closed and opened from it; "
                             f"reopen {later[-1]} first, then each month back to {period}", field="period")
        return ledger.reopen(period, reason, who)


def _finance_settings(root: Path) -> tuple[dict[str, float], str]:
    """The materials' density sd (materials.csv) and ``[reconcile] adjust_to`` (site.toml),
    read leniently for ``history``: what cannot be read is left at its default (no density
    part shared, ``survey``); ``inventory check`` reports it."""
    import tomllib

    density_sd: dict[str, float] = {}
    try:
        mats = pd.read_csv(root / "materials.csv", dtype={"material": str})
        for name, sd in zip(mats["material"], pd.to_numeric(mats["density_sd_t_m3"], errors="coerce")):
            if isinstance(name, str) and np.isfinite(sd):
                density_sd[name] = float(sd)
    except (OSError, ValueError, KeyError):
        pass
    adjust_to = "survey"
    try:
        raw = tomllib.loads((root / "site.toml").read_text(encoding="utf-8-sig"))
        value = raw.get("reconcile", {}).get("adjust_to", "survey")
        adjust_to = value if value in ("survey", "midpoint") else "survey"
    except (OSError, ValueError, AttributeError):
        pass
    return density_sd, adjust_to


def _known(path: Path, what: str, value: str, known: list[str]) -> None:
    """Refuse a pile or material the ledger never had, naming the near miss (case)."""
    if value in known:
        return
    same = [k for k in known if k.casefold() == value.casefold()]
    if same:
        hint = f"did you mean '{same[0]}'? ({what}s are matched exactly, case included)"
    elif known:
        shown = ", ".join(known[:12]) + (", ..." if len(known) > 12 else "")
        hint = f"the ledger has {what}s {shown}"
    else:
        hint = "the ledger has no closes yet"
    raise InputError(path, f"no {what} '{value}' in the ledger; {hint}", field={"pile": "pile_id"}.get(what, what))


def period_history(
    site_path: str | Path, *, pile: str | None = None, material: str | None = None,
    start: str | None = None, end: str | None = None, by: str | None = None,
    ledger_url: str | None = None, site_id: str | None = None,
) -> pd.DataFrame:
    """Variance by pile and month from the ledger (adopted closes), or aggregated.

    On a shared PostgreSQL ledger (``ledger_url``, or ``[ledger] url`` in site.toml) the
    answer covers every site, each row naming its ``site_id``, unless ``site_id`` names one.

    Parameters
    ----------
    site_path : str or Path or None
        The site folder (its ``ledger.sqlite``, ``materials.csv`` and ``site.toml``); may be
        None with ``ledger_url``.
    pile, material : str, optional
        Only this pile / material (matched exactly; an unknown one is an error naming the
        near miss).
    start, end : str, optional
        First and last period, ``YYYY-MM``, both included.
    by : {"pile", "material", "month"}, optional
        Aggregate (:func:`inventory.ledger.history.aggregate_history`): one row per pile,
        material or month and a total row, each with a sigma that keeps shared errors.

    Raises
    ------
    InputError
        The site folder does not exist, or the pile or material is unknown to the ledger.
    """
    from inventory.ledger.history import aggregate_history, by_columns
    from inventory.ledger.store import HISTORY_COLUMNS

    if site_path is None and ledger_url is None:
        raise InputError("history", "name the site folder, or a shared ledger with --ledger URL")
    root = Path(site_path) if site_path is not None else None
    if root is not None and not root.is_dir():
        raise InputError(root, "the site folder does not exist")
    if start is not None and end is not None and str(start) > str(end):
        raise InputError("--from", f"{start} is after --to {end}", field="period")
    if root is None:
        from inventory.ledger.pg import PgLedger, is_url

        if not is_url(ledger_url):
            raise InputError("--ledger", "not a PostgreSQL URL (postgresql://user@host:port/database)")
        chosen = PgLedger(str(ledger_url), site_id)
    else:
        chosen = open_ledger(root, None, ledger_url, site_id, every_site=True)
    path = chosen.path
    if isinstance(path, Path) and not path.is_file():
        if root is not None:
            with chosen as ledger:   # no file: an empty ledger, unless closes/ says one was lost
                _check_ledger_knows_outputs(root, ledger)
        if pile is not None or material is not None:
            raise InputError(path, "no ledger: the site has no closes yet", field="pile_id" if pile else "material")
        return pd.DataFrame(columns=HISTORY_COLUMNS if by is None else by_columns(by))
    with chosen as ledger:
        if root is not None:
            _check_ledger_knows_outputs(root, ledger)
        if site_id is not None and hasattr(ledger, "site_ids") and site_id not in ledger.site_ids():
            _known(path, "site", site_id, ledger.site_ids())
        if pile is not None:
            _known(path, "pile", pile, ledger.pile_ids())
        if material is not None:
            _known(path, "material", material, ledger.materials())
        rows = ledger.history(pile=pile, material=material, start=start, end=end, all_columns=by is not None)
        if by is None:
            return rows
        before = None
        if len(rows):
            prev = str(Period.parse(min(rows["period"])).previous())
            before = ledger.history(pile=pile, material=material, start=prev, end=prev, all_columns=True)
    density_sd, adjust_to = _finance_settings(root) if root is not None else ({}, "survey")
    return aggregate_history(rows, by, before, density_sd=density_sd, adjust_to=adjust_to)
