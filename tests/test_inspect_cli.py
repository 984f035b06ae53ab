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

from flowpipe.choices import DEFAULT_MAX_SPEED
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


def _with_values(tmp_path: Path, where: tuple, value: float, both: bool, **kw) -> Path:
    """A good file, float32 with no missing value declared, holding ``value`` at ``where``
    (index of time, level, latitude, longitude) in its eastward wind (and northward too)."""
    source = _good(tmp_path, **kw)
    with xr.open_dataset(source) as ds:
        ds = ds.load()
    for name in ("eastward", "northward") if both else ("eastward",):
        ds[name][where] = value
    path = tmp_path / "marked.nc"
    ds.to_netcdf(path, encoding={n: {"dtype": "float32", "_FillValue": None}
                                 for n in ("eastward", "northward")})
    return path


def test_an_undeclared_missing_value_marker_is_described_not_refused(tmp_path, capsys):
    # -9999 is the usual marker of files that do not declare theirs (common practice); CF 1.11
    # section 2.5.1 declares it with missing_value or _FillValue, in the variable's own units
    # (here knots: UDUNITS' knot, 1852 m per hour), not as the m s-1 it would be read as.
    path = _with_values(tmp_path, (0, 1, slice(2, 4), slice(3, 6)), -9999.0, both=True,
                        wind_units="knots")
    assert main(["inspect", str(path)]) == 0
    out = capsys.readouterr().out
    line = next(x for x in out.splitlines() if x.strip().startswith("implausible"))
    assert "6 point(s) of eastward/northward not finite or faster than 250 m s-1" in line
    assert f"the first at time 2001-02-27T00:00:00, level 500, latitude {LAT[2]:g}, " \
           f"longitude {LON[3]:g}" in line
    assert "eastward -9999 (6 times), northward -9999 (6 times)" in line
    assert "looks like a missing-value marker" in line
    assert "missing_value = -9999 (or _FillValue) on eastward and northward" in line
    assert main(["inspect", "--json", str(path)]) == 0
    found = json.loads(capsys.readouterr().out)["implausible"]
    assert (found["points"], found["marker"]) == (6, -9999.0)
    assert found["max_speed"] == DEFAULT_MAX_SPEED  # the limit decompose refuses by
    # 9999 kn in each component is about 7275 m s-1 of speed: within a limit of 8000
    assert main(["inspect", "--json", "--max-speed", "8000", str(path)]) == 0
    assert json.loads(capsys.readouterr().out)["implausible"] is None


def test_a_single_implausible_value_is_not_called_a_marker(tmp_path, capsys):
    # one value beyond the limit does not repeat: nothing says it marks missing data
    path = _with_values(tmp_path, (1, 0, 5, 7), 400.0, both=False)
    assert main(["inspect", str(path)]) == 0
    out = capsys.readouterr().out
    assert "1 point(s) of eastward/northward" in out and "eastward 400 (once)" in out
    assert "marker" not in out
    assert main(["decompose", str(path), "-o", str(tmp_path / "o.nc")]) == 2  # what it warns of
    assert "faster than 250 m s-1" in capsys.readouterr().err


def test_a_speed_beyond_the_limit_with_each_component_within_it(tmp_path, capsys):
    # 200 m s-1 in each component is 283 m s-1 of speed (Pythagoras): beyond the limit of
    # 250 though neither component is; the line says so instead of an empty list of values
    path = _with_values(tmp_path, (1, 0, 5, 7), 200.0, both=True)
    assert main(["inspect", str(path)]) == 0
    line = next(x for x in capsys.readouterr().out.splitlines()
                if x.strip().startswith("implausible"))
    assert "1 point(s) of eastward/northward" in line
    assert "values beyond the limit: ;" not in line and "no component alone" in line, line


def test_inspect_reads_the_wind_once(tmp_path, monkeypatch):
    # the missing points and the implausible winds are found in one pass over the data: the
    # values read of the eastward wind through xarray's netCDF4 backend (counted at its
    # array wrapper) add up to the variable's size once, not twice (a few single values
    # read to describe the grid aside); the counts equal those numpy makes of the file
    from xarray.backends.netCDF4_ import NetCDF4ArrayWrapper

    from flowpipe.inspection import inspect_file

    read: dict[str, int] = {}
    getitem = NetCDF4ArrayWrapper.__getitem__

    def counting(self, key):
        values = getitem(self, key)
        read[self.variable_name] = read.get(self.variable_name, 0) + np.size(values)
        return values

    path = _with_values(tmp_path, (0, 1, slice(2, 4), slice(3, 6)), -9999.0, both=True)
    with xr.open_dataset(path) as ds:
        size = ds["eastward"].size
        expected = int((np.abs(ds["eastward"]) > 250.0).sum())
    monkeypatch.setattr(NetCDF4ArrayWrapper, "__getitem__", counting)
    report = inspect_file(path)
    assert size <= read["eastward"] < 1.5 * size, (read, size)
    assert report["implausible"]["points"] == expected == 6
    assert report["missing"]["u"] == 0 and report["missing"]["v"] == 0
