"""Time of hole filling (``fill_windows``): every near cell triangulated against the rim cells only.

Usage::

    python bench/bench_fill.py --laz survey-10M.laz          # the LAZ's points gridded whole
    python bench/bench_fill.py --survey survey-10M.laz \\
        --cache /tmp/raw10M.npz                             # the survey step's own surface
    python bench/bench_fill.py --site sample_site            # every survey of a site
    python bench/bench_fill.py --laz survey-10M.laz --windows 512 1024

Surfaces to fill, on a 0.5 m grid (``--cell``), filled up to 3 m (``--distance``):

* ``--laz``: every point of the file gridded (``grid_points``, cell mean), machines and
  structures included;
* ``--survey``: the unfilled surface the survey step (``measure_survey``, default pipeline)
  hands to the fill, of a LAZ such as ``bench/bench_survey.py --keep`` writes; ``--cache``
  keeps it in an ``.npz`` file and reuses it;
* ``--site``: the same for each survey of a site folder (or ``--date``).

For each it prints, measured in the same run (best of ``--repeat`` runs, alternating): the
wall time of ``fill_windows`` triangulating every near cell (the method before, by making
``fill_corners`` return every near cell) and only the rim cells ``fill_corners`` gives, the
points triangulated, and how the two filled surfaces differ (cells filled, cells whose value
differs by more than 1e-9 m, the largest difference, the net volume of the differences:
choices among cocircular cells). ``--windows`` also times the rim fill with other window
sizes, against the first. The machine may be shared: compare runs of one invocation. Numbers
only; nothing is asserted.
"""

from __future__ import annotations

import argparse
import dataclasses
import tempfile
import time
import types
import warnings
from pathlib import Path

import numpy as np

import inventory.survey.gridding as gridding
from inventory.model.grid import Grid, Surface
from inventory.survey.fill import FILL_WINDOW_CELLS, fill_windows

CRS = "EPSG:25832"


class _Stop(Exception):
    pass


def _from_laz(path: Path, cell: float) -> Surface:
    import laspy

    las = laspy.read(path)
    x, y, z = np.asarray(las.x), np.asarray(las.y), np.asarray(las.z)
    g = Grid.snapped(x.min(), y.min(), x.max(), y.max(), cell=cell, crs=CRS)
    return gridding.grid_points(g, x, y, z)


def _survey_surfaces(site, dates: list[str]) -> list[tuple[str, Surface]]:
    """The unfilled surface ``measure_survey`` hands to the fill, per survey date."""
    import inventory.survey.measure as measure

    got: list[Surface] = []

    def capture(surface, *args, **kwargs):
        got.append(dataclasses.replace(surface, z=surface.z.copy()))
        raise _Stop

    real = measure.fill_windows
    measure.fill_windows = capture
    out = []
    try:
        for date in dates:
            with tempfile.TemporaryDirectory() as tmp, warnings.catch_warnings():
                warnings.simplefilter("ignore")
                try:
                    measure.measure_survey(site, date, out_dir=tmp)
                except _Stop:
                    pass
            out.append((date, got.pop()))
    finally:
        measure.fill_windows = real
    return out


def _from_survey(path: Path, cell: float, cache: Path | None) -> Surface:
    if cache is not None and cache.is_file():
        d = np.load(cache)
        w, n, c, nr, nc = d["grid"]
        g = Grid(float(w), float(n), float(c), int(nr), int(nc), CRS)
        return Surface(g, d["z"], d["count"], d["sd"], np.zeros(g.shape, bool))
    grid = types.SimpleNamespace(cell_size_m=cell, max_fill_distance_m=3.0, statistic="mean")
    survey = types.SimpleNamespace(default_crs=None, pipeline=None)
    ref = types.SimpleNamespace(folder=path.parent, files=[path], stations=None)
    site = types.SimpleNamespace(root=path.parent, crs=CRS, config=types.SimpleNamespace(grid=grid, survey=survey),
                                 surveys={"2026-10-31": ref})
    _, s = _survey_surfaces(site, ["2026-10-31"])[0]
    if cache is not None:
        g = s.grid
        np.savez(cache, z=s.z, count=s.count, sd=s.sd, grid=np.array([g.west, g.north, g.cell, g.nrows, g.ncols]))
    return s


def _fill(surface: Surface, distance: float, rim: bool, window: int) -> tuple[Surface, float, int]:
    """Filled surface, wall seconds, and points triangulated."""
    real_corners, real_at = gridding.fill_corners, gridding._lattice_triangle_at
    points = [0]

    def counted(cells, target):
        points[0] += int(cells.sum())
        return real_at(cells, target)

    if not rim:
        gridding.fill_corners = lambda seeds, near: near
    gridding._lattice_triangle_at = counted
    try:
        t0 = time.perf_counter()
        out, _ = fill_windows(dataclasses.replace(surface, z=surface.z.copy()), distance, window=window)
        dt = time.perf_counter() - t0
    finally:
        gridding.fill_corners, gridding._lattice_triangle_at = real_corners, real_at
    return out, dt, points[0]


def _differ(a: Surface, b: Surface) -> str:
    both = a.filled & b.filled
    net = float((b.z[both] - a.z[both]).sum()) * a.grid.cell_area
    dz = np.abs(a.z[both] - b.z[both])
    return (f"filled cells {int(a.filled.sum()):,} / {int(b.filled.sum()):,} (same cells: "
            f"{np.array_equal(a.filled, b.filled)}), differing > 1e-9 m: {int((dz > 1e-9).sum()):,}, "
            f"> 1 mm: {int((dz > 1e-3).sum()):,}, > 1 cm: {int((dz > 1e-2).sum()):,}, "
            f"max |dz| {dz.max() if dz.size else 0.0:.4f} m, net {net:+.2f} m3")


def report(label: str, surface: Surface, distance: float, repeat: int, windows: list[int]) -> None:
    g = surface.grid
    scanned = surface.count > 0
    print(f"{label}: {g.nrows} x {g.ncols} cells of {g.cell:g} m, {scanned.mean():.1%} scanned, "
          f"fill distance {distance:g} m", flush=True)
    times: dict[str, list[float]] = {"all": [], "rim": []}
    for _ in range(repeat):
        old, t_old, n_old = _fill(surface, distance, False, windows[0])
        new, t_new, n_new = _fill(surface, distance, True, windows[0])
        times["all"].append(t_old)
        times["rim"].append(t_new)
    a, b = min(times["all"]), min(times["rim"])
    print(f"  every near cell  {a:7.2f} s  ({n_old:,} points triangulated)")
    print(f"  rim only         {b:7.2f} s  ({n_new:,} points triangulated)   speed-up {a / b:.1f}x")
    print(f"  {_differ(old, new)}", flush=True)
    for w in windows[1:]:
        best, out, n = np.inf, None, 0
        for _ in range(repeat):
            out, dt, n = _fill(surface, distance, True, w)
            best = min(best, dt)
        print(f"  rim only, window {w}: {best:7.2f} s  ({n:,} points triangulated); against window "
              f"{windows[0]}: {_differ(new, out)}", flush=True)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--laz", nargs="+", default=[], help="LAZ files whose points are gridded whole")
    ap.add_argument("--survey", nargs="+", default=[], help="LAZ files run through the survey step up to the fill")
    ap.add_argument("--cache", help="with one --survey file: .npz where its unfilled surface is kept and reused")
    ap.add_argument("--site", help="a site folder: the unfilled surface of each of its surveys")
    ap.add_argument("--date", nargs="+", help="survey dates of --site (default: all)")
    ap.add_argument("--cell", type=float, default=0.5, help="grid cell, m (--laz, --survey)")
    ap.add_argument("--distance", type=float, default=3.0, help="fill distance, m (--site: the site's)")
    ap.add_argument("--repeat", type=int, default=2, help="runs of each, best taken")
    ap.add_argument("--windows", type=int, nargs="+", default=[FILL_WINDOW_CELLS], help="fill window sizes, cells")
    args = ap.parse_args(argv)
    for f in args.laz:
        report(f"{f} (all points gridded)", _from_laz(Path(f), args.cell), args.distance, args.repeat, args.windows)
    for f in args.survey:
        cache = Path(args.cache) if args.cache and len(args.survey) == 1 else None
        report(f"{f} (survey step's surface)", _from_survey(Path(f), args.cell, cache), args.distance,
               args.repeat, args.windows)
    if args.site:
        from inventory.site.load import load_site

        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            site = load_site(args.site)
        distance = float(site.config.grid.max_fill_distance_m)
        for date, s in _survey_surfaces(site, args.date or sorted(site.surveys)):
            report(f"{args.site} {date}", s, distance, args.repeat, args.windows)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
