"""``flowpipe decompose``: placeholder until its issue lands."""

from __future__ import annotations

import argparse

from ..errors import UsageError


def register(sub: argparse._SubParsersAction, common: argparse.ArgumentParser) -> argparse.ArgumentParser:
    return sub.add_parser("decompose", parents=[common], help="(not available yet)")


def run(args: argparse.Namespace) -> int:
    raise UsageError("'flowpipe decompose' is not available in this version yet")
