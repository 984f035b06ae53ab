"""flowpipe: kinematics of gridded wind fields.

Public API (re-exports only)::

    import flowpipe as fp
    wind = fp.open_wind(paths)      # canonical, lazy xarray.Dataset
    grid = fp.describe_grid(wind)   # global/regional, equiangular/Gaussian, weights
    parts = fp.decompose(wind)      # Helmholtz decomposition (contract variables)
    kin = fp.kinematics(wind)       # absolute vorticity, deformation, energy spectra
    tracks = fp.advect(wind, starts, hours=48, backward=True)  # CF trajectories
    fp.write(dataset, "out.nc")     # CF-annotated, atomic
    fig = fp.render("out.nc")       # matplotlib figure of a field or of trajectories
    summary = fp.run("night.toml")  # the batch job of a TOML config
"""

import sys
import types
from importlib import import_module

from ._version import __version__
from .errors import FlowpipeError, InputError, UsageError

#: Where each public name lives; a module is imported on first use of one of its names, so
#: that ``import flowpipe.config`` (say) loads no numerical stack (PEP 562 module __getattr__).
_PUBLIC = {
    "advect": "parcels", "circulation": "contours", "decompose": "decompose",
    "describe_grid": "grid", "describe_wind": "inspection", "ftle": "ftle",
    "GridInfo": "grid", "kinematics": "kinematics", "open_wind": "ingest", "render": "maps",
    "run": "pipeline", "select_fields": "fields", "starts_box": "parcels", "starts_line": "parcels",
    "starts_ring": "parcels", "write": "store",
}

__all__ = [
    "FlowpipeError", "GridInfo", "InputError", "UsageError", "__version__", "advect",
    "circulation", "decompose", "describe_grid", "describe_wind", "ftle", "kinematics",
    "open_wind", "render", "run", "select_fields", "starts_box", "starts_line", "starts_ring", "write",
]


def __getattr__(name: str):
    if name in _PUBLIC:
        value = getattr(import_module(f".{_PUBLIC[name]}", __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'flowpipe' has no attribute {name!r}")


def __dir__() -> list[str]:
    return __all__


class _Package(types.ModuleType):
    def __setattr__(self, name: str, value: object) -> None:
        # Importing a stage module (flowpipe.decompose, say) binds it here under its own
        # name, which is also its function's: keep the function, as eager imports did.
        if isinstance(value, types.ModuleType) and _PUBLIC.get(name) == name:
            value = getattr(value, name)
        super().__setattr__(name, value)


sys.modules[__name__].__class__ = _Package
