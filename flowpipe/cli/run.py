"""``flowpipe run CONFIG.toml``: the nightly batch."""

from __future__ import annotations

import argparse
import sys


def register(sub: argparse._SubParsersAction, common: argparse.ArgumentParser) -> argparse.ArgumentParser:
    parser = sub.add_parser(
        "run", parents=[common], help="run the batch job a TOML config describes",
        description="Run the stages a TOML config describes (decompose, advect, maps) over its "
        "inputs. Reruns redo only what changed; exit code 1 when some inputs failed.",
    )
    parser.add_argument("config", metavar="CONFIG.toml", help="the batch config")
    parser.add_argument("--force", action="store_true", help="redo every output")
    parser.add_argument("--workers", type=int, metavar="N",
                        help="cores to use: that many inputs at once in separate processes, or "
                        "dask threads for a single input (default: [run] workers, or all cores)")
    parser.add_argument("--scheduler", metavar="ADDRESS",
                        help="a dask.distributed scheduler, tcp://HOST:PORT")
    parser.add_argument("--quiet", action="store_true", help="no progress on the terminal")
    parser.add_argument("--dry-run", action="store_true",
                        help="list the outputs that are due and why; make and write nothing")
    return parser


def run(args: argparse.Namespace) -> int:
    from ..pipeline import plan
    from ..pipeline import run as run_pipeline

    if args.workers is not None and args.workers < 1:
        print("flowpipe: error: --workers must be at least 1", file=sys.stderr)
        return 2
    if args.dry_run:
        due = plan(args.config, force=args.force)
        for output, stage, reason in due:
            print(f"{output}: {reason}" + (f" ({stage})" if stage else ""))
        if not due:
            print("flowpipe: nothing due, every output is up to date")
        return 0
    summary = run_pipeline(args.config, force=args.force, workers=args.workers,
                           scheduler=args.scheduler, quiet=args.quiet)
    if not args.quiet and sys.stderr.isatty():  # otherwise the run's log lines said it
        if summary.written or summary.failures:
            print(f"flowpipe: {len(summary.written)} written, {len(summary.up_to_date)} up to date, "
                  f"{len(summary.failures)} failed; see {summary.report}")
        else:
            print(f"flowpipe: everything is up to date, nothing written ({summary.report})")
    for unit, error in summary.failures.items():
        print(f"flowpipe: error: {unit}: {error}", file=sys.stderr)
    for problem in summary.unrecorded:
        print(f"flowpipe: error: {problem}", file=sys.stderr)
    return summary.exit_code
