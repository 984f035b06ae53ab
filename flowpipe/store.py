"""The one writer every stage uses: CF encodings and atomic replacement.

A file appears under its final name only when it is complete: it is written
to a temporary name in the target directory, flushed to disk, then renamed
(``os.replace`` is atomic on POSIX file systems), and the directory entry is
flushed too. A crash leaves at most a hidden ``.NAME.tmp-*`` file behind,
never a half-written file under the final name.
"""

from __future__ import annotations

import contextlib
import os
import uuid
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import xarray as xr

from .errors import UsageError

#: The netCDF default fill value for 32- and 64-bit floats (NetCDF User Guide,
#: ``NC_FILL_FLOAT`` / ``NC_FILL_DOUBLE``).
FILL_FLOAT = 9.969209968386869e36


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike, protect: tuple[str, ...] = ()) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; rename it to ``path`` on success.

    Parameters
    ----------
    path : path-like
        The final name.
    protect : tuple of str
        Paths that must never be overwritten (the inputs of the run).
    """
    final = Path(path)
    final.parent.mkdir(parents=True, exist_ok=True)
    for item in protect:
        if item and final.exists() and Path(item).exists() and os.path.samefile(item, final):
            raise UsageError(f"{final}: is one of the inputs; choose another output name")
    tmp = final.parent / f".{final.name}.tmp-{os.getpid()}-{uuid.uuid4().hex[:8]}"
    try:
        yield tmp
        with open(tmp, "rb+") as handle:
            os.fsync(handle.fileno())
        os.replace(tmp, final)
        dir_fd = os.open(final.parent, os.O_RDONLY)
        try:
            os.fsync(dir_fd)
        finally:
            os.close(dir_fd)
    finally:
        with contextlib.suppress(FileNotFoundError):
            tmp.unlink()


def _encoding(ds: xr.Dataset, float32: bool) -> dict[str, dict]:
    encoding: dict[str, dict] = {}
    for name, var in ds.variables.items():
        enc: dict = {}
        if name in ds.coords and name in ds.dims:
            enc["_FillValue"] = None
        elif np.issubdtype(var.dtype, np.floating):
            dtype = np.float32 if float32 else var.dtype
            enc.update(zlib=True, complevel=4, shuffle=True, dtype=dtype, _FillValue=FILL_FLOAT)
            if var.ndim:
                enc["chunksizes"] = tuple(
                    n if d in ("latitude", "longitude", "obs", "total_wavenumber") else 1
                    for d, n in zip(var.dims, var.shape, strict=True)
                )
        elif np.issubdtype(var.dtype, np.integer) and name not in ds.coords:
            enc.update(zlib=True, complevel=4, shuffle=True)
        if name == "time" or np.issubdtype(var.dtype, np.datetime64):
            enc.pop("dtype", None)
            if "units" not in var.encoding:
                enc["units"] = "hours since 1970-01-01 00:00:00"
            enc["dtype"] = np.float64
        encoding[name] = enc
    return encoding


def write(ds: xr.Dataset, path: str | os.PathLike, *, float32: bool = False) -> Path:
    """Write a Dataset to NetCDF-4 atomically, with CF encodings.

    Data variables are compressed (zlib level 4 with shuffle) and chunked one
    horizontal slab (or one trajectory) at a time; missing values are written
    as the netCDF default fill value.

    Parameters
    ----------
    ds : xarray.Dataset
        What to write; dask-backed data are computed while writing.
    path : path-like
        The final file name.
    float32 : bool
        Store floating-point data variables in single precision: about seven
        significant digits (a relative rounding error of at most 6e-8), ample
        for plotting and most diagnostics and half the size.

    Returns
    -------
    pathlib.Path
        The path written.
    """
    final = Path(path)
    protect = tuple(ds.attrs.get("input_files", "").splitlines())
    with atomic_path(final, protect) as tmp:
        ds.to_netcdf(tmp, engine="netcdf4", format="NETCDF4", encoding=_encoding(ds, float32))
    return final
