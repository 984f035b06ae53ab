"""Ingest: every encoding of one field gives the same canonical Dataset.

External references used here:
* CF Conventions 1.11 (Eaton et al., 2023): standard names ``eastward_wind`` /
  ``northward_wind`` / ``air_pressure``, units ``degrees_north`` /
  ``degrees_east`` identify coordinates (sections 4.1, 4.3), ``_FillValue``
  marks missing data (section 2.5.1), calendars (section 4.4.1).
* UDUNITS-2 through cf-units, and the exact knot 1852 m / 3600 s (BIPM SI
  Brochure, 8th ed., 2006, table 8 - from memory).
"""

from __future__ import annotations

import tempfile
from pathlib import Path

import cf_units
import cf_xarray  # noqa: F401  (registers the .cf accessor)
import numpy as np
import pytest
import xarray as xr
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from windfiles import KNOT, Encoding, encode, reference_field, unusual_names_file

import flowpipe as fp
from flowpipe.errors import InputError
from flowpipe.grid import gaussian_latitudes

GRIDS = {
    "cc": (np.linspace(-90, 90, 19), np.arange(0.0, 360.0, 20.0)),
    "gaussian": (gaussian_latitudes(16), np.arange(0.0, 360.0, 22.5)),
    "regional": (np.arange(30.0, 60.1, 2.5), np.arange(10.0, 50.1, 5.0)),
}
LEVELS = np.array([850.0, 500.0])


def test_knot_factor_matches_udunits():
    # cf-units' UDUNITS-2 definition against the exact definition 1 kn = 1852 m/h.
    assert cf_units.Unit("knots").convert(1.0, "m s-1") == pytest.approx(KNOT, rel=1e-15)


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    grid=st.sampled_from(sorted(GRIDS)),
    names=st.sampled_from(["standard", "short"]),
    lat_descending=st.booleans(),
    lon_convention=st.sampled_from(["0-360", "-180-180"]),
    wrap_column=st.booleans(),
    wind_units=st.sampled_from(["m s-1", "m/s", "knots", "km/h"]),
    level_units=st.sampled_from(["hPa", "Pa"]),
    calendar=st.sampled_from(["standard", "noleap", "360_day"]),
    files=st.integers(min_value=1, max_value=3),
)
def test_every_encoding_gives_the_same_canonical_field(
    grid, names, lat_descending, lon_convention, wrap_column, wind_units, level_units,
    calendar, files,
):
    lat, lon = GRIDS[grid]
    if grid == "regional":
        wrap_column = False  # a limited area has no wrap-around column
    ref = reference_field(lat, lon, LEVELS, ntime=3)
    enc = Encoding(names=names, lat_descending=lat_descending, lon_convention=lon_convention,
                   wrap_column=wrap_column, wind_units=wind_units, level_units=level_units,
                   calendar=calendar, files=files)
    with tempfile.TemporaryDirectory() as tmp:
        paths = encode(ref, lat, lon, LEVELS, enc, Path(tmp))
        wind = fp.open_wind(paths if files > 1 else paths[0]).load()
    np.testing.assert_allclose(wind["latitude"].values, lat, atol=1e-9)
    np.testing.assert_allclose(wind["longitude"].values, lon, atol=1e-9)
    np.testing.assert_allclose(wind["level"].values, LEVELS)
    assert wind["level"].attrs["units"] == "hPa"
    assert wind["u"].dims == ("time", "level", "latitude", "longitude")
    np.testing.assert_allclose(wind["u"].values, ref["u"], rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(wind["v"].values, ref["v"], rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(wind["ta"].values, ref["ta"])
    assert wind["u"].attrs["units"] == "m s-1"
    assert wind.sizes["time"] == 3
    # CF 1.11 section 4.4.1: the calendar is kept, not converted.
    assert wind["time"].encoding.get("calendar", "standard") in (calendar, "proleptic_gregorian")
    if calendar != "standard":
        assert wind["time"].values[0].calendar == calendar
    grid_info = fp.describe_grid(wind)
    assert grid_info.kind == ("regional" if grid == "regional" else "global")


def test_open_wind_is_lazy_with_one_slab_per_chunk(tmp_path):
    lat, lon = GRIDS["cc"]
    paths = encode(reference_field(lat, lon, LEVELS, 4), lat, lon, LEVELS, Encoding(files=2),
                   tmp_path)
    wind = fp.open_wind(str(tmp_path / "wind_*.nc"))
    assert wind["u"].chunks is not None
    assert wind["u"].data.chunksize == (1, 1, lat.size, lon.size)
    assert wind.sizes["time"] == 4
    assert wind.attrs["input_files"].splitlines() == [str(p) for p in paths]


def test_explicit_names_are_used(tmp_path):
    lat, lon = GRIDS["regional"]
    ref = reference_field(lat, lon, LEVELS, 1)
    (path,) = encode(ref, lat, lon, LEVELS, Encoding(names="custom"), tmp_path)
    with pytest.raises(InputError, match="zonal_thing"):  # the message lists what is there
        fp.open_wind(path)
    wind = fp.open_wind(path, u="zonal_thing", v="meridional_thing")
    np.testing.assert_allclose(wind["u"].values, ref["u"])
    assert wind["u"].attrs["source_name"] == "zonal_thing"


def test_ten_metre_winds_and_vertical_velocity(tmp_path):
    lat, lon = GRIDS["cc"]
    shape = (2, lat.size, lon.size)
    ds = xr.Dataset(
        {
            "u10": (("time", "lat", "lon"), np.ones(shape), {"units": "m s-1"}),
            "v10": (("time", "lat", "lon"), 2 * np.ones(shape), {"units": "m s-1"}),
            "omg": (("time", "lat", "lon"), np.full(shape, -0.5),
                    {"units": "hPa s-1", "standard_name": "lagrangian_tendency_of_air_pressure"}),
        },
        coords={"time": ("time", np.array(["2026-01-01T00", "2026-01-01T06"], "datetime64[ns]")),
                "lat": ("lat", lat, {"units": "degrees_north"}),
                "lon": ("lon", lon, {"units": "degrees_east"}),
                "height": ((), 10.0, {"units": "m", "standard_name": "height", "axis": "Z"})},
    )
    ds.to_netcdf(tmp_path / "sfc.nc")
    wind = fp.open_wind(tmp_path / "sfc.nc")
    assert wind["u"].dims == ("time", "latitude", "longitude")
    assert wind.attrs["level_type"] == "none"
    # hPa s-1 to Pa s-1 by UDUNITS-2: a factor of 100.
    np.testing.assert_allclose(wind["omega"].values, -50.0)
    assert wind["omega"].attrs["units"] == "Pa s-1"


def test_fill_values_become_nan_and_are_counted(tmp_path):
    lat, lon = GRIDS["regional"]
    ref = reference_field(lat, lon, LEVELS, 1)
    (path,) = encode(ref, lat, lon, LEVELS, Encoding(), tmp_path)
    with xr.open_dataset(path) as raw:
        ds = raw.load()
    ds["eastward"][0, 0, 2, 3] = np.nan
    ds.to_netcdf(tmp_path / "holes.nc", encoding={"eastward": {"_FillValue": -9999.0}})
    with xr.open_dataset(tmp_path / "holes.nc", mask_and_scale=False) as raw:
        assert raw["eastward"].values[0, 0, 2, 3] == -9999.0  # CF 2.5.1: stored as _FillValue
    wind = fp.open_wind(tmp_path / "holes.nc")
    assert np.isnan(wind["u"].values[0, 0, 2, 3])
    from flowpipe.ingest import wind_checks

    assert wind_checks(wind)[0] == {"u": 1, "v": 0}


def test_sample_files_are_described_correctly():
    root = Path(__file__).resolve().parents[1] / "sample_data"
    glob_wind = fp.open_wind(root / "demo_global.nc")
    info = fp.describe_grid(glob_wind)
    assert (info.kind, info.latitudes, info.poles, info.geometry) == ("global", "equiangular",
                                                                      True, "CC")
    assert glob_wind.sizes["time"] >= 5 and {850.0, 250.0} <= set(glob_wind["level"].values)
    assert {"u", "v", "omega", "ta"} <= set(glob_wind.data_vars)
    reg = fp.open_wind(root / "demo_regional.nc")
    reg_info = fp.describe_grid(reg)
    assert reg_info.kind == "regional"
    assert reg_info.dlat == pytest.approx(0.25)
    assert reg["level"].values.tolist() == [850.0, 500.0]  # stored in Pa


def test_regional_grid_across_the_date_line_stays_continuous(tmp_path):
    lat = np.arange(-10.0, 10.1, 5.0)
    lon = np.arange(170.0, 210.1, 5.0)  # written as 170..180, -175..-150
    ref = reference_field(lat, lon, LEVELS, 1)
    (path,) = encode(ref, lat, lon, LEVELS, Encoding(lon_convention="-180-180"), tmp_path)
    wind = fp.open_wind(path)
    steps = np.diff(wind["longitude"].values)
    np.testing.assert_allclose(steps, 5.0)
    np.testing.assert_allclose(np.mod(wind["longitude"].values, 360.0), np.mod(lon, 360.0))
    np.testing.assert_allclose(wind["u"].values, ref["u"])


def test_time_and_level_under_the_files_own_names_without_axis_attributes(tmp_path):
    # CF 1.11 sections 4.3 and 4.4: a vertical coordinate is identified by units of pressure,
    # a time coordinate by units "hours since ..."; cf-xarray's guess_coord_axis finds them
    # under the file's own names (valid, lev_p) where no attribute says axis or
    # standard_name. The canonical wind is that of the sample file whose names are usual.
    root = Path(__file__).resolve().parents[1] / "sample_data"
    odd = unusual_names_file(root / "demo_global.nc", tmp_path / "odd.nc")
    with xr.open_dataset(odd) as written:  # no attribute says axis or standard_name
        assert not written.cf.axes.get("T") and not written.cf.axes.get("Z")
    got = fp.open_wind(odd)
    expected = fp.open_wind(root / "demo_global.nc").isel(time=slice(0, 3))
    assert got["u"].dims == expected["u"].dims == ("time", "level", "latitude", "longitude")
    np.testing.assert_array_equal(got["time"].values, expected["time"].values)
    np.testing.assert_array_equal(got["level"].values, expected["level"].values)
    np.testing.assert_array_equal(got["u"].values, expected["u"].values)
