"""The PDAL-style pipeline runner: parsing, stage semantics, clear errors."""

from __future__ import annotations

import json

import numpy as np
import pytest
import shapely
from scipy.spatial import cKDTree

from inventory.survey.clean import elm_low_points, limits_mask, parse_limits, statistical_outliers
from inventory.io.clouds import empty_points, read_cloud
from inventory.survey.pipeline import STAGES, Pipeline, load_pipeline, pdal_available
from inventory.errors import PipelineError


def _pts(n=2000, seed=0):
    rng = np.random.default_rng(seed)
    p = empty_points(n)
    p["X"], p["Y"], p["Z"] = rng.random(n) * 50, rng.random(n) * 50, rng.random(n) * 5
    p["Classification"] = rng.integers(0, 20, n)
    p["ReturnNumber"] = p["NumberOfReturns"] = 1
    return p


def run(stages, pts, crs="EPSG:25832"):
    return Pipeline.from_json(json.dumps(stages)).run(pts, crs, engine="builtin")[0]


def test_range_semantics_follow_pdal_dimrange():
    # PDAL filters/private/DimRange.cpp: same dimension OR-ed, different dimensions AND-ed;
    # NaN fails a plain range and passes a negated one; ( ) exclusive, [ ] inclusive.
    p = empty_points(6)
    p["Z"] = [0.0, 1.0, 2.0, 3.0, np.nan, 5.0]
    p["Classification"] = [2, 2, 7, 2, 2, 1]
    assert limits_mask(p, parse_limits("Z[1:3)")).tolist() == [False, True, True, False, False, False]
    assert limits_mask(p, parse_limits("Z![1:3)")).tolist() == [True, False, False, True, True, True]
    assert limits_mask(p, parse_limits("Z[:1],Z[5:]")).tolist() == [True, True, False, False, False, True]
    assert limits_mask(p, parse_limits("Z[0:5],Classification[2:2]")).tolist() == \
        [True, True, False, True, False, False]
    with pytest.raises(PipelineError, match="lower:upper"):
        parse_limits("Z<5")
    with pytest.raises(PipelineError, match="not in the point cloud"):
        limits_mask(p, parse_limits("HeightAboveGround[0:1]"))


def test_station_range_gates_keep_clouds_without_station():
    p = empty_points(4)
    p["StationRange"] = [0.5, 10.0, 500.0, np.nan]
    out = run([{"type": "filters.range", "limits": "StationRange![0:1.5)"},
               {"type": "filters.range", "limits": "StationRange!(150:]"}], p)
    assert np.isnan(out["StationRange"][-1]) and out["StationRange"][:-1].tolist() == [10.0]


def test_statistical_outliers_match_brute_force():
    # Rusu et al. 2008 as PDAL filters.outlier computes it: mean distance to mean_k
    # neighbours, threshold = mean + multiplier * sample sd, outlier when >= threshold.
    rng = np.random.default_rng(5)
    xyz = np.vstack([rng.random((500, 3)), rng.random((5, 3)) * 10 + 5])
    d = np.sqrt(((xyz[:, None, :] - xyz[None, :, :]) ** 2).sum(-1))
    d.sort(axis=1)
    mean_d = d[:, 1:9].mean(axis=1)
    ref = mean_d >= mean_d.mean() + 2.0 * mean_d.std(ddof=1)
    got = statistical_outliers(xyz, 8, 2.0)
    np.testing.assert_array_equal(got, ref)
    assert got[-5:].all()


def test_statistical_outliers_do_not_depend_on_point_order():
    # Neighbours are searched in Z-order of 1 m blocks; a cloud over many blocks, in any
    # order, gives the brute-force answer (as above) point for point.
    rng = np.random.default_rng(11)
    xyz = np.vstack([rng.random((1500, 3)) * [30.0, 20.0, 1.0], rng.random((8, 3)) * 40 + [0, 0, 5]])
    d = np.sqrt(((xyz[:, None, :] - xyz[None, :, :]) ** 2).sum(-1))
    d.sort(axis=1)
    mean_d = d[:, 1:5].mean(axis=1)
    ref = mean_d >= mean_d.mean() + 3.0 * mean_d.std(ddof=1)
    assert 0 < ref.sum() < 50
    for perm in (np.arange(len(xyz)), rng.permutation(len(xyz)), np.arange(len(xyz))[::-1]):
        np.testing.assert_array_equal(statistical_outliers(xyz[perm], 4, 3.0), ref[perm])


def test_elm_matches_pdal_walk():
    # PDAL ELMFilter::cull: per cell, from the lowest point up, mark while the gap to the
    # next point is >= threshold; the top point of a cell is never marked.
    x = np.array([0.5, 0.5, 0.5, 0.5, 1.5, 1.5])
    y = np.full(6, 0.5)
    z = np.array([10.0, 7.0, 8.5, 10.2, 3.0, 9.0])
    got = elm_low_points(x, y, z, cell=1.0, threshold=1.0)
    # cell 0 sorted: 7.0 (gap 1.5 -> noise), 8.5 (gap 1.5 -> noise), 10.0 (gap 0.2 -> stop)
    # cell 1: 3.0 (gap 6 -> noise), 9.0 top
    assert got.tolist() == [False, True, True, False, True, False]


def test_outlier_and_assign_stages():
    p = _pts()
    p["Z"][:3] = 100.0
    out = run([{"type": "filters.assign", "assignment": "Classification[:]=1"},
               {"type": "filters.outlier", "method": "statistical", "mean_k": 8, "multiplier": 3.0}], p)
    assert (out["Classification"][:3] == 7).all()
    assert set(np.unique(out["Classification"])) == {1, 7}
    out = run([{"type": "filters.assign", "value": "Classification = 2", "condition": "Z[0:1]"}], _pts())
    assert ((out["Classification"] == 2) | (out["Z"] > 1)).all()
    with pytest.raises(PipelineError, match="outside our subset"):
        run([{"type": "filters.assign", "value": "Classification = 2 WHERE Z > 1"}], _pts())


def test_crop_polygon_matches_shapely():
    p = _pts()
    poly = "POLYGON ((10 10, 40 12, 30 40, 12 30, 10 10))"
    out = run([{"type": "filters.crop", "polygon": poly}], p)
    ref = shapely.contains_xy(shapely.from_wkt(poly), p["X"], p["Y"])  # reference: shapely
    assert len(out) == ref.sum()
    out = run([{"type": "filters.crop", "polygon": poly, "outside": True}], p)
    assert len(out) == (~ref).sum()
    out = run([{"type": "filters.crop", "bounds": "([0, 25], [0, 25])"}], p)
    assert ((out["X"] <= 25) & (out["Y"] <= 25)).all() and len(out) > 0


def test_reader_reprojection_writer(tmp_path):
    from inventory.io.clouds import write_cloud

    p = _pts()
    p["X"] += 2_000_000
    p["Y"] += 600_000
    src = write_cloud(tmp_path / "in.las", p, "EPSG:2264")
    dst = tmp_path / "out.laz"
    pipe = Pipeline.from_json(json.dumps([str(src), {"type": "filters.reprojection", "out_srs": "EPSG:32119"},
                                          {"type": "writers.las", "filename": str(dst)}]))
    out, crs = pipe.run(engine="builtin")
    assert crs.to_epsg() == 32119
    back, bcrs = read_cloud(dst)
    assert bcrs.to_epsg() == 32119 and len(back) == len(p)
    # US survey feet to metres, z too (1200/3937 m per ftUS)
    stored, _ = read_cloud(src)   # the input as stored (1 mm of a foot)
    np.testing.assert_allclose(back["Z"], stored["Z"] * 1200 / 3937, atol=0.0005 + 1e-9)


def test_unknown_stage_and_option_are_errors():
    with pytest.raises(PipelineError, match="unknown stage type 'filters.smrf'"):
        Pipeline.from_json('[{"type": "filters.smrf"}]')
    with pytest.raises(PipelineError, match="unknown option.*mean_kk"):
        Pipeline.from_json('[{"type": "filters.outlier", "mean_kk": 8}]')
    with pytest.raises(PipelineError, match="'limits' is required"):
        Pipeline.from_json('[{"type": "filters.range"}]')
    with pytest.raises(PipelineError, match="only take its default"):
        run([{"type": "filters.csf", "hdiff": 0.5}], _pts())
    with pytest.raises(PipelineError, match="not valid JSON"):
        Pipeline.from_json("[{")
    with pytest.raises(PipelineError, match="linear"):
        Pipeline.from_json('[{"type": "filters.range", "limits": "Z[0:1]", "tag": "a"},'
                           ' {"type": "filters.range", "limits": "Z[0:1]", "inputs": ["b"]}]')


def test_csf_stage_separates_box_from_plane():
    # CSF (Zhang et al. 2016) on a flat plane with a 3 m box: the plane is ground, the box top not.
    rng = np.random.default_rng(2)
    n = 20000
    p = empty_points(n)
    p["X"], p["Y"] = rng.random(n) * 40, rng.random(n) * 40
    box = (p["X"] > 15) & (p["X"] < 25) & (p["Y"] > 15) & (p["Y"] < 25)
    p["Z"] = np.where(box, 3.0, 0.0) + rng.normal(0, 0.01, n)
    p["ReturnNumber"] = p["NumberOfReturns"] = 1
    out = run([{"type": "filters.csf", "resolution": 1.0, "rigidness": 3}], p)
    cls = out["Classification"]
    assert (cls[~box] == 2).mean() > 0.99
    assert (cls[box] == 1).mean() > 0.95


def test_packaged_pipelines_parse(repo_root):
    for path in sorted((repo_root / "inventory" / "survey" / "pipelines").glob("*.json")):
        Pipeline.from_file(path)
    assert [s.type for s in load_pipeline().stages][-1] == "inventory.slope_ground"


def test_every_stage_has_a_runner():
    assert all(spec.run is not None for spec in STAGES.values())


@pytest.mark.skipif(not pdal_available(), reason="PDAL's Python bindings are not installed")
def test_pdal_engine_agrees_with_builtin():
    # Reference: PDAL itself, for the PDAL-native stages of the packaged pipeline.
    p = _pts()
    stages = [{"type": "filters.range", "limits": "Z[1:4]"},
              {"type": "filters.outlier", "method": "statistical", "mean_k": 8, "multiplier": 2.0}]
    a = Pipeline.from_json(json.dumps(stages)).run(p, "EPSG:25832", engine="pdal")[0]
    b = Pipeline.from_json(json.dumps(stages)).run(p, "EPSG:25832", engine="builtin")[0]
    assert len(a) == len(b)
    np.testing.assert_array_equal(np.sort(a["Classification"]), np.sort(b["Classification"]))


def test_engine_pdal_without_pdal_is_clear():
    if pdal_available():
        pytest.skip("PDAL is installed here")
    with pytest.raises(PipelineError, match="PDAL's Python bindings"):
        Pipeline.from_json('[{"type": "filters.range", "limits": "Z[0:1]"}]').run(_pts(), engine="pdal")


def test_voxel_thin_keeps_lowest_highest_and_caps_each_voxel():
    rng = np.random.default_rng(8)
    p = empty_points(3000)
    # a dense 0.3 m x 0.3 m patch: 36 voxels of 5 cm a side over 0.2 m of height
    p["X"], p["Y"] = 100.0 + rng.random(3000) * 0.3, 200.0 + rng.random(3000) * 0.3
    p["Z"] = 10.0 + rng.random(3000) * 0.2
    out = run([{"type": "inventory.voxel_thin", "cell": 0.05, "max_points": 3}], p)
    key = lambda a: (np.floor(a["X"] / 0.05) * 1e6 + np.floor(a["Y"] / 0.05) * 1e3  # noqa: E731
                     + np.floor(a["Z"] / 0.05))
    k_in, k_out = key(p), key(out)
    voxels, n_in = np.unique(k_in, return_counts=True)
    _, n_out = np.unique(k_out, return_counts=True)
    assert set(np.unique(k_out)) == set(voxels)             # no voxel emptied
    np.testing.assert_array_equal(n_out, np.minimum(n_in, 3))
    for v in voxels[:20]:
        assert out["Z"][k_out == v].min() == p["Z"][k_in == v].min()
        assert out["Z"][k_out == v].max() == p["Z"][k_in == v].max()
    # which points are kept does not depend on their order
    perm = rng.permutation(len(p))
    again = run([{"type": "inventory.voxel_thin", "cell": 0.05, "max_points": 3}], p[perm])
    assert sorted(again["Z"].tolist()) == sorted(out["Z"].tolist())
    with pytest.raises(PipelineError, match="max_points must be at least 2"):
        run([{"type": "inventory.voxel_thin", "max_points": 1}], p)


def test_thinned_points_are_reported_by_the_run():
    p = empty_points(50)
    p["X"], p["Y"], p["Z"] = 1.01, 2.01, np.linspace(3.0, 3.04, 50)   # one voxel
    stats: dict = {}
    out, _ = Pipeline.from_json('[{"type": "inventory.voxel_thin"}]').run(p, "EPSG:25832", engine="builtin",
                                                                          stats=stats)
    assert len(out) == 4 and stats["thinned_xy"].shape == (46, 2)
    assert out["Z"].min() == 3.0 and out["Z"].max() == 3.04


def test_run_leaves_the_callers_points_unless_given_away():
    rng = np.random.default_rng(4)
    pts = empty_points(2000)
    pts["X"], pts["Y"], pts["Z"] = rng.random(2000) * 20, rng.random(2000) * 20, rng.random(2000) * 0.05
    pts["Classification"] = 5
    before = pts.copy()
    pipe = load_pipeline()
    out, _ = pipe.run(pts, "EPSG:25832", engine="builtin")
    assert pts.tobytes() == before.tobytes()              # a copy was classified
    assert (out["Classification"] == 2).mean() > 0.95      # a flat pad: surface (ASPRS class 2)
    got, _ = pipe.run(pts, "EPSG:25832", engine="builtin", consume=True)
    assert got.tobytes() == out.tobytes()                  # the same answer ...
    assert np.shares_memory(got, pts)                      # ... on the array given away
