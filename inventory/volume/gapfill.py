r"""Gap filling that keeps a pile's slope breaks: flanks extended and intersected.

Internal to :mod:`inventory.volume.measure`. Linear interpolation across a gap is exact on a
plane, but where the gap hides a slope break it cuts the corner: over a hidden apex, ridge or
flat-top edge (a crest, where the surface is concave) the chord lies below the surface, and
across a toe it lies above it. Around a slope break each scanned flank is a plane that runs
on to the break, so the surface there is the *lower* envelope of the rim's tangent planes
(at a crest) or their *upper* envelope (at a toe). A chord lies below a concave surface and
above a convex one, so the linear fill itself tells which case a cell is in:

* most rim planes (:data:`MAJORITY`) pass above the linear value by two standard errors:
  a crest, the fill is the lowest plane of those above it (a plane below the chord there is
  no tangent plane of a concave surface: it straddles a break, or lies beyond a toe);
* every rim plane passes below it: a toe, the fill would be the highest plane (off, see
  :data:`TOE_BRANCH`);
* otherwise (planes on both sides: an even flank, a saddle, noise) the linear value stays.

The envelope is used only inside gaps enclosed by their rim (:data:`MIN_SECTORS`).

Rim planes (:data:`SECTOR_PLANES`): the scanned cells two to five cells from a gap are cut
into 16 angular sectors about the gap's centre, each with its least-squares plane; adjacent
arcs are merged, best-fitting pair first, while an F test does not tell the merged plane
from the two (1 % level). A flank that keeps its slope becomes one plane fitted on many
cells (a cell mean of one or two points on a slope scatters by about a tenth of a metre, and
the lowest of several noisy planes is biased low), while around a cone, across a ridge or a
top edge, where the slope turns, the arcs keep planes of their own, each following its own
part of the flank (a single plane over a wide arc of a cone comes out flatter). Arcs whose
residual stands out (more than :data:`BREAK_RESIDUAL` times the median) straddle a break and
carry no plane. Each gap cell looks at the nearest rim cell in each of eight directions and
takes the plane of its arc. The scanned cells on the gap's very edge, often scanned in part
only, carry no plane. A plane may not leave the linear fill faster than :data:`MAX_RISE` per
metre of distance from the rim (a guard against a wild plane; steeper than any angle of
repose, so that a true crest is never capped: materials need not state their angle of
repose). With ``SECTOR_PLANES = 0`` each rim cell carries the plane of its own 3 x 3 window
instead and every plane must clear the chord (the earlier rule, kept for comparison in the
calibration study).

The flanks cannot tell a hidden apex from a hidden flat top: both are concave, and a concave
surface lies between the chord and the lowest tangent plane above it. For each target cell
of an enclosed gap where at least two planes clear the chord, that plane (capped as above)
is returned as an upper bound (``upper``) whether or not the crest branch was taken; the
volume step counts the volume between the chord and the bound in the pile's interval
(:func:`inventory.volume.measure._hidden_top`).
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage

__all__: list[str] = []

#: Largest departure from the linear fill per metre of distance to the nearest rim cell:
#: tan 45 deg, steeper than the angle of repose of bulk materials (about 30-40 deg, common
#: practice), so that a true crest is never capped and a wild plane is.
MAX_RISE = 1.0

#: Half width (cells) of the window through which each rim cell's plane is fitted. One
#: (3 x 3 cells): on the calibration study a 5 x 5 window left a hidden cone apex 1.5 %
#: low against 1.1 % (analytic 8 m cone, 3 m shadow: -1.0 % against -0.4 %); the bias at
#: ridges, flat-top edges and bays stayed within 0.5 % either way.
_PLANE_HALF = 1

#: Rim cells: scanned cells within this many cells of a gap, beyond its edge cells.
_RIM_REACH = 2

#: Directions around each gap cell in which the nearest rim cell is taken.
_SECTORS = 8

#: Gaps of fewer cells keep the linear fill: across a cell or two a chord misses a slope
#: break by little, and planes from noisy rims would add more error than they remove.
MIN_GAP_CELLS = 9

#: How many standard errors of its plane's prediction the envelope must clear the linear
#: fill by (two: about 98 % one-sided against planes that differ by noise only).
SIGNIFICANCE = 2.0

#: The upper envelope at a hidden toe. Off: on the demo simulator's surveys (a perfect
#: ground classifier, tests/test_volume_site.py) it took 3.4 % off the coal windrow under
#: the stacker's boom, whose shadow runs from toe to toe across the ridge and the floor
#: planes met the flanks' below the chord; a bridged toe costs a linear fill little.
TOE_BRANCH = False

#: Fewest of the eight directions that must hold a rim cell for the envelope to be used:
#: the gap must be enclosed, as a shadow over a crest is. A shadow that runs off the pile
#: (behind it, open to the floor) has no rim downhill, only the flanks beside it, whose
#: planes pass above the surface there (a cone's tangent planes at other azimuths): on the
#: demo simulator their lower envelope put a cone 1 % high where linear filling was right.
MIN_SECTORS = 7

#: A rim plane whose residual sd exceeds this many times the median of the rim's is taken
#: to straddle a slope break and is not used (three: beyond the spread of residual sds of
#: windows of 10-25 cells of the same noise; engineering judgement).
BREAK_RESIDUAL = 3.0

#: Floor of that median (m), so that noise-free rims do not reject planes for micrometres.
MIN_RESIDUAL_M = 0.005

#: Fewest scanned cells for a rim cell's plane.
_MIN_PLANE_CELLS = 6

#: Planes per gap: one per angular sector of the rim about the gap's centre (0: one plane
#: per rim cell from its 3 x 3 window instead).
SECTOR_PLANES = 16

#: With sector planes, the share of a gap's planes that must clear the chord by
#: :data:`SIGNIFICANCE` standard errors at a cell for it to be taken as a crest.
MAJORITY = 0.75

#: Rings of rim cells (cells from the gap, chessboard distance) that carry the sector planes.
_SECTOR_RINGS = (2, 5)


def _plane_fit(x: np.ndarray, y: np.ndarray, z: np.ndarray):
    """Least-squares plane z = b0 + b1 x + b2 y: coefficients, (A'A)^-1 and residual sum of
    squares, or None when the cells do not fix a plane."""
    a = np.column_stack([np.ones(x.size), x, y])
    ata = a.T @ a
    if x.size < _MIN_PLANE_CELLS or np.linalg.cond(ata) > 1e8:
        return None
    inv = np.linalg.inv(ata)
    b = inv @ (a.T @ z)
    return b, inv, float(np.sum((z - a @ b) ** 2))


def _sector_planes(z: np.ndarray, cells: tuple[np.ndarray, np.ndarray], centre: tuple[float, float],
                   cell: float, k_sectors: int):
    """Planes through the rim ``cells`` of one gap over arcs about ``centre`` (row, col).

    The rim is cut into ``k_sectors`` equal angular sectors; adjacent arcs are then merged,
    the pair that a single plane fits best first, while the F statistic of the merge (the
    rise in residual sum of squares per parameter over the residual variance of the two
    planes) stays under the 1 % point of its distribution: arcs of the same flank become one
    plane, fitted on many cells, and arcs across which the slope turns (around a cone,
    across a ridge or a top edge) keep planes of their own. Returns coefficients (value at
    the centre, east and north gradients), their covariance and residual sds."""
    from scipy import stats

    rr, cc = cells
    x = (cc - centre[1]) * cell
    y = (centre[0] - rr) * cell
    zz = z[rr, cc]
    sec = np.floor((np.arctan2(y, x) + np.pi) / (2 * np.pi) * k_sectors).astype(int) % k_sectors
    arcs = [np.nonzero(sec == k)[0] for k in range(k_sectors)]
    arcs = [a for a in arcs if a.size]
    fits = [_plane_fit(x[a], y[a], zz[a]) for a in arcs]

    def merge_cost(i: int) -> float:
        j = (i + 1) % len(arcs)
        if fits[i] is None or fits[j] is None:
            return -1.0          # an arc too small for a plane joins its neighbour first
        m = np.concatenate([arcs[i], arcs[j]])
        f = _plane_fit(x[m], y[m], zz[m])
        if f is None:
            return -1.0
        dof = m.size - 6
        rss = fits[i][2] + fits[j][2]
        if dof <= 0:
            return -1.0
        fstat = (f[2] - rss) / 3.0 / max(rss / dof, 1e-12)
        return fstat / stats.f.ppf(0.99, 3, dof)

    while len(arcs) > 1:
        costs = [merge_cost(i) for i in range(len(arcs) if len(arcs) > 2 else 1)]
        i = int(np.argmin(costs))
        if costs[i] >= 1.0:
            break
        j = (i + 1) % len(arcs)
        m = np.concatenate([arcs[i], arcs[j]])
        arcs[i], fits[i] = m, _plane_fit(x[m], y[m], zz[m])
        del arcs[j], fits[j]
    coef, cov, res = [], [], []
    arc_of = np.full(rr.size, -1)
    for a, f in zip(arcs, fits):
        if f is None:
            continue
        b, inv, rss = f
        s2 = rss / (a.size - 3)
        arc_of[a] = len(coef)
        coef.append(b)
        cov.append(s2 * inv)
        res.append(np.sqrt(s2))
    if not coef:
        return np.zeros((0, 3)), np.zeros((0, 3, 3)), np.zeros(0), arc_of
    return np.array(coef), np.array(cov), np.array(res), arc_of


def _local_planes(z: np.ndarray, known: np.ndarray, cell: float) -> dict[str, np.ndarray]:
    """Least-squares plane through the known cells of a (2h+1)^2 window about every cell
    (normalised convolution): its value at the cell's centre ``z0``, gradients ``gx`` (east)
    and ``gy`` (north), residual variance ``s2``, the cells used ``n`` and their spread
    ``suu`` (sum of squared offsets from their mean, in cells^2, both axes)."""
    h = _PLANE_HALF
    k = np.arange(-h, h + 1, dtype=float)
    u = np.broadcast_to(k[None, :], (2 * h + 1, 2 * h + 1))      # columns: +x
    v = np.broadcast_to(-k[:, None], (2 * h + 1, 2 * h + 1))     # rows: -y
    m = known.astype(float)
    zm = np.where(known, z, 0.0)
    ref = float(np.mean(zm[known])) if known.any() else 0.0
    zz = np.where(known, z - ref, 0.0)

    def corr(a, ker):
        return ndimage.correlate(a, ker, mode="constant", cval=0.0)

    one = np.ones_like(u)
    n = corr(m, one)
    su, sv = corr(m, u), corr(m, v)
    suu, svv, suv = corr(m, u * u), corr(m, v * v), corr(m, u * v)
    sz, suz, svz, szz = corr(zz, one), corr(zz, u), corr(zz, v), corr(zz * zz, one)
    with np.errstate(invalid="ignore", divide="ignore"):
        mu, mv, mz = su / n, sv / n, sz / n
        cuu, cvv, cuv = suu - su * mu, svv - sv * mv, suv - su * mv
        cuz, cvz, czz = suz - su * mz, svz - sv * mz, szz - sz * mz
        det = cuu * cvv - cuv * cuv
        bu = (cvv * cuz - cuv * cvz) / det
        bv = (cuu * cvz - cuv * cuz) / det
        z0 = mz - bu * mu - bv * mv + ref
        s2 = np.maximum(czz - bu * cuz - bv * cvz, 0.0) / (n - 3.0)
    bad = ~np.isfinite(bu) | ~np.isfinite(bv) | (np.abs(det) < 1e-9) | (n < _MIN_PLANE_CELLS)
    nan = np.nan
    return {"z0": np.where(bad, nan, z0), "gx": np.where(bad, nan, bu / cell), "gy": np.where(bad, nan, bv / cell),
            "s2": np.where(bad, nan, s2), "n": np.where(bad, 0.0, n), "suu": np.where(bad, nan, cuu + cvv)}


def fill_slope_breaks(z: np.ndarray, linear: np.ndarray, known: np.ndarray, targets: np.ndarray,
                      cell: float, upper: np.ndarray | None = None) -> np.ndarray:
    """``linear`` with each ``targets`` cell replaced by the rim planes' envelope where the
    gap hides a crest or a toe (module docstring).

    Parameters
    ----------
    z : ndarray
        Elevations of the window; only ``known`` cells are read.
    linear : ndarray
        The linear fill (every target cell has a value, or NaN where none could be made).
    known : ndarray of bool
        Cells whose elevation is measured (rim candidates and plane support).
    targets : ndarray of bool
        Cells to fill (unscanned cells of interest).
    cell : float
        Cell size (m).
    upper : ndarray, optional
        Filled in place, at the target cells of enclosed gaps that may hide a crest (at
        least two rim planes pass above the linear fill by :data:`SIGNIFICANCE` standard
        errors, whether or not the crest branch was taken there), with the highest the
        surface can be there if it is concave: the lowest rim plane above the linear fill,
        capped by :data:`MAX_RISE` (a concave surface lies below each of its tangent planes
        and above each chord, so it lies between ``linear`` and this bound). Left as it is
        elsewhere (the caller passes the filled value, so that it is no bound there).

    Returns
    -------
    ndarray
        The filled window.
    """
    out = linear.copy()
    if not targets.any() or known.sum() < _MIN_PLANE_CELLS:
        return out
    gap = ~known
    # Gaps are 4-connected groups of unknown cells; those of fewer than MIN_GAP_CELLS
    # (speckle between scan lines) keep the linear fill and do not push rims away.
    labels, nlab = ndimage.label(gap)
    sizes = np.bincount(labels.ravel(), minlength=nlab + 1)
    big = (sizes >= MIN_GAP_CELLS)[labels] & gap
    if not (big & targets).any():
        return out
    # Scanned cells on a big gap's edge are often scanned in part only (the shadow's edge
    # cuts them), so their mean is pulled towards the scanned side: they neither carry a
    # plane nor support one.
    support = known & ~ndimage.binary_dilation(big, structure=np.ones((3, 3)))
    pl = _local_planes(z, support, cell)
    near_gap = ndimage.binary_dilation(big, structure=np.ones((3, 3)), iterations=_RIM_REACH + 1)
    rim = support & near_gap & np.isfinite(pl["gx"])
    if rim.sum() < 2:
        return out
    # A window that straddles the slope break itself (the rim of a shadow over a ridge runs
    # across the ridge) fits both flanks badly and gives a plane flatter than either: it
    # is no flank. Such planes stand out by their residual, which the kink makes far
    # larger than the scan noise of a flank's window.
    rs = np.sqrt(pl["s2"][rim])
    rim[rim] = rs <= BREAK_RESIDUAL * max(float(np.median(rs)), MIN_RESIDUAL_M)
    if rim.sum() < 2:
        return out
    dist = ndimage.distance_transform_edt(gap) * cell
    rim_lab = ndimage.grey_dilation(np.where(big, labels, 0), footprint=np.ones((2 * _RIM_REACH + 3,) * 2))
    if SECTOR_PLANES:
        r0, r1 = _SECTOR_RINGS
        sector_rim = known & ~ndimage.binary_dilation(big, structure=np.ones((3, 3)), iterations=r0 - 1)
        sector_rim &= ndimage.binary_dilation(big, structure=np.ones((3, 3)), iterations=r1)
        sector_lab = ndimage.grey_dilation(np.where(big, labels, 0), footprint=np.ones((2 * r1 + 1,) * 2))
    for lab in np.unique(labels[targets & big]):
        tr, tc = np.nonzero(targets & (labels == lab))
        rr, rc = np.nonzero(rim & (rim_lab == lab))
        if rr.size < 2:
            continue
        ok_t = np.isfinite(linear[tr, tc])
        tr, tc = tr[ok_t], tc[ok_t]
        if tr.size == 0:
            continue
        if SECTOR_PLANES:
            gr, gc = np.nonzero(labels == lab)
            centre = (float(gr.mean()), float(gc.mean()))
            rr, rc = np.nonzero(sector_rim & (sector_lab == lab))
            coef, cov, res, arc_of = _sector_planes(z, (rr, rc), centre, cell, SECTOR_PLANES)
            if res.size < 2:
                continue
            # an arc whose residual stands out straddles a slope break: no plane of its own
            keep = res <= BREAK_RESIDUAL * max(float(np.median(res)), MIN_RESIDUAL_M)
            arc_of = np.where(arc_of >= 0, np.where(keep[np.maximum(arc_of, 0)], arc_of, -1), -1)
        zr = pl["z0"][rr, rc]
        gxr, gyr = pl["gx"][rr, rc], pl["gy"][rr, rc]
        s2r, nr, sur = pl["s2"][rr, rc], pl["n"][rr, rc], pl["suu"][rr, rc] * cell**2
        # one chunk of target cells at a time: (targets x rim) arrays
        step = max(1, 2_000_000 // rr.size)
        for s0 in range(0, tr.size, step):
            r_t, c_t = tr[s0:s0 + step], tc[s0:s0 + step]
            dx = (c_t[:, None] - rc[None, :]) * cell          # east
            dy = (rr[None, :] - r_t[:, None]) * cell          # north
            d2 = dx * dx + dy * dy
            sector = (np.floor((np.arctan2(dy, dx) + np.pi) / (2 * np.pi) * _SECTORS).astype(int)) % _SECTORS
            pred = zr[None, :] + gxr[None, :] * dx + gyr[None, :] * dy
            # standard error of each plane's prediction at the target (straight-line fit:
            # s^2 (1/n + d^2 / sum of squared offsets), the two axes pooled)
            with np.errstate(divide="ignore", invalid="ignore"):   # rim cells without a 3 x 3 plane
                pse = np.sqrt(s2r[None, :] * (1.0 / nr[None, :] + 2.0 * d2 / sur[None, :]))
            lo = np.full(r_t.size, np.inf)
            hi = np.full(r_t.size, -np.inf)
            lo_se = np.zeros(r_t.size)
            hi_se = np.zeros(r_t.size)
            cnt = np.zeros(r_t.size, int)
            rows = np.arange(r_t.size)
            for k in range(_SECTORS):
                dk = np.where(sector == k, d2, np.inf)
                j = np.argmin(dk, axis=1)
                has = np.isfinite(dk[rows, j])
                p = pred[rows, j]
                e = pse[rows, j]
                new_lo = has & (p < lo)
                new_hi = has & (p > hi)
                lo = np.where(new_lo, p, lo)
                lo_se = np.where(new_lo, e, lo_se)
                hi = np.where(new_hi, p, hi)
                hi_se = np.where(new_hi, e, hi_se)
                cnt += has
            if SECTOR_PLANES:
                # the arcs of the nearest rim cell in each direction: their planes' envelope
                xt = (c_t - centre[1]) * cell
                yt = (centre[0] - r_t) * cell
                at = np.column_stack([np.ones(r_t.size), xt, yt])
                spred = at @ coef.T                                       # (targets x arcs)
                sse = np.sqrt(np.maximum(np.einsum("ti,pij,tj->tp", at, cov, at), 0.0))
                lin_ = linear[r_t, c_t]
                lo = np.full(r_t.size, np.inf)
                n_pl = np.zeros(r_t.size, int)
                n_sig = np.zeros(r_t.size, int)
                for k in range(_SECTORS):
                    dk = np.where(sector == k, d2, np.inf)
                    j = np.argmin(dk, axis=1)
                    a = arc_of[j]
                    has = np.isfinite(dk[rows, j]) & (a >= 0)
                    p = np.where(has, spred[rows, np.maximum(a, 0)], np.nan)
                    e = sse[rows, np.maximum(a, 0)]
                    n_pl += has
                    n_sig += has & (p > lin_ + SIGNIFICANCE * e)
                    # a plane below the chord is no tangent plane of a concave surface
                    # (it straddles a break, or the cell is no crest): left out
                    lo = np.where(has & (p > lin_), np.minimum(lo, p), lo)
                sector_crest = (n_sig >= 2) & (n_sig >= MAJORITY * n_pl)
            lin = linear[r_t, c_t]
            cap = MAX_RISE * dist[r_t, c_t]
            enough = cnt >= MIN_SECTORS
            # the envelope must clear the chord by more than its own noise (two standard
            # errors): planes from noisy rims all on one side by chance are no slope break
            if SECTOR_PLANES:
                crest = enough & sector_crest & np.isfinite(lo)
            else:
                crest = enough & (lo > lin + SIGNIFICANCE * lo_se)
            toe = enough & (hi < lin - SIGNIFICANCE * hi_se) & TOE_BRANCH
            val = lin.copy()
            val[crest] = np.minimum(lo[crest], lin[crest] + cap[crest])
            val[toe] = np.maximum(hi[toe], lin[toe] - cap[toe])
            out[r_t, c_t] = val
            if upper is not None and SECTOR_PLANES:
                # cells that may hide a crest: the concave surface's bound above the chord
                maybe = enough & (n_sig >= 2) & np.isfinite(lo)
                bound = np.where(maybe, np.minimum(lo, lin + cap), val)
                upper[r_t, c_t] = np.maximum(bound, val)
    return out
