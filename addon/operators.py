"""Operators: read settings, start the job, report. No mesh data and no numbers here.

The three job operators (carry signals, carry detail, preview) share one shape:

- ``execute`` (background mode, scripts, batch, redo) makes the plan and runs
  it in this process (:func:`.runs.run_plan`);
- ``invoke`` (a click in the UI) makes the plan, hands it to the worker
  process and returns ``RUNNING_MODAL``; a timer calls :func:`step_run`, which
  shows progress and writes the results once the worker is done; Esc calls
  :func:`cancel_run`, which stops the worker and leaves the scene as it was.

In module (background) mode ``INVOKE_DEFAULT`` runs ``execute`` and modal
handlers never run, so :func:`step_run` and :func:`cancel_run` are plain
functions the tests call directly.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from typing import TYPE_CHECKING, Any

import bpy

from . import bridge, preferences, properties
from .job import forget_pairs
from .engine import Cache
from .records import UNCERTAIN_NAME
from .runs import BackgroundRun, PairRequest, Plan, make_plan, message_of, pick_pair, run_plan, selected_pair
from .worker import stop_shared_worker

if TYPE_CHECKING:
    from bpy.stub_internal.rna_enums import OperatorReturnItems

__all__ = ["OVERTONE_OT_transfer_attributes", "OVERTONE_OT_transfer_detail",
           "OVERTONE_OT_preview_carry", "OVERTONE_OT_refresh_signals", "OVERTONE_OT_clear_cache",
           "OVERTONE_OT_select_uncertain",
           "plan_from_context", "store_report", "store_error", "step_run", "cancel_run",
           "register", "unregister"]

Reporter = Callable[[set[str], str], Any]


def plan_from_context(context: bpy.types.Context, kind: str) -> Plan:
    """The plan for ``kind`` from the selection and the scene settings.

    Raises
    ------
    ValueError
        Naming the object and the problem.
    """
    settings = properties.settings_of(context)
    if kind == "preview":
        source, _ = selected_pair(context)
        if source is None:
            active = context.active_object
            if active is None:
                raise ValueError("select the source mesh to preview")
            source = active
        target = source
    else:
        source, target = pick_pair(context)
    ticked: list[str] = []
    if kind != "detail" and settings.signals_source == source.name:
        ticked = [item.name for item in settings.signals if item.use]
    request = PairRequest.from_settings(settings, signals=ticked, detail=kind == "detail")
    return make_plan(kind, source, target, request)


def store_report(settings: Any, report: dict[str, Any]) -> None:
    """Copy the numbers of a run's report onto the settings, for the panel."""
    settings.report_ok = True
    settings.report_text = str(report.get("summary", "done"))
    settings.report_mode = str(report.get("mode") or ("preview" if "description" in report else ""))
    settings.report_reason = str(report.get("reason") or report.get("description") or "")
    settings.report_confidence = float(report.get("mean_confidence") or 0.0)
    settings.report_coverage = float(report.get("coverage_of_source_area") or 0.0)
    timings = report.get("timings", {})
    settings.report_seconds = float(timings.get("wall", timings.get("total", 0.0)))
    hits = report.get("cache_hits", {})
    parts = [f"pair {report['pair']}"] if "pair" in report else []
    if isinstance(hits.get("correspondence"), str):
        parts.append(f"map {hits['correspondence']}")
    for role in ("source", "target"):
        counts = hits.get(role)
        if isinstance(counts, dict):
            parts.append(f"{role} " + "/".join(f"{counts.get(k, 0)}" for k in ("memory", "disk", "computed")))
    settings.report_cache = ", ".join(parts) + (" (memory/disk/computed)" if hits else "")
    written = report.get("written", {})
    settings.report_written = len(written)
    settings.report_signals.clear()
    for name, entry in report.get("signals", {}).items():
        item = settings.report_signals.add()
        item.name = name
        item.source_error = float(entry.get("source_error") or 0.0)
        item.written_as = str(written.get(name, written.get(name + "_carried", "")))
    settings.report_json = json.dumps(report)


def store_error(settings: Any, message: str) -> None:
    settings.report_ok = False
    settings.report_text = message
    settings.report_signals.clear()
    settings.report_json = ""


def _end(settings: Any, context: bpy.types.Context | None) -> None:
    settings.running = False
    settings.progress = 0.0
    settings.progress_text = ""
    if context is not None and context.window_manager is not None:
        context.window_manager.progress_end()


def step_run(run: BackgroundRun, settings: Any, report: Reporter,
             context: bpy.types.Context | None = None) -> set[str]:
    """One timer tick of a background run: progress, or the results written.

    Returns the modal return set: ``{'RUNNING_MODAL'}`` while the worker works,
    ``{'FINISHED'}`` once the results are written, ``{'CANCELLED'}`` on failure
    (nothing written).
    """
    status = run.poll()
    if status.state == "running":
        settings.progress = status.fraction
        settings.progress_text = status.text
        if context is not None and context.window_manager is not None:
            context.window_manager.progress_update(int(100 * status.fraction))
        return {'RUNNING_MODAL'}
    _end(settings, context)
    try:
        result = run.finish()
    except ValueError as error:
        store_error(settings, str(error))
        report({'ERROR'}, f"Overtone: {error}")
        return {'CANCELLED'}
    store_report(settings, result)
    level, text = message_of(result)
    report(level, f"Overtone: {text}")
    return {'FINISHED'}


def cancel_run(run: BackgroundRun, settings: Any, report: Reporter,
               context: bpy.types.Context | None = None) -> set[str]:
    """Esc: stop the worker; nothing is written."""
    run.cancel()
    _end(settings, context)
    store_error(settings, f"cancelled: {run.plan.written_on!r} left as it was")
    report({'WARNING'}, f"Overtone: {settings.report_text}")
    return {'CANCELLED'}


class _JobOperator:
    """Shared by the three job operators (module docstring)."""

    kind = "transfer"
    _run: BackgroundRun | None = None
    _timer: Any = None

    @classmethod
    def poll(cls, context: bpy.types.Context) -> bool:
        return context.mode == 'OBJECT'

    def _reporter(self) -> Reporter:
        return getattr(self, "report")  # type: ignore[no-any-return]

    def _fail(self, context: bpy.types.Context, message: str) -> set[OperatorReturnItems]:
        store_error(properties.settings_of(context), message)
        self._reporter()({'ERROR'}, f"Overtone: {message}")
        return {'CANCELLED'}

    def execute(self, context: bpy.types.Context) -> set[OperatorReturnItems]:
        settings = properties.settings_of(context)
        try:
            result = run_plan(plan_from_context(context, self.kind))
        except ValueError as error:
            return self._fail(context, str(error))
        store_report(settings, result)
        level, text = message_of(result)
        self._reporter()(level, f"Overtone: {text}")
        return {'FINISHED'}

    def invoke(self, context: bpy.types.Context, event: bpy.types.Event) -> set[OperatorReturnItems]:
        if bpy.app.background or context.window is None or context.window_manager is None:
            return self.execute(context)
        settings = properties.settings_of(context)
        if settings.running:
            return self._fail(context, "a job is already running: wait for it or press Esc")
        try:
            self._run = BackgroundRun(plan_from_context(context, self.kind))
        except (ValueError, OSError) as error:
            return self._fail(context, str(error))
        settings.running = True
        settings.progress = 0.0
        settings.progress_text = "starting"
        wm = context.window_manager
        wm.progress_begin(0, 100)
        self._timer = wm.event_timer_add(0.1, window=context.window)
        wm.modal_handler_add(self)  # type: ignore[arg-type]
        return {'RUNNING_MODAL'}

    def modal(self, context: bpy.types.Context, event: bpy.types.Event) -> set[OperatorReturnItems]:
        run = self._run
        if run is None:
            return {'CANCELLED'}
        settings = properties.settings_of(context)
        if event.type == 'ESC':
            result = cancel_run(run, settings, self._reporter(), context)
        elif event.type == 'TIMER':
            result = step_run(run, settings, self._reporter(), context)
            for area in (context.screen.areas if context.screen else ()):
                if area.type == 'VIEW_3D':
                    area.tag_redraw()
        else:
            return {'PASS_THROUGH'}
        if result != {'RUNNING_MODAL'}:
            if self._timer is not None and context.window_manager is not None:
                context.window_manager.event_timer_remove(self._timer)
            self._timer = None
            self._run = None
        return result  # type: ignore[return-value]


class OVERTONE_OT_transfer_attributes(_JobOperator, bpy.types.Operator):
    """Carry the ticked signals (or every colour and vertex group) from the selected mesh to the active mesh"""

    bl_idname = "overtone.transfer_attributes"
    bl_label = "Carry Signals"
    bl_options = {'REGISTER', 'UNDO'}
    kind = "transfer"


class OVERTONE_OT_transfer_detail(_JobOperator, bpy.types.Operator):
    """Carry the surface detail of the selected mesh to the active mesh as a new shape key"""

    bl_idname = "overtone.transfer_detail"
    bl_label = "Carry Detail"
    bl_options = {'REGISTER', 'UNDO'}
    kind = "detail"


class OVERTONE_OT_preview_carry(_JobOperator, bpy.types.Operator):
    """Write onto the source, as new layers named <name>_carried, how much of each signal the basis carries"""

    bl_idname = "overtone.preview_carry"
    bl_label = "Preview on Source"
    bl_options = {'REGISTER', 'UNDO'}
    kind = "preview"


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
        for signal in bridge.list_layers(source, evaluated=settings.as_shown):
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
            cache = Cache(folder)
            size = cache.size_bytes()
            files = cache.clear()
            forget_pairs()          # the pairs kept in this process's memory
            stop_shared_worker()    # and in the worker's
        except (ValueError, OSError) as error:
            self.report({'ERROR'}, f"Overtone: {error}")
            return {'CANCELLED'}
        self.report({'INFO'}, f"Overtone: removed {files} cache files ({size / 1e6:.1f} MB)")
        return {'FINISHED'}


# --------------------------------------------------------------------------- uncertain vertices


class OVERTONE_OT_select_uncertain(bpy.types.Operator):
    """Select the vertices of the active mesh whose match the last carry was unsure of, in Edit Mode"""

    bl_idname = "overtone.select_uncertain"
    bl_label = "Select Uncertain Vertices"
    bl_options = {'REGISTER', 'UNDO'}

    @classmethod
    def poll(cls, context: bpy.types.Context) -> bool:
        obj = context.active_object
        return obj is not None and obj.type == 'MESH' and context.mode in ('OBJECT', 'EDIT_MESH')

    def execute(self, context: bpy.types.Context) -> set[OperatorReturnItems]:
        obj = context.active_object
        assert obj is not None
        if obj.vertex_groups.get(UNCERTAIN_NAME) is None:
            self.report({'ERROR'}, f"Overtone: {obj.name!r} has no {UNCERTAIN_NAME!r} group: "
                                   "no carry onto it was unsure")
            return {'CANCELLED'}
        if obj.mode == 'EDIT':
            bpy.ops.object.mode_set(mode='OBJECT')
        count = bridge.select_group(obj, UNCERTAIN_NAME)
        bpy.ops.object.mode_set(mode='EDIT')
        bpy.ops.mesh.select_mode(type='VERT')
        self.report({'INFO'}, f"Overtone: {count} uncertain vertices selected on {obj.name!r}")
        return {'FINISHED'}


_CLASSES = (OVERTONE_OT_transfer_attributes, OVERTONE_OT_transfer_detail, OVERTONE_OT_preview_carry,
            OVERTONE_OT_refresh_signals, OVERTONE_OT_clear_cache, OVERTONE_OT_select_uncertain)

def register() -> None:
    for cls in _CLASSES:
        bpy.utils.register_class(cls)


def unregister() -> None:
    stop_shared_worker()
    for cls in reversed(_CLASSES):
        bpy.utils.unregister_class(cls)
