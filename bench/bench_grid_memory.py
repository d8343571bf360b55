"""Peak memory of the survey step after classification, on a large surface grid.

Usage::

    python bench/bench_grid_memory.py                  # 35.4 M cells (a 200 M point survey's grid)
    python bench/bench_grid_memory.py --cells 8.7      # million cells
    python bench/bench_grid_memory.py --keep /tmp/gm   # keep (and reuse) the jobs' cell files

The memory of the survey step's last phases grows with the surface grid, not with the
points: what the jobs hand on is their cells. This writes the cells of jobs of 800 x 800
cells (400 m tiles of 0.5 m cells) of a synthetic yard (a sloping surface inside an
irregular outline, small unscanned patches inside it, a few object returns), then runs, each
in a fresh process, the phases of :func:`inventory.survey.measure.measure_survey` after the
jobs: ``grid_tiles`` (the surface grid and the object rules), ``fill_windows`` (hole fill and
the enclosed-gap report) and the two GeoTIFFs. For each phase it prints the peak resident
memory of the process during it (Linux: the peak is reset at the start of each phase), the
memory held when it started (Python, the modules a survey imports, and what the phases
before it hand on), the difference per grid cell, and the time. Numbers only; nothing is asserted.
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
from pathlib import Path

import numpy as np

TILE = 800
CRS = "EPSG:25832"


def _shape(mcells: float) -> tuple[int, int]:
    nr = int(math.sqrt(mcells * 1e6 * 0.8))
    return nr, int(mcells * 1e6 / nr)


def _make(folder: Path, nr: int, nc: int) -> list[str]:
    from inventory.survey.tiles import TileCells

    rng = np.random.default_rng(1)
    rr, cc = np.mgrid[0:nr, 0:nc].astype(np.float32)
    # an irregular outline (scanned inside), holes of a few metres inside it
    u, v = (rr / nr - 0.5) * 2, (cc / nc - 0.5) * 2
    outline = u * u + v * v < 0.9 + 0.08 * np.sin(7 * np.arctan2(u, v))
    holes = np.zeros((nr, nc), bool)
    for r, c, rad in zip(rng.integers(0, nr, 3000), rng.integers(0, nc, 3000), rng.uniform(2, 10, 3000)):
        holes[max(int(r - rad), 0):int(r + rad), max(int(c - rad), 0):int(c + rad)] = True
    scanned = outline & ~holes
    del outline, holes, u, v
    zz = 100.0 + 0.002 * rr + 3 * np.sin(rr / 300) * np.cos(cc / 250)
    del rr, cc
    files = []
    for r0 in range(0, nr, TILE):
        for c0 in range(0, nc, TILE):
            s = (slice(r0, r0 + TILE), slice(c0, c0 + TILE))
            sc = scanned[s]
            if not sc.any():
                continue
            z = np.where(sc, zz[s], np.nan)
            count = np.where(sc, rng.integers(1, 12, sc.shape), 0).astype(np.int32)
            sd = np.where(count >= 2, 0.01, np.nan)
            top, bottom = np.where(sc, z + 0.02, -np.inf), np.where(sc, z - 0.02, np.inf)
            low = np.full(sc.shape, np.inf)
            obj = sc & (rng.random(sc.shape) < 0.003)
            low[obj] = z[obj] - 0.1
            files.append(str(TileCells(r0, c0, z, count, sd, top, bottom, low).save(folder / f"cells_{r0}_{c0}.npz")))
    return files


def _status_mb(key: str) -> float | None:
    try:
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith(key + ":"):
                    return int(line.split()[1]) / 1024
    except OSError:
        pass
    return None


def _mark() -> float:
    """Start a phase: reset the peak to the present (Linux: ``clear_refs`` 5) and return
    the resident memory now."""
    try:
        with open("/proc/self/clear_refs", "w") as f:
            f.write("5")
    except OSError:
        pass
    return _status_mb("VmRSS") or resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def _peak_mb() -> float:
    """Peak resident memory since the last :func:`_mark` (since the start where the peak
    cannot be reset)."""
    return _status_mb("VmHWM") or resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def _child(folder: Path, phase: str, nr: int, nc: int) -> None:
    import inventory.survey.measure  # noqa: F401  the modules a survey run holds
    from inventory.io.rasters import write_coverage, write_surface
    from inventory.model.grid import Grid
    from inventory.survey.fill import fill_windows
    from inventory.survey.tiles import grid_tiles

    files = [Path(p) for p in json.loads((folder / "files.json").read_text())]
    g = Grid(500000.0, 5700000.0 + nr * 0.5, 0.5, nr, nc, CRS)
    out: dict = {}
    base = _mark()
    t0 = time.perf_counter()
    surface = grid_tiles(g, files, g, "mean", "2026-10-31")
    if phase == "grid":
        out.update(base=base, peak=_peak_mb(), seconds=time.perf_counter() - t0)
    else:
        base = _mark()
        t0 = time.perf_counter()
        surface, report = fill_windows(surface, 3.0)
        if phase == "fill":
            out.update(base=base, peak=_peak_mb(), seconds=time.perf_counter() - t0,
                       filled=report.filled_cells, gaps=report.gap_cells)
        else:
            base = _mark()
            t0 = time.perf_counter()
            with tempfile.TemporaryDirectory() as tmp:
                write_surface(surface, Path(tmp) / "surface.tif")
                write_coverage(surface, Path(tmp) / "coverage.tif")
            out.update(base=base, peak=_peak_mb(), seconds=time.perf_counter() - t0)
    print("RESULT " + json.dumps(out), flush=True)


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--cells", type=float, default=35.4, help="million cells of the grid (default 35.4)")
    ap.add_argument("--keep", type=Path, help="folder for the jobs' cell files (kept, and reused when there)")
    ap.add_argument("--child", nargs=2, help=argparse.SUPPRESS)
    args = ap.parse_args()
    nr, nc = _shape(args.cells)
    if args.child:
        _child(Path(args.child[0]), args.child[1], nr, nc)
        return 0
    with tempfile.TemporaryDirectory() as tmp:
        folder = args.keep or Path(tmp)
        folder.mkdir(parents=True, exist_ok=True)
        index = folder / "files.json"
        shape_file = folder / "shape.json"
        if not (index.is_file() and shape_file.is_file() and json.loads(shape_file.read_text()) == [nr, nc]):
            t0 = time.perf_counter()
            index.write_text(json.dumps(_make(folder, nr, nc)))
            shape_file.write_text(json.dumps([nr, nc]))
            print(f"wrote the cells of {len(json.loads(index.read_text()))} jobs in {time.perf_counter() - t0:.0f} s")
        print(f"surface grid {nr:,} x {nc:,} = {nr * nc / 1e6:.1f} M cells of 0.5 m")
        for phase, label in (("grid", "grid_tiles (surface grid, object rules)"),
                             ("fill", "fill_windows (hole fill, gap report)"),
                             ("rasters", "surface and coverage GeoTIFFs")):
            proc = subprocess.run([sys.executable, os.path.abspath(__file__), "--cells", str(args.cells),
                                   "--child", str(folder), phase], capture_output=True, text=True)
            line = next((x for x in proc.stdout.splitlines() if x.startswith("RESULT ")), None)
            if line is None:
                raise RuntimeError(f"phase {phase} failed:\n{proc.stderr[-3000:]}")
            r = json.loads(line[7:])
            per_cell = (r["peak"] - r["base"]) * 2**20 / (nr * nc)
            print(f"  {label:42s} peak RSS {r['peak']:,.0f} MB (at its start {r['base']:,.0f} MB, "
                  f"+{per_cell:.1f} B a cell)  {r['seconds']:.1f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
