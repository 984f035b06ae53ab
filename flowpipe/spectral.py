"""Spherical-harmonic engine: Helmholtz decomposition of a wind on the sphere.

Plain NumPy kernels on one latitude-longitude slab at a time, on top of the
spin-weighted transforms of ducc0. Arrays come and go in the canonical
orientation of :mod:`flowpipe.ingest` (latitudes ascending, south to north,
along the second-last axis); ducc0 orders rings north to south, so the engine
flips rows on the way in and out.

Conventions
-----------
* ``u = -(1/a) dpsi/dphi + (1/(a cos phi)) dchi/dlambda`` and
  ``v = (1/(a cos phi)) dpsi/dlambda + (1/a) dchi/dphi``; the relative
  vorticity is ``laplacian(psi)`` and the divergence ``laplacian(chi)``.
* The spin-1 map handed to ducc0 is ``[v_theta, v_phi] = [-v, u]`` (theta is
  colatitude). Its gradient (E) and curl (B) coefficients are
  ``sqrt(l(l+1))/a`` times the coefficients of ``chi`` and ``psi``.
* Coefficients are complex arrays in the packed order of ducc0 (``m`` major,
  ``m = 0..N``, then ``l = m..N``), orthonormal on the unit sphere.
* ``psi`` and ``chi`` are defined up to a constant: their ``l = 0``
  coefficient is zero, which makes their global area-weighted mean zero.

Pole rows
---------
On a grid with rows on the poles (geometry ``"CC"``) the ``nlon`` values of a
pole row all describe one and the same horizontal vector, seen from ``nlon``
meridians: eastward and northward directions at a pole depend on the
meridian along which it is approached. A consistent pole row is therefore
``u = -W_x sin(lambda) + W_y cos(lambda)``,
``v = s (-W_x cos(lambda) - W_y sin(lambda))`` with ``s = +1`` at the north
pole and ``-1`` at the south pole, ``(W_x, W_y)`` the Cartesian components of
the pole vector. Before the analysis each pole row is replaced by its
least-squares fit of this form; any other content of a pole row (a constant
written by a model that averaged the row, say) cannot belong to a smooth
vector field and is discarded.
"""

from __future__ import annotations

from functools import lru_cache

import ducc0
import numpy as np

from .errors import UsageError

_SHT = ducc0.sht.experimental

#: ducc0 ring geometries for which the vector analysis is exact.
GEOMETRIES = ("CC", "F1", "GL")

#: The same geometries in the words of messages to users.
GRID_WORDS = {"CC": "equiangular (with pole rows)", "F1": "equiangular (rows offset from the "
              "poles)", "GL": "Gaussian"}


def max_truncation(geometry: str, nlat: int, nlon: int) -> int:
    """The largest triangular truncation a complete global grid resolves.

    Parameters
    ----------
    geometry : {"CC", "F1", "GL"}
        ducc0 ring geometry.
    nlat, nlon : int
        Number of latitude rows and of longitudes.

    Returns
    -------
    int
        ``min(lmax, (nlon - 1) // 2)``, ``lmax`` the highest degree the
        analysis recovers exactly (``nlat - 2`` for ``"CC"``, ``nlat - 1``
        for ``"F1"`` and ``"GL"``, from
        :func:`ducc0.sht.experimental.maximum_safe_l`), ``(nlon - 1) // 2``
        the highest order the longitudes carry without reaching the Nyquist
        frequency.

    References
    ----------
    Reinecke, Belkner & Carron (2023), "Improved cosmic microwave background
    (de-)lensing using general spherical harmonic transforms", Astron.
    Astrophys. 678, A165 (the ducc0 transforms and their exactness limits, as
    listed in :func:`ducc0.sht.experimental.analysis_2d`).
    """
    if geometry not in GEOMETRIES:
        raise UsageError(f"geometry {geometry!r} is not one of {', '.join(GEOMETRIES)}")
    return int(min(_SHT.maximum_safe_l(geometry, nlat), (nlon - 1) // 2))


@lru_cache(maxsize=4)
def degrees(truncation: int) -> np.ndarray:
    """Total wavenumber ``l`` of every coefficient in ducc0's packed order.

    Parameters
    ----------
    truncation : int
        Triangular truncation ``N``.

    Returns
    -------
    numpy.ndarray
        Integer array of length ``(N + 1)(N + 2) / 2``, read-only: one array
        per truncation is kept and shared (building it took 1.3 ms at T719,
        three times in every 0.25 degree slab).

    References
    ----------
    Packed ``m``-major storage of :mod:`ducc0.sht` (the healpy convention;
    Gorski et al. 2005, "HEALPix: a framework for high-resolution
    discretization and fast analysis of data distributed on the sphere",
    Astrophys. J. 622, 759-771).
    """
    return _read_only(np.concatenate([np.arange(m, truncation + 1)
                                      for m in range(truncation + 1)]))


@lru_cache(maxsize=4)
def orders(truncation: int) -> np.ndarray:
    """Zonal wavenumber ``m`` of every coefficient in ducc0's packed order.

    Parameters
    ----------
    truncation : int
        Triangular truncation ``N``.

    Returns
    -------
    numpy.ndarray
        Integer array of length ``(N + 1)(N + 2) / 2``, read-only and shared
        per truncation, as :func:`degrees`.

    References
    ----------
    As :func:`degrees`.
    """
    return _read_only(np.concatenate([np.full(truncation + 1 - m, m)
                                      for m in range(truncation + 1)]))


def _read_only(array: np.ndarray) -> np.ndarray:
    array.flags.writeable = False
    return array


@lru_cache(maxsize=4)
def _potential_factor(truncation: int, radius: float) -> np.ndarray:
    """``a / sqrt(l(l+1))`` per packed coefficient, 0 for ``l = 0`` (E/B to chi/psi)."""
    ell = degrees(truncation).astype(np.float64)
    factor = np.zeros_like(ell)
    factor[ell > 0] = radius / np.sqrt(ell[ell > 0] * (ell[ell > 0] + 1.0))
    return _read_only(factor)


@lru_cache(maxsize=4)
def _laplacian_factor(truncation: int, radius: float) -> np.ndarray:
    """``-l(l+1) / a**2`` per packed coefficient (the eigenvalues of the Laplacian)."""
    ell = degrees(truncation).astype(np.float64)
    return _read_only(-ell * (ell + 1.0) / radius**2)


def spin1_map(u: np.ndarray, v: np.ndarray, geometry: str) -> np.ndarray:
    """The spin-1 map of a wind that ducc0 analyses, with consistent pole rows.

    Parameters
    ----------
    u, v : numpy.ndarray
        Eastward and northward wind, shape ``(nlat, nlon)``, rows ascending
        from south to north, longitudes equally spaced over the full circle
        from 0 eastward; any floating-point type. Not modified.
    geometry : {"CC", "F1", "GL"}
        ducc0 ring geometry of the grid.

    Returns
    -------
    numpy.ndarray
        ``[v_theta, v_phi] = [-v, u]`` in float64, shape ``(2, nlat, nlon)``,
        rows north to south (ducc0's order). On a ``"CC"`` grid each pole row
        is the least-squares fit of a single horizontal vector per pole (see
        the module docstring; :func:`pole_row`).

    Notes
    -----
    The map is filled in one pass over ``u`` and ``v`` (flip, sign and
    conversion to float64 together) and the two pole rows are corrected in
    it: copying ``u`` and ``v`` first to correct their pole rows cost two
    more passes, 2.5 ms a 0.25 degree slab.

    References
    ----------
    The representation of a tangent vector at a pole in the local
    east-north bases of the meridians through it (common practice; see e.g.
    Swarztrauber 1981, "The approximation of vector functions and their
    derivatives on the sphere", SIAM J. Numer. Anal. 18, 191-210, section 2);
    the spin-1 map of ducc0: Reinecke, Belkner & Carron (2023), Astron.
    Astrophys. 678, A165.
    """
    spin_map = np.empty((2,) + np.shape(u), dtype=np.float64)
    np.negative(v[::-1], out=spin_map[0])
    spin_map[1] = u[::-1]
    if geometry == "CC":
        nlon = spin_map.shape[-1]
        longitude = np.arange(nlon) * 360.0 / nlon
        for row, sign in ((0, 1.0), (-1, -1.0)):  # north pole first in ducc0's order
            pole_u, pole_v = pole_row(spin_map[1, row], -spin_map[0, row], longitude, sign)
            spin_map[1, row] = pole_u
            spin_map[0, row] = -pole_v
    return spin_map


def pole_row(u: np.ndarray, v: np.ndarray, longitude: np.ndarray,
             sign: float) -> tuple[np.ndarray, np.ndarray]:
    """The one horizontal vector that a row of winds around a pole describes, as a pole row.

    Parameters
    ----------
    u, v : numpy.ndarray
        Eastward and northward wind along one row, shape ``(nlon,)``: a pole
        row, or the row nearest a pole (its fit then differs from the pole's
        vector by the square of the distance to the pole).
    longitude : numpy.ndarray
        Longitudes in degrees, equally spaced over the full circle.
    sign : float
        ``+1`` for the north pole, ``-1`` for the south pole.

    Returns
    -------
    u, v : numpy.ndarray
        The least-squares fit ``u = -W_x sin(lambda) + W_y cos(lambda)``,
        ``v = sign (-W_x cos(lambda) - W_y sin(lambda))`` (module docstring).

    References
    ----------
    As :func:`spin1_map`; the fit takes the longitude-wavenumber-1
    part of the row, which a smooth field's variation across the row does not
    reach at first order (common practice).
    """
    lam = np.radians(longitude)
    s, c = np.sin(lam), np.cos(lam)
    vn = sign * np.asarray(v, dtype=np.float64)
    wx = -np.mean(s * u + c * vn)
    wy = np.mean(c * u - s * vn)
    return -wx * s + wy * c, sign * (-wx * c - wy * s)


def wind_coefficients(
    u: np.ndarray, v: np.ndarray, geometry: str, truncation: int, nthreads: int = 1
) -> np.ndarray:
    """Gradient and curl coefficients of a wind: one spin-1 analysis.

    Parameters
    ----------
    u, v : numpy.ndarray
        Eastward and northward wind in m s-1, shape ``(nlat, nlon)``,
        latitudes ascending, longitudes from 0 eastward.
    geometry : {"CC", "F1", "GL"}
        ducc0 ring geometry of the grid.
    truncation : int
        Triangular truncation ``N``, at most :func:`max_truncation`.
    nthreads : int
        Threads ducc0 may use.

    Returns
    -------
    numpy.ndarray
        Complex, shape ``(2, (N + 1)(N + 2) / 2)``: the gradient (``E``) and
        curl (``B``) coefficients of the wind in m s-1 (packed, see the module
        docstring), zero for ``l = 0``. :func:`potentials` turns them into
        those of ``psi`` and ``chi``; :func:`divergent_wind` and
        :func:`rotational_wind` synthesise the two parts of the wind from them.

    Notes
    -----
    Pole rows are made consistent first (:func:`spin1_map`).

    References
    ----------
    Helmholtz decomposition with vector spherical harmonics: Swarztrauber
    (1981), "The approximation of vector functions and their derivatives on
    the sphere", SIAM J. Numer. Anal. 18, 191-210; spin-weighted transforms:
    Reinecke & Seljebotn (2013), "Libsharp - spherical harmonic transforms
    revisited", Astron. Astrophys. 554, A112, and Reinecke, Belkner & Carron
    (2023), Astron. Astrophys. 678, A165 (ducc0).
    """
    return _SHT.analysis_2d(map=spin1_map(u, v, geometry), spin=1, lmax=truncation,
                            geometry=geometry, nthreads=nthreads)


def potentials(eb: np.ndarray, truncation: int, radius: float) -> tuple[np.ndarray, np.ndarray]:
    """Streamfunction and velocity-potential coefficients from those of the wind.

    Parameters
    ----------
    eb : numpy.ndarray
        Gradient and curl coefficients of the wind (:func:`wind_coefficients`).
    truncation : int
        Triangular truncation ``N``.
    radius : float
        Radius of the sphere in m.

    Returns
    -------
    psi, chi : numpy.ndarray
        Complex coefficients (packed) of the streamfunction and of the
        velocity potential in m2 s-1, with zero ``l = 0`` coefficient:
        ``psi_lm = a B_lm / sqrt(l(l+1))``, ``chi_lm = a E_lm / sqrt(l(l+1))``.

    References
    ----------
    As :func:`wind_coefficients` (Swarztrauber 1981, SIAM J. Numer. Anal. 18,
    191-210).
    """
    scaled = eb * _potential_factor(truncation, radius)
    return scaled[1], scaled[0]


def scalar_synthesis(
    alm: np.ndarray, geometry: str, nlat: int, nlon: int, truncation: int, nthreads: int = 1
) -> np.ndarray:
    """Grid values of a scalar field from its spherical-harmonic coefficients.

    Parameters
    ----------
    alm : numpy.ndarray
        Complex coefficients, packed, triangular truncation ``N``.
    geometry : {"CC", "F1", "GL"}
        ducc0 ring geometry of the output grid.
    nlat, nlon : int
        Output grid size.
    truncation : int
        ``N``.
    nthreads : int
        Threads ducc0 may use.

    Returns
    -------
    numpy.ndarray
        Shape ``(nlat, nlon)``, latitudes ascending.

    References
    ----------
    Reinecke & Seljebotn (2013), "Libsharp - spherical harmonic transforms
    revisited", Astron. Astrophys. 554, A112 (the transform ducc0 implements).
    """
    out = _SHT.synthesis_2d(alm=alm[None], spin=0, lmax=truncation, geometry=geometry,
                            ntheta=nlat, nphi=nlon, nthreads=nthreads)
    return out[0, ::-1]


def divergent_wind(
    e_lm: np.ndarray, geometry: str, nlat: int, nlon: int, truncation: int, nthreads: int = 1
) -> tuple[np.ndarray, np.ndarray]:
    """The divergent wind, the gradient of ``chi``, from the gradient coefficients.

    Parameters
    ----------
    e_lm : numpy.ndarray
        Gradient coefficients ``E`` of the wind (``wind_coefficients(...)[0]``),
        or ``sqrt(l(l+1))/a`` times the coefficients of any scalar ``f``.
    geometry : {"CC", "F1", "GL"}
        ducc0 ring geometry of the output grid.
    nlat, nlon : int
        Output grid size.
    truncation : int
        ``N``.
    nthreads : int
        Threads ducc0 may use.

    Returns
    -------
    u_div, v_div : numpy.ndarray
        ``(1/(a cos phi)) dchi/dlambda`` and ``(1/a) dchi/dphi``, each of shape
        ``(nlat, nlon)`` with latitudes ascending (row-reversed views of
        ducc0's output).

    References
    ----------
    The gradient part of a spin-1 field as a synthesis of its E coefficients
    alone: Reinecke, Belkner & Carron (2023), Astron. Astrophys. 678, A165
    (ducc0, mode ``"GRAD_ONLY"``); Swarztrauber (1981), SIAM J. Numer. Anal.
    18, 191-210.
    """
    out = _gradient_only(e_lm, geometry, nlat, nlon, truncation, nthreads)
    np.negative(out[0], out=out[0])  # v = -v_theta, in place
    return out[1, ::-1], out[0, ::-1]


def rotational_wind(
    b_lm: np.ndarray, geometry: str, nlat: int, nlon: int, truncation: int, nthreads: int = 1
) -> tuple[np.ndarray, np.ndarray]:
    """The rotational wind, ``k x grad psi``, from the curl coefficients.

    Parameters
    ----------
    b_lm : numpy.ndarray
        Curl coefficients ``B`` of the wind (``wind_coefficients(...)[1]``).
    geometry : {"CC", "F1", "GL"}
        ducc0 ring geometry of the output grid.
    nlat, nlon : int
        Output grid size.
    truncation : int
        ``N``.
    nthreads : int
        Threads ducc0 may use.

    Returns
    -------
    u_rot, v_rot : numpy.ndarray
        ``-(1/a) dpsi/dphi`` and ``(1/(a cos phi)) dpsi/dlambda``, each of
        shape ``(nlat, nlon)`` with latitudes ascending (row-reversed views of
        ducc0's output).

    Notes
    -----
    The gradient-only synthesis of ``B`` gives ``(v_theta, v_phi)`` of
    ``grad psi``, that is ``(-dpsi/dphi, dpsi/dlambda / cos phi) / a``: the
    rotational wind as it is, with no sign to change.

    References
    ----------
    As :func:`divergent_wind`.
    """
    out = _gradient_only(b_lm, geometry, nlat, nlon, truncation, nthreads)
    return out[0, ::-1], out[1, ::-1]


def _gradient_only(alm: np.ndarray, geometry: str, nlat: int, nlon: int, truncation: int,
                   nthreads: int) -> np.ndarray:
    """ducc0's spin-1 synthesis of gradient coefficients alone, rows north to south.

    Mode ``"GRAD_ONLY"`` on the E or B coefficients as the analysis gives them:
    ``"DERIV1"`` on ``psi / a`` and ``chi / a`` cost 5.7 ms more a 0.25 degree
    synthesis (one thread), for the scaling of the coefficients.
    """
    return _SHT.synthesis_2d(alm=alm[None], spin=1, lmax=truncation, geometry=geometry,
                             ntheta=nlat, nphi=nlon, mode="GRAD_ONLY", nthreads=nthreads)


def laplacian(alm: np.ndarray, truncation: int, radius: float) -> np.ndarray:
    """Coefficients of the Laplacian of a scalar field on the sphere.

    Parameters
    ----------
    alm : numpy.ndarray
        Complex coefficients, packed, truncation ``N``.
    truncation : int
        ``N``.
    radius : float
        Radius of the sphere in m.

    Returns
    -------
    numpy.ndarray
        ``-l(l+1)/a**2`` times ``alm``.

    References
    ----------
    Spherical harmonics are eigenfunctions of the Laplace-Beltrami operator
    with eigenvalue ``-l(l+1)/a**2`` (e.g. Arfken, Weber & Harris 2013,
    "Mathematical Methods for Physicists", 7th ed., section 15.5).
    """
    return alm * _laplacian_factor(truncation, radius)


def truncate(alm: np.ndarray, truncation: int, new_truncation: int) -> np.ndarray:
    """Keep only the coefficients of degree ``l <= new_truncation``.

    Parameters
    ----------
    alm : numpy.ndarray
        Complex coefficients, packed, truncation ``truncation``.
    truncation, new_truncation : int
        Old and new triangular truncation, ``new_truncation <= truncation``.

    Returns
    -------
    numpy.ndarray
        Packed coefficients at the new truncation.

    References
    ----------
    Triangular truncation of a spherical-harmonic expansion (Machenhauer
    1979, "The spectral method", in GARP Publ. Ser. 17, vol. II, WMO, 121-275).
    """
    keep = (degrees(truncation) <= new_truncation) & (orders(truncation) <= new_truncation)
    return alm[keep]


def energy_per_degree(alm: np.ndarray, truncation: int, radius: float) -> np.ndarray:
    """Kinetic energy per total wavenumber of a rotational or divergent wind.

    Parameters
    ----------
    alm : numpy.ndarray
        Complex coefficients of ``psi`` (rotational wind) or ``chi``
        (divergent wind), packed, truncation ``N``.
    truncation : int
        ``N``.
    radius : float
        Radius of the sphere in m.

    Returns
    -------
    numpy.ndarray
        ``E(l)`` for ``l = 0..N`` in m2 s-2: the contribution of degree ``l``
        to the global area mean of ``(u**2 + v**2) / 2``, so that
        ``sum(E)`` is that mean.

    Notes
    -----
    ``E(l) = l(l+1) / (8 pi a**2) * (|c_l0|**2 + 2 sum_{m>0} |c_lm|**2)``:
    the ``m < 0`` coefficients of a real field are the conjugates of the
    ``m > 0`` ones and the harmonics are orthonormal on the unit sphere.

    References
    ----------
    Parseval's identity for vector spherical harmonics and the kinetic-energy
    spectrum ``l(l+1)/(4 a**2) |psi_l|**2``: Boer (1983), "Homogeneous and
    isotropic turbulence on the sphere", J. Atmos. Sci. 40, 154-163;
    Koshyk & Hamilton (2001), "The horizontal kinetic energy spectrum and
    spectral budget simulated by a high-resolution troposphere-stratosphere-
    mesosphere GCM", J. Atmos. Sci. 58, 329-348, eq. 2.
    """
    ell = degrees(truncation)
    weight = np.where(orders(truncation) == 0, 1.0, 2.0)
    power = np.bincount(ell, weights=weight * np.abs(alm) ** 2, minlength=truncation + 1)
    ls = np.arange(truncation + 1, dtype=np.float64)
    return ls * (ls + 1.0) * power / (8.0 * np.pi * radius**2)


def deformation_synthesis(
    psi: np.ndarray, chi: np.ndarray, geometry: str, nlat: int, nlon: int, truncation: int,
    radius: float, nthreads: int = 1,
) -> tuple[np.ndarray, np.ndarray]:
    """Stretching and shearing deformation of a wind from its ``psi`` and ``chi``.

    Parameters
    ----------
    psi, chi : numpy.ndarray
        Complex coefficients of the streamfunction and velocity potential,
        packed, truncation ``N``.
    geometry : {"CC", "F1", "GL"}
        ducc0 ring geometry of the output grid.
    nlat, nlon : int
        Output grid size.
    truncation : int
        ``N``.
    radius : float
        Radius of the sphere in m.
    nthreads : int
        Threads ducc0 may use.

    Returns
    -------
    stretching, shearing : numpy.ndarray
        In s-1, shape ``(nlat, nlon)``, latitudes ascending:
        ``(1/(a cos phi)) du/dlambda - (v tan phi)/a - (1/a) dv/dphi`` and
        ``(1/(a cos phi)) dv/dlambda + (cos phi/a) d(u/cos phi)/dphi``.

    Notes
    -----
    The trace-free rate-of-strain tensor of a horizontal wind is a spin-2
    field. Its gradient and curl coefficients are
    ``sqrt((l-1)(l+2)) sqrt(l(l+1)) / a**2`` times those of ``chi`` and
    ``psi``, so one spin-2 synthesis gives both components, exactly and
    without metric terms that are singular at the poles.

    References
    ----------
    Components of the rate of strain in spherical coordinates: Batchelor
    (1967), "An Introduction to Fluid Dynamics", Cambridge University Press,
    appendix 2. Spin-2 harmonics and the edth operator: Newman & Penrose
    (1966), "Note on the Bondi-Metzner-Sachs group", J. Math. Phys. 7,
    863-870; transforms: Reinecke & Seljebotn (2013), Astron. Astrophys. 554,
    A112.
    """
    ell = degrees(truncation).astype(np.float64)
    factor = np.sqrt(np.maximum((ell - 1.0) * (ell + 2.0), 0.0) * ell * (ell + 1.0)) / radius**2
    out = _SHT.synthesis_2d(alm=np.stack([chi * factor, psi * factor]), spin=2, lmax=truncation,
                            geometry=geometry, ntheta=nlat, nphi=nlon, nthreads=nthreads)
    return out[0, ::-1], out[1, ::-1]
