"""The decomposition stage: Helmholtz split of a canonical wind Dataset.

:func:`decompose` picks the engine (spherical harmonics on complete global
grids, the limited-area solvers of :mod:`flowpipe.regional` otherwise) and
wraps the per-slab NumPy kernel once with :func:`xarray.apply_ufunc`, so the
result stays lazy and every dask task transforms whole latitude-longitude
slabs.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Sequence
from functools import partial

import dask
import numpy as np
import xarray as xr

from . import spectral
from .annotate import figure, global_attrs, variable_attrs
from .constants import EARTH_RADIUS
from .errors import InputError, UsageError
from .grid import GridInfo, describe_grid
from .ingest import with_input_precision
from .masked import MASKED_POINTS, UNRESOLVED_VARIABLES, masked_helmholtz_slab

METHODS = ("auto", "spectral", "regional")
#: The contract variables of the spectral decomposition, in kernel output order.
SPECTRAL_VARIABLES = ("streamfunction", "velocity_potential", "vorticity", "divergence",
                      "u_rotational", "v_rotational", "u_divergent", "v_divergent")
HORIZONTAL = ["latitude", "longitude"]
#: What the streamfunction and velocity potential are defined up to, and our choice.
POTENTIAL_CONSTANT = ("defined up to an additive constant; the constant is chosen so that the "
                      "global area-weighted mean is zero")
SPECTRAL_REFERENCES = (
    "Swarztrauber (1981), The approximation of vector functions and their derivatives on the "
    "sphere, SIAM J. Numer. Anal. 18, 191-210; Reinecke, Belkner & Carron (2023), Improved "
    "cosmic microwave background (de-)lensing using general spherical harmonic transforms, "
    "Astron. Astrophys. 678, A165 (ducc0)"
)


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
        ``masked_points``; :mod:`flowpipe.masked`). ``"auto"`` counts the
        missing points up front (one read of u and v); ``"spectral"`` takes
        the masked route without counting.
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
        ``v_divergent`` with CF attributes; spectral results also carry
        ``reconstruction_error`` per slab and its global figure as the
        attribute ``reconstruction_error`` (a float for input in memory, a 0-d
        dask array for lazy input, which :func:`flowpipe.write` computes in the
        same pass as the data).

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
    # auto on a complete global grid counts the missing points once (the one up-front read):
    # with any, the masked spectral route (flowpipe.masked), which measured 3x the transform
    # floor against 245x for the regional solver at 1 degree (benchmarks/bench_masked.py).
    # Asked for spectral: the masked route, the missing points found inside each slab task.
    missing = missing_points(wind) if method == "auto" and grid.spectral else None
    if method == "auto":
        method = "spectral" if grid.spectral else "regional"
    masked = method == "spectral" and grid.spectral and missing != 0
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
        parts = _decompose_spectral(wind, grid, truncation, 0 if masked else missing, masked)
    parts = with_input_precision(parts, wind)
    return parts.isel(latitude=slice(None, None, -1)) if descending else parts


def select_levels(wind: xr.Dataset, levels: Sequence[float] | None) -> xr.Dataset:
    """The wind on the requested levels only (all levels when ``levels`` is None)."""
    if levels is None:
        return wind
    if "level" not in wind.dims:
        raise UsageError("levels were requested but the input has no vertical dimension; "
                         "drop --levels")
    available = wind["level"].values.astype(np.float64)
    index = []
    for level in levels:
        found = np.flatnonzero(np.abs(available - level) <= 1e-6 * max(1.0, abs(level)))
        if found.size == 0:
            listed = ", ".join(f"{x:g}" for x in available)
            raise InputError(f"level {level:g} is not in the input (levels: {listed}); "
                             "choose among these with --levels")
        index.append(int(found[0]))
    return wind.isel(level=index)


def canonical_order(wind: xr.Dataset) -> tuple[xr.Dataset, bool]:
    """The wind with ascending latitudes, and whether they were descending."""
    for name in ("u", "v"):
        if name not in wind:
            raise InputError(f"the Dataset has no variable {name!r}; open the input with "
                             "flowpipe.open_wind, which finds and names the wind")
    lat = wind["latitude"].values
    descending = lat.size > 1 and lat[0] > lat[-1]
    return (wind.isel(latitude=slice(None, None, -1)) if descending else wind), descending


def missing_points(wind: xr.Dataset) -> int:
    """Number of grid points where ``u`` or ``v`` is missing (computes)."""
    return int((wind["u"].isnull() | wind["v"].isnull()).sum())


def _missing_message(wind: xr.Dataset, count: int) -> str:
    mask = wind["u"].isnull() | wind["v"].isnull()
    lead = [d for d in mask.dims if d not in HORIZONTAL]
    where = mask.any(lead) if lead else mask
    lats = wind["latitude"].values[where.any("longitude").values]
    lons = wind["longitude"].values[where.any("latitude").values]
    slabs = int(mask.any(HORIZONTAL).sum()) if lead else 1
    total = int(np.prod([wind.sizes[d] for d in lead])) if lead else 1
    return (f"u/v have {count} missing points in {slabs} of {total} latitude-longitude slabs, "
            f"within latitudes {lats.min():g}..{lats.max():g} and longitudes "
            f"{lons.min():g}..{lons.max():g}; the spectral method needs complete fields: use "
            "--method regional (method='regional') or fill the gaps first")


def spectral_plan(
    wind: xr.Dataset, grid: GridInfo, truncation: int | None, missing: int | None = None
) -> tuple[str, int]:
    """Check that the spectral engine applies; return its geometry and truncation.

    Parameters
    ----------
    wind : xarray.Dataset
        Canonical wind with ascending latitudes.
    grid : GridInfo
        Its grid.
    truncation : int, optional
        Requested triangular truncation; default the largest allowed.
    missing : int, optional
        Number of missing points when already counted (:func:`missing_points`).

    Returns
    -------
    geometry : str
        ducc0 ring geometry.
    truncation : int
        Triangular truncation to use.

    References
    ----------
    Exactness limits of the transforms: :func:`flowpipe.spectral.max_truncation`.
    """
    if grid.geometry is None:
        spacing = f"{grid.latitudes} latitudes" if grid.kind == "global" else "limited-area"
        raise InputError(
            f"the {grid.nlat} x {grid.nlon} grid ({grid.kind}, {spacing}) is not a complete "
            "global equiangular or Gaussian grid, so spherical harmonics do not apply: use "
            "--method regional (method='regional')")
    count = missing_points(wind) if missing is None else missing
    if count:
        raise InputError(_missing_message(wind, count))
    largest = spectral.max_truncation(grid.geometry, grid.nlat, grid.nlon)
    if truncation is None:
        return grid.geometry, largest
    if isinstance(truncation, bool) or not isinstance(truncation, int | np.integer) \
            or not 1 <= truncation <= largest:
        raise UsageError(
            f"truncation {truncation!r} is out of range: the {grid.nlat} x {grid.nlon} "
            f"{spectral.GRID_WORDS[grid.geometry]} grid resolves triangular truncations 1..{largest}; "
            f"give N from 1 to {largest}")
    return grid.geometry, int(truncation)


def transform_threads(n_tasks: int) -> int:
    """Threads per ducc0 call so that threads x concurrent dask tasks <= cores.

    Parameters
    ----------
    n_tasks : int
        Number of slab tasks of the computation.

    Returns
    -------
    int
        ``max(1, cores // concurrent tasks)``, where the cores are those the
        process may use (or the dask config value ``flowpipe.cores``, the
        budget a batch run gives itself), and the concurrent tasks are
        at most the worker threads of the active dask scheduler (a
        distributed client, the synchronous scheduler or the local threads).

    References
    ----------
    Avoiding oversubscription when nesting thread pools (common practice).
    """
    cores = dask.config.get("flowpipe.cores", None) or len(os.sched_getaffinity(0))
    try:
        from distributed import get_client

        workers = sum(get_client().nthreads().values())
    except (ImportError, ValueError):
        if dask.config.get("scheduler", None) in ("sync", "synchronous", "single-threaded"):
            workers = 1
        else:
            workers = dask.config.get("num_workers", None) or cores
    return max(1, cores // max(1, min(workers, n_tasks)))


def over_slabs(slab_kernel: Callable[..., tuple], u: np.ndarray, v: np.ndarray,
               **kwargs) -> tuple[np.ndarray, ...]:
    """Apply a kernel of one ``(nlat, nlon)`` slab to every slab of a stack.

    Parameters
    ----------
    slab_kernel : callable
        ``slab_kernel(u2d, v2d, **kwargs)`` returning a tuple of arrays.
    u, v : numpy.ndarray
        Shape ``(..., nlat, nlon)``.
    **kwargs
        Passed to the kernel.

    Returns
    -------
    tuple of numpy.ndarray
        Each of shape ``u.shape[:-2] + output shape``.

    References
    ----------
    The generalised-ufunc loop over leading dimensions (NumPy Enhancement
    Proposal NEP 5, "Generalized universal functions"; common practice).
    """
    lead = u.shape[:-2]
    results: list[np.ndarray] = []
    for index in np.ndindex(lead):
        out = slab_kernel(u[index], v[index], **kwargs)
        if not results:
            results = [np.empty(lead + np.shape(o)) for o in out]
        for store, value in zip(results, out, strict=True):
            store[index] = value
    return tuple(results)


def apply_slab_kernel(
    slab_kernel: Callable[..., tuple], wind: xr.Dataset, core_dims: list[list[str]],
    sizes: dict[str, int] | None = None, **kwargs,
) -> tuple[xr.DataArray, ...]:
    """Wrap a slab kernel with :func:`xarray.apply_ufunc`, lazily over dask chunks.

    Parameters
    ----------
    slab_kernel : callable
        As for :func:`over_slabs`; it receives ``nthreads`` besides ``kwargs``.
    wind : xarray.Dataset
        Canonical wind; dask-backed data are rechunked to whole slabs.
    core_dims : list of list of str
        Core dimensions of each output.
    sizes : dict, optional
        Sizes of output dimensions that the input does not have.
    **kwargs
        Passed to the kernel.

    Returns
    -------
    tuple of xarray.DataArray

    References
    ----------
    :func:`xarray.apply_ufunc` with ``dask="parallelized"`` (Hoyer & Hamman
    2017, "xarray: N-D labeled arrays and datasets in Python", J. Open Res.
    Softw. 5, 10).
    """
    u, v = wind["u"], wind["v"]
    n_tasks = 1
    if u.chunks is not None:
        whole = dict.fromkeys(HORIZONTAL, -1)
        u, v = u.chunk(whole), v.chunk(whole)
        n_tasks = int(np.prod([len(c) for c in u.chunks[:-2]]))
    kernel = partial(over_slabs, slab_kernel, nthreads=transform_threads(n_tasks), **kwargs)
    outputs = xr.apply_ufunc(
        kernel, u, v, input_core_dims=[HORIZONTAL, HORIZONTAL], output_core_dims=core_dims,
        dask="parallelized", output_dtypes=[np.float64] * len(core_dims),
        dask_gufunc_kwargs={"output_sizes": sizes or {}}, keep_attrs=True,
    )
    for out in outputs:  # keep the coordinates' attributes, not those of u
        out.attrs = {}
    return outputs


def helmholtz_slab(
    u: np.ndarray, v: np.ndarray, *, geometry: str, truncation: int, radius: float,
    weights: np.ndarray, nthreads: int = 1,
) -> tuple[np.ndarray, ...]:
    """Helmholtz decomposition of one global slab.

    Parameters
    ----------
    u, v : numpy.ndarray
        Eastward and northward wind, shape ``(nlat, nlon)``, latitudes ascending.
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

    Returns
    -------
    tuple of numpy.ndarray
        ``psi, chi, zeta, delta, u_rot, v_rot, u_div, v_div`` on the grid,
        then the area-weighted sums of the squared reconstruction residual
        ``|(u_rot + u_div, v_rot + v_div) - (u, v)|**2`` and of ``|(u, v)|**2``.

    References
    ----------
    One spin-1 analysis, two spin-1 and four scalar syntheses: Swarztrauber
    (1981), SIAM J. Numer. Anal. 18, 191-210; Reinecke & Seljebotn (2013),
    "Libsharp - spherical harmonic transforms revisited", Astron. Astrophys.
    554, A112.
    """
    u = np.asarray(u, dtype=np.float64)
    v = np.asarray(v, dtype=np.float64)
    nlat, nlon = u.shape
    grid = {"geometry": geometry, "nlat": nlat, "nlon": nlon, "truncation": truncation,
            "nthreads": nthreads}
    psi_lm, chi_lm = spectral.vector_analysis(u, v, geometry, truncation, radius, nthreads)
    psi = spectral.scalar_synthesis(psi_lm, **grid)
    chi = spectral.scalar_synthesis(chi_lm, **grid)
    zeta = spectral.scalar_synthesis(spectral.laplacian(psi_lm, truncation, radius), **grid)
    delta = spectral.scalar_synthesis(spectral.laplacian(chi_lm, truncation, radius), **grid)
    east, north = spectral.gradient_synthesis(psi_lm, radius=radius, **grid)
    u_div, v_div = spectral.gradient_synthesis(chi_lm, radius=radius, **grid)
    u_rot, v_rot = -north, east
    residual = (u_rot + u_div - u) ** 2 + (v_rot + v_div - v) ** 2
    norm = u**2 + v**2
    return (psi, chi, zeta, delta, u_rot, v_rot, u_div, v_div,
            weights @ residual.sum(axis=1), weights @ norm.sum(axis=1))


def _decompose_spectral(
    wind: xr.Dataset, grid: GridInfo, truncation: int | None, missing: int | None,
    masked: bool = False,
) -> xr.Dataset:
    geometry, n = spectral_plan(wind, grid, truncation, missing)
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
        parts.attrs["unresolved_fraction"] = figure(np.sqrt(unresolved.sum() / norm.sum()))
    parts.attrs["reconstruction_error"] = figure(np.sqrt(residual.sum() / norm.sum()))
    return parts


def label_coordinates(ds: xr.Dataset) -> xr.Dataset:
    """The Dataset with a ``time`` coordinate that carries its standard name."""
    if "time" not in ds.coords:
        return ds
    return ds.assign_coords(time=ds["time"].copy().assign_attrs(standard_name="time"))
