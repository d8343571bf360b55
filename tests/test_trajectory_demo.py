"""The demo's machine-mounted survey: a scanner on the stacker boom while it slews (issue 9)."""

from __future__ import annotations

from datetime import datetime, timezone

import laspy
import numpy as np
import pytest

from inventory.survey.placement import georeference
from inventory.model.pose import machine_poses
from inventory.site.trajectory import read_trajectories
from inventory._demo.machine_scan import demo_motion, demo_stacker, write_demo_machine_survey
from inventory._demo.scenario import SITE_ORIGIN, terminal_at

K = 1  # the 2026-10-31 survey


@pytest.fixture(scope="module")
def demo_scan(tmp_path_factory):
    folder = tmp_path_factory.mktemp("surveys") / "2026-10-31"
    term = terminal_at(K, np.random.default_rng(0))
    scan = write_demo_machine_survey(folder, term, K, datetime(2026, 10, 31, 11, 30, tzinfo=timezone.utc), seed=5)
    return folder, term, scan


def test_boom_ends_parked_where_the_static_scene_has_it(demo_scan):
    # Cross-check with the scenario's own stacker solid: the boom box (third box of the
    # "stacker" object) has its far end at the boom tip once the machine scan is over.
    _, term, _ = demo_scan
    sid = next(o["id"] for o in term.objects if o["name"] == "stacker")
    boom = [s for s in term.solids if s.object_id == sid][2]
    far_end = np.asarray(boom.center) + np.asarray(boom.rotation) @ np.array([boom.half[0], 0.0, 0.0])
    m = demo_stacker(K)
    motion = demo_motion(K)
    travel, slew, luff = motion.axes_at(np.array([motion.duration_s]))
    tip, _, _, _ = machine_poses(m, travel, slew, luff)
    local_tip = tip[0] - np.array([SITE_ORIGIN[0], SITE_ORIGIN[1], 0.0])
    np.testing.assert_allclose(local_tip, far_end, atol=1e-6)


def test_demo_machine_survey_files(demo_scan):
    folder, term, scan = demo_scan
    las = laspy.read(folder / "machine_scan.laz")
    assert las.header.parse_crs() is None  # scanner frame: no CRS in the file
    assert las.header.global_encoding.gps_time_type == laspy.header.GpsTimeType.STANDARD
    pts = np.stack([las.x, las.y, las.z], axis=1)
    assert np.abs(pts).max() < 100.0  # metres from the scanner, nowhere near the site's coordinates
    traj = read_trajectories(folder / "trajectory.csv")["machine_scan.laz"]
    xyz, keep, counts = georeference(pts, np.asarray(las.gps_time), traj)
    assert keep.all() and counts["points"] == len(scan.points) > 50_000
    dz = xyz[:, 2] - term.height(xyz[:, 0] - SITE_ORIGIN[0], xyz[:, 1] - SITE_ORIGIN[1])
    # 12 mm range noise: vertical residuals of the same order (steep rays), never metres.
    assert float(np.sqrt(np.mean(dz**2))) < 0.02
    assert float(np.quantile(np.abs(dz), 0.999)) < 0.1
