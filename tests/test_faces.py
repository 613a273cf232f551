"""Face values and UV maps reach a remeshed copy (engine/carrying/faces.py, charts.py).

Ground truth is analytic: a UV sphere's map is longitude and latitude
(u = longitude / 2 pi, v = latitude / pi + 1/2, the equirectangular layout;
common practice), so the true coordinates of any point of the sphere are
known, up to which side of the seam (u = 0 and 1) a face is laid out on.
Face values are regions of space, so the true value of a face is the region
its centre lies in.
"""

import numpy as np
import pytest

from engine.carrying.charts import carry_charted, plane_barycentric, polygon_islands
from engine.carrying.corners import carry_corners
from engine.carrying.faces import carry_faces, faces_under_centres
from engine.jobs.pair import Pair, Settings
from engine.spectra.shape import Shape
from tests import meshes


def uv_sphere(rings=16, segments=24):
    """A unit UV sphere as polygons (quads, triangle fans at the poles) and its
    per-corner equirectangular map with a seam at u = 0 / 1."""
    lat = np.linspace(np.pi / 2, -np.pi / 2, rings + 1)[1:-1]
    lon = 2 * np.pi * np.arange(segments) / segments
    la, lo = np.meshgrid(lat, lon, indexing="ij")
    ring = np.column_stack([np.cos(la.ravel()) * np.cos(lo.ravel()), np.cos(la.ravel()) * np.sin(lo.ravel()),
                            np.sin(la.ravel())])
    v = np.vstack([[0, 0, 1.0], ring, [0, 0, -1.0]])
    idx = 1 + np.arange((rings - 1) * segments).reshape(rings - 1, segments)
    corners, uv, sizes = [], [], []
    vcoord = lambda i: 1.0 - i / rings  # noqa: E731  ring i (0 = north pole) -> v
    for j in range(segments):
        jn = (j + 1) % segments
        corners += [0, idx[0, j], idx[0, jn]]
        uv += [((j + 0.5) / segments, 1.0), (j / segments, vcoord(1)), ((j + 1) / segments, vcoord(1))]
        sizes.append(3)
        for i in range(rings - 2):
            corners += [idx[i, j], idx[i + 1, j], idx[i + 1, jn], idx[i, jn]]
            uv += [(j / segments, vcoord(i + 1)), (j / segments, vcoord(i + 2)),
                   ((j + 1) / segments, vcoord(i + 2)), ((j + 1) / segments, vcoord(i + 1))]
            sizes.append(4)
        corners += [len(v) - 1, idx[-1, jn], idx[-1, j]]
        uv += [((j + 0.5) / segments, 0.0), ((j + 1) / segments, vcoord(rings - 1)), (j / segments, vcoord(rings - 1))]
        sizes.append(3)
    return v, np.array(corners), np.array(sizes), np.array(uv)


def true_uv(points):
    """Equirectangular coordinates of points on the unit sphere, u in [0, 1)."""
    p = points / np.linalg.norm(points, axis=-1, keepdims=True)
    u = (np.arctan2(p[..., 1], p[..., 0]) / (2 * np.pi)) % 1.0
    v = np.arcsin(np.clip(p[..., 2], -1, 1)) / np.pi + 0.5
    return np.stack([u, v], axis=-1)


def region(points):
    """Material index of a point: three latitude bands times two halves."""
    band = np.digitize(points[:, 2], [-0.35, 0.4])
    return (band + 3 * (points[:, 0] > 0.2)).astype(np.int64)


@pytest.fixture(scope="module")
def remeshed():
    """UV sphere source; icosphere target (different topology, all triangles) turned and moved."""
    v, cv, sizes, uv = uv_sphere()
    tv, tf = meshes.icosphere(3)
    S = Shape(v, corners=cv, sizes=sizes)
    T = Shape(tv, tf)
    return Pair(S, T, Settings(match="aligned")), (v, cv, sizes, uv), (tv, tf.ravel(), np.full(len(tf), 3))


def face_centres(v, cv, sizes):
    face = np.repeat(np.arange(len(sizes)), sizes)
    c = np.zeros((len(sizes), 3))
    np.add.at(c, face, v[cv])
    return c / sizes[:, None]


def test_the_source_map_is_what_it_claims():
    v, cv, sizes, uv = uv_sphere()
    truth = true_uv(v[cv])
    inside = (v[cv][:, 2] ** 2 < 0.999)  # the poles have no longitude
    du = np.abs(((uv[:, 0] - truth[:, 0]) + 0.5) % 1.0 - 0.5)
    assert du[inside].max() < 1e-12 and np.abs(uv[:, 1] - truth[:, 1]).max() < 1e-12
    islands = polygon_islands(uv, cv, sizes)
    assert len(np.unique(islands)) == 1  # one island, cut open along the seam
    # the seam: 15 vertices whose corners hold u = 0 on one side and u = 1 on the other
    assert np.sum((np.abs(uv[:, 0] - 1.0) < 1e-12) & (v[cv][:, 2] ** 2 < 0.999)) > 0


def test_material_index_arrives_by_the_face_under_each_centre(remeshed):
    pair, (v, cv, sizes, _), (tv, tcv, tsizes) = remeshed
    material = region(face_centres(v, cv, sizes))
    hits = faces_under_centres(pair, tcv, tsizes)
    got = carry_faces(hits, "material_index", material, len(sizes))
    assert got.dtype == material.dtype
    centres = face_centres(tv, tcv, tsizes)
    wrong = got != region(centres)
    # a target face can only be wrong where its centre lies in a source face
    # that straddles a region border (source faces are about 0.26 across)
    near_border = (np.min(np.abs(centres[:, 2:3] - [-0.35, 0.4]), axis=1) < 0.2) | \
        (np.abs(centres[:, 0] - 0.2) < 0.2)
    assert not (wrong & ~near_border).any()
    assert wrong.mean() < 0.06  # measured 0.042


def test_faces_of_an_identical_copy_are_exact():
    # every corner of a face along a border lies on the border, where a vote
    # of the corners is a coin toss; the centre lies inside its own face
    v, cv, sizes, _ = uv_sphere()
    S, T = Shape(v, corners=cv, sizes=sizes), Shape(v, corners=cv, sizes=sizes)
    pair = Pair(S, T, Settings(match="aligned"))
    material = region(face_centres(v, cv, sizes))
    got = carry_faces(faces_under_centres(pair, cv, sizes), "m", material, len(sizes))
    np.testing.assert_array_equal(got, material)
    flags = material % 2 == 0
    assert carry_faces(faces_under_centres(pair, cv, sizes), "f", flags, len(sizes)).dtype == bool


def test_uv_map_arrives_with_a_seam_along_target_edges(remeshed):
    pair, (_, cv, sizes, uv), (tv, tcv, tsizes) = remeshed
    got = carry_charted(pair, "UVMap", uv, cv, sizes, tcv, tsizes).values
    truth = true_uv(tv[tcv])
    # the side of the seam a face is laid out on is the one of its centre: unwrap
    # the truth there, then compare each face as a whole
    centre_u = np.repeat(got.reshape(-1, 3, 2)[:, :, 0].mean(axis=1), 3)
    truth_u = truth[:, 0] + np.round(centre_u - truth[:, 0])
    inside = np.repeat(np.abs(face_centres(tv, tcv, tsizes)[:, 2]) < 0.9, 3)  # longitude is singular at the poles
    err_u = np.abs(got[:, 0] - truth_u)[inside]
    err_v = np.abs(got[:, 1] - truth[:, 1])[inside]
    # faces on an equirectangular map of a 16 x 24 polygon sphere: chords
    # against arcs, so a few thousandths (measured 0.0026 u, 0.0054 v max)
    assert err_u.max() < 0.01 and err_v.max() < 0.01
    # every face is whole: no face spans more than its own width in u
    span = np.ptp(got[:, 0].reshape(-1, 3), axis=1)[inside[::3]]
    assert span.max() < 0.1
    # target faces across the source's seam exist and were laid out on one side
    crossing = np.ptp(truth[:, 0].reshape(-1, 3), axis=1) > 0.5
    assert (crossing & inside[::3]).sum() >= 5
    # reading each corner on its own side tears them apart across the texture
    torn = carry_corners(pair, "UVMap", uv, "vector", (cv, sizes), (tcv, tsizes)).values
    assert np.ptp(torn[:, 0].reshape(-1, 3), axis=1)[crossing & inside[::3]].max() > 0.5


def test_a_map_without_seams_is_the_point_transfer(remeshed):
    pair, (v, cv, sizes, _), (_, tcv, tsizes) = remeshed
    smooth = v[cv][:, :2] * 0.5 + 0.5   # per-vertex, so every vertex's corners agree
    got = carry_charted(pair, "proj", smooth, cv, sizes, tcv, tsizes).values
    point = pair.correspondence.pull(v[:, :2] * 0.5 + 0.5)
    np.testing.assert_allclose(got, point[tcv], atol=1e-12)


def test_plane_barycentric_by_hand():
    tri = np.array([[[0.0, 0, 0], [1, 0, 0], [0, 1, 0]]] * 2)
    lam = plane_barycentric(np.array([[0.25, 0.5, 3.0], [-1.0, 0.0, 0.0]]), tri)
    np.testing.assert_allclose(lam, [[0.25, 0.25, 0.5], [2.0, -1.0, 0.0]])


def test_bad_face_values_are_named(remeshed):
    pair, (_, _, sizes, _), (_, tcv, tsizes) = remeshed
    hits = faces_under_centres(pair, tcv, tsizes)
    with pytest.raises(ValueError, match="one row per source face"):
        carry_faces(hits, "m", np.zeros(len(sizes) + 1), len(sizes))
    with pytest.raises(ValueError, match="non-finite"):
        carry_faces(hits, "m", np.full(len(sizes), np.nan), len(sizes))
    with pytest.raises(ValueError, match="add up"):
        faces_under_centres(pair, tcv, tsizes[:-1])
