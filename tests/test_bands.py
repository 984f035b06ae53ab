"""Periodic latitude bands: all longitudes, part of the latitudes.

External checks:
* solid-body rotation, Williamson et al. (1992), "A standard test set for numerical
  approximations to the shallow water equations in spherical geometry", J. Comput.
  Phys. 102, 211-224, test case 1: u = U cos(phi), parcels keep their latitude and turn
  at the angular speed U / a;
* a uniform southward wind v = -V crosses the band's southern edge after
  (phi0 - phi_south) a / V (kinematics of uniform motion on a meridian).
"""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest
import xarray as xr

import flowpipe as fp
from flowpipe.constants import EARTH_RADIUS

U = 40.0  # m s-1, test case 1's u0 is 2 pi a / 12 days (about 38.6 m s-1); any speed will do


def _band_file(path, lat, u_of, v_of, times=13) -> str:
    lon = np.arange(0.0, 360.0, 1.0)
    phi, lam = np.radians(lat)[:, None], np.radians(lon)[None, :]
    shape = (times, lat.size, lon.size)
    t = np.datetime64("2026-03-01") + np.arange(times) * np.timedelta64(6, "h")
    ds = xr.Dataset(
        {"u": (("time", "latitude", "longitude"), np.broadcast_to(u_of(phi, lam), shape).copy(),
               {"units": "m s-1", "standard_name": "eastward_wind"}),
         "v": (("time", "latitude", "longitude"), np.broadcast_to(v_of(phi, lam), shape).copy(),
               {"units": "m s-1", "standard_name": "northward_wind"})},
        coords={"time": t,
                "latitude": ("latitude", lat, {"units": "degrees_north", "standard_name": "latitude"}),
                "longitude": ("longitude", lon, {"units": "degrees_east",
                                                 "standard_name": "longitude"})})
    ds.to_netcdf(path)
    return str(path)


def _zero(phi, lam):
    return 0 * phi + 0 * lam


def _solid(phi, lam):
    return U * np.cos(phi) + 0 * lam


@pytest.mark.parametrize("lat, kind", [
    (np.arange(0.0, 90.1, 1.0), "band"),
    (np.arange(-30.0, 30.1, 1.0), "band"),
    (np.arange(-78.0, 78.1, 1.0), "band"),
    (np.arange(-90.0, 90.1, 1.0), "global"),
])
def test_inspect_names_the_grid_kind(tmp_path, lat, kind):
    # README.md ("Commands"): inspect --json "grid" is global, band or regional
    path = _band_file(tmp_path / "w.nc", lat, _solid, _zero, times=2)
    run = subprocess.run([sys.executable, "-m", "flowpipe", "inspect", path, "--json"],
                         capture_output=True, text=True)
    assert run.returncode == 0, run.stderr
    assert json.loads(run.stdout)["grid"] == kind
    text = subprocess.run([sys.executable, "-m", "flowpipe", "inspect", path],
                          capture_output=True, text=True).stdout
    assert kind in text


def test_solid_body_rotation_on_a_hemisphere_returns_as_on_the_globe(tmp_path):
    # Williamson et al. (1992) test case 1 (alpha = 0): after t the parcel at 60 N has
    # turned by U t / a radians of longitude; the hemisphere (with its pole row) must do as
    # well as the full globe, and no start is refused as "too coarse".
    hemi = fp.open_wind(_band_file(tmp_path / "nh.nc", np.arange(0.0, 90.1, 1.0), _solid, _zero))
    globe = fp.open_wind(_band_file(tmp_path / "gl.nc", np.arange(-90.0, 90.1, 1.0), _solid, _zero))
    assert fp.describe_grid(hemi).kind == "band"
    hours = 72.0
    expected = np.degrees(U * hours * 3600.0 / EARTH_RADIUS)
    errors = []
    for wind in (hemi, globe):
        tracks = fp.advect(wind, [(60.0, 10.0), (60.0, 200.0)], hours=hours)
        assert (tracks["status"].values == 0).all()
        end_lon = tracks["longitude"].values[:, -1]
        turned = np.mod(end_lon - np.array([10.0, 200.0]), 360.0)
        errors.append(np.abs(turned - expected).max() + np.abs(tracks["latitude"].values - 60).max())
    assert errors[0] <= 1.5 * errors[1] + 1e-6
    assert errors[0] < 0.01  # degrees


def test_vorticity_on_a_hemisphere(tmp_path):
    # Test case 1's relative vorticity 2 U sin(phi) / a (Williamson et al. 1992: the
    # Laplacian of its stream function psi = -a U sin(phi)), in the band's interior,
    # decomposed by the regional solver, periodic in longitude.
    wind = fp.open_wind(_band_file(tmp_path / "nh.nc", np.arange(0.0, 90.1, 1.0), _solid, _zero,
                                   times=1))
    parts = fp.decompose(wind)
    vort = parts["vorticity"].isel(time=0).sel(latitude=slice(20, 70)).values
    lat = parts["latitude"].sel(latitude=slice(20, 70)).values
    expected = 2 * U * np.sin(np.radians(lat)) / EARTH_RADIUS
    np.testing.assert_allclose(vort, np.broadcast_to(expected[:, None], vort.shape),
                               rtol=0.01, atol=1e-3 * expected.max())


def test_southward_wind_leaves_a_tropical_band_at_its_edge(tmp_path):
    # A uniform southward wind of V: from latitude phi0 the parcel reaches 30 S after
    # (phi0 + 30) (pi / 180) a / V seconds, then stops with left_domain; nothing is
    # recorded south of the band.
    V = 20.0
    path = _band_file(tmp_path / "tro.nc", np.arange(-30.0, 30.1, 1.0),
                      lambda p, lam: 5.0 + _zero(p, lam), lambda p, lam: -V + _zero(p, lam))
    tracks = fp.advect(fp.open_wind(path), [(0.0, 100.0), (10.0, 359.5), (-20.0, 0.0)],
                       hours=66.0)
    meanings = tracks["status"].attrs["flag_meanings"].split()
    assert [meanings[s] for s in tracks["status"].values] == ["left_domain"] * 3
    lat = tracks["latitude"].values
    assert np.nanmin(lat) >= -30.0 - 1e-9 and np.nanmax(lat) <= 30.0
    step = tracks.attrs["time_step_seconds"]
    record = 3600.0
    for i, phi0 in enumerate((0.0, 10.0, -20.0)):
        crossing = np.radians(phi0 + 30.0) * EARTH_RADIUS / V
        last = (np.isfinite(lat[i]).sum() - 1) * record  # the last recorded time
        assert crossing - record - step <= last <= crossing + step


def test_constant_omega_on_a_band_moves_parcels_by_omega_times_time(tmp_path):
    # Constant vertical velocity omega in pressure coordinates: dp/dt = omega, so a parcel's
    # pressure after t is p0 + omega t (analytic), on a band as on the globe.
    omega = 0.1  # Pa s-1, descent
    lat = np.arange(-40.0, 40.1, 1.0)
    lon = np.arange(0.0, 360.0, 1.0)
    levels = np.array([500.0, 700.0, 850.0, 1000.0])
    t = np.datetime64("2026-03-01") + np.arange(5) * np.timedelta64(6, "h")
    shape = (t.size, levels.size, lat.size, lon.size)
    dims = ("time", "level", "latitude", "longitude")
    ds = xr.Dataset(
        {"u": (dims, np.full(shape, 10.0), {"units": "m s-1", "standard_name": "eastward_wind"}),
         "v": (dims, np.zeros(shape), {"units": "m s-1", "standard_name": "northward_wind"}),
         "omega": (dims, np.full(shape, omega), {"units": "Pa s-1", "standard_name":
                                                 "lagrangian_tendency_of_air_pressure"})},
        coords={"time": t,
                "level": ("level", levels, {"units": "hPa", "standard_name": "air_pressure",
                                            "positive": "down"}),
                "latitude": ("latitude", lat, {"units": "degrees_north", "standard_name": "latitude"}),
                "longitude": ("longitude", lon, {"units": "degrees_east",
                                                 "standard_name": "longitude"})})
    ds.to_netcdf(tmp_path / "omega.nc")
    wind = fp.open_wind(str(tmp_path / "omega.nc"))
    assert fp.describe_grid(wind).kind == "band"
    hours = 18.0
    tracks = fp.advect(wind, [(0.0, 350.0, 600.0), (30.0, 10.0, 700.0)], hours=hours,
                       vertical="omega")
    expected = np.array([600.0, 700.0]) + omega * hours * 3600.0 / 100.0  # hPa
    np.testing.assert_allclose(tracks["air_pressure"].values[:, -1], expected, rtol=1e-6)
