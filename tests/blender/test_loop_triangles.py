"""The engine prepares Blender meshes with Blender's own triangles (``Mesh.loop_triangles``).

A mesh of concave 8-gons (an L with collinear corners along its sides) and
quads, where the engine's own ear cutting picks other triangles than Blender.
Truth is Blender's loop triangles read one by one through bpy, and layers
written by this test (a face number, a corner colour that jumps from face to
face), which an identical copy must receive unchanged.
"""

import importlib

import bpy
import numpy as np
import pytest

from .conftest import MODULE, engine_module, select
from .test_operators import read


@pytest.fixture
def mod(overtone):
    names = ("bridge", "job")
    return type("M", (), {n: importlib.import_module(f"{MODULE}.{n}") for n in names})


def concave_blocks(name, bx=4, by=3):
    """2 x 2 blocks of a vertex grid, each an L-shaped 8-gon around a quad; the
    block's middle vertex moved off centre so that the L's corner average lies
    inside it; a gentle bump in z."""
    nx, ny = 2 * bx + 1, 2 * by + 1
    xs, ys = np.meshgrid(np.arange(nx, dtype=float), np.arange(ny, dtype=float))
    middle = (xs % 2 == 1) & (ys % 2 == 1)
    xs, ys = xs + 0.4 * middle, ys + 0.4 * middle
    positions = np.column_stack([xs.ravel(), ys.ravel(), 0.2 * np.sin(xs.ravel()) * np.cos(0.7 * ys.ravel())])
    at = lambda i, j: j * nx + i  # noqa: E731
    corners, sizes = [], []
    for j in range(0, ny - 1, 2):
        for i in range(0, nx - 1, 2):
            corners += [at(i, j), at(i + 1, j), at(i + 2, j), at(i + 2, j + 1), at(i + 1, j + 1),
                        at(i + 1, j + 2), at(i, j + 2), at(i, j + 1)]
            corners += [at(i + 1, j + 1), at(i + 2, j + 1), at(i + 2, j + 2), at(i + 1, j + 2)]
            sizes += [8, 4]
    starts = np.cumsum([0] + sizes[:-1])
    mesh = bpy.data.meshes.new(name)
    mesh.from_pydata(positions.tolist(), [], [corners[a:a + n] for a, n in zip(starts, sizes)])
    assert not mesh.validate(verbose=False)
    obj = bpy.data.objects.new(name, mesh)
    bpy.context.scene.collection.objects.link(obj)
    return obj


def blender_triangles(obj):
    """Blender's loop triangles, one by one through bpy."""
    mesh = obj.data
    mesh.calc_loop_triangles()
    tris = np.array([tuple(lt.vertices) for lt in mesh.loop_triangles], dtype=np.int64)
    return tris, np.array([lt.polygon_index for lt in mesh.loop_triangles], dtype=np.int64)


def as_set(tris, polygon):
    return {(int(p), *sorted(map(int, t))) for t, p in zip(tris, polygon)}


def prepared_triangles(shape):
    """The engine's cleaned triangles of a shape in the mesh's own vertex numbers, with their polygons."""
    prepared = shape.prepared
    return as_set(np.asarray(prepared.from_clean)[np.asarray(prepared.faces)], prepared.tri_polygon)


def test_the_engine_prepares_blenders_triangles(mod, scene):
    obj = concave_blocks("Blocks")
    tris, polygon = blender_triangles(obj)
    assert len(tris) == 12 * (6 + 2)   # an 8-gon gives 6 triangles, a quad 2
    data = mod.bridge.read_mesh(obj, local=True)
    np.testing.assert_array_equal(data.tris, tris)
    np.testing.assert_array_equal(data.tri_polygon, polygon)
    Shape = engine_module("spectra.shape").Shape
    shape = Shape(data.vertices, corners=data.corners, sizes=data.sizes, triangles=data.given_triangles())
    assert prepared_triangles(shape) == as_set(tris, polygon)
    # the engine's own triangulation of these polygons is another one: the checks can fail
    own = Shape(data.vertices, corners=data.corners, sizes=data.sizes).prepared
    own_tris = np.asarray(own.from_clean)[np.asarray(own.faces)]
    assert as_set(own_tris, own.tri_polygon) != as_set(tris, polygon)
    assert shape.key != Shape(data.vertices, corners=data.corners, sizes=data.sizes).key


def test_face_and_corner_layers_reach_their_own_polygons(mod, scene):
    src, copy = concave_blocks("Blocks"), concave_blocks("Copy")
    mesh = src.data
    f = len(mesh.polygons)
    number = (np.arange(f) * 7 + 3).astype(np.int32)
    mesh.attributes.new("region", 'INT', 'FACE').data.foreach_set("value", number)
    loop_face = np.repeat(np.arange(f), [p.loop_total for p in mesh.polygons])
    # a colour of its own for every face: the corners of a vertex differ from face to face
    colour = np.column_stack([(loop_face % 5) / 4.0, (loop_face // 5 % 3) / 2.0, loop_face / (f - 1),
                              np.ones(len(loop_face))]).astype(np.float32)
    mesh.color_attributes.new("paint", 'FLOAT_COLOR', 'CORNER').data.foreach_set("color", colour.ravel())
    select(src, copy)
    assert bpy.ops.overtone.refresh_signals() == {'FINISHED'}
    for item in scene.overtone.signals:
        item.use = item.name in ("region", "paint")
    scene.overtone.basis = "POINTWISE"  # a basis would blur the jumps
    mod.job.forget_pairs()
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    # the pair the run matched (kept in this process) was prepared with Blender's triangles
    (pair,) = mod.job.PAIRS.pairs.values()
    assert prepared_triangles(pair.source) == as_set(*blender_triangles(src))
    assert prepared_triangles(pair.target) == as_set(*blender_triangles(copy))
    np.testing.assert_array_equal(read(mod, copy, "region"), number)
    np.testing.assert_allclose(read(mod, copy, "paint"), colour, atol=1e-6)
