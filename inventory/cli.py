"""The ``inventory`` command: argument parsing only; every command calls the Python API.

Exit codes: 0 success, 1 a run failed, 2 bad input (the message names file, line or
feature, and field). ``--verbose`` shows tracebacks.
"""

from __future__ import annotations

import argparse
import sys
import traceback
from pathlib import Path
from typing import Callable, Sequence

from . import __version__
from .errors import EXIT_BAD_INPUT, EXIT_OK, EXIT_RUN_FAILED, InputErrors, InventoryError

__all__ = ["main", "build_parser"]

_COMMANDS: dict[str, Callable[[argparse.Namespace], int]] = {}


def _command(name: str):
    def register(func):
        _COMMANDS[name] = func
        return func

    return register


def _out(text: str = "") -> None:
    print(text, flush=True)


def _err(text: str) -> None:
    print(text, file=sys.stderr, flush=True)


# ----------------------------------------------------------------------------- commands
@_command("check")
def _cmd_check(args: argparse.Namespace) -> int:
    from .site import check_site

    report = check_site(args.site)
    for problem in report.warnings:
        _err(f"warning: {problem}")
    if not report.ok:
        for problem in report.errors:
            _err(f"error: {problem}")
        _err(f"{len(report.errors)} error(s), {len(report.warnings)} warning(s): the site is not ready")
        return EXIT_BAD_INPUT
    assert report.site is not None
    _out(report.site.summary())
    _out(f"ok: {len(report.warnings)} warning(s)")
    return EXIT_OK


# ----------------------------------------------------------------------------- parser
def build_parser() -> argparse.ArgumentParser:
    """The argument parser (exposed for documentation and tests)."""
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("-v", "--verbose", action="store_true", help="show tracebacks on errors")

    parser = argparse.ArgumentParser(
        prog="inventory",
        description="Close a bulk-material site's stock books from laser scans and weighed movements.",
        parents=[common],
    )
    parser.add_argument("--version", action="version", version=f"inventory {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)

    p = sub.add_parser("check", parents=[common], help="validate a site folder, change nothing",
                       description="Validate everything in a site folder and print a summary, or every problem found. Writes nothing.")
    p.add_argument("site", type=Path, metavar="SITE", help="site folder")
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return _COMMANDS[args.command](args)
    except InputErrors as err:
        if args.verbose:
            traceback.print_exc()
        for problem in err.problems:
            if problem.severity == "error":
                _err(f"error: {problem}")
        return EXIT_BAD_INPUT
    except InventoryError as err:
        if args.verbose:
            traceback.print_exc()
        _err(f"error: {err}")
        return err.exit_code
    except KeyboardInterrupt:
        _err("interrupted")
        return EXIT_RUN_FAILED


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
