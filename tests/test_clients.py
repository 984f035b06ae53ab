"""Every output kind read by general-purpose clients that nobody on the project wrote.

External checks, each named beside its assertions:
* cf-python / cfdm (the CF data model's reference implementation in Python):
  ``cf.read`` sees trajectories as trajectory features with their auxiliary
  coordinates; ``dataset_compliance()`` reports nothing for any output kind;
* pyproj (PROJ): ``CRS.from_cf`` builds a geographic CRS from the grid mapping;
* netCDF-C's ``nccopy`` (Debian ``netcdf-bin``): ``-k classic`` (netCDF-3) then
  ``-k nc4`` gives back the same data and attributes;
* compliance-checker's ACDD-1.3 suite: nothing highly recommended is missing.
"""

from __future__ import annotations

import subprocess
from pathlib import Path

import cf
import cfdm
import numpy as np
import pyproj
import pytest
import xarray as xr
from compliance_checker.runner import CheckSuite

from flowpipe import annotate
from flowpipe.choices import QUALITY_FIGURES
from flowpipe.cli import main
from flowpipe.constants import EARTH_RADIUS

ROOT = Path(__file__).resolve().parents[1]
GLOBAL = str(ROOT / "sample_data" / "demo_global.nc")
REGIONAL = str(ROOT / "sample_data" / "demo_regional.nc")


@pytest.fixture(scope="module")
def outputs(tmp_path_factory) -> dict[str, Path]:
    """One file of every output kind, from the sample data."""
    d = tmp_path_factory.mktemp("clients")
    made = {
        "spectral": ["decompose", GLOBAL, "--kinematics"],
        "variational": ["decompose", REGIONAL, "--scheme", "variational"],
        "dirichlet": ["decompose", REGIONAL, "--scheme", "dirichlet"],
        "quantized": ["decompose", GLOBAL, "--significant-digits", "3"],
        "circulation": ["circulation", REGIONAL, "--box", "46,56,-26,-4", "--circle",
                        "50,-20,300"],
        "tracks": ["advect", GLOBAL, "--start", "52,4,700", "--start", "40,-170,500",
                   "--hours", "24", "--backward", "--vertical", "omega", "--sample", "ta"],
        "tracks-regional": ["advect", REGIONAL, "--start", "55,-10,850", "--start", "50,5,850",
                            "--hours", "24"],
    }
    files = {}
    for kind, args in made.items():
        files[kind] = d / f"{kind}.nc"
        assert main([*args, "-o", str(files[kind])]) == 0
    return files


def _fields(path: Path) -> list:
    return list(cf.read(str(path)))


@pytest.mark.parametrize("kind", ["spectral", "variational", "dirichlet", "quantized", "tracks",
                                  "tracks-regional"])
def test_cfdm_finds_nothing_to_report(outputs, kind):
    # cfdm's dataset_compliance(): the non-conformances it met while reading (empty but
    # for the version it read as).
    for field in cfdm.read(str(outputs[kind])):
        report = field.dataset_compliance()
        assert set(report) <= {"CF version"}, report


def test_cfdm_reads_the_quantization(outputs):
    # cfdm (CF section 8.4): each quantized field has a Quantization naming the algorithm
    # and the digits kept, from the container variable and the per-variable attribute.
    fields = [f for f in cfdm.read(str(outputs["quantized"])) if f.get_quantization(None)]
    assert {f.identity() for f in fields} >= {"atmosphere_horizontal_streamfunction",
                                              "atmosphere_relative_vorticity"}
    for field in fields:
        q = field.get_quantization()
        assert q.get_parameter("algorithm") == "granular_bitround"
        assert int(q.get_parameter("quantization_nsd")) == 3
        assert "libnetcdf" in q.get_parameter("implementation")


@pytest.mark.parametrize("kind", ["tracks", "tracks-regional"])
def test_cf_python_reads_trajectory_features(outputs, kind):
    # cf-python: a CF-1.11 section 9 file gives fields with featureType trajectory whose
    # data have time, latitude, longitude (and the vertical position) as auxiliary coordinates.
    fields = _fields(outputs[kind])
    per_point = [f for f in fields if f.identity() == "wind_speed"]
    assert len(per_point) == 1
    speed = per_point[0]
    assert speed.featureType == "trajectory"
    names = {c.identity() for c in speed.auxiliary_coordinates().values()}
    assert {"time", "latitude", "longitude", "air_pressure"} <= names
    assert all(f.featureType == "trajectory" for f in fields)


def test_cf_python_compares_times_of_decomposition_and_trajectories(outputs):
    # cf-python refuses to compare times of different calendars; the calendar of the
    # input is kept in every output kind.
    grid = next(f for f in _fields(outputs["spectral"]) if f.identity() ==
                "atmosphere_horizontal_streamfunction")
    track = next(f for f in _fields(outputs["tracks"]) if f.identity() == "wind_speed")
    grid_time = grid.dimension_coordinate("time")
    track_time = track.auxiliary_coordinate("time")
    assert grid_time.calendar == track_time.calendar
    with xr.open_dataset(GLOBAL, decode_times=False) as source:
        assert grid_time.calendar == source["time"].attrs.get("calendar", "standard")
    assert bool(track_time.datetime_array.max() <= grid_time.datetime_array.max())


@pytest.mark.parametrize("kind", ["spectral", "variational", "dirichlet", "quantized"])
def test_pyproj_builds_a_geographic_crs_from_the_grid_mapping(outputs, kind):
    # pyproj.CRS.from_cf (PROJ), from the grid mapping each field names (CF 1.11 section 5.6).
    with xr.open_dataset(outputs[kind]) as ds:
        fields = [n for n in ds.data_vars if {"latitude", "longitude"} <= set(ds[n].dims)
                  and not n.endswith("_bounds")]
        assert fields
        assert {ds[n].attrs["grid_mapping"] for n in fields} == {"crs"}
        crs = pyproj.CRS.from_cf(ds["crs"].attrs)
        assert crs.is_geographic
        assert crs.ellipsoid.semi_major_metre == pytest.approx(EARTH_RADIUS)
        assert crs.ellipsoid.semi_minor_metre == pytest.approx(EARTH_RADIUS)
        for axis in ("latitude", "longitude"):
            bounds = ds[ds[axis].attrs["bounds"]].values
            # CF 1.11 section 7.1: each point lies within its cell, cells are contiguous
            assert np.all((bounds[:, 0] <= ds[axis].values) & (ds[axis].values <= bounds[:, 1]))
            np.testing.assert_array_equal(bounds[1:, 0], bounds[:-1, 1])
        assert ds["latitude"].attrs["axis"] == "Y" and ds["longitude"].attrs["axis"] == "X"


@pytest.mark.parametrize("kind", ["spectral", "variational", "dirichlet", "quantized", "tracks",
                                  "tracks-regional", "circulation"])
def test_nccopy_classic_round_trip(outputs, kind, tmp_path):
    # netCDF-C nccopy: into the classic (netCDF-3) format and back to netCDF-4.
    classic, back = tmp_path / "classic.nc", tmp_path / "back.nc"
    for kind_flag, source, target in (("classic", outputs[kind], classic), ("nc4", classic, back)):
        run = subprocess.run(["nccopy", "-k", kind_flag, str(source), str(target)],
                             capture_output=True, text=True)
        assert run.returncode == 0, run.stderr
    with xr.open_dataset(outputs[kind]) as original, xr.open_dataset(back) as copied:
        xr.testing.assert_identical(original, copied)


def test_trajectory_longitudes_are_minus_180_to_180(outputs):
    # The documented convention for trajectory files (README): [-180, 180) degrees east,
    # from global (0..360) and regional inputs alike; a start at -170 comes back as -170.
    for kind in ("tracks", "tracks-regional"):
        with xr.open_dataset(outputs[kind]) as ds:
            lon = ds["longitude"].values
            finite = lon[np.isfinite(lon)]
            assert finite.size and finite.min() >= -180.0 and finite.max() < 180.0
    with xr.open_dataset(outputs["tracks"]) as ds:
        assert ds["longitude"].values[1, 0] == pytest.approx(-170.0)


def test_times_missing_exactly_where_positions_are(outputs):
    # CF 1.11 section 9.3.2 (incomplete multidimensional array): the padding after a
    # trajectory ends is missing in every per-point coordinate at once.
    with xr.open_dataset(outputs["tracks-regional"]) as ds:
        names = list(ds["status"].attrs["flag_meanings"].split())
        status = [names[int(s)] for s in ds["status"].values]
        assert "left_domain" in status  # the sample's eastern start leaves the small domain
        lat_missing = np.isnan(ds["latitude"].values)
        assert lat_missing.any()
        np.testing.assert_array_equal(np.isnat(ds["time"].values), lat_missing)
        np.testing.assert_array_equal(np.isnan(ds["longitude"].values), lat_missing)
        np.testing.assert_array_equal(np.isnan(ds["wind_speed"].values), lat_missing)


def test_wind_speed_along_the_path_is_the_parcels_speed(outputs):
    # A parcel moves with the wind: the great-circle distance between recorded positions
    # (haversine formula, Sinnott 1984, Sky and Telescope 68, 159) over the hour between
    # them is the mean of the wind speed at its ends, to the curvature of the path.
    with xr.open_dataset(outputs["tracks-regional"]) as ds:
        lat, lon = np.radians(ds["latitude"].values[0]), np.radians(ds["longitude"].values[0])
        speed = ds["wind_speed"].values[0]
        seconds = np.diff(ds["time"].values[0]) / np.timedelta64(1, "s")
    half = (np.sin(np.diff(lat) / 2) ** 2
            + np.cos(lat[1:]) * np.cos(lat[:-1]) * np.sin(np.diff(lon) / 2) ** 2)
    moved = 2 * EARTH_RADIUS * np.arcsin(np.sqrt(half)) / seconds
    ok = np.isfinite(moved)
    assert ok.sum() > 5
    np.testing.assert_allclose(moved[ok], 0.5 * (speed[1:] + speed[:-1])[ok], rtol=0.03)


def test_trajectory_ids_unique_across_inputs_and_starts(outputs, tmp_path):
    # cf_role trajectory_id (CF 1.11 section 9.5): ids must tell trajectories apart when
    # files from different inputs are combined.
    with xr.open_dataset(outputs["tracks"]) as a, xr.open_dataset(outputs["tracks-regional"]) as b:
        assert a["trajectory_id"].attrs["cf_role"] == "trajectory_id"
        ids = [*a["trajectory_id"].values, *b["trajectory_id"].values]
    assert len(set(ids)) == len(ids) == 4
    again = tmp_path / "again.nc"
    assert main(["advect", REGIONAL, "--start", "55,-10,850", "--start", "55,-10,850",
                 "--hours", "24", "-o", str(again)]) == 0
    with xr.open_dataset(again) as c:
        same_start = list(c["trajectory_id"].values)
    assert len(set(same_start)) == 2  # the same start twice is still two trajectories


@pytest.mark.parametrize(("values", "expected"), [
    # hand-worked arcs (common practice: the smallest interval on the circle holding them)
    ([-10.0, 20.0, 5.0], (-10.0, 20.0)),
    ([170.0, 179.0, -175.0, -160.0], (170.0, -160.0)),  # crosses 180
    ([0.0, 90.0, 180.0, 270.0], (0.0, 270.0)),           # equal gaps: the values' own range
    ([-1.0, 1.0, 359.0], (-1.0, 1.0)),                   # 359 is -1: a 2-degree arc
    (list(np.arange(0.0, 360.0, 2.0)), (0.0, 358.0)),    # a global grid keeps its own range
])
def test_longitude_range_is_the_shortest_arc(values, expected):
    assert annotate.longitude_range(np.array(values)) == expected


def test_track_crossing_the_date_line_has_a_narrow_acdd_extent(tmp_path):
    # ACDD-1.3 geospatial_lon_min/max: a west end greater than the east end marks a
    # crossing of 180 degrees; a track near 180 must not claim the whole globe.
    out = tmp_path / "dateline.nc"
    # westerlies at 40 N: backward from 178 W the parcel crosses 180 into the east
    assert main(["advect", GLOBAL, "--start", "40,-178,500", "--hours", "24", "--backward",
                 "-o", str(out)]) == 0
    with xr.open_dataset(out) as ds:
        lon = ds["longitude"].values[0]
        west, east = ds.attrs["geospatial_lon_min"], ds.attrs["geospatial_lon_max"]
    assert lon.max() > 170.0 and lon.min() < -170.0  # it did cross
    assert west > east
    span = (east - west) % 360.0
    assert span < 40.0
    assert all(((x - west) % 360.0) <= span + 1e-9 for x in lon[np.isfinite(lon)])


def test_site_metadata_fills_acdd_and_config(outputs, tmp_path):
    # compliance-checker's ACDD-1.3 suite: with a site's attributes given on the command line,
    # nothing highly recommended or recommended is missing but what a site decides itself.
    site = {"institution": "Harbour Weather Office", "creator_name": "Night shift",
            "creator_email": "night@example.org", "creator_url": "https://example.org",
            "publisher_name": "Harbour Weather Office", "publisher_email": "desk@example.org",
            "publisher_url": "https://example.org", "license": "CC-BY-4.0",
            "project": "Estuary winds", "naming_authority": "org.example",
            "acknowledgement": "Invented for the tests", "processing_level": "derived",
            "geospatial_bounds_vertical_crs": "none (pressure levels)", "id_prefix": "hwo-"}
    out = tmp_path / "site.nc"
    args = [arg for key, value in site.items() for arg in ("--attribute", f"{key}={value}")]
    assert main(["decompose", GLOBAL, "-o", str(out), *args, "--attribute",
                 "Conventions=mine"]) == 0
    with xr.open_dataset(out) as ds:
        assert ds.attrs["institution"] == "Harbour Weather Office"
        assert ds.attrs["id"].startswith("hwo-")
        assert ds.attrs["Conventions"] == annotate.CONVENTIONS  # protected
    cs = CheckSuite()
    cs.load_all_available_checkers()
    ds = cs.load_dataset(str(out))
    groups = cs.run_all(ds, ["acdd:1.3"], skip_checks=[])
    missing = [r for r in groups["acdd:1.3"][0] if r.value is False or (
        isinstance(r.value, tuple) and r.value[0] < r.value[1])]
    assert not [r.msgs for r in missing if r.weight == 2]
    # what no table can fill: a standard name for variables the CF table has none for
    unnamed = {name for name, (standard, _, _) in annotate.VARIABLES.items() if standard is None}
    unnamed |= set(QUALITY_FIGURES)  # the per-slab quality figures (reconstruction_error, ...)
    for result in (r for r in missing if r.weight == 3):
        name = result.name.split('"')[1]
        assert name in unnamed and result.msgs == ["standard_name"], (result.name, result.msgs)


def test_metadata_table_in_a_batch_config(tmp_path):
    # The [metadata] table (configs/README.md): stamped on every output; a key that is not
    # an attribute name is an error naming its line.
    config = tmp_path / "site.toml"
    config.write_text(f"""[input]
paths = ["{GLOBAL}"]
[decompose]
[metadata]
institution = "Harbour Weather Office"
license = "CC-BY-4.0"
[output]
directory = "out"
""")
    assert main(["run", str(config), "--quiet"]) == 0
    written = next((tmp_path / "out").glob("*_decomposition.nc"))
    with xr.open_dataset(written) as ds:
        assert ds.attrs["institution"] == "Harbour Weather Office"
        assert ds.attrs["license"] == "CC-BY-4.0"
    config.write_text(config.read_text().replace('license = ', 'bad-key = '))
    run = subprocess.run([str(ROOT / ".venv" / "bin" / "flowpipe"), "run", str(config)],
                         capture_output=True, text=True)
    assert run.returncode == 2
    assert run.stderr.count("\n") == 1 and "line 6" in run.stderr and "bad-key" in run.stderr
