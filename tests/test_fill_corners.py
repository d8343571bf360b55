"""Hole filling on the rim of the seeds (inventory.survey.gridding.fill_corners) against a
Delaunay triangulation of every near cell, with exact integer predicates."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage

from inventory.model.grid import Grid, Surface, lone_patches
from inventory.survey.gridding import _lattice_triangle_at, fill_corners, fill_holes, lattice_rim


def test_lattice_rim_cells():
    near = np.zeros((7, 8), bool)
    near[1:6, 1:7] = True         # a 5 x 6 block
    near[3, 4] = False            # a one-cell hole
    near[0:3, 7] = True           # cells on the grid border
    rim = lattice_rim(near)
    # a cell with all 4 edge neighbours in near is inside; its diagonal ones do not count
    assert not rim[2, 3] and not rim[4, 5] and not rim[2, 2]
    assert rim[3, 3] and rim[2, 4] and not rim[2, 5] and rim[1, 1] and rim[0, 7] and rim[3, 6]
    assert not rim[2, 6]          # (2, 7) beside it is in near
    rng = np.random.default_rng(3)
    for _ in range(5):
        near = rng.random((20, 30)) < 0.8
        expect = np.zeros_like(near)
        for r, c in zip(*np.nonzero(near)):
            expect[r, c] = any(not (0 <= r + dr < 20 and 0 <= c + dc < 30 and near[r + dr, c + dc])
                               for dr, dc in ((1, 0), (-1, 0), (0, 1), (0, -1)))
        np.testing.assert_array_equal(lattice_rim(near), expect)


def test_one_cell_hole_takes_either_diagonal():
    # A one-cell hole between four scanned edge neighbours is the centre of their circle:
    # both diagonals are Delaunay and the hole lies on either, so its value is the mean of
    # north and south or of west and east (a cocircular tie), never anything else. Only the
    # four neighbours and the grid border are triangulated (fill_corners).
    rng = np.random.default_rng(5)
    g = Grid(0.0, 9.0, 1.0, 9, 9, "EPSG:25832")
    for _ in range(5):
        z = rng.random(g.shape) * 10
        count = np.ones(g.shape, np.int32)
        z[4, 4], count[4, 4] = np.nan, 0
        out, rep = fill_holes(Surface(g, z, count, np.full(g.shape, np.nan), np.zeros(g.shape, bool)), 2.0)
        assert rep.filled_cells == 1 and out.filled[4, 4]
        ns, we = (z[3, 4] + z[5, 4]) / 2, (z[4, 3] + z[4, 5]) / 2
        assert min(abs(out.z[4, 4] - ns), abs(out.z[4, 4] - we)) < 1e-12
    seeds = count > 0
    corners = fill_corners(seeds, seeds)
    inner = corners[1:-1, 1:-1]
    assert inner.sum() == 4 and inner[2, 3] and inner[4, 3] and inner[3, 2] and inner[3, 4]


def _lattice_case(seed: int, size: int = 56) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """``scanned``, ``seeds``, ``target`` and ``near`` as fill_holes builds them (cells of
    1 m, fill distance 6 m) on a random scan: ragged shadows, a wide gap with a lone cell
    in it, a gap on the grid border, one-cell holes, short dropouts."""
    rng = np.random.default_rng(seed)
    scanned = ndimage.gaussian_filter(rng.random((size, size)), 2.5) < 0.54
    r, c = rng.integers(8, size - 24, 2)
    scanned[r:r + rng.integers(6, 20), c:c + rng.integers(6, 20)] = False
    scanned[r + 3, c + 3] = True
    scanned[: rng.integers(2, 8), rng.integers(0, size - 12):][:, :12] = False
    scanned[rng.random((size, size)) < 0.04] = False
    for _ in range(6):
        r, c = rng.integers(0, size - 4, 2)
        scanned[r, c:c + rng.integers(1, 5)] = False
    seeds = scanned & ~lone_patches(scanned)
    target = ~scanned & (ndimage.distance_transform_edt(~seeds) <= 6)
    near = ndimage.binary_dilation(target, iterations=8) & seeds
    return scanned, seeds, target, near


def _incircle(tri: np.ndarray, px: np.ndarray, py: np.ndarray, ncol: int) -> np.ndarray:
    """Exact (integer) in-circle determinant of points (px, py) against the circumcircle of
    the cells ``tri`` (flat indices): > 0 strictly inside, 0 on it."""
    r, c = np.divmod(tri, ncol)
    x, y = c.astype(np.int64), -r.astype(np.int64)
    if (x[1] - x[0]) * (y[2] - y[0]) - (y[1] - y[0]) * (x[2] - x[0]) < 0:
        x, y = x[[0, 2, 1]], y[[0, 2, 1]]
    ax, ay, bx, by, cx, cy = x[0] - px, y[0] - py, x[1] - px, y[1] - py, x[2] - px, y[2] - py
    return ((ax * ax + ay * ay) * (bx * cy - by * cx) - (bx * bx + by * by) * (ax * cy - ay * cx)
            + (cx * cx + cy * cy) * (ax * by - ay * bx))


def test_fill_corners_hold_the_same_delaunay_triangles():
    # The fill triangulates only the near cells on the rim of the seeds (fill_corners).
    # Checked with exact integer predicates against the Delaunay triangulation of every
    # near cell (Qhull through scipy.spatial.Delaunay), the way the fill did before: no seed
    # lies strictly inside the circumcircle of a triangle holding a target, and its corners
    # are among fill_corners; each triangle of fill_corners holding a target holds it and
    # has no near cell strictly inside its circumcircle (it is Delaunay for all of them);
    # the same targets are left outside every triangle; and where the triangle of all near
    # cells is the only Delaunay one (no fourth cell on its circle, target not on an edge),
    # fill_holes gives its barycentric value.
    unique = 0
    for seed in range(6):
        scanned, seeds, target, near = _lattice_case(seed)
        assert lone_patches(scanned).any()
        ncol = near.shape[1]
        corners = fill_corners(seeds, near)
        assert corners.sum() < 0.5 * near.sum()
        full = _lattice_triangle_at(near, target)
        part = _lattice_triangle_at(corners, target)
        np.testing.assert_array_equal(full[:, 0] < 0, part[:, 0] < 0)
        ok = full[:, 0] >= 0
        assert ok.mean() > 0.9
        assert corners.ravel()[full[ok]].all()
        nr, nc = np.nonzero(near)
        sr, sc = np.nonzero(seeds)
        tr, tc = np.divmod(np.flatnonzero(target.ravel()), ncol)
        z = np.random.default_rng(seed).random(near.shape)
        g = Grid(0.0, float(near.shape[0]), 1.0, near.shape[0], ncol, "EPSG:25832")
        filled, _ = fill_holes(Surface(g, np.where(scanned, z, np.nan), scanned.astype(np.int32),
                                       np.full(g.shape, np.nan), np.zeros(g.shape, bool)), 6.0)
        np.testing.assert_array_equal(filled.filled[target], ok)
        got = filled.z[target]
        for i in np.flatnonzero(ok):
            assert (_incircle(full[i], sc, -sr, ncol) <= 0).all()   # no seed inside
            r, c = np.divmod(part[i], ncol)
            x, y = c.astype(np.int64), -r.astype(np.int64)
            cross = [(x[(e + 1) % 3] - x[e]) * (-tr[i] - y[e]) - (y[(e + 1) % 3] - y[e]) * (tc[i] - x[e])
                     for e in range(3)]
            assert min(cross) >= 0 or max(cross) <= 0            # holds its target
            assert (_incircle(part[i], nc, -nr, ncol) <= 0).all()   # Delaunay among all near cells
            if (_incircle(full[i], nc, -nr, ncol) == 0).sum() == 3 and 0 not in cross:
                unique += 1
                assert sorted(part[i]) == sorted(full[i])
                r, c = np.divmod(full[i], ncol)
                w = np.linalg.solve(np.array([c, -r, np.ones(3)], float), [tc[i], -tr[i], 1.0])
                assert got[i] == pytest.approx(w @ z.ravel()[full[i]], abs=1e-9)
    assert unique > 1000
