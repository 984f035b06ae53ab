"""A description of one input file: what ``flowpipe inspect`` prints."""

from __future__ import annotations

import os

import numpy as np
import xarray as xr

from .choices import DEFAULT_MAX_SPEED
from .grid import describe_grid
from .ingest import forecast_axes, open_wind, run_text, wind_checks


def _time_text(value) -> str:
    if isinstance(value, np.datetime64):
        return np.datetime_as_string(value, unit="s") + "Z"
    return value.isoformat()  # cftime datetimes


def describe_wind(wind: xr.Dataset, max_speed: float = DEFAULT_MAX_SPEED) -> dict:
    """Describe a canonical wind Dataset as a JSON-friendly dict (computes missing counts).

    The keys are those of the contract's ``inspect --json`` (``u``, ``v``,
    ``grid``, ``latitudes``, ``poles``, ``pole_rows``, ``nlat``, ``nlon``, ``levels``,
    ``times``) and a few more; ``run`` is the forecast run the Dataset holds (ISO
    8601, ``None`` when it holds no forecast or several runs); ``members`` the number of
    ensemble members (``realization``), ``None`` without them; ``implausible`` the
    winds not finite or faster than ``max_speed`` m s-1
    (:func:`flowpipe.ingest.wind_checks`, for a wind opened with
    ``implausible=None``), ``None`` when there are none; the missing points and the
    implausible winds are found in one pass over the data.
    """
    grid = describe_grid(wind)
    missing, implausible = wind_checks(wind, ("u", "v", "omega", "w"), max_speed)
    vertical = next((n for n in ("omega", "w") if n in wind), None)
    times = wind["time"].values if "time" in wind.dims else np.array([])
    report = {
        "u": wind["u"].attrs["source_name"],
        "v": wind["v"].attrs["source_name"],
        "u_units": wind["u"].attrs["source_units"],
        "vertical_velocity": wind[vertical].attrs["source_name"] if vertical else None,
        **grid.as_dict(),
        "level_type": wind.attrs.get("level_type", "none"),
        "levels": [float(x) for x in wind["level"].values] if "level" in wind.dims else None,
        "level_units": wind["level"].attrs.get("units") if "level" in wind.dims else None,
        "times": int(times.size),
        "members": int(wind.sizes["realization"]) if "realization" in wind.dims else None,
        "realizations": ([int(m) if np.issubdtype(wind["realization"].dtype, np.integer)
                          else str(m) for m in wind["realization"].values]
                         if "realization" in wind.dims else None),
        "time_range": [_time_text(times[0]), _time_text(times[-1])] if times.size else None,
        "calendar": (wind["time"].encoding.get("calendar", "standard")
                     if "time" in wind.dims else None),
        "run": (run_text(wind["forecast_reference_time"].values[()])
                if "forecast_reference_time" in wind.coords and
                wind["forecast_reference_time"].ndim == 0 else None),
        "missing": missing,
        "implausible": implausible,
        "other_variables": sorted(str(n) for n in wind.data_vars if n not in ("u", "v", "omega", "w")),
    }
    return report


def inspect_file(path: str | os.PathLike, u: str | None = None, v: str | None = None,
                 max_speed: float = DEFAULT_MAX_SPEED) -> dict:
    """Open one file (or glob) and describe it, with ``file`` naming it; implausible winds
    (faster than ``max_speed`` m s-1, or not finite) are described, not refused."""
    runs, leads = forecast_axes(path, u=u, v=v)
    # several runs overlap in valid time: describe the newest, list them all
    wind = open_wind(path, u=u, v=v, run="latest" if len(runs) > 1 else None,
                     implausible=None)
    return {"file": os.fspath(path), **describe_wind(wind, max_speed),
            "runs": [run_text(r) for r in runs] if runs else None,
            "leads": leads or None}
