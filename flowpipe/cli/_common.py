"""Argument types shared by the commands."""

from __future__ import annotations

import argparse
from pathlib import Path


def output_file(text: str) -> str:
    """An ``-o`` argument: a file name, not a directory (checked before any work; missing
    parent directories are created when the file is written)."""
    if Path(text).is_dir():
        raise argparse.ArgumentTypeError(f"{text!r} is a directory; give a file name in it")
    return text


def add_attribute_option(parser: argparse.ArgumentParser) -> None:
    """``--attribute KEY=VALUE`` (repeatable): a global attribute stamped on the output."""
    parser.add_argument("--attribute", action="append", type=attribute, default=[],
                        metavar="KEY=VALUE", help="a global attribute to stamp on the output "
                        "(institution, creator_name, license, project, id_prefix, ...); repeatable")


def attribute(text: str) -> tuple[str, str]:
    """One ``--attribute KEY=VALUE``."""
    from ..config import ATTRIBUTE_NAME

    key, sep, value = text.partition("=")
    if not sep or not ATTRIBUTE_NAME.match(key.strip()):
        raise argparse.ArgumentTypeError(
            f"{text!r}: give KEY=VALUE, KEY of letters, digits and underscores beginning with a "
            "letter, e.g. institution=\"Harbour Weather Office\"")
    return key.strip(), value
