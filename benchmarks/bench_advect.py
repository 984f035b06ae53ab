"""Trajectory speed, accuracy and memory, measured side by side in one process.

Baseline: the route an analyst would otherwise write, a vectorised NumPy
classical Runge-Kutta step with bilinear interpolation of the Cartesian wind
components (linear in time between input slices held in memory), coded
below. Both advance the same parcels with the same step through the same 1°
global time-dependent field (the deformational flow of Nair & Lauritzen 2010
at hourly input). Printed:

* parcel-steps per second at 1e4, 1e5 and 1e6 parcels, and the ratio
  (flowpipe end to end: start checks, slice preparation, output Dataset;
  the baseline from its Cartesian wind preparation to its end points;
  the two run alternately and the best of three runs of each counts, so
  that other work on a shared machine disturbs the ratio less; target >= 10);
* the great-circle return error of each after one revolution of Williamson
  et al. (1992) test case 1 (alpha = pi/2 - 0.05) with the same step;
* the peak traced memory of ``flowpipe.advect`` over the same 23 hours of
  a 24-time and a 240-time hourly series (only the bracketing slices should
  be read; target ratio <= 1.2).

Run: ``.venv/bin/python benchmarks/bench_advect.py [--quick]``.
"""

from __future__ import annotations

import argparse
import sys
import time
import tracemalloc
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from reference_winds import (  # noqa: E402
    deformational_flow,
    global_grid,
    series_dataset,
    solid_body_rotation,
)

from flowpipe.constants import EARTH_RADIUS  # noqa: E402
from flowpipe.parcels import advect  # noqa: E402
from flowpipe.parcels._geometry import cartesian_wind, great_circle_distance, unit_vectors

PERIOD = 12 * 86400.0  # the deformational flow's T and test case 1's revolution
STEP_MINUTES = 7.5


def fibonacci_points(n: int) -> tuple[np.ndarray, np.ndarray]:
    """Nearly uniform points on the sphere (golden-angle spiral, common practice)."""
    i = np.arange(n) + 0.5
    return np.degrees(np.arcsin(1 - 2 * i / n)), np.mod(i * 180.0 * (3 - np.sqrt(5)), 360.0)


class Baseline:
    """Vectorised NumPy RK4 with bilinear interpolation of Cartesian wind components."""

    def __init__(self, wind):
        self.lat = wind["latitude"].values
        self.lon = wind["longitude"].values
        u = wind["u"].values  # the whole series in memory, as a script would load it
        v = wind["v"].values
        self.field = cartesian_wind(u, v, self.lat, self.lon)  # (time, lat, lon, 3)
        t = wind["time"].values
        self.seconds = (t - t[0]) / np.timedelta64(1, "s") if t.size > 1 else np.zeros(1)

    def velocity(self, p: np.ndarray, t: float) -> np.ndarray:
        if self.seconds.size > 1:
            k = min(int(np.searchsorted(self.seconds, t, side="right")) - 1, self.seconds.size - 2)
            w = (t - self.seconds[k]) / (self.seconds[k + 1] - self.seconds[k])
            f0, f1 = self.field[k], self.field[k + 1]
        else:
            w, f0, f1 = 0.0, self.field[0], self.field[0]
        q = p / np.linalg.norm(p, axis=1, keepdims=True)
        lat = np.degrees(np.arcsin(np.clip(q[:, 2], -1, 1)))
        lon = np.mod(np.degrees(np.arctan2(q[:, 1], q[:, 0])), 360.0)
        dlat, dlon = self.lat[1] - self.lat[0], self.lon[1] - self.lon[0]
        fy = (lat - self.lat[0]) / dlat
        j = np.clip(np.floor(fy).astype(int), 0, self.lat.size - 2)
        fy = (fy - j)[:, None]
        fx = lon / dlon
        i = np.floor(fx).astype(int) % self.lon.size
        fx = (fx - np.floor(fx))[:, None]
        i1 = (i + 1) % self.lon.size
        v = np.zeros_like(p)
        for field, weight in ((f0, 1 - w), (f1, w)):
            v += weight * ((1 - fy) * ((1 - fx) * field[j, i] + fx * field[j, i1])
                           + fy * ((1 - fx) * field[j + 1, i] + fx * field[j + 1, i1]))
        radial = np.sum(v * q, axis=1, keepdims=True)
        return (v - radial * q) / EARTH_RADIUS

    def run(self, lat, lon, t0: float, h: float, nsteps: int) -> np.ndarray:
        p = unit_vectors(lat, lon)
        t = t0
        for _ in range(nsteps):
            k1 = self.velocity(p, t)
            k2 = self.velocity(p + 0.5 * h * k1, t + 0.5 * h)
            k3 = self.velocity(p + 0.5 * h * k2, t + 0.5 * h)
            k4 = self.velocity(p + h * k3, t + h)
            p = p + h / 6 * (k1 + 2 * k2 + 2 * k3 + k4)
            p /= np.linalg.norm(p, axis=1, keepdims=True)
            t += h
        return p


def deformational(ntimes: int):
    lat, lon = global_grid(1.0)
    seconds = np.arange(ntimes) * 3600.0
    return series_dataset(lat, lon, seconds,
                                 lambda a, b, t: deformational_flow(a, b, t, PERIOD))


def throughput(sizes, hours: float, repeats: int) -> None:
    # The same field in memory for both, so that neither pays for computing it.
    wind = deformational(int(hours) + 1).load()
    nsteps = round(hours * 60 / STEP_MINUTES)
    advect(wind, [(0.0, 0.0)], hours, step_minutes=STEP_MINUTES)  # compile / load the cache
    print(f"throughput, 1 deg global deformational flow, hourly input, step {STEP_MINUTES} min, "
          f"{nsteps} steps (parcel-steps per second, best of {repeats})")
    print(f"{'parcels':>10} {'flowpipe':>12} {'baseline':>12} {'ratio':>8}")
    for n in sizes:
        lat, lon = fibonacci_points(n)
        fast = slow = 0.0
        for _ in range(repeats):  # alternately, best of each: other work on the machine
            start = time.perf_counter()
            advect(wind, {"latitude": lat, "longitude": lon}, hours,
                   step_minutes=STEP_MINUTES, record_minutes=hours * 60)
            fast = max(fast, n * nsteps / (time.perf_counter() - start))
            start = time.perf_counter()  # both timed from the wind in memory to the end points
            Baseline(wind).run(lat, lon, 0.0, STEP_MINUTES * 60, nsteps)
            slow = max(slow, n * nsteps / (time.perf_counter() - start))
        print(f"{n:>10.0e} {fast:>12.3e} {slow:>12.3e} {fast / slow:>8.1f}")


def return_errors(n: int) -> None:
    lat, lon = global_grid(1.0)
    alpha = np.pi / 2 - 0.05
    u, v = solid_body_rotation(lat, lon, alpha)
    wind = series_dataset(lat, lon, np.zeros(1), lambda a, b, t: (u, v))
    plat, plon = fibonacci_points(n)
    hours = PERIOD / 3600
    tracks = advect(wind, {"latitude": plat, "longitude": plon}, hours, steady=True,
                    step_minutes=STEP_MINUTES, record_minutes=hours * 60)
    fast = great_circle_distance(plat, plon, tracks["latitude"].values[:, -1],
                                 tracks["longitude"].values[:, -1], EARTH_RADIUS) / 1e3
    p = Baseline(wind).run(plat, plon, 0.0, STEP_MINUTES * 60, round(hours * 60 / STEP_MINUTES))
    blat = np.degrees(np.arcsin(p[:, 2]))
    blon = np.degrees(np.arctan2(p[:, 1], p[:, 0]))
    slow = great_circle_distance(plat, plon, blat, blon, EARTH_RADIUS) / 1e3
    print(f"return error, Williamson et al. (1992) test case 1, alpha = pi/2 - 0.05, {n} parcels, "
          "one revolution (km)")
    print(f"{'':>10} {'flowpipe':>12} {'baseline':>12}")
    print(f"{'max':>10} {fast.max():>12.3f} {slow.max():>12.3f}")
    print(f"{'mean':>10} {fast.mean():>12.3f} {slow.mean():>12.3f}")


def peak_memory(n: int) -> None:
    print(f"peak traced memory of flowpipe.advect, {n} parcels, 23 h of an hourly series (MB)")
    peaks = []
    for ntimes in (24, 240):
        wind = deformational(ntimes)
        plat, plon = fibonacci_points(n)
        tracemalloc.start()
        advect(wind, {"latitude": plat, "longitude": plon}, 23.0, step_minutes=STEP_MINUTES)
        peaks.append(tracemalloc.get_traced_memory()[1] / 2**20)
        tracemalloc.stop()
        print(f"{ntimes:>10} input times {peaks[-1]:>10.1f}")
    print(f"{'ratio':>10} 240/24      {peaks[1] / peaks[0]:>10.2f}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smaller sizes, for a smoke run")
    args = parser.parse_args()
    sizes = (10_000, 100_000) if args.quick else (10_000, 100_000, 1_000_000)
    throughput(sizes, hours=1.0 if args.quick else 3.0, repeats=1 if args.quick else 3)
    return_errors(1000)
    peak_memory(1000)


if __name__ == "__main__":
    main()
