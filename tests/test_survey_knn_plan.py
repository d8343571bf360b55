"""The plan search of inventory.survey.kernels (plan_knn; _knn with heights, the 3D scan
of whole columns) against brute force: every neighbour and its place, equal distances
ordered by point number, on lattices whose ties straddle cell edges and far from the
origin, among subsets (CellIndex.subset) and with each query's own point skipped."""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from inventory.survey.kernels import CellIndex, _knn, plan_knn


@st.composite
def _clouds(draw):
    """Scattered points of one density or two (a dense patch in a sparse field), points
    stacked at one x, y, repeated points, a lattice of 0.25 m (equal distances
    everywhere, on the edges of cells of whole or half metres), near the origin or at
    UTM-sized coordinates."""
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    spread = draw(st.sampled_from([0.5, 5.0, 40.0]))
    parts = [rng.random((draw(st.integers(0, 200)), 3)) * [spread, spread, 2.0]]
    if draw(st.booleans()):
        parts.append(rng.random((draw(st.integers(1, 150)), 3)) * [spread / 10, spread / 10, 2.0])
    for _ in range(draw(st.integers(0, 2))):
        m = draw(st.integers(1, 40))
        xy = rng.random(2) * spread
        parts.append(np.column_stack([np.full(m, xy[0]), np.full(m, xy[1]), rng.random(m) * 5.0]))
    if draw(st.booleans()):
        side = draw(st.integers(1, 12))
        g = np.arange(side) * 0.25
        gx, gy = (v.ravel() for v in np.meshgrid(g, g))
        parts.append(np.column_stack([gx, gy, rng.integers(0, 3, len(gx)) * 0.25]))
    xyz = np.concatenate(parts)
    if len(xyz) and draw(st.booleans()):
        xyz = np.concatenate([xyz, xyz[rng.integers(0, len(xyz), draw(st.integers(1, 10)))]])
    if len(xyz) == 0:
        xyz = rng.random((1, 3))
    if draw(st.booleans()):
        xyz = xyz + [500000.0, 6000000.0, 300.0]
    rng.shuffle(xyz)
    return xyz, rng


@settings(max_examples=150, deadline=None)
@given(_clouds(), st.integers(1, 20), st.sampled_from([None, 0.25, 0.5, 1.0]), st.sampled_from([1, 4, 17]),
       st.booleans())
def test_plan_and_3d_searches_are_the_brute_force_answer(brute_knn, cloud, k, cell, kcell, in3d):
    xyz, rng = cloud
    x, y, z = (np.ascontiguousarray(xyz[:, i]) for i in range(3))
    n = len(x)
    zz = z if in3d else None
    # cells of whole or half metres from a lattice corner put lattice ties on cell edges
    index = CellIndex(x, y, k=kcell, cell=cell)
    every = np.ones(n, bool)
    # queries: every point, and points beyond the bounds
    qx = np.r_[x, x.min() - 3.0, x.max() + 0.7, x.mean()]
    qy = np.r_[y, y.max() + 2.0, y.min(), y.max() + 40.0]
    qz = np.r_[z, z.mean(), z.max() + 10.0, z.min()]
    ref_d, ref_nb = brute_knn(x, y, zz, every, qx, qy, qz, k)
    d, nb = _knn(index, qx, qy, qz if in3d else None, k, None, zz)
    np.testing.assert_array_equal(nb, ref_nb)
    np.testing.assert_array_equal(d, ref_d)
    # numbers only (int32), as the surface stage asks
    if not in3d:
        np.testing.assert_array_equal(plan_knn(index, qx, qy, k, dist=False), ref_nb)
    # each point's own number skipped
    rows = np.arange(n)
    ref_d, ref_nb = brute_knn(x, y, zz, every, x, y, z, k, skip=rows)
    d, nb = _knn(index, x, y, z if in3d else None, k, rows, zz)
    np.testing.assert_array_equal(nb, ref_nb)
    np.testing.assert_array_equal(d, ref_d)
    # among a subset's members, cut from the index of every point and built on its own
    members = rng.random(n) < rng.choice([0.1, 0.5, 0.9])
    ref_d, ref_nb = brute_knn(x, y, zz, members, qx, qy, qz, k)
    for sub in (index.subset(members), CellIndex(x, y, members, k=kcell, cell=cell)):
        d, nb = _knn(sub, qx, qy, qz if in3d else None, k, None, zz)
        np.testing.assert_array_equal(nb, ref_nb)
        np.testing.assert_array_equal(d, ref_d)


def test_ties_on_a_cell_edge_beyond_the_first_ring(brute_knn):
    # a lattice of 1 m on cells of 1 m: the query (0.5, 0.5) has its four nearest at
    # 0.707 m, then eight at 1.58 m, four of them in the second ring of cells and on
    # its inner edges' far side: the point numbers decide which of the eight come first
    g = np.arange(-3.0, 4.0)
    x, y = (v.ravel() for v in np.meshgrid(g, g))
    rng = np.random.default_rng(5)
    perm = rng.permutation(len(x))
    x, y = x[perm], y[perm]
    index = CellIndex(x, y, cell=1.0)
    qx, qy = np.array([0.5]), np.array([0.5])
    for k in (4, 6, 9, 12):
        ref_d, ref_nb = brute_knn(x, y, None, np.ones(len(x), bool), qx, qy, None, k)
        d, nb = plan_knn(index, qx, qy, k)
        assert nb.tolist() == ref_nb.tolist() and d.tolist() == ref_d.tolist()
        if k > 4:
            # the first of the eight at the same distance are the lowest numbers
            far = ref_nb[0, 4:]
            eight = np.flatnonzero(np.isclose(np.hypot(x - 0.5, y - 0.5), np.sqrt(2.5)))
            assert far.tolist() == sorted(eight.tolist())[:k - 4]


@settings(max_examples=100, deadline=None)
@given(_clouds(), st.sampled_from([2, 5, 17]), st.floats(0.0, 0.5), st.floats(0.0, 0.3))
def test_within_a_subset_from_an_earlier_superset_is_the_direct_answer(cloud, k, drop1, drop2):
    # the surface stage asks the 17 nearest among the points left after two rounds of
    # noise; the second answer, built from the first, must be the one asked directly
    from inventory.survey.ground import _PlanNeighbours

    xyz, rng = cloud
    x, y = np.ascontiguousarray(xyz[:, 0]), np.ascontiguousarray(xyz[:, 1])
    first = rng.random(len(x)) >= drop1
    second = first & (rng.random(len(x)) >= drop2)
    if first.sum() < 2 or second.sum() < 2:
        return
    plan = _PlanNeighbours(x, y)
    before = plan.within(first, k)
    direct = plan.within(second, k)
    np.testing.assert_array_equal(plan.within(second, k, earlier=(first, before)), direct)
    # an earlier answer of another k, or of a set that is no superset, is not used
    np.testing.assert_array_equal(plan.within(first | ~second, k, earlier=(second, direct)),
                                  plan.within(first | ~second, k))
