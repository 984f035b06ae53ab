"""Choosing what a decomposition writes, and the wind speed and direction it can add.

``--fields`` (config ``[decompose] fields``) names the variables to write: any
the decomposition produces, plus the speed and direction of the full wind
(CF ``wind_speed``, ``wind_from_direction``) and of its rotational and divergent
parts. Quality figures (per-slab errors, shares) are always kept: they say
whether the fields can be trusted. Selecting is lazy: the fields left out are
never computed.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import xarray as xr

from .annotate import variable_attrs
from .choices import KEPT_WITH_FIELDS, WIND_PRODUCTS
from .errors import UsageError


def speed_and_direction(u: np.ndarray, v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Wind speed and the direction the wind blows from.

    Parameters
    ----------
    u, v : numpy.ndarray
        Eastward and northward components (m s-1).

    Returns
    -------
    speed : numpy.ndarray
        ``hypot(u, v)``, m s-1.
    from_direction : numpy.ndarray
        Degrees clockwise from north, in [0, 360), the meteorological convention
        (a westerly, ``u > 0, v = 0``, blows from 270 degrees); 0 where the wind
        is calm, as CF's ``wind_from_direction`` leaves calm undefined.

    References
    ----------
    CF standard-name table, ``wind_from_direction``: "the direction from which
    it is blowing", measured clockwise from north (WMO, Manual on Codes,
    WMO-No. 306, code table 0877 uses the same convention).
    """
    speed = np.hypot(u, v)
    direction = np.mod(np.degrees(np.arctan2(-u, -v)), 360.0)
    # rounding just below 360 means north; calm has no direction
    return speed, np.where((direction >= 360.0) | (speed == 0), 0.0, direction) + 0.0


def _product(u: xr.DataArray, v: xr.DataArray, quantity: str, name: str) -> xr.DataArray:
    index = 0 if quantity == "speed" else 1
    out = xr.apply_ufunc(lambda a, b: speed_and_direction(a, b)[index], u, v,
                         dask="parallelized", output_dtypes=[np.float64])
    out.attrs = variable_attrs(name)
    out.encoding = {k: val for k, val in u.encoding.items() if k == "dtype"}
    return out


def select_fields(parts: xr.Dataset, wind: xr.Dataset, names: Sequence[str] | None) -> xr.Dataset:
    """The variables of a decomposition to write.

    Parameters
    ----------
    parts : xarray.Dataset
        A result of :func:`flowpipe.decompose` (optionally merged with
        :func:`flowpipe.kinematics`).
    wind : xarray.Dataset
        The wind it was computed from (for the full wind's speed and direction).
    names : sequence of str, optional
        Variables of ``parts`` and :data:`WIND_PRODUCTS`; ``None`` keeps all
        of ``parts``.

    Returns
    -------
    xarray.Dataset
        The named variables with the quality figures of :data:`KEPT_WITH_FIELDS`.

    Raises
    ------
    flowpipe.errors.UsageError
        For a name that is neither a variable of ``parts`` nor a wind product
        it can make.
    """
    if names is None:
        return parts
    available = [str(n) for n in parts.data_vars if n not in KEPT_WITH_FIELDS]
    winds = set(parts.data_vars) | {"u", "v"}  # the full wind is the input's
    products = [n for n, (un, vn, _) in WIND_PRODUCTS.items() if {un, vn} <= winds]
    unknown = [n for n in names if n not in available and n not in products]
    if unknown:
        raise UsageError(f"--fields: {', '.join(unknown)} not written by the "
                         f"{parts.attrs.get('method', '')} method; choose from "
                         f"{', '.join(available + products)}")
    full = wind[["u", "v"]]
    if "level" in parts.dims and "level" in full.dims:
        full = full.sel(level=parts["level"])
    source = parts.assign(u=full["u"], v=full["v"])
    out = parts[[n for n in names if n in available] +
                [n for n in KEPT_WITH_FIELDS if n in parts.data_vars]]
    for name in names:
        if name in WIND_PRODUCTS:
            un, vn, quantity = WIND_PRODUCTS[name]
            out[name] = _product(source[un], source[vn], quantity, name)
    return out[[*names, *(n for n in out.data_vars if n not in names)]]
