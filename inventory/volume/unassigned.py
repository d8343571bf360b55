r"""Stock outside every footprint: material the pile register does not hold, found from the surface.

A new pile nobody registered, a spill, a pile that grew past its polygon: material above the
base outside every footprint in ``piles.gpkg``. It is found, measured and reported, never
added to a pile's stock (which pile it belongs to is for a person to decide).

How it is found (:func:`find_unassigned`)
-----------------------------------------
1. **The base outside the footprints** (for finding). The site's floor raster where it has a
   value; elsewhere a *ground surface* taken from the survey itself: the highest surface
   below the scanned cells outside every footprint that nowhere rises or falls faster than
   :data:`GROUND_MAX_SLOPE` (the grey-scale erosion of the surface by an unbounded cone,
   which equals the opening by it; Serra 1982, *Image analysis and mathematical morphology*, the operation
   morphological ground filters are built on). Ground graded less steeply is kept as it is,
   a heap at its angle of repose stands out of it.
2. **Cores.** Scanned cells whose centre lies outside every footprint and whose thickness
   above that base exceeds ``min_thickness_m`` (site.toml ``[unassigned] min_thickness_m``,
   default 0.3 m), joined by their 8 neighbours into regions; a region smaller than
   ``min_area_m2`` (default 4 m2) is dropped as a stray object (a wheel loader's bucket, a
   person classified as surface).
3. **Extent.** A core's thickness threshold cuts off the thin skirt of a heap (a cone of
   height 4 m loses a fifth of its volume below 0.3 m), so each core grows over the connected
   cells thicker than :data:`LOW_THICKNESS_M` (hysteresis thresholding) and then
   :data:`EXTENT_PAD_CELLS` cells further, to its toe; what a region encloses belongs to it.
   Cells shared with a footprint count by the share of the cell outside it (the footprint's exact weights,
   :func:`inventory.volume.measure.footprint_weights`).

How it is measured
------------------
Each region is measured exactly as a pile (:mod:`inventory.volume.measure`): volume is the
sum of the positive thickness times the cell's outside share and area, and the uncertainty
has the same four terms (random, correlated, interpolated, base). The base under a region is
chosen in this order:

``floor``
    the site's floor raster, when it covers every cell of the region (its stated sigma is
    the base term, as for a pile on the floor);
``toe``
    otherwise a robust plane through a ring of :attr:`BaseSurfaces.toe_ring_m` of scanned
    cells around the region, other footprints and regions left out (the ``toe`` base of a
    pile: its fit covariance and roughness are the base term);
``rim``
    when footprints leave too little of that ring free, a plane fitted the same way through
    the region's own rim (the cells added around it to reach its toe), flag ``toe_no_ring``;
``ground``
    when even the rim is too small for a plane, the ground surface of step 1, with the
    robust scatter of the outside ground about it taken as a fully correlated base error
    (under a heap hemmed in on every side that surface still carries the slope-limited bump
    of step 1, so the volume is low; ``base_method`` says so).

A footprint whose edge cuts through a pile is flagged (``edge_cut``): along the band just
outside its boundary (:data:`EDGE_BAND_M`, other footprints left out; cells touching the
footprint do not count, so a wall's face on the edge line does not) the scanned surface is
still thicker than ``min_thickness_m`` over at least :data:`EDGE_MIN_LENGTH_M` of the edge,
above the outside base and above the pile's own base (its toe plane, level or floor).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
import shapely
from scipy import ndimage

from inventory.model.grid import Surface
from inventory.volume.base import MAD_TO_SIGMA, BaseModel, fill_nearest, toe_base
from inventory.volume.measure import (
    LOW_SCAN_FRACTION,
    Z95,
    BaseSurfaces,
    ErrorModel,
    _footprints,
    _measure_one,
    _outline,
    _PileWork,
    _prepare,
    _subgrid,
    _typical_sd,
    footprint_weights,
)

if TYPE_CHECKING:
    import geopandas as gpd

__all__ = [
    "UNASSIGNED_COLUMNS",
    "EDGE_COLUMNS",
    "Unassigned",
    "find_unassigned",
    "empty_regions",
    "inside_weights",
    "DEFAULT_MIN_THICKNESS_M",
    "DEFAULT_MIN_AREA_M2",
]

#: Thickness above which material outside every footprint is stock (m); site.toml
#: ``[unassigned] min_thickness_m``. Engineering judgement: ten times the scan noise of a
#: terrestrial scanner, well above the unevenness of a paved yard, below the height of a
#: tipped truck load.
DEFAULT_MIN_THICKNESS_M = 0.3

#: Smallest core area reported (m2); site.toml ``[unassigned] min_area_m2``. Engineering
#: judgement: a 2 m x 2 m heap holds about a tonne; smaller objects above 0.3 m are more
#: likely a machine part or a person the classifier left in the surface.
DEFAULT_MIN_AREA_M2 = 4.0

#: Steepest grade (rise over run) the ground outside the footprints is taken to have where
#: the site has no floor raster. Engineering judgement: stockyard pads are graded at a few
#: percent for drainage and haul ramps at up to about 10 % (common practice), while bulk
#: material stands at its angle of repose, 30 to 40 degrees (a grade of 0.6 to 0.85).
GROUND_MAX_SLOPE = 0.10

#: Thickness (m) down to which a core grows into its skirt (hysteresis thresholding).
LOW_THICKNESS_M = 0.05

#: Cells added around the grown region, so that the toe below ``LOW_THICKNESS_M`` is counted.
EXTENT_PAD_CELLS = 2

#: Width of the band just outside a footprint's edge that is checked for a cut pile (m).
EDGE_BAND_M = 1.0

#: Length of footprint edge (m) along which the band must be thick before ``edge_cut``.
EDGE_MIN_LENGTH_M = 2.0

#: Columns of :attr:`Unassigned.regions` (besides the geometry), in order.
UNASSIGNED_COLUMNS = [
    "region_id", "area_m2", "max_thickness_m", "base_method", "scanned_fraction",
    "volume_m3", "volume_tin_m3", "below_base_m3", "volume_sigma_m3", "volume_ci95_m3",
    "sigma_random_m3", "sigma_correlated_m3", "sigma_interpolated_m3", "sigma_base_m3",
    "centre_x_m", "centre_y_m", "next_to", "flags",
]

#: Text columns of :data:`UNASSIGNED_COLUMNS` (the others are numbers).
_TEXT_COLUMNS = {"region_id", "base_method", "next_to", "flags"}

#: Columns of :attr:`Unassigned.edges`: footprints whose edge cuts through material.
EDGE_COLUMNS = ["pile_id", "edge_cut_length_m", "edge_max_thickness_m"]


@dataclass
class Unassigned:
    """What :func:`find_unassigned` found.

    Attributes
    ----------
    regions : GeoDataFrame
        One row per region of stock outside every footprint, columns
        :data:`UNASSIGNED_COLUMNS` and the region's polygon (the outside part of its cells).
    edges : DataFrame
        Footprints whose edge cuts through material, columns :data:`EDGE_COLUMNS`.
    thickness : ndarray
        Thickness above the outside base on the survey grid, NaN inside the footprints and
        where the surface has no value.
    min_thickness_m, min_area_m2 : float
        The thresholds used.
    """

    regions: Any
    edges: pd.DataFrame
    thickness: np.ndarray
    min_thickness_m: float
    min_area_m2: float

    def table(self) -> pd.DataFrame:
        """The regions and the cut footprints as one table (the workbook's ``Unassigned
        stock`` sheet, ``unassigned-<date>.csv``): one row per region (``region_id`` set),
        then one per footprint whose edge cuts through material (``pile_id`` set, flag
        ``edge_cut``); the same columns whether or not anything was found."""
        cols = ["region_id", "pile_id"] + [c for c in UNASSIGNED_COLUMNS if c != "region_id"] + EDGE_COLUMNS[1:]
        text = _TEXT_COLUMNS | {"pile_id"}
        frames = [f for f in (pd.DataFrame(self.regions.drop(columns="geometry")),
                              self.edges.assign(flags="edge_cut")) if len(f)]
        if not frames:
            return pd.DataFrame({c: pd.Series(dtype=object if c in text else "float64") for c in cols})
        out = pd.concat(frames, ignore_index=True) if len(frames) > 1 else frames[0].copy()
        return out.reindex(columns=cols)

    def messages(self) -> list[str]:
        """One line per region and per cut footprint, for warnings and summaries."""
        out = []
        for r in self.regions.itertuples(index=False):
            near = f", next to {r.next_to}" if r.next_to else ""
            out.append(
                f"stock outside every footprint: {r.region_id} at ({r.centre_x_m:.1f}, {r.centre_y_m:.1f}), "
                f"{r.volume_m3:,.1f} m3 +/- {r.volume_ci95_m3:,.1f} m3 (95 %), {r.area_m2:,.1f} m2{near}"
            )
        for e in self.edges.itertuples(index=False):
            out.append(
                f"pile {e.pile_id}: the footprint edge cuts through material over {e.edge_cut_length_m:.1f} m "
                f"(up to {e.edge_max_thickness_m:.2f} m thick just outside it); redraw the footprint"
            )
        return out


def empty_regions(crs: Any = None) -> "gpd.GeoDataFrame":
    """A regions table with no row (:data:`UNASSIGNED_COLUMNS`, typed, and a geometry)."""
    import geopandas as gpd

    cols = {c: pd.Series(dtype=object if c in _TEXT_COLUMNS else "float64") for c in UNASSIGNED_COLUMNS}
    return gpd.GeoDataFrame(cols, geometry=gpd.GeoSeries([], crs=crs), crs=crs)


def inside_weights(surface: Surface, piles: "gpd.GeoDataFrame") -> np.ndarray:
    """Share of each grid cell inside any footprint (0 to 1; overlaps counted once at most)."""
    grid = surface.grid
    w_in = np.zeros(grid.shape)
    for _, poly, _ in _footprints(piles):
        if poly is None:
            continue
        (rows, cols), w = footprint_weights(poly, grid)
        if w.size:
            w_in[rows, cols] += w
    return np.clip(w_in, 0.0, 1.0)


def _sweep(a: np.ndarray, step: float, axis: int, op) -> np.ndarray:
    """Both ways along ``axis``: ``a[i] = op(a[i], a[i -/+ 1] + step)`` (a distance transform
    with a cost of ``step`` per cell; ``op`` np.minimum with step > 0 for an erosion)."""
    out = np.moveaxis(a.copy(), axis, 0)
    for i in range(1, out.shape[0]):
        out[i] = op(out[i], out[i - 1] + step)
    for i in range(out.shape[0] - 2, -1, -1):
        out[i] = op(out[i], out[i + 1] + step)
    return np.moveaxis(out, 0, axis)


def _ground(z: np.ndarray, use: np.ndarray, cell: float, min_thickness_m: float) -> np.ndarray:
    """The ground under the ``use`` cells: the highest surface below them that nowhere rises
    or falls faster than :data:`GROUND_MAX_SLOPE`, raised onto the middle of the ground's
    scatter (NaN where there is no ``use`` cell at all).

    It is the grey-scale erosion of the surface by a cone of that slope (an L1 cone, so that
    it separates into one sweep each way along rows and columns; Rosenfeld and Pfaltz 1968
    distance transform with a cost per cell). The erosion is nowhere steeper than the cone,
    so dilating it by the same cone gives it back: it is also the opening by the cone.
    Ground graded less steeply than the slope is kept as it is; a heap steeper than it is
    cut down to a bump of at most the slope times its half-width. An erosion follows the
    lowest points of the scatter; the median departure of the ground cells (less than
    ``min_thickness_m`` above it) is added back.
    """
    known = use & np.isfinite(z)
    if not known.any():
        return np.full(z.shape, np.nan)
    step = GROUND_MAX_SLOPE * cell
    src = np.where(known, z, np.inf)
    out = _sweep(_sweep(src, step, 1, np.minimum), step, 0, np.minimum)
    out = np.where(np.isfinite(out), out, np.nan)
    r = (z - out)[known]
    r = r[r < min_thickness_m]
    return out + (float(np.median(r)) if r.size else 0.0)


def _centres(grid, rows: slice, cols: slice) -> tuple[np.ndarray, np.ndarray]:
    return _subgrid(grid, rows, cols).centers()


def _own_base(surface: Surface, pid: str, poly, spec: str, base: BaseSurfaces, polys, noise_sd: float,
              rows: slice, cols: slice) -> np.ndarray | None:
    """The pile's own base (as its volume is measured on it) on the cells ``rows, cols``;
    None where it has none there (no ring for a plane, no floor, a bad base)."""
    others = [(p, g) for p, g in polys if p != pid]
    try:
        work = _prepare(surface, pid, poly, spec, base, others, noise_sd)
    except ValueError:
        return None
    if work is None or not work.model.ok:
        return None
    out = np.full((rows.stop - rows.start, cols.stop - cols.start), np.nan)
    r0, r1 = max(rows.start, work.rows.start), min(rows.stop, work.rows.stop)
    c0, c1 = max(cols.start, work.cols.start), min(cols.stop, work.cols.stop)
    if r1 > r0 and c1 > c0:
        out[r0 - rows.start:r1 - rows.start, c0 - cols.start:c1 - cols.start] = \
            work.base[r0 - work.rows.start:r1 - work.rows.start, c0 - work.cols.start:c1 - work.cols.start]
    return out


def _edges(surface: Surface, foots, thick: np.ndarray, min_thickness_m: float,
           specs: list[str] | None = None, base: BaseSurfaces | None = None,
           noise_sd: float = 0.0) -> pd.DataFrame:
    """Footprints along whose edge, just outside, the scanned surface is still thick.

    Thick above the outside base and, where ``specs`` give each pile's base, above the
    pile's own base too: material cut by the footprint stands above both. The outside
    ground alone is wrong on natural terrain, where a bank or terrace steeper than
    :data:`GROUND_MAX_SLOPE` tens of metres away lowers it under a whole flat (measured on
    the airborne laspy sample ``autzen_trim.laz``: a pad 1.5-1.9 m above it beside a river
    bank, two piles with footprints 3 m outside their toes flagged over 36-44 m of edge);
    the pile's toe plane is fitted to that very pad.
    """
    grid = surface.grid
    # Only cells clear of the footprint count (centres more than half a cell's diagonal
    # outside it): a cell touching the edge holds what stands on the edge line, such as the
    # returns of a wall's face just above the material heaped against it, and material
    # that the edge cuts goes on beyond that first row.
    clear = grid.cell / math.sqrt(2.0)
    band_w = max(EDGE_BAND_M, clear + grid.cell)
    polys = [(pid, g) for pid, g, _ in foots if g is not None]
    spec_of = {pid: sp for (pid, _, _), sp in zip(foots, specs)} if specs is not None else {}
    recs = []
    for pid, poly in polys:
        band = poly.buffer(band_w).difference(poly)
        near = [g for p, g in polys if p != pid and g.intersects(band)]
        if near:
            band = band.difference(shapely.union_all(near))
        if band.is_empty:
            continue
        rows, cols = grid.window(*band.bounds)
        if rows.stop <= rows.start or cols.stop <= cols.start:
            continue
        x, y = _centres(grid, rows, cols)
        sel = shapely.contains_xy(band, x, y) & (surface.count[rows, cols] > 0)
        away = shapely.distance(poly, shapely.points(x, y)) > clear
        t = thick[rows, cols]
        if pid in spec_of:
            own = _own_base(surface, pid, poly, spec_of[pid], base or BaseSurfaces(), polys, noise_sd, rows, cols)
            if own is not None:
                t_own = surface.z[rows, cols] - own
                t = np.where(np.isfinite(t_own), np.minimum(t, t_own), t)
        hot = sel & np.isfinite(t) & (t > min_thickness_m)
        length = float((hot & away).sum()) * grid.cell_area / (band_w - clear)
        if length >= EDGE_MIN_LENGTH_M:
            recs.append({"pile_id": pid, "edge_cut_length_m": length,
                         "edge_max_thickness_m": float(np.max(t[hot]))})
    return pd.DataFrame(recs, columns=EDGE_COLUMNS)


def find_unassigned(
    surface: Surface,
    piles: "gpd.GeoDataFrame",
    base: BaseSurfaces | None = None,
    *,
    min_thickness_m: float = DEFAULT_MIN_THICKNESS_M,
    min_area_m2: float = DEFAULT_MIN_AREA_M2,
    errors: ErrorModel | None = None,
) -> Unassigned:
    """Find and measure the stock lying outside every footprint (see the module docstring).

    Parameters
    ----------
    surface : Surface
        The survey's surface grid.
    piles : GeoDataFrame
        The pile register (``pile_id`` and polygon geometry in the grid's CRS).
    base : BaseSurfaces, optional
        The site's floor raster (used outside the footprints where it has a value), its
        sigma and the ring width for a fitted base.
    min_thickness_m, min_area_m2 : float
        A region is reported when its cells thicker than ``min_thickness_m`` cover at least
        ``min_area_m2``.
    errors : ErrorModel, optional
        Parameters of the uncertainty model (as for the piles).

    Returns
    -------
    Unassigned
    """
    import geopandas as gpd

    base = base or BaseSurfaces()
    errors = errors or ErrorModel()
    grid = surface.grid
    a = grid.cell_area
    noise_sd = _typical_sd(surface, errors)
    foots = _footprints(piles)
    w_in = inside_weights(surface, piles)
    w_out = 1.0 - w_in
    z = surface.z.astype(float)
    scanned = (surface.count > 0) & np.isfinite(z)
    outside = w_in < 0.5  # cell centre (nearly always) outside every footprint

    ground = _ground(z, outside & scanned, grid.cell, min_thickness_m)
    floor = base.floor if base.floor is not None else np.full(grid.shape, np.nan)
    base_z = np.where(np.isfinite(floor), floor, ground)
    thick_all = z - base_z
    thick = np.where(outside, thick_all, np.nan)
    specs = [str(b) for b in piles["base"]] if "base" in piles.columns else None
    edges = _edges(surface, foots, thick_all, min_thickness_m, specs, base, noise_sd)

    crs = getattr(piles, "crs", None) or (grid.crs or None)
    empty = empty_regions(crs)
    core = outside & scanned & (thick_all > min_thickness_m)
    eight = np.ones((3, 3), bool)
    lab, n = ndimage.label(core, structure=eight)
    if n == 0:
        return Unassigned(empty, edges, thick, min_thickness_m, min_area_m2)
    sizes = ndimage.sum(np.ones(grid.shape), lab, index=np.arange(1, n + 1)) * a
    keep = np.zeros(n + 1, bool)
    keep[1:] = sizes >= min_area_m2
    cores = keep[lab]
    if not cores.any():
        return Unassigned(empty, edges, thick, min_thickness_m, min_area_m2)

    # grow each core into its skirt, then to its toe
    low = (w_out > 0) & np.isfinite(thick_all) & (thick_all > min(LOW_THICKNESS_M, min_thickness_m))
    lab_low, _ = ndimage.label(low | cores, structure=eight)
    grown = np.isin(lab_low, np.unique(lab_low[cores]))
    grown = ndimage.binary_dilation(grown, structure=eight, iterations=EXTENT_PAD_CELLS)
    # a flat-topped heap wider than the ground's slope allows is cut down to the ground in
    # its middle: what a region encloses belongs to it
    grown = ndimage.binary_fill_holes(grown)
    grown &= (w_out > 0) & np.isfinite(z)
    regions, _ = ndimage.label(grown, structure=eight)

    # ground scatter about the ground surface, for a region measured on it
    flat = outside & scanned & np.isfinite(ground) & ~grown
    r = (z - ground)[flat]
    ground_sigma = float(MAD_TO_SIGMA * np.median(np.abs(r - np.median(r)))) if r.size else 0.0

    union_foot = shapely.union_all([g for _, g, _ in foots if g is not None]) if foots else shapely.Polygon()
    polys: dict[int, shapely.Geometry] = {}
    slices = ndimage.find_objects(regions)
    for k, sl in enumerate(slices, start=1):
        if sl is None:
            continue
        m = regions[sl] == k
        cells = _outline(m, _subgrid(grid, sl[0], sl[1]).transform, 0.0, grid.cell)
        polys[k] = cells
    others_base = [(pid, g) for pid, g, _ in foots if g is not None]

    recs = []
    pad = int(math.ceil((base.toe_ring_m + 1.0) / grid.cell))
    for k, sl in enumerate(slices, start=1):
        if sl is None or not (cores[sl] & (regions[sl] == k)).any():
            continue
        rows = slice(max(sl[0].start - pad, 0), min(sl[0].stop + pad, grid.nrows))
        cols = slice(max(sl[1].start - pad, 0), min(sl[1].stop + pad, grid.ncols))
        sub = _subgrid(grid, rows, cols)
        mask = regions[rows, cols] == k
        w = np.where(mask, w_out[rows, cols], 0.0)
        zw = z[rows, cols]
        cells = polys[k]
        flags: list[str] = []
        fl = floor[rows, cols]
        if np.isfinite(fl[mask]).all():
            model = BaseModel(kind="floor", grid=sub, floor=fill_nearest(fl),
                              floor_sigma_m=base.floor_sigma_m, residual_m=base.floor_sigma_m)
            method = "floor"
        else:
            others = others_base + [(f"region {j}", p) for j, p in polys.items() if j != k]
            model = toe_base(grid, cells, others, surface.z, surface.count, surface.sd,
                             surface.filled, base.toe_ring_m, noise_sd)
            method = "toe"
            if not model.ok:
                # no free ring around it: a plane through the region's own rim, the cells
                # added around it to reach its toe
                inner = cells.buffer(-EXTENT_PAD_CELLS * grid.cell)
                if not inner.is_empty:
                    model = toe_base(grid, inner, others_base, surface.z, surface.count, surface.sd,
                                     surface.filled, EXTENT_PAD_CELLS * grid.cell, noise_sd)
                    method = "rim"
                    flags.append("toe_no_ring")
            if not model.ok:
                gw = fill_nearest(ground[rows, cols])
                model = BaseModel(kind="floor", grid=sub, floor=gw, floor_sigma_m=ground_sigma,
                                  residual_m=ground_sigma)
                method = "ground"
                flags.append("toe_no_ring")
        if model.kind == "floor":
            bz = model.floor
        else:
            x, y = sub.centers()
            bz = model.at(x, y)
        work = _PileWork(rows, cols, sub, w, fill_nearest(zw), bz, (surface.count[rows, cols] > 0) & np.isfinite(zw),
                         model, flags)
        geom = cells.difference(union_foot) if not union_foot.is_empty else cells
        vals = _measure_one(surface, work, geom if not geom.is_empty else cells, errors, noise_sd, None)
        t = (work.z - bz)[mask]
        x, y = sub.centers()
        wt = w[mask] * np.clip(t, 0, None)
        cx = float(np.sum(x[mask] * wt) / wt.sum()) if wt.sum() > 0 else float(np.mean(x[mask]))
        cy = float(np.sum(y[mask] * wt) / wt.sum()) if wt.sum() > 0 else float(np.mean(y[mask]))
        near = [pid for pid, g in others_base if g.distance(cells) <= grid.cell]
        if near:
            flags.append("touches_footprint")
        if vals["scanned_fraction"] < LOW_SCAN_FRACTION:
            flags.append("low_scan")
        recs.append({
            "area_m2": float(np.sum(w) * a), "max_thickness_m": float(np.max(t)),
            "base_method": method, "scanned_fraction": vals["scanned_fraction"],
            "volume_m3": vals["volume_m3"], "volume_tin_m3": vals["volume_tin_m3"],
            "below_base_m3": vals["below_base_m3"],
            "volume_sigma_m3": vals["volume_sigma_m3"], "volume_ci95_m3": Z95 * vals["volume_sigma_m3"],
            "sigma_random_m3": vals["sigma_random_m3"], "sigma_correlated_m3": vals["sigma_correlated_m3"],
            "sigma_interpolated_m3": vals["sigma_interpolated_m3"], "sigma_base_m3": vals["sigma_base_m3"],
            "centre_x_m": cx, "centre_y_m": cy, "next_to": ", ".join(near),
            "flags": ";".join(dict.fromkeys(flags)), "geometry": geom,
        })
    if not recs:
        return Unassigned(empty, edges, thick, min_thickness_m, min_area_m2)
    recs.sort(key=lambda r: -r["volume_m3"])
    for i, rec in enumerate(recs, start=1):
        rec["region_id"] = f"U{i}"
    frame = gpd.GeoDataFrame(recs, geometry="geometry", crs=crs)
    return Unassigned(frame[UNASSIGNED_COLUMNS + ["geometry"]], edges, thick, min_thickness_m, min_area_m2)
