"""``inventory volumes``: every pile's volume of one survey, without books or ledger.

The survey is processed as for a close (:func:`inventory.survey.measure.measure_survey`), the
piles are measured (:func:`inventory.volume.measure.measure_piles`) and the stock outside
every footprint is found (:func:`inventory.volume.unassigned.find_unassigned`), exactly as the
close's volumes step does. No opening balances, movements or ledger are read or written.

Everything goes into one folder of its own, ``SITE/volumes/<date>/`` unless another is given:
``volumes-<date>.csv``, ``.xlsx`` and ``.gpkg`` (:mod:`inventory.export.volumes`),
``unassigned-<date>.csv``, the survey's ``surface-<date>.tif`` and ``coverage-<date>.tif``,
``thickness-<date>.tif`` (thickness above each pile's base) and ``run.json`` (inputs with
their SHA-256, settings, software version). The folder is built under a temporary name
beside its destination and renamed into place when complete; an earlier folder of the same
survey is replaced only then. Bad input (no such survey, a date that is not a date, a site
that does not load) stops before anything is written.
"""

from __future__ import annotations

import json
import os
import shutil
import tempfile
from dataclasses import dataclass, field
from datetime import date as _date
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pandas as pd

from inventory._version import __version__
from inventory.errors import InputError
from inventory.io.atomic import atomic_path, publishable
from inventory.site.load import Site, load_site

__all__ = ["VolumeRun", "report_volumes"]

Progress = Callable[[str], None]


@dataclass
class VolumeRun:
    """What :func:`report_volumes` measured and where it went."""

    site_name: str
    survey_date: str
    table: pd.DataFrame            # VOLUME_REPORT_COLUMNS, one row per pile
    unassigned: Any                # inventory.volume.unassigned.Unassigned
    folder: Path
    files: dict[str, Path] = field(default_factory=dict)

    def summary(self) -> str:
        t = self.table
        lines = [
            f"volumes of {len(t)} piles for {self.site_name}, survey {self.survey_date}: "
            f"{t['volume_m3'].sum():,.1f} m3, {t['survey_t'].sum():,.0f} t at table density; "
            f"{len(self.unassigned.regions)} region(s) of stock outside the footprints, "
            f"{len(self.unassigned.edges)} footprint(s) cut through material",
        ]
        for key, path in self.files.items():
            lines.append(f"  {key:<11} {path}")
        return "\n".join(lines)


def _check_date(text: str) -> str:
    try:
        day = _date.fromisoformat(str(text))
    except ValueError:
        raise InputError("--date", f"{text!r} is not a date YYYY-MM-DD", field="date") from None
    if day.isoformat() != str(text):
        raise InputError("--date", f"{text!r} is not a date YYYY-MM-DD", field="date")
    return day.isoformat()


def _check_destination(dest: Path) -> None:
    """Refuse, before any work, a destination the run could not write."""
    if (dest.exists() or dest.is_symlink()) and not dest.is_dir():
        raise InputError(dest, "is not a folder; the volume report goes into a folder of this name: move it away")
    parent = dest.parent
    probe = parent
    while not probe.exists():
        probe = probe.parent
    if not probe.is_dir() or not os.access(probe, os.W_OK | os.X_OK):
        raise InputError(probe, "is not a writable folder; the volume report cannot be written there")


def _table(volumes: pd.DataFrame) -> pd.DataFrame:
    from inventory.export.volumes import VOLUME_REPORT_COLUMNS
    from inventory.volume.measure import Z95

    t = volumes.copy()
    t["volume_ci95_m3"] = Z95 * t["volume_sigma_m3"]
    t["volume_low95_m3"] = t["volume_m3"] - t["volume_ci95_m3"]
    t["volume_high95_m3"] = t["volume_m3"] + t["volume_ci95_m3"]
    return t[VOLUME_REPORT_COLUMNS].reset_index(drop=True)


def _inputs(site: Site, date: str) -> dict[str, str]:
    from inventory.export.manifest import sha256_file

    ref = site.surveys[date]
    files = [site.root / "site.toml", site.root / "piles.gpkg", site.root / "materials.csv", *ref.files]
    if (ref.folder / "stations.csv").is_file():
        files.append(ref.folder / "stations.csv")
    if site.config.base.floor_raster is not None:
        files.append(site.config.base.floor_raster)
    return {Path(os.path.relpath(p, site.root)).as_posix(): sha256_file(p) for p in files}


def report_volumes(
    site_path: str | Path,
    date: str,
    *,
    out: str | Path | None = None,
    progress: Progress | None = None,
    workers: int | None = None,
    scheduler: str | None = None,
) -> VolumeRun:
    """Measure every pile of one survey and write the volume report (module docstring).

    Parameters
    ----------
    site_path : str or Path
        The site folder.
    date : str
        The survey, ``YYYY-MM-DD`` (a folder under ``surveys/``).
    out : str or Path, optional
        The report's folder; ``SITE/volumes/<date>`` by default.
    progress : callable, optional
        Called with a short text at each step.
    workers, scheduler : optional
        Run the survey step on a local Dask cluster of ``workers`` processes, or on the
        cluster at ``scheduler``.

    Raises
    ------
    InputError, InputErrors
        Bad input; nothing is written.
    """
    from inventory.close import _volumes
    from inventory.export.volumes import write_volume_csv, write_volume_layers, write_volume_workbook
    from inventory.io.rasters import write_raster
    from inventory.survey.measure import measure_survey

    say = progress or (lambda text: None)
    date = _check_date(date)
    say(f"checking {site_path}")
    # the report reads no books: movement warnings are not issued (a period no site has)
    site = load_site(site_path, "0000-00")
    if date not in site.surveys:
        known = ", ".join(sorted(site.surveys)) or "none"
        raise InputError(site.root / "surveys" / date,
                         f"no survey dated {date} (survey folders: {known})", field="date")
    dest = Path(out) if out is not None else site.root / "volumes" / date
    _check_destination(dest)
    inputs = _inputs(site, date)
    made = not dest.parent.exists()
    dest.parent.mkdir(parents=True, exist_ok=True)
    staged = Path(tempfile.mkdtemp(prefix=f".{dest.name}.partial-", dir=dest.parent))
    try:
        say(f"survey {date}: reading, cleaning, classifying, gridding")
        survey = measure_survey(site, date, out_dir=staged, progress=progress, workers=workers,
                                scheduler=scheduler, write_classified=False)
        vols = _volumes(site, survey.surface, say)
        table = _table(vols.table)
        found = vols.unassigned
        say("writing the volume report")
        names = {"csv": f"volumes-{date}.csv", "workbook": f"volumes-{date}.xlsx",
                 "layers": f"volumes-{date}.gpkg", "unassigned": f"unassigned-{date}.csv",
                 "thickness": f"thickness-{date}.tif"}
        write_volume_csv(table, staged / names["csv"])
        write_volume_csv(found.table(), staged / names["unassigned"])
        about = {"site": site.name, "survey date": date, "CRS": site.crs,
                 "survey": survey.format_summary(), "piles": len(table),
                 "unassigned min thickness (m)": found.min_thickness_m,
                 "unassigned min area (m2)": found.min_area_m2,
                 "software version": __version__,
                 "tonnes": "volume times the pile's density (materials.csv, or the pile's own in piles.gpkg)"}
        write_volume_workbook(table, found.table(), about, staged / names["workbook"])
        foot = site.piles[["pile_id", "geometry"]].merge(table, on="pile_id", how="right")
        write_volume_layers(foot, found.regions, site.crs, date, staged / names["layers"])
        write_raster(staged / names["thickness"], vols.thickness, survey.surface.grid,
                     descriptions=[f"thickness above base {date}"], units=["m"])
        for key, path in (("surface", survey.surface_path), ("coverage", survey.coverage_path)):
            if path is not None:
                names[key] = Path(path).name
        names["manifest"] = "run.json"
        manifest = {
            "command": "volumes", "site": site.name, "survey_date": date, "crs": site.crs,
            "software_version": __version__, "inputs": inputs,
            "parameters": {"grid": vars(site.config.grid),
                           "base": {k: str(v) for k, v in vars(site.config.base).items()},
                           "unassigned": vars(site.config.unassigned)},
            "survey_summary": survey.format_summary(),
            "totals": {"volume_m3": float(np.nansum(table["volume_m3"])),
                       "survey_t": float(np.nansum(table["survey_t"])),
                       "unassigned_m3": float(np.nansum(found.regions["volume_m3"]))},
            "files": sorted(names.values()),
        }
        with atomic_path(staged / "run.json") as tmp:
            tmp.write_text(json.dumps(manifest, indent=2, sort_keys=True, ensure_ascii=False) + "\n",
                           encoding="utf-8")
        publishable(staged)
        _publish(staged, dest)
    except BaseException:
        shutil.rmtree(staged, ignore_errors=True)
        if made:  # the folder this run made for its output, left empty
            try:
                dest.parent.rmdir()
            except OSError:
                pass
        raise
    return VolumeRun(site.name, date, table, found, dest, {k: dest / n for k, n in names.items()})


def _publish(staged: Path, dest: Path) -> None:
    """Move ``staged`` to ``dest``; an earlier ``dest`` is set aside first and removed once
    the new one is in place (put back if the move fails)."""
    if not dest.exists():
        os.replace(staged, dest)
        return
    aside = Path(tempfile.mkdtemp(prefix=f".{dest.name}.old-", dir=dest.parent))
    aside.rmdir()
    os.replace(dest, aside)
    try:
        os.replace(staged, dest)
    except BaseException:
        os.replace(aside, dest)
        raise
    shutil.rmtree(aside, ignore_errors=True)
