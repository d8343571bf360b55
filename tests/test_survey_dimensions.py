"""The classified cloud keeps each input point's own dimensions (colour, point source id,
scan angle, user data, intensity, returns, GPS time), on the tests' small valid site."""

from __future__ import annotations

import warnings

import laspy
import numpy as np
import pyproj
import pytest

from inventory._version import __version__

DATE = "2026-10-31"


def _coloured_cloud(path, n_side=80, seed=7):
    """A LAS 1.4 point format 7 cloud over the small site's piles: a gentle surface, every
    point with its own colour, source id, scan angle, user data and the rest."""
    rng = np.random.default_rng(seed)
    gx, gy = np.meshgrid(np.linspace(0, 60, n_side), np.linspace(0, 30, n_side // 2))
    n = gx.size
    header = laspy.LasHeader(point_format=7, version="1.4")
    header.add_crs(pyproj.CRS("EPSG:25832"))
    header.scales = [0.001] * 3
    header.offsets = [500000.0, 5700000.0, 0.0]
    las = laspy.LasData(header)
    las.x = 499985.0 + gx.ravel() + rng.uniform(-0.05, 0.05, n)
    las.y = 5699985.0 + gy.ravel() + rng.uniform(-0.05, 0.05, n)
    las.z = 10.0 + 0.02 * gx.ravel() + rng.uniform(-0.01, 0.01, n)
    las.red = rng.integers(0, 65536, n)
    las.green = rng.integers(0, 65536, n)
    las.blue = rng.integers(0, 65536, n)
    las.point_source_id = rng.integers(1, 65536, n)
    las.scan_angle = rng.integers(-15000, 15001, n)      # 0.006 degree units: +-90 degrees
    las.user_data = rng.integers(0, 256, n)
    las.intensity = rng.integers(0, 65536, n)
    las.return_number = np.ones(n, np.uint8)
    las.number_of_returns = rng.integers(1, 4, n)
    las.gps_time = rng.uniform(0, 1e6, n)
    las.write(path)
    return laspy.read(path)


@pytest.fixture
def coloured_survey(good_site, tmp_path):
    from inventory.site.load import load_site
    from inventory.survey.measure import measure_survey

    given = _coloured_cloud(good_site / "surveys" / DATE / "a.laz")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = measure_survey(load_site(good_site), DATE, out_dir=tmp_path / "out")
    return given, result


def _mm(las):
    return np.column_stack([np.round(np.asarray(las.x) * 1000), np.round(np.asarray(las.y) * 1000),
                            np.round(np.asarray(las.z) * 1000)]).astype(np.int64)


def test_classified_cloud_keeps_each_points_dimensions(coloured_survey):
    given, result = coloured_survey
    out = laspy.read(result.classified_path)
    assert out.header.point_format.id == 7
    assert out.header.generating_software == f"inventory {__version__}"
    assert len(out.points) > 0.9 * len(given.points)
    # match the points by their coordinates (both files store whole millimetres)
    index = {tuple(k): i for i, k in enumerate(_mm(given))}
    j = np.array([index[tuple(k)] for k in _mm(out)])
    assert len(np.unique(j)) == len(j)
    for attr in ("red", "green", "blue", "point_source_id", "scan_angle", "user_data", "intensity",
                 "return_number", "number_of_returns", "gps_time"):
        np.testing.assert_array_equal(np.asarray(out[attr]), np.asarray(given[attr])[j], err_msg=attr)
    assert (np.asarray(out.classification) != 0).any()


def test_cloud_without_colour_is_written_in_point_format_6(good_site, tmp_path):
    from inventory.site.load import load_site
    from inventory.survey.measure import measure_survey

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = measure_survey(load_site(good_site), DATE, out_dir=tmp_path / "out")
    assert laspy.read(result.classified_path).header.point_format.id == 6


@pytest.mark.parametrize("mask", [0o002, 0o027])
def test_survey_outputs_follow_the_umask(good_site, tmp_path, mask):
    # Outputs are written under a temporary name (mkstemp makes 0600) and renamed: the files
    # in place must have the permissions of any new file, 0666 less the umask.
    import os

    from inventory.site.load import load_site
    from inventory.survey.measure import measure_survey

    site = load_site(good_site)
    old = os.umask(mask)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            result = measure_survey(site, DATE, out_dir=tmp_path / "out")
    finally:
        os.umask(old)
    assert len(result.written) == 3
    for path in result.written:
        assert oct(path.stat().st_mode & 0o777) == oct(0o666 & ~mask), path.name
