"""The published reference winds the tests check flowpipe against, coded once, here.

Williamson, Drake, Hack, Jakob & Swarztrauber (1992), "A standard test set for
numerical approximations to the shallow water equations in spherical
geometry", J. Comput. Phys. 102, 211-224: test case 1 (solid-body rotation,
the advecting wind of section 3.1), test case 2 (steady zonal flow, section
3.2, the same wind with its streamfunction and vorticity) and test case 6
(Rossby-Haurwitz wave, section 3.6). Nair & Lauritzen (2010), "A class of
deformational flow test cases for linear transport problems on the sphere",
J. Comput. Phys. 229, 8868-8887: the time-reversing deformational flow.
Spherical harmonics from scipy.special (the reference library).

Not part of the package: tests and benchmarks import it (``tests`` on the path).
"""

from __future__ import annotations

import dask.array as dsa
import numpy as np
import xarray as xr

#: Radius of the Earth in the test set, Williamson et al. (1992), section 2.
A = 6.37122e6
#: Period of one revolution of test cases 1 and 2, 12 days (Williamson et al. 1992, eq. 93 ff).
REVOLUTION_SECONDS = 12 * 86400.0
#: Test cases 1 and 2: u0 = 2 pi a / (12 days), Williamson et al. (1992), sections 3.1, 3.2.
U0 = 2.0 * np.pi * A / REVOLUTION_SECONDS
#: Test case 6: omega = K = 7.848e-6 s-1 and R = 4, Williamson et al. (1992), section 3.6.
RH_OMEGA = RH_K = 7.848e-6
RH_R = 4


def latitudes(geometry: str, nlat: int) -> np.ndarray:
    """Ascending latitudes in degrees of a CC, F1 or GL grid.

    CC and F1: equally spaced with / without pole rows (Clenshaw-Curtis and
    Fejer's first rule, *common practice*); GL: Gauss-Legendre nodes from
    numpy.polynomial.legendre.leggauss (the reference library).
    """
    if geometry == "CC":
        return np.linspace(-90.0, 90.0, nlat)
    if geometry == "F1":
        step = 180.0 / nlat
        return -90.0 + step / 2 + step * np.arange(nlat)
    return np.degrees(np.arcsin(np.polynomial.legendre.leggauss(nlat)[0]))


def mesh(lat_deg: np.ndarray, nlon: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Longitudes in degrees and the 2-D latitude/longitude arrays in radians."""
    lon = np.arange(nlon) * 360.0 / nlon
    phi, lam = np.meshgrid(np.radians(lat_deg), np.radians(lon), indexing="ij")
    return lon, phi, lam


def case1(phi: np.ndarray, lam: np.ndarray, alpha: float) -> tuple[np.ndarray, np.ndarray]:
    """Test case 1 (and 2) wind: solid-body rotation about an axis tilted by ``alpha``.

    Williamson et al. (1992), eqs. (75)-(76): ``u = u0 (cos phi cos alpha + sin phi
    cos lambda sin alpha)``, ``v = -u0 sin lambda sin alpha``.
    """
    u = U0 * (np.cos(phi) * np.cos(alpha) + np.cos(lam) * np.sin(phi) * np.sin(alpha))
    v = -U0 * np.sin(lam) * np.sin(alpha) * np.ones_like(phi)
    return u, v


def case2(phi: np.ndarray, lam: np.ndarray, alpha: float) -> dict[str, np.ndarray]:
    """Test case 2 wind (that of case 1), streamfunction and relative vorticity (section 3.2)."""
    u, v = case1(phi, lam, alpha)
    shape = np.sin(phi) * np.cos(alpha) - np.cos(lam) * np.cos(phi) * np.sin(alpha)
    return {"u": u, "v": v, "psi": -A * U0 * shape, "zeta": 2.0 * U0 / A * shape}


def case6(phi: np.ndarray, lam: np.ndarray) -> dict[str, np.ndarray]:
    """Test case 6 (Rossby-Haurwitz wave, R = 4) wind, psi and zeta (section 3.6)."""
    w, k, r = RH_OMEGA, RH_K, RH_R
    c, s = np.cos(phi), np.sin(phi)
    u = A * w * c + A * k * c ** (r - 1) * (r * s**2 - c**2) * np.cos(r * lam)
    v = -A * k * r * c ** (r - 1) * s * np.sin(r * lam)
    psi = -A**2 * w * s + A**2 * k * c**r * s * np.cos(r * lam)
    zeta = 2 * w * s - k * s * c**r * (r**2 + 3 * r + 2) * np.cos(r * lam)
    return {"u": u, "v": v, "psi": psi, "zeta": zeta}


def wind_dataset(u: np.ndarray, v: np.ndarray, lat: np.ndarray, lon: np.ndarray,
                 levels: np.ndarray | None = None) -> xr.Dataset:
    """A Dataset in the canonical form of flowpipe.ingest (optionally with levels)."""
    dims = ["latitude", "longitude"]
    coords = {
        "latitude": ("latitude", lat, {"units": "degrees_north", "standard_name": "latitude"}),
        "longitude": ("longitude", lon, {"units": "degrees_east", "standard_name": "longitude"}),
    }
    if levels is not None:
        dims = ["level", *dims]
        coords["level"] = ("level", levels, {"units": "hPa", "standard_name": "air_pressure"})
    ds = xr.Dataset(
        {"u": (dims, u, {"units": "m s-1", "standard_name": "eastward_wind"}),
         "v": (dims, v, {"units": "m s-1", "standard_name": "northward_wind"})},
        coords=coords,
    )
    ds.attrs["level_type"] = "pressure" if levels is not None else "none"
    return ds


def relative_max_error(result: np.ndarray, exact: np.ndarray) -> float:
    """max |(result - exact) - mean(result - exact)| / max |exact| (the mean removed)."""
    diff = np.asarray(result) - exact
    return float(np.max(np.abs(diff - diff.mean())) / np.max(np.abs(exact)))


def harmonic(degree: int, order: int, coefficient: complex, phi: np.ndarray,
             lam: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Re(c Y_l^m) and its eastward and northward derivatives on the unit sphere.

    From scipy.special.sph_harm_y (the reference library), whose ``diff_n=1``
    returns the derivatives in colatitude and longitude; eastward derivative
    ``(1/cos phi) d/dlambda``, northward ``d/dphi = -d/dtheta``.
    """
    from scipy.special import sph_harm_y

    theta = np.pi / 2 - phi
    y, dy = sph_harm_y(degree, order, theta, lam, diff_n=1)
    value = np.real(coefficient * y)
    east = np.real(coefficient * dy[..., 1]) / np.cos(phi)
    north = -np.real(coefficient * dy[..., 0])
    return value, east, north


#: Harmonic content of the field of :func:`potential_flow`: (l, m, coefficient).
CHI_TERMS = ((3, 2, 2.0e6 - 1.0e6j), (1, 0, 1.5e6), (6, 5, 0.8e6j))
PSI_TERMS = ((4, 1, 3.0e6 + 2.0e6j), (2, 0, -2.5e6))


def potential_flow(phi: np.ndarray, lam: np.ndarray, chi_terms=CHI_TERMS,
                   psi_terms=PSI_TERMS) -> dict[str, np.ndarray]:
    """Wind from chi and psi built of spherical harmonics (in m2 s-1, radius A).

    u = -(1/a) dpsi/dphi + (1/(a cos phi)) dchi/dlambda, v = (1/(a cos phi))
    dpsi/dlambda + (1/a) dchi/dphi; the Laplacian of Re(c Y_l^m) is
    -l(l+1)/a**2 Re(c Y_l^m) (textbook identity, e.g. Arfken, Weber & Harris
    2013, Mathematical Methods for Physicists, 7th ed., section 15.5).
    """
    out = {k: np.zeros_like(phi) for k in ("chi", "psi", "delta", "zeta", "u_div", "v_div",
                                          "u_rot", "v_rot")}
    for terms, potential, laplacian in ((chi_terms, "chi", "delta"), (psi_terms, "psi", "zeta")):
        for degree, order, coefficient in terms:
            value, east, north = harmonic(degree, order, coefficient, phi, lam)
            out[potential] += value
            out[laplacian] += -degree * (degree + 1) / A**2 * value
            if potential == "chi":
                out["u_div"] += east / A
                out["v_div"] += north / A
            else:
                out["u_rot"] += -north / A
                out["v_rot"] += east / A
    out["u"] = out["u_rot"] + out["u_div"]
    out["v"] = out["v_rot"] + out["v_div"]
    return out


def global_grid(spacing: float) -> tuple[np.ndarray, np.ndarray]:
    """Latitudes (both poles included) and longitudes of an equiangular global grid.

    ``spacing`` in degrees; 180 must be a whole multiple of it (common practice).
    """
    nlat = round(180.0 / spacing) + 1
    nlon = round(360.0 / spacing)
    return np.linspace(-90.0, 90.0, nlat), np.arange(nlon) * spacing


def solid_body_rotation(latitude: np.ndarray, longitude: np.ndarray, alpha: float
                        ) -> tuple[np.ndarray, np.ndarray]:
    """Test case 1 wind on a latitude-longitude grid (1-D coordinates in degrees)."""
    phi = np.radians(latitude)[:, None]
    lam = np.radians(longitude)[None, :]
    return case1(phi, lam, alpha)


def deformational_flow(latitude: np.ndarray, longitude: np.ndarray, t: float, period: float
                       ) -> tuple[np.ndarray, np.ndarray]:
    """The non-divergent deformational flow with solid-body translation at time ``t``.

    Nair & Lauritzen (2010), section 2, the non-divergent case with translation
    (their case 4; coefficients from memory): in the paper's units (``a = 1``,
    ``T = 5``) ``u = k sin^2(lambda') sin(2 theta) cos(pi t/T) + 2 pi cos(theta)/T``
    and ``v = k sin(2 lambda') cos(theta) cos(pi t/T)`` with ``lambda' = lambda -
    2 pi t/T`` and ``k = 2.4``; speeds scale by ``5 a / T``. The flow reverses at
    ``T/2`` and every parcel is back at its start at ``t = T`` (= ``period``, s).
    """
    scale = 5.0 * A / period  # one paper time unit is period / 5
    k = 2.4
    theta = np.radians(latitude)[:, None]
    lam = np.radians(longitude)[None, :] - 2 * np.pi * t / period
    reverse = np.cos(np.pi * t / period)
    u = k * np.sin(lam) ** 2 * np.sin(2 * theta) * reverse + 2 * np.pi * np.cos(theta) / 5.0
    v = k * np.sin(2 * lam) * np.cos(theta) * reverse
    return scale * u, scale * v


def series_dataset(latitude: np.ndarray, longitude: np.ndarray, seconds: np.ndarray, winds,
                   start: str = "2000-01-01T00:00:00") -> xr.Dataset:
    """A canonical 2-D wind time series whose slices are computed lazily, one per time.

    ``winds(latitude, longitude, t) -> (u, v)`` gives one time (``t`` in seconds from
    ``start``), so that long hourly series cost no memory until they are read.
    """
    shape = (latitude.size, longitude.size)

    def block(block_id=None):
        t = float(seconds[block_id[1]])
        return np.stack(winds(latitude, longitude, t))[:, None]

    data = dsa.map_blocks(block, dtype=np.float64,
                          chunks=((2,), (1,) * seconds.size, (shape[0],), (shape[1],)))
    times = np.datetime64(start, "ns") + np.round(seconds * 1e9).astype("timedelta64[ns]")
    coords = {
        "time": ("time", times),
        "latitude": ("latitude", latitude, {"units": "degrees_north",
                                            "standard_name": "latitude"}),
        "longitude": ("longitude", longitude, {"units": "degrees_east",
                                               "standard_name": "longitude"}),
    }
    dims = ("time", "latitude", "longitude")
    return xr.Dataset({
        "u": (dims, data[0], {"units": "m s-1", "standard_name": "eastward_wind"}),
        "v": (dims, data[1], {"units": "m s-1", "standard_name": "northward_wind"}),
    }, coords=coords, attrs={"level_type": "none"})
