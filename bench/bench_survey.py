"""Throughput of the survey step against bare laspy LAZ decoding, and peak memory.

Usage: python bench/bench_survey.py [SITE] [--date D]

Without SITE it writes the synthetic yard (inventory.cloud.synthetic) as a survey folder
in a temporary directory, at a few densities. Prints points per second of
(1) ``laspy`` decoding the same LAZ files chunk by chunk, (2) ``measure_survey`` end to
end (read, place, tile, clean, classify, grid, write), and the process's peak resident
memory. Numbers only; nothing is asserted.
"""

from __future__ import annotations

import argparse
import resource
import sys
import tempfile
import time
import types
import warnings
from pathlib import Path

import laspy


def _peak_rss_mb() -> float:
    # ru_maxrss is in kilobytes on Linux (getrusage(2)).
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def _decode_rate(files: list[Path]) -> tuple[int, float]:
    n, t0 = 0, time.perf_counter()
    for f in files:
        with laspy.open(f) as r:
            for chunk in r.chunk_iterator(1_000_000):
                n += len(chunk)
    return n, time.perf_counter() - t0


def _synthetic_site(root: Path, density: float):
    from inventory.cloud.io import write_cloud
    from inventory.cloud.synthetic import make_yard

    folder = root / "surveys" / "2026-10-31"
    folder.mkdir(parents=True)
    yard = make_yard(density=density, pad_density=density / 6)
    write_cloud(folder / "yard.laz", yard.points, "EPSG:25832")
    grid = types.SimpleNamespace(cell_size_m=0.5, max_fill_distance_m=3.0, statistic="mean")
    survey = types.SimpleNamespace(default_crs=None, pipeline=None)
    ref = types.SimpleNamespace(folder=folder, files=[folder / "yard.laz"], stations=None)
    return types.SimpleNamespace(root=root, crs="EPSG:25832",
                                 config=types.SimpleNamespace(grid=grid, survey=survey),
                                 surveys={"2026-10-31": ref}), "2026-10-31"


def _run(site, date: str, label: str) -> None:
    from inventory.survey import measure_survey

    files = list(site.surveys[date].files)
    n, dt = _decode_rate(files)
    with tempfile.TemporaryDirectory() as out, warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t0 = time.perf_counter()
        result = measure_survey(site, date, out_dir=out)
        total = time.perf_counter() - t0
    steps = ", ".join(f"{k} {v:.1f} s" for k, v in result.timings.items())
    print(f"{label}: {n:,} points")
    print(f"  laspy LAZ decode      {n / dt:12,.0f} points/s  ({dt:.2f} s)")
    print(f"  measure_survey        {n / total:12,.0f} points/s  ({total:.2f} s: {steps})")
    print(f"  peak RSS so far       {_peak_rss_mb():12,.0f} MB")
    print(f"  {result.format_summary()}")


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("site", nargs="?", help="a site folder (default: synthetic yards)")
    ap.add_argument("--date", help="survey date (default: the latest)")
    args = ap.parse_args(argv)
    if args.site:
        from inventory.site import load_site

        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            site = load_site(args.site)
        date = args.date or max(site.surveys)
        _run(site, date, f"{args.site} {date}")
        return 0
    for density in (25.0, 100.0):
        with tempfile.TemporaryDirectory() as tmp:
            site, date = _synthetic_site(Path(tmp), density)
            _run(site, date, f"synthetic yard, {density:g} points/m2 on piles and machines")
    return 0


if __name__ == "__main__":
    sys.exit(main())
