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


def _truncation_errors(f, degrees) -> np.ndarray:
    """Relative L2 error on the unit sphere of ``f`` truncated to spherical harmonics of degree <= L.

    The continuous counterpart of a Laplacian basis of (L + 1)^2 functions.
    Coefficients by quadrature against scipy.special.sph_harm_y: Gauss-Legendre
    in cos(theta) (64 nodes) times 128 equally spaced longitudes, exact for
    band-limited integrands of degree below 128 (common practice); f here is
    smooth and its coefficients beyond that are far below rounding.
    """
    from scipy.special import sph_harm_y

    x, w = np.polynomial.legendre.leggauss(64)
    theta, phi = np.meshgrid(np.arccos(x), np.arange(128) * 2 * np.pi / 128, indexing="ij")
    weight = np.outer(w, np.full(128, 2 * np.pi / 128))
    values = f(np.sin(theta) * np.cos(phi), np.sin(theta) * np.sin(phi), np.cos(theta))
    total = (weight * values ** 2).sum()
    energy = np.cumsum([sum(abs((weight * values * np.conj(sph_harm_y(l, k, theta, phi))).sum()) ** 2
                            for k in range(-l, l + 1)) for l in range(max(degrees) + 1)])
    return np.sqrt(np.clip(total - energy[list(degrees)], 0, None) / total)


def test_error_follows_the_spherical_harmonic_truncation(sphere):
    v, f_, lam, phi, m = sphere
    # a degree <= 2 polynomial lies in the first 9 eigenfunctions (spherical harmonics, up to
    # discretisation): what is left is the discretisation error, which falls like h^2 for the
    # cotangent Laplacian on a smooth surface (common practice); h: the mean edge length
    h2 = np.mean(np.linalg.norm(v[f_[:, 0]] - v[f_[:, 1]], axis=1)) ** 2
    p = 1 + v[:, 0] - 2 * v[:, 1] * v[:, 2]
    floor = approximate(p, LaplacianBasis(phi[:, :9], m), m).relative_error
    assert floor < h2
    # a smooth signal that is not band-limited: the error of the first (L+1)^2 eigenfunctions
    # is the continuous truncation error, up to that discretisation floor
    f = lambda x, y, z: np.exp(x) + np.sin(2 * y)  # noqa: E731
    degrees = range(7)
    errs = np.array([approximate(f(*v.T), LaplacianBasis(phi[:, :(L + 1) ** 2], m), m).relative_error
                     for L in degrees])
    np.testing.assert_allclose(errs, _truncation_errors(f, degrees), rtol=0, atol=floor)
    assert (np.diff(errs) < 0).all()  # each degree adds energy: the error falls


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
