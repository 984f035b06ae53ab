"""Shared by the spectral stages: one latitude-longitude slab per task.

The helpers that put a wind into the order every kernel expects (levels
chosen, latitudes ascending), check that spherical harmonics apply (the
spectral plan), and wrap a kernel of one ``(nlat, nlon)`` slab once with
:func:`xarray.apply_ufunc` so that the result stays lazy; with the thread
budget of the transforms. Used by :mod:`flowpipe.decompose` and
:mod:`flowpipe.kinematics`; imports no stage.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from functools import partial

import dask
import numpy as np
import xarray as xr

from . import spectral
from .choices import levels_hint
from .cluster import SYNCHRONOUS, cores, distributed_client, local_threads
from .errors import InputError, UsageError
from .grid import GridInfo

HORIZONTAL = ["latitude", "longitude"]
SPECTRAL_REFERENCES = (
    "Swarztrauber (1981), The approximation of vector functions and their derivatives on the "
    "sphere, SIAM J. Numer. Anal. 18, 191-210; Reinecke, Belkner & Carron (2023), Improved "
    "cosmic microwave background (de-)lensing using general spherical harmonic transforms, "
    "Astron. Astrophys. 678, A165 (ducc0)"
)


def select_levels(wind: xr.Dataset, levels: Sequence[float] | None,
                  table: str = "decompose") -> xr.Dataset:
    """The wind on the requested levels only (all levels when ``levels`` is None);
    ``table`` is the config table whose ``levels`` the messages name."""
    if levels is None:
        return wind
    if "level" not in wind.dims:
        raise UsageError("levels were requested but the input has no vertical dimension; "
                         f"drop {levels_hint(table)}")
    available = wind["level"].values.astype(np.float64)
    index = []
    for level in levels:
        found = np.flatnonzero(np.abs(available - level) <= 1e-6 * max(1.0, abs(level)))
        if found.size == 0:
            listed = ", ".join(f"{x:g}" for x in available)
            raise InputError(f"level {level:g} is not in the input (levels: {listed}); "
                             f"choose among these with {levels_hint(table)}")
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
    """Number of grid points where ``u`` or ``v`` is missing (computes a lazy wind)."""
    return int((wind["u"].isnull() | wind["v"].isnull()).sum())


def refuse_missing(u: np.ndarray, v: np.ndarray, *, kernel: Callable[..., tuple],
                   latitude: np.ndarray, longitude: np.ndarray, what: str, table: str,
                   **kwargs) -> tuple[np.ndarray, ...]:
    """Run a kernel of one complete slab; refuse a slab with missing points.

    The check runs inside each slab task, so that building a lazy result
    reads no data.

    Parameters
    ----------
    u, v : numpy.ndarray
        Shape ``(nlat, nlon)``.
    kernel : callable
        ``kernel(u, v, latitude=latitude, **kwargs)``.
    latitude, longitude : numpy.ndarray
        Coordinates of the slab in degrees, for the message.
    what : str
        What needs complete fields, for the message.
    table : str
        The config table whose ``levels`` the message names
        (:func:`flowpipe.choices.levels_hint`).
    **kwargs
        Passed to the kernel.

    Raises
    ------
    flowpipe.errors.InputError
        When ``u`` or ``v`` has a missing point.

    References
    ----------
    Spherical-harmonic analysis needs a value at every quadrature node
    (Swarztrauber 1981, SIAM J. Numer. Anal. 18, 191-210).
    """
    missing = np.isnan(u) | np.isnan(v)
    if missing.any():
        lats = latitude[missing.any(axis=1)]
        lons = longitude[missing.any(axis=0)]
        raise InputError(
            f"u/v have {int(missing.sum())} missing points in a latitude-longitude slab, within "
            f"latitudes {lats.min():g}..{lats.max():g} and longitudes {lons.min():g}.."
            f"{lons.max():g}; {what} need complete fields: choose the levels that have no "
            f"missing points with {levels_hint(table)}, or fill the gaps first")
    return kernel(u, v, latitude=latitude, **kwargs)


def spectral_plan(grid: GridInfo, truncation: int | None) -> tuple[str, int]:
    """Check that the spectral engine applies; return its geometry and truncation.

    Reads the coordinates only: missing points are the kernels' business
    (:func:`refuse_missing`, :mod:`flowpipe.masked`).

    Parameters
    ----------
    grid : GridInfo
        The grid of a canonical wind with ascending latitudes.
    truncation : int, optional
        Requested triangular truncation; default the largest allowed.

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
    client = distributed_client()
    if client is not None:
        workers = sum(client.nthreads().values())
    elif dask.config.get("scheduler", None) in SYNCHRONOUS:
        workers = 1
    else:
        workers = local_threads()
    return max(1, cores() // max(1, min(workers, n_tasks)))


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
    if int(np.prod(lead)) == 1:
        # One slab, as a dask task of one time and one level is: the kernel's arrays as they
        # are, the leading axes of length one added as views. Copying them into a new stack
        # cost 14 ms a 0.25 degree slab, and the writer copies each block once anyway.
        first = (0,) * len(lead)
        return tuple(np.reshape(np.asarray(o), lead + np.shape(o))
                     for o in slab_kernel(u[first], v[first], **kwargs))
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


def label_coordinates(ds: xr.Dataset) -> xr.Dataset:
    """The Dataset with a ``time`` coordinate that carries its standard name."""
    if "time" not in ds.coords:
        return ds
    return ds.assign_coords(time=ds["time"].copy().assign_attrs(standard_name="time"))
