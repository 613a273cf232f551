"""Temporary private stand-ins for modules being written in parallel.

Each name here mirrors the contract of a module that lands on main soon
(eigenbasis.py, cache.py).
Everything that uses them imports them through :mod:`engine.shape` so the
switch to the real modules is one import line. Delete this file once they land.
"""

from __future__ import annotations

import hashlib
import json
import os
from dataclasses import dataclass, field

import numpy as np
import scipy.linalg as sla
import scipy.sparse as sp
import scipy.sparse.linalg as spla



# ---------------------------------------------------------------- cache.py
def geometry_key(*arrays, **params) -> str:
    h = hashlib.sha1()
    for a in arrays:
        a = np.ascontiguousarray(a)
        h.update(str((a.dtype.str, a.shape)).encode())
        h.update(a.tobytes())
    h.update(json.dumps(params, sort_keys=True, default=str).encode())
    return h.hexdigest()


class Cache:
    def __init__(self, folder):
        self.folder = os.fspath(folder)
        os.makedirs(self.folder, exist_ok=True)

    def _path(self, key):
        return os.path.join(self.folder, f"{key}.npz")

    def load(self, key):
        p = self._path(key)
        if not os.path.exists(p):
            return None
        with np.load(p) as z:
            return {k: z[k] for k in z.files}

    def save(self, key, arrays):
        np.savez(self._path(key), **arrays)


# ---------------------------------------------------------------- eigenbasis.py
@dataclass(frozen=True)
class Eigenbasis:
    eigenvalues: np.ndarray
    eigenvectors: np.ndarray
    mass: np.ndarray
    residuals: np.ndarray
    info: dict = field(default_factory=dict)

    def project(self, values):
        return self.eigenvectors.T @ (self.mass[:, None] * np.asarray(values).reshape(len(self.mass), -1))

    def reconstruct(self, coefficients):
        return self.eigenvectors @ coefficients


def eigenbasis(stiffness, mass, k, *, seed=0) -> Eigenbasis:
    n = stiffness.shape[0]
    k = int(min(k, n))
    if n <= 1200:
        w, V = sla.eigh(stiffness.toarray(), np.diag(mass))
        w, V = w[:k], V[:, :k]
    else:
        extra = min(n - 1, k + max(4, k // 5))
        v0 = np.random.default_rng(seed).standard_normal(n)
        scale = float(stiffness.diagonal().mean() / mass.mean())
        w, V = spla.eigsh(stiffness.tocsc(), k=extra, M=sp.diags(mass).tocsc(), sigma=-1e-3 * scale,
                          which="LM", v0=v0)
        o = np.argsort(w)[:k]
        w, V = w[o], V[:, o]
    V = V / np.sqrt(np.einsum("ij,i,ij->j", V, mass, V))
    big = np.argmax(np.abs(V), axis=0)
    V = V * np.sign(V[big, np.arange(V.shape[1])])
    w = np.maximum(w, 0.0)
    res = np.linalg.norm(stiffness @ V - (mass[:, None] * V) * w, axis=0) / (
        np.maximum(w, 1) * np.linalg.norm(mass[:, None] * V, axis=0))
    return Eigenbasis(w, V, mass, res, {"method": "interim"})


