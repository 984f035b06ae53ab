"""GRIB2 input: the files the tests write with ecCodes open through the same ingest as NetCDF.

External checks:
* ecCodes (the general-purpose GRIB library, through its Python interface) writes the
  files from its own sample ``regular_ll_pl_grib2`` and decodes each message on its own,
  independently of cfgrib, which flowpipe reads with;
* GRIB2 simple packing (WMO Manual on Codes, WMO-No. 306, Volume I.2, FM 92 GRIB
  edition 2, data representation template 5.0): a value ``Y`` is stored as
  ``Y * 10**D = R + X * 2**E`` with an integer ``X``, so it comes back within half a
  step ``2**E * 10**-D / 2`` of the value written: the packing precision stated below;
* the decomposition of the same field written as NetCDF (netCDF4 through xarray) is
  the reference the GRIB file must reproduce;
* WMO-No. 306, FM 92, section 0: a GRIB message starts with the four letters ``GRIB``.

The wind is invented: solid-body rotation (Williamson et al. 1992, J. Comput. Phys. 102,
211-224, test case 2, section 3.2) with a divergent wave added, different on each level
and lead.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import eccodes
import numpy as np
import pytest
import xarray as xr

import flowpipe as fp
from flowpipe.cli import main
from flowpipe.errors import InputError

LAT = np.linspace(90.0, -90.0, 37)  # as GRIB scans by default: north to south
LON = np.arange(0.0, 360.0, 5.0)
LEVELS = (850, 500)
STEPS = (0, 6)
RUN = np.datetime64("2026-12-01T00", "ns")
BITS = 16


def analytic(level: int, step: int) -> tuple[np.ndarray, np.ndarray]:
    """u, v (m s-1) on (LAT, LON): solid-body rotation plus a divergent wave."""
    phi, lam = np.radians(LAT)[:, None], np.radians(LON)[None, :]
    u0 = 20.0 + 0.02 * (1000 - level)
    u = u0 * np.cos(phi) + 3.0 * np.sin(2 * lam + 0.1 * step) * np.cos(phi) ** 2
    v = 2.0 * np.cos(2 * lam + 0.1 * step) * np.sin(phi) * np.cos(phi)
    return u, v


def write_grib(path: Path, members: tuple[int, ...] = ()) -> dict:
    """One message per (step, level, component[, member]); returns, per (step, level,
    name[, member]), the values ecCodes decodes from the message and its packing step."""
    decoded = {}
    with open(path, "wb") as out:
        for step in STEPS:
            for level in LEVELS:
                for member in members or (None,):
                    wind = analytic(level, step)
                    if member is not None:
                        wind = tuple(w * (1.0 + 0.1 * member) for w in wind)
                    for name, values in zip(("u", "v"), wind, strict=True):
                        handle = eccodes.codes_grib_new_from_samples("regular_ll_pl_grib2")
                        keys = {"Ni": LON.size, "Nj": LAT.size,
                                "latitudeOfFirstGridPointInDegrees": LAT[0],
                                "latitudeOfLastGridPointInDegrees": LAT[-1],
                                "longitudeOfFirstGridPointInDegrees": LON[0],
                                "longitudeOfLastGridPointInDegrees": LON[-1],
                                "iDirectionIncrementInDegrees": 5.0,
                                "jDirectionIncrementInDegrees": 5.0}
                        if member is not None:  # template 4.1: individual ensemble forecast
                            keys.update(productDefinitionTemplateNumber=1)
                        keys.update(typeOfLevel="isobaricInhPa", level=level, shortName=name,
                                    dataDate=20261201, dataTime=0, stepUnits=1,
                                    forecastTime=step, bitsPerValue=BITS)
                        if member is not None:
                            keys.update(perturbationNumber=member,
                                        numberOfForecastsInEnsemble=len(members))
                        for key, value in keys.items():
                            eccodes.codes_set(handle, key, value)
                        eccodes.codes_set_values(handle, values.ravel())
                        e = eccodes.codes_get(handle, "binaryScaleFactor")
                        d = eccodes.codes_get(handle, "decimalScaleFactor")
                        back = eccodes.codes_get_values(handle).reshape(values.shape)
                        eccodes.codes_write(handle, out)
                        eccodes.codes_release(handle)
                        key = (step, level, name) + ((member,) if member is not None else ())
                        decoded[key] = (back, 2.0**e * 10.0**-d)
    return decoded


def netcdf_twin(path: Path, decoded: dict) -> None:
    """The values ecCodes decoded, written as a CF NetCDF file (valid time, pressure)."""
    u = np.array([[decoded[(s, lev, "u")][0] for lev in LEVELS] for s in STEPS])
    v = np.array([[decoded[(s, lev, "v")][0] for lev in LEVELS] for s in STEPS])
    dims = ("time", "plev", "lat", "lon")
    leads = np.array(STEPS) * np.timedelta64(3600, "s")
    xr.Dataset({"u": (dims, u, {"units": "m s-1", "standard_name": "eastward_wind"}),
                "v": (dims, v, {"units": "m s-1", "standard_name": "northward_wind"})},
               coords={"time": ("time", RUN + leads, {"standard_name": "time"}),
                       "plev": ("plev", np.array(LEVELS, float),
                                {"units": "hPa", "standard_name": "air_pressure"}),
                       "lat": ("lat", LAT, {"units": "degrees_north"}),
                       "lon": ("lon", LON, {"units": "degrees_east"})}).to_netcdf(path)


@pytest.fixture(scope="module")
def grib(tmp_path_factory) -> tuple[Path, dict]:
    # no .grib2 suffix: GRIB is told by its first bytes
    path = tmp_path_factory.mktemp("grib") / "forecast.bin"
    return path, write_grib(path)


def test_the_file_starts_with_the_grib_signature(grib):
    # WMO-No. 306, FM 92 GRIB, section 0, octets 1-4 (*the file the test wrote*)
    path, _ = grib
    assert path.read_bytes()[:4] == b"GRIB"
    assert fp.ingest.is_grib(path)


def test_canonical_wind_is_the_written_wind_to_packing_precision(grib):
    path, decoded = grib
    before = sorted(p.name for p in path.parent.iterdir())
    wind = fp.open_wind(path)
    assert sorted(p.name for p in path.parent.iterdir()) == before  # no index file left
    assert wind["u"].dims == ("time", "level", "latitude", "longitude")
    np.testing.assert_array_equal(wind["level"].values, LEVELS)  # isobaricInhPa, in hPa
    assert wind["level"].attrs["standard_name"] == "air_pressure"
    np.testing.assert_array_equal(wind["latitude"].values, LAT[::-1])
    # forecast axes: cfgrib's time (the run), step (the lead) and valid_time
    assert wind["forecast_reference_time"].values == RUN
    np.testing.assert_array_equal(wind["forecast_period"].values,
                                  np.array(STEPS) * np.timedelta64(3600, "s"))
    np.testing.assert_array_equal(wind["time"].values,
                                  RUN + np.array(STEPS) * np.timedelta64(3600, "s"))
    for i, step in enumerate(STEPS):
        for j, level in enumerate(LEVELS):
            for name, exact in zip(("u", "v"), analytic(level, step), strict=True):
                got = wind[name].isel(time=i, level=j).values[::-1]  # back to north first
                back, packing = decoded[(step, level, name)]
                # simple packing: within half a step of the value written (WMO-No. 306,
                # template 5.0); cfgrib hands out float32 (IEEE 754 single: 2**-24 relative)
                tolerance = packing / 2 + 2.0**-24 * np.abs(exact).max()
                assert np.abs(got - exact).max() <= tolerance
                assert packing / 2 < 1e-3 * np.abs(exact).max()  # 16 bits: the stated precision
                np.testing.assert_allclose(got, back, rtol=2.0**-23, atol=0)


def test_decomposition_of_grib_equals_that_of_the_same_data_as_netcdf(grib, tmp_path):
    path, decoded = grib
    twin = tmp_path / "twin.nc"
    netcdf_twin(twin, decoded)
    from_grib = fp.decompose(fp.open_wind(path)).compute()
    from_netcdf = fp.decompose(fp.open_wind(twin)).compute()
    for name in ("streamfunction", "velocity_potential", "vorticity", "divergence",
                 "u_rotational", "v_divergent"):
        a, b = from_grib[name].values, from_netcdf[name].values
        # the same values up to cfgrib's float32 (2**-24 relative per value)
        assert np.abs(a - b).max() <= 1e-6 * np.abs(b).max(), name
    np.testing.assert_array_equal(from_grib["time"].values, from_netcdf["time"].values)
    assert from_grib["forecast_period"].attrs["standard_name"] == "forecast_period"


def test_inspect_describes_a_grib_file(grib, capsys):
    path, _ = grib
    assert main(["inspect", "--json", str(path)]) == 0
    report = json.loads(capsys.readouterr().out)
    assert (report["u"], report["v"], report["grid"], report["poles"]) == ("u", "v", "global",
                                                                            True)
    assert (report["nlat"], report["nlon"], report["times"]) == (LAT.size, LON.size, 2)
    assert report["levels"] == [850.0, 500.0] and report["level_type"] == "pressure"
    assert report["runs"] == ["2026-12-01T00Z"] and report["leads"] == [0.0, 6.0]
    assert report["u_units"] == "m s**-1"  # GRIB's own spelling, read by UDUNITS


def test_lead_selection_and_trajectories_on_grib_follow_the_netcdf_twin(grib, tmp_path):
    path, decoded = grib
    assert fp.open_wind(path, leads=[6]).sizes["time"] == 1
    twin = tmp_path / "twin.nc"
    netcdf_twin(twin, decoded)
    outputs = []
    for source in (path, twin):
        out = tmp_path / f"tracks_{source.stem}.nc"
        assert main(["advect", str(source), "-o", str(out), "--start", "45,10,850",
                     "--start", "-30,200,500", "--hours", "6"]) == 0
        outputs.append(xr.load_dataset(out))
    grib_tracks, netcdf_tracks = outputs
    meanings = grib_tracks["status"].attrs["flag_meanings"].split()
    assert [meanings[s] for s in grib_tracks["status"].values] == ["completed"] * 2
    for name in ("latitude", "longitude", "air_pressure"):
        np.testing.assert_allclose(grib_tracks[name].values, netcdf_tracks[name].values,
                                   rtol=0, atol=1e-4)  # degrees; the wind differs by float32


def test_without_the_grib_readers_the_error_says_how_to_install_them(grib, monkeypatch,
                                                                     capsys):
    path, _ = grib
    monkeypatch.setitem(sys.modules, "cfgrib", None)  # import cfgrib raises ImportError
    with pytest.raises(InputError, match=r"pip install 'flowpipe\[grib\]'"):
        fp.open_wind(path)
    assert main(["inspect", str(path)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("flowpipe: error:"), err
    assert "pip install 'flowpipe[grib]'" in err[0] and str(path) in err[0]


def test_a_map_of_a_grib_file_names_its_level_run_and_lead(grib):
    from flowpipe.maps import render

    path, _ = grib
    figure = render(path, field="u", level=500, lead=6)  # the matplotlib figure
    title = figure.axes[0].get_title(loc="left")
    assert "500 hPa" in title and "run 2026-12-01T00Z +6 h, valid 2026-12-01T06:00Z" in title


def write_10m_wind(path: Path) -> None:
    """10 m winds (shortName 10u/10v) from ecCodes' sample regular_ll_sfc_grib2."""
    with open(path, "wb") as out:
        for name, values in zip(("10u", "10v"), analytic(1000, 0), strict=True):
            handle = eccodes.codes_grib_new_from_samples("regular_ll_sfc_grib2")
            for key, value in {"Ni": LON.size, "Nj": LAT.size,
                               "latitudeOfFirstGridPointInDegrees": LAT[0],
                               "latitudeOfLastGridPointInDegrees": LAT[-1],
                               "longitudeOfFirstGridPointInDegrees": LON[0],
                               "longitudeOfLastGridPointInDegrees": LON[-1],
                               "iDirectionIncrementInDegrees": 5.0,
                               "jDirectionIncrementInDegrees": 5.0, "shortName": name,
                               "bitsPerValue": BITS}.items():
                eccodes.codes_set(handle, key, value)
            eccodes.codes_set_values(handle, values.ravel())
            eccodes.codes_write(handle, out)
            eccodes.codes_release(handle)


def test_10m_winds_and_a_file_of_two_kinds_of_level(grib, tmp_path):
    surface = tmp_path / "surface.grib2"
    write_10m_wind(surface)
    wind = fp.open_wind(surface)
    assert wind["u"].dims == ("time", "latitude", "longitude")
    assert float(wind["height"]) == 10.0 and wind["height"].attrs["units"] == "m"
    # pressure levels and 10 m in one file: the group with the most wind values
    mixed = tmp_path / "mixed.grib2"
    mixed.write_bytes(grib[0].read_bytes() + surface.read_bytes())
    assert fp.open_wind(mixed)["u"].dims == ("time", "level", "latitude", "longitude")


def test_a_truncated_grib_file_is_refused_in_one_line(grib, tmp_path, capsys):
    path = tmp_path / "cut.grib2"
    path.write_bytes(grib[0].read_bytes()[:-100])  # the last message loses its end
    assert main(["inspect", str(path)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "cannot be read as GRIB" in err[0] and str(path) in err[0], err


def test_an_ensemble_grib_file_keeps_its_members(tmp_path):
    # cfgrib gives the ensemble member as "number" with standard_name realization
    path = tmp_path / "members.grib2"
    write_grib(path, members=(0, 1, 2))
    wind = fp.open_wind(path)
    assert wind["u"].dims == ("realization", "time", "level", "latitude", "longitude")
    np.testing.assert_array_equal(wind["realization"].values, [0, 1, 2])
    assert wind["realization"].attrs["standard_name"] == "realization"
    ratio = (wind["u"].isel(realization=2) / wind["u"].isel(realization=0)).values
    np.testing.assert_allclose(ratio[np.isfinite(ratio) & (np.abs(wind["u"].isel(
        realization=0).values) > 1)], 1.2, rtol=1e-3)


def test_a_map_takes_the_grib_file_own_variable_names(grib, tmp_path):
    # cfgrib names the 10 m winds u10 and v10 (their GRIB shortName 10u/10v, ECMWF
    # parameter database), which flowpipe reads as u and v: --field takes either name,
    # and a name it does not know is told with the file's names beside flowpipe's.
    from flowpipe.maps import render

    surface = tmp_path / "surface.grib2"
    write_10m_wind(surface)
    by_file, by_flowpipe = render(surface, field="u10"), render(surface, field="u")
    titles = [f.axes[0].get_title(loc="left") for f in (by_file, by_flowpipe)]
    assert titles[0] == titles[1] and "Eastward wind" in titles[0]
    with pytest.raises(InputError, match=r"fields in the file: u \(file: u10\), "
                                         r"v \(file: v10\)"):
        render(surface, field="10u")
