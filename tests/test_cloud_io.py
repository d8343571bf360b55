"""Reading and writing point clouds: round trips through laspy, chunking, CRS records."""

from __future__ import annotations

import laspy
import numpy as np
import pytest
from pyproj import CRS

from inventory.io.clouds import POINT_DTYPE, CloudWriter, empty_points, open_cloud, read_cloud, write_cloud
from inventory.errors import InputError


def _points(n=5000, seed=1):
    rng = np.random.default_rng(seed)
    pts = empty_points(n)
    pts["X"] = 500_000 + rng.random(n) * 100
    pts["Y"] = 5_700_000 + rng.random(n) * 100
    pts["Z"] = 100 + rng.random(n) * 10
    pts["Intensity"] = rng.integers(0, 65535, n)
    pts["ReturnNumber"] = 1
    pts["NumberOfReturns"] = 1
    pts["Classification"] = rng.choice([1, 2, 7, 18, 19], n)
    pts["GpsTime"] = rng.random(n) * 1e5
    pts["PointSourceId"] = rng.integers(0, 3, n)
    return pts


def test_laz_round_trip_reads_back_identically(tmp_path):
    # Reference: laspy.read (the library that defines the reading side). Coordinates are
    # stored at 1 mm, so they come back as the nearest millimetre of what we gave.
    pts = _points()
    path = write_cloud(tmp_path / "out.laz", pts, "EPSG:25832")
    las = laspy.read(path)
    assert las.header.version.minor == 4 and las.header.point_format.id == 6
    assert las.header.are_points_compressed
    np.testing.assert_allclose(np.asarray(las.x), pts["X"], atol=0.0005 + 1e-9)
    np.testing.assert_allclose(np.asarray(las.z), pts["Z"], atol=0.0005 + 1e-9)
    for dim, attr in [("Classification", "classification"), ("Intensity", "intensity"),
                      ("GpsTime", "gps_time"), ("PointSourceId", "point_source_id"),
                      ("ReturnNumber", "return_number")]:
        np.testing.assert_array_equal(np.asarray(las[attr]), pts[dim])
    assert las.header.parse_crs().equals(CRS.from_epsg(25832))
    # Writing what we read gives the very same integers: the round trip is a fixed point.
    again, _ = read_cloud(path)
    path2 = write_cloud(tmp_path / "again.laz", again, "EPSG:25832", offset=tuple(las.header.offsets))
    las2 = laspy.read(path2)
    for attr in ("X", "Y", "Z", "classification", "intensity", "gps_time"):
        np.testing.assert_array_equal(np.asarray(las2[attr]), np.asarray(las[attr]))


def test_chunks_cover_the_file_once(tmp_path):
    pts = _points(1000)
    path = write_cloud(tmp_path / "c.laz", pts, None)
    with open_cloud(path, chunk_size=300) as cloud:
        sizes = [len(c) for c in cloud.chunks()]
        assert cloud.crs is None and cloud.crs_source is None
    assert sizes == [300, 300, 300, 100]


def test_default_crs_only_when_file_has_none(tmp_path):
    plain = write_cloud(tmp_path / "plain.las", _points(10), None)
    with open_cloud(plain, default_crs="EPSG:32633") as cloud:
        assert cloud.crs_source == "default" and cloud.crs.to_epsg() == 32633
    tagged = write_cloud(tmp_path / "tagged.las", _points(10), "EPSG:25832")
    with open_cloud(tagged, default_crs="EPSG:32633") as cloud:
        assert cloud.crs_source == "wkt" and cloud.crs.to_epsg() == 25832


def test_failed_write_leaves_no_file(tmp_path):
    target = tmp_path / "bad.laz"
    with pytest.raises(RuntimeError):
        with CloudWriter(target, crs=None, offset=(500_000, 5_700_000, 0)) as w:
            w.write(_points(10))
            raise RuntimeError("stop")
    assert not target.exists()
    assert list(tmp_path.iterdir()) == []


def test_unreadable_file_is_an_input_error(tmp_path):
    bad = tmp_path / "broken.laz"
    bad.write_bytes(b"not a las file at all")
    with pytest.raises(InputError, match="broken.laz"):
        open_cloud(bad)
    with pytest.raises(InputError, match="file not found"):
        open_cloud(tmp_path / "missing.las")


def test_point_dtype_names_are_pdal_dimensions():
    # PDAL Dimension.json names (from memory); StationRange is ours.
    assert set(POINT_DTYPE.names) == {"X", "Y", "Z", "Intensity", "ReturnNumber", "NumberOfReturns",
                                      "Classification", "GpsTime", "PointSourceId", "StationRange",
                                      "Red", "Green", "Blue", "ScanAngleRank", "UserData"}
    # every dimension a point carries, and nothing more: 3 x 8 + 2 + 3 x 1 + 8 + 2 + 8 + 3 x 2 + 4 + 1
    assert POINT_DTYPE.itemsize == 58


def test_header_names_inventory_as_generating_software(tmp_path):
    # Reference: laspy's reading of the LAS 1.4 header fields (32 bytes each).
    from inventory._version import __version__

    path = write_cloud(tmp_path / "named.laz", _points(10), "EPSG:25832")
    header = laspy.read(path).header
    assert header.generating_software == f"inventory {__version__}"
    assert header.system_identifier == "OTHER"


def _coloured(n=500, seed=3):
    rng = np.random.default_rng(seed)
    pts = _points(n, seed)
    for c in ("Red", "Green", "Blue"):
        pts[c] = rng.integers(0, 65536, n)
    pts["UserData"] = rng.integers(0, 256, n)
    pts["ScanAngleRank"] = rng.integers(-15000, 15001, n) * 0.006
    return pts


def test_colour_scan_angle_and_user_data_round_trip_in_point_format_7(tmp_path):
    pts = _coloured()
    las = laspy.read(write_cloud(tmp_path / "rgb.laz", pts, "EPSG:25832"))
    assert las.header.point_format.id == 7
    for dim, attr in [("Red", "red"), ("Green", "green"), ("Blue", "blue"), ("UserData", "user_data")]:
        np.testing.assert_array_equal(np.asarray(las[attr]), pts[dim])
    np.testing.assert_array_equal(np.asarray(las.scan_angle), np.round(pts["ScanAngleRank"] / 0.006))
    back, _ = read_cloud(tmp_path / "rgb.laz")
    np.testing.assert_array_equal(back[["Red", "Green", "Blue", "UserData", "PointSourceId"]],
                                  pts[["Red", "Green", "Blue", "UserData", "PointSourceId"]])
    np.testing.assert_allclose(back["ScanAngleRank"], pts["ScanAngleRank"], atol=1e-4)


def test_las_1_2_colour_and_whole_degree_scan_angle_are_read(tmp_path):
    # point format 3 stores the scan angle rank in whole degrees (LAS 1.2, section 2.5)
    header = laspy.LasHeader(point_format=3, version="1.2")
    las = laspy.LasData(header)
    las.x, las.y, las.z = np.arange(4.0), np.arange(4.0), np.arange(4.0)
    las.red, las.green, las.blue = [1, 2, 3, 4], [5, 6, 7, 8], [9, 10, 11, 65535]
    las.scan_angle_rank = np.array([-90, -1, 0, 45], np.int8)
    las.user_data = np.array([0, 1, 200, 255], np.uint8)
    las.write(tmp_path / "old.las")
    pts, _ = read_cloud(tmp_path / "old.las")
    assert pts["Blue"].tolist() == [9, 10, 11, 65535] and pts["Red"].tolist() == [1, 2, 3, 4]
    assert pts["ScanAngleRank"].tolist() == [-90.0, -1.0, 0.0, 45.0]
    assert pts["UserData"].tolist() == [0, 1, 200, 255]
    # written again in LAS 1.4 point format 7, the angle becomes 0.006 degree steps
    again = laspy.read(write_cloud(tmp_path / "new.laz", pts))
    assert again.header.point_format.id == 7
    assert np.asarray(again.scan_angle).tolist() == [-15000, -167, 0, 7500]
