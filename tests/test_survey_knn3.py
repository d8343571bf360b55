"""The 3D nearest-neighbour searches (inventory.survey.kernels: knn3_mean, plan_knn3; on
voxels or on the plan index's whole columns) against brute force, ties included, and
against SciPy's k-d tree."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.spatial import cKDTree

from inventory.survey.kernels import CellIndex, _knn3, fewer_within, knn3_mean, plan_knn, plan_knn3


@st.composite
def _clouds(draw):
    """Clouds as the yards give them and worse: scattered points, columns of points at one
    x, y (walls, machines), repeated points, coordinates on a lattice (ties everywhere),
    far from the origin (UTM-sized) or not."""
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    parts = []
    n_scatter = draw(st.integers(0, 150))
    spread = draw(st.sampled_from([0.5, 5.0, 40.0]))
    parts.append(rng.random((n_scatter, 3)) * [spread, spread, spread / 4])
    for _ in range(draw(st.integers(0, 3))):     # stacked columns
        m = draw(st.integers(1, 60))
        xy = rng.random(2) * spread
        parts.append(np.column_stack([np.full(m, xy[0]), np.full(m, xy[1]), rng.random(m) * draw(
            st.sampled_from([0.1, 3.0, 30.0]))]))
    if draw(st.booleans()):                      # a lattice: many equal distances
        m = draw(st.integers(1, 80))
        parts.append(rng.integers(0, 4, (m, 3)).astype(float) * 0.25)
    xyz = np.concatenate(parts) if parts else np.zeros((0, 3))
    if len(xyz) and draw(st.booleans()):         # repeated points
        xyz = np.concatenate([xyz, xyz[rng.integers(0, len(xyz), draw(st.integers(1, 20)))]])
    if len(xyz) == 0:
        xyz = rng.random((1, 3))
    if draw(st.booleans()):
        xyz = xyz + [500000.0, 6000000.0, draw(st.sampled_from([0.0, 100.0, 2500.0]))]
    rng.shuffle(xyz)
    return xyz, seed


@settings(max_examples=80, deadline=None)
@given(_clouds(), st.integers(1, 40), st.sampled_from([2, 8, 17, 40]), st.sampled_from([1.0, 8.0, 50.0]))
def test_plan_knn3_is_the_brute_force_answer(brute_knn, cloud, k, kcell, column_points):
    xyz, seed = cloud
    x, y, z = (np.ascontiguousarray(xyz[:, i]) for i in range(3))
    n = len(x)
    rng = np.random.default_rng(seed)
    members = rng.random(n) < 0.8
    # queries: members, non-members, and points beyond the cloud's bounds
    rows = np.flatnonzero(rng.random(n) < 0.5)
    qx = np.r_[x[rows], x.min() - 3.0, x.max() + 0.7]
    qy = np.r_[y[rows], y.max() + 2.0, y.min()]
    qz = np.r_[z[rows], z.mean(), z.max() + 10.0]
    ref_d, ref_nb = brute_knn(x, y, z, members, qx, qy, qz, k)
    index = CellIndex(x, y, members, k=kcell)
    for voxels in (True, False):
        d, nb = _knn3(index, qx, qy, qz, k, None, z, voxels=voxels, column_points=column_points)
        np.testing.assert_array_equal(nb, ref_nb, err_msg=f"voxels={voxels}")
        np.testing.assert_array_equal(d, ref_d, err_msg=f"voxels={voxels}")
    # the same members cut from an index of every point (CellIndex.subset)
    d, nb = plan_knn3(CellIndex(x, y, k=kcell).subset(members), x, y, z, rows, k)
    np.testing.assert_array_equal(nb, ref_nb[:len(rows)])
    np.testing.assert_array_equal(d, ref_d[:len(rows)])


@settings(max_examples=80, deadline=None)
@given(_clouds(), st.integers(1, 33))
def test_knn3_mean_is_numpys_mean_of_the_brute_force_row(brute_knn, cloud, k):
    xyz, seed = cloud
    x, y, z = (np.ascontiguousarray(xyz[:, i]) for i in range(3))
    rows = np.arange(len(x))[::2]
    ref_d, _ = brute_knn(x, y, z, np.ones(len(x), bool), x[rows], y[rows], z[rows], k, skip=rows)
    # to the bit: the kernels sum a row as numpy's mean does
    index = CellIndex(x, y, k=16)
    np.testing.assert_array_equal(knn3_mean(index, x, y, z, rows, k), ref_d.mean(axis=1))
    for voxels in (True, False):
        got, _ = _knn3(index, x[rows], y[rows], z[rows], k, rows, z, mode=2, voxels=voxels)
        np.testing.assert_array_equal(got[:, 0], ref_d.mean(axis=1), err_msg=f"voxels={voxels}")


def test_matches_a_kd_tree_far_from_the_origin():
    # scipy.spatial.cKDTree gives the exact k nearest; its distances are worked out in
    # another order, so equal to rounding
    rng = np.random.default_rng(3)
    ground = rng.random((20000, 3)) * [60.0, 60.0, 0.05]
    wall = np.column_stack([np.full(6000, 30.0) + rng.normal(0, 0.01, 6000), rng.random(6000) * 60,
                            rng.random(6000) * 8.0])
    mast = np.column_stack([np.full(500, 12.0), np.full(500, 7.0), rng.random(500) * 25.0])
    xyz = np.concatenate([ground, wall, mast]) + [500000.0, 6000000.0, 300.0]
    x, y, z = (np.ascontiguousarray(xyz[:, i]) for i in range(3))
    rows = np.arange(0, len(x), 5)
    tree = cKDTree(xyz)
    dd, _ = tree.query(xyz[rows], k=12)
    dm, _ = tree.query(xyz[rows], k=9)    # the point itself first (no repeated points here)
    for voxels in (True, False):
        d, nb = _knn3(CellIndex(x, y, k=17), x[rows], y[rows], z[rows], 12, None, z, voxels=voxels)
        np.testing.assert_allclose(d, dd, rtol=1e-12, atol=1e-12)
        np.testing.assert_allclose(np.linalg.norm(xyz[nb] - xyz[rows][:, None, :], axis=2), d, rtol=1e-12)
        got, _ = _knn3(CellIndex(x, y, k=16), x[rows], y[rows], z[rows], 8, rows, z, mode=2, voxels=voxels)
        np.testing.assert_allclose(got[:, 0], dm[:, 1:].mean(axis=1), rtol=1e-12)
    # the public functions, whichever search they choose
    np.testing.assert_allclose(plan_knn3(CellIndex(x, y, k=17), x, y, z, rows, 12)[0], dd, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(knn3_mean(CellIndex(x, y, k=16), x, y, z, rows, 8), dm[:, 1:].mean(axis=1), rtol=1e-12)


def test_more_neighbours_asked_than_there_are():
    x = np.array([0.0, 0.0, 0.0, 1.0])
    y = np.zeros(4)
    z = np.array([0.0, 5.0, 5.0, 0.0])
    for voxels in (True, False):
        d, nb = _knn3(CellIndex(x, y), x[1:2], y[1:2], z[1:2], 6, None, z, voxels=voxels)
        # the point itself, its repeat, then by distance
        assert nb[0].tolist() == [1, 2, 0, 3, -1, -1]
        np.testing.assert_array_equal(d[0], [0.0, 0.0, 5.0, np.sqrt(26.0), np.inf, np.inf])
        m, _ = _knn3(CellIndex(x, y), x[:1], y[:1], z[:1], 4, np.array([0]), z, mode=2, voxels=voxels)
        assert m[0, 0] == np.inf


def test_a_stray_point_far_above_costs_no_layers(brute_knn):
    # a column spanning 1e9 m (a stray return) is split into a few layers per point, not
    # into layers of the plan cell's size, and the answers stay exact
    rng = np.random.default_rng(5)
    xyz = rng.random((3000, 3))
    xyz[17, 2] = 1e9
    xyz[18, 2] = -1e9
    x, y, z = (np.ascontiguousarray(xyz[:, i]) for i in range(3))
    rows = np.r_[17, 18, np.arange(0, 3000, 50)]
    d, nb = _knn3(CellIndex(x, y, k=17), x[rows], y[rows], z[rows], 5, None, z, voxels=True)
    ref_d, ref_nb = brute_knn(x, y, z, np.ones(3000, bool), x[rows], y[rows], z[rows], 5)
    np.testing.assert_array_equal(nb, ref_nb)
    np.testing.assert_array_equal(d, ref_d)


@pytest.mark.parametrize("bad", [np.nan, np.inf])
def test_heights_that_are_not_numbers_are_never_neighbours(brute_knn, bad):
    # as before the voxels: such a distance never compares smaller than another
    rng = np.random.default_rng(8)
    xyz = rng.random((400, 3))
    xyz[[3, 40], 2] = bad
    x, y, z = (np.ascontiguousarray(xyz[:, i]) for i in range(3))
    rows = np.arange(0, 400, 3)
    ref_d, ref_nb = brute_knn(x, y, z, np.ones(400, bool), x[rows], y[rows], z[rows], 6)
    for voxels in (True, False):
        d, nb = _knn3(CellIndex(x, y), x[rows], y[rows], z[rows], 6, None, z, voxels=voxels)
        np.testing.assert_array_equal(nb, ref_nb)
        np.testing.assert_array_equal(d, ref_d)
        assert (nb[rows == 3] == -1).all()


def test_ties_across_a_cell_edge_go_by_point_number():
    # a lattice of 0.5 m on cells of 1 m from the origin: the query (0.5, 0.5, 0) has four
    # neighbours at 0.5 m, two in its own cell and two exactly on the edges of the next
    # ones, and those two carry the lowest numbers: a search that stops when the k-th
    # distance reaches the edge (rather than when it is nearer) returns the wrong two, as
    # the scan of whole columns does (a stop it shares with the plan search: unchanged)
    g = np.arange(5) * 0.5
    x, y = (v.ravel() for v in np.meshgrid(g, g))
    z = np.zeros(len(x))
    first = [np.flatnonzero((x == 1.0) & (y == 0.5))[0], np.flatnonzero((x == 0.5) & (y == 1.0))[0]]
    order = np.r_[first, np.setdiff1d(np.arange(len(x)), first)]
    x, y, z = x[order], y[order], z[order]
    q = np.flatnonzero((x == 0.5) & (y == 0.5))
    index = CellIndex(x, y, cell=1.0)
    assert index.x0 == 0.0 and index.y0 == 0.0
    # voxel columns of one cell (else the query's column would hold all four)
    d, nb = _knn3(index, x[q], y[q], z[q], 3, None, z, voxels=True, column_points=1.0)
    assert nb[0].tolist() == [q[0], 0, 1] and d[0].tolist() == [0.0, 0.5, 0.5]
    # the scan of whole columns, and the plan search on the same cells
    d, nb = _knn3(index, x[q], y[q], z[q], 3, None, z, voxels=False)
    assert nb[0].tolist() == [q[0], 0, 1] and d[0].tolist() == [0.0, 0.5, 0.5]
    d, nb = plan_knn(index, x[q], y[q], 3)
    assert nb[0].tolist() == [q[0], 0, 1] and d[0].tolist() == [0.0, 0.5, 0.5]
    # and in height: a column of points 0.25 m apart, ties above and below
    zc = np.arange(9) * 0.25
    xc, yc = np.zeros(9), np.zeros(9)
    rev = np.arange(9)[::-1].copy()          # the upper points carry the lower numbers
    d, nb = _knn3(CellIndex(xc, yc, cell=1.0), xc[4:5], yc[4:5], zc[rev][4:5], 3, None, zc[rev], voxels=True)
    assert nb[0].tolist() == [4, 3, 5] and d[0].tolist() == [0.0, 0.25, 0.25]


@settings(max_examples=80, deadline=None)
@given(_clouds(), st.integers(1, 6), st.sampled_from([(0.5, 1.0), (0.25, 0.25), (0.1, 3.0)]),
       st.sampled_from([2, 17, 40]))
def test_fewer_within_reads_the_kth_distance_of_the_3d_search(cloud, need, radii, kcell):
    # fewer than `need` members within r, the point itself counted, is the `need`-th
    # nearest (plan_knn3, exact: tested against brute force above) lying beyond r; the
    # lattice clouds put members at exactly r (0.25, 0.5, 1.0 m apart)
    xyz, seed = cloud
    x, y, z = (np.ascontiguousarray(xyz[:, i]) for i in range(3))
    rng = np.random.default_rng(seed)
    members = rng.random(len(x)) < 0.8
    rows = np.flatnonzero(rng.random(len(x)) < 0.6)
    index = CellIndex(x, y, members, k=kcell)
    small, big = fewer_within(index, x, y, z, rows, need, *radii)
    d, _ = plan_knn3(index, x, y, z, rows, need)
    np.testing.assert_array_equal(small, d[:, -1] > radii[0])
    np.testing.assert_array_equal(big, d[:, -1] > radii[1])
