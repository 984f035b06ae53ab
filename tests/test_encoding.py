"""How outputs store their data: precision, lossless compression, quantization, --fields.

External checks, each named beside its assertions:
* the netCDF4 library (netCDF-C and HDF5 underneath) reads back what was written
  and reports the filters each variable was stored with;
* IEEE 754 binary32: rounding a double to single precision is what numpy's
  ``astype(np.float32)`` does, so a lossless single-precision output equals it exactly;
* netCDF-C's documented bound for GranularBitRound quantization (half a unit in the
  last decimal digit kept, NetCDF User Guide, "Quantization");
* the meteorological convention for wind direction (the CF standard-name table,
  ``wind_from_direction``: the direction the wind blows from, clockwise from north).
"""

from __future__ import annotations

import json
from pathlib import Path

import netCDF4
import numpy as np
import pytest
import xarray as xr
from windfiles import SMALL_LEVELS, Encoding, encode, reference_field, small_global_file

import flowpipe as fp
from flowpipe.cli import main
from flowpipe.fields import speed_and_direction
from flowpipe.pipeline import run
from flowpipe.store import quantization_error


@pytest.fixture(scope="module")
def wind_file(tmp_path_factory) -> Path:
    """A small global wind in double precision (the reference field of windfiles)."""
    directory = tmp_path_factory.mktemp("encoding")
    return small_global_file(directory, 2)


@pytest.fixture(scope="module")
def single_file(wind_file, tmp_path_factory) -> Path:
    """The same wind stored in single precision, as most archives store winds."""
    path = tmp_path_factory.mktemp("single") / "wind32.nc"
    with xr.open_dataset(wind_file) as ds:
        ds.load()
    ds.to_netcdf(path, encoding={name: {"dtype": "float32"} for name in ds.data_vars})
    return path


@pytest.fixture(scope="module")
def parts(wind_file) -> xr.Dataset:
    return fp.decompose(fp.open_wind(wind_file)).load()


def _stored(path: Path, name: str) -> tuple[np.ndarray, dict, np.dtype]:
    """Values, filters and type of one variable, read with netCDF4 itself."""
    with netCDF4.Dataset(path) as nc:
        var = nc[name]
        var.set_auto_mask(False)
        return np.asarray(var[:]), var.filters(), var.dtype


@pytest.mark.parametrize("compression", ["zlib", "zstd", "none"])
@pytest.mark.parametrize("precision", ["single", "double"])
def test_lossless_encodings_round_trip_exactly(parts, tmp_path, compression, precision):
    path = fp.write(parts, tmp_path / "out.nc", precision=precision, compression=compression)
    dtype = np.float32 if precision == "single" else np.float64
    for name in ("streamfunction", "velocity_potential", "u_divergent"):
        values, filters, stored = _stored(path, name)
        assert stored == dtype
        np.testing.assert_array_equal(values, parts[name].values.astype(dtype))
        # netCDF-C reports the filter it applied (and shuffle with zlib)
        assert bool(filters.get(compression)) is (compression != "none")
        assert bool(filters.get("shuffle")) is (compression == "zlib")
        if compression != "none":
            assert filters["complevel"] == 1  # the documented default level


def test_compression_level_is_applied_and_shrinks_the_file(parts, tmp_path):
    fast = fp.write(parts, tmp_path / "fast.nc", precision="double", compression="zlib",
                    compression_level=1)
    small = fp.write(parts, tmp_path / "small.nc", precision="double", compression="zlib",
                     compression_level=9)
    assert _stored(small, "streamfunction")[1]["complevel"] == 9
    assert small.stat().st_size <= fast.stat().st_size
    none = fp.write(parts, tmp_path / "none.nc", precision="double", compression="none")
    assert fast.stat().st_size < none.stat().st_size


@pytest.mark.parametrize("digits", [2, 4])
def test_quantization_stays_within_the_documented_bound(parts, tmp_path, digits):
    path = fp.write(parts, tmp_path / "q.nc", precision="double", significant_digits=digits)
    lossless = fp.write(parts, tmp_path / "l.nc", precision="double")
    bound = quantization_error(digits)
    for name in ("streamfunction", "vorticity"):
        values, _, _ = _stored(path, name)
        exact = parts[name].values
        relative = np.abs(values - exact) / np.abs(exact)
        assert relative.max() <= bound
        assert relative.max() > bound / 100  # it is lossy: digits were dropped
        with netCDF4.Dataset(path) as nc:
            var = nc[name]
            assert var.getncattr("quantization") == "quantization_info"
            assert var.quantization_nsd == digits
            assert var.quantization_maximum_relative_error == pytest.approx(bound)
            assert nc["quantization_info"].algorithm == "granular_bitround"
    assert path.stat().st_size < lossless.stat().st_size


def test_precision_follows_the_input(wind_file, single_file, tmp_path):
    # float64 in: float64 out; float32 in: float32 out, with the computation in double,
    # so the values are the double results rounded once (IEEE 754 binary32).
    outputs = {}
    for label, source, extra in (("double", wind_file, []), ("single", single_file, []),
                                 ("forced", single_file, ["--precision", "double"])):
        outputs[label] = tmp_path / f"{label}.nc"
        assert main(["decompose", str(source), "-o", str(outputs[label]), *extra]) == 0
    assert _stored(outputs["double"], "streamfunction")[2] == np.float64
    assert _stored(outputs["single"], "streamfunction")[2] == np.float32
    assert _stored(outputs["forced"], "streamfunction")[2] == np.float64
    exact = fp.decompose(fp.open_wind(single_file))["streamfunction"].values
    np.testing.assert_array_equal(_stored(outputs["single"], "streamfunction")[0],
                                  exact.astype(np.float32))


def test_packed_16_bit_input_gives_single_precision(tmp_path):
    # CF 1.11 section 8.1 packing: 16-bit integers with scale_factor hold about 4.8
    # significant digits, so single precision output keeps all they carry.
    lat, lon = np.linspace(-90, 90, 19), np.arange(0.0, 360.0, 10.0)
    ref = reference_field(lat, lon, SMALL_LEVELS, 1)
    (path,) = encode(ref, lat, lon, SMALL_LEVELS, Encoding(), tmp_path)
    packed = tmp_path / "packed.nc"
    with xr.open_dataset(path) as ds:
        ds.load()
    ds.to_netcdf(packed, encoding={name: {"dtype": "int16", "scale_factor": 0.01,
                                          "_FillValue": -32767} for name in ("eastward",
                                                                             "northward")})
    out = tmp_path / "out.nc"
    assert main(["decompose", str(packed), "-o", str(out)]) == 0
    assert _stored(out, "vorticity")[2] == np.float32


def test_fields_writes_only_those_and_the_quality_figures(wind_file, tmp_path):
    out = tmp_path / "some.nc"
    assert main(["decompose", str(wind_file), "-o", str(out),
                 "--fields", "velocity_potential,wind_speed,wind_from_direction"]) == 0
    with xr.open_dataset(out) as ds:
        fields = {n for n in ds.data_vars if {"latitude", "longitude"} <= set(ds[n].dims)}
        assert fields == {"velocity_potential", "wind_speed", "wind_from_direction"}
        assert "reconstruction_error" in ds  # always kept
        assert ds["wind_speed"].attrs["standard_name"] == "wind_speed"
        assert ds["wind_from_direction"].attrs["standard_name"] == "wind_from_direction"
        speed, direction = ds["wind_speed"].values, ds["wind_from_direction"].values
    with xr.open_dataset(wind_file) as raw:  # the input as written, read independently
        u, v = raw["eastward"].values, raw["northward"].values
    np.testing.assert_allclose(speed, np.hypot(u, v), rtol=1e-12)
    # the wind blows from `direction`: the unit vector pointing there is -(u, v)/|(u, v)|
    rad = np.radians(direction)
    np.testing.assert_allclose(-np.sin(rad) * speed, u, atol=1e-9)
    np.testing.assert_allclose(-np.cos(rad) * speed, v, atol=1e-9)


def test_rotational_wind_speed_from_the_rotational_wind(parts, wind_file, tmp_path):
    wind = fp.open_wind(wind_file)
    chosen = fp.select_fields(parts, wind, ["rotational_wind_speed"])
    np.testing.assert_allclose(chosen["rotational_wind_speed"].values,
                               np.hypot(parts["u_rotational"].values, parts["v_rotational"].values))


@pytest.mark.parametrize(("u", "v", "expected"), [
    # common practice: a westerly (from the west) blows towards the east, and so on
    (10.0, 0.0, 270.0), (-10.0, 0.0, 90.0), (0.0, 10.0, 180.0), (0.0, -10.0, 0.0),
    (5.0, 5.0, 225.0),  # from the south-west
])
def test_wind_from_direction_of_the_cardinal_winds(u, v, expected):
    speed, direction = speed_and_direction(np.array([u]), np.array([v]))
    assert direction[0] == pytest.approx(expected)
    assert speed[0] == pytest.approx(np.hypot(u, v))


@pytest.mark.parametrize("args", [
    ["--fields", "no_such_field"],
    ["--kinematics", "--fields", "streamfunction"],  # asks for kinematics, keeps none of them
    ["--compression", "none", "--compression-level", "3"],
    ["--compression-level", "12"],
    ["--precision", "single", "--significant-digits", "9"],
])
def test_bad_encoding_options_are_one_line_usage_errors(wind_file, tmp_path, capsys, args):
    out = tmp_path / "x.nc"
    assert main(["decompose", str(wind_file), "-o", str(out), *args]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and err.startswith("flowpipe: error:")
    assert not out.exists()


def test_batch_output_table_sets_the_encoding(wind_file, tmp_path):
    config = tmp_path / "night.toml"
    config.write_text(f"[input]\npaths = [{json.dumps(str(wind_file))}]\n\n"
                      "[decompose]\nfields = [\"streamfunction\", \"wind_speed\"]\n\n"
                      "[output]\ndirectory = \"out\"\ncompression = \"zstd\"\n"
                      "precision = \"single\"\n")
    assert run(config, quiet=True).exit_code == 0
    (out,) = (tmp_path / "out").glob("*_decomposition.nc")
    values, filters, dtype = _stored(out, "wind_speed")
    assert filters["zstd"] and dtype == np.float32
    with xr.open_dataset(out) as ds:
        assert {"streamfunction", "wind_speed"} <= set(ds.data_vars)
        assert "velocity_potential" not in ds
    config.write_text(config.read_text() + "compression_level = 40\n")
    with pytest.raises(fp.FlowpipeError, match=r"\[output\].*zstd compression level"):
        run(config, quiet=True)
