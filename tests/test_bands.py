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
from flowpipe.cli import main
from flowpipe.constants import EARTH_RADIUS

U = 40.0  # m s-1, test case 1's u0 is 2 pi a / 12 days (about 38.6 m s-1); any speed will do


def _band_file(path, lat, u_of, v_of, times=13, dlon=1.0) -> str:
    lon = np.arange(0.0, 360.0, dlon)
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


@pytest.mark.parametrize("lat, kind, pole_rows, words", [
    (np.arange(0.0, 90.1, 1.0), "band", ["north"], " with a north pole row,"),
    (np.arange(-90.0, 0.1, 1.0), "band", ["south"], " with a south pole row,"),
    (np.arange(-30.0, 30.1, 1.0), "band", [], ","),
    (np.arange(-78.0, 78.1, 1.0), "band", [], ","),
    (np.arange(-90.0, 90.1, 1.0), "global", ["south", "north"], " with pole rows,"),
])
def test_inspect_names_the_grid_kind(tmp_path, capsys, lat, kind, pole_rows, words):
    # README.md ("Commands"): inspect --json "grid" is global, band or regional; "poles" is
    # true with rows on both poles, "pole_rows" names each pole the rows include
    path = _band_file(tmp_path / "w.nc", lat, _solid, _zero, times=2)
    assert main(["inspect", path, "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["grid"] == kind
    assert report["pole_rows"] == pole_rows
    assert report["poles"] == (len(pole_rows) == 2)
    assert main(["inspect", path]) == 0
    text = capsys.readouterr().out
    assert f"grid       {kind}, equiangular latitudes{words} " in text


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


def test_circulation_on_a_hemisphere_with_its_pole_row(tmp_path):
    # Stokes' theorem for test case 1 (Williamson et al. 1992, alpha = 0): the counter-
    # clockwise circulation of a circle of latitude phi0 is u a cos(phi0) 2 pi with
    # u = U cos(phi0), i.e. 2 pi a U cos^2(phi0), for the cap north of it given as a box up
    # to the pole and as a circle round the pole; a band whose rows include the pole.
    path = _band_file(tmp_path / "nh.nc", np.arange(0.0, 90.1, 2.0), _solid, _zero, times=2,
                      dlon=2.0)
    out = tmp_path / "circ.nc"
    radius_km = 30.0 * np.pi / 180.0 * EARTH_RADIUS / 1000.0  # 30 degrees of arc: 60 N
    run = subprocess.run([sys.executable, "-m", "flowpipe", "circulation", path, "-o", str(out),
                          "--box", "60,90,0,360", "--circle", f"90,0,{radius_km}"],
                         capture_output=True, text=True)
    assert run.returncode == 0, run.stderr
    expected = 2 * np.pi * EARTH_RADIUS * U * np.cos(np.radians(60.0)) ** 2
    with xr.open_dataset(out) as ds:
        np.testing.assert_allclose(ds["circulation"].values, expected, rtol=1e-3)


def test_harmonic_wind_of_a_band_and_its_share(tmp_path):
    # Lynch (1989), Mon. Wea. Rev. 117, 1492-1500: psi = 0 on the boundary leaves the
    # harmonic part. For test case 1 (Williamson et al. 1992, psi = -a U sin(phi)) on the band
    # |phi| < phi_e, periodic in longitude, that part is the zonal harmonic flow
    # psi_h = B atanh(sin(phi)) (Laplace's equation for psi(phi): cos(phi) dpsi/dphi = const)
    # matching psi at +-phi_e: u_h = U sin(phi_e) / (atanh(sin(phi_e)) cos(phi)), v_h = 0.
    # The harmonic share reported is the energy of the harmonic wind written (never negative).
    path = _band_file(tmp_path / "band.nc", np.arange(-60.0, 60.1, 2.0), _solid, _zero, times=1,
                      dlon=2.0)
    for scheme in ("variational", "dirichlet"):
        out = tmp_path / f"{scheme}.nc"
        assert main(["decompose", path, "-o", str(out), "--method", "regional",
                     "--scheme", scheme]) == 0
        with xr.open_dataset(out) as ds:
            lat = np.radians(ds["latitude"].values)
            edge = np.radians(61.0)  # the band's boundary: half a spacing beyond the last row
            exact = U * np.sin(edge) / (np.arctanh(np.sin(edge)) * np.cos(lat))
            u_h = ds["u_harmonic"].isel(time=0).values
            np.testing.assert_allclose(u_h, np.broadcast_to(exact[:, None], u_h.shape),
                                       rtol=2e-3)
            assert np.abs(ds["v_harmonic"].values).max() < 1e-3 * U
            cos = np.cos(lat)[:, None]
            wind = fp.open_wind(path).isel(time=0)
            share = (np.sum(cos * (ds["u_harmonic"] ** 2 + ds["v_harmonic"] ** 2).values[0])
                     / np.sum(cos * (wind["u"] ** 2 + wind["v"] ** 2).values))
            assert ds["harmonic_energy_share"].values[0] == pytest.approx(share, rel=1e-6)
            assert share > 0.1  # the analytic harmonic flow carries a good part of the energy


def _across_the_pole(alpha):
    # Williamson et al. (1992) test case 1, eq. (75)-(76): the solid-body wind turned by alpha
    def u_of(phi, lam):
        return U * (np.cos(phi) * np.cos(alpha) + np.sin(phi) * np.cos(lam) * np.sin(alpha))

    def v_of(phi, lam):
        return -U * np.sin(lam) * np.sin(alpha) + 0 * phi
    return u_of, v_of


def _rotated(lat, lon, alpha, seconds):
    # Test case 1 is a rigid rotation at angular speed U / a about the axis
    # (-sin(alpha), 0, cos(alpha)) (Williamson et al. 1992, section 3.1); positions from
    # scipy.spatial.transform.Rotation (the reference library).
    from scipy.spatial.transform import Rotation

    phi, lam = np.radians(lat), np.radians(lon)
    start = np.column_stack([np.cos(phi) * np.cos(lam), np.cos(phi) * np.sin(lam), np.sin(phi)])
    axis = np.array([-np.sin(alpha), 0.0, np.cos(alpha)])
    out = np.stack([Rotation.from_rotvec(axis * U * t / EARTH_RADIUS).apply(start)
                    for t in seconds], axis=1)
    return (np.degrees(np.arcsin(np.clip(out[..., 2], -1, 1))),
            np.degrees(np.arctan2(out[..., 1], out[..., 0])))


@pytest.mark.parametrize("pole_row", ["present", "all missing"])
def test_parcels_cross_the_pole_row_of_a_hemisphere_on_the_great_circle(tmp_path, pole_row):
    # Test case 1 with alpha = pi/2 - 0.05 (Williamson et al. 1992): the flow crosses the
    # north pole; on a 0..90 band with its pole row (given, or all missing as archives often
    # have it: the pole is one point, its vector then the ring mean next to it) the parcels
    # must cross it and stay on the analytic great circle. Tolerance 1 km after up to
    # 10 000 km (a fifth of the globe's 5 km after a revolution, tests/test_parcels.py;
    # about 400 m measured at 1 degree).
    alpha = np.pi / 2 - 0.05
    u_of, v_of = _across_the_pole(alpha)
    path = _band_file(tmp_path / "nh.nc", np.arange(0.0, 90.1, 1.0), u_of, v_of, times=13)
    if pole_row == "all missing":
        with xr.open_dataset(path) as ds:
            ds = ds.load()
        ds["u"][:, -1] = np.nan
        ds["v"][:, -1] = np.nan
        path = str(tmp_path / "nh_missing_pole.nc")
        ds.to_netcdf(path)
    starts = [(60.0, 270.0), (75.0, 260.0), (50.0, 285.0)]
    tracks = fp.advect(fp.open_wind(path), starts, hours=72.0)
    assert (tracks["status"].values == 0).all()  # completed
    lat, lon = tracks["latitude"].values, tracks["longitude"].values
    assert np.nanmax(lat) > 89.0  # they went over the pole (to the 90 E side)
    seconds = np.arange(lat.shape[1]) * 3600.0
    xlat, xlon = _rotated(*np.array(starts).T, alpha, seconds)
    from flowpipe.parcels._geometry import great_circle_distance

    error = great_circle_distance(lat, lon, xlat, xlon, EARTH_RADIUS)
    print(f"pole row {pole_row}: largest distance from the great circle {error.max():.0f} m")
    assert error.max() < 1000.0  # m


def test_parcels_leave_a_band_without_pole_rows_at_its_last_row(tmp_path):
    # On -78..78 (no pole rows) the same flow carries parcels poleward beyond the last row:
    # they stop there with left_domain, never recorded beyond 78 degrees, and not before the
    # analytic crossing (Williamson et al. 1992 test case 1, rotated as above).
    alpha = np.pi / 2 - 0.05
    path = _band_file(tmp_path / "b.nc", np.arange(-78.0, 78.1, 1.0), *_across_the_pole(alpha),
                      times=13)
    starts = [(70.0, 270.0), (-70.0, 90.0)]
    tracks = fp.advect(fp.open_wind(path), starts, hours=48.0)
    meanings = tracks["status"].attrs["flag_meanings"].split()
    assert [meanings[s] for s in tracks["status"].values] == ["left_domain"] * 2
    lat = tracks["latitude"].values
    assert np.nanmax(np.abs(lat)) <= 78.0 + 1e-9
    seconds = np.arange(lat.shape[1]) * 3600.0
    xlat, _ = _rotated(*np.array(starts).T, alpha, seconds)
    for i in range(2):
        crossing = seconds[np.argmax(np.abs(xlat[i]) > 78.0)]  # first record beyond the band
        last = seconds[np.isfinite(lat[i])][-1]
        assert crossing - 3600.0 - tracks.attrs["time_step_seconds"] <= last < crossing


def test_ftle_of_solid_body_rotation_on_a_hemisphere_is_zero(tmp_path):
    # A rigid rotation (Williamson et al. 1992, test case 1, across the pole) stretches
    # nothing: its finite-time Lyapunov exponent is zero (Haller 2001, Physica D 149, 248-277:
    # ln of the largest singular value of the flow map's gradient, 1 for a rotation). Seeds by
    # the date line and the pole row of a 0..90 band must wrap and cross, not stop.
    path = _band_file(tmp_path / "nh.nc", np.arange(0.0, 90.1, 1.0),
                      *_across_the_pole(np.pi / 2), times=3)
    out = fp.ftle(fp.open_wind(path), hours=12.0, spacing=5.0, region=(60.0, 90.0, 0.0, 360.0))
    values = out["ftle"].values
    assert np.isfinite(values).all()
    assert np.abs(values).max() < 1e-3 * U / EARTH_RADIUS


def test_a_start_outside_the_band_is_skipped_not_the_run(tmp_path, capsys):
    # One start of several outside the -30..30 band: a flowpipe warning, that start kept at 0 h
    # with the status outside_domain_at_start (CF 1.11 section 3.5 flag_meanings), the others
    # integrated; with every start outside, the usual one-line error (exit 2).
    path = _band_file(tmp_path / "tro.nc", np.arange(-30.0, 30.1, 2.0), _solid, _zero, times=3,
                      dlon=2.0)
    csv = tmp_path / "starts.csv"
    csv.write_text("latitude,longitude\n10,20\n45,20\n-20,200\n")
    out = tmp_path / "tracks.nc"
    assert main(["advect", path, "--starts", str(csv), "--hours", "6", "-o", str(out)]) == 0
    err = capsys.readouterr().err
    assert "flowpipe: warning:" in err and "starts.csv line 3" in err
    with xr.open_dataset(out) as ds:
        meanings = ds["status"].attrs["flag_meanings"].split()
        assert [meanings[s] for s in ds["status"].values] == [
            "completed", "outside_domain_at_start", "completed"]
        assert (ds["latitude"].values[1, 0], ds["longitude"].values[1, 0]) == (45.0, 20.0)
        assert np.isnan(ds["latitude"].values[1, 1:]).all()
        assert np.isfinite(ds["latitude"].values[[0, 2]]).all()
    csv.write_text("latitude,longitude\n45,20\n")
    assert main(["advect", path, "--starts", str(csv), "--hours", "6",
                 "-o", str(tmp_path / "none.nc")]) == 2
    err = capsys.readouterr().err
    assert "outside the latitude band" in err and len(err.strip().splitlines()) == 1


@pytest.mark.parametrize("pole_row", ["present", "all missing"])
def test_harmonic_wind_of_a_hemisphere_treats_the_pole_as_a_point(tmp_path, pole_row):
    # Lynch (1989): the harmonic part takes the boundary values of psi; on 0..90 with its pole
    # row the only boundary is the equatorward edge phi_e (half a spacing south of the equator
    # row); the pole is a point of the domain. Test case 1 (Williamson et al. 1992):
    # alpha = 0, psi = -a U sin(phi): the harmonic flow that matches it on a circle of
    # latitude and is regular at the pole is a constant, so u_h = v_h = 0. alpha = pi/2,
    # psi = a U cos(phi) cos(lambda): harmonic functions stay harmonic under the conformal
    # stereographic map (Laplace's equation in 2-D is conformally invariant), so
    # h = A tan(theta/2) cos(lambda) (theta the colatitude), A = a U (1 + sin(phi_e)), and
    # (u_h, v_h) = U (1 + sin(phi_e)) / (1 + sin(phi)) (cos(lambda), -sin(lambda)).
    # Before, the edge short of the pole gave u_h ~ 1/cos(phi): hundreds of m/s near it.
    lat = np.arange(0.0, 90.1, 2.0)
    edge = np.radians(-1.0)
    for alpha in (0.0, np.pi / 2):
        path = _band_file(tmp_path / f"nh{alpha:.1f}.nc", lat, *_across_the_pole(alpha), times=1,
                          dlon=2.0)
        wind = fp.open_wind(path)
        if pole_row == "all missing":
            wind = wind.load()
            wind["u"][:, -1] = np.nan
            wind["v"][:, -1] = np.nan
        parts = fp.decompose(wind, method="regional", scheme="dirichlet").isel(time=0)
        phi = np.radians(parts["latitude"].values)[:-1, None]
        lam = np.radians(parts["longitude"].values)[None, :]
        size = U * (1 + np.sin(edge)) * np.sin(alpha) / (1 + np.sin(phi))
        for name, exact in (("u_harmonic", size * np.cos(lam)), ("v_harmonic", -size * np.sin(lam))):
            values = parts[name].values[:-1]
            np.testing.assert_allclose(values[:-1], exact[:-1], atol=2.5e-3 * U)
            # the row next to the pole: within 2 % of U (about 1 % measured at 1 and 2 degrees)
            np.testing.assert_allclose(values[-1], exact[-1], atol=0.02 * U)
        # the pole row: the pole's one vector seen from each meridian, (u_h, v_h) at phi = 90
        # (as near it); missing where the input's pole row is missing (README, "Inputs")
        pole = U * (1 + np.sin(edge)) * np.sin(alpha) / 2
        for name, exact in (("u_harmonic", pole * np.cos(lam[0])),
                            ("v_harmonic", -pole * np.sin(lam[0]))):
            if pole_row == "present":
                np.testing.assert_allclose(parts[name].values[-1], exact, atol=0.02 * U)
            else:
                assert np.isnan(parts[name].values[-1]).all()
        if alpha == 0.0:
            assert float(parts["harmonic_energy_share"]) < 1e-6


def test_the_pole_row_of_a_hemisphere_holds_the_values_at_the_pole(tmp_path):
    # Test case 1 turned by alpha = pi/4 (Williamson et al. 1992, eqs. 75-76) on 0..90 with
    # its pole row: psi = -a U (sin(phi) cos(alpha) - cos(lambda) cos(phi) sin(alpha)), its
    # vorticity 2 U / a (sin(phi) cos(alpha) - cos(lambda) cos(phi) sin(alpha)), 2 U cos(alpha) / a
    # at the pole. Lynch's (1989) rotational wind is the wind less the harmonic flow of the
    # hemisphere (the test above: U (1 + sin(phi_e)) sin(alpha) / (1 + sin(phi)) (cos(lambda),
    # -sin(lambda))); at the pole both are one vector seen from each meridian.
    alpha = np.pi / 4
    lat = np.arange(0.0, 90.1, 2.0)
    path = _band_file(tmp_path / "nh.nc", lat, *_across_the_pole(alpha), times=1, dlon=2.0)
    wind = fp.open_wind(path).isel(time=0)
    parts = fp.decompose(wind, method="regional", scheme="dirichlet")
    for name in parts.data_vars:
        if "latitude" in parts[name].dims:
            assert np.isfinite(parts[name].values[-1]).all(), name
    phi = np.radians(lat)[:, None]
    lam = np.radians(parts["longitude"].values)[None, :]
    size = U * (1 + np.sin(np.radians(-1.0))) * np.sin(alpha) / (1 + np.sin(phi))
    u_of, v_of = _across_the_pole(alpha)
    errors = np.maximum(
        np.abs(parts["u_rotational"].values - (u_of(phi, lam) - size * np.cos(lam))),
        np.abs(parts["v_rotational"].values - (v_of(phi, lam) + size * np.sin(lam))))
    # at the pole within 1 % of U, no worse than elsewhere (0.4 % measured, 4.8 % on the row
    # next to it)
    assert errors[-1].max() < min(0.01 * U, errors[:-1].max())
    # psi: one value at the pole; its rise from the mean at 60 N as the analytic one (to the
    # 5e-5 measured on every row)
    psi = parts["streamfunction"].values
    assert np.ptp(psi[-1]) == 0.0
    rise = -EARTH_RADIUS * U * np.cos(alpha) * (1 - np.sin(np.radians(60.0)))
    assert psi[-1, 0] - psi[lat == 60.0].mean() == pytest.approx(rise, rel=2e-4)
    pole_vorticity = 2 * U * np.cos(alpha) / EARTH_RADIUS
    np.testing.assert_allclose(parts["vorticity"].values[-1], pole_vorticity, rtol=2e-3)
    # and off the pole within 3 % of it (2.2 % measured on the row next to the pole, whose
    # value is that of the corner ring half a spacing equatorward)
    vorticity = 2 * U / EARTH_RADIUS * (np.sin(phi) * np.cos(alpha)
                                        - np.cos(lam) * np.cos(phi) * np.sin(alpha))
    np.testing.assert_allclose(parts["vorticity"].values, vorticity, atol=0.03 * pole_vorticity)
    assert np.abs(parts["divergence"].values[-1]).max() < 1e-6 * pole_vorticity
    # a non-divergent wind: chi at the pole is nothing beside psi's scale a U
    assert np.abs(parts["velocity_potential"].values[-1]).max() < 1e-6 * EARTH_RADIUS * U


def test_circulation_round_the_pole_of_a_hemisphere(tmp_path):
    # Stokes' theorem: the mean vorticity of a cap is its circulation over its area. For
    # test case 1 turned by alpha = pi/4 (Williamson et al. 1992) the vorticity is
    # 2 U / a times the height along the axis (-sin(alpha), 0, cos(alpha)), linear in
    # position, so its mean over a cap of angular radius rho is the value at the cap's
    # centre times (1 + cos(rho)) / 2 (the mean height of a spherical cap, Archimedes' hat-box
    # theorem). The gridded means round the pole use the 0..90 band's pole row.
    alpha = np.pi / 4
    path = _band_file(tmp_path / "nh.nc", np.arange(0.0, 90.1, 2.0), *_across_the_pole(alpha),
                      times=1, dlon=2.0)
    out = tmp_path / "circ.nc"
    run = subprocess.run([sys.executable, "-m", "flowpipe", "circulation", path, "-o", str(out),
                          "--circle", "90,0,300", "--circle", "88,0,300"],
                         capture_output=True, text=True)
    assert run.returncode == 0, run.stderr
    rho = 300e3 / EARTH_RADIUS
    centre = np.radians(np.array([90.0, 88.0]))
    expected = (2 * U / EARTH_RADIUS * (np.sin(centre) * np.cos(alpha)
                                        - np.cos(centre) * np.sin(alpha)) * (1 + np.cos(rho)) / 2)
    with xr.open_dataset(out) as ds:
        gridded = ds["mean_vorticity_gridded"].values.ravel()
        line = ds["mean_vorticity"].values.ravel()
    assert np.isfinite(gridded).all()
    # centred on the pole: 7e-4 and 1.5e-4 measured
    assert gridded[0] == pytest.approx(expected[0], rel=2e-3)
    assert gridded[0] == pytest.approx(line[0], rel=2e-3)
    # off the pole, over it: within 2 % (0.9 % measured; the row next to the pole has the
    # vorticity of the corner ring a spacing equatorward)
    assert gridded[1] == pytest.approx(expected[1], rel=0.02)
