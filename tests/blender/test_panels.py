"""Every registered Overtone panel, list and preferences page drawn in real bpy.

Panels are never drawn in module mode (docs/platform.md), so each ``draw`` is
called here with a stand-in ``self`` and the recording layout of
``standins.py``, which checks every property, operator, list, icon and
keyword against Blender's own RNA. The classes are discovered from what is
registered, so a panel added later is drawn too. Each panel is drawn in the
states an artist meets: nothing selected, a pair selected, the layer list
read, a run in progress, after a carry, a smoothed carry, a preview, a detail
run and an error.
"""

import importlib
import json
import textwrap

import bpy
import numpy as np
import pytest

from .conftest import MODULE, engine_module, make_grid, make_mesh, select
from .standins import Context, Layout, Region, StandIn
from .test_operators import painted_pair, read


def registered(base):
    """Every registered subclass of ``base`` defined by the extension."""
    found, stack = [], [base]
    while stack:
        for sub in stack.pop().__subclasses__():
            stack.append(sub)
            if sub.__module__.startswith(MODULE) and getattr(bpy.types, sub.__name__, None) is sub:
                found.append(sub)
    return found


def draw_all(context=None):
    """Draw every registered Overtone panel (header too, where it has one).

    Returns {panel class name: Layout}; a panel whose ``poll`` says no is left out."""
    context = context or Context(region=None)
    drawn = {}
    for cls in registered(bpy.types.Panel):
        if "poll" in vars(cls) and not cls.poll(context):
            continue
        layout = Layout(context)
        standin = StandIn(cls, layout=layout)
        if hasattr(cls, "draw_header"):
            cls.draw_header(standin, context)
        cls.draw(standin, context)
        drawn[cls.__name__] = layout
    return drawn


def texts(drawn):
    return [t for layout in drawn.values() for t in layout.texts()]


# every panel draws, and the click path runs, on each Blender the manifest claims
pytestmark = pytest.mark.every_blender


@pytest.fixture
def ui(overtone):
    return importlib.import_module(MODULE + ".panels")


def test_the_extension_registers_panels_a_list_and_preferences(overtone):
    panels = {c.__name__: c for c in registered(bpy.types.Panel)}
    assert {"OVERTONE_PT_main", "OVERTONE_PT_method", "OVERTONE_PT_detail",
            "OVERTONE_PT_report"} <= set(panels)
    assert [c.__name__ for c in registered(bpy.types.UIList)] == ["OVERTONE_UL_layers"]
    for cls in panels.values():
        parent = getattr(cls, "bl_parent_id", "")
        assert not parent or parent in panels, f"{cls.__name__}: parent {parent!r} not registered"
    # method choices wait in a closed sub-panel
    assert panels["OVERTONE_PT_method"].bl_options == {'DEFAULT_CLOSED'}
    assert panels["OVERTONE_PT_method"].bl_parent_id == "OVERTONE_PT_main"


def test_preferences_draw(overtone):
    prefs = bpy.context.preferences.addons[MODULE].preferences
    cls = type(prefs)
    layout = Layout(Context())
    cls.draw(StandIn(cls, fallback=prefs, layout=layout), Context())
    assert layout.props() == [("OvertonePreferences", "cache_folder"),
                              ("OvertonePreferences", "cache_limit_mb")]
    assert layout.operators() == ["overtone.clear_cache"]


def test_a_missing_property_or_operator_fails_the_recorder(overtone, scene):
    # the recorder itself: a wrong name must not pass unnoticed
    layout = Layout(Context())
    with pytest.raises(AssertionError, match="has no property 'no_such_setting'"):
        layout.prop(scene.overtone, "no_such_setting")
    with pytest.raises(KeyError):
        layout.operator("overtone.no_such_operator")
    with pytest.raises(AssertionError, match="unknown icon"):
        layout.label(text="x", icon='NO_SUCH_ICON')
    with pytest.raises(AssertionError, match="has no parameter 'txt'"):
        layout.label(txt="x")
    with pytest.raises(AssertionError, match="UILayout has no property 'colour'"):
        layout.colour = 1


def test_nothing_selected(ui, scene):
    drawn = draw_all()
    words = texts(drawn)
    assert "From: (also select a source mesh)" in words
    assert "To: (make the target mesh active)" in words
    assert "Nothing carried yet" in words
    assert "overtone.transfer_attributes" in drawn["OVERTONE_PT_main"].operators()


def test_a_pair_selected_and_its_layers_read(ui, scene):
    src, tgt = painted_pair(scene)
    drawn = draw_all()
    words = texts(drawn)
    assert "From: Painted" in words and "To: Plain" in words
    assert "Carries every colour attribute and vertex group." in " ".join(words)
    assert bpy.ops.overtone.refresh_signals() == {'FINISHED'}
    drawn = draw_all()
    main = drawn["OVERTONE_PT_main"]
    assert [f for f, _ in main.log].count("template_list") == 1
    # every layer drawn through the list's draw_item, in artists' words
    words = main.texts()
    for name, kind in (("tint", "colour, per vertex"), ("tint_bytes", "colour, per face corner"),
                       ("dirt", "number, per vertex"), ("flow", "vector, per vertex"),
                       ("head", "vertex group")):
        assert words[words.index(name) + 1] == kind
    assert main.props().count(("OvertoneSignalItem", "use")) == len(scene.overtone.signals) == 5
    # every registered list is drawn by some panel
    lists = {b["listtype_name"] for layout in drawn.values() for f, b in layout.log if f == "template_list"}
    assert lists == {c.__name__ for c in registered(bpy.types.UIList)}


def test_uv_maps_and_face_attributes_are_named_as_blender_names_them(ui, scene):
    src, tgt = painted_pair(scene)
    src.data.uv_layers.new(name="UVMap")
    src.data.attributes.new("material_index", 'INT', 'FACE')
    assert bpy.ops.overtone.refresh_signals() == {'FINISHED'}
    main = draw_all()["OVERTONE_PT_main"]
    words = main.texts()
    # a UV map is a UV map to an artist, not "a vector per face corner"
    assert words[words.index("UVMap") + 1] == "UV map"
    assert words[words.index("material_index") + 1] == "whole number, per face"
    icons = {b.get("text"): b.get("icon") for f, b in main.log if f == "label"}
    assert icons["UVMap"] == 'GROUP_UVS'


def test_the_main_flow_speaks_of_attributes_not_methods(ui, scene):
    painted_pair(scene)
    bpy.ops.overtone.refresh_signals()
    drawn = draw_all()
    main = drawn["OVERTONE_PT_main"]
    method = {name for _, name in drawn["OVERTONE_PT_method"].props()}
    assert method == {"match_mode", "basis", "eigenfunctions", "product_order"}
    assert not method & {name for _, name in main.props()}
    settings_rna = scene.overtone.bl_rna.properties
    shown = main.texts() + [settings_rna[name].name for _, name in main.props() if name in settings_rna]
    shown += [getattr(bpy.types, _op_class(op)).bl_label for op in main.operators()]
    for word in ("Signal", "Eigen", "Basis", "Product", "Laplac"):
        assert not [text for text in shown if word.lower() in text.lower()], word
    # tooltips say what a choice changes, not how we rate it
    for prop in settings_rna:
        items = getattr(prop, "enum_items", ())
        for text in [prop.description] + [item.description for item in items]:
            assert "our measurements" not in text


def _op_class(idname):
    group, _, name = idname.partition(".")
    return f"{group.upper()}_OT_{name}"


def test_while_running_the_buttons_wait_and_progress_shows(ui, scene):
    painted_pair(scene)
    settings = scene.overtone
    progress = engine_module("common.progress")
    settings.running = True   # the stage a run is in, as the operators show it
    importlib.import_module(MODULE + ".operators").show_step(settings, progress.Step(progress.MATCHING, 2, 4, 1.0))
    main = draw_all()["OVERTONE_PT_main"]
    assert ("progress", "Matching the surfaces (2 of 4)") in [(b["property"], b.get("text"))
                                                            for f, b in main.log if f == "prop"]
    assert settings.progress == 0.25
    assert "Esc cancels" in main.texts()
    # the run buttons are drawn disabled (a second run is refused anyway)
    assert main.log.count(("set", {"enabled": False})) == 2
    assert len(main.operators()) == 4  # the list refresh and the three run buttons
    scene.overtone.running = False
    assert draw_all()["OVERTONE_PT_main"].log.count(("set", {"enabled": False})) == 0


def test_after_a_carry_the_report_says_what_to_act_on(ui, scene):
    src, tgt = painted_pair(scene)
    for obj, name in ((src, "snout"), (tgt, "snout")):
        group = obj.vertex_groups.new(name=name)
        group.add(list(range(20)), 1.0, 'REPLACE')
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    report = json.loads(scene.overtone.report_json)
    words = texts(draw_all())
    joined = " ".join(words)
    assert "Nothing carried yet" not in words
    assert "carried 3 layers from 'Painted' to 'Plain'" in joined
    assert "Matched by position" in joined
    # why, in words: the share of the target on the source, no engine figures
    near = report["correspondence"]["overlap"]["target_near_source"]
    assert scene.overtone.report_reason == (
        f"The meshes sit on top of each other ({near:.0%} of the target lies on the source): "
        "each target vertex took what lies closest to it on the source.")
    # the way they were matched is said once: the line under the summary, explained by the reason
    assert "(mean confidence" in scene.overtone.report_text
    assert joined.lower().count("matched by position") == 1
    share = report["uncertain_share"]
    assert f"{ui.percent_words(share)} of vertices uncertain (confidence under " \
           f"{report['uncertain_below']:.2f})" in joined
    # every line of the report fits the sidebar
    assert all(len(line) <= ui.wrap_width(Context(region=None)) for line in
               draw_all()["OVERTONE_PT_report"].texts())
    assert "snout: vertex group on both meshes, used to line them up" in joined
    # the panel draws the stored (single-precision) seconds: the same time, which may round
    # to the other side of a millisecond than the report's double
    assert scene.overtone.report_seconds == pytest.approx(report["timings"]["wall"], abs=1e-6)
    assert f"Took {ui.duration_words(scene.overtone.report_seconds)}" in words
    first = {"computed": "Computed now", "disk": "Read from the cache folder"}[
        report["cache_hits"]["correspondence"]]
    assert f"{first}: the match" in joined and "Reused" not in joined
    # direct values (the default): nothing is smoothed, so no "lost" figures
    assert "Lost by smoothing (on the source)" not in words
    # the same carry again: the match comes from memory, the time is this run's
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    again = json.loads(scene.overtone.report_json)
    assert again["pair"] == "memory"
    # the stored report (what batch writes and the panel reads) is this run's own:
    # the kept match is not "computed" again, and no first-run time comes along
    assert again["cache_hits"] == {"correspondence": "memory",
                                   "source": {"memory": 0, "disk": 0, "computed": 0},
                                   "target": {"memory": 0, "disk": 0, "computed": 0}}
    assert "correspondence" not in again["timings"]
    assert set(again["timings"]) == {"bases", "signals", "total", "wall"}
    words = texts(draw_all())
    assert "Reused the match of the last run on these meshes (kept in memory)." in " ".join(words)
    assert "the match," not in " ".join(words)
    assert scene.overtone.report_seconds == pytest.approx(again["timings"]["wall"], abs=1e-6)
    assert f"Took {ui.duration_words(scene.overtone.report_seconds)}" in words


def test_copies_placed_apart_are_told_about_ignore_placement(ui, scene):
    src, tgt = painted_pair(scene)
    tgt.location = (0.0, 6.0, 0.0)
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    reason = scene.overtone.report_reason
    assert reason.startswith("The meshes do not sit on top of each other (only 0% of the target lies on")
    assert "edge length" not in reason and "intrinsic" not in reason
    assert "(mean confidence" in scene.overtone.report_text and "matched" not in scene.overtone.report_text
    # the same creature re-meshed is a copy placed apart: the warning says what to tick, once
    label = scene.overtone.bl_rna.properties["local_space"].name
    words = " ".join(draw_all()["OVERTONE_PT_report"].texts())
    assert "Matched by shape" in words and words.count(label) == 1
    assert label in scene.overtone.report_warnings and label not in reason
    # not a copy (its own mesh is larger): no warning, the reason points to the option
    positions = np.empty(len(tgt.data.vertices) * 3, np.float32)
    tgt.data.attributes["position"].data.foreach_get("vector", positions)
    tgt.data.attributes["position"].data.foreach_set("vector", positions * 1.2)
    tgt.data.update()
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    assert label not in scene.overtone.report_warnings
    assert scene.overtone.report_reason.endswith(f"Copies of one asset placed apart match best with {label} ticked.")
    tgt.data.attributes["position"].data.foreach_set("vector", positions)
    tgt.data.update()
    scene.overtone.local_space = True   # ticked: matched in place, and no hint
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    assert scene.overtone.report_reason.startswith("The meshes sit on top of each other (100% of")
    scene.overtone.local_space, scene.overtone.match_mode = False, "INTRINSIC"
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    assert scene.overtone.report_reason == "As chosen under Method (0% of the target lies on the source)."
    words = " ".join(draw_all()["OVERTONE_PT_report"].texts()).lower()
    assert words.count("matched by shape") == 1


def test_warnings_and_notes_stay_in_the_panel(ui, scene):
    # the status bar forgets a warning within seconds: the Last Run panel keeps it
    src, tgt = painted_pair(scene)
    src.modifiers.new("mirror", 'MIRROR')
    tgt.data.color_attributes.new("tint", 'FLOAT_COLOR', 'POINT')   # the target's own "tint"
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    report = json.loads(scene.overtone.report_json)
    [warning] = report["warnings"]
    [note] = [n for n in report["notes"] if "'tint'" in n]
    drawn = draw_all()["OVERTONE_PT_report"]
    lines, chars = drawn.texts(), ui.wrap_width(Context(region=None))
    labels = [(b.get("text"), b.get("icon")) for f, b in drawn.log if f == "label"]
    assert labels[0][1] == 'ERROR' and ("Check", 'ERROR') in labels
    for text in (warning, note):
        wrapped = textwrap.wrap(text, chars)
        start = lines.index(wrapped[0])
        assert lines[start:start + len(wrapped)] == wrapped
    # a clean run: no box, a tick
    src.modifiers.clear()
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    drawn = draw_all()["OVERTONE_PT_report"]
    assert "Check" not in drawn.texts()
    assert [b.get("icon") for f, b in drawn.log if f == "label"][0] == 'CHECKMARK'
    # an error clears what the last run left
    make_grid("Extra").select_set(True)
    with pytest.raises(RuntimeError):
        bpy.ops.overtone.transfer_attributes()
    assert scene.overtone.report_warnings == scene.overtone.report_notes == ""


def test_after_a_smoothed_carry_the_loss_per_layer_shows(ui, scene):
    painted_pair(scene)
    scene.overtone.basis = "LAPLACIAN"
    scene.overtone.eigenfunctions = 30
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    report = draw_all()["OVERTONE_PT_report"]
    assert "Lost by smoothing (on the source)" in report.texts()
    assert [n for _, n in report.props()].count("source_error") == 3  # tint, tint_bytes, head


def test_after_a_preview_and_a_detail_run(ui, scene):
    painted_pair(scene)
    assert bpy.ops.overtone.preview_carry() == {'FINISHED'}
    report = draw_all()["OVERTONE_PT_report"]
    joined = " ".join(report.texts())
    assert joined.startswith("previewed 3 layers on 'Painted', written beside them as <name>_carried")
    for word in ("products", "K=", "order", "error"):  # no method figures in the first line
        assert word not in scene.overtone.report_text
    assert "Direct values arrive as they are." in joined
    assert "Lost by smoothing (on the source)" in report.texts()
    assert "report_confidence" not in {n for _, n in report.props()}  # nothing was matched
    assert bpy.ops.overtone.transfer_detail() == {'FINISHED'}
    report = draw_all()["OVERTONE_PT_report"]
    assert " ".join(report.texts()).startswith("carried detail from 'Painted' to 'Plain'")


def test_after_an_error_the_message_fits_the_sidebar(ui, scene):
    src, tgt = painted_pair(scene)
    extra = make_grid("Extra")
    extra.select_set(True)
    with pytest.raises(RuntimeError):
        bpy.ops.overtone.transfer_attributes()
    message = scene.overtone.report_text
    for width in (None, 180, 400):
        context = Context(region=None if width is None else Region(width))
        report = draw_all(context)["OVERTONE_PT_report"]
        lines = report.texts()
        chars = ui.wrap_width(context)
        assert lines == textwrap.wrap(message, chars) and len(lines) > 1
        assert all(len(line) <= chars for line in lines)
        assert [b.get("icon") for f, b in report.log if f == "label"][0] == 'ERROR'
    assert ui.wrap_width(Context(region=Region(180))) < ui.wrap_width(Context(region=Region(400)))


def test_select_uncertain_is_drawn_when_registered(ui, scene):
    # the button appears once an operator of that name exists and some vertices are uncertain
    painted_pair(scene)
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    settings = scene.overtone
    settings.report_uncertain, settings.report_uncertain_below = 0.25, 0.5
    registered_now = hasattr(bpy.types, "OVERTONE_OT_select_uncertain")
    ops = draw_all()["OVERTONE_PT_report"].operators()
    assert (ui.SELECT_UNCERTAIN in ops) == registered_now
    if registered_now:
        return
    class OVERTONE_OT_select_uncertain(bpy.types.Operator):
        bl_idname, bl_label = ui.SELECT_UNCERTAIN, "Select Uncertain"

        def execute(self, context):
            return {'FINISHED'}
    bpy.utils.register_class(OVERTONE_OT_select_uncertain)
    try:
        assert ui.SELECT_UNCERTAIN in draw_all()["OVERTONE_PT_report"].operators()
    finally:
        bpy.utils.unregister_class(OVERTONE_OT_select_uncertain)


def test_durations_and_shares_in_words(ui):
    assert [ui.duration_words(v) for v in (0.0213, 2.54, 24.6, 65.2)] == ["21 ms", "2.5 s", "24.6 s",
                                                                          "1 min 5 s"]
    # a handful of uncertain vertices never reads as 0%
    assert [ui.percent_words(v) for v in (0.0, 0.0004, 0.004, 0.25, 1.0)] == ["0%", "0.1%", "0.4%",
                                                                             "25%", "100%"]


def test_a_partial_source_reports_its_uncertain_vertices(ui, scene):
    # the source is the front part of the target's body only: target vertices beyond
    # it have nothing under them, and their round trip through the maps misses
    demo = engine_module("jobs.demo")
    body = demo.creature(30, 16)
    front = body.vertices[body.faces].mean(axis=1)[:, 0] < np.median(body.vertices[:, 0])
    used, faces = np.unique(body.faces[front], return_inverse=True)
    src = make_mesh("Front", body.vertices[used], faces.reshape(-1, 3))
    src.data.color_attributes.new("tint", 'FLOAT_COLOR', 'POINT')
    t = demo.creature(28, 18, twist_offset=True)
    tgt = make_mesh("Whole", t.vertices, t.faces)
    select(src, tgt)
    scene.overtone.match_mode = "ALIGNED"
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    report = json.loads(scene.overtone.report_json)
    bridge = importlib.import_module(MODULE + ".bridge")
    confidence = read(type("M", (), {"bridge": bridge}), tgt, "overtone_confidence")[:, 1]
    share = float(np.mean(confidence < report["uncertain_below"]))
    assert report["uncertain_share"] == pytest.approx(share, abs=1.5 / len(confidence))
    assert 0.1 < share < 0.9  # the back half, roughly
    assert scene.overtone.report_uncertain == pytest.approx(share, abs=1.5 / len(confidence))
    words = " ".join(draw_all()["OVERTONE_PT_report"].texts())
    assert f"{ui.percent_words(scene.overtone.report_uncertain)} of vertices uncertain" in words
