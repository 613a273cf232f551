"""One unit of engine work, as plain arrays in and arrays out (no ``bpy`` here).

The operators, the batch runner and the background worker process all end in
:func:`run_job`. A :class:`JobInput` holds everything read from Blender
(world-space geometry, signal values, landmark group weights, engine settings,
the cache folder); a :class:`JobOutput` holds everything to write back. Both
travel through a folder as ``job.json`` + ``arrays.npz`` so the same job can run
in this process or in the worker (:mod:`.worker`).

Corner-domain colours keep their seams
--------------------------------------
The engine carries per-vertex signals. A corner colour is first averaged per
source vertex and carried like any point signal; every target corner takes its
vertex's value. Where the target vertex lands on a source triangle that
touches a seam (a source vertex whose corners disagree), each target corner
is placed a quarter of the way into its own face, that point is mapped into
the source through the correspondence, its closest source triangle is found,
and the colour is interpolated from that triangle's own corners. Corners on
either side of a target seam so read from the source faces on their side.
For seamless data no triangle touches a seam and the result is exactly the
point transfer.
"""

from __future__ import annotations

import hashlib
import json
import os
import time
from collections import OrderedDict
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from .engine import pipeline
from .engine.cache import Cache as DiskCache
from .engine.corners import vertex_average
from .engine.preview import approximate_signals
from .engine.shape import Shape
from .engine.signals import Signal as EngineSignal
from .engine.signals import check_signal
from .worker import limited_threads

if TYPE_CHECKING:
    from numpy.typing import NDArray

__all__ = ["JOB_KINDS", "MeshInput", "SignalInput", "JobInput", "JobOutput", "Progress",
           "run_job", "save_input", "load_input", "save_output", "load_output",
           "forget_pairs", "CORNER_INSET"]

JOB_KINDS = ("transfer", "detail", "preview")
CORNER_INSET = 0.25
_PAIRS_KEPT = 2  # pairs kept in memory (a 30k pair with its bases: about 100 MB)

Progress = Callable[[float, str], None]


@dataclass(frozen=True)
class MeshInput:
    """One mesh: world-space positions and polygons as corners and sizes."""

    name: str
    positions: NDArray[np.float64]
    corner_verts: NDArray[np.int64]
    face_sizes: NDArray[np.int64]

    def digest(self) -> str:
        """sha1 of the geometry (positions, corners, sizes)."""
        h = hashlib.sha1()
        for a in (self.positions, self.corner_verts, self.face_sizes):
            c = np.ascontiguousarray(a)
            h.update(f"{c.dtype.str}{c.shape}".encode())
            h.update(c.tobytes())
        return h.hexdigest()


@dataclass(frozen=True)
class SignalInput:
    """One source signal: name, engine kind, Blender domain and data type, values."""

    name: str
    kind: str
    domain: str
    data_type: str
    values: NDArray[Any]


@dataclass(frozen=True)
class JobInput:
    """Everything one job needs, read from Blender.

    Attributes
    ----------
    kind : {"transfer", "detail", "preview"}
    source, target : MeshInput (target is None for a preview)
    signals : tuple of SignalInput
    landmark_groups : dict name -> (source weights (n_s,), target weights (n_t,))
    settings : dict
        Keyword arguments of ``engine.pipeline.Settings`` (without landmarks).
    cache_folder : str or None
    cache_limit_bytes : int
    """

    kind: str
    source: MeshInput
    target: MeshInput | None
    signals: tuple[SignalInput, ...] = ()
    landmark_groups: dict[str, tuple[NDArray[np.float32], NDArray[np.float32]]] = field(
        default_factory=dict)
    settings: dict[str, Any] = field(default_factory=dict)
    cache_folder: str | None = None
    cache_limit_bytes: int = 0


@dataclass(frozen=True)
class JobOutput:
    """What a job produced: per-signal values (in the signal's domain), the
    target's confidence, new target positions (detail), and the report."""

    values: dict[str, NDArray[Any]]
    confidence: NDArray[np.float64] | None
    positions: NDArray[np.float64] | None
    report: dict[str, Any]


# --------------------------------------------------------------------------- memory

_pairs: OrderedDict[tuple[Any, ...], Any] = OrderedDict()


def forget_pairs() -> None:
    """Drop the pairs kept in memory (the disk cache stays)."""
    _pairs.clear()


def _shape(mesh: MeshInput, cache: str | None) -> Any:
    try:
        return Shape(mesh.positions, corners=mesh.corner_verts, sizes=mesh.face_sizes, cache=cache)
    except ValueError as error:
        raise ValueError(f"{mesh.name!r}: {error}") from None


def _pair(inp: JobInput, settings: Any, progress: Progress) -> tuple[Any, str]:
    assert inp.target is not None
    key = (inp.source.digest(), inp.target.digest(), settings)
    if key in _pairs:
        _pairs.move_to_end(key)
        return _pairs[key], "memory"
    progress(0.1, "preparing meshes")
    source = _shape(inp.source, inp.cache_folder)
    target = _shape(inp.target, inp.cache_folder)
    progress(0.2, "matching the surfaces")
    pair = pipeline.Pair(source, target, settings)
    _pairs[key] = pair
    while len(_pairs) > _PAIRS_KEPT:
        _pairs.popitem(last=False)
    return pair, "new"


def _landmarks(inp: JobInput) -> tuple[tuple[tuple[int, int], ...], list[str], list[str]]:
    assert inp.target is not None
    pairs, used, skipped = [], [], []
    for name, (ws, wt) in sorted(inp.landmark_groups.items()):
        if not (np.asarray(ws).sum() > 0 and np.asarray(wt).sum() > 0):
            skipped.append(name)
            continue
        pairs.append((pipeline.weighted_centre_vertex(inp.source.positions, ws),
                      pipeline.weighted_centre_vertex(inp.target.positions, wt)))
        used.append(name)
    return tuple(pairs), used, skipped


def _engine_settings(inp: JobInput, landmarks: tuple[tuple[int, int], ...]) -> Any:
    try:
        return pipeline.Settings(landmarks=landmarks, **inp.settings)
    except (TypeError, ValueError) as error:
        raise ValueError(f"bad settings: {error}") from None


# --------------------------------------------------------------------------- jobs


def _nothing(fraction: float, text: str) -> None:
    return None


@limited_threads()
def run_job(inp: JobInput, progress: Progress | None = None) -> JobOutput:
    """Run one job through the engine, with the worker's BLAS thread rule
    (:func:`.worker.limited_threads`) in this process too.

    Raises
    ------
    ValueError
        For bad input (named), or an engine failure on these meshes.
    """
    report_progress = progress or _nothing
    if inp.kind not in JOB_KINDS:
        raise ValueError(f"unknown job kind {inp.kind!r}; expected one of {', '.join(JOB_KINDS)}")
    started = time.perf_counter()
    if inp.kind == "preview":
        out = _preview(inp, report_progress)
    else:
        out = _transfer(inp, report_progress)
    out.report.setdefault("timings", {})["total"] = round(time.perf_counter() - started, 4)
    if inp.cache_folder:
        cache = DiskCache(inp.cache_folder)
        out.report["cache_pruned"] = cache.prune(max(inp.cache_limit_bytes, 0))
        out.report["cache_bytes"] = cache.size_bytes()
    report_progress(1.0, "done")
    return out


def _transfer(inp: JobInput, progress: Progress) -> JobOutput:
    if inp.target is None:
        raise ValueError("a transfer needs a target mesh")
    landmarks, used, skipped = _landmarks(inp)
    settings = _engine_settings(inp, landmarks)
    basis = settings.basis
    # the correspondence and kept transfers depend on these; detail options and
    # the basis are passed per call
    keyed = replace(settings, basis="pointwise", detail_strength=1.0, detail_size=0.05)
    pair, held = _pair(inp, keyed, progress)
    values: dict[str, NDArray[Any]] = {}
    positions = None
    results: dict[str, Any] = {}
    if inp.kind == "detail":
        progress(0.7, "carrying detail")
        positions = pair.detail(strength=settings.detail_strength, size=settings.detail_size)
        report = pair.report()
        moved = np.linalg.norm(positions - inp.target.positions, axis=1)
        report["detail"] = {"strength": settings.detail_strength, "size": settings.detail_size,
                            "mean_offset": float(moved.mean()), "max_offset": float(moved.max())}
    else:
        if not inp.signals:
            raise ValueError("no signals to carry")
        point = {s.name: (s.values, s.kind) for s in inp.signals if s.domain == "POINT"}
        progress(0.7, f"carrying {len(inp.signals)} signals")
        if point:
            results.update(pair.carry(point, basis=basis))
        errors: dict[str, float] = {}
        for sig in inp.signals:
            if sig.domain == "CORNER":
                carried = pair.carry_corners(sig.name, sig.values, sig.kind, inp.source.corner_verts,
                                             inp.source.face_sizes, inp.target.corner_verts,
                                             inp.target.face_sizes, basis=basis, inset=CORNER_INSET)
                values[sig.name], errors[sig.name] = carried.values, carried.source_error
            else:
                values[sig.name] = results[sig.name].values
        report = pair.report(results)
        signals_report = report.setdefault("signals", {})
        for sig in inp.signals:
            if sig.domain == "CORNER":
                signals_report[sig.name] = {"kind": sig.kind, "domain": "CORNER",
                                            "source_error": errors[sig.name]}
    report["pair"] = held
    report["landmarks"] = {"groups": used, "skipped_empty": skipped,
                           "pairs": [list(p) for p in landmarks]}
    report["basis"] = basis
    return JobOutput(values, np.asarray(pair.confidence, dtype=np.float64), positions, report)


def _preview(inp: JobInput, progress: Progress) -> JobOutput:
    if not inp.signals:
        raise ValueError("no signals to preview")
    settings = _engine_settings(inp, ())
    if settings.basis == "pointwise":
        raise ValueError("point to point carries every signal as it is: choose a basis to preview")
    progress(0.1, "preparing the source")
    shape = _shape(inp.source, inp.cache_folder)
    signals = {}
    for sig in inp.signals:
        raw = (vertex_average(sig.values, inp.source.corner_verts, shape.n_original)
               if sig.domain == "CORNER" else sig.values)
        checked = check_signal(sig.name, raw, shape.n_original, sig.kind)
        signals[sig.name] = EngineSignal(sig.name, sig.kind, checked, checked.dtype)
    progress(0.3, "building the basis")
    k = settings.k if settings.basis == "laplacian" else settings.K
    preview = approximate_signals(shape, signals, basis=settings.basis, k=k, order=settings.order)
    values: dict[str, NDArray[Any]] = {}
    for sig in inp.signals:
        v = np.asarray(preview.values[sig.name])
        values[sig.name] = v[inp.source.corner_verts] if sig.domain == "CORNER" else v
    report: dict[str, Any] = {
        "basis": settings.basis, "description": preview.description, "size": preview.size,
        "signals": {name: {"source_error": float(err)} for name, err in preview.errors.items()},
        "cache_hits": {"source": dict(shape.hits)},
    }
    return JobOutput(values, None, None, report)


# --------------------------------------------------------------------------- files


def _mesh_meta(mesh: MeshInput, prefix: str, arrays: dict[str, Any]) -> dict[str, Any]:
    arrays[f"{prefix}_positions"] = mesh.positions
    arrays[f"{prefix}_corner_verts"] = mesh.corner_verts
    arrays[f"{prefix}_face_sizes"] = mesh.face_sizes
    return {"name": mesh.name}


def _write(folder: Path, meta: dict[str, Any], arrays: dict[str, Any], stem: str) -> None:
    folder.mkdir(parents=True, exist_ok=True)
    tmp = folder / f".{stem}.tmp.npz"
    np.savez(tmp, **arrays)
    os.replace(tmp, folder / f"{stem}.npz")
    text = folder / f".{stem}.tmp.json"
    text.write_text(json.dumps(meta), encoding="utf-8")
    os.replace(text, folder / f"{stem}.json")  # written last: its presence means complete


def save_input(folder: Path, inp: JobInput) -> None:
    """Write a job into ``folder`` (``input.npz`` then ``input.json``)."""
    arrays: dict[str, Any] = {}
    meta: dict[str, Any] = {
        "kind": inp.kind, "source": _mesh_meta(inp.source, "source", arrays),
        "target": _mesh_meta(inp.target, "target", arrays) if inp.target is not None else None,
        "signals": [], "landmark_groups": sorted(inp.landmark_groups), "settings": inp.settings,
        "cache_folder": inp.cache_folder, "cache_limit_bytes": inp.cache_limit_bytes,
    }
    for i, sig in enumerate(inp.signals):
        meta["signals"].append({"name": sig.name, "kind": sig.kind, "domain": sig.domain,
                                "data_type": sig.data_type})
        arrays[f"signal_{i}"] = sig.values
    for i, name in enumerate(meta["landmark_groups"]):
        arrays[f"group_source_{i}"], arrays[f"group_target_{i}"] = inp.landmark_groups[name]
    _write(folder, meta, arrays, "input")


def _mesh_from(meta: dict[str, Any], prefix: str, z: Any) -> MeshInput:
    return MeshInput(meta["name"], z[f"{prefix}_positions"], z[f"{prefix}_corner_verts"],
                     z[f"{prefix}_face_sizes"])


def load_input(folder: Path) -> JobInput:
    """Read a job written by :func:`save_input`."""
    meta = json.loads((folder / "input.json").read_text(encoding="utf-8"))
    with np.load(folder / "input.npz", allow_pickle=False) as z:
        signals = tuple(SignalInput(s["name"], s["kind"], s["domain"], s["data_type"], z[f"signal_{i}"])
                        for i, s in enumerate(meta["signals"]))
        groups = {name: (z[f"group_source_{i}"], z[f"group_target_{i}"])
                  for i, name in enumerate(meta["landmark_groups"])}
        return JobInput(meta["kind"], _mesh_from(meta["source"], "source", z),
                        _mesh_from(meta["target"], "target", z) if meta["target"] else None,
                        signals, groups, meta["settings"], meta["cache_folder"],
                        int(meta["cache_limit_bytes"]))


def save_output(folder: Path, out: JobOutput) -> None:
    """Write a job's result into ``folder`` (``output.npz`` then ``output.json``)."""
    names = sorted(out.values)
    arrays: dict[str, Any] = {f"value_{i}": out.values[name] for i, name in enumerate(names)}
    if out.confidence is not None:
        arrays["confidence"] = out.confidence
    if out.positions is not None:
        arrays["positions"] = out.positions
    _write(folder, {"names": names, "report": out.report}, arrays, "output")


def load_output(folder: Path) -> JobOutput:
    """Read a result written by :func:`save_output`."""
    meta = json.loads((folder / "output.json").read_text(encoding="utf-8"))
    with np.load(folder / "output.npz", allow_pickle=False) as z:
        values = {name: z[f"value_{i}"] for i, name in enumerate(meta["names"])}
        confidence = z["confidence"] if "confidence" in z.files else None
        positions = z["positions"] if "positions" in z.files else None
    return JobOutput(values, confidence, positions, meta["report"])
