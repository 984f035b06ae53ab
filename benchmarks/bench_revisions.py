"""Trajectory kernels of the working tree against another revision, side by side in one run.

The other revision's ``flowpipe/`` is extracted from git (``git archive``) to
a temporary directory; each measurement runs in a fresh process of its own,
the two sides alternately, with its own numba cache directory
(``NUMBA_CACHE_DIR``) and one thread (``NUMBA_NUM_THREADS=1``). Times are
processor seconds of the process (``time.process_time``), which other work
on a shared machine disturbs less than the wall clock. Printed per round and
as medians:

* compile: the first ``flowpipe.advect`` call of a process whose numba cache
  is empty (the kernels compiled, nothing loaded from the cache), and the
  number of loops LLVM reports as vectorised while compiling them
  (``--pass-remarks=loop-vectorize``; the same on both sides when the
  kernels' loops still run in SIMD lanes);
* global: ``advect`` of the deformational flow of Nair & Lauritzen (2010) on
  a 1 deg global grid at hourly input, classical Runge-Kutta (the
  throughput case of ``bench_advect.py``), after a warm-up call (seconds,
  best of three within the process);
* limited: the same field cut to 60S-60N, 30E-150E (a limited area, so the
  limited-area cell search and the edge checks run), Petterssen's scheme, a
  quarter of the parcels.

The ratio is working tree / other revision: above 1 the working tree is slower.

Run: ``.venv/bin/python benchmarks/bench_revisions.py [--base main] [--rounds 3]``.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from _revisions import ROOT, flowpipe_at

PARCELS = 100_000
HOURS = 3.0
STEP_MINUTES = 7.5
PERIOD = 12 * 86400.0


def _wind():
    sys.path.insert(0, str(ROOT / "tests"))
    import numpy as np
    from reference_winds import deformational_flow, global_grid, series_dataset

    lat, lon = global_grid(1.0)
    return series_dataset(lat, lon, np.arange(int(HOURS) + 1) * 3600.0,
                          lambda a, b, t: deformational_flow(a, b, t, PERIOD)).load()


def _points(n: int, lat_range: tuple[float, float], lon_range: tuple[float, float]):
    """Nearly uniform points in a latitude-longitude box (golden-angle spiral, common practice)."""
    import numpy as np

    i = np.arange(n) + 0.5
    s0, s1 = np.sin(np.radians(lat_range))
    lat = np.degrees(np.arcsin(s0 + (s1 - s0) * i / n))
    lon = lon_range[0] + np.mod(i * 180.0 * (3 - np.sqrt(5)), lon_range[1] - lon_range[0])
    return {"latitude": lat, "longitude": lon}


def worker(mode: str) -> dict:
    """One measurement in this process: ``compile`` or ``run``."""
    wind = _wind()
    import flowpipe
    from flowpipe.parcels import advect

    result = {"source": str(Path(flowpipe.__file__).parent)}
    if mode == "compile":
        import llvmlite.binding

        llvmlite.binding.set_option("", "--pass-remarks=loop-vectorize")
        start = time.process_time()
        advect(wind, [(0.0, 0.0)], 1.0, step_minutes=STEP_MINUTES)
        result["compile"] = time.process_time() - start
        return result
    area = wind.sel(latitude=slice(-60, 60), longitude=slice(30, 150))
    cases = {
        "global": (wind, _points(PARCELS, (-90, 90), (0, 360)), "rk4"),
        "limited": (area, _points(PARCELS // 4, (-50, 50), (50, 130)), "petterssen"),
    }
    for name, (field, starts, scheme) in cases.items():
        advect(field, [(0.0, 90.0)], 1.0, step_minutes=STEP_MINUTES, scheme=scheme)  # warm up
        best = float("inf")
        for _ in range(3):
            start = time.process_time()
            advect(field, starts, HOURS, step_minutes=STEP_MINUTES, scheme=scheme,
                   record_minutes=HOURS * 60)
            best = min(best, time.process_time() - start)
        result[name] = best
    return result


def _measure(tree: Path, mode: str, cache: Path) -> dict:
    env = dict(os.environ, NUMBA_CACHE_DIR=str(cache), PYTHONPATH=str(tree),
               NUMBA_NUM_THREADS="1")
    done = subprocess.run([sys.executable, __file__, "--worker", mode], env=env, check=True,
                          capture_output=True, text=True)
    result = json.loads(done.stdout.strip().splitlines()[-1])
    if mode == "compile":
        result["simd loops"] = done.stderr.count("vectorized loop")
    if Path(result.pop("source")) != tree / "flowpipe":
        raise RuntimeError(f"the {tree} side imported another flowpipe")
    return result


def _median(values: list[float]) -> float:
    ordered = sorted(values)
    mid = len(ordered) // 2
    return ordered[mid] if len(ordered) % 2 else 0.5 * (ordered[mid - 1] + ordered[mid])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--base", default="main", help="git revision to compare with")
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--worker", choices=("compile", "run"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.worker:
        print(json.dumps(worker(args.worker)))
        return
    with tempfile.TemporaryDirectory() as tmp:
        base = flowpipe_at(args.base, Path(tmp))
        sides = {"base": base, "tree": ROOT}
        caches = {side: Path(tmp) / f"cache-{side}" for side in sides}
        times: dict[str, dict[str, list[float]]] = {s: {} for s in sides}
        print(f"{PARCELS} parcels, {HOURS:g} h, step {STEP_MINUTES} min; base = {args.base}, "
              f"tree = {ROOT}")
        print(f"{'round':>5} {'measure':>10} {'base':>10} {'tree':>10} {'ratio':>7}  "
              "(processor seconds; loops)")
        for r in range(args.rounds):
            order = list(sides) if r % 2 == 0 else list(reversed(sides))
            got: dict[str, dict[str, float]] = {s: {} for s in sides}
            for side in order:  # an empty cache, then the run that fills and reuses its own
                fresh = Path(tmp) / f"fresh-{side}-{r}"
                got[side].update(_measure(sides[side], "compile", fresh))
                got[side].update(_measure(sides[side], "run", caches[side]))
            for name in got["base"]:
                for side in sides:
                    times[side].setdefault(name, []).append(got[side][name])
                b, t = got["base"][name], got["tree"][name]
                print(f"{r:>5} {name:>10} {b:>10.3f} {t:>10.3f} {t / b:>7.3f}")
        print("medians")
        for name in times["base"]:
            ratios = [t / b for b, t in zip(times["base"][name], times["tree"][name], strict=True)]
            print(f"{'':>5} {name:>10} {_median(times['base'][name]):>10.3f} "
                  f"{_median(times['tree'][name]):>10.3f} {_median(ratios):>7.3f}")


if __name__ == "__main__":
    main()
