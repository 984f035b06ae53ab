"""The picture of a circulation output (``flowpipe circulation``), for :func:`maps.render`.

Left, a map of the contours, each filled with its area mean (mean vorticity by
default, or mean divergence, or any other variable per contour) at one time and
level, on a diverging scale centred on zero; a moving circle is drawn where it is
at that time, with the track of its centre. Right, one time-pressure section per
contour (the first :data:`SECTIONS`): mean divergence filled, kinematic omega
contoured (dashed where negative, rising air), time along x, pressure decreasing
upward.
"""

from __future__ import annotations

import cartopy.crs as ccrs
import matplotlib
import matplotlib.dates as mdates
import numpy as np
import shapely
import xarray as xr
from matplotlib import patheffects
from matplotlib.cm import ScalarMappable
from matplotlib.colors import BoundaryNorm, Colormap
from matplotlib.figure import Figure
from matplotlib.patches import PathPatch
from matplotlib.path import Path
from shapely.geometry import Polygon as ShapelyPolygon

from .contours import circle, contour_nodes, plane_ring
from .errors import InputError
from .maps import (
    DIVERGING,
    _colour_bar,
    _contour_levels,
    _domain_projection,
    _label_bar,
    _map_axes,
    _members,
    _rounding_level,
    _select,
    _split_at,
    _units_text,
)

#: Sections drawn at most (the first contours of the file).
SECTIONS = 6
#: Where the map goes (figure fraction), leaving the right for the sections.
MAP_BOX = (0.05, 0.08, 0.5, 0.8)
#: Left edge, width, bottom and top of the column of sections (figure fraction).
SECTION_COLUMN = (0.67, 0.23, 0.08, 0.88)
#: Default variable of the map, and the variables of the sections.
DEFAULT_FIELD = "mean_vorticity"
FILLED, LINES = "mean_divergence", "omega"
#: Node spacing (degrees) of a moving circle redrawn at the chosen time.
NODE_STEP = 0.25


def circulation_figure(fig: Figure, ds: xr.Dataset, label: str, field: str | None,
                       level: float | None, when: tuple[str | None, str | None, float | None],
                       projection, member: int | None = None) -> None:
    """Draw the map of the contours and their time-pressure sections into ``fig``; of an
    ensemble, those of one member (``member``, default the first)."""
    name, rows = _members(ds, tuple(ds.dims), label, member)
    chosen = []
    if name is not None:
        ds = ds.isel({name: int(rows[0])})
        chosen = [f"member {ds[name].values}"]
    choices = [str(n) for n in ds.data_vars if "contour" in ds[n].dims
               and ds[n].dtype.kind == "f" and set(ds[n].dims) <= {"contour", "time", "level"}]
    field = field or DEFAULT_FIELD
    if field not in choices:
        raise InputError(f"{label}: no variable {field!r} per contour; choose one of "
                         f"{', '.join(choices)}")
    da = ds[field]
    indexers, words = _select(ds, da, label, level, when)
    words += chosen
    values = np.asarray(da.isel(indexers).transpose("contour", ...).values, float).reshape(-1)
    values = _above_rounding(ds, da, field, values, lambda name: ds[name].isel(indexers))
    names = [str(n) for n in ds["contour_name"].values]
    rings = _rings(ds, indexers.get("time"))
    lat = np.concatenate([r[0] for r in rings])
    lon = np.concatenate([r[1] for r in rings])
    proj, extent = _domain_projection(lat, lon, projection)
    ax = _map_axes(fig, proj, extent, box=MAP_BOX)
    finite = values[np.isfinite(values)]
    top = float(np.abs(finite).max()) if finite.size else 1.0
    levels = _contour_levels(-top, top, signed=True)
    norm = BoundaryNorm(levels, 256)
    drawn = [(parts, value, name, ring) for ring, value, name
             in zip(rings, values, names, strict=True)
             if (parts := _drawn(proj, *ring))]  # (none: off this map)
    # the largest first, so that a contour inside another (a small circle on the pole in
    # a cap round it) is drawn over it and stays in sight
    drawn.sort(key=lambda item: -sum(ShapelyPolygon(xy).area for xy in item[0]))
    for parts, value, name, ring in drawn:
        colour = _cmap()(norm(value)) if np.isfinite(value) else "none"
        ax.add_patch(PathPatch(Path.make_compound_path(*[Path(xy, closed=True) for xy in parts]),
                               facecolor=colour, edgecolor="none", zorder=2, label=name))
        for piece in _outline(*ring):
            ax.plot(piece[:, 0], piece[:, 1], transform=ccrs.PlateCarree(), color="black",
                    linewidth=1.0, zorder=2.5, label=f"outline of {name}")
        xyz = max(parts, key=lambda xy: ShapelyPolygon(xy).area)
        top = xyz[np.argmax(xyz[:, 1])]  # the name just inside the contour's top
        ax.text(xyz[:, 0].mean(), top[1], name, fontsize=7, ha="center", va="top", zorder=4,
                path_effects=[patheffects.withStroke(linewidth=2.0, foreground="white")])
    if "centre_latitude" in ds:
        _tracks(ax, ds, proj)
    bar = _colour_bar(fig, ax, ScalarMappable(norm=norm, cmap=_cmap()))
    described = str(da.attrs.get("long_name") or field)
    _label_bar(bar, described, str(da.attrs.get("units", "")),
               float(np.abs(norm.boundaries[[0, -1]]).max()), fontsize=8)
    zero = "" if np.any(values[np.isfinite(values)]) else ": zero to rounding"
    ax.set_title(f"{described[:1].upper() + described[1:]}{zero}\n{' | '.join(words)}",
                 loc="left", fontsize=10)
    if {"time", "level"} <= set(ds.dims) and FILLED in ds:
        _sections(fig, ds)


def _drawn(proj: ccrs.Projection, lat: np.ndarray, lon: np.ndarray) -> list[np.ndarray]:
    """The map coordinates of a contour: the outer rings of the parts it makes on ``proj``.

    The contour's region in the longitude-latitude plane (:func:`contours.plane_ring`:
    a contour round a pole closed along the pole) is projected by cartopy, which cuts
    it at the map's edge (a box across the date line on a map centred elsewhere makes
    two parts) and closes a cap along a straight pole line; pieces it cut along the
    pole ring's own seam are joined again, and the holes of slivers it may leave there
    dropped (a contour encloses no hole).
    """
    x, y = plane_ring(lat, lon)
    projected = proj.project_geometry(ShapelyPolygon(np.column_stack([x, y])),
                                      ccrs.PlateCarree())
    # (2-D: the parts of a ring cut at the map edge may come back with a third coordinate)
    merged = shapely.force_2d(shapely.union_all([shapely.make_valid(g)
                                                 for g in shapely.get_parts(projected)]))
    return [np.asarray(g.exterior.coords) for g in shapely.get_parts(merged)
            if g.geom_type == "Polygon" and g.area > 0]


def _above_rounding(ds: xr.Dataset, da: xr.DataArray, field: str, values: np.ndarray,
                    slab, depth: float = 0.0) -> np.ndarray:
    """``values`` with those that are zero to rounding (:func:`maps._rounding_level`, against
    the contours' variables of the same units: a mean divergence against the mean
    vorticity) set to zero. ``depth`` (Pa) gives a vertical integral of the mean divergence
    (omega) the rounding of that divergence times the depth integrated over as well."""
    rounding, _ = _rounding_level(ds, da, field, values, slab)
    if depth:
        below, _ = _rounding_level(ds, ds[FILLED], FILLED, np.asarray(slab(FILLED).values,
                                                                     float), slab)
        rounding = max(rounding, below * depth)
    return np.where(np.abs(values) <= rounding, 0.0, values)


def _outline(lat: np.ndarray, lon: np.ndarray) -> list[np.ndarray]:
    """The edge of a contour to draw, as pieces of (longitude, latitude) nodes: its ring
    in the longitude-latitude plane (:func:`contours.plane_ring`) closed, less the
    segments to or along a pole, where the ring of a polar cap closes in the plane but
    the region has no edge on the sphere (drawn, a spoke from the pole on a polar map)."""
    x, y = plane_ring(lat, lon)
    ring = np.column_stack([np.append(x, x[:1]), np.append(y, y[:1])])
    at_pole = np.abs(ring[:, 1]) >= 90.0 - 1e-9
    return _split_at(ring, at_pole[:-1] | at_pole[1:])


def _cmap() -> Colormap:
    """The diverging colour map of :mod:`flowpipe.maps`."""
    return matplotlib.colormaps[DIVERGING]


def _rings(ds: xr.Dataset, time: int | None) -> list[tuple[np.ndarray, np.ndarray]]:
    """Latitude and longitude of each contour's nodes; moving circles at ``time``."""
    counts = np.asarray(ds["node_count"].values, int)
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
    node_lat = np.asarray(ds["node_latitude"].values, float)
    node_lon = np.asarray(ds["node_longitude"].values, float)
    rings = [(node_lat[s:s + n], node_lon[s:s + n]) for s, n in zip(starts, counts, strict=True)]
    if "radius" in ds and "centre_latitude" in ds and time is not None:
        lat = ds["centre_latitude"].isel(time=time).values
        lon = ds["centre_longitude"].isel(time=time).values
        for k, (la, lo, r) in enumerate(zip(lat, lon, ds["radius"].values, strict=True)):
            if np.isfinite(r):
                ring = contour_nodes(circle(float(la), float(lo), float(r) / 1e3), NODE_STEP)
                rings[k] = (ring[0][:-1], ring[1][:-1])
    return rings


def _tracks(ax, ds: xr.Dataset, proj) -> None:
    """The track of each moving circle's centre (dashed, a dot at every time)."""
    for k in range(ds.sizes["contour"]):
        lat = ds["centre_latitude"].isel(contour=k).values
        lon = ds["centre_longitude"].isel(contour=k).values
        if np.isfinite(lat).all() and np.ptp(lat) + np.ptp(lon) > 0:
            xy = proj.transform_points(ccrs.Geodetic(), lon, lat)[:, :2]
            ax.plot(xy[:, 0], xy[:, 1], "--", color="black", linewidth=0.8, marker=".",
                    markersize=4, zorder=3, label=f"track {ds['contour_name'].values[k]}")


def _sections(fig: Figure, ds: xr.Dataset) -> None:
    """Time-pressure sections: mean divergence filled, omega contoured, pressure upward."""
    count = min(ds.sizes["contour"], SECTIONS)
    left, width, bottom, top = SECTION_COLUMN
    gap = 0.035
    height = (top - bottom - gap * (count - 1)) / count
    order = np.argsort(ds["level"].values)[::-1]  # high pressure first: at the bottom
    pressure = ds["level"].values[order]
    times = mdates.date2num(ds["time"].values)
    def slab(name: str) -> xr.DataArray:
        return ds[name].isel(contour=slice(0, count))

    div = slab(FILLED).transpose("contour", "level", "time")
    div = _above_rounding(ds, ds[FILLED], FILLED, np.asarray(div.values, float)[:, order], slab)
    top_value = float(np.nanmax(np.abs(div))) if np.isfinite(div).any() else 1.0
    levels = _contour_levels(-top_value, top_value, signed=True)
    norm = BoundaryNorm(levels, 256)
    omega = None
    if LINES in ds:  # omega = omega at the base - the integral of the divergence over p
        depth = 100.0 * float(np.ptp(pressure))  # hPa -> Pa
        omega = _above_rounding(ds, ds[LINES], LINES, np.asarray(slab(LINES).transpose(
            "contour", "level", "time").values, float)[:, order], slab, depth)
    names = [str(n) for n in ds["contour_name"].values[:count]]
    mappable = None
    for k in range(count):
        ax = fig.add_axes((left, top - (k + 1) * height - k * gap, width, height))
        ax.set_label(f"section {names[k]}")
        if len(times) > 1 and len(pressure) > 1:
            mappable = ax.contourf(times, pressure, div[k], levels=levels, norm=norm,
                                   cmap=_cmap())
        else:  # one time or one level: cells, not contours
            mappable = ax.pcolormesh(times, pressure, div[k], norm=norm, cmap=_cmap(),
                                     shading="nearest")
        if omega is not None and len(times) > 1 and len(pressure) > 1 and \
                np.isfinite(omega[k]).any() and np.nanmax(omega[k]) > np.nanmin(omega[k]):
            lines = ax.contour(times, pressure, omega[k], colors="black", linewidths=0.8,
                               levels=_contour_levels(float(np.nanmin(omega[k])),
                                                      float(np.nanmax(omega[k])), signed=True))
            lines.set_label("omega")
            ax.clabel(lines, fontsize=6, fmt="%.3g")
        ax.set_ylim(pressure.max(), pressure.min())  # pressure decreases upward
        ax.set_title(names[k] if np.any(div[k][np.isfinite(div[k])]) else
                     f"{names[k]}: divergence zero to rounding", fontsize=8, loc="left")
        ax.tick_params(labelsize=6)
        ax.set_ylabel("hPa", fontsize=7)
        locator = mdates.AutoDateLocator(maxticks=5)
        ax.xaxis.set_major_locator(locator)
        ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))
        ax.xaxis.get_offset_text().set_fontsize(6)
        if k < count - 1:
            ax.tick_params(labelbottom=False)
    bar = fig.colorbar(mappable, cax=fig.add_axes((left + width + 0.015, bottom, 0.012,
                                                   top - bottom)))
    bar.ax.tick_params(labelsize=6)
    _label_bar(bar, "mean divergence", "s-1", float(np.abs(norm.boundaries[[0, -1]]).max()),
               after=f"; contours: omega ({_units_text('Pa s-1')}), dashed < 0", fontsize=7)
    if ds.sizes["contour"] > count:
        fig.text(left, 0.02, f"sections of the first {count} of {ds.sizes['contour']} contours",
                 fontsize=7)
