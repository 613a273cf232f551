"""Detail split and re-application (engine/detail.py)."""

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as sla

from engine import cotangent_laplacian, mass_matrix
from engine.jobs.demo import creature
from engine.carrying.detail import apply_detail, smooth_base, split_detail, tangent_frames, vertex_gradients, vertex_normals
from tests import meshes


def _eig(v, f, k):
    L = cotangent_laplacian(v, f)
    m = mass_matrix(v, f)
    w, phi = sla.eigsh(L, k, M=sp.diags(m), sigma=-1e-6)
    phi /= np.sqrt(np.einsum("ij,i,ij->j", phi, m, phi))
    return phi, m


def test_gradient_of_linear_field_is_exact():
    # A piecewise-linear interpolant reproduces linear functions exactly (common practice).
    v, f = meshes.grid(12, 7, jitter=0.3)
    g = vertex_gradients(v, f, 2.0 * v[:, 0] - 3.0 * v[:, 1])
    np.testing.assert_allclose(g, np.tile([2.0, -3.0, 0.0], (len(v), 1)), atol=1e-12)


def test_sphere_normals_are_radial():
    # Unit sphere: the normal is the position (analytic).
    v, f = meshes.icosphere(3)
    n = vertex_normals(v, f)
    assert np.min(np.einsum("ij,ij->i", n, v)) > 0.999


def test_frames_are_orthonormal_and_right_handed():
    v, f = meshes.icosphere(2)
    frames = tangent_frames(v, f, np.column_stack([v[:, 2], v[:, 0]]))
    eye = np.einsum("nij,nkj->nik", frames, frames)
    np.testing.assert_allclose(eye, np.broadcast_to(np.eye(3), eye.shape), atol=1e-12)
    np.testing.assert_allclose(np.linalg.det(frames), 1.0, atol=1e-12)


def test_split_then_apply_restores_the_surface():
    c = creature(30, 16)
    phi, m = _eig(c.vertices, c.faces, 4)
    base = smooth_base(c.vertices, cotangent_laplacian(c.vertices, c.faces), m, wavelength=0.3)
    layer = split_detail(c.vertices, c.faces, base, guides=phi[:, 1:3])
    np.testing.assert_allclose(apply_detail(layer, layer.offsets), c.vertices, atol=1e-12)
    np.testing.assert_allclose(apply_detail(layer, layer.offsets, strength=0.0), layer.base)


def test_smooth_base_filters_each_eigenfunction_by_its_eigenvalue():
    # On the unit sphere the coordinates are eigenfunctions with lambda = 2
    # (l = 1: l(l+1)), so two implicit steps give x / (1 + 2t)^2. A degree-4
    # zonal bump eps * P4(z) along the normal adds x_i * P4, which lies in
    # degrees 3 and 5 only (Gaunt coefficients; lambda = 12 and 30), so the
    # filter keeps between eps / (1 + 30t)^2 and eps / (1 + 12t)^2 of it.
    v, f = meshes.icosphere(4)
    L, m = cotangent_laplacian(v, f), mass_matrix(v, f)
    wavelength = 1.0
    t = (wavelength / (2 * np.pi)) ** 2
    base = smooth_base(v, L, m, wavelength=wavelength)
    np.testing.assert_allclose(base, v / (1 + 2 * t) ** 2, atol=2e-3)  # discretisation, O(h^2)
    z, eps = v[:, 2], 0.05
    bumped = v * (1 + eps * (35 * z**4 - 30 * z**2 + 3) / 8)[:, None]
    kept = np.abs(smooth_base(bumped, L, m, wavelength=wavelength) - base).max()
    assert kept < eps / (1 + 12 * t) ** 2 + 2e-3
    assert kept > eps / (1 + 30 * t) ** 2 - 2e-3


def test_errors():
    v, f = meshes.icosphere(1)
    phi = np.ones((len(v), 3))
    with pytest.raises(ValueError, match="wavelength must be positive"):
        smooth_base(v, cotangent_laplacian(v, f), np.ones(len(v)), wavelength=0.0)
    with pytest.raises(ValueError, match="field must have shape"):
        vertex_gradients(v, f, np.ones(3))
    with pytest.raises(ValueError, match=r"base must have shape \(42, 3\)"):
        split_detail(v, f, v[:3], guides=v[:, 0])
    layer = split_detail(v, f, 0.9 * v, guides=v[:, 0])
    with pytest.raises(ValueError, match="offsets contain non-finite"):
        apply_detail(layer, np.full(v.shape, np.nan))


def test_vertices_outside_the_surface_keep_their_place():
    from engine.carrying.detail import place_on_original
    original = np.arange(15.0).reshape(5, 3)
    moved = np.array([[100.0, 0, 0], [200.0, 0, 0], [300.0, 0, 0]])
    out = place_on_original(original, np.array([0, -1, 1, 2, -1]), moved)
    assert out.tolist() == [[100, 0, 0], [3, 4, 5], [200, 0, 0], [300, 0, 0], [12, 13, 14]]


def test_strength_is_bounded_and_finite():
    from engine.carrying.detail import MAX_STRENGTH, check_strength
    assert check_strength(-MAX_STRENGTH) == -MAX_STRENGTH and check_strength("2.5") == 2.5
    for bad in (1e160, float("inf"), float("nan"), MAX_STRENGTH * 1.01, "x"):
        with pytest.raises(ValueError, match="detail strength must be"):
            check_strength(bad)
