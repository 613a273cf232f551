"""Signal kinds from file properties, validation at the door (engine/signals.py)."""

import numpy as np
import pytest

from engine.carrying.signals import check_signal, signal_to_property, signals_from_properties


def test_kinds_from_property_types():
    n = 5
    props = {
        "color": np.array([[255, 0, 0, 255]] * n, np.uint8),
        "normal": np.zeros((n, 3), np.float32),
        "ao": np.linspace(0, 1, n).astype(np.float32),
        "part": np.array([0, 3, 3, 7, 1], np.int32),
        "selected": np.array([0, 1, 1, 0, 1], np.uint8),
    }
    s = signals_from_properties(props)
    assert set(s) == {"color", "ao", "part", "selected"}  # normals are geometry, not carried
    assert (s["color"].kind, s["ao"].kind, s["part"].kind, s["selected"].kind) == ("color", "float", "label", "mask")
    # 8-bit colours decode to linear: sRGB 255 -> 1.0, 0 -> 0.0 (IEC 61966-2-1)
    assert s["color"].values[0].tolist() == [1.0, 0.0, 0.0, 1.0]
    back = signal_to_property(s["color"], s["color"].values)
    assert back.dtype == np.uint8 and np.array_equal(back, props["color"])
    assert signal_to_property(s["part"], s["part"].values).dtype == np.int32


def test_float_bounds_are_the_source_range():
    s = signals_from_properties({"h": np.array([-2.0, 0.5, 3.0])})["h"]
    lo, hi = s.bounds
    assert (float(lo), float(hi)) == (-2.0, 3.0)


def test_missing_property_names_what_exists():
    with pytest.raises(ValueError, match=r"no vertex property 'dirt' \(it has: ao\)"):
        signals_from_properties({"ao": np.zeros(3)}, names=["dirt"])


@pytest.mark.parametrize("values, kind, message", [
    (np.zeros(4), "float", "must have 5 rows"),
    (np.array([0, np.nan, 0, 0, 0]), "float", "non-finite value at vertex 1"),
    (np.zeros((5, 2)), "color", "3 or 4 channels"),
    (np.array([0.5] * 5), "label", "must hold integers"),
    (np.array([0, 2, 0, 0, 0]), "mask", "only 0 and 1"),
    (np.zeros(5), "texture", "unknown signal kind 'texture'"),
])
def test_check_signal_errors(values, kind, message):
    with pytest.raises(ValueError, match=message):
        check_signal("s", values, 5, kind)
