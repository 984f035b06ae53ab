"""Where and when parcels start: a table with one row per parcel.

A start table is a :class:`pandas.DataFrame` with columns ``latitude`` and
``longitude`` (degrees), optionally ``level`` (hPa or m, as the input's
levels) and ``time`` (ISO 8601 text, or empty for the default: the first
input time going forward, the last going backward), and ``origin``: where
each row came from, used in error messages (``starts.csv line 4``; optional).

The generators below build tables for a great-circle line, a regular box
and a ring at a great-circle radius; give ``times`` to repeat the points at
several start times, and combine tables with :func:`pandas.concat`.
"""

from __future__ import annotations

import csv
import os
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path

import numpy as np
import pandas as pd

from ..constants import EARTH_RADIUS
from ..errors import InputError, UsageError
from ._geometry import destination, latitude_longitude, unit_vectors

COLUMNS = ("latitude", "longitude", "level", "time")


def _table(latitude, longitude, level, times, origin: str) -> pd.DataFrame:
    lat = np.asarray(latitude, dtype=np.float64).ravel()
    lon = np.asarray(longitude, dtype=np.float64).ravel()
    when = [None] if times is None else [str(t) for t in (
        [times] if isinstance(times, str) else times)]
    frames = []
    for t in when:
        frames.append(pd.DataFrame({
            "latitude": lat, "longitude": lon,
            "level": np.full(lat.size, np.nan if level is None else float(level)),
            "time": [t] * lat.size,
        }))
    table = pd.concat(frames, ignore_index=True)
    table["origin"] = [f"{origin} point {i + 1}" for i in range(len(table))]
    return table


def starts_line(first: tuple[float, float], last: tuple[float, float], n: int,
                level: float | None = None, times: str | Sequence[str] | None = None
                ) -> pd.DataFrame:
    """``n`` starts equally spaced along the great circle from ``first`` to ``last``.

    Parameters
    ----------
    first, last : (latitude, longitude)
        End points in degrees (both included).
    n : int
        Number of points (at least 2).
    level : float, optional
        Start level (hPa or m).
    times : str or sequence of str, optional
        ISO 8601 start times; the points are repeated at each.

    Returns
    -------
    pandas.DataFrame
        A start table.

    References
    ----------
    Spherical linear interpolation between two unit vectors: Shoemake (1985),
    "Animating rotation with quaternion curves", SIGGRAPH Comput. Graph. 19,
    245-254, eq. for slerp.
    """
    if n < 2:
        raise UsageError(f"starts_line: n = {n}; give at least 2 points")
    a = unit_vectors(*first)
    b = unit_vectors(*last)
    omega = np.arccos(np.clip(np.dot(a, b), -1.0, 1.0))
    if omega < 1e-12 or abs(omega - np.pi) < 1e-9:
        raise UsageError("starts_line: the end points coincide or are antipodal; the great "
                         "circle between them is not defined")
    f = np.linspace(0.0, 1.0, n)[:, None]
    points = (np.sin((1 - f) * omega) * a + np.sin(f * omega) * b) / np.sin(omega)
    lat, lon = latitude_longitude(points)
    return _table(lat, lon, level, times, "line")


def starts_box(latitudes: tuple[float, float], longitudes: tuple[float, float], nlat: int,
               nlon: int, level: float | None = None,
               times: str | Sequence[str] | None = None) -> pd.DataFrame:
    """A regular ``nlat`` x ``nlon`` box of starts, edges included.

    Parameters
    ----------
    latitudes, longitudes : (first, last)
        Ranges in degrees; longitudes may cross the date line (``(170, 190)``).
    nlat, nlon : int
        Points along each side.
    level, times
        As in :func:`starts_line`.

    Returns
    -------
    pandas.DataFrame
        A start table, latitude varying slowest.

    References
    ----------
    A regular latitude-longitude lattice (common practice).
    """
    lat = np.linspace(latitudes[0], latitudes[1], nlat)
    lon = np.linspace(longitudes[0], longitudes[1], nlon)
    glat, glon = np.meshgrid(lat, lon, indexing="ij")
    return _table(glat, glon, level, times, "box")


def starts_ring(centre: tuple[float, float], radius_km: float, n: int,
                level: float | None = None, times: str | Sequence[str] | None = None
                ) -> pd.DataFrame:
    """``n`` starts on a circle at great-circle distance ``radius_km`` around ``centre``.

    Parameters
    ----------
    centre : (latitude, longitude)
        Degrees.
    radius_km : float
        Great-circle radius in km (on the sphere of
        :data:`flowpipe.constants.EARTH_RADIUS`).
    n : int
        Number of points, at equally spaced bearings from north.
    level, times
        As in :func:`starts_line`.

    Returns
    -------
    pandas.DataFrame
        A start table.

    References
    ----------
    Snyder (1987), Map Projections - A Working Manual, USGS Professional
    Paper 1395, eqs. 5-5 and 5-5a (the direct problem on the sphere).
    """
    if radius_km <= 0 or n < 1:
        raise UsageError(f"starts_ring: radius {radius_km} km and n = {n}; both must be positive")
    bearing = np.linspace(0.0, 2 * np.pi, n, endpoint=False)
    lat, lon = destination(centre[0], centre[1], bearing, radius_km * 1e3 / EARTH_RADIUS)
    return _table(lat, lon, level, times, "ring")


def _number(text: str, what: str, origin: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise InputError(f"{origin}: {what} {text!r} is not a number") from None
    if not np.isfinite(value):
        raise InputError(f"{origin}: {what} {text!r} is not a finite number")
    return value


def parse_start(text: str, position: int) -> dict:
    """One ``--start LAT,LON[,LEVEL]`` option as a start-table row."""
    origin = f"--start {text} (start {position})"
    parts = [p.strip() for p in text.split(",")]
    if len(parts) not in (2, 3):
        raise UsageError(f"{origin}: give LAT,LON or LAT,LON,LEVEL")
    lat, lon = (_number(p, w, origin) for p, w in zip(parts, ("latitude", "longitude"),
                                                        strict=False))
    level = _number(parts[2], "level", origin) if len(parts) == 3 else np.nan
    return {"latitude": lat, "longitude": lon, "level": level, "time": None, "origin": origin}


def read_starts(path: str | os.PathLike) -> pd.DataFrame:
    """Read a start table from CSV: a header row, ``latitude,longitude[,level][,time]``.

    Parameters
    ----------
    path : path-like

    Returns
    -------
    pandas.DataFrame
        A start table whose ``origin`` names the file and line of each row.

    Raises
    ------
    flowpipe.errors.InputError
        Naming the file and line of a bad row or the missing column.
    """
    path = Path(path)
    try:
        with open(path, newline="", encoding="utf-8-sig") as handle:
            rows = list(csv.reader(handle))
    except OSError as exc:
        raise InputError(f"{path}: cannot be read ({exc.strerror})") from None
    except (UnicodeDecodeError, csv.Error):
        raise InputError(f"{path}: is not a text CSV file; give a header row "
                         "latitude,longitude[,level][,time] and one start per line") from None
    if not rows:
        raise InputError(f"{path}: is empty; give a header row latitude,longitude[,level][,time]")
    header = [h.strip().lower() for h in rows[0]]
    unknown = [h for h in header if h not in COLUMNS]
    if unknown or "latitude" not in header or "longitude" not in header:
        raise InputError(f"{path} line 1: the header must name latitude,longitude and optionally "
                         f"level,time (found {','.join(rows[0])})")
    records = []
    for number, row in enumerate(rows[1:], start=2):
        if not any(cell.strip() for cell in row):
            continue
        origin = f"{path} line {number}"
        if len(row) != len(header):
            raise InputError(f"{origin}: {len(row)} values for {len(header)} columns")
        cells = {h: c.strip() for h, c in zip(header, row, strict=True)}
        records.append({
            "latitude": _number(cells["latitude"], "latitude", origin),
            "longitude": _number(cells["longitude"], "longitude", origin),
            "level": _number(cells["level"], "level", origin) if cells.get("level") else np.nan,
            "time": cells.get("time") or None,
            "origin": origin,
        })
    if not records:
        raise InputError(f"{path}: has a header but no start rows")
    return pd.DataFrame.from_records(records)


def as_start_table(starts) -> pd.DataFrame:
    """Any accepted form of starts as a start table.

    Accepts a start table (or any DataFrame or mapping of columns with
    ``latitude``/``longitude``), a path to a CSV file, or an iterable of
    ``(lat, lon)`` / ``(lat, lon, level)`` tuples.
    """
    if isinstance(starts, str | os.PathLike):
        return read_starts(starts)
    if isinstance(starts, Mapping):
        starts = pd.DataFrame(dict(starts))
    if isinstance(starts, pd.DataFrame):
        missing = [c for c in ("latitude", "longitude") if c not in starts.columns]
        if missing:
            raise UsageError(f"starts: the table has no column {', '.join(missing)}")
        table = starts.reset_index(drop=True).copy()
    else:
        rows = [tuple(row) for row in _as_iterable(starts)]
        if any(len(r) not in (2, 3) for r in rows):
            raise UsageError("starts: give (lat, lon) or (lat, lon, level) tuples")
        table = pd.DataFrame({
            "latitude": [float(r[0]) for r in rows], "longitude": [float(r[1]) for r in rows],
            "level": [float(r[2]) if len(r) == 3 else np.nan for r in rows],
        })
    if "level" not in table:
        table["level"] = np.nan
    if "time" not in table:
        table["time"] = None
    if table.empty:
        raise UsageError("starts: no start points given")
    return table


def origin(table: pd.DataFrame, row: int) -> str:
    """Where row ``row`` of a start table came from, for messages."""
    if "origin" in table and isinstance(table["origin"].iloc[row], str):
        return table["origin"].iloc[row]
    return f"starts row {row + 1}"


def _as_iterable(starts) -> Iterable:
    if not isinstance(starts, Iterable):
        raise UsageError("starts: give a start table, a CSV path or (lat, lon[, level]) tuples")
    return starts
