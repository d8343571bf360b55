"""Time the classifier's nearest-neighbour queries in 3D on one tile.

Usage::

    python bench/bench_knn3.py                    # a synthetic yard (bench_survey's uniform
                                                  # profile, about 0.5 M points)
    python bench/bench_knn3.py --tile pts.npy     # an (n, 3) array of x, y, z
    python bench/bench_knn3.py --save out.npz     # the answers, to compare two trees

Times (best of ``--repeat``, wall and CPU seconds of the process) of the outlier filter as
the pipeline runs it (:func:`inventory.survey.clean.statistical_outliers` with the surface
stage's table of nearest points in plan), of the 3D queries it leaves to a search (the
mean distance to the 8 nearest of the points the table cannot answer), and of the other
3D queries of the classifier: the nearest point of every point (``knn3_mean`` with k = 1,
as ``ground._isolated`` asks it) and the 4 nearest of a subset's points among the subset
(``plan_knn3``, as ``ground._below_neighbours`` asks it). Only public functions are
called, so the same script times two trees (``PYTHONPATH=tree``) on the same points;
``--save`` keeps the answers for a comparison. Numbers only; nothing is asserted.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from inventory.survey.clean import statistical_outliers
from inventory.survey.ground import plan_table
from inventory.survey.kernels import CellIndex, knn3_mean, knn3_mean_from_plan, plan_knn3


def _cloud(path: "str | None") -> np.ndarray:
    if path:
        return np.load(path)
    from inventory._demo.synthetic import make_yard

    p = make_yard(density=100.0, seed=0, pad_density=100.0 / 6).points
    return np.column_stack([p["X"], p["Y"], p["Z"]]).astype(float)


def _best(fn, repeat: int):
    wall = cpu = np.inf
    out = None
    for _ in range(repeat):
        t, c = time.perf_counter(), time.process_time()
        out = fn()
        wall = min(wall, time.perf_counter() - t)
        cpu = min(cpu, time.process_time() - c)
    return out, wall, cpu


def main(argv: "list[str] | None" = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--tile", help="an .npy file of an (n, 3) array x, y, z (default: a synthetic yard)")
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--save", help="an .npz file for the answers")
    args = ap.parse_args(argv)
    xyz = _cloud(args.tile)
    x, y, z = (np.ascontiguousarray(xyz[:, i], dtype=np.float64) for i in range(3))
    tab = plan_table(x, y)
    xo, yo, zo = x[tab.order], y[tab.order], z[tab.order]
    _, short = knn3_mean_from_plan(tab.plan.nb, xo, yo, zo, 8)
    rest = np.flatnonzero(short)
    use = np.random.default_rng(0).random(len(x)) < 0.9
    rows = np.flatnonzero(use)[::7]
    every = np.arange(len(x))
    runs = {
        "statistical_outliers (8, 2.0, with the plan table)": lambda: statistical_outliers(
            xyz, 8, 2.0, plan=tab.plan.nb, plan_index=tab.plan.index),
        f"knn3_mean k=8 of the {len(rest):,} the table leaves": lambda: knn3_mean(tab.plan.index, xo, yo, zo, rest, 8),
        f"knn3_mean k=1 of all {len(x):,} (index built)": lambda: knn3_mean(CellIndex(x, y, k=8), x, y, z, every, 1),
        f"plan_knn3 k=4 of {len(rows):,} among 90 % (subset)": lambda: plan_knn3(
            tab.plan.index.subset(use[tab.order]), xo, yo, zo, rows, 4),
    }
    for fn in runs.values():      # compile / load the kernels before any clock starts
        fn()
    print(f"{len(x):,} points; best of {args.repeat}")
    answers = {}
    for i, (name, fn) in enumerate(runs.items()):
        out, wall, cpu = _best(fn, args.repeat)
        print(f"  {name:56s} {wall * 1000:8.1f} ms  cpu {cpu * 1000:8.1f} ms")
        for j, a in enumerate(out if isinstance(out, tuple) else (out,)):
            answers[f"r{i}_{j}"] = a
    if args.save:
        np.savez(args.save, **answers)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
