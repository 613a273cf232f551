"""Detail split and re-application (engine/detail.py)."""

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as sla

from engine import cotangent_laplacian, mass_matrix
from engine.demo import creature
from engine.detail import apply_detail, low_pass, split_detail, tangent_frames, vertex_gradients, vertex_normals
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
    phi, m = _eig(c.vertices, c.faces, 20)
    layer = split_detail(c.vertices, c.faces, phi, m, base_size=12, guides=phi[:, 1:3])
    np.testing.assert_allclose(apply_detail(layer, layer.offsets), c.vertices, atol=1e-12)
    np.testing.assert_allclose(apply_detail(layer, layer.offsets, strength=0.0), layer.base)


def test_low_pass_removes_a_high_degree_bump_from_the_sphere():
    # Bump the unit sphere by eps * P4(z) (a degree-4 zonal harmonic). The
    # coordinates of the bumped sphere are x_i (1 + eps P4): x_i * P4 lies in
    # degrees 3 and 5 only (products of spherical harmonics, Gaunt
    # coefficients), so the low pass onto degrees 0 and 1 (the constant and
    # the 3 coordinate functions: 4 eigenfunctions) returns the unit sphere.
    v, f = meshes.icosphere(4)
    phi, m = _eig(v, f, 4)
    z = v[:, 2]
    eps = 0.05
    bumped = v * (1 + eps * (35 * z**4 - 30 * z**2 + 3) / 8)[:, None]
    # Compare with the low pass of the unbumped sphere, which removes the
    # discretisation error of the eigenfunctions themselves.
    leak = np.abs(low_pass(bumped, phi, m, 4) - low_pass(v, phi, m, 4)).max()
    assert leak < 1e-3 * eps  # measured 1.0e-5 * eps at 2,562 vertices
    assert np.abs(bumped - v).max() > 0.9 * eps  # the bump itself is there


def test_errors():
    v, f = meshes.icosphere(1)
    phi = np.ones((len(v), 3))
    with pytest.raises(ValueError, match="base_size must be between 1 and 3"):
        low_pass(v, phi, np.ones(len(v)), 5)
    with pytest.raises(ValueError, match="field must have shape"):
        vertex_gradients(v, f, np.ones(3))
    layer = split_detail(v, f, np.ones((len(v), 1)) / np.sqrt(len(v)), np.ones(len(v)), base_size=1, guides=v[:, 0])
    with pytest.raises(ValueError, match="offsets contain non-finite"):
        apply_detail(layer, np.full(v.shape, np.nan))
