"""One source/target pair, end to end: the engine's single way in for callers.

The add-on, the command line and batch jobs all go through :class:`Pair`:

    pair = Pair(source_shape, target_shape, settings)
    results = pair.carry({"tint": (values, "color"), "head": (weights, "weight")})
    positions = pair.detail()            # new target coordinates
    pair.report(results)                 # JSON-able

A Pair computes its correspondence once (and keeps it on disk when the shapes
have a cache), then every signal costs matrix products. The file-in, file-out
jobs behind ``python -m engine transfer`` / ``detail`` are in
:mod:`engine.jobs.file_jobs`.
"""

from __future__ import annotations

import json
import os
import time
from collections.abc import Sequence
from dataclasses import asdict, dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ..matching.correspondence import MATCHES, Correspondence, correspond
from ..carrying.detail import apply_detail, check_strength, place_on_original, smooth_base, split_detail
from ..carrying.detail_sampling import ray_weights, smooth_sample
from ..carrying.large_detail import lifted_layer, surface_area
from ..common.cache import geometry_key
from ..common.progress import MATCHING_STAGES, skip
from ..matching.standin import needs_standin
from ..spectra.shape import Shape
from ..carrying.signals import check_signal
from ..carrying.transfer import BASES, Transfer, TransferResult
from ..carrying.weights import WeightOptions, carry_weights
from ..spectra.approximation import check_basis_name

__all__ = ["Settings", "Pair", "weighted_centre_vertex", "load_landmarks", "check_landmarks",
           "CORRESPONDENCE_VERSION"]

CORRESPONDENCE_VERSION = 9   # 2: product-embedding step in the intrinsic map; 3: non-rigid ICP
                             # alignment; 4: spectral check in aligned mode where the surfaces differ;
                             # 5: nearest embedding rows from one fused product (near-ties may differ);
                             # 6: pieces matched piece to piece, confidence with facing and signature
                             # checks, auto mode's self-check (new report keys)
                             # 7: meshes over 40k vertices matched through stand-ins; no functional
                             # map in aligned mode
                             # 8: intrinsic mode over 10k vertices: spectral map and alignment on
                             # 5k-vertex copies, functional map in 30 functions; reverse map (the
                             # round trip's confidence) by the cheap search
                             # 9: a huge mesh clustered on a grid before its stand-in's quadric
                             # simplification, the lift searching each query's own neighbourhood


@dataclass(frozen=True)
class Settings:
    """Everything that decides a transfer's result (and its cache key).

    Attributes
    ----------
    match : {"auto", "aligned", "intrinsic"}
    basis : str
        One of :data:`engine.carrying.transfer.BASES`.
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
    landmarks: tuple[tuple[int, int], ...] = ()
    detail_strength: float = 1.0
    detail_size: float = 0.05
    max_influences: int = 0
    weight_threshold: float = 0.0
    keep_weight_totals: bool = True

    def __post_init__(self) -> None:
        if self.match not in MATCHES:
            raise ValueError(f"unknown match {self.match!r}; expected one of {', '.join(MATCHES)}")
        check_basis_name(self.basis, BASES)
        if not 1 <= int(self.order) <= 5:
            raise ValueError(f"order must be between 1 and 5, got {self.order}")
        if int(self.k) < 1 or (self.K is not None and int(self.K) < 1):
            raise ValueError(f"k and K must be positive, got k={self.k}, K={self.K}")
        check_strength(self.detail_strength)
        if not (np.isfinite(self.detail_size) and 0 < self.detail_size <= 1):
            raise ValueError(f"detail size must be in (0, 1] (a fraction of the shape's size), "
                             f"got {self.detail_size}")
        object.__setattr__(self, "landmarks", tuple((int(a), int(b)) for a, b in self.landmarks))
        self.weight_options()  # validates the weight options

    def weight_options(self) -> WeightOptions:
        """The options for carried vertex groups."""
        return WeightOptions(self.max_influences, self.weight_threshold, self.keep_weight_totals)

    def map_key(self) -> dict[str, str | int]:
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
        self.timings: dict[str, float] = {}
        self.cache_hits: dict[str, Any] = {"correspondence": "computed"}
        t0 = time.perf_counter()
        self.correspondence = self._load_or_correspond()
        self.timings["correspondence"] = round(time.perf_counter() - t0, 4)
        self._transfers: dict[str, Transfer] = {}
        self.weights_report: dict[str, Any] | None = None

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
        if key is not None and cache is not None:
            n_t = self.target.n_vertices
            stored = cache.load(key, {"triangle": (n_t,), "barycentric": (n_t, 3), "confidence": (n_t,),
                                      "fmap": (None, None), "meta": ()})
            meta = _valid_map(stored, self.source, self.target) if stored is not None else None
            if stored is not None and meta is not None:
                self.cache_hits["correspondence"] = "disk"
                skip(*MATCHING_STAGES)
                return Correspondence(self.source, self.target, meta["mode"], meta["reason"],
                                      stored["triangle"], stored["barycentric"],
                                      stored["confidence"], stored["fmap"], meta["stats"])
        lm = list(self.settings.landmarks) or None
        corr = correspond(self.source, self.target, match=self.settings.match, landmarks=lm)
        if key is not None and cache is not None:
            meta_text = json.dumps({"mode": corr.mode, "reason": corr.reason, "stats": _jsonable(corr.stats)})
            cache.save(key, {"triangle": corr.triangle, "barycentric": corr.barycentric,
                             "confidence": corr.confidence, "fmap": corr.fmap, "meta": np.array(meta_text)})
        return corr

    def reuse(self) -> None:
        """Start another run on this kept pair: timings and cache counts restart,
        and the correspondence counts as kept in memory (``"memory"``)."""
        self.timings = {}
        self.cache_hits = {"correspondence": "memory"}
        for shape in (self.source, self.target):
            shape.hits = dict.fromkeys(shape.hits, 0)

    @property
    def confidence(self) -> NDArray[Any]:
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
        transfer: Transfer = self._transfers[name]
        return transfer

    def carry(self, signals: dict[str, tuple[Any, str]], *, basis: str | None = None,
              weights: WeightOptions | None = None) -> dict[str, TransferResult]:
        """Carry several signals through one correspondence.

        Parameters
        ----------
        signals : dict name -> (values, kind)
            ``values`` per original source vertex; ``kind`` one of
            ``engine.carrying.signals.KINDS``. All are validated before any is carried.
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

    def carry_corners(self, name: str, values: ArrayLike, kind: str, source_polygons: tuple[ArrayLike, ArrayLike],
                      target_polygons: tuple[ArrayLike, ArrayLike], *, basis: str | None = None,
                      inset: float = 0.25) -> Any:
        """Carry one per-corner signal, keeping its seams (``engine.carrying.corners.carry_corners``)."""
        from ..carrying.corners import carry_corners
        return carry_corners(self, name, values, kind, source_polygons, target_polygons, basis=basis, inset=inset)

    # ----------------------------------------------------------------- detail
    def detail(self, *, strength: float | None = None, size: float | None = None,
               original: NDArray[Any] | None = None) -> NDArray[Any]:
        """New target positions carrying the source's surface detail.

        Each mesh is split into a smooth base and offsets in the base's
        local frames (:mod:`engine.carrying.detail`), features shorter than ``size``
        times the square root of the source's area counting as detail. The
        source's offsets are pulled to the target, scaled by the square root
        of the area ratio (so detail keeps its size relative to the shape),
        and added to the target's own base in the target's frames. Frames
        follow the gradients of the source's first eigenfunctions, pulled to
        the target through the same map, so they agree on both meshes. The
        offsets are read with their vertex gradients (exact for quadratic
        fields) and, when the meshes overlap in space (aligned), where the
        target's base normal through the vertex meets the source, not at the
        closest point (which slides down the detail's slopes);
        :mod:`engine.carrying.detail_sampling`.

        Parameters
        ----------
        strength, size : float, optional
            Override the settings' ``detail_strength`` / ``detail_size``.
        original : (n_target_original, 3) float array, optional
            The target's original vertex positions. Vertices that belong to
            no face of the cleaned target (isolated, left by a hole, only in
            zero-area faces) keep these positions; give them, or such
            vertices get the position of the nearest surface vertex.

        Returns
        -------
        (n_target_original, 3) float64
        """
        s = self.settings
        strength = s.detail_strength if strength is None else float(strength)
        size = s.detail_size if size is None else float(size)
        replace(s, detail_strength=strength, detail_size=size)  # validates both
        t0 = time.perf_counter()
        P = self.correspondence.matrix()  # type: ignore[no-untyped-call, unused-ignore]
        large = needs_standin(self.source)
        area_s = surface_area(self.source.vertices, self.source.faces) if large else self.source.area
        wavelength = size * np.sqrt(area_s)
        scale = np.sqrt(self.target.area / area_s)
        corr = self.correspondence
        rows = np.unique(self.source.faces[corr.triangle])    # the source vertices the map reads
        lifted = lifted_layer(self.source, wavelength, rows) if large else None
        if lifted is None:
            guides_s = self.source.eigenbasis(4).eigenvectors[:, 1:4]
            base_s = smooth_base(self.source.vertices, self.source.stiffness, self.source.mass,
                                 wavelength=wavelength)
            offsets_s = split_detail(self.source.vertices, self.source.faces, base_s, guides=guides_s).offsets
        else:
            offsets_s, guides_s = lifted
        base_t = smooth_base(self.target.vertices, self.target.stiffness, self.target.mass,
                             wavelength=wavelength * scale)
        layer_t = split_detail(self.target.vertices, self.target.faces, base_t, guides=np.asarray(P @ guides_s))
        weights = corr.barycentric
        if corr.mode == "aligned":     # the target vertex's own place under or over the source's detail
            weights = ray_weights(self.source.vertices, self.source.faces, corr.triangle, weights,
                                  self.target.vertices, layer_t.frames[:, 2])
        offsets = smooth_sample(self.source.vertices, self.source.faces, offsets_s, corr.triangle, weights) * scale
        positions = apply_detail(layer_t, offsets, strength=strength)
        self.timings["detail"] = round(time.perf_counter() - t0, 4)
        if not np.isfinite(positions).all():
            raise ValueError("detail transfer produced non-finite positions")
        if original is None:
            return self.target.restore(positions)
        return place_on_original(original, self.target.prepared.to_clean, positions)

    # ----------------------------------------------------------------- report
    def report(self, results: dict[str, TransferResult] | None = None) -> dict[str, Any]:
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
            "operators": {"source": _operators_note(self.source), "target": _operators_note(self.target)},
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
        report: dict[str, Any] = _jsonable(out)
        return report


def _operators_note(shape: Shape) -> str:
    """Which Laplacian the shape got, without building one only to say so."""
    if not shape.operators_built:
        return "not built (matched through a stand-in)"
    return str(shape.operators.reason or "cotangent")


def _valid_map(stored: dict[str, NDArray[Any]], source: Shape, target: Shape) -> dict[str, Any] | None:
    """The entry's meta when every field of a stored correspondence is usable, else None."""
    tri, bary, conf = stored["triangle"], stored["barycentric"], stored["confidence"]
    if tri.dtype.kind != "i" or bary.dtype.kind != "f" or conf.dtype.kind != "f" or stored["meta"].dtype.kind != "U":
        return None
    if tri.size and (tri.min() < 0 or tri.max() >= len(source.faces)):
        return None
    if bary.size and (bary.min() < -1e-6 or bary.max() > 1 + 1e-6):
        return None
    try:
        meta = json.loads(str(stored["meta"]))
    except (ValueError, RecursionError):
        return None
    if not isinstance(meta, dict) or not {"mode", "reason", "stats"} <= set(meta):
        return None
    if meta["mode"] not in MATCHES or not isinstance(meta["reason"], str) or not isinstance(meta["stats"], dict):
        return None
    return meta


def _jsonable(x: Any) -> Any:
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


def weighted_centre_vertex(vertices: ArrayLike, weights: ArrayLike) -> int:
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


def load_landmarks(path: str | os.PathLike[str], n_source: int, n_target: int) -> tuple[tuple[int, int], ...]:
    """Landmark pairs from a JSON file: a list of ``[source_vertex, target_vertex]``."""
    name = os.fspath(path)
    try:
        data = json.loads(Path(path).read_bytes())
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        where = f" ({exc.msg} at line {exc.lineno})" if isinstance(exc, json.JSONDecodeError) else ""
        raise ValueError(f"{name}: not valid JSON{where}") from None
    except RecursionError:
        raise ValueError(f"{name}: expected a list of [source_vertex, target_vertex] pairs "
                         "(found nesting too deep to read)") from None
    if not isinstance(data, list) or not all(isinstance(p, list) and len(p) == 2 for p in data):
        raise ValueError(f"{name}: expected a list of [source_vertex, target_vertex] pairs")
    return check_landmarks(data, n_source, n_target, name=name)


def check_landmarks(pairs: Sequence[Sequence[Any]], n_source: int, n_target: int, *,
                    name: str = "landmarks") -> tuple[tuple[int, int], ...]:
    """Validate landmark pairs: whole numbers in range, no repeats, no vertex given two partners."""
    out: list[tuple[int, int]] = []
    seen_s: dict[int, int] = {}
    seen_t: dict[int, int] = {}
    for i, pair in enumerate(pairs):
        a, b = pair
        if type(a) is not int or type(b) is not int:  # bool is an int subclass: refused as well
            raise ValueError(f"{name}: pair {i} must hold two whole numbers, got {[a, b]}")
        if not 0 <= a < n_source:
            raise ValueError(f"{name}: landmark {i}: source vertex {a} out of range for {n_source} vertices")
        if not 0 <= b < n_target:
            raise ValueError(f"{name}: landmark {i}: target vertex {b} out of range for {n_target} vertices")
        if (a, b) in out:
            raise ValueError(f"{name}: landmark {i} repeats landmark {out.index((a, b))} {[a, b]}")
        if a in seen_s:
            raise ValueError(f"{name}: landmarks {seen_s[a]} and {i} give source vertex {a} two different "
                             f"target vertices ({out[seen_s[a]][1]} and {b})")
        if b in seen_t:
            raise ValueError(f"{name}: landmarks {seen_t[b]} and {i} give target vertex {b} two different "
                             f"source vertices ({out[seen_t[b]][0]} and {a})")
        seen_s[a], seen_t[b] = i, i
        out.append((a, b))
    return tuple(out)
