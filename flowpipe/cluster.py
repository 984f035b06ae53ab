"""The dask.distributed client the computations run on, if there is one; imports nothing.

``distributed`` is looked up only when it has been imported already (by the
caller, to start a client): without it no client can exist, and importing it
to find out cost 0.18 s of every command (``python -X importtime``).
"""

from __future__ import annotations

import sys
from typing import Any


def distributed_client() -> Any | None:
    """The active :class:`distributed.Client`, or None when computations run in this
    process (no client started, or ``distributed`` not installed or not imported)."""
    if "distributed" not in sys.modules:
        return None
    from distributed import default_client

    try:
        return default_client()
    except ValueError:  # distributed's way of saying that no client runs
        return None
