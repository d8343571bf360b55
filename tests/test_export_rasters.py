"""The close's GeoTIFF outputs: thickness above base and change since the previous survey,
on the survey grid, through the one writer (its format: tests/test_io_rasters.py)."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
import rasterio

from inventory.export.rasters import write_change, write_thickness
from inventory.io.rasters import NODATA


@pytest.fixture
def result(make_close_result):
    return make_close_result("2026-02", period_index=1)


def test_thickness_on_the_survey_grid(result, tmp_path):
    path = write_thickness(result, tmp_path / "thickness.tif")
    with rasterio.open(path) as ds:
        assert ds.transform == result.surface.grid.transform
        assert ds.crs.to_epsg() == 25832 and ds.nodata == NODATA
        assert ds.descriptions == (f"thickness above base, metres, survey {result.survey_date} (surface "
                                   "minus base, positive where material lies above the base; heights: "
                                   "as surveyed, metres)",)
        assert ds.units == ("m",)
        band = ds.read(1, masked=True)
    assert np.array_equal(band.mask, ~np.isfinite(result.thickness))
    ok = np.isfinite(result.thickness)
    np.testing.assert_array_equal(band.data[ok], result.thickness[ok].astype("float32"))


def test_change_names_both_surveys(result, tmp_path):
    assert result.change is not None and result.previous_survey_date
    path = write_change(result, tmp_path / "change.tif")
    with rasterio.open(path) as ds:
        assert ds.descriptions == (f"surface change, metres, {result.previous_survey_date} to {result.survey_date}"
                                   " (later minus earlier: positive where material was added; heights: "
                                   "as surveyed, metres)",)
        assert ds.tags()["PREVIOUS_SURVEY_DATE"] == result.previous_survey_date
        assert ds.units == ("m",)
        band = ds.read(1, masked=True).filled(np.nan)
    np.testing.assert_array_equal(band, np.where(np.isfinite(result.change), result.change.astype("float32"), np.nan))


def test_no_change_raster_without_an_earlier_surface(result, tmp_path):
    with pytest.raises(ValueError, match="no change raster"):
        write_change(dataclasses.replace(result, change=None), tmp_path / "change.tif")
    assert not list(tmp_path.iterdir())


def test_rasters_say_which_close_and_heights(result, tmp_path):
    recorded = dataclasses.replace(result, close_id=17, closed_utc="2026-03-02T08:15:00+00:00",
                                   vertical_reference="DHHN2016 (NHN), metres")
    for write in (write_thickness, write_change):
        path = write(recorded, tmp_path / f"{write.__name__}.tif")
        with rasterio.open(path) as ds:
            tags = ds.tags()
            assert "DHHN2016 (NHN), metres" in ds.descriptions[0]
        assert tags["CLOSE_ID"] == "17" and tags["CLOSED_UTC"] == "2026-03-02T08:15:00+00:00"
        assert tags["PERIOD"] == "2026-02" and tags["SURVEY_DATE"] == result.survey_date
        assert tags["VERTICAL_REFERENCE"] == "DHHN2016 (NHN), metres"
    # a close not being recorded (a preview) writes no close id rather than an empty one
    with rasterio.open(write_thickness(result, tmp_path / "preview.tif")) as ds:
        assert "CLOSE_ID" not in ds.tags() and "CLOSED_UTC" not in ds.tags()
        assert ds.tags()["VERTICAL_REFERENCE"] == "as surveyed, metres"


@pytest.mark.tools
def test_gdalinfo_shows_close_and_vertical_reference(result, tmp_path):
    # GDAL's gdalinfo (Debian gdal-bin) as an independent reader of the metadata items
    import shutil
    import subprocess

    if shutil.which("gdalinfo") is None:
        pytest.skip("gdal-bin (gdalinfo) is not installed; make test installs it as root")
    recorded = dataclasses.replace(result, close_id=4, closed_utc="2026-03-02T08:15:00+00:00")
    path = write_thickness(recorded, tmp_path / "thickness.tif")
    out = subprocess.run(["gdalinfo", str(path)], capture_output=True, text=True, check=True).stdout
    assert "CLOSE_ID=4" in out and "VERTICAL_REFERENCE=as surveyed, metres" in out
    assert "Unit Type: m" in out and "Description = thickness above base, metres" in out
