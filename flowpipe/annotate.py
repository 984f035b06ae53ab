"""CF-1.11 and ACDD-1.3 attributes for everything flowpipe writes."""

from __future__ import annotations

import datetime as _dt
import sys

import xarray as xr

from ._version import __version__

CONVENTIONS = "CF-1.11, ACDD-1.3"

#: The caution every output carries (README, NetCDF ``comment``, map footers).
CAUTION = (
    "Analysis diagnostics computed by flowpipe from gridded model winds. Not a certified "
    "dispersion, hazard or warning product: for decisions about hazardous releases or public "
    "safety defer to the responsible authorities, local regulations and licensed practice."
)

#: Output variables of the contract: standard_name (or None), units, long_name.
VARIABLES: dict[str, tuple[str | None, str, str]] = {
    "streamfunction": ("atmosphere_horizontal_streamfunction", "m2 s-1", "streamfunction"),
    "velocity_potential": ("atmosphere_horizontal_velocity_potential", "m2 s-1",
                           "velocity potential"),
    "vorticity": ("atmosphere_relative_vorticity", "s-1", "relative vorticity"),
    "divergence": ("divergence_of_wind", "s-1", "horizontal divergence"),
    "u_rotational": (None, "m s-1", "eastward component of the rotational (non-divergent) wind"),
    "v_rotational": (None, "m s-1", "northward component of the rotational (non-divergent) wind"),
    "u_divergent": (None, "m s-1", "eastward component of the divergent (irrotational) wind"),
    "v_divergent": (None, "m s-1", "northward component of the divergent (irrotational) wind"),
    "u_harmonic": (None, "m s-1",
                   "eastward component of the harmonic (non-divergent and irrotational) wind"),
    "v_harmonic": (None, "m s-1",
                   "northward component of the harmonic (non-divergent and irrotational) wind"),
}


def variable_attrs(name: str) -> dict[str, str]:
    """CF attributes of a contract output variable."""
    standard_name, units, long_name = VARIABLES[name]
    attrs = {"units": units, "long_name": long_name}
    if standard_name:
        attrs["standard_name"] = standard_name
    return attrs


def now_iso() -> str:
    """The current UTC time, ISO 8601, to the second."""
    return _dt.datetime.now(_dt.UTC).replace(microsecond=0).isoformat().replace("+00:00", "Z")


def global_attrs(ds: xr.Dataset, *, title: str, summary: str, references: str) -> dict[str, str]:
    """The global attributes of a flowpipe output (ACDD-1.3 discovery set)."""
    created = now_iso()
    inputs = ds.attrs.get("input_files", "")
    command = " ".join(sys.argv) if sys.argv and sys.argv[0] else "flowpipe (Python API)"
    history = f"{created} {command}"
    previous = ds.attrs.get("history")
    return {
        "Conventions": CONVENTIONS,
        "title": title,
        "summary": summary,
        "source": f"flowpipe {__version__}",
        "history": f"{previous}\n{history}" if previous else history,
        "date_created": created,
        "references": references,
        "comment": CAUTION,
        "input_files": inputs,
    }
