"""The sample site's survey delivered as one E57 file (its stations as scans with their
poses, written by libE57Format) closes with the volumes of the LAZ delivery."""

from __future__ import annotations

import csv

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from inventory.close import close_period
from inventory.io.clouds import read_cloud
from inventory.model.pose import rotation_matrix

pytestmark = pytest.mark.slow

DATE = "2026-09-30"


def _to_e57(folder, write_e57) -> None:
    """Every posed station's LAZ of the survey becomes one scan of ``survey.e57`` with the
    station's pose; the georeferenced station's file stays as it is (it was delivered without
    its scanner's origin, so its points have no range to gate). stations.csv keeps the times."""
    with open(folder / "stations.csv", newline="") as f:
        rows = list(csv.DictReader(f))
    posed = [r for r in rows if r["x"]]
    scans = []
    for row in posed:
        pts, _ = read_cloud(folder / row["file"])
        local = np.column_stack([pts["X"], pts["Y"], pts["Z"]])
        rot = Rotation.from_matrix(rotation_matrix(float(row["roll_deg"]), float(row["pitch_deg"]),
                                                   float(row["yaw_deg"])))
        t = [float(row["x"]), float(row["y"]), float(row["z"])]
        x, y, z, w = rot.as_quat()
        scans.append(dict(name=row["station_id"], xyz=local, pose=([w, x, y, z], t),
                          intensity=pts["Intensity"].astype(float), intensity_limits=(0, 65535),
                          returns=(pts["ReturnNumber"].astype(int) - 1, pts["NumberOfReturns"].astype(int))))
        (folder / row["file"]).unlink()
    write_e57(folder / "survey.e57", scans)   # no coordinateMetadata: site.toml's default_crs
    last = max(posed, key=lambda r: r["time"])
    lines = ["file,station_id,time,x,y,z,roll_deg,pitch_deg,yaw_deg", f"survey.e57,all,{last['time']},,,,,,"]
    lines += [f"{r['file']},{r['station_id']},{r['time']},,,,,," for r in rows if not r["x"]]
    (folder / "stations.csv").write_text("\n".join(lines) + "\n")


def test_sample_site_as_e57_closes_with_the_same_volumes(sample_copy, tmp_path, write_e57, survey_cache,
                                                         monkeypatch):
    import shutil

    laz_site = tmp_path / "laz_site"
    shutil.copytree(sample_copy, laz_site)
    with monkeypatch.context() as mp:   # the LAZ survey as the session measured it once
        mp.setattr("inventory.survey.measure.measure_survey", survey_cache)
        laz = close_period(laz_site, "2026-09").result.piles.set_index("pile_id")
    _to_e57(sample_copy / "surveys" / DATE, write_e57)
    e57 = close_period(sample_copy, "2026-09").result.piles.set_index("pile_id")
    assert sorted(e57.index) == sorted(laz.index)
    for col in ("volume_m3", "survey_t"):
        np.testing.assert_allclose(e57.loc[laz.index, col].to_numpy(float), laz[col].to_numpy(float),
                                   rtol=1e-6, atol=1e-3, err_msg=col)
