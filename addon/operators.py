"""Operators: read settings, call the transfer, report. No mesh data here."""

from __future__ import annotations

import time
from typing import TYPE_CHECKING

import bpy

from . import bridge, preferences, properties
from .transfer import PairRequest, check_pair, selected_pair, transfer_pair

if TYPE_CHECKING:
    from bpy.stub_internal.rna_enums import OperatorReturnItems

__all__ = ["OVERTONE_OT_transfer_attributes", "OVERTONE_OT_transfer_detail",
           "OVERTONE_OT_refresh_signals", "OVERTONE_OT_clear_cache", "register", "unregister"]


def _run(op: bpy.types.Operator, context: bpy.types.Context,
         detail: bool) -> set[OperatorReturnItems]:
    settings = properties.settings_of(context)
    ticked = [] if detail else [item.name for item in settings.signals if item.use]
    request = PairRequest.from_settings(settings, signals=ticked, detail=detail)
    source, target = selected_pair(context)
    started = time.perf_counter()
    try:
        check_pair(source, target, request)
        assert source is not None and target is not None
        report = transfer_pair(source, target, request)
    except (ValueError, NotImplementedError) as error:
        settings.report_ok = False
        settings.report_text = str(error)
        op.report({'ERROR'}, f"Overtone: {error}")
        return {'CANCELLED'}
    settings.report_ok = True
    settings.report_seconds = time.perf_counter() - started
    settings.report_text = str(report.get("summary", "done"))
    settings.report_confidence = float(report.get("mean_confidence", 0.0))
    settings.report_written = len(report.get("written", {}))
    op.report({'INFO'}, f"Overtone: {settings.report_text}")
    return {'FINISHED'}


class _PairOperator:
    """Shared by the two transfer operators: a source and a target selected, object mode."""

    detail = False

    @classmethod
    def poll(cls, context: bpy.types.Context) -> bool:
        source, target = selected_pair(context)
        return source is not None and target is not None and context.mode == 'OBJECT'

    def execute(self, context: bpy.types.Context) -> set[OperatorReturnItems]:
        return _run(self, context, detail=self.detail)  # type: ignore[arg-type]


class OVERTONE_OT_transfer_attributes(_PairOperator, bpy.types.Operator):
    """Carry the ticked signals from the selected mesh to the active mesh"""

    bl_idname = "overtone.transfer_attributes"
    bl_label = "Carry Signals"
    bl_options = {'REGISTER', 'UNDO'}


class OVERTONE_OT_transfer_detail(_PairOperator, bpy.types.Operator):
    """Carry the surface detail of the selected mesh to the active mesh as a shape key"""

    bl_idname = "overtone.transfer_detail"
    bl_label = "Carry Detail"
    bl_options = {'REGISTER', 'UNDO'}
    detail = True


class OVERTONE_OT_refresh_signals(bpy.types.Operator):
    """List the signals the selected source carries"""

    bl_idname = "overtone.refresh_signals"
    bl_label = "Read Source Signals"
    bl_options = {'REGISTER', 'UNDO'}

    def execute(self, context: bpy.types.Context) -> set[OperatorReturnItems]:
        settings = properties.settings_of(context)
        source, _target = selected_pair(context)
        if source is None:
            active = context.active_object
            source = active if active is not None and active.type == 'MESH' else None
        if source is None:
            self.report({'ERROR'}, "Overtone: select the source mesh")
            return {'CANCELLED'}
        ticks = {item.name: item.use for item in settings.signals}
        settings.signals.clear()
        for signal in bridge.list_signals(source, evaluated=settings.as_shown):
            item = settings.signals.add()
            item.name = signal.name
            item.kind = signal.kind
            item.domain = signal.domain
            item.data_type = signal.data_type
            item.use = ticks.get(signal.name, True)
        settings.signals_source = source.name
        self.report({'INFO'}, f"Overtone: {len(settings.signals)} signals on {source.name!r}")
        return {'FINISHED'}


class OVERTONE_OT_clear_cache(bpy.types.Operator):
    """Delete the cached eigenbases and correspondences"""

    bl_idname = "overtone.clear_cache"
    bl_label = "Clear Cache"

    def execute(self, context: bpy.types.Context) -> set[OperatorReturnItems]:
        try:
            folder = preferences.cache_folder(context)
            files, size = preferences.clear_cache_files(folder)
        except (ValueError, OSError) as error:
            self.report({'ERROR'}, f"Overtone: {error}")
            return {'CANCELLED'}
        self.report({'INFO'}, f"Overtone: removed {files} cache files ({size / 1e6:.1f} MB)")
        return {'FINISHED'}


_CLASSES = (OVERTONE_OT_transfer_attributes, OVERTONE_OT_transfer_detail,
            OVERTONE_OT_refresh_signals, OVERTONE_OT_clear_cache)


register, unregister = bpy.utils.register_classes_factory(_CLASSES)  # type: ignore[func-returns-value, misc]
