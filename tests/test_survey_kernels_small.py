"""Compiled kernels of the survey's sorting and raster passes against the numpy code they
replaced (kept here as the reference): equal arrays, ties and edge cases included."""

from __future__ import annotations

import math

import numpy as np
import pytest

from inventory.survey.clean import elm_low_points, spatial_order
from inventory.survey.ground import _chamfer_min, _overhead, _region_cells
from inventory.survey.kernels import _stable_radix_order, cell_stats, cell_z_order, floor_cells


def _ref_spatial_order(x, y, cell=1.0):
    if len(x) == 0:
        return np.zeros(0, np.int64)
    ix = np.floor((x - x.min()) / cell).astype(np.uint64)
    iy = np.floor((y - y.min()) / cell).astype(np.uint64)
    key = np.zeros(len(x), np.uint64)
    one = np.uint64(1)
    for bit in range(21):
        b = np.uint64(bit)
        key |= ((ix >> b) & one) << np.uint64(2 * bit)
        key |= ((iy >> b) & one) << np.uint64(2 * bit + 1)
    return np.argsort(key, kind="stable")


def _ref_elm(x, y, z, cell=10.0, threshold=1.0):
    n = len(z)
    out = np.zeros(n, bool)
    if n < 2:
        return out
    col = np.floor((x - x.min()) / cell).astype(np.int64)
    row = np.floor((y - y.min()) / cell).astype(np.int64)
    key = row * (col.max() + 1) + col
    order = np.lexsort((z, key))
    ks, zs = key[order], z[order]
    same_next = np.zeros(n, bool)
    same_next[:-1] = ks[1:] == ks[:-1]
    gap_big = np.zeros(n, bool)
    with np.errstate(invalid="ignore"):     # inf - inf
        gap_big[:-1] = (zs[1:] - zs[:-1]) >= threshold
    gap_big &= same_next
    small = (~gap_big).astype(np.int64)
    cs = np.cumsum(small)
    start = np.ones(n, bool)
    start[1:] = ks[1:] != ks[:-1]
    before = np.where(start, cs - small, 0)
    before = np.maximum.accumulate(np.where(start, before, -1))
    out[order] = (cs - before) == 0
    return out


def _ref_overhead(x, y, z, h, cell, gap):
    n = len(z)
    if n == 0:
        return np.zeros(0, bool)
    col = np.floor((x - x.min()) / cell).astype(np.int64)
    row = np.floor((y - y.min()) / cell).astype(np.int64)
    key = row * (col.max() + 1) + col
    order = np.lexsort((z, key))
    ks, zs, hs = key[order], z[order], h[order]
    new_col = np.ones(n, bool)
    new_col[1:] = ks[1:] != ks[:-1]
    dz = np.empty(n)
    dz[0] = np.inf
    with np.errstate(invalid="ignore"):
        dz[1:] = zs[1:] - zs[:-1]
    clearance = np.where(new_col, hs, dz)
    layer_start = new_col | (dz >= gap)
    idx = np.maximum.accumulate(np.where(layer_start, np.arange(n), 0))
    out = np.zeros(n, bool)
    out[order] = clearance[idx] >= gap
    return out


def _ref_chamfer(g, weight):
    g = np.array(g, dtype=float)
    nrow, ncol = g.shape
    if nrow == 0 or ncol == 0:
        return g
    w1, w2, w5 = weight, weight * math.sqrt(2.0), weight * math.sqrt(5.0)
    ramp = weight * np.arange(ncol, dtype=float)
    tmp = np.empty(ncol)
    for rows in (range(nrow), range(nrow - 1, -1, -1)):
        p1 = p2 = None
        for r in rows:
            cur = g[r]
            if p1 is not None:
                np.minimum(cur, np.add(p1, w1, out=tmp), out=cur)
                np.minimum(cur[1:], np.add(p1[:-1], w2, out=tmp[1:]), out=cur[1:])
                np.minimum(cur[:-1], np.add(p1[1:], w2, out=tmp[:-1]), out=cur[:-1])
                np.minimum(cur[2:], np.add(p1[:-2], w5, out=tmp[2:]), out=cur[2:])
                np.minimum(cur[:-2], np.add(p1[2:], w5, out=tmp[:-2]), out=cur[:-2])
            if p2 is not None:
                np.minimum(cur[1:], np.add(p2[:-1], w5, out=tmp[1:]), out=cur[1:])
                np.minimum(cur[:-1], np.add(p2[1:], w5, out=tmp[:-1]), out=cur[:-1])
            left = np.minimum.accumulate(np.subtract(cur, ramp, out=tmp))
            left += ramp
            right = np.minimum.accumulate((cur + ramp)[::-1])[::-1]
            right -= ramp
            np.minimum(left, right, out=cur)
            p2, p1 = p1, cur
    return g


def _clouds():
    """Seeded clouds with equal heights, repeated positions, points on cell edges, one and
    two points, wide and narrow extents."""
    rng = np.random.default_rng(17)
    out = []
    for n, span in [(1, 5.0), (2, 5.0), (3, 0.0), (50, 3.0), (2000, 40.0), (20000, 150.0), (5000, 3000.0)]:
        x = 500000.0 + rng.random(n) * span
        y = 5700000.0 + rng.random(n) * span * 0.7
        z = 100.0 + np.round(rng.random(n) * 6, 1)          # many equal heights
        if n >= 50:
            k = n // 5
            x[:k] = np.round(x[:k])                          # on cell edges
            y[:k] = np.round(y[:k])
            x[k:2 * k] = x[0]                                # one position, many heights
            y[k:2 * k] = y[0]
            z[2 * k:2 * k + 10] = z[2 * k]
            z[rng.random(n) < 0.05] -= 3.0                   # low points below gaps
        out.append((x, y, z))
    # heights numpy sorts last or first: NaN, +-inf, and -0.0 beside 0.0, in few cells
    x, y, z = (v.copy() for v in out[4])
    z[::9] = np.nan
    z[1::23] = np.inf
    z[2::29] = -np.inf
    z[3::31] = -0.0
    z[4::31] = 0.0
    out.append((x, y, z))
    return out


def test_radix_order_is_a_stable_argsort():
    rng = np.random.default_rng(3)
    for n, top in [(0, 0), (1, 5), (7, 0), (1000, 3), (5000, 70000), (30000, 2 ** 40), (3000, 2 ** 62)]:
        key = rng.integers(0, top + 1, n).astype(np.int64)
        np.testing.assert_array_equal(_stable_radix_order(key, int(key.max()) if n else 0),
                                      np.argsort(key, kind="stable"))


def test_cell_z_order_is_lexsort():
    rng = np.random.default_rng(5)
    for n in (0, 1, 2, 40, 3000, 40000):
        key = rng.integers(0, max(n // 30, 1), n).astype(np.int64)
        z = np.round(rng.normal(size=n), 1)
        if n > 10:
            z[::7] = np.nan                        # numpy sorts NaN last
            z[3::11] = -0.0
            z[5::11] = 0.0
        got = cell_z_order(key, z, int(key.max()) if n else 0)
        np.testing.assert_array_equal(got, np.lexsort((z, key)))


def test_spatial_order_matches_the_numpy_morton_keys():
    for x, y, _ in _clouds():
        for cell in (1.0, 0.3, 7.0):
            np.testing.assert_array_equal(spatial_order(x, y, cell), _ref_spatial_order(x, y, cell))
    assert spatial_order(np.zeros(0), np.zeros(0)).tolist() == []


def test_elm_matches_the_numpy_walk():
    for x, y, z in _clouds():
        for cell, thr in ((2.0, 1.0), (10.0, 0.5), (1.0, 0.0), (3.0, -1.0)):
            got = elm_low_points(x, y, z, cell, thr)
            np.testing.assert_array_equal(got, _ref_elm(x, y, z, cell, thr))
    x, y, z = _clouds()[4]
    assert _ref_elm(x, y, z, 2.0, 1.0).sum() > 10     # the clouds do have low points


def test_overhead_matches_the_numpy_layers():
    rng = np.random.default_rng(9)
    for x, y, z in _clouds():
        h = np.round(rng.random(len(z)) * 4 - 1, 1)
        h[::13] = -np.inf
        for cell, gap in ((0.5, 2.0), (2.0, 1.0), (0.5, 0.0)):
            np.testing.assert_array_equal(_overhead(x, y, z, h, cell, gap), _ref_overhead(x, y, z, h, cell, gap))
    # a column: ground at 0 and 0.1 m, a beam at 3.0 and 3.1 m (2.9 m of space below it),
    # and a second column of one point 1 m above the envelope
    x, y = np.array([0.1, 0.2, 0.3, 0.2, 0.9]), np.array([0.1, 0.2, 0.1, 0.3, 0.1])
    z, h = np.array([3.1, 0.0, 3.0, 0.1, 1.0]), np.array([3.1, 0.0, 3.0, 0.1, 1.0])
    assert _overhead(x, y, z, h, 0.5, 2.0).tolist() == [True, False, True, False, False]
    assert _overhead(np.zeros(0), np.zeros(0), np.zeros(0), np.zeros(0), 0.5, 2.0).tolist() == []


@pytest.mark.parametrize("shape", [(0, 0), (0, 4), (1, 1), (1, 9), (9, 1), (2, 3), (37, 53), (120, 80)])
def test_chamfer_min_is_bit_identical(shape):
    rng = np.random.default_rng(shape[0] * 1000 + shape[1])
    for inf_share in (0.0, 0.7, 0.98, 1.0):
        g = rng.random(shape) * 20 + 95
        g[rng.random(shape) < inf_share] = np.inf
        g[rng.random(shape) < 0.05] = 101.5                  # equal values
        for w in (0.5 * math.tan(math.radians(50.0)), 1.0 * math.tan(math.radians(70.0)), 0.3):
            got, ref = _chamfer_min(g, w), _ref_chamfer(g, w)
            assert got.dtype == ref.dtype and got.shape == ref.shape
            assert np.array_equal(got, ref)
            assert np.array_equal(np.signbit(got), np.signbit(ref))
    g = np.full((5, 6), np.inf)
    g[2, 3] = 1.0
    got = _chamfer_min(g, 1.0)
    assert got[2, 3] == 1.0 and got[2, 0] == 4.0 and got[0, 4] == pytest.approx(1.0 + math.sqrt(5.0))   # a knight step


def test_floor_cells_is_numpy_floor_division():
    # numpy's float // is the floor of the exact quotient (Python's float_divmod), which
    # floor(a / b) misses where a / b rounds up to an integer: the kernel must do the same
    rng = np.random.default_rng(21)
    for c in (0.5, 0.1, 0.3, 2.0, 1.0 / 3.0):
        v = np.r_[500000.0 + rng.random(20000) * 300, 500000.0 + np.arange(3000) * c,
                  np.nextafter(500000.0 + np.arange(3000) * c, 0), 500000.0, 0.0, -0.0]
        for v0 in (float(v.min()), float(v.min()) - c, 499999.95):
            np.testing.assert_array_equal(floor_cells(v, v0, c), ((v - v0) // c).astype(np.int64))
    # a case where the two differ: 0.5 // 0.1 is 4 (0.1 is a little over a tenth)
    assert floor_cells(np.array([0.5]), 0.0, 0.1).tolist() == [4] and math.floor(0.5 / 0.1) == 5


def test_region_cells_match_numpy():
    for x, y, _ in _clouds():
        for c in (0.5, 0.1, 1.3):
            row, col, shape = _region_cells(x, y, c)
            rc = ((x - x.min()) // c).astype(np.int64)
            rr = ((y - y.min()) // c).astype(np.int64)
            np.testing.assert_array_equal(col, rc)
            np.testing.assert_array_equal(row, rr)
            assert shape == (int(rr.max()) + 1, int(rc.max()) + 1)


def test_cell_stats_match_bincount_and_ufunc_at():
    rng = np.random.default_rng(8)
    for n, size in ((0, 1), (1, 3), (50, 7), (30000, 900)):
        k = rng.integers(0, size, n).astype(np.int64)
        z = rng.normal(100, 5, n)
        z[::17] = np.round(z[::17])
        sel = rng.random(n) < 0.6
        count, total, lo, hi = cell_stats(k, z, sel, size)
        np.testing.assert_array_equal(count, np.bincount(k[sel], minlength=size))
        np.testing.assert_array_equal(total, np.bincount(k[sel], z[sel], minlength=size))   # same additions
        ref = np.full(size, np.inf)
        np.minimum.at(ref, k[sel], z[sel])
        np.testing.assert_array_equal(lo, ref)
        ref = np.full(size, -np.inf)
        np.maximum.at(ref, k[sel], z[sel])
        np.testing.assert_array_equal(hi, ref)
    # NaN spreads to its cell's extremes as in np.minimum.at
    count, total, lo, hi = cell_stats(np.array([0, 0, 1]), np.array([1.0, np.nan, 2.0]), np.ones(3, bool), 2)
    assert np.isnan(lo[0]) and np.isnan(hi[0]) and lo[1] == 2.0 and count.tolist() == [2, 1]


def test_outvoted_matches_its_numpy_form():
    # kernels.outvoted against the same count written with numpy: neighbours within tol of a
    # point's height, itself and missing neighbours (-1) left out, objects against surface.
    from inventory.survey.kernels import outvoted

    rng = np.random.default_rng(5)
    n, k = 400, 17
    z = rng.normal(0, 0.2, n)
    cls = rng.choice(np.array([1, 2, 7, 19], np.uint8), n)
    nb = rng.integers(-1, n, (n, k)).astype(np.int32)
    nb[:, 0] = np.arange(n)                                   # the point itself first
    objects = np.zeros(256, np.bool_)
    objects[[1, 19]] = True
    rows = np.flatnonzero(cls == 2)
    got = outvoted(nb, rows, z, cls, 2, objects, 0.1, 3, 1.5)
    q = nb[rows]
    ok = (q >= 0) & (q != rows[:, None])
    same = ok & (np.abs(z[np.where(ok, q, 0)] - z[rows][:, None]) <= 0.1)
    c = cls[np.where(ok, q, 0)]
    n_obj = (same & objects[c]).sum(1)
    n_gnd = (same & (c == 2)).sum(1)
    want = (n_obj >= 3) & (n_obj >= 1.5 * (n_gnd + 1))
    assert 0 < want.sum() < len(rows)       # both answers occur
    np.testing.assert_array_equal(got, want)


@pytest.mark.parametrize("seed", range(4))
def test_chamfer_around_blocked_cells_is_the_shortest_path(seed):
    # chamfer_passes_blocked against scipy's Dijkstra (scipy.sparse.csgraph) on the graph
    # of the 16 chamfer steps between free cells, from a source joined to every seed by
    # its value: the passes, repeated until nothing changes, follow paths that wind round
    # blocked walls (a single pair of passes does not). Blocked cells keep their value.
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import dijkstra

    from inventory.survey.kernels import chamfer_passes_blocked

    rng = np.random.default_rng(seed)
    nrow, ncol = 30, 41
    g = np.where(rng.random((nrow, ncol)) < 0.05, rng.random((nrow, ncol)) * 5, np.inf)
    block = np.zeros((nrow, ncol), bool)
    block[5:25, 10:12] = True                 # a wall two cells thick
    block[5:7, 10:35] = True                  # turning east: paths must wind round
    block[rng.random((nrow, ncol)) < 0.03] = True
    w = 0.25 * math.tan(math.radians(50.0))
    got = g.copy()
    chamfer_passes_blocked(got, w, block)
    steps = [(dr, dc) for dr in range(-2, 3) for dc in range(-2, 3)
             if (dr, dc) != (0, 0) and (abs(dr) < 2 and abs(dc) < 2 or abs(dr) + abs(dc) == 3)]
    idx = np.arange(nrow * ncol).reshape(nrow, ncol)
    src, dst, wt = [], [], []
    for dr, dc in steps:
        a = idx[max(-dr, 0):nrow - max(dr, 0), max(-dc, 0):ncol - max(dc, 0)]
        b = idx[max(dr, 0):nrow + min(dr, 0), max(dc, 0):ncol + min(dc, 0)]
        ok = ~block.ravel()[a.ravel()] & ~block.ravel()[b.ravel()]
        src.append(a.ravel()[ok]), dst.append(b.ravel()[ok]), wt.append(np.full(ok.sum(), w * math.hypot(dr, dc)))
    seeds = np.flatnonzero(np.isfinite(g.ravel()) & ~block.ravel())
    n = nrow * ncol
    lo = g.ravel()[seeds].min()
    src.append(np.full(len(seeds), n)), dst.append(seeds), wt.append(g.ravel()[seeds] - lo + 1e-9)
    graph = coo_matrix((np.concatenate(wt), (np.concatenate(src), np.concatenate(dst))), shape=(n + 1, n + 1))
    ref = dijkstra(graph.tocsr(), indices=n)[:n].reshape(nrow, ncol) + lo - 1e-9
    ref[block] = g[block]
    free = ~block
    np.testing.assert_allclose(got[free], ref[free], rtol=1e-9, atol=1e-6)
    assert np.array_equal(got[block], g[block])
    # the walls matter: without them the envelope is lower in places
    assert (got[free] > _chamfer_min(g, w)[free] + 1e-6).any()


def test_faces_over_counts_and_offsets_like_numpy():
    # faces_over against the same sums in numpy over the neighbour table (-1 entries and
    # the point itself left out; objects by class mask; plan reach and height band)
    from inventory.survey.kernels import faces_over

    rng = np.random.default_rng(9)
    n = 3000
    x, y, z = rng.random(n) * 10, rng.random(n) * 10, rng.random(n) * 3
    cls = rng.choice(np.array([1, 2, 7, 19], np.uint8), n)
    nb = rng.integers(-1, n, (n, 17)).astype(np.int32)
    nb[:, 0] = np.arange(n)
    objects = np.zeros(256, np.bool_)
    objects[[1, 19]] = True
    rows = np.flatnonzero(cls == 2)
    got_n, got_fx, got_fy = faces_over(nb, rows, x, y, z, cls, objects, 4.0, 0.1, 2.0)
    j = nb[rows].astype(np.int64)
    valid = (j >= 0) & (j != rows[:, None])
    q = np.where(valid, j, 0)
    dx, dy, dz = x[q] - x[rows, None], y[q] - y[rows, None], z[q] - z[rows, None]
    over = valid & objects[cls[q]] & (dx * dx + dy * dy <= 16.0) & (dz > 0.1) & (dz < 2.0)
    k = over.sum(axis=1)
    assert k.max() >= 3 and (k == 0).any()
    np.testing.assert_array_equal(got_n, k)
    with np.errstate(invalid="ignore"):
        np.testing.assert_allclose(got_fx, np.where(k > 0, (dx * over).sum(axis=1) / np.maximum(k, 1), 0.0), atol=1e-12)
        np.testing.assert_allclose(got_fy, np.where(k > 0, (dy * over).sum(axis=1) / np.maximum(k, 1), 0.0), atol=1e-12)
