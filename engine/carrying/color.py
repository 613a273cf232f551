"""Colour encodings: sRGB transfer function and 8-bit quantisation.

Colours travel through the engine in linear space in [0, 1]. Files and byte
colour attributes store 8-bit sRGB-encoded values; alpha is linear and is
never sRGB-converted. The transfer function is the piecewise one of IEC
61966-2-1 (sRGB), the same one Blender applies to byte colours.
"""

from __future__ import annotations

import numpy as np

__all__ = ["srgb_to_linear", "linear_to_srgb", "decode_bytes", "encode_bytes"]


def srgb_to_linear(c) -> np.ndarray:
    """sRGB-encoded values in [0, 1] to linear, elementwise (IEC 61966-2-1)."""
    c = np.clip(np.asarray(c, dtype=np.float64), 0.0, 1.0)
    return np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)


def linear_to_srgb(c) -> np.ndarray:
    """Linear values in [0, 1] to sRGB-encoded, elementwise (IEC 61966-2-1)."""
    c = np.clip(np.asarray(c, dtype=np.float64), 0.0, 1.0)
    return np.where(c <= 0.0031308, 12.92 * c, 1.055 * c ** (1 / 2.4) - 0.055)


def decode_bytes(rgba) -> np.ndarray:
    """8-bit colours (n, 3|4) uint8, RGB sRGB-encoded, to linear floats in [0, 1]."""
    a = np.asarray(rgba)
    if a.ndim != 2 or a.shape[1] not in (3, 4):
        raise ValueError(f"colours must have shape (n, 3) or (n, 4), got {a.shape}")
    out = a.astype(np.float64) / 255.0
    out[:, :3] = srgb_to_linear(out[:, :3])
    return out


def encode_bytes(linear) -> np.ndarray:
    """Linear colours (n, 3|4) in [0, 1] to 8-bit, RGB sRGB-encoded, alpha linear."""
    a = np.asarray(linear, dtype=np.float64)
    if a.ndim != 2 or a.shape[1] not in (3, 4):
        raise ValueError(f"colours must have shape (n, 3) or (n, 4), got {a.shape}")
    if not np.isfinite(a).all():
        raise ValueError("colours contain non-finite values")
    out = np.clip(a, 0.0, 1.0).copy()
    out[:, :3] = linear_to_srgb(out[:, :3])
    return np.round(out * 255.0).astype(np.uint8)
