"""An on-disk cache of computed arrays (eigenbases first of all).

Entries are ``.npz`` files named by a key derived from the inputs
(:func:`geometry_key`). They are written atomically (:mod:`engine.common.atomic`)
and read with ``allow_pickle=False``. Every load is validated field by field:
exactly the meta fields (key, format version, content checksum), the stored
key and version must match, the sha256 of the fields' names, dtypes, shapes
and bytes must equal the checksum, every requested field must be present with
the stored dtypes (float64, int64, bool, str) and the expected shape (lengths
shared between fields by name), and floating-point arrays must be finite. A
file that fails any check (truncated, corrupted, edited, written for another
key or version) is deleted and reported as a miss, so the caller recomputes
it; never trusted and never an exception.
"""

from __future__ import annotations

import hashlib
import os
import zipfile

from typing import Any

import numpy as np
from numpy.typing import NDArray

from collections.abc import Iterable, Mapping

from .atomic import atomic_write, remove_leftovers

__all__ = ["geometry_key", "Cache", "FieldSpec"]

_FORMAT = 2  # bump when the layout of entries changes (2: content checksum, float64/int64 fields)
_META_KEY = "__key__"
_META_VERSION = "__version__"
_META_DIGEST = "__sha256__"


def geometry_key(*arrays: Any, **params: str | int | float | bool | None) -> str:
    """Stable sha256 hex digest of arrays and parameters.

    Parameters
    ----------
    *arrays : array-likes or scipy sparse matrices
        Hashed with their dtype, shape and C-order bytes (sparse matrices by
        their CSR arrays).
    **params : str, int, float, bool or None
        Hashed in sorted order of their names, with their ``repr``.

    Returns
    -------
    str
        64 hexadecimal characters; equal inputs give equal keys in every run.
    """
    h = hashlib.sha256()
    h.update(f"overtone-cache-{_FORMAT}".encode())
    for a in arrays:
        if hasattr(a, "tocsr") and hasattr(a, "nnz"):
            c = a.tocsr()
            c.sum_duplicates()
            c.sort_indices()
            parts = [np.asarray(c.shape), c.indptr.astype(np.int64), c.indices.astype(np.int64), c.data]
            h.update(b"sparse")
        else:
            parts = [np.asarray(a)]
        for x in parts:
            if x.dtype == object:
                raise ValueError("geometry_key cannot hash object arrays")
            x = np.ascontiguousarray(x)
            h.update(f"{x.dtype.str}{x.shape}".encode())
            h.update(x.tobytes())
    for name in sorted(params):
        value = params[name]
        if not isinstance(value, (str, int, float, bool, type(None))):
            raise ValueError(f"parameter {name!r} must be a str, int, float, bool or None, "
                             f"got {type(value).__name__}")
        h.update(f"|{name}={value!r}".encode())
    return h.hexdigest()


FieldSpec = tuple[int | str | None, ...] | None


def _content_digest(arrays: dict[str, NDArray[Any]]) -> str:
    """sha256 over every field's name, dtype, shape and bytes, in name order."""
    h = hashlib.sha256()
    for name in sorted(arrays):
        a = np.ascontiguousarray(arrays[name])
        h.update(f"{name}|{a.dtype.str}|{a.shape}|".encode())
        h.update(a.tobytes())
    return h.hexdigest()


def _stored_form(name: object, value: object) -> NDArray[Any]:
    """A field as it is stored: floats as float64, integers as int64."""
    if not isinstance(name, str) or not name or name.startswith("__"):
        raise ValueError(f"field name {name!r} is reserved or not a string")
    a = np.asarray(value)
    if a.dtype == object:
        raise ValueError(f"field {name!r} is an object array; only numeric and string arrays are stored")
    if a.dtype.kind == "f":
        return a.astype(np.float64)
    if a.dtype.kind in "iu":
        return a.astype(np.int64)
    if a.dtype.kind in "bU":
        return a
    raise ValueError(f"field {name!r} has dtype {a.dtype}; only float, integer, bool and str are stored")


def _fits(a: NDArray[Any], shape: FieldSpec, sizes: dict[str, int]) -> bool:
    """Whether ``a`` has the stored dtypes and the requested shape; named sizes must agree."""
    if a.dtype.kind == "f" and a.dtype != np.float64 or a.dtype.kind in "iu" and a.dtype != np.int64:
        return False
    if a.dtype.kind not in "fiubU" or a.dtype.kind == "u":
        return False
    if a.dtype.kind == "f" and not np.isfinite(a).all():
        return False
    if shape is None:
        return True
    if a.ndim != len(shape):
        return False
    for want, got in zip(shape, a.shape):
        if isinstance(want, str):
            if sizes.setdefault(want, got) != got:
                return False
        elif want is not None and want != got:
            return False
    return True


class Cache:
    """A folder of ``.npz`` entries with validation, size accounting and pruning.

    Parameters
    ----------
    folder : str or os.PathLike
        Created if missing. Temporary files of killed writers are removed.

    Attributes
    ----------
    hits, misses : int
        Counted by :meth:`load` (a rejected file counts as a miss).
    """

    def __init__(self, folder: str | os.PathLike[str]) -> None:
        self.folder = os.fspath(folder)
        os.makedirs(self.folder, exist_ok=True)
        remove_leftovers(self.folder)
        self.hits = 0
        self.misses = 0

    def _path(self, key: str) -> str:
        if not isinstance(key, str) or not key or not all(c.isalnum() or c in "-_" for c in key):
            raise ValueError(f"cache key must be a non-empty string of letters, digits, '-' or '_', got {key!r}")
        return os.path.join(self.folder, key + ".npz")

    def load(self, key: str, fields: Iterable[str] | Mapping[str, FieldSpec]) -> dict[str, NDArray[Any]] | None:
        """The stored arrays, or None on a miss.

        Parameters
        ----------
        key : str
        fields : iterable of str or dict
            Names required in the entry; a dict maps each name to its expected
            shape or to None. A shape is a tuple whose entries are a length,
            ``None`` (any length) or a name: every dimension with the same
            name must have the same length in all fields.

        Returns
        -------
        dict of name -> ndarray, or None
            None when there is no entry or the entry fails validation (it is
            then deleted). Valid entries hold exactly the fields saved, each
            float64, int64, bool or str, with the content checksum written
            by :meth:`save`.
        """
        path = self._path(key)
        shapes = dict(fields) if isinstance(fields, Mapping) else {f: None for f in fields}
        if not os.path.exists(path):
            self.misses += 1
            return None
        out = self._read_valid(path, key, shapes)
        if out is None:
            self.misses += 1
            try:
                os.remove(path)
            except OSError:
                pass
            return None
        self.hits += 1
        try:
            os.utime(path)  # recently used entries survive pruning longer
        except OSError:
            pass
        return out

    @staticmethod
    def _read_valid(path: str, key: str, shapes: dict[str, FieldSpec]) -> dict[str, NDArray[Any]] | None:
        try:
            with np.load(path, allow_pickle=False) as z:
                stored = {name: z[name] for name in z.files}
        except (OSError, ValueError, EOFError, KeyError, zipfile.BadZipFile, TypeError, MemoryError,
                RuntimeError, AttributeError, IndexError, UnicodeError):
            return None
        meta = {name: stored.pop(name) for name in list(stored) if name.startswith("__")}
        if set(meta) != {_META_KEY, _META_VERSION, _META_DIGEST}:
            return None
        if any(a.shape != () or a.dtype.kind not in "Ui" for a in meta.values()):
            return None
        if str(meta[_META_KEY]) != key or meta[_META_VERSION].dtype.kind != "i" \
                or int(meta[_META_VERSION]) != _FORMAT:
            return None
        if not set(shapes) <= set(stored) or _content_digest(stored) != str(meta[_META_DIGEST]):
            return None
        sizes: dict[str, int] = {}
        if not all(_fits(stored[name], shape, sizes) for name, shape in shapes.items()):
            return None
        return {name: stored[name] for name in shapes}

    def save(self, key: str, arrays: Mapping[str, object]) -> str:
        """Write an entry atomically; returns its path.

        Parameters
        ----------
        key : str
        arrays : dict of name -> array-like
            Names must not start with ``__``; floats are stored as float64,
            integers as int64; object arrays are refused.
        """
        path = self._path(key)
        data = {name: _stored_form(name, a) for name, a in arrays.items()}
        digest = _content_digest(data)
        data[_META_KEY] = np.asarray(key)
        data[_META_VERSION] = np.asarray(_FORMAT, dtype=np.int64)
        data[_META_DIGEST] = np.asarray(digest)
        with atomic_write(path) as fh:
            np.savez(fh, **data)
        return path

    def _entries(self) -> list[tuple[float, int, str]]:
        out = []
        for name in os.listdir(self.folder):
            if name.endswith(".npz"):
                p = os.path.join(self.folder, name)
                try:
                    st = os.stat(p)
                except OSError:
                    continue
                out.append((st.st_mtime, st.st_size, p))
        return out

    def size_bytes(self) -> int:
        """Total size of the entries in bytes."""
        return int(sum(s for _, s, _ in self._entries()))

    def clear(self) -> int:
        """Delete every entry; returns how many were deleted."""
        n = 0
        for _, _, p in self._entries():
            try:
                os.remove(p)
                n += 1
            except OSError:
                pass
        return n

    def prune(self, max_bytes: int) -> int:
        """Delete the oldest entries (by modification time) until the total is
        at most ``max_bytes``; returns how many were deleted."""
        if max_bytes < 0:
            raise ValueError(f"max_bytes must be non-negative, got {max_bytes}")
        entries = sorted(self._entries())
        total = sum(s for _, s, _ in entries)
        n = 0
        for _, size, p in entries:
            if total <= max_bytes:
                break
            try:
                os.remove(p)
            except OSError:
                continue
            total -= size
            n += 1
        return n
