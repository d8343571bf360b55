"""``python -m inventory._demo.run_demo DIR``: write the invented demo site, check it, close it.

Used by ``make demo``. Writes the site into DIR unless a site is already there, validates it
with the same code as ``inventory check``, closes each of its months that is not closed yet
(as ``inventory close`` does), prints where everything went and the variance history.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Sequence

from inventory._demo.sample import DEFAULT_SEED, write_sample_site

__all__ = ["main"]


def main(argv: Sequence[str] | None = None) -> int:
    """Write (if needed) and check the demo site; return a process exit code."""
    parser = argparse.ArgumentParser(prog="python -m inventory._demo.run_demo", description=__doc__.splitlines()[0])
    parser.add_argument("dir", type=Path, help="folder for the demo site")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help="simulator seed")
    parser.add_argument("--check-only", action="store_true", help="write and check the site, close nothing")
    args = parser.parse_args(argv)

    root: Path = args.dir
    if (root / "site.toml").is_file():
        print(f"using the site already in {root}")
    else:
        write_sample_site(root, seed=args.seed)
        print(f"wrote the invented demo site to {root}")
        print(f"  picture of the scenario: {root / 'overview.png'}")

    from inventory.site.load import check_site

    report = check_site(root)
    for problem in report.warnings:
        print(f"warning: {problem}")
    if not report.ok:
        for problem in report.errors:
            print(f"error: {problem}", file=sys.stderr)
        return 2
    print(report.site.summary())
    print(f"check: ok ({len(report.warnings)} warning(s))")
    if args.check_only:
        return 0

    from inventory.cli import main as cli_main
    from inventory.ledger.store import Ledger

    ledger_path = root / "ledger.sqlite"
    for period in report.site.periods:
        if report.site.survey_for(period) is None:
            continue
        if ledger_path.is_file():
            with Ledger(ledger_path) as ledger:
                if ledger.is_locked(period):
                    print(f"{period} is already closed (inventory reopen {root} --period {period} --reason ... to redo it)")
                    continue
        print(f"\n$ inventory close {root} --period {period}")
        code = cli_main(["close", str(root), "--period", period])
        if code != 0:
            return code
    print(f"\n$ inventory history {root}")
    code = cli_main(["history", str(root)])
    print(f"\nopen {root / 'closes'} for the workbooks, layers, rasters and reports")
    return code


if __name__ == "__main__":
    raise SystemExit(main())
