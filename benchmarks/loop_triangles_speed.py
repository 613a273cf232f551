"""Reading a ~100k-vertex mesh in Blender with its loop triangles, against the engine's own triangulation.

Run with the Blender module's Python (``.venv-blender/bin/python``). Two
meshes of 317 x 317 vertices (100,489): a grid of quads, and the same grid cut
into 2 x 2 blocks of one L-shaped 8-gon (concave, collinear corners) and one
quad. Best of five of: ``addon/bridge.py``'s ``read_mesh`` (positions,
corners, sizes and Blender's loop triangles) and
``engine.intake.triangulation.triangulate`` on the same polygons
(the work ``read_mesh``'s triangles spare the engine).
"""

import importlib
import sys
import timeit
import types
from pathlib import Path

import bpy
import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
from engine.intake.triangulation import triangulate  # noqa: E402


def addon_bridge() -> types.ModuleType:
    """``addon/bridge.py`` with the repository's engine as its ``.engine`` (no extension install)."""
    package = types.ModuleType("overtone_addon_bench")
    package.__path__ = [str(ROOT / "addon"), str(ROOT)]
    sys.modules[package.__name__] = package
    return importlib.import_module(package.__name__ + ".bridge")

N = 317


def grid_polygons(blocks: bool) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    xs, ys = np.meshgrid(np.arange(N, dtype=float), np.arange(N, dtype=float))
    if blocks:
        middle = (xs % 2 == 1) & (ys % 2 == 1)
        xs, ys = xs + 0.4 * middle, ys + 0.4 * middle
    v = np.column_stack([xs.ravel(), ys.ravel(), 0.2 * np.sin(0.1 * xs.ravel())])
    i, j = (a.ravel() for a in np.meshgrid(np.arange(0, N - 1, 2 if blocks else 1),
                                           np.arange(0, N - 1, 2 if blocks else 1)))
    at = lambda di, dj: (j + dj) * N + i + di  # noqa: E731
    if not blocks:
        quads = np.column_stack([at(0, 0), at(1, 0), at(1, 1), at(0, 1)])
        return v, quads.ravel(), np.full(len(quads), 4)
    ell = np.column_stack([at(0, 0), at(1, 0), at(2, 0), at(2, 1), at(1, 1), at(1, 2), at(0, 2), at(0, 1)])
    quad = np.column_stack([at(1, 1), at(2, 1), at(2, 2), at(1, 2)])
    corners = np.concatenate([ell, quad], axis=1).ravel()
    return v, corners, np.tile([8, 4], len(ell))


def blender_mesh(v, corners, sizes) -> bpy.types.Mesh:
    mesh = bpy.data.meshes.new("bench")
    mesh.vertices.add(len(v))
    mesh.vertices.foreach_set("co", v.astype(np.float32).ravel())
    mesh.loops.add(len(corners))
    mesh.loops.foreach_set("vertex_index", corners.astype(np.int32))
    mesh.polygons.add(len(sizes))
    mesh.polygons.foreach_set("loop_start", (np.cumsum(sizes) - sizes).astype(np.int32))
    mesh.polygons.foreach_set("loop_total", sizes.astype(np.int32))
    mesh.update()
    mesh.validate()
    return mesh


def best_of_five(run) -> float:
    return 1000 * min(timeit.repeat(run, number=1, repeat=5))


def main() -> None:
    bridge = addon_bridge()
    for name, blocks in (("quads", False), ("L-shaped 8-gons and quads", True)):
        v, c, s = grid_polygons(blocks)
        obj = bpy.data.objects.new("bench", blender_mesh(v, c, s))
        bpy.context.scene.collection.objects.link(obj)
        data = bridge.read_mesh(obj)
        assert data.tris is not None and len(data.tris) == int(np.sum(s - 2))
        print(f"{name}: {len(v)} vertices, {len(s)} polygons")
        print(f"  read_mesh with loop triangles: {best_of_five(lambda: bridge.read_mesh(obj)):.1f} ms")
        print(f"  engine triangulate:            {best_of_five(lambda: triangulate(v, c, s)):.1f} ms")
        mesh = obj.data
        bpy.data.objects.remove(obj)
        bpy.data.meshes.remove(mesh)


if __name__ == "__main__":
    main()
