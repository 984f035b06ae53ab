"""The two limited-area Helmholtz partitions of a wind on the staggered grid.

``dirichlet_partition`` (Lynch 1989) solves two Poisson problems with zero boundary
values and leaves the rest of the wind as the harmonic part, and
``lynch_partition`` closes a band at its pole first; ``variational_partition``
(Li, Chao & McWilliams 2006) takes the least-squares potentials of a
:class:`flowpipe.regional.solvers.VariationalSolver`. Each works on one connected
piece of valid points (:mod:`flowpipe.regional.pieces`) and returns the fields and
the quality figures of the piece; ``pole_values`` gives a band's pole row the values
at the pole.
"""

from __future__ import annotations

import numpy as np

from ..choices import REGIONAL_VARIABLES
from ..spectral import pole_row
from . import cache
from .operators import StaggeredGrid, corners_to_centres, curl_and_divergence, interior_corners
from .solvers import DirichletSolver, VariationalSolver


def _weighted_inner(grid: StaggeredGrid, u1: np.ndarray, v1: np.ndarray, u2: np.ndarray,
                    v2: np.ndarray) -> float:
    """Area-weighted inner product of two winds over the points where both are valid."""
    return float(np.nansum(grid.centre_area * (u1 * u2 + v1 * v2)))


def _weighted_energy(grid: StaggeredGrid, u: np.ndarray, v: np.ndarray) -> float:
    return _weighted_inner(grid, u, v, u, v)


def _at_centres(grid: StaggeredGrid, zeta: np.ndarray, delta: np.ndarray
                ) -> tuple[np.ndarray, np.ndarray]:
    return corners_to_centres(grid, zeta), corners_to_centres(grid, delta)


def _centre_winds(grid: StaggeredGrid, psi: np.ndarray, chi: np.ndarray,
                  valid: np.ndarray) -> dict[str, np.ndarray]:
    u_psi, v_psi, u_chi, v_chi = grid.wind_operators
    shape = grid.shape

    def at_valid(x: np.ndarray) -> np.ndarray:
        return np.where(valid, x.reshape(shape), np.nan)

    return {
        "streamfunction": at_valid(grid.corner_mean @ psi.ravel()),
        "velocity_potential": at_valid(grid.corner_mean @ chi.ravel()),
        "u_rotational": at_valid(u_psi @ psi.ravel()),
        "v_rotational": at_valid(v_psi @ psi.ravel()),
        "u_divergent": at_valid(u_chi @ chi.ravel()),
        "v_divergent": at_valid(v_chi @ chi.ravel()),
    }


def dirichlet_partition(grid: StaggeredGrid, u: np.ndarray, v: np.ndarray,
                        solver: DirichletSolver
                        ) -> tuple[dict[str, np.ndarray], dict[str, float]]:
    """Partition a limited-area wind into rotational, divergent and harmonic parts.

    Solves ``lap psi = zeta`` and ``lap chi = delta`` with zero boundary values
    and leaves the rest of the wind as the harmonic part.

    Parameters
    ----------
    grid : StaggeredGrid
    u, v : numpy.ndarray
        Wind at the centres, m s-1, NaN where missing (the mask the solver was built for).
    solver : DirichletSolver
        Built once for this grid and mask.

    Returns
    -------
    fields : dict of numpy.ndarray
        ``streamfunction``, ``velocity_potential``, ``vorticity``,
        ``divergence``, ``u_rotational``, ``v_rotational``, ``u_divergent``,
        ``v_divergent``, ``u_harmonic``, ``v_harmonic`` on the centres.
    diagnostics : dict of float
        ``reconstruction_error`` (relative, area-weighted, valid points; zero
        by construction, as the harmonic part is the rest),
        ``harmonic_energy_share``, ``harmonic_rotation`` (the figure that can
        fail: :func:`harmonic_rotation`) and ``iterations`` (0 for direct solves).

    References
    ----------
    Lynch (1989), "Partitioning the wind in a limited domain", Mon. Wea.
    Rev. 117, 1492-1500 (the internal and harmonic parts, eqs. 2.4-2.6).
    """
    valid = np.isfinite(u) & np.isfinite(v)
    interior = interior_corners(grid, valid)
    zeta, delta = curl_and_divergence(grid, u, v, interior)
    (psi, chi), iterations = solver.solve(np.nan_to_num(np.stack([zeta, delta])))
    fields = _centre_winds(grid, psi, chi, valid)
    fields["vorticity"], fields["divergence"] = _at_centres(grid, zeta, delta)
    fields["u_harmonic"] = u - fields["u_rotational"] - fields["u_divergent"]
    fields["v_harmonic"] = v - fields["v_rotational"] - fields["v_divergent"]
    return fields, partition_figures(grid, u, v, fields, iterations)


def partition_figures(grid: StaggeredGrid, u: np.ndarray, v: np.ndarray,
                      fields: dict[str, np.ndarray], iterations: int = 0) -> dict[str, float]:
    """Quality figures of a partition with a harmonic wind, at the valid points of ``u, v``.

    Parameters
    ----------
    grid : StaggeredGrid
    u, v : numpy.ndarray
        The wind partitioned, NaN where missing.
    fields : dict of numpy.ndarray
        The rotational, divergent and harmonic winds.
    iterations : int
        Of the solver that made them (0 for direct solves).

    Returns
    -------
    dict of float
        ``reconstruction_error``: the relative area-weighted RMS of what the
        three parts leave of the wind; ``harmonic_energy_share``: the area-
        weighted energy of the harmonic wind over that of the wind (never
        negative); ``harmonic_rotation`` (:func:`harmonic_rotation`, the figure
        that can fail); ``iterations``.

    References
    ----------
    Lynch (1989), "Partitioning the wind in a limited domain", Mon. Wea.
    Rev. 117, 1492-1500, eq. 2.6 (the three parts add up to the wind).
    """
    interior = interior_corners(grid, np.isfinite(u) & np.isfinite(v))
    zeta, delta = curl_and_divergence(grid, u, v, interior)
    total = _weighted_energy(grid, u, v)
    rest_u = u - fields["u_rotational"] - fields["u_divergent"] - fields["u_harmonic"]
    rest_v = v - fields["v_rotational"] - fields["v_divergent"] - fields["v_harmonic"]
    return {
        "reconstruction_error": np.sqrt(_weighted_energy(grid, rest_u, rest_v) / total),
        "harmonic_energy_share": _weighted_energy(grid, fields["u_harmonic"],
                                                  fields["v_harmonic"]) / total,
        "harmonic_rotation": harmonic_rotation(grid, interior, zeta, delta,
                                               fields["u_harmonic"], fields["v_harmonic"]),
        "iterations": iterations,
    }


def harmonic_rotation(grid: StaggeredGrid, interior: np.ndarray, zeta: np.ndarray,
                      delta: np.ndarray, u_harmonic: np.ndarray, v_harmonic: np.ndarray
                      ) -> float:
    """How far a harmonic wind is from harmonic: its vorticity and divergence against the wind's.

    Parameters
    ----------
    grid : StaggeredGrid
    interior : numpy.ndarray
        Interior corners (:func:`flowpipe.regional.operators.interior_corners`).
    zeta, delta : numpy.ndarray
        Vorticity and divergence of the wind at the corners.
    u_harmonic, v_harmonic : numpy.ndarray
        The harmonic wind at the centres.

    Returns
    -------
    float
        ``sqrt(sum A (zeta_h**2 + delta_h**2) / sum A (zeta**2 + delta**2))`` over
        the interior corners (``A`` their areas): zero, to the solver's accuracy,
        when the Poisson problems were solved (the harmonic wind is both
        non-divergent and irrotational); of order one when they were not.

    References
    ----------
    Lynch (1989), "Partitioning the wind in a limited domain", Mon. Wea. Rev.
    117, 1492-1500 (the harmonic part is irrotational and non-divergent).
    """
    zeta_h, delta_h = curl_and_divergence(grid, u_harmonic, v_harmonic, interior)
    area = np.broadcast_to(grid.corner_area, grid.corner_shape)[interior]
    wind = area @ (zeta[interior] ** 2 + delta[interior] ** 2)
    rest = area @ (zeta_h[interior] ** 2 + delta_h[interior] ** 2)
    return float(np.sqrt(rest / max(wind, np.finfo(float).tiny)))


def variational_partition(grid: StaggeredGrid, u: np.ndarray, v: np.ndarray,
                          solver: VariationalSolver
                          ) -> tuple[dict[str, np.ndarray], dict[str, float]]:
    """Rotational and divergent winds from the least-squares potentials.

    Parameters
    ----------
    grid : StaggeredGrid
    u, v : numpy.ndarray
        Wind at the centres, m s-1, NaN where missing (the solver's mask).
    solver : VariationalSolver
        Built once for this grid and mask.

    Returns
    -------
    fields : dict of numpy.ndarray
        As :func:`dirichlet_partition`, without the harmonic wind.
    diagnostics : dict of float
        ``reconstruction_error`` and ``iterations``. The harmonic share is
        that of the Dirichlet partition's harmonic wind (the one the
        regional stage writes beside this split): on a limited area the
        least-energy split shares that flow evenly between its parts, but on
        a band periodic in longitude the zonal harmonic flow ``u ~ 1/cos(phi)``
        has a streamfunction and no single-valued velocity potential, so the
        parts cannot share it and ``<w_rot, w_div>`` says nothing about it.

    References
    ----------
    Li, Chao & McWilliams (2006), Mon. Wea. Rev. 134, 3384-3394; Lynch (1989),
    Mon. Wea. Rev. 117, 1492-1500, section 2 (orthogonality of the internal
    and harmonic parts).
    """
    (psi, chi), iterations = solver.solve(np.stack([u, v]))
    fields = _centre_winds(grid, psi, chi, solver.valid)
    zeta, delta = curl_and_divergence(grid, u, v, interior_corners(grid, solver.valid))
    fields["vorticity"], fields["divergence"] = _at_centres(grid, zeta, delta)
    rest_u = u - fields["u_rotational"] - fields["u_divergent"]
    rest_v = v - fields["v_rotational"] - fields["v_divergent"]
    total = _weighted_energy(grid, u, v)
    diagnostics = {
        "reconstruction_error": np.sqrt(_weighted_energy(grid, rest_u, rest_v) / total),
        "iterations": iterations,
    }
    return fields, diagnostics


def lynch_partition(grid: StaggeredGrid, valid: np.ndarray, us: np.ndarray, vs: np.ndarray,
                    pole: str | None) -> tuple[dict[str, np.ndarray], dict[str, float]]:
    """Lynch's partition of one piece; on a band closed by a pole, the pole is a point.

    Without its pole row, a band that has one (0..90, say) would end at an edge half a
    spacing short of the pole, and the zonal harmonic flow ``u ~ 1/cos(phi)`` of that
    ring-shaped domain would carry the flow near the pole. With every point valid, the
    pole row is put back on a row of cells of zero area (``cos 90 = 0``), its wind the
    one vector the row nearest the pole describes (:func:`flowpipe.spectral.pole_row`;
    it closes the circulation round the cells next to the pole, whatever the input's
    pole row holds, which may be missing): no flux crosses the pole, so the corner ring
    next to it is an inner point of the finite-volume Laplacian with the pole a single
    point, and the domain's only boundary is its open latitude edge.

    References
    ----------
    Lynch (1989), Mon. Wea. Rev. 117, 1492-1500 (the partition); no flux through the
    pole point of a finite-volume latitude-longitude grid (common practice).
    """
    if pole is None or not valid.all():
        return dirichlet_partition(grid, us, vs, cache.dirichlet(grid, valid))
    north = pole == "north"
    lat = np.degrees(grid.lat)
    closed = cache.staggered_grid(np.append(lat, 90.0) if north else np.insert(lat, 0, -90.0),
                                  np.degrees(grid.lon), True)
    ring = -1 if north else 0
    pu, pv = pole_row(us[ring], vs[ring], np.degrees(grid.lon), 1.0 if north else -1.0)
    stack = (lambda x, p: np.vstack([x, p])) if north else (lambda x, p: np.vstack([p, x]))
    inner = slice(0, -1) if north else slice(1, None)
    with np.errstate(invalid="ignore", divide="ignore"):  # the pole corners: no area
        fields, _ = dirichlet_partition(closed, stack(us, pu), stack(vs, pv),
                                        cache.dirichlet(closed, np.ones(closed.shape, bool)))
    fields = {name: values[inner] for name, values in fields.items()}
    # The wind's vorticity and divergence are the band's own, as in the variational scheme:
    # the closed grid's corner ring next to the pole gives the pole row's wind half its weight.
    zeta, delta = curl_and_divergence(grid, us, vs, interior_corners(grid, valid))
    fields["vorticity"] = corners_to_centres(grid, zeta)
    fields["divergence"] = corners_to_centres(grid, delta)
    return fields, partition_figures(grid, us, vs, fields)


def _cap_rotation(grid: StaggeredGrid, u: np.ndarray, v: np.ndarray, ring: int, sign: float
                  ) -> tuple[float, float]:
    """Mean vorticity and divergence of the polar cap inside a row, from the row's winds.

    Stokes' theorem and the divergence theorem on the cap of angular radius ``r``
    round the pole: circulation ``sign * sum(u) a cos(phi) dlambda`` and outflow
    ``-sign * sum(v) a cos(phi) dlambda`` over the cap's area ``2 pi a^2 (1 - cos r)``;
    the cap's means are the pole's values to second order in ``r``.
    """
    length = grid.radius * np.cos(grid.lat[ring]) * grid.dlon
    area = 2 * np.pi * grid.radius**2 * (1.0 - np.abs(np.sin(grid.lat[ring])))
    return (sign * float(np.sum(u[ring])) * length / area,
            -sign * float(np.sum(v[ring])) * length / area)


def pole_values(grid: StaggeredGrid, fields: np.ndarray, us: np.ndarray, vs: np.ndarray,
                pole: str) -> np.ndarray:
    """The decomposition at the pole closing a band, as a pole row, from the row next to it.

    Parameters
    ----------
    grid : StaggeredGrid
        The band without its pole row.
    fields : numpy.ndarray
        The decomposition on that grid, shape ``(len(REGIONAL_VARIABLES), nlat, nlon)``.
    us, vs : numpy.ndarray
        The wind on that grid.
    pole : {"north", "south"}

    Returns
    -------
    numpy.ndarray
        Shape ``(len(REGIONAL_VARIABLES), nlon)``. Each pair of winds is the one
        vector the row next to the pole describes (:func:`flowpipe.spectral.pole_row`),
        seen from each meridian; vorticity and divergence are the means of the cap
        inside that row (:func:`_cap_rotation`; of the wind, as elsewhere); the
        streamfunction and velocity potential are single values, the row's mean
        less the rise the cap's mean vorticity (divergence) of the rotational
        (divergent) wind gives a potential from the pole to the row. NaN where the
        row next to the pole is.

    References
    ----------
    Mean of a potential on a circle of angular radius ``r`` round a point where its
    Laplacian is ``L``: ``f(pole) - 2 a^2 L ln(cos(r / 2))`` for ``L`` constant (Gauss'
    theorem on the cap: the potential's mean rises by ``a L tan(rho / 2)`` per unit
    ``rho``); common practice.
    """
    north = pole == "north"
    ring, sign = (-1, 1.0) if north else (0, -1.0)
    lon = np.degrees(grid.lon)
    k = {name: i for i, name in enumerate(REGIONAL_VARIABLES)}
    out = np.empty((len(REGIONAL_VARIABLES), lon.size))
    for part in ("rotational", "divergent", "harmonic"):
        out[[k[f"u_{part}"], k[f"v_{part}"]]] = pole_row(
            fields[k[f"u_{part}"], ring], fields[k[f"v_{part}"], ring], lon, sign)
    out[k["vorticity"]], out[k["divergence"]] = _cap_rotation(grid, us, vs, ring, sign)
    rise = -2.0 * grid.radius**2 * np.log(np.cos((np.pi / 2 - abs(grid.lat[ring])) / 2))
    rotation, _ = _cap_rotation(grid, fields[k["u_rotational"]], fields[k["v_rotational"]],
                                ring, sign)
    _, outflow = _cap_rotation(grid, fields[k["u_divergent"]], fields[k["v_divergent"]],
                               ring, sign)
    out[k["streamfunction"]] = np.mean(fields[k["streamfunction"], ring]) - rise * rotation
    out[k["velocity_potential"]] = np.mean(fields[k["velocity_potential"], ring]) - rise * outflow
    return out
