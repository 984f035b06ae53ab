"""Staggered grids and solvers kept between slabs, keyed by grid, mask and settings.

Building a solver (transforms' eigenvalues, sparse LU factors) costs far more than a
solve, and every level and time of a run shares the grid and usually the mask: each
is built on first use and reused, the least recently used dropped beyond
:data:`CACHE_SIZE`. Shared by the dask threads.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from collections.abc import Callable
from typing import Any

import numpy as np

from ..constants import EARTH_RADIUS
from ..notes import note
from .operators import StaggeredGrid
from .solvers import DirichletSolver, VariationalSolver, dirichlet_solver

#: Grids and solvers kept in memory (each grid and mask is one entry).
CACHE_SIZE = 8

#: What each kind of entry is, for the progress notes while one is built.
BUILDS = {"grid": "the staggered grid", "dirichlet": "the Dirichlet solver",
          "variational": "the variational solver"}

_entries: OrderedDict[tuple, Any] = OrderedDict()
_lock = threading.Lock()


def clear() -> None:
    """Drop every grid and solver kept."""
    with _lock:
        _entries.clear()


def _cached(key: tuple, build: Callable[[], Any]) -> Any:
    with _lock:
        if key in _entries:
            _entries.move_to_end(key)
            return _entries[key]
        note(lambda: f"building {BUILDS[key[0]]} of a new grid or mask")
        value = build()
        _entries[key] = value
        while len(_entries) > CACHE_SIZE:
            _entries.popitem(last=False)
        return value


def staggered_grid(lat: np.ndarray, lon: np.ndarray, periodic: bool) -> StaggeredGrid:
    """The staggered grid of centre latitudes and longitudes in degrees, on the Earth."""
    key = ("grid", lat.tobytes(), lon.tobytes(), periodic)
    return _cached(key, lambda: StaggeredGrid(np.radians(lat), np.radians(lon), EARTH_RADIUS,
                                              periodic))


def _mask_key(grid: StaggeredGrid, valid: np.ndarray) -> tuple:
    return (grid.lat.tobytes(), grid.lon.tobytes(), grid.periodic, np.packbits(valid).tobytes())


def dirichlet(grid: StaggeredGrid, valid: np.ndarray) -> DirichletSolver:
    """The Dirichlet solver of a grid and mask (:func:`flowpipe.regional.solvers.dirichlet_solver`)."""
    return _cached(("dirichlet",) + _mask_key(grid, valid), lambda: dirichlet_solver(grid, valid))


def solver(grid: StaggeredGrid, valid: np.ndarray, scheme: str, regularisation: float,
           tolerance: float, max_iterations: int) -> DirichletSolver | VariationalSolver:
    """The solver of a scheme for a grid and mask (the settings apply to ``variational``)."""
    if scheme == "dirichlet":
        return dirichlet(grid, valid)
    key = ("variational",) + _mask_key(grid, valid) + (regularisation, tolerance, max_iterations)
    return _cached(key, lambda: VariationalSolver(grid, valid, regularisation, tolerance,
                                                  max_iterations))
