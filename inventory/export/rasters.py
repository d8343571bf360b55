"""GeoTIFF outputs of a close: thickness above base, change since the previous survey.

Both are written on the survey grid by :func:`inventory.io.rasters.write_raster`, the package's
one GeoTIFF writer (tiled, compressed, overviews, CRS, nodata; renamed into place when
complete). The surface and coverage rasters come from the survey step. The bytes depend only
on the arrays, the grid and the options, so closing the same inputs twice gives identical files.
"""

from __future__ import annotations

from pathlib import Path

from inventory.io.rasters import write_raster
from inventory.model.results import CloseResult

__all__ = ["write_thickness", "write_change"]


def write_thickness(result: CloseResult, path: str | Path) -> Path:
    """The material thickness above each pile's base (metres, float32; nodata outside piles)."""
    return write_raster(path, result.thickness, result.surface.grid,
                        descriptions=[f"thickness above base {result.survey_date}"], units=["m"])


def write_change(result: CloseResult, path: str | Path) -> Path:
    """The surface change since the previous survey (metres, float32).

    Raises
    ------
    ValueError
        The close has no change raster (no earlier surface to compare with).
    """
    if result.change is None:
        raise ValueError(f"close {result.period}: no change raster (no earlier surface)")
    return write_raster(path, result.change, result.surface.grid,
                        descriptions=[f"surface change {result.previous_survey_date} to {result.survey_date}"
                                      " (later minus earlier: positive where material was added)"],
                        units=["m"])
