"""Zarr outputs and inputs: the same data and attributes as NetCDF, atomic, from many workers.

External checks, each named beside its assertions:
* zarr-python (the Zarr format 3 reference implementation) and xarray's Zarr
  backend read the stores back: values, chunk shapes and codecs;
* xarray's NetCDF reader reads the NetCDF output the Zarr store is compared with;
* compliance-checker (IOOS), suite ``cf:1.11``, on a NetCDF copy of the attributes
  xarray reads back from the store (compliance-checker reads NetCDF only);
* POSIX ``rename(2)`` of a directory: the final name appears only complete
  (common practice for atomic publication);
* dask.distributed (LocalCluster): the workers compute and write the chunks.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import netCDF4
import numpy as np
import pytest
import xarray as xr
import zarr
from test_compliance import _failures, check
from windfiles import SMALL_LAT, SMALL_LON, small_global_file

import flowpipe as fp
from flowpipe.bookkeeping import sweep_temporaries
from flowpipe.cli import main
from flowpipe.pipeline import run
from flowpipe.progress import key_name


@pytest.fixture(scope="module")
def wind_file(tmp_path_factory) -> Path:
    directory = tmp_path_factory.mktemp("zarr")
    return small_global_file(directory, 2)


#: Global attributes stating when a file was written (ACDD-1.3 date_created, CF history).
WRITE_TIMES = ("history", "date_created", "date_modified", "date_metadata_modified")


@pytest.fixture(scope="module")
def written(wind_file, tmp_path_factory) -> dict[str, Path]:
    """The decomposition of the wind by the command line, to NetCDF and to Zarr."""
    directory = tmp_path_factory.mktemp("written")
    paths = {kind: directory / f"parts.{kind}" for kind in ("nc", "zarr")}
    for path in paths.values():
        assert main(["decompose", str(wind_file), "-o", str(path)]) == 0
    return paths


def test_zarr_equals_the_netcdf_output_exactly(written):
    # Lossless encodings on both sides: xarray reads the same values, coordinates and
    # attributes from the NetCDF file and the Zarr store.
    with xr.open_dataset(written["nc"]) as nc, xr.open_zarr(written["zarr"]) as store:
        nc, store = nc.load(), store.load()
        for ds in (nc, store):  # when each was written, a second apart
            for key in WRITE_TIMES:
                ds.attrs.pop(key, None)
        xr.testing.assert_identical(store, nc)
        assert set(store.data_vars) >= {"streamfunction", "velocity_potential", "vorticity"}


def test_zarr_store_is_format_3_consolidated_chunked_as_the_netcdf_file(written):
    # zarr-python: the store's format, its consolidated metadata, chunks and codecs;
    # netCDF4: the chunks of the NetCDF file (whole slabs, several small ones together).
    group = zarr.open_group(written["zarr"], mode="r")
    assert group.metadata.zarr_format == 3
    assert group.metadata.consolidated_metadata is not None  # read without listing arrays
    with netCDF4.Dataset(written["nc"]) as nc:
        for name in ("streamfunction", "vorticity", "reconstruction_error"):
            array = group[name]
            assert array.chunks == tuple(nc[name].chunking())
            if array.ndim == 4:
                assert array.chunks[-2:] == (SMALL_LAT.size, SMALL_LON.size)  # whole slabs
            (codec,) = array.compressors
            # blosc with the stores' default zstd at the default level and byte shuffle
            assert type(codec).__name__ == "BloscCodec"
            assert (codec.cname.value, codec.clevel, codec.shuffle.value) == ("zstd", 1, "shuffle")
        # c-blosc's own decoder (numcodecs.Blosc), not zarr-python's codec pipeline, reads
        # the first chunk of a field: little-endian floats equal to the NetCDF ones
        # (Zarr v3 specification: chunk key "c" + "." + indices, bytes codec, then blosc)
        import numcodecs

        chunks = group["vorticity"].chunks
        raw = (written["zarr"] / "vorticity" / f"c.{'.'.join('0' * len(chunks))}").read_bytes()
        stored = np.dtype(nc["vorticity"].dtype).newbyteorder("<")
        block = np.frombuffer(numcodecs.Blosc().decode(raw), dtype=stored).reshape(chunks)
        expected = np.ma.filled(nc["vorticity"][tuple(slice(0, c) for c in chunks)], np.nan)
        assert np.array_equal(block, expected, equal_nan=True)


def test_zlib_asked_for_is_written_to_a_store_and_zlib_is_the_netcdf_default(written,
                                                                             wind_file, tmp_path):
    # zarr-python reads the codec of a store written with --compression zlib; netCDF4
    # reports the filters netCDF-C applied to the NetCDF file written with the defaults.
    target = tmp_path / "zlib.zarr"
    assert main(["decompose", str(wind_file), "-o", str(target), "--compression", "zlib"]) == 0
    (codec,) = zarr.open_group(target, mode="r")["vorticity"].compressors
    assert (codec.cname.value, codec.clevel) == ("zlib", 1)
    with netCDF4.Dataset(written["nc"]) as nc:
        filters = nc["vorticity"].filters()
        assert filters["zlib"] and filters["shuffle"] and not filters["zstd"]


def test_zarr_attributes_pass_the_cf_1_11_check(written, tmp_path):
    # compliance-checker cf:1.11 on the attributes xarray reads back from the store,
    # written unchanged into a NetCDF copy by plain xarray.
    copy = tmp_path / "copy.nc"
    with xr.open_zarr(written["zarr"], decode_cf=False) as store:
        store = store.load()
        # (xarray would add a NaN _FillValue to floating-point variables that have none)
        store.to_netcdf(copy, encoding={name: {"_FillValue": None} for name, var in
                                        store.variables.items() if "_FillValue" not in var.attrs})
    result = check(copy, ("cf:1.11",))["cf:1.11"]
    assert _failures(result, "high") == []
    assert _failures(result, "medium") == []


def test_zarr_store_as_input_to_decompose(written, wind_file, tmp_path):
    # A wind stored by plain xarray as a Zarr store decomposes as its NetCDF original.
    wind_store = tmp_path / "wind.zarr"
    with xr.open_dataset(wind_file) as ds:
        ds.load().to_zarr(wind_store, zarr_format=3, consolidated=True)
    out = tmp_path / "from_store.nc"
    assert main(["decompose", str(wind_store), "-o", str(out)]) == 0
    with xr.open_dataset(out) as got, xr.open_dataset(written["nc"]) as want:
        xr.testing.assert_equal(got.load(), want.load())


def test_quantization_is_refused_for_zarr_in_one_line(wind_file, tmp_path, capsys):
    assert main(["decompose", str(wind_file), "-o", str(tmp_path / "q.zarr"),
                 "--significant-digits", "3"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "quantization" in err
    assert not list(tmp_path.iterdir())



def test_trajectory_ids_in_a_store_are_variable_length_utf8_strings(tmp_path):
    # The ids are text: the store holds Zarr's "string" data type with the "vlen-utf8"
    # codec (zarr-extensions registry, data-types/string; from memory), not fixed-width
    # UTF-32 nor bytes; zarr-python and xarray read them back as Python str, the same ids
    # as xarray reads from the NetCDF output.
    sample = Path(__file__).parents[1] / "sample_data" / "demo_global.nc"
    outputs = {kind: tmp_path / f"tracks.{kind}" for kind in ("nc", "zarr")}
    for path in outputs.values():
        assert main(["advect", str(sample), "--start", "52,4,850", "--start", "40,-30,500",
                     "--hours", "6", "-o", str(path)]) == 0
    with xr.open_dataset(outputs["nc"]) as nc:
        expected = list(nc["trajectory_id"].values)
    assert len(expected) == 2 and all(type(i) is str and i.startswith("fp") for i in expected)
    metadata = json.loads((outputs["zarr"] / "trajectory_id" / "zarr.json").read_text())
    assert metadata["data_type"] == "string"
    assert metadata["codecs"][0]["name"] == "vlen-utf8"
    by_zarr = list(zarr.open_group(outputs["zarr"], mode="r")["trajectory_id"][:])
    with xr.open_zarr(outputs["zarr"]) as store:
        by_xarray = list(store["trajectory_id"].values)
    for ids in (by_zarr, by_xarray):
        assert ids == expected
        assert all(type(i) is str for i in ids)  # (not numpy.str_ of a fixed width, not bytes)


def test_lazy_text_is_stored_as_strings_too(tmp_path):
    # the same for text held as a dask array (a trajectory file reopened lazily, say):
    # Zarr's "string" data type, read back as the same str (zarr-extensions, from memory)
    ids = np.array(["fp-a", "fp-bb", "fp-ccc"])
    ds = xr.Dataset({"speed": ("trajectory", np.arange(3.0), {"units": "m s-1"})},
                    coords={"trajectory_id": ("trajectory", ids)}).chunk({"trajectory": 2})
    assert fp.write(ds, tmp_path / "t.zarr") == tmp_path / "t.zarr"
    metadata = json.loads((tmp_path / "t.zarr" / "trajectory_id" / "zarr.json").read_text())
    assert metadata["data_type"] == "string"
    with xr.open_zarr(tmp_path / "t.zarr") as back:
        assert [type(i) for i in back["trajectory_id"].values] == [str] * 3
        assert list(back["trajectory_id"].values) == list(ids)

SLOW_WRITE = """
import sys, time
import dask.array as da, numpy as np, xarray as xr
import flowpipe as fp

def slow(block):
    time.sleep(0.3)
    return block

n = 40
data = da.map_blocks(slow, da.ones((n, 1, 37, 72), chunks=(1, 1, 37, 72)), dtype=float)
ds = xr.Dataset({"vorticity": (("time", "level", "latitude", "longitude"), data,
                               {"units": "s-1", "standard_name": "atmosphere_relative_vorticity"})},
                coords={"time": np.arange(n).astype("datetime64[h]").astype("datetime64[ns]"),
                        "level": ("level", [500.0], {"units": "hPa"}),
                        "latitude": ("latitude", np.linspace(-90, 90, 37), {"units": "degrees_north"}),
                        "longitude": ("longitude", np.arange(0, 360, 5.0), {"units": "degrees_east"})})
fp.write(ds, sys.argv[1])
"""


def test_killed_zarr_write_leaves_no_store_under_the_final_name(tmp_path):
    # SIGKILL while chunks are being written: the final name never appears; the
    # temporary store is swept like a temporary file.
    final = tmp_path / "out.zarr"
    proc = subprocess.Popen([sys.executable, "-c", SLOW_WRITE, str(final)],
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    deadline = time.monotonic() + 120
    chunks: list[Path] = []
    while time.monotonic() < deadline and proc.poll() is None and len(chunks) < 3:
        chunks = [p for p in tmp_path.glob(".out.zarr.tmp-*/vorticity/c.*") if p.is_file()]
        time.sleep(0.05)
    assert proc.poll() is None, proc.stderr.read().decode()  # killed mid-write, not after
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    assert chunks  # the store was being written
    assert not final.exists()
    (leftover,) = [p for p in tmp_path.iterdir() if ".tmp-" in p.name]
    assert leftover.is_dir()
    assert sweep_temporaries(tmp_path) == [leftover]
    assert list(tmp_path.iterdir()) == []


def test_rewriting_a_store_replaces_it_whole(written, tmp_path):
    target = tmp_path / "again.zarr"
    with xr.open_zarr(written["zarr"]) as ds:
        ds = ds.load()
    fp.write(ds, target)
    fp.write(ds[["vorticity"]], target)
    with xr.open_zarr(target) as again:
        assert "vorticity" in again and "streamfunction" not in again
    assert sorted(p.name for p in tmp_path.iterdir()) == ["again.zarr"]


def test_the_command_rerun_replaces_its_store_but_not_another_directory(wind_file, tmp_path,
                                                                         capsys):
    # A night run again writes over its earlier store (replaced whole once complete); a
    # directory that is no Zarr store (no zarr.json, Zarr v3 specification) is refused.
    target = tmp_path / "night.zarr"
    for _ in range(2):
        assert main(["decompose", str(wind_file), "-o", str(target)]) == 0
    assert zarr.open_group(target, mode="r").attrs["Conventions"].startswith("CF-")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["night.zarr"]
    plain = tmp_path / "plain.zarr"
    plain.mkdir()
    capsys.readouterr()
    with pytest.raises(SystemExit) as stop:
        main(["decompose", str(wind_file), "-o", str(plain)])
    assert stop.value.code == 2
    assert "not a Zarr store" in capsys.readouterr().err
    assert list(plain.iterdir()) == []
    # the same directory as an input is named for what it is, not as missing
    assert main(["inspect", str(plain)]) == 2
    assert "is a directory, not a NetCDF or GRIB file nor a Zarr store" in capsys.readouterr().err


def _night(directory: Path, wind_file: Path) -> Path:
    config = directory / "night.toml"
    config.write_text(f'[input]\npaths = ["{wind_file}"]\n\n[decompose]\n'
                      'output = "{stem}_decomposition.zarr"\n\n[output]\ndirectory = "out"\n')
    return config


def test_distributed_run_writing_zarr_equals_the_local_run(wind_file, tmp_path):
    from distributed import LocalCluster, get_task_stream

    local, cluster_dir = tmp_path / "local", tmp_path / "cluster"
    for d in (local, cluster_dir):
        d.mkdir()
    assert run(_night(local, wind_file), quiet=True, workers=1).exit_code == 0
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                      dashboard_address=None) as cluster, cluster.get_client() as client, \
            get_task_stream(client) as tasks:
        summary = run(_night(cluster_dir, wind_file), quiet=True,
                      scheduler=cluster.scheduler_address)
    assert summary.exit_code == 0
    # dask.distributed's record of where each task ran: the chunks were stored by the
    # workers, both of them
    stored = {t["worker"] for t in tasks.data if "store-map" in key_name(t["key"])}
    assert len(stored) == 2
    name = f"{wind_file.stem}_decomposition.zarr"
    with xr.open_zarr(local / "out" / name) as a, xr.open_zarr(cluster_dir / "out" / name) as b:
        assert set(a.data_vars) == set(b.data_vars)
        for var in a.data_vars:
            np.testing.assert_allclose(b[var].values, a[var].values, rtol=1e-12, atol=0)
    manifest = json.loads((cluster_dir / "out" / "manifest.json").read_text())
    record = manifest["outputs"][name]
    assert record["facts"]["time_coverage_start"].startswith(str(a.time.values[0])[:10])
    assert "reconstruction_error" in record["facts"]["quality"]
    assert not [p for p in (cluster_dir / "out").iterdir() if ".tmp-" in p.name]
    assert os.path.isdir(cluster_dir / "out" / name)


def _second_time_broken(block, block_info=None):
    if block_info[0]["chunk-location"][0] == 1:
        raise RuntimeError("second time broken")
    return block


def test_a_failed_task_on_a_cluster_leaves_no_store_under_the_final_name(written, tmp_path):
    # Workers write the chunks of a store in parallel (LocalCluster, two workers); when a
    # task fails, its error is raised and no store appears under the final name, nor is
    # an earlier one there replaced (POSIX rename(2): the store is renamed into place only
    # once complete).
    import dask.array as da
    from distributed import Client, LocalCluster

    with xr.open_zarr(written["zarr"]) as ds:
        ds = ds.load()
    field = ds["vorticity"].chunk({"time": 1, "level": 1})
    bad = ds.assign(vorticity=field.copy(data=da.map_blocks(_second_time_broken, field.data,
                                                                      dtype=field.dtype)))
    assert bad["vorticity"].data.numblocks[0] == 2  # (the first time's slabs are written)
    earlier = tmp_path / "earlier.zarr"
    fp.write(ds[["streamfunction"]], earlier)
    with LocalCluster(n_workers=2, threads_per_worker=2, processes=False,
                      dashboard_address=None) as cluster, Client(cluster):
        for target in (tmp_path / "new.zarr", earlier):
            with pytest.raises(RuntimeError, match="second time broken"):
                fp.write(bad, target)
    assert not (tmp_path / "new.zarr").exists()
    with xr.open_zarr(earlier) as again:
        assert "streamfunction" in again and "vorticity" not in again

def test_map_of_a_zarr_decomposition(written, tmp_path):
    # The same map as from the NetCDF file: the colour bar spans the same values
    # (matplotlib's ScalarMappable limits).
    from flowpipe import maps

    limits = []
    for key in ("nc", "zarr"):
        fig = maps.render(written[key], field="streamfunction", size=(400, 300))
        (bar,) = [c.colorbar for ax in fig.axes for c in ax.collections
                  if getattr(c, "colorbar", None) is not None]
        limits.append((bar.vmin, bar.vmax))
    assert limits[0] == limits[1]
