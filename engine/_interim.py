"""Temporary private stand-ins for modules being written in parallel.

Each name here mirrors the contract of a module that lands on main soon
(eigenbasis.py, cache.py, products.py, descriptors.py).
Everything that uses them imports them through :mod:`engine.shape` so the
switch to the real modules is one import line. Delete this file once they land.
"""

from __future__ import annotations

import hashlib
import json
import os
from dataclasses import dataclass, field
from itertools import combinations_with_replacement

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


# ---------------------------------------------------------------- products.py
@dataclass(frozen=True)
class ProductBasis:
    basis: np.ndarray
    kept: np.ndarray
    exponents: np.ndarray
    coefficients: np.ndarray


def product_exponents(K, order):
    rows = []
    for d in range(order + 1):
        for combo in combinations_with_replacement(range(K), d):
            e = np.zeros(K, np.int64)
            for c in combo:
                e[c] += 1
            rows.append(e)
    return np.array(rows)


def raw_products(eigenvectors, exponents):
    out = np.ones((eigenvectors.shape[0], len(exponents)))
    for j, e in enumerate(exponents):
        for i in np.flatnonzero(e):
            out[:, j] *= eigenvectors[:, i] ** e[i]
    return out


def orthogonal_products(eigenvectors, mass, order, *, K=None, tol=1e-8) -> ProductBasis:
    K = eigenvectors.shape[1] if K is None else K
    ex = product_exponents(K, order)
    raw = raw_products(eigenvectors[:, :K], ex)
    s = np.sqrt(mass)[:, None]
    Q, R, piv = sla.qr(raw * s, mode="economic", pivoting=True)
    d = np.abs(np.diag(R))
    r = int(np.sum(d > tol * d[0]))
    basis = Q[:, :r] / s
    coef = np.zeros((r, raw.shape[1]))
    coef[:, piv] = R[:r]
    return ProductBasis(basis, np.sort(piv[:r]), ex, coef)


# ---------------------------------------------------------------- descriptors.py
def _default_times(eigenvalues, count):
    lam = eigenvalues[eigenvalues > 1e-9 * max(eigenvalues[-1], 1e-300)]
    t_min, t_max = 4 * np.log(10) / lam[-1], 4 * np.log(10) / lam[0]
    return np.geomspace(t_min, t_max, count)


def heat_kernel_signature(eigenvalues, eigenvectors, times=None, *, count=16):
    times = _default_times(eigenvalues, count) if times is None else np.asarray(times, float)
    return (eigenvectors ** 2) @ np.exp(-np.outer(eigenvalues, times))


def wave_kernel_signature(eigenvalues, eigenvectors, energies=None, *, count=16, sigma=7.0):
    lam = np.maximum(eigenvalues, 1e-12)
    log_l = np.log(lam[1:] if eigenvalues[0] < 1e-9 * eigenvalues[-1] else lam)
    if energies is None:
        energies = np.linspace(log_l[0], log_l[-1] / 1.02, count)
    s = sigma * (energies[1] - energies[0]) if len(energies) > 1 else 1.0
    w = np.exp(-((energies[None, :] - np.log(lam)[:, None]) ** 2) / (2 * s * s))
    if eigenvalues[0] < 1e-9 * eigenvalues[-1]:
        w[0] = 0
    desc = (eigenvectors ** 2) @ w
    return desc / np.maximum(w.sum(axis=0), 1e-300)


def heat_kernel_rows(eigenvalues, eigenvectors, idx, times):
    idx = np.atleast_1d(np.asarray(idx))
    times = np.atleast_1d(np.asarray(times, float))
    out = []
    for t in times:
        out.append(eigenvectors @ (np.exp(-eigenvalues * t)[:, None] * eigenvectors[idx].T))
    return np.concatenate(out, axis=1)
