"""Solvers of the limited-area Helmholtz problems, built once per grid and mask.

One interface: every solver has a ``name`` (its description, for the output) and
``solve(rhs) -> (x, iterations)``; the linear maps inside it - the inverse
Laplacians, the operator of the normal equations and the preconditioners - are
:class:`scipy.sparse.linalg.LinearOperator` objects. Everything that depends only
on the grid and the mask (transforms' eigenvalues, tridiagonal eliminations,
sparse LU factors) is built by the constructors; ``solve`` then costs transforms,
sparse products and triangular sweeps only, so one solver serves every level and
time of a run.
"""

from __future__ import annotations

import math
import threading
import time
from collections.abc import Callable

import numpy as np
import scipy.fft
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from scipy import ndimage

from ..notes import note
from .operators import StaggeredGrid, active_corners, gradient_energy, interior_corners


class _Tridiagonal:
    """Batched Thomas elimination for ``(T + diag(scale) * eig_k) x_k = r_k``, all ``k`` at once.

    ``T`` is tridiagonal in latitude (``lower``, ``diag``, ``upper``) and
    ``eig_k`` the eigenvalues of the longitude operator that the caller
    diagonalises with a fast transform. The elimination is done here, once.

    References
    ----------
    Thomas algorithm: Conte & de Boor (1980), "Elementary Numerical Analysis",
    3rd ed., McGraw-Hill, section 3.3 (from memory); its use after a Fourier
    transform in one direction: Hockney (1965), J. ACM 12, 95-113.
    """

    def __init__(self, lower: np.ndarray, diag: np.ndarray, upper: np.ndarray,
                 scale: np.ndarray, eig: np.ndarray) -> None:
        full = diag[:, None] + scale[:, None] * eig[None, :]
        den = np.empty_like(full)
        cprime = np.empty_like(full)
        den[0] = full[0]
        cprime[0] = upper[0] / den[0]
        for j in range(1, full.shape[0]):
            den[j] = full[j] - lower[j] * cprime[j - 1]
            cprime[j] = upper[j] / den[j]
        self._lower = lower
        self._den = den
        self._cprime = cprime

    def sweep(self, hat: np.ndarray) -> np.ndarray:
        """Solve for ``hat`` of shape ``(nlat, ..., nwavenumber)`` (latitude first)."""
        out = np.empty_like(hat)
        out[0] = hat[0] / self._den[0]
        for j in range(1, hat.shape[0]):
            out[j] = (hat[j] - self._lower[j] * out[j - 1]) / self._den[j]
        for j in range(hat.shape[0] - 2, -1, -1):
            out[j] -= self._cprime[j] * out[j + 1]
        return out


def _operator(n: int, apply) -> spla.LinearOperator:
    """A symmetric ``n x n`` LinearOperator from a function of a vector or of columns."""
    return spla.LinearOperator((n, n), matvec=apply, matmat=apply, dtype=np.float64)


def sparse_lu_inverse(matrix: sp.sparray, **options) -> spla.LinearOperator:
    """The inverse of a sparse matrix as a LinearOperator, by its sparse LU factors.

    Parameters
    ----------
    matrix : scipy.sparse array
        Square and non-singular.
    **options
        Passed to :func:`scipy.sparse.linalg.splu`.

    Returns
    -------
    scipy.sparse.linalg.LinearOperator
        Applies ``matrix^-1`` to a vector or to columns; one factorisation shared by
        the dask threads (SuperLU's solve is not re-entrant, so it is locked).

    References
    ----------
    Li (2005), "An overview of SuperLU: algorithms, implementation, and user
    interface", ACM Trans. Math. Softw. 31, 302-325, through
    :func:`scipy.sparse.linalg.splu`.
    """
    lu = spla.splu(sp.csc_matrix(matrix), **options)
    lock = threading.Lock()

    def apply(rhs: np.ndarray) -> np.ndarray:
        with lock:
            return lu.solve(np.asarray(rhs, dtype=np.float64))

    return _operator(matrix.shape[0], apply)


def separable_laplacian_inverse(grid: StaggeredGrid) -> spla.LinearOperator:
    """Fast Poisson solver for the five-point corner Laplacian on a whole grid.

    Zero values on the outer ring of corners (on the northern and southern rings
    only when the grid is periodic in longitude).

    Parameters
    ----------
    grid : StaggeredGrid

    Returns
    -------
    scipy.sparse.linalg.LinearOperator
        The inverse Laplacian on the inner corners (rows ``1:-1``, and columns
        ``1:-1`` unless periodic), flattened in C order.

    Notes
    -----
    The longitude second difference is diagonalised by a type-I discrete sine
    transform (Fourier transform when periodic); each wavenumber leaves a
    tridiagonal system in latitude. Cost per solve: two transforms and two
    sweeps, ``O(N log N)``.

    References
    ----------
    Hockney (1965), "A fast direct solution of Poisson's equation using
    Fourier analysis", J. ACM 12, 95-113; Swarztrauber (1974), "A direct method
    for the discrete solution of separable elliptic equations", SIAM J. Numer.
    Anal. 11, 1136-1150 (the spherical, variable-coefficient case).
    """
    lat_op, b, off = grid.laplacian_factors()
    ny1, m = grid.corner_shape
    if grid.periodic:
        eig = -4.0 * off * np.sin(np.pi * np.arange(m // 2 + 1) / m) ** 2
    else:
        eig = -4.0 * off * np.sin(np.pi * np.arange(1, m - 1) / (2 * (m - 1))) ** 2
    inner = np.arange(1, ny1 - 1)
    lines = _Tridiagonal(lat_op[inner, inner - 1], lat_op[inner, inner], lat_op[inner, inner + 1],
                         b[inner], eig)
    shape = (ny1 - 2, m if grid.periodic else m - 2)

    def apply(rhs: np.ndarray) -> np.ndarray:
        columns = rhs.reshape(shape + (-1,)).transpose(0, 2, 1)  # latitude, column, longitude
        if grid.periodic:
            hat = lines.sweep(scipy.fft.rfft(columns, axis=-1))
            out = scipy.fft.irfft(hat, n=m, axis=-1)
        else:
            out = scipy.fft.idst(lines.sweep(scipy.fft.dst(columns, type=1, axis=-1)), type=1,
                                 axis=-1)
        return out.transpose(0, 2, 1).reshape(rhs.shape)

    return _operator(shape[0] * shape[1], apply)


def separable_energy_inverse(grid: StaggeredGrid, pin: np.ndarray) -> spla.LinearOperator:
    """Fast solver for ``(E + diag(pin)) x = r``, ``E`` the gradient energy of a whole corner grid.

    ``E`` is :func:`flowpipe.regional.operators.gradient_energy` with every corner
    active (natural boundary conditions); ``pin`` a weight per corner row.

    Parameters
    ----------
    grid : StaggeredGrid
    pin : numpy.ndarray
        Non-negative weight per corner row; positive somewhere, to remove the constants.

    Returns
    -------
    scipy.sparse.linalg.LinearOperator
        ``(E + diag(pin))^-1`` on the corners, flattened in C order.

    Notes
    -----
    The longitude path Laplacian is diagonalised by a type-II discrete cosine
    transform (Fourier when periodic), leaving one tridiagonal system in
    latitude per wavenumber.

    References
    ----------
    Swarztrauber (1974), SIAM J. Numer. Anal. 11, 1136-1150; Strang (1999),
    "The discrete cosine transform", SIAM Review 41, 135-147 (the DCT-II as the
    eigenvector basis of the Neumann second difference).
    """
    ny1, m = grid.corner_shape
    zonal, meridional = grid.energy_factors()
    if grid.periodic:
        eig = 4.0 * np.sin(np.pi * np.arange(m // 2 + 1) / m) ** 2
    else:
        eig = 4.0 * np.sin(np.pi * np.arange(m) / (2 * m)) ** 2
    diag = np.concatenate([meridional, [0.0]]) + np.concatenate([[0.0], meridional]) + pin
    lines = _Tridiagonal(np.concatenate([[0.0], -meridional]), diag,
                         np.concatenate([-meridional, [0.0]]), zonal, eig)

    def apply(rhs: np.ndarray) -> np.ndarray:
        columns = rhs.reshape(ny1, m, -1).transpose(0, 2, 1)  # latitude, column, longitude
        if grid.periodic:
            out = scipy.fft.irfft(lines.sweep(scipy.fft.rfft(columns, axis=-1)), n=m, axis=-1)
        else:
            out = scipy.fft.idct(lines.sweep(scipy.fft.dct(columns, type=2, axis=-1, norm="ortho")),
                                 type=2, axis=-1, norm="ortho")
        return out.transpose(0, 2, 1).reshape(rhs.shape)

    return _operator(ny1 * m, apply)


def _each_potential(inverse: spla.LinearOperator) -> spla.LinearOperator:
    """``blockdiag(inverse, inverse)`` on the stacked streamfunction and velocity potential."""
    n = inverse.shape[0]

    def apply(rhs: np.ndarray) -> np.ndarray:
        pair = rhs.reshape(2, n, -1).transpose(1, 0, 2).reshape(n, -1)
        return inverse.matmat(pair).reshape(n, 2, -1).transpose(1, 0, 2).reshape(rhs.shape)

    return _operator(2 * n, apply)


#: SuperLU options for the matrices of the limited-area solvers, whose patterns are
#: symmetric and whose diagonals need no pivoting (the symmetric positive definite ones of
#: the variational solver; the diagonally dominant Laplacian of the Dirichlet one): a
#: minimum-degree ordering of ``A^T + A`` and the diagonal pivots. On a 1000 x 1000 level
#: with the mask of ``benchmarks/bench_masked.py`` they about halve the fill and make the
#: factorisation 1.7 to 2.8 times faster and each solve about 2 times faster than
#: SuperLU's default ordering and pivoting, with the same residual (the gradient energy:
#: ``benchmarks/bench_lu_ordering.py``; the Dirichlet Laplacian, measured alike by hand:
#: 4.1 s against 11.3 s, 64 against 127 million entries).
SYMMETRIC_LU = {"permc_spec": "MMD_AT_PLUS_A", "diag_pivot_thresh": 0.0,
                "options": {"SymmetricMode": True}}


#: Masked grids with at most this many interior corners get the sparse LU of the Dirichlet
#: Laplacian; larger ones the Schwarz-preconditioned iterations
#: (:func:`schwarz_laplacian_solve`), whose memory grows as the grid but each solve costs
#: several fast solves. Measured with the mask of ``benchmarks/bench_masked.py``, both
#: potentials, another benchmark running: at 1000 x 1000 (0.92 million corners) the LU took
#: 5.1 s and 1.0 GB to build and 0.15 s a solve, the Schwarz solver 0.5 s and 0.23 GB to
#: build and 1.4 s a solve (11 iterations); at 1500 x 1500, 13.2 s and 2.5 GB, 0.6 s against
#: 0.7 s and 0.5 GB, 3.7 s; at 2000 x 2000, 31 s and 4.6 GB, 0.9 s against 1.1 s and 0.9 GB,
#: 7.6 s. The LU is the faster from about the fifth level with the same mask, but the
#: solvers of several levels are cached at once (:data:`flowpipe.regional.cache.CACHE_SIZE`).
DIRICHLET_LU_LIMIT = 1_000_000
#: Corners within this many rows or columns of a missing corner form the near-mask
#: subdomain of the Schwarz preconditioner, solved exactly by a sparse LU. Measured at
#: 1000 x 1000 on the mask of ``benchmarks/bench_masked.py``, one right-hand side to a
#: relative residual of 1e-10: 4 corners, 31 iterations in 1.2 s; 16, 18 in 0.8 s; 48, 12 in
#: 0.65 s (the LU 0.25 s of it); without the subdomain (the fast solver alone), 67 in 1.7 s.
SCHWARZ_OVERLAP = 48
#: Relative residual (2-norm, each right-hand side) at which the Schwarz iterations stop.
SCHWARZ_TOLERANCE = 1e-10
SCHWARZ_MAX_ITERATIONS = 500


def _columns_dot(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """The inner product of each column of ``a`` with the same column of ``b``, without BLAS."""
    return np.einsum("ij,ij->j", a, b)


#: A solver of a linear system for columns of right-hand sides: ``(x, iterations)``.
ColumnSolve = Callable[[np.ndarray], tuple[np.ndarray, int]]


def _block_cg(apply: Callable[[np.ndarray], np.ndarray],
              precondition: Callable[[np.ndarray], np.ndarray], rhs: np.ndarray,
              tolerance: float, max_iterations: int,
              start: np.ndarray | None = None) -> tuple[np.ndarray, int]:
    """Preconditioned conjugate gradients on each column of ``rhs``, all columns in step.

    Parameters
    ----------
    apply, precondition : callable
        The symmetric positive definite matrix and its preconditioner, each applied to
        columns of shape ``(n, k)``.
    rhs : numpy.ndarray
        Shape ``(n, k)``.
    tolerance : float
        Relative residual 2-norm at which each column stops.
    max_iterations : int
    start : numpy.ndarray, optional
        The first iterate (zero if not given).

    Returns
    -------
    x : numpy.ndarray
        Shape ``(n, k)``.
    iterations : int
        Until the last column converged.

    Raises
    ------
    RuntimeError
        When a column has not converged after ``max_iterations``: with a symmetric
        positive definite matrix and preconditioner that is a bug.

    Notes
    -----
    Written out rather than :func:`scipy.sparse.linalg.cg` once per column: the
    columns (streamfunction and velocity potential) share each sparse product and fast
    transform, and the inner products avoid the threaded BLAS ``ddot`` that stalls on a
    busy machine (measured for :meth:`VariationalSolver.solve`).

    References
    ----------
    Hestenes & Stiefel (1952), "Methods of conjugate gradients for solving linear
    systems", J. Res. Nat. Bur. Standards 49, 409-436.
    """
    x = np.zeros_like(rhs) if start is None else start.copy()
    residual = rhs - apply(x) if start is not None else rhs.copy()
    target = tolerance**2 * _columns_dot(rhs, rhs)
    z = precondition(residual)
    direction = z.copy()
    rz = _columns_dot(residual, z)
    iterations = 0
    while np.any(_columns_dot(residual, residual) > target):
        if iterations == max_iterations:
            raise RuntimeError(f"conjugate gradients did not reach a relative residual of "
                               f"{tolerance:.0e} in {max_iterations} iterations")
        image = apply(direction)
        curvature = _columns_dot(direction, image)
        step = np.divide(rz, curvature, out=np.zeros_like(rz), where=curvature > 0)
        x += step * direction
        residual -= step * image
        z = precondition(residual)
        rz_new = _columns_dot(residual, z)
        direction = z + np.divide(rz_new, rz, out=np.zeros_like(rz), where=rz > 0) * direction
        rz = rz_new
        iterations += 1
    return x, iterations


def schwarz_laplacian_solve(grid: StaggeredGrid, interior: np.ndarray) -> ColumnSolve:
    """Iterative solver of the five-point corner Laplacian on a masked grid's interior corners.

    Conjugate gradients on the Laplacian weighted by the corner areas (symmetric
    positive definite), preconditioned by a symmetric multiplicative Schwarz method of
    two subdomains: the whole grid, whose Laplacian the separable fast solver inverts
    (:func:`separable_laplacian_inverse`, the missing corners embedded as unknowns), and
    the interior corners within :data:`SCHWARZ_OVERLAP` of a missing corner, solved
    exactly by a sparse LU. The fast solver alone is the fictitious-domain (capacitance)
    preconditioner, whose error sits along the edges of the mask; the local solve
    removes it there.

    Parameters
    ----------
    grid : StaggeredGrid
    interior : numpy.ndarray
        Boolean corner mask of the unknowns (:func:`flowpipe.regional.operators.interior_corners`).

    Returns
    -------
    solve : callable
        ``solve(columns) -> (x, iterations)`` for columns of right-hand sides in the
        order of ``flatnonzero(interior)``.

    References
    ----------
    Proskurowski & Widlund (1976), "On the numerical solution of Helmholtz's equation by
    the capacitance matrix method", Math. Comp. 30, 433-468 (a fast solver of the
    rectangle as the preconditioner of an irregular domain); Smith, Bjorstad & Gropp
    (1996), "Domain Decomposition", Cambridge University Press, chapter 1 (symmetrised
    multiplicative Schwarz as a preconditioner for conjugate gradients).
    """
    inner = np.zeros(grid.corner_shape, dtype=bool)
    inner[1:-1, slice(None) if grid.periodic else slice(1, -1)] = True
    # The iterates live on every inner corner (the fast solver's unknowns), zero at the
    # missing ones: no gathering and scattering around each fast solve.
    known = interior[inner][:, None]
    missing = inner & ~interior
    near = ndimage.distance_transform_cdt(~missing, metric="chessboard") <= SCHWARZ_OVERLAP
    local = np.flatnonzero((near & interior)[inner])
    index = np.flatnonzero(inner.ravel())
    area = np.broadcast_to(grid.corner_area, grid.corner_shape)[inner][:, None]
    matrix = sp.csr_array(sp.diags_array(-area[:, 0]) @ grid.laplacian[index][:, index])
    local_inverse = sparse_lu_inverse(matrix[local][:, local], **SYMMETRIC_LU)
    fast = separable_laplacian_inverse(grid)

    def apply(x: np.ndarray) -> np.ndarray:
        return known * (matrix @ x)

    def on_near(residual: np.ndarray) -> np.ndarray:
        out = np.zeros_like(residual)
        out[local] = local_inverse.matmat(residual[local])
        return out

    def precondition(residual: np.ndarray) -> np.ndarray:
        z = known * -fast.matmat(residual / area)
        return z + on_near(residual - apply(z))

    position = np.flatnonzero(known)

    def solve(columns: np.ndarray) -> tuple[np.ndarray, int]:
        rhs = np.zeros((index.size, columns.shape[1]))
        rhs[position] = columns
        rhs *= -area
        x, iterations = _block_cg(apply, precondition, rhs, SCHWARZ_TOLERANCE,
                                  SCHWARZ_MAX_ITERATIONS, start=on_near(rhs))
        return x[position], iterations

    return solve


class DirichletSolver:
    """Solver of the five-point corner Laplacian with zero values off the interior corners.

    Parameters
    ----------
    grid : StaggeredGrid
    interior : numpy.ndarray
        Boolean corner mask of the unknowns (:func:`flowpipe.regional.operators.interior_corners`).
    solve_columns : callable
        ``solve_columns(columns) -> (x, iterations)``: the Laplacian inverted on columns of
        right-hand sides at the interior corners, in the order of ``flatnonzero(interior)``.
    kind : str
        A key of :attr:`names`.
    """

    #: The solver's description, for a complete grid and the two for a masked one.
    names = {
        "separable": "separable fast Poisson solver (sine or Fourier transform in longitude, "
                     "tridiagonal in latitude)",
        "sparse": "sparse LU (SuperLU) of the five-point Laplacian, factorised once per grid "
                  "and mask",
        "schwarz": "conjugate gradients preconditioned by the separable fast Poisson solver of "
                   "the whole grid and the sparse LU (SuperLU) of the corners near the mask "
                   "(symmetric multiplicative Schwarz), built once per grid and mask",
    }

    def __init__(self, grid: StaggeredGrid, interior: np.ndarray, solve_columns: ColumnSolve,
                 kind: str) -> None:
        self.grid = grid
        self.interior = interior
        self._solve_columns = solve_columns
        self.name = self.names[kind]

    def solve(self, rhs: np.ndarray) -> tuple[np.ndarray, int]:
        """Solve ``L psi = rhs`` at the interior corners for each field of ``rhs``.

        ``rhs`` has shape ``(..., nlat + 1, ncorner_lon)``; ``psi`` the same, zero off
        the interior corners; and the iterations taken (0 for the direct solvers).
        """
        values = rhs[..., self.interior]
        columns = values.reshape(-1, values.shape[-1]).T
        x, iterations = self._solve_columns(columns)
        psi = np.zeros(rhs.shape)
        psi[..., self.interior] = x.T.reshape(values.shape)
        return psi, iterations


def _direct(inverse: spla.LinearOperator) -> ColumnSolve:
    """``solve_columns`` of a :class:`DirichletSolver` from an inverse as a LinearOperator."""
    return lambda columns: (inverse.matmat(columns), 0)


def dirichlet_solver(grid: StaggeredGrid, valid: np.ndarray) -> DirichletSolver:
    """The cheapest Dirichlet solver for a grid and its mask of valid wind points.

    A whole grid gets :func:`separable_laplacian_inverse`; a masked one the sparse LU of
    the Laplacian on its interior corners (:func:`sparse_lu_inverse`), or beyond
    :data:`DIRICHLET_LU_LIMIT` corners :func:`schwarz_laplacian_solve`.
    """
    interior = interior_corners(grid, valid)
    if valid.all():
        return DirichletSolver(grid, interior, _direct(separable_laplacian_inverse(grid)),
                               "separable")
    index = np.flatnonzero(interior.ravel())
    if index.size > DIRICHLET_LU_LIMIT:
        return DirichletSolver(grid, interior, schwarz_laplacian_solve(grid, interior),
                               "schwarz")
    inverse = sparse_lu_inverse(grid.laplacian[index][:, index], **SYMMETRIC_LU)
    return DirichletSolver(grid, interior, _direct(inverse), "sparse")


def _dot(a: np.ndarray, b: np.ndarray) -> float:
    """Inner product without BLAS: a threaded BLAS dot stalls on a busy machine."""
    return float(np.einsum("i,i->", a, b))


#: Masked grids with at most this many active corners get the coupled direct
#: preconditioner (its factorisation takes about 2 GB at the limit); larger
#: ones the uncoupled one, which needs far more iterations around the mask.
COUPLED_LIMIT = 250_000
#: Regulariser weight of the coupled preconditioner: large enough to keep its
#: factorisation well conditioned, small enough that few modes feel it.
COUPLED_WEIGHT = 1e-6


class VariationalSolver:
    """Regularised least-squares fit of corner potentials to the valid winds.

    Minimises, over ``psi`` and ``chi`` at the corners touching a valid wind point,

    ``sum_valid A |w - W_psi psi - W_chi chi|^2 + alpha (E(psi) + E(chi))``

    with ``A`` the cell areas and ``E(f)`` the discrete ``integral |grad f|^2 dA``
    over the active corners (:func:`flowpipe.regional.operators.gradient_energy`, plus a
    ``1e-6`` times weaker ``integral f^2 dA`` that fixes the arbitrary
    constants). The misfit and ``E`` have the same units (``E(psi)`` is the
    energy of the wind ``psi`` implies), so ``alpha`` is dimensionless.

    The wind operator has a null space: constants, the corner checkerboard
    (which makes no wind) and the harmonic pairs (a harmonic flow written
    either as a rotational or as a divergent wind). The normal equations are
    solved by conjugate gradients preconditioned with ``E`` itself, started
    from zero: the iterates then never leave the ``E``-orthogonal complement
    of that null space, so the result is, among the potentials that fit the
    wind, the pair of least total energy ``E(psi) + E(chi)`` - the limit of
    the Tikhonov solution for small ``alpha`` - with no checkerboard and the
    harmonic flow shared between the two parts. Iterations stop when the
    relative misfit falls to ``tolerance``.

    Parameters
    ----------
    grid : StaggeredGrid
    valid : numpy.ndarray
        Boolean mask of valid wind points.
    regularisation : float
        ``alpha``.
    tolerance : float
        Relative (area-weighted RMS) wind misfit at which iterations stop.
    max_iterations : int
        Upper bound of iterations.

    Attributes
    ----------
    wind : scipy.sparse.csr_array
        ``W``: the stacked potentials of the active corners to the stacked winds of
        the valid points.
    weight : numpy.ndarray
        ``M``: the cell areas of the valid points, once for ``u`` and once for ``v``.
    operator : scipy.sparse.linalg.LinearOperator
        The normal equations ``W^T M W + alpha (E + pin)``.
    preconditioner : scipy.sparse.linalg.LinearOperator
        The approximate inverse of :attr:`operator` the iterations use.

    Notes
    -----
    What depends on the grid and mask is built once: the sparse operators and
    the preconditioner. On a complete grid that is ``E`` itself, solved by a
    separable fast solver: a smooth wind needs a few tens of iterations
    whatever the grid size. Masks with re-entrant corners (a coast, a block
    below the ground) make the solution singular there, which ``E`` - blind to
    the coupling of the two potentials where the mask cuts the box stencils -
    resolves only in hundreds of iterations; so a masked grid with up to
    :data:`COUPLED_LIMIT` active corners is preconditioned by the sparse LU of
    the normal equations plus ``1e-6 E``, which keeps the iterates
    ``E``-orthogonal to the null space of the wind operator (for ``n`` in it
    ``n^T N = 0``, so ``(N + beta E) y = b`` with ``b`` orthogonal to ``n`` gives
    ``n^T E y = 0``): the same least-energy limit in one or two iterations.
    Larger masked grids fall back to the LU of ``E`` and its many iterations.

    Measured alternatives for the larger masked grids (400 x 400 box, a disc of 6
    degrees radius masked, the wind of ``benchmarks/bench_regional.py``; the coupled LU
    there: 2 iterations, 4.5 s), neither kept:

    * smoothed-aggregation algebraic multigrid (pyamg 5.4, the corner checkerboard of
      each potential as near-null candidates, CG-accelerated) on the matrix the coupled
      LU factorises: 300 iterations, 162 s, residual still 1.4e-5;
    * ``E + gamma W^T D W`` with ``D`` the cell areas of the valid points within 12 (or
      40) points of the mask, zero elsewhere: the coupled preconditioner near the mask
      only. It keeps the least-energy limit for any ``D`` (``W n = 0`` on the null
      space), and its LU is as cheap as that of ``E``, but with ``gamma`` 1e2 to 1e6 it
      had not converged after 150 iterations: the slow modes are not only those next to
      the mask.

    Two-level methods, measured on the mask of ``benchmarks/bench_masked.py`` (a disc
    and a ridge) with its wind, default tolerance and regularisation; the uncoupled
    preconditioner there takes 334 iterations at 200 x 200 and 597 at 400 x 400, and
    "off" is the largest difference of the rotational (or divergent) wind from the
    coupled preconditioner's, relative to the largest wind (the uncoupled one: 5e-7).
    The error of the uncoupled iterations is, away from the corners of the mask, a
    smooth modulation of the corner checkerboard: nearly no wind, much energy. None of
    these was kept:

    * coarse correction with the coupled matrix ``P^T (N + beta E) P``, ``P`` bilinear
      interpolation from every 4th (8th) corner, SuperLU, added to the uncoupled
      preconditioner (344 to 377 iterations at 200 x 200) or balanced with it (BNN,
      symmetric, for CG; 184 to 262), 0.16 to 0.36 off with ``beta`` 1e-6 to 1e-2 and
      still 0.01 to 0.04 with ``beta`` = 1;
    * the same with ``P`` extended by the checkerboard times each bilinear function:
      balanced, 21 iterations at 200 x 200 and 18 at 400 x 400 (40 with every 8th
      corner), but 0.36 and 0.41 off. The answer is not the least-energy one: the
      coarse space is not ``E``-orthogonal to the null space of ``W``, and the result
      carries a smooth harmonic pair with a fifth of the solution's energy and a wind
      of 2e-7. The checkerboard part alone: 51 to 96 iterations, 0.01 to 0.08 off
      whatever ``beta`` (1e-6 to 1e-2); with its functions zero within 2 corners of the
      mask, 156 iterations, 6e-3 off;
    * a correction that keeps the least-energy limit for any coarse matrix ``C``,
      ``E^-1 + E^-1 W^T M W P C P^T W^T M W E^-1`` (its range lies in the
      ``E``-complement of the null space): no faster than ``E^-1`` alone, even with the
      exact Galerkin ``C`` (222 iterations against 219 at 100 x 100);
    * the coupled LU replaced by an inner CG on its matrix, preconditioned by the
      balanced two-level method above (flexible outer CG): the inner iterations did not
      reach 1e-4 in 500;
    * the dual problem, CG on the winds ``(W E^-1 W^T M + alpha) y = w`` with
      ``x = E^-1 W^T M y``: each iterate stays in the ``E``-complement of the null
      space, so any preconditioner keeps the least-energy answer. Additive two-level,
      coarse space the checkerboard times bilinear functions of every 4th wind point,
      ``E^-1`` in the coarse matrix replaced by 4 damped Jacobi terms (exact on the
      checkerboard): 161 iterations at 200 x 200 and 147 at 400 x 400, 4e-7 off
      (every 2nd point: 87 iterations at 400 x 400, but 33 s to factorise the coarse
      matrix; the exact coarse matrix at 200 x 200: 120). At 1000 x 1000: 134
      iterations in 84 s after 40 s building the coarse matrix and its LU, where the
      complete grid takes 18 iterations in 3.0 s (one run, another benchmark running):
      the iterations no longer grow with the grid, but a masked level still costs about
      28 times an unmasked one.

    References
    ----------
    Li, Chao & McWilliams (2006), "Computation of the streamfunction and
    velocity potential for limited and irregular domains", Mon. Wea. Rev.
    134, 3384-3394 (the least-squares formulation with Tikhonov
    regularisation); Hestenes & Stiefel (1952), "Methods of conjugate gradients
    for solving linear systems", J. Res. Nat. Bur. Standards 49, 409-436;
    Hansen (1998), "Rank-Deficient and Discrete Ill-Posed Problems", SIAM,
    section 6.3 (preconditioned CG started from zero converges to the solution
    of least seminorm). For the measured two-level alternatives: Nicolaides (1987),
    "Deflation of conjugate gradients with applications to boundary value problems",
    SIAM J. Numer. Anal. 24, 355-365; Mandel (1993), "Balancing domain decomposition",
    Commun. Numer. Methods Eng. 9, 233-241; Frank & Vuik (2001), "On the construction of
    deflation-based preconditioners", SIAM J. Sci. Comput. 23, 442-462; Tang, Nabben,
    Vuik & Erlangga (2009), "Comparison of two-level preconditioners derived from
    deflation, domain decomposition and multigrid methods", J. Sci. Comput. 39, 340-370.
    """

    #: The solver's description, for each kind of preconditioner (:meth:`kind`).
    names = {
        "complete": "conjugate gradients preconditioned by a separable fast solver (cosine or "
                    "Fourier transform in longitude, tridiagonal in latitude)",
        "coupled": "conjugate gradients preconditioned by a sparse LU (SuperLU) of the "
                   "regularised normal equations, factorised once per grid and mask",
        "uncoupled": "conjugate gradients preconditioned by a sparse LU (SuperLU) of the "
                     "gradient energy, factorised once per grid and mask",
    }

    @classmethod
    def kind(cls, grid: StaggeredGrid, valid: np.ndarray) -> str:
        """Which preconditioner a grid and mask get (a key of :attr:`names`)."""
        if valid.all():
            return "complete"
        if np.count_nonzero(active_corners(grid, valid)) <= COUPLED_LIMIT:
            return "coupled"
        return "uncoupled"

    def __init__(self, grid: StaggeredGrid, valid: np.ndarray, regularisation: float,
                 tolerance: float = 1e-7, max_iterations: int = 1000) -> None:
        self.grid = grid
        self.valid = valid
        self.regularisation = regularisation
        self.tolerance = tolerance
        self.max_iterations = max_iterations
        rows = np.flatnonzero(valid.ravel())
        active = active_corners(grid, valid)
        self._cols = np.flatnonzero(active.ravel())
        u_psi, v_psi, u_chi, v_chi = grid.wind_operators
        pick = [op[rows][:, self._cols] for op in (u_psi, v_psi, u_chi, v_chi)]
        self.wind = sp.block_array([[pick[0], pick[2]], [pick[1], pick[3]]], format="csr")
        self._wind_t = self.wind.T.tocsr()
        area = np.broadcast_to(grid.centre_area, grid.shape).ravel()[rows]
        self.weight = np.concatenate([area, area])
        energy = gradient_energy(grid, active)
        corner_area = np.broadcast_to(grid.corner_area, grid.corner_shape).ravel()[self._cols]
        pin = 1e-6 * self._gravest_eigenvalue(energy, corner_area) * corner_area
        energy = energy + sp.diags_array(pin)
        stacked_energy = sp.block_diag([energy, energy], format="csr")
        self._regulariser = regularisation * stacked_energy
        self.operator = _operator(2 * self._cols.size, self._normal)
        kind = self.kind(grid, valid)
        if kind == "complete":
            self.preconditioner = _each_potential(
                separable_energy_inverse(grid, pin.reshape(grid.corner_shape)[:, 0]))
        elif kind == "coupled":
            normal = self._wind_t @ sp.diags_array(self.weight) @ self.wind
            self.preconditioner = sparse_lu_inverse(normal + COUPLED_WEIGHT * stacked_energy,
                                                    **SYMMETRIC_LU)
        else:
            self.preconditioner = _each_potential(sparse_lu_inverse(energy, **SYMMETRIC_LU))
        self.name = self.names[kind]

    def _gravest_eigenvalue(self, energy: sp.csr_array, corner_area: np.ndarray) -> float:
        """Rayleigh quotient ``E(f) / integral f^2 dA`` of the domain's gravest sine mode."""
        ny1, m = self.grid.corner_shape
        jj, ii = np.meshgrid(np.arange(ny1), np.arange(m), indexing="ij")
        mode = np.sin(np.pi * (jj + 0.5) / ny1)
        if not self.grid.periodic:
            mode = mode * np.sin(np.pi * (ii + 0.5) / m)
        x = mode.ravel()[self._cols]
        return _dot(x, energy @ x) / _dot(x, corner_area * x)

    def _normal(self, x: np.ndarray, wind: np.ndarray | None = None) -> np.ndarray:
        """``W^T M W x + alpha (E + pin) x``; ``wind`` is ``W x`` when known already."""
        if wind is None:
            wind = self.wind @ x
        return self._wind_t @ (self.weight.reshape((-1,) + (1,) * (x.ndim - 1)) * wind) + (
            self._regulariser @ x)

    def _progress(self, iterations: int, first: float, now: float, target: float,
                  start: float) -> str:
        """The note of an iteration: its count, the misfit and a guess of the time left.

        The guess extrapolates the mean decrease of the misfit per iteration so far
        (its logarithm, linearly) to :attr:`tolerance`, at the mean time per iteration.
        """
        text = (f"CG iteration {iterations}/{self.max_iterations}, misfit "
                f"{math.sqrt(now / first):.1e} (stops at {self.tolerance:.0e})")
        rate = math.log(first / now) / iterations if now < first else 0.0
        if rate > 0:
            left = min(math.log(now / target) / rate, self.max_iterations - iterations)
            text += f", about {left * (time.perf_counter() - start) / iterations:.0f} s left"
        return text

    def solve(self, rhs: np.ndarray) -> tuple[np.ndarray, int]:
        """Corner streamfunction and velocity potential, and the iterations taken.

        Parameters
        ----------
        rhs : numpy.ndarray
            The wind ``(u, v)`` stacked, shape ``(2, nlat, nlon)``, valid where the
            solver's mask is.

        Returns
        -------
        x : numpy.ndarray
            ``(psi, chi)`` stacked, shape ``(2, nlat + 1, ncorner_lon)``, zero off the
            active corners.
        iterations : int

        Notes
        -----
        Preconditioned conjugate gradients (Hestenes & Stiefel 1952) written out here
        rather than :func:`scipy.sparse.linalg.cg` on :attr:`operator` and
        :attr:`preconditioner`, for two reasons measured side by side by
        ``benchmarks/bench_cg.py`` (500 x 500 complete grid, the smooth wind of
        ``bench_regional.py``, 21 iterations on either side, winds 4e-14 apart):

        * ``cg``'s inner products are ``numpy.dot``, a BLAS ``ddot`` that OpenBLAS
          spreads over its threads for long vectors (from memory: over 10,000
          elements). On the shared 2-core machine, with the BLAS threads it gives,
          ``cg`` took 2.8 and 5.2 times as long as this loop (two runs, median of 7
          each: 5.81 s against 2.10 s, 14.2 s against 2.73 s); with
          ``OPENBLAS_NUM_THREADS=1``, 1.07 times (the extra product below). The fix
          would be a process-wide BLAS thread limit, which a library called from
          dask threads should not set; this loop's inner products (:func:`_dot`)
          do not use BLAS;
        * ``cg`` stops on the normal equations' residual, which bounds the wind
          misfit only loosely: with ``rtol`` = :attr:`tolerance` it took 43
          iterations to a misfit of 1.2e-8 where 21 reach 9.9e-8 (on the test
          winds the misfit came out 0.05 to 0.5 times ``rtol``). Stopping it on the
          misfit, as :attr:`tolerance` promises, takes a callback with one more
          sparse product per iteration and an exception, while this loop updates
          the misfit from the product it already makes.
        """
        rows = self.valid.ravel()
        w = rhs.reshape(2, -1)[:, rows].ravel()
        misfit = w.copy()
        target = self.tolerance**2 * _dot(w, self.weight * w)
        residual = self._wind_t @ (self.weight * w)
        x = np.zeros_like(residual)
        z = self.preconditioner.matvec(residual)
        direction = z.copy()
        rz = _dot(residual, z)
        iterations = 0
        start, first = time.perf_counter(), _dot(w, self.weight * w)
        while (iterations < self.max_iterations
               and (now := _dot(misfit, self.weight * misfit)) > target):
            if iterations:
                note(lambda k=iterations, m=now: self._progress(k, first, m, target, start))
            wind = self.wind @ direction
            image = self._normal(direction, wind)
            step = rz / _dot(direction, image)
            x += step * direction
            residual -= step * image
            misfit -= step * wind
            z = self.preconditioner.matvec(residual)
            rz_new = _dot(residual, z)
            direction = z + (rz_new / rz) * direction
            rz = rz_new
            iterations += 1
        potentials = np.zeros((2,) + self.grid.corner_shape)
        potentials.reshape(2, -1)[:, self._cols] = x.reshape(2, -1)
        return potentials, iterations
