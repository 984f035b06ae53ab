"""Helmholtz decomposition on limited-area and masked latitude-longitude grids.

Where spherical harmonics cannot go (a box cut from a global field, a
limited-area model, a global pressure level with points below the ground)
the split of the wind into a rotational (non-divergent) and a divergent
(irrotational) part is not unique: a harmonic flow, both non-divergent and
irrotational, carries what crosses the boundary. Two schemes assign it:

``variational`` (default)
    Streamfunction and velocity potential fitted by least squares to the wind
    at the valid points only, with a small first-order Tikhonov term (the
    gradient energy of the two potentials, weight ``regularisation``; Li,
    Chao & McWilliams 2006). Among the pairs that fit the wind it picks the
    one of least total energy in the two parts, which shares the harmonic
    flow between them. Works on irregular domains and around masked points;
    the parts add up to the wind to the iteration ``tolerance``.
``dirichlet``
    ``lap psi = zeta`` and ``lap chi = delta`` with zero boundary values; what
    they leave is the harmonic wind, returned as ``u_harmonic``/``v_harmonic``
    (Lynch 1989). Reconstruction is exact by construction.

Discretisation (see :mod:`flowpipe.regional.operators`): the potentials sit on the
staggered grid of cell corners, the wind at each grid point is the box
difference of its four corners, vorticity and divergence at a corner are the
circulation and outflow around the four grid points that surround it, and the
Laplacian is the compact five-point one on the corners. There are no
checkerboard modes in any solution: the Dirichlet Laplacian is non-singular,
and the variational fit's only grid-scale null mode (the corner checkerboard,
which produces no wind) carries the largest gradient energy, so the
least-energy pair has none.

Pieces: valid points that share no cell corner with the rest (a valley cut
off by mountains below the ground, seas between masked land) form separate
domains, and each connected piece is decomposed on its own. Pieces too small
for the stencils (under 5x5 points or without a 2x2 block) are left missing;
the output counts their points (attribute ``points_left_missing``) and a
:class:`flowpipe.errors.FlowpipeWarning` says so.

Speed: everything that depends only on the grid and the mask is built once
and cached (keyed by grid, mask, scheme and solver settings), then reused for
every level and time. On a complete grid, ``dirichlet`` is a separable fast
Poisson solver (sine or Fourier transform in longitude, tridiagonal in
latitude) and ``variational`` runs conjugate gradients preconditioned by the
same kind of separable solver (cosine or Fourier transform); on a masked
grid the Dirichlet Laplacian and the preconditioner are sparse LU
factorisations (the Dirichlet one up to
:data:`flowpipe.regional.solvers.DIRICHLET_LU_LIMIT` corners, beyond which conjugate
gradients preconditioned by the fast solver and the LU near the mask take its place; the
variational one of the coupled normal equations up to
:data:`flowpipe.regional.solvers.COUPLED_LIMIT` corners: one or two iterations; beyond
it an uncoupled one, with hundreds of iterations around the mask). The work
is lazy - one dask task per latitude-longitude slab, which also looks at the
slab's mask and finds its pieces (:mod:`flowpipe.regional.pieces`).
"""

from __future__ import annotations

import warnings
from typing import Any

import numpy as np
import xarray as xr

from ..annotate import global_attrs, quality_summary, variable_attrs
from ..choices import REGIONAL_VARIABLES, SCHEMES
from ..errors import FlowpipeWarning, InputError, UsageError
from ..grid import describe_grid
from . import cache
from .operators import StaggeredGrid
from .partitions import lynch_partition, pole_values, variational_partition
from .pieces import MINIMUM_SIZE, check_mask, solvable_pieces
from .solvers import DirichletSolver, VariationalSolver

__all__ = ["SCHEMES", "VariationalSolver", "decompose_regional", "solvable_pieces"]

#: Default dimensionless Tikhonov weight of the variational scheme (the weight of
#: the parts' gradient energy against the wind misfit): the misfit it leaves,
#: about this much relative, is far below the iteration tolerance.
DEFAULT_REGULARISATION = 1e-10
#: Default relative RMS wind misfit at which the variational iterations stop.
DEFAULT_TOLERANCE = 1e-7
DEFAULT_MAX_ITERATIONS = 1000
#: Latitudes within this many degrees of +/-90 are rows on a pole.
POLE_TOLERANCE = 1e-6

DIAGNOSTICS = ("reconstruction_error", "harmonic_energy_share", "harmonic_rotation",
               "iterations", "points_left_missing", "solver")
DIAGNOSTIC_ATTRS = {
    "reconstruction_error": {
        "long_name": "relative area-weighted RMS misfit of the reconstructed wind at valid points",
        "units": "1"},
    "harmonic_energy_share": {
        "long_name": "share of the wind's kinetic energy in the harmonic (non-divergent and "
                     "irrotational) part, which the boundary, not the data, decides",
        "units": "1"},
    "harmonic_rotation": {
        "long_name": "vorticity and divergence of the harmonic wind relative to those of the "
                     "wind, area-weighted RMS over the interior cell corners (zero for an "
                     "exactly harmonic wind)",
        "units": "1",
        "comment": "Of the order of the discretisation error (1e-3) on a complete grid, near "
                   "1 when the Poisson problems were not solved. On a slab with missing "
                   "points it is larger for a correct solve too: at the staircase corners of "
                   "the mask the compact five-point Laplacian and the box-differenced winds "
                   "disagree, which puts vorticity and divergence into the harmonic wind "
                   "within about three grid lengths of the mask (0.46 on a test mask whose "
                   "complete grid gives 0.002; 0.05 without the corners next to the mask, "
                   "0.009 without those within three)."},
    "iterations": {"long_name": "solver iterations (0 for direct solves)", "units": "1"},
    "points_left_missing": {
        "long_name": f"valid points in pieces of the domain smaller than {MINIMUM_SIZE}x"
                     f"{MINIMUM_SIZE} or without a 2x2 block: too small to decompose, left "
                     "missing (every larger piece is decomposed on its own)",
        "units": "1"},
}
#: The solvers a slab may use (its ``solver`` flags, CF 1.11 section 3.5): description, flag.
SOLVERS = {
    DirichletSolver.names["separable"]: "separable_fast_poisson_solver",
    DirichletSolver.names["sparse"]: "sparse_lu_poisson_solver",
    VariationalSolver.names["complete"]: "cg_with_separable_preconditioner",
    VariationalSolver.names["coupled"]: "cg_with_coupled_sparse_lu_preconditioner",
    VariationalSolver.names["uncoupled"]: "cg_with_uncoupled_sparse_lu_preconditioner",
    DirichletSolver.names["schwarz"]: "cg_with_schwarz_fast_poisson_preconditioner",
}
SOLVER_ATTRS = {
    "long_name": "solvers used on the slab (one flag for each)",
    "flag_masks": np.array([1 << k for k in range(len(SOLVERS))], dtype=np.int32),
    "flag_meanings": " ".join(SOLVERS.values()),
    "comment": "; ".join(f"{flag}: {name}" for name, flag in SOLVERS.items()),
}
DIAGNOSTIC_ATTRS["solver"] = SOLVER_ATTRS

#: What the parts of each scheme add up to.
RECONSTRUCTION = {
    "variational": "u_rotational + u_divergent = u (the harmonic wind is shared between them)",
    "dirichlet": "u_rotational + u_divergent + u_harmonic = u",
}
VARIATIONAL_HARMONIC = (
    "For reference: the harmonic wind of the partition of Lynch (1989), the wind "
    "harmonic_energy_share describes. The variational split already carries it in the "
    "rotational and the divergent wind (on a band periodic in longitude its zonal part, "
    "u ~ 1/cos(latitude), all in the rotational wind), which alone add up to the wind: do not "
    "add it to them.")
REFERENCES = (
    "Li, Chao & McWilliams (2006), Computation of the streamfunction and velocity potential for "
    "limited and irregular domains, Mon. Wea. Rev. 134, 3384-3394; Lynch (1989), Partitioning "
    "the wind in a limited domain, Mon. Wea. Rev. 117, 1492-1500")


def _solve_slabs(u: np.ndarray, v: np.ndarray, slab: np.ndarray, *, lat: np.ndarray,
                 lon: np.ndarray, periodic: bool, scheme: str, regularisation: float,
                 tolerance: float, max_iterations: int, lead: dict[str, np.ndarray | None],
                 pole: str | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Decompose every latitude-longitude slab of ``u``, ``v`` (shape ``(..., nlat, nlon)``).

    ``slab`` holds the flat index of each slab in the whole wind and ``lead`` the
    coordinates of its leading dimensions, to name a slab whose mask is refused.
    The masks are looked at here, inside the task, so that building a lazy result
    reads no data. ``pole`` names the pole that closes a band (see
    :func:`flowpipe.regional.partitions.lynch_partition`):
    ``u``, ``v`` then include that pole row (``lat`` does not), which is not solved
    for but gets the pole's values (:func:`flowpipe.regional.partitions.pole_values`) where it is valid.
    """
    grid = cache.staggered_grid(lat, lon, periodic)
    names = REGIONAL_VARIABLES
    fields = np.full(u.shape[:-2] + (len(names),) + u.shape[-2:], np.nan)
    diagnostics = np.full(u.shape[:-2] + (len(DIAGNOSTICS),), np.nan)
    body, row = {None: (slice(None), None), "north": (slice(0, -1), -1),
                 "south": (slice(1, None), 0)}[pole]
    for index in np.ndindex(u.shape[:-2]):
        us = np.asarray(u[index], dtype=np.float64)
        vs = np.asarray(v[index], dtype=np.float64)
        on_pole = np.isfinite(us[row]) & np.isfinite(vs[row]) if pole else None
        us, vs = us[body], vs[body]
        valid = np.isfinite(us) & np.isfinite(vs)
        solved = fields[index][:, body]  # a view: the slab's rows off the pole
        pieces, small = check_mask(valid, _slab_label(lead, int(slab[index])), grid)
        if small:
            warnings.warn(f"{small} valid points of a latitude-longitude slab lie in pieces too "
                          "small to decompose and are left missing (variable "
                          "points_left_missing)", FlowpipeWarning, stacklevel=2)
        # Each connected piece on its own; the relative quality figures of the pieces
        # combined with weights of their wind energy, the iterations as the most.
        energy = np.where(valid, grid.centre_area * (us**2 + vs**2), 0.0)
        shares, figures, solvers = [], [], 0
        for piece in pieces:
            parts, quality, name = _solve_piece(grid, piece, np.where(piece, us, np.nan),
                                                np.where(piece, vs, np.nan), scheme,
                                                regularisation, tolerance, max_iterations, pole)
            for k, field in enumerate(names):
                solved[k] = np.where(piece, parts[field], solved[k])
            shares.append(float(energy[piece].sum()))
            figures.append([quality[figure] for figure in DIAGNOSTICS[:4]])
            solvers |= 1 << list(SOLVERS).index(name)
        w = np.asarray(shares) / max(sum(shares), np.finfo(float).tiny)
        error, harmonic, rotation, iterations = np.asarray(figures).T
        diagnostics[index] = [np.sqrt(w @ error**2), w @ harmonic, np.sqrt(w @ rotation**2),
                              iterations.max(), small, solvers]
        if pole:
            fields[index][:, row] = np.where(on_pole, pole_values(grid, solved, us, vs, pole),
                                             np.nan)
    return fields, diagnostics


def _solve_piece(grid: StaggeredGrid, valid: np.ndarray, us: np.ndarray, vs: np.ndarray,
                 scheme: str, regularisation: float, tolerance: float, max_iterations: int,
                 pole: str | None = None) -> tuple[dict[str, np.ndarray], dict[str, float], str]:
    """Decompose the wind of one connected piece (NaN outside it); the solver's name.

    References
    ----------
    :func:`flowpipe.regional.partitions.lynch_partition` and
    :func:`flowpipe.regional.partitions.variational_partition`.
    """
    solver = cache.solver(grid, valid, scheme, regularisation, tolerance, max_iterations)
    if scheme == "dirichlet":
        return *lynch_partition(grid, valid, us, vs, pole), solver.name
    parts, quality = variational_partition(grid, us, vs, solver)
    # The harmonic flow, for reference: Lynch's harmonic wind, one more direct solve; the
    # share and the rotation describe this wind, the one written (see variational_partition).
    lynch, figures = lynch_partition(grid, valid, us, vs, pole)
    parts["u_harmonic"], parts["v_harmonic"] = lynch["u_harmonic"], lynch["v_harmonic"]
    quality["harmonic_energy_share"] = figures["harmonic_energy_share"]
    quality["harmonic_rotation"] = figures["harmonic_rotation"]
    return parts, quality, solver.name


def _slab_label(lead: dict[str, np.ndarray | None], flat_index: int) -> str:
    """``the slab at time=..., level=...`` (or ``the level``), from the leading coordinates."""
    if not lead:
        return "the level"
    shape = tuple(int(np.size(values)) if np.ndim(values) else int(values)
                  for values in lead.values())
    index = np.unravel_index(flat_index, shape)
    parts = []
    for (dim, values), i in zip(lead.items(), index, strict=True):
        parts.append(f"{dim}={values[i] if np.ndim(values) else i}")
    return "the slab at " + ", ".join(parts)


def _check_grid(wind: xr.Dataset, periodic: bool) -> tuple[np.ndarray, np.ndarray]:
    for name in ("u", "v"):
        if name not in wind:
            raise InputError(f"wind Dataset has no variable {name}; open it with flowpipe.open_wind")
        if wind[name].dims[-2:] != ("latitude", "longitude"):
            raise InputError(f"{name} has dimensions {wind[name].dims}; the last two must be "
                             "(latitude, longitude), as flowpipe.open_wind returns")
    lat = wind["latitude"].values.astype(np.float64)
    lon = wind["longitude"].values.astype(np.float64)
    if lat.size < MINIMUM_SIZE or lon.size < MINIMUM_SIZE:
        raise InputError(f"u/v: the grid is {lat.size}x{lon.size} points; the regional "
                         f"decomposition needs at least {MINIMUM_SIZE}x{MINIMUM_SIZE}")
    if np.any(np.diff(lat) <= 0) or np.any(np.diff(lon) <= 0):
        raise InputError("latitude and longitude must be ascending, as flowpipe.open_wind "
                         "returns them")
    steps = np.diff(lon)
    if np.max(np.abs(steps - steps.mean())) > 1e-6 * max(1.0, abs(steps.mean())) + 1e-9:
        raise InputError("longitudes are not equally spaced; regrid to a regular "
                         "latitude-longitude grid first")
    if periodic and not describe_grid(wind).periodic:
        raise UsageError("periodic=True needs longitudes that span 360 degrees equally spaced; "
                         "this grid is regional: use periodic=False")
    return lat, lon


def decompose_regional(wind: xr.Dataset, scheme: str = "variational", periodic: bool = False,
                       regularisation: float | None = None, **options: Any) -> xr.Dataset:
    """Helmholtz decomposition of a wind on a limited-area or masked grid.

    Parameters
    ----------
    wind : xarray.Dataset
        Canonical wind Dataset (:func:`flowpipe.open_wind`): ``u``, ``v`` in
        m s-1 with ``latitude`` and ``longitude`` (ascending) as their last two
        dimensions, NaN where missing; numpy or dask backed.
    scheme : {"variational", "dirichlet"}
        How the non-unique harmonic part is assigned (see the module docstring).
    periodic : bool
        True when the grid is global in longitude (a global level with masked
        points): the corners wrap around and only the mask bounds the domain.
    regularisation : float, optional
        Dimensionless Tikhonov weight of the ``variational`` scheme (default
        :data:`DEFAULT_REGULARISATION`). Not used by ``dirichlet``.
    **options
        ``tolerance`` (default :data:`DEFAULT_TOLERANCE`): relative RMS wind
        misfit at which the variational iterations stop; ``max_iterations``
        (default :data:`DEFAULT_MAX_ITERATIONS`). Any other is an error.

    Returns
    -------
    xarray.Dataset
        The contract variables ``streamfunction``, ``velocity_potential``,
        ``vorticity``, ``divergence`` (of the input wind), ``u_rotational``,
        ``v_rotational``, ``u_divergent``, ``v_divergent``, ``u_harmonic``,
        ``v_harmonic`` (for ``variational`` the harmonic wind of the Lynch
        partition, for reference: the split already shares it between its
        rotational and divergent winds; attribute ``wind_reconstruction``
        says what adds up to the wind), on the wind's grid and
        dimensions, NaN where the wind is missing; per-slab quality figures
        ``reconstruction_error``, ``harmonic_energy_share`` (area-weighted,
        relative, never negative: the energy of the ``u_harmonic``,
        ``v_harmonic`` written, for both schemes; see
        :func:`flowpipe.regional.partitions.variational_partition`) and
        ``iterations``; attributes ``method`` (``"regional"``), ``scheme``,
        ``regularisation``, ``periodic``, ``solver`` (and ``tolerance``,
        ``max_iterations`` for ``variational``) and the largest of each
        per-slab figure under the same names (a float in memory, a 0-d dask
        array for a lazy result, which :func:`flowpipe.write` computes with
        the data). On a band with one pole row (given or missing) the pole
        stays a point of the domain of the harmonic wind, not an edge
        (:func:`.partitions.lynch_partition`; every other point valid), and its row holds the values
        at the pole (:func:`.partitions.pole_values`), missing where the input's pole row
        is; other rows on a pole, where wind directions are undefined, are
        returned missing. Attribute ``pole_rows`` says which. Lazy when the
        wind is dask-backed.

    Raises
    ------
    flowpipe.errors.InputError
        A grid under 5x5 points, uneven longitudes, a slab
        with every point missing, or with no connected piece of at least 5x5
        valid points.
    flowpipe.errors.UsageError
        An unknown scheme or option, or ``periodic=True`` on a regional grid.

    References
    ----------
    Li, Chao & McWilliams (2006), "Computation of the streamfunction and
    velocity potential for limited and irregular domains", Mon. Wea. Rev. 134,
    3384-3394; Lynch (1989), "Partitioning the wind in a limited domain",
    Mon. Wea. Rev. 117, 1492-1500.
    """
    if scheme not in SCHEMES:
        raise UsageError(f"unknown regional scheme {scheme!r}; use one of {', '.join(SCHEMES)}")
    unknown = sorted(set(options) - {"tolerance", "max_iterations"})
    if unknown:
        raise UsageError(f"unknown regional option(s) {', '.join(unknown)}; the regional "
                         "decomposition takes scheme, periodic, regularisation, tolerance and "
                         "max_iterations")
    tolerance = float(options.get("tolerance", DEFAULT_TOLERANCE))
    max_iterations = int(options.get("max_iterations", DEFAULT_MAX_ITERATIONS))
    if not 0 < tolerance < 1 or max_iterations < 1:
        raise UsageError(f"tolerance must lie in (0, 1) and max_iterations be at least 1; got "
                         f"{tolerance} and {max_iterations}")
    if scheme == "dirichlet":
        if regularisation:
            raise UsageError("regularisation applies to the variational scheme only; "
                             "drop it or use scheme='variational'")
        regularisation = 0.0
    elif regularisation is None:
        regularisation = DEFAULT_REGULARISATION
    elif not regularisation > 0:
        raise UsageError(f"regularisation must be positive, got {regularisation}")
    rows = wind["latitude"]
    on_pole = np.abs(rows.values) >= 90.0 - POLE_TOLERANCE
    # The eastward and northward directions are undefined on a pole: solve without those
    # rows and return them missing; a band's one pole row stays a point of its domain.
    pole = _closing_pole(rows.values, on_pole, periodic)
    full = wind
    if on_pole.any():
        wind = wind.isel(latitude=np.flatnonzero(~on_pole))
    lat, lon = _check_grid(wind, periodic)
    u, v = (full["u"], full["v"]) if pole else (wind["u"], wind["v"])
    lead = {str(dim): (wind[dim].values if dim in wind.coords else u.sizes[dim])
            for dim in u.dims[:-2]}
    slab = xr.DataArray(np.arange(int(np.prod(u.shape[:-2]))).reshape(u.shape[:-2]),
                        dims=u.dims[:-2])
    if u.chunks is not None:
        u = u.chunk({"latitude": -1, "longitude": -1})
        v = v.chunk({"latitude": -1, "longitude": -1})
        slab = slab.chunk(dict(zip(u.dims[:-2], u.chunks[:-2], strict=True)))
    names = REGIONAL_VARIABLES
    fields, quality = xr.apply_ufunc(
        _solve_slabs, u, v, slab,
        input_core_dims=[["latitude", "longitude"]] * 2 + [[]],
        output_core_dims=[["component", "latitude", "longitude"], ["diagnostic"]],
        dask="parallelized",
        output_dtypes=[np.float64, np.float64],
        dask_gufunc_kwargs={"output_sizes": {"component": len(names),
                                             "diagnostic": len(DIAGNOSTICS)}},
        kwargs={"lat": lat, "lon": lon, "periodic": periodic, "scheme": scheme,
                "regularisation": float(regularisation), "tolerance": tolerance,
                "max_iterations": max_iterations, "lead": lead, "pole": pole},
        keep_attrs=False,
    )
    out = xr.Dataset({name: fields.isel(component=k, drop=True).assign_attrs(variable_attrs(name))
                      for k, name in enumerate(names)})
    for k, name in enumerate(DIAGNOSTICS):
        figure = quality.isel(diagnostic=k, drop=True)
        if name in ("points_left_missing", "solver"):
            figure = figure.astype(np.int32)
        out[name] = figure.assign_attrs(DIAGNOSTIC_ATTRS[name])
    if scheme == "variational":
        for name in ("u_harmonic", "v_harmonic"):
            out[name].attrs["comment"] = VARIATIONAL_HARMONIC
    out.attrs = global_attrs(
        wind, title="Helmholtz decomposition of the wind on a limited area",
        summary="Streamfunction, velocity potential, relative vorticity, divergence and the "
        "rotational, divergent and harmonic winds on a limited-area or masked grid.",
        references=REFERENCES)
    out.attrs.update(
        method="regional",
        scheme=scheme,
        regularisation=float(regularisation),
        periodic=int(periodic),
        wind_reconstruction=RECONSTRUCTION[scheme],
    )
    if scheme == "variational":
        out.attrs.update(tolerance=tolerance, max_iterations=max_iterations)
    if pole:
        out.attrs["pole_rows"] = (
            f"the {pole} pole is a point of the domain, not an edge: its row holds the values "
            "at the pole (each wind the one vector the row next to it describes, seen from each "
            "meridian), missing where the input's pole row is")
    elif on_pole.any():
        out = out.reindex(latitude=rows)
        if wind["u"].chunks is not None:  # one chunk per slab again, as the canonical Dataset
            out = out.chunk({"latitude": -1})
        out.attrs["pole_rows"] = "missing: wind directions are undefined on a pole"
    if out["solver"].chunks is None:  # known already: the global figures
        _summarise(out)
    return out


def _summarise(out: xr.Dataset) -> None:
    """Add the global figures of a result in memory (those of a lazy one are added as it is
    written, :func:`flowpipe.annotate.quality_summary`): the solvers used, the largest of each
    per-slab figure, and the points left missing over all slabs (when there are any)."""
    used = np.bitwise_or.reduce(out["solver"].values, axis=None)
    out.attrs["solver"] = "; ".join(sorted(name for k, name in enumerate(SOLVERS)
                                           if used & (1 << k)))
    figures = quality_summary(out)
    if not figures["points_left_missing"]:
        del figures["points_left_missing"]
    else:
        figures["points_left_missing_comment"] = (
            f"valid points in pieces of the domain smaller than {MINIMUM_SIZE}x{MINIMUM_SIZE} "
            "or without a 2x2 block, over all slabs: too small to decompose, left missing; "
            "every larger piece is decomposed on its own")
    out.attrs.update(figures)


def _closing_pole(lat: np.ndarray, on_pole: np.ndarray, periodic: bool) -> str | None:
    """``"north"`` or ``"south"`` when a band periodic in longitude has a row on that pole
    only (the outer row): the pole closes its domain there."""
    if not periodic or on_pole.sum() != 1:
        return None
    if on_pole[-1] and lat[-1] > 0:
        return "north"
    return "south" if on_pole[0] and lat[0] < 0 else None
