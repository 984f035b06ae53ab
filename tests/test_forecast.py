"""Forecast files: runs (cycles) and lead times in the three common layouts.

External checks:
* the CF standard-name table (v93, shipped with compliance-checker) and CF 1.11
  section 4.4: ``forecast_reference_time`` is the time of the analysis from which
  the forecast was made, ``forecast_period`` the interval between it and the
  validity time, so valid time = reference time + period;
* compliance-checker (IOOS), suite ``cf:1.11``, on an output with both coordinates;
* the same decomposition computed from a plain file of the same slab (no forecast
  coordinates at all), as the reference the three layouts must reproduce.

The data are invented: a smooth wind that changes with the run and the lead.
"""

from __future__ import annotations

import json
import subprocess
import sys
import xml.etree.ElementTree as ET
from pathlib import Path

import compliance_checker
import numpy as np
import pytest
import xarray as xr

import flowpipe as fp
from flowpipe.errors import InputError

RUNS = np.array(["2026-12-01T00", "2026-12-01T12", "2026-12-02T00", "2026-12-02T12"],
                "datetime64[ns]")
LEAD_HOURS = np.array([0, 6, 12, 18, 24])
LEADS = (LEAD_HOURS * np.timedelta64(3600, "s")).astype("timedelta64[ns]")
LAT = np.linspace(-90.0, 90.0, 25)
LON = np.arange(0.0, 360.0, 7.5)
WIND_ATTRS = {"u": {"units": "m s-1", "standard_name": "eastward_wind"},
              "v": {"units": "m s-1", "standard_name": "northward_wind"}}


def slab(run: int, hours: float) -> tuple[np.ndarray, np.ndarray]:
    """The invented wind of run ``run`` at lead ``hours``."""
    phi, lam = np.radians(LAT)[:, None], np.radians(LON)[None, :]
    u = 12 * np.cos(phi) + 4 * np.sin(lam + 0.05 * hours + 0.7 * run) * np.cos(phi) ** 2
    v = 3 * np.cos(2 * lam - 0.03 * hours + 0.2 * run) * np.cos(phi)
    return u, v


def _grid() -> dict:
    return {"latitude": ("latitude", LAT, {"units": "degrees_north"}),
            "longitude": ("longitude", LON, {"units": "degrees_east"})}


def _winds(dims: tuple[str, ...], runs: list[int]) -> dict:
    u = np.array([[slab(r, h)[0] for h in LEAD_HOURS] for r in runs])
    v = np.array([[slab(r, h)[1] for h in LEAD_HOURS] for r in runs])
    if "reference_time" not in dims:
        u, v = u[0], v[0]
    return {"u": (dims, u, WIND_ATTRS["u"]), "v": (dims, v, WIND_ATTRS["v"])}


def valid_time_layout(run: int) -> xr.Dataset:
    """Layout 1: valid time the dimension, the lead along it, the run a scalar."""
    return xr.Dataset(_winds(("time", "latitude", "longitude"), [run]), coords={
        "time": ("time", RUNS[run] + LEADS, {"standard_name": "time"}),
        "forecast_period": ("time", LEADS, {"standard_name": "forecast_period"}),
        "forecast_reference_time": ((), RUNS[run], {"standard_name": "forecast_reference_time"}),
        **_grid()})


def lead_layout(run: int) -> xr.Dataset:
    """Layout 2: the lead the dimension (numbers in hours), the valid time along it."""
    return xr.Dataset(_winds(("forecast_period", "latitude", "longitude"), [run]), coords={
        "forecast_period": ("forecast_period", LEAD_HOURS.astype(float),
                            {"standard_name": "forecast_period", "units": "hours"}),
        "time": ("forecast_period", RUNS[run] + LEADS, {"standard_name": "time"}),
        "forecast_reference_time": ((), RUNS[run], {"standard_name": "forecast_reference_time"}),
        **_grid()})


def archive_layout(runs: list[int]) -> xr.Dataset:
    """Layout 3: runs x leads, the valid time 2-D, under other names than the canonical."""
    valid = RUNS[runs][:, None] + LEADS[None, :]
    return xr.Dataset(_winds(("reference_time", "step", "latitude", "longitude"), runs), coords={
        "reference_time": ("reference_time", RUNS[runs],
                           {"standard_name": "forecast_reference_time"}),
        "step": ("step", LEADS, {"standard_name": "forecast_period"}),
        "valid_time": (("reference_time", "step"), valid, {"standard_name": "time"}),
        **_grid()})


@pytest.fixture(scope="module")
def files(tmp_path_factory) -> dict[str, Path]:
    directory = tmp_path_factory.mktemp("forecast")
    found = {"valid": valid_time_layout(1), "lead": lead_layout(1),
             "archive": archive_layout([0, 1, 2])}
    u, v = slab(1, 12.0)  # the reference: run 1 + 12 h as a plain analysis file
    found["plain"] = xr.Dataset(
        {"u": (("time", "latitude", "longitude"), u[None], WIND_ATTRS["u"]),
         "v": (("time", "latitude", "longitude"), v[None], WIND_ATTRS["v"])},
        coords={"time": ("time", [RUNS[1] + LEADS[2]]), **_grid()})
    paths = {}
    for name, ds in found.items():
        paths[name] = directory / f"{name}.nc"
        ds.to_netcdf(paths[name])
    return paths


def test_valid_time_is_reference_plus_period(files):
    # CF standard-name table: forecast_period = validity time - forecast_reference_time.
    for name, run in (("valid", None), ("lead", None), ("archive", "2026-12-01T12Z")):
        wind = fp.open_wind(files[name], run=run)
        assert wind["time"].dims == ("time",)
        assert wind["forecast_reference_time"].ndim == 0  # one run: a scalar coordinate
        assert wind["forecast_reference_time"].attrs["standard_name"] == "forecast_reference_time"
        assert wind["forecast_period"].attrs["standard_name"] == "forecast_period"
        assert wind["forecast_period"].dtype.kind == "m"
        np.testing.assert_array_equal(
            wind["time"].values, wind["forecast_reference_time"].values
            + wind["forecast_period"].values)
        assert wind["forecast_reference_time"].values == RUNS[1]


def test_three_layouts_give_the_same_decomposition(files):
    # Reference: the same slab in a plain file with no forecast coordinates.
    valid = RUNS[1] + LEADS[2]
    reference = fp.decompose(fp.open_wind(files["plain"])).sel(time=valid)
    for name, run in (("valid", None), ("lead", None), ("archive", "2026-12-01T12")):
        parts = fp.decompose(fp.open_wind(files[name], run=run)).sel(time=valid)
        assert float(parts["forecast_period"] / np.timedelta64(1, "h")) == 12.0
        for var in ("streamfunction", "velocity_potential", "vorticity", "divergence"):
            np.testing.assert_allclose(parts[var].values, reference[var].values,
                                       rtol=1e-12, atol=1e-12 * float(abs(reference[var]).max()))


def test_lead_selection_by_hours(files):
    wind = fp.open_wind(files["lead"], leads=[6, 24])
    np.testing.assert_array_equal(wind["forecast_period"].values / np.timedelta64(1, "h"),
                                  [6.0, 24.0])
    np.testing.assert_array_equal(wind["time"].values, RUNS[1] + LEADS[[1, 4]])
    u, _ = slab(1, 24.0)  # the slab of lead 24 h, as written
    np.testing.assert_allclose(wind["u"].isel(time=1).values, u)
    with pytest.raises(InputError, match="lead.* 30 h not in the input; leads present: "
                                         "0, 6, 12, 18, 24 h"):
        fp.open_wind(files["lead"], leads=[6, 30])


def test_runs_that_overlap_are_refused_without_a_choice(files):
    # Run 0 + 12 h and run 1 + 0 h are the same valid time: one run must be chosen.
    with pytest.raises(InputError, match="3 forecast runs whose valid times overlap.*--run"):
        fp.open_wind(files["archive"])
    latest = fp.open_wind(files["archive"], run="latest")
    assert latest["forecast_reference_time"].values == RUNS[2]
    with pytest.raises(InputError, match="runs present: 2026-12-01T00Z, 2026-12-01T12Z, "
                                         "2026-12-02T00Z"):
        fp.open_wind(files["archive"], run="2026-12-05T00Z")


def test_inspect_lists_runs_and_leads(files):
    out = subprocess.run([sys.executable, "-m", "flowpipe", "inspect", "--json",
                          str(files["archive"])], capture_output=True, text=True, check=True)
    report = json.loads(out.stdout)
    assert report["runs"] == ["2026-12-01T00Z", "2026-12-01T12Z", "2026-12-02T00Z"]
    assert report["leads"] == [0.0, 6.0, 12.0, 18.0, 24.0]
    assert report["times"] == 5 and report["run"] == "2026-12-02T00Z"
    text = subprocess.run([sys.executable, "-m", "flowpipe", "inspect", str(files["lead"])],
                          capture_output=True, text=True, check=True).stdout
    assert "1 run 2026-12-01T12Z; leads 0, 6, 12, 18, 24 h" in text


def _standard_name_units() -> dict[str, str]:
    table = Path(compliance_checker.__file__).parent / "data" / "cf-standard-name-table.xml"
    return {entry.get("id"): entry.findtext("canonical_units")
            for entry in ET.parse(table).getroot().iter("entry")}


def test_output_with_forecast_coordinates_is_cf_compliant(files, tmp_path):
    from test_compliance import check  # compliance-checker, run as for the other outputs

    parts = fp.decompose(fp.open_wind(files["archive"], run="2026-12-01T12Z", leads=[6, 12]))
    path = fp.write(parts, tmp_path / "parts.nc")
    result = check(path, ("cf:1.11",))["cf:1.11"]
    assert result["high_count"] == 0 and result["medium_count"] == 0
    with xr.open_dataset(path) as back:
        assert "forecast_reference_time" in back.coords and "forecast_period" in back.coords
        assert back.attrs["time_coverage_start"] == "2026-12-01T18:00:00Z"  # valid, not run
        assert back.attrs["time_coverage_end"] == "2026-12-02T00:00:00Z"
        np.testing.assert_array_equal(back["forecast_period"].values / np.timedelta64(1, "h"),
                                      [6.0, 12.0])
    # the standard-name table's canonical units: forecast_period "s", reference time "s"
    # (as "time since epoch"); the file's units must be convertible to them (UDUNITS).
    import cf_units
    import netCDF4

    units = _standard_name_units()
    with netCDF4.Dataset(path) as nc:
        for name in ("forecast_period", "forecast_reference_time"):
            assert nc[name].standard_name == name
            assert cf_units.Unit(nc[name].units.split(" since ")[0]).is_convertible(
                units[name])


def _flowpipe(*args: str, cwd: Path | None = None) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "flowpipe", *args], capture_output=True,
                          text=True, check=False, cwd=cwd)


def test_cli_run_and_lead(files, tmp_path):
    out = tmp_path / "parts.nc"
    done = _flowpipe("decompose", str(files["archive"]), "--run", "2026-12-01T12Z", "--lead",
                     "0,24", "-o", str(out))
    assert done.returncode == 0, done.stderr
    with xr.open_dataset(out) as back:
        np.testing.assert_array_equal(back["time"].values, RUNS[1] + LEADS[[0, 4]])
        assert back["forecast_reference_time"].values == RUNS[1]
    bad = _flowpipe("decompose", str(files["archive"]), "--run", "2026-12-05T00Z", "-o",
                    str(tmp_path / "x.nc"))
    assert bad.returncode == 2 and "Traceback" not in bad.stderr
    assert bad.stderr.startswith("flowpipe: error:") and "runs present" in bad.stderr
    assert not (tmp_path / "x.nc").exists()
    wrong = _flowpipe("advect", str(files["archive"]), "--lead", "six", "--start", "10,20",
                      "--hours", "6", "-o", str(tmp_path / "t.nc"))
    assert wrong.returncode == 2 and "lead times in hours" in wrong.stderr


def test_config_run_and_leads_are_validated(files, tmp_path):
    from flowpipe.config import ConfigError, load_config

    config = tmp_path / "forecast.toml"
    base = f'[input]\npaths = ["{files["archive"]}"]\n'
    config.write_text(base + 'run = "latest"\nleads = [0, 12]\n[output]\ndirectory = "out"\n')
    section = load_config(config).section("input")
    assert section["run"] == "latest" and section["leads"] == [0, 12]
    for line, message in (('run = "tomorrow"', r"line 3: \[input\] run must be \"latest\" or"),
                          ("leads = [-6]", r"line 3: each item of \[input\] leads must be"),
                          ("leads = []", r"\[input\] leads must hold at least one")):
        config.write_text(base + line + '\n[output]\ndirectory = "out"\n')
        with pytest.raises(ConfigError, match=message):
            load_config(config)


def test_map_title_names_run_and_lead(files, tmp_path):
    # The title words of a forecast map: "run 2026-12-01T12Z +24 h, valid 2026-12-02T12:00Z"
    # (ISO 8601 times; the lead as the difference of the two, CF standard-name table).
    from flowpipe.maps import render

    parts = fp.write(fp.decompose(fp.open_wind(files["lead"])), tmp_path / "parts.nc")
    figure = render(parts, field="streamfunction", lead=24)
    titles = [ax.get_title(loc="left") for ax in figure.axes if ax.get_title(loc="left")]
    assert len(titles) == 1
    assert "run 2026-12-01T12Z +24 h, valid 2026-12-02T12:00Z" in titles[0]
    first = render(parts, field="streamfunction")  # default: the first time, lead 0
    assert "run 2026-12-01T12Z +0 h, valid 2026-12-01T12:00Z" in "".join(
        ax.get_title(loc="left") for ax in first.axes)


@pytest.mark.parametrize("layout", ["archive", "lead"])
def test_map_of_a_forecast_input_picks_run_and_lead(files, tmp_path, layout):
    # An input file laid out by lead, or by runs x leads (valid time 2-D): the map takes the
    # run and lead as the other commands do (valid time = run + lead, CF standard-name
    # table) and draws that slab: the same filled contours (matplotlib's paths) as the map
    # of the plain analysis file that holds only run 12Z + 12 h, and a colour bar spanning
    # the slab's values read independently with xarray.
    from test_maps import _colour_bar

    from flowpipe.maps import render

    def contours(fig):
        return [p.vertices for ax in fig.axes if hasattr(ax, "projection")
                for c in ax.collections if hasattr(c, "get_paths") for p in c.get_paths()]

    figure = render(files[layout], field="u", run="2026-12-01T12Z", lead=12)
    title = "".join(ax.get_title(loc="left") for ax in figure.axes)
    assert "run 2026-12-01T12Z +12 h, valid 2026-12-02T00:00Z" in title
    with xr.open_dataset(files[layout]) as raw:
        if layout == "archive":
            expect = raw["u"].sel(reference_time=RUNS[1], step=LEADS[2]).values
        else:
            expect = raw["u"].sel(forecast_period=12.0).values
    plain = contours(render(files["plain"], field="u"))
    drawn = contours(figure)
    assert len(drawn) == len(plain) > 0
    for a, b in zip(drawn, plain, strict=True):
        np.testing.assert_array_equal(a, b)
    bar = _colour_bar(figure)
    step = np.diff(bar.mappable.levels).max()
    assert bar.vmin <= expect.min() and bar.vmax >= expect.max()
    assert bar.vmax - max(abs(expect.min()), abs(expect.max())) < step


LATEST_CONFIG = """[input]
paths = ["runs/fc_*.nc"]
run = "latest"
[decompose]
output = "parts_{run}.nc"
[maps]
fields = ["streamfunction"]
output = "{field}_{run}_{lead}.png"
[output]
directory = "out"
"""


def test_latest_run_and_a_rerun_after_a_new_run(tmp_path):
    # A nightly directory: three runs, then a fourth arrives (flowpipe run, a real process).
    (tmp_path / "runs").mkdir()
    for run in range(3):
        valid_time_layout(run).to_netcdf(tmp_path / "runs" / f"fc_{run}.nc")
    config = tmp_path / "nightly.toml"
    config.write_text(LATEST_CONFIG)
    done = _flowpipe("run", "--quiet", str(config))
    assert done.returncode == 0, done.stderr
    out = tmp_path / "out"
    assert sorted(p.name for p in out.glob("parts_*.nc")) == ["parts_2026-12-02T00Z.nc"]
    assert sorted(p.name for p in out.glob("*.png")) == [
        f"streamfunction_2026-12-02T00Z_{h:03d}.png" for h in LEAD_HOURS]
    with xr.open_dataset(out / "parts_2026-12-02T00Z.nc") as back:
        assert back["forecast_reference_time"].values == RUNS[2]
    before = {p.name: p.stat().st_mtime_ns for p in out.iterdir() if p.suffix in (".nc", ".png")}

    valid_time_layout(3).to_netcdf(tmp_path / "runs" / "fc_3.nc")
    again = _flowpipe("run", "--quiet", str(config))
    assert again.returncode == 0, again.stderr
    manifest = json.loads((out / "manifest.json").read_text())
    assert list(manifest["units"]) == ["fc_3"]  # only the new run was processed
    written = {p.name for p in out.iterdir() if p.suffix in (".nc", ".png")} - set(before)
    assert written == {"parts_2026-12-02T12Z.nc"} | {
        f"streamfunction_2026-12-02T12Z_{h:03d}.png" for h in LEAD_HOURS}
    assert all((out / name).stat().st_mtime_ns == mtime for name, mtime in before.items())


def test_circulation_run_and_lead(files, tmp_path):
    # flowpipe circulation --run/--lead on the runs x leads archive: the leads asked for,
    # valid = reference + period (CF standard-name table), and at lead 12 h the values of
    # the same slab in a plain file with no forecast coordinates (the reference).
    out = tmp_path / "circ.nc"
    contour = ["--box", "20,60,30,120", "--circle", "45,200,2500"]
    done = _flowpipe("circulation", str(files["archive"]), "--run", "2026-12-01T12Z",
                     "--lead", "12,24", "-o", str(out), *contour)
    assert done.returncode == 0, done.stderr
    plain = tmp_path / "plain.nc"
    assert _flowpipe("circulation", str(files["plain"]), "-o", str(plain), *contour
                     ).returncode == 0
    with xr.open_dataset(out) as back, xr.open_dataset(plain) as ref:
        np.testing.assert_array_equal(back["time"].values, RUNS[1] + LEADS[[2, 4]])
        assert back["forecast_reference_time"].values == RUNS[1]
        np.testing.assert_array_equal(back["forecast_period"].values / np.timedelta64(1, "h"),
                                      [12.0, 24.0])
        for name in ("circulation", "outward_flux", "mean_vorticity_gridded"):
            np.testing.assert_allclose(back[name].isel(time=0).values,
                                       ref[name].isel(time=0).values, rtol=1e-12)
        assert not np.allclose(back.circulation.isel(time=1), back.circulation.isel(time=0))
        assert "coordinates" not in back.attrs  # CF 1.11 section 5: per variable only
    # cfdm (the CF data model's reference library): the forecast axes are coordinates of
    # the per-contour fields, not fields of their own, and nothing is reported
    import cfdm

    fields = cfdm.read(str(out))
    assert not {f.identity() for f in fields} & {"forecast_period", "forecast_reference_time"}
    for field in fields:
        assert set(field.dataset_compliance()) <= {"CF version"}
    bad = _flowpipe("circulation", str(files["archive"]), "--run", "2026-12-05T00Z", "-o",
                    str(tmp_path / "x.nc"), *contour)
    assert bad.returncode == 2 and "runs present" in bad.stderr
    assert not (tmp_path / "x.nc").exists()
