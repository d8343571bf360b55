"""Station poses: R = Rz(yaw) Ry(pitch) Rx(roll), checked against scipy's Rotation."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.spatial.transform import Rotation

from inventory.survey.placement import StationPose, poses_from_stations
from inventory.model.pose import rotation_matrix
from inventory.errors import InputError

angles = st.floats(-180, 180, allow_nan=False)


@settings(max_examples=200, deadline=None)
@given(angles, st.floats(-89, 89), angles)
def test_rotation_equals_scipy_intrinsic_zyx(roll, pitch, yaw):
    # Reference: scipy Rotation.from_euler("ZYX", [yaw, pitch, roll], degrees=True), the
    # convention written in the site-folder contract.
    ref = Rotation.from_euler("ZYX", [yaw, pitch, roll], degrees=True).as_matrix()
    np.testing.assert_allclose(rotation_matrix(roll, pitch, yaw), ref, atol=1e-12)


def test_yaw_is_counter_clockwise_from_east():
    np.testing.assert_allclose(rotation_matrix(0, 0, 90) @ [1, 0, 0], [0, 1, 0], atol=1e-12)
    # positive pitch turns the scanner's x axis downwards (right-handed about y)
    np.testing.assert_allclose(rotation_matrix(0, 30, 0) @ [1, 0, 0],
                               [np.cos(np.radians(30)), 0, -np.sin(np.radians(30))], atol=1e-12)


def test_pose_places_points_and_measures_range():
    pose = StationPose("S1", 1000.0, 2000.0, 50.0, 2.0, -1.0, 30.0)
    rng = np.random.default_rng(3)
    p = rng.normal(size=(3, 100)) * 20
    x, y, z, r = pose.apply(*p)
    ref = Rotation.from_euler("ZYX", [30.0, -1.0, 2.0], degrees=True).apply(p.T) + [1000.0, 2000.0, 50.0]
    np.testing.assert_allclose(np.column_stack([x, y, z]), ref, atol=1e-9)
    np.testing.assert_allclose(r, np.linalg.norm(p, axis=0))
    # box_in_site covers every placed point
    x0, y0, x1, y1 = pose.box_in_site(p.min(axis=1), p.max(axis=1))
    assert x.min() >= x0 and x.max() <= x1 and y.min() >= y0 and y.max() <= y1


def test_stations_table_blank_and_partial_rows():
    df = pd.DataFrame({
        "file": ["a.laz", "b.laz", "c.laz"], "station_id": ["S1", "S2", "S3"],
        "x": [1.0, None, 3.0], "y": [2.0, None, 4.0], "z": [3.0, None, None],
        "roll_deg": [0.0, None, 0.0], "pitch_deg": [0.0, None, 0.0], "yaw_deg": [10.0, None, 0.0],
        "line": [2, 3, 4],
    })
    with pytest.raises(InputError) as err:
        poses_from_stations(df, "surveys/2026-10-31/stations.csv")
    assert err.value.line == 4 and err.value.field == "z"
    poses = poses_from_stations(df.iloc[:2], "stations.csv")
    assert poses["b.laz"] is None
    assert poses["a.laz"].yaw_deg == 10.0
