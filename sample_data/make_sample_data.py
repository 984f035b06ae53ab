"""Write flowpipe's bundled sample files (deterministic; run `make sample-data`).

The scenario is invented: during a fictitious winter week, a consultancy on
the equally fictitious island of Skerrowan (near 52 N, 4 E) checks where the
air arriving at its harbour came from, and how an idealised North-Atlantic
storm drew air inward at low levels. Every field is synthetic and written
from closed-form streamfunction and velocity-potential patterns, so the
decomposition of the demo winds is known exactly.

``demo_global.nc``
    2-degree global equiangular grid with pole rows, 850, 500 and 250 hPa,
    nine 6-hourly times (48 hours); ``u``, ``v`` from a zonal jet plus a
    wavenumber-4 Rossby-Haurwitz-type streamfunction travelling east, and a
    divergent part from two low-order velocity-potential patterns (upper-level
    outflow over rising air, low-level inflow); ``omega`` consistent in sign
    with that divergence; ``ta`` a simple temperature.
``demo_regional.nc``
    0.25-degree limited-area grid over the north-east Atlantic, latitudes
    stored north to south and pressure levels in Pa, as many regional models
    write them; a moving cyclone with low-level inflow and upper-level
    outflow in a uniform westerly.
``demo_storm_track.csv``
    the storm's centre of ``demo_regional.nc`` every 12 hours (:func:`storm_centre`,
    the formula :func:`make_regional` uses), for ``flowpipe circulation --follow``.

Values are packed as 16-bit integers with ``scale_factor`` and
``add_offset`` (CF 1.11, section 8.1), which keeps both files small.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import xarray as xr

A = 6.37122e6  # Earth radius (m), Williamson et al. (1992)
HERE = Path(__file__).resolve().parent
TIME_UNITS = "hours since 2026-01-12 00:00:00"


def global_winds(lat_deg, lon_deg, hours, level_hpa):
    """Closed-form winds: psi = zonal jet + RH wave, chi = Y11 + Y32 patterns.

    Returns u, v (m s-1), psi, chi (m2 s-1) and omega (Pa s-1) on (lat, lon).
    """
    phi = np.radians(lat_deg)[:, None]
    lam = np.radians(lon_deg)[None, :]
    fpsi = {850.0: 0.45, 500.0: 0.75, 250.0: 1.0}[level_hpa]
    fchi = {850.0: -0.8, 500.0: 0.15, 250.0: 1.0}[level_hpa]
    fomega = {850.0: 0.5, 500.0: 1.0, 250.0: 0.4}[level_hpa]
    u0, u1 = 5.0 * fpsi, 40.0 * fpsi  # zonal jet: u = u0 cos + u1 sin^2 cos
    k, r = 2.0e-6 * fpsi, 4  # wave: psi = a^2 K cos^R sin cos(R lam')
    d, e = 2.0 * fchi, 1.2 * fchi  # chi = a D cos cos(lam'') + a E cos^2 sin cos(2 lam'')
    lam_w = lam - np.radians(10.0) * hours / 24.0  # wave travels 10 degrees a day east
    lam_c = lam - np.radians(5.0) * hours / 24.0  # divergent pattern: 5 degrees a day
    c, s = np.cos(phi), np.sin(phi)

    psi = -A * u0 * s - A * u1 * s**3 / 3 + A**2 * k * c**r * s * np.cos(r * lam_w)
    chi = A * d * c * np.cos(lam_c) + A * e * c**2 * s * np.cos(2 * lam_c)
    # u = -(1/a) dpsi/dphi + 1/(a cos) dchi/dlam ; v = 1/(a cos) dpsi/dlam + (1/a) dchi/dphi
    u_rot = u0 * c + u1 * s**2 * c - A * k * np.cos(r * lam_w) * c ** (r - 1) * (c**2 - r * s**2)
    v_rot = -A * k * r * c ** (r - 1) * s * np.sin(r * lam_w)
    u_div = -d * np.sin(lam_c) - 2 * e * c * s * np.sin(2 * lam_c)
    v_div = -d * s * np.cos(lam_c) + e * np.cos(2 * lam_c) * c * (c**2 - 2 * s**2)
    omega = 0.1 * fomega * np.sign(fchi) * c * np.cos(lam_c)
    return u_rot + u_div, v_rot + v_div, psi, chi, omega


def _times(hours: np.ndarray) -> np.ndarray:
    return np.datetime64("2026-01-12T00:00:00", "s") + (hours * 3600).astype("timedelta64[s]")


def _file_attrs(title: str) -> dict[str, str]:
    return {"Conventions": "CF-1.11", "title": f"flowpipe demo: {title}",
            "source": "sample_data/make_sample_data.py (closed-form synthetic fields)",
            "comment": "Invented scenario; not real weather."}


def _packed(values: np.ndarray, units: str, **attrs) -> tuple[np.ndarray, dict, dict]:
    lo, hi = float(np.min(values)), float(np.max(values))
    scale = max(hi - lo, 1e-12) / 60000.0
    offset = 0.5 * (hi + lo)
    encoding = {"dtype": "int16", "scale_factor": scale, "add_offset": offset,
                "_FillValue": np.int16(-32767), "zlib": True, "complevel": 9, "shuffle": True}
    return values.astype(np.float32), dict(attrs, units=units), encoding


def _write(ds: xr.Dataset, encodings: dict, path: Path) -> None:
    encodings["time"] = {"units": TIME_UNITS, "calendar": "standard", "dtype": "float64"}
    tmp = path.with_suffix(".tmp")
    ds.to_netcdf(tmp, encoding=encodings, format="NETCDF4")
    tmp.replace(path)


def make_global(path: Path) -> None:
    lat = np.linspace(-90.0, 90.0, 91)
    lon = np.arange(0.0, 360.0, 2.0)
    levels = [850.0, 500.0, 250.0]
    hours = np.arange(0, 49, 6, dtype=float)
    shape = (hours.size, len(levels), lat.size, lon.size)
    u, v, omega = np.empty(shape), np.empty(shape), np.empty(shape)
    for it, h in enumerate(hours):
        for il, p in enumerate(levels):
            u[it, il], v[it, il], _, _, omega[it, il] = global_winds(lat, lon, h, p)
    t0 = np.array([288.0 - 18.0 * np.log(1000.0 / p) * 2.0 for p in levels])  # K
    ta = (t0[None, :, None, None]
          - 35.0 * np.sin(np.radians(lat))[None, None, :, None] ** 2
          + 3.0 * np.cos(np.radians(2 * lon))[None, None, None, :] * np.ones(shape))
    dims = ("time", "plev", "lat", "lon")
    data, enc = {}, {}
    for name, values, units, attrs in (
        ("u", u, "m s-1", {"standard_name": "eastward_wind", "long_name": "eastward wind"}),
        ("v", v, "m s-1", {"standard_name": "northward_wind", "long_name": "northward wind"}),
        ("omega", omega, "Pa s-1", {"standard_name": "lagrangian_tendency_of_air_pressure",
                                    "long_name": "vertical velocity in pressure coordinates"}),
        ("ta", ta, "K", {"standard_name": "air_temperature", "long_name": "air temperature"}),
    ):
        arr, a, e = _packed(values, units, **attrs)
        data[name] = (dims, arr, a)
        enc[name] = e
    ds = xr.Dataset(
        data,
        coords={
            "time": ("time", _times(hours), {"standard_name": "time"}),
            "plev": ("plev", np.array(levels), {"standard_name": "air_pressure", "units": "hPa",
                                                "positive": "down", "axis": "Z"}),
            "lat": ("lat", lat, {"standard_name": "latitude", "units": "degrees_north"}),
            "lon": ("lon", lon, {"standard_name": "longitude", "units": "degrees_east"}),
        },
        attrs=_file_attrs("invented winter week, synthetic global winds"),
    )
    _write(ds, enc, path)


def storm_centre(hours: float) -> tuple[float, float]:
    """Latitude and longitude (degrees) of the regional demo storm's centre."""
    return 50.0 + 0.1 * hours, -20.0 + 0.4 * hours


def make_regional(path: Path) -> None:
    lat = np.arange(65.0, 34.99, -0.25)  # north to south
    lon = np.arange(-30.0, 10.001, 0.25)
    levels_pa = np.array([85000.0, 50000.0])
    hours = np.arange(0, 25, 6, dtype=float)
    phi = np.radians(lat)[:, None]
    lam = np.radians(lon)[None, :]
    shape = (hours.size, levels_pa.size, lat.size, lon.size)
    u, v, ta = np.empty(shape), np.empty(shape), np.empty(shape)
    radius = 400e3  # m, radius of maximum wind
    for it, h in enumerate(hours):
        lat_c, lon_c = np.radians(storm_centre(h))
        x = A * np.cos(lat_c) * (lam - lon_c) * np.ones_like(phi)
        y = A * (phi - lat_c) * np.ones_like(lam)
        rr = np.hypot(x, y) / radius
        shape_r = rr * np.exp(0.5 * (1.0 - rr**2))  # 1 at the radius of maximum wind
        for il, p in enumerate(levels_pa):
            tangential = (25.0 if p > 60000 else 18.0) * shape_r
            radial = (-6.0 if p > 60000 else 4.0) * shape_r  # inflow low, outflow aloft
            with np.errstate(invalid="ignore", divide="ignore"):
                ex, ey = np.where(rr > 0, x / (rr * radius), 0.0), np.where(rr > 0, y / (rr * radius), 0.0)
            u[it, il] = 10.0 - tangential * ey + radial * ex
            v[it, il] = tangential * ex + radial * ey
            ta[it, il] = (280.0 if p > 60000 else 250.0) - 0.6 * (lat[:, None] - 50.0) - 4.0 * np.exp(-rr**2)
    dims = ("time", "pressure", "latitude", "longitude")
    data, enc = {}, {}
    for name, values, units, attrs in (
        ("uwind", u, "m s-1", {"standard_name": "eastward_wind"}),
        ("vwind", v, "m s-1", {"standard_name": "northward_wind"}),
        ("ta", ta, "K", {"standard_name": "air_temperature"}),
    ):
        arr, a, e = _packed(values, units, **attrs)
        data[name] = (dims, arr, a)
        enc[name] = e
    ds = xr.Dataset(
        data,
        coords={
            "time": ("time", _times(hours), {"standard_name": "time"}),
            "pressure": ("pressure", levels_pa, {"standard_name": "air_pressure", "units": "Pa",
                                                 "positive": "down"}),
            "latitude": ("latitude", lat, {"standard_name": "latitude", "units": "degrees_north"}),
            "longitude": ("longitude", lon, {"standard_name": "longitude", "units": "degrees_east"}),
        },
        attrs=_file_attrs("invented North-Atlantic storm, synthetic limited-area winds"),
    )
    _write(ds, enc, path)


def make_track(path: Path) -> None:
    """The storm's centre every 12 hours: CSV ``time,latitude,longitude`` (ISO 8601)."""
    rows = ["time,latitude,longitude"]
    for h in (0.0, 12.0, 24.0):
        lat, lon = storm_centre(h)
        rows.append(f"{str(_times(np.array([h]))[0])[:16]},{lat:.1f},{lon:.1f}")
    tmp = path.with_suffix(".tmp")
    tmp.write_text("\n".join(rows) + "\n", encoding="utf-8")
    tmp.replace(path)


if __name__ == "__main__":
    make_global(HERE / "demo_global.nc")
    make_regional(HERE / "demo_regional.nc")
    make_track(HERE / "demo_storm_track.csv")
    for name in ("demo_global.nc", "demo_regional.nc"):
        print(f"{name}: {(HERE / name).stat().st_size / 1e6:.2f} MB")
