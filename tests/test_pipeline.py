"""The nightly job: idempotent, crash-safe, fault-tolerant, locked, observable.

What "complete" means for a file is checked with general-purpose readers:
NetCDF with the netCDF-C library (through xarray), PNG with matplotlib's
reader, JSON with :mod:`json`, HTML with :mod:`html.parser` (the HTML Living
Standard's tree of elements, read leniently).
"""

from __future__ import annotations

import html.parser
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import matplotlib.image
import numpy as np
import psutil
import pytest
import xarray as xr
from windfiles import Encoding, encode, reference_field

from flowpipe.bookkeeping import LOCK_NAME
from flowpipe.cli import main
from flowpipe.config import STAGES
from flowpipe.pipeline import STAGE_TABLE, run
from flowpipe.planner import why_due

ROOT = Path(__file__).resolve().parents[1]
LAT, LON, LEVELS = np.linspace(-90, 90, 37), np.arange(0.0, 360.0, 5.0), np.array([850.0, 500.0])


def _inputs(directory: Path, n: int) -> list[Path]:
    paths = []
    for k in range(n):
        sub = directory / f"in{k}"
        sub.mkdir(parents=True)
        ref = reference_field(LAT, LON, LEVELS, 3)
        ref = {name: values * (1.0 + 0.1 * k) for name, values in ref.items()}
        (path,) = encode(ref, LAT, LON, LEVELS, Encoding(), sub)
        paths.append(path.rename(directory / f"model_{k}.nc"))
        sub.rmdir()
    return paths


def _config(directory: Path, inputs: list[Path], maps: bool = True, advect: bool = True,
            prefix: str = "") -> Path:
    body = f"[input]\npaths = {json.dumps([prefix + p.name for p in inputs])}\n\n[decompose]\n\n"
    if advect:
        body += "[advect]\nstarts = [[50.0, 10.0, 850.0], [-20.0, 200.0, 500.0]]\nhours = 6\n\n"
    if maps:
        body += "[maps]\nfields = [\"streamfunction\"]\nlevels = [500.0]\n\n"
    body += "[output]\ndirectory = \"out\"\n"
    path = directory / "night.toml"
    path.write_text(body)
    return path


def _final_files(out: Path) -> list[Path]:
    return sorted(p for p in out.iterdir() if p.is_file() and not p.name.startswith("."))


def _mtimes(out: Path) -> dict[str, int]:
    return {p.name: p.stat().st_mtime_ns for p in _final_files(out) if p.suffix in (".nc", ".png")}


class _Links(html.parser.HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.links: set[str] = set()
        self.images: set[str] = set()
        self.external: list[str] = []

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        for key in ("href", "src"):
            value = attrs.get(key)
            if value:
                (self.links if key == "href" else self.images).add(value)
                if "://" in value or value.startswith("//"):
                    self.external.append(value)


def _check_complete(path: Path) -> None:
    if path.suffix == ".nc":
        with xr.open_dataset(path) as ds:
            ds.load()
    elif path.suffix == ".png":
        assert matplotlib.image.imread(path).size > 0
    elif path.suffix in (".json",):
        json.loads(path.read_text())


@pytest.fixture(scope="module")
def first_run(tmp_path_factory):
    directory = tmp_path_factory.mktemp("night")
    inputs = _inputs(directory, 2)
    config = _config(directory, inputs)
    summary = run(config, quiet=True)
    return directory, inputs, config, summary


def test_run_writes_outputs_manifest_and_report(first_run):
    directory, inputs, _, summary = first_run
    out = directory / "out"
    assert summary.exit_code == 0
    names = {p.name for p in _final_files(out)}
    for stem in ("model_0", "model_1"):
        assert f"{stem}_decomposition.nc" in names
        assert f"{stem}_trajectories.nc" in names
        assert f"{stem}_streamfunction_500.png" in names
    manifest = json.loads((out / "manifest.json").read_text())
    record = manifest["outputs"]["model_0_decomposition.nc"]
    (dep,) = record["depends_on"]
    assert dep["path"] == str(inputs[0].resolve()) and len(dep["sha256"]) == 64
    assert manifest["units"]["model_0"]["status"] == "ok"
    assert "decompose" in manifest["timings"]
    parser = _Links()
    parser.feed((out / "report.html").read_text())
    for path in _final_files(out):
        if path.suffix in (".nc", ".png"):
            assert path.name in parser.links
        if path.suffix == ".png":
            assert path.name in parser.images
    assert not parser.external  # a static page with no external resources
    assert (out / "flowpipe.log").read_text().strip()


def test_rerun_writes_nothing_and_touch_redoes_only_that_input(first_run, capsys):
    directory, inputs, config, _ = first_run
    out = directory / "out"
    before = _mtimes(out)
    assert main(["run", str(config)]) == 0
    captured = capsys.readouterr()
    assert "everything is up to date" in captured.out + captured.err  # it says so
    assert _mtimes(out) == before
    time.sleep(0.01)
    os.utime(inputs[1])  # touch one input
    summary = run(config, quiet=True)
    after = _mtimes(out)
    changed = {name for name in after if after[name] != before[name]}
    assert changed == {"model_1_decomposition.nc", "model_1_trajectories.nc",
                       "model_1_streamfunction_500.png", "model_1_trajectories_all.png"}
    assert len(summary.written) == len(changed)


def test_changed_config_section_redoes_what_depends_on_it(first_run):
    directory, _, config, _ = first_run
    out = directory / "out"
    before = _mtimes(out)
    text = config.read_text()
    config.write_text(text.replace("hours = 6", "hours = 3"))
    try:
        run(config, quiet=True)
    finally:
        config.write_text(text)
    after = _mtimes(out)
    changed = {name for name in after if after[name] != before[name]}
    assert changed == {"model_0_trajectories.nc", "model_1_trajectories.nc",
                       "model_0_trajectories_all.png", "model_1_trajectories_all.png"}
    run(config, quiet=True, force=True)
    assert all(_mtimes(out)[n] != after[n] for n in after)  # --force redoes all


def test_one_truncated_input_among_four(tmp_path):
    inputs = _inputs(tmp_path, 4)
    data = inputs[2].read_bytes()
    inputs[2].write_bytes(data[: len(data) // 2])
    config = _config(tmp_path, inputs, maps=False, advect=False)
    assert main(["run", "--quiet", str(config)]) == 1
    manifest = json.loads((tmp_path / "out" / "manifest.json").read_text())
    assert manifest["units"]["model_2"]["status"] == "failed"
    assert "cannot be read as NetCDF" in manifest["units"]["model_2"]["error"]
    for k in (0, 1, 3):
        assert manifest["units"][f"model_{k}"]["status"] == "ok"
        assert (tmp_path / "out" / f"model_{k}_decomposition.nc").exists()
    assert manifest["status"] == "failed"


def test_an_unreadable_input_is_said_once_for_the_stages_it_fails(tmp_path):
    # Both stages of a truncated input fail for the same reason: the manifest names them
    # together and gives the reason once (each stage's own record keeps it too).
    inputs = _inputs(tmp_path, 2)
    inputs[1].write_bytes(inputs[1].read_bytes()[:2000])
    config = _config(tmp_path, inputs, maps=False)
    assert main(["run", "--quiet", str(config)]) == 1
    unit = json.loads((tmp_path / "out" / "manifest.json").read_text())["units"]["model_1"]
    assert unit["error"].startswith("decompose, advect: ")
    assert unit["error"].count("cannot be read as NetCDF") == 1
    assert all("cannot be read as NetCDF" in unit["stages"][s]["error"]
               for s in ("decompose", "advect"))


class _Text(html.parser.HTMLParser):
    """The page's text: paragraphs, and table rows as lists of cell texts."""

    def __init__(self) -> None:
        super().__init__()
        self.rows: list[list[str]] = []
        self.paragraphs: list[str] = []
        self._cell: list[str] | None = None
        self._para: list[str] | None = None

    def handle_starttag(self, tag, attrs):
        if tag == "tr":
            self.rows.append([])
        elif tag in ("td", "th"):
            self._cell = []
        elif tag == "p":
            self._para = []

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._cell is not None:
            self.rows[-1].append(" ".join("".join(self._cell).split()))
            self._cell = None
        elif tag == "p" and self._para is not None:
            self.paragraphs.append(" ".join("".join(self._para).split()))
            self._para = None

    def handle_data(self, data):
        for part in (self._cell, self._para):
            if part is not None:
                part.append(data)


def _report(out: Path) -> _Text:
    page = _Text()
    page.feed((out / "report.html").read_text())
    return page


def test_report_counts_inputs_and_files_and_shows_what_each_file_holds(tmp_path):
    # The report's facts against the files themselves, read with xarray (netCDF-C).
    inputs = _inputs(tmp_path, 3)
    inputs[2].write_bytes(inputs[2].read_bytes()[:2000])  # truncated: that input fails
    config = _config(tmp_path, inputs, maps=False)
    assert main(["run", "--quiet", str(config)]) == 1
    out = tmp_path / "out"
    page = _report(out)
    assert "3 inputs: 2 done, 1 failed; 4 files written, 0 up to date" in page.paragraphs
    rows = {row[0]: row for row in page.rows if row}
    with xr.open_dataset(inputs[0]) as source:
        times = source["time"].values
    start, end = (np.datetime_as_string(t, unit="s") for t in (times.min(), times.max()))
    assert rows["model_0"][1] == "done" and rows["model_0"][2] == f"{start}Z to {end}Z"
    assert rows["model_2"][1] == "failed" and "cannot be read as NetCDF" in rows["model_2"][3]
    with xr.open_dataset(out / "model_1_decomposition.nc") as ds:
        worst = float(ds["reconstruction_error"].max())
    decomposition = rows["model_1_decomposition.nc"]
    assert decomposition[3] == "written"
    assert f"reconstruction error {worst:.2g}" in decomposition[5]
    with xr.open_dataset(out / "model_0_trajectories.nc") as ds:
        meanings = ds["status"].attrs["flag_meanings"].split()
        counts = np.bincount(ds["status"].values, minlength=len(meanings))
    expected = "; ".join(f"{m.replace('_', ' ')} {n}" for m, n in zip(meanings, counts, strict=True)
                         if n)
    assert rows["model_0_trajectories.nc"][5] == expected
    assert main(["run", "--quiet", str(config)]) == 1  # again: the good inputs are up to date
    again = _report(out)
    line = next(p for p in again.paragraphs if p.startswith("3 inputs"))
    assert line == "3 inputs: 2 done, 1 failed; 0 files written, 4 up to date"
    inputs[2].write_bytes(inputs[0].read_bytes())  # the bad input repaired
    assert main(["run", "--quiet", str(config)]) == 0
    assert main(["run", "--quiet", str(config)]) == 0  # and once more: nothing new
    again = _report(out)
    line = next(p for p in again.paragraphs if p.startswith("3 inputs"))
    manifest = json.loads((out / "manifest.json").read_text())
    last = max(r["written"] for r in manifest["outputs"].values())
    assert line == (f"3 inputs: 3 done, 0 failed; nothing new: all 6 outputs up to date "
                    f"(last written {last})")
    rows = {row[0]: row for row in again.rows if row}
    assert rows["model_0_decomposition.nc"][3].startswith("up to date, written ")


def test_a_failed_stage_leaves_the_later_stages_to_run(tmp_path):
    # configs/README.md (exit codes): a stage that fails is recorded; the stages after it
    # still run with what was made (the maps of the decomposition here).
    inputs = _inputs(tmp_path, 1)
    config = _config(tmp_path, inputs, maps=True, advect=False)
    config.write_text(config.read_text().replace(
        "[maps]", "[advect]\nstarts = [[50.0, 10.0, 100.0]]\nhours = 6\n\n[maps]"))
    assert main(["run", "--quiet", str(config)]) == 1
    out = tmp_path / "out"
    manifest = json.loads((out / "manifest.json").read_text())
    unit = manifest["units"]["model_0"]
    assert unit["status"] == "failed" and unit["error"].startswith("advect: ")
    assert unit["stages"]["advect"]["status"] == "failed"
    assert (out / "model_0_decomposition.nc").exists()
    assert (out / "model_0_streamfunction_500.png").exists()  # maps ran after the failure


def test_lock_refuses_a_second_run_and_takes_over_a_stale_one(tmp_path, capsys):
    inputs = _inputs(tmp_path, 1)
    config = _config(tmp_path, inputs, maps=False, advect=False)
    out = tmp_path / "out"
    out.mkdir()
    holder = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        (out / LOCK_NAME).write_text(json.dumps({"pid": holder.pid, "host": os.uname().nodename}))
        assert main(["run", str(config)]) == 2
        err = capsys.readouterr().err
        assert f"process {holder.pid}" in err and "holds the lock" in err
    finally:
        holder.kill()
        holder.wait()
    # The holder is dead now: its lock is stale and is taken over, with a log line.
    assert main(["run", "--quiet", str(config)]) == 0
    assert "taking over a stale lock" in (out / "flowpipe.log").read_text()
    assert not (out / LOCK_NAME).exists()


def test_kill_at_any_moment_leaves_only_complete_files(tmp_path):
    inputs = _inputs(tmp_path, 3)
    config = _config(tmp_path, inputs, maps=False)
    reference_dir = tmp_path / "reference"
    reference_dir.mkdir()
    ref_config = _config(reference_dir, inputs, maps=False, prefix="../")
    ref_command = [sys.executable, "-m", "flowpipe", "run", "--quiet", str(ref_config)]
    assert subprocess.run(ref_command, check=False).returncode == 0  # also warms compiled caches
    out = tmp_path / "out"
    command = [sys.executable, "-m", "flowpipe", "run", "--quiet", str(config)]
    # Each kill lands while an output file is being written: the run is watched for the
    # temporary file of its k-th output (store.py's `.NAME.tmp-PID-HEX.nc`) and killed while
    # one is there; a kill that came too late (the file renamed meanwhile) is tried again.
    for target in (1, 2, 3, 5, 1):
        last = target == 1 and out.exists()  # the last kill hits a run resuming the work
        landed = False
        for _ in range(5):
            if not last and out.exists():  # the other kills hit a fresh run
                shutil.rmtree(out)
            proc = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
            seen: set[str] = set()
            while proc.poll() is None and not landed:
                writing = {p.name for p in out.glob(".*.tmp-*.nc")} if out.exists() else set()
                seen |= writing
                if writing and len(seen) >= target:
                    children = psutil.Process(proc.pid).children(recursive=True)
                    proc.send_signal(signal.SIGKILL)
                    proc.wait()
                    # The run's pool processes end with it: none goes on writing unsupervised.
                    _, alive = psutil.wait_procs(children, timeout=10)
                    assert not alive
                    landed = bool(writing & {p.name for p in out.glob(".*.tmp-*.nc")})
                    break
                time.sleep(0.002)
            proc.wait()
            if out.exists():
                for path in _final_files(out):
                    _check_complete(path)
            if landed:
                break
        assert landed, f"no kill landed while output {target} of a run was being written"
    # The next run finishes the work, and the result is that of an uninterrupted run.
    assert subprocess.run(command, check=False).returncode == 0
    for name in ("model_0", "model_1", "model_2"):
        for kind in ("decomposition", "trajectories"):
            with xr.open_dataset(out / f"{name}_{kind}.nc") as got, \
                    xr.open_dataset(reference_dir / "out" / f"{name}_{kind}.nc") as want:
                xr.testing.assert_equal(got, want)
    assert not [p for p in out.iterdir() if ".tmp-" in p.name]


def test_distributed_cluster_gives_the_same_outputs(tmp_path):
    from distributed import LocalCluster

    inputs = _inputs(tmp_path, 1)
    local_dir, cluster_dir = tmp_path / "local", tmp_path / "cluster"
    for d in (local_dir, cluster_dir):
        d.mkdir()
        _config(d, inputs, maps=False, prefix="../")
    run(local_dir / "night.toml", quiet=True, workers=1)
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None) as cluster:
        summary = run(cluster_dir / "night.toml", quiet=True, scheduler=cluster.scheduler_address)
    assert summary.exit_code == 0
    for kind in ("decomposition", "trajectories"):
        with xr.open_dataset(local_dir / "out" / f"model_0_{kind}.nc") as a, \
                xr.open_dataset(cluster_dir / "out" / f"model_0_{kind}.nc") as b:
            for name in a.data_vars:
                np.testing.assert_allclose(b[name].values, a[name].values, rtol=1e-12, atol=0)


def test_warnings_of_a_stage_reach_the_log_and_the_manifest(tmp_path):
    # A nightly run has no one watching its terminal: what a stage warns about (here a
    # piece of the domain too small to decompose, left missing) must be in flowpipe.log
    # and in the manifest beside the output it concerns (JSON read with :mod:`json`).
    lat, lon = np.arange(30.0, 50.01, 0.5), np.arange(-10.0, 10.01, 0.5)
    u = 8.0 + 3.0 * np.sin(np.radians(lon))[None, :] + 0.0 * lat[:, None]
    v = -2.0 + np.cos(np.radians(lat))[:, None] + 0.0 * lon[None, :]
    u[:, -6:-3] = np.nan  # cuts off a strip three columns wide
    xr.Dataset({"u": (("lat", "lon"), u, {"units": "m s-1", "standard_name": "eastward_wind"}),
                "v": (("lat", "lon"), v, {"units": "m s-1", "standard_name": "northward_wind"})},
               coords={"lat": ("lat", lat, {"units": "degrees_north"}),
                       "lon": ("lon", lon, {"units": "degrees_east"})}).to_netcdf(
        tmp_path / "area.nc")
    config = tmp_path / "night.toml"
    config.write_text('[input]\npaths = ["area.nc"]\n\n[decompose]\n\n[output]\ndirectory = "out"\n')
    summary = run(config, quiet=True, workers=1)
    assert summary.exit_code == 0
    manifest = json.loads((tmp_path / "out" / "manifest.json").read_text())
    (unit,) = manifest["units"].values()
    (message,) = unit["stages"]["decompose"]["warnings"]
    assert "left missing" in message and message.startswith("area")
    assert "left missing" in (tmp_path / "out" / "flowpipe.log").read_text()


_DEPENDS = [{"path": "/data/a.nc", "size": 10, "mtime_ns": 1, "sha256": "ab" * 32}]
_TABLES = {"decompose": "d1", "input": "i1", "output": "o1"}
_RECORD = {"depends_on": _DEPENDS, "config_tables": _TABLES, "flowpipe_version": "1.0"}


@pytest.mark.parametrize(("previous", "exists", "depends", "tables", "force", "expected"), [
    # the rules of configs/README.md ("Reruns"): each case changes one thing
    (_RECORD, True, _DEPENDS, _TABLES, False, None),
    (_RECORD, False, _DEPENDS, _TABLES, False, "missing"),
    (None, True, _DEPENDS, _TABLES, False, "not in the manifest"),
    (_RECORD, True, _DEPENDS, _TABLES, True, "forced (--force)"),
    ({**_RECORD, "flowpipe_version": "0.9"}, True, _DEPENDS, _TABLES, False,
     "made by flowpipe 0.9, this is 1.0"),
    (_RECORD, True, _DEPENDS, {**_TABLES, "decompose": "d2"}, False,
     "config changed: [decompose]"),
    (_RECORD, True, _DEPENDS, {**_TABLES, "metadata": "m1"}, False, "config changed: [metadata]"),
    (_RECORD, True, [{**_DEPENDS[0], "sha256": "cd" * 32}], _TABLES, False,
     "input changed: a.nc"),
    (_RECORD, True, [*_DEPENDS, {**_DEPENDS[0], "path": "/data/b.nc"}], _TABLES, False,
     "input changed: b.nc"),
])
def test_planner_decisions(previous, exists, depends, tables, force, expected):
    assert why_due(previous, exists, depends, tables, force=force, version="1.0") == expected


def test_stage_table_covers_every_config_stage():
    # configs/README.md documents these tables; each has one entry in the stage table
    assert tuple(STAGE_TABLE) == STAGES
    for stage in STAGE_TABLE.values():
        assert set(stage.needs) <= set(STAGES)


def test_dry_run_lists_what_is_due_and_writes_nothing(tmp_path, capsys):
    inputs = _inputs(tmp_path, 2)
    config = _config(tmp_path, inputs, maps=True, advect=False)
    assert main(["run", "--dry-run", str(config)]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert "model_0_decomposition.nc: missing (decompose)" in lines
    assert any(line.startswith("maps of model_1_decomposition.nc: after") for line in lines)
    assert not (tmp_path / "out").exists()  # nothing made, not even the directory
    assert main(["run", "--quiet", str(config)]) == 0
    capsys.readouterr()
    assert main(["run", "--dry-run", str(config)]) == 0
    assert capsys.readouterr().out.strip() == "flowpipe: nothing due, every output is up to date"
    time.sleep(0.01)
    inputs[1].write_bytes(inputs[1].read_bytes())  # same bytes, new mtime
    assert main(["run", "--dry-run", str(config)]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines == ["model_1_decomposition.nc: input changed: model_1.nc (decompose)",
                     "maps of model_1_decomposition.nc: after the decompose output is made (maps)"]


def test_manifest_and_report_give_the_seconds_each_output_took(tmp_path):
    # configs/README.md ("What a run leaves behind"): each output's record keeps the seconds
    # its making took, and a stage's timing is the sum over its outputs (bookkeeping, not
    # a speed check); an output up to date keeps the seconds of the run that wrote it.
    inputs = _inputs(tmp_path, 1)
    config = _config(tmp_path, inputs, advect=False)
    config.write_text(config.read_text().replace("levels = [500.0]", "levels = [850.0, 500.0]"))
    assert main(["run", "--quiet", str(config)]) == 0
    out = tmp_path / "out"
    manifest = json.loads((out / "manifest.json").read_text())
    outputs = manifest["outputs"]
    assert {r["stage"] for r in outputs.values()} == {"decompose", "maps"}
    assert sum(r["stage"] == "maps" for r in outputs.values()) == 2
    for stage, total in manifest["timings"].items():
        seconds = [r["seconds"] for r in outputs.values() if r["stage"] == stage]
        assert all(s > 0 for s in seconds)
        assert sum(seconds) == pytest.approx(total, abs=1e-3 * len(seconds))
    rows = {row[0]: row for row in _report(out).rows if row}
    assert rows["file"][-1] == "time to write"
    for name, record in outputs.items():
        assert rows[name][-1] == f"{record['seconds']:.2f} s"
    assert main(["run", "--quiet", str(config)]) == 0  # nothing due
    again = json.loads((out / "manifest.json").read_text())["outputs"]
    assert {n: r["seconds"] for n, r in again.items()} == {
        n: r["seconds"] for n, r in outputs.items()}
    rows = {row[0]: row for row in _report(out).rows if row}
    assert all(rows[n][3].startswith("up to date") and rows[n][-1] == f"{r['seconds']:.2f} s"
               for n, r in outputs.items())
