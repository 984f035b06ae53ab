"""``flowpipe inspect`` and the bad-input rules of README.md ("Exit codes").

Each bad input must give exit code 2, one line starting ``flowpipe: error:``
naming the file and the problem, no traceback, and leave the input untouched.
CF Conventions 1.11 supplies the attribute meanings (standard_name, units,
_FillValue); 2-D latitude/longitude are CF's curvilinear case (section 5.2).
"""

from __future__ import annotations

import hashlib
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import xarray as xr
from windfiles import Encoding, encode, reference_field

from flowpipe.cli import main

ROOT = Path(__file__).resolve().parents[1]
LAT, LON, LEVELS = np.linspace(-90, 90, 19), np.arange(0.0, 360.0, 20.0), np.array([850.0, 500.0])


def _good(tmp_path: Path, **kw) -> Path:
    (path,) = encode(reference_field(LAT, LON, LEVELS, 2), LAT, LON, LEVELS, Encoding(**kw),
                     tmp_path)
    return path


def _digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_inspect_json_describes_the_sample_files(capsys):
    files = [ROOT / "sample_data" / "demo_global.nc", ROOT / "sample_data" / "demo_regional.nc"]
    assert main(["inspect", "--json", *map(str, files)]) == 0
    reports = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    glob_, reg = reports
    assert (glob_["u"], glob_["v"], glob_["grid"], glob_["latitudes"], glob_["poles"]) == (
        "u", "v", "global", "equiangular", True)
    assert (glob_["nlat"], glob_["nlon"], glob_["times"]) == (91, 180, 9)
    assert glob_["levels"] == [850.0, 500.0, 250.0]
    assert glob_["pole_rows"] == ["south", "north"]
    assert (reg["u"], reg["v"], reg["grid"], reg["poles"]) == ("uwind", "vwind", "regional", False)
    assert reg["pole_rows"] == []
    assert reg["levels"] == [850.0, 500.0]  # stored in Pa, reported in hPa


def test_inspect_text_summary(tmp_path, capsys):
    path = _good(tmp_path, lat_descending=True, wind_units="knots")
    assert main(["inspect", str(path)]) == 0
    out = capsys.readouterr().out
    assert "global, equiangular latitudes with pole rows, 19 x 18" in out
    assert "2 pressure levels" in out


def test_gaussian_variant_is_reported(tmp_path, capsys):
    from flowpipe.grid import gaussian_latitudes

    lat = gaussian_latitudes(12)
    (path,) = encode(reference_field(lat, LON, LEVELS, 1), lat, LON, LEVELS, Encoding(), tmp_path)
    assert main(["inspect", "--json", str(path)]) == 0
    report = json.loads(capsys.readouterr().out)
    assert (report["latitudes"], report["poles"], report["geometry"]) == ("gaussian", False, "GL")


def _not_netcdf(tmp_path):
    path = tmp_path / "notes.nc"
    path.write_text("this is not a NetCDF file\n")
    return path, "is not a NetCDF file"


def _truncated(tmp_path):
    path = _good(tmp_path)
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    return path, "check that the file is complete"


def _truncated_classic(tmp_path):
    path = _good(tmp_path)
    with xr.open_dataset(path) as raw:
        ds = raw.load()
    out = tmp_path / "classic.nc"
    ds.to_netcdf(out, format="NETCDF3_CLASSIC")
    data = out.read_bytes()
    out.write_bytes(data[: len(data) * 2 // 3])
    return out, "truncated"


def _no_wind(tmp_path):
    path = tmp_path / "temp_only.nc"
    xr.Dataset({"ta": (("lat", "lon"), np.zeros((3, 4)), {"units": "K"})},
               coords={"lat": ("lat", [0.0, 1, 2], {"units": "degrees_north"}),
                       "lon": ("lon", [0.0, 1, 2, 3], {"units": "degrees_east"})}).to_netcdf(path)
    return path, "variables present: ta; name them with --u NAME --v NAME"


def _different_grids(tmp_path):
    path = tmp_path / "stagger.nc"
    xr.Dataset(
        {"u": (("lat", "lon_u"), np.zeros((3, 4)), {"units": "m s-1"}),
         "v": (("lat", "lon"), np.zeros((3, 4)), {"units": "m s-1"})},
        coords={"lat": ("lat", [0.0, 1, 2], {"units": "degrees_north"}),
                "lon": ("lon", [0.0, 1, 2, 3], {"units": "degrees_east"}),
                "lon_u": ("lon_u", [0.5, 1.5, 2.5, 3.5], {"units": "degrees_east"})},
    ).to_netcdf(path)
    return path, "different grids"


def _rewrite_coord(tmp_path, coord, values, name):
    path = _good(tmp_path)
    with xr.open_dataset(path) as raw:
        ds = raw.load()
    ds = ds.assign_coords({coord: (coord, values, ds[coord].attrs)})
    out = tmp_path / name
    ds.to_netcdf(out)
    return out


def _non_monotonic(tmp_path):
    lat = LAT.copy()
    lat[[3, 4]] = lat[[4, 3]]
    return _rewrite_coord(tmp_path, "y", lat, "shuffled.nc"), "latitude is not strictly monotonic"


def _duplicated(tmp_path):
    lon = LON.copy()
    lon[5] = lon[4]
    return _rewrite_coord(tmp_path, "x", lon, "dup.nc"), "longitude is not strictly monotonic"


def _bad_units(tmp_path):
    path = _good(tmp_path, wind_units="m/s")
    with xr.open_dataset(path) as raw:
        ds = raw.load()
    ds["eastward"].attrs["units"] = "K"
    out = tmp_path / "kelvin.nc"
    ds.to_netcdf(out)
    return out, "not a m s-1 quantity"


def _all_missing(tmp_path):
    path = _good(tmp_path)
    with xr.open_dataset(path) as raw:
        ds = raw.load()
    ds["eastward"][:] = np.nan
    out = tmp_path / "empty.nc"
    ds.to_netcdf(out, encoding={"eastward": {"_FillValue": -999.0}})
    return out, "has no valid value"


def _curvilinear(tmp_path):
    path = tmp_path / "curvi.nc"
    y, x = np.meshgrid(np.arange(3.0), np.arange(4.0), indexing="ij")
    xr.Dataset(
        {"u": (("j", "i"), np.zeros((3, 4)), {"units": "m s-1", "standard_name": "eastward_wind"}),
         "v": (("j", "i"), np.zeros((3, 4)), {"units": "m s-1", "standard_name": "northward_wind"})},
        coords={"lat": (("j", "i"), 40 + y + 0.1 * x, {"units": "degrees_north",
                                                     "standard_name": "latitude"}),
                "lon": (("j", "i"), 10 + x + 0.1 * y, {"units": "degrees_east",
                                                     "standard_name": "longitude"})},
    ).to_netcdf(path)
    return path, "curvilinear"


@pytest.mark.parametrize(
    "make",
    [_not_netcdf, _truncated, _truncated_classic, _no_wind, _different_grids, _non_monotonic, _duplicated,
     _bad_units, _all_missing, _curvilinear],
)
def test_bad_input_gives_one_line_and_exit_2(make, tmp_path, capsys):
    path, expected = make(tmp_path)
    before = _digest(path)
    assert main(["inspect", str(path)]) == 2
    err = capsys.readouterr().err
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("flowpipe: error: ")
    assert str(path) in lines[0]
    assert expected in lines[0]
    assert "Traceback" not in err
    assert _digest(path) == before  # input untouched


def test_command_line_entry_point_has_no_traceback(tmp_path):
    path, _ = _not_netcdf(tmp_path)
    proc = subprocess.run([sys.executable, "-m", "flowpipe", "inspect", str(path)],
                          capture_output=True, text=True, check=False)
    assert proc.returncode == 2
    assert proc.stderr.startswith("flowpipe: error:") and "Traceback" not in proc.stderr
    debug = subprocess.run([sys.executable, "-m", "flowpipe", "inspect", "--debug", str(path)],
                           capture_output=True, text=True, check=False)
    assert "Traceback" in debug.stderr  # --debug shows it


def test_usage_error_uses_the_contract_prefix(capsys):
    with pytest.raises(SystemExit) as exc:
        main(["inspect"])
    assert exc.value.code == 2
    assert capsys.readouterr().err.startswith("flowpipe: error:")
