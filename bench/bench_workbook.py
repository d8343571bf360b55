"""Time to write the close workbook and the journal CSV, by number of movements.

Usage::

    python bench/bench_workbook.py                  # 1,000, 10,000 and 50,000 movements
    python bench/bench_workbook.py --sizes 1000     # movement counts

The close is the test suite's three-pile synthetic close (``tests/conftest.py``) with its
movements repeated to the given count (the Movements sheet is what grows with a site's
traffic). For each size it prints the wall time of ``write_workbook`` and
``write_journal_csv`` (best of three) and the workbook's size on disk.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import pandas as pd

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO / "tests"))


def _best(fn, repeat: int = 3) -> float:
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def main(argv: list[str] | None = None) -> int:
    from conftest import _make_close_result

    from inventory.export.journal import write_journal_csv
    from inventory.export.workbook import write_workbook

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[1000, 10000, 50000])
    args = parser.parse_args(argv)
    res = _make_close_result("2026-01")
    base = res.movements
    print(f"{'movements':>10} {'workbook s':>11} {'journal s':>10} {'xlsx MB':>8}")
    with tempfile.TemporaryDirectory() as tmp:
        for n in args.sizes:
            reps = -(-n // len(base))
            res.movements = pd.concat([base] * reps, ignore_index=True).iloc[:n]
            xlsx = Path(tmp) / f"variance-{n}.xlsx"
            t_wb = _best(lambda: write_workbook(res, xlsx))
            t_j = _best(lambda: write_journal_csv(res, Path(tmp) / "journal.csv"))
            print(f"{n:>10,} {t_wb:>11.2f} {t_j:>10.3f} {xlsx.stat().st_size / 1e6:>8.2f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
