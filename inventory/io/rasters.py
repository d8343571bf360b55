"""GeoTIFF rasters on a :class:`~inventory.model.grid.Grid`: one writer, one reader.

:func:`write_raster` writes bands as a Cloud Optimized GeoTIFF (GDAL's COG driver: tiles of
256 x 256, DEFLATE, internal overviews, the main image's directory first) with CRS, nodata,
band descriptions and units, dataset metadata items (tags), through :func:`inventory.io.atomic.atomic_path` (the file
appears only when complete). The bytes depend only on the arrays, the grid and the options,
so writing the same data twice gives identical files (GDAL compresses tiles and builds
overviews on several threads, :func:`_gdal_threads`, and writes the tiles in order: the
bytes do not depend on the threads). :func:`write_surface` and :func:`write_coverage` are a surface's two
rasters written with it.

:func:`read_raster` reads one band with NaN for nodata, with its grid, or resampled onto
another grid (GDAL warping through rasterio).
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np

from inventory.errors import CRSError, InputWarning, RunError
from inventory.io.atomic import atomic_path
from inventory.model.grid import Grid, Surface
from inventory.model.texts import DEFAULT_VERTICAL_REFERENCE
from inventory.parallel import job_threads

__all__ = ["COVERAGE_NODATA", "NODATA", "TILE", "read_raster", "write_coverage", "write_raster", "write_surface"]

#: Nodata of float rasters (a value no elevation or thickness in metres takes); NaN would
#: also do, but not every GIS reads it.
NODATA = -9999.0
#: Nodata of the integer coverage raster (no cell is nodata: 0 points means not scanned).
COVERAGE_NODATA = -1
#: Tile edge of written GeoTIFFs (OGC COG 21-026 asks for multiples of 16; 256 is usual).
TILE = 256
#: GDAL block cache (MB) while a raster is written: a strip of tiles at a time needs little,
#: and GDAL's default (5 % of the machine's memory) would hold a whole large raster.
_CACHE_MB = 64


def _gdal_threads() -> str:
    """GDAL's ``NUM_THREADS`` for compressing tiles and building overviews: every core in a
    serial run, a job's share of them inside a job (:func:`inventory.parallel.job_threads`)."""
    n = job_threads()
    return "ALL_CPUS" if n < 0 else str(max(n, 1))


def write_raster(
    path: str | Path,
    bands: np.ndarray | Sequence[np.ndarray],
    grid: Grid,
    *,
    nodata: float = NODATA,
    dtype: str = "float32",
    descriptions: Sequence[str] = (),
    units: Sequence[str] = (),
    tags: Mapping[str, object] | None = None,
) -> Path:
    """Write bands on ``grid`` as a Cloud Optimized GeoTIFF (tiled, DEFLATE, overviews).

    Parameters
    ----------
    path : str or Path
        Destination; written under a temporary name beside it and renamed into place.
    bands : ndarray (nrows, ncols) or sequence of them
        One array is one band. In float output NaN and inf become ``nodata``.
    grid : Grid
        Georeferencing; ``grid.crs`` must be set.
    nodata : float
        The nodata value stored in the file.
    dtype : str
        Data type on disk (``float32``, ``int32``, ...). Float bands use the floating-point
        predictor and averaged overviews, integer bands the horizontal predictor and
        nearest-neighbour overviews.
    descriptions : sequence of str
        Band descriptions (shown by ``gdalinfo`` and GIS layer properties), band 1 first.
    units : sequence of str
        Band unit types (``"m"`` for elevations and thicknesses), band 1 first; a band without
        one has none.
    tags : mapping, optional
        Dataset metadata items (GDAL's default domain: ``gdalinfo`` lists them under
        Metadata, rasterio's ``tags()`` returns them), e.g. ``VERTICAL_REFERENCE``; a value
        of ``None`` is left out, others are written as text.

    Returns
    -------
    Path
        ``path``.

    Raises
    ------
    ValueError
        A band's shape is not the grid's, or a band holds the nodata value as data.
    CRSError
        The grid has no CRS, or one rasterio does not know.
    """
    from rasterio.crs import CRS
    from rasterio.errors import CRSError as RioCRSError

    path = Path(path)
    arrays = [bands] if isinstance(bands, np.ndarray) and np.ndim(bands) == 2 else list(bands)
    if not grid.crs:
        raise CRSError(str(path), "the grid has no CRS; a GeoTIFF without one is not written")
    try:
        CRS.from_user_input(grid.crs)
    except RioCRSError as err:
        raise CRSError(str(path), f"unknown CRS {grid.crs!r}: {err}") from err
    floating = np.dtype(dtype).kind == "f"
    for band in arrays:
        if np.shape(band) != grid.shape:
            raise ValueError(f"array shape {np.shape(band)} does not match grid {grid.shape}")
    from rasterio.env import Env
    from rasterio.io import MemoryFile
    from rasterio.shutil import copy as copy_dataset
    from rasterio.windows import Window

    threads = _gdal_threads()
    # Tiled and lightly compressed in memory, written a strip of tiles at a time with a
    # small block cache: memory is a strip's, not a copy of every band in the file's type.
    profile = dict(driver="GTiff", width=grid.ncols, height=grid.nrows, count=len(arrays), dtype=dtype,
                   crs=grid.crs, transform=grid.transform, nodata=nodata, tiled=True, blockxsize=TILE,
                   blockysize=TILE, compress="DEFLATE", zlevel=1, num_threads=threads)
    # GDAL's COG driver only copies a finished dataset: build it in memory, then copy it into
    # the layout the COG specification asks for (OGC 21-026).
    with Env(GDAL_CACHEMAX=_CACHE_MB, GDAL_NUM_THREADS=threads), MemoryFile() as mem:
        with mem.open(**profile) as ds:
            items = {str(k): str(v) for k, v in (tags or {}).items() if v is not None}
            if items:
                ds.update_tags(**items)
            for i, band in enumerate(arrays, start=1):
                for r0 in range(0, grid.nrows, TILE):
                    arr = np.asarray(band[r0:r0 + TILE])
                    data = np.isfinite(arr) if floating else None
                    written = (np.where(data, arr, nodata) if floating else arr).astype(dtype, copy=False)
                    bad = written == np.dtype(dtype).type(nodata)
                    if data is not None:
                        bad &= data
                    if bad.any():
                        raise ValueError(f"{path}: data contain the nodata value {nodata}; choose another")
                    ds.write(written, i, window=Window(0, r0, grid.ncols, written.shape[0]))
                if i - 1 < len(descriptions):
                    ds.set_band_description(i, descriptions[i - 1])
                if i - 1 < len(units) and units[i - 1]:
                    ds.set_band_unit(i, units[i - 1])
        with mem.open() as src, atomic_path(path) as tmp:
            copy_dataset(src, tmp, driver="COG", BLOCKSIZE=TILE, COMPRESS="DEFLATE",
                         PREDICTOR="FLOATING_POINT" if floating else "STANDARD",
                         OVERVIEW_RESAMPLING="AVERAGE" if floating else "NEAREST", BIGTIFF="IF_SAFER",
                         NUM_THREADS=threads)
    return path


def write_surface(surface: Surface, path: str | Path) -> Path:
    """The surface elevations (float32, nodata :data:`NODATA`).

    The band description gives the cell statistic and the vertical reference
    (``surface.meta["vertical_reference"]``, else :data:`DEFAULT_VERTICAL_REFERENCE`), which
    is also the metadata item ``VERTICAL_REFERENCE``; ``SURVEY_DATE`` is the survey's date.
    """
    vref = surface.meta.get("vertical_reference") or DEFAULT_VERTICAL_REFERENCE
    return write_raster(path, surface.z, surface.grid, units=["m"],
                        descriptions=[f"surface elevation, metres ({surface.meta.get('statistic', 'mean')} "
                                      f"of the points per cell); vertical reference: {vref}"],
                        tags={"VERTICAL_REFERENCE": vref, "SURVEY_DATE": surface.date or None})


def write_coverage(surface: Surface, path: str | Path) -> Path:
    """Coverage raster: band 1 surface points per cell, band 2 1 where the cell was filled.

    Both bands are int32 with nodata :data:`COVERAGE_NODATA`; metadata item ``SURVEY_DATE``.
    """
    return write_raster(path, [surface.count, surface.filled],   # int32 a strip at a time
                        surface.grid, nodata=COVERAGE_NODATA, dtype="int32",
                        descriptions=["surface points per cell", "interpolated cell (1) or not (0)"],
                        tags={"SURVEY_DATE": surface.date or None})


def read_raster(
    path: str | Path,
    band: int = 1,
    *,
    onto: Grid | None = None,
    resampling: str = "nearest",
    name: str = "raster",
) -> tuple[np.ndarray, Grid]:
    """One band of a GeoTIFF as float64 with NaN for nodata, and its grid.

    Parameters
    ----------
    path : str or Path
    band : int
        Band number, from 1.
    onto : Grid, optional
        Resample the band onto this grid (cells it does not cover are NaN) and return it
        with ``onto``. Without it the file must be a north-up grid of square cells.
    resampling : str
        With ``onto``: a :class:`rasterio.enums.Resampling` name (``nearest``, ``bilinear``).
        A file without a CRS is taken to be in ``onto``'s CRS, with an
        :class:`~inventory.errors.InputWarning`.
    name : str
        What the file is, for messages (``floor raster``).

    Raises
    ------
    RunError
        Without ``onto``: the file is not a north-up grid of square cells.
    CRSError
        With ``onto``: neither the file nor ``onto`` has a CRS.
    rasterio.errors.RasterioIOError
        The file cannot be opened.
    """
    import rasterio
    from rasterio.warp import Resampling, reproject

    with rasterio.open(path) as src:
        data = src.read(band, masked=True).astype("float64").filled(np.nan)
        if onto is None:
            t = src.transform
            if t.b != 0 or t.d != 0 or abs(t.a + t.e) > 1e-9:
                raise RunError(f"{path}: not a north-up grid of square cells")
            crs = src.crs.to_string() if src.crs else ""
            return data, Grid(t.c, t.f, t.a, src.height, src.width, crs)
        src_crs = src.crs
        if src_crs is None:
            warnings.warn(InputWarning(f"{path}: {name} has no CRS; taken as {onto.crs or 'the grid CRS'}"))
        dst_crs = onto.crs or src_crs
        if src_crs is None:
            src_crs = dst_crs
        if src_crs is None:
            raise CRSError(path, f"{name} and grid both lack a CRS", field="crs")
        out = np.full(onto.shape, np.nan)
        reproject(
            data, out,
            src_transform=src.transform, src_crs=src_crs, src_nodata=np.nan,
            dst_transform=onto.transform, dst_crs=dst_crs, dst_nodata=np.nan,
            resampling=Resampling[resampling],
        )
    return out, onto
