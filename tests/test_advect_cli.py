"""``flowpipe advect`` end to end: the contract's trajectory file and its error handling."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from flowpipe.annotate import CAUTION
from flowpipe.cli import main

DATA = Path(__file__).resolve().parents[1] / "sample_data"
GLOBAL = str(DATA / "demo_global.nc")
REGIONAL = str(DATA / "demo_regional.nc")
CHECKER = Path(sys.executable).with_name("compliance-checker")


def compliance(path: Path) -> dict:
    """The IOOS compliance checker's CF 1.11 report (an external reference tool)."""
    report = path.with_suffix(".json")
    subprocess.run([str(CHECKER), "--test=cf:1.11", "-f", "json", "-o", str(report), str(path)],
                   check=False, capture_output=True, timeout=300)
    return json.loads(report.read_text())["cf:1.11"]


def test_backward_run_on_the_sample_file_writes_a_cf_trajectory_file(tmp_path, capsys):
    # The trajectory file of README.md ("Output files") and CF 1.11 chapter 9 (discrete
    # sampling geometries, featureType trajectory), checked by the compliance checker.
    out = tmp_path / "back.nc"
    code = main(["advect", GLOBAL, "-o", str(out), "--start", "52,4,700", "--start",
                 "40,-70,500", "--start", "-20,150,250", "--hours", "48", "--backward",
                 "--sample", "ta", "--vertical", "omega"])
    assert code == 0
    assert "3 trajectories" in capsys.readouterr().out
    with xr.open_dataset(out) as ds:
        assert ds.attrs["featureType"] == "trajectory"
        assert ds.attrs["comment"] == CAUTION
        assert ds["trajectory_id"].attrs["cf_role"] == "trajectory_id"
        assert dict(ds["latitude"].sizes) == {"trajectory": 3, "obs": 49}
        assert ds["latitude"].attrs["standard_name"] == "latitude"
        assert ds["air_pressure"].attrs["standard_name"] == "air_pressure"
        status = ds["status"]
        assert len(status.attrs["flag_values"]) == len(status.attrs["flag_meanings"].split())
        assert "left_domain" in status.attrs["flag_meanings"]
        assert ds["time"].values[0, 0] == np.datetime64("2026-01-14T00:00")  # last input time
        assert ds["time"].values[0, -1] == np.datetime64("2026-01-12T00:00")
        assert np.isfinite(ds["ta"].values[:, 0]).all()
    result = compliance(out)
    assert result["high_count"] == 0 and result["medium_count"] == 0
    assert result["scored_points"] == result["possible_points"]


def test_starts_file_with_times_and_levels(tmp_path):
    # The contract: --starts FILE.csv, header row, latitude,longitude[,level][,time].
    starts = tmp_path / "starts.csv"
    starts.write_text("latitude,longitude,level,time\n"
                      "52,4,850,2026-01-12T06:00Z\n"
                      "60,-20,500,2026-01-12T12:00\n")
    out = tmp_path / "forward.nc"
    assert main(["advect", REGIONAL, "-o", str(out), "--starts", str(starts), "--hours", "6",
                 "--step-minutes", "10"]) == 0
    with xr.open_dataset(out) as ds:
        assert ds["time"].values[0, 0] == np.datetime64("2026-01-12T06:00")
        assert ds["time"].values[1, -1] == np.datetime64("2026-01-12T18:00")
        np.testing.assert_allclose(ds["air_pressure"].values[:, 0], [850.0, 500.0])
        assert ds.attrs["time_step_seconds"] == 600.0


def single_time_file(tmp_path: Path) -> str:
    path = tmp_path / "one_time.nc"
    with xr.open_dataset(GLOBAL) as ds:
        ds.isel(time=slice(0, 1)).load().to_netcdf(path)
    return str(path)


def test_single_time_with_steady(tmp_path):
    # The contract: a single input time is usable with --steady.
    out = tmp_path / "steady.nc"
    assert main(["advect", single_time_file(tmp_path), "-o", str(out), "--start", "52,4,500",
                 "--hours", "12", "--steady"]) == 0
    with xr.open_dataset(out) as ds:
        assert ds.attrs["steady_wind"] == "yes"


@pytest.mark.parametrize("files, options, words", [
    ([REGIONAL], ["--start", "10,0,850"], "--start 10,0,850 (start 1)"),
    ([REGIONAL], ["--starts", "CSV"], "starts.csv line 3"),
    ([GLOBAL], ["--start", "52,4,1000"], "outside the input's vertical range"),
    ([GLOBAL], ["--start", "52,4,500", "--hours", "0"], "--hours 0"),
    ([GLOBAL], ["--start", "52,4,500", "--hours", "-6"], "--hours -6"),
    ([GLOBAL], ["--start", "52,4,500", "--step-minutes", "400"], "longer than the input interval"),
    ([REGIONAL], ["--start", "52,4,500", "--vertical", "omega"], "vertical velocity"),
    (["ONE_TIME"], ["--start", "52,4,500"], "--steady"),
])
def test_bad_input_exits_2_and_writes_nothing(tmp_path, capsys, files, options, words):
    # README.md ("Exit codes"): exit code 2, a one-line "flowpipe: error:" message naming
    # what is at fault, and no output file.
    # (line 3 is at fault: a level outside the input's; one start of several outside the
    # domain is skipped with a warning instead, tests/test_bands.py)
    (tmp_path / "starts.csv").write_text("latitude,longitude,level\n52,4,850\n52,4,2000\n")
    files = [single_time_file(tmp_path) if f == "ONE_TIME" else f for f in files]
    options = [str(tmp_path / "starts.csv") if o == "CSV" else o for o in options]
    if "--hours" not in options:
        options += ["--hours", "12"]
    out = tmp_path / "out" / "tracks.nc"
    out.parent.mkdir()
    code = main(["advect", *files, "-o", str(out), *options])
    err = capsys.readouterr().err
    assert code == 2
    assert err.startswith("flowpipe: error:") and words in err
    assert "Traceback" not in err
    assert not out.exists() and not list(tmp_path.glob("out/.*"))


def test_a_series_of_files_gives_the_same_trajectories_as_one_file(tmp_path):
    # Splitting a series into files must not change the result (the contract: several
    # files are combined along time and read lazily; common practice).
    with xr.open_dataset(GLOBAL) as ds:
        parts = [tmp_path / f"part{i}.nc" for i in range(3)]
        for i, part in enumerate(parts):
            ds.isel(time=slice(3 * i, 3 * i + 3)).load().to_netcdf(part)
    one, many = tmp_path / "one.nc", tmp_path / "many.nc"
    common = ["--start", "52,4,500", "--start=-33,151,250", "--hours", "42", "--backward",
              "--vertical", "omega", "--sample", "ta"]
    assert main(["advect", GLOBAL, "-o", str(one), *common]) == 0
    assert main(["advect", *map(str, parts), "-o", str(many), *common]) == 0
    with xr.open_dataset(one) as a, xr.open_dataset(many) as b:
        for name in ("latitude", "longitude", "air_pressure", "ta"):
            np.testing.assert_array_equal(a[name].values, b[name].values)
        assert np.isfinite(a["latitude"].values).all()


def test_sample_takes_the_input_file_own_names(tmp_path, capsys):
    # The canonical wind keeps the file's names in source_name (README.md, "What flowpipe
    # accepts"): --sample OMEGA of a file that calls omega so samples what --sample omega
    # samples, under flowpipe's name with source_name beside it, and map --field takes the
    # file's name too (common practice: a user names the variables as the file has them).
    with xr.open_dataset(GLOBAL) as ds:
        named = tmp_path / "named.nc"
        ds.isel(time=slice(0, 3)).rename(u="U", v="V", omega="OMEGA").to_netcdf(named)
    start = ["--start", "50,0,500", "--hours", "6"]
    assert main(["advect", str(named), "-o", str(tmp_path / "a.nc"), *start,
                 "--sample", "OMEGA,ta"]) == 0
    assert main(["advect", str(named), "-o", str(tmp_path / "b.nc"), *start,
                 "--sample", "omega,ta"]) == 0
    with xr.open_dataset(tmp_path / "a.nc") as a, xr.open_dataset(tmp_path / "b.nc") as b:
        assert np.isfinite(a["omega"]).all() and a["omega"].attrs["source_name"] == "OMEGA"
        np.testing.assert_array_equal(a["omega"].values, b["omega"].values)
    assert main(["map", str(tmp_path / "a.nc"), "-o", str(tmp_path / "a.png"),
                 "--field", "OMEGA"]) == 0
    assert "coloured by omega" in capsys.readouterr().out
    assert main(["advect", str(named), "-o", str(tmp_path / "c.nc"), *start,
                 "--sample", "W"]) == 2
    err = capsys.readouterr().err
    assert "(variables: omega (file: OMEGA), ta, u (file: U), v (file: V))" in err
