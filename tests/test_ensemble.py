"""Ensembles: a ``realization`` dimension through decompose, advect, inspect and maps.

External checks:
* each member's results equal those of the same member written to a file of its own,
  without any member dimension, and run on its own (the single-member path);
* the CF standard-name table (v93, shipped with compliance-checker): ``realization``
  labels "members of a model ensemble", canonical units ``1``;
* compliance-checker (IOOS), suite ``cf:1.11``, on an ensemble decomposition and an
  ensemble trajectory file;
* solid-body rotation (Williamson et al. 1992, J. Comput. Phys. 102, 211-224, test
  case 2 with alpha = 0): a parcel keeps its latitude and its longitude advances by
  ``u0 t / a`` radians, ``u0`` of its own member.

The data are invented: three members whose solid-body speed and wave differ.
"""

from __future__ import annotations

import json
import xml.etree.ElementTree as ET
from pathlib import Path

import compliance_checker
import numpy as np
import pytest
import xarray as xr

import flowpipe as fp
from flowpipe.cli import main
from flowpipe.constants import EARTH_RADIUS
from flowpipe.errors import InputError

LAT = np.linspace(-90.0, 90.0, 37)
LON = np.arange(0.0, 360.0, 5.0)
TIMES = np.datetime64("2026-12-01T00", "ns") + np.arange(3) * np.timedelta64(6, "h")
MEMBERS = np.array([0, 4, 7])  # member numbers need not be 0..n-1
U0 = {0: 15.0, 4: 25.0, 7: 35.0}  # m s-1
STARTS = [(45.0, 10.0), (-30.0, 200.0)]


def member_wind(member: int, wave: bool = True) -> tuple[np.ndarray, np.ndarray]:
    """u, v on (time, lat, lon) of one member: solid-body rotation (plus a wave)."""
    phi, lam = np.radians(LAT)[None, :, None], np.radians(LON)[None, None, :]
    t = np.arange(TIMES.size)[:, None, None]
    u = U0[member] * np.cos(phi) + 0 * lam + 0 * t
    v = np.zeros_like(u)
    if wave:
        u = u + 3.0 * np.sin(2 * lam + 0.1 * t + member) * np.cos(phi) ** 2
        v = v + 2.0 * np.cos(2 * lam + 0.1 * t + member) * np.sin(phi) * np.cos(phi)
    return u, v


def _dataset(u: np.ndarray, v: np.ndarray, dims: tuple[str, ...], extra: dict) -> xr.Dataset:
    attrs = {"units": "m s-1"}
    return xr.Dataset(
        {"u": (dims, u, dict(attrs, standard_name="eastward_wind")),
         "v": (dims, v, dict(attrs, standard_name="northward_wind"))},
        coords={"time": ("time", TIMES, {"standard_name": "time"}),
                "lat": ("lat", LAT, {"units": "degrees_north"}),
                "lon": ("lon", LON, {"units": "degrees_east"}), **extra})


@pytest.fixture(scope="module")
def files(tmp_path_factory) -> dict:
    """The ensemble in one file (dimension ``ens`` labelled by its standard name), and
    each member in a file of its own (no member dimension); with and without the wave."""
    directory = tmp_path_factory.mktemp("ensemble")
    found = {}
    for wave in (True, False):
        winds = [member_wind(int(m), wave) for m in MEMBERS]
        u = np.stack([w[0] for w in winds])
        v = np.stack([w[1] for w in winds])
        key = "wave" if wave else "solid"
        found[key] = directory / f"ensemble_{key}.nc"
        _dataset(u, v, ("ens", "time", "lat", "lon"), {
            "ens": ("ens", MEMBERS, {"standard_name": "realization"})}).to_netcdf(found[key])
        for k, m in enumerate(MEMBERS):
            path = directory / f"member_{key}_{m}.nc"
            _dataset(u[k], v[k], ("time", "lat", "lon"), {}).to_netcdf(path)
            found[(key, int(m))] = path
    return found


def test_the_member_dimension_is_canonical_and_cf(files):
    wind = fp.open_wind(files["wave"])
    assert wind["u"].dims == ("realization", "time", "latitude", "longitude")
    np.testing.assert_array_equal(wind["realization"].values, MEMBERS)
    assert wind["realization"].attrs["standard_name"] == "realization"
    # the CF standard-name table: realization, canonical units "1"
    table = Path(compliance_checker.__file__).parent / "data" / "cf-standard-name-table.xml"
    entry = ET.parse(table).getroot().find("entry[@id='realization']")
    assert entry is not None and entry.findtext("canonical_units") == "1"
    assert wind["realization"].attrs["units"] == "1"
    assert wind["u"].data.chunksize[:2] == (1, 1)  # one slab per chunk


@pytest.mark.parametrize("method", ["spectral", "regional"])
def test_each_member_decomposes_as_the_single_member_run(files, method, tmp_path):
    area = {"latitude": slice(10, 30), "longitude": slice(4, 30)} if method == "regional" \
        else {}
    ensemble = fp.decompose(fp.open_wind(files["wave"]).isel(area), method=method)
    path = fp.write(ensemble, tmp_path / "ensemble.nc")
    with xr.open_dataset(path) as back:
        assert back["realization"].attrs["standard_name"] == "realization"
        assert back["vorticity"].dims == ("realization", "time", "latitude", "longitude")
        for member in MEMBERS:
            alone = fp.decompose(fp.open_wind(files[("wave", int(member))]).isel(area),
                                 method=method).compute()
            for name in ("streamfunction", "velocity_potential", "vorticity", "divergence",
                         "u_rotational", "v_divergent"):
                got = back[name].sel(realization=member).values
                want = alone[name].values
                scale = np.abs(want).max()
                assert np.abs(got - want).max() <= 1e-9 * scale, (member, name)


def test_trajectories_in_every_member_follow_the_single_member_runs(files, tmp_path):
    wind = fp.open_wind(files["wave"])
    tracks = fp.advect(wind, STARTS, hours=12)
    n = len(STARTS)
    assert tracks.sizes["trajectory"] == n * MEMBERS.size
    np.testing.assert_array_equal(tracks["realization"].values, np.repeat(MEMBERS, n))
    assert len(set(tracks["trajectory_id"].values)) == n * MEMBERS.size
    steps = []
    for k, member in enumerate(MEMBERS):
        alone = fp.advect(fp.open_wind(files[("wave", int(member))]), STARTS, hours=12,
                          step_minutes=tracks.attrs["time_step_seconds"] / 60.0)
        for name in ("latitude", "longitude", "wind_speed"):
            np.testing.assert_array_equal(tracks[name].values[k * n:(k + 1) * n],
                                          alone[name].values)
        steps.append(fp.advect(fp.open_wind(files[("wave", int(member))]), STARTS,
                               hours=12).attrs["time_step_seconds"])
    # one step for all: the shortest the Courant rule gives any member
    assert tracks.attrs["time_step_seconds"] == min(steps)
    assert f"in each of {MEMBERS.size} ensemble members" in tracks.attrs["summary"]


def test_circulation_per_member_equals_the_single_member_run(files):
    from flowpipe.contours import box

    contour = [box(10.0, 40.0, 0.0, 40.0)]
    ensemble = fp.circulation(fp.open_wind(files["wave"]), contour).compute()
    assert ensemble["circulation"].dims == ("realization", "contour", "time")
    for member in MEMBERS:
        alone = fp.circulation(fp.open_wind(files[("wave", int(member))]), contour).compute()
        np.testing.assert_allclose(ensemble["circulation"].sel(realization=member).values,
                                   alone["circulation"].values, rtol=1e-12)


def test_ftle_per_member_equals_the_single_member_run(files, tmp_path):
    # Each member's exponents are those of the member alone (the single-member path), with
    # the member axis first; the file passes compliance-checker cf:1.11 like the others.
    from test_compliance import check

    ensemble = fp.ftle(fp.open_wind(files["wave"]), hours=6, spacing=4.0)
    assert ensemble["ftle"].dims[0] == "realization"
    np.testing.assert_array_equal(ensemble["realization"].values, MEMBERS)
    for member in MEMBERS:
        alone = fp.ftle(fp.open_wind(files[("wave", int(member))]), hours=6, spacing=4.0)
        got = ensemble["ftle"].sel(realization=member).values
        assert np.array_equal(np.isnan(got), np.isnan(alone["ftle"].values))
        np.testing.assert_allclose(got, alone["ftle"].values, rtol=1e-12, atol=0.0)
    report = check(fp.write(ensemble, tmp_path / "ftle.nc"), ("cf:1.11",))["cf:1.11"]
    assert report["high_count"] == 0 and report["medium_count"] == 0


def test_batch_maps_one_per_member_with_the_member_in_the_name(files, tmp_path):
    # configs/README.md, [maps] output: {member} makes one map per member, of its fields and
    # of its tracks, each the picture `flowpipe map --member M` draws (read back by
    # matplotlib's image reader, PNG specification); members differ, so the maps do too.
    import matplotlib.image

    from flowpipe.maps import render, save
    from flowpipe.pipeline import run

    config = tmp_path / "night.toml"
    config.write_text(f'[input]\npaths = ["{files["wave"]}"]\n\n[decompose]\n\n'
                      '[advect]\nstarts = [[45.0, 10.0]]\nhours = 6\n\n'
                      '[maps]\nfields = ["vorticity"]\noutput = "{stem}_{field}_m{member}.png"\n'
                      '\n[output]\ndirectory = "out"\n')
    summary = run(config, quiet=True)
    assert summary.exit_code == 0, summary.failures
    out = tmp_path / "out"
    for field, source in (("vorticity", "ensemble_wave_decomposition.nc"),
                          ("trajectories", "ensemble_wave_trajectories.nc")):
        pictures = [out / f"ensemble_wave_{field}_m{m}.png" for m in MEMBERS]
        assert all(p in summary.written for p in pictures), field
        images = [matplotlib.image.imread(p) for p in pictures]
        assert not np.array_equal(images[0], images[-1]), field
        expect = save(render(out / source, field=None if field == "trajectories" else field,
                             member=int(MEMBERS[-1])), tmp_path / "expect.png")
        np.testing.assert_array_equal(images[-1], matplotlib.image.imread(expect))


def test_solid_body_rotation_per_member(files):
    # Williamson et al. (1992), case 2 (alpha = 0): latitude kept, longitude + u0 t / a
    hours = 12.0
    tracks = fp.advect(fp.open_wind(files["solid"]), STARTS, hours=hours)
    for row in range(tracks.sizes["trajectory"]):
        member = int(tracks["realization"].values[row])
        lat0, lon0 = STARTS[row % len(STARTS)]
        lon_end = lon0 + np.degrees(U0[member] * hours * 3600.0 / EARTH_RADIUS)
        end = tracks.isel(trajectory=row, obs=-1)
        assert abs(float(end["latitude"]) - lat0) < 0.02
        assert abs((float(end["longitude"]) - lon_end + 180.0) % 360.0 - 180.0) < 0.02


def test_ensemble_outputs_are_cf_compliant(files, tmp_path):
    from test_compliance import check  # compliance-checker, run as for the other outputs

    wind = fp.open_wind(files["wave"], members=[4, 7])
    for name, result in (("parts.nc", fp.decompose(wind)),
                         ("tracks.nc", fp.advect(wind, STARTS, hours=6))):
        path = fp.write(result, tmp_path / name)
        report = check(path, ("cf:1.11",))["cf:1.11"]
        assert report["high_count"] == 0 and report["medium_count"] == 0, name
        with xr.open_dataset(path) as back:
            assert back["realization"].attrs["standard_name"] == "realization"
            assert sorted(set(back["realization"].values.tolist())) == [4, 7]


def test_one_file_per_member_makes_the_same_ensemble(files, tmp_path):
    # each file says its member as a scalar coordinate (CF 1.11 section 5.7), shuffled order
    one_file = fp.open_wind(files["wave"])
    paths = []
    for k in (2, 0, 1):
        member = one_file.isel(realization=k)
        path = tmp_path / f"member_{int(member['realization'])}.nc"
        _dataset(member["u"].values, member["v"].values, ("time", "lat", "lon"), {
            "number": ((), MEMBERS[k], {"standard_name": "realization"})}).to_netcdf(path)
        paths.append(path)
    combined = fp.open_wind(paths)
    np.testing.assert_array_equal(combined["realization"].values, MEMBERS)
    np.testing.assert_array_equal(combined["u"].values, one_file["u"].values)
    pair = tmp_path / "pair.nc"
    _dataset(one_file["u"].values[:2], one_file["v"].values[:2], ("ens", "time", "lat", "lon"),
             {"ens": ("ens", MEMBERS[:2], {"standard_name": "realization"})}).to_netcdf(pair)
    with pytest.raises(InputError, match=f"member {MEMBERS[0]} .realization. is given by more "
                       "than one group of files"):
        fp.open_wind([pair, paths[1]])
    late = tmp_path / "late.nc"
    xr.load_dataset(paths[0]).assign_coords(
        time=TIMES + np.timedelta64(1, "h"),
        number=((), 1, {"standard_name": "realization"})).to_netcdf(late)
    with pytest.raises(InputError, match="its times differ from those of"):
        fp.open_wind(paths + [late])


def test_member_selection_and_its_errors(files):
    wind = fp.open_wind(files["wave"], members=[7])
    assert wind["realization"].values.tolist() == [7]  # the dimension stays
    # trajectories of other members never share an identifier (cf_role trajectory_id)
    ids = [fp.advect(fp.open_wind(files["wave"], members=[m]), STARTS[:1], hours=6)[
        "trajectory_id"].values[0] for m in (4, 7)]
    assert ids[0] != ids[1]
    with pytest.raises(InputError, match="member.s. 5 not in the input; members present "
                       r"\(realization\): 0, 4, 7"):
        fp.open_wind(files["wave"], members=[5])
    with pytest.raises(InputError, match="has no ensemble members"):
        fp.open_wind(files[("wave", 0)], members=[0])


def test_inspect_shows_the_members(files, capsys):
    assert main(["inspect", "--json", str(files["wave"])]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["members"] == 3 and report["realizations"] == [0, 4, 7]
    assert main(["inspect", str(files["wave"])]) == 0
    assert "ensemble   3 members (realization 0..7)" in capsys.readouterr().out
    assert main(["inspect", "--json", str(files[("wave", 0)])]) == 0
    assert json.loads(capsys.readouterr().out)["members"] is None


def test_maps_draw_one_member_or_all_tracks(files, tmp_path):
    from flowpipe.maps import render

    wind = fp.open_wind(files["wave"])
    parts = fp.write(fp.decompose(wind), tmp_path / "parts.nc")
    tracks = fp.write(fp.advect(wind, STARTS, hours=6), tmp_path / "tracks.nc")
    figure = render(parts, field="vorticity", member=4)
    title = figure.axes[0].get_title(loc="left")
    assert "member 4" in title
    # the drawn field is member 4's: the colour scale spans its values (matplotlib figure)
    with xr.open_dataset(parts) as back:
        values = back["vorticity"].sel(realization=4).isel(time=0).values
    contours = next(c for c in figure.axes[0].get_children()
                    if hasattr(c, "levels") and hasattr(c, "get_array"))
    assert contours.levels[0] <= values.min() and contours.levels[-1] >= values.max()
    everyone = render(tracks).axes[0].get_title(loc="left")
    assert everyone.startswith(f"{len(STARTS) * MEMBERS.size} trajectories") and \
        "3 members" in everyone
    one = render(tracks, member=7).axes[0].get_title(loc="left")
    assert one.startswith(f"{len(STARTS)} trajectories") and "member 7" in one
    with pytest.raises(InputError, match="member 5 is not in the file"):
        render(tracks, member=5)
    assert main(["map", str(tracks), "-o", str(tmp_path / "m.png"), "--member", "4"]) == 0
    assert (tmp_path / "m.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature
