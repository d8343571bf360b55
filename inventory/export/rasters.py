"""GeoTIFF outputs: surface, thickness above base, change since the previous survey.

Each raster is a Cloud Optimized GeoTIFF (OGC 21-026): 256-pixel tiles, DEFLATE with the
floating-point predictor, internal overviews, the site CRS and an explicit nodata value, so
any GIS reads it and a web viewer can stream it. The bytes depend only on the array, the
grid and the options: closing the same inputs twice gives identical files.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from ..errors import CRSError
from ..grid import Grid
from ._atomic import atomic_path

__all__ = ["write_raster", "overview_factors", "TILE_SIZE", "NODATA"]

#: Tile edge in pixels (OGC COG: tile sizes are multiples of 16; 256 is GDAL's COG default).
TILE_SIZE = 256
#: Nodata written for cells without a value (a value no surface in metres can take).
NODATA = -9999.0
#: Overviews are added until the coarsest one's longer side is at most this many pixels.
#: Smaller than GDAL's COG default (the tile size) so that site-sized rasters still get one.
_MIN_OVERVIEW_SIDE = 64


def overview_factors(nrows: int, ncols: int) -> list[int]:
    """Power-of-two decimation factors: halve until the longer side fits in 64 pixels.

    Examples
    --------
    >>> overview_factors(100, 300)
    [2, 4, 8]
    >>> overview_factors(40, 50)
    []
    """
    longest = max(nrows, ncols)
    factors: list[int] = []
    f = 2
    while math.ceil(longest / (f // 2)) > _MIN_OVERVIEW_SIDE:
        factors.append(f)
        f *= 2
    return factors


def write_raster(
    array: np.ndarray,
    grid: Grid,
    path: str | Path,
    nodata: float = NODATA,
    description: str = "",
    units: str = "m",
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
    units : str
        Band unit type.

    Returns
    -------
    Path
        ``path``.
    """
    from rasterio.crs import CRS
    from rasterio.errors import CRSError as RioCRSError
    from rasterio.io import MemoryFile
    from rasterio.shutil import copy as rio_copy

    arr = np.asarray(array, dtype="float64")
    if arr.shape != grid.shape:
        raise ValueError(f"array shape {arr.shape} does not match grid {grid.shape}")
    if not grid.crs:
        raise CRSError(str(path), "the grid has no CRS; a GeoTIFF without one is not written")
    try:
        crs = CRS.from_user_input(grid.crs)
    except RioCRSError as err:
        raise CRSError(str(path), f"unknown CRS {grid.crs!r}: {err}") from err
    out = np.where(np.isfinite(arr), arr, nodata).astype("float32")
    if np.any(np.isfinite(arr) & (out == np.float32(nodata))):
        raise ValueError(f"{path}: data contain the nodata value {nodata}; choose another")
    factors = overview_factors(*grid.shape)
    dest = Path(path)
    options: dict[str, object] = dict(
        BLOCKSIZE=TILE_SIZE, COMPRESS="DEFLATE", PREDICTOR="YES", LEVEL=6,
        OVERVIEW_RESAMPLING="AVERAGE", NUM_THREADS=1, STATISTICS="NO",
    )
    if factors:
        options.update(OVERVIEWS="AUTO", OVERVIEW_COUNT=len(factors))
    else:
        options.update(OVERVIEWS="NONE")
    with MemoryFile() as memfile:
        with memfile.open(
            driver="GTiff", width=grid.ncols, height=grid.nrows, count=1, dtype="float32",
            crs=crs, transform=grid.transform, nodata=nodata,
        ) as mem:
            mem.write(out, 1)
            if description:
                mem.set_band_description(1, description)
            mem.set_band_unit(1, units)
        with atomic_path(dest) as tmp:
            # the COG driver lays out tiles, compression and overviews in cloud-optimized order
            rio_copy(memfile.name, str(tmp), driver="COG", **options)
    return dest
