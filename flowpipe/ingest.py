"""Open gridded wind files as one canonical, lazily loaded Dataset.

The canonical wind Dataset every stage receives:

* dimensions, in this order where present: any extra leading dimensions
  (ensemble members, say), ``time``, ``level``, ``latitude``, ``longitude``;
* ``latitude`` ascending (south to north), ``longitude`` ascending; on a global
  grid longitudes lie in ``[0, 360)`` and a repeated wrap-around column is
  dropped; on a limited-area grid they are continuous across the date line,
  the first in [-180, 180) (:func:`flowpipe.grid.continuous_longitudes`);
* ``u`` and ``v`` in m s-1 with ``standard_name`` ``eastward_wind`` /
  ``northward_wind`` and the name they had in the file in ``source_name``;
* ``omega`` (Pa s-1, ``lagrangian_tendency_of_air_pressure``) or ``w``
  (m s-1, ``upward_air_velocity``) when the file has a vertical velocity;
* ``level`` in hPa (``air_pressure``, ``positive = "down"``) for pressure
  levels, in m (``height``) for height levels, untouched otherwise, with the
  attribute ``level_type`` on the Dataset (``pressure``, ``height``, ``other``
  or ``none``);
* every other data variable on the same grid, under its own name (so it can
  be sampled along trajectories);
* times as in the file: numpy datetimes for the standard calendars, cftime
  objects for ``360_day``, ``noleap`` and the others;
* ``time`` is always the *valid* time. Forecasts also carry the coordinates
  ``forecast_reference_time`` (the run, or cycle: a scalar when the Dataset
  holds one run, else 1-D along ``time``) and ``forecast_period`` (the lead
  time, timedelta64 along ``time``), with those CF standard names and
  ``time = forecast_reference_time + forecast_period``. Three layouts of a
  file are read into this one (see :func:`forecast_pieces`): valid time as
  the dimension with the lead as a coordinate; the lead as the dimension
  with the valid time as its coordinate; runs x leads with a 2-D valid time;
* missing values (``_FillValue`` / ``missing_value``) as NaN;
* dask-backed, one whole latitude-longitude slab per chunk by default.
"""

from __future__ import annotations

import datetime as _dt
import glob
import os
import warnings
from collections.abc import Callable, Iterable, Mapping
from pathlib import Path

import cf_units
import cf_xarray  # noqa: F401  (registers the .cf accessor)
import numpy as np
import xarray as xr
from xarray.backends import NetCDF4BackendEntrypoint

from .annotate import CANONICAL_COORDINATES, iso_time
from .choices import DEFAULT_MAX_SPEED, IMPLAUSIBLE_CHOICES
from .errors import FlowpipeWarning, InputError, UsageError
from .grid import continuous_longitudes

#: Standard names that identify the eastward and northward wind (CF 1.11
#: standard-name table), in order of preference.
U_STANDARD_NAMES = ("eastward_wind", "x_wind")
V_STANDARD_NAMES = ("northward_wind", "y_wind")
#: Short names in common use when a file carries no standard names (common practice).
U_SHORT_NAMES = ("u", "ua", "uwnd", "U", "u10", "U10", "UGRD", "ugrd", "10u", "uas")
V_SHORT_NAMES = ("v", "va", "vwnd", "V", "v10", "V10", "VGRD", "vgrd", "10v", "vas")
#: Vertical velocities: canonical name, standard name, units, short names.
VERTICAL_VELOCITIES = (
    ("omega", "lagrangian_tendency_of_air_pressure", "Pa s-1", ("omega", "wap", "OMEGA", "w_p")),
    ("w", "upward_air_velocity", "m s-1", ("w", "wa", "W")),
)
CANONICAL_DIMS = ("time", "level", "latitude", "longitude")
DEFAULT_CHUNKS = {"realization": 1, "time": 1, "level": 1, "latitude": -1, "longitude": -1}
#: Ensemble members: the CF standard name ``realization`` (CF 1.11 standard-name table),
#: else a dimension of one of these names (*common practice*; ``number`` is GRIB's key).
MEMBER_NAMES = ("realization", "member", "ensemble_member", "ensemble", "ens", "number")



def expand_paths(paths: str | os.PathLike | Iterable[str | os.PathLike]) -> list[Path]:
    """Expand a path, a glob or a list of them into a sorted list of files."""
    items = [paths] if isinstance(paths, str | os.PathLike) else list(paths)
    found: list[Path] = []
    for item in items:
        text = os.fspath(item)
        if glob.has_magic(text):
            matches = sorted(glob.glob(text))
            if not matches:
                raise InputError(f"{text}: no file matches this pattern")
            found.extend(Path(m) for m in matches)
        elif Path(text).is_file() or is_zarr_store(Path(text)):
            found.append(Path(text))
        elif Path(text).is_dir():
            raise InputError(f"{text}: is a directory, not a NetCDF or GRIB file nor a Zarr "
                             "store (no Zarr metadata in it); give a file or a store")
        else:
            raise InputError(f"{text}: no such file")
    if not found:
        raise InputError("no input files given")
    return found


def open_wind(
    paths: str | os.PathLike | Iterable[str | os.PathLike],
    u: str | None = None,
    v: str | None = None,
    chunks: Mapping[str, int] | None = None,
    *,
    max_speed: float = DEFAULT_MAX_SPEED,
    implausible: str | None = "refuse",
    allow_gaps: bool = False,
    run: str | None = None,
    leads: Iterable[float] | None = None,
    members: Iterable[int] | None = None,
) -> xr.Dataset:
    """Open one file, several files or a glob as one canonical wind Dataset.

    Parameters
    ----------
    paths : str, path or iterable of them
        NetCDF or GRIB files (told apart by their first bytes) or glob patterns.
        Several files are combined along time.
    u, v : str, optional
        Names of the eastward and northward wind variables, when they cannot
        be found by CF standard name or common short name.
    chunks : mapping, optional
        Dask chunk sizes by canonical dimension name; the default is one whole
        latitude-longitude slab per chunk.
    max_speed : float
        Largest plausible wind speed in m s-1 (:data:`DEFAULT_MAX_SPEED`).
    implausible : {"refuse", "missing"} or None
        What to do with wind values that are not finite (inf) or whose speed
        exceeds ``max_speed``: refuse the input (an :class:`InputError` naming
        the variable, the count and the first location, raised when the slab
        is computed), or treat them as missing (a warning of the first slab met, and the
        lazily computed count in the attribute ``implausible_values``).
        The check runs inside each slab's dask task: building a result
        computes nothing. None: no check, the values as the file has them
        (what :func:`wind_checks` describes).
    allow_gaps : bool
        Accept a time series whose spacing has gaps (refused by default; not
        checked when ``leads`` are chosen).
    run : str, optional
        Keep only the forecast run (``forecast_reference_time``) given in ISO
        8601 (``"2026-12-01T00"``, ``"2026-12-01T00Z"``), or ``"latest"``, the
        newest run present in all files. Without it every run is kept, and
        runs whose valid times overlap are refused (choose one).
    leads : iterable of float, optional
        Keep only these lead times (``forecast_period``), in hours.
    members : iterable of int, optional
        Keep only these ensemble members (values of ``realization``), in this
        order; the dimension stays, also for one member.

    Returns
    -------
    xarray.Dataset
        The canonical wind Dataset described in this module's docstring.

    Raises
    ------
    flowpipe.errors.InputError
        With a one-line message naming the file and the problem.
    """
    files = expand_paths(paths)
    parts, owners = _open_parts(files, u, v)
    chosen = choose_run(run, forecast_runs(parts), files)
    wanted_leads = None if leads is None else [float(h) for h in leads]
    in_run = [(_select_forecast(part, chosen, None), path)
              for part, path in zip(parts, owners, strict=True)]
    in_run = [(part, path) for part, path in in_run if part is not None]
    kept = in_run
    if wanted_leads is not None:
        _check_leads([part for part, _ in in_run], wanted_leads, files)
        kept = [(_select_forecast(part, None, wanted_leads), path) for part, path in in_run]
        kept = [(part, path) for part, path in kept if part is not None]
    ds = _combine([k[0] for k in kept], [k[1] for k in kept],
                  allow_gaps or wanted_leads is not None)
    ds = _single_run(ds)
    ds = _select_members(ds, members, files)
    wanted = dict(DEFAULT_CHUNKS)
    wanted.update(chunks or {})
    ds = ds.chunk({d: c for d, c in wanted.items() if d in ds.dims})
    ds = ds.assign_coords({n: ds[n].compute() for n in FORECAST_COORDINATES if n in ds.coords})
    ds.attrs["input_files"] = "\n".join(str(p) for p in files)
    if implausible is not None:
        ds = _plausible(ds, max_speed, implausible)
    return ds


def _check_classic_size(path: Path) -> None:
    """Refuse a truncated NetCDF-3 file, which the netCDF library reads as fill values.

    SciPy's reader maps the file and lays each variable over it at the offset
    the header gives, which fails when the data run past the end of the file.
    """
    with open(path, "rb") as handle:
        if handle.read(4) not in (b"CDF\x01", b"CDF\x02"):  # classic and 64-bit offset
            return
    import scipy.io  # here: NetCDF-4 inputs need no scipy.io

    try:
        scipy.io.netcdf_file(path, mode="r", mmap=True).close()
    except Exception as exc:
        raise InputError(
            f"{path}: the NetCDF-3 file is shorter than its header says (truncated?); "
            "copy or download it again"
        ) from exc


#: First bytes of NetCDF files: classic, 64-bit offset and 64-bit data (NetCDF-3), and
#: HDF5 (NetCDF-4), whose signature may follow a user block of 512, 1024, ... bytes.
NETCDF3_SIGNATURES = (b"CDF\x01", b"CDF\x02", b"CDF\x05")
HDF5_SIGNATURE = b"\x89HDF\r\n\x1a\n"


#: Files at the top of a Zarr store: its metadata (format 3, and format 2's group,
#: array and consolidated metadata; Zarr specifications v2 and v3).
ZARR_METADATA = ("zarr.json", ".zgroup", ".zarray", ".zmetadata")


def is_zarr_store(path: Path) -> bool:
    """Whether ``path`` is a directory holding Zarr metadata."""
    return path.is_dir() and any((path / name).is_file() for name in ZARR_METADATA)


def open_store(path: Path, **options) -> xr.Dataset:
    """``xarray.open_dataset`` of a NetCDF file (:func:`open_netcdf`) or a Zarr store.

    Raises
    ------
    flowpipe.errors.InputError
        For what is neither, or cannot be read.
    """
    if not is_zarr_store(path):
        return open_netcdf(path, **options)
    try:
        return xr.open_zarr(path, decode_times=xr.coders.CFDatetimeCoder(use_cftime=None),
                            **options)
    except Exception as exc:  # zarr raises many types for unreadable stores
        reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise InputError(f"{path}: cannot be read as a Zarr store ({reason}); check that it "
                         "is complete") from exc


def open_netcdf(path: Path, **options) -> xr.Dataset:
    """``xarray.open_dataset`` of a file that must be NetCDF, with one-line errors.

    Raises
    ------
    flowpipe.errors.InputError
        For a file that is not NetCDF (by its signature), a truncated one, or
        one the netCDF library cannot read.

    References
    ----------
    File signatures: NetCDF User Guide, "File Format Specifications" (classic,
    64-bit offset and CDF-5 headers start with ``CDF`` and a version byte);
    HDF5 File Format Specification, section II.A (the superblock signature
    at byte 0, 512, 1024, 2048, ...).
    """
    try:
        handle = open(path, "rb")
    except OSError as exc:
        raise InputError(f"{path}: cannot be read ({exc.strerror})") from None
    with handle:
        netcdf3 = handle.read(4) in NETCDF3_SIGNATURES
        hdf5, offset = False, 0
        while not (netcdf3 or hdf5) and offset <= 1 << 20:
            handle.seek(offset)
            block = handle.read(8)
            hdf5 = block == HDF5_SIGNATURE
            if len(block) < 8:
                break
            offset = 512 if offset == 0 else 2 * offset
    if not (netcdf3 or hdf5):
        raise InputError(f"{path}: is not a NetCDF file (neither NetCDF-3 nor NetCDF-4/HDF5 "
                         "nor GRIB by its first bytes); check the path")
    _check_classic_size(path)
    try:
        # The backend by its class: xarray looks no other up, where a name or none makes it
        # load every installed backend to choose (cfgrib's import alone took 0.09 s)
        return xr.open_dataset(path, decode_times=xr.coders.CFDatetimeCoder(use_cftime=None),
                               engine=NetCDF4BackendEntrypoint, **options)
    except Exception as exc:  # netCDF4/HDF5 raise many types for unreadable files
        reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise InputError(
            f"{path}: cannot be read as NetCDF ({reason}); check that the file is complete "
            "and is NetCDF-3 or NetCDF-4"
        ) from exc


#: First bytes of a GRIB message (edition 1 or 2): the four letters "GRIB".
GRIB_SIGNATURE = b"GRIB"
GRIB_INSTALL = "pip install 'flowpipe[grib]'"


def is_grib(path: Path) -> bool:
    """Whether a file begins with a GRIB message (by its first bytes, not its name).

    References
    ----------
    WMO (2019), Manual on Codes, Volume I.2 (WMO-No. 306), FM 92 GRIB edition 2,
    section 0: octets 1-4 are "GRIB" (CCITT IA5).
    """
    try:
        with open(path, "rb") as handle:
            return handle.read(4) == GRIB_SIGNATURE
    except OSError:
        return False  # open_netcdf names the reason


def open_grib(path: Path, u: str | None = None, v: str | None = None) -> xr.Dataset:
    """A GRIB file as a lazily loaded Dataset, read by cfgrib (on ecCodes).

    cfgrib names the axes by CF standard names: ``forecast_reference_time``
    (``time``), ``forecast_period`` (``step``), ``time`` (``valid_time``),
    ``air_pressure`` (``isobaricInhPa``, hPa), ``realization`` (``number``) and
    ``eastward_wind`` / ``northward_wind`` for u and v, so the file goes through
    the same ingest as NetCDF. No index file is written beside the input, and a
    damaged message is an error. When the file holds several hypercubes (say
    pressure levels and 10 m winds), the one with the most wind values is taken.

    Raises
    ------
    flowpipe.errors.InputError
        When cfgrib or ecCodes is not installed (the message says how to install
        them) or the file cannot be decoded.

    References
    ----------
    cfgrib documentation, "Dataset / Variable API" (the ``cfgrib`` xarray engine,
    ``indexpath``, ``open_datasets``); ecCodes GRIB decoding.
    """
    try:
        import cfgrib
    except (ImportError, RuntimeError):  # RuntimeError: cfgrib without the ecCodes library
        raise InputError(f"{path}: is a GRIB file; reading GRIB needs the optional readers: "
                         f"{GRIB_INSTALL}") from None
    # never an index file beside an input; a damaged message is an error, not left out
    backend = {"indexpath": "", "errors": "raise"}
    try:
        try:
            return xr.open_dataset(path, engine="cfgrib", chunks={}, backend_kwargs=backend)
        except cfgrib.dataset.DatasetBuildError:
            with warnings.catch_warnings():  # xarray's notices about cfgrib's own merges
                warnings.simplefilter("ignore", FutureWarning)
                cubes = cfgrib.open_datasets(path, backend_kwargs=backend, chunks={})
    except Exception as exc:  # ecCodes raises many types for undecodable messages
        reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise InputError(f"{path}: cannot be read as GRIB ({reason}); check that the file "
                         "is complete") from exc
    sizes = {}
    for i, cube in enumerate(cubes):
        un = _find_variable(cube, u, U_STANDARD_NAMES, U_SHORT_NAMES)
        if un is not None and _find_variable(cube, v, V_STANDARD_NAMES, V_SHORT_NAMES):
            sizes[i] = cube[un].size
    return cubes[max(sizes, key=sizes.get)] if sizes else cubes[0]  # else _canonical says


def open_input(path: Path, u: str | None = None, v: str | None = None) -> xr.Dataset:
    """A NetCDF or GRIB file (told apart by its first bytes) or a Zarr store as a lazy
    Dataset."""
    if is_grib(path):
        return open_grib(path, u, v)
    return open_store(path, chunks={})


def _open_parts(files: list[Path], u: str | None, v: str | None
                ) -> tuple[list[xr.Dataset], list[Path]]:
    """The canonical pieces of every file (one per run of a runs x leads file), and the
    file each came from."""
    parts: list[xr.Dataset] = []
    owners: list[Path] = []
    for path in files:
        raw = open_input(path, u, v)
        try:
            pieces = [_canonical(piece, path, u, v) for piece in forecast_pieces(raw, path)]
        except InputError:
            raw.close()
            raise
        parts.extend(pieces)
        owners.extend([path] * len(pieces))
    return parts, owners


def _find_variable(
    ds: xr.Dataset, explicit: str | None, standard_names: tuple[str, ...], short_names: tuple[str, ...]
) -> str | None:
    if explicit is not None:
        return explicit if explicit in ds.data_vars else None
    for name in standard_names:
        for height_suffix in ("", "_at_10m"):  # some writers append the height
            found = ds.cf.standard_names.get(name + height_suffix)
            if found:
                return found[0]
    for name in short_names:
        if name in ds.data_vars:
            return name
    return None


def find_coordinate(ds: xr.Dataset, da: xr.DataArray, key: str, axis: str) -> str | None:
    """Name of the coordinate of ``da`` that cf-xarray identifies as ``key`` (or by ``axis``).

    First from its CF attributes (standard_name, axis, positive, units); failing that, as
    cf-xarray's ``guess_coord_axis`` takes it (a time by its datetime values, a vertical
    coordinate or latitude by names such as ``lev_p`` or ``lat``), so that a file's own
    names need no list here. The guess (a copy of the dataset's coordinates and a scan of
    them) is made only when some dimension of ``da`` is one no CF attribute names.
    """
    found = _named(ds, da, key, axis)
    if found is None:
        claimed = {name for names in (*ds.cf.coordinates.values(), *ds.cf.axes.values())
                   for name in names}
        if any(dim not in claimed for dim in da.dims):
            found = _named(ds.cf.guess_coord_axis(), da, key, axis)
    return found


def _named(ds: xr.Dataset, da: xr.DataArray, key: str, axis: str) -> str | None:
    """The coordinate of ``da`` that the CF attributes of ``ds`` name ``key`` or ``axis``."""
    for name in [*ds.cf.coordinates.get(key, []), *ds.cf.axes.get(axis, [])]:
        if name in da.coords or name in da.dims:
            return name
    return None


def _canonical(raw: xr.Dataset, path: Path, u_name: str | None, v_name: str | None) -> xr.Dataset:
    names = [_find_variable(raw, u_name, U_STANDARD_NAMES, U_SHORT_NAMES),
             _find_variable(raw, v_name, V_STANDARD_NAMES, V_SHORT_NAMES)]
    if None in names:
        missing = [
            f"--{which} {given}" if given else which
            for which, given, found in (("u", u_name, names[0]), ("v", v_name, names[1]))
            if found is None
        ]
        present = ", ".join(sorted(map(str, raw.data_vars))) or "none"
        raise InputError(
            f"{path}: no wind variable found for {' and '.join(missing)}; variables present: "
            f"{present}; name them with --u NAME --v NAME (config: [input] u, v)"
        )
    un, vn = names
    for dim in raw[un].dims:
        values = raw[dim].values if dim in raw.coords else None
        if values is not None and values.dtype.kind == "f" and not np.isfinite(values).all():
            bad = np.flatnonzero(~np.isfinite(values))
            raise InputError(
                f"{path}: coordinate {dim} has {bad.size} missing (NaN or infinite) value(s), "
                f"the first at index {bad[0]}; a grid needs every coordinate value: repair "
                "the coordinate")
    if raw[un].dims != raw[vn].dims or any(
        not np.array_equal(raw[un][d].values, raw[vn][d].values)
        for d in raw[un].dims if d in raw[un].coords and d in raw[vn].coords
    ):
        raise InputError(
            f"{path}: u ({un}{raw[un].dims}) and v ({vn}{raw[vn].dims}) are on different grids; "
            "interpolate them onto one grid first"
        )
    ds = raw
    lat = find_coordinate(ds, ds[un], "latitude", "Y")
    lon = find_coordinate(ds, ds[un], "longitude", "X")
    if lat is None or lon is None:
        raise InputError(
            f"{path}: {un} has no latitude/longitude coordinates that CF attributes identify "
            "(units degrees_north / degrees_east or standard_name latitude / longitude); add them"
        )
    if ds[lat].ndim != 1 or ds[lon].ndim != 1:
        raise InputError(
            f"{path}: {un} is on a curvilinear grid (2-D {lat}/{lon}); flowpipe supports 1-D "
            "latitude-longitude grids only so far: regrid to a regular latitude-longitude grid first"
        )
    vert = find_coordinate(ds, ds[un], "vertical", "Z")
    # after forecast_pieces the valid time is "time"; cf-xarray could also offer the run
    time = "time" if "time" in ds[un].dims else find_coordinate(ds, ds[un], "time", "T")
    single_level = None
    if vert is not None and ds[vert].size == 1 and (ds[vert].ndim == 0 or vert not in ds[un].dims):
        # one level, such as 10 m: a 2-D field that keeps its level as a scalar coordinate
        single_level = _single_level(ds[vert])
        ds = ds.drop_vars(vert)
        vert = None
    if time is not None and ds[time].ndim == 0:  # one time per file, as a scalar coordinate
        ds = ds.expand_dims(time)
    renames = {lat: "latitude", lon: "longitude"}
    if vert is not None:
        renames[vert] = "level"
    if time is not None:
        renames[time] = "time"
    for old, new in renames.items():
        if ds[old].ndim != 1 or ds[old].dims[0] != old:
            raise InputError(f"{path}: coordinate {old} is not a 1-D dimension coordinate of {un}")
        if new != old and new in ds.variables and new not in renames:
            ds = ds.drop_vars(new)
    ds = ds.rename(renames)
    ds = _members(ds, un)
    ds = _forecast_coordinates(ds, path)
    spatial = set(ds[un].dims)
    keep = [name for name in ds.data_vars if set(ds[name].dims) <= spatial and
            {"latitude", "longitude"} <= set(ds[name].dims)]
    ds = ds[keep]
    ds = _to_canonical_variables(ds, path, un, vn)
    ds = _orient(ds, path)
    ds = _vertical(ds, path)
    if single_level is not None:
        ds = ds.assign_coords({str(single_level.name): single_level})
    _probe(ds, path)
    extra = [d for d in ds["u"].dims if d not in CANONICAL_DIMS]
    order = extra + [d for d in CANONICAL_DIMS if d in ds["u"].dims]
    ds = ds.transpose(*order, ...)
    ds.attrs = {"level_type": ds.attrs["level_type"]}
    if "title" in raw.attrs:
        ds.attrs["input_title"] = str(raw.attrs["title"])
    return ds


def _members(ds: xr.Dataset, un: str) -> xr.Dataset:
    """The ensemble-member dimension of ``un`` (if any) as ``realization``, CF-labelled.

    A scalar ``realization`` coordinate (one member in the file) becomes a dimension of
    length 1, so members of several files are told apart.

    References
    ----------
    CF Conventions 1.11, standard-name table: ``realization``, "used to label a
    dimension that can be thought of as a statistical sample, e.g., labelling members
    of a model ensemble".
    """
    dims = [str(d) for d in ds[un].dims]
    labelled = [d for d in dims if d in ds.variables
                and ds[d].attrs.get("standard_name") == "realization"]
    member = next(iter(labelled), next((n for n in MEMBER_NAMES if n in dims), None))
    if member is None:
        scalar = [n for n in ds.coords if ds[n].ndim == 0
                  and ds[n].attrs.get("standard_name") == "realization"]
        if not scalar:
            return ds
        ds = ds.expand_dims(scalar[0])
        member = scalar[0]
    values = ds[member].values if member in ds.variables else np.arange(ds.sizes[member])
    ds = ds.drop_vars([member], errors="ignore")
    if member != "realization":
        ds = ds.drop_vars(["realization"], errors="ignore").rename({member: "realization"})
    attrs = dict(CANONICAL_COORDINATES["realization"])
    return ds.assign_coords(realization=("realization", values, attrs))


def _select_members(ds: xr.Dataset, members: Iterable[int] | None,
                    files: list[Path]) -> xr.Dataset:
    """The chosen ensemble members (values of ``realization``)."""
    if members is None:
        return ds
    wanted = list(members)
    where = f"{files[0]}{' ...' if len(files) > 1 else ''}"
    if "realization" not in ds.dims:
        raise InputError(f"{where}: has no ensemble members (no realization dimension); leave "
                         "out --members (config: [input] members)")
    present = list(ds["realization"].values)
    missing = [m for m in wanted if m not in present]
    if missing or not wanted:
        raise InputError(f"{where}: member(s) {', '.join(map(str, missing)) or 'none'} not in "
                         f"the input; members present (realization): "
                         f"{', '.join(map(str, present))}")
    return ds.isel(realization=[present.index(m) for m in wanted])


#: Names of the forecast axes: CF 1.11 standard names first (standard-name table), then
#: short names in common use when a file carries none (*common practice*).
REFERENCE_NAMES = ("forecast_reference_time", "reference_time", "init_time")
PERIOD_NAMES = ("forecast_period", "lead_time", "step")
VALID_NAMES = ("valid_time", "time")
FORECAST_COORDINATES = ("forecast_reference_time", "forecast_period")
REFERENCE_ATTRS = {"standard_name": "forecast_reference_time",
                   "long_name": "forecast reference time (the run)"}
PERIOD_ATTRS = {"standard_name": "forecast_period", "long_name": "forecast period (lead time)"}


def forecast_variable(ds: xr.Dataset, standard_name: str, short_names: tuple[str, ...] = (),
                      taken: tuple = ()) -> str | None:
    """The variable of ``ds`` with this standard name, else the first of ``short_names``."""
    for name in ds.variables:
        if name not in taken and ds[name].attrs.get("standard_name") == standard_name:
            return str(name)
    return next((n for n in short_names if n in ds.variables and n not in taken), None)


def forecast_pieces(raw: xr.Dataset, path: Path) -> list[xr.Dataset]:
    """A file's Datasets with the valid time as the dimension ``time`` (one per run).

    The three layouts of forecast files, found by the CF standard names
    ``forecast_reference_time``, ``forecast_period`` and ``time`` (or common
    short names):

    * valid time as the dimension, lead (and run) as coordinates along it or
      scalars: returned as it is, the axes under their canonical names;
    * lead as the dimension, the valid time a coordinate along it (or derived
      as run + lead): the valid time becomes the dimension;
    * runs x leads, the valid time 2-D: one piece per run, each as above.

    References
    ----------
    CF Conventions 1.11, section 4.4 and the standard-name table entries
    ``forecast_reference_time`` and ``forecast_period`` (valid time = reference
    time + period).
    """
    ref = forecast_variable(raw, "forecast_reference_time", REFERENCE_NAMES)
    per = forecast_variable(raw, "forecast_period", PERIOD_NAMES, (ref,))
    if ref is None and per is None:
        return [raw]
    valid = forecast_variable(raw, "time", VALID_NAMES, (ref, per))
    renames = {old: new for old, new in ((ref, "forecast_reference_time"),
                                         (per, "forecast_period"), (valid, "time"))
               if old is not None and old != new}
    ds = raw.rename(renames)
    if "forecast_period" in ds.variables:
        ds = ds.assign_coords(forecast_period=as_timedelta(ds["forecast_period"], path,
                                                            per or ""))
    if "forecast_reference_time" in ds.dims:
        pieces = [ds.isel(forecast_reference_time=i)
                  for i in range(ds.sizes["forecast_reference_time"])]
    else:
        pieces = [ds]
    return [_valid_time_dimension(piece, path) for piece in pieces]


def as_timedelta(da: xr.DataArray, path: Path, name: str) -> xr.DataArray:
    """A lead time as timedelta64 (files whose reader left it as numbers with time units)."""
    attrs = {k: v for k, v in da.attrs.items() if k != "units"}
    if da.dtype.kind == "m":
        return da.astype("timedelta64[ns]").assign_attrs(attrs)
    units = da.attrs.get("units")
    try:
        unit = cf_units.Unit(units) if units else None
    except ValueError:
        unit = None
    if unit is None or not unit.is_convertible("s"):
        raise InputError(f"{path}: the lead time {name} has units {units!r}, not a time "
                         "interval; give it units such as \"hours\"")
    seconds = unit.convert(np.asarray(da.values, dtype=np.float64), "s")
    out = xr.DataArray(np.round(seconds * 1e9).astype("timedelta64[ns]"), dims=da.dims,
                       attrs=attrs)
    return out


def _valid_time_dimension(ds: xr.Dataset, path: Path) -> xr.Dataset:
    """Swap a lead dimension for the valid time along it."""
    if "forecast_period" not in ds.dims:
        return ds
    if "time" not in ds.variables:
        if "forecast_reference_time" not in ds.variables or ds["forecast_reference_time"].ndim:
            raise InputError(f"{path}: the lead time is a dimension but the file has neither "
                             "a valid time along it nor a forecast_reference_time; add one")
        valid = ds["forecast_reference_time"] + ds["forecast_period"]
        ds = ds.assign_coords(time=valid.drop_vars(list(valid.coords)).assign_attrs(
            standard_name="time"))
    if ds["time"].dims != ("forecast_period",):
        raise InputError(f"{path}: the valid time has dimensions {ds['time'].dims}, not that "
                         "of the lead time; it should be time(forecast_period) or "
                         "time(forecast_reference_time, forecast_period)")
    return ds.swap_dims(forecast_period="time")


def _forecast_coordinates(ds: xr.Dataset, path: Path) -> xr.Dataset:
    """``forecast_reference_time`` and ``forecast_period`` along ``time``, each derived from
    the other where only one is given, checked against the valid time."""
    has_ref = "forecast_reference_time" in ds.variables
    has_per = "forecast_period" in ds.variables
    if not (has_ref or has_per):
        return ds
    if "time" not in ds.dims:
        raise InputError(f"{path}: the file has forecast_reference_time or forecast_period "
                         "but no valid time; add a time coordinate")
    time = ds["time"].values
    ref = np.broadcast_to(ds["forecast_reference_time"].values, time.shape) if has_ref else None
    per = np.broadcast_to(ds["forecast_period"].values, time.shape) if has_per else None
    if ref is None:
        ref = time - per
    elif per is None:
        per = time - ref
    elif np.issubdtype(time.dtype, np.datetime64) and np.any(ref + per != time):
        raise InputError(f"{path}: the valid time is not forecast_reference_time + "
                         "forecast_period; check the time coordinates")
    if not np.issubdtype(np.asarray(per).dtype, np.timedelta64):
        raise InputError(f"{path}: lead times of this calendar cannot be read yet; give "
                         "the valid time only")
    ds = ds.drop_vars([n for n in ("forecast_reference_time", "forecast_period")
                       if n in ds.variables])
    ds = ds.assign_coords(
        forecast_reference_time=("time", np.array(ref), dict(REFERENCE_ATTRS)),
        forecast_period=("time", np.asarray(per).astype("timedelta64[ns]"), dict(PERIOD_ATTRS)))
    return ds


def parse_iso(text: str, what: str) -> str:
    """ISO 8601 text as ``YYYY-MM-DDTHH:MMZ`` (UTC), to compare with :func:`iso_time`.

    Raises
    ------
    flowpipe.errors.InputError
        ``what`` and the text, when it is not ISO 8601.
    """
    try:
        parsed = _dt.datetime.fromisoformat(text.strip().replace("Z", "+00:00"))
    except ValueError as exc:
        raise InputError(f"{what} {text!r} is not ISO 8601 (for example "
                         "2026-12-01T00Z or 2026-12-01T06:00)") from exc
    if parsed.tzinfo is not None:
        parsed = parsed.astimezone(_dt.UTC).replace(tzinfo=None)
    return f"{parsed.isoformat(timespec='minutes')}Z"


def run_text(value: object) -> str:
    """A run as people write it: ``2026-12-01T00Z`` (with minutes when they are not 0)."""
    text = iso_time(value, "minutes")
    return text[:-4] + "Z" if text.endswith(":00Z") else text


def lead_hours(values: object) -> np.ndarray:
    """Lead times (timedelta64) in hours."""
    return np.asarray(values, dtype="timedelta64[ns]") / np.timedelta64(1, "h")


def forecast_runs(parts: Iterable[xr.Dataset]) -> list:
    """The runs (forecast reference times) present, oldest first."""
    found = {value for part in parts if "forecast_reference_time" in part.coords
             for value in np.atleast_1d(part["forecast_reference_time"].values)}
    return sorted(found)


def choose_run(run: str | None, runs: list, files: list[Path]) -> object:
    """The run ``run`` names (ISO 8601 or ``"latest"``) among ``runs``; None for all."""
    if run is None:
        return None
    where = f"{files[0]}{' ...' if len(files) > 1 else ''}"
    if not runs:
        raise InputError(f"{where}: the input has no forecast_reference_time (no forecast run); "
                         "leave out --run (config: [input] run)")
    if run == "latest":
        return runs[-1]
    wanted = parse_iso(run, "run")
    texts = [iso_time(r, "minutes") for r in runs]
    if wanted not in texts:
        raise InputError(f"{where}: run {run} is not in the input; runs present: "
                         f"{', '.join(run_text(r) for r in runs)}")
    return runs[texts.index(wanted)]


def _select_forecast(part: xr.Dataset, run: object,
                     leads: list[float] | None) -> xr.Dataset | None:
    """The times of ``part`` in the chosen run and leads (None when none is)."""
    if run is None and leads is None:
        return part
    if "forecast_reference_time" not in part.coords:
        return None
    keep = np.ones(part.sizes["time"], dtype=bool)
    if run is not None:
        keep &= part["forecast_reference_time"].values == run
    if leads is not None:
        hours = lead_hours(part["forecast_period"].values)
        keep &= np.isclose(hours[:, None], np.array(leads)[None, :], atol=1e-6).any(axis=1)
    return part.isel(time=np.flatnonzero(keep)) if keep.any() else None


def forecast_axes(paths: str | os.PathLike | Iterable[str | os.PathLike], u: str | None = None,
                  v: str | None = None) -> tuple[list, list[float]]:
    """The runs (oldest first) and the lead times in hours present in files (for
    ``flowpipe inspect``: it reads coordinates only)."""
    parts, _ = _open_parts(expand_paths(paths), u, v)
    leads = sorted({float(h) for part in parts if "forecast_period" in part.coords
                    for h in lead_hours(part["forecast_period"].values)})
    return forecast_runs(parts), leads


def files_with_run(paths: Iterable[Path], run: str, u: str | None = None,
                   v: str | None = None) -> list[Path]:
    """The files that hold the run ``run`` names (ISO 8601, or ``"latest"``: the newest run
    among all of them)."""
    files = expand_paths(paths)
    runs = {path: forecast_axes(path, u, v)[0] for path in files}
    chosen = choose_run(run, sorted({r for found in runs.values() for r in found}), files)
    return [path for path in files if chosen in runs[path]]


def forecast_fields(ds: xr.Dataset, index: int | None = None) -> dict[str, str]:
    """The ``{run}`` and ``{lead}`` of output names: ``2026-12-01T00Z`` and the lead in hours,
    ``024`` (several: ``000-048``); ``index`` takes the run and lead of one time only."""
    if "forecast_reference_time" not in ds.variables or "forecast_period" not in ds.variables:
        raise InputError(f"{_source(ds)}: has no forecast run and lead time for {{run}} or "
                         "{lead} in an output name; leave them out of the template")
    runs = np.atleast_1d(ds["forecast_reference_time"].values)
    hours = np.atleast_1d(lead_hours(ds["forecast_period"].values))
    if index is not None:
        hours = hours[index:index + 1]
        runs = runs[index:index + 1] if runs.size > 1 else runs
    run = run_text(min(runs)) + ("" if np.all(runs == runs[0]) else f"-{run_text(max(runs))}")
    low, high = float(hours.min()), float(hours.max())
    lead = f"{low:03g}" + ("" if low == high else f"-{high:03g}")
    return {"run": run, "lead": lead}


def _check_leads(parts: list[xr.Dataset], leads: list[float], files: list[Path]) -> None:
    """Refuse leads (hours) that none of ``parts`` (the chosen run's) has."""
    for part in parts:
        if "forecast_period" not in part.coords:
            raise InputError(f"{files[0]}: has no forecast_period (lead time); leave out --lead "
                             "(config: [input] leads)")
    hours = np.unique(np.concatenate([lead_hours(p["forecast_period"].values) for p in parts]))
    missing = [h for h in leads if not np.isclose(hours, h, atol=1e-6).any()]
    if missing:
        raise InputError(f"{files[0]}{' ...' if len(files) > 1 else ''}: lead(s) "
                         f"{', '.join(f'{h:g}' for h in missing)} h not in the input; leads "
                         f"present: {', '.join(f'{h:g}' for h in hours)} h")


def _single_run(ds: xr.Dataset) -> xr.Dataset:
    """One run: ``forecast_reference_time`` as a scalar coordinate (CF 1.11 section 5.7)."""
    if "forecast_reference_time" not in ds.coords or ds["forecast_reference_time"].ndim == 0:
        return ds
    values = ds["forecast_reference_time"].values
    if values.size and np.all(values == values[0]):
        ds = ds.assign_coords(forecast_reference_time=((), values[0], dict(REFERENCE_ATTRS)))
    return ds


def _velocity(da: xr.DataArray, path: Path, name: str, target: str) -> xr.DataArray:
    units = da.attrs.get("units")
    if units is None:
        raise InputError(
            f"{path}: variable {name} has no units attribute; add one (for example units = "
            f"\"{target}\") so that flowpipe cannot mistake knots for m s-1"
        )
    try:
        unit = cf_units.Unit(units)
    except ValueError as exc:
        raise InputError(f"{path}: variable {name} has units {units!r}, which UDUNITS does not know") from exc
    if not unit.is_convertible(target):
        raise InputError(
            f"{path}: variable {name} has units {units!r}, which is not a {target} quantity; "
            "check that the right variable was picked (--u/--v) and its units attribute"
        )
    factor = float(unit.convert(1.0, target))
    out = da * factor if factor != 1.0 else da.copy()
    out.attrs = {k: v for k, v in da.attrs.items() if k not in ("units", "scale_factor", "add_offset")}
    out.attrs["units"] = target
    out.attrs["source_name"] = name
    out.attrs["source_units"] = units
    # the precision the file stored the values in: what the outputs follow by default
    out.encoding = {"dtype": stored_precision(da)}
    return out


def stored_precision(da: xr.DataArray) -> np.dtype:
    """The floating-point type that holds a variable's values as its file stored them.

    Single precision for 32-bit floats and for integers of 16 bits or fewer packed
    with ``scale_factor``/``add_offset`` (at most 4.8 significant digits, CF 1.11
    section 8.1); double precision otherwise.
    """
    stored = np.dtype(da.encoding.get("dtype", da.dtype))
    if (stored.kind == "f" and stored.itemsize <= 4) or (stored.kind in "iu" and stored.itemsize <= 2):
        return np.dtype(np.float32)
    return np.dtype(np.float64)


def with_input_precision(result: xr.Dataset, wind: xr.Dataset) -> xr.Dataset:
    """``result`` with its floating-point variables to be stored as precisely as ``wind``'s.

    Sets the xarray ``dtype`` encoding, which :func:`flowpipe.write` (precision
    ``"input"``) and plain ``to_netcdf``/``to_zarr`` both honour; computation stays
    in double precision, so results are exact to the stored precision's rounding.
    """
    dtype = stored_precision(wind["u"])
    for var in result.data_vars.values():
        if var.dtype.kind == "f":
            var.encoding["dtype"] = dtype
    return result


def _to_canonical_variables(ds: xr.Dataset, path: Path, un: str, vn: str) -> xr.Dataset:
    out = {}
    out["u"] = _velocity(ds[un], path, un, "m s-1").assign_attrs(
        standard_name="eastward_wind", long_name="eastward wind")
    out["v"] = _velocity(ds[vn], path, vn, "m s-1").assign_attrs(
        standard_name="northward_wind", long_name="northward wind")
    used = {un, vn}
    for canonical, standard_name, units, short in VERTICAL_VELOCITIES:
        found = _find_variable(ds, None, (standard_name,), short)
        if found is not None and found not in used and found in ds.data_vars:
            out[canonical] = _velocity(ds[found], path, found, units).assign_attrs(
                standard_name=standard_name)
            used.add(found)
            break
    for name in ds.data_vars:
        if name not in used and name not in out:
            out[name] = ds[name]
    return xr.Dataset(out)


def _strictly_monotonic(values: np.ndarray) -> int:
    """+1 ascending, -1 descending, 0 neither (or repeated values)."""
    if values.size < 2:
        return 1
    steps = np.diff(values)
    if np.all(steps > 0):
        return 1
    if np.all(steps < 0):
        return -1
    return 0


def _orient(ds: xr.Dataset, path: Path) -> xr.Dataset:
    lat = ds["latitude"].values.astype(np.float64)
    direction = _strictly_monotonic(lat)
    if direction == 0:
        raise InputError(f"{path}: latitude is not strictly monotonic (repeated or unordered values)")
    if np.nanmax(np.abs(lat)) > 90.0 + 1e-6:
        raise InputError(f"{path}: latitude has values beyond +/-90 degrees; check its units")
    if direction < 0:
        ds = ds.isel(latitude=slice(None, None, -1))

    lon = ds["longitude"].values.astype(np.float64)
    unwrapped = lon if _strictly_monotonic(lon) else np.unwrap(lon, period=360.0)
    direction = _strictly_monotonic(unwrapped)
    if direction == 0:
        raise InputError(f"{path}: longitude is not strictly monotonic (repeated or unordered values)")
    if direction < 0:
        ds = ds.isel(longitude=slice(None, None, -1))
        unwrapped = unwrapped[::-1]
    n = unwrapped.size
    if n > 2 and abs(unwrapped[-1] - unwrapped[0] - 360.0) < 1e-6 * 360.0:
        ds = ds.isel(longitude=slice(0, n - 1))  # a repeated wrap-around column
        unwrapped = unwrapped[:-1]
        n -= 1
    steps = np.diff(unwrapped)
    if n > 2 and steps.max() > 360.0 - (unwrapped[-1] - unwrapped[0]) + 1e-6:
        # Stored in ascending order with the gap inside (say -175..-150, 170..180):
        # the domain really starts after its largest internal step.
        cut = int(np.argmax(steps)) + 1
        ds = ds.isel(longitude=np.r_[cut:n, 0:cut])
        unwrapped = np.r_[unwrapped[cut:], unwrapped[:cut] + 360.0]
    step = (unwrapped[-1] - unwrapped[0]) / max(n - 1, 1)
    if n > 2 and abs(n * step - 360.0) < 1e-4 * n:
        wrapped = np.mod(unwrapped, 360.0)
        start = int(np.argmin(wrapped))
        ds = ds.roll(longitude=-start, roll_coords=False)
        new_lon = np.roll(wrapped, -start)
    else:
        new_lon = continuous_longitudes(unwrapped)
    lon_attrs = dict(ds["longitude"].attrs, units="degrees_east", standard_name="longitude")
    lat_attrs = dict(ds["latitude"].attrs, units="degrees_north", standard_name="latitude")
    ds = ds.assign_coords(
        longitude=("longitude", new_lon, lon_attrs),
        latitude=("latitude", ds["latitude"].values.astype(np.float64), lat_attrs),
    )
    for name in ("latitude", "longitude"):
        ds[name].attrs.pop("bounds", None)
        ds[name].encoding = {}
    return ds


def canonical_levels(values: np.ndarray, units: str | None) -> tuple[np.ndarray, str]:
    """Vertical coordinates in hPa (pressure) or m (height), and which: ``"pressure"``,
    ``"height"`` or ``"other"`` (values unchanged).

    References
    ----------
    Unit conversion by UDUNITS-2 through cf-units.
    """
    try:
        unit = cf_units.Unit(units) if units else None
    except ValueError:
        unit = None
    if unit is not None and unit.is_convertible("Pa"):
        return unit.convert(np.asarray(values, dtype=np.float64), "hPa"), "pressure"
    if unit is not None and unit.is_convertible("m"):
        return unit.convert(np.asarray(values, dtype=np.float64), "m"), "height"
    return values, "other"


#: Scalar coordinates of a field on one level, by the kind of level (CF standard names).
SINGLE_LEVEL = {
    "height": ("height", {"units": "m", "standard_name": "height", "positive": "up", "axis": "Z",
                          "long_name": "height above the surface"}),
    "pressure": ("air_pressure", {"units": "hPa", "standard_name": "air_pressure",
                                  "positive": "down", "axis": "Z"}),
}


def _single_level(coordinate: xr.DataArray) -> xr.DataArray | None:
    """The one level of a 2-D field (10 m, 850 hPa) as a scalar coordinate, or None."""
    values, kind = canonical_levels(np.ravel(coordinate.values), coordinate.attrs.get("units"))
    if kind not in SINGLE_LEVEL:
        return None
    name, attrs = SINGLE_LEVEL[kind]
    return xr.DataArray(float(values[0]), name=name, attrs=attrs)


def _vertical(ds: xr.Dataset, path: Path) -> xr.Dataset:
    if "level" not in ds.dims:
        ds.attrs["level_type"] = "none"
        ds = ds.drop_vars("level", errors="ignore")
        return ds
    level = ds["level"]
    if _strictly_monotonic(level.values) == 0:
        raise InputError(f"{path}: vertical coordinate is not strictly monotonic")
    values, kind = canonical_levels(level.values, level.attrs.get("units"))
    if "units" not in level.attrs:
        warnings.warn(f"{path}: the level coordinate has no units, so its levels are only "
                      "labels (per-level results, no trajectories across levels); add units "
                      "such as \"hPa\" or \"m\" to use them as pressure or height",
                      FlowpipeWarning, stacklevel=2)
    attrs = dict(level.attrs)
    if kind == "pressure":
        attrs.update(units="hPa", standard_name="air_pressure", positive="down", axis="Z")
    elif kind == "height":
        attrs.update(units="m", standard_name=attrs.get("standard_name", "height"),
                     positive="up", axis="Z")
    ds = ds.assign_coords(level=("level", values, attrs))
    ds["level"].encoding = {}
    ds.attrs["level_type"] = kind
    return ds


def _probe(ds: xr.Dataset, path: Path) -> None:
    """Read one value at the far end of each wind variable, to catch truncated files early."""
    for name in ("u", "v"):
        da = ds[name]
        try:
            da.isel({d: -1 for d in da.dims}).load()
        except Exception as exc:
            raise InputError(
                f"{path}: variable {name} cannot be read ({str(exc).splitlines()[0]}); "
                "the file is probably truncated"
            ) from exc


def _combine(parts: list[xr.Dataset], files: list[Path], allow_gaps: bool = False) -> xr.Dataset:
    by_members: dict[tuple, list[int]] = {}
    for i, part in enumerate(parts):
        if "realization" in part.dims:
            by_members.setdefault(tuple(part["realization"].values.tolist()), []).append(i)
    if len(by_members) > 1 and sum(map(len, by_members.values())) == len(parts):
        return _combine_members([_combine([parts[i] for i in group], [files[i] for i in group],
                                          allow_gaps) for group in by_members.values()],
                                [files[group[0]] for group in by_members.values()])
    first = parts[0]
    _same_grid(parts, files, ("latitude", "longitude", "level", "realization"))
    if len(parts) == 1:
        if "time" in first.dims:  # one file: its own times, each once
            values, counts = np.unique(first["time"].values, return_counts=True)
            if (counts > 1).any():
                raise InputError(f"time {_time_text(values[np.argmax(counts > 1)])} is given "
                                 f"twice in {files[0]}; give each time once")
        return first
    if "time" not in first.dims:
        raise InputError(f"{files[0]}: several files were given but they have no time "
                         "dimension to combine them along")
    owner = np.concatenate([np.full(p.sizes["time"], i) for i, p in enumerate(parts)])
    ds = xr.concat(parts, dim="time", data_vars="all", coords="minimal", compat="override",
                   join="override", combine_attrs="drop_conflicts")
    times = ds["time"].values
    order = np.argsort(times, kind="stable")
    sorted_times = times[order]
    for i in range(len(sorted_times) - 1):
        if sorted_times[i] == sorted_times[i + 1]:
            a, b = files[owner[order[i]]], files[owner[order[i + 1]]]
            _overlapping_runs(ds, order[i], order[i + 1], a)
            where = f"in {a} and {b}" if a != b else f"twice in {a}"
            raise InputError(f"time {_time_text(sorted_times[i])} is given {where}; "
                             "give each time once")
    if not allow_gaps:
        _check_gaps(sorted_times, [files[owner[k]] for k in order])
    if not np.array_equal(order, np.arange(order.size)):
        ds = ds.isel(time=order)
    return ds


def _same_grid(parts: list[xr.Dataset], files: list[Path], coords: tuple[str, ...]) -> None:
    """Refuse parts whose coordinates ``coords`` or variables differ from the first's."""
    first = parts[0]
    for part, path in zip(parts[1:], files[1:], strict=True):
        for coord in coords:
            a = first[coord].values if coord in first.coords else None
            b = part[coord].values if coord in part.coords else None
            same = (a is None and b is None) or (
                a is not None and b is not None and a.shape == b.shape and np.allclose(a, b))
            if not same:
                raise InputError(f"{path}: its {coord} differs from that of {files[0]}; "
                                 "files combined in one run must share one grid")
        if set(part.data_vars) != set(first.data_vars):
            raise InputError(f"{path}: its variables differ from those of {files[0]}")


def _combine_members(ensemble: list[xr.Dataset], files: list[Path]) -> xr.Dataset:
    """Files of different ensemble members (one file, or series, per member) as one
    Dataset along ``realization``: the same grid and times in each, no member twice."""
    _same_grid(ensemble, files, ("latitude", "longitude", "level"))
    values = np.concatenate([part["realization"].values for part in ensemble])
    unique, counts = np.unique(values, return_counts=True)
    if (counts > 1).any():
        raise InputError(f"{files[0]} ...: member {unique[np.argmax(counts > 1)]} (realization) "
                         "is given by more than one group of files; give each member once")
    for part, path in zip(ensemble[1:], files[1:], strict=True):
        a = ensemble[0]["time"].values if "time" in ensemble[0].dims else None
        b = part["time"].values if "time" in part.dims else None
        if not (a is None and b is None) and not (
                a is not None and b is not None and np.array_equal(a, b)):
            raise InputError(f"{path}: its times differ from those of {files[0]}, another "
                             "ensemble member; give every member for the same times")
    ds = xr.concat(ensemble, dim="realization", data_vars="all", coords="minimal",
                   compat="override", join="override", combine_attrs="drop_conflicts")
    return ds.isel(realization=np.argsort(values, kind="stable"))


def _overlapping_runs(ds: xr.Dataset, i: int, j: int, path: Path) -> None:
    """Refuse two runs that give the same valid time (positions ``i`` and ``j``)."""
    if "forecast_reference_time" not in ds.coords:
        return
    runs = ds["forecast_reference_time"].values
    if runs[i] != runs[j]:
        raise InputError(
            f"{path}: the input holds {len(set(runs.tolist()))} forecast runs whose valid "
            f"times overlap ({_time_text(ds['time'].values[i])} in runs {run_text(runs[i])} and "
            f"{run_text(runs[j])}); choose one with --run ISO or --run latest "
            "(config: [input] run)")


def _source(ds: xr.Dataset) -> str:
    files = ds.attrs.get("input_files", "?").splitlines()
    return files[0] + (" ..." if len(files) > 1 else "")


def _time_text(value) -> str:
    """A time in messages, ISO 8601 to the minute as everywhere in flowpipe."""
    return iso_time(value, "minutes")


def _check_gaps(times: np.ndarray, owners: list[Path]) -> None:
    """Refuse a series with a step larger than its usual (most frequent) spacing.

    A missing file would otherwise be interpolated over in time (a 12 h step in a
    6-hourly series).
    """
    if times.size < 3:
        return
    steps = [times[i + 1] - times[i] for i in range(times.size - 1)]
    values, counts = np.unique(np.array(steps), return_counts=True)
    usual = values[int(np.argmax(counts))]
    for i, step in enumerate(steps):
        if step > usual * 1.5:
            missing = []
            t = times[i] + usual
            while t < times[i + 1] and len(missing) < 5:
                missing.append(_time_text(t))
                t = t + usual
            more = " ..." if t < times[i + 1] else ""
            raise InputError(
                f"the time series has a gap: {', '.join(missing)}{more} missing between "
                f"{_time_text(times[i])} ({owners[i]}) and {_time_text(times[i + 1])} "
                f"({owners[i + 1]}); add the missing file(s), or accept the gap with "
                "--allow-gaps (config: [input] allow_gaps = true)")


def _coordinate_values(ds: xr.Dataset, dims: Iterable) -> list[tuple[str, np.ndarray]]:
    """Each dimension's coordinate values (its indices where it has no coordinate)."""
    return [(str(d), ds[d].values if d in ds.coords else np.arange(ds.sizes[d])) for d in dims]


def _point_text(index: tuple[int, ...], coords: list[tuple[str, np.ndarray]]) -> str:
    """``time 2026-01-12T00:00:00, level 500, latitude -70, longitude 40``."""
    parts = []
    for (dim, values), i in zip(coords, index, strict=True):
        value = values[i]
        if dim == "time":
            text = str(value)[:19]
        elif isinstance(value, float | np.floating):
            text = f"{float(value):g}"
        else:
            text = str(value)
        parts.append(f"{dim} {text}")
    return ", ".join(parts)


#: How to have implausible winds treated as missing, for the messages that tell of them.
TREAT_AS_MISSING = ("treat such winds as missing with --implausible missing (config: [input] "
                    "implausible = \"missing\")")


def _implausible_mask(u: np.ndarray, v: np.ndarray, *, max_speed: float, refuse: bool,
                      coords: list[tuple[str, np.ndarray]], offsets: tuple[int, ...],
                      source: str, names: tuple[str, str],
                      tell: Callable[[], bool]) -> np.ndarray:
    """True where a slab's wind is not finite or faster than ``max_speed`` (NaN is missing,
    not implausible); raises :class:`InputError` there when ``refuse``, else warns of them
    when ``tell()`` says this slab is the first to have some."""
    with np.errstate(over="ignore", invalid="ignore"):
        bad = implausible_points(u, v, max_speed)
    if bad.any():
        local = [(dim, values[o:o + n]) for (dim, values), o, n
                 in zip(coords, offsets, bad.shape, strict=True)]
        first = np.unravel_index(int(np.argmax(bad)), bad.shape)
        count = int(bad.sum())
        nonfinite = int((np.isinf(u) | np.isinf(v)).sum())
        # a block is one slab as files are read (or the whole of an in-memory wind): its
        # count is the slab's, and which slab is met first depends on the scheduler
        slabs = int(np.prod(bad.shape[:-2], dtype=int))
        slab = _point_text(first[:-2], local[:-2])
        scope = (f"in {slabs} slabs" if slabs > 1 else f"in the slab of {slab}" if slab
                 else "in the slab")
        where = _point_text(first[-2:] if slabs == 1 else first,
                            local[-2:] if slabs == 1 else local)
        what = (f"{count} point(s) of {names[0]}/{names[1]} {scope} not finite or faster than "
                f"{max_speed:g} m s-1 ({nonfinite} not finite), the first at {where}")
        if refuse:
            raise InputError(f"{source}: {what}; flowpipe inspect counts those of every slab; fix "
                             f"the file, or {TREAT_AS_MISSING} or raise the limit with --max-speed")
        if tell():
            warnings.warn(f"{source}: {what}: treated as missing, as are those of any other "
                          "slab (the output's implausible_values counts them all)",
                          FlowpipeWarning, stacklevel=2)
    return bad


def implausible_points(u, v, max_speed: float):
    """True where the wind is not finite (inf) or faster than ``max_speed`` m s-1; NaN is
    missing, not implausible. NumPy or dask arrays (lazy for dask)."""
    return np.isinf(u) | np.isinf(v) | (np.hypot(u, v) > max_speed)


def _check_max_speed(max_speed: float) -> None:
    if not (np.isfinite(max_speed) and max_speed > 0):
        raise UsageError(f"the maximum speed must be a number above 0 m s-1, not {max_speed!r}")


#: Values of u or v shown per variable when describing implausible winds.
SHOWN_VALUES = 3


def wind_checks(wind: xr.Dataset, names: Iterable[str] = ("u", "v"),
                max_speed: float = DEFAULT_MAX_SPEED) -> tuple[dict[str, int], dict | None]:
    """The missing (NaN) points of the variables ``names`` and the implausible winds of a
    wind opened with ``implausible=None``, in one pass over the data (computes).

    Returns
    -------
    missing : dict
        The number of missing points of each of ``names`` the wind has.
    implausible : dict or None
        None when every wind is plausible; else ``max_speed`` (m s-1), ``points`` (how
        many points are not finite or faster), ``first`` (the first of them, in words),
        ``values``: for each wind variable by its name in the file, its most common
        implausible values in the file's units with their counts, and ``marker``: the
        value that repeats most among them (None when none repeats). An out-of-range
        value that repeats exactly is what an undeclared missing-value marker
        (``_FillValue`` or ``missing_value``, CF 1.11 section 2.5.1) looks like; genuine
        winds do not repeat a value far beyond the limit (*common practice*).

    Raises
    ------
    flowpipe.errors.InputError
        When one of ``names`` has no valid point at all.
    """
    import dask
    import dask.array as dsa

    _check_max_speed(max_speed)
    u, v = wind["u"], wind["v"]
    udata, vdata = dsa.asarray(u.data), dsa.asarray(v.data)
    with np.errstate(over="ignore", invalid="ignore"):
        bad = implausible_points(udata, vdata, max_speed)
        names = [n for n in names if n in wind]
        points, first, ubad, vbad, *counts = dask.compute(
            bad.sum(), dsa.argmax(bad.ravel()), udata[bad], vdata[bad],
            *[wind[n].isnull().sum() for n in names])
    missing = {n: int(c) for n, c in zip(names, counts, strict=True)}
    for name, count in missing.items():
        if count == wind[name].size:
            source = wind[name].attrs.get("source_name", name)
            raise InputError(f"{wind.attrs.get('input_files', '?').splitlines()[0]}: variable "
                             f"{source} has no valid value (every point is missing)")
    if not points:
        return missing, None
    values: dict[str, list[list[float | int]]] = {}
    repeated: list[tuple[int, float]] = []
    for da, found in ((u, ubad), (v, vbad)):
        far = found[~(np.abs(found) <= max_speed)]  # this component's own implausible values
        far = cf_units.Unit("m s-1").convert(far, da.attrs.get("source_units", "m s-1"))
        kinds, counts = np.unique(far, return_counts=True)
        order = np.argsort(-counts, kind="stable")[:SHOWN_VALUES]
        name = str(da.attrs.get("source_name", da.name))
        values[name] = [[float(kinds[i]), int(counts[i])] for i in order]
        repeated += [(int(counts[i]), float(kinds[i])) for i in order if counts[i] > 1]
    return missing, {"max_speed": float(max_speed), "points": int(points),
                     "first": _point_text(np.unravel_index(int(first), bad.shape),
                                          _coordinate_values(wind, u.dims)),
                     "values": values, "marker": max(repeated)[1] if repeated else None}


def _plausible(ds: xr.Dataset, max_speed: float, implausible: str) -> xr.Dataset:
    """Refuse, or mask as missing, wind values that are not finite or implausibly fast.

    Lazy: the check is a dask task per slab (the same chunks as ``u`` and ``v``), so it
    runs while a result is computed, in the same pass.
    """
    import dask.array as dsa

    if implausible not in IMPLAUSIBLE_CHOICES:
        raise UsageError(f"implausible must be one of {', '.join(IMPLAUSIBLE_CHOICES)}, "
                         f"not {implausible!r}")
    _check_max_speed(max_speed)
    u, v = ds["u"], ds["v"]
    coords = _coordinate_values(ds, u.dims)
    source = ds.attrs.get("input_files", "?").splitlines()[0]
    if len(ds.attrs.get("input_files", "").splitlines()) > 1:
        source += " ..."
    names = (u.attrs.get("source_name", "u"), v.attrs.get("source_name", "v"))
    refuse = implausible == "refuse"

    told: list[object] = []  # treated as missing: told of the first slab met only

    def first() -> bool:
        # (list.append is atomic: the one slab whose mark comes first is told; no lock, so
        # that the graph still pickles for dask.distributed workers, each with its own list)
        mark = object()
        told.append(mark)
        return told[0] is mark

    def block(ub, vb, block_info=None):
        offsets = tuple(lo for lo, _ in block_info[0]["array-location"])
        return _implausible_mask(ub, vb, max_speed=max_speed, refuse=refuse, coords=coords,
                                 offsets=offsets, source=source, names=names, tell=first)

    udata = u.data if isinstance(u.data, dsa.Array) else dsa.from_array(u.data)
    vdata = v.data if isinstance(v.data, dsa.Array) else dsa.from_array(v.data)
    bad = dsa.map_blocks(block, udata, vdata, dtype=bool)
    out = ds.copy()
    out["u"] = u.copy(data=dsa.where(bad, np.nan, udata))
    out["v"] = v.copy(data=dsa.where(bad, np.nan, vdata))
    out.attrs["implausible_limit"] = f"{max_speed:g} m s-1"
    if not refuse:
        out.attrs["implausible_values"] = bad.sum()
    return out


def file_names(ds: xr.Dataset) -> dict[str, str]:
    """The name each variable had in the input file, where flowpipe named it otherwise
    (``u`` read from ``U``, say: the attribute ``source_name``)."""
    return {str(n): str(ds[n].attrs["source_name"]) for n in ds.data_vars
            if str(ds[n].attrs.get("source_name", n)) != str(n)}


def variable_named(ds: xr.Dataset, name: str, among: Iterable[str]) -> str | None:
    """The variable of ``among`` that ``name`` names, by flowpipe's name or by the file's
    (:func:`file_names`); None when none."""
    among = [str(n) for n in among]
    if name in among:
        return name
    return next((n for n, given in file_names(ds).items() if given == name and n in among),
                None)


def names_text(ds: xr.Dataset, names: Iterable[str]) -> str:
    """Variable names to choose from, each with the file's where it differs:
    ``u (file: U), v (file: V), ta``."""
    aliases = file_names(ds)
    return ", ".join(f"{n} (file: {aliases[n]})" if n in aliases else str(n) for n in names) \
        or "none"


def input_notes(wind: xr.Dataset) -> dict:
    """Attributes of the wind that an output should carry (the plausibility check's count,
    lazy until written)."""
    return {k: wind.attrs[k] for k in ("implausible_values",) if k in wind.attrs}
