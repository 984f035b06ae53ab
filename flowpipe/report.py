"""``report.html``: a static page for the morning check (no external resources).

It answers at a glance what the night produced: one status line that counts
the inputs done and failed and the files written and already up to date; per
input its valid period, status and error; per output its state (written now,
or up to date and since when), the quality figures of decompositions and the
counts by status of trajectory files, the seconds it took to write, with links
to every file.
"""

from __future__ import annotations

import html
from pathlib import Path
from typing import Any

import netCDF4
import numpy as np

from .annotate import CAUTION
from .choices import REPORTED_FIGURES, is_zarr_path
from .store import atomic_path

REPORT_NAME = "report.html"
_STYLE = """
body { font-family: sans-serif; margin: 1.5em auto; max-width: 80em; color: #222; }
h1 { font-size: 1.4em; } h2 { font-size: 1.15em; margin-top: 1.6em; }
table { border-collapse: collapse; } td, th { border: 1px solid #bbb; padding: .25em .6em; }
td { vertical-align: top; } .failed { color: #a00; font-weight: bold; } .ok { color: #060; }
.summary { font-size: 1.1em; } .stale { color: #555; }
figure { display: inline-block; margin: .5em; } img { max-width: 30em; border: 1px solid #ccc; }
.caution { font-size: .85em; color: #555; border-top: 1px solid #ccc; padding-top: .5em; }
"""

#: What the report calls each quality figure (the worst slab of per-slab figures).
QUALITY_LABELS = {
    "reconstruction_error": "reconstruction error",
    "harmonic_energy_share": "harmonic energy share",
    "unresolved_fraction": "unresolved fraction",
    "harmonic_rotation": "harmonic wind's rotation and divergence",
    "iterations": "solver iterations",
    "points_left_missing": "points left missing",
    "vorticity_disagreement": "vorticity line/area disagreement",
    "divergence_disagreement": "divergence line/area disagreement",
}


def output_facts(path: Path) -> dict[str, Any]:
    """What the report says about one written file, read back from it.

    Parameters
    ----------
    path : pathlib.Path
        A file flowpipe wrote; only NetCDF files (read with netCDF4) and Zarr
        stores (read with xarray) have facts.

    Returns
    -------
    dict
        ``time_coverage_start`` / ``time_coverage_end`` (ACDD-1.3) when present;
        ``quality``: each quality figure of :data:`flowpipe.choices.REPORTED_FIGURES`
        the file has, as its largest value over the slabs (a data variable) or
        as the global attribute; ``status``: for trajectory files, the number
        of trajectories by status (CF 1.11 section 3.5 flags of ``status``).
    """
    if path.suffix == ".nc":
        with netCDF4.Dataset(path) as nc:
            return _facts({k: nc.getncattr(k) for k in nc.ncattrs()}, {
                name: (lambda var=var: np.ma.filled(np.ma.asarray(var[:], dtype=float), np.nan),
                       {k: var.getncattr(k) for k in var.ncattrs()})
                for name, var in nc.variables.items()})
    if is_zarr_path(path):
        import xarray as xr

        with xr.open_zarr(path, decode_times=False) as ds:
            return _facts(ds.attrs, {name: (lambda var=var: np.asarray(var.values, dtype=float),
                                            var.attrs) for name, var in ds.variables.items()})
    return {}


def _facts(attrs: dict[str, Any], variables: dict[str, tuple]) -> dict[str, Any]:
    """:func:`output_facts` from global attributes and, by name, each variable's
    values (a function giving floats, NaN where missing) and attributes."""
    facts: dict[str, Any] = {}
    for key in ("time_coverage_start", "time_coverage_end"):
        if key in attrs:
            facts[key] = str(attrs[key])
    quality = {}
    for name in REPORTED_FIGURES:
        if name in variables:
            values = variables[name][0]()
            if np.isfinite(values).any():
                quality[name] = float(np.nanmax(values))
        elif name in attrs:
            quality[name] = float(attrs[name])
    if quality:
        facts["quality"] = quality
    if "status" in variables and "flag_meanings" in variables["status"][1]:
        values, var_attrs = variables["status"]
        meanings = str(var_attrs["flag_meanings"]).split()
        flags = [int(v) for v in np.ravel(var_attrs["flag_values"])]
        counts = np.ravel(values())
        facts["status"] = {m: int(np.sum(counts == v)) for m, v in zip(meanings, flags, strict=True)}
    return facts


def _link(name: str) -> str:
    quoted = html.escape(name, quote=True)
    return f'<a href="{quoted}">{html.escape(name)}</a>'


def _plural(n: int, one: str, many: str | None = None) -> str:
    return f"{n} {one if n == 1 else (many or one + 's')}"


def summary_line(manifest: dict[str, Any]) -> str:
    """The run in one line: inputs done and failed, files written and up to date."""
    units = manifest.get("units", {})
    failed = sum(1 for r in units.values() if r.get("status") == "failed")
    states = [state for r in units.values() for state in r.get("outputs", {}).values()]
    written, current = states.count("written"), states.count("up to date")
    head = f"{_plural(len(units), 'input')}: {len(units) - failed} done, {failed} failed"
    if not written and current and not failed:
        when = [manifest.get("outputs", {}).get(k, {}).get("written") for r in units.values()
                for k in r.get("outputs", {})]
        last = max((w for w in when if w), default=None)
        since = f" (last written {last})" if last else ""
        return f"{head}; nothing new: all {_plural(current, 'output')} up to date{since}"
    return f"{head}; {_plural(written, 'file')} written, {current} up to date"


def _period(facts: dict[str, Any]) -> str:
    start, end = facts.get("time_coverage_start"), facts.get("time_coverage_end")
    if not start:
        return ""
    return start if start == end else f"{start} to {end}"


def _quality(facts: dict[str, Any]) -> str:
    parts = [f"{QUALITY_LABELS.get(k, k)} {v:.2g}" for k, v in facts.get("quality", {}).items()]
    parts += [f"{m.replace('_', ' ')} {n}" for m, n in facts.get("status", {}).items() if n]
    return html.escape("; ".join(parts))


def _valid_period(outputs: list[dict[str, Any]]) -> str:
    """The input's valid period: that of its decomposition, else the span of its outputs."""
    chosen = [o for o in outputs if o.get("stage") == "decompose"] or outputs
    starts = [o["facts"]["time_coverage_start"] for o in chosen
              if o.get("facts", {}).get("time_coverage_start")]
    ends = [o["facts"]["time_coverage_end"] for o in chosen
            if o.get("facts", {}).get("time_coverage_end")]
    if not starts:
        return ""
    return _period({"time_coverage_start": min(starts), "time_coverage_end": max(ends)})


def render_report(manifest: dict[str, Any], directory: Path) -> str:
    """The report page as text, from a run's manifest."""
    records = manifest.get("outputs", {})
    inputs, files = [], []
    for unit, record in sorted(manifest.get("units", {}).items()):
        status = record.get("status", "ok")
        mine = {k: records.get(k, {}) for k in record.get("outputs", {})}
        inputs.append(
            f'<tr><td>{html.escape(unit)}</td><td class="{html.escape(status)}">'
            f"{'done' if status == 'ok' else html.escape(status)}</td>"
            f"<td>{html.escape(_valid_period(list(mine.values())))}</td>"
            f"<td>{html.escape(record.get('error', ''))}</td></tr>")
        for name, state in sorted(record.get("outputs", {}).items()):
            info = mine[name]
            shown = _link(name) if (directory / name).exists() else html.escape(name)
            when = (f'<span class="stale">up to date, written {html.escape(str(info.get("written")))}'
                    "</span>" if state == "up to date" else "written")
            facts = info.get("facts", {})
            seconds = f"{info['seconds']:.2f} s" if "seconds" in info else ""
            files.append(f"<tr><td>{shown}</td><td>{html.escape(unit)}</td>"
                         f"<td>{html.escape(str(info.get('stage', '')))}</td><td>{when}</td>"
                         f"<td>{html.escape(_period(facts))}</td><td>{_quality(facts)}</td>"
                         f"<td>{seconds}</td></tr>")
    pictures = sorted(k for r in manifest.get("units", {}).values() for k in r.get("outputs", {})
                      if k.endswith(".png") and (directory / k).exists())
    timings = "".join(f"<tr><td>{html.escape(s)}</td><td>{t:.2f} s</td></tr>"
                      for s, t in sorted(manifest.get("timings", {}).items()))
    figures = "".join(
        f'<figure><a href="{html.escape(p, quote=True)}"><img src="{html.escape(p, quote=True)}" '
        f'alt="{html.escape(p, quote=True)}"></a><figcaption>{html.escape(p)}</figcaption></figure>'
        for p in pictures)
    status = manifest.get("status", "?")
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>flowpipe run report</title>
<style>{_STYLE}</style></head><body>
<h1>flowpipe run report</h1>
<p class="summary"><span class="{html.escape(status)}">{html.escape(summary_line(manifest))}</span></p>
<p>Started {html.escape(str(manifest.get("started")))}, finished {html.escape(str(manifest.get("finished")))},
flowpipe {html.escape(str(manifest.get("flowpipe_version")))}, config
{html.escape(str(manifest.get("config")))}.</p>
<h2>Inputs</h2>
<table><tr><th>input</th><th>status</th><th>valid period</th><th>error</th></tr>{"".join(inputs)}</table>
<h2>Outputs</h2>
<table><tr><th>file</th><th>input</th><th>stage</th><th>state</th><th>valid period</th>
<th>quality figures (worst slab) and trajectory counts</th><th>time to write</th></tr>
{"".join(files) or '<tr><td colspan="7">none</td></tr>'}</table>
<h2>Maps</h2>
{figures or "<p>none</p>"}
<h2>Timings</h2>
<table><tr><th>stage</th><th>time</th></tr>{timings}</table>
<p>Also: {_link("manifest.json")}, {_link("flowpipe.log")}.</p>
<p class="caution">{html.escape(CAUTION)}</p>
</body></html>
"""


def write_report(directory: Path, manifest: dict[str, Any]) -> Path:
    """Write ``report.html`` atomically into ``directory``."""
    path = directory / REPORT_NAME
    with atomic_path(path) as tmp:
        tmp.write_text(render_report(manifest, directory))
    return path
