"""More analytic piles planted in real open LiDAR: the cases the first planting left out.

The cloud is ``autzen_trim.laz`` from the laspy source distribution (the ``laspy_data``
fixture), airborne, Oregon Lambert in feet, planted as in tests/test_planted_autzen.py: the
real returns inside each pile's base are taken out, the last returns that fell there keep
their plan position and get the height of the lot's least-squares plane (the base and 6 m
around it) plus the pile's analytic thickness plus 2 cm of noise (the lot's own scatter),
and the file is written in its own CRS and feet. The site is metric (EPSG:2993), with
footprints drawn 3 m outside each toe. Here:

* a cone and a windrow sampled at a quarter of the cloud's density (about 0.7 returns per
  m2, an older or higher-flown airborne survey): ``filters.elm`` takes the lowest return
  of a 2 m cell on a 35 degree flank for low noise wherever the next return up lies more
  than its 1 m threshold higher, and the classifier used to leave them out of the surface
  (30-40 % of the piles' returns, the cone 6 % and the windrow 10 % short);
* two cones whose toes touch, their footprints split along the line between them;
* a cone half beyond the edge of the cloud (the survey stops at its axis): the part of the
  footprint off the survey grid was counted neither as volume nor as unscanned, so the pile
  came out at half its volume with ``scanned_fraction`` 1.0 and a tight interval; the
  surface grid now reaches over every footprint the survey touches.
"""

from __future__ import annotations

import contextlib
import io
import math
import warnings
from pathlib import Path

import geopandas as gpd
import laspy
import numpy as np
import pandas as pd
import pytest
import shapely
from pyproj import CRS, Transformer
from shapely.geometry import LineString, Point

from inventory.cli import main

pytestmark = pytest.mark.network

SITE_CRS = "EPSG:2993"  # NAD83(HARN) / Oregon LCC (m), the metric twin of the file's EPSG:2994
DATE = "2026-10-31"
REPOSE = math.tan(math.radians(35.0))  # crushed rock stands at 35-38 deg (CEMA tables, from memory)
MARGIN_M = 3.0
NOISE_M = 0.02  # the lot's scatter about 10 m planes (tests/test_planted_autzen.py measures it)
#: The cloud is cut at this offset from its west edge: the EDGE cone stands on the cut.
CROP_DX = 40.0


class Pile:
    """A cone (``length`` 0) or a windrow along x with half-cone ends, at ``(dx, dy)`` m
    from the cloud's SW corner; ``density``: planted returns per real last return."""

    def __init__(self, pile_id, dx, dy, radius, length=0.0, density=1.0):
        self.pile_id, self.dx, self.dy, self.radius, self.length, self.density = (
            pile_id, dx, dy, radius, length, density)
        self.height = radius * REPOSE

    def thickness(self, x, y, x0, y0):
        u = np.abs(np.asarray(x) - (x0 + self.dx)) - self.length / 2.0
        d = np.hypot(np.maximum(u, 0.0), np.asarray(y) - (y0 + self.dy))
        return np.clip((self.radius - d) * REPOSE, 0.0, None)

    def toe(self, x0, y0, grow=0.0):
        c = (x0 + self.dx, y0 + self.dy)
        if self.length:
            h = self.length / 2.0
            return LineString([(c[0] - h, c[1]), (c[0] + h, c[1])]).buffer(self.radius + grow, 256)
        return Point(c).buffer(self.radius + grow, 256)

    def volume(self):
        """Right circular cone pi r^2 h / 3; a windrow of triangular section on a ridge of
        length L with half-cone ends, L r h + pi r^2 h / 3 (elementary solid geometry, e.g.
        CRC Standard Mathematical Tables, from memory)."""
        r, h, L = self.radius, self.height, self.length
        return L * r * h + math.pi * r * r * h / 3.0

    def prismoidal(self):
        """The prismoidal formula V = h (A0 + 4 Am + A1) / 6 over horizontal sections
        (earthwork texts, e.g. Uren & Price, Surveying for Engineers): exact for section
        areas cubic in height, as these are."""
        def area(z):
            w = self.radius - z / REPOSE
            return 2.0 * w * self.length + math.pi * w * w
        return self.height * (area(0.0) + 4.0 * area(self.height / 2.0) + area(self.height)) / 6.0


#: Offsets on the lot east of the cut; footprints at least 2 m apart.
SPARSE = (Pile("SPARSE_CONE", 70.0, 78.0, 10.0, density=0.25),
          Pile("SPARSE_WINDROW", 62.0, 20.0, 5.0, length=16.0, density=0.25))
TOUCHING = (Pile("TA", 58.0, 45.0, 7.0), Pile("TB", 72.0, 45.0, 7.0))  # toes touch at dx 65
EDGE = Pile("EDGE", CROP_DX, 75.0, 8.0)
PILES = SPARSE + TOUCHING + (EDGE,)


def _footprints(x0, y0):
    feet = {p.pile_id: p.toe(x0, y0, MARGIN_M) for p in PILES}
    split = x0 + 65.0  # the line between the touching cones' axes, where their toes meet
    feet["TA"] = feet["TA"].intersection(shapely.box(split - 100, y0 - 100, split, y0 + 500))
    feet["TB"] = feet["TB"].intersection(shapely.box(split, y0 - 100, split + 100, y0 + 500))
    return feet


def _build(src: Path, root: Path):
    las = laspy.read(src)
    fcrs = las.header.parse_crs()
    to_site = Transformer.from_crs(fcrs, CRS(SITE_CRS), always_xy=True)
    to_file = Transformer.from_crs(CRS(SITE_CRS), fcrs, always_xy=True)
    zf = fcrs.axis_info[0].unit_conversion_factor
    x, y = (np.asarray(v) for v in to_site.transform(np.asarray(las.x), np.asarray(las.y)))
    z = np.asarray(las.z) * zf
    x0, y0 = float(x.min()), float(y.min())
    last = np.asarray(las.return_number) >= np.asarray(las.number_of_returns)
    rng = np.random.default_rng(20261031)
    keep = x >= x0 + CROP_DX   # the survey stops here
    idx_all, z_all = [], []
    for p in PILES:
        toe = p.toe(x0, y0)
        inside = shapely.contains_xy(toe, x, y)
        keep &= ~inside
        idx = np.flatnonzero(inside & last & (x >= x0 + CROP_DX))
        idx = idx[rng.random(len(idx)) < p.density] if p.density < 1 else idx
        around = shapely.contains_xy(p.toe(x0, y0, 2 * MARGIN_M), x, y) & last
        a = np.column_stack([np.ones(around.sum()), x[around] - x0, y[around] - y0])
        coef, *_ = np.linalg.lstsq(a, z[around], rcond=None)
        base = coef[0] + coef[1] * (x[idx] - x0) + coef[2] * (y[idx] - y0)
        idx_all.append(idx)
        z_all.append(base + p.thickness(x[idx], y[idx], x0, y0) + rng.normal(0.0, NOISE_M, len(idx)))
    idx = np.concatenate(idx_all)
    n_keep = int(keep.sum())
    out = laspy.LasData(las.header)
    out.points = las.points[np.concatenate([np.flatnonzero(keep), idx])]
    zz = np.asarray(out.z, float)
    zz[n_keep:] = np.concatenate(z_all) / zf
    out.z = zz
    cls = np.asarray(out.classification).copy()
    cls[n_keep:] = 1
    out.classification = cls
    xb, _ = to_file.transform(x[idx], y[idx])
    assert np.allclose(np.asarray(out.x)[n_keep:], xb, atol=0.01)  # plan positions kept

    root.mkdir(parents=True)
    (root / "site.toml").write_text(
        f'name = "Autzen lot, more planted piles (test site)"\ncrs = "{SITE_CRS}"\n'
        'timezone = "America/Los_Angeles"\n\n[grid]\ncell_size_m = 1.0\n')
    # crushed limestone 1.36-1.52 t/m3 (CEMA tables, as transcribed in public sources)
    (root / "materials.csv").write_text(
        "material,bulk_density_t_m3,density_sd_t_m3,moisture_pct,tolerance_pct\ncrushed rock,1.45,0.04,3,3\n")
    feet = _footprints(x0, y0)
    gpd.GeoDataFrame({"pile_id": list(feet), "material": ["crushed rock"] * len(feet), "base": ["toe"] * len(feet)},
                     geometry=list(feet.values()), crs=SITE_CRS).to_file(root / "piles.gpkg", layer="piles",
                                                                         engine="pyogrio")
    survey = root / "surveys" / DATE
    survey.mkdir(parents=True)
    out.write(survey / "autzen_planted.laz")
    return (x0, y0), feet


@pytest.fixture(scope="module")
def measured(laspy_data, tmp_path_factory):
    root = tmp_path_factory.mktemp("planted_more") / "site"
    origin, feet = _build(laspy_data / "autzen_trim.laz", root)
    shown = io.StringIO()
    with warnings.catch_warnings(), contextlib.redirect_stdout(shown):
        warnings.simplefilter("ignore")
        assert main(["survey", str(root), "--date", DATE, "--out", str(root / "out"), "-q"]) == 0
        assert main(["volumes", str(root), "--date", DATE, "-q"]) == 0, shown.getvalue()
    table = pd.read_csv(root / "volumes" / DATE / f"volumes-{DATE}.csv").set_index("pile_id")
    las = laspy.read(next((root / "out").rglob(f"classified-{DATE}.laz")))
    return origin, feet, table, las, root


def test_the_handbook_volumes_agree_with_the_prismoidal_formula():
    for p in PILES:
        assert p.volume() == pytest.approx(p.prismoidal(), rel=1e-12)
    cone = SPARSE[0]
    assert cone.volume() == pytest.approx(math.pi * 100.0 * 10.0 * REPOSE / 3.0)


@pytest.mark.slow
def test_a_sparse_scan_keeps_the_flanks_as_surface(measured):
    # About 0.7 returns per m2 on the piles: over 97 % of the planted returns stay surface
    # and the volumes hold within 4 % of the handbook, inside the interval (the windrow
    # kept 35 % of its returns and came out 40 % short, outside its interval). The piles
    # are flagged low_scan: a quarter of the 1 m cells hold no return.
    origin, _, table, las, _ = measured
    x, y, cls = np.asarray(las.x), np.asarray(las.y), np.asarray(las.classification)
    for p in SPARSE:
        inside = shapely.contains_xy(p.toe(*origin, -0.3), x, y)
        assert inside.sum() > 100
        # (a return with no other within 2 m in 3D is high noise, 18, by the isolation
        # rule: one or two on the windrow's ends at this density)
        assert np.mean(cls[inside] == 2) > 0.97, p.pile_id
        row = table.loc[p.pile_id]
        truth = p.volume()
        assert row.volume_m3 == pytest.approx(truth, rel=0.04), p.pile_id
        assert row.volume_low95_m3 <= truth <= row.volume_high95_m3, p.pile_id
        assert "low_scan" in row["flags"]


@pytest.mark.slow
def test_two_cones_with_a_shared_toe(measured):
    # Footprints split along the line where the toes meet: each cone within 1.5 % of
    # pi r^2 h / 3, inside its interval, its toe ring shared with the neighbour
    _, _, table, _, _ = measured
    for p in TOUCHING:
        row = table.loc[p.pile_id]
        assert row.volume_m3 == pytest.approx(p.volume(), rel=0.015)
        assert row.volume_low95_m3 <= p.volume() <= row.volume_high95_m3
        assert "toe_shared" in row["flags"]


@pytest.mark.slow
def test_a_pile_half_beyond_the_cloud_says_so(measured):
    # The survey stops at the cone's axis: what lies beyond cannot be measured. The row
    # must not pass half a pile off as a clean measurement. The surface grid reaches over
    # the whole footprint, the part beyond the cloud is a gap, filled and counted as one:
    # scanned_fraction about the share on the cloud, flags low_scan and unfilled_gap, and
    # a 95 % interval that holds the handbook volume. Before: the footprint ran off the
    # grid, half the cone came out (-47 %) with scanned_fraction 0.99, a sigma of 0.4 %
    # and a TIN carrying the grid's edge over the rest (3.5 times the grid volume).
    origin, feet, table, _, _ = measured
    row = table.loc["EDGE"]
    on = feet["EDGE"].intersection(shapely.box(origin[0] + CROP_DX, origin[1] - 100, origin[0] + 500, origin[1] + 500))
    share = on.area / feet["EDGE"].area
    assert 0.45 < share < 0.55
    assert row.scanned_fraction == pytest.approx(share, abs=0.05)
    flags = row["flags"].split(";")
    assert "low_scan" in flags and "unfilled_gap" in flags
    truth = EDGE.volume()
    assert row.volume_low95_m3 <= truth <= row.volume_high95_m3
    # the fill bridges the scanned crest to the footprint's far edge: more than the
    # scanned half, never the half alone (+25 % here; the interval says how little is known)
    assert 0.75 * truth < row.volume_m3 < 1.5 * truth
    assert row.volume_tin_m3 == pytest.approx(row.volume_m3, rel=0.05)


@pytest.mark.slow
def test_a_sparse_scan_on_the_default_half_metre_cells(measured, tmp_path):
    # The same survey with the site's default grid (0.5 m cells, no [grid] in site.toml):
    # at 0.7 returns per m2 two cells in three hold no return, and most scanned cells are
    # patches of one or two cells. Those were taken for stray returns (lone patches) and
    # left out of the hole filling, so the flanks were filled from the ground around the
    # piles: cone -3.8 %, windrow -9.0 %, both outside their intervals. Now -0.5 and
    # -1.4 %, inside.
    import shutil

    _, _, _, _, root = measured
    site = tmp_path / "site"
    shutil.copytree(root, site, ignore=shutil.ignore_patterns("volumes", "out"))
    toml = (site / "site.toml").read_text()
    (site / "site.toml").write_text(toml.split("[grid]")[0])
    shown = io.StringIO()
    with warnings.catch_warnings(), contextlib.redirect_stdout(shown):
        warnings.simplefilter("ignore")
        assert main(["volumes", str(site), "--date", DATE, "-q"]) == 0, shown.getvalue()
    table = pd.read_csv(site / "volumes" / DATE / f"volumes-{DATE}.csv").set_index("pile_id")
    for p in SPARSE:
        row = table.loc[p.pile_id]
        assert row.scanned_fraction < 0.5
        assert row.volume_m3 == pytest.approx(p.volume(), rel=0.02), p.pile_id
        assert row.volume_low95_m3 <= p.volume() <= row.volume_high95_m3, p.pile_id
