"""Compiled kernels: space-time sampling and one integration step for many parcels.

Positions are unit vectors ``(x, y, z)`` on the sphere (``z`` towards the
north pole, ``x`` towards longitude 0), so nothing is singular at the poles.
Fields are stacked time slices ``field[slot, level, lat, lon, component]``;
the driver (:mod:`flowpipe.parcels._window`) keeps only the slices that
bracket the current step in those slots and tells the kernels which slot
pair and time weight belong to each stage time.

Status codes: ``ACTIVE`` (-1) marks a parcel still being integrated; the
others are the flag values written to the output (see
``flowpipe.choices.STATUS_MEANINGS``).
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numba
import numpy as np

ACTIVE = -1
COMPLETED = 0
LEFT_DOMAIN = 1
REACHED_LOWEST = 2
REACHED_HIGHEST = 3
MISSING_WIND = 4
OUTSIDE_AT_START = 5  # one of several starts lay outside the domain: skipped, only its start kept

RK4 = 0
PETTERSSEN = 1
#: Parcels per parallel work item of :func:`advance`.
BLOCK = 512

#: Longitudes and latitudes within this many degrees outside the grid still
#: count as inside (rounding of coordinates read from files; common practice).
EDGE_TOLERANCE = 1e-9


# The kernels' grouped parameters: numba passes a NamedTuple of arrays and
# scalars as one typed tuple (no copy). None holds another tuple: a parallel
# loop takes its tuples apart one level deep only (numba 0.68: a tuple
# inside a tuple fails with "scalar type ... given for non scalar argument").

class Parcels(NamedTuple):
    """The parcels the kernels move, updated in place."""

    pos: np.ndarray     # (n, 3) unit position vectors
    level: np.ndarray   # (n,) vertical coordinates (hPa or m)
    status: np.ndarray  # (n,) int8: ACTIVE, or the flag a parcel stopped with


class CellTables(NamedTuple):
    """What :func:`_global_cells` needs to find a cell on a global grid
    (:func:`flowpipe.parcels._window.cell_tables`; empty arrays on limited areas)."""

    sin_lat: np.ndarray
    cos_lat: np.ndarray
    inv_dlat: np.ndarray      # inverse spacing (rad-1) to the next row, 0 for the last
    row_guess: np.ndarray     # int64, first row per bin of the latitude's pseudo-angle
    sin_lon: np.ndarray
    cos_lon: np.ndarray
    inv_dlon: np.ndarray      # inverse spacing (rad-1) to the next column, wrapping round
    column_guess: np.ndarray  # int64, first column per bin of the longitude's pseudo-angle


class Grid(NamedTuple):
    """The grid as the kernels see it."""

    lat: np.ndarray       # ascending degrees, pole rows included on global grids
    lat_uniform: bool     # equal spacing
    lon: np.ndarray       # ascending degrees
    lon_uniform: bool
    periodic: bool        # a global grid: cells found with the CellTables
    levels: np.ndarray    # ascending vertical interpolation coordinates (log p or height)
    log_levels: bool      # interpolate in the logarithm of the level


class Steps(NamedTuple):
    """Consecutive time steps and, per step, the slots and time weights of the wind at the
    stage times ``t``, ``t + h/2``, ``t + h`` (see :func:`_gather`)."""

    lengths: np.ndarray   # (nstep,) seconds, negative backward
    slot0: np.ndarray     # (nstep, 3) int64
    slot1: np.ndarray     # (nstep, 3) int64
    weight: np.ndarray    # (nstep, 3) weight of slot1


class Settings(NamedTuple):
    """How the kernels integrate."""

    vertical_scale: float          # vertical velocity to level units per second (0: none)
    lowest_at_top_of_range: bool   # the largest vertical coordinate is the lowest (pressure)
    radius: float                  # sphere radius (m)
    scheme: int                    # RK4 or PETTERSSEN
    iterations: int                # most corrector iterations of the Petterssen scheme
    tolerance: float               # convergence of the Petterssen iteration


@numba.njit(cache=True, inline="always")
def _locate(coord, uniform, value):
    """Cell index ``i`` and fraction ``f`` with ``value = coord[i] + f * (coord[i+1] - coord[i])``.

    ``inside`` is False when ``value`` lies outside ``[coord[0], coord[-1]]``;
    the index is then clamped to the nearest cell and the fraction to [0, 1].

    References
    ----------
    Bisection of an ordered table: Press, Teukolsky, Vetterling & Flannery
    (2007), Numerical Recipes, 3rd ed., section 3.1.1 ("locate"); a direct
    division on equally spaced coordinates.
    """
    n = coord.shape[0]
    if n == 1:
        return 0, 0.0, abs(value - coord[0]) <= EDGE_TOLERANCE
    inside = coord[0] - EDGE_TOLERANCE <= value <= coord[n - 1] + EDGE_TOLERANCE
    if uniform:
        pos = (value - coord[0]) / (coord[1] - coord[0])
        i = int(math.floor(pos))
        i = min(max(i, 0), n - 2)
    else:
        lo, hi = 0, n - 1
        while hi - lo > 1:
            mid = (lo + hi) // 2
            if coord[mid] <= value:
                lo = mid
            else:
                hi = mid
        i = lo
    f = (value - coord[i]) / (coord[i + 1] - coord[i])
    f = min(max(f, 0.0), 1.0)
    return i, f, inside


#: Floating-point licences of the kernels: fused multiply-adds, reciprocals and
#: reassociation (rounding-level changes only); never the no-NaN or
#: no-infinity ones, which would break the detection of missing wind (which
#: compares ``abs(value) < inf``: ``math.isfinite`` is folded away under these).
#: The numpy error model lets loops with divisions run in SIMD lanes.
FASTMATH = {"nsz", "arcp", "contract", "reassoc"}
#: Options of the loops over one block of parcels: each is a function of its
#: own that LLVM inlines into the parallel loop (``forceinline``), where the
#: parallel loop's guarantee that its arrays do not overlap lets the loops run
#: in SIMD lanes (numba's own ``inline="always"`` gave slower code).
BLOCK_LOOP = {"cache": True, "fastmath": FASTMATH, "error_model": "numpy", "forceinline": True}


#: Coarsest spacing (degrees) of a global grid that :func:`_twice_arctan` serves exactly
#: to rounding.
MAX_GLOBAL_SPACING = 20.0


@numba.njit(cache=True, inline="always")
def _twice_arctan(t):
    """``2 atan(t)`` for ``|t| <= tan(MAX_GLOBAL_SPACING / 2)``, without a trigonometric call:
    the angle ``theta`` of ``t = tan(theta / 2) = sin(theta) / (1 + cos(theta))``.

    The Maclaurin series of the arctangent to the term in ``t**21``: for
    ``|t| <= tan(10 deg)`` the first omitted term is below 1e-18 of the sum.
    Branch-free, so that loops over many parcels run in SIMD lanes.

    References
    ----------
    The half-angle formula ``tan(x/2) = sin x / (1 + cos x)`` and the series of
    arctan: Abramowitz & Stegun (1964), Handbook of Mathematical Functions,
    eqs. 4.3.24 and 4.4.42 (from memory).
    """
    q = t * t
    series = 1.0 + q * (-1.0 / 3.0 + q * (1.0 / 5.0 + q * (-1.0 / 7.0 + q * (1.0 / 9.0 + q * (
        -1.0 / 11.0 + q * (1.0 / 13.0 + q * (-1.0 / 15.0 + q * (1.0 / 17.0 + q * (
            -1.0 / 19.0 + q / 21.0)))))))))
    return 2.0 * t * series


@numba.njit(**BLOCK_LOOP)
def _global_cells(m, px, py, pz, tables, ux, uy, uz, cj, ci, ci1, fy, fx):
    """Normalise ``m`` positions and find their cells on a global grid.

    A table indexed by a pseudo-angle of the latitude (rows) or of the
    longitude (columns) gives the cell or the one before it (the bins are
    narrower than any cell, see :func:`flowpipe.parcels._window.cell_tables`);
    one comparison with the sine and cosine of the next grid line decides.
    The fractions are the angles from the cell's first row and column
    (:func:`_twice_arctan`, from the angle-difference identities) divided by the
    cell's spacing: the bilinear weights of ``(phi - phi_j) / (phi_{j+1} -
    phi_j)``, to rounding. No branch depends on the data, so the loop runs in
    SIMD lanes.

    Parameters
    ----------
    m : int
        Number of parcels.
    px, py, pz : ndarray
        Positions (not necessarily of unit length).
    tables : CellTables
        Sine, cosine and inverse spacing (rad-1) of each latitude, the first
        row per bin, and the same for the longitudes
        (:func:`flowpipe.parcels._window.cell_tables`).
    ux, uy, uz, cj, ci, ci1, fy, fx : ndarray
        Receive the unit vector, row, columns and fractions.

    References
    ----------
    Angle-difference identities: Abramowitz & Stegun (1964), Handbook of
    Mathematical Functions, eqs. 4.3.16-17 (from memory); a table lookup
    followed by a local search of an ordered table: Press, Teukolsky,
    Vetterling & Flannery (2007), Numerical Recipes, 3rd ed., section 3.1.1;
    the "diamond angle" ``1 - x / (|x| + |y|)`` as a division-only monotone
    substitute for atan2 (common practice).
    """
    sin_lat, cos_lat, inv_dlat, row_guess, sin_lon, cos_lon, inv_dlon, column_guess = tables
    nrow_bins, ncolumn_bins = row_guess.shape[0], column_guess.shape[0]
    nlon = sin_lon.shape[0]
    last_row = sin_lat.shape[0] - 2
    # Two divisions per parcel (a/b and c/d as (a d, c b) / (b d)): the divider
    # is the scarcest unit of this loop.
    for q in range(m):
        x, y, z = px[q], py[q], pz[q]
        rho = math.sqrt(x * x + y * y)
        norm = math.sqrt(rho * rho + z * z)
        pole = rho == 0.0  # longitude 0 at a pole, as atan2(0, 0)
        xx = 1.0 if pole else x
        yy = 0.0 if pole else y
        rr = 1.0 if pole else rho
        lat_sum, lon_sum = abs(z) + rho, abs(xx) + abs(yy)
        inverse = 1.0 / (norm * lat_sum * lon_sum)
        scale = lat_sum * lon_sum * inverse  # 1 / norm
        ux[q], uy[q], uz[q] = x * scale, y * scale, z * scale
        pseudo_lat = z * norm * lon_sum * inverse  # z / (|z| + rho), -1..1
        ratio = xx * norm * lat_sum * inverse  # x / (|x| + |y|)
        pseudo_lon = 1.0 - ratio if yy >= 0.0 else 3.0 + ratio  # 0..4, increasing eastward
        j = row_guess[min(int((pseudo_lat + 1.0) * (0.5 * nrow_bins)), nrow_bins - 1)]
        j = min(j + (1 if z >= sin_lat[j + 1] * norm else 0), last_row)
        i = column_guess[min(int(pseudo_lon * (0.25 * ncolumn_bins)), ncolumn_bins - 1)]
        i1 = i + 1 if i + 1 < nlon else 0
        i = i1 if yy * cos_lon[i1] - xx * sin_lon[i1] >= 0.0 else i  # at or past the next
        i1 = i + 1 if i + 1 < nlon else 0
        # Angles from the cell's first row and column: norm sin and norm cos of
        # phi - phi_j, rho sin and rho cos of lambda - lambda_i.
        lat_sin = z * cos_lat[j] - rho * sin_lat[j]
        lat_cos = z * sin_lat[j] + rho * cos_lat[j]
        lon_sin = yy * cos_lon[i] - xx * sin_lon[i]
        lon_cos = xx * cos_lon[i] + yy * sin_lon[i]
        lat_den, lon_den = norm + lat_cos, rr + lon_cos
        inverse = 1.0 / (lat_den * lon_den)
        f = _twice_arctan(lat_sin * lon_den * inverse) * inv_dlat[j]
        cj[q], fy[q] = j, min(max(f, 0.0), 1.0)
        f = _twice_arctan(lon_sin * lat_den * inverse) * inv_dlon[i]
        ci[q], ci1[q], fx[q] = i, i1, min(max(f, 0.0), 1.0)


@numba.njit(**BLOCK_LOOP)
def _limited_cells(m, px, py, pz, grid, ux, uy, uz, cj, ci, ci1, fy, fx, flag):
    """Normalise ``m`` positions and find their cells on a limited-area grid; ``flag`` is
    ``LEFT_DOMAIN`` outside it (cell 0 then).

    References
    ----------
    Spherical coordinates of a unit vector (common practice) and
    :func:`_locate`.
    """
    lat, lat_uniform, lon, lon_uniform = grid.lat, grid.lat_uniform, grid.lon, grid.lon_uniform
    nlon = lon.shape[0]
    for q in range(m):
        x, y, z = px[q], py[q], pz[q]
        inverse = 1.0 / math.sqrt(x * x + y * y + z * z)
        x, y, z = x * inverse, y * inverse, z * inverse
        ux[q], uy[q], uz[q] = x, y, z
        j, f, inside = _locate(lat, lat_uniform, math.degrees(math.asin(min(max(z, -1.0), 1.0))))
        cj[q], fy[q] = j, f
        shifted = lon[0] + (math.degrees(math.atan2(y, x)) - lon[0]) % 360.0
        if shifted > lon[nlon - 1] + EDGE_TOLERANCE and 360.0 - (shifted - lon[0]) <= EDGE_TOLERANCE:
            shifted -= 360.0  # just west of the western edge, within rounding
        i, f, inside_lon = _locate(lon, lon_uniform, shifted)
        ci[q], ci1[q], fx[q] = i, i + 1, f
        flag[q] = ACTIVE if inside and inside_lon else LEFT_DOMAIN


@numba.njit(**BLOCK_LOOP)
def _vertical_cells(m, vertical, grid, ck, fz, between):
    """Vertical layer ``k`` and fraction ``fz`` of ``m`` vertical coordinates (hPa or m),
    clamped to the range of ``levels``; ``between[0]`` becomes 1 when any lies between two
    levels, else 0.

    References
    ----------
    Linear interpolation in log-pressure on pressure levels (common practice)
    and :func:`_locate`.
    """
    levels, log_levels = grid.levels, grid.log_levels
    between[0] = 0
    for q in range(m):
        s = vertical[q]
        if log_levels:
            s = math.log(s) if s > 0.0 else -math.inf  # zero pressure: above the top
        k, f, _ = _locate(levels, False, s)
        ck[q], fz[q] = k, f
        between[0] = 1 if f != 0.0 else between[0]


@numba.njit(cache=True, inline="always")
def _space_time(field, s0, s1, a, b, k, j, i, i1, c, y, x):
    """Component ``c`` on level ``k``: bilinear in the cell ``(j, i, i1)`` with fractions
    ``(y, x)``, weights ``a`` and ``b`` on the slots ``s0`` and ``s1``.

    References
    ----------
    Press, Teukolsky, Vetterling & Flannery (2007), Numerical Recipes, 3rd
    ed., section 3.6, eq. 3.6.5 (bilinear); linear in time (common practice).
    """
    w00, w01, w10, w11 = (1.0 - y) * (1.0 - x), (1.0 - y) * x, y * (1.0 - x), y * x
    return (a * (w00 * field[s0, k, j, i, c] + w01 * field[s0, k, j, i1, c]
                 + w10 * field[s0, k, j + 1, i, c] + w11 * field[s0, k, j + 1, i1, c])
            + b * (w00 * field[s1, k, j, i, c] + w01 * field[s1, k, j, i1, c]
                   + w10 * field[s1, k, j + 1, i, c] + w11 * field[s1, k, j + 1, i1, c]))


@numba.njit(cache=True, inline="always")
def _between_levels(field, s0, s1, a, b, k, j, i, i1, c, y, x, z):
    """:func:`_space_time`, linear between the levels ``k`` and ``k + 1`` (fraction ``z``).

    A parcel on a level (``z`` 0 or 1) takes that level's value alone: the other level's
    may be missing (below the ground), and a zero weight times NaN would stop it there,
    and only when another parcel of its block lay between two levels.

    References
    ----------
    Linear interpolation in log-pressure (or height) between levels (common
    practice).
    """
    below = _space_time(field, s0, s1, a, b, k, j, i, i1, c, y, x)
    above = _space_time(field, s0, s1, a, b, k + 1, j, i, i1, c, y, x)
    return below if z == 0.0 else (above if z == 1.0 else (1.0 - z) * below + z * above)


@numba.njit(**BLOCK_LOOP)
def _gather(m, field, s0, s1, wt, cj, ci, ci1, ck, fy, fx, values):
    """Interpolate every component of ``field`` at the cells ``(j, i, i1)``, fractions
    ``(fy, fx)`` and levels ``k`` of ``m`` parcels into ``values[component, parcel]``.

    Linear in time between slots ``s0`` and ``s1`` (weight ``wt`` on ``s1``;
    both slots must hold loaded slices, the same one for a single time) and
    bilinear in latitude-longitude index space (:func:`_space_time`). The
    loops over parcels are innermost, so they run in SIMD lanes; the three
    Cartesian wind components share one loop (their cell read once).

    References
    ----------
    Bilinear interpolation on a rectilinear grid: Press, Teukolsky, Vetterling
    & Flannery (2007), Numerical Recipes, 3rd ed., section 3.6, eq. 3.6.5.
    Interpolating the Cartesian components of the wind rather than ``u, v``
    keeps the interpolant smooth across the poles, as in the Cartesian
    trajectory formulation of Stohl, Wotawa, Seibert & Kromp-Kolb (1995),
    J. Appl. Meteor. 34, 2149-2165 (from memory).
    """
    a, b = 1.0 - wt, wt
    ncomp = field.shape[4]
    grouped = 3 if ncomp >= 3 else 0
    if grouped:
        for q in range(m):
            j, i, i1, k, y, x = cj[q], ci[q], ci1[q], ck[q], fy[q], fx[q]
            for c in range(3):
                values[c, q] = _space_time(field, s0, s1, a, b, k, j, i, i1, c, y, x)
    for c in range(grouped, ncomp):
        for q in range(m):
            j, i, i1, k, y, x = cj[q], ci[q], ci1[q], ck[q], fy[q], fx[q]
            values[c, q] = _space_time(field, s0, s1, a, b, k, j, i, i1, c, y, x)


@numba.njit(**BLOCK_LOOP)
def _gather_between_levels(m, field, s0, s1, wt, cj, ci, ci1, ck, fy, fx, fz, values):
    """:func:`_gather`, linear between the levels ``k`` and ``k + 1`` with the fractions
    ``fz`` (:func:`_between_levels`).

    References
    ----------
    See :func:`_gather`; linear interpolation in log-pressure on pressure
    levels (common practice).
    """
    a, b = 1.0 - wt, wt
    ncomp = field.shape[4]
    grouped = 3 if ncomp >= 3 else 0
    if grouped:
        for q in range(m):
            j, i, i1, k, y, x, z = cj[q], ci[q], ci1[q], ck[q], fy[q], fx[q], fz[q]
            for c in range(3):
                values[c, q] = _between_levels(field, s0, s1, a, b, k, j, i, i1, c, y, x, z)
    for c in range(grouped, ncomp):
        for q in range(m):
            j, i, i1, k, y, x, z = cj[q], ci[q], ci1[q], ck[q], fy[q], fx[q], fz[q]
            values[c, q] = _between_levels(field, s0, s1, a, b, k, j, i, i1, c, y, x, z)


@numba.njit(cache=True, inline="always")
def _counts(p, q, status, settled, flag, values):
    """Whether the rate of parcel ``p`` (block index ``q``) counts: active and not settled,
    inside the domain and with wind. An active parcel outside or without wind gets the
    matching status.

    References
    ----------
    Missing wind is not filled in (common practice): ``NaN`` in ``values``.
    """
    total = values[0, q] + values[1, q] + values[2, q] + values[3, q]
    # (& rather than "and": no branches, so that loops run in SIMD lanes)
    live = (status[p] == ACTIVE) & (not settled[q])
    good = (flag[q] == ACTIVE) & (abs(total) < math.inf)
    lost = flag[q] if flag[q] != ACTIVE else MISSING_WIND
    status[p] = lost if live & (not good) else status[p]
    return live & good


@numba.njit(cache=True, inline="always")
def _rate(q, values, ux, uy, uz, vertical_scale, radius):
    """Time derivative ``(dx, dy, dz, dlevel)/dt`` of parcel ``q`` from its interpolated wind.

    The interpolated Cartesian wind is projected on the tangent plane of the
    normalised position and divided by the radius, so that the rate keeps the
    length of the position vector constant; the vertical rate is the vertical
    velocity times ``vertical_scale`` (0 for level-following runs).

    References
    ----------
    ``dr/dt = (V - (V . r) r) / a`` for a unit position vector ``r``: the
    Cartesian form of the horizontal trajectory equation (common practice;
    see e.g. Williamson et al. 1992, J. Comput. Phys. 102, 211-224, section 2
    for the Cartesian form of a wind on the sphere).
    """
    vx, vy, vz = values[0, q], values[1, q], values[2, q]
    x, y, z = ux[q], uy[q], uz[q]
    radial = vx * x + vy * y + vz * z
    return ((vx - radial * x) / radius, (vy - radial * y) / radius, (vz - radial * z) / radius,
            values[3, q] * vertical_scale)


@numba.njit(**BLOCK_LOOP)
def _runge_kutta_stage(m, first, stage, h, parcels, settled, flag, values, ux, uy, uz, settings,
                       mean, px, py, pz, pl):
    """Add one stage's rates (:func:`_rate`) to the mean rate and place the next stage's
    points, for the parcels whose rate counts (:func:`_counts`).

    Stages at ``t, t + h/2, t + h/2, t + h`` with weights ``1, 2, 2, 1`` (/6).

    References
    ----------
    The classical fourth-order Runge-Kutta method: Kutta (1901), Z. Math.
    Phys. 46, 435-453; Butcher (2016), Numerical Methods for Ordinary
    Differential Equations, 3rd ed., section 23.
    """
    pos, level, status = parcels
    vertical_scale, radius = settings.vertical_scale, settings.radius
    share = (1.0 if stage == 0 or stage == 3 else 2.0) / 6.0
    reach = 0.5 * h if stage < 2 else h
    for q in range(m):  # (selects rather than a branch: the loop runs in SIMD lanes)
        p = first + q
        use = _counts(p, q, status, settled, flag, values)
        kx, ky, kz, kl = _rate(q, values, ux, uy, uz, vertical_scale, radius)
        mean[0, q] = mean[0, q] + share * kx if use else mean[0, q]
        mean[1, q] = mean[1, q] + share * ky if use else mean[1, q]
        mean[2, q] = mean[2, q] + share * kz if use else mean[2, q]
        mean[3, q] = mean[3, q] + share * kl if use else mean[3, q]
        px[q] = pos[p, 0] + reach * kx if use else px[q]
        py[q] = pos[p, 1] + reach * ky if use else py[q]
        pz[q] = pos[p, 2] + reach * kz if use else pz[q]
        pl[q] = level[p] + reach * kl if use else pl[q]


@numba.njit(**BLOCK_LOOP)
def _petterssen_stage(m, first, stage, h, parcels, settled, flag, values, ux, uy, uz, settings,
                      start, mean, px, py, pz, pl):
    """One pass of the iterative scheme for the parcels whose rate counts
    (:func:`_counts`): the rate at the start (stage 0), then the mean of the start and end
    rates, re-evaluated at the new end point until it settles.

    References
    ----------
    Petterssen (1940), Weather Analysis and Forecasting, McGraw-Hill,
    pp. 221-223 (from memory).
    """
    pos, level, status = parcels
    vertical_scale, radius, tolerance = settings.vertical_scale, settings.radius, settings.tolerance
    for q in range(m):
        p = first + q
        if _counts(p, q, status, settled, flag, values):
            rate = _rate(q, values, ux, uy, uz, vertical_scale, radius)
            change = 0.0
            for c in range(4):
                if stage == 0:
                    start[c, q] = rate[c]
                updated = 0.5 * (start[c, q] + rate[c])
                change = max(change, abs(h) * abs(updated - mean[c, q]))
                mean[c, q] = updated
            settled[q] = stage > 0 and change < tolerance
            px[q] = pos[p, 0] + h * mean[0, q]
            py[q] = pos[p, 1] + h * mean[1, q]
            pz[q] = pos[p, 2] + h * mean[2, q]
            pl[q] = level[p] + h * mean[3, q]


@numba.njit(**BLOCK_LOOP)
def _begin_step(m, first, parcels, px, py, pz, pl, mean, settled, flag):
    """Start a step: the first stage's points at the parcels' positions, no mean rate yet,
    nothing settled or flagged.

    References
    ----------
    See :func:`advance`.
    """
    pos, level = parcels.pos, parcels.level
    for q in range(m):
        p = first + q
        px[q], py[q], pz[q], pl[q] = pos[p, 0], pos[p, 1], pos[p, 2], level[p]
        mean[0, q], mean[1, q], mean[2, q], mean[3, q] = 0.0, 0.0, 0.0, 0.0
        settled[q] = False
        flag[q] = ACTIVE


@numba.njit(**BLOCK_LOOP)
def _end_points(m, first, h, parcels, mean, px, py, pz, pl):
    """The points one step ``h`` along the mean rate from the start, normalised to unit length.

    References
    ----------
    Renormalisation after each step keeps positions on the sphere (common
    practice).
    """
    pos, level = parcels.pos, parcels.level
    for q in range(m):
        p = first + q
        x1 = pos[p, 0] + h * mean[0, q]
        y1 = pos[p, 1] + h * mean[1, q]
        z1 = pos[p, 2] + h * mean[2, q]
        norm = math.sqrt(x1 * x1 + y1 * y1 + z1 * z1)
        px[q], py[q], pz[q], pl[q] = x1 / norm, y1 / norm, z1 / norm, level[p] + h * mean[3, q]


@numba.njit(**BLOCK_LOOP)
def _vertical_range(m, vertical, grid, settings, flag):
    """Flag vertical coordinates beyond the lowest or the highest level.

    References
    ----------
    Parcels that leave the vertical range of the input stop there (common
    practice: no extrapolation).
    """
    levels, log_levels = grid.levels, grid.log_levels
    lowest_at_top_of_range = settings.lowest_at_top_of_range
    nlev = levels.shape[0]
    for q in range(m):
        l1 = vertical[q]
        s = (math.log(l1) if l1 > 0.0 else -math.inf) if log_levels else l1  # 0 hPa: above
        if s < levels[0] - EDGE_TOLERANCE:
            flag[q] = REACHED_HIGHEST if lowest_at_top_of_range else REACHED_LOWEST
        elif s > levels[nlev - 1] + EDGE_TOLERANCE:
            flag[q] = REACHED_LOWEST if lowest_at_top_of_range else REACHED_HIGHEST


@numba.njit(**BLOCK_LOOP)
def _settle(m, first, parcels, flag, px, py, pz, pl):
    """Move the active parcels whose end point is good (``flag`` ``ACTIVE``) to it; the other
    active parcels keep their position and get the flag as status.

    References
    ----------
    Positions after a parcel stops are not extrapolated (common practice).
    """
    pos, level, status = parcels
    for q in range(m):
        p = first + q
        active = status[p] == ACTIVE
        status[p] = flag[q] if active else status[p]
        if active & (flag[q] == ACTIVE):
            pos[p, 0], pos[p, 1], pos[p, 2], level[p] = px[q], py[q], pz[q], pl[q]


@numba.njit(cache=True, parallel=True, fastmath=FASTMATH, error_model="numpy")
def advance(parcels, field, steps, grid, tables, settings):
    """Advance every active parcel by the time steps ``steps.lengths`` (seconds, negative
    backward).

    Parameters
    ----------
    parcels : Parcels
        Unit position vectors and vertical coordinates (hPa or m), updated in
        place; ``ACTIVE`` parcels are advanced, and a parcel that leaves the
        domain, meets missing wind or leaves the vertical range keeps its last
        position and gets the matching status.
    field : ndarray, shape (nslot, nlev, nlat, nlon, ncomp)
        Cartesian wind components (m s-1) and, when ``ncomp == 4``, the
        vertical velocity.
    steps : Steps
        The time steps, one after the other, and per step the slots and time
        weights at the stage times.
    grid : Grid
        The horizontal grid and the vertical interpolation coordinates.
    tables : CellTables
        On global grids, the tables of :func:`_global_cells`.
    settings : Settings
        The scheme, its iterations and tolerance (radians and level units),
        the sphere radius and the factor from the vertical velocity to level
        units per second (0.01 for omega in Pa s-1 on hPa levels, 1 for w on
        height levels, 0 for level-following runs).

    Notes
    -----
    The rate at a point is the interpolated Cartesian wind projected on the
    tangent plane of the normalised position, divided by the radius:
    ``dr/dt = (V - (V . r) r) / a``; the vertical rate is the vertical
    velocity times ``vertical_scale``. Parcels are taken in blocks of
    ``BLOCK``, each block through all the steps (it stays in the processor's
    cache), stage by stage, each stage in passes over the block (cells,
    interpolation, update) whose loops run in SIMD lanes.

    References
    ----------
    The classical fourth-order Runge-Kutta method: Kutta (1901), "Beitrag zur
    naeherungsweisen Integration totaler Differentialgleichungen", Z. Math.
    Phys. 46, 435-453; Butcher (2016), Numerical Methods for Ordinary
    Differential Equations, 3rd ed., section 23. The iterative scheme:
    Petterssen (1940), Weather Analysis and Forecasting, McGraw-Hill,
    pp. 221-223 (from memory). Integrating in 3-D Cartesian coordinates with
    renormalisation after each step avoids the polar singularity of
    latitude-longitude equations (common practice; see Williamson et al.
    1992, J. Comput. Phys. 102, 211-224, section 2 for the Cartesian form
    of a wind on the sphere).
    """
    n = parcels.pos.shape[0]
    nlev = grid.levels.shape[0]
    periodic = grid.periodic
    scheme = settings.scheme
    slot0, slot1, weight = steps.slot0, steps.slot1, steps.weight
    nblock = (n + BLOCK - 1) // BLOCK
    nstage = 4 if scheme == RK4 else 1 + settings.iterations
    moving = settings.vertical_scale != 0.0 and nlev > 1  # levels change: layers found at every stage
    for block in numba.prange(nblock):
        first = block * BLOCK
        m = min(n, first + BLOCK) - first
        # Per parcel of the block: unit vector, cell, fractions and inside flag.
        # (One array per statement: arrays unpacked from a tuple would count as
        # possible aliases, see below.)
        ux = np.empty(m)
        uy = np.empty(m)
        uz = np.empty(m)
        cj = np.empty(m, np.int64)
        ci = np.empty(m, np.int64)
        ci1 = np.empty(m, np.int64)
        ck = np.zeros(m, np.int64)
        fy = np.empty(m)
        fx = np.empty(m)
        fz = np.zeros(m)
        flag = np.full(m, ACTIVE, np.int8)
        values = np.zeros((4, m))  # interpolated components; the fourth stays 0 in 2-D
        # The point of the next stage, the mean rate over the step and
        # (Petterssen) the rate at the start.
        px = np.empty(m)
        py = np.empty(m)
        pz = np.empty(m)
        pl = np.empty(m)
        mean = np.zeros((4, m))
        start = np.zeros((4, m))
        settled = np.zeros(m, dtype=np.bool_)  # Petterssen: converged
        # 1 when any parcel of the block lies between two levels. (Numba counts
        # a boolean variable taken from an array or a call as a possible alias,
        # which would keep the loops from running in SIMD lanes.)
        layered = np.zeros(1, np.int64)
        # Stopped parcels go through the passes too (at their last position,
        # their results unused): skipping them, or a block without active
        # parcels, costs more in the compiled loops than it saves.
        for step in range(steps.lengths.shape[0]):
            h = steps.lengths[step]
            _begin_step(m, first, parcels, px, py, pz, pl, mean, settled, flag)
            if nlev > 1 and (moving or step == 0):  # level-following: the layers stay
                _vertical_cells(m, pl, grid, ck, fz, layered)
            # RK4: stages at t, t + h/2, t + h/2, t + h with weights 1, 2, 2, 1 (/6).
            # Petterssen: the rate at the start, then the mean of the start and
            # end rates, re-evaluated at the new end point until it settles.
            for stage in range(nstage):
                if scheme == RK4:
                    ts = 0 if stage == 0 else (2 if stage == 3 else 1)
                else:
                    ts = 0 if stage == 0 else 2
                s0, s1, wt = slot0[step, ts], slot1[step, ts], weight[step, ts]
                if periodic:  # (a call per grid kind here: each loop then runs in SIMD lanes)
                    _global_cells(m, px, py, pz, tables, ux, uy, uz, cj, ci, ci1, fy, fx)
                else:
                    _limited_cells(m, px, py, pz, grid, ux, uy, uz, cj, ci, ci1, fy, fx, flag)
                if moving and stage > 0:
                    _vertical_cells(m, pl, grid, ck, fz, layered)
                if layered[0] == 1:
                    _gather_between_levels(m, field, s0, s1, wt, cj, ci, ci1, ck, fy, fx, fz,
                                           values)
                else:
                    _gather(m, field, s0, s1, wt, cj, ci, ci1, ck, fy, fx, values)
                if scheme == RK4:
                    _runge_kutta_stage(m, first, stage, h, parcels, settled, flag, values, ux, uy,
                                       uz, settings, mean, px, py, pz, pl)
                else:
                    _petterssen_stage(m, first, stage, h, parcels, settled, flag, values, ux, uy,
                                      uz, settings, start, mean, px, py, pz, pl)
            _end_points(m, first, h, parcels, mean, px, py, pz, pl)
            if not periodic:  # the end point itself must lie inside a limited-area domain
                _limited_cells(m, px, py, pz, grid, ux, uy, uz, cj, ci, ci1, fy, fx, flag)
            if moving:
                _vertical_range(m, pl, grid, settings, flag)
            _settle(m, first, parcels, flag, px, py, pz, pl)


@numba.njit(cache=True, parallel=True, fastmath=FASTMATH, error_model="numpy")
def sample(parcels, field, s0, s1, wt, grid, tables, out):
    """Sample ``field`` at the positions of the active parcels (NaN elsewhere).

    Parameters
    ----------
    parcels : Parcels
        As in :func:`advance` (not changed).
    field : ndarray, shape (nslot, nlev, nlat, nlon, ncomp)
    s0, s1, wt
        Slots and time weight (see :func:`_gather`).
    grid, tables
        As in :func:`advance`.
    out : ndarray, shape (n, ncomp)
        Receives the values.

    References
    ----------
    See :func:`_gather`.
    """
    pos, level, status = parcels
    n = pos.shape[0]
    ncomp = field.shape[4]
    for block in numba.prange((n + BLOCK - 1) // BLOCK):
        first = block * BLOCK
        m = min(n, first + BLOCK) - first
        ux = np.empty(m)
        uy = np.empty(m)
        uz = np.empty(m)
        cj = np.empty(m, np.int64)
        ci = np.empty(m, np.int64)
        ci1 = np.empty(m, np.int64)
        ck = np.zeros(m, np.int64)
        fy = np.empty(m)
        fx = np.empty(m)
        fz = np.zeros(m)
        flag = np.full(m, ACTIVE, np.int8)
        values = np.empty((ncomp, m))
        px = np.empty(m)
        py = np.empty(m)
        pz = np.empty(m)
        pl = np.empty(m)
        for q in range(m):
            p = first + q
            px[q], py[q], pz[q], pl[q] = pos[p, 0], pos[p, 1], pos[p, 2], level[p]
        if grid.periodic:
            _global_cells(m, px, py, pz, tables, ux, uy, uz, cj, ci, ci1, fy, fx)
        else:
            _limited_cells(m, px, py, pz, grid, ux, uy, uz, cj, ci, ci1, fy, fx, flag)
        layered = np.zeros(1, np.int64)
        if grid.levels.shape[0] > 1:
            _vertical_cells(m, pl, grid, ck, fz, layered)
        if layered[0] == 1:
            _gather_between_levels(m, field, s0, s1, wt, cj, ci, ci1, ck, fy, fx, fz, values)
        else:
            _gather(m, field, s0, s1, wt, cj, ci, ci1, ck, fy, fx, values)
        for q in range(m):
            live = status[first + q] == ACTIVE and flag[q] == ACTIVE
            for c in range(ncomp):
                out[first + q, c] = values[c, q] if live else np.nan


@numba.njit(cache=True, parallel=True, fastmath=FASTMATH, error_model="numpy")
def unit_vectors_into(latitude, longitude, out):
    """Unit position vectors of points given in degrees, into ``out[p] = (cos(lat) cos(lon),
    cos(lat) sin(lon), sin(lat))``.

    Parameters
    ----------
    latitude, longitude : ndarray, shape (n,)
        Degrees north and east.
    out : ndarray, shape (n, 3)

    References
    ----------
    Spherical to Cartesian coordinates (common practice).
    """
    for p in numba.prange(latitude.shape[0]):
        phi, lam = math.radians(latitude[p]), math.radians(longitude[p])
        c = math.cos(phi)
        out[p, 0], out[p, 1], out[p, 2] = c * math.cos(lam), c * math.sin(lam), math.sin(phi)


@numba.njit(cache=True)
def cartesian_slice(u, v, sin_lat, cos_lat, sin_lon, cos_lon, order, row0, out):
    """Write the Cartesian wind of one time slice into ``out[:, row0:row0 + nlat, :, :3]``.

    The formula of :func:`flowpipe.parcels._geometry.cartesian_wind`, in the
    same order of operations, in one pass without temporary arrays.

    Parameters
    ----------
    u, v : ndarray, shape (nlev, nlat, nlon)
        Eastward and northward wind of the input levels.
    sin_lat, cos_lat : ndarray, shape (nlat,)
        Of the input latitudes.
    sin_lon, cos_lon : ndarray, shape (nlon,)
        Of the longitudes.
    order : ndarray of int64
        Input level of each output level.
    row0 : int
        Output row of the first input latitude (1 below an added pole row).
    out : ndarray, shape (nlev, nrow, nlon, ncomp)
        One slot of the prepared field.

    References
    ----------
    ``u e_east + v e_north`` with ``e_east = (-sin lon, cos lon, 0)`` and
    ``e_north = (-sin lat cos lon, -sin lat sin lon, cos lat)``: Williamson
    et al. (1992), J. Comput. Phys. 102, 211-224, section 2.
    """
    for k in range(order.shape[0]):
        kk = order[k]
        for j in range(u.shape[1]):
            sp, cp = sin_lat[j], cos_lat[j]
            for i in range(u.shape[2]):
                uu, vv = u[kk, j, i], v[kk, j, i]
                out[k, row0 + j, i, 0] = -uu * sin_lon[i] - vv * sp * cos_lon[i]
                out[k, row0 + j, i, 1] = uu * cos_lon[i] - vv * sp * sin_lon[i]
                out[k, row0 + j, i, 2] = vv * cp
