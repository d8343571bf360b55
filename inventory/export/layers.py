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
``unassigned_stock``
    Regions of stock outside every footprint, each with its volume and the parts of its
    uncertainty (:func:`inventory.volume.unassigned.find_unassigned`); empty when none was
    found or the close did not look.

Every layer also carries ``period`` and ``survey_date`` on each feature, and, for a close
recorded in the ledger, ``close_id`` and ``closed_utc`` (:data:`CLOSE_COLUMNS`), so months
loaded together stay apart. The layers describe themselves: a description per layer in
``gpkg_contents`` (which ends with the vertical reference of the survey heights) and a title
and description per
field (with its unit) in ``gpkg_data_columns``, the GeoPackage schema extension (OGC
GeoPackage 1.3, annex F.9), written with SQLite once GDAL has written the layers.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from inventory.errors import CRSError
from inventory.io.atomic import atomic_path
from inventory.io.tables import is_blank
from inventory.io.gpkg import describe_layers
from inventory.model.results import PILE_COLUMNS, CloseResult

__all__ = ["CLOSE_COLUMNS", "COMMON_COLUMNS", "LAYER_NAMES", "read_piles_layer", "write_layers"]

LAYER_NAMES = ("piles", "coverage_gaps", "survey_extent", "unassigned_stock")

#: Columns every layer carries on each feature, after its own.
COMMON_COLUMNS = ["period", "survey_date"]
#: Columns every layer carries after those when the close is recorded (``close_id`` set).
CLOSE_COLUMNS = ["close_id", "closed_utc"]

#: Layer descriptions for ``gpkg_contents``; ``{period}`` and ``{date}`` are filled in.
_LAYER_TEXTS = {
    "piles": "Stock piles closed for {period}: each pile's footprint with its survey volume, "
             "tonnes, book stock, variance and adjustment. Survey of {date}.",
    "coverage_gaps": "Unscanned areas inside the pile footprints, close of {period}, survey of "
                     "{date}: scan speckle narrower than the fill distance merged away; the "
                     "surface there is interpolated or missing.",
    "survey_extent": "Outline of the area the survey of {date} covered (close of {period}).",
    "unassigned_stock": "Stock outside every pile footprint, survey of {date} (close of {period}): "
                        "material above the base thicker than the site's threshold, with its "
                        "volume and uncertainty; it is in no pile's stock.",
}

def _describe(path: Path, result: CloseResult) -> None:
    """Layer descriptions in ``gpkg_contents`` (what, period, survey date, heights, ledger
    close); field titles, descriptions and units in ``gpkg_data_columns``."""
    texts = {}
    for layer in LAYER_NAMES:
        text = _LAYER_TEXTS[layer].format(period=result.period, date=result.survey_date)
        text += f" Heights: {result.vertical_reference}."
        if result.close_id is not None:
            text += f" Ledger close {result.close_id}, recorded {result.closed_utc}."
        texts[layer] = text
    describe_layers(path, texts, result.crs)


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


def _unassigned_layer(result: CloseResult):
    """The ``unassigned_stock`` layer: the close's regions, or an empty layer with their columns."""
    import geopandas as gpd

    from inventory.volume.unassigned import empty_regions

    frame = getattr(result, "unassigned_stock", None)
    if frame is None:
        frame = empty_regions(result.crs)
    return _as_crs(gpd.GeoDataFrame(frame, geometry="geometry"), result.crs, "unassigned_stock")


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
        ("unassigned_stock", _unassigned_layer(result), "MultiPolygon"),
    ]
    with atomic_path(dest) as tmp:
        for name, gdf, geom_type in layers:
            gdf = gdf.reset_index(drop=True)
            gdf["period"] = str(result.period)
            gdf["survey_date"] = str(result.survey_date)
            common = list(COMMON_COLUMNS)
            if result.close_id is not None:
                gdf["close_id"] = pd.array([int(result.close_id)] * len(gdf), dtype="Int64")
                gdf["closed_utc"] = str(result.closed_utc)
                common += CLOSE_COLUMNS
            gdf = gdf[[c for c in gdf.columns if c not in common + ["geometry"]]
                      + common + ["geometry"]]
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

