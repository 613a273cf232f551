"""prepare_mesh and Shape with triangles computed by the caller (as Blender's loop triangles)."""

import numpy as np
import pytest

from engine.intake.files import MeshData
from engine.intake.preparation import prepare_mesh
from engine.spectra.shape import Shape
from tests.test_mesh import shoelace

# An L-shaped hexagon (concave at vertex 3) and a convex quad sharing its edge 1-2.
VERTICES = np.array([[0, 0, 0], [2, 0, 0], [2, 1, 0], [1, 1, 0], [1, 2, 0], [0, 2, 0],
                     [3, 0, 0], [3, 1, 0]], dtype=float)
CORNERS = np.array([0, 1, 2, 3, 4, 5, 1, 6, 7, 2])
SIZES = np.array([6, 4])
# A valid fan of the hexagon from its reflex vertex 3, and the quad cut along 1-7.
TRIS = np.array([[3, 4, 5], [3, 5, 0], [3, 0, 1], [3, 1, 2], [1, 6, 7], [1, 7, 2]])
TRI_POLYGON = np.array([0, 0, 0, 0, 1, 1])


def test_given_triangles_are_used_as_they_are():
    own = prepare_mesh(VERTICES, corners=CORNERS, sizes=SIZES)
    given = prepare_mesh(VERTICES, corners=CORNERS, sizes=SIZES, triangles=(TRIS, TRI_POLYGON))
    # every vertex is used and none welded, so the clean indices are the input's
    np.testing.assert_array_equal(given.from_clean, np.arange(len(VERTICES)))
    np.testing.assert_array_equal(given.faces, TRIS)
    np.testing.assert_array_equal(given.tri_polygon, TRI_POLYGON)
    # the engine's own triangulation of the same polygons is another one
    assert {tuple(sorted(t)) for t in own.faces} != {tuple(sorted(t)) for t in TRIS}
    # each polygon's triangles cover its area (shoelace formula, common practice)
    start = np.cumsum(SIZES) - SIZES
    for p, (s, n) in enumerate(zip(start, SIZES)):
        xy = VERTICES[CORNERS[s:s + n], :2]
        tri = given.vertices[given.faces[given.tri_polygon == p]]
        area = 0.5 * np.abs(np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0])[:, 2]).sum()
        assert area == pytest.approx(shoelace(xy))


def test_shape_keys_tell_triangulations_apart():
    own = Shape(VERTICES, corners=CORNERS, sizes=SIZES)
    given = Shape(VERTICES, corners=CORNERS, sizes=SIZES, triangles=(TRIS, TRI_POLYGON))
    again = Shape(VERTICES, corners=CORNERS, sizes=SIZES, triangles=(TRIS.copy(), TRI_POLYGON.copy()))
    assert own.key != given.key
    assert given.key == again.key


def test_meshdata_hands_its_triangles_on():
    data = MeshData(VERTICES, CORNERS, SIZES, tris=TRIS, tri_polygon=TRI_POLYGON)
    assert data.given_triangles() is not None
    np.testing.assert_array_equal(data.triangles(), TRIS)
    assert MeshData(VERTICES, CORNERS, SIZES).given_triangles() is None


@pytest.mark.parametrize("tris, tri_polygon, match", [
    (TRIS + 8 * (TRIS == 5), TRI_POLYGON, r"triangle vertex index out of range \[0, 8\)"),
    (TRIS - 4 * (TRIS == 3), TRI_POLYGON, r"triangle vertex index out of range"),
    (TRIS, TRI_POLYGON + 2 * (TRI_POLYGON == 1), r"triangle polygon index out of range \[0, 2\)"),
    (TRIS, -TRI_POLYGON, r"triangle polygon index out of range"),
    (TRIS[:, :2], TRI_POLYGON, r"triangles must be a non-empty \(t, 3\) array"),
    (TRIS, TRI_POLYGON[:, None], r"triangle polygons must be a non-empty \(t,\) array"),
    (TRIS[:0], TRI_POLYGON[:0], r"triangles must be a non-empty"),
    (TRIS, TRI_POLYGON[:-1], r"6 triangles but 5 triangle polygons"),
    (TRIS.astype(float), TRI_POLYGON, r"triangles must be an integer array"),
])
def test_bad_given_triangles_are_refused(tris, tri_polygon, match):
    with pytest.raises(ValueError, match=match):
        prepare_mesh(VERTICES, corners=CORNERS, sizes=SIZES, triangles=(tris, tri_polygon))


def test_given_triangles_need_polygons():
    with pytest.raises(ValueError, match="triangles go with corners and sizes, not with faces"):
        prepare_mesh(VERTICES, TRIS, triangles=(TRIS, TRI_POLYGON))
