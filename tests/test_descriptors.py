"""Heat and wave kernel signatures against the unit sphere's analytic heat kernel.

Unit sphere: eigenvalues l(l+1), multiplicity 2l+1; by the spherical harmonic
addition theorem the heat kernel is
k_t(x, y) = sum_l (2l+1)/(4 pi) P_l(cos angle(x, y)) exp(-l(l+1) t), so the
heat kernel signature is sum_l (2l+1)/(4 pi) exp(-l(l+1) t) at every point
(Sun, Ovsjanikov and Guibas, SGP 2009, for the signature; docs/platform.md: with
36 eigenpairs at 10k vertices within 5e-4 relative at t = 0.5).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.special import eval_legendre

from engine.spectra.descriptors import (
    heat_kernel_rows,
    heat_kernel_signature,
    heat_times,
    wave_energies,
    wave_kernel_signature,
)
from tests.test_products import _eigenpairs


def _sphere_hks(t, lmax=60):
    l = np.arange(lmax + 1)
    return np.array([np.sum((2 * l + 1) / (4 * np.pi) * np.exp(-l * (l + 1) * ti)) for ti in np.atleast_1d(t)])


@pytest.fixture(scope="module")
def sphere36():
    # icosphere(5), 10,242 vertices: degrees 0..5 are the first 36 eigenpairs
    v, f, lam, phi, m = _eigenpairs("icosphere:5", 49)
    return v, lam[:36], phi[:, :36], m


def test_mass_normalisation_gives_area_four_pi(sphere36):
    v, lam, phi, m = sphere36
    f = _eigenpairs("icosphere:5", 49)[1]
    # An inscribed polyhedron has less area than the sphere; projecting a face at distance d
    # from the centre radially onto the sphere multiplies areas by at most 1 / d^2, so
    # 4 pi (1 - R^2) <= area < 4 pi with R the largest circumradius of a face (R = abc / 4K)
    # (common practice).
    a, b, c = (np.linalg.norm(v[f[:, i]] - v[f[:, (i + 1) % 3]], axis=1) for i in range(3))
    area = 0.5 * np.linalg.norm(np.cross(v[f[:, 1]] - v[f[:, 0]], v[f[:, 2]] - v[f[:, 0]]), axis=1)
    r2 = ((a * b * c / (4 * area)) ** 2).max()
    assert 4 * np.pi * (1 - r2) <= m.sum() < 4 * np.pi
    np.testing.assert_allclose(phi[:, 0] ** 2 * m.sum(), 1, rtol=1e-10)  # constant 1/sqrt(area)


def test_hks_matches_the_sphere_series(sphere36):
    v, lam, phi, m = sphere36
    t = np.array([0.1, 0.5, 1.0])
    hks = heat_kernel_signature(lam, phi, t)
    assert hks.shape == (len(m), 3)
    rel = np.abs(hks / _sphere_hks(t) - 1).max(axis=0)
    assert rel[1] < 5e-4  # docs/platform.md's figure at t = 0.5 (measured here 4.8e-4)
    assert rel[2] < 5e-4  # measured 3.3e-4
    # at t = 0.1 the missing degrees >= 6 matter (2.6%): compare with the series cut at degree 5
    rel_cut = np.abs(hks[:, 0] / _sphere_hks(0.1, lmax=5)[0] - 1).max()
    assert rel_cut < 3e-3  # measured 1.6e-3
    # integral over the surface is the heat trace sum_i exp(-lambda_i t) (mass-orthonormality)
    np.testing.assert_allclose(m @ hks, np.exp(-np.outer(lam, t)).sum(axis=0), rtol=1e-10)


def test_heat_times_rule(sphere36):
    v, lam, phi, m = sphere36
    t = heat_times(lam, 16)
    # Sun et al. 2009: from 4 ln 10 / lambda_max to 4 ln 10 / lambda_1, log-spaced; lambda_0 = 0 ignored
    assert t[0] == pytest.approx(4 * math.log(10) / lam[-1], rel=1e-12)
    assert t[-1] == pytest.approx(4 * math.log(10) / lam[1], rel=1e-12)
    np.testing.assert_allclose(np.diff(np.log(t)), np.log(t[-1] / t[0]) / 15, rtol=1e-10)
    assert heat_kernel_signature(lam, phi).shape == (len(m), 16)


def test_default_times_and_energies_scale_with_the_mesh(sphere36):
    # scaling a mesh by s: eigenvalues / s^2, mass-orthonormal eigenvectors / s
    v, lam, phi, m = sphere36
    s = 3.0
    h1, h2 = heat_kernel_signature(lam, phi), heat_kernel_signature(lam / s**2, phi / s)
    np.testing.assert_allclose(h2, h1 / s**2, rtol=1e-10)
    w1, w2 = wave_kernel_signature(lam, phi), wave_kernel_signature(lam / s**2, phi / s)
    np.testing.assert_allclose(w2, w1 / s**2, rtol=1e-10)


def test_wks_shape_positivity_and_normalisation(sphere36):
    v, lam, phi, m = sphere36
    wks = wave_kernel_signature(lam, phi)
    assert wks.shape == (len(m), 16)
    assert (wks > 0).all()
    # normalised per energy: its integral over the surface is 1 (each phi_k has unit mass norm)
    np.testing.assert_allclose(m @ wks, 1, rtol=1e-10)
    # on the sphere every point looks alike (addition theorem): nearly constant over vertices
    assert (wks.std(axis=0) / wks.mean(axis=0)).max() < 0.01  # measured 9.7e-4
    e, sigma = wave_energies(lam, 16)
    assert e[0] == pytest.approx(math.log(lam[1])) and e[-1] == pytest.approx(math.log(lam[-1]))
    assert sigma == pytest.approx((e[-1] - e[0]) / 15)
    one = wave_kernel_signature(lam, phi, [math.log(6.0)], sigma=0.1)
    # at log-energy log 6 with a narrow band, only the degree-2 eigenspace counts: (2l+1)/(4 pi) / 5
    np.testing.assert_allclose(one[:, 0], 1 / (4 * np.pi), rtol=5e-3)  # measured 7.8e-4


def test_heat_kernel_rows_against_legendre_series(sphere36):
    v, lam, phi, m = sphere36
    idx = np.array([0, 17, 4000])
    t = np.array([0.2, 0.5])
    H = heat_kernel_rows(lam, phi, idx, t)
    assert H.shape == (len(m), 6)
    for a, la in enumerate(idx):
        cosg = np.clip(v @ v[la], -1, 1)
        for j, tj in enumerate(t):
            exact = sum((2 * l + 1) / (4 * np.pi) * eval_legendre(l, cosg) * math.exp(-l * (l + 1) * tj)
                        for l in range(6))  # degrees kept: 0..5, as in the 36 eigenpairs
            np.testing.assert_allclose(H[:, a * 2 + j], exact, atol=2e-3 * exact.max())
    # symmetry k_t(x, y) = k_t(y, x) and the diagonal is the signature
    np.testing.assert_allclose(H[17, 0 * 2 + 1], H[0, 1 * 2 + 1], rtol=1e-12)
    np.testing.assert_allclose(H[idx, [0, 2, 4]], heat_kernel_signature(lam, phi, t)[idx, 0], rtol=1e-12)


def test_descriptor_errors(sphere36):
    v, lam, phi, m = sphere36
    with pytest.raises(ValueError, match="eigenvalues must be non-negative"):
        heat_kernel_signature(lam - 1.0, phi)
    with pytest.raises(ValueError, match="36 eigenvalues but 35 eigenvectors"):
        heat_kernel_signature(lam, phi[:, :35])
    with pytest.raises(ValueError, match="need at least one non-zero eigenvalue, all are zero"):
        heat_times(np.zeros(3))
    with pytest.raises(ValueError, match="n must be a positive integer, got 0"):
        heat_times(lam, 0)
    with pytest.raises(ValueError, match="times must be a non-empty array of positive"):
        heat_kernel_signature(lam, phi, [0.1, -1.0])
    with pytest.raises(ValueError, match=r"eigenvalues must have shape \(k,\)"):
        heat_times(lam[:, None])
    with pytest.raises(ValueError, match="eigenvalues must be finite"):
        heat_times(np.array([0.0, np.inf]))
    with pytest.raises(ValueError, match="landmark index 10242 out of range for 10242 vertices"):
        heat_kernel_rows(lam, phi, [1, 10242], [0.5])
    with pytest.raises(ValueError, match="vertices_idx must be a non-empty 1-D integer array"):
        heat_kernel_rows(lam, phi, [0.5], [0.5])
    with pytest.raises(ValueError, match="n must be an integer of at least 2, got 1"):
        wave_energies(lam, 1)
    with pytest.raises(ValueError, match="at least two distinct non-zero eigenvalues"):
        wave_energies(np.array([0.0, 2.0, 2.0]))
    with pytest.raises(ValueError, match="sigma must be a positive number"):
        wave_kernel_signature(lam, phi, [1.0])
    with pytest.raises(ValueError, match="sigma must be a positive number"):
        wave_kernel_signature(lam, phi, sigma=-1.0)
    with pytest.raises(ValueError, match="wave kernel signature needs a non-zero eigenvalue"):
        wave_kernel_signature(np.zeros(2), phi[:, :2], [0.0, 1.0])
    with pytest.raises(ValueError, match="eigenvalues must be a numeric array"):
        heat_times(np.array(["a", "b"]))
    with pytest.raises(ValueError, match="energies must be a non-empty array"):
        wave_kernel_signature(lam, phi, [np.nan, 1.0])
