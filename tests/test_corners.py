"""Corner-domain signals keep their seams (engine/corners.py)."""

import numpy as np
import pytest

from engine.carrying.corners import carry_corners, seam_vertices, vertex_average
from engine.jobs.pair import Pair, Settings
from engine.spectra.shape import Shape
from tests import meshes


def _quads(nx, ny):
    # an nx x ny grid of quads as polygons (corners, sizes)
    idx = np.arange((nx + 1) * (ny + 1)).reshape(nx + 1, ny + 1)
    quads = np.stack([idx[:-1, :-1], idx[1:, :-1], idx[1:, 1:], idx[:-1, 1:]], axis=-1).reshape(-1, 4)
    xs, ys = np.meshgrid(np.linspace(0, 1, nx + 1), np.linspace(0, 1, ny + 1), indexing="ij")
    v = np.column_stack([xs.ravel(), ys.ravel(), np.zeros(xs.size)])
    return v, quads.ravel(), np.full(len(quads), 4)


def test_average_and_seams_by_hand():
    cv = np.array([0, 1, 2, 0, 2, 3])
    vals = np.array([[1.0], [0.0], [0.0], [0.5], [0.0], [0.0]])
    np.testing.assert_allclose(vertex_average(vals, cv, 4)[:, 0], [0.75, 0.0, 0.0, 0.0])
    assert seam_vertices(vals, cv, 4).tolist() == [True, False, False, False]


def test_identical_mesh_keeps_a_hard_seam_exactly():
    # Left half of the quads red, right half blue: the middle column of
    # vertices has red corners on one side and blue on the other.
    v, cv, sizes = _quads(8, 4)
    centre_x = v[cv].reshape(-1, 4, 3)[:, :, 0].mean(axis=1)
    face_colour = np.where(centre_x[:, None] < 0.5, [[1.0, 0, 0]], [[0, 0, 1.0]])
    per_corner = np.repeat(face_colour, 4, axis=0)
    S = Shape(v, corners=cv, sizes=sizes)
    T = Shape(v, corners=cv, sizes=sizes)
    pair = Pair(S, T, Settings(match="aligned"))
    out = carry_corners(pair, "c", per_corner, "color", (cv, sizes), (cv, sizes))
    np.testing.assert_allclose(out.values, per_corner, atol=1e-12)
    # the point transfer alone would blur the seam to purple
    point = pair.carry({"c": (vertex_average(per_corner, cv, len(v)), "color")})["c"].values[cv]
    assert np.abs(point - per_corner).max() > 0.4


def test_seamless_corner_data_equals_the_point_transfer():
    v, f = meshes.grid(10, 6)
    cv, sizes = f.ravel(), np.full(len(f), 3)
    colour = np.column_stack([v[:, 0] / 2, v[:, 1], 0.5 + 0 * v[:, 0]])
    S, T = Shape(v, corners=cv, sizes=sizes), Shape(v * 1.0, corners=cv, sizes=sizes)
    pair = Pair(S, T, Settings(match="aligned"))
    out = carry_corners(pair, "c", colour[cv], "color", (cv, sizes), (cv, sizes))
    point = pair.carry({"c": (colour, "color")})["c"].values
    np.testing.assert_allclose(out.values, point[cv])


def test_errors():
    v, cv, sizes = _quads(2, 2)
    pair = Pair(Shape(v, corners=cv, sizes=sizes), Shape(v, corners=cv, sizes=sizes), Settings(match="aligned"))
    with pytest.raises(ValueError, match="must have 16 rows"):
        carry_corners(pair, "c", np.zeros((5, 3)), "color", (cv, sizes), (cv, sizes))
    with pytest.raises(ValueError, match="labels and masks are carried per vertex"):
        carry_corners(pair, "c", np.zeros(16), "label", (cv, sizes), (cv, sizes))
    with pytest.raises(ValueError, match="do not add up"):
        carry_corners(pair, "c", np.zeros((16, 3)), "color", (cv, sizes[:-1]), (cv, sizes))
