"""The variational solver's own CG loop against scipy.sparse.linalg.cg, side by side.

On one complete limited-area level (``--n`` x ``--n`` points, the smooth wind of
``bench_regional.py``) it builds one :class:`flowpipe.regional.solvers.VariationalSolver`
and times, alternating the sides, median of ``--repeats``:

* ``solve``: the solver's preconditioned conjugate gradients, which stop when the
  relative wind misfit falls to the tolerance;
* ``scipy cg``: :func:`scipy.sparse.linalg.cg` on the same LinearOperators
  (``solver.operator``, ``M=solver.preconditioner``), stopped on the same misfit by a
  callback (one more sparse product per iteration, an exception to stop);

and prints their ratio, the iterations of each and how far apart the two winds are.
For information, ``cg``'s own stopping rule (``rtol`` = the tolerance, on the normal
equations' residual): its iterations and the misfit it leaves. The whole is run twice,
in this environment (BLAS threads as the machine gives them) and in a child process
with ``OPENBLAS_NUM_THREADS=1``.

Run: ``.venv/bin/python benchmarks/bench_cg.py [--n 500] [--repeats 7]``
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import time
from pathlib import Path

import numpy as np  # before bench_regional, which asks for one BLAS thread if unset
import scipy.sparse.linalg as spla

THREADS = os.environ.get("OPENBLAS_NUM_THREADS", "as the machine gives them")

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_regional import smooth_wind  # noqa: E402

from flowpipe.regional import cache  # noqa: E402
from flowpipe.regional.solvers import VariationalSolver  # noqa: E402


class _Converged(Exception):
    """Raised by the callback to stop cg."""


def scipy_cg(solver: VariationalSolver, rhs: np.ndarray, rtol: float | None = None
             ) -> tuple[np.ndarray, int]:
    """cg on the solver's operator and preconditioner; stopped on the misfit unless ``rtol``."""
    w = rhs.reshape(2, -1)[:, solver.valid.ravel()].ravel()
    weight = solver.weight
    target = solver.tolerance**2 * float(w @ (weight * w))
    b = solver.wind.T @ (weight * w)
    count, found = [0], {}

    def callback(xk: np.ndarray) -> None:
        count[0] += 1
        misfit = w - solver.wind @ xk
        if rtol is None and float(misfit @ (weight * misfit)) <= target:
            found["x"] = xk.copy()
            raise _Converged

    try:
        x, _ = spla.cg(solver.operator, b, rtol=rtol or 0.0, atol=0.0,
                       maxiter=solver.max_iterations, M=solver.preconditioner, callback=callback)
    except _Converged:
        x = found["x"]
    return x, count[0]


def misfit_of(solver: VariationalSolver, rhs: np.ndarray, x: np.ndarray) -> float:
    w = rhs.reshape(2, -1)[:, solver.valid.ravel()].ravel()
    rest = w - solver.wind @ x
    return float(np.sqrt((rest @ (solver.weight * rest)) / (w @ (solver.weight * w))))


def run(n: int, repeats: int) -> None:
    lat = np.linspace(20.0, 70.0, n)
    lon = np.linspace(-30.0, 20.0, n)
    rhs = np.stack(smooth_wind(lat, lon, 0))
    solver = VariationalSolver(cache.staggered_grid(lat, lon, False), np.ones((n, n), bool),
                               1e-10)
    cols = np.flatnonzero(np.ones(solver.grid.corner_shape, bool).ravel())
    ours, theirs = [], []
    for _ in range(repeats):
        start = time.perf_counter()
        potentials, iterations = solver.solve(rhs)
        ours.append(time.perf_counter() - start)
        start = time.perf_counter()
        x, cg_iterations = scipy_cg(solver, rhs)
        theirs.append(time.perf_counter() - start)
    mine = potentials.reshape(2, -1)[:, cols].ravel()
    apart = float(np.abs(solver.wind @ (x - mine)).max() / np.abs(solver.wind @ mine).max())
    own_x, own_iterations = scipy_cg(solver, rhs, rtol=solver.tolerance)
    print(f"{n} x {n}, BLAS threads {THREADS}: solve {statistics.median(ours):.3f} s "
          f"({iterations} iterations), scipy cg {statistics.median(theirs):.3f} s "
          f"({cg_iterations} iterations); cg / solve = "
          f"{statistics.median(theirs) / statistics.median(ours):.2f} (median of {repeats}); "
          f"winds apart {apart:.1e} of the largest; cg with rtol={solver.tolerance:g}: "
          f"{own_iterations} iterations, misfit {misfit_of(solver, rhs, own_x):.1e} "
          f"(solve's {misfit_of(solver, rhs, mine):.1e})")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=500)
    parser.add_argument("--repeats", type=int, default=7)
    parser.add_argument("--child", action="store_true", help=argparse.SUPPRESS)
    args = parser.parse_args()
    run(args.n, args.repeats)
    if not args.child:
        env = dict(os.environ, OPENBLAS_NUM_THREADS="1")
        subprocess.run([sys.executable, __file__, "--n", str(args.n), "--repeats",
                        str(args.repeats), "--child"], env=env, check=True)


if __name__ == "__main__":
    main()
