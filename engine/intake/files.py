"""Reading and writing mesh files: PLY, OBJ and OFF in, PLY out.

Polygons are kept as the file has them (a flat corner list and a size per
polygon); :meth:`MeshData.triangles` triangulates on request. PLY vertex
properties other than the position travel with their file dtype, so a file
read and written again is bit-for-bit the same data. Large files are read
and written a chunk at a time (PLY bodies by :mod:`engine.intake.ply_stream`,
OBJ in pieces that end at line ends), so neither holds the file's bytes whole.

Format sources: PLY as described by Greg Turk, "The PLY Polygon File Format"
(1994) (from memory): an ASCII header (``ply``, ``format ascii|
binary_little_endian|binary_big_endian 1.0``, ``element NAME COUNT``,
``property TYPE NAME``, ``property list COUNT_TYPE ITEM_TYPE NAME``,
``comment``/``obj_info`` lines, ``end_header``) followed by the elements in
header order, one record per element item (one line per record in ASCII).
OBJ: Wavefront's ``v`` / ``f`` records with 1-based or negative (relative)
indices and ``v/vt/vn`` corner tokens (from memory). OFF: the Geomview format
(optional ``[C][N]OFF`` keyword, then vertex, face and edge counts, vertex
lines, then face lines ``k i_1 .. i_k [colour]``; ``#`` starts a comment)
(from memory).
"""

from __future__ import annotations

import itertools
import os
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import IO, Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ..common.atomic import atomic_write
from .ply_stream import (CHUNK_BYTES, AsciiBody, BinaryBody, Element, FormatError, Plan, ascii_records,
                         binary_records, is_number)
from .triangulation import triangulate
from .preparation import validate_polygons, validate_vertices

__all__ = ["MeshData", "read_mesh", "write_ply", "ply_chunks"]

# PLY scalar type names (both the original names and the sized aliases).
_PLY_TYPES = {
    "char": "i1", "int8": "i1", "uchar": "u1", "uint8": "u1",
    "short": "i2", "int16": "i2", "ushort": "u2", "uint16": "u2",
    "int": "i4", "int32": "i4", "uint": "u4", "uint32": "u4",
    "float": "f4", "float32": "f4", "double": "f8", "float64": "f8",
}
# numpy dtype -> PLY name written.
_WRITE_TYPES = {"i1": "char", "u1": "uchar", "i2": "short", "u2": "ushort",
                "i4": "int", "u4": "uint", "f4": "float", "f8": "double"}
_GROUPS = {"color": ("red", "green", "blue", "alpha"), "normal": ("nx", "ny", "nz")}


@dataclass(frozen=True)
class MeshData:
    """What a mesh file holds.

    Attributes
    ----------
    vertices : (n, 3) float64 array
    corners : (c,) int64 array
        Polygon corners, one polygon after another, as in the file.
    sizes : (f,) int64 array
        Corners per polygon.
    properties : dict of str to (n,) or (n, k) array
        Every other PLY vertex property with its file dtype (native byte
        order). ``red green blue [alpha]`` become one ``"color"`` entry of
        shape (n, 3) or (n, 4); ``nx ny nz`` become ``"normal"`` (n, 3). Empty
        for OBJ and OFF.
    tris : (t, 3) int64 array or None
        The polygons' triangles (vertex indices) when the application that
        holds the mesh already computed them; None for files.
    tri_polygon : (t,) int64 array or None
        The polygon of each of ``tris``; None with it.
    """

    vertices: NDArray[Any]
    corners: NDArray[Any]
    sizes: NDArray[Any]
    properties: dict[str, NDArray[Any]] = field(default_factory=dict)
    tris: NDArray[Any] | None = None
    tri_polygon: NDArray[Any] | None = None

    def triangles(self) -> NDArray[Any]:
        """The polygons as triangles, (t, 3) int64: ``tris`` when given, else by
        ``engine.intake.triangulation``."""
        if self.tris is not None:
            return self.tris
        return triangulate(self.vertices, self.corners, self.sizes)[0]

    def given_triangles(self) -> tuple[NDArray[Any], NDArray[Any]] | None:
        """``(tris, tri_polygon)`` when both are given, for ``prepare_mesh(triangles=...)``."""
        if self.tris is None or self.tri_polygon is None:
            return None
        return self.tris, self.tri_polygon


# ---------------------------------------------------------------- reading

def read_mesh(path: str | os.PathLike[str], *, chunk_bytes: int = CHUNK_BYTES) -> MeshData:
    """Read a ``.ply``, ``.obj`` or ``.off`` file.

    Parameters
    ----------
    path : str or os.PathLike
    chunk_bytes : int
        How much of a PLY or OBJ file is read at a time. PLY records go
        straight into the final arrays, so reading holds little more than
        them; OBJ pieces are joined at the end.

    Returns
    -------
    MeshData

    Raises
    ------
    ValueError
        Naming the file and the problem: unknown format, truncated data, a
        face index out of range, missing x/y/z, an unsupported property type.
    OSError
        When the file cannot be opened.
    """
    path = Path(path)
    ext = path.suffix.lower()
    if ext not in (".ply", ".obj", ".off"):
        raise ValueError(f"{path.name}: unknown mesh format {ext!r} (expected .ply, .obj or .off)")
    try:
        if ext == ".off":
            vertices, corners, sizes, props = _read_off(path.read_bytes())
        else:
            with open(path, "rb") as fh:
                vertices, corners, sizes, props = (_read_ply if ext == ".ply" else _read_obj)(fh, chunk_bytes)
    except FormatError as e:
        raise ValueError(f"{path.name}: {e}") from None
    if corners.size and (corners.min() < 0 or corners.max() >= len(vertices)):
        bad = corners[(corners < 0) | (corners >= len(vertices))][0]
        raise ValueError(f"{path.name}: face index {int(bad)} out of range for {len(vertices)} vertices")
    if not np.isfinite(vertices).all():
        i = int(np.flatnonzero(~np.isfinite(vertices).all(axis=1))[0])
        raise ValueError(f"{path.name}: vertex {i} has a non-finite coordinate {vertices[i].tolist()}")
    return MeshData(vertices=vertices, corners=corners, sizes=sizes, properties=props)


_BOM = b"\xef\xbb\xbf"  # UTF-8 byte-order mark (Unicode standard, section 23.8, from memory)


_Parts = tuple[NDArray[Any], NDArray[Any], NDArray[Any], dict[str, NDArray[Any]]]


def _read_header(fh: IO[bytes]) -> tuple[list[str], bytes]:
    """The header's lines (without ``end_header``) and the body bytes read with them.

    ``end_header`` counts only as a line of its own, so a comment that
    mentions it does not end the header.
    """
    data = fh.read(1 << 16)
    start = len(_BOM) if data.startswith(_BOM) else 0
    if not data.startswith(b"ply", start):
        raise FormatError("not a PLY file (it does not start with 'ply')")
    at = start
    while True:
        nl = data.find(b"\n", at)
        if nl < 0:
            more = fh.read(max(1 << 16, len(data)))  # doubling: a long header costs linear time
            if more:
                data += more
                continue
            if data[at:].strip() != b"end_header":
                raise FormatError("PLY header has no 'end_header' line")
            body = len(data)
            break
        if data[at:nl].strip() == b"end_header":
            body = nl + 1
            break
        at = nl + 1
    try:
        header = data[start:at].decode("ascii")
    except UnicodeDecodeError:
        raise FormatError("PLY header is not ASCII text") from None
    return header.splitlines(), data[body:]


def _parse_header(lines: list[str]) -> tuple[str, list[Element]]:
    fmt = None
    elements: list[Element] = []
    for number, raw in enumerate(lines[1:], 2):
        words = raw.split()
        if not words or words[0] in ("comment", "obj_info"):
            continue
        if words[0] == "format":
            if len(words) < 2 or words[1] not in ("ascii", "binary_little_endian", "binary_big_endian"):
                raise FormatError(f"unsupported PLY format line {raw.strip()!r}")
            fmt = words[1]
        elif words[0] == "element":
            if len(words) != 3 or not words[2].isdigit():
                raise FormatError(f"bad element line {raw.strip()!r} (header line {number})")
            elements.append(Element(words[1], int(words[2])))
        elif words[0] == "property":
            if not elements:
                raise FormatError(f"property before any element (header line {number})")
            if len(words) >= 2 and words[1] == "list":
                if len(words) != 5:
                    raise FormatError(f"bad property line {raw.strip()!r} (header line {number})")
                ctype, itype = (_ply_type(t, number) for t in words[2:4])
                if ctype[0] == "f":
                    raise FormatError(f"list count type {words[2]!r} is not an integer type (header line {number})")
                elements[-1].props.append((words[4], itype, ctype))
            else:
                if len(words) != 3:
                    raise FormatError(f"bad property line {raw.strip()!r} (header line {number})")
                elements[-1].props.append((words[2], _ply_type(words[1], number)))
        else:
            raise FormatError(f"unexpected PLY header line {raw.strip()!r} (header line {number})")
    if fmt is None:
        raise FormatError("PLY header has no format line")
    return fmt, elements


def _ply_type(name: str, number: int) -> str:
    if name not in _PLY_TYPES:
        raise FormatError(f"unsupported property type {name!r} (header line {number})")
    return _PLY_TYPES[name]


def _read_ply(fh: IO[bytes], chunk: int) -> _Parts:
    lines, start = _read_header(fh)
    fmt, elements = _parse_header(lines)
    vertex = next((e for e in elements if e.name == "vertex"), None)
    if vertex is None:
        raise FormatError("PLY file has no vertex element")
    face = next((e for e in elements if e.name == "face"), None)
    plans = {id(vertex): _vertex_plan(vertex)}
    key = ""
    if face is not None:
        plans[id(face)], key = _face_plan(face)
    unread = os.fstat(fh.fileno()).st_size - fh.tell()
    # ASCII values become Python objects of several times their bytes while parsed: smaller steps
    body: AsciiBody | BinaryBody = AsciiBody(fh, start, unread, max(1, chunk // 8)) if fmt == "ascii" else \
        BinaryBody(fh, start, unread, "<" if fmt == "binary_little_endian" else ">", chunk)
    read: dict[int, dict[str, Any]] = {}
    for e in elements:
        read[id(e)] = body.element(e, plans.get(id(e)))
    body.check_end()
    props = read[id(vertex)]
    vertices = props.pop("vertices")
    corners = np.zeros(0, np.int64)
    sizes = np.zeros(0, np.int64)
    if face is not None:
        corners, sizes = read[id(face)][key]
        if np.issubdtype(corners.dtype, np.floating):
            raise FormatError("face vertex indices have a floating-point type")
        corners = corners.astype(np.int64, copy=False)
        if sizes.size and sizes.min() < 3:
            i = int(np.argmin(sizes))
            raise FormatError(f"face {i} has {int(sizes[i])} corners, at least 3 needed")
    return vertices, corners, sizes, props


def _vertex_plan(e: Element) -> Plan:
    """x, y, z into one (n, 3) float64 array; every other scalar property with its file dtype.

    ``red green blue [alpha]`` become one ``"color"`` array and ``nx ny nz``
    one ``"normal"`` array when all members are present with one dtype; the
    group takes the place of its first member, so writing the result back
    keeps the order. List properties of vertices (neighbour lists and the
    like) cannot be carried: skipped. A repeated name: the last one counts.
    """
    last = {p[0]: i for i, p in enumerate(e.props)}
    scalars = {name: i for name, i in last.items() if len(e.props[i]) == 2}
    missing = [c for c in ("x", "y", "z") if c not in scalars]
    if missing:
        raise FormatError(f"vertex element has no {'/'.join(missing)} property")
    plan = Plan()
    plan.arrays["vertices"] = (3, np.dtype(np.float64))
    for col, c in enumerate(("x", "y", "z")):
        plan.scalars[scalars[c]] = ("vertices", col)
    codes = {name: e.props[i][1] for name, i in scalars.items() if name not in ("x", "y", "z")}
    members: dict[str, str] = {}
    for group, parts in _GROUPS.items():
        have = [p for p in parts if p in codes]
        if group not in codes and all(p in codes for p in parts[:3]) and len({codes[p] for p in have}) == 1:
            members.update({p: group for p in have})
    for name, code in codes.items():
        joined = members.get(name)
        if joined is None:
            plan.arrays[name] = (None, np.dtype(code))
            plan.scalars[scalars[name]] = (name, None)
            continue
        kept = [p for p in _GROUPS[joined] if members.get(p) == joined]
        plan.arrays.setdefault(joined, (len(kept), np.dtype(code)))
        plan.scalars[scalars[name]] = (joined, kept.index(name))
    return plan


def _face_plan(e: Element) -> tuple[Plan, str]:
    """The face element's vertex index list (``vertex_indices`` or ``vertex_index``), and its name."""
    last = {p[0]: i for i, p in enumerate(e.props)}
    key = next((k for k in ("vertex_indices", "vertex_index") if k in last), None)
    if key is None:
        raise FormatError("face element has no vertex_indices (or vertex_index) list property")
    if len(e.props[last[key]]) != 3:
        raise FormatError(f"face property {key!r} is a single number, not a list of vertex indices")
    plan = Plan()
    plan.lists.add(last[key])
    return plan, key


def _decode(data: bytes) -> str:
    """Text of an OBJ or OFF file; a UTF-8 byte-order mark is dropped."""
    return data.decode("utf-8-sig", errors="replace")


def _indices(flat: list[str]) -> NDArray[Any]:
    """Face index tokens as int64; a token that is no whole number, or beyond int64, is refused."""
    try:
        return np.array(flat, dtype=np.int64) if flat else np.zeros(0, np.int64)
    except (ValueError, OverflowError):
        bad = next((t for t in flat if not is_number(t.encode(), "i") or abs(int(t)) >= 2 ** 63), flat[0])
        raise FormatError(f"bad face index {bad!r} (not a whole number, or out of range)") from None


def _text_pieces(fh: IO[bytes], chunk: int) -> Iterator[str]:
    """A text file's contents in pieces that end at line ends; a UTF-8 byte-order mark is dropped."""
    tail, first = b"", True
    while True:
        data = fh.read(max(chunk, 1))
        if not data:
            if tail or first:
                yield tail.decode("utf-8-sig" if first else "utf-8", errors="replace")
            return
        data = tail + data
        cut = data.rfind(b"\n") + 1  # a UTF-8 newline byte is never part of another character
        if cut:
            yield data[:cut].decode("utf-8-sig" if first else "utf-8", errors="replace")
            first = False
        tail = data[cut:]


def _read_obj(fh: IO[bytes], chunk: int) -> _Parts:
    """OBJ vertices and faces, a piece of the file at a time; the pieces' arrays are joined at the end."""
    pieces: list[tuple[NDArray[Any], NDArray[Any], NDArray[Any]]] = []
    number = count = 0  # lines and vertices before the piece
    for text in _text_pieces(fh, chunk):
        piece, lines = _obj_piece(text, number, count)
        pieces.append(piece)
        number += lines
        count += len(piece[0])
    if not count:
        raise FormatError("no vertex ('v') lines")
    vertices = np.concatenate([p[0] for p in pieces])
    corners = np.concatenate([p[1] for p in pieces])
    sizes = np.concatenate([p[2] for p in pieces])
    return vertices, corners, sizes, {}


def _obj_piece(text: str, before: int, count: int) -> tuple[tuple[NDArray[Any], NDArray[Any], NDArray[Any]], int]:
    """Vertices (m, 3), corners and sizes of the ``v`` and ``f`` lines of ``text``, which follows ``before``
    lines and ``count`` vertices; and how many lines it has."""
    vlines: list[str] = []
    flines: list[str] = []
    fbase: list[int] = []
    fnumber: list[int] = []
    lines = text.splitlines()
    for number, line in enumerate(lines, before + 1):
        line = line.split("#", 1)[0]  # a trailing comment
        if line[:2] == "v " or line[:2] == "v\t":
            vlines.append(line)
        elif line[:2] == "f " or line[:2] == "f\t":
            flines.append(line)
            fbase.append(count + len(vlines))
            fnumber.append(number)
    rows = [ln.split() for ln in vlines]
    try:
        if all(len(r) == 4 for r in rows):
            vertices = np.array([r[1:] for r in rows], dtype=np.float64).reshape(-1, 3)
        else:
            bad = next((r for r in rows if len(r) < 4), None)
            if bad is not None:
                raise FormatError(f"vertex line {' '.join(bad)!r} has fewer than 3 coordinates")
            vertices = np.array([r[1:4] for r in rows], dtype=np.float64)
    except ValueError:
        bad = next(r for r in rows if not all(is_number(t.encode(), "f") for t in r[1:4]))
        raise FormatError(f"bad vertex line {' '.join(bad)!r}") from None
    del rows, vlines
    sizes = np.empty(len(flines), dtype=np.int64)
    flat: list[str] = []
    for i, line in enumerate(flines):
        toks = line.split()[1:]
        sizes[i] = len(toks)
        flat.extend(t.split("/", 1)[0] for t in toks)
    if sizes.size and sizes.min() < 3:
        i = int(np.argmin(sizes))
        raise FormatError(f"face on line {fnumber[i]} has {int(sizes[i])} corners, at least 3 needed")
    idx = _indices(flat)
    if (idx == 0).any():
        i = int(np.searchsorted(np.cumsum(sizes), int(np.flatnonzero(idx == 0)[0]), side="right"))
        raise FormatError(f"face index 0 on line {fnumber[i]} (OBJ indices start at 1)")
    base = np.repeat(np.asarray(fbase, dtype=np.int64), sizes)
    corners = np.where(idx > 0, idx - 1, base + idx)  # negative: relative to the vertices so far
    if corners.size and corners.min() < 0:
        j = int(np.flatnonzero(corners < 0)[0])
        i = int(np.searchsorted(np.cumsum(sizes), j, side="right"))
        raise FormatError(f"face index {int(idx[j])} on line {fnumber[i]} reaches before the first vertex "
                          f"({fbase[i]} vertices defined so far)")
    return (vertices, corners, sizes), len(lines)


def _read_off(data: bytes) -> _Parts:
    text = _decode(data)
    lines = []
    for line in text.splitlines():
        line = line.split("#", 1)[0].strip()
        if line:
            lines.append(line)
    if not lines:
        raise FormatError("empty OFF file")
    words = lines[0].split()
    i = 1  # the line after the counts
    if words[0].upper().endswith("OFF"):
        if words[0].upper() not in ("OFF", "COFF", "NOFF", "CNOFF", "NCOFF", "STOFF"):
            raise FormatError(f"unsupported OFF variant {words[0]!r}")
        words = words[1:]
        if not words:  # counts on their own line
            if len(lines) < 2:
                raise FormatError("OFF file has no vertex/face counts")
            words = lines[1].split()
            i = 2
    try:
        nv, nf = int(words[0]), int(words[1])
    except (ValueError, IndexError):
        raise FormatError(f"bad OFF counts line {' '.join(words)!r}") from None
    if nv < 0 or nf < 0:
        raise FormatError(f"negative OFF counts {nv} {nf}")
    if len(lines) < i + nv + nf:
        raise FormatError(f"truncated data: {nv} vertices and {nf} faces announced, "
                           f"{len(lines) - i} lines present")
    vrows = [ln.split()[:3] for ln in lines[i:i + nv]]
    try:
        vertices = np.array(vrows, dtype=np.float64).reshape(nv, 3)
    except ValueError:
        bad = next(r for r in vrows if len(r) < 3 or not all(is_number(t.encode(), "f") for t in r))
        raise FormatError(f"bad vertex line {' '.join(bad)!r}") from None
    sizes = np.empty(nf, dtype=np.int64)
    flat: list[str] = []
    for j, line in enumerate(lines[i + nv:i + nv + nf]):
        toks = line.split()
        try:
            k = int(toks[0])
        except ValueError:
            raise FormatError(f"bad face line {line!r}") from None
        if k < 3 or len(toks) < 1 + k:
            raise FormatError(f"face {j} line {line!r} needs at least 3 corners and k indices")
        sizes[j] = k
        flat.extend(toks[1:1 + k])  # trailing colour tokens are ignored
    return vertices, _indices(flat), sizes, {}


# ---------------------------------------------------------------- writing

def write_ply(path: str | os.PathLike[str], vertices: ArrayLike, *, corners: ArrayLike | None = None,
              sizes: ArrayLike | None = None, faces: ArrayLike | None = None,
              properties: Mapping[str, ArrayLike] | None = None, binary: bool = True,
              chunk_bytes: int = CHUNK_BYTES) -> None:
    """Write a PLY file atomically (:mod:`engine.common.atomic`); arguments as :func:`ply_chunks`."""
    chunks = ply_chunks(vertices, corners=corners, sizes=sizes, faces=faces, properties=properties,
                        binary=binary, chunk_bytes=chunk_bytes)
    with atomic_write(path) as fh:
        for chunk in chunks:
            fh.write(chunk)


def ply_chunks(vertices: ArrayLike, *, corners: ArrayLike | None = None, sizes: ArrayLike | None = None,
               faces: ArrayLike | None = None, properties: Mapping[str, ArrayLike] | None = None,
               binary: bool = True, chunk_bytes: int = CHUNK_BYTES) -> Iterator[bytes]:
    """A PLY file's bytes, in pieces to write one after another.

    The arguments are checked at once; the pieces (the header, then about
    ``chunk_bytes`` of records each) are made as they are asked for, so the
    file's bytes never exist whole.

    Parameters
    ----------
    vertices : (n, 3) float array
        Written as ``double`` x, y, z.
    corners, sizes : (c,), (f,) integer arrays, optional
        Polygons; or give ``faces``.
    faces : (m, 3) integer array, optional
        Triangles.
    properties : dict of str to (n,) array, optional
        Per-vertex values, each written with its own dtype (int8, uint8,
        int16, uint16, int32, uint32, float32, float64). ``"color"`` (n, 3) or
        (n, 4) is written as ``red green blue [alpha]``, ``"normal"`` (n, 3) as
        ``nx ny nz``.
    binary : bool
        Binary little-endian (default) or ASCII. ASCII writes floats with 9
        (float32) or 17 (float64) significant digits, enough to read back the
        same bits (IEEE 754-2008, section 5.12.2, from memory).
    chunk_bytes : int
        About how many bytes each piece after the header holds.

    Raises
    ------
    ValueError
        For invalid vertices, polygons or properties (a wrong length, a dtype
        PLY has no type for, a non-finite value).
    """
    v = validate_vertices(vertices)
    n = len(v)
    if faces is not None and (corners is not None or sizes is not None):
        raise ValueError("give either faces or corners and sizes, not both")
    if faces is not None:
        f = np.asarray(faces)
        if f.ndim != 2 or f.shape[1] != 3:
            raise ValueError(f"faces must have shape (m, 3) (triangles), got {f.shape}")
        c, s = validate_polygons(f.reshape(-1), np.full(len(f), 3), n)
    elif corners is not None or sizes is not None:
        if corners is None or sizes is None:
            raise ValueError("polygons need both corners and sizes")
        c, s = validate_polygons(corners, sizes, n)
    else:
        c, s = np.zeros(0, np.int64), np.zeros(0, np.int64)

    columns = [("x", v[:, 0]), ("y", v[:, 1]), ("z", v[:, 2])]
    for name, value in (properties or {}).items():
        columns.extend(_property_columns(name, value, n))
    names = [cname for cname, _ in columns]
    dup = {x for x in names if names.count(x) > 1}
    if dup:
        raise ValueError(f"property names clash: {sorted(dup)}")

    fmt = "binary_little_endian" if binary else "ascii"
    count_type = "uchar" if (not s.size or s.max() <= 255) else "uint"
    index_type = "int" if (not c.size or c.max() < 2 ** 31) else "uint"
    header = ["ply", f"format {fmt} 1.0", "comment written by Overtone", f"element vertex {n}"]
    header += [f"property {_WRITE_TYPES[col.dtype.str[1:]]} {cname}" for cname, col in columns]
    if s.size:
        header += [f"element face {len(s)}", f"property list {count_type} {index_type} vertex_indices"]
    header.append("end_header")
    head = ("\n".join(header) + "\n").encode("ascii")
    if binary:
        types = (np.dtype("<u1" if count_type == "uchar" else "<u4"), np.dtype("<i4" if index_type == "int" else "<u4"))
        body = binary_records(columns, (c, s), types, chunk_bytes)
    else:
        body = ascii_records(columns, (c, s), chunk_bytes)
    return itertools.chain((head,), body)


def _property_columns(name: Any, value: ArrayLike, n: int) -> list[tuple[str, NDArray[Any]]]:
    """The PLY columns of one property, as views of ``value`` (converted when a piece is written)."""
    if not isinstance(name, str) or not name or any(ch.isspace() for ch in name) or not name.isascii():
        raise ValueError(f"property name {name!r} must be non-empty ASCII without spaces")
    a = np.asarray(value)
    code = a.dtype.str[1:]
    if code not in _WRITE_TYPES:
        raise ValueError(f"property {name!r} has dtype {a.dtype}, which PLY cannot store "
                         f"(use int8/16/32, uint8/16/32, float32 or float64)")
    if name in _GROUPS and a.ndim != 1:
        parts = _GROUPS[name]
        widths = (3, 4) if name == "color" else (3,)
        if a.ndim != 2 or a.shape[0] != n or a.shape[1] not in widths:
            want = " or ".join(f"({n}, {w})" for w in widths)
            raise ValueError(f"property {name!r} must have shape {want}, got {a.shape}")
        cols = [(parts[k], a[:, k]) for k in range(a.shape[1])]
    else:
        if a.shape != (n,):
            raise ValueError(f"property {name!r} must have shape ({n},), got {a.shape}")
        cols = [(name, a)]
    if a.dtype.kind == "f" and not np.isfinite(a).all():
        raise ValueError(f"property {name!r} has non-finite values")
    return cols
