"""Base surfaces under a pile: a surveyed floor, a fixed level, or a toe plane.

Internal to :mod:`inventory.volume.measure`. Each base is a small object that gives the base
elevation on grid cells and at arbitrary points (the TIN cross-check needs both), and the
volume error the base itself brings (see the uncertainty model in :mod:`inventory.volume.measure`).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import math

import numpy as np
import shapely
from scipy import ndimage
from scipy.signal import fftconvolve

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
    ``origin`` for level and toe. ``cov`` is the plane's parameter covariance (toe only:
    the sandwich covariance under the ring residuals' own correlation, see
    :func:`toe_base`). ``residual_m`` is the fit residual (toe), the floor sigma (floor) or
    0 (level). For a toe plane, ``rough_sigma_m`` and ``rough_length_m`` are the sd and
    exponential correlation length of the ring residuals' correlated part (the ground's
    undulation), ``rough_white_m`` the sd of their white part less the cells' measurement
    noise, ``ring_cells`` the inlier ring cells and ``ring_independent`` the number of
    independent cells they amount to; ``ring_xy`` and ``ring_hat`` the inlier cells' centres
    and the plane's parameters as weights on their elevations, ``(X^T X)^-1 X^T``.
    ``probe_sigma_m`` and ``probe_count``: the toe plane's mean departure from the ground
    under the footprint as measured by copies of the footprint and its ring on open ground
    of the same survey (:func:`toe_probe_sigma`; 0 and 0 when not probed).
    """

    kind: str
    grid: Grid
    floor: np.ndarray | None = None
    floor_sigma_m: float = 0.0
    plane: tuple[float, float, float] = (np.nan, 0.0, 0.0)
    origin: tuple[float, float] = (0.0, 0.0)
    cov: np.ndarray | None = None
    rough_sigma_m: float = 0.0
    rough_white_m: float = 0.0
    rough_length_m: float = 0.0
    ring_cells: int = 0
    ring_independent: float = 0.0
    ring_xy: np.ndarray | None = None
    ring_hat: np.ndarray | None = None
    residual_m: float = 0.0
    note: str = ""
    flags: list[str] = field(default_factory=list)
    ok: bool = True
    probe_sigma_m: float = 0.0
    probe_count: int = 0

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
        return self.at(*self.grid.window_centers(rows, cols))

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
        # Toe plane: the plane's parameter error propagated to the volume, g^T C g (C from
        # the ring's own residuals and their correlation, see toe_base), plus the ground's
        # departure from a plane under the pile: its correlated part with the correlation
        # measured on the ring, its white part cell by cell.
        g = np.array(
            [a_pos, np.sum(w_area * (x - self.origin[0])), np.sum(w_area * (y - self.origin[1]))]
        )
        var = float(g @ (self.cov if self.cov is not None else np.zeros((3, 3))) @ g)
        var += self.rough_white_m**2 * float(np.sum(w_area**2))
        if self.rough_sigma_m > 0:
            var += self.rough_sigma_m**2 * _exp_double_sum(
                w_area, x, y, self.grid.cell, self.rough_length_m
            )
        # The ring cannot see every shape of the ground under the pile (a dome or a dip
        # whose rise is the same all round the ring moves the plane's height, not its
        # residuals). Where copies of the footprint on open ground of the same survey found
        # the plane off by more than this model says, their spread is taken instead.
        probe = self.probe_sigma_m * a_pos
        if self.probe_count >= PROBE_LEAST and probe > math.sqrt(max(var, 0.0)) * (
                1.0 + 2.0 / math.sqrt(2.0 * self.probe_count)):
            var = probe**2
        return float(np.sqrt(max(var, 0.0)))

    def ring_weights(self, w_area: np.ndarray, x: np.ndarray, y: np.ndarray) -> np.ndarray | None:
        """Weight of each inlier ring cell's elevation in the volume, for a toe plane.

        The volume above the plane is ``sum w_area (z - plane)``; the plane is a linear
        function of the ring's elevations, so an error field ``f`` on the ground changes the
        volume by ``sum w_area f - sum h_k f_k`` with these ``h``. None for other bases.
        """
        if self.kind != "toe" or self.ring_hat is None:
            return None
        g = np.array(
            [np.sum(w_area), np.sum(w_area * (x - self.origin[0])), np.sum(w_area * (y - self.origin[1]))]
        )
        return g @ self.ring_hat


#: Lags (in cells) at which the ring residuals' correlation is measured, and the share of
#: the largest below which a lag's correlation is taken as none (noise in the estimate).
_LAGS = np.array([1, 2, 3, 4, 6, 8, 12, 16])
_MIN_RHO = 0.05


def _exp_kernel(cell: float, length_m: float, reach: int) -> np.ndarray:
    k = np.arange(-reach, reach + 1) * cell
    return np.exp(-np.hypot(k[:, None], k[None, :]) / length_m)


def _exp_double_sum(s: np.ndarray, x: np.ndarray, y: np.ndarray, cell: float, length_m: float,
                    t: np.ndarray | None = None) -> float:
    r""":math:`\sum_i\sum_j s_i t_j \exp(-d_{ij}/L)` over cells at centres ``x, y``
    (FFT convolution on the cells' own raster; ``t`` defaults to ``s``)."""
    if s.size == 0:
        return 0.0
    t = s if t is None else t
    c = np.rint((x - x.min()) / cell).astype(int)
    r = np.rint((y.max() - y) / cell).astype(int)
    shape = (r.max() + 1, c.max() + 1)
    S = np.zeros(shape)
    T = np.zeros(shape)
    np.add.at(S, (r, c), s)
    np.add.at(T, (r, c), t)
    reach = max(shape) if not math.isfinite(length_m) else int(min(max(shape), math.ceil(8 * length_m / cell)))
    conv = fftconvolve(T, _exp_kernel(cell, length_m, reach), mode="same")
    return float(np.sum(S * conv))


def residual_correlation(res: np.ndarray, cell: float) -> tuple[float, float]:
    """Correlated share and correlation length of a raster of residuals (NaN = no cell).

    The autocorrelation is measured at the lags :data:`_LAGS` along rows and columns over
    every pair of cells that both have a residual, and an exponential model with a nugget,
    ``rho(d) = c exp(-d / L)`` for ``d > 0``, is fitted to the lags whose correlation is
    above :data:`_MIN_RHO` (log-linear least squares, weights the numbers of pairs). A
    white field gives ``c = 0``. Returns ``(c, L)`` in (share, metres).
    """
    ok = np.isfinite(res)
    r0 = np.where(ok, res, 0.0)
    var = float(np.sum(r0**2) / max(ok.sum(), 1))
    if var <= 0:
        return 0.0, 0.0
    d, rho, npair = [], [], []
    for k in _LAGS:
        num, n = 0.0, 0
        for a, b, m, q in ((r0[:, k:], r0[:, :-k], ok[:, k:], ok[:, :-k]),
                           (r0[k:, :], r0[:-k, :], ok[k:, :], ok[:-k, :])):
            if a.size == 0:
                continue
            both = m & q
            num += float(np.sum((a * b)[both]))
            n += int(both.sum())
        if n >= 10:
            d.append(k * cell)
            rho.append(num / n / var)
            npair.append(n)
    d, rho, npair = np.array(d), np.array(rho), np.array(npair, float)
    use = rho > _MIN_RHO
    # only the run of correlated lags from the first one: beyond it the estimate is noise
    if use.size == 0 or not use[0]:
        return 0.0, 0.0
    stop = int(np.argmin(use)) if not use.all() else use.size
    d, rho, npair = d[:stop], rho[:stop], npair[:stop]
    if len(d) == 1:
        # one lag: the nugget cannot be told from the length; take c = 1 (conservative)
        return 1.0, float(-d[0] / math.log(min(rho[0], 0.999)))
    A = np.column_stack([np.ones_like(d), -d])
    W = np.sqrt(npair)
    coef, *_ = np.linalg.lstsq(A * W[:, None], np.log(np.minimum(rho, 0.999)) * W, rcond=None)
    c = float(min(math.exp(coef[0]), 1.0))
    inv_l = float(coef[1])
    if inv_l <= 0:
        # no decay within the lags measured: correlated over the whole ring
        return c, float("inf")
    return c, 1.0 / inv_l


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
    return {"p": p, "cov": cov, "rms": float(np.sqrt(s2)), "rough": rough, "inliers": inl, "resid": r,
            "XtX": XtX, "s2": s2}


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
    xx, yy = grid.window_centers(rows, cols)
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
    # Each ring cell's own measurement variance: the ring's pooled point variance (cells
    # of two or more points, population sd turned unbiased) over the cell's count. Never
    # the survey's typical scatter: dense points on steep flanks raise that and would
    # cancel the ground's roughness. A ring of single-point cells cannot tell its noise
    # from its roughness, and all of its scatter is taken as roughness (the larger term).
    multi = (cnt >= 2) & np.isfinite(sdv)
    if multi.any():
        pooled = float(np.sum(sdv[multi] ** 2 * cnt[multi]) / np.sum(cnt[multi] - 1.0))
    else:
        pooled = 0.0
    se = np.sqrt(pooled / np.maximum(cnt, 1.0))
    ux, uy = xx[use] - ox, yy[use] - oy
    fit = fit_plane_robust(ux, uy, zz[use], se)
    inl = fit["inliers"]
    # The residuals' correlation along the ring: correlated ground (undulations, ruts)
    # makes the ring's cells fewer independent samples than cells, and moves the ground
    # under the pile together.
    res = np.full(zz.shape, np.nan)
    idx = np.flatnonzero(use.ravel())[inl]
    res.ravel()[idx] = fit["resid"][inl]
    c, length = residual_correlation(res, grid.cell)
    s2 = fit["s2"]
    try:
        inv = np.linalg.inv(fit["XtX"])
    except np.linalg.LinAlgError:
        inv = np.full((3, 3), np.inf)
    X = np.column_stack([np.ones(int(inl.sum())), ux[inl], uy[inl]])
    meat = (1.0 - c) * (X.T @ X)
    if c > 0:
        # X^T R X with R_ij = exp(-d_ij / L): the sandwich covariance of least squares
        # under correlated residuals (generalised least squares' textbook result for an
        # OLS fit: (X^T X)^-1 X^T Sigma X (X^T X)^-1).
        xr, yr = xx[use][inl], yy[use][inl]
        meat += c * np.array([[_exp_double_sum(X[:, i], xr, yr, grid.cell, length, X[:, j])
                               for j in range(3)] for i in range(3)])
    cov = s2 * inv @ meat @ inv
    n_in = int(inl.sum())
    # independent cells: N / (the variance of the mean over that of N independent cells)
    n_eff = n_in * n_in / max(float(meat[0, 0]), 1e-12) if n_in else 0.0
    noise2 = float(np.mean(se[inl] ** 2))
    model.plane = tuple(float(v) for v in fit["p"])  # type: ignore[assignment]
    model.cov = cov
    model.residual_m = fit["rms"]
    model.rough_sigma_m = float(math.sqrt(c * s2))
    model.rough_white_m = float(math.sqrt(max((1.0 - c) * s2 - noise2, 0.0)))
    model.rough_length_m = float(length)
    model.ring_cells = n_in
    # (X^T X)^-1 X^T of the inlier ring cells: the plane's parameters as weights on the
    # ring's elevations (a field that moves the ring moves the plane by these)
    model.ring_xy = np.column_stack([xx[use][inl], yy[use][inl]])
    model.ring_hat = inv @ X.T
    model.ring_independent = float(n_eff)
    rejected = 1.0 - fit["inliers"].mean()
    extra = (f"toe plane through {n_in} ring cells ({n_eff:.0f} independent), {rejected * 100:.0f} % rejected")
    model.note = (model.note + "; " if model.note else "") + extra
    return model


#: Copies of a footprint and its toe ring on open ground (:func:`toe_probe_sigma`): at
#: most this many, the nearest to the pile first ...
PROBE_MOST = 48
#: ... at least this many, or no probe term ...
PROBE_LEAST = 8
#: ... within this distance (m) of the footprint's own place (the ground nearby), and
#: within this many cells (on fine grids the search, an FFT over that window, stays
#: small) ...
PROBE_REACH_M = 150.0
PROBE_REACH_CELLS = 400
#: ... each with at least this share of its footprint's and of its ring's cells on open
#: ground.
PROBE_OPEN_SHARE = 0.9
#: Open ground lies at least this far (m) beyond the toe ring of every footprint.
PROBE_CLEAR_M = 2.0
#: Median of a chi-square variable of one degree of freedom: for normal b of sd sigma,
#: median(b^2) = 0.45494 sigma^2 (from memory; scipy.stats.chi2(1).median()).
_CHI2_1_MEDIAN = 0.45494


def open_ground(z: np.ndarray, count: np.ndarray, filled: np.ndarray, grid: Grid,
                footprints: list[shapely.Geometry], ring_m: float) -> np.ndarray:
    """Cells of scanned surface (not filled) farther than ``ring_m`` + :data:`PROBE_CLEAR_M`
    from every footprint: ground no pile stands on, as far as the site's footprints say."""
    out = (count > 0) & ~filled & np.isfinite(z)
    if footprints and out.any():
        block = shapely.union_all([g.buffer(ring_m + PROBE_CLEAR_M) for g in footprints])
        rows, cols = grid.window(*block.bounds)
        if rows.stop > rows.start and cols.stop > cols.start:
            out[rows, cols] &= ~shapely.contains_xy(block, *grid.window_centers(rows, cols))
    return out


def toe_probe_sigma(grid: Grid, z: np.ndarray, open_: np.ndarray, polygon: shapely.Geometry,
                    ring_m: float) -> tuple[float, int]:
    """How far a toe plane misses the ground under a footprint, measured on open ground.

    The footprint and its ring (``ring_m`` wide) are copied, by whole cells, to places near
    the pile (within :data:`PROBE_REACH_M` and :data:`PROBE_REACH_CELLS`) where both lie on
    ``open_`` ground
    (:func:`open_ground`; at least :data:`PROBE_OPEN_SHARE` of each), at most one copy per
    square of half the copy's size, the nearest :data:`PROBE_MOST`. At each, a plane is
    fitted through the ring's cells as :func:`toe_base` fits it, and the mean of the
    ground's departure from it over the footprint's cells is that copy's base error. The
    result is a robust root mean square of those errors (from their median square) and the
    number of copies; (0, n) with fewer than :data:`PROBE_LEAST` copies.
    """
    outer = polygon.buffer(ring_m)
    rows, cols = grid.window(*outer.bounds)
    h, w = rows.stop - rows.start, cols.stop - cols.start
    if h <= 0 or w <= 0:
        return 0.0, 0
    xs = (np.arange(w) + 0.5) * grid.cell
    ys = -(np.arange(h) + 0.5) * grid.cell
    xx, yy = np.meshgrid(xs + grid.west + cols.start * grid.cell, ys + grid.north - rows.start * grid.cell)
    fm = shapely.contains_xy(polygon, xx, yy)
    rm = shapely.contains_xy(outer, xx, yy) & ~fm
    nf, nr = int(fm.sum()), int(rm.sum())
    if nf == 0 or nr < MIN_RING_CELLS:
        return 0.0, 0
    reach = min(int(math.ceil(PROBE_REACH_M / grid.cell)), PROBE_REACH_CELLS)
    r0, r1 = max(rows.start - reach, 0), min(rows.stop + reach, grid.nrows)
    c0, c1 = max(cols.start - reach, 0), min(cols.stop + reach, grid.ncols)
    o = open_[r0:r1, c0:c1]
    if o.shape[0] < h or o.shape[1] < w or not o.any():
        return 0.0, 0
    of = o.astype(float)
    cover_f = fftconvolve(of, fm[::-1, ::-1].astype(float), mode="valid")
    cover_r = fftconvolve(of, rm[::-1, ::-1].astype(float), mode="valid")
    ii, jj = np.nonzero((cover_f >= PROBE_OPEN_SHARE * nf - 0.5) & (cover_r >= PROBE_OPEN_SHARE * nr - 0.5))
    if len(ii) < PROBE_LEAST:
        return 0.0, len(ii)
    # one copy per square of half the copy's size, the nearest to the pile's own place
    step = max(1, min(h, w) // 2)
    d = np.hypot(ii - (rows.start - r0), jj - (cols.start - c0))
    order = np.lexsort((jj, ii, d))
    ii, jj = ii[order], jj[order]
    _, first = np.unique((ii // step) * (o.shape[1] // step + 1) + jj // step, return_index=True)
    first = np.sort(first)[:PROBE_MOST]
    if len(first) < PROBE_LEAST:
        return 0.0, len(first)
    ux, uy = np.meshgrid(xs - xs.mean(), ys - ys.mean())   # window coordinates, centred
    errs = []
    for i, j in zip(ii[first], jj[first]):
        zz = z[r0 + i:r0 + i + h, c0 + j:c0 + j + w]
        ow = o[i:i + h, j:j + w]
        ring, foot = rm & ow, fm & ow
        fit = fit_plane_robust(ux[ring], uy[ring], zz[ring], np.zeros(int(ring.sum())))
        p = fit["p"]
        errs.append(float(np.mean(zz[foot] - (p[0] + p[1] * ux[foot] + p[2] * uy[foot]))))
    e2 = np.square(errs)
    return float(math.sqrt(np.median(e2) / _CHI2_1_MEDIAN)), len(errs)
