"""Pile volumes: handbook solids, exact footprint weights, bases, uncertainty, tonnes.

Every solid is a height field above a tilted base plane; its volume above the base is a
handbook formula (Cavalieri's principle: shearing a solid onto a tilted base keeps its
volume). Synthetic grids are sampled at cell centres; synthetic point clouds are gridded
here with a tiny numpy helper (mean, count and scatter per cell).
"""

from __future__ import annotations

import warnings

import geopandas as gpd
import numpy as np
import pytest
import shapely
from scipy import ndimage
from scipy.interpolate import LinearNDInterpolator
from scipy.spatial import Delaunay
from scipy.spatial.distance import pdist

from inventory.errors import CoverageWarning, InputWarning
from inventory.model.grid import Grid, Surface
from inventory.site.load import Material
from inventory.volume.measure import (
    VOLUME_COLUMNS,
    BaseSurfaces,
    coverage_gaps,
    footprint_weights,
    measure_piles,
    spherical_correlation_sum,
    thickness_raster,
)
from inventory.volume.tin import positive_part_integral

# ----------------------------------------------------------------------------- helpers
CRS = "EPSG:25832"
#: A realistic UTM origin so that the code sees large coordinates, as on a real site.
X0, Y0 = 500123.4, 5700321.7
#: Footprints are drawn this far outside the toe (a footprint edge on the floor).
MARGIN_M = 2.0


def base_plane(x, y):
    """The tilted pad: 3 % east, -2 % north (about 2 degrees)."""
    return 50.0 + 0.03 * (np.asarray(x) - X0) - 0.02 * (np.asarray(y) - Y0)


def cone(R=12.0, H=8.0):
    """Cone, V = pi r^2 h / 3 (handbook formula)."""
    def h(x, y):
        return H * np.clip(1 - np.hypot(x - X0, y - Y0) / R, 0, None)
    return h, np.pi * R * R * H / 3, shapely.Point(X0, Y0).buffer(R + MARGIN_M, quad_segs=32)


def frustum(R=15.0, r=5.0, H=7.0):
    """Frustum of a cone, V = pi h / 3 (R^2 + R r + r^2) (handbook formula)."""
    def h(x, y):
        return H * np.clip((R - np.hypot(x - X0, y - Y0)) / (R - r), 0, 1)
    return h, np.pi * H / 3 * (R * R + R * r + r * r), shapely.Point(X0, Y0).buffer(R + MARGIN_M, quad_segs=32)


WINDROW_ANGLE = np.radians(30.0)


def windrow(L=30.0, w=10.0, H=7.0, ang=WINDROW_ANGLE):
    """Triangular windrow with conical ends, V = L w h + pi w^2 h / 3 (handbook formula:
    a triangular prism plus two half cones). Ridge at ``ang`` to the grid."""
    ux, uy = np.cos(ang), np.sin(ang)
    a = np.array([X0 - ux * L / 2, Y0 - uy * L / 2])
    b = np.array([X0 + ux * L / 2, Y0 + uy * L / 2])

    def h(x, y):
        px, py = x - a[0], y - a[1]
        s = np.clip(px * ux + py * uy, 0, L)
        return H * np.clip(1 - np.hypot(px - s * ux, py - s * uy) / w, 0, None)
    return h, L * w * H + np.pi * w * w * H / 3, shapely.LineString([a, b]).buffer(w + MARGIN_M, quad_segs=32)


def truncated_prism():
    """A right prism on a pentagon cut by an inclined plane: V = A h(centroid) (handbook:
    a prism truncated by a plane has the volume of the base area times the height of the
    cut plane above the base centroid). Returns the solid polygon too."""
    pent = shapely.Polygon([(X0 - 12, Y0 - 8), (X0 + 10, Y0 - 11), (X0 + 14, Y0 + 5),
                            (X0 + 1, Y0 + 13), (X0 - 13, Y0 + 6)])

    def top(x, y):
        return 4.0 + 0.08 * (x - X0) + 0.05 * (y - Y0)
    c = pent.centroid
    V = pent.area * float(top(c.x, c.y))
    return top, V, pent, pent.buffer(MARGIN_M, quad_segs=16)


SOLIDS = {"cone": cone, "frustum": frustum, "windrow": windrow}


def make_grid(poly, cell, margin=12.0):
    xmin, ymin, xmax, ymax = poly.bounds
    return Grid.snapped(xmin - margin, ymin - margin, xmax + margin, ymax + margin, cell=cell, crs=CRS)


def grid_surface(grid, h):
    """Surface sampled at cell centres (a fully covered synthetic grid)."""
    x, y = grid.centers()
    z = base_plane(x, y) + h(x, y)
    return Surface(grid, z, np.full(grid.shape, 10, np.int32), np.full(grid.shape, 0.005),
                   np.zeros(grid.shape, bool))


def prism_surface(grid, top, pent):
    """Cell means of the truncated prism, exact: the prism's walls cut cells, and a cell's
    mean height is (area inside x top at that part's centroid) / cell area."""
    x, y = grid.centers()
    z = base_plane(x, y)
    c = grid.cell
    x0 = x - c / 2
    y1 = y + c / 2
    boxes = shapely.box(x0, y1 - c, x0 + c, y1)
    part = shapely.intersection(boxes, pent)
    area = shapely.area(part)
    hit = area > 0
    cen = shapely.centroid(part[hit])
    z[hit] += area[hit] * top(shapely.get_x(cen), shapely.get_y(cen)) / grid.cell_area
    return Surface(grid, z, np.full(grid.shape, 10, np.int32), np.full(grid.shape, 0.005),
                   np.zeros(grid.shape, bool))


def point_cloud(grid, h, density, noise, rng, hide=None):
    """Uniform random points with Gaussian z noise; points inside ``hide`` are dropped
    (a part of the pile that no station sees)."""
    n = int(density * (grid.east - grid.west) * (grid.north - grid.south))
    x = rng.uniform(grid.west, grid.east, n)
    y = rng.uniform(grid.south, grid.north, n)
    z = base_plane(x, y) + h(x, y) + rng.normal(0.0, noise, n)
    if hide is not None:
        keep = ~shapely.contains_xy(hide, x, y)
        x, y, z = x[keep], y[keep], z[keep]
    return x, y, z


def grid_points(grid, x, y, z, fill=True):
    """Mean, count and scatter of points per cell; empty cells filled by linear
    interpolation (nearest beyond the hull) and marked ``filled``; left NaN when not ``fill``."""
    r, c, ins = grid.index(x, y)
    flat = r[ins] * grid.ncols + c[ins]
    zz = z[ins]
    n = grid.nrows * grid.ncols
    cnt = np.bincount(flat, minlength=n)
    z0 = float(zz.mean())
    s1 = np.bincount(flat, zz - z0, minlength=n)
    s2 = np.bincount(flat, (zz - z0) ** 2, minlength=n)
    with np.errstate(invalid="ignore", divide="ignore"):
        m = s1 / cnt
        sd = np.sqrt(np.clip(s2 - cnt * m * m, 0, None) / (cnt - 1))
    sd[cnt < 2] = np.nan
    zc = (m + z0).reshape(grid.shape)
    cnt = cnt.reshape(grid.shape)
    sd = sd.reshape(grid.shape)
    empty = cnt == 0
    if empty.any() and not fill:
        zc[empty] = np.nan
        return Surface(grid, zc, cnt.astype(np.int32), sd, np.zeros(grid.shape, bool))
    if empty.any():
        # Lone empty cells (6+ scanned neighbours) take their neighbours' mean, which is
        # linear interpolation on a plane; the rest is interpolated below.
        known = np.where(empty, 0.0, zc)
        k3 = np.ones((3, 3))
        nsum = ndimage.convolve(known, k3, mode="constant")
        ncnt = ndimage.convolve((~empty).astype(float), k3, mode="constant")
        lone = empty & (ncnt >= 6)
        zc[lone] = nsum[lone] / ncnt[lone]
        empty_left = empty & ~lone
    else:
        empty_left = empty
    if empty_left.any():
        empty = empty_left
        # Linear interpolation from the scanned cells around the gaps (all a triangle over
        # a gap can use), on joggled input: a lattice is Qhull's slow degenerate case.
        near = ~empty & ndimage.binary_dilation(empty, np.ones((3, 3)), iterations=2)
        tri = Delaunay(np.argwhere(near).astype(float), qhull_options="QJ")
        zc[empty] = LinearNDInterpolator(tri, zc[near])(np.argwhere(empty).astype(float))
        still = ~np.isfinite(zc)
        if still.any():
            idx = ndimage.distance_transform_edt(still, return_distances=False, return_indices=True)
            zc = zc[tuple(idx)]
    return Surface(grid, zc, cnt.astype(np.int32), sd, cnt == 0)


def sector(cx, cy, R, a0, a1):
    t = np.linspace(a0, a1, 40)
    return shapely.Polygon([(cx, cy)] + [(cx + R * np.cos(a), cy + R * np.sin(a)) for a in t])

MATS = {"gravel": Material("gravel", bulk_density_t_m3=1.6, density_sd_t_m3=0.05, moisture_pct=4.0)}


def piles_frame(polys, bases, ids=None, density=None):
    n = len(polys)
    return gpd.GeoDataFrame(
        {"pile_id": ids or [f"P{i + 1}" for i in range(n)], "material": ["gravel"] * n,
         "base": bases, "density_t_m3": density or [None] * n},
        geometry=list(polys), crs=CRS,
    )


def measure(surface, polys, bases, floor=None, floor_sigma=0.0, **kw):
    base = BaseSurfaces(floor=floor, floor_sigma_m=floor_sigma, toe_ring_m=3.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", CoverageWarning)
        return measure_piles(surface, piles_frame(polys, bases), MATS, base, **kw)


# ----------------------------------------------------------------------------- weights
WEIGHT_POLYS = {
    "disc": shapely.Point(X0 + 0.13, Y0 - 0.41).buffer(9.7, quad_segs=24),
    "rotated_rect": shapely.affinity.rotate(shapely.box(X0 - 7, Y0 - 3, X0 + 8, Y0 + 4.2), 23.0),
    "l_with_hole": shapely.Polygon(
        [(X0, Y0), (X0 + 12.3, Y0), (X0 + 12.3, Y0 + 4.1), (X0 + 4.05, Y0 + 4.1), (X0 + 4.05, Y0 + 11), (X0, Y0 + 11)],
        [[(X0 + 1, Y0 + 1), (X0 + 2.6, Y0 + 1), (X0 + 2.6, Y0 + 2.7), (X0 + 1, Y0 + 2.7)]],
    ),
    "multi": shapely.MultiPolygon([shapely.box(X0, Y0, X0 + 3.3, Y0 + 2.1), shapely.box(X0 + 6.2, Y0 + 5, X0 + 9, Y0 + 7.77)]),
    "grid_aligned": shapely.box(X0 - 0.4, Y0 - 0.7, X0 + 5.6, Y0 + 4.3),
}


@pytest.mark.parametrize("cell", [0.25, 0.37, 0.5, 1.0])
@pytest.mark.parametrize("name", list(WEIGHT_POLYS))
def test_weights_area_equals_shapely_area(name, cell):
    # Reference: shapely's polygon area (GEOS). Fractional weights x cell area must
    # reproduce it to 1e-9 relative (the check).
    poly = WEIGHT_POLYS[name]
    grid = make_grid(poly, cell, margin=2.0)
    (rows, cols), w = footprint_weights(poly, grid)
    assert w.shape == (rows.stop - rows.start, cols.stop - cols.start)
    assert np.all((w >= 0) & (w <= 1 + 1e-12))
    assert w.sum() * grid.cell_area == pytest.approx(poly.area, rel=1e-9)


def test_weights_cut_cells_are_fractional_not_centres():
    # A 1 m x 1 m box offset by a quarter cell covers four 1 m cells by 9/16, 3/16, 3/16,
    # 1/16 (exact geometry, by hand); a cell-centre rule would give 1 or 0.
    grid = Grid(0.0, 4.0, 1.0, 4, 4)
    (rows, cols), w = footprint_weights(shapely.box(1.25, 1.25, 2.25, 2.25), grid)
    full = np.zeros(grid.shape)
    full[rows, cols] = w
    assert sorted(full[full > 0].round(12).tolist()) == [1 / 16, 3 / 16, 3 / 16, 9 / 16]


def test_weights_empty_and_off_grid():
    grid = Grid(0.0, 10.0, 1.0, 10, 10)
    (rows, cols), w = footprint_weights(shapely.Polygon(), grid)
    assert w.size == 0
    (rows, cols), w = footprint_weights(shapely.box(50, 50, 60, 60), grid)
    assert w.sum() == 0


# ----------------------------------------------------------------------------- handbook solids
@pytest.mark.parametrize("cell", [0.25, 0.5, 1.0])
@pytest.mark.parametrize("name", list(SOLIDS))
def test_handbook_solid_on_synthetic_grid(name, cell):
    # Handbook formulas: cone pi r^2 h / 3, frustum pi h / 3 (R^2 + R r + r^2), windrow
    # L w h + pi w^2 h / 3. Within 0.3 % on a tilted base, floor and toe bases; TIN agrees
    # with the grid within the reported 95 % interval.
    h, V, poly = SOLIDS[name]()
    grid = make_grid(poly, cell)
    surface = grid_surface(grid, h)
    floor = base_plane(*grid.centers())
    t = measure(surface, [poly, poly.buffer(0)], ["floor", "toe"], floor=floor, floor_sigma=0.01)
    for _, r in t.iterrows():
        assert r.volume_m3 == pytest.approx(V, rel=0.003), r.base_method
        assert abs(r.volume_tin_m3 - r.volume_m3) <= r.volume_ci95_m3
        assert not r.tin_disagrees
        assert r.below_base_m3 < 1e-6 * V
        assert r.scanned_fraction == 1.0
    toe = t.iloc[1]
    assert toe.base_residual_m < 1e-6  # an exact plane fits exactly


@pytest.mark.parametrize("cell", [0.25, 0.5, 1.0])
def test_truncated_prism_on_synthetic_grid(cell):
    # Handbook: a prism cut by a plane, V = base area x height of the plane above the base
    # centroid. Grid cells cut by the vertical walls hold the cell mean (as the mean of
    # the points in a fully scanned cell would). No TIN check here: a TIN through cell
    # centres ramps across a vertical wall by design.
    top, V, pent, poly = truncated_prism()
    grid = make_grid(poly, cell)
    surface = prism_surface(grid, top, pent)
    t = measure(surface, [poly, poly.buffer(0)], ["floor", "toe"], floor=base_plane(*grid.centers()))
    for _, r in t.iterrows():
        assert r.volume_m3 == pytest.approx(V, rel=0.003), r.base_method


def test_level_base():
    # A horizontal base at a stated level: cone on flat ground at z = 12.5 (handbook cone).
    h, V, poly = cone(10, 6)
    grid = make_grid(poly, 0.5)
    x, y = grid.centers()
    s = Surface(grid, 12.5 + h(x, y), np.full(grid.shape, 4, np.int32), np.full(grid.shape, 0.01), np.zeros(grid.shape, bool))
    r = measure(s, [poly], ["level:12.5"]).iloc[0]
    assert r.volume_m3 == pytest.approx(V, rel=0.003)
    assert r.sigma_base_m3 == 0.0
    assert r.base_method == "level:12.5"
    # The same surface measured from 1 m lower adds exactly the footprint area x 1 m.
    r2 = measure(s, [poly], ["level:11.5"]).iloc[0]
    assert r2.volume_m3 - r.volume_m3 == pytest.approx(poly.area, rel=1e-6)


@pytest.mark.parametrize("cell", [0.25, 0.5, 1.0])
@pytest.mark.parametrize("name", list(SOLIDS))
def test_handbook_solid_from_noisy_point_cloud(name, cell):
    # Same handbook formulas, from a point cloud with 2 cm Gaussian noise gridded by the
    # cell mean; toe base on the tilted pad; the TIN from the raw points agrees with the
    # grid within the reported 95 % interval, and the interval covers the truth.
    rng = np.random.default_rng(7)
    h, V, poly = SOLIDS[name]()
    grid = make_grid(poly, cell)
    x, y, z = point_cloud(grid, h, 64, 0.02, rng)
    s = grid_points(grid, x, y, z)
    r = measure(s, [poly], ["toe"], points=np.column_stack([x, y, z])).iloc[0]
    assert r.volume_m3 == pytest.approx(V, rel=0.003)
    assert abs(r.volume_tin_m3 - r.volume_m3) <= r.volume_ci95_m3
    assert abs(r.volume_m3 - V) <= r.volume_ci95_m3
    assert 0.0 < r.base_residual_m < 0.03  # residual of cell means of 2 cm noise


# ----------------------------------------------------------------------------- sections
def _section_areas(grid, thick, stations, ux, uy, half_len, step=0.05):
    """Cross-section areas perpendicular to the axis (ux, uy) through X0, Y0, integrating
    the thickness raster (bilinear) with the trapezoid rule."""
    vx, vy = -uy, ux
    s = np.arange(-half_len, half_len + step / 2, step)
    th = np.nan_to_num(thick, nan=0.0)
    areas = []
    for d in stations:
        px = X0 + d * ux + s * vx
        py = Y0 + d * uy + s * vy
        col = (px - grid.west) / grid.cell - 0.5
        row = (grid.north - py) / grid.cell - 0.5
        v = ndimage.map_coordinates(th, [row, col], order=1, mode="constant", cval=0.0)
        areas.append(np.trapezoid(np.clip(v, 0, None), s))
    return np.array(areas)


def test_windrow_average_end_area_and_prismoidal_agree_with_grid():
    # Surveying handbook: average end area V = sum L (A1 + A2) / 2 and prismoidal formula
    # V = sum 2L (A1 + 4 Am + A2) / 6 over pairs of intervals, from sections of the same
    # surface (thickness raster), agree with the grid volume within 1 %.
    h, V, poly = windrow()
    grid = make_grid(poly, 0.5)
    s = grid_surface(grid, h)
    floor = base_plane(*grid.centers())
    base = BaseSurfaces(floor=floor, floor_sigma_m=0.0)
    pf = piles_frame([poly], ["floor"])
    vgrid = measure_piles(s, pf, MATS, base).volume_m3.iloc[0]
    bz, thick = thickness_raster(s, pf, base)
    ux, uy = np.cos(WINDROW_ANGLE), np.sin(WINDROW_ANGLE)
    half = 15.0 + 10.0 + MARGIN_M
    L = 1.0
    stations = np.arange(-half, half + L / 2, L)  # 54 intervals: even, for the prismoidal pairs
    assert (len(stations) - 1) % 2 == 0
    A = _section_areas(grid, thick, stations, ux, uy, half)
    v_aea = np.sum(L * (A[:-1] + A[1:]) / 2)
    v_pri = np.sum(2 * L * (A[:-2:2] + 4 * A[1:-1:2] + A[2::2]) / 6)
    assert v_aea == pytest.approx(vgrid, rel=0.01)
    assert v_pri == pytest.approx(vgrid, rel=0.01)
    assert vgrid == pytest.approx(V, rel=0.003)


# ----------------------------------------------------------------------------- rasters
def test_thickness_raster_and_coverage_gaps():
    rng = np.random.default_rng(3)
    h, V, poly = cone()
    grid = make_grid(poly, 0.5)
    hide = shapely.Point(X0 + 6, Y0).buffer(3.0)
    x, y, z = point_cloud(grid, h, 40, 0.01, rng, hide=hide)
    s = grid_points(grid, x, y, z)
    pf = piles_frame([poly], ["toe"])
    bz, th = thickness_raster(s, pf)
    (rows, cols), w = footprint_weights(poly, grid)
    inside = np.zeros(grid.shape, bool)
    inside[rows, cols] = w > 0
    assert np.isnan(th[~inside]).all() and np.isfinite(th[inside]).all()
    xc, yc = grid.centers()
    # The base under the pile is the pad (toe plane fitted through noisy cells).
    assert np.nanmax(np.abs(bz[inside] - base_plane(xc, yc)[inside])) < 0.01
    gaps = coverage_gaps(s, pf)
    assert list(gaps.pile_id) == ["P1"]
    g = gaps.geometry.iloc[0]
    # Unscanned cells are the cells inside the hidden disc (to within one ring of cells,
    # since a cut cell may still catch a point).
    assert g.area == pytest.approx(hide.area, rel=0.2)
    assert gaps.area_m2.iloc[0] == pytest.approx(g.area)
    assert g.difference(poly).area < 1e-9
    assert g.intersection(hide).area > 0.8 * g.area
    assert gaps.crs.to_string() == CRS


# ----------------------------------------------------------------------------- uncertainty
def test_correlated_sum_matches_rolstad_limits():
    # Rolstad et al. 2009 (J. Glaciol. 55:666; Anderson 2019, ESPL 44:1015): for an area
    # much larger than pi a^2, var(V) = sigma^2 pi a^2 A / 5 (the integral of the spherical
    # correlation over the plane is pi a^2 / 5); for an area much smaller than the range
    # the error is fully correlated, var(V) = sigma^2 A^2.
    cell, a = 2.0, 10.0
    big = shapely.Point(0, 0).buffer(400.0, quad_segs=64)
    grid = Grid.snapped(-402, -402, 402, 402, cell=cell)
    _, w = footprint_weights(big, grid)
    s = spherical_correlation_sum(w, cell, a) * cell**4
    expected = np.pi * a * a * big.area / 5
    assert s < expected  # the rim loses part of each cell's neighbourhood
    assert s == pytest.approx(expected, rel=0.05)
    small = shapely.box(0, 0, 3, 3)
    grid = Grid.snapped(-1, -1, 4, 4, cell=0.5)
    _, w = footprint_weights(small, grid)
    s = spherical_correlation_sum(w, 0.5, 500.0) * 0.5**4
    assert s == pytest.approx(small.area**2, rel=0.01)


def test_correlated_sum_equals_direct_double_sum():
    # Reference: direct evaluation of sum_ij w_i w_j rho(d_ij) with scipy pdist.
    poly = WEIGHT_POLYS["l_with_hole"]
    cell, a = 0.5, 4.0
    grid = make_grid(poly, cell, margin=1.0)
    (rows, cols), w = footprint_weights(poly, grid)
    x, y = grid.centers()
    x, y = x[rows, cols].ravel(), y[rows, cols].ravel()
    wf = w.ravel()
    keep = wf > 0
    d = pdist(np.column_stack([x[keep], y[keep]])) / a
    rho = np.where(d < 1, 1 - 1.5 * d + 0.5 * d**3, 0.0)
    ww = pdist(wf[keep][:, None], lambda u, v: u[0] * v[0])
    direct = 2 * np.sum(ww * rho) + np.sum(wf[keep] ** 2)
    assert spherical_correlation_sum(w, cell, a) == pytest.approx(direct, rel=1e-9)


def test_doubling_noise_increases_sigma():
    # Honesty: twice the range noise must give a larger reported sigma.
    h, V, poly = cone()
    grid = make_grid(poly, 0.5)
    sig = []
    for noise in (0.02, 0.04):
        x, y, z = point_cloud(grid, h, 30, noise, np.random.default_rng(11))
        sig.append(measure(grid_points(grid, x, y, z), [poly], ["toe"]).volume_sigma_m3.iloc[0])
    assert sig[1] > sig[0]


HIDES = {
    # 20 % of the pile's plan area hidden from every station (the hardest place is the apex).
    "cone_apex": (cone, lambda: shapely.Point(X0, Y0).buffer(np.sqrt(0.2) * 12)),
    "cone_flank": (cone, lambda: shapely.Point(X0 + 6, Y0).buffer(np.sqrt(0.2) * 12)),
    "cone_sector": (cone, lambda: sector(X0, Y0, 14, 0.3, 0.3 + 2 * np.pi * 0.2)),
    "windrow_end": (windrow, lambda: shapely.Point(X0 + 15 * np.cos(WINDROW_ANGLE), Y0 + 15 * np.sin(WINDROW_ANGLE)).buffer(8)),
    "windrow_side": (windrow, lambda: shapely.box(X0 - 12, Y0 - 2, X0 + 12, Y0 + 12)),
}


@pytest.mark.parametrize("case", list(HIDES))
def test_hidden_part_increases_sigma_and_interval_covers_truth(case, cell=0.5):
    # Honesty: hiding part of a pile from every station raises the sigma, the scanned
    # share drops, and the 95 % interval still contains the handbook volume.
    solid, hide_fn = HIDES[case]
    h, V, poly = solid()
    grid = make_grid(poly, cell)
    rng = np.random.default_rng(5)
    x, y, z = point_cloud(grid, h, 40, 0.02, rng)
    full = measure(grid_points(grid, x, y, z), [poly], ["toe"]).iloc[0]
    hide = hide_fn()
    keep = ~shapely.contains_xy(hide, x, y)
    part = measure(grid_points(grid, x[keep], y[keep], z[keep]), [poly], ["toe"]).iloc[0]
    assert part.volume_sigma_m3 > full.volume_sigma_m3
    assert part.scanned_fraction < full.scanned_fraction
    assert abs(part.volume_m3 - V) <= part.volume_ci95_m3
    assert abs(full.volume_m3 - V) <= full.volume_ci95_m3


def test_local_gap_width_equals_the_disc_dilation():
    # The gap width by distance transforms equals the local thickness by binary dilations
    # with discs x^2 + y^2 <= k^2 (scipy.ndimage.binary_dilation, the reference here), on
    # random gaps, a wide gap along the border and one scanned cell in a sea of gaps.
    from inventory.volume.measure import _local_gap_width

    def by_dilation(unscanned, dist, cell):
        radius = np.where(unscanned, dist, 0.0)
        for k in np.unique(np.round(dist[unscanned] / cell)).astype(int):
            if k < 2:
                continue
            yy, xx = np.mgrid[-k:k + 1, -k:k + 1]
            centres = unscanned & (dist >= k * cell - 1e-9)
            covered = ndimage.binary_dilation(centres, structure=xx**2 + yy**2 <= k * k) & unscanned
            radius = np.where(covered, np.maximum(radius, k * cell), radius)
        return 2.0 * np.maximum(radius, 0.5 * cell)

    rng = np.random.default_rng(8)
    for case in range(6):
        cell = (0.25, 0.5, 1.0)[case % 3]
        m = ndimage.binary_dilation(rng.random((40, 50)) < 0.06, iterations=1 + case % 2)
        m[:, : 3 * case] = True
        if case == 5:
            m = np.ones((16, 20), bool)
            m[7, 13] = False
        dist = ndimage.distance_transform_edt(m) * cell
        np.testing.assert_array_equal(_local_gap_width(m, dist, cell), by_dilation(m, dist, cell))


def test_gap_correlation_sum_equals_the_direct_double_sum():
    # The pair sum by length classes equals sum_i sum_j s_i s_j rho_ij over every pair
    # (numpy, no cut-off; Paciorek and Schervish 2006 correlation), with a few wide gaps
    # among many narrow ones spread over 40 m to 340 m.
    from inventory.volume.measure import _gap_correlation_sum

    rng = np.random.default_rng(1)
    for span in (40.0, 140.0, 340.0):
        n = 900
        xy = rng.uniform(0.0, span, (n, 2)).round(1)
        length = np.where(rng.random(n) < 0.1, rng.uniform(5.0, 40.0, n), rng.uniform(0.5, 3.0, n))
        s = rng.uniform(0.01, 0.2, n)
        h2 = ((xy[:, None, :] - xy[None, :, :]) ** 2).sum(axis=-1)
        l2 = length[:, None] ** 2 + length[None, :] ** 2
        direct = float(s @ ((2.0 * length[:, None] * length[None, :] / l2) * np.exp(-2.0 * h2 / l2)) @ s)
        assert _gap_correlation_sum(xy, s, length) == pytest.approx(direct, rel=1e-12)


def test_cells_of_zero_spread_keep_the_sigma_finite():
    # Heights quantised by a LAS file's scale (0.01 ft on the laspy sample autzen_trim.laz)
    # give two-point cells of spread exactly 0 on a flat pad. The pooled variance's running
    # sums then came out about -1e-17 beside cells of real scatter, and the pile's whole
    # sigma and 95 % interval were NaN (found on airborne data gridded at 0.5 m).
    h, V, poly = cone()
    grid = make_grid(poly, 0.5)
    x, y = grid.centers()
    rng = np.random.default_rng(3)
    sd = np.abs(rng.normal(0.0, 0.03, grid.shape))
    sd[:, grid.shape[1] // 2:] = 0.0
    s = Surface(grid, base_plane(x, y) + h(x, y), np.full(grid.shape, 2, np.int32), sd, np.zeros(grid.shape, bool))
    row = measure(s, [poly], ["toe"]).iloc[0]
    for col in ("sigma_random_m3", "volume_sigma_m3", "volume_ci95_m3"):
        assert np.isfinite(row[col]), col
    assert row.sigma_random_m3 > 0
    assert abs(row.volume_m3 - V) <= row.volume_ci95_m3


# ----------------------------------------------------------------------------- toe ring
def test_toe_ring_rejects_a_machine():
    # A 3 m tall machine parked in a quarter of the toe ring must not lift the base.
    h, V, poly = cone()
    grid = make_grid(poly, 0.5)
    s = grid_surface(grid, h)
    x, y = grid.centers()
    machine = shapely.box(X0 + 14.3, Y0 - 6, X0 + 17.5, Y0 + 6)
    on = shapely.contains_xy(machine, x, y)
    s.z[on] += 3.0
    r = measure(s, [poly], ["toe"]).iloc[0]
    assert r.volume_m3 == pytest.approx(V, rel=0.003)
    assert r.base_residual_m < 0.01
    assert "rejected" in r.base_note


def test_toe_ring_shared_with_neighbour():
    # Two cones whose footprints touch: each toe ring is cut by the neighbour's footprint,
    # only the free part is used, and the note names the neighbour.
    h1, V1, p1 = cone(10, 6)
    off = 2 * (10 + MARGIN_M)

    def h2(x, y):
        return h1(x - off, y)
    p2 = shapely.affinity.translate(p1, off, 0)
    grid = make_grid(shapely.union_all([p1, p2]), 0.5)
    x, y = grid.centers()
    s = Surface(grid, base_plane(x, y) + h1(x, y) + h2(x, y), np.full(grid.shape, 5, np.int32),
                np.full(grid.shape, 0.005), np.zeros(grid.shape, bool))
    t = measure(s, [p1, p2], ["toe", "toe"])
    for _, r in t.iterrows():
        assert r.volume_m3 == pytest.approx(V1, rel=0.003)
        assert "toe_shared" in r["flags"]
        assert "% free" in r.base_note
    assert "neighbours P2" in t.base_note.iloc[0] and "neighbours P1" in t.base_note.iloc[1]


def test_toe_ring_fully_covered_by_neighbours_is_refused():
    h, V, poly = cone(8, 5)
    grid = make_grid(poly, 0.5)
    ring = poly.buffer(4.0).difference(poly)
    s = grid_surface(grid, h)
    t = measure_piles(s, piles_frame([poly, ring], ["toe", "level:0"]), MATS, BaseSurfaces(toe_ring_m=3.0))
    r = t.iloc[0]
    assert np.isnan(r.volume_m3) and "toe_no_ring" in r["flags"]
    assert np.isnan(r.survey_t)


# ----------------------------------------------------------------------------- cut, tonnes
def test_below_base_reported_as_cut():
    # A conical pit (V = pi r^2 d / 3, handbook cone) under a pile's footprint is reported
    # as material below base, separately from the fill, and flagged.
    h, V, poly = cone(12, 8)
    grid = make_grid(poly, 0.25)
    x, y = grid.centers()
    pit_r, pit_d = 3.0, 1.5
    pit = pit_d * np.clip(1 - np.hypot(x - (X0 - 12), y - (Y0 + 10)) / pit_r, 0, None)
    big = shapely.Point(X0, Y0).buffer(20)
    s = Surface(grid, base_plane(x, y) + h(x, y) - pit, np.full(grid.shape, 5, np.int32),
                np.full(grid.shape, 0.005), np.zeros(grid.shape, bool))
    r = measure(s, [big], ["floor"], floor=base_plane(x, y)).iloc[0]
    assert r.volume_m3 == pytest.approx(V, rel=0.003)
    assert r.below_base_m3 == pytest.approx(np.pi * pit_r**2 * pit_d / 3, rel=0.01)
    assert "below_base" in r["flags"]


def test_tonnes_wet_dry_and_sigma():
    h, V, poly = cone()
    grid = make_grid(poly, 0.5)
    s = grid_surface(grid, h)
    pf = piles_frame([poly, poly.buffer(0), poly.buffer(0)], ["floor"] * 3, density=[None, 2.1, None])
    pf.loc[2, "material"] = "unobtainium"
    base = BaseSurfaces(floor=base_plane(*grid.centers()), floor_sigma_m=0.03)
    t = measure_piles(s, pf, MATS, base)
    r = t.iloc[0]
    m = MATS["gravel"]
    assert r.survey_t == pytest.approx(r.volume_m3 * 1.6)
    # Dry tonnes = wet x (1 - moisture as a wet-basis fraction).
    assert r.survey_dry_t == pytest.approx(r.survey_t * (1 - 0.04))
    # Product of independent errors, first order: sigma_T^2 = (rho sigma_V)^2 + (V sigma_rho)^2.
    assert r.survey_sigma_t == pytest.approx(np.hypot(1.6 * r.volume_sigma_m3, r.volume_m3 * m.density_sd_t_m3))
    assert t.iloc[1].density_t_m3 == 2.1 and t.iloc[1].survey_t == pytest.approx(r.volume_m3 * 2.1)
    assert np.isnan(t.iloc[2].survey_t) and "no_density" in t.iloc[2]["flags"]
    assert list(t.columns) == VOLUME_COLUMNS
    # Floor sigma is a systematic error over the pile: at least area x sigma of the cone.
    assert r.sigma_base_m3 == pytest.approx(np.pi * 12**2 * 0.03, rel=0.02)


def test_materials_as_objects():
    # Anything with the Material attributes will do (a notebook may pass its own objects).
    class Mat:
        bulk_density_t_m3 = 1.6
        density_sd_t_m3 = 0.05
        moisture_pct = 4.0
    h, V, poly = cone()
    grid = make_grid(poly, 1.0)
    t = measure_piles(grid_surface(grid, h), piles_frame([poly], ["toe"]), {"gravel": Mat()})
    assert t.survey_t.iloc[0] == pytest.approx(t.volume_m3.iloc[0] * 1.6)


# ----------------------------------------------------------------------------- bad input
def test_bad_piles_do_not_stop_the_batch():
    h, V, poly = cone()
    grid = make_grid(poly, 1.0)
    s = grid_surface(grid, h)
    far = shapely.box(0, 0, 10, 10)
    pf = piles_frame([poly, far, poly.buffer(0), shapely.Polygon(), poly.buffer(0)],
                     ["toe", "toe", "level:abc", "toe", "floor"])
    with pytest.warns(InputWarning, match="P3"):
        t = measure_piles(s, pf, MATS)
    flags = t.set_index("pile_id")["flags"]
    assert t.volume_m3.iloc[0] == pytest.approx(V, rel=0.003)
    assert "off_grid" in flags["P2"]
    assert "bad_base" in flags["P3"]
    assert "bad_geometry" in flags["P4"]
    assert "no_floor" in flags["P5"]
    assert t.volume_m3.iloc[1:].isna().all()


def test_footprint_without_surface_data():
    h, V, poly = cone()
    grid = make_grid(poly, 1.0)
    s = grid_surface(grid, h)
    s.z[:] = np.nan
    s.count[:] = 0
    r = measure_piles(s, piles_frame([poly], ["level:50"]), MATS).iloc[0]
    assert np.isnan(r.volume_m3) and "no_data" in r["flags"] and "no surface" in r.base_note


def test_unscanned_unfilled_cells_are_interpolated_and_flagged():
    h, V, poly = cone()
    grid = make_grid(poly, 0.5)
    s = grid_surface(grid, h)
    x, y = grid.centers()
    hole = shapely.contains_xy(shapely.Point(X0 - 5, Y0).buffer(2), x, y)
    s.z[hole] = np.nan
    s.count[hole] = 0
    with pytest.warns(CoverageWarning, match="P1"):
        r = measure_piles(s, piles_frame([poly], ["toe"]), MATS).iloc[0]
    assert "unfilled_gap" in r["flags"]
    assert r.scanned_fraction < 1
    assert abs(r.volume_m3 - V) <= r.volume_ci95_m3


def test_floor_from_raster_resamples_onto_grid(tmp_path):
    # Reference: GDAL warping through rasterio. A floor plane written at 2 m cells on an
    # offset grid and read onto the 0.5 m survey grid (bilinear) reproduces the plane.
    rasterio = pytest.importorskip("rasterio")
    from rasterio.transform import from_origin
    h, V, poly = cone()
    grid = make_grid(poly, 0.5)
    west, north, c = grid.west - 7.3, grid.north + 5.1, 2.0
    nx, ny = int((grid.east - west) / c) + 6, int((north - grid.south) / c) + 6
    xs = west + (np.arange(nx) + 0.5) * c
    ys = north - (np.arange(ny) + 0.5) * c
    X, Y = np.meshgrid(xs, ys)
    path = tmp_path / "floor.tif"
    with rasterio.open(path, "w", driver="GTiff", width=nx, height=ny, count=1, dtype="float32",
                       crs=CRS, transform=from_origin(west, north, c, c), nodata=-9999.0) as dst:
        dst.write(base_plane(X, Y).astype("float32") - 50.0, 1)  # keep float32 precision
    base = BaseSurfaces.from_raster(path, grid, sigma=0.02)
    xc, yc = grid.centers()
    assert np.nanmax(np.abs(base.floor + 50.0 - base_plane(xc, yc))) < 1e-3
    assert base.floor_sigma_m == 0.02
    base.floor = base.floor + 50.0
    r = measure_piles(grid_surface(grid, h), piles_frame([poly], ["floor"]), MATS, base).iloc[0]
    assert r.volume_m3 == pytest.approx(V, rel=0.003)


# ----------------------------------------------------------------------------- TIN prism
def test_positive_part_integral_against_quadrature():
    # Reference: brute-force quadrature of max(h, 0) over the triangle (barycentric grid).
    rng = np.random.default_rng(0)
    h = rng.normal(0, 1, (50, 3))
    area = rng.uniform(0.5, 2, 50)
    n = 400
    i, j = np.meshgrid(np.arange(n), np.arange(n))
    keep = i + j < n
    u = (i[keep] + 1 / 3) / n
    v = (j[keep] + 1 / 3) / n
    l0 = 1 - u - v
    got = positive_part_integral(area, h)
    for k in range(len(h)):
        hv = l0 * h[k, 0] + u * h[k, 1] + v * h[k, 2]
        ref = area[k] * np.mean(np.clip(hv, 0, None))
        assert got[k] == pytest.approx(ref, abs=2e-3 * area[k])
    # Fill minus cut is the plain prism formula A (h1 + h2 + h3) / 3.
    net = positive_part_integral(area, h) - positive_part_integral(area, -h)
    assert net == pytest.approx(area * h.sum(axis=1) / 3)
