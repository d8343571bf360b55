r"""Pile volumes above their base, with their uncertainty, and survey tonnes.

For each footprint in ``piles.gpkg`` the grid volume above the pile's base (``floor``,
``level:<z>`` or ``toe``) is summed over the survey grid, cut by the footprint edge exactly
(:func:`footprint_weights`); a TIN volume is computed independently as a cross-check; the
uncertainty of the volume is built from the scan itself (random, spatially correlated,
interpolation and base terms, added in quadrature); and the volume is turned into wet and
dry tonnes with the material's bulk density.

The formulas, the base surfaces and the uncertainty model with its sources:
docs/uncertainty.md.

Examples
--------
>>> import numpy as np, geopandas as gpd, shapely
>>> from inventory.model.grid import Grid, Surface
>>> from inventory.site.load import Material
>>> from inventory.volume.measure import measure_piles, BaseSurfaces
>>> g = Grid(0.0, 20.0, 0.5, 40, 40)
>>> x, y = g.centers()
>>> z = np.clip(4.0 - np.hypot(x - 10, y - 10) * 0.8, 0, None)   # a cone, r 5 m, h 4 m
>>> s = Surface(g, z, np.full(g.shape, 5, np.int32), np.full(g.shape, 0.01), np.zeros(g.shape, bool))
>>> piles = gpd.GeoDataFrame({"pile_id": ["P1"], "material": ["sand"], "base": ["level:0"],
...     "density_t_m3": [None]}, geometry=[shapely.Point(10, 10).buffer(7)])
>>> mats = {"sand": Material("sand", bulk_density_t_m3=1.6, density_sd_t_m3=0.05, moisture_pct=5.0)}
>>> t = measure_piles(s, piles, mats, BaseSurfaces())
>>> round(float(t.volume_m3[0]) / (np.pi * 25 * 4 / 3), 2)
1.0
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, Mapping

import numpy as np
import pandas as pd
import shapely
from scipy import ndimage
from scipy.interpolate import LinearNDInterpolator
from scipy.signal import fftconvolve
from scipy.spatial import Delaunay, QhullError

from inventory.errors import CoverageWarning, CRSError, InputError, InputWarning
from inventory.io.rasters import read_raster
from inventory.model.grid import Grid, Surface, lone_patches
from inventory.site.load import Material, parse_base
from inventory.volume.base import (PROBE_LEAST, BaseModel, bilinear, fill_nearest, open_ground, toe_base,
                                   toe_probe_sigma)
from inventory.volume.gapfill import fill_slope_breaks
from inventory.volume.tin import tin_volume

if TYPE_CHECKING:
    import geopandas as gpd

    from inventory.site.load import Site

__all__ = [
    "BaseSurfaces",
    "ErrorModel",
    "VOLUME_COLUMNS",
    "footprint_weights",
    "measure_piles",
    "thickness_raster",
    "coverage_gaps",
    "close_speckle",
    "tidy_outline",
    "scanned_outline",
    "spherical_correlation_sum",
]

# ----------------------------------------------------------------------------- constants
#: Two-sided 95 % quantile of the normal distribution.
Z95 = 1.959963984540054

#: Sigma of the spatially correlated surface error (m). Terrestrial-scan registration to
#: control of about 1 cm: common practice for target-based registration (no source read).
CORRELATED_SIGMA_M = 0.01

#: Range of its spherical correlation (m). Engineering judgement for station-registration
#: errors that tilt or shift a whole scan; Anderson 2019 fits the range on stable ground,
#: which a single survey does not have.
CORRELATION_LENGTH_M = 15.0

#: Interpolation error per metre of distance to the nearest scanned cell, per unit of
#: slope mismatch (the change of slope the filled surface makes against the scanned rim,
#: :func:`_slope_mismatch`). A flat fill over an apex whose flanks have slope s misses the
#: surface by s d at distance d from the rim (a cone), which made 1.0 the geometric bound
#: for linear filling; where a gap hides a crest or a toe the fill now extends the flanks'
#: planes (:mod:`inventory.volume.gapfill`), which removes most of that miss. The factor is
#: calibrated on the study of bench/bench_calibration.py (cones, frustums, windrows,
#: reclaim faces and bays with shadows over crests, flanks, backs and machines, at 1x and
#: 10x point density): 0.4 puts the coverage of the 95 % interval between 92 and 98 % and
#: the standard deviation of error / sigma of the whole interval between 0.7 and 1.3 at
#: both densities (0.5 before the rim planes were fitted on arcs, whose fill misses less;
#: with it the 10x coverage was 99 %; numbers in CHANGELOG.md).
INTERP_SLOPE_FACTOR = 0.4

#: Correlation length of interpolation errors as a multiple of the local gap width (the
#: diameter of the largest unscanned disc covering the cell, :func:`_local_gap_width`):
#: cells interpolated from the same rim share their error, cells of different gaps do not.
#: 1.0 makes two cells one gap width apart correlate by exp(-1) (Gaussian model).
GAP_CORRELATION_FACTOR = 1.0

#: Cap of an interpolated cell's error as a share of the highest scanned thickness of the
#: pile: the true thickness lies between 0 and about that height, and so does the
#: interpolated one, so their difference rarely exceeds half of it (engineering judgement).
_GAP_CAP_FRACTION = 0.5

#: Scanned cells up to this many cells beyond a gap cell's distance to the nearest scanned
#: cell form the rim whose slopes are compared with the interpolated slope there.
_RIM_CELLS = 1

#: Point scatter (m) assumed when the surface carries no per-cell scatter at all.
#: Terrestrial laser range noise of a few millimetres to 1 cm at stockpile ranges (common
#: practice; scanner data sheets).
DEFAULT_POINT_SD_M = 0.01

#: Floor-raster sigma (m) when none is stated (site.toml default).
DEFAULT_FLOOR_SIGMA_M = 0.03

#: Toe-ring width (m) when none is stated (site.toml default).
DEFAULT_TOE_RING_M = 3.0

#: Below this scanned share the pile is flagged ``low_scan`` (engineering judgement: beyond
#: a fifth of a pile interpolated, the interpolation term usually dominates the sigma).
LOW_SCAN_FRACTION = 0.8

#: Piles whose hidden crests leave more than this share of the volume to the shape of a top
#: no station saw (:func:`_hidden_top`: the volume between the chord and the flanks' planes)
#: are flagged ``hidden_top``. Five percent (engineering judgement): the small hidden crests
#: of an ordinary terrestrial survey stay well under it (none of the sample site's piles
#: reaches it), a top no station saw (the second yard's flat-topped pile: 25-35 %) is far over.
HIDDEN_TOP_FLAG_FRACTION = 0.05

#: Material below base beyond this share of the volume is flagged ``below_base``; a few
#: tenths of a percent come from scan noise on the floor around the pile.
BELOW_BASE_FLAG_FRACTION = 0.01

#: A toe fit whose residual exceeds this (m) is flagged ``toe_fit`` (rough or disturbed
#: ground around the pile; engineering judgement, ten times typical scan noise).
TOE_RESIDUAL_FLAG_M = 0.10

#: Extra cells around each footprint window, in metres, so that gap distances and gap
#: interpolation see scanned cells beyond the footprint edge.
_PAD_M = 6.0

#: Unscanned cells at least this far outside every footprint are taken as floor at the
#: pile's base when a gap is interpolated (metres; about a bay wall's thickness).
_GROUND_CLEARANCE_M = 1.0

#: Shortest group of object cells at a footprint's edge (m across its cells) that stops the
#: gap filling (:func:`_behind_objects`): a wall or a vehicle, not a lone dust return or a
#: bird (engineering judgement).
OBJECT_EDGE_MIN_M = 2.0

#: Output columns of :func:`measure_piles`, in order.
VOLUME_COLUMNS = [
    "pile_id", "material", "base_method", "base_residual_m", "base_note",
    "area_m2", "scanned_fraction",
    "volume_m3", "below_base_m3", "volume_sigma_m3", "volume_ci95_m3",
    "volume_tin_m3", "tin_below_base_m3", "tin_disagrees",
    "sigma_random_m3", "sigma_correlated_m3", "sigma_interpolated_m3", "sigma_base_m3",
    "density_t_m3", "density_sd_t_m3", "moisture_pct",
    "survey_t", "survey_dry_t", "survey_sigma_t", "flags",
]


# ----------------------------------------------------------------------------- inputs
@dataclass
class BaseSurfaces:
    """The site's base-surface inputs, on the survey grid.

    Attributes
    ----------
    floor : ndarray or None
        Floor elevation on the survey grid (NaN where unknown), for piles with base
        ``floor``. :meth:`from_raster` resamples a GeoTIFF onto the grid.
    floor_sigma_m : float
        The floor survey's stated one-sigma elevation error.
    toe_ring_m : float
        Width of the ring outside a footprint through which the ``toe`` plane is fitted.
    """

    floor: np.ndarray | None = None
    floor_sigma_m: float = DEFAULT_FLOOR_SIGMA_M
    toe_ring_m: float = DEFAULT_TOE_RING_M

    @classmethod
    def from_raster(
        cls,
        path: str | Path,
        grid: Grid,
        sigma: float = DEFAULT_FLOOR_SIGMA_M,
        toe_ring_m: float = DEFAULT_TOE_RING_M,
    ) -> "BaseSurfaces":
        """Read a floor GeoTIFF and resample it onto ``grid`` (bilinear).

        A raster without a CRS is taken to be in the grid's CRS (with an
        :class:`~inventory.errors.InputWarning`). Cells the raster does not cover are NaN.
        """
        from rasterio.errors import RasterioIOError

        try:
            out, _ = read_raster(path, onto=grid, resampling="bilinear", name="floor raster")
        except RasterioIOError as err:
            raise InputError(path, f"cannot read floor raster: {err}", field="floor_raster") from err
        return cls(floor=out, floor_sigma_m=float(sigma), toe_ring_m=float(toe_ring_m))

    @classmethod
    def from_site(cls, site: "Site", grid: Grid) -> "BaseSurfaces":
        """Base inputs from a loaded site (``site.config.base``) on ``grid``."""
        cfg = site.config.base
        if getattr(cfg, "floor_raster", None):
            return cls.from_raster(cfg.floor_raster, grid, cfg.floor_sigma_m, cfg.toe_ring_m)
        return cls(None, cfg.floor_sigma_m, cfg.toe_ring_m)


@dataclass(frozen=True)
class ErrorModel:
    """Parameters of the volume uncertainty model (see the module docstring)."""

    correlated_sigma_m: float = CORRELATED_SIGMA_M
    correlation_length_m: float = CORRELATION_LENGTH_M
    interp_slope_factor: float = INTERP_SLOPE_FACTOR
    gap_correlation_factor: float = GAP_CORRELATION_FACTOR
    default_point_sd_m: float = DEFAULT_POINT_SD_M


# ----------------------------------------------------------------------------- weights
def _subgrid(grid: Grid, rows: slice, cols: slice) -> Grid:
    return Grid(
        grid.west + cols.start * grid.cell, grid.north - rows.start * grid.cell, grid.cell,
        rows.stop - rows.start, cols.stop - cols.start, grid.crs,
    )


def _window_weights(poly: shapely.Geometry, grid: Grid, rows: slice, cols: slice) -> np.ndarray:
    """Share of each cell of a window inside ``poly`` (exact intersection areas)."""
    nr, nc = rows.stop - rows.start, cols.stop - cols.start
    w = np.zeros((nr, nc))
    if nr <= 0 or nc <= 0 or poly.is_empty:
        return w
    c = grid.cell
    x0 = grid.west + np.arange(cols.start, cols.stop) * c
    y1 = grid.north - np.arange(rows.start, rows.stop) * c
    X0, Y1 = np.meshgrid(x0, y1)
    boxes = shapely.box(X0, Y1 - c, X0 + c, Y1)
    shapely.prepare(poly)
    hit = shapely.intersects(poly, boxes)
    # Interior cells are whole: no intersection needed (the fast path).
    inner = hit & shapely.contains_properly(poly, boxes)
    w[inner] = 1.0
    edge = hit & ~inner
    if edge.any():
        # Dividing by the nominal cell area keeps sum(w) * a equal to the polygon's area;
        # the clip only removes float noise of a cell wholly inside but touching the edge.
        w[edge] = np.clip(shapely.area(shapely.intersection(boxes[edge], poly)) / grid.cell_area, 0.0, 1.0)
    return w


def footprint_weights(
    polygon: shapely.Geometry, grid: Grid
) -> tuple[tuple[slice, slice], np.ndarray]:
    """Share of each grid cell inside a footprint, from exact polygon-cell intersection.

    Parameters
    ----------
    polygon : shapely Polygon or MultiPolygon
        The footprint, in the grid's CRS.
    grid : Grid

    Returns
    -------
    (rows, cols), weights
        The window of cells that touch the footprint's bounding box (clipped to the grid)
        and a float array of that window's shape: 1 for cells wholly inside, the covered
        fraction for cells cut by the edge, 0 outside. ``weights.sum() * grid.cell_area``
        is the footprint's area on the grid. An empty or missing polygon gives an empty
        window and an empty array.

    Examples
    --------
    >>> import shapely
    >>> from inventory.model.grid import Grid
    >>> (r, c), w = footprint_weights(shapely.box(0.25, 0.25, 1.25, 1.0), Grid(0, 2, 0.5, 4, 4))
    >>> float(w.sum() * 0.25)
    0.75
    """
    if polygon is None or polygon.is_empty:
        return (slice(0, 0), slice(0, 0)), np.zeros((0, 0))
    rows, cols = grid.window(*polygon.bounds)
    return (rows, cols), _window_weights(polygon, grid, rows, cols)


def spherical_correlation_sum(weights: np.ndarray, cell: float, length_m: float) -> float:
    r"""Double sum :math:`\sum_i\sum_j w_i w_j \rho(d_{ij})` for a spherical correlation.

    :math:`\rho(d) = 1 - 1.5 (d/\lambda) + 0.5 (d/\lambda)^3` for :math:`d < \lambda`, else 0
    (spherical semivariogram model, Rolstad et al. 2009). Evaluated by FFT convolution.
    Returns :math:`\sum w_i^2` when :math:`\lambda` is shorter than a cell.
    """
    if weights.size == 0:
        return 0.0
    r = int(math.floor(length_m / cell))
    if r < 1:
        return float(np.sum(weights**2))
    k = np.arange(-r, r + 1) * cell
    d = np.hypot(k[:, None], k[None, :]) / length_m
    rho = np.where(d < 1.0, 1.0 - 1.5 * d + 0.5 * d**3, 0.0)
    conv = fftconvolve(weights, rho, mode="same")
    return float(max(np.sum(weights * conv), 0.0))


#: Half width (cells) of the window over which the point variance of a cell is pooled.
_POOL_HALF = 2


def _local_point_variance(cnt: np.ndarray, sd: np.ndarray, noise_sd: float) -> np.ndarray:
    """Each cell's point variance about its mean, pooled over the cells of two or more
    points in a (2 x :data:`_POOL_HALF` + 1)^2 window around it.

    The surface keeps the population sd of each cell's points; sum(n sd^2) / sum(n - 1) over
    the window is the pooled unbiased variance (one degree of freedom per cell spent on its
    mean). It holds the range noise and the spread of the points' positions across a
    sloping cell (a cell's mean sits at its points' mean position, not at its centre), so
    a single-point cell on a flank gets its flank's variance, not the survey's typical
    scatter, which is used only where no cell nearby has two points.

    The window sums are running sums (``scipy.ndimage.uniform_filter``): where every cell of
    two or more points in a window has a spread of exactly 0 (heights quantised by the file's
    scale, e.g. 0.01 ft, on a flat pad) the sum carries the rounding left by larger values
    passed earlier, about -1e-17, and is clipped to 0 (a negative variance made the pile's
    whole sigma NaN).
    """
    multi = (cnt >= 2) & np.isfinite(sd)
    num = ndimage.uniform_filter(np.where(multi, cnt * np.nan_to_num(sd) ** 2, 0.0), 2 * _POOL_HALF + 1,
                                 mode="constant")
    den = ndimage.uniform_filter(np.where(multi, cnt - 1.0, 0.0), 2 * _POOL_HALF + 1, mode="constant")
    with np.errstate(invalid="ignore", divide="ignore"):
        var = np.maximum(num / den, 0.0)
    return np.where(den > 1e-9, var, noise_sd**2)


#: Gaps of at least this many cells have edges that cut scanned cells (a shadow's edge).
_EDGE_GAP_CELLS = 4


def _edge_variance(z: np.ndarray, scanned: np.ndarray, cell: float) -> np.ndarray:
    """Extra variance of the scanned cells on the edge of a gap of :data:`_EDGE_GAP_CELLS`
    or more cells: a shadow's edge cuts them, so their points cover part of the cell and
    their mean sits off the cell's centre, by an offset taken as uniform across the cell
    (variance cell^2 / 12) times the slope there."""
    gap = ~scanned
    lab, n = ndimage.label(gap)
    if n == 0:
        return np.zeros(z.shape)
    sizes = np.bincount(lab.ravel(), minlength=n + 1)
    big = (sizes >= _EDGE_GAP_CELLS)[lab] & gap
    edge = scanned & ndimage.binary_dilation(big, structure=np.ones((3, 3)))
    zf = fill_nearest(z)
    gr, gc = np.gradient(np.where(np.isfinite(zf), zf, 0.0), cell)
    return np.where(edge, (gr**2 + gc**2) * cell**2 / 12.0, 0.0)


def _rasterise(values: np.ndarray, x: np.ndarray, y: np.ndarray, cell: float) -> np.ndarray:
    """Values at cell centres ``x, y`` summed onto their own small raster."""
    c = np.rint((x - x.min()) / cell).astype(int)
    r = np.rint((y.max() - y) / cell).astype(int)
    out = np.zeros((r.max() + 1, c.max() + 1))
    np.add.at(out, (r, c), values)
    return out


# ----------------------------------------------------------------------------- one pile
@dataclass
class _PileWork:
    """Arrays of one pile on its padded window, shared by the table and the rasters."""

    rows: slice
    cols: slice
    sub: Grid
    w: np.ndarray
    z: np.ndarray          # surface with every footprint cell given a value
    base: np.ndarray       # base elevation on the window
    scanned: np.ndarray
    model: BaseModel
    flags: list[str]
    chord: np.ndarray | None = None   # the linear fill before the slope-break fill
    upper: np.ndarray | None = None   # highest a concave surface can be in each gap cell


def _material(materials: Mapping[str, Material], name: object) -> Material | None:
    if name is None or (isinstance(name, float) and math.isnan(name)):
        return None
    return materials.get(str(name))


def _number(value: object) -> float:
    """A material table figure as a float; NaN when it is missing."""
    try:
        return float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return float("nan")


def _typical_sd(surface: Surface, errors: ErrorModel) -> float:
    ok = (surface.count >= 2) & np.isfinite(surface.sd)
    return float(np.median(surface.sd[ok])) if ok.any() else errors.default_point_sd_m


def _prepare(
    surface: Surface,
    pid: str,
    poly: shapely.Geometry,
    base_spec: str,
    base: BaseSurfaces,
    others: list[tuple[str, shapely.Geometry]],
    noise_sd: float,
    slope_fill: bool = True,
) -> _PileWork | None:
    """Weights, surface (gaps filled), and base for one pile; None when nothing to measure."""
    grid = surface.grid
    flags: list[str] = []
    pad = int(math.ceil(_PAD_M / grid.cell))
    r0, c0 = grid.window(*poly.bounds)
    if r0.stop <= r0.start or c0.stop <= c0.start:
        return None
    rows = slice(max(r0.start - pad, 0), min(r0.stop + pad, grid.nrows))
    cols = slice(max(c0.start - pad, 0), min(c0.stop + pad, grid.ncols))
    w = _window_weights(poly, grid, rows, cols)
    if w.sum() <= 0:
        return None
    if w.sum() * grid.cell_area < poly.area * (1 - 1e-6):
        flags.append("off_grid_part")
    sub = _subgrid(grid, rows, cols)
    inside = w > 0
    z = surface.z[rows, cols].astype(float)
    scanned = (surface.count[rows, cols] > 0) & np.isfinite(z)
    missing = inside & ~np.isfinite(z)
    if missing[inside].all():
        # Nothing to interpolate from: the survey has no surface over this footprint.
        model = BaseModel(kind="none", grid=sub, ok=False, flags=["no_data"],
                          note="no surface data over the footprint")
        return _PileWork(rows, cols, sub, w, z, np.full(w.shape, np.nan), scanned, model,
                         flags + model.flags)

    kind, level = parse_base(base_spec)
    if kind == "level":
        model = BaseModel(kind="level", grid=sub, plane=(level, 0.0, 0.0), origin=(0.0, 0.0))
    elif kind == "floor":
        if base.floor is None:
            model = BaseModel(kind="floor", grid=sub, ok=False, flags=["no_floor"],
                              note="base 'floor' but the site has no floor raster")
        else:
            fl = base.floor[rows, cols].astype(float)
            if (inside & ~np.isfinite(fl)).any():
                flags.append("floor_gap")
            if not np.isfinite(fl[inside]).any():
                model = BaseModel(kind="floor", grid=sub, ok=False, flags=["no_floor"],
                                  note="floor raster does not cover the footprint")
            else:
                model = BaseModel(kind="floor", grid=sub, floor=fill_nearest(fl),
                                  floor_sigma_m=base.floor_sigma_m,
                                  residual_m=base.floor_sigma_m)
    else:
        model = toe_base(
            grid, poly, others, surface.z, surface.count, surface.sd, surface.filled,
            base.toe_ring_m, noise_sd,
        )
        model.grid = grid
    flags.extend(model.flags)
    if not model.ok:
        return _PileWork(rows, cols, sub, w, z, np.full(w.shape, np.nan), scanned, model, flags)
    bz = model.floor if model.kind == "floor" else _plane_on(model, sub)
    ground = np.zeros(w.shape, bool)
    # An object standing at the footprint's edge (a wall the pile is pushed against): the
    # pile's gaps that reach it are filled from the pile's side only (_behind_objects).
    behind, redo, _ = _behind_objects(surface, rows, cols, w, scanned, grid.cell)
    if missing.any():
        flags.append("unfilled_gap")
    if missing.any() or redo.any():
        z_seen = z
        z = np.where(behind | redo, np.nan, z)
        # Footprints enclose their piles, so unscanned ground outside every footprint is
        # floor: it takes the base elevation, which closes a shadow that runs off the
        # pile instead of letting the interpolation run free beyond the toe.
        # Cells right at the footprint edge stay free: a pile pushed against a wall has no
        # floor there; nor has the ground behind an object standing at the edge.
        clear = ndimage.distance_transform_edt(~inside) * grid.cell >= _GROUND_CLEARANCE_M
        ground = ~np.isfinite(z) & clear & ~behind
        for _, g in others:
            if ground.any() and g.intersects(shapely.box(*sub.bounds)):
                ground &= _window_weights(g, grid, rows, cols) <= 0
        z = np.where(ground, bz, z)
        if redo.any():
            z = _fill_against_objects(z, redo & ~ground, behind, lone_patches(scanned))
        z = _fill_gaps(z, inside, lone_patches(scanned))
        z = np.where(behind & scanned, z_seen, z)
    targets = inside & ~scanned
    chord = upper = None
    if slope_fill and targets.any():
        # Every unscanned footprint cell, filled by the survey or above: where its gap hides
        # a crest or a toe, the flanks' planes replace the linear chord (gapfill module).
        known = (scanned & ~lone_patches(scanned) & ~behind) | ground
        chord, upper = z, z.copy()
        z = fill_slope_breaks(z, z, known, targets, grid.cell, upper=upper)
        upper = np.maximum(upper, z)
        # A gap that reaches an object at the edge keeps the fill made against it (level
        # across the wall): its rim is open on the wall's side, and a wall-top return kept
        # as surface would close it. The flanks' envelope there only bounds the hidden top.
        z = np.where(redo, chord, z)
    return _PileWork(rows, cols, sub, w, z, bz, scanned, model, flags, chord, upper)


def _behind_objects(surface: Surface, rows: slice, cols: slice, w: np.ndarray, scanned: np.ndarray,
                    cell: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Cells of a pile's window cut off from the footprint by an object at its edge, and the
    unscanned cells to fill again because their gap reaches that object.

    The survey marks the cells that hold object returns (``surface.meta["object_seen"]``,
    :func:`inventory.survey.tiles.grid_tiles`). Such cells without a surface point, not
    wholly inside the footprint and within :data:`_GROUND_CLEARANCE_M` of it, in groups
    (8-connected) of at least :data:`OBJECT_EDGE_MIN_M` / cell cells (a wall, a vehicle at
    the toe; not a lone dust return or bird), stand at the footprint's edge. A cell outside
    the footprint (within twice :data:`_PAD_M` of it) whose straight line to the nearest
    footprint cell crosses one lies behind the object: it is neither floor nor a corner of
    the interpolation, scanned or not, so a gap over the pile's top is not interpolated
    across the wall down to the floor behind it. The survey's own fill of a gap that
    reaches the object ran across it too (it knows no footprints): those cells are filled
    again.

    Returns
    -------
    behind, redo, wall : ndarray of bool
        The barrier (the object cells and the cells behind them), the unscanned cells to
        fill again, and the object cells alone. All empty when the survey gave no object
        cells (other gridding paths, or a surface read back from rasters).
    """
    empty = np.zeros(w.shape, bool)
    seen = (surface.meta or {}).get("object_seen")
    if not isinstance(seen, np.ndarray) or seen.shape != surface.grid.shape:
        return empty, empty, empty
    inside = w > 0
    if inside.all() or not inside.any():
        return empty, empty, empty
    dist, (ir, ic) = ndimage.distance_transform_edt(~inside, return_indices=True)
    obj = seen[rows, cols] & ~scanned & (w < 1.0) & (dist * cell < _GROUND_CLEARANCE_M)
    if not obj.any():
        return empty, empty, empty
    lab, n = ndimage.label(obj, structure=np.ones((3, 3), bool))
    sizes = np.bincount(lab.ravel(), minlength=n + 1)
    sizes[0] = 0
    obj = (sizes >= max(2, math.ceil(OBJECT_EDGE_MIN_M / cell)))[lab]
    if not obj.any():
        return empty, empty, empty
    # the band the window's pad spans, corners included (beyond it, in the far parts of the
    # window of a footprint of irregular plan, no cell is taken to lie behind an object)
    rr, cc = np.nonzero(~inside & ~obj & (dist * cell <= 2.0 * _PAD_M))
    behind = empty.copy()
    d = dist[rr, cc]
    order = np.argsort(d, kind="stable")
    rr, cc, d = rr[order], cc[order], d[order]
    s0 = 0
    while s0 < rr.size:
        # sample each cell's line to its nearest footprint cell at a third of a cell, cells
        # of like distance together, about a million samples at a time
        k = int(np.ceil(d[min(s0 + 4096, rr.size) - 1] * 3)) + 1
        s1 = min(rr.size, s0 + max(1, 1_000_000 // k), s0 + 4096)
        k = int(np.ceil(d[s1 - 1] * 3)) + 1
        r, c = rr[s0:s1], cc[s0:s1]
        t = np.linspace(0.0, 1.0, k)[None, :]
        sr = np.rint(r[:, None] + (ir[r, c] - r)[:, None] * t).astype(int)
        sc = np.rint(c[:, None] + (ic[r, c] - c)[:, None] * t).astype(int)
        behind[r, c] = obj[sr, sc].any(axis=1)
        s0 = s1
    gaps, _ = ndimage.label(~scanned)
    touched = np.unique(gaps[obj])
    redo = np.isin(gaps, touched[touched > 0]) & ~scanned & ~behind
    return behind | obj, redo, obj


def _fill_against_objects(z: np.ndarray, cells: np.ndarray, barrier: np.ndarray,
                          lone: np.ndarray) -> np.ndarray:
    r"""Fill ``cells`` by the discrete Laplace equation, with no flow across ``barrier``.

    Each cell to fill takes the mean of its four neighbours that are not barrier (nor
    outside the window): known cells (finite ``z``, not ``lone`` patches) hold their value,
    the other cells to fill are solved for together (a sparse linear system). Along a wall
    the surface so meets the wall level (zero slope across it, the mirror image of the pile
    beyond the wall), instead of running on across it as a linear fill does: a hidden top
    between a scanned crest and the wall keeps the crest's height, a flank the flank's
    trend. Cells of a group with no known neighbour stay NaN (for :func:`_fill_gaps`).
    """
    from scipy.sparse import coo_matrix
    from scipy.sparse.linalg import spsolve

    known = np.isfinite(z) & ~cells & ~barrier & ~lone
    todo = cells & ~barrier
    n = int(todo.sum())
    if n == 0:
        return z
    idx = np.full(z.shape, -1)
    idx[todo] = np.arange(n)
    rr, cc = np.nonzero(todo)
    rows, cols = [], []
    rhs = np.zeros(n)
    deg = np.zeros(n)
    nk = np.zeros(n)
    for dr, dc in ((1, 0), (-1, 0), (0, 1), (0, -1)):
        r2, c2 = rr + dr, cc + dc
        ok = (r2 >= 0) & (r2 < z.shape[0]) & (c2 >= 0) & (c2 < z.shape[1])
        i = np.nonzero(ok)[0]
        r2, c2 = r2[ok], c2[ok]
        kn = known[r2, c2]
        np.add.at(rhs, i[kn], z[r2[kn], c2[kn]])
        np.add.at(nk, i[kn], 1.0)
        un = todo[r2, c2]
        rows.append(i[un])
        cols.append(idx[r2[un], c2[un]])
        np.add.at(deg, i[un], 1.0)
    deg += nk
    # a group of cells to fill that touches no known cell has no solution: left NaN
    lab, _ = ndimage.label(todo)
    anchored = np.zeros(int(lab.max()) + 1, bool)
    anchored[np.unique(lab[rr[nk > 0], cc[nk > 0]])] = True
    keep = anchored[lab[rr, cc]]
    ri, ci = np.concatenate(rows), np.concatenate(cols)
    link = keep[ri]
    a = coo_matrix((np.concatenate([np.full(int(link.sum()), -1.0), np.where(keep, deg, 1.0)]),
                    (np.concatenate([ri[link], np.arange(n)]), np.concatenate([ci[link], np.arange(n)]))),
                   shape=(n, n)).tocsr()
    sol = spsolve(a, np.where(keep, rhs, 0.0))
    out = z.copy()
    out[rr, cc] = np.where(keep, sol, np.nan)
    return out


def _fill_gaps(z: np.ndarray, inside: np.ndarray, lone: np.ndarray | None = None) -> np.ndarray:
    """Fill NaN cells of a window by linear interpolation (nearest beyond the hull).

    ``lone`` cells (lone scanned patches, :func:`inventory.model.grid.lone_patches`) keep
    their value but are not corners of the interpolation, as in the survey's hole filling.
    """
    known = np.isfinite(z)
    ok = known & ~lone if lone is not None else known
    out = z.copy()
    # Only known cells next to a gap can be corners of the triangles that cover it (a
    # Delaunay triangle stays Delaunay when far points are dropped); fewer points keep
    # Qhull fast.
    near = ok & ndimage.binary_dilation(~ok, structure=np.ones((3, 3)), iterations=2)
    rr, cc = np.nonzero(near)
    mr, mc = np.nonzero(~known)
    if len(rr) >= 3:
        try:
            # A regular lattice is Qhull's degenerate case (every square is cocircular):
            # joggled input ("QJ") keeps the triangles valid.
            tri = Delaunay(np.column_stack([rr, cc]).astype(float), qhull_options="QJ Qbb Qc")
            out[mr, mc] = LinearNDInterpolator(tri, z[near])(np.column_stack([mr, mc]).astype(float))
        except QhullError:
            pass  # collinear known cells: nearest below
    return np.where(inside | known, fill_nearest(out), out)


def _plane_on(model: BaseModel, sub: Grid) -> np.ndarray:
    x, y = sub.centers()
    return model.at(x, y)


def _gap_sigma(work: _PileWork, a: float, cell: float, noise_sd: float, errors: ErrorModel) -> float:
    r"""Interpolated-cell volume sigma (module docstring, term 3).

    :math:`\sigma_{gap}^2 = \sum_i\sum_j (w_i a \sigma_i)(w_j a \sigma_j)\rho_{ij}` over the
    unscanned cells of the footprint, with :math:`\sigma_i` from the slope mismatch
    (:func:`_slope_mismatch`) and the gap distance, and :math:`\rho_{ij}` the
    non-stationary Gaussian correlation of :func:`_gap_correlation_sum` with each cell's
    length the width of its gap (:func:`_local_gap_width`).
    """
    unscanned = ~work.scanned
    gaps = unscanned & (work.w > 0)
    if not gaps.any():
        return 0.0
    th = (work.z - work.base)[work.scanned & (work.w > 0)]
    cap = _GAP_CAP_FRACTION * float(np.max(th)) if th.size else np.inf
    if not work.scanned.any():
        # Nothing scanned in the window: every cell may be off by the cap, all together.
        s = (work.w * a)[gaps] * (cap if np.isfinite(cap) else 0.0)
        return float(np.sum(s))
    dist = ndimage.distance_transform_edt(unscanned) * cell
    mismatch = _slope_mismatch(work.z, work.scanned, dist, cell, gaps)
    err = np.minimum(errors.interp_slope_factor * mismatch * dist, max(cap, 0.0))
    sig = np.sqrt(err**2 + noise_sd**2)
    width = _local_gap_width(unscanned, dist, cell)
    rr, cc = np.nonzero(gaps)
    xy = np.column_stack([cc, rr]).astype(float) * cell
    s = (work.w * a * sig)[gaps]
    length = errors.gap_correlation_factor * width[gaps]
    return float(np.sqrt(_gap_correlation_sum(xy, s, length)))


def _slope_mismatch(
    z: np.ndarray, scanned: np.ndarray, dist: np.ndarray, cell: float, where: np.ndarray
) -> np.ndarray:
    r"""Mean :math:`|\nabla z_j - \nabla z_i|` over the scanned cells *j* within
    :math:`d_i` + ``_RIM_CELLS`` cells of each cell *i* in ``where`` (0 elsewhere).

    Gradients are central differences of the interpolated surface: inside a gap that is
    the slope of the interpolating plane, on its rim the slope the scan measured. Where
    the two agree (a gap on an even flank) linear interpolation is nearly exact; where they
    differ (an apex or crest flattened, a toe or a step bridged) the interpolated surface
    bends away from the true one at that rate.
    """
    out = np.zeros(z.shape)
    zf = fill_nearest(z)
    if not np.isfinite(zf).any():
        return out
    gr, gc = np.gradient(np.where(np.isfinite(zf), zf, np.nanmean(zf)), cell)
    ok = scanned & np.isfinite(z)
    reach = np.ceil(dist / cell - 1e-9).astype(np.int64) + _RIM_CELLS
    reach = np.where(where, reach, 0)
    rmax = int(reach.max())
    if rmax <= 0:
        return out
    pad = lambda arr, v: np.pad(arr, rmax, constant_values=v)  # noqa: E731
    gr_p, gc_p, ok_p = pad(gr, 0.0), pad(gc, 0.0), pad(ok, False)
    for r in np.unique(reach[where]):
        rows, cols = np.nonzero(where & (reach == r))
        # Windows of (2r+1)^2 around each selected cell, for a few hundred cells at a time.
        off = np.arange(-r, r + 1)
        for s0 in range(0, rows.size, 512):
            rw = rows[s0:s0 + 512, None, None] + rmax + off[None, :, None]
            cw = cols[s0:s0 + 512, None, None] + rmax + off[None, None, :]
            m = ok_p[rw, cw]
            diff = np.hypot(gr_p[rw, cw] - gr[rows[s0:s0 + 512], cols[s0:s0 + 512]][:, None, None],
                            gc_p[rw, cw] - gc[rows[s0:s0 + 512], cols[s0:s0 + 512]][:, None, None])
            n = m.sum(axis=(1, 2))
            val = np.divide((diff * m).sum(axis=(1, 2)), n, out=np.zeros(n.shape), where=n > 0)
            out[rows[s0:s0 + 512], cols[s0:s0 + 512]] = val
    return out


def _local_gap_width(unscanned: np.ndarray, dist: np.ndarray, cell: float) -> np.ndarray:
    """Diameter of the largest disc of unscanned cells that covers each cell.

    The "local thickness" of the gap (Hildebrand and Rueegsegger 1997, J. Microsc. 185:67):
    a cell on the edge of a wide shadow gets the shadow's width, a lone missing cell two
    cells (its distance to the scanned cells around it is one cell). Discs are centred on
    unscanned cells, radius their distance to the nearest scanned cell, in whole cells.

    A cell lies in a disc of radius k cells about some centre when its exact Euclidean
    distance to the nearest centre is at most k (``scipy.ndimage.distance_transform_edt``):
    the same cells a binary dilation by the disc ``x^2 + y^2 <= k^2`` marks, in time
    proportional to the cells for every k instead of to the cells times k^2 (a window
    beside a wide unscanned area, a river on airborne data, took minutes).
    """
    radius = np.where(unscanned, dist, 0.0)
    steps = np.unique(np.round(dist[unscanned] / cell)).astype(np.int64)
    for k in steps[steps >= 2]:
        centres = unscanned & (dist >= k * cell - 1e-9)
        if not centres.any():  # k rounded up from a distance below it; no background for the EDT
            continue
        # distances between cell centres are square roots of integers: sqrt(k^2) = k exactly
        covered = (ndimage.distance_transform_edt(~centres) <= k) & unscanned
        radius = np.where(covered, np.maximum(radius, k * cell), radius)
    return 2.0 * np.maximum(radius, 0.5 * cell)


def _gap_correlation_sum(xy: np.ndarray, s: np.ndarray, length: np.ndarray) -> float:
    r""":math:`\sum_i\sum_j s_i s_j \rho_{ij}` with the non-stationary Gaussian correlation of
    Paciorek and Schervish (2006, Environmetrics 17:483) in two dimensions,

    :math:`\rho_{ij} = \frac{2 l_i l_j}{l_i^2 + l_j^2}
    \exp\left(-\frac{2 h_{ij}^2}{l_i^2 + l_j^2}\right)`,

    a valid (positive semi-definite) correlation for any field of lengths :math:`l_i`; with
    one length everywhere it is the stationary Gaussian model. Pairs further apart in x than
    4 times the longer length of their two classes are skipped (:math:`\rho < e^{-8}` at
    twice the class bound, far less beyond); classes are lengths within a factor of two, so
    that the short gaps of a pile's flank are not paired across the whole footprint because
    one gap elsewhere is wide (an unscanned river beside a region took a minute).
    """
    n = s.size
    if n == 0:
        return 0.0
    order = np.argsort(xy[:, 0], kind="stable")
    xy, s, length = xy[order], s[order], length[order]
    lmin = float(length.min())
    cls = np.floor(np.log2(length / lmin)).astype(np.int64) if lmin > 0 else np.zeros(n, np.int64)
    members = [np.flatnonzero(cls == c) for c in np.unique(cls)]
    total = 0.0
    for a, ia in enumerate(members):
        for ib in members[a:]:
            part = _pair_sum(xy, s, length, ia, ib, 4.0 * max(float(length[ia].max()), float(length[ib].max())))
            total += part if ib is ia else 2.0 * part  # rho is symmetric
    return max(total, 0.0)


def _pair_sum(xy: np.ndarray, s: np.ndarray, length: np.ndarray, ia: np.ndarray, ib: np.ndarray,
              reach: float) -> float:
    r""":math:`\sum_{i \in ia} \sum_{j \in ib} s_i s_j \rho_{ij}` over the pairs within
    ``reach`` in x (both index sets in increasing x)."""
    xa, xb = xy[ia], xy[ib]
    sa, sb, la, lb = s[ia], s[ib], length[ia], length[ib]
    n = ia.size
    total = 0.0
    step = max(1, min(n, 4_000_000 // max(ib.size, 1)))
    for i0 in range(0, n, step):
        i1 = min(i0 + step, n)
        # Cells sorted by x: only those within reach in x can correlate.
        j0 = int(np.searchsorted(xb[:, 0], xa[i0, 0] - reach, "left"))
        j1 = int(np.searchsorted(xb[:, 0], xa[i1 - 1, 0] + reach, "right"))
        if j1 <= j0:
            continue
        h2 = ((xa[i0:i1, None, :] - xb[None, j0:j1, :]) ** 2).sum(axis=-1)
        li, lj = la[i0:i1, None], lb[None, j0:j1]
        l2 = li**2 + lj**2
        rho = (2.0 * li * lj / l2) * np.exp(-2.0 * h2 / l2)
        total += float(sa[i0:i1] @ rho @ sb[j0:j1])
    return total


def _tin(work: _PileWork, poly: shapely.Geometry, points: np.ndarray | None) -> tuple[float, float]:
    """TIN fill and cut volume of one pile (scanned cells or raw points + outline)."""
    sub = work.sub
    if points is not None:
        xmin, ymin, xmax, ymax = poly.bounds
        sel = (points[:, 0] >= xmin) & (points[:, 0] <= xmax) & (points[:, 1] >= ymin) & (points[:, 1] <= ymax)
        p = points[sel]
        p = p[shapely.contains_xy(poly, p[:, 0], p[:, 1])]
        px, py, pz = p[:, 0], p[:, 1], p[:, 2]
    else:
        # Only scanned cells: the TIN bridges gaps by its own (linear) interpolation, so it
        # is independent of the survey's hole filling.
        x, y = sub.centers()
        use = work.scanned & shapely.contains_xy(poly, x, y)
        px, py, pz = x[use], y[use], work.z[use]
    outline = shapely.segmentize(shapely.boundary(poly), sub.cell)
    ox, oy = shapely.get_coordinates(outline).T
    # not where the footprint runs off the survey's grid: the surface there would be the
    # grid edge's, carried on (the grid volume has nothing there, flag off_grid_part)
    west, south, east, north = sub.bounds
    on = (ox >= west) & (ox <= east) & (oy >= south) & (oy <= north)
    ox, oy = ox[on], oy[on]
    oz = bilinear(sub, work.z, ox, oy)
    xy = np.concatenate([np.column_stack([px, py]), np.column_stack([ox, oy])])
    zz = np.concatenate([pz, oz])
    if work.model.kind == "floor":
        bb = bilinear(sub, work.base, xy[:, 0], xy[:, 1])
    else:
        bb = work.model.at(xy[:, 0], xy[:, 1])
    fill, cut, _ = tin_volume(xy, zz - bb, poly)
    return fill, cut


def _measure_one(
    surface: Surface, work: _PileWork, poly: shapely.Geometry, errors: ErrorModel,
    noise_sd: float, points: np.ndarray | None,
) -> dict[str, Any]:
    grid = surface.grid
    a = grid.cell_area
    w = work.w
    inside = w > 0
    t = work.z - work.base
    fill = float(np.sum(w * a * np.clip(t, 0, None), where=inside))
    cut = float(np.sum(w * a * np.clip(-t, 0, None), where=inside))
    # of the whole footprint: a part off the survey's grid (beyond the cloud) was not
    # scanned either, and it holds no volume here (flag off_grid_part)
    covered = poly.area if "off_grid_part" in work.flags else float(np.sum(w)) * a
    scanned_fraction = float(np.sum(w * work.scanned) * a / covered)

    cnt = surface.count[work.rows, work.cols].astype(float)
    sd = surface.sd[work.rows, work.cols]
    se = np.sqrt(_local_point_variance(cnt, sd, noise_sd) / np.maximum(cnt, 1.0))
    sel = inside & work.scanned
    sig_rand = float(np.sqrt(np.sum((w[sel] * a * se[sel]) ** 2)))
    pos = inside & (t > 0)
    x, y = work.sub.centers()
    hat = work.model.ring_weights((w * a)[pos], x[pos], y[pos])
    if hat is None:
        sig_corr = errors.correlated_sigma_m * a * math.sqrt(
            spherical_correlation_sum(w, grid.cell, errors.correlation_length_m)
        )
    else:
        # A toe plane is fitted to the same scan: a registration error that lifts the pile
        # lifts its ring too, and the plane takes most of it away. The volume changes by
        # sum w a f - sum h_k f_k (h: the ring cells' weights in the plane's volume).
        assert work.model.ring_xy is not None
        vals = np.concatenate([(w * a)[inside], -hat])
        px = np.concatenate([x[inside], work.model.ring_xy[:, 0]])
        py = np.concatenate([y[inside], work.model.ring_xy[:, 1]])
        sig_corr = errors.correlated_sigma_m * math.sqrt(
            spherical_correlation_sum(_rasterise(vals, px, py, grid.cell), grid.cell, errors.correlation_length_m)
        )
    sig_gap = _gap_sigma(work, a, grid.cell, noise_sd, errors)
    # scanned cells cut by a gap's edge: part of the interpolation's error (the gap's), each
    # cell on its own
    edge = _edge_variance(work.z, work.scanned, grid.cell)
    sig_gap = math.sqrt(sig_gap**2 + float(np.sum(((w * a) ** 2 * edge)[sel])))
    sig_hidden, hidden_m3 = _hidden_top(work, a)
    sig_gap = math.sqrt(sig_gap**2 + sig_hidden**2)
    sig_base = work.model.volume_sigma((w * a)[pos], x[pos], y[pos])
    sigma = math.sqrt(sig_rand**2 + sig_corr**2 + sig_gap**2 + sig_base**2)
    tin_fill, tin_cut = _tin(work, poly, points)
    return {
        "scanned_fraction": scanned_fraction,
        "volume_m3": fill, "below_base_m3": cut,
        "volume_sigma_m3": sigma, "volume_ci95_m3": Z95 * sigma,
        "volume_tin_m3": tin_fill, "tin_below_base_m3": tin_cut,
        "sigma_random_m3": sig_rand, "sigma_correlated_m3": sig_corr,
        "sigma_interpolated_m3": sig_gap, "sigma_base_m3": sig_base,
        "_hidden_top_m3": hidden_m3,
    }


def _hidden_top(work: _PileWork, a: float) -> tuple[float, float]:
    r"""Sigma of what the flanks cannot tell over hidden crests, and the volume at stake (m3).

    Over a gap that may hide a crest the surface, if it is concave there (a pile's top:
    an apex, a ridge, a flat top and its edges), lies above the chord (the fill before the
    slope-break fill, :attr:`_PileWork.chord`: linear, or level against a wall, see
    :func:`_fill_against_objects`) and below every tangent plane of its flanks
    (:attr:`_PileWork.upper`, from :func:`inventory.volume.gapfill.fill_slope_breaks`). A
    hidden apex fills the bound, a hidden flat top at the rim's height the chord; the
    flanks alone cannot tell them apart. For each gap (4-connected unscanned cells) the
    volumes :math:`V_L` (chord), :math:`V` (the fill) and :math:`V_U` (bound) are summed
    over its footprint cells; with the truth equally likely anywhere in
    :math:`[V_L, V_U]` the root mean square error of :math:`V` is

    :math:`\sigma_g^2 = \frac{(V_U - V)^3 + (V - V_L)^3}{3 (V_U - V_L)}`

    (:math:`W/\sqrt{3}` at either end of a range :math:`W`, :math:`W/\sqrt{12}` at its
    middle), so the 95 % interval (1.96 sigma) holds the whole range. One gap's cells share
    one shape and add linearly; different gaps are independent and add in quadrature.
    Returns the sigma and :math:`\sum_g W_g`.
    """
    if work.chord is None or work.upper is None:
        return 0.0, 0.0
    inside = work.w > 0
    gaps = ~work.scanned
    labels, n = ndimage.label(gaps)
    sel = inside & gaps & (work.upper > work.chord + 1e-9)
    if n == 0 or not sel.any():
        return 0.0, 0.0
    wa = work.w * a
    lab = labels[sel]

    def vol(surf: np.ndarray) -> np.ndarray:
        t = np.clip(np.nan_to_num(surf[sel] - work.base[sel], nan=0.0), 0.0, None)
        return np.bincount(lab, weights=wa[sel] * t, minlength=n + 1)

    v_lo, v, v_hi = vol(work.chord), vol(work.z), vol(work.upper)
    width = np.maximum(v_hi - v_lo, 0.0)
    v = np.clip(v, v_lo, v_hi)
    ok = width > 0
    var = np.zeros(width.shape)
    var[ok] = ((v_hi - v)[ok] ** 3 + (v - v_lo)[ok] ** 3) / (3.0 * width[ok])
    return float(np.sqrt(var.sum())), float(width.sum())


# ----------------------------------------------------------------------------- public
def _check_crs(surface: Surface, piles: "gpd.GeoDataFrame") -> None:
    gcrs, pcrs = surface.grid.crs, getattr(piles, "crs", None)
    if not gcrs or pcrs is None:
        return
    from pyproj import CRS

    if not CRS.from_user_input(gcrs).equals(CRS.from_user_input(pcrs)):
        raise CRSError("piles", f"footprints are in {pcrs.to_string()}, the survey grid in {gcrs}", field="crs")


def _footprints(piles: "gpd.GeoDataFrame") -> list[tuple[str, shapely.Geometry | None, list[str]]]:
    out = []
    for pid, geom in zip(piles["pile_id"], piles.geometry):
        flags: list[str] = []
        if geom is None or geom.is_empty:
            out.append((str(pid), None, ["bad_geometry"]))
            continue
        if not geom.is_valid:
            geom = shapely.make_valid(geom)
            geom = shapely.union_all(
                [g for g in shapely.get_parts(geom) if g.geom_type in ("Polygon", "MultiPolygon")]
            )
            flags.append("geometry_repaired")
        out.append((str(pid), geom, flags))
    return out


def measure_piles(
    surface: Surface,
    piles: "gpd.GeoDataFrame",
    materials: Mapping[str, Material],
    base: BaseSurfaces | None = None,
    *,
    errors: ErrorModel | None = None,
    points: np.ndarray | None = None,
) -> pd.DataFrame:
    """Volume, its uncertainty, and tonnes of every pile footprint.

    Parameters
    ----------
    surface : Surface
        The survey's surface grid (see :class:`inventory.model.grid.Surface`).
    piles : GeoDataFrame
        Columns ``pile_id``, ``material``, ``base`` (``floor`` | ``level:<z>`` | ``toe``),
        ``density_t_m3`` (nullable override) and polygon geometry in the grid's CRS.
    materials : mapping
        Material name to an object (or dict) with ``bulk_density_t_m3``,
        ``density_sd_t_m3`` and ``moisture_pct``.
    base : BaseSurfaces, optional
        Floor raster, its sigma, and the toe-ring width. Defaults: no floor, 0.03 m, 3 m.
    errors : ErrorModel, optional
        Parameters of the uncertainty model.
    points : ndarray (n, 3), optional
        Surface (ground) points in the site CRS. When given, the TIN cross-check is built
        from them; otherwise from the centres of scanned cells.

    Returns
    -------
    DataFrame
        One row per pile, columns :data:`VOLUME_COLUMNS`. A pile that cannot be measured
        (no footprint, off the grid, no base) has NaN numbers and says why in ``flags``
        and ``base_note``; the other piles are still measured. ``flags`` is a
        semicolon-separated list of: ``below_base``, ``low_scan``, ``tin_mismatch``,
        ``unfilled_gap``, ``hidden_top``, ``no_data``, ``floor_gap``, ``no_floor``,
        ``toe_shared``, ``toe_no_ring``, ``toe_fit``, ``off_grid``, ``off_grid_part``,
        ``bad_geometry``, ``geometry_repaired``, ``bad_base``, ``no_density``,
        ``density_sd_unknown``. ``hidden_top``: the shape of a top no station saw (a crest
        or a flat top, which the flanks cannot tell apart) leaves more than
        :data:`HIDDEN_TOP_FLAG_FRACTION` of the volume open (:func:`_hidden_top`; the
        interval counts it).
    """
    base = base or BaseSurfaces()
    errors = errors or ErrorModel()
    _check_crs(surface, piles)
    noise_sd = _typical_sd(surface, errors)
    foots = _footprints(piles)
    pts = None if points is None else np.asarray(points, dtype=float).reshape(-1, 3)
    rows: list[dict[str, Any]] = []
    ground: np.ndarray | None = None   # open ground for the toe planes' probes, made once
    for i, (pid, poly, gflags) in enumerate(foots):
        rec = piles.iloc[i]
        spec = str(rec["base"])
        row: dict[str, Any] = {c: np.nan for c in VOLUME_COLUMNS}
        row.update(pile_id=pid, material=rec["material"], base_method=spec, base_note="",
                   tin_disagrees=False)
        flags = list(gflags)
        others = [(p, g) for j, (p, g, _) in enumerate(foots) if j != i and g is not None]
        work = None
        hidden = 0.0
        if poly is not None:
            row["area_m2"] = float(poly.area)
            try:
                work = _prepare(surface, pid, poly, spec, base, others, noise_sd)
            except ValueError as err:
                flags.append("bad_base")
                row["base_note"] = str(err)
                warnings.warn(InputWarning(f"piles: {pid}: base: {err}"))
            else:
                if work is None:
                    flags.append("off_grid")
        if work is not None:
            flags.extend(work.flags)
            if work.model.kind == "toe" and work.model.ok:
                if ground is None:
                    ground = open_ground(surface.z, surface.count, surface.filled, surface.grid,
                                         [g for _, g, _ in foots if g is not None], base.toe_ring_m)
                sig, n = toe_probe_sigma(surface.grid, surface.z, ground, poly, base.toe_ring_m)
                work.model.probe_sigma_m, work.model.probe_count = sig, n
                if n >= PROBE_LEAST:
                    work.model.note += (f"; on {n} copies of the footprint on open ground nearby the "
                                        f"toe plane was off by {100 * sig:.1f} cm rms")
            row["base_note"] = work.model.note
            row["base_residual_m"] = work.model.residual_m if work.model.ok else np.nan
            if work.model.ok:
                row.update(_measure_one(surface, work, poly, errors, noise_sd, pts))
                hidden = row.pop("_hidden_top_m3")
                v, s = row["volume_m3"], row["volume_sigma_m3"]
                if hidden > HIDDEN_TOP_FLAG_FRACTION * max(v, 0.0):
                    flags.append("hidden_top")
                if row["below_base_m3"] > BELOW_BASE_FLAG_FRACTION * max(v, 0.0) and row["below_base_m3"] > s:
                    flags.append("below_base")
                if row["scanned_fraction"] < LOW_SCAN_FRACTION:
                    flags.append("low_scan")
                if np.isfinite(row["volume_tin_m3"]) and abs(row["volume_tin_m3"] - v) > row["volume_ci95_m3"]:
                    row["tin_disagrees"] = True
                    flags.append("tin_mismatch")
                if work.model.kind == "toe" and work.model.residual_m > TOE_RESIDUAL_FLAG_M:
                    flags.append("toe_fit")
        _tonnes(row, rec, materials, flags)
        row["flags"] = ";".join(dict.fromkeys(flags))
        if {"low_scan", "unfilled_gap"} & set(flags):
            warnings.warn(CoverageWarning(
                f"pile {pid}: {row['scanned_fraction'] * 100:.0f} % of the footprint scanned"
            ))
        if "hidden_top" in flags:
            warnings.warn(CoverageWarning(
                f"pile {pid}: its top was not seen; its shape there (a crest or a flat top) leaves "
                f"{hidden:.0f} m3 open, counted in the interval (+/- {row['volume_ci95_m3']:.0f} m3); "
                "a scan from a raised station settles it (never from the pile)"
            ))
        rows.append(row)
    return pd.DataFrame(rows, columns=VOLUME_COLUMNS)


def _tonnes(row: dict[str, Any], rec: pd.Series, materials: Mapping[str, Material], flags: list[str]) -> None:
    mat = _material(materials, rec["material"])
    override = rec.get("density_t_m3") if hasattr(rec, "get") else None
    try:
        override = float(override) if override is not None else float("nan")
    except (TypeError, ValueError):
        override = float("nan")
    rho = override if np.isfinite(override) and override > 0 else (
        _number(mat.bulk_density_t_m3) if mat is not None else float("nan")
    )
    rho_sd = _number(mat.density_sd_t_m3) if mat is not None else float("nan")
    moist = _number(mat.moisture_pct) if mat is not None else float("nan")
    if not np.isfinite(rho):
        flags.append("no_density")
    if not np.isfinite(rho_sd):
        if np.isfinite(rho):
            flags.append("density_sd_unknown")
        rho_sd = 0.0
    v, sv = row["volume_m3"], row["volume_sigma_m3"]
    row["density_t_m3"] = rho
    row["density_sd_t_m3"] = rho_sd
    row["moisture_pct"] = moist
    row["survey_t"] = v * rho
    row["survey_dry_t"] = v * rho * (1.0 - moist / 100.0) if np.isfinite(moist) else np.nan
    row["survey_sigma_t"] = math.sqrt((rho * sv) ** 2 + (v * rho_sd) ** 2)


def thickness_raster(
    surface: Surface, piles: "gpd.GeoDataFrame", base: BaseSurfaces | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Base elevation and thickness (surface - base) on the survey grid.

    Cells touched by a footprint (weight > 0) get values; every other cell is NaN. Where
    footprints overlap, the later pile in the table wins. Piles that cannot be measured are
    left NaN. Gaps the survey left empty inside a footprint are interpolated as in
    :func:`measure_piles`.

    Returns
    -------
    base_z, thickness : ndarray (nrows, ncols) of float64
    """
    base = base or BaseSurfaces()
    noise_sd = _typical_sd(surface, ErrorModel())
    bz = np.full(surface.grid.shape, np.nan)
    th = np.full(surface.grid.shape, np.nan)
    foots = _footprints(piles)
    for i, (pid, poly, _) in enumerate(foots):
        if poly is None:
            continue
        others = [(p, g) for j, (p, g, _) in enumerate(foots) if j != i and g is not None]
        try:
            work = _prepare(surface, pid, poly, str(piles.iloc[i]["base"]), base, others, noise_sd)
        except ValueError:
            continue
        if work is None or not work.model.ok:
            continue
        inside = work.w > 0
        bz[work.rows, work.cols][inside] = work.base[inside]
        th[work.rows, work.cols][inside] = (work.z - work.base)[inside]
    return bz, th


def close_speckle(mask: np.ndarray, radius_m: float, cell: float) -> np.ndarray:
    """``mask`` after a morphological closing with a disc of ``radius_m``.

    Unset runs narrower than about twice the radius, between set cells, become set (scan
    speckle); every set cell stays set. The grid is padded first, so the border does not
    erode what lies along it.

    >>> m = np.ones((5, 9), bool); m[2, 4] = False
    >>> bool(close_speckle(m, 0.5, 0.5).all())
    True
    >>> m[:, 3:6] = False
    >>> int((~close_speckle(m, 0.5, 0.5)).sum())
    15
    """
    r = math.floor(radius_m / cell) if cell > 0 else 0
    if r < 1 or not mask.any():
        return mask.copy()
    yy, xx = np.ogrid[-r:r + 1, -r:r + 1]
    disc = xx * xx + yy * yy <= r * r
    padded = np.pad(mask, r)
    return ndimage.binary_closing(padded, structure=disc)[r:-r, r:-r] | mask


def tidy_outline(geom: shapely.Geometry, min_area_m2: float, cell: float) -> shapely.Geometry:
    """A polygon outline a person can read: holes and parts smaller than ``min_area_m2``
    removed, the boundary simplified to the cell size (topology kept, so no part crosses
    another and no hole leaves its part). An empty geometry when nothing is left."""
    polys = []
    for part in shapely.get_parts(geom):
        if part.geom_type != "Polygon" or part.area < min_area_m2:
            continue
        holes = [ring for ring in part.interiors if shapely.Polygon(ring).area >= min_area_m2]
        polys.append(shapely.Polygon(part.exterior, holes))
    if not polys:
        return shapely.MultiPolygon()
    merged = shapely.union_all(polys)
    out = shapely.simplify(merged, cell, preserve_topology=True) if cell > 0 else merged
    return shapely.make_valid(out) if not out.is_valid else out


def _fill_distance(surface: Surface, fill_distance_m: float | None) -> float:
    if fill_distance_m is not None:
        return float(fill_distance_m)
    value = (surface.meta or {}).get("max_fill_distance_m")
    return float(value) if value is not None else 0.0


def _outline(mask: np.ndarray, transform: Any, fill: float, cell: float) -> shapely.Geometry:
    """The set cells of ``mask`` as polygons, tidied (:func:`tidy_outline`) when ``fill`` > 0."""
    from rasterio.features import shapes

    geoms = [shapely.geometry.shape(g)
             for g, value in shapes(mask.astype(np.uint8), mask=mask, transform=transform) if value == 1]
    merged = shapely.union_all(geoms) if geoms else shapely.Polygon()
    if fill > 0 and not merged.is_empty:
        merged = tidy_outline(merged, fill * fill, cell)
    return merged


def scanned_outline(surface: Surface, fill_distance_m: float | None = None) -> shapely.Geometry:
    """The outline of a survey's scanned cells as a person reads it: speckle closed over half
    the fill distance (:func:`close_speckle`), holes and stray parts smaller than a square of
    the fill distance's side dropped and the boundary simplified to the cell size
    (:func:`tidy_outline`). ``fill_distance_m`` defaults to the surface's own."""
    fill = _fill_distance(surface, fill_distance_m)
    mask = close_speckle(surface.count > 0, fill / 2.0, surface.grid.cell)
    return _outline(mask, surface.grid.transform, fill, surface.grid.cell)


def coverage_gaps(surface: Surface, piles: "gpd.GeoDataFrame",
                  fill_distance_m: float | None = None) -> "gpd.GeoDataFrame":
    """Unscanned parts of each footprint as polygons, scan speckle merged away.

    The scanned cells are first closed over half the fill distance (``close_speckle``), so
    that unscanned runs narrower than the fill distance between scanned cells are not gaps;
    what remains unscanned in a footprint is polygonised, parts and holes smaller than a
    square of the fill distance's side are dropped and the outline simplified to the cell
    size (``tidy_outline``), then clipped to the footprint. A gap wider than the fill
    distance is kept.

    Parameters
    ----------
    surface : Surface
    piles : GeoDataFrame
    fill_distance_m : float, optional
        The grid's ``max_fill_distance_m``; by default the surface's own (``surface.meta``),
        and without one the unscanned cells are returned as they are.

    Returns
    -------
    GeoDataFrame
        Columns ``pile_id``, ``area_m2``, ``geometry`` (Polygon or MultiPolygon), one row
        per pile that has a gap, in the piles' CRS.
    """
    import geopandas as gpd

    grid = surface.grid
    fill = _fill_distance(surface, fill_distance_m)
    scanned = close_speckle(surface.count > 0, fill / 2.0, grid.cell)
    recs = []
    for pid, poly, _ in _footprints(piles):
        if poly is None:
            continue
        (rows, cols), w = footprint_weights(poly, grid)
        if w.size == 0:
            continue
        gap = (w > 0) & ~scanned[rows, cols]
        if not gap.any():
            continue
        merged = _outline(gap, _subgrid(grid, rows, cols).transform, fill, grid.cell)
        clipped = shapely.intersection(merged, poly)
        if clipped.is_empty or clipped.area <= 0:
            continue
        recs.append({"pile_id": pid, "area_m2": float(clipped.area), "geometry": clipped})
    return gpd.GeoDataFrame(
        recs, columns=["pile_id", "area_m2", "geometry"], geometry="geometry",
        crs=getattr(piles, "crs", None) or (grid.crs or None),
    )
