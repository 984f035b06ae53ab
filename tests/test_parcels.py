"""Parcel trajectories against published test cases and exact solutions."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from reference_winds import (
    REVOLUTION_SECONDS,
    deformational_flow,
    global_grid,
    series_dataset,
    solid_body_rotation,
)

from flowpipe.constants import EARTH_RADIUS
from flowpipe.errors import InputError, UsageError
from flowpipe.grid import gaussian_latitudes
from flowpipe.parcels import _kernels as K
from flowpipe.parcels import advect, starts_box, starts_line, starts_ring
from flowpipe.parcels._geometry import unit_vectors
from flowpipe.parcels._window import cell_tables

KM = 1e3
DAY = 86400.0


def fibonacci_points(n: int) -> tuple[np.ndarray, np.ndarray]:
    """Nearly uniform points on the sphere: the golden-angle spiral (common practice)."""
    i = np.arange(n) + 0.5
    return np.degrees(np.arcsin(1 - 2 * i / n)), np.mod(i * 180.0 * (3 - np.sqrt(5)), 360.0)


def haversine(lat1, lon1, lat2, lon2) -> np.ndarray:
    """Great-circle distance in m: Sinnott (1984), "Virtues of the haversine",
    Sky and Telescope 68(2), 159 (an independent formula from the package's)."""
    p1, p2 = np.radians(lat1), np.radians(lat2)
    dl = np.radians(np.asarray(lon2) - np.asarray(lon1))
    h = np.sin((p2 - p1) / 2) ** 2 + np.cos(p1) * np.cos(p2) * np.sin(dl / 2) ** 2
    return 2 * EARTH_RADIUS * np.arcsin(np.sqrt(np.clip(h, 0.0, 1.0)))


def rotate(lat, lon, axis, angle) -> tuple[np.ndarray, np.ndarray]:
    """Rotate points about a unit axis: Rodrigues (1840), J. Math. Pures Appl. 5, 380-440."""
    phi, lam = np.radians(lat), np.radians(lon)
    r = np.stack([np.cos(phi) * np.cos(lam), np.cos(phi) * np.sin(lam), np.sin(phi)], axis=-1)
    k = np.asarray(axis)
    out = (r * np.cos(angle) + np.cross(k, r) * np.sin(angle)
           + k * (r @ k)[:, None] * (1 - np.cos(angle)))
    return np.degrees(np.arcsin(np.clip(out[:, 2], -1, 1))), np.degrees(np.arctan2(out[:, 1],
                                                                                  out[:, 0]))


def steady_wind(u: np.ndarray, v: np.ndarray, lat: np.ndarray, lon: np.ndarray) -> xr.Dataset:
    return series_dataset(lat, lon, np.zeros(1), lambda a, b, t: (u, v))


# Williamson, Drake, Hack, Jakob & Swarztrauber (1992), "A standard test set for
# numerical approximations to the shallow water equations in spherical geometry",
# J. Comput. Phys. 102, 211-224, test case 1: solid-body rotation, u0 = 2 pi a / 12
# days, eqs. (75)-(76); every parcel is back at its start after one revolution, and at
# any time lies at its start rotated about the axis (-sin alpha, 0, cos alpha).
@pytest.mark.parametrize("alpha", [0.0, np.pi / 2 - 0.05, np.pi / 2])
@pytest.mark.parametrize("backward", [False, True])
def test_solid_body_rotation_returns_after_one_revolution(alpha, backward):
    lat, lon = global_grid(1.0)
    wind = steady_wind(*solid_body_rotation(lat, lon, alpha), lat, lon)
    plat, plon = fibonacci_points(1000)
    hours = REVOLUTION_SECONDS / 3600
    tracks = advect(wind, {"latitude": plat, "longitude": plon}, hours, backward=backward,
                    steady=True)
    assert (tracks["status"].values == 0).all()
    end = haversine(plat, plon, tracks["latitude"].values[:, -1],
                    tracks["longitude"].values[:, -1])
    assert end.max() <= 5 * KM
    half = tracks["obs"].size // 2  # hourly records: half a revolution
    sign = -1.0 if backward else 1.0
    xlat, xlon = rotate(plat, plon, (-np.sin(alpha), 0.0, np.cos(alpha)), sign * np.pi)
    mid = haversine(xlat, xlon, tracks["latitude"].values[:, half],
                    tracks["longitude"].values[:, half])
    assert mid.max() <= 5 * KM


def test_petterssen_scheme_solid_body_rotation_over_the_poles():
    # Williamson et al. (1992) test case 1 with alpha = pi/2; the scheme: Petterssen
    # (1940), Weather Analysis and Forecasting, pp. 221-223 (from memory).
    lat, lon = global_grid(1.0)
    wind = steady_wind(*solid_body_rotation(lat, lon, np.pi / 2), lat, lon)
    plat, plon = fibonacci_points(1000)
    tracks = advect(wind, {"latitude": plat, "longitude": plon},
                    REVOLUTION_SECONDS / 3600, steady=True, scheme="petterssen")
    end = haversine(plat, plon, tracks["latitude"].values[:, -1],
                    tracks["longitude"].values[:, -1])
    assert end.max() <= 5 * KM
    assert tracks.attrs["integration_scheme"].startswith("Petterssen")


def test_solid_body_rotation_over_the_poles_of_a_grid_without_pole_rows():
    # Williamson et al. (1992) test case 1, alpha = pi/2, on a 1-degree grid offset half a
    # spacing from the poles (rows at +-89.5): parcels cross the caps beyond the last rows,
    # where the wind comes from the pole vector closing the grid, and still return.
    lat = np.arange(-89.5, 90.0, 1.0)
    lon = np.arange(0.5, 360.0, 1.0)
    wind = steady_wind(*solid_body_rotation(lat, lon, np.pi / 2), lat, lon)
    plat, plon = fibonacci_points(1000)
    tracks = advect(wind, {"latitude": plat, "longitude": plon},
                    REVOLUTION_SECONDS / 3600, steady=True)
    end = haversine(plat, plon, tracks["latitude"].values[:, -1],
                    tracks["longitude"].values[:, -1])
    assert end.max() <= 5 * KM
    assert np.nanmax(np.abs(tracks["latitude"].values)) > 89.5  # some went past the rows


def deformational_wind(period: float, interval: float, spacing: float = 1.0) -> xr.Dataset:
    lat, lon = global_grid(spacing)
    seconds = np.arange(0.0, period + interval / 2, interval)
    return series_dataset(lat, lon, seconds,
                                 lambda a, b, t: deformational_flow(a, b, t, period))


def test_deformational_flow_returns_at_period():
    # Nair & Lauritzen (2010), "A class of deformational flow test cases for linear
    # transport problems on the sphere", J. Comput. Phys. 229, 8868-8887: the flow
    # reverses so that every parcel is back at its start at t = T. Bound (our choice):
    # return error <= 0.5 % of the mean path length at 1 degree, hourly input.
    period = 12 * DAY
    wind = deformational_wind(period, 3600.0)
    plat, plon = fibonacci_points(1000)
    tracks = advect(wind, {"latitude": plat, "longitude": plon}, period / 3600)
    la, lo = tracks["latitude"].values, tracks["longitude"].values
    path = haversine(la[:, :-1], lo[:, :-1], la[:, 1:], lo[:, 1:]).sum(axis=1)
    error = haversine(plat, plon, la[:, -1], lo[:, -1])
    print(f"deformational flow: max return error {error.max() / KM:.2f} km, mean path "
          f"{path.mean() / KM:.0f} km, ratio {error.max() / path.mean():.2e}")
    assert (tracks["status"].values == 0).all()
    assert error.max() <= 0.005 * path.mean()
    # The parcels did travel: at T/2 they are far from their starts.
    half = la.shape[1] // 2
    assert np.median(haversine(plat, plon, la[:, half], lo[:, half])) > 1000 * KM


def test_backward_then_forward_returns_to_start():
    # Reversibility of the trajectory equation (common practice): 48 h backward, then
    # 48 h forward from the end points, through a smooth time-dependent flow (Nair &
    # Lauritzen 2010 at 6-hourly input), returns within 1 km. Starts from the line, box
    # and ring generators at two start times.
    wind = deformational_wind(12 * DAY, 6 * 3600.0)
    first = pd.concat([
        starts_line((-40.0, 10.0), (50.0, 120.0), 20, times="2000-01-05T00:00"),
        starts_box((-60.0, 60.0), (170.0, 200.0), 5, 4, times=["2000-01-04T00:00",
                                                                "2000-01-05T06:00"]),
        starts_ring((70.0, -30.0), 800.0, 12, times="2000-01-04T12:00"),
    ], ignore_index=True)
    back = advect(wind, first, 48.0, backward=True)
    assert (back["status"].values == 0).all()
    ends = pd.DataFrame({
        "latitude": back["latitude"].values[:, -1],
        "longitude": back["longitude"].values[:, -1],
        "time": [str(t) for t in back["time"].values[:, -1]],
    })
    forth = advect(wind, ends, 48.0)
    error = haversine(first["latitude"], first["longitude"], forth["latitude"].values[:, -1],
                      forth["longitude"].values[:, -1])
    assert error.max() <= 1 * KM
    moved = haversine(first["latitude"], first["longitude"], ends["latitude"], ends["longitude"])
    assert np.median(moved) > 500 * KM
    # Each trajectory runs 48 h back from its own start time (several start times).
    expected = pd.to_datetime(first["time"]).to_numpy() - np.timedelta64(48, "h")
    assert (back["time"].values[:, -1] == expected).all()


def layered_wind(levels, level_type, u, vertical=None, value=0.0, hours=48.0) -> xr.Dataset:
    """A 2-degree global wind on levels: u(level) eastward, constant vertical velocity."""
    lat, lon = global_grid(2.0)
    levels = np.asarray(levels, dtype=float)
    time = np.datetime64("2000-01-01", "ns") + np.array([0, int(hours)]) * np.timedelta64(1, "h")
    shape = (2, levels.size, lat.size, lon.size)
    phi = np.radians(lat)[None, None, :, None]
    u_field = np.broadcast_to(u(levels)[None, :, None, None] * np.cos(phi), shape)
    data = {
        "u": (("time", "level", "latitude", "longitude"), u_field.copy(), {"units": "m s-1"}),
        "v": (("time", "level", "latitude", "longitude"), np.zeros(shape), {"units": "m s-1"}),
    }
    if vertical:
        data[vertical] = (("time", "level", "latitude", "longitude"), np.full(shape, value))
    units = "hPa" if level_type == "pressure" else "m"
    coords = {"time": time, "level": ("level", levels, {"units": units}),
              "latitude": ("latitude", lat, {"units": "degrees_north"}),
              "longitude": ("longitude", lon, {"units": "degrees_east"})}
    return xr.Dataset(data, coords=coords, attrs={"level_type": level_type})


def test_constant_omega_moves_parcels_by_omega_times_time():
    # dp/dt = omega with omega constant has the exact solution p = p0 + omega t (common
    # practice); a parcel that passes the lowest level (largest pressure) stops there
    # with the matching status and has no positions afterwards.
    omega = 0.1  # Pa s-1: sinking
    wind = layered_wind([1000, 850, 700, 500, 300, 200], "pressure", lambda p: 0 * p,
                        "omega", omega)
    tracks = advect(wind, [(10.0, 20.0, 500.0), (-30.0, 100.0, 950.0)], 24.0, vertical="omega")
    p = tracks["air_pressure"].values
    hours = np.arange(p.shape[1])
    np.testing.assert_allclose(p[0], 500.0 + omega * hours * 3600 / 100, rtol=1e-12)
    assert list(tracks["status"].values) == [0, 2]  # completed, reached_lowest_level
    reach = (1000.0 - 950.0) * 100 / omega / 3600  # 13.9 h
    assert np.isfinite(p[1, hours < reach]).all() and np.isnan(p[1, hours > reach]).all()
    assert np.isnan(tracks["latitude"].values[1, hours > reach]).all()
    np.testing.assert_allclose(p[1, hours < reach], 950.0 + omega * hours[hours < reach] * 36,
                               rtol=1e-12)
    meanings = tracks["status"].attrs["flag_meanings"].split()
    assert meanings[2] == "reached_lowest_level"


def test_constant_w_reaches_highest_level():
    # dz/dt = w constant: z = z0 + w t (common practice); the top of the height levels
    # ends the trajectory with status reached_highest_level.
    wind = layered_wind([0, 1000, 3000, 6000, 10000], "height", lambda z: 0 * z, "w", 0.05)
    tracks = advect(wind, [(0.0, 0.0, 9500.0), (45.0, 0.0, 100.0)], 12.0, vertical="w")
    z = tracks["height"].values
    np.testing.assert_allclose(z[1], 100.0 + 0.05 * np.arange(z.shape[1]) * 3600, rtol=1e-12)
    assert list(tracks["status"].values) == [3, 0]
    assert np.isnan(z[0, 3:]).all()  # 500 m at 0.05 m s-1 takes 2.8 h


def test_level_following_winds_are_interpolated_in_log_pressure():
    # Vertical interpolation linear in log-pressure (common practice) reproduces a wind
    # that is itself linear in ln p exactly; the parcel on the equator then moves east
    # at that speed: distance = u(p) t (exact solution for a steady zonal flow).
    def u_of_p(p):
        return 10.0 + 5.0 * np.log(p / 500.0)

    wind = layered_wind([850, 500, 250], "pressure", u_of_p)
    tracks = advect(wind, [(0.0, 0.0, 700.0)], 24.0)
    distance = haversine(0.0, 0.0, 0.0, tracks["longitude"].values[0, -1])
    expected = u_of_p(700.0) * 24 * 3600
    assert abs(distance - expected) <= 2e-4 * expected
    assert (tracks["air_pressure"].values[0] == 700.0).all()


def regional_wind(u: float = 20.0) -> xr.Dataset:
    lat = np.arange(30.0, 60.01, 0.5)
    lon = np.arange(-20.0, 20.01, 0.5)
    time = np.datetime64("2000-01-01", "ns") + np.array([0, 24]) * np.timedelta64(1, "h")
    shape = (2, lat.size, lon.size)
    return xr.Dataset({
        "u": (("time", "latitude", "longitude"), np.full(shape, u), {"units": "m s-1"}),
        "v": (("time", "latitude", "longitude"), np.zeros(shape), {"units": "m s-1"}),
        "ta": (("time", "latitude", "longitude"), np.full(shape, 280.0), {"units": "K"}),
    }, coords={"time": time, "latitude": ("latitude", lat, {"units": "degrees_north"}),
               "longitude": ("longitude", lon, {"units": "degrees_east"})},
        attrs={"level_type": "none"})


def test_limited_area_exit_leaves_positions_missing():
    # Exact path in a uniform eastward wind: along the parallel at d(lon)/dt =
    # u / (a cos(lat)) (common practice). A parcel crossing the eastern edge gets status
    # left_domain, and no position (or sample) after the crossing is invented.
    u = 20.0
    tracks = advect(regional_wind(u), [(45.0, 10.0), (45.0, -15.0)], 24.0, sample=["ta"])
    assert list(tracks["status"].values) == [1, 0]  # left_domain, completed
    hours = np.arange(tracks["obs"].size)
    exact_lon = 10.0 + np.degrees(u * hours * 3600 / (EARTH_RADIUS * np.cos(np.radians(45.0))))
    inside = exact_lon < 20.0 - 0.5  # safely before the crossing
    outside = exact_lon > 20.0
    lon = tracks["longitude"].values[0]
    assert np.all(np.abs(lon[inside] - exact_lon[inside]) < 0.01)
    np.testing.assert_allclose(tracks["latitude"].values[0, inside], 45.0, atol=0.01)
    assert np.isnan(lon[outside]).all() and np.isnan(tracks["latitude"].values[0, outside]).all()
    assert np.isnan(tracks["ta"].values[0, outside]).all()
    np.testing.assert_allclose(tracks["ta"].values[0, inside], 280.0)
    assert np.isfinite(tracks["longitude"].values[1]).all()


def test_sampled_variable_follows_the_parcel():
    # Bilinear interpolation reproduces functions linear in the grid indices exactly
    # (Press et al. 2007, Numerical Recipes 3rd ed., section 3.6): a variable equal to the
    # latitude, sampled along parcels crossing the pole, equals the parcels' latitudes.
    lat, lon = global_grid(2.0)
    wind = steady_wind(*solid_body_rotation(lat, lon, np.pi / 2), lat, lon)
    wind["marker"] = xr.DataArray(np.broadcast_to(lat[:, None], (lat.size, lon.size)).copy()[None],
                                  dims=("time", "latitude", "longitude"), attrs={"units": "1"})
    plat, plon = fibonacci_points(50)
    tracks = advect(wind, {"latitude": np.clip(plat, -70, 70), "longitude": plon}, 72.0,
                    steady=True, sample=["marker"])
    np.testing.assert_allclose(tracks["marker"].values, tracks["latitude"].values, atol=1e-6)
    assert np.nanmax(tracks["latitude"].values) > 80.0  # some parcels went near the pole


def test_only_bracketing_time_slices_are_read():
    # Streaming (README.md, "Methods"; common practice for long series): a 12-hour
    # run in a 10-day hourly series reads just the 13 slices it spans, each once.
    lat, lon = global_grid(5.0)
    read = []

    def winds(a, b, t):
        read.append(t)
        return deformational_flow(a, b, t, 12 * DAY)

    wind = series_dataset(lat, lon, np.arange(241) * 3600.0, winds)
    advect(wind, pd.DataFrame({"latitude": [10.0, -20.0], "longitude": [0.0, 50.0],
                               "time": ["2000-01-02T00:00"] * 2}), 12.0)
    assert sorted(read) == [3600.0 * h for h in range(24, 37)]


def test_start_generators():
    # Great-circle distances by the haversine formula (Sinnott 1984).
    ring = starts_ring((60.0, 10.0), 500.0, 16, level=850.0)
    np.testing.assert_allclose(haversine(60.0, 10.0, ring["latitude"], ring["longitude"]),
                               500 * KM, rtol=1e-9)
    line = starts_line((0.0, 0.0), (0.0, 90.0), 10)
    steps = haversine(line["latitude"][:-1].to_numpy(), line["longitude"][:-1].to_numpy(),
                      line["latitude"][1:].to_numpy(), line["longitude"][1:].to_numpy())
    np.testing.assert_allclose(steps, np.pi / 2 * EARTH_RADIUS / 9, rtol=1e-9)
    box = starts_box((40.0, 50.0), (-10.0, 10.0), 3, 5, times=["2000-01-01", "2000-01-02"])
    assert len(box) == 30 and box["latitude"].min() == 40.0 and box["longitude"].max() == 10.0
    assert (ring["level"] == 850.0).all()


@pytest.mark.parametrize("case, error, words", [
    (dict(starts=[(10.0, 0.0)]), InputError, "starts row 1"),            # outside the domain
    (dict(hours=0.0), UsageError, "--hours"),
    (dict(hours=-3.0), UsageError, "--hours"),
    (dict(step_minutes=25 * 60), UsageError, "input interval"),
    (dict(vertical="omega"), InputError, "vertical velocity"),
    (dict(hours=30.0), InputError, "outside the input times"),
])
def test_bad_requests_are_clear_errors(case, error, words):
    # Bad input is rejected with a message naming what to fix (README.md, "Exit codes").
    args = dict(starts=[(45.0, 0.0)], hours=12.0) | case
    with pytest.raises(error, match=words):
        advect(regional_wind(), args.pop("starts"), args.pop("hours"), **args)


def test_single_time_needs_steady():
    # The contract: one input time is usable only as a frozen (steady) field.
    wind = regional_wind().isel(time=slice(0, 1))
    with pytest.raises(InputError, match="steady"):
        advect(wind, [(45.0, 0.0)], 6.0)
    assert advect(wind, [(45.0, 0.0)], 6.0, steady=True)["status"].values[0] == 0


def test_start_outside_vertical_range_names_the_row():
    # The contract: a start outside the vertical range is an error naming the row.
    wind = layered_wind([850, 500, 250], "pressure", lambda p: 0 * p)
    with pytest.raises(InputError, match=r"starts row 2: level 1000"):
        advect(wind, [(0.0, 0.0, 500.0), (0.0, 0.0, 1000.0)], 6.0)


def test_non_standard_calendar_start_times():
    # CF 1.11 section 4.4.1 (calendars): 30 February exists in the 360_day calendar; a
    # start then at 06:00, followed for 18 h, ends on 1 March 00:00 of that calendar.
    wind = regional_wind()
    wind = wind.assign_coords(time=xr.date_range("2000-02-30", periods=2, freq="24h",
                                                 calendar="360_day", use_cftime=True))
    table = pd.DataFrame({"latitude": [45.0], "longitude": [-15.0],
                          "time": ["2000-02-30T06:00"]})
    tracks = advect(wind, table, 18.0)
    end = tracks["time"].values[0, -1]
    assert (end.calendar, end.month, end.day, end.hour) == ("360_day", 3, 1, 0)
    assert tracks["time"].encoding["calendar"] == "360_day"


def test_missing_wind_stops_the_parcel():
    # README.md ("Output files", status flags): a parcel that needs a missing wind value
    # stops with status met_missing_wind; nothing is invented after that (common
    # practice: missing data are not filled in).
    wind = regional_wind()
    wind["u"] = wind["u"].where(wind["longitude"] < 0.0)  # no wind east of 0 E
    tracks = advect(wind, [(45.0, -5.0), (45.0, -19.0)], 12.0)  # 11 degrees of longitude
    status = tracks["status"]
    assert status.attrs["flag_meanings"].split()[status.values[0]] == "met_missing_wind"
    lon = tracks["longitude"].values[0]
    assert np.nanmax(lon) < 0.0 and np.isnan(lon[-1])
    assert status.values[1] == 0 and np.isfinite(tracks["longitude"].values[1]).all()


@pytest.mark.parametrize("lowest", [1000.0, 850.0])
def test_a_parcel_on_a_level_does_not_feel_a_missing_level_beside_it(lowest):
    # Trajectories are independent of one another (common practice: each parcel solves its
    # own ordinary differential equation). A parcel on the 700 hPa level over terrain where
    # 850 hPa is missing needs no wind from 850 hPa; it must complete whether or not another
    # parcel of the run starts between two levels, or on the lowest level.
    wind = layered_wind([1000, 850, 700, 500], "pressure", lambda p: 5.0 + 0 * p)
    blob = (np.abs(wind["latitude"] - 46.0) < 5) & (np.abs(wind["longitude"] - 10.0) < 8)
    low = wind["level"] >= 850
    for name in ("u", "v"):
        wind[name] = wind[name].where(~(blob & low))
    alpine = (46.0, 10.0, 700.0)
    alone = advect(wind, [alpine], 12.0)
    together = advect(wind, [alpine, (-20.0, 100.0, lowest), (10.0, 150.0, 600.0)], 12.0)
    assert alone["status"].values[0] == 0  # completed
    assert together["status"].values[0] == 0
    for name in ("latitude", "longitude", "air_pressure"):
        np.testing.assert_array_equal(together[name].values[0], alone[name].values[0])


def _cells_by_trigonometry(vectors, lat, lon):
    """Reference cells: latitude and longitude by numpy's arctan2, cells by searchsorted."""
    x, y, z = vectors.T
    phi = np.degrees(np.arctan2(z, np.hypot(x, y)))
    lam = np.mod(np.degrees(np.arctan2(y, x)), 360.0)
    j = np.clip(np.searchsorted(lat, phi, side="right") - 1, 0, lat.size - 2)
    i = (np.searchsorted(lon, lam, side="right") - 1) % lon.size  # before lon[0]: the last
    return phi, lam, j, i


@pytest.mark.parametrize("kind", ["equiangular", "offset", "gaussian"])
def test_global_cell_search_agrees_with_direct_trigonometry(kind):
    # Reference: numpy's arctan2 and searchsorted (a general-purpose library) locate each
    # position; the kernels' table-guided search without trigonometric calls must find
    # the same cell, and its fractions must give back the position's latitude and
    # longitude to rounding, on grids with pole rows, offset grids and Gaussian grids.
    if kind == "equiangular":
        inner, lon = np.linspace(-90.0, 90.0, 181), np.arange(0.0, 360.0, 1.0)
    elif kind == "offset":
        inner, lon = np.arange(-88.75, 89.0, 2.5), np.arange(1.25, 360.0, 2.5)
    else:
        inner, lon = gaussian_latitudes(48), np.arange(0.0, 360.0, 3.75)
    lat = np.unique(np.concatenate([[-90.0], inner, [90.0]]))  # pole rows, as for trajectories
    rng = np.random.default_rng(4)
    grid_points = np.stack(np.meshgrid(lat[1:-1], lon, indexing="ij"), axis=-1).reshape(-1, 2)
    points = np.concatenate([
        np.column_stack([np.degrees(np.arcsin(rng.uniform(-1, 1, 20000))),
                         rng.uniform(0, 360, 20000)]),
        grid_points,  # on grid lines
        [[90.0, 0.0], [-90.0, 0.0], [89.9999, 17.0], [-89.9999, 359.9999]],
    ])
    vectors = unit_vectors(points[:, 0], points[:, 1])
    vectors *= rng.uniform(0.999, 1.001, (len(vectors), 1))  # stage points are not normalised
    m = len(vectors)
    out = [np.empty(m) for _ in range(3)] + [np.empty(m, np.int64) for _ in range(3)] + [
        np.empty(m) for _ in range(2)]
    K._global_cells(m, *[np.ascontiguousarray(vectors[:, c]) for c in range(3)],
                    cell_tables(lat, lon), *out)
    ux, uy, uz, cj, ci, ci1, fy, fx = out
    phi, lam, j, i = _cells_by_trigonometry(vectors, lat, lon)
    assert np.allclose(np.stack([ux, uy, uz], axis=1),
                       vectors / np.linalg.norm(vectors, axis=1, keepdims=True), atol=1e-15)
    assert np.all(ci1 == (ci + 1) % lon.size)
    lat_back = lat[cj] + fy * (lat[cj + 1] - lat[cj])
    assert np.max(np.abs(lat_back - phi)) < 1e-9
    away = np.abs(np.abs(phi) - 90.0) > 1e-6  # longitude is arbitrary at a pole
    step = np.mod(lon[ci1] - lon[ci], 360.0)
    lon_back = np.mod(lon[ci] + fx * step, 360.0)
    gap = np.abs(np.mod(lon_back - lam + 180.0, 360.0) - 180.0)
    assert np.max(gap[away]) < 1e-9
    # The same cell, except within rounding of a grid line (either side is right there).
    inside_row = (fy > 1e-9) & (fy < 1 - 1e-9)
    inside_column = (fx > 1e-9) & (fx < 1 - 1e-9) & away
    assert np.all(cj[inside_row] == j[inside_row])
    assert np.all(ci[inside_column] == i[inside_column])
    assert inside_row.sum() > 19000 and inside_column.sum() > 19000


def test_global_grids_coarser_than_the_series_limit_are_refused():
    # The fractions use a truncated arctangent series exact to rounding for cells of at
    # most MAX_GLOBAL_SPACING degrees (Abramowitz & Stegun 1964, eq. 4.4.42, from
    # memory): coarser global grids get a clear error, not silently worse weights.
    lat, lon = np.arange(-90.0, 90.1, 30.0), np.arange(0.0, 360.0, 30.0)
    u = np.ones((lat.size, lon.size))
    with pytest.raises(InputError, match="too coarse"):
        advect(steady_wind(u, 0 * u, lat, lon), [(0.0, 10.0)], 6.0, steady=True)
