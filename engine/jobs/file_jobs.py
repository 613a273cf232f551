"""File-in, file-out jobs: the transfer and detail runs behind ``python -m engine``.

One pair per call, no shared state, so a studio can map them over many pairs
on any job runner. Every job follows the same order:

1. :func:`check_paths`: every output resolves (links and ``..`` followed) to
   a file that is neither an input nor another output, is not a folder, and
   sits in an existing, writable folder; temporary files that killed runs
   left in the output folders are removed. Nothing is computed before this.
2. Read the meshes, move them into a common unit frame (:func:`unit_frame`:
   centred, largest half-extent 1) so results do not depend on units and any
   finite coordinate scale works.
3. Compute; then write every output through one :func:`atomic_writes`, so a
   failed run leaves no output at all and a finished one leaves all of them.
"""

from __future__ import annotations

import json
import os
import time
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ..common.atomic import atomic_writes, remove_leftovers
from ..common.cache import Cache
from ..common.progress import CARRYING, DETAIL, READING, WRITING, stage
from ..intake.files import MeshData, ply_chunks, read_mesh
from ..spectra.shape import Shape
from .pair import Pair, Settings, load_landmarks

__all__ = ["JobFiles", "JobOptions", "check_paths", "unit_frame", "surface_points", "read_shape", "run_transfer_job",
           "run_detail_job", "report_text"]

PathLike = str | os.PathLike[str]
_FAR = 1e100  # unit-frame coordinates are clipped here (vertices far outside the surface only;
             # squared distances to them stay finite)
# A mesh whose faces vanish in the pair's common frame and that spans less than
# this fraction of it is named as too small beside the other (only the message
# depends on it: such a mesh is refused either way).
_TOO_SMALL = 1e-6


@dataclass(frozen=True)
class JobFiles:
    """The files of one pair job: inputs, outputs and the cache folder."""

    source: PathLike
    target: PathLike
    output: PathLike
    report: PathLike | None = None
    landmarks: PathLike | None = None
    cache: PathLike | None = None

    def inputs(self) -> list[PathLike]:
        return [p for p in (self.source, self.target, self.landmarks) if p is not None]

    def outputs(self) -> list[PathLike]:
        return [p for p in (self.output, self.report) if p is not None]


@dataclass(frozen=True)
class JobOptions:
    """What a pair job carries and how; None takes the engine's default (:class:`Settings`)."""

    attributes: Sequence[str] | None = None
    basis: str | None = None
    match: str | None = None
    k: int | None = None
    order: int | None = None
    strength: float | None = None
    size: float | None = None


def _same_file(a: str, b: str) -> bool:
    if a == b:
        return True
    try:
        return os.path.samefile(a, b)  # hard links
    except OSError:
        return False


def check_paths(inputs: Sequence[PathLike], outputs: Sequence[PathLike]) -> None:
    """Refuse outputs that would overwrite an input or each other; ValueError naming them.

    Each output must resolve (symbolic links and ``..`` followed) to a file
    other than every input and every other output, must not be a folder, and
    its folder must exist and be writable. Temporary files of killed runs in
    the output folders are removed.
    """
    resolved_in = [(os.fspath(p), os.path.realpath(p)) for p in inputs]
    seen: list[tuple[str, str]] = []
    for out in outputs:
        name, real = os.fspath(out), os.path.realpath(out)
        for other, other_real in resolved_in:
            if _same_file(real, other_real):
                raise ValueError(f"output {name!r} is the input {other!r}; refusing to overwrite an input")
        for other, other_real in seen:
            if _same_file(real, other_real):
                raise ValueError(f"outputs {other!r} and {name!r} are the same file")
        if os.path.isdir(real):
            raise ValueError(f"output {name!r} is a folder; give a file name")
        folder = os.path.dirname(real)
        if not os.path.isdir(folder):
            raise ValueError(f"output folder {os.path.dirname(name) or '.'!r} does not exist")
        if not os.access(folder, os.W_OK):
            raise ValueError(f"output folder {os.path.dirname(name) or '.'!r} is not writable")
        seen.append((name, real))
    for folder in {os.path.dirname(real) for _, real in seen}:
        remove_leftovers(folder)


def unit_frame(*vertex_sets: NDArray[Any]) -> tuple[NDArray[Any], float]:
    """Centre and scale that map all the given points into [-1, 1]^3.

    Returns
    -------
    centre : (3,) float64
        The middle of the joint bounding box (``lo / 2 + hi / 2``, which
        cannot overflow).
    scale : float
        The largest distance of a coordinate from the centre (1.0 for a
        single point), so ``(v - centre) / scale`` lies in [-1, 1].
    """
    lo = np.min([np.min(v, axis=0) for v in vertex_sets if len(v)], axis=0)
    hi = np.max([np.max(v, axis=0) for v in vertex_sets if len(v)], axis=0)
    centre = lo / 2 + hi / 2
    scale = float(max(np.max(hi / 2 - lo / 2), 0.0))
    if not (np.isfinite(scale) and scale > 0):
        scale = 1.0
    return centre, scale


def surface_points(data: MeshData) -> NDArray[Any]:
    """The vertices that polygons use (all of them for a mesh without polygons).

    The unit frame is taken from these, so a stray vertex far away cannot make
    the surface vanishingly small in it.
    """
    if data.corners.size == 0:
        return data.vertices
    corners, n = data.corners, len(data.vertices)
    if np.issubdtype(corners.dtype, np.integer) and corners.min() >= 0 and corners.max() < n:
        used: NDArray[Any] = data.vertices[np.flatnonzero(np.bincount(corners, minlength=n))]
    else:  # left to the validation to name the problem
        used = data.vertices[np.unique(corners)]
    return used


def read_shape(data: MeshData, cache: Cache | None, frame: tuple[NDArray[Any], float]) -> Shape:
    """The :class:`Shape` of a read mesh in the unit frame ``(centre, scale)``."""
    centre, scale = frame
    with np.errstate(over="ignore"):  # only vertices outside the surface can leave the range
        vertices = np.clip((data.vertices - centre) / scale, -_FAR, _FAR)
    return Shape(vertices, corners=data.corners, sizes=data.sizes,  # type: ignore[no-untyped-call, unused-ignore]
                 cache=cache)


def _shape_in_frame(path: PathLike, data: MeshData, cache: Cache | None,
                    frame: tuple[NDArray[Any], float]) -> Shape:
    """:func:`read_shape`, naming the cause when a mesh is too small beside the other to keep its faces."""
    try:
        return read_shape(data, cache, frame)
    except ValueError as exc:
        points = surface_points(data)
        relative = float(np.max(np.ptp(points, axis=0))) / (2 * frame[1]) if len(points) else 0.0
        if relative < _TOO_SMALL:
            raise ValueError(f"{os.fspath(path)}: about {relative:.0e} times the size of the other mesh, too small "
                             f"beside it to keep its faces; bring the two meshes to a similar size") from exc
        raise


def _open_pair(files: JobFiles) -> tuple[MeshData, Shape, MeshData, Shape, tuple[NDArray[Any], float]]:
    check_paths(files.inputs(), files.outputs())
    stage(READING)
    src_data, tgt_data = read_mesh(files.source), read_mesh(files.target)
    cache = Cache(files.cache) if files.cache else None
    frame = unit_frame(surface_points(src_data), surface_points(tgt_data))
    return (src_data, _shape_in_frame(files.source, src_data, cache, frame),
            tgt_data, _shape_in_frame(files.target, tgt_data, cache, frame), frame)


def _settings(files: JobFiles, source: Shape, target: Shape, **options: Any) -> Settings:
    lm = load_landmarks(files.landmarks, source.n_original, target.n_original) if files.landmarks else ()
    return Settings(landmarks=lm, **{k: v for k, v in options.items() if v is not None})


def _finite_or_none(x: float) -> float | None:
    return x if np.isfinite(x) else None


def report_text(report: dict[str, Any]) -> str:
    """The report as JSON text; non-finite numbers were already replaced by null."""
    return json.dumps(report, indent=2, allow_nan=False)


def _finish(files: JobFiles, mesh: tuple[NDArray[Any], MeshData, dict[str, Any]], report: dict[str, Any],
            started: float) -> dict[str, Any]:
    """Write the output mesh (and the report) together; nothing is left if either fails."""
    vertices, data, props = mesh
    report["files"] = {"source": os.fspath(files.source), "target": os.fspath(files.target),
                       "output": os.fspath(files.output)}
    report["timings"]["total"] = round(time.perf_counter() - started, 4)
    stage(WRITING)
    chunks = ply_chunks(vertices, corners=data.corners, sizes=data.sizes, properties=props)
    text = report_text(report) if files.report else ""
    with atomic_writes() as staging:
        with staging.open(files.output) as fh:
            for chunk in chunks:
                fh.write(chunk)
        if files.report:
            with staging.open(files.report, text=True) as fh:
                fh.write(text)
    return report


def run_transfer_job(files: JobFiles, options: JobOptions = JobOptions()) -> dict[str, Any]:
    """Carry a source file's vertex properties to a target file; write PLY (and a JSON report).

    The output holds the target's geometry and properties, every carried
    property under its source name and type, and a float ``confidence``.
    Nothing is written unless every step succeeded.
    """
    from ..carrying.signals import signal_to_property, signals_from_properties

    t0 = time.perf_counter()
    src_data, source, tgt_data, target, _ = _open_pair(files)
    signals = signals_from_properties(src_data.properties, names=options.attributes)
    del src_data  # the source's file arrays: the shape and the signals hold what the job needs
    if not signals:
        raise ValueError(f"{Path(files.source).name}: the source has no vertex properties to carry "
                         "(only coordinates and normals)")
    if "confidence" in signals:
        raise ValueError("the source has a property named 'confidence', which the output reserves")
    settings = _settings(files, source, target, basis=options.basis, match=options.match, k=options.k,
                         order=options.order)
    pair = Pair(source, target, settings)   # announces the stages of matching
    stage(CARRYING)
    results = pair.carry({name: (sig.values, sig.kind) for name, sig in signals.items()})
    props = dict(tgt_data.properties)
    for name, sig in signals.items():
        props[name] = signal_to_property(sig, results[name].values)
    props["confidence"] = pair.confidence.astype(np.float32)
    return _finish(files, (tgt_data.vertices, tgt_data, props), pair.report(results), t0)


def run_detail_job(files: JobFiles, options: JobOptions = JobOptions()) -> dict[str, Any]:
    """Carry a source file's surface detail to a target file; write the target with new coordinates.

    Target vertices that belong to no face keep their positions.
    """
    t0 = time.perf_counter()
    src_data, source, tgt_data, target, (centre, scale) = _open_pair(files)
    del src_data  # the source's file arrays: its shape holds what the job needs
    settings = _settings(files, source, target, match=options.match, detail_strength=options.strength,
                         detail_size=options.size)
    pair = Pair(source, target, settings)
    stage(DETAIL)
    with np.errstate(over="ignore"):
        unit_original = np.clip((tgt_data.vertices - centre) / scale, -_FAR, _FAR)
    unit_positions = pair.detail(original=unit_original)
    on_surface = (target.prepared.to_clean >= 0)[:, None]
    positions = np.where(on_surface, unit_positions * scale + centre, tgt_data.vertices)
    if not np.isfinite(positions).all():
        raise ValueError("detail gives positions beyond the floating-point range; try a smaller --strength")
    report = pair.report()
    moved = np.linalg.norm(unit_positions - unit_original, axis=1)
    report["detail"] = {"strength": settings.detail_strength, "size": settings.detail_size,
                        "mean_offset": _finite_or_none(float(moved.mean()) * scale),
                        "max_offset": _finite_or_none(float(moved.max()) * scale)}
    return _finish(files, (positions, tgt_data, dict(tgt_data.properties)), report, t0)
