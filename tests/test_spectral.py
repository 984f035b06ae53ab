"""The spherical-harmonic engine against reference libraries and analytic fields."""

from __future__ import annotations

import ducc0
import numpy as np
import pytest
from reference_winds import A, case2, latitudes, mesh, potential_flow, relative_max_error

from flowpipe import spectral

GRIDS = [("CC", 33, 64), ("F1", 32, 64), ("GL", 32, 64)]


@pytest.mark.parametrize(("geometry", "nlat", "nlon"), GRIDS + [("CC", 721, 1440)])
def test_max_truncation_matches_ducc0_limits(geometry, nlat, nlon):
    # Exactness limits of ducc0.sht.experimental.analysis_2d (its docstring, Notes:
    # lmax <= nlat - 2 for CC and nlat - 1 for F1 and GL; m <= (nphi - 1) // 2).
    documented = nlat - 2 if geometry == "CC" else nlat - 1
    assert spectral.max_truncation(geometry, nlat, nlon) == min(documented, (nlon - 1) // 2)


@pytest.mark.parametrize(("geometry", "nlat", "nlon"), [g for g in GRIDS if g[0] != "CC"])
def test_potentials_of_spherical_harmonic_wind(geometry, nlat, nlon):
    # chi and psi built from scipy.special.sph_harm_y; the engine must return them
    # (zero-mean) and their Laplacians -l(l+1)/a^2 * (textbook identity), <= 1e-9.
    lat = latitudes(geometry, nlat)
    _, phi, lam = mesh(lat, nlon)
    ref = potential_flow(phi, lam)
    n = spectral.max_truncation(geometry, nlat, nlon)
    eb = spectral.wind_coefficients(ref["u"], ref["v"], geometry, n)
    psi_lm, chi_lm = spectral.potentials(eb, n, A)
    for alm, potential, laplacian in ((chi_lm, "chi", "delta"), (psi_lm, "psi", "zeta")):
        field = spectral.scalar_synthesis(alm, geometry, nlat, nlon, n)
        lap = spectral.scalar_synthesis(spectral.laplacian(alm, n, A), geometry, nlat, nlon, n)
        assert relative_max_error(field, ref[potential]) <= 1e-9
        assert relative_max_error(lap, ref[laplacian]) <= 1e-9
    # The gradient of chi is the divergent wind and k x grad psi the rotational one
    # (derivatives from sph_harm_y(diff_n=1)); together they give the wind back.
    u_div, v_div = spectral.divergent_wind(eb[0], geometry, nlat, nlon, n)
    u_rot, v_rot = spectral.rotational_wind(eb[1], geometry, nlat, nlon, n)
    scale = np.max(np.hypot(ref["u"], ref["v"]))
    assert np.max(np.abs(u_div - ref["u_div"])) / scale <= 1e-10
    assert np.max(np.abs(v_div - ref["v_div"])) / scale <= 1e-10
    assert np.max(np.abs(u_rot + u_div - ref["u"])) / scale <= 1e-10
    assert np.max(np.abs(v_rot + v_div - ref["v"])) / scale <= 1e-10


def test_coefficients_match_ducc0_scalar_analysis():
    # E/B of the spin-1 analysis are sqrt(l(l+1))/a times the scalar coefficients of chi
    # and psi (Swarztrauber 1981, SIAM J. Numer. Anal. 18, 191-210); the scalar
    # coefficients come straight from ducc0's spin-0 analysis of the analytic potentials.
    geometry, nlat, nlon = "GL", 32, 64
    lat = latitudes(geometry, nlat)
    _, phi, lam = mesh(lat, nlon)
    ref = potential_flow(phi, lam)
    n = spectral.max_truncation(geometry, nlat, nlon)
    psi_lm, chi_lm = spectral.potentials(
        spectral.wind_coefficients(ref["u"], ref["v"], geometry, n), n, A)
    for alm, potential in ((psi_lm, "psi"), (chi_lm, "chi")):
        direct = ducc0.sht.experimental.analysis_2d(
            map=ref[potential][None, ::-1].copy(), spin=0, lmax=n, geometry=geometry)[0]
        direct[spectral.degrees(n) == 0] = 0.0
        assert np.max(np.abs(alm - direct)) <= 1e-9 * np.max(np.abs(direct))


def test_truncation_removes_exactly_the_degrees_above_n():
    # A field with content at l = 3 and l = 9 (scipy.special.sph_harm_y) truncated at
    # N = 6 must keep the l = 3 part exactly and lose the l = 9 part entirely
    # (triangular truncation, Machenhauer 1979, The spectral method, GARP Publ. 17).
    geometry, nlat, nlon = "GL", 24, 48
    lat = latitudes(geometry, nlat)
    _, phi, lam = mesh(lat, nlon)
    low = ((3, 2, 2.0e6 + 1.0e6j),)
    high = ((9, 4, 1.0e6 - 3.0e6j),)
    full = potential_flow(phi, lam, chi_terms=low + high, psi_terms=high)
    kept = potential_flow(phi, lam, chi_terms=low, psi_terms=())
    psi_lm, chi_lm = spectral.potentials(
        spectral.wind_coefficients(full["u"], full["v"], geometry, 6), 6, A)
    chi = spectral.scalar_synthesis(chi_lm, geometry, nlat, nlon, 6)
    psi = spectral.scalar_synthesis(psi_lm, geometry, nlat, nlon, 6)
    assert relative_max_error(chi, kept["chi"]) <= 1e-9
    assert np.max(np.abs(psi)) <= 1e-9 * np.max(np.abs(full["psi"]))
    # And truncating the full expansion gives the same coefficients as analysing at N.
    n = spectral.max_truncation(geometry, nlat, nlon)
    _, chi_full = spectral.potentials(
        spectral.wind_coefficients(full["u"], full["v"], geometry, n), n, A)
    cut = spectral.truncate(chi_full, n, 6)
    assert cut.shape == chi_lm.shape
    assert np.max(np.abs(cut - chi_lm)) <= 1e-9 * np.max(np.abs(chi_lm))
    assert np.max(np.abs(chi_full[spectral.degrees(n) == 9])) > 0.1 * np.max(np.abs(chi_lm))


def test_pole_rows_of_the_spin_map_keep_a_true_vector_and_drop_the_rest():
    # A tangent vector at a pole seen from every meridian (Williamson et al. 1992,
    # test case 2 with alpha = pi/2 - 0.05 crosses the poles) is left unchanged; an
    # added constant, which no single vector produces (*common practice*), is removed.
    # The map is [v_theta, v_phi] = [-v, u] north to south (ducc0's spin-1 convention,
    # Reinecke, Belkner & Carron 2023, Astron. Astrophys. 678, A165).
    lat = latitudes("CC", 17)
    _, phi, lam = mesh(lat, 32)
    ref = case2(phi, lam, np.pi / 2 - 0.05)
    expected = np.stack([-ref["v"][::-1], ref["u"][::-1]])
    scale = np.max(np.abs(ref["u"]))
    assert np.max(np.abs(spectral.spin1_map(ref["u"], ref["v"], "CC") - expected)) \
        <= 1e-12 * scale
    bad_u, bad_v = ref["u"].copy(), ref["v"].copy()
    bad_u[[0, -1]] += 7.0
    bad_v[[0, -1]] -= 3.0
    given = bad_u.copy(), bad_v.copy()
    assert np.max(np.abs(spectral.spin1_map(bad_u, bad_v, "CC") - expected)) <= 1e-12 * scale
    # the input is not modified; on a grid without pole rows nothing is refitted
    np.testing.assert_array_equal(bad_u, given[0])
    np.testing.assert_array_equal(bad_v, given[1])
    np.testing.assert_array_equal(spectral.spin1_map(bad_u, bad_v, "F1"),
                                  np.stack([-bad_v[::-1], bad_u[::-1]]))
