"""Per-vertex signals: what kind each one is, and how it travels.

Kinds
    color    RGB or RGBA in linear space, clamped to [0, 1]
    weight   a scalar in [0, 1] (vertex-group weights), clamped to [0, 1]
    float    any real scalar or vector; reconstructions are clamped to the
             source's own per-channel range, so filtering never invents new
             extremes
    vector   like float, several channels
    label    integer IDs: never blended (taken from one source point)
    mask     booleans: never blended

File properties (PLY) map to kinds by their type: an 8-bit ``color`` group is
decoded from sRGB to linear and encoded back on writing; integer properties
are labels, or masks when they only hold 0 and 1; float properties are float.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .color import decode_colour, encode_colour, is_colour_range

__all__ = ["KINDS", "Signal", "signals_from_properties", "signal_to_property", "check_signal", "clamp_range",
           "clamp"]

KINDS = ("color", "weight", "float", "vector", "label", "mask")
BLENDED = ("color", "weight", "float", "vector")
SKIPPED_PROPERTIES = ("normal",)


@dataclass(frozen=True)
class Signal:
    """One per-vertex signal.

    Attributes
    ----------
    name : str
    kind : str
        One of :data:`KINDS`.
    values : (n,) or (n, c) array
        float64 for blended kinds (colours linear), int64 for labels, bool
        for masks.
    dtype : numpy dtype
        The type to write back (e.g. uint8 for an 8-bit colour).
    domain : {"POINT", "CORNER"}
        One value per vertex, or per face corner (see ``corners``).
    data_type : str
        How the signal's home format stores it (an attribute type, say),
        so a writer can store a result as its source was; "" when unknown.
    """

    name: str
    kind: str
    values: NDArray[Any]
    dtype: np.dtype[Any]
    domain: str = "POINT"
    data_type: str = ""

    @property
    def bounds(self) -> tuple[NDArray[Any], NDArray[Any]] | None:
        """Range a reconstruction is clamped to, per channel; None for labels/masks."""
        return clamp_range(self.kind, self.values)


def clamp_range(kind: str, reference: NDArray[Any]) -> tuple[NDArray[Any], NDArray[Any]] | None:
    """Per-channel range a blended signal of ``kind`` is clamped to; None for labels and masks.

    Colours and weights: [0, 1]. Floats and vectors: the per-channel range of
    ``reference`` (the source's own values, (n,) or (n, c)), so filtering
    never invents new extremes.
    """
    if kind in ("color", "weight"):
        shape = reference.shape[1:]
        return np.zeros(shape), np.ones(shape)
    if kind in ("float", "vector"):
        return reference.min(axis=0), reference.max(axis=0)
    return None


def clamp(values: NDArray[Any], kind: str, reference: NDArray[Any]) -> NDArray[Any]:
    """``values`` clipped to :func:`clamp_range` of ``kind`` and ``reference``; unchanged for labels and masks."""
    bounds = clamp_range(kind, reference)
    return values if bounds is None else np.clip(values, bounds[0], bounds[1])


def check_signal(name: str, values: ArrayLike, n: int, kind: str) -> NDArray[Any]:
    """Validate one signal at the door; returns it as a contiguous array."""
    if kind not in KINDS:
        raise ValueError(f"unknown signal kind {kind!r} for {name!r}; expected one of {', '.join(KINDS)}")
    a = np.asarray(values)
    if a.ndim not in (1, 2) or a.shape[0] != n:
        raise ValueError(f"signal {name!r} must have {n} rows (one per vertex), got shape {a.shape}")
    if a.size == 0:
        raise ValueError(f"signal {name!r} is empty")
    if kind == "color" and (a.ndim != 2 or a.shape[1] not in (3, 4)):
        raise ValueError(f"colour {name!r} must have 3 or 4 channels, got shape {a.shape}")
    if kind in BLENDED:
        if not (np.issubdtype(a.dtype, np.number) or a.dtype == bool):
            raise ValueError(f"signal {name!r} must be numeric, got dtype {a.dtype}")
        a = np.ascontiguousarray(a, dtype=np.float64)
        bad = ~np.isfinite(a)
        if bad.any():
            row = int(np.flatnonzero(bad.reshape(n, -1).any(axis=1))[0])
            raise ValueError(f"signal {name!r} has a non-finite value at vertex {row}")
        return a
    if kind == "label":
        if not np.issubdtype(a.dtype, np.integer):
            if np.issubdtype(a.dtype, np.floating) and np.isfinite(a).all() and (a == np.round(a)).all():
                return a.astype(np.int64)
            raise ValueError(f"label signal {name!r} must hold integers, got dtype {a.dtype}")
        return np.ascontiguousarray(a, dtype=np.int64)
    # mask
    if a.dtype != bool and not np.isin(a, (0, 1)).all():
        raise ValueError(f"mask signal {name!r} must hold only 0 and 1")
    return np.ascontiguousarray(a, dtype=bool)


def signals_from_properties(properties: dict[str, NDArray[Any]], *,
                            names: Iterable[str] | None = None) -> dict[str, Signal]:
    """Signals from file vertex properties (as ``engine.intake.files.read_mesh`` returns them).

    Parameters
    ----------
    properties : dict of name -> (n,) or (n, c) array
    names : iterable of str, optional
        Only these; a missing name raises ``ValueError`` naming it and the
        properties that do exist. By default every property except normals.
    """
    available = [k for k in properties if k not in SKIPPED_PROPERTIES]
    if names is None:
        chosen = available
    else:
        chosen = list(names)
        missing = [k for k in chosen if k not in properties]
        if missing:
            have = ", ".join(available) or "none"
            raise ValueError(f"the source has no vertex property {missing[0]!r} (it has: {have})")
    out = {}
    for name in chosen:
        a = np.asarray(properties[name])
        n = a.shape[0]
        if a.ndim == 2 and a.shape[1] in (3, 4) and "color" in name.lower() and is_colour_range(a):
            out[name] = Signal(name, "color", decode_colour(a), a.dtype)
        elif (np.issubdtype(a.dtype, np.integer) or a.dtype == bool) and a.ndim == 1:
            kind = "mask" if a.dtype == bool or np.isin(a, (0, 1)).all() else "label"
            out[name] = Signal(name, kind, check_signal(name, a, n, kind), a.dtype)
        else:
            kind = "float" if a.ndim == 1 else "vector"
            out[name] = Signal(name, kind, check_signal(name, a, n, kind), a.dtype)
    return out


def signal_to_property(signal: Signal, values: ArrayLike) -> NDArray[Any]:
    """Values of ``signal``'s kind back to its file dtype (sRGB bytes for 8-bit colours)."""
    a = np.asarray(values)
    if signal.kind == "color":
        return encode_colour(a, signal.dtype)
    if signal.kind in ("label", "mask"):
        return a.astype(signal.dtype)
    if not np.isfinite(a).all():
        raise ValueError(f"refusing to write non-finite values for {signal.name!r}")
    if np.issubdtype(signal.dtype, np.integer):  # integer vectors (colours outside the colour range)
        info = np.iinfo(signal.dtype)
        clipped: NDArray[Any] = np.clip(np.round(a), info.min, info.max).astype(signal.dtype)
        return clipped
    return a.astype(signal.dtype)
