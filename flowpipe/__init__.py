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

from ._version import __version__
from .contours import circulation
from .decompose import decompose
from .errors import FlowpipeError, InputError, UsageError
from .fields import select_fields
from .ftle import ftle
from .grid import GridInfo, describe_grid
from .ingest import open_wind
from .inspection import describe_wind
from .kinematics import kinematics
from .parcels import advect, starts_box, starts_line, starts_ring
from .pipeline import run
from .store import write

__all__ = [
    "FlowpipeError",
    "GridInfo",
    "InputError",
    "UsageError",
    "__version__",
    "advect",
    "circulation",
    "decompose",
    "describe_grid",
    "describe_wind",
    "ftle",
    "kinematics",
    "open_wind",
    "render",
    "run",
    "select_fields",
    "starts_box",
    "starts_line",
    "starts_ring",
    "write",
]


def __getattr__(name: str):
    # maps pull in matplotlib and cartopy: import them only when a map is wanted
    if name == "render":
        from .maps import render

        return render
    raise AttributeError(f"module 'flowpipe' has no attribute {name!r}")
