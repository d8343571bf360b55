"""GeoPackage output: the piles with every figure of the close, coverage gaps, survey extent.

One file ``piles-<period>.gpkg`` (OGC GeoPackage) with three layers in the site CRS:

``piles``
    The footprint polygon of each pile with every column of the close's pile table
    (``PILE_COLUMNS``), stored as the same float64 values the ledger holds.
``coverage_gaps``
    Polygons of unscanned area inside the footprints (pile_id, area_m2).
``survey_extent``
    The outline of the survey (survey_date, points).
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from inventory.errors import CRSError
from inventory.model.results import PILE_COLUMNS, CloseResult
from inventory.io.atomic import atomic_path

__all__ = ["write_layers", "read_piles_layer", "LAYER_NAMES"]

LAYER_NAMES = ("piles", "coverage_gaps", "survey_extent")


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
        gdf[col] = pd.array([None if _missing(v) else bool(v) for v in gdf[col]],
                            dtype="boolean")
    return gdf


def _missing(value) -> bool:
    return value is None or value is pd.NA or (isinstance(value, float) and value != value)


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
    return dest


def read_piles_layer(path: str | Path) -> pd.DataFrame:
    """The ``piles`` layer's attributes as a DataFrame (for checks and the history tools)."""
    import pyogrio

    df = pyogrio.read_dataframe(path, layer="piles", read_geometry=False)
    return pd.DataFrame(df)

