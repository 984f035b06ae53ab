"""The bare spherical-harmonic transform floor the benchmarks compare against."""

from __future__ import annotations

import ducc0
import numpy as np


def floor_transforms(spin_map: np.ndarray, nlat: int, nlon: int, lmax: int, nthreads: int) -> None:
    """The transforms of one decomposed level alone, on a CC grid with ducc0: one spin-1
    analysis, two spin-1 (gradient-only) and four scalar syntheses."""
    sht = ducc0.sht.experimental
    eb = sht.analysis_2d(map=spin_map, spin=1, lmax=lmax, geometry="CC", nthreads=nthreads)
    for k in (0, 1):
        sht.synthesis_2d(alm=eb[k:k + 1], spin=1, lmax=lmax, geometry="CC", ntheta=nlat,
                         nphi=nlon, mode="GRAD_ONLY", nthreads=nthreads)
    for alm in (eb[0:1], eb[1:2], eb[0:1], eb[1:2]):
        sht.synthesis_2d(alm=alm, spin=0, lmax=lmax, geometry="CC", ntheta=nlat, nphi=nlon,
                         nthreads=nthreads)
