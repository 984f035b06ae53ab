"""Kinematics of a global wind by spherical harmonics.

Absolute vorticity, stretching, shearing and total deformation, the kinetic
energy of the rotational and divergent winds and their spectra by total
wavenumber, from one spin-1 analysis of each latitude-longitude slab.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import xarray as xr

from . import spectral
from .annotate import global_attrs, variable_attrs
from .choices import KINEMATIC_VARIABLES, SPECTRA
from .constants import EARTH_RADIUS, EARTH_ROTATION_RATE
from .errors import InputError
from .grid import describe_grid
from .ingest import with_input_precision
from .slabs import (
    HORIZONTAL,
    SPECTRAL_REFERENCES,
    apply_slab_kernel,
    canonical_order,
    label_coordinates,
    refuse_missing,
    select_levels,
    spectral_plan,
)


def kinematics_slab(
    u: np.ndarray, v: np.ndarray, *, geometry: str, truncation: int, radius: float,
    rotation_rate: float, latitude: np.ndarray, nthreads: int = 1,
) -> tuple[np.ndarray, ...]:
    """Kinematic diagnostics of one global slab.

    Parameters
    ----------
    u, v : numpy.ndarray
        Eastward and northward wind in m s-1, shape ``(nlat, nlon)``,
        latitudes ascending.
    geometry : {"CC", "F1", "GL"}
        ducc0 ring geometry.
    truncation : int
        Triangular truncation ``N``.
    radius : float
        Radius of the sphere in m.
    rotation_rate : float
        Angular velocity of the planet in rad s-1.
    latitude : numpy.ndarray
        Latitudes of the rows in degrees, ascending.
    nthreads : int
        Threads ducc0 may use.

    Returns
    -------
    tuple of numpy.ndarray
        Absolute vorticity ``zeta + 2 Omega sin(phi)``; stretching, shearing
        and total deformation ``sqrt(stretching**2 + shearing**2)``; kinetic
        energy ``(u**2 + v**2) / 2`` of the rotational and of the divergent
        wind; the spectra of the latter two by total wavenumber ``0..N``
        (:func:`flowpipe.spectral.energy_per_degree`).

    References
    ----------
    Absolute vorticity: Holton & Hakim (2013), "An Introduction to Dynamic
    Meteorology", 5th ed., Academic Press, section 4.2; deformation:
    Batchelor (1967), "An Introduction to Fluid Dynamics", appendix 2 (see
    :func:`flowpipe.spectral.deformation_synthesis`); energy spectrum: Boer
    (1983), "Homogeneous and isotropic turbulence on the sphere", J. Atmos.
    Sci. 40, 154-163.
    """
    u = np.asarray(u, dtype=np.float64)
    v = np.asarray(v, dtype=np.float64)
    nlat, nlon = u.shape
    grid = {"geometry": geometry, "nlat": nlat, "nlon": nlon, "truncation": truncation,
            "nthreads": nthreads}
    eb = spectral.wind_coefficients(u, v, geometry, truncation, nthreads)
    psi_lm, chi_lm = spectral.potentials(eb, truncation, radius)
    zeta = spectral.scalar_synthesis(spectral.laplacian(psi_lm, truncation, radius), **grid)
    coriolis = 2.0 * rotation_rate * np.sin(np.radians(latitude))[:, None]
    stretching, shearing = spectral.deformation_synthesis(psi_lm, chi_lm, radius=radius, **grid)
    u_rot, v_rot = spectral.rotational_wind(eb[1], **grid)
    u_div, v_div = spectral.divergent_wind(eb[0], **grid)
    return (
        zeta + coriolis, stretching, shearing, np.hypot(stretching, shearing),
        0.5 * (u_rot**2 + v_rot**2), 0.5 * (u_div**2 + v_div**2),
        spectral.energy_per_degree(psi_lm, truncation, radius),
        spectral.energy_per_degree(chi_lm, truncation, radius),
    )


def kinematics(
    wind: xr.Dataset, truncation: int | None = None, levels: Sequence[float] | None = None
) -> xr.Dataset:
    """Kinematic diagnostics of a wind on a complete global grid.

    Parameters
    ----------
    wind : xarray.Dataset
        A canonical wind Dataset (:func:`flowpipe.open_wind`); latitudes may
        also run north to south, the result then does too.
    truncation : int, optional
        Triangular truncation ``N``; default the largest the grid resolves.
    levels : sequence of float, optional
        Only these levels.

    Returns
    -------
    xarray.Dataset
        The variables of :data:`KINEMATIC_VARIABLES`; the spectra have the
        dimension ``total_wavenumber`` (``0..N``) in place of latitude and
        longitude. Lazy when the input is; building it reads no data.

    Raises
    ------
    flowpipe.errors.InputError
        When the grid is not a complete global grid; when u or v has missing
        values (for a lazy wind, when the result is computed).

    References
    ----------
    See :func:`kinematics_slab`.
    """
    wind, descending = canonical_order(select_levels(wind, levels))
    grid = describe_grid(wind)
    if grid.geometry is None:
        raise InputError(
            f"kinematics need a complete global equiangular or Gaussian grid; the "
            f"{grid.nlat} x {grid.nlon} grid is {grid.kind} with {grid.latitudes} latitudes: "
            "compute vorticity and divergence with flowpipe.decompose(method='regional')")
    geometry, n = spectral_plan(grid, truncation)
    core = [HORIZONTAL] * (len(KINEMATIC_VARIABLES) - len(SPECTRA)) + [["total_wavenumber"]] * 2
    # missing points are refused inside each slab task: building reads no data
    outputs = apply_slab_kernel(
        refuse_missing, wind, core, sizes={"total_wavenumber": n + 1},
        kernel=kinematics_slab, what="kinematics", table="decompose",
        longitude=grid.longitude,
        geometry=geometry, truncation=n, radius=EARTH_RADIUS,
        rotation_rate=EARTH_ROTATION_RATE, latitude=grid.latitude,
    )
    out = xr.Dataset({
        name: da.assign_attrs(variable_attrs(name))
        for name, da in zip(KINEMATIC_VARIABLES, outputs, strict=True)
    })
    out = out.assign_coords(total_wavenumber=("total_wavenumber", np.arange(n + 1), {
        "long_name": "total wavenumber (degree l of the spherical harmonics)", "units": "1"}))
    out = label_coordinates(out)
    out.attrs = global_attrs(
        wind, title="Kinematics of the wind",
        summary="Absolute vorticity, deformation and the kinetic energy of the rotational and "
        "divergent winds with their spectra, by spherical-harmonic transforms.",
        references=SPECTRAL_REFERENCES)
    out.attrs.update(method="spectral", truncation_N=n, ducc0_geometry=geometry,
                     earth_radius=EARTH_RADIUS, earth_rotation_rate=EARTH_ROTATION_RATE)
    out = with_input_precision(out, wind)
    return out.isel(latitude=slice(None, None, -1)) if descending else out
