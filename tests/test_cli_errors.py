"""Mistakes at the command line: the contract's one-line errors, exit 2, nothing written.

README.md ("Exit codes"): a usage error or unusable input exits 2 with
one line beginning ``flowpipe: error:`` that names what is wrong and what to do, and
no Python traceback unless ``--debug`` is given; outputs are written to a temporary
name and renamed, so nothing half-written is ever left behind.
"""

from __future__ import annotations

import signal
import subprocess
import sys
import time
from pathlib import Path

import dask
import dask.array
import matplotlib.text
import numpy as np
import pytest
import xarray as xr

from flowpipe.cli import main
from flowpipe.errors import InputError
from flowpipe.maps import render

ROOT = Path(__file__).resolve().parents[1]
GLOBAL = str(ROOT / "sample_data" / "demo_global.nc")
REGIONAL = str(ROOT / "sample_data" / "demo_regional.nc")


def _one_error_line(capsys, text: str) -> None:
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("flowpipe: error:") and text in err[0], err
    assert "Traceback" not in err[0]


def test_debug_before_the_command_shows_the_traceback(tmp_path):
    # --help lists --debug before the command; given there it must not be lost.
    with pytest.raises(InputError):
        main(["--debug", "decompose", str(tmp_path / "missing.nc"), "-o", str(tmp_path / "o.nc")])
    with pytest.raises(InputError):
        main(["decompose", str(tmp_path / "missing.nc"), "-o", str(tmp_path / "o.nc"), "--debug"])


@pytest.mark.parametrize("make_args, text", [
    (lambda t: ["decompose", GLOBAL, "-o", str(t)], "is a directory"),
    (lambda t: ["map", GLOBAL, "-o", str(t), "--field", "u"], "is a directory"),
    (lambda t: ["decompose", GLOBAL, "-o", str(t / "o.nc"), "--scheme", "foo"], "invalid choice"),
    (lambda t: ["map", GLOBAL, "-o", str(t / "m.png"), "--size", "100000x100000"],
     "from 100 to"),
    # a data output named as another format (or as none) would mislead its readers
    (lambda t: ["decompose", GLOBAL, "-o", str(t / "parts.grib")], "name it *.nc"),
    (lambda t: ["circulation", GLOBAL, "-o", str(t / "parts"), "--box", "40,50,0,10"],
     "name it *.nc"),
])
def test_bad_arguments_are_refused_before_any_work(tmp_path, capsys, make_args, text):
    with pytest.raises(SystemExit) as stop:
        main(make_args(tmp_path))
    assert stop.value.code == 2
    _one_error_line(capsys, text)
    assert not list(tmp_path.iterdir())


@pytest.mark.parametrize("command, options", [
    ("decompose", []), ("advect", ["--start", "50,0", "--hours", "6"]),
    ("ftle", ["--hours", "6"]), ("circulation", ["--box", "40,50,0,10"]),
    ("map", ["--field", "u"]),
])
def test_an_output_in_a_missing_directory_is_refused_and_not_created(tmp_path, capsys, command,
                                                                      options):
    # README.md ("How outputs are stored"): a single command writes into a directory that
    # exists; a mistyped one is named, not silently created (common practice: cp, tar and
    # the shell's redirection refuse a missing directory too).
    typo = tmp_path / "outptu"
    suffix = ".png" if command == "map" else ".nc"
    with pytest.raises(SystemExit) as stop:
        main([command, GLOBAL, "-o", str(typo / f"result{suffix}"), *options])
    assert stop.value.code == 2
    _one_error_line(capsys, f"the directory {str(typo)!r} does not exist; create it first")
    assert not typo.exists()


@pytest.mark.parametrize("command, typo, meant", [
    (["decompose", GLOBAL, "-o", "OUT"], ["--compresion", "zstd"], "--compression"),
    (["map", GLOBAL, "-o", "OUT"], ["--feild=u"], "--field"),
    (["advect", GLOBAL, "-o", "OUT", "--start", "50,0", "--hours", "6"], ["--xyz"], None),
])
def test_an_unknown_option_is_refused_by_its_command_with_the_closest(tmp_path, capsys, command,
                                                                      typo, meant):
    # The command's own parser refuses it and points at its own help; the suggestion is the
    # closest of that command's options by difflib.get_close_matches (Python documentation,
    # difflib; "did you mean" as git and many command lines say it: common practice).
    args = [str(tmp_path / "out.nc") if a == "OUT" else a for a in command]
    with pytest.raises(SystemExit) as stop:
        main([*args, *typo])
    assert stop.value.code == 2
    (line,) = capsys.readouterr().err.strip().splitlines()
    assert line.startswith(f"flowpipe: error: unrecognized arguments: {' '.join(typo)}")
    assert line.endswith(f"(see 'flowpipe {command[0]} --help')")
    assert ("did you mean" in line) == (meant is not None)
    if meant is not None:
        assert f"; did you mean {meant}?" in line
    assert not list(tmp_path.iterdir())


def test_a_southern_or_western_coordinate_first_is_taken_as_the_value(tmp_path):
    # argparse reads "-30,100,500" as an option, not as a value (Python documentation,
    # argparse, "Arguments containing -"); a contour or start in the southern or western
    # hemisphere must not need the "=" form: both forms give the same file.
    import xarray as xr

    for form, args in (("spaced", ["--circle", "-30,100,500", "--box", "-40,-20,-60,-30"]),
                       ("joined", ["--circle=-30,100,500", "--box=-40,-20,-60,-30"])):
        assert main(["circulation", GLOBAL, "-o", str(tmp_path / f"{form}.nc"), *args]) == 0
    assert main(["advect", GLOBAL, "-o", str(tmp_path / "t.nc"), "--start", "-35,-60,850",
                 "--hours", "6"]) == 0
    with xr.open_dataset(tmp_path / "spaced.nc") as a, xr.open_dataset(tmp_path / "joined.nc") as b:
        assert list(a["contour_name"].values) == list(b["contour_name"].values)
        xr.testing.assert_identical(a["circulation"], b["circulation"])
    with xr.open_dataset(tmp_path / "t.nc") as t:
        assert float(t["latitude"].isel(obs=0).max()) == -35.0


def test_a_start_file_that_is_not_text_is_an_input_error(tmp_path, capsys):
    assert main(["advect", GLOBAL, "-o", str(tmp_path / "t.nc"), "--starts", GLOBAL,
                 "--hours", "6"]) == 2
    _one_error_line(capsys, "is not a text CSV file")
    assert not list(tmp_path.iterdir())


@pytest.mark.parametrize("content", [b"", b"latitude,longitude\n50,0\n", b"\x89PNG\r\n\x1a\n"])
def test_a_file_that_is_not_netcdf_is_named_in_one_line(tmp_path, capsys, content):
    # File signatures: NetCDF User Guide (CDF header), HDF5 File Format Specification.
    path = tmp_path / "wind.nc"
    path.write_bytes(content)
    for args in (["inspect", str(path)], ["map", str(path), "-o", str(tmp_path / "m.png")]):
        assert main(args) == 2
        _one_error_line(capsys, "is not a NetCDF file")


def test_a_malformed_scheduler_address_is_a_usage_error(tmp_path, capsys):
    config = tmp_path / "night.toml"
    config.write_text(f'[input]\npaths = ["{GLOBAL}"]\n\n[decompose]\n\n[output]\n'
                      f'directory = "out"\n')
    assert main(["run", str(config), "--scheduler", "foo", "--quiet"]) == 2
    assert "cannot reach the dask scheduler" in capsys.readouterr().err
    # and the failed client does not stay behind to take later computations
    assert dask.config.get("scheduler", None) != "dask.distributed"
    assert float(dask.array.ones(4).sum().compute()) == 4.0


def test_inspect_expands_a_quoted_glob_into_one_report_per_file(capsys):
    assert main(["inspect", str(ROOT / "sample_data" / "demo_*.nc")]) == 0
    out = capsys.readouterr().out
    assert out.count("demo_global.nc") == 1 and out.count("demo_regional.nc") == 1


def test_map_levels_are_in_hectopascals_whatever_the_file_says(tmp_path):
    # The regional sample stores its levels in Pa; flowpipe speaks hPa everywhere
    # (1 hPa = 100 Pa, UDUNITS-2).
    with xr.open_dataset(REGIONAL) as ds:
        assert any(ds[name].attrs.get("units") == "Pa" for name in ds.coords)
    out = tmp_path / "m.png"
    assert main(["map", REGIONAL, "-o", str(out), "--level", "850", "--field", "uwind"]) == 0
    assert out.stat().st_size > 0
    figure = render(REGIONAL, field="uwind", level=850.0)
    texts = [t.get_text() for t in figure.findobj(matplotlib.text.Text)]
    assert any("850 hPa" in t for t in texts) and not any("85000" in t for t in texts)


def test_a_terminated_command_leaves_no_temporary_file(tmp_path):
    # SIGTERM (what a batch system sends first) must unwind like an interrupt: the
    # temporary output is removed and no final file appears.
    lat, lon = np.linspace(-90, 90, 181), np.arange(0.0, 360.0, 1.0)
    levels = np.arange(1000.0, 90.0, -30.0)
    shape = (4, levels.size, lat.size, lon.size)
    rng = np.random.default_rng(0)
    u = 10 + rng.standard_normal(shape).astype(np.float32)
    xr.Dataset({"u": (("time", "plev", "lat", "lon"), u, {"units": "m s-1"}),
                "v": (("time", "plev", "lat", "lon"), u[:, :, ::-1], {"units": "m s-1"})},
               coords={"time": np.datetime64("2026-01-01", "ns") + np.arange(4) * np.timedelta64(6, "h"),
                       "plev": ("plev", levels, {"units": "hPa"}),
                       "lat": ("lat", lat, {"units": "degrees_north"}),
                       "lon": ("lon", lon, {"units": "degrees_east"})}).to_netcdf(tmp_path / "in.nc")
    out = tmp_path / "out"
    out.mkdir()
    process = subprocess.Popen([sys.executable, "-m", "flowpipe", "decompose",
                                str(tmp_path / "in.nc"), "-o", str(out / "parts.nc")],
                               stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 60
    while not list(out.glob(".parts.nc.tmp-*")) and time.monotonic() < deadline \
            and process.poll() is None:
        time.sleep(0.02)
    assert list(out.glob(".parts.nc.tmp-*")), "the writer never started"
    process.send_signal(signal.SIGTERM)
    _, err = process.communicate(timeout=60)
    assert process.returncode == 128 + signal.SIGTERM, err
    assert "flowpipe: terminated" in err
    assert not list(out.iterdir())


def _gappy_global(tmp_path: Path) -> str:
    """The global sample, two times, with a gap on its first (850 hPa) level only."""
    path = tmp_path / "gappy.nc"
    with xr.open_dataset(GLOBAL) as ds:
        ds = ds.isel(time=slice(0, 2)).load()
    for name in ("u", "v"):
        ds[name][:, 0, 30:40, 20:40] = np.nan
    ds.to_netcdf(path)
    return str(path)


@pytest.mark.parametrize("make_args, hint", [
    (lambda t: ["decompose", GLOBAL, "-o", str(t / "o.nc"), "--levels", "700"],
     "choose among these with --levels (config: [decompose] levels)"),
    (lambda t: ["decompose", _gappy_global(t), "-o", str(t / "o.nc"), "--kinematics"],
     "choose the levels that have no missing points with --levels (config: [decompose] levels)"),
    (lambda t: ["circulation", GLOBAL, "-o", str(t / "o.nc"), "--box", "40,50,0,10",
                "--levels", "700"],
     "choose among these with --levels (config: [circulation] levels)"),
    (lambda t: ["ftle", GLOBAL, "-o", str(t / "o.nc"), "--hours", "6", "--level", "700"],
     "choose among these with --level (config: [ftle] levels)"),
])
def test_a_hint_to_choose_levels_names_the_config_key_too(tmp_path, capsys, make_args, hint):
    # README.md ("Exit codes"): the one line says what to do; the same choice in a batch run
    # is the table's levels key (configs/README.md, [decompose], [circulation], [ftle]).
    args = make_args(tmp_path)
    assert main(args) == 2
    _one_error_line(capsys, hint)
    assert not (tmp_path / "o.nc").exists()


def test_kinematics_take_complete_global_levels_only(tmp_path, capsys):
    # README.md (Commands, decompose): --kinematics is refused on a limited area before any
    # work, and on a global level with missing points, nothing written; the complete levels
    # of the same file are taken (spherical-harmonic analysis needs every quadrature node:
    # Swarztrauber 1981, SIAM J. Numer. Anal. 18, 191-210).
    out = tmp_path / "o.nc"
    assert main(["decompose", REGIONAL, "-o", str(out), "--kinematics"]) == 2
    _one_error_line(capsys, "--kinematics needs the spectral method")
    gappy = _gappy_global(tmp_path)
    assert main(["decompose", gappy, "-o", str(out), "--kinematics"]) == 2
    _one_error_line(capsys, "u/v have 200 missing points in a latitude-longitude slab")  # 10 x 20
    assert not out.exists()
    assert main(["decompose", gappy, "-o", str(out), "--kinematics", "--levels", "500,250"]) == 0
    with xr.open_dataset(out) as ds:
        assert ds.sizes["level"] == 2 and "absolute_vorticity" in ds
