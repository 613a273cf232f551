"""Small generated meshes for tests: analytic shapes with known spectra."""

from __future__ import annotations

import functools

import numpy as np


@functools.lru_cache(maxsize=None)
def icosphere(subdivisions: int = 3) -> tuple[np.ndarray, np.ndarray]:
    """Unit icosphere: 10 * 4**s + 2 vertices (s=5 gives 10,242)."""
    t = (1 + 5 ** 0.5) / 2
    v = np.array([[-1, t, 0], [1, t, 0], [-1, -t, 0], [1, -t, 0], [0, -1, t], [0, 1, t],
                  [0, -1, -t], [0, 1, -t], [t, 0, -1], [t, 0, 1], [-t, 0, -1], [-t, 0, 1]], float)
    f = np.array([[0, 11, 5], [0, 5, 1], [0, 1, 7], [0, 7, 10], [0, 10, 11], [1, 5, 9], [5, 11, 4],
                  [11, 10, 2], [10, 7, 6], [7, 1, 8], [3, 9, 4], [3, 4, 2], [3, 2, 6], [3, 6, 8],
                  [3, 8, 9], [4, 9, 5], [2, 4, 11], [6, 2, 10], [8, 6, 7], [9, 8, 1]])
    v /= np.linalg.norm(v, axis=1, keepdims=True)
    for _ in range(subdivisions):
        edges = np.sort(np.concatenate([f[:, [0, 1]], f[:, [1, 2]], f[:, [2, 0]]]), axis=1)
        uniq, inv = np.unique(edges, axis=0, return_inverse=True)
        inv = inv.ravel()
        mid = v[uniq[:, 0]] + v[uniq[:, 1]]
        mid /= np.linalg.norm(mid, axis=1, keepdims=True)
        base = v.shape[0]
        v = np.vstack([v, mid])
        m = len(f)
        a, b, c = inv[:m] + base, inv[m:2 * m] + base, inv[2 * m:] + base
        f = np.vstack([np.column_stack([f[:, 0], a, c]), np.column_stack([f[:, 1], b, a]),
                       np.column_stack([f[:, 2], c, b]), np.column_stack([a, b, c])])
    return v, f.astype(np.int64)


def grid(nx: int = 40, ny: int = 20, a: float = 2.0, b: float = 1.0, *, jitter: float = 0.0,
         seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Flat a x b rectangle triangulated from an nx x ny grid of quads."""
    xs, ys = np.meshgrid(np.linspace(0, a, nx + 1), np.linspace(0, b, ny + 1), indexing="ij")
    v = np.column_stack([xs.ravel(), ys.ravel(), np.zeros(xs.size)])
    if jitter:
        rng = np.random.default_rng(seed)
        interior = (xs.ravel() > 0) & (xs.ravel() < a) & (ys.ravel() > 0) & (ys.ravel() < b)
        v[interior, :2] += jitter * rng.uniform(-1, 1, (interior.sum(), 2)) * np.array([a / nx, b / ny])
    idx = np.arange((nx + 1) * (ny + 1)).reshape(nx + 1, ny + 1)
    q0, q1, q2, q3 = idx[:-1, :-1].ravel(), idx[1:, :-1].ravel(), idx[1:, 1:].ravel(), idx[:-1, 1:].ravel()
    f = np.vstack([np.column_stack([q0, q1, q2]), np.column_stack([q0, q2, q3])])
    return v, f.astype(np.int64)


def noisy_sphere(subdivisions: int = 3, amount: float = 0.05, seed: int = 1):
    v, f = icosphere(subdivisions)
    rng = np.random.default_rng(seed)
    r = 1 + amount * rng.standard_normal(len(v))
    return v * r[:, None], f


def by_name(name: str):
    return {"icosphere": lambda: icosphere(3), "grid": lambda: grid(20, 10),
            "noisy_sphere": lambda: noisy_sphere(3)}[name]()
