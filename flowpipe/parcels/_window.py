"""Streaming the wind through time: only the slices bracketing the current step are loaded.

A :class:`SliceWindow` owns a small stack of prepared time slices (three
slots: one step of at most one input interval touches at most three input
times) and loads a slice from the lazy canonical Dataset only when a stage
time needs it, overwriting a slot that the current step no longer uses. A
series of hundreds of input times therefore costs the memory of three.

Preparing a slice turns ``u, v`` into Cartesian components (pole-safe), puts
the vertical axis in ascending interpolation order, and on a global grid
closes the latitude range with pole rows: a pole row present in the input,
or a virtual one added beyond the last row, carries the mean Cartesian
vector of the row nearest the pole (one well-defined vector at the pole).
"""

from __future__ import annotations

from dataclasses import dataclass

import dask
import numpy as np
import xarray as xr

from ..errors import InputError
from ._kernels import MAX_GLOBAL_SPACING, CellTables, Grid, cartesian_slice


@dataclass(frozen=True)
class SliceGrid:
    """The grid as the kernels see it (see :func:`flowpipe.parcels._kernels.advance`)."""

    latitude: np.ndarray          # ascending, with pole rows on global grids
    lat_uniform: bool
    longitude: np.ndarray         # ascending
    lon_uniform: bool
    periodic: bool
    levels: np.ndarray            # ascending interpolation coordinates (log p or z)
    log_levels: bool
    level_order: np.ndarray       # input level indices in the order of ``levels``
    add_south: bool               # a virtual pole row is added south of the input rows
    add_north: bool
    tables: CellTables            # cell_tables (global grids; empty on limited areas)
    wrap_column: bool = False     # a band: the first column repeated 360 degrees east

    def kernel_grid(self) -> Grid:
        """The grid argument of the kernels (the ``tables`` go beside it)."""
        return Grid(self.latitude, self.lat_uniform, self.longitude, self.lon_uniform,
                    self.periodic, self.levels, self.log_levels)


def _uniform(values: np.ndarray) -> bool:
    """True when the coordinates are equally spaced (to rounding; common practice)."""
    if values.size < 3:
        return True
    steps = np.diff(values)
    return bool(np.max(np.abs(steps - steps.mean())) <= 1e-9 * max(1.0, np.abs(values).max()))


def _pseudo_angle(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """An increasing function of the longitude of ``(x, y)`` over [0, 360), in [0, 4).

    References
    ----------
    The "diamond angle" ``1 - x / (|x| + |y|)`` (``3 + x / (|x| + |y|)``
    south of the x axis), a division-only monotone substitute for ``atan2``
    (common practice); the kernels compute the same expression.
    """
    r = x / (np.abs(x) + np.abs(y))
    return np.where(y >= 0.0, 1.0 - r, 3.0 + r)


def _guesses(lines: np.ndarray, low: float, span: float, wrap: bool) -> np.ndarray:
    """For equal bins of ``[low, low + span)`` narrower than half the closest two ``lines``
    (ascending), the last line at or before each bin's lower end.

    A value in a bin then lies in the cell of that line or of the next one.
    Before the first line the guess is the last line when ``wrap``, else the
    first.

    References
    ----------
    A table of first guesses refined by a local search: Press, Teukolsky,
    Vetterling & Flannery (2007), Numerical Recipes, 3rd ed., section 3.1.1
    ("hunt").
    """
    gaps = np.diff(np.append(lines, lines[0] + span)) if wrap else np.diff(lines)
    nbin = int(np.ceil(2.0 * span / gaps.min()))
    edges = low + span * np.arange(nbin) / nbin
    found = np.searchsorted(lines, edges, side="right") - 1
    if wrap:
        return (found % lines.size).astype(np.int64)
    return np.clip(found, 0, lines.size - 2).astype(np.int64)


def cell_tables(latitude: np.ndarray, longitude: np.ndarray) -> CellTables:
    """Tables with which the kernels find the cell of a position on a global grid.

    Parameters
    ----------
    latitude : numpy.ndarray
        Ascending latitudes in degrees from -90 to 90 (pole rows included).
    longitude : numpy.ndarray
        Ascending longitudes in degrees covering the globe, in [0, 360).

    Returns
    -------
    CellTables
        ``sin_lat``, ``cos_lat``, ``inv_dlat``: ``sin``, ``cos`` of each
        latitude and the inverse of the spacing (rad) to the next row (0 for
        the last); ``row_guess`` (int64): for equal bins of the pseudo-angle
        ``z / (|z| + rho)`` in [-1, 1], the last row at or before the bin (at
        most the last cell); ``sin_lon``, ``cos_lon``, ``inv_dlon``: the same
        for the longitudes, the last column's spacing wrapping round;
        ``column_guess`` (int64): for equal bins of the pseudo-angle of
        :func:`_pseudo_angle` in [0, 4), the last column at or before the bin
        (wrapping round).

    Raises
    ------
    flowpipe.errors.InputError
        For a grid coarser than ``MAX_GLOBAL_SPACING`` degrees.

    References
    ----------
    See :func:`_guesses`; the kernel side is
    :func:`flowpipe.parcels._kernels._global_cells`.
    """
    phi = np.radians(latitude)
    lam = np.radians(longitude)
    spacing = np.degrees(max(np.diff(phi).max(), np.diff(np.append(lam, lam[0] + 2 * np.pi)).max()))
    if spacing > MAX_GLOBAL_SPACING + 1e-9:
        raise InputError(f"the grid spacing of {spacing:g} degrees is too coarse for trajectories "
                         f"(at most {MAX_GLOBAL_SPACING:g}); interpolate the wind to a finer grid")
    sin_lat, cos_lat = np.sin(phi), np.cos(phi)
    sin_lon, cos_lon = np.sin(lam), np.cos(lam)
    row_guess = _guesses(sin_lat / (np.abs(sin_lat) + cos_lat), -1.0, 2.0, wrap=False)
    column_guess = _guesses(_pseudo_angle(cos_lon, sin_lon), 0.0, 4.0, wrap=True)
    return CellTables(sin_lat, cos_lat, np.append(1.0 / np.diff(phi), 0.0), row_guess,
                      sin_lon, cos_lon, 1.0 / np.diff(np.append(lam, lam[0] + 2 * np.pi)),
                      column_guess)


def slice_grid(wind: xr.Dataset, periodic: bool, band: bool = False) -> SliceGrid:
    """Describe the grid of a canonical wind Dataset for the kernels.

    A periodic band (all longitudes, part of the latitudes) goes to the
    limited-area kernels with its first column repeated 360 degrees east:
    parcels then wrap in longitude and stop (``left_domain``) at the open
    latitude edges, with no rows invented beyond the data. A pole row the band
    has is closed as on the globe (:func:`_close_poles`), so parcels cross it.

    Parameters
    ----------
    wind : xarray.Dataset
        Canonical wind Dataset.
    periodic : bool
        True on a complete global grid.
    band : bool
        True on a periodic band.

    Returns
    -------
    SliceGrid

    References
    ----------
    Interpolation in log-pressure on pressure levels (common practice).
    """
    lat = wind["latitude"].values.astype(np.float64)
    add_south = periodic and lat[0] > -90.0 + 1e-9
    add_north = periodic and lat[-1] < 90.0 - 1e-9
    full_lat = np.concatenate([[-90.0] if add_south else [], lat, [90.0] if add_north else []])
    lon = wind["longitude"].values.astype(np.float64)
    if band:
        lon = np.append(lon, lon[0] + 360.0)
    log_levels = wind.attrs.get("level_type") == "pressure"
    if "level" in wind.dims:
        raw = wind["level"].values.astype(np.float64)
        coord = np.log(raw) if log_levels else raw
        order = np.argsort(coord)
        levels = coord[order]
    else:
        order = np.array([0])
        levels = np.array([0.0])
    if periodic:
        tables = cell_tables(full_lat, lon)
    else:  # limited areas locate latitude and longitude instead
        empty, none = np.zeros(0), np.zeros(0, np.int64)
        tables = CellTables(empty, empty, empty, none, empty, empty, empty, none)
    return SliceGrid(full_lat, _uniform(full_lat), lon, _uniform(lon), periodic, levels,
                     log_levels, order, add_south, add_north, tables, band)


def _close_poles(out: np.ndarray, grid: SliceGrid, input_lat: np.ndarray) -> None:
    """Give the pole rows of one prepared slice one value each, in place: the mean of a pole
    row's valid points, or, for an added row or one missing entirely, the ring mean of the
    row nearest the pole.

    Parameters
    ----------
    out : numpy.ndarray, shape (nlev, nlat, nlon, ncomp)
        One slot, with the rows of ``grid.latitude``.
    grid : SliceGrid
    input_lat : numpy.ndarray
        The input's latitudes.

    References
    ----------
    At a pole every longitude names the same point, so each valid value of a
    pole row describes it and its one vector is their mean; without any, it
    is estimated by the mean of the Cartesian vectors round the nearest ring
    (common practice for pole points of latitude-longitude grids).
    """
    if not (grid.periodic or grid.wrap_column):
        return
    for pole, ring, added, present in ((0, 1, grid.add_south, abs(input_lat[0] + 90.0) <= 1e-9),
                                       (-1, -2, grid.add_north, abs(input_lat[-1] - 90.0) <= 1e-9)):
        if not (added or present):
            continue
        nearest = out[:, ring].mean(axis=1)
        if present:  # a row of the input: the mean of its valid points (values of one point)
            known = np.isfinite(out[:, pole]).all(axis=-1, keepdims=True)
            count = known.sum(axis=1)
            total = np.where(known, out[:, pole], 0.0).sum(axis=1)
            nearest = np.where(count > 0, total / np.maximum(count, 1), nearest)
        out[:, pole] = nearest[:, None]


def _levels_first(variable: xr.Variable, values: np.ndarray, nlev: int) -> np.ndarray:
    """Values of one time slice as ``(level, lat, lon)``, broadcasting 2-D fields over levels."""
    values = np.asarray(values, dtype=np.float64)
    if "level" not in variable.dims:
        values = np.broadcast_to(values[None], (nlev,) + values.shape)
    return values


class SliceWindow:
    """Prepared time slices of some variables, loaded on demand into a few slots.

    Parameters
    ----------
    wind : xarray.Dataset
        Canonical wind Dataset (lazy).
    grid : SliceGrid
    wind_components : bool
        Prepare ``u, v`` (and ``vertical``) as Cartesian wind components;
        otherwise prepare the variables ``names`` as scalars.
    names : tuple of str
        The scalar variables, or the vertical velocity (empty for none).
    slots : int
        How many slices are held at once.
    """

    def __init__(self, wind: xr.Dataset, grid: SliceGrid, wind_components: bool,
                 names: tuple[str, ...], slots: int = 3):
        self.wind = wind
        self.grid = grid
        self.wind_components = wind_components
        self.names = names
        self.input_lat = wind["latitude"].values.astype(np.float64)
        phi = np.radians(self.input_lat)
        lam = np.radians(grid.longitude)
        self.trig = (np.sin(phi), np.cos(phi), np.sin(lam), np.cos(lam))
        ncomp = (3 + len(names)) if wind_components else len(names)
        shape = (slots, grid.levels.size, grid.latitude.size, grid.longitude.size, ncomp)
        self.field = np.empty(shape)
        self.held: list[int | None] = [None] * slots

    def _prepare(self, index: int, out: np.ndarray) -> None:
        """Read input time ``index`` and write it, prepared, into the slot ``out``."""
        wanted = (("u", "v") if self.wind_components else ()) + self.names
        variables = [self.wind[name].variable for name in wanted]
        variables = [v.isel(time=index) if "time" in v.dims else v for v in variables]
        # Lazy (dask) variables are read in one pass; in-memory ones are used as they are.
        values = dask.compute(*(v.data for v in variables))
        nlev = self.grid.levels.size
        part = {name: _levels_first(v, x, nlev)
                for name, v, x in zip(wanted, variables, values, strict=True)}
        order = self.grid.level_order
        row0 = 1 if self.grid.add_south else 0
        rows = slice(row0, row0 + self.input_lat.size)
        first = 0
        if self.wind_components:
            cartesian_slice(part["u"], part["v"], *self.trig, order, row0, out)
            first = 3
        columns = slice(0, self.grid.longitude.size - int(self.grid.wrap_column))
        for c, name in enumerate(self.names, start=first):
            out[:, rows, columns, c] = part[name][order]
        if self.grid.wrap_column:
            out[:, :, -1] = out[:, :, 0]
        _close_poles(out, self.grid, self.input_lat)

    @property
    def slots(self) -> int:
        """How many slices are held at once."""
        return len(self.held)

    def slots_for(self, indices: list[int]) -> list[int]:
        """Slots holding the input time ``indices``, loading those not yet held."""
        needed = set(indices)
        result = {}
        for index in needed:
            if index in self.held:
                result[index] = self.held.index(index)
        for index in sorted(needed - set(result)):
            slot = next(s for s, held in enumerate(self.held) if held not in needed)
            self.held[slot] = None  # until it is filled
            self._prepare(index, self.field[slot])
            self.held[slot] = index
            result[index] = slot
        return [result[i] for i in indices]
