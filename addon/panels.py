"""The sidebar panels of the 3D viewport (tab "Overtone"). They only draw."""

from __future__ import annotations

from typing import TYPE_CHECKING

import bpy

from . import properties
from .runs import selected_pair

__all__ = ["OVERTONE_UL_signals", "OVERTONE_PT_main", "OVERTONE_PT_matching",
           "OVERTONE_PT_detail", "OVERTONE_PT_report", "register", "unregister"]

if TYPE_CHECKING:
    from bpy.stub_internal.rna_enums import IconItems

_KIND_ICONS: dict[str, IconItems] = {"color": 'COLOR', "float": 'FILE_3D', "vector": 'ORIENTATION_GLOBAL',
               "weight": 'GROUP_VERTEX', "label": 'LINENUMBERS_ON', "mask": 'MOD_MASK'}


class _Sidebar(bpy.types.Panel):
    """Base of Overtone's sidebar panels (never registered itself)."""

    bl_space_type = 'VIEW_3D'
    bl_region_type = 'UI'
    bl_category = "Overtone"

    @property
    def _layout(self) -> bpy.types.UILayout:
        layout = self._layout
        assert layout is not None, "panels draw only with a layout"
        return layout


class OVERTONE_UL_signals(bpy.types.UIList):
    def draw_item(self, context: bpy.types.Context | None, layout: bpy.types.UILayout,
                  data: bpy.types.AnyType | None, item: bpy.types.AnyType | None,
                  icon: int | None, active_data: bpy.types.AnyType,
                  active_property: str | None, index: int | None = 0,
                  flt_flag: int | None = 0) -> None:
        row = layout.row(align=True)
        row.prop(item, "use", text="")
        row.label(text=getattr(item, "name"), icon=_KIND_ICONS.get(getattr(item, "kind"), 'DOT'))
        row.label(text=str(getattr(item, "domain")).lower())


class OVERTONE_PT_main(_Sidebar):
    bl_label = "Carry Between Meshes"

    def draw(self, context: bpy.types.Context) -> None:
        layout = self._layout
        settings = properties.settings_of(context)
        source, target = selected_pair(context)
        col = layout.column(align=True)
        col.label(text=f"From: {source.name if source else '(select a second mesh)'}",
                  icon='EXPORT')
        col.label(text=f"To: {target.name if target else '(make a mesh active)'}",
                  icon='IMPORT')
        row = layout.row(align=True)
        row.label(text=f"Signals on {settings.signals_source or '?'}")
        row.operator("overtone.refresh_signals", text="", icon='FILE_REFRESH')
        layout.template_list("OVERTONE_UL_signals", "", settings, "signals",
                             settings, "signals_index", rows=4)
        col = layout.column()
        col.prop(settings, "as_shown")
        col.prop(settings, "replace_existing")
        if settings.running:
            layout.prop(settings, "progress", text=settings.progress_text or "Working", slider=True)
            layout.label(text="Esc cancels", icon='CANCEL')
        col = layout.column(align=True)
        col.enabled = not settings.running
        col.scale_y = 1.3
        col.operator("overtone.transfer_attributes", icon='BRUSH_DATA')
        col.operator("overtone.transfer_detail", icon='SHAPEKEY_DATA')
        layout.operator("overtone.preview_carry", icon='HIDE_OFF')


class _SettingsPanel(_Sidebar):
    bl_parent_id = "OVERTONE_PT_main"
    bl_options = {'DEFAULT_CLOSED'}
    shown: tuple[str, ...] = ()

    def draw(self, context: bpy.types.Context) -> None:
        layout = self._layout
        layout.use_property_split = True
        settings = properties.settings_of(context)
        for name in self.shown:
            row = layout.row()
            if name == "product_order":
                row.active = settings.basis in ("ORTHOPRODUCTS", "PRODUCTS")
            row.prop(settings, name)


class OVERTONE_PT_matching(_SettingsPanel):
    bl_label = "Matching"
    shown = ("match_mode", "basis", "eigenfunctions", "product_order")


class OVERTONE_PT_detail(_SettingsPanel):
    bl_label = "Detail"
    shown = ("detail_strength", "detail_size")


class OVERTONE_PT_report(_Sidebar):
    bl_label = "Last Run"
    bl_parent_id = "OVERTONE_PT_main"

    def draw(self, context: bpy.types.Context) -> None:
        layout = self._layout
        settings = properties.settings_of(context)
        if not settings.report_text:
            layout.label(text="Nothing carried yet")
            return
        layout.label(text=settings.report_text, icon='CHECKMARK' if settings.report_ok else 'ERROR')
        if not settings.report_ok:
            return
        col = layout.column(align=True)
        if settings.report_mode:
            col.label(text=f"Matching: {settings.report_mode}")
        if settings.report_reason:
            col.label(text=settings.report_reason)
        col.prop(settings, "report_confidence", emboss=False)
        col.prop(settings, "report_coverage", emboss=False)
        col.prop(settings, "report_seconds", emboss=False)
        col.prop(settings, "report_written", emboss=False)
        if settings.report_cache:
            col.label(text=f"Cache: {settings.report_cache}")
        if len(settings.report_signals):
            box = layout.box()
            box.label(text="Source error per signal")
            for item in settings.report_signals:
                box.prop(item, "source_error", text=item.name, emboss=False)


_CLASSES = (OVERTONE_UL_signals, OVERTONE_PT_main, OVERTONE_PT_matching, OVERTONE_PT_detail,
            OVERTONE_PT_report)


register, unregister = bpy.utils.register_classes_factory(_CLASSES)  # type: ignore[func-returns-value, misc]
