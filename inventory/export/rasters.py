"""GeoTIFF outputs of a close: surface, thickness above base, change since the previous survey.

There is one GeoTIFF writer in the package, :func:`inventory.survey.gridding.write_geotiff` (tiled
256 x 256, DEFLATE with the floating-point predictor, internal overviews, CRS, nodata,
written under a temporary name and renamed). This module adds what a close output needs
on top of it: a CRS is required, NaN becomes the nodata value, and a real value equal to
the nodata value is refused rather than silently lost. The bytes depend only on the array,
the grid and the options, so closing the same inputs twice gives identical files.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from inventory.errors import CRSError
from inventory.model.grid import Grid

__all__ = ["write_raster", "NODATA"]

#: Nodata written for cells without a value (a value no surface in metres can take).
NODATA = -9999.0


def write_raster(
    array: np.ndarray,
    grid: Grid,
    path: str | Path,
    nodata: float = NODATA,
    description: str = "",
) -> Path:
    """Write one band as a tiled, compressed GeoTIFF with overviews, CRS and nodata.

    Parameters
    ----------
    array : ndarray, (grid.nrows, grid.ncols)
        Values in metres; NaN (and inf) become ``nodata``.
    grid : Grid
        Georeferencing; ``grid.crs`` must be set.
    path : str or Path
        Destination; written to a temporary file beside it and renamed into place.
    nodata : float
        The nodata value stored in the file.
    description : str
        Band description (shown by ``gdalinfo`` and GIS layer properties).

    Returns
    -------
    Path
        ``path``.
    """
    from rasterio.crs import CRS
    from rasterio.errors import CRSError as RioCRSError

    from inventory.survey.gridding import write_geotiff

    arr = np.asarray(array, dtype="float64")
    if arr.shape != grid.shape:
        raise ValueError(f"array shape {arr.shape} does not match grid {grid.shape}")
    if not grid.crs:
        raise CRSError(str(path), "the grid has no CRS; a GeoTIFF without one is not written")
    try:
        CRS.from_user_input(grid.crs)
    except RioCRSError as err:
        raise CRSError(str(path), f"unknown CRS {grid.crs!r}: {err}") from err
    out = np.where(np.isfinite(arr), arr, nodata).astype("float32")
    if np.any(np.isfinite(arr) & (out == np.float32(nodata))):
        raise ValueError(f"{path}: data contain the nodata value {nodata}; choose another")
    return write_geotiff(Path(path), [out], grid, nodata=nodata, dtype="float32",
                         descriptions=[description] if description else [])
