"""Compiled kernels of the survey step's hot loops (numba, CPU only).

Each kernel is compiled once per machine (``cache=True`` keeps the machine code beside the
module when the folder is writable) and runs without the GIL; :func:`run_rows` splits the
rows of a job over :func:`inventory.parallel.job_threads` threads, so a serial run uses
the cores and tiles running on threads or Dask workers share them, with results that do
not depend on how the rows were split.

* :class:`CellIndex` / :func:`plan_knn`: the k nearest points in plan (optionally among
  the members of a subset) of any rows, from a grid of cells: the cells around a point
  are searched ring by ring until no cell left can hold a nearer point. Exact, like a
  k-d tree query; equal distances are ordered by point index. The same search answers
  the k nearest in 3D (:func:`knn3_mean`): a cell ring r cells out lies at least
  ``r * cell`` away in plan, so in 3D as well.
* :func:`below_tests`, :func:`min_envelope`: the per-point tests of
  :mod:`inventory.survey.ground` over those neighbours, one pass per point with no
  temporary arrays of points by neighbours.
* :func:`cell_lowest`, :func:`envelope_at`: the seeds of the slope envelope's grid and the
  envelope at query points (:class:`inventory.survey.ground._EnvelopeGrid`).
* :func:`lattice_triangles`: the lattice cells inside large triangles of the hole fill
  (:func:`inventory.survey.gridding._linear_on_lattice`).
"""

from __future__ import annotations

import math
import os
from concurrent.futures import ThreadPoolExecutor
from typing import Callable

import numpy as np
from numba import njit

from inventory.parallel import job_threads

__all__ = ["CellIndex", "plan_knn", "plan_knn3", "knn3_mean", "cell_lowest", "envelope_at", "member_rows", "below_tests", "min_envelope", "lattice_triangles",
           "run_rows"]

#: Rows per piece when the rows of a job are split over threads (load balance).
_PIECE = 65536


def run_rows(fn: Callable[[int, int], None], n: int) -> None:
    """Call ``fn(start, stop)`` on pieces of ``range(n)``, on :func:`job_threads` threads.

    ``fn`` writes its rows' results into arrays it holds; pieces never overlap, so the
    result is the same however many threads run.
    """
    pieces = [(a, min(a + _PIECE, n)) for a in range(0, n, _PIECE)]
    threads = job_threads()
    if threads < 1:     # -1: every core (SciPy's workers=-1)
        threads = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
    threads = min(threads, len(pieces))
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


@njit(cache=True, nogil=True)
def _knn_rows(qx, qy, qz, use_z, a, b, sx, sy, sz, sid, start, x0, y0, c, nrow, ncol, k, skip_self, qid,
              out_d, out_i):
    bd = np.empty(k)
    bi = np.empty(k, np.int64)
    for i in range(a, b):
        px, py, pz = qx[i], qy[i], qz[i]
        cc = int(math.floor((px - x0) / c))
        cr = int(math.floor((py - y0) / c))
        for m in range(k):
            bd[m] = np.inf
            bi[m] = -1
        me = qid[i] if skip_self else -1
        r = 0
        rmax = max(nrow, ncol) + abs(cc) + abs(cr) + 1
        while True:
            for rr in range(cr - r, cr + r + 1):
                if rr < 0 or rr >= nrow:
                    continue
                edge = rr == cr - r or rr == cr + r
                step = 1 if (edge or r == 0) else 2 * r
                col = cc - r
                while col <= cc + r:
                    if col >= 0 and col < ncol:
                        cell = rr * ncol + col
                        for j in range(start[cell], start[cell + 1]):
                            q = sid[j]
                            if q == me:
                                continue
                            dx = sx[j] - px
                            dy = sy[j] - py
                            d2 = dx * dx + dy * dy
                            if use_z:
                                dz = sz[j] - pz
                                d2 += dz * dz
                            if d2 < bd[k - 1] or (d2 == bd[k - 1] and q < bi[k - 1]):
                                m = k - 1
                                while m > 0 and (bd[m - 1] > d2 or (bd[m - 1] == d2 and bi[m - 1] > q)):
                                    bd[m] = bd[m - 1]
                                    bi[m] = bi[m - 1]
                                    m -= 1
                                bd[m] = d2
                                bi[m] = q
                    col += step
            # every point of a cell outside the rings searched is farther in plan than
            # the edge of the square they cover
            lim = min(px - (x0 + (cc - r) * c), x0 + (cc + r + 1) * c - px,
                      py - (y0 + (cr - r) * c), y0 + (cr + r + 1) * c - py)
            if bd[k - 1] <= lim * lim or r > rmax:
                break
            r += 1
        for m in range(k):
            out_d[i, m] = math.sqrt(bd[m])
            out_i[i, m] = bi[m]


def _knn(index: CellIndex, qx, qy, qz, k: int, skip: "np.ndarray | None", z: "np.ndarray | None"):
    n = len(qx)
    if n == 0 or k == 0 or index.n == 0:
        return np.full((n, k), np.inf), np.full((n, k), -1, np.int64)
    d = np.empty((n, k))                # every row is written by _knn_rows
    nb = np.empty((n, k), np.int64)
    qx = np.ascontiguousarray(qx, dtype=np.float64)
    qy = np.ascontiguousarray(qy, dtype=np.float64)
    use_z = z is not None
    qz = np.ascontiguousarray(qz, dtype=np.float64) if use_z else qx
    sz = np.ascontiguousarray(z[index.sid], dtype=np.float64) if use_z else index.sx
    qid = skip if skip is not None else np.zeros(1, np.int64)

    def piece(a: int, b: int) -> None:
        _knn_rows(qx, qy, qz, use_z, a, b, index.sx, index.sy, sz, index.sid, index.start, index.x0, index.y0,
                  index.cell, index.nrow, index.ncol, k, skip is not None, qid, d, nb)

    run_rows(piece, n)
    return d, nb


def plan_knn(index: CellIndex, qx: np.ndarray, qy: np.ndarray, k: int,
             skip: "np.ndarray | None" = None) -> tuple[np.ndarray, np.ndarray]:
    """Distances in plan and numbers (among all points) of the ``k`` nearest members of
    ``index`` to each query point, nearest first; inf and -1 where there are fewer.

    ``skip``: for each query, a point number never returned (the query point itself).
    """
    return _knn(index, qx, qy, None, k, skip, None)


def plan_knn3(index: CellIndex, x: np.ndarray, y: np.ndarray, z: np.ndarray, rows: np.ndarray,
              k: int) -> tuple[np.ndarray, np.ndarray]:
    """3D distances and numbers of the ``k`` nearest members to the points ``rows`` of
    (x, y, z) (the point itself included when it is a member), nearest first; ``z``
    holds the heights of all points (members included)."""
    return _knn(index, x[rows], y[rows], z[rows], k, None, z)


def knn3_mean(index: CellIndex, x: np.ndarray, y: np.ndarray, z: np.ndarray, rows: np.ndarray,
              k: int) -> np.ndarray:
    """Mean 3D distance of each point of ``rows`` to its ``k`` nearest other members."""
    d, _ = _knn(index, x[rows], y[rows], z[rows], k, rows.astype(np.int64), z)
    return d.mean(axis=1)


@njit(cache=True, nogil=True)
def _below_rows(a, b, d, nb, z, rows, t, tol, gap, k2, plan_out, deep_out):
    for i in range(a, b):
        zp = z[rows[i]]
        n_near = 0
        n_near_above = 0
        n_above = 0
        for j in range(d.shape[1]):
            q = nb[i, j]
            if q < 0:
                continue
            dj = d[i, j]
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


def below_tests(d: np.ndarray, nb: np.ndarray, z: np.ndarray, rows: np.ndarray, t: float, tol: float,
                gap: float, k2: int) -> tuple[np.ndarray, np.ndarray]:
    """The plan and isolation tests of :func:`inventory.survey.ground._below_neighbours`
    for the points ``rows`` with neighbours ``nb`` (point numbers) at plan distances ``d``."""
    n = len(rows)
    plan = np.zeros(n, bool)
    deep = np.zeros(n, bool)

    def piece(a: int, b: int) -> None:
        _below_rows(a, b, d, nb, z, rows, t, tol, gap, k2, plan, deep)

    run_rows(piece, n)
    return plan, deep


@njit(cache=True, nogil=True)
def _envelope_rows(a, b, d, nb, z, t, out):
    for i in range(a, b):
        e = np.inf
        for j in range(d.shape[1]):
            q = nb[i, j]
            if q < 0:
                continue
            v = z[q] + t * d[i, j]
            if v < e:
                e = v
        out[i] = e


def min_envelope(d: np.ndarray, nb: np.ndarray, z: np.ndarray, t: float) -> np.ndarray:
    """``min_j z[nb[i, j]] + t * d[i, j]`` for every row (inf for a row without neighbours)."""
    out = np.empty(len(d))

    def piece(a: int, b: int) -> None:
        _envelope_rows(a, b, d, nb, z, t, out)

    run_rows(piece, len(d))
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
        e = np.inf
        for dr in (-ncol, 0, ncol):
            for dc in (-1, 0, 1):
                k = base + dr + dc
                v = math.hypot(px - ax[k], py - ay[k]) * t + gf[k]
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
def _member_rows(a, b, d, nb, sel, members, pos, k, dd, nn, mixed):
    for i in range(a, b):
        r = sel[i]
        m = False
        for j in range(k):
            q = nb[r, j]
            dd[i, j] = d[r, j]
            if q < 0 or not members[q]:
                m = True
                nn[i, j] = -1
            else:
                nn[i, j] = pos[q]
        mixed[i] = m


def member_rows(d: np.ndarray, nb: np.ndarray, sel: np.ndarray, members: np.ndarray, pos: np.ndarray, k: int
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Rows ``sel`` of a k-nearest answer (``d``, ``nb`` numbered among all points), first
    ``k`` columns, neighbours renumbered by ``pos`` (their number among the members); and
    which rows hold a neighbour that is not a member (its number is then -1)."""
    n = len(sel)
    dd = np.empty((n, k))
    nn = np.empty((n, k), np.int64)
    mixed = np.empty(n, np.bool_)

    def piece(a: int, b: int) -> None:
        _member_rows(a, b, d, nb, sel, members, pos, k, dd, nn, mixed)

    run_rows(piece, n)
    return dd, nn, mixed
