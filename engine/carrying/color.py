"""Colour encodings: sRGB transfer function and integer quantisation.

Colours travel through the engine in linear space in [0, 1]. Integer colours
(files and byte colour attributes: 8-bit, 16-bit, any integer type) store
sRGB-encoded values over the type's whole range, 0 .. the type's maximum;
alpha is linear and is never sRGB-converted. Float colours are linear values
in [0, 1] and pass unchanged. A colour outside its type's colour range
(negative integers, floats beyond [0, 1]) is not treated as a colour at all
(:func:`is_colour_range`): it travels as a plain vector, so its range is kept.
The transfer function is the piecewise one of IEC 61966-2-1 (sRGB), the same
one Blender applies to byte colours.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import ArrayLike, DTypeLike, NDArray

__all__ = ["srgb_to_linear", "linear_to_srgb", "decode_bytes", "encode_bytes", "is_colour_range",
           "decode_colour", "encode_colour"]


def srgb_to_linear(c: ArrayLike) -> NDArray[Any]:
    """sRGB-encoded values in [0, 1] to linear, elementwise (IEC 61966-2-1)."""
    c = np.clip(np.asarray(c, dtype=np.float64), 0.0, 1.0)
    return np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)


def linear_to_srgb(c: ArrayLike) -> NDArray[Any]:
    """Linear values in [0, 1] to sRGB-encoded, elementwise (IEC 61966-2-1)."""
    c = np.clip(np.asarray(c, dtype=np.float64), 0.0, 1.0)
    return np.where(c <= 0.0031308, 12.92 * c, 1.055 * c ** (1 / 2.4) - 0.055)


def _channels(a: NDArray[Any]) -> None:
    if a.ndim != 2 or a.shape[1] not in (3, 4):
        raise ValueError(f"colours must have shape (n, 3) or (n, 4), got {a.shape}")


def is_colour_range(values: ArrayLike) -> bool:
    """Whether (n, 3|4) values fit their type's colour range: 0 .. max for integers, [0, 1] for floats."""
    a = np.asarray(values)
    if a.ndim != 2 or a.shape[1] not in (3, 4) or a.size == 0:
        return False
    if np.issubdtype(a.dtype, np.integer):
        return bool(a.min() >= 0)
    if np.issubdtype(a.dtype, np.floating):
        return bool(np.isfinite(a).all() and a.min() >= 0 and a.max() <= 1)
    return False


def decode_colour(values: ArrayLike) -> NDArray[Any]:
    """Colours (n, 3|4) of any integer or float type to linear float64 in [0, 1].

    Integers: divided by the type's maximum, RGB sRGB-decoded, alpha linear.
    Floats: taken as linear, unchanged. Values must be in the colour range
    (:func:`is_colour_range`).
    """
    a = np.asarray(values)
    _channels(a)
    if not is_colour_range(a):
        raise ValueError(f"colours of type {a.dtype} must lie in their colour range "
                         "(0 .. the type's maximum for integers, [0, 1] for floats)")
    if np.issubdtype(a.dtype, np.floating):
        return a.astype(np.float64)
    out = a.astype(np.float64) / float(np.iinfo(a.dtype).max)
    out[:, :3] = srgb_to_linear(out[:, :3])
    return out


def encode_colour(linear: ArrayLike, dtype: DTypeLike) -> NDArray[Any]:
    """Linear colours (n, 3|4) to ``dtype``: the inverse of :func:`decode_colour`.

    Values are clamped to [0, 1]; integers are RGB sRGB-encoded and rounded to
    0 .. the type's maximum, alpha linear; floats stay linear.
    """
    a = np.asarray(linear, dtype=np.float64)
    _channels(a)
    if not np.isfinite(a).all():
        raise ValueError("colours contain non-finite values")
    dt = np.dtype(dtype)
    out = np.clip(a, 0.0, 1.0)
    if np.issubdtype(dt, np.floating):
        return out.astype(dt)
    if not np.issubdtype(dt, np.integer):
        raise ValueError(f"colours cannot be stored as {dt}")
    out[:, :3] = linear_to_srgb(out[:, :3])
    top = int(np.iinfo(dt).max)
    rounded: NDArray[Any] = np.round(out * top).astype(dt)
    return rounded


def decode_bytes(rgba: ArrayLike) -> NDArray[Any]:
    """8-bit colours (n, 3|4) uint8, RGB sRGB-encoded, to linear floats in [0, 1]."""
    a = np.asarray(rgba)
    _channels(a)
    return decode_colour(a.astype(np.uint8))


def encode_bytes(linear: ArrayLike) -> NDArray[Any]:
    """Linear colours (n, 3|4) in [0, 1] to 8-bit, RGB sRGB-encoded, alpha linear."""
    return encode_colour(linear, np.uint8)
