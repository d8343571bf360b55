"""Time the classifier's sorting and raster passes, and the default pipeline, on one tile.

Usage::

    python bench/bench_survey_passes.py                       # a synthetic yard (bench_survey's
                                                              # uniform profile, about 0.5 M points)
    python bench/bench_survey_passes.py --tile pts.npy        # an (n, 3) array of x, y, z
    python bench/bench_survey_passes.py --copies 1 4          # also 4 copies side by side, 140 m apart
    python bench/bench_survey_passes.py --save-classes out    # classes to out-<copies>x.npy

The default pipeline (``load_pipeline()``, builtin engine) runs once per cloud with the
functions below wrapped to keep their arguments; each function is then timed on those
arguments (all its calls of that run summed, best of ``--repeat``), and the whole pipeline
best of ``--repeat``. Run it against two trees (``PYTHONPATH=tree``) to compare code
versions on the same points. Numbers only; nothing is asserted.
"""

from __future__ import annotations

import argparse
import copy
import time

import numpy as np

import inventory.survey.clean as clean
import inventory.survey.ground as ground
import inventory.survey.pipeline as pipeline
from inventory.io.clouds import empty_points

#: (module, function name) of the passes timed; elm_low_points is also bound in the pipeline.
TIMED = [(clean, "spatial_order"), (clean, "elm_low_points"), (ground, "_overhead"), (ground, "_chamfer_min"),
         (ground, "_region_cells"), (ground, "_walled_tops"), (ground, "_attached_faces"), (ground, "_spikes")]


def _cloud(path: "str | None") -> np.ndarray:
    if path:
        return np.load(path)
    from inventory._demo.synthetic import make_yard

    p = make_yard(density=100.0, seed=0, pad_density=100.0 / 6).points
    return np.column_stack([p["X"], p["Y"], p["Z"]]).astype(float)


def _run(xyz: np.ndarray) -> np.ndarray:
    pts = empty_points(len(xyz))
    pts["X"], pts["Y"], pts["Z"] = xyz.T
    pts["Classification"] = 1
    out, _ = pipeline.load_pipeline().run(pts, "EPSG:25832", engine="builtin")
    return np.asarray(out["Classification"])


def main(argv: "list[str] | None" = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--tile", help="an .npy file of an (n, 3) array x, y, z (default: a synthetic yard)")
    ap.add_argument("--copies", type=int, nargs="+", default=[1, 4])
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--save-classes", help="prefix of .npy files for the output classes")
    args = ap.parse_args(argv)
    base = _cloud(args.tile)
    _run(base[:2000])     # compile / load the kernels before any clock starts
    originals = {name: getattr(mod, name) for mod, name in TIMED}
    for copies in args.copies:
        xyz = np.concatenate([base + [140.0 * i, 0.0, 0.0] for i in range(copies)])
        calls: dict[str, list] = {}

        def keep(name, fn):
            def wrapped(*a, **k):
                # copies: the classifier changes some arrays in place after the call
                calls.setdefault(name, []).append(copy.deepcopy((a, k)))
                return fn(*a, **k)
            return wrapped

        for mod, name in TIMED:
            setattr(mod, name, keep(name, originals[name]))
        pipeline.elm_low_points = clean.elm_low_points
        cls = _run(xyz)
        for mod, name in TIMED:
            setattr(mod, name, originals[name])
        pipeline.elm_low_points = originals["elm_low_points"]
        if args.save_classes:
            np.save(f"{args.save_classes}-{copies}x.npy", cls)
        best = np.inf
        for _ in range(args.repeat):
            t = time.perf_counter()
            _run(xyz)
            best = min(best, time.perf_counter() - t)
        print(f"{copies} x {len(base):,} points = {len(xyz):,}: pipeline {best:.3f} s "
              f"(best of {args.repeat}); classes {np.bincount(cls, minlength=20)[[1, 2, 7, 18, 19]].tolist()} "
              "(1, 2, 7, 18, 19)")
        for name, fn in originals.items():
            if name not in calls:
                continue
            best = np.inf
            for _ in range(args.repeat):
                t = time.perf_counter()
                for a, k in calls[name]:
                    fn(*a, **k)
                best = min(best, time.perf_counter() - t)
            print(f"  {name:16s} {len(calls[name])} call(s) {best * 1000:9.1f} ms")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
