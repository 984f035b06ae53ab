"""The flowpipe package of an earlier git revision, for benchmarks that run both sides."""

from __future__ import annotations

import subprocess
from pathlib import Path

#: The repository the benchmarks belong to.
ROOT = Path(__file__).resolve().parents[1]


def flowpipe_at(revision: str, directory: Path) -> Path:
    """Extract the ``flowpipe`` package of ``revision`` into ``directory/base`` (made here);
    returns that directory, to put first on a side's ``PYTHONPATH``."""
    base = directory / "base"
    base.mkdir()
    archive = subprocess.run(["git", "-C", str(ROOT), "archive", revision, "flowpipe"],
                             check=True, capture_output=True).stdout
    subprocess.run(["tar", "-x", "-C", str(base)], input=archive, check=True)
    return base
