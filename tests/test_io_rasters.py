"""The one GeoTIFF writer and reader (inventory.io.rasters): format, nodata, CRS, atomic
writes, identical bytes on a rerun, reading back with the grid or resampled onto another."""

from __future__ import annotations

import json
import shutil
import subprocess
import warnings

from pathlib import Path

import numpy as np
import pytest
import rasterio
from rasterio.transform import from_origin

from inventory.errors import CRSError, InputWarning, RunError
from inventory.io.rasters import NODATA, TILE, read_raster, write_coverage, write_raster, write_surface
from inventory.model.grid import Grid, Surface
from inventory.survey.gridding import grid_points


def _big():
    """A 600 x 700 cell grid (big enough for overviews) with a NaN corner."""
    g = Grid(500000.0, 5701000.0, 0.5, 600, 700, "EPSG:25832")
    x, y = g.centers()
    z = 100.0 + 0.01 * (x - g.west) + 3.0 * np.exp(-((x - 500170) ** 2 + (y - 5700850) ** 2) / 400)
    z[:40, :50] = np.nan
    return g, z


@pytest.fixture
def surface(make_close_result):
    return make_close_result("2026-01").surface


# ----------------------------------------------------------------------------- writer
def test_values_nodata_crs_and_georeferencing(surface, tmp_path):
    path = write_raster(tmp_path / "surface.tif", surface.z, surface.grid, descriptions=["surface elevation"])
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
    assert sorted(p.name for p in tmp_path.iterdir()) == ["surface.tif"]  # no temporary left


def test_overviews_on_a_larger_grid(tmp_path):
    g, z = _big()
    path = write_raster(tmp_path / "big.tif", z, g)
    with rasterio.open(path) as ds:
        ovr = ds.overviews(1)
        assert ovr and all(f & (f - 1) == 0 for f in ovr)  # powers of two
        coarse = ds.read(1, out_shape=(g.nrows // ovr[0], g.ncols // ovr[0]), masked=True)
    # an average overview of a smooth surface stays within the surface's range
    assert np.nanmin(z) - 1e-3 <= coarse.min() and coarse.max() <= np.nanmax(z) + 1e-3


def test_overview_factors_of_the_surface(tmp_path):
    g = Grid(0.0, 600.0, 1.0, 600, 600, "EPSG:25832")
    z = np.fromfunction(lambda r, c: r * 0.01 + c * 0.02, g.shape)
    s = Surface(g, z, np.ones(g.shape, np.int32), np.zeros(g.shape), np.zeros(g.shape, bool))
    path = write_surface(s, tmp_path / "big.tif")
    with rasterio.open(path) as src:
        assert src.overviews(1) == [2, 4]


def test_rerun_gives_identical_bytes(tmp_path):
    g, z = _big()
    a = write_raster(tmp_path / "a.tif", z, g, descriptions=["surface"])
    b = write_raster(tmp_path / "b.tif", z, g, descriptions=["surface"])
    assert a.read_bytes() == b.read_bytes()


def test_threaded_compression_gives_the_bytes_of_one_thread(tmp_path, monkeypatch):
    """GDAL compresses tiles and builds overviews on several threads (``NUM_THREADS``); the
    tiles are still written in order, so the files are those of one thread."""
    from inventory.io import rasters
    from inventory.parallel import _in_job

    g = Grid(500000.0, 5701000.0, 0.5, 900, 1100, "EPSG:25832")    # 4 x 5 tiles, two overviews
    rng = np.random.default_rng(5)
    z = 100.0 + np.cumsum(rng.normal(0, 0.01, g.shape), axis=1)
    z[:60, :90] = np.nan
    count = np.where(np.isfinite(z), rng.integers(0, 9, g.shape), 0).astype(np.int32)
    s = Surface(g, z, count, np.zeros(g.shape), rng.random(g.shape) < 0.05, date="2026-10-31")
    files = {}
    for threads in ("1", "4", "ALL_CPUS"):
        monkeypatch.setattr(rasters, "_gdal_threads", lambda: threads)
        files[threads] = (write_surface(s, tmp_path / f"s{threads}.tif").read_bytes(),
                          write_coverage(s, tmp_path / f"c{threads}.tif").read_bytes())
    assert files["4"] == files["1"] and files["ALL_CPUS"] == files["1"]
    monkeypatch.undo()
    assert rasters._gdal_threads() == "ALL_CPUS"               # a serial run: every core
    assert _in_job(1, rasters._gdal_threads) == "1"            # a job's share of them


def test_refusals_leave_nothing(surface, tmp_path):
    g = surface.grid
    with pytest.raises(ValueError, match="does not match grid"):
        write_raster(tmp_path / "x.tif", surface.z[:-1], g)
    nocrs = Grid(g.west, g.north, g.cell, g.nrows, g.ncols, "")
    with pytest.raises(CRSError, match="no CRS"):
        write_raster(tmp_path / "x.tif", surface.z, nocrs)
    with pytest.raises(CRSError, match="unknown CRS"):
        write_raster(tmp_path / "x.tif", surface.z, Grid(g.west, g.north, g.cell, g.nrows, g.ncols, "EPSG:0"))
    z = surface.z.copy()
    z[10, 10] = NODATA
    with pytest.raises(ValueError, match="nodata value"):
        write_raster(tmp_path / "x.tif", z, g)
    with pytest.raises(ValueError, match="nodata value"):
        write_raster(tmp_path / "x.tif", [np.full(g.shape, -1)], g, nodata=-1, dtype="int32")
    assert not list(tmp_path.iterdir())


def test_failed_write_keeps_the_old_file(surface, tmp_path, monkeypatch):
    path = write_raster(tmp_path / "s.tif", surface.z, surface.grid)
    before = path.read_bytes()

    def broken(src, dst, **kwargs):
        Path(dst).write_bytes(b"II*\0 half a file")  # the copy dies halfway
        raise OSError("disk full")

    monkeypatch.setattr("rasterio.shutil.copy", broken)
    g, z = _big()
    with pytest.raises(OSError, match="disk full"):
        write_raster(path, z, g)
    assert path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["s.tif"]


def test_surface_and_coverage_round_trip(plane_points, tmp_path):
    x, y, z = plane_points()
    g = Grid.snapped(x.min(), y.min(), x.max(), y.max(), cell=0.5, crs="EPSG:25832")
    s = grid_points(g, x, y, z)
    path = write_surface(s, tmp_path / "surface.tif")
    cov = write_coverage(s, tmp_path / "coverage.tif")
    with rasterio.open(path) as src:
        assert src.crs.to_epsg() == 25832
        assert src.nodata == NODATA
        assert src.profile["tiled"] and src.profile["compress"] == "deflate"
        assert src.transform == g.transform
        assert src.descriptions == ("surface elevation, metres (mean of the points per cell); "
                                    "vertical reference: as surveyed, metres",)
        assert src.tags()["VERTICAL_REFERENCE"] == "as surveyed, metres"
    back, g2 = read_raster(path)
    assert g2 == g
    np.testing.assert_allclose(back, s.z.astype(np.float32), equal_nan=True)
    with rasterio.open(cov) as src:
        assert src.dtypes == ("int32", "int32") and src.nodata == -1
        np.testing.assert_array_equal(src.read(1), s.count)
        np.testing.assert_array_equal(src.read(2), s.filled.astype(np.int32))
    filled, _ = read_raster(cov, band=2)
    np.testing.assert_array_equal(filled, s.filled.astype(float))
    assert sorted(p.name for p in tmp_path.iterdir()) == ["coverage.tif", "surface.tif"]


# ----------------------------------------------------------------------------- reader
def _write_plain(path, z, west, north, cell, crs="EPSG:25832"):
    with rasterio.open(path, "w", driver="GTiff", width=z.shape[1], height=z.shape[0], count=1,
                       dtype="float32", crs=crs, transform=from_origin(west, north, cell, cell),
                       nodata=-9999.0) as dst:
        dst.write(np.where(np.isfinite(z), z, -9999.0).astype("float32"), 1)


def test_read_onto_the_same_grid_is_the_file(tmp_path):
    g, z = _big()
    path = write_raster(tmp_path / "z.tif", z, g)
    for method in ("nearest", "bilinear"):
        back, grid = read_raster(path, onto=g, resampling=method)
        assert grid is g
        np.testing.assert_array_equal(back, np.where(np.isfinite(z), z.astype("float32"), np.nan))


def test_read_onto_a_finer_offset_grid(tmp_path):
    # Reference: the cell each target centre falls in (nearest) and the plane itself
    # (bilinear reproduces a plane exactly away from the edges).
    west, north, cell = 1000.0, 2040.0, 2.0
    rows, cols = np.mgrid[0:20, 0:30]
    z = 10.0 + 0.5 * cols - 0.25 * rows          # a plane in cell units
    path = tmp_path / "coarse.tif"
    _write_plain(path, z, west, north, cell)
    fine = Grid(1010.25, 2030.0, 0.5, 20, 30, "EPSG:25832")
    near, g = read_raster(path, onto=fine, resampling="nearest")
    assert g is fine
    x, y = fine.centers()
    r = np.floor((north - y) / cell).astype(int)
    c = np.floor((x - west) / cell).astype(int)
    np.testing.assert_array_equal(near, z[r, c])
    lin, _ = read_raster(path, onto=fine, resampling="bilinear")
    plane = 10.0 + 0.5 * ((x - west) / cell - 0.5) - 0.25 * ((north - y) / cell - 0.5)
    np.testing.assert_allclose(lin, plane, atol=1e-4)
    # cells the file does not cover are NaN
    outside = Grid(900.0, 2030.0, 0.5, 4, 4, "EPSG:25832")
    assert np.isnan(read_raster(path, onto=outside)[0]).all()


def test_read_without_crs_takes_the_grid_crs_with_a_warning(tmp_path):
    z = np.arange(12.0).reshape(3, 4)
    path = tmp_path / "nocrs.tif"
    _write_plain(path, z, 0.0, 3.0, 1.0, crs=None)
    g = Grid(0.0, 3.0, 1.0, 3, 4, "EPSG:25832")
    with pytest.warns(InputWarning, match="floor raster has no CRS; taken as EPSG:25832"):
        back, _ = read_raster(path, onto=g, name="floor raster")
    np.testing.assert_array_equal(back, z)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", InputWarning)
        with pytest.raises(CRSError, match="both lack a CRS"):
            read_raster(path, onto=Grid(0.0, 3.0, 1.0, 3, 4, ""))


def test_read_refuses_a_grid_that_is_not_north_up(tmp_path):
    path = tmp_path / "rect.tif"
    with rasterio.open(path, "w", driver="GTiff", width=4, height=3, count=1, dtype="float32",
                       crs="EPSG:25832", transform=from_origin(0.0, 3.0, 1.0, 2.0)) as dst:
        dst.write(np.zeros((3, 4), "float32"), 1)
    with pytest.raises(RunError, match="not a north-up grid of square cells"):
        read_raster(path)
    back, _ = read_raster(path, onto=Grid(0.0, 3.0, 1.0, 3, 4, "EPSG:25832"))  # resampling is fine
    assert np.isfinite(back).any()


@pytest.mark.tools
def test_gdalinfo_reads_the_raster(tmp_path):
    if not shutil.which("gdalinfo"):
        pytest.skip("gdalinfo (Debian gdal-bin) not installed; `make tools` installs it when root")
    g, z = _big()
    path = write_raster(tmp_path / "surface.tif", z, g, descriptions=["surface"])
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


@pytest.mark.tools
def test_gdalinfo_reads_surface_crs_and_nodata(plane_points, tmp_path):
    # Reference: GDAL's own gdalinfo (Debian gdal-bin).
    if shutil.which("gdalinfo") is None:
        pytest.skip("gdalinfo (Debian package gdal-bin) is not installed")
    x, y, z = plane_points()
    g = Grid.snapped(x.min(), y.min(), x.max(), y.max(), cell=0.5, crs="EPSG:25832")
    path = write_surface(grid_points(g, x, y, z), tmp_path / "s.tif")
    out = subprocess.run(["gdalinfo", str(path)], capture_output=True, text=True, check=True).stdout
    assert 'ID["EPSG",25832]' in out
    assert "NoData Value=-9999" in out
    assert f"Pixel Size = ({g.cell:.15f},-{g.cell:.15f})" in out
    assert "COMPRESSION=DEFLATE" in out
    assert "VERTICAL_REFERENCE=as surveyed, metres" in out
    assert "vertical reference: as surveyed, metres" in out  # the band description


def test_surface_states_the_sites_vertical_reference(plane_points, tmp_path):
    x, y, z = plane_points()
    g = Grid.snapped(x.min(), y.min(), x.max(), y.max(), cell=0.5, crs="EPSG:25832")
    s = grid_points(g, x, y, z)
    s.meta["vertical_reference"] = "DHHN2016 height (EPSG:7837), metres"
    with rasterio.open(write_surface(s, tmp_path / "s.tif")) as ds:
        assert ds.tags()["VERTICAL_REFERENCE"] == "DHHN2016 height (EPSG:7837), metres"
        assert ds.descriptions[0].endswith("vertical reference: DHHN2016 height (EPSG:7837), metres")
        assert ds.units == ("m",)


# ----------------------------------------------------------------------------- cloud optimized
_VALIDATOR = "osgeo_utils.samples.validate_cloud_optimized_geotiff"


def _gdal_python() -> str | None:
    """The system Python with GDAL's own bindings (Debian's python3-gdal), if any."""
    import shutil
    import subprocess

    exe = shutil.which("python3", path="/usr/bin")
    if exe is None:
        return None
    probe = subprocess.run([exe, "-c", f"import {_VALIDATOR}"], capture_output=True)
    return exe if probe.returncode == 0 else None


@pytest.mark.tools
@pytest.mark.parametrize("dtype", ["float32", "int32"])
def test_gdal_validates_the_cloud_optimized_layout(tmp_path, dtype):
    # Reference: GDAL's own COG validator (validate_cloud_optimized_geotiff.py, shipped with
    # GDAL's Python utilities), on a grid big enough to carry overviews.
    import subprocess

    exe = _gdal_python()
    if exe is None:
        pytest.skip("GDAL's Python utilities (Debian python3-gdal) are not installed")
    g, z = _big()
    bands = z if dtype == "float32" else np.where(np.isfinite(z), z * 100, 0).astype("int32")
    # metadata items as a close writes them must not break the layout
    path = write_raster(tmp_path / "cog.tif", bands, g, dtype=dtype, nodata=NODATA if dtype == "float32" else -1,
                        tags={"CLOSE_ID": "3", "VERTICAL_REFERENCE": "DHHN2016 (NHN), metres"})
    out = subprocess.run([exe, "-m", _VALIDATOR, "--full-check=yes", str(path)], capture_output=True, text=True)
    assert out.returncode == 0, out.stdout + out.stderr
    assert "is a valid cloud optimized GeoTIFF" in out.stdout


def test_layout_and_units_as_written(tmp_path):
    # GDAL's COG driver writes its structural metadata ("ghost area") right after the TIFF
    # header, with the image directories before the data (GDAL COG driver documentation).
    g, z = _big()
    path = write_raster(tmp_path / "cog.tif", z, g, descriptions=["thickness"], units=["m"])
    head = path.read_bytes()[:1024]
    assert b"LAYOUT=IFDS_BEFORE_DATA" in head
    with rasterio.open(path) as ds:
        assert ds.units == ("m",)
        assert ds.descriptions == ("thickness",)
        assert ds.tags(ns="IMAGE_STRUCTURE").get("LAYOUT") == "COG"



def test_strips_write_every_value_and_refuse_nodata_in_a_late_strip(tmp_path):
    """Bands are written a strip of TILE rows at a time: every cell of every strip, the
    last one short, comes back; NaN and inf become nodata; a nodata value in the last strip
    is refused and no file is left (nothing half-written)."""
    nrows = 2 * TILE + 37
    g = Grid(500000.0, 5701000.0, 0.5, nrows, 300, "EPSG:25832")
    rng = np.random.default_rng(7)
    z = 100.0 + rng.random(g.shape)
    z[rng.random(g.shape) < 0.1] = np.nan
    z[-1, -1] = np.inf
    path = write_raster(tmp_path / "z.tif", z, g)
    with rasterio.open(path) as src:
        back = src.read(1, masked=True)
    assert np.array_equal(back.mask, ~np.isfinite(z))
    assert np.array_equal(back.filled(0), np.where(np.isfinite(z), z.astype(np.float32), 0))
    bad = z.copy()
    bad[-3, 5] = NODATA
    with pytest.raises(ValueError, match="nodata value"):
        write_raster(tmp_path / "bad.tif", bad, g)
    count = rng.integers(0, 50, g.shape).astype(np.int32)
    filled = rng.random(g.shape) < 0.2
    s = Surface(g, z, count, np.full(g.shape, 0.01), filled, "2026-10-31")
    with rasterio.open(write_coverage(s, tmp_path / "c.tif")) as src:
        assert src.dtypes == ("int32", "int32")
        assert np.array_equal(src.read(1), count) and np.array_equal(src.read(2), filled.astype(np.int32))
    assert sorted(p.name for p in tmp_path.iterdir()) == ["c.tif", "z.tif"]
