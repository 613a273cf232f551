"""Cotangent stiffness and lumped mass: hand-worked cases, invariants, libigl."""

import numpy as np
import pytest
import scipy.sparse as sp

from engine import cotangent_laplacian, mass_matrix
from tests import meshes


def test_single_right_triangle_by_hand():
    # Right isosceles triangle with legs 1: angles 90, 45, 45 degrees.
    # cot 90 = 0, cot 45 = 1. Edge opposite the right angle (1,2) gets weight
    # cot(90)/2 = 0; the legs (0,1), (0,2) get cot(45)/2 = 1/2.
    v = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0]], float)
    f = np.array([[0, 1, 2]])
    L = cotangent_laplacian(v, f).toarray()
    expected = np.array([[1.0, -0.5, -0.5], [-0.5, 0.5, 0.0], [-0.5, 0.0, 0.5]])
    np.testing.assert_allclose(L, expected, atol=1e-15)
    np.testing.assert_allclose(mass_matrix(v, f), [1 / 6] * 3)
    # Mixed Voronoi: the triangle is right-angled (not obtuse), so Voronoi
    # areas: circumcentre at the hypotenuse midpoint; corner 0 gets 1/4,
    # corners 1 and 2 get 1/8 each (Meyer et al. 2003).
    np.testing.assert_allclose(mass_matrix(v, f, kind="voronoi"), [0.25, 0.125, 0.125], atol=1e-15)


@pytest.mark.parametrize("kind", ["barycentric", "voronoi"])
@pytest.mark.parametrize("mesh", ["icosphere", "grid", "noisy_sphere"])
def test_invariants(mesh, kind):
    v, f = meshes.by_name(mesh)
    L = cotangent_laplacian(v, f)
    m = mass_matrix(v, f, kind=kind)
    assert sp.isspmatrix_csr(L)
    assert abs(L - L.T).max() < 1e-12
    np.testing.assert_allclose(np.asarray(L.sum(axis=1)).ravel(), 0, atol=1e-10)  # rows sum to zero
    area = 0.5 * np.linalg.norm(np.cross(v[f[:, 1]] - v[f[:, 0]], v[f[:, 2]] - v[f[:, 0]]), axis=1).sum()
    assert m.sum() == pytest.approx(area, rel=1e-12)  # total mass equals area
    x = np.random.default_rng(0).standard_normal((v.shape[0], 4))
    assert (np.einsum("ij,ij->j", x, L @ x) >= 0).all()  # positive semidefinite on random vectors


@pytest.mark.parametrize("mesh", ["icosphere", "grid", "noisy_sphere"])
def test_agrees_with_libigl(mesh):
    # Reference: libigl cotmatrix is negative semidefinite (docs/platform.md), so ours = -cotmatrix.
    import igl  # reference library, test environment only
    v, f = meshes.by_name(mesh)
    L = cotangent_laplacian(v, f)
    ref = -igl.cotmatrix(v, f)
    assert abs(L - ref).max() <= 1e-12 * max(1.0, abs(ref).max())
    for kind, igl_kind in [("barycentric", igl.MASSMATRIX_TYPE_BARYCENTRIC), ("voronoi", igl.MASSMATRIX_TYPE_VORONOI)]:
        ref_m = igl.massmatrix(v, f, igl_kind).diagonal()
        np.testing.assert_allclose(mass_matrix(v, f, kind=kind), ref_m, rtol=1e-12, atol=1e-15)


def test_unknown_mass_kind():
    v, f = meshes.by_name("icosphere")
    with pytest.raises(ValueError, match="unknown mass kind 'lumpy'"):
        mass_matrix(v, f, kind="lumpy")


@pytest.mark.parametrize("mesh", ["icosphere", "noisy_sphere"])
def test_intrinsic_agrees_with_libigl(mesh):
    # The cotangent formula depends only on edge lengths (common practice): libigl's
    # intrinsic operators, and its embedded ones, are the reference (ours = -cotmatrix).
    import igl  # reference library, test environment only
    from engine.spectra.laplacian import intrinsic_laplacian
    v, f = meshes.by_name(mesh)
    lengths = np.stack([np.linalg.norm(v[f[:, (c + 1) % 3]] - v[f[:, (c + 2) % 3]], axis=1) for c in range(3)], axis=1)
    L, m = intrinsic_laplacian(lengths, f, len(v))
    for ref in (-igl.cotmatrix_intrinsic(lengths, f), -igl.cotmatrix(v, f)):
        assert abs(L - ref).max() <= 1e-12 * abs(ref).max()
    for ref_m in (igl.massmatrix_intrinsic(lengths, f, igl.MASSMATRIX_TYPE_BARYCENTRIC).diagonal(),
                  igl.massmatrix(v, f, igl.MASSMATRIX_TYPE_BARYCENTRIC).diagonal()):
        np.testing.assert_allclose(m, ref_m, rtol=1e-12)
