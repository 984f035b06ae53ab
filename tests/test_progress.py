"""Progress bars: on a terminal only, never in a pipe or under --quiet.

External checks: the Python standard library's ``pty`` module gives the command a
pseudo-terminal as standard error (``isatty()`` is then true, POSIX ``isatty(3)``),
and tqdm draws its bars with carriage returns and ``N/M`` counts
(tqdm documentation, "Usage"); a pipe is no terminal.
"""

from __future__ import annotations

import fcntl
import io
import os
import pty
import struct
import subprocess
import sys
import termios
from pathlib import Path

import numpy as np
import pytest
import xarray as xr
from tqdm import tqdm
from windfiles import small_global_file


@pytest.fixture(scope="module")
def wind_file(tmp_path_factory) -> Path:
    directory = tmp_path_factory.mktemp("progress")
    return small_global_file(directory, 3)


def _on_terminal(args: list[str]) -> tuple[int, str]:
    """Run flowpipe with a pseudo-terminal as standard error; exit code and what it showed."""
    master, slave = pty.openpty()
    # a terminal of 24 rows of 100 columns (a new pseudo-terminal has no size)
    fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", 24, 100, 0, 0))
    proc = subprocess.Popen([sys.executable, "-m", "flowpipe", *args], stdin=subprocess.DEVNULL,
                            stdout=subprocess.DEVNULL, stderr=slave)
    os.close(slave)
    shown = b""
    while True:
        try:
            block = os.read(master, 4096)
        except OSError:  # EIO: the command closed the terminal
            break
        if not block:
            break
        shown += block
    os.close(master)
    return proc.wait(), shown.decode(errors="replace")


def _decompose(wind_file: Path, tmp_path: Path, *extra: str) -> list[str]:
    return ["decompose", str(wind_file), "-o", str(tmp_path / "out.nc"), *extra]


def test_decompose_shows_slabs_on_a_terminal(wind_file, tmp_path):
    code, shown = _on_terminal(_decompose(wind_file, tmp_path))
    assert code == 0
    assert "decompose" in shown and "slab" in shown
    assert "6/6" in shown  # 3 times x 2 levels, all done
    assert "\r" in shown  # redrawn in place


def test_nothing_on_standard_error_without_a_terminal(wind_file, tmp_path):
    proc = subprocess.run([sys.executable, "-m", "flowpipe", *_decompose(wind_file, tmp_path)],
                          capture_output=True, check=False)
    assert proc.returncode == 0
    assert proc.stderr == b""
    assert b"wrote" in proc.stdout


def test_quiet_shows_nothing_on_a_terminal(wind_file, tmp_path):
    code, shown = _on_terminal(_decompose(wind_file, tmp_path, "--quiet"))
    assert code == 0
    assert shown == ""


def test_advect_shows_time_slices_on_a_terminal(wind_file, tmp_path):
    code, shown = _on_terminal(["advect", str(wind_file), "-o", str(tmp_path / "tracks.nc"),
                                "--start", "40,10,850", "--hours", "12"])
    assert code == 0
    assert "advect" in shown and "time slice" in shown
    assert "3/3" in shown  # the 6-hourly wind's times 0, 6 and 12 h read, all of them


def test_batch_run_shows_steps_on_a_terminal(wind_file, tmp_path):
    config = tmp_path / "night.toml"
    config.write_text(f'[input]\npaths = ["{wind_file}"]\n\n[decompose]\n\n'
                      '[output]\ndirectory = "out"\n')
    code, shown = _on_terminal(["run", str(config)])
    assert code == 0
    assert "1/1" in shown and "step" in shown
    assert "run: " in shown  # the bar says what it counts, as decompose's does


@pytest.fixture(scope="module")
def regional_file(tmp_path_factory) -> Path:
    """A limited-area level (invented: a vortex over a 40x40 box) with a disc below the ground."""
    lat = np.linspace(30.0, 50.0, 40)
    lon = np.linspace(-10.0, 10.0, 40)
    y, x = np.meshgrid(lat - 40.0, lon, indexing="ij")
    u, v = -y * np.exp(-(x**2 + y**2) / 50), x * np.exp(-(x**2 + y**2) / 50)
    ground = (y - 4) ** 2 + (x + 3) ** 2 < 9
    attrs = {"u": {"standard_name": "eastward_wind", "units": "m s-1"},
             "v": {"standard_name": "northward_wind", "units": "m s-1"}}
    wind = xr.Dataset({name: (("latitude", "longitude"), np.where(ground, np.nan, field),
                              attrs[name]) for name, field in (("u", u), ("v", v))},
                      coords={"latitude": ("latitude", lat, {"units": "degrees_north"}),
                              "longitude": ("longitude", lon, {"units": "degrees_east"})})
    path = tmp_path_factory.mktemp("progress_regional") / "box.nc"
    wind.to_netcdf(path)
    return path


def test_regional_decompose_shows_its_solver_notes_on_a_terminal(regional_file, tmp_path):
    code, shown = _on_terminal(_decompose(regional_file, tmp_path))
    assert code == 0
    assert "1/1" in shown and "slab" in shown
    # the first note is always drawn (tqdm's postfix after the counts, tqdm docs "Usage")
    assert "building the" in shown


def test_regional_quiet_shows_no_notes(regional_file, tmp_path):
    code, shown = _on_terminal(_decompose(regional_file, tmp_path, "--quiet"))
    assert code == 0
    assert shown == ""


def test_a_bar_shows_the_iterations_of_a_slab(monkeypatch):
    """The CG iterations of a variational solve reach a bar taking notes, off the counts."""
    from flowpipe import progress
    from flowpipe.regional import cache, solvers

    monkeypatch.setattr(progress, "NOTE_INTERVAL", 0.0)  # draw every note
    lat, lon = np.linspace(30.0, 50.0, 30), np.linspace(-10.0, 10.0, 30)
    grid = cache.staggered_grid(lat, lon, False)
    solver = solvers.VariationalSolver(grid, np.ones(grid.shape, bool), 1e-10)
    y, x = np.meshgrid(lat - 40.0, lon, indexing="ij")
    wind = np.stack([-y * np.exp(-(x**2 + y**2) / 50), x * np.exp(-(x**2 + y**2) / 50)])
    shown = io.StringIO()
    with progress.TaskBar(tqdm(total=1, file=shown, disable=False), notes=True):
        _, iterations = solver.solve(wind)
    assert iterations > 1
    assert f"CG iteration {iterations - 1}/" in shown.getvalue()
    assert "s left" in shown.getvalue()
    quiet = io.StringIO()
    with progress.TaskBar(tqdm(total=1, file=quiet, disable=True), notes=True):
        solver.solve(wind)
    assert quiet.getvalue() == ""



def test_a_warning_clears_the_bar_and_has_a_line_of_its_own(monkeypatch):
    """A warning shown while a bar is drawn: the bar's line is blanked and the cursor back at
    its start (carriage return, spaces, carriage return: tqdm's own clearing, tqdm
    documentation "Writing messages") before the warning, and the bar is drawn again after
    it; once the bar is closed, warnings are shown as before."""
    import warnings

    from flowpipe import progress

    shown = io.StringIO()

    def show(message, *args, **kwargs):  # as the command shows them (flowpipe.cli)
        print(f"warning: {message}", file=shown)

    monkeypatch.setattr(warnings, "showwarning", show)
    before = warnings.showwarning
    with warnings.catch_warnings():
        warnings.simplefilter("always")
        with progress.TaskBar(tqdm(total=2, file=shown, disable=False, unit="slab")) as task:
            task.progress.update(1)
            warnings.warn("a level below the ground", UserWarning, stacklevel=1)
            task.progress.update(1)
    ahead, behind = shown.getvalue().split("a level below the ground", 1)
    line = ahead.rsplit("\n", 1)[-1].split("\r")  # the warning's line, by carriage returns
    assert "slab" not in line[-1] and line[-2].strip() == "" and "slab" in line[-3], line
    assert "2/2" in behind.split("\n", 1)[1], behind  # the bar, drawn again below it
    assert warnings.showwarning is before
