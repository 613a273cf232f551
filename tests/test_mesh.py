"""Mesh intake: triangulation by hand, lossless cleaning, every error at the door."""

import numpy as np
import pytest

import engine.intake.triangulation as triangulation_module
from engine.intake.triangulation import triangulate
from engine.intake.preparation import group_edges, prepare_mesh, validate_mesh
from tests import meshes


def shoelace(xy):
    """Signed area of a planar polygon (shoelace formula, Gauss; common practice)."""
    x, y = np.asarray(xy, float).T
    return 0.5 * float(np.sum(x * np.roll(y, -1) - np.roll(x, -1) * y))


def signed_areas_2d(v, tris):
    p = v[tris]
    e1, e2 = p[:, 1, :2] - p[:, 0, :2], p[:, 2, :2] - p[:, 0, :2]
    return 0.5 * (e1[:, 0] * e2[:, 1] - e1[:, 1] * e2[:, 0])


def inside(xy, point):
    """Even-odd ray crossing test (common practice)."""
    x, y = point
    hit = False
    for (x0, y0), (x1, y1) in zip(xy, np.roll(xy, -1, axis=0)):
        if (y0 > y) != (y1 > y) and x < x0 + (y - y0) * (x1 - x0) / (y1 - y0):
            hit = not hit
    return hit


def flat(xy):
    xy = np.asarray(xy, float)
    return np.column_stack([xy, np.zeros(len(xy))])


def check_polygon(xy, tris):
    """Ear-clipping result: k-2 triangles, all positively oriented, inside, tiling the area."""
    v = flat(xy)
    assert tris.shape == (len(xy) - 2, 3)
    a = signed_areas_2d(v, tris)
    assert (a > 0).all()
    assert a.sum() == pytest.approx(shoelace(xy), rel=1e-12)
    for t in tris:
        assert inside(xy, v[t, :2].mean(axis=0))


# ---------------------------------------------------------------- triangulation

@pytest.fixture(params=["library", "own"])
def ear_cutter(request, monkeypatch):
    """Run a test with the ear-cutting library and with the own ear clipping (the fallback)."""
    if request.param == "own":
        monkeypatch.setattr(triangulation_module, "_earcut", None)
    else:  # pinned in requirements/engine.txt and blender.txt: the library path is always tested
        assert triangulation_module._earcut is not None, "mapbox_earcut is not installed"
    return request.param


# L-shaped hexagon, area 3 (shoelace), listed from the corner (1, 2) so that a
# fan from the first corner leaves the polygon; the reflex corner is (1, 1).
L_SHAPE = [(1, 2), (0, 2), (0, 0), (2, 0), (2, 1), (1, 1)]


def test_l_shaped_hexagon_by_hand(ear_cutter):
    assert shoelace(L_SHAPE) == 3.0
    v = flat(L_SHAPE)
    fan = np.array([[0, i, i + 1] for i in range(1, 5)])
    assert (signed_areas_2d(v, fan) < 0).any()  # the fan is wrong here: the check below can fail
    tris, owner = triangulate(v, np.arange(6), np.array([6]))
    check_polygon(np.array(L_SHAPE, float), tris)
    assert owner.tolist() == [0] * 4


def test_l_shape_tilted_in_space_keeps_area_and_winding(ear_cutter):
    rng = np.random.default_rng(3)
    q, _ = np.linalg.qr(rng.standard_normal((3, 3)))
    q *= np.sign(np.linalg.det(q))  # a rotation
    v = flat(L_SHAPE) @ q.T + [5.0, -2.0, 1.0]
    tris, _ = triangulate(v, np.arange(6), np.array([6]))
    normals = np.cross(v[tris[:, 1]] - v[tris[:, 0]], v[tris[:, 2]] - v[tris[:, 0]])
    axis = q @ [0, 0, 1.0]  # the rotated polygon normal (counter-clockwise in the plane)
    assert (normals @ axis > 0).all()
    assert 0.5 * np.linalg.norm(normals, axis=1).sum() == pytest.approx(3.0, rel=1e-12)


def test_reversed_winding_gives_reversed_triangles(ear_cutter):
    v = flat(L_SHAPE[::-1])
    tris, _ = triangulate(v, np.arange(6), np.array([6]))
    a = signed_areas_2d(v, tris)
    assert (a < 0).all() and a.sum() == pytest.approx(-3.0)


# Arrow (dart) quad: corner 3 at (0.5, 1) is reflex; area 1.5 (shoelace).
ARROW = [(0, 0), (2, 1), (0, 2), (0.5, 1)]


def test_concave_arrow_quads_all_start_positions():
    assert shoelace(ARROW) == 1.5
    v = flat(ARROW)
    # The same quad four times, starting at each corner: the reflex corner sits
    # at every position, so both diagonal choices are exercised.
    corners = np.concatenate([np.roll(np.arange(4), -s) for s in range(4)])
    tris, owner = triangulate(v, corners, np.full(4, 4))
    assert owner.tolist() == [0, 0, 1, 1, 2, 2, 3, 3]
    for s in range(4):
        t = tris[owner == s]
        check_polygon(np.array(ARROW, float), t)
        assert all(3 in tri for tri in t)  # the only valid diagonal runs through the reflex corner


def test_convex_quad_takes_shorter_diagonal():
    # Diagonals: a-c from (0,0) to (4.5,1) (length 4.61), b-d from (4,0) to (0.5,1) (3.64).
    v = flat([(0, 0), (4, 0), (4.5, 1), (0.5, 1)])
    tris, _ = triangulate(v, np.arange(4), np.array([4]))
    assert tris.tolist() == [[0, 1, 3], [1, 2, 3]]
    # Mirrored so that a-c is the shorter one.
    v = flat([(0.5, 0), (4.5, 0), (4, 1), (0, 1)])
    tris, _ = triangulate(v, np.arange(4), np.array([4]))
    assert tris.tolist() == [[0, 1, 2], [0, 2, 3]]


def test_quad_with_a_straight_corner_avoids_the_flat_triangle():
    # Corner 1 lies on the segment 0-2: diagonal 0-2 would give a zero-area triangle.
    v = flat([(0, 0), (1, 0), (2, 0), (1, 3)])
    tris, _ = triangulate(v, np.arange(4), np.array([4]))
    assert tris.tolist() == [[0, 1, 3], [1, 2, 3]]
    assert (signed_areas_2d(v, tris) > 0).all()


def test_pentagon_with_collinear_corner_keeps_it(ear_cutter):
    square = [(0, 0), (1, 0), (2, 0), (2, 2), (0, 2)]  # (1, 0) on the bottom edge
    tris, _ = triangulate(flat(square), np.arange(5), np.array([5]))
    check_polygon(np.array(square, float), tris)
    assert 1 in tris


@pytest.mark.parametrize("start", [0, 3, 7])
def test_star_and_regular_polygons(start, ear_cutter):
    k = np.arange(20)
    r = np.where(k % 2 == 0, 1.0, 0.4)  # ten-pointed star: every other corner reflex
    star = np.roll(np.column_stack([r * np.cos(k * np.pi / 10), r * np.sin(k * np.pi / 10)]), -start, axis=0)
    tris, _ = triangulate(flat(star), np.arange(20), np.array([20]))
    check_polygon(star, tris)
    t = np.arange(64) * 2 * np.pi / 64
    ring = np.column_stack([np.cos(t), np.sin(t)])
    tris, _ = triangulate(flat(ring), np.arange(64), np.array([64]))
    check_polygon(ring, tris)
    # Area of a regular 64-gon inscribed in the unit circle: (k/2) sin(2 pi / k).
    assert signed_areas_2d(flat(ring), tris).sum() == pytest.approx(32 * np.sin(2 * np.pi / 64), rel=1e-12)


def test_many_concave_hexagons_in_one_call(ear_cutter):
    # 500 copies of the L shape, each shifted and listed from a different corner.
    rng = np.random.default_rng(1)
    n = 500
    shift = rng.uniform(0, 50, (n, 2))
    start = rng.integers(0, 6, n)
    rings = [np.roll(np.array(L_SHAPE, float), -s, axis=0) + d for s, d in zip(start, shift)]
    tris, owner = triangulate(flat(np.concatenate(rings)), np.arange(6 * n), np.full(n, 6))
    assert owner.tolist() == np.repeat(np.arange(n), 4).tolist()
    for p in range(0, n, 50):
        check_polygon(rings[p], tris[owner == p] - 6 * p)
    assert signed_areas_2d(flat(np.concatenate(rings)), tris).sum() == pytest.approx(3.0 * n, rel=1e-12)


def test_collinear_polygon_does_not_crash(ear_cutter):
    v = flat([(0, 0), (1, 0), (2, 0), (3, 0), (4, 0)])
    tris, owner = triangulate(v, np.arange(5), np.array([5]))
    assert tris.shape == (3, 3) and owner.tolist() == [0, 0, 0]
    assert np.allclose(signed_areas_2d(v, tris), 0)
    quad = flat([(0, 0), (1, 0), (2, 0), (3, 0)])
    tris, _ = triangulate(quad, np.arange(4), np.array([4]))
    assert tris.shape == (2, 3)
    # Repeated corners (a collapsed hexagon) also fall back without raising.
    tris, _ = triangulate(flat([(0, 0)] * 6), np.arange(6), np.array([6]))
    assert tris.shape == (4, 3)


def test_mixed_sizes_are_ordered_by_polygon(ear_cutter):
    v = flat([(0, 0), (1, 0), (1, 1), (0, 1), (2, 0), (3, 0), (3, 1), (2.5, 2), (2, 1)])
    corners = np.array([4, 5, 6, 7, 8, 0, 1, 2, 0, 1, 2, 3])
    tris, owner = triangulate(v, corners, np.array([5, 3, 4]))
    assert owner.tolist() == [0, 0, 0, 1, 2, 2]
    assert tris[3].tolist() == [0, 1, 2]


# ---------------------------------------------------------------- validation

@pytest.mark.parametrize("vertices, faces, message", [
    (np.zeros((3, 3), complex), [[0, 1, 2]], "vertices must be a numeric array, got dtype complex128"),
    (np.zeros((3, 2)), [[0, 1, 2]], r"vertices must have shape \(n, 3\), got \(3, 2\)"),
    (np.zeros((0, 3)), [[0, 1, 2]], "mesh has no vertices"),
    (np.eye(3), [[0.0, 1.0, 2.0]], "faces must be an integer array, got dtype float64"),
    (np.eye(3), [[0, 1, 2, 0]], r"faces must have shape \(m, 3\) \(triangles\), got \(1, 4\)"),
    (np.eye(3), np.zeros((0, 3), int), "mesh has no faces"),
    (np.eye(3), [[0, 1, 5]], r"faces index 5 out of range for 3 vertices \(face 0\)"),
    (np.eye(3), [[0, 1, 2], [0, -1, 2]], r"faces index -1 out of range for 3 vertices \(face 1\)"),
    ([[0, 0, 0], [1, np.nan, 0], [0, 1, 0]], [[0, 1, 2]], r"vertex 1 has a non-finite coordinate"),
])
def test_validate_mesh_errors(vertices, faces, message):
    with pytest.raises(ValueError, match=message):
        validate_mesh(vertices, faces)
    with pytest.raises(ValueError, match=message):
        prepare_mesh(vertices, faces)


@pytest.mark.parametrize("corners, sizes, message", [
    ([0, 1, 2, 0, 1], [3, 2], r"polygon 1 has 2 corners, at least 3 needed \(1 such polygons\)"),
    ([0, 1, 2, 3], [3], "polygon sizes add up to 3 corners but 4 corners were given"),
    ([0, 1, 2, 0, 1, 7], [3, 3], r"corners index 7 out of range for 4 vertices \(polygon 1\)"),
    ([0, -2, 2], [3], r"corners index -2 out of range for 4 vertices \(polygon 0\)"),
    ([0.0, 1.0, 2.0], [3], "corners must be an integer array, got dtype float64"),
    ([0, 1, 2], [3.0], "sizes must be an integer array, got dtype float64"),
    ([[0, 1, 2]], [3], r"corners must be one-dimensional, got shape \(1, 3\)"),
    (np.zeros(0, int), np.zeros(0, int), "mesh has no faces"),
])
def test_polygon_errors(corners, sizes, message):
    v = np.eye(4, 3)
    with pytest.raises(ValueError, match=message):
        prepare_mesh(v, corners=corners, sizes=sizes)


def test_argument_errors():
    v = np.eye(3)
    with pytest.raises(ValueError, match="give either faces or corners and sizes, not both"):
        prepare_mesh(v, [[0, 1, 2]], corners=[0, 1, 2], sizes=[3])
    with pytest.raises(ValueError, match="no faces given: pass faces, or corners and sizes"):
        prepare_mesh(v)
    with pytest.raises(ValueError, match="no faces given"):
        prepare_mesh(v, corners=[0, 1, 2])
    # All faces degenerate: a line and a collapsed triangle.
    line = [[0, 0, 0], [1, 0, 0], [2, 0, 0]]
    with pytest.raises(ValueError, match="mesh has no faces with non-zero area"):
        prepare_mesh(line, [[0, 1, 2], [0, 0, 1]])
    with pytest.raises(ValueError, match="mesh has no faces with non-zero area"):
        prepare_mesh(np.vstack([line, [[3, 0, 0]]]), corners=[0, 1, 2, 3], sizes=[4])
    p = prepare_mesh(v, [[0, 1, 2]])
    with pytest.raises(ValueError, match=r"values must have one row per cleaned vertex \(3\), got shape \(4,\)"):
        p.restore(np.zeros(4))
    with pytest.raises(ValueError, match=r"values must have one row per original vertex \(3\), got shape \(\)"):
        p.to_cleaned(1.0)


# ---------------------------------------------------------------- cleaning

def test_clean_mesh_passes_through():
    v, f = meshes.icosphere(2)
    p = prepare_mesh(v, f)
    assert p.notes == ()
    assert np.array_equal(p.vertices, v) and np.array_equal(p.faces, f)
    assert np.array_equal(p.to_clean, np.arange(len(v))) and np.array_equal(p.from_clean, np.arange(len(v)))
    assert np.array_equal(p.tri_polygon, np.arange(len(f)))
    # Closed genus-0 surface: one component, no boundary; V - E + F = 2 (Euler).
    assert (p.n_components, p.n_boundary_loops, p.non_manifold_edges, p.non_manifold_vertices) == (1, 0, 0, 0)
    assert p.vertices.dtype == np.float64 and p.faces.dtype == np.int64
    assert p.vertices.flags.c_contiguous and p.faces.flags.c_contiguous


def test_weld_split_seam_and_map_back():
    # A unit square as two triangles whose shared edge is split into copies
    # (vertices 3 and 4 repeat 0 and 2), plus a third copy of vertex 0 (5).
    v = np.array([[0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 0, 0], [1, 1, 0], [0, 0, 0], [0, 1, 0]], float)
    f = np.array([[0, 1, 2], [3, 4, 6]])
    p = prepare_mesh(v, f)
    assert p.notes == ("welded 3 duplicate vertices",)
    assert p.to_clean.tolist() == [0, 1, 2, 0, 2, 0, 3]
    assert p.from_clean.tolist() == [0, 1, 2, 6]  # lowest original index of each group
    assert p.faces.tolist() == [[0, 1, 2], [0, 2, 3]]
    assert p.n_components == 1 and p.n_boundary_loops == 1
    labels = np.array([10, 11, 12, 13, 14, 15, 16])
    assert p.to_cleaned(labels).tolist() == [10, 11, 12, 16]  # representatives' values, not averages
    assert p.restore(np.array([1.0, 2.0, 3.0, 4.0])).tolist() == [1, 2, 3, 1, 3, 1, 4]
    # Without welding the seam stays open: two components, two boundary loops.
    q = prepare_mesh(v, f, weld=False)
    assert q.notes == ("set aside 1 unreferenced vertices", "2 connected components")
    assert (q.n_components, q.n_boundary_loops) == (2, 2)
    assert q.to_clean.tolist() == [0, 1, 2, 3, 4, -1, 5]
    assert q.restore_index[5] in (0, 3)  # nearest kept vertex: a copy at distance zero


def test_zero_area_and_duplicate_faces_dropped():
    v = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [2, 0, 0], [0, 0, 1]], float)
    f = np.array([
        [0, 1, 2],
        [0, 1, 3],  # collinear: zero area
        [2, 2, 4],  # repeated index
        [2, 1, 0],  # same vertex set, opposite orientation
        [1, 2, 0],  # same triangle, rotated
        [0, 1, 4],
        [0, 1, 4],  # exact repeat
    ])
    p = prepare_mesh(v, f)
    assert p.notes == ("dropped 2 zero-area faces", "dropped 3 duplicate faces",
                       "set aside 1 unreferenced vertices")
    assert p.tri_polygon.tolist() == [0, 5]  # the first of each duplicate set is kept
    assert p.faces.tolist() == [[0, 1, 2], [0, 1, 3]]
    assert p.to_clean.tolist() == [0, 1, 2, -1, 3]


def test_zero_area_threshold_is_relative_to_the_mesh_size():
    # At two scales: a sliver of height 1e-6 (area 5e-7, d^2 = 2) is kept, a
    # triangle of height 1e-15 (area 5e-16 < 1e-14 * d^2 = 2e-14) is dropped.
    for s in (1e-6, 1e6):
        v = s * np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [1, 1e-6, 0], [0.5, 1e-15, 0]])
        p = prepare_mesh(v, [[0, 1, 2], [1, 3, 2], [0, 1, 4]])
        assert p.tri_polygon.tolist() == [0, 1]
        assert p.notes[0] == "dropped 1 zero-area faces"


def test_unreferenced_vertices_get_nearest_value():
    v = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0.9, 0.1, 0.0], [-5, 0, 0], [0, 0, 0.1]], float)
    p = prepare_mesh(v, [[0, 1, 2]])
    assert p.notes == ("set aside 3 unreferenced vertices",)
    assert p.to_clean.tolist() == [0, 1, 2, -1, -1, -1]
    assert p.restore_index.tolist() == [0, 1, 2, 1, 0, 0]
    rgb = np.array([[1, 0, 0], [0, 1, 0], [0, 0, 1]], np.uint8)
    out = p.restore(rgb)
    assert out.shape == (6, 3) and out.dtype == np.uint8  # every original vertex, dtype kept
    assert out[3].tolist() == [0, 1, 0] and out[4].tolist() == [1, 0, 0]


def test_restore_covers_every_original_vertex_on_a_messy_mesh():
    rng = np.random.default_rng(7)
    v, f = meshes.icosphere(2)
    n = len(v)
    # Add exact copies of 30 vertices used by half of the faces, 10 stray vertices,
    # duplicate faces and degenerate faces.
    copies = rng.choice(n, 30, replace=False)
    v2 = np.vstack([v, v[copies], rng.standard_normal((10, 3)) * 3])
    remap = np.arange(n)
    remap[copies] = n + np.arange(30)
    f2 = np.vstack([f[: len(f) // 2], remap[f[len(f) // 2:]], f[:5, ::-1], [[0, 0, 1], [2, 3, 3]]])
    p = prepare_mesh(v2, f2)
    assert p.notes == ("welded 30 duplicate vertices", "dropped 2 zero-area faces",
                       "dropped 5 duplicate faces", "set aside 10 unreferenced vertices")
    assert p.n_original == len(v2) and len(p.vertices) == n
    assert (p.n_components, p.n_boundary_loops, p.non_manifold_edges) == (1, 0, 0)
    x = rng.standard_normal((n, 2))
    back = p.restore(x)
    assert back.shape == (len(v2), 2)
    assert np.array_equal(back[:n], x) and np.array_equal(back[n:n + 30], x[copies])
    # Stray vertices receive the value of their nearest kept vertex (brute force check).
    stray = v2[n + 30:]
    nearest = np.argmin(((stray[:, None] - p.vertices[None]) ** 2).sum(-1), axis=1)
    assert np.array_equal(back[n + 30:], x[nearest])
    assert np.array_equal(p.to_cleaned(back), x)


def test_components_and_boundary_loops():
    a, fa = meshes.icosphere(1)
    b, fb = meshes.grid(6, 4)
    c = b + [0, 0, 5.0]
    v = np.vstack([a, b + [5.0, 0, 0], c])
    f = np.vstack([fa, fb + len(a), fb + len(a) + len(b)])
    p = prepare_mesh(v, f)
    assert p.n_components == 3 and p.n_boundary_loops == 2
    assert p.notes == ("3 connected components",)
    labels = p.component
    assert len(np.unique(labels[: len(a)])) == 1
    assert len(set(labels[[0, len(a), len(a) + len(b)]].tolist())) == 3


def test_open_tube_has_two_boundary_loops():
    # Cylinder from a periodic grid: Euler characteristic 0 = 2 - 2g - b with g = 0 gives b = 2.
    nx, ny = 12, 5
    t = np.arange(nx) * 2 * np.pi / nx
    v = np.array([[np.cos(a), np.sin(a), z] for z in range(ny + 1) for a in t], float)
    idx = np.arange(len(v)).reshape(ny + 1, nx)
    q = np.stack([idx[:-1], np.roll(idx[:-1], -1, 1), np.roll(idx[1:], -1, 1), idx[1:]], -1).reshape(-1, 4)
    p = prepare_mesh(v, corners=q.ravel(), sizes=np.full(len(q), 4))
    assert len(p.faces) == 2 * len(q) and p.n_boundary_loops == 2
    chi = len(p.vertices) - len({tuple(sorted(e)) for tri in p.faces for e in zip(tri, np.roll(tri, -1))}) + len(p.faces)
    assert chi == 0
    assert np.array_equal(p.tri_polygon, np.repeat(np.arange(len(q)), 2))


def test_non_manifold_counts_agree_with_libigl():
    import igl  # reference library, test environment only
    # Bow-tie: two triangles meeting at vertex 0 only.
    v = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [-1, 0, 0], [0, -1, 0]], float)
    f = np.array([[0, 1, 2], [0, 3, 4]])
    p = prepare_mesh(v, f)
    assert (p.non_manifold_vertices, p.non_manifold_edges) == (1, 0)
    assert int((~np.asarray(igl.is_vertex_manifold(f), bool)).sum()) == 1
    # Fin: three triangles on edge 0-1.
    v = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, -1, 0], [0, 0, 1]], float)
    f = np.array([[0, 1, 2], [1, 0, 3], [0, 1, 4]])
    p = prepare_mesh(v, f)
    assert (p.non_manifold_edges, p.non_manifold_vertices) == (1, 0)
    edge_manifold = igl.is_edge_manifold(f)
    assert not bool(edge_manifold[0] if isinstance(edge_manifold, tuple) else edge_manifold)
    assert p.notes == ("1 non-manifold edges",)


def _cone(sides, apex, base_height):
    """A closed cone: ``sides`` triangles to the apex, a fan closing the base (outward winding)."""
    t = 2 * np.pi * np.arange(sides) / sides
    ring = np.column_stack([np.cos(t), np.sin(t), np.full(sides, base_height)])
    v = np.vstack([apex, ring, [0, 0, base_height]])
    i = np.arange(sides)
    side = np.column_stack([np.zeros(sides, int), 1 + i, 1 + (i + 1) % sides])
    base = np.column_stack([np.full(sides, sides + 1), 1 + (i + 1) % sides, 1 + i])
    return v, np.vstack([side, base])


@pytest.mark.parametrize("sides", [6, 200])     # 200: longer than the walk around a vertex (FAN_WALK)
def test_two_closed_cones_touching_at_their_apex_agree_with_libigl(sides):
    import igl  # reference library, test environment only
    # every edge has two triangles in opposite directions, yet the shared apex has two fans
    v1, f1 = _cone(sides, [0, 0, 0], 1.0)
    v2, f2 = _cone(sides, [0, 0, 0], -1.0)
    f2 = f2[:, ::-1] + len(v1)
    f2[f2 == len(v1)] = 0                        # the second apex is the first
    v, f = np.vstack([v1, v2]), np.vstack([f1, f2])
    p = prepare_mesh(v, f)
    assert (p.non_manifold_vertices, p.non_manifold_edges, p.n_boundary_loops) == (1, 0, 0)
    assert int((~np.asarray(igl.is_vertex_manifold(p.faces), bool)).sum()) == 1
    one = prepare_mesh(v1, f1)                   # one cone alone: a manifold sphere
    assert (one.non_manifold_vertices, one.handles) == (0, 0)


@pytest.mark.parametrize("vdtype", [np.float32, np.float64, np.int32])
@pytest.mark.parametrize("fdtype", [np.int32, np.int64, np.uint32, np.uint16])
def test_dtypes(vdtype, fdtype):
    v, f = meshes.grid(2, 2, a=2.0, b=2.0)  # integer coordinates 0, 1, 2
    v = v.astype(vdtype)
    p = prepare_mesh(v, f.astype(fdtype))
    assert p.vertices.dtype == np.float64 and p.faces.dtype == np.int64
    assert np.array_equal(p.vertices, v.astype(np.float64)) and np.array_equal(p.faces, f)
    q = prepare_mesh(v, corners=f.ravel().astype(fdtype), sizes=np.full(len(f), 3, dtype=fdtype))
    assert np.array_equal(q.faces, p.faces)


@pytest.mark.parametrize("n", [7, 3_000_000_000])
def test_group_edges_order_is_numpys_stable_sort_of_the_edge_key(n: int) -> None:
    # Reference: numpy's stable argsort of min(p, q) * n + max(p, q) (numpy.argsort, kind="stable");
    # the large n leaves no room to pack the index beside the key, so the other route is taken too.
    rng = np.random.default_rng(5)
    p = rng.integers(0, 7, 500) * (n // 7)
    q = rng.integers(0, 7, 500) * (n // 7)
    key = np.minimum(p, q) * n + np.maximum(p, q)
    expect = np.argsort(key, kind="stable")
    groups = group_edges(p, q, n)
    np.testing.assert_array_equal(groups.order, expect)
    distinct, first, counts = np.unique(key, return_index=True, return_counts=True)
    np.testing.assert_array_equal(groups.counts, counts)
    np.testing.assert_array_equal(groups.order[groups.starts], first)
    assert len(distinct) == len(groups.starts)


def _torus(n=24, m=12):
    u, w = np.meshgrid(np.arange(n) * 2 * np.pi / n, np.arange(m) * 2 * np.pi / m, indexing="ij")
    v = np.column_stack([((2 + np.cos(w)) * np.cos(u)).ravel(), ((2 + np.cos(w)) * np.sin(u)).ravel(),
                         np.sin(w).ravel()])
    i, j = np.meshgrid(np.arange(n), np.arange(m), indexing="ij")
    a, b = (i * m + j).ravel(), (((i + 1) % n) * m + j).ravel()
    c, d = (((i + 1) % n) * m + (j + 1) % m).ravel(), (i * m + (j + 1) % m).ravel()
    return v, np.vstack([np.column_stack([a, b, c]), np.column_stack([a, c, d])])


def test_handles_follow_eulers_formula():
    # V - E + F = 2 - 2g - b per piece (Euler's formula for surfaces, common practice):
    # a sphere 0, a torus 1, a flat sheet 0, two tori in one mesh 2; an edge on three
    # triangles has no surface genus
    v, f = meshes.icosphere(2)
    tv, tf = _torus()
    gv, gf = meshes.grid(10, 5)
    assert prepare_mesh(v, f).handles == 0
    assert prepare_mesh(tv, tf).handles == 1
    assert prepare_mesh(gv, gf).handles == 0
    assert prepare_mesh(np.vstack([tv, tv + 9.0]), np.vstack([tf, tf + len(tv)])).handles == 2
    fin = np.vstack([tv, [[9.0, 9.0, 9.0]]])
    assert prepare_mesh(fin, np.vstack([tf, [[tf[0, 0], tf[0, 1], len(tv)]]])).handles is None


def test_cross_rows_matches_numpy_cross():
    # the row-wise cross product used on million-triangle meshes against numpy's np.cross
    # (reference library): the same products and differences, so the same bits; and the
    # right-hand rule e_x x e_y = e_z (common practice)
    from engine.common.arrays import cross_rows
    rng = np.random.default_rng(3)
    a, b = rng.standard_normal((500, 3)), rng.standard_normal((500, 3))
    np.testing.assert_array_equal(cross_rows(a, b), np.cross(a, b))
    np.testing.assert_array_equal(cross_rows(np.array([[1.0, 0.0, 0.0]]), np.array([[0.0, 1.0, 0.0]])),
                                  [[0.0, 0.0, 1.0]])


def test_triangles_only_come_back_as_they_are():
    """A mesh of triangles only takes a shortcut; it must give what the general path gives
    (the same triangles with one more polygon, a quad, appended) and never share the input."""
    rng = np.random.default_rng(3)
    v = rng.normal(size=(40, 3))
    corners = rng.integers(0, 40, size=3 * 25).astype(np.int64)
    sizes = np.full(25, 3, dtype=np.int64)
    tris, owner = triangulate(v, corners, sizes)
    mixed, mixed_owner = triangulate(v, np.concatenate([corners, [0, 1, 2, 3]]), np.append(sizes, 4))
    np.testing.assert_array_equal(tris, mixed[:25])
    np.testing.assert_array_equal(owner, mixed_owner[:25])
    tris[0, 0] = -1
    assert corners[0] != -1
