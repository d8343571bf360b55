"""The survey's compiled kernels (inventory.survey.kernels) against SciPy and brute force."""

from __future__ import annotations

import numpy as np
from scipy.spatial import Delaunay, cKDTree

from inventory.survey.gridding import _linear_on_lattice
from inventory.survey.kernels import (CellIndex, _knn3, below_tests, envelope_at, has_company, knn3_mean, min_envelope,
                                      plan_knn)


def _cloud(n=4000, seed=2):
    rng = np.random.default_rng(seed)
    # clustered: a dense patch, a sparse field, a vertical wall, and repeated coordinates
    x = np.r_[rng.random(n // 2) * 3, rng.random(n // 4) * 60, np.full(n // 8, 20.0), np.round(rng.random(n // 8), 1)]
    y = np.r_[rng.random(n // 2) * 3, rng.random(n // 4) * 40, rng.random(n // 8) * 5, np.round(rng.random(n // 8), 1)]
    z = np.r_[rng.random(n // 2), rng.random(n // 4) * 2, rng.random(n // 8) * 4, np.zeros(n // 8)]
    return x, y, z


def test_plan_knn_matches_a_kd_tree():
    # scipy.spatial.cKDTree gives the exact k nearest: the same distances, nearest first
    x, y, z = _cloud()
    d, nb = plan_knn(CellIndex(x, y, k=17), x, y, 17)
    dd, _ = cKDTree(np.column_stack([x, y])).query(np.column_stack([x, y]), k=17)
    np.testing.assert_array_equal(d, dd)
    np.testing.assert_allclose(np.hypot(x[nb] - x[:, None], y[nb] - y[:, None]), d)
    # among the members of a subset only, asked from points outside it too
    members = np.random.default_rng(0).random(len(x)) < 0.3
    d, nb = plan_knn(CellIndex(x, y, members, k=5), x, y, 5)
    dd, _ = cKDTree(np.column_stack([x, y])[members]).query(np.column_stack([x, y]), k=5)
    np.testing.assert_array_equal(d, dd)
    assert members[nb].all()


def test_fewer_members_than_asked_give_inf():
    x, y = np.array([0.0, 1.0, 5.0]), np.array([0.0, 0.0, 0.0])
    d, nb = plan_knn(CellIndex(x, y), x, y, 4)
    assert d[0].tolist() == [0.0, 1.0, 5.0, np.inf] and nb[0].tolist() == [0, 1, 2, -1]


def test_knn3_mean_matches_brute_force():
    x, y, z = _cloud(1200, seed=4)
    xyz = np.column_stack([x, y, z])
    d = np.sqrt(((xyz[:, None, :] - xyz[None, :, :]) ** 2).sum(-1))
    np.fill_diagonal(d, np.inf)   # the point itself is left out
    d.sort(axis=1)
    rows = np.arange(0, len(x), 3)
    got = knn3_mean(CellIndex(x, y, k=8), x, y, z, rows, 8)
    np.testing.assert_allclose(got, d[rows, :8].mean(axis=1), rtol=1e-12)


def test_knn3_mean_sums_as_numpy_does():
    # the kernel keeps no table of distances; its mean must equal numpy's mean of that
    # table to the bit (numpy sums a row of 8 or more pairwise, of fewer in order), for
    # every k the outlier filter may be given
    x, y, z = _cloud(2000, seed=9)
    rows = np.arange(len(x))
    index = CellIndex(x, y, k=16)
    for k in (1, 3, 7, 8, 9, 15, 16, 17, 24, 31):
        dd, _ = _knn3(index, x, y, z, k, rows.astype(np.int64), z)   # the table, then its mean
        np.testing.assert_array_equal(knn3_mean(index, x, y, z, rows, k), dd.mean(axis=1), err_msg=f"k={k}")


def test_point_tests_match_their_array_form():
    # the array form is how inventory.survey.ground computed them before the kernels
    x, y, z = _cloud(3000, seed=6)
    d, nb = plan_knn(CellIndex(x, y, k=17), x, y, 17)
    d, nb = d[:, 1:], nb[:, 1:]
    t, tol, gap = np.tan(np.radians(50.0)), 0.1, 2.0
    dz = z[nb] - z[:, None]
    reach = t * d + tol
    close = d <= 1.0
    above = (dz > reach) & close
    near = (dz <= reach + gap) & close
    n_near = near.sum(1)
    plan_ref = (n_near >= 4) & ((near & above).sum(1) >= 0.9 * n_near)
    deep_ref = 2 * above.sum(1) >= 16
    # the kernels take the neighbours' numbers alone (int32) and work the distances out
    # again from the coordinates: the same bits as the search's
    nb32 = plan_knn(CellIndex(x, y, k=17), x, y, 17, dist=False)
    assert nb32.dtype == np.int32
    np.testing.assert_array_equal(nb32[:, 1:], nb)
    rows = np.arange(len(z))
    plan, deep = below_tests(nb32[:, 1:], rows, x, y, z, t, tol, gap, 16)
    np.testing.assert_array_equal(plan, plan_ref)
    np.testing.assert_array_equal(deep, deep_ref)
    assert plan.any() and deep.any()
    np.testing.assert_array_equal(min_envelope(nb32[:, 1:], rows, x, y, z, t), (z[nb] + t * d).min(1))
    # a member within 2 m in 3D among the neighbours, as the isolation rule asked it
    member = np.random.default_rng(3).random(len(z)) < 0.5
    ref = (member[nb] & (d ** 2 + (z[nb] - z[:, None]) ** 2 <= 4.0)).any(1)
    np.testing.assert_array_equal(has_company(nb32[:, 1:], rows, x, y, z, member, 2.0), ref)
    assert ref.any() and not ref.all()


def test_lattice_fill_matches_scipy_griddata_form():
    # scipy.interpolate.griddata(method="linear") is the barycentric value in the Delaunay
    # triangle holding the target; long triangles (across a wide gap) take the kernel path
    rng = np.random.default_rng(1)
    near = rng.random((60, 80)) < 0.08
    near[20:45, 10:70] = False
    target = ~near
    z = rng.random(near.shape)
    got = _linear_on_lattice(near, target, z)
    vr, vc = np.nonzero(near)
    tri = Delaunay(np.column_stack([vc, -vr]).astype(float))
    tr, tc = np.nonzero(target)
    p = np.column_stack([tc, -tr]).astype(float)
    s = tri.find_simplex(p)
    inside = s >= 0
    assert np.isnan(got[~inside]).all()
    b = np.einsum("ijk,ik->ij", tri.transform[s[inside], :2], p[inside] - tri.transform[s[inside], 2])
    bary = np.column_stack([b, 1 - b.sum(1)])
    ref = (z[near][tri.simplices[s[inside]]] * bary).sum(1)
    np.testing.assert_allclose(got[inside], ref, atol=1e-9)


def test_outlier_means_from_the_plan_table_are_the_searched_ones():
    # knn3_mean_from_plan answers from a table of the 17 nearest in plan where that table
    # provably holds the 8 nearest in 3D, and says where it does not: on a wall (points
    # stacked in plan) the table cannot answer, on flat ground it can
    from inventory.survey.ground import plan_table
    from inventory.survey.kernels import knn3_mean_from_plan

    rng = np.random.default_rng(11)
    # flat ground (10 m x 10 m, 30 points/m2) and a wall standing on it (x = 5, 4 m high)
    x = np.r_[rng.random(3000) * 10, np.full(600, 5.0) + rng.normal(0, 0.005, 600)]
    y = np.r_[rng.random(3000) * 10, rng.random(600) * 10]
    z = np.r_[rng.normal(0, 0.01, 3000), rng.random(600) * 4]
    tab = plan_table(x, y)
    o = tab.order
    xo, yo, zo = x[o], y[o], z[o]
    got, short = knn3_mean_from_plan(tab.plan.nb, xo, yo, zo, 8)
    ref = knn3_mean(CellIndex(xo, yo, k=16), xo, yo, zo, np.arange(len(xo)), 8)
    np.testing.assert_array_equal(got[~short], ref[~short])
    wall = o >= 3000
    far = (np.abs(xo - 5.0) > 1.0) & ~wall
    assert short[wall].mean() > 0.5 and short[far].mean() < 0.05
    # and the outlier mask is the same whichever way it was found
    from inventory.survey.clean import statistical_outliers

    xyz = np.column_stack([x, y, z])
    np.testing.assert_array_equal(statistical_outliers(xyz, 8, 2.0, plan=tab.plan.nb),
                                  statistical_outliers(xyz, 8, 2.0))


def test_envelope_at_is_the_least_of_the_nine_cells():
    # the kernel skips a cell whose seed is no lower than the least so far (its cone only
    # adds); the answer is still the least over the 3 x 3 cells, to the bit
    rng = np.random.default_rng(11)
    nrow, ncol, c, t = 30, 40, 0.5, np.tan(np.radians(50.0))
    gf = rng.random(nrow * ncol) * 3.0
    gf[rng.random(nrow * ncol) < 0.2] = np.inf            # empty cells
    ax = (np.arange(ncol) + rng.random((nrow, ncol))).ravel() * c
    ay = (np.arange(nrow)[:, None] + rng.random((nrow, ncol))).ravel() * c
    qx = c + rng.random(5000) * (ncol - 2) * c
    qy = c + rng.random(5000) * (nrow - 2) * c
    col, row = np.floor(qx / c).astype(int), np.floor(qy / c).astype(int)
    ref = np.full(len(qx), np.inf)
    for dr in (-1, 0, 1):
        for dc in (-1, 0, 1):
            k = (row + dr) * ncol + col + dc
            ref = np.minimum(ref, np.hypot(qx - ax[k], qy - ay[k]) * t + gf[k])
    np.testing.assert_array_equal(envelope_at(qx, qy, 0.0, 0.0, c, ncol, gf, ax, ay, t), ref)
    assert np.isinf(ref).sum() < len(ref)


def test_isolation_and_rescue_give_the_same_on_the_plan_index():
    # _isolated and _within_surface_cone search the plan table's index cut to their points
    # instead of an index of their own: the same answers
    from inventory.survey.ground import SlopeGroundParams, _isolated, _within_surface_cone

    x, y, z = _cloud(4000, seed=9)
    rng = np.random.default_rng(9)
    # strays: far above, and a few alone far out
    x = np.r_[x, rng.random(30) * 30.0, 60.0, 66.0]
    y = np.r_[y, rng.random(30) * 30.0, 60.0, 60.0]
    z = np.r_[z, 5.0 + rng.random(30) * 10.0, 0.0, 0.0]
    index = CellIndex(x, y, k=17)
    use = rng.random(len(z)) < 0.9
    use[-32:] = True
    nb = plan_knn(index, x, y, 17, dist=False)[:, 1:]
    idx = np.flatnonzero(use | (rng.random(len(z)) < 0.5))
    near = {"idx": idx, "nb": nb[idx], "x": x[idx], "y": y[idx], "z": z[idx]}
    # the table's rows hold numbers among all points, as _below_neighbours hands them on
    near["nb"] = np.where(nb[idx] >= 0, np.searchsorted(idx, nb[idx]), -1)
    near["nb"][~np.isin(nb[idx], idx)] = -1
    ref = _isolated(x, y, z, use, near)
    got = _isolated(x, y, z, use, near, index)
    np.testing.assert_array_equal(got, ref)
    assert got[-2:].all() and got.sum() < 100   # the two far out, some of the sparse field
    params = SlopeGroundParams()
    top = np.flatnonzero(use & (z < 2.0))
    query = np.flatnonzero(~use)
    rng.shuffle(top)                # the order of `top` does not matter
    ref = _within_surface_cone(x, y, z, top, query, params)
    got = _within_surface_cone(x, y, z, top, query, params, index)
    np.testing.assert_array_equal(got, ref)
    assert got.any() and not got.all()
