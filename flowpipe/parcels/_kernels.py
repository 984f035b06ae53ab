"""Compiled kernels: space-time sampling and one integration step for many parcels.

Positions are unit vectors ``(x, y, z)`` on the sphere (``z`` towards the
north pole, ``x`` towards longitude 0), so nothing is singular at the poles.
Fields are stacked time slices ``field[slot, level, lat, lon, component]``;
the driver (:mod:`flowpipe.parcels._window`) keeps only the slices that
bracket the current step in those slots and tells the kernels which slot
pair and time weight belong to each stage time.

Status codes: ``ACTIVE`` (-1) marks a parcel still being integrated; the
others are the flag values written to the output (see ``STATUS_MEANINGS``).
"""

from __future__ import annotations

import math
import os

import numba
import numpy as np

# Idle worker threads sleep between steps instead of spinning: on a shared
# machine spinning takes the processor from other work and then waits for it.
# Read when the OpenMP threading layer starts; a setting of the user's wins.
os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

ACTIVE = -1
COMPLETED = 0
LEFT_DOMAIN = 1
REACHED_LOWEST = 2
REACHED_HIGHEST = 3
MISSING_WIND = 4
#: Output flag meanings, in the order of the flag values 0, 1, 2, ...
STATUS_MEANINGS = ("completed", "left_domain", "reached_lowest_level", "reached_highest_level",
                   "met_missing_wind")

RK4 = 0
PETTERSSEN = 1
#: Parcels per parallel work item of :func:`advance`.
BLOCK = 512

#: Longitudes and latitudes within this many degrees outside the grid still
#: count as inside (rounding of coordinates read from files; common practice).
EDGE_TOLERANCE = 1e-9


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


#: Below this sine or tangent of an angle the truncated series of
#: :func:`_small_asin` and :func:`_small_atan2` are exact to rounding (their first
#: omitted terms are below 1e-16 of the sum): angles under 2 degrees.
SERIES_LIMIT = 0.035


@numba.njit(cache=True, inline="always")
def _small_asin(s):
    """``asin(s)``, by its Maclaurin series when ``|s| < SERIES_LIMIT``.

    References
    ----------
    Abramowitz & Stegun (1964), Handbook of Mathematical Functions, eq. 4.4.40
    (the series of arcsin, from memory).
    """
    if abs(s) >= SERIES_LIMIT:
        return math.asin(min(max(s, -1.0), 1.0))
    q = s * s
    return s * (1.0 + q * (1.0 / 6.0 + q * (3.0 / 40.0 + q * (5.0 / 112.0 + q * (35.0 / 1152.0)))))


@numba.njit(cache=True, inline="always")
def _small_atan2(s, c):
    """``atan2(s, c)``, by the Maclaurin series of ``atan(s / c)`` for small angles.

    References
    ----------
    Abramowitz & Stegun (1964), Handbook of Mathematical Functions, eq. 4.4.42
    (the series of arctan, from memory).
    """
    if not (c > 0.0 and abs(s) < SERIES_LIMIT * c):
        return math.atan2(s, c)
    t = s / c
    q = t * t
    return t * (1.0 + q * (-1.0 / 3.0 + q * (1.0 / 5.0 + q * (-1.0 / 7.0 + q * (1.0 / 9.0
                                                                               - q / 11.0)))))


@numba.njit(cache=True, inline="always")
def _global_cell(px, py, pz, rows, columns, row_guess, column_guess):
    """Row ``j``, fraction ``fy``, columns ``i``, ``i1`` and fraction ``fx`` on a global grid,
    without trigonometric calls in the common case.

    A table indexed by ``z`` (rows) or by a pseudo-angle of ``(x, y)``
    (columns) gives a first guess, corrected by comparing the position with the
    sines and cosines of the grid coordinates. The fractions are the offsets
    from the cell's first row and column, ``asin(sin(phi - phi_j))`` and
    ``atan2(sin(lambda - lambda_i), cos(lambda - lambda_i))`` by the
    angle-difference identities, divided by the cell's spacing: the same
    weights as ``(phi - phi_j) / (phi_{j+1} - phi_j)`` in
    :func:`interpolate`, to rounding.

    Parameters
    ----------
    px, py, pz : float
        Unit vector of the position.
    rows : ndarray, shape (nlat, 3)
        ``sin``, ``cos`` of each grid latitude and the inverse spacing (rad-1)
        to the next row.
    columns : ndarray, shape (nlon, 3)
        The same for the longitudes (spacing to the next column, wrapping).
    row_guess, column_guess : ndarray of int64
        First guesses per bin of ``z`` in [-1, 1] and of the pseudo-angle in
        [0, 4) (see :func:`flowpipe.parcels._window.cell_tables`).

    References
    ----------
    Angle-difference identities and the series of :func:`_small_asin` and
    :func:`_small_atan2`: Abramowitz & Stegun (1964), Handbook of
    Mathematical Functions, eqs. 4.3.16-17 (from memory); table lookup
    followed by a local search of an ordered table: Press, Teukolsky,
    Vetterling & Flannery (2007), Numerical Recipes, 3rd ed., section 3.1.1.
    """
    z = min(max(pz, -1.0), 1.0)
    last_row = rows.shape[0] - 2
    j = row_guess[min(int((z + 1.0) * (0.5 * row_guess.shape[0])), row_guess.shape[0] - 1)]
    while j < last_row and z >= rows[j + 1, 0]:
        j += 1
    while j > 0 and z < rows[j, 0]:
        j -= 1
    rho = math.sqrt(px * px + py * py)
    fy = _small_asin(z * rows[j, 1] - rho * rows[j, 0]) * rows[j, 2]
    fy = min(max(fy, 0.0), 1.0)

    x, y = px, py
    a = abs(x) + abs(y)
    if a == 0.0:  # at a pole: longitude 0, as atan2(0, 0)
        x, y, a = 1.0, 0.0, 1.0
    pseudo = 1.0 - x / a if y >= 0.0 else 3.0 + x / a  # increases with longitude, 0..4
    nbin = column_guess.shape[0]
    i = column_guess[min(int(pseudo * (0.25 * nbin)), nbin - 1)]
    nlon = columns.shape[0]
    i1 = i + 1 if i + 1 < nlon else 0
    while y * columns[i1, 1] - x * columns[i1, 0] >= 0.0:  # at or past the next column
        i = i1
        i1 = i + 1 if i + 1 < nlon else 0
    while y * columns[i, 1] - x * columns[i, 0] < 0.0:  # before this column
        i1 = i
        i = i - 1 if i > 0 else nlon - 1
    fx = _small_atan2(y * columns[i, 1] - x * columns[i, 0],
                      x * columns[i, 1] + y * columns[i, 0]) * columns[i, 2]
    fx = min(max(fx, 0.0), 1.0)
    return j, fy, i, i1, fx


@numba.njit(cache=True, inline="always")
def _cell(px, py, pz, lat, lat_uniform, lon, lon_uniform, periodic, tables):
    """The grid cell of a unit vector: status, row ``j`` and fraction ``fy``, columns ``i``, ``i1``
    and fraction ``fx`` (see :func:`interpolate`); ``LEFT_DOMAIN`` outside a limited area.

    Global grids use :func:`_global_cell` with ``tables``; limited areas
    locate the latitude and longitude of the position.

    References
    ----------
    See :func:`interpolate`.
    """
    if periodic:
        j, fy, i, i1, fx = _global_cell(px, py, pz, tables[0], tables[1], tables[2], tables[3])
        return ACTIVE, j, fy, i, i1, fx
    lat_deg = math.degrees(math.asin(min(max(pz, -1.0), 1.0)))
    lon_deg = math.degrees(math.atan2(py, px))
    j, fy, inside = _locate(lat, lat_uniform, lat_deg)
    if not inside:
        return LEFT_DOMAIN, 0, 0.0, 0, 0, 0.0
    nlon = lon.shape[0]
    shifted = lon[0] + (lon_deg - lon[0]) % 360.0
    if shifted > lon[nlon - 1] + EDGE_TOLERANCE and 360.0 - (shifted - lon[0]) <= EDGE_TOLERANCE:
        shifted -= 360.0  # just west of the western edge, within rounding
    i, fx, inside = _locate(lon, lon_uniform, shifted)
    if not inside:
        return LEFT_DOMAIN, 0, 0.0, 0, 0, 0.0
    return ACTIVE, j, fy, i, i + 1, fx


@numba.njit(cache=True, inline="always")
def interpolate(field, s0, s1, wt, px, py, pz, level, lat, lat_uniform, lon, lon_uniform,
                periodic, tables, levels, log_levels, out):
    """Sample every component of ``field`` at one position and time.

    Linear in time between slots ``s0`` and ``s1`` (weight ``wt`` on ``s1``),
    bilinear in latitude-longitude index space, linear in the vertical
    coordinate (``log`` of pressure when ``log_levels``). The vertical
    coordinate is clamped to the range of ``levels``: leaving it is judged by
    the caller.

    Parameters
    ----------
    field : ndarray, shape (nslot, nlev, nlat, nlon, ncomp)
    s0, s1 : int
        Slots of the earlier and later time slice.
    wt : float
        Time weight of ``s1`` in [0, 1].
    px, py, pz : float
        Unit vector of the position.
    level : float
        Vertical coordinate (hPa or m); ignored when there is one level.
    lat, lon : ndarray
        Ascending grid coordinates in degrees (``lat`` includes any virtual
        pole rows).
    lat_uniform, lon_uniform, periodic : bool
        Equal spacing of each axis; longitudes wrap round the globe.
    tables : tuple
        On global grids, the tables of
        :func:`flowpipe.parcels._window.cell_tables` with which
        :func:`_global_cell` finds the cell (the weights are the bilinear
        ones above, to rounding); unused on limited areas.
    levels : ndarray
        Ascending vertical interpolation coordinates (``log p`` or height).
    log_levels : bool
        Interpolate in the logarithm of ``level``.
    out : ndarray, shape (ncomp,)
        Receives the sampled values.

    Returns
    -------
    int
        ``ACTIVE`` on success, ``LEFT_DOMAIN`` outside a limited-area grid,
        ``MISSING_WIND`` when a value needed is missing (NaN).

    References
    ----------
    Bilinear interpolation on a rectilinear grid: Press, Teukolsky, Vetterling
    & Flannery (2007), Numerical Recipes, 3rd ed., section 3.6, eq. 3.6.5.
    Interpolating the Cartesian components of the wind rather than ``u, v``
    keeps the interpolant smooth across the poles, as in the Cartesian
    trajectory formulation of Stohl, Wotawa, Seibert & Kromp-Kolb (1995),
    J. Appl. Meteor. 34, 2149-2165 (from memory); linear interpolation in
    log-pressure is common practice.
    """
    ncomp = field.shape[4]
    flag, j, fy, i, i1, fx = _cell(px, py, pz, lat, lat_uniform, lon, lon_uniform, periodic, tables)
    if flag != ACTIVE:
        return flag
    nlev = levels.shape[0]
    if nlev > 1:
        s = math.log(level) if log_levels else level
        k, fz, _ = _locate(levels, False, s)
        k1 = k + 1
    else:
        k, fz, k1 = 0, 0.0, 0
    w00, w01 = (1.0 - fy) * (1.0 - fx), (1.0 - fy) * fx
    w10, w11 = fy * (1.0 - fx), fy * fx
    total = 0.0
    if fz == 0.0:
        # One level (or exactly on one): the two times only, each component
        # summed in a register; a time of weight 0 is not read.
        a, b = 1.0 - wt, wt
        for c in range(ncomp):
            value = 0.0
            if a != 0.0:
                value += a * (w00 * field[s0, k, j, i, c] + w01 * field[s0, k, j, i1, c]
                              + w10 * field[s0, k, j + 1, i, c]
                              + w11 * field[s0, k, j + 1, i1, c])
            if b != 0.0:
                value += b * (w00 * field[s1, k, j, i, c] + w01 * field[s1, k, j, i1, c]
                              + w10 * field[s1, k, j + 1, i, c]
                              + w11 * field[s1, k, j + 1, i1, c])
            out[c] = value
            total += value
    else:
        for c in range(ncomp):
            out[c] = 0.0
        # Four layers (two times by two levels), each a bilinear sum.
        for layer in range(4):
            later, upper = layer // 2, layer % 2
            weight = (wt if later else 1.0 - wt) * (fz if upper else 1.0 - fz)
            if weight == 0.0:
                continue
            slot = s1 if later else s0
            kk = k1 if upper else k
            for c in range(ncomp):
                out[c] += weight * (w00 * field[slot, kk, j, i, c]
                                    + w01 * field[slot, kk, j, i1, c]
                                    + w10 * field[slot, kk, j + 1, i, c]
                                    + w11 * field[slot, kk, j + 1, i1, c])
        for c in range(ncomp):
            total += out[c]
    if total != total:  # NaN: some value needed is missing
        return MISSING_WIND
    return ACTIVE


@numba.njit(cache=True, inline="always")
def _rate(field, s0, s1, wt, px, py, pz, level, lat, lat_uniform, lon, lon_uniform, periodic,
          tables, levels, log_levels, vertical_scale, radius, work):
    """Status and time derivative ``(dx, dy, dz, dlevel)/dt`` of the state at one point.

    The interpolated Cartesian wind is projected on the tangent plane of the
    normalised position and divided by the radius, so that the rate keeps
    the length of the position vector constant; the vertical rate is the
    vertical velocity times ``vertical_scale`` (0 for level-following runs).

    References
    ----------
    ``dr/dt = (V - (V . r) r) / a`` for a unit position vector ``r``: the
    Cartesian form of the horizontal trajectory equation (common practice;
    see e.g. Williamson et al. 1992, J. Comput. Phys. 102, 211-224, section 2
    for the Cartesian form of a wind on the sphere).
    """
    norm = math.sqrt(px * px + py * py + pz * pz)
    qx, qy, qz = px / norm, py / norm, pz / norm
    flag = interpolate(field, s0, s1, wt, qx, qy, qz, level, lat, lat_uniform, lon, lon_uniform,
                       periodic, tables, levels, log_levels, work)
    if flag != ACTIVE:
        return flag, 0.0, 0.0, 0.0, 0.0
    vx, vy, vz = work[0], work[1], work[2]
    radial = vx * qx + vy * qy + vz * qz
    rate_level = work[3] * vertical_scale if vertical_scale != 0.0 else 0.0
    return (ACTIVE, (vx - radial * qx) / radius, (vy - radial * qy) / radius,
            (vz - radial * qz) / radius, rate_level)


#: Floating-point licences of :func:`advance`: fused multiply-adds, reciprocals
#: and reassociation (rounding-level changes only); never the no-NaN or
#: no-infinity ones, which would break the detection of missing wind.
FASTMATH = {"nsz", "arcp", "contract", "reassoc"}


@numba.njit(cache=True, parallel=True, fastmath=FASTMATH)
def advance(pos, level, status, h, field, slot0, slot1, weight, lat, lat_uniform, lon,
            lon_uniform, periodic, tables, levels, log_levels, vertical_scale,
            lowest_at_top_of_range, radius, scheme, iterations, tolerance):
    """Advance every active parcel by one time step ``h`` (seconds, negative backward).

    Parameters
    ----------
    pos : ndarray, shape (n, 3)
        Unit position vectors, updated in place.
    level : ndarray, shape (n,)
        Vertical coordinates (hPa or m), updated in place.
    status : ndarray of int8, shape (n,)
        ``ACTIVE`` parcels are advanced; a parcel that leaves the domain,
        meets missing wind or leaves the vertical range keeps its last
        position and gets the matching status.
    h : float
        Time step in seconds.
    field : ndarray, shape (nslot, nlev, nlat, nlon, ncomp)
        Cartesian wind components (m s-1) and, when ``ncomp == 4``, the
        vertical velocity.
    slot0, slot1, weight : ndarray, shape (3,)
        Slots and time weights at the stage times ``t``, ``t + h/2``,
        ``t + h``.
    lat, lat_uniform, lon, lon_uniform, periodic, tables, levels, log_levels
        As in :func:`interpolate`.
    vertical_scale : float
        Factor from the vertical velocity to level units per second
        (0.01 for omega in Pa s-1 on hPa levels, 1 for w on height levels,
        0 for level-following runs).
    lowest_at_top_of_range : bool
        True when the largest vertical coordinate is the lowest level
        (pressure).
    radius : float
        Sphere radius in m.
    scheme : int
        ``RK4`` or ``PETTERSSEN``.
    iterations : int
        Most corrector iterations of the Petterssen scheme.
    tolerance : float
        Convergence of the Petterssen iteration (radians and level units).

    References
    ----------
    The classical fourth-order Runge-Kutta method: Kutta (1901), "Beitrag zur
    naeherungsweisen Integration totaler Differentialgleichungen", Z. Math.
    Phys. 46, 435-453; Butcher (2016), Numerical Methods for Ordinary
    Differential Equations, 3rd ed., section 23. The iterative scheme:
    Petterssen (1940), Weather Analysis and Forecasting, McGraw-Hill,
    pp. 221-223 (from memory). Integrating in 3-D Cartesian coordinates with
    renormalisation after each step avoids the polar singularity of
    latitude-longitude equations (common practice).
    """
    n = pos.shape[0]
    nlev = levels.shape[0]
    nblock = (n + BLOCK - 1) // BLOCK
    nstage = 4 if scheme == RK4 else 1 + iterations
    for block in numba.prange(nblock):
        first, stop = block * BLOCK, min(n, (block + 1) * BLOCK)
        work = np.empty(field.shape[4])
        # Per parcel of the block: the point of the next stage, the mean rate over
        # the step and (Petterssen) the rate at the start.
        point = np.empty((stop - first, 4))
        mean = np.zeros((stop - first, 4))
        start = np.empty((stop - first, 4))
        settled = np.zeros(stop - first, dtype=np.bool_)  # Petterssen: converged
        for p in range(first, stop):
            point[p - first, 0], point[p - first, 1] = pos[p, 0], pos[p, 1]
            point[p - first, 2], point[p - first, 3] = pos[p, 2], level[p]
        # Stage by stage over the block, so that the evaluations of different
        # parcels (independent) overlap in the processor; one call site for every
        # stage keeps the compiled kernel small.
        # RK4: stages at t, t + h/2, t + h/2, t + h with weights 1, 2, 2, 1 (/6).
        # Petterssen: the rate at the start, then the mean of the start and
        # end rates, re-evaluated at the new end point until it settles.
        for stage in range(nstage):
            if scheme == RK4:
                ts = 0 if stage == 0 else (2 if stage == 3 else 1)
            else:
                ts = 0 if stage == 0 else 2
            for p in range(first, stop):
                q = p - first
                if status[p] != ACTIVE or settled[q]:
                    continue
                flag, kx, ky, kz, kl = _rate(
                    field, slot0[ts], slot1[ts], weight[ts], point[q, 0], point[q, 1],
                    point[q, 2], point[q, 3], lat, lat_uniform, lon, lon_uniform, periodic,
                    tables, levels, log_levels, vertical_scale, radius, work)
                if flag != ACTIVE:
                    status[p] = flag
                    continue
                x0, y0, z0, l0 = pos[p, 0], pos[p, 1], pos[p, 2], level[p]
                mx, my, mz, ml = mean[q, 0], mean[q, 1], mean[q, 2], mean[q, 3]
                if scheme == RK4:
                    share = (1.0 if stage == 0 or stage == 3 else 2.0) / 6.0
                    mx, my, mz, ml = mx + share * kx, my + share * ky, mz + share * kz, \
                        ml + share * kl
                    reach = 0.5 * h if stage < 2 else h
                    px, py, pz, pl = x0 + reach * kx, y0 + reach * ky, z0 + reach * kz, \
                        l0 + reach * kl
                else:
                    if stage == 0:
                        start[q, 0], start[q, 1], start[q, 2], start[q, 3] = kx, ky, kz, kl
                        nx, ny, nz, nl = kx, ky, kz, kl
                    else:
                        nx, ny = 0.5 * (start[q, 0] + kx), 0.5 * (start[q, 1] + ky)
                        nz, nl = 0.5 * (start[q, 2] + kz), 0.5 * (start[q, 3] + kl)
                    change = abs(h) * max(abs(nx - mx), abs(ny - my), abs(nz - mz),
                                          abs(nl - ml))
                    mx, my, mz, ml = nx, ny, nz, nl
                    settled[q] = stage > 0 and change < tolerance
                    px, py, pz, pl = x0 + h * mx, y0 + h * my, z0 + h * mz, l0 + h * ml
                mean[q, 0], mean[q, 1], mean[q, 2], mean[q, 3] = mx, my, mz, ml
                point[q, 0], point[q, 1], point[q, 2], point[q, 3] = px, py, pz, pl
        for p in range(first, stop):
            if status[p] != ACTIVE:
                continue
            q = p - first
            x0, y0, z0, l0 = pos[p, 0], pos[p, 1], pos[p, 2], level[p]
            mx, my, mz, ml = mean[q, 0], mean[q, 1], mean[q, 2], mean[q, 3]
            x1, y1, z1, l1 = x0 + h * mx, y0 + h * my, z0 + h * mz, l0 + h * ml
            norm = math.sqrt(x1 * x1 + y1 * y1 + z1 * z1)
            x1, y1, z1 = x1 / norm, y1 / norm, z1 / norm
            if not periodic:  # the end point itself must lie inside a limited-area domain
                flag = _cell(x1, y1, z1, lat, lat_uniform, lon, lon_uniform, periodic,
                             tables)[0]
                if flag != ACTIVE:
                    status[p] = flag
                    continue
            if vertical_scale != 0.0 and nlev > 1:
                if log_levels:
                    s = math.log(l1) if l1 > 0.0 else -math.inf  # zero pressure: above the top
                else:
                    s = l1
                if s < levels[0] - EDGE_TOLERANCE:
                    status[p] = REACHED_HIGHEST if lowest_at_top_of_range else REACHED_LOWEST
                    continue
                if s > levels[nlev - 1] + EDGE_TOLERANCE:
                    status[p] = REACHED_LOWEST if lowest_at_top_of_range else REACHED_HIGHEST
                    continue
            pos[p, 0], pos[p, 1], pos[p, 2], level[p] = x1, y1, z1, l1


@numba.njit(cache=True)
def sample(pos, level, status, field, s0, s1, wt, lat, lat_uniform, lon, lon_uniform, periodic,
           tables, levels, log_levels, out):
    """Sample ``field`` at the positions of the active parcels (NaN elsewhere).

    Parameters
    ----------
    pos, level, status
        As in :func:`advance`.
    field, s0, s1, wt, lat, lat_uniform, lon, lon_uniform, periodic, tables, levels, log_levels
        As in :func:`interpolate`.
    out : ndarray, shape (n, ncomp)
        Receives the values.

    References
    ----------
    See :func:`interpolate`.
    """
    ncomp = field.shape[4]
    work = np.empty(ncomp)
    for p in range(pos.shape[0]):
        flag = MISSING_WIND
        if status[p] == ACTIVE:
            flag = interpolate(field, s0, s1, wt, pos[p, 0], pos[p, 1], pos[p, 2], level[p], lat,
                               lat_uniform, lon, lon_uniform, periodic, tables, levels,
                               log_levels, work)
        for c in range(ncomp):
            out[p, c] = work[c] if flag == ACTIVE else np.nan


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
