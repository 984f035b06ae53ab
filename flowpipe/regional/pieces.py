"""The connected pieces of a domain's valid points, and the refusal of masks too small.

Valid points that share no cell corner with the rest (a valley cut off by mountains
below the ground, seas between masked land) form separate domains, each decomposed
on its own; pieces too small for the stencils (under :data:`MINIMUM_SIZE` x
:data:`MINIMUM_SIZE` points or without a 2x2 block) are left missing.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import connected_components

from ..errors import InputError
from .operators import StaggeredGrid, interior_corners

#: The fewest rows and columns (and, squared, points) of a piece that is decomposed.
MINIMUM_SIZE = 5


def _pieces(valid: np.ndarray, periodic: bool) -> tuple[int, np.ndarray]:
    """Connected pieces of the valid points, neighbours sharing a corner (8-connectivity)."""
    ny, nx = valid.shape
    jj, ii = np.meshgrid(np.arange(ny), np.arange(nx), indexing="ij")
    first, second = [], []
    for dj, di in ((0, 1), (1, 0), (1, 1), (1, -1)):
        j2, i2 = jj + dj, ii + di
        if periodic:
            i2 = i2 % nx
        inside = (j2 < ny) & (i2 >= 0) & (i2 < nx)
        first.append((jj * nx + ii)[inside])
        second.append((j2 * nx + i2)[inside])
    a, b = np.concatenate(first), np.concatenate(second)
    flat = valid.ravel()
    keep = flat[a] & flat[b]
    graph = sp.coo_array((np.ones(int(keep.sum())), (a[keep], b[keep])), shape=(ny * nx,) * 2)
    _, labels = connected_components(graph, directed=False)
    labels = np.where(flat, labels, -1).reshape(ny, nx)
    return int(np.unique(labels[labels >= 0]).size), labels


def _large_enough(piece: np.ndarray, grid: StaggeredGrid) -> bool:
    """Whether a piece of valid points can be decomposed: at least ``MINIMUM_SIZE`` rows and
    columns, ``MINIMUM_SIZE**2`` points and one 2x2 block."""
    return (int(piece.sum()) >= MINIMUM_SIZE**2 and int(piece.any(axis=1).sum()) >= MINIMUM_SIZE
            and int(piece.any(axis=0).sum()) >= MINIMUM_SIZE
            and bool(interior_corners(grid, piece).any()))


def solvable_pieces(valid: np.ndarray, grid: StaggeredGrid) -> tuple[list[np.ndarray], int]:
    """The connected pieces of the valid points that can be decomposed, each alone, and the
    number of valid points in pieces too small for that (left missing).

    Pieces share no grid-cell corner, so their potentials are independent: each is a
    Poisson problem (or least-squares fit) of its own domain.

    References
    ----------
    Connected components of a graph: Tarjan (1972), "Depth-first search and linear
    graph algorithms", SIAM J. Comput. 1, 146-160, through
    :func:`scipy.sparse.csgraph.connected_components`; a potential per connected
    domain is common practice.
    """
    _, labels = _pieces(valid, grid.periodic)
    pieces, small = [], 0
    for label in np.unique(labels[labels >= 0]):
        piece = labels == label
        if _large_enough(piece, grid):
            pieces.append(piece)
        else:
            small += int(piece.sum())
    return pieces, small


def check_mask(valid: np.ndarray, where: str, grid: StaggeredGrid
               ) -> tuple[list[np.ndarray], int]:
    """Refuse a slab with nothing to decompose; return :func:`solvable_pieces`."""
    count = int(valid.sum())
    if count == 0:
        raise InputError(f"u/v: every point of {where} is missing; drop it or fill it")
    pieces, small = solvable_pieces(valid, grid)
    if not pieces:
        rows = int(valid.any(axis=1).sum())
        cols = int(valid.any(axis=0).sum())
        raise InputError(
            f"u/v: {where} has {count} valid points in {rows} rows and {cols} columns, in no "
            f"piece of at least {MINIMUM_SIZE}x{MINIMUM_SIZE} with a 2x2 block: the regional "
            "decomposition needs a larger domain")
    return pieces, small
