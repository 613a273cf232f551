"""Characters made of separate pieces: find them, pair them, map each to its own.

A mesh object often holds several connected surfaces: a body with eyes,
teeth, a watch, a shell of clothing. Pieces are the connected components of
the cleaned mesh (after exact welding, so a seam split for UVs is not a
piece). The largest piece by area is the *body*; the others are matched to
the other mesh's pieces and every target piece vertex is mapped onto its
counterpart only, so an eye never takes the head's data and a tooth never
takes its neighbour's.

How a target piece finds its counterpart (:func:`match_pieces`):

place
    Every non-body vertex follows the body near it: the body map (a
    correspondence between the two bodies, computed by the caller) gives,
    for the ``TRANSPORT_NEIGHBOURS`` nearest body vertices of a piece
    vertex, where they went; a least-squares rotation plus the body's
    overall scale (per piece vertex) carries the vertex along
    (:func:`follow_body`). In aligned mode the meshes already share a frame
    and pieces are not moved. The carried piece's centroid is compared with
    each source piece's centroid, in units of :data:`PLACE_SCALE` times the
    square root of the source body's area.
size
    The piece's area as a fraction of its body's area (log ratio, in units
    of ``log(SIZE_SCALE)``).
shape
    The piece's own first :data:`SPECTRUM_COUNT` non-zero Laplace-Beltrami
    eigenvalues scaled by its area (scale invariant; mean absolute log
    ratio, in units of :data:`SHAPE_SCALE`).

The squared, scaled terms add up to a cost; the assignment minimising the
total cost (Hungarian method) pairs pieces one-to-one, and a pair costing
more than :data:`UNMATCHED_COST` is no pair: such a target piece has no
counterpart (zero confidence, named in the report), and a source piece no
target piece took is named as unused. A landmark pair joining two pieces
forces that pair.

Each target piece vertex then takes the closest point, on its counterpart's
triangles only, of its carried position. Its confidence is the product of
the body's confidence near it, how well the carried piece lies on the
counterpart (``exp(-(d / 4h)^2)``, ``d`` the distance to the counterpart,
``h`` the larger mean edge length), how clearly this pair beats every
other assignment (:attr:`PieceMatch.clarity`: how much the best assignment's
cost rises when this pair is forbidden) and how cheap the pair is
(``exp(-cost / 8)``).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
import scipy.linalg as sla
import scipy.sparse as sp
from scipy.sparse.linalg import eigsh
from numpy.typing import NDArray
from scipy.spatial import cKDTree

from ..spectra.discretization import mesh_operators
from ..spectra.shape import Shape
from .closest_point import SurfaceLocator
from .confidence import confidence_summary, warning

__all__ = ["Pieces", "PieceMatch", "find_pieces", "piece_spectrum", "follow_body", "match_pieces",
           "correspond_in_pieces", "BodyMatcher"]

if TYPE_CHECKING:
    from .correspondence import Correspondence

Array = NDArray[Any]

TRANSPORT_NEIGHBOURS = 16
"""Body vertices whose motion a piece vertex follows."""

PLACE_SCALE = 0.1
"""Place term unit, as a fraction of the square root of the source body's area."""

SIZE_SCALE = 1.5
"""Size term unit: an area ratio of 1.5 (relative to the body) costs 1."""

SHAPE_SCALE = 0.25
"""Shape term unit: a mean absolute log eigenvalue ratio of 0.25 costs 1."""

SPECTRUM_COUNT = 6
"""Non-zero eigenvalues in a piece's shape signature."""

BODY_SHARE = 0.3
"""The largest piece is a body when it holds at least this share of the area on both sides."""

REGRET_SCALE = 4.0
"""A regret of this many times the transport's precision (the median squared
place residual of the chosen pairs, at least :data:`PLACE_FLOOR` squared) sets
a pair's clarity to ``1 - 1/e``."""

PLACE_FLOOR = 0.05
"""Smallest place residual (in place units) taken as the transport's precision."""

REGRET_LIMIT = 200
"""Above this many target pieces the regret is not measured (clarity 1)."""

UNMATCHED_COST = 9.0
"""A pair costing more than this (three units on one term) is no pair."""

DENSE_LIMIT = 400
"""Pieces up to this many vertices get their spectrum from a dense solve."""

BodyMatcher = Callable[[Shape, Shape, Any], "Correspondence"]
"""``(source_body, target_body, landmarks) -> Correspondence`` between two single-piece shapes;
landmarks are (source, target) vertex pairs in the bodies' input numbering, or None."""


@dataclass(frozen=True)
class Pieces:
    """The connected pieces of a cleaned mesh, largest area first.

    Attributes
    ----------
    label : (n,) int64 array
        Piece of every cleaned vertex; piece 0 is the body (largest area).
    face_label : (m,) int64 array
        Piece of every cleaned triangle.
    area : (p,) float64 array
    centroid : (p, 3) float64 array
        Area-weighted (lumped vertex areas).
    n_vertices : (p,) int64 array
    first_vertex : (p,) int64 array
        Lowest original vertex index of each piece (to name or select it).
    """

    label: Array
    face_label: Array
    area: Array
    centroid: Array
    n_vertices: Array
    first_vertex: Array

    @property
    def count(self) -> int:
        return len(self.area)

    def faces_of(self, piece: int) -> Array:
        """Indices of the cleaned triangles of ``piece``."""
        return np.flatnonzero(self.face_label == piece)

    def vertices_of(self, piece: int) -> Array:
        """Indices of the cleaned vertices of ``piece``."""
        return np.flatnonzero(self.label == piece)


def vertex_areas(vertices: Array, faces: Array) -> Array:
    """Lumped (one third of every incident triangle) area per vertex, (n,)."""
    a = 0.5 * np.linalg.norm(np.cross(vertices[faces[:, 1]] - vertices[faces[:, 0]],
                                      vertices[faces[:, 2]] - vertices[faces[:, 0]]), axis=1)
    return np.bincount(faces.reshape(-1), weights=np.repeat(a / 3.0, 3), minlength=len(vertices))


def find_pieces(shape: Shape) -> Pieces:
    """Connected pieces of ``shape`` (its cleaned, welded mesh), body first."""
    comp = np.asarray(shape.prepared.component, dtype=np.int64)
    n_comp = int(shape.prepared.n_components)
    mass = vertex_areas(shape.vertices, shape.faces)
    area = np.bincount(comp, weights=mass, minlength=n_comp)
    order = np.argsort(-area, kind="stable")
    rank = np.empty(n_comp, dtype=np.int64)
    rank[order] = np.arange(n_comp)
    label = rank[comp]
    area = area[order]
    centroid = np.column_stack([np.bincount(label, weights=mass * shape.vertices[:, d], minlength=n_comp)
                                for d in range(3)]) / np.maximum(area, 1e-300)[:, None]
    first = np.full(n_comp, np.iinfo(np.int64).max, dtype=np.int64)
    np.minimum.at(first, label, np.asarray(shape.prepared.from_clean, dtype=np.int64))
    return Pieces(label=label, face_label=label[shape.faces[:, 0]], area=area, centroid=centroid,
                  n_vertices=np.bincount(label, minlength=n_comp).astype(np.int64), first_vertex=first)


def piece_spectrum(vertices: Array, faces: Array, count: int = SPECTRUM_COUNT) -> Array:
    """The first ``count`` non-zero eigenvalues of one connected piece, times its area.

    Returns a (count,) float64 array; entries past the piece's number of
    vertices minus one repeat its largest eigenvalue.
    """
    used = np.unique(faces)
    index = np.full(len(vertices), -1, dtype=np.int64)
    index[used] = np.arange(len(used))
    v, f = vertices[used], index[faces]
    ops = mesh_operators(v, f, robust="auto")
    n = len(v)
    area = float(ops.mass.sum())
    want = min(count + 1, n)
    if n <= DENSE_LIMIT or want >= n - 1:
        lam = sla.eigh(ops.stiffness.toarray(), np.diag(ops.mass), eigvals_only=True,
                       subset_by_index=[0, want - 1])
    else:
        # a fixed start vector: ARPACK's own draws the next random start in the process,
        # so the same piece could end with another eigenvalue of a near-degenerate cluster
        lam = eigsh(ops.stiffness.tocsc(), k=want, M=sp.diags(ops.mass).tocsc(), sigma=-1e-2 / area,
                    which="LM", return_eigenvectors=False, v0=np.random.default_rng(0).standard_normal(n))
    lam = np.sort(np.abs(lam))[1:] * area
    if len(lam) == 0:
        lam = np.ones(1)
    out: Array = np.concatenate([lam, np.full(max(count - len(lam), 0), lam[-1])])[:count]
    return out


def follow_body(body_target: Array, body_mapped: Array, query: Array, scale: float,
                k: int = TRANSPORT_NEIGHBOURS) -> tuple[Array, Array]:
    """Carry points along with the body: a rotation and scale per point.

    Parameters
    ----------
    body_target : (b, 3) float array
        Body vertices in the target's frame.
    body_mapped : (b, 3) float array
        Where the body map sends them (source frame).
    query : (q, 3) float array
        Points near the target body.
    scale : float
        Source-to-target size ratio (the bodies' sqrt area ratio).
    k : int
        Body vertices each point follows.

    Returns
    -------
    moved : (q, 3) float64 array
        ``mean(mapped) + scale * R (query - mean(body))`` with ``R`` the
        least-squares rotation taking the neighbours' offsets to their
        mapped offsets.
    neighbours : (q, k) int64 array
        The body vertices each point followed.
    """
    k = int(min(k, len(body_target)))
    _, nbr = cKDTree(body_target).query(query, k=k)
    nbr = np.asarray(nbr, dtype=np.int64).reshape(len(query), k)
    b, m = body_target[nbr], body_mapped[nbr]
    bc, mc = b.mean(axis=1), m.mean(axis=1)
    H = np.einsum("nki,nkj->nij", b - bc[:, None], m - mc[:, None])
    u, _, vt = np.linalg.svd(H)
    d = np.sign(np.linalg.det(np.einsum("nij,njk->nik", u, vt)))
    d[d == 0] = 1.0
    vt[:, 2, :] *= d[:, None]
    R = np.einsum("nji,nkj->nik", vt, u)   # V U^T
    moved = mc + scale * np.einsum("nij,nj->ni", R, query - bc)
    return moved, nbr


@dataclass(frozen=True)
class PieceMatch:
    """Target piece -> source piece assignment.

    Attributes
    ----------
    counterpart : (p_t,) int64 array
        Source piece of every target piece, -1 for none (the bodies: 0 -> 0).
    cost : (p_t,) float64 array
        Cost of the chosen pair (``inf`` for none).
    clarity : (p_t,) float64 array in [0, 1]
        How clearly the pair is decided: ``1 - exp(-regret / u)`` with the
        regret the rise of the whole assignment's cost when this pair is
        forbidden and ``u`` :data:`REGRET_SCALE` times the transport's
        precision (the median squared place residual of the chosen pairs).
    costs : (p_t, p_s) float64 array
        All pair costs (body row and column included, infinite off the body pair).
    """

    counterpart: Array
    cost: Array
    clarity: Array
    costs: Array


def match_pieces(ps: Pieces, pt: Pieces, spectra_s: Array, spectra_t: Array,
                 centroid_t: Array, forced: Any = None, *, body: bool = True) -> PieceMatch:
    """Pair target pieces with source pieces (module docstring).

    Parameters
    ----------
    ps, pt : Pieces
    spectra_s, spectra_t : (p_s, c), (p_t, c) float arrays
        Piece signatures (:func:`piece_spectrum`); rows of the bodies unused.
    centroid_t : (p_t, 3) float array
        Target piece centroids carried into the source frame.
    forced : iterable of (target_piece, source_piece), optional
        Pairs fixed by landmarks.
    body : bool
        Piece 0 of each side is the body and pairs with the other body;
        False: every piece is paired by cost, the largest included.
    """
    nt, ns = pt.count, ps.count
    f = 1 if body else 0
    costs = np.full((nt, ns), np.inf)
    place, form = np.zeros((nt, ns)), np.zeros((nt, ns))
    place[f:, f:] = np.linalg.norm(centroid_t[f:, None, :] - ps.centroid[None, f:, :], axis=2) \
        / (PLACE_SCALE * np.sqrt(ps.area[0]))
    rel_t, rel_s = pt.area[f:] / pt.area[0], ps.area[f:] / ps.area[0]
    size = np.abs(np.log(rel_t[:, None] / rel_s[None, :])) / np.log(SIZE_SCALE)
    shape = np.abs(np.log(spectra_t[f:, None, :] / spectra_s[None, f:, :])).mean(axis=2) / SHAPE_SCALE
    form[f:, f:] = size ** 2 + shape ** 2
    costs[f:, f:] = place[f:, f:] ** 2 + form[f:, f:]
    if body:
        costs[0, 0] = 0.0
    for ti, si in forced or ():
        if ti >= f and si >= f:
            costs[ti, :] = np.where(np.arange(ns) == si, 0.0, np.inf)
            costs[:, si] = np.where(np.arange(nt) == ti, 0.0, np.inf)
    counterpart, cost, clarity = np.full(nt, -1, dtype=np.int64), np.full(nt, np.inf), np.ones(nt)
    if body:
        counterpart[0], cost[0] = 0, 0.0
    m = nt - f
    if m and ns > f:
        sub = costs[f:, f:]
        # a "none" column per target piece at the unmatched cost
        padded = np.hstack([np.minimum(sub, 1e12), np.full((m, m), UNMATCHED_COST)])
        from scipy.optimize import linear_sum_assignment   # imported when needed: slow to import
        rows, cols = linear_sum_assignment(padded)
        total = float(padded[rows, cols].sum())
        kept = [(r, c) for r, c in zip(rows, cols) if c < ns - f and sub[r, c] <= UNMATCHED_COST]
        # the transport's precision: the median squared place residual of the pairs
        unit = max(float(np.median([place[r + f, c + f] ** 2 for r, c in kept])) if kept else 0.0,
                   PLACE_FLOOR ** 2)
        for r, c in kept:
            counterpart[r + f], cost[r + f] = c + f, sub[r, c]
            clarity[r + f] = _clarity(padded, r, c, total, REGRET_SCALE * unit)
    return PieceMatch(counterpart=counterpart, cost=cost, clarity=clarity, costs=costs)


def _clarity(padded: Array, r: int, c: int, total: float, unit: float) -> float:
    """``1 - exp(-regret / unit)``, the regret being how much the best assignment's
    cost rises when row ``r`` may not take column ``c``."""
    if padded.shape[0] > REGRET_LIMIT:
        return 1.0
    forbidden = padded.copy()
    forbidden[r, c] = 1e12
    from scipy.optimize import linear_sum_assignment   # imported when needed: slow to import
    rows, cols = linear_sum_assignment(forbidden)
    regret = float(forbidden[rows, cols].sum()) - total
    return float(1.0 - np.exp(-max(regret, 0.0) / unit))


def _piece_landmarks(landmarks: Any, source: Shape, target: Shape, ps: Pieces,
                     pt: Pieces) -> tuple[list[tuple[int, int]] | None, list[tuple[int, int]]]:
    """Split landmark pairs into body pairs (cleaned indices) and forced piece pairs."""
    if landmarks is None or len(landmarks) == 0:
        return None, []
    a = np.asarray(landmarks)
    if a.ndim != 2 or a.shape[1] != 2 or not np.issubdtype(a.dtype, np.integer):
        raise ValueError(f"landmarks must be a list of (source_vertex, target_vertex) integer pairs, "
                         f"got shape {a.shape} and dtype {a.dtype}")
    s, t = source.original_index(a[:, 0]), target.original_index(a[:, 1])
    on_body = (ps.label[s] == 0) & (pt.label[t] == 0)
    body = [(int(i), int(j)) for i, j in zip(s[on_body], t[on_body])]
    forced = sorted({(int(pt.label[j]), int(ps.label[i])) for i, j in zip(s[~on_body], t[~on_body])})
    return (body or None), forced


def _body_shape(shape: Shape, pieces: Pieces) -> tuple[Shape, Array, Array]:
    """The body as its own Shape; its vertices' and triangles' indices in ``shape``."""
    faces = pieces.faces_of(0)
    body = Shape(shape.vertices, shape.faces[faces], cache=shape.cache)
    return body, np.asarray(body.prepared.from_clean, dtype=np.int64), faces[body.prepared.tri_polygon]


def correspond_in_pieces(source: Shape, target: Shape, body_matcher: BodyMatcher, *,
                         landmarks: Any = None, match: str = "auto") -> Correspondence:
    """Correspondence of two meshes made of pieces: bodies by ``body_matcher``, pieces by pairing.

    When either mesh has no body (its largest piece holds less than
    :data:`BODY_SHARE` of its area, say many similar small parts), no body
    map is made: one similarity transform of the whole target onto the
    whole source (:func:`whole_frame`) places every piece, the largest
    included, and all pieces are paired alike.

    Parameters
    ----------
    source, target : Shape
    body_matcher : BodyMatcher
        Maps the target body to the source body (for example
        ``engine.matching.correspondence.correspond`` with the caller's options).
    landmarks : list of (source_vertex, target_vertex), optional
        Original vertex indices; pairs on two bodies go to ``body_matcher``,
        pairs joining two pieces force that pair.
    match : {"auto", "aligned", "intrinsic"}
        Used where there is no body: "aligned" keeps the pieces where they
        are; otherwise :func:`whole_frame` places them.

    Returns
    -------
    Correspondence
        The body's mode, functional map and statistics, with ``stats["pieces"]``
        (:func:`pieces_report`) and the confidence of the module docstring.
    """
    from .correspondence import Correspondence

    ps, pt = find_pieces(source), find_pieces(target)
    body_lm, forced = _piece_landmarks(landmarks, source, target, ps, pt)
    n = target.n_vertices
    tri, bary, conf, near = np.zeros(n, dtype=np.int64), np.zeros((n, 3)), np.zeros(n), np.ones(n)
    has_body = min(ps.area[0] / ps.area.sum(), pt.area[0] / pt.area.sum()) >= BODY_SHARE
    if has_body:
        body_s, _, faces_s = _body_shape(source, ps)
        body_t, verts_t, _ = _body_shape(target, pt)
        cb = body_matcher(body_s, body_t, body_lm)
        tri[verts_t], bary[verts_t], conf[verts_t] = faces_s[cb.triangle], cb.barycentric, cb.confidence
        moved = target.vertices.copy()
        others = np.flatnonzero(pt.label != 0)
        if others.size:
            scale = float(np.sqrt(ps.area[0] / pt.area[0]))
            follow, nbr = follow_body(target.vertices[verts_t], cb.points(), target.vertices[others], scale)
            if cb.mode != "aligned":
                moved[others] = follow
            near[others] = cb.confidence[nbr].mean(axis=1)
        mode, reason, fmap, stats = cb.mode, cb.reason, cb.fmap, dict(cb.stats)
    else:
        moved, residual = (target.vertices, {"moved": False}) if match == "aligned" else whole_frame(source, target)
        moved_any = residual["moved"]
        mode = "intrinsic" if moved_any else "aligned"
        reason = (f"no body (largest piece under {BODY_SHARE:.0%} of the area): pieces placed by "
                  + ("one similarity transform of the whole" if moved_any else "their positions (the meshes overlap)"))
        fmap, stats = np.zeros((1, 1)), {"whole_frame": residual}
    pm = _pair_pieces(source, target, ps, pt, moved, forced, has_body)
    _carry_pieces(source, ps, pt, pm, moved, (tri, bary, conf, near), 0 if has_body else -1)
    stats["pieces"] = pieces_report(ps, pt, pm, conf)
    body_summary = stats.get("confidence", {})
    stats["confidence"] = {**body_summary, **confidence_summary(conf),
                           "body_mean": body_summary.get("mean", round(float(conf[pt.label == 0].mean()), 4))}
    stats["confidence"]["warning"] = "; ".join(w for w in (warning(stats["confidence"]),
                                                          _pieces_warning(stats["pieces"])) if w)
    reason = f"{reason}; {stats['pieces']['summary']}"
    return Correspondence(source, target, mode, reason, tri, bary, conf, fmap, stats)


def _pair_pieces(source: Shape, target: Shape, ps: Pieces, pt: Pieces, moved: Array, forced: Any,
                 has_body: bool) -> PieceMatch:
    """Signatures, carried centroids and :func:`match_pieces`."""
    mass = vertex_areas(target.vertices, target.faces)
    centroid_t = np.column_stack([np.bincount(pt.label, weights=mass * moved[:, d], minlength=pt.count)
                                  for d in range(3)]) / np.maximum(pt.area, 1e-300)[:, None]
    first = 1 if has_body else 0
    spectra_s = np.vstack([np.ones((first, SPECTRUM_COUNT))]
                          + [piece_spectrum(source.vertices, source.faces[ps.faces_of(j)])[None]
                             for j in range(first, ps.count)])
    spectra_t = np.vstack([np.ones((first, SPECTRUM_COUNT))]
                          + [piece_spectrum(target.vertices, target.faces[pt.faces_of(i)])[None]
                             for i in range(first, pt.count)])
    return match_pieces(ps, pt, spectra_s, spectra_t, centroid_t, forced, body=has_body)


def _carry_pieces(source: Shape, ps: Pieces, pt: Pieces, pm: PieceMatch, moved: Array,
                  out: tuple[Array, Array, Array, Array], skip: int) -> None:
    """Closest points of every carried target piece on its counterpart (in place in ``out``)."""
    tri, bary, conf, near = out
    h = max(source.mean_edge, float(np.sqrt(pt.area.sum() / max(len(pt.label), 1))))
    whole = None
    for i in range(pt.count):
        if i == skip:
            continue
        verts = pt.vertices_of(i)
        j = int(pm.counterpart[i])
        if j < 0:
            whole = whole or SurfaceLocator(source.vertices, source.faces)
            cp = whole.closest(moved[verts])
            tri[verts], bary[verts], conf[verts] = cp.triangle, cp.barycentric, 0.0
            continue
        faces_j = ps.faces_of(j)
        cp = SurfaceLocator(source.vertices, source.faces[faces_j]).closest(moved[verts])
        tri[verts], bary[verts] = faces_j[cp.triangle], cp.barycentric
        conf[verts] = (near[verts] * np.exp(-(cp.distance / (4 * h)) ** 2)
                       * pm.clarity[i] * np.exp(-pm.cost[i] / 8.0))


def _similarity(a: Array, b: Array) -> tuple[Array, float, Array]:
    """Least-squares rotation, scale and shift taking points ``a`` to ``b`` (both (k, 3))."""
    ac, bc = a.mean(axis=0), b.mean(axis=0)
    u, sv, vt = np.linalg.svd((a - ac).T @ (b - bc))
    d = np.sign(np.linalg.det(vt.T @ u.T)) or 1.0
    D = np.diag([1.0, 1.0, d])
    R = vt.T @ D @ u.T
    scale = float((sv * np.diag(D)).sum() / max(((a - ac) ** 2).sum(), 1e-300))
    return R, scale, bc - scale * R @ ac


def whole_frame(source: Shape, target: Shape, iterations: int = 8, sample: int = 3000) -> tuple[Array, dict[str, Any]]:
    """Target vertices carried by one similarity transform onto the source.

    Starts: no move, and the four proper rotations between the two meshes'
    principal axes (centroids and areas matched); each refined by
    ``iterations`` rounds of closest-vertex fitting; the start with the
    smallest median closest-vertex distance wins. Returns the moved
    (n_t, 3) vertices and a report (``moved``: whether it is not the
    identity; ``median_distance_over_h``).
    """
    rng = np.random.default_rng(0)
    vt = target.vertices
    pick = rng.choice(len(vt), min(sample, len(vt)), replace=False)
    tree = cKDTree(source.vertices)
    ms, mt = vertex_areas(source.vertices, source.faces), vertex_areas(vt, target.faces)
    cs, ct = ms @ source.vertices / ms.sum(), mt @ vt / mt.sum()
    es = np.linalg.eigh(((source.vertices - cs) * ms[:, None]).T @ (source.vertices - cs))[1]
    et = np.linalg.eigh(((vt - ct) * mt[:, None]).T @ (vt - ct))[1]
    s0 = float(np.sqrt(ms.sum() / mt.sum()))
    starts = [(np.eye(3), 1.0, np.zeros(3))]
    for signs in ((1, 1, 1), (1, -1, -1), (-1, 1, -1), (-1, -1, 1)):
        R = es @ np.diag(signs) @ et.T
        R = R if np.linalg.det(R) > 0 else es @ np.diag(signs) @ np.diag([1, 1, -1]) @ et.T
        starts.append((R, s0, cs - s0 * R @ ct))
    best: tuple[float, Array, float, Array] | None = None
    for R, sc, t in starts:
        for _ in range(iterations):
            q = sc * vt[pick] @ R.T + t
            _, nn = tree.query(q)
            R, sc, t = _similarity(vt[pick], source.vertices[nn])
        dist = float(np.median(tree.query(sc * vt[pick] @ R.T + t)[0]))
        if best is None or dist < best[0] - 1e-12:
            best = (dist, R, sc, t)
    assert best is not None
    dist, R, sc, t = best
    moved = sc * vt @ R.T + t
    shift = float(np.median(np.linalg.norm(moved - vt, axis=1)))
    h = max(source.mean_edge, target.mean_edge)
    return moved, {"moved": bool(shift > h), "median_distance_over_h": round(dist / h, 4)}


def _pieces_warning(report: dict[str, Any]) -> str:
    """A sentence naming target pieces without a counterpart, or ``""``."""
    lost = report["unmatched_target"]
    if not lost:
        return ""
    return (f"{len(lost)} piece(s) found nothing like them on the source (first vertices "
            f"{', '.join(str(e['first_vertex']) for e in lost)}): their data is a guess, confidence 0")


def _describe(p: Pieces, i: int) -> dict[str, Any]:
    return {"piece": i, "vertices": int(p.n_vertices[i]), "first_vertex": int(p.first_vertex[i]),
            "area_of_body": round(float(p.area[i] / p.area[0]), 5),
            "centre": [round(float(x), 5) for x in p.centroid[i]]}


def pieces_report(ps: Pieces, pt: Pieces, pm: PieceMatch, confidence: Array) -> dict[str, Any]:
    """JSON-able summary of the pieces and their pairing.

    Keys: ``source_pieces``, ``target_pieces`` (counts), ``target`` (one
    entry per target piece: ``piece`` index, 0 = body; ``vertices``;
    ``first_vertex`` (lowest original vertex index, to select it); ``area_of_body``;
    ``centre``; ``counterpart`` (source piece index or None); ``cost``;
    ``confidence`` (mean over its vertices)), ``unmatched_target`` and
    ``unused_source`` (lists of the :func:`_describe` entries) and
    ``summary`` (one sentence).
    """
    entries = []
    for i in range(pt.count):
        e = _describe(pt, i)
        j = int(pm.counterpart[i])
        e["counterpart"] = None if j < 0 else j
        e["cost"] = None if j < 0 else round(float(pm.cost[i]), 4)
        e["confidence"] = round(float(confidence[pt.label == i].mean()), 4)
        entries.append(e)
    taken = set(int(j) for j in pm.counterpart if j >= 0)
    unmatched = [e for e in entries if e["counterpart"] is None]
    unused = [_describe(ps, j) for j in range(ps.count) if j not in taken]
    summary = (f"{pt.count - 1} target pieces besides the body, {ps.count - 1} source pieces; "
               f"{pt.count - 1 - len(unmatched)} paired")
    if unmatched:
        summary += f"; no counterpart for target piece(s) {', '.join(str(e['piece']) for e in unmatched)}"
    if unused:
        summary += f"; source piece(s) {', '.join(str(e['piece']) for e in unused)} unused"
    return {"source_pieces": ps.count, "target_pieces": pt.count, "target": entries,
            "unmatched_target": unmatched, "unused_source": unused, "summary": summary}
