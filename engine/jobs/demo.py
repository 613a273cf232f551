"""The built-in demo: a painted salamander-like creature and a re-posed copy.

The creature is a closed tube around a centre curve, with a round head, a
tapering tail and small scale bumps. Because every vertex is generated from
body coordinates ``(u, v)`` (``u`` along the body from snout to tail tip, ``v``
around it), the true correspondence between two generated copies is known
exactly, whatever their pose, resolution or triangulation: the demo and the
accuracy benchmarks use it as ground truth.

Everything here is made up by this module: no external data.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..common.arrays import Array, ArrayLike

__all__ = ["Creature", "creature", "creature_signals"]


@dataclass(frozen=True)
class Creature:
    """A generated creature mesh.

    Attributes
    ----------
    vertices : (n, 3) float64
    faces : (m, 3) int64
    uv : (n, 2) float64
        Body coordinates of every vertex: ``u`` in [0, 1] snout to tail,
        ``v`` in [0, 1) around the body (the poles have v = 0).
    """

    vertices: Array
    faces: Array
    uv: Array


def _radius(u: Array) -> Array:
    # round head (u < 0.25), neck, body, tapering tail; zero at both tips so
    # the ends close like the poles of a sphere
    head = 0.30 * np.sqrt(np.clip(np.sin(np.pi * np.clip(u / 0.26, 0, 1)), 0, None))
    body = 0.24 * np.sqrt(np.clip(np.sin(np.pi * np.clip((u - 0.18) / 0.82, 0, 1)), 0, None)) \
        * (1 - 0.55 * np.clip((u - 0.45) / 0.55, 0, 1))
    return np.asarray(np.maximum(head, body))


def _centre_curve(u: Array, curl: float) -> tuple[Array, Array]:
    """Points and unit tangents of the body's centre curve (length 3)."""
    length = 3.0
    s = u * length
    # curvature grows towards the tail; ``curl`` is the total turning angle
    kappa = curl * (2.0 * u) / length
    theta = np.concatenate([[0.0], np.cumsum(0.5 * (kappa[1:] + kappa[:-1]) * np.diff(s))])
    tangent = np.column_stack([np.cos(theta), np.sin(theta), np.zeros_like(theta)])
    pts = np.concatenate([[[0.0, 0.0, 0.0]], np.cumsum(0.5 * (tangent[1:] + tangent[:-1]) * np.diff(s)[:, None], axis=0)])
    return pts, tangent


def creature(rings: int = 60, segments: int = 32, *, curl: float = 0.0, twist_offset: bool = False,
             bumps: float = 0.012, shuffle_seed: int | None = None,
             offset: tuple[float, float, float] = (0.0, 0.0, 0.0)) -> Creature:
    """Generate the creature.

    Parameters
    ----------
    rings, segments : int
        Resolution along and around the body. Different values give a
        different vertex count and triangulation of the same creature.
    curl : float
        Total bending angle of the body in radians (0 = straight). The
        bending is nearly isometric: a re-posed copy.
    twist_offset : bool
        Rotate every other ring by half a segment, which changes the
        triangulation pattern.
    bumps : float
        Height of the scale bumps (fine surface detail), relative units.
    shuffle_seed : int or None
        Shuffle the vertex order.
    offset : 3 floats
        Translation in space.
    """
    if rings < 3 or segments < 3:
        raise ValueError(f"rings and segments must be at least 3, got {rings} and {segments}")
    u = np.linspace(0.0, 1.0, rings + 2)[1:-1]
    v = np.arange(segments) / segments
    uu, vv = np.meshgrid(u, v, indexing="ij")
    if twist_offset:
        vv = vv + (np.arange(rings)[:, None] % 2) * (0.5 / segments)
    uv = np.column_stack([uu.ravel(), vv.ravel() % 1.0])
    uv = np.vstack([[0.0, 0.0], uv, [1.0, 0.0]])
    vertices = body_point(uv, curl=curl, bumps=bumps)

    idx = 1 + np.arange(rings * segments).reshape(rings, segments)
    nxt = np.roll(idx, -1, axis=1)
    parts: list[Array] = []
    a, b, c, d = idx[:-1], nxt[:-1], nxt[1:], idx[1:]
    if twist_offset:
        parts.append(np.column_stack([a.ravel(), d.ravel(), b.ravel()]))
        parts.append(np.column_stack([b.ravel(), d.ravel(), c.ravel()]))
    else:
        parts.append(np.column_stack([a.ravel(), d.ravel(), c.ravel()]))
        parts.append(np.column_stack([a.ravel(), c.ravel(), b.ravel()]))
    last = rings * segments + 1
    parts.append(np.column_stack([np.zeros(segments, int), idx[0], nxt[0]]))
    parts.append(np.column_stack([np.full(segments, last), nxt[-1], idx[-1]]))
    faces = np.vstack(parts).astype(np.int64)
    # outward orientation: flip all if the signed volume is negative
    e1 = vertices[faces[:, 1]] - vertices[faces[:, 0]]
    e2 = vertices[faces[:, 2]] - vertices[faces[:, 0]]
    if np.einsum("ij,ij->", vertices[faces[:, 0]], np.cross(e1, e2)) < 0:
        faces = faces[:, [0, 2, 1]]
    if shuffle_seed is not None:
        perm = np.random.default_rng(shuffle_seed).permutation(len(vertices))
        inverse = np.empty_like(perm)
        inverse[perm] = np.arange(len(perm))
        vertices, uv, faces = vertices[perm], uv[perm], inverse[faces]
    return Creature(vertices + np.asarray(offset, float), faces, uv)


def body_point(uv: ArrayLike, *, curl: float = 0.0, bumps: float = 0.012) -> Array:
    """Position of body coordinates ``uv`` (k, 2) on the creature posed by ``curl``."""
    uv = np.asarray(uv, dtype=np.float64)
    u, v = uv[:, 0], uv[:, 1]
    fine = np.linspace(0, 1, 2001)
    pts, tan = _centre_curve(fine, curl)
    centre = np.column_stack([np.interp(u, fine, pts[:, i]) for i in range(3)])
    t = np.column_stack([np.interp(u, fine, tan[:, i]) for i in range(3)])
    t /= np.linalg.norm(t, axis=1, keepdims=True)
    up = np.array([0.0, 0.0, 1.0])
    side = np.cross(up, t)
    side /= np.linalg.norm(side, axis=1, keepdims=True)
    r = _radius(u) * (1.0 + 0.15 * np.cos(2 * np.pi * v) * (u > 0.3))  # a flatter belly
    r = r * (1.0 + bumps / 0.25 * _scales(u, v))
    angle = 2 * np.pi * v
    return np.asarray(centre + r[:, None] * (np.cos(angle)[:, None] * up + np.sin(angle)[:, None] * side))


def _scales(u: Array, v: Array) -> Array:
    # an egg-crate lattice of small bumps and dimples (zero mean, so the
    # bumps do not inflate the overall shape), fading out at the tips
    fade = np.sin(np.pi * np.clip(u, 0, 1)) ** 2
    return np.asarray(fade * np.cos(2 * np.pi * 40 * u) * np.cos(2 * np.pi * 16 * v))


def creature_signals(uv: ArrayLike) -> dict[str, Array]:
    """The demo's painted data, as functions of body coordinates.

    Returns
    -------
    dict with
        ``"tint"`` (n, 3) linear RGB in [0, 1]: dark back, pale belly, stripes
        and a pink head; ``"dirt"`` (n,) float in [0, 1], a grime mask that
        builds up on the belly and tail; ``"head"`` (n,) float weight in
        [0, 1], a smooth head influence for a head bone; ``"stripe_id"`` (n,)
        int labels of the stripes (0 = none).
    """
    uv = np.asarray(uv, dtype=np.float64)
    u, v = uv[:, 0], uv[:, 1]
    back = 0.5 + 0.5 * np.cos(2 * np.pi * v)  # 1 on the back (v=0), 0 on the belly
    stripe_phase = (u - 0.3) / 0.08
    stripe = (np.abs(np.sin(np.pi * stripe_phase)) < 0.35) & (u > 0.3) & (u < 0.9)
    dark = np.array([0.05, 0.12, 0.04])
    pale = np.array([0.85, 0.75, 0.35])
    orange = np.array([0.9, 0.35, 0.05])
    pink = np.array([0.8, 0.3, 0.4])
    tint = back[:, None] * dark + (1 - back[:, None]) * pale
    tint = np.where(stripe[:, None], orange, tint)
    head = np.clip((0.25 - u) / 0.08, 0, 1)
    head = head * head * (3 - 2 * head)  # smoothstep
    tint = (1 - head[:, None]) * tint + head[:, None] * pink
    dirt = np.clip((1 - back) * (0.3 + 0.7 * u), 0, 1)
    stripe_id = np.where(stripe, np.floor(stripe_phase).astype(np.int64) + 1, 0)
    return {"tint": np.clip(tint, 0, 1), "dirt": dirt, "head": head, "stripe_id": stripe_id}
