"""Cost of the spectral route for masked global levels against the transform floor.

On global equiangular levels with pole rows (1, 0.5 and 0.25 degree) carrying a wind
whose kinetic-energy spectrum falls as l^-3 (random spherical-harmonic coefficients of
psi and chi, synthesised with ducc0), masked by an orography-like mask (a wavy
Antarctica south of about 80S and several blobs, 5-10 % of the points), it times per
level, alternating the sides, median of 5:

* the floor: the bare ducc0 transforms a decomposition needs (one spin-1 analysis,
  two spin-1 and four scalar syntheses) on prepared float64 arrays of the same grid;
* ``flowpipe.decompose`` (method ``auto``, which takes the masked spectral route: harmonic
  fill, transforms, masking again, the unresolved remainder), in-memory Dataset to
  in-memory Dataset, after one untimed warm-up call;

and prints their ratio (issue target <= 10, aim about 3), the largest misfit of
rotational + divergent + unresolved at the valid points (target 1e-6) and the size of the
unresolved part alone. The regional route (``method="regional"``) is timed once at 1 degree.

Limited area (issue target: a masked level <= 3x the same level unmasked, both schemes):
the smooth wind of ``bench_regional.py`` on an ``N x N`` box (default 1000 x 1000, 20-70N,
30W-20E) with a terrain-like mask (a disc of 6 degrees radius and a ridge, about 7.5 % of
the points), ``decompose_regional`` with each scheme on the unmasked and the masked level,
each timed twice per round, sides alternated: with an empty solver cache (``first``: the
build included) and again (``again``: the solver reused, the cost of every later level
and time). It prints the median of each, the iterations and the reconstruction error
beside each time, and the masked / unmasked ratios side by side.

Run: ``.venv/bin/python benchmarks/bench_masked.py [--global 1,0.5,0.25]
[--limited-n 1000] [--limited-repeats 1]`` (``--global ""`` or ``--limited-n 0`` skips a part)
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from functools import partial
from pathlib import Path

import numpy as np
import xarray as xr

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from _transforms import floor_transforms  # noqa: E402
from reference_winds import A, mesh, wind_dataset  # noqa: E402

import flowpipe as fp  # noqa: E402
from flowpipe import regional, spectral  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_regional import smooth_wind  # noqa: E402

REPEATS = 5
NTHREADS = len(os.sched_getaffinity(0))


def random_wind(nlat: int, nlon: int, seed: int = 1) -> tuple[np.ndarray, np.ndarray]:
    """u, v from psi, chi with |c_lm| ~ l^-3 (so E(l) ~ l^-3), chi 0.3 times psi."""
    n = spectral.max_truncation("CC", nlat, nlon)
    rng = np.random.default_rng(seed)
    ell = spectral.degrees(n).astype(float)
    amp = np.where(ell > 0, np.maximum(ell, 1.0) ** -3.0, 0.0) * 5e7
    def coeffs():
        c = (rng.standard_normal(ell.size) + 1j * rng.standard_normal(ell.size)) * amp
        c[spectral.orders(n) == 0] = c[spectral.orders(n) == 0].real
        return c
    psi, chi = coeffs(), 0.3 * coeffs()
    grid = {"geometry": "CC", "nlat": nlat, "nlon": nlon, "truncation": n}
    gradient = np.sqrt(ell * (ell + 1.0)) / A  # curl and gradient coefficients of the wind
    u_rot, v_rot = spectral.rotational_wind(gradient * psi, **grid)
    u_div, v_div = spectral.divergent_wind(gradient * chi, **grid)
    return u_rot + u_div, v_rot + v_div


def orography_mask(phi: np.ndarray, lam: np.ndarray) -> np.ndarray:
    """Wavy Antarctica (south of 80S +- 2 degrees) and blobs of 6-12 degrees radius."""
    mask = np.degrees(phi) < -80.0 + 2.0 * np.sin(3 * lam)
    for lat0, lon0, radius in ((35, 90, 12), (40, 255, 10), (-20, 292, 7), (5, 30, 6),
                               (62, 300, 9), (-25, 135, 12)):
        p0, l0 = np.radians(lat0), np.radians(lon0)
        cosd = np.sin(phi) * np.sin(p0) + np.cos(phi) * np.cos(p0) * np.cos(lam - l0)
        mask |= np.degrees(np.arccos(np.clip(cosd, -1.0, 1.0))) < radius
    return mask


def timed(fn) -> tuple[float, object]:
    start = time.perf_counter()
    out = fn()
    return time.perf_counter() - start, out


def main(resolutions=(1.0, 0.5, 0.25)) -> None:
    print(f"threads for ducc0: {NTHREADS}; per level, median of {REPEATS}, sides alternated")
    for step in resolutions:
        nlat, nlon = int(round(180 / step)) + 1, int(round(360 / step))
        lat = np.linspace(-90.0, 90.0, nlat)
        lon, phi, lam = mesh(lat, nlon)
        u, v = random_wind(nlat, nlon)
        mask = orography_mask(phi, lam)
        wind = wind_dataset(np.where(mask, np.nan, u), np.where(mask, np.nan, v), lat, lon)
        spin_map = np.stack([-v[::-1], u[::-1]]).copy()
        lmax = spectral.max_truncation("CC", nlat, nlon)
        floors, routes, parts = [], [], fp.decompose(wind)  # warm-up, untimed
        for k in range(REPEATS):
            floor = partial(floor_transforms, spin_map, nlat, nlon, lmax, NTHREADS)
            route = partial(fp.decompose, wind)
            for side in ((floor, route) if k % 2 == 0 else (route, floor)):
                t, out = timed(side)
                (floors if side is floor else routes).append(t)
                parts = out if side is route else parts
        f, r = float(np.median(floors)), float(np.median(routes))
        scale = np.max(np.hypot(u, v)[~mask])
        rest_u, rest_v = parts["u_unresolved"].values, parts["v_unresolved"].values
        du = parts["u_rotational"].values + parts["u_divergent"].values + rest_u - u
        dv = parts["v_rotational"].values + parts["v_divergent"].values + rest_v - v
        worst = np.nanmax(np.hypot(du, dv)[~mask]) / scale
        rest = np.nanmax(np.hypot(rest_u, rest_v)[~mask]) / scale
        print(f"{step:g} deg {nlat}x{nlon}, masked {mask.mean():.1%} of points: "
              f"floor {f * 1e3:.1f} ms, masked spectral {r * 1e3:.1f} ms, ratio {r / f:.1f}x "
              f"({parts.attrs['method']}); rot+div+unresolved max misfit {worst:.1e}; "
              f"unresolved max {rest:.1e}, 2-norm "
              f"{float(parts.attrs['unresolved_fraction']):.1e}")
        if step == 1.0:
            t, reg = timed(partial(fp.decompose, wind, method="regional"))
            du = reg["u_rotational"].values + reg["u_divergent"].values - u
            dv = reg["v_rotational"].values + reg["v_divergent"].values - v
            worst = np.nanmax(np.hypot(du, dv)[~mask]) / np.max(np.hypot(u, v)[~mask])
            print(f"  regional route once at 1 deg: {t * 1e3:.1f} ms "
                  f"({t / f:.1f}x the floor), reconstruction max error {worst:.2e}")


def terrain_mask(lat: np.ndarray, lon: np.ndarray) -> np.ndarray:
    """A disc of 6 degrees radius at 45N 5W and a ridge 1.5 degrees wide along 60N, 15W-5E."""
    y, x = lat[:, None], lon[None, :]
    disc = (y - 45.0) ** 2 + ((x + 5.0) * np.cos(np.radians(45.0))) ** 2 < 6.0**2
    return disc | ((np.abs(y - 60.0) < 0.75) & (x > -15.0) & (x < 5.0))


def limited_area(n: int, repeats: int) -> None:
    """The masked and the unmasked limited-area level, both schemes, side by side."""
    lat, lon = np.linspace(20.0, 70.0, n), np.linspace(-30.0, 20.0, n)
    u, v = smooth_wind(lat, lon, 0)
    mask = terrain_mask(lat, lon)
    dims = ("latitude", "longitude")
    levels = {name: xr.Dataset({"u": (dims, np.where(m, np.nan, u)),
                                "v": (dims, np.where(m, np.nan, v))},
                               coords={"latitude": lat, "longitude": lon})
              for name, m in (("unmasked", np.zeros_like(mask)), ("masked", mask))}
    print(f"limited area {n}x{n}, masked {mask.mean():.1%} of points; per level, median of "
          f"{repeats}, sides alternated")
    for scheme in regional.SCHEMES:
        times: dict[str, dict[str, list[float]]] = {k: {"first": [], "again": []} for k in levels}
        figures = {}
        for k in range(repeats):
            for name in (("unmasked", "masked") if k % 2 == 0 else ("masked", "unmasked")):
                regional.cache.clear()
                for when in ("first", "again"):
                    t, out = timed(partial(regional.decompose_regional, levels[name],
                                           scheme=scheme))
                    times[name][when].append(t)
                figures[name] = (out.attrs["iterations"], out.attrs["reconstruction_error"],
                                 out.attrs["solver"])
        med = {name: {when: float(np.median(t)) for when, t in sides.items()}
               for name, sides in times.items()}
        for name in levels:
            iterations, error, solver = figures[name]
            print(f"  {scheme:>11} {name:>8}: first {med[name]['first']:7.2f} s, again "
                  f"{med[name]['again']:7.2f} s; {iterations:.0f} iterations, reconstruction "
                  f"error {error:.1e}; {solver}")
        print(f"  {scheme:>11} masked / unmasked: first "
              f"{med['masked']['first'] / med['unmasked']['first']:.2f}x, again "
              f"{med['masked']['again'] / med['unmasked']['again']:.2f}x (target <= 3)")


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--global", dest="resolutions", default="1,0.5,0.25",
                        help="global resolutions in degrees, comma-separated ('' to skip)")
    parser.add_argument("--limited-n", type=int, default=1000,
                        help="points per side of the limited area (0 to skip)")
    parser.add_argument("--limited-repeats", type=int, default=1)
    args = parser.parse_args()
    if args.resolutions:
        main(tuple(float(step) for step in args.resolutions.split(",")))
    if args.limited_n:
        limited_area(args.limited_n, args.limited_repeats)
