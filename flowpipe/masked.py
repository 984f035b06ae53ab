"""Masked complete global levels: harmonic fill of the missing points.

A complete global grid whose wind is missing at some points (below the
ground, say) is decomposed by spherical harmonics after the missing points are
filled by discrete Laplace interpolation (:func:`harmonic_fill`); every output
is masked again at those points (:func:`masked_helmholtz_slab`).
:func:`flowpipe.decompose.decompose` takes this route with ``method="auto"``.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

#: How the route treats missing points, for the output attributes.
MASKED_POINTS = ("missing points of u or v (if any) filled by harmonic (Laplace) "
                 "interpolation before the transforms, then set missing again in every output; "
                 "the reconstruction error is taken over the valid points only")


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


def masked_helmholtz_slab(
    u: np.ndarray, v: np.ndarray, *, spectral_kernel: Callable[..., tuple], latitude: np.ndarray,
    weights: np.ndarray, **kwargs,
) -> tuple[np.ndarray, ...]:
    """Helmholtz decomposition of one global slab with missing points.

    Parameters
    ----------
    u, v : numpy.ndarray
        Eastward and northward wind, shape ``(nlat, nlon)``, latitudes
        ascending; NaN where missing.
    spectral_kernel : callable
        The spectral kernel of a complete slab,
        :func:`flowpipe.decompose.helmholtz_slab` (passed in, so that this
        lower module does not import the stage).
    latitude : numpy.ndarray
        Row latitudes in degrees (ascending).
    weights : numpy.ndarray
        Quadrature weight of each row, for the error norms.
    **kwargs
        Further arguments of ``spectral_kernel`` (geometry, truncation, radius,
        nthreads).

    Returns
    -------
    tuple of numpy.ndarray
        As ``spectral_kernel``: the eight fields, NaN
        where ``u`` or ``v`` is missing, then the area-weighted sums of the
        squared reconstruction residual and of ``|(u, v)|**2`` over the valid
        points only. Without missing points the result is that of
        ``spectral_kernel`` itself.

    References
    ----------
    Laplace interpolation of the missing points (:func:`harmonic_fill`;
    Press et al. 2007, "Numerical Recipes", 3rd ed., section 3.8), then the
    spectral decomposition of Swarztrauber (1981), SIAM J. Numer. Anal. 18,
    191-210.
    """
    u = np.asarray(u, dtype=np.float64)
    v = np.asarray(v, dtype=np.float64)
    uf, vf, mask = harmonic_fill(u, v, latitude)
    out = spectral_kernel(uf, vf, weights=weights, **kwargs)
    if not mask.any():
        return out
    fields = tuple(np.where(mask, np.nan, f) for f in out[:8])
    valid = ~mask
    residual = np.where(valid, (fields[4] + fields[6] - u) ** 2 + (fields[5] + fields[7] - v) ** 2,
                        0.0)
    norm = np.where(valid, u**2 + v**2, 0.0)
    return fields + (weights @ residual.sum(axis=1), weights @ norm.sum(axis=1))
