"""The decomposition stage: Helmholtz split of a canonical wind Dataset.

:func:`decompose` picks the engine (spherical harmonics on complete global
grids, the limited-area solvers of :mod:`flowpipe.regional` otherwise) and
wraps the per-slab NumPy kernel once with :func:`xarray.apply_ufunc`, so the
result stays lazy and every dask task transforms whole latitude-longitude
slabs.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import xarray as xr

from . import spectral
from .annotate import global_attrs, quality_summary, variable_attrs
from .choices import METHODS, SPECTRAL_VARIABLES, UNRESOLVED_VARIABLES
from .constants import EARTH_RADIUS
from .errors import UsageError
from .grid import GridInfo, describe_grid
from .ingest import with_input_precision
from .masked import MASKED_POINTS, masked_helmholtz_slab
from .slabs import (
    HORIZONTAL,
    SPECTRAL_REFERENCES,
    apply_slab_kernel,
    canonical_order,
    label_coordinates,
    missing_points,
    select_levels,
    spectral_plan,
)

#: What the streamfunction and velocity potential are defined up to, and our choice.
POTENTIAL_CONSTANT = ("defined up to an additive constant; the constant is chosen so that the "
                      "global area-weighted mean is zero")


def decompose(
    wind: xr.Dataset,
    method: str = "auto",
    truncation: int | None = None,
    levels: Sequence[float] | None = None,
    scheme: str = "variational",
    **regional_options,
) -> xr.Dataset:
    """Split a wind into its rotational and divergent parts.

    Parameters
    ----------
    wind : xarray.Dataset
        A canonical wind Dataset (:func:`flowpipe.open_wind`); latitudes may
        also run north to south, the result then does too.
    method : {"auto", "spectral", "regional"}
        ``"spectral"``: spherical harmonics, for complete global grids
        without missing values. ``"regional"``: the limited-area solvers of
        :mod:`flowpipe.regional`. ``"auto"``: spectral on complete global
        grids, regional otherwise. On a complete global grid whose u or v
        has missing points (below the ground, say), the spectral method
        fills those by harmonic (Laplace) interpolation before the
        transforms, sets them missing again in every output and adds
        ``u_unresolved``, ``v_unresolved``: what the rotational and divergent
        winds leave of the wind at the valid points (about 1e-2 of it next
        to the mask), with its share ``unresolved_fraction`` (attribute
        ``masked_points``; :mod:`flowpipe.masked`). ``"auto"`` looks for
        missing points in a wind held in memory; a lazy (dask) wind is not
        read while the result is built, so ``"auto"`` and ``"spectral"`` take
        the masked route, which finds the missing points inside each slab
        task (``u_unresolved``, ``v_unresolved`` are zero on complete slabs).
    truncation : int, optional
        Triangular truncation ``N`` of the spectral method; the default is
        the largest the grid resolves (:func:`flowpipe.spectral.max_truncation`).
    levels : sequence of float, optional
        Only these levels (in the units of the ``level`` coordinate).
    scheme : str
        Limited-area scheme, passed to :mod:`flowpipe.regional`.
    **regional_options
        Further options of the limited-area solvers.

    Returns
    -------
    xarray.Dataset
        ``streamfunction``, ``velocity_potential``, ``vorticity``,
        ``divergence``, ``u_rotational``, ``v_rotational``, ``u_divergent``,
        ``v_divergent`` with CF attributes; spectral results also carry the
        quality figure ``reconstruction_error`` per slab (a data variable).
        When the figures are known (input in memory) the largest of them is
        also the attribute ``reconstruction_error``; for a lazy result
        :func:`flowpipe.write` adds that attribute in the same pass as the data
        (:func:`flowpipe.annotate.quality_summary`). Attributes hold no dask
        arrays, so ``to_netcdf`` and ``to_zarr`` of xarray write the result
        as it is. Building the result reads nothing but coordinates and
        attributes.

    Raises
    ------
    flowpipe.errors.InputError
        For grids or data the chosen method cannot use.
    flowpipe.errors.UsageError
        For options out of range.

    References
    ----------
    Helmholtz decomposition with vector spherical harmonics: Swarztrauber
    (1981), "The approximation of vector functions and their derivatives on
    the sphere", SIAM J. Numer. Anal. 18, 191-210. Missing points of a
    global grid: Laplace interpolation (Press et al. 2007, "Numerical
    Recipes", 3rd ed., section 3.8).
    """
    if method not in METHODS:
        raise UsageError(f"method {method!r} is not one of {', '.join(METHODS)}")
    wind, descending = canonical_order(select_levels(wind, levels))
    grid = describe_grid(wind)
    # auto on a complete global grid with missing points takes the masked spectral route
    # (flowpipe.masked), which measured 3x the transform floor against 245x for the regional
    # solver at 1 degree (benchmarks/bench_masked.py). A wind in memory is looked at here (no
    # read); a lazy one is not read while the graph is built, so it takes the masked route,
    # which finds the missing points inside each slab task (u_unresolved, v_unresolved are
    # zero on complete slabs). Asked for spectral: the masked route likewise.
    lazy = wind["u"].chunks is not None or wind["v"].chunks is not None
    if method == "auto":
        method = "spectral" if grid.spectral else "regional"
        masked = grid.spectral and (lazy or missing_points(wind) > 0)
    else:
        masked = method == "spectral" and grid.spectral
    if method == "regional":
        if truncation is not None:
            raise UsageError("truncation applies to the spectral method only; the grid is "
                             "decomposed with the regional method: drop --truncation")
        from .regional import decompose_regional

        parts = decompose_regional(wind, scheme=scheme, periodic=grid.periodic,
                                   **regional_options)
    else:
        if regional_options:
            raise UsageError(f"options {', '.join(sorted(regional_options))} apply to the "
                             "regional method only; drop them or use --method regional")
        parts = _decompose_spectral(wind, grid, truncation, masked)
    parts = with_input_precision(parts, wind)
    return parts.isel(latitude=slice(None, None, -1)) if descending else parts


def helmholtz_slab(
    u: np.ndarray, v: np.ndarray, *, geometry: str, truncation: int, radius: float,
    weights: np.ndarray, nthreads: int = 1, sums: bool = True,
) -> tuple[np.ndarray, ...]:
    """Helmholtz decomposition of one global slab.

    Parameters
    ----------
    u, v : numpy.ndarray
        Eastward and northward wind, shape ``(nlat, nlon)``, latitudes
        ascending, any floating-point type (computed in float64).
    geometry : {"CC", "F1", "GL"}
        ducc0 ring geometry.
    truncation : int
        Triangular truncation ``N``.
    radius : float
        Radius of the sphere in m.
    weights : numpy.ndarray
        Quadrature weight of each row (ascending), for the error norms.
    nthreads : int
        Threads ducc0 may use.
    sums : bool
        Whether to add the two area sums below (a caller that forms the residual itself
        does without them).

    Returns
    -------
    tuple of numpy.ndarray
        ``psi, chi, zeta, delta, u_rot, v_rot, u_div, v_div`` on the grid,
        then (with ``sums``) the area-weighted sums of the squared reconstruction
        residual ``|(u_rot + u_div, v_rot + v_div) - (u, v)|**2`` and of ``|(u, v)|**2``.

    References
    ----------
    One spin-1 analysis, two spin-1 and four scalar syntheses: Swarztrauber
    (1981), SIAM J. Numer. Anal. 18, 191-210; Reinecke & Seljebotn (2013),
    "Libsharp - spherical harmonic transforms revisited", Astron. Astrophys.
    554, A112.
    """
    nlat, nlon = u.shape
    grid = {"geometry": geometry, "nlat": nlat, "nlon": nlon, "truncation": truncation,
            "nthreads": nthreads}
    eb = spectral.wind_coefficients(u, v, geometry, truncation, nthreads)
    u_rot, v_rot = spectral.rotational_wind(eb[1], **grid)
    u_div, v_div = spectral.divergent_wind(eb[0], **grid)
    psi_lm, chi_lm = spectral.potentials(eb, truncation, radius)
    del eb  # only the outputs stay alive to the end: fresh memory costs page faults
    psi = spectral.scalar_synthesis(psi_lm, **grid)
    chi = spectral.scalar_synthesis(chi_lm, **grid)
    zeta = spectral.scalar_synthesis(spectral.laplacian(psi_lm, truncation, radius), **grid)
    delta = spectral.scalar_synthesis(spectral.laplacian(chi_lm, truncation, radius), **grid)
    del psi_lm, chi_lm
    fields = (psi, chi, zeta, delta, u_rot, v_rot, u_div, v_div)
    return (*fields, *_residual_sums(u, v, fields[4:], weights)) if sums else fields


#: Rows of the residual per block in :func:`_residual_sums` (a 0.25 degree block fits in L2).
RESIDUAL_ROWS = 64


def _residual_sums(u: np.ndarray, v: np.ndarray, winds: tuple[np.ndarray, ...],
                   weights: np.ndarray) -> tuple[np.float64, np.float64]:
    """Area sums of the squared reconstruction residual and of ``|(u, v)|**2``, in float64.

    ``winds`` are ``u_rot, v_rot, u_div, v_div``. The residual is formed in
    place in one buffer of :data:`RESIDUAL_ROWS` rows and its row sums of
    squares taken by :func:`numpy.einsum`, instead of a new whole array for
    every operation. Measured on a 0.25 degree slab: 4.4 ms against 13.6 ms,
    and no fresh 8 MB array (nine before, 2048 page faults each when the
    allocator cannot reuse memory).
    """
    u_rot, v_rot, u_div, v_div = winds
    squares = "ij,ij->i"
    nlat = u.shape[0]
    block = np.empty((min(RESIDUAL_ROWS, nlat), u.shape[1]))
    residual = np.empty(nlat)
    for start in range(0, nlat, RESIDUAL_ROWS):
        rows = slice(start, min(start + RESIDUAL_ROWS, nlat))
        rest = block[: rows.stop - start]
        np.add(u_rot[rows], u_div[rows], out=rest)
        rest -= u[rows]
        residual[rows] = np.einsum(squares, rest, rest)
        np.add(v_rot[rows], v_div[rows], out=rest)
        rest -= v[rows]
        residual[rows] += np.einsum(squares, rest, rest)
    norm = np.einsum(squares, u, u, dtype=np.float64) + np.einsum(squares, v, v, dtype=np.float64)
    return weights @ residual, weights @ norm


def _decompose_spectral(
    wind: xr.Dataset, grid: GridInfo, truncation: int | None, masked: bool
) -> xr.Dataset:
    geometry, n = spectral_plan(grid, truncation)
    kernel, extra, names, sums = helmholtz_slab, {}, SPECTRAL_VARIABLES, 2
    if masked:
        kernel = masked_helmholtz_slab
        extra = {"spectral_kernel": helmholtz_slab, "latitude": grid.latitude}
        names, sums = SPECTRAL_VARIABLES + UNRESOLVED_VARIABLES, 3
    outputs = apply_slab_kernel(
        kernel, wind, [HORIZONTAL] * len(names) + [[]] * sums,
        geometry=geometry, truncation=n, radius=EARTH_RADIUS, weights=grid.ring_weights(),
        **extra,
    )
    fields = dict(zip(names, outputs[:-sums], strict=True))
    residual, norm = outputs[-sums], outputs[-1]
    parts = xr.Dataset({name: da.assign_attrs(variable_attrs(name)) for name, da in fields.items()})
    for name in ("streamfunction", "velocity_potential"):
        parts[name].attrs["comment"] = POTENTIAL_CONSTANT
    parts["reconstruction_error"] = np.sqrt(residual / norm).assign_attrs(
        units="1", long_name="relative reconstruction error of the wind, "
        "|(u_rotational + u_divergent, v_rotational + v_divergent) - (u, v)| / |(u, v)|, "
        "area-weighted 2-norm over each latitude-longitude slab"
        + (" (with u_unresolved, v_unresolved added; valid points only)" if masked else ""))
    if masked:
        unresolved = outputs[-2]
        parts["unresolved_fraction"] = np.sqrt(unresolved / norm).assign_attrs(
            units="1", long_name="|(u_unresolved, v_unresolved)| / |(u, v)|, area-weighted "
            "2-norm over the valid points of each latitude-longitude slab")
    parts = label_coordinates(parts)
    parts.attrs = global_attrs(
        wind, title="Helmholtz decomposition of the wind",
        summary="Streamfunction, velocity potential, relative vorticity, divergence and the "
        "rotational and divergent winds, by spherical-harmonic transforms of the wind.",
        references=SPECTRAL_REFERENCES)
    parts.attrs.update(
        method="spectral", truncation=f"T{n} (triangular)", truncation_N=n,
        ducc0_geometry=geometry, earth_radius=EARTH_RADIUS,
        streamfunction_velocity_potential_constant=POTENTIAL_CONSTANT,
        pole_rows="each pole row replaced by the least-squares fit of a single vector"
        if geometry == "CC" else "none (no rows on the poles)",
    )
    if masked:
        parts.attrs["masked_points"] = MASKED_POINTS
    if parts["reconstruction_error"].chunks is None:  # known already: the global figures
        parts.attrs.update(quality_summary(parts))
    return parts
