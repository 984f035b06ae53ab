"""The trajectory stage: starts and a lazy wind Dataset in, a CF trajectory Dataset out."""

from __future__ import annotations

import datetime as _dt
import hashlib
import math
import re
import warnings
from collections.abc import Sequence
from dataclasses import dataclass

import cftime
import numba
import numpy as np
import pandas as pd
import xarray as xr

from .. import annotate
from ..choices import STATUS_MEANINGS, VERTICAL
from ..constants import EARTH_RADIUS
from ..errors import FlowpipeWarning, InputError, UsageError
from ..grid import describe_grid
from ..ingest import names_text, variable_named
from . import _kernels as K
from ._geometry import latitude_longitude, unit_vectors
from ._window import SliceGrid, SliceWindow, slice_grid
from .starts import as_start_table, origin

#: Default Courant number: a parcel crosses at most half a grid spacing per step.
COURANT = 0.5
#: Default interval between recorded positions, in minutes.
RECORD_MINUTES = 60.0
#: Most corrector iterations of the Petterssen scheme and their convergence
#: threshold (radians on the unit sphere, level units; about 6 mm on Earth).
PETTERSSEN_ITERATIONS = 10
PETTERSSEN_TOLERANCE = 1e-9
SCHEMES = {"rk4": K.RK4, "petterssen": K.PETTERSSEN}
#: Fewer parcels than this run on one thread: waking threads for every step
#: costs more than it saves for small groups, most of all on a busy machine.
PARALLEL_PARCELS = 8 * K.BLOCK
#: Seconds within which two times count as equal (rounding of time coordinates).
TIME_TOLERANCE = 1e-3

_ISO = re.compile(r"^(-?\d{4})-(\d{2})-(\d{2})(?:[T ](\d{2}):(\d{2})(?::(\d{2})(\.\d*)?)?)?"
                  r"\s*(?:Z|[+-]00:?00)?$")


@dataclass(frozen=True)
class _Clock:
    """Input times as seconds from the first one."""

    reference: object           # numpy datetime64 or cftime datetime
    seconds: np.ndarray
    steady: bool

    def bracket(self, t: float) -> tuple[int, int, float]:
        """Input time indices around ``t`` and the weight of the later one.

        References
        ----------
        Linear interpolation in time between the bracketing input times
        (common practice); a weight within 1e-12 of 0 or 1 needs one slice.
        """
        s = self.seconds
        if self.steady or s.size == 1:
            return 0, 0, 0.0
        k = min(max(int(np.searchsorted(s, t, side="right")) - 1, 0), s.size - 2)
        w = min(max(float((t - s[k]) / (s[k + 1] - s[k])), 0.0), 1.0)
        if w <= 1e-12:
            return k, k, 0.0
        if w >= 1.0 - 1e-12:
            return k + 1, k + 1, 0.0
        return k, k + 1, w

    def parse(self, text: str, origin: str) -> float:
        """Seconds from the reference of an ISO 8601 time."""
        match = _ISO.match(text.strip())
        if not match:
            raise InputError(f"{origin}: time {text!r} is not ISO 8601 (YYYY-MM-DDTHH:MM[:SS])")
        y, mo, d, h, mi, sec = (int(g) if g else 0 for g in match.groups()[:6])
        frac = float(match.group(7) or 0.0)
        try:
            if isinstance(self.reference, np.datetime64):
                when = np.datetime64(f"{y:04d}-{mo:02d}-{d:02d}T{h:02d}:{mi:02d}:{sec:02d}", "s")
                return float((when - self.reference) / np.timedelta64(1, "s")) + frac
            when = cftime.datetime(y, mo, d, h, mi, sec, calendar=self.reference.calendar)
            return (when - self.reference).total_seconds() + frac
        except ValueError as exc:
            raise InputError(f"{origin}: time {text!r} is not a valid date ({exc})") from None

    def text(self, t: float) -> str:
        return _iso(self.times(np.array([t]))[0])

    def times(self, seconds: np.ndarray) -> np.ndarray:
        """Times (same kind as the input's) at ``seconds`` from the reference."""
        if isinstance(self.reference, np.datetime64):
            return self.reference + np.round(seconds * 1e9).astype("timedelta64[ns]")
        flat = [self.reference + _dt.timedelta(seconds=float(s)) for s in seconds.ravel()]
        return np.array(flat, dtype=object).reshape(seconds.shape)


def _iso(value) -> str:
    if isinstance(value, np.datetime64):
        return np.datetime_as_string(value, unit="s") + "Z"
    return value.isoformat()


def _clock(wind: xr.Dataset, steady: bool) -> _Clock:
    if "time" not in wind.dims:
        if not steady:
            raise InputError(f"{_name(wind)}: the wind has no time; give --steady (steady=True) "
                             "to follow parcels through this one frozen field")
        return _Clock(np.datetime64("1970-01-01T00:00:00", "ns"), np.array([0.0]), True)
    values = wind["time"].values
    if values.size == 1 and not steady:
        raise InputError(f"{_name(wind)}: the wind has a single time ({_iso(values[0])}); "
                         "give --steady (steady=True) to follow parcels through it as a frozen "
                         "field, or give more input times")
    reference = values[0]
    if np.issubdtype(values.dtype, np.datetime64):
        seconds = (values - reference) / np.timedelta64(1, "s")
    else:
        seconds = np.array([(t - reference).total_seconds() for t in values])
    return _Clock(reference, np.asarray(seconds, dtype=np.float64), steady)


def _name(wind: xr.Dataset) -> str:
    files = wind.attrs.get("input_files", "")
    return files.splitlines()[0] if files else "the wind"


def _check_wind(wind: xr.Dataset, vertical: str | None, sample: Sequence[str],
                members: bool = False) -> float:
    """Validate the request against the wind; return the vertical-velocity scale.

    ``members``: ensemble members (the dimension ``realization``) are accepted.
    """
    for name in ("u", "v"):
        if name not in wind:
            raise InputError(f"{_name(wind)}: no {name} variable; open the input with "
                             "flowpipe.open_wind")
    extra = [d for d in wind["u"].dims if d not in ("time", "level", "latitude", "longitude")
             and not (members and d == "realization")]
    if extra:
        raise UsageError(f"{_name(wind)}: the wind has extra dimensions ({', '.join(extra)}); "
                         "trajectories need one value of each: give an input without them")
    level_type = wind.attrs.get("level_type", "none")
    scale = 0.0
    if vertical is not None:
        if vertical not in VERTICAL:
            raise UsageError(f"vertical = {vertical!r}; choose omega or w (or none for "
                             "level-following 2-D trajectories)")
        needed, scale = VERTICAL[vertical]
        if vertical not in wind:
            other = [name for name, (kind, _) in VERTICAL.items()
                     if name != vertical and name in wind and kind == level_type]
            hint = f"use --vertical {other[0]}, or leave" if other else "leave"
            raise InputError(f"{_name(wind)}: 3-D trajectories with --vertical {vertical} need "
                             f"a vertical velocity {vertical!r}, which the input lacks; {hint} "
                             "out --vertical for level-following trajectories")
        if level_type != needed or "level" not in wind.dims:
            raise InputError(f"{_name(wind)}: --vertical {vertical} needs {needed} levels, but "
                             f"the input has {level_type} levels")
    for name in sample:
        if not set(wind[name].dims) <= set(wind["u"].dims) or not {
                "latitude", "longitude"} <= set(wind[name].dims):
            raise UsageError(f"--sample {name}: dimensions {wind[name].dims} are not on the "
                             "wind's grid")
    return scale


def _sampled(wind: xr.Dataset, sample: Sequence[str]) -> tuple[str, ...]:
    """The variables to sample, by flowpipe's name or by the name the input file gave them
    (``omega`` or ``OMEGA``); an unknown name is refused, listing both names of each."""
    found = []
    for name in sample:
        variable = variable_named(wind, name, wind.data_vars)
        if variable is None:
            names = sorted(map(str, wind.data_vars))
            raise UsageError(f"--sample {name}: no such variable in {_name(wind)} (variables: "
                             f"{names_text(wind, names)})")
        found.append(variable)
    return tuple(found)


def _level_text(wind: xr.Dataset) -> str:
    units = wind["level"].attrs.get("units", "")
    return f"{', '.join(f'{x:g}' for x in wind['level'].values)} {units}".strip()


def _first_bad(bad: np.ndarray) -> int | None:
    rows = np.flatnonzero(bad)
    return int(rows[0]) if rows.size else None


def _start_seconds(table: pd.DataFrame, clock: _Clock, default: float) -> np.ndarray:
    """Start time of every row in seconds from the clock's reference (each text parsed once)."""
    column = table["time"]
    present = np.flatnonzero(~column.isna().to_numpy())
    seconds = np.full(len(column), default)
    if present.size:
        texts = np.array([str(t) for t in column.to_numpy()[present]])
        unique, first, inverse = np.unique(texts, return_index=True, return_inverse=True)
        values = np.empty(unique.size)
        for u in np.argsort(first):  # in the order of the rows, so the first bad one is named
            values[u] = clock.parse(str(unique[u]), origin(table, int(present[first[u]])))
        seconds[present] = values[inverse.ravel()]
    return seconds


def _resolve_starts(table: pd.DataFrame, wind: xr.Dataset, clock: _Clock, grid_kind: str,
                    hours: float, sign: float) -> tuple[np.ndarray, ...]:
    """Latitudes, longitudes, levels and start seconds of every row, each checked, and which
    rows lie outside the domain (skipped with a warning unless every row does)."""
    lat = table["latitude"].to_numpy(dtype=np.float64)
    lon = table["longitude"].to_numpy(dtype=np.float64)
    level = table["level"].to_numpy(dtype=np.float64).copy()
    glat = wind["latitude"].values
    glon = wind["longitude"].values
    row = _first_bad(~((np.abs(lat) <= 90.0) & np.isfinite(lon)))
    if row is not None:
        raise InputError(f"{origin(table, row)}: ({lat[row]:g}, {lon[row]:g}) is not a position "
                         "(latitude must lie within -90..90, longitude must be finite)")
    outside = np.zeros(lat.size, dtype=bool)
    domain = ""
    if grid_kind == "regional":
        shifted = glon[0] + np.mod(lon - glon[0], 360.0)
        outside = (lat < glat[0]) | (lat > glat[-1]) | (shifted > glon[-1] + K.EDGE_TOLERANCE)
        domain = (f"the limited-area domain (latitude {glat[0]:g}..{glat[-1]:g}, longitude "
                  f"{glon[0]:g}..{glon[-1]:g})")
    if grid_kind == "band":
        outside = (lat < glat[0]) | (lat > glat[-1])
        domain = f"the latitude band of the input ({glat[0]:g}..{glat[-1]:g})"
    row = _first_bad(outside)
    if row is not None:
        where = f"{origin(table, row)}: ({lat[row]:g}, {lon[row]:g}) lies outside {domain}"
        if outside.all():
            raise InputError(where)
        count = int(outside.sum())
        warnings.warn(f"{where}; {'it is' if count == 1 else f'it and {count - 1} more are'} "
                      "skipped (status outside_domain_at_start)", FlowpipeWarning, stacklevel=3)
    given = np.isfinite(level)
    if "level" not in wind.dims:
        row = _first_bad(given)
        if row is not None:
            raise InputError(f"{origin(table, row)}: level {level[row]:g} given but the input "
                             "has no levels; give LAT,LON only")
    else:
        levels = wind["level"].values.astype(np.float64)
        row = _first_bad(~given)
        if row is not None and levels.size > 1:
            raise InputError(f"{origin(table, row)}: no level given; the input has levels "
                             f"{_level_text(wind)}: give LAT,LON,LEVEL")
        level[~given] = levels[0]
        row = _first_bad((level < levels.min() - 1e-9) | (level > levels.max() + 1e-9))
        if row is not None:
            raise InputError(f"{origin(table, row)}: level {level[row]:g} is outside the "
                             f"input's vertical range ({_level_text(wind)})")
    default = clock.seconds[-1] if sign < 0 and not clock.steady else 0.0
    start = _start_seconds(table, clock, default)
    if not clock.steady:
        first, last = clock.seconds[0] - TIME_TOLERANCE, clock.seconds[-1] + TIME_TOLERANCE
        for t, what in ((start, "starts"), (start + sign * hours * 3600.0, "ends")):
            row = _first_bad((t < first) | (t > last))
            if row is not None:
                raise InputError(
                    f"{origin(table, row)}: the trajectory {what} at {clock.text(t[row])}, "
                    f"outside the input times {clock.text(clock.seconds[0])} .. "
                    f"{clock.text(clock.seconds[-1])}; shorten the hours (--hours, [advect] hours), "
                    "move the start time or give more input")
    return lat, lon, level, start, outside


def _courant_step(field: np.ndarray, grid: SliceGrid, raw_levels: np.ndarray | None,
                  vertical_scale: float, courant: float) -> float:
    """The largest step (s) that keeps the Courant number at most ``courant``.

    Parameters
    ----------
    field : numpy.ndarray, shape (nlev, nlat, nlon, ncomp)
        One prepared time slice (Cartesian wind, then vertical velocity).
    grid : SliceGrid
    raw_levels : numpy.ndarray or None
        Levels in hPa or m.
    vertical_scale : float
        As in :func:`flowpipe.parcels._kernels.advance`.
    courant : float
        Largest fraction of a grid spacing crossed in one step.

    Returns
    -------
    float
        ``courant * min(a dphi, a dlambda) / max |V|`` (horizontal spacing
        measured as at the equator, since positions are advanced in Cartesian
        coordinates, so the converging meridians do not shrink the step), and
        for 3-D runs also at most ``courant * min dlevel / max |dlevel/dt|``.

    References
    ----------
    Courant, Friedrichs & Lewy (1928), "Ueber die partiellen
    Differenzengleichungen der mathematischen Physik", Math. Ann. 100, 32-74;
    for trajectories the rule of crossing a fraction of a grid box per step
    follows e.g. Stohl (1998), Atmos. Environ. 32, 947-966, section 3
    (from memory).
    """
    speed = float(np.nanmax(np.linalg.norm(field[..., :3], axis=-1), initial=0.0))
    spacing = np.radians(min(np.min(np.diff(grid.latitude)), np.min(np.diff(grid.longitude))))
    step = courant * EARTH_RADIUS * spacing / max(speed, 1.0)
    if vertical_scale and raw_levels is not None and raw_levels.size > 1:
        rate = float(np.nanmax(np.abs(field[..., 3]), initial=0.0)) * vertical_scale
        if rate > 0:
            step = min(step, courant * float(np.min(np.abs(np.diff(np.sort(raw_levels))))) / rate)
    return step


def advect(
    wind: xr.Dataset,
    starts,
    hours: float,
    backward: bool = False,
    step_minutes: float | None = None,
    vertical: str | None = None,
    sample: Sequence[str] = (),
    steady: bool = False,
    scheme: str = "rk4",
    record_minutes: float = RECORD_MINUTES,
    courant: float = COURANT,
) -> xr.Dataset:
    """Follow air parcels through a wind field, forward or backward in time.

    Parameters
    ----------
    wind : xarray.Dataset
        Canonical wind Dataset (:func:`flowpipe.open_wind`); read one time
        slice at a time.
    starts : start table, CSV path or iterable of (lat, lon[, level])
        See :mod:`flowpipe.parcels.starts`. A start without a time begins at
        the first input time going forward and at the last going backward.
    hours : float
        Length of every trajectory, > 0.
    backward : bool
        Integrate backward in time ("where did the air come from").
    step_minutes : float, optional
        Integration step. By default the Courant-number rule
        ``h = courant * a * min(dphi, dlambda) / max |V|`` (and, in 3-D,
        ``h <= courant * min dlevel / max |dlevel/dt|``) on the wind at the
        earliest start time (:func:`_courant_step`), capped at the input
        interval and the record interval, then shortened to a whole fraction
        of the record interval. A given step may not exceed the input
        interval.
    vertical : {"omega", "w"}, optional
        3-D trajectories with the vertical velocity ``omega`` (Pa s-1, on
        pressure levels) or ``w`` (m s-1, on height levels); by default
        parcels stay on their start level (level-following 2-D).
    sample : sequence of str
        Input variables interpolated along the paths at the recorded times, by
        flowpipe's name or the input file's (``source_name``); written under
        flowpipe's, with ``source_name``.
    steady : bool
        Treat the wind as frozen at its first time (required for a single
        time).
    scheme : {"rk4", "petterssen"}
        Classical fourth-order Runge-Kutta, or the iterative scheme of
        Petterssen (1940).
    record_minutes : float
        Positions are recorded every ``max(1, round(record_minutes / step))``
        steps and at the end.
    courant : float
        Courant number of the automatic step.

    Returns
    -------
    xarray.Dataset
        In memory, not lazy: the integration is a chain in time (each step
        starts where the last ended, and which time slices it needs depends on
        where the parcels are), so there is no graph to build ahead of it.
        Instead the input streams: only the time slices bracketing the current
        step are read and held (:mod:`flowpipe.parcels._window`), each once,
        and the memory is that window and the tracks. A CF
        discrete-sampling-geometry trajectory Dataset, dimensions
        ``(trajectory, obs)``. An ensemble wind (dimension ``realization``)
        gives one trajectory per start and member, member after member, with
        the member as the coordinate ``realization`` along ``trajectory``; all
        members share one time step (the shortest the rule gives for any of
        them). Variables: ``time``, ``latitude``, ``longitude``, the
        level (``air_pressure`` or ``height``) when the input has levels,
        ``trajectory`` (``cf_role = trajectory_id``), ``status`` (flag values
        and meanings) and the sampled variables. Positions after a parcel
        stops (left the domain, reached the lowest or highest level, met
        missing wind) are missing; ``time`` keeps the schedule.

    Raises
    ------
    flowpipe.errors.InputError, flowpipe.errors.UsageError
        For starts outside the domain (when every start is; one of several
        outside it is skipped with a :class:`flowpipe.errors.FlowpipeWarning`,
        keeping its start at 0 h and the status ``outside_domain_at_start``),
        the vertical range or the input
        times (naming the row), ``hours <= 0``, a step longer than the input
        interval, 3-D without a vertical velocity, or a single time without
        ``steady``.

    References
    ----------
    The kernels: :func:`flowpipe.parcels._kernels.advance` (Runge-Kutta,
    Petterssen 1940) and :func:`flowpipe.parcels._kernels._gather` (space-time sampling); CF
    discrete sampling geometries: CF Conventions 1.11, chapter 9 and
    appendix H.4 (trajectories).
    """
    if not hours > 0 or not math.isfinite(hours):
        raise UsageError(f"--hours {hours:g}: give a positive length in hours")
    if scheme not in SCHEMES:
        raise UsageError(f"scheme {scheme!r}: choose rk4 or petterssen")
    if not record_minutes > 0:
        raise UsageError(f"record_minutes {record_minutes:g}: must be positive")
    if not courant > 0:
        raise UsageError(f"courant {courant:g}: must be positive")
    sample = _sampled(wind, sample)
    vertical_scale = _check_wind(wind, vertical, sample, members=True)
    clock = _clock(wind, steady)
    kind = describe_grid(wind).kind
    periodic = kind == "global"
    sign = -1.0 if backward else 1.0
    table = as_start_table(starts)
    lat, lon, level, start, outside = _resolve_starts(table, wind, clock, kind, hours, sign)

    grid = slice_grid(wind, periodic, band=kind == "band")
    names = (vertical,) if vertical else ()
    ensemble = ([wind.isel(realization=k) for k in range(wind.sizes["realization"])]
                if "realization" in wind["u"].dims else [wind])
    first_window = SliceWindow(ensemble[0], grid, True, names)

    def window(k: int) -> SliceWindow:  # one member's slices in memory at a time
        return first_window if k == 0 else SliceWindow(ensemble[k], grid, True, names)

    raw_levels = wind["level"].values.astype(np.float64) if "level" in wind.dims else None
    interval = float(np.min(np.diff(clock.seconds))) if clock.seconds.size > 1 and not steady \
        else math.inf
    record = record_minutes * 60.0
    if step_minutes is None:
        first = clock.bracket(float(start[~outside].min()))[0]
        step = min([interval, record] + [
            _courant_step(w.field[w.slots_for([first])[0]], grid, raw_levels, vertical_scale,
                          courant) for w in map(window, range(len(ensemble)))])
        step = record / math.ceil(record / step - 1e-9)
    else:
        step = float(step_minutes) * 60.0
        if not step > 0:
            raise UsageError(f"--step-minutes {step_minutes:g}: must be positive")
        if step > interval + TIME_TOLERANCE:
            raise UsageError(f"--step-minutes {step_minutes:g} is longer than the input interval "
                             f"({interval / 60:g} minutes); give at most {interval / 60:g}")
    schedule = _schedule(hours * 3600.0, step, record)

    n = lat.size
    rows_all = n * len(ensemble)  # member after member
    nobs = schedule.offsets.size
    tracks = _Tracks(*(np.full((rows_all, nobs), np.nan) for _ in range(3)),
                     np.full((rows_all, nobs, len(sample)), np.nan),
                     np.full((rows_all, nobs), np.nan))
    settings = _settings(grid, vertical_scale, scheme)
    status = np.full(rows_all, K.ACTIVE, dtype=np.int8)
    level_for = level if raw_levels is not None else np.zeros(n)
    for k, member in enumerate(ensemble):
        winds = window(k)
        samples = SliceWindow(member, grid, False, sample) if sample else None
        # starts outside the domain keep their position at 0 h and go no further
        rows = np.flatnonzero(outside) + k * n  # rows of the output, member after member
        status[rows] = K.OUTSIDE_AT_START
        tracks.lat[rows, 0], tracks.lon[rows, 0] = lat[outside], lon[outside]
        tracks.level[rows, 0] = level_for[outside]
        for t0 in np.unique(start[~outside]):
            group = np.flatnonzero((start == t0) & ~outside)
            members = group + k * n
            parcels = K.Parcels(unit_vectors(lat[group], lon[group]), level_for[group].copy(),
                                status[members])
            _integrate(parcels, float(t0), sign, schedule, clock, winds, samples, grid, settings,
                       tracks, members)
            status[members] = parcels.status
        del winds, samples
    status[status == K.ACTIVE] = K.COMPLETED
    realization = (np.repeat(wind["realization"].values, n)
                   if "realization" in wind["u"].dims else None)

    return _trajectory_dataset(
        wind, clock, np.tile(start, len(ensemble)), sign, schedule.offsets, tracks, status,
        sample, kind, raw_levels is not None,
        realization, dict(
            integration_scheme="classical fourth-order Runge-Kutta" if scheme == "rk4"
            else "Petterssen (1940) iterative scheme",
            time_step_seconds=step, direction="backward" if backward else "forward",
            trajectory_hours=float(hours),
            vertical_motion=vertical or "none (level-following)",
            steady_wind="yes" if clock.steady else "no"))


def _settings(grid: SliceGrid, vertical_scale: float, scheme: str) -> K.Settings:
    """The settings argument of :func:`flowpipe.parcels._kernels.advance`."""
    return K.Settings(float(vertical_scale), grid.log_levels, EARTH_RADIUS, SCHEMES[scheme],
                      PETTERSSEN_ITERATIONS, PETTERSSEN_TOLERANCE)


@dataclass(frozen=True)
class _Tracks:
    """The recorded output of every parcel, filled in place: ``(trajectory, obs)`` arrays
    (``sample`` with a last axis of the sampled variables)."""

    lat: np.ndarray
    lon: np.ndarray
    level: np.ndarray
    sample: np.ndarray
    speed: np.ndarray


@dataclass(frozen=True)
class _Schedule:
    steps: np.ndarray       # length of each step (s, positive)
    recorded: np.ndarray    # bool per step: record after it
    offsets: np.ndarray     # seconds from the start of each recorded obs (0 first)


def _schedule(total: float, step: float, record: float) -> _Schedule:
    """Steps of length ``step`` (the last one shorter if need be) filling ``total`` seconds,
    with a record every ``max(1, round(record / step))`` steps and after the last."""
    nsteps = max(1, math.ceil(total / step - 1e-9))
    steps = np.full(nsteps, step)
    steps[-1] = total - step * (nsteps - 1)
    every = max(1, round(record / step))
    recorded = (np.arange(1, nsteps + 1) % every == 0)
    recorded[-1] = True
    ends = np.cumsum(steps)
    return _Schedule(steps, recorded, np.concatenate([[0.0], ends[recorded]]))


def _integrate(parcels: K.Parcels, t0, sign, schedule, clock, winds, samples, grid, settings,
               tracks: _Tracks, members) -> None:
    """Integrate one group of parcels sharing a start time, recording as scheduled into the
    rows ``members`` of ``tracks``.

    With each position goes the speed of the horizontal wind there: the length
    of the Cartesian wind vector the parcel moves with (its first three
    components), interpolated as the integration does.
    """
    kernel_grid = grid.kernel_grid()
    pos, lev, status = parcels

    def record(obs: int, t: float) -> None:
        alive = status == K.ACTIVE
        rows = members[alive]
        tracks.lat[rows, obs], tracks.lon[rows, obs] = latitude_longitude(pos[alive])
        tracks.level[rows, obs] = lev[alive]
        k0, k1, w = clock.bracket(t)
        s0, s1 = winds.slots_for([k0, k1])
        wind_here = np.empty((pos.shape[0], winds.field.shape[4]))
        K.sample(parcels, winds.field, s0, s1, w, kernel_grid, grid.tables, wind_here)
        tracks.speed[members, obs] = np.sqrt(np.sum(wind_here[:, :3] ** 2, axis=1))
        if samples is not None:
            s0, s1 = samples.slots_for([k0, k1])
            values = np.empty((pos.shape[0], len(samples.names)))
            K.sample(parcels, samples.field, s0, s1, w, kernel_grid, grid.tables, values)
            tracks.sample[members, obs] = values

    threads = numba.get_num_threads()
    numba.set_num_threads(threads if pos.shape[0] >= PARALLEL_PARCELS else 1)
    try:
        # Blocks handed out one at a time: a thread slowed by other work on a
        # shared machine takes fewer of them instead of holding up every step.
        with numba.parallel_chunksize(1):
            _steps(parcels, t0, sign, schedule, clock, winds, grid, settings, record)
    finally:
        numba.set_num_threads(threads)


def _steps(parcels: K.Parcels, t0, sign, schedule, clock, winds, grid, settings,
           record) -> None:
    """The time loop of :func:`_integrate`: advance, and record when scheduled.

    Consecutive steps go to the kernel together, up to a record or until they
    need more input times than the window holds.
    """
    kernel_grid = grid.kernel_grid()
    record(0, t0)
    t = t0
    obs = 1
    chunk: list[tuple[float, list[tuple[int, int, float]]]] = []
    needed: set[int] = set()  # the input times the steps of the chunk read

    def flush() -> None:
        indices = sorted(needed)
        slot = dict(zip(indices, winds.slots_for(indices), strict=True))
        steps = K.Steps(
            np.array([h for h, _ in chunk]),
            np.array([[slot[b[0]] for b in brackets] for _, brackets in chunk], np.int64),
            np.array([[slot[b[1]] for b in brackets] for _, brackets in chunk], np.int64),
            np.array([[b[2] for b in brackets] for _, brackets in chunk]))
        K.advance(parcels, winds.field, steps, kernel_grid, grid.tables, settings)
        chunk.clear()
        needed.clear()

    for length, recorded in zip(schedule.steps, schedule.recorded, strict=True):
        h = sign * length
        brackets = [clock.bracket(t + f * h) for f in (0.0, 0.5, 1.0)]
        times = {k for b in brackets for k in b[:2]}
        if len(needed | times) > winds.slots:
            flush()
        chunk.append((h, brackets))
        needed |= times
        t += h
        if recorded:
            flush()
            record(obs, t)
            obs += 1
            if not np.any(parcels.status == K.ACTIVE):
                break


#: What the trajectory identifiers are, for the file's readers.
ID_COMMENT = ("flowpipe trajectory identifier: 'fp', 12 hexadecimal digits of a BLAKE2b hash of "
              "the input files, every start (position, level, time), the ensemble members, the "
              "direction and the length of the integration, then the start's number in the list "
              "(in an ensemble, counting on through the members, member after member); ids "
              "from different inputs or starts do not collide when files are combined")


def wrap_longitude(lon: np.ndarray) -> np.ndarray:
    """Longitudes in [-180, 180) degrees east, the convention of trajectory files."""
    return np.mod(np.asarray(lon, dtype=np.float64) + 180.0, 360.0) - 180.0


def trajectory_ids(wind: xr.Dataset, start: np.ndarray, lat0: np.ndarray, lon0: np.ndarray,
                   level0: np.ndarray, method: dict) -> np.ndarray:
    """Identifiers unique to the input, the starts and the integration (see :data:`ID_COMMENT`).

    One hash of everything that defines the run, then each start's number:
    cheap for a million parcels, and the same again for the same job.
    """
    digest = hashlib.blake2b(digest_size=6)
    digest.update("|".join([str(wind.attrs.get("input_files", "")), method["direction"],
                            f"{method['trajectory_hours']:.6f}"]).encode())
    for values in (start, lat0, lon0, level0):
        digest.update(np.ascontiguousarray(values, dtype=np.float64).tobytes())
    if "realization" in wind.dims:  # the members chosen
        digest.update(("|".join(map(str, wind["realization"].values))).encode())
    width = len(str(max(start.size, 1)))
    numbers = np.char.zfill(np.arange(1, start.size + 1).astype(str), width)
    return np.char.add(f"fp{digest.hexdigest()}-", numbers)


def _trajectory_dataset(wind, clock, start, sign, offsets, tracks, status, sample, kind,
                        has_levels, realization, method) -> xr.Dataset:
    lat, lon, out_level, out_sample, out_speed = (tracks.lat, tracks.lon, tracks.level,
                                                  tracks.sample, tracks.speed)
    n, nobs = out_level.shape
    lon = wrap_longitude(lon)
    dims = ("trajectory", "obs")
    times = clock.times(start[:, None] + sign * offsets[None, :])
    stopped = np.isnan(lat)
    if np.issubdtype(times.dtype, np.datetime64):
        times[stopped] = np.datetime64("NaT")
    else:
        times[stopped] = None
    ids = trajectory_ids(wind, start, lat[:, 0], lon[:, 0], out_level[:, 0], method)
    coords = {
        "trajectory_id": ("trajectory", ids,
                       {"cf_role": "trajectory_id", "long_name": "trajectory identifier",
                        "comment": ID_COMMENT}),
        "time": (dims, times, {"standard_name": "time", "long_name": "time of the position"}),
        "latitude": (dims, lat, {"standard_name": "latitude", "units": "degrees_north",
                                 "long_name": "parcel latitude"}),
        "longitude": (dims, lon, {"standard_name": "longitude", "units": "degrees_east",
                                  "long_name": "parcel longitude",
                                  "comment": "in [-180, 180) degrees east"}),
    }
    level_type = wind.attrs.get("level_type")
    if has_levels:
        level_attrs = {k: v for k, v in wind["level"].attrs.items()
                       if k in ("units", "standard_name", "positive", "long_name")}
        name = {"pressure": "air_pressure", "height": "height"}.get(level_type, "level")
        if level_type == "pressure":
            level_attrs.update(standard_name="air_pressure", units="hPa", positive="down")
        elif level_type == "height":
            level_attrs.update(standard_name="height", units="m", positive="up")
        level_attrs.update(long_name="parcel vertical position", axis="Z")
        coords[name] = (dims, out_level, level_attrs)
    else:  # a wind on one level (10 m, 850 hPa) says so as a scalar coordinate
        coords.update({str(k): v.variable for k, v in wind.coords.items()
                       if v.ndim == 0 and v.attrs.get("axis") == "Z"})
    data = {"status": ("trajectory", status, {
        "long_name": "how the trajectory ended",
        "standard_name": "status_flag",
        "flag_values": np.arange(len(STATUS_MEANINGS), dtype=np.int8),
        "flag_meanings": " ".join(STATUS_MEANINGS)})}
    for i, name in enumerate(sample):
        attrs = {k: v for k, v in wind[name].attrs.items()
                 if k in ("units", "standard_name", "long_name", "source_name")}
        attrs["long_name"] = f"{attrs.get('long_name', name)} along the trajectory"
        data[name] = (dims, out_sample[:, :, i], attrs)
    data["wind_speed"] = (dims, out_speed, {
        "units": "m s-1", "standard_name": "wind_speed",
        "long_name": "horizontal wind speed at the parcel (its horizontal speed along the path)"})
    parcels = f"{n} air parcels"
    if realization is not None:  # the member of each trajectory (CF 1.11 section 9.2)
        coords["realization"] = ("trajectory", realization, dict(
            annotate.CANONICAL_COORDINATES["realization"], coverage_content_type="coordinate"))
        members = wind.sizes["realization"]
        parcels = (f"{n // members} air parcels in each of {members} ensemble members "
                   f"({n} trajectories)")
    ds = xr.Dataset(data, coords=coords)
    if "forecast_reference_time" in wind.coords and wind["forecast_reference_time"].ndim == 0:
        # one run: its time, a scalar coordinate (CF 1.11 section 5.7); the leads are in time
        ds = ds.assign_coords(forecast_reference_time=wind["forecast_reference_time"])
    epoch = _iso(clock.reference).rstrip("Z").replace("T", " ")
    ds["time"].encoding = {"units": f"seconds since {epoch}"}
    calendar = (wind["time"].encoding.get("calendar") if "time" in wind.variables else None)
    if not isinstance(clock.reference, np.datetime64):
        calendar = clock.reference.calendar
    if calendar:
        ds["time"].encoding["calendar"] = calendar
    attrs = annotate.global_attrs(
        wind, title="flowpipe parcel trajectories",
        summary=f"{method['direction'].capitalize()} trajectories of {parcels} over "
        f"{method['trajectory_hours']:g} h through gridded model winds. {annotate.CAUTION}",
        references="Kutta (1901), Z. Math. Phys. 46, 435-453; Petterssen (1940), Weather "
        "Analysis and Forecasting; CF Conventions 1.11, chapter 9")
    attrs["featureType"] = "trajectory"
    attrs.update(method)
    # the domain the winds cover (maps outline it): grid edges, longitudes as in the input
    attrs["input_latitude_range"] = np.array([float(wind["latitude"].min()),
                                              float(wind["latitude"].max())])
    attrs["input_longitude_range"] = np.array([float(wind["longitude"].values[0]),
                                               float(wind["longitude"].values[-1])])
    if clock.steady and "time" not in wind.dims:
        attrs["time_note"] = "the input has no time: times count from an arbitrary 1970-01-01"
    ds.attrs = attrs
    return ds
