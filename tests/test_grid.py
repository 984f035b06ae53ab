"""Grid classification and quadrature weights against external references.

* Gauss-Legendre nodes and weights: :func:`numpy.polynomial.legendre.leggauss`
  (Golub & Welsch 1969, Math. Comp. 23, 221-230).
* The area of the unit sphere, 4 pi, and the exactness of Clenshaw-Curtis and
  Fejer quadrature for polynomials in cos(colatitude) (Waldvogel 2006, BIT 46,
  195-202).
"""

from __future__ import annotations

import numpy as np
import pytest

from flowpipe.grid import classify, gaussian_latitudes


def test_gaussian_latitudes_are_the_gauss_legendre_nodes():
    nodes, _ = np.polynomial.legendre.leggauss(32)
    np.testing.assert_allclose(np.sin(np.radians(gaussian_latitudes(32))), nodes, atol=1e-14)


@pytest.mark.parametrize(
    ("lat", "lon", "expected"),
    [
        (np.linspace(-90, 90, 73), np.arange(0, 360, 2.5), ("global", "equiangular", True, "CC")),
        (np.arange(-89.0, 90, 2.0), np.arange(0, 360, 2.0), ("global", "equiangular", False, "F1")),
        (gaussian_latitudes(48), np.arange(0, 360, 3.75), ("global", "gaussian", False, "GL")),
        (np.arange(-80.0, 80.1, 2.0), np.arange(0, 360, 2.0), ("band", "equiangular", False, None)),
        (np.arange(30.0, 60.1, 0.5), np.arange(-20.0, 10.1, 0.5),
         ("regional", "equiangular", False, None)),
        (np.array([-60.0, -30.0, -10.0, 0.0, 20.0, 70.0]), np.arange(0, 360, 10.0),
         ("band", "irregular", False, None)),
    ],
)
def test_classification(lat, lon, expected):
    info = classify(lat, lon)
    assert (info.kind, info.latitudes, info.poles, info.geometry) == expected
    assert info.spectral == (expected[3] is not None)


def test_float32_gaussian_latitudes_are_still_gaussian():
    lat = gaussian_latitudes(64).astype(np.float32)  # as many files store them
    assert classify(lat, np.arange(0, 360, 2.8125)).latitudes == "gaussian"


def test_nearly_gaussian_latitudes_are_not():
    lat = gaussian_latitudes(64) + 1e-4  # off by more than 1e-6 degrees
    assert classify(lat, np.arange(0, 360, 2.8125)).latitudes != "gaussian"


@pytest.mark.parametrize(
    "lat",
    [np.linspace(-90, 90, 37), np.arange(-87.5, 90, 5.0), gaussian_latitudes(36)],
    ids=["CC", "F1", "GL"],
)
def test_ring_weights_integrate_exactly(lat):
    info = classify(lat, np.arange(0, 360, 5.0))
    w = info.ring_weights()
    assert w.sum() == pytest.approx(4 * np.pi, rel=1e-13)  # area of the unit sphere
    mu = np.sin(np.radians(info.latitude))
    # Integral of mu^10 over the unit sphere: 2 pi * 2 / 11 (a polynomial of degree 10).
    assert np.sum(w * mu**10) == pytest.approx(4 * np.pi / 11, rel=1e-12)


def test_regional_cell_areas_sum_to_the_spherical_rectangle():
    lat = np.arange(30.25, 60.0, 0.5)  # cell centres of 30..60 N
    lon = np.arange(0.25, 40.0, 0.5)  # cell centres of 0..40 E
    info = classify(lat, lon)
    expected = np.radians(40.0) * (np.sin(np.radians(60.0)) - np.sin(np.radians(30.0)))
    assert info.cell_areas().sum() == pytest.approx(expected, rel=1e-12)
    assert info.ring_weights().sum() == pytest.approx(expected, rel=1e-12)
