"""Factorised solvers and the two limited-area Helmholtz partitions.

Everything that depends only on the grid and the mask (transforms'
eigenvalues, tridiagonal eliminations, sparse LU factors) is built once by the
solver constructors; ``solve`` then costs transforms and triangular sweeps
only, so one solver serves every level and time of a run.
"""

from __future__ import annotations

import numpy as np
import scipy.fft
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from ._staggered import (
    StaggeredGrid,
    active_corners,
    corners_to_centres,
    curl_and_divergence,
    gradient_energy,
    interior_corners,
)


class SeparableDirichletSolver:
    """Fast Poisson solver for the five-point corner Laplacian on a whole grid.

    Zero values on the outer ring of corners (on the northern and southern
    rings only when the grid is periodic in longitude).

    Parameters
    ----------
    grid : StaggeredGrid

    Notes
    -----
    The longitude second difference is diagonalised by a type-I discrete sine
    transform (Fourier transform when periodic); each wavenumber leaves a
    tridiagonal system in latitude, whose Thomas elimination is done here,
    once, for all wavenumbers. Cost per solve: two transforms and two sweeps,
    ``O(N log N)``.

    References
    ----------
    Hockney (1965), "A fast direct solution of Poisson's equation using
    Fourier analysis", J. ACM 12, 95-113; Swarztrauber (1974), "A direct method
    for the discrete solution of separable elliptic equations", SIAM J. Numer.
    Anal. 11, 1136-1150 (the spherical, variable-coefficient case).
    """

    name = "separable fast Poisson solver (sine or Fourier transform in longitude, " \
           "tridiagonal in latitude)"

    def __init__(self, grid: StaggeredGrid) -> None:
        self.grid = grid
        lat_op, b, off = grid.laplacian_factors()
        ny1, m = grid.corner_shape
        if grid.periodic:
            k = np.arange(m // 2 + 1)
            eig = -4.0 * off * np.sin(np.pi * k / m) ** 2
        else:
            k = np.arange(1, m - 1)
            eig = -4.0 * off * np.sin(np.pi * k / (2 * (m - 1))) ** 2
        inner = np.arange(1, ny1 - 1)
        dense = lat_op.toarray()
        lower = np.array([dense[j, j - 1] for j in inner])
        upper = np.array([dense[j, j + 1] for j in inner])
        diag = np.array([dense[j, j] for j in inner])[:, None] + b[inner, None] * eig[None, :]
        self._lower = lower
        # Thomas elimination: den_j = d_j - l_j * c'_{j-1}, c'_j = u_j / den_j.
        den = np.empty_like(diag)
        cprime = np.empty_like(diag)
        den[0] = diag[0]
        cprime[0] = upper[0] / den[0]
        for j in range(1, inner.size):
            den[j] = diag[j] - lower[j] * cprime[j - 1]
            cprime[j] = upper[j] / den[j]
        self._den = den
        self._cprime = cprime

    def solve(self, rhs: np.ndarray) -> np.ndarray:
        """Solve ``L psi = rhs`` at the inner corners; ``psi`` is zero on the boundary ring."""
        grid = self.grid
        if grid.periodic:
            hat = scipy.fft.rfft(rhs[1:-1], axis=1)
        else:
            hat = scipy.fft.dst(rhs[1:-1, 1:-1], type=1, axis=1)
        out = np.empty_like(hat)
        out[0] = hat[0] / self._den[0]
        for j in range(1, hat.shape[0]):
            out[j] = (hat[j] - self._lower[j] * out[j - 1]) / self._den[j]
        for j in range(hat.shape[0] - 2, -1, -1):
            out[j] -= self._cprime[j] * out[j + 1]
        psi = np.zeros(grid.corner_shape)
        if grid.periodic:
            psi[1:-1] = scipy.fft.irfft(out, n=grid.corner_shape[1], axis=1)
        else:
            psi[1:-1, 1:-1] = scipy.fft.idst(out, type=1, axis=1)
        return psi


class SparseDirichletSolver:
    """Sparse LU solver for the five-point corner Laplacian on a masked domain.

    Zero values at every corner that is not surrounded by four valid wind points.

    Parameters
    ----------
    grid : StaggeredGrid
    interior : numpy.ndarray
        Boolean corner mask (:func:`flowpipe._staggered.interior_corners`).

    References
    ----------
    Li, Demmel & Gilbert, SuperLU (Li 2005, "An overview of SuperLU:
    algorithms, implementation, and user interface", ACM Trans. Math. Softw.
    31, 302-325), through :func:`scipy.sparse.linalg.splu`.
    """

    name = "sparse LU (SuperLU) of the five-point Laplacian, factorised once per grid and mask"

    def __init__(self, grid: StaggeredGrid, interior: np.ndarray) -> None:
        self.grid = grid
        self._index = np.flatnonzero(interior.ravel())
        lap = grid.laplacian[self._index][:, self._index]
        self._lu = spla.splu(sp.csc_matrix(lap))

    def solve(self, rhs: np.ndarray) -> np.ndarray:
        """Solve ``L psi = rhs`` at the interior corners; ``psi`` is zero elsewhere."""
        psi = np.zeros(self.grid.corner_shape)
        psi.ravel()[self._index] = self._lu.solve(rhs.ravel()[self._index])
        return psi


def dirichlet_solver(grid: StaggeredGrid,
                     valid: np.ndarray) -> SeparableDirichletSolver | SparseDirichletSolver:
    """The cheapest Dirichlet solver for a grid and its mask of valid wind points."""
    if valid.all():
        return SeparableDirichletSolver(grid)
    return SparseDirichletSolver(grid, interior_corners(grid, valid))


def _weighted_energy(grid: StaggeredGrid, u: np.ndarray, v: np.ndarray) -> float:
    return float(np.nansum(grid.centre_area * (u**2 + v**2)))


def _centre_winds(grid: StaggeredGrid, psi: np.ndarray, chi: np.ndarray,
                  valid: np.ndarray) -> dict[str, np.ndarray]:
    u_psi, v_psi, u_chi, v_chi = grid.wind_operators
    shape = grid.shape

    def at_valid(x: np.ndarray) -> np.ndarray:
        return np.where(valid, x.reshape(shape), np.nan)

    return {
        "streamfunction": at_valid(grid.corner_mean @ psi.ravel()),
        "velocity_potential": at_valid(grid.corner_mean @ chi.ravel()),
        "u_rotational": at_valid(u_psi @ psi.ravel()),
        "v_rotational": at_valid(v_psi @ psi.ravel()),
        "u_divergent": at_valid(u_chi @ chi.ravel()),
        "v_divergent": at_valid(v_chi @ chi.ravel()),
    }


def dirichlet_partition(grid: StaggeredGrid, u: np.ndarray, v: np.ndarray,
                        solver: SeparableDirichletSolver | SparseDirichletSolver
                        ) -> tuple[dict[str, np.ndarray], dict[str, float]]:
    """Partition a limited-area wind into rotational, divergent and harmonic parts.

    Solves ``lap psi = zeta`` and ``lap chi = delta`` with zero boundary values
    and leaves the rest of the wind as the harmonic part.

    Parameters
    ----------
    grid : StaggeredGrid
    u, v : numpy.ndarray
        Wind at the centres, m s-1, NaN where missing (the mask the solver was built for).
    solver : SeparableDirichletSolver or SparseDirichletSolver
        Built once for this grid and mask.

    Returns
    -------
    fields : dict of numpy.ndarray
        ``streamfunction``, ``velocity_potential``, ``vorticity``,
        ``divergence``, ``u_rotational``, ``v_rotational``, ``u_divergent``,
        ``v_divergent``, ``u_harmonic``, ``v_harmonic`` on the centres.
    diagnostics : dict of float
        ``reconstruction_error`` (relative, area-weighted, valid points) and
        ``harmonic_energy_share``.

    References
    ----------
    Lynch (1989), "Partitioning the wind in a limited domain", Mon. Wea.
    Rev. 117, 1492-1500 (the internal and harmonic parts, eqs. 2.4-2.6).
    """
    valid = np.isfinite(u) & np.isfinite(v)
    interior = interior_corners(grid, valid)
    zeta, delta = curl_and_divergence(grid, u, v, interior)
    psi = solver.solve(np.nan_to_num(zeta))
    chi = solver.solve(np.nan_to_num(delta))
    fields = _centre_winds(grid, psi, chi, valid)
    fields["vorticity"] = corners_to_centres(grid, zeta)
    fields["divergence"] = corners_to_centres(grid, delta)
    fields["u_harmonic"] = u - fields["u_rotational"] - fields["u_divergent"]
    fields["v_harmonic"] = v - fields["v_rotational"] - fields["v_divergent"]
    total = _weighted_energy(grid, u, v)
    rest_u = u - fields["u_rotational"] - fields["u_divergent"] - fields["u_harmonic"]
    rest_v = v - fields["v_rotational"] - fields["v_divergent"] - fields["v_harmonic"]
    diagnostics = {
        "reconstruction_error": np.sqrt(_weighted_energy(grid, rest_u, rest_v) / total),
        "harmonic_energy_share": _weighted_energy(grid, fields["u_harmonic"],
                                                  fields["v_harmonic"]) / total,
    }
    return fields, diagnostics


class VariationalSolver:
    """Regularised least-squares fit of corner potentials to the valid winds.

    Minimises, over ``psi`` and ``chi`` at the corners touching a valid wind point,

    ``sum_valid A |w - W_psi psi - W_chi chi|^2 + alpha (E(psi) + E(chi))``

    with ``A`` the cell areas and ``E(f)`` the discrete ``integral |grad f|^2 dA``
    over the active corners (:func:`flowpipe._staggered.gradient_energy`). The
    misfit and ``E`` have the same units (``E(psi)`` is the energy of the wind
    ``psi`` implies), so ``alpha`` is dimensionless: the relative misfit it
    leaves is about ``alpha``. Among the potentials giving the same wind, the
    term picks the pair of least total energy in the rotational and divergent
    parts. It damps the corner checkerboard, the only grid-scale null mode of
    box differences (it makes no wind). A term ``1e-6 alpha`` times weaker
    penalising ``psi^2 + chi^2`` fixes the arbitrary constants.

    Parameters
    ----------
    grid : StaggeredGrid
    valid : numpy.ndarray
        Boolean mask of valid wind points.
    regularisation : float
        ``alpha``.

    Notes
    -----
    The normal equations are factorised once (sparse LU) and reused.

    References
    ----------
    Li, Chao & McWilliams (2006), "Computation of the streamfunction and
    velocity potential for limited and irregular domains", Mon. Wea. Rev.
    134, 3384-3394 (the least-squares formulation with Tikhonov
    regularisation); Tikhonov & Arsenin (1977), "Solutions of ill-posed
    problems", Winston (first-order regularisation).
    """

    name = "sparse LU (SuperLU) of the regularised normal equations, factorised once per grid " \
           "and mask"

    def __init__(self, grid: StaggeredGrid, valid: np.ndarray, regularisation: float) -> None:
        self.grid = grid
        self.valid = valid
        rows = np.flatnonzero(valid.ravel())
        active = active_corners(grid, valid)
        self._cols = np.flatnonzero(active.ravel())
        u_psi, v_psi, u_chi, v_chi = grid.wind_operators
        pick = [op[rows][:, self._cols] for op in (u_psi, v_psi, u_chi, v_chi)]
        self._w = sp.block_array([[pick[0], pick[2]], [pick[1], pick[3]]], format="csr")
        area = np.broadcast_to(grid.centre_area, grid.shape).ravel()[rows]
        self._weight = np.concatenate([area, area])
        normal = self._w.T @ sp.diags_array(self._weight) @ self._w
        energy = gradient_energy(grid, active)
        corner_area = np.broadcast_to(grid.corner_area, grid.corner_shape).ravel()[self._cols]
        pin = 1e-6 * self._gravest_eigenvalue(energy, corner_area) * corner_area
        penalty = regularisation * (energy + sp.diags_array(pin))
        self._lu = spla.splu(sp.csc_matrix(normal + sp.block_diag([penalty, penalty])))

    def _gravest_eigenvalue(self, energy: sp.csr_array, corner_area: np.ndarray) -> float:
        """Rayleigh quotient ``E(f) / integral f^2 dA`` of the domain's gravest sine mode."""
        ny1, m = self.grid.corner_shape
        jj, ii = np.meshgrid(np.arange(ny1), np.arange(m), indexing="ij")
        mode = np.sin(np.pi * (jj + 0.5) / ny1)
        if not self.grid.periodic:
            mode = mode * np.sin(np.pi * (ii + 0.5) / m)
        x = mode.ravel()[self._cols]
        return float(x @ (energy @ x) / (x @ (corner_area * x)))

    def solve(self, u: np.ndarray, v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Corner streamfunction and velocity potential for a wind on this solver's mask."""
        rows = self.valid.ravel()
        w = np.concatenate([u.ravel()[rows], v.ravel()[rows]])
        x = self._lu.solve(self._w.T @ (self._weight * w))
        n = self._cols.size
        psi = np.zeros(self.grid.corner_shape)
        chi = np.zeros(self.grid.corner_shape)
        psi.ravel()[self._cols] = x[:n]
        chi.ravel()[self._cols] = x[n:]
        return psi, chi


def variational_partition(grid: StaggeredGrid, u: np.ndarray, v: np.ndarray,
                          solver: VariationalSolver,
                          harmonic_solver: SeparableDirichletSolver | SparseDirichletSolver
                          ) -> tuple[dict[str, np.ndarray], dict[str, float]]:
    """Rotational and divergent winds from the least-squares potentials.

    Parameters
    ----------
    grid : StaggeredGrid
    u, v : numpy.ndarray
        Wind at the centres, m s-1, NaN where missing (the solver's mask).
    solver : VariationalSolver
        Built once for this grid and mask.
    harmonic_solver : SeparableDirichletSolver or SparseDirichletSolver
        For the quality figure: the energy share of the harmonic part of the
        Dirichlet partition, which is the part of the wind that the
        regularisation, not the data, assigns.

    Returns
    -------
    fields : dict of numpy.ndarray
        As :func:`dirichlet_partition`, without the harmonic wind.
    diagnostics : dict of float
        ``reconstruction_error`` and ``harmonic_energy_share``.

    References
    ----------
    Li, Chao & McWilliams (2006), Mon. Wea. Rev. 134, 3384-3394.
    """
    psi, chi = solver.solve(u, v)
    fields = _centre_winds(grid, psi, chi, solver.valid)
    reference, reference_diagnostics = dirichlet_partition(grid, u, v, harmonic_solver)
    fields["vorticity"] = reference["vorticity"]
    fields["divergence"] = reference["divergence"]
    rest_u = u - fields["u_rotational"] - fields["u_divergent"]
    rest_v = v - fields["v_rotational"] - fields["v_divergent"]
    diagnostics = {
        "reconstruction_error": np.sqrt(_weighted_energy(grid, rest_u, rest_v)
                                        / _weighted_energy(grid, u, v)),
        "harmonic_energy_share": reference_diagnostics["harmonic_energy_share"],
    }
    return fields, diagnostics
