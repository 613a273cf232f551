"""The sidebar panels of the 3D viewport (tab "Overtone"). They only draw.

Main flow: what goes from which mesh to which, the layers to carry, the run
buttons. Method choices sit in a closed "Method" sub-panel; the last run's
outcome in "Last Run", in words an artist can act on.
"""

from __future__ import annotations

import textwrap
from typing import TYPE_CHECKING, Any

import bpy

from . import properties
from .runs import selected_pair

__all__ = ["OVERTONE_UL_layers", "OVERTONE_PT_main", "OVERTONE_PT_detail", "OVERTONE_PT_weights", "OVERTONE_PT_results", "OVERTONE_PT_method",
           "OVERTONE_PT_report", "SELECT_UNCERTAIN", "KIND_WORDS", "DOMAIN_WORDS", "wrap_width",
           "duration_words", "percent_words",
           "register", "unregister"]

if TYPE_CHECKING:
    from bpy.stub_internal.rna_enums import IconItems

SELECT_UNCERTAIN = "overtone.select_uncertain"
"""The operator selecting the target's uncertain vertices (drawn when registered)."""

KIND_WORDS: dict[str, tuple[str, IconItems]] = {
    "color": ("colour", 'COLOR'), "float": ("number", 'FILE_3D'),
    "vector": ("vector", 'ORIENTATION_GLOBAL'), "weight": ("vertex group", 'GROUP_VERTEX'),
    "label": ("whole number", 'LINENUMBERS_ON'), "mask": ("on/off", 'MOD_MASK'),
    "uv": ("UV map", 'GROUP_UVS'), "shape": ("shape key", 'SHAPEKEY_DATA')}
"""How the layer list names each kind of layer, and its icon."""

DOMAIN_WORDS = {"POINT": "per vertex", "CORNER": "per face corner", "FACE": "per face",
                "EDGE": "per edge"}


def wrap_width(context: bpy.types.Context) -> int:
    """Characters that fit on one line of the sidebar (40 without a region)."""
    region = getattr(context, "region", None)
    if region is None or not getattr(region, "width", 0):
        return 40
    prefs = getattr(context, "preferences", None)
    scale = (prefs.system.ui_scale if prefs is not None else 0.0) or 1.0  # 0 without a window
    return max(16, int(region.width / (7.0 * scale)) - 4)


def _wrapped(layout: bpy.types.UILayout, context: bpy.types.Context, text: str,
             icon: IconItems = 'NONE') -> None:
    """A sentence as labels that fit the sidebar; later lines indented under the icon."""
    col = layout.column(align=True)
    for i, line in enumerate(textwrap.wrap(text, wrap_width(context)) or [""]):
        col.label(text=line, icon=icon if i == 0 else ('BLANK1' if icon != 'NONE' else 'NONE'))


def _is_registered(idname: str) -> bool:
    group, _, name = idname.partition(".")
    return hasattr(bpy.types, f"{group.upper()}_OT_{name}")


class _Sidebar(bpy.types.Panel):
    """Base of Overtone's sidebar panels (never registered itself)."""

    bl_space_type = 'VIEW_3D'
    bl_region_type = 'UI'
    bl_category = "Overtone"

    @property
    def _layout(self) -> bpy.types.UILayout:
        layout = self.layout
        assert layout is not None, "panels draw only with a layout"
        return layout


class OVERTONE_UL_layers(bpy.types.UIList):
    """The source's layers, each with a tick box, its kind and where it lives."""

    def draw_item(self, context: bpy.types.Context | None, layout: bpy.types.UILayout,
                  data: bpy.types.AnyType | None, item: bpy.types.AnyType | None,
                  icon: int | None, active_data: bpy.types.AnyType,
                  active_property: str | None, index: int | None = 0,
                  flt_flag: int | None = 0) -> None:
        kind = str(getattr(item, "kind"))
        if (getattr(item, "domain"), getattr(item, "data_type")) == ("CORNER", "FLOAT2"):
            kind = "uv"  # Blender keeps UV maps as 2D values per face corner
        word, kind_icon = KIND_WORDS.get(kind, (kind, 'DOT'))
        row = layout.row(align=True)
        row.prop(item, "use", text="")
        row.label(text=str(getattr(item, "name")), icon=kind_icon)
        if kind not in ("weight", "uv"):
            word = f"{word}, {DOMAIN_WORDS.get(str(getattr(item, 'domain')), '')}".rstrip(", ")
        sub = row.row()
        sub.active = False
        sub.label(text=word)


class OVERTONE_PT_main(_Sidebar):
    bl_label = "Carry Between Meshes"

    def draw(self, context: bpy.types.Context) -> None:
        layout = self._layout
        settings = properties.settings_of(context)
        source, target = selected_pair(context)
        col = layout.column(align=True)
        col.label(text=f"From: {source.name if source else '(also select a source mesh)'}",
                  icon='EXPORT')
        col.label(text=f"To: {target.name if target else '(make the target mesh active)'}",
                  icon='IMPORT')
        row = layout.row(align=True)
        row.label(text="Attributes & Vertex Groups")
        row.operator("overtone.refresh_signals", text="", icon='FILE_REFRESH')
        if source is not None and settings.signals_source == source.name:
            layout.template_list("OVERTONE_UL_layers", "", settings, "signals",
                                 settings, "signals_index", rows=4)
        else:
            _wrapped(layout, context, "Carries every colour attribute and vertex group. "
                     "Click the refresh button to choose.", icon='INFO')
        col = layout.column()
        col.prop(settings, "as_shown")
        col.prop(settings, "local_space")
        col.prop(settings, "replace_existing")
        if settings.running:
            layout.prop(settings, "progress", text=settings.progress_text or "Working", slider=True)
            layout.label(text="Esc cancels", icon='CANCEL')
        col = layout.column(align=True)
        col.enabled = not settings.running
        col.scale_y = 1.3
        col.operator("overtone.transfer_attributes", icon='BRUSH_DATA')
        col.operator("overtone.transfer_detail", icon='SHAPEKEY_DATA')
        row = layout.row()
        row.enabled = not settings.running
        row.operator("overtone.preview_carry", icon='HIDE_OFF')


class _SettingsPanel(_Sidebar):
    """A closed sub-panel drawing some settings, one per row."""

    bl_parent_id = "OVERTONE_PT_main"
    bl_options = {'DEFAULT_CLOSED'}
    shown: tuple[str, ...] = ()

    def draw(self, context: bpy.types.Context) -> None:
        layout = self._layout
        layout.use_property_split = True
        layout.use_property_decorate = False
        settings = properties.settings_of(context)
        for name in self.shown:
            row = layout.row()
            if name == "product_order":
                row.active = settings.basis in ("ORTHOPRODUCTS", "PRODUCTS")
            row.prop(settings, name)


class OVERTONE_PT_detail(_SettingsPanel):
    bl_label = "Detail"
    shown = ("detail_strength", "detail_size")


class OVERTONE_PT_results(_SettingsPanel):
    bl_label = "Re-runs and Failures"
    shown = ("keep_earlier", "write_anyway")


class OVERTONE_PT_weights(_SettingsPanel):
    bl_label = "Vertex Groups"
    shown = ("max_influences", "weight_threshold", "keep_weight_totals")


class OVERTONE_PT_method(_SettingsPanel):
    bl_label = "Method"
    shown = ("match_mode", "basis", "eigenfunctions", "product_order")


class OVERTONE_PT_report(_Sidebar):
    bl_label = "Last Run"
    bl_parent_id = "OVERTONE_PT_main"

    def draw(self, context: bpy.types.Context) -> None:
        layout = self._layout
        settings = properties.settings_of(context)
        if not settings.report_text:
            layout.label(text="Nothing carried yet")
            return
        fine = settings.report_ok and not settings.report_warnings and not settings.report_pieces_warn
        _wrapped(layout, context, settings.report_text, icon='CHECKMARK' if fine else 'ERROR')
        if not settings.report_ok:
            return
        if settings.report_warnings or settings.report_pieces_warn:
            box = layout.box()
            box.label(text="Check", icon='ERROR')
            for line in settings.report_warnings.splitlines():
                _wrapped(box, context, line)
            if settings.report_pieces_warn:
                _draw_pieces(box, context, settings)
        if settings.report_pieces and not settings.report_pieces_warn:
            _wrapped(layout, context, settings.report_pieces, icon='CHECKMARK')
        if settings.report_mode:
            layout.label(text=settings.report_mode, icon='VIEWZOOM')
        _draw_certainty(layout, context, settings)
        if settings.report_reason:
            why = layout.column()
            why.active = False  # the detail behind the first lines, greyed
            _wrapped(why, context, settings.report_reason)
        if settings.report_skipped:
            box = layout.box()
            box.label(text="Not carried", icon='INFO')
            for line in settings.report_skipped.splitlines():
                _wrapped(box, context, line)
        if settings.report_notes:
            notes = layout.column()
            notes.active = False
            for line in settings.report_notes.splitlines():
                _wrapped(notes, context, line, icon='INFO')
        col = layout.column(align=True)
        col.label(text=f"Took {duration_words(settings.report_seconds)}", icon='TIME')
        if settings.report_cache:
            _wrapped(col, context, settings.report_cache)
        if settings.report_smoothed and len(settings.report_signals):
            box = layout.box()
            box.label(text="Lost by smoothing (on the source)")
            for item in settings.report_signals:
                box.prop(item, "source_error", text=item.name, emboss=False)


def _draw_pieces(layout: bpy.types.UILayout, context: bpy.types.Context, settings: Any) -> None:
    """The pieces to check, with the button selecting their vertices (the uncertain ones)."""
    _wrapped(layout, context, settings.report_pieces)
    if _is_registered(SELECT_UNCERTAIN):
        layout.operator(SELECT_UNCERTAIN, icon='RESTRICT_SELECT_OFF')


def _draw_certainty(layout: bpy.types.UILayout, context: bpy.types.Context, settings: Any) -> None:
    if settings.report_mode == "":
        return  # a preview: nothing was matched
    col = layout.column(align=True)
    col.prop(settings, "report_confidence", emboss=False)
    if settings.report_uncertain_below >= 0.0:
        share = settings.report_uncertain
        _wrapped(col, context, f"{percent_words(share)} of vertices uncertain (confidence under "
                 f"{settings.report_uncertain_below:.2f})", icon='ERROR' if share > 0.0 else 'CHECKMARK')
        if share > 0.0 and _is_registered(SELECT_UNCERTAIN) and not settings.report_pieces_warn:
            col.operator(SELECT_UNCERTAIN, icon='RESTRICT_SELECT_OFF')
    col.prop(settings, "report_coverage", emboss=False)


def duration_words(value: float) -> str:
    """Seconds as an artist reads them: "40 ms", "2.5 s", "1 min 5 s"."""
    if value < 1.0:
        return f"{value * 1000:.0f} ms"
    return f"{value:.1f} s" if value < 60 else f"{int(value // 60)} min {value % 60:.0f} s"


def percent_words(share: float) -> str:
    """A share as a percentage; under 1% with one decimal, so a few vertices never read as 0%."""
    if 0.0 < share < 0.01:
        return f"{max(share, 0.001):.1%}"
    return f"{share:.0%}"


_CLASSES = (OVERTONE_UL_layers, OVERTONE_PT_main, OVERTONE_PT_detail, OVERTONE_PT_weights, OVERTONE_PT_results,
            OVERTONE_PT_method,
            OVERTONE_PT_report)


register, unregister = bpy.utils.register_classes_factory(_CLASSES)  # type: ignore[func-returns-value, misc]
