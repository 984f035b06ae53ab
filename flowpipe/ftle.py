"""Finite-time Lyapunov exponent (FTLE) fields on top of the trajectory engine.

Seeds on a regular latitude-longitude grid are advected with the kernels of
:mod:`flowpipe.parcels`; only the current and the previously recorded seed
positions are held, and only the input times bracketing the current time.

Parcels that stop early (left the domain, met missing wind): each seed's
exponent uses the positions of its five-point stencil at the *earliest stop
time among the stencil* (the last recorded time at which all of them were
active). The recording keeps one copy of the positions at the previous record
time, so the stencil of a parcel that stops between two records is evaluated
from that copy at once (stop-time-limited FTLE). The time used is written per
seed (``integration_time``); with ``complete_only=True`` such seeds stay
missing instead.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
import xarray as xr

from . import annotate
from .choices import levels_hint
from .errors import InputError, UsageError
from .grid import continuous_longitudes, describe_grid
from .ingest import PERIOD_ATTRS, REFERENCE_ATTRS
from .parcels import _kernels as K
from .parcels._advect import (
    COURANT,
    RECORD_MINUTES,
    SCHEMES,
    TIME_TOLERANCE,
    _check_wind,
    _clock,
    _courant_step,
    _iso,
    _name,
    _schedule,
    _settings,
    _steps,
)
from .parcels._geometry import unit_vectors
from .parcels._window import SliceWindow, slice_grid

__all__ = ["ftle", "seed_grid", "ftle_from_positions"]


def seed_grid(wind: xr.Dataset, spacing: float | None,
              region: Sequence[float] | None) -> tuple[np.ndarray, np.ndarray, bool]:
    """Seed latitudes and longitudes (degrees) and whether the longitudes wrap around.

    Default spacing: a quarter of the wind grid's finest spacing. Pole rows
    are left out (the tangent plane has no east there).

    On a grid periodic in longitude (global or band), a region that goes
    round the whole circle (the default, or one whose east edge comes within
    one spacing of its west edge 360 degrees on) is seeded on a closed ring:
    ``n = round(360 / spacing)`` equally spaced longitudes in [0, 360), the
    spacing along the ring adjusted to ``360 / n`` so that the last seed's
    east neighbour is the first seed, and a seed column at the region's west
    edge (modulo the spacing). Any other region has ascending longitudes
    continuous across the date line and the prime meridian, centred as the
    canonical Dataset centres limited areas (within -180..180 on average).
    """
    glat = wind["latitude"].values.astype(float)
    glon = wind["longitude"].values.astype(float)
    if spacing is None:
        spacing = 0.25 * float(min(np.min(np.abs(np.diff(glat))), np.min(np.diff(glon))))
    if not (spacing > 0 and math.isfinite(spacing)):
        raise UsageError(f"--spacing {spacing:g}: give a positive spacing in degrees")
    regional = describe_grid(wind).kind == "regional"
    lat_lo, lat_hi = float(glat.min()), float(glat.max())
    if region is None:
        south, north = lat_lo, lat_hi
        west, east = (float(glon[0]), float(glon[-1])) if regional else (0.0, 360.0)
    else:
        if len(region) != 4:
            raise UsageError("--region: give S,N,W,E in degrees")
        south, north, west, east = map(float, region)
        if not south < north:
            raise UsageError(f"--region {south:g},{north:g},...: south must be below north")
        if north < lat_lo or south > lat_hi:
            raise InputError(f"--region {south:g},{north:g},{west:g},{east:g} lies outside the "
                             f"data (latitude {lat_lo:g}..{lat_hi:g}); give a region inside it")
        if regional:
            w = glon[0] + np.mod(west - glon[0], 360.0)
            e = w + np.mod(east - west, 360.0)
            if w > glon[-1] + 1e-9 or e < glon[0] - 1e-9 or e > glon[0] + 360:
                raise InputError(f"--region {south:g},{north:g},{west:g},{east:g} lies outside "
                                 f"the data (longitude {glon[0]:g}..{glon[-1]:g}); give a region "
                                 "inside it")
            west, east = max(w, glon[0]), min(e, glon[-1])
        elif east - west < 360.0 - 1e-9:
            east = west + np.mod(east - west, 360.0)  # eastward from west, across 0 or 180
        south, north = max(south, lat_lo), min(north, lat_hi)
    lat = south + spacing * np.arange(int(math.floor((north - south) / spacing + 1e-9)) + 1)
    lat = lat[np.abs(lat) < 90.0 - 1e-9]
    wraps = not regional and east - west + spacing >= 360.0 - 1e-6
    if wraps:
        count = max(int(round(360.0 / spacing)), 2)
        step = 360.0 / count
        lon = np.mod(west, step) + step * np.arange(count)
    else:
        lon = west + spacing * np.arange(int(math.floor((east - west) / spacing + 1e-9)) + 1)
        if not regional:
            lon = continuous_longitudes(lon)
    if lat.size < 2 or lon.size < 2:
        raise UsageError(f"--spacing {spacing:g}: fewer than two seeds along a side of the "
                         "region; give a smaller spacing or a larger region")
    return lat, lon, wraps


def _tangent(at: np.ndarray, points: np.ndarray) -> np.ndarray:
    """Azimuthal-equidistant coordinates (east, north; radians) of ``points`` about ``at``.

    The logarithmic map of the sphere at ``at``: distances and bearings from
    ``at`` are kept, so it is exact to first order for the flow-map gradient.
    """
    x, y = at[..., 0], at[..., 1]
    horiz = np.hypot(x, y)
    ex = np.stack([-y, x, np.zeros_like(x)], axis=-1) / np.maximum(horiz, 1e-300)[..., None]
    nx = np.cross(at, ex)
    c = np.clip(np.sum(points * at, axis=-1), -1.0, 1.0)
    v = points - c[..., None] * at
    s = np.linalg.norm(v, axis=-1)
    scale = np.where(s > 0, np.arctan2(s, c) / np.where(s > 0, s, 1.0), 1.0)
    return np.stack([np.sum(v * ex, axis=-1) * scale, np.sum(v * nx, axis=-1) * scale], axis=-1)


def ftle_from_positions(initial: np.ndarray, final: np.ndarray,
                        seconds: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """FTLE and dominant stretching direction from a stencil's initial and final positions.

    Parameters
    ----------
    initial, final : numpy.ndarray, shape (n, 5, 3)
        Unit vectors of the stencil: the seed, then east, west, north, south
        neighbours (a missing neighbour replaced by the seed itself, which
        makes that difference one-sided).
    seconds : numpy.ndarray, shape (n,)
        Integration time (s, > 0) of each seed.

    Returns
    -------
    ftle : numpy.ndarray, shape (n,)
        ``ln(sqrt(lambda_max)) / |T|`` in s-1.
    direction : numpy.ndarray, shape (n, 2)
        East and north components of the unit eigenvector of ``lambda_max``
        (the initial direction stretched most).

    Notes
    -----
    The flow map's gradient ``F`` solves ``D_T = F D_0`` where the columns of
    ``D_0`` and ``D_T`` are the east-west and north-south differences of the
    stencil in the tangent planes (azimuthal-equidistant coordinates) at the
    seed's initial and final positions; ``C = F^T F`` is the right
    Cauchy-Green tensor, whose eigenvalues come in closed form for 2 x 2.

    References
    ----------
    Lekien & Ross (2010), "The computation of finite-time Lyapunov exponents
    on unstructured meshes and for non-Euclidean manifolds", Chaos 20,
    017505 (gradient in the tangent plane); Haller (2001), Physica D 149,
    248-277; Shadden, Lekien & Marsden (2005), Physica D 212, 271-304
    (definition of the FTLE).
    """
    p0 = _tangent(initial[:, :1], initial)
    p1 = _tangent(final[:, :1], final)
    d0 = np.stack([p0[:, 1] - p0[:, 2], p0[:, 3] - p0[:, 4]], axis=-1)  # (n, 2 comp, 2 col)
    d1 = np.stack([p1[:, 1] - p1[:, 2], p1[:, 3] - p1[:, 4]], axis=-1)
    with np.errstate(all="ignore"):
        f = d1 @ np.linalg.inv(d0)
        c = np.swapaxes(f, 1, 2) @ f
        a, b, d = c[:, 0, 0], c[:, 0, 1], c[:, 1, 1]
        half = 0.5 * (a + d)
        root = np.sqrt(np.maximum(0.25 * (a - d) ** 2 + b * b, 0.0))
        lam = half + root
        value = 0.5 * np.log(lam) / seconds
        # eigenvector of the larger eigenvalue: (b, lam - a) or (lam - d, b)
        vx = np.where(a >= d, lam - d, b)
        vy = np.where(a >= d, b, lam - a)
        norm = np.hypot(vx, vy)
        direction = np.stack([vx, vy], axis=-1) / np.where(norm > 0, norm, np.nan)[:, None]
    return value, direction


def ring_offsets(lat: np.ndarray, nlon: int) -> np.ndarray:
    """East-west neighbour offsets (in seeds) along full rings at latitudes ``lat``.

    ``floor(1 / (2 cos(latitude)))``, at least one (equatorward of 75.5 degrees it is
    one) and at most ``nlon // 8`` (45 degrees each side, so the two neighbours stay on
    the seed's side of the pole): the east-west baseline stays near the seed spacing.
    Measured on a rigid rotation across the poles (tests/test_ftle.py): the largest
    spurious exponent poleward of 80 degrees fell from 1.9e-3 to 4e-4 of the rotation
    rate on 4-degree seeds.
    """
    coslat = np.cos(np.radians(np.asarray(lat, dtype=np.float64)))
    wanted = np.floor(0.5 / np.maximum(coslat, 1e-12))
    return np.clip(wanted, 1, max(1, nlon // 8)).astype(int)


def _stencil(nlev: int, nlat: int, nlon: int, wraps: bool,
             lat: np.ndarray | None = None) -> np.ndarray:
    """Indices (n, 5) of each seed and its E, W, N, S neighbours (the seed where none).

    On a full ring of seeds (``wraps``), the east and west neighbours of rows near a
    pole are taken :func:`ring_offsets` seeds away, so that their distance stays near
    the seed spacing instead of shrinking as cos(latitude) (which would divide the
    position errors of the trajectories by an ever shorter baseline).
    """
    k, j, i = np.meshgrid(np.arange(nlev), np.arange(nlat), np.arange(nlon), indexing="ij")
    flat = lambda kk, jj, ii: ((kk * nlat + jj) * nlon + ii).ravel()  # noqa: E731
    if wraps:
        offset = ring_offsets(lat, nlon)[j] if lat is not None else 1
        east, west = (i + offset) % nlon, (i - offset) % nlon
    else:
        east, west = np.minimum(i + 1, nlon - 1), np.maximum(i - 1, 0)
    north, south = np.minimum(j + 1, nlat - 1), np.maximum(j - 1, 0)
    return np.stack([flat(k, j, i), flat(k, j, east), flat(k, j, west), flat(k, north, i),
                     flat(k, south, i)], axis=-1)


def ftle(
    wind: xr.Dataset,
    hours: float,
    backward: bool = False,
    spacing: float | None = None,
    region: Sequence[float] | None = None,
    levels: Sequence[float] | None = None,
    start: str | None = None,
    every: float | None = None,
    steady: bool = False,
    step_minutes: float | None = None,
    scheme: str = "rk4",
    complete_only: bool = False,
    record_minutes: float = RECORD_MINUTES,
    courant: float = COURANT,
) -> xr.Dataset:
    """Finite-time Lyapunov exponent field of a wind, forward or backward.

    Parameters
    ----------
    wind : xarray.Dataset
        Canonical wind Dataset (:func:`flowpipe.open_wind`).
    hours : float
        Integration time (> 0).
    backward : bool
        Integrate backward (attracting structures) instead of forward
        (repelling structures).
    spacing : float, optional
        Seed spacing in degrees (default: a quarter of the wind grid's).
    region : (south, north, west, east), optional
        Seeded region in degrees (default: the whole input domain).
    levels : sequence of float, optional
        Levels to seed (default: the first level).
    start : str, optional
        ISO 8601 start time (default: first input time forward, last backward).
    every : float, optional
        Hours between start times: a series of fields from ``start`` while the
        integration stays inside the input times.
    steady, step_minutes, scheme, record_minutes, courant
        As in :func:`flowpipe.advect`; the stop time of a parcel is resolved
        to the record interval.
    complete_only : bool
        Leave seeds whose stencil stopped early missing instead of giving the
        FTLE of the time they had.

    Returns
    -------
    xarray.Dataset
        ``ftle`` (s-1) on ``(time, level, latitude, longitude)`` (``level``
        only when the input has levels), ``integration_time`` (s) and
        ``stretching_east``/``stretching_north`` (dominant stretching
        direction); lazy nothing: the field is computed here. Longitudes as
        :func:`seed_grid` gives them. A forecast wind adds the run
        (``forecast_reference_time``) and the lead at each start time
        (``forecast_period``); an ensemble (``realization``) gives each member's
        field, computed as for that member alone, with ``realization`` first.

    References
    ----------
    Haller (2001), Physica D 149, 248-277; Shadden, Lekien & Marsden (2005),
    Physica D 212, 271-304; Lekien & Ross (2010), Chaos 20, 017505. See
    :func:`ftle_from_positions`.
    """
    if not (hours > 0 and math.isfinite(hours)):
        raise UsageError(f"--hours {hours:g}: give a positive length in hours")
    if scheme not in SCHEMES:
        raise UsageError(f"scheme {scheme!r}: choose rk4 or petterssen")
    if every is not None and not (every > 0 and math.isfinite(every)):
        raise UsageError(f"--every {every:g}: give a positive interval in hours")
    if "realization" in wind.dims:  # each member as a run of its own, stacked members first
        fields = [ftle(wind.isel(realization=k), hours, backward, spacing, region, levels, start,
                       every, steady, step_minutes, scheme, complete_only, record_minutes,
                       courant) for k in range(wind.sizes["realization"])]
        stacked = xr.concat(fields, dim=wind["realization"], combine_attrs="override")
        stacked.attrs["summary"] += (f" Each of the {len(fields)} ensemble members "
                                     "(realization) on its own.")
        return stacked
    _check_wind(wind, None, ())
    clock = _clock(wind, steady)
    kind = describe_grid(wind).kind
    sign = -1.0 if backward else 1.0
    lat, lon, wraps = seed_grid(wind, spacing, region)
    has_levels = "level" in wind.dims
    if has_levels:
        available = wind["level"].values.astype(float)
        chosen = np.asarray(levels if levels is not None else available[:1], dtype=float)
        for lv in chosen:
            if not np.any(np.abs(available - lv) < 1e-6):
                raise InputError(f"{_name(wind)}: level {lv:g} is not among the input's levels "
                                 f"({', '.join(f'{x:g}' for x in available)}); choose among "
                                 f"these with {levels_hint('ftle', '--level')}")
    else:
        if levels:
            raise InputError(f"{_name(wind)}: the input has no levels; leave out "
                             f"{levels_hint('ftle', '--level')}")
        chosen = np.zeros(1)
    total = hours * 3600.0
    if start is None:
        t0 = clock.seconds[-1] if sign < 0 and not clock.steady else 0.0
    else:
        t0 = clock.parse(start, "--start")
    starts = [t0]
    if every is not None and not clock.steady:
        while True:
            nxt = starts[-1] + every * 3600.0
            if not (clock.seconds[0] - TIME_TOLERANCE <= nxt + sign * total
                    <= clock.seconds[-1] + TIME_TOLERANCE
                    and nxt <= clock.seconds[-1] + TIME_TOLERANCE):
                break
            starts.append(nxt)
    if not clock.steady:
        for t in (t0, t0 + sign * total):
            if not clock.seconds[0] - TIME_TOLERANCE <= t <= clock.seconds[-1] + TIME_TOLERANCE:
                raise InputError(f"{_name(wind)}: the integration from {clock.text(t0)} over "
                                 f"{hours:g} h leaves the input times {clock.text(clock.seconds[0])}"
                                 f" .. {clock.text(clock.seconds[-1])}; shorten the hours (--hours, "
                                 "[ftle] hours) or move the start (--start)")

    grid = slice_grid(wind, kind == "global", band=kind == "band")
    winds = SliceWindow(wind, grid, True, ())
    interval = float(np.min(np.diff(clock.seconds))) if clock.seconds.size > 1 and not steady \
        else math.inf
    record = min(record_minutes * 60.0, total)
    if step_minutes is None:
        slot = winds.slots_for([clock.bracket(float(min(starts)))[0]])[0]
        step = min(_courant_step(winds.field[slot], grid, None, 0.0, courant), interval, record)
        step = record / math.ceil(record / step - 1e-9)
    else:
        step = float(step_minutes) * 60.0
        if not 0 < step <= interval + TIME_TOLERANCE:
            raise UsageError(f"--step-minutes {step_minutes:g}: give a positive step no longer "
                             "than the input interval")
    schedule = _schedule(total, step, record)
    settings = _settings(grid, 0.0, scheme)  # seeds stay on their levels

    nlev, nlat, nlon = chosen.size, lat.size, lon.size
    stencil = _stencil(nlev, nlat, nlon, wraps, lat)
    glat, glon = np.meshgrid(lat, lon, indexing="ij")
    initial = unit_vectors(np.tile(glat.ravel(), nlev), np.tile(glon.ravel(), nlev))
    seed_level = np.repeat(chosen, nlat * nlon)
    n = initial.shape[0]
    fields = np.full((len(starts), n), np.nan)
    used = np.full((len(starts), n), np.nan)
    dirs = np.full((len(starts), n, 2), np.nan)
    for s, ts in enumerate(starts):
        _one_start(initial, seed_level, stencil, float(ts), sign, schedule, clock, winds, grid,
                   settings, complete_only, fields[s], used[s], dirs[s])
    return _dataset(wind, clock, starts, chosen, has_levels, lat, lon, fields, used, dirs,
                    hours, backward, step, complete_only)


def _one_start(initial, seed_level, stencil, t0, sign, schedule, clock, winds, grid, settings,
               complete_only, out, used, dirs) -> None:
    """Advect every seed from ``t0``; fill the FTLE, its time and direction per seed."""
    pos = initial.copy()
    lev = seed_level.copy()
    status = np.full(pos.shape[0], K.ACTIVE, dtype=np.int8)
    previous = {"pos": pos.copy(), "t": t0, "alive": np.ones(pos.shape[0], bool)}
    done = np.zeros(pos.shape[0], bool)

    def evaluate(seeds: np.ndarray, positions: np.ndarray, elapsed: float) -> None:
        if seeds.size == 0:
            return
        done[seeds] = True
        if elapsed <= 0 or (complete_only and abs(elapsed) < schedule.offsets[-1] - 1e-6):
            return
        idx = stencil[seeds]
        value, direction = ftle_from_positions(initial[idx], positions[idx],
                                               np.full(seeds.size, elapsed))
        out[seeds], dirs[seeds], used[seeds] = value, direction, elapsed

    def record(obs: int, t: float) -> None:
        if obs == 0:
            return
        alive = status == K.ACTIVE
        stopped = previous["alive"] & ~alive
        if stopped.any():
            hit = np.any(stopped[stencil], axis=1) & ~done
            evaluate(np.flatnonzero(hit), previous["pos"], abs(previous["t"] - t0))
        previous["pos"][alive] = pos[alive]
        previous["t"], previous["alive"] = t, alive

    _steps(K.Parcels(pos, lev, status), t0, sign, schedule, clock, winds, grid, settings, record)
    rest = np.flatnonzero(~done)
    evaluate(rest, previous["pos"], abs(previous["t"] - t0))


def _dataset(wind, clock, starts, chosen, has_levels, lat, lon, fields, used, dirs, hours,
             backward, step, complete_only) -> xr.Dataset:
    nt, nlev, nlat, nlon = len(starts), chosen.size, lat.size, lon.size
    shape = (nt, nlev, nlat, nlon)
    dims = ("time", "level", "latitude", "longitude")
    coords = {
        "time": ("time", clock.times(np.asarray(starts, float)),
                 {"standard_name": "time", "long_name": "start time of the integration"}),
        "latitude": ("latitude", lat, {"standard_name": "latitude", "units": "degrees_north",
                                       "long_name": "seed latitude", "axis": "Y"}),
        "longitude": ("longitude", lon, {"standard_name": "longitude",
                                             "units": "degrees_east",
                                             "long_name": "seed longitude", "axis": "X"}),
    }
    if has_levels:
        attrs = {k: v for k, v in wind["level"].attrs.items()
                 if k in ("units", "standard_name", "positive", "long_name", "axis")}
        coords["level"] = ("level", chosen, attrs)
    direction = "backward" if backward else "forward"
    data = {
        "ftle": (dims, fields.reshape(shape), {
            "units": "s-1", "long_name": "finite-time Lyapunov exponent",
            "integration_hours": float(hours), "integration_direction": direction}),
        "integration_time": (dims, used.reshape(shape), {
            "units": "s", "long_name": "integration time used for the exponent"}),
        "stretching_east": (dims, dirs[..., 0].reshape(shape), {
            "units": "1", "long_name": "eastward component of the dominant stretching "
            "direction at the seed"}),
        "stretching_north": (dims, dirs[..., 1].reshape(shape), {
            "units": "1", "long_name": "northward component of the dominant stretching "
            "direction at the seed"}),
    }
    ds = xr.Dataset(data, coords=coords)
    if not has_levels:
        ds = ds.squeeze("level", drop=True)
    if "forecast_reference_time" in wind.coords:
        # a forecast: the run of each start time and the lead at the start (the canonical
        # Dataset's forecast coordinates; CF standard names forecast_reference_time and
        # forecast_period, valid time = run + period)
        run = wind["forecast_reference_time"]
        values = (run.values if run.ndim == 0 else
                  run.sel(time=ds["time"].values, method="pad").values)
        ds = ds.assign_coords(forecast_reference_time=(run.dims, values, dict(REFERENCE_ATTRS)),
                              forecast_period=("time", ds["time"].values - values,
                                               dict(PERIOD_ATTRS)))
    epoch = _iso(clock.reference).rstrip("Z").replace("T", " ")
    ds["time"].encoding = {"units": f"seconds since {epoch}"}
    if not isinstance(clock.reference, np.datetime64):
        ds["time"].encoding["calendar"] = clock.reference.calendar
    attrs = annotate.global_attrs(
        wind, title="flowpipe finite-time Lyapunov exponents",
        summary=f"{direction.capitalize()} finite-time Lyapunov exponents over {hours:g} h of "
        f"seeds on a regular grid advected through gridded model winds. {annotate.CAUTION}",
        references="Haller (2001), Physica D 149, 248-277; Shadden, Lekien & Marsden (2005), "
        "Physica D 212, 271-304; Lekien & Ross (2010), Chaos 20, 017505")
    attrs.update(integration_hours=float(hours), integration_direction=direction,
                 time_step_seconds=float(step),
                 early_stops="missing" if complete_only else
                 "exponent over the time the stencil had (integration_time)")
    ds.attrs = attrs
    return ds
