"""Command line: argument parsing only; every command calls the Python API.

Each command lives in a module of this package that defines ``register``
(adds its sub-parser) and ``run`` (takes the parsed arguments, returns the
exit code).
"""

from __future__ import annotations

import argparse
import difflib
import importlib
import os
import re
import signal
import sys
import warnings
from collections.abc import Sequence

from .._version import __version__
from ..errors import FlowpipeError, FlowpipeWarning, from_os_error

COMMANDS = ("inspect", "decompose", "advect", "map", "run", "circulation", "ftle")

#: Exit code for an unexpected internal failure (a bug): distinct from the
#: contract's 1 (some batch inputs failed) and 2 (usage or unusable input).
EXIT_INTERNAL = 3


class _Parser(argparse.ArgumentParser):
    """argparse, with usage errors in the contract's one-line form; arguments a command
    does not know are refused by that command's parser, with the closest of its options."""

    def error(self, message: str):  # type: ignore[override]
        print(f"flowpipe: error: {message} (see '{self.prog} --help')", file=sys.stderr)
        sys.exit(2)

    def parse_known_args(self, args=None, namespace=None):  # type: ignore[override]
        namespace, extras = super().parse_known_args(args, namespace)
        if extras:
            self.error(f"unrecognized arguments: {' '.join(extras)}{self._suggestion(extras)}")
        return namespace, extras

    def _suggestion(self, extras: list[str]) -> str:
        """``; did you mean --compression?`` for the first unknown option that is close to
        one of this parser's (difflib's ratio, at its default cutoff of 0.6)."""
        options = [o for o in self._option_string_actions if o.startswith("--")]
        for word in extras:
            if word.startswith("--"):
                close = difflib.get_close_matches(word.partition("=")[0], options, n=1)
                if close:
                    return f"; did you mean {close[0]}?"
        return ""


#: What every command reads as a value, not an option, though it begins with a minus sign:
#: a number or a comma-separated list of them ("--circle -30,100,500", "--start -20,150").
#: argparse itself takes plain negative numbers only (Python documentation, argparse,
#: "Arguments containing -"), which would refuse a southern latitude or western longitude
#: given first.
NEGATIVE_VALUES = re.compile(r"^-\d*\.?\d+(,[-+]?\d*\.?\d+)*$")


def build_parser() -> argparse.ArgumentParser:
    """The ``flowpipe`` argument parser with every command registered."""
    common = argparse.ArgumentParser(add_help=False)
    # (after the command too; SUPPRESS keeps a --debug given before it)
    common.add_argument("--debug", action="store_true", default=argparse.SUPPRESS,
                        help="show the full Python traceback when something fails")
    parser = _Parser(
        prog="flowpipe", parents=[common],
        description="Kinematics of gridded wind fields: Helmholtz decomposition, vorticity "
        "and divergence, parcel trajectories, CF NetCDF and maps.",
    )
    parser.add_argument("--version", action="version", version=f"flowpipe {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for name in COMMANDS:
        module = importlib.import_module(f"{__name__}.{name}")
        command = module.register(sub, common)
        command._negative_number_matcher = NEGATIVE_VALUES
        command.set_defaults(handler=module.run)
    return parser


_PYTHON_SHOW_WARNING = warnings.showwarning


class _Terminated(BaseException):
    """SIGTERM, raised where the program is, so that clean-up code runs."""


def _terminate(signum, frame) -> None:
    raise _Terminated


def _show_warning(message, category, filename, lineno, file=None, line=None) -> None:
    """Warnings of flowpipe as ``flowpipe: warning: ...`` lines; others as Python shows them."""
    if issubclass(category, FlowpipeWarning):
        print(f"flowpipe: warning: {message}", file=sys.stderr)
    else:
        _PYTHON_SHOW_WARNING(message, category, filename, lineno, file, line)


def _local_threads() -> None:
    """Name dask's local threaded scheduler as the function it is, and its way of
    rechunking: named otherwise (or not at all), dask imports distributed at every
    compute and rechunk to look for a client, 0.17 s of each command. A client that
    `flowpipe run --scheduler` starts names itself when it starts; what the user set in
    dask's configuration is kept."""
    import dask
    import dask.threaded

    if dask.config.get("scheduler", None) is None:
        dask.config.set(scheduler=dask.threaded.get)
    if dask.config.get("array.rechunk.method", None) is None:
        dask.config.set({"array.rechunk.method": "tasks"})


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``flowpipe`` command; returns the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    args.debug = getattr(args, "debug", False)  # (absent when given nowhere)
    warnings.showwarning = _show_warning
    # Idle worker threads of the compiled kernels sleep between steps instead of spinning:
    # on a shared machine spinning takes the processor from other work and then waits for
    # it. Read when the OpenMP threading layer starts; a setting of the user's wins. Set
    # here, in the command's own process, not when flowpipe is imported into someone's.
    os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")
    _local_threads()
    # A terminated command unwinds like an interrupted one, so that its temporary
    # output file is removed (the atomic writer cleans up on the way out).
    signal.signal(signal.SIGTERM, _terminate)
    try:
        code = int(args.handler(args))
        sys.stdout.flush()  # here, where a closed pipe can still be reported
        return code
    except BrokenPipeError as exc:
        # Nothing more can go to the closed pipe, not even at exit (Python documentation,
        # "Note on SIGPIPE", signal module): point standard output at the null device.
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        print(f"flowpipe: error: {from_os_error(exc)}", file=sys.stderr)
        return 2
    except OSError as exc:  # the user's environment (the stages name their paths themselves)
        if args.debug:
            raise
        print(f"flowpipe: error: {from_os_error(exc)}", file=sys.stderr)
        return 2
    except FlowpipeError as exc:
        if args.debug:
            raise
        print(f"flowpipe: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("flowpipe: interrupted", file=sys.stderr)
        return 130
    except _Terminated:  # the temporary outputs are gone by now: the writer let its tasks
        # running at the signal finish first (flowpipe.store), then removed them
        print("flowpipe: terminated", file=sys.stderr)
        sys.stderr.flush()
        sys.stdout.flush()
        # At once: an orderly exit would first wait for any computation still running in
        # dask's worker threads outside a write.
        os._exit(128 + signal.SIGTERM)
    except Exception as exc:  # a bug: one line, unless --debug
        if args.debug:
            raise
        print(f"flowpipe: error: internal error ({type(exc).__name__}: {exc}); rerun with "
              "--debug for the traceback and report it", file=sys.stderr)
        return EXIT_INTERNAL
