"""addon/bridge.py in real Blender: reading, writing, naming, all-or-nothing, save/reload.

Expected values come from the generated meshes themselves, from numpy, and
from the sRGB transfer function (IEC 61966-2-1), as docs/platform.md measured it in
Blender: linear 0.5 written to a BYTE_COLOR attribute is stored as 188/255.
"""

import dataclasses
import importlib
import types

import bpy
import mathutils
import numpy as np
import pytest

from .conftest import MODULE, make_grid, make_sphere

RNG = np.random.default_rng(7)


def srgb_encode(x):
    # IEC 61966-2-1 sRGB transfer function (common practice)
    x = np.asarray(x, dtype=np.float64)
    return np.where(x <= 0.0031308, 12.92 * x, 1.055 * np.power(x, 1 / 2.4) - 0.055)


def place(obj):
    obj.matrix_world = (mathutils.Matrix.Translation((1.5, -2.0, 0.25))
                        @ mathutils.Matrix.Rotation(0.7, 4, 'Z')
                        @ mathutils.Matrix.Diagonal((2.0, 0.5, 1.5, 1.0)))
    bpy.context.view_layer.update()
    return np.array([list(r) for r in obj.matrix_world])


def snapshot(obj):
    """Every layer of the object, by value, to compare before and after."""
    mesh = obj.data
    state = {"attributes": {}, "groups": {}, "shapes": None,
             "active_color": mesh.color_attributes.active_color_name,
             "render_color": mesh.color_attributes.render_color_index}
    for attr in mesh.attributes:
        if attr.data_type in ('FLOAT_COLOR', 'BYTE_COLOR'):
            buf = np.empty(len(attr.data) * 4, np.float32)
            attr.data.foreach_get("color", buf)
        elif attr.data_type in ('FLOAT_VECTOR',):
            buf = np.empty(len(attr.data) * 3, np.float32)
            attr.data.foreach_get("vector", buf)
        elif attr.data_type in ('FLOAT', 'INT', 'BOOLEAN'):
            buf = np.empty(len(attr.data), np.float64)
            attr.data.foreach_get("value", buf)
        else:
            buf = np.array([])
        state["attributes"][attr.name] = (attr.data_type, attr.domain, buf.tobytes())
    bridge = importlib.import_module(MODULE + ".bridge")
    state["groups"] = {k: v.tobytes() for k, v in bridge.read_vertex_groups(obj).items()}
    if mesh.shape_keys:
        state["shapes"] = {}
        for kb in mesh.shape_keys.key_blocks:
            co = np.empty(len(kb.data) * 3, np.float32)
            kb.data.foreach_get("co", co)
            state["shapes"][kb.name] = (kb.value, co.tobytes())
    return state


# ----------------------------------------------------------------------------- reading


def test_read_mesh_world_space(bridge, sphere):
    matrix = place(sphere)
    arrays = bridge.read_mesh(sphere)
    local = np.array([v.co[:] for v in sphere.data.vertices])
    expected = local @ matrix[:3, :3].T + matrix[:3, 3]
    assert arrays.vertices.dtype == np.float64 and arrays.vertices.shape == (len(local), 3)
    np.testing.assert_allclose(arrays.vertices, expected, rtol=0, atol=1e-6)
    assert arrays.sizes.tolist() == [p.loop_total for p in sphere.data.polygons]
    assert arrays.corners.tolist() == [lp.vertex_index for lp in sphere.data.loops]
    assert sorted(set(arrays.sizes.tolist())) == [3, 4]


def test_read_mesh_as_shown(bridge, grid):
    grid.modifiers.new("sub", 'SUBSURF').levels = 1
    base = bridge.read_mesh(grid)
    shown = bridge.read_mesh(grid, evaluated=True)
    assert len(base.vertices) == 30
    # one Catmull-Clark step on a 6x5 grid of quads: (2*6-1) x (2*5-1) vertices
    assert len(shown.vertices) == 11 * 9
    assert set(shown.sizes.tolist()) == {4} and len(shown.sizes) == 4 * 20


def test_read_rejects_non_mesh(bridge, scene):
    empty = bpy.data.objects.new("nothing", None)
    scene.collection.objects.link(empty)
    with pytest.raises(ValueError, match=r"object 'nothing' is not a mesh \(type EMPTY\)"):
        bridge.read_mesh(empty)


def test_list_layers_skips_blender_internals(bridge, grid):
    mesh = grid.data
    mesh.color_attributes.new("paint", 'FLOAT_COLOR', 'POINT')
    mesh.attributes.new("height", 'FLOAT', 'POINT')
    mesh.attributes.new("flow", 'FLOAT_VECTOR', 'POINT')
    mesh.attributes.new("part", 'INT', 'POINT')
    mesh.attributes.new("keep", 'BOOLEAN', 'POINT')
    mesh.attributes.new(".scratch", 'FLOAT', 'POINT')
    mesh.attributes.new("per_face", 'FLOAT', 'FACE')
    mesh.uv_layers.new(name="UVMap")
    grid.vertex_groups.new(name="spine")
    listed = [(s.name, s.kind, s.domain, s.data_type) for s in bridge.list_layers(grid)]
    # colours first, vertex groups last; generic attributes in Blender's own order
    assert listed[0] == ("paint", "color", "POINT", "FLOAT_COLOR")
    assert listed[-1] == ("spine", "weight", "POINT", "VERTEX_GROUP")
    # then point, corner (UV maps) and face layers, each domain in Blender's own order
    assert sorted(listed[1:5]) == [("flow", "vector", "POINT", "FLOAT_VECTOR"),
                                   ("height", "float", "POINT", "FLOAT"),
                                   ("keep", "mask", "POINT", "BOOLEAN"),
                                   ("part", "label", "POINT", "INT")]
    assert listed[5:-1] == [("UVMap", "vector", "CORNER", "FLOAT2"), ("per_face", "float", "FACE", "FLOAT")]


# ----------------------------------------------------------------------------- colours


@pytest.mark.parametrize("data_type", ["BYTE_COLOR", "FLOAT_COLOR"])
@pytest.mark.parametrize("domain", ["POINT", "CORNER"])
def test_colour_round_trip(bridge, sphere, data_type, domain):
    rows = len(sphere.data.vertices) if domain == "POINT" else len(sphere.data.loops)
    values = RNG.random((rows, 4)).astype(np.float32)
    values[0] = (0.5, 0.5, 0.5, 0.2)
    signal = bridge.Layer("tint", domain, data_type)
    names = bridge.write_outputs(sphere, [signal.signal(values)])
    assert names == {"tint": "tint"}
    attr = sphere.data.color_attributes["tint"]
    assert (attr.data_type, attr.domain) == (data_type, domain)
    back = bridge.read_signal(sphere, signal).values
    assert back.shape == (rows, 4) and back.dtype == np.float32
    srgb = np.empty(rows * 4, np.float32)
    attr.data.foreach_get("color_srgb", srgb)
    srgb = srgb.reshape(rows, 4)
    if data_type == "FLOAT_COLOR":
        np.testing.assert_array_equal(back, values)  # stored linear, exactly
    else:
        # 8-bit sRGB: linear 0.5 -> 188/255 (docs/platform.md); alpha stored as it is (51/255)
        assert round(float(srgb[0, 0]) * 255) == 188
        assert abs(float(srgb[0, 3]) - 51 / 255) < 1e-6
        np.testing.assert_allclose(srgb[:, :3] * 255, np.round(srgb[:, :3] * 255), atol=1e-3)
        # Blender's 8-bit encoding lands within one step of the exact curve (measured
        # here: up to 0.51/255 off, so not always the nearest step)
        np.testing.assert_allclose(srgb[:, :3], srgb_encode(values[:, :3]), atol=1 / 255)
        np.testing.assert_allclose(back[:, 3], values[:, 3], atol=0.5 / 255 + 1e-6)


def test_colour_rgb_gets_opaque_alpha(bridge, grid):
    rgb = RNG.random((30, 3)).astype(np.float32)
    bridge.write_outputs(grid, [bridge.Layer("c", "POINT", "FLOAT_COLOR").signal(rgb)])
    back = bridge.read_signal(grid, bridge.Layer("c", "POINT", "FLOAT_COLOR")).values
    np.testing.assert_array_equal(back[:, :3], rgb)
    np.testing.assert_array_equal(back[:, 3], np.ones(30, np.float32))


def test_confidence_colour(bridge, grid):
    conf = np.linspace(0, 1, 30)
    bridge.write_outputs(grid, [bridge.confidence_output(conf)])
    back = bridge.read_signal(grid, bridge.Layer("overtone_confidence", "POINT", "FLOAT_COLOR")).values
    np.testing.assert_allclose(back[:, 1], conf, atol=1e-7)
    np.testing.assert_array_equal(back[:, 0], np.ones(30, np.float32))
    with pytest.raises(ValueError, match=r"confidence must be finite and within \[0, 1\]"):
        bridge.confidence_output(conf * 2)


# ----------------------------------------------------------------------------- generic


@pytest.mark.parametrize("data_type,kind,make", [
    ("FLOAT", "float", lambda n: RNG.normal(size=n).astype(np.float32)),
    ("FLOAT_VECTOR", "vector", lambda n: RNG.normal(size=(n, 3)).astype(np.float32)),
    ("INT", "label", lambda n: RNG.integers(-5, 1000, size=n)),
    ("BOOLEAN", "mask", lambda n: RNG.random(n) < 0.5),
])
def test_generic_round_trip(bridge, sphere, data_type, kind, make):
    values = make(len(sphere.data.vertices))
    signal = bridge.Layer("sig", "POINT", data_type)
    assert signal.kind == kind
    bridge.write_outputs(sphere, [signal.signal(values)])
    assert sphere.data.attributes["sig"].data_type == data_type
    back = bridge.read_signal(sphere, signal).values
    np.testing.assert_array_equal(back, values)


def test_vertex_group_weights_exact_with_zeros(bridge, sphere):
    n = len(sphere.data.vertices)
    weights = RNG.random(n).astype(np.float32)
    weights[::5] = 0.0
    weights[1] = 1.0
    signal = bridge.Layer("arm", "POINT", "VERTEX_GROUP")
    bridge.write_outputs(sphere, [signal.signal(weights)])
    assert "arm" in sphere.vertex_groups and "arm" not in sphere.data.attributes
    back = bridge.read_signal(sphere, signal).values
    assert back.dtype == np.float32
    np.testing.assert_array_equal(back, weights)


def test_vertex_group_fallback_without_the_convert_operator(bridge, sphere, monkeypatch):
    def refuse(**_kwargs):
        raise RuntimeError("Operator bpy.ops.geometry.attribute_convert.poll() failed")
    fake = types.SimpleNamespace(context=bpy.context, types=bpy.types,
                                 ops=types.SimpleNamespace(geometry=types.SimpleNamespace(
                                     attribute_convert=refuse)))
    monkeypatch.setattr(bridge, "bpy", fake)
    weights = RNG.random(len(sphere.data.vertices)).astype(np.float32)
    weights[::3] = 0.0
    bridge.write_outputs(sphere, [bridge.Layer("leg", "POINT", "VERTEX_GROUP").signal(weights)])
    monkeypatch.undo()
    assert "leg" not in sphere.data.attributes
    np.testing.assert_array_equal(bridge.read_vertex_groups(sphere, ["leg"])["leg"], weights)


def test_read_vertex_groups_unknown_name(bridge, grid):
    with pytest.raises(ValueError, match="object 'grid' has no vertex group 'nope'"):
        bridge.read_vertex_groups(grid, ["nope"])


def test_shape_key_world_to_local(bridge, grid):
    matrix = place(grid)
    arrays = bridge.read_mesh(grid)
    moved = arrays.vertices + np.array([0.0, 0.0, 0.3]) * np.sin(arrays.vertices[:, :1])
    names = bridge.write_outputs(grid, [bridge.shape_key_output("carved", moved)])
    keys = grid.data.shape_keys.key_blocks
    assert [k.name for k in keys] == ["Basis", "carved"] and names == {"carved": "carved"}
    assert keys["carved"].value == 1.0
    co = np.empty(len(grid.data.vertices) * 3, np.float32)
    keys["carved"].data.foreach_get("co", co)
    inverse = np.linalg.inv(matrix)
    expected = moved @ inverse[:3, :3].T + inverse[:3, 3]
    np.testing.assert_allclose(co.reshape(-1, 3), expected, atol=1e-5)
    basis = np.empty_like(co)
    keys["Basis"].data.foreach_get("co", basis)
    np.testing.assert_array_equal(basis.reshape(-1, 3),
                                  np.array([v.co[:] for v in grid.data.vertices], np.float32))
    bridge.write_outputs(grid, [bridge.shape_key_output("carved", moved)])
    assert [k.name for k in keys] == ["Basis", "carved", "carved_ot1"]


# ----------------------------------------------------------------------------- naming


def test_names_suffix_or_replace(bridge, grid):
    sig = bridge.Layer("tint", "POINT", "FLOAT_COLOR")
    first, second, third = (np.full((30, 4), v, np.float32) for v in (0.1, 0.2, 0.3))
    assert bridge.write_outputs(grid, [sig.signal(first)]) == {"tint": "tint"}
    assert bridge.write_outputs(grid, [sig.signal(second)]) == {"tint": "tint_ot1"}
    assert bridge.write_outputs(grid, [sig.signal(second)]) == {"tint": "tint_ot2"}
    assert bridge.write_outputs(grid, [sig.signal(third)], replace=True) == {"tint": "tint"}
    names = [a.name for a in grid.data.color_attributes]
    assert sorted(names) == ["tint", "tint_ot1", "tint_ot2"]
    np.testing.assert_array_equal(bridge.read_signal(grid, sig).values, third)


def test_name_clash_with_vertex_group(bridge, grid):
    # attributes.new returns None when a vertex group has the name (docs/platform.md)
    grid.vertex_groups.new(name="mask")
    assert grid.data.attributes.new("mask", 'FLOAT', 'POINT') is None
    sig = bridge.Layer("mask", "POINT", "FLOAT")
    values = np.arange(30, dtype=np.float32)
    assert bridge.write_outputs(grid, [sig.signal(values)]) == {"mask": "mask_ot1"}
    assert "mask" in grid.vertex_groups
    # Replace keeps the target layer's kind: the group stays, the float takes a fresh name
    assert bridge.write_outputs(grid, [sig.signal(values)], replace=True) == {"mask": "mask_ot2"}
    assert "mask" in grid.vertex_groups
    np.testing.assert_array_equal(bridge.read_signal(grid, bridge.Layer("mask_ot2", "POINT", "FLOAT")).values,
                                  values)


def test_blender_layers_are_never_replaced(bridge, grid):
    grid.data.uv_layers.new(name="UVMap")
    sig = bridge.Layer("UVMap", "POINT", "FLOAT")
    out = bridge.write_outputs(grid, [sig.signal(np.zeros(30, np.float32))], replace=True)
    assert out == {"UVMap": "UVMap_ot1"} and "UVMap" in grid.data.uv_layers


def test_long_names_are_shortened_uniquely(bridge, grid):
    # Blender keeps 67 bytes of an attribute name and 63 of a vertex-group or
    # shape-key name (measured, docs/platform.md); a longer result name is
    # shortened and always suffixed, so two names sharing their first bytes never
    # land on one layer
    first, second = "n" * 64 + "_carried", "n" * 64 + "_carriedX"
    out = bridge.write_outputs(grid, [bridge.Layer(first, "POINT", "FLOAT").signal(np.zeros(30, np.float32)),
                                      bridge.Layer(second, "POINT", "FLOAT").signal(np.ones(30, np.float32))])
    assert out == {first: "n" * 63 + "_ot1", second: "n" * 63 + "_ot2"}
    assert all(len(name.encode()) == 67 and name in grid.data.attributes for name in out.values())
    short = "m" * 67  # fits: written as it is (a 63-byte limit cut it)
    assert bridge.write_outputs(grid, [bridge.Layer(short, "POINT", "FLOAT").signal(np.zeros(30, np.float32))]) \
        == {short: short}
    group = "g" * 64   # one byte over a group's limit
    out = bridge.write_outputs(grid, [bridge.Layer(group, "POINT", "VERTEX_GROUP").signal(np.zeros(30, np.float32))])
    assert out == {group: "g" * 59 + "_ot1"} and out[group] in grid.vertex_groups
    key = "k" * 64
    vertices = np.array([v.co for v in grid.data.vertices], dtype=np.float64)
    out = bridge.write_outputs(grid, [bridge.shape_key_output(key, vertices)])
    assert out == {key: "k" * 59 + "_ot1"} and out[key] in grid.data.shape_keys.key_blocks


def test_refresh_replaces_without_the_replace_option(bridge, grid):
    sig = bridge.Layer("tint", "POINT", "FLOAT_COLOR")
    bridge.write_outputs(grid, [sig.signal(np.zeros((30, 4), np.float32))])
    out = bridge.write_outputs(grid, [sig.signal(np.ones((30, 4), np.float32))], refresh={"tint"})
    assert out == {"tint": "tint"} and [c.name for c in grid.data.color_attributes] == ["tint"]
    np.testing.assert_array_equal(bridge.read_signal(grid, sig).values, np.ones((30, 4), np.float32))


def test_replace_keeps_domain_type_and_colour_choices(bridge, grid):
    mesh = grid.data
    mesh.color_attributes.new("base", 'BYTE_COLOR', 'POINT')
    mesh.color_attributes.new("tint", 'BYTE_COLOR', 'CORNER')
    mesh.color_attributes.active_color_name = "base"
    mesh.color_attributes.render_color_index = 1          # "tint"
    values = RNG.random((30, 4)).astype(np.float32)
    carried = bridge.Layer("tint", "POINT", "FLOAT_COLOR").signal(values)
    out = bridge.write_outputs(grid, [carried, bridge.confidence_output(np.ones(30))], replace=True)
    assert out == {"tint": "tint", "overtone_confidence": "overtone_confidence"}
    attr = mesh.color_attributes["tint"]
    assert (attr.domain, attr.data_type) == ("CORNER", "BYTE_COLOR")   # the target's, not the source's
    names = [c.name for c in mesh.color_attributes]
    assert mesh.color_attributes.active_color_name == "base"
    assert names[mesh.color_attributes.render_color_index] == "tint"
    back = bridge.read_signal(grid, bridge.Layer("tint", "CORNER", "BYTE_COLOR")).values
    corner_vert = [lp.vertex_index for lp in mesh.loops]
    # each corner holds its vertex's value, to 8-bit sRGB precision (one step: 1/255 of the encoded value)
    np.testing.assert_allclose(srgb_encode(back[:, :3]), srgb_encode(values[corner_vert, :3]), atol=1.01 / 255)


def test_refreshed_shape_key_keeps_its_value(bridge, grid):
    positions = bridge.read_mesh(grid).vertices
    bridge.write_outputs(grid, [bridge.shape_key_output("carved", positions + 0.1)])
    grid.data.shape_keys.key_blocks["carved"].value = 0.4
    bridge.write_outputs(grid, [bridge.shape_key_output("carved", positions + 0.2)], refresh={"carved"})
    keys = grid.data.shape_keys.key_blocks
    assert [k.name for k in keys] == ["Basis", "carved"] and keys["carved"].value == pytest.approx(0.4)
    bridge.write_outputs(grid, [bridge.shape_key_output("carved", positions)], key_value=0.0)
    assert keys["carved_ot1"].value == 0.0


def test_stale_object_matrix_is_brought_up_to_date(bridge, grid):
    # a script sets the transform and reads at once: matrix_world is only updated by a
    # depsgraph evaluation (docs/platform.md), which read_mesh asks for
    grid.scale = (1.0, 1.6, 0.8)
    grid.location = (3.0, -1.0, 0.5)
    local = np.array([v.co[:] for v in grid.data.vertices])
    expected = local * np.array([1.0, 1.6, 0.8]) + np.array([3.0, -1.0, 0.5])
    np.testing.assert_allclose(bridge.read_mesh(grid).vertices, expected, atol=1e-6)
    np.testing.assert_allclose(bridge.read_mesh(grid, local=True).vertices, local, atol=0)


def test_shape_modifiers_are_named_only_when_they_change_the_shape(bridge, grid):
    assert bridge.shape_modifiers(grid) == []
    weld = grid.modifiers.new("weld", 'WELD')             # nothing closer than its distance: no change
    assert bridge.shape_modifiers(grid) == []
    mirror = grid.modifiers.new("mirror", 'MIRROR')
    assert bridge.shape_modifiers(grid) == ["weld", "mirror"]
    mirror.show_viewport = False
    weld.show_viewport = False
    assert bridge.shape_modifiers(grid) == []


# ----------------------------------------------------------------------------- all or nothing


@pytest.mark.parametrize("bad,match", [
    (np.full((30, 4), np.nan, np.float32), r"result 'b' for object 'grid': non-finite value at row 0"),
    (np.zeros((29, 4), np.float32), r"expected shape \(30, 4\), got \(29, 4\)"),
])
def test_bad_array_leaves_target_unchanged(bridge, grid, bad, match):
    grid.data.color_attributes.new("old", 'BYTE_COLOR', 'CORNER')
    grid.vertex_groups.new(name="g").add(range(30), 0.5, 'REPLACE')
    before = snapshot(grid)
    good = bridge.Layer("a", "POINT", "FLOAT_COLOR").signal(np.zeros((30, 4), np.float32))
    with pytest.raises(ValueError, match=match):
        bridge.write_outputs(grid, [good, bridge.Layer("b", "POINT", "FLOAT_COLOR").signal(bad)])
    assert snapshot(grid) == before


@pytest.mark.parametrize("signal,values,match", [
    (("w", "weight", "POINT", "VERTEX_GROUP"), np.full(30, 1.5), r"weights must lie in \[0, 1\], got \[1.5, 1.5\]"),
    (("l", "label", "POINT", "INT"), np.full(30, 0.5), "labels must be whole numbers"),
    (("m", "mask", "POINT", "BOOLEAN"), np.zeros(30), "a mask needs bool values, got float64"),
    (("f", "float", "EDGE", "FLOAT"), np.zeros(49), "domain 'EDGE' not supported for FLOAT"),
    (("i", "label", "CORNER", "INT"), np.zeros(80), "domain 'CORNER' not supported for INT"),
    (("f", "color", "POINT", "FLOAT"), np.zeros(30), "kind 'color' does not match data type FLOAT"),
    ((".f", "float", "POINT", "FLOAT"), np.zeros(30), "names must be non-empty and not start with '.'"),
])
def test_invalid_outputs_are_refused(bridge, grid, signal, values, match):
    before = snapshot(grid)
    with pytest.raises(ValueError, match=match):
        name, kind, domain, data_type = signal
        sig = dataclasses.replace(bridge.Layer(name, domain, data_type).signal(values), kind=kind)
        bridge.write_outputs(grid, [sig])
    assert snapshot(grid) == before


def test_duplicate_result_names_are_refused(bridge, grid):
    out = bridge.Layer("x", "POINT", "FLOAT").signal(np.zeros(30, np.float32))
    with pytest.raises(ValueError, match="two results are called 'x'"):
        bridge.write_outputs(grid, [out, out])


def test_failure_midway_removes_what_was_added(bridge, grid, monkeypatch):
    grid.data.color_attributes.new("old", 'FLOAT_COLOR', 'POINT')
    before = snapshot(grid)
    assert before["shapes"] is None
    real = bridge._write_layer
    calls = []

    def flaky(obj, mesh, sig, name, values, *rest):
        calls.append(name)
        if len(calls) == 4:
            raise RuntimeError("disk on fire")
        real(obj, mesh, sig, name, values, *rest)

    monkeypatch.setattr(bridge, "_write_layer", flaky)
    n = 30
    outputs = [
        bridge.Layer("arm", "POINT", "VERTEX_GROUP").signal(np.full(n, 0.25)),
        bridge.shape_key_output("carved", bridge.read_mesh(grid).vertices + 1.0),
        bridge.Layer("old", "POINT", "FLOAT_COLOR").signal(np.ones((n, 4))),
        bridge.Layer("h", "POINT", "FLOAT").signal(np.ones(n)),
    ]
    with pytest.raises(RuntimeError, match="disk on fire"):
        bridge.write_outputs(grid, outputs, replace=True)
    assert calls == ["arm", "carved", "old_ot1", "h"]
    assert snapshot(grid) == before
    assert grid.data.shape_keys is None


def test_write_refuses_edit_mode(bridge, grid):
    bpy.context.view_layer.objects.active = grid
    bpy.ops.object.mode_set(mode='EDIT')
    try:
        with pytest.raises(ValueError, match="object 'grid' is in edit mode"):
            bridge.write_outputs(grid, [])
    finally:
        bpy.ops.object.mode_set(mode='OBJECT')


# ----------------------------------------------------------------------------- save and reload


def test_results_survive_save_and_reload(bridge, sphere, tmp_path):
    n, c = len(sphere.data.vertices), len(sphere.data.loops)
    place(sphere)
    colour = RNG.random((c, 4)).astype(np.float32)
    weights = RNG.random(n).astype(np.float32)
    weights[::4] = 0
    height = RNG.normal(size=n).astype(np.float32)
    moved = bridge.read_mesh(sphere).vertices * 1.1
    outputs = [bridge.Layer("paint", "CORNER", "FLOAT_COLOR").signal(colour),
               bridge.Layer("arm", "POINT", "VERTEX_GROUP").signal(weights),
               bridge.Layer("height", "POINT", "FLOAT").signal(height),
               bridge.shape_key_output("puffed", moved)]
    bridge.write_outputs(sphere, outputs)
    before = snapshot(sphere)
    path = tmp_path / "saved.blend"
    bpy.ops.wm.save_as_mainfile(filepath=str(path))
    bpy.ops.wm.open_mainfile(filepath=str(path))
    again = bpy.data.objects["sphere"]
    assert snapshot(again) == before
    signals = {s.name: s for s in bridge.list_layers(again)}
    np.testing.assert_array_equal(bridge.read_signal(again, signals["paint"]).values, colour)
    np.testing.assert_array_equal(bridge.read_signal(again, signals["arm"]).values, weights)


def test_big_mesh_weights(bridge, scene):
    # 30k vertices: the same exact round trip at a production size
    big = make_grid("big", 174, 174)
    weights = RNG.random(174 * 174).astype(np.float32)
    weights[::7] = 0
    bridge.write_outputs(big, [bridge.Layer("w", "POINT", "VERTEX_GROUP").signal(weights)])
    np.testing.assert_array_equal(bridge.read_vertex_groups(big)["w"], weights)


def test_sphere_builder_is_closed(sphere):
    # each edge of a closed surface has exactly two faces (common practice)
    import collections
    counts = collections.Counter(tuple(sorted(e.vertices)) for e in sphere.data.edges)
    faces_per_edge = collections.Counter()
    for poly in sphere.data.polygons:
        for key in poly.edge_keys:
            faces_per_edge[key] += 1
    assert set(faces_per_edge.values()) == {2} and len(counts) == len(faces_per_edge)
    assert make_sphere("s2", 4, 6).data.polygons[0].loop_total == 3


def test_signals_as_shown_follow_the_modifiers(bridge, grid):
    group = grid.vertex_groups.new(name="edge")
    group.add([v.index for v in grid.data.vertices if v.co.x == 0], 1.0, 'REPLACE')
    height = grid.data.attributes.new("height", 'FLOAT', 'POINT')
    height.data.foreach_set("value", np.array([v.co.x for v in grid.data.vertices], np.float32))
    grid.modifiers.new("sub", 'SUBSURF').levels = 1
    signals = {s.name: s for s in bridge.list_layers(grid, evaluated=True)}
    weights = bridge.read_signal(grid, signals["edge"], evaluated=True).values
    heights = bridge.read_signal(grid, signals["height"], evaluated=True).values
    shown = bridge.read_mesh(grid, evaluated=True)
    assert weights.shape == heights.shape == (99,)
    # x = 0 column keeps weight 1 and interior columns lose it; height follows x
    np.testing.assert_allclose(weights[np.isclose(shown.vertices[:, 0], 0)], 1.0)
    assert np.all(weights[shown.vertices[:, 0] > 1] == 0)
    assert np.all(np.diff(heights[np.argsort(shown.vertices[:, 0], kind="stable")]) >= -1e-6)
