"""Reading detail offsets at mapped points (engine.carrying.detail_sampling)."""

import numpy as np

from engine.carrying.detail_sampling import RAY_REACH, ray_weights, read_vertices, smooth_sample
from engine.matching.closest_point import SurfaceLocator
from tests import meshes


def _quadratic(p):
    x, y = p[:, 0], p[:, 1]
    return np.column_stack([1 + 2 * x - y + 3 * x**2 - x * y + 2 * y**2, x * y])


def _interior_points(v, f, rng, per=2):
    """Random barycentric points in the triangles whose corners all have a full ring (away from the border)."""
    inner = (v[:, 0] > 0.05) & (v[:, 0] < 1.95) & (v[:, 1] > 0.05) & (v[:, 1] < 0.95)
    tri = np.repeat(np.flatnonzero(inner[f].all(axis=1)), per)
    w = rng.dirichlet(np.ones(3), len(tri))
    return tri, w, np.einsum("ij,ijk->ik", w, v[f[tri]])


def test_smooth_sample_is_exact_for_quadratic_fields_where_the_vertex_gradients_are():
    # analytic: on a regular grid every inner vertex ring is point-symmetric, so the
    # area-weighted face gradients of a quadratic's interpolant average to its exact
    # gradient there; the mean of the linear interpolant (error +1/2 sum w_k d_k'H d_k)
    # and of the corners' Taylor blend (error -1/2 sum w_k d_k'H d_k) is then exact
    # (Taylor's theorem, common practice). The plain linear read is not.
    v, f = meshes.grid(40, 20)
    tri, w, p = _interior_points(v, f, np.random.default_rng(1))
    got = smooth_sample(v, f, _quadratic(v), tri, w)
    np.testing.assert_allclose(got, _quadratic(p), atol=1e-12)
    linear = np.einsum("ij,ijk->ik", w, _quadratic(v)[f[tri]])
    assert np.abs(linear - _quadratic(p)).max() > 1e-4


def test_smooth_sample_converges_faster_than_the_linear_read():
    # a sinusoid along a jittered grid: the linear read's error falls as h^2
    # (common practice); the smooth read's is several times smaller at each size.
    rng = np.random.default_rng(2)
    errs = []
    for n in (20, 40):
        v, f = meshes.grid(2 * n, n, jitter=0.3, seed=n)
        field = np.sin(6 * v[:, :1]) * np.cos(5 * v[:, 1:2])
        tri, w, p = _interior_points(v, f, rng)
        truth = np.sin(6 * p[:, :1]) * np.cos(5 * p[:, 1:2])
        linear = np.einsum("ij,ijk->ik", w, field[f[tri]])
        smooth = smooth_sample(v, f, field, tri, w)
        errs.append((np.sqrt(np.mean((linear - truth) ** 2)), np.sqrt(np.mean((smooth - truth) ** 2))))
    for lin, smo in errs:
        assert smo < 0.5 * lin
    assert errs[1][0] < 0.35 * errs[0][0]          # h^2: a quarter, with room for the jitter


def test_read_vertices_are_the_corners_and_their_neighbours():
    v, f = meshes.grid(6, 6)
    got = read_vertices(f, np.array([0]))
    corners = set(f[0].tolist())
    want = sorted({int(i) for tri in f if corners & set(tri.tolist()) for i in tri})
    assert got.tolist() == want


def test_ray_meets_the_triangle_plane_along_the_normal():
    # analytic: the vertical line through (x, y, 0) meets the plane z = 0.3 x + 0.1 y + 0.2
    # at z = 0.3 x + 0.1 y + 0.2; the closest point of the plane lies elsewhere.
    tri_v = np.array([[-1.0, -1.0, 0.0], [2.0, -1.0, 0.0], [0.0, 2.0, 0.0]])
    tri_v[:, 2] = 0.3 * tri_v[:, 0] + 0.1 * tri_v[:, 1] + 0.2
    faces = np.array([[0, 1, 2]])
    q = np.array([[0.1, 0.2, 0.0], [0.4, -0.3, 0.0]])
    near = SurfaceLocator(tri_v, faces).closest(q)
    w = ray_weights(tri_v, faces, near.triangle, near.barycentric, q, np.tile([0.0, 0.0, 1.0], (2, 1)))
    hit = w @ tri_v
    np.testing.assert_allclose(hit, np.column_stack([q[:, :2], 0.3 * q[:, 0] + 0.1 * q[:, 1] + 0.2]), atol=1e-12)
    np.testing.assert_allclose(w.sum(axis=1), 1.0, atol=1e-12)
    assert np.abs(near.points - hit).max() > 0.01
    # a glancing normal (80 degrees from the plane's) keeps the closest point
    side = np.tile([np.cos(np.radians(10)), 0.0, np.sin(np.radians(10))], (2, 1))
    kept = ray_weights(tri_v, faces, near.triangle, near.barycentric, q, side)
    np.testing.assert_allclose(kept, near.barycentric)
    # far past the triangle the step is shortened to RAY_REACH
    far = ray_weights(tri_v, faces, near.triangle[:1], np.array([[1 / 3, 1 / 3, 1 / 3]]),
                      np.array([[30.0, 0.0, 0.0]]), np.array([[0.0, 0.0, 1.0]]))
    assert abs(far.min() + RAY_REACH) < 1e-12 and abs(far.sum() - 1) < 1e-12


def test_the_ray_undoes_the_closest_point_slide_on_a_bumpy_surface():
    # analytic: over a surface z = a sin(k x) the vertical line through (x0, y, 0) meets it
    # at height a sin(k x0). The closest point slides down the slope toward z = 0: to
    # first order x = x0 - h h', so its height is short by about the squared slope
    # (a k)^2 cos^2 (here (0.03 * 10)^2 = 9%, about half that on average).
    a, k = 0.03, 10.0
    v, f = meshes.grid(200, 20, a=2.0, b=0.2)
    v[:, 2] = a * np.sin(k * v[:, 0])
    rng = np.random.default_rng(4)
    q = np.column_stack([rng.uniform(0.3, 1.7, 400), rng.uniform(0.05, 0.15, 400), np.zeros(400)])
    near = SurfaceLocator(v, f).closest(q)
    truth = a * np.sin(k * q[:, 0])
    height = v[:, 2:]
    plain = smooth_sample(v, f, height, near.triangle, near.barycentric)[:, 0]
    w = ray_weights(v, f, near.triangle, near.barycentric, q, np.tile([0.0, 0.0, 1.0], (len(q), 1)))
    ray = smooth_sample(v, f, height, near.triangle, w)[:, 0]
    kept_plain, kept_ray = (float(x @ truth / (truth @ truth)) for x in (plain, ray))
    assert kept_plain < 0.98
    assert abs(kept_ray - 1) < 0.002
    assert np.abs(ray - truth).max() < 0.01 * a
