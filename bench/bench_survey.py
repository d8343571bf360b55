"""Throughput and memory of the survey step against a bare LAZ decode (issue 8).

Usage::

    python bench/bench_survey.py                      # synthetic surveys of 1, 10 and 50 M points,
                                                       # uniform and terrestrial profiles
    python bench/bench_survey.py --sizes 1 10          # millions of points
    python bench/bench_survey.py --profile terrestrial # one profile only
    python bench/bench_survey.py --profile terrestrial \
        --pipeline inventory/survey/pipelines/stockpile-thin.json   # with voxel thinning
    python bench/bench_survey.py --huge                # also 200 M points
    python bench/bench_survey.py --workers 0 1 2       # this process, a Dask cluster of 1 worker, of 2
    python bench/bench_survey.py --one-job-at-a-time   # this process, jobs one after the other
    python bench/bench_survey.py --site sample_site    # a real site's latest survey
    python bench/bench_survey.py --pipeline bench/surface-only.json   # the step without cleaning
                                                       # and classifier (its floor)
    python bench/bench_survey.py --job-points 2000000  # classification jobs of another size

Synthetic surveys are stockyards (``inventory._demo.synthetic.make_yard``, piles, machines,
a gallery, noise) laid side by side, 120 m apart, and written to one LAZ file yard by yard,
so that generating 200 million points needs the memory of one yard. Two profiles of the same
number of points per yard:

* uniform: 100 points/m2 on piles and machines, a sixth of that on the pad;
* terrestrial: five static set-ups per yard, the density falling with the square of the
  range from the nearest one, as a scanner at a fixed angular step places them
  (:func:`terrestrial_yard`: about 500 points/m2 at 3-5 m, 80 at 10-15 m; the shape of a
  static scan, not its near-range density, which would take far more points per yard).
  ``StationRange`` is not stored in the LAZ, so the range gates keep every point.

For each survey it prints, measured in the same run:

* the bare decode: ``laspy`` (lazrs backend) reading the file chunk by chunk, points/s;
* the survey step: ``measure_survey`` end to end (read, place, tile, plan jobs, clean,
  classify, grid, fill, write the GeoTIFFs and the classified LAZ), points/s, its steps and
  the number of classification jobs (``--job-points``: their budget, default
  ``inventory.survey.tiles.JOB_POINTS``);
* their ratio (issue 17 target: at most 10, aim 3);
* the peak resident memory of the process that ran it (``getrusage``), and of the
  largest Dask process when workers ran (sampled with psutil if installed);
* with ``--workers``: 0 is a run in this process as ``measure_survey`` does it by default
  (jobs side by side, a thread per core; with ``--one-job-at-a-time`` one job after the
  other, each job's neighbour queries on every core, what the library's ``workers=1``
  does), N >= 1 a local Dask cluster of N single-threaded worker
  processes, started before the clock starts (its start-up is printed apart) and used
  through ``scheduler=`` as an existing cluster would be; the speed-up of each run over the
  one-worker run (else the first run), and the CPU seconds of the run and its worker
  processes (the machine may be shared: wall times are noisy, compare runs of one
  invocation).

Each measurement runs in a fresh child process, so that one peak does not hide the next.
Numbers only; nothing is asserted.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import resource
import subprocess
import sys
import tempfile
import time
import types
import warnings
from pathlib import Path

DATE = "2026-10-31"
CRS = "EPSG:25832"
#: Points per m2 on piles and machines: a terrestrial scan at 10-30 m range (common practice).
DENSITY = 100.0
#: Spacing of the yards laid side by side (a yard is 110 m x 80 m).
PITCH_M = 120.0


def _peak_rss_mb() -> float:
    # ru_maxrss is in kilobytes on Linux (getrusage(2))
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def write_survey(path: Path, n_points: int, density: float = DENSITY, profile: str = "uniform") -> int:
    """Write about ``n_points`` synthetic stockyard points to one LAZ, a yard at a time.

    ``profile`` "uniform": ``density`` points/m2 on piles and machines everywhere;
    "terrestrial": the same number of points per yard as static scans place them
    (:func:`terrestrial_yard`).
    """
    import numpy as np

    from inventory.io.clouds import CloudWriter
    from inventory._demo.synthetic import make_yard

    first = make_yard(density=density, seed=0, pad_density=density / 6)
    per_yard = len(first.points)
    n_yards = max(1, -(-n_points // per_yard))
    cols = max(1, int(np.ceil(np.sqrt(n_yards))))
    x0, y0 = first.origin
    writer = CloudWriter(path, crs=CRS, offset=(x0 - 10.0, y0 - 10.0, 0.0))
    written = 0
    try:
        for i in range(n_yards):
            if profile == "terrestrial":
                pts = terrestrial_yard(i, per_yard, density)[0]
            else:
                pts = first.points if i == 0 else make_yard(density=density, seed=i, pad_density=density / 6).points
            pts = pts[: n_points - written]
            r, c = divmod(i, cols)
            pts["X"] += c * PITCH_M
            pts["Y"] += r * PITCH_M
            writer.write(pts)
            written += len(pts)
    except BaseException:
        writer.close(ok=False)
        raise
    writer.close()
    return written


#: Scanner set-ups of a yard for the terrestrial profile (metres from the yard's corner).
STATIONS = ((22.0, 18.0), (88.0, 18.0), (22.0, 62.0), (88.0, 62.0), (55.0, 40.0))
#: Range (m) at which the terrestrial profile has the uniform profile's density.
REF_RANGE_M = 15.0


def terrestrial_yard(seed: int, n_target: int, density: float = DENSITY):
    """A yard of about ``n_target`` points as static scans see it: the uniform yard's
    points, each repeated or thinned by ``(REF_RANGE_M / r)^2`` for its range r from the
    nearest station (density falls with the square of range, as for a static scanner at
    a fixed angular step), scaled to the wanted count. Copies are spread over the
    original point's spacing; surface copies take the true surface height there.
    ``StationRange`` holds the range from the station."""
    import numpy as np

    from inventory._demo.synthetic import LABELS, make_yard

    yard = make_yard(density=density, seed=seed, pad_density=density / 6)
    pts, labels = yard.points, yard.labels
    rng = np.random.default_rng(1000 + seed)
    x0, y0 = yard.origin
    sx = np.array([x0 + a for a, _ in STATIONS])
    sy = np.array([y0 + b for _, b in STATIONS])
    d2 = (pts["X"][:, None] - sx[None, :]) ** 2 + (pts["Y"][:, None] - sy[None, :]) ** 2
    r2 = np.maximum(d2.min(axis=1), 0.25)
    w = REF_RANGE_M ** 2 / r2
    copies = np.minimum(rng.poisson(w * n_target / w.sum()), 5000)
    idx = np.repeat(np.arange(len(pts)), copies)
    out = pts[idx]
    half = 0.5 / math.sqrt(density)
    jitter = copies[idx] > 1
    out["X"][jitter] += rng.uniform(-half, half, int(jitter.sum()))
    out["Y"][jitter] += rng.uniform(-half, half, int(jitter.sum()))
    surf = np.isin(labels[idx], (LABELS["pad"], LABELS["pile"])) & jitter
    out["Z"][surf] = yard.surface(out["X"][surf], out["Y"][surf])
    near = np.argmin((out["X"][:, None] - sx[None, :]) ** 2 + (out["Y"][:, None] - sy[None, :]) ** 2, axis=1)
    out["StationRange"] = np.sqrt((out["X"] - sx[near]) ** 2 + (out["Y"] - sy[near]) ** 2
                                  + (out["Z"] - yard.surface(sx[near], sy[near]) - 1.6) ** 2)
    return out, yard.origin


def _decode(files: list[Path]) -> tuple[int, float, str]:
    import laspy

    n, t0 = 0, time.perf_counter()
    backend = ""
    for f in files:
        with laspy.open(f) as r:
            backend = type(getattr(r, "point_source", None)).__name__ if hasattr(r, "point_source") else ""
            for chunk in r.chunk_iterator(1_000_000):
                n += len(chunk)
    return n, time.perf_counter() - t0, backend


def _site(root: Path, files: list[Path]):
    grid = types.SimpleNamespace(cell_size_m=0.5, max_fill_distance_m=3.0, statistic="mean")
    survey = types.SimpleNamespace(default_crs=None, pipeline=None)
    ref = types.SimpleNamespace(folder=files[0].parent, files=files, stations=None)
    return types.SimpleNamespace(root=root, crs=CRS, config=types.SimpleNamespace(grid=grid, survey=survey),
                                 surveys={DATE: ref})


class _WorkerMemory:
    """Peak resident memory of this process's descendants (Dask workers), sampled twice a
    second with psutil when it is installed; 0 when it is not."""

    def __init__(self) -> None:
        import threading

        self.peak_mb = 0.0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    def _run(self) -> None:
        try:
            import psutil
        except ImportError:
            return
        me = psutil.Process()
        while not self._stop.wait(0.5):
            for p in me.children(recursive=True):
                try:
                    self.peak_mb = max(self.peak_mb, p.memory_info().rss / 2**20)
                except psutil.Error:
                    pass

    def stop(self) -> float:
        self._stop.set()
        self._thread.join()
        return self.peak_mb


def _child(args: argparse.Namespace) -> int:
    """One measurement in this (fresh) process; prints one JSON line."""
    from inventory.survey.measure import measure_survey

    if args.site:
        from inventory.site.load import load_site

        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            site = load_site(args.site)
        date = args.date or max(site.surveys)
    else:
        f = Path(args.file)
        site, date = _site(f.parent, [f]), DATE
    files = [Path(p) for p in site.surveys[date].files]
    out: dict = {}
    if args.what == "decode":
        n, dt, backend = _decode(files)
        out.update(points=n, seconds=dt, backend=backend)
    else:
        jobs = {"job_points": args.job_points} if args.job_points is not None else {}
        if args.tile_m is not None:
            jobs["tile_size_m"] = args.tile_m
        watch = _WorkerMemory()
        with tempfile.TemporaryDirectory() as tmp, warnings.catch_warnings():
            warnings.simplefilter("ignore")
            if args.workers:
                from dask.distributed import LocalCluster

                t_up = time.perf_counter()
                cluster = LocalCluster(n_workers=args.workers, threads_per_worker=1, processes=True,
                                       dashboard_address=":0")
                out["cluster_start_s"] = time.perf_counter() - t_up
                t0 = time.perf_counter()
                try:
                    r = measure_survey(site, date, out_dir=tmp, scheduler=cluster.scheduler_address,
                                       pipeline=args.pipeline, **jobs)
                    dt = time.perf_counter() - t0
                finally:
                    cluster.close()
            else:
                here = {"workers": 1} if args.one_job_at_a_time else {}
                t0 = time.perf_counter()
                r = measure_survey(site, date, out_dir=tmp, pipeline=args.pipeline, **jobs, **here)
                dt = time.perf_counter() - t0
        out.update(points=r.points_read, seconds=dt, timings=r.timings, summary=r.format_summary(),
                   children_rss_mb=watch.stop(), jobs=getattr(r, "jobs", 0))
    me, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    out.update(rss_mb=_peak_rss_mb(), cpu_s=me.ru_utime + me.ru_stime + kids.ru_utime + kids.ru_stime)
    print("RESULT " + json.dumps(out), flush=True)
    return 0


def _measure(extra: list[str]) -> dict:
    cmd = [sys.executable, os.path.abspath(__file__), "--child", *extra]
    proc = subprocess.run(cmd, capture_output=True, text=True)
    for line in proc.stdout.splitlines():
        if line.startswith("RESULT "):
            return json.loads(line[7:])
    raise RuntimeError(f"benchmark child failed:\n{proc.stderr[-3000:]}")


def _report(label: str, src: list[str], workers: list[int]) -> None:
    """Decode, then one survey run per entry of ``workers``, each in a fresh process; ``src``
    names the survey and carries the options every run shares."""
    dec = _measure(["decode", *src])
    n = dec["points"]
    rate_dec = n / dec["seconds"]
    print(f"{label}: {n:,} points", flush=True)
    print(f"  bare LAZ decode (laspy {dec['backend'] or 'lazrs'})  {rate_dec:12,.0f} points/s  "
          f"({dec['seconds']:.2f} s)", flush=True)
    first = None
    base = None
    for w in workers:
        run = _measure(["survey", *src, "--workers", str(w)])
        rate = n / run["seconds"]
        steps = ", ".join(f"{k} {v:.1f} s" for k, v in run["timings"].items())
        who = {0: "one job at a time" if "--one-job-at-a-time" in src else "in this process",
               1: "1 Dask worker"}.get(w, f"{w} Dask workers")
        line = (f"  survey step, {who:18s} {rate:12,.0f} points/s  ({run['seconds']:.1f} s: {steps}; "
                f"{run['jobs']} jobs)\n"
                f"    ratio to decode {rate_dec / rate:6.1f}x   peak RSS {run['rss_mb']:,.0f} MB"
                f"   CPU {run['cpu_s']:.0f} s")
        if w >= 1:
            line += (f" (largest worker {run['children_rss_mb']:,.0f} MB; cluster start-up "
                     f"{run['cluster_start_s']:.1f} s, not timed)")
        is_base = w == 1 and base is None
        if is_base:
            base = run["seconds"]
        if first is not None and not is_base:
            ref = base if base is not None else first
            line += f"   speed-up over the {'one-worker' if base is not None else 'first'} run {ref / run['seconds']:.2f}x"
        if first is None:
            first = run["seconds"]
        print(line, flush=True)
    print(f"  {run['summary']}", flush=True)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--site", help="a site folder instead of synthetic surveys")
    ap.add_argument("--date", help="survey date of --site (default: the latest)")
    ap.add_argument("--sizes", type=float, nargs="+", default=[1, 10, 50], help="millions of points")
    ap.add_argument("--huge", action="store_true", help="also 200 million points")
    ap.add_argument("--workers", type=int, nargs="+", default=[0],
                    help="runs to time: 0 in this process, N>=1 a local Dask cluster of N single-threaded "
                         "processes (e.g. --workers 0 1 2)")
    ap.add_argument("--pipeline", help="a survey pipeline JSON instead of the site's (or the packaged "
                    "default); e.g. bench/surface-only.json measures the step without cleaning or classifier")
    ap.add_argument("--profile", nargs="+", choices=("uniform", "terrestrial"), default=["uniform", "terrestrial"],
                    help="synthetic surveys: uniform density, or static stations whose density falls with "
                         "the square of range (both by default)")
    ap.add_argument("--keep", help="folder where the generated LAZ files are written and kept, and "
                    "reused by later runs (default: a temporary folder, removed)")
    ap.add_argument("--job-points", type=int, default=None,
                    help="points a classification job may hold with its buffer (default: the package's JOB_POINTS)")
    ap.add_argument("--tile-m", type=float, default=None,
                    help="tile edge in metres (default: the package's DEFAULT_TILE_M)")
    ap.add_argument("--one-job-at-a-time", action="store_true",
                    help="the in-process run (--workers 0) classifies one job at a time instead of one per core")
    ap.add_argument("--child", nargs="?", const="survey", dest="what", help=argparse.SUPPRESS)
    ap.add_argument("--file", help=argparse.SUPPRESS)
    args, rest = ap.parse_known_args(argv)
    if args.what:
        args.workers = args.workers[0]
        return _child(args)
    pipe = ["--pipeline", os.path.abspath(args.pipeline)] if args.pipeline else []
    if args.job_points is not None:
        pipe += ["--job-points", str(args.job_points)]
    if args.tile_m is not None:
        pipe += ["--tile-m", str(args.tile_m)]
    if args.one_job_at_a_time:
        pipe += ["--one-job-at-a-time"]
    if args.site:
        src = ["--site", args.site] + (["--date", args.date] if args.date else []) + pipe
        _report(f"{args.site} {args.date or 'latest'}", src, args.workers)
        return 0
    sizes = list(args.sizes) + ([200] if args.huge else [])
    keep = Path(args.keep) if args.keep else None
    if keep is not None:
        keep.mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory() as tmp:
        for m in sizes:
            for profile in args.profile:
                n = int(m * 1_000_000)
                tag = "" if profile == "uniform" else f"-{profile}"
                path = (keep or Path(tmp)) / f"survey-{m:g}M{tag}.laz"
                if keep is not None and path.is_file():
                    print(f"reusing {path} ({path.stat().st_size / 1e6:,.0f} MB LAZ)", flush=True)
                else:
                    t0 = time.perf_counter()
                    written = write_survey(path, n, profile=profile)
                    print(f"generated {written:,} points in {time.perf_counter() - t0:.0f} s "
                          f"({path.stat().st_size / 1e6:,.0f} MB LAZ)", flush=True)
                _report(f"synthetic survey {m:g} M, {profile}", ["--file", str(path)] + pipe, args.workers)
                if keep is None:
                    path.unlink()
    return 0


if __name__ == "__main__":
    sys.exit(main())
