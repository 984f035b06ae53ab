"""``flowpipe circulation`` on a masked limited area: working tree against another revision.

Writes an invented limited-area file like a regional model's (35-65N, 20W-30E at
0.125 degree: 241 x 401 points, 6 pressure levels 1000..300 hPa, 4 times, float32
with blobs of missing points below the ground at the three lowest levels), then runs
``flowpipe circulation FILE -o OUT.nc --box 45,58,-15,5 --circle 52,-5,600 --obrien``
in a fresh process per measurement (imports, solver caches and peak memory its own),
the two sides alternately. The other revision's ``flowpipe/`` is extracted from git
(``git archive``). Prints per round and as medians the wall-clock seconds and the
peak resident memory of each side and their ratios (working tree / other revision), and
whether the two sides wrote the same gridded means and circulation.

Run: ``.venv/bin/python benchmarks/bench_circulation_regional.py [--base REV] [--rounds 3]``.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
import xarray as xr
from _revisions import ROOT, flowpipe_at

CHILD = """
import resource, sys, time
import flowpipe
from flowpipe.cli import main
started = time.perf_counter()
code = main(sys.argv[1:])
elapsed = time.perf_counter() - started
print(flowpipe.__file__, elapsed, resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, code)
"""


def limited_area_file(path: Path) -> None:
    """Smooth invented winds whose divergence changes with height; missing blobs below 850 hPa."""
    lat = np.arange(35.0, 65.0001, 0.125)
    lon = np.arange(-20.0, 30.0001, 0.125)
    lev = np.array([1000.0, 925.0, 850.0, 700.0, 500.0, 300.0])
    times = np.datetime64("2026-02-01T00", "ns") + np.arange(4) * np.timedelta64(6, "h")
    phi = np.radians(lat)[None, None, :, None]
    lam = np.radians(lon)[None, None, None, :]
    t = np.arange(len(times))[:, None, None, None]
    p = (lev / 1000.0)[None, :, None, None]
    u = 10 * np.cos(phi) + 8 * np.sin(3 * lam + 0.2 * t) * np.cos(2 * phi) * (1.3 - p) + 2 * p
    v = 6 * np.cos(2 * lam - 0.3 * t) * np.sin(3 * phi) * (p - 0.5) + 3 * np.sin(lam) + 0 * t
    la, lo = np.meshgrid(lat, lon, indexing="ij")

    def blob(a: float, b: float, r: float) -> np.ndarray:
        return (la - a) ** 2 + ((lo - b) * np.cos(np.radians(a))) ** 2 < r**2

    mask = np.zeros((len(lev), *la.shape), bool)
    mask[0] = blob(46.0, 9.0, 2.5) | blob(45.6, -3.0, 0.7) | blob(62.0, 10.0, 2.0) | blob(
        40.0, -4.0, 2.0)
    mask[1] = blob(46.0, 9.0, 1.8) | blob(40.0, -4.0, 1.2)
    mask[2] = blob(46.0, 9.0, 1.0)
    dims = ("time", "pressure", "latitude", "longitude")
    shape = (len(times), len(lev), *la.shape)
    ds = xr.Dataset(
        {name: (dims, np.where(mask, np.nan, np.broadcast_to(x, shape)).astype("f4"),
                {"units": "m s-1", "standard_name": standard})
         for name, x, standard in (("u", u, "eastward_wind"), ("v", v, "northward_wind"))},
        coords={"time": times,
                "pressure": ("pressure", lev, {"units": "hPa", "positive": "down",
                                               "standard_name": "air_pressure"}),
                "latitude": ("latitude", lat, {"units": "degrees_north"}),
                "longitude": ("longitude", lon, {"units": "degrees_east"})},
        attrs={"Conventions": "CF-1.11", "title": "invented limited-area winds"})
    ds.to_netcdf(path, encoding={n: {"_FillValue": np.float32(-9999.0)} for n in ("u", "v")})


def _measure(tree: Path, source: Path, out: Path) -> tuple[float, float]:
    env = dict(os.environ, PYTHONPATH=str(tree))
    done = subprocess.run([sys.executable, "-c", CHILD, "circulation", str(source), "-o", str(out),
                           "--box", "45,58,-15,5", "--circle", "52,-5,600", "--obrien"],
                          env=env, cwd=out.parent, check=True, capture_output=True, text=True)
    where, elapsed, peak, code = done.stdout.split()[-4:]
    if Path(where).parent != tree / "flowpipe" or code != "0":
        raise RuntimeError(f"the {tree} side imported {where} or failed ({code})")
    return float(elapsed), float(peak)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--base", default="HEAD~1", help="git revision to compare with")
    parser.add_argument("--rounds", type=int, default=3)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        base = flowpipe_at(args.base, Path(tmp))
        source = Path(tmp) / "lam.nc"
        limited_area_file(source)
        sides = {"base": base, "tree": ROOT}
        got: dict[str, list[tuple[float, float]]] = {s: [] for s in sides}
        print(f"base = {args.base}, tree = {ROOT}; load average {os.getloadavg()[0]:.2f} at start")
        print(f"{'round':>5} {'base s':>8} {'tree s':>8} {'ratio':>6} {'base MiB':>9} "
              f"{'tree MiB':>9} {'ratio':>6}")
        for r in range(args.rounds):
            for side in (sides if r % 2 == 0 else reversed(list(sides))):
                got[side].append(_measure(sides[side], source, Path(tmp) / f"{side}.nc"))
            (bt, bm), (tt, tm) = got["base"][-1], got["tree"][-1]
            print(f"{r:>5} {bt:>8.2f} {tt:>8.2f} {tt / bt:>6.3f} {bm:>9.0f} {tm:>9.0f} "
                  f"{tm / bm:>6.3f}")
        b, t = np.array(got["base"]), np.array(got["tree"])
        print(f"{'median':>6}{np.median(b[:, 0]):>7.2f} {np.median(t[:, 0]):>8.2f} "
              f"{np.median(t[:, 0] / b[:, 0]):>6.3f} {np.median(b[:, 1]):>9.0f} "
              f"{np.median(t[:, 1]):>9.0f} {np.median(t[:, 1] / b[:, 1]):>6.3f}")
        print(f"load average {os.getloadavg()[0]:.2f} at the end")
        with xr.open_dataset(Path(tmp) / "base.nc") as one, \
                xr.open_dataset(Path(tmp) / "tree.nc") as other:
            same = {name: bool(one[name].equals(other[name])) for name in (
                "mean_vorticity_gridded", "mean_divergence_gridded", "circulation")}
        print(f"the same on both sides: {same}")


if __name__ == "__main__":
    main()
