"""Checks of flowpipe.contours against analytic cases (sources beside each)."""

from __future__ import annotations

import subprocess
import sys
import warnings
from pathlib import Path

import numpy as np
import pytest
import scipy.integrate
import scipy.special
import xarray as xr

from flowpipe import contours as C

A = C.EARTH_RADIUS
ROOT = Path(__file__).resolve().parents[1]
U = 38.61  # Williamson et al. (1992) test case 1: u0 = 2 pi a / 12 days (rounded)


def _wind(res: float, u_fn, v_fn, levels=(500.0,)) -> xr.Dataset:
    lat = np.linspace(-90, 90, int(round(180 / res)) + 1)
    lon = np.arange(0, 360, res)
    phi, lam = np.meshgrid(np.radians(lat), np.radians(lon), indexing="ij")
    u = np.broadcast_to(u_fn(phi, lam), (1, len(levels), *phi.shape))
    v = np.broadcast_to(v_fn(phi, lam), (1, len(levels), *phi.shape))
    dims = ("time", "level", "latitude", "longitude")
    ds = xr.Dataset({"u": (dims, u.copy()), "v": (dims, v.copy())},
                    coords={"time": [np.datetime64("2026-01-01")], "level": list(levels),
                            "latitude": lat, "longitude": lon})
    ds.attrs["level_type"] = "pressure"
    return ds


def _solid(res):
    return _wind(res, lambda p, lam: U * np.cos(p), lambda p, lam: 0 * p)


def test_stokes_solid_body_box_and_polar_circle():
    # Williamson et al. (1992) test case 1, alpha = 0: u = U cos(phi). Counter-clockwise
    # box: south edge eastward U cos^2(phi1) a dlam, north edge westward -> U a dlam
    # (cos^2 phi1 - cos^2 phi2) = U a dlam (sin^2 phi2 - sin^2 phi1); polar cap: 2 pi a U cos^2.
    # edges at 2/3 of a cell on every grid (x/h mod 1 in {1/3, 2/3}: the same bilinear
    # error factor t(1 - t)), so the measured order is not disturbed by the edge position
    s, n, w, e = 12 + 2 / 3, 46 + 2 / 3, 350.0, 20.0  # crosses the prime meridian
    dlam = np.radians(30.0)
    expect_box = U * A * dlam * (np.sin(np.radians(n)) ** 2 - np.sin(np.radians(s)) ** 2)
    radius = 2000.0
    phi0 = np.pi / 2 - radius * 1e3 / A
    expect_cap = 2 * np.pi * A * U * np.cos(phi0) ** 2
    errors = []
    for res in (2.0, 1.0, 0.5):
        out = C.circulation(_solid(res), [C.box(s, n, w, e), C.circle(90, 0, radius)]).compute()
        c = out.circulation.values.ravel()
        errors.append((abs(c[0] / expect_box - 1), abs(c[1] / expect_cap - 1)))
    errors = np.array(errors)
    assert errors[-1].max() <= 1e-4
    order = np.log2(errors[0, 0] / errors[-1, 0]) / 2
    assert 1.7 <= order <= 2.3


def test_gauss_outward_flux_of_polygon_vs_quadrature():
    # Velocity potential chi = a^2 Re Y_3^2 (scipy.special.sph_harm_y); divergence
    # lap chi = -l(l+1) Re Y; wind = grad chi. Reference: scipy dblquad of div.
    deg, m = 3, 2
    ylm = lambda p, lam: scipy.special.sph_harm_y(deg, m, np.pi / 2 - p, lam).real  # noqa: E731
    h = 1e-6

    def u_fn(p, lam):
        return A * (ylm(p, lam + h) - ylm(p, lam - h)) / (2 * h) / np.cos(p)

    def v_fn(p, lam):
        return A * (ylm(p + h, lam) - ylm(p - h, lam)) / (2 * h)

    lat = [10.0, 20.0, 40.0, 30.0]
    lon = [10.0, 50.0, 45.0, 5.0]
    out = C.circulation(_wind(0.5, u_fn, v_fn), [C.polygon(lat, lon)]).compute()
    la, lo = np.radians(np.append(lat, lat[0])), np.radians(np.append(lon, lon[0]))
    edges = list(zip(lo[:-1], lo[1:], la[:-1], la[1:], strict=True))

    def section(x):  # the convex polygon's latitudes on meridian x: linear between vertices
        ys = [p0 + (p1 - p0) * (x - l0) / (l1 - l0) for l0, l1, p0, p1 in edges
              if l0 != l1 and min(l0, l1) - 1e-12 <= x <= max(l0, l1) + 1e-12]
        return min(ys), max(ys)

    def div(p, lam):
        return -deg * (deg + 1) * ylm(p, lam) * A**2 * np.cos(p)
    # split at the vertices' longitudes: a smooth integrand between smooth limits on each piece
    cuts = np.sort(lo[:-1])
    ref = sum(scipy.integrate.dblquad(div, x0, x1, lambda x: section(x)[0],
                                      lambda x: section(x)[1], epsrel=1e-10)[0]
              for x0, x1 in zip(cuts[:-1], cuts[1:], strict=True))
    assert out.outward_flux.values.item() == pytest.approx(ref, rel=2e-4)


def test_kinematic_omega_constant_divergence_and_obrien():
    # Continuity in pressure coordinates, d omega / dp = -div (Holton & Hakim 2013, 3.5):
    # constant delta gives omega = -delta (p - p_bottom) exactly.
    p = np.array([100000.0, 85000.0, 70000.0, 50000.0, 30000.0])
    delta = 3e-6
    om = C.kinematic_omega(p, np.full(5, delta))
    np.testing.assert_allclose(om, -delta * (p - p[0]), rtol=1e-14)
    # O'Brien (1970): omega_c = omega - omega_top (p - p_b) / (p_t - p_b); hand-computed
    # three-layer (four-level) case: div = 1e-5, 0, -1e-5, -2e-5 at 1000, 800, 500, 200 hPa.
    p = np.array([100000.0, 80000.0, 50000.0, 20000.0])
    d = np.array([1e-5, 0.0, -1e-5, -2e-5])
    # layers: -(0.5e-5)(-2e4) = 0.1; -(-0.5e-5)(-3e4) = -0.15; -(-1.5e-5)(-3e4) = -0.45
    raw = np.array([0.0, 0.1, -0.05, -0.5])
    np.testing.assert_allclose(C.kinematic_omega(p, d), raw, atol=1e-12)
    corrected = raw - (-0.5) * (p - p[0]) / (p[-1] - p[0])
    got = C.kinematic_omega(p, d, top=0.0)
    np.testing.assert_allclose(got, corrected, atol=1e-12)
    assert got[-1] == pytest.approx(0.0, abs=1e-15)


def _trapezoid_omega(p: np.ndarray, d: np.ndarray, surface: float, top: float | None):
    """Omega of one complete column (levels from the bottom) by numpy.trapezoid of
    d omega / dp = -div from its lowest level, then O'Brien's (1970) linear correction."""
    om = np.array([surface - np.trapezoid(d[:k + 1], p[:k + 1]) for k in range(len(p))])
    if top is not None:
        om = om - (om[-1] - top) * (p - p[0]) / (p[-1] - p[0])
    return om


@pytest.mark.parametrize("top", [None, 0.0, 0.05])
def test_kinematic_omega_starts_at_the_lowest_complete_level(top):
    # O'Brien (1970), J. Appl. Meteor. 9, 197-203, the kinematic method: omega is given
    # at the column's lower boundary, the divergence integrated upward from there to the
    # top, its error spread linearly in pressure between the two. Where a contour's lowest
    # levels are missing (below the ground) that boundary is the lowest level with complete
    # data above it (*common practice*: the surface, or the lowest level above the ground);
    # the levels below stay missing. Reference: numpy.trapezoid of each complete column.
    p = np.array([100000.0, 92500.0, 85000.0, 70000.0, 50000.0, 30000.0])
    rng = np.random.default_rng(7)
    d = rng.normal(0.0, 1e-5, (5, len(p)))
    d[1, 0] = np.nan  # lowest level missing (terrain)
    d[2, :2] = np.nan  # two lowest levels missing
    d[3, 1] = np.nan  # a gap above the lowest level: the column starts above the gap
    d[4, -1] = np.nan  # the top missing: no column reaches the top
    surface = -0.02
    shuffle = np.array([3, 0, 5, 1, 4, 2])  # levels in any order
    with pytest.warns(C.FlowpipeWarning, match=r"3 of 5 columns start at 850, 925 hPa.*1 of 5 "
                      r"columns are missing at every level"):
        got = C.kinematic_omega(p[shuffle], d[:, shuffle], surface=surface, top=top)
    got = got[:, np.argsort(shuffle)]
    for column, base in ((0, 0), (1, 1), (2, 2), (3, 2)):
        expect = np.full(len(p), np.nan)
        expect[base:] = _trapezoid_omega(p[base:], d[column, base:], surface, top)
        np.testing.assert_allclose(got[column], expect, rtol=1e-12, atol=1e-15)
        assert np.isfinite(got[column, base:]).all() and np.isnan(got[column, :base]).all()
    assert np.isnan(got[4]).all()
    # a complete column is what it is alone (and says nothing): its neighbours' missing
    # levels change nothing
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        alone = C.kinematic_omega(p[shuffle], d[:1, shuffle], surface=surface, top=top)
    np.testing.assert_array_equal(alone[:, np.argsort(shuffle)][0], got[0])


def test_masked_lowest_level_gives_omega_above_it_and_says_so(tmp_path):
    # A box touching a missing point (a plateau, invented) at 1000 hPa only: its column
    # starts at 925 hPa (O'Brien 1970, lower boundary condition at the column's base; see
    # the kernel test above), equal to numpy.trapezoid of the written mean divergence from
    # there; a box away from it keeps its whole column; omega_base says which.
    levels = (1000.0, 925.0, 850.0, 700.0, 500.0, 300.0)
    wind = _wind(2.0, lambda p, lam: 10 * np.cos(p) + 3 * np.sin(2 * lam) * np.cos(p) ** 2,
                 lambda p, lam: 4 * np.cos(3 * lam) * np.cos(p), levels)
    scale = xr.DataArray(np.linspace(1.0, -0.6, len(levels)), dims="level",
                         coords={"level": list(levels)})
    plateau = (wind.level == 1000.0) & (abs(wind.latitude - 46) < 3) & (abs(wind.longitude - 10) < 3)
    wind = wind.assign(u=(wind.u * scale).where(~plateau), v=(wind.v * scale).where(~plateau))
    with pytest.warns(C.FlowpipeWarning, match=r"kinematic omega: 1 of 2 columns start at 925 hPa"):
        out = C.circulation(wind, [C.box(40, 50, 0, 10), C.box(20, 30, 40, 60)], obrien=True,
                            surface_omega=0.0, top_omega=0.0).compute()
    p = np.array(levels) * 100.0
    div = out.mean_divergence.isel(time=0).values
    om = out.omega.isel(time=0).values
    assert np.isnan(div[0, 0]) and np.isfinite(div[0, 1:]).all() and np.isfinite(div[1]).all()
    np.testing.assert_allclose(om[0, 1:], _trapezoid_omega(p[1:], div[0, 1:], 0.0, 0.0),
                               rtol=1e-10, atol=1e-15)
    assert np.isnan(om[0, 0])
    np.testing.assert_allclose(om[1], _trapezoid_omega(p, div[1], 0.0, 0.0), rtol=1e-10,
                               atol=1e-15)
    assert out.omega_base.values.ravel().tolist() == [925.0, 1000.0]
    assert out.omega.attrs["ancillary_variables"] == "omega_base"
    assert out.omega_base.attrs["units"] == "hPa"


def test_rankine_vortex_on_limited_area():
    # Rankine vortex: outside the core v = v_max R0 / r, circulation 2 pi R0 v_max at any
    # radius beyond R0 (textbook; *from memory*). Small area, f-plane-like geometry.
    lat = np.arange(34.0, 46.01, 0.2)
    lon = np.arange(-18.0, -1.99, 0.2)
    phi, lam = np.meshgrid(np.radians(lat), np.radians(lon), indexing="ij")
    p0, l0 = np.radians(40.0), np.radians(-10.0)
    x = A * np.cos(phi) * (lam - l0)
    y = A * (phi - p0)
    r = np.hypot(x, y) + 1e-9
    r0, vmax = 100e3, 30.0
    speed = np.where(r < r0, vmax * r / r0, vmax * r0 / r)
    dims = ("time", "level", "latitude", "longitude")
    ds = xr.Dataset({"u": (dims, (-speed * y / r)[None, None]), "v": (dims, (speed * x / r)[None, None])},
                    coords={"time": [np.datetime64("2026-01-01")], "level": [850.0],
                            "latitude": lat, "longitude": lon})
    out = C.circulation(ds, [C.circle(40.0, -10.0, 300.0)]).compute()
    assert out.circulation.values.item() == pytest.approx(2 * np.pi * r0 * vmax, rel=2e-2)


@pytest.mark.parametrize("args,needle", [
    (["--circle", "40,10,-5"], "radius"),
    (["--box", "80,95,0,10"], "S < N"),
    (["--box", "10,20,5,5"], "zero width"),
    (["--polygon", "POLY"], "not simple"),
])
def test_bad_input_exits_2_with_one_line(tmp_path, capsys, args, needle):
    poly = tmp_path / "bow.csv"
    poly.write_text("latitude,longitude\n40,0\n50,10\n40,10\n50,0\n")
    args = [str(poly) if a == "POLY" else a for a in args]
    code, lines = _cli(capsys, "sample_data/demo_global.nc", "-o", str(tmp_path / "o.nc"), *args)
    assert code == 2
    assert len(lines) == 1 and needle in lines[0]


def _cli(capsys, *args: str) -> tuple[int, list[str]]:
    """``flowpipe circulation ARGS`` in this process: exit code and the lines of stderr."""
    from flowpipe.cli import main

    code = main(["circulation", *args])
    return code, capsys.readouterr().err.strip().splitlines()


def test_contour_outside_limited_area_is_an_error(tmp_path):
    # a real process (the others run the command line in this one): exit 2, one line
    proc = subprocess.run([sys.executable, "-m", "flowpipe", "circulation",
                           "sample_data/demo_regional.nc", "-o", str(tmp_path / "o.nc"),
                           "--circle=-30,100,500"], capture_output=True, text=True)
    assert proc.returncode == 2
    assert "circle -30,100,500km" in proc.stderr and len(proc.stderr.strip().splitlines()) == 1


def test_dateline_box_and_off_centre_polar_circle_match_area_integrals():
    # Stokes: on solid-body rotation (Williamson et al. 1992, test case 1) the line integral
    # equals the area integral of zeta = 2 U sin(phi) / a, for a box across 180 degrees and a
    # circle that encloses the pole without being centred on it.
    out = C.circulation(_solid(0.5), [C.box(20, 50, 170, -160), C.circle(80, 30, 1500)]).compute()
    assert np.all(out.vorticity_disagreement.values < 1e-3)
    # the box's exact value: U a dlam (sin^2 phi2 - sin^2 phi1), dlam = 30 degrees
    exact = U * A * np.radians(30) * (np.sin(np.radians(50)) ** 2 - np.sin(np.radians(20)) ** 2)
    assert out.circulation.values.ravel()[0] == pytest.approx(exact, rel=1e-4)


def test_divergence_disagreement_of_a_non_divergent_flow_is_small():
    # Solid-body rotation (Williamson et al. 1992, test case 1) has no divergence: line and
    # area mean divergence are both zero to rounding, and their disagreement, on the scale of
    # the contour's kinematics (its mean vorticity, 2 U sin(phi) / a), is as small as the
    # vorticity's, not the ratio of two rounding errors.
    out = C.circulation(_solid(0.5), [C.box(30, 60, 0, 90), C.circle(90, 0, 1000),
                                      C.box(20, 50, 170, -160)]).compute()
    assert np.all(np.abs(out.mean_divergence_gridded.values) < 1e-12 * np.abs(
        out.mean_vorticity_gridded.values))  # the case: no divergence
    assert np.all(out.divergence_disagreement.values < 1e-3), out.divergence_disagreement.values
    assert np.all(out.vorticity_disagreement.values < 1e-3)


def test_line_vs_area_on_rossby_haurwitz_second_order():
    # Williamson et al. (1992) test case 6 (tests/reference_winds.py): the disagreement of line and
    # gridded-area mean vorticity falls at second order with refinement (measured order
    # 2 +- 0.3, our bound), for a box, a circle and a polygon.
    from reference_winds import case6

    shapes = [C.box(20 + 2 / 3, 50 + 2 / 3, 10.0, 60.0), C.circle(40.3, 35.1, 1500.0),
              C.polygon([20.3, 30.1, 52.7, 44.2], [10.2, 55.3, 48.9, 3.7])]
    dis = []
    for res in (1.0, 0.5):
        ds = _wind(res, lambda p, lam: case6(p, lam)["u"], lambda p, lam: case6(p, lam)["v"])
        dis.append(C.circulation(ds, shapes).compute().vorticity_disagreement.values.ravel())
    order = np.log2(dis[0] / dis[1])
    assert np.all((1.7 <= order) & (order <= 2.3)), order


def test_polygon_around_the_pole_and_circle_area():
    # A polygon winding once around the north pole, edges straight in latitude-longitude, on
    # solid-body rotation u = U cos(phi) (Williamson et al. 1992, test case 1): along an edge
    # phi(lambda) is linear, so the circulation is the sum over edges of the integral of
    # U a cos^2(phi(lambda)) dlambda, and the enclosed area the integral of
    # a^2 (1 - sin(phi(lambda))) dlambda (area of a spherical region north of a curve);
    # both by scipy.integrate.quad. Given clockwise, the polygon is the same contour.
    lat = np.array([60.0, 75.0, 65.0, 80.0, 70.0])
    lon = np.array([0.0, 80.0, 170.0, 250.0, 300.0])
    edges = list(zip(np.append(lon, 360.0)[:-1], np.append(lon, 360.0)[1:],
                     lat, np.roll(lat, -1), strict=True))

    def along(f):
        return sum(scipy.integrate.quad(
            lambda x, l0=l0, l1=l1, p0=p0, p1=p1: f(np.radians(p0 + (p1 - p0) * (x - l0) / (l1 - l0))),
            l0, l1)[0] for l0, l1, p0, p1 in edges) * np.pi / 180

    circ = along(lambda p: U * A * np.cos(p) ** 2)
    area = along(lambda p: A**2 * (1 - np.sin(p)))
    radius = 1500.0
    cap = 2 * np.pi * A**2 * (1 - np.cos(radius * 1e3 / A))  # spherical cap (common practice)
    shapes = [C.polygon(lat, lon), C.polygon(lat[::-1], lon[::-1]), C.circle(40.3, 35.1, radius)]
    out = C.circulation(_solid(0.5), shapes).compute()
    np.testing.assert_allclose(out.circulation.values.ravel()[:2], circ, rtol=1e-4)
    np.testing.assert_allclose(out.area.values[:2], area, rtol=1e-4)
    assert out.area.values[2] == pytest.approx(cap, rel=1e-4)


def test_written_geometry_is_the_regions_planar_image_anticlockwise(tmp_path):
    # CF-1.11 section 7.5: exterior rings anticlockwise viewed from above. Read back with
    # xarray, each contour's nodes (longitude, latitude) must make a valid shapely polygon
    # of positive signed area (anticlockwise, shapely.algorithms.cga.signed_area), and for
    # contours bounded by latitude circles and meridians its planar area is the region's
    # equirectangular image: dlambda (phi2 - phi1) square degrees (common practice); a
    # circle centred on a pole is the cap north (south) of latitude +-(90 - r / a).
    import shapely
    from shapely.algorithms.cga import signed_area

    import flowpipe as fp

    r = 1556.0
    rim = 90.0 - np.degrees(r * 1e3 / A)
    cases = [(C.box(30, 60, 170, -170), 20 * 30), (C.box(70, 90, 0, 360), 360 * 20),
             (C.box(-90, -70, 0, 360), 360 * 20), (C.box(-80, -60, 300, 20), 80 * 20),
             (C.circle(90, 0, r), 360 * (90 - rim)), (C.circle(-90, 40, r), 360 * (90 - rim)),
             (C.circle(76, 0, 1500), None), (C.circle(-76, 30, 2000), None),
             (C.polygon([70, 65, 72], [0, 120, 240]), None),
             (C.polygon([-70, -65, -72], [0, 120, 240]), None)]
    out = C.circulation(_solid(2.0), [c for c, _ in cases])
    with xr.open_dataset(fp.write(out, tmp_path / "g.nc")) as ds:
        counts = ds.node_count.values
        nodes = np.column_stack([ds.node_longitude.values, ds.node_latitude.values])
    for (contour, planar), ring in zip(cases, np.split(nodes, np.cumsum(counts)[:-1]),
                                       strict=True):
        poly = shapely.Polygon(ring)
        assert poly.is_valid, contour.name
        assert signed_area(poly.exterior) > 0, contour.name
        if planar is not None:
            assert poly.area == pytest.approx(planar, rel=1e-9), contour.name
    # the drawing nodes are only a description: the polar cap's line integral is still the
    # solid-body value 2 pi a U cos^2(phi) (Williamson et al. 1992, test case 1)
    cap = out.circulation.values.reshape(-1)[4]
    assert cap == pytest.approx(2 * np.pi * A * U * np.cos(np.radians(rim)) ** 2, rel=1e-3)


def _great_circle(lat0: float, lon0: float, heading: float, angle: np.ndarray) -> np.ndarray:
    # Unit vectors c0 cos(angle) + d0 sin(angle): uniform motion along the great circle
    # leaving (lat0, lon0) with the given heading (spherical geometry, common practice).
    p, lam, h = np.radians(lat0), np.radians(lon0), np.radians(heading)
    c0 = np.array([np.cos(p) * np.cos(lam), np.cos(p) * np.sin(lam), np.sin(p)])
    east = np.array([-np.sin(lam), np.cos(lam), 0.0])
    north = np.array([-np.sin(p) * np.cos(lam), -np.sin(p) * np.sin(lam), np.cos(p)])
    d0 = np.cos(h) * north + np.sin(h) * east
    return np.cos(angle)[:, None] * c0 + np.sin(angle)[:, None] * d0


def _vortex_speed(r):
    # smooth vortex, maximum 30 m s-1 at 300 km (the profile of the regional demo storm)
    rr = r / 300e3
    return 30.0 * rr * np.exp(0.5 * (1.0 - rr**2))


def test_moving_circle_follows_translating_vortex(tmp_path):
    # An axisymmetric vortex V(r) about a centre c(t) moving uniformly along a great circle;
    # the wind at x is V(r) (c x x)/|c x x|, r = a arccos(c.x). By the definition of
    # circulation (Holton & Hakim 2013, section 4.1; Stokes's theorem) a circle of radius R
    # centred on c(t) has 2 pi a sin(R/a) V(R) at every time: it stays constant as the circle
    # follows the vortex. The track gives the centre every 12 h only; the data are 6-hourly,
    # so half the centres come from interpolation in time, which along a great circle at
    # uniform speed must hit c(t) exactly.
    hours = np.arange(0, 25, 6.0)
    centres = _great_circle(20.0, 300.0, 40.0, np.radians(2.5) * hours / 6)  # 46 km per hour
    lat = np.linspace(-90, 90, 361)
    lon = np.arange(0, 360, 0.5)
    phi, lam = np.meshgrid(np.radians(lat), np.radians(lon), indexing="ij")
    x = np.stack([np.cos(phi) * np.cos(lam), np.cos(phi) * np.sin(lam), np.sin(phi)], -1)
    east = np.stack([-np.sin(lam), np.cos(lam), 0 * lam], -1)
    north = np.stack([-np.sin(phi) * np.cos(lam), -np.sin(phi) * np.sin(lam), np.cos(phi)], -1)
    u, v = np.empty((len(hours), 1, *phi.shape)), np.empty((len(hours), 1, *phi.shape))
    for t, c in enumerate(centres):
        axis = np.cross(c, x)
        sine = np.linalg.norm(axis, axis=-1)
        w = (_vortex_speed(A * np.arctan2(sine, x @ c)) / np.maximum(sine, 1e-300))[..., None] * axis
        u[t, 0], v[t, 0] = (w * east).sum(-1), (w * north).sum(-1)
    times = np.datetime64("2026-01-12T00:00", "ns") + (hours * 3600e9).astype("timedelta64[ns]")
    dims = ("time", "level", "latitude", "longitude")
    ds = xr.Dataset({"u": (dims, u), "v": (dims, v)},
                    coords={"time": times, "level": [850.0], "latitude": lat, "longitude": lon})
    ds.attrs["level_type"] = "pressure"
    c_lat = np.degrees(np.arcsin(centres[:, 2]))
    c_lon = np.degrees(np.arctan2(centres[:, 1], centres[:, 0]))
    track = tmp_path / "storm.csv"
    track.write_text("time,latitude,longitude\n" + "".join(
        f"{str(times[t])[:16]},{float(c_lat[t])!r},{float(c_lon[t])!r}\n" for t in (0, 2, 4)))
    radius = 600.0
    out = C.circulation(ds, [C.read_track(track, radius), C.circle(c_lat[0], c_lon[0], radius)]
                        ).compute()
    np.testing.assert_allclose(out.centre_latitude.isel(contour=0), c_lat, atol=1e-9)
    np.testing.assert_allclose(out.centre_longitude.isel(contour=0), c_lon, atol=1e-9)
    expect = 2 * np.pi * A * np.sin(radius * 1e3 / A) * _vortex_speed(radius * 1e3)
    moving, fixed = out.circulation.isel(level=0).values  # (contour, time)
    np.testing.assert_allclose(moving, expect, rtol=1e-3)
    assert abs(fixed[-1] / expect - 1) > 0.5  # the circle left behind loses the vortex
    assert str(out.contour_name.values[0]) == "storm"


@pytest.mark.parametrize("track,extra,needle", [
    ("time,latitude,longitude\n2026-01-12T06:00,50,-20\n2026-01-13T00:00,52.4,-10.4\n",
     ["--radius-km", "500"], "covers 2026-01-12T06:00"),
    ("time,latitude,longitude\n2026-01-12T00:00,50,-20\n2026-01-13T00:00,52.4,-10.4\n",
     [], "--radius-km"),
    ("time,latitude,longitude\n2026-01-12T00:00,50,-20\n2026-01-13T00:00,52.4,-10.4\n",
     ["--radius-km", "0"], "radius must be > 0"),
    ("time,latitude,longitude\n2026-01-13T00:00,50,-20\n2026-01-12T00:00,52.4,-10.4\n",
     ["--radius-km", "500"], "strictly increasing"),
    ("time,lat,lon\n2026-01-12T00:00,50,-20\n", ["--radius-km", "500"], "header"),
    ("time,latitude,longitude\nyesterday,50,-20\n", ["--radius-km", "500"], "line 2"),
])
def test_bad_track_exits_2_with_one_line(tmp_path, capsys, track, extra, needle):
    path = tmp_path / "track.csv"
    path.write_text(track)
    code, lines = _cli(capsys, "sample_data/demo_regional.nc", "-o", str(tmp_path / "o.nc"),
                       "--follow", str(path), *extra)
    assert code == 2
    assert len(lines) == 1 and needle in lines[0]
    assert not (tmp_path / "o.nc").exists()


def _run_config(tmp_path, table: str):
    from flowpipe.cli import main

    (tmp_path / "storm.csv").write_text(  # covers the 48 hours of the global sample
        "time,latitude,longitude\n2026-01-12T00:00,50.0,-20.0\n2026-01-14T00:00,54.8,-0.8\n")
    path = tmp_path / "night.toml"
    path.write_text(f'[input]\npaths = ["{ROOT}/sample_data/demo_global.nc"]\n\n'
                    f'[circulation]\n{table}\n[output]\ndirectory = "out"\n')
    return main(["run", str(path)])


def test_batch_maps_of_circulation_output(tmp_path):
    # configs/README.md, [maps] circulation: with a [circulation] table, one map per level of
    # its output ({stem}_mean_vorticity_{level}.png), a PNG of the [maps] size read back by
    # matplotlib's image reader (PNG specification, IHDR), not blank; none with
    # circulation = false.
    import matplotlib.image

    table = 'boxes = [[45.0, 55.0, -25.0, -5.0]]\nlevels = [850.0, 500.0]\n\n[maps]\nfields = []\n'
    assert _run_config(tmp_path, table) == 0
    pictures = sorted((tmp_path / "out").glob("*.png"))
    assert [p.name for p in pictures] == ["demo_global_mean_vorticity_500.png",
                                          "demo_global_mean_vorticity_850.png"]
    for picture in pictures:
        image = matplotlib.image.imread(picture)
        assert image.shape[:2] == (800, 1200) and image[..., :3].std() > 0.05
    for picture in pictures:
        picture.unlink()
    assert _run_config(tmp_path, table.replace("fields = []", "fields = []\nlevels = [500.0, 300.0]")) == 0
    # [maps] levels limit them too (300 hPa: not in this output, so no map of it)
    assert [p.name for p in (tmp_path / "out").glob("*.png")] == [
        "demo_global_mean_vorticity_500.png"]
    (tmp_path / "out" / "demo_global_mean_vorticity_500.png").unlink()
    assert _run_config(tmp_path, table.replace("fields = []", "fields = []\ncirculation = false")) == 0
    assert not list((tmp_path / "out").glob("*.png"))


def test_circulation_table_in_batch_config(tmp_path):
    # configs/README.md, [circulation]: the batch stage writes what the API computes for the
    # same contours (read back with netCDF-C through xarray), named {stem}_circulation.nc.
    import flowpipe as fp

    table = ('boxes = [[45.0, 55.0, -25.0, -5.0]]\ntracks = ["storm.csv"]\n'
             'track_radius_km = 500\nobrien = true\n')
    assert _run_config(tmp_path, table) == 0
    out = tmp_path / "out" / "demo_global_circulation.nc"
    wind = fp.open_wind("sample_data/demo_global.nc")
    expect = C.circulation(wind, [C.box(45.0, 55.0, -25.0, -5.0),
                                  C.read_track(tmp_path / "storm.csv", 500.0)], obrien=True)
    with xr.open_dataset(out) as got:
        assert list(got.contour_name.values) == ["box 45,55,-25,-5", "storm"]
        for name in ("circulation", "outward_flux", "omega", "centre_latitude"):
            np.testing.assert_allclose(got[name].values, expect[name].values, rtol=1e-12)
        assert "O'Brien" in got.attrs["omega_correction"]


@pytest.mark.parametrize("table,needle", [
    ("boxes = [[55.0, 45.0, -25.0, -5.0]]\n", "line 5: [circulation] boxes: contour"),
    ("circles = [[50.0, -20.0, 0]]\n", "radius must be > 0"),
    ('tracks = ["storm.csv"]\n', "line 5: [circulation] tracks need track_radius_km"),
    ('polygons = ["nowhere.csv"]\n', "nowhere.csv does not exist"),
    ("obrien = true\n", "needs at least one contour"),
])
def test_circulation_table_errors_name_the_key(tmp_path, capsys, table, needle):
    # configs/README.md: config errors name the key and its line, exit 2, nothing written.
    assert _run_config(tmp_path, table) == 2
    err = capsys.readouterr().err.strip()
    assert needle in err and len(err.splitlines()) == 1
    assert not (tmp_path / "out").exists()


def test_readme_storm_example_stores_centre_and_geometry(tmp_path):
    # The README's storm-centred example (sample_data/demo_storm_track.csv), read back with
    # netCDF-C (netCDF4): the moving circle's centre per (contour, time) and its radius, the
    # geometry (CF-1.11 section 7.5) at the first time. Distances and the great circle by
    # pyproj.Geod (PROJ's geodesics, on a sphere of flowpipe's radius): every node of the
    # circle lies R from the first centre; the centres at the track's times are the track's
    # points, and the one between two of them lies halfway along the great circle.
    import netCDF4
    import pyproj

    from flowpipe.cli import main

    out = tmp_path / "storm.nc"
    assert main(["circulation", "sample_data/demo_regional.nc", "-o", str(out), "--follow",
                 "sample_data/demo_storm_track.csv", "--radius-km", "500",
                 "--box", "46,56,-26,-4"]) == 0
    geod = pyproj.Geod(a=A, b=A)
    with netCDF4.Dataset(out) as nc:
        assert nc["centre_latitude"].dimensions == ("contour", "time")  # CF-1.11 section 2.4
        assert nc["centre_longitude"].dimensions == ("contour", "time")
        names = list(nc["contour_name"][:])
        assert names == ["demo_storm_track", "box 46,56,-26,-4"]  # the command line's order
        lat = nc["centre_latitude"][:].filled(np.nan).T  # (time, contour), track first
        lon = nc["centre_longitude"][:].filled(np.nan).T
        radius = nc["radius"][:].filled(np.nan)
        assert np.isnan(lat[:, 1]).all() and np.isnan(radius[1])  # the box has none
        assert radius[0] == 500e3
        np.testing.assert_allclose(lat[::2, 0], [50.0, 51.2, 52.4], atol=1e-9)
        np.testing.assert_allclose(lon[::2, 0], [-20.0, -15.2, -10.4], atol=1e-9)
        _, _, d1 = geod.inv(lon[0, 0], lat[0, 0], lon[1, 0], lat[1, 0])
        _, _, d2 = geod.inv(lon[1, 0], lat[1, 0], lon[2, 0], lat[2, 0])
        _, _, d = geod.inv(lon[0, 0], lat[0, 0], lon[2, 0], lat[2, 0])
        assert d1 == pytest.approx(d / 2, rel=1e-9) and d2 == pytest.approx(d / 2, rel=1e-9)
        geometry = nc[nc["circulation"].geometry]
        assert geometry.geometry_type == "polygon"
        count = nc[geometry.node_count][0]  # the circle's nodes, then the box's
        xname, yname = geometry.node_coordinates.split()
        node_lon, node_lat = nc[xname][:count], nc[yname][:count]
        _, _, r = geod.inv(np.full(count, lon[0, 0]), np.full(count, lat[0, 0]),
                           node_lon, node_lat)
        np.testing.assert_allclose(r, 500e3, rtol=1e-9)
        assert nc["circulation"].dimensions == ("contour", "time", "level")
        circ = nc["circulation"][0]
    # the README's claim: the following circle keeps the storm's circulation (to 0.3 %)
    assert np.ptp(circ, axis=0).max() < 3e-3 * np.abs(circ).min()


def test_sample_track_is_the_one_make_sample_data_writes(tmp_path, monkeypatch):
    # sample_data/make_sample_data.py writes demo_storm_track.csv from the storm's centre
    # formula; what it writes is byte for byte the committed file (regenerated files equal
    # the committed ones: common practice), and each point is the storm's centre in the data:
    # where the wind less the uniform 10 m s-1 westerly the storm drifts in vanishes (within
    # 2 degrees, well inside its 400 km radius of maximum wind; far out it vanishes again).
    monkeypatch.syspath_prepend(str(ROOT / "sample_data"))
    import make_sample_data

    make_sample_data.make_track(tmp_path / "track.csv")
    committed = ROOT / "sample_data" / "demo_storm_track.csv"
    assert (tmp_path / "track.csv").read_bytes() == committed.read_bytes()
    with xr.open_dataset(ROOT / "sample_data" / "demo_regional.nc") as ds:
        for time, lat, lon in (("2026-01-12T00:00", 50.0, -20.0), ("2026-01-12T12:00", 51.2, -15.2),
                               ("2026-01-13T00:00", 52.4, -10.4)):
            slab = ds.sel(time=np.datetime64(time)).isel(pressure=0).sel(  # north to south
                latitude=slice(lat + 2, lat - 2), longitude=slice(lon - 2, lon + 2))
            calm = np.hypot(slab.uwind - 10.0, slab.vwind)
            found = calm.where(calm == calm.min(), drop=True)
            assert abs(float(found.latitude[0]) - lat) <= 0.25
            assert abs(float(found.longitude[0]) - lon) <= 0.25


def test_circulation_shows_slabs_on_a_terminal_and_nothing_quiet(tmp_path):
    # tqdm draws its bar with carriage returns and N/M counts (tqdm documentation, "Usage");
    # the pseudo-terminal of the standard library's pty module is a terminal (isatty).
    from test_progress import _on_terminal
    from windfiles import small_global_file

    wind = small_global_file(tmp_path, 3)
    args = ["circulation", str(wind), "-o", str(tmp_path / "box.nc"), "--box", "30,60,-40,0"]
    code, shown = _on_terminal(args)
    assert code == 0
    assert "circulation" in shown and "slab" in shown and "\r" in shown
    assert "6/6" in shown  # 3 times x 2 levels, all integrated
    code, shown = _on_terminal([*args, "--quiet"])
    assert code == 0 and shown == ""


def test_contours_are_written_in_the_order_the_command_line_gives(tmp_path, capsys):
    # the contour dimension follows the command line, whatever the kinds (common practice:
    # a user reads contour k as the k-th given); twice in one process, so that nothing of
    # the first call's list is carried into the second
    for first, second in ((["--circle", "90,0,1000"], ["--box", "30,60,0,90"]),
                          (["--box", "30,60,0,90"], ["--circle", "90,0,1000"])):
        out = tmp_path / f"{first[0].strip('-')}.nc"
        code, _ = _cli(capsys, "sample_data/demo_global.nc", "-o", str(out), "--quiet",
                       *first, *second, "--circle", "-45,100,800")
        assert code == 0
        with xr.open_dataset(out) as ds:
            names = [str(n) for n in ds.contour_name.values]
        assert len(names) == 3 and names[2] == "circle -45,100,800km", names
        assert names[0].startswith(first[0].strip("-")) and names[1].startswith(
            second[0].strip("-")), names
