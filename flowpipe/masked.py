"""Masked complete global levels: harmonic fill, spectral split, explicit remainder.

A complete global grid whose wind is missing at some points (below the
ground, say) is decomposed by spherical harmonics after the missing points are
filled by discrete Laplace interpolation (:func:`harmonic_fill`); every output
is masked again at those points (:func:`masked_helmholtz_slab`). The filled
wind has kinks at the edge of the mask, so it is not band-limited and the
rotational and divergent winds alone give it back only to about 1e-2 next to
the mask; what they leave at the valid points is returned as the unresolved
wind, so that rotational + divergent + unresolved = wind there to rounding,
and its energy share is the quality figure of the route.

Measured alternative (1 degree, orography-like mask of 9 % of the points,
``benchmarks/bench_masked.py`` wind): the least-squares fit of the spectral
psi/chi coefficients to the wind at the valid points only, by conjugate
gradients on spin-1 synthesis, mask and ``adjoint_synthesis_2d`` (started from
the fill, spectral-diagonal preconditioner, Tikhonov weight 1e-6 on
``l(l+1)``), lowers the largest misfit from 1.0e-2 only to 4.8e-4 after 25
iterations (about 9x the transform floor on top) and to 5.7e-5 after 300 (90x):
the modes concentrated next to the mask converge slowly, so the fit cannot
reach 1e-6 at a cost near the floor, and this module does not iterate.
:func:`flowpipe.decompose.decompose` takes this route with ``method="auto"``
on complete global grids with missing points.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

#: How the route treats missing points, for the output attributes.
MASKED_POINTS = ("missing points of u or v (if any) filled by harmonic (Laplace) "
                 "interpolation before the spherical-harmonic transforms, then set missing "
                 "again in every output; u_unresolved, v_unresolved carry what the band-limited "
                 "rotational and divergent winds leave of the wind at the valid points, so that "
                 "u_rotational + u_divergent + u_unresolved = u there; the figures count the "
                 "valid points only")
#: The outputs of :func:`masked_helmholtz_slab` besides those of the spectral kernel.
UNRESOLVED_VARIABLES = ("u_unresolved", "v_unresolved")


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
        Float64 copies with the missing points replaced by the solution of
        the five-point Laplace equation (east-west links weighted
        ``1/cos**2`` of the latitude, as the spherical Laplacian), valid
        points unchanged; the input arrays themselves when no point is
        missing.
    mask : numpy.ndarray or None
        Boolean, True where the input was missing; None when no point is.

    Notes
    -----
    A NaN anywhere makes the sum of ``u`` and ``v`` NaN, so a complete slab,
    as most are, costs two sums (0.6 ms a 0.25 degree slab) and no copy: the
    point-wise mask and two filled copies cost 5 ms and two fresh 8 MB arrays.

    References
    ----------
    Harmonic (Laplace) interpolation of missing grid values by a sparse solve
    on the missing points only (common practice; e.g. Press et al. 2007,
    "Numerical Recipes", 3rd ed., section 3.8, "Laplace interpolation").
    """
    if np.isfinite(np.sum(u) + np.sum(v)):
        return u, v, None
    mask = np.isnan(u) | np.isnan(v)
    if not mask.any():  # infinite values, or sums that overflow: left to the transforms
        return u, v, None
    # imported here, for the slabs with missing points only: scipy's sparse solvers took
    # 0.1 s of every command's start
    import scipy.sparse as sp
    import scipy.sparse.linalg as spla

    nlat, nlon = u.shape
    uf = np.where(mask, 0.0, np.asarray(u, dtype=np.float64))
    vf = np.where(mask, 0.0, np.asarray(v, dtype=np.float64))
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


def input_rounding(u: np.ndarray, v: np.ndarray) -> float:
    """The size below which a remainder of the wind is the input's own rounding: the machine
    epsilon of the input's floating-point type (twice its unit roundoff) times the slab's
    largest wind component.

    Parameters
    ----------
    u, v : numpy.ndarray
        The slab's wind as stored (float32 or float64; NaN where missing).

    Returns
    -------
    float
        In the wind's units.

    Notes
    -----
    A float32 wind is stored with relative errors up to 2**-24, so band-limited parts
    cannot match it closer than that: a remainder within this bound is noise of the
    storage, not wind the transforms missed, and it does not compress (written, two such
    fields made the default output of benchmarks/bench_throughput.py larger and slower).

    References
    ----------
    IEEE 754-2019, binary32 and binary64 (unit roundoff 2**-24 and 2**-53).
    """
    dtype = np.result_type(u, v)
    # the largest magnitude from the extremes: no absolute values made (a fresh array each)
    largest = max(max(float(np.nanmax(x, initial=0.0)), -float(np.nanmin(x, initial=0.0)))
                  for x in (u, v))
    return float(np.finfo(dtype if dtype.kind == "f" else np.float64).eps) * largest


def _zero_within(bound: float, *arrays: np.ndarray) -> None:
    """Set the values within ``bound`` of zero to zero, in place (NaN stays NaN).

    Two comparisons into one boolean mask and a masked copy: half the time of indexing
    with ``abs(x) <= bound``, which makes a float temporary and an indexed assignment
    (4.3 against 8.2 ms a 0.25 degree field, measured here).
    """
    for x in arrays:
        small = x <= bound
        small &= x >= -bound
        np.copyto(x, 0.0, where=small)


def masked_helmholtz_slab(
    u: np.ndarray, v: np.ndarray, *, spectral_kernel: Callable[..., tuple], latitude: np.ndarray,
    weights: np.ndarray, **kwargs,
) -> tuple[np.ndarray, ...]:
    """Helmholtz decomposition of one global slab with missing points.

    Parameters
    ----------
    u, v : numpy.ndarray
        Eastward and northward wind, shape ``(nlat, nlon)``, latitudes
        ascending, any floating-point type; NaN where missing.
    spectral_kernel : callable
        The spectral kernel of a complete slab,
        :func:`flowpipe.decompose.helmholtz_slab` (passed in, so that this
        lower module does not import the stage), called with ``sums=False``: the
        residual is formed here.
    latitude : numpy.ndarray
        Row latitudes in degrees (ascending).
    weights : numpy.ndarray
        Quadrature weight of each row, for the figures.
    **kwargs
        Further arguments of ``spectral_kernel`` (geometry, truncation, radius,
        nthreads).

    Returns
    -------
    tuple of numpy.ndarray
        The eight fields of ``spectral_kernel``, then ``u_unresolved`` and
        ``v_unresolved`` (the wind minus the rotational and divergent winds:
        on a complete slab what the band-limited transforms do not carry,
        rounding on a band-limited wind), all NaN where ``u`` or ``v`` is
        missing; then three area-weighted sums over the valid points: of the
        squared residual ``|rotational + divergent + unresolved - (u, v)|**2``
        (rounding level on a slab with missing points, zero on a complete
        one, whose remainder is that difference itself), of
        ``|unresolved|**2`` and of ``|(u, v)|**2``. Without missing points
        the eight fields are those of ``spectral_kernel`` itself.

    References
    ----------
    Laplace interpolation of the missing points (:func:`harmonic_fill`;
    Press et al. 2007, "Numerical Recipes", 3rd ed., section 3.8), then the
    spectral decomposition of Swarztrauber (1981), SIAM J. Numer. Anal. 18,
    191-210.
    """
    uf, vf, mask = harmonic_fill(u, v, latitude)
    out = spectral_kernel(uf, vf, weights=weights, sums=False, **kwargs)
    rounding = input_rounding(u, v)
    if mask is None:
        # A complete slab, as most are: the spectral result as it is (masking the eight
        # fields and summing the residual again cost 0.16 s a 0.25 degree slab, about the
        # transforms' own time: benchmarks/bench_throughput.py), and the remainder the
        # band-limited winds leave, so that the sum holds on every level of the file. The
        # sum of its squares is the residual's: what is kept of it, and the rest (the
        # input's rounding, set to zero), split it exactly.
        squares = "ij,ij->i"
        u_rest = np.subtract(u, out[4], dtype=np.float64)
        u_rest -= out[6]
        v_rest = np.subtract(v, out[5], dtype=np.float64)
        v_rest -= out[7]
        residual = weights @ (np.einsum(squares, u_rest, u_rest)
                              + np.einsum(squares, v_rest, v_rest))
        _zero_within(rounding, u_rest, v_rest)
        kept = weights @ (np.einsum(squares, u_rest, u_rest)
                          + np.einsum(squares, v_rest, v_rest))
        norm = weights @ (np.einsum(squares, u, u, dtype=np.float64)
                          + np.einsum(squares, v, v, dtype=np.float64))
        return (*out, u_rest, v_rest, max(residual - kept, 0.0), kept, norm)
    u = np.asarray(u, dtype=np.float64)
    v = np.asarray(v, dtype=np.float64)
    fields = tuple(np.where(mask, np.nan, f) for f in out)
    u_rest = np.where(mask, np.nan, u - fields[4] - fields[6])
    v_rest = np.where(mask, np.nan, v - fields[5] - fields[7])
    _zero_within(rounding, u_rest, v_rest)
    valid = ~mask

    def area_sum(x: np.ndarray) -> float:
        return weights @ np.where(valid, x, 0.0).sum(axis=1)

    residual = (fields[4] + fields[6] + u_rest - u) ** 2 \
        + (fields[5] + fields[7] + v_rest - v) ** 2
    return fields + (u_rest, v_rest, area_sum(residual), area_sum(u_rest**2 + v_rest**2),
                     area_sum(u**2 + v**2))
