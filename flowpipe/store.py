"""The one writer every stage uses: CF encodings and atomic replacement.

A file appears under its final name only when it is complete: it is written
to a temporary name in the target directory, flushed to disk, then renamed
(``os.replace`` is atomic on POSIX file systems), and the directory entry is
flushed too. A crash leaves at most a hidden ``.NAME.tmp-*`` file behind,
never a half-written file under the final name. A file that is one of the
inputs of the run is never overwritten.
"""

from __future__ import annotations

import contextlib
import errno
import math
import os
import shutil
import uuid
import warnings
import zlib
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import dask
import dask.threaded
import netCDF4
import numpy as np
import xarray as xr

from . import annotate
from .choices import (
    DEFAULT_LEVEL,
    MAX_SIGNIFICANT_DIGITS,
    QUALITY_FIGURES,
    compression_for,
    encoding_refusal,
    is_zarr_path,
)
from .cluster import THREADED, distributed_client, local_threads
from .errors import (
    NO_SPACE_ERRNOS,
    FlowpipeError,
    FlowpipeWarning,
    UsageError,
    existing_directory,
    from_os_error,
    megabytes,
    no_space,
    os_problem,
    read_only,
)

#: The netCDF default fill value for 32- and 64-bit floats (NetCDF User Guide,
#: ``NC_FILL_FLOAT`` / ``NC_FILL_DOUBLE``).
FILL_FLOAT = 9.969209968386869e36

#: Dimensions a reader wants whole: one horizontal slab, one track, one spectrum.
WHOLE_DIMS = ("latitude", "longitude", "obs", "total_wavenumber")

#: Smallest chunk worth having: HDF5 chunks much below some tens of KiB cost more
#: in index and per-chunk overhead than they save (HDF5 documentation, "Chunking
#: in HDF5"; common practice).
MIN_CHUNK_BYTES = 64 * 1024

#: Times are stored as float64 seconds: whole seconds stay exact (53-bit mantissa)
#: and missing times (NaT, as in padded trajectories) become the fill value.
TIME_UNITS = "seconds since 1970-01-01 00:00:00"


#: What a variable stored in single precision from double says about its precision.
FLOAT32_NOTE = ("stored in single precision (IEEE 754 binary32): relative rounding error "
                "up to 6e-8 of each value")

_PRECISION_TYPES = {"single": np.dtype(np.float32), "double": np.dtype(np.float64)}

#: Highest level of the blosc codec Zarr stores are compressed with (blosc's clevel 0-9).
ZARR_MAX_LEVEL = 9

#: The CF section 8.4 quantization container of quantized outputs, and the CF version
#: that introduced it.
QUANTIZATION_VARIABLE = "quantization_info"
QUANTIZATION_CF_VERSION = "CF-1.12"


def quantization_error(digits: int) -> float:
    """Largest relative error of GranularBitRound quantization to ``digits`` digits.

    Half a unit in the last significant decimal digit kept, relative to the
    value: ``0.5 * 10**(1 - digits)`` (netCDF-C, "Quantization" in the NetCDF
    User Guide: the algorithm keeps enough bits to preserve ``digits``
    significant decimal digits, rounded to nearest).
    """
    return 0.5 * 10.0 ** (1 - digits)


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike, protect: Iterable[str | os.PathLike] = (),
                needed: int | None = None) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; rename it to ``path`` on success.

    The temporary name keeps the suffix of ``path`` so that writers which
    choose the format from it (matplotlib) see the right one. Errors of the
    user's environment while writing (permissions, a read-only or full disk)
    become one-line :class:`~flowpipe.errors.EnvironmentProblem` errors that
    name the final path, and the temporary file is removed. Other errors that
    name the temporary path (the libraries writing the file know only that one)
    name the final one instead.

    Parameters
    ----------
    path : path-like
        The final name.
    protect : iterable of path-like
        Paths that must never be overwritten (the inputs of the run).
    needed : int, optional
        About how many bytes the file needs, for the message when the disk
        is full (otherwise the size written when it filled up).

    Raises
    ------
    flowpipe.errors.UsageError
        When ``path`` is one of ``protect``, or too long for its temporary name.
    flowpipe.errors.EnvironmentProblem
        When the operating system refuses the write.
    """
    final = Path(path)
    for item in protect:
        if item and final.exists() and Path(item).exists() and os.path.samefile(item, final):
            raise UsageError(f"{final}: is one of the inputs; choose another output name")
    try:
        final.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise from_os_error(exc) from None
    tmp = temporary_name(final)
    # (an earlier store under the final name is first moved to a name of its own)
    _check_name_length(final, temporary_name(final, OLD_TAG) if final.is_dir() else tmp)
    try:
        yield tmp
        if tmp.is_dir():  # a store of many files (Zarr)
            _publish_directory(tmp, final)
        else:
            _fsync_file(tmp)
            os.replace(tmp, final)
        _fsync_directory(final.parent)
    except FlowpipeError:
        raise
    except OSError as exc:
        if exc.errno in NO_SPACE_ERRNOS:
            raise no_space(final, needed or _size(tmp)) from None
        _name_final(exc, tmp, final)
        # (an input that fails while it is read for the write is named as itself)
        raise from_os_error(exc, exc.filename or final) from None
    except Exception as exc:
        # netCDF-C reports a full disk as "NetCDF: HDF error" (no errno): look at the disk
        free = _free_bytes(final.parent)
        if free is not None and free < FULL_DISK_BYTES:
            raise no_space(final, needed or _size(tmp)) from exc
        _name_final(exc, tmp, final)
        raise
    finally:
        # What cannot be removed (a read-only file system refuses even to look at what is
        # not there; a name too long for it) is left to the sweep of the next run
        # (flowpipe.bookkeeping.sweep_temporaries): the error that led here is the one to
        # report. (On success nothing is left to remove.)
        with contextlib.suppress(OSError):
            if tmp.is_dir() and not tmp.is_symlink():
                shutil.rmtree(tmp)
            elif os.path.lexists(tmp):
                # emptied first: a writer that failed may keep it open (netCDF-C cannot
                # close a file it could not flush), and its blocks would stay taken
                os.truncate(tmp, 0)
                tmp.unlink()


#: The longest file name POSIX file systems take (NAME_MAX), where the system cannot say.
NAME_MAX = 255


def _check_name_length(final: Path, tmp: Path) -> None:
    """Refuse a name whose temporary name is longer than the file system takes (netCDF-C
    would report "Permission denied", of the temporary name), saying how long it may be."""
    try:
        limit = os.pathconf(final.parent, "PC_NAME_MAX")
    except (OSError, ValueError):
        limit = NAME_MAX
    extra = len(os.fsencode(tmp.name)) - len(os.fsencode(final.name))
    if len(os.fsencode(final.name)) + extra > limit:
        raise UsageError(f"{final}: file name too long: written first under a temporary name "
                         f"{extra} bytes longer, it may have at most {limit - extra} bytes "
                         "here; choose a shorter name")


def _name_final(exc: BaseException, tmp: Path, final: Path) -> None:
    """Make ``exc`` name ``final`` wherever it names the temporary path ``tmp`` or a path in
    it (the libraries that write the file know only that one): as its file names
    (``final`` itself) and in its text."""
    old, new = str(tmp), str(final)
    exc.args = tuple(a.replace(old, new) if isinstance(a, str) else a for a in exc.args)
    if isinstance(exc, OSError):
        for attr in ("filename", "filename2"):
            name = getattr(exc, attr)
            if isinstance(name, str | bytes | os.PathLike) and Path(os.fsdecode(name)).is_relative_to(tmp):
                setattr(exc, attr, new)
        if exc.strerror:
            exc.strerror = exc.strerror.replace(old, new)


def temporary_name(final: Path, tag: str = "") -> Path:
    """The hidden temporary name of ``final`` in its directory: ``.NAME.tmp-PID-HEX[TAG].SUFFIX``
    (what :func:`flowpipe.bookkeeping.sweep_temporaries` removes after a killed run)."""
    return final.parent / (f".{final.name}.tmp-{os.getpid()}-{uuid.uuid4().hex[:8]}{tag}"
                           f"{final.suffix}")


def _fsync_directory(path: Path) -> None:
    dir_fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(dir_fd)
    finally:
        os.close(dir_fd)


def _fsync_file(path: Path) -> None:
    with open(path, "rb+") as handle:
        os.fsync(handle.fileno())


#: Threads that flush the files of a directory store to disk at once.
FSYNC_THREADS = 8


#: What the temporary name of an earlier store being replaced ends with.
OLD_TAG = "-old"


def _publish_directory(tmp: Path, final: Path) -> None:
    """Rename a complete directory store into place, its files flushed to disk first.

    A directory cannot replace a non-empty one in one ``rename(2)``: an earlier
    store under the final name is first renamed to a temporary name (so a
    crash in between leaves no store under the final name, and the leftover is
    swept like any temporary), then removed once the new one is in place.
    """
    # Many threads at once: measured here on a 0.25 degree store of 268 files, 0.24 s
    # against 1.3 s one file after another (the disk takes the flushes together).
    directories = [Path(root) for root, _, _ in os.walk(tmp)]
    files = [path for directory in directories for path in directory.iterdir()
             if path.is_file()]
    with ThreadPoolExecutor(FSYNC_THREADS) as pool:
        list(pool.map(_fsync_file, files))
        list(pool.map(_fsync_directory, directories))
    old = None
    if final.is_dir() and not final.is_symlink():
        old = temporary_name(final, OLD_TAG)
        os.replace(final, old)
    os.replace(tmp, final)
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)


#: Free space below which a write that failed is taken to have filled the disk: less
#: than one HDF5 chunk of a slab can be written there.
FULL_DISK_BYTES = MIN_CHUNK_BYTES * 4


def _size(path: Path) -> int | None:
    try:
        return path.stat().st_size or None
    except OSError:
        return None


def _free_bytes(directory: Path) -> int | None:
    """Bytes free on the file system of ``directory``; None on one that counts no blocks
    (/proc, /sys: statvfs gives 0 in all and 0 free), which cannot be called full."""
    usage = shutil.disk_usage(directory)
    return usage.free if usage.total else None


def check_space(path: str | os.PathLike, certain: int, upper: int) -> None:
    """Refuse a write that cannot fit on its disk; warn when it may not.

    Parameters
    ----------
    path : path-like
        The file to write (its directory may not exist yet).
    certain : int
        Bytes the file needs whatever the compression (its uncompressed parts).
    upper : int
        Bytes it needs at most (everything uncompressed).

    Raises
    ------
    flowpipe.errors.EnvironmentProblem
        When the free space is less than ``certain``.
    """
    where = existing_directory(path)
    if read_only(path):
        raise os_problem(errno.EROFS, path)
    free = _free_bytes(where)
    if free is None:  # the write itself will tell
        return
    if free < certain:
        raise no_space(path, certain)
    if free < upper:
        warnings.warn(f"{path}: may need up to {megabytes(upper)} before compression, "
                      f"{megabytes(free)} are free there", FlowpipeWarning, stacklevel=3)


def sources(ds: xr.Dataset) -> list[str]:
    """Files ``ds`` was read from: its ``input_files`` and the files behind its variables."""
    found = [line for line in str(ds.attrs.get("input_files", "")).splitlines() if line]
    for item in (ds, *ds.variables.values()):
        source = item.encoding.get("source")
        if source:
            found.append(str(source))
    return found


def chunk_sizes(dims: tuple[str, ...], shape: tuple[int, ...], itemsize: int) -> tuple[int, ...]:
    """HDF5 chunk shape: whole :data:`WHOLE_DIMS`, one step of the others.

    Reading one time and level (one map) or one trajectory then touches one
    chunk. When that is smaller than :data:`MIN_CHUNK_BYTES`, the innermost
    other dimensions grow until it is not.
    """
    sizes = [n if d in WHOLE_DIMS else 1 for d, n in zip(dims, shape, strict=True)]
    for axis in reversed(range(len(dims))):
        if dims[axis] in WHOLE_DIMS:
            continue
        rest = math.prod(sizes) // sizes[axis] * itemsize
        sizes[axis] = max(1, min(shape[axis], -(-MIN_CHUNK_BYTES // max(rest, 1))))
        if math.prod(sizes) * itemsize >= MIN_CHUNK_BYTES:
            break
    return tuple(max(1, s) for s in sizes)


def _stored_type(var: xr.Variable, precision: str) -> np.dtype:
    """The type a floating-point data variable is stored as (see :data:`PRECISIONS`)."""
    if precision in _PRECISION_TYPES:
        return _PRECISION_TYPES[precision]
    wanted = var.encoding.get("dtype")
    return np.dtype(wanted) if wanted is not None and np.dtype(wanted).kind == "f" else var.dtype


def _encoding(ds: xr.Dataset, precision: str, compression: str, level: int | None,
              digits: int | None) -> dict[str, dict]:
    encoding: dict[str, dict] = {}
    bounds = {var.attrs["bounds"] for var in ds.variables.values() if "bounds" in var.attrs}
    packed: dict = {} if compression == "none" else {
        "compression": compression, "shuffle": compression == "zlib",
        "complevel": DEFAULT_LEVEL[compression] if level is None else level}
    for name, var in ds.variables.items():
        old = var.encoding
        enc: dict = {}
        is_dim = name in ds.dims
        if annotate.is_time(var):
            enc.update(units=old.get("units", TIME_UNITS) if is_dim else TIME_UNITS,
                       dtype=np.float64)
            if "calendar" in old:
                enc["calendar"] = old["calendar"]
            # a scalar time (the run of a forecast) is never missing
            enc["_FillValue"] = None if is_dim or not var.ndim else FILL_FLOAT
        elif var.dtype.kind == "m":  # lead times: hours, as forecast files write them
            enc.update(units="hours", dtype=np.float64, _FillValue=None)
        elif _is_text(var) and var.ndim:
            enc["dtype"] = "S1"  # a character array: netCDF-3 has no variable-length strings
        elif is_dim or name in bounds:
            enc["_FillValue"] = None
            if var.dtype.kind in "iu" and var.dtype.itemsize == 8:
                enc["dtype"] = np.dtype(np.int32)  # netCDF-3 readers have no 64-bit integers
        elif np.issubdtype(var.dtype, np.floating):
            enc.update(packed, _FillValue=FILL_FLOAT, dtype=_stored_type(var, precision))
            if digits is not None and var.ndim:
                if digits > MAX_SIGNIFICANT_DIGITS[enc["dtype"].itemsize]:
                    raise UsageError(f"{name} is stored in single precision, which holds "
                                     f"about 7 significant digits, not {digits}: ask for "
                                     "fewer digits or for double precision")
                enc.update(significant_digits=digits, quantize_mode="GranularBitRound")
        elif np.issubdtype(var.dtype, np.integer):
            enc.update(packed, _FillValue=None)
            if var.dtype.itemsize == 8:  # netCDF-3 readers have no 64-bit integers
                enc["dtype"] = np.dtype(np.int32)
        if "complevel" in enc and var.ndim:
            itemsize = np.dtype(enc.get("dtype", var.dtype)).itemsize
            enc["chunksizes"] = chunk_sizes(tuple(map(str, var.dims)), var.shape, itemsize)
        encoding[str(name)] = enc
    return encoding


def _is_text(var: xr.Variable) -> bool:
    """Strings, fixed-width or as Python objects (names of contours, say)."""
    if var.dtype.kind in "US":
        return True
    return var.dtype.kind == "O" and var.size > 0 and isinstance(var.values.flat[0], str)


def _quantized(ds: xr.Dataset, encoding: dict[str, dict], digits: int) -> xr.Dataset:
    """``ds`` with the CF section 8.4 description of its quantized variables.

    A container variable names the algorithm and the library that applied it;
    each quantized variable points to it (``quantization``), gives the digits
    kept (``quantization_nsd``) and states the resulting error bound. The
    container is a CF 1.12 addition (cfdm, the CF reference library, reads it
    only from files that declare CF-1.12), so such a file declares CF-1.12; it
    holds to CF 1.11 otherwise.
    """
    bound = quantization_error(digits)
    ds.attrs["Conventions"] = str(ds.attrs["Conventions"]).replace(
        annotate.CF_VERSION, QUANTIZATION_CF_VERSION)
    container = xr.DataArray(np.int32(0), attrs={
        "algorithm": "granular_bitround",
        "implementation": f"libnetcdf version {netCDF4.__netcdf4libversion__}",
        "long_name": "lossy compression by quantization"})
    ds = ds.assign({QUANTIZATION_VARIABLE: container})
    for name, enc in encoding.items():
        if "significant_digits" in enc:
            note = (f"lossy: quantized to {digits} significant decimal digits (GranularBitRound), "
                    f"relative error at most {bound:.1e} of each value")
            comment = ds[name].attrs.get("comment")
            ds[name].attrs.update(quantization=QUANTIZATION_VARIABLE, quantization_nsd=np.int32(digits),
                                  quantization_maximum_relative_error=bound,
                                  comment=f"{comment}\n{note}" if comment else note)
    encoding[QUANTIZATION_VARIABLE] = {"_FillValue": None}
    return ds


def check_encoding(precision: str = "input", compression: str | None = None,
                   compression_level: int | None = None,
                   significant_digits: int | None = None,
                   output: str | os.PathLike | None = None) -> None:
    """Refuse an encoding :func:`write` cannot make, in one line naming the option
    (:func:`flowpipe.choices.encoding_refusal`; for Zarr ``output``, also what
    Zarr cannot take).

    Raises
    ------
    flowpipe.errors.UsageError
        For a precision, compression or level out of range, or quantization of
        a Zarr ``output``.
    """
    zarr_store = output is not None and is_zarr_path(output)
    if significant_digits is not None and zarr_store:
        raise UsageError(f"{output}: quantization (significant digits) is written to NetCDF "
                         "outputs only; drop it or write a .nc file")
    if zarr_store and compression_level is not None and compression_level > ZARR_MAX_LEVEL:
        raise UsageError(f"{output}: Zarr's blosc codec takes compression levels up to "
                         f"{ZARR_MAX_LEVEL}, not {compression_level}")
    refusal = encoding_refusal(precision, compression, compression_level, significant_digits)
    if refusal:
        raise UsageError(refusal)


#: netCDF-C chunk cache per variable while writing, in bytes (see _write_chunk_cache).
WRITE_CHUNK_CACHE = 4 * 2**20


def write(ds: xr.Dataset, path: str | os.PathLike, *, precision: str = "input",
          compression: str | None = None, compression_level: int | None = None,
          significant_digits: int | None = None,
          attributes: dict[str, str] | None = None) -> Path:
    """Write a Dataset to NetCDF-4 (or Zarr) atomically, CF-1.11 and ACDD-1.3 annotated.

    A ``path`` ending in ``.zarr`` (:data:`ZARR_SUFFIX`) is written as a Zarr
    format 3 store with consolidated metadata and the same attributes, chunks
    and compression (:func:`_zarr_encoding`; no quantization), published like a
    file: written under a temporary name beside it, then renamed into place.

    Attributes are completed by :func:`flowpipe.annotate.complete`; data
    variables are compressed (by default zlib level 1 with shuffle) and chunked
    one horizontal slab (or one trajectory) at a time; missing values are
    written as the netCDF default fill value. Of the encodings variables carry,
    only the storage type a stage asked for is kept (``precision="input"``).

    Parameters
    ----------
    ds : xarray.Dataset
        What to write; dask-backed data are computed while writing, and so
        are attributes whose values are dask arrays (0-d), in the same pass.
        The global quality figures of a lazy result
        (:func:`flowpipe.annotate.quality_summary`) are summed up from its
        per-slab figures as written.
    path : path-like
        The final file name; never one of the files ``ds`` was read from.
    precision : {"input", "single", "double"}
        Storage of floating-point data variables (not coordinates or times).
        ``"input"``: as each variable's ``dtype`` encoding says, which the
        stages set to the precision the wind was stored in (float32 or packed
        16-bit integers give single precision), else as computed. ``"single"``:
        a 24-bit significand, about seven significant digits, a relative
        rounding error of at most 2**-24 (6.0e-8) per value (IEEE 754 binary32),
        ample for plotting and most diagnostics at half the size; magnitudes
        below 1.2e-38 (subnormal) keep only an absolute accuracy of 7e-46, and
        values beyond about 3.4e38 cannot be stored. Variables rounded from
        double say so in their ``comment`` (:data:`FLOAT32_NOTE`).
        ``"double"``: IEEE 754 binary64.
    compression : {"zlib", "zstd", "none"}, optional
        Lossless compression of data variables, zlib with shuffle (:data:`COMPRESSIONS`);
        by default zlib for NetCDF and zstd for a Zarr store (:func:`compression_for`).
    compression_level : int, optional
        zlib 1-9 or zstd 1-22; default 1 (:data:`DEFAULT_LEVEL`).
    significant_digits : int, optional
        Lossy quantization before compression: netCDF-C's GranularBitRound
        keeps this many significant decimal digits, so each value's relative
        error is at most :func:`quantization_error` (``0.5 * 10**(1 - N)``),
        recorded as CF 1.12 section 8.4 describes (container variable
        :data:`QUANTIZATION_VARIABLE`, ``quantization_nsd``) and stated in each
        variable's ``comment`` and ``quantization_maximum_relative_error``.
    attributes : dict, optional
        A site's global attributes (``[metadata]``, ``--attribute``); see
        :func:`flowpipe.annotate.complete`.

    Returns
    -------
    pathlib.Path
        The path written.

    Raises
    ------
    flowpipe.errors.UsageError
        When ``path`` is one of the files ``ds`` was read from.
    flowpipe.errors.EnvironmentProblem
        When the disk has not even room for the uncompressed parts (checked
        before writing; a warning when it may not hold the whole file), or the
        operating system refuses the write (see :func:`atomic_path`).
    """
    final = Path(path)
    check_encoding(precision, compression, compression_level, significant_digits, final)
    compression = compression_for(compression, final)
    out = annotate.complete(ds, attributes)
    lazy = {k: v for k, v in out.attrs.items() if dask.is_dask_collection(v)}
    out.attrs = {k: v for k, v in out.attrs.items() if k not in lazy}
    encoding = _encoding(out, precision, compression, compression_level, significant_digits)
    if significant_digits is not None:
        out = _quantized(out, encoding, significant_digits)
    for name, enc in encoding.items():
        if enc.get("dtype") == np.float32 and out[name].dtype != np.float32:
            comment = out[name].attrs.get("comment")
            out[name].attrs["comment"] = f"{comment}\n{FLOAT32_NOTE}" if comment else FLOAT32_NOTE
    auxiliary = [str(c) for c in out.coords if c not in out.dims]
    for var in out.variables.values():
        # the only encoding kept: the coordinates a stage names (CF 1.11 section 9 readers
        # need them), completed with the other auxiliary coordinates along the variable's
        # dimensions (a forecast's lead along time), which xarray would otherwise move to
        # a global attribute once a variable names its own
        named = var.encoding.get("coordinates") or var.attrs.pop("coordinates", None)
        if named:
            extra = [c for c in auxiliary if c not in named.split()
                     and set(out[c].dims) <= set(var.dims)]
            named = " ".join([*named.split(), *extra])
        var.encoding = {"coordinates": named} if named else {}
    # the grid mapping and cell bounds describe coordinates: scalar coordinates (the run, a
    # single level) belong to the fields, not to them (xarray would list them everywhere)
    for name in (annotate.CRS, *(v.attrs["bounds"] for v in out.variables.values()
                                 if "bounds" in v.attrs)):
        if name in out.variables:
            out[name].encoding["coordinates"] = None
    certain, upper = _stored_bytes(out, encoding)
    check_space(final, certain, upper)
    if is_zarr_path(final):
        with atomic_path(final, sources(ds), needed=upper) as tmp, _quiet_on_failure():
            _write_zarr(out, tmp, _zarr_encoding(out, encoding, compression), lazy)
        return final
    with atomic_path(final, sources(ds), needed=upper) as tmp, _write_chunk_cache(), \
            _quiet_on_failure():
        if compression != "none" and significant_digits is None \
                and distributed_client() is None:  # (workers cannot share an open HDF5 file)
            values = _write_netcdf_chunks(out, tmp, encoding, lazy)
        elif not lazy:
            out.to_netcdf(tmp, engine="netcdf4", format="NETCDF4", encoding=encoding)
            values = []
        else:
            # A caller's attributes known only once the data are computed, computed with
            # the data (tasks they share with it may run twice: dask optimises the write
            # and the attributes as two graphs).
            pending = out.to_netcdf(tmp, engine="netcdf4", format="NETCDF4",
                                    encoding=encoding, compute=False)
            _, *values = dask.compute(pending, *lazy.values())
        found = _late_attributes(out, lazy, values,
                                 lambda: xr.open_dataset(tmp, engine="netcdf4"))
        if found or significant_digits is not None:  # one pass over the file for both
            with netCDF4.Dataset(tmp, "a") as nc:
                for name, value in found.items():
                    nc.setncattr(name, annotate.netcdf3_value(np.asarray(value)[()]))
                if significant_digits is not None:
                    _drop_library_quantization_attrs(nc)
    return final


@contextlib.contextmanager
def _quiet_on_failure() -> Iterator[None]:
    """Run the computations inside on dask's local threads, in a pool of their own that is
    quiet again before an error leaves.

    dask's local scheduler raises the first error of a task (or an interrupt) at once,
    while its other threads go on writing chunks: the temporary output that
    :func:`atomic_path` then removes would refuse to go ("Directory not empty") or
    reappear in part. Here the tasks not started are dropped and the running ones
    finish before the error goes on (:meth:`concurrent.futures.Executor.shutdown`): the
    chunk writes and also the slab transforms of the write's graph that had started, so
    an interrupt or SIGTERM takes effect once the longest of them ends. The
    pool has the threads the scheduler would have (:func:`flowpipe.cluster.local_threads`);
    a dask.distributed client or another scheduler is left to compute as configured.

    Under a client this cannot be had: distributed cancels the tasks of a failed
    computation but does not wait for those running on the workers (nor says when they
    end), so a chunk of a Zarr store a worker is writing then can land after the
    temporary store is removed and recreate part of it (``.NAME.tmp-PID-HEX.zarr/VAR/
    c.…``) beside the final name, which :func:`flowpipe.bookkeeping.sweep_temporaries`
    removes at the next batch run. Never under the final name: the store is renamed
    into place only once every task has succeeded.
    """
    scheduler = dask.config.get("scheduler", None)
    if distributed_client() is not None or not (scheduler in THREADED
                                                or scheduler is dask.threaded.get):
        yield
        return
    # (dask's own kind of pool: the tasks see the context variables of the caller)
    pool = dask.threaded.ContextAwareThreadPoolExecutor(local_threads())
    try:
        with dask.config.set(scheduler=dask.threaded.get, pool=pool):
            yield
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


#: The names in the dask keys of the tasks that write computed chunks: xarray's own
#: (``store-map``) and those of :func:`_write_netcdf_chunks`; progress bars count them.
CHUNK_TASK = "store-chunk"
WRITE_TASKS = ("store-map", CHUNK_TASK)


def _write_netcdf_chunks(out: xr.Dataset, tmp: Path, encoding: dict[str, dict],
                         lazy: dict) -> list:
    """Write a NetCDF-4 file whose large chunks are compressed by many threads at once.

    netCDF-C compresses every chunk inside the HDF5 library, which takes one
    thread at a time: with zlib, writing took most of a night's run (0.1 s a
    0.25 degree float32 field at zlib level 1, against 0.18 s for the
    transforms of the whole slab; benchmarks/bench_throughput.py). Here
    xarray and netCDF-C lay out the file (dimensions, coordinates, attributes,
    the variables with their chunking, shuffle and deflate filters) and write
    every variable held in memory; then the chunks of dask-backed variables
    are written by the tasks that compute them, through HDF5's direct chunk
    write (:func:`_chunk_writer`): each task applies the variable's own filter
    pipeline (shuffle, then deflate at the file's level) while the others
    compute, and only the finished bytes pass through the library. Readers see
    an ordinary NetCDF-4 file.

    Returns the values of the dask-valued attributes ``lazy``, computed in the
    same pass as the data.

    References
    ----------
    HDF5 ``H5Dwrite_chunk`` (HDF Group, HDF5 Reference Manual; :meth:`h5py.h5d.DatasetID.
    write_direct_chunk`); the shuffle filter's byte order and the deflate filter's zlib
    stream (HDF Group, "HDF5 Filters"; RFC 1950, RFC 1951).
    """
    import h5py
    from xarray.backends import NetCDF4DataStore
    from xarray.backends.common import ArrayWriter
    from xarray.backends.netCDF4_ import NETCDF4_PYTHON_LOCK

    # The lock of the netCDF and HDF5 libraries, given: xarray's default adds a per-file lock
    # chosen by the scheduler, and finding it imports distributed (0.16 s); here no dask
    # task writes through this store, and no client runs (see write)
    store = NetCDF4DataStore.open(tmp, mode="w", format="NETCDF4", lock=NETCDF4_PYTHON_LOCK)
    writer = ArrayWriter()  # collects the encoded dask arrays instead of writing them
    try:
        out.dump_to_store(store, writer=writer, encoding=encoding)
    finally:
        store.close()
    with h5py.File(tmp, "r+") as h5:
        tasks = []
        for source, target in zip(writer.sources, writer.targets, strict=True):
            dataset = h5[target.variable_name]
            variable = out.variables[target.variable_name]
            unencoded = _plain_float(variable, encoding.get(target.variable_name, {}))
            if unencoded:  # the variable's own floats: cast and filled by put, in one go
                source = variable.data
            put = _chunk_writer(dataset, unencoded)
            if dataset.chunks is not None:
                source = source.rechunk(dataset.chunks)
            starts = [np.cumsum((0, *sizes[:-1])) for sizes in source.chunks]
            token = dask.base.tokenize(str(tmp), target.variable_name)
            for index, block in zip(np.ndindex(source.numblocks),
                                    source.to_delayed(optimize_graph=False).ravel(),
                                    strict=True):
                start = tuple(int(s[i]) for s, i in zip(starts, index, strict=True))
                key = f"{CHUNK_TASK}-{token}-{'.'.join(map(str, index))}"
                tasks.append(dask.delayed(put)(block, start, dask_key_name=key))
        _, *values = dask.compute(tasks, *lazy.values())
    return values


def _plain_float(variable: xr.Variable, encoding: dict) -> bool:
    """Whether the CF encoding of a dask-backed variable is only a cast of its floats to the
    stored float type, with missing values (NaN) stored as the fill value
    (:data:`FILL_FLOAT`): no packing, no quantization."""
    return (dask.is_dask_collection(variable.data) and variable.dtype.kind == "f"
            and np.dtype(encoding.get("dtype", variable.dtype)).kind == "f"
            and encoding.get("_FillValue") == FILL_FLOAT
            and not {"scale_factor", "add_offset", "significant_digits"} & set(encoding))


def _chunk_writer(dataset, unencoded: bool = False) -> Callable[[np.ndarray, tuple[int, ...]], None]:
    """A function ``put(block, start)`` that stores one chunk of an HDF5 dataset.

    ``unencoded``: the blocks are a variable's own floats (:func:`_plain_float`), not
    xarray's CF encoding of them; ``put`` casts them to the stored type and stores NaN as
    the fill value, in two passes over the block where xarray's encoding takes four
    (0.5 against 2.2 ms a 0.25 degree field, measured here).

    A chunked dataset whose filters are deflate, or shuffle then deflate (as
    netCDF-C sets them for zlib), or Zstandard, gets the chunk filtered here
    and written directly (:func:`_write_netcdf_chunks`); an edge chunk is
    padded with the fill value to the full chunk shape, as HDF5 stores it.
    Deflate at level 1 runs on the ISA-L library: measured here on 0.25 degree
    float32 fields, 9 ms a field against 98 ms for zlib at level 1, within 2 %
    of its size, and a zlib stream any reader decodes; other levels use zlib
    itself; Zstandard frames come from numcodecs. Any other dataset is written
    through h5py as usual.
    """
    plist = dataset.id.get_create_plist()
    filters = [plist.get_filter(i)[:3] for i in range(plist.get_nfilters())]
    ids = [f[0] for f in filters]
    dtype, fill = dataset.dtype, dataset.fillvalue

    def stored(block: np.ndarray) -> np.ndarray:
        block = np.ascontiguousarray(block, dtype=dtype)
        if unencoded:
            missing = np.isnan(block)
            if missing.any():  # (a new array: the block may be another task's input)
                block = np.where(missing, fill, block)
        return block

    if dataset.chunks is None or ids not in ([_DEFLATE], [_SHUFFLE, _DEFLATE], [_ZSTD]):
        def put(block: np.ndarray, start: tuple[int, ...]) -> None:
            region = tuple(slice(s, s + n) for s, n in zip(start, np.shape(block), strict=True))
            dataset[region] = stored(block)
        return put
    level = int(filters[-1][2][0])
    if ids == [_ZSTD]:
        from numcodecs import Zstd

        compress = Zstd(level=level).encode  # one zstd frame, as netCDF-C's filter writes it
    else:
        compress = _isal_level1 if level == 1 else (lambda data: zlib.compress(data, level))
    shape = dataset.chunks
    shuffle = ids[0] == _SHUFFLE

    def put(block: np.ndarray, start: tuple[int, ...]) -> None:
        block = stored(block)
        if block.shape != shape:
            block = np.pad(block, [(0, c - n) for c, n in zip(shape, block.shape, strict=True)],
                           constant_values=fill)
        raw = block.view(np.uint8)
        if shuffle:  # byte k of every value together, then byte k+1 (HDF5 shuffle filter)
            raw = raw.reshape(-1, dtype.itemsize).T
        dataset.id.write_direct_chunk(start, compress(raw.tobytes()))  # h5py's lock serialises
    return put


def _isal_level1(data: bytes) -> bytes:
    from isal import isal_zlib

    return isal_zlib.compress(data, 1)


#: HDF5 filter identifiers (HDF Group, "HDF5 Filters": H5Z_FILTER_DEFLATE, H5Z_FILTER_SHUFFLE,
#: and the registered identifier of the Zstandard filter netCDF-C 4.9 ships).
_DEFLATE, _SHUFFLE, _ZSTD = 1, 2, 32015


#: Bytes blosc compresses at a time, by compressor (0: blosc's own choice). zstd starts
#: afresh in each block: on a 0.25 degree float32 field, blosc's own choice (blocks of a few
#: hundred kilobytes) took 5.2 ms to compress, blocks of 1 MiB 2.0 ms, 1.5 % smaller;
#: zlib was slowest with blosc's own choice too (42 against 55 ms). The block size is
#: written in each chunk's header, so every blosc reader decodes either.
ZARR_BLOCK = {"zstd": 2**20, "zlib": 0}


def _zarr_encoding(ds: xr.Dataset, encoding: dict[str, dict], compression: str) -> dict[str, dict]:
    """The NetCDF encodings of :func:`_encoding` as Zarr format 3 asks for them.

    zlib and zstd become the core ``blosc`` codec (Zarr v3 specification) with
    that compressor, the same level and byte shuffle, as the NetCDF writer
    shuffles before zlib; shuffled floats compress to about three quarters of
    the unshuffled size (benchmarks/bench_throughput.py measures the sizes).
    Every variable is chunked as in NetCDF (:func:`chunk_sizes`: whole slabs).
    """
    from zarr.codecs import BloscCodec

    result: dict[str, dict] = {}
    for name, enc in encoding.items():
        var = ds[name]
        new = {k: enc[k] for k in ("units", "calendar", "_FillValue") if k in enc}
        if "dtype" in enc and np.dtype(enc["dtype"]).kind != "S":  # strings stay strings
            new["dtype"] = enc["dtype"]
        if "complevel" in enc:
            new["compressors"] = (BloscCodec(cname=compression, clevel=enc["complevel"],
                                             shuffle="shuffle", blocksize=ZARR_BLOCK[compression]),)
        elif compression == "none":
            new["compressors"] = None
        if var.ndim:
            itemsize = np.dtype(new.get("dtype", var.dtype)).itemsize
            new["chunks"] = chunk_sizes(tuple(map(str, var.dims)), var.shape, itemsize)
            # chunk files named c.0.1.0.0 side by side, not c/0/1/0/0 in a directory per
            # index (Zarr v3 "default" chunk key encoding, separator "."): a 24-slab store
            # holds 168 entries instead of 450, and replacing one took 0.6 s less here
            new["chunk_key_encoding"] = {"name": "default", "separator": "."}
        result[name] = new
    return result


def _write_zarr(out: xr.Dataset, tmp: Path, encoding: dict[str, dict], lazy: dict) -> None:
    """Write a Zarr format 3 store with consolidated metadata to ``tmp``.

    Dask-backed variables are rechunked to the store's chunks first, so every
    chunk is written by exactly one task; under a dask.distributed client the
    workers write them in parallel. Attributes that are dask arrays are
    computed in the same pass and added to the metadata afterwards. Text
    (trajectory identifiers, say) is stored as variable-length UTF-8 strings,
    Zarr's ``string`` data type with the ``vlen-utf8`` codec, which every Zarr
    format 3 reader decodes to strings; NumPy's fixed-width strings would be
    stored as ``fixed_length_utf32``, a type zarr-python warns has no Zarr
    format 3 specification (zarr-extensions, "data-types").
    """
    import zarr

    out = out.copy()
    for name, enc in encoding.items():
        var = out.variables[name]
        if _is_text(var) and var.ndim:  # (small: read here even when lazy)
            text = var.values
            if text.dtype.kind == "S":
                text = np.char.decode(text, "utf-8")
            out[name] = var.copy(data=text.astype(object))  # (xarray's way to ask for them)
        elif "chunks" in enc and dask.is_dask_collection(var.data):
            out[name] = var.chunk(dict(zip(var.dims, enc["chunks"], strict=True)))
    with warnings.catch_warnings():
        # zarr-python writes consolidated metadata for format 3 ahead of the specification
        warnings.filterwarnings("ignore", message=".*[Cc]onsolidated metadata", category=UserWarning)
        pending = out.to_zarr(tmp, mode="w-", zarr_format=3, consolidated=True, encoding=encoding,
                              compute=False)
        _, *values = dask.compute(pending, *lazy.values())
        found = _late_attributes(out, lazy, values, lambda: xr.open_zarr(tmp, zarr_format=3))
        if found:
            group = zarr.open_group(tmp, mode="r+", zarr_format=3)
            group.attrs.update({name: np.asarray(value).item() for name, value in found.items()})
            zarr.consolidate_metadata(tmp, zarr_format=3)


def _late_attributes(out: xr.Dataset, lazy: dict, values: list,
                     written: Callable[[], xr.Dataset]) -> dict:
    """Global attributes known only once the data are computed: a caller's dask-valued
    attributes (``values``, computed with the data), and the global quality figures of a
    lazy result, summed up from the per-slab figures just written (a few numbers read
    back from the output, so the data are computed once)."""
    found = dict(zip(lazy, values, strict=True))
    unknown = [name for name in QUALITY_FIGURES if name in out.data_vars and name not in out.attrs]
    if unknown:
        with written() as ds:
            found.update(annotate.quality_summary(ds[unknown].load()))
    return found


def _drop_library_quantization_attrs(nc: netCDF4.Dataset) -> None:
    """Remove netCDF-C's own record of quantization (``_Quantize...`` attributes) from a
    file open for appending.

    The CF attributes (``quantization``, ``quantization_nsd``) say the same, and
    names beginning with an underscore are reserved (NetCDF User Guide; CF 1.11
    section 2.3), so CF checkers flag them; cfdm's writer removes them likewise.
    """
    for var in nc.variables.values():
        for name in var.ncattrs():
            if name.startswith("_Quantize"):
                var.delncattr(name)


def _stored_bytes(ds: xr.Dataset, encoding: dict[str, dict]) -> tuple[int, int]:
    """Bytes of the data as stored: (those not compressed, all of them uncompressed)."""
    certain = upper = 0
    for name, var in ds.variables.items():
        enc = encoding.get(str(name), {})
        size = var.size * np.dtype(enc.get("dtype", var.dtype)).itemsize
        upper += size
        if "complevel" not in enc:
            certain += size
    return certain, upper


@contextlib.contextmanager
def _write_chunk_cache() -> Iterator[None]:
    """A small netCDF-C chunk cache while a file is written.

    flowpipe writes each chunk (a whole slab or track) once and never reads it
    back, so the library's default cache (64 MiB per variable) would only hold
    memory: with ten variables, most of a run's peak. Files opened meanwhile
    (the output) keep the small cache; the default is restored afterwards.
    """
    previous = netCDF4.get_chunk_cache()
    netCDF4.set_chunk_cache(WRITE_CHUNK_CACHE, previous[1], previous[2])
    try:
        yield
    finally:
        netCDF4.set_chunk_cache(*previous)
