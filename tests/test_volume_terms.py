"""The toe-base term and the slope-break gap fill, against analytic values.

* Base term: a toe ring on a plane with known white roughness gives the standard error of
  the mean of its N independent cells (sigma / sqrt(N), times the pile's area), whatever the
  scatter on the pile; correlated ground makes the ring fewer independent cells.
* Gap fill: a shadow over the top edge of a frustum, the apex of a cone or the ridge of a
  windrow is filled from the flanks' planes; the volume is within 0.5 % of the handbook
  formula (cone V = pi r^2 h / 3, frustum V = pi h (R^2 + R r + r^2) / 3, windrow with
  conical ends L w h + pi w^2 h / 3: any engineering-mathematics handbook, from memory),
  where linear filling misses by more; and linear filling is kept where it is exact (a
  plane). The same holds on scans with realistic noise (points at random positions, 2 cm of
  noise, gridded as the survey step does) over a cone's apex and a reclaim face's ridge; a
  shadow centred on the corner where the ridge meets the face stays low (a known shortfall).
"""

from __future__ import annotations

import math
import warnings

import geopandas as gpd
import numpy as np
import pytest
import shapely
from scipy import ndimage

from inventory._demo.shapes import Cone, Windrow
from inventory.model.grid import Grid, Surface
from inventory.site.load import Material
from inventory.survey.gridding import fill_holes, grid_points
from inventory.volume import base as vb
from inventory.volume import measure as vm
from inventory.volume.base import residual_correlation, toe_base
from inventory.volume.gapfill import fill_slope_breaks

MATS = {"m": Material("m", bulk_density_t_m3=1.6, density_sd_t_m3=0.0, moisture_pct=0.0)}
TAN35 = math.tan(math.radians(35.0))


def _piles(poly, base):
    return gpd.GeoDataFrame({"pile_id": ["P"], "material": ["m"], "base": [base], "density_t_m3": [None]},
                            geometry=[poly])


def _measure(surface, poly, base="level:10"):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return vm.measure_piles(surface, _piles(poly, base), MATS, vm.BaseSurfaces()).iloc[0]


# ----------------------------------------------------------------------------- base term
def _rough_plane(sigma, length_m=0.0, pile_sd=0.0, seed=0, ring_points=4):
    """A plane with ground roughness of sd ``sigma`` (white, or Gaussian-correlated over
    ``length_m``), ground cells of ``ring_points`` points with no scatter of their own
    (all of their spread is ground), and a cone on it whose cells carry ``pile_sd`` of
    point scatter (a steep, densely scanned flank) in 4 points each."""
    g = Grid(-20.0, 20.0, 0.5, 80, 80)
    x, y = g.centers()
    rng = np.random.default_rng(seed)
    e = rng.standard_normal(g.shape)
    if length_m > 0:
        e = ndimage.gaussian_filter(e, length_m / g.cell)
    e *= sigma / e.std()
    cone = Cone(0.0, 0.0, 6.0, 35.0)
    t = cone.thickness(x, y)
    z = 10.0 + 0.01 * x + 0.02 * y + e + t
    count = np.where(t > 0, 4, ring_points).astype(np.int32)
    sd = np.where(t > 0, pile_sd, np.where(count >= 2, 0.0, np.nan))
    return Surface(g, z, count, sd, np.zeros(g.shape, bool)), cone


def test_toe_base_sigma_is_standard_error_of_the_ring_mean():
    sigma = 0.03
    s, cone = _rough_plane(sigma)
    poly = shapely.Point(0, 0).buffer(7.0, quad_segs=64)
    model = toe_base(s.grid, poly, [], s.z, s.count, s.sd, s.filled, 3.0, 0.01)
    n = model.ring_cells
    # white ground: every ring cell is independent, and the plane's intercept at the
    # ring's centroid (the pile's centre) has the standard error of a mean of n cells
    assert model.ring_independent == pytest.approx(n, rel=0.15)
    assert math.sqrt(model.cov[0, 0]) == pytest.approx(sigma / math.sqrt(n), rel=0.15)
    row = _measure(s, poly, "toe")
    area = np.pi * 6.0**2   # the cells under the cone carry the volume (positive thickness)
    a = s.grid.cell_area
    # standard error of the ring's mean over the pile's area, plus the white ground under
    # the pile cell by cell (n_pile cells of sd sigma: sigma sqrt(n_pile) a)
    expected = math.sqrt((area * sigma / math.sqrt(n)) ** 2 + sigma**2 * a * area)
    assert row.sigma_base_m3 == pytest.approx(expected, rel=0.15)


def test_toe_base_sigma_ignores_the_scatter_on_the_pile():
    # The issue's failure: denser points on steep flanks raised a survey-wide "typical
    # scatter" and cancelled the ground's roughness in the base term. The base term now
    # comes from the ring alone: a ring of single-point cells (no scatter of their own to
    # read) with a hundred times the scatter on the pile gives the same base sigma, which
    # is the standard error of the ring's mean as above (the old term fell to the plane's
    # fit alone here: the flanks' 20 cm "typical scatter" swallowed the 3 cm roughness).
    poly = shapely.Point(0, 0).buffer(7.0, quad_segs=64)
    calm, _ = _rough_plane(0.03, pile_sd=0.002, ring_points=1)
    busy, _ = _rough_plane(0.03, pile_sd=0.2, ring_points=1)
    b_busy = _measure(busy, poly, "toe").sigma_base_m3
    assert b_busy == pytest.approx(_measure(calm, poly, "toe").sigma_base_m3, rel=1e-9)
    model = toe_base(busy.grid, poly, [], busy.z, busy.count, busy.sd, busy.filled, 3.0, 0.2)
    area, a, n = np.pi * 6.0**2, busy.grid.cell_area, model.ring_cells
    assert b_busy == pytest.approx(math.sqrt((area * 0.03) ** 2 / n + 0.03**2 * a * area), rel=0.15)


def test_correlated_ground_makes_fewer_independent_ring_cells():
    poly = shapely.Point(0, 0).buffer(7.0, quad_segs=64)
    white, _ = _rough_plane(0.03, seed=1)
    wavy, _ = _rough_plane(0.03, length_m=2.0, seed=1)
    mw = toe_base(white.grid, poly, [], white.z, white.count, white.sd, white.filled, 3.0, 0.01)
    mc = toe_base(wavy.grid, poly, [], wavy.z, wavy.count, wavy.sd, wavy.filled, 3.0, 0.01)
    assert mc.ring_independent < mw.ring_independent / 3
    assert mc.rough_length_m > 1.0
    assert _measure(wavy, poly, "toe").sigma_base_m3 > 2 * _measure(white, poly, "toe").sigma_base_m3


def test_residual_correlation_of_white_and_correlated_fields():
    rng = np.random.default_rng(3)
    white = rng.standard_normal((120, 120))
    c, _ = residual_correlation(white, 0.5)
    assert c == 0.0
    # An exponential field is not needed to see the length: a Gaussian-filtered one of
    # kernel sd 2 cells has correlation exp(-d^2 / (4 s^2)), 1/e at 2 s = 2 m here.
    smooth = ndimage.gaussian_filter(rng.standard_normal((200, 200)), 4.0)
    c, length = residual_correlation(smooth, 0.5)
    assert c > 0.7
    assert 1.0 < length < 6.0


# ----------------------------------------------------------------------------- gap fill
GRID = Grid(-20.0, 20.0, 0.5, 80, 80)


def _linear_only(monkeypatch):
    monkeypatch.setattr(vm, "fill_slope_breaks", lambda z, linear, *a, **k: linear)


@pytest.mark.parametrize("R, r, shadow", [(10.0, 4.0, 3.0), (9.0, 3.0, 3.0), (10.0, 4.0, 2.0)])
def test_shadow_over_a_frustum_top_edge(R, r, shadow, monkeypatch, cell_mean_surface):
    h = (R - r) * TAN35
    volume = math.pi * h * (R * R + R * r + r * r) / 3.0   # handbook frustum of a cone

    def thickness(x, y):
        return np.clip(np.minimum(h, (R - np.hypot(x, y)) * TAN35), 0.0, None)

    s = cell_mean_surface(thickness, GRID, lambda x, y: np.hypot(x - r, y) < shadow)
    poly = shapely.Point(0, 0).buffer(R + 1.0, quad_segs=64)
    row = _measure(s, poly)
    assert row.volume_m3 == pytest.approx(volume, rel=0.005)
    assert abs(row.volume_m3 - volume) <= row.volume_ci95_m3
    if shadow >= 3.0:
        # linear filling cuts the edge off: -1.5 % and -2.2 % here
        _linear_only(monkeypatch)
        assert _measure(s, poly).volume_m3 < volume * 0.99


def test_shadow_over_a_cone_apex(monkeypatch, cell_mean_surface):
    cone = Cone(0.0, 0.0, 10.0, 35.0)   # handbook cone: pi r^2 h / 3
    s = cell_mean_surface(cone.thickness, GRID, lambda x, y: np.hypot(x, y) < 2.0)
    poly = shapely.Point(0, 0).buffer(11.0, quad_segs=64)
    row = _measure(s, poly)
    assert row.volume_m3 == pytest.approx(math.pi * 100.0 * cone.height / 3.0, rel=0.005)
    _linear_only(monkeypatch)
    assert _measure(s, poly).volume_m3 < cone.volume() * 0.9925   # linear: -1.0 %


def test_shadow_over_a_windrow_ridge(monkeypatch, cell_mean_surface):
    w = Windrow(-10.0, 0.0, 20.0, 18.0, 6.0, 35.0)
    cx, cy = -10.0 + 9.0 * math.cos(math.radians(20.0)), 9.0 * math.sin(math.radians(20.0))
    s = cell_mean_surface(w.thickness, GRID, lambda x, y: np.hypot(x - cx, y - cy) < 2.5)
    poly = w.outline().buffer(1.0)
    # handbook: prism L w h plus the two half cones of the ends, pi w^2 h / 3
    volume = 18.0 * 6.0 * w.height + math.pi * 36.0 * w.height / 3.0
    assert w.volume() == pytest.approx(volume)
    assert _measure(s, poly).volume_m3 == pytest.approx(volume, rel=0.005)
    _linear_only(monkeypatch)
    assert _measure(s, poly).volume_m3 < volume * 0.99   # linear: -1.4 %


def _scan(thickness, hidden, seed, density=8.0, noise=0.02):
    """A scan of a pile on a level pad at 10 m: points at random positions (``density`` a
    m2 of plan), Gaussian noise, none where ``hidden``; gridded and hole-filled (3 m) as
    the survey step does."""
    rng = np.random.default_rng(seed)
    x0, y1 = GRID.west, GRID.north
    x1, y0 = x0 + GRID.ncols * GRID.cell, y1 - GRID.nrows * GRID.cell
    n = rng.poisson(density * (x1 - x0) * (y1 - y0))
    x, y = rng.uniform(x0, x1, n), rng.uniform(y0, y1, n)
    seen = ~hidden(x, y)
    x, y = x[seen], y[seen]
    z = 10.0 + thickness(x, y) + rng.normal(0.0, noise, x.size)
    return fill_holes(grid_points(GRID, x, y, z, "mean"), 3.0)[0]


@pytest.mark.parametrize("density", [8.0, 40.0])
def test_noisy_shadow_over_a_cone_apex(density, monkeypatch):
    # 8 m cone at 35 deg, a 3 m shadow over its apex, 2 cm of noise: within 0.5 % of the
    # handbook cone V = pi r^2 h / 3 on average over six scans, none off by 1 %; linear
    # filling is about 5.5 % low. The rim planes are fitted on arcs about the gap, merged
    # where the flank does not turn, so each follows its own part of the cone.
    cone = Cone(0.0, 0.0, 8.0, 35.0)
    volume = math.pi * 8.0**2 * cone.height / 3.0
    poly = shapely.Point(0, 0).buffer(9.0, quad_segs=64)
    scans = [_scan(cone.thickness, lambda x, y: np.hypot(x, y) < 3.0, seed, density) for seed in range(6)]
    err = np.array([_measure(s, poly).volume_m3 / volume - 1.0 for s in scans])
    assert abs(err.mean()) < 0.005
    assert np.abs(err).max() < 0.01
    _linear_only(monkeypatch)
    assert _measure(scans[0], poly).volume_m3 < volume * 0.96


def _reclaim():
    """A windrow cut by a 60 deg reclaim face, its handbook volume (prism to the top of the
    face, the slice under the face, one half cone at the far end: w h (s_f - h / tan f) +
    (2/3) w h^2 / tan f + pi w^2 h / 6, from memory) and the corner where its ridge meets the
    top of the face (three planes meet there)."""
    w = Windrow(-10.0, 0.0, 0.0, 18.0, 6.0, 35.0, face_s=15.0, face_deg=60.0)
    h, tf = w.height, math.tan(math.radians(60.0))
    volume = 6.0 * h * (15.0 - h / tf) + (2.0 / 3.0) * 6.0 * h * h / tf + math.pi * 36.0 * h / 6.0
    assert w.volume() == pytest.approx(volume)
    return w, volume, -10.0 + 15.0 - h / tf


@pytest.mark.parametrize("density", [8.0, 40.0])
def test_noisy_shadow_over_a_reclaim_ridge(density, monkeypatch):
    # a 2.5 m shadow over the ridge that reaches the top of the face, 2 cm of noise: within
    # 0.5 % on average over six scans, none off by 1 %; linear filling is about 1.4-1.9 % low
    w, volume, corner = _reclaim()
    poly = w.outline().buffer(1.0)
    scans = [_scan(w.thickness, lambda x, y: np.hypot(x - corner + 2.5, y) < 2.5, seed, density)
             for seed in range(6)]
    err = np.array([_measure(s, poly).volume_m3 / volume - 1.0 for s in scans])
    assert abs(err.mean()) < 0.005
    assert np.abs(err).max() < 0.01
    _linear_only(monkeypatch)
    assert _measure(scans[0], poly).volume_m3 < volume * 0.99


def test_noisy_shadow_over_a_reclaim_face_corner(monkeypatch):
    # Centred on the corner itself, the shadow's rim beyond the face is floor, whose planes
    # pass below the chord: fewer than three quarters of the directions then show a crest
    # and much of the gap keeps the chord. Better than linear filling (about -2.8 %), but
    # still about 1.8 % low: a known shortfall (docs/uncertainty.md), checked so that a
    # change for the better or the worse is seen.
    w, volume, corner = _reclaim()
    poly = w.outline().buffer(1.0)
    scans = [_scan(w.thickness, lambda x, y: np.hypot(x - corner, y) < 2.5, seed) for seed in range(4)]
    err = np.array([_measure(s, poly).volume_m3 / volume - 1.0 for s in scans])
    _linear_only(monkeypatch)
    lin = np.array([_measure(s, poly).volume_m3 / volume - 1.0 for s in scans])
    assert lin.mean() < -0.025
    assert lin.mean() + 0.005 < err.mean() < -0.01


def test_fill_keeps_the_linear_value_on_a_plane_and_on_a_noisy_flank():
    g = Grid(0.0, 20.0, 0.5, 40, 40)
    x, y = g.centers()
    z = 5.0 + 0.6 * x - 0.3 * y
    known = np.hypot(x - 10, y - 10) >= 3.0
    linear = z.copy()                     # linear interpolation is exact on a plane
    out = fill_slope_breaks(np.where(known, z, np.nan), linear, known, ~known, g.cell)
    np.testing.assert_allclose(out, z, atol=1e-9)
    # with 5 cm of noise on the scanned cells the planes scatter about the chord on both
    # sides: the chord is kept (no envelope clears it by two standard errors everywhere)
    noisy = z + np.random.default_rng(0).normal(0.0, 0.05, z.shape)
    out = fill_slope_breaks(np.where(known, noisy, np.nan), linear, known, ~known, g.cell)
    assert np.abs(out - z)[~known].mean() < 0.02


# ----------------------------------------------------------------------------- correlated term
def test_toe_correlated_term_is_the_fields_departure_from_the_ring_plane():
    # With a toe base, a registration error field f moves the volume by
    # sum w a f - sum h_k f_k (h: the ring cells' weights in the plane's volume). Its
    # variance under the spherical model, summed directly over every pair of cells, is what
    # the volume table reports; and a field that is nearly one shift over pile and ring
    # (range 200 m) is mostly taken away by the plane, unlike over a level base.
    s, _ = _rough_plane(0.01, seed=4)
    poly = shapely.Point(0, 0).buffer(7.0, quad_segs=64)
    em = vm.ErrorModel(correlation_length_m=200.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        toe = vm.measure_piles(s, _piles(poly, "toe"), MATS, vm.BaseSurfaces(), errors=em).iloc[0]
        level = vm.measure_piles(s, _piles(poly, "level:10"), MATS, vm.BaseSurfaces(), errors=em).iloc[0]
    model = toe_base(s.grid, poly, [], s.z, s.count, s.sd, s.filled, 3.0, 0.01)
    (rows, cols), w = vm.footprint_weights(poly, s.grid)
    x, y = s.grid.centers()
    x, y = x[rows, cols], y[rows, cols]
    a = s.grid.cell_area
    _, th = vm.thickness_raster(s, _piles(poly, "toe"))
    pos = (w > 0) & (th[rows, cols] > 0)   # the cells whose volume the base moves
    h = model.ring_weights((w * a)[pos], x[pos], y[pos])
    vals = np.concatenate([(w * a)[w > 0], -h])
    px = np.concatenate([x[w > 0], model.ring_xy[:, 0]])
    py = np.concatenate([y[w > 0], model.ring_xy[:, 1]])
    d = np.hypot(px[:, None] - px[None, :], py[:, None] - py[None, :]) / 200.0
    rho = np.where(d < 1, 1 - 1.5 * d + 0.5 * d**3, 0.0)   # spherical model (Rolstad et al. 2009)
    direct = 0.01 * math.sqrt(vals @ rho @ vals)
    assert toe.sigma_correlated_m3 == pytest.approx(direct, rel=0.02)
    assert toe.sigma_correlated_m3 < 0.5 * level.sigma_correlated_m3


# -------------------------------------------------------- toe plane probed on open ground
def _rolling(amp, wavelength=50.0, size=160.0):
    """Ground rolling in both directions (``amp`` m, ``wavelength`` m) with a cone (r 6 m,
    35 degrees) on a crest at the centre; every cell scanned."""
    g = Grid(-size / 2, size / 2, 0.5, int(size / 0.5), int(size / 0.5))
    x, y = g.centers()
    k = 2 * math.pi / wavelength
    ground = 10.0 + amp * np.cos(k * x) * np.cos(k * y)
    cone = Cone(0.0, 0.0, 6.0, 35.0)
    z = ground + cone.thickness(x, y)
    count = np.full(g.shape, 4, np.int32)
    return Surface(g, z, count, np.zeros(g.shape), np.zeros(g.shape, bool)), cone, ground


def test_toe_plane_probes_see_the_crest_the_ring_cannot():
    # A cone on the crest of rolling ground (15 cm, 50 m waves): the ground under it stands
    # above the plane through its ring all round, which the ring's residuals cannot show
    # (the rise is nearly the same all round the ring). Copies of the footprint and ring on
    # the open ground around find the plane off by centimetres, and the interval holds.
    s, cone, ground = _rolling(0.15)
    poly = shapely.Point(0, 0).buffer(7.0, quad_segs=64)
    a = s.grid.cell_area
    x, y = s.grid.centers()
    row = _measure(s, poly, "toe")
    err = row.volume_m3 - cone.volume()        # cone: pi r^2 h / 3 (Shapes.Cone.volume)
    assert err > 5.0                            # the plane lies under the crest: +7.5 m3 of 158
    sig, n = vb.toe_probe_sigma(s.grid, s.z, vb.open_ground(s.z, s.count, s.filled, s.grid, [poly], 3.0),
                                poly, 3.0)
    assert n >= vb.PROBE_LEAST
    # the copies' errors, on crests, troughs and the slopes between: a few centimetres
    assert 0.01 < sig < 0.06
    # the base term is that error over the cells that carry volume (the cone's and the
    # crest's above the plane: between the cone's base and the footprint)
    assert sig * np.pi * 36 <= row.sigma_base_m3 <= sig * np.pi * 49 * 1.05
    assert abs(err) <= row.volume_ci95_m3
    # the ring's own term alone (no copies) gives an interval that misses
    model = toe_base(s.grid, poly, [], s.z, s.count, s.sd, s.filled, 3.0, 0.0)
    pos = shapely.contains_xy(poly, x, y) & (s.z - model.at(x, y) > 0)
    assert 1.96 * model.volume_sigma(np.full(int(pos.sum()), a), x[pos], y[pos]) < abs(err)


def test_toe_plane_probes_on_a_plane_change_nothing():
    # Flat open ground: every copy's plane fits exactly, and the ring's own term stands.
    s, cone, _ = _rolling(0.0)
    poly = shapely.Point(0, 0).buffer(7.0, quad_segs=64)
    sig, n = vm.toe_probe_sigma(s.grid, s.z, vm.open_ground(s.z, s.count, s.filled, s.grid, [poly], 3.0),
                                poly, 3.0)
    assert n == vb.PROBE_MOST and sig < 1e-9
    row = _measure(s, poly, "toe")
    assert row.volume_m3 == pytest.approx(cone.volume(), rel=0.02)
    assert row.sigma_base_m3 < 0.05
