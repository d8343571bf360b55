"""Survey extent and coverage gaps as outlines a person can read: scan speckle closed, small
holes and stray parts dropped, real gaps kept, the area kept."""

from __future__ import annotations

import types

import geopandas as gpd
import numpy as np
import pytest
import rasterio.features
import shapely

from inventory.close import _survey_extent
from inventory.model.grid import Grid, Surface
from inventory.volume.measure import close_speckle, coverage_gaps, tidy_outline

CRS = "EPSG:25832"
CELL = 0.5
FILL = 3.0
WEST, NORTH = 500000.0, 5700080.0


def _stats(geom) -> tuple[int, int, int]:
    """(parts, holes, vertices) of a (Multi)Polygon."""
    parts = shapely.get_parts(geom)
    holes = int(sum(shapely.get_num_interior_rings(p) for p in parts))
    return len(parts), holes, int(shapely.get_num_coordinates(geom))


def _raw(mask: np.ndarray, grid: Grid):
    """The scanned cells as polygons, as the extent was drawn before (one per cell run)."""
    return shapely.union_all([
        shapely.geometry.shape(g)
        for g, v in rasterio.features.shapes(mask.astype("uint8"), mask=mask, transform=grid.transform)
        if v == 1])


def _cells(x0: float, y0: float, x1: float, y1: float) -> tuple[slice, slice]:
    """Rows and columns of the cells in the box (x0, y0)-(x1, y1), metres from the west/north corner."""
    return slice(int(y0 / CELL), int(y1 / CELL)), slice(int(x0 / CELL), int(x1 / CELL))


@pytest.fixture
def speckled():
    """An 80 m x 80 m grid: a 60 m square scanned with 30 % of its cells missed at random,
    a 10 m x 10 m area with no scan at all (wider than the 3 m fill distance), a 1 m wide
    unscanned strip the fill bridges, and stray single scanned cells outside the square."""
    rng = np.random.default_rng(11)
    grid = Grid(WEST, NORTH, CELL, 160, 160, CRS)
    count = np.zeros(grid.shape, np.int32)
    region = _cells(10, 10, 70, 70)
    count[region] = (rng.random((120, 120)) > 0.3).astype(np.int32)
    count[_cells(30, 30, 40, 40)] = 0        # real gap
    count[_cells(50, 20, 51, 30)] = 0        # 1 m strip, bridged by the fill
    for r, c in rng.integers(0, 15, size=(20, 2)):  # strays west and north of the square
        count[r, c] = 1
    z = np.where(count > 0, 10.0, np.nan)
    surface = Surface(grid, z, count, np.full(grid.shape, np.nan), np.zeros(grid.shape, bool),
                      "2026-01-28", {"max_fill_distance_m": FILL})
    gap_box = shapely.box(WEST + 30, NORTH - 40, WEST + 40, NORTH - 30)
    square = shapely.box(WEST + 10, NORTH - 70, WEST + 70, NORTH - 10)
    return surface, square, gap_box


def _site():
    return types.SimpleNamespace(config=types.SimpleNamespace(
        grid=types.SimpleNamespace(max_fill_distance_m=FILL, cell_size_m=CELL)), crs=CRS)


def test_extent_of_speckled_scan_is_one_outline_with_the_real_gap(speckled):
    surface, square, gap_box = speckled
    raw = _raw(surface.count > 0, surface.grid)
    raw_parts, raw_holes, raw_vertices = _stats(raw)
    # the input really is speckled, so the counts below mean something
    assert raw_parts > 10 and raw_holes > 500

    geom = _survey_extent(_site(), surface, "2026-01-28", 1).geometry.iloc[0]
    parts, holes, vertices = _stats(geom)
    assert (parts, holes) == (1, 1), (parts, holes)
    assert vertices < raw_vertices / 50
    assert geom.is_valid
    # the one hole is the real gap, to within a cell of its edge (shapely areas)
    hole = shapely.Polygon(shapely.get_parts(geom)[0].interiors[0])
    assert hole.symmetric_difference(gap_box).area < 4 * 10 * CELL
    # area: the scanned square less the real gap, to 2 %
    assert geom.area == pytest.approx(square.area - gap_box.area, rel=0.02)


def test_coverage_gaps_keep_the_real_gap_only(speckled):
    surface, _, gap_box = speckled
    footprint = shapely.box(WEST + 25, NORTH - 45, WEST + 55, NORTH - 15)
    piles = gpd.GeoDataFrame({"pile_id": ["P1"]}, geometry=[footprint], crs=CRS)
    # before the merge the footprint holds hundreds of unscanned specks
    unscanned = coverage_gaps(surface, piles, fill_distance_m=0.0).geometry.iloc[0]
    assert _stats(unscanned)[0] > 100

    gaps = coverage_gaps(surface, piles)
    assert list(gaps.pile_id) == ["P1"]
    g = gaps.geometry.iloc[0]
    assert _stats(g)[:2] == (1, 0)
    # the gap, its edge roughened by the misses along it (a cell or two deep)
    assert g.contains(gap_box.buffer(-2 * CELL))
    assert g.area == pytest.approx(gap_box.area, rel=0.1)
    assert gaps.area_m2.iloc[0] == pytest.approx(g.area)
    # the 1 m strip is bridged by the fill: not a gap
    strip = shapely.box(WEST + 50, NORTH - 30, WEST + 51, NORTH - 20)
    assert g.intersection(strip).area == 0.0


def test_a_gap_wider_than_the_fill_distance_is_kept_and_a_narrow_one_closed():
    mask = np.ones((40, 40), bool)
    mask[5:15, 5:13] = False        # 4 m wide: wider than the 3 m fill distance
    mask[25:35, 5:10] = False       # 2.5 m wide: narrower
    closed = close_speckle(mask, FILL / 2, CELL)
    # the wide gap stays open; the closing's disc (radius 3 cells) rounds its corners: of the
    # 10 rows of 8 cells, 2, 6, 6, 8, 8, 8, 8, 6, 6, 2 stay open (the opening of the gap by the disc)
    assert not closed[7:13, 7:11].any()
    assert list((~closed[5:15, 5:13]).sum(axis=1)) == [2, 6, 6, 8, 8, 8, 8, 6, 6, 2]
    assert closed[25:35, 5:10].all()
    assert (closed | ~mask).all() and closed[mask].all()   # nothing scanned is lost


def test_tidy_outline_drops_small_holes_and_parts_only():
    big = shapely.box(0, 0, 50, 50)
    small_hole = shapely.box(10, 10, 12, 12)     # 4 m2 < 9 m2
    real_hole = shapely.box(30, 30, 35, 35)      # 25 m2
    stray = shapely.box(60, 60, 61, 61)
    geom = shapely.union_all([big.difference(small_hole).difference(real_hole), stray])
    out = tidy_outline(geom, FILL * FILL, CELL)
    assert _stats(out)[:2] == (1, 1)
    assert out.area == pytest.approx(big.area - real_hole.area)


@pytest.mark.slow
def test_sample_site_extent_is_readable(sample_chain):
    date = "2026-09-30"
    surface = sample_chain.survey(date).surface
    cell = surface.grid.cell
    scanned = surface.count > 0
    raw = _raw(scanned, surface.grid)
    raw_parts, raw_holes, raw_vertices = _stats(raw)
    geom = _survey_extent(sample_chain.site, surface, date, 1).geometry.iloc[0]
    parts, holes, vertices = _stats(geom)
    assert raw_parts > 100 and raw_holes > 100     # the speckle is there before
    assert parts <= 5 and holes <= 25, (parts, holes)
    assert vertices < raw_vertices / 20
    assert geom.is_valid
    # area: the tidying (holes, strays, simplification) moves the closed cells' area by < 1 %
    closed_area = close_speckle(scanned, FILL / 2, cell).sum() * cell * cell
    assert geom.area == pytest.approx(closed_area, rel=0.01)
    # it keeps the scanned cells (to 1 %) and claims no more than the surface has values for
    assert geom.intersection(raw).area > 0.99 * raw.area
    assert geom.area <= np.isfinite(surface.z).sum() * cell * cell
