"""``python -m inventory.demo.run_demo DIR``: write the invented demo site and check it.

Used by ``make demo``. Writes the site into DIR unless a site is already there, validates it
with the same code as ``inventory check`` and prints where everything went.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Sequence

from .sample import DEFAULT_SEED, write_sample_site

__all__ = ["main"]


def main(argv: Sequence[str] | None = None) -> int:
    """Write (if needed) and check the demo site; return a process exit code."""
    parser = argparse.ArgumentParser(prog="python -m inventory.demo.run_demo", description=__doc__.splitlines()[0])
    parser.add_argument("dir", type=Path, help="folder for the demo site")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help="simulator seed")
    args = parser.parse_args(argv)

    root: Path = args.dir
    if (root / "site.toml").is_file():
        print(f"using the site already in {root}")
    else:
        write_sample_site(root, seed=args.seed)
        print(f"wrote the invented demo site to {root}")
        print(f"  picture of the scenario: {root / 'overview.png'}")

    from ..site import check_site

    report = check_site(root)
    for problem in report.warnings:
        print(f"warning: {problem}")
    if not report.ok:
        for problem in report.errors:
            print(f"error: {problem}", file=sys.stderr)
        return 2
    print(report.site.summary())
    print(f"check: ok ({len(report.warnings)} warning(s))")
    print(f"next: inventory close {root} --period 2026-09, then --period 2026-10")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
