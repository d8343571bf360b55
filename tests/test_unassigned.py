"""Stock outside every footprint (inventory.volume.unassigned): handbook solids planted on a
graded yard, a footprint drawn too small, the thresholds, and the sample site against the
simulator's truth."""

from __future__ import annotations

import math
import warnings

import geopandas as gpd
import numpy as np
import pytest
import rasterio
import shapely
from rasterio.warp import Resampling, reproject

from inventory.model.grid import Grid, Surface
from inventory.site.load import Material
from inventory.volume.measure import BaseSurfaces, measure_piles
from inventory.volume.unassigned import (
    DEFAULT_MIN_AREA_M2,
    DEFAULT_MIN_THICKNESS_M,
    UNASSIGNED_COLUMNS,
    find_unassigned,
)

CRS = "EPSG:25832"
X0, Y0 = 500000.0, 5700000.0
MATERIALS = {"sand": Material("sand", bulk_density_t_m3=1.6, density_sd_t_m3=0.05, moisture_pct=5.0)}


def _yard(cones, *, noise=0.01, seed=3, cell=0.5, width=80.0, height=60.0):
    """A yard graded 1 % east and 0.4 % north at about 10 m, with cones (x, y, r, h) on it,
    scanned everywhere with ``noise`` m of scatter per cell. Returns the surface and the yard."""
    g = Grid(X0, Y0 + height, cell, int(height / cell), int(width / cell), CRS)
    x, y = g.centers()
    yard = 10.0 + 0.01 * (x - X0) + 0.004 * (y - Y0)
    z = yard.copy()
    for cx, cy, r, h in cones:
        z += np.clip(h * (1.0 - np.hypot(x - cx, y - cy) / r), 0.0, None)
    z += np.random.default_rng(seed).normal(0.0, noise, z.shape)
    surface = Surface(g, z, np.full(g.shape, 4, np.int32), np.full(g.shape, 2 * noise),
                      np.zeros(g.shape, bool))
    return surface, yard


def _piles(*footprints, base="toe"):
    ids = [f"P{i + 1}" for i in range(len(footprints))]
    return gpd.GeoDataFrame({"pile_id": ids, "material": ["sand"] * len(ids), "base": [base] * len(ids),
                             "density_t_m3": [None] * len(ids)}, geometry=list(footprints), crs=CRS)


def cone_volume(r, h):
    # right circular cone, V = pi r^2 h / 3 (handbook formula, e.g. CRC Standard
    # Mathematical Tables, "Mensuration"; from memory)
    return math.pi * r * r * h / 3.0


def test_a_cone_outside_every_footprint_is_reported_with_its_volume():
    # a registered cone in its footprint and an unregistered one 40 m east of it
    surface, _ = _yard([(X0 + 20, Y0 + 30, 5.0, 4.0), (X0 + 60, Y0 + 30, 6.0, 3.0)])
    piles = _piles(shapely.Point(X0 + 20, Y0 + 30).buffer(7.0))
    found = find_unassigned(surface, piles, BaseSurfaces())
    regions = found.regions
    assert list(regions.columns) == UNASSIGNED_COLUMNS + ["geometry"]
    assert len(regions) == 1
    r = regions.iloc[0]
    assert r.region_id == "U1"
    assert r.volume_m3 == pytest.approx(cone_volume(6.0, 3.0), rel=0.02)
    assert r.volume_tin_m3 == pytest.approx(cone_volume(6.0, 3.0), rel=0.02)
    assert (r.centre_x_m, r.centre_y_m) == pytest.approx((X0 + 60, Y0 + 30), abs=0.3)
    # the apex lies on a cell corner: the nearest cell centre is 0.35 m from it, 3 (1 - 0.35/6) m high
    assert r.max_thickness_m == pytest.approx(3.0 * (1 - math.hypot(0.25, 0.25) / 6.0), abs=0.04)
    # no floor raster: a plane through the ring around it
    assert r.base_method == "toe"
    assert r.next_to == ""
    # the four parts add in quadrature to the total, the interval is 1.96 sigma
    parts = [r.sigma_random_m3, r.sigma_correlated_m3, r.sigma_interpolated_m3, r.sigma_base_m3]
    assert r.volume_sigma_m3 == pytest.approx(math.sqrt(sum(p * p for p in parts)), rel=1e-9)
    assert r.volume_ci95_m3 == pytest.approx(1.959964 * r.volume_sigma_m3, rel=1e-6)
    assert r.sigma_random_m3 > 0 and r.sigma_correlated_m3 > 0 and r.sigma_base_m3 > 0
    # fully scanned: nothing interpolated
    assert r.sigma_interpolated_m3 == 0.0 and r.scanned_fraction == 1.0
    # the true volume lies within the stated 95 % interval
    assert abs(r.volume_m3 - cone_volume(6.0, 3.0)) < r.volume_ci95_m3
    # the region outline covers the cone's base (r 6 m) and little more
    assert r.geometry.contains(shapely.Point(X0 + 60, Y0 + 30).buffer(5.5))
    assert r.geometry.area < math.pi * 7.5**2
    assert found.edges.empty
    assert "U1" in found.messages()[0] and "m3" in found.messages()[0]


def test_on_the_floor_raster_where_the_site_has_one():
    surface, yard = _yard([(X0 + 60, Y0 + 30, 6.0, 3.0)])
    piles = _piles(shapely.Point(X0 + 20, Y0 + 30).buffer(7.0))
    found = find_unassigned(surface, piles, BaseSurfaces(floor=yard, floor_sigma_m=0.03))
    r = found.regions.iloc[0]
    assert r.base_method == "floor"
    assert r.volume_m3 == pytest.approx(cone_volume(6.0, 3.0), rel=0.02)
    # a floor error shared over the whole region: sigma = area above base x floor sigma, as
    # for a pile on the floor (Anderson 2019 systematic term); the area is the cone's base and
    # the scan noise above the floor in the toe cells around it
    assert math.pi * 36 * 0.03 <= r.sigma_base_m3 <= r.area_m2 * 0.03


def test_a_footprint_drawn_through_a_pile_is_flagged_and_the_rest_reported():
    # cone r 6 m, footprint only r 3 m: 2 pi 3 = 18.8 m of its edge cuts through material
    # that is 1.5 m thick there
    surface, _ = _yard([(X0 + 40, Y0 + 30, 6.0, 3.0)])
    foot = shapely.Point(X0 + 40, Y0 + 30).buffer(3.0, quad_segs=32)
    piles = _piles(foot, base="level:0")
    base = BaseSurfaces()
    found = find_unassigned(surface, piles, base)
    edges = found.edges
    assert edges["pile_id"].tolist() == ["P1"]
    assert edges.iloc[0].edge_cut_length_m == pytest.approx(2 * math.pi * 3.5, rel=0.15)
    assert edges.iloc[0].edge_max_thickness_m == pytest.approx(1.5, abs=0.35)
    assert len(found.regions) == 1
    r = found.regions.iloc[0]
    assert r.next_to == "P1" and "touches_footprint" in r["flags"]
    # what lies outside the footprint is the cone less the part inside r 3 m
    # (a frustum of height 1.5 m and radii 3 m and 0 plus a cylinder 3 m x 1.5 m)
    inside = math.pi * 9 * 1.5 + cone_volume(3.0, 1.5)
    assert r.volume_m3 == pytest.approx(cone_volume(6.0, 3.0) - inside, rel=0.02)
    assert any("P1" in m and "cuts through" in m for m in found.messages())
    # one table for the sheet and the CSV: the region, then the cut footprint
    table = found.table()
    assert table[["region_id", "pile_id"]].fillna("").values.tolist() == [["U1", ""], ["", "P1"]]
    assert table.loc[1, "flags"] == "edge_cut" and table.loc[0, "volume_m3"] == r.volume_m3
    assert table.loc[1, "edge_cut_length_m"] == edges.iloc[0].edge_cut_length_m


def test_a_pad_above_a_bank_does_not_cut_a_footprint_drawn_outside_its_toe():
    # A flat pad at 10 m (y > 30 m) above a bank falling 25 % to a flat at 6 m (y < 14 m),
    # as beside a river; a cone r 5 m on the pad, its footprint 3 m outside the toe, on a toe
    # base. The outside ground (10 % grade from the foot of the bank) lies up to 2 m under
    # the pad, so the band outside the footprint is "thick" above it; above the pile's own
    # toe plane (fitted on the pad) it is not, and the footprint cuts through nothing.
    surface, _ = _yard([(X0 + 40, Y0 + 42, 5.0, 3.0)], height=60.0)
    x, y = surface.grid.centers()
    surface.z[:] = surface.z - np.clip((Y0 + 30 - y) * 0.25, 0.0, 4.0)
    foot = shapely.Point(X0 + 40, Y0 + 42).buffer(8.0, quad_segs=32)
    found = find_unassigned(surface, _piles(foot), BaseSurfaces())
    assert found.edges.empty, found.edges.to_string()
    # the same band above the outside ground alone is thick: what flagged it before
    band = foot.buffer(1.0).difference(foot)
    inside = shapely.contains_xy(band, x, y)
    assert np.nanmax(found.thickness[inside]) > 1.5
    # and a footprint drawn through the cone (r 3 m) on the same toe base is still flagged
    cut = shapely.Point(X0 + 40, Y0 + 42).buffer(3.0, quad_segs=32)
    edges = find_unassigned(surface, _piles(cut), BaseSurfaces()).edges
    assert edges["pile_id"].tolist() == ["P1"]
    assert edges.iloc[0].edge_cut_length_m == pytest.approx(2 * math.pi * 3.5, rel=0.25)


def test_a_crowned_yard_is_ground_not_stock():
    # a yard crowned along y = 30 m, falling 2.5 % to either side (common practice for
    # drainage), with a cone on its flank and no floor raster: only the cone is stock
    surface, _ = _yard([(X0 + 60, Y0 + 40, 6.0, 3.0)])
    x, y = surface.grid.centers()
    crown = -0.025 * np.abs(y - (Y0 + 30))
    surface.z[:] = surface.z + crown
    piles = _piles(shapely.Point(X0 + 15, Y0 + 15).buffer(5.0))
    found = find_unassigned(surface, piles, BaseSurfaces())
    assert len(found.regions) == 1, found.regions.drop(columns="geometry").to_string()
    assert found.regions.iloc[0].volume_m3 == pytest.approx(cone_volume(6.0, 3.0), rel=0.02)


def test_a_wide_low_spill_is_measured_whole():
    # a flat-topped spill 0.6 m thick on a 30 m x 20 m base with 1:2 edges: its flat middle,
    # far from any edge, must still count. A prismoid of base 30 x 20, top 27.6 x 17.6,
    # height 0.6 (prismoidal formula V = h/6 (A1 + 4 Am + A2), exact for a prismoid;
    # handbook formula, from memory)
    surface, yard = _yard([])
    x, y = surface.grid.centers()
    d = np.minimum.reduce([x - (X0 + 25), (X0 + 55) - x, y - (Y0 + 20), (Y0 + 40) - y])
    surface.z[:] = surface.z + np.clip(d * 0.5, 0.0, 0.6)
    piles = _piles(shapely.Point(X0 + 10, Y0 + 10).buffer(4.0))
    found = find_unassigned(surface, piles, BaseSurfaces())
    assert len(found.regions) == 1
    prismoid = 0.6 / 6 * (30 * 20 + 4 * 28.8 * 18.8 + 27.6 * 17.6)
    assert found.regions.iloc[0].volume_m3 == pytest.approx(prismoid, rel=0.02)


def test_a_region_hemmed_in_by_footprints_stands_on_the_fitted_ground():
    # a cone in the 1 m gap between a ring-shaped footprint around it: no free ring to fit a
    # plane through, so the region is measured on the ground surface (flag toe_no_ring)
    surface, _ = _yard([(X0 + 40, Y0 + 30, 6.0, 3.0)])
    ring = shapely.Point(X0 + 40, Y0 + 30).buffer(12.0).difference(shapely.Point(X0 + 40, Y0 + 30).buffer(7.0))
    found = find_unassigned(surface, _piles(ring), BaseSurfaces())
    r = found.regions.iloc[0]
    assert r.base_method == "rim" and "toe_no_ring" in r["flags"]
    assert r.volume_m3 == pytest.approx(cone_volume(6.0, 3.0), rel=0.02)
    assert r.sigma_base_m3 > 0


def test_thin_layers_and_small_objects_are_not_stock():
    # a 0.2 m high mound (below the 0.3 m threshold) and a 1.2 m x 1.2 m box 1 m high
    # (1.44 m2, below the 4 m2 minimum): nothing to report
    surface, yard = _yard([(X0 + 60, Y0 + 30, 8.0, 0.2)])
    g = surface.grid
    x, y = g.centers()
    box = (np.abs(x - (X0 + 20)) < 0.6) & (np.abs(y - (Y0 + 20)) < 0.6)
    surface.z[box] += 1.0
    piles = _piles(shapely.Point(X0 + 20, Y0 + 45).buffer(5.0))
    found = find_unassigned(surface, piles, BaseSurfaces())
    assert found.regions.empty and found.edges.empty
    assert DEFAULT_MIN_THICKNESS_M == 0.3 and DEFAULT_MIN_AREA_M2 == 4.0
    # with the thresholds lowered, both are found above the floor raster; without one, the
    # mound's 2.5 % flanks are as gentle as a graded yard and it is taken for ground
    found = find_unassigned(surface, piles, BaseSurfaces(floor=yard), min_thickness_m=0.1, min_area_m2=1.0)
    assert len(found.regions) == 2
    found = find_unassigned(surface, piles, BaseSurfaces(), min_thickness_m=0.1, min_area_m2=1.0)
    assert len(found.regions) == 1
    assert found.regions.iloc[0].max_thickness_m == pytest.approx(1.0, abs=0.1)  # the box


def test_unscanned_cells_do_not_seed_stock():
    # the survey's hole filling bridged a 4 m gap high up (a wall's shadow, say): filled
    # cells, not scanned, may be thick but are no stock by themselves
    surface, _ = _yard([])
    g = surface.grid
    x, y = g.centers()
    gap = (np.abs(x - (X0 + 40)) < 2.0) & (np.abs(y - (Y0 + 30)) < 2.0)
    surface.z[gap] += 2.0
    surface.count[gap] = 0
    surface.filled[gap] = True
    found = find_unassigned(surface, _piles(shapely.Point(X0 + 10, Y0 + 10).buffer(4.0)), BaseSurfaces())
    assert found.regions.empty


def test_the_close_measure_is_unchanged_by_the_search():
    # measure_piles gives the same numbers with or without unassigned stock next to a pile
    alone, _ = _yard([(X0 + 20, Y0 + 30, 5.0, 4.0)])
    both, _ = _yard([(X0 + 20, Y0 + 30, 5.0, 4.0), (X0 + 60, Y0 + 30, 6.0, 3.0)])
    piles = _piles(shapely.Point(X0 + 20, Y0 + 30).buffer(7.0), base="level:0")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        a = measure_piles(alone, piles, MATERIALS)
        b = measure_piles(both, piles, MATERIALS)
    assert a.volume_m3[0] == b.volume_m3[0]


def test_site_toml_sets_the_thresholds(good_site):
    from inventory.site.load import load_site

    text = (good_site / "site.toml").read_text()
    (good_site / "site.toml").write_text(text + "\n[unassigned]\nmin_thickness_m = 0.5\nmin_area_m2 = 10\n")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        site = load_site(good_site)
    assert site.config.unassigned.min_thickness_m == 0.5
    assert site.config.unassigned.min_area_m2 == 10.0


def test_site_toml_refuses_a_bad_threshold(good_site):
    from inventory.site.load import check_site

    text = (good_site / "site.toml").read_text()
    (good_site / "site.toml").write_text(text + "\n[unassigned]\nmin_thickness_m = -1\nmin_area = 10\n")
    report = check_site(good_site)
    assert not report.ok
    shown = " ".join(str(p) for p in report.errors)
    assert "min_thickness_m" in shown and "min_area" in shown


# ----------------------------------------------------------------------------- the sample site
def _truth_outside(chain, date: str) -> float:
    """Greatest true thickness above the floor outside every footprint (simulator's truth)."""
    root = chain.root
    with rasterio.open(root / f"truth/surface-{date}.tif") as src, rasterio.open(root / "base/floor.tif") as fl:
        z = src.read(1).astype(float)
        floor = np.full(z.shape, np.nan)
        reproject(fl.read(1), floor, src_transform=fl.transform, src_crs=fl.crs,
                  dst_transform=src.transform, dst_crs=src.crs, resampling=Resampling.bilinear)
        from rasterio.features import rasterize

        inside = rasterize([(g, 1) for g in chain.site.piles.geometry], out_shape=z.shape,
                           transform=src.transform, all_touched=True).astype(bool)
    return float(np.nanmax((z - floor)[~inside]))


@pytest.mark.slow
@pytest.mark.parametrize("date", ["2026-09-30", "2026-10-31"])
def test_sample_site_reports_only_what_lies_outside_its_footprints(sample_chain, date):
    # the simulator put every pile inside its footprint: nothing truly lies outside them
    assert _truth_outside(sample_chain, date) < 0.01
    surface = sample_chain.survey(date).surface
    site = sample_chain.site
    for base in (BaseSurfaces.from_site(site, surface.grid), BaseSurfaces()):  # floor raster, fitted
        found = find_unassigned(surface, site.piles, base)
        assert found.regions.empty, found.regions.drop(columns="geometry").to_string()
        assert found.edges.empty, found.edges.to_string()
