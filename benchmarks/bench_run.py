"""The nightly run, side by side: 1 versus 2 workers, and memory for 8 versus 64 times.

Each measurement runs ``flowpipe run`` in a fresh Python process (so imports,
caches and peak memory are its own) on synthetic global winds written by this
script, and the ratios are printed from measurements taken in this one run of
the script (the machine is shared and noisy; ratios, not seconds, are what to
compare). Targets: speed-up >= 1.6 with 2 workers on 2 cores; peak resident
memory of a 64-time run <= 1.3 x that of an 8-time run.

Usage: ``python benchmarks/bench_run.py [--resolution DEG] [--times N]
[--memory-resolution DEG] [--repeat K]``
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
import xarray as xr

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "sample_data"))
from make_sample_data import global_winds  # noqa: E402

LEVELS = (850.0, 500.0, 250.0)

CHILD = """
import resource, sys, time
from flowpipe.pipeline import run
started = time.perf_counter()
summary = run(sys.argv[1], quiet=True, workers=int(sys.argv[2]), force=True)
elapsed = time.perf_counter() - started
peak_mib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
print(f"{elapsed} {peak_mib} {summary.exit_code}")
"""


def write_series(directory: Path, resolution: float, ntimes: int) -> list[Path]:
    """One file per 6-hourly time, as many models write them."""
    lat = np.linspace(-90.0, 90.0, int(round(180 / resolution)) + 1)
    lon = np.arange(0.0, 360.0, resolution)
    paths = []
    for k in range(ntimes):
        hours = 6.0 * k
        u = np.empty((1, len(LEVELS), lat.size, lon.size), np.float32)
        v = np.empty_like(u)
        for il, p in enumerate(LEVELS):
            uu, vv, *_ = global_winds(lat, lon, hours, p)
            u[0, il], v[0, il] = uu, vv
        time_value = np.array([np.datetime64("2026-03-01T00:00") + np.timedelta64(6 * k, "h")])
        ds = xr.Dataset(
            {"u": (("time", "plev", "lat", "lon"), u, {"standard_name": "eastward_wind",
                                                      "units": "m s-1"}),
             "v": (("time", "plev", "lat", "lon"), v, {"standard_name": "northward_wind",
                                                      "units": "m s-1"})},
            coords={"time": ("time", time_value),
                    "plev": ("plev", np.array(LEVELS), {"units": "hPa",
                                                        "standard_name": "air_pressure"}),
                    "lat": ("lat", lat, {"units": "degrees_north"}),
                    "lon": ("lon", lon, {"units": "degrees_east"})},
        )
        path = directory / f"wind_{k:03d}.nc"
        ds.to_netcdf(path)
        paths.append(path)
    return paths


def config_for(directory: Path, inputs: list[Path], name: str, combine: bool) -> Path:
    text = (f"[input]\npaths = {json.dumps([str(p) for p in inputs])}\n"
            f"combine = {str(combine).lower()}\n"
            f"name = \"{name}\"\n\n[decompose]\nfloat32 = true\n\n"
            f"[output]\ndirectory = \"{directory / ('out_' + name)}\"\n")
    path = directory / f"{name}.toml"
    path.write_text(text)
    return path


def measure(config: Path, workers: int) -> tuple[float, float]:
    proc = subprocess.run([sys.executable, "-c", CHILD, str(config), str(workers)],
                          capture_output=True, text=True, check=True)
    elapsed, peak, code = proc.stdout.split()
    if code != "0":
        raise SystemExit(f"run failed: {proc.stderr}")
    return float(elapsed), float(peak)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--resolution", type=float, default=0.25,
                        help="grid spacing of the speed run, degrees")
    parser.add_argument("--times", type=int, default=16, help="input files of the speed run")
    parser.add_argument("--memory-resolution", type=float, default=1.0,
                        help="grid spacing of the memory runs (8 and 64 times), degrees")
    parser.add_argument("--repeat", type=int, default=2, help="alternating repeats per case")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        (root / "speed").mkdir()
        (root / "memory").mkdir()
        # The speed run: each input file is one unit of work (the default).
        files = write_series(root / "speed", args.resolution, args.times)
        speed = config_for(root, files, "speed", combine=False)
        # The memory runs: all times as one series, streamed through one output.
        series = write_series(root / "memory", args.memory_resolution, 64)
        small = config_for(root, series[:8], "t8", combine=True)
        large = config_for(root, series, "t64", combine=True)
        one, two = [], []
        for _ in range(args.repeat):  # alternate, so drifts in machine load hit both
            one.append(measure(speed, 1)[0])
            two.append(measure(speed, 2)[0])
        mem8, mem64 = [], []
        for _ in range(args.repeat):
            mem8.append(measure(small, 2)[1])
            mem64.append(measure(large, 2)[1])
    print(f"decompose stage, {len(LEVELS)} levels, float32 output; speed run on a "
          f"{args.resolution} deg grid, memory runs on a {args.memory_resolution} deg grid")
    print(f"speed run ({args.times} files, one unit each): 1 worker {min(one):.2f} s, "
          f"2 workers {min(two):.2f} s"
          f" -> speed-up {min(one) / min(two):.2f} (target >= 1.6)")
    print(f"peak memory, one series of 8 times {min(mem8):.0f} MiB, of 64 times {min(mem64):.0f} MiB"
          f" -> ratio {min(mem64) / min(mem8):.2f} (target <= 1.3)")
    print(f"(best of {args.repeat} alternating runs each)")


if __name__ == "__main__":
    main()
