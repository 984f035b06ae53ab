"""The picture of a circulation output: contours on a map, time-pressure sections.

External references used here:
* matplotlib's colour-map documentation (``BoundaryNorm``: each value gets the colour
  of the band it falls in; "Choosing Colormaps in Matplotlib": the diverging maps, with a
  light centre as tests/test_maps.py asks);
* pyproj.Geod (PROJ's geodesics, on a sphere of flowpipe's radius): a circle drawn at a
  time lies its radius from the centre the file gives for that time;
* the PNG image size is read back with matplotlib.image (PNG specification, IHDR);
* meteorological sections put pressure decreasing upward (*common practice*).
"""

from __future__ import annotations

import cartopy.crs as ccrs
import matplotlib.colors
import matplotlib.dates as mdates
import matplotlib.image
import numpy as np
import pyproj
import pytest
import shapely
import xarray as xr
from matplotlib.patches import PathPatch
from test_compliance import GLOBAL, REGIONAL, ROOT
from test_maps import DIVERGING, light_centre

import flowpipe as fp
from flowpipe import contours, maps
from flowpipe.cli import main
from flowpipe.constants import EARTH_RADIUS
from flowpipe.errors import InputError

SIZE = (900, 600)
TRACK = ROOT / "sample_data" / "demo_storm_track.csv"


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    directory = tmp_path_factory.mktemp("circulation_maps")
    storm = fp.circulation(fp.open_wind(REGIONAL), [
        contours.box(46, 56, -26, -4), contours.read_track(TRACK, 500)])
    shapes = [contours.box(30, 60, -40, 0), contours.circle(45, 160, 1500),
              contours.box(-20, 20, 60, 120)]
    world = fp.circulation(fp.open_wind(GLOBAL), shapes)
    return {"storm": fp.write(storm, directory / "storm.nc"),
            "world": fp.write(world, directory / "world.nc"), "directory": directory}


def _map_axes(fig):
    return next(ax for ax in fig.axes if hasattr(ax, "projection"))


def _sections(fig):
    return [ax for ax in fig.axes if ax.get_label().startswith("section ")]


def _patches(fig):
    return {p.get_label(): p for p in _map_axes(fig).patches if isinstance(p, PathPatch)}


@pytest.mark.parametrize("key,options", [
    ("storm", {}), ("storm", {"field": "mean_divergence", "level": 500.0,
                              "time": "2026-01-12T18:00"}),
    ("world", {"level": 250.0})])
def test_contours_coloured_by_their_value(files, key, options):
    fig = maps.render(files[key], size=SIZE, **options)
    field = options.get("field", "mean_vorticity")
    with xr.open_dataset(files[key]) as ds:  # the slab, selected with plain xarray
        da = ds[field].sel(level=options.get("level", ds.level.values[0]))
        da = da.sel(time=np.datetime64(options["time"])) if "time" in options else da.isel(time=0)
        values, names = da.values, [str(n) for n in ds.contour_name.values]
    (bar,) = _map_axes(fig).child_axes  # the colour bar beside the map: its solids
    (solids,) = [c for c in bar.collections if type(c).__name__ == "QuadMesh"]
    cmap, norm = solids.cmap, solids.norm
    assert cmap.name in DIVERGING and light_centre(cmap)  # diverging, centred on zero
    assert norm.vmin == pytest.approx(-norm.vmax) and norm.vmax >= np.abs(values).max()
    patches = _patches(fig)
    assert sorted(patches) == sorted(names)
    for name, value in zip(names, values, strict=True):
        # a value a trillionth of the largest is rounding (binary64 keeps about 16 digits,
        # IEEE 754), drawn as zero: the equatorial box of this symmetric flow (1e-22 s-1)
        value = 0.0 if abs(value) <= 1e-12 * np.abs(values).max() else value
        expect = cmap(norm(value))  # BoundaryNorm: the colour of the value's band
        np.testing.assert_allclose(patches[name].get_facecolor(), expect)
    assert ("divergence" if field == "mean_divergence" else "vorticity") in _map_axes(
        fig).get_title(loc="left")


def test_colour_bars_put_their_power_of_ten_in_the_label(files):
    # vorticity and divergence of a few 1e-5 s-1: the power of ten is written in the units
    # of the label, "(10^-5 s-1)", and the ticks are the values over it (common practice),
    # with no loose "1e-5" offset above the bar; tick texts read back after drawing
    import io
    import re

    fig = maps.render(files["storm"], size=SIZE)
    fig.savefig(io.BytesIO(), format="png")
    (map_bar,) = _map_axes(fig).child_axes
    (section_bar,) = [ax for ax in fig.axes if "mean divergence" in ax.get_ylabel()]
    for bar in (map_bar, section_bar):
        label = bar.get_ylabel()
        power = int(re.search(r"10\$\^\{(-?\d+)\}\$", label).group(1))
        assert power < -3, label
        offset = bar.yaxis.get_offset_text()
        assert not (offset.get_visible() and offset.get_text()), offset.get_text()
        ticks = [(t.get_loc(), t.label1.get_text().replace("\u2212", "-"))
                 for t in bar.yaxis.get_major_ticks() if t.label1.get_text()]
        assert len(ticks) >= 3
        for location, text in ticks:
            assert float(text) * 10.0**power == pytest.approx(location, abs=1e-3 * 10.0**power)


def test_moving_circle_drawn_where_it_is_at_that_time(files):
    geod = pyproj.Geod(a=EARTH_RADIUS, b=EARTH_RADIUS)
    for time in ("2026-01-12T00:00", "2026-01-12T18:00"):
        fig = maps.render(files["storm"], size=SIZE, time=time)
        ax = _map_axes(fig)
        xy = _patches(fig)["demo_storm_track"].get_path().vertices
        lonlat = ccrs.Geodetic().transform_points(ax.projection, xy[:, 0], xy[:, 1])
        with xr.open_dataset(files["storm"]) as ds:
            centre = ds.sel(time=np.datetime64(time)).isel(contour=1)
            lat, lon = float(centre.centre_latitude), float(centre.centre_longitude)
        _, _, r = geod.inv(np.full(len(xy), lon), np.full(len(xy), lat), lonlat[:, 0],
                           lonlat[:, 1])
        np.testing.assert_allclose(r, 500e3, rtol=1e-6)
        tracks = [line for line in ax.lines if line.get_label() == "track demo_storm_track"]
        assert len(tracks) == 1 and len(tracks[0].get_xdata()) == 5  # a dot per time


def test_time_pressure_sections(files):
    fig = maps.render(files["world"], size=SIZE)
    sections = _sections(fig)
    with xr.open_dataset(files["world"]) as ds:
        assert len(sections) == ds.sizes["contour"]
        times = mdates.date2num(ds.time.values)
        for k, ax in enumerate(sections):
            assert ax.get_title(loc="left") == str(ds.contour_name.values[k])
            low, high = ax.get_ylim()
            assert low > high  # pressure decreases upward
            assert (low, high) == (ds.level.values.max(), ds.level.values.min())
            assert ax.get_xlim() == pytest.approx((times[0], times[-1]))
            filled, lines = (c for c in ax.collections if hasattr(c, "levels"))
            div = ds.mean_divergence.isel(contour=k).values
            omega = ds.omega.isel(contour=k).values
            assert filled.levels[0] <= div.min() and filled.levels[-1] >= div.max()
            assert filled.levels[0] == -filled.levels[-1] and filled.cmap.name in DIVERGING
            assert lines.get_label() == "omega"
            inside = (lines.levels >= omega.min()) & (lines.levels <= omega.max())
            assert inside.sum() >= 2  # omega drawn as contour lines within its range


def test_png_and_command_line(files, capsys):
    out = files["directory"] / "storm.png"
    assert main(["map", str(files["storm"]), "-o", str(out), "--size", "900x600",
                 "--field", "mean_divergence"]) == 0
    image = matplotlib.image.imread(out)  # PNG: height x width x channels
    assert image.shape[:2] == (600, 900)
    assert image[..., :3].mean(axis=-1).std() > 0.05  # not blank (common practice)
    assert main(["map", str(files["storm"]), "-o", str(out), "--field", "nope"]) == 2
    err = capsys.readouterr().err
    assert "mean_vorticity" in err and "mean_divergence" in err and "omega" in err


def test_bad_level_and_time_name_what_is_available(files):
    with pytest.raises(InputError, match="850, 500"):
        maps.render(files["storm"], level=300.0)
    with pytest.raises(InputError, match="2026-01-12T00:00Z"):
        maps.render(files["storm"], time="2026-02-01T00:00")


def test_sections_of_a_non_divergent_flow_are_zero_to_rounding(tmp_path):
    # Solid-body rotation (Williamson et al. 1992, test case 1, alpha = 0: u = U cos(lat),
    # v = 0) has no divergence, so no omega either (omega is the vertical integral of the
    # divergence, O'Brien 1970, J. Appl. Meteor. 9, 197-203); the file holds rounding
    # (1e-22 s-1, 1e-18 Pa s-1). The map and the sections colour nothing but the bands at
    # zero, draw no omega contours and say so.
    lat, lon = np.linspace(-90, 90, 91), np.arange(0, 360, 2.0)
    u = np.broadcast_to(38.61 * np.cos(np.radians(lat))[:, None], (3, 3, lat.size, lon.size))
    dims = ("time", "level", "latitude", "longitude")
    wind = xr.Dataset(
        {"u": (dims, u.copy(), {"units": "m s-1", "standard_name": "eastward_wind"}),
         "v": (dims, 0 * u, {"units": "m s-1", "standard_name": "northward_wind"})},
        coords={"time": np.array(["2026-01-01T00", "2026-01-01T06", "2026-01-01T12"],
                                 dtype="datetime64[ns]"),
                "level": ("level", [850.0, 500.0, 250.0], {"units": "hPa",
                                                           "standard_name": "air_pressure"}),
                "latitude": ("latitude", lat, {"units": "degrees_north"}),
                "longitude": ("longitude", lon, {"units": "degrees_east"})})
    wind.to_netcdf(tmp_path / "solid.nc")
    out = fp.circulation(fp.open_wind(tmp_path / "solid.nc"),
                         [contours.box(30, 60, 0, 90), contours.circle(90, 0, 1000)])
    path = fp.write(out, tmp_path / "solid_c.nc")
    with xr.open_dataset(path) as ds:
        assert np.any(ds.mean_divergence.values != 0) and np.any(ds.omega.values != 0)
        assert np.all(np.abs(ds.mean_divergence) < 1e-12 * np.abs(ds.mean_vorticity))
    fig = maps.render(path, size=SIZE, field="mean_divergence")
    assert "zero to rounding" in _map_axes(fig).get_title(loc="left")
    (bar,) = _map_axes(fig).child_axes
    (solids,) = [c for c in bar.collections if type(c).__name__ == "QuadMesh"]
    for patch in _patches(fig).values():  # BoundaryNorm: the colour of the band at zero
        assert patch.get_facecolor() == pytest.approx(solids.cmap(solids.norm(0.0)))
    sections = _sections(fig)
    assert len(sections) == 2
    for ax in sections:
        assert "zero to rounding" in ax.get_title(loc="left")
        assert not [c for c in ax.collections if c.get_label() == "omega"]
        assert not ax.texts  # no omega contour labels
        (filled,) = [c for c in ax.collections if hasattr(c, "levels")]
        bands = [(low, high) for low, high, path in zip(
            filled.levels[:-1], filled.levels[1:], filled.get_paths(), strict=True)
            if len(path.vertices)]
        assert bands and all(0.0 in band for band in bands)  # only the bands at zero


@pytest.mark.parametrize("projection,pole", [("globe", 90), ("north-cap", 90),
                                             ("globe", -90), ("south-cap", -90)])
def test_a_contour_round_the_pole_is_drawn(tmp_path, projection, pole):
    # A circle round a pole is the polar cap poleward of it: on the globe (a straight pole
    # line) the band between the circle and the pole, on a polar stereographic map (the
    # pole a point) the disc; either way it covers the pole (cartopy/PROJ transforms of
    # the pole, read back from the drawn artists).
    sign = np.sign(pole)
    cap = fp.circulation(fp.open_wind(GLOBAL).isel(time=slice(0, 1)), [
        contours.circle(pole, 0, 1000), contours.box(*sorted([60 * sign, 80 * sign]), 300, 40)])
    path = fp.write(cap, tmp_path / "cap.nc")
    fig = maps.render(path, size=SIZE, projection=projection)
    ax = _map_axes(fig)
    name = f"circle {pole},0,1000km"
    drawn = [a for a in [*ax.patches, *ax.artists, *ax.collections] if a.get_label() == name]
    assert len(drawn) == 1
    fig.canvas.draw()
    pole = ax.projection.transform_point(0.0, 89.99 * sign, ccrs.PlateCarree())
    inside = ax.transData.transform(pole)
    extent = drawn[0].get_window_extent()
    assert extent.height > 2  # not a degenerate sliver
    assert extent.x0 <= inside[0] <= extent.x1 and extent.y0 - 1 <= inside[1] <= extent.y1 + 1


@pytest.mark.parametrize("projection", [None, "north-cap", "globe"])
def test_a_polar_circles_outline_has_no_spoke_to_the_pole(tmp_path, projection):
    # A circle of 1000 km round the north pole is the cap poleward of latitude
    # 90 - 1000 / (pi a / 180) = 81.0 (great-circle distance, common practice): its edge
    # on the sphere is that parallel alone. Every line drawn for it (matplotlib artists of
    # its name with a visible edge), read back in map coordinates and inverted to
    # latitude with cartopy/PROJ, stays on that parallel: no segment to or along the pole,
    # while the filled patch still covers the pole side.
    cap = fp.circulation(fp.open_wind(GLOBAL).isel(time=slice(0, 1)),
                         [contours.circle(90, 0, 1000)])
    fig = maps.render(fp.write(cap, tmp_path / "cap.nc"), size=SIZE, projection=projection)
    ax = _map_axes(fig)
    fig.draw_without_rendering()
    name = "circle 90,0,1000km"
    edge = 90.0 - np.degrees(1000e3 / EARTH_RADIUS)
    lines = [a for a in ax.get_children() if name in str(a.get_label())
             and a.get_visible() and a.get_linewidth() > 0
             and matplotlib.colors.to_rgba(a.get_edgecolor() if isinstance(a, PathPatch)
                                           else a.get_color())[3] > 0]
    assert lines
    for line in lines:
        vertices = (line.get_transform() - ax.transData).transform_path(line.get_path()).vertices
        lat = ccrs.PlateCarree().transform_points(ax.projection, *vertices.T)[:, 1]
        assert np.all(np.abs(lat - edge) < 0.5), lat.max()
    patch = _patches(fig)[name]
    inside = ax.projection.transform_point(30.0, 0.5 * (edge + 90.0), ccrs.PlateCarree())
    assert patch.get_path().contains_point(inside)
    assert not patch.get_path().contains_point(
        ax.projection.transform_point(30.0, edge - 3.0, ccrs.PlateCarree()))


@pytest.mark.parametrize("centre", [0.0, 180.0])
def test_a_box_across_the_date_line_is_drawn_as_the_box(tmp_path, centre):
    # A box 30-60 N from 170 E to 170 W on an equal-area world map (Equal Earth, on a sphere
    # of flowpipe's radius): the drawn patch's area is the box's, R^2 dlambda (sin phi2 -
    # sin phi1) (area of a latitude-longitude box, common practice), not the whole band's;
    # on a map centred on the prime meridian it is cut at the map's edge into two parts,
    # each beside one edge, on one centred on 180 degrees it is one part.
    box = fp.circulation(fp.open_wind(GLOBAL).isel(time=slice(0, 1)),
                         [contours.box(30, 60, 170, -170)])
    path = fp.write(box, tmp_path / "dateline.nc")
    sphere = ccrs.Globe(semimajor_axis=EARTH_RADIUS, semiminor_axis=EARTH_RADIUS, ellipse=None)
    proj = ccrs.EqualEarth(central_longitude=centre, globe=sphere)
    fig = maps.render(path, size=SIZE, projection=proj)
    (patch,) = _patches(fig).values()
    parts = [shapely.Polygon(xy) for xy in patch.get_path().to_polygons()]
    expect = EARTH_RADIUS**2 * np.radians(20.0) * (np.sin(np.radians(60)) - np.sin(np.radians(30)))
    assert sum(p.area for p in parts) == pytest.approx(expect, rel=1e-3)
    assert len(parts) == (2 if centre == 0.0 else 1)
    if centre == 0.0:  # cut at the map's edge: one part 170-180 E, one 180-170 W
        lons = [ccrs.PlateCarree().transform_points(proj, *np.asarray(p.exterior.coords).T)[:, 0]
                for p in parts]
        ranges = sorted((float(lo.min()), float(lo.max())) for lo in lons)
        np.testing.assert_allclose(ranges, [(-180.0, -170.0), (170.0, 180.0)], atol=1e-6)


@pytest.mark.parametrize("projection", [None, "globe"])
def test_a_pole_circle_beside_a_moving_circle_is_drawn(tmp_path, projection):
    # A polar cap and a storm-following circle in one file, on the map the file chooses
    # (auto: the globe) and on the globe: each contour drawn once, the cap over the pole
    # (cartopy/PROJ transform of the pole read back from the drawn artist).
    both = fp.circulation(fp.open_wind(GLOBAL).isel(time=slice(0, 2)), [
        contours.circle(90, 0, 300), contours.read_track(TRACK, 400)])
    path = fp.write(both, tmp_path / "both.nc")
    fig = maps.render(path, size=SIZE, projection=projection)
    patches = _patches(fig)
    assert sorted(patches) == ["circle 90,0,300km", "demo_storm_track"]
    ax = _map_axes(fig)
    fig.canvas.draw()
    inside = ax.transData.transform(ax.projection.transform_point(0.0, 89.99,
                                                                   ccrs.PlateCarree()))
    extent = patches["circle 90,0,300km"].get_window_extent()
    assert extent.x0 <= inside[0] <= extent.x1 and extent.y0 - 1 <= inside[1] <= extent.y1 + 1


def test_a_small_contour_inside_a_large_one_is_drawn_over_it(tmp_path):
    # A 300 km circle on the pole listed before a 1500 km one round it: matplotlib draws
    # artists of equal zorder in the order they were added (matplotlib documentation,
    # "Zorder Demo"), so the small one must come later to stay in sight.
    both = fp.circulation(fp.open_wind(GLOBAL).isel(time=slice(0, 1)), [
        contours.circle(90, 0, 300), contours.circle(90, 0, 1500)])
    fig = maps.render(fp.write(both, tmp_path / "nested.nc"), size=SIZE, projection="north-cap")
    order = [p.get_label() for p in _map_axes(fig).patches if isinstance(p, PathPatch)]
    zorders = {p.get_label(): p.get_zorder() for p in _map_axes(fig).patches}
    assert zorders["circle 90,0,300km"] == zorders["circle 90,0,1500km"]
    assert order.index("circle 90,0,300km") > order.index("circle 90,0,1500km")


@pytest.mark.parametrize("member", [None, 7])
def test_an_ensembles_contours_are_those_of_one_member(tmp_path, member):
    # Two members (CF standard name realization), the second with twice the wind: the map
    # colours each contour by the chosen member's value (the first by default), as
    # BoundaryNorm bands it (matplotlib), and says which member it is.
    wind = fp.open_wind(GLOBAL).isel(time=slice(0, 1)).load()
    ensemble = xr.concat([wind, wind * 2.0], dim="realization")
    ensemble = ensemble.assign_coords(realization=("realization", [3, 7],
                                                   {"standard_name": "realization"}))
    for name in ("u", "v"):
        ensemble[name].attrs = wind[name].attrs
    shapes = [contours.box(30, 60, -40, 0), contours.circle(45, 160, 1500)]
    path = fp.write(fp.circulation(ensemble, shapes), tmp_path / "ensemble.nc")
    fig = maps.render(path, size=SIZE, member=member)
    with xr.open_dataset(path) as ds:
        chosen = ds["mean_vorticity"].sel(realization=member or 3).isel(time=0, level=0)
        values, names = chosen.values, [str(n) for n in ds.contour_name.values]
    (bar,) = _map_axes(fig).child_axes
    (solids,) = [c for c in bar.collections if type(c).__name__ == "QuadMesh"]
    patches = _patches(fig)
    for name, value in zip(names, values, strict=True):
        np.testing.assert_allclose(patches[name].get_facecolor(), solids.cmap(solids.norm(value)))
    assert f"member {member or 3}" in _map_axes(fig).get_title(loc="left")
