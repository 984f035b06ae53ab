"""``report.html``: a static page for the morning check (no external resources)."""

from __future__ import annotations

import html
from pathlib import Path
from typing import Any

from .annotate import CAUTION
from .store import atomic_path

REPORT_NAME = "report.html"
_STYLE = """
body { font-family: sans-serif; margin: 1.5em auto; max-width: 70em; color: #222; }
h1 { font-size: 1.4em; } h2 { font-size: 1.15em; margin-top: 1.6em; }
table { border-collapse: collapse; } td, th { border: 1px solid #bbb; padding: .25em .6em; }
.failed { color: #a00; font-weight: bold; } .ok { color: #060; }
figure { display: inline-block; margin: .5em; } img { max-width: 30em; border: 1px solid #ccc; }
.caution { font-size: .85em; color: #555; border-top: 1px solid #ccc; padding-top: .5em; }
"""


def _link(name: str) -> str:
    quoted = html.escape(name, quote=True)
    return f'<a href="{quoted}">{html.escape(name)}</a>'


def render_report(manifest: dict[str, Any], directory: Path) -> str:
    """The report page as text, from a run's manifest."""
    outputs = sorted(k for k in manifest.get("outputs", {}) if (directory / k).exists())
    rows = []
    for unit, record in sorted(manifest.get("units", {}).items()):
        status = record.get("status", "ok")
        error = html.escape(record.get("error", ""))
        rows.append(f'<tr><td>{html.escape(unit)}</td><td class="{html.escape(status)}">'
                    f"{html.escape(status)}</td><td>{error}</td></tr>")
    data = [k for k in outputs if k.endswith(".nc")]
    pictures = [k for k in outputs if k.endswith(".png")]
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
<p>Status: <span class="{html.escape(status)}">{html.escape(status)}</span>.
Started {html.escape(str(manifest.get("started")))}, finished {html.escape(str(manifest.get("finished")))},
flowpipe {html.escape(str(manifest.get("flowpipe_version")))}, config
{html.escape(str(manifest.get("config")))}.</p>
<h2>Inputs</h2>
<table><tr><th>unit</th><th>status</th><th>error</th></tr>{"".join(rows)}</table>
<h2>Data files</h2>
<ul>{"".join(f"<li>{_link(k)}</li>" for k in data) or "<li>none</li>"}</ul>
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
