"""The one writer: round trips through plain xarray, CF encodings, atomic and safe.

External references used here:
* IEEE 754-2008 binary32: 24-bit significand, so rounding to single precision
  changes a value by at most 2**-24 of it (relative);
* netCDF4-python (``Variable.filters``, ``Variable.chunking``) and the NetCDF
  User Guide (zlib "deflate" with the shuffle filter; ``NC_FILL_DOUBLE``);
* POSIX ``rename(2)``: the final name refers either to the old file or to the
  complete new one (common practice for atomic replacement);
* CF Conventions 1.11 section 2.5.1: missing data as ``_FillValue``;
* h5py (``read_direct_chunk``), the HDF5 shuffle filter's byte order and Python's
  zlib (RFC 1950): the chunks flowpipe compresses itself decode as netCDF-C's do.
"""

from __future__ import annotations

import asyncio
import errno
import os
import re
import threading
import time
import zlib
from collections.abc import Callable

import dask
import dask.array as da
import h5py
import netCDF4
import numpy as np
import pytest
import xarray as xr
import zarr.storage
from test_compliance import GLOBAL, decomposition_like, trajectory_like

import flowpipe as fp
from flowpipe import store
from flowpipe.errors import FlowpipeError, UsageError

#: IEEE 754 binary32 unit roundoff, and the largest rounding error of a subnormal
#: (half their spacing 2**-149), for values below the smallest normal 2**-126.
FLOAT32_RELATIVE = 2.0**-24
FLOAT32_SUBNORMAL = 2.0**-150


@pytest.fixture(scope="module")
def parts():
    return decomposition_like(fp.open_wind(GLOBAL).isel(time=slice(0, 2)))


def _leftovers(directory) -> list[str]:
    return [p.name for p in directory.iterdir() if ".tmp-" in p.name]


@pytest.mark.parametrize("float32", [False, True])
def test_round_trip_with_plain_xarray(parts, tmp_path, float32):
    path = fp.write(parts, tmp_path / "parts.nc", precision="single" if float32 else "double")
    with xr.open_dataset(path) as back:
        for name in parts.data_vars:
            expected = parts[name].values
            got = back[name].values
            assert got.shape == expected.shape
            assert np.array_equal(np.isnan(got), np.isnan(expected))  # CF _FillValue -> NaN
            if float32:
                assert back[name].encoding["dtype"] == np.float32
                assert "binary32" in back[name].attrs["comment"]  # the loss is stated
                np.testing.assert_allclose(got, expected, rtol=FLOAT32_RELATIVE,
                                           atol=FLOAT32_SUBNORMAL)
            else:
                np.testing.assert_array_equal(got, expected)
            for key in ("standard_name", "units", "long_name"):
                assert back[name].attrs.get(key) == parts[name].attrs.get(key)
        for name in ("latitude", "longitude", "level"):  # coordinates stay double
            assert back[name].dtype == np.float64
            np.testing.assert_array_equal(back[name].values, parts[name].values)
        np.testing.assert_array_equal(back["time"].values, parts["time"].values)


def test_trajectory_round_trip_keeps_missing_times(tmp_path):
    tracks = trajectory_like()
    path = fp.write(tracks, tmp_path / "tracks.nc")
    with xr.open_dataset(path) as back:
        np.testing.assert_array_equal(back["time"].values, tracks["time"].values)  # NaT too
        np.testing.assert_array_equal(back["latitude"].values, tracks["latitude"].values)
        assert back["status"].dtype == np.int8
        assert back["status"].attrs["flag_values"].dtype == np.int8  # CF 3.5: same type
        assert back.attrs["featureType"] == "trajectory"


def test_compressed_and_chunked_by_slab(parts, tmp_path):
    # NetCDF User Guide: deflate + shuffle filters; one (time, level) slab per chunk, so
    # reading one map touches one chunk.
    path = fp.write(parts, tmp_path / "parts.nc")
    nlat, nlon = parts.sizes["latitude"], parts.sizes["longitude"]
    with netCDF4.Dataset(path) as nc:
        for name in parts.data_vars:
            var = nc[name]
            filters = var.filters()
            assert filters["zlib"] and filters["shuffle"], name
            assert var.chunking() == [1, 1, nlat, nlon], name
            assert var.getncattr("_FillValue") == pytest.approx(netCDF4.default_fillvals["f8"])
        for name in ("latitude", "longitude", "level", "time"):  # CF 2.5.1: coordinate
            assert "_FillValue" not in nc[name].ncattrs(), name  # variables have no gaps
    assert os.path.getsize(path) < sum(v.nbytes for v in parts.data_vars.values())


def test_failure_leaves_no_file_under_the_final_name(parts, tmp_path):
    @dask.delayed
    def broken():
        raise RuntimeError("disk gone")

    bad = parts.copy()
    shape = bad["vorticity"].shape
    bad["vorticity"] = (bad["vorticity"].dims, da.from_delayed(broken(), shape, np.float64),
                        bad["vorticity"].attrs)
    target = tmp_path / "out.nc"
    with pytest.raises(RuntimeError, match="disk gone"):
        fp.write(bad, target)
    assert not target.exists()
    assert _leftovers(tmp_path) == []
    # an earlier complete file under that name survives a failed rewrite (rename(2))
    fp.write(parts, target)
    before = target.read_bytes()
    with pytest.raises(RuntimeError):
        fp.write(bad, target)
    assert target.read_bytes() == before
    assert _leftovers(tmp_path) == []


def test_inputs_are_never_overwritten(parts, tmp_path):
    source = fp.write(parts, tmp_path / "source.nc")
    before = source.read_bytes()
    with xr.open_dataset(source) as reread:  # lazily backed by the file itself
        with pytest.raises(UsageError, match="one of the inputs"):
            fp.write(reread, source)
    link = tmp_path / "link.nc"
    os.link(source, link)  # another name for the same file
    named = parts.assign_attrs(input_files=str(link))
    with pytest.raises(UsageError, match="one of the inputs"):
        fp.write(named, source)
    assert source.read_bytes() == before


def test_atomic_path_keeps_the_suffix(tmp_path):
    # matplotlib picks the image format from the suffix of the name it writes to
    with store.atomic_path(tmp_path / "figure.png") as tmp:
        assert tmp.parent == tmp_path and tmp.suffix == ".png" and tmp.name.startswith(".")
        tmp.write_bytes(b"image")
    assert (tmp_path / "figure.png").read_bytes() == b"image"
    assert _leftovers(tmp_path) == []


def test_trajectories_chunked_by_whole_tracks(tmp_path):
    # One chunk holds whole tracks (obs whole) and is between 10 KiB and 1 MiB, the
    # range the HDF Group recommends (HDF5 documentation, "Chunking in HDF5").
    tracks = trajectory_like(ntraj=400, nobs=31)
    path = fp.write(tracks, tmp_path / "tracks.nc")
    with netCDF4.Dataset(path) as nc:
        var = nc["ta"]
        chunk = var.chunking()
        assert chunk[1] == 31
        assert 10 * 1024 <= np.prod(chunk) * var.dtype.itemsize <= 1024 * 1024
        assert var.filters()["zlib"] and var.filters()["shuffle"]


def test_undecoded_times_keep_their_units(parts, tmp_path):
    # CF 4.4: a numeric time with its own "units" (read with decode_times=False) is
    # written as it is, and decodes to the same instants.
    first = fp.write(parts, tmp_path / "first.nc")
    with xr.open_dataset(first, decode_times=False) as raw:
        second = fp.write(raw.load(), tmp_path / "second.nc")
    with xr.open_dataset(second) as back:
        np.testing.assert_array_equal(back["time"].values, parts["time"].values)


def test_lazy_attributes_are_computed_with_the_data(parts, tmp_path):
    # A global figure known only after computing (a 0-d dask array) lands in the file
    # as a plain number, equal to what numpy computes from the same data.
    lazy = parts.chunk({d: 1 for d in parts.dims if d in ("time", "level")})
    expected = float(np.sqrt((parts["vorticity"] ** 2).mean()))
    lazy.attrs["vorticity_rms"] = np.sqrt((lazy["vorticity"] ** 2).mean()).data
    path = fp.write(lazy, tmp_path / "lazy.nc")
    with netCDF4.Dataset(path) as nc:
        assert nc.getncattr("vorticity_rms") == pytest.approx(expected, rel=1e-12)
    assert dask.is_dask_collection(lazy.attrs["vorticity_rms"])  # the caller's Dataset is kept


def test_cli_decomposition_carries_the_global_reconstruction_error(tmp_path):
    # The command line opens files lazily; the figures must still be attributes, each the
    # largest of its per-slab values (the sample's wind is not band-limited, so the
    # unresolved share is above zero).
    from flowpipe.cli import main

    root = os.path.join(os.path.dirname(__file__), "..", "sample_data", "demo_global.nc")
    assert main(["decompose", root, "-o", str(tmp_path / "d.nc"), "--levels", "850"]) == 0
    with xr.open_dataset(tmp_path / "d.nc") as ds:
        for name in ("reconstruction_error", "unresolved_fraction"):
            assert ds.attrs[name] == pytest.approx(ds[name].values.max(), rel=1e-12), name
        assert ds.attrs["unresolved_fraction"] > 0


def test_scalar_coordinates_name_the_fields_not_the_grid_mapping_or_bounds(parts, tmp_path):
    # CF 1.11 sections 5.6 and 7.1: a grid mapping variable and cell bounds describe the
    # grid; a scalar coordinate (the run of a forecast) belongs to the fields.
    run = parts.assign_coords(forecast_reference_time=np.datetime64("2026-01-11T00:00"))
    path = fp.write(run, tmp_path / "run.nc")
    with netCDF4.Dataset(path) as nc:
        assert "forecast_reference_time" in nc["streamfunction"].coordinates.split()
        for name in ("crs", "latitude_bounds", "longitude_bounds"):
            assert "coordinates" not in nc[name].ncattrs(), name


@pytest.mark.parametrize("compression, level", [("zlib", 1), ("zlib", 4), ("zstd", 1)])
def test_chunks_compressed_in_the_tasks_read_back_as_netcdf_c_writes_them(parts, tmp_path,
                                                                           compression, level):
    # A lazy result's chunks are filtered by the tasks that compute them (shuffle, then
    # deflate; or Zstandard) and written directly; an in-memory one is written by
    # netCDF-C itself. Both must hold the same values under the same declared filters,
    # with chunks that a decoder outside flowpipe's writer turns back into the values
    # netCDF-C reads (Python's zlib and the HDF5 shuffle byte order; zstandard), the edge
    # chunks of 400 tracks in chunks that do not divide them included (padded with the
    # fill value).
    import zstandard

    tracks = trajectory_like(ntraj=400, nobs=31)
    for name, data in (("parts", parts), ("tracks", tracks)):
        lazy = data.chunk({dim: size for dim, size in (("time", 1), ("level", 1),
                                                       ("trajectory", 7)) if dim in data.dims})
        options = {"compression": compression, "compression_level": level}
        fast = fp.write(lazy, tmp_path / f"{name}_lazy.nc", **options)
        plain = fp.write(data, tmp_path / f"{name}_plain.nc", **options)
        field = "vorticity" if name == "parts" else "ta"
        with netCDF4.Dataset(fast) as a, netCDF4.Dataset(plain) as b:
            assert a.data_model == "NETCDF4"
            for var in data.data_vars:
                assert a[var].filters() == b[var].filters(), var
                if a[var].filters()[compression]:
                    assert a[var].filters()["complevel"] == level, var
                assert a[var].chunking() == b[var].chunking(), var
                np.testing.assert_array_equal(a[var][...], b[var][...])
            stored = a[field][...].filled(a[field].getncattr("_FillValue"))
        with h5py.File(fast) as h5:
            dataset = h5[field]
            shape, dtype = dataset.chunks, dataset.dtype
            last = tuple((n - 1) // c * c for n, c in zip(dataset.shape, shape, strict=True))
            for start in ((0,) * dataset.ndim, last):
                _, raw = dataset.id.read_direct_chunk(start)
                if compression == "zlib":
                    values = np.frombuffer(zlib.decompress(raw), np.uint8)
                    values = values.reshape(dtype.itemsize, -1).T.copy().view(dtype)
                else:
                    values = np.frombuffer(zstandard.ZstdDecompressor().decompress(raw), dtype)
                inside = tuple(slice(s, min(s + c, n))
                               for s, c, n in zip(start, shape, dataset.shape, strict=True))
                within = tuple(slice(0, r.stop - r.start) for r in inside)
                np.testing.assert_array_equal(values.reshape(shape)[within], stored[inside])



class _SlowFirstChunk:
    """The first chunk write of a computation held back until slab ``bad`` has begun, then
    slow; slab ``bad`` fails while that write runs (so the failure always meets a chunk
    write under way, whatever order dask runs the tasks in)."""

    def __init__(self, broken: BaseException) -> None:
        self.broken, self.running, self.first = broken, 0, True
        self.lock, self.bad_began = threading.Lock(), threading.Event()

    def write(self, write: Callable[[], None]) -> None:
        with self.lock:
            first, self.first = self.first, False
            self.running += first
        if not first:
            return write()
        self.bad_began.wait(60)
        time.sleep(0.5)
        try:
            return write()
        finally:
            with self.lock:
                self.running -= 1

    def fail(self) -> None:
        self.bad_began.set()
        deadline = time.monotonic() + 60
        while not self.running and time.monotonic() < deadline:
            time.sleep(0.01)
        raise self.broken


def _slab_stack(n: int, bad: int, chunks: _SlowFirstChunk) -> xr.Dataset:
    """``n`` slabs of a lazy field of ones, each large enough to be a chunk of its own;
    slab ``bad`` fails (``chunks.fail``)."""
    def block(x, block_info=None):
        if block_info[0]["chunk-location"][0] == bad:
            chunks.fail()
        return x

    data = da.map_blocks(block, da.ones((n, 1, 91, 180), chunks=(1, 1, 91, 180)), dtype=float)
    return xr.Dataset(
        {"vorticity": (("time", "level", "latitude", "longitude"), data,
                       {"units": "s-1", "standard_name": "atmosphere_relative_vorticity"})},
        coords={"time": np.arange(n).astype("datetime64[h]").astype("datetime64[ns]"),
                "level": ("level", [500.0], {"units": "hPa"}),
                "latitude": ("latitude", np.linspace(-90, 90, 91), {"units": "degrees_north"}),
                "longitude": ("longitude", np.arange(0, 360, 2.0), {"units": "degrees_east"})})


@pytest.mark.parametrize("suffix", [".nc", ".zarr"])
@pytest.mark.parametrize("broken", [RuntimeError("slab 5 broken"), KeyboardInterrupt()],
                         ids=["error", "interrupt"])
def test_a_failed_write_waits_for_its_chunk_writes_then_raises_its_own_error(
        tmp_path, monkeypatch, suffix, broken):
    # One slab fails (or the user interrupts) while another thread is storing a chunk:
    # the write must raise that slab's error (not the "Directory not empty" of removing a
    # store still being written) only once no chunk write runs any more, and leave nothing
    # beside the final name, not even a temporary store that a late chunk recreated
    # (outputs appear only complete, under a temporary name first: common practice).
    chunks = _SlowFirstChunk(broken)
    if suffix == ".zarr":
        plain_set = zarr.storage.LocalStore.set

        async def slow_set(self, key, value):
            if key.startswith("vorticity/c."):  # a chunk the tasks write (not metadata,
                # nor coordinates, written before the computation)
                await asyncio.to_thread(chunks.write, lambda: None)  # (zarr's loop stays free)
            return await plain_set(self, key, value)

        monkeypatch.setattr(zarr.storage.LocalStore, "set", slow_set)
    else:
        plain_writer = store._chunk_writer

        def slow_writer(dataset, unencoded=False):
            put = plain_writer(dataset, unencoded)
            return lambda block, start: chunks.write(lambda: put(block, start))

        monkeypatch.setattr(store, "_chunk_writer", slow_writer)
    target = tmp_path / f"out{suffix}"
    with dask.config.set(scheduler="threads", num_workers=3), \
            pytest.raises(type(broken), match=str(broken) or None):
        fp.write(_slab_stack(12, 5, chunks), target)
    still_running = chunks.running
    deadline = time.monotonic() + 60  # (a late chunk write of a writer that did not wait)
    while chunks.running and time.monotonic() < deadline:
        time.sleep(0.05)
    assert chunks.bad_began.is_set()
    assert still_running == 0
    assert sorted(p.name for p in tmp_path.iterdir()) == []


@pytest.mark.parametrize("suffix", [".nc", ".zarr"])
@pytest.mark.parametrize("lazy", [False, True], ids=["in_memory", "lazy"])
def test_a_name_too_long_for_its_temporary_name_is_refused_naming_it(parts, tmp_path, suffix,
                                                                     lazy):
    # POSIX pathconf(_PC_NAME_MAX): the longest file name the directory takes. A name
    # within it whose temporary name is not is refused in one line naming it (neither the
    # temporary name, nor "Permission denied" as netCDF-C says), with the length that
    # works: that length does, one byte more does not.
    limit = os.pathconf(tmp_path, "PC_NAME_MAX")
    data = parts.chunk({"time": 1}) if lazy else parts
    final = tmp_path / ("a" * (limit - len(suffix)) + suffix)
    with pytest.raises(UsageError) as refused:
        fp.write(data, final)
    message = str(refused.value)
    assert message.startswith(f"{final}: file name too long") and ".tmp-" not in message
    longest = int(re.search(r"at most (\d+) bytes", message).group(1))
    fits = tmp_path / ("b" * (longest - len(suffix)) + suffix)
    fp.write(data, fits)
    with pytest.raises(UsageError):
        fp.write(data, tmp_path / ("c" * (longest + 1 - len(suffix)) + suffix))
    assert [p.name for p in tmp_path.iterdir()] == [fits.name]


def _zarr_chunk_fails(monkeypatch, error: Callable[[zarr.storage.LocalStore, str], Exception]):
    """Writing a chunk of a Zarr store raises ``error(store, key)``."""
    plain_set = zarr.storage.LocalStore.set

    async def failing_set(self, key, value):
        if "/c." in key:
            raise error(self, key)
        return await plain_set(self, key, value)

    monkeypatch.setattr(zarr.storage.LocalStore, "set", failing_set)


def _hdf5_open_fails(monkeypatch):
    """Opening the file with h5py (to write its chunks) raises an error naming it in its
    text, as h5py words HDF5's errors (from memory)."""
    def failing_file(name, mode="r", **kwargs):
        raise OSError(f"Unable to synchronously open file (unable to open file: name = "
                      f"'{name}', errno = 5, error message = 'Input/output error', "
                      "flags = 1, o_flags = 2)")

    monkeypatch.setattr(h5py, "File", failing_file)


@pytest.mark.parametrize(("suffix", "fail", "kind"), [
    # the operating system's error for a chunk file inside the temporary store
    (".zarr", lambda mp: _zarr_chunk_fails(mp, lambda store, key: OSError(
        errno.EIO, os.strerror(errno.EIO), os.path.join(str(store.root), key))),
     FlowpipeError),
    # a library's error naming the temporary store in its text (an internal error)
    (".zarr", lambda mp: _zarr_chunk_fails(mp, lambda store, key: ValueError(
        f"cannot store {key} in {store!r}")), ValueError),
    (".nc", _hdf5_open_fails, FlowpipeError),
], ids=["zarr_os_error", "zarr_library_error", "hdf5_error"])
def test_errors_while_writing_name_the_final_path_not_the_temporary_one(
        parts, tmp_path, monkeypatch, suffix, fail, kind):
    # The user typed the final name: an error met while the data are written under the
    # temporary name (CF-NetCDF through HDF5, Zarr) names that one, once, in one line.
    fail(monkeypatch)
    final = tmp_path / f"out{suffix}"
    with pytest.raises(kind) as failed:
        fp.write(parts.chunk({"time": 1}), final)
    message = str(failed.value)
    assert str(final) in message and ".tmp-" not in message and "\n" not in message
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("processes", [False, True], ids=["threads", "processes"])
def test_netcdf_written_under_a_distributed_client_equals_the_local_file(parts, tmp_path,
                                                                         processes):
    # Under a dask.distributed client (LocalCluster, two workers) every way of writing a
    # NetCDF file (the workers compute the data; one process writes the file, as HDF5
    # cannot be shared between writers) gives the file the local threads write, as
    # xarray's NetCDF reader reads it: lazy and in-memory data, an attribute computed with
    # the data, quantization (with and without such an attribute), other compressions.
    from distributed import Client, LocalCluster, get_task_stream
    from test_zarr import WRITE_TIMES

    from flowpipe.progress import key_name

    lazy = parts.chunk({"time": 1})
    with_attribute = lazy.assign_attrs(largest_vorticity=abs(lazy["vorticity"]).max().data)
    cases = {"lazy": (lazy, {}), "in_memory": (parts, {}), "attribute": (with_attribute, {}),
             "quantized": (lazy, {"significant_digits": 3}),
             "quantized_attribute": (with_attribute, {"significant_digits": 3}),
             "uncompressed": (lazy, {"compression": "none"}),
             "zstd": (lazy, {"compression": "zstd"})}
    for name, (data, options) in cases.items():
        fp.write(data, tmp_path / f"local_{name}.nc", **options)
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=processes,
                      dashboard_address=None) as cluster, Client(cluster) as client, \
            get_task_stream(client) as tasks:
        for name, (data, options) in cases.items():
            fp.write(data, tmp_path / f"cluster_{name}.nc", **options)
    # dask.distributed's record of the tasks: the workers stored the chunks
    assert len({t["worker"] for t in tasks.data if "store-map" in key_name(t["key"])}) == 2
    for name in cases:
        with xr.open_dataset(tmp_path / f"local_{name}.nc") as a, \
                xr.open_dataset(tmp_path / f"cluster_{name}.nc") as b:
            for key in WRITE_TIMES:
                a.attrs.pop(key, None)
                b.attrs.pop(key, None)
            xr.testing.assert_identical(b, a)
            assert ("largest_vorticity" in b.attrs) == ("attribute" in name)
    assert _leftovers(tmp_path) == []
