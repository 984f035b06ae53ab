"""Maps: every figure kind renders offline, with colour bars that tell the truth.

External references used here:
* matplotlib's colour-map documentation ("Choosing Colormaps in Matplotlib"):
  the perceptually uniform sequential maps (viridis, plasma, inferno, magma,
  cividis) and the diverging maps it lists (ColorBrewer's, Moreland's coolwarm, and
  berlin, managua, vanimo of Crameri, Shephard & Heron 2020, Nature Communications 11,
  5444); a diverging map for signed fields here must have a light centre, lighter than
  either end by relative luminance (ITU-R BT.709 coefficients), so that values near zero
  are pale (common practice for maps of vorticity and divergence);
* Snyder (1987), Map Projections - A Working Manual, USGS Professional Paper
  1395: polar stereographic for polar regions, an azimuthal equal-area
  projection centred on a limited area (common practice);
* CF Conventions 1.11 section 9 and appendix H.4 (trajectories, featureType);
* the PNG image size is read back with matplotlib.image (PNG specification, IHDR).
"""

from __future__ import annotations

import warnings
from pathlib import Path

import cartopy
import cartopy.crs as ccrs
import cartopy.io
import cf_xarray  # noqa: F401  (registers the .cf accessor)
import matplotlib.image
import numpy as np
import pytest
import xarray as xr
from matplotlib.transforms import Bbox
from test_compliance import GLOBAL, REGIONAL, decomposition_like, trajectory_like
from windfiles import unusual_names_file

import flowpipe as fp
from flowpipe import annotate, maps
from flowpipe.cli import main
from flowpipe.errors import InputError, UsageError

SEQUENTIAL = {"viridis", "plasma", "inferno", "magma", "cividis"}
DIVERGING = {"PiYG", "PRGn", "BrBG", "PuOr", "RdGy", "RdBu", "RdYlBu", "RdYlGn", "Spectral",
             "coolwarm", "bwr", "seismic", "berlin", "managua", "vanimo"}


def light_centre(cmap) -> bool:
    """Whether a colour map's middle is lighter than both of its ends (BT.709 luminance)."""
    luminance = [float(np.dot(cmap(x)[:3], (0.2126, 0.7152, 0.0722))) for x in (0.0, 0.5, 1.0)]
    return luminance[1] > max(luminance[0], luminance[2])
SIZE = (640, 420)
#: Standard deviation of the grey levels (0..1) above which an image is not blank
#: (a blank or single-colour image has 0; common practice).
VARIANCE_FLOOR = 0.05


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    directory = tmp_path_factory.mktemp("maps")
    wind = fp.open_wind(GLOBAL).isel(time=slice(0, 2))
    regional = fp.open_wind(REGIONAL).isel(time=slice(0, 1))
    parts = decomposition_like(wind)
    return {
        "global": fp.write(parts, directory / "global.nc"),
        "cap": fp.write(parts.sel(latitude=slice(30, 90)), directory / "cap.nc"),
        "regional": fp.write(decomposition_like(regional, harmonic=True),
                             directory / "regional.nc"),
        "tracks": fp.write(trajectory_like(), directory / "tracks.nc"),
        "tracks-2d": fp.write(trajectory_like(vertical=False, backward=True),
                              directory / "tracks2d.nc"),
        "real-parts": fp.write(fp.decompose(wind.isel(time=slice(0, 1))),
                               directory / "real_parts.nc"),
        "real-tracks": fp.write(fp.advect(fp.open_wind(GLOBAL), REAL_STARTS, hours=24,
                                          backward=True), directory / "real_tracks.nc"),
        "directory": directory,
    }


#: kind -> (file key, render keywords, variable, level, time index)
FIELD_MAPS = {
    "streamfunction": ("global", {"field": "streamfunction", "level": 250.0,
                                  "time": "2026-01-12T06:00Z"}),
    "velocity-potential": ("global", {"field": "velocity_potential"}),
    "vorticity-cap": ("cap", {"field": "vorticity", "level": 500.0}),
    "divergence-regional": ("regional", {"field": "divergence"}),
    "temperature-input": (None, {"field": "ta", "level": 500.0}),
    "real-streamfunction": ("real-parts", {"field": "streamfunction", "level": 250.0}),
    "real-velocity-potential": ("real-parts", {"field": "velocity_potential"}),
}
TRACK_MAPS = {"tracks": ("tracks", {}), "tracks-2d": ("tracks-2d", {}),
              "real-tracks": ("real-tracks", {})}
REAL_STARTS = [(52.0, 4.0, 850.0), (45.0, -20.0, 500.0), (60.0, 20.0, 250.0)]


@pytest.fixture(scope="module")
def figures(files):
    rendered = {}
    for kind, (key, options) in {**FIELD_MAPS, **TRACK_MAPS}.items():
        source = GLOBAL if key is None else files[key]
        rendered[kind] = (source, options, maps.render(source, size=SIZE, **options))
    return rendered


def _colour_bar(fig):
    """The colour bar of the map, through its mappable (matplotlib ScalarMappable.colorbar)."""
    bars = [c.colorbar for ax in fig.axes for c in ax.collections
            if getattr(c, "colorbar", None) is not None]
    assert len(bars) == 1
    return bars[0]


def _map_axes(fig):
    return next(ax for ax in fig.axes if hasattr(ax, "projection"))


def _slab(source, options) -> xr.DataArray:
    """The slab the map shows, selected with plain xarray (independently of flowpipe.maps)."""
    with xr.open_dataset(source) as ds:
        da = ds[options["field"]]
        level_name = next(d for d in da.dims if d in ("level", "plev", "pressure"))
        if "level" in options:
            da = da.sel({level_name: options["level"]})
        else:
            da = da.isel({level_name: 0})
        if "time" in options:
            da = da.sel(time=np.datetime64(options["time"].rstrip("Z")))
        else:
            da = da.isel(time=0)
        return da.load()


@pytest.mark.parametrize("kind", [*FIELD_MAPS, *TRACK_MAPS])
def test_png_of_requested_size_not_blank(figures, files, kind):
    _, _, fig = figures[kind]
    path = maps.save(fig, files["directory"] / f"{kind}.png")
    image = matplotlib.image.imread(path)  # PNG: height x width x channels
    assert image.shape[:2] == (SIZE[1], SIZE[0])
    grey = image[..., :3].mean(axis=-1)
    assert grey.std() > VARIANCE_FLOOR
    assert not list(files["directory"].glob(".*tmp*"))  # nothing left from the atomic write


@pytest.mark.parametrize("kind", list(FIELD_MAPS))
def test_colour_bar_spans_the_data(figures, kind):
    # The scale covers all but the extreme thousandth of the points at each end (numpy's
    # quantiles, the reference); values beyond it are marked by the bar's arrows.
    source, options, fig = figures[kind]
    values = _slab(source, options).values
    low, high = np.nanquantile(values, [1e-3, 1 - 1e-3])
    bar = _colour_bar(fig)
    assert bar.extend == {(False, False): "neither", (True, False): "min", (False, True): "max",
                          (True, True): "both"}[np.nanmin(values) < bar.vmin,
                                                np.nanmax(values) > bar.vmax]
    step = np.diff(bar.mappable.levels).max()
    name = bar.cmap.name
    signed = options["field"] in ("streamfunction", "velocity_potential", "vorticity",
                                  "divergence") or low < 0 < high
    assert bar.vmin <= low and bar.vmax >= high
    if signed:  # diverging, centred on zero
        assert name in DIVERGING and light_centre(bar.cmap)
        assert bar.vmin == pytest.approx(-bar.vmax)
        assert bar.mappable.norm(0.0) == pytest.approx(0.5)
        assert bar.vmax - max(abs(low), abs(high)) < step
    else:
        assert name in SEQUENTIAL
        assert low - bar.vmin < step and bar.vmax - high < step


def test_a_few_extremes_do_not_set_the_colour_scale():
    # A smooth vorticity-like field with a cyclone's core of 20 points 30 times as strong:
    # the scale follows the field and the core is drawn beyond it, in the end colour with the
    # bar's arrow (common practice for maps of fields with sharp peaks).
    lat, lon = np.linspace(-89.5, 89.5, 180), np.arange(0.0, 360.0, 1.0)
    field = 1e-5 * np.sin(np.radians(lat))[:, None] * np.cos(np.radians(2 * lon))[None, :]
    field[100:104, 50:55] = 3e-4
    ds = xr.Dataset({"vorticity": (("latitude", "longitude"), field,
                                   {"units": "s-1", "standard_name": "atmosphere_relative_vorticity"})},
                    coords={"latitude": ("latitude", lat, {"units": "degrees_north"}),
                            "longitude": ("longitude", lon, {"units": "degrees_east"})})
    bar = _colour_bar(fp.render(ds, field="vorticity", size=SIZE))
    assert bar.vmax < 2e-5 and bar.vmin == pytest.approx(-bar.vmax)
    assert bar.extend == "max"


@pytest.mark.parametrize("kind", ["streamfunction", "velocity-potential", "vorticity-cap",
                                  "real-streamfunction", "real-velocity-potential"])
def test_matching_wind_with_reference_arrow(figures, kind):
    source, options, fig = figures[kind]
    wind = {"streamfunction": "rotational", "vorticity": "rotational",
            "velocity_potential": "divergent"}[options["field"]]
    ax = _map_axes(fig)
    arrows = [a for a in ax.collections if type(a).__name__ == "Quiver"]
    keys = [a for a in ax.artists + ax.get_children() if type(a).__name__ == "QuiverKey"]
    assert len(arrows) == 1 and keys
    speed = np.hypot(_slab(source, {**options, "field": f"u_{wind}"}).values,
                     _slab(source, {**options, "field": f"v_{wind}"}).values)
    # the reference arrow is a round speed within the range of the wind drawn
    assert np.nanmin(speed) <= keys[0].U <= np.nanmax(speed)
    assert "m s" in keys[0].text.get_text()
    # thinned: far fewer arrows than grid points
    assert arrows[0].N < speed.size / 4
    assert wind in ax.get_title(loc="left")


def test_title_and_footer(figures):
    source, options, fig = figures["streamfunction"]
    title = _map_axes(fig).get_title(loc="left")
    assert "Streamfunction" in title and "250 hPa" in title
    assert "2026-01-12T06:00Z" in title  # ISO 8601 valid time
    footer = " ".join(t.get_text() for t in fig.texts)
    assert source.name in footer and f"flowpipe {fp.__version__}" in footer
    assert annotate.CAUTION_SHORT in footer


def test_projection_follows_the_domain(figures, files):
    # Snyder (1987): whole globe, polar cap (polar stereographic), limited area
    # (azimuthal equal-area centred on the domain).
    assert isinstance(_map_axes(figures["streamfunction"][2]).projection, ccrs.EqualEarth)
    assert isinstance(_map_axes(figures["vorticity-cap"][2]).projection, ccrs.NorthPolarStereo)
    regional = _map_axes(figures["divergence-regional"][2]).projection
    assert isinstance(regional, ccrs.LambertAzimuthalEqualArea)
    with xr.open_dataset(files["regional"]) as ds:
        lat, lon = ds["latitude"].values, ds["longitude"].values
    assert regional.proj4_params["lon_0"] == pytest.approx((lon.min() + lon.max()) / 2)
    assert regional.proj4_params["lat_0"] == pytest.approx((lat.min() + lat.max()) / 2)
    fig = maps.render(files["regional"], projection="lat-lon", size=SIZE)
    assert isinstance(_map_axes(fig).projection, ccrs.PlateCarree)


@pytest.mark.parametrize("kind", ["tracks", "real-tracks"])
def test_tracks_coloured_by_pressure_with_start_points(figures, files, kind):
    _, _, fig = figures[kind]
    with xr.open_dataset(files[kind]) as ds:
        pressure = ds.cf["air_pressure"].values  # found by CF standard name (cf-xarray)
        start_lon, start_lat = ds["longitude"].values[:, 0], ds["latitude"].values[:, 0]
    bar = _colour_bar(fig)
    assert (bar.vmin, bar.vmax) == pytest.approx((np.nanmin(pressure), np.nanmax(pressure)))
    assert bar.cmap.name in SEQUENTIAL
    assert bar.ax.yaxis_inverted()  # pressure decreases upwards (CF positive = "down")
    starts = [c for c in _map_axes(fig).collections if c.get_label() == "start"]
    assert len(starts) == 1
    np.testing.assert_allclose(starts[0].get_offsets(), np.column_stack([start_lon, start_lat]))


def test_two_dimensional_tracks_coloured_by_time(figures, files):
    _, _, fig = figures["tracks-2d"]
    with xr.open_dataset(files["tracks-2d"]) as ds:
        hours = (ds["time"] - ds["time"][:, 0]).values / np.timedelta64(1, "h")
    bar = _colour_bar(fig)
    assert (bar.vmin, bar.vmax) == pytest.approx((np.nanmin(hours), np.nanmax(hours)))
    assert "backward" in _map_axes(fig).get_title(loc="left")


def test_sampled_variable_colours_tracks(files):
    fig = maps.render(files["tracks"], field="ta", size=SIZE)
    with xr.open_dataset(files["tracks"]) as ds:
        ta = ds["ta"].values
    bar = _colour_bar(fig)
    assert (bar.vmin, bar.vmax) == pytest.approx((np.nanmin(ta), np.nanmax(ta)))


def test_offline_without_download(files, monkeypatch):
    # cartopy fetches missing data through Downloader.acquire_resource: forbid it.
    def no_network(*args, **kwargs):
        raise AssertionError("a map tried to download data")

    monkeypatch.setattr(cartopy.io.Downloader, "acquire_resource", no_network)
    with warnings.catch_warnings():
        warnings.simplefilter("error", maps.MapWarning)  # the packaged coastlines are found
        fig = maps.render(files["regional"], size=SIZE)
    fig.savefig(files["directory"] / "offline.png")
    features = [a for a in _map_axes(fig).get_children() if type(a).__name__ == "FeatureArtist"]
    assert features


def test_no_coastline_data_is_a_warning(files, monkeypatch, tmp_path):
    monkeypatch.setattr(maps, "COASTLINE_DIRS", (str(tmp_path),))
    monkeypatch.setitem(cartopy.config, "pre_existing_data_dir", "")
    with pytest.warns(maps.MapWarning, match="coastline"):
        fig = maps.render(files["regional"], size=SIZE)
    features = [a for a in _map_axes(fig).get_children() if type(a).__name__ == "FeatureArtist"]
    assert not features
    maps.save(fig, tmp_path / "bare.png")
    assert matplotlib.image.imread(tmp_path / "bare.png").shape[:2] == (SIZE[1], SIZE[0])


def test_bad_input_names_what_is_available(files, tmp_path):
    with pytest.raises(InputError, match="streamfunction.*velocity_potential"):
        maps.render(files["global"], field="geopotential")
    with pytest.raises(InputError, match="850, 500, 250"):
        maps.render(files["global"], field="vorticity", level=300.0)
    with pytest.raises(InputError, match="2026-01-12T00:00Z, 2026-01-12T06:00Z"):
        maps.render(files["global"], time="2026-02-01T00:00")
    with pytest.raises(UsageError, match="lat-lon"):
        maps.render(files["global"], projection="upside-down")
    with pytest.raises(UsageError, match="trajectory"):
        maps.render(files["tracks"], level=850.0)
    plain = tmp_path / "no_coordinates.nc"
    xr.Dataset({"x": (("a", "b"), np.ones((3, 4)))}).to_netcdf(plain)
    with pytest.raises(InputError, match="latitude/longitude"):
        maps.render(plain)


def test_foreign_file_with_the_variables_maps(tmp_path):
    # demo_regional.nc: not a flowpipe output; latitudes descending, levels in Pa. The
    # level is given and shown in hPa as everywhere in flowpipe (1 hPa = 100 Pa,
    # UDUNITS-2); the file's own value is accepted too.
    fig = maps.render(REGIONAL, field="uwind", level=500.0, size=SIZE)
    with xr.open_dataset(REGIONAL) as ds:
        values = ds["uwind"].sel(pressure=50000.0).isel(time=0).values
    bar = _colour_bar(fig)
    assert bar.vmin <= values.min() and bar.vmax >= values.max()
    assert "500 hPa" in _map_axes(fig).get_title(loc="left")
    same = maps.render(REGIONAL, field="uwind", level=50000.0, size=SIZE)
    assert _map_axes(same).get_title(loc="left") == _map_axes(fig).get_title(loc="left")


def test_command_line(files, capsys):
    out = files["directory"] / "cli.png"
    assert main(["map", str(files["global"]), "-o", str(out), "--field", "divergence",
                 "--size", "500x300"]) == 0
    assert matplotlib.image.imread(out).shape[:2] == (300, 500)
    assert main(["map", str(files["global"]), "-o", str(out), "--field", "nope"]) == 2
    assert "flowpipe: error:" in capsys.readouterr().err
    before = files["global"].read_bytes()
    assert main(["map", str(files["global"]), "-o", str(files["global"])]) == 2
    assert files["global"].read_bytes() == before  # an input is never overwritten


def test_shorelines_have_no_polygon_cuts():
    # GSHHS (Wessel & Smith 1996, J. Geophys. Res. 101(B4), 8741-8743) stores land
    # as polygons; Antarctica is closed along the 0/180 degree meridians and the pole,
    # which is not coast. No drawn shoreline segment may run along them.
    directory = next(d for d in maps.COASTLINE_DIRS if (Path(d) / maps.GSHHS_COARSE).is_file())
    feature = maps._shorelines(directory)
    segments = 0
    for line in feature.geometries():
        xy = np.asarray(line.coords)
        on_cut = (xy[:-1, 0] == xy[1:, 0]) & np.isin(xy[:-1, 0], (0.0, 180.0, -180.0))
        at_pole = (xy[:-1, 1] <= -90.0 + 1e-9) & (xy[1:, 1] <= -90.0 + 1e-9)
        assert not (on_cut | at_pole).any()
        segments += len(xy) - 1
    assert segments > 1000  # the coast itself is still there


def test_projection_overrides(files):
    fig = maps.render(files["global"], projection="south-cap", size=SIZE)
    assert isinstance(_map_axes(fig).projection, ccrs.SouthPolarStereo)
    mine = ccrs.Orthographic(central_longitude=-30.0, central_latitude=50.0)
    fig = maps.render(files["regional"], projection=mine, size=SIZE)
    assert _map_axes(fig).projection == mine


@pytest.mark.parametrize("projection,pole", [("south-cap", "S"), ("north-cap", "N")])
def test_a_polar_cap_names_its_meridians_all_round(files, projection, pole):
    # On a round polar map the meridians meet the edge all round: each is named where it
    # does, the parallels along one meridian inside (polar stereographic maps, common
    # practice); the labels cartopy's gridliner drew, read back after drawing.
    import io

    from cartopy.mpl.gridliner import Gridliner

    fig = maps.render(files["global"], projection=projection, size=SIZE)
    fig.savefig(io.BytesIO(), format="png")  # (the gridliner makes its labels when drawn)
    (grid,) = [a for a in _map_axes(fig).artists if isinstance(a, Gridliner)]
    meridians = {a.get_text() for a in grid.xlabel_artists if a.get_visible()}
    assert meridians == {"0°", "60°E", "120°E", "180°", "120°W", "60°W"}
    parallels = {a.get_text() for a in grid.ylabel_artists if a.get_visible()}
    assert parallels and all(text.endswith(f"°{pole}") for text in parallels), parallels


def test_in_memory_dataset_maps():
    # The canonical wind (flowpipe.open_wind) straight from memory, as the Python API allows.
    wind = fp.open_wind(GLOBAL)
    fig = fp.render(wind, field="ta", level=250.0, time="2026-01-13T00:00", size=SIZE)
    expected = wind["ta"].sel(level=250.0, time=np.datetime64("2026-01-13T00:00")).values
    bar = _colour_bar(fig)
    assert bar.vmin <= expected.min() and bar.vmax >= expected.max()
    assert bar.cmap.name in SEQUENTIAL  # temperature in K: a magnitude
    assert "demo_global.nc" in fig.texts[0].get_text()


def test_command_line_warns_without_coastlines(files, monkeypatch, tmp_path, capsys):
    monkeypatch.setattr(maps, "COASTLINE_DIRS", (str(tmp_path),))
    monkeypatch.setitem(cartopy.config, "pre_existing_data_dir", "")
    out = tmp_path / "bare.png"
    assert main(["map", str(files["tracks"]), "-o", str(out), "--size", "400x300"]) == 0
    assert "flowpipe: warning: no coastline data" in capsys.readouterr().err
    assert matplotlib.image.imread(out).shape[:2] == (300, 400)


# ---------------------------------------------------------------- maps that do not mislead

def test_a_field_zero_to_rounding_is_titled_so_and_not_coloured(files, tmp_path):
    # A velocity potential a billionth of the streamfunction is zero to single-precision
    # rounding (IEEE 754 binary32 keeps about 7 digits): no colours, and the title says so.
    with xr.open_dataset(files["global"]) as ds:
        ds = ds.load()
    ds["velocity_potential"] = ds["streamfunction"] * 1e-9
    path = fp.write(ds, tmp_path / "tiny.nc", precision="single")
    fig = maps.render(path, field="velocity_potential", size=SIZE)
    ax = _map_axes(fig)
    assert "zero to rounding" in ax.get_title(loc="left")
    assert "streamfunction" in ax.get_title(loc="left")
    assert not [c for c in ax.collections if getattr(c, "colorbar", None) is not None]
    # the same values far above rounding (their own field, no larger companion) are drawn
    ds["streamfunction"] = ds["velocity_potential"]
    path = fp.write(ds, tmp_path / "small.nc", precision="single")
    title = _map_axes(maps.render(path, field="velocity_potential", size=SIZE)).get_title(loc="left")
    assert "zero to rounding" not in title


def test_the_terminal_line_writes_units_as_udunits_does(files, tmp_path, capsys):
    # The figure raises exponents with matplotlib mathtext ("m$^{2}$ s$^{-1}$"); a terminal
    # shows no mathtext, so the line printed gives the units as UDUNITS-2 writes them
    # ("m2 s-1": its unit-string grammar, exponents as plain integers after the symbol).
    with xr.open_dataset(files["global"]) as ds:
        ds = ds.load()
    ds["velocity_potential"] = (ds["streamfunction"] * 1e-9).assign_attrs(
        ds["velocity_potential"].attrs)
    path = fp.write(ds, tmp_path / "tiny.nc", precision="single")
    out = tmp_path / "tiny.png"
    assert main(["map", str(path), "-o", str(out), "--field", "velocity_potential"]) == 0
    line = capsys.readouterr().out.strip()
    assert "zero to rounding" in line and " m2 s-1 " in line
    assert "$" not in line and "^" not in line
    title = _map_axes(maps.render(path, field="velocity_potential", size=SIZE)).get_title(loc="left")
    assert "m$^{2}$ s$^{-1}$" in title  # the figure keeps its raised exponents


@pytest.mark.parametrize("size", [(1200, 800), SIZE])
def test_the_wind_key_never_meets_the_title(files, tmp_path, size):
    # A harmonic-wind map under a long title: the reference arrow's key (matplotlib
    # QuiverKey: its arrow and its label) and the title, read back as window extents after
    # drawing, do not overlap (text over text is unreadable: common practice). A field
    # that is itself a component of the wind drawn does not say "with" that wind again.
    with xr.open_dataset(files["regional"]) as ds:
        ds = ds.load()
    ds["u_harmonic"].attrs["long_name"] = ("eastward component of the harmonic wind, " * 4)[:-2]
    fig = maps.render(fp.write(ds, tmp_path / "harmonic.nc"), field="u_harmonic", size=size)
    ax = _map_axes(fig)
    title = ax.get_title(loc="left")
    assert title.splitlines()[0].endswith("harmonic wind")
    assert "with the harmonic wind" not in title
    fig.draw_without_rendering()
    (key,) = [a for a in ax.get_children() if type(a).__name__ == "QuiverKey"]
    heading = ax._left_title.get_window_extent()
    assert heading.width > 0.5 * fig.bbox.width  # a long title indeed
    # the arrow: its polygon (in its own transform) placed at its offset (matplotlib
    # QuiverKey.vector, a PolyCollection with one offset)
    vector = key.vector
    at = vector.get_offset_transform().transform(vector.get_offsets())
    corners = at + vector.get_transform().transform(vector.get_paths()[0].vertices)
    arrow = Bbox.from_extents(*corners.min(axis=0), *corners.max(axis=0))
    assert arrow.width > 3  # the arrow itself, not an empty box
    for part in (key.text.get_window_extent(), arrow):
        assert not part.overlaps(heading)
    streamfunction = _map_axes(maps.render(files["regional"], field="streamfunction", size=size))
    assert "with the rotational wind" in streamfunction.get_title(loc="left")


def _limited_area_wind(path, u_fn):
    """A CF wind on 20-60 N, 150 E-150 W at 1 degree, one time, from u_fn(lat, lon) -> (u, v)."""
    lat, lon = np.arange(20.0, 60.01, 1.0), np.arange(150.0, 210.01, 1.0)
    u, v = u_fn(*np.meshgrid(lat, lon, indexing="ij"))
    dims = ("time", "latitude", "longitude")
    xr.Dataset({"u": (dims, u[None], {"units": "m s-1", "standard_name": "eastward_wind"}),
                "v": (dims, v[None], {"units": "m s-1", "standard_name": "northward_wind"})},
               coords={"time": ("time", [np.datetime64("2026-01-01T00", "ns")]),
                       "latitude": ("latitude", lat, {"units": "degrees_north",
                                                      "standard_name": "latitude"}),
                       "longitude": ("longitude", lon, {"units": "degrees_east",
                                                        "standard_name": "longitude"})},
               attrs={"Conventions": "CF-1.11"}).to_netcdf(path)
    return path


def _vortex(lat, lon):
    # a Gaussian vortex in the middle of the area, psi = -P exp(-r^2 / L^2) on the tangent
    # plane (u = -dpsi/dy, v = dpsi/dx): its wind dies out well inside the boundary
    x = np.radians(lon - 180.0) * 6.371e6 * np.cos(np.radians(40.0))
    y = np.radians(lat - 40.0) * 6.371e6
    scale = 8e5
    bump = np.exp(-(x**2 + y**2) / scale**2) * 20.0 / scale
    return y * bump, -x * bump


@pytest.mark.parametrize("field", ["velocity_potential", "u_divergent", "streamfunction"])
def test_a_variational_split_mostly_harmonic_says_so(tmp_path, field):
    # Solid-body rotation on a limited area (Williamson et al. 1992, test case 1 with
    # alpha = 0: u = U cos(lat), v = 0) has no divergence and a vorticity 2 U sin(lat) / a:
    # on the area, most of its energy is in a harmonic flow, which the variational split
    # (Li, Chao & McWilliams 2006, Mon. Wea. Rev. 134, 3384-3394) shares between the
    # rotational and the divergent part. The file's harmonic_energy_share says how much; the
    # map of either part says so under its title. A vortex that dies out inside the area
    # has little harmonic energy, and no such line.
    rotation = _limited_area_wind(tmp_path / "rotation.nc",
                                  lambda lat, lon: (38.61 * np.cos(np.radians(lat)), 0 * lat))
    parts = fp.write(fp.decompose(fp.open_wind(rotation)), tmp_path / "rotation_parts.nc")
    with xr.open_dataset(parts) as ds:
        share = float(ds["harmonic_energy_share"].values.max())
        assert ds.attrs["scheme"] == "variational" and share > 0.5
    title = _map_axes(maps.render(parts, field=field, size=SIZE)).get_title(loc="left")
    (note,) = [line for line in title.splitlines() if line.startswith("harmonic flow")]
    assert f"{share:.0%} of the energy" in note and "harmonic_energy_share" in note
    divergence = _map_axes(maps.render(parts, field="divergence", size=SIZE))
    assert "harmonic flow" not in divergence.get_title(loc="left")
    vortex = _limited_area_wind(tmp_path / "vortex.nc", _vortex)
    parts = fp.write(fp.decompose(fp.open_wind(vortex)), tmp_path / "vortex_parts.nc")
    with xr.open_dataset(parts) as ds:
        assert float(ds["harmonic_energy_share"].values.max()) < 0.1
    title = _map_axes(maps.render(parts, field=field, size=SIZE)).get_title(loc="left")
    assert "harmonic flow" not in title


@pytest.mark.parametrize("bounds", [(-60.0, 60.0, 0.0, 360.0), (30.0, 60.0, 0.0, 30.0),
                                    (-10.0, 10.0, 0.0, 360.0)])
def test_arrow_count_follows_the_domain_not_its_shape(bounds):
    # About maps.ARROWS arrows on a square area, a wide band and a thin tropical channel
    # (evenly spaced on the sphere: the count is the domain's area over the spacing squared).
    south, north, west, east = bounds
    lat, lon = np.arange(south, north + 0.1, 0.5), np.arange(west, east, 0.5)
    rows, _ = maps._thinned(lat, lon)
    assert 0.5 * maps.ARROWS <= rows.size <= 1.6 * maps.ARROWS


def test_barbs_carry_the_wind_in_knots(files):
    # 1 kn = 1852 m / 3600 s (the international nautical mile per hour; from memory).
    fig = maps.render(files["real-parts"], field="vorticity", size=SIZE, barbs=True)
    ax = _map_axes(fig)
    (barbs,) = [c for c in ax.collections if type(c).__name__ == "Barbs"]
    with xr.open_dataset(files["real-parts"]) as ds:
        u = ds["u_rotational"].isel(time=0, level=0).values
        v = ds["v_rotational"].isel(time=0, level=0).values
    speeds_kn = np.hypot(barbs.u, barbs.v)
    assert speeds_kn.max() == pytest.approx(np.nanmax(np.hypot(u, v)) * 3600 / 1852, rel=0.15)
    assert not [c for c in ax.collections if type(c).__name__ == "Quiver"]


def test_track_map_marks_times_ends_by_status_and_the_domain(files, tmp_path):
    # Legend entries of the matplotlib figure: one end marker per status present (named
    # as the file's CF flag_meanings say), the time marks, the input domain's edge.
    path = tmp_path / "tracks.nc"
    assert main(["advect", str(REGIONAL), "--start", "55,-10,850", "--start", "50,5,850",
                 "--hours", "24", "-o", str(path)]) == 0
    fig = maps.render(path, size=SIZE)
    ax = _map_axes(fig)
    labels = [text.get_text() for text in ax.get_legend().get_texts()]
    with xr.open_dataset(path) as ds:
        meanings = ds["status"].attrs["flag_meanings"].split()
        ended = [meanings[int(s)] for s in ds["status"].values]
        times = ds["time"].values
    hours = (times - times[:, :1]) / np.timedelta64(1, "h")
    for meaning in set(ended):
        assert f"end: {meaning.replace('_', ' ')} ({ended.count(meaning)})" in labels
    assert "left_domain" in ended
    assert "every 6 h" in labels and "edge of the input's domain" in labels
    (marks,) = [c for c in ax.collections if c.get_label() == "every 6 h"]
    expected = np.sum(np.isfinite(hours) & (hours > 0) & np.isclose(hours % 6, 0))
    assert len(marks.get_offsets()) == expected


def test_a_start_outside_the_domain_does_not_stretch_the_track_map(tmp_path):
    # A start at 40 N 100 E, far east of the 35-65 N, 30 W-10 E domain, is skipped (CF flag
    # outside_domain_at_start): the map covers the track that ran, not the skipped start
    # (the map's extent read back in longitude and latitude with cartopy).
    path = tmp_path / "tracks.nc"
    assert main(["advect", str(REGIONAL), "--start", "55,-10,850", "--start", "40,100,850",
                 "--hours", "12", "-o", str(path)]) == 0
    west, east, south, north = _map_axes(maps.render(path, size=SIZE)).get_extent(
        ccrs.PlateCarree())
    with xr.open_dataset(path) as ds:
        track_lon = ds["longitude"].values[0]
    assert west <= np.nanmin(track_lon) and np.nanmax(track_lon) <= east < 50.0


@pytest.fixture(scope="module")
def looping_tracks(tmp_path_factory):
    # the trial's tracks: one starting in the map's lower-left corner, two crossing in a loop
    path = tmp_path_factory.mktemp("loops") / "loops.nc"
    assert main(["advect", str(REGIONAL), "--start", "47,-18,850", "--start", "50,-10,850",
                 "--start", "60,5,850", "--hours", "24", "-o", str(path)]) == 0
    return path


@pytest.mark.parametrize("projection", ["auto", "lat-lon"])
def test_track_map_shows_every_track_point_clear_of_legend_and_labels(looping_tracks,
                                                                      projection):
    # Read back from the drawn figure (matplotlib window extents, cartopy transforms of
    # the file's positions): every start and track point lies inside the map with a margin;
    # the legend's box hides none of them (sampled along each recorded segment); no two
    # time labels overlap (overlapping text is unreadable: common practice).
    fig = maps.render(looping_tracks, size=(1200, 800), projection=projection)
    ax = _map_axes(fig)
    fig.draw_without_rendering()
    with xr.open_dataset(looping_tracks) as ds:
        lat, lon = ds["latitude"].values, ds["longitude"].values
    xy = ax.projection.transform_points(ccrs.Geodetic(), lon.ravel(), lat.ravel())[:, :2]
    xy = xy.reshape(*lat.shape, 2)
    (x0, x1), (y0, y1) = ax.get_xlim(), ax.get_ylim()
    margin_x, margin_y = 0.01 * (x1 - x0), 0.01 * (y1 - y0)
    finite = np.isfinite(xy).all(axis=-1)
    assert finite[:, 0].all() and finite.sum() > 30
    inside = ((xy[..., 0] > x0 + margin_x) & (xy[..., 0] < x1 - margin_x)
              & (xy[..., 1] > y0 + margin_y) & (xy[..., 1] < y1 - margin_y))
    assert inside[finite].all()
    along = np.linspace(0.0, 1.0, 11)[:, None, None, None]
    sampled = xy[None, :, :-1] * (1 - along) + xy[None, :, 1:] * along
    sampled = sampled[np.isfinite(sampled).all(axis=-1)]
    shown = ax.transData.transform(sampled)
    legend = ax.get_legend().get_window_extent()
    hidden = ((shown[:, 0] >= legend.x0) & (shown[:, 0] <= legend.x1)
              & (shown[:, 1] >= legend.y0) & (shown[:, 1] <= legend.y1))
    assert not hidden.any()
    labels = [t for t in ax.texts if t.get_visible() and t.get_text().endswith(" h")]
    assert len(labels) >= 4  # labels are still drawn
    extents = [t.get_window_extent() for t in labels]
    for i, one in enumerate(extents):
        assert not any(one.overlaps(other) for other in extents[i + 1:])


def test_many_starts_are_thinned(tmp_path):
    tracks = trajectory_like()
    many = xr.concat([tracks] * 150, dim="trajectory")
    count = many.sizes["trajectory"]
    assert count > maps.MAX_STARTS
    fig = maps.render(many, size=SIZE)
    (starts,) = [c for c in _map_axes(fig).collections if c.get_label().startswith("start")]
    assert maps.MAX_STARTS / 2 < len(starts.get_offsets()) <= maps.MAX_STARTS
    assert f"of {count})" in starts.get_label()


def test_image_format_follows_the_suffix(files, tmp_path, capsys):
    pdf = tmp_path / "map.pdf"
    assert main(["map", str(files["global"]), "-o", str(pdf)]) == 0
    assert pdf.read_bytes()[:5] == b"%PDF-"  # ISO 32000 file header
    assert "wrote" in capsys.readouterr().out
    assert main(["map", str(files["global"]), "-o", str(tmp_path / "map.nc4")]) == 2
    err = capsys.readouterr().err
    assert err.startswith("flowpipe: error:") and ".png" in err and len(err.splitlines()) == 1


@pytest.mark.parametrize("south,north", [(0.0, 90.0), (-90.0, 0.0), (20.0, 90.0)])
def test_a_hemisphere_is_drawn_on_its_polar_cap(tmp_path, south, north):
    # A band round the globe that stays in one hemisphere (a 0..90 N file with its pole
    # row, say) is drawn on that pole's stereographic map reaching its outer row, not on
    # the globe with an empty other hemisphere (polar stereographic maps of a hemisphere,
    # common practice); the extent read back from the axes with cartopy.
    lat = np.linspace(south, north, 19)
    lon = np.arange(0.0, 360.0, 10.0)
    wind = xr.Dataset(
        {"u": (("latitude", "longitude"), np.full((lat.size, lon.size), 5.0),
               {"standard_name": "eastward_wind", "units": "m s-1"}),
         "v": (("latitude", "longitude"), np.zeros((lat.size, lon.size)),
               {"standard_name": "northward_wind", "units": "m s-1"})},
        coords={"latitude": ("latitude", lat, {"units": "degrees_north"}),
                "longitude": ("longitude", lon, {"units": "degrees_east"})})
    fig = maps.render(wind, field="u", size=SIZE)
    ax = _map_axes(fig)
    polar = ccrs.NorthPolarStereo if north > 0 else ccrs.SouthPolarStereo
    assert isinstance(ax.projection, polar)
    outer = south if north > 0 else north
    (x0, x1), (y0, y1) = ax.get_xlim(), ax.get_ylim()

    def shown(latitude: float) -> bool:
        x, y = ax.projection.transform_point(0.0, latitude, ccrs.PlateCarree())
        return x0 <= x <= x1 and y0 <= y <= y1

    assert shown(outer + 2.0 * np.sign(north + south))  # the outer rows are on the map
    assert not shown(-outer - 45.0 * np.sign(north + south))  # the other hemisphere is not


def test_time_and_level_of_unusual_names_are_found_from_their_cf_attributes(tmp_path):
    # CF 1.11 sections 4.3 and 4.4: a vertical coordinate is identified by units of pressure
    # alone, a time coordinate by units of the form "hours since ..."; cf-xarray
    # (guess_coord_axis) finds them under the file's own names, here valid and lev_p,
    # which no attribute labels as an axis. The map of a slab is that of the same slab
    # in the sample file, whose coordinates are the usual ones.
    odd = unusual_names_file(GLOBAL, tmp_path / "odd.nc")
    with xr.open_dataset(odd) as written:  # no attribute says axis or standard_name
        assert not written.cf.axes.get("T") and not written.cf.axes.get("Z")
    options = {"field": "u", "level": 500.0, "time": "2026-01-12T06:00", "size": SIZE}
    figures = [maps.render(source, **options) for source in (odd, GLOBAL)]
    titles = [_map_axes(f).get_title(loc="left") for f in figures]
    assert titles[0] == titles[1] and "500 hPa" in titles[0] and "2026-01-12T06:00" in titles[0]
    limits = [(_colour_bar(f).norm.vmin, _colour_bar(f).norm.vmax) for f in figures]
    assert limits[0] == limits[1]
