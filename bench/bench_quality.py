"""Quality of the survey step on the sample site, against the simulator's truth (issue 17).

Usage::

    python bench/bench_quality.py                    # the repository's sample_site
    python bench/bench_quality.py --site SITE        # another site written by the demo
    python bench/bench_quality.py --seed 7           # the sample site drawn with another seed
                                                     # (same yard, other scan noise, dust and
                                                     # birds), written to a temporary folder
    python bench/bench_quality.py --yard2            # the second invented yard (undulating
                                                     # ground, other piles and machines;
                                                     # inventory._demo.yard2), temporary folder
    python bench/bench_quality.py --yard2 --seed 7   # that yard drawn with another seed
    python bench/bench_quality.py --workers 2        # the survey step on a Dask cluster
    python bench/bench_quality.py --objects          # also each machine, vehicle and
                                                     # structure: points classed surface
    python bench/bench_quality.py --tile-m 200       # another job plan (also --job-points,
                                                     # --buffer-m): how far the results move
                                                     # when only the cut into jobs changes

For each month-end survey with truth labels (``truth/labels-<date>.npz``) it prints, from
:mod:`inventory._demo.quality`: the share of machine and vehicle points kept out of the
surface class, the share of pile points not classed surface, the surface RMS against the
true surface, and for every pile the measured volume against the true one (``truth.json``):
relative error and whether the 95 % interval holds the truth. Issue 17's bars: RMS at most
2.5 cm, objects out at least 99 %, pile points dropped at most 0.2 %, every pile within 1 %
and inside its interval. Numbers only; nothing is asserted.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
import warnings
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--site", default=str(ROOT / "sample_site"), help="a site written by the demo (with truth)")
    ap.add_argument("--seed", type=int, default=None,
                    help="write the sample site with this seed to a temporary folder and measure that instead")
    ap.add_argument("--yard2", action="store_true",
                    help="write the second invented yard (inventory._demo.yard2) to a temporary folder and measure it")
    ap.add_argument("--objects", action="store_true",
                    help="also print, per machine, vehicle and structure, how many of its points were classed surface")
    ap.add_argument("--workers", type=int, default=None, help="Dask worker processes for the survey step")
    ap.add_argument("--tile-m", type=float, default=None, help="the survey step's tile edge (m; default its own)")
    ap.add_argument("--job-points", type=int, default=None, help="the survey step's job budget (points)")
    ap.add_argument("--buffer-m", type=float, default=None, help="the survey step's buffer around a job (m)")
    args = ap.parse_args(argv)
    plan = {k: v for k, v in (("tile_size_m", args.tile_m), ("job_points", args.job_points),
                              ("buffer_m", args.buffer_m)) if v is not None}
    if plan:
        # every survey step of this run (this bench's and the volume report's) with that plan
        import functools

        import inventory.survey.measure as measure

        measure.measure_survey = functools.partial(measure.measure_survey, **plan)
        print("job plan: " + ", ".join(f"{k} {v}" for k, v in plan.items()), flush=True)
    if args.yard2:
        from inventory._demo.yard2 import YARD2_SEED, write_yard2_site

        seed = YARD2_SEED if args.seed is None else args.seed
        with tempfile.TemporaryDirectory() as tmp:
            site = write_yard2_site(Path(tmp) / "yard2", seed=seed)
            print(f"second yard drawn with seed {seed}", flush=True)
            return _measure(site, args.workers, args.objects)
    if args.seed is not None:
        from inventory._demo.sample import write_sample_site

        with tempfile.TemporaryDirectory() as tmp:
            site = write_sample_site(Path(tmp) / "site", seed=args.seed)
            print(f"sample site drawn with seed {args.seed}", flush=True)
            return _measure(site, args.workers, args.objects)
    return _measure(Path(args.site), args.workers, args.objects)


def _measure(root: Path, workers: int | None, objects: bool = False) -> int:
    from inventory._demo.quality import survey_quality, truth_of
    from inventory.site.load import load_site
    from inventory.survey.measure import measure_survey
    from inventory.volume_report import report_volumes

    truth = truth_of(root)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        site = load_site(root)
    dates = sorted(p.stem.removeprefix("labels-") for p in (root / "truth").glob("labels-*.npz"))
    true_volumes = {s["date"]: {pid: p["volume_m3"] for pid, p in s["piles"].items()} for s in truth["surveys"]}
    within, covered, total = 0, 0, 0
    for date in dates:
        with tempfile.TemporaryDirectory() as tmp, warnings.catch_warnings():
            warnings.simplefilter("ignore")
            t0 = time.perf_counter()
            result = measure_survey(site, date, out_dir=tmp, workers=workers)
            dt = time.perf_counter() - t0
            print(f"survey {date} ({result.points_read:,} points, survey step {dt:.1f} s)", flush=True)
            quality = survey_quality(site, date, result)
            print(f"  {quality}", flush=True)
            for o in quality.objects if objects else ():
                print(f"    {o}", flush=True)
            run = report_volumes(root, date, out=Path(tmp) / "volumes", workers=workers)
        for _, row in run.table.iterrows():
            true = true_volumes.get(date, {}).get(row["pile_id"])
            if true is None:
                continue
            err = row["volume_m3"] / true - 1
            inside = abs(row["volume_m3"] - true) <= row["volume_ci95_m3"]
            total += 1
            within += abs(err) <= 0.01
            covered += bool(inside)
            print(f"    {row['pile_id']:4s} {row['volume_m3']:10.1f} m3, true {true:10.1f} m3, error "
                  f"{100 * err:+6.2f} %, 95 % interval +/- {row['volume_ci95_m3']:7.1f} m3 "
                  f"{'holds' if inside else 'MISSES'} the truth"
                  + (f"; flags {row['flags']}" if isinstance(row.get("flags"), str) and row["flags"] else ""),
                  flush=True)
    print(f"pile-surveys within 1 %: {within} of {total}; truth inside the 95 % interval: {covered} of {total}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
