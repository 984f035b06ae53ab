"""Masked complete global levels: the spectral route with a harmonic (Laplace) fill and the
unresolved remainder.

Analytic wind: the Rossby-Haurwitz wave of Williamson et al. (1992, J. Comput. Phys.
102, 211-224, test case 6; tests/reference_winds.py) plus a divergent part built of
spherical harmonics from scipy.special.sph_harm_y (the reference library).
"""

from __future__ import annotations

import numpy as np
from reference_winds import case6, latitudes, mesh, potential_flow, wind_dataset
from scipy.spatial import cKDTree

import flowpipe as fp
from flowpipe.constants import EARTH_RADIUS
from flowpipe.decompose import helmholtz_slab
from flowpipe.grid import describe_grid
from flowpipe.masked import masked_helmholtz_slab

GEOMETRY, NLAT, NLON = "GL", 64, 128
FIELDS = ("streamfunction", "velocity_potential", "vorticity", "divergence",
          "u_rotational", "v_rotational", "u_divergent", "v_divergent")


def _case():
    lat = latitudes(GEOMETRY, NLAT)
    lon, phi, lam = mesh(lat, NLON)
    rot, div = case6(phi, lam), potential_flow(phi, lam, psi_terms=())
    exact = {"u_rot": rot["u"], "v_rot": rot["v"], "u_div": div["u_div"], "v_div": div["v_div"]}
    u, v = rot["u"] + div["u_div"], rot["v"] + div["v_div"]

    def blob(lat0, lon0, radius):
        p0, l0 = np.radians(lat0), np.radians(lon0)
        cosd = np.sin(phi) * np.sin(p0) + np.cos(phi) * np.cos(p0) * np.cos(lam - l0)
        return np.degrees(np.arccos(np.clip(cosd, -1.0, 1.0))) < radius

    mask = blob(30, 90, 12) | blob(-20, 290, 8) | blob(45, 250, 10) | (np.degrees(phi) < -75)
    return lat, lon, phi, lam, u, v, exact, mask


def _angular_distance_to(mask, phi, lam):
    """Great-circle distance in degrees from every point to the nearest masked point
    (chord lengths from scipy.spatial.cKDTree, the reference library)."""
    def xyz(p, la):
        return np.stack([np.cos(p) * np.cos(la), np.cos(p) * np.sin(la), np.sin(p)], axis=-1)
    chord, _ = cKDTree(xyz(phi[mask], lam[mask])).query(xyz(phi, lam).reshape(-1, 3))
    return np.degrees(2.0 * np.arcsin(chord / 2.0)).reshape(mask.shape)


def test_masked_level_is_reconstructed_at_valid_points_and_missing_in_every_output():
    lat, lon, phi, lam, u, v, exact, mask = _case()
    wind = wind_dataset(np.where(mask, np.nan, u), np.where(mask, np.nan, v), lat, lon)
    parts = fp.decompose(wind)  # auto: a gappy complete global grid takes the masked route
    assert parts.attrs["method"] == "spectral" and "Laplace" in parts.attrs["masked_points"]
    for name in FIELDS + ("u_unresolved", "v_unresolved"):
        values = parts[name].values
        assert np.isnan(values[mask]).all(), name
        assert np.isfinite(values[~mask]).all(), name
    scale = np.max(np.hypot(u, v))
    # rotational + divergent + unresolved = wind at every valid point, to 1e-6 relative
    # (our choice), against the analytic wind itself.
    du = parts["u_rotational"].values + parts["u_divergent"].values \
        + parts["u_unresolved"].values - u
    dv = parts["v_rotational"].values + parts["v_divergent"].values \
        + parts["v_unresolved"].values - v
    assert np.max(np.hypot(du, dv)[~mask]) / scale <= 1e-6
    assert float(parts.attrs["reconstruction_error"]) <= 1e-6
    # The unresolved part is small but not at rounding level next to the mask: the Laplace
    # fill has kinks at the mask edge, so the filled wind is not band-limited. Measured on
    # this case: 8.3e-3 max relative, 9.6e-4 area-weighted 2-norm. Bound: 1e-2 (our choice).
    rest = np.hypot(parts["u_unresolved"].values, parts["v_unresolved"].values)
    assert np.max(rest[~mask]) / scale <= 1e-2
    # The reported share is the area-weighted norm over the valid points (Gauss-Legendre
    # weights of numpy.polynomial.legendre.leggauss, the reference library).
    w = np.polynomial.legendre.leggauss(NLAT)[1][:, None] * ~mask
    expected = np.sqrt(np.nansum(w * rest**2) / np.sum(w * (u**2 + v**2)))
    assert abs(float(parts.attrs["unresolved_fraction"]) - expected) <= 1e-9 * expected
    assert 1e-5 <= expected <= 1e-2


def test_auto_takes_the_masked_spectral_route_only_for_gappy_complete_global_grids(
        monkeypatch):
    # The method choice of flowpipe.decompose (README.md, "Methods"): spherical harmonics on every complete
    # global grid, masked or not; the regional solver is not called for them.
    import flowpipe.regional

    calls = []
    monkeypatch.setattr(flowpipe.regional, "decompose_regional",
                        lambda wind, **options: calls.append(options))
    lat, lon, phi, lam, u, v, exact, mask = _case()
    gappy = fp.decompose(wind_dataset(np.where(mask, np.nan, u), v, lat, lon))
    plain = fp.decompose(wind_dataset(u, v, lat, lon))
    assert calls == []
    assert "masked_points" in gappy.attrs and "u_unresolved" in gappy
    assert "masked_points" not in plain.attrs and "u_unresolved" not in plain
    assert plain.attrs["method"] == gappy.attrs["method"] == "spectral"


def test_divergence_of_the_rotational_and_vorticity_of_the_divergent_wind_vanish():
    # Independent centred differences in spherical coordinates (second order, common
    # practice): div(V) = (du/dlam + d(v cos phi)/dphi) / (a cos phi), curl likewise. At
    # valid points whose stencil is valid, within 1 % of the largest vorticity (our choice).
    lat, lon, phi, lam, u, v, exact, mask = _case()
    parts = fp.decompose(wind_dataset(np.where(mask, np.nan, u), np.where(mask, np.nan, v),
                                      lat, lon))
    dlam = 2 * np.pi / NLON

    def d_lam(f):
        return (np.roll(f, -1, axis=1) - np.roll(f, 1, axis=1)) / (2 * dlam)

    def d_phi(f):
        out = np.full_like(f, np.nan)
        out[1:-1] = (f[2:] - f[:-2]) / (phi[2:] - phi[:-2])
        return out

    c = np.cos(phi)
    ur, vr = parts["u_rotational"].values, parts["v_rotational"].values
    ud, vd = parts["u_divergent"].values, parts["v_divergent"].values
    div_rot = (d_lam(ur) + d_phi(vr * c)) / (EARTH_RADIUS * c)
    curl_div = (d_lam(vd) - d_phi(ud * c)) / (EARTH_RADIUS * c)
    zeta = (d_lam(v) - d_phi(u * c)) / (EARTH_RADIUS * c)  # of the whole analytic wind
    from scipy.ndimage import binary_dilation

    # Points more than two grid steps from the mask, away from the pole rows. Measured: 0.81 %
    # (rotational) and 0.81 % (divergent) there; 1.2 % on the points next to the mask, where
    # the parts carry the grid-scale ringing of the fill; the same operator on the analytic
    # rotational wind gives 0.36 % (its own truncation error at 2.8 degrees).
    inner = np.isfinite(div_rot) & np.isfinite(curl_div) & (np.abs(np.degrees(phi)) < 80) \
        & ~binary_dilation(mask, iterations=2)
    largest = np.nanmax(np.abs(zeta))
    assert np.max(np.abs(div_rot[inner])) <= 1e-2 * largest
    assert np.max(np.abs(curl_div[inner])) <= 1e-2 * largest


def test_away_from_the_mask_the_parts_match_the_analytic_split_better_than_regional():
    lat, lon, phi, lam, u, v, exact, mask = _case()
    wind = wind_dataset(np.where(mask, np.nan, u), np.where(mask, np.nan, v), lat, lon)
    far = _angular_distance_to(mask, phi, lam) >= 5.0
    scale = np.max(np.hypot(u, v))

    def worst(parts):
        rot = np.hypot(parts["u_rotational"].values - exact["u_rot"],
                       parts["v_rotational"].values - exact["v_rot"])
        div = np.hypot(parts["u_divergent"].values - exact["u_div"],
                       parts["v_divergent"].values - exact["v_div"])
        return max(rot[far].max(), div[far].max()) / scale

    # Measured on this 64 x 128 Gauss-Legendre case (>= 5 degrees from the mask, max error of
    # the rotational / divergent wind relative to max |wind|): Laplace-filled spectral 2.5e-2,
    # regional variational solver 1.9e-1.
    filled = worst(fp.decompose(wind))
    regional = worst(fp.decompose(wind, method="regional"))
    assert filled <= regional
    assert filled <= 0.05


def test_unmasked_level_through_the_masked_kernel_equals_the_spectral_kernel():
    lat, lon, phi, lam, u, v, exact, mask = _case()
    grid = describe_grid(wind_dataset(u, v, lat, lon))
    options = {"geometry": GEOMETRY, "truncation": NLAT - 1, "radius": EARTH_RADIUS,
               "weights": grid.ring_weights()}
    plain = helmholtz_slab(u, v, **options)
    through = masked_helmholtz_slab(u, v, spectral_kernel=helmholtz_slab, latitude=lat,
                                    **options)
    for a, b in zip(plain[:8], through[:8], strict=True):
        assert np.max(np.abs(a - b)) <= 1e-9 * max(np.max(np.abs(a)), 1e-300)


def test_complete_levels_of_a_masked_file_carry_the_unresolved_remainder_too():
    # A wind with grid-scale noise is not band-limited, so the spectral parts leave a
    # remainder on a complete level as well. In a file whose other level has missing
    # points, rotational + divergent + unresolved must still be the wind at every point of
    # the complete level (README), with the remainder's share the reconstruction error the
    # plain spectral route gives that level decomposed on its own.
    lat, lon, phi, lam, u, v, exact, mask = _case()
    noise = np.random.default_rng(5).standard_normal((2,) + u.shape)
    u, v = u + noise[0], v + noise[1]
    levels = [np.stack([np.where(mask, np.nan, c), c]) for c in (u, v)]
    wind = wind_dataset(levels[0], levels[1], lat, lon, levels=[850.0, 500.0])
    parts = fp.decompose(wind)
    assert "u_unresolved" in parts
    alone = fp.decompose(wind_dataset(u, v, lat, lon))  # complete: the plain spectral route
    full = parts.sel(level=500.0)
    for c, name in (("u", u), ("v", v)):
        total = full[f"{c}_rotational"] + full[f"{c}_divergent"] + full[f"{c}_unresolved"]
        assert np.max(np.abs(total.values - name)) <= 1e-12 * np.max(np.abs(name))
    assert float(full["unresolved_fraction"]) > 1e-3  # the noise is not resolved away
    np.testing.assert_allclose(float(full["unresolved_fraction"]),
                               float(alone["reconstruction_error"]), rtol=1e-9)
    assert float(full["reconstruction_error"]) == 0.0


def test_a_band_limited_float32_wind_leaves_no_unresolved_wind_but_its_rounding():
    # The analytic wind is band-limited, so stored as float32 (IEEE 754 binary32, relative
    # rounding up to 2**-24) all it differs from the band-limited parts by is its storage
    # rounding: that is not written as unresolved wind (zeros, which compress to nothing),
    # and the parts still give the wind to within it.
    lat, lon, phi, lam, u, v, exact, mask = _case()
    u32, v32 = u.astype(np.float32), v.astype(np.float32)
    wind = wind_dataset(np.stack([np.where(mask, np.nan, u32), u32]),
                        np.stack([np.where(mask, np.nan, v32), v32]), lat, lon,
                        levels=[850.0, 500.0])
    full = fp.decompose(wind).sel(level=500.0).compute()
    eps = float(np.finfo(np.float32).eps)
    for c, given in (("u", u32), ("v", v32)):
        assert np.count_nonzero(full[f"{c}_unresolved"].values) == 0, c
        parts = full[f"{c}_rotational"].values + full[f"{c}_divergent"].values
        assert np.max(np.abs(parts - given)) <= eps * max(np.abs(u32).max(), np.abs(v32).max())
    assert float(full["unresolved_fraction"]) == 0.0


def test_lazy_masked_levels_compute_nothing_while_building():
    # The missing points are found inside each slab task: building the result must not run
    # the dask graph (a scheduler that raises, per dask's documented `scheduler=` callable).
    import dask

    lat, lon, phi, lam, u, v, exact, mask = _case()
    uu = np.stack([np.where(mask, np.nan, u), u])
    vv = np.stack([np.where(mask, np.nan, v), v])
    wind = wind_dataset(uu, vv, lat, lon, levels=np.array([850.0, 500.0])).chunk({"level": 1})

    def refuse(*args, **kwargs):
        raise AssertionError("computed while building")

    with dask.config.set(scheduler=refuse):
        parts = fp.decompose(wind, method="spectral")
    assert parts["streamfunction"].data.numblocks == (2, 1, 1)
    assert parts["u_unresolved"].data.numblocks == (2, 1, 1)
    computed = parts.compute()
    assert np.isnan(computed["streamfunction"].values[0][mask]).all()
    assert np.isfinite(computed["streamfunction"].values[1]).all()
