"""Points on the sphere: unit vectors, local east/north bases, great-circle distances."""

from __future__ import annotations

import numpy as np

from ._kernels import unit_vectors_into


def unit_vectors(latitude: np.ndarray, longitude: np.ndarray) -> np.ndarray:
    """Unit position vectors of points given in degrees, shape ``(..., 3)``.

    Parameters
    ----------
    latitude, longitude : array_like
        Degrees north and east.

    Returns
    -------
    numpy.ndarray
        ``(cos(lat) cos(lon), cos(lat) sin(lon), sin(lat))``.

    References
    ----------
    Spherical to Cartesian coordinates (common practice).
    """
    lat, lon = np.broadcast_arrays(np.asarray(latitude, dtype=np.float64),
                                   np.asarray(longitude, dtype=np.float64))
    out = np.empty(lat.shape + (3,))
    # (compiled, in parallel: numpy's cosine and sine are slow for float64 here)
    unit_vectors_into(np.ravel(lat), np.ravel(lon), out.reshape(-1, 3))
    return out


def latitude_longitude(vectors: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Latitudes and longitudes (degrees, longitudes in (-180, 180]) of unit vectors.

    Parameters
    ----------
    vectors : numpy.ndarray, shape (..., 3)

    Returns
    -------
    latitude, longitude : numpy.ndarray

    References
    ----------
    Cartesian to spherical coordinates (common practice).
    """
    x, y, z = vectors[..., 0], vectors[..., 1], vectors[..., 2]
    lat = np.degrees(np.arctan2(z, np.sqrt(x * x + y * y)))  # (hypot: slower, no gain here)
    lon = np.degrees(np.arctan2(y, x))
    return lat, lon


def cartesian_wind(u: np.ndarray, v: np.ndarray, latitude: np.ndarray,
                   longitude: np.ndarray) -> np.ndarray:
    """Cartesian components of the horizontal wind, shape ``u.shape + (3,)``.

    Parameters
    ----------
    u, v : numpy.ndarray, shape (..., nlat, nlon)
        Eastward and northward wind.
    latitude, longitude : numpy.ndarray
        1-D grid coordinates in degrees.

    Returns
    -------
    numpy.ndarray
        ``u e_east + v e_north`` with ``e_east = (-sin lon, cos lon, 0)`` and
        ``e_north = (-sin lat cos lon, -sin lat sin lon, cos lat)``.

    References
    ----------
    Local east and north unit vectors of the sphere, e.g. Williamson et al.
    (1992), J. Comput. Phys. 102, 211-224, section 2 (Cartesian form of the
    advecting wind of test case 1).
    """
    phi = np.radians(latitude)[:, None]
    lam = np.radians(longitude)[None, :]
    sphi, cphi, slam, clam = np.sin(phi), np.cos(phi), np.sin(lam), np.cos(lam)
    return np.stack([-u * slam - v * sphi * clam, u * clam - v * sphi * slam, v * cphi], axis=-1)


def great_circle_distance(lat1, lon1, lat2, lon2, radius: float) -> np.ndarray:
    """Great-circle distance between points given in degrees (NaN propagates).

    Parameters
    ----------
    lat1, lon1, lat2, lon2 : array_like
        Degrees.
    radius : float
        Sphere radius; the result has its units.

    Returns
    -------
    numpy.ndarray

    References
    ----------
    Vincenty (1975), "Direct and inverse solutions of geodesics on the
    ellipsoid with application of nested equations", Survey Review 23,
    88-93, the special case of a sphere: the atan2 form accurate at every
    distance.
    """
    a = unit_vectors(lat1, lon1)
    b = unit_vectors(lat2, lon2)
    cross = np.linalg.norm(np.cross(a, b), axis=-1)
    dot = np.sum(a * b, axis=-1)
    return radius * np.arctan2(cross, dot)


def destination(latitude: float, longitude: float, bearing: np.ndarray, angle: float
                ) -> tuple[np.ndarray, np.ndarray]:
    """Points at a great-circle ``angle`` (radians) from a centre along ``bearing`` (radians).

    Parameters
    ----------
    latitude, longitude : float
        The centre in degrees.
    bearing : numpy.ndarray
        Initial bearings, clockwise from north, in radians.
    angle : float
        Angular distance in radians.

    Returns
    -------
    latitude, longitude : numpy.ndarray
        Degrees.

    References
    ----------
    The direct problem on the sphere: Snyder (1987), Map Projections - A
    Working Manual, USGS Professional Paper 1395, eqs. 5-5 and 5-5a.
    """
    phi1 = np.radians(latitude)
    lam1 = np.radians(longitude)
    phi2 = np.arcsin(np.sin(phi1) * np.cos(angle) + np.cos(phi1) * np.sin(angle) * np.cos(bearing))
    lam2 = lam1 + np.arctan2(np.sin(bearing) * np.sin(angle) * np.cos(phi1),
                             np.cos(angle) - np.sin(phi1) * np.sin(phi2))
    return np.degrees(phi2), np.degrees(lam2)
