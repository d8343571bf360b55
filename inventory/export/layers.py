"""GeoPackage output: the piles with every figure of the close, coverage gaps, survey extent.

One file ``piles-<period>.gpkg`` (OGC GeoPackage) with three layers in the site CRS:

``piles``
    The footprint polygon of each pile with every column of the close's pile table
    (``PILE_COLUMNS``), stored as the same float64 values the ledger holds.
``coverage_gaps``
    Polygons of unscanned area inside the footprints (pile_id, area_m2), scan speckle merged
    away (:func:`inventory.volume.measure.coverage_gaps`).
``survey_extent``
    The outline of the survey (survey_date, points), speckle closed and simplified to the
    cell size (``inventory.close._survey_extent``).

Every layer also carries ``period`` and ``survey_date`` on each feature. The layers describe
themselves: a description per layer in ``gpkg_contents`` and a title and description per
field (with its unit) in ``gpkg_data_columns``, the GeoPackage schema extension (OGC
GeoPackage 1.3, annex F.9), written with SQLite once GDAL has written the layers.
"""

from __future__ import annotations

import sqlite3
from pathlib import Path

import pandas as pd

from inventory.errors import CRSError
from inventory.io.atomic import atomic_path
from inventory.io.tables import is_blank
from inventory.model.results import PILE_COLUMNS, CloseResult

__all__ = ["FIELDS", "LAYER_NAMES", "read_piles_layer", "unit_of", "write_layers"]

LAYER_NAMES = ("piles", "coverage_gaps", "survey_extent")

#: Columns every layer carries on each feature, after its own.
COMMON_COLUMNS = ["period", "survey_date"]

#: Units by the ending of a column name: (symbol, words). ``density_t_m3`` is matched first.
_UNITS = (
    ("_t_m3", ("t/m3", "tonnes per cubic metre")),
    ("_m3", ("m3", "cubic metres")),
    ("_m2", ("m2", "square metres")),
    ("_pct", ("%", "percent")),
    ("_t", ("t", "tonnes")),
    ("_m", ("m", "metres")),
)

#: Field -> (title, description) for the fields of the three layers; the unit is added from
#: the column name (:func:`unit_of`).
FIELDS: dict[str, tuple[str, str]] = {
    "pile_id": ("Pile", "Identifier of the pile in the site's pile register (piles.gpkg)."),
    "material": ("Material", "Material held in the pile (materials.csv)."),
    "base_method": ("Base method", "How the pile's base surface was taken: floor, level:<z> or toe."),
    "area_m2": ("Area", "Horizontal area of the polygon."),
    "scanned_fraction": ("Scanned fraction",
                         ("Share of the footprint's cells hit by the scan (0 to 1); the rest "
                          "is interpolated.")),
    "volume_m3": ("Volume", "Volume between the surveyed surface and the base, from the grid."),
    "volume_sigma_m3": ("Volume uncertainty", "Standard uncertainty (1 sigma) of the volume."),
    "volume_tin_m3": ("Volume (TIN)", "Volume from the triangulated surface, as a cross-check."),
    "below_base_m3": ("Volume below base", "Volume where the surface lies below the base."),
    "density_t_m3": ("Bulk density", "Bulk density used to turn volume into tonnes."),
    "survey_t": ("Survey stock", "Stock measured by the survey (volume times density)."),
    "survey_dry_t": ("Survey stock, dry", "Survey stock less the material's moisture."),
    "survey_sigma_t": ("Survey uncertainty", "Standard uncertainty (1 sigma) of the survey stock."),
    "base_sigma_t": ("Base uncertainty", "Part of the survey uncertainty due to the base surface."),
    "opening_t": ("Opening stock", "Book stock at the start of the period."),
    "receipts_t": ("Receipts", "Tonnes received into the pile up to the survey instant."),
    "dispatches_t": ("Dispatches", "Tonnes dispatched from the pile up to the survey instant."),
    "transfers_in_t": ("Transfers in", "Tonnes moved into the pile from other piles."),
    "transfers_out_t": ("Transfers out", "Tonnes moved out of the pile to other piles."),
    "book_t": ("Book stock", "Book stock at the survey instant."),
    "book_sigma_t": ("Book uncertainty", "Standard uncertainty (1 sigma) of the book stock."),
    "variance_t": ("Variance", "Survey stock minus book stock: positive is a gain, negative a loss."),
    "variance_pct": ("Variance share", "Variance as a percentage of the book stock."),
    "variance_sigma_t": ("Variance uncertainty",
                         "Standard uncertainty (1 sigma) of the variance, survey and book combined."),
    "significant": ("Significant",
                    "1 when the variance exceeds k sigma, 0 when not, empty when undecided."),
    "tolerance_pct": ("Tolerance", "The material's variance tolerance."),
    "out_of_tolerance": ("Out of tolerance",
                         ("1 when the variance is outside the tolerance, 0 when not, empty "
                          "when undecided.")),
    "adjustment_t": ("Adjustment", "Adjustment posted to book stock: positive increases it."),
    "after_survey_net_t": ("Net after survey",
                           "Net movements between the survey instant and the end of the period."),
    "closing_t": ("Closing stock", "Book stock at the end of the period, after the adjustment."),
    "flags": ("Flags", "Warnings on the pile from the volume step and the reconciliation."),
    "points": ("Points", "Number of survey points read."),
    "period": ("Period", "The month closed (YYYY-MM)."),
    "survey_date": ("Survey date", "Date of the survey the figures rest on (YYYY-MM-DD)."),
}

#: Layer descriptions for ``gpkg_contents``; ``{period}`` and ``{date}`` are filled in.
_LAYER_TEXTS = {
    "piles": "Stock piles closed for {period}: each pile's footprint with its survey volume, "
             "tonnes, book stock, variance and adjustment. Survey of {date}.",
    "coverage_gaps": "Unscanned areas inside the pile footprints, close of {period}, survey of "
                     "{date}: scan speckle narrower than the fill distance merged away; the "
                     "surface there is interpolated or missing.",
    "survey_extent": "Outline of the area the survey of {date} covered (close of {period}).",
}

#: The schema extension's rows in ``gpkg_extensions`` (OGC GeoPackage 1.3, F.9, table 90).
_SCHEMA_EXTENSION = "http://www.geopackage.org/spec/#extension_schema"


def unit_of(column: str) -> tuple[str, str] | None:
    """The unit a column name carries, as (symbol, words), or ``None``.

    >>> unit_of("variance_t")
    ('t', 'tonnes')
    >>> unit_of("density_t_m3")
    ('t/m3', 'tonnes per cubic metre')
    >>> unit_of("pile_id") is None
    True
    """
    for ending, unit in _UNITS:
        if column.endswith(ending):
            return unit
    return None


def _field_text(column: str) -> tuple[str, str]:
    """(title, description) of a field, the unit in both when the name carries one."""
    title, description = FIELDS[column]
    unit = unit_of(column)
    if unit is None:
        return title, description
    return f"{title} [{unit[0]}]", f"{description} Unit: {unit[1]} ({unit[0]})."


def _describe(path: Path, result: CloseResult) -> None:
    """Layer descriptions in ``gpkg_contents``; field titles, descriptions and units in
    ``gpkg_data_columns``, the schema extension registered in ``gpkg_extensions``."""
    con = sqlite3.connect(path)
    try:
        with con:
            con.execute(
                "CREATE TABLE IF NOT EXISTS gpkg_data_columns (table_name TEXT NOT NULL, "
                "column_name TEXT NOT NULL, name TEXT, title TEXT, description TEXT, "
                "mime_type TEXT, constraint_name TEXT, "
                "CONSTRAINT pk_gdc PRIMARY KEY (table_name, column_name), "
                "CONSTRAINT gdc_tn UNIQUE (table_name, name))")
            con.execute(
                "CREATE TABLE IF NOT EXISTS gpkg_data_column_constraints (constraint_name TEXT "
                "NOT NULL, constraint_type TEXT NOT NULL, value TEXT, min NUMERIC, "
                "min_is_inclusive BOOLEAN, max NUMERIC, max_is_inclusive BOOLEAN, "
                "description TEXT, CONSTRAINT gdcc_ntv UNIQUE (constraint_name, "
                "constraint_type, value))")
            con.execute(
                "CREATE TABLE IF NOT EXISTS gpkg_extensions (table_name TEXT, column_name TEXT, "
                "extension_name TEXT NOT NULL, definition TEXT NOT NULL, scope TEXT NOT NULL, "
                "CONSTRAINT ge_tce UNIQUE (table_name, column_name, extension_name))")
            for table in ("gpkg_data_columns", "gpkg_data_column_constraints"):
                con.execute(
                    "DELETE FROM gpkg_extensions WHERE table_name = ? AND column_name IS NULL "
                    "AND extension_name = 'gpkg_schema'", (table,))
                con.execute(
                    "INSERT INTO gpkg_extensions VALUES (?, NULL, 'gpkg_schema', ?, 'read-write')",
                    (table, _SCHEMA_EXTENSION))
            for layer in LAYER_NAMES:
                text = _LAYER_TEXTS[layer].format(period=result.period, date=result.survey_date)
                con.execute("UPDATE gpkg_contents SET description = ? WHERE table_name = ?",
                            (text, layer))
                geom_col = con.execute("SELECT column_name FROM gpkg_geometry_columns "
                                       "WHERE table_name = ?", (layer,)).fetchone()[0]
                pk = [r[1] for r in con.execute(f'PRAGMA table_info("{layer}")') if r[5]]
                for row in con.execute(f'PRAGMA table_info("{layer}")').fetchall():
                    column = row[1]
                    if column in pk:
                        continue
                    if column == geom_col:
                        title = "Geometry"
                        description = f"{layer} polygons in the site CRS ({result.crs})."
                    else:
                        title, description = _field_text(column)
                    con.execute("INSERT OR REPLACE INTO gpkg_data_columns (table_name, "
                                "column_name, name, title, description) VALUES (?, ?, ?, ?, ?)",
                                (layer, column, title, title, description))
    finally:
        con.close()


def _piles_layer(result: CloseResult):
    import geopandas as gpd

    piles = result.piles[PILE_COLUMNS].copy()
    foot = result.footprints[["pile_id", "geometry"]]
    missing = sorted(set(piles["pile_id"]) - set(foot["pile_id"]))
    if missing:
        raise ValueError(f"close {result.period}: piles without a footprint: {missing}")
    merged = foot.merge(piles, on="pile_id", how="right", validate="one_to_one")
    gdf = gpd.GeoDataFrame(merged[PILE_COLUMNS + ["geometry"]], geometry="geometry",
                           crs=result.footprints.crs or result.crs)
    for col in ("significant", "out_of_tolerance"):
        # nullable: a flag that could not be decided stays empty, it does not become True
        gdf[col] = pd.array([None if is_blank(v) else bool(v) for v in gdf[col]],
                            dtype="boolean")
    return gdf


def _as_crs(gdf, crs: str, what: str):
    """The frame in the site CRS; a frame without a CRS is taken to be in it."""
    if gdf.crs is None:
        return gdf.set_crs(crs)
    from pyproj import CRS

    if not CRS.from_user_input(gdf.crs).equals(CRS.from_user_input(crs)):
        raise CRSError(what, f"layer CRS {gdf.crs} differs from the site CRS {crs}")
    return gdf


def write_layers(result: CloseResult, path: str | Path) -> Path:
    """Write ``piles``, ``coverage_gaps`` and ``survey_extent`` to one GeoPackage.

    Parameters
    ----------
    result : CloseResult
    path : str or Path
        Destination ``.gpkg``; built beside it under a temporary name, then renamed.

    Returns
    -------
    Path
    """
    import geopandas as gpd
    import pyogrio

    dest = Path(path)
    piles = _as_crs(_piles_layer(result), result.crs, "piles")
    gaps = result.coverage_gaps
    if gaps is None:
        gaps = gpd.GeoDataFrame({"pile_id": [], "area_m2": []}, geometry=[], crs=result.crs)
    gaps = _as_crs(gpd.GeoDataFrame(gaps, geometry="geometry"), result.crs, "coverage_gaps")
    extent = _as_crs(gpd.GeoDataFrame(result.survey_extent, geometry="geometry"),
                     result.crs, "survey_extent")
    layers = [
        ("piles", piles, "MultiPolygon"),
        ("coverage_gaps", gaps, "MultiPolygon"),
        ("survey_extent", extent, "MultiPolygon"),
    ]
    with atomic_path(dest) as tmp:
        for name, gdf, geom_type in layers:
            gdf = gdf.reset_index(drop=True)
            gdf["period"] = str(result.period)
            gdf["survey_date"] = str(result.survey_date)
            gdf = gdf[[c for c in gdf.columns if c not in COMMON_COLUMNS + ["geometry"]]
                      + COMMON_COLUMNS + ["geometry"]]
            for col in gdf.columns:
                if col != "geometry" and pd.api.types.is_float_dtype(gdf[col]):
                    gdf[col] = gdf[col].astype("float64")
            pyogrio.write_dataframe(
                gdf, tmp, layer=name, driver="GPKG", geometry_type=geom_type,
                promote_to_multi=True, append=tmp.exists(),
                layer_options={"SPATIAL_INDEX": "YES"},
                # GeoPackage 1.2: read by older GDAL (Debian's gdal-bin) without a warning
                dataset_options={"VERSION": "1.2"},
            )
        _describe(tmp, result)
    return dest


def read_piles_layer(path: str | Path) -> pd.DataFrame:
    """The ``piles`` layer's attributes as a DataFrame (for checks and the history tools)."""
    import pyogrio

    df = pyogrio.read_dataframe(path, layer="piles", read_geometry=False)
    return pd.DataFrame(df)

