"""Characters made of pieces and shapes of different kinds, as the artist meets them in
Last Run: the pieces line, the piece without a counterpart named and selectable, and the
warning that two meshes are probably not the same kind of object.

The meshes come from tests/characters.py (a generated creature with eyes and a ring
round its tail, a lumpy ball, a ring); the truth checked is by construction: the ring is
on the target only, so it can have no counterpart on the source.
"""

import json
import sys
import textwrap
from pathlib import Path

import bpy
import numpy as np
import pytest

from .conftest import MODULE, make_mesh, select
from .test_panels import draw_all

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))
from tests import characters  # noqa: E402  (the repository's generators, after the path)

SELECT = "overtone.select_uncertain"


def _painted(name, vertices, faces):
    obj = make_mesh(name, vertices, faces)
    rgba = np.column_stack([vertices / max(np.abs(vertices).max(), 1e-9), np.ones(len(vertices))])
    obj.data.color_attributes.new("tint", 'FLOAT_COLOR', 'POINT').data.foreach_set(
        "color", rgba.astype(np.float32).ravel())
    return obj


def _carry(scene):
    """Run the carry operator's ``execute`` with a stand-in ``self`` that keeps its reports."""
    from .standins import StandIn
    cls = bpy.types.OVERTONE_OT_transfer_attributes
    op = StandIn(cls)
    result = cls.execute(op, bpy.context)
    return result, op.reports


def _figure_pair(scene, target_pieces):
    vs, fs, _ = characters.character(0.6, seed=0, pieces=("eyes",))
    vt, ft, lt = characters.character(0.5, seed=1, pieces=target_pieces)
    src, tgt = _painted("Figure", vs, fs), make_mesh("Figure again", vt, ft)
    select(src, tgt)
    return src, tgt, lt


def _selected(obj):
    flags = np.zeros(len(obj.data.vertices), bool)
    obj.data.vertices.foreach_get("select", flags)
    return flags


def test_a_piece_without_counterpart_is_named_warned_about_and_selectable(overtone, scene):
    src, tgt, label = _figure_pair(scene, ("eyes", "ring"))
    ring = np.flatnonzero(label == 3)          # the ring round the tail: the target's alone
    result, reports = _carry(scene)
    assert result == {'FINISHED'}
    [(level, text)] = reports
    assert level == {'WARNING'}
    assert "1 of 4 pieces found no counterpart on the source" in text
    assert f"the piece of {len(ring)} vertices" in text and f"(vertex {ring.min()})" in text
    report = json.loads(scene.overtone.report_json)
    assert report["correspondence"]["pieces"]["unmatched_target"][0]["first_vertex"] == ring.min()
    # its confidence is zero, so it is in the uncertain group
    rgba = np.empty(len(tgt.data.vertices) * 4, np.float32)
    tgt.data.attributes["overtone_confidence"].data.foreach_get("color", rgba)
    confidence = rgba.reshape(-1, 4)[:, 1]     # stored (1, c, c, c): bridge.confidence_output
    assert np.all(confidence[ring] == 0.0)
    # Last Run: the line (once, wrapped to the sidebar) in the Check box, with the button
    panel = draw_all()["OVERTONE_PT_report"]
    lines, chars = panel.texts(), 40
    joined = " ".join(lines)
    assert joined.count("found no counterpart") == 1
    assert all(len(line) <= chars for line in lines)
    assert "Check" in lines and SELECT in panel.operators()
    assert panel.operators().count(SELECT) == 1
    # the button selects the ring (and only uncertain vertices)
    assert bpy.ops.overtone.select_uncertain() == {'FINISHED'}
    bpy.ops.object.mode_set(mode='OBJECT')
    chosen = _selected(tgt)
    assert chosen[ring].all()
    assert np.all(confidence[chosen] < 0.5)


def test_pieces_that_all_found_their_counterpart_read_as_one_line(overtone, scene):
    src, tgt, label = _figure_pair(scene, ("eyes",))
    result, reports = _carry(scene)
    assert result == {'FINISHED'}
    assert "pieces" not in reports[0][1] and "counterpart" not in reports[0][1]
    assert scene.overtone.report_pieces == "3 pieces: each found its counterpart on the source"
    assert not scene.overtone.report_pieces_warn
    panel = draw_all()["OVERTONE_PT_report"]
    icons = {b.get("text"): b.get("icon") for f, b in panel.log if f == "label"}
    first = textwrap.wrap(scene.overtone.report_pieces, 40)[0]   # 40 characters without a region
    assert icons[first] == 'CHECKMARK'
    assert SELECT not in panel.operators() or scene.overtone.report_uncertain > 0.0


def test_a_ball_carried_onto_a_ring_is_called_another_kind_of_object(overtone, scene):
    vs, fs = characters.blob()
    vt, ft = characters.ring(0.0, 1.0, 0.35, 40, 16)
    src, tgt = _painted("Ball", vs, fs), make_mesh("Ring", vt, ft)
    select(src, tgt)
    # most of the ring finds no reliable place: refused, and the reason says why
    with pytest.raises(RuntimeError):
        bpy.ops.overtone.transfer_attributes()
    assert "probably not the same kind of object" in scene.overtone.report_text
    assert "overtone_confidence" not in tgt.data.attributes
    scene.overtone.write_anyway = True
    result, reports = _carry(scene)
    assert result == {'FINISHED'}
    [(level, text)] = reports
    assert level == {'WARNING'} and "probably not the same kind of object" in text
    assert "the source has 0 and the target 1 handles" in text
    panel = draw_all()["OVERTONE_PT_report"]
    assert "Check" in panel.texts()
    assert "probably not the same kind of object" in " ".join(panel.texts())
    assert "probably not the same kind" in scene.overtone.report_warnings


def test_automatic_matching_says_which_way_it_kept_and_why(overtone, scene):
    """A copy turned a quarter about its long axis in place overlaps the original, yet
    almost every point of it is elsewhere: automatic matching checks the match in place
    against a match by shape and keeps the surer one, and Last Run says so in one sentence."""
    pair = characters.rolled((30, 16))
    src = _painted("Original", pair.source_vertices, pair.source_faces)
    tgt = make_mesh("Turned", pair.target_vertices, pair.target_faces)
    select(src, tgt)
    result, reports = _carry(scene)
    assert result == {'FINISHED'}
    report = json.loads(scene.overtone.report_json)
    checked = report["correspondence"]["self_check"]
    assert checked["kept"] == report["mode"] == "intrinsic"
    reason = scene.overtone.report_reason
    assert reason.startswith("The meshes sit on top of each other (100% of the target lies on the source), yet")
    assert reason.endswith("the shape match was kept.")
    assert f"mean confidence {checked['intrinsic_mean']:.2f} by shape against {checked['aligned_mean']:.2f} in place" \
        in reason
    assert reason.count(".") == 3      # one sentence (two decimal points, one full stop)
    assert "edge length" not in reason and "intrinsic" not in reason
    lines = draw_all()["OVERTONE_PT_report"].texts()
    assert lines.count("Matched by shape") == 1 and "matched by shape" not in reason.lower()


def test_weak_and_unused_pieces_are_named_where_they_sit(overtone):
    """The words for a piece matched with low confidence and a source piece nobody took:
    size, side of the mesh's bounding box (a sixth of its size from the middle) and first vertex."""
    runs = __import__(MODULE + ".runs", fromlist=["runs"])
    box = np.array([[-1.0, -1.0, -1.0], [1.0, 1.0, 1.0]])
    body = {"piece": 0, "vertices": 500, "first_vertex": 0, "centre": [0.0, 0.0, 0.0], "counterpart": 0,
            "confidence": 0.9}
    weak = {"piece": 1, "vertices": 12, "first_vertex": 40, "centre": [0.8, -0.5, 0.1], "counterpart": 2,
            "confidence": 0.3}
    sure = {"piece": 2, "vertices": 30, "first_vertex": 60, "centre": [0.0, 0.0, 0.9], "counterpart": 1,
            "confidence": 0.8}
    unused = {"piece": 3, "vertices": 8, "first_vertex": 90, "centre": [0.0, 0.0, -0.05]}
    report = {"correspondence": {"pieces": {"target_pieces": 3, "target": [body, weak, sure],
                                            "unmatched_target": [], "unused_source": [unused]}}}
    line, warn = runs.pieces_line(report, box, box)
    assert warn
    assert line == ("1 of 3 pieces matched with low confidence: the piece of 12 vertices toward +X, front "
                    "(vertex 40); their vertices are in the vertex group 'overtone_uncertain'; 1 source piece "
                    "went nowhere: the piece of 8 vertices in the middle (vertex 90)")
    weak["confidence"] = 0.6
    report["correspondence"]["pieces"]["unused_source"] = []
    assert runs.pieces_line(report, box, box) == ("3 pieces: each found its counterpart on the source", False)
    assert runs.pieces_line({"correspondence": {}}, box, box) == ("", False)
