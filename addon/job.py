"""One unit of engine work, as the engine's own types in and arrays out (no ``bpy`` here).

The operators, the batch runner and the background worker process all end in
:func:`run_job`. A :class:`JobInput` holds everything read from Blender: the
two meshes as :class:`engine.MeshData` (world space), the source's signals as
:class:`engine.Signal`, the landmark group weights and the engine's own
:class:`engine.Settings`. A :class:`JobOutput` holds everything to write back.
The worker carries both through a folder (:mod:`.worker`, its file protocol).

Matched pairs are kept in memory between jobs (:data:`PAIRS`), so a re-run on
the same meshes skips the matching; the disk cache is pruned after each job.

Corner-domain colours keep their seams: see ``engine/carrying/corners.py``.
"""

from __future__ import annotations

import time
from collections import OrderedDict
from dataclasses import dataclass, field, replace
from typing import TYPE_CHECKING, Any

import numpy as np

from .engine import (Cache, FaceHits, MeshData, Pair, Settings, Shape, Signal, approximate_signals,
                     carry_charted, carry_faces, check_signal, faces_under_centres, geometry_key,
                     vertex_average, weighted_centre_vertex)
from .engine.common.progress import (CARRYING, DETAIL, MATCHING_STAGES, READING, SMOOTHING, STANDIN_STAGES, skip,
                                     stage)
from .engine.matching.standin import STANDIN_ABOVE
from .threads import limited_threads

if TYPE_CHECKING:
    from numpy.typing import NDArray

__all__ = ["JOB_KINDS", "JobInput", "JobOutput", "KeptPairs", "PAIRS", "run_job",
           "carry_by_face", "unit_rotations",
           "forget_pairs", "mesh_digest", "prune_cache", "CORNER_INSET"]

JOB_KINDS = ("transfer", "detail", "preview")
CORNER_INSET = 0.25


def mesh_digest(mesh: MeshData) -> str:
    """Hash of a mesh's geometry (positions, corners, sizes, given triangles): same hash, same mesh."""
    given = mesh.given_triangles() or ()
    return str(geometry_key(mesh.vertices, mesh.corners, mesh.sizes, *given))


@dataclass(frozen=True)
class JobInput:
    """Everything one job needs, read from Blender.

    Attributes
    ----------
    kind : {"transfer", "detail", "preview"}
    source, target : engine.MeshData
        World-space geometry; the target is None for a preview.
    signals : tuple of engine.Signal
        The source signals to carry (each with its domain and data type).
    landmark_groups : dict name -> (source weights (n_s,), target weights (n_t,))
    settings : engine.Settings
        Without landmarks: those come from ``landmark_groups``.
    names : (str, str)
        The source's and target's names, for messages.
    cache_folder : str or None
    cache_limit_bytes : int
    """

    kind: str
    source: MeshData
    target: MeshData | None
    signals: tuple[Signal, ...] = ()
    landmark_groups: dict[str, tuple[NDArray[np.float32], NDArray[np.float32]]] = field(
        default_factory=dict)
    settings: Settings = field(default_factory=Settings)
    names: tuple[str, str] = ("source", "target")
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


class KeptPairs:
    """The last few matched pairs, least recently used dropped first.

    A 30k-vertex pair with its bases takes about 100 MB, so few are kept.
    """

    def __init__(self, size: int = 2) -> None:
        self.size = size
        self.pairs: OrderedDict[tuple[Any, ...], Pair] = OrderedDict()

    def get(self, key: tuple[Any, ...]) -> Pair | None:
        """The pair kept under ``key`` (now the most recently used), or None."""
        pair = self.pairs.get(key)
        if pair is not None:
            self.pairs.move_to_end(key)
        return pair

    def put(self, key: tuple[Any, ...], pair: Pair) -> None:
        """Keep ``pair``; drop the least recently used beyond the size."""
        self.pairs[key] = pair
        self.pairs.move_to_end(key)
        while len(self.pairs) > self.size:
            self.pairs.popitem(last=False)

    def clear(self) -> None:
        self.pairs.clear()


PAIRS = KeptPairs()
"""The pairs this process keeps (the add-on's, or the worker's)."""


def forget_pairs() -> None:
    """Drop the pairs kept in memory (the disk cache stays)."""
    PAIRS.clear()


def prune_cache(folder: str | None, limit_bytes: int) -> dict[str, Any]:
    """Prune the disk cache to ``limit_bytes``; the report entries (empty without a folder)."""
    if not folder:
        return {}
    cache = Cache(folder)
    pruned = cache.prune(max(limit_bytes, 0))
    return {"cache_pruned": pruned, "cache_bytes": cache.size_bytes()}


def _shape(mesh: MeshData, name: str, cache: str | None) -> Shape:
    try:
        return Shape(mesh.vertices, corners=mesh.corners, sizes=mesh.sizes, cache=cache,
                     triangles=mesh.given_triangles())
    except ValueError as error:
        raise ValueError(f"{name!r}: {error}") from None


def _pair(inp: JobInput, settings: Settings) -> tuple[Pair, str]:
    assert inp.target is not None
    key = (mesh_digest(inp.source), mesh_digest(inp.target), settings)
    kept = PAIRS.get(key)
    # the stages this run passes are known before the first is shown: no matching for a kept
    # pair, no simplified copies for meshes small enough (cleaning only removes vertices)
    if kept is not None:
        skip(*MATCHING_STAGES)
    elif max(len(inp.source.vertices), len(inp.target.vertices)) <= STANDIN_ABOVE:
        skip(*STANDIN_STAGES)
    stage(READING)
    if kept is not None:
        kept.reuse()   # the report then gives this run's own times and cache use
        return kept, "memory"
    source = _shape(inp.source, inp.names[0], inp.cache_folder)
    target = _shape(inp.target, inp.names[1], inp.cache_folder)
    pair = Pair(source, target, settings)   # announces the stages of matching
    PAIRS.put(key, pair)
    return pair, "new"


def _landmarks(inp: JobInput) -> tuple[tuple[tuple[int, int], ...], list[str], list[str]]:
    assert inp.target is not None
    pairs, used, skipped = [], [], []
    for name, (ws, wt) in sorted(inp.landmark_groups.items()):
        if not (np.asarray(ws).sum() > 0 and np.asarray(wt).sum() > 0):
            skipped.append(name)
            continue
        pairs.append((weighted_centre_vertex(inp.source.vertices, ws),
                      weighted_centre_vertex(inp.target.vertices, wt)))
        used.append(name)
    return tuple(pairs), used, skipped


# --------------------------------------------------------------------------- jobs


@limited_threads()
def run_job(inp: JobInput) -> JobOutput:
    """Run one job through the engine, with the worker's BLAS thread rule
    (:func:`.threads.limited_threads`) in this process too.

    The job announces the engine's stages (``engine/common/progress.py``:
    reading, matching, carrying or smoothing), the ones it will not pass
    skipped before the first; they are shown inside a
    ``showing`` block its caller opens around the job and the writing of its
    results (the worker, :func:`.runs.run_plan`, :func:`.runs.transfer_pair`).

    Raises
    ------
    ValueError
        For bad input (named), or an engine failure on these meshes.
    """
    if inp.kind not in JOB_KINDS:
        raise ValueError(f"unknown job kind {inp.kind!r}; expected one of {', '.join(JOB_KINDS)}")
    if not isinstance(inp.settings, Settings):
        raise ValueError(f"bad settings: expected the engine's Settings, got {type(inp.settings).__name__}")
    started = time.perf_counter()
    out = _preview(inp) if inp.kind == "preview" else _transfer(inp)
    out.report.setdefault("timings", {})["total"] = round(time.perf_counter() - started, 4)
    out.report.update(prune_cache(inp.cache_folder, inp.cache_limit_bytes))
    return out


def _carry_signals(inp: JobInput, pair: Pair, basis: str
                   ) -> tuple[dict[str, NDArray[Any]], dict[str, Any]]:
    """Every signal's values on the target, and the pair's report with them."""
    assert inp.target is not None
    if not inp.signals:
        raise ValueError("no signals to carry")
    point = {s.name: (s.values, s.kind) for s in inp.signals if s.domain == "POINT"}
    results: dict[str, Any] = (pair.carry(point, basis=basis, weights=inp.settings.weight_options())
                               if point else {})
    values: dict[str, NDArray[Any]] = {}
    corner_report: dict[str, Any] = {}
    hits: list[FaceHits] = []  # where the target's faces land, found once when needed
    for sig in inp.signals:
        if sig.domain == "POINT":
            values[sig.name] = unit_rotations(results[sig.name].values, sig.data_type)
            continue
        values[sig.name], corner_report[sig.name] = carry_by_face(inp, pair, sig, basis, hits)
    report = pair.report(results)
    report.setdefault("signals", {}).update(corner_report)
    return values, report


def unit_rotations(values: NDArray[Any], data_type: str) -> NDArray[Any]:
    """Quaternions blended on a triangle, made unit length again (others unchanged)."""
    if data_type != "QUATERNION":
        return values
    rows = np.asarray(values, dtype=np.float64)
    norms = np.linalg.norm(rows, axis=1, keepdims=True)
    identity = np.array([1.0, 0.0, 0.0, 0.0])
    unit: NDArray[Any] = np.where(norms > 1e-12, rows / np.maximum(norms, 1e-12), identity)
    return unit


def carry_by_face(inp: JobInput, pair: Pair, sig: Signal, basis: str,
                  hits: list[FaceHits]) -> tuple[NDArray[Any], dict[str, Any]]:
    """One corner or face signal on the target, and its report entry.

    UV maps (2D corner values) are laid out per target face in one island
    (``engine/carrying/charts.py``); face values come from the source face
    under each target face's centre, never blended (``faces.py``); other
    corner values keep their seams (``corners.py``). ``hits`` caches where the
    target's face centres land (filled on first use).
    """
    assert inp.target is not None
    src, tgt = inp.source, inp.target
    if not hits and (sig.domain == "FACE" or sig.data_type == "FLOAT2"):
        hits.append(faces_under_centres(pair, tgt.corners, tgt.sizes))
    if sig.domain == "FACE":
        face_values = carry_faces(hits[0], sig.name, sig.values, len(src.sizes))
        return unit_rotations(face_values, sig.data_type), {
            "kind": sig.kind, "domain": "FACE", "route": "source face under each face centre",
            "source_error": 0.0}
    if sig.data_type == "FLOAT2":
        charted = carry_charted(pair, sig.name, sig.values, src.corners, src.sizes, tgt.corners, tgt.sizes,
                                hits[0])
        return charted.values, {"kind": sig.kind, "domain": "CORNER", "route": "UV islands",
                                "source_error": 0.0}
    carried = pair.carry_corners(sig.name, sig.values, sig.kind, (src.corners, src.sizes),
                                 (tgt.corners, tgt.sizes), basis=basis, inset=CORNER_INSET)
    return carried.values, {"kind": sig.kind, "domain": "CORNER", "source_error": carried.source_error}


def _transfer(inp: JobInput) -> JobOutput:
    if inp.target is None:
        raise ValueError("a transfer needs a target mesh")
    landmarks, used, skipped = _landmarks(inp)
    settings = replace(inp.settings, landmarks=landmarks)
    # the correspondence and kept transfers depend on these; detail options and
    # the basis are passed per call
    keyed = replace(settings, basis="pointwise", detail_strength=1.0, detail_size=0.05,
                    max_influences=0, weight_threshold=0.0, keep_weight_totals=True)
    pair, held = _pair(inp, keyed)
    values: dict[str, NDArray[Any]] = {}
    positions = None
    if inp.kind == "detail":
        stage(DETAIL)
        positions = pair.detail(strength=settings.detail_strength, size=settings.detail_size,
                                original=inp.target.vertices)
        report = pair.report()
        moved = np.linalg.norm(positions - inp.target.vertices, axis=1)
        report["detail"] = {"strength": settings.detail_strength, "size": settings.detail_size,
                            "mean_offset": float(moved.mean()), "max_offset": float(moved.max())}
    else:
        stage(CARRYING)
        values, report = _carry_signals(inp, pair, settings.basis)
    report["pair"] = held
    if report.get("mode") == "intrinsic":   # matched by shape: the surfaces' kinds must agree
        report["handles"] = {"source": pair.source.prepared.handles, "target": pair.target.prepared.handles}
    report["landmarks"] = {"groups": used, "skipped_empty": skipped,
                           "pairs": [list(p) for p in landmarks]}
    report["basis"] = settings.basis
    return JobOutput(values, np.asarray(pair.confidence, dtype=np.float64), positions, report)


def _preview(inp: JobInput) -> JobOutput:
    if not inp.signals:
        raise ValueError("no signals to preview")
    settings = inp.settings
    if settings.basis == "pointwise":
        raise ValueError("point to point carries every signal as it is: choose a basis to preview")
    stage(READING)
    shape = _shape(inp.source, inp.names[0], inp.cache_folder)
    signals = {}
    for sig in inp.signals:
        if sig.domain == "FACE" or sig.data_type == "FLOAT2" and sig.domain == "CORNER":
            continue  # face values and UV maps are never filtered: shown as they are
        raw = (vertex_average(sig.values, inp.source.corners, shape.n_original)
               if sig.domain == "CORNER" else sig.values)
        checked = check_signal(sig.name, raw, shape.n_original, sig.kind)
        signals[sig.name] = Signal(sig.name, sig.kind, checked, checked.dtype)
    stage(SMOOTHING)
    k = settings.k if settings.basis == "laplacian" else settings.K
    preview = approximate_signals(shape, signals, basis=settings.basis, k=k, order=settings.order)
    values: dict[str, NDArray[Any]] = {}
    for sig in inp.signals:
        if sig.name not in preview.values:
            values[sig.name] = np.asarray(sig.values)
            continue
        v = np.asarray(preview.values[sig.name])
        values[sig.name] = v[inp.source.corners] if sig.domain == "CORNER" else v
    report: dict[str, Any] = {
        "basis": settings.basis, "description": preview.description, "size": preview.size,
        "signals": {name: {"source_error": float(err)} for name, err in preview.errors.items()},
        "cache_hits": {"source": dict(shape.hits)},
    }
    return JobOutput(values, None, None, report)
