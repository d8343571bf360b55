"""GeoTIFF outputs of a close: thickness above base, change since the previous survey.

Both are written on the survey grid by :func:`inventory.io.rasters.write_raster`, the package's
one GeoTIFF writer (tiled, compressed, overviews, CRS, nodata; renamed into place when
complete). Each band says what it holds, its unit and sign; the dataset metadata items
(:func:`close_tags`) say which close wrote it (``CLOSE_ID``, ``CLOSED_UTC``, when the close is
recorded), for which period and survey, and the vertical reference of the heights. The pixels
depend only on the arrays and the grid, so closing the same inputs twice gives identical
pixel data; the two files differ only in the close id and time in their metadata.
"""

from __future__ import annotations

from pathlib import Path

from inventory.io.rasters import write_raster
from inventory.model.results import CloseResult

__all__ = ["close_tags", "write_thickness", "write_change"]


def close_tags(result: CloseResult) -> dict[str, str | None]:
    """Metadata items every raster of a close carries (``None``: not written)."""
    return {
        "PERIOD": result.period,
        "SURVEY_DATE": result.survey_date,
        "VERTICAL_REFERENCE": result.vertical_reference,
        "CLOSE_ID": None if result.close_id is None else str(result.close_id),
        "CLOSED_UTC": result.closed_utc,
    }


def write_thickness(result: CloseResult, path: str | Path) -> Path:
    """The material thickness above each pile's base (metres, float32; nodata outside piles)."""
    return write_raster(path, result.thickness, result.surface.grid,
                        descriptions=[f"thickness above base, metres, survey {result.survey_date} "
                                      "(surface minus base, positive where material lies above the "
                                      f"base; heights: {result.vertical_reference})"],
                        units=["m"], tags=close_tags(result))


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
                        descriptions=[f"surface change, metres, {result.previous_survey_date} to {result.survey_date}"
                                      " (later minus earlier: positive where material was added; "
                                      f"heights: {result.vertical_reference})"],
                        units=["m"],
                        tags={**close_tags(result), "PREVIOUS_SURVEY_DATE": result.previous_survey_date})
