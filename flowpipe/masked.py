"""Masked complete global levels: harmonic fill of the missing points (work in progress).

Not yet wired into :func:`flowpipe.decompose.decompose`; see the branch report.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla


def harmonic_fill(u: np.ndarray, v: np.ndarray, latitude: np.ndarray
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Fill the missing points of a global wind by discrete Laplace interpolation.

    Parameters
    ----------
    u, v : numpy.ndarray
        Shape ``(nlat, nlon)``, longitudes periodic; NaN where missing.
    latitude : numpy.ndarray
        Row latitudes in degrees.

    Returns
    -------
    u, v : numpy.ndarray
        Copies with the missing points replaced by the solution of the
        five-point Laplace equation (east-west links weighted ``1/cos**2``
        of the latitude, as the spherical Laplacian), valid points unchanged.
    mask : numpy.ndarray
        Boolean, True where the input was missing.

    References
    ----------
    Harmonic (Laplace) interpolation of missing grid values by a sparse solve
    on the missing points only (common practice; e.g. Press et al. 2007,
    "Numerical Recipes", 3rd ed., section 3.8, "Laplace interpolation").
    """
    mask = np.isnan(u) | np.isnan(v)
    nlat, nlon = u.shape
    uf, vf = np.where(mask, 0.0, u), np.where(mask, 0.0, v)
    if not mask.any():
        return uf, vf, mask
    idx = np.flatnonzero(mask.ravel())
    where = -np.ones(nlat * nlon, dtype=np.int64)
    where[idx] = np.arange(idx.size)
    i, j = np.divmod(idx, nlon)
    cos = np.maximum(np.cos(np.radians(latitude)), np.cos(np.radians(89.9)))
    rows, cols, vals = [], [], []
    diag = np.zeros(idx.size)
    rhs = np.zeros((idx.size, 2))
    links = [(i, (j + 1) % nlon, 1.0 / cos[i] ** 2), (i, (j - 1) % nlon, 1.0 / cos[i] ** 2)]
    for di in (1, -1):
        inside = (i + di >= 0) & (i + di < nlat)
        links.append((np.where(inside, i + di, i), j, inside.astype(float)))
    for ni, nj, w in links:
        diag += w
        flat = ni * nlon + nj
        unknown = where[flat] >= 0
        rows.append(np.arange(idx.size)[unknown])
        cols.append(where[flat][unknown])
        vals.append(-w[unknown])
        known = ~unknown
        rhs[known, 0] += w[known] * uf.ravel()[flat[known]]
        rhs[known, 1] += w[known] * vf.ravel()[flat[known]]
    matrix = sp.csc_matrix((np.concatenate(vals + [diag]),
                            (np.concatenate(rows + [np.arange(idx.size)]),
                             np.concatenate(cols + [np.arange(idx.size)]))),
                           shape=(idx.size, idx.size))
    solution = spla.splu(matrix).solve(rhs)
    uf.ravel()[idx] = solution[:, 0]
    vf.ravel()[idx] = solution[:, 1]
    return uf, vf, mask
