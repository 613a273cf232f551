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
    ("AUTO", "Auto", "Decide from how well the two surfaces overlap in space"),
    ("ALIGNED", "Aligned", "The surfaces overlap in space: match by closest points on the source surface"),
    ("INTRINSIC", "Intrinsic",
     "Different pose or proportions: match the surfaces by their intrinsic shape"),
]
# Label and description of each basis the engine offers (engine.carrying.transfer.BASES), in the
# order the menu lists them.
_BASIS_LABELS = {
    "pointwise": ("Point to Point",
                  "Interpolate values through the point correspondence, unfiltered (most accurate on our measurements)"),
    "orthoproducts": ("Orthogonalised Products",
                      "Filter through eigenfunctions and their mass-orthonormal products, then carry"),
    "laplacian": ("Eigenfunctions", "Filter through Laplace-Beltrami eigenfunctions only: smooth signals"),
    "products": ("Raw Products", "Filter through raw eigenfunction products fitted by least squares"),
}
BASES = [(name.upper(), *_BASIS_LABELS[name]) for name in sorted(ENGINE_BASES, key=list(_BASIS_LABELS).index)]


class OvertoneSignalItem(bpy.types.PropertyGroup):
    """One signal on the source, with a tick box."""

    use: BoolProperty(name="Carry", default=True,  # type: ignore[valid-type]
                      description="Carry this signal to the target")
    kind: StringProperty(name="Kind")  # type: ignore[valid-type]
    domain: StringProperty(name="Domain")  # type: ignore[valid-type]
    data_type: StringProperty(name="Data Type")  # type: ignore[valid-type]


class OvertoneSignalReport(bpy.types.PropertyGroup):
    """One carried signal in the last run's report."""

    source_error: FloatProperty(  # type: ignore[valid-type]
        name="Source Error", min=0.0, precision=4,
        description="Relative error of the basis reconstruction of the signal on the source")
    written_as: StringProperty(name="Written As")  # type: ignore[valid-type]


class OvertoneSettings(bpy.types.PropertyGroup):
    """What to carry and how; the last run's report."""

    match_mode: EnumProperty(name="Matching", items=MATCH_MODES,  # type: ignore[valid-type]
                             default="AUTO")
    basis: EnumProperty(name="Basis", items=BASES,  # type: ignore[valid-type]
                        default="POINTWISE")
    eigenfunctions: IntProperty(  # type: ignore[valid-type]
        name="Eigenfunctions", default=60, min=4, soft_max=300, max=1000,
        description="How many Laplace-Beltrami eigenfunctions describe each surface")
    product_order: IntProperty(  # type: ignore[valid-type]
        name="Product Order", default=2, min=1, max=5,
        description="Highest number of eigenfunctions multiplied together in the basis")
    detail_strength: FloatProperty(  # type: ignore[valid-type]
        name="Strength", default=1.0, min=0.0, soft_max=2.0, max=10.0,
        description="Scale of the carried surface detail")
    detail_size: FloatProperty(  # type: ignore[valid-type]
        name="Detail Size", default=0.05, min=0.001, max=1.0, soft_max=0.3, precision=3,
        description="Features smaller than this fraction of the source's size count as detail; "
                    "larger ones belong to the overall shape, which stays the target's")
    as_shown: BoolProperty(  # type: ignore[valid-type]
        name="As Shown", default=False,
        description="Use the source as shown in the viewport, with its modifiers applied")
    replace_existing: BoolProperty(  # type: ignore[valid-type]
        name="Replace Existing", default=False,
        description="Overwrite a target layer of the same name instead of adding a new one")
    signals: CollectionProperty(type=OvertoneSignalItem)  # type: ignore[valid-type]
    signals_index: IntProperty(default=0)  # type: ignore[valid-type]
    signals_source: StringProperty(  # type: ignore[valid-type]
        name="Listed From", description="Object the signal list was read from")
    report_text: StringProperty(name="Report")  # type: ignore[valid-type]
    report_mode: StringProperty(name="Matching")  # type: ignore[valid-type]
    report_reason: StringProperty(name="Why")  # type: ignore[valid-type]
    report_coverage: FloatProperty(  # type: ignore[valid-type]
        name="Source Covered", min=0.0, max=1.0, subtype='FACTOR',
        description="Fraction of the source's area the target's points land near")
    report_cache: StringProperty(name="Cache")  # type: ignore[valid-type]
    report_signals: CollectionProperty(type=OvertoneSignalReport)  # type: ignore[valid-type]
    report_json: StringProperty(name="Full Report")  # type: ignore[valid-type]
    running: BoolProperty(default=False)  # type: ignore[valid-type]
    progress: FloatProperty(  # type: ignore[valid-type]
        name="Progress", min=0.0, max=1.0, subtype='FACTOR')
    progress_text: StringProperty(name="Working On")  # type: ignore[valid-type]
    report_ok: BoolProperty(default=False)  # type: ignore[valid-type]
    report_seconds: FloatProperty(name="Time", unit='TIME_ABSOLUTE')  # type: ignore[valid-type]
    report_confidence: FloatProperty(  # type: ignore[valid-type]
        name="Mean Confidence", min=0.0, max=1.0, subtype='FACTOR')
    report_written: IntProperty(name="Layers Written")  # type: ignore[valid-type]


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
