"""Tests of engine.common.cache: keys, validated loads, atomic saves, pruning."""

from __future__ import annotations

import os
import subprocess
import sys

import numpy as np
import pytest

from engine.common.cache import Cache, geometry_key
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
    assert os.listdir(c.folder) == ["abc.npz"]  # no temporary file left


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


def _rewrite(path, **changes):
    """Rewrite an entry's fields directly (as a damaged or hand-made file would be)."""
    with np.load(path, allow_pickle=False) as z:
        data = {name: z[name] for name in z.files}
    data.update(changes)
    for name in [k for k, v in changes.items() if v is None]:
        del data[name]
    np.savez(path, **data)


@pytest.mark.parametrize("change", [
    {"x": np.arange(4.0).astype(np.float32)},          # a float32 copy
    {"x": np.arange(3.0)},                            # one value fewer
    {"x": np.arange(4.0) + 1e-12},                    # same shape and dtype, other content
    {"y": np.zeros((4, 2))},                          # one column fewer
    {"extra": np.zeros(3)},                           # a field the writer did not write
    {"__sha256__": None},                             # no checksum
    {"__version__": np.asarray("2")},                 # a version of the wrong type
])
def test_edited_entries_are_deleted_and_missed(tmp_path, change):
    # The checksum covers every field's name, dtype, shape and bytes: any
    # edit after save() makes the entry a miss (and deletes it).
    c = Cache(tmp_path)
    path = c.save("k", {"x": np.arange(4.0), "y": np.zeros((4, 3))})
    assert c.load("k", {"x": (4,), "y": (4, 3)}) is not None
    _rewrite(path, **change)
    assert c.load("k", {"x": (None,), "y": (None, None)}) is None
    assert not os.path.exists(path)


def test_named_lengths_must_agree(tmp_path):
    c = Cache(tmp_path)
    c.save("k", {"basis": np.zeros((5, 3)), "kept": np.ones(3, dtype=bool), "other": np.zeros(2)})
    assert c.load("k", {"basis": (5, "p"), "kept": ("p",)}) is not None
    assert c.load("k", {"basis": (5, "p"), "other": ("p",)}) is None  # 3 columns, 2 rows


def test_stored_dtypes(tmp_path):
    c = Cache(tmp_path)
    c.save("k", {"f": np.arange(3, dtype=np.float32), "i": np.arange(3, dtype=np.int32),
                 "b": np.ones(2, dtype=bool), "s": np.asarray("text")})
    got = c.load("k", ["f", "i", "b", "s"])
    assert {k: v.dtype.str[1:] for k, v in got.items()} == {"f": "f8", "i": "i8", "b": "b1", "s": "U4"}
    with pytest.raises(ValueError, match="only float, integer, bool and str are stored"):
        c.save("k", {"c": np.zeros(2, dtype=complex)})


def test_leftover_temporary_files_are_removed(tmp_path):
    # A writer killed outright leaves ".<name>.<pid>-<hex>.overtone-tmp"; a
    # process id that no longer runs marks it as left over.
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True,
                          text=True, check=True).stdout.strip()
    left = tmp_path / f".k.npz.{dead}-0123abcd.overtone-tmp"
    mine = tmp_path / f".k.npz.{os.getpid()}-0123abcd.overtone-tmp"
    left.write_bytes(b"half")
    mine.write_bytes(b"being written")
    Cache(tmp_path)
    assert not left.exists() and mine.exists()


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
