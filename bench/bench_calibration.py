"""Calibration study of the pile-volume uncertainty (issue 22).

Usage::

    python bench/bench_calibration.py                  # 10 seeds, both densities (a few minutes)
    python bench/bench_calibration.py --seeds 4        # quicker
    python bench/bench_calibration.py --cases          # also one line per pile-survey
    python bench/bench_calibration.py --crest 30       # also 30 seeds of crest shadows only

Pile-surveys are built at the volume layer, not through the whole chain, so that the study
runs in minutes: an analytic pile (handbook cone, frustum, windrow with conical ends, windrow
cut by a reclaim face, bay pile; :mod:`inventory._demo.shapes` and a frustum here) stands on
a pad that is level, tilted, or tilted and rough (a Gaussian random field); points are drawn
at random over the surface at 1x (8 points/m2 of plan, more on slopes) or 10x that density,
with Gaussian noise of 0.5-3 cm, and shifted by a registration error field (sigma 1 cm,
circular correlation of range 15 m: the correlated term's own definition); a scan shadow
takes out the points over the crest, a flank, the back of the pile (a wedge running off
it) or where a machine stood on a flank (with the machine's roof, 2.5 m up, left in the toe
ring for the robust toe fit to reject). The points are gridded and hole-filled as the survey
step does (``grid_points``, ``fill_holes`` up to 3 m), and ``measure_piles`` measures the
pile over a ``toe``, ``level`` or ``floor`` base (a floor raster that is the true pad off by
a constant drawn from its stated sigma).

Printed: coverage of the 95 % interval, mean and standard deviation of z = error / sigma,
overall, per density and per case (shape, shadow, base, ground); and per sigma term, the
part of the error that term describes divided by the term (random: scanned cells' error
less registration; correlated: the registration field over the footprint; interpolated:
the error of cells without points; base: the base's error under the pile), so that each
term can be judged alone. The mean relative error of the shadowed crests and flat-top edges
is the gap fill's bias.
"""

from __future__ import annotations

import argparse
import math
import sys
import time
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import geopandas as gpd  # noqa: E402
import shapely  # noqa: E402
from scipy import ndimage  # noqa: E402
from scipy.signal import fftconvolve  # noqa: E402

from inventory._demo.shapes import BayPile, Cone, Windrow  # noqa: E402
from inventory.errors import CoverageWarning  # noqa: E402
from inventory.model.grid import Grid  # noqa: E402
from inventory.site.load import Material  # noqa: E402
from inventory.survey.gridding import fill_holes, grid_points  # noqa: E402
from inventory.volume.measure import BaseSurfaces, measure_piles, thickness_raster  # noqa: E402

CELL = 0.5
FILL_M = 3.0
DENSITY_1X = 8.0          # points per m2 of plan on level ground
REG_SIGMA_M = 0.01        # registration error field (the correlated term's definition)
REG_RANGE_M = 15.0
FLOOR_SIGMA_M = 0.02
Z95 = 1.959963984540054
PAD_Z = 100.0


@dataclass(frozen=True)
class Frustum:
    """A flat-topped conical pile: toe radius R, top radius r, at the angle of repose.

    Volume pi h (R^2 + R r + r^2) / 3 (handbook frustum of a cone)."""

    cx: float
    cy: float
    R: float
    r: float
    repose_deg: float

    @property
    def height(self) -> float:
        return (self.R - self.r) * math.tan(math.radians(self.repose_deg))

    def thickness(self, x, y):
        d = np.hypot(np.asarray(x) - self.cx, np.asarray(y) - self.cy)
        return np.clip(np.minimum(self.height, (self.R - d) * math.tan(math.radians(self.repose_deg))), 0.0, None)

    def volume(self) -> float:
        return math.pi * self.height * (self.R**2 + self.R * self.r + self.r**2) / 3.0

    def outline(self):
        return shapely.Point(self.cx, self.cy).buffer(self.R, quad_segs=64)

    def bbox(self):
        return (self.cx - self.R, self.cy - self.R, self.cx + self.R, self.cy + self.R)


def _field(rng, shape, sigma, length_m, kernel="gauss"):
    """A stationary random field of sd ``sigma`` on a grid of CELL cells."""
    if sigma <= 0:
        return np.zeros(shape)
    white = rng.standard_normal((shape[0] + 80, shape[1] + 80))
    if kernel == "disc":
        # disc of radius range/2: its autocorrelation is the circular covariance of that range
        k = int(math.ceil(length_m / 2 / CELL))
        yy, xx = np.mgrid[-k:k + 1, -k:k + 1]
        ker = ((xx**2 + yy**2) * CELL**2 <= (length_m / 2) ** 2).astype(float)
        f = fftconvolve(white, ker, mode="same")[40:-40, 40:-40]
    elif length_m <= CELL:
        f = white[40:-40, 40:-40]
    else:
        f = ndimage.gaussian_filter(white, length_m / CELL / 2.0)[40:-40, 40:-40]
    return sigma * f / f.std()


def _shape(kind, rng):
    rep = rng.uniform(32.0, 38.0)
    if kind == "cone":
        return Cone(0.0, 0.0, rng.uniform(6.0, 11.0), rep)
    if kind == "frustum":
        R = rng.uniform(8.0, 12.0)
        return Frustum(0.0, 0.0, R, rng.uniform(2.5, 0.5 * R), rep)
    if kind == "windrow":
        return Windrow(-10.0, 0.0, rng.uniform(0, 40), rng.uniform(14.0, 22.0), rng.uniform(5.0, 7.0), rep)
    if kind == "reclaim":
        L = rng.uniform(16.0, 22.0)
        return Windrow(-10.0, 0.0, 0.0, L, rng.uniform(5.0, 7.0), rep, face_s=L - rng.uniform(2.0, 5.0),
                       face_deg=rng.uniform(55.0, 65.0))
    if kind == "bay":
        return BayPile(-7.0, -6.0, 14.0, rng.uniform(10.0, 13.0), rng.uniform(2.5, 4.0), rep)
    raise ValueError(kind)


def _crest_point(kind, sh, rng):
    """A point on the crest (apex, ridge or flat-top edge) of the shape."""
    if kind == "cone":
        return sh.cx, sh.cy
    if kind == "frustum":
        a = rng.uniform(0, 2 * math.pi)
        return sh.cx + sh.r * math.cos(a), sh.cy + sh.r * math.sin(a)
    if kind in ("windrow", "reclaim"):
        a = math.radians(sh.azimuth_deg)
        end = sh.length if sh.face_s is None else sh.face_s - sh.height / math.tan(math.radians(sh.face_deg))
        s = rng.uniform(0.2, 0.9) * end
        return sh.x0 + s * math.cos(a), sh.y0 + s * math.sin(a)
    # bay: the edge of the flat top above the face
    run = sh.top / math.tan(math.radians(sh.repose_deg))
    return sh.x0 + rng.uniform(0.3, 0.7) * sh.width, sh.y_back + sh.depth - run


def _flank_point(kind, sh, rng, pad_t):
    """A point about half-way up a flank (thickness near half the height)."""
    x0, y0, x1, y1 = sh.bbox()
    for _ in range(2000):
        x, y = rng.uniform(x0, x1), rng.uniform(y0, y1)
        t = float(sh.thickness(np.array([x]), np.array([y]))[0])
        if 0.35 * pad_t < t < 0.65 * pad_t:
            return x, y
    return (x0 + x1) / 2, (y0 + y1) / 2


def make_case(rng, kind, shadow, base_kind, ground, density_x, noise, errors=None):
    sh = _shape(kind, rng)
    foot = sh.outline().buffer(1.0) if kind != "bay" else sh.outline()
    x0, y0, x1, y1 = foot.bounds
    grid = Grid.snapped(x0 - 9.0, y0 - 9.0, x1 + 9.0, y1 + 9.0, cell=CELL)
    gx, gy = grid.centers()
    # pad: level (for a level base), else tilted; rough adds a random field
    if base_kind == "level":
        tilt = (0.0, 0.0)
    else:
        tilt = (rng.uniform(-0.015, 0.015), rng.uniform(-0.015, 0.015))
    rough = np.zeros(grid.shape)
    if ground == "rough":
        rough = _field(rng, grid.shape, rng.choice([0.02, 0.04]), rng.choice([0.5, 2.0, 4.0]))
    rough_f = lambda x, y: ndimage.map_coordinates(  # noqa: E731
        rough, [(grid.north - y) / CELL - 0.5, (x - grid.west) / CELL - 0.5], order=1, mode="nearest")
    pad = lambda x, y: PAD_Z + tilt[0] * x + tilt[1] * y + rough_f(x, y)  # noqa: E731
    reg = _field(rng, grid.shape, REG_SIGMA_M, REG_RANGE_M, kernel="disc")
    reg_f = lambda x, y: ndimage.map_coordinates(  # noqa: E731
        reg, [(grid.north - y) / CELL - 0.5, (x - grid.west) / CELL - 0.5], order=1, mode="nearest")

    # points: Poisson over the plan, more on slopes (area of surface per m2 of plan)
    area = (grid.east - grid.west) * (grid.north - grid.south)
    dens = DENSITY_1X * density_x * rng.uniform(0.6, 1.4)
    n = rng.poisson(dens * area * 1.25)
    x = rng.uniform(grid.west, grid.east, n)
    y = rng.uniform(grid.south, grid.north, n)
    t = sh.thickness(x, y)
    on_slope = t > 0
    keep = np.where(on_slope, True, rng.random(n) < 1.0 / 1.25)
    h = float(sh.height if kind != "bay" else sh.top)
    hidden = np.zeros(n, bool)
    ring_machine = None
    if shadow == "crest":
        cx, cy = _crest_point(kind, sh, rng)
        hidden |= np.hypot(x - cx, y - cy) < rng.uniform(2.0, 3.5)
    elif shadow == "flank":
        cx, cy = _flank_point(kind, sh, rng, h)
        hidden |= np.hypot(x - cx, y - cy) < rng.uniform(2.0, 3.5)
    elif shadow == "back":
        c = sh.outline().centroid
        ang = rng.uniform(0, 2 * math.pi)
        da = np.angle(np.exp(1j * (np.arctan2(y - c.y, x - c.x) - ang)))
        hidden |= (np.abs(da) < math.radians(rng.uniform(12, 25))) & (t < 0.6 * h) & (np.hypot(x - c.x, y - c.y) > 2.0)
        hidden &= np.hypot(x - c.x, y - c.y) < 25.0
    elif shadow == "machine":
        cx, cy = _flank_point(kind, sh, rng, h)
        a = rng.uniform(0, math.pi)
        u = (x - cx) * math.cos(a) + (y - cy) * math.sin(a)
        v = -(x - cx) * math.sin(a) + (y - cy) * math.cos(a)
        hidden |= (np.abs(u) < 2.0) & (np.abs(v) < 1.5)
        # a second machine's roof left standing in the toe ring
        b = foot.exterior.interpolate(rng.uniform(0, 1), normalized=True)
        ring_machine = (b.x, b.y)
    keep &= ~hidden
    if kind == "bay":
        # the bay walls (0.3 m thick, outside the bay) return no surface points
        wall = ((x < sh.x0) & (x > sh.x0 - 0.3)) | ((x > sh.x0 + sh.width) & (x < sh.x0 + sh.width + 0.3))
        wall |= (y < sh.y_back) & (y > sh.y_back - 0.3)
        keep &= ~wall
    x, y, t = x[keep], y[keep], t[keep]
    z = pad(x, y) + t + reg_f(x, y) + rng.normal(0.0, noise, len(x))
    if ring_machine is not None:
        # the machine's roof replaces the ground under it, in the ring only (not in a cell
        # the footprint touches: a surface cell under a roof is emptied by the survey step)
        mx, my = ring_machine
        clear = foot.buffer(0.75)
        under = (np.abs(x - mx) < 1.5) & (np.abs(y - my) < 1.5) & ~shapely.contains_xy(clear, x, y)
        m = rng.poisson(dens * 9)
        px, py = mx + rng.uniform(-1.5, 1.5, m), my + rng.uniform(-1.5, 1.5, m)
        out_ = ~shapely.contains_xy(clear, px, py)
        px, py = px[out_], py[out_]
        x = np.concatenate([x[~under], px])
        y = np.concatenate([y[~under], py])
        z = np.concatenate([z[~under], pad(px, py) + 2.5 + rng.normal(0, noise, len(px))])
    surf = grid_points(grid, x, y, z, "mean")
    surf, _ = fill_holes(surf, FILL_M)

    true_pad = pad(gx, gy)
    floor = None
    if base_kind == "floor":
        floor = true_pad + rng.normal(0.0, FLOOR_SIGMA_M)
    spec = {"level": f"level:{PAD_Z}", "floor": "floor", "toe": "toe"}[base_kind]
    piles = gpd.GeoDataFrame({"pile_id": ["P"], "material": ["m"], "base": [spec], "density_t_m3": [None]},
                             geometry=[foot])
    base = BaseSurfaces(floor=floor, floor_sigma_m=FLOOR_SIGMA_M, toe_ring_m=3.0)
    mats = {"m": Material("m", bulk_density_t_m3=1.6, density_sd_t_m3=0.0, moisture_pct=0.0)}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", CoverageWarning)
        table = measure_piles(surf, piles, mats, base, errors=errors)
        bz, th = thickness_raster(surf, piles, base)
    row = table.iloc[0]
    truth = sh.volume()
    # error parts, on the footprint weights' cells
    from inventory.volume.measure import footprint_weights

    (rr, cc), w = footprint_weights(foot, grid)
    a = grid.cell_area
    # the true surface's mean over each cell (4 x 4 samples): what a cell's mean of points
    # estimates, and what the volume integral sums
    k = (np.arange(4) + 0.5) / 4 - 0.5
    zt = np.mean([pad(gx + dx * CELL, gy + dy * CELL) + sh.thickness(gx + dx * CELL, gy + dy * CELL)
                  for dx in k for dy in k], axis=0)
    zu = (bz + th)[rr, cc]
    bzu = bz[rr, cc]
    tt = (zt - true_pad)[rr, cc]
    inside = (w > 0) & np.isfinite(th[rr, cc])
    scanned = surf.count[rr, cc] > 0
    wa = np.where(inside, w * a, 0.0)
    dz = np.nan_to_num(zu - zt[rr, cc])
    # V - truth = e_rand + e_corr + e_gap + e_base + e_clip + e_disc, the first four on
    # the signed thickness of every footprint cell
    e_base = -float(np.sum(wa * np.nan_to_num(bzu - true_pad[rr, cc])))
    e_corr = float(np.sum(wa * reg[rr, cc]))
    # scanned cells on the edge of a gap of 4 or more cells belong to the interpolation
    # term (measure._edge_variance): their points cover part of the cell
    lab, nlab = ndimage.label(~(surf.count > 0))
    sizes = np.bincount(lab.ravel(), minlength=nlab + 1)
    big = (sizes >= 4)[lab] & (surf.count == 0)
    edge = ((surf.count > 0) & ndimage.binary_dilation(big, structure=np.ones((3, 3))))[rr, cc]
    gap_part = ~scanned | edge
    e_rand = float(np.sum((wa * (dz - reg[rr, cc]))[~gap_part]))
    e_gap = float(np.sum((wa * (dz - reg[rr, cc]))[gap_part]))
    e_edge = float(np.sum((wa * (dz - reg[rr, cc]))[edge & scanned]))
    signed = float(np.sum(wa * np.nan_to_num(th[rr, cc])))
    e_clip = float(row.volume_m3) - signed
    e_disc = float(np.sum(wa * tt)) - truth
    return {
        "kind": kind, "shadow": shadow, "base": base_kind, "ground": ground, "density": density_x,
        "noise": noise, "truth": truth, "volume": float(row.volume_m3), "sigma": float(row.volume_sigma_m3),
        "s_rand": float(row.sigma_random_m3), "s_corr": float(row.sigma_correlated_m3),
        "s_gap": float(row.sigma_interpolated_m3), "s_base": float(row.sigma_base_m3),
        "e_rand": e_rand, "e_corr": e_corr, "e_gap": e_gap, "e_base": e_base,
        "e_edge": e_edge, "e_clip": e_clip, "e_disc": e_disc,
        "scanned": float(row.scanned_fraction), "flags": row["flags"],
    }


KINDS = ("cone", "frustum", "windrow", "reclaim", "bay")
SHADOWS = ("none", "crest", "flank", "back", "machine")


def _bases(kind):
    return ("floor", "level") if kind == "bay" else ("toe", "floor", "level", "toe")


def run(seeds: int, densities=(1, 10), errors=None):
    out = []
    for seed in range(seeds):
        for i, kind in enumerate(KINDS):
            rng0 = np.random.default_rng([seed, i])
            shadow = SHADOWS[(seed + i) % len(SHADOWS)]
            bases = _bases(kind)
            base_kind = bases[(seed + 2 * i) % len(bases)]
            ground = "smooth" if base_kind == "level" else ("rough" if rng0.random() < 0.6 else "smooth")
            noise = float(rng0.uniform(0.005, 0.03))
            for d in densities:
                rng = np.random.default_rng([seed, i, d])
                out.append(make_case(rng, kind, shadow, base_kind, ground, d, noise, errors))
    return out


def run_crest(seeds: int, densities=(1, 10), errors=None):
    """Shadows over a crest only (every shape, ``seeds`` seeds a shape and density): enough
    cases to tell a gap fill's bias of a few tenths of a percent from the scatter."""
    out = []
    for seed in range(seeds):
        for i, kind in enumerate(KINDS):
            rng0 = np.random.default_rng([1000 + seed, i])
            bases = _bases(kind)
            base_kind = bases[(seed + 2 * i) % len(bases)]
            ground = "smooth" if base_kind == "level" else ("rough" if rng0.random() < 0.6 else "smooth")
            noise = float(rng0.uniform(0.005, 0.03))
            for d in densities:
                rng = np.random.default_rng([1000 + seed, i, d])
                out.append(make_case(rng, kind, "crest", base_kind, ground, d, noise, errors))
    return out


def crest_report(rows):
    """Per shape and density: mean error % of volume (with its standard error), of the
    interpolated cells alone and, within those, of the scanned cells on a gap's edge (points
    over part of the cell), and the coverage of the 95 % interval."""
    print(f"Crest shadows only ({len(rows)} pile-surveys), error % of volume:")
    for kind in KINDS:
        for d in sorted({r["density"] for r in rows}) + [None]:
            sub = [r for r in rows if r["kind"] == kind and (d is None or r["density"] == d)]
            if not sub:
                continue
            rel = np.array([(r["volume"] - r["truth"]) / r["truth"] * 100 for r in sub])
            gap = np.array([r["e_gap"] / r["truth"] * 100 for r in sub])
            edge = np.array([r["e_edge"] / r["truth"] * 100 for r in sub])
            z = _zs(sub)
            se = rel.std(ddof=1) / math.sqrt(len(rel)) if len(rel) > 1 else float("nan")
            lab = f"{d}x" if d is not None else "all"
            cov = np.mean(np.abs(z) <= Z95) * 100
            print(f"  {kind:8} {lab:>3} n={len(sub):3d}  mean {rel.mean():+.2f} % (se {se:.2f})  interpolated cells "
                  f"{gap.mean():+.2f} % (edge cells {edge.mean():+.2f} %)  covered {cov:5.1f} %  sd z {z.std(ddof=1):.2f}")


def _zs(rows, e="total", s="sigma"):
    if e == "total":
        err = np.array([r["volume"] - r["truth"] for r in rows])
    else:
        err = np.array([r[e] for r in rows])
    sig = np.array([r[s] for r in rows])
    ok = sig > 0
    return err[ok] / sig[ok]


def _line(label, z):
    if len(z) == 0:
        return f"  {label:28} n=0"
    sd = z.std(ddof=1) if len(z) > 1 else float("nan")
    return (f"  {label:28} n={len(z):3d}  covered {np.mean(np.abs(z) <= Z95) * 100:5.1f} %  "
            f"mean z {z.mean():+.2f}  sd z {sd:.2f}  max |z| {np.abs(z).max():.2f}")


def report(rows, cases=False):
    print(f"{len(rows)} pile-surveys")
    print("Whole interval (z = (volume - truth) / volume_sigma_m3):")
    print(_line("all", _zs(rows)))
    for d in sorted({r["density"] for r in rows}):
        print(_line(f"density {d}x", _zs([r for r in rows if r["density"] == d])))
    print("Per term (that term's part of the error / the term):")
    # with a toe base the plane absorbs the registration error of its ring, so the
    # correlated and base parts are judged apart only for level and floor bases
    for e, s, bases in (("e_rand", "s_rand", None), ("e_gap", "s_gap", None),
                        ("e_corr", "s_corr", ("level", "floor")), ("e_base", "s_base", ("floor",))):
        for d in sorted({r["density"] for r in rows}):
            sub = [r for r in rows if r["density"] == d and r[s] > 0 and (bases is None or r["base"] in bases)]
            print(_line(f"{s} {d}x" + (f" ({'/'.join(bases)})" if bases else ""), _zs(sub, e, s)))
    # a toe plane moves with the registration error of its ring: judge the two together
    for d in sorted({r["density"] for r in rows}):
        sub = [dict(r, e_cb=r["e_corr"] + r["e_base"], s_cb=math.hypot(r["s_corr"], r["s_base"]))
               for r in rows if r["density"] == d and r["base"] == "toe"]
        print(_line(f"s_corr+s_base {d}x (toe)", _zs(sub, "e_cb", "s_cb")))
    print("Per case:")
    for key, vals in (("kind", KINDS), ("shadow", SHADOWS), ("base", ("toe", "level", "floor")),
                      ("ground", ("smooth", "rough"))):
        for v in vals:
            sub = [r for r in rows if r[key] == v]
            rel = np.array([(r["volume"] - r["truth"]) / r["truth"] * 100 for r in sub])
            print(_line(f"{key}={v}", _zs(sub)) + f"  mean err {rel.mean():+.2f} %")
    print("Shadows over a crest or flat-top edge (the gap fill's bias), error % of volume:")
    for kind in KINDS:
        sub = [r for r in rows if r["shadow"] == "crest" and r["kind"] == kind]
        if sub:
            rel = np.array([(r["volume"] - r["truth"]) / r["truth"] * 100 for r in sub])
            gap = np.array([r["e_gap"] / r["truth"] * 100 for r in sub])
            print(f"  {kind:10} n={len(sub):2d}  mean {rel.mean():+.2f} %  (interpolated cells {gap.mean():+.2f} %)"
                  f"  range {rel.min():+.2f} .. {rel.max():+.2f} %")
    clip = np.array([r["e_clip"] / r["sigma"] for r in rows])
    print(f"Material below the base left out of the volume (volume - signed sum) / sigma: mean {clip.mean():+.2f}, "
          f"largest {clip.max():+.2f}")
    disc = np.array([r["e_disc"] / r["truth"] * 100 for r in rows])
    print(f"Grid discretisation (true cell means against the formula): mean {disc.mean():+.3f} %, "
          f"largest {np.abs(disc).max():.3f} %")
    if cases:
        for r in rows:
            z = (r["volume"] - r["truth"]) / r["sigma"]
            print(f"  {r['kind']:8} {r['shadow']:8} {r['base']:5} {r['ground']:6} {r['density']:2d}x "
                  f"noise {r['noise'] * 100:4.1f} cm  V {r['truth']:7.1f}  err {r['volume'] - r['truth']:+7.2f}  "
                  f"z {z:+5.2f}  sig {r['sigma']:6.2f} = r {r['s_rand']:5.2f} c {r['s_corr']:5.2f} "
                  f"g {r['s_gap']:5.2f} b {r['s_base']:5.2f}  e r {r['e_rand']:+5.2f} c {r['e_corr']:+5.2f} "
                  f"g {r['e_gap']:+6.2f} b {r['e_base']:+6.2f}  scanned {r['scanned']:.2f} {r['flags']}")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=10)
    ap.add_argument("--cases", action="store_true")
    ap.add_argument("--crest", type=int, default=0, metavar="SEEDS",
                    help="also run SEEDS seeds of crest shadows only and print their bias per shape")
    ap.add_argument("--interp-k", type=float, default=None,
                    help="interpolation slope factor to try (default: the module's INTERP_SLOPE_FACTOR)")
    args = ap.parse_args(argv)
    t0 = time.perf_counter()
    errors = None
    if args.interp_k is not None:
        from inventory.volume.measure import ErrorModel

        errors = ErrorModel(interp_slope_factor=args.interp_k)
    if args.seeds:
        report(run(args.seeds, errors=errors), args.cases)
    if args.crest:
        crest_report(run_crest(args.crest, errors=errors))
    print(f"({time.perf_counter() - t0:.0f} s)")


if __name__ == "__main__":
    main()
