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
        assert ds.descriptions == (f"thickness above base {result.survey_date}",)
        assert ds.units == ("m",)
        band = ds.read(1, masked=True)
    assert np.array_equal(band.mask, ~np.isfinite(result.thickness))
    ok = np.isfinite(result.thickness)
    np.testing.assert_array_equal(band.data[ok], result.thickness[ok].astype("float32"))


def test_change_names_both_surveys(result, tmp_path):
    assert result.change is not None and result.previous_survey_date
    path = write_change(result, tmp_path / "change.tif")
    with rasterio.open(path) as ds:
        assert ds.descriptions == (f"surface change {result.previous_survey_date} to {result.survey_date}"
                                   " (later minus earlier: positive where material was added)",)
        assert ds.units == ("m",)
        band = ds.read(1, masked=True).filled(np.nan)
    np.testing.assert_array_equal(band, np.where(np.isfinite(result.change), result.change.astype("float32"), np.nan))


def test_no_change_raster_without_an_earlier_surface(result, tmp_path):
    with pytest.raises(ValueError, match="no change raster"):
        write_change(dataclasses.replace(result, change=None), tmp_path / "change.tif")
    assert not list(tmp_path.iterdir())
