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
import re
import subprocess
import time

from pathlib import Path

import bpy
import numpy as np
import pytest

from .conftest import MODULE, engine_module
from .standins import Context, Event, Screen, StandIn, WindowManager, Workspace
from .test_operators import _scene_state, painted_pair, read
from .test_panels import draw_all


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
    return Context(window_manager=WindowManager(), screen=Screen(), workspace=Workspace())


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
    assert settings.running and settings.progress_text == "Starting"
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


WORDS = re.compile(r"^(.+) \((\d+) of (\d+)\)$")
CLI_LINE = re.compile(r"^stage (\d+)/(\d+): (.+) \(\d+\.\d s\)$")


def stage_of(text):
    """(engine stage name, number, total) from what the sidebar's bar says, e.g.
    "Matching the surfaces (2 of 4)"."""
    found = WORDS.match(text)
    assert found, text
    return found[1][:1].lower() + found[1][1:], int(found[2]), int(found[3])


def test_a_click_shows_the_engines_stages_in_the_command_lines_order(overtone, ops, scene, ui_context, tmp_path):
    progress = engine_module("common.progress")
    plan = progress.job_stages("transfer")
    painted_pair(scene, rings=(72, 62), segments=(36, 40))   # sizes of its own: nothing cached
    cls = ops.OVERTONE_OT_transfer_attributes
    op = StandIn(cls)
    assert cls.invoke(op, ui_context, Event('LEFTMOUSE')) == {'RUNNING_MODAL'}
    inputs = op._run.plan.inputs
    settings, shown, panel = scene.overtone, [], None
    started = time.perf_counter()
    while (result := cls.modal(op, ui_context, Event('TIMER'))) == {'RUNNING_MODAL'}:
        assert time.perf_counter() - started < 300, "the worker did not finish"
        if settings.progress_text != "Starting":
            shown.append((stage_of(settings.progress_text), settings.progress))
            if panel is None:   # the sidebar drawn while the worker works
                panel = [b.get("text") for f, b in draw_all()["OVERTONE_PT_main"].log
                         if f == "prop" and b["property"] == "progress"], settings.progress_text
        time.sleep(0.005)
    assert result == {'FINISHED'} and op.reports[-1][0] == {'INFO'}
    # the bar names the engine's stages, in the plan's order, each once, its share growing
    names = list(dict.fromkeys(name for (name, _, _), _ in shown))
    assert progress.MATCHING in names and names == sorted(names, key=plan.index)
    fractions = [f for _, f in shown]
    assert all(b >= a for a, b in zip(fractions, fractions[1:]))
    assert all((b > a) == (s != t) for (s, a), (t, b) in zip(shown, shown[1:]))
    assert all(f == pytest.approx((number - 1) / total) for (_, number, total), f in shown)
    drawn, words = panel
    assert drawn == [words] and stage_of(words)[0] in plan
    # the window's progress follows, ends at 100, then stops; the status bar says done, then is given back
    wm = ui_context.window_manager
    updates = [c[1] for c in wm.calls if c[0] == "update"]
    assert updates == sorted(updates) and updates[-1] == 100 and wm.calls[-1] == ("end",)
    status = ui_context.workspace.status
    assert status[-1] is None and status[-2].startswith("Overtone: Done, ")
    assert any(text and text.startswith("Overtone: Matching the surfaces (") for text in status)
    # the command line on the same two meshes (the installed extension's engine, a pipe: plain lines)
    files = engine_module("intake.files")
    for role, mesh in (("source", inputs.source), ("target", inputs.target)):
        point = next(sig for sig in inputs.signals if sig.domain == "POINT")
        extra = {"color" if point.values.ndim == 2 else point.name: point.values} if role == "source" else None
        files.write_ply(tmp_path / f"{role}.ply", mesh.vertices, corners=mesh.corners, sizes=mesh.sizes,
                        properties=extra)
    worker = importlib.import_module(MODULE + ".worker")
    cli = subprocess.run([worker.python_executable(), "-m", "engine", "transfer", str(tmp_path / "source.ply"),
                          str(tmp_path / "target.ply"), "-o", str(tmp_path / "out.ply")],
                         cwd=Path(overtone.__file__).parent, env=worker.child_environment(),
                         capture_output=True, text=True)
    assert cli.returncode == 0, cli.stderr
    lines = [CLI_LINE.match(line) for line in cli.stdout.splitlines() if line.startswith("stage ")]
    assert all(lines), cli.stdout
    on_the_command_line = [m[3] for m in lines]
    assert on_the_command_line == [progress.READING, progress.MATCHING, progress.CARRYING, progress.WRITING]
    assert names == [n for n in on_the_command_line if n in names]   # the same stages, the same order
    # numbered as the command line numbers them once it has read the meshes (the add-on's job
    # has them from the start: its first stage is counted in the final plan already)
    assert all((number, total) == (on_the_command_line.index(name) + 1, len(on_the_command_line))
               for (name, number, total), _ in shown)
    assert [int(m[2]) for m in lines] == [len(plan)] + [len(on_the_command_line)] * 3


def test_a_run_held_in_blenders_process_counts_the_stages_in_the_window(ops, scene, ui_context):
    # execute (a redo, a script with a window) holds Blender until the run ends: the
    # window's progress counts the same stages (Blender shows it by the mouse pointer)
    importlib.import_module(MODULE + ".job").forget_pairs()   # no match kept from another test
    painted_pair(scene, rings=(33, 27), segments=(17, 19))     # sizes no other test uses: nothing cached
    cls = ops.OVERTONE_OT_transfer_attributes
    op = StandIn(cls)
    assert cls.execute(op, ui_context) == {'FINISHED'} and op.reports[-1][0] == {'INFO'}
    calls = ui_context.window_manager.calls
    assert calls[0] == ("begin", 0, 100) and calls[-1] == ("end",)
    # reading, matching, carrying, writing: the 4 stages these meshes need
    assert calls[1:-1] == [("update", 0), ("update", 25), ("update", 50), ("update", 75)]
    # again: the match is kept in memory, no matching stage
    ui_context.window_manager.calls.clear()
    settings = scene.overtone
    settings.replace_existing = True
    assert cls.execute(op, ui_context) == {'FINISHED'}
    assert calls[1:-1] == [("update", 0), ("update", 33), ("update", 67)]
