"""Trajectory input, rotation conventions and per-point georeferencing (issue 9)."""

from __future__ import annotations

import math
import warnings
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.spatial.transform import Rotation

from inventory.model.pose import rotation_matrix
from inventory.model.pose import Machine, Trajectory, adjusted_gps_time, euler_rotation, machine_poses
from inventory.survey.placement import georeference
from inventory.site.trajectory import load_trajectory, machines_from_config, read_trajectories
from inventory.errors import InputError, InputErrors, InputWarning

angle = st.floats(-180.0, 180.0, allow_nan=False)


# ------------------------------------------------------------------ rotation conventions


@settings(max_examples=60, deadline=None)
@given(roll=angle, pitch=st.floats(-89.0, 89.0), yaw=angle)
def test_euler_rotation_is_scipy_zyx_and_the_team_matrix(roll, pitch, yaw):
    # Reference: scipy Rotation.from_euler("ZYX", [yaw, pitch, roll]) (intrinsic z-y'-x''), the
    # convention of the site contract; and the hand-written Rz @ Ry @ Rx of inventory.survey.placement.
    ours = euler_rotation(roll, pitch, yaw).as_matrix()
    ref = Rotation.from_euler("ZYX", [yaw, pitch, roll], degrees=True).as_matrix()
    np.testing.assert_allclose(ours, ref, atol=1e-12)
    np.testing.assert_allclose(ours, rotation_matrix(roll, pitch, yaw), atol=1e-12)


def test_pose_hand_computed():
    # Hand-computed: roll 90 turns body (1, 2, 3) into (1, -3, 2) (Rx: y' = -z, z' = y);
    # yaw 90 then turns (1, -3, 2) into (3, 1, 2) (Rz: x' = -y, y' = x); plus (10, 20, 30).
    traj = Trajectory.from_poses([0.0, 1.0], [[10, 20, 30], [10, 20, 30]], 90.0, 0.0, 90.0)
    xyz, keep, _ = georeference([[1.0, 2.0, 3.0]], [0.25], traj)
    np.testing.assert_allclose(xyz, [[13.0, 21.0, 32.0]], atol=1e-12)
    assert keep.tolist() == [True]


def test_lever_arm_and_boresight_hand_computed():
    # Body at (100, 200, 10) heading north (yaw 90). Scanner 2 m ahead and 1 m up in the body
    # frame, pitched 90 degrees down (Ry(90) turns x into -z). A point 5 m along the scanner x
    # axis: B p = (0, 0, -5); + arm = (2, 0, -4); Rz(90) -> (0, 2, -4); + T = (100, 202, 6).
    traj = Trajectory.from_poses([0.0, 0.5], [[100, 200, 10]] * 2, 0.0, 0.0, 90.0)
    xyz, _, _ = georeference([[5.0, 0.0, 0.0]], [0.25], traj, lever_arm=(2, 0, 1), boresight=(0, 90, 0))
    np.testing.assert_allclose(xyz, [[100.0, 202.0, 6.0]], atol=1e-12)


def test_trajectory_lever_arm_is_the_default():
    traj = Trajectory.from_poses([0.0, 0.5], [[100, 200, 10]] * 2, 0.0, 0.0, 90.0,
                                 lever_arm=(2, 0, 1), boresight_deg=(0, 90, 0))
    xyz, _, _ = georeference([[5.0, 0.0, 0.0]], [0.25], traj)
    np.testing.assert_allclose(xyz, [[100.0, 202.0, 6.0]], atol=1e-12)
    # An explicit argument wins over the trajectory's own.
    xyz, _, _ = georeference([[5.0, 0.0, 0.0]], [0.25], traj, lever_arm=(0, 0, 0), boresight=(0, 0, 0))
    np.testing.assert_allclose(xyz, [[100.0, 205.0, 10.0]], atol=1e-12)


# ----------------------------------------------------------------------- interpolation


def test_slerp_midpoint_about_one_axis_is_the_mean_angle():
    # Slerp between two rotations about the same axis turns at constant rate about it
    # (Shoemake, "Animating rotation with quaternion curves", SIGGRAPH 1985; from memory).
    traj = Trajectory.from_poses([10.0, 12.0], [[0, 0, 0], [4, -2, 1]], 0.0, 0.0, [0.0, 90.0])
    rot, pos = traj.poses_at([10.5, 11.0])
    np.testing.assert_allclose(rot.as_euler("ZYX", degrees=True)[:, 0], [22.5, 45.0], atol=1e-9)
    np.testing.assert_allclose(pos, [[1.0, -0.5, 0.25], [2.0, -1.0, 0.5]], atol=1e-12)


def test_slerp_takes_the_short_way_across_plus_minus_180():
    # 170 -> -170 degrees is a 20 degree turn through 180, not 340 degrees through 0.
    traj = Trajectory.from_poses([0.0, 1.0], [[0, 0, 0]] * 2, 0.0, 0.0, [170.0, -170.0])
    rot, _ = traj.poses_at([0.5])
    np.testing.assert_allclose(rot.apply([1.0, 0.0, 0.0]), [[-1.0, 0.0, 0.0]], atol=1e-12)


def test_slerp_matches_scipy_for_general_rotations():
    # Reference: scipy Slerp over the same key rotations, evaluated directly.
    from scipy.spatial.transform import Slerp

    rng = np.random.default_rng(3)
    t = np.cumsum(rng.uniform(0.05, 0.2, 20)) + 4.0e8  # adjusted GPS times are ~1e8 s
    angles = np.cumsum(rng.normal(0, 3, (20, 3)), axis=0)
    traj = Trajectory.from_poses(t, rng.normal(size=(20, 3)), angles[:, 0], angles[:, 1], angles[:, 2])
    q = rng.uniform(t[0], t[-1], 500)
    ref = Slerp(t - t[0], Rotation.from_euler("ZYX", angles[:, ::-1], degrees=True))(q - t[0])
    rot, _ = traj.poses_at(q)
    assert np.degrees((rot.inv() * ref).magnitude()).max() < 1e-9


def test_poses_at_refuses_times_outside_the_span():
    traj = Trajectory.from_poses([0.0, 1.0], [[0, 0, 0]] * 2, 0, 0, 0)
    with pytest.raises(ValueError, match="outside"):
        traj.poses_at([1.5])


# ------------------------------------------------------------------------- time checks


def _gappy() -> Trajectory:
    t = np.concatenate([np.arange(0.0, 1.01, 0.1), np.arange(3.0, 4.01, 0.1)])
    return Trajectory.from_poses(t, np.zeros((len(t), 3)), 0, 0, 0, source="trajectory.csv")


def test_points_outside_span_and_in_gap_are_counted_and_dropped():
    times = np.array([-1.0, 0.5, 1.5, 2.0, 3.5, 4.0, 4.5, 1.0, 3.0])
    pts = np.arange(27, dtype=float).reshape(9, 3)
    with pytest.warns(InputWarning) as rec:
        xyz, keep, counts = georeference(pts, times, _gappy(), max_gap_s=1.0, source="boom.laz")
    # -1 and 4.5 lie outside [0, 4]; 1.5 and 2.0 lie in the 1.0-3.0 gap; the gap's end samples stay.
    assert keep.tolist() == [False, True, False, False, True, True, False, True, True]
    assert counts == {"points": 9, "kept": 5, "outside_span": 2, "in_gap": 2}
    np.testing.assert_allclose(xyz, pts[keep], atol=1e-12)  # identity pose
    text = " ".join(str(w.message) for w in rec)
    assert "boom.laz" in text and "gap" in text and "outside" in text


def test_a_longer_gap_limit_bridges_the_gap_without_warning():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        _, keep, counts = georeference(np.zeros((2, 3)), [1.5, 2.5], _gappy(), max_gap_s=2.5)
    assert keep.all() and counts["in_gap"] == 0


def test_nan_times_are_outside():
    with pytest.warns(InputWarning):
        _, keep, counts = georeference(np.zeros((2, 3)), [np.nan, 0.5], _gappy())
    assert keep.tolist() == [False, True] and counts["outside_span"] == 1


def test_adjusted_gps_time_at_the_2019_week_rollover():
    # GPS week 2048 (the second 1024-week rollover) began 2019-04-07 00:00:00 GPS time =
    # 2019-04-06 23:59:42 UTC (GPS - UTC = 18 s; from memory). 2048 weeks = 1 238 630 400 s,
    # minus 1e9 for adjusted standard GPS time (ASPRS LAS 1.4 R15, Global Encoding bit 0).
    t = adjusted_gps_time(datetime(2019, 4, 6, 23, 59, 42, tzinfo=timezone.utc))
    assert t == 2048 * 7 * 86400 - 1.0e9
    with pytest.raises(ValueError):
        adjusted_gps_time(datetime(2016, 12, 31, tzinfo=timezone.utc))


# ---------------------------------------------------------------------- machine axes


def _machine(**kw) -> Machine:
    geo = dict(id="stacker1", rail_origin=np.array([1000.0, 2000.0, 50.0]), rail_azimuth_deg=90.0,
               pivot_height_m=10.0, pivot_offset_m=2.0, boom_length_m=30.0)
    geo.update(kw)
    return Machine(**geo)


def test_machine_pose_hand_computed():
    # Rail runs north (azimuth 90) from (1000, 2000, 50). Travel 5 m -> slew axis at
    # (1000, 2005, 50). Slew 90 -> boom heading 180 (west). Pivot 2 m west, 10 m up:
    # (998, 2005, 60). Boom 30 m at luff 30: tip = pivot + 30 (cos30 * (-1, 0), sin30)
    # = (998 - 25.980762, 2005, 75). Tip frame: yaw 180, pitch -30, roll 0, so the boom
    # axis x points to (-cos30, 0, sin30).
    xyz, roll, pitch, yaw = machine_poses(_machine(), 5.0, 90.0, 30.0)
    np.testing.assert_allclose(xyz, [972.0192379, 2005.0, 75.0], atol=1e-6)
    assert (float(roll), float(pitch), float(yaw)) == (0.0, -30.0, 180.0)
    x_axis = euler_rotation(roll, pitch, yaw).apply([1.0, 0.0, 0.0])
    np.testing.assert_allclose(x_axis, [-math.sqrt(3) / 2, 0.0, 0.5], atol=1e-12)


def test_machine_trajectory_carries_lever_arm_and_boresight():
    m = _machine(scanner_lever_arm_m=np.array([0.0, 0.0, -1.0]), boresight_deg=np.array([0.0, 30.0, 0.0]))
    traj = Trajectory.from_machine_axes([0.0, 1.0], m, [5.0, 5.0], [90.0, 90.0], [30.0, 30.0])
    # Boresight pitch 30 undoes the boom's -30: the scanner is level, its x points west;
    # its origin hangs 1 m below the tip along the tip's z = (sin30 * (+1, 0) ... ) axis.
    xyz, _, _ = georeference([[0.0, 0.0, 0.0], [1.0, 0.0, 0.0]], [0.5, 0.5], traj)
    tip = np.array([972.0192379, 2005.0, 75.0])
    tip_z = euler_rotation(0.0, -30.0, 180.0).apply([0.0, 0.0, 1.0])  # (sin30 * ..., 0, cos30)
    np.testing.assert_allclose(tip_z, [0.5, 0.0, math.sqrt(3) / 2], atol=1e-12)
    np.testing.assert_allclose(xyz[0], tip - tip_z, atol=1e-6)
    np.testing.assert_allclose(xyz[1] - xyz[0], [-1.0, 0.0, 0.0], atol=1e-12)


def test_machines_from_config_checks_keys():
    cfg = {"stacker1": {"rail_origin": [1000, 2000, 50], "rail_azimuth_deg": 90, "pivot_height_m": 10,
                        "boom_length_m": 30, "scanner_lever_arm_m": [0, 0, -1], "boresight_deg": [0, 30, 0]}}
    m = machines_from_config(cfg)["stacker1"]
    assert m.pivot_offset_m == 0.0 and m.boresight_deg.tolist() == [0.0, 30.0, 0.0]
    with pytest.raises(InputError) as err:
        machines_from_config({"s": {**cfg["stacker1"], "boom_length_m": "long"}})
    assert err.value.field == "machines.s.boom_length_m"
    with pytest.raises(InputError) as err:
        machines_from_config({"s": {k: v for k, v in cfg["stacker1"].items() if k != "rail_origin"}})
    assert err.value.field == "machines.s.rail_origin"
    with pytest.raises(InputError) as err:
        machines_from_config({"s": {**cfg["stacker1"], "rail_origin": [1, 2]}})
    assert err.value.field == "machines.s.rail_origin"
    with pytest.raises(InputError) as err:
        machines_from_config({"s": {**cfg["stacker1"], "boom_lenght_m": 3}})
    assert err.value.field == "machines.s.boom_lenght_m"


# ------------------------------------------------------------------------- the table

POSE_HEADER = "gps_time,time,x,y,z,roll_deg,pitch_deg,yaw_deg\n"


def _write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "trajectory.csv"
    path.write_text(text, encoding="utf-8")
    return path


def _problems(path: Path, machines=None) -> list:
    with pytest.raises(InputErrors) as err:
        read_trajectories(path, machines)
    return [(p.where, p.field) for p in err.value.problems if p.severity == "error"]


def test_pose_table_round_trip(tmp_path):
    path = _write(tmp_path, POSE_HEADER
                  + "100.0,,10,20,30,0,0,0\n"
                  + "101.0,,12,20,30,0,0,90\n")
    traj = load_trajectory(path)
    assert traj.span == (100.0, 101.0) and traj.source == str(path)
    xyz, _, _ = georeference([[1.0, 0, 0]], [100.5], traj)
    c = math.cos(math.radians(45))
    np.testing.assert_allclose(xyz, [[11.0 + c, 20.0 + c, 30.0]], atol=1e-12)


def test_times_must_strictly_increase_naming_the_line(tmp_path):
    path = _write(tmp_path, POSE_HEADER + "100,,0,0,0,0,0,0\n101,,0,0,0,0,0,0\n101,,0,0,0,0,0,0\n")
    assert _problems(path) == [(4, "gps_time")]


def test_one_row_is_not_a_trajectory(tmp_path):
    path = _write(tmp_path, POSE_HEADER + "100,,0,0,0,0,0,0\n")
    assert _problems(path) == [(2, "gps_time")]


def test_incomplete_pose_names_line_and_field(tmp_path):
    path = _write(tmp_path, POSE_HEADER + "100,,0,0,0,0,0,0\n101,,0,0,0,0,,0\n")
    assert _problems(path) == [(3, "pitch_deg")]


def test_bad_number_and_missing_gps_time_name_line_and_field(tmp_path):
    path = _write(tmp_path, POSE_HEADER + "100,,0,0,zero,0,0,0\n101,,0,0,0,0,0,0\n102,,0,0,0,0,0,0\n")
    assert _problems(path) == [(2, "z")]
    path = _write(tmp_path, POSE_HEADER + "100,,0,0,0,0,0,0\n,,0,0,0,0,0,0\n101,,0,0,0,0,0,0\n")
    assert _problems(path) == [(3, "gps_time")]


def test_time_without_offset_is_refused(tmp_path):
    path = _write(tmp_path, POSE_HEADER + "100,2026-10-31T09:00:00,0,0,0,0,0,0\n101,,0,0,0,0,0,0\n")
    assert _problems(path) == [(2, "time")]


def test_turn_too_large_between_samples(tmp_path):
    path = _write(tmp_path, POSE_HEADER + "100,,0,0,0,0,0,0\n101,,0,0,0,0,0,100\n")
    assert _problems(path) == [(3, "yaw_deg")]


def test_mixed_pose_and_axes_rows(tmp_path):
    path = _write(tmp_path, "gps_time,machine,x,y,z,roll_deg,pitch_deg,yaw_deg,travel_m,slew_deg,luff_deg\n"
                  "100,,0,0,0,0,0,0,,,\n101,,,,,,,,1,2,3\n")
    assert _problems(path) == [(3, "travel_m")]


AXES_HEADER = "file,machine,gps_time,travel_m,slew_deg,luff_deg\n"
CFG = {"stacker1": {"rail_origin": [1000, 2000, 50], "rail_azimuth_deg": 90, "pivot_height_m": 10,
                    "pivot_offset_m": 2, "boom_length_m": 30}}


def test_axes_table_gives_the_machine_pose(tmp_path):
    path = _write(tmp_path, AXES_HEADER + "boom.laz,stacker1,0,5,90,30\nboom.laz,stacker1,1,5,90,30\n")
    found = read_trajectories(path, machines_from_config(CFG))
    assert list(found) == ["boom.laz"]
    rot, pos = found["boom.laz"].poses_at([0.5])
    np.testing.assert_allclose(pos, [[972.0192379, 2005.0, 75.0]], atol=1e-6)
    assert found["boom.laz"].machine == "stacker1"


def test_axes_need_a_known_machine(tmp_path):
    path = _write(tmp_path, AXES_HEADER + "boom.laz,crane9,0,5,90,30\nboom.laz,crane9,1,5,90,30\n")
    assert _problems(path, machines_from_config(CFG)) == [(2, "machine")]
    path = _write(tmp_path, AXES_HEADER + "boom.laz,,0,5,90,30\nboom.laz,,1,5,90,30\n")
    assert _problems(path, machines_from_config(CFG)) == [(2, "machine")]


def test_luff_range_comes_from_the_schema(tmp_path):
    path = _write(tmp_path, AXES_HEADER + "boom.laz,stacker1,0,5,90,95\nboom.laz,stacker1,1,5,90,30\n")
    assert _problems(path, machines_from_config(CFG)) == [(2, "luff_deg")]


def test_file_column_groups_trajectories(tmp_path):
    path = _write(tmp_path, "file," + POSE_HEADER
                  + "a.laz,100,,0,0,0,0,0,0\na.laz,101,,1,0,0,0,0,0\n"
                  + "b.laz,50,,0,0,0,0,0,0\nb.laz,51,,0,5,0,0,0,0\n")
    found = read_trajectories(path)
    assert sorted(found) == ["a.laz", "b.laz"]
    assert found["b.laz"].span == (50.0, 51.0)
    assert load_trajectory(path, file="a.laz").span == (100.0, 101.0)
    with pytest.raises(InputError) as err:
        load_trajectory(path, file="c.laz")
    assert err.value.field == "file"
    path = _write(tmp_path, "file," + POSE_HEADER + "a.laz,100,,0,0,0,0,0,0\n,101,,1,0,0,0,0,0\n")
    assert _problems(path) == [(3, "file")]


def test_unknown_column_warns(tmp_path):
    path = _write(tmp_path, "gps_time,x,y,z,roll_deg,pitch_deg,yaw_deg,speed\n100,0,0,0,0,0,0,1\n101,0,0,0,0,0,0,1\n")
    with pytest.warns(InputWarning, match="speed"):
        read_trajectories(path)


def test_time_column_matching_neither_time_base_warns(tmp_path):
    # 2026-10-31T09:00:00Z: adjusted standard GPS time is computed by the tool; the week-seconds
    # reading is independent: 2026-10-31 is a Saturday, so 09:00:18 GPS is 6 days + 9 h + 18 s
    # into the GPS week (weeks start Sunday 00:00; GPS - UTC = 18 s).
    week_s = 6 * 86400 + 9 * 3600 + 18
    ok = _write(tmp_path, POSE_HEADER + f"{week_s},2026-10-31T10:00:00+01:00,0,0,0,0,0,0\n"
                f"{week_s + 1},2026-10-31T10:00:01+01:00,0,0,0,0,0,0\n")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        read_trajectories(ok)
    adjusted = adjusted_gps_time(datetime(2026, 10, 31, 9, tzinfo=timezone.utc))
    assert (adjusted + 1e9) % (7 * 86400) == week_s
    bad = _write(tmp_path, POSE_HEADER + f"{week_s + 3600},2026-10-31T10:00:00+01:00,0,0,0,0,0,0\n"
                 f"{week_s + 3601},2026-10-31T10:00:01+01:00,0,0,0,0,0,0\n")
    with pytest.warns(InputWarning, match="line 2: time"):
        read_trajectories(bad)


def test_problems_list_collects_instead_of_raising(tmp_path):
    path = _write(tmp_path, POSE_HEADER + "100,,0,0,0,0,0,0\n99,,0,0,0,0,0,0\n")
    problems: list = []
    assert read_trajectories(path, problems=problems) == {}
    assert [(p.where, p.field, p.severity) for p in problems] == [(3, "gps_time", "error")]


def test_all_points_outside_hints_at_the_time_base():
    traj = Trajectory.from_poses([4.7e8, 4.7e8 + 60], [[0, 0, 0]] * 2, 0, 0, 0)
    with pytest.warns(InputWarning, match="same GPS time base"):
        _, keep, _ = georeference(np.zeros((3, 3)), [3600.0, 3601.0, 3602.0], traj)
    assert not keep.any()


def test_warn_false_only_counts():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        _, keep, counts = georeference(np.zeros((3, 3)), [-5.0, 0.5, 2.0], _gappy(), warn=False)
    assert counts == {"points": 3, "kept": 1, "outside_span": 1, "in_gap": 1}


def test_utc_from_adjusted_gps_inverts():
    from inventory.model.pose import utc_from_adjusted_gps

    when = datetime(2026, 10, 31, 11, 30, 15, 250000, tzinfo=timezone.utc)
    assert utc_from_adjusted_gps(adjusted_gps_time(when)) == when
    with pytest.raises(ValueError):
        utc_from_adjusted_gps(3600.0)  # week seconds, not adjusted standard time


def test_extent_hand_computed():
    # A 2 x 2 x 2 box around the scanner, carried from x = 100 to x = 110 heading north
    # (yaw 90): the box keeps its size, so x spans 99..111 and y 199..201.
    traj = Trajectory.from_poses([0.0, 1.0], [[100, 200, 0], [110, 200, 0]], 0.0, 0.0, 90.0)
    assert traj.extent([-1, -1, -1], [1, 1, 1]) == pytest.approx((99.0, 199.0, 111.0, 201.0))
    # With a lever arm of 5 m along the body x (north after yaw 90): y shifts by 5.
    traj = Trajectory.from_poses([0.0, 1.0], [[100, 200, 0], [110, 200, 0]], 0.0, 0.0, 90.0, lever_arm=(5, 0, 0))
    assert traj.extent([-1, -1, -1], [1, 1, 1]) == pytest.approx((99.0, 204.0, 111.0, 206.0))


@settings(max_examples=40, deadline=None)
@given(roll=angle, pitch=st.floats(-89.0, 89.0), yaw=angle,
       origin=st.tuples(*[st.floats(-1e4, 1e4)] * 3), t=st.floats(0.0, 1.0))
def test_a_still_trajectory_places_points_like_a_static_station(roll, pitch, yaw, origin, t):
    # Cross-check with the static-station path (inventory.survey.placement.StationPose.apply):
    # a trajectory that does not move must give the same site coordinates at any time.
    from inventory.survey.placement import StationPose

    pts = np.random.default_rng(0).normal(0, 20, (50, 3))
    pose = StationPose("S", *origin, roll_deg=roll, pitch_deg=pitch, yaw_deg=yaw)
    x, y, z, _ = pose.apply(pts[:, 0], pts[:, 1], pts[:, 2])
    traj = Trajectory.from_poses([0.0, 1.0], [origin, origin], roll, pitch, yaw)
    xyz, _, _ = georeference(pts, np.full(50, t), traj)
    np.testing.assert_allclose(xyz, np.stack([x, y, z], axis=1), atol=1e-8)


def test_time_alone_gives_adjusted_gps_time(tmp_path):
    path = _write(tmp_path, POSE_HEADER + ",2026-10-31T10:00:00+01:00,0,0,0,0,0,0\n"
                  ",2026-10-31T10:00:00.5+01:00,1,0,0,0,0,0\n")
    traj = load_trajectory(path)
    # 2026-10-31T09:00:00Z: 2442 GPS weeks + 6 days + 9 h + 18 s since 1980-01-06 (hand count:
    # 2442 weeks end on Sunday 2026-10-25), minus 1e9.
    t0 = 2442 * 604800 + 6 * 86400 + 9 * 3600 + 18 - 1e9
    assert traj.span == pytest.approx((t0, t0 + 0.5), abs=1e-6)
    mixed = _write(tmp_path, POSE_HEADER + "5,2026-10-31T10:00:00+01:00,0,0,0,0,0,0\n"
                   ",2026-10-31T10:00:01+01:00,1,0,0,0,0,0\n")
    assert _problems(mixed) == [(3, "gps_time")]
    neither = _write(tmp_path, POSE_HEADER + ",,0,0,0,0,0,0\n,2026-10-31T10:00:01+01:00,1,0,0,0,0,0\n")
    assert _problems(neither) == [(2, "gps_time")]


def test_ins_machine_gives_lever_arm_to_a_pose_table(tmp_path):
    # A machine with its own GNSS/INS pose: only lever arm and boresight in site.toml.
    machines = machines_from_config({"reclaimer2": {"scanner_lever_arm_m": [0, 3, 0], "boresight_deg": [0, 0, 0]}})
    assert not machines["reclaimer2"].has_boom
    path = _write(tmp_path, "machine," + POSE_HEADER + "reclaimer2,0,,10,20,30,0,0,90\nreclaimer2,1,,10,20,30,0,0,90\n")
    traj = load_trajectory(path, machines)
    xyz, _, _ = georeference([[0.0, 0.0, 0.0]], [0.5], traj)
    np.testing.assert_allclose(xyz, [[7.0, 20.0, 30.0]], atol=1e-12)  # 3 m to the left of north = west
    axes = _write(tmp_path, AXES_HEADER + "boom.laz,reclaimer2,0,5,90,30\nboom.laz,reclaimer2,1,5,90,30\n")
    assert _problems(axes, machines) == [(2, "machine")]
