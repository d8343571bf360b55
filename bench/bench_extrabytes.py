"""What carrying extra bytes dimensions costs the survey step: the same synthetic survey with
none and with three (a scanner's usual kind: ``Amplitude`` uint16 scaled, ``Reflectance``
float32, ``Deviation`` uint16; 8 bytes a point).

Usage::

    python bench/bench_extrabytes.py               # 2 million points
    python bench/bench_extrabytes.py --size 10     # millions of points
    python bench/bench_extrabytes.py --workers 2   # on a local Dask cluster of 2 workers

The survey is bench_survey.py's uniform synthetic stockyard; the copy with extra dimensions
has the same points and random values in the three dimensions. Each run is a fresh child
process of bench_survey.py (serial unless ``--workers``), the two alternated ``--repeat``
times (default 2); it prints the survey step's time,
its steps, peak resident memory and the bytes a point takes in memory and in the spill
files. Numbers only; nothing is asserted.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

import bench_survey  # noqa: E402

#: (name, type, description, scales, offsets)
DIMS = (("Amplitude", "u2", "echo amplitude dB", [0.01], [-20.0]),
        ("Reflectance", "f4", "reflectance dB", None, None),
        ("Deviation", "u2", "pulse shape deviation", None, None))


def with_extra_dims(src: Path, dest: Path) -> None:
    """Copy ``src`` to ``dest`` chunk by chunk, adding :data:`DIMS` with random values."""
    import copy

    import laspy
    import numpy as np

    rng = np.random.default_rng(0)
    with laspy.open(src) as reader:
        header = copy.deepcopy(reader.header)    # the reader's own header describes its records
        header.add_extra_dims([laspy.ExtraBytesParams(n, t, d, offsets=o, scales=s) for n, t, d, s, o in DIMS])
        with laspy.open(dest, mode="w", header=header) as writer:
            for chunk in reader.chunk_iterator(1_000_000):
                rec = laspy.ScaleAwarePointRecord.zeros(len(chunk), header=header)
                for name in chunk.array.dtype.names:
                    rec.array[name] = chunk.array[name]
                rec.array["Amplitude"] = rng.integers(0, 6000, len(chunk))
                rec.array["Reflectance"] = rng.normal(-5.0, 3.0, len(chunk)).astype("f4")
                rec.array["Deviation"] = rng.integers(0, 60, len(chunk))
                writer.write_points(rec)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=float, default=2.0, help="millions of points")
    ap.add_argument("--workers", type=int, default=0, help="0 serial, N a local Dask cluster of N workers")
    ap.add_argument("--repeat", type=int, default=2, help="runs of each, alternated")
    args = ap.parse_args(argv)
    from inventory.io.clouds import POINT_DTYPE, ExtraDim, points_dtype

    extra = tuple(ExtraDim(n, t) for n, t, *_ in DIMS)
    print(f"bytes a point in memory and in the spill files: {POINT_DTYPE.itemsize} without extra dimensions, "
          f"{points_dtype(extra).itemsize} with these three")
    with tempfile.TemporaryDirectory() as tmp:
        plain, extended = Path(tmp) / "plain" / "survey.laz", Path(tmp) / "extra" / "survey.laz"
        plain.parent.mkdir()
        extended.parent.mkdir()
        t0 = time.perf_counter()
        n = bench_survey.write_survey(plain, int(args.size * 1_000_000))
        with_extra_dims(plain, extended)
        print(f"generated {n:,} points twice in {time.perf_counter() - t0:.0f} s "
              f"(LAZ {plain.stat().st_size / 1e6:,.0f} MB and {extended.stat().st_size / 1e6:,.0f} MB)")
        # alternated, so that a first run's warm-up (compiled kernels cached on disk) and the
        # machine's other work fall on both
        runs = (("no extra dimensions", plain), ("three extra dimensions", extended)) * args.repeat
        for label, path in runs:
            run = bench_survey._measure(["survey", "--file", str(path), "--workers", str(args.workers)])
            steps = ", ".join(f"{k} {v:.1f} s" for k, v in run["timings"].items())
            print(f"  {label:24s} {n / run['seconds']:10,.0f} points/s ({run['seconds']:.1f} s: {steps}); "
                  f"peak RSS {run['rss_mb']:,.0f} MB"
                  + (f", largest worker {run['children_rss_mb']:,.0f} MB" if args.workers else ""), flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
