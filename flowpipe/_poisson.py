"""Factorised solvers and the two limited-area Helmholtz partitions.

Everything that depends only on the grid and the mask (transforms'
eigenvalues, tridiagonal eliminations, sparse LU factors) is built once by the
solver constructors; ``solve`` then costs transforms and triangular sweeps
only, so one solver serves every level and time of a run.
"""

from __future__ import annotations

import threading

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


class _SeparableSolver:
    """Batched Thomas elimination for ``(T + diag(scale) * eig_k) x_k = r_k``, all ``k`` at once.

    ``T`` is tridiagonal in latitude (``lower``, ``diag``, ``upper``) and
    ``eig_k`` the eigenvalues of the longitude operator that the subclass
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

    def _sweep(self, hat: np.ndarray) -> np.ndarray:
        out = np.empty_like(hat)
        out[0] = hat[0] / self._den[0]
        for j in range(1, hat.shape[0]):
            out[j] = (hat[j] - self._lower[j] * out[j - 1]) / self._den[j]
        for j in range(hat.shape[0] - 2, -1, -1):
            out[j] -= self._cprime[j] * out[j + 1]
        return out


class SeparableDirichletSolver(_SeparableSolver):
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
    tridiagonal system in latitude. Cost per solve: two transforms and two
    sweeps, ``O(N log N)``.

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
            eig = -4.0 * off * np.sin(np.pi * np.arange(m // 2 + 1) / m) ** 2
        else:
            eig = -4.0 * off * np.sin(np.pi * np.arange(1, m - 1) / (2 * (m - 1))) ** 2
        inner = np.arange(1, ny1 - 1)
        super().__init__(lat_op[inner, inner - 1], lat_op[inner, inner],
                         lat_op[inner, inner + 1], b[inner], eig)

    def solve(self, rhs: np.ndarray) -> np.ndarray:
        """Solve ``L psi = rhs`` at the inner corners; ``psi`` is zero on the boundary ring."""
        psi = np.zeros(self.grid.corner_shape)
        if self.grid.periodic:
            hat = self._sweep(scipy.fft.rfft(rhs[1:-1], axis=1))
            psi[1:-1] = scipy.fft.irfft(hat, n=self.grid.corner_shape[1], axis=1)
        else:
            hat = self._sweep(scipy.fft.dst(rhs[1:-1, 1:-1], type=1, axis=1))
            psi[1:-1, 1:-1] = scipy.fft.idst(hat, type=1, axis=1)
        return psi


class SeparableEnergySolver(_SeparableSolver):
    """Fast solver for ``(E + diag(pin)) x = r``, ``E`` the gradient energy of a whole corner grid.

    ``E`` is :func:`flowpipe._staggered.gradient_energy` with every corner
    active (natural boundary conditions); ``pin`` a weight per corner row.

    Parameters
    ----------
    grid : StaggeredGrid
    pin : numpy.ndarray
        Non-negative weight per corner row; positive somewhere, to remove the constants.

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

    def __init__(self, grid: StaggeredGrid, pin: np.ndarray) -> None:
        self.grid = grid
        ny1, m = grid.corner_shape
        zonal, meridional = grid.energy_factors()
        if grid.periodic:
            eig = 4.0 * np.sin(np.pi * np.arange(m // 2 + 1) / m) ** 2
        else:
            eig = 4.0 * np.sin(np.pi * np.arange(m) / (2 * m)) ** 2
        diag = np.concatenate([meridional, [0.0]]) + np.concatenate([[0.0], meridional]) + pin
        off = np.concatenate([[0.0], -meridional])
        super().__init__(off, diag, np.concatenate([-meridional, [0.0]]), zonal, eig)

    def solve(self, rhs: np.ndarray) -> np.ndarray:
        """Solve on the whole corner grid, ``rhs`` of shape ``(nlat + 1, ..., ncorner_lon)``."""
        if self.grid.periodic:
            hat = self._sweep(scipy.fft.rfft(rhs, axis=-1))
            return scipy.fft.irfft(hat, n=self.grid.corner_shape[1], axis=-1)
        hat = self._sweep(scipy.fft.dct(rhs, type=2, axis=-1, norm="ortho"))
        return scipy.fft.idct(hat, type=2, axis=-1, norm="ortho")


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
        self._lock = threading.Lock()  # one factorisation shared by the dask threads

    def solve(self, rhs: np.ndarray) -> np.ndarray:
        """Solve ``L psi = rhs`` at the interior corners; ``psi`` is zero elsewhere."""
        psi = np.zeros(self.grid.corner_shape)
        with self._lock:
            psi.ravel()[self._index] = self._lu.solve(rhs.ravel()[self._index])
        return psi


def dirichlet_solver(grid: StaggeredGrid,
                     valid: np.ndarray) -> SeparableDirichletSolver | SparseDirichletSolver:
    """The cheapest Dirichlet solver for a grid and its mask of valid wind points."""
    if valid.all():
        return SeparableDirichletSolver(grid)
    return SparseDirichletSolver(grid, interior_corners(grid, valid))


def _weighted_inner(grid: StaggeredGrid, u1: np.ndarray, v1: np.ndarray, u2: np.ndarray,
                    v2: np.ndarray) -> float:
    """Area-weighted inner product of two winds over the points where both are valid."""
    return float(np.nansum(grid.centre_area * (u1 * u2 + v1 * v2)))


def _weighted_energy(grid: StaggeredGrid, u: np.ndarray, v: np.ndarray) -> float:
    return _weighted_inner(grid, u, v, u, v)


def _at_centres(grid: StaggeredGrid, zeta: np.ndarray, delta: np.ndarray
                ) -> tuple[np.ndarray, np.ndarray]:
    return corners_to_centres(grid, zeta), corners_to_centres(grid, delta)


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
        ``reconstruction_error`` (relative, area-weighted, valid points; zero
        by construction, as the harmonic part is the rest),
        ``harmonic_energy_share``, ``harmonic_rotation`` (the figure that can
        fail: :func:`harmonic_rotation`) and ``iterations`` (0: direct solves).

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
    fields["vorticity"], fields["divergence"] = _at_centres(grid, zeta, delta)
    fields["u_harmonic"] = u - fields["u_rotational"] - fields["u_divergent"]
    fields["v_harmonic"] = v - fields["v_rotational"] - fields["v_divergent"]
    return fields, partition_figures(grid, u, v, fields)


def partition_figures(grid: StaggeredGrid, u: np.ndarray, v: np.ndarray,
                      fields: dict[str, np.ndarray]) -> dict[str, float]:
    """Quality figures of a partition with a harmonic wind, at the valid points of ``u, v``.

    Parameters
    ----------
    grid : StaggeredGrid
    u, v : numpy.ndarray
        The wind partitioned, NaN where missing.
    fields : dict of numpy.ndarray
        The rotational, divergent and harmonic winds.

    Returns
    -------
    dict of float
        ``reconstruction_error``: the relative area-weighted RMS of what the
        three parts leave of the wind; ``harmonic_energy_share``: the area-
        weighted energy of the harmonic wind over that of the wind (never
        negative); ``harmonic_rotation`` (:func:`harmonic_rotation`, the figure
        that can fail); ``iterations`` 0 (direct solves).

    References
    ----------
    Lynch (1989), "Partitioning the wind in a limited domain", Mon. Wea.
    Rev. 117, 1492-1500, eq. 2.6 (the three parts add up to the wind).
    """
    interior = interior_corners(grid, np.isfinite(u) & np.isfinite(v))
    zeta, delta = curl_and_divergence(grid, u, v, interior)
    total = _weighted_energy(grid, u, v)
    rest_u = u - fields["u_rotational"] - fields["u_divergent"] - fields["u_harmonic"]
    rest_v = v - fields["v_rotational"] - fields["v_divergent"] - fields["v_harmonic"]
    return {
        "reconstruction_error": np.sqrt(_weighted_energy(grid, rest_u, rest_v) / total),
        "harmonic_energy_share": _weighted_energy(grid, fields["u_harmonic"],
                                                  fields["v_harmonic"]) / total,
        "harmonic_rotation": harmonic_rotation(grid, interior, zeta, delta,
                                               fields["u_harmonic"], fields["v_harmonic"]),
        "iterations": 0,
    }


def harmonic_rotation(grid: StaggeredGrid, interior: np.ndarray, zeta: np.ndarray,
                      delta: np.ndarray, u_harmonic: np.ndarray, v_harmonic: np.ndarray
                      ) -> float:
    """How far a harmonic wind is from harmonic: its vorticity and divergence against the wind's.

    Parameters
    ----------
    grid : StaggeredGrid
    interior : numpy.ndarray
        Interior corners (:func:`flowpipe._staggered.interior_corners`).
    zeta, delta : numpy.ndarray
        Vorticity and divergence of the wind at the corners.
    u_harmonic, v_harmonic : numpy.ndarray
        The harmonic wind at the centres.

    Returns
    -------
    float
        ``sqrt(sum A (zeta_h**2 + delta_h**2) / sum A (zeta**2 + delta**2))`` over
        the interior corners (``A`` their areas): zero, to the solver's accuracy,
        when the Poisson problems were solved (the harmonic wind is both
        non-divergent and irrotational); of order one when they were not.

    References
    ----------
    Lynch (1989), "Partitioning the wind in a limited domain", Mon. Wea. Rev.
    117, 1492-1500 (the harmonic part is irrotational and non-divergent).
    """
    zeta_h, delta_h = curl_and_divergence(grid, u_harmonic, v_harmonic, interior)
    area = np.broadcast_to(grid.corner_area, grid.corner_shape)[interior]
    wind = area @ (zeta[interior] ** 2 + delta[interior] ** 2)
    rest = area @ (zeta_h[interior] ** 2 + delta_h[interior] ** 2)
    return float(np.sqrt(rest / max(wind, np.finfo(float).tiny)))


def _dot(a: np.ndarray, b: np.ndarray) -> float:
    """Inner product without BLAS: a threaded BLAS dot stalls on a busy machine."""
    return float(np.einsum("i,i->", a, b))


class _SparseEnergySolver:
    """Sparse LU of ``E + diag(pin)`` on the active corners of a masked grid (see ``gradient_energy``)."""

    def __init__(self, grid: StaggeredGrid, active: np.ndarray, pin: np.ndarray) -> None:
        energy = gradient_energy(grid, active) + sp.diags_array(pin)
        self._lu = spla.splu(sp.csc_matrix(energy))
        self._lock = threading.Lock()  # one factorisation shared by the dask threads

    def solve(self, rhs: np.ndarray) -> np.ndarray:
        """Solve for the stacked potentials, ``rhs`` of shape ``(2, n_active)``."""
        with self._lock:
            return self._lu.solve(rhs.T).T


class _WholeGridEnergySolver:
    """:class:`SeparableEnergySolver` on stacked flattened potentials (every corner active)."""

    def __init__(self, grid: StaggeredGrid, pin: np.ndarray) -> None:
        self._shape = grid.corner_shape
        self._solver = SeparableEnergySolver(grid, pin.reshape(self._shape)[:, 0])

    def solve(self, rhs: np.ndarray) -> np.ndarray:
        """Solve for the stacked potentials, ``rhs`` of shape ``(2, n_corners)``."""
        ny1, m = self._shape
        grids = rhs.reshape(2, ny1, m).transpose(1, 0, 2)
        return self._solver.solve(grids).transpose(1, 0, 2).reshape(2, -1)


class _CoupledSolver:
    """Sparse LU of the normal equations with a moderate regulariser, ``N + beta (E + pin)``.

    As a preconditioner it keeps the iterates ``E``-orthogonal to the null
    space of the wind operator: for ``n`` in that null space ``n^T N = 0``, so
    ``(N + beta E) y = b`` with ``b`` orthogonal to ``n`` gives ``n^T E y = 0``.
    """

    def __init__(self, normal: sp.csr_array, penalty: sp.csr_array, beta: float) -> None:
        matrix = normal + beta * sp.block_diag([penalty, penalty])
        self._lu = spla.splu(sp.csc_matrix(matrix), permc_spec="MMD_AT_PLUS_A",
                             diag_pivot_thresh=0.0, options={"SymmetricMode": True})
        self._lock = threading.Lock()  # one factorisation shared by the dask threads

    def solve(self, rhs: np.ndarray) -> np.ndarray:
        """Solve for the stacked potentials, ``rhs`` of shape ``(2, n_active)``."""
        with self._lock:
            return self._lu.solve(rhs.ravel()).reshape(rhs.shape)


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
    over the active corners (:func:`flowpipe._staggered.gradient_energy`, plus a
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
    the normal equations plus ``1e-6 E`` (:class:`_CoupledSolver`), which keeps
    the same least-energy limit and needs one or two iterations. Larger masked
    grids fall back to the LU of ``E`` and its many iterations.

    References
    ----------
    Li, Chao & McWilliams (2006), "Computation of the streamfunction and
    velocity potential for limited and irregular domains", Mon. Wea. Rev.
    134, 3384-3394 (the least-squares formulation with Tikhonov
    regularisation); Hestenes & Stiefel (1952), "Methods of conjugate gradients
    for solving linear systems", J. Res. Nat. Bur. Standards 49, 409-436;
    Hansen (1998), "Rank-Deficient and Discrete Ill-Posed Problems", SIAM,
    section 6.3 (preconditioned CG started from zero converges to the solution
    of least seminorm).
    """

    #: The solver's description, for a complete grid (True) and a masked one (False).
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
        self._w = sp.block_array([[pick[0], pick[2]], [pick[1], pick[3]]], format="csr")
        self._wt = self._w.T.tocsr()
        area = np.broadcast_to(grid.centre_area, grid.shape).ravel()[rows]
        self._weight = np.concatenate([area, area])
        energy = gradient_energy(grid, active)
        corner_area = np.broadcast_to(grid.corner_area, grid.corner_shape).ravel()[self._cols]
        pin = 1e-6 * self._gravest_eigenvalue(energy, corner_area) * corner_area
        self._energy = energy + sp.diags_array(pin)
        kind = self.kind(grid, valid)
        if kind == "complete":
            self._preconditioner = _WholeGridEnergySolver(grid, pin)
        elif kind == "coupled":
            normal = self._wt @ sp.diags_array(self._weight) @ self._w
            self._preconditioner = _CoupledSolver(normal, self._energy, COUPLED_WEIGHT)
        else:
            self._preconditioner = _SparseEnergySolver(grid, active, pin)
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

    def _precondition(self, r: np.ndarray) -> np.ndarray:
        return self._preconditioner.solve(r.reshape(2, -1)).ravel()

    def _apply_energy(self, x: np.ndarray) -> np.ndarray:
        return (self._energy @ x.reshape(2, -1).T).T.ravel()

    def solve(self, u: np.ndarray, v: np.ndarray) -> tuple[np.ndarray, np.ndarray, int]:
        """Corner streamfunction and velocity potential, and the iterations taken."""
        rows = self.valid.ravel()
        w = np.concatenate([u.ravel()[rows], v.ravel()[rows]])
        misfit = w.copy()
        target = self.tolerance**2 * _dot(w, self._weight * w)
        residual = self._wt @ (self._weight * w)
        x = np.zeros_like(residual)
        z = self._precondition(residual)
        direction = z.copy()
        rz = _dot(residual, z)
        iterations = 0
        while iterations < self.max_iterations and _dot(misfit, self._weight * misfit) > target:
            wind = self._w @ direction
            image = self._wt @ (self._weight * wind) + self.regularisation * self._apply_energy(
                direction)
            step = rz / _dot(direction, image)
            x += step * direction
            residual -= step * image
            misfit -= step * wind
            z = self._precondition(residual)
            rz_new = _dot(residual, z)
            direction = z + (rz_new / rz) * direction
            rz = rz_new
            iterations += 1
        n = self._cols.size
        psi = np.zeros(self.grid.corner_shape)
        chi = np.zeros(self.grid.corner_shape)
        psi.ravel()[self._cols] = x[:n]
        chi.ravel()[self._cols] = x[n:]
        return psi, chi, iterations


def variational_partition(grid: StaggeredGrid, u: np.ndarray, v: np.ndarray,
                          solver: VariationalSolver
                          ) -> tuple[dict[str, np.ndarray], dict[str, float]]:
    """Rotational and divergent winds from the least-squares potentials.

    Parameters
    ----------
    grid : StaggeredGrid
    u, v : numpy.ndarray
        Wind at the centres, m s-1, NaN where missing (the solver's mask).
    solver : VariationalSolver
        Built once for this grid and mask.

    Returns
    -------
    fields : dict of numpy.ndarray
        As :func:`dirichlet_partition`, without the harmonic wind.
    diagnostics : dict of float
        ``reconstruction_error`` and ``iterations``. The harmonic share is
        that of the Dirichlet partition's harmonic wind (the one the
        regional stage writes beside this split): on a limited area the
        least-energy split shares that flow evenly between its parts, but on
        a band periodic in longitude the zonal harmonic flow ``u ~ 1/cos(phi)``
        has a streamfunction and no single-valued velocity potential, so the
        parts cannot share it and ``<w_rot, w_div>`` says nothing about it.

    References
    ----------
    Li, Chao & McWilliams (2006), Mon. Wea. Rev. 134, 3384-3394; Lynch (1989),
    Mon. Wea. Rev. 117, 1492-1500, section 2 (orthogonality of the internal
    and harmonic parts).
    """
    psi, chi, iterations = solver.solve(u, v)
    fields = _centre_winds(grid, psi, chi, solver.valid)
    zeta, delta = curl_and_divergence(grid, u, v, interior_corners(grid, solver.valid))
    fields["vorticity"], fields["divergence"] = _at_centres(grid, zeta, delta)
    rest_u = u - fields["u_rotational"] - fields["u_divergent"]
    rest_v = v - fields["v_rotational"] - fields["v_divergent"]
    total = _weighted_energy(grid, u, v)
    diagnostics = {
        "reconstruction_error": np.sqrt(_weighted_energy(grid, rest_u, rest_v) / total),
        "iterations": iterations,
    }
    return fields, diagnostics
