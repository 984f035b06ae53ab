"""Regional decomposition: flowpipe against the from-scratch sparse route, side by side.

One process, one grid (1000 x 1000 by default), the same smooth wind at 37 levels
(each level differs: the vortices and sources move and change strength):

* baseline: what an analyst would write - a five-point spherical Laplacian with
  zero boundary values built with scipy.sparse, vorticity and divergence by
  ``numpy.gradient``, and two ``scipy.sparse.linalg.spsolve`` calls per level,
  from scratch each time. It is timed on ``--baseline-levels`` levels (default 1)
  and scaled per level, as the output says;
* flowpipe: ``decompose_regional`` with each scheme, first on one level with an
  empty cache (the build included), then on all levels (built once, reused);
* for information, one smaller level with a block below the ground
  (``--masked-n``), where the variational iterations are far more numerous.

Everything runs single-threaded (dask's synchronous scheduler, one BLAS/FFT
thread), so the ratios compare algorithms, not cores. Peak memory: the
largest resident-set growth during each run, sampled every 20 ms (psutil; it
sees SuperLU's own allocations), and the tracemalloc peak (NumPy and Python
allocations only).

    python benchmarks/bench_regional.py [--n 1000] [--levels 37] [--baseline-levels 1]
                                        [--masked-n 300]
"""

from __future__ import annotations

import argparse
import os
import threading
import time
import tracemalloc

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

import dask  # noqa: E402
import numpy as np  # noqa: E402
import psutil  # noqa: E402
import scipy.sparse as sp  # noqa: E402
import scipy.sparse.linalg as spla  # noqa: E402
import xarray as xr  # noqa: E402

from flowpipe import regional  # noqa: E402
from flowpipe.constants import EARTH_RADIUS as A  # noqa: E402


def smooth_wind(lat: np.ndarray, lon: np.ndarray, level: int) -> tuple[np.ndarray, np.ndarray]:
    """Three vortices, two sources and a background flow; closed-form winds."""
    phi = np.radians(lat)[:, None]
    lam = np.radians(lon)[None, :]
    rng = np.random.default_rng(level)
    u = np.full((lat.size, lon.size), 8.0 + 0.1 * level)
    v = np.full((lat.size, lon.size), -3.0)
    for kind, amplitude in (("psi", 4e7), ("psi", -3e7), ("psi", 2e7), ("chi", 1e7), ("chi", -8e6)):
        phi0 = np.radians(rng.uniform(lat[0] + 10, lat[-1] - 10))
        lam0 = np.radians(rng.uniform(lon[0] + 10, lon[-1] - 10))
        width = np.radians(rng.uniform(3.0, 6.0))
        x = (lam - lam0) * np.cos(phi0)
        y = phi - phi0
        f = amplitude * (0.9 + 0.01 * level) * np.exp(-(x**2 + y**2) / width**2)
        f_phi = -2 * y / width**2 * f
        f_lam = -2 * x * np.cos(phi0) / width**2 * f
        if kind == "psi":
            u += -f_phi / A
            v += f_lam / (A * np.cos(phi))
        else:
            u += f_lam / (A * np.cos(phi))
            v += f_phi / A
    return u, v


def baseline_level(lat: np.ndarray, lon: np.ndarray, u: np.ndarray, v: np.ndarray) -> None:
    """Two from-scratch sparse Poisson solves (zero boundary values), as an analyst would."""
    phi = np.radians(lat)
    lam = np.radians(lon)
    cos = np.cos(phi)[:, None]
    zeta = (np.gradient(v, lam, axis=1) - np.gradient(u * cos, phi, axis=0)) / (A * cos)
    delta = (np.gradient(u, lam, axis=1) + np.gradient(v * cos, phi, axis=0)) / (A * cos)
    ny, nx = lat.size - 2, lon.size - 2
    dphi, dlam = phi[1] - phi[0], lam[1] - lam[0]
    c = np.cos(phi[1:-1])
    c_n, c_s = np.cos(phi[1:-1] + dphi / 2), np.cos(phi[1:-1] - dphi / 2)
    for rhs in (zeta, delta):
        north = np.repeat(c_n / (c * A**2 * dphi**2), nx)
        south = np.repeat(c_s / (c * A**2 * dphi**2), nx)
        east = np.repeat(1 / (A * c * dlam) ** 2, nx)
        centre = -(north + south + 2 * east)
        east_off = east[:-1].copy()
        east_off[np.arange(1, ny * nx) % nx == 0] = 0.0
        lap = sp.diags_array([south[nx:], east_off, centre, east_off, north[:-nx]],
                             offsets=[-nx, -1, 0, 1, nx], format="csc")
        spla.spsolve(lap, rhs[1:-1, 1:-1].ravel())


class PeakMemory:
    """Largest resident-set growth while the block runs, sampled every 20 ms."""

    def __enter__(self):
        self._process = psutil.Process()
        self._start = self._process.memory_info().rss
        self.peak = 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._sample, daemon=True)
        self._thread.start()
        return self

    def _sample(self):
        while not self._stop.wait(0.02):
            self.peak = max(self.peak, self._process.memory_info().rss - self._start)

    def __exit__(self, *exc):
        self._stop.set()
        self._thread.join()
        self.peak = max(self.peak, self._process.memory_info().rss - self._start)


def timed(function):
    """Seconds, peak RSS growth (MiB), tracemalloc peak (MiB) and the result of a call."""
    tracemalloc.reset_peak()
    before = tracemalloc.get_traced_memory()[0]
    with PeakMemory() as memory:
        start = time.perf_counter()
        result = function()
        seconds = time.perf_counter() - start
    traced = (tracemalloc.get_traced_memory()[1] - before) / 2**20
    return seconds, memory.peak / 2**20, traced, result


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=1000, help="grid points per side")
    parser.add_argument("--levels", type=int, default=37)
    parser.add_argument("--baseline-levels", type=int, default=1)
    parser.add_argument("--masked-n", type=int, default=300,
                        help="size of the extra masked level (0: skip)")
    args = parser.parse_args()
    n = args.n
    lat = np.linspace(20.0, 70.0, n)
    lon = np.linspace(-30.0, 20.0, n)
    winds = [smooth_wind(lat, lon, k) for k in range(args.levels)]
    u = np.stack([w[0] for w in winds])
    v = np.stack([w[1] for w in winds])
    coords = {"level": np.arange(args.levels, dtype=float), "latitude": lat, "longitude": lon}
    dims = ("level", "latitude", "longitude")
    wind = xr.Dataset({"u": (dims, u), "v": (dims, v)}, coords=coords).chunk({"level": 1})
    one = wind.isel(level=[0]).compute()

    print(f"grid {n} x {n} ({lat[1] - lat[0]:.3f} deg), {args.levels} levels, single-threaded")
    tracemalloc.start()
    t_base, m_base, tm_base, _ = timed(lambda: [baseline_level(lat, lon, u[k], v[k])
                                       for k in range(args.baseline_levels)])
    base_level = t_base / args.baseline_levels
    print(f"baseline (2 x spsolve per level): {base_level:8.2f} s per level, "
          f"{base_level / 2:8.2f} s per Poisson solve, peak RSS +{m_base:,.0f} MiB, traced "
          f"{tm_base:,.0f} MiB "
          f"(timed on {args.baseline_levels} level(s), scaled to {args.levels}: "
          f"{base_level * args.levels:,.0f} s)")
    for scheme in regional.SCHEMES:
        regional.cache.clear()
        with dask.config.set(scheduler="synchronous"):
            t_first, m_first, tm_first, out1 = timed(lambda s=scheme: regional.decompose_regional(
                one, scheme=s))
            regional.cache.clear()
            t_all, m_all, tm_all, out = timed(lambda s=scheme: regional.decompose_regional(
                wind, scheme=s).compute())
        per_level = t_all / args.levels
        iterations = out["iterations"].values
        print(f"{scheme:>11}: first level {t_first:7.2f} s "
              f"= {t_first / (base_level / 2):5.2f} x one baseline Poisson solve (target <= 3); "
              f"{args.levels} levels {t_all:7.1f} s, {per_level:6.2f} s per level "
              f"= {per_level / base_level:5.2f} x baseline per level (target <= 0.5); "
              f"peak RSS +{max(m_first, m_all):,.0f} MiB, traced {max(tm_first, tm_all):,.0f} MiB; "
              f"iterations {iterations.min():.0f}-"
              f"{iterations.max():.0f}; worst reconstruction error "
              f"{float(out['reconstruction_error'].max()):.1e}")
        del out, out1
    if args.masked_n:
        masked_level(args.masked_n)


def masked_level(n: int) -> None:
    """For information: one level with a block below the ground, variational, vs the baseline."""
    lat = np.linspace(20.0, 70.0, n)
    lon = np.linspace(-30.0, 20.0, n)
    u, v = smooth_wind(lat, lon, 0)
    t_base, _, _, _ = timed(lambda: baseline_level(lat, lon, u, v))
    ground = (lat[:, None] > 30) & (lat[:, None] < 35) & (lon[None, :] > -5) & (lon[None, :] < 5)
    u[ground] = np.nan
    v[ground] = np.nan
    dims = ("latitude", "longitude")
    wind = xr.Dataset({"u": (dims, u), "v": (dims, v)}, coords={"latitude": lat, "longitude": lon})
    regional.cache.clear()
    t_first, m_first, _, out = timed(lambda: regional.decompose_regional(wind))
    t_again, _, _, _ = timed(lambda: regional.decompose_regional(wind))
    print(f"masked {n} x {n} (block below ground), variational: first level {t_first:6.2f} s "
          f"= {t_first / (t_base / 2):5.2f} x one baseline Poisson solve on the unmasked grid; "
          f"again {t_again:6.2f} s = {t_again / t_base:5.2f} x baseline per level; "
          f"{out.attrs['iterations']:.0f} iterations; peak RSS +{m_first:,.0f} MiB")


if __name__ == "__main__":
    main()
