"""Approximating signals in a basis: error by hand, convergence, clamping, errors."""

from __future__ import annotations

import numpy as np
import pytest

from engine.spectra.approximation import Approximation, Basis, LaplacianBasis, approximate, relative_error
from engine.spectra.products import least_squares_products, orthogonal_products
from tests.test_products import _eigenpairs


@pytest.fixture(scope="module")
def sphere():
    # icosphere(4): 2,562 vertices, degrees 0..6 complete in 49 pairs
    return _eigenpairs("icosphere:4", 49)


def test_relative_error_by_hand():
    m = np.array([1.0, 2.0, 1.0])
    exact = np.array([1.0, 1.0, 1.0])
    approx = np.array([1.0, 2.0, 1.0])
    # ||diff||_M^2 = 2 * 1^2 = 2, ||exact||_M^2 = 4  ->  sqrt(1/2)
    assert relative_error(approx, exact, m) == pytest.approx(np.sqrt(0.5), rel=1e-15)
    two = np.column_stack([exact, 2 * exact])
    got = relative_error(np.column_stack([approx, 2 * exact]), two, m, per_channel=True)
    np.testing.assert_allclose(got, [np.sqrt(0.5), 0.0], rtol=1e-15)
    # combined: sqrt((2 + 0) / (4 + 16))
    assert relative_error(np.column_stack([approx, 2 * exact]), two, m) == pytest.approx(np.sqrt(0.1), rel=1e-15)


def test_zero_signal_conventions():
    m = np.ones(4)
    z = np.zeros(4)
    assert relative_error(z, z, m) == 0.0  # a zero signal reconstructed exactly: no error
    assert relative_error(z + 1e-3, z, m) == np.inf  # no relative scale: inf, never NaN
    per = relative_error(np.column_stack([z, z + 1]), np.column_stack([z, z + 2]), m, per_channel=True)
    np.testing.assert_array_equal(per, [0.0, 0.5])


def test_error_decreases_with_basis_size(sphere):
    v, _, lam, phi, m = sphere
    f = np.exp(v[:, 0]) + np.sin(2 * v[:, 1])  # smooth, not band-limited
    errs = [approximate(f, LaplacianBasis(phi[:, :k], m), m).relative_error for k in (1, 4, 9, 16, 25, 36, 49)]
    assert all(b < a for a, b in zip(errs, errs[1:]))
    assert errs[-1] < 1e-3  # measured 1.2e-4 (1: 0.65, 4: 0.15, 9: 0.11, 16: 6e-3, 36: 1.3e-4)
    # a degree <= 2 polynomial lies in the first 9 eigenfunctions (spherical harmonics, up to discretisation)
    p = 1 + v[:, 0] - 2 * v[:, 1] * v[:, 2]
    assert approximate(p, LaplacianBasis(phi[:, :9], m), m).relative_error < 1e-3  # measured 1.3e-4


def test_product_basis_error_decreases_with_order(sphere):
    v, _, lam, phi, m = sphere
    f = np.exp(2 * v[:, 2]) * (1 + v[:, 0])
    errs = [approximate(f, orthogonal_products(phi, m, order, K=4), m).relative_error for order in (1, 2, 3, 4)]
    assert all(b < a for a, b in zip(errs, errs[1:]))  # measured 0.39, 0.15, 0.041, 0.0092
    ls = approximate(f, least_squares_products(phi, m, 4, K=4), m).relative_error
    assert ls <= errs[-1] + 1e-9  # the least-squares baseline keeps every direction


def test_vector_signal_channels(sphere):
    v, _, lam, phi, m = sphere
    basis = LaplacianBasis(phi[:, :16], m)
    a = approximate(v ** 2, basis, m)
    assert isinstance(a, Approximation) and isinstance(basis, Basis)
    assert a.values.shape == v.shape and a.channel_errors.shape == (3,) and a.coefficients.shape == (16, 3)
    # combined error is the root of the summed squared errors over the summed squared norms
    d = a.values - v ** 2
    assert a.relative_error == pytest.approx(np.sqrt((m @ d**2).sum() / (m @ v**4).sum()), rel=1e-12)
    assert a.relative_error < 1e-3  # x^2 is degree 0 + 2; measured 2.0e-4


def test_clamping_bounded_signal(sphere):
    v, _, lam, phi, m = sphere
    colour = np.column_stack([(v[:, 0] > 0.2).astype(float), 0.5 + 0.5 * v[:, 1], np.ones(len(m))])
    basis = LaplacianBasis(phi[:, :25], m)
    free = approximate(colour, basis, m)
    clamped = approximate(colour, basis, m, clamp=(0, 1))
    assert free.values.min() < -0.01 and free.values.max() > 1.01  # a step rings (Gibbs)
    assert clamped.values.min() >= 0 and clamped.values.max() <= 1
    # clipping towards a range holding the exact values can only bring each value closer
    assert (clamped.channel_errors <= free.channel_errors + 1e-15).all()
    assert clamped.relative_error < free.relative_error


def test_approximation_errors(sphere):
    v, _, lam, phi, m = sphere
    basis = LaplacianBasis(phi[:, :4], m)
    with pytest.raises(ValueError, match="clamp must be finite with low <= high, got"):
        approximate(v[:, 0], basis, m, clamp=(1, 0))
    with pytest.raises(ValueError, match="clamp must be a"):
        approximate(v[:, 0], basis, m, clamp=(0,))
    with pytest.raises(ValueError, match="basis must have project"):
        approximate(v[:, 0], object(), m)
    with pytest.raises(ValueError, match=rf"signal must have shape \({len(m)},\)"):
        approximate(v[:-1, 0], basis, m)
    with pytest.raises(ValueError, match="signal has 1 non-finite"):
        approximate(np.where(np.arange(len(m)) == 3, np.nan, v[:, 0]), basis, m)
    with pytest.raises(ValueError, match="mass must be a 1-D array"):
        approximate(v[:, 0], basis, m[:, None])
    with pytest.raises(ValueError, match="approx and exact must have the same shape"):
        relative_error(v[:, :2], v, m)
    with pytest.raises(ValueError, match="signal must be a numeric array"):
        relative_error(np.full(len(m), "x"), v[:, 0], m)
    with pytest.raises(ValueError, match=r"mass must have shape \(5,\)"):
        LaplacianBasis(np.ones((5, 2)), np.ones(4))

    class Wrong:
        def project(self, f):
            return np.zeros(2)

        def reconstruct(self, c):
            return np.zeros(3)

    with pytest.raises(ValueError, match=r"basis reconstructed shape \(3,\)"):
        approximate(v[:, 0], Wrong(), m)
