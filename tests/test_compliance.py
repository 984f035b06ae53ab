"""Every kind of NetCDF flowpipe writes is CF-1.11 clean and ACDD-1.3 annotated.

External checks:
* compliance-checker (IOOS), suite ``cf:1.11``, which implements the NetCDF
  Climate and Forecast (CF) Metadata Conventions 1.11 (Eaton et al., 2023)
  with the CF standard-name table it ships (version 93): zero errors (its
  high-priority failures, printed under "Errors");
* compliance-checker suite ``acdd:1.3`` and the attribute list of the
  Attribute Convention for Data Discovery 1.3 (Earth Science Information
  Partners, https://wiki.esipfed.org/Attribute_Convention_for_Data_Discovery_1-3):
  every "highly recommended" attribute present;
* UDUNITS-2 (through cf-units): units of each standard name convertible to
  the canonical units of the CF standard-name table.
"""

from __future__ import annotations

import json
import re
import xml.etree.ElementTree as ET
from pathlib import Path

import cf_units
import compliance_checker
import numpy as np
import pytest
import xarray as xr
from compliance_checker.runner import CheckSuite, ComplianceChecker

import flowpipe as fp
from flowpipe import annotate, contours
from flowpipe.choices import WIND_PRODUCTS

ROOT = Path(__file__).resolve().parents[1]
GLOBAL = ROOT / "sample_data" / "demo_global.nc"
REGIONAL = ROOT / "sample_data" / "demo_regional.nc"
#: Earth radius for the synthetic fields only (any plausible value will do).
RADIUS = 6.371e6


def _ddx(field: np.ndarray, coordinate: np.ndarray, axis: int) -> np.ndarray:
    return np.gradient(field, coordinate, axis=axis)


def decomposition_like(wind: xr.Dataset, harmonic: bool = False) -> xr.Dataset:
    """A Dataset with the contract's variables on the grid of a canonical wind.

    Smooth synthetic streamfunction and velocity potential; their winds from
    centred differences (u_psi = -dpsi/(a dphi), v_psi = dpsi/(a cos phi dlambda),
    u_chi = dchi/(a cos phi dlambda), v_chi = dchi/(a dphi)); vorticity and
    divergence from the same formulas applied to the synthetic winds, missing
    poleward of 85 degrees.
    """
    phi = np.radians(wind["latitude"].values)[:, None]
    lam = np.radians(wind["longitude"].values)[None, :]
    shape = wind["u"].shape
    lead = np.arange(int(np.prod(shape[:-2]))).reshape(shape[:-2] + (1, 1))
    coslat = np.maximum(np.cos(phi), 1e-6)
    psi = RADIUS * (-15.0 * np.sin(phi) + 8.0 * np.cos(phi) ** 2 * np.sin(phi)
                    * np.sin(2 * lam + 0.2 * lead))
    chi = RADIUS * 1.5 * np.cos(phi) ** 3 * np.sin(lam - 0.1 * lead) * (1 + 0.2 * np.sin(phi))
    fields = {
        "streamfunction": psi,
        "velocity_potential": chi,
        "u_rotational": -_ddx(psi, phi[:, 0], -2) / RADIUS,
        "v_rotational": _ddx(psi, lam[0], -1) / (RADIUS * coslat),
        "u_divergent": _ddx(chi, lam[0], -1) / (RADIUS * coslat),
        "v_divergent": _ddx(chi, phi[:, 0], -2) / RADIUS,
    }
    fields["vorticity"] = (_ddx(fields["v_rotational"], lam[0], -1)
                           - _ddx(fields["u_rotational"] * coslat, phi[:, 0], -2)) / (
        RADIUS * coslat)
    fields["divergence"] = (_ddx(fields["u_divergent"], lam[0], -1)
                            + _ddx(fields["v_divergent"] * coslat, phi[:, 0], -2)) / (
        RADIUS * coslat)
    polar = np.abs(np.degrees(phi)) > 85.0  # differences by cos(phi) are poor there:
    for name in ("vorticity", "divergence"):  # leave them missing (CF _FillValue)
        fields[name] = np.where(polar, np.nan, fields[name])
    if harmonic:
        fields["u_harmonic"] = np.full(shape, 1.5)
        fields["v_harmonic"] = np.full(shape, -0.5)
    ds = xr.Dataset(
        {name: (wind["u"].dims, np.broadcast_to(value, shape).astype(np.float64),
                annotate.variable_attrs(name)) for name, value in fields.items()},
        coords={name: wind[name] for name in wind["u"].dims},
    )
    ds.attrs.update(annotate.global_attrs(
        wind, title="synthetic decomposition", summary="Synthetic fields for tests.",
        references="none: synthetic"))
    ds.attrs["input_files"] = wind.attrs["input_files"]
    return ds


def trajectory_like(ntraj: int = 5, nobs: int = 31, vertical: bool = True,
                    backward: bool = False) -> xr.Dataset:
    """A CF trajectory Dataset (incomplete multidimensional array, CF 1.11 H.4.2)."""
    sign = -1 if backward else 1
    hours = sign * np.arange(nobs, dtype=np.float64)
    start = np.datetime64("2026-01-12T00:00", "ns")
    time = start + (hours * 3600e9).astype("m8[ns]")
    k = np.arange(ntraj, dtype=np.float64)[:, None]
    lat = 50.0 + 2.0 * k + 0.25 * np.abs(hours)[None, :] * np.cos(0.1 * hours + k)
    lon = -25.0 + 3.0 * k + 0.8 * np.abs(hours)[None, :]
    pressure = 850.0 - 10.0 * np.abs(hours)[None, :] * (1 + 0.2 * k)
    ta = 270.0 - 0.1 * np.abs(hours)[None, :] - k
    variables = {
        "time": (("trajectory", "obs"), np.broadcast_to(time, (ntraj, nobs)).copy(),
                 {"standard_name": "time"}),
        "latitude": (("trajectory", "obs"), lat,
                     {"standard_name": "latitude", "units": "degrees_north"}),
        "longitude": (("trajectory", "obs"), lon,
                      {"standard_name": "longitude", "units": "degrees_east"}),
        "trajectory": ("trajectory", np.arange(ntraj, dtype=np.int32),
                       {"cf_role": "trajectory_id", "long_name": "trajectory number"}),
        "status": ("trajectory", np.array([0, 1, 2, 0, 0][:ntraj] + [0] * (ntraj - 5),
                                          dtype=np.int8),
                   {"flag_values": [0, 1, 2],
                    "flag_meanings": "completed left_the_domain hit_the_ground",
                    "long_name": "how the trajectory ended"}),
        "ta": (("trajectory", "obs"), ta, {"standard_name": "air_temperature", "units": "K"}),
    }
    if vertical:
        variables["pressure"] = (("trajectory", "obs"), pressure,
                                 {"standard_name": "air_pressure", "units": "hPa",
                                  "positive": "down"})
    ds = xr.Dataset(variables, attrs={"featureType": "trajectory"})
    cut = nobs * 2 // 3  # the second track ends early: padded with missing values
    for name in ("latitude", "longitude", "ta", *(("pressure",) if vertical else ())):
        ds[name][1, cut:] = np.nan
    ds["time"][1, cut:] = np.datetime64("NaT", "ns")
    return ds


def check(path: Path, suites: tuple[str, ...] = ("cf:1.11", "acdd:1.3")) -> dict:
    """Run compliance-checker in-process; its JSON report, by suite."""
    CheckSuite.load_all_available_checkers()
    report = path.with_suffix(".json")
    ComplianceChecker.run_checker(str(path), list(suites), 0, "normal",
                                  output_filename=str(report), output_format="json")
    return json.loads(report.read_text())


def _failures(result: dict, priority: str) -> list[str]:
    return [f"{item['name']}: {msg}" for item in result[f"{priority}_priorities"]
            for msg in item["msgs"]]


def below_ground(wind):
    """The wind missing in a block of points (a plateau below the ground, invented)."""
    u = wind["u"].where(~((wind.latitude > 25) & (wind.latitude < 40)
                          & (wind.longitude > 80) & (wind.longitude < 100)))
    return wind.assign(u=u, v=wind["v"].where(u.notnull()))


def lowest_below_ground(wind):
    """The plateau of :func:`below_ground` at the lowest level only."""
    return below_ground(wind).where(wind.level == wind.level.max(), wind)


@pytest.fixture(scope="module")
def outputs(tmp_path_factory) -> dict[str, Path]:
    """One small file of each kind flowpipe writes: synthetic, then from the real stages."""
    directory = tmp_path_factory.mktemp("outputs")
    wind = fp.open_wind(GLOBAL).isel(time=slice(0, 2))
    regional = fp.open_wind(REGIONAL).isel(time=slice(0, 1))
    parts = decomposition_like(wind)
    kinds = {
        "global-decomposition": (parts, False),
        "regional-decomposition": (decomposition_like(regional, harmonic=True), False),
        "kinematics-float32": (parts[["vorticity", "divergence"]], True),
        "trajectories-3d": (trajectory_like(), False),
        "trajectories-2d": (trajectory_like(vertical=False, backward=True), False),
        "decompose-spectral": (fp.decompose(wind.isel(time=slice(0, 1))), False),
        "decompose-regional": (fp.decompose(regional), True),
        "decompose-masked": (fp.decompose(below_ground(wind.isel(time=slice(0, 1)))), False),
        "kinematics": (fp.kinematics(wind.isel(time=slice(0, 1))), False),
        "advect": (fp.advect(fp.open_wind(GLOBAL), [(52.0, 4.0, 850.0), (-40.0, 300.0, 500.0)],
                             hours=6, backward=True), False),
        "ftle": (fp.ftle(fp.open_wind(GLOBAL), hours=6, spacing=4.0), False),
        "decompose-quantized-zstd": (fp.decompose(wind.isel(time=slice(0, 1))), "quantized"),
        "decompose-wind-products": (fp.select_fields(fp.decompose(wind.isel(time=slice(0, 1))),
                                                     wind, list(WIND_PRODUCTS)), False),
        "circulation": (fp.circulation(fp.open_wind(REGIONAL).isel(time=slice(0, 2)), [
            contours.box(46, 56, -26, -4), contours.circle(50, -20, 300),
            contours.read_track(ROOT / "sample_data" / "demo_storm_track.csv", 500)],
            obrien=True), False),
        # a box whose column misses its lowest level (omega from 500 hPa up, omega_base)
        "circulation-masked": (fp.circulation(lowest_below_ground(wind.isel(time=slice(0, 1))), [
            contours.box(30, 50, 70, 110), contours.box(-20, 10, 0, 40)], obrien=True), False),
        # boxes across the date line, circles near and round either pole, boxes and a
        # polygon round a pole: simple anticlockwise polygons in the planar coordinates the
        # checker's section 7.5 orientation test uses (shapely's is_ccw on lon, lat)
        "circulation-global": (fp.circulation(wind.isel(time=slice(0, 1)), [
            contours.box(10, 30, 350, 20), contours.box(30, 60, 170, -170),
            contours.circle(88, 0, 500), contours.circle(76, 0, 1500),
            contours.circle(76, 0, 2000), contours.circle(-76, 30, 2000),
            contours.circle(90, 0, 1556), contours.circle(-90, 0, 1556),
            contours.box(70, 90, 0, 360), contours.box(-90, -70, 0, 360),
            contours.polygon([-70, -65, -72], [0, 120, 240], name="south polygon"),
            contours.follow(["2026-01-12T00:00", "2026-01-13T00:00"], [80, 82], [0, 40], 1500,
                            name="polar track")]), False),
    }
    options = {False: {"precision": "double"}, True: {"precision": "single"},
               "quantized": {"significant_digits": 3, "compression": "zstd"}}
    return {kind: fp.write(ds, directory / f"{kind}.nc", **options[how])
            for kind, (ds, how) in kinds.items()}


@pytest.fixture(scope="module")
def reports(outputs) -> dict[str, dict]:
    return {kind: check(path) for kind, path in outputs.items()}


KINDS = ("global-decomposition", "regional-decomposition", "kinematics-float32",
         "trajectories-3d", "trajectories-2d", "decompose-spectral", "decompose-regional",
         "decompose-masked", "kinematics", "advect", "ftle", "decompose-quantized-zstd",
         "decompose-wind-products", "circulation", "circulation-masked", "circulation-global")


@pytest.mark.parametrize("kind", KINDS)
def test_cf_1_11_no_errors(reports, kind):
    # compliance-checker cf:1.11: high-priority failures are the report's "Errors".
    result = reports[kind]["cf:1.11"]
    assert _failures(result, "high") == []
    assert result["high_count"] == 0


#: compliance-checker's section 7.5 check wants the node dimension among the dimensions of
#: every variable with a geometry; CF 1.11 section 7.5 puts the instance dimension there
#: (the node coordinates alone have the node dimension), and the checker says the same of
#: its own reference polygon file (test below).
NODE_DIMENSION = re.compile(r"§7.5 Geometries: Parent variable '\w+' does not include "
                            r"geometry dimension '\w+' used in geometry variable '\w+'")


@pytest.mark.parametrize("kind", KINDS)
def test_cf_1_11_recommendations(reports, kind):
    # compliance-checker cf:1.11 warnings (CF recommendations). Allowed: CF 1.11 section
    # 2.4 recommends dimensions other than T, Z, Y, X left of them; spectra keep (time,
    # level, total_wavenumber), the order readers index them by. And NODE_DIMENSION.
    # A quantized file declares CF-1.12 (its quantization container is a CF 1.12 feature,
    # and compliance-checker has no 1.12 suite): the 1.11 suite notes the declaration.
    warnings = [msg for msg in _failures(reports[kind]["cf:1.11"], "medium")
                if not (msg.startswith("§2.4") and "total_wavenumber (U)" in msg)
                and not NODE_DIMENSION.fullmatch(msg)
                and not ("quantized" in kind and msg.startswith("§2.6")
                         and 'does not contain "CF-1.11"' in msg)]
    assert warnings == []


def test_node_dimension_message_is_given_on_the_checkers_own_polygon_file(tmp_path):
    # compliance-checker ships tests/data/polygon_geometry.cdl, a polygon time series laid
    # out as in CF 1.11 section 7.5 (data variable someData(instance, time), node
    # coordinates x(node), y(node)); written with netCDF-C's ncgen, the checker reports
    # NODE_DIMENSION on it too. Should a checker release stop doing so, this fails and the
    # allowance above goes.
    import subprocess

    cdl = Path(compliance_checker.__file__).parent / "tests" / "data" / "polygon_geometry.cdl"
    path = tmp_path / "polygon_geometry.nc"
    subprocess.run(["ncgen", "-4", "-o", str(path), str(cdl)], check=True)
    messages = _failures(check(path, ("cf:1.11",))["cf:1.11"], "medium")
    assert any(NODE_DIMENSION.fullmatch(m) for m in messages), messages


#: How compliance-checker's acdd:1.3 reports a variable without a standard_name.
NO_STANDARD_NAME = re.compile(r'variable "(\w+)" missing the following attributes:: standard_name')


@pytest.mark.parametrize("kind", KINDS)
def test_acdd_1_3_highly_recommended_present(reports, outputs, kind):
    # compliance-checker acdd:1.3 "Highly Recommended" = ACDD-1.3 highly recommended set.
    # ACDD asks for a standard_name on every variable, but the CF table (v93) has none
    # for some (the parts of the wind, marked "-" in the contract; error figures): those
    # must say what they are with long_name and units instead, and no contract variable
    # that has a CF name may be among them.
    failures = _failures(reports[kind]["acdd:1.3"], "high")
    unnamed = [m.group(1) for m in map(NO_STANDARD_NAME.fullmatch, failures) if m]
    assert len(unnamed) == len(failures), failures
    with xr.open_dataset(outputs[kind]) as ds:
        for name in unnamed:
            assert annotate.VARIABLES.get(name, (None,))[0] is None, name
            assert ds[name].attrs["long_name"] and ds[name].attrs["units"], name


@pytest.mark.parametrize("kind", KINDS)
def test_acdd_discovery_attributes(outputs, kind):
    # ACDD 1.3 (ESIP): title, summary, keywords (highly recommended); history,
    # date_created (ISO 8601), source, references, comment (recommended/suggested);
    # Conventions lists both conventions (ACDD 1.3, "Conventions").
    with xr.open_dataset(outputs[kind]) as ds:
        attrs = ds.attrs
    for key in ("title", "summary", "keywords", "history", "date_created", "source",
                "references", "comment", "geospatial_lat_min", "geospatial_lon_max",
                "time_coverage_start", "time_coverage_end"):
        assert str(attrs.get(key, "")).strip(), key
    # quantization containers came with CF 1.12 (section 8.4; cfdm reads them only there)
    version = "CF-1.12" if "quantized" in kind else "CF-1.11"
    assert version in attrs["Conventions"] and "ACDD-1.3" in attrs["Conventions"]
    assert annotate.CAUTION in attrs["comment"]
    assert attrs["source"] == f"flowpipe {fp.__version__}"
    np.datetime64(attrs["date_created"].rstrip("Z"))  # ISO 8601, or this raises


def _standard_name_table() -> dict[str, str]:
    table = Path(compliance_checker.__file__).parent / "data" / "cf-standard-name-table.xml"
    root = ET.parse(table).getroot()
    units = {entry.get("id"): entry.findtext("canonical_units") or ""
             for entry in root.iter("entry")}
    # an alias is a valid name too (CF standard-name table, "alias" elements)
    units.update({alias.get("id"): units[alias.findtext("entry_id")]
                  for alias in root.iter("alias") if alias.findtext("entry_id") in units})
    return units


def test_contract_standard_names_and_units(outputs):
    # CF standard-name table v93 (shipped with compliance-checker): each name of the
    # contract (and of the kinematics) exists and its units convert to the table's
    # canonical units (UDUNITS-2).
    table = _standard_name_table()
    with xr.open_dataset(outputs["regional-decomposition"]) as parts, \
            xr.open_dataset(outputs["kinematics"]) as kin, \
            xr.open_dataset(outputs["decompose-masked"]) as masked, \
            xr.open_dataset(outputs["decompose-wind-products"]) as products:
        for name, (standard_name, units, _) in annotate.VARIABLES.items():
            ds = next(d for d in (parts, masked, kin, products) if name in d)
            assert ds[name].attrs["units"] == units
            if standard_name is None:
                assert "standard_name" not in ds[name].attrs
                continue
            assert ds[name].attrs["standard_name"] == standard_name
            assert standard_name in table, standard_name
            assert cf_units.Unit(units).is_convertible(cf_units.Unit(table[standard_name]))
