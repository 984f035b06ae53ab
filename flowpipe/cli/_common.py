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
