"""One source/target pair: what to carry, the checks, and the way to the engine.

Every route ends here: the operators (at once or through the worker), the
batch runner, the demo. A run has three steps, and only the first and last
touch Blender:

1. :func:`make_plan` checks the objects and reads everything into a
   :class:`.job.JobInput` (the engine's mesh and signal types, world space;
   the source "as shown" when asked);
2. :func:`.job.run_job` runs the engine, here (:func:`run_plan`) or in the
   worker process (:class:`BackgroundRun`);
3. :func:`finish` checks that the object written to has not changed since
   step 1 and writes every result through :func:`.bridge.write_outputs`, all
   or nothing.

Transfers never modify the source. The preview is the one job that writes
onto the source: new layers ``<name>_carried`` holding the basis's own
reconstruction of each signal; existing layers are never changed (a previous
preview layer of the same name is replaced only with "Replace Existing").
"""

from __future__ import annotations

import shutil
import tempfile
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any, TextIO, cast

import bpy
import numpy as np

from . import bridge, job, preferences
from .engine import Settings, Signal
from .engine.common.progress import WRITING, Writer, job_stages, showing, stage
from .records import (CONFIDENCE_NAME, DETAIL_NAME, UNCERTAIN_NAME, landmark_names, names_for, record,
                      written_on)
from .worker import Status, load_output, save_input, shared_worker

if TYPE_CHECKING:
    from numpy.typing import NDArray

__all__ = ["PairRequest", "Plan", "BackgroundRun", "selected_pair", "pick_pair", "check_pair",
           "default_signals", "make_plan", "run_plan", "finish", "transfer_pair", "engine_settings",
           "outcome", "Outcome", "message_of", "ENGINE_NAMES", "CONFIDENCE_NAME", "DETAIL_NAME",
           "PREVIEW_SUFFIX", "MODE_WORDS", "COPY_TOLERANCE", "is_placed_copy", "copy_note",
           "UNCERTAIN_BELOW", "WARN_SHARE", "FAIL_SHARE", "not_carried", "material_note", "kind_note",
           "pieces_line", "piece_words", "BLENDER_EDGE_FLAGS", "EXPECTED_TYPES"]

PREVIEW_SUFFIX = "_carried"
UNCERTAIN_BELOW = 0.5
"""Match confidence under which a target vertex counts as uncertain in the report.

The engine's confidence starts from exp(-(d / 4e)^2), d the distance a vertex's
round trip through the forward and reverse maps ends from where it began, e the
target's mean edge length: under 0.5 means the round trip misses by more than
4 sqrt(ln 2) ~ 3.3 edge lengths, several faces away. Further checks multiply it
(engine/matching/confidence.py: facing, signature), and a piece with no
counterpart on the source gets 0 (engine/matching/pieces.py), so its vertices
are uncertain too."""

# When to warn, and when to refuse. A target vertex's confidence is
# exp(-(d / 4e)^2), d the distance its round trip (target -> source -> target)
# ends from where it started and e the target's mean edge length
# (engine/matching/correspondence.py). Below 0.5 the round trip ends more
# than 3.3 edges away (4 sqrt(ln 2)): past the vertex's own neighbourhood, so
# its value comes from another part of the source; such a vertex is uncertain.
# On the test pairs of tests/pairs.py (re-posed, re-meshed, re-proportioned,
# thickened and pinched creatures) at most 0.7 % of vertices were uncertain
# (docs/measurements.md, add-on section): a run with more than 2 % is warned
# about. When more than half of the target is uncertain the map does not hold
# for most of the surface: the run is refused (the target left as it was)
# unless the artist asks to write anyway.
UNCERTAIN_BELOW = 0.5
WARN_SHARE = 0.02
FAIL_SHARE = 0.5


ENGINE_NAMES = {"match_mode": "match", "basis": "basis", "eigenfunctions": "k",
                "product_order": "order", "detail_strength": "detail_strength",
                "detail_size": "detail_size", "max_influences": "max_influences",
                "weight_threshold": "weight_threshold", "keep_weight_totals": "keep_weight_totals"}
"""The add-on's setting names (scene properties, batch ``settings`` keys) and
the :class:`engine.Settings` field each one sets: the one place they meet."""

DEFAULT_SETTINGS = Settings(k=60, order=2)
"""The engine settings of a run nobody tuned (as the scene properties' defaults)."""


def engine_settings(values: Mapping[str, Any], base: Settings = DEFAULT_SETTINGS) -> Settings:
    """``base`` with the add-on settings in ``values`` applied (enum items lowercased).

    Raises
    ------
    ValueError
        For a name not in :data:`ENGINE_NAMES` or a value the engine refuses.
    """
    changes: dict[str, Any] = {}
    for name, value in values.items():
        if name not in ENGINE_NAMES:
            raise ValueError(f"unknown setting {name!r} (known: {', '.join(sorted(ENGINE_NAMES))})")
        changes[ENGINE_NAMES[name]] = value.lower() if isinstance(value, str) else value
    return replace(base, **changes)


@dataclass(frozen=True)
class PairRequest:
    """Everything one transfer needs besides the two objects.

    An empty ``signals`` means: every colour attribute and vertex group of the
    source (vertex groups that pair up as landmarks excepted). ``settings`` are
    the engine's own (landmarks come from the objects' vertex groups).
    """

    signals: tuple[str, ...] = ()
    detail: bool = False
    settings: Settings = DEFAULT_SETTINGS
    as_shown: bool = False
    replace_existing: bool = False
    local_space: bool = False
    keep_earlier: bool = False
    write_anyway: bool = False

    @classmethod
    def from_settings(cls, settings: Any, *, signals: Sequence[str] = (),
                      detail: bool = False) -> PairRequest:
        """Build from the scene settings (or anything with the same attributes)."""
        engine = engine_settings({name: getattr(settings, name) for name in ENGINE_NAMES})
        flags = {name: bool(getattr(settings, name, False)) for name in _FLAGS}
        return cls(signals=tuple(signals), detail=detail, settings=engine, **flags)


_FLAGS = ("as_shown", "replace_existing", "local_space", "keep_earlier", "write_anyway")


@dataclass(frozen=True)
class Plan:
    """A checked run: the job's arrays and where its results go."""

    kind: str
    source: str
    target: str
    request: PairRequest
    inputs: job.JobInput
    not_carried: tuple[tuple[str, str], ...] = ()
    """The source's layers Overtone cannot carry, with the reason (reported)."""
    notes: tuple[str, ...] = ()
    """Warnings known before the run (modifiers that change the source's shape unseen)."""
    remarks: tuple[str, ...] = ()
    """Information known before the run (the target's own modifiers)."""
    placed_copy: bool = False
    """The target has the source's own size and shape where each object sits
    (:func:`is_placed_copy`): if it is matched by shape, the artist is warned."""

    @property
    def written_on(self) -> str:
        """The object the results are written to (the source for a preview)."""
        return self.source if self.kind == "preview" else self.target


# --------------------------------------------------------------------------- checks


def selected_pair(context: bpy.types.Context
                  ) -> tuple[bpy.types.Object | None, bpy.types.Object | None]:
    """(source, target) from the selection: the active mesh is the target, the
    one other selected mesh the source; None where that is not the case."""
    active = context.active_object
    target = active if active is not None and active.type == 'MESH' else None
    others = [o for o in context.selected_objects if o.type == 'MESH' and o != target]
    return (others[0] if len(others) == 1 else None), target


def pick_pair(context: bpy.types.Context) -> tuple[bpy.types.Object, bpy.types.Object]:
    """(source, target) from the selection, or a ValueError naming what is wrong."""
    active = context.active_object
    selected = list(context.selected_objects)
    if active is None:
        raise ValueError("no active object: select the source mesh, then the target mesh (active)")
    others = [o for o in selected if o != active]
    if not others:
        raise ValueError(f"only {active.name!r} is selected: also select the source mesh "
                         "(the active object is the target)")
    if len(others) > 1:
        names = ", ".join(repr(o.name) for o in others)
        raise ValueError(f"select exactly two objects: besides the target {active.name!r}, "
                         f"{names} are selected")
    return others[0], active


def _check_object(role: str, obj: bpy.types.Object) -> None:
    if obj.type != 'MESH':
        raise ValueError(f"{role} {obj.name!r} is not a mesh (type {obj.type})")
    if obj.mode == 'EDIT':
        raise ValueError(f"{role} {obj.name!r} is in edit mode: leave it first")
    mesh = cast(bpy.types.Mesh, obj.data)
    if len(mesh.polygons) == 0:
        raise ValueError(f"{role} {obj.name!r} has no faces ({len(mesh.vertices)} vertices): "
                         "Overtone needs a surface")


def default_signals(source: bpy.types.Object, target: bpy.types.Object | None = None, *,
                    evaluated: bool = False, replace_existing: bool = False) -> tuple[str, ...]:
    """What is carried when nothing is chosen (the UI, batch ``"all"``, the preview):
    every colour attribute and vertex group of the source, except

    - the groups that pair up as landmarks (:func:`.records.landmark_names`:
      groups the target also has and Overtone did not write, none with
      ``replace_existing``);
    - preview layers ``<name>_carried`` next to their ``<name>``.

    Other attributes (numbers, vectors, integers, on/off) are carried only when named."""
    pinned = (set(landmark_names(source, target, evaluated=evaluated, replace_existing=replace_existing))
              if target is not None else set())
    listed = bridge.list_layers(source, evaluated=evaluated)
    names = {s.name for s in listed}
    return tuple(s.name for s in listed
                 if (s.kind == "color" or (s.data_type == "VERTEX_GROUP" and s.name not in pinned))
                 and not (s.name.endswith(PREVIEW_SUFFIX) and s.name[:-len(PREVIEW_SUFFIX)] in names))


def check_pair(source: bpy.types.Object | None, target: bpy.types.Object | None,
               request: PairRequest) -> list[bridge.Layer]:
    """Check a pair before any work; return the source signals to carry.

    Raises
    ------
    ValueError
        Naming the object and what is missing or wrong.
    """
    if source is None or target is None:
        raise ValueError("select two meshes: the source, then the target (active)")
    for role, obj in (("source", source), ("target", target)):
        _check_object(role, obj)
    if source == target:
        raise ValueError(f"source and target are the same object {source.name!r}")
    available = {s.name: s for s in bridge.list_layers(source, evaluated=request.as_shown)}
    uncarried = {layer.name: reason for layer, reason in bridge.uncarried_layers(source, evaluated=request.as_shown)}
    missing = [name for name in request.signals if name not in available and name not in uncarried]
    if missing:
        raise ValueError(f"source {source.name!r} has no attribute or vertex group "
                         f"{', '.join(map(repr, missing))} (it has {', '.join(map(repr, available)) or 'none'})")
    if not request.signals and not request.detail:
        raise ValueError(f"nothing to carry: source {source.name!r} has no colour attributes or "
                         "vertex groups (read its layers and tick one to carry)")
    chosen = [available[name] for name in request.signals if name in available]
    if not chosen and not request.detail:
        raise ValueError("nothing Overtone can carry was asked for: "
                         + "; ".join(f"{name}: {uncarried[name]}" for name in request.signals))
    return chosen


# --------------------------------------------------------------------------- reading


def _cache_settings() -> tuple[str | None, int]:
    try:
        folder = preferences.cache_folder(bpy.context)
        limit = int(preferences.preferences_of(bpy.context).cache_limit_mb)
    except (ValueError, KeyError, AttributeError):
        return None, 0
    return str(folder), limit * 1024 * 1024


def _modifier_notes(source: bpy.types.Object, target: bpy.types.Object | None,
                    request: PairRequest) -> tuple[tuple[str, ...], tuple[str, ...]]:
    """(warnings, remarks) on modifiers that change a mesh's shape the run does not see: a
    warning for the source's (the values come from a shape the artist does not see), a
    remark for the target's (results go on its mesh, under its modifiers, as they should)."""
    notes = []
    if not request.as_shown:
        changed = bridge.shape_modifiers(source)
        if changed:
            notes.append(f"source {source.name!r}: its modifiers ({', '.join(changed)}) change its shape, "
                         "but Overtone read the mesh without them; tick Source With Modifiers to carry from what "
                         "the viewport shows")
    remarks = []
    if target is not None and target != source:
        changed = bridge.shape_modifiers(target)
        if changed:
            remarks.append(f"target {target.name!r}: its modifiers ({', '.join(changed)}) change its "
                           "shape; Overtone matched and wrote its mesh before them")
    return tuple(notes), tuple(remarks)


COPY_TOLERANCE = 0.02
"""How close (a share of the source's bounding-box diagonal) the two meshes'
own bounding boxes must be for the target to count as a placed copy."""


def is_placed_copy(source_local: NDArray[np.floating[Any]], target_local: NDArray[np.floating[Any]]) -> bool:
    """Whether two meshes, as stored (object space), fill the same box: copies of
    one asset, or one asset re-meshed, whatever each object's place, turn and scale.

    A shape match cannot tell such a copy from its mirror image or flipped self
    when the asset is nearly symmetric (a body, a cylinder): the map then comes
    back sure of itself and wrong, which matching in place avoids."""
    if not len(source_local) or not len(target_local):
        return False
    lo_s, hi_s = source_local.min(axis=0), source_local.max(axis=0)
    lo_t, hi_t = target_local.min(axis=0), target_local.max(axis=0)
    diagonal = float(np.linalg.norm(hi_s - lo_s))
    apart = max(float(np.abs(lo_s - lo_t).max()), float(np.abs(hi_s - hi_t).max()))
    return diagonal > 0.0 and apart <= COPY_TOLERANCE * diagonal


def _preview_layers(source: bpy.types.Object, request: PairRequest) -> list[bridge.Layer]:
    _check_object("source", source)
    listed = {s.name: s for s in bridge.list_layers(source, evaluated=request.as_shown)}
    names = request.signals or default_signals(source, evaluated=request.as_shown)
    missing = [n for n in names if n not in listed]
    if missing:
        raise ValueError(f"source {source.name!r} has no attribute or vertex group "
                         f"{', '.join(map(repr, missing))} (it has {', '.join(map(repr, listed)) or 'none'})")
    if not names:
        raise ValueError(f"source {source.name!r} has no attributes or vertex groups to preview")
    return [listed[n] for n in names]


def make_plan(kind: str, source: bpy.types.Object | None, target: bpy.types.Object | None,
              request: PairRequest) -> Plan:
    """Check the pair and read everything the job needs (the only Blender reads).

    ``kind`` is "transfer", "detail" or "preview" (the preview needs only the
    source; pass it as both).
    """
    if kind not in job.JOB_KINDS:
        raise ValueError(f"unknown job kind {kind!r}")
    groups: dict[str, tuple[Any, Any]] = {}
    target_input = None
    local = request.local_space
    if kind == "preview":
        if source is None:
            raise ValueError("select the source mesh to preview")
        signals = _preview_layers(source, request)
    else:
        if source is not None and target is not None and source != target and not request.signals \
                and not request.detail and source.type == 'MESH' and target.type == 'MESH':
            request = replace(request, signals=default_signals(
                source, target, evaluated=request.as_shown, replace_existing=request.replace_existing))
        signals = check_pair(source, target, request)
        assert source is not None and target is not None
        if kind == "detail":
            signals = []
        target_input = bridge.read_mesh(target, local=local)
        pinned = landmark_names(source, target, evaluated=request.as_shown,
                                replace_existing=request.replace_existing)
        src_w = bridge.read_vertex_groups(source, pinned, evaluated=request.as_shown)
        tgt_w = bridge.read_vertex_groups(target, pinned)
        groups = {name: (src_w[name], tgt_w[name]) for name in pinned}
    folder, limit = _cache_settings()
    inputs = job.JobInput(kind, bridge.read_mesh(source, evaluated=request.as_shown, local=local),
                          target_input,
                          tuple(bridge.read_signal(source, s, evaluated=request.as_shown) for s in signals),
                          groups, request.settings, (source.name, (target or source).name), folder, limit)
    skipped = () if kind == "detail" else not_carried(source, request.as_shown, request.signals)
    notes, remarks = _modifier_notes(source, None if kind == "preview" else target, request)
    copy = (kind != "preview" and not local and target is not None
            and is_placed_copy(bridge.read_mesh(source, evaluated=request.as_shown, local=True).vertices,
                            bridge.read_mesh(target, local=True).vertices))
    return Plan(kind, source.name, (target or source).name, request, inputs,
                not_carried=skipped, notes=notes, remarks=remarks, placed_copy=copy)


BLENDER_EDGE_FLAGS = frozenset({"uv_seam", "sharp_edge", "crease_edge", "bevel_weight_edge", "freestyle_edge"})
"""Blender's own per-edge marks (seams, sharp edges, creases, bevel weights, Freestyle
edges; attribute names from memory): named as not carried only when asked for."""

EXPECTED_TYPES = frozenset({"BYTE_COLOR", "FLOAT_COLOR", "FLOAT", "FLOAT_VECTOR", "FLOAT2", "INT", "INT8",
                            "INT16_2D", "INT32_2D"})
"""Attribute types an artist expects to arrive (colours, numbers, whole numbers): such a
layer Overtone cannot carry is named as not carried even when nobody asked for it."""


def not_carried(source: bpy.types.Object, evaluated: bool,
                asked: Sequence[str] = ()) -> tuple[tuple[str, str], ...]:
    """(name, reason) for the source layers Overtone does not carry that the artist asked
    for (``asked``) or would expect to arrive (:data:`EXPECTED_TYPES`, Blender's own edge
    marks excepted); a text, on/off or matrix layer nobody asked for is not mentioned."""
    return tuple((layer.name, reason) for layer, reason in bridge.uncarried_layers(source, evaluated=evaluated)
                 if layer.name in asked
                 or (layer.data_type in EXPECTED_TYPES and layer.name not in BLENDER_EDGE_FLAGS))



# --------------------------------------------------------------------------- outcomes


@dataclass(frozen=True)
class Outcome:
    """How far a run's match can be trusted (thresholds above)."""

    level: str                      # "ok", "warning" or "failure"
    mean_confidence: float
    uncertain: NDArray[np.bool_]    # (n_t,) vertices below UNCERTAIN_BELOW
    text: str


def outcome(confidence: NDArray[np.floating[Any]]) -> Outcome:
    """Judge a target's confidence: ok, a warning, or a failure, with the numbers."""
    conf = np.asarray(confidence, dtype=np.float64)
    uncertain = conf < UNCERTAIN_BELOW
    share = float(uncertain.mean()) if conf.size else 0.0
    mean = float(conf.mean()) if conf.size else 0.0
    numbers = (f"mean confidence {mean:.3f}, {share:.1%} of the target's vertices uncertain "
               f"({int(uncertain.sum())} of {conf.size}, confidence under {UNCERTAIN_BELOW})")
    if share > FAIL_SHARE:
        return Outcome("failure", mean, uncertain, f"no reliable match: {numbers}")
    if share > WARN_SHARE:
        return Outcome("warning", mean, uncertain,
                       f"uncertain match: {numbers}; they are in the vertex group {UNCERTAIN_NAME!r}")
    return Outcome("ok", mean, uncertain, numbers)


# --------------------------------------------------------------------------- writing


def _outputs(plan: Plan, out: job.JobOutput) -> list[Signal]:
    if plan.kind == "detail":
        if out.positions is None:
            raise ValueError("the detail job returned no positions")
        return [bridge.shape_key_output(DETAIL_NAME, out.positions)]
    outputs: list[Signal] = []
    suffix = PREVIEW_SUFFIX if plan.kind == "preview" else ""
    for sig in plan.inputs.signals:
        values = out.values.get(sig.name)
        if values is None:
            raise ValueError(f"the engine returned no result for {sig.name!r}")
        outputs.append(bridge.Layer(sig.name + suffix, sig.domain, sig.data_type).signal(values))
    if plan.kind == "transfer":
        if out.confidence is None:
            raise ValueError("the transfer returned no confidence")
        outputs.append(bridge.confidence_output(np.clip(out.confidence, 0.0, 1.0), name=CONFIDENCE_NAME))
    return outputs


def _uncertain_output(obj: bpy.types.Object, judged: Outcome) -> list[Signal]:
    """The uncertain vertices as a group; an empty one only to clear an earlier mark."""
    if judged.uncertain.any() or UNCERTAIN_NAME in written_on(obj).layers:
        weights = judged.uncertain.astype(np.float32)
        return [bridge.Layer(UNCERTAIN_NAME, "POINT", "VERTEX_GROUP").signal(weights)]
    return []


def _check_unchanged(plan: Plan) -> bpy.types.Object:
    obj = bpy.data.objects.get(plan.written_on)
    if obj is None or obj.type != 'MESH':
        raise ValueError(f"object {plan.written_on!r} is gone: nothing written")
    expected = plan.inputs.source if plan.kind == "preview" else plan.inputs.target
    assert expected is not None
    evaluated = plan.kind == "preview" and plan.request.as_shown
    now = bridge.read_mesh(obj, evaluated=evaluated, local=plan.request.local_space)
    if job.mesh_digest(now) != job.mesh_digest(expected):
        raise ValueError(f"object {plan.written_on!r} changed while Overtone was working: "
                         "nothing written, run again")
    if evaluated and len(cast(bpy.types.Mesh, obj.data).vertices) != len(expected.vertices):
        raise ValueError(f"source {plan.source!r} as shown has a different vertex count than its "
                         "mesh: turn off Source With Modifiers to preview onto it")
    return obj


def _write(plan: Plan, obj: bpy.types.Object, outputs: list[Signal],
           asked: dict[str, tuple[str, int]]) -> dict[str, str]:
    """Write through the re-run rule (:mod:`.records`), in one all-or-nothing
    call; returns result name -> name written. ``asked`` receives result ->
    the name it was meant to get, where that was not a layer Overtone wrote,
    and the most bytes Blender keeps in such a name."""
    request = plan.request
    if plan.kind == "preview":
        asked.update({o.name: (o.name, bridge.name_limit(o.data_type)) for o in outputs})
        return bridge.write_outputs(obj, outputs, replace=request.replace_existing)
    is_key = [o.data_type == "SHAPE_KEY" for o in outputs]
    rule = {"keep_earlier": request.keep_earlier, "replace_existing": request.replace_existing}
    layers = names_for(obj, plan.source, [o.name for o, k in zip(outputs, is_key) if not k], **rule)
    keys = names_for(obj, plan.source, [o.name for o, k in zip(outputs, is_key) if k], shape=True, **rule)
    renamed = [replace(o, name=(keys if k else layers).names[o.name]) for o, k in zip(outputs, is_key)]
    got = bridge.write_outputs(obj, renamed, replace=request.replace_existing,
                               refresh=layers.refresh | keys.refresh, local=request.local_space,
                               key_value=keys.key_value)
    written = {o.name: got[r.name] for o, r in zip(outputs, renamed)}
    earlier = written_on(obj)
    asked.update({o.name: (r.name, bridge.name_limit(o.data_type)) for o, r in zip(outputs, renamed)
                  if r.name not in earlier.layers and r.name not in earlier.shapes})
    record(obj, plan.source, {o.name: written[o.name] for o, k in zip(outputs, is_key) if not k})
    record(obj, plan.source, {o.name: written[o.name] for o, k in zip(outputs, is_key) if k}, shape=True)
    return written


def _renamed_notes(written: dict[str, str], asked: dict[str, tuple[str, int]]) -> list[str]:
    """Why a result did not get the name it was meant to get."""
    notes = []
    for result, (meant, limit) in asked.items():
        name = written[result]
        if name == meant:
            continue
        if len(meant.encode()) > limit:
            notes.append(f"{meant!r} is longer than the {limit} bytes Blender keeps in such a name: "
                         f"written as {name!r}")
        else:
            notes.append(f"the target keeps its own {meant!r}: the result is written as {name!r}")
    return notes


def finish(plan: Plan, out: job.JobOutput) -> dict[str, Any]:
    """Write a job's results onto the scene, all or nothing; return the report.

    A transfer or detail whose match fails (:func:`outcome`) writes nothing
    unless the request says to write anyway; an uncertain one writes, marks
    the uncertain vertices and says so in ``report["warnings"]``.

    Raises
    ------
    ValueError
        The object is gone or its geometry changed since the plan was made, a
        result does not fit, or the match failed (nothing is written then).
    """
    obj = _check_unchanged(plan)
    warnings = list(plan.notes) + kind_note(out.report) + copy_note(plan, out.report)
    pieces = ("", False)
    if plan.kind != "preview" and plan.inputs.target is not None:
        pieces = pieces_line(out.report, plan.inputs.source.vertices, plan.inputs.target.vertices)
        if pieces[1]:
            warnings.append(pieces[0])
    outputs = _outputs(plan, out)
    judged = None
    if plan.kind != "preview" and out.confidence is not None:
        judged = outcome(out.confidence)
        if judged.level == "failure" and not plan.request.write_anyway:
            raise ValueError(f"{judged.text}. {plan.target!r} is left as it was (tick Write Anyway "
                             "to write the result)" + "".join(f"; {n}" for n in warnings))
        if judged.level == "failure":
            warnings.append(f"{judged.text}; written anyway, the uncertain vertices are in the "
                            f"vertex group {UNCERTAIN_NAME!r}")
        elif judged.level == "warning":
            warnings.append(judged.text)
        outputs += _uncertain_output(obj, judged)
    asked: dict[str, tuple[str, int]] = {}
    written = _write(plan, obj, outputs, asked)
    report = dict(out.report)
    report["written"] = written
    report["object"] = plan.written_on
    report["warnings"] = warnings
    report["notes"] = list(plan.remarks) + _renamed_notes(written, asked)
    if judged is not None:
        report["outcome"] = judged.level
        report["uncertain_vertices"] = int(judged.uncertain.sum())
        report["uncertain_below"] = UNCERTAIN_BELOW
        report["uncertain_share"] = float(judged.uncertain.mean()) if judged.uncertain.size else 0.0
    if plan.not_carried:
        report["skipped"] = {name: reason for name, reason in plan.not_carried}
    note = material_note(obj, written, out)
    if note:
        report["materials"] = note
        report["warnings"].append(note)
    if pieces[0]:
        report["pieces_line"] = pieces[0]
    report["summary"] = _summary(plan, report)
    return report


def handle_note(report: dict[str, Any]) -> list[str]:
    """A warning when meshes matched by shape differ in handles (a sphere and a
    ring): no map between them is right everywhere, however sure it says it is."""
    counts = report.get("handles") or {}
    source, target = counts.get("source"), counts.get("target")
    if source is None or target is None or source == target:
        return []
    return [f"the source has {source} and the target {target} handles (holes through the surface, as "
            "in a ring): matched by shape, such meshes cannot correspond everywhere, whatever the "
            "confidence says; check the result"]


def kind_note(report: dict[str, Any]) -> list[str]:
    """A warning when the engine finds the two surfaces probably not the same kind of object
    (their local shapes disagree almost everywhere: a ball and a ring, a ball and a sheet),
    with the handle counts when they differ; else :func:`handle_note`."""
    confidence = (report.get("correspondence") or {}).get("confidence") or {}
    if not confidence.get("different_kind"):
        return handle_note(report)
    counts = report.get("handles") or {}
    source, target = counts.get("source"), counts.get("target")
    handles = (f" (the source has {source} and the target {target} handles, holes through the surface "
               "as in a ring)") if source is not None and target is not None and source != target else ""
    return [f"the two meshes are probably not the same kind of object{handles}: their surfaces differ "
            "in shape almost everywhere, not only in pose or detail, so they cannot correspond "
            "everywhere, whatever the confidence says; check the result"]


def piece_words(entry: dict[str, Any], vertices: NDArray[np.floating[Any]]) -> str:
    """A piece as an artist finds it: its size, where it sits on the mesh and its first vertex."""
    lo, hi = vertices.min(axis=0), vertices.max(axis=0)
    offset = (np.asarray(entry.get("centre", (lo + hi) / 2), dtype=np.float64) - (lo + hi) / 2) \
        / np.maximum(hi - lo, 1e-12)
    sides = [pair[int(value > 0)] for value, pair in zip(offset, (("-X", "+X"), ("front", "back"), ("bottom", "top")))
             if abs(value) > 1 / 6]
    where = f" toward {', '.join(sides)}" if sides else " in the middle"
    return f"the piece of {entry['vertices']} vertices{where} (vertex {entry['first_vertex']})"


PIECE_LIST = 3
"""Pieces named one by one in a line; more are counted."""


def _named(entries: list[dict[str, Any]], vertices: NDArray[np.floating[Any]]) -> str:
    words = [piece_words(e, vertices) for e in entries[:PIECE_LIST]]
    more = len(entries) - PIECE_LIST
    return "; ".join(words) + (f" and {more} more" if more > 0 else "")


def pieces_line(report: dict[str, Any], source: NDArray[np.floating[Any]],
                target: NDArray[np.floating[Any]]) -> tuple[str, bool]:
    """(one line on the pieces of a carry, whether it is a warning); ("", False) for one piece each.

    Names the target pieces that found no counterpart on the source (a guess, confidence
    0), those matched with low confidence (under :data:`UNCERTAIN_BELOW`) and the source
    pieces nobody took; ``source`` and ``target`` are the vertices the engine matched."""
    pieces = (report.get("correspondence") or {}).get("pieces")
    if not isinstance(pieces, dict):
        return "", False
    count = int(pieces.get("target_pieces", 0))
    lost = list(pieces.get("unmatched_target", ()))
    weak = [e for e in pieces.get("target", ()) if e.get("counterpart") is not None and e.get("piece")
            and float(e.get("confidence", 1.0)) < UNCERTAIN_BELOW]
    unused = list(pieces.get("unused_source", ()))
    parts = []
    if lost:
        parts.append(f"{len(lost)} of {count} pieces found no counterpart on the source, their values are a "
                     f"guess: {_named(lost, target)}")
    if weak:
        parts.append(f"{len(weak)} of {count} pieces matched with low confidence: {_named(weak, target)}")
    if lost or weak:
        parts.append(f"their vertices are in the vertex group {UNCERTAIN_NAME!r}")
    if unused:
        parts.append(f"{len(unused)} source piece{'s' if len(unused) != 1 else ''} went nowhere: "
                     f"{_named(unused, source)}")
    if not parts:
        return f"{count} piece{'s' if count != 1 else ''}: each found its counterpart on the source", False
    return "; ".join(parts), bool(lost or weak)


def copy_note(plan: Plan, report: dict[str, Any]) -> list[str]:
    """A warning when a placed copy (:func:`is_placed_copy`) was matched by shape on its own."""
    if not plan.placed_copy or report.get("mode") != "intrinsic" or plan.request.settings.match != "auto":
        return []
    return [f"{plan.target!r} looks like a copy of {plan.source!r} placed elsewhere (the same size "
            "and shape before each object's move, turn and scale): matched by shape, such a copy can "
            "come out mirrored or upside down however sure the match says it is; tick Ignore "
            "Placement to match them in place"]


def material_note(obj: bpy.types.Object, written: dict[str, str], out: job.JobOutput) -> str:
    """A warning when carried material indices name slots the target does not have."""
    if written.get("material_index") != "material_index" or "material_index" not in out.values:
        return ""
    highest = int(np.max(out.values["material_index"], initial=0))
    slots = len(cast(bpy.types.Mesh, obj.data).materials)
    if highest < max(slots, 1):
        return ""
    return (f"material indices go up to {highest} but {obj.name!r} has {slots} material slots: "
            "give it the source's materials (Link Materials, Ctrl L)")


def message_of(report: dict[str, Any]) -> tuple[set[str], str]:
    """The operator's report level and line for a finished run (its summary and how
    the meshes were matched): a warning, with every warning, when there is one;
    otherwise information. Notes (a result under another name than its own, and
    why) follow either."""
    warnings = [str(w) for w in report.get("warnings", ())]
    mode = MODE_WORDS.get(str(report.get("mode")))
    text = "; ".join([str(report.get("summary", "done")), *([mode] if mode else []), *warnings,
                      *(str(n) for n in report.get("notes", ()))])
    return ({'WARNING'} if warnings else {'INFO'}), text


MODE_WORDS = {"aligned": "matched by position", "intrinsic": "matched by shape"}
"""How a run's matching mode reads in the report."""


def _summary(plan: Plan, report: dict[str, Any]) -> str:
    if plan.kind == "preview":
        count = len(report.get("signals", {}))
        return (f"previewed {count} layer{'s' if count != 1 else ''} on {plan.source!r}, "
                f"written beside them as <name>{PREVIEW_SUFFIX}")
    conf = report.get("mean_confidence")
    conf_text = f"{conf:.2f}" if isinstance(conf, float) else "?"
    what = "detail" if plan.kind == "detail" else f"{len(plan.inputs.signals)} layers"
    skipped = f"; not carried: {', '.join(name for name, _ in plan.not_carried)}" if plan.not_carried else ""
    return f"carried {what} from {plan.source!r} to {plan.target!r} (mean confidence {conf_text}){skipped}"


# --------------------------------------------------------------------------- running


def _unseen(step: Any) -> None:
    return None


def run_plan(plan: Plan, show: Writer | TextIO | None = None) -> dict[str, Any]:
    """Run a plan in this process (background mode, batch, Blender without a
    window) and write its results; its stages go to ``show`` (a writer of the
    engine's steps, or a stream for the command line's lines)."""
    started = time.perf_counter()
    with showing(show or _unseen, job_stages(plan.kind)):
        out = job.run_job(plan.inputs)
        stage(WRITING)
        report = finish(plan, out)
    report.setdefault("timings", {})["wall"] = round(time.perf_counter() - started, 4)
    return report


class BackgroundRun:
    """A plan running in the worker process; the modal operator polls it.

    Parameters
    ----------
    plan : Plan
    """

    def __init__(self, plan: Plan) -> None:
        self.plan = plan
        self.started = time.perf_counter()
        self.folder = Path(tempfile.mkdtemp(prefix="overtone-job-"))
        self.worker = shared_worker()
        try:
            save_input(self.folder, plan.inputs)
            self.worker.submit(self.folder)
        except BaseException:
            shutil.rmtree(self.folder, ignore_errors=True)
            raise

    def poll(self) -> Status:
        """Where the job stands (reads small files; never blocks)."""
        return self.worker.poll()

    def cancel(self) -> None:
        """Stop the worker; nothing is written."""
        self.worker.cancel()
        shutil.rmtree(self.folder, ignore_errors=True)

    def finish(self) -> dict[str, Any]:
        """Write the finished job's results; raises ValueError if it failed."""
        try:
            status = self.poll()
            if status.state != "done":
                raise ValueError(status.text)
            report = finish(self.plan, load_output(self.folder))
            report.setdefault("timings", {})["wall"] = round(time.perf_counter() - self.started, 4)
            return report
        finally:
            if self.worker.folder == self.folder:
                self.worker.folder = None
            shutil.rmtree(self.folder, ignore_errors=True)


def transfer_pair(source: bpy.types.Object, target: bpy.types.Object,
                  request: PairRequest, show: Writer | TextIO | None = None) -> dict[str, Any]:
    """Carry the requested signals and, with ``request.detail``, the detail from
    ``source`` to ``target``, in this process.

    Both jobs run before anything is written; their stages go to ``show`` as
    one plan (as :func:`run_plan`). Returns the JSON-able report (``written``
    maps each result to the name it got; a detail run adds ``detail``).
    """
    plans = []
    if request.signals or not request.detail:
        plans.append(make_plan("transfer", source, target, replace(request, detail=False)))
    if request.detail:
        plans.append(make_plan("detail", source, target, request))
    started = time.perf_counter()
    with showing(show or _unseen, job_stages(*(plan.kind for plan in plans))):
        outs = [job.run_job(plan.inputs) for plan in plans]
        stage(WRITING)
        reports = [finish(plan, out) for plan, out in zip(plans, outs)]
    report = reports[0]
    if len(reports) == 2:
        report = {**reports[0], "detail": reports[1].get("detail"),
                  "written": {**reports[0]["written"], **reports[1]["written"]},
                  "summary": reports[0]["summary"] + "; and the detail"}
    report.setdefault("timings", {})["wall"] = round(time.perf_counter() - started, 4)
    return report
