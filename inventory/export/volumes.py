"""Outputs of ``inventory volumes``: the pile volumes of one survey, without books.

Three files beside the survey's rasters (see :mod:`inventory.volume_report`):

``volumes-<date>.csv``
    One row per pile, columns :data:`VOLUME_REPORT_COLUMNS` (UTF-8, comma separated, text a
    spreadsheet would run as a formula neutralised).
``volumes-<date>.xlsx``
    Sheets ``Volumes`` (the same table, with units in the number formats), ``Totals`` (volume
    and tonnes per material and for the site with their 1 sigma, shared density and floor
    errors counted once, beside the piles' sigmas in quadrature:
    :func:`inventory.stock.totals.survey_totals`), ``Unassigned
    stock`` (stock outside every footprint and footprints whose edge cuts through material)
    and ``Columns`` (every column's title, unit and meaning, from
    :data:`inventory.model.columns.FIELDS`), ``About`` (site, survey, cautions).
``volumes-<date>.gpkg``
    Layers ``piles`` (each footprint with its row of the table) and ``unassigned_stock``,
    in the site CRS, each layer described in ``gpkg_contents`` and each field's title,
    meaning and unit in ``gpkg_data_columns``.

Every file is written beside its destination and renamed into place when complete.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Mapping

import pandas as pd

from inventory.io.atomic import atomic_path
from inventory.io.gpkg import describe_layers
from inventory.model.columns import FIELDS, unit_of
from inventory.stock.totals import SURVEY_TOTAL_COLUMNS, survey_totals

__all__ = ["VOLUME_REPORT_COLUMNS", "write_volume_csv", "write_volume_workbook", "write_volume_layers"]

#: Columns of the volume table, in order.
VOLUME_REPORT_COLUMNS = [
    "pile_id", "material", "base_method", "area_m2", "scanned_fraction",
    "volume_m3", "volume_tin_m3", "below_base_m3",
    "volume_sigma_m3", "sigma_random_m3", "sigma_correlated_m3", "sigma_interpolated_m3",
    "sigma_base_m3", "volume_ci95_m3", "volume_low95_m3", "volume_high95_m3",
    "density_t_m3", "density_sd_t_m3", "survey_t", "survey_sigma_t", "survey_dry_t", "flags",
]

#: Under the Totals sheet: how a total's sigma differs from the piles' sigmas in quadrature.
TOTALS_IN_WORDS = (
    "A total's 1 sigma is not the piles' sigmas added in quadrature (survey_sigma_quadrature_t): "
    "the error of one material's table bulk density is one error in all its piles and the "
    "surveyed floor raster's error one error under every pile on it, so their parts are added "
    "before squaring and counted once, while the rest of each pile's error (scan noise, filled "
    "gaps, a toe plane fitted to its own ring, its own level base) adds in quadrature; the shared "
    "errors push the piles the same way, so the total's sigma is the larger."
)

#: Title of the site's row in the Totals sheet (its ``material`` is empty in the table).
SITE_ROW = "site (all materials)"

def write_volume_csv(table: pd.DataFrame, path: str | Path) -> Path:
    """Write a table as CSV (formula-like text neutralised); renamed into place when complete."""
    from inventory.export.cells import write_csv

    dest = Path(path)
    with atomic_path(dest) as tmp:
        tmp.write_text(write_csv(table, index=False), encoding="utf-8")
    return dest


def write_volume_workbook(
    table: pd.DataFrame, unassigned: pd.DataFrame, about: Mapping[str, Any], path: str | Path
) -> Path:
    """The small volume workbook (sheets Volumes, Totals, Unassigned stock, Columns, About).

    Parameters
    ----------
    table : DataFrame
        One row per pile, :data:`VOLUME_REPORT_COLUMNS`.
    unassigned : DataFrame
        Stock outside the footprints (:meth:`inventory.volume.unassigned.Unassigned.table`).
    about : mapping
        Facts shown on the About sheet (site, survey date, CRS, ...), in order.
    path : str or Path
    """
    from inventory.export.workbook import write_tables_workbook

    totals = survey_totals(table) if len(table) else pd.DataFrame(columns=SURVEY_TOTAL_COLUMNS)
    totals["material"] = totals["material"].where(totals["material"] != "", SITE_ROW)
    cols = list(dict.fromkeys(list(table.columns) + list(totals.columns) + list(unassigned.columns)))
    meanings = pd.DataFrame(
        [{"column": c, "title": FIELDS[c][0] if c in FIELDS else c,
          "unit": (unit_of(c) or ("", ""))[0], "meaning": FIELDS[c][1] if c in FIELDS else ""}
         for c in cols])
    return write_tables_workbook(
        [("Volumes", table, "No piles.", None),
         ("Totals", totals, "No piles.", TOTALS_IN_WORDS),
         ("Unassigned stock", unassigned, "No stock found outside the footprints.", None),
         ("Columns", meanings, "", None)],
        about, f"Pile volumes, survey of {about.get('survey date', '')}", path)


_LAYER_TEXTS = {
    "piles": "Pile footprints with their volume above base, its uncertainty (random, correlated, "
             "interpolated and base parts, 95 % interval) and tonnes, survey of {date}. No books.",
    "unassigned_stock": "Stock outside every pile footprint, survey of {date}: material above the "
                        "base thicker than the site's threshold, with its volume and uncertainty.",
}


def write_volume_layers(
    piles: Any, unassigned: Any, crs: str, date: str, path: str | Path
) -> Path:
    """GeoPackage with the layers ``piles`` and ``unassigned_stock`` (MultiPolygon, site CRS).

    ``piles`` is a GeoDataFrame of footprints with the volume table's columns; ``unassigned``
    the regions of :func:`inventory.volume.unassigned.find_unassigned`.
    """
    import geopandas as gpd
    import pyogrio

    dest = Path(path)
    with atomic_path(dest) as tmp:
        for name, frame in (("piles", piles), ("unassigned_stock", unassigned)):
            gdf = gpd.GeoDataFrame(frame, geometry="geometry")
            if gdf.crs is None:
                gdf = gdf.set_crs(crs)
            gdf = gdf.reset_index(drop=True)
            gdf["survey_date"] = date
            for col in gdf.columns:
                if col != "geometry" and pd.api.types.is_float_dtype(gdf[col]):
                    gdf[col] = gdf[col].astype("float64")
            pyogrio.write_dataframe(
                gdf, tmp, layer=name, driver="GPKG", geometry_type="MultiPolygon",
                promote_to_multi=True, append=tmp.exists(),
                layer_options={"SPATIAL_INDEX": "YES"}, dataset_options={"VERSION": "1.2"},
            )
        describe_layers(tmp, {name: text.format(date=date) for name, text in _LAYER_TEXTS.items()}, crs)
    return dest


