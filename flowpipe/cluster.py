"""Where the computations run: the dask.distributed client, if there is one, or dask's
local threads and the cores they share; imports no other part of flowpipe.

``distributed`` is looked up only when it has been imported already (by the
caller, to start a client): without it no client can exist, and importing it
to find out cost 0.18 s of every command (``python -X importtime``).
"""

from __future__ import annotations

import os
import sys
from typing import Any

#: The names of dask's synchronous scheduler (dask config ``scheduler``): one task at a
#: time, in the calling thread.
SYNCHRONOUS = ("sync", "synchronous", "single-threaded")

#: dask config key: the cores the computations of this process may use (a batch run gives
#: each of its worker processes its share; read by the transform kernels and the writer).
CORES_KEY = "flowpipe.cores"

#: The names of dask's local threaded scheduler, or none given (dask's default for arrays).
THREADED = (None, "threads", "threading")


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


def cores() -> int:
    """The cores this process's computations may use: the dask config value
    ``flowpipe.cores`` (the budget a batch run gives itself), else those the process may
    run on."""
    import dask

    return dask.config.get(CORES_KEY, None) or len(os.sched_getaffinity(0))


def local_threads() -> int:
    """The worker threads of dask's local threaded scheduler: the dask config value
    ``num_workers``, else one per :func:`cores`."""
    import dask

    return dask.config.get("num_workers", None) or cores()
