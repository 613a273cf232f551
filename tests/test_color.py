"""sRGB encoding (engine/color.py)."""

import numpy as np
import pytest

from engine.carrying.color import decode_bytes, encode_bytes, linear_to_srgb, srgb_to_linear


def test_blender_byte_colour_value():
    # docs/platform.md (measured in bpy 5.0.1): writing linear 0.5 to a BYTE_COLOR
    # attribute stores 188/255; alpha is not converted.
    assert encode_bytes([[0.5, 0.5, 0.5, 0.5]]).tolist() == [[188, 188, 188, 128]]


def test_reference_points():
    # IEC 61966-2-1: linear 0.0031308 is the knee (12.92 * 0.0031308 = 0.04045).
    assert linear_to_srgb(0.0031308) == pytest.approx(0.04045, abs=1e-6)
    assert srgb_to_linear(0.04045) == pytest.approx(0.0031308, abs=1e-6)
    assert linear_to_srgb(1.0) == pytest.approx(1.0)
    assert srgb_to_linear(0.5) == pytest.approx(0.214041, abs=1e-6)  # ((0.5 + 0.055) / 1.055) ** 2.4, the standard formula


def test_bytes_round_trip_is_exact():
    every = np.arange(256, dtype=np.uint8)
    rgba = np.column_stack([every, every[::-1], every, every])
    assert np.array_equal(encode_bytes(decode_bytes(rgba)), rgba)


def test_errors():
    with pytest.raises(ValueError, match=r"shape \(n, 3\) or \(n, 4\), got \(3,\)"):
        encode_bytes([0.1, 0.2, 0.3])
    with pytest.raises(ValueError, match="non-finite"):
        encode_bytes([[np.nan, 0, 0]])
