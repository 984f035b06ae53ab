"""Side-by-side cost and accuracy of the spectral decomposition (ratios, one run).

On one 721 x 1440 (0.25 degree, pole rows) global level carrying a band-limited
analytic wind (the Rossby-Haurwitz wave of Williamson et al. 1992, test case 6,
plus a degree-3 divergent part), it times

* the floor: the bare ducc0 transforms a decomposition needs (one spin-1
  analysis, two spin-1 and four scalar syntheses) on prepared float64 arrays;
* ``flowpipe.decompose`` from an in-memory Dataset to an in-memory Dataset;
* the finite-difference route an analyst would otherwise write: centred
  differences for vorticity and divergence, a second-order Laplacian and
  ``scipy.sparse.linalg.spsolve`` for psi and chi;

and prints their time ratios and the errors of psi and chi against the analytic
fields. Then a 37-level stack, lazy with one level per dask task, gives the
throughput in levels per second and the peak memory relative to the input
(measured in a fresh process).

Run: ``.venv/bin/python benchmarks/bench_decompose.py``
"""

from __future__ import annotations

import multiprocessing
import os
import sys
import threading
import time
from pathlib import Path

import dask
import dask.array
import numpy as np
import psutil
import scipy.sparse
import scipy.sparse.linalg

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from _transforms import floor_transforms  # noqa: E402
from reference_winds import A, case6, mesh, relative_max_error, wind_dataset  # noqa: E402

import flowpipe as fp  # noqa: E402

NLAT, NLON, NLEVELS, REPEATS = 721, 1440, 37, 3
#: Amplitude of the divergent part, m2 s-1.
CHI0 = 2.0e6


def analytic(phi: np.ndarray, lam: np.ndarray) -> dict[str, np.ndarray]:
    """Case 6 plus chi = CHI0 cos^2(phi) sin(phi) cos(2 lambda) (degree 3, order 2)."""
    out = case6(phi, lam)
    c, s = np.cos(phi), np.sin(phi)
    out["chi"] = CHI0 * c**2 * s * np.cos(2 * lam)
    out["u"] = out["u"] - 2 * CHI0 * c * s * np.sin(2 * lam) / A
    out["v"] = out["v"] + CHI0 * (c**3 - 2 * c * s**2) * np.cos(2 * lam) / A
    return out


#: Rounds of floor and decompose, one after the other, for the median ratio.
ALTERNATIONS = 5


def best_of(fn, repeats: int = REPEATS) -> tuple[float, object]:
    best, result = np.inf, None
    for _ in range(repeats):
        start = time.perf_counter()
        result = fn()
        best = min(best, time.perf_counter() - start)
    return best, result


def finite_difference(u: np.ndarray, v: np.ndarray, lat: np.ndarray) -> tuple[np.ndarray, ...]:
    """psi and chi by centred differences and a sparse direct Poisson solve.

    Vorticity and divergence in flux form on the interior rows, the 5-point
    finite-volume Laplacian with no flux through the poles, one equation pinned
    to remove the constant null space, one ``spsolve`` for both right-hand sides.
    """
    phi = np.radians(lat)
    dphi, dlam = phi[1] - phi[0], 2 * np.pi / u.shape[1]
    cos = np.cos(phi)
    inner = slice(1, -1)

    def d_lam(f):
        return (np.roll(f, -1, axis=1) - np.roll(f, 1, axis=1)) / (2 * dlam)

    def d_phi(f):
        return (f[2:] - f[:-2]) / (2 * dphi)

    c = cos[inner, None]
    zeta = (d_lam(v)[inner] - d_phi(u * cos[:, None])) / (A * c)
    delta = (d_lam(u)[inner] + d_phi(v * cos[:, None])) / (A * c)
    nrow, ncol = zeta.shape
    n = nrow * ncol
    index = np.arange(n).reshape(nrow, ncol)
    c_row = cos[inner]
    north_face = np.cos(phi[inner] + dphi / 2)
    south_face = np.cos(phi[inner] - dphi / 2)
    north_face[-1] = 0.0  # no flux through the poles
    south_face[0] = 0.0
    ew = np.repeat(1.0 / (A * c_row * dlam) ** 2, ncol)
    nw = np.repeat(north_face / (A**2 * c_row * dphi**2), ncol)
    sw = np.repeat(south_face / (A**2 * c_row * dphi**2), ncol)
    flat = index.ravel()
    rows = [flat, flat, flat, flat, flat]
    cols = [np.roll(index, -1, axis=1).ravel(), np.roll(index, 1, axis=1).ravel(),
            np.clip(flat + ncol, 0, n - 1), np.clip(flat - ncol, 0, n - 1), flat]
    vals = [ew, ew, nw, sw, -(2 * ew + nw + sw)]
    matrix = scipy.sparse.csr_matrix(
        (np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))), shape=(n, n)).tolil()
    matrix[0, :] = 0.0
    matrix[0, 0] = 1.0
    rhs = np.column_stack([zeta.ravel(), delta.ravel()])
    rhs[0] = 0.0
    solution = scipy.sparse.linalg.spsolve(matrix.tocsc(), rhs)
    return solution[:, 0].reshape(nrow, ncol), solution[:, 1].reshape(nrow, ncol)


def single_level() -> None:
    lat = np.linspace(-90.0, 90.0, NLAT)
    lon, phi, lam = mesh(lat, NLON)
    ref = analytic(phi, lam)
    wind = wind_dataset(ref["u"], ref["v"], lat, lon)
    cores = len(os.sched_getaffinity(0))
    spin_map = np.ascontiguousarray(np.stack([-ref["v"][::-1], ref["u"][::-1]]))

    # the two sides alternately, the median of the per-round ratios (the machine is shared)
    ratios, floors, flows = [], [], []
    for _ in range(ALTERNATIONS):
        floors.append(best_of(lambda: floor_transforms(spin_map, NLAT, NLON, NLAT - 2,
                                                       cores), 1)[0])
        t, parts = best_of(lambda: fp.decompose(wind, method="spectral"), 1)
        flows.append(t)
        ratios.append(flows[-1] / floors[-1])
    t_floor, t_flow = float(np.median(floors)), float(np.median(flows))
    t_fd, (psi_fd, chi_fd) = best_of(lambda: finite_difference(ref["u"], ref["v"], lat), 1)

    errors = {
        "spectral": (relative_max_error(parts["streamfunction"].values[1:-1], ref["psi"][1:-1]),
                     relative_max_error(parts["velocity_potential"].values[1:-1],
                                        ref["chi"][1:-1])),
        "finite-difference": (relative_max_error(psi_fd, ref["psi"][1:-1]),
                              relative_max_error(chi_fd, ref["chi"][1:-1])),
    }
    print(f"one {NLAT} x {NLON} level (CC, T{NLAT - 2}), {cores} cores, medians of "
          f"{ALTERNATIONS} alternating rounds")
    print(f"  floor (bare ducc0 transforms)  {t_floor:8.3f} s   1.00")
    print(f"  flowpipe.decompose             {t_flow:8.3f} s   {np.median(ratios):.2f} x floor"
          "   (target <= 1.2)")
    print(f"  finite differences + spsolve   {t_fd:8.3f} s   {t_fd / t_flow:.1f} x decompose"
          "   (target >= 20)")
    print("  relative max error (mean removed), psi / chi, Williamson case 6 + degree-3 chi:")
    for name, (e_psi, e_chi) in errors.items():
        print(f"    {name:18s} {e_psi:9.2e} / {e_chi:9.2e}")
    gain = min(errors["finite-difference"][0] / errors["spectral"][0],
               errors["finite-difference"][1] / errors["spectral"][1])
    print(f"  accuracy gain of spectral over finite differences: {gain:.1e} (target >= 1e6)")
    print(f"  reconstruction error attribute: {parts.attrs['reconstruction_error']:.2e}")


class _Discard:
    """A store target that drops what it receives (stands for a streaming writer)."""

    def __setitem__(self, key, value) -> None:
        pass


def _stack_worker(queue) -> None:
    process = psutil.Process()
    baseline = process.memory_info().rss
    lat = np.linspace(-90.0, 90.0, NLAT)
    lon, phi, lam = mesh(lat, NLON)
    ref = analytic(phi, lam)
    factors = 1.0 + 0.01 * np.arange(NLEVELS)[:, None, None]
    u, v = ref["u"][None] * factors, ref["v"][None] * factors
    del ref, phi, lam
    input_bytes = u.nbytes + v.nbytes
    wind = wind_dataset(u, v, lat, lon, levels=np.linspace(1000.0, 100.0, NLEVELS))
    wind = wind.chunk({"level": 1})
    peak = [process.memory_info().rss]
    done = threading.Event()

    def sample() -> None:
        while not done.is_set():
            peak[0] = max(peak[0], process.memory_info().rss)
            time.sleep(0.02)

    sampler = threading.Thread(target=sample)
    sampler.start()
    start = time.perf_counter()
    parts = fp.decompose(wind, method="spectral")
    arrays = [parts[name].data for name in parts.data_vars]
    dask.array.store(arrays, [_Discard() for _ in arrays], lock=False)
    elapsed = time.perf_counter() - start
    done.set()
    sampler.join()
    queue.put((elapsed, (peak[0] - baseline) / input_bytes, input_bytes))


def level_stack() -> None:
    context = multiprocessing.get_context("spawn")
    queue = context.Queue()
    worker = context.Process(target=_stack_worker, args=(queue,))
    worker.start()
    elapsed, memory_ratio, input_bytes = queue.get()
    worker.join()
    print(f"{NLEVELS}-level stack, lazy (one level per dask task), results streamed to a sink")
    print(f"  throughput   {NLEVELS / elapsed:6.2f} levels per second ({elapsed:.1f} s)")
    print(f"  peak memory  {memory_ratio:6.2f} x the input ({input_bytes / 2**20:.0f} MiB, input "
          "included; target <= 4)")


def main() -> None:
    single_level()
    level_stack()


if __name__ == "__main__":
    main()
