"""CF-1.11 and ACDD-1.3 attributes for everything flowpipe writes.

Stages set what only they know (``title``, ``summary``, ``references`` naming
the published methods, method parameters) with :func:`global_attrs`; the
writer then calls :func:`complete`, which fills in everything that can be read
off the Dataset itself: coordinate attributes, ACDD ``coverage_content_type``,
geospatial and time coverage, keywords, and the caution in ``comment``.
Nothing a stage has set is overwritten.
"""

from __future__ import annotations

import datetime as _dt
import sys
from collections.abc import Hashable

import cf_units
import dask
import numpy as np
import xarray as xr

from ._version import __version__
from .choices import QUALITY_FIGURES, VARIABLES
from .constants import EARTH_RADIUS

CF_VERSION = "CF-1.11"
CONVENTIONS = f"{CF_VERSION}, ACDD-1.3"

#: The CF standard-name table the names are taken from (version 93, the one
#: compliance-checker 6.1 ships and checks against).
STANDARD_NAME_VOCABULARY = "CF Standard Name Table v93"

#: The caution every output carries (README, NetCDF ``comment``, map footers).
CAUTION = (
    "Analysis diagnostics computed by flowpipe from gridded model winds. Not a certified "
    "dispersion, hazard or warning product: for decisions about hazardous releases or public "
    "safety defer to the responsible authorities, local regulations and licensed practice."
)

#: The caution in a few words, for places with little room (map footers).
CAUTION_SHORT = "Analysis diagnostics; not a certified dispersion, hazard or warning product."

#: Used when a stage names no references: the conventions the metadata follow.
DEFAULT_REFERENCES = (
    "NetCDF Climate and Forecast (CF) Metadata Conventions 1.11, https://cfconventions.org; "
    "Attribute Convention for Data Discovery 1.3 (Earth Science Information Partners), "
    "https://wiki.esipfed.org/Attribute_Convention_for_Data_Discovery_1-3"
)

#: Attributes of dimension coordinates, by standard name: long_name, axis (CF 1.11 section 4).
COORDINATES: dict[str, tuple[str, str]] = {
    "latitude": ("latitude", "Y"),
    "longitude": ("longitude", "X"),
    "time": ("time", "T"),
    "forecast_reference_time": ("forecast reference time (the run)", "T"),
    "forecast_period": ("forecast period (lead time)", "T"),
    "air_pressure": ("pressure level", "Z"),
    "height": ("height above the surface", "Z"),
    "altitude": ("altitude", "Z"),
}

#: Attributes the canonical wind Dataset's coordinates always have (see
#: :mod:`flowpipe.ingest`), restored where a stage dropped them.
CANONICAL_COORDINATES: dict[str, dict[str, str]] = {
    "latitude": {"standard_name": "latitude", "units": "degrees_north"},
    "longitude": {"standard_name": "longitude", "units": "degrees_east"},
    # ensemble members (CF 1.11 standard-name table: realization, canonical units 1)
    "realization": {"standard_name": "realization", "units": "1", "long_name": "ensemble member"},
}
#: The same for ``level``, by the Dataset's ``level_type``.
CANONICAL_LEVELS: dict[str, dict[str, str]] = {
    "pressure": {"standard_name": "air_pressure", "units": "hPa", "positive": "down"},
    "height": {"standard_name": "height", "units": "m", "positive": "up"},
}

#: CF 1.11 section 4.4.1: a time coordinate of the standard calendars should
#: say how leap seconds are handled; flowpipe's times (numpy, cftime) ignore them.
TIME_UNITS_METADATA = "leap_seconds: none"

_VERTICAL = ("air_pressure", "height", "altitude")

#: Name of the grid mapping variable of gridded outputs (CF 1.11 section 5.6).
CRS = "crs"

#: Global attributes a site's ``[metadata]`` table (or ``--attribute``) may not
#: replace: they say what the file is and how it was made.
PROTECTED_ATTRIBUTES = ("Conventions", "featureType", "source", "history", "date_created",
                        "input_files", "level_type")


def variable_attrs(name: str) -> dict[str, str]:
    """CF attributes of a contract output variable."""
    standard_name, units, long_name = VARIABLES[name]
    attrs = {"units": units, "long_name": long_name}
    if standard_name:
        attrs["standard_name"] = standard_name
    return attrs


def now_iso() -> str:
    """The current UTC time, ISO 8601, to the second."""
    return _dt.datetime.now(_dt.UTC).replace(microsecond=0).isoformat().replace("+00:00", "Z")


def quality_summary(ds: xr.Dataset) -> dict[str, float | int]:
    """The global quality figures of a result, from its per-slab figures in memory.

    Each data variable of :data:`flowpipe.choices.QUALITY_FIGURES` is summed up
    as that table says (the largest slab, or the total), under its own name.
    Figures of a lazy result are not known yet and left out:
    :func:`flowpipe.store.write` sums them up from what it wrote.
    """
    return {name: getattr(ds[name], how)().item() for name, how in QUALITY_FIGURES.items()
            if name in ds.data_vars and ds[name].chunks is None}


def global_attrs(ds: xr.Dataset, *, title: str, summary: str, references: str) -> dict[str, str]:
    """The global attributes of a flowpipe output (ACDD-1.3 discovery set).

    ``history`` gets one more line (time and command) after the one ``ds`` has;
    the kind of vertical coordinate (``level_type``) is carried over, so that
    :func:`complete` can restore the level's attributes.
    """
    created = now_iso()
    inputs = ds.attrs.get("input_files", "")
    command = " ".join(sys.argv) if sys.argv and sys.argv[0] else "flowpipe (Python API)"
    history = f"{created} {command}"
    previous = ds.attrs.get("history")
    return {
        "Conventions": CONVENTIONS,
        "title": title,
        "summary": summary,
        "source": f"flowpipe {__version__}",
        "history": f"{previous}\n{history}" if previous else history,
        "date_created": created,
        "references": references,
        "comment": CAUTION,
        "input_files": inputs,
        **({"level_type": ds.attrs["level_type"]} if "level_type" in ds.attrs else {}),
    }


def complete(ds: xr.Dataset, site: dict[str, str] | None = None) -> xr.Dataset:
    """A shallow copy of ``ds`` with every CF / ACDD attribute flowpipe can infer.

    Fills in, without overwriting what is set: the contract's attributes of
    its variables; ``long_name``, ``axis`` and ``coverage_content_type`` of
    coordinates; ``units_metadata`` of times; ``coverage_content_type`` of
    data variables; for CF trajectories, the coordinates attribute (by making
    time, latitude, longitude and the vertical position coordinates); and
    the global ACDD set, including geospatial and time coverage and keywords;
    the global quality figures (:func:`quality_summary`).
    ``Conventions`` is always flowpipe's, and ``comment`` always includes
    :data:`CAUTION`. Gridded outputs get a grid mapping variable (:data:`CRS`)
    and latitude-longitude cell bounds. Attribute values are only of types a
    netCDF-3 file can hold (no 64-bit integers, no booleans).

    Parameters
    ----------
    ds : xarray.Dataset
        A stage's result.
    site : dict, optional
        Global attributes a site stamps on every output (the config's
        ``[metadata]`` table, ``--attribute KEY=VALUE``): they replace what the
        stage set, except :data:`PROTECTED_ATTRIBUTES`; ``id_prefix`` becomes
        the ACDD ``id`` (the prefix, then the title's words) unless ``id`` is given.
    """
    out = ds.copy()
    if str(out.attrs.get("featureType", "")).lower() == "trajectory":
        located = [name for name in out.data_vars if _is_location(out[name])]
        out = out.set_coords(located)
        _point_coordinates(out)
    else:
        out = _grid_mapping(out)
    bounds = {var.attrs["bounds"] for var in out.variables.values() if "bounds" in var.attrs}
    for name in list(out.variables):
        if name not in bounds:  # bounds inherit their coordinate's attributes (CF 7.1)
            _complete_variable(out, name)
    attrs = dict(out.attrs)
    if "date_created" not in attrs:  # not yet annotated by a stage
        stage = global_attrs(
            out,
            title=attrs.get("title", f"flowpipe output: {', '.join(map(str, out.data_vars))}"),
            summary=attrs.get("summary", "Wind-field kinematics computed by flowpipe."),
            references=attrs.get("references", DEFAULT_REFERENCES),
        )
        attrs.update(stage)
    attrs.setdefault("references", DEFAULT_REFERENCES)
    attrs["Conventions"] = CONVENTIONS
    comment = str(attrs.get("comment", ""))
    if CAUTION not in comment:
        attrs["comment"] = f"{comment}\n{CAUTION}" if comment else CAUTION
    for key, value in _discovery(out).items():
        attrs.setdefault(key, value)
    for key, value in quality_summary(out).items():
        attrs.setdefault(key, value)
    attrs.update(_site_attributes(site or {}, attrs))
    out.attrs = {key: netcdf3_value(value) for key, value in attrs.items()}
    for var in out.variables.values():
        var.attrs = {key: netcdf3_value(value) for key, value in var.attrs.items()}
    return out


def _site_attributes(site: dict[str, str], attrs: dict[str, object]) -> dict[str, str]:
    """The site's global attributes, ``id_prefix`` turned into an ACDD ``id``."""
    found = {key: str(value) for key, value in site.items()
             if key not in PROTECTED_ATTRIBUTES and key != "id_prefix"}
    if "id_prefix" in site and "id" not in found:
        words = "_".join(str(attrs.get("title", "flowpipe output")).lower().split())
        found["id"] = f"{site['id_prefix']}{words}_{attrs.get('date_created', now_iso())}"
    return found


def netcdf3_value(value: object) -> object:
    """An attribute value as a type netCDF-3 files can hold.

    The classic format has 8-, 16- and 32-bit integers, 32- and 64-bit floats
    and text (NetCDF User Guide, "Data Types"); 64-bit and unsigned integers
    and booleans become 32-bit integers where they fit, doubles otherwise.
    """
    if isinstance(value, str | bytes) or dask.is_dask_collection(value):
        return value
    array = np.asarray(value)
    if array.dtype == bool:
        return array.astype(np.int8) if array.ndim else np.int8(array)
    if np.issubdtype(array.dtype, np.integer) and array.dtype.itemsize * 8 > 32 - (
            array.dtype.kind == "u"):
        info = np.iinfo(np.int32)
        fits = array.size == 0 or (array.min() >= info.min and array.max() <= info.max)
        converted = array.astype(np.int32 if fits else np.float64)
        return converted if array.ndim else converted[()]
    return value


def _point_coordinates(ds: xr.Dataset) -> None:
    """Name the position coordinates in every per-point variable (CF 1.11 section 9.1).

    A reader of discrete sampling geometries finds a feature's space-time
    coordinates through the ``coordinates`` attribute of its data variables.
    """
    located = [str(name) for name in ds.coords if ("obs" in ds[name].dims and name != "obs")
               or ds[name].ndim == 0]  # and the one level of a 2-D wind (10 m, say)
    for name in ds.data_vars:
        if "obs" in ds[name].dims:
            ds[name].encoding["coordinates"] = " ".join(located)


def _grid_mapping(ds: xr.Dataset) -> xr.Dataset:
    """Add the latitude-longitude grid mapping and cell bounds to a gridded Dataset.

    CF 1.11 section 5.6 (``grid_mapping_name = "latitude_longitude"``, with
    the Earth radius flowpipe computes with, section 5.6.1) and section 7.1
    (cell boundaries). A coordinate's bounds lie half-way between its points
    and half a spacing beyond the outer ones; latitudes stop at the poles.
    """
    if "latitude" not in ds.dims or "longitude" not in ds.dims:
        return ds
    out = ds.assign({CRS: xr.DataArray(np.int32(0), attrs={
        "grid_mapping_name": "latitude_longitude",
        "earth_radius": EARTH_RADIUS,
        "long_name": "coordinate reference system: a sphere of the radius flowpipe computes with"})})
    for name in out.data_vars:
        dims = out[name].dims
        if name != CRS and "latitude" in dims and "longitude" in dims:
            out[name].attrs.setdefault("grid_mapping", CRS)
    for name, limit in (("latitude", 90.0), ("longitude", None)):
        bounds = f"{name}_bounds"
        if bounds in out.variables or out[name].size < 2:
            continue
        values = np.asarray(out[name].values, dtype=np.float64)
        edges = np.concatenate([[1.5 * values[0] - 0.5 * values[1]],
                                0.5 * (values[1:] + values[:-1]),
                                [1.5 * values[-1] - 0.5 * values[-2]]])
        if limit is not None:
            edges = np.clip(edges, -limit, limit)
        # a data variable, not a coordinate: xarray would list a coordinate in every
        # field's ``coordinates`` attribute, which CF reserves for auxiliary coordinates
        out[bounds] = ((name, "bounds"), np.stack([edges[:-1], edges[1:]], axis=1))
        out[name].attrs["bounds"] = bounds
    return out


def _is_location(da: xr.DataArray) -> bool:
    standard_name = da.attrs.get("standard_name")
    return standard_name in ("latitude", "longitude", "time", *_VERTICAL) or is_time(da.variable)


def _complete_variable(ds: xr.Dataset, name: Hashable) -> None:
    var = ds.variables[name]
    attrs = dict(var.attrs)
    canonical = variable_attrs(str(name)) if name in VARIABLES else {}
    canonical.update(CANONICAL_COORDINATES.get(str(name), {}))
    if name == "level" and name in ds.dims:
        canonical.update(CANONICAL_LEVELS.get(str(ds.attrs.get("level_type")), {}))
    for key, value in canonical.items():
        attrs.setdefault(key, value)
    if is_time(var):
        attrs.setdefault("standard_name", "time")
        if _standard_calendar(var):
            attrs.setdefault("units_metadata", TIME_UNITS_METADATA)
    standard_name = attrs.get("standard_name")
    if _is_temperature(attrs.get("units")):
        attrs.setdefault("units_metadata", "temperature: on_scale"
                         if str(standard_name).endswith("temperature") else "temperature: unknown")
    is_coordinate = name in ds.coords
    if standard_name in COORDINATES:
        long_name, axis = COORDINATES[standard_name]
        attrs.setdefault("long_name", long_name)
        if name in ds.dims:  # CF 1.11 section 4: axis on coordinate variables
            attrs.setdefault("axis", axis)
    attrs.setdefault("long_name", str(standard_name or name).replace("_", " "))
    if "flag_values" in attrs:
        attrs["flag_values"] = np.asarray(attrs["flag_values"]).astype(var.dtype)
    if standard_name in COORDINATES or (is_coordinate and name in ds.dims):
        content = "coordinate"
    elif "flag_values" in attrs or "flag_masks" in attrs or name in QUALITY_FIGURES:
        content = "qualityInformation"
    elif "cf_role" in attrs:
        content = "referenceInformation"
    else:
        content = "modelResult"
    attrs.setdefault("coverage_content_type", content)
    var.attrs = attrs


def _is_temperature(units: object) -> bool:
    """True for units of temperature, which CF 1.11 section 3.1.2 asks to qualify."""
    try:
        return isinstance(units, str) and cf_units.Unit(units).is_convertible("K")
    except ValueError:
        return False


def is_time(var: xr.Variable) -> bool:
    """True for decoded times: numpy datetimes or cftime objects."""
    values = var.values if var.dtype == object and var.size else None
    return np.issubdtype(var.dtype, np.datetime64) or (
        values is not None and hasattr(values.flat[0], "calendar"))


def _standard_calendar(var: xr.Variable) -> bool:
    if np.issubdtype(var.dtype, np.datetime64):
        return True
    return getattr(var.values.flat[0], "calendar", "") in ("standard", "gregorian",
                                                           "proleptic_gregorian")


def _find(ds: xr.Dataset, standard_names: tuple[str, ...]) -> xr.DataArray | None:
    for name in ds.variables:
        if ds.variables[name].attrs.get("standard_name") in standard_names:
            return ds[name]
    return None


def iso_time(value: object, timespec: str = "seconds") -> str:
    """ISO 8601 text (UTC, ``Z``) of a numpy or cftime time, to the second or minute."""
    if isinstance(value, np.datetime64):
        unit = {"seconds": "s", "minutes": "m"}[timespec]
        return f"{np.datetime_as_string(value, unit=unit)}Z"
    return f"{value.isoformat(timespec=timespec)}Z"


def longitude_range(values: np.ndarray) -> tuple[float, float]:
    """The shortest arc of longitudes that holds every value: (west end, east end).

    The arc is the circle less its largest empty gap, so a track that crosses
    180 degrees gets a west end greater than its east end, as ACDD-1.3 allows
    for ``geospatial_lon_min`` / ``geospatial_lon_max``. When the gap across
    the values' own range is as short as that arc, it is kept as it is.
    """
    finite = np.asarray(values, dtype=np.float64)
    finite = finite[np.isfinite(finite)]
    low, high = float(finite.min()), float(finite.max())
    unique = np.unique(np.mod(finite + 180.0, 360.0) - 180.0)
    if unique.size < 2:
        return low, high
    gaps = np.diff(np.concatenate([unique, [unique[0] + 360.0]]))
    largest = int(np.argmax(gaps))
    if high - low <= 360.0 - gaps[largest]:
        return low, high
    if largest == gaps.size - 1:
        return float(unique[0]), float(unique[-1])
    return float(unique[largest + 1]), float(unique[largest])


def _discovery(ds: xr.Dataset) -> dict[str, object]:
    """ACDD-1.3 coverage, keyword and vocabulary attributes read off the Dataset."""
    found: dict[str, object] = {}
    names = sorted({str(ds[n].attrs["standard_name"]) for n in ds.data_vars
                    if "standard_name" in ds[n].attrs})
    found["keywords"] = ", ".join(names) if names else "wind kinematics"
    found["keywords_vocabulary"] = STANDARD_NAME_VOCABULARY
    found["standard_name_vocabulary"] = STANDARD_NAME_VOCABULARY
    for key, standard_name, units in (("lat", "latitude", "degrees_north"),
                                      ("lon", "longitude", "degrees_east")):
        da = _find(ds, (standard_name,))
        if da is not None and da.size and np.isfinite(da.values).any():
            low, high = (longitude_range(da.values) if key == "lon" else
                         (float(np.nanmin(da.values)), float(np.nanmax(da.values))))
            found[f"geospatial_{key}_min"] = low
            found[f"geospatial_{key}_max"] = high
            found[f"geospatial_{key}_units"] = units
    vertical = _find(ds, _VERTICAL)
    if vertical is not None and vertical.size and np.isfinite(vertical.values).any():
        found["geospatial_vertical_min"] = float(np.nanmin(vertical.values))
        found["geospatial_vertical_max"] = float(np.nanmax(vertical.values))
        found["geospatial_vertical_units"] = str(vertical.attrs.get("units", ""))
        found["geospatial_vertical_positive"] = str(
            vertical.attrs.get("positive", "down" if vertical.attrs["standard_name"] ==
                               "air_pressure" else "up"))
    if "geospatial_lat_min" in found and "geospatial_lon_min" in found:
        south, north = found["geospatial_lat_min"], found["geospatial_lat_max"]
        west, east = found["geospatial_lon_min"], found["geospatial_lon_max"]
        # ACDD-1.3: WKT, with the axis order of its CRS (EPSG:4326 is latitude, longitude)
        corners = [(south, west), (south, east), (north, east), (north, west), (south, west)]
        found["geospatial_bounds"] = "POLYGON ((" + ", ".join(
            f"{la:.6g} {lo:.6g}" for la, lo in corners) + "))"
        found["geospatial_bounds_crs"] = "EPSG:4326"
    # the valid time: the run (forecast_reference_time) is a time too, but not the coverage
    time = next((ds[n] for n in ds.variables if is_time(ds.variables[n]) and
                 ds[n].attrs.get("standard_name") != "forecast_reference_time"), None)
    if time is not None:
        values = time.values.ravel()
        values = values[~xr.DataArray(values).isnull().values]
        if values.size:
            found["time_coverage_start"] = iso_time(values.min())
            found["time_coverage_end"] = iso_time(values.max())
            found["time_coverage_duration"] = iso_duration(values.max() - values.min())
            row = time.values.reshape(-1, time.shape[-1])[0] if time.ndim else time.values
            steps = {iso_duration(abs(step)) for step in np.diff(row[~xr.DataArray(row).isnull().values])}
            if len(steps) == 1:
                found["time_coverage_resolution"] = steps.pop()
    return found


def iso_duration(interval: object) -> str:
    """An ISO 8601 duration (``PT6H``, ``PT90M``, ``PT1.5S``) of a time difference."""
    if isinstance(interval, np.timedelta64):
        seconds = float(interval / np.timedelta64(1, "s"))
    else:  # datetime.timedelta from cftime
        seconds = interval.total_seconds()
    for unit, size in (("H", 3600.0), ("M", 60.0)):
        if seconds % size == 0:
            return f"PT{seconds / size:.0f}{unit}"
    return f"PT{seconds:g}S"
