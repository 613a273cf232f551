"""An on-disk cache of computed arrays (eigenbases first of all).

Entries are ``.npz`` files named by a key derived from the inputs
(:func:`geometry_key`). They are written atomically (a temporary file in the
same folder, then ``os.replace``) and read with ``allow_pickle=False``. Every
load is validated: the stored key and format version must match, every
requested field must be present with the expected shape, and floating-point
arrays must be finite. A file that fails any check (truncated, corrupted,
written for another key or version) is deleted and reported as a miss, never
trusted and never an exception.
"""

from __future__ import annotations

import hashlib
import os
import zipfile

import numpy as np

from .atomic import atomic_write

__all__ = ["geometry_key", "Cache", "cached_eigenbasis"]

_FORMAT = 1  # bump when the layout of entries changes
_META_KEY = "__key__"
_META_VERSION = "__version__"


def geometry_key(*arrays, **params) -> str:
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


class Cache:
    """A folder of ``.npz`` entries with validation, size accounting and pruning.

    Parameters
    ----------
    folder : str or os.PathLike
        Created if missing.

    Attributes
    ----------
    hits, misses : int
        Counted by :meth:`load` (a rejected file counts as a miss).
    """

    def __init__(self, folder):
        self.folder = os.fspath(folder)
        os.makedirs(self.folder, exist_ok=True)
        self.hits = 0
        self.misses = 0

    def _path(self, key: str) -> str:
        if not isinstance(key, str) or not key or not all(c.isalnum() or c in "-_" for c in key):
            raise ValueError(f"cache key must be a non-empty string of letters, digits, '-' or '_', got {key!r}")
        return os.path.join(self.folder, key + ".npz")

    def load(self, key: str, fields) -> dict | None:
        """The stored arrays, or None on a miss.

        Parameters
        ----------
        key : str
        fields : iterable of str or dict
            Names required in the entry; a dict maps each name to its expected
            shape (a tuple, ``None`` entries matching any length) or to None.

        Returns
        -------
        dict of name -> ndarray, or None
            None when there is no entry or the entry fails validation (it is
            then deleted).
        """
        path = self._path(key)
        shapes = dict(fields) if isinstance(fields, dict) else {f: None for f in fields}
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
    def _read_valid(path, key, shapes):
        try:
            with np.load(path, allow_pickle=False) as z:
                names = set(z.files)
                if _META_KEY not in names or _META_VERSION not in names:
                    return None
                if str(z[_META_KEY]) != key or int(z[_META_VERSION]) != _FORMAT:
                    return None
                out = {}
                for name, shape in shapes.items():
                    if name not in names:
                        return None
                    a = z[name]
                    if shape is not None:
                        if a.ndim != len(shape) or any(s is not None and s != d for s, d in zip(shape, a.shape)):
                            return None
                    if a.dtype.kind in "fc" and not np.isfinite(a).all():
                        return None
                    out[name] = a
                return out
        except (OSError, ValueError, EOFError, KeyError, zipfile.BadZipFile, TypeError):
            return None

    def save(self, key: str, arrays: dict) -> str:
        """Write an entry atomically; returns its path.

        Parameters
        ----------
        key : str
        arrays : dict of name -> array-like
            Names must not start with ``__``; object arrays are refused.
        """
        path = self._path(key)
        data = {}
        for name, a in arrays.items():
            if not isinstance(name, str) or name.startswith("__"):
                raise ValueError(f"field name {name!r} is reserved or not a string")
            a = np.asarray(a)
            if a.dtype == object:
                raise ValueError(f"field {name!r} is an object array; only numeric and string arrays are stored")
            data[name] = a
        data[_META_KEY] = np.asarray(key)
        data[_META_VERSION] = np.asarray(_FORMAT)
        # ".tmp-*.npz": a temporary file a killed process left behind is an
        # entry to _entries, so clear() and prune() remove it
        with atomic_write(path, fsync=True, prefix=".tmp-", suffix=".npz") as fh:
            np.savez(fh, **data)
        return path

    def _entries(self):
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


def cached_eigenbasis(stiffness, mass, k: int, *, cache: Cache | None = None, vertices=None, faces=None,
                      seed: int = 0, tol: float = 1e-8, method: str = "auto", **params):
    """:func:`engine.eigenbasis.eigenbasis` through the cache.

    The key covers the stiffness and mass themselves (so any change of the
    operators is a miss), optionally the vertices and faces, and every option.
    A hit returns arrays identical to those computed and saved.

    Parameters
    ----------
    stiffness, mass, k, seed, tol, method
        As for :func:`engine.eigenbasis.eigenbasis`.
    cache : Cache or None
        None computes without caching.
    vertices : (n, 3) float array, optional
    faces : (m, 3) int array, optional
        Mixed into the key when given.
    **params
        Further str/int/float/bool values mixed into the key (for example the
        Laplacian kind), so that callers can tell entries apart.

    Returns
    -------
    Eigenbasis
        ``info["cache"]`` is ``"hit"``, ``"miss"`` or ``"off"``.
    """
    from ..spectra.eigensolver import Eigenbasis, eigenbasis

    if cache is None:
        basis = eigenbasis(stiffness, mass, k, seed=seed, tol=tol, method=method)
        basis.info["cache"] = "off"
        return basis
    arrays = [stiffness, np.asarray(mass, dtype=np.float64)]
    if vertices is not None:
        arrays.append(np.asarray(vertices))
    if faces is not None:
        arrays.append(np.asarray(faces))
    key = geometry_key(*arrays, k=int(k), seed=int(seed), tol=float(tol), method=str(method),
                       kind="eigenbasis", **params)
    n = int(np.asarray(mass).shape[0])
    got = cache.load(key, {"eigenvalues": (k,), "eigenvectors": (n, k), "mass": (n,), "residuals": (k,),
                           "method": ()})
    if got is not None:
        info = {"method": str(got["method"]), "cache": "hit", "key": key}
        return Eigenbasis(got["eigenvalues"], got["eigenvectors"], got["mass"], got["residuals"], info)
    basis = eigenbasis(stiffness, mass, k, seed=seed, tol=tol, method=method)
    cache.save(key, {"eigenvalues": basis.eigenvalues, "eigenvectors": basis.eigenvectors,
                     "mass": basis.mass, "residuals": basis.residuals, "method": np.asarray(basis.info["method"])})
    basis.info["cache"] = "miss"
    basis.info["key"] = key
    return basis
