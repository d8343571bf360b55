"""Time the exact k-nearest search in plan (``plan_knn``) and the survey step on one tile.

Usage::

    python bench/bench_knn_plan.py                  # a synthetic yard at 100 points/m2
                                                    # on piles, a sixth of that on the
                                                    # pad (about 0.3 M points)
    python bench/bench_knn_plan.py --tile pts.npy   # an (n, 3) array of x, y, z
    python bench/bench_knn_plan.py --no-pipeline    # the searches only

Single-threaded (``inventory.parallel._local.threads = 1``). Prints, best of ``--repeat``
(5), the CPU time of the process (steadier than wall time on a shared machine) per point of ``plan_knn(CellIndex(x, y, k=17), x, y, 17, dist=False)`` (the
surface stage's table of every point's 17 nearest in plan) on the points in their
spatial order, as ``plan_table`` asks, and in the file's order; the same for the ring
search the kernel replaced (kept below as ``_ring_rows``, a copy of the earlier kernel's
plan case, to compare both on the same machine in the same run) and checks that both give
the same table. Then the whole default pipeline on the tile (``engine="builtin"``), best
of ``--pipeline-repeat`` (3). Numbers only; nothing is asserted (the equality is printed).
"""

from __future__ import annotations

import argparse
import math
import time

import numpy as np
from numba import njit

import inventory.parallel
from bench_knn3 import _cloud   # the same tile or yard (this folder is on the path when run)
from inventory.survey.kernels import _SLACK, CellIndex, _grid_scale, plan_knn


@njit(cache=True, nogil=True)
def _ring_rows(qx, qy, sx, sy, sid, start, x0, y0, c, nrow, ncol, scale, k, out_i):
    # the earlier search (plan, numbers only): whole rings of cells, one loop per cell
    bd = np.empty(k)
    bi = np.empty(k, np.int64)
    for i in range(len(qx)):
        px, py = qx[i], qy[i]
        tol = max(scale, abs(px), abs(py)) * _SLACK
        cc = int(math.floor((px - x0) / c))
        cr = int(math.floor((py - y0) / c))
        for m in range(k):
            bd[m] = np.inf
            bi[m] = -1
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
                            dx = sx[j] - px
                            dy = sy[j] - py
                            d2 = dx * dx + dy * dy
                            if d2 < bd[k - 1] or (d2 == bd[k - 1] and q < bi[k - 1]):
                                m = k - 1
                                while m > 0 and (bd[m - 1] > d2 or (bd[m - 1] == d2 and bi[m - 1] > q)):
                                    bd[m] = bd[m - 1]
                                    bi[m] = bi[m - 1]
                                    m -= 1
                                bd[m] = d2
                                bi[m] = q
                    col += step
            lim = min(px - (x0 + (cc - r) * c), x0 + (cc + r + 1) * c - px,
                      py - (y0 + (cr - r) * c), y0 + (cr + r + 1) * c - py) - tol
            if (lim > 0.0 and bd[k - 1] < lim * lim) or r > rmax:
                break
            r += 1
        for m in range(k):
            out_i[i, m] = bi[m]


def _ring(index: CellIndex, x, y, k):
    out = np.empty((len(x), k), np.int32)
    scale = _grid_scale(index.x0, index.y0, index.x0 + index.ncol * index.cell, index.y0 + index.nrow * index.cell)
    _ring_rows(x, y, index.sx, index.sy, index.sid, index.start, index.x0, index.y0, index.cell, index.nrow,
               index.ncol, scale, k, out)
    return out


def _best(fn, repeat: int):
    best = np.inf
    out = None
    for _ in range(repeat):
        t = time.process_time()
        out = fn()
        best = min(best, time.process_time() - t)
    return out, best


def main(argv: "list[str] | None" = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--tile", help="an .npy file of an (n, 3) array x, y, z (default: a synthetic yard)")
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--pipeline-repeat", type=int, default=3)
    ap.add_argument("--no-pipeline", action="store_true", help="time the searches only")
    ap.add_argument("--k", type=int, default=17)
    args = ap.parse_args(argv)
    inventory.parallel._local.threads = 1
    xyz = _cloud(args.tile)
    n, k = len(xyz), args.k
    from inventory.survey.clean import spatial_order

    order = spatial_order(xyz[:, 0], xyz[:, 1])
    print(f"{n:,} points; k = {k}; one thread; best of {args.repeat}")
    for name, pts in (("spatial order", xyz[order]), ("file order", xyz)):
        x, y = (np.ascontiguousarray(pts[:, i], dtype=np.float64) for i in range(2))
        index = CellIndex(x, y, k=k)
        runs = {"plan_knn (rows of a ring as runs)": lambda: plan_knn(index, x, y, k, dist=False),
                "ring search (earlier kernel)": lambda: _ring(index, x, y, k)}
        got = {}
        for label, fn in runs.items():
            fn()                  # compile / load before the clock starts
            got[label], t = _best(fn, args.repeat)
            print(f"  {name:13s} {label:36s} {t * 1e6 / n:6.3f} us/point ({t:.3f} s CPU)")
        a, b = got.values()
        print(f"  {name:13s} same table: {bool(np.array_equal(a, b))}")
    t0 = time.perf_counter()
    CellIndex(np.ascontiguousarray(xyz[:, 0]), np.ascontiguousarray(xyz[:, 1]), k=k)
    print(f"  index build {(time.perf_counter() - t0) * 1e6 / n:.3f} us/point (wall)")
    if not args.no_pipeline:
        from inventory.io.clouds import empty_points
        from inventory.survey.pipeline import load_pipeline

        pts = empty_points(n)
        pts["X"], pts["Y"], pts["Z"] = xyz[:, 0], xyz[:, 1], xyz[:, 2]
        pipe = load_pipeline()
        pipe.run(pts.copy(), "EPSG:25832", engine="builtin")
        _, t = _best(lambda: pipe.run(pts.copy(), "EPSG:25832", engine="builtin"), args.pipeline_repeat)
        print(f"  default pipeline (builtin, one thread): {t:.3f} s CPU, best of {args.pipeline_repeat}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
