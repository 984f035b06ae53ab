"""The wind plausibility check and the time-series checks, through the real command.

Sources: the speed limit is the one ``flowpipe.ingest.DEFAULT_MAX_SPEED`` states (the largest
analysed speeds about 135 m s-1, *from memory* as the code says); a value treated as missing
becomes a missing value in the CF sense (CF 1.11 section 2.5.1, NetCDF User Guide
``_FillValue``); refusing a series with a missing time rather than interpolating over it
is *common practice*.
"""

from __future__ import annotations

import subprocess
from pathlib import Path

import numpy as np
import xarray as xr

ROOT = Path(__file__).resolve().parents[1]
FLOWPIPE = str(ROOT / ".venv" / "bin" / "flowpipe")
SAMPLE = ROOT / "sample_data" / "demo_global.nc"


def _run(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([FLOWPIPE, *map(str, args)], capture_output=True, text=True)


def _write(path: Path, ds: xr.Dataset, dtype=np.float64) -> Path:
    for name in ds.variables:
        ds[name].encoding = {}
    for name in ("u", "v", "omega", "ta"):
        ds[name] = ds[name].astype(dtype)
    ds.to_netcdf(path)
    return path


def _bad_file(tmp_path: Path, value: float, dtype=np.float64) -> Path:
    with xr.open_dataset(SAMPLE) as src:
        ds = src.isel(time=slice(0, 2)).load()
    u = ds["u"].values.copy()
    u[1, 2, 30, 40] = value  # time 2026-01-12 06, plev 250, lat -30, lon 80
    ds["u"] = (ds["u"].dims, u, ds["u"].attrs)
    return _write(tmp_path / f"bad_{np.dtype(dtype).name}.nc", ds, dtype)


def _error_lines(stderr: str) -> list[str]:
    return [line for line in stderr.splitlines() if line.startswith("flowpipe: error:")]


def test_fill_value_written_as_data_is_refused(tmp_path):
    for dtype in (np.float32, np.float64):
        src = _bad_file(tmp_path, 1e30, dtype)
        outdir = tmp_path / f"out_{np.dtype(dtype).name}"
        outdir.mkdir()
        run = _run("decompose", src, "-o", outdir / "d.nc")
        assert run.returncode == 2, run.stderr
        errors = _error_lines(run.stderr)
        assert len(errors) == 1, run.stderr
        assert "1 point(s)" in errors[0] and "(0 not finite)" in errors[0]
        assert "2026-01-12T06:00:00" in errors[0] and "latitude -30" in errors[0] \
            and "longitude 80" in errors[0], errors[0]
        assert "Traceback" not in run.stderr
        assert list(outdir.iterdir()) == []  # no output, no temporary file


def test_the_count_refused_is_that_of_the_slab_named(tmp_path):
    # -9999 written into several slabs, a different number of points in each: whichever slab
    # the refusal meets first, the count it gives is that slab's own (counted here with
    # numpy from the file), and it points to inspect for the whole file
    with xr.open_dataset(SAMPLE) as src:
        ds = src.isel(time=slice(0, 3)).load()
    u = ds["u"].values.copy()
    for t in range(3):
        u[t, 0, 10:12, 20:20 + 3 * (t + 1)] = -9999.0  # 6, 12 and 18 points
    ds["u"] = (ds["u"].dims, u, ds["u"].attrs)
    source = _write(tmp_path / "marker.nc", ds)
    run = _run("decompose", source, "-o", tmp_path / "d.nc")
    assert run.returncode == 2, run.stderr
    (error,) = _error_lines(run.stderr)
    with xr.open_dataset(source) as ds:
        counts = {str(t)[:19]: int((np.abs(ds["u"].sel(time=t, plev=850.0)) > 250.0).sum())
                  for t in ds.time.values}
    named = [t for t in counts if f"in the slab of time {t}, level 850 " in error]
    assert len(named) == 1, error
    assert f" {counts[named[0]]} point(s) " in error and "flowpipe inspect" in error, error


def test_treated_as_missing_one_warning_and_the_whole_count(tmp_path):
    # the same file of 6, 12 and 18 marked points in three slabs: treated as missing, one
    # warning (of the first slab met), and the output's count is that of the whole file
    # (counted here with numpy)
    with xr.open_dataset(SAMPLE) as src:
        ds = src.isel(time=slice(0, 3)).load()
    u = ds["u"].values.copy()
    for t in range(3):
        u[t, 0, 10:12, 20:20 + 3 * (t + 1)] = -9999.0
    ds["u"] = (ds["u"].dims, u, ds["u"].attrs)
    source = _write(tmp_path / "marker.nc", ds)
    out = tmp_path / "d.nc"
    run = _run("decompose", source, "-o", out, "--implausible", "missing")
    assert run.returncode == 0, run.stderr
    warned = [line for line in run.stderr.splitlines() if "treated as missing" in line]
    assert len(warned) == 1, run.stderr
    assert "implausible_values counts them all" in warned[0]
    with xr.open_dataset(source) as ds:
        expected = int((np.abs(ds["u"]) > 250.0).sum())
    with xr.open_dataset(out) as ds:
        assert int(ds.attrs["implausible_values"]) == expected == 36


def test_infinity_is_counted_as_not_finite(tmp_path):
    src = _bad_file(tmp_path, np.inf, np.float32)
    run = _run("decompose", src, "-o", tmp_path / "d.nc")
    assert run.returncode == 2
    errors = _error_lines(run.stderr)
    assert len(errors) == 1 and "1 point(s)" in errors[0] and "(1 not finite)" in errors[0]
    assert not (tmp_path / "d.nc").exists()


def test_implausible_as_missing_counts_them(tmp_path):
    src = _bad_file(tmp_path, 1e30)
    out = tmp_path / "d.nc"
    run = _run("decompose", src, "-o", out, "--implausible", "missing", "--scheme", "variational")
    if run.returncode != 0:  # the spectral method refuses missing winds; the regional ones fill
        run = _run("decompose", src, "-o", out, "--implausible", "missing")
    assert run.returncode == 0, run.stderr
    assert any(line.startswith("flowpipe: warning:") for line in run.stderr.splitlines())
    with xr.open_dataset(src) as ds:
        expected = int((np.hypot(ds["u"], ds["v"]) > 250.0).sum())
    with xr.open_dataset(out) as ds:
        assert int(ds.attrs["implausible_values"]) == expected == 1


def test_advect_refuses_with_exit_2(tmp_path):
    src = _bad_file(tmp_path, 1e30)
    run = _run("advect", src, "--start", "-30,80,250", "--hours", "6", "-o", tmp_path / "t.nc")
    assert run.returncode == 2, run.stderr
    assert len(_error_lines(run.stderr)) == 1


def _series(tmp_path: Path, indices: list[int]) -> list[Path]:
    files = []
    with xr.open_dataset(SAMPLE) as src:
        for i in indices:
            files.append(_write(tmp_path / f"wind_{i}.nc", src.isel(time=[i]).load()))
    return files


def test_gap_in_a_series_is_refused_naming_the_neighbours(tmp_path):
    # the sample is 6-hourly; files at 00, 06, 18 and 24 h leave 12 h missing
    files = _series(tmp_path, [0, 1, 3, 4])
    run = _run("decompose", *files, "-o", tmp_path / "d.nc")
    assert run.returncode == 2, run.stderr
    errors = _error_lines(run.stderr)
    assert len(errors) == 1
    assert "2026-01-12T12:00Z missing" in errors[0]
    assert str(files[1]) in errors[0] and str(files[2]) in errors[0]
    assert "--allow-gaps" in errors[0]
    accepted = _run("decompose", *files, "--allow-gaps", "-o", tmp_path / "d.nc")
    assert accepted.returncode == 0, accepted.stderr
    with xr.open_dataset(tmp_path / "d.nc") as ds:
        assert ds.sizes["time"] == 4


def test_three_files_with_the_middle_one_missing(tmp_path):
    # 00, 06, (12 missing), 18: the usual step 6 h is the most frequent one
    files = _series(tmp_path, [0, 1, 3])
    run = _run("decompose", *files, "-o", tmp_path / "d.nc")
    assert run.returncode == 2 and "2026-01-12T12:00Z" in run.stderr, run.stderr


def test_duplicated_time_names_both_files(tmp_path):
    a, b = _series(tmp_path, [0, 1])
    c = tmp_path / "copy.nc"
    c.write_bytes(b.read_bytes())
    run = _run("decompose", a, b, c, "-o", tmp_path / "d.nc")
    assert run.returncode == 2
    errors = _error_lines(run.stderr)
    assert len(errors) == 1 and str(b) in errors[0] and str(c) in errors[0], run.stderr


def test_a_time_given_twice_in_one_file_is_refused_by_every_command(tmp_path):
    # CF 1.11 section 4.4 / 5: a coordinate variable is strictly monotonic, so a time
    # cannot occur twice along its dimension.
    with xr.open_dataset(SAMPLE) as src:
        ds = src.isel(time=[0, 1, 1]).load()
    source = _write(tmp_path / "twice.nc", ds)
    for args in (["decompose", source, "-o", tmp_path / "d.nc"],
                 ["advect", source, "-o", tmp_path / "a.nc", "--start", "40,10,500",
                  "--hours", "6"]):
        proc = _run(*args)
        assert proc.returncode == 2, proc.stderr
        (line,) = proc.stderr.strip().splitlines()
        assert "is given twice in" in line and str(source) in line, line
    assert not list(tmp_path.glob("[da].nc"))
