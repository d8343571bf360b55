"""Pile volumes on the demo terminal, against the simulator's true volumes.

Two levels:

* The volume step alone: the demo terminal is scanned with the simulator
  (:mod:`inventory._demo.simulate`), the points it labels pad or pile are kept (a perfect
  ground classifier), gridded and hole-filled with :mod:`inventory.survey.gridding`, and measured.
  Checks: the 95 % interval covers the true volume; doubling the range noise raises the
  reported sigma; hiding 20 % of a pile from every station raises it and still covers.
* The sample site end to end (slow): ``load_site`` -> ``measure_survey`` ->
  ``measure_piles`` against ``sample_site/truth.json``.

True volumes are the handbook formulas of each shape (``Shape.volume()``; cone, windrow
with conical ends, reclaim face, bay pile), as written to truth.json by the demo.
"""

from __future__ import annotations

import warnings
from functools import lru_cache
from pathlib import Path

import numpy as np
import pytest
import shapely

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_site"
TRUTH = SAMPLE / "truth.json"

import inventory._demo.scenario as demo_sc
import inventory._demo.simulate as demo_sim
import inventory.survey.gridding as surface_mod
from inventory.errors import CoverageWarning
from inventory.model.grid import Grid
from inventory.site.load import Material
from inventory.volume.measure import BaseSurfaces, measure_piles

#: Share of piles whose 95 % interval must contain the truth (the issue's bar).
COVERAGE_BAR = 0.90
#: Piles at least this big must be within 1 % of their true volume (the issue's bar).
BIG_PILE_M3 = 1000.0


def _need_sample():
    if not TRUTH.exists():
        pytest.skip("sample_site/truth.json is missing (write it with `inventory sample sample_site`)")


@lru_cache(maxsize=None)
def _footprints_local():
    """The sample site's footprints, moved to the simulator's local frame."""
    import geopandas as gpd

    piles = gpd.read_file(SAMPLE / "piles.gpkg", layer="piles")
    ox, oy, _ = demo_sc.SITE_ORIGIN
    piles["geometry"] = piles.geometry.translate(-ox, -oy)
    piles = piles.set_crs(None, allow_override=True)
    return piles


def _materials():
    return {m.name: Material(m.name, bulk_density_t_m3=m.table_density_t_m3, density_sd_t_m3=m.density_sd_t_m3,
                             moisture_pct=m.moisture_pct) for m in demo_sc.MATERIALS.values()}


# Call with all three arguments: lru_cache keys (1, 1) and (1, 1, 1.0) apart.
@lru_cache(maxsize=None)
def _scan(k: int, seed: int, noise_factor: float = 1.0):
    """Pad and pile points of survey ``k`` of the demo terminal (local frame)."""
    terminal = demo_sc.terminal_at(k, np.random.default_rng(seed))
    scene = terminal.scene()
    base = demo_sim.ScannerModel()
    model = demo_sim.ScannerModel(range_sd_near_m=base.range_sd_near_m * noise_factor,
                                  range_sd_far_m=base.range_sd_far_m * noise_factor)
    pts, pile_idx = [], []
    for i, st in enumerate(demo_sc.SURVEYS[k].stations):
        res = demo_sim.scan(scene, st, model, np.random.default_rng(seed * 1000 + i))
        keep = (res.kind == demo_sim.KIND_PAD) | (res.kind == demo_sim.KIND_PILE)
        pts.append(res.xyz[keep])
        pile_idx.append(res.pile[keep])
    truth = {pid: sh.volume() for pid, sh in terminal.shapes.items()}
    return np.concatenate(pts), np.concatenate(pile_idx), truth


def _measure(points: np.ndarray):
    x0, y0, x1, y1 = demo_sc.PAD_BOUNDS
    cell = 0.5  # the sample site's [grid] cell_size_m
    grid = Grid.snapped(x0, y0, x1 - 1e-6, y1 - 1e-6, cell=cell)
    inside = (points[:, 0] >= x0) & (points[:, 0] < x1) & (points[:, 1] >= y0) & (points[:, 1] < y1)
    p = points[inside]
    surf = surface_mod.grid_points(grid, p[:, 0], p[:, 1], p[:, 2], "mean")
    surf, _ = surface_mod.fill_holes(surf, 3.0)  # the sample site's max_fill_distance_m
    floor = demo_sc.pad_height(*grid.centers())  # the demo's floor.tif is the true pad
    base = BaseSurfaces(floor=floor, floor_sigma_m=0.03, toe_ring_m=3.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", CoverageWarning)
        return measure_piles(surf, _footprints_local(), _materials(), base)


@lru_cache(maxsize=None)
def _table(k: int, seed: int, noise_factor: float = 1.0):
    """Measured piles and true volumes of one simulated survey (cached across tests)."""
    pts, _, truth = _scan(k, seed, noise_factor)
    return _measure(pts), truth


def _covered(table, truth) -> list[bool]:
    return [abs(r.volume_m3 - truth[r.pile_id]) <= r.volume_ci95_m3 for _, r in table.iterrows()]


# ----------------------------------------------------------------------------- volume step alone
@pytest.mark.slow
def test_simulated_surveys_interval_covers_truth():
    # The 95 % interval contains the true volume for at least 90 % of the piles of both
    # surveys (one simulator seed here; more seeds in the slow test below).
    _need_sample()
    hits = []
    for k in (0, 1):
        hits += _covered(*_table(k, 1))
    assert np.mean(hits) >= COVERAGE_BAR, hits


def test_doubling_range_noise_increases_sigma():
    # Honesty: the same scan with twice the scanner's range noise (same rays, same seeds)
    # must report a larger random term. The random term holds the range noise and the
    # spread of the points' positions across a sloping cell (about 0.7 x 0.5 m / sqrt(12)
    # = 10 cm a point on a 35 degree flank at 0.5 m cells), so doubling a 1-2.5 cm range
    # noise raises it by a few percent, and the noisier returns land in other cells: pile
    # by pile it can move either way by about as much (L1: 0.788 -> 0.783 m3 here). Over
    # the survey it must rise, and on most piles; with the points held in their cells
    # every pile's must rise (next test). (The total is dominated by the interpolation
    # term, which depends on which cells the noisier returns happen to hit.)
    _need_sample()
    t1 = _table(1, 1)[0]
    t2 = _table(1, 1, 2.0)[0]
    assert np.sum(t2.sigma_random_m3.values**2) > np.sum(t1.sigma_random_m3.values**2)
    assert np.mean(t2.sigma_random_m3.values > t1.sigma_random_m3.values) >= 0.7


def test_more_noise_on_the_same_cells_increases_every_sigma():
    # Honesty, with the scan geometry held fixed: the same points with extra elevation noise
    # (doubling the scanner's mean range sd of 1.75 cm: sqrt(2^2 - 1) x 1.75 cm more) hit
    # the same cells, so only the noise changes: every pile's random term and the total
    # sigma must rise. (Pile by pile the total can move either way by a few tenths of a
    # percent: the slope mismatch is itself estimated from noisy gradients.)
    _need_sample()
    pts, _, _ = _scan(1, 1, 1.0)
    base = demo_sim.ScannerModel()
    extra = np.sqrt(3.0) * 0.5 * (base.range_sd_near_m + base.range_sd_far_m)
    noisy = pts.copy()
    noisy[:, 2] += np.random.default_rng(7).normal(0.0, extra, len(pts))
    t1 = _table(1, 1)[0]
    t2 = _measure(noisy)
    assert (t2.scanned_fraction.values == t1.scanned_fraction.values).all()
    assert (t2.sigma_random_m3.values > t1.sigma_random_m3.values).all()
    assert t2.volume_sigma_m3.sum() > t1.volume_sigma_m3.sum(), (t1.volume_sigma_m3.values, t2.volume_sigma_m3.values)


def test_hiding_a_fifth_of_a_pile_increases_sigma_and_still_covers():
    # Honesty: remove every station's points over a sector holding 20 % of S1's plan area
    # (the best-covered pile): its sigma rises, its scanned share falls, and its 95 %
    # interval still contains the true volume. Other piles are unchanged.
    _need_sample()
    pts, _, truth = _scan(1, 1, 1.0)
    full = _table(1, 1)[0].set_index("pile_id")
    fp = _footprints_local().set_index("pile_id").geometry["S1"]
    # A strip across the bay, from the back wall to the front: 20 % of the footprint.
    x0, y0, x1, y1 = fp.bounds
    width = 0.2 * (x1 - x0)
    hide = shapely.box(x0 + 0.4 * (x1 - x0), y0 - 1, x0 + 0.4 * (x1 - x0) + width, y1 + 1)
    assert hide.intersection(fp).area == pytest.approx(0.2 * fp.area, rel=0.01)
    keep = ~shapely.contains_xy(hide, pts[:, 0], pts[:, 1])
    part = _measure(pts[keep]).set_index("pile_id")
    s_full, s_part = full.loc["S1"], part.loc["S1"]
    assert s_part.volume_sigma_m3 > s_full.volume_sigma_m3
    assert s_part.scanned_fraction < s_full.scanned_fraction - 0.1
    assert abs(s_part.volume_m3 - truth["S1"]) <= s_part.volume_ci95_m3
    assert part.loc["C1"].volume_m3 == pytest.approx(full.loc["C1"].volume_m3)


@pytest.mark.slow
def test_simulated_surveys_interval_covers_truth_more_seeds():
    # The bar across the two surveys and three simulator seeds (birds, dust,
    # noise and dropouts change with the seed).
    _need_sample()
    hits = []
    for seed in (1, 2, 3):
        for k in (0, 1):
            hits += _covered(*_table(k, seed))
    assert len(hits) == 42
    assert np.mean(hits) >= COVERAGE_BAR, hits


@pytest.mark.slow
def test_simulated_surveys_sigma_is_useful():
    # Honest is not enough: an interval many times wider than the errors hides every
    # variance. Over three seeds the median sigma stays within 2 % of the pile's volume
    # (issue 6: variances of 2-4 % must be able to stand out), and the errors are not
    # all tiny against it (at least one pile-survey beyond a third of its sigma).
    _need_sample()
    sig, z = [], []
    for seed in (1, 2, 3):
        for k in (0, 1):
            table, truth = _table(k, seed)
            t = table.pile_id.map(truth)
            sig += list(table.volume_sigma_m3 / t)
            z += list((table.volume_m3 - t) / table.volume_sigma_m3)
    assert np.median(sig) <= 0.02, np.round(sig, 4)
    assert np.max(np.abs(z)) > 1 / 3, np.round(z, 2)


# ----------------------------------------------------------------------------- end to end
def _sample_tables(chain):
    """Both sample surveys through the real chain (the session's ``sample_chain`` fixture)."""
    return [(sv["date"], chain.volumes(sv["date"]), {p: v["volume_m3"] for p, v in sv["piles"].items()})
            for sv in chain.truth["surveys"]]


@pytest.mark.slow
def test_sample_site_interval_covers_truth(sample_chain):
    _need_sample()
    hits = []
    for _, table, truth in _sample_tables(sample_chain):
        hits += _covered(table, truth)
    assert np.mean(hits) >= COVERAGE_BAR, hits


@pytest.mark.slow
def test_sample_site_big_piles_within_one_percent(sample_chain):
    _need_sample()
    errors = {}
    for date, table, truth in _sample_tables(sample_chain):
        for _, r in table.iterrows():
            if truth[r.pile_id] >= BIG_PILE_M3:
                errors[f"{date} {r.pile_id}"] = r.volume_m3 / truth[r.pile_id] - 1
    assert errors and all(abs(e) <= 0.01 for e in errors.values()), errors
