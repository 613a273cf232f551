"""The job operators' modal path (invoke, progress, Esc, finish) with a real worker.

Blender in module mode never enters ``invoke`` or ``modal`` (docs/platform.md:
'INVOKE_DEFAULT' runs execute directly), so the operator class's own methods
are called here with a stand-in ``self``, a context whose window manager and
screen record what they are asked, and stand-in events ('TIMER', 'ESC'). The
one decision that depends on a window, :func:`operators.runs_modal`, is
replaced by "yes" where the modal branch is under test; everything after it
runs as it would in the UI: the worker process computes, the timer ticks write
the result.
"""

import importlib
import time

import bpy
import numpy as np
import pytest

from .conftest import MODULE
from .standins import Context, Event, Screen, StandIn, WindowManager
from .test_operators import _scene_state, painted_pair, read


# every panel draws, and the click path runs, on each Blender the manifest claims
pytestmark = pytest.mark.every_blender


@pytest.fixture
def ops(overtone):
    return importlib.import_module(MODULE + ".operators")


@pytest.fixture
def bridge(overtone):
    return importlib.import_module(MODULE + ".bridge")


@pytest.fixture
def ui_context(ops, monkeypatch):
    """A context as in the UI: the modal branch is taken."""
    monkeypatch.setattr(ops, "runs_modal", lambda context: True)
    return Context(window_manager=WindowManager(), screen=Screen())


def tick_until_done(cls, op, context, limit=300.0):
    """TIMER events until the operator leaves RUNNING_MODAL; returns (result, ticks seen)."""
    started, seen = time.perf_counter(), []
    while time.perf_counter() - started < limit:
        result = cls.modal(op, context, Event('TIMER'))
        if result != {'RUNNING_MODAL'}:
            return result, seen
        settings = context.scene.overtone
        seen.append((settings.running, settings.progress, settings.progress_text))
        time.sleep(0.02)
    raise AssertionError("the worker did not finish")


def test_invoke_without_a_window_runs_at_once(ops, scene):
    painted_pair(scene)
    assert not ops.runs_modal(bpy.context)  # module mode is background mode
    cls = ops.OVERTONE_OT_transfer_attributes
    op = StandIn(cls)
    wm = WindowManager()
    assert cls.invoke(op, Context(window_manager=wm), Event('LEFTMOUSE')) == {'FINISHED'}
    assert not wm.handlers and not wm.timers
    assert op.reports[0][0] == {'INFO'} and "carried 3 layers" in op.reports[0][1]
    assert scene.overtone.report_ok


def test_click_progress_and_finish(ops, bridge, scene, ui_context):
    src, tgt = painted_pair(scene, rings=(60, 50), segments=(30, 34))
    cls = ops.OVERTONE_OT_transfer_attributes
    op = StandIn(cls)
    wm = ui_context.window_manager
    before = _scene_state()
    assert cls.invoke(op, ui_context, Event('LEFTMOUSE')) == {'RUNNING_MODAL'}
    assert wm.handlers == [op] and len(wm.timers) == 1 and wm.calls[0] == ("begin", 0, 100)
    settings = scene.overtone
    assert settings.running and settings.progress_text == "starting"
    assert _scene_state() == before  # nothing written while the worker works
    # a second click while running is refused without disturbing the run
    other = StandIn(cls)
    assert cls.invoke(other, ui_context, Event('LEFTMOUSE')) == {'CANCELLED'}
    assert other.reports == [({'ERROR'}, "Overtone: a job is already running: wait for it or press Esc")]
    # other events pass through to Blender
    assert cls.modal(op, ui_context, Event('MOUSEMOVE')) == {'PASS_THROUGH'}
    result, seen = tick_until_done(cls, op, ui_context)
    assert result == {'FINISHED'}
    assert seen and all(running for running, _, _ in seen)
    assert all(0.0 <= fraction <= 1.0 for _, fraction, _ in seen)
    assert [c for c in wm.calls if c[0] == "update"]  # the progress bar moved
    assert wm.calls[-1] == ("end",) and not wm.timers
    assert ui_context.screen.areas[0].redraws >= 1 and ui_context.screen.areas[1].redraws == 0
    assert not settings.running and settings.progress == 0.0 and settings.report_ok
    assert op.reports[-1][0] == {'INFO'} and "carried 3 layers from 'Painted' to 'Plain'" in op.reports[-1][1]
    # the worker's result is what the run in this process writes
    in_worker = {n: read(type("M", (), {"bridge": bridge}), tgt, n) for n in ("tint", "tint_bytes", "head")}
    settings.replace_existing = True
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    for name, values in in_worker.items():
        np.testing.assert_allclose(read(type("M", (), {"bridge": bridge}), tgt, name), values, atol=1e-6)
    # a modal call after the end has nothing to do
    assert cls.modal(op, ui_context, Event('TIMER')) == {'CANCELLED'}


def start_large(scene, cls, context):
    """A click on ``cls`` over a pair large enough to be caught working;
    returns (operator, scene state before, worker process)."""
    painted_pair(scene, rings=(70, 60), segments=(36, 40))
    op = StandIn(cls)
    before = _scene_state()
    assert cls.invoke(op, context, Event('LEFTMOUSE')) == {'RUNNING_MODAL'}
    return op, before, op._run.worker.process


def test_esc_stops_the_worker_and_writes_nothing(ops, scene, ui_context):
    cls = ops.OVERTONE_OT_transfer_detail
    op, before, process = start_large(scene, cls, ui_context)
    folder = op._run.folder
    assert cls.modal(op, ui_context, Event('TIMER')) == {'RUNNING_MODAL'}
    assert cls.modal(op, ui_context, Event('ESC')) == {'CANCELLED'}
    assert process.poll() is not None  # the worker was stopped
    assert not folder.exists() and not ui_context.window_manager.timers
    assert op.reports == [({'WARNING'}, "Overtone: cancelled: 'Plain' left as it was")]
    assert _scene_state() == before
    settings = scene.overtone
    assert not settings.running and not settings.report_ok
    assert settings.report_text == "cancelled: 'Plain' left as it was"


def test_blender_cancelling_the_operator_stops_the_worker(ops, scene, ui_context):
    cls = ops.OVERTONE_OT_transfer_attributes
    op, before, process = start_large(scene, cls, ui_context)
    cls.cancel(op, ui_context)  # what Blender calls when it ends a modal operator itself
    assert process.poll() is not None and op._run is None and not ui_context.window_manager.timers
    assert _scene_state() == before and not scene.overtone.running


def test_a_target_changed_during_the_run_is_not_written(ops, scene, ui_context):
    src, tgt = painted_pair(scene)
    cls = ops.OVERTONE_OT_preview_carry
    op = StandIn(cls)
    select_only(src)
    assert cls.invoke(op, ui_context, Event('LEFTMOUSE')) == {'RUNNING_MODAL'}
    assert op._run.worker.wait(timeout=300).state == "done"
    src.data.vertices[0].co.x += 0.25
    before = _scene_state()
    result, _ = tick_until_done(cls, op, ui_context)
    assert result == {'CANCELLED'}
    assert op.reports[-1][0] == {'ERROR'}
    assert "object 'Painted' changed while Overtone was working: nothing written" in op.reports[-1][1]
    assert _scene_state() == before and not scene.overtone.report_ok


def select_only(obj):
    for other in bpy.context.scene.objects:
        other.select_set(other == obj)
    bpy.context.view_layer.objects.active = obj
