"""flowpipe.decompose and `flowpipe decompose` against published analytic cases."""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr
from reference_winds import (
    case2,
    case6,
    latitudes,
    mesh,
    potential_flow,
    relative_max_error,
    wind_dataset,
)

import flowpipe as fp
from flowpipe.annotate import VARIABLES
from flowpipe.cli import main
from flowpipe.slabs import transform_threads

GRIDS = [("CC", 33, 64), ("F1", 32, 64), ("GL", 32, 64)]
CASES = {
    # Williamson et al. (1992), J. Comput. Phys. 102, 211-224, test case 2, alpha = 0.
    "case2_alpha0": lambda phi, lam: case2(phi, lam, 0.0),
    # ... test case 2 with the flow over the poles, alpha = pi/2 - 0.05.
    "case2_alpha_pi/2-0.05": lambda phi, lam: case2(phi, lam, np.pi / 2 - 0.05),
    # ... test case 6, the Rossby-Haurwitz wave of wavenumber 4.
    "case6": case6,
}
CONTRACT = ("streamfunction", "velocity_potential", "vorticity", "divergence",
            "u_rotational", "v_rotational", "u_divergent", "v_divergent")


def _grid_wind(geometry, nlat, nlon, case, descending=False):
    lat = latitudes(geometry, nlat)
    lon, phi, lam = mesh(lat, nlon)
    ref = CASES[case](phi, lam) if isinstance(case, str) else case(phi, lam)
    ds = wind_dataset(ref["u"], ref["v"], lat, lon)
    if descending:
        ds = ds.isel(latitude=slice(None, None, -1))
        ref = {k: val[::-1] for k, val in ref.items()}
    return ds, ref


@pytest.mark.parametrize("descending", [False, True], ids=["south-north", "north-south"])
@pytest.mark.parametrize("case", list(CASES))
@pytest.mark.parametrize(("geometry", "nlat", "nlon"), GRIDS)
def test_williamson_streamfunction_and_vorticity(geometry, nlat, nlon, case, descending):
    # Williamson et al. (1992), test cases 2 and 6: analytic psi and zeta, relative max
    # error <= 1e-9 after removing the mean; the flows are non-divergent.
    wind, ref = _grid_wind(geometry, nlat, nlon, case, descending)
    parts = fp.decompose(wind, method="spectral")
    assert np.array_equal(parts["latitude"].values, wind["latitude"].values)
    assert relative_max_error(parts["streamfunction"].values, ref["psi"]) <= 1e-9
    assert relative_max_error(parts["vorticity"].values, ref["zeta"]) <= 1e-9
    speed = np.max(np.hypot(ref["u"], ref["v"]))
    assert np.max(np.hypot(parts["u_divergent"], parts["v_divergent"])) <= 1e-9 * speed
    assert np.max(np.abs(parts["u_rotational"].values - ref["u"])) <= 1e-10 * speed
    assert parts.attrs["reconstruction_error"] <= 1e-10


@pytest.mark.parametrize(("geometry", "nlat", "nlon"), [g for g in GRIDS if g[0] != "CC"])
def test_divergent_spherical_harmonic_field(geometry, nlat, nlon):
    # chi and psi built with scipy.special.sph_harm_y; delta = -l(l+1)/a^2 chi (textbook
    # identity): chi and delta to <= 1e-9, rotational + divergent winds reproduce the
    # input to <= 1e-10.
    wind, ref = _grid_wind(geometry, nlat, nlon, potential_flow)
    parts = fp.decompose(wind)
    assert parts.attrs["method"] == "spectral"
    assert relative_max_error(parts["velocity_potential"].values, ref["chi"]) <= 1e-9
    assert relative_max_error(parts["divergence"].values, ref["delta"]) <= 1e-9
    assert relative_max_error(parts["streamfunction"].values, ref["psi"]) <= 1e-9
    speed = np.max(np.hypot(ref["u"], ref["v"]))
    for comp in ("u", "v"):
        total = parts[f"{comp}_rotational"] + parts[f"{comp}_divergent"]
        assert np.max(np.abs(total.values - ref[comp])) <= 1e-10 * speed
        assert np.max(np.abs(parts[f"{comp}_divergent"].values - ref[f"{comp}_div"])) <= 1e-10 * speed
    assert parts.attrs["reconstruction_error"] <= 1e-10


def test_corrupted_pole_rows_are_replaced_by_the_pole_vector():
    # Test case 2 over the poles (Williamson et al. 1992) with a constant added to both
    # pole rows, which no single pole vector produces (*common practice*): the result
    # is the analytic one, and the unresolved wind is the discarded part (the parts and
    # it add up to the wind).
    wind, ref = _grid_wind("CC", 33, 64, "case2_alpha_pi/2-0.05")
    wind["u"][[0, -1], :] += 5.0
    parts = fp.decompose(wind, method="spectral")
    assert relative_max_error(parts["streamfunction"].values, ref["psi"]) <= 1e-9
    assert parts.attrs["unresolved_fraction"] > 1e-6
    assert parts.attrs["reconstruction_error"] <= 1e-12


def test_lazy_over_levels_one_slab_per_task():
    # Each level is its own Williamson et al. (1992) case-2 flow (alpha = 0.1 * level
    # index); the dask result stays lazy, has one chunk per slab and matches the
    # analytic streamfunction of every level.
    geometry, nlat, nlon = "GL", 24, 48
    lat = latitudes(geometry, nlat)
    lon, phi, lam = mesh(lat, nlon)
    refs = [case2(phi, lam, 0.1 * k) for k in range(3)]
    wind = wind_dataset(np.stack([r["u"] for r in refs]), np.stack([r["v"] for r in refs]),
                        lat, lon, levels=np.array([850.0, 500.0, 250.0]))
    wind = wind.chunk({"level": 1})
    parts = fp.decompose(wind, levels=[850.0, 250.0])
    assert parts["streamfunction"].chunks is not None
    assert parts["streamfunction"].data.numblocks == (2, 1, 1)
    computed = parts.compute()
    for index, ref in zip((0, 1), (refs[0], refs[2]), strict=True):
        psi = computed["streamfunction"].isel(level=index).values
        assert relative_max_error(psi, ref["psi"]) <= 1e-9
    assert float(computed["reconstruction_error"].max()) <= 1e-10


@pytest.mark.parametrize("n_tasks", [1, 2, 7])
def test_threads_times_workers_within_cores(n_tasks):
    # No oversubscription: ducc0 threads x concurrent dask tasks <= cores (*common practice*).
    import os

    import dask

    cores = len(os.sched_getaffinity(0))
    for workers in (1, 2, cores):
        with dask.config.set(num_workers=workers, scheduler="threads"):
            threads = transform_threads(n_tasks)
        assert threads >= 1
        assert threads * min(workers, n_tasks) <= max(cores, min(workers, n_tasks))


def test_bad_inputs_name_the_problem():
    wind, _ = _grid_wind("GL", 32, 64, "case6")
    # A limited-area grid cannot be transformed: point to the regional method.
    regional = wind.isel(longitude=slice(0, 40))
    with pytest.raises(fp.InputError, match="--method regional"):
        fp.decompose(regional, method="spectral")
    # Missing values under method="spectral": filled for the transforms, then missing again
    # in every output (flowpipe.masked).
    gappy = wind.copy(deep=True)
    gappy["u"][10:12, 5:7] = np.nan
    filled = fp.decompose(gappy, method="spectral")
    assert "masked_points" in filled.attrs
    assert int(filled["streamfunction"].isnull().sum()) == 4
    # Too coarse for the truncation: the largest allowed N (GL limit nlat - 1 of the
    # ducc0 analysis_2d documentation, and (nlon - 1) // 2 = 31).
    with pytest.raises(fp.UsageError, match="give N from 1 to 31"):
        fp.decompose(wind, truncation=40)
    with pytest.raises(fp.UsageError, match="method"):
        fp.decompose(wind, method="fourier")


def _write_case6_file(path, descending):
    wind, ref = _grid_wind("CC", 33, 64, "case6", descending)
    ds = wind.expand_dims(time=np.array(["2026-01-01T00"], dtype="datetime64[ns]"))
    ds.to_netcdf(path)
    return ref


def test_cli_writes_every_contract_variable(tmp_path):
    # Output as README.md ("Output files") lists it (CF-1.11 standard names and units),
    # values against Williamson et al. (1992) test case 6.
    source = tmp_path / "rh.nc"
    ref = _write_case6_file(source, descending=True)
    out = tmp_path / "parts.nc"
    assert main(["decompose", str(source), "-o", str(out), "--kinematics"]) == 0
    with xr.open_dataset(out) as ds:
        for name in CONTRACT:
            standard_name, units, _ = VARIABLES[name]
            assert ds[name].attrs["units"] == units
            assert ds[name].attrs.get("standard_name") == standard_name
        assert ds["latitude"].attrs["standard_name"] == "latitude"
        assert ds["longitude"].attrs["standard_name"] == "longitude"
        assert ds["time"].attrs["standard_name"] == "time"
        assert ds.attrs["method"] == "spectral"
        assert ds.attrs["truncation_N"] == 31
        assert "zero" in ds.attrs["streamfunction_velocity_potential_constant"]
        assert float(ds["reconstruction_error"].max()) <= 1e-10
        psi = ds["streamfunction"].isel(time=0).values
        assert relative_max_error(psi, ref["psi"][::-1]) <= 1e-9  # file read south to north
        assert "total_wavenumber" in ds["kinetic_energy_spectrum_rotational"].dims


@pytest.mark.parametrize(("extra", "needle"), [
    (["--truncation", "99"], "give N from 1 to 31"),
    (["--levels", "850"], "no vertical dimension"),
    (["--method", "regional", "--truncation", "5"], "spectral method only"),
])
def test_cli_bad_options_exit_2_with_one_line(tmp_path, capsys, extra, needle):
    # Exit codes and message form of README.md ("Exit codes").
    source = tmp_path / "rh.nc"
    _write_case6_file(source, descending=False)
    code = main(["decompose", str(source), "-o", str(tmp_path / "x.nc"), *extra])
    err = capsys.readouterr().err
    assert code == 2
    assert err.startswith("flowpipe: error:") and needle in err
    assert "Traceback" not in err and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "x.nc").exists()


def test_auto_dispatches_limited_area_grids_to_the_regional_method(monkeypatch):
    # README.md ("Methods"): spherical harmonics on complete global
    # grids, the limited-area solver otherwise; the solver is told whether the grid wraps.
    import flowpipe.regional

    calls = []

    def recorder(wind, scheme, periodic, **options):
        calls.append((wind.sizes["longitude"], scheme, periodic, options))
        return xr.Dataset(attrs={"method": "regional"})

    monkeypatch.setattr(flowpipe.regional, "decompose_regional", recorder)
    wind, _ = _grid_wind("GL", 32, 64, "case6")
    gappy = wind.copy(deep=True)
    gappy["v"][3, 4] = np.nan
    # a gappy complete global grid stays spectral under auto (README.md, "Methods"; tests/test_masked.py)
    assert fp.decompose(gappy, method="regional", scheme="dirichlet").attrs["method"] == "regional"
    assert fp.decompose(wind.isel(longitude=slice(0, 30)), tolerance=1e-3).attrs["method"] == "regional"
    assert fp.decompose(wind, method="regional").attrs["method"] == "regional"
    assert fp.decompose(wind).attrs["method"] == "spectral"
    assert calls == [(64, "dirichlet", True, {}), (30, "variational", False, {"tolerance": 1e-3}),
                     (64, "variational", True, {})]
