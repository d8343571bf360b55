"""Time the survey step's reading and spilling phase and the jobs' point gathering.

Runs what :func:`inventory.survey.measure.measure_survey` runs before classifying (the
placements, the spill grid, ``_read_into_spill``), then gathers every planned job's points
(:func:`inventory.survey.tiles.job_points`) without classifying them, several times, and
prints the best wall time and CPU seconds of each phase, beside a bare LAZ decode of the
file, and the CPU seconds of the whole run. ``--digest``
also prints a SHA-256 of the spill files and of every job's points, to compare two versions
of the code on the same file (they must agree).

Usage::

    python bench/bench_spill.py FILE.laz [--runs 3] [--digest]
"""

from __future__ import annotations

import argparse
import hashlib
import resource
import sys
import tempfile
import time
import warnings
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_survey import DATE, _decode, _site

from inventory.io.crs import TransformerCache
from inventory.model.grid import Grid
from inventory.site.extent import grid_size_problem
from inventory.survey.measure import (DEFAULT_BUFFER_M, DEFAULT_TILE_M, _extent, _read_into_spill,
                                      _site_crs)
from inventory.survey.placement import survey_placements
from inventory.survey.tiles import JOB_POINTS, TileSpill, block_cells_for, job_points, plan_jobs


def one_run(path: Path, digest: bool) -> dict:
    site = _site(path.parent, [path])
    ref = site.surveys[DATE]
    site_crs = _site_crs(site)
    cell = float(site.config.grid.cell_size_m)
    placements = survey_placements(site, ref, site_crs, TransformerCache())
    extent = _extent(placements)
    assert grid_size_problem(extent, cell) is None
    grid = Grid.snapped(*extent, cell=cell, crs=site.crs)
    tile_cells = max(1, int(round(DEFAULT_TILE_M / cell)))
    out: dict = {}
    with tempfile.TemporaryDirectory() as tmp:
        spill = TileSpill(grid, tile_cells, Path(tmp), block_cells=block_cells_for(tile_cells, cell))
        t0, c0 = time.perf_counter(), time.process_time()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            read = _read_into_spill(placements, spill, 1_000_000, lambda text: None)
        out["read_s"], out["read_cpu"] = time.perf_counter() - t0, time.process_time() - c0
        out["points"] = read.points
        jobs = plan_jobs(spill, DEFAULT_BUFFER_M, JOB_POINTS)
        out["jobs"] = len(jobs)
        h_spill, h_jobs = hashlib.sha256(), hashlib.sha256()
        if digest:
            for t in sorted(spill.counts):
                h_spill.update(spill.path(t).read_bytes())
        t_jobs = c_jobs = 0.0
        gathered = 0
        for j in jobs:
            t0, c0 = time.perf_counter(), time.process_time()
            pts = job_points(spill, j, DEFAULT_BUFFER_M)
            t_jobs += time.perf_counter() - t0
            c_jobs += time.process_time() - c0
            gathered += len(pts)
            if digest:
                h_jobs.update(pts.tobytes())
        out["job_points_s"], out["job_points_cpu"] = t_jobs, c_jobs
        out["gathered"] = gathered
        if digest:
            out["spill_sha256"] = h_spill.hexdigest()[:16]
            out["jobs_sha256"] = h_jobs.hexdigest()[:16]
    return out


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("file", type=Path)
    ap.add_argument("--runs", type=int, default=3)
    ap.add_argument("--digest", action="store_true")
    args = ap.parse_args(argv)
    c0 = time.process_time()
    n, dt, backend = _decode([args.file])
    print(f"bare LAZ decode: {dt:.2f} s (CPU {time.process_time() - c0:.2f} s; {n:,} points, {backend or 'laspy'})",
          flush=True)
    runs = []
    for i in range(args.runs):
        r = one_run(args.file, args.digest and i == 0)
        runs.append(r)
        print(f"run {i + 1}: read and spill {r['read_s']:.2f} s (CPU {r['read_cpu']:.2f} s), "
              f"job points {r['job_points_s']:.2f} s (CPU {r['job_points_cpu']:.2f} s) "
              f"({r['jobs']} jobs, {r['gathered']:,} points gathered)"
              + (f", spill {r['spill_sha256']}, jobs {r['jobs_sha256']}" if "spill_sha256" in r else ""), flush=True)
    me = resource.getrusage(resource.RUSAGE_SELF)
    print(f"best of {len(runs)}: read and spill {min(r['read_s'] for r in runs):.2f} s "
          f"(CPU {min(r['read_cpu'] for r in runs):.2f} s; {runs[0]['points']:,} points), "
          f"job points {min(r['job_points_s'] for r in runs):.2f} s (CPU {min(r['job_points_cpu'] for r in runs):.2f} s); "
          f"CPU {me.ru_utime + me.ru_stime:.1f} s over all runs")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
