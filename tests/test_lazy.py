"""Plan, then run: building a stage's result on a lazy input computes nothing, and the
result is an ordinary xarray Dataset that xarray's own writers accept.

Computes are counted with dask's documented scheduler callbacks
(``dask.callbacks.Callback``, "Diagnostics (local)" in the dask documentation): its
``_start`` hook runs once at the beginning of every compute on the local schedulers.
Files are compared through xarray (the reference client, Hoyer & Hamman 2017).
"""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr
from dask.callbacks import Callback
from reference_winds import case6, latitudes, mesh, wind_dataset

import flowpipe as fp
from flowpipe.contours import box


class ComputeCounter(Callback):
    """Counts the computes dask starts while it is active."""

    def __init__(self):
        super().__init__()
        self.computes = 0

    def _start(self, dsk):
        self.computes += 1


def _global_wind(gap: bool = False) -> xr.Dataset:
    # Williamson et al. (1992) test case 6 on a small Gauss-Legendre grid, two levels,
    # one chunk per level (as flowpipe.open_wind returns it).
    lat = latitudes("GL", 16)
    lon, phi, lam = mesh(lat, 32)
    ref = case6(phi, lam)
    u, v = np.stack([ref["u"], 0.5 * ref["u"]]), np.stack([ref["v"], 0.5 * ref["v"]])
    if gap:
        u[0, 3:5, 4:7] = np.nan
    wind = wind_dataset(u, v, lat, lon, levels=np.array([850.0, 500.0]))
    return wind.chunk({"level": 1})


def _regional_wind() -> xr.Dataset:
    # The same flow cut to a limited area, with a few missing points in one level.
    wind = _global_wind().isel(latitude=slice(3, 13), longitude=slice(2, 14))
    return wind.where((wind["level"] != 850.0) | (wind["longitude"] < 60.0)
                      | (wind["latitude"] > 0.0))


BUILDERS = {
    "spectral": lambda: fp.decompose(_global_wind(), method="spectral"),
    "spectral-auto": lambda: fp.decompose(_global_wind(gap=True)),
    "regional-variational": lambda: fp.decompose(_regional_wind()),
    "regional-dirichlet": lambda: fp.decompose(_regional_wind(), scheme="dirichlet"),
    "kinematics": lambda: fp.kinematics(_global_wind()),
    "circulation": lambda: fp.circulation(_regional_wind(), [box(-20.0, 20.0, 40.0, 100.0)]),
}


@pytest.mark.parametrize("name", list(BUILDERS))
def test_building_a_result_on_a_lazy_input_computes_nothing(name):
    with ComputeCounter() as counter:
        result = BUILDERS[name]()
    assert counter.computes == 0
    fields = [v for v in result.data_vars if {"level", "time"} & set(result[v].dims)]
    assert fields and all(result[v].chunks is not None for v in fields)
    assert not [k for k, v in result.attrs.items() if hasattr(v, "dask")]
    with ComputeCounter() as counter:  # and the counter does see a compute
        result.compute()
    assert counter.computes >= 1


def test_missing_points_of_a_lazy_input_are_refused_when_computed():
    # kinematics need complete fields; a lazy input is checked inside each slab task.
    wind = _global_wind(gap=True)
    with ComputeCounter() as counter:
        result = fp.kinematics(wind)
    assert counter.computes == 0
    with pytest.raises(fp.InputError, match="missing points"):
        result.compute()


@pytest.mark.parametrize("name", ["spectral", "regional-variational"])
@pytest.mark.parametrize("suffix", [".nc", ".zarr"])
def test_xarray_writes_a_lazy_result_as_flowpipe_write_does(name, suffix, tmp_path):
    result = BUILDERS[name]()
    written = fp.write(result, tmp_path / "flowpipe.nc")
    plain = tmp_path / f"plain{suffix}"
    if suffix == ".nc":
        result.to_netcdf(plain)
    else:
        result.to_zarr(plain, consolidated=False)
    reader = {"engine": "zarr", "consolidated": False} if suffix == ".zarr" else {}
    with xr.open_dataset(written) as ours, xr.open_dataset(plain, **reader) as theirs:
        assert set(theirs.data_vars) <= set(ours.data_vars)
        for var in theirs.data_vars:
            np.testing.assert_array_equal(theirs[var].values, ours[var].values, err_msg=var)
        # the written file's global figures summarise the per-slab ones (the largest slab)
        for figure in ("reconstruction_error", "iterations"):
            if figure in theirs:
                assert ours.attrs[figure] == pytest.approx(float(theirs[figure].max()),
                                                           rel=1e-12)


@pytest.mark.parametrize(("name", "module", "kernel"), [
    ("spectral", "flowpipe.decompose", "helmholtz_slab"),
    ("regional-variational", "flowpipe.regional", "_solve_slabs"),
])
def test_writing_a_lazy_result_runs_each_slab_task_once(name, module, kernel, monkeypatch,
                                                        tmp_path):
    # The data and the global quality figures come from one pass over the input: each
    # slab kernel runs once per slab (two levels, one chunk each; *common practice* for
    # a graph written with one dask compute).
    import importlib

    target = importlib.import_module(module)
    calls = []
    original = getattr(target, kernel)

    def counted(*args, **kwargs):
        calls.append(1)
        return original(*args, **kwargs)

    monkeypatch.setattr(target, kernel, counted)
    result = BUILDERS[name]()
    assert calls == []
    written = fp.write(result, tmp_path / "out.nc")
    assert len(calls) == 2
    with xr.open_dataset(written) as ds:
        assert ds.attrs["reconstruction_error"] == pytest.approx(
            float(ds["reconstruction_error"].max()), rel=1e-12)
