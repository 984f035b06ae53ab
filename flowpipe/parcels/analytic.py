"""Winds of published advection test cases as canonical wind Datasets.

They check trajectories against exact answers: parcels in the solid-body
rotation of Williamson et al. (1992) return to their start after one
revolution, and parcels in the time-reversing deformational flow of Nair &
Lauritzen (2010) return to their start at ``t = T``. Time-dependent fields are
dask arrays computed one time slice at a time, so that long hourly series cost
no memory until they are read.
"""

from __future__ import annotations

import dask.array as dsa
import numpy as np
import xarray as xr

from ..constants import EARTH_RADIUS

#: Period of one revolution of test case 1, 12 days (Williamson et al. 1992, eq. 93 ff).
REVOLUTION_SECONDS = 12 * 86400.0


def global_grid(spacing: float) -> tuple[np.ndarray, np.ndarray]:
    """Latitudes (both poles included) and longitudes of an equiangular global grid.

    Parameters
    ----------
    spacing : float
        Degrees; 180 must be a whole multiple of it.

    Returns
    -------
    latitude, longitude : numpy.ndarray

    References
    ----------
    The equiangular grid with pole rows (common practice).
    """
    nlat = round(180.0 / spacing) + 1
    nlon = round(360.0 / spacing)
    return np.linspace(-90.0, 90.0, nlat), np.arange(nlon) * spacing


def solid_body_rotation(latitude: np.ndarray, longitude: np.ndarray, alpha: float
                        ) -> tuple[np.ndarray, np.ndarray]:
    """The advecting wind of test case 1, ``u, v`` on a latitude-longitude grid.

    Parameters
    ----------
    latitude, longitude : numpy.ndarray
        1-D grid coordinates in degrees.
    alpha : float
        Angle (radians) between the rotation axis and the polar axis.

    Returns
    -------
    u, v : numpy.ndarray, shape (nlat, nlon)
        m s-1, with ``u0 = 2 pi a / 12 days``.

    References
    ----------
    Williamson, Drake, Hack, Jakob & Swarztrauber (1992), "A standard test set
    for numerical approximations to the shallow water equations in spherical
    geometry", J. Comput. Phys. 102, 211-224, eqs. (75)-(76).
    """
    u0 = 2 * np.pi * EARTH_RADIUS / REVOLUTION_SECONDS
    phi = np.radians(latitude)[:, None]
    lam = np.radians(longitude)[None, :]
    u = u0 * (np.cos(phi) * np.cos(alpha) + np.sin(phi) * np.cos(lam) * np.sin(alpha))
    v = -u0 * np.sin(lam) * np.sin(alpha) * np.ones_like(phi)
    return u, v


def deformational_flow(latitude: np.ndarray, longitude: np.ndarray, t: float, period: float
                       ) -> tuple[np.ndarray, np.ndarray]:
    """The non-divergent deformational flow with solid-body translation at time ``t``.

    Parameters
    ----------
    latitude, longitude : numpy.ndarray
        1-D grid coordinates in degrees.
    t : float
        Seconds from the start.
    period : float
        ``T`` in seconds: the flow reverses at ``T/2`` and every parcel is back
        at its start at ``T``.

    Returns
    -------
    u, v : numpy.ndarray, shape (nlat, nlon)
        m s-1. In the units of the paper (``a = 1``, ``T = 5``) ``u = k
        sin^2(lambda') sin(2 theta) cos(pi t/T) + 2 pi cos(theta)/T`` and ``v =
        k sin(2 lambda') cos(theta) cos(pi t/T)`` with ``lambda' = lambda - 2 pi
        t/T`` and ``k = 2.4``; speeds scale by ``5 a / T``.

    References
    ----------
    Nair & Lauritzen (2010), "A class of deformational flow test cases for
    linear transport problems on the sphere", J. Comput. Phys. 229,
    8868-8887, section 2, the non-divergent case with translation (their
    case 4; coefficients from memory).
    """
    scale = 5.0 * EARTH_RADIUS / period  # one paper time unit is period / 5
    k = 2.4
    theta = np.radians(latitude)[:, None]
    lam = np.radians(longitude)[None, :] - 2 * np.pi * t / period
    reverse = np.cos(np.pi * t / period)
    u = k * np.sin(lam) ** 2 * np.sin(2 * theta) * reverse + 2 * np.pi * np.cos(theta) / 5.0
    v = k * np.sin(2 * lam) * np.cos(theta) * reverse
    return scale * u, scale * v


def wind_dataset(latitude: np.ndarray, longitude: np.ndarray, seconds: np.ndarray, winds,
                 start: str = "2000-01-01T00:00:00") -> xr.Dataset:
    """A canonical 2-D wind Dataset whose slices are computed lazily.

    Parameters
    ----------
    latitude, longitude : numpy.ndarray
        Grid coordinates in degrees (ascending; longitudes in [0, 360)).
    seconds : numpy.ndarray
        Times from ``start`` in seconds.
    winds : callable
        ``winds(latitude, longitude, t) -> (u, v)`` for one time.
    start : str
        ISO 8601 time of ``seconds = 0``.

    Returns
    -------
    xarray.Dataset
        ``u``, ``v`` on ``(time, latitude, longitude)``, one dask chunk per time.

    References
    ----------
    The canonical wind Dataset of :mod:`flowpipe.ingest`.
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
