"""Base surfaces under a pile: a surveyed floor, a fixed level, or a toe plane.

Internal to :mod:`inventory.volume.measure`. Each base is a small object that gives the base
elevation on grid cells and at arbitrary points (the TIN cross-check needs both), and the
volume error the base itself brings (see the uncertainty model in :mod:`inventory.volume.measure`).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import shapely
from scipy import ndimage

from inventory.model.grid import Grid

__all__: list[str] = []

#: Share of a pile's toe ring that must be free of other footprints and scanned before a
#: plane is fitted through it. Engineering judgement: a plane (3 parameters) fitted to a
#: small arc extrapolates its tilt across the whole footprint.
MIN_FREE_RING_FRACTION = 0.15

#: Fewest scanned ring cells for a toe fit (3 parameters plus enough to see outliers).
MIN_RING_CELLS = 12

#: Robust rejection threshold in units of the MAD-based sigma. 3 sigma keeps 99.7 % of
#: Gaussian residuals (common practice for outlier rejection).
REJECT_K = 3.0

#: Scale from median absolute deviation to sigma for a normal distribution (1 / Phi^-1(0.75)).
MAD_TO_SIGMA = 1.4826

#: Trial planes for the least-median-of-squares start (Rousseeuw 1984, LMedS). With 40 %
#: of the ring covered by machines or a neighbour's flank, 200 random triplets contain an
#: all-ground triplet with probability 1 - (1 - 0.6^3)^200 ~ 1 - 1e-21.
LMEDS_TRIALS = 200

#: Lower bound on the rejection band (metres), so that a ring scanned with almost no noise
#: does not reject good cells for millimetre residuals. Engineering judgement.
MIN_REJECT_BAND_M = 0.02


def fill_nearest(a: np.ndarray) -> np.ndarray:
    """Copy of ``a`` with each NaN replaced by the nearest finite value (all-NaN stays NaN)."""
    bad = ~np.isfinite(a)
    if not bad.any() or bad.all():
        return a.copy()
    idx = ndimage.distance_transform_edt(bad, return_distances=False, return_indices=True)
    return a[tuple(idx)]


def bilinear(grid: Grid, values: np.ndarray, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Bilinear interpolation of a cell-centred raster at points (NaNs pre-filled by nearest)."""
    filled = fill_nearest(values)
    col = (np.asarray(x) - grid.west) / grid.cell - 0.5
    row = (grid.north - np.asarray(y)) / grid.cell - 0.5
    return ndimage.map_coordinates(filled, [row, col], order=1, mode="nearest")


@dataclass
class BaseModel:
    """The base of one pile, resolved.

    ``kind`` is ``floor``, ``level`` or ``toe``. ``plane`` is (z0, dz/dx, dz/dy) about
    ``origin`` for level and toe. ``cov`` is the plane's parameter covariance (toe only).
    ``residual_m`` is the fit residual (toe), the floor sigma (floor) or 0 (level).
    """

    kind: str
    grid: Grid
    floor: np.ndarray | None = None
    floor_sigma_m: float = 0.0
    plane: tuple[float, float, float] = (np.nan, 0.0, 0.0)
    origin: tuple[float, float] = (0.0, 0.0)
    cov: np.ndarray | None = None
    rough_sigma_m: float = 0.0
    residual_m: float = 0.0
    note: str = ""
    flags: list[str] = field(default_factory=list)
    ok: bool = True

    def at(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """Base elevation at points."""
        x = np.asarray(x, dtype=float)
        y = np.asarray(y, dtype=float)
        if self.kind == "floor":
            assert self.floor is not None  # internal invariant: floor bases carry a raster
            return bilinear(self.grid, self.floor, x, y)
        z0, gx, gy = self.plane
        return z0 + gx * (x - self.origin[0]) + gy * (y - self.origin[1])

    def on_window(self, rows: slice, cols: slice) -> np.ndarray:
        """Base elevation at the cell centres of a window."""
        if self.kind == "floor":
            assert self.floor is not None
            return self.floor[rows, cols].astype(float)
        g = self.grid
        xs = g.west + (np.arange(cols.start, cols.stop) + 0.5) * g.cell
        ys = g.north - (np.arange(rows.start, rows.stop) + 0.5) * g.cell
        xx, yy = np.meshgrid(xs, ys)
        return self.at(xx, yy)

    def volume_sigma(self, w_area: np.ndarray, x: np.ndarray, y: np.ndarray) -> float:
        """One-sigma volume error from the base (m3).

        ``w_area`` is weight x cell area of each footprint cell whose thickness is
        positive (the cells whose volume moves when the base moves), at centres ``x, y``.
        """
        a_pos = float(np.sum(w_area))
        if self.kind == "level":
            return 0.0
        if self.kind == "floor":
            # Floor survey error taken as fully correlated over the pile (a datum or
            # registration offset of the floor survey): sigma_V = A * sigma_floor
            # (Anderson 2019, systematic term n L^2 sigma_sys).
            return a_pos * self.floor_sigma_m
        # Toe plane: parameter error propagated to the volume, g^T C g, plus the ground's
        # departure from a plane (roughness not explained by scan noise) taken as fully
        # correlated under the pile.
        g = np.array(
            [a_pos, np.sum(w_area * (x - self.origin[0])), np.sum(w_area * (y - self.origin[1]))]
        )
        var = float(g @ (self.cov if self.cov is not None else np.zeros((3, 3))) @ g)
        var += (a_pos * self.rough_sigma_m) ** 2
        return float(np.sqrt(max(var, 0.0)))


def _plane_lmeds(x: np.ndarray, y: np.ndarray, z: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Least-median-of-squares plane from random triplets: the robust starting point."""
    n = len(z)
    idx = np.stack([rng.choice(n, 3, replace=False) for _ in range(LMEDS_TRIALS)])
    A = np.stack([np.ones((LMEDS_TRIALS, 3)), x[idx], y[idx]], axis=-1)
    det = np.linalg.det(A)
    good = np.abs(det) > 1e-9
    if not good.any():
        return np.array([np.median(z), 0.0, 0.0])
    p = np.linalg.solve(A[good], z[idx][good][..., None])[..., 0]
    resid = z[None, :] - (p[:, :1] + p[:, 1:2] * x[None, :] + p[:, 2:3] * y[None, :])
    med = np.median(np.abs(resid), axis=1)
    return p[int(np.argmin(med))]


def fit_plane_robust(
    x: np.ndarray, y: np.ndarray, z: np.ndarray, se: np.ndarray, seed: int = 0
) -> dict:
    """Robust plane z = p0 + p1 x + p2 y through ring cells (coordinates already centred).

    LMedS start, then least squares on the cells within ``REJECT_K`` MAD-sigmas, repeated
    until the inlier set stops changing. Returns the parameters, their covariance
    (s^2 (X^T X)^-1 on the inliers), the inlier RMS residual, the roughness left after the
    cells' own standard errors ``se`` are taken out, and the inlier mask.
    """
    rng = np.random.default_rng(seed)  # fixed seed: a rerun gives the same numbers
    p = _plane_lmeds(x, y, z, rng)
    X = np.column_stack([np.ones_like(x), x, y])
    inl = np.ones(len(z), dtype=bool)
    for _ in range(20):
        r = z - X @ p
        s = MAD_TO_SIGMA * np.median(np.abs(r - np.median(r[inl])))
        band = max(REJECT_K * s, MIN_REJECT_BAND_M)
        new = np.abs(r) <= band
        if new.sum() < 3:
            break
        p, *_ = np.linalg.lstsq(X[new], z[new], rcond=None)
        if np.array_equal(new, inl):
            break
        inl = new
    r = z - X @ p
    ri = r[inl]
    dof = max(int(inl.sum()) - 3, 1)
    s2 = float(np.sum(ri**2) / dof)
    XtX = X[inl].T @ X[inl]
    try:
        cov = s2 * np.linalg.inv(XtX)
    except np.linalg.LinAlgError:
        cov = np.full((3, 3), np.inf)
    se_in = se[inl]
    noise2 = float(np.nanmean(se_in**2)) if np.isfinite(se_in).any() else 0.0
    rough = float(np.sqrt(max(s2 - noise2, 0.0)))
    return {"p": p, "cov": cov, "rms": float(np.sqrt(s2)), "rough": rough, "inliers": inl}


def toe_base(
    grid: Grid,
    polygon: shapely.Geometry,
    others: list[tuple[str, shapely.Geometry]],
    z: np.ndarray,
    count: np.ndarray,
    sd: np.ndarray,
    filled: np.ndarray,
    ring_m: float,
    noise_sd_m: float,
) -> BaseModel:
    """Fit the toe plane of one pile through the scanned cells of its free ring.

    The ring is the band ``ring_m`` wide just outside the footprint, less every other
    pile's footprint. Cells count when their centre lies in that free ring, they were
    scanned (not interpolated) and have an elevation.
    """
    ring = polygon.buffer(ring_m).difference(polygon)
    near = [(pid, g) for pid, g in others if g.intersects(ring)]
    free = ring
    if near:
        free = ring.difference(shapely.union_all([g for _, g in near]))
    ring_area = ring.area
    free_frac = free.area / ring_area if ring_area > 0 else 0.0
    note = ""
    flags: list[str] = []
    if near:
        note = f"toe ring {free_frac * 100:.0f} % free; neighbours {', '.join(str(p) for p, _ in near)}"
        flags.append("toe_shared")

    rows, cols = grid.window(*free.bounds) if not free.is_empty else (slice(0, 0), slice(0, 0))
    xs = grid.west + (np.arange(cols.start, cols.stop) + 0.5) * grid.cell
    ys = grid.north - (np.arange(rows.start, rows.stop) + 0.5) * grid.cell
    xx, yy = np.meshgrid(xs, ys)
    zz = z[rows, cols]
    use = (
        shapely.contains_xy(free, xx, yy)
        if not free.is_empty
        else np.zeros(xx.shape, dtype=bool)
    )
    use &= (count[rows, cols] > 0) & ~filled[rows, cols] & np.isfinite(zz)
    ox, oy = polygon.centroid.x, polygon.centroid.y
    model = BaseModel(kind="toe", grid=grid, origin=(ox, oy), note=note, flags=flags)
    n_use = int(use.sum())
    if free_frac < MIN_FREE_RING_FRACTION or n_use < MIN_RING_CELLS:
        model.ok = False
        model.flags.append("toe_no_ring")
        model.note = (note + "; " if note else "") + (
            f"toe ring too small to fit: {free_frac * 100:.0f} % free, {n_use} scanned cells"
        )
        return model
    cnt = count[rows, cols][use].astype(float)
    sdv = sd[rows, cols][use]
    # Standard error of each ring cell's mean elevation; single-point cells take the
    # survey's typical point scatter.
    se = np.where(np.isfinite(sdv), sdv, noise_sd_m) / np.sqrt(np.maximum(cnt, 1.0))
    fit = fit_plane_robust(xx[use] - ox, yy[use] - oy, zz[use], se)
    model.plane = tuple(float(v) for v in fit["p"])  # type: ignore[assignment]
    model.cov = fit["cov"]
    model.residual_m = fit["rms"]
    model.rough_sigma_m = fit["rough"]
    rejected = 1.0 - fit["inliers"].mean()
    extra = f"toe plane through {int(fit['inliers'].sum())} ring cells, {rejected * 100:.0f} % rejected"
    model.note = (model.note + "; " if model.note else "") + extra
    return model
