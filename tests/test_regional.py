"""Tests of the limited-area and masked Helmholtz decomposition (flowpipe.regional).

Every reference is computed here from closed-form fields; the source of each
formula or tolerance is named beside the check.
"""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr
from reference_winds import case6

from flowpipe import regional
from flowpipe.choices import REGIONAL_VARIABLES
from flowpipe.constants import EARTH_RADIUS
from flowpipe.errors import InputError, UsageError
from flowpipe.regional import cache, decompose_regional

A = EARTH_RADIUS


# --- closed-form fields ---------------------------------------------------------------------

def gaussian_bump(lat, lon, lat0, lon0, amplitude, width):
    """A Gaussian of great-circle angle, its derivatives and its spherical Laplacian.

    f = amplitude * exp(-(theta / width)^2); the Laplacian of a function of the
    angular distance theta alone is (1/a^2) (f'' + cot(theta) f') (the
    spherical Laplacian in polar coordinates about the centre, common practice).
    Returns f, df/dphi, df/dlambda, lap f.
    """
    phi, lam = np.radians(lat)[:, None], np.radians(lon)[None, :]
    phi0, lam0 = np.radians(lat0), np.radians(lon0)
    dlam = lam - lam0
    # haversine form of the great-circle angle (common practice: accurate near zero)
    theta = 2 * np.arcsin(np.sqrt(np.sin((phi - phi0) / 2) ** 2
                                  + np.cos(phi) * np.cos(phi0) * np.sin(dlam / 2) ** 2))
    w = np.radians(width)
    f = amplitude * np.exp(-((theta / w) ** 2))
    g = -2 * f / w**2 / np.sinc(theta / np.pi)  # f'(theta) / sin(theta), regular at 0
    f_phi = -g * (np.cos(phi) * np.sin(phi0) - np.sin(phi) * np.cos(phi0) * np.cos(dlam))
    f_lam = g * np.cos(phi) * np.cos(phi0) * np.sin(dlam)
    f_tt = (-2 / w**2 + 4 * theta**2 / w**4) * f
    lap = (f_tt + np.cos(theta) * g) / A**2
    return f, f_phi, f_lam, lap


def helmholtz_wind(lat, psi_phi, psi_lam, chi_phi, chi_lam):
    """u = -(1/a) psi_phi + chi_lam / (a cos phi), v = psi_lam / (a cos phi) + (1/a) chi_phi.

    The spherical Helmholtz relations (Lynch 1989, Mon. Wea. Rev. 117, section 2;
    Williamson et al. 1992, J. Comput. Phys. 102, eqs. 1-4 for the metric terms).
    """
    cos = np.cos(np.radians(lat))[:, None]
    u = -psi_phi / A + chi_lam / (A * cos)
    v = psi_lam / (A * cos) + chi_phi / A
    return u, v


def box_case(step):
    """Vortex + divergent source + harmonic background flow in a 20 x 20 degree box."""
    lat = np.arange(30.0, 50.0 + step / 2, step)
    lon = np.arange(-10.0, 10.0 + step / 2, step)
    _, p_phi, p_lam, zeta = gaussian_bump(lat, lon, 40.0, -2.0, 1.5e7, 4.0)
    _, c_phi, c_lam, delta = gaussian_bump(lat, lon, 41.0, 3.0, 6.0e6, 4.0)
    u_rot, v_rot = helmholtz_wind(lat, p_phi, p_lam, 0 * p_phi, 0 * p_lam)
    u_div, v_div = helmholtz_wind(lat, 0 * c_phi, 0 * c_lam, c_phi, c_lam)
    # (U, V) cos(phi0) / cos(phi) is non-divergent and irrotational on the sphere: u cos(phi)
    # independent of phi and lambda (from the spherical div/curl, Williamson et al. 1992 eq. 4)
    background = np.cos(np.radians(40.0)) / np.cos(np.radians(lat))[:, None] * np.ones_like(zeta)
    u = u_rot + u_div + 10.0 * background
    v = v_rot + v_div - 4.0 * background
    return lat, lon, u, v, zeta, delta


def rossby_haurwitz_case(lat, lon):
    """Williamson et al. (1992) test case 6 (R = 4; tests/reference_winds.py) plus a divergent
    Y_4^3 part.

    The divergent part chi = C cos^3(phi) sin(phi) cos(3 lambda) is the spherical harmonic of
    degree 4, order 3, so delta = -20 chi / a^2 (common practice).
    """
    c = 1.0e8
    phi, lam = np.meshgrid(np.radians(lat), np.radians(lon), indexing="ij")
    wave = case6(phi, lam)
    cos, sin = np.cos(phi), np.sin(phi)
    chi = c * cos**3 * sin * np.cos(3 * lam)
    chi_lam = -3 * c * cos**3 * sin * np.sin(3 * lam)
    chi_phi = c * np.cos(3 * lam) * (cos**4 - 3 * cos**2 * sin**2)
    u_div, v_div = helmholtz_wind(lat, 0 * chi, 0 * chi, chi_phi, chi_lam)
    delta = -20 * chi / A**2
    return wave["u"], wave["v"], u_div, v_div, wave["zeta"], delta


# --- an independent operator ------------------------------------------------------------------

def centred_curl_div(lat, lon, u, v):
    """Vorticity and divergence by second-order centred differences at inner points.

    zeta = (v_lambda - (u cos phi)_phi) / (a cos phi), delta = (u_lambda + (v cos phi)_phi) /
    (a cos phi) (Williamson et al. 1992, eq. 4; centred differences, common practice). Returned
    on the grid with a frame of NaN one point wide.
    """
    phi, lam = np.radians(lat), np.radians(lon)
    cos = np.cos(phi)[:, None]
    dphi = (phi[2:] - phi[:-2])[:, None]
    dlam = (lam[2:] - lam[:-2])[None, :]
    inner_cos = cos[1:-1]

    def d_lam(f):
        return (f[1:-1, 2:] - f[1:-1, :-2]) / dlam

    def d_phi(f):
        return (f[2:, 1:-1] - f[:-2, 1:-1]) / dphi

    zeta = np.full(u.shape, np.nan)
    delta = np.full(u.shape, np.nan)
    zeta[1:-1, 1:-1] = (d_lam(v) - d_phi(u * cos)) / (A * inner_cos)
    delta[1:-1, 1:-1] = (d_lam(u) + d_phi(v * cos)) / (A * inner_cos)
    return zeta, delta


def centred_laplacian(lat, lon, f):
    """(1/(a^2 cos)) d/dphi (cos df/dphi) + (1/(a cos)^2) d2f/dlambda2, five-point, inner points.

    The spherical Laplacian (Williamson et al. 1992, J. Comput. Phys. 102, eq. 4 applied to the
    gradient); second-order centred differences (common practice). NaN on a one-point frame.
    """
    phi, lam = np.radians(lat), np.radians(lon)
    dphi, dlam = phi[1] - phi[0], lam[1] - lam[0]
    cos = np.cos(phi)[:, None]
    half_n = np.cos(phi[1:-1] + dphi / 2)[:, None]
    half_s = np.cos(phi[1:-1] - dphi / 2)[:, None]
    out = np.full(f.shape, np.nan)
    c = f[1:-1, 1:-1]
    out[1:-1, 1:-1] = ((half_n * (f[2:, 1:-1] - c) - half_s * (c - f[:-2, 1:-1]))
                       / (cos[1:-1] * dphi**2)
                       + (f[1:-1, 2:] - 2 * c + f[1:-1, :-2]) / (cos[1:-1] * dlam) ** 2) / A**2
    return out


def as_wind(lat, lon, u, v, levels=None):
    dims = ("latitude", "longitude")
    coords = {"latitude": lat, "longitude": lon}
    if levels is not None:
        u, v = np.stack([u] * levels), np.stack([v] * levels)
        dims = ("level",) + dims
        coords["level"] = np.arange(levels, dtype=float)
    return xr.Dataset({"u": (dims, u), "v": (dims, v)}, coords=coords)


def interior(field, margin=3):
    return field[margin:-margin, margin:-margin]


def relative_max(error, scale):
    return float(np.nanmax(np.abs(error)) / np.nanmax(np.abs(scale)))


SCHEMES = ["variational", "dirichlet"]


def reconstruction_error(out, u, v):
    """Largest pointwise misfit of the parts' sum, relative to the largest wind speed."""
    u_sum = out["u_rotational"] + out["u_divergent"]
    v_sum = out["v_rotational"] + out["v_divergent"]
    if out.attrs["scheme"] == "dirichlet":  # the variational parts already hold the harmonic flow
        u_sum = u_sum + out["u_harmonic"]
        v_sum = v_sum + out["v_harmonic"]
    misfit = np.hypot(u_sum.values - u, v_sum.values - v)
    return float(np.nanmax(misfit) / np.nanmax(np.hypot(u, v)))


# --- analytic box: vortex + source + harmonic background ------------------------------------

#: The interior of the checks: 1.5 degrees from the edges, three points at 0.5 degrees and the
#: same region at the finer spacing, so that the convergence order compares like with like.
MARGIN_DEG = 1.5


def box_errors(scheme, step):
    lat, lon, u, v, zeta, delta = box_case(step)
    out = decompose_regional(as_wind(lat, lon, u, v), scheme=scheme)
    m = int(round(MARGIN_DEG / step))
    z_rot, d_rot = centred_curl_div(lat, lon, out.u_rotational.values, out.v_rotational.values)
    z_div, d_div = centred_curl_div(lat, lon, out.u_divergent.values, out.v_divergent.values)
    return {
        "zeta_of_rotational": relative_max(interior(z_rot - zeta, m), zeta),
        "delta_of_divergent": relative_max(interior(d_div - delta, m), delta),
        "vorticity_output": relative_max(interior(out.vorticity.values - zeta, m), zeta),
        "divergence_output": relative_max(interior(out.divergence.values - delta, m), delta),
        "laplacian_of_streamfunction": relative_max(
            interior(centred_laplacian(lat, lon, out.streamfunction.values) - zeta, m), zeta),
        "laplacian_of_velocity_potential": relative_max(
            interior(centred_laplacian(lat, lon, out.velocity_potential.values) - delta, m),
            delta),
        "delta_of_rotational": relative_max(interior(d_rot, m), zeta),
        "zeta_of_divergent": relative_max(interior(z_div, m), zeta),
    }


@pytest.fixture(scope="module", params=SCHEMES)
def box_convergence(request):
    return request.param, box_errors(request.param, 0.5), box_errors(request.param, 0.25)


@pytest.mark.parametrize("quantity", ["zeta_of_rotational", "delta_of_divergent",
                                      "vorticity_output", "divergence_output",
                                      "laplacian_of_streamfunction",
                                      "laplacian_of_velocity_potential"])
def test_box_vorticity_and_divergence_are_second_order(box_convergence, quantity):
    # Second-order truncation error of centred differences (common practice: error ~ h^2),
    # checked against the closed-form Laplacian of the Gaussian bumps (gaussian_bump above):
    # within 2 % of the largest value at 0.5 degrees, order 2 +/- 0.3 when the spacing halves.
    # For the potentials themselves, lap psi = zeta and lap chi = delta (Lynch 1989, eq. 2.3;
    # the harmonic part the box adds has zero Laplacian): grid-scale (checkerboard) noise in
    # psi or chi would show here at once.
    _, coarse, fine = box_convergence
    assert coarse[quantity] <= 0.02
    order = np.log2(coarse[quantity] / fine[quantity])
    assert abs(order - 2.0) <= 0.3, order


@pytest.mark.parametrize("quantity", ["delta_of_rotational", "zeta_of_divergent"])
def test_box_parts_do_not_contaminate_each_other(box_convergence, quantity):
    # The rotational wind is non-divergent and the divergent wind irrotational (the Helmholtz
    # decomposition, Lynch 1989, Mon. Wea. Rev. 117, section 2). Measured with the independent
    # centred-difference operator of this file: below 1 % of the largest input vorticity, and
    # falling at second order (common practice for centred differences).
    _, coarse, fine = box_convergence
    assert coarse[quantity] < 0.01
    order = np.log2(coarse[quantity] / fine[quantity])
    assert abs(order - 2.0) <= 0.3, order


@pytest.mark.parametrize("scheme", SCHEMES)
def test_box_parts_reproduce_the_wind(scheme):
    # Rotational + divergent (+ harmonic) = the wind (Lynch 1989, eq. 2.6 for the harmonic
    # remainder; Li, Chao & McWilliams 2006, Mon. Wea. Rev. 134, section 2, for the fit); the
    # 1e-6 bound is our choice.
    lat, lon, u, v, _, _ = box_case(0.5)
    out = decompose_regional(as_wind(lat, lon, u, v), scheme=scheme)
    assert reconstruction_error(out, u, v) <= 1e-6
    assert out.attrs["reconstruction_error"] <= 1e-6
    assert out.attrs["scheme"] == scheme
    assert set(out.data_vars) >= set(REGIONAL_VARIABLES)


def test_dirichlet_harmonic_part_vanishes_without_boundary_flow():
    # Lynch (1989), section 2: when psi and chi vanish on the boundary the internal parts carry
    # the whole wind and the harmonic part is zero. A vortex and a source well inside the box
    # (the Gaussians are below 1e-10 of their peak on the edges): harmonic share near zero.
    lat = np.arange(30.0, 50.25, 0.25)
    lon = np.arange(-10.0, 10.25, 0.25)
    _, p_phi, p_lam, _ = gaussian_bump(lat, lon, 40.0, -1.0, 1.5e7, 2.0)
    _, c_phi, c_lam, _ = gaussian_bump(lat, lon, 40.5, 1.0, 6.0e6, 2.0)
    u, v = helmholtz_wind(lat, p_phi, p_lam, c_phi, c_lam)
    out = decompose_regional(as_wind(lat, lon, u, v), scheme="dirichlet")
    assert out.attrs["harmonic_energy_share"] < 1e-4
    # ... and with a uniform background added, the background is harmonic (Williamson et al.
    # 1992, eq. 4, for u cos(phi) = const): the share is at least that of the background.
    background = np.cos(np.radians(40.0)) / np.cos(np.radians(lat))[:, None] * np.ones_like(u)
    out_bg = decompose_regional(as_wind(lat, lon, u + 10 * background, v), scheme="dirichlet")
    cos = np.cos(np.radians(lat))[:, None]
    background_share = (np.sum(cos * (10 * background) ** 2)
                        / np.sum(cos * ((u + 10 * background) ** 2 + v**2)))
    assert out_bg.attrs["harmonic_energy_share"] > 0.5 * background_share
    # The least-energy split shares the harmonic flow evenly between the parts, so on a
    # limited area its 4 <w_rot, w_div> / |w|^2 is the same share (Lynch 1989, section 2:
    # internal parts are orthogonal to harmonic flows), within truncation error; the
    # variational output's share is that of the harmonic wind it writes.
    for wind_u, reference in ((u, out), (u + 10 * background, out_bg)):
        fit = decompose_regional(as_wind(lat, lon, wind_u, v), scheme="variational")
        overlap = np.sum(cos * (fit.u_rotational * fit.u_divergent
                                + fit.v_rotational * fit.v_divergent).values)
        shared = 4 * overlap / np.sum(cos * (wind_u**2 + v**2))
        assert abs(shared - reference.attrs["harmonic_energy_share"]) < 2e-3
        written = np.sum(cos * (fit.u_harmonic**2 + fit.v_harmonic**2).values)
        assert fit.attrs["harmonic_energy_share"] == pytest.approx(
            written / np.sum(cos * (wind_u**2 + v**2)), rel=1e-6)


def test_fast_poisson_solver_matches_a_sparse_direct_solve():
    # Reference library: scipy.sparse.linalg.spsolve on the same five-point Laplacian
    # (Hockney 1965, J. ACM 12, 95-113: the transform method solves the same linear system).
    import scipy.sparse.linalg as spla

    from flowpipe.regional.operators import StaggeredGrid
    from flowpipe.regional.solvers import dirichlet_solver

    rng = np.random.default_rng(5)
    for periodic, lon in ((False, np.linspace(-20, 20, 33)), (True, np.arange(0, 360, 7.5))):
        grid = StaggeredGrid(np.radians(np.linspace(10, 60, 27)), np.radians(lon), A, periodic)
        rhs = rng.standard_normal(grid.corner_shape)
        solver = dirichlet_solver(grid, np.ones(grid.shape, dtype=bool))
        assert solver.name == solver.names["separable"]
        fast, _ = solver.solve(rhs)
        inner = np.zeros(grid.corner_shape, dtype=bool)
        inner[1:-1] = True
        if not periodic:
            inner[:, [0, -1]] = False
        index = np.flatnonzero(inner.ravel())
        lap = grid.laplacian[index][:, index].tocsc()
        reference = spla.spsolve(lap, rhs.ravel()[index])
        assert np.allclose(fast.ravel()[index], reference, rtol=1e-10, atol=1e-12 * abs(
            reference).max())
        assert np.all(fast.ravel()[~inner.ravel()] == 0)



def test_corner_laplacian_is_its_kronecker_definition():
    # Reference library: scipy.sparse.kron on the separable factors, the definition
    # kron(A, I) + kron(diag(b), S) (Swarztrauber 1974, SIAM J. Numer. Anal. 11, 1136-1150:
    # the separable form of the spherical five-point Laplacian); the assembled matrix must
    # hold the same values, on limited-area and periodic grids.
    import scipy.sparse as sp

    from flowpipe.regional.operators import StaggeredGrid

    for periodic, lat, lon in ((False, np.linspace(10, 60, 27), np.linspace(-20, 20, 33)),
                               (True, np.linspace(-80, 80, 33), np.arange(0, 360, 7.5))):
        grid = StaggeredGrid(np.radians(lat), np.radians(lon), A, periodic)
        lat_op, b, off = grid.laplacian_factors()
        m = grid.corner_shape[1]
        second = sp.diags_array([off, -2 * off, off], offsets=[-1, 0, 1], shape=(m, m)).tolil()
        if periodic:
            second[0, m - 1] = second[m - 1, 0] = off
        reference = sp.kron(lat_op, sp.eye_array(m)) + sp.kron(sp.diags_array(b), second)
        assert abs(grid.laplacian - reference).max() == 0.0


def masked_laplacian_case(periodic):
    """A grid, its interior corners under a disc, a ridge and an edge notch, and the matrix."""
    from flowpipe.regional.operators import StaggeredGrid, interior_corners

    lat = np.linspace(-70, 70, 57) if periodic else np.linspace(20, 60, 49)
    lon = np.arange(0, 360, 5.0) if periodic else np.linspace(-20, 25, 55)
    grid = StaggeredGrid(np.radians(lat), np.radians(lon), A, periodic)
    y, x = lat[:, None], lon[None, :]
    missing = (np.hypot(y - lat.mean(), x - lon[len(lon) // 3]) < 6) | (
        (np.abs(y - lat[3 * len(lat) // 4]) < 1.5) & (x > lon[len(lon) // 2]))
    missing |= (y < lat[4]) & (x < lon[6])  # a notch at the edge of the domain
    interior = interior_corners(grid, ~missing)
    index = np.flatnonzero(interior.ravel())
    return grid, interior, grid.laplacian[index][:, index].tocsc()


@pytest.mark.parametrize("periodic", [False, True])
def test_schwarz_iterations_solve_the_masked_poisson_problem(monkeypatch, periodic):
    # Reference library: scipy.sparse.linalg.spsolve of the same masked five-point
    # Laplacian; conjugate gradients with any symmetric positive definite preconditioner
    # converge to the solution of the linear system (Hestenes & Stiefel 1952, J. Res. Nat.
    # Bur. Standards 49, 409-436). The near-mask subdomain is narrowed so that the
    # iterations, not its exact solve, do the work.
    import scipy.sparse.linalg as spla

    from flowpipe.regional import solvers

    monkeypatch.setattr(solvers, "SCHWARZ_OVERLAP", 2)
    grid, interior, lap = masked_laplacian_case(periodic)
    rng = np.random.default_rng(11)
    rhs = rng.standard_normal((lap.shape[0], 2)) * 1e-11
    x, iterations = solvers.schwarz_laplacian_solve(grid, interior)(rhs)
    reference = np.column_stack([spla.spsolve(lap, column) for column in rhs.T])
    assert iterations > 3
    assert np.abs(x - reference).max() <= 1e-8 * np.abs(reference).max()


def test_dirichlet_beyond_the_lu_limit_gives_the_lu_split(monkeypatch):
    # The two masked Dirichlet solvers solve one linear system (scipy's SuperLU, the
    # reference, against the Schwarz iterations): the same split to their tolerance, the
    # iterations and the solver reported.
    from flowpipe.regional import solvers

    lat, lon, u, v, _, _ = box_case(0.5)
    valid = coastline_mask(lat, lon)
    wind = as_wind(lat, lon, np.where(valid, u, np.nan), np.where(valid, v, np.nan))
    cache.clear()
    direct = decompose_regional(wind, scheme="dirichlet")
    monkeypatch.setattr(solvers, "DIRICHLET_LU_LIMIT", 0)
    monkeypatch.setattr(solvers, "SCHWARZ_OVERLAP", 2)
    cache.clear()
    iterative = decompose_regional(wind, scheme="dirichlet")
    cache.clear()
    assert direct.attrs["iterations"] == 0 < iterative.attrs["iterations"]
    flags = iterative.solver.attrs["flag_meanings"].split()
    used = [flag for k, flag in enumerate(flags) if int(iterative.solver) & (1 << k)]
    assert used == ["cg_with_schwarz_fast_poisson_preconditioner"]
    for name in ("streamfunction", "velocity_potential", "u_rotational", "u_divergent",
                 "v_harmonic"):
        scale = float(np.nanmax(np.abs(direct[name])))
        assert float(np.nanmax(np.abs(iterative[name] - direct[name]))) <= 1e-8 * scale, name


def test_normal_equations_apply_to_columns_as_to_each_vector():
    # scipy.sparse.linalg.LinearOperator's contract: matmat(X) is matvec of each column of X
    # (SciPy reference guide, "LinearOperator").
    from flowpipe.regional.solvers import VariationalSolver

    lat, lon, *_ = box_case(1.0)
    grid = cache.staggered_grid(np.radians(lat), np.radians(lon), False)
    solver = VariationalSolver(grid, coastline_mask(lat, lon), 1e-3)
    columns = np.random.default_rng(7).standard_normal((solver.operator.shape[0], 3))
    by_columns = solver.operator.matmat(columns)
    each = np.stack([solver.operator.matvec(c) for c in columns.T], axis=1)
    assert np.allclose(by_columns, each, rtol=1e-12, atol=0)

# --- consistency with the global method ------------------------------------------------------

@pytest.mark.parametrize("scheme", SCHEMES)
def test_box_from_williamson_case_6_agrees_with_the_global_partition(scheme):
    # Williamson et al. (1992), test case 6 plus a divergent spherical harmonic: on the whole
    # sphere the rotational wind is the TC6 wind and the divergent wind the gradient of chi
    # (a spherical-harmonic split is exact for them). In a box cut from it the regional
    # vorticity and divergence agree with the global ones within truncation error (1 %), and
    # the regional rotational wind differs from the global one by a harmonic flow: its
    # vorticity and divergence (centred differences) stay below 1 % of the largest vorticity.
    lat = np.arange(10.0, 60.5, 1.0)
    lon = np.arange(20.0, 100.5, 1.0)
    u_rot, v_rot, u_div, v_div, zeta, delta = rossby_haurwitz_case(lat, lon)
    u, v = u_rot + u_div, v_rot + v_div
    out = decompose_regional(as_wind(lat, lon, u, v), scheme=scheme)
    assert relative_max(interior(out.vorticity.values - zeta), zeta) < 0.01
    assert relative_max(interior(out.divergence.values - delta), delta) < 0.01
    du = out.u_rotational.values - u_rot
    dv = out.v_rotational.values - v_rot
    z_diff, d_diff = centred_curl_div(lat, lon, du, dv)
    assert relative_max(interior(z_diff), zeta) < 0.01
    assert relative_max(interior(d_diff), zeta) < 0.01
    # and the regional split is not the global one: the box boundary carries a harmonic flow
    assert np.nanmax(np.hypot(du, dv)) > 0.01 * np.nanmax(np.hypot(u, v))


# --- masked domains ----------------------------------------------------------------------------

def coastline_mask(lat, lon):
    """Valid where 'sea': north of a wavy coast plus an island-free bay (connected)."""
    coast = 36.0 + 3.0 * np.sin(np.radians(lon) * 14.0) + 1.5 * np.cos(np.radians(lon) * 31.0)
    sea = lat[:, None] > coast[None, :]
    bay = (np.hypot(lat[:, None] - 44.0, lon[None, :] - 5.0) < 2.2)  # a lake-like hole
    return sea & ~bay


@pytest.mark.parametrize("scheme", SCHEMES)
def test_coastline_mask_reconstructs_valid_points_and_keeps_missing(scheme):
    # Li, Chao & McWilliams (2006), section 4 (irregular domains): the fit uses the valid
    # points only; parts add up to the wind there (project's 1e-6 figure); masked points stay
    # missing (CF: missing data as _FillValue, NaN in memory, common practice).
    lat, lon, u, v, zeta, _ = box_case(0.5)
    valid = coastline_mask(lat, lon)
    assert 0.2 < valid.mean() < 0.9  # the mask really removes a coast and a hole
    u_m, v_m = np.where(valid, u, np.nan), np.where(valid, v, np.nan)
    out = decompose_regional(as_wind(lat, lon, u_m, v_m), scheme=scheme)
    assert reconstruction_error(out, u_m, v_m) <= 1e-6
    for name in REGIONAL_VARIABLES:
        assert np.all(np.isnan(out[name].values[~valid])), name
        assert np.all(np.isfinite(out[name].values[valid])), name
    # The vorticity matches the analytic one three points from the coast, and so does that of
    # the rotational wind four degrees away (second-order differences: within 2 %, as in the
    # box). Nearer the coast the harmonic part a fit puts into the rotational wind feels the
    # re-entrant corners of the staircase coast, where Laplace solutions are singular
    # (common practice for Laplace problems on polygons).
    from scipy.ndimage import binary_erosion

    near = binary_erosion(valid, iterations=3, border_value=0)
    assert relative_max(np.where(near, out.vorticity.values - zeta, np.nan), zeta) < 0.02
    z_rot, _ = centred_curl_div(lat, lon, out.u_rotational.values, out.v_rotational.values)
    far = binary_erosion(valid, iterations=8, border_value=0)
    assert far.sum() > 100
    assert relative_max(np.where(far, z_rot - zeta, np.nan), zeta) < 0.02


def test_masked_preconditioners_reach_the_same_least_energy_split(monkeypatch):
    # Preconditioned CG started from zero converges to the solution of least seminorm in the
    # preconditioner's metric (Hansen 1998, "Rank-Deficient and Discrete Ill-Posed Problems",
    # SIAM, section 6.3): the coupled and the uncoupled preconditioner keep the same metric on
    # the null space, so both give one split, within the iteration tolerance.
    from flowpipe.regional import solvers

    lat, lon, u, v, _, _ = box_case(0.5)
    valid = coastline_mask(lat, lon)
    u_m, v_m = np.where(valid, u, np.nan), np.where(valid, v, np.nan)
    cache.clear()
    coupled = decompose_regional(as_wind(lat, lon, u_m, v_m))
    monkeypatch.setattr(solvers, "COUPLED_LIMIT", 0)
    cache.clear()
    uncoupled = decompose_regional(as_wind(lat, lon, u_m, v_m))
    cache.clear()
    assert coupled.attrs["solver"] != uncoupled.attrs["solver"]
    assert uncoupled.attrs["iterations"] > 10 * coupled.attrs["iterations"]
    scale = np.nanmax(np.hypot(u_m, v_m))
    for name in ("u_rotational", "v_rotational", "u_divergent", "v_divergent"):
        assert np.nanmax(np.abs(coupled[name] - uncoupled[name])) < 1e-5 * scale, name


def global_level(step=4.0):
    lat = np.arange(-80.0, 80.0 + step / 2, step)
    lon = np.arange(0.0, 360.0, step)
    u_rot, v_rot, u_div, v_div, zeta, delta = rossby_haurwitz_case(lat, lon)
    return lat, lon, u_rot + u_div, v_rot + v_div, zeta, delta


def test_global_level_with_a_block_below_ground_is_periodic():
    # A global pressure level with points below the ground: the regional variational fit,
    # periodic in longitude, on Williamson et al. (1992) TC6 + a divergent harmonic. Valid
    # points reconstructed to 1e-6, masked ones missing; vorticity within 2 % of the closed
    # form away from the block (second-order differences at 3 degrees, common practice).
    lat, lon, u, v, zeta, _ = global_level(3.0)
    ground = (lat[:, None] > 20) & (lat[:, None] < 45) & (lon[None, :] > 80) & (lon[None, :] < 120)
    u_m, v_m = np.where(ground, np.nan, u), np.where(ground, np.nan, v)
    out = decompose_regional(as_wind(lat, lon, u_m, v_m), periodic=True)
    assert reconstruction_error(out, u_m, v_m) <= 1e-6
    for name in REGIONAL_VARIABLES:
        assert np.all(np.isnan(out[name].values[ground])), name
    near = np.zeros_like(ground)
    near[2:-2] = True
    from scipy.ndimage import binary_dilation

    near &= ~binary_dilation(ground, iterations=2)
    assert relative_max(np.where(near, out.vorticity.values - zeta, np.nan), zeta) < 0.02


@pytest.mark.parametrize("scheme", SCHEMES)
def test_complete_periodic_level(scheme):
    # Williamson et al. (1992) TC6 + divergent harmonic on a complete band periodic in
    # longitude (the Fourier-transform solvers): parts reproduce the wind (1e-6), vorticity
    # within 2 % (second-order differences at 3 degrees, common practice).
    lat, lon, u, v, zeta, _ = global_level(3.0)
    out = decompose_regional(as_wind(lat, lon, u, v), scheme=scheme, periodic=True)
    assert reconstruction_error(out, u, v) <= 1e-6
    assert relative_max(out.vorticity.values[2:-2] - zeta[2:-2], zeta) < 0.02
    z_rot, _ = centred_curl_div(lat, lon, out.u_rotational.values, out.v_rotational.values)
    assert relative_max(z_rot[3:-3, 1:-1] - zeta[3:-3, 1:-1], zeta) < 0.02


def test_rows_on_the_poles_are_returned_missing():
    # On a pole the eastward and northward directions are undefined (every meridian meets
    # there; common practice), so a grid with pole rows is solved without them.
    lat = np.arange(-90.0, 90.1, 4.5)
    lon = np.arange(0.0, 360.0, 4.5)
    u_rot, v_rot, u_div, v_div, _, _ = rossby_haurwitz_case(lat, lon)
    u, v = u_rot + u_div, v_rot + v_div
    ground = (lat[:, None] > 20) & (lat[:, None] < 45) & (lon[None, :] > 80) & (lon[None, :] < 120)
    u_m, v_m = np.where(ground, np.nan, u), np.where(ground, np.nan, v)
    out = decompose_regional(as_wind(lat, lon, u_m, v_m), periodic=True)
    assert np.all(np.isnan(out.u_rotational.values[[0, -1]]))
    inner = slice(1, -1)
    assert reconstruction_error(out.isel(latitude=inner), u_m[inner], v_m[inner]) <= 1e-6
    assert np.all(np.isnan(out.streamfunction.values[ground]))


def test_periodic_grid_is_connected_across_the_date_line():
    # A strip of missing meridians cuts a limited-area grid in two but not a periodic one
    # (the longitudes wrap around; common practice).
    lat, lon, u, v, _, _ = global_level()
    strip = (lon > 170) & (lon < 190)
    u_m = np.where(strip[None, :], np.nan, u)
    v_m = np.where(strip[None, :], np.nan, v)
    out = decompose_regional(as_wind(lat, lon, u_m, v_m), periodic=True)
    assert reconstruction_error(out, u_m, v_m) <= 1e-6
    assert "points_left_missing" not in out.attrs
    assert len(regional.solvable_pieces(np.isfinite(u_m), cache.staggered_grid(lat, lon, True))[0]) == 1
    assert len(regional.solvable_pieces(np.isfinite(u_m), cache.staggered_grid(lat, lon, False))[0]) == 2


@pytest.mark.parametrize("periodic", [False, True])
def test_pieces_are_the_connected_components_of_the_valid_points(periodic):
    # Reference library: scipy.sparse.csgraph.connected_components of the graph that links
    # each valid point to its eight neighbours (across the date line when periodic; Tarjan
    # 1972, SIAM J. Comput. 1, 146-160): the same partition of the valid points.
    import scipy.sparse as sp
    from scipy.sparse.csgraph import connected_components

    from flowpipe.regional.pieces import _pieces

    rng = np.random.default_rng(4)
    for _ in range(30):
        ny, nx = rng.integers(4, 40, 2)
        valid = rng.random((ny, nx)) < rng.uniform(0.3, 0.7)
        jj, ii = np.nonzero(valid)
        number = -np.ones((ny, nx), dtype=int)
        number[jj, ii] = np.arange(jj.size)
        links = []
        for dj in (-1, 0, 1):
            for di in (-1, 0, 1):
                j2, i2 = jj + dj, (ii + di) % nx if periodic else ii + di
                inside = (j2 >= 0) & (j2 < ny) & (i2 >= 0) & (i2 < nx)
                ok = np.zeros_like(inside)
                ok[inside] = valid[j2[inside], i2[inside]]
                links.append((np.flatnonzero(ok), number[j2[ok], i2[ok]]))
        a, b = (np.concatenate(side) for side in zip(*links, strict=True))
        _, reference = connected_components(
            sp.coo_array((np.ones(a.size), (a, b)), shape=(jj.size,) * 2), directed=False)
        labels = _pieces(valid, periodic)[jj, ii]
        assert np.all(_pieces(valid, periodic)[~valid] == -1)
        # One partition: each label meets one reference component, and as many of them.
        pairs = np.unique(np.column_stack([labels, reference]), axis=0)
        assert len(pairs) == len(np.unique(labels)) == len(np.unique(reference))


# --- bad input -------------------------------------------------------------------------------

def small_box(n=12):
    lat = np.linspace(40.0, 40.0 + 0.5 * (n - 1), n)
    lon = np.linspace(0.0, 0.5 * (n - 1), n)
    u = np.ones((n, n)) * 5.0
    return lat, lon, u, -u


def test_too_small_domain_is_refused():
    # The 5 x 5 limit (README.md, "Methods"), from memory of common practice for stencils
    # that need an interior.
    lat, lon, u, v = small_box(4)
    with pytest.raises(InputError, match="at least 5x5"):
        decompose_regional(as_wind(lat, lon, u, v))
    lat, lon, u, v = small_box(12)
    u[:, 3:] = np.nan
    with pytest.raises(InputError, match="at least 5x5"):
        decompose_regional(as_wind(lat, lon, u, v))


def test_all_missing_is_refused():
    # Nothing to decompose: a one-line InputError (README.md, "Exit codes").
    lat, lon, u, v = small_box()
    with pytest.raises(InputError, match="every point .* is missing"):
        decompose_regional(as_wind(lat, lon, u * np.nan, v * np.nan))


@pytest.mark.parametrize("scheme", SCHEMES)
def test_disconnected_pieces_are_decomposed_each_on_its_own(scheme):
    # Pieces of valid points that share no cell corner are separate domains, each a
    # Poisson problem (or least-squares fit) of its own (common practice): each piece's
    # parts must equal those of the same piece cut out as a limited-area grid of its own,
    # and add up to the wind there.
    lat, lon, u, v, _, _ = box_case(0.5)
    gap = (lon > 1.2) & (lon < 2.8)  # missing meridians split the box in two
    u_m, v_m = np.where(gap, np.nan, u), np.where(gap, np.nan, v)
    # (the variational fit converged tightly; its weak constant-fixing term, 1e-6 of the
    # gravest mode of the whole grid, lets the two fits differ by a few parts in 1e6)
    tight = {"tolerance": 1e-10} if scheme == "variational" else {}
    agree = 1e-5 if scheme == "variational" else 1e-6
    out = decompose_regional(as_wind(lat, lon, u_m, v_m), scheme=scheme, **tight)
    assert reconstruction_error(out, u_m, v_m) <= 1e-6
    assert np.isnan(out["u_rotational"].values[:, gap]).all()
    scale = np.nanmax(np.hypot(u, v))
    for side in (lon < 1.2, lon > 2.8):
        alone = decompose_regional(as_wind(lat, lon[side], u[:, side], v[:, side]),
                                   scheme=scheme, **tight)
        for name in ("u_rotational", "v_rotational", "u_divergent", "v_divergent",
                     "vorticity", "divergence"):
            got, want = out[name].values[:, side], alone[name].values
            assert np.nanmax(np.abs(got - want)) <= agree * np.nanmax(np.abs(want)), name
    for name in ("u_rotational", "u_divergent"):  # both parts carry real flow here
        assert np.nanmax(np.abs(out[name].values)) > 0.1 * scale


def test_pieces_too_small_to_decompose_are_left_missing_and_counted():
    # A piece narrower than the 5 x 5 minimum (from memory of common practice for
    # stencils that need an interior) cannot be decomposed: it stays missing, the
    # output says how many valid points that is, and the large piece is decomposed.
    lat, lon, u, v, _, _ = box_case(0.5)
    u_m, v_m = u.copy(), v.copy()
    u_m[:, -6:-3] = np.nan  # leaves a strip three columns wide at the eastern edge
    with pytest.warns(UserWarning, match="left missing"):
        out = decompose_regional(as_wind(lat, lon, u_m, v_m))
    assert out.attrs["points_left_missing"] == 3 * lat.size
    assert np.isnan(out["streamfunction"].values[:, -3:]).all()
    assert np.isfinite(out["streamfunction"].values[:, :-6]).all()
    assert reconstruction_error(out, u_m, v_m) <= 1e-6


def test_bad_options_are_usage_errors():
    # Options outside the documented ones are usage errors (README.md, "Exit codes").
    lat, lon, u, v = small_box()
    wind = as_wind(lat, lon, u, v)
    with pytest.raises(UsageError, match="unknown regional scheme"):
        decompose_regional(wind, scheme="spectral")
    with pytest.raises(UsageError, match="periodic=True"):
        decompose_regional(wind, periodic=True)
    with pytest.raises(UsageError, match="unknown regional option"):
        decompose_regional(wind, truncation=42)
    with pytest.raises(UsageError, match="regularisation applies to the variational"):
        decompose_regional(wind, scheme="dirichlet", regularisation=1e-3)


# --- laziness and reuse ------------------------------------------------------------------------

@pytest.mark.parametrize("masked", [False, True])
def test_levels_are_lazy_and_share_one_factorisation(monkeypatch, masked):
    # dask: nothing computed until asked, one task per latitude-longitude slab (README.md,
    # "Python API"; common practice); the factorisation depends on the grid and mask only, so three levels
    # build it once, and the threads that share it get the eager result.
    lat, lon, u, v, _, _ = box_case(0.5)
    if masked:
        valid = coastline_mask(lat, lon)
        u, v = np.where(valid, u, np.nan), np.where(valid, v, np.nan)
    wind = as_wind(lat, lon, u, v, levels=3).chunk({"level": 1})
    built = []
    original = regional.VariationalSolver.__init__

    def counting(self, *args, **kwargs):
        built.append(1)
        original(self, *args, **kwargs)

    monkeypatch.setattr(regional.VariationalSolver, "__init__", counting)
    cache.clear()
    out = decompose_regional(wind)
    assert out["streamfunction"].chunks is not None
    assert built == []
    computed = out.compute()
    assert len(built) == 1
    eager = decompose_regional(as_wind(lat, lon, u, v))
    np.testing.assert_allclose(computed.u_rotational.isel(level=2).values,
                               eager.u_rotational.values, rtol=1e-10, atol=1e-10)


def test_variational_split_reports_the_harmonic_wind_it_shares():
    # The harmonic wind written beside the variational split is that of the Lynch (1989)
    # partition (Mon. Wea. Rev. 117, 1492-1500, eq. 2.6), and the split's two parts alone add
    # up to the wind, as its wind_reconstruction attribute says.
    lat, lon, u, v, _, _ = box_case(0.5)
    wind = as_wind(lat, lon, u, v)
    fit = decompose_regional(wind, scheme="variational")
    lynch = decompose_regional(wind, scheme="dirichlet")
    np.testing.assert_allclose(fit["u_harmonic"], lynch["u_harmonic"], atol=1e-12)
    np.testing.assert_allclose(fit["v_harmonic"], lynch["v_harmonic"], atol=1e-12)
    assert "u_rotational + u_divergent = u" in fit.attrs["wind_reconstruction"]
    assert "+ u_harmonic = u" in lynch.attrs["wind_reconstruction"]
    assert reconstruction_error(fit, u, v) <= 1e-6
    assert "do not add it" in fit["u_harmonic"].attrs["comment"]


def test_command_line_on_the_limited_area_sample_writes_every_part_and_its_quality(tmp_path):
    # The command line reads lazily; the quality figures must still reach the file's attributes.
    # The 1e-6 reconstruction bound is our choice, as above.
    from pathlib import Path

    import xarray as xr

    from flowpipe.cli import main

    sample = Path(__file__).resolve().parents[1] / "sample_data" / "demo_regional.nc"
    out = tmp_path / "parts.nc"
    assert main(["decompose", str(sample), "--method", "auto", "--levels", "850", "-o", str(out)]) == 0
    with xr.open_dataset(out) as ds:
        for name in ("streamfunction", "velocity_potential", "u_rotational", "v_rotational",
                     "u_divergent", "v_divergent", "u_harmonic", "v_harmonic"):
            assert np.isfinite(ds[name].values).any()
        assert ds.attrs["method"] == "regional" and ds.attrs["scheme"] == "variational"
        assert 0 < ds.attrs["reconstruction_error"] <= 1e-6
        assert ds.attrs["reconstruction_error"] == pytest.approx(
            float(ds["reconstruction_error"].max()), rel=1e-12)
        assert 0 <= ds.attrs["harmonic_energy_share"] <= 1
        assert ds.attrs["iterations"] >= 1


# --- the harmonic wind is harmonic (a figure that can fail) ------------------------------------

@pytest.mark.parametrize("scheme", SCHEMES)
def test_harmonic_wind_has_no_vorticity_or_divergence_to_second_order(scheme):
    # Lynch (1989), Mon. Wea. Rev. 117, 1492-1500: the harmonic part is irrotational and
    # non-divergent. On the discrete grid its vorticity and divergence (the model's own
    # curl and divergence at the corners) are those of the second-order difference between
    # the compact Laplacian and curl(grad); so the figure falls about fourfold when the grid
    # step halves (second-order convergence, common practice). Measured on this box:
    # 2.5e-2 (1 deg), 6.3e-3 (0.5 deg), 1.6e-3 (0.25 deg).
    figures = []
    for step in (0.5, 0.25):
        lat, lon, u, v, _, _ = box_case(step)
        out = decompose_regional(as_wind(lat, lon, u, v), scheme=scheme)
        figures.append(out.attrs["harmonic_rotation"])
        assert float(out["harmonic_rotation"]) == figures[-1]
    assert figures[0] <= 1e-2
    assert figures[0] / figures[1] >= 3.5


def test_harmonic_rotation_reports_a_poisson_solve_gone_wrong(monkeypatch):
    # A solver that returns half the solution leaves half the vorticity and divergence in
    # the "harmonic" wind, which the figure must report (and which the reconstruction
    # error, zero by construction for this scheme, cannot).
    from flowpipe.regional import solvers

    class Halved:
        def __init__(self, solver):
            self.solver, self.name = solver, solver.name

        def solve(self, rhs):
            x, iterations = self.solver.solve(rhs)
            return 0.5 * x, iterations

    lat, lon, u, v, _, _ = box_case(0.5)
    cache.clear()
    monkeypatch.setattr(cache, "dirichlet_solver",
                        lambda grid, valid: Halved(solvers.dirichlet_solver(grid, valid)))
    broken = decompose_regional(as_wind(lat, lon, u, v), scheme="dirichlet")
    cache.clear()
    assert broken.attrs["reconstruction_error"] == 0.0
    assert broken.attrs["harmonic_rotation"] >= 0.3
