"""The tile spill's compiled kernels (issue 17) against the numpy code they replaced.

``TileSpill.add`` groups each chunk's records by tile with a compiled counting sort that
moves them as rows of bytes, and ``job_points`` picks a chunk's own and buffer points in one
compiled pass. The numpy formulations they replaced are kept here as the reference: spill
files, counts, block counts, lowest height and every job's points must be the same bytes.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from inventory.io.clouds import ExtraDim, points_dtype
from inventory.model.grid import Grid
from inventory.survey.tiles import Job, TileSpill, job_points, plan_jobs

CELL = 0.5
EXTRA = (ExtraDim("Reflectance", "f4"), ExtraDim("Deviation", "u2", 3))


def reference_add(spill: TileSpill, pts: np.ndarray) -> int:
    """``TileSpill.add`` as it was: a stable argsort of the tiles and a gather of the records."""
    row, col, inside = spill.grid.index(pts["X"], pts["Y"])
    pts, row, col = pts[inside], row[inside], col[inside]
    if not len(pts):
        return int((~inside).sum())
    spill.zmin = min(spill.zmin, float(pts["Z"].min()))
    nbx = spill.blocks.shape[1]
    spill.blocks += np.bincount((row // spill.bc) * nbx + col // spill.bc,
                                minlength=spill.blocks.size).reshape(spill.blocks.shape)
    tile = (row // spill.tc) * spill.ntx + (col // spill.tc)
    order = np.argsort(tile, kind="stable")
    pts, tile = pts[order], tile[order]
    starts = np.flatnonzero(np.r_[True, tile[1:] != tile[:-1]])
    ends = np.r_[starts[1:], len(tile)]
    for a, b in zip(starts, ends):
        t = int(tile[a])
        with open(spill.path(t), "ab") as f:
            pts[a:b].tofile(f)
        spill.counts[t] = spill.counts.get(t, 0) + int(b - a)
    return int((~inside).sum())


def reference_job_points(spill: TileSpill, job: Job, buffer_m: float, block: int = 1_000_000) -> np.ndarray:
    """``job_points`` as it was: boolean masks on the structured records of each chunk."""
    g, tc = spill.grid, spill.tc
    c = g.cell
    x0, x1 = g.west + job.c0 * c, g.west + job.c1 * c
    y0, y1 = g.north - job.r1 * c, g.north - job.r0 * c
    rows, cols = g.window(x0 - buffer_m, y0 - buffer_m, x1 + buffer_m, y1 + buffer_m)
    own, extra = [], []
    for ty in range(rows.start // tc, (rows.stop - 1) // tc + 1):
        for tx in range(cols.start // tc, (cols.stop - 1) // tc + 1):
            tile = ty * spill.ntx + tx
            if tile not in spill.counts:
                continue
            tr0, tc0 = ty * tc, tx * tc
            inside = job.r0 <= tr0 and tr0 + tc <= job.r1 and job.c0 <= tc0 and tc0 + tc <= job.c1
            apart = tr0 >= job.r1 or tr0 + tc <= job.r0 or tc0 >= job.c1 or tc0 + tc <= job.c0
            with open(spill.path(tile), "rb") as f:
                while True:
                    pts = np.fromfile(f, dtype=spill.dtype, count=block)
                    if not len(pts):
                        break
                    if inside:
                        own.append(pts)
                        continue
                    near = (pts["X"] >= x0 - buffer_m) & (pts["X"] < x1 + buffer_m) & \
                        (pts["Y"] >= y0 - buffer_m) & (pts["Y"] < y1 + buffer_m)
                    if not apart:
                        mine = job.holds(*g.index(pts["X"], pts["Y"])[:2])
                        own.append(pts[mine])
                        near &= ~mine
                    extra.append(pts[near])
    parts = own + extra
    return np.concatenate(parts) if parts else np.zeros(0, spill.dtype)


def _random_points(rng, n, grid, dtype):
    """Points over the grid and a margin around it (some outside), heaped in one corner,
    with every field random bytes but for the coordinates."""
    raw = rng.integers(0, 256, n * dtype.itemsize, dtype=np.uint8)
    pts = raw.view(dtype).copy()
    w, e = grid.west, grid.west + grid.ncols * grid.cell
    s, nn = grid.north - grid.nrows * grid.cell, grid.north
    k = n // 2
    pts["X"] = np.r_[rng.uniform(w - 5, e + 5, n - k), rng.normal(w + 12, 3, k)]
    pts["Y"] = np.r_[rng.uniform(s - 5, nn + 5, n - k), rng.normal(nn - 12, 3, k)]
    pts["Z"] = rng.normal(100, 10, n)
    if n < 200:
        return pts
    # points exactly on cell and grid edges, and coordinates no cell holds
    pts["X"][:50] = w + np.arange(50) * grid.cell
    pts["Y"][50:100] = nn - np.arange(50) * grid.cell
    pts["X"][100], pts["Y"][101], pts["X"][102] = np.nan, np.inf, -np.inf
    if n == 20_000:
        pts["Z"][103] = np.nan      # this chunk's lowest height is NaN: zmin keeps the others'
    pts["X"][104] = e
    return pts


@pytest.fixture(params=[(), EXTRA], ids=["point_dtype", "extra_dims"])
def spills(request, tmp_path):
    """The same chunks spilled by ``TileSpill.add`` and by the reference, tiles of 40 cells
    (20 m) in blocks of 10 cells over a 75 m x 55 m grid (partial tiles on two edges)."""
    dtype = points_dtype(request.param)
    grid = Grid(1000.0, 2055.0, CELL, 110, 150, "EPSG:25832")
    rng = np.random.default_rng(17)
    new = TileSpill(grid, 40, tmp_path / "new", dtype=dtype, block_cells=10)
    old = TileSpill(grid, 40, tmp_path / "old", dtype=dtype, block_cells=10)
    new.folder.mkdir()
    old.folder.mkdir()
    outside = [0, 0]
    for n in (30_000, 1, 0, 20_000, 7_000):
        pts = _random_points(rng, n, grid, dtype)
        if n == 1:
            pts["X"] = grid.west - 1.0        # a chunk wholly outside
        outside[0] += new.add(pts.copy())
        with np.errstate(invalid="ignore"):     # NaN and infinite coordinates cast to int
            outside[1] += reference_add(old, pts.copy())
    return new, old, outside


def test_spill_files_counts_and_blocks_are_the_reference_s(spills):
    new, old, outside = spills
    assert outside[0] == outside[1] > 0
    assert new.counts == old.counts
    assert len(new.counts) == 12         # a 3 x 4 tile grid, every tile holding points
    np.testing.assert_array_equal(new.blocks, old.blocks)
    assert new.zmin == old.zmin and math.isfinite(new.zmin)
    for t in old.counts:
        assert new.path(t).read_bytes() == old.path(t).read_bytes(), f"tile {t}"
    assert sorted(p.name for p in new.folder.iterdir()) == sorted(p.name for p in old.folder.iterdir())


def test_spill_of_a_chunk_holding_nan_heights_keeps_the_lowest_as_before(tmp_path):
    grid = Grid(0.0, 10.0, 1.0, 10, 10, "EPSG:25832")
    new = TileSpill(grid, 5, tmp_path / "new")
    old = TileSpill(grid, 5, tmp_path / "old")
    new.folder.mkdir()
    old.folder.mkdir()
    pts = np.zeros(4, new.dtype)
    pts["X"], pts["Y"], pts["Z"] = [1.5, 7.5, 2.5, 20.0], [1.5, 2.5, 8.5, 1.0], [3.0, np.nan, 2.0, -5.0]
    assert new.add(pts.copy()) == reference_add(old, pts.copy()) == 1
    assert new.zmin == old.zmin == math.inf      # a NaN lowest height leaves it untouched
    pts["Z"][1] = 1.0
    new.add(pts.copy())
    reference_add(old, pts.copy())
    assert new.zmin == old.zmin == 1.0           # the point outside (-5 m) does not count
    assert new.counts == old.counts == {0: 2, 2: 2, 3: 2}   # tiles of 5 x 5 cells, two to a row


def test_job_points_are_the_reference_s(spills):
    new, old, _ = spills
    # a small budget cuts tiles into jobs of blocks; the whole budget keeps tiles whole
    for budget in (8000, 10**9):
        jobs = plan_jobs(new, 6.0, budget)
        assert jobs == plan_jobs(old, 6.0, budget)
        whole = [j for j in jobs if (j.r1 - j.r0, j.c1 - j.c0) == (40, 40)]
        cut = [j for j in jobs if (j.r1 - j.r0) % 40 or (j.c1 - j.c0) % 40]
        assert whole and (cut or budget > 10**8)
        if budget < 10**8:
            assert len(jobs) > 12
        for j in jobs:
            for buffer_m in (0.0, 6.0, 45.0):
                got = job_points(new, j, buffer_m)
                want = reference_job_points(old, j, buffer_m)
                assert got.dtype == want.dtype == new.dtype
                assert len(got) == len(want) and got.tobytes() == want.tobytes(), (j, buffer_m)


def test_job_points_read_in_chunks_are_the_reference_s(spills, monkeypatch):
    """Tile files read a few hundred points at a time: the parts are joined in the same order."""
    import inventory.survey.tiles as tiles

    new, old, _ = spills
    monkeypatch.setattr(tiles, "_BLOCK", 333)
    jobs = plan_jobs(new, 6.0, 700)
    for j in jobs[::3]:
        got = job_points(new, j, 6.0)
        want = reference_job_points(old, j, 6.0, block=333)
        assert got.tobytes() == want.tobytes(), j
