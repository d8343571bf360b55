"""Surface gridding and hole filling (the GeoTIFFs: tests/test_io_rasters.py)."""

from __future__ import annotations


import numpy as np
import pytest
from scipy.stats import binned_statistic_2d

from inventory.errors import RunError
from inventory.model.grid import Grid
from inventory.survey.gridding import (
    SurfaceAccumulator,
    fill_holes,
    grid_points,
)


@pytest.mark.parametrize("stat", ["mean", "median", "max"])
def test_cell_statistic_matches_scipy(plane_points, stat):
    # Reference: scipy.stats.binned_statistic_2d on the same cell edges.
    x, y, z = plane_points()
    g = Grid.snapped(x.min(), y.min(), x.max(), y.max(), cell=0.5, crs="EPSG:25832")
    s = grid_points(g, x, y, z, stat)
    xe = g.west + np.arange(g.ncols + 1) * g.cell
    ye = g.south + np.arange(g.nrows + 1) * g.cell
    ref, _, _, _ = binned_statistic_2d(x, y, z, statistic=stat, bins=[xe, ye])
    ref = ref.T[::-1]    # scipy: [x bin, y bin] south-up; ours: rows north to south
    np.testing.assert_allclose(s.z, ref, equal_nan=True, atol=1e-9)
    cnt, _, _, _ = binned_statistic_2d(x, y, z, statistic="count", bins=[xe, ye])
    np.testing.assert_array_equal(s.count, cnt.T[::-1].astype(int))


def test_streaming_equals_one_shot_and_sd(plane_points):
    x, y, z = plane_points()
    g = Grid.snapped(x.min(), y.min(), x.max(), y.max(), cell=1.0)
    acc = SurfaceAccumulator(g, "mean")
    for part in np.array_split(np.arange(len(z)), 7):
        acc.add(x[part], y[part], z[part])
    a, b = acc.result(), grid_points(g, x, y, z)
    np.testing.assert_allclose(a.z, b.z, equal_nan=True, atol=1e-9)
    np.testing.assert_array_equal(a.count, b.count)
    # sd about the cell mean = numpy population standard deviation of the cell's points
    r, c, _ = g.index(x, y)
    sel = (r == 3) & (c == 4)
    assert a.sd[3, 4] == pytest.approx(np.std(z[sel]), rel=1e-9)


def test_median_refuses_a_cell_fed_twice():
    g = Grid(0.0, 1.0, 1.0, 1, 1)
    acc = SurfaceAccumulator(g, "median")
    acc.add(np.array([0.5]), np.array([0.5]), np.array([1.0]))
    with pytest.raises(RunError, match="fed twice"):
        acc.add(np.array([0.5]), np.array([0.5]), np.array([2.0]))


def test_snapped_grids_align_across_surveys():
    a = Grid.snapped(1000.13, 2000.4, 1030.0, 2020.0, cell=0.5)
    b = Grid.snapped(998.77, 2001.9, 1025.2, 2019.1, cell=0.5)
    assert a.aligned_with(b)
    assert a.west % 0.5 == 0 and a.north % 0.5 == 0


def _plane_with_hole(cell=0.5):
    g = Grid(0.0, 50.0, cell, int(50 / cell), int(50 / cell), "EPSG:25832")
    cx, cy = g.centers()
    z = 10 + 0.2 * cx - 0.1 * cy
    count = np.ones(g.shape, np.int32)
    return g, cx, cy, z, count


def test_small_holes_filled_exactly_on_a_plane():
    # Linear interpolation reproduces a plane exactly (a TIN of a plane is the plane).
    from inventory.model.grid import Surface

    g, cx, cy, z, count = _plane_with_hole()
    hole = (np.hypot(cx - 20, cy - 20) < 2.0)
    zz = np.where(hole, np.nan, z)
    cc = np.where(hole, 0, count)
    s = Surface(g, zz, cc, np.full(g.shape, np.nan), np.zeros(g.shape, bool))
    filled, rep = fill_holes(s, 3.0)
    assert rep.filled_cells == hole.sum() and rep.gap_cells == 0
    np.testing.assert_allclose(filled.z[hole], z[hole], atol=1e-9)
    assert filled.filled[hole].all() and not filled.filled[~hole].any()


def test_large_gap_left_empty_and_reported():
    from inventory.model.grid import Surface

    g, cx, cy, z, count = _plane_with_hole()
    gap = (np.abs(cx - 25) < 5) & (np.abs(cy - 25) < 5)          # 10 m x 10 m
    s = Surface(g, np.where(gap, np.nan, z), np.where(gap, 0, count), np.full(g.shape, np.nan),
                np.zeros(g.shape, bool))
    filled, rep = fill_holes(s, 3.0)
    # Cells within 3 m of data are filled: the ring; the 4 m x 4 m core stays empty.
    core = (np.abs(cx - 25) < 2) & (np.abs(cy - 25) < 2)
    assert np.isnan(filled.z[core]).all()
    assert rep.gap_cells == np.isnan(filled.z).sum() > 0
    assert rep.gap_area_m2 == pytest.approx(rep.gap_cells * 0.25)
    np.testing.assert_allclose(filled.z[filled.filled], z[filled.filled], atol=1e-9)


def test_lone_patch_does_not_seed_the_fill():
    # A return the classifier let through (dust 2 m above a pad) in the middle of a gap:
    # the gap is filled from its rim (a plane, so exactly), the lone cell keeps its own
    # value. Without the rule the triangulation would make a cone of it.
    from inventory.model.grid import Surface
    from inventory.model.grid import lone_patches

    g, cx, cy, z, count = _plane_with_hole()
    hole = np.hypot(cx - 20, cy - 20) < 2.5
    dust = (np.abs(cx - 20) < 0.5) & (np.abs(cy - 20.25) < 0.25)     # two cells
    zz = np.where(hole & ~dust, np.nan, np.where(dust, z + 2.0, z))
    cc = np.where(hole & ~dust, 0, count)
    s = Surface(g, zz, cc, np.full(g.shape, np.nan), np.zeros(g.shape, bool))
    assert (lone_patches(cc > 0) == dust).all()
    filled, rep = fill_holes(s, 3.0)
    gap = hole & ~dust
    assert filled.filled[gap].all() and rep.filled_cells == gap.sum()
    np.testing.assert_allclose(filled.z[gap], z[gap], atol=1e-9)
    np.testing.assert_allclose(filled.z[dust], z[dust] + 2.0)
    # A scan line of cells (a chain, however sparse its neighbours) is data, not a lone patch.
    line = np.zeros(g.shape, bool)
    line[10, 5:15] = True
    assert not lone_patches(line).any()


def test_a_scan_sparser_than_the_grid_is_not_lone_patches():
    # An airborne survey at 0.7 returns per m2 on 0.5 m cells: about one cell in six holds
    # a return, mostly alone. Those are the surface itself, not strays: a planted cone's
    # flanks filled without them came out 4-9 % short (tests/test_planted_more.py). A
    # stray return in a gap of a densely scanned surface is still lone (the test above).
    from inventory.model.grid import lone_patches

    rng = np.random.default_rng(5)
    sparse = rng.random((60, 60)) < 0.17
    # by 8-neighbours alone, 306 of the 654 scanned cells are in patches of 1-3 cells;
    # where a few larger patches come together in a window some stay lone
    assert lone_patches(sparse).sum() < 0.1 * sparse.sum()
    dense = rng.random((60, 60)) < 0.97
    dense[20:30, 20:30] = False   # a 5 m shadow
    dense[25, 25] = True          # a dust return in it
    assert lone_patches(dense)[25, 25]


def test_object_returns_empty_the_cells_they_stand_in():
    # A wall 0.5 m wide and 4 m tall on a flat pad: its top returns were called surface,
    # its face returns were not (the single-return case of issue 4). The wall-top cells
    # hold object returns below their surface points, so they come back empty; the pad
    # beside the wall and the ground under a gallery 6 m up keep their cells, and feeding
    # the objects before or after the surface points gives the same result.
    rng = np.random.default_rng(3)
    g = Grid(0.0, 10.0, 0.5, 20, 20)
    n = 8000
    x, y = rng.random(n) * 10, rng.random(n) * 10
    wall = (x >= 4.0) & (x < 4.5)
    z = np.where(wall, 4.0, 0.0) + rng.normal(0, 0.005, n)
    fx = np.where(rng.random(600) < 0.5, 4.0 + 1e-6, 4.5 - 1e-6)     # both faces of the wall
    fy, fz = rng.random(600) * 10, rng.random(600) * 4.0
    gx, gy = 7.0 + rng.random(300) * 1.0, rng.random(300) * 10        # gallery, 6 m up
    gz = 6.0 + rng.random(300) * 2.0
    ox, oy, oz = np.r_[fx, gx], np.r_[fy, gy], np.r_[fz, gz]
    results = []
    for objects_first in (True, False):
        acc = SurfaceAccumulator(g, "mean")
        if objects_first:
            acc.add_objects(ox, oy, oz)
        acc.add(x, y, z)
        if not objects_first:
            acc.add_objects(ox, oy, oz)
        results.append(acc.result())
    a, b = results
    np.testing.assert_array_equal(a.count, b.count)
    np.testing.assert_array_equal(a.z, b.z)
    cols = np.arange(g.ncols) * 0.5 + 0.25
    on_wall = (cols > 4.0) & (cols < 4.5)
    assert (a.count[:, on_wall] == 0).all() and np.isnan(a.z[:, on_wall]).all()
    assert (a.count[:, ~on_wall] > 0).all()
    assert np.nanmax(np.abs(a.z[:, ~on_wall])) < 0.05
    assert a.meta["object_cells"] == on_wall.sum() * g.nrows


def test_surface_patch_on_an_object_is_emptied():
    # A loader (4 m x 2.5 m, roof 3 m up) on a pad whose shadow hides the pad around it:
    # its roof returns were called surface, its sides object. The roof is a patch cut off
    # from the pad with object returns 3 m below it: emptied. A patch of real pad seen
    # between two such machines, level with the objects' feet, stays.
    rng = np.random.default_rng(5)
    g = Grid(0.0, 20.0, 0.5, 40, 40)
    x, y = rng.random(40000) * 20, rng.random(40000) * 20
    shadow = (x > 4) & (x < 10) & (y > 4) & (y < 10)
    roof = (x > 5) & (x < 9) & (y > 6) & (y < 8.5)
    patch = (x > 14) & (x < 15) & (y > 14) & (y < 15)
    keep = ~shadow & ~((x > 12) & (x < 17) & (y > 12) & (y < 17)) | patch
    z = np.zeros_like(x)
    sx = np.r_[rng.random(400) * 4 + 5, np.full(200, 5.01), np.full(200, 8.99)]
    sy = np.r_[np.full(400, 6.01), rng.random(400) * 2.5 + 6]
    sz = rng.random(800) * 3.0
    rx, ry = rng.random(300) * 4 + 5, rng.random(300) * 2.5 + 6
    mx = np.r_[np.full(200, 13.9), np.full(200, 15.1)]                # two machines' sides
    my, mz = rng.random(400) * 1 + 14, rng.random(400) * 2.5
    acc = SurfaceAccumulator(g, "mean")
    acc.add(np.r_[x[keep], rx], np.r_[y[keep], ry], np.r_[z[keep], np.full(300, 3.0)])
    acc.add_objects(np.r_[sx, mx], np.r_[sy, my], np.r_[sz, mz])
    s = acc.result()
    cx, cy = g.centers()
    on_roof = (cx > 5.25) & (cx < 8.75) & (cy > 6.25) & (cy < 8.25)
    assert (s.count[on_roof] == 0).all()
    assert np.nanmax(s.z) < 0.01                       # nothing of the roof is left
    in_patch = (cx > 14.25) & (cx < 14.75) & (cy > 14.25) & (cy < 14.75)
    assert (s.count[in_patch] > 0).all()
    # without object returns the roof stays (the classifier's word is all there is)
    acc2 = SurfaceAccumulator(g, "mean")
    acc2.add(np.r_[x[keep], rx], np.r_[y[keep], ry], np.r_[z[keep], np.full(300, 3.0)])
    assert (acc2.result().count[on_roof] > 0).all() and not acc2.object_cells().any()


def test_roof_set_back_from_the_body_sides_is_emptied():
    # A machine on a slope: its cab roof (3.5 m up, 1.8 m wide) stands back 0.4 m from the
    # body's sides, so the returns in the cells right around the roof are the cab's upper
    # edges (3.2-3.4 m); the body's sides, down to its feet, lie a cell further out. The
    # roof was called surface: it is emptied for the sides a metre away. Real pad cells
    # 1 m from a truck whose lowest returns are 0.6 m up stay.
    from inventory.survey.gridding import OBJECT_SIDE_REACH_M

    assert OBJECT_SIDE_REACH_M == 1.0
    rng = np.random.default_rng(11)
    g = Grid(0.0, 20.0, 0.5, 40, 40)
    x, y = rng.random(40000) * 20, rng.random(40000) * 20
    machine = (x > 3) & (x < 10) & (y > 4) & (y < 10)      # the machine and its shadow
    roof = (x > 5.5) & (x < 8.5) & (y > 6.5) & (y < 8.0)
    z = np.zeros_like(x)
    ex = np.r_[rng.random(300) * 4 + 5, np.full(150, 5.25), np.full(150, 8.75)]   # cab edges
    ey = np.r_[np.where(rng.random(300) < 0.5, 6.25, 8.25), rng.random(300) * 2.0 + 6.25]
    ez = rng.random(600) * 0.2 + 3.2
    sx = np.r_[rng.random(400) * 5 + 4.5, np.full(200, 4.75), np.full(200, 9.25)]   # body sides
    sy = np.r_[np.where(rng.random(400) < 0.5, 5.75, 8.75), rng.random(400) * 3 + 5.75]
    sz = rng.random(800) * 2.5 + 0.1
    tx, ty = np.full(200, 14.25), rng.random(200) * 3 + 14          # a truck's side, 0.6 m up
    tz = rng.random(200) * 2.0 + 0.6
    acc = SurfaceAccumulator(g, "mean")
    acc.add(np.r_[x[~machine], x[roof]], np.r_[y[~machine], y[roof]], np.r_[z[~machine], np.full(roof.sum(), 3.5)])
    acc.add_objects(np.r_[ex, sx, tx], np.r_[ey, sy, ty], np.r_[ez, sz, tz])
    s = acc.result()
    cx, cy = g.centers()
    on_roof = (cx > 5.5) & (cx < 8.5) & (cy > 6.5) & (cy < 8.0)
    assert on_roof.sum() == 18 and (s.count[on_roof] == 0).all()
    assert np.nanmax(s.z) < 0.01
    beside_truck = (cx > 15.0) & (cx < 15.5) & (cy > 14.0) & (cy < 17.0)
    assert (s.count[beside_truck] > 0).all()


def test_lone_surface_cell_among_object_returns_at_its_level_is_emptied():
    # Under a gallery (underside 6.5 m up) whose floor no station saw: the underside's
    # returns were called object, one of them surface, the others nearest it 0.9 m away. Alone among object returns at its
    # own height it is emptied. A lone pad cell 0.8 m from a truck whose lowest returns are
    # 0.6 m up stays, and so does a lone pad cell with no object near it.
    rng = np.random.default_rng(2)
    g = Grid(0.0, 20.0, 0.5, 40, 40)
    x, y = rng.random(20000) * 20, rng.random(20000) * 4 + 16       # pad, north strip only
    ux, uy = rng.random(400) * 2.5 + 3.0, rng.random(400) * 10 + 2.0   # underside returns
    uz = 6.5 + rng.random(400) * 0.05
    far = np.hypot(ux - 4.1, uy - 6.2) > 0.9          # none in the lone return's cell or the next
    ux, uy, uz = ux[far], uy[far], uz[far]
    tx, ty = np.full(100, 12.25), rng.random(100) * 2 + 4.0          # a truck's side
    tz = 0.6 + rng.random(100) * 2.0
    lone_x = np.array([4.1, 13.1, 16.3])
    lone_y = np.array([6.2, 4.7, 8.2])
    lone_z = np.array([6.52, 0.0, 0.0])
    acc = SurfaceAccumulator(g, "mean")
    acc.add(np.r_[x, lone_x], np.r_[y, lone_y], np.r_[np.zeros_like(x), lone_z])
    acc.add_objects(np.r_[ux, tx], np.r_[uy, ty], np.r_[uz, tz])
    s = acc.result()
    r, c = g.index(lone_x, lone_y)[:2]
    assert s.count[r[0], c[0]] == 0                    # the underside's return
    assert s.count[r[1], c[1]] == 1 and s.count[r[2], c[2]] == 1
    assert np.nanmax(s.z) < 0.01


def test_object_cells_in_bands_are_those_of_the_whole_grid():
    # object_cells judges a large grid in bands of rows with a margin wider than any object
    # top can reach; the answer must be that of the whole grid at once, also for patches
    # crossing bands and tops next to a band's edge (a margin of one row fails this)
    from inventory.survey.gridding import OBJECT_TOP_MAX_M2, object_cells

    rng = np.random.default_rng(5)
    shape = (400, 90)
    has = rng.random(shape) < 0.55
    z = rng.random(shape) * 0.3 + 2.0
    top, bottom = z + 0.05, z - 0.05
    low = np.full(shape, np.inf)
    walls = rng.random(shape) < 0.04
    low[walls] = rng.choice([0.5, 2.2, 3.0], walls.sum())
    # a long patch crossing bands, fenced by object returns far below it: too large for a
    # top, as long as a band's margin holds enough of it
    has[148:262, 8:14] = False
    has[150:260, 10:12] = True
    low[148:262, 8:14] = np.where(has[148:262, 8:14], np.inf, 0.5)
    area = OBJECT_TOP_MAX_M2 / 6.5               # tops of up to 6 cells: small bands test the margins
    whole = object_cells(has, top, bottom, low, area, band_rows=10_000)
    assert whole.sum() > 50 and (whole & ~has).sum() == 0
    for rows in (7, 16, 33):
        np.testing.assert_array_equal(object_cells(has, top, bottom, low, area, band_rows=rows), whole)


def test_enclosed_gaps_counts_patches_clear_of_the_edge(monkeypatch):
    """Empty patches touching the grid's edge are open ground, not gaps; the others are
    counted (4-connected, as ``scipy.ndimage.label`` joins them by default), in pieces
    of any size."""
    from inventory.survey import gridding
    from inventory.survey.gridding import enclosed_gaps

    empty = np.zeros((12, 15), bool)
    empty[2:5, 2:6] = True       # 12 cells, enclosed
    empty[8, 8] = True           # 1 cell, enclosed
    empty[9, 9] = True           # diagonal to it: a patch of its own, enclosed
    empty[0:3, 12:15] = True     # touches the edge: not a gap
    empty[6:11, 0] = True        # on the edge
    assert enclosed_gaps(empty) == (12 + 1 + 1, 12)
    monkeypatch.setattr(gridding, "_COUNT_PIECE", 7)
    assert enclosed_gaps(empty) == (14, 12)
    assert enclosed_gaps(np.zeros((4, 4), bool)) == (0, 0)
    assert enclosed_gaps(np.ones((4, 4), bool)) == (0, 0)
