"""Characters made of separate pieces, with a known true correspondence.

A character is the creature tube of tests/pairs.py (the body) plus pieces
placed in its rest frame: two eyes on the head, a row of teeth under the
snout (many similar pieces), a thin ring round the tail (an accessory round a
limb) and an open shell over the middle of the body (clothing). Every piece
is generated from its own parameters, so two characters at other resolutions
and triangulations share a rest frame; posing bends the whole rest frame
(pieces follow the body as if attached) and a rigid move places it elsewhere.

:class:`PiecePair` adds per-vertex piece ids to :class:`tests.pairs.Pair`;
the true partner of a target vertex is the nearest rest point of the *same
piece* of the source.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from tests import pairs

EYE_RADIUS = 0.06
TOOTH_RADIUS = 0.022
TEETH = 6


@dataclass
class PiecePair(pairs.Pair):
    source_piece: np.ndarray = None   # type: ignore[assignment]
    target_piece: np.ndarray = None   # type: ignore[assignment]


def sphere(centre, radius, n_lat: int, n_lon: int, *, squash=(1.0, 1.0, 1.0), turn: float = 0.0):
    """UV sphere (ellipsoid with ``squash``): ``n_lat - 1`` rings of ``n_lon`` plus two poles."""
    th = np.arange(1, n_lat) / n_lat * np.pi
    ph = (np.arange(n_lon) + turn) / n_lon * 2 * np.pi
    T, P = np.meshgrid(th, ph, indexing="ij")
    pts = np.column_stack([np.sin(T).ravel() * np.cos(P).ravel(), np.sin(T).ravel() * np.sin(P).ravel(),
                           np.cos(T).ravel()])
    pts = np.vstack([pts, [[0, 0, 1.0], [0, 0, -1.0]]]) * np.asarray(squash)
    nr = n_lat - 1
    idx = np.arange(nr * n_lon).reshape(nr, n_lon)
    a, b = idx[:-1], idx[1:]
    a1, b1 = np.roll(a, -1, axis=1), np.roll(b, -1, axis=1)
    f = [np.column_stack([a.ravel(), b.ravel(), b1.ravel()]), np.column_stack([a.ravel(), b1.ravel(), a1.ravel()]),
         np.column_stack([np.full(n_lon, nr * n_lon), idx[0], np.roll(idx[0], -1)]),
         np.column_stack([np.full(n_lon, nr * n_lon + 1), np.roll(idx[-1], -1), idx[-1]])]
    return centre + radius * pts, np.vstack(f).astype(np.int64)


def grid_faces(rows: int, cols: int, closed_cols: bool, flip: bool = False) -> np.ndarray:
    idx = np.arange(rows * cols).reshape(rows, cols)
    if closed_cols:
        a, b = idx[:-1], idx[1:]
        a1, b1 = np.roll(a, -1, axis=1), np.roll(b, -1, axis=1)
    else:
        a, b, a1, b1 = idx[:-1, :-1], idx[1:, :-1], idx[:-1, 1:], idx[1:, 1:]
    if flip:
        f = [np.column_stack([a.ravel(), b.ravel(), a1.ravel()]), np.column_stack([b.ravel(), b1.ravel(), a1.ravel()])]
    else:
        f = [np.column_stack([a.ravel(), b.ravel(), b1.ravel()]), np.column_stack([a.ravel(), b1.ravel(), a1.ravel()])]
    return np.vstack(f).astype(np.int64)


def ring(x: float, radius: float, thickness: float, n_major: int, n_minor: int, *, turn: float = 0.0):
    """Torus round the x axis at ``x``."""
    u = (np.arange(n_major) + turn) / n_major * 2 * np.pi
    w = np.arange(n_minor) / n_minor * 2 * np.pi
    U, W = np.meshgrid(u, w, indexing="ij")
    r = radius + thickness * np.cos(W)
    pts = np.column_stack([x + thickness * np.sin(W).ravel(), (r * np.cos(U)).ravel(), (r * np.sin(U)).ravel()])
    idx = np.arange(n_major * n_minor).reshape(n_major, n_minor)
    a, b = idx, np.roll(idx, -1, axis=0)
    a1, b1 = np.roll(a, -1, axis=1), np.roll(b, -1, axis=1)
    f = np.vstack([np.column_stack([a.ravel(), b.ravel(), b1.ravel()]),
                   np.column_stack([a.ravel(), b1.ravel(), a1.ravel()])]).astype(np.int64)
    return pts, f


def shell(u0: float, u1: float, grow: float, n_u: int, n_th: int, *, turn: float = 0.0):
    """Open tube over the body between ``u0`` and ``u1``, ``grow`` times its radius."""
    us = np.linspace(u0, u1, n_u)
    ths = (np.arange(n_th) + turn) * 2 * np.pi / n_th
    U, T = np.meshgrid(us, ths, indexing="ij")
    p = pairs._creature_point(U.ravel(), T.ravel())
    p[:, 1:] *= grow
    return p, grid_faces(n_u, n_th, True)


def _surface_out(u: float, th: float, out: float) -> np.ndarray:
    """Rest point ``out`` outside the body surface at (u, theta), along the radial direction."""
    p = pairs._creature_point(np.array([u]), np.array([th]))[0]
    radial = np.array([0.0, np.cos(th), np.sin(th)])
    return p + out * radial


def character(res: float = 1.0, *, seed: int = 0, pieces=("eyes", "teeth", "ring", "shell"), teeth: int = TEETH):
    """Rest-frame character: vertices, faces, piece id per vertex (0 body, 1-2 eyes,
    3.. teeth, then ring, then shell). ``res`` scales every piece's resolution;
    odd seeds turn and jitter the triangulations."""
    turn = 0.37 if seed % 2 else 0.0
    jitter = 0.5 if seed % 2 else 0.0
    n = lambda k: max(4, int(round(k * res)))   # noqa: E731
    vb, fb, _ = pairs.creature(n(40), n(24), offset=turn, jitter=jitter, seed=seed)
    parts = [(vb, fb)]
    if "eyes" in pieces:
        for side in (1, -1):
            c = _surface_out(0.86, np.pi / 2 - side * 0.75, 0.5 * EYE_RADIUS)
            parts.append(sphere(c, EYE_RADIUS, n(8), n(12), turn=turn))
    if "teeth" in pieces:
        for k in range(teeth):
            c = _surface_out(0.83 + 0.132 * k / teeth, -np.pi / 2 + 0.5 * (k % 2 - 0.5) * (teeth > TEETH),
                             0.3 * TOOTH_RADIUS)
            parts.append(sphere(c, TOOTH_RADIUS, max(4, n(5)), max(5, n(7)), squash=(0.6, 0.6, 1.6), turn=turn))
    if "ring" in pieces:
        r_body = float(np.abs(pairs._creature_point(np.full(64, 0.2), np.linspace(0, 2 * np.pi, 64))[:, 1:]).max())
        parts.append(ring(0.6, r_body * 1.12 + 0.03, 0.025, n(28), max(5, n(6)), turn=turn))
    if "shell" in pieces:
        parts.append(shell(0.42, 0.68, 1.12, n(16), n(24), turn=turn))
    verts, faces, label, off = [], [], [], 0
    for i, (v, f) in enumerate(parts):
        verts.append(v)
        faces.append(f + off)
        label.append(np.full(len(v), i, dtype=np.int64))
        off += len(v)
    return np.vstack(verts), np.vstack(faces), np.concatenate(label)


def shuffled(v, f, seed, *rows):
    """Vertices, faces and any per-vertex ``rows`` in a random vertex order."""
    perm = np.random.default_rng(seed).permutation(len(v))
    inv = np.empty_like(perm)
    inv[perm] = np.arange(len(perm))
    return (v[perm], inv[f]) + tuple(r[perm] for r in rows)


def _piece_pair(name, src, tgt, pose, seed, kind="pose") -> PiecePair:
    vs, fs, ls = src
    vt, ft, lt = tgt
    rs, rt = vs.copy(), vt.copy()
    vt, ft, rt, lt = shuffled(pose(vt), ft, seed, rt, lt)
    return PiecePair(name, vs, fs, vt, ft, rs, rt, kind=kind, source_piece=ls, target_piece=lt)


def rolled(n=(40, 24), *, angle: float = np.pi / 2, seed: int = 3) -> pairs.Pair:
    """The creature and a copy turned ``angle`` about its long axis in place, shuffled:
    the two overlap, yet almost every point of the copy is elsewhere on the original."""
    vs, fs, _ = pairs.creature(*n, seed=0)
    c = vs.mean(0)
    vt = pairs.rigid(vs - c, angle=angle, axis=(1, 0, 0)) + c
    vt, ft, rt = shuffled(vt, fs, seed, vs.copy())
    return pairs.Pair("creature-rolled", vs, fs, vt, ft, vs.copy(), rt, kind="wrong")


def blob(n=(24, 36)):
    """A lumpy ball (vertices, faces)."""
    v, f = sphere(np.zeros(3), 1.0, *n)
    r = 1 + 0.15 * np.sin(3 * v[:, 0]) * np.cos(2 * v[:, 1]) + 0.1 * v[:, 2]
    return v * r[:, None], f


def plane(n=30):
    """A gently waved square sheet of ``n`` x ``n`` vertices (vertices, faces)."""
    x, y = np.meshgrid(np.linspace(-1.5, 1.5, n), np.linspace(-1.5, 1.5, n), indexing="ij")
    return np.column_stack([x.ravel(), y.ravel(), 0.1 * np.sin(2 * x.ravel())]), grid_faces(n, n, False)


def character_posed(res_s: float = 1.0, res_t: float = 0.8, *, angle: float = 0.9, move: bool = True,
                    pieces=("eyes", "teeth", "ring", "shell"), teeth: int = TEETH) -> PiecePair:
    """Character vs a bent, remeshed (other resolution and triangulation), moved copy."""
    def pose(v):
        v = pairs.bend(v, angle)
        return pairs.rigid(v, angle=0.9, shift=(4.0, 1.0, -2.0)) if move else v
    return _piece_pair("character-posed", character(res_s, seed=0, pieces=pieces, teeth=teeth),
                       character(res_t, seed=1, pieces=pieces, teeth=teeth), pose, 21)


def character_remeshed(res_s: float = 1.0, res_t: float = 1.3, pieces=("eyes", "teeth", "ring", "shell")) -> PiecePair:
    """Character vs itself at another resolution and triangulation, same place (aligned)."""
    return _piece_pair("character-remeshed", character(res_s, seed=0, pieces=pieces),
                       character(res_t, seed=1, pieces=pieces), lambda v: v, 22, kind="resolution")


def character_turned(res_s: float = 1.0, res_t: float = 0.8, pieces=("eyes", "teeth", "ring", "shell")) -> PiecePair:
    """Character vs a remeshed copy bent slightly, in the same place: overlapping (aligned)."""
    return _piece_pair("character-turned", character(res_s, seed=0, pieces=pieces),
                       character(res_t, seed=1, pieces=pieces), lambda v: pairs.bend(v, 0.25), 23,
                       kind="overlap")


def many_pieces(count: int = 62, *, res=(10, 15), move: bool = True) -> PiecePair:
    """``count`` small spheres (300 triangles each at the default ``res``) on a
    jittered grid, no body; the target is the same set remeshed and moved."""
    rng = np.random.default_rng(5)
    side = int(np.ceil(count ** (1 / 3)))
    cells = np.array([(i, j, k) for i in range(side) for j in range(side) for k in range(side)])[:count]
    centres = cells * 0.5 + rng.uniform(-0.08, 0.08, cells.shape)
    radii = rng.uniform(0.1, 0.18, count)

    def build(n_lat, n_lon, turn):
        vs, fs, ls, off = [], [], [], 0
        for i, (c, r) in enumerate(zip(centres, radii)):
            v, f = sphere(c, r, n_lat, n_lon, turn=turn)
            vs.append(v)
            fs.append(f + off)
            ls.append(np.full(len(v), i))
            off += len(v)
        return np.vstack(vs), np.vstack(fs), np.concatenate(ls)
    src = build(*res, 0.0)
    tgt = build(res[0] + 1, res[1] - 2, 0.3)
    pose = (lambda v: pairs.rigid(v, angle=0.5, shift=(3.0, 0.0, 0.0))) if move else (lambda v: v)
    return _piece_pair("many-pieces", src, tgt, pose, 24, kind="rigid")


def piece_landing(p: PiecePair, c) -> float:
    """Fraction of the target's piece vertices (not the body) whose mapped point's
    heaviest source corner lies on the true piece."""
    corner = c.source.faces[c.triangle, np.argmax(c.barycentric, axis=1)]
    got = p.source_piece[c.source.prepared.from_clean][corner]
    want = p.target_piece[c.target.prepared.from_clean]
    on = want != 0
    return float(np.mean(got[on] == want[on])) if on.any() else 1.0


def map_error(p: pairs.Pair, c) -> np.ndarray:
    """Per cleaned target vertex: distance of the mapped rest point from the true one."""
    pts = np.einsum("ij,ijk->ik", c.barycentric, p.source_rest[c.source.prepared.from_clean][c.source.faces[c.triangle]])
    return np.linalg.norm(pts - p.target_rest[c.target.prepared.from_clean], axis=1)
