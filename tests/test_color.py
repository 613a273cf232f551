"""sRGB encoding (engine/color.py)."""

import numpy as np
import pytest

from engine.carrying.color import (decode_bytes, decode_colour, encode_bytes, encode_colour, is_colour_range,
                                   linear_to_srgb, srgb_to_linear)


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


@pytest.mark.parametrize("dtype", ["u1", "u2", "i2", "i4"])
def test_integer_colours_of_every_width_round_trip_exactly(dtype):
    # Integer colours span 0 .. the type's maximum, as 8-bit ones span 0 .. 255;
    # decode and encode are inverse up to rounding far below one step.
    top = np.iinfo(dtype).max
    rng = np.random.default_rng(1)
    rgba = np.vstack([[0, top, 1, top - 1], rng.integers(0, top, size=(500, 4), endpoint=True)]).astype(dtype)
    linear = decode_colour(rgba)
    assert linear.min() >= 0 and linear.max() <= 1
    back = encode_colour(linear, dtype)
    assert back.dtype == np.dtype(dtype) and np.array_equal(back, rgba)


def test_sixteen_bit_values_are_not_read_as_eight_bit():
    # 13621 and 50115 of 65535 are sRGB 0.208 and 0.765: linear 0.0357 and 0.546
    # (IEC 61966-2-1 formula), not both clamped to 1
    lin = decode_colour(np.array([[13621, 50115, 0]], dtype=np.uint16))
    np.testing.assert_allclose(lin[0, :2], srgb_to_linear(np.array([13621, 50115]) / 65535), rtol=1e-12)
    assert lin[0, 0] < lin[0, 1] < 1


def test_float_colours_stay_linear_and_out_of_range_ones_are_not_colours():
    c = np.array([[0.25, 0.5, 1.0, 0.0]], dtype=np.float32)
    assert np.array_equal(encode_colour(decode_colour(c), np.float32), c)
    assert not is_colour_range(np.array([[0.0, 2.0, 255.0]]))
    assert not is_colour_range(np.array([[-1, 0, 5]], dtype=np.int16))
    with pytest.raises(ValueError, match="must lie in their colour range"):
        decode_colour(np.array([[0.0, 2.0, 255.0]]))
