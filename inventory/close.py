"""The month close: every step of one period, then its outputs and its ledger row, all or nothing.

Steps, each a plain function of the modules named:

1. load and check the site (:mod:`inventory.site.load`);
2. process the period's survey into a surface (:mod:`inventory.survey.measure`);
3. measure every pile footprint (:mod:`inventory.volume.measure`);
4. roll the books to the survey instant (:mod:`inventory.stock.book`);
5. reconcile survey with book (:mod:`inventory.stock.reconcile`);
6. write the workbook, layers, rasters, report and run manifest into a temporary folder
   (:mod:`inventory.export`), then record the close in the ledger (:mod:`inventory.ledger.store`)
   and move the folder into place inside the same transaction.

A failure anywhere leaves ``ledger.sqlite`` and ``closes/`` exactly as they were: outputs
only appear under ``closes/<period>/`` once the ledger transaction is about to commit, and
the ledger commits only after they are in place.
"""

from __future__ import annotations

import os
import shutil
import tempfile
import time
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any, Callable, Iterator

import numpy as np
import pandas as pd

from inventory._version import __version__
from inventory.errors import InputError, PeriodLockedError
from inventory.io.rasters import read_raster
from inventory.model.grid import Surface
from inventory.model.period import Period
from inventory.model.results import MOVEMENT_COLUMNS, PILE_COLUMNS, CloseResult
from inventory.site.load import Site, SurveyRef, load_site

if TYPE_CHECKING:
    from inventory.ledger.store import Ledger
    from inventory.stock.book import BookResult
    from inventory.survey.measure import SurveyResult

__all__ = ["ClosedPeriod", "close_period", "reopen_period", "period_history", "STEPS"]

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
        for key, path in self.files.items():
            lines.append(f"  {key:<11} {path}")
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
        if (ref.folder / "stations.csv").is_file():
            files.append(ref.folder / "stations.csv")
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
        return site.opening, "opening.csv"
    raise InputError(
        site.root / "opening.csv", f"no opening balances for {period}: the ledger has no close of the "
        "previous period and the site has no opening.csv", field="tonnes",
    )


def _survey_extent(site: Site, surface: Surface, date: str, points: int):
    import geopandas as gpd
    import rasterio.features
    import shapely

    mask = surface.count > 0
    shapes = [
        shapely.geometry.shape(geom)
        for geom, value in rasterio.features.shapes(mask.astype("uint8"), mask=mask, transform=surface.grid.transform)
        if value == 1
    ]
    geom = shapely.union_all(shapes) if shapes else shapely.Polygon()
    return gpd.GeoDataFrame({"survey_date": [date], "points": [int(points)]}, geometry=[geom], crs=site.crs)


def _assemble_piles(vols: pd.DataFrame, rec_piles: pd.DataFrame) -> pd.DataFrame:
    table = rec_piles.copy()
    for col in PILE_COLUMNS:
        if col not in table.columns:
            table[col] = vols.set_index("pile_id")[col].reindex(table["pile_id"]).to_numpy() if col in vols.columns else np.nan
    return table[PILE_COLUMNS + [c for c in table.columns if c not in PILE_COLUMNS]]


def _publishable(folder: Path) -> None:
    """Give staged outputs the permissions of ordinary new files (temp files are private)."""
    mask = os.umask(0)
    os.umask(mask)
    os.chmod(folder, 0o777 & ~mask)
    for path in folder.rglob("*"):
        os.chmod(path, (0o777 if path.is_dir() else 0o666) & ~mask)


@contextmanager
def _staging(folder: Path) -> Iterator[Path]:
    folder.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{folder.name}.partial-", dir=folder.parent))
    try:
        yield tmp
    finally:
        if tmp.exists():
            shutil.rmtree(tmp, ignore_errors=True)


# ----------------------------------------------------------------------------- file names
# Every name a close gives a file or folder. The survey step names its own outputs
# (surface-<date>.tif, coverage-<date>.tif, classified-<date>.laz); the close takes those
# names from the survey's paths and looks for an earlier surface under the same name.
def _close_folder(root: Path, period: str) -> Path:
    return root / "closes" / period


def _superseded_folder(folder: Path, close_id: int) -> Path:
    """Where a period's earlier outputs are kept once a new close of it is published."""
    return folder.with_name(f"{folder.name}.superseded-{close_id}")


def _previous_surface_file(root: Path, prev_date: str) -> Path:
    """The surface GeoTIFF of the close that adopted the survey of ``prev_date``."""
    return _close_folder(root, prev_date[:7]) / f"surface-{prev_date}.tif"


def _output_names(result: CloseResult, survey: SurveyResult) -> dict[str, str]:
    """File name of every output of a close, by key (the order :meth:`ClosedPeriod.summary` lists)."""
    period, date = result.period, result.survey_date
    names = {
        "workbook": f"variance-{period}.xlsx",
        "layers": f"piles-{period}.gpkg",
        "thickness": f"thickness-{date}.tif",
        "report": f"report-{period}.html",
        "manifest": "run.json",
    }
    if result.change is not None:
        names["change"] = f"change-{result.previous_survey_date}_{date}.tif"
    for key, path in (("surface", survey.surface_path), ("coverage", survey.coverage_path),
                      ("classified", survey.classified_path)):
        if path is not None:
            names[key] = Path(path).name
    return names


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


def _load(site_path: str | Path, period: str, say: Progress) -> _Loaded:
    """Load and check the site, find the period's survey, open the ledger (left open)."""
    from inventory.ledger.store import Ledger

    say(f"checking {site_path}")
    site = load_site(site_path, period)  # warns only about this period's movements
    ref = site.survey_for(period)
    if ref is None:
        raise InputError(site.root / "surveys", f"no survey dated in {period} (folders are named YYYY-MM-DD)", field="date")
    ledger_path = site.root / "ledger.sqlite"
    ledger = Ledger(ledger_path).open()
    try:
        if ledger.is_locked(period):
            raise PeriodLockedError(
                f"{ledger_path}: period {period} is closed and locked; "
                f"reopen it first (inventory reopen {site.root} --period {period} --reason \"...\")"
            )
        opening, opening_source = _opening(site, ledger, period)
        prev_date = _previous_survey(site, ref.date, ledger, period)
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
    """Every pile's volume above its base, the thickness raster and the unscanned gaps."""
    from inventory.volume import measure as _vol

    say(f"volumes of {len(site.piles)} piles")
    base = _vol.BaseSurfaces.from_site(site, surface.grid)
    table = _vol.measure_piles(surface, site.piles, site.materials, base)
    _, thickness = _vol.thickness_raster(surface, site.piles, base)
    gaps = _vol.coverage_gaps(surface, site.piles)
    return _Volumes(table, thickness, gaps)


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
        scale_diagnostics=rec.scale_diagnostics, duplicates=book.duplicates,
        surface=surface, thickness=volumes.thickness, change=change, coverage_gaps=volumes.gaps,
        survey_extent=_survey_extent(site, surface, ref.date, survey.points_read),
        tables={
            "Materials": rec.materials,
            "Measured change": rec.change,
            "Belt split": book.belt_split,
        },
        reason_codes=dict(rec.reason_codes),
        bias_rows=rec.bias_rows,
        run={
            "inputs": inputs,
            "parameters": {
                "opening_source": run.opening_source,
                "grid": vars(site.config.grid),
                "base": {k: str(v) for k, v in vars(site.config.base).items()},
                "reconcile": vars(site.config.reconcile),
                "survey": {k: str(v) for k, v in vars(site.config.survey).items()},
            },
            # the close's own timings so far; _write_manifest stores the final copy
            "timings": timings,
            "survey_summary": survey.format_summary(),
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
    from inventory.export.workbook import write_workbook

    say("writing outputs")
    write_workbook(result, staged / names["workbook"])
    write_layers(result, staged / names["layers"])
    write_thickness(result, staged / names["thickness"])
    if "change" in names:
        write_change(result, staged / names["change"])
    write_report(result, staged / names["report"])


def _write_manifest(result: CloseResult, names: dict[str, str], staged: Path, timings: dict[str, float]) -> None:
    """The run manifest, with the timings of every step up to the outputs; then the staged
    folder gets ordinary permissions, ready to publish."""
    from inventory.export.manifest import write_manifest

    result.run["timings"] = dict(timings)
    write_manifest(result, staged / names["manifest"])
    _publishable(staged)


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


def _record(ledger: Ledger, result: CloseResult, staged: Path, folder: Path, say: Progress) -> int:
    """Record the close in the ledger and publish the staged outputs: both or neither.

    The outputs move into place inside the ledger transaction, which commits after them;
    if anything fails before the commit is through, they are moved back.
    """
    say("recording the close in the ledger")
    aside = None
    try:
        with ledger.closing(result, result.run["inputs"], __version__) as close_id:
            aside = _superseded_folder(folder, close_id)
            _publish(staged, folder, aside)
    except BaseException:
        if aside is not None:
            _unpublish(staged, folder, aside)
        raise
    return close_id


# ----------------------------------------------------------------------------- the close
def close_period(
    site_path: str | Path,
    period: str,
    *,
    progress: Progress | None = None,
    workers: int | None = None,
    scheduler: str | None = None,
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

    run = _load(site_path, period, say)
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
            _write_outputs(result, names, staged, say)
            done("outputs")
            _write_manifest(result, names, staged, timings)
            close_id = _record(run.ledger, result, staged, run.folder, say)
            done("ledger")
    finally:
        run.ledger.close()
    files = {key: run.folder / name for key, name in names.items()}
    return ClosedPeriod(result, run.folder, files, close_id, timings)


def reopen_period(site_path: str | Path, period: str, reason: str, who: str | None = None) -> int:
    """Unlock a closed period so it can be closed again; the reason is kept for good."""
    from inventory.ledger.store import Ledger

    root = Path(site_path)
    path = root / "ledger.sqlite"
    if not path.is_file():
        raise InputError(path, f"no ledger: period {period} was never closed", field="period")
    with Ledger(path) as ledger:
        return ledger.reopen(period, reason, who)


def period_history(
    site_path: str | Path, *, pile: str | None = None, material: str | None = None,
    start: str | None = None, end: str | None = None,
) -> pd.DataFrame:
    """Variance by pile and month from the ledger (adopted closes)."""
    from inventory.ledger.store import HISTORY_COLUMNS, Ledger

    root = Path(site_path)
    path = root / "ledger.sqlite"
    if not path.is_file():
        return pd.DataFrame(columns=HISTORY_COLUMNS)
    with Ledger(path) as ledger:
        return ledger.history(pile=pile, material=material, start=start, end=end)
