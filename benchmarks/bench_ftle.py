"""FTLE cost and memory against plain advection, measured side by side in one process.

Field: the deformational flow of Nair & Lauritzen (2010) on a 0.5° global
grid at hourly input, built in memory (as ``bench_advect.py`` does). Printed:

* wall time of ``flowpipe.ftle`` for a regular seed grid over 48 h against
  ``flowpipe.advect`` of the very same seeds with the same step (end points
  only); the two run alternately, three times each, and the median of each
  counts (target ratio <= 1.2);
* the peak traced memory (tracemalloc) of ``flowpipe.ftle`` over the same
  23 h of a 24-time and a 96-time hourly series (only the bracketing slices
  should be held; target ratio <= 1.2), median of three alternating runs.

Run: ``.venv/bin/python benchmarks/bench_ftle.py [--seeds N] [--quick]``.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
import tracemalloc
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from reference_winds import deformational_flow, global_grid, series_dataset  # noqa: E402

from flowpipe.ftle import ftle, seed_grid  # noqa: E402
from flowpipe.parcels import advect  # noqa: E402

PERIOD = 12 * 86400.0  # the deformational flow's T
STEP_MINUTES = 7.5
GRID = 0.5


def deformational(ntimes: int):
    lat, lon = global_grid(GRID)
    seconds = np.arange(ntimes) * 3600.0
    return series_dataset(lat, lon, seconds,
                                 lambda a, b, t: deformational_flow(a, b, t, PERIOD))


def spacing_for(seeds: int) -> float:
    """Seed spacing (degrees) of a global grid with about ``seeds`` seeds."""
    return float(np.sqrt(180.0 * 360.0 / seeds))


def cost(seeds: int, hours: float, repeats: int) -> None:
    wind = deformational(int(hours) + 1).load()  # in memory for both sides
    spacing = spacing_for(seeds)
    lat, lon, _ = seed_grid(wind, spacing, None)
    glat, glon = np.meshgrid(lat, lon, indexing="ij")
    points = {"latitude": glat.ravel(), "longitude": glon.ravel()}
    n = glat.size
    advect(wind, [(0.0, 0.0)], 1.0, step_minutes=STEP_MINUTES)  # compile / load the cache
    a_times, f_times = [], []
    for _ in range(repeats):  # alternately: other work on the shared machine
        start = time.perf_counter()
        advect(wind, points, hours, step_minutes=STEP_MINUTES, record_minutes=hours * 60)
        a_times.append(time.perf_counter() - start)
        start = time.perf_counter()
        ftle(wind, hours, spacing=spacing, step_minutes=STEP_MINUTES)
        f_times.append(time.perf_counter() - start)
    a, f = statistics.median(a_times), statistics.median(f_times)
    print(f"cost, {GRID} deg global deformational flow, hourly input, {n} seeds "
          f"(spacing {spacing:.3f} deg), {hours:g} h, step {STEP_MINUTES} min "
          f"(wall seconds, median of {repeats}, alternating)")
    print(f"{'advect':>12} {'ftle':>12} {'ratio':>8}")
    print(f"{a:>12.2f} {f:>12.2f} {f / a:>8.2f}")


def peak_memory(seeds: int, repeats: int) -> None:
    spacing = spacing_for(seeds)
    winds = {ntimes: deformational(ntimes) for ntimes in (24, 96)}
    peaks: dict[int, list[float]] = {24: [], 96: []}
    for _ in range(repeats):
        for ntimes in (24, 96):  # alternately
            tracemalloc.start()
            ftle(winds[ntimes], 23.0, spacing=spacing, step_minutes=STEP_MINUTES)
            peaks[ntimes].append(tracemalloc.get_traced_memory()[1] / 2**20)
            tracemalloc.stop()
    p24, p96 = statistics.median(peaks[24]), statistics.median(peaks[96])
    print(f"peak traced memory of flowpipe.ftle, about {seeds} seeds, 23 h of an hourly series "
          f"(MB, median of {repeats})")
    print(f"{'24 input times':>16} {'96 input times':>16} {'ratio':>8}")
    print(f"{p24:>16.1f} {p96:>16.1f} {p96 / p24:>8.2f}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=1_000_000, help="seeds for the cost table")
    parser.add_argument("--quick", action="store_true", help="smaller sizes, for a smoke run")
    args = parser.parse_args()
    if args.quick:
        cost(10_000, 6.0, 1)
        peak_memory(10_000, 1)
    else:
        cost(args.seeds, 48.0, 3)
        peak_memory(100_000, 3)


if __name__ == "__main__":
    main()
