"""Compiled kernels of the survey step's hot loops (numba, CPU only).

Each kernel is compiled once per machine (``cache=True`` keeps the machine code beside the
module when the folder is writable) and runs without the GIL; :func:`run_rows` splits the
rows of a job over :func:`inventory.parallel.job_threads` threads, so a serial run uses
the cores and tiles running on threads or Dask workers share them, with results that do
not depend on how the rows were split.

* :class:`CellIndex` / :func:`plan_knn`: the k nearest points in plan (optionally among
  the members of a subset) of any rows, from a grid of cells: the cells around a point
  are searched ring by ring until no cell left can hold a point as near as the k-th
  (the cells are bucketed row by row, so a ring's bottom and top rows are each read as
  one run of members). Exact, like a k-d tree query; equal distances are ordered by
  point index.
* :func:`knn3_mean`, :func:`plan_knn3`: the k nearest in 3D, exact in the same way, by
  one of two searches of the same answers: the plan search reading every point of each
  cell (a cell ring r cells out lies at least ``r * cell`` away in plan, so in 3D as
  well), or, where the queries' cells are deep (walls, machines: points stacked in
  plan), on voxels: the index's cells grouped into columns and split in height by a
  counting sort, the layers of each column read outward from the point's height and
  any voxel skipped that lies farther than the k-th nearest so far.
* :func:`below_tests`, :func:`min_envelope`, :func:`outvoted`, :func:`faces_over`: the
  per-point tests of :mod:`inventory.survey.ground` over those neighbours, one pass per point with no
  temporary arrays of points by neighbours.
* :func:`cell_lowest`, :func:`envelope_at`: the seeds of the slope envelope's grid and the
  envelope at query points (:class:`inventory.survey.ground._EnvelopeGrid`).
* :func:`lattice_triangles`: the lattice cells inside large triangles of the hole fill
  (:func:`inventory.survey.gridding._linear_on_lattice`).
* :func:`morton_order`, :func:`cell_z_order`: the stable order of the points' Morton keys
  (:func:`inventory.survey.clean.spatial_order`) and ``np.lexsort((z, cell))``, by a radix
  sort of the keys and a sort of each cell's heights; :func:`elm_noise` and
  :func:`overhead_layers` walk the cells in that order
  (:func:`inventory.survey.clean.elm_low_points`, :func:`inventory.survey.ground._overhead`).
* :func:`chamfer_passes`: the two raster passes of
  :func:`inventory.survey.ground._chamfer_min`, with the same floating-point operations;
  :func:`chamfer_passes_blocked` the same around blocked cells (walls), repeated until
  nothing changes.
* :func:`floor_cells`, :func:`cell_stats`: the cell of each point by floor division, and a
  cell's count, sum, lowest and highest height in one pass (the region rules'
  ``np.bincount`` and ``np.minimum.at`` / ``np.maximum.at`` passes).

The kernels below the neighbour queries give results bit-identical to the numpy code they
replaced (tests/test_survey_kernels_small.py holds that code as the reference).
"""

from __future__ import annotations

import math
from concurrent.futures import ThreadPoolExecutor
from typing import Callable

import numpy as np
from numba import njit

from inventory.parallel import cores

__all__ = ["CellIndex", "plan_knn", "plan_knn3", "knn3_mean", "cell_lowest", "envelope_at", "member_rows", "below_tests",
           "min_envelope", "has_company", "fewer_within", "outvoted", "faces_over", "knn3_mean_from_plan", "lattice_triangles",
           "run_rows", "morton_order", "cell_z_order", "elm_noise", "overhead_layers", "chamfer_passes", "chamfer_passes_blocked", "floor_cells",
           "cell_stats"]

#: Rows per piece when the rows of a job are split over threads (load balance).
_PIECE = 65536


def run_rows(fn: Callable[[int, int], None], n: int) -> None:
    """Call ``fn(start, stop)`` on pieces of ``range(n)``, on :func:`job_threads` threads.

    ``fn`` writes its rows' results into arrays it holds; pieces never overlap, so the
    result is the same however many threads run.
    """
    pieces = [(a, min(a + _PIECE, n)) for a in range(0, n, _PIECE)]
    threads = min(cores(), len(pieces))   # job_threads(), or every core outside a job
    if threads <= 1:
        for a, b in pieces:
            fn(a, b)
        return
    with ThreadPoolExecutor(threads) as pool:
        for f in [pool.submit(fn, a, b) for a, b in pieces]:
            f.result()


@njit(cache=True, nogil=True)
def _bucket(x, y, x0, y0, c, nrow, ncol):
    n = len(x)
    key = np.empty(n, np.int64)
    for i in range(n):
        key[i] = int((y[i] - y0) // c) * ncol + int((x[i] - x0) // c)
    count = np.zeros(nrow * ncol + 1, np.int64)
    for i in range(n):
        count[key[i] + 1] += 1
    for j in range(nrow * ncol):
        count[j + 1] += count[j]
    fill = count[:-1].copy()
    order = np.empty(n, np.int64)
    for i in range(n):       # counting sort: points of a cell in index order
        order[fill[key[i]]] = i
        fill[key[i]] += 1
    return order, count


class CellIndex:
    """Points of ``members`` bucketed on square cells of ``cell`` metres (a counting sort).

    Parameters
    ----------
    x, y : ndarray of float
    members : ndarray of bool or None
        Only these points are found by queries (all when None).
    k : int
        Neighbours the queries will mostly ask for in plan: the default cell is a third
        of the radius that holds k points at the mean density over the bounds, so that
        two or three rings of cells around a point hold its k nearest (the fastest on
        the bench's yards; queries in 3D reach farther and do best with about twice
        their k here).
    cell : float or None
        Cell edge (overrides ``k``).
    """

    def __init__(self, x: np.ndarray, y: np.ndarray, members: "np.ndarray | None" = None,
                 k: int = 16, cell: "float | None" = None) -> None:
        idx = np.arange(len(x)) if members is None else np.flatnonzero(members)
        self.members = idx
        xs, ys = np.ascontiguousarray(x[idx], dtype=np.float64), np.ascontiguousarray(y[idx], dtype=np.float64)
        if len(idx) == 0:
            xs = ys = np.zeros(1)
        self.x0, self.y0 = float(xs.min()), float(ys.min())
        w, h = float(xs.max()) - self.x0, float(ys.max()) - self.y0
        if cell is None:
            cell = 0.35 * math.sqrt(max(w * h, 1e-6) * k / (math.pi * max(len(idx), 1)))
            cell = min(max(cell, 0.05), 5.0)
        self.cell = float(cell)
        self.ncol = int(w // self.cell) + 1
        self.nrow = int(h // self.cell) + 1
        order, self.start = _bucket(xs, ys, self.x0, self.y0, self.cell, self.nrow, self.ncol)
        # the members' coordinates cell by cell, with their numbers among all points
        self.sx, self.sy = xs[order], ys[order]
        self.sid = idx[order] if len(idx) else np.zeros(0, np.int64)
        self.n = len(idx)

    def subset(self, members: np.ndarray) -> "CellIndex":
        """The index of this index's points that are ``members`` (a mask over the points,
        numbered as here), on the same cells, without sorting again. Queries of it find
        what queries of ``CellIndex(x, y, members)`` find (the search is exact; only its
        cells, hence its speed, may differ)."""
        keep = members[self.sid]
        out = object.__new__(CellIndex)
        out.x0, out.y0, out.cell, out.nrow, out.ncol = self.x0, self.y0, self.cell, self.nrow, self.ncol
        kept = np.zeros(len(keep) + 1, np.int64)
        np.cumsum(keep, out=kept[1:])
        out.start = kept[self.start]
        out.sx, out.sy, out.sid = self.sx[keep], self.sy[keep], self.sid[keep]
        out.members = np.flatnonzero(members)
        out.n = int(kept[-1])
        return out


@njit(cache=True, nogil=True)
def _knn_rows(qx, qy, qz, a, b, sx, sy, sz, sid, start, x0, y0, c, nrow, ncol, scale, k, qid, out_d, out_i, mode):
    # qz None: in plan; qid None: no point skipped (each case compiled on its own,
    # without the other's tests in the inner loop)
    bd = np.empty(k)
    bi = np.empty(k, np.int64)
    for i in range(a, b):
        px, py = qx[i], qy[i]
        pz = 0.0
        if qz is not None:
            pz = qz[i]
        me = -1
        if qid is not None:
            me = qid[i]
        tol = max(scale, abs(px), abs(py)) * _SLACK
        cc = int(math.floor((px - x0) / c))
        cr = int(math.floor((py - y0) / c))
        for m in range(k):
            bd[m] = np.inf
            bi[m] = -1
        held = 0
        r = 0
        rmax = max(nrow, ncol) + abs(cc) + abs(cr) + 1
        while True:
            # ring r: its bottom and top rows, each one run of members (the cells of a
            # row are consecutive), then the cells at its two ends of each row between
            c0, c1 = max(cc - r, 0), min(cc + r, ncol - 1)
            rlo, rhi = max(cr - r + 1, 0), min(cr + r - 1, nrow - 1)
            nmid = rhi - rlo + 1 if r > 0 and rhi >= rlo else 0
            for t in range(2 + 2 * nmid):
                if t < 2:
                    rr = cr - r if t == 0 else cr + r
                    if (t == 1 and r == 0) or rr < 0 or rr >= nrow or c0 > c1:
                        continue
                    j0 = start[rr * ncol + c0]
                    j1 = start[rr * ncol + c1 + 1]
                else:
                    rr = rlo + ((t - 2) >> 1)
                    col = cc - r if (t & 1) == 0 else cc + r
                    if col < 0 or col >= ncol:
                        continue
                    j0 = start[rr * ncol + col]
                    j1 = start[rr * ncol + col + 1]
                for j in range(j0, j1):
                    dx = sx[j] - px
                    dy = sy[j] - py
                    d2 = dx * dx + dy * dy
                    if qz is not None:
                        dz = sz[j] - pz
                        d2 += dz * dz
                    if d2 <= bd[k - 1]:
                        q = sid[j]
                        if (d2 < bd[k - 1] or q < bi[k - 1]) and (qid is None or q != me):
                            # into the list, from its last entry held (not past empty ones)
                            m = held
                            if held < k - 1:
                                held += 1
                            while m > 0 and (bd[m - 1] > d2 or (bd[m - 1] == d2 and bi[m - 1] > q)):
                                bd[m] = bd[m - 1]
                                bi[m] = bi[m - 1]
                                m -= 1
                            bd[m] = d2
                            bi[m] = q
            # every point of a cell outside the rings searched is farther in plan than
            # the edge of the square they cover, less tol; strictly (a point at the
            # k-th distance there may have the lower number)
            lim = min(px - (x0 + (cc - r) * c), x0 + (cc + r + 1) * c - px,
                      py - (y0 + (cr - r) * c), y0 + (cr + r + 1) * c - py) - tol
            if (lim > 0.0 and bd[k - 1] < lim * lim) or r > rmax or bd[k - 1] < np.inf:
                break
            r += 1
        if bd[k - 1] < np.inf and not (lim > 0.0 and bd[k - 1] < lim * lim):
            # k held but the square read does not settle them: rather than whole rings
            # more, the cells of the box of the k-th distance so far about the point
            # (which holds the k nearest: that distance only falls), less the square
            # read; rows nearest first, a row skipped when its gap to the point, less
            # tol, is strictly beyond the k-th distance by then (the same rule as the
            # stop above). The insertion is written out again here: a helper function
            # costs more than it saves in numba's inner loop
            rho = math.sqrt(bd[k - 1]) + tol
            fa = (px - rho - x0) / c
            fb = (px + rho - x0) / c
            ga = (py - rho - y0) / c
            gb = (py + rho - y0) / c
            ca = 0 if fa < 0.0 else (ncol - 1 if fa >= ncol else int(fa))
            cb = 0 if fb < 0.0 else (ncol - 1 if fb >= ncol else int(fb))
            ra = 0 if ga < 0.0 else (nrow - 1 if ga >= nrow else int(ga))
            rb = 0 if gb < 0.0 else (nrow - 1 if gb >= nrow else int(gb))
            reach = max(abs(cr - ra), abs(rb - cr))
            for u in range(2 * reach + 1):
                dd = (u + 1) >> 1           # rows cr, cr + 1, cr - 1, cr + 2, ...
                rr = cr + dd if (u & 1) == 1 else cr - dd
                if rr < ra or rr > rb:
                    continue
                if rr != cr:
                    g = (py - (y0 + (rr + 1) * c) if rr < cr else y0 + rr * c - py) - tol
                    if g > 0.0 and bd[k - 1] < g * g:
                        continue
                for part in range(2):
                    if cr - r <= rr <= cr + r:      # a row of the square: beside it
                        if part == 0:
                            a0, a1 = ca, min(cb, cc - r - 1)
                        else:
                            a0, a1 = max(ca, cc + r + 1), cb
                    elif part == 0:
                        a0, a1 = ca, cb
                    else:
                        continue
                    if a0 > a1:
                        continue
                    for j in range(start[rr * ncol + a0], start[rr * ncol + a1 + 1]):
                        dx = sx[j] - px
                        dy = sy[j] - py
                        d2 = dx * dx + dy * dy
                        if qz is not None:
                            dz = sz[j] - pz
                            d2 += dz * dz
                        if d2 <= bd[k - 1]:
                            q = sid[j]
                            if (d2 < bd[k - 1] or q < bi[k - 1]) and (qid is None or q != me):
                                m = held
                                if held < k - 1:
                                    held += 1
                                while m > 0 and (bd[m - 1] > d2 or (bd[m - 1] == d2 and bi[m - 1] > q)):
                                    bd[m] = bd[m - 1]
                                    bi[m] = bi[m - 1]
                                    m -= 1
                                bd[m] = d2
                                bi[m] = q
        if mode == 0:       # distances and numbers
            for m in range(k):
                out_d[i, m] = math.sqrt(bd[m])
                out_i[i, m] = bi[m]
        elif mode == 1:     # numbers only
            for m in range(k):
                out_i[i, m] = bi[m]
        else:               # mean distance only, summed as numpy's mean over a row sums
            out_d[i, 0] = _row_sum_sqrt(bd, k) / k


@njit(cache=True, nogil=True, inline="always")
def _row_sum_sqrt(bd, k):
    """Sum of ``sqrt(bd[:k])`` in the order of numpy's pairwise summation of a row of
    ``k`` <= 128 values (``np.add.reduce``: sequential below 8 values, else eight running
    sums combined pairwise), so that a mean taken here equals ``d.mean(axis=1)``."""
    if k < 8:
        res = 0.0
        for m in range(k):
            res += math.sqrt(bd[m])
        return res
    r0 = math.sqrt(bd[0])
    r1 = math.sqrt(bd[1])
    r2 = math.sqrt(bd[2])
    r3 = math.sqrt(bd[3])
    r4 = math.sqrt(bd[4])
    r5 = math.sqrt(bd[5])
    r6 = math.sqrt(bd[6])
    r7 = math.sqrt(bd[7])
    m = 8
    while m < k - (k % 8):
        r0 += math.sqrt(bd[m])
        r1 += math.sqrt(bd[m + 1])
        r2 += math.sqrt(bd[m + 2])
        r3 += math.sqrt(bd[m + 3])
        r4 += math.sqrt(bd[m + 4])
        r5 += math.sqrt(bd[m + 5])
        r6 += math.sqrt(bd[m + 6])
        r7 += math.sqrt(bd[m + 7])
        m += 8
    res = ((r0 + r1) + (r2 + r3)) + ((r4 + r5) + (r6 + r7))
    while m < k:
        res += math.sqrt(bd[m])
        m += 1
    return res


#: How much less than the true distance from a point to a cell's edge the searches take
#: it to be, per unit of the largest coordinate magnitude at hand (the grid's, the query
#: point's): far more than the few units in the last place that working out an edge, a
#: bound or a distance may lose (2**-52 each), so that no point is left unread that could
#: be among the k nearest, nor one at the k-th distance with a lower number.
_SLACK = 2.0 ** -40


def _grid_scale(*values: float) -> float:
    # the largest magnitude of a grid's corners (and of its members' heights)
    return max(abs(v) for v in values)


def _knn(index: CellIndex, qx, qy, qz, k: int, skip: "np.ndarray | None", z: "np.ndarray | None", mode: int = 0):
    """The k nearest members of ``index`` to each query point. ``mode`` 0: distances and
    numbers (int64); 1: numbers only (int32, -1 where fewer: a quarter of the memory of
    mode 0, for callers that work the distances out again from coordinates); 2: the mean
    distance of each row (an (n, 1) array, the row's values never stored)."""
    n = len(qx)
    if n == 0 or k == 0 or index.n == 0:
        if mode == 1:
            return None, np.full((n, k), -1, np.int32)
        if mode == 2:
            return np.full((n, 1), np.inf), None
        return np.full((n, k), np.inf), np.full((n, k), -1, np.int64)
    if mode == 1 and index.n >= 2**31:   # pragma: no cover - a tile of 2 billion points
        raise ValueError("more points than 32-bit neighbour numbers hold")
    d = np.empty((n, 1) if mode == 2 else (n, k) if mode == 0 else (1, 1))   # every row is written
    nb = np.empty((n, k), np.int32 if mode == 1 else np.int64) if mode != 2 else np.empty((1, 1), np.int64)
    qx = np.ascontiguousarray(qx, dtype=np.float64)
    qy = np.ascontiguousarray(qy, dtype=np.float64)
    use_z = z is not None
    qz = np.ascontiguousarray(qz, dtype=np.float64) if use_z else None
    sz = np.ascontiguousarray(z[index.sid], dtype=np.float64) if use_z else index.sx
    qid = None if skip is None else np.ascontiguousarray(skip, dtype=np.int64)
    scale = _grid_scale(index.x0, index.y0, index.x0 + index.ncol * index.cell, index.y0 + index.nrow * index.cell)

    def piece(a: int, b: int) -> None:
        _knn_rows(qx, qy, qz, a, b, index.sx, index.sy, sz, index.sid, index.start, index.x0, index.y0,
                  index.cell, index.nrow, index.ncol, scale, k, qid, d, nb, mode)

    run_rows(piece, n)
    return (None if mode == 1 else d), (None if mode == 2 else nb)


@njit(cache=True, nogil=True)
def _voxels(sx, sy, sz, sid, start, nrow, ncol, f, cz):
    """The members of a :class:`CellIndex` (cell by cell) on columns of ``f`` x ``f`` of its
    cells, each split into layers of ``cz`` in height from the column's lowest point up
    (of more where that would make over four layers per point: a stray point far above
    or below costs no more than its share); points without a finite height (never
    anyone's neighbour in 3D) are left out. Returns the coordinates and numbers voxel by
    voxel, the start of each voxel, each column's first voxel, lowest height and layer
    height, and the largest magnitude of a height."""
    nrow2 = (nrow + f - 1) // f
    ncol2 = (ncol + f - 1) // f
    ncell = nrow2 * ncol2
    zlo = np.full(ncell, np.inf)
    hz = np.full(ncell, cz)
    first = np.zeros(ncell + 1, np.int64)
    # each column's lowest point, layer height and layers (the finite heights only)
    m = 0
    zabs = 0.0
    for cell in range(ncell):
        r0 = (cell // ncol2) * f
        c0 = (cell % ncol2) * f
        lo = np.inf
        hi = -np.inf
        npt = 0
        for rr in range(r0, min(r0 + f, nrow)):
            for j in range(start[rr * ncol + c0], start[rr * ncol + min(c0 + f, ncol)]):
                v = sz[j]
                if v - v == 0.0:
                    lo = min(lo, v)
                    hi = max(hi, v)
                    npt += 1
        nl = 0
        if npt:
            zabs = max(zabs, -lo, hi)
            span = hi - lo
            if span > 4.0 * npt * cz:
                hz[cell] = span / (4.0 * npt)
            nl = int(span / hz[cell]) + 1
            zlo[cell] = lo
        first[cell + 1] = first[cell] + nl
        m += npt
    nvox = first[ncell]
    count = np.zeros(nvox + 1, np.int64)
    vp = np.empty((m, 3))     # x, y, z side by side: a voxel's points on few cache lines
    vid = np.empty(m, np.int64)
    # a counting sort of each column's points by layer, into the column's own stretch
    at = 0
    for cell in range(ncell):
        if first[cell + 1] == first[cell]:
            continue
        r0 = (cell // ncol2) * f
        c0 = (cell % ncol2) * f
        zl = zlo[cell]
        h = hz[cell]
        f0 = first[cell]
        for rr in range(r0, min(r0 + f, nrow)):
            for j in range(start[rr * ncol + c0], start[rr * ncol + min(c0 + f, ncol)]):
                v = sz[j]
                if v - v == 0.0:
                    count[f0 + int((v - zl) / h) + 1] += 1
        count[f0] = at
        for u in range(f0, first[cell + 1]):
            count[u + 1] += count[u]
        for rr in range(r0, min(r0 + f, nrow)):
            for j in range(start[rr * ncol + c0], start[rr * ncol + min(c0 + f, ncol)]):
                v = sz[j]
                if v - v == 0.0:
                    t = f0 + int((v - zl) / h)
                    w = count[t]
                    count[t] = w + 1
                    vp[w, 0] = sx[j]
                    vp[w, 1] = sy[j]
                    vp[w, 2] = v
                    vid[w] = sid[j]
        # count[f0 .. f0 + nl - 1] now hold each layer's end: shift them back to starts
        for u in range(first[cell + 1] - 1, f0, -1):
            count[u] = count[u - 1]
        count[f0] = at
        at = count[first[cell + 1]]
    count[nvox] = at
    return vp, vid, count, first, zlo, hz, zabs


@njit(cache=True, nogil=True, inline="always")
def _gap(p, lo, hi, tol):
    # how far p lies outside [lo, hi], less tol (a lower bound of |v - p| as worked out
    # for any v that the bucketing put between lo and hi)
    g = max(lo - p, p - hi) - tol
    return g if g > 0.0 else 0.0


@njit(cache=True, nogil=True)
def _knn3_rows(qx, qy, qz, a, b, vp, vid, vstart, first, zlo, hz, x0, y0, c, nrow, ncol, scale, k, skip_self,
               qid, out_d, out_i, mode):
    bd = np.empty(k)
    bi = np.empty(k, np.int64)
    for i in range(a, b):
        px, py, pz = qx[i], qy[i], qz[i]
        for m in range(k):
            bd[m] = np.inf
            bi[m] = -1
        held = 0            # entries of the list taken (the list's end while fewer than k)
        me = qid[i] if skip_self else -1
        tol = max(scale, abs(px), abs(py), abs(pz)) * _SLACK
        cc = int(math.floor((px - x0) / c))
        cr = int(math.floor((py - y0) / c))
        r = 0
        rmax = max(nrow, ncol) + abs(cc) + abs(cr) + 1
        while pz - pz == 0.0:     # a query without a finite height has no neighbours in 3D
            for rr in range(cr - r, cr + r + 1):
                if rr < 0 or rr >= nrow:
                    continue
                edge = rr == cr - r or rr == cr + r
                step = 1 if (edge or r == 0) else 2 * r
                gy = _gap(py, y0 + rr * c, y0 + (rr + 1) * c, tol)
                col = cc - r
                while col <= cc + r:
                    if col >= 0 and col < ncol:
                        cell = rr * ncol + col
                        f0 = first[cell]
                        nl = first[cell + 1] - f0
                        gx = _gap(px, x0 + col * c, x0 + (col + 1) * c, tol)
                        p2 = gx * gx + gy * gy
                        if nl > 0 and not p2 > bd[k - 1]:
                            zl = zlo[cell]
                            cz = hz[cell]
                            up = min(max(int(math.floor((pz - zl) / cz)), 0), nl - 1)
                            dn = up - 1
                            # the layers of the column in order of their least distance
                            while up < nl or dn >= 0:
                                eu = _gap(pz, zl + up * cz, zl + (up + 1) * cz, tol) if up < nl else np.inf
                                ed = _gap(pz, zl + dn * cz, zl + (dn + 1) * cz, tol) if dn >= 0 else np.inf
                                if eu <= ed:
                                    lay = up
                                    e = eu
                                    up += 1
                                else:
                                    lay = dn
                                    e = ed
                                    dn -= 1
                                if p2 + e * e > bd[k - 1]:
                                    break       # and every layer farther out
                                v = f0 + lay
                                for j in range(vstart[v], vstart[v + 1]):
                                    dx = vp[j, 0] - px
                                    dy = vp[j, 1] - py
                                    d2 = dx * dx + dy * dy
                                    dz = vp[j, 2] - pz
                                    d2 += dz * dz
                                    if d2 > bd[k - 1]:
                                        continue
                                    q = vid[j]      # read only for a point that may enter
                                    if q == me:
                                        continue
                                    if d2 < bd[k - 1] or q < bi[k - 1]:
                                        m = held
                                        if held < k - 1:
                                            held += 1
                                        while m > 0 and (bd[m - 1] > d2 or (bd[m - 1] == d2 and bi[m - 1] > q)):
                                            bd[m] = bd[m - 1]
                                            bi[m] = bi[m - 1]
                                            m -= 1
                                        bd[m] = d2
                                        bi[m] = q
                    col += step
            # a point of a cell outside the rings searched is farther in plan than the
            # edge of the square they cover, less tol (strictly: a tie there could be a
            # lower point number)
            lim = min(px - (x0 + (cc - r) * c), x0 + (cc + r + 1) * c - px,
                      py - (y0 + (cr - r) * c), y0 + (cr + r + 1) * c - py) - tol
            if (lim > 0.0 and bd[k - 1] < lim * lim) or r > rmax:
                break
            r += 1
        if mode == 0:
            for m in range(k):
                out_d[i, m] = math.sqrt(bd[m])
                out_i[i, m] = bi[m]
        else:
            out_d[i, 0] = _row_sum_sqrt(bd, k) / k


#: Members per column of the 3D search's voxels, on average over the index's bounds, and
#: layers per column width (the fastest on the bench yard's tiles; see :func:`_knn3`).
_COLUMN_POINTS = 8.0
_LAYERS = 4.0
#: The voxels are built when k times the members in the queries' own cells is at least
#: this many times the index's members: on the bench yard's tiles the scan of whole
#: columns then costs more than the voxels' counting sort (see :func:`_knn3`).
_VOXEL_LOAD = 16.0


@njit(cache=True, nogil=True)
def _column_load(qx, qy, start, x0, y0, c, nrow, ncol):
    # members in the query points' own cells, summed: what a scan of whole columns reads first
    s = 0
    for i in range(len(qx)):
        cc = int(math.floor((qx[i] - x0) / c))
        cr = int(math.floor((qy[i] - y0) / c))
        if 0 <= cc < ncol and 0 <= cr < nrow:
            s += start[cr * ncol + cc + 1] - start[cr * ncol + cc]
    return s


def _knn3(index: CellIndex, qx, qy, qz, k: int, skip: "np.ndarray | None", z: np.ndarray, mode: int = 0,
          voxels: "bool | None" = None, column_points: float = _COLUMN_POINTS, layers: float = _LAYERS):
    """The k nearest members of ``index`` in 3D to each query point (``z``: the heights of
    all points). ``mode`` 0: distances and numbers; 2: the mean distance of each row (an
    (n, 1) array).

    Two searches give the same answers. On voxels (``voxels`` True): columns of f x f of
    the index's cells, f such that a column holds about ``column_points`` members on
    average, split in height into ``layers`` layers per column width (a counting sort of
    every member); the columns around a point are searched ring by ring, the layers of
    each outward from the point's height, skipping any voxel farther than the k-th
    nearest so far. Or on the index's cells as they are (False), every point of each
    cell read: cheaper for a few queries, dear where points stand in stacks (walls,
    machines). None: voxels when ``k`` times the members in the queries' own cells is
    at least :data:`_VOXEL_LOAD` times the members.
    """
    n = len(qx)
    if n == 0 or k == 0 or index.n == 0:
        if mode == 2:
            return np.full((n, 1), np.inf), None
        return np.full((n, k), np.inf), np.full((n, k), -1, np.int64)
    qx, qy, qz = (np.ascontiguousarray(v, dtype=np.float64) for v in (qx, qy, qz))
    if voxels is None:
        load = _column_load(qx, qy, index.start, index.x0, index.y0, index.cell, index.nrow, index.ncol)
        voxels = k * load >= _VOXEL_LOAD * index.n
    if not voxels:
        return _knn(index, qx, qy, qz, k, skip, z, mode)
    sz = np.ascontiguousarray(z[index.sid], dtype=np.float64)
    f = max(1, int(round(math.sqrt(column_points * index.nrow * index.ncol / index.n))))
    f = min(f, max(index.nrow, index.ncol))
    c = index.cell * f
    cz = c / layers
    nrow, ncol = (index.nrow + f - 1) // f, (index.ncol + f - 1) // f
    vp, vid, vstart, first, zlo, hz, zabs = _voxels(index.sx, index.sy, sz, index.sid, index.start, index.nrow,
                                                    index.ncol, f, cz)
    scale = _grid_scale(index.x0, index.y0, index.x0 + ncol * c, index.y0 + nrow * c, zabs)
    d = np.empty((n, 1) if mode == 2 else (n, k))
    nb = np.empty((n, k), np.int64) if mode == 0 else np.empty((1, 1), np.int64)
    qid = skip if skip is not None else np.zeros(1, np.int64)

    def piece(a: int, b: int) -> None:
        _knn3_rows(qx, qy, qz, a, b, vp, vid, vstart, first, zlo, hz, index.x0, index.y0, c, nrow, ncol,
                   scale, k, skip is not None, qid, d, nb, mode)

    run_rows(piece, n)
    return d, (None if mode == 2 else nb)


def plan_knn(index: CellIndex, qx: np.ndarray, qy: np.ndarray, k: int,
             skip: "np.ndarray | None" = None, dist: bool = True):
    """Distances in plan and numbers (among all points) of the ``k`` nearest members of
    ``index`` to each query point, nearest first; inf and -1 where there are fewer.

    ``skip``: for each query, a point number never returned (the query point itself).
    ``dist`` False: the numbers alone, as int32 (what a caller that works distances out
    again from coordinates needs: :func:`min_envelope`, :func:`below_tests`).
    """
    if not dist:
        return _knn(index, qx, qy, None, k, skip, None, mode=1)[1]
    return _knn(index, qx, qy, None, k, skip, None)


def plan_knn3(index: CellIndex, x: np.ndarray, y: np.ndarray, z: np.ndarray, rows: np.ndarray,
              k: int) -> tuple[np.ndarray, np.ndarray]:
    """3D distances and numbers of the ``k`` nearest members to the points ``rows`` of
    (x, y, z) (the point itself included when it is a member), nearest first; ``z``
    holds the heights of all points (members included)."""
    return _knn3(index, x[rows], y[rows], z[rows], k, None, z)


def knn3_mean(index: CellIndex, x: np.ndarray, y: np.ndarray, z: np.ndarray, rows: np.ndarray,
              k: int) -> np.ndarray:
    """Mean 3D distance of each point of ``rows`` to its ``k`` nearest other members
    (equal to ``d.mean(axis=1)`` of the distances, which are never stored)."""
    d, _ = _knn3(index, x[rows], y[rows], z[rows], k, rows.astype(np.int64), z, mode=2)
    return d[:, 0]


@njit(cache=True, nogil=True, inline="always")
def _plan_dist(x, y, p, q):
    """Distance in plan between points p and q, worked out as the neighbour search does
    (so equal, bit for bit, to the distance it found)."""
    dx = x[q] - x[p]
    dy = y[q] - y[p]
    return math.sqrt(dx * dx + dy * dy)


@njit(cache=True, nogil=True)
def _below_rows(a, b, nb, rows, x, y, z, t, tol, gap, k2, plan_out, deep_out):
    for i in range(a, b):
        p = rows[i]
        zp = z[p]
        n_near = 0
        n_near_above = 0
        n_above = 0
        for j in range(nb.shape[1]):
            q = nb[i, j]
            if q < 0:
                continue
            dj = _plan_dist(x, y, p, q)
            if dj > 1.0:
                continue
            dz = z[q] - zp
            reach = t * dj + tol
            above = dz > reach
            if above:
                n_above += 1
            if dz <= reach + gap:
                n_near += 1
                if above:
                    n_near_above += 1
        plan_out[i] = n_near >= 4 and n_near_above >= 0.9 * n_near
        deep_out[i] = 2 * n_above >= k2


def below_tests(nb: np.ndarray, rows: np.ndarray, x: np.ndarray, y: np.ndarray, z: np.ndarray, t: float,
                tol: float, gap: float, k2: int) -> tuple[np.ndarray, np.ndarray]:
    """The plan and isolation tests of :func:`inventory.survey.ground._below_neighbours`
    for the points ``rows`` with neighbours ``nb`` (point numbers in ``x``, ``y``, ``z``;
    -1: none); plan distances are worked out from the coordinates."""
    n = len(rows)
    plan = np.zeros(n, bool)
    deep = np.zeros(n, bool)

    def piece(a: int, b: int) -> None:
        _below_rows(a, b, nb, rows, x, y, z, t, tol, gap, k2, plan, deep)

    run_rows(piece, n)
    return plan, deep


@njit(cache=True, nogil=True)
def _envelope_rows(a, b, nb, rows, x, y, z, t, out):
    for i in range(a, b):
        p = rows[i]
        e = np.inf
        for j in range(nb.shape[1]):
            q = nb[i, j]
            if q < 0:
                continue
            v = z[q] + t * _plan_dist(x, y, p, q)
            if v < e:
                e = v
        out[i] = e


def min_envelope(nb: np.ndarray, rows: np.ndarray, x: np.ndarray, y: np.ndarray, z: np.ndarray,
                 t: float) -> np.ndarray:
    """``min_j z[q] + t * d(p, q)`` over the neighbours q = ``nb[i, j]`` of each point
    p = ``rows[i]``, d the distance in plan (inf for a row without neighbours)."""
    out = np.empty(len(nb))

    def piece(a: int, b: int) -> None:
        _envelope_rows(a, b, nb, rows, x, y, z, t, out)

    run_rows(piece, len(nb))
    return out


@njit(cache=True, nogil=True)
def _company_rows(a, b, nb, rows, x, y, z, member, r2, out):
    for i in range(a, b):
        p = rows[i]
        found = False
        for j in range(nb.shape[1]):
            q = nb[p, j]
            if q < 0 or not member[q]:
                continue
            d = _plan_dist(x, y, p, q)
            dz = z[q] - z[p]
            if d * d + dz * dz <= r2:
                found = True
                break
        out[i] = found


@njit(cache=True, nogil=True, inline="always")
def _count_within(px, py, pz, sx, sy, sz, start, x0, y0, c, nrow, ncol, r, need):
    # members within r of (px, py, pz) in 3D, counted up to need: the square of r about the
    # point, rows nearest first, one cell more each way than the edges' cells (rounding)
    cr = int(math.floor((py - y0) / c))
    ca = max(int(math.floor((px - r - x0) / c)) - 1, 0)
    cb = min(int(math.floor((px + r - x0) / c)) + 1, ncol - 1)
    ra = max(int(math.floor((py - r - y0) / c)) - 1, 0)
    rb = min(int(math.floor((py + r - y0) / c)) + 1, nrow - 1)
    reach = max(cr - ra, rb - cr, 0)
    n = 0
    if ca > cb:
        return n
    for u in range(2 * reach + 1):
        dd = (u + 1) >> 1           # rows cr, cr + 1, cr - 1, cr + 2, ...
        rr = cr + dd if (u & 1) == 1 else cr - dd
        if rr < ra or rr > rb:
            continue
        for j in range(start[rr * ncol + ca], start[rr * ncol + cb + 1]):
            dx = sx[j] - px
            dy = sy[j] - py
            d2 = dx * dx + dy * dy
            dz = sz[j] - pz
            d2 += dz * dz
            if math.sqrt(d2) <= r:
                n += 1
                if n >= need:
                    return n
    return n


@njit(cache=True, nogil=True)
def _fewer_within_rows(a, b, qx, qy, qz, sx, sy, sz, start, x0, y0, c, nrow, ncol, r_small, r_big, need,
                       few_small, few_big):
    for i in range(a, b):
        px, py, pz = qx[i], qy[i], qz[i]
        # the small radius first: enough there answers both
        small = _count_within(px, py, pz, sx, sy, sz, start, x0, y0, c, nrow, ncol, r_small, need) < need
        few_small[i] = small
        few_big[i] = small and _count_within(px, py, pz, sx, sy, sz, start, x0, y0, c, nrow, ncol, r_big,
                                             need) < need


def fewer_within(index: "CellIndex", x: np.ndarray, y: np.ndarray, z: np.ndarray, rows: np.ndarray,
                 need: int, r_small: float, r_big: float) -> tuple[np.ndarray, np.ndarray]:
    """For each point of ``rows`` of (x, y, z): are fewer than ``need`` members of ``index``
    within ``r_small``, and within ``r_big`` (>= ``r_small``), in 3D, the point itself
    counted when it is a member? The same as the ``need``-th distance of
    :func:`plan_knn3` being beyond each radius (the distances worked out alike), without
    ordering the neighbours: the members within ``r_small`` are counted first, up to
    ``need`` (enough there answers both), and those within ``r_big`` only when fewer; each
    count reads the cells of the square of its radius about the point. ``z`` holds the
    heights of all points."""
    n = len(rows)
    few_small, few_big = np.ones(n, bool), np.ones(n, bool)
    if n == 0 or index.n == 0:
        return few_small, few_big
    qx, qy, qz = (np.ascontiguousarray(v[rows], dtype=np.float64) for v in (x, y, z))
    sz = np.ascontiguousarray(z[index.sid], dtype=np.float64)

    def piece(a: int, b: int) -> None:
        _fewer_within_rows(a, b, qx, qy, qz, index.sx, index.sy, sz, index.start, index.x0, index.y0,
                           index.cell, index.nrow, index.ncol, float(r_small), float(r_big), int(need),
                           few_small, few_big)

    run_rows(piece, n)
    return few_small, few_big


def has_company(nb: np.ndarray, rows: np.ndarray, x: np.ndarray, y: np.ndarray, z: np.ndarray,
                member: np.ndarray, radius: float) -> np.ndarray:
    """For each point p of ``rows``: is one of its neighbours ``nb[p]`` (-1: none) a
    ``member`` within ``radius`` in 3D (the plan distance as the neighbour search found it)?"""
    out = np.zeros(len(rows), bool)

    def piece(a: int, b: int) -> None:
        _company_rows(a, b, nb, rows, x, y, z, member, radius * radius, out)

    run_rows(piece, len(rows))
    return out


@njit(cache=True, nogil=True)
def _outvoted_rows(a, b, nb, rows, z, cls, ground, objects, tol, least, ratio, out):
    for i in range(a, b):
        p = rows[i]
        zp = z[p]
        n_obj = 0
        n_gnd = 0
        for j in range(nb.shape[1]):
            q = nb[p, j]
            if q < 0 or q == p:
                continue
            if abs(z[q] - zp) <= tol:
                c = cls[q]
                if c == ground:
                    n_gnd += 1
                elif objects[c]:
                    n_obj += 1
        out[i] = n_obj >= least and n_obj >= ratio * (n_gnd + 1)


@njit(cache=True, nogil=True)
def _faces_over_rows(a, b, nb, rows, x, y, z, cls, objects, reach, low, high, n, fx, fy):
    for i in range(a, b):
        p = rows[i]
        k = 0
        sx = 0.0
        sy = 0.0
        for j in range(nb.shape[1]):
            q = nb[p, j]
            if q < 0 or q == p or not objects[cls[q]]:
                continue
            dz = z[q] - z[p]
            if dz <= low or dz >= high:
                continue
            dx = x[q] - x[p]
            dy = y[q] - y[p]
            if dx * dx + dy * dy <= reach * reach:
                k += 1
                sx += dx
                sy += dy
        n[i] = k
        fx[i] = sx / k if k else 0.0
        fy[i] = sy / k if k else 0.0


def faces_over(nb: np.ndarray, rows: np.ndarray, x: np.ndarray, y: np.ndarray, z: np.ndarray, cls: np.ndarray,
               objects: np.ndarray, reach: float, low: float, high: float
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """For each point p of ``rows``: of its neighbours ``nb[p]`` (-1: none; p itself left
    out) of a class marked in ``objects``, those within ``reach`` in plan and higher than
    p by more than ``low`` and less than ``high``: their number and mean plan offset
    (x, y) from p (0 where none)."""
    n = np.zeros(len(rows), np.int64)
    fx = np.zeros(len(rows))
    fy = np.zeros(len(rows))
    xf, yf, zf = (np.ascontiguousarray(v, dtype=np.float64) for v in (x, y, z))

    def piece(a: int, b: int) -> None:
        _faces_over_rows(a, b, nb, rows, xf, yf, zf, cls, objects, reach, low, high, n, fx, fy)

    run_rows(piece, len(rows))
    return n, fx, fy


def outvoted(nb: np.ndarray, rows: np.ndarray, z: np.ndarray, cls: np.ndarray, ground: int,
             objects: np.ndarray, tol: float, least: int, ratio: float) -> np.ndarray:
    """For each point p of ``rows``: among its neighbours ``nb[p]`` (-1: none; p itself left
    out) within ``tol`` of its height, are there at least ``least`` of a class marked in
    ``objects`` (a mask over the 256 classes), and at least ``ratio`` times one more than
    those of class ``ground``?"""
    out = np.zeros(len(rows), bool)
    zf = np.ascontiguousarray(z, dtype=np.float64)

    def piece(a: int, b: int) -> None:
        _outvoted_rows(a, b, nb, rows, zf, cls, ground, objects, tol, least, ratio, out)

    run_rows(piece, len(rows))
    return out


@njit(cache=True, nogil=True)
def lattice_triangles(big, u, v, area2, umin, umax, vmin, vmax, tu, tv, found, block):
    """For each open target at lattice point (tu, tv), the last triangle of ``big`` that
    holds it (edges included), written to ``found[-tv, tu]``.

    Triangles are listed by the blocks of ``block`` x ``block`` lattice points their
    bounding boxes overlap, so a target is tested against the triangles near it only.
    """
    if len(big) == 0 or len(tu) == 0:
        return
    u0 = umin[big].min()
    v0 = vmin[big].min()
    nbu = (umax[big].max() - u0) // block + 1
    nbv = (vmax[big].max() - v0) // block + 1
    count = np.zeros(nbu * nbv + 1, np.int64)
    for t in big:
        for bv in range((vmin[t] - v0) // block, (vmax[t] - v0) // block + 1):
            for bu in range((umin[t] - u0) // block, (umax[t] - u0) // block + 1):
                count[bv * nbu + bu + 1] += 1
    for j in range(nbu * nbv):
        count[j + 1] += count[j]
    fill = count[:-1].copy()
    lst = np.empty(count[-1], np.int64)
    for t in big:               # in the order of big: a block's list keeps it
        for bv in range((vmin[t] - v0) // block, (vmax[t] - v0) // block + 1):
            for bu in range((umin[t] - u0) // block, (umax[t] - u0) // block + 1):
                lst[fill[bv * nbu + bu]] = t
                fill[bv * nbu + bu] += 1
    for i in range(len(tu)):
        pu, pv = tu[i], tv[i]
        if pu < u0 or pv < v0:
            continue
        bu = (pu - u0) // block
        bv = (pv - v0) // block
        if bu >= nbu or bv >= nbv:
            continue
        b = bv * nbu + bu
        hit = -1
        for j in range(count[b], count[b + 1]):
            t = lst[j]
            if pu < umin[t] or pu > umax[t] or pv < vmin[t] or pv > vmax[t]:
                continue
            s = 1 if area2[t] > 0 else (-1 if area2[t] < 0 else 0)
            if s == 0:
                continue
            ok = True
            for e in range(3):
                a0 = e
                b0 = (e + 1) % 3
                cr = (u[t, b0] - u[t, a0]) * (pv - v[t, a0]) - (v[t, b0] - v[t, a0]) * (pu - u[t, a0])
                if cr * s < 0:
                    ok = False
                    break
            if ok:
                hit = t
        if hit >= 0:
            found[-pv, pu] = hit


@njit(cache=True, nogil=True)
def cell_lowest(key, z, size):
    """Index of the lowest point of each of ``size`` cells (-1 for an empty cell); of
    equal heights the first point."""
    out = np.full(size, -1, np.int64)
    for i in range(len(key)):
        k = key[i]
        j = out[k]
        if j < 0 or z[i] < z[j]:
            out[k] = i
    return out


@njit(cache=True, nogil=True)
def _grid_envelope_rows(a, b, qx, qy, x0, y0, c, ncol, gf, ax, ay, t, out):
    for i in range(a, b):
        px, py = qx[i], qy[i]
        base = np.int64(math.floor((py - y0) / c)) * ncol + np.int64(math.floor((px - x0) / c))
        # the point's own cell first (mostly the least); a cell cannot give less when its
        # seed plus t times the larger of the two offsets is no less than the least so far
        # (hypot, within an ulp, is never below that offset, a float itself; rounding keeps
        # the products and sums in order): it is not measured
        e = math.hypot(px - ax[base], py - ay[base]) * t + gf[base]
        for dr in (-ncol, 0, ncol):
            for dc in (-1, 0, 1):
                k = base + dr + dc
                if gf[k] >= e or k == base:
                    continue
                dx = px - ax[k]
                dy = py - ay[k]
                if max(abs(dx), abs(dy)) * t + gf[k] >= e:
                    continue
                v = math.hypot(dx, dy) * t + gf[k]
                if v < e:
                    e = v
        out[i] = e


def envelope_at(qx, qy, x0, y0, c, ncol, gf, ax, ay, t):
    """min over the 3 x 3 cells k around each query point of ``gf[k] + t * |q - a_k|``;
    every query's 3 x 3 block must lie inside the grid."""
    out = np.empty(len(qx))
    qx = np.ascontiguousarray(qx, dtype=np.float64)
    qy = np.ascontiguousarray(qy, dtype=np.float64)

    def piece(a: int, b: int) -> None:
        _grid_envelope_rows(a, b, qx, qy, x0, y0, c, ncol, gf, ax, ay, t, out)

    run_rows(piece, len(qx))
    return out


@njit(cache=True, nogil=True)
def _member_rows(a, b, nb, sel, numbers, members, pos, k, nn, mixed):
    # numbers None: nb numbered among all points (compiled apart, without the lookup)
    for i in range(a, b):
        r = sel[i]
        m = False
        for j in range(k):
            q = nb[r, j]
            if numbers is not None and q >= 0:
                q = numbers[q]
            if q < 0 or not members[q]:
                m = True
                nn[i, j] = -1
            else:
                nn[i, j] = pos[q]
        mixed[i] = m


def member_rows(nb: np.ndarray, sel: np.ndarray, members: np.ndarray, pos: np.ndarray, k: int,
                numbers: "np.ndarray | None" = None) -> tuple[np.ndarray, np.ndarray]:
    """Rows ``sel`` of a k-nearest answer ``nb`` (numbered among all points), first ``k``
    columns, neighbours renumbered by ``pos`` (their number among the members), int32; and
    which rows hold a neighbour that is not a member (its number is then -1).

    ``numbers``: ``nb`` is numbered among a subset instead, whose points' numbers among all
    points these are."""
    n = len(sel)
    nn = np.empty((n, k), np.int32)
    mixed = np.empty(n, np.bool_)

    def piece(a: int, b: int) -> None:
        _member_rows(a, b, nb, sel, numbers, members, pos, k, nn, mixed)

    run_rows(piece, n)
    return nn, mixed


@njit(cache=True, nogil=True)
def _mean3_from_plan_rows(a, b, nb, x, y, z, k, out, short):
    bd = np.empty(k)
    bi = np.empty(k, np.int64)
    K = nb.shape[1]
    for i in range(a, b):
        for m in range(k):
            bd[m] = np.inf
            bi[m] = -1
        full = True    # the row holds K neighbours (else it holds every point there is)
        dk = np.inf    # plan distance (squared) of the farthest neighbour in the row
        for j in range(K):
            q = nb[i, j]
            if q < 0:
                full = False
                continue
            dx = x[q] - x[i]
            dy = y[q] - y[i]
            p2 = dx * dx + dy * dy
            if j == K - 1:
                dk = p2
            if q == i:
                continue
            dz = z[q] - z[i]
            d2 = dx * dx + dy * dy + dz * dz
            # the k nearest so far, as in _knn_rows (written out: a shared helper, even
            # inlined by numba, made the search more than twice as slow)
            if d2 < bd[k - 1] or (d2 == bd[k - 1] and q < bi[k - 1]):
                m = k - 1
                while m > 0 and (bd[m - 1] > d2 or (bd[m - 1] == d2 and bi[m - 1] > q)):
                    bd[m] = bd[m - 1]
                    bi[m] = bi[m - 1]
                    m -= 1
                bd[m] = d2
                bi[m] = q
        # Every point outside the row lies at least the row's last plan distance away, in
        # 3D as well: the k nearest in 3D are in the row when the k-th is nearer than that.
        if bi[k - 1] >= 0 and (not full or bd[k - 1] < dk):
            out[i] = _row_sum_sqrt(bd, k) / k
            short[i] = False
        else:
            short[i] = True


def knn3_mean_from_plan(nb: np.ndarray, x: np.ndarray, y: np.ndarray, z: np.ndarray,
                        k: int) -> tuple[np.ndarray, np.ndarray]:
    """:func:`knn3_mean` of every point, from a table ``nb`` of its nearest points in plan
    (:func:`plan_knn` of the same points with ``dist=False``, -1 where fewer), where the
    table answers it exactly: the k nearest others in 3D are all in a point's row when the
    k-th of them is nearer than the row's farthest point in plan (or the row holds every
    point there is). Returns the means (to the bit what :func:`knn3_mean` gives) and the
    mask of the points the table could not answer (their mean is left unset)."""
    n = len(nb)
    out = np.empty(n)
    short = np.empty(n, np.bool_)
    xs, ys, zs = (np.ascontiguousarray(v, dtype=np.float64) for v in (x, y, z))

    def piece(a: int, b: int) -> None:
        _mean3_from_plan_rows(a, b, nb, xs, ys, zs, k, out, short)

    run_rows(piece, n)
    return out, short


@njit(cache=True, nogil=True)
def _radix_sorted(key, maxkey):
    """Indices that sort the non-negative int64 ``key`` (all at most ``maxkey``), equal keys in
    index order (``np.argsort(key, kind="stable")``), and the sorted keys: a least
    significant digit radix sort, one pass per digit of at most 16 bits."""
    n = len(key)
    order = np.arange(n)
    ks = key.copy()
    bits = 0
    while bits < 63 and (maxkey >> bits) > 0:
        bits += 1
    if n < 2 or bits == 0:
        return order, ks
    dmax = 8
    while dmax < 16 and (1 << dmax) < n:    # no more buckets than points (or 256)
        dmax += 1
    passes = (bits + dmax - 1) // dmax
    d = (bits + passes - 1) // passes
    nb = 1 << d
    mask = nb - 1
    ko = np.empty(n, np.int64)
    oo = np.empty(n, np.int64)
    count = np.empty(nb + 1, np.int64)
    for p in range(passes):
        shift = p * d
        count[:] = 0
        for i in range(n):
            count[((ks[i] >> shift) & mask) + 1] += 1
        for j in range(nb):
            count[j + 1] += count[j]
        for i in range(n):
            b = (ks[i] >> shift) & mask
            m = count[b]
            count[b] = m + 1
            ko[m] = ks[i]
            oo[m] = order[i]
        ks, ko = ko, ks
        order, oo = oo, order
    return order, ks


@njit(cache=True, nogil=True)
def _stable_radix_order(key, maxkey):
    return _radix_sorted(key, maxkey)[0]


@njit(cache=True, nogil=True)
def morton_order(x, y, cell):
    """:func:`inventory.survey.clean.spatial_order`: the stable order of the Morton keys of the
    ``cell`` blocks of the points (block numbers from the lowest x and y, their lowest 21
    bits interleaved, x in the even bits)."""
    n = len(x)
    if n == 0:
        return np.zeros(0, np.int64)
    x0 = x.min()
    y0 = y.min()
    key = np.empty(n, np.int64)
    top = 0
    for i in range(n):
        k = 0
        for j in range(2):
            v = np.int64(math.floor(((x[i] - x0) if j == 0 else (y[i] - y0)) / cell)) & 0x1FFFFF
            v = (v | (v << 16)) & 0x0000FFFF0000FFFF
            v = (v | (v << 8)) & 0x00FF00FF00FF00FF
            v = (v | (v << 4)) & 0x0F0F0F0F0F0F0F0F
            v = (v | (v << 2)) & 0x3333333333333333
            v = (v | (v << 1)) & 0x5555555555555555
            k |= v << j
        key[i] = k
        if k > top:
            top = k
    return _stable_radix_order(key, top)


@njit(cache=True, nogil=True)
def _z_less(a, b):
    # numpy's sort order of floats: NaN after everything
    return a < b or (b != b and a == a)


@njit(cache=True, nogil=True)
def _sort_run_by_z(zs, order, lo, hi, zbuf, obuf):
    """Stable sort of ``zs[lo:hi]`` (``order`` alongside): insertion sort of runs of 16,
    then merges through the buffers."""
    m = hi - lo
    if m < 2:
        return
    run = 16
    for a in range(lo, hi, run):
        b = min(a + run, hi)
        for i in range(a + 1, b):
            v = zs[i]
            o = order[i]
            j = i
            while j > a and _z_less(v, zs[j - 1]):
                zs[j] = zs[j - 1]
                order[j] = order[j - 1]
                j -= 1
            zs[j] = v
            order[j] = o
    width = run
    while width < m:
        for a in range(lo, hi, 2 * width):
            mid = min(a + width, hi)
            b = min(a + 2 * width, hi)
            if mid >= b or not _z_less(zs[mid], zs[mid - 1]):
                continue    # already in order
            for i in range(a, mid):
                zbuf[i - a] = zs[i]
                obuf[i - a] = order[i]
            i, j, t = 0, mid, a
            while i < mid - a and j < b:
                if _z_less(zs[j], zbuf[i]):
                    zs[t] = zs[j]
                    order[t] = order[j]
                    j += 1
                else:
                    zs[t] = zbuf[i]
                    order[t] = obuf[i]
                    i += 1
                t += 1
            while i < mid - a:
                zs[t] = zbuf[i]
                order[t] = obuf[i]
                i += 1
                t += 1
        width *= 2


@njit(cache=True, nogil=True)
def _cells_gathered(key, z, maxkey):
    # points cell by cell (in index order within a cell), with their keys and heights
    order, ks = _radix_sorted(key, maxkey)
    n = len(key)
    zs = np.empty(n)
    for i in range(n):
        zs[i] = z[order[i]]
    return order, ks, zs


@njit(cache=True, nogil=True)
def _run_end(ks, a):
    b = a + 1
    while b < len(ks) and ks[b] == ks[a]:
        b += 1
    return b


@njit(cache=True, nogil=True)
def _run_buffers(ks):
    # merge buffers for the longest run of equal keys (a merge's left part may be nearly all of it)
    m = 0
    a = 0
    while a < len(ks):
        b = _run_end(ks, a)
        m = max(m, b - a)
        a = b
    return np.empty(m), np.empty(m, np.int64)


@njit(cache=True, nogil=True)
def _cell_z_sorted(key, z, maxkey):
    # the order of cell_z_order, with the keys and heights in that order
    order, ks, zs = _cells_gathered(key, z, maxkey)
    n = len(key)
    zbuf, obuf = _run_buffers(ks)
    a = 0
    while a < n:
        b = _run_end(ks, a)
        _sort_run_by_z(zs, order, a, b, zbuf, obuf)
        a = b
    return order, ks, zs


@njit(cache=True, nogil=True)
def cell_z_order(key, z, maxkey):
    """``np.lexsort((z, key))`` for non-negative int64 cell numbers ``key`` (at most
    ``maxkey``): points cell by cell, each cell's by height (NaN last), equal heights in index
    order. A radix sort of the cells, then a sort of each cell's heights."""
    return _cell_z_sorted(key, z, maxkey)[0]


@njit(cache=True, nogil=True)
def _plan_cells(x, y, cell):
    # row * (largest column + 1) + column of floor((v - lowest) / cell): the cells of
    # clean.elm_low_points and ground._overhead
    n = len(x)
    x0 = x.min()
    y0 = y.min()
    col = np.empty(n, np.int64)
    row = np.empty(n, np.int64)
    cmax = 0
    for i in range(n):
        col[i] = np.int64(math.floor((x[i] - x0) / cell))
        row[i] = np.int64(math.floor((y[i] - y0) / cell))
        if col[i] > cmax:
            cmax = col[i]
    top = 0
    for i in range(n):
        row[i] = row[i] * (cmax + 1) + col[i]
        if row[i] > top:
            top = row[i]
    return row, top


@njit(cache=True, nogil=True)
def elm_noise(x, y, z, cell, threshold):
    """:func:`inventory.survey.clean.elm_low_points` for two points or more: in each cell, the
    points from the lowest up while the gap to the next point above is at least
    ``threshold`` (the cell's top point never)."""
    key, top = _plan_cells(x, y, cell)
    order, ks, zs = _cells_gathered(key, z, top)
    n = len(z)
    out = np.zeros(n, np.bool_)
    zbuf, obuf = _run_buffers(ks)
    a = 0
    while a < n:
        b = _run_end(ks, a)
        # the lowest point is marked only when the second lowest is threshold above it
        # (NaN sorts last: fewer than two numbers, nothing marked); most cells stop here
        lo1 = lo2 = np.inf
        cnt = 0
        for i in range(a, b):
            v = zs[i]
            if v == v:
                cnt += 1
                if v < lo1:
                    lo2 = lo1
                    lo1 = v
                elif v < lo2:
                    lo2 = v
        if cnt >= 2 and lo2 - lo1 >= threshold:
            _sort_run_by_z(zs, order, a, b, zbuf, obuf)
            for i in range(a, b - 1):
                if zs[i + 1] - zs[i] >= threshold:
                    out[order[i]] = True
                else:
                    break
        a = b
    return out


@njit(cache=True, nogil=True)
def overhead_layers(x, y, z, h, cell, gap):
    """:func:`inventory.survey.ground._overhead` for one point or more: the points of each
    column of ``cell`` by height split into layers where the gap to the point below is at
    least ``gap``; a point is marked when its layer's clearance (that gap, or ``h`` of the
    column's lowest point) is at least ``gap``."""
    key, top = _plan_cells(x, y, cell)
    order, ks, zs = _cells_gathered(key, z, top)
    n = len(z)
    out = np.zeros(n, np.bool_)
    zbuf, obuf = _run_buffers(ks)
    a = 0
    while a < n:
        b = _run_end(ks, a)
        lo = np.inf
        hi = -np.inf
        first = a       # the lowest point, the first in index order of equal heights
        for i in range(a, b):
            v = zs[i]
            if v == v:
                if v < lo:
                    lo = v
                    first = i
                if v > hi:
                    hi = v
        if lo > hi or hi - lo < gap:
            # no gap of ``gap`` inside the column (rounding is monotone: no difference
            # of two of its heights exceeds hi - lo): one layer, its clearance h of the lowest
            ok = h[order[first]] >= gap
            for i in range(a, b):
                out[order[i]] = ok
        else:
            _sort_run_by_z(zs, order, a, b, zbuf, obuf)
            clear = h[order[a]]
            out[order[a]] = clear >= gap
            for i in range(a + 1, b):
                dz = zs[i] - zs[i - 1]
                if dz >= gap:
                    clear = dz
                out[order[i]] = clear >= gap
        a = b
    return out


@njit(cache=True, nogil=True)
def _np_extreme(a, b, larger):
    # np.minimum, or np.maximum when ``larger``: NaN when either is
    if a != a:
        return a
    if b != b:
        return b
    if larger:
        return b if b > a else a
    return b if b < a else a


@njit(cache=True, nogil=True)
def chamfer_passes(g, weight):
    """:func:`inventory.survey.ground._chamfer_min` in place on a float64 grid of at least one
    row and column, with the same floating-point operations in the same order."""
    nrow, ncol = g.shape
    w1 = weight
    w2 = weight * math.sqrt(2.0)
    w5 = weight * math.sqrt(5.0)
    ramp = np.empty(ncol)
    for j in range(ncol):
        ramp[j] = weight * np.float64(j)
    left = np.empty(ncol)
    right = np.empty(ncol)
    for down in (True, False):
        for s in range(nrow):
            r = s if down else nrow - 1 - s
            r1 = r - 1 if down else r + 1
            r2 = r - 2 if down else r + 2
            if s >= 1:
                for j in range(ncol):
                    v = _np_extreme(g[r, j], g[r1, j] + w1, False)
                    if j >= 1:
                        v = _np_extreme(v, g[r1, j - 1] + w2, False)
                    if j + 1 < ncol:
                        v = _np_extreme(v, g[r1, j + 1] + w2, False)
                    if j >= 2:
                        v = _np_extreme(v, g[r1, j - 2] + w5, False)
                    if j + 2 < ncol:
                        v = _np_extreme(v, g[r1, j + 2] + w5, False)
                    if s >= 2:
                        if j >= 1:
                            v = _np_extreme(v, g[r2, j - 1] + w5, False)
                        if j + 1 < ncol:
                            v = _np_extreme(v, g[r2, j + 1] + w5, False)
                    g[r, j] = v
            m = 0.0
            for j in range(ncol):
                v = g[r, j] - ramp[j]
                m = v if j == 0 else _np_extreme(m, v, False)
                left[j] = m
            for j in range(ncol - 1, -1, -1):
                v = g[r, j] + ramp[j]
                m = v if j == ncol - 1 else _np_extreme(m, v, False)
                right[j] = m
            for j in range(ncol):
                g[r, j] = _np_extreme(left[j] + ramp[j], right[j] - ramp[j], False)


@njit(cache=True, nogil=True)
def chamfer_passes_blocked(g, weight, block):
    """:func:`chamfer_passes` on paths that never enter a ``block`` cell: a blocked cell
    keeps its own value and passes nothing on. Paths around a blocked line may turn back
    across rows, which one pair of passes does not follow: the pair is repeated until no
    cell changes (at most ``nrow + ncol`` times). Steps are the 16 chamfer steps, so a
    blocked line must be at least two cells thick to stop the knight steps (the caller
    dilates it)."""
    nrow, ncol = g.shape
    w1 = weight
    w2 = weight * math.sqrt(2.0)
    w5 = weight * math.sqrt(5.0)
    inf = np.inf
    for _ in range(nrow + ncol):
        changed = False
        for down in (True, False):
            for s in range(nrow):
                r = s if down else nrow - 1 - s
                r1 = r - 1 if down else r + 1
                r2 = r - 2 if down else r + 2
                if s >= 1:
                    for j in range(ncol):
                        if block[r, j]:
                            continue
                        v = g[r, j]
                        if not block[r1, j] and g[r1, j] + w1 < v:
                            v = g[r1, j] + w1
                        if j >= 1 and not block[r1, j - 1] and g[r1, j - 1] + w2 < v:
                            v = g[r1, j - 1] + w2
                        if j + 1 < ncol and not block[r1, j + 1] and g[r1, j + 1] + w2 < v:
                            v = g[r1, j + 1] + w2
                        if j >= 2 and not block[r1, j - 2] and g[r1, j - 2] + w5 < v:
                            v = g[r1, j - 2] + w5
                        if j + 2 < ncol and not block[r1, j + 2] and g[r1, j + 2] + w5 < v:
                            v = g[r1, j + 2] + w5
                        if s >= 2:
                            if j >= 1 and not block[r2, j - 1] and g[r2, j - 1] + w5 < v:
                                v = g[r2, j - 1] + w5
                            if j + 1 < ncol and not block[r2, j + 1] and g[r2, j + 1] + w5 < v:
                                v = g[r2, j + 1] + w5
                        if v < g[r, j]:
                            g[r, j] = v
                            changed = True
                # along the row, both ways, the run of free cells between blocked ones
                for j0, j1, dj in ((0, ncol, 1), (ncol - 1, -1, -1)):
                    m = inf
                    for j in range(j0, j1, dj):
                        if block[r, j]:
                            m = inf
                        elif m + w1 < g[r, j]:
                            m += w1
                            g[r, j] = m
                            changed = True
                        else:
                            m = g[r, j]
        if not changed:
            break


@njit(cache=True, nogil=True)
def floor_cells(v, v0, c):
    """``((v - v0) // c).astype(np.int64)``. numpy's float ``//`` (Python's float divmod) is
    the floor of the exact quotient of ``a = v - v0`` by ``c``; ``floor(a / c)`` is the
    same unless ``a / c`` rounds to a whole number (rounding is monotone, so a quotient
    rounded to a non-integer q has the floor of q), where numba's ``//``, the same
    algorithm as numpy's, decides."""
    out = np.empty(len(v), np.int64)
    for i in range(len(v)):
        a = v[i] - v0
        q = a / c
        f = math.floor(q)
        out[i] = np.int64(f) if q != f else np.int64(a // c)
    return out


@njit(cache=True, nogil=True)
def cell_stats(k, z, sel, size):
    """Over the points with ``sel``, per cell ``k`` of ``size`` cells: count, sum of ``z``
    (added in index order, as ``np.bincount`` adds), lowest and highest ``z`` (inf and -inf
    in cells without such points; NaN propagates as in ``np.minimum.at``)."""
    count = np.zeros(size, np.int64)
    total = np.zeros(size)
    lo = np.full(size, np.inf)
    hi = np.full(size, -np.inf)
    for i in range(len(k)):
        if sel[i]:
            j = k[i]
            count[j] += 1
            total[j] += z[i]
            lo[j] = _np_extreme(lo[j], z[i], False)
            hi[j] = _np_extreme(hi[j], z[i], True)
    return count, total, lo, hi
