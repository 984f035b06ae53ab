"""A hostile environment: permissions, read-only and full disks, closed pipes.

README.md ("Exit codes"): what the user's machine refuses is a usage error,
exit 2, one line beginning ``flowpipe: error:`` that names the path and what to do, no
traceback; exit 3 is for bugs only. Outputs are written under a temporary name and
renamed (POSIX ``rename``, atomic), so a refused write leaves nothing behind. The errors
are the operating system's own (Linux ``errno(3)``: EACCES, EROFS, ENOSPC, EPIPE),
produced for real: a directory the process may not write to (root gives up the
capabilities that bypass file permissions, ``capabilities(7)``, with util-linux
``setpriv``), and small ``tmpfs`` file systems mounted read-only or nearly full
(``mount(8)``, which needs root).
"""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
REGIONAL = ROOT / "sample_data" / "demo_regional.nc"
FLOWPIPE = [sys.executable, "-m", "flowpipe"]

#: As root, give up CAP_DAC_OVERRIDE and CAP_DAC_READ_SEARCH (capabilities(7)): file
#: permissions then apply as to any user.
UNPRIVILEGED = (["setpriv", "--inh-caps=-dac_override,-dac_read_search",
                 "--bounding-set=-dac_override,-dac_read_search"] if os.geteuid() == 0 else [])

needs_root = pytest.mark.skipif(os.geteuid() != 0, reason="mounting a file system needs root")


def _flowpipe(*args: str, prefix: list[str] = ()) -> subprocess.CompletedProcess:
    return subprocess.run([*prefix, *FLOWPIPE, *map(str, args)], capture_output=True, text=True,
                          cwd=ROOT, timeout=300)


def _one_line(proc: subprocess.CompletedProcess, *texts: str) -> str:
    errors = [line for line in proc.stderr.splitlines() if not line.startswith("flowpipe: warning")]
    assert proc.returncode == 2, proc.stderr
    assert len(errors) == 1 and errors[0].startswith("flowpipe: error:"), proc.stderr
    assert "Traceback" not in proc.stderr and "internal error" not in proc.stderr
    for text in texts:
        assert text in errors[0], errors[0]
    return errors[0]


@contextlib.contextmanager
def _tmpfs(path: Path, *options: str) -> Iterator[Path]:
    path.mkdir()
    mounted = subprocess.run(["mount", "-t", "tmpfs", "-o", ",".join(options), "tmpfs", str(path)],
                             capture_output=True, text=True)
    if mounted.returncode:
        pytest.skip(f"cannot mount a tmpfs here: {mounted.stderr.strip()}")
    try:
        yield path
    finally:
        subprocess.run(["umount", str(path)], check=True)


def _forbidden(path: Path, mode: int) -> Path:
    """``path`` with ``mode``, owned by someone else when the tests run as root."""
    if os.geteuid() == 0:
        shutil.chown(path, "nobody")
    path.chmod(mode)
    return path


def _config(tmp_path: Path, out: Path) -> Path:
    config = tmp_path / "night.toml"
    config.write_text(f'[input]\npaths = ["{REGIONAL}"]\n\n[decompose]\nmethod = "auto"\n\n'
                      f'[output]\ndirectory = "{out}"\n')
    return config


def test_an_unwritable_directory_is_named(tmp_path):
    (tmp_path / "locked").mkdir()
    locked = _forbidden(tmp_path / "locked", 0o555)
    proc = _flowpipe("decompose", REGIONAL, "-o", locked / "out.nc", prefix=UNPRIVILEGED)
    _one_line(proc, str(locked / "out.nc"), "permission denied")
    assert not list(locked.iterdir())


def test_an_unreadable_input_is_named(tmp_path):
    wind = tmp_path / "wind.nc"
    shutil.copy(REGIONAL, wind)
    _forbidden(wind, 0o200)
    proc = _flowpipe("decompose", wind, "-o", tmp_path / "out.nc", prefix=UNPRIVILEGED)
    _one_line(proc, str(wind), "ermission denied")
    assert not (tmp_path / "out.nc").exists()


def test_a_batch_into_an_unwritable_directory_says_so(tmp_path):
    (tmp_path / "locked").mkdir()
    locked = _forbidden(tmp_path / "locked", 0o555)
    proc = _flowpipe("run", _config(tmp_path, locked / "night"), prefix=UNPRIVILEGED)
    _one_line(proc, str(locked / "night"), "permission denied")


def test_a_file_in_the_way_of_the_output_directory(tmp_path):
    (tmp_path / "maps").write_text("")
    proc = _flowpipe("decompose", REGIONAL, "-o", tmp_path / "maps" / "out.nc")
    _one_line(proc, str(tmp_path / "maps"), "not a directory")


@pytest.mark.skipif(not Path("/proc/self").is_dir(), reason="needs Linux's /proc")
def test_a_file_system_without_blocks_is_not_called_full():
    # /proc counts no blocks (statvfs: 0 in all, 0 free; proc(5)): a write there is refused
    # by the system itself, and the message says what the system said, not "no space left"
    proc = _flowpipe("decompose", REGIONAL, "-o", "/proc/flowpipe-out.nc")
    line = _one_line(proc, "/proc/flowpipe-out.nc")
    assert "no space" not in line and "permission denied" in line, line


@needs_root
def test_a_read_only_file_system(tmp_path):
    with _tmpfs(tmp_path / "ro", "ro", "size=1m") as ro:
        proc = _flowpipe("decompose", REGIONAL, "-o", ro / "out.nc")
        _one_line(proc, str(ro / "out.nc"), "read-only file system")
        proc = _flowpipe("map", REGIONAL, "-o", ro / "ta.png", "--field", "ta")
        _one_line(proc, str(ro / "ta.png"), "read-only file system")


@needs_root
def test_a_full_disk_says_how_much_was_needed(tmp_path):
    with _tmpfs(tmp_path / "small", "size=256k") as small:
        proc = _flowpipe("decompose", REGIONAL, "-o", small / "out.nc")
        line = _one_line(proc, f"no space left on {small}", str(small / "out.nc"), "needed about",
                         " MB")
        needed = float(line.split("needed about ")[1].split(" MB")[0])
        assert needed > 0.25  # more than the disk holds
        assert not list(small.iterdir()), "nothing, not even a temporary file, is left"


@needs_root
def test_a_batch_on_a_full_disk_keeps_its_manifest_log_and_report(tmp_path):
    with _tmpfs(tmp_path / "small", "size=256k") as small:
        out = small / "night"
        proc = _flowpipe("run", _config(tmp_path, out))
        assert proc.returncode == 1, proc.stderr  # the contract: an input failed
        assert "Traceback" not in proc.stderr and "internal error" not in proc.stderr
        manifest = json.loads((out / "manifest.json").read_text())
        (unit,) = manifest["units"].values()
        assert unit["status"] == "failed" and "no space left on" in unit["error"]
        assert manifest["status"] == "failed"
        assert "no space left on" in (out / "report.html").read_text()
        assert "no space left on" in (out / "flowpipe.log").read_text()
        names = sorted(p.name for p in out.iterdir())
        assert names == ["flowpipe.log", "manifest.json", "report.html"], names


def test_a_closed_pipe_is_one_line_not_a_bug(tmp_path):
    # The reader goes away before flowpipe writes (as `| head` does once it has its lines).
    proc = subprocess.Popen([*FLOWPIPE, "inspect", str(REGIONAL)], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, cwd=ROOT)
    proc.stdout.close()
    err = proc.stderr.read()
    assert proc.wait(timeout=120) == 2, err
    lines = err.splitlines()
    assert len(lines) == 1 and lines[0].startswith("flowpipe: error:") and "broken pipe" in lines[0]
