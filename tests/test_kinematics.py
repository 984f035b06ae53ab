"""Spectral kinematics against analytic flows, Parseval's identity and quadrature."""

from __future__ import annotations

import ducc0
import numpy as np
import pytest
from reference_winds import U0, A, case2, case6, latitudes, mesh, potential_flow, wind_dataset

import flowpipe as fp
from flowpipe.constants import EARTH_ROTATION_RATE


def _wind(geometry, nlat, nlon, flow):
    lat = latitudes(geometry, nlat)
    lon, phi, lam = mesh(lat, nlon)
    ref = flow(phi, lam)
    return wind_dataset(ref["u"], ref["v"], lat, lon), ref, phi, lam


def _quadrature_weights(geometry, nlat):
    """Area fraction of each row (ascending): Gauss-Legendre from numpy.polynomial.legendre
    .leggauss (weights sum to 2 over sin(phi) in [-1, 1]); Clenshaw-Curtis from
    ducc0.sht.experimental.get_gridweights (sum 4 pi, symmetric)."""
    if geometry == "GL":
        return np.polynomial.legendre.leggauss(nlat)[1] / 2.0
    return ducc0.sht.experimental.get_gridweights(geometry, nlat) / (4.0 * np.pi)


@pytest.mark.parametrize(("geometry", "nlat", "nlon", "flow"), [
    ("GL", 32, 64, potential_flow),          # scipy.special.sph_harm_y field
    ("CC", 33, 64, case6),                   # Williamson et al. (1992), test case 6
    ("CC", 33, 64, lambda p, q: case2(p, q, np.pi / 2 - 0.05)),  # ... test case 2
])
def test_parseval_spectrum_sums_to_mean_kinetic_energy(geometry, nlat, nlon, flow):
    # Parseval on the sphere: sum_l E(l) equals the area-weighted global mean of
    # (u^2 + v^2)/2, computed here by quadrature exact for the band-limited field
    # (Boer 1983, J. Atmos. Sci. 40, 154-163), to <= 1e-10 relative.
    wind, ref, _, _ = _wind(geometry, nlat, nlon, flow)
    kin = fp.kinematics(wind)
    total = float(kin["kinetic_energy_spectrum_rotational"].sum()
                  + kin["kinetic_energy_spectrum_divergent"].sum())
    mean = float(_quadrature_weights(geometry, nlat) @ (0.5 * (ref["u"] ** 2 + ref["v"] ** 2)).mean(1))
    assert abs(total - mean) <= 1e-10 * mean
    # The rotational and divergent winds are orthogonal on the sphere (Helmholtz; Boer
    # 1983), so the quadrature of the two kinetic-energy fields adds up to the same mean.
    ke_fields = (kin["kinetic_energy_rotational"] + kin["kinetic_energy_divergent"]).values
    parts = float(_quadrature_weights(geometry, nlat) @ ke_fields.mean(1))
    assert abs(parts - mean) <= 1e-10 * mean


def test_rossby_haurwitz_spectrum_has_degrees_1_and_5_only():
    # Williamson et al. (1992) test case 6: psi is a sum of a degree-1 term (sin phi) and a
    # degree-(R+1) = 5 term (cos^4 phi sin phi cos 4 lambda), and the flow is non-divergent.
    wind, _, _, _ = _wind("GL", 32, 64, case6)
    kin = fp.kinematics(wind)
    rot = kin["kinetic_energy_spectrum_rotational"].values
    assert kin.sizes["total_wavenumber"] == 32
    assert np.all(rot[[1, 5]] > 0)
    others = np.delete(rot, [1, 5])
    assert np.max(others) <= 1e-12 * rot.max()
    assert np.max(kin["kinetic_energy_spectrum_divergent"].values) <= 1e-12 * rot.max()


def test_absolute_vorticity_of_zonal_flow():
    # Williamson et al. (1992) test case 2 (alpha = 0): zeta = 2 u0 sin(phi) / a; absolute
    # vorticity adds 2 Omega sin(phi) with Omega of IERS Conventions (2010), table 1.1
    # (Holton & Hakim 2013, An Introduction to Dynamic Meteorology, section 4.2).
    wind, ref, phi, _ = _wind("F1", 32, 64, lambda p, q: case2(p, q, 0.0))
    kin = fp.kinematics(wind)
    exact = ref["zeta"] + 2.0 * EARTH_ROTATION_RATE * np.sin(phi)
    error = np.max(np.abs(kin["absolute_vorticity"].values - exact)) / np.max(np.abs(exact))
    assert error <= 1e-9


def test_rigid_rotation_has_no_deformation():
    # Solid-body rotation (Williamson et al. 1992, test case 2, flow over the poles) has a
    # vanishing rate of strain (Batchelor 1967, An Introduction to Fluid Dynamics, section
    # 2.3): stretching and shearing deformation are zero, pole rows included.
    wind, _, _, _ = _wind("CC", 33, 64, lambda p, q: case2(p, q, np.pi / 2 - 0.05))
    kin = fp.kinematics(wind)
    scale = U0 / A
    for name in ("stretching_deformation", "shearing_deformation", "total_deformation"):
        assert np.max(np.abs(kin[name].values)) <= 1e-9 * scale


def _batchelor(flow, phi, lam, h=1e-3):
    """Stretching and shearing deformation from the spherical-coordinate rate of strain
    of Batchelor (1967), appendix 2, with derivatives of the analytic flow taken by
    fourth-order central differences (Fornberg 1988, Math. Comp. 51, 699-706)."""
    def d(f, dp, dl):
        return (-f(phi + 2 * dp, lam + 2 * dl) + 8 * f(phi + dp, lam + dl)
                - 8 * f(phi - dp, lam - dl) + f(phi - 2 * dp, lam - 2 * dl)) / (12 * h)

    def u(p, q):
        return flow(p, q)["u"]

    def v(p, q):
        return flow(p, q)["v"]

    c, t = np.cos(phi), np.tan(phi)
    uu, vv = u(phi, lam), v(phi, lam)
    stretching = d(u, 0, h) / (A * c) - vv * t / A - d(v, h, 0) / A
    shearing = d(v, 0, h) / (A * c) + d(u, h, 0) / A + uu * t / A
    return stretching, shearing


@pytest.mark.parametrize("flow", [potential_flow, case6], ids=["sph_harm_y", "case6"])
def test_deformation_matches_the_rate_of_strain(flow):
    wind, _, phi, lam = _wind("GL", 32, 64, flow)
    kin = fp.kinematics(wind)
    stretching, shearing = _batchelor(flow, phi, lam)
    scale = np.max(np.hypot(stretching, shearing))
    assert np.max(np.abs(kin["stretching_deformation"].values - stretching)) <= 1e-7 * scale
    assert np.max(np.abs(kin["shearing_deformation"].values - shearing)) <= 1e-7 * scale
    total = np.hypot(stretching, shearing)
    assert np.max(np.abs(kin["total_deformation"].values - total)) <= 1e-7 * scale


def test_truncated_spectrum_and_regional_grid():
    # Triangular truncation N: wavenumbers 0..N (Machenhauer 1979, GARP Publ. 17).
    wind, _, _, _ = _wind("GL", 32, 64, case6)
    kin = fp.kinematics(wind, truncation=4)
    assert list(kin["total_wavenumber"].values) == [0, 1, 2, 3, 4]
    # The degree-5 part of case 6 is gone: energy left is that of degree 1 only.
    full = fp.kinematics(wind)["kinetic_energy_spectrum_rotational"].values
    assert np.isclose(kin["kinetic_energy_spectrum_rotational"].values.sum(), full[1], rtol=1e-12)
    with pytest.raises(fp.InputError, match="complete global"):
        fp.kinematics(wind.isel(longitude=slice(0, 30)))
