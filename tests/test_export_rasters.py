"""GeoTIFF outputs: tiled, compressed, overviews, CRS, nodata; identical bytes on a rerun."""

from __future__ import annotations

import json
import shutil
import subprocess

import numpy as np
import pytest

from inventory.errors import CRSError
from inventory.export.rasters import NODATA, TILE_SIZE, overview_factors, write_raster
from inventory.grid import Grid
from test_export_fake import make_close_result


@pytest.fixture
def surface():
    return make_close_result("2026-01").surface


def test_values_nodata_crs_and_georeferencing(surface, tmp_path):
    import rasterio

    path = write_raster(surface.z, surface.grid, tmp_path / "surface.tif",
                        description="surface elevation")
    with rasterio.open(path) as ds:
        assert ds.crs.to_epsg() == 25832
        assert ds.nodata == NODATA
        assert ds.transform == surface.grid.transform
        assert (ds.height, ds.width) == surface.grid.shape
        assert ds.block_shapes == [(TILE_SIZE, TILE_SIZE)]
        assert ds.compression.name.lower() == "deflate"
        assert ds.descriptions == ("surface elevation",)
        assert ds.units == ("m",)
        band = ds.read(1, masked=True)
        ovr = ds.overviews(1)
    assert np.array_equal(band.mask, ~np.isfinite(surface.z))
    # float32 on disk: the values are the float32 rounding of the surface
    np.testing.assert_array_equal(band.filled(np.nan)[np.isfinite(surface.z)],
                                  surface.z[np.isfinite(surface.z)].astype("float32"))
    assert ovr == overview_factors(*surface.grid.shape) and ovr


def test_rerun_gives_identical_bytes(surface, tmp_path):
    a = write_raster(surface.z, surface.grid, tmp_path / "a.tif", description="surface")
    b = write_raster(surface.z, surface.grid, tmp_path / "b.tif", description="surface")
    assert a.read_bytes() == b.read_bytes()


def test_overview_factors():
    assert overview_factors(64, 64) == []
    assert overview_factors(65, 10) == [2]
    assert overview_factors(1000, 300) == [2, 4, 8, 16]


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
def test_gdalinfo_reads_the_raster(surface, tmp_path):
    if not shutil.which("gdalinfo"):
        pytest.skip("gdalinfo (Debian gdal-bin) not installed; `make tools` installs it when root")
    path = write_raster(surface.z, surface.grid, tmp_path / "surface.tif", description="surface")
    proc = subprocess.run(["gdalinfo", "-json", "-stats", str(path)], capture_output=True,
                          text=True, timeout=60)
    assert proc.returncode == 0, proc.stderr
    info = json.loads(proc.stdout)
    assert 'ID["EPSG",25832]' in info["coordinateSystem"]["wkt"]
    band = info["bands"][0]
    assert band["noDataValue"] == NODATA
    assert band["block"] == [TILE_SIZE, TILE_SIZE]
    assert len(band["overviews"]) == len(overview_factors(*surface.grid.shape))
    assert info["size"] == [surface.grid.ncols, surface.grid.nrows]
    assert info["metadata"]["IMAGE_STRUCTURE"]["COMPRESSION"] == "DEFLATE"
    # OGC COG (21-026): GDAL's own reader reports the cloud-optimized layout
    assert info["metadata"]["IMAGE_STRUCTURE"].get("LAYOUT") == "COG"
    gt = info["geoTransform"]
    assert gt == list(surface.grid.transform.to_gdal())
    # statistics skip nodata: GDAL's minimum is the yard level, not -9999 (printed to 3 decimals)
    assert band["minimum"] == pytest.approx(np.nanmin(surface.z), abs=6e-4)
    assert band["maximum"] == pytest.approx(np.nanmax(surface.z), abs=6e-4)
    # -stats writes a .aux.xml sidecar; leave the folder as the writer left it
    for extra in tmp_path.glob("*.aux.xml"):
        extra.unlink()
