"""Circulation: line + area integrals of many circles against reading the file's slabs.

Makes a global file (u, v, vorticity, divergence) in a temporary directory, then
alternately (a) reads every slab of the four fields and (b) reads them and applies the
precomputed sparse line and area matrices of all circles with the function the
circulation stage runs on each slab (``contours._slab_integrals``: four sparse mat-vecs).
Prints both medians and their ratio. Usage: bench_circulation.py [RES_DEG LEVELS CIRCLES]
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

import netCDF4
import numpy as np

from flowpipe import contours as C


def main() -> None:
    res, nlev, ncirc = (float(sys.argv[1]), int(sys.argv[2]), int(sys.argv[3])) if len(
        sys.argv) > 3 else (0.25, 37, 1000)
    lat = np.linspace(-90, 90, int(round(180 / res)) + 1)
    lon = np.arange(0, 360, res)
    rng = np.random.default_rng(1)
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "wind.nc"
        with netCDF4.Dataset(path, "w") as nc:
            nc.createDimension("level", nlev)
            nc.createDimension("latitude", len(lat))
            nc.createDimension("longitude", len(lon))
            for name in ("u", "v", "vorticity", "divergence"):
                var = nc.createVariable(name, "f4", ("level", "latitude", "longitude"),
                                        chunksizes=(1, len(lat), len(lon)))
                for k in range(nlev):
                    var[k] = rng.standard_normal((len(lat), len(lon))).astype("f4")
        grid = C._Grid(lat, lon)
        circles = [C.circle(float(a), float(b), 300.0) for a, b in
                   zip(rng.uniform(-80, 80, ncirc), rng.uniform(0, 360, ncirc), strict=True)]
        t0 = time.perf_counter()
        lines, areas, _ = C._matrices(grid, circles, None)
        build = time.perf_counter() - t0

        def read(apply: bool) -> float:
            t = time.perf_counter()
            with netCDF4.Dataset(path) as nc:
                nc.set_auto_mask(False)  # plain arrays, as the stage gets them through xarray
                for k in range(nlev):
                    u, v, z, d = (nc[n][k].astype(np.float64)
                                  for n in ("u", "v", "vorticity", "divergence"))
                    if apply:
                        C._slab_integrals(u, v, z, d, 0, lines=lines, areas=areas)
            return time.perf_counter() - t

        only, both = [], []
        for _ in range(5):
            only.append(read(False))
            both.append(read(True))
        r, b = np.median(only), np.median(both)
        print(f"grid {res} deg, {nlev} levels, {ncirc} circles of 300 km; matrices built once in "
              f"{build:.1f} s")
        print(f"read slabs: {r:.3f} s   read + line + area integrals: {b:.3f} s   "
              f"ratio {b / r:.2f} (median of 5, alternating)")


if __name__ == "__main__":
    main()
