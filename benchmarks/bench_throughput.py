"""File to file throughput of ``flowpipe decompose``, side by side with the transform floor.

On a 0.25 degree global float32 file of at least 24 slabs (times x pressure
levels) whose wind has a k^-3 kinetic-energy spectrum (random spherical-harmonic
coefficients of the rotational and divergent parts, synthesised with ducc0; a
smooth analytic wave would compress unrealistically well), it measures in one
run, alternating the sides and taking medians:

* ``flowpipe decompose IN.nc -o OUT.nc`` as a subprocess at the default
  encoding, with ``--compression zstd``, and to ``OUT.zarr``, each against
  the slab count times the bare transform floor of one slab (one spin-1
  analysis, two spin-1 and four scalar syntheses; :mod:`_transforms`);
* the bytes written per output field against the input's bytes per field;
* the peak resident memory of the default run on the file against that on a
  file of four times as many slabs;
* ``flowpipe run`` of a config decomposing ``--batch`` copies of the file on 2
  workers: its time per slab over the floor, against the single default run's.

Targets (issue 14): default <= 2.5x, zstd <= 1.5x, Zarr <= 1.5x the floor;
bytes per field <= 1.3x; peak memory ratio <= 1.2; the batch's ratio within 1.2x
of the single run's.

Run: ``.venv/bin/python benchmarks/bench_throughput.py [--times 4 --levels 6]
[--repeats 3] [--memory-factor 4] [--batch 8]``. The full setting takes tens of minutes on 2
cores; ``--repeats 1`` (one round, about 13 minutes here) is the documented smaller one.
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import ducc0
import numpy as np
import xarray as xr

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _transforms import floor_transforms  # noqa: E402

NLAT, NLON = 721, 1440
#: The largest degree a CC grid of NLAT rings analyses exactly (ducc0 needs NLAT >= LMAX + 2).
LMAX = NLAT - 2
#: Root-mean-square wind speed of the synthetic fields, m s-1 (a typical
#: mid-tropospheric value; *common practice*).
RMS_SPEED = 15.0

#: Runs a command and prints its wall time and the peak resident memory of the
#: command (the largest of this wrapper's children, getrusage(2)).
CHILD = """
import resource, subprocess, sys, time
started = time.perf_counter()
code = subprocess.run(sys.argv[1:], stdout=subprocess.DEVNULL).returncode
elapsed = time.perf_counter() - started
print(elapsed, resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * 1024, code)
"""


def k3_wind(rng: np.random.Generator, nthreads: int) -> tuple[np.ndarray, np.ndarray]:
    """(u, v) on the CC grid from random E/B coefficients with E(l) ~ l^-3."""
    ncoef = (LMAX + 1) * (LMAX + 2) // 2
    ell = np.concatenate([np.arange(m, LMAX + 1) for m in range(LMAX + 1)])
    # energy per degree l ~ l^-3, shared by its 2l+1 coefficients; the divergent
    # part a third of the rotational one
    amplitude = np.where(ell > 0, np.maximum(ell, 1.0) ** -1.5 / np.sqrt(2 * ell + 1), 0.0)
    alm = np.empty((2, ncoef), np.complex128)
    for k, share in enumerate((np.sqrt(1 / 3), 1.0)):
        alm[k] = share * amplitude * (rng.standard_normal(ncoef) + 1j * rng.standard_normal(ncoef))
    alm[:, : LMAX + 1].imag = 0.0  # m = 0 coefficients of a real field are real
    maps = ducc0.sht.experimental.synthesis_2d(alm=alm, spin=1, lmax=LMAX, geometry="CC",
                                               ntheta=NLAT, nphi=NLON, nthreads=nthreads)
    v_theta, v_phi = maps
    scale = RMS_SPEED / np.sqrt(np.mean(v_theta**2 + v_phi**2))
    # colatitude from the north pole: northward wind is -v_theta; rows then ascend in latitude
    return (scale * v_phi)[::-1], (-scale * v_theta)[::-1]


def write_input(path: Path, ntimes: int, nlevels: int, seed: int, nthreads: int) -> None:
    rng = np.random.default_rng(seed)
    u = np.empty((ntimes, nlevels, NLAT, NLON), np.float32)
    v = np.empty_like(u)
    for t in range(ntimes):
        for k in range(nlevels):
            u[t, k], v[t, k] = k3_wind(rng, nthreads)
    times = np.datetime64("2026-03-01T00:00", "ns") + np.arange(ntimes) * np.timedelta64(6, "h")
    ds = xr.Dataset(
        {"u": (("time", "level", "latitude", "longitude"), u,
               {"standard_name": "eastward_wind", "units": "m s-1"}),
         "v": (("time", "level", "latitude", "longitude"), v,
               {"standard_name": "northward_wind", "units": "m s-1"})},
        coords={"time": times,
                "level": ("level", np.linspace(1000.0, 250.0, nlevels),
                          {"units": "hPa", "standard_name": "air_pressure", "positive": "down"}),
                "latitude": ("latitude", np.linspace(-90.0, 90.0, NLAT),
                             {"units": "degrees_north", "standard_name": "latitude"}),
                "longitude": ("longitude", np.arange(NLON) * 360.0 / NLON,
                              {"units": "degrees_east", "standard_name": "longitude"})})
    enc = {"zlib": True, "complevel": 1, "shuffle": True, "chunksizes": (1, 1, NLAT, NLON)}
    ds.to_netcdf(path, encoding={"u": enc, "v": enc})


def run_command(args: list[str]) -> tuple[float, int]:
    out = subprocess.run([sys.executable, "-c", CHILD, *args], capture_output=True, text=True,
                         check=True).stdout.split()
    if out[2] != "0":
        raise SystemExit(f"failed: {' '.join(args)}")
    return float(out[0]), int(out[1])


def floor_seconds(slabs: int, nthreads: int, repeats: int = 3) -> float:
    rng = np.random.default_rng(0)
    spin = np.stack(k3_wind(rng, nthreads)).astype(np.float64)
    floor_transforms(spin, NLAT, NLON, LMAX, nthreads)  # warm up
    best = np.inf
    for _ in range(repeats):
        started = time.perf_counter()
        floor_transforms(spin, NLAT, NLON, LMAX, nthreads)
        best = min(best, time.perf_counter() - started)
    return slabs * best


def size_of(path: Path) -> int:
    if path.is_dir():
        return sum(p.stat().st_size for p in path.rglob("*") if p.is_file())
    return path.stat().st_size


def fields_of(path: Path) -> int:
    with xr.open_dataset(path, engine="zarr" if path.suffix == ".zarr" else None) as ds:
        return sum(1 for var in ds.data_vars.values() if {"latitude", "longitude"} <= set(var.dims))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--times", type=int, default=4)
    parser.add_argument("--levels", type=int, default=6)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--memory-factor", type=int, default=4)
    parser.add_argument("--batch", type=int, default=8, help="inputs of the flowpipe run")
    args = parser.parse_args()
    nthreads = len(os.sched_getaffinity(0))
    slabs = args.times * args.levels
    flowpipe = [str(Path(sys.executable).with_name("flowpipe")), "decompose"]
    work = Path(tempfile.mkdtemp(prefix="bench_throughput-"))
    try:
        small, large = work / "in.nc", work / "in_large.nc"
        write_input(small, args.times, args.levels, 1, nthreads)
        write_input(large, args.times * args.memory_factor, args.levels, 2, nthreads)
        batch = work / "batch"
        batch.mkdir()
        for k in range(args.batch):
            os.link(small, batch / f"night_{k}.nc")  # one file under many names
        config = work / "night.toml"
        config.write_text(f'[input]\npaths = ["{batch}/night_*.nc"]\n\n[decompose]\n'
                          f'output = "{{stem}}_parts.nc"\n\n[output]\ndirectory = '
                          f'"{work / "night"}"\n\n[run]\nworkers = 2\n')
        sides = {
            "default (OUT.nc)": [*flowpipe, str(small), "-o", str(work / "out.nc")],
            "--compression zstd": [*flowpipe, str(small), "-o", str(work / "zstd.nc"),
                                   "--compression", "zstd"],
            "Zarr (OUT.zarr)": [*flowpipe, str(small), "-o", str(work / "out.zarr")],
        }
        run_command(sides["default (OUT.nc)"])  # warm compiled caches and the disk
        seconds: dict[str, list[float]] = {name: [] for name in sides}
        floors: list[float] = []
        batches: list[float] = []
        peaks: dict[str, list[int]] = {"small": [], "large": []}
        for _ in range(args.repeats):  # alternate the sides, one of each per round
            floors.append(floor_seconds(slabs, nthreads))
            for name, command in sides.items():
                elapsed, peak = run_command(command)
                seconds[name].append(elapsed)
                if name.startswith("default"):
                    peaks["small"].append(peak)
            peaks["large"].append(run_command(
                [*flowpipe, str(large), "-o", str(work / "large.nc")])[1])
            batches.append(run_command([flowpipe[0], "run", str(config), "--force",
                                        "--quiet"])[0])
        floor = float(np.median(floors))
        in_per_field = size_of(small) / 2
        print(f"input: {slabs} slabs of {NLAT} x {NLON} float32, {size_of(small) / 2**20:.0f} MiB; "
              f"floor {floor / slabs:.3f} s per slab ({nthreads} threads); medians of "
              f"{args.repeats}")
        print(f"{'run':<22} {'time / floor':>12} {'bytes per field / input':>24}")
        for name, command in sides.items():
            out = Path(command[command.index("-o") + 1])
            per_field = size_of(out) / fields_of(out)
            print(f"{name:<22} {np.median(seconds[name]) / floor:>12.2f} "
                  f"{per_field / in_per_field:>24.2f}")
        single = np.median(seconds["default (OUT.nc)"]) / floor
        per_batch = np.median(batches) / (args.batch * floor)
        print(f"flowpipe run, {args.batch} inputs on 2 workers: {per_batch:.2f} x the floor per "
              f"slab, {per_batch / single:.2f} x the single run's")
        ratio = np.median(peaks["large"]) / np.median(peaks["small"])
        print(f"peak memory, {slabs * args.memory_factor} vs {slabs} slabs: {ratio:.2f} "
              f"({np.median(peaks['large']) / 2**20:.0f} vs {np.median(peaks['small']) / 2**20:.0f}"
              " MiB)")
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
