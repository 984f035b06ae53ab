"""The nightly job: config → stages → outputs, idempotent and crash-safe.

A run works on *units*: each input file on its own, or (``[input] combine =
true``) all input files as one series. For every unit the stages run in
order (decompose, advect, maps), each only when its table is in the config.
An output is redone only when it is missing, or when an input it came from,
the config tables it depends on or the flowpipe version changed since it was
written (``--force`` redoes everything). Every file is written under a
temporary name and renamed when complete, and the manifest is rewritten
(atomically) after each output, so a run killed at any moment leaves only
complete files under final names and the next run finishes the work.
"""

from __future__ import annotations

import contextlib
import itertools
import logging
import os
import signal
import sys
import time
import traceback
import warnings
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import dask
import numpy as np
import xarray as xr

from . import bookkeeping
from ._version import __version__
from .annotate import iso_time, now_iso
from .cluster import CORES_KEY
from .config import STORAGE_KEYS, Config, load_config, render_template
from .errors import EnvironmentProblem, FlowpipeError, FlowpipeWarning, from_os_error
from .planner import why_due
from .report import output_facts, write_report

log = logging.getLogger("flowpipe.run")
LOG_NAME = "flowpipe.log"
#: Input files kept open at once: a run reads a long series a time slice after
#: another, and every open NetCDF-4 file holds about a MiB of library caches.
OPEN_FILES = 16


@dataclass
class Unit:
    """One piece of work: an output stem and the input files it is made from."""

    stem: str
    inputs: list[Path]


@dataclass
class RunSummary:
    """What a run did; ``exit_code`` follows the contract (0 all fine, 1 some failed)."""

    written: list[Path] = field(default_factory=list)
    up_to_date: list[Path] = field(default_factory=list)
    failures: dict[str, str] = field(default_factory=dict)
    manifest: Path | None = None
    report: Path | None = None
    #: What the run could not write about itself (manifest, report, log): one line each.
    unrecorded: list[str] = field(default_factory=list)

    @property
    def exit_code(self) -> int:
        """0 all fine, 1 some inputs failed, 2 the run could not record what it did."""
        return 2 if self.unrecorded else 1 if self.failures else 0


@dataclass
class UnitResult:
    """What the stages of one unit did; merged into the manifest by the parent run."""

    stem: str
    record: dict[str, Any] = field(default_factory=lambda: {"stages": {}})
    outputs: dict[str, dict] = field(default_factory=dict)
    written: list[Path] = field(default_factory=list)
    up_to_date: list[Path] = field(default_factory=list)
    timings: dict[str, float] = field(default_factory=dict)
    #: With a dry run: the outputs that would be made, (path, stage, why).
    planned: list[tuple[str, str, str]] = field(default_factory=list)


def units_of(config: Config) -> list[Unit]:
    """The units of work a config describes."""
    section = config.section("input")
    if section["combine"]:
        return [Unit(section["name"], list(config.inputs))]
    inputs = config.inputs
    if section["run"] is not None:  # each file on its own: only those holding the run
        from .ingest import files_with_run

        inputs = files_with_run(inputs, section["run"], section["u"], section["v"])
    stems: dict[str, int] = {}
    units = []
    for path in inputs:
        stem = path.stem
        stems[stem] = stems.get(stem, 0) + 1
        units.append(Unit(stem if stems[stem] == 1 else f"{stem}-{stems[stem]}", [path]))
    return units


class Progress:
    """A progress bar (tqdm) on an interactive terminal; nothing otherwise (cron gets the
    log lines instead)."""

    def __init__(self, total: int, quiet: bool) -> None:
        from .progress import bar

        self.bar = bar(total, "step", quiet, desc="run")

    def advance(self, steps: int, text: str) -> None:
        self.bar.set_postfix_str(f"last: {text[:50]}", refresh=False)
        self.bar.update(steps)

    def close(self) -> None:
        self.bar.close()


class Runner:
    """Runs the stages of a config over its units; see the module docstring."""

    def __init__(self, config: Config, force: bool, progress: Progress,
                 fingerprints: dict[str, dict] | None = None, dry_run: bool = False) -> None:
        self.config = config
        self.force = force
        self.dry_run = dry_run
        self.progress = progress
        self.out = config.output_dir
        self.previous = bookkeeping.read_manifest(self.out)
        self.summary = RunSummary()
        self.unsaved: str | None = None  # why the last save of the manifest failed
        known = self.previous.get("inputs", {})
        # A pool process gets the run's fingerprints: every input is hashed once per run.
        self.fingerprints = fingerprints or {
            str(p): bookkeeping.fingerprint(p, known.get(str(p))) for p in config.inputs}
        self.manifest: dict[str, Any] = {
            "flowpipe_version": __version__,
            "config": str(config.path.resolve()),
            "started": now_iso(),
            "finished": None,
            "status": "running",
            "versions": _versions(),
            "inputs": self.fingerprints,
            "outputs": dict(self.previous.get("outputs", {})),
            "units": {},
            "timings": {},
        }

    # -- bookkeeping ---------------------------------------------------------
    def _save(self) -> bool:
        """Save the manifest; when the disk refuses, log it and leave it to the next save."""
        try:
            bookkeeping.write_json(self.out / bookkeeping.MANIFEST_NAME, self.manifest)
        except EnvironmentProblem as exc:
            if self.unsaved is None:
                log.error("manifest not saved (%s); trying again after the next output", exc)
            self.unsaved = str(exc)
            return False
        if self.unsaved is not None:
            log.info("manifest saved again")
        self.unsaved = None
        return True

    def merge(self, result: UnitResult) -> None:
        """Take one unit's result into the manifest and save it (atomically)."""
        self.manifest["units"][result.stem] = result.record
        self.manifest["outputs"].update(result.outputs)
        for stage, seconds in result.timings.items():
            timings = self.manifest["timings"]
            timings[stage] = round(timings.get(stage, 0.0) + seconds, 3)
        self.summary.written.extend(result.written)
        self.summary.up_to_date.extend(result.up_to_date)
        if result.record.get("status") == "failed":
            self.summary.failures[result.stem] = result.record["error"]
        self._save()

    def _rel(self, path: Path) -> str:
        return os.path.relpath(path, self.out)

    def _produce(self, stage: str, result: UnitResult, out: Path, depends: list[dict],
                 tables: dict[str, str], make: Callable[[Path], None]) -> None:
        """Make one output unless it is up to date (:func:`why_due`)."""
        states = result.record.setdefault("outputs", {})
        rel = self._rel(out)
        reason = why_due(self.previous.get("outputs", {}).get(rel), out.exists(), depends,
                         tables, force=self.force)
        if reason is None:
            result.up_to_date.append(out)
            states[rel] = "up to date"
            log.info("%s: up to date", rel)
            return
        if self.dry_run:
            result.planned.append((rel, stage, reason))
            return
        started = time.perf_counter()
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", FlowpipeWarning)
            make(out)
        elapsed = time.perf_counter() - started
        result.timings[stage] = result.timings.get(stage, 0.0) + elapsed
        stages = result.record["stages"]
        stages.setdefault(stage, {"seconds": 0.0, "status": "ok"})
        stages[stage]["seconds"] = round(stages[stage]["seconds"] + elapsed, 3)
        told = set()  # (a warning of every slab alike is told once)
        for warning in caught:  # into the log and the manifest; others as Python shows them
            if issubclass(warning.category, FlowpipeWarning):
                if str(warning.message) in told:
                    continue
                told.add(str(warning.message))
                log.warning("%s: %s", self._rel(out), warning.message)
                stages[stage].setdefault("warnings", []).append(f"{self._rel(out)}: "
                                                                f"{warning.message}")
            else:
                warnings.showwarning(warning.message, warning.category, warning.filename,
                                     warning.lineno)
        result.outputs[rel] = {
            "stage": stage, "unit": result.stem, "depends_on": depends,
            "config": bookkeeping.section_hash(tables), "config_tables": tables,
            "flowpipe_version": __version__, "written": now_iso(), "seconds": round(elapsed, 3),
            "facts": output_facts(out),
        }
        states[rel] = "written"
        result.written.append(out)
        log.info("%s: written in %.2f s (%s)", rel, elapsed, reason)

    # -- stages --------------------------------------------------------------
    def _inputs_of(self, unit: Unit) -> list[dict]:
        return [self.fingerprints[str(p)] for p in unit.inputs]

    def _storage(self) -> dict:
        """How every output stores its data: the encoding keys of ``[output]``."""
        section = self.config.section("output")
        return {key: section[key] for key in STORAGE_KEYS}

    def _tables(self, stage: str) -> dict[str, str]:
        """Hashes of the config tables an output of ``stage`` depends on: its own, and for
        the data stages ``[input]``, the storage keys of ``[output]`` and ``[metadata]``."""
        tables = {stage: self.config.section(stage)}
        if stage != "maps":
            tables.update(input=self.config.section("input"), output=self._storage())
            if self.config.tables.get("metadata"):
                tables["metadata"] = self.config.tables["metadata"]
        return {name: bookkeeping.section_hash(table) for name, table in sorted(tables.items())}

    def _write(self, ds, path: Path) -> None:
        from .store import write

        write(ds, path, **self._storage(), attributes=self.config.tables.get("metadata"))

    def _wind(self, unit: Unit):
        from .ingest import open_wind

        section = self.config.section("input")
        return open_wind(unit.inputs, u=section["u"], v=section["v"],
                         max_speed=section["max_speed"], implausible=section["implausible"],
                         allow_gaps=section["allow_gaps"], run=section["run"],
                         leads=section["leads"], members=section["members"])

    def _fields(self, unit: Unit, template: str) -> dict[str, str]:
        """``{stem}``, and ``{run}`` / ``{lead}`` of the unit's wind when the template names
        them (opening the wind reads its coordinates only)."""
        from .ingest import forecast_fields

        needs = "{run" in template or "{lead" in template
        return {"stem": unit.stem, **(forecast_fields(self._wind(unit)) if needs else {})}

    def decompose(self, unit: Unit, result: UnitResult, sources: dict[str, Path]) -> Path:
        from .decompose import decompose
        from .fields import select_fields

        cfg = self.config.section("decompose")
        out = render_template(cfg["output"], self.out, **self._fields(unit, cfg["output"]))

        def make(path: Path) -> None:
            from .ingest import input_notes

            wind = self._wind(unit)
            parts = decompose(wind, method=cfg["method"], truncation=cfg["truncation"],
                              levels=cfg["levels"], scheme=cfg["scheme"])
            parts = select_fields(parts, wind, cfg["fields"])
            parts.attrs.update(input_notes(wind))
            self._write(parts, path)

        self._produce("decompose", result, out, self._inputs_of(unit), self._tables("decompose"), make)
        return out

    def advect(self, unit: Unit, result: UnitResult, sources: dict[str, Path]) -> Path:
        from .parcels import advect

        cfg = self.config.section("advect")
        out = render_template(cfg["output"], self.out, **self._fields(unit, cfg["output"]))
        depends = self._inputs_of(unit)
        starts_file = (self.config.path.parent / cfg["starts_file"]).resolve() if cfg[
            "starts_file"] else None
        if starts_file is not None:
            depends = depends + [bookkeeping.fingerprint(starts_file)]

        def make(path: Path) -> None:
            starts = starts_file or [tuple(s) for s in cfg["starts"]]
            from .ingest import input_notes

            wind = self._wind(unit)
            tracks = advect(wind, starts, hours=cfg["hours"], backward=cfg["backward"],
                            step_minutes=cfg["step_minutes"], vertical=cfg["vertical"],
                            sample=tuple(cfg["sample"]))
            tracks.attrs.update(input_notes(wind))
            self._write(tracks, path)

        self._produce("advect", result, out, depends, self._tables("advect"), make)
        return out

    def ftle(self, unit: Unit, result: UnitResult, sources: dict[str, Path]) -> Path:
        from .ftle import ftle

        cfg = self.config.section("ftle")
        out = render_template(cfg["output"], self.out, **self._fields(unit, cfg["output"]))

        def make(path: Path) -> None:
            self._write(ftle(self._wind(unit), hours=cfg["hours"], backward=cfg["backward"],
                             spacing=cfg["spacing"], region=cfg["region"], levels=cfg["levels"]),
                        path)

        self._produce("ftle", result, out, self._inputs_of(unit), self._tables("ftle"), make)
        return out

    def circulation(self, unit: Unit, result: UnitResult, sources: dict[str, Path]) -> Path:
        from .contours import circulation, gather

        cfg = self.config.section("circulation")
        out = render_template(cfg["output"], self.out, **self._fields(unit, cfg["output"]))
        files = [(self.config.path.parent / name).resolve() for name in cfg["polygons"] + cfg["tracks"]]
        depends = self._inputs_of(unit) + [bookkeeping.fingerprint(f) for f in files]

        def make(path: Path) -> None:
            polygons, tracks = files[:len(cfg["polygons"])], files[len(cfg["polygons"]):]
            contours = gather([*(("box", b) for b in cfg["boxes"]),
                               *(("circle", c) for c in cfg["circles"]),
                               *(("polygon", p) for p in polygons),
                               *(("track", t) for t in tracks)], cfg["track_radius_km"])
            self._write(circulation(self._wind(unit), contours, levels=cfg["levels"],
                                    obrien=cfg["obrien"], surface_omega=cfg["surface_omega"],
                                    top_omega=cfg["top_omega"]), path)

        self._produce("circulation", result, out, depends, self._tables("circulation"), make)
        return out

    def maps(self, unit: Unit, result: UnitResult, sources: dict[str, Path]) -> None:
        from .maps import render, save

        cfg = self.config.section("maps")
        mapped = set(STAGE_TABLE["maps"].needs) - {name for name in ("ftle", "circulation")
                                                   if not cfg[name]}
        for name, source in sources.items():
            if (self.dry_run and name in mapped
                    and self._rel(source) in {p for p, _, _ in result.planned}):
                result.planned.append((f"maps of {self._rel(source)}", "maps",
                                       f"after the {name} output is made"))
        tables = self._tables("maps")
        self._field_maps(unit, result, sources.get("decompose"), cfg["fields"], cfg["levels"],
                         tables)
        if cfg["ftle"]:  # every level the [ftle] table seeded
            self._field_maps(unit, result, sources.get("ftle"), ["ftle"], None, tables)
        if cfg["circulation"]:  # the contours coloured by their mean vorticity, at the levels
            from .maps_circulation import DEFAULT_FIELD

            self._field_maps(unit, result, sources.get("circulation"), [DEFAULT_FIELD],
                             cfg["levels"], tables, only_present=True)
        tracks = sources.get("advect")
        if cfg["trajectories"] and tracks is not None and tracks.exists():
            with xr.open_dataset(tracks) as ds:
                members = _members(ds, cfg["output"])
            for member in members:
                out = render_template(cfg["output"], self.out, **{
                    **self._fields(unit, cfg["output"]), "field": "trajectories",
                    "level": "all", "time": "all", "lead": "all", "member": _member_text(member)})
                self._produce("maps", result, out, [bookkeeping.fingerprint(tracks)],
                              self._tables("maps"),
                              lambda p, m=member: save(render(tracks, member=m), p))

    def _field_maps(self, unit: Unit, result: UnitResult, source: Path | None,
                    names: list[str], levels: list[float] | None,
                    tables: dict[str, str], only_present: bool = False) -> None:
        """Maps of the fields ``names`` of one stage's output, at ``levels`` (default:
        every level of the file; ``only_present``: those of them the file has); one per
        time with ``{lead}`` in the name, else of the first time."""
        import xarray as xr

        from .ingest import forecast_fields
        from .maps import render, save

        cfg = self.config.section("maps")
        if source is None or not source.exists():
            return
        depends = [bookkeeping.fingerprint(source)]
        each = "{lead" in cfg["output"]
        with xr.open_dataset(source) as ds:
            present = ([float(x) for x in ds["level"].values] if "level" in ds.dims else [None])
            times = list(ds["time"].values) if "time" in ds.dims else [None]
            times = times if each else times[:1]
            forecast = ([forecast_fields(ds, i) for i in range(len(times))]
                        if each or "{run" in cfg["output"] else [{}] * len(times))
            members = _members(ds, cfg["output"])
        if levels is not None and only_present:
            levels = [lv for lv in levels if any(abs(lv - p) < 1e-6 for p in present if p is not None)]
        for name, level, (when, words), member in itertools.product(
                names, levels if levels is not None else present,
                zip(times, forecast, strict=True), members):
            out = render_template(cfg["output"], self.out, stem=unit.stem, field=name,
                                  level=_level_text(level), time=_time_text(when),
                                  member=_member_text(member), **words)
            self._produce("maps", result, out, depends, tables,
                          lambda p, n=name, lv=level, t=when, m=member: save(render(
                              source, field=n, level=lv,
                              time=None if t is None else iso_time(t), member=m), p))

    # -- the run -------------------------------------------------------------
    def run_unit(self, unit: Unit) -> UnitResult:
        """Run every configured stage of one unit; a failure fails that stage only (the
        stages after it still run, maps with the outputs that were made)."""
        result = UnitResult(unit.stem)
        record = result.record
        record["inputs"] = [str(p) for p in unit.inputs]
        sources: dict[str, Path] = {}
        errors = []
        for stage in self.config.stages:
            try:
                made = STAGE_TABLE[stage].make(self, unit, result, sources)
                if made is not None:
                    sources[stage] = made
            except Exception as exc:  # one bad input must not sink the rest
                if isinstance(exc, OSError):  # the user's environment, not a bug
                    exc = from_os_error(exc)
                message = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
                if not isinstance(exc, FlowpipeError):  # a bug: its traceback into the log
                    message = (f"internal error ({type(exc).__name__}: {message}); the "
                               f"traceback is in {LOG_NAME}: please report it")
                    log.error("%s: %s: %s", unit.stem, stage, traceback.format_exc())
                record["stages"][stage] = {"status": "failed", "error": message}
                errors.append((stage, message))
                log.error("%s: %s failed: %s", unit.stem, stage, message)
        if errors:
            # stages that failed for one reason (an unreadable input fails them all) are
            # named together before it, so the reason is said once
            grouped: dict[str, list[str]] = {}
            for stage, message in errors:
                grouped.setdefault(message, []).append(stage)
            record["status"] = "failed"
            record["error"] = "; ".join(f"{', '.join(stages)}: {message}"
                                        for message, stages in grouped.items())
        record.setdefault("status", "ok")
        return result

    def run(self, units: list[Unit], processes: int = 1) -> RunSummary:
        """Run all units: in this process, or ``processes`` units at a time in a pool."""
        steps = len(self.config.stages)
        if processes > 1 and len(units) > 1:
            import multiprocessing
            from concurrent.futures import ProcessPoolExecutor, as_completed

            # Spawned, not forked: each pool process is a child of this run, so that it ends
            # with the run even when the run is killed (see _worker_setup).
            pool = ProcessPoolExecutor(
                max_workers=min(processes, len(units)),
                mp_context=multiprocessing.get_context("spawn"),
                initializer=_worker_setup, initargs=(str(self.out / LOG_NAME), os.getpid()))
            with pool:
                futures = {pool.submit(_unit_in_worker, self.config.path, self.force, unit,
                                       {str(p): self.fingerprints[str(p)] for p in unit.inputs}
                                       ): unit for unit in units}
                for future in as_completed(futures):
                    self.merge(future.result())
                    self.progress.advance(steps, futures[future].stem)
        else:
            for unit in units:
                self.merge(self.run_unit(unit))
                self.progress.advance(steps, unit.stem)
        live = {self._rel(p) for p in self.summary.written + self.summary.up_to_date}
        self.manifest["outputs"] = {k: v for k, v in self.manifest["outputs"].items()
                                    if k in live or (self.out / k).exists()}
        self.manifest["finished"] = now_iso()
        self.manifest["status"] = "failed" if self.summary.failures else "ok"
        if self._save():
            self.summary.manifest = self.out / bookkeeping.MANIFEST_NAME
        else:
            self.summary.unrecorded.append(f"the manifest could not be written: {self.unsaved}")
        return self.summary


@dataclass(frozen=True)
class Stage:
    """One stage of the batch job: how it makes its outputs, and the stages it reads."""

    make: Callable[[Runner, Unit, UnitResult, dict[str, Path]], Path | None]
    needs: tuple[str, ...] = ()


#: The stages of a batch config, in the order they run (``[decompose]`` and so on; each
#: reads the outputs of the stages it needs, when the config has them).
STAGE_TABLE: dict[str, Stage] = {
    "decompose": Stage(Runner.decompose),
    "advect": Stage(Runner.advect),
    "ftle": Stage(Runner.ftle),
    "circulation": Stage(Runner.circulation),
    "maps": Stage(Runner.maps, needs=("decompose", "advect", "ftle", "circulation")),
}


def plan(config_path: str | os.PathLike, *, force: bool = False) -> list[tuple[str, str, str]]:
    """What a run of a config would make now, and why; nothing is made or written.

    Returns
    -------
    list of (str, str, str)
        Each output due: its path relative to the output directory, its stage,
        and the reason (:func:`why_due`); a unit that cannot be planned (its
        input unreadable, say) appears as ``(unit, "", "cannot plan: ...")``.
    """
    config = load_config(config_path)
    runner = Runner(config, force, Progress(0, quiet=True), dry_run=True)
    planned: list[tuple[str, str, str]] = []
    for unit in units_of(config):
        result = runner.run_unit(unit)
        planned.extend(result.planned)
        if result.record.get("status") == "failed":
            planned.append((unit.stem, "", f"cannot plan: {result.record['error']}"))
    return planned


def _worker_setup(log_path: str, run_pid: int) -> None:
    """Set up a pool process: end with the run, one core, log to the run's log file."""
    with contextlib.suppress(OSError, AttributeError):  # Linux: a signal when the run ends
        import ctypes

        ctypes.CDLL("libc.so.6", use_errno=True).prctl(1, signal.SIGKILL)  # PR_SET_PDEATHSIG
    if os.getppid() != run_pid:  # the run ended while this process was starting
        os._exit(1)
    dask.config.set({"scheduler": "synchronous", CORES_KEY: 1})
    xr.set_options(file_cache_maxsize=OPEN_FILES)
    handler = logging.FileHandler(log_path)
    handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(message)s"))
    log.addHandler(handler)
    log.setLevel(logging.INFO)


def _unit_in_worker(config_path: Path, force: bool, unit: Unit,
                    fingerprints: dict[str, dict]) -> UnitResult:
    config = load_config(config_path)
    return Runner(config, force, Progress(0, quiet=True), fingerprints).run_unit(unit)


def _level_text(level: float | None) -> str:
    return "all" if level is None else f"{level:g}"


def _members(ds: xr.Dataset, template: str) -> list[int | None]:
    """The ensemble members to map one by one: every member of an output (a ``realization``
    dimension, or coordinate of trajectories) when the template names ``{member}``; else
    one map, None (the first member's fields, every member's tracks)."""
    if "{member" not in template or "realization" not in ds.variables:
        return [None]
    return sorted({int(m) for m in np.atleast_1d(ds["realization"].values)})


def _member_text(member: int | None) -> str:
    return "all" if member is None else str(member)


def _time_text(value: Any) -> str:
    if value is None:
        return "all"
    text = str(value)
    return text[:16].replace(":", "").replace("-", "")


def _versions() -> dict[str, str]:
    import importlib.metadata as md

    versions = {"python": sys.version.split()[0]}
    for name in ("numpy", "scipy", "xarray", "dask", "ducc0", "netCDF4", "cf-xarray", "cf-units",
                 "matplotlib", "cartopy"):
        with contextlib.suppress(md.PackageNotFoundError):
            versions[name] = md.version(name)
    return versions


@contextlib.contextmanager
def _scheduler(workers: int, scheduler: str | None) -> Iterator[None]:
    """Dask's local threads (``workers`` of them, sharing ``workers`` cores), or a cluster."""
    if scheduler:
        from distributed import Client, default_client

        try:
            client = Client(scheduler, timeout="20s")
        except (OSError, ValueError, TypeError) as exc:  # unreachable, or a malformed address
            # A client that failed to connect stays dask's default and would take every
            # later computation of the process (a notebook's too): close it.
            with contextlib.suppress(ValueError):
                default_client().close()
            raise FlowpipeError(f"cannot reach the dask scheduler at {scheduler} ({exc}); "
                                "check the address (tcp://HOST:PORT) and that the scheduler "
                                "runs") from exc
        log.info("using the dask.distributed scheduler at %s", scheduler)
        with client:
            yield
        return
    with dask.config.set({"scheduler": "threads", "num_workers": workers, CORES_KEY: workers}):
        yield


class _LogFile(logging.FileHandler):
    """The run's log file; a failed write (a full disk) is said once, not as a traceback."""

    def __init__(self, path: Path) -> None:
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
            super().__init__(path)
        except OSError as exc:
            raise from_os_error(exc) from None
        self.failure: str | None = None

    def handleError(self, record: logging.LogRecord) -> None:  # noqa: N802 (logging's name)
        exc = sys.exc_info()[1]
        if self.failure is None:
            self.failure = str(from_os_error(exc, self.baseFilename) if isinstance(exc, OSError)
                               else exc)
            print(f"flowpipe: warning: the log file cannot be written: {self.failure}",
                  file=sys.stderr)


@contextlib.contextmanager
def _logging(directory: Path, quiet: bool) -> Iterator[_LogFile]:
    handler = _LogFile(directory / LOG_NAME)
    handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(message)s"))
    handlers: list[logging.Handler] = [handler]
    if not quiet and not sys.stderr.isatty():
        console = logging.StreamHandler(sys.stderr)
        console.setFormatter(logging.Formatter("flowpipe: %(message)s"))
        handlers.append(console)
    previous = log.level
    log.setLevel(logging.INFO)
    for h in handlers:
        log.addHandler(h)
    try:
        yield handler
    finally:
        for h in handlers:
            log.removeHandler(h)
            h.close()
        log.setLevel(previous)


def run(config_path: str | os.PathLike, *, force: bool = False, workers: int | None = None,
        scheduler: str | None = None, quiet: bool = False) -> RunSummary:
    """Run a batch config; see the module docstring.

    Parameters
    ----------
    config_path : path-like
        The TOML config (schema in ``configs/README.md``).
    force : bool
        Redo every output, even those that are up to date.
    workers : int, optional
        Cores the run may use: with several units, that many units run at
        once in separate processes (one core each); a single unit runs on
        that many dask threads. Defaults to ``[run] workers`` or all cores.
    scheduler : str, optional
        Address of a dask.distributed scheduler (``tcp://HOST:PORT``); the
        same graph then runs on that cluster. Defaults to ``[run] scheduler``.
    quiet : bool
        No progress bar or log lines on the terminal (the log file is kept).

    Returns
    -------
    RunSummary
    """

    config = load_config(config_path)
    settings = config.tables.get("run", {})
    workers = workers or settings.get("workers") or len(os.sched_getaffinity(0))
    scheduler = scheduler or settings.get("scheduler")
    units = units_of(config)
    n_steps = len(units) * len(config.stages)
    with _logging(config.output_dir, quiet) as log_file, bookkeeping.RunLock(config.output_dir):
        bookkeeping.sweep_temporaries(config.output_dir)
        progress = Progress(n_steps, quiet)
        log.info("run of %s: %d unit(s), flowpipe %s", config.path, len(units), __version__)
        try:
            with _scheduler(workers, scheduler), xr.set_options(file_cache_maxsize=OPEN_FILES):
                runner = Runner(config, force, progress)
                # Several units on the local machine: one process per unit at a time, so
                # that computing, compressing and writing (serialised by the HDF5 library
                # inside one process) all run in parallel.
                summary = runner.run(units, processes=1 if scheduler else workers)
        finally:
            progress.close()
        if not summary.written and not summary.failures:
            log.info("everything is up to date: nothing written")
        try:
            summary.report = write_report(config.output_dir, runner.manifest)
        except EnvironmentProblem as exc:
            log.error("report not written: %s", exc)
            summary.unrecorded.append(f"the report could not be written: {exc}")
        if log_file.failure:
            summary.unrecorded.append(f"the log could not be written: {log_file.failure}")
        log.info("%d written, %d up to date, %d failed", len(summary.written),
                 len(summary.up_to_date), len(summary.failures))
    return summary
