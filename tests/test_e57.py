"""E57 (ASTM E2807) clouds: files written by libE57Format (through pye57) read back through
the survey's placements, compared with the LAZ path; scans, poses, spherical coordinates,
invalid points, intensity and colour limits; bad files refused with one line."""

from __future__ import annotations

import shutil

import warnings

import numpy as np
import pye57
import pytest
from pyproj import CRS
from scipy.spatial.transform import Rotation

from inventory.errors import InputError, InputErrors
from inventory.io.clouds import empty_points, open_cloud, write_cloud
from inventory.io.crs import TransformerCache
from inventory.site.load import check_site, load_site
from inventory.survey.measure import measure_survey
from inventory.survey.placement import survey_placements

SURVEY = "surveys/2026-10-31"


def _placed(site, name):
    """Every point of one file of the good site's survey, placed in the site CRS."""
    ref = site.surveys["2026-10-31"]
    placements = survey_placements(site, ref, CRS(site.crs), TransformerCache())
    p = next(p for p in placements if p.path.name == name)
    with p.open(chunk_size=700) as cloud:
        chunks = [p.place(c) for c in cloud.chunks()]
    return np.concatenate(chunks), p


def _scans(rng, k=3, n=1500):
    """Site points of ``k`` scans, each with a non-trivial pose (yaw anywhere, a tilt of a
    few degrees: a scanner without a compensator)."""
    out = []
    for i in range(k):
        site = np.column_stack([500000.0 + rng.uniform(-15, 45, n), 5700000.0 + rng.uniform(-15, 15, n),
                                10.0 + rng.uniform(0, 5, n)])
        rot = Rotation.from_euler("ZYX", [rng.uniform(-180, 180), rng.uniform(-4, 4), rng.uniform(-4, 4)],
                                  degrees=True)
        origin = np.array([500000.0 + 20 * i, 5700000.0 - 5 * i, 11.5 + i])
        local = rot.inv().apply(site - origin)
        x, y, z, w = rot.as_quat()
        out.append(dict(site=site, local=local, quat=np.array([w, x, y, z]), origin=origin,
                        intensity=rng.uniform(0.05, 0.95, n).astype("f4"),
                        rgb=rng.integers(0, 256, (n, 3)).astype("u1")))
    return out


def test_e57_by_pye57_gives_the_laz_site_coordinates(good_site):
    rng = np.random.default_rng(57)
    scans = _scans(rng)
    folder = good_site / SURVEY
    with pye57.E57(str(folder / "scans.e57"), mode="w") as e57:
        for i, s in enumerate(scans):
            e57.write_scan_raw({"cartesianX": s["local"][:, 0], "cartesianY": s["local"][:, 1],
                                "cartesianZ": s["local"][:, 2], "intensity": s["intensity"],
                                "colorRed": s["rgb"][:, 0], "colorGreen": s["rgb"][:, 1], "colorBlue": s["rgb"][:, 2]},
                               name=f"station {i + 1}", rotation=s["quat"], translation=s["origin"])
    # the LAZ path: the same points, in the site CRS, with the intensity the E57 limits give
    ref = empty_points(sum(len(s["site"]) for s in scans))
    xyz = np.concatenate([s["site"] for s in scans])
    ref["X"], ref["Y"], ref["Z"] = xyz.T
    inten = []
    for s in scans:  # pye57 writes each scan's intensity limits as its data's min and max
        lo, hi = float(s["intensity"].min()), float(s["intensity"].max())
        inten.append(np.rint((s["intensity"].astype(float) - lo) / (hi - lo) * 65535))
    ref["Intensity"] = np.concatenate(inten)
    rgb = np.concatenate([s["rgb"] for s in scans]).astype(np.uint16) * 257
    ref["Red"], ref["Green"], ref["Blue"] = rgb.T
    write_cloud(folder / "same.laz", ref, "EPSG:25832")
    with open(good_site / "site.toml", "a") as f:
        f.write('\n[survey]\ndefault_crs = "EPSG:25832"\n')
    site = load_site(good_site)
    e57_pts, placement = _placed(site, "scans.e57")
    laz_pts, _ = _placed(site, "same.laz")
    assert len(e57_pts) == len(laz_pts) == len(xyz)
    for dim in ("X", "Y", "Z"):
        assert np.abs(e57_pts[dim] - laz_pts[dim]).max() < 0.001
    np.testing.assert_array_equal(e57_pts["Intensity"], laz_pts["Intensity"])
    for dim in ("Red", "Green", "Blue"):
        np.testing.assert_array_equal(e57_pts[dim], laz_pts[dim])
    # each point keeps its scan and its range from that scan's origin
    np.testing.assert_array_equal(np.unique(e57_pts["PointSourceId"]), [1, 2, 3])
    np.testing.assert_allclose(e57_pts["StationRange"][:1500], np.linalg.norm(scans[0]["local"], axis=1), atol=1e-4)
    # the placement's box holds every point
    x0, y0, x1, y1 = placement.extent()
    assert x0 <= e57_pts["X"].min() and e57_pts["X"].max() <= x1
    assert y0 <= e57_pts["Y"].min() and e57_pts["Y"].max() <= y1


def test_spherical_scans_invalid_points_limits_and_returns(tmp_path, write_e57):
    rng = np.random.default_rng(5)
    n = 400
    rae = np.column_stack([rng.uniform(2, 60, n), rng.uniform(-np.pi, np.pi, n), rng.uniform(-0.6, 0.6, n)])
    invalid = np.zeros(n, int)
    invalid[::10] = 2          # no return
    invalid[5::10] = 1         # direction only: no range
    intensity = rng.uniform(-2048, 2047, n)
    path = write_e57(tmp_path / "sph.e57", [dict(
        rae=rae, invalid=invalid, intensity=intensity, intensity_limits=(-2048, 2047),
        rgb=rng.integers(0, 256, (n, 3)), returns=(np.zeros(n), np.ones(n) * 2),
        pose=([np.cos(0.25), 0, 0, np.sin(0.25)], [100.0, 200.0, 5.0]))], "EPSG:25832")
    with open_cloud(path, chunk_size=64) as cloud:
        assert cloud.crs.to_epsg() == 25832 and cloud.crs_source == "e57"
        chunks = list(cloud.chunks())
        assert max(len(c) for c in chunks) <= 64
        pts = np.concatenate(chunks)
        assert cloud.invalid == 80 and cloud.read == n
    keep = invalid == 0
    r, az, el = rae[keep].T
    # ASTM E2807 spherical coordinates: azimuth from x towards y, elevation from the xy plane
    local = np.column_stack([r * np.cos(el) * np.cos(az), r * np.cos(el) * np.sin(az), r * np.sin(el)])
    yaw = np.degrees(0.5)      # quaternion (cos 0.25, 0, 0, sin 0.25): 0.5 rad about z
    site = Rotation.from_euler("z", yaw, degrees=True).apply(local) + [100.0, 200.0, 5.0]
    np.testing.assert_allclose(np.column_stack([pts["X"], pts["Y"], pts["Z"]]), site, atol=1e-9)
    np.testing.assert_allclose(pts["StationRange"], r, atol=1e-9)
    expect = np.rint((intensity[keep] + 2048) / 4095 * 65535)
    np.testing.assert_array_equal(pts["Intensity"], expect)
    assert pts["ReturnNumber"].tolist() == [1] * keep.sum() and set(pts["NumberOfReturns"]) == {2}


def test_stations_csv_gives_a_scan_its_pose(good_site, write_e57):
    rng = np.random.default_rng(8)
    local = rng.uniform(-10, 10, (300, 3))
    folder = good_site / SURVEY
    write_e57(folder / "two.e57", [dict(xyz=local, pose=([1, 0, 0, 0], [500010.0, 5700000.0, 10.0]), name="north"),
                                   dict(xyz=local, pose=None, name="south")], "EPSG:25832")
    stations = folder / "stations.csv"
    # no pose for scan 'south' in the file: refused, naming it
    errors = [str(e) for e in check_site(good_site).errors]
    assert errors == ["site/surveys/2026-10-31/two.e57: pose: scan 2 'south' has no pose (ASTM E2807 data3D pose); "
                      "give it one in stations.csv (file two.e57, scan 2)"]
    with open(stations, "a") as f:
        f.write("two.e57,S2,2026-10-31T15:00:00+01:00,500030,5700002,10.5,0,0,90\n")
    # a whole-file pose for a file of two scans names no scan
    assert any("two.e57 has 2 scans: give each pose a scan" in str(e) for e in check_site(good_site).errors)
    text = stations.read_text().replace("file,station_id", "file,scan,station_id")
    lines = text.splitlines()
    lines = [lines[0], lines[1].replace("a.laz,", "a.laz,,"), lines[2].replace("two.e57,", "two.e57,south,")]
    stations.write_text("\n".join(lines) + "\n")
    site = load_site(good_site)
    pts, _ = _placed(site, "two.e57")
    south = pts[pts["PointSourceId"] == 2]
    expect = local @ Rotation.from_euler("z", 90, degrees=True).as_matrix().T + [500030, 5700002, 10.5]
    np.testing.assert_allclose(np.column_stack([south["X"], south["Y"], south["Z"]]), expect, atol=1e-9)
    north = pts[pts["PointSourceId"] == 1]
    np.testing.assert_allclose(north["X"], local[:, 0] + 500010.0, atol=1e-9)
    # a scan row naming no scan of the file
    stations.write_text(stations.read_text().replace("two.e57,south,", "two.e57,west,"))
    assert any("stations.csv line 3: scan: two.e57 has no scan 'west'" in str(e) for e in check_site(good_site).errors)


def test_e57_without_pose_is_refused_and_nothing_written(good_site, write_e57, tmp_path):
    folder = good_site / SURVEY
    (folder / "a.laz").unlink()
    (folder / "stations.csv").unlink()
    write_e57(folder / "loose.e57", [dict(xyz=np.random.default_rng(1).uniform(0, 5, (100, 3)), pose=None)],
              "EPSG:25832")
    errors = [str(e) for e in check_site(good_site).errors]
    assert errors == ["site/surveys/2026-10-31/loose.e57: pose: scan 1 'scan1' has no pose (ASTM E2807 data3D pose); "
                      "give it one in stations.csv (file loose.e57, scan 1)",
                      "site/surveys/2026-10-31: no readable point cloud in the survey folder"]
    with pytest.raises(InputErrors):
        load_site(good_site)
    # placed directly (a site loaded before the file changed): refused before any output
    shutil.copy(folder / "loose.e57", tmp_path / "keep.e57")
    (folder / "loose.e57").unlink()
    write_e57(folder / "loose.e57", [dict(xyz=np.random.default_rng(1).uniform(0, 5, (100, 3)),
                                          pose=([1, 0, 0, 0], [500000.0, 5700000.0, 10.0]))], "EPSG:25832")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")   # no stations.csv times: the default instant
        site = load_site(good_site)
    shutil.copy(tmp_path / "keep.e57", folder / "loose.e57")
    out = tmp_path / "out"
    with pytest.raises(InputError, match="loose.e57: pose: scan 1 'scan1' has no pose"):
        measure_survey(site, "2026-10-31", out_dir=out)
    assert not out.exists() or not any(out.iterdir())


def test_truncated_e57_is_refused(good_site, write_e57, tmp_path):
    folder = good_site / SURVEY
    path = write_e57(folder / "cut.e57", [dict(xyz=np.random.default_rng(2).uniform(0, 5, (5000, 3)),
                                               pose=([1, 0, 0, 0], [500000.0, 5700000.0, 10.0]))], "EPSG:25832")
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    with pytest.raises(InputError) as err:
        open_cloud(path)
    assert str(err.value).startswith(f"{path}: not a readable E57 file, truncated or damaged (")
    assert "\n" not in str(err.value)
    errors = [str(e) for e in check_site(good_site).errors]
    assert len(errors) == 1 and errors[0].startswith("site/surveys/2026-10-31/cut.e57: not a readable E57 file")


def test_whole_file_pose_places_a_single_scan_file_without_crs(good_site, write_e57):
    local = np.random.default_rng(4).uniform(-8, 8, (200, 3))
    folder = good_site / SURVEY
    write_e57(folder / "one.e57", [dict(xyz=local, pose=None)])      # no pose, no CRS in the file
    with open(folder / "stations.csv", "a") as f:
        f.write("one.e57,S9,2026-10-31T15:00:00+01:00,500005,5700001,10.2,0,0,-30\n")
    site = load_site(good_site)
    pts, placement = _placed(site, "one.e57")
    expect = Rotation.from_euler("z", -30, degrees=True).apply(local) + [500005, 5700001, 10.2]
    np.testing.assert_allclose(np.column_stack([pts["X"], pts["Y"], pts["Z"]]), expect, atol=1e-9)
    assert placement.crs is None


def test_acquisition_times_give_the_survey_instant_and_gps_time(good_site, write_e57):
    from datetime import datetime, timezone

    from inventory.model.pose import GPS_EPOCH, GPS_UTC_LEAP_S

    folder = good_site / SURVEY
    (folder / "stations.csv").unlink()
    (folder / "a.laz").unlink()
    # 2026-10-31 13:00:00 UTC as GPS seconds since the GPS epoch (IS-GPS-200; 18 leap seconds)
    start = (datetime(2026, 10, 31, 13, 0, tzinfo=timezone.utc) - GPS_EPOCH).total_seconds() + GPS_UTC_LEAP_S
    local = np.random.default_rng(6).uniform(-10, 10, (100, 3)) * [3, 1, 0.2]   # over both piles
    ts = np.linspace(0.0, 300.0, 100)
    write_e57(folder / "timed.e57", [dict(xyz=local, pose=([1, 0, 0, 0], [500015.0, 5700000.0, 10.0]),
                                          acquisitionStart=start, acquisitionEnd=start + 300.0, time_stamp=ts)],
              "EPSG:25832")
    with warnings.catch_warnings():
        warnings.simplefilter("error")   # no "no stations.csv times" warning: the file has its times
        site = load_site(good_site)
    assert site.surveys["2026-10-31"].instant == datetime(2026, 10, 31, 13, 5, tzinfo=timezone.utc)
    pts, _ = _placed(site, "timed.e57")
    # adjusted standard GPS time (LAS 1.4): GPS seconds minus 1e9
    np.testing.assert_allclose(pts["GpsTime"], start + ts - 1e9, atol=1e-6)


def test_a_pose_that_is_no_rotation_is_refused(tmp_path, write_e57):
    path = write_e57(tmp_path / "zero.e57", [dict(xyz=np.zeros((3, 3)), pose=([0, 0, 0, 0], [1.0, 2.0, 3.0]))])
    with pytest.raises(InputError) as err:
        open_cloud(path)
    assert str(err.value) == (f"{path}: damaged E57 structure (scan 1: its pose is not a rotation quaternion "
                              "and a translation ([0.0, 0.0, 0.0, 0.0], [1.0, 2.0, 3.0]))")
