"""Mesh pairs with a known true correspondence, for tests and benchmarks.

Every pair gives both meshes in their own poses plus a *rest* position per
vertex in one common frame, where corresponding points coincide. The true
partner of target vertex ``i`` is the point of the source's rest surface
nearest ``target_rest[i]`` (exactly on it for the parametric pairs, since both
are sampled from the same parametric surface). Colours and masks are functions
of the rest position, so their true values on the target are known.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np


@dataclass
class Pair:
    name: str
    source_vertices: np.ndarray
    source_faces: np.ndarray
    target_vertices: np.ndarray
    target_faces: np.ndarray
    source_rest: np.ndarray
    target_rest: np.ndarray
    landmarks: list = field(default_factory=list)
    kind: str = "pose"   # pose | resolution | rigid | proportion | overlap (aligned, not the same surface)


# ---------------------------------------------------------------- signals
def colour(rest: np.ndarray, scale: float = 1.0) -> np.ndarray:
    """Smooth RGB pattern (values in [0, 1]) of rest positions, ~2-3 waves across."""
    p = rest / scale
    r = 0.5 + 0.5 * np.sin(2.1 * p[:, 0] + 1.3 * p[:, 1] + 0.3)
    g = 0.5 + 0.5 * np.sin(1.7 * p[:, 1] - 2.3 * p[:, 2] + 1.1)
    b = 0.5 + 0.5 * np.cos(1.9 * p[:, 2] + 1.2 * p[:, 0] - 0.4)
    return np.column_stack([r, g, b])


def mask(rest: np.ndarray, scale: float = 1.0) -> np.ndarray:
    """Boolean region: a slab of the rest frame."""
    p = rest / scale
    return np.sin(1.5 * p[:, 0] + 0.8 * p[:, 2]) > 0.2


# ---------------------------------------------------------------- rig weights
def rig(uv, bones: int = 11, keep: int = 4) -> np.ndarray:
    """(n, bones) linear-blend skinning weights of the body coordinate u (uv[:, 0]):
    bones evenly along the body, a Gaussian falloff, the ``keep`` largest kept
    and divided by their sum (at most 4 influences summing to 1 is common
    practice for game-engine skinning)."""
    u = np.asarray(uv)[:, 0]
    centres = (np.arange(bones) + 0.5) / bones
    raw = np.exp(-((u[:, None] - centres[None]) / (1.2 / bones)) ** 2)
    np.put_along_axis(raw, np.argsort(-raw, axis=1)[:, keep:], 0.0, axis=1)
    return raw / raw.sum(axis=1, keepdims=True)


def rest_scale(pair: Pair) -> float:
    """Frame scale for the signals: a third of the rest bounding-box diagonal."""
    r = pair.source_rest
    return float(np.linalg.norm(r.max(0) - r.min(0)) / 3.0 / np.pi * 2)


# ---------------------------------------------------------------- parametric creature
def _creature_point(u, th):
    """Rest position of an asymmetric closed tube ("creature") at (u, theta)."""
    base = 0.38 * np.sqrt(np.clip(np.sin(np.pi * u), 0, None)) * (1.0 + 0.45 * u)
    dth = np.angle(np.exp(1j * (th - np.pi / 2)))
    bump = 0.35 * np.exp(-((u - 0.8) ** 2) / 0.004 - dth ** 2 / 0.25)      # a nose on top
    fin = 0.25 * np.exp(-((u - 0.35) ** 2) / 0.01 - np.angle(np.exp(1j * (th + np.pi / 2))) ** 2 / 0.15)
    r = base * (1 + bump + fin)
    return np.column_stack([3.0 * u, r * np.cos(th), r * np.sin(th)])


def creature(n_u: int, n_th: int, *, offset: float = 0.0, jitter: float = 0.0, seed: int = 0):
    """Closed creature tube: ``n_u - 1`` rings of ``n_th`` vertices plus two poles.

    ``offset`` turns the rings by a fraction of a step; ``jitter`` moves the
    parameters randomly (a fraction of a step) so the triangulation differs.
    Returns vertices, faces and the (u, theta) parameters.
    """
    rng = np.random.default_rng(seed)
    us = np.arange(1, n_u) / n_u
    ths = (np.arange(n_th) + offset) * 2 * np.pi / n_th
    U, T = np.meshgrid(us, ths, indexing="ij")
    if jitter:
        U = U + jitter * rng.uniform(-0.5, 0.5, U.shape) / n_u
        T = T + jitter * rng.uniform(-0.5, 0.5, T.shape) * 2 * np.pi / n_th
    U, T = U.ravel(), T.ravel()
    params = np.column_stack([np.concatenate([U, [0.0, 1.0]]), np.concatenate([T, [0.0, 0.0]])])
    v = _creature_point(params[:, 0], params[:, 1])
    nr = n_u - 1
    idx = np.arange(nr * n_th).reshape(nr, n_th)
    a, b = idx[:-1], idx[1:]
    a1, b1 = np.roll(a, -1, axis=1), np.roll(b, -1, axis=1)
    if seed % 2:
        quads = [np.column_stack([a.ravel(), b.ravel(), b1.ravel()]), np.column_stack([a.ravel(), b1.ravel(), a1.ravel()])]
    else:
        quads = [np.column_stack([a.ravel(), b.ravel(), a1.ravel()]), np.column_stack([b.ravel(), b1.ravel(), a1.ravel()])]
    p0, p1 = nr * n_th, nr * n_th + 1
    first, last = idx[0], idx[-1]
    caps = [np.column_stack([np.full(n_th, p0), np.roll(first, -1), first]),
            np.column_stack([np.full(n_th, p1), last, np.roll(last, -1)])]
    f = np.vstack(quads + caps).astype(np.int64)
    return v, f, params


def bend(points: np.ndarray, angle: float, *, length: float = 3.0) -> np.ndarray:
    """Bend along x into an arc of total ``angle`` (radians), in the x-y plane."""
    if angle == 0:
        return points.copy()
    k = angle / length
    phi = k * (points[:, 0] - length / 2)
    rad = 1 / k - points[:, 1]
    return np.column_stack([rad * np.sin(phi), 1 / k - rad * np.cos(phi), points[:, 2]])


def twist(points: np.ndarray, angle: float, *, length: float = 3.0) -> np.ndarray:
    """Twist about the x axis by ``angle`` radians over ``length``."""
    a = angle * (points[:, 0] / length - 0.5)
    c, s = np.cos(a), np.sin(a)
    return np.column_stack([points[:, 0], c * points[:, 1] - s * points[:, 2], s * points[:, 1] + c * points[:, 2]])


def rigid(points: np.ndarray, *, angle: float = 0.7, axis=(0.3, 1.0, 0.2), scale: float = 1.0,
          shift=(0.0, 0.0, 0.0)) -> np.ndarray:
    axis = np.asarray(axis, float) / np.linalg.norm(axis)
    K = np.array([[0, -axis[2], axis[1]], [axis[2], 0, -axis[0]], [-axis[1], axis[0], 0]])
    R = np.eye(3) + np.sin(angle) * K + (1 - np.cos(angle)) * K @ K
    return scale * points @ R.T + np.asarray(shift)


def _shuffle(v, f, rest, seed):
    perm = np.random.default_rng(seed).permutation(len(v))
    inv = np.empty_like(perm)
    inv[perm] = np.arange(len(v))
    return v[perm], inv[f], rest[perm]


def landmarks_by_rest(pair: Pair, count: int = 7) -> list:
    """(source, target) vertex pairs: farthest-point samples of the target's
    rest positions and the source vertex nearest each in the rest frame."""
    from scipy.spatial import cKDTree
    r = pair.target_rest
    chosen = [int(np.argmax(r[:, 0]))]
    d = np.linalg.norm(r - r[chosen[0]], axis=1)
    for _ in range(count - 1):
        chosen.append(int(np.argmax(d)))
        d = np.minimum(d, np.linalg.norm(r - r[chosen[-1]], axis=1))
    _, s = cKDTree(pair.source_rest).query(r[chosen])
    return [(int(a), int(b)) for a, b in zip(s, chosen)]


def creature_pose(*, source=(40, 24), target=(30, 20), angle=np.pi * 0.8, move=True, landmarks=7,
                  seed=3) -> Pair:
    """Straight creature vs a bent one, other resolution and triangulation, moved away, shuffled."""
    vs, fs, _ = creature(*source, seed=0)
    vt, ft, _ = creature(*target, offset=0.37, jitter=0.6, seed=1)
    rs, rt = vs.copy(), vt.copy()
    vt = bend(vt, angle)
    if move:
        vt = rigid(vt, angle=0.9, shift=(4.0, 1.0, -2.0))
    vt, ft, rt = _shuffle(vt, ft, rt, seed)
    p = Pair("creature-pose", vs, fs, vt, ft, rs, rt, kind="pose")
    if landmarks:
        p.landmarks = landmarks_by_rest(p, landmarks)
    return p


def creature_resolution(*, source=(40, 24), target=(60, 36), seed=4) -> Pair:
    """Same creature, same place, two resolutions and triangulations (aligned)."""
    vs, fs, _ = creature(*source, seed=0)
    vt, ft, _ = creature(*target, offset=0.41, jitter=0.5, seed=1)
    rs, rt = vs.copy(), vt.copy()
    vt, ft, rt = _shuffle(vt, ft, rt, seed)
    return Pair("creature-resolution", vs, fs, vt, ft, rs, rt, kind="resolution")


def creature_proportion(*, source=(40, 24), target=(34, 22), landmarks=7, seed=5) -> Pair:
    """Creature vs a stretched, thickened and twisted variant (not an isometry)."""
    vs, fs, _ = creature(*source, seed=0)
    vt, ft, _ = creature(*target, offset=0.25, jitter=0.5, seed=1)
    rs, rt = vs.copy(), vt.copy()
    x = vt[:, 0] / 3.0
    grow = 1.0 + 0.6 * x                        # thicker towards the head
    vt = np.column_stack([vt[:, 0] * 1.3, vt[:, 1] * grow, vt[:, 2] * grow * 0.8])
    vt = twist(vt, 1.2, length=3.9)
    vt = bend(vt, 0.8, length=3.9)
    vt, ft, rt = _shuffle(vt, ft, rt, seed)
    p = Pair("creature-proportion", vs, fs, vt, ft, rs, rt, kind="proportion")
    if landmarks:
        p.landmarks = landmarks_by_rest(p, landmarks)
    return p


def creature_thicker(*, source=(40, 24), target=(52, 30), thicken=0.12, seed=15) -> Pair:
    """Creature vs a variant in the same place with a thinner tail and a thicker
    head (radius times ``1 - thicken`` at the tail to ``1 + thicken`` at the
    head), other resolution and triangulation: the surfaces overlap (aligned)
    but are not the same surface."""
    vs, fs, _ = creature(*source, seed=0)
    vt, ft, par = creature(*target, offset=0.3, jitter=0.5, seed=1)
    rs, rt = vs.copy(), vt.copy()
    g = 1.0 + thicken * (2.0 * par[:, 0] - 1.0)
    vt = np.column_stack([vt[:, 0], vt[:, 1] * g, vt[:, 2] * g])
    vt, ft, rt = _shuffle(vt, ft, rt, seed)
    return Pair("creature-thicker", vs, fs, vt, ft, rs, rt, kind="overlap")


def creature_reposed(*, source=(40, 24), target=(34, 22), angle=0.3, turn=0.4, seed=16) -> Pair:
    """Creature vs a slightly bent (``angle`` radians over its length) and
    twisted (``turn``) variant in the same place, other resolution and
    triangulation: the surfaces overlap (aligned) but are not the same surface."""
    vs, fs, _ = creature(*source, seed=0)
    vt, ft, _ = creature(*target, offset=0.2, jitter=0.5, seed=1)
    rs, rt = vs.copy(), vt.copy()
    vt = bend(twist(vt, turn), angle) + np.array([1.5, 0.0, 0.0])   # bend() centres x on 0
    vt, ft, rt = _shuffle(vt, ft, rt, seed)
    return Pair("creature-reposed", vs, fs, vt, ft, rs, rt, kind="overlap")


def hairpin(points: np.ndarray, pinch: float, *, tail_pinch: float | None = None, radius: float = 0.45,
            length: float = 3.0) -> np.ndarray:
    """Fold along x (``0 .. length``) into a hairpin in the x-y plane: a half
    circle of ``radius`` in the middle and two straight arms, each pushed
    toward the other by ``pinch`` over the first half of its length (a
    smoothstep, so the centre line stays smooth) and parallel to the other
    beyond; the tail arm (small x) by ``tail_pinch`` if given."""
    s, yl, z = points[:, 0], points[:, 1], points[:, 2]
    s0, s1 = length / 2 - np.pi * radius / 2, length / 2 + np.pi * radius / 2

    def push(t, amount):
        x = np.clip(t / (0.5 * s0), 0.0, 1.0)
        return amount * x * x * (3.0 - 2.0 * x)

    out = np.empty_like(points)
    phi = np.clip((s - s0) / radius, 0.0, np.pi)
    mid = (s >= s0) & (s <= s1)
    cx, cy = radius * np.sin(phi), radius - radius * np.cos(phi)
    out[mid, 0] = cx[mid] - yl[mid] * np.sin(phi[mid])
    out[mid, 1] = cy[mid] + yl[mid] * np.cos(phi[mid])
    tail, head = s < s0, s > s1
    t = s0 - s[tail]
    out[tail, 0] = -t
    out[tail, 1] = yl[tail] + push(t, pinch if tail_pinch is None else tail_pinch)
    t = s[head] - s1
    out[head, 0] = -t
    out[head, 1] = 2 * radius - yl[head] - push(t, pinch)
    out[:, 2] = z
    return out


def creature_pinched(*, source=(48, 28), target=(40, 24), thin=0.6, pinch=0.16, more=0.2, seed=18) -> Pair:
    """A thinner creature folded into a hairpin whose arms nearly touch, against
    the same fold with one arm pressed ``more`` closer to the other, other
    resolution and triangulation, in the same place: across the narrow gap
    between the arms the closest point of one arm can lie on the other."""
    vs, fs, _ = creature(*source, seed=0)
    vt, ft, _ = creature(*target, offset=0.35, jitter=0.5, seed=1)
    rs, rt = vs.copy(), vt.copy()
    sq = np.array([1.0, thin, thin])
    vs = hairpin(vs * sq, pinch)
    vt = hairpin(vt * sq, pinch, tail_pinch=pinch + more)
    vt, ft, rt = _shuffle(vt, ft, rt, seed)
    return Pair("creature-pinched", vs, fs, vt, ft, rs, rt, kind="overlap")


def creature_rigid(*, size=(30, 20)) -> Pair:
    """The same mesh under a rotation and uniform scale, shuffled: identity map expected."""
    v, f, _ = creature(*size, seed=0)
    vt = rigid(v, angle=2.1, scale=1.7, shift=(3, -2, 1))
    vt2, ft, rt = _shuffle(vt, f, v.copy(), 9)
    return Pair("creature-rigid", v, f, vt2, ft, v.copy(), rt, kind="rigid")


# ---------------------------------------------------------------- open data (tests/refdata.py)
def _read(name):
    from engine.intake.files import read_mesh
    from tests import refdata
    m = read_mesh(refdata.path(name))
    return m.vertices, m.triangles()


def _along_y(fn, v, *args, **kw):
    """Apply a deformation written for the x axis along y of a mesh spanning y in [-0.5, 0.5]."""
    sw = np.column_stack([v[:, 1] + 0.5, v[:, 0], v[:, 2]])
    out = fn(sw, *args, length=1.0, **kw)
    return np.column_stack([out[:, 1], out[:, 0] - 0.5, out[:, 2]])


def cow_rigid() -> Pair:
    """pymeshlab's cow.obj against CGAL's cow.off: the same faces, vertices under a
    rotation and uniform scale (docs/platform.md). Every vertex must map to itself."""
    vs, fs = _read("cow_cgal")
    vt, ft = _read("cow_pymeshlab")
    vt, ft, rt = _shuffle(vt, ft, vs.copy(), 11)
    return Pair("cow-rigid", vs, fs, vt, ft, vs.copy(), rt, kind="rigid")


def elephant_resolution() -> Pair:
    """CGAL elephant (2.8k) and refined_elephant (44k): the same object remeshed, one frame."""
    vs, fs = _read("elephant")
    vt, ft = _read("refined_elephant")
    vt, ft, rt = _shuffle(vt, ft, vt.copy(), 12)
    return Pair("elephant-resolution", vs, fs, vt, ft, vs.copy(), rt, kind="resolution")


def elephant_deformed(*, amplitude=2.0) -> Pair:
    """CGAL elephant (2.8k) against refined_elephant (44k) under a smooth
    displacement, each coordinate by up to ``amplitude`` mean edge lengths of
    the coarse mesh (about one wave across the model; at 2, up to 3.2 edge
    lengths in all and edge lengths changed by -8% to +11% at the 1st and 99th
    percentiles), in the same place: aligned, not the same surface."""
    vs, fs = _read("elephant")
    vt, ft = _read("refined_elephant")
    rt = vt.copy()
    a = amplitude * np.linalg.norm(vs[fs] - vs[np.roll(fs, 1, axis=1)], axis=2).mean()
    x, y, z = vt.T
    vt = vt + a * np.column_stack([np.sin(2.3 * y + 1.1 * z + 0.4), np.sin(2.9 * z - 1.7 * x + 1.3),
                                   np.sin(2.1 * x + 2.6 * y - 0.8)])
    vt, ft, rt = _shuffle(vt, ft, rt, 17)
    return Pair("elephant-deformed", vs, fs, vt, ft, vs.copy(), rt, kind="overlap")


def elephant_bent(*, landmarks=7) -> Pair:
    """CGAL elephant against a bent, twisted, moved and shuffled copy of itself."""
    vs, fs = _read("elephant")
    vt = _along_y(twist, _along_y(bend, vs, 1.2), 0.9)
    vt = rigid(vt, angle=1.3, shift=(2.0, 0.5, 0.0))
    vt, ft, rt = _shuffle(vt, fs.copy(), vs.copy(), 13)
    p = Pair("elephant-bent", vs, fs, vt, ft, vs.copy(), rt, kind="pose")
    if landmarks:
        p.landmarks = landmarks_by_rest(p, landmarks)
    return p


def elephant_proportion(*, landmarks=7) -> Pair:
    """CGAL elephant against a stretched, thinned, twisted copy (other proportions)."""
    vs, fs = _read("elephant")
    vt = vs * np.array([0.8, 1.4, 1.1]) * (1 + 0.5 * (vs[:, 1:2] + 0.5))
    vt = _along_y(twist, np.column_stack([vt[:, 0], vt[:, 1] / 1.4, vt[:, 2]]), 0.8)
    vt = rigid(vt, angle=0.4, shift=(0.0, 0.0, 2.0))
    vt, ft, rt = _shuffle(vt, fs.copy(), vs.copy(), 14)
    p = Pair("elephant-proportion", vs, fs, vt, ft, vs.copy(), rt, kind="proportion")
    if landmarks:
        p.landmarks = landmarks_by_rest(p, landmarks)
    return p


def landmark_warp(p: Pair) -> np.ndarray:
    """Baseline: source vertices moved by a thin-plate-spline warp through the
    landmarks (scipy RBFInterpolator), to be followed by closest points."""
    from scipy.interpolate import RBFInterpolator
    s = np.array([a for a, _ in p.landmarks])
    t = np.array([b for _, b in p.landmarks])
    warp = RBFInterpolator(p.source_vertices[s], p.target_vertices[t], kernel="thin_plate_spline", degree=1)
    return warp(p.source_vertices)
