"""Maps of flowpipe outputs, and of any CF file with a mappable field.

Two kinds of figure:

* a **field map**: one horizontal slab of a scalar field in filled contours
  with a colour bar; signed quantities on a diverging colour map centred on
  zero, magnitudes on a sequential one; the matching wind (rotational with
  streamfunction and vorticity, divergent with velocity potential and
  divergence, the full wind with anything else) as thinned arrows with a
  reference arrow;
* a **track map** of a CF trajectory file (``featureType = "trajectory"``):
  each track coloured by its pressure, height or elapsed time (or any sampled
  variable), start points marked.

The projection follows the domain: the whole globe (Equal Earth), a polar cap
(polar stereographic) or a limited area (Lambert azimuthal equal-area centred
on the domain). Coastlines come from GSHHS data already on disk; nothing is
ever downloaded, and without coastline data the map is drawn without them,
with a :class:`MapWarning`.
"""

from __future__ import annotations

import functools
import os
import re
import warnings
from collections.abc import Hashable, Iterable
from pathlib import Path

import cartopy
import cartopy.crs as ccrs
import cartopy.feature as cfeature
import cf_xarray  # noqa: F401  (registers the .cf accessor)
import matplotlib.axes
import numpy as np
import shapefile  # (pyshp, cartopy's shapefile reader)
import xarray as xr
from cartopy.util import add_cyclic_point
from matplotlib import patheffects
from matplotlib.collections import LineCollection
from matplotlib.colors import Normalize
from matplotlib.figure import Figure
from matplotlib.path import Path as MplPath
from matplotlib.ticker import MaxNLocator
from shapely.geometry import LineString

from ._version import __version__
from .annotate import CAUTION_SHORT, iso_time
from .choices import PROJECTIONS, SCHEMES
from .errors import FlowpipeWarning, InputError, UsageError
from .ingest import (
    as_timedelta,
    canonical_levels,
    find_coordinate,
    forecast_pieces,
    forecast_variable,
    is_grib,
    is_zarr_store,
    lead_hours,
    names_text,
    open_store,
    open_wind,
    parse_iso,
    run_text,
    variable_named,
)
from .store import atomic_path

#: Where Debian's python-cartopy-data puts Natural Earth and GSHHS files.
COASTLINE_DIRS: tuple[str, ...] = ("/usr/share/cartopy/data",)
#: The coarse GSHHS shoreline file, relative to a cartopy data directory.
GSHHS_COARSE = Path("shapefiles", "gshhs", "c", "GSHHS_c_L1.shp")

#: Colour maps shipped with matplotlib: cividis, perceptually uniform and optimised for
#: colour-vision deficiency (Nunez, Anderton & Renslow 2018, PLoS ONE 13, e0199239);
#: coolwarm, a diverging map of even perceptual steps from blue through a light grey
#: centre to red (Moreland 2009, "Diverging color maps for scientific visualization",
#: ISVC 2009, LNCS 5876, 92-103), so that values near zero are pale and the zero line
#: is soft (the dark centre of berlin, used before, made small positive and negative
#: values look alike and the zero line a hard edge: a trial's finding).
SEQUENTIAL = "cividis"
DIVERGING = "coolwarm"
TRACKS = "viridis"

#: Fields that are signed by nature, whatever the values in one slab.
SIGNED = ("streamfunction", "velocity_potential", "vorticity", "divergence",
          "atmosphere_horizontal_streamfunction", "atmosphere_horizontal_velocity_potential",
          "atmosphere_relative_vorticity", "divergence_of_wind", "eastward_wind",
          "northward_wind")

#: The wind drawn over each contract field (the part of the wind it describes).
WIND_FOR = {
    "streamfunction": ("u_rotational", "v_rotational"),
    "vorticity": ("u_rotational", "v_rotational"),
    "velocity_potential": ("u_divergent", "v_divergent"),
    "divergence": ("u_divergent", "v_divergent"),
}
#: Fields of a variational split that carry a share of the harmonic flow (the rotational and
#: divergent parts, which alone add up to the wind), and the share of the slab's kinetic
#: energy in that harmonic flow (``harmonic_energy_share``) above which a map says so: then
#: most of the energy is in a part that the boundary, not the data, decides, shared evenly
#: between the two (a solid-body rotation gets a divergent wind of half its speed).
SHARED_HARMONIC = ("streamfunction", "velocity_potential", "u_rotational", "v_rotational",
                   "u_divergent", "v_divergent")
HARMONIC_SHARE = 0.5
#: Preferred default fields of a decomposition file, in order.
DEFAULT_FIELDS = ("streamfunction", "velocity_potential", "vorticity", "divergence")

#: Longitude span (degrees) from which a domain counts as going round the globe.
WRAP_SPAN = 330.0
#: Where the map goes in the figure (left, bottom, width, height, figure fraction):
#: room for gridline labels on the left and below, the colour bar on the right,
#: the title above and the footer below.
MAP_BOX = (0.07, 0.06, 0.78, 0.84)
#: The colour bar, in the map's own axes fraction (it follows the map's drawn size).
COLOUR_BAR_BOX = (1.03, 0.0, 0.025, 1.0)

#: Widest limited area (degrees of longitude or latitude) drawn on an azimuthal map.
AREA_SPAN = 120.0
#: Arrows on a map, about: evenly spaced on the sphere whatever the domain's shape.
ARROWS = 400
#: Where the reference arrow goes (the map's axes fraction): under the colour bar, out of
#: the way of the title above the map, however long that is (a trial saw a long title
#: run into the key when it stood above the map's right corner).
WIND_KEY = (1.04, -0.05)

#: One knot in m s-1: the international nautical mile of 1852 m per hour (exact by
#: definition; BIPM SI Brochure, 9th ed., 2019, table 8 - from memory).
KNOT = 1852.0 / 3600.0
#: Start markers drawn at most (every k-th start beyond).
MAX_STARTS = 200
#: Tracks whose time marks are labelled with their hours.
LABELLED_TRACKS = 3
#: End markers by trajectory status (flowpipe.parcels status flags): marker, fill from
#: the colour-blind-safe palette of Okabe & Ito (2008, "Color Universal Design").
END_MARKERS = {
    "completed": ("s", "white"),
    "left_domain": ("X", "#e69f00"),
    "reached_lowest_level": ("v", "#56b4e9"),
    "reached_highest_level": ("^", "#56b4e9"),
    "met_missing_wind": ("D", "#cc79a7"),
}

#: Relative rounding level of a field, by the bytes of the type it is stored in:
#: about ten times the unit roundoff of binary32 (6e-8) for single precision; for
#: double, the accuracy the spectral decomposition holds on analytic winds
#: (1e-10 of the wind, tests/test_decompose.py). *Common practice.*
ROUNDING = {4: 1e-6, 8: 1e-10}
#: Whole-integration stretch that a finite-time Lyapunov exponent resolves: an exponent
#: lambda with |lambda| T below it (lengths within 1 % of their start after the time T)
#: is zero to the stencil's accuracy. The exponent is ln(stretch) / T, so its scale is
#: 1 / T, not its own largest value (the noise itself where nothing stretches). On a rigid
#: rotation, an isometry, flowpipe's exponents reach |lambda| T = 1.4e-3 over 48 h on a
#: 2-degree wind (the case of tests/test_ftle.py); this leaves a sevenfold margin for
#: coarser winds and still draws exponents of 1e-7 s-1 over a day, a hundredth of those
#: of the Rossby-Haurwitz wave there.
FTLE_STRETCH = 1e-2
#: Share of a slab's valid points at each end that may lie beyond the colour scale, drawn
#: in its end colours and marked by the colour bar's arrows: a handful of extremes (a
#: cyclone's core, the lee of a mountain) would otherwise set the scale and leave the rest
#: of the map in its middle colours (common practice).
BEYOND_SCALE = 1e-3


class MapWarning(FlowpipeWarning):
    """A map was drawn without something it would normally have (coastlines)."""


def render(
    source: str | os.PathLike | xr.Dataset,
    field: str | None = None,
    level: float | None = None,
    time: str | None = None,
    projection: str | ccrs.Projection | None = None,
    size: tuple[int, int] = (1200, 800),
    *,
    run: str | None = None,
    lead: float | None = None,
    member: int | None = None,
    dpi: int = 100,
    barbs: bool = False,
    marks_hours: float = 6.0,
) -> Figure:
    """Draw a map of a file or Dataset and return the matplotlib figure.

    Parameters
    ----------
    source : path or xarray.Dataset
        A flowpipe output, or any CF file whose field has latitude and
        longitude coordinates; a CF trajectory file gives a track map.
    field : str, optional
        The variable to map (default: streamfunction, velocity potential,
        vorticity or divergence, whichever comes first, else the first
        mappable variable). For tracks, a sampled variable to colour them by.
        By flowpipe's name or, where flowpipe renamed a variable on reading, by
        the name the input file gave it (``u10`` of a GRIB file's ``u``).
    level : float, optional
        Value of the vertical coordinate, in the file's units (default: the first).
    time : str, optional
        Valid time, ISO 8601 (default: the first).
    projection : str or cartopy projection, optional
        One of :data:`PROJECTIONS` or a cartopy projection (default: from the domain).
    size : (int, int)
        Width and height of the image in pixels.
    dpi : int
        Pixels per inch (sets the size of text and lines relative to the image).
    run : str, optional
        Forecast run (``forecast_reference_time``), ISO 8601 or ``"latest"``.
    lead : float, optional
        Lead time (``forecast_period``) in hours. With ``run`` and ``time``, the
        first time that matches all that are given is drawn; the title names
        the run and lead of forecasts ("run 2026-12-01T00Z +24 h, valid ...").
    barbs : bool
        Draw the wind as barbs in knots instead of arrows (the meteorological
        convention, *common practice*: a pennant 50 kn, a full barb 10 kn, a
        half barb 5 kn; matplotlib's ``barbs`` increments).
    marks_hours : float
        Track maps: a dot on each track every this many hours of travel,
        labelled on the first few tracks.
    member : int, optional
        Ensemble member (value of the ``realization`` coordinate) to draw: its
        field (default: the first member), or only its tracks (default: the
        tracks of every member).

    Returns
    -------
    matplotlib.figure.Figure

    Raises
    ------
    flowpipe.errors.InputError
        Unknown field, level or time (the message lists those available), or
        no latitude/longitude coordinates to map.
    flowpipe.errors.UsageError
        Unknown projection name, or level/time given for a track map.
    """
    ds, label = _open(source)
    width, height = size
    fig = Figure(figsize=(width / dpi, height / dpi), dpi=dpi)
    try:
        if str(ds.attrs.get("featureType", "")).lower() == "trajectory":
            if level is not None or time is not None or run is not None or lead is not None:
                raise UsageError(f"{label}: level, time, run and lead do not apply to a "
                                 "trajectory file; leave them out")
            _track_map(fig, ds, label, field, projection, marks_hours, member)
        elif "contour" in ds.dims and "node_count" in ds:  # a circulation output
            from .maps_circulation import circulation_figure

            circulation_figure(fig, ds, label, field, level, (time, run, lead), projection,
                               member)
        else:
            _field_map(fig, ds, label, field, level, (time, run, lead), projection, barbs,
                       member)
    finally:  # the figure holds plain arrays: close the file opened here (HDF5 handles
        if not isinstance(source, xr.Dataset):  # left to the garbage collector can make
            ds.close()  # a later open of the same file fail with "HDF error")
    fig.text(0.005, 0.005, f"{Path(label).name} | flowpipe {__version__} | {CAUTION_SHORT}",
             fontsize=6, color="0.3", ha="left", va="bottom")
    return fig


def save(fig: Figure, path: str | os.PathLike, protect: Iterable[str | os.PathLike] = ()) -> Path:
    """Write a figure atomically, at the figure's own size, in the format its suffix names.

    Raises
    ------
    flowpipe.errors.UsageError
        For a suffix that is not one of :func:`image_formats`.
    """
    fmt = image_format(path)
    with atomic_path(path, protect) as tmp:
        fig.savefig(tmp, format=fmt, dpi=fig.dpi)
    return Path(path)


def image_formats() -> dict[str, str]:
    """The image formats matplotlib writes here, by file suffix (``png``, ``pdf``, ``svg``, ...)."""
    return Figure().canvas.get_supported_filetypes()


def image_format(path: str | os.PathLike) -> str:
    """The format of an image file name, from its suffix; refused when matplotlib cannot
    write it (one-line :class:`~flowpipe.errors.UsageError`)."""
    suffix = Path(path).suffix.lower().lstrip(".")
    formats = image_formats()
    if suffix not in formats:
        given = f".{suffix} is not one of them" if suffix else "the name has no suffix"
        raise UsageError(f"{path}: a map is written as {', '.join('.' + f for f in formats)}; "
                         f"{given}: end the name in .png, say")
    return suffix


def _open(source: str | os.PathLike | xr.Dataset) -> tuple[xr.Dataset, str]:
    if isinstance(source, xr.Dataset):
        inputs = str(source.attrs.get("input_files", "")).splitlines()
        name = source.encoding.get("source") or (inputs[0] if inputs else None)
        return source, Path(str(name)).name if name else str(source.attrs.get("title", "dataset"))
    path = Path(source)
    if not path.is_file() and not is_zarr_store(path):
        raise InputError(f"{path}: no such file")
    if is_grib(path):  # a model's GRIB output: its wind, in the canonical form
        return open_wind(path), str(path)
    # a forecast file by lead, or by runs x leads: the valid time as the dimension, with
    # the run and lead along it, as ingest reads it for the other commands
    pieces = forecast_pieces(open_store(path), path)
    if len(pieces) == 1:
        return pieces[0], str(path)
    return xr.concat(pieces, dim="time", data_vars="minimal", coords="different",
                     compat="equals", join="outer"), str(path)


# ---------------------------------------------------------------- coordinates

def _horizontal(ds: xr.Dataset, da: xr.DataArray) -> tuple[Hashable, Hashable] | None:
    lat = find_coordinate(ds, da, "latitude", "Y")
    lon = find_coordinate(ds, da, "longitude", "X")
    if lat is None or lon is None or ds[lat].ndim != 1 or ds[lon].ndim != 1:
        return None
    return lat, lon


def _mappable(ds: xr.Dataset) -> list[str]:
    return [str(n) for n in ds.data_vars if _horizontal(ds, ds[n]) is not None]


def _forecast_along(ds: xr.Dataset, tname: Hashable, label: str
                    ) -> tuple[np.ndarray | None, np.ndarray | None]:
    """The run and the lead (hours) of each time of ``tname``, where the file says them."""
    n = ds[tname].size
    ref = forecast_variable(ds, "forecast_reference_time")
    per = forecast_variable(ds, "forecast_period")
    along = ({tname} if tname in ds.dims else set())
    runs = (np.broadcast_to(ds[ref].values, (n,)) if ref is not None and
            set(ds[ref].dims) <= along else None)
    hours = (np.broadcast_to(lead_hours(as_timedelta(ds[per], Path(label), per).values), (n,))
             if per is not None and set(ds[per].dims) <= along else None)
    if hours is None and runs is not None and np.issubdtype(runs.dtype, np.datetime64):
        hours = lead_hours(ds[tname].values.ravel() - runs)
    return runs, hours


def _wanted_run(run: str, runs: np.ndarray, label: str) -> object:
    """The run ``run`` names: ``"latest"`` or ISO 8601 (None when absent)."""
    if run == "latest":
        return max(runs)
    wanted = parse_iso(run, f"{label}: run")
    return next((r for r in runs if iso_time(r, "minutes") == wanted), None)


def _forecast_text(runs: np.ndarray | None, hours: np.ndarray | None, index: int,
                   title: bool = False) -> str:
    """``run 2026-12-01T00Z +24 h, `` for a title, `` (run ... +24 h)`` in a list."""
    if runs is None and hours is None:
        return ""
    parts = ([f"run {run_text(runs[index])}"] if runs is not None else []) + (
        [f"+{hours[index]:g} h"] if hours is not None else [])
    return f"{' '.join(parts)}, " if title else f" ({' '.join(parts)})"


def _select(ds: xr.Dataset, da: xr.DataArray, label: str, level: float | None,
            when: tuple[str | None, str | None, float | None]) -> tuple[dict, list[str]]:
    """Indexers of one horizontal slab, and words for the title; ``when`` is the valid
    time, the run and the lead asked for."""
    time, run, lead = when
    indexers: dict = {}
    words: list[str] = []
    vertical = find_coordinate(ds, da, "vertical", "Z")
    if vertical is not None and vertical in da.dims:
        # in hPa or m, as everywhere in flowpipe (inputs may say Pa or km)
        values, kind = canonical_levels(ds[vertical].values, ds[vertical].attrs.get("units"))
        units = {"pressure": "hPa", "height": "m"}.get(kind, ds[vertical].attrs.get("units", ""))
        if level is None:
            index = 0
        else:
            hits = np.flatnonzero(np.isclose(values, level, rtol=1e-6, atol=1e-9))
            if not hits.size:  # also in the file's own units (a level copied from it)
                hits = np.flatnonzero(np.isclose(ds[vertical].values, level, rtol=1e-6,
                                                 atol=1e-9))
            if not hits.size:
                available = ", ".join(f"{x:g}" for x in values)
                raise InputError(f"{label}: level {level:g} is not in {da.name}; available "
                                 f"levels ({units}): {available}")
            index = int(hits[0])
        indexers[vertical] = index
        words.append(f"{values[index]:g} {units}".strip())
    elif level is not None:
        raise InputError(f"{label}: {da.name} has no vertical coordinate; leave out the level")
    elif vertical is not None and ds[vertical].size == 1:  # a field on one level: 10 m, say
        words.append(_one_level(ds[vertical]))
    tname = find_coordinate(ds, da, "time", "T")
    if tname is not None and tname in da.dims:
        texts = [iso_time(t, "minutes") for t in ds[tname].values]
        runs, hours = _forecast_along(ds, tname, label)
        chosen = [i for i in range(len(texts))
                  if (time is None or texts[i] == parse_iso(time, f"{label}: time")) and
                  (run is None or (runs is not None and runs[i] == _wanted_run(run, runs, label)))
                  and (lead is None or (hours is not None and abs(hours[i] - lead) < 1e-6))]
        if not chosen:
            given = ", ".join(f"{what} {value}" for what, value in (
                ("time", time), ("run", run), ("lead", None if lead is None else f"{lead:g} h"))
                if value is not None)
            available = [f"{texts[i]}{_forecast_text(runs, hours, i)}" for i in range(len(texts))]
            raise InputError(f"{label}: no time of {da.name} with {given}; available times: "
                             f"{', '.join(available)}")
        index = chosen[0]
        indexers[tname] = index
        words.append(f"{_forecast_text(runs, hours, index, title=True)}valid {texts[index]}")
    elif tname is not None and ds[tname].size == 1:
        runs, hours = _forecast_along(ds, tname, label)
        words.append(f"{_forecast_text(runs, hours, 0, title=True)}valid "
                     f"{iso_time(ds[tname].values.ravel()[0], 'minutes')}")
    elif time is not None or run is not None or lead is not None:
        raise InputError(f"{label}: {da.name} has no time coordinate; leave out the time, "
                         "run and lead")
    return indexers, words


# ---------------------------------------------------------------- projection

def _lon_span(lon: np.ndarray) -> tuple[float, float]:
    """Centre and span (degrees) of longitudes, across the date line if need be."""
    wrapped = np.sort(np.mod(lon[np.isfinite(lon)], 360.0))
    gaps = np.diff(np.append(wrapped, wrapped[0] + 360.0))
    widest = int(np.argmax(gaps))
    start = wrapped[(widest + 1) % wrapped.size]
    span = 360.0 - gaps[widest]
    return float(np.mod(start + span / 2 + 180.0, 360.0) - 180.0), float(span)


def _domain_projection(lat: np.ndarray, lon: np.ndarray, name: str | ccrs.Projection | None,
                       step: float = 0.0) -> tuple[ccrs.Projection, list[float] | None]:
    """The projection for points spread over ``lat``/``lon``, and the extent to show.

    ``step`` is the grid spacing, so that a grid with one column short of 360
    degrees still counts as going round the globe.
    """
    if isinstance(name, ccrs.Projection):
        return name, None
    name = name or "auto"
    if name not in PROJECTIONS:
        raise UsageError(f"projection {name!r} is unknown; choose one of {', '.join(PROJECTIONS)}")
    lat = lat[np.isfinite(lat)]
    centre_lon, span = _lon_span(lon)
    south, north = float(lat.min()), float(lat.max())
    if name == "auto":
        if span + step < WRAP_SPAN and span <= AREA_SPAN and north - south <= AREA_SPAN:
            name = "area"
        elif span + step < WRAP_SPAN:
            name = "globe"  # too wide for one azimuthal view: the globe, centred on it
        elif south >= 0.0:  # a hemisphere or a cap round the north pole
            name = "north-cap"
        elif north <= 0.0:
            name = "south-cap"
        else:
            name = "globe"
    if name == "globe":
        return ccrs.EqualEarth(central_longitude=centre_lon if span < WRAP_SPAN else 0.0), None
    if name in ("north-cap", "south-cap"):
        north_cap = name == "north-cap"
        edge = (min(max(south, 0.0), 80.0) if north_cap else max(min(north, 0.0), -80.0))
        proj = ccrs.NorthPolarStereo() if north_cap else ccrs.SouthPolarStereo()
        return proj, [-180.0, 180.0, edge, 90.0] if north_cap else [-180.0, 180.0, -90.0, edge]
    pad_lon, pad_lat = max(0.05 * span, 0.5), max(0.05 * (north - south), 0.5)
    extent = [centre_lon - span / 2 - pad_lon, centre_lon + span / 2 + pad_lon,
              max(south - pad_lat, -90.0), min(north + pad_lat, 90.0)]
    if name == "lat-lon":
        if span + step >= WRAP_SPAN:
            return ccrs.PlateCarree(), None
        return ccrs.PlateCarree(central_longitude=centre_lon), extent
    centre_lat = (south + north) / 2
    return ccrs.LambertAzimuthalEqualArea(central_longitude=centre_lon,
                                          central_latitude=centre_lat), extent


def _map_axes(fig: Figure, proj: ccrs.Projection, extent: list[float] | None,
              box: tuple[float, float, float, float] = MAP_BOX):
    ax = fig.add_axes(box, projection=proj)
    round_cap = extent is not None and isinstance(proj, ccrs.Stereographic)
    if extent is None:
        ax.set_global()
    elif round_cap:
        ax.set_extent(extent, crs=ccrs.PlateCarree())
        theta = np.linspace(0, 2 * np.pi, 200)  # a round cap, not a square
        circle = MplPath(np.column_stack([np.cos(theta), np.sin(theta)]) * 0.5 + 0.5)
        ax.set_boundary(circle, transform=ax.transAxes)
    else:
        centre = (extent[0] + extent[1]) / 2
        ax.set_extent([extent[0] - centre, extent[1] - centre, extent[2], extent[3]],
                      crs=ccrs.PlateCarree(central_longitude=centre))
    _coastlines(ax)
    grid = ax.gridlines(draw_labels=True, linewidth=0.4, color="0.5", alpha=0.7, linestyle=":")
    if not round_cap:  # a round cap names its meridians all round
        grid.top_labels = grid.right_labels = False
    grid.xlabel_style = grid.ylabel_style = {"size": 7}
    return ax


def _colour_bar(fig: Figure, ax, mappable):
    """A colour bar beside the map, exactly as tall as the map is drawn."""
    return fig.colorbar(mappable, cax=ax.inset_axes(COLOUR_BAR_BOX))


def _label_bar(bar, text: str, units: str, largest: float, after: str = "", **style) -> None:
    """Label a colour bar with its quantity and UDUNITS units, then ``after``; a scale
    whose ``largest`` magnitude lies beyond 1e-3 to 1e4 puts its power of ten in the units
    ("(10^-5 s-1)", common practice), not as a loose "1e-5" above the bar that reads like
    a tick. ``style`` goes to the label's text."""
    power = int(np.floor(np.log10(largest))) if largest > 0 and np.isfinite(largest) else 0
    if power < -3 or power >= 4:
        bar.formatter.set_powerlimits((power, power))
        bar.ax.yaxis.offsetText.set_visible(False)
        units = f"10$^{{{power}}}$ {_units_text(units)}".strip()
    else:
        units = _units_text(units)
    bar.set_label(text + (f" ({units})" if units else "") + after, **style)
    bar.update_ticks()


@functools.cache
def _shorelines(directory: str) -> cfeature.ShapelyFeature:
    """GSHHS coarse shorelines as lines, read once from ``directory``.

    GSHHS stores land as polygons; Antarctica is cut along the 0 and 180
    degree meridians and closed through the pole. Those cuts are not coast:
    drawn as polygon outlines they would show as lines to the pole.
    """
    cartopy.config["pre_existing_data_dir"] = directory
    shapefile.VERBOSE = False  # GSHHS polygons are fine; pyshp's notes are noise
    lines: list[LineString] = []
    for land in cfeature.GSHHSFeature(scale="coarse", levels=[1]).geometries():
        for polygon in getattr(land, "geoms", [land]):
            lines.extend(_without_cuts(np.asarray(polygon.exterior.coords)))
    return cfeature.ShapelyFeature(lines, ccrs.PlateCarree())


def _without_cuts(ring: np.ndarray) -> list[LineString]:
    """Pieces of a polygon ring between its segments along a cut meridian or the pole."""
    x, y = ring[:, 0], ring[:, 1]
    along_meridian = (x[:-1] == x[1:]) & np.isin(x[:-1], (0.0, 180.0, -180.0))
    along_pole = (np.abs(y[:-1]) >= 90.0 - 1e-9) & (np.abs(y[1:]) >= 90.0 - 1e-9)
    return [LineString(piece) for piece in _split_at(ring, along_meridian | along_pole)]


def _split_at(ring: np.ndarray, cut: np.ndarray) -> list[np.ndarray]:
    """The pieces of a line of nodes ``ring`` (n, 2) between its segments where ``cut``
    (n - 1) is true; pieces of one node left out."""
    bounds = [-1, *np.flatnonzero(cut), len(ring) - 1]
    return [ring[a + 1: b + 1] for a, b in zip(bounds[:-1], bounds[1:], strict=True)
            if b - a >= 2]


def _coastlines(ax) -> bool:
    """Draw GSHHS coarse shorelines found on disk; warn (and draw none) without them."""
    configured = cartopy.config.get("pre_existing_data_dir") or ""
    for directory in (configured, *COASTLINE_DIRS):
        if directory and (Path(directory) / GSHHS_COARSE).is_file():
            ax.add_feature(
                _shorelines(directory), facecolor="none", edgecolor="black", linewidth=0.6,
                zorder=3, path_effects=[patheffects.withStroke(linewidth=1.8, foreground="white")])
            return True
    searched = ", ".join(str(d) for d in (configured, *COASTLINE_DIRS) if d)
    warnings.warn(f"no coastline data found (looked for {GSHHS_COARSE} in {searched}); the map "
                  "has no coastlines: install the python-cartopy-data package", MapWarning,
                  stacklevel=3)
    return False


# ---------------------------------------------------------------- field maps

def _units_text(units: str) -> str:
    """UDUNITS text with exponents raised: ``m2 s-1`` -> m² s⁻¹ (mathtext)."""
    return re.sub(r"\b([A-Za-z]+)(-?\d+)\b", r"\1$^{\2}$", units)


def plain_text(text: str) -> str:
    """A figure's text for a terminal: the exponents :func:`_units_text` raised written
    back as UDUNITS writes them (``m$^{2}$ s$^{-1}$`` -> ``m2 s-1``), a power of ten
    as ``10^-5``."""
    text = re.sub(r"\b10\$\^\{(-?\d+)\}\$", r"10^\1", text)
    return re.sub(r"\$\^\{(-?\d+)\}\$", r"\1", text)


def _contour_levels(low: float, high: float, signed: bool) -> np.ndarray:
    """Round contour levels just covering [low, high]; symmetric about 0 when signed."""
    if signed:
        top = max(abs(low), abs(high)) or 1.0
        positive = MaxNLocator(nbins=7).tick_values(0.0, top)
        positive = positive[: int(np.searchsorted(positive, top * (1 - 1e-12))) + 1]
        return np.concatenate([-positive[:0:-1], positive])
    if high <= low:
        low, high = low - 0.5 * (abs(low) or 1.0), high + 0.5 * (abs(high) or 1.0)
    ticks = MaxNLocator(nbins=14).tick_values(low, high)
    first = int(np.searchsorted(ticks, low * (1 + 1e-12) if low < 0 else low * (1 - 1e-12),
                                side="right")) - 1
    last = int(np.searchsorted(ticks, high * (1 - 1e-12) if high > 0 else high * (1 + 1e-12)))
    return ticks[max(first, 0): last + 1]


def _from_zero(field: str, da: xr.DataArray) -> bool:
    """Whether a field is a finite-time Lyapunov exponent (mapped on a scale from zero)."""
    return field == "ftle" or (str(da.attrs.get("units", "")) == "s-1"
                               and "lyapunov" in str(da.attrs.get("long_name", "")).lower())


def _nice(value: float) -> float:
    """The largest of 1, 2 or 5 times a power of ten not above ``value`` (reference arrow)."""
    exponent = np.floor(np.log10(value))
    mantissa = value / 10.0**exponent
    return float(max(m for m in (1.0, 2.0, 5.0) if m <= mantissa * (1 + 1e-12))
                 * 10.0**exponent)


def _wind_names(ds: xr.Dataset, field: str) -> tuple[str, str] | None:
    pair = WIND_FOR.get(field)
    if pair is None and field[:2] in ("u_", "v_"):
        pair = (f"u_{field[2:]}", f"v_{field[2:]}")
    if pair is None:
        east = ds.cf.standard_names.get("eastward_wind", [])
        north = ds.cf.standard_names.get("northward_wind", [])
        pair = (east[0], north[0]) if east and north else None
    if pair is None or not all(n in ds.data_vars for n in pair):
        return None
    return pair


def _members(ds: xr.Dataset, dims: tuple, label: str, member: int | None
             ) -> tuple[Hashable | None, np.ndarray | None]:
    """The ensemble-member dimension among ``dims`` (CF standard name ``realization``) and
    the positions along it of ``member`` (all members when None)."""
    name = next((d for d in dims if d in ds.variables
                 and ds[d].attrs.get("standard_name") == "realization"), None)
    if name is None:
        if member is not None:
            raise InputError(f"{label}: has no ensemble members (no realization coordinate); "
                             "leave out the member")
        return None, None
    values = ds[name].values
    if member is None:
        return name, np.arange(values.size)
    hits = np.flatnonzero(values == member)
    if not hits.size:
        raise InputError(f"{label}: member {member} is not in the file; members (realization): "
                         f"{', '.join(map(str, np.unique(values)))}")
    return name, hits


def _field_map(fig: Figure, ds: xr.Dataset, label: str, field: str | None, level: float | None,
               when: tuple[str | None, str | None, float | None],
               projection: str | ccrs.Projection | None, barbs: bool = False,
               member: int | None = None) -> None:
    mappable = _mappable(ds)
    if not mappable:
        raise InputError(f"{label}: no variable has latitude/longitude coordinates to map "
                         "(units degrees_north / degrees_east or standard_name latitude / "
                         "longitude); variables present: "
                         f"{', '.join(map(str, ds.data_vars)) or 'none'}")
    if field is None:
        field = next((f for f in DEFAULT_FIELDS if f in mappable), mappable[0])
    named = variable_named(ds, field, mappable)
    if named is None:
        raise InputError(f"{label}: no mappable field {field!r}; fields in the file: "
                         f"{names_text(ds, mappable)}")
    field = named
    da = ds[field]
    lat_name, lon_name = _horizontal(ds, da)
    indexers, words = _select(ds, da, label, level, when)
    name, rows = _members(ds, da.dims, label, member)
    if name is not None:
        indexers[name] = int(rows[0])
        words.append(f"member {ds[name].values[rows[0]]}")
    others = {d: 0 for d in da.dims if d not in (lat_name, lon_name, *indexers)}
    words += [f"{d} {ds[d].values[0] if d in ds.coords else 0}" for d in others]
    indexers.update(others)

    def slab(name: str) -> xr.DataArray:
        return ds[name].isel(indexers).transpose(lat_name, lon_name).sortby([lat_name, lon_name])

    data = slab(field)
    values = np.asarray(data.values, dtype=np.float64)
    lat = data[lat_name].values.astype(np.float64)
    lon = data[lon_name].values.astype(np.float64)
    if not np.isfinite(values).any():
        raise InputError(f"{label}: {field} has no valid value in this slab ({', '.join(words)})")
    step = float(np.median(np.diff(lon))) if lon.size > 1 else 0.0
    proj, extent = _domain_projection(lat, lon, projection, step)
    ax = _map_axes(fig, proj, extent)

    rounding, basis = _rounding_level(ds, da, field, values, slab)
    values = np.where(np.abs(values) <= rounding, 0.0, values)
    if not np.any(values):  # nothing above rounding: say so rather than colour the noise
        _zero_map(ax, da, field, words, rounding, basis)
        return
    low, high = (float(q) for q in np.nanquantile(values, [BEYOND_SCALE, 1 - BEYOND_SCALE]))
    names = (field, str(da.attrs.get("standard_name", "")))
    from_zero = _from_zero(field, da)
    if from_zero:
        # growth rates: a sequential scale from zero, unless some exponents are negative
        # (air compressed in every direction) by more than one band of that scale: then a
        # diverging scale centred on zero; rounding-size negatives go in the lowest band
        bands = _contour_levels(0.0, max(high, -low), False)
        signed = low < -(bands[1] - bands[0])
        if not signed:
            values, low = np.maximum(values, 0.0), 0.0
    else:
        signed = any(n in SIGNED for n in names) or low < 0 < high
    levels = _contour_levels(low, high, signed)
    filled, lon_c = values, lon
    if _lon_span(lon)[1] + step >= WRAP_SPAN:
        # start the columns at the map's own edge and close the circle there, so
        # that no filled contour has to cross the edge (which cartopy misdraws)
        edge = float(getattr(proj, "proj4_params", {}).get("lon_0", 0.0)) - 180.0
        order = np.argsort(np.mod(lon - edge, 360.0))
        filled, lon_c = add_cyclic_point(values[:, order],
                                         coord=np.mod(lon[order] - edge, 360.0) + edge)
    # Contour in map coordinates: cartopy's reprojection of filled-contour polygons
    # fails on some global fields (GeometryCollection errors); the grid points
    # themselves always project.
    grid_lon, grid_lat = np.meshgrid(lon_c, lat)
    xyz = proj.transform_points(ccrs.PlateCarree(), grid_lon, grid_lat)
    outside = ~np.isfinite(xyz[..., :2]).all(axis=-1)
    x, y = (np.where(outside, 0.0, xyz[..., i]) for i in (0, 1))
    limits = ax.get_xlim(), ax.get_ylim()
    below, above = np.nanmin(values) < levels[0], np.nanmax(values) > levels[-1]
    contours = matplotlib.axes.Axes.contourf(
        ax, x, y, np.ma.masked_where(outside | ~np.isfinite(filled), filled), levels=levels,
        cmap=DIVERGING if signed else SEQUENTIAL, norm=Normalize(levels[0], levels[-1]),
        extend={(False, False): "neither", (True, False): "min", (False, True): "max",
                (True, True): "both"}[bool(below), bool(above)], zorder=1)
    ax.set_xlim(*limits[0])
    ax.set_ylim(*limits[1])
    units = str(da.attrs.get("units", ""))
    bar = _colour_bar(fig, ax, contours)
    described = da.attrs.get("long_name") or str(da.attrs.get("standard_name", "")).replace("_", " ")
    long_name = str(described or field)
    _label_bar(bar, long_name, units, max(abs(levels[0]), abs(levels[-1])))

    title = long_name[:1].upper() + long_name[1:] if described else field
    direction, hours = da.attrs.get("integration_direction"), da.attrs.get("integration_hours")
    if from_zero and direction and hours is not None:  # "Forward ... exponent over 24 h"
        title = f"{str(direction).capitalize()} {long_name} over {float(hours):g} h"
    wind = _wind_names(ds, field)
    if wind is not None:
        kind = wind[0][2:] if wind[0].startswith("u_") else ""
        if field not in wind:  # (a component of the wind drawn needs no "with" it)
            title += f", with the {kind} wind".replace("  ", " ")
        _arrows(ax, slab(wind[0]), slab(wind[1]), lat, lon, barbs)
    ax.set_title(f"{title}\n{' | '.join(words)}{_harmonic_note(ds, field, indexers)}",
                 loc="left", fontsize=10)


def _harmonic_note(ds: xr.Dataset, field: str, indexers: dict) -> str:
    """A line for the title of a variational split's part whose slab has most of its energy
    in the harmonic flow (:data:`HARMONIC_SHARE`), else nothing."""
    share = ds.get("harmonic_energy_share")
    if field not in SHARED_HARMONIC or share is None or ds.attrs.get("scheme") != SCHEMES[0]:
        return ""
    value = float(share.isel({d: indexers[d] for d in share.dims if d in indexers}).max())
    if not value > HARMONIC_SHARE:
        return ""
    return (f"\nharmonic flow: {value:.0%} of the energy, shared by both parts (variational; "
            "see harmonic_energy_share)")


def _rounding_level(ds: xr.Dataset, da: xr.DataArray, field: str, values: np.ndarray,
                    slab) -> tuple[float, str]:
    """Magnitude below which a slab's values are rounding noise, and what it is relative
    to (words for a title: "the rounding level of the streamfunction's largest value").

    :data:`ROUNDING` (by the precision the field is stored in) of the largest
    magnitude among the slab's fields of the same units and dimensions: the
    velocity potential of a non-divergent wind is measured against the
    streamfunction, its divergence against the vorticity. ``values`` is the slab
    of ``field`` already read; ``slab(name)`` reads that of another field. A
    finite-time Lyapunov exponent with its integration time: :data:`FTLE_STRETCH`
    over that time.
    """
    hours = da.attrs.get("integration_hours")
    if _from_zero(field, da) and hours is not None and float(hours) > 0:
        return (FTLE_STRETCH / (float(hours) * 3600.0),
                f"lengths stretched by less than {FTLE_STRETCH:.0%} over the {float(hours):g} h")
    stored = np.dtype(da.encoding.get("dtype", da.dtype))
    relative = ROUNDING.get(stored.itemsize, ROUNDING[8]) if stored.kind == "f" else 0.0
    units = da.attrs.get("units")
    largest, companion = float(np.nanmax(np.abs(values), initial=0.0)), field  # the slab shown
    for name in ds.data_vars:
        other = ds[name]
        if name == field or other.dims != da.dims or other.attrs.get("units") != units:
            continue
        magnitude = float(np.nanmax(np.abs(np.asarray(slab(str(name)).values, dtype=float)),
                                    initial=0.0))
        if magnitude > largest:
            largest, companion = magnitude, str(name)
    against = "its own" if companion == field else f"the {companion.replace('_', ' ')}'s"
    return relative * largest, f"the rounding level of {against} largest value"


def _zero_map(ax, da: xr.DataArray, field: str, words: list[str], rounding: float,
              basis: str) -> None:
    """A field that is zero to rounding: an empty map whose title says so."""
    units = _units_text(str(da.attrs.get("units", "")))
    name = str(da.attrs.get("long_name") or field)
    ax.set_title(f"{name[:1].upper() + name[1:]}: zero to rounding (every value within "
                 f"{rounding:.1e} {units} of zero, {basis})\n{' | '.join(words)}", loc="left",
                 fontsize=10)
    ax.text(0.5, 0.5, "zero to rounding", transform=ax.transAxes, ha="center", va="center",
            fontsize=14, color="0.3")


def _thinned(lat: np.ndarray, lon: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Row and column indices of grid points about evenly spaced on the sphere.

    About :data:`ARROWS` points over the domain, whatever its shape (a square
    area, a long latitude band): their spacing is the square root of the
    domain's area (in squared degrees of arc) per arrow. Along each row the
    column stride grows as 1/cos(latitude), so that arrows do not crowd
    towards the poles. Pole rows are left out (no direction there).
    """
    dlat = abs(float(np.median(np.diff(lat)))) if lat.size > 1 else 1.0
    dlon = abs(float(np.median(np.diff(lon)))) if lon.size > 1 else 1.0
    phi = np.radians(np.clip(lat, -89.999, 89.999))
    # area in squared degrees: longitude span x the integral of cos(latitude) over the rows
    area = (np.ptp(lon) + dlon) * np.degrees(abs(np.sin(phi.max()) - np.sin(phi.min())))
    spacing = max(np.sqrt(area / ARROWS), dlat, dlon)
    rows, cols = [], []
    for i in range(0, lat.size, max(1, round(spacing / dlat))):
        coslat = np.cos(np.radians(lat[i]))
        if coslat < 1e-3:
            continue
        stride = max(1, round(spacing / (dlon * coslat)))
        picked = np.arange(0, lon.size, min(stride, lon.size))
        rows.append(np.full(picked.size, i))
        cols.append(picked)
    return np.concatenate(rows), np.concatenate(cols)


def _arrows(ax, u: xr.DataArray, v: xr.DataArray, lat: np.ndarray, lon: np.ndarray,
            barbs: bool = False) -> None:
    """Thinned wind arrows with a reference arrow labelled with its speed (or barbs)."""
    uu = np.asarray(u.values, dtype=np.float64)
    vv = np.asarray(v.values, dtype=np.float64)
    speed = np.hypot(uu, vv)
    if not np.isfinite(speed).any() or np.nanmax(speed) == 0:
        return
    rows, cols = _thinned(lat, lon)
    if barbs:
        # barbs on the side of lower pressure: flipped in the southern hemisphere
        ax.barbs(lon[cols], lat[rows], uu[rows, cols] / KNOT, vv[rows, cols] / KNOT,
                 transform=ccrs.PlateCarree(), length=5, linewidth=0.7, color="white",
                 zorder=4, barb_increments={"half": 5, "full": 10, "flag": 50},
                 flip_barb=lat[rows] < 0,
                 path_effects=[patheffects.withStroke(linewidth=1.8, foreground="black")])
        ax.text(0.55, 1.03, "wind barbs in kn: pennant 50, barb 10, half barb 5",
                transform=ax.transAxes, fontsize=8)
        return
    reference = _nice(float(np.nanpercentile(speed, 90)))
    (x0, x1), (y0, y1) = ax.get_xlim(), ax.get_ylim()
    across = np.sqrt(ARROWS * abs(x1 - x0) / abs(y1 - y0))  # arrows along the map's width
    arrows = ax.quiver(lon[cols], lat[rows], uu[rows, cols], vv[rows, cols],
                       transform=ccrs.PlateCarree(), color="white", edgecolor="black",
                       linewidth=0.5, zorder=4, scale=float(np.nanpercentile(speed, 99)) * across * 1.2,
                       scale_units="width", width=0.0022)
    ax.quiverkey(arrows, X=WIND_KEY[0], Y=WIND_KEY[1], U=reference, label=f"{reference:g} m s$^{{-1}}$",
                 labelpos="E", coordinates="axes", fontproperties={"size": 8},
                 color="black")


# ---------------------------------------------------------------- track maps

def _skipped(ds: xr.Dataset, count: int) -> np.ndarray:
    """Which of ``count`` trajectories were never run: CF flag ``outside_domain_at_start``
    of their ``status`` (flowpipe's status meanings)."""
    status = ds.get("status")
    if status is None or "flag_meanings" not in status.attrs or status.size != count:
        return np.zeros(count, bool)
    meanings = str(status.attrs["flag_meanings"]).split()
    if "outside_domain_at_start" not in meanings:
        return np.zeros(count, bool)
    flag = np.ravel(status.attrs["flag_values"])[meanings.index("outside_domain_at_start")]
    return np.ravel(status.values) == flag


def _track_variables(ds: xr.Dataset, label: str) -> dict[str, xr.DataArray]:
    found: dict[str, xr.DataArray] = {}
    for key, standard_name, units in (("latitude", "latitude", "degrees_north"),
                                      ("longitude", "longitude", "degrees_east")):
        names = [n for n in ds.variables if ds[n].attrs.get("standard_name") == standard_name
                 or (ds[n].attrs.get("units") == units and ds[n].ndim == 2)]
        if not names:
            raise InputError(f"{label}: a trajectory file without {key} (standard_name "
                             f"{standard_name}); it cannot be mapped")
        found[key] = ds[names[0]]
    times = [n for n in ds.variables if ds[n].attrs.get("standard_name") == "time"
             or (n == "time" and ds[n].ndim == 2)]
    if times:
        found["time"] = ds[times[0]]
    for n in ds.variables:
        if found["latitude"].dims != ds[n].dims:
            continue
        standard_name = ds[n].attrs.get("standard_name", "")
        if standard_name in ("air_pressure", "height", "altitude") or (
                n in ("pressure", "level", "height") and "units" in ds[n].attrs):
            found["vertical"] = ds[n]
            break
    return found


def _track_map(fig: Figure, ds: xr.Dataset, label: str, field: str | None,
               projection: str | ccrs.Projection | None, marks: float = 6.0,
               member: int | None = None) -> None:
    name, rows = _members(ds, tuple(ds.coords), label, member)
    if name is not None:
        ds = ds.isel({ds[name].dims[0]: rows})
    found = _track_variables(ds, label)
    lat = np.asarray(found["latitude"].values, dtype=np.float64)
    lon = np.asarray(found["longitude"].values, dtype=np.float64)
    if lat.ndim == 1:
        lat, lon = lat[None, :], lon[None, :]
    if not np.isfinite(lat).any():
        raise InputError(f"{label}: the trajectories have no valid position")
    if field is not None:
        candidates = [str(n) for n in ds.data_vars if ds[n].dims == found["latitude"].dims]
        named = variable_named(ds, field, candidates)
        if named is None:
            raise InputError(f"{label}: no variable {field!r} along the trajectories; "
                             f"variables along them: {names_text(ds, candidates)}")
        colour, colour_label = ds[named], named
    elif "vertical" in found:
        colour, colour_label = found["vertical"], str(found["vertical"].attrs.get(
            "standard_name", found["vertical"].name)).replace("_", " ")
    else:
        colour, colour_label = None, "time since start (hours)"
    times = found.get("time")
    elapsed = None
    if times is not None and np.issubdtype(times.dtype, np.datetime64):
        t = times.values.reshape(lat.shape)
        elapsed = (t - t[:, :1]) / np.timedelta64(1, "h")
    if colour is None:
        if elapsed is None:
            raise InputError(f"{label}: no pressure, height or numpy-decodable time to colour "
                             "the tracks by; name a variable along them")
        values = elapsed
    else:
        values = np.asarray(colour.values, dtype=np.float64).reshape(lat.shape)
        units = str(colour.attrs.get("units", ""))
        colour_label += f" ({_units_text(units)})" if units else ""

    # the map covers the tracks that were run: a start outside the domain (skipped, its
    # one position the start) would stretch it away from them
    ran = ~_skipped(ds, lat.shape[0])
    proj, extent = _domain_projection(lat[ran].ravel() if ran.any() else lat.ravel(),
                                      lon[ran].ravel() if ran.any() else lon.ravel(), projection)
    ax = _map_axes(fig, proj, extent)
    xyz = proj.transform_points(ccrs.Geodetic(), lon.ravel(), lat.ravel())
    x, y = xyz[:, 0].reshape(lat.shape), xyz[:, 1].reshape(lat.shape)
    segments = np.stack([np.stack([x[:, :-1], y[:, :-1]], -1),
                         np.stack([x[:, 1:], y[:, 1:]], -1)], axis=2).reshape(-1, 2, 2)
    middle = 0.5 * (values[:, :-1] + values[:, 1:]).ravel()
    width = abs(proj.x_limits[1] - proj.x_limits[0])
    keep = (np.isfinite(segments).all(axis=(1, 2)) & np.isfinite(middle)
            & (np.abs(segments[:, 1, 0] - segments[:, 0, 0]) < 0.5 * width))
    norm = Normalize(float(np.nanmin(values)), float(np.nanmax(values)))
    segments = segments[keep]
    lines = LineCollection(segments, array=middle[keep], cmap=TRACKS, norm=norm,
                           linewidths=1.8, zorder=4, transform=proj)
    ax.add_collection(lines)
    _domain_outline(ax, ds)
    labels = _time_marks(ax, lat, lon, elapsed, marks) if elapsed is not None else []
    valid = np.isfinite(lat) & np.isfinite(lon)
    first = np.argmax(valid, axis=1)
    last = lat.shape[1] - 1 - np.argmax(valid[:, ::-1], axis=1)
    rows = np.arange(lat.shape[0])
    every = max(1, -(-rows.size // MAX_STARTS))
    shown = rows[::every]
    ax.scatter(lon[shown, first[shown]], lat[shown, first[shown]], transform=ccrs.PlateCarree(),
               marker="o", s=28, facecolor="white", edgecolor="black", linewidth=1.0, zorder=5,
               label="start" if every == 1 else f"start (1 in {every} of {rows.size})")
    _end_markers(ax, ds, lat[rows, last], lon[rows, last])
    legend = ax.legend(loc="lower left", fontsize=7, framealpha=0.8)
    bar = _colour_bar(fig, ax, lines)
    bar.set_label(colour_label)
    if colour is not None and colour.attrs.get("positive") == "down":
        bar.ax.invert_yaxis()  # pressure: higher in the atmosphere at the top
    level = next((ds[n] for n in ds.coords if ds[n].ndim == 0 and ds[n].attrs.get("axis") == "Z"),
                 None)
    title = _track_title(lat.shape[0], times, elapsed, colour_label, level)
    if name is not None:
        count = np.unique(ds[name].values).size
        head, newline, rest = title.partition("\n")
        title = (f"{head}, member {member}" if member is not None else
                 f"{head}, {count} member{'s' if count != 1 else ''}") + newline + rest
    ax.set_title(title, loc="left", fontsize=10)
    fig.draw_without_rendering()  # the map's final place on the figure, and its texts' sizes
    kept = _apart(labels)
    _legend_clear_of(ax, legend, segments, [b.get_points().mean(axis=0) for b in kept])


def _apart(texts: list) -> list:
    """Remove each text whose drawn extent overlaps one kept before it (time labels where a
    track loops or crosses another); the extents of those kept (display coordinates)."""
    kept = []
    for text in texts:
        extent = text.get_window_extent()
        if any(extent.overlaps(other) for other in kept):
            text.remove()
        else:
            kept.append(extent)
    return kept


#: Where a legend may stand inside the map: matplotlib's names, in the order its
#: ``loc="best"`` tries them, with the place of the legend's box across the room left
#: inside the axes' padding (0 left or bottom, 1 right or top).
LEGEND_PLACES = {"upper right": (1.0, 1.0), "upper left": (0.0, 1.0), "lower left": (0.0, 0.0),
                 "lower right": (1.0, 0.0), "center left": (0.0, 0.5),
                 "center right": (1.0, 0.5), "lower center": (0.5, 0.0),
                 "upper center": (0.5, 1.0)}
#: Points along each drawn track segment that a legend's box should not hide.
SEGMENT_SAMPLES = 8


def _legend_clear_of(ax, legend, segments: np.ndarray, points: list) -> None:
    """Put the legend in the place of :data:`LEGEND_PLACES` that hides the fewest track
    points (``segments`` in map coordinates, sampled along) and ``points`` (display).

    matplotlib's own ``loc="best"`` counts the vertices of lines and the offsets of
    collections, not the segments of a LineCollection: it would put the legend over a
    track (a trial's start sat hidden under it). Needs a drawn figure.
    """
    along = np.linspace(0.0, 1.0, SEGMENT_SAMPLES)[:, None, None]
    sampled = (segments[None, :, 0] * (1 - along) + segments[None, :, 1] * along).reshape(-1, 2)
    shown = np.concatenate([ax.transData.transform(sampled).reshape(-1, 2),
                            np.reshape(points, (-1, 2))])
    box = legend.get_window_extent()
    pad = legend.borderaxespad * legend.prop.get_size_in_points() * ax.figure.dpi / 72.0
    room = ax.bbox.padded(-pad)

    def hidden(place: tuple[float, float]) -> int:
        x0 = room.x0 + place[0] * (room.width - box.width)
        y0 = room.y0 + place[1] * (room.height - box.height)
        return int(np.sum((shown[:, 0] >= x0) & (shown[:, 0] <= x0 + box.width)
                          & (shown[:, 1] >= y0) & (shown[:, 1] <= y0 + box.height)))

    legend.set_loc(min(LEGEND_PLACES, key=lambda name: hidden(LEGEND_PLACES[name])))


def _domain_outline(ax, ds: xr.Dataset) -> None:
    """The edges of the input's domain (attributes of flowpipe trajectory files), where
    it has edges: a limited area's four sides, a latitude band's two circles."""
    lat_range, lon_range = ds.attrs.get("input_latitude_range"), ds.attrs.get("input_longitude_range")
    if lat_range is None or lon_range is None:
        return
    (south, north), (west, east) = np.ravel(lat_range)[:2], np.ravel(lon_range)[:2]
    east = east if east > west else east + 360.0
    round_globe = east - west >= WRAP_SPAN
    sides = []
    if not round_globe:
        lats = np.linspace(south, north, 90)
        sides += [(np.full_like(lats, west), lats), (np.full_like(lats, east), lats)]
    lons = np.linspace(west, west + 360.0 if round_globe else east, 361)
    sides += [(lons, np.full_like(lons, edge)) for edge in (south, north) if abs(edge) < 89.0]
    for number, (x, y) in enumerate(sides):
        ax.plot(x, y, transform=ccrs.PlateCarree(), color="0.25", linestyle="--", linewidth=1.0,
                zorder=3, label="edge of the input's domain" if number == 0 else None)


def _time_marks(ax, lat: np.ndarray, lon: np.ndarray, elapsed: np.ndarray,
                hours: float) -> list:
    """Dots where each track has travelled a whole multiple of ``hours``; the first
    track's marks labelled with their hours (a few tracks: every track's); the labels."""
    if not np.isfinite(elapsed).any() or not hours > 0:
        return []
    steps = np.abs(elapsed) / hours
    marked = np.isfinite(steps) & np.isclose(steps, np.round(steps)) & (np.round(steps) > 0)
    if not marked.any():
        return []
    ax.scatter(lon[marked], lat[marked], transform=ccrs.PlateCarree(), marker=".", s=30,
               color="black", zorder=6, label=f"every {hours:g} h")
    return [ax.annotate(f"{elapsed[i, j]:+.0f} h", (lon[i, j], lat[i, j]),
                        xycoords=ccrs.PlateCarree()._as_mpl_transform(ax),
                        xytext=(3, 3), textcoords="offset points", fontsize=6, zorder=6)
            for i in range(min(lat.shape[0], LABELLED_TRACKS)) for j in np.flatnonzero(marked[i])]


def _end_markers(ax, ds: xr.Dataset, lat: np.ndarray, lon: np.ndarray) -> None:
    """A marker at each track's end by how it ended (CF flags of ``status``), in the legend
    with the number of tracks that ended so."""
    status = ds.get("status")
    if status is None or "flag_meanings" not in status.attrs:
        return
    meanings = str(status.attrs["flag_meanings"]).split()
    values = np.ravel(status.attrs["flag_values"])
    codes = np.ravel(status.values)
    for value, meaning in zip(values, meanings, strict=True):
        ended = codes == value
        if ended.any():
            marker, colour = END_MARKERS.get(meaning, ("P", "0.5"))
            ax.scatter(lon[ended], lat[ended], transform=ccrs.PlateCarree(), marker=marker, s=36,
                       facecolor=colour, edgecolor="black", linewidth=0.8, zorder=7,
                       label=f"end: {meaning.replace('_', ' ')} ({int(ended.sum())})")


def _one_level(coordinate: xr.DataArray) -> str:
    """The one level of a 2-D field in words: ``"10 m above the surface"``, ``"850 hPa"``."""
    values, kind = canonical_levels(np.ravel(coordinate.values), coordinate.attrs.get("units"))
    units = {"pressure": "hPa", "height": "m above the surface"}.get(
        kind, coordinate.attrs.get("units", ""))
    return f"{values[0]:g} {units}".strip()


def _track_title(count: int, times: xr.DataArray | None, elapsed: np.ndarray | None,
                 colour_label: str, level: xr.DataArray | None = None) -> str:
    head = f"{count} trajector{'y' if count == 1 else 'ies'}, coloured by {colour_label}"
    if level is not None:
        head += f", {_one_level(level)}"
    if times is None:
        return head
    start = iso_time(times.values.ravel()[0], "minutes")
    if elapsed is None or not np.isfinite(elapsed).any():
        return f"{head}\nfrom {start}"
    reach = float(np.nanmax(elapsed)) if np.nanmax(elapsed) > 0 else float(np.nanmin(elapsed))
    direction = "forward" if reach >= 0 else "backward"
    return f"{head}\n{direction} {abs(reach):g} h from {start}"


__all__ = ["MapWarning", "PROJECTIONS", "render", "save"]
