"""One source/target pair, end to end: the engine's single way in for callers.

The add-on, the command line and batch jobs all go through :class:`Pair`:

    pair = Pair(source_shape, target_shape, settings)
    results = pair.carry({"tint": (values, "color"), "head": (weights, "weight")})
    positions = pair.detail()            # new target coordinates
    pair.report(results)                 # JSON-able

A Pair computes its correspondence once (and keeps it on disk when the shapes
have a cache), then every signal costs matrix products. :func:`run_transfer_job`
and :func:`run_detail_job` are the file-in, file-out jobs behind
``python -m engine transfer`` / ``detail``: one pair per call, no shared state,
so a studio can map them over many pairs on any job runner.
"""

from __future__ import annotations

import json
import os
import time
from dataclasses import asdict, dataclass, replace
from pathlib import Path

import numpy as np

from ..common.atomic import atomic_write
from ..matching.correspondence import MATCHES, Correspondence, correspond
from ..carrying.detail import apply_detail, smooth_base, split_detail
from ..common.cache import Cache, geometry_key
from ..spectra.shape import Shape
from ..carrying.signals import check_signal
from ..carrying.transfer import BASES, Transfer, TransferResult
from ..carrying.weights import WeightOptions, carry_weights

__all__ = ["Settings", "Pair", "weighted_centre_vertex", "load_landmarks", "run_transfer_job",
           "run_detail_job"]

CORRESPONDENCE_VERSION = 5   # 2: product-embedding step in the intrinsic map; 3: non-rigid ICP
                             # alignment; 4: spectral check in aligned mode where the surfaces differ;
                             # 5: nearest embedding rows from one fused product (near-ties may differ)


@dataclass(frozen=True)
class Settings:
    """Everything that decides a transfer's result (and its cache key).

    Attributes
    ----------
    match : {"auto", "aligned", "intrinsic"}
    basis : {"pointwise", "laplacian", "orthoproducts", "products"}
    k : int
        Eigenfunctions of the Laplacian basis.
    K : int or None
        Eigenfunctions multiplied in the product bases (None: from the
        vertex count).
    order : int
        Product order, 1 to 5.
    landmarks : tuple of (source_vertex, target_vertex)
        Original vertex indices known to correspond.
    detail_strength : float
        Scale of carried detail (1 = as on the source).
    detail_size : float
        Features shorter than this fraction of the square root of the
        source's area count as detail (0.05: a twentieth of the shape's size).
    max_influences, weight_threshold, keep_weight_totals
        How carried vertex groups are cleaned up on the target
        (:class:`engine.carrying.weights.WeightOptions`).
    """

    match: str = "auto"
    basis: str = "pointwise"
    k: int = 100
    K: int | None = None
    order: int = 3
    landmarks: tuple = ()
    detail_strength: float = 1.0
    detail_size: float = 0.05
    max_influences: int = 0
    weight_threshold: float = 0.0
    keep_weight_totals: bool = True

    def __post_init__(self):
        if self.match not in MATCHES:
            raise ValueError(f"unknown match {self.match!r}; expected one of {', '.join(MATCHES)}")
        if self.basis not in BASES:
            raise ValueError(f"unknown basis {self.basis!r}; expected one of {', '.join(BASES)}")
        if not 1 <= int(self.order) <= 5:
            raise ValueError(f"order must be between 1 and 5, got {self.order}")
        if int(self.k) < 1 or (self.K is not None and int(self.K) < 1):
            raise ValueError(f"k and K must be positive, got k={self.k}, K={self.K}")
        if not np.isfinite(self.detail_strength):
            raise ValueError(f"detail strength must be finite, got {self.detail_strength}")
        if not (np.isfinite(self.detail_size) and 0 < self.detail_size <= 1):
            raise ValueError(f"detail size must be in (0, 1] (a fraction of the shape's size), "
                             f"got {self.detail_size}")
        object.__setattr__(self, "landmarks", tuple((int(a), int(b)) for a, b in self.landmarks))
        self.weight_options()  # validates the weight options

    def weight_options(self) -> WeightOptions:
        """The options for carried vertex groups."""
        return WeightOptions(self.max_influences, self.weight_threshold, self.keep_weight_totals)

    def map_key(self) -> dict:
        """The settings the correspondence depends on."""
        return {"match": self.match, "landmarks": json.dumps([list(p) for p in self.landmarks]),
                "version": CORRESPONDENCE_VERSION}


class Pair:
    """A source and a target shape with one correspondence between them.

    Parameters
    ----------
    source, target : Shape
    settings : Settings, optional
    """

    def __init__(self, source: Shape, target: Shape, settings: Settings | None = None):
        self.source, self.target = source, target
        self.settings = settings or Settings()
        self.timings: dict = {}
        self.cache_hits: dict = {"correspondence": "computed"}
        t0 = time.perf_counter()
        self.correspondence = self._load_or_correspond()
        self.timings["correspondence"] = round(time.perf_counter() - t0, 4)
        self._transfers: dict = {}
        self.weights_report: dict | None = None

    # ----------------------------------------------------------------- map
    def _map_cache_key(self) -> str | None:
        cache = self.target.cache or self.source.cache
        if cache is None:
            return None
        return geometry_key(self.source.vertices, self.source.faces, self.target.vertices, self.target.faces,
                            what="correspondence", **self.settings.map_key())

    def _load_or_correspond(self) -> Correspondence:
        key = self._map_cache_key()
        cache = self.target.cache or self.source.cache
        if key is not None:
            n_t = self.target.n_vertices
            stored = cache.load(key, {"triangle": (n_t,), "barycentric": (n_t, 3), "confidence": (n_t,),
                                      "fmap": (None, None), "meta": ()})
            if stored is not None and _valid_map(stored, self.source, self.target):
                self.cache_hits["correspondence"] = "disk"
                meta = json.loads(str(stored["meta"]))
                return Correspondence(self.source, self.target, meta["mode"], meta["reason"],
                                      stored["triangle"].astype(np.int64), stored["barycentric"],
                                      stored["confidence"], stored["fmap"], meta["stats"])
        lm = list(self.settings.landmarks) or None
        corr = correspond(self.source, self.target, match=self.settings.match, landmarks=lm)
        if key is not None:
            meta = json.dumps({"mode": corr.mode, "reason": corr.reason, "stats": corr.stats})
            cache.save(key, {"triangle": corr.triangle, "barycentric": corr.barycentric,
                             "confidence": corr.confidence, "fmap": corr.fmap, "meta": np.array(meta)})
        return corr

    def reuse(self) -> None:
        """Start another run on this kept pair: timings and cache counts restart,
        and the correspondence counts as kept in memory (``"memory"``)."""
        self.timings = {}
        self.cache_hits = {"correspondence": "memory"}
        for shape in (self.source, self.target):
            shape.hits = dict.fromkeys(shape.hits, 0)

    @property
    def confidence(self) -> np.ndarray:
        """(n_target_original,) float in [0, 1]: how sure the map is at each target vertex."""
        return np.clip(self.target.restore(self.correspondence.confidence), 0.0, 1.0)

    # ----------------------------------------------------------------- signals
    def transfer_for(self, basis: str | None = None) -> Transfer:
        """The (kept) Transfer of this pair through ``basis`` (default: the settings')."""
        name = basis or self.settings.basis
        if name not in self._transfers:
            s = self.settings
            self._transfers[name] = Transfer(self.source, self.target, self.correspondence, basis=name,
                                             k=s.k, K=s.K, order=s.order)
        return self._transfers[name]

    def carry(self, signals: dict, *, basis: str | None = None,
              weights: WeightOptions | None = None) -> dict[str, TransferResult]:
        """Carry several signals through one correspondence.

        Parameters
        ----------
        signals : dict name -> (values, kind)
            ``values`` per original source vertex; ``kind`` one of
            ``engine.signals.KINDS``. All are validated before any is carried.
            Every signal of kind ``"weight"`` is carried together with the
            others as vertex groups (:func:`engine.carrying.weights.carry_weights`);
            what happened to them is in :attr:`weights_report`.
        basis : str, optional
            Overrides the settings' basis.
        weights : WeightOptions, optional
            Overrides the settings' weight options.

        Returns
        -------
        dict name -> TransferResult, values per original target vertex
        """
        if not signals:
            raise ValueError("no signals to carry")
        checked = {name: (check_signal(name, values, self.source.n_original, kind), kind)
                   for name, (values, kind) in signals.items()}
        t0 = time.perf_counter()
        transfer = self.transfer_for(basis)
        self.timings["bases"] = round(time.perf_counter() - t0, 4)
        groups = {name: values for name, (values, kind) in checked.items() if kind == "weight"}
        out = {name: transfer.transfer(values, kind=kind, name=name)
               for name, (values, kind) in checked.items() if kind != "weight"}
        if groups:
            carried, self.weights_report = carry_weights(transfer, groups,
                                                         weights or self.settings.weight_options())
            out.update(carried)
        self.timings["signals"] = round(time.perf_counter() - t0 - self.timings["bases"], 4)
        return {name: out[name] for name in checked}

    def carry_corners(self, name: str, values, kind: str, source_corner_verts, source_face_sizes,
                      target_corner_verts, target_face_sizes, *, basis: str | None = None,
                      inset: float = 0.25):
        """Carry one per-corner signal, keeping its seams (``engine.corners.carry_corners``)."""
        from ..carrying.corners import carry_corners
        return carry_corners(self, name, values, kind, source_corner_verts, source_face_sizes,
                             target_corner_verts, target_face_sizes, basis=basis, inset=inset)

    # ----------------------------------------------------------------- detail
    def detail(self, *, strength: float | None = None, size: float | None = None) -> np.ndarray:
        """New target positions carrying the source's surface detail.

        Each mesh is split into a smooth base and offsets in the base's
        local frames (:mod:`engine.detail`), features shorter than ``size``
        times the square root of the source's area counting as detail. The
        source's offsets are pulled to the target, scaled by the square root
        of the area ratio (so detail keeps its size relative to the shape),
        and added to the target's own base in the target's frames. Frames
        follow the gradients of the source's first eigenfunctions, pulled to
        the target through the same map, so they agree on both meshes.

        Returns
        -------
        (n_target_original, 3) float64
        """
        s = self.settings
        strength = s.detail_strength if strength is None else float(strength)
        size = s.detail_size if size is None else float(size)
        replace(s, detail_strength=strength, detail_size=size)  # validates both
        t0 = time.perf_counter()
        guides_s = self.source.eigenbasis(4).eigenvectors[:, 1:4]
        P = self.correspondence.matrix()
        wavelength = size * np.sqrt(self.source.area)
        scale = np.sqrt(self.target.area / self.source.area)
        base_s = smooth_base(self.source.vertices, self.source.stiffness, self.source.mass, wavelength=wavelength)
        base_t = smooth_base(self.target.vertices, self.target.stiffness, self.target.mass,
                             wavelength=wavelength * scale)
        layer_s = split_detail(self.source.vertices, self.source.faces, base_s, guides=guides_s)
        layer_t = split_detail(self.target.vertices, self.target.faces, base_t, guides=np.asarray(P @ guides_s))
        offsets = np.asarray(P @ layer_s.offsets) * scale
        positions = apply_detail(layer_t, offsets, strength=strength)
        self.timings["detail"] = round(time.perf_counter() - t0, 4)
        if not np.isfinite(positions).all():
            raise ValueError("detail transfer produced non-finite positions")
        return self.target.restore(positions)

    # ----------------------------------------------------------------- report
    def report(self, results: dict[str, TransferResult] | None = None) -> dict:
        """JSON-able account of the run: map, bases, signals, timings, cache."""
        corr = self.correspondence.report()
        out = {
            "mode": corr.get("mode"),
            "reason": corr.get("reason"),
            "settings": {k: v for k, v in asdict(self.settings).items()},
            "source_vertices": self.source.n_original,
            "target_vertices": self.target.n_original,
            "coverage_of_source_area": corr.get("coverage_of_source_area"),
            "consistency": corr.get("consistency"),
            "mean_confidence": float(self.confidence.mean()),
            "operators": {"source": self.source.operators.reason or "cotangent",
                          "target": self.target.operators.reason or "cotangent"},
            "correspondence": corr,
            "timings": dict(self.timings),
            "cache_hits": {**self.cache_hits, "source": dict(self.source.hits), "target": dict(self.target.hits)},
        }
        carried_groups = results and any(r.report.get("kind") == "weight" for r in results.values())
        if carried_groups and self.weights_report is not None:
            out["weights"] = dict(self.weights_report)
        if self._transfers:
            out["bases"] = {name: t.report()["transfer"] for name, t in self._transfers.items()}
        if results:
            out["signals"] = {name: {"kind": r.report.get("kind"), "source_error": r.source_error,
                                     "seconds": r.report.get("seconds")} for name, r in results.items()}
        return _jsonable(out)


def _valid_map(stored: dict, source: Shape, target: Shape) -> bool:
    try:
        tri, bary = stored["triangle"], stored["barycentric"]
        n_t = target.n_vertices
        ok = (tri.shape == (n_t,) and bary.shape == (n_t, 3) and stored["confidence"].shape == (n_t,)
              and np.isfinite(bary).all() and tri.min() >= 0 and tri.max() < len(source.faces))
        json.loads(str(stored["meta"]))
        return bool(ok)
    except (KeyError, ValueError, TypeError):
        return False


def _jsonable(x):
    if isinstance(x, dict):
        return {str(k): _jsonable(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_jsonable(v) for v in x]
    if isinstance(x, np.ndarray):
        return _jsonable(x.tolist())
    if isinstance(x, (np.floating, float)):
        return float(x) if np.isfinite(x) else None
    if isinstance(x, np.integer):
        return int(x)
    return x


def weighted_centre_vertex(vertices, weights) -> int:
    """The vertex nearest to the weight-averaged centre of a vertex group.

    Parameters
    ----------
    vertices : (n, 3) float array
    weights : (n,) float array, non-negative, not all zero
    """
    v = np.asarray(vertices, dtype=np.float64)
    w = np.asarray(weights, dtype=np.float64)
    if w.shape != (v.shape[0],):
        raise ValueError(f"weights must have shape ({v.shape[0]},), got {w.shape}")
    if not np.isfinite(w).all() or (w < 0).any() or w.sum() <= 0:
        raise ValueError("weights must be finite, non-negative and not all zero")
    centre = (w[:, None] * v).sum(axis=0) / w.sum()
    members = np.flatnonzero(w > 0)
    return int(members[np.argmin(np.linalg.norm(v[members] - centre, axis=1))])


def load_landmarks(path, n_source: int, n_target: int) -> tuple:
    """Landmark pairs from a JSON file: a list of ``[source_vertex, target_vertex]``."""
    try:
        data = json.loads(Path(path).read_text())
    except json.JSONDecodeError as exc:
        raise ValueError(f"{path}: not valid JSON ({exc.msg} at line {exc.lineno})") from None
    if not isinstance(data, list) or not all(isinstance(p, list) and len(p) == 2 for p in data):
        raise ValueError(f"{path}: expected a list of [source_vertex, target_vertex] pairs")
    pairs = []
    for i, (a, b) in enumerate(data):
        if not (isinstance(a, int) and isinstance(b, int)):
            raise ValueError(f"{path}: pair {i} must hold two whole numbers, got {[a, b]}")
        if not 0 <= a < n_source:
            raise ValueError(f"{path}: landmark {i}: source vertex {a} out of range for {n_source} vertices")
        if not 0 <= b < n_target:
            raise ValueError(f"{path}: landmark {i}: target vertex {b} out of range for {n_target} vertices")
        pairs.append((a, b))
    return tuple(pairs)


def _check_output(path) -> None:
    folder = Path(path).resolve().parent
    if not folder.is_dir():
        raise ValueError(f"output folder {str(folder)!r} does not exist")
    if not os.access(folder, os.W_OK):
        raise ValueError(f"output folder {str(folder)!r} is not writable")


def _read_shape(path, cache):
    from ..intake.files import read_mesh
    data = read_mesh(path)
    return data, Shape(data.vertices, corners=data.corners, sizes=data.sizes, cache=cache)


def _open_job(source_path, target_path, output_path, report_path, cache_dir):
    """The start of a file job: check the outputs can be written, then read both meshes.

    Returns
    -------
    (source MeshData, source Shape, target MeshData, target Shape)
    """
    for out in (output_path, report_path):
        if out:
            _check_output(out)
    src_data, source = _read_shape(source_path, _cache(cache_dir))
    tgt_data, target = _read_shape(target_path, _cache(cache_dir))
    return src_data, source, tgt_data, target


def _settings(landmarks_path, n_s, n_t, **options) -> Settings:
    landmarks = load_landmarks(landmarks_path, n_s, n_t) if landmarks_path else ()
    return Settings(landmarks=landmarks, **{k: v for k, v in options.items() if v is not None})


def run_transfer_job(source_path, target_path, output_path, *, attributes=None, basis=None, match=None,
                     landmarks_path=None, k=None, order=None, report_path=None, cache_dir=None) -> dict:
    """Carry a source file's vertex properties to a target file; write PLY (and a JSON report).

    The output holds the target's geometry and properties, every carried
    property under its source name and type, and a float ``confidence``.
    Nothing is written unless every step succeeded.
    """
    from ..intake.files import write_ply
    from ..carrying.signals import signal_to_property, signals_from_properties

    t0 = time.perf_counter()
    src_data, source, tgt_data, target = _open_job(source_path, target_path, output_path, report_path,
                                                   cache_dir)
    signals = signals_from_properties(src_data.properties, names=attributes)
    if not signals:
        raise ValueError(f"{source_path}: the source has no vertex properties to carry "
                         "(only coordinates and normals)")
    if "confidence" in signals:
        raise ValueError("the source has a property named 'confidence', which the output reserves")
    settings = _settings(landmarks_path, source.n_original, target.n_original, basis=basis, match=match,
                         k=k, order=order)
    pair = Pair(source, target, settings)
    results = pair.carry({name: (sig.values, sig.kind) for name, sig in signals.items()})
    props = dict(tgt_data.properties)
    for name, sig in signals.items():
        props[name] = signal_to_property(sig, results[name].values)
    props["confidence"] = pair.confidence.astype(np.float32)
    report = pair.report(results)
    report["files"] = {"source": str(source_path), "target": str(target_path), "output": str(output_path)}
    report["timings"]["total"] = round(time.perf_counter() - t0, 4)
    write_ply(output_path, tgt_data.vertices, corners=tgt_data.corners, sizes=tgt_data.sizes, properties=props)
    if report_path:
        _write_json(report_path, report)
    return report


def run_detail_job(source_path, target_path, output_path, *, strength=None, size=None, match=None,
                   landmarks_path=None, report_path=None, cache_dir=None) -> dict:
    """Carry a source file's surface detail to a target file; write the target with new coordinates."""
    from ..intake.files import write_ply

    t0 = time.perf_counter()
    _, source, tgt_data, target = _open_job(source_path, target_path, output_path, report_path, cache_dir)
    settings = _settings(landmarks_path, source.n_original, target.n_original, match=match,
                         detail_strength=strength, detail_size=size)
    pair = Pair(source, target, settings)
    positions = pair.detail()
    report = pair.report()
    moved = np.linalg.norm(positions - tgt_data.vertices, axis=1)
    report["detail"] = {"strength": settings.detail_strength, "size": settings.detail_size,
                        "mean_offset": float(moved.mean()), "max_offset": float(moved.max())}
    report["files"] = {"source": str(source_path), "target": str(target_path), "output": str(output_path)}
    report["timings"]["total"] = round(time.perf_counter() - t0, 4)
    write_ply(output_path, positions, corners=tgt_data.corners, sizes=tgt_data.sizes,
              properties=dict(tgt_data.properties))
    if report_path:
        _write_json(report_path, report)
    return report


def _cache(cache_dir):
    if not cache_dir:
        return None
    return Cache(cache_dir)


def _write_json(path, data) -> None:
    text = json.dumps(data, indent=2)
    # permissions 0o666 less the umask, as Path.write_text gives a new file
    with atomic_write(path, text=True, permissions=0o666) as fh:
        fh.write(text)
