"""SuperLU's orderings for the gradient energy of a masked limited-area level, side by side.

On an ``--n`` x ``--n`` box (20-70N, 30W-20E) with the terrain-like mask of
``bench_masked.py`` (a disc of 6 degrees radius and a ridge), it builds the matrix the
uncoupled variational preconditioner factorises - the gradient energy of the active
corners plus its weak area term (:class:`flowpipe.regional.solvers.VariationalSolver`) -
and times, alternating the sides, median of ``--repeats``:

* ``default``: :func:`scipy.sparse.linalg.splu` with its default options (COLAMD
  ordering, partial pivoting);
* ``symmetric``: the options the solver uses,
  :data:`flowpipe.regional.solvers.SYMMETRIC_LU` (minimum degree on ``A^T + A``, no
  pivoting off the diagonal);

each as the factorisation and one solve, and prints the medians, the ratios, the fill
(nonzeros of L + U), the residual of each solution of one random right-hand side and
how far apart the two are (as far as the weak area term's conditioning lets two exact
factorisations differ).

Run: ``.venv/bin/python benchmarks/bench_lu_ordering.py [--n 1000] [--repeats 3]``
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
from pathlib import Path

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_masked import terrain_mask  # noqa: E402

from flowpipe.regional import cache, solvers  # noqa: E402


def energy_matrix(n: int) -> sp.csc_matrix:
    """The uncoupled preconditioner's matrix (one potential) on the masked ``n x n`` level."""
    lat, lon = np.linspace(20.0, 70.0, n), np.linspace(-30.0, 20.0, n)
    grid = cache.staggered_grid(np.radians(lat), np.radians(lon), False)
    solver = solvers.VariationalSolver(grid, ~terrain_mask(lat, lon), 1e-10)
    half = solver._cols.size
    return sp.csc_matrix((solver._regulariser / solver.regularisation)[:half][:, :half])


def main(n: int, repeats: int) -> None:
    matrix = energy_matrix(n)
    rhs = np.random.default_rng(0).standard_normal(matrix.shape[0])
    sides = {"default": {}, "symmetric": solvers.SYMMETRIC_LU}
    times = {name: {"factor": [], "solve": []} for name in sides}
    fill, solution, residual = {}, {}, {}
    for k in range(repeats):
        for name in (tuple(sides) if k % 2 == 0 else tuple(reversed(sides))):
            start = time.perf_counter()
            lu = spla.splu(matrix, **sides[name])
            times[name]["factor"].append(time.perf_counter() - start)
            start = time.perf_counter()
            solution[name] = lu.solve(rhs)
            times[name]["solve"].append(time.perf_counter() - start)
            residual[name] = np.abs(matrix @ solution[name] - rhs).max() / np.abs(rhs).max()
            fill[name] = lu.L.nnz + lu.U.nnz
            del lu
    med = {name: {part: statistics.median(t) for part, t in parts.items()}
           for name, parts in times.items()}
    print(f"gradient energy of {matrix.shape[0]} active corners ({n}x{n}, masked), median of "
          f"{repeats}, sides alternated")
    for name in sides:
        print(f"  {name:>9}: factor {med[name]['factor']:6.2f} s, solve "
              f"{med[name]['solve'] * 1e3:7.1f} ms, fill {fill[name]:.3e}, relative residual "
              f"{residual[name]:.1e}")
    gap = np.abs(solution["default"] - solution["symmetric"]).max() / np.abs(
        solution["default"]).max()
    print(f"  default / symmetric: factor {med['default']['factor'] / med['symmetric']['factor']:.2f}x,"
          f" solve {med['default']['solve'] / med['symmetric']['solve']:.2f}x, fill "
          f"{fill['default'] / fill['symmetric']:.2f}x; solutions {gap:.1e} apart")


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=1000)
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    main(args.n, args.repeats)
