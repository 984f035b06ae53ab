"""Coordinates as real files have them: one height above the surface, gaps, no units.

Sources: a 10 m wind is a field on one level that CF describes with a scalar coordinate
of standard name ``height`` ("vertical distance above the surface", CF standard-name
table; CF 1.11 section 5.7, scalar coordinate variables); a coordinate variable must
have no missing values (CF 1.11 section 5, "Coordinate Systems and Domain");
without ``units`` a vertical coordinate is neither pressure nor height (CF 1.11
section 4.3, "Vertical (Height or Depth) Coordinate").
"""

from __future__ import annotations

import subprocess
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr

import flowpipe as fp
from flowpipe.maps import render

ROOT = Path(__file__).resolve().parents[1]
FLOWPIPE = str(ROOT / ".venv" / "bin" / "flowpipe")


def _run(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([FLOWPIPE, *map(str, args)], capture_output=True, text=True)


def _surface_wind(path: Path, latitude: np.ndarray | None = None, levels: bool = False) -> Path:
    lat = np.arange(-90.0, 90.1, 3.0) if latitude is None else latitude
    lon = np.arange(0.0, 360.0, 3.0)
    phi = np.radians(np.nan_to_num(lat))[None, :, None]
    u = 10.0 * np.cos(phi) * np.ones((2, 1, lon.size))
    v = 2.0 * np.sin(np.radians(lon))[None, None, :] * np.cos(phi) * np.ones((2, 1, 1))
    dims = ("time", "latitude", "longitude")
    ds = xr.Dataset(
        {"u10": (dims, u, {"standard_name": "eastward_wind", "units": "m s-1"}),
         "v10": (dims, v, {"standard_name": "northward_wind", "units": "m s-1"})},
        coords={"time": pd.date_range("2026-11-30", periods=2, freq="6h"),
                "latitude": ("latitude", lat, {"units": "degrees_north"}),
                "longitude": ("longitude", lon, {"units": "degrees_east"})})
    if levels:  # two levels named "level" that say nothing of their kind
        ds = ds.expand_dims(level=[850.0, 500.0], axis=1)
    else:
        ds = ds.assign_coords(height=((), 10.0, {"units": "m", "standard_name": "height",
                                                 "positive": "up", "axis": "Z"}))
        for name in ("u10", "v10"):
            ds[name].attrs["coordinates"] = "height"
    ds.to_netcdf(path)
    return path


def test_a_10_m_wind_keeps_its_height_through_outputs_and_titles(tmp_path):
    source = _surface_wind(tmp_path / "wind10m.nc")
    wind = fp.open_wind(source)
    assert float(wind["height"]) == 10.0 and wind["height"].attrs["standard_name"] == "height"
    out = tmp_path / "split.nc"
    proc = _run("decompose", source, "-o", out)
    assert proc.returncode == 0, proc.stderr
    with xr.open_dataset(out) as parts:
        height = parts["height"]
        assert height.ndim == 0 and float(height) == 10.0
        assert height.attrs["units"] == "m" and height.attrs["standard_name"] == "height"
        assert "height" in parts["streamfunction"].encoding["coordinates"].split()
    fig = render(out, field="streamfunction")
    titles = " ".join(ax.get_title(loc="left") for ax in fig.axes)
    assert "10 m above the surface" in titles
    tracks = tmp_path / "tracks.nc"
    proc = _run("advect", source, "-o", tracks, "--start", "40,10", "--hours", "6")
    assert proc.returncode == 0, proc.stderr
    with xr.open_dataset(tracks) as paths:
        assert float(paths["height"]) == 10.0 and paths["height"].attrs["units"] == "m"
        assert "height" in paths["wind_speed"].encoding["coordinates"].split()
    titles = " ".join(ax.get_title(loc="left") for ax in render(tracks).axes)
    assert "10 m above the surface" in titles


def test_a_missing_latitude_is_named_as_such(tmp_path):
    lat = np.arange(-90.0, 90.1, 3.0)
    lat[7] = np.nan
    proc = _run("decompose", _surface_wind(tmp_path / "gappy.nc", latitude=lat),
                "-o", tmp_path / "out.nc")
    assert proc.returncode == 2
    (line,) = proc.stderr.strip().splitlines()
    assert "coordinate latitude has 1 missing" in line and "index 7" in line
    assert "different grids" not in line
    assert not (tmp_path / "out.nc").exists()


def test_levels_without_units_are_labels_and_inspect_says_why(tmp_path):
    source = _surface_wind(tmp_path / "levels.nc", levels=True)
    proc = _run("inspect", source)
    assert proc.returncode == 0, proc.stderr
    assert "2 levels (850, 500) of unknown kind: the level coordinate has no units" in proc.stdout
    out = tmp_path / "out.nc"
    proc = _run("decompose", source, "-o", out)
    assert proc.returncode == 0, proc.stderr
    assert "flowpipe: warning:" in proc.stderr and "has no units" in proc.stderr
    with xr.open_dataset(out) as parts:
        assert parts.sizes["level"] == 2  # decomposed per level, as the labels say


def test_a_truncation_message_speaks_of_the_grid_in_words():
    wind = fp.open_wind(ROOT / "sample_data" / "demo_global.nc")
    with pytest.raises(fp.UsageError) as error:
        fp.decompose(wind, truncation=10**6)
    assert "equiangular (with pole rows)" in str(error.value)
    assert " CC " not in str(error.value)


@pytest.mark.parametrize(("given", "expected"), [
    # our choice, documented in DEVELOPERS.md: as given where possible, the first value
    # in [-180, 180), continuous across the date line
    (np.arange(150.0, 230.1, 5.0), (150.0, 230.0)),
    (np.r_[np.arange(150.0, 180.0, 5.0), np.arange(-180.0, -129.9, 5.0)], (150.0, 230.0)),
    (np.r_[np.arange(350.0, 360.0, 5.0), np.arange(0.0, 20.1, 5.0)], (-10.0, 20.0)),
])
def test_limited_area_longitudes_keep_their_numbers(tmp_path, given, expected):
    lat = np.arange(-10.0, 10.1, 5.0)
    u = np.full((1, 1, lat.size, given.size), 5.0)
    ds = xr.Dataset({"u": (("time", "lev", "lat", "lon"), u, {"units": "m s-1"}),
                     "v": (("time", "lev", "lat", "lon"), u * 0, {"units": "m s-1"})},
                    coords={"time": [np.datetime64("2026-01-01", "ns")],
                            "lev": ("lev", [500.0], {"units": "hPa", "standard_name": "air_pressure"}),
                            "lat": ("lat", lat, {"units": "degrees_north"}),
                            "lon": ("lon", given, {"units": "degrees_east"})})
    ds.to_netcdf(tmp_path / "box.nc")
    lon = fp.open_wind(tmp_path / "box.nc").longitude.values
    assert (lon[0], lon[-1]) == expected
    assert np.all(np.diff(lon) > 0)
