"""Which outputs of a batch run are due, and why: a pure function of what the manifest
recorded and what the run sees now (no file is read or written here)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from . import bookkeeping
from ._version import __version__

#: What identifies an input's content in the manifest (see flowpipe.bookkeeping.fingerprint).
FINGERPRINT_FIELDS = ("path", "size", "mtime_ns", "sha256")


def why_due(previous: dict[str, Any] | None, exists: bool, depends: list[dict],
            tables: dict[str, str], *, force: bool = False,
            version: str = __version__) -> str | None:
    """Why an output must be made, or None when it is up to date.

    A pure function of what the manifest recorded about the output and what
    the run sees now, so the decision can be tested and shown (``flowpipe run
    --dry-run``) without making anything.

    Parameters
    ----------
    previous : dict, optional
        The output's record in the last manifest (None when it has none).
    exists : bool
        Whether the output file is there.
    depends : list of dict
        Fingerprints of what it is made from, now.
    tables : dict
        Hashes of the config tables it depends on, now, by table name.
    force : bool
        ``--force``: everything is due.
    version : str
        This flowpipe's version.

    Returns
    -------
    str or None
        The first reason that applies: forced, missing, unknown to the
        manifest, made by another version, config tables changed (named),
        inputs changed (named); None when none applies.
    """
    if force:
        return "forced (--force)"
    if not exists:
        return "missing"
    if not previous:
        return "not in the manifest"
    if previous.get("flowpipe_version") != version:
        return f"made by flowpipe {previous.get('flowpipe_version')}, this is {version}"
    old = previous.get("config_tables")
    if old is None:
        if previous.get("config") != bookkeeping.section_hash(tables):
            return "config changed"
    else:
        changed = [name for name in sorted(set(old) | set(tables)) if old.get(name) != tables.get(name)]
        if changed:
            return f"config changed: {', '.join(f'[{name}]' for name in changed)}"
    before = {d["path"]: {k: d.get(k) for k in FINGERPRINT_FIELDS}
              for d in previous.get("depends_on", [])}
    now = {d["path"]: {k: d.get(k) for k in FINGERPRINT_FIELDS} for d in depends}
    changed = [Path(p).name for p in sorted(set(before) | set(now)) if before.get(p) != now.get(p)]
    if changed:
        return f"input changed: {', '.join(changed)}"
    return None
