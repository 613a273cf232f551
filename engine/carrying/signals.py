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

from dataclasses import dataclass

import numpy as np

from .color import decode_colour, encode_colour, is_colour_range

__all__ = ["KINDS", "Signal", "signals_from_properties", "signal_to_property", "check_signal"]

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
    """

    name: str
    kind: str
    values: np.ndarray
    dtype: np.dtype

    @property
    def bounds(self) -> tuple[np.ndarray, np.ndarray] | None:
        """Range a reconstruction is clamped to, per channel; None for labels/masks."""
        if self.kind in ("color", "weight"):
            shape = self.values.shape[1:]
            return np.zeros(shape), np.ones(shape)
        if self.kind in ("float", "vector"):
            return self.values.min(axis=0), self.values.max(axis=0)
        return None


def check_signal(name: str, values, n: int, kind: str) -> np.ndarray:
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


def signals_from_properties(properties: dict, *, names=None) -> dict[str, Signal]:
    """Signals from file vertex properties (as ``meshio.read_mesh`` returns them).

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


def signal_to_property(signal: Signal, values) -> np.ndarray:
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
        return np.clip(np.round(a), info.min, info.max).astype(signal.dtype)
    return a.astype(signal.dtype)
