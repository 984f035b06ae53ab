"""What importing flowpipe costs and changes, each in a fresh interpreter (subprocess).

Python's import system keeps every imported module in ``sys.modules`` (Python
Language Reference, "The import system", 5.3.1); matplotlib's backend is what
``matplotlib.get_backend()`` reports (matplotlib documentation, "Backends").
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

import pytest


def _python(code: str) -> dict:
    env = {k: v for k, v in os.environ.items() if k not in ("MPLBACKEND", "OMP_WAIT_POLICY")}
    run = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         env=env, check=True)
    return json.loads(run.stdout)


def test_validating_a_config_loads_no_numerical_library():
    # Choices come from flowpipe.choices, which imports nothing.
    loaded = _python(
        "import json, sys; import flowpipe.config; "
        "print(json.dumps([m for m in ('scipy', 'numba', 'matplotlib') if m in sys.modules]))")
    assert loaded == []


def test_the_library_is_importable_piece_by_piece():
    # A stage module imported on its own leaves the package's function of that name intact.
    found = _python(
        "import json, flowpipe.decompose, flowpipe.kinematics; import flowpipe as fp; "
        "print(json.dumps([callable(fp.decompose), callable(fp.kinematics), "
        "fp.decompose.__module__, sorted(set(fp.__all__) - set(dir(fp)))]))")
    assert found == [True, True, "flowpipe.decompose", []]


@pytest.mark.parametrize("module", ["flowpipe", "flowpipe.maps", "flowpipe.parcels._kernels"])
def test_importing_changes_neither_the_backend_nor_the_environment(module):
    # A notebook's matplotlib backend and the process environment are the caller's.
    # (netCDF4 sets HDF5_PLUGIN_PATH when it is imported, *from memory* of its source: it
    # is imported before the environment is taken, to see flowpipe's own changes only.)
    found = _python(
        "import json, os, matplotlib, netCDF4; matplotlib.use('svg'); "
        "backend = matplotlib.get_backend(); "
        f"env = dict(os.environ); import {module}; import flowpipe as fp; fp.render; "
        "print(json.dumps([backend, matplotlib.get_backend(), env == dict(os.environ)]))")
    assert found[0] == found[1] == "svg"
    assert found[2] is True


def test_command_line_help_loads_no_numerical_library():
    # Each command imports its libraries when it runs, so `flowpipe --help` (and a usage
    # error) answers at once: building every parser loads none of them.
    loaded = _python(
        "import contextlib, io, json, sys\n"
        "from flowpipe.cli import build_parser\n"
        "for command in ('', 'decompose', 'advect', 'map', 'run', 'ftle', 'circulation'):\n"
        "    with contextlib.suppress(SystemExit), contextlib.redirect_stdout(io.StringIO()):\n"
        "        build_parser().parse_args([command, '--help'] if command else ['--help'])\n"
        "print(json.dumps([m for m in ('numpy', 'xarray', 'scipy', 'numba', 'matplotlib')"
        " if m in sys.modules]))")
    assert loaded == []


def test_a_decomposition_command_loads_neither_the_cluster_nor_the_grib_libraries(tmp_path):
    # Writing a NetCDF decomposition in the command's own process needs no dask.distributed
    # (no client runs), no cfgrib (the input is NetCDF) and, with no missing point, none
    # of scipy's sparse solvers: each cost 0.1-0.2 s a command. The command runs in the interpreter
    # that reports its modules; the libraries are installed here (the dev extras, scipy),
    # so the check could fail.
    from windfiles import small_global_file

    path = small_global_file(tmp_path, 2)
    found = _python(
        "import contextlib, io, json, sys; from flowpipe.cli import main\n"
        "with contextlib.redirect_stdout(io.StringIO()):\n"
        f"    code = main(['decompose', {str(path)!r}, '-o', {str(tmp_path / 'out.nc')!r}, "
        "'--quiet'])\n"
        "print(json.dumps([code, [m for m in ('distributed', 'cfgrib', 'scipy.sparse.linalg') "
        "if m in sys.modules]]))")
    assert found == [0, []]
