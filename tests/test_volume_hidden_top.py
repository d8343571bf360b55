"""Hidden tops: what the flanks cannot tell (a crest or a flat top), and a wall the gap fill
must not cross.

* A frustum (flat-topped cone) whose whole flat top no station saw: the slope-break fill
  extends the flanks to the apex of the full cone, a volume the flanks alone cannot rule
  out; the 95 % interval must hold the frustum's true volume all the same, and the pile is
  flagged ``hidden_top``. The handbook volumes: frustum V = pi h (R^2 + R r + r^2) / 3, cone
  V = pi R^2 H / 3 (any engineering-mathematics handbook, from memory).
* A cone whose small apex is hidden keeps its accuracy and is not flagged.
* Sand pushed against a wall, its flat top hidden from the crest to the wall and the ground
  behind the wall unseen: with the wall's cells known to the volume step (the survey's
  object cells) the fill keeps the top's level up to the wall instead of falling to the
  floor behind it. The true volume is :class:`inventory._demo.shapes.Plateau`'s (Steiner's
  formula, checked against midpoint integration in tests/test_demo_yard2.py).
"""

from __future__ import annotations

import math
import warnings

import geopandas as gpd
import numpy as np
import pytest
import shapely

from inventory._demo.shapes import Cone, Plateau
from inventory.errors import CoverageWarning
from inventory.model.grid import Grid
from inventory.site.load import Material
from inventory.survey.gridding import fill_holes
from inventory.volume import measure as vm

MATS = {"m": Material("m", bulk_density_t_m3=1.6, density_sd_t_m3=0.0, moisture_pct=0.0)}
TAN35 = math.tan(math.radians(35.0))
GRID = Grid(-20.0, 20.0, 0.5, 80, 80)


def _piles(poly, base="level:10"):
    return gpd.GeoDataFrame({"pile_id": ["P"], "material": ["m"], "base": [base], "density_t_m3": [None]},
                            geometry=[poly])


def _measure(surface, poly):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return vm.measure_piles(surface, _piles(poly), MATS, vm.BaseSurfaces()).iloc[0]


# ----------------------------------------------------------------------------- crest or flat top
R, r_TOP = 10.0, 5.0
H = (R - r_TOP) * TAN35
FRUSTUM = math.pi * H * (R * R + R * r_TOP + r_TOP * r_TOP) / 3.0   # 641.4 m3
FULL_CONE = math.pi * R * R * (R * TAN35) / 3.0                      # 733.0 m3


def _frustum(x, y):
    return np.clip(np.minimum(H, (R - np.hypot(x, y)) * TAN35), 0.0, None)


def test_hidden_flat_top_interval_holds_the_truth_and_the_pile_is_flagged(monkeypatch, cell_mean_surface):
    # the whole flat top and 0.5 m of the flank below its edge unseen: from the flanks it
    # could be the frustum (641 m3) as well as the full cone (733 m3)
    s = cell_mean_surface(_frustum, GRID, lambda x, y: np.hypot(x, y) < r_TOP + 0.5)
    poly = shapely.Point(0, 0).buffer(R + 1.0, quad_segs=64)
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        row = vm.measure_piles(s, _piles(poly), MATS, vm.BaseSurfaces()).iloc[0]
    # the value is the flanks' envelope (a hidden apex): well above the frustum ...
    assert row.volume_m3 > FRUSTUM * 1.08
    assert row.volume_m3 < FULL_CONE * 1.005
    # ... and the interval reaches down to it, which the interval without the hidden-top
    # term did not (the test of the term: it is what makes the interval hold)
    assert abs(row.volume_m3 - FRUSTUM) <= row.volume_ci95_m3
    monkeypatch.setattr(vm, "_hidden_top", lambda work, a: (0.0, 0.0))
    narrow = _measure(s, poly)
    assert narrow.volume_m3 == pytest.approx(row.volume_m3)
    assert abs(narrow.volume_m3 - FRUSTUM) > narrow.volume_ci95_m3
    # the flag, and the warning that says what is at stake
    assert "hidden_top" in str(row["flags"]).split(";")
    assert "hidden_top" not in str(narrow["flags"]).split(";")
    texts = [str(w.message) for w in seen if issubclass(w.category, CoverageWarning)]
    assert any("pile P: its top was not seen" in t for t in texts)


def test_hidden_top_range_is_the_volume_between_the_chord_and_the_envelope(monkeypatch, cell_mean_surface):
    # _hidden_top returns the volume between the linear fill and the bound; the value is at
    # the bound's end, so sigma = range / sqrt(3) (one gap)
    s = cell_mean_surface(_frustum, GRID, lambda x, y: np.hypot(x, y) < r_TOP + 0.5)
    poly = shapely.Point(0, 0).buffer(R + 1.0, quad_segs=64)
    got = []
    orig = vm._hidden_top
    monkeypatch.setattr(vm, "_hidden_top", lambda work, a: got.append(orig(work, a)) or got[-1])
    row = _measure(s, poly)
    sigma, width = got[0]
    monkeypatch.setattr(vm, "fill_slope_breaks", lambda z, linear, *a, **k: linear)
    linear = _measure(s, poly)
    assert width == pytest.approx(row.volume_m3 - linear.volume_m3, rel=0.02)
    assert sigma == pytest.approx(width / math.sqrt(3.0), rel=0.02)
    # a concave surface lies above its chords: the linear fill is below the frustum (it
    # cuts the edge of the top, whose last 0.5 m of flank is hidden too: -5 %)
    assert FRUSTUM * 0.93 < linear.volume_m3 < FRUSTUM


def test_small_hidden_apex_keeps_its_accuracy_and_is_not_flagged(cell_mean_surface):
    cone = Cone(0.0, 0.0, 10.0, 35.0)
    s = cell_mean_surface(cone.thickness, GRID, lambda x, y: np.hypot(x, y) < 2.0)
    poly = shapely.Point(0, 0).buffer(11.0, quad_segs=64)
    row = _measure(s, poly)
    volume = math.pi * 100.0 * cone.height / 3.0
    assert row.volume_m3 == pytest.approx(volume, rel=0.005)
    assert abs(row.volume_m3 - volume) <= row.volume_ci95_m3
    assert "hidden_top" not in str(row["flags"]).split(";")


# ----------------------------------------------------------------------------- against a wall
# Sand pushed against a wall on x = 0 (the wall 0.5 m thick, east of it): core 16 m x 8 m,
# toe 5 m beyond it, flat top 2.5 m high from 1 m beyond the core up to the wall.
WALLED = Plateau(0.0, 0.0, 90.0, 16.0, 8.0, 5.0, 2.5, 32.0, wall=True)


def _walled_hidden(x, y):
    # the top within 4 m of the wall unseen (its crest at x = -5 seen), and every cell
    # from the wall's face eastwards (the wall and the ground behind it)
    return ((x > -4.0) & (np.abs(y) < WALLED.length / 2.0 + 0.5)) | (x > 0.0)


def _wall(x, y):
    return (x > 0.0) & (x < 0.5) & (np.abs(y) < 18.0)


@pytest.mark.parametrize("survey_fill", [False, True])
def test_hidden_top_against_a_wall_is_not_filled_down_to_the_floor_behind_it(survey_fill, cell_mean_surface):
    poly = shapely.box(-10.5, -14.5, 0.0, 14.5)
    truth = WALLED.volume()
    blind = cell_mean_surface(WALLED.thickness, GRID, _walled_hidden)
    walled = cell_mean_surface(WALLED.thickness, GRID, _walled_hidden, _wall)
    if survey_fill:   # the survey's own hole filling first (3 m), as a survey does
        blind, walled = fill_holes(blind, 3.0)[0], fill_holes(walled, 3.0)[0]
        assert "object_seen" in walled.meta
    # without the wall's cells the fill falls from the crest to the floor behind the wall:
    # -17.8 % (the survey's fill first: -2.5 %, the cells beside the wall 1.25-2.5 m)
    low = _measure(blind, poly)
    assert low.volume_m3 < truth * (0.98 if survey_fill else 0.85)
    # with them it keeps the top's level up to the wall
    row = _measure(walled, poly)
    assert row.volume_m3 == pytest.approx(truth, rel=0.03)
    assert abs(row.volume_m3 - truth) <= row.volume_ci95_m3
    # cell by cell: the filled top beside the wall, against the true 2.5 m
    bz, th = vm.thickness_raster(walled, _piles(poly))
    x, y = GRID.centers()
    beside = (x > -1.0) & (x < 0.0) & (np.abs(y) < 6.0)
    assert np.all(np.abs(th[beside] - 2.5) < 0.1), th[beside]
    bz, th_blind = vm.thickness_raster(blind, _piles(poly))
    assert np.mean(th_blind[beside]) < (2.0 if survey_fill else 1.0)


def test_object_cells_inside_the_footprint_or_far_from_it_change_nothing(cell_mean_surface):
    # a machine standing on the hidden top (inside the footprint) is no wall, and an
    # object 3 m beyond the footprint's edge does not stop the fill either
    poly = shapely.box(-10.5, -14.5, 0.0, 14.5)
    blind = _measure(cell_mean_surface(WALLED.thickness, GRID, _walled_hidden), poly)
    on_top = _measure(cell_mean_surface(WALLED.thickness, GRID, _walled_hidden,
                                  lambda x, y: (np.abs(x + 2.0) < 1.5) & (np.abs(y) < 2.0)), poly)
    far = _measure(cell_mean_surface(WALLED.thickness, GRID, _walled_hidden,
                               lambda x, y: (x > 3.0) & (x < 3.5) & (np.abs(y) < 18.0)), poly)
    assert on_top.volume_m3 == pytest.approx(blind.volume_m3, rel=1e-9)
    assert far.volume_m3 == pytest.approx(blind.volume_m3, rel=1e-9)
