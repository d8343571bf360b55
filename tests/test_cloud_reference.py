"""Reference checks against the open LiDAR samples of the laspy source distribution.

Source of the data: the laspy sdist on PyPI, ``tests/data/`` (the ``laspy_data`` fixture of tests/conftest.py).
Facts about the files, from that source distribution itself: ``autzen_trim.laz`` has 110,000
airborne points with the provider's classes 1 and 2, Oregon Lambert in international feet
with a WKT record (the file's own header, VLRs and points); ``simple.copc.laz`` is a COPC file
of 1,065 points (asserted by laspy's own ``tests/test_copc.py``).
"""

from __future__ import annotations

import json

import laspy
import numpy as np
import pytest
from pyproj import CRS
from scipy.interpolate import LinearNDInterpolator

from inventory.io.crs import INTERNATIONAL_FOOT_M, vertical_unit_factor
from inventory.io.clouds import open_cloud, read_cloud
from inventory.survey.pipeline import Pipeline
from inventory.model.grid import Grid
from inventory.survey.gridding import grid_points

pytestmark = pytest.mark.network

#: A metric CRS for the Autzen area (UTM zone 10 N, EPSG registry).
AUTZEN_METRIC = "EPSG:32610"


@pytest.mark.parametrize("name", ["simple1_1.las", "simple1_3.las", "simple1_4.las", "simple.las",
                                  "simple.laz", "simple.copc.laz", "1_4_w_evlr.laz", "autzen_trim.laz"])
def test_streamed_read_matches_laspy(laspy_data, name):
    # Reference: laspy.read of the same file (the library's own whole-file reader).
    ref = laspy.read(laspy_data / name)
    with open_cloud(laspy_data / name, chunk_size=257) as cloud:
        chunks = list(cloud.chunks())
    assert len(chunks) == -(-len(ref.points) // 257)
    pts = np.concatenate(chunks)
    assert len(pts) == len(ref.points)
    np.testing.assert_array_equal(pts["X"], np.asarray(ref.x))
    np.testing.assert_array_equal(pts["Z"], np.asarray(ref.z))
    np.testing.assert_array_equal(pts["Classification"], np.asarray(ref.classification))
    np.testing.assert_array_equal(pts["Intensity"], np.asarray(ref.intensity))


def test_copc_point_count(laspy_data):
    # simple.copc.laz holds 1,065 points: laspy's own tests/test_copc.py (in its sdist) says so.
    pts, _ = read_cloud(laspy_data / "simple.copc.laz")
    assert len(pts) == 1065


def test_autzen_crs_from_file(laspy_data):
    with open_cloud(laspy_data / "autzen_trim.laz") as cloud:
        crs, source = cloud.crs, cloud.crs_source
    assert source == "wkt"
    assert crs.is_projected
    # The file's WKT: Lambert conformal conic, NAD83(HARN), international foot (0.3048 m,
    # the 1959 definition), standard parallels 43 and 45.5 (laspy sample; pyproj parses it).
    assert crs.axis_info[0].unit_conversion_factor == pytest.approx(INTERNATIONAL_FOOT_M)
    params = {p.name: p.value for p in crs.coordinate_operation.params}
    assert params["Latitude of 1st standard parallel"] == pytest.approx(43.0)
    assert params["Latitude of 2nd standard parallel"] == pytest.approx(45.5)
    assert vertical_unit_factor(crs) == pytest.approx(INTERNATIONAL_FOOT_M)


def test_geotiff_keys_crs(laspy_data):
    # A file with both a WKT record and GeoTIFF keys: WKT wins (LAS 1.4 R15 section 2.5:
    # WKT is the coordinate system of 1.4 point formats; laspy parse_crs(prefer_wkt=True)).
    with open_cloud(laspy_data / "file_with_both_wkt_and_geotiff_vlrs.las") as cloud:
        assert cloud.crs is not None
        assert cloud.crs_source == "wkt"
        ref = laspy.read(laspy_data / "file_with_both_wkt_and_geotiff_vlrs.las").header.parse_crs()
        assert cloud.crs.equals(ref)


def _cell_mean(x, y, z, grid):
    return grid_points(grid, x, y, z).z


@pytest.fixture(scope="module")
def autzen(laspy_data):
    pts, crs = read_cloud(laspy_data / "autzen_trim.laz")
    provider = pts["Classification"].copy()
    to_m = Pipeline.from_json(json.dumps([{"type": "filters.reprojection", "out_srs": AUTZEN_METRIC}]))
    pts, crs_m = to_m.run(pts, crs, engine="builtin")
    return pts, provider, crs_m


def _agreement(pts, provider, classes):
    ground_ref = provider == 2
    grid = Grid.snapped(pts["X"].min(), pts["Y"].min(), pts["X"].max(), pts["Y"].max(), cell=2.0)
    ref = _cell_mean(pts["X"][ground_ref], pts["Y"][ground_ref], pts["Z"][ground_ref], grid)
    ours_mask = classes == 2
    ours = _cell_mean(pts["X"][ours_mask], pts["Y"][ours_mask], pts["Z"][ours_mask], grid)
    both = np.isfinite(ref) & np.isfinite(ours)
    mad = float(np.median(np.abs(ours - ref)[both]))
    tin = LinearNDInterpolator(np.column_stack([pts["X"][ground_ref], pts["Y"][ground_ref]]), pts["Z"][ground_ref])
    above = pts["Z"][ours_mask] - tin(pts["X"][ours_mask], pts["Y"][ours_mask])
    return mad, int(both.sum()), above


def test_autzen_units_reach_metres(autzen):
    pts, _, crs = autzen
    assert CRS.from_user_input(crs).equals(CRS.from_user_input(AUTZEN_METRIC))
    # Header z range of autzen_trim is 406.26-520.51 ft (laspy header); in metres x 0.3048.
    assert pts["Z"].min() == pytest.approx(406.26 * 0.3048, abs=0.01)
    assert pts["Z"].max() == pytest.approx(520.51 * 0.3048, abs=0.01)


def test_autzen_bare_earth_agrees_with_provider(autzen, repo_root):
    # Issue 4 acceptance: median |ours - provider| <= 0.3 m on 2 m cells both cover, and no
    # point more than 2 m above the provider's class-2 surface (its TIN) called ground.
    # Compare surfaces, not labels: the provider thinned its ground class (an earlier look
    # at laspy sdist tests/data/autzen_trim.laz; from memory, no test checks it).
    pts, provider, crs = autzen
    out, _ = Pipeline.from_file(repo_root / "inventory" / "survey" / "pipelines" / "terrain.json").run(pts.copy(), crs, engine="builtin")
    mad, cells, above = _agreement(out, provider, out["Classification"])
    assert cells > 5000
    assert mad <= 0.3
    assert np.nanmax(above) <= 2.0


def test_autzen_csf_surface_agrees_with_provider(autzen, repo_root):
    # filters.csf through the cloth-simulation-filter package (Zhang et al. 2016): its ground
    # grid must agree with the provider's within the same 0.3 m median. Measured here: CSF
    # also keeps several hundred points more than 2 m above the provider's surface (flat
    # structures wider than the cloth), which is why terrain.json uses the slope envelope.
    pts, provider, crs = autzen
    out, _ = Pipeline.from_file(repo_root / "inventory" / "survey" / "pipelines" / "terrain-csf.json").run(pts.copy(), crs, engine="builtin")
    mad, cells, _ = _agreement(out, provider, out["Classification"])
    assert cells > 5000
    assert mad <= 0.3
