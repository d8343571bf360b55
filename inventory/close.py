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
from typing import Any, Callable, Iterator

import numpy as np
import pandas as pd

from inventory._version import __version__
from inventory.errors import InputError, PeriodLockedError, RunError
from inventory.io.rasters import read_raster
from inventory.model.grid import Surface
from inventory.model.period import Period
from inventory.model.results import MOVEMENT_COLUMNS, PILE_COLUMNS, CloseResult
from inventory.site.load import Site, load_site

__all__ = ["ClosedPeriod", "close_period", "reopen_period", "period_history", "STEPS"]

#: Months of earlier adopted closes whose belt-scale fit rows are pooled with this month's
#: (a year: long enough to see a small persistent bias, short enough that a scale has
#: usually been recalibrated within it; common practice is a yearly verification).
BIAS_HISTORY_MONTHS = 12

#: The named steps of a close, in order (used for timings and by the interruption tests).
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


# ----------------------------------------------------------------------------- the close
def close_period(
    site_path: str | Path,
    period: str,
    *,
    progress: Progress | None = None,
    workers: int | None = None,
    scheduler: str | None = None,
    _fail_at: str | None = None,
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
    from inventory.ledger.store import Ledger
    from inventory.stock import book as _book
    from inventory.stock import reconcile as _rec
    from inventory.survey.measure import measure_survey
    from inventory.volume import measure as _vol

    say = progress or (lambda text: None)
    timings: dict[str, float] = {}
    t0 = time.perf_counter()

    def step(name: str) -> None:
        # _fail_at lets the tests interrupt a close at each step and check nothing changed
        if _fail_at == name:
            raise RunError(f"simulated failure at step {name}")

    def done(name: str) -> None:
        nonlocal t0
        timings[name] = round(time.perf_counter() - t0, 3)
        t0 = time.perf_counter()

    if not isinstance(period, str) or len(period) != 7 or period[4] != "-":
        raise InputError("--period", f"{period!r} is not a period YYYY-MM", field="period")

    step("load")
    say(f"checking {site_path}")
    site = load_site(site_path)
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
        done("load")
        folder = site.root / "closes" / period
        with _staging(folder) as tmp:
            step("survey")
            say(f"survey {ref.date}: reading, cleaning, classifying, gridding")
            survey = measure_survey(site, ref.date, out_dir=tmp, progress=progress, workers=workers, scheduler=scheduler)
            surface = survey.surface
            done("survey")

            step("volumes")
            say(f"volumes of {len(site.piles)} piles")
            base = _vol.BaseSurfaces.from_site(site, surface.grid)
            vols = _vol.measure_piles(surface, site.piles, site.materials, base)
            _, thickness = _vol.thickness_raster(surface, site.piles, base)
            gaps = _vol.coverage_gaps(surface, site.piles)
            done("volumes")

            step("book")
            say("book stock at the survey instant")
            start, end = Period.parse(period).bounds(site.timezone)
            book = _book.book_stock(
                site.movements_for(period), opening, at=ref.instant, scales=site.scales,
                piles=site.piles[["pile_id", "material"]], period_end=end, period_start=start,
                duplicate_window_min=site.config.reconcile.duplicate_window_min,
            )
            done("book")

            step("reconcile")
            say("reconciling survey with book")
            previous = None
            prev_period = prev_date[:7] if prev_date else None
            if prev_period and ledger.is_locked(prev_period):
                adopted = ledger.adopted(prev_period)
                if len(adopted):
                    previous = adopted[["pile_id", "material", "survey_t", "survey_sigma_t", "base_sigma_t",
                                        "volume_m3", "after_survey_net_t"]]
            # earlier months' belt-scale fit rows: a bias too small for one month can show
            # over several
            history = ledger.scale_fit_history(period, months=BIAS_HISTORY_MONTHS)
            rec = _rec.reconcile(
                vols, book, site.materials, site.config.reconcile, previous=previous,
                history=history, period=period, scales=site.scales,
            )
            change = None
            if prev_date is not None:
                prev_tif = site.root / "closes" / prev_period / f"surface-{prev_date}.tif"
                if prev_tif.is_file():
                    prev_z, _ = read_raster(prev_tif, onto=surface.grid, resampling="nearest")
                    change = surface.z - prev_z
            piles_table = _assemble_piles(vols, rec.piles)
            footprints = site.piles[["pile_id", "geometry"]].copy()
            movements = book.movements[MOVEMENT_COLUMNS] if len(book.movements) else pd.DataFrame(columns=MOVEMENT_COLUMNS)
            inputs = {
                str(p.relative_to(site.root)): _sha256(p)
                for p in _site_inputs(site, [ref.date], period)
            }
            result = CloseResult(
                site_name=site.name, period=period, crs=site.crs, timezone=site.timezone.key,
                survey_date=ref.date, survey_instant=ref.instant, previous_survey_date=prev_date,
                piles=piles_table, footprints=footprints, movements=movements, journal=rec.journal,
                scale_diagnostics=rec.scale_diagnostics, duplicates=book.duplicates,
                surface=surface, thickness=thickness, change=change, coverage_gaps=gaps,
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
                        "opening_source": opening_source,
                        "grid": vars(site.config.grid),
                        "base": {k: str(v) for k, v in vars(site.config.base).items()},
                        "reconcile": vars(site.config.reconcile),
                        "survey": {k: str(v) for k, v in vars(site.config.survey).items()},
                    },
                    "timings": timings,
                    "survey_summary": survey.format_summary(),
                    "book_messages": list(book.messages),
                    "software_version": __version__,
                },
            )
            done("reconcile")

            step("outputs")
            say("writing outputs")
            from inventory.export.layers import write_layers
            from inventory.export.manifest import write_manifest
            from inventory.export.rasters import write_change, write_thickness
            from inventory.export.report import write_report
            from inventory.export.workbook import write_workbook

            names: dict[str, str] = {
                "workbook": f"variance-{period}.xlsx",
                "layers": f"piles-{period}.gpkg",
                "thickness": f"thickness-{ref.date}.tif",
                "report": f"report-{period}.html",
                "manifest": "run.json",
            }
            write_workbook(result, tmp / names["workbook"])
            write_layers(result, tmp / names["layers"])
            write_thickness(result, tmp / names["thickness"])
            if change is not None:
                names["change"] = f"change-{prev_date}_{ref.date}.tif"
                write_change(result, tmp / names["change"])
            for key, path in (("surface", survey.surface_path), ("coverage", survey.coverage_path),
                              ("classified", survey.classified_path)):
                if path is not None:
                    names[key] = Path(path).name
            write_report(result, tmp / names["report"])
            done("outputs")
            timings_total = dict(timings)
            result.run["timings"] = timings_total
            write_manifest(result, tmp / names["manifest"])

            _publishable(tmp)

            step("ledger")
            say("recording the close in the ledger")
            aside = None
            with ledger.closing(result, inputs, __version__) as close_id:
                if folder.exists():
                    aside = folder.with_name(f"{period}.superseded-{close_id}")
                    os.replace(folder, aside)
                try:
                    os.replace(tmp, folder)
                    if _fail_at == "commit":
                        raise RunError("simulated failure before the ledger commit")
                except BaseException:
                    if folder.exists() and not tmp.exists():
                        os.replace(folder, tmp)
                    if aside is not None:
                        os.replace(aside, folder)
                    raise
            done("ledger")
    finally:
        ledger.close()
    files = {key: folder / name for key, name in names.items()}
    return ClosedPeriod(result, folder, files, close_id, timings)


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
