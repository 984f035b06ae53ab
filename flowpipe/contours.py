"""Circulation, outward flux and kinematic omega of closed contours.

Each contour (a latitude-longitude box, a great-circle-radius circle or a
polygon) is turned once into two sparse matrices on the wind's grid:

* a *line* matrix: the wind is interpolated bilinearly to points along the
  contour and summed with the midpoint rule, so that
  ``circulation = Lu @ u + Lv @ v`` and likewise for the outward flux; per slab
  this is one sparse mat-vec for all contours together;
* an *area* matrix: the area of each grid cell inside the contour (exact
  overlaps for boxes; for circles and polygons the overlaps of the cells with
  the contour drawn as a chain of nodes in the equal-area plane of longitude
  and sine of latitude, second order in the node spacing), so that the area
  integral of a gridded field is one sparse mat-vec.

Sampling rule: contour points are spaced at most a quarter of the grid
spacing apart (at least 64 per contour); the midpoint rule on those segments
and bilinear interpolation are both second order, so the line integral
converges at second order in the grid spacing.

Moving circles (:func:`follow`): a circle of fixed radius whose centre follows a
track, interpolated along great circles between the track's times; its
matrices are built once per time of the data.

Sign convention: contours run counter-clockwise seen from above (outside the
sphere); circulation is then positive for cyclonic rotation in the northern
hemisphere, and the outward flux ``sum (u dy - v dx)`` is positive for
outflow.
"""

from __future__ import annotations

import csv
import json
import os
import warnings
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import scipy.sparse as sp
import xarray as xr

from .constants import EARTH_RADIUS
from .errors import FlowpipeWarning, InputError, UsageError
from .grid import continuous_longitudes

#: Contour points per grid spacing (at least).
SAMPLES_PER_SPACING = 4

REFERENCES = (
    "Stokes and Gauss theorems on the sphere; kinematic vertical velocity: Holton & Hakim "
    "(2013), An Introduction to Dynamic Meteorology, 5th ed., section 3.5; correction: "
    "O'Brien (1970), Alternative solutions to the classical vertical velocity problem, "
    "J. Appl. Meteor. 9, 197-203"
)


@dataclass
class Contour:
    """A closed contour: ``kind`` is ``"box"``, ``"circle"`` or ``"polygon"``."""

    name: str
    kind: str
    params: tuple

    def __post_init__(self) -> None:
        if self.kind == "box":
            s, n, w, e = self.params
            if not (-90 <= s < n <= 90):
                raise UsageError(f"contour {self.name!r}: box needs -90 <= S < N <= 90")
            if not (np.isfinite(w) and np.isfinite(e)):
                raise UsageError(f"contour {self.name!r}: box meridians must be finite numbers")
            if w == e:  # W = E +- 360 is the whole latitude band; W = E encloses nothing
                raise UsageError(f"contour {self.name!r}: box has zero width (W = E); "
                                 "give W < E, or E = W + 360 for a whole latitude band")
        elif self.kind == "circle":
            lat, lon, radius_km = self.params
            if not radius_km > 0:
                raise UsageError(f"contour {self.name!r}: radius must be > 0 km, got {radius_km}")
            if not -90 <= lat <= 90:
                raise UsageError(f"contour {self.name!r}: centre latitude {lat} outside -90..90")
        elif self.kind == "polygon":
            lat, lon = (np.asarray(p, float) for p in self.params)
            if len(lat) < 3:
                raise UsageError(f"contour {self.name!r}: a polygon needs at least 3 vertices")
            winding = _winding(lon)
            # one turn around a pole: the polygon encloses the pole on its vertices' side,
            # counter-clockwise means eastward around the north pole, westward around the south
            if winding and (winding > 0) != (lat.mean() >= 0):
                lat, lon = lat[::-1], lon[::-1]
            poly = _plane_polygon(np.append(lat, lat[0]), np.append(lon, lon[0]), "latitude")
            if not poly.is_valid or poly.area == 0:
                raise UsageError(f"contour {self.name!r}: polygon is not simple "
                                 "(self-intersecting or degenerate); fix its vertices")
            if not winding and not poly.exterior.is_ccw:  # store counter-clockwise
                lat, lon = lat[::-1], lon[::-1]
            self.params = (lat, lon)
        else:
            raise UsageError(f"unknown contour kind {self.kind!r}")


def box(s: float, n: float, w: float, e: float, name: str | None = None) -> Contour:
    """A box bounded by latitude circles ``s, n`` and meridians ``w`` to ``e`` (eastward)."""
    return Contour(name or f"box {s:g},{n:g},{w:g},{e:g}", "box", (s, n, w, e))


def circle(lat: float, lon: float, radius_km: float, name: str | None = None) -> Contour:
    """A circle of great-circle radius ``radius_km`` around ``(lat, lon)``."""
    return Contour(name or f"circle {lat:g},{lon:g},{radius_km:g}km", "circle",
                   (lat, lon, radius_km))


def polygon(lat: Sequence[float], lon: Sequence[float], name: str | None = None) -> Contour:
    """A polygon whose edges are straight in latitude-longitude (longitudes unwrapped)."""
    return Contour(name or "polygon", "polygon", (np.asarray(lat, float), np.asarray(lon, float)))


@dataclass
class MovingCircle:
    """A circle of fixed great-circle radius whose centre follows a track in time."""

    name: str
    times: np.ndarray
    latitude: np.ndarray
    longitude: np.ndarray
    radius_km: float

    def __post_init__(self) -> None:
        self.times = np.asarray(self.times, "datetime64[ns]")
        self.latitude = np.asarray(self.latitude, float)
        self.longitude = np.asarray(self.longitude, float)
        if not self.radius_km > 0:
            raise UsageError(f"track {self.name!r}: radius must be > 0 km, got {self.radius_km}")
        if not len(self.times) or not (len(self.times) == len(self.latitude) == len(self.longitude)):
            raise UsageError(f"track {self.name!r}: give one latitude and longitude per time")
        if np.isnat(self.times).any() or (np.diff(self.times) <= np.timedelta64(0)).any():
            raise UsageError(f"track {self.name!r}: times must be strictly increasing")
        if not (np.all(np.abs(self.latitude) <= 90) and np.all(np.isfinite(self.longitude))):
            raise UsageError(f"track {self.name!r}: latitudes must lie in -90..90 and "
                             "longitudes be finite")

    def centre(self, times: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Latitude and longitude (degrees) of the centre at ``times``.

        Parameters
        ----------
        times : numpy.ndarray of datetime64
            Every one within the track's first and last time.

        Returns
        -------
        latitude, longitude : numpy.ndarray
            Linear in time along the great circle between the bracketing track
            points (spherical linear interpolation); longitudes in (-180, 180].

        References
        ----------
        Shoemake (1985), "Animating rotation with quaternion curves", SIGGRAPH
        Comput. Graph. 19(3), 245-254 (slerp), as implemented by
        :func:`scipy.spatial.geometric_slerp`.
        """
        from scipy.spatial import geometric_slerp

        t = np.asarray(times, "datetime64[ns]")
        outside = (t < self.times[0]) | (t > self.times[-1])
        if outside.any():
            raise InputError(
                f"track {self.name!r} covers {_iso(self.times[0])} to {_iso(self.times[-1])}, "
                f"but the data has time {_iso(t[outside][0])}; give a track covering every "
                "time of the data")
        phi, lam = np.radians(self.latitude), np.radians(self.longitude)
        points = np.column_stack([np.cos(phi) * np.cos(lam), np.cos(phi) * np.sin(lam), np.sin(phi)])
        k = np.clip(np.searchsorted(self.times, t, side="right") - 1, 0, max(len(self.times) - 2, 0))
        out = np.empty((len(t), 3))
        for i, ti in enumerate(t):
            if len(self.times) == 1 or np.array_equal(points[k[i]], points[k[i] + 1]):
                out[i] = points[k[i]]
                continue
            frac = (ti - self.times[k[i]]) / (self.times[k[i] + 1] - self.times[k[i]])
            out[i] = geometric_slerp(points[k[i]], points[k[i] + 1], float(frac))
        lat = np.degrees(np.arcsin(np.clip(out[:, 2], -1, 1)))
        return lat, np.degrees(np.arctan2(out[:, 1], out[:, 0]))

    def at(self, time: np.datetime64) -> Contour:
        """The circle at one time (a :class:`Contour` of kind ``"circle"``)."""
        lat, lon = self.centre(np.array([time]))
        return circle(float(lat[0]), float(lon[0]), self.radius_km, name=self.name)


def follow(times: Sequence, latitude: Sequence[float], longitude: Sequence[float],
           radius_km: float, name: str | None = None) -> MovingCircle:
    """A circle of great-circle radius ``radius_km`` whose centre follows a track.

    ``times`` (datetime64 or ISO 8601 text) must increase strictly and cover every
    time of the wind the circle is used on.
    """
    return MovingCircle(name or f"track, {radius_km:g} km", np.asarray(times, "datetime64[ns]"),
                        np.asarray(latitude, float), np.asarray(longitude, float), radius_km)


def read_polygon(path: str | os.PathLike) -> Contour:
    """A polygon from a CSV (latitude,longitude per line, optional header) or GeoJSON.

    The contour is named after the file's stem.
    """
    p = Path(path)
    text = _read_text(p, "polygon")
    try:
        if p.suffix.lower() in (".json", ".geojson"):
            data = json.loads(text)
            geom = data.get("features", [data])[0] if data.get("type") == "FeatureCollection" else data
            geom = geom.get("geometry", geom)
            ring = geom["coordinates"][0]
            lon, lat = zip(*[(float(x[0]), float(x[1])) for x in ring], strict=True)
        else:
            rows = [r for r in csv.reader(text.splitlines()) if r and r[0].strip()]
            if rows and not _is_number(rows[0][0]):
                rows = rows[1:]
            lat, lon = zip(*[(float(r[0]), float(r[1])) for r in rows], strict=True)
    except (ValueError, KeyError, IndexError, TypeError, AttributeError):
        raise InputError(f"{path}: not a CSV of latitude,longitude vertices nor a GeoJSON "
                         "polygon") from None
    if len(lat) > 1 and (lat[0], lon[0]) == (lat[-1], lon[-1]):
        lat, lon = lat[:-1], lon[:-1]
    return polygon(lat, lon, name=p.stem)


def read_track(path: str | os.PathLike, radius_km: float) -> MovingCircle:
    """A moving circle from a track CSV: a header row ``time,latitude,longitude``.

    Times are ISO 8601; the circle is named after the file's stem.
    """
    p = Path(path)
    rows = [r for r in csv.reader(_read_text(p, "track").splitlines()) if any(c.strip() for c in r)]
    header = [h.strip().lower() for h in rows[0]] if rows else []
    if sorted(header) != ["latitude", "longitude", "time"]:
        raise InputError(f"{path} line 1: the header must be time,latitude,longitude")
    times, lat, lon = [], [], []
    for number, row in enumerate(rows[1:], start=2):
        cells = dict(zip(header, (c.strip() for c in row), strict=False))
        try:
            if len(row) != 3:
                raise ValueError
            times.append(np.datetime64(cells["time"].removesuffix("Z"), "ns"))
            lat.append(float(cells["latitude"]))
            lon.append(float(cells["longitude"]))
        except ValueError:
            raise InputError(f"{path} line {number}: give an ISO 8601 time, a latitude and a "
                             "longitude") from None
    if not times:
        raise InputError(f"{path}: has a header but no track rows")
    return follow(times, lat, lon, radius_km, name=p.stem)


def gather(items: Iterable[tuple[str, Any]],
           track_radius_km: float | None = None) -> list[Contour | MovingCircle]:
    """Contours in the order given: the command line's, in a batch config by kind.

    ``items`` are pairs ``(kind, value)``: ``("box", [S, N, W, E])``, ``("circle", [lat,
    lon, radius_km])``, ``("polygon", file)`` (:func:`read_polygon`) and ``("track",
    file)`` (:func:`read_track`), the tracks' circles of radius ``track_radius_km``.
    """
    items = list(items)
    if any(kind == "track" for kind, _ in items) and track_radius_km is None:
        raise UsageError("a track needs the radius of its circle (--radius-km, or "
                         "track_radius_km in [circulation])")
    made = {"box": lambda b: box(*b), "circle": lambda c: circle(*c), "polygon": read_polygon,
            "track": lambda t: read_track(t, track_radius_km)}
    return [made[kind](value) for kind, value in items]


def _read_text(path: Path, what: str) -> str:
    try:
        return path.read_text(encoding="utf-8-sig")
    except OSError as exc:
        raise InputError(f"{path}: cannot read {what} file ({exc.strerror})") from None
    except UnicodeDecodeError:
        raise InputError(f"{path}: the {what} file is not UTF-8 text") from None


def _iso(time: np.datetime64) -> str:
    return str(np.datetime_as_string(time, unit="s"))


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def _winding(lon: np.ndarray) -> int:
    """Turns (+1 eastward, -1 westward, 0 none) of a ring of vertices around the poles' axis."""
    ulon = _unwrap(np.append(lon, lon[0]))
    return int(round((ulon[-1] - ulon[0]) / 360.0))


def plane_ring(lat: np.ndarray, lon: np.ndarray, y: str = "latitude") -> tuple[np.ndarray,
                                                                                np.ndarray]:
    """A ring of nodes as the boundary of its region's image in the (longitude, ``y``) plane.

    Parameters
    ----------
    lat, lon : numpy.ndarray
        The nodes (degrees), counter-clockwise seen from above; the ring may be
        closed (last node the first, or the first one turn east or west) or not.
    y : str
        ``"latitude"`` (the equirectangular plane) or ``"sine"`` (sine of latitude:
        the plane of Lambert's cylindrical equal-area projection, where areas are
        proportional to areas on the sphere).

    Returns
    -------
    x, y : numpy.ndarray
        Longitudes unwrapped from the first node, and ``y``. A ring that turns once
        around a pole gets two more nodes, at the pole's edge of the plane
        (latitude +-90) above its last and its first node: the plane's polygon is
        then the image of the region, pole side included, and runs
        counter-clockwise in the plane like the ring on the sphere (CF-1.11
        section 7.5, exterior rings anticlockwise). Other rings are returned as
        they are, so the function gives the same nodes when applied again.

    References
    ----------
    Snyder (1987), Map Projections: A Working Manual, USGS Professional Paper
    1395, sections 10 and 12 (cylindrical equal-area and equidistant projections:
    the poles are the lines y = +-1 and latitude +-90).
    """
    ulon = _unwrap(lon)
    turns = int(round((ulon[-1] - ulon[0]) / 360.0))
    ys = np.asarray(lat, float) if y == "latitude" else np.sin(np.radians(lat))
    if turns:
        top = np.sign(turns) * (90.0 if y == "latitude" else 1.0)
        ulon, ys = np.append(ulon, [ulon[-1], ulon[0]]), np.append(ys, [top, top])
    return ulon, ys


def _plane_polygon(lat: np.ndarray, lon: np.ndarray, y: str):
    """A closed ring of nodes as a shapely polygon in the (longitude, ``y``) plane
    (:func:`plane_ring`)."""
    import shapely

    return shapely.Polygon(np.column_stack(plane_ring(lat, lon, y)))


def _unwrap(lon: np.ndarray) -> np.ndarray:
    lon = np.asarray(lon, float)
    return lon[0] + np.cumsum(np.concatenate([[0.0], (np.diff(lon) + 180.0) % 360.0 - 180.0]))


def _destination(lat0: float, lon0: float, dist: float, bearing: np.ndarray):
    """Points at angular distance ``dist`` (rad) and ``bearing`` (rad) from a centre."""
    if abs(lat0) == 90.0:  # the formula degenerates at a pole: bearing fixes the meridian
        sign = np.sign(lat0)
        lam = lon0 + 180.0 - np.degrees(bearing) if sign > 0 else lon0 + np.degrees(bearing)
        return np.full_like(bearing, lat0 - sign * np.degrees(dist)), lam
    p0, l0 = np.radians(lat0), np.radians(lon0)
    sp_ = np.sin(p0) * np.cos(dist) + np.cos(p0) * np.sin(dist) * np.cos(bearing)
    phi = np.arcsin(np.clip(sp_, -1, 1))
    lam = l0 + np.arctan2(np.sin(bearing) * np.sin(dist) * np.cos(p0),
                          np.cos(dist) - np.sin(p0) * sp_)
    return np.degrees(phi), np.degrees(lam)


def contour_nodes(c: Contour, step: float) -> tuple[np.ndarray, np.ndarray]:
    """Closed list of (lat, lon) nodes, counter-clockwise, spaced about ``step`` degrees."""
    if c.kind == "box":
        s, n, w, e = c.params
        e = w + ((e - w) % 360 or 360)
        nx = max(16, int(np.ceil((e - w) / step)))
        ny = max(16, int(np.ceil((n - s) / step)))
        lon_s = np.linspace(w, e, nx + 1)
        lat_e = np.linspace(s, n, ny + 1)
        lat = np.concatenate([np.full(nx, s), lat_e[:-1], np.full(nx, n), lat_e[::-1][:-1], [s]])
        lon = np.concatenate([lon_s[:-1], np.full(ny, e), lon_s[::-1][:-1], np.full(ny, w), [w]])
        return lat, lon
    if c.kind == "circle":
        lat0, lon0, r = c.params
        dist = r * 1e3 / EARTH_RADIUS
        count = max(64, int(np.ceil(2 * np.pi * np.degrees(np.sin(dist)) / step)))
        bearing = -np.linspace(0.0, 2 * np.pi, count + 1)  # decreasing: counter-clockwise
        lat, lon = _destination(lat0, lon0, dist, bearing)
        lon = _unwrap(lon)
        # closed exactly (rounding would leave a sliver that makes the ring self-intersect)
        lat[-1], lon[-1] = lat[0], lon[0] + 360.0 * round((lon[-1] - lon[0]) / 360.0)
        return lat, lon
    lat, lon = c.params
    lat = np.append(lat, lat[0])
    lon = _unwrap(np.append(lon, lon[0]))
    out_lat, out_lon = [], []
    for i in range(len(lat) - 1):
        k = max(1, int(np.ceil(max(abs(lat[i + 1] - lat[i]), abs(lon[i + 1] - lon[i])) / step)))
        t = np.arange(k) / k
        out_lat.append(lat[i] + t * (lat[i + 1] - lat[i]))
        out_lon.append(lon[i] + t * (lon[i + 1] - lon[i]))
    return np.append(np.concatenate(out_lat), lat[0]), np.append(np.concatenate(out_lon), lon[-1])


class _Grid:
    def __init__(self, lat: np.ndarray, lon: np.ndarray) -> None:
        self.lat, self.lon = np.asarray(lat, float), np.asarray(lon, float)
        self.nlat, self.nlon = len(lat), len(lon)
        dlon = np.diff(self.lon)
        self.dlon = float(np.median(dlon))
        self.periodic = abs(self.nlon * self.dlon - 360.0) < 1e-6 * 360
        self.step = min(self.dlon, float(np.median(np.abs(np.diff(self.lat))))) / SAMPLES_PER_SPACING
        edges = np.concatenate([[self.lat[0] - (self.lat[1] - self.lat[0]) / 2],
                                (self.lat[1:] + self.lat[:-1]) / 2,
                                [self.lat[-1] + (self.lat[-1] - self.lat[-2]) / 2]])
        self.lat_edges = np.clip(edges, -90, 90)

    def bilinear(self, lat: np.ndarray, lon: np.ndarray, name: str) -> sp.csr_array:
        """Sparse (npoints, nlat*nlon) bilinear interpolation matrix."""
        la = self.lat
        if self.periodic and np.all(np.diff(la) > 0) and (la[0] <= -89.0 and la[-1] >= 89.0):
            lat = np.clip(lat, la[0], la[-1])  # beyond the last row: its values (near the pole)
        if lat.min() < la[0] - 1e-9 or lat.max() > la[-1] + 1e-9:
            raise InputError(f"contour {name!r} reaches latitudes outside the data "
                             f"({la[0]:g} to {la[-1]:g}); move or shrink it")
        i = np.clip(np.searchsorted(la, lat, side="right") - 1, 0, self.nlat - 2)
        ty = (lat - la[i]) / (la[i + 1] - la[i])
        if self.periodic:
            x = ((lon - self.lon[0]) % 360.0) / self.dlon
            j = np.floor(x).astype(int) % self.nlon
            tx = x - np.floor(x)
            j1 = (j + 1) % self.nlon
        else:
            x = self.lon[0] + (lon - self.lon[0]) % 360.0
            if x.max() > self.lon[-1] + 1e-9:
                raise InputError(f"contour {name!r} reaches longitudes outside the data "
                                 f"({self.lon[0]:g} to {self.lon[-1]:g}); move or shrink it")
            j = np.clip(np.searchsorted(self.lon, x, side="right") - 1, 0, self.nlon - 2)
            tx = (x - self.lon[j]) / (self.lon[j + 1] - self.lon[j])
            j1 = j + 1
        rows = np.repeat(np.arange(len(lat)), 4)
        cols = np.stack([i * self.nlon + j, i * self.nlon + j1, (i + 1) * self.nlon + j,
                         (i + 1) * self.nlon + j1], axis=1).ravel()
        vals = np.stack([(1 - ty) * (1 - tx), (1 - ty) * tx, ty * (1 - tx), ty * tx], axis=1).ravel()
        return sp.csr_array((vals, (rows, cols)), shape=(len(lat), self.nlat * self.nlon))


def line_matrices(grid: _Grid, contours: Sequence[Contour]) -> sp.csr_array:
    """Sparse ``(2 * ncontour, 2 * ncell)`` matrix: ``M @ [u; v]`` gives circulations then fluxes.

    Midpoint rule: the wind at each segment's midpoint times the segment's
    eastward ``a cos(phi) dlambda`` and northward ``a dphi`` lengths.
    """
    lat_m, lon_m, dx, dy, owner = [], [], [], [], []
    for k, c in enumerate(contours):
        lat, lon = contour_nodes(c, grid.step)
        mid_lat, mid_lon = (lat[1:] + lat[:-1]) / 2, (lon[1:] + lon[:-1]) / 2
        dx.append(EARTH_RADIUS * np.cos(np.radians(mid_lat)) * np.radians(np.diff(lon)))
        dy.append(EARTH_RADIUS * np.radians(np.diff(lat)))
        lat_m.append(mid_lat)
        lon_m.append(mid_lon)
        owner.append(np.full(len(mid_lat), k))
        grid.bilinear(mid_lat, mid_lon, c.name)  # refuses contours outside the data
    interp = grid.bilinear(np.concatenate(lat_m), np.concatenate(lon_m), "")
    owner_a = np.concatenate(owner)
    dx_a, dy_a = np.concatenate(dx), np.concatenate(dy)
    n = len(contours)
    agg = lambda w: sp.csr_array((w, (owner_a, np.arange(len(w)))), shape=(n, len(w)))  # noqa: E731
    cu, cv = agg(dx_a) @ interp, agg(dy_a) @ interp
    fu, fv = agg(dy_a) @ interp, agg(-dx_a) @ interp
    return sp.csr_array(sp.block_array([[cu, cv], [fu, fv]]))


def area_matrix(grid: _Grid, contours: Sequence[Contour]) -> sp.csr_array:
    """Sparse ``(ncontour, ncell)`` matrix of cell areas (m2) inside each contour.

    Boxes: exact overlaps in sine of latitude and longitude. Circles and
    polygons: exact overlaps (:func:`shapely.intersection`) of each cell with the
    contour drawn in the equal-area plane (longitude, sine of latitude), the
    contour a chain of nodes :attr:`_Grid.step` apart; the chords' departure from
    the contour is second order in that spacing, and so are the weights.

    References
    ----------
    Snyder (1987), Map Projections: A Working Manual, USGS Professional Paper
    1395, section 10 (Lambert's cylindrical equal-area projection: the area of a
    region is ``a**2`` times its area in the plane of longitude in radians and
    sine of latitude).
    """
    sin_e = np.sin(np.radians(grid.lat_edges))
    cell_area = EARTH_RADIUS**2 * np.radians(grid.dlon) * np.abs(sin_e[1:] - sin_e[:-1])
    rows, cols, vals = [], [], []
    for k, c in enumerate(contours):
        if c.kind == "box":  # exact cell fractions: overlaps in sin(latitude) and longitude
            s_, n_, w, e = c.params
            width = (e - w) % 360 or 360
            top, bot = np.minimum(sin_e[1:], np.sin(np.radians(n_))), np.maximum(
                sin_e[:-1], np.sin(np.radians(s_)))
            flat = np.clip(top - bot, 0, None) / (sin_e[1:] - sin_e[:-1])
            west = (grid.lon - grid.dlon / 2 - w + 180.0) % 360.0 - 180.0
            flon = sum(np.clip(np.minimum(west + grid.dlon, width + shift) - np.maximum(west, shift),
                               0, None) for shift in (-360.0, 0.0, 360.0)) / grid.dlon
            f = flat[:, None] * flon[None, :]
            r, j = np.nonzero(f)
            cells, areas = r * grid.nlon + j, f[r, j] * cell_area[r]
        else:
            cells, areas = _overlaps(grid, _plane_polygon(*contour_nodes(c, grid.step), "sine"),
                                     sin_e)
        if not len(cells):
            raise InputError(f"contour {c.name!r} lies outside the data; move it")
        rows.append(np.full(len(cells), k))
        cols.append(cells)
        vals.append(areas)
    return sp.csr_array((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))),
                        shape=(len(contours), grid.nlat * grid.nlon))


def _overlaps(grid: _Grid, poly, sin_e: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Cells (flat indices) and their areas (m2) inside ``poly`` (equal-area plane, degrees)."""
    import shapely

    shapely.prepare(poly)
    lon_lo, mu_lo, lon_hi, mu_hi = poly.bounds
    lo, hi = np.minimum(sin_e[:-1], sin_e[1:]), np.maximum(sin_e[:-1], sin_e[1:])
    ii = np.nonzero((hi > mu_lo) & (lo < mu_hi))[0]
    west = grid.lon - grid.dlon / 2
    cells, areas = [], []
    for turn in range(int(np.floor((lon_lo - west[-1]) / 360.0)),
                      int(np.floor((lon_hi - west[0]) / 360.0)) + 1):
        jj = np.nonzero((west + 360.0 * turn < lon_hi) & (west + grid.dlon + 360.0 * turn > lon_lo))[0]
        if not (len(ii) and len(jj)):
            continue
        i, j = (a.ravel() for a in np.meshgrid(ii, jj, indexing="ij"))
        boxes = shapely.box(west[j] + 360.0 * turn, lo[i], west[j] + grid.dlon + 360.0 * turn, hi[i])
        area = np.where(shapely.contains_properly(poly, boxes), shapely.area(boxes), 0.0)
        edge = np.nonzero((area == 0) & shapely.intersects(poly, boxes))[0]
        area[edge] = shapely.area(shapely.intersection(boxes[edge], poly))
        keep = area > 0
        cells.append(i[keep] * grid.nlon + j[keep])
        areas.append(area[keep] * EARTH_RADIUS**2 * np.pi / 180.0)
    if not cells:
        return np.zeros(0, int), np.zeros(0)
    return np.concatenate(cells), np.concatenate(areas)


def kinematic_omega(pressure: np.ndarray, divergence: np.ndarray, *, surface: float = 0.0,
                    top: float | None = None) -> np.ndarray:
    """Kinematic omega (Pa s-1) of a column from its mean divergence on pressure levels.

    Each column is integrated upward from its *base*: the lowest level from
    which the divergence is finite at every level up to the top, where omega
    is ``surface`` (the lower boundary condition). With complete data that is
    the lowest level; where the lowest levels are missing (below the ground
    of a limited-area model, say) it is the lowest level above them, and the
    levels below it stay missing. A column whose top level is missing has no
    base and is missing at every level. A :class:`flowpipe.errors.FlowpipeWarning`
    says when a base lies above the lowest level or a column is missing.

    Parameters
    ----------
    pressure : numpy.ndarray
        Levels in Pa, shape ``(nlev,)``, any order.
    divergence : numpy.ndarray
        Mean divergence in s-1, shape ``(..., nlev)``; NaN where missing.
    surface : float
        Omega at each column's base.
    top : float, optional
        When given, the O'Brien correction: a correction linear in pressure,
        zero at the base, that makes omega at the top level equal ``top``
        (not applied to a column of one level).

    Returns
    -------
    numpy.ndarray
        Omega, same shape as ``divergence``; ``d omega / dp = -divergence``
        integrated by the trapezoid rule from each column's base upward, NaN
        below the base.

    References
    ----------
    Holton & Hakim (2013), An Introduction to Dynamic Meteorology, 5th ed.,
    section 3.5 (continuity in pressure coordinates); O'Brien (1970),
    "Alternative solutions to the classical vertical velocity problem",
    J. Appl. Meteor. 9, 197-203 (the kinematic method: omega given at the
    column's lower boundary, the divergence integrated up to the top, its
    error spread linearly in pressure between the two).
    """
    p = np.asarray(pressure, float)
    order = np.argsort(-p)
    ps = p[order]
    d = np.asarray(divergence, float)[..., order]
    # complete[..., k]: the levels k (counted from the bottom) to the top are all finite
    complete = np.flip(np.logical_and.accumulate(np.flip(np.isfinite(d), -1), -1), -1)
    layers = np.where(complete[..., :-1], -(d[..., 1:] + d[..., :-1]) / 2 * np.diff(ps), 0.0)
    om = surface + np.concatenate([np.zeros(d.shape[:-1] + (1,)), np.cumsum(layers, -1)], -1)
    if top is not None:
        base = ps[np.argmax(complete, -1)][..., None]
        depth = np.where(base > ps[-1], base - ps[-1], np.inf)  # one level: no correction
        om = om - (om[..., -1:] - top) * (base - ps) / depth
    om = np.where(complete, om, np.nan)
    _tell_bases(ps, complete)
    out = np.empty_like(om)
    out[..., order] = om
    return out


def _tell_bases(ps: np.ndarray, complete: np.ndarray) -> None:
    """A warning when some columns of :func:`kinematic_omega` do not start at the lowest
    level ``ps[0]`` (Pa, levels from the bottom), naming the levels where they start."""
    raised = ~complete[..., 0] & complete[..., -1]
    none = int((~complete[..., -1]).sum())
    told, count = [], complete[..., 0].size
    if raised.any():
        starts = ", ".join(f"{s / 100.0:g}" for s in np.unique(ps[np.argmax(complete[raised], -1)]))
        told.append(f"{int(raised.sum())} of {count} columns start at {starts} hPa, their lowest "
                    "level with complete data up to the top (missing below)")
    if none:
        told.append(f"{none} of {count} columns are missing at every level (missing data at the "
                    f"top, {ps[-1] / 100.0:g} hPa)")
    if told:
        warnings.warn("kinematic omega: " + "; ".join(told) + "; see the variable omega_base",
                      FlowpipeWarning, stacklevel=3)


def _slab_integrals(u, v, zeta, delta, step, *, lines, areas):
    """Line and area integrals of slabs; ``step`` picks each slab's matrices (moving circles).

    ``lines[k]`` is the pair of column blocks (u, v) of :func:`line_matrices`, so each slab
    costs four sparse mat-vecs on its own fields and nothing is copied into a stacked vector.
    """
    shape = u.shape[:-2]
    n = areas[0].shape[0]
    flat = lambda a: a.reshape(-1, a.shape[-2] * a.shape[-1])  # noqa: E731  (slab, cell)
    fu, fv, fz, fd = flat(u), flat(v), flat(zeta), flat(delta)
    step = np.broadcast_to(step, shape).ravel()
    res = np.empty((4, fu.shape[0], n))
    for i, k in enumerate(step):
        (lu, lv), area = lines[k], areas[k]
        ring = lu @ fu[i] + lv @ fv[i]
        res[:, i] = ring[:n], ring[n:], area @ fz[i], area @ fd[i]
    return tuple(r.reshape(shape + (n,)) for r in res)


def _column_blocks(line: sp.csr_array) -> tuple[sp.csr_array, sp.csr_array]:
    """The u and v column blocks of a line matrix (``M @ [u; v] = Mu @ u + Mv @ v``)."""
    half = line.shape[1] // 2
    return sp.csr_array(line[:, :half]), sp.csr_array(line[:, half:])


def _matrices(grid: _Grid, contours: Sequence[Contour | MovingCircle], times: np.ndarray | None):
    """Line matrices (as u and v column blocks) and area matrices, one of each per time when
    a circle moves (else one), and the contours as they are at the first time.

    The rows of fixed contours are built once and reused at every time.
    """
    fixed = [i for i, c in enumerate(contours) if isinstance(c, Contour)]
    moving = [i for i, c in enumerate(contours) if isinstance(c, MovingCircle)]
    if not moving:
        snapshots = [list(contours)]
    else:
        if times is None:
            raise UsageError(f"track {contours[moving[0]].name!r}: a moving circle needs data "
                             "with a time coordinate")
        centres = [contours[i].centre(times) for i in moving]  # refuses times off the track
        snapshots = [[contours[i] for i in fixed] + [
            circle(float(lat[t]), float(lon[t]), contours[i].radius_km, name=contours[i].name)
            for i, (lat, lon) in zip(moving, centres, strict=True)] for t in range(len(times))]
    order = np.argsort(fixed + moving) if moving else np.arange(len(contours))
    n, nf = len(contours), len(fixed)
    line_f = line_matrices(grid, snapshots[0][:nf]) if moving and fixed else None
    area_f = area_matrix(grid, snapshots[0][:nf]) if moving and fixed else None
    lines, areas = [], []
    for snap in snapshots:
        part = snap[nf:] if moving else snap
        line, area = line_matrices(grid, part), area_matrix(grid, part)
        if line_f is not None:
            m = len(part)
            line = sp.vstack([line_f[:nf], line[:m], line_f[nf:], line[m:]], format="csr")
            area = sp.vstack([area_f, area], format="csr")
        if moving:  # back to the order the contours were given in
            line = sp.csr_array(line[np.concatenate([order, n + order])])
            area = sp.csr_array(area[order])
        sums = area.sum(axis=1)
        if (sums <= 0).any():
            bad = contours[int(np.argmin(sums))].name
            raise InputError(f"contour {bad!r} encloses no grid cell of the data; enlarge it")
        lines.append(_column_blocks(line))
        areas.append(area)
    return lines, areas, [snapshots[0][j] for j in order]


def circulation(wind: xr.Dataset, contours: Sequence[Contour | MovingCircle], *,
                levels: Sequence[float] | None = None, obrien: bool = False,
                surface_omega: float = 0.0, top_omega: float = 0.0) -> xr.Dataset:
    """Circulation, outward flux, area means and kinematic omega of closed contours.

    Parameters
    ----------
    wind : xarray.Dataset
        A canonical wind (:func:`flowpipe.open_wind`).
    contours : sequence of Contour or MovingCircle
        From :func:`box`, :func:`circle`, :func:`polygon` and :func:`follow`.
    levels : sequence of float, optional
        Only these levels.
    obrien : bool
        Apply the O'Brien correction so omega at the top level is ``top_omega``.
    surface_omega, top_omega : float
        Omega (Pa s-1) at the base of each column (the lowest level with complete data
        up to the top: :func:`kinematic_omega`; ``omega_base`` in the result) and (with
        ``obrien``) at the top level.

    Returns
    -------
    xarray.Dataset
        Lazy; dimensions ``(contour, time, level)`` (CF-1.11 section 2.4: other
        dimensions left of T and Z, as in its example 7.15 of a time series of
        geometries). With a moving circle,
        ``area`` is per ``(contour, time)`` (the grid's sampling of the circle
        changes as it moves), ``centre_latitude`` / ``centre_longitude``
        ``(contour, time)`` give the circles' centres and ``radius`` (contour)
        their radii (NaN for boxes and polygons); the geometry container shows the
        circles at the first time.

    References
    ----------
    See :data:`REFERENCES`.
    """
    from .decompose import decompose
    from .slabs import select_levels

    if not contours:
        raise UsageError("give at least one contour (--box, --circle, --polygon or --follow)")
    wind = select_levels(wind, levels, table="circulation")
    wind = wind.sortby("latitude")
    grid = _Grid(wind.latitude.values, wind.longitude.values)
    timed = "time" in wind.dims
    moving = any(isinstance(c, MovingCircle) for c in contours)
    lines, areas, first = _matrices(grid, contours, wind.time.values if timed else None)
    # the gridded vorticity and divergence only: on a regional grid both schemes take them
    # from the wind alone (flowpipe.regional.partitions), and Lynch's direct partition,
    # which the variational scheme also runs for its harmonic wind, skips that scheme's
    # least-squares solver and its sparse LU of each mask (the command in 0.19 x the time
    # and 0.16 x the memory, benchmarks/bench_circulation_regional.py); a global grid
    # takes the spectral route
    parts = decompose(wind, levels=None, scheme="dirichlet")
    parts = parts.sortby("latitude")
    step = xr.DataArray(np.arange(wind.sizes["time"]), dims="time") if moving else xr.DataArray(0)
    hz = ["latitude", "longitude"]
    outs = xr.apply_ufunc(
        _slab_integrals, wind.u, wind.v, parts.vorticity, parts.divergence, step,
        input_core_dims=[hz] * 4 + [[]], output_core_dims=[["contour"]] * 4,
        kwargs={"lines": lines, "areas": areas}, dask="parallelized",
        output_dtypes=[float] * 4, dask_gufunc_kwargs={"output_sizes": {"contour": len(contours)}},
    )
    circ, flux, zeta_int, delta_int = outs
    a = (xr.DataArray(np.stack([np.asarray(m.sum(axis=1)) for m in areas]), dims=("time", "contour"),
                      coords={"time": wind.time}) if moving
         else xr.DataArray(np.asarray(areas[0].sum(axis=1)), dims="contour"))
    ds = xr.Dataset({
        "circulation": circ, "outward_flux": flux, "area": a,
        "mean_vorticity": circ / a, "mean_divergence": flux / a,
        "mean_vorticity_gridded": zeta_int / a, "mean_divergence_gridded": delta_int / a,
    })
    # relative to the larger of the contour's two gridded means, the scale of its kinematics:
    # the divergence of a non-divergent flow is zero to rounding on both sides, and their
    # difference over it alone meant nothing (a trial saw 3e19 for solid-body rotation)
    scale = np.maximum(abs(ds.mean_vorticity_gridded), abs(ds.mean_divergence_gridded))
    ds["vorticity_disagreement"] = abs(ds.mean_vorticity - ds.mean_vorticity_gridded) / scale
    ds["divergence_disagreement"] = abs(ds.mean_divergence - ds.mean_divergence_gridded) / scale
    pressure = wind.attrs.get("level_type") == "pressure" and "level" in ds.dims
    if pressure:
        pa = wind.level.values * 100.0
        ds["omega"] = xr.apply_ufunc(
            lambda d, **kw: kinematic_omega(divergence=d, **kw),
            ds.mean_divergence.transpose(..., "contour", "level").chunk(-1),  # one task: one warning
            input_core_dims=[["level"]], output_core_dims=[["level"]],
            kwargs={"pressure": pa, "surface": surface_omega,
                    "top": top_omega if obrien else None},
            dask="parallelized", output_dtypes=[float])
        # the base of each column: its lowest level with omega (kinematic_omega)
        ds["omega_base"] = ds.level.where(ds.omega.notnull()).max("level")
    # members lead every flowpipe output; then the instance dimension (CF 1.11 section 2.4)
    ds = ds.transpose(*[d for d in ("realization", "contour") if d in ds.dims], ...,
                      *[d for d in ("time", "level") if d in ds.dims])
    _describe(ds, first, grid, pressure, obrien, surface_omega, top_omega)
    if moving:
        _centres(ds, contours, wind.time)
    from .annotate import global_attrs

    ds.attrs = global_attrs(
        wind, title="flowpipe circulation: line and area integrals of closed contours",
        summary="Circulation and outward flux around closed contours by line integrals, area "
        "means of vorticity and divergence, and the kinematic omega of each contour's column.",
        references=REFERENCES)
    ds.attrs["omega_correction"] = (f"O'Brien (1970), omega = {top_omega} Pa s-1 at the top"
                                    if obrien else "none")
    ds.attrs["surface_omega"] = surface_omega
    return ds


_ATTRS = {
    "circulation": ("m2 s-1", "circulation, counter-clockwise line integral of the wind"),
    "outward_flux": ("m2 s-1", "outward flux of the wind through the contour"),
    "area": ("m2", "area enclosed by the contour"),
    "mean_vorticity": ("s-1", "area-mean relative vorticity from the line integral"),
    "mean_divergence": ("s-1", "area-mean divergence from the line integral"),
    "mean_vorticity_gridded": ("s-1", "area-mean of the gridded relative vorticity"),
    "mean_divergence_gridded": ("s-1", "area-mean of the gridded divergence"),
    "vorticity_disagreement": ("1", "disagreement of line and area mean vorticity, relative to "
                               "the larger of the area mean vorticity and divergence"),
    "divergence_disagreement": ("1", "disagreement of line and area mean divergence, relative to "
                                "the larger of the area mean vorticity and divergence"),
    "omega": ("Pa s-1", "kinematic vertical velocity in pressure coordinates of the column"),
    "omega_base": ("hPa", "pressure of the lowest level of the omega column, where omega is "
                   "surface_omega: the lowest level with complete data up to the top"),
}


def _describe(ds: xr.Dataset, contours, grid, pressure, obrien, surface, top) -> None:
    # each contour's nodes without jumps, a contour round a pole closed along the pole's
    # edge (plane_ring): a simple counter-clockwise polygon for readers that take the
    # coordinates as planar (CF 1.11 section 7.5 orientation); only drawn, the integrals
    # use contour_nodes themselves
    nodes = [_open(*plane_ring(*_continuous(*contour_nodes(
        c, max(grid.step * SAMPLES_PER_SPACING, 1.0))))) for c in contours]
    node_lon = np.concatenate([n[0] for n in nodes])
    node_lat = np.concatenate([n[1] for n in nodes])
    ds["node_count"] = xr.DataArray(np.array([len(n[0]) for n in nodes], dtype="i4"),
                                    dims="contour", attrs={"long_name": "count of nodes per contour",
                                                           "units": "1"})
    ds["node_latitude"] = xr.DataArray(node_lat, dims="node", attrs={
        "units": "degrees_north", "standard_name": "latitude", "axis": "Y"})
    ds["node_longitude"] = xr.DataArray(node_lon, dims="node", attrs={
        "units": "degrees_east", "standard_name": "longitude", "axis": "X"})
    ds["contour_geometry"] = xr.DataArray(np.int32(0), attrs={
        "geometry_type": "polygon", "node_count": "node_count",
        "node_coordinates": "node_longitude node_latitude"})
    ds["contour_name"] = xr.DataArray(np.array([c.name for c in contours], dtype=object),
                                      dims="contour", attrs={"long_name": "name of the contour",
                                                             "cf_role": "timeseries_id"})
    for name, (units, long_name) in _ATTRS.items():
        if name in ds:
            ds[name].attrs = {"units": units, "long_name": long_name,
                              "geometry": "contour_geometry", "coordinates": "contour_name"}
    if "omega" in ds:
        ds["omega"].attrs["standard_name"] = "lagrangian_tendency_of_air_pressure"
        ds["omega"].attrs["comment"] = (
            f"integrated upward from the column's base (omega_base, where omega = {surface} "
            "Pa s-1): the lowest level, or where the contour misses data at the lowest "
            "levels the lowest level with complete data up to the top; missing below it"
            + (f"; O'Brien (1970) correction to {top} Pa s-1 at the top" if obrien else ""))
        ds["omega"].attrs["ancillary_variables"] = "omega_base"
        ds["omega_base"].attrs["comment"] = "missing where the contour misses data at the top level"
    ds["vorticity_disagreement"].attrs["comment"] = "quality figure of mean_vorticity"
    ds["divergence_disagreement"].attrs["comment"] = "quality figure of mean_divergence"


def _continuous(lat: np.ndarray, lon: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    return lat, continuous_longitudes(lon)


def _open(x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """A planar ring without its last node when that repeats the first (CF-1.11 section
    7.5 closes polygons implicitly)."""
    same = np.isclose(x[-1], x[0], rtol=0, atol=1e-9) and np.isclose(y[-1], y[0], rtol=0,
                                                                       atol=1e-9)
    return (x[:-1], y[:-1]) if same else (x, y)


def _centres(ds: xr.Dataset, contours, time: xr.DataArray) -> None:
    """``centre_latitude`` / ``centre_longitude`` (contour, time) and ``radius`` (contour) of
    circles, fixed or moving: with the radius, the centre gives each circle at every time."""
    lat = np.full((time.size, len(contours)), np.nan)
    lon = np.full_like(lat, np.nan)
    radius = np.full(len(contours), np.nan)
    for k, c in enumerate(contours):
        if isinstance(c, MovingCircle):
            lat[:, k], lon[:, k] = c.centre(time.values)
            radius[k] = c.radius_km * 1e3
        elif c.kind == "circle":
            lat[:, k], lon[:, k] = c.params[0], (c.params[1] + 180.0) % 360.0 - 180.0
            radius[k] = c.params[2] * 1e3
    note = ("circles only (NaN for boxes and polygons); the contour geometry shows each "
            "circle at the first time")
    ds["radius"] = xr.DataArray(radius, dims="contour", attrs={
        "units": "m", "long_name": "great-circle radius of the circle", "comment": note})
    ds["centre_latitude"] = xr.DataArray(lat.T, dims=("contour", "time"), attrs={
        "units": "degrees_north", "long_name": "latitude of the circle's centre", "comment": note})
    ds["centre_longitude"] = xr.DataArray(lon.T, dims=("contour", "time"), attrs={
        "units": "degrees_east", "long_name": "longitude of the circle's centre", "comment": note})
