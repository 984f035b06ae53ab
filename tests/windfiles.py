"""Build small wind files in the many encodings that real model output uses.

A reference field is defined on canonical coordinates (latitudes ascending,
longitudes ascending in [0, 360) for global grids); :func:`encode` writes the
same field in another encoding (names, orientation, longitude convention,
units, calendar, files per time), so tests can check that ingest undoes it.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import cftime
import numpy as np
import xarray as xr

#: Exact definition: 1 knot = 1852 m per hour (the international nautical mile
#: of 1852 m; BIPM SI Brochure, 8th ed., 2006, table 8 - from memory).
KNOT = 1852.0 / 3600.0


def reference_field(lat: np.ndarray, lon: np.ndarray, levels: np.ndarray, ntime: int) -> dict:
    """Smooth, non-symmetric winds and temperature on canonical coordinates."""
    phi = np.radians(lat)[None, None, :, None]
    lam = np.radians(lon)[None, None, None, :]
    t = np.arange(ntime)[:, None, None, None]
    p = (levels / 1000.0)[None, :, None, None]
    u = 10.0 * np.cos(phi) + 5.0 * np.sin(lam + 0.3 * t) * np.cos(phi) ** 2 + 3.0 * p
    v = 4.0 * np.cos(2 * lam - 0.2 * t) * np.cos(phi) + 2.0 * np.sin(phi) * p
    ta = 250.0 + 30.0 * np.cos(phi) ** 2 + 0.5 * t + 10 * p + 0 * lam
    return {"u": u, "v": v, "ta": ta}


@dataclass
class Encoding:
    """How a reference field is written to disk."""

    names: str = "standard"  # standard | short | custom
    lat_descending: bool = False
    lon_convention: str = "0-360"  # 0-360 | -180-180
    wrap_column: bool = False
    wind_units: str = "m s-1"  # any velocity unit UDUNITS knows
    level_units: str = "hPa"  # hPa | Pa
    calendar: str = "standard"
    files: int = 1


def encode(ref: dict, lat, lon, levels, encoding: Encoding, directory: Path) -> list[Path]:
    """Write the reference field to ``directory`` in the given encoding."""
    ntime = ref["u"].shape[0]
    lat_out, lon_out = np.asarray(lat, float), np.asarray(lon, float)
    data = {k: np.asarray(v, float) for k, v in ref.items()}
    if encoding.lon_convention == "-180-180":
        lon_out = np.where(lon_out >= 180.0, lon_out - 360.0, lon_out)
        order = np.argsort(lon_out)
        lon_out = lon_out[order]
        data = {k: v[..., order] for k, v in data.items()}
    if encoding.wrap_column:
        lon_out = np.append(lon_out, lon_out[0] + 360.0)
        data = {k: np.concatenate([v, v[..., :1]], axis=-1) for k, v in data.items()}
    if encoding.lat_descending:
        lat_out = lat_out[::-1]
        data = {k: v[..., ::-1, :] for k, v in data.items()}
    factor = {"m s-1": 1.0, "m/s": 1.0, "knots": 1.0 / KNOT, "km/h": 3.6, "kt": 1.0 / KNOT}[
        encoding.wind_units
    ]
    level_values = np.asarray(levels, float) * (100.0 if encoding.level_units == "Pa" else 1.0)
    names = {"standard": ("eastward", "northward"), "short": ("ua", "va"),
             "custom": ("zonal_thing", "meridional_thing")}[encoding.names]
    u_attrs = {"units": encoding.wind_units}
    v_attrs = {"units": encoding.wind_units}
    if encoding.names == "standard":
        u_attrs["standard_name"] = "eastward_wind"
        v_attrs["standard_name"] = "northward_wind"
    times = cftime.num2date(6.0 * np.arange(ntime), "hours since 2001-02-27",
                            calendar=encoding.calendar, only_use_cftime_datetimes=True)
    dims = ("time", "lev", "y", "x")
    ds = xr.Dataset(
        {
            names[0]: (dims, data["u"] * factor, u_attrs),
            names[1]: (dims, data["v"] * factor, v_attrs),
            "ta": (dims, data["ta"], {"units": "K", "standard_name": "air_temperature"}),
        },
        coords={
            "time": ("time", times, {"standard_name": "time"}),
            "lev": ("lev", level_values, {"units": encoding.level_units,
                                          "standard_name": "air_pressure", "positive": "down"}),
            "y": ("y", lat_out, {"units": "degrees_north", "standard_name": "latitude"}),
            "x": ("x", lon_out, {"units": "degrees_east", "standard_name": "longitude"}),
        },
    )
    paths = []
    for k, chunk in enumerate(np.array_split(np.arange(ntime), encoding.files)):
        path = directory / f"wind_{k:02d}.nc"
        ds.isel(time=chunk).to_netcdf(
            path, encoding={"time": {"units": "hours since 2001-01-01", "calendar": encoding.calendar}}
        )
        paths.append(path)
    return paths


#: A small global grid (5 degrees, pole rows) on two pressure levels, for tests that
#: need a real file rather than a particular grid.
SMALL_LAT, SMALL_LON = np.linspace(-90, 90, 37), np.arange(0.0, 360.0, 5.0)
SMALL_LEVELS = np.array([850.0, 500.0])


def small_global_file(directory: Path, ntime: int) -> Path:
    """The reference field on the small global grid, ``ntime`` times, in one file."""
    (path,) = encode(reference_field(SMALL_LAT, SMALL_LON, SMALL_LEVELS, ntime),
                     SMALL_LAT, SMALL_LON, SMALL_LEVELS, Encoding(), directory)
    return path


def unusual_names_file(sample: Path, path: Path) -> Path:
    """The first three times of a sample file with time and level under names no CF
    attribute labels as axes (``valid`` in "hours since", ``lev_p`` in hPa)."""
    with xr.open_dataset(sample) as ds:
        renamed = ds.isel(time=slice(0, 3)).rename(time="valid", plev="lev_p")
        renamed["valid"].attrs = {"long_name": "valid time"}
        renamed["lev_p"].attrs = {"units": "hPa", "long_name": "pressure"}
        renamed.to_netcdf(path, encoding={"valid": {"units": "hours since 2026-01-12"}})
    return path
