"""What a batch run remembers: input fingerprints, the manifest, the run lock."""

from __future__ import annotations

import contextlib
import hashlib
import json
import logging
import os
import shutil
import socket
from pathlib import Path
from typing import Any

from .errors import UsageError
from .store import atomic_path

LOCK_NAME = ".flowpipe.lock"
MANIFEST_NAME = "manifest.json"
log = logging.getLogger("flowpipe.run")


def sha256(path: Path, block: int = 1 << 20) -> str:
    """SHA-256 of a file, read in blocks of one MiB."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        while chunk := handle.read(block):
            digest.update(chunk)
    return digest.hexdigest()


def _files(path: Path) -> list[Path]:
    """The files of a directory (a Zarr store), in a stable order; a file itself."""
    if not path.is_dir():
        return [path]
    return sorted(p for p in path.rglob("*") if p.is_file())


def fingerprint(path: Path, known: dict[str, Any] | None = None) -> dict[str, Any]:
    """Path, size, modification time and SHA-256 of a file or a directory store.

    A directory (a Zarr store) counts as the sum of its files' sizes, the
    latest of their modification times, and the SHA-256 of their relative
    names and hashes. The hash is reused from ``known`` when size and
    modification time are the same (the check every build tool makes;
    *common practice*), so an unchanged nightly input is not read twice.
    """
    files = _files(path)
    stats = [p.stat() for p in files]
    size = sum(st.st_size for st in stats)
    mtime = max((st.st_mtime_ns for st in stats), default=path.stat().st_mtime_ns)
    record = {"path": str(path), "size": size, "mtime_ns": mtime}
    if known and known.get("size") == size and known.get("mtime_ns") == mtime:
        record["sha256"] = known["sha256"]
    elif path.is_dir():
        listing = "".join(f"{p.relative_to(path).as_posix()}\t{sha256(p)}\n" for p in files)
        record["sha256"] = hashlib.sha256(listing.encode()).hexdigest()
    else:
        record["sha256"] = sha256(path)
    return record


def section_hash(*sections: dict[str, Any]) -> str:
    """A stable hash of the config tables an output depends on."""
    text = json.dumps(sections, sort_keys=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def read_manifest(directory: Path) -> dict[str, Any]:
    """The manifest of the previous run in ``directory`` (empty when none)."""
    path = directory / MANIFEST_NAME
    try:
        return json.loads(path.read_text())
    except FileNotFoundError:
        return {}
    except (OSError, json.JSONDecodeError) as exc:
        log.warning("ignoring unreadable manifest %s (%s): everything will be redone", path, exc)
        return {}


def write_json(path: Path, data: dict[str, Any]) -> None:
    """Write JSON atomically (temporary name, fsync, rename)."""
    with atomic_path(path) as tmp:
        tmp.write_text(json.dumps(data, indent=2, sort_keys=True, default=str) + "\n")


def sweep_temporaries(directory: Path) -> list[Path]:
    """Remove the temporary files an interrupted run left in ``directory``.

    Call it only while holding the :class:`RunLock`: then no other run is
    writing there, and every hidden ``.NAME.tmp-*`` file is a leftover, and so
    is every such directory (a Zarr store being written), removed whole.
    """
    removed: list[Path] = []
    for path in sorted(directory.rglob(".*.tmp-*")):
        if any(path.is_relative_to(done) for done in removed):
            continue  # inside a temporary store already removed
        with contextlib.suppress(FileNotFoundError):
            if path.is_dir() and not path.is_symlink():
                shutil.rmtree(path)
            else:
                path.unlink()
            removed.append(path)
            log.warning("removed %s, left by an interrupted run", path.name)
    return removed


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


class RunLock:
    """One run at a time per output directory.

    The lock is a file holding the holder's process id and host, created
    atomically with ``O_CREAT | O_EXCL``. A lock left by a dead process on
    this host is taken over, with a log line; a live holder, or one on
    another host that cannot be checked, makes the run refuse.
    """

    def __init__(self, directory: Path) -> None:
        self.path = directory / LOCK_NAME
        self.host = socket.gethostname()

    def _create(self) -> bool:
        try:
            fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
        except FileExistsError:
            return False
        with os.fdopen(fd, "w") as handle:
            json.dump({"pid": os.getpid(), "host": self.host}, handle)
            handle.flush()
            os.fsync(handle.fileno())
        return True

    def acquire(self) -> None:
        self.path.parent.mkdir(parents=True, exist_ok=True)
        if self._create():
            return
        try:
            holder = json.loads(self.path.read_text())
            pid, host = int(holder["pid"]), str(holder["host"])
        except (OSError, ValueError, KeyError, TypeError):
            pid, host = -1, self.host  # unreadable: a writer died before finishing it
        if host == self.host and (pid < 0 or not _alive(pid)):
            log.warning("taking over a stale lock %s left by process %s on %s", self.path, pid, host)
            with contextlib.suppress(FileNotFoundError):
                self.path.unlink()
            if self._create():
                return
        raise UsageError(
            f"{self.path.parent}: another flowpipe run (process {pid} on {host}) holds the lock "
            f"{self.path}; wait for it to finish, or remove the lock if that run is gone"
        )

    def release(self) -> None:
        with contextlib.suppress(FileNotFoundError):
            self.path.unlink()

    def __enter__(self) -> RunLock:
        self.acquire()
        return self

    def __exit__(self, *exc: object) -> None:
        self.release()
