"""The ``inventory`` command: argument parsing only; every command calls the Python API.

Exit codes: 0 success, 1 a run failed, 2 bad input (the message names file, line or
feature, and field). ``--verbose`` shows tracebacks.
"""

from __future__ import annotations

import argparse
import os
import signal
import sys
import threading
import traceback
from pathlib import Path
from typing import Callable, Sequence

from inventory._version import __version__
from inventory.errors import EXIT_BAD_INPUT, EXIT_OK, EXIT_RUN_FAILED, InputError, InputErrors, InventoryError

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
    from inventory.site.load import check_site

    report = check_site(args.site)
    pipeline = report.site.config.survey.pipeline if report.site is not None else None
    if pipeline is not None:
        # parsed here, not by the site loader: the stages are the survey step's
        from inventory.survey.pipeline import pipeline_problems

        inside = pipeline.is_relative_to(report.site.root)   # outside only with [paths] allow_outside
        shown = args.site / pipeline.relative_to(report.site.root) if inside else pipeline
        report.problems += pipeline_problems(pipeline, str(shown))
    report.problems += _close_target_problems(args.site, report.site.config.raw if report.site is not None else None)
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


def _close_target_problems(site: Path, raw: dict | None) -> list:
    """What a close would refuse before any work in what it writes, read without writing: the
    site's ledger file (unless site.toml names a shared ledger) and ``closes/``."""
    from inventory.errors import Problem
    from inventory.ledger.store import ledger_file_problem
    from inventory.model.period import Period

    problems = []
    shared = isinstance(raw, dict) and isinstance(raw.get("ledger"), dict) and bool(raw["ledger"].get("url"))
    why = None if shared else ledger_file_problem(site / "ledger.sqlite")
    if why:
        problems.append(Problem(str(site / "ledger.sqlite"), None, None, why))
    closes = site / "closes"
    if (closes.exists() or closes.is_symlink()) and not closes.is_dir():
        problems.append(Problem(str(closes), None, None,
                                "is not a folder; the close keeps its outputs in the folder closes/"))
    elif closes.is_dir():
        for entry in sorted(closes.iterdir()):
            if Period.is_period(entry.name) and not entry.is_dir():
                problems.append(Problem(str(entry), None, None, f"is not a folder; the outputs of {entry.name} go "
                                                                "into a folder of this name: move it away"))
    return problems


def _progress(args: argparse.Namespace):
    """Progress lines on a terminal (stderr), silence otherwise."""
    if getattr(args, "quiet", False) or not sys.stderr.isatty():
        return None
    return lambda text: _err(f"... {text}")


@_command("sample")
def _cmd_sample(args: argparse.Namespace) -> int:
    from inventory._demo import write_sample_site

    dest = write_sample_site(args.dir, seed=args.seed) if args.seed is not None else write_sample_site(args.dir)
    _out(f"wrote the invented sample site to {dest}")
    _out(f"next: inventory check {dest}")
    return EXIT_OK


@_command("survey")
def _cmd_survey(args: argparse.Namespace) -> int:
    from inventory.site.load import load_site
    from inventory.survey.measure import measure_surveys

    site = load_site(args.site)
    dates = sorted(site.surveys) if args.all else list(dict.fromkeys(args.date or []))
    if not dates:
        _err("error: name a survey with --date YYYY-MM-DD (repeatable) or give --all"
             if not args.all else f"error: {site.root / 'surveys'}: no survey folder")
        return EXIT_BAD_INPUT
    if args.out is not None:
        out_dirs = [args.out] if len(dates) == 1 else [args.out / d for d in dates]
    else:
        out_dirs = [site.root / "surveys-processed" / d for d in dates]
    for out_dir in out_dirs:
        _output_folder(out_dir, "--out" if args.out is not None else None)
    results = measure_surveys(site, dates, out_dirs, progress=_progress(args),
                              workers=args.workers, scheduler=args.scheduler)
    for result in results:
        _out(result.format_summary())
        for path in result.written:
            _out(f"  {path}")
    return EXIT_OK


@_command("close")
def _cmd_close(args: argparse.Namespace) -> int:
    from inventory.close import close_period

    closed = close_period(args.site, args.period, progress=_progress(args),
                          workers=args.workers, scheduler=args.scheduler, ledger_url=args.ledger)
    _out(closed.summary())
    return EXIT_OK


@_command("volumes")
def _cmd_volumes(args: argparse.Namespace) -> int:
    from inventory.volume_report import report_volumes

    run = report_volumes(args.site, args.date, out=args.out, progress=_progress(args),
                         workers=args.workers, scheduler=args.scheduler)
    _out(run.summary())
    return EXIT_OK


@_command("reopen")
def _cmd_reopen(args: argparse.Namespace) -> int:
    from inventory.close import reopen_period

    reopen_id = reopen_period(args.site, args.period, args.reason, ledger_url=args.ledger)
    _out(f"reopened {args.period} (reopening {reopen_id}); the reason is kept in the ledger")
    return EXIT_OK


@_command("history")
def _cmd_history(args: argparse.Namespace) -> int:
    from inventory.close import period_history
    from inventory.export import history as hx

    if args.format == "xlsx" and args.output is None:
        _err("error: --format xlsx needs --output FILE.xlsx (a workbook is written to a file, "
             "not to the terminal)")
        return EXIT_BAD_INPUT
    if args.output is not None:
        _output_file(args.output)
    select = dict(pile=args.pile, material=args.material, start=args.start, end=args.end,
                  ledger_url=args.ledger, site_id=args.site_id)
    frame = period_history(args.site, by=args.by, **select)
    rows = frame
    if args.by is not None and args.format in ("xlsx", "html"):
        # the chart and the History sheet draw the pile rows behind the totals
        rows = period_history(args.site, **select)
    if args.format == "xlsx":
        from inventory.export.workbook import write_history_workbook

        write_history_workbook(rows, args.output, totals=frame if args.by else None, by=args.by)
        _out(f"wrote {len(frame)} rows to {args.output}")
        return EXIT_OK
    if args.format == "csv":
        from inventory.export.cells import write_csv

        # text a spreadsheet would run as a formula (a pile id "=1+1") is neutralised
        text = write_csv(frame, index=False)
    elif args.format == "json":
        text = hx.history_json(frame)
    elif args.format == "html":
        text = hx.history_html(frame, rows, title="Variance history" + (f": {args.site.name}" if args.site else ""))
    else:
        text = hx.history_table(frame) + "\n"
    if args.output is not None:
        hx.write_text(text, args.output)
        _out(f"wrote {len(frame)} rows to {args.output}")
    else:
        sys.stdout.write(text)
    return EXIT_OK


def _output_folder(path: Path, option: str | None) -> None:
    """Refuse, before any work, an output folder the run could not create or write: a file
    of its name, or a parent that is a file or not writable."""
    if (path.exists() or path.is_symlink()) and not path.is_dir():
        raise InputError(path, "is a file, not a folder; the survey's outputs go into a folder of this name",
                         field=option)
    probe = path
    while not probe.exists() and probe != probe.parent:
        probe = probe.parent
    if not probe.is_dir():
        raise InputError(probe, f"is a file, not a folder; {path} cannot be made under it", field=option)
    if not os.access(probe, os.W_OK | os.X_OK):
        raise InputError(probe, "is not a writable folder; the survey's outputs cannot be written there",
                         field=option)


def _output_file(path: Path) -> None:
    """Refuse, before any work, an ``--output`` that names a folder or lies under a file."""
    if path.is_dir():
        raise InputError("--output", f"{path} is a folder; give a file name, e.g. {path / 'history.csv'}")
    parent = path.parent
    while not parent.exists() and parent != parent.parent:
        parent = parent.parent
    if not parent.is_dir():
        raise InputError("--output", f"{path}: {parent} is a file, not a folder")


# ----------------------------------------------------------------------------- parser
def _period(text: str) -> str:
    """argparse type of ``--period``, ``--from`` and ``--to``: a real month, as text."""
    from inventory.model.period import Period

    try:
        return str(Period.parse(text))
    except ValueError as err:
        raise argparse.ArgumentTypeError(str(err)) from err


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

    p = sub.add_parser("sample", parents=[common], help="write the invented demo site",
                       description="Write the invented demo site (point clouds, pile register, books) into DIR.")
    p.add_argument("dir", type=Path, metavar="DIR", help="destination folder (created)")
    p.add_argument("--seed", type=int, default=None, help="simulator seed (default: the committed sample's)")

    parallel = argparse.ArgumentParser(add_help=False)
    parallel.add_argument("--workers", type=int, default=None, metavar="N",
                           help="run on a local Dask cluster of N worker processes (default: in this process, "
                                "jobs side by side on every core; 1: one job at a time)")
    parallel.add_argument("--scheduler", default=None, metavar="ADDRESS",
                           help="run on an existing Dask cluster (e.g. tcp://host:8786)")
    parallel.add_argument("-q", "--quiet", action="store_true", help="no progress lines")

    p = sub.add_parser("survey", parents=[common, parallel], help="process surveys: classified cloud, surface, coverage",
                       description="Turn each survey's point clouds into a cleaned, classified cloud and a stockpile "
                                   "surface raster. Several surveys run side by side with --workers or --scheduler.")
    p.add_argument("site", type=Path, metavar="SITE", help="site folder")
    which = p.add_mutually_exclusive_group(required=True)
    which.add_argument("--date", action="append", metavar="YYYY-MM-DD",
                       help="survey folder name (repeat for several surveys)")
    which.add_argument("--all", action="store_true", help="every survey of the site")
    p.add_argument("--out", type=Path, default=None, metavar="DIR",
                   help="output folder (default SITE/surveys-processed/DATE; with several surveys DIR/DATE)")

    shared = argparse.ArgumentParser(add_help=False)
    shared.add_argument("--ledger", default=None, metavar="URL",
                        help="a ledger shared by several sites on PostgreSQL (postgresql://user@host/db) "
                             "instead of [ledger] url in site.toml or SITE/ledger.sqlite")

    p = sub.add_parser("close", parents=[common, parallel, shared], help="close one month: volumes, book, variance, outputs, ledger",
                       description="Close one period: survey, volumes, book stock, reconciliation; writes closes/PERIOD/ and the ledger.")
    p.add_argument("site", type=Path, metavar="SITE", help="site folder")
    p.add_argument("--period", required=True, type=_period, metavar="YYYY-MM", help="the month to close")

    p = sub.add_parser("volumes", parents=[common, parallel], help="every pile's volume of one survey, no books",
                       description="Measure every pile of one survey: volume, TIN volume, area, scanned fraction, "
                                   "each part of the uncertainty, 95 %% interval, tonnes at table density, and the "
                                   "stock outside every footprint. Writes CSV, a workbook, a GeoPackage and the "
                                   "surface rasters into SITE/volumes/DATE/. Reads no books, writes no ledger.")
    p.add_argument("site", type=Path, metavar="SITE", help="site folder")
    p.add_argument("--date", required=True, metavar="YYYY-MM-DD", help="the survey (folder name under surveys/)")
    p.add_argument("--out", type=Path, default=None, metavar="DIR",
                   help="output folder (default SITE/volumes/DATE; replaced when the new one is complete)")

    p = sub.add_parser("reopen", parents=[common, shared], help="unlock a closed month (reason kept for good)",
                       description="Unlock a closed period so that it can be closed again. The reason is kept in the ledger.")
    p.add_argument("site", type=Path, metavar="SITE", help="site folder")
    p.add_argument("--period", required=True, type=_period, metavar="YYYY-MM")
    p.add_argument("--reason", required=True, help="why the period is reopened")

    p = sub.add_parser("history", parents=[common, shared], help="variance by pile and month from the ledger",
                       description="Variance by pile and month from the ledger, for finance. On a shared "
                                   "ledger: every site, unless --site-id names one.")
    p.add_argument("site", type=Path, metavar="SITE", nargs="?", default=None,
                   help="site folder (may be left out with --ledger)")
    p.add_argument("--site-id", default=None, help="on a shared ledger: only this site")
    p.add_argument("--pile", default=None, help="only this pile id")
    p.add_argument("--material", default=None, help="only this material")
    p.add_argument("--from", dest="start", default=None, type=_period, metavar="YYYY-MM", help="first period")
    p.add_argument("--to", dest="end", default=None, type=_period, metavar="YYYY-MM", help="last period")
    p.add_argument("--by", choices=("pile", "material", "month"), default=None,
                   help="one row per pile, material or month over the selection, with a total row")
    p.add_argument("--format", choices=("table", "csv", "json", "html", "xlsx"), default="table",
                   help="html: a page with a chart of variance per pile by month")
    p.add_argument("--output", type=Path, default=None, metavar="FILE",
                   help="write to FILE instead of the terminal (needed for xlsx)")
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if not args.verbose:
        # our warnings are messages for the user: one line each, no source line
        import warnings

        def _show(message, category, filename, lineno, file=None, line=None):
            _err(f"warning: {message}")

        warnings.showwarning = _show
    handled, previous = _on_terminate()
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
    except KeyboardInterrupt as err:
        _err("terminated" if isinstance(err, _Terminated) else "interrupted")
        return EXIT_RUN_FAILED
    except Exception as err:  # a failed run is one line too; --verbose shows where
        if args.verbose:
            traceback.print_exc()
        _err(f"error: the run failed: {type(err).__name__}: {err} (rerun with --verbose for the traceback)")
        return EXIT_RUN_FAILED
    finally:
        if handled:
            signal.signal(signal.SIGTERM, previous if previous is not None else signal.SIG_DFL)


class _Terminated(KeyboardInterrupt):
    """Raised in the main thread when the process is asked to stop (SIGTERM)."""


def _on_terminate():
    """Make SIGTERM (``kill PID``, a job scheduler's stop) unwind like Ctrl-C: the run's
    ``finally`` blocks remove its staging folders and roll back an open ledger transaction,
    instead of the process dying where it stands. Returns whether it set the handler (not off
    the main thread, where none can be set) and the handler it replaced."""
    if threading.current_thread() is not threading.main_thread():
        return False, None

    def stop(signum, frame):
        raise _Terminated()

    return True, signal.signal(signal.SIGTERM, stop)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
