"""FTLE checks against published analytic flows."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
import xarray as xr

import flowpipe as fp
from flowpipe.ftle import ftle

A = 6.371e6  # Earth radius of flowpipe.constants (m)


def _write(path, lat, lon, u_fn, hours):
    times = pd.date_range("2031-05-01", periods=hours + 1, freq="h")
    la, lo = np.meshgrid(lat, lon, indexing="ij")
    u = np.empty((times.size, lat.size, lon.size))
    v = np.empty_like(u)
    for k in range(times.size):
        u[k], v[k] = u_fn(la, lo, 3600.0 * k)
    ds = xr.Dataset(
        {"u": (("time", "latitude", "longitude"), u, {"units": "m s-1",
                                                     "standard_name": "eastward_wind"}),
         "v": (("time", "latitude", "longitude"), v, {"units": "m s-1",
                                                     "standard_name": "northward_wind"})},
        coords={"time": times,
                "latitude": ("latitude", lat, {"units": "degrees_north",
                                               "standard_name": "latitude"}),
                "longitude": ("longitude", lon, {"units": "degrees_east",
                                                 "standard_name": "longitude"})},
        attrs={"Conventions": "CF-1.11"})
    ds.to_netcdf(path)
    return path


S = 2e-5  # strain rate (s-1)


def _strain(la, lo, t):
    return S * A * np.radians(lo), -S * A * np.radians(la)


@pytest.fixture(scope="module")
def strain_file(tmp_path_factory):
    lat = np.linspace(-2.0, 2.0, 81)
    lon = np.linspace(-2.0, 2.0, 81)
    return _write(tmp_path_factory.mktemp("ftle") / "strain.nc", lat, lon, _strain, 24)


@pytest.mark.parametrize("backward", [False, True])
def test_linear_strain_exponent_is_strain_rate(strain_file, backward):
    # The exponent of a linear hyperbolic flow u = s x, v = -s y is s
    # (Shadden, Lekien & Marsden 2005, Physica D 212, section 2).
    wind = fp.open_wind(strain_file)
    out = ftle(wind, hours=12, backward=backward, spacing=0.05, region=(-0.3, 0.3, -0.3, 0.3))
    value = out["ftle"].isel(time=0).values
    assert np.all(np.isfinite(value))
    assert np.max(np.abs(value / S - 1.0)) <= 0.01
    assert out["ftle"].attrs["units"] == "s-1"


def _rossby_haurwitz(la, lo, t):
    from reference_winds import case6

    wind = case6(np.radians(la), np.radians(lo))
    return wind["u"], wind["v"]


def test_convergence_when_spacing_halves(tmp_path):
    # The Rossby-Haurwitz wave of Williamson et al. (1992), J. Comput. Phys. 102,
    # 211-224, test case 6 (R = 4, omega = K = 7.848e-6 s-1), held steady: a smooth
    # non-linear flow. Halving the seed spacing from 0.5 to 0.25 degrees changes the
    # 48 h exponent by less than 1 % of its largest value at every common seed away
    # from the region's edge (where the differences are one-sided); central
    # differences converge at second order (common practice), so the coarser pair
    # differs more: the check is not met by a spacing-blind field. The wind is
    # sampled on a 0.5 degree grid, so that its bilinear interpolation is smooth on
    # the scale of the finest seed spacing.
    lat, lon = np.linspace(-90, 90, 361), np.arange(0, 360, 0.5)
    wind = fp.open_wind(_write(tmp_path / "rh.nc", lat, lon, _rossby_haurwitz, 0))
    kw = dict(hours=48, steady=True, region=(20, 60, 0, 45))
    fields = {sp: ftle(wind, spacing=sp, **kw)["ftle"].isel(time=0) for sp in (1.0, 0.5, 0.25)}
    inner = fields[1.0].isel(latitude=slice(1, -1), longitude=slice(1, -1))

    def change(a, b):
        at = dict(latitude=inner.latitude, longitude=inner.longitude, method="nearest")
        coarse, fine = fields[a].sel(**at).values, fields[b].sel(**at).values
        np.testing.assert_allclose(fields[b].sel(**at).latitude, inner.latitude)
        return float(np.max(np.abs(fine - coarse)) / np.max(np.abs(coarse)))

    assert float(inner.max()) > 5e-6  # a real stretching field, not a near-zero one
    assert change(0.5, 0.25) < 0.01
    assert change(0.5, 0.25) < 0.5 * change(1.0, 0.5)


OMEGA = 2 * np.pi / (12 * 86400.0)  # Williamson et al. (1992) case 1: one turn in 12 days
ALPHA = np.pi / 2 - 0.05


def _solid_body(la, lo, t):
    phi, lam = np.radians(la), np.radians(lo)
    u0 = OMEGA * A
    u = u0 * (np.cos(phi) * np.cos(ALPHA) + np.sin(phi) * np.cos(lam) * np.sin(ALPHA))
    v = -u0 * np.sin(lam) * np.sin(ALPHA)
    return u, v


@pytest.fixture(scope="module")
def rotation_file(tmp_path_factory):
    lat = np.linspace(-90, 90, 91)
    lon = np.arange(0, 360, 2.0)
    return _write(tmp_path_factory.mktemp("ftle") / "rot.nc", lat, lon, _solid_body, 48)


def test_solid_body_rotation_stretches_nothing(rotation_file):
    # Williamson et al. (1992), J. Comput. Phys. 102, 211-224, test case 1:
    # a rotation is an isometry, so the exponent vanishes.
    # Everywhere, the seeds next to the poles included.
    out = ftle(fp.open_wind(rotation_file), hours=48, spacing=4.0)
    value = out["ftle"].values
    assert np.abs(out["latitude"]).max() >= 86.0
    assert np.all(np.isfinite(value))
    assert np.max(np.abs(value)) <= 1e-3 * OMEGA


def test_map_of_a_rotations_ftle_is_zero_to_rounding(rotation_file, tmp_path):
    # A rotation stretches nothing (Williamson et al. 1992, test case 1: an isometry), so
    # its exponents are noise; lambda = ln(stretch) / T puts their scale at 1 / T, and the
    # map draws no colours where every |lambda| T is below maps.FTLE_STRETCH, saying so.
    from flowpipe import maps

    out = ftle(fp.open_wind(rotation_file), hours=24, spacing=4.0)
    assert float(np.abs(out["ftle"]).max()) > 0  # noise that would be coloured
    ax = maps.render(fp.write(out, tmp_path / "rot.nc"), field="ftle", size=(640, 360)).axes[0]
    assert "zero to rounding" in ax.get_title(loc="left") and "24 h" in ax.get_title(loc="left")
    assert not [c for c in ax.collections if getattr(c, "colorbar", None) is not None]


def _zonal_rotation(la, lo, t):
    # Williamson et al. (1992) test case 1 with alpha = 0: rotation about the polar axis.
    return OMEGA * A * np.cos(np.radians(la)), 0.0 * la


@pytest.mark.parametrize("case", ["global", "band"])
def test_no_seam_at_the_longitude_wrap(rotation_file, tmp_path, case):
    # Williamson et al. (1992) test case 1 again: the exponent vanishes at every seed,
    # the columns next to 0/360 degrees included, on a ring of seeds that closes
    # (360 / 7 is no whole number: the ring's spacing is adjusted) on a global grid
    # seeded -180..180, and on a band (all longitudes, latitudes -60..60) by default.
    if case == "global":
        wind = fp.open_wind(rotation_file)
        out = ftle(wind, hours=48, spacing=7.0, region=(-80, 80, -180, 180))
    else:
        lat, lon = np.linspace(-60, 60, 61), np.arange(1.0, 360, 2.0)
        wind = fp.open_wind(_write(tmp_path / "band.nc", lat, lon, _zonal_rotation, 48))
        out = ftle(wind, hours=48, spacing=4.0, region=(-50, 50, 0, 360))
    lon = out["longitude"].values
    steps = np.diff(np.append(lon, lon[0] + 360.0))
    assert np.all(steps > 0) and 0 <= lon[0] and lon[-1] < 360
    np.testing.assert_allclose(steps, steps[0], rtol=1e-12)  # the ring closes evenly
    value = out["ftle"].isel(time=0).values
    assert np.all(np.isfinite(value))
    seam = value[:, [0, 1, -2, -1]]
    assert np.max(np.abs(seam)) <= 1e-3 * OMEGA
    assert np.max(np.abs(value)) <= 1e-3 * OMEGA


def test_region_across_the_prime_meridian(rotation_file, tmp_path):
    # --region W=-20, E=20 on a 0..358 grid: ascending longitudes, continuous across 0
    # (CF 1.11 section 4.2: longitude coordinates in degrees_east; compliance-checker,
    # suite cf:1.11, finds no high or medium problem), the same seeds as W=340, E=20,
    # and a vanishing exponent of Williamson et al. (1992) case 1 on both sides of 0.
    from test_compliance import check

    path = tmp_path / "across.nc"
    proc = subprocess.run([sys.executable, "-m", "flowpipe", "ftle", str(rotation_file), "-o",
                           str(path), "--hours", "12", "--spacing", "4", "--region",
                           "-30,30,-20,20"], capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    with xr.open_dataset(path) as ds:
        lon = ds["longitude"].values
        np.testing.assert_allclose(lon, np.arange(-20.0, 20.1, 4.0), atol=1e-9)
        assert np.max(np.abs(ds["ftle"].values)) <= 1e-3 * OMEGA
    other = ftle(fp.open_wind(rotation_file), hours=12, spacing=4.0, region=(-30, 30, 340, 20))
    np.testing.assert_allclose(other["longitude"].values, lon, atol=1e-9)
    result = check(path, ("cf:1.11",))["cf:1.11"]
    assert result["high_count"] == 0 and result["medium_count"] == 0


@pytest.mark.parametrize("args", [
    ["--region", "40,50,10,20"], ["--spacing", "0"], ["--spacing", "-1"], ["--hours", "0"]])
def test_bad_input_exits_2_with_one_line(strain_file, tmp_path, args):
    base = ["--hours", "6"] if "--hours" not in args else []
    proc = subprocess.run([sys.executable, "-m", "flowpipe", "ftle", str(strain_file), "-o",
                           str(tmp_path / "o.nc"), *base, *args], capture_output=True, text=True)
    assert proc.returncode == 2
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("flowpipe: error:")


# Double gyre of Shadden, Lekien & Marsden (2005), Physica D 212, section 4.1:
# psi = A sin(pi f(x, t)) sin(pi y), f = eps sin(w t) x^2 + (1 - 2 eps sin(w t)) x on
# 0 <= x <= 2, 0 <= y <= 1, with A = 0.1, eps = 0.25, w = 2 pi / 10 (*from memory*).
# Scaled to an equatorial box: one length unit = one degree (of longitude and of
# latitude; cos(latitude) > 0.9998 in the box), one time unit = 2.4 h, so the forcing
# period 10 is 24 h and the velocity unit is (A * 1 degree in radians) / 8640 s.
GYRE_L = A * np.radians(1.0)  # m per length unit
GYRE_TAU = 8640.0  # s per time unit
GYRE_PERIOD_HOURS = 24.0


def _double_gyre(la, lo, t):
    x, y, s = lo, la, 0.25 * np.sin(2 * np.pi / 10 * t / GYRE_TAU)
    f = s * x**2 + (1 - 2 * s) * x
    dfdx = 2 * s * x + 1 - 2 * s
    scale = GYRE_L / GYRE_TAU  # m s-1 per velocity unit
    u = -np.pi * 0.1 * np.sin(np.pi * f) * np.cos(np.pi * y)
    v = np.pi * 0.1 * np.cos(np.pi * f) * np.sin(np.pi * y) * dfdx
    return scale * u, scale * v


def test_double_gyre_ridge_oscillates_with_the_forcing(tmp_path):
    # The forward-FTLE ridge between the gyres moves to both sides of the midline
    # x = 1 over one forcing period and is back after one period (Shadden, Lekien &
    # Marsden 2005, section 4.1, figures of the time-dependent double gyre).
    lat = np.linspace(0.0, 1.0, 21)
    lon = np.linspace(0.0, 2.0, 41)
    hours, step = 15 * GYRE_TAU / 3600, 3.0  # T = 15 time units, as in that section
    total = int(np.ceil(hours + GYRE_PERIOD_HOURS + step))
    path = _write(tmp_path / "gyre.nc", lat, lon, _double_gyre, total)
    out = ftle(fp.open_wind(path), hours=hours, spacing=0.02, every=step)
    row = out["ftle"].sel(latitude=0.5, method="nearest").sel(longitude=slice(0.6, 1.4))
    ridge = row["longitude"].values[np.nanargmax(row.values, axis=1)]
    per = int(round(GYRE_PERIOD_HOURS / step))
    assert out.sizes["time"] > per
    cycle = ridge[:per]
    assert cycle.min() < 1.0 - 0.03 and cycle.max() > 1.0 + 0.03, ridge
    np.testing.assert_allclose(ridge[per], ridge[0], atol=0.021)


def _bar_and_title(fig):
    from test_maps import _colour_bar

    fig.canvas.draw()
    bar = _colour_bar(fig)
    title = "".join(ax.get_title(loc="left") for ax in fig.axes)
    return bar, title


def test_map_of_ftle_is_sequential_from_zero(strain_file, tmp_path):
    # An area-preserving flow has det F = 1, so lambda_max >= 1 and FTLE >= 0 (Shadden,
    # Lekien & Marsden 2005, section 2); a growth rate >= 0 gets a perceptually uniform
    # sequential matplotlib colour map (matplotlib documentation, "Choosing Colormaps":
    # viridis family) whose colour-bar lower limit is zero. The title names the
    # direction and the hours; the multiplier of the values sits in the label as
    # "(10^-5 s-1)" (common practice for rates of order 1e-5 s-1), with the tick labels
    # the values divided by it (matplotlib ScalarFormatter, fixed order of magnitude).
    from test_maps import SEQUENTIAL

    from flowpipe import maps

    out = ftle(fp.open_wind(strain_file), hours=6, spacing=0.1, region=(-0.3, 0.3, -0.3, 0.3))
    assert float(out["ftle"].min()) > 0
    path = fp.write(out, tmp_path / "ftle.nc")
    bar, title = _bar_and_title(maps.render(path, field="ftle", size=(640, 360)))
    assert bar.cmap.name in SEQUENTIAL
    assert bar.vmin == 0.0
    assert bar.vmax >= float(out["ftle"].max())
    assert title.startswith("Forward finite-time Lyapunov exponent over 6 h")
    power = int(np.floor(np.log10(bar.vmax)))
    assert power < -3 and f"(10$^{{{power}}}$ s$^{{-1}}$)" in bar.ax.get_ylabel()
    assert not bar.ax.yaxis.offsetText.get_visible()
    for tick in bar.ax.get_yticklabels():
        if tick.get_text() and bar.vmin <= tick.get_position()[1] <= bar.vmax:
            shown = float(tick.get_text().replace("\u2212", "-"))
            assert shown * 10.0**power == pytest.approx(tick.get_position()[1], rel=1e-6,
                                                         abs=1e-12)


C = 1e-5  # convergence rate (s-1)


def _convergence(la, lo, t):
    return -C * A * np.radians(lo), -C * A * np.radians(la)


def test_map_of_negative_ftle_is_diverging(tmp_path):
    # Uniform convergence u = -c x, v = -c y compresses in every direction: the forward
    # exponent is -c (the linear-flow case of Shadden, Lekien & Marsden 2005, section 2).
    # Negative values need a diverging colour map centred on zero (matplotlib
    # documentation, "Choosing Colormaps": diverging for data about a critical value).
    from test_maps import DIVERGING

    from flowpipe import maps

    lat = lon = np.linspace(-2.0, 2.0, 41)
    wind = fp.open_wind(_write(tmp_path / "conv.nc", lat, lon, _convergence, 6))
    out = ftle(wind, hours=6, spacing=0.1, region=(-0.5, 0.5, -0.5, 0.5))
    np.testing.assert_allclose(out["ftle"].values, -C, rtol=0.01)
    path = fp.write(out, tmp_path / "ftle.nc")
    bar, title = _bar_and_title(maps.render(path, field="ftle", size=(640, 360)))
    assert bar.cmap.name in DIVERGING
    assert bar.vmin == pytest.approx(-bar.vmax) and bar.vmin <= float(out["ftle"].min())
    assert title.startswith("Forward finite-time Lyapunov exponent over 6 h")
    back = ftle(wind, hours=3, backward=True, spacing=0.1, region=(-0.5, 0.5, -0.5, 0.5),
                start="2031-05-01T06:00")
    bar, title = _bar_and_title(maps.render(fp.write(back, tmp_path / "back.nc"), field="ftle"))
    assert title.startswith("Backward finite-time Lyapunov exponent over 3 h")
    assert bar.vmin == 0.0  # backward, the same flow stretches: +c


def test_batch_config_ftle_table(tmp_path):
    # A [ftle] table in a batch config writes {stem}_ftle.nc with the same field as
    # the library call (netCDF-C, through xarray, reads it back) and, with a [maps]
    # table, a map of it per seeded level ({stem}_ftle_{level}.png: a PNG of the
    # requested size, read back by matplotlib's image reader, not blank); bad values
    # are a config error naming the key.
    import shutil
    from pathlib import Path

    import matplotlib.image

    from flowpipe.config import ConfigError
    from flowpipe.pipeline import run

    demo = Path(__file__).resolve().parents[1] / "sample_data" / "demo_global.nc"
    shutil.copy(demo, tmp_path / "demo.nc")
    config = tmp_path / "night.toml"
    config.write_text('[input]\npaths = ["demo.nc"]\n\n[ftle]\nhours = 6\nspacing = 6.0\n'
                      'region = [-30.0, 30.0, 0.0, 90.0]\nlevels = [850.0, 500.0]\n\n'
                      '[maps]\n\n[output]\ndirectory = "out"\n')
    summary = run(config, quiet=True)
    assert summary.exit_code == 0, summary.failures
    written = tmp_path / "out" / "demo_ftle.nc"
    expected = ftle(fp.open_wind(demo), hours=6, spacing=6.0, region=(-30.0, 30.0, 0.0, 90.0),
                    levels=[850.0, 500.0])
    with xr.open_dataset(written) as ds:
        np.testing.assert_allclose(ds["ftle"].values, expected["ftle"].values, rtol=1e-12)
    for level in ("850", "500"):
        picture = tmp_path / "out" / f"demo_ftle_{level}.png"
        assert picture in summary.written
        image = matplotlib.image.imread(picture)
        assert image.shape[:2] == (800, 1200) and image[..., :3].std() > 0.05
    config.write_text(config.read_text().replace("spacing = 6.0", "spacing = -1"))
    with pytest.raises(ConfigError, match="spacing"):
        run(config, quiet=True)


def test_run_and_lead_of_a_forecast(tmp_path):
    # --run/--lead on a runs x leads archive (the layouts of tests/test_forecast.py):
    # the field equals the one from a plain file holding only the selected valid times,
    # and the output carries the run and the lead at the start time (CF standard-name
    # table: forecast_period = validity time - forecast_reference_time), read back by
    # netCDF-C through xarray.
    from test_forecast import LEADS, RUNS, archive_layout, valid_time_layout

    archive = tmp_path / "archive.nc"
    archive_layout([0, 1, 2]).to_netcdf(archive)
    plain = tmp_path / "plain.nc"
    valid_time_layout(1).isel(time=[1, 2, 3]).drop_vars(
        ["forecast_reference_time", "forecast_period"]).to_netcdf(plain)
    from flowpipe.cli import main

    out = tmp_path / "ftle.nc"
    assert main(["ftle", str(archive), "-o", str(out), "--hours", "12", "--spacing", "7.5",
                 "--run", "2026-12-01T12Z", "--lead", "6,12,18"]) == 0
    expected = ftle(fp.open_wind(plain), hours=12, spacing=7.5)
    with xr.open_dataset(out) as ds:
        np.testing.assert_allclose(ds["ftle"].values, expected["ftle"].values, rtol=1e-12)
        assert ds["time"].values[0] == RUNS[1] + LEADS[1]
        assert ds["forecast_reference_time"].values == RUNS[1]
        assert ds["forecast_reference_time"].attrs["standard_name"] == "forecast_reference_time"
        assert ds["forecast_period"].attrs["standard_name"] == "forecast_period"
        np.testing.assert_array_equal(ds["time"].values,
                                      ds["forecast_reference_time"].values
                                      + ds["forecast_period"].values)
        assert "forecast_reference_time" in ds.coords and "forecast_period" in ds.coords
    assert main(["ftle", str(archive), "-o", str(tmp_path / "x.nc"), "--hours", "12",
                 "--run", "2026-12-05T00Z"]) == 2
    assert not (tmp_path / "x.nc").exists()
