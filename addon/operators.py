"""Operators: read settings, start the job, report. No mesh data and no numbers here.

The three job operators (carry signals, carry detail, preview) share one shape:

- ``execute`` (background mode, scripts, batch, redo) makes the plan and runs
  it in this process (:func:`.runs.run_plan`);
- ``invoke`` (a click in the UI) makes the plan, hands it to the worker
  process and returns ``RUNNING_MODAL``; a timer calls :func:`step_run`, which
  shows the engine's stage the worker is in (:func:`show_step`: the sidebar's
  bar, the window's progress, the status bar) and writes the results once the
  worker is done; Esc calls :func:`cancel_run`, which stops the worker and
  leaves the scene as it was.

In module (background) mode ``INVOKE_DEFAULT`` runs ``execute`` and modal
handlers never run, so :func:`step_run` and :func:`cancel_run` are plain
functions the tests call directly.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from dataclasses import replace
from typing import TYPE_CHECKING, Any

import bpy

from . import bridge, preferences, properties
from .job import forget_pairs
from .engine import Cache
from .engine.common.progress import DONE, STOPPED, Step, Writer
from .records import UNCERTAIN_NAME
from .runs import (MODE_WORDS, BackgroundRun, PairRequest, Plan, default_signals, make_plan, message_of,
                   pick_pair, run_plan, selected_pair)
from .worker import stop_shared_worker

if TYPE_CHECKING:
    from bpy.stub_internal.rna_enums import OperatorReturnItems

__all__ = ["OVERTONE_OT_transfer_attributes", "OVERTONE_OT_transfer_detail",
           "OVERTONE_OT_preview_carry", "OVERTONE_OT_refresh_signals", "OVERTONE_OT_clear_cache",
           "OVERTONE_OT_select_uncertain",
           "plan_from_context", "store_report", "store_error", "step_run", "cancel_run", "stage_words",
           "show_step", "window_progress",
           "runs_modal", "cache_words", "skipped_lines", "match_words", "self_check_words", "PREVIEW_BASIS",
           "register", "unregister"]

Reporter = Callable[[set[str], str], Any]


PREVIEW_BASIS = "ORTHOPRODUCTS"
"""What Preview on Source shows when values are carried directly (the default):
direct values arrive as they are, so the preview shows what smoothing would keep."""

_WHERE = {"memory": "kept in memory", "disk": "read from the cache folder", "computed": "computed now"}


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
        if not ticked and len(settings.signals):
            raise ValueError(f"nothing ticked in the list of {source.name!r}: tick the layers to carry")
    request = PairRequest.from_settings(settings, signals=ticked, detail=kind == "detail")
    if kind == "preview" and request.settings.basis == "pointwise":
        request = replace(request, settings=replace(request.settings, basis=PREVIEW_BASIS.lower()))
    return make_plan(kind, source, target, request)


def cache_words(report: dict[str, Any]) -> str:
    """What a run reused, in words (empty when the run used no cache)."""
    hits = report.get("cache_hits", {})
    if report.get("pair") == "memory":
        return "Reused the match of the last run on these meshes (kept in memory)."
    found: dict[str, list[str]] = {}
    if isinstance(hits.get("correspondence"), str):
        found.setdefault(hits["correspondence"], []).append("the match")
    for role in ("source", "target"):
        counts = hits.get(role)
        if isinstance(counts, dict) and any(counts.values()):
            where = next(w for w in ("computed", "disk", "memory") if counts.get(w))
            found.setdefault(where, []).append(f"the {role} surface")
    return " ".join(f"{_WHERE[where].capitalize()}: {', '.join(found[where])}."
                    for where in _WHERE if where in found)


def match_words(report: dict[str, Any], hint: bool = True) -> str:
    """Why the meshes were matched the way they were, in words (empty when unknown).

    Read from the report's overlap: the share of each mesh lying on the other.
    With ``hint``, a shape match automatically chosen ends with a pointer to
    Ignore Placement."""
    corr = report.get("correspondence") or {}
    overlap = corr.get("overlap") or {}
    mode = str(report.get("mode", corr.get("mode", "")))
    near = overlap.get("target_near_source")
    if mode not in MODE_WORDS or not isinstance(near, (int, float)):
        return ""
    lies = f"{near:.0%} of the target lies on the source"
    if str(report.get("settings", {}).get("match", "auto")) != "auto":
        return f"As chosen under Method ({lies})."
    checked = corr.get("self_check")
    if isinstance(checked, dict) and checked.get("kept") in MODE_WORDS:
        return self_check_words(checked, lies)
    if mode == "aligned":
        return (f"The meshes sit on top of each other ({lies}): each target vertex took what "
                "lies closest to it on the source.")
    pointer = " Copies of one asset placed apart match best with Ignore Placement ticked." if hint else ""
    return (f"The meshes do not sit on top of each other (only {lies}): they were matched by "
            f"the shape of their surfaces, wherever each one is.{pointer}")


def self_check_words(checked: dict[str, Any], lies: str) -> str:
    """Automatic matching's check of a match in place against a match by shape, in one sentence."""
    by_place, by_shape = float(checked.get("aligned_mean", 0.0)), float(checked.get("intrinsic_mean", 0.0))
    sure = f"mean confidence {by_shape:.2f} by shape against {by_place:.2f} in place"
    if checked["kept"] == "intrinsic":
        return (f"The meshes sit on top of each other ({lies}), yet matched in place most points landed "
                f"elsewhere than a match by shape put them, and the shape match was surer ({sure}): "
                "the shape match was kept.")
    if by_shape > by_place:
        return (f"The meshes sit on top of each other ({lies}) but their surfaces differ, so a match by "
                f"shape was tried as a check; it put the points where matching in place did ({sure}): "
                "each target vertex took what lies closest to it on the source.")
    return (f"The meshes sit on top of each other ({lies}) but their surfaces differ, so a match by shape "
            f"was tried as a check; it was less sure ({sure}): each target vertex took what lies closest "
            "to it on the source.")


def skipped_lines(report: dict[str, Any]) -> list[str]:
    """What was not carried and why, one line each."""
    lines = []
    landmarks = report.get("landmarks", {})
    for name in landmarks.get("groups", ()):
        lines.append(f"{name}: vertex group on both meshes, used to line them up")
    for name in landmarks.get("skipped_empty", ()):
        lines.append(f"{name}: vertex group empty on one mesh, ignored")
    skipped = report.get("skipped", {})
    items = skipped.items() if isinstance(skipped, dict) else (
        (entry.get("name"), entry.get("reason")) for entry in skipped if isinstance(entry, dict))
    lines.extend(f"{name}: {reason}" for name, reason in items)
    return lines


def store_report(settings: Any, report: dict[str, Any]) -> None:
    """Copy what an artist can act on from a run's report onto the settings, for the panel."""
    preview = "description" in report
    settings.report_ok = True
    settings.report_text = str(report.get("summary", "done"))
    settings.report_mode = "" if preview else MODE_WORDS.get(str(report.get("mode")), "").capitalize()
    warned = any("Ignore Placement" in str(w) for w in report.get("warnings", ()))  # said there already
    reason = match_words(report, hint=not (warned or getattr(settings, "local_space", False)))
    if preview:
        shown = {key.lower(): label for key, label, _ in properties.BASES}.get(
            str(report.get("basis")), str(report.get("description", "smoothing")))
        reason = f"Shown: what {shown} keeps of each layer."
        if settings.basis == "POINTWISE":
            reason = ("Direct values arrive as they are. " + reason
                      + " Choose it under Method to carry that way.")
    settings.report_reason = reason
    settings.report_confidence = float(report.get("mean_confidence") or 0.0)
    settings.report_coverage = float(report.get("coverage_of_source_area") or 0.0)
    below = report.get("uncertain_below")
    settings.report_uncertain_below = float(below) if isinstance(below, (int, float)) else -1.0
    settings.report_uncertain = float(report.get("uncertain_share") or 0.0)
    timings = report.get("timings", {})
    settings.report_seconds = float(timings.get("wall", timings.get("total", 0.0)))
    settings.report_cache = cache_words(report)
    settings.report_skipped = "\n".join(skipped_lines(report))
    pieces = str(report.get("pieces_line", ""))
    settings.report_pieces = pieces
    settings.report_warnings = "\n".join(str(w) for w in report.get("warnings", ()) if str(w) != pieces)
    settings.report_pieces_warn = pieces != "" and pieces in report.get("warnings", ())
    settings.report_notes = "\n".join(str(n) for n in report.get("notes", ()))
    settings.report_smoothed = str(report.get("basis", "pointwise")) != "pointwise"
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
    settings.report_skipped = ""
    settings.report_warnings = ""
    settings.report_pieces = ""
    settings.report_pieces_warn = False
    settings.report_notes = ""
    settings.report_cache = ""
    settings.report_json = ""


def stage_words(step: Step) -> str:
    """The engine's stage as the sidebar shows it: "Matching the surfaces (2 of 4)", "Done"."""
    name = step.name[:1].upper() + step.name[1:]
    return name if step.name in (DONE, STOPPED) else f"{name} ({step.done} of {step.total})"


def show_step(settings: Any, step: Step, context: bpy.types.Context | None = None) -> None:
    """Show the stage a background run is in: the sidebar's bar and its words (the
    settings the panel draws), the window's progress and the status bar."""
    settings.progress = step.fraction
    settings.progress_text = stage_words(step)
    if context is None:
        return
    if context.window_manager is not None:
        context.window_manager.progress_update(round(100 * step.fraction))
    workspace = getattr(context, "workspace", None)
    if workspace is not None:
        cancels = "" if step.name in (DONE, STOPPED) else " (Esc cancels)"
        workspace.status_text_set(f"Overtone: {settings.progress_text}, {step.seconds:.0f} s{cancels}")


def window_progress(context: bpy.types.Context) -> Writer | None:
    """The window's progress for a run in this process, which holds Blender until it ends
    (Blender shows it by the mouse pointer); None without a window."""
    wm = context.window_manager
    if not runs_modal(context) or wm is None:
        return None
    wm.progress_begin(0, 100)

    def write(step: Step) -> None:
        if step.name in (DONE, STOPPED):
            wm.progress_end()
        else:
            wm.progress_update(round(100 * step.fraction))

    return write


def _end(settings: Any, context: bpy.types.Context | None) -> None:
    settings.running = False
    settings.progress = 0.0
    settings.progress_text = ""
    if context is not None and context.window_manager is not None:
        context.window_manager.progress_end()
    workspace = getattr(context, "workspace", None) if context is not None else None
    if workspace is not None:
        workspace.status_text_set(None)


def step_run(run: BackgroundRun, settings: Any, report: Reporter,
             context: bpy.types.Context | None = None) -> set[str]:
    """One timer tick of a background run: the stage the worker is in (:func:`show_step`;
    "Done" last), or the results written.

    Returns the modal return set: ``{'RUNNING_MODAL'}`` while the worker works,
    ``{'FINISHED'}`` once the results are written, ``{'CANCELLED'}`` on failure
    (nothing written).
    """
    status = run.poll()
    if status.step is not None and status.state in ("running", "done"):
        show_step(settings, status.step, context)
    if status.state == "running":
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


def runs_modal(context: bpy.types.Context) -> bool:
    """Whether a click runs in the worker with progress: a window delivers timer
    events (never in background mode, where ``invoke`` runs ``execute``)."""
    return not bpy.app.background and context.window is not None and context.window_manager is not None


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
            plan = plan_from_context(context, self.kind)
            result = run_plan(plan, window_progress(context))
        except ValueError as error:
            return self._fail(context, str(error))
        store_report(settings, result)
        level, text = message_of(result)
        self._reporter()(level, f"Overtone: {text}")
        return {'FINISHED'}

    def invoke(self, context: bpy.types.Context, event: bpy.types.Event) -> set[OperatorReturnItems]:
        if not runs_modal(context):
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
        settings.progress_text = "Starting"
        wm = context.window_manager
        assert wm is not None  # runs_modal checked it
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
            self._stop_timer(context)
        return result  # type: ignore[return-value]

    def cancel(self, context: bpy.types.Context) -> None:
        """Blender ends the modal run (the window closes, a file is loaded): stop the worker."""
        run = self._run
        if run is not None:
            cancel_run(run, properties.settings_of(context), self._reporter(), context)
        self._stop_timer(context)

    def _stop_timer(self, context: bpy.types.Context) -> None:
        if self._timer is not None and context.window_manager is not None:
            context.window_manager.event_timer_remove(self._timer)
        self._timer = None
        self._run = None


class OVERTONE_OT_transfer_attributes(_JobOperator, bpy.types.Operator):
    """Carry colour attributes and vertex groups (or the layers ticked in the list) from the selected mesh to the active mesh"""

    bl_idname = "overtone.transfer_attributes"
    bl_label = "Carry Attributes"
    bl_options = {'REGISTER', 'UNDO'}
    kind = "transfer"


class OVERTONE_OT_transfer_detail(_JobOperator, bpy.types.Operator):
    """Carry the small bumps and creases of the selected mesh onto the active mesh, as a shape key"""

    bl_idname = "overtone.transfer_detail"
    bl_label = "Carry Detail"
    bl_options = {'REGISTER', 'UNDO'}
    kind = "detail"


class OVERTONE_OT_preview_carry(_JobOperator, bpy.types.Operator):
    """See on the source what smoothing keeps of each layer: writes copies named <name>_carried, never carried on by default"""

    bl_idname = "overtone.preview_carry"
    bl_label = "Preview on Source"
    bl_options = {'REGISTER', 'UNDO'}
    kind = "preview"


class OVERTONE_OT_refresh_signals(bpy.types.Operator):
    """List the source's attributes and vertex groups to choose what to carry; the colour attributes and vertex groups carried by default come ticked"""

    bl_idname = "overtone.refresh_signals"
    bl_label = "Read Source Layers"
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
        same = settings.signals_source == source.name
        ticks = {item.name: item.use for item in settings.signals} if same else {}
        target = _target if _target is not None and _target != source else None
        ticked = set(default_signals(source, target, evaluated=settings.as_shown,
                                     replace_existing=settings.replace_existing))
        settings.signals.clear()
        for signal in bridge.list_layers(source, evaluated=settings.as_shown):
            item = settings.signals.add()
            item.name = signal.name
            item.kind = signal.kind
            item.domain = signal.domain
            item.data_type = signal.data_type
            item.use = ticks.get(signal.name, signal.name in ticked)
        settings.signals_source = source.name
        self.report({'INFO'}, f"Overtone: {len(settings.signals)} layers on {source.name!r}, "
                              f"{sum(item.use for item in settings.signals)} ticked")
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
