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


def _zonal(z):
    """Legendre polynomials P1, P2, P4 of z: zonal spherical harmonics of degrees 1, 2, 4
    (Abramowitz & Stegun 22.3.8), eigenfunctions of the unit sphere's Laplace-Beltrami
    operator with lambda = l (l + 1) = 2, 6, 20 (common practice)."""
    return np.column_stack([z, (3 * z**2 - 1) / 2, (35 * z**4 - 30 * z**2 + 3) / 8])


@pytest.mark.parametrize("wavelength", [2 * np.pi / np.sqrt(20.0), 1.0, 2.5])
def test_smooth_base_filters_each_eigenfunction_by_its_eigenvalue(wavelength):
    # The base filters an eigenfunction of eigenvalue lambda by 1 / (1 + (t lambda)^3) with
    # t = 3^(1/3) (wavelength / 2 pi)^2 (the third-order response of engine.carrying.detail).
    # Checked on zonal harmonics of the unit sphere (analytic eigenfunctions, see _zonal):
    # the ratio <base, Y>_M / <Y, Y>_M against the analytic response, to the O(h^2)
    # discretisation error of a 10k-vertex icosphere.
    v, f = meshes.icosphere(5)
    L, m = cotangent_laplacian(v, f), mass_matrix(v, f)
    y = _zonal(v[:, 2])
    base = smooth_base(y, L, m, wavelength=wavelength)
    kept = np.einsum("ij,i,ij->j", base, m, y) / np.einsum("ij,i,ij->j", y, m, y)
    t = 3 ** (1 / 3) * (wavelength / (2 * np.pi)) ** 2
    np.testing.assert_allclose(kept, 1 / (1 + (t * np.array([2.0, 6.0, 20.0])) ** 3), atol=0.01)
    # each harmonic stays itself (no leak into other degrees)
    np.testing.assert_allclose(base, y * kept, atol=0.01)


def test_smooth_base_keeps_a_quarter_at_the_cut_off_and_sharper_than_one_heat_step():
    # The wave at the cut-off keeps a quarter in the base (by the definition of t); the
    # degree-1 harmonic (the sphere's own shape, a tenth of the cut-off's lambda) loses
    # only 1 - 1 / (1 + 0.1442^3) = 0.3% of it, where two implicit heat-flow steps with
    # the same quarter point, 1 / (1 + t' lambda)^2, t' = (wavelength / 2 pi)^2, lose 17%
    # (analytic responses at lambda = 2 and 20).
    v, f = meshes.icosphere(5)
    L, m = cotangent_laplacian(v, f), mass_matrix(v, f)
    y = _zonal(v[:, 2])
    base = smooth_base(y, L, m, wavelength=2 * np.pi / np.sqrt(20.0))
    kept = np.einsum("ij,i,ij->j", base, m, y) / np.einsum("ij,i,ij->j", y, m, y)
    assert abs(kept[2] - 0.25) < 0.01
    np.testing.assert_allclose(1 - kept[0], 1 - 1 / (1 + (3 ** (1 / 3) / 10) ** 3), atol=1e-3)
    assert 1 - kept[0] < 0.1 * (1 - 1 / (1 + 2 / 20) ** 2)


def test_errors():
    v, f = meshes.icosphere(1)
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


def _bump_band(subdivisions, wavelength, eps=0.01):
    """Share of a radial bump eps * P8(z) on the unit sphere that the split puts in the detail
    (normal offsets of the bumped sphere less those of the plain one, projected on the bump)."""
    v, f = meshes.icosphere(subdivisions)
    z = v[:, 2]
    bump = eps * (6435 * z**8 - 12012 * z**6 + 6930 * z**4 - 1260 * z**2 + 35) / 128   # P8 (A&S 22.3.8)
    out = []
    for x in (v * (1 + bump)[:, None], v):
        L, m = cotangent_laplacian(x, f), mass_matrix(x, f)
        layer = split_detail(x, f, smooth_base(x, L, m, wavelength=wavelength), guides=v[:, :2])
        out.append(layer.offsets[:, 2])
    m = mass_matrix(v, f)
    return float(np.sum(m * (out[0] - out[1]) * bump) / np.sum(m * bump * bump))


def test_the_band_is_the_same_at_two_resolutions():
    # A radial bump eps P8 on the unit sphere (lambda = 8 * 9 = 72, common practice) with the
    # cut-off set so that t * 72 = 3: the bump is shorter than the cut-off wave (whose
    # lambda is 3^(1/3) / t = 35), so by the filter's response more than the cut-off's
    # three quarters of it is detail, and less than all of it. The band is set by the
    # wavelength alone, so two meshings of the sphere (2,562 and 10,242 vertices, edges
    # 2x apart) give the same share (measured 0.896 and 0.898).
    t = 3 / 72
    wavelength = 2 * np.pi * np.sqrt(t / 3 ** (1 / 3))
    coarse, fine = _bump_band(4, wavelength), _bump_band(5, wavelength)
    assert 0.75 < fine < 1 and 0.75 < coarse < 1
    assert abs(coarse - fine) < 0.01
