"""GeoTIFF outputs: tiled, compressed, overviews, CRS, nodata; identical bytes on a rerun."""

from __future__ import annotations

import json
import shutil
import subprocess

import numpy as np
import pytest

from inventory.errors import CRSError
from inventory.export.rasters import NODATA, write_raster
from inventory.model.grid import Grid
from test_export_fake import make_close_result

TILE = 256  # tile edge we ask for (OGC COG 21-026: multiples of 16)


@pytest.fixture
def surface():
    return make_close_result("2026-01").surface


def _big():
    """A 600 x 700 cell grid (big enough for overviews) with a NaN corner."""
    g = Grid(500000.0, 5701000.0, 0.5, 600, 700, "EPSG:25832")
    x, y = g.centers()
    z = 100.0 + 0.01 * (x - g.west) + 3.0 * np.exp(-((x - 500170) ** 2 + (y - 5700850) ** 2) / 400)
    z[:40, :50] = np.nan
    return g, z


def test_values_nodata_crs_and_georeferencing(surface, tmp_path):
    import rasterio

    path = write_raster(surface.z, surface.grid, tmp_path / "surface.tif",
                        description="surface elevation")
    with rasterio.open(path) as ds:
        assert ds.crs.to_epsg() == 25832
        assert ds.nodata == NODATA
        assert ds.transform == surface.grid.transform
        assert (ds.height, ds.width) == surface.grid.shape
        assert ds.block_shapes == [(TILE, TILE)]
        assert ds.compression.name.lower() == "deflate"
        assert ds.descriptions == ("surface elevation",)
        band = ds.read(1, masked=True)
    assert np.array_equal(band.mask, ~np.isfinite(surface.z))
    # float32 on disk: the values are the float32 rounding of the surface
    np.testing.assert_array_equal(band.filled(np.nan)[np.isfinite(surface.z)],
                                  surface.z[np.isfinite(surface.z)].astype("float32"))


def test_overviews_on_a_larger_grid(tmp_path):
    import rasterio

    g, z = _big()
    path = write_raster(z, g, tmp_path / "big.tif")
    with rasterio.open(path) as ds:
        ovr = ds.overviews(1)
        assert ovr and all(f & (f - 1) == 0 for f in ovr)  # powers of two
        coarse = ds.read(1, out_shape=(g.nrows // ovr[0], g.ncols // ovr[0]), masked=True)
    # an average overview of a smooth surface stays within the surface's range
    assert np.nanmin(z) - 1e-3 <= coarse.min() and coarse.max() <= np.nanmax(z) + 1e-3


def test_rerun_gives_identical_bytes(tmp_path):
    g, z = _big()
    a = write_raster(z, g, tmp_path / "a.tif", description="surface")
    b = write_raster(z, g, tmp_path / "b.tif", description="surface")
    assert a.read_bytes() == b.read_bytes()


def test_refusals(surface, tmp_path):
    g = surface.grid
    with pytest.raises(ValueError, match="does not match grid"):
        write_raster(surface.z[:-1], g, tmp_path / "x.tif")
    nocrs = Grid(g.west, g.north, g.cell, g.nrows, g.ncols, "")
    with pytest.raises(CRSError, match="no CRS"):
        write_raster(surface.z, nocrs, tmp_path / "x.tif")
    z = surface.z.copy()
    z[10, 10] = NODATA
    with pytest.raises(ValueError, match="nodata value"):
        write_raster(z, g, tmp_path / "x.tif")
    assert not list(tmp_path.iterdir())


@pytest.mark.tools
def test_gdalinfo_reads_the_raster(tmp_path):
    if not shutil.which("gdalinfo"):
        pytest.skip("gdalinfo (Debian gdal-bin) not installed; `make tools` installs it when root")
    g, z = _big()
    path = write_raster(z, g, tmp_path / "surface.tif", description="surface")
    proc = subprocess.run(["gdalinfo", "-json", "-stats", str(path)], capture_output=True,
                          text=True, timeout=60)
    assert proc.returncode == 0, proc.stderr
    info = json.loads(proc.stdout)
    assert 'ID["EPSG",25832]' in info["coordinateSystem"]["wkt"]
    band = info["bands"][0]
    assert band["noDataValue"] == NODATA
    assert band["block"] == [TILE, TILE]
    assert band.get("overviews"), "no overviews"
    assert band["description"] == "surface"
    assert info["size"] == [g.ncols, g.nrows]
    assert info["metadata"]["IMAGE_STRUCTURE"]["COMPRESSION"] == "DEFLATE"
    assert info["metadata"]["IMAGE_STRUCTURE"]["PREDICTOR"] == "3"  # floating-point predictor
    assert info["geoTransform"] == list(g.transform.to_gdal())
    # statistics skip nodata: GDAL's minimum is the surface's, not -9999 (printed to 3 decimals)
    assert band["minimum"] == pytest.approx(np.nanmin(z), abs=6e-4)
    assert band["maximum"] == pytest.approx(np.nanmax(z), abs=6e-4)
