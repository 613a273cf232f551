"""Settings of one transfer, kept on the scene (``scene.overtone``).

Read by the operators and the batch runner; drawn by the panels.
"""

from __future__ import annotations

from typing import cast

import bpy
from bpy.props import (BoolProperty, CollectionProperty, EnumProperty, FloatProperty,
                       IntProperty, PointerProperty, StringProperty)

from .engine.carrying.transfer import BASES as ENGINE_BASES

__all__ = ["OvertoneSignalItem", "OvertoneSignalReport", "OvertoneSettings", "MATCH_MODES", "BASES", "settings_of",
           "register", "unregister"]

MATCH_MODES = [
    ("AUTO", "Automatic",
     "Look at how closely the two meshes sit on top of each other and choose one of the two ways below"),
    ("ALIGNED", "Same Place",
     "The meshes sit on top of each other (a scan and its retopology, two levels of detail): each "
     "target vertex takes what lies closest to it on the source"),
    ("INTRINSIC", "Same Shape, Any Pose",
     "The meshes are the same character in another pose, place or size: they are matched by the "
     "shape of the surface itself, wherever each one is"),
]
BASES = [
    ("POINTWISE", "Direct",
     "Each target vertex takes the source's value where it lands: sharp paint edges, fine detail "
     "and any noise arrive as they are"),
    ("ORTHOPRODUCTS", "Smoothed, Keep Detail",
     "Rebuild each value from the source surface's own wave patterns and their combinations before "
     "carrying: noise and stray values soften, medium-size detail stays, sharp edges blur a little"),
    ("LAPLACIAN", "Smoothed",
     "Rebuild each value from the source surface's broad wave patterns only: gradients and large "
     "masks come out clean, small detail and sharp edges blur"),
    ("PRODUCTS", "Smoothed, Keep Detail (Unbalanced)",
     "Like Smoothed, Keep Detail, without balancing the combined patterns against each other: "
     "can ripple next to sharp edges"),
]
if {item[0].lower() for item in BASES} != set(ENGINE_BASES):  # the engine's list is the one list
    raise ImportError("the basis menu does not list engine.carrying.transfer.BASES")


class OvertoneSignalItem(bpy.types.PropertyGroup):
    """One layer of the source (attribute or vertex group), with a tick box."""

    use: BoolProperty(name="Carry", default=True,  # type: ignore[valid-type]
                      description="Carry this layer to the target")
    kind: StringProperty(name="Kind")  # type: ignore[valid-type]
    domain: StringProperty(name="Domain")  # type: ignore[valid-type]
    data_type: StringProperty(name="Data Type")  # type: ignore[valid-type]


class OvertoneSignalReport(bpy.types.PropertyGroup):
    """One carried layer in the last run's report."""

    source_error: FloatProperty(  # type: ignore[valid-type]
        name="Lost by Smoothing", min=0.0, precision=4,
        description="How much of this layer the smoothing removes, measured on the source "
                    "(0: nothing lost, 1: all of it)")
    written_as: StringProperty(name="Written As")  # type: ignore[valid-type]


class OvertoneSettings(bpy.types.PropertyGroup):
    """What to carry and how; the last run's report."""

    match_mode: EnumProperty(  # type: ignore[valid-type]
        name="Match", items=MATCH_MODES, default="AUTO",
        description="How each target vertex finds its place on the source")
    basis: EnumProperty(  # type: ignore[valid-type]
        name="Values", items=BASES, default="POINTWISE",
        description="Whether values arrive as they are or smoothed on the way")
    eigenfunctions: IntProperty(  # type: ignore[valid-type]
        name="Wave Patterns", default=60, min=4, soft_max=300, max=1000,
        description="How many of the surface's wave patterns (Laplace-Beltrami eigenfunctions) "
                    "describe each mesh. More: the smoothed values keep finer variation and a "
                    "shape match tells more parts apart; fewer: smoother values, faster first run")
    product_order: IntProperty(  # type: ignore[valid-type]
        name="Pattern Combinations", default=2, min=1, max=5,
        description="With Smoothed, Keep Detail: how many wave patterns may be multiplied together. "
                    "Higher keeps sharper features; the first run takes longer")
    detail_strength: FloatProperty(  # type: ignore[valid-type]
        name="Strength", default=1.0, min=0.0, soft_max=2.0, max=10.0,
        description="Scale of the carried surface detail")
    detail_size: FloatProperty(  # type: ignore[valid-type]
        name="Detail Size", default=0.05, min=0.001, max=1.0, soft_max=0.3, precision=3,
        description="Bumps smaller than this fraction of the source's size are carried as detail; "
                    "larger forms belong to the overall shape, which stays the target's")
    as_shown: BoolProperty(  # type: ignore[valid-type]
        name="Source With Modifiers", default=False,
        description="Read the source as the viewport shows it, its modifiers applied "
                    "(off: its mesh as edited)")
    replace_existing: BoolProperty(  # type: ignore[valid-type]
        name="Replace Existing", default=False,
        description="Overwrite a target attribute or vertex group of the same name "
                    "(off: write a new one with a numbered name, and vertex groups on both "
                    "meshes line them up instead of being overwritten)")
    signals: CollectionProperty(type=OvertoneSignalItem)  # type: ignore[valid-type]
    signals_index: IntProperty(default=0)  # type: ignore[valid-type]
    signals_source: StringProperty(  # type: ignore[valid-type]
        name="Listed From", description="Object the list of layers was read from")
    report_text: StringProperty(name="Report")  # type: ignore[valid-type]
    report_mode: StringProperty(name="Matched")  # type: ignore[valid-type]
    report_reason: StringProperty(name="Why")  # type: ignore[valid-type]
    report_coverage: FloatProperty(  # type: ignore[valid-type]
        name="Source Covered", min=0.0, max=1.0, subtype='FACTOR',
        description="Share of the source's surface that target vertices land near")
    report_cache: StringProperty(  # type: ignore[valid-type]
        name="Reused", description="What this run could reuse from earlier runs, in words")
    report_uncertain: FloatProperty(  # type: ignore[valid-type]
        name="Uncertain", min=0.0, max=1.0, subtype='FACTOR',
        description="Share of target vertices whose match is uncertain")
    report_uncertain_below: FloatProperty(  # type: ignore[valid-type]
        name="Uncertain Below", min=-1.0, max=1.0, default=-1.0,
        description="Confidence under which a vertex counts as uncertain (negative: not reported)")
    report_skipped: StringProperty(  # type: ignore[valid-type]
        name="Skipped", description="What was not carried and why, one entry per line")
    report_warnings: StringProperty(  # type: ignore[valid-type]
        name="Check", description="What to check in the result, one warning per line")
    report_pieces: StringProperty(  # type: ignore[valid-type]
        name="Pieces", description="How the target's separate pieces found their counterparts on the source")
    report_pieces_warn: BoolProperty(  # type: ignore[valid-type]
        name="Pieces to Check", default=False,
        description="Some piece found no counterpart or matched with low confidence")
    report_notes: StringProperty(  # type: ignore[valid-type]
        name="Notes", description="Worth knowing about the run (a result written under another name), "
                                  "one per line")
    report_smoothed: BoolProperty(  # type: ignore[valid-type]
        name="Smoothed", default=False,
        description="The values were smoothed, so the loss per layer means something")
    report_signals: CollectionProperty(type=OvertoneSignalReport)  # type: ignore[valid-type]
    report_json: StringProperty(name="Full Report")  # type: ignore[valid-type]
    running: BoolProperty(default=False)  # type: ignore[valid-type]
    progress: FloatProperty(  # type: ignore[valid-type]
        name="Progress", min=0.0, max=1.0, subtype='FACTOR')
    progress_text: StringProperty(name="Working On")  # type: ignore[valid-type]
    report_ok: BoolProperty(default=False)  # type: ignore[valid-type]
    report_seconds: FloatProperty(  # type: ignore[valid-type]
        name="Took", unit='TIME_ABSOLUTE', description="How long this run took, start to finish")
    report_confidence: FloatProperty(  # type: ignore[valid-type]
        name="Confidence", min=0.0, max=1.0, subtype='FACTOR',
        description="Mean confidence of the match over the target's vertices (1: sure)")
    report_written: IntProperty(  # type: ignore[valid-type]
        name="Layers Written", description="Attributes, vertex groups and shape keys written")

    # ---- vertex groups carried as a rig (engine/carrying/weights.py) ---------------------------
    # Read through runs.ENGINE_NAMES; drawn under the vertex-group options.
    max_influences: IntProperty(  # type: ignore[valid-type]
        name="Max Groups per Vertex", default=0, min=0, soft_max=8, max=64,
        description="How many vertex groups each target vertex keeps at most, the strongest ones "
                    "(game engines often take 4). 0 keeps as many as the source has on any one vertex")
    weight_threshold: FloatProperty(  # type: ignore[valid-type]
        name="Drop Weights Below", default=0.0, min=0.0, max=0.99, soft_max=0.1, precision=3,
        description="Weights smaller than this are removed from the target's vertex groups; "
                    "a vertex always keeps its strongest group. 0 keeps every weight")
    keep_weight_totals: BoolProperty(  # type: ignore[valid-type]
        name="Keep Weight Totals", default=True,
        description="After weights are removed, scale the rest up so each vertex's weights add up "
                    "as before (to 1 for a rig), so the deformation keeps its strength. Weights that "
                    "add up to 1 on the source always add up to 1 on the target when this is on")

    # --- re-runs, space and outcomes (read by runs.PairRequest.from_settings)
    local_space: BoolProperty(  # type: ignore[valid-type]
        name="Ignore Placement", default=False,
        description="Match the two meshes as they are stored, ignoring where each object sits, "
                    "turns and scales: for copies of one asset placed apart")
    keep_earlier: BoolProperty(  # type: ignore[valid-type]
        name="Keep Earlier Results", default=False,
        description="Write beside what an earlier run from this source wrote, instead of refreshing it; "
                    "a new detail shape key starts at value 0")
    write_anyway: BoolProperty(  # type: ignore[valid-type]
        name="Write Anyway", default=False,
        description="Write the result even when most of the target found no reliable match "
                    "(otherwise the target is left as it was)")


def settings_of(context: bpy.types.Context) -> OvertoneSettings:
    """The scene's Overtone settings."""
    scene = context.scene
    if scene is None:
        raise ValueError("no scene in this context")
    return cast(OvertoneSettings, getattr(scene, "overtone"))


_CLASSES = (OvertoneSignalItem, OvertoneSignalReport, OvertoneSettings)


def register() -> None:
    for cls in _CLASSES:
        bpy.utils.register_class(cls)
    bpy.types.Scene.overtone = PointerProperty(  # type: ignore[attr-defined, func-returns-value]
        type=OvertoneSettings)


def unregister() -> None:
    del bpy.types.Scene.overtone  # type: ignore[attr-defined]
    for cls in reversed(_CLASSES):
        bpy.utils.unregister_class(cls)
