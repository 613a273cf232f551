"""The Blender demo: build a scene, carry paint and detail with the installed extension, render.

    python scripts/demo_scene.py --output demo_output      (in the environment with bpy)

1. Builds the extension zip (``build_addon.build``) and installs it into a
   sandboxed Blender user folder (nothing in the home folder is touched).
2. Builds a scene of our own: the painted creature of ``engine/demo.py`` as the
   source (straight, with scale bumps; colour ``tint``, float ``dirt``, vertex
   group ``head``, integer ``stripe_id``), and a re-posed (curled), differently
   meshed, smooth copy placed beside it as the target. Both carry four landmark
   vertex groups of the same names (``snout``, ``tail_tip``, ``back``,
   ``belly``) at known body coordinates: the creature is nearly symmetric
   around its body axis, and same-named groups are how a user pins such a map.
3. Runs the operators as a user would (select the source, make the target
   active): carry signals, carry detail. Prints both reports.
4. Saves ``demo.blend`` and renders with Workbench (vertex colours) into the
   output folder: ``1_source.png``, ``2_target_before.png``,
   ``3_target_after.png``, ``4_target_confidence.png``, ``5_target_detail.png``.
"""

from __future__ import annotations

import argparse
import importlib
import json
import os
import shutil
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
MODULE = "bl_ext.user_default.overtone"


def _sandbox() -> Path:
    folder = Path(tempfile.mkdtemp(prefix="overtone-demo-"))
    for var in ("BLENDER_USER_CONFIG", "BLENDER_USER_SCRIPTS", "BLENDER_USER_EXTENSIONS",
                "BLENDER_USER_DATAFILES", "BLENDER_USER_RESOURCES", "XDG_CACHE_HOME"):
        (folder / var.lower()).mkdir()
        os.environ[var] = str(folder / var.lower())
    return folder


def _mesh_object(bpy, np, name, vertices, faces):
    mesh = bpy.data.meshes.new(name)
    mesh.vertices.add(len(vertices))
    mesh.loops.add(faces.size)
    mesh.polygons.add(len(faces))
    mesh.attributes["position"].data.foreach_set("vector", np.asarray(vertices, np.float32).ravel())
    mesh.attributes[".corner_vert"].data.foreach_set("value", faces.astype(np.int32).ravel())
    mesh.polygons.foreach_set("loop_start", np.arange(0, faces.size, 3, dtype=np.int32))
    mesh.update()
    mesh.polygons.foreach_set("use_smooth", np.ones(len(faces), bool))
    obj = bpy.data.objects.new(name, mesh)
    bpy.context.scene.collection.objects.link(obj)
    return obj


def _landmark_groups(np, obj, uv):
    u, v = uv[:, 0], uv[:, 1]
    around = np.minimum(v, 1 - v)  # 0 on the back, 0.5 on the belly
    masks = {"snout": u < 0.04, "tail_tip": u > 0.96,
             "back": (np.abs(u - 0.5) < 0.04) & (around < 0.06),
             "belly": (np.abs(u - 0.5) < 0.04) & (np.abs(around - 0.5) < 0.06)}
    for name, mask in masks.items():
        obj.vertex_groups.new(name=name).add(np.flatnonzero(mask).tolist(), 1.0, 'REPLACE')


def _paint(bpy, np, obj, signals):
    mesh = obj.data
    rgba = np.column_stack([signals["tint"], np.ones(len(signals["tint"]))]).astype(np.float32)
    mesh.color_attributes.new("tint", 'BYTE_COLOR', 'POINT').data.foreach_set("color", rgba.ravel())
    mesh.attributes.new("dirt", 'FLOAT', 'POINT').data.foreach_set("value", signals["dirt"].astype(np.float32))
    mesh.attributes.new("stripe_id", 'INT', 'POINT').data.foreach_set(
        "value", signals["stripe_id"].astype(np.int32))
    group = obj.vertex_groups.new(name="head")
    head = signals["head"]
    for w in np.unique(head[head > 0]):
        group.add(np.flatnonzero(head == w).tolist(), float(w), 'REPLACE')


def _camera(bpy, np, scene):
    cam = bpy.data.objects.new("Camera", bpy.data.cameras.new("Camera"))
    cam.data.type = 'ORTHO'
    scene.collection.objects.link(cam)
    scene.camera = cam
    return cam


def _frame(bpy, np, mathutils, cam, obj):
    """Point the orthographic camera at ``obj`` from above and in front, filling the frame."""
    corners = np.array([obj.matrix_world @ mathutils.Vector(c) for c in obj.bound_box])
    centre = corners.mean(axis=0)
    direction = mathutils.Vector((0.35, -0.75, 0.85)).normalized()
    cam.location = mathutils.Vector(centre.tolist()) + 10.0 * direction
    cam.rotation_euler = (-direction).to_track_quat('-Z', 'Y').to_euler()
    bpy.context.view_layer.update()
    inverse = np.array(cam.matrix_world.inverted())
    local = corners @ inverse[:3, :3].T + inverse[:3, 3]
    width, height = np.ptp(local[:, 0]), np.ptp(local[:, 1])
    aspect = 400 / 300
    cam.data.ortho_scale = 1.12 * max(width, height * aspect)


def _render(bpy, np, mathutils, scene, cam, obj, path, *, colour=None, shape_key=False):
    for other in scene.objects:
        other.hide_render = other.type == 'MESH' and other != obj
    shading = scene.display.shading
    shading.light = 'FLAT' if colour == "overtone_confidence" else 'STUDIO'
    if colour is None:
        shading.color_type = 'SINGLE'
        shading.single_color = (0.75, 0.72, 0.68)
    else:
        shading.color_type = 'VERTEX'
        obj.data.color_attributes.active_color_name = colour
    keys = obj.data.shape_keys
    if keys is not None:
        for key in keys.key_blocks[1:]:
            key.value = 1.0 if shape_key else 0.0
    _frame(bpy, np, mathutils, cam, obj)
    scene.render.filepath = str(path)
    started = time.perf_counter()
    bpy.ops.render.render(write_still=True)
    return time.perf_counter() - started


def _print_report(title, settings):
    report = json.loads(settings.report_json)
    lines = [f"{title}: {settings.report_text}",
             f"  matching: {report.get('mode')} ({report.get('reason')})",
             f"  mean confidence {report.get('mean_confidence'):.3f}, source area covered "
             f"{report.get('coverage_of_source_area')}, consistency {report.get('consistency')}",
             f"  landmarks: {report.get('landmarks')}",
             f"  time {settings.report_seconds:.2f} s; cache: {settings.report_cache}",
             f"  timings: {report.get('timings')}"]
    for name, entry in report.get("signals", {}).items():
        lines.append(f"  {name}: source error {entry.get('source_error'):.4f} -> written as "
                     f"{report['written'].get(name)}")
    if "detail" in report:
        lines.append(f"  detail: {report['detail']}")
    print("\n".join(lines), flush=True)


def main(argv: list[str]) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--output", type=Path, default=Path("demo_output"))
    parser.add_argument("--rings", type=int, default=120, help="source resolution along the body")
    args = parser.parse_args(argv)
    output = args.output.resolve()
    output.mkdir(parents=True, exist_ok=True)
    sandbox = _sandbox()
    try:
        import bpy
        import mathutils
        import numpy as np

        sys.path.insert(0, str(ROOT))
        import build_addon

        zip_path = build_addon.build(platforms=(build_addon.this_platform(),))[0]
        bpy.ops.wm.read_factory_settings(use_empty=True)
        bpy.ops.extensions.package_install_files(filepath=str(zip_path), repo='user_default',
                                                 enable_on_install=True)
        demo = importlib.import_module(MODULE + ".engine.jobs.demo")
        scene = bpy.context.scene

        rings = args.rings
        src_c = demo.creature(rings, 48, bumps=0.03)
        tgt_c = demo.creature(int(rings * 0.85), 56, curl=2.4, twist_offset=True, bumps=0.0,
                              shuffle_seed=5, offset=(0.0, 2.6, 0.0))
        source = _mesh_object(bpy, np, "Salamander", src_c.vertices, src_c.faces)
        target = _mesh_object(bpy, np, "Salamander_Curled", tgt_c.vertices, tgt_c.faces)
        _paint(bpy, np, source, demo.creature_signals(src_c.uv))
        _landmark_groups(np, source, src_c.uv)
        _landmark_groups(np, target, tgt_c.uv)
        print(f"source {len(src_c.vertices)} vertices, target {len(tgt_c.vertices)} vertices "
              f"(curled by 2.4 rad, other triangulation)", flush=True)

        for obj in scene.objects:
            obj.select_set(obj in (source, target))
        bpy.context.view_layer.objects.active = target
        settings = scene.overtone
        # point to point through the map: the stripes are sharper than a
        # 10-eigenfunction product basis carries (its source error is printed by the preview)
        settings.basis = 'POINTWISE'
        bpy.ops.overtone.refresh_signals()
        for item in settings.signals:
            item.use = item.name in ("tint", "dirt", "head", "stripe_id")
        cam = _camera(bpy, np, scene)
        scene.render.engine = 'BLENDER_WORKBENCH'
        scene.render.resolution_x, scene.render.resolution_y = 400, 300
        scene.render.resolution_percentage = 100
        scene.display.shading.light = 'STUDIO'
        scene.view_settings.view_transform = 'Standard'  # colours as painted, white stays white
        scene.world = bpy.data.worlds.new("Backdrop")
        scene.world.color = (0.16, 0.18, 0.21)  # Workbench renders the world colour behind
        scene.display.shading.show_cavity = True
        scene.display.shading.cavity_type = 'WORLD'
        times = {"2_target_before": _render(bpy, np, mathutils, scene, cam, target,
                                            output / "2_target_before.png")}

        bpy.ops.overtone.transfer_attributes()
        _print_report("colour and weights", settings)
        bpy.ops.overtone.transfer_detail()
        _print_report("detail", settings)

        times["1_source"] = _render(bpy, np, mathutils, scene, cam, source, output / "1_source.png",
                                    colour="tint")
        times["3_target_after"] = _render(bpy, np, mathutils, scene, cam, target,
                                          output / "3_target_after.png", colour="tint")
        times["4_target_confidence"] = _render(bpy, np, mathutils, scene, cam, target,
                                               output / "4_target_confidence.png",
                                               colour="overtone_confidence")
        times["5_target_detail"] = _render(bpy, np, mathutils, scene, cam, target,
                                           output / "5_target_detail.png", shape_key=True)
        for obj in scene.objects:
            obj.hide_render = False
        bpy.ops.wm.save_as_mainfile(filepath=str(output / "demo.blend"))
        print("renders (s): " + ", ".join(f"{k} {v:.2f}" for k, v in sorted(times.items())))
        print(f"wrote {output}/demo.blend and 5 pictures")
        importlib.import_module(MODULE + ".worker").stop_shared_worker()
        return 0
    finally:
        shutil.rmtree(sandbox, ignore_errors=True)


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
