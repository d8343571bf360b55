"""Classification jobs planned by point count (issue 17): the plan, and the points a job reads.

The survey step spills points by tiles and counts them per block; ``plan_jobs`` cuts the
grid into rectangles of whole blocks whose points and buffer fit a budget. These checks
build spills of known points and compare the plan and each job's points with a
brute-force count of the same points.
"""

from __future__ import annotations

import numpy as np
import pytest
from pyproj import CRS

from inventory.io.clouds import POINT_DTYPE
from inventory.model.grid import Grid
from inventory.survey.tiles import TileSpill, block_cells_for, job_points, plan_jobs

CELL = 0.5


def _points(x, y):
    pts = np.zeros(len(x), POINT_DTYPE)
    pts["X"], pts["Y"] = x, y
    pts["Z"] = np.arange(len(x)) * 1e-3     # tells the points apart
    return pts


def _spill(tmp_path, pts, grid, tile_cells=40, block_cells=10, chunks=3):
    spill = TileSpill(grid, tile_cells, tmp_path, block_cells=block_cells)
    for part in np.array_split(pts, chunks):
        spill.add(part)
    return spill


@pytest.fixture
def clustered():
    """A 100 m x 60 m grid of 0.5 m cells: a sparse pad and a dense heap in one corner."""
    rng = np.random.default_rng(7)
    grid = Grid(1000.0, 2060.0, CELL, 120, 200, "EPSG:25832")
    x = np.r_[rng.uniform(1000, 1100, 6000), rng.normal(1020, 4, 20000).clip(1000.01, 1099.99)]
    y = np.r_[rng.uniform(2000, 2060, 6000), rng.normal(2045, 4, 20000).clip(2000.01, 2059.99)]
    return grid, _points(x, y)


def test_block_is_the_divisor_of_the_tile_nearest_the_wanted_edge():
    assert block_cells_for(200, 0.5) == 50       # 100 m tiles, 25 m blocks
    assert block_cells_for(80, 0.5) == 40        # 40 m tiles: 20 m (nearer 25 m than 40 m by ratio)
    assert block_cells_for(20, 0.5) == 20        # a tile smaller than a block is one block
    assert block_cells_for(101, 0.5) == 101      # a prime tile: the whole tile, not one cell
    assert block_cells_for(200, 0.5, block_m=0.1) == 1


def test_spill_counts_every_point_once_per_block(tmp_path, clustered):
    grid, pts = clustered
    spill = _spill(tmp_path, pts, grid)
    row, col, inside = grid.index(pts["X"], pts["Y"])
    assert inside.all()
    want = np.zeros(spill.blocks.shape, np.int64)
    np.add.at(want, (row // 10, col // 10), 1)
    np.testing.assert_array_equal(spill.blocks, want)
    assert sum(spill.counts.values()) == len(pts)


def test_plan_covers_every_point_once_within_the_budget(tmp_path, clustered):
    grid, pts = clustered
    spill = _spill(tmp_path, pts, grid)
    budget = 3000
    jobs = plan_jobs(spill, 6.0, budget)
    row, col, _ = grid.index(pts["X"], pts["Y"])
    owner = np.full(len(pts), -1)
    for i, job in enumerate(jobs):
        mine = job.holds(row, col)
        assert (owner[mine] == -1).all(), "jobs overlap"
        owner[mine] = i
        assert mine.sum() == job.points
        # whole blocks, inside the grid
        assert job.r0 % 10 == 0 and job.c0 % 10 == 0
        assert 0 <= job.r0 < job.r1 <= grid.nrows and 0 <= job.c0 < job.c1 <= grid.ncols
        one_block = job.r1 - job.r0 <= 10 and job.c1 - job.c0 <= 10
        assert one_block or job.points + job.buffer_points <= budget
    assert (owner >= 0).all()
    # the dense corner is cut finer than the sparse pad
    areas = {(j.r0, j.c0): (j.r1 - j.r0) * (j.c1 - j.c0) for j in jobs}
    in_heap = [a for (r, c), a in areas.items() if r < 40 and c < 80]
    elsewhere = [a for (r, c), a in areas.items() if r >= 40 or c >= 80]
    assert max(in_heap) < max(elsewhere)
    # a larger budget makes fewer jobs; no budget makes one job per block holding points;
    # a budget every tile fits makes the tiles the jobs, each with the tile's whole rectangle
    assert len(plan_jobs(spill, 6.0, 10 * budget)) < len(jobs)
    assert len(plan_jobs(spill, 6.0, 0)) == int((spill.blocks > 0).sum())
    whole = plan_jobs(spill, 6.0, len(pts) * 10)
    assert [(j.r0 // 40) * spill.ntx + j.c0 // 40 for j in whole] == sorted(spill.counts)
    assert all(j.r1 - j.r0 == 40 and j.c1 - j.c0 == 40 for j in whole)
    assert [j.points for j in whole] == [spill.counts[t] for t in sorted(spill.counts)]


def test_plan_depends_on_the_counts_alone(tmp_path, clustered):
    grid, pts = clustered
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    a = _spill(tmp_path / "a", pts, grid, chunks=1)
    shuffled = pts[np.random.default_rng(1).permutation(len(pts))]
    b = _spill(tmp_path / "b", shuffled, grid, chunks=7)
    assert plan_jobs(a, 6.0, 3000) == plan_jobs(b, 6.0, 3000)


def test_buffer_estimate_counts_the_blocks_around_pro_rata(tmp_path):
    # one point at the centre of every block of 5 m: a ring of 5 m around a job is exactly
    # its neighbouring blocks, 2.5 m half of each edge block and a quarter of each corner
    grid = Grid(0.0, 50.0, CELL, 100, 100, "")
    centres = np.arange(2.5, 50, 5.0)
    x, y = np.meshgrid(centres, centres)
    spill = _spill(tmp_path, _points(x.ravel(), y.ravel()), grid, tile_cells=20, block_cells=10)
    one = plan_jobs(spill, 5.0, 0)
    assert len(one) == 100 and all(j.points == 1 for j in one)
    inner = [j for j in one if 0 < j.r0 < 90 and 0 < j.c0 < 90]
    assert {j.buffer_points for j in inner} == {8}
    corner = next(j for j in one if j.r0 == 0 and j.c0 == 0)
    assert corner.buffer_points == 3
    half = plan_jobs(spill, 2.5, 0)
    assert {j.buffer_points for j in half if 0 < j.r0 < 90 and 0 < j.c0 < 90} == {3}   # 4 x 1/2 + 4 x 1/4


@pytest.mark.parametrize("buffer_m", [0.0, 3.0, 12.5, 31.0])
def test_a_job_reads_its_own_points_then_those_within_the_buffer(tmp_path, clustered, buffer_m):
    grid, pts = clustered
    spill = _spill(tmp_path, pts, grid, tile_cells=40, block_cells=10)
    jobs = plan_jobs(spill, buffer_m, 2500)
    assert len(jobs) > 4
    row, col, _ = grid.index(pts["X"], pts["Y"])
    for job in jobs:
        got = job_points(spill, job, buffer_m)
        mine = job.holds(row, col)
        x0, x1 = grid.west + job.c0 * CELL, grid.west + job.c1 * CELL
        y0, y1 = grid.north - job.r1 * CELL, grid.north - job.r0 * CELL
        near = ((pts["X"] >= x0 - buffer_m) & (pts["X"] < x1 + buffer_m)
                & (pts["Y"] >= y0 - buffer_m) & (pts["Y"] < y1 + buffer_m) & ~mine)
        n = int(mine.sum())
        assert len(got) == n + int(near.sum())
        np.testing.assert_array_equal(np.sort(got["Z"][:n]), np.sort(pts["Z"][mine]))
        np.testing.assert_array_equal(np.sort(got["Z"][n:]), np.sort(pts["Z"][near]))


def test_a_spill_sent_to_a_worker_leaves_its_counts_behind(tmp_path, clustered):
    import pickle

    grid, pts = clustered
    spill = _spill(tmp_path, pts, grid)
    copy = pickle.loads(pickle.dumps(spill))
    assert copy.blocks is None and copy.counts == spill.counts
    job = plan_jobs(spill, 6.0, 3000)[0]
    np.testing.assert_array_equal(job_points(copy, job, 6.0), job_points(spill, job, 6.0))
    with pytest.raises(ValueError, match="block counts"):
        plan_jobs(copy, 6.0, 3000)


def test_cells_of_several_jobs_make_the_surface_of_one(tmp_path):
    """``grid_tiles`` reads the jobs' cells twice (object rules, then the surface grid):
    the surface of two jobs split through a vehicle equals the surface of one job holding
    every point (heights and counts to the bit), and the vehicle's roof and the ring at its foot are taken out
    (their surface points lie on an object)."""
    from inventory.model.classes import GROUND, UNCLASSIFIED
    from inventory.survey.tiles import grid_tile, grid_tiles

    rng = np.random.default_rng(3)
    grid = Grid(1000.0, 2030.0, CELL, 60, 80, "EPSG:25832")       # 40 m x 30 m
    n = 60000
    pts = np.zeros(n, POINT_DTYPE)
    pts["X"], pts["Y"] = rng.uniform(1000, 1040, n), rng.uniform(2000, 2030, n)
    pts["Z"] = 100.0 + 0.02 * rng.standard_normal(n)
    pts["Classification"] = GROUND
    # a vehicle 2 m x 4 m across the jobs' edge (x = 1020): its roof 3 m up classed surface
    box = (np.abs(pts["X"] - 1020.0) < 1.0) & (np.abs(pts["Y"] - 2015.0) < 2.0)
    pts["Z"][box] = 103.0 + 0.02 * rng.standard_normal(int(box.sum()))
    # object returns of its sides, and off them (mirrors, steps) at its foot: a ring 0.6 m
    # wide around the body, from 0.3 m up
    sx, sy = rng.uniform(1018.4, 1021.6, 20000), rng.uniform(2012.4, 2017.6, 20000)
    ring = ~((np.abs(sx - 1020.0) < 1.0) & (np.abs(sy - 2015.0) < 2.0))
    side = np.zeros(int(ring.sum()), POINT_DTYPE)
    side["X"], side["Y"] = sx[ring], sy[ring]
    side["Z"] = rng.uniform(100.3, 102.9, len(side))
    side["Classification"] = UNCLASSIFIED
    pts = np.concatenate([pts, side])
    col = grid.index(pts["X"], pts["Y"])[1]

    def save(parts, folder):
        folder.mkdir()
        return [grid_tile(grid, p, "mean").save(folder / f"cells_{i}.npz") for i, p in enumerate(parts)]

    one = grid_tiles(grid, save([pts], tmp_path / "one"), grid, "mean", "2026-10-31")
    two = grid_tiles(grid, save([pts[col < 40], pts[col >= 40]], tmp_path / "two"), grid, "mean", "2026-10-31")
    assert np.array_equal(one.z, two.z, equal_nan=True) and np.array_equal(one.count, two.count)
    # the spread is summed about each job's own reference height: equal to rounding
    np.testing.assert_allclose(one.sd, two.sd, rtol=1e-9, atol=1e-12)
    assert one.meta["object_cells"] == two.meta["object_cells"]
    # the roof (the 2 x 6 cells clear of its sides) and the foot ring are out; the pad is not
    roof = (np.abs(grid.centers()[0] - 1020.0) < 0.75) & (np.abs(grid.centers()[1] - 2015.0) < 1.75)
    assert roof.sum() == 12 and (one.count[roof] == 0).all()
    assert one.meta["object_cells"] >= roof.sum() + 20
    assert (one.count > 0).sum() >= grid.nrows * grid.ncols - 120
    # the cells that hold object returns (for the volume step's gap filling): the ring of the
    # vehicle's sides, 3.2 m x 5.2 m less its 2 m x 4 m body, whatever the job plan
    seen = one.meta["object_seen"]
    assert np.array_equal(seen, two.meta["object_seen"])
    x, y = grid.centers()
    outer = (np.abs(x - 1020.0) < 1.6) & (np.abs(y - 2015.0) < 2.6)
    assert seen[outer & ~((np.abs(x - 1020.0) < 0.9) & (np.abs(y - 2015.0) < 1.9))].all()
    assert not seen[~((np.abs(x - 1020.0) < 2.0) & (np.abs(y - 2015.0) < 3.0))].any()


def test_jobs_compress_their_own_points_into_the_cloud_the_main_process_once_wrote(tmp_path, clustered):
    """Each job compresses its points into LAZ chunks where it runs and sends back only its
    counts, surface box and cells (run_jobs); the file put together from the jobs' chunks
    holds the points, in plan order, that writing every job's classified points in the main
    process with CloudWriter gave (as the survey step did before)."""
    import laspy

    from inventory.io.clouds import CloudWriter
    from inventory.io.lazparts import LasLayout, LazPartWriter
    from inventory.model.classes import GROUND
    from inventory.parallel import executor
    from inventory.survey.pipeline import load_pipeline
    from inventory.survey.tiles import classify_job, run_jobs

    grid, heap = clustered
    rng = np.random.default_rng(3)
    pts = np.r_[_points(rng.uniform(1000, 1100, 30000), rng.uniform(2000, 2060, 30000)), heap]
    pts["Z"] = 100.0 + rng.normal(0.0, 0.02, len(pts))      # a flat pad, 5 points a square metre and more
    pts["StationRange"] = np.nan                            # no scanner station: no range gate
    spill = _spill(tmp_path, pts, grid, tile_cells=40, block_cells=10)
    jobs = plan_jobs(spill, 6.0, 8000)
    assert len(jobs) > 3
    pipe, crs = load_pipeline(None), "EPSG:25832"
    layout = LasLayout(6, (grid.west, grid.south, 99.0))
    with executor() as ex, LazPartWriter(tmp_path / "new.laz", crs=crs, layout=layout) as w:
        results = list(run_jobs(ex, spill, jobs, 6.0, pipe, CRS(crs), "builtin", "mean", layout))
        for res in results:
            w.append(res.part)
    with CloudWriter(tmp_path / "old.laz", crs=crs, offset=layout.offset) as old:
        for job, res in zip(jobs, results):
            out, cells, thinned = classify_job(spill, job, 6.0, pipe, crs, "builtin", "mean")
            old.write(out)
            cls = out["Classification"]
            assert res.kept == len(out) and res.thinned == thinned
            assert res.counts == {int(c): int(n) for c, n in zip(*np.unique(cls, return_counts=True))}
            g = out[cls == GROUND]
            if len(g):
                assert res.ground_box == (g["X"].min(), g["Y"].min(), g["X"].max(), g["Y"].max())
            else:
                assert res.ground_box is None
            if cells is None:
                assert res.cells is None
            else:
                np.testing.assert_array_equal(np.load(res.cells)["z"], cells.z)
            assert res.part.path.name == f"classified_{job.name}.bin"
            assert all(n <= 50_000 for n, _ in res.part.chunks)
    assert sum(r.ground_box is not None for r in results) >= len(jobs) - 1
    a, b = laspy.read(tmp_path / "old.laz"), laspy.read(tmp_path / "new.laz")
    assert len(b.points) == sum(r.kept for r in results) == len(pts)    # a flat pad: nothing dropped
    np.testing.assert_array_equal(a.points.array, b.points.array)
    np.testing.assert_array_equal(a.header.mins, b.header.mins)
    np.testing.assert_array_equal(a.header.maxs, b.header.maxs)
