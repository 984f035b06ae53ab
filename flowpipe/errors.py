"""Exceptions that the command line turns into one-line messages."""

from __future__ import annotations

import errno
import os
import shutil
from pathlib import Path


class FlowpipeError(Exception):
    """A problem the user can fix: bad input, a bad option or a bad config.

    The command line prints ``flowpipe: error: <message>`` and exits with
    :attr:`exit_code` (2: usage error or unusable input).
    """

    exit_code = 2


class InputError(FlowpipeError):
    """An input file or variable that flowpipe cannot use as it is."""


class UsageError(FlowpipeError):
    """An option, argument or config value that is out of range or inconsistent."""


class FlowpipeWarning(UserWarning):
    """Something a result lacks or leaves out that the user should know about.

    The command line prints ``flowpipe: warning: <message>``.
    """


class EnvironmentProblem(FlowpipeError):
    """The user's machine stops flowpipe: permissions, a full or read-only disk, a closed pipe."""


#: What an operating-system error means for the user, and what to do about it, by errno
#: (POSIX.1-2017, <errno.h>; Linux errno(3)).
_OS_ADVICE = {
    errno.EACCES: ("permission denied", "choose a location you may write to, or ask for access"),
    errno.EPERM: ("operation not permitted", "choose a location you may write to, or ask for "
                  "access"),
    errno.EROFS: ("read-only file system", "write to a file system that allows writing"),
    errno.ENOENT: ("no such file or directory", "check the path"),
    errno.ENOTDIR: ("a part of the path is not a directory", "check the path"),
    errno.EEXIST: ("exists and is not a directory", "choose another output directory"),
    errno.EISDIR: ("is a directory", "give a file name"),
    errno.EMFILE: ("too many open files", "raise the limit (ulimit -n) or give fewer files"),
    errno.ENFILE: ("too many open files on this machine", "retry when fewer files are open"),
    errno.EIO: ("input/output error", "check the disk or the network file system"),
    errno.ENAMETOOLONG: ("file name too long", "choose a shorter name"),
}

#: Errors that mean the disk (or the user's quota) is full.
NO_SPACE_ERRNOS = (errno.ENOSPC, errno.EDQUOT)

MIB = 2**20


def no_space(path: str | os.PathLike, needed: int | None) -> EnvironmentProblem:
    """The error for a full disk while writing ``path``: where, how much is needed and free.

    Parameters
    ----------
    path : path-like
        The file being written.
    needed : int, optional
        About how many bytes the file needs (None when unknown).
    """
    where = existing_directory(path)
    mount = where
    while not os.path.ismount(mount):
        mount = mount.parent
    size = f"needed about {megabytes(needed)}, " if needed else ""
    return EnvironmentProblem(
        f"no space left on {mount} (writing {path}): {size}"
        f"{megabytes(shutil.disk_usage(where).free)} free; free some space, or write the "
        "outputs elsewhere")


def existing_directory(path: str | os.PathLike) -> Path:
    """The directory ``path`` would be written into, or its nearest existing ancestor."""
    where = Path(path).resolve().parent
    while not where.exists():
        where = where.parent
    return where


def read_only(path: str | os.PathLike) -> bool:
    """Whether ``path`` would be written to a file system mounted read-only."""
    return bool(os.statvfs(existing_directory(path)).f_flag & os.ST_RDONLY)


def megabytes(size: float) -> str:
    """A size in bytes as MB for messages: ``"27 MB"``, ``"0.4 MB"``."""
    value = size / MIB
    return f"{value:.0f} MB" if value >= 10 else f"{value:.1f} MB"



def from_os_error(exc: OSError, path: str | os.PathLike | None = None,
                  needed: int | None = None) -> EnvironmentProblem:
    """One line for an operating-system error: the path, what is wrong, what to do.

    Parameters
    ----------
    exc : OSError
        The error raised.
    path : path-like, optional
        The path to name when ``exc`` names none (or names a temporary file).
    needed : int, optional
        The bytes a write needs, for the disk-full message.
    """
    name = path if path is not None else (exc.filename or "")
    if exc.errno in NO_SPACE_ERRNOS:
        if not name:  # a write to standard output, redirected to a file
            return EnvironmentProblem("no space left on the disk standard output is written "
                                      "to; free some space, or redirect it elsewhere")
        return no_space(name, needed)
    if isinstance(exc, BrokenPipeError):
        return EnvironmentProblem("standard output was closed before everything was written "
                                  "(broken pipe); the output shown is incomplete")
    code = exc.errno
    if code in (errno.EACCES, errno.EPERM) and name and read_only(name):
        code = errno.EROFS  # as some libraries (HDF5) report a read-only file system
    return os_problem(code, name, exc.strerror or str(exc))


def os_problem(code: int | None, path: str | os.PathLike | None,
               what: str = "") -> EnvironmentProblem:
    """One line for an operating-system condition by its errno: the path, what is wrong,
    what to do (``what`` when the errno has no advice of its own)."""
    what, todo = _OS_ADVICE.get(code, (what or os.strerror(code or 0), "check the path"))
    prefix = f"{path}: " if path else ""
    return EnvironmentProblem(f"{prefix}{what}; {todo}")
