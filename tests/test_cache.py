"""Tests of engine.common.cache: keys, validated loads, atomic saves, pruning."""

from __future__ import annotations

import os
import subprocess
import sys

import numpy as np
import pytest

from engine.common.cache import Cache, cached_eigenbasis, geometry_key
from engine.spectra.laplacian import cotangent_laplacian, mass_matrix
from tests.meshes import icosphere


@pytest.fixture
def ops():
    v, f = icosphere(2)
    return v, f, cotangent_laplacian(v, f), mass_matrix(v, f)


def test_key_stable_and_sensitive(ops):
    v, f, L, m = ops
    k1 = geometry_key(v, f, k=10, kind="cot")
    assert k1 == geometry_key(v.copy(), f.copy(), kind="cot", k=10)  # param order irrelevant
    assert len(k1) == 64 and all(c in "0123456789abcdef" for c in k1)
    assert k1 != geometry_key(v, f, k=11, kind="cot")
    assert k1 != geometry_key(v.astype(np.float32), f, k=10, kind="cot")  # dtype counts
    assert k1 != geometry_key(v.reshape(-1), f, k=10, kind="cot")  # shape counts
    w = v.copy()
    w[5, 1] = np.nextafter(w[5, 1], 2)
    assert k1 != geometry_key(w, f, k=10, kind="cot")
    assert geometry_key(L) == geometry_key(L.tocoo())  # sparse by content
    # stable across processes (no hash randomisation, no id())
    code = ("import numpy as np; from engine.common.cache import geometry_key; "
            "print(geometry_key(np.arange(6.0).reshape(2, 3), a=1, b='x'))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                         cwd=os.path.dirname(os.path.dirname(__file__)))
    assert out.stdout.strip() == geometry_key(np.arange(6.0).reshape(2, 3), b="x", a=1)


def test_key_errors():
    with pytest.raises(ValueError, match="parameter 'p' must be a str, int, float, bool or None, got list"):
        geometry_key(np.zeros(2), p=[1])
    with pytest.raises(ValueError, match="cannot hash object arrays"):
        geometry_key(np.array([None, 1], dtype=object))


def test_round_trip_and_counts(tmp_path):
    c = Cache(tmp_path / "c")
    a = {"x": np.arange(5.0), "y": np.eye(3), "label": np.asarray("dense")}
    assert c.load("abc", ["x"]) is None and c.misses == 1
    c.save("abc", a)
    got = c.load("abc", {"x": (5,), "y": (None, 3), "label": ()})
    assert c.hits == 1
    np.testing.assert_array_equal(got["x"], a["x"])
    np.testing.assert_array_equal(got["y"], a["y"])
    assert str(got["label"]) == "dense"
    assert not [p for p in os.listdir(c.folder) if p.startswith(".tmp-")]  # no temp file left


@pytest.mark.parametrize("damage", ["truncate", "garbage", "empty"])
def test_damaged_file_is_a_miss_and_deleted(tmp_path, damage):
    c = Cache(tmp_path)
    path = c.save("k1", {"x": np.arange(1000.0)})
    raw = open(path, "rb").read()
    with open(path, "wb") as fh:
        fh.write({"truncate": raw[: len(raw) // 2], "garbage": b"not a zip file" * 50, "empty": b""}[damage])
    assert c.load("k1", ["x"]) is None
    assert c.misses == 1 and not os.path.exists(path)


def test_mismatched_entries_are_misses(tmp_path):
    c = Cache(tmp_path)
    path = c.save("right", {"x": np.arange(4.0)})
    os.replace(path, os.path.join(tmp_path, "wrong.npz"))  # stored key says "right"
    assert c.load("wrong", ["x"]) is None
    c.save("k", {"x": np.arange(4.0)})
    assert c.load("k", ["x", "missing"]) is None  # a missing field
    c.save("k", {"x": np.arange(4.0)})
    assert c.load("k", {"x": (5,)}) is None  # a wrong shape
    c.save("k", {"x": np.array([1.0, np.nan])})
    assert c.load("k", ["x"]) is None  # a non-finite float
    np.savez(os.path.join(tmp_path, "nometa.npz"), x=np.arange(3.0))
    assert c.load("nometa", ["x"]) is None  # no key / version fields
    assert c.misses == 5 and c.hits == 0


def test_save_and_key_errors(tmp_path):
    c = Cache(tmp_path)
    with pytest.raises(ValueError, match="cache key must be a non-empty string"):
        c.save("../evil", {"x": np.zeros(1)})
    with pytest.raises(ValueError, match="field name '__key__' is reserved"):
        c.save("k", {"__key__": np.zeros(1)})
    with pytest.raises(ValueError, match="field 'o' is an object array"):
        c.save("k", {"o": np.array([None], dtype=object)})
    with pytest.raises(ValueError, match="max_bytes must be non-negative, got -1"):
        c.prune(-1)


def test_size_clear_prune(tmp_path):
    c = Cache(tmp_path)
    paths = [c.save(f"e{i}", {"x": np.zeros(1000)}) for i in range(4)]
    for i, p in enumerate(paths):
        os.utime(p, (1000 + i, 1000 + i))  # e0 oldest
    one = os.path.getsize(paths[0])
    assert c.size_bytes() == sum(os.path.getsize(p) for p in paths)
    assert c.prune(2 * one) == 2
    assert not os.path.exists(paths[0]) and not os.path.exists(paths[1]) and os.path.exists(paths[3])
    assert c.size_bytes() <= 2 * one
    assert c.clear() == 2 and c.size_bytes() == 0


def test_cached_eigenbasis_hit_is_identical(tmp_path, ops):
    v, f, L, m = ops
    c = Cache(tmp_path)
    a = cached_eigenbasis(L, m, 12, cache=c, vertices=v, faces=f, laplacian="cotangent")
    b = cached_eigenbasis(L, m, 12, cache=c, vertices=v, faces=f, laplacian="cotangent")
    assert a.info["cache"] == "miss" and b.info["cache"] == "hit"
    assert c.hits == 1 and c.misses == 1
    for name in ("eigenvalues", "eigenvectors", "mass", "residuals"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name))
    d = cached_eigenbasis(L, m, 13, cache=c, vertices=v, faces=f, laplacian="cotangent")
    assert d.info["cache"] == "miss"  # another k, another key
    assert cached_eigenbasis(L, m, 12).info["cache"] == "off"


def test_cached_eigenbasis_recomputes_bad_entry(tmp_path, ops):
    v, f, L, m = ops
    c = Cache(tmp_path)
    a = cached_eigenbasis(L, m, 8, cache=c)
    path = os.path.join(tmp_path, a.info["key"] + ".npz")
    with open(path, "r+b") as fh:
        fh.truncate(100)
    b = cached_eigenbasis(L, m, 8, cache=c)
    assert b.info["cache"] == "miss"
    np.testing.assert_array_equal(a.eigenvectors, b.eigenvectors)
    assert cached_eigenbasis(L, m, 8, cache=c).info["cache"] == "hit"  # rewritten


def test_changed_solver_version_misses_the_eigenbasis_cache(tmp_path, monkeypatch):
    # Shape keys its cached eigenbases by the solver's SOLVER_VERSION: a new
    # session on the same mesh reads the stored basis, but after a solver
    # change (a new version) it computes afresh instead of trusting the old one.
    import engine.spectra.shape as shape_module
    from engine.spectra.shape import Shape

    v, f = icosphere(2)
    a = Shape(v, f, cache=tmp_path)
    first = a.eigenbasis(10)
    assert a.hits["computed"] == 1
    b = Shape(v, f, cache=tmp_path)
    again = b.eigenbasis(10)
    assert b.hits["disk"] == 1 and b.hits["computed"] == 0
    np.testing.assert_array_equal(again.eigenvectors, first.eigenvectors)
    monkeypatch.setattr(shape_module, "SOLVER_VERSION", shape_module.SOLVER_VERSION + 1)
    c = Shape(v, f, cache=tmp_path)
    c.eigenbasis(10)
    assert c.hits["disk"] == 0 and c.hits["computed"] == 1
    d = Shape(v, f, cache=tmp_path)
    d.eigenbasis(10)
    assert d.hits["disk"] == 1  # the new version's entry is stored beside the old one
