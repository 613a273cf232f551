"""Reading and writing mesh files: PLY, OBJ and OFF in, PLY out.

Polygons are kept as the file has them (a flat corner list and a size per
polygon); :meth:`MeshData.triangles` triangulates on request. PLY vertex
properties other than the position travel with their file dtype, so a file
read and written again is bit-for-bit the same data.

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

import os
import struct
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ..common.atomic import atomic_write
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

def read_mesh(path: str | os.PathLike[str]) -> MeshData:
    """Read a ``.ply``, ``.obj`` or ``.off`` file.

    Parameters
    ----------
    path : str or os.PathLike

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
    readers = {".ply": _read_ply, ".obj": _read_obj, ".off": _read_off}
    if ext not in readers:
        raise ValueError(f"{path.name}: unknown mesh format {ext!r} (expected .ply, .obj or .off)")
    data = path.read_bytes()
    try:
        vertices, corners, sizes, props = readers[ext](data)
    except _FormatError as e:
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


class _FormatError(Exception):
    """A problem in a file's content; read_mesh adds the file name."""


def _split_header(data: bytes) -> tuple[list[str], int]:
    """The header's lines (without ``end_header``) and where the body starts.

    ``end_header`` counts only as a line of its own, so a comment that
    mentions it does not end the header.
    """
    start = len(_BOM) if data.startswith(_BOM) else 0
    if not data.startswith(b"ply", start):
        raise _FormatError("not a PLY file (it does not start with 'ply')")
    at = start
    while True:
        nl = data.find(b"\n", at)
        line = data[at:] if nl < 0 else data[at:nl]
        if line.strip() == b"end_header":
            break
        if nl < 0:
            raise _FormatError("PLY header has no 'end_header' line")
        at = nl + 1
    try:
        header = data[start:at].decode("ascii")
    except UnicodeDecodeError:
        raise _FormatError("PLY header is not ASCII text") from None
    return header.splitlines(), len(data) if nl < 0 else nl + 1


class _Element:
    def __init__(self, name: str, count: int):
        self.name, self.count = name, count
        # (name, dtype string) for scalars, (name, item dtype string, count dtype string) for lists
        self.props: list[tuple[str, ...]] = []


def _parse_header(lines: list[str]) -> tuple[str, list[_Element]]:
    fmt = None
    elements: list[_Element] = []
    for number, raw in enumerate(lines[1:], 2):
        words = raw.split()
        if not words or words[0] in ("comment", "obj_info"):
            continue
        if words[0] == "format":
            if len(words) < 2 or words[1] not in ("ascii", "binary_little_endian", "binary_big_endian"):
                raise _FormatError(f"unsupported PLY format line {raw.strip()!r}")
            fmt = words[1]
        elif words[0] == "element":
            if len(words) != 3 or not words[2].isdigit():
                raise _FormatError(f"bad element line {raw.strip()!r} (header line {number})")
            elements.append(_Element(words[1], int(words[2])))
        elif words[0] == "property":
            if not elements:
                raise _FormatError(f"property before any element (header line {number})")
            if len(words) >= 2 and words[1] == "list":
                if len(words) != 5:
                    raise _FormatError(f"bad property line {raw.strip()!r} (header line {number})")
                ctype, itype = (_ply_type(t, number) for t in words[2:4])
                if ctype[0] == "f":
                    raise _FormatError(f"list count type {words[2]!r} is not an integer type (header line {number})")
                elements[-1].props.append((words[4], itype, ctype))
            else:
                if len(words) != 3:
                    raise _FormatError(f"bad property line {raw.strip()!r} (header line {number})")
                elements[-1].props.append((words[2], _ply_type(words[1], number)))
        else:
            raise _FormatError(f"unexpected PLY header line {raw.strip()!r} (header line {number})")
    if fmt is None:
        raise _FormatError("PLY header has no format line")
    return fmt, elements


def _ply_type(name: str, number: int) -> str:
    if name not in _PLY_TYPES:
        raise _FormatError(f"unsupported property type {name!r} (header line {number})")
    return _PLY_TYPES[name]


def _read_ply(data: bytes) -> _Parts:
    lines, pos = _split_header(data)
    fmt, elements = _parse_header(lines)
    names = [e.name for e in elements]
    if "vertex" not in names:
        raise _FormatError("PLY file has no vertex element")
    reader = _AsciiBody(data[pos:]) if fmt == "ascii" else \
        _BinaryBody(data, pos, "<" if fmt == "binary_little_endian" else ">")
    vertex_cols: dict[str, Any] | None = None
    face_lists: dict[str, Any] | None = None
    for e in elements:
        wanted = e.name in ("vertex", "face")
        cols = reader.element(e, keep=wanted)
        if e.name == "vertex" and vertex_cols is None:
            vertex_cols = cols
        elif e.name == "face" and face_lists is None:
            face_lists = cols
    reader.check_end()
    assert vertex_cols is not None
    missing = [c for c in "xyz" if not isinstance(vertex_cols.get(c), np.ndarray)]
    if missing:
        raise _FormatError(f"vertex element has no {'/'.join(missing)} property")
    vertices = np.column_stack([vertex_cols[c].astype(np.float64) for c in "xyz"])
    # list properties of vertices (neighbour lists and the like) cannot be carried: skipped
    props = _group_properties({k: a for k, a in vertex_cols.items()
                               if k not in ("x", "y", "z") and isinstance(a, np.ndarray)})
    corners = np.zeros(0, np.int64)
    sizes = np.zeros(0, np.int64)
    if face_lists is not None:
        key = next((k for k in ("vertex_indices", "vertex_index") if k in face_lists), None)
        if key is None:
            raise _FormatError("face element has no vertex_indices (or vertex_index) list property")
        if not isinstance(face_lists[key], tuple):
            raise _FormatError(f"face property {key!r} is a single number, not a list of vertex indices")
        corners, sizes = face_lists[key]
        if np.issubdtype(corners.dtype, np.floating):
            raise _FormatError("face vertex indices have a floating-point type")
        corners = corners.astype(np.int64)
        sizes = sizes.astype(np.int64)
        if sizes.size and sizes.min() < 3:
            i = int(np.argmin(sizes))
            raise _FormatError(f"face {i} has {int(sizes[i])} corners, at least 3 needed")
    return vertices, corners, sizes, props


def _group_properties(cols: dict[str, NDArray[Any]]) -> dict[str, NDArray[Any]]:
    """Join red/green/blue[/alpha] into "color" and nx/ny/nz into "normal".

    Only when all members are present with one dtype; the group takes the
    place of its first member, so writing the result back keeps the order.
    """
    members: dict[str, str] = {}
    for group, parts in _GROUPS.items():
        have = [p for p in parts if p in cols]
        if group not in cols and all(p in cols for p in parts[:3]) and len({cols[p].dtype for p in have}) == 1:
            members.update({p: group for p in have})
    props: dict[str, NDArray[Any]] = {}
    for name, a in cols.items():
        member: str | None = members.get(name)
        if member is None:
            props[name] = a
        elif member not in props:
            props[member] = np.column_stack([cols[p] for p in _GROUPS[member] if members.get(p) == member])
    return props


def _native(a: NDArray[Any]) -> NDArray[Any]:
    return np.ascontiguousarray(a, dtype=a.dtype.newbyteorder("="))


class _BinaryBody:
    """Walks the binary records of a PLY body, element by element."""

    def __init__(self, data: bytes, pos: int, endian: str):
        self.data, self.pos, self.endian = data, pos, endian
        self.buf = np.frombuffer(data, dtype=np.uint8)

    def _dt(self, code: str) -> np.dtype[Any]:
        return np.dtype(self.endian + code)

    def check_end(self) -> None:
        """Refuse data after the last element: the header's counts would be smaller than the file's."""
        extra = self.data[self.pos:]
        if extra.strip(b" \t\r\n\x00"):
            raise _FormatError(f"{len(extra)} bytes after the last element: the header's element counts "
                               "are smaller than the file's data")

    def element(self, e: _Element, keep: bool) -> dict[str, Any]:
        smallest = sum(np.dtype(p[2] if len(p) == 3 else p[1]).itemsize for p in e.props)
        if any(len(p) == 3 for p in e.props) and e.count * smallest > len(self.data) - self.pos:
            raise _FormatError(f"truncated data: element {e.name!r} announces {e.count} records, "
                               f"more than the {len(self.data) - self.pos} bytes left can hold")
        lists = [p for p in e.props if len(p) == 3]
        if not lists:
            dt = np.dtype([(f"p{i}", self._dt(p[1])) for i, p in enumerate(e.props)])
            arr = self._take(e, dt)
            return {p[0]: _native(arr[f"p{i}"]) for i, p in enumerate(e.props)} if keep else {}
        if e.count == 0:
            return {p[0]: (np.zeros(0, self._dt(p[1])), np.zeros(0, np.int64)) for p in lists}
        # Fast path: every record has the list lengths of the first record.
        first = self._lengths_at(e, self.pos)
        fields: list[tuple[Any, ...]] = []
        for i, p in enumerate(e.props):
            if len(p) == 2:
                fields.append((f"p{i}", self._dt(p[1])))
            else:
                fields.append((f"c{i}", self._dt(p[2])))
                fields.append((f"p{i}", self._dt(p[1]), (first[i],)))
        dt = np.dtype(fields)
        if self.pos + e.count * dt.itemsize <= len(self.data):
            arr = np.frombuffer(self.data, dtype=dt, count=e.count, offset=self.pos)
            if all((arr[f"c{i}"] == first[i]).all() for i, p in enumerate(e.props) if len(p) == 3):
                self.pos += e.count * dt.itemsize
                if not keep:
                    return {}
                out: dict[str, Any] = {}
                for i, p in enumerate(e.props):
                    if len(p) == 3:
                        out[p[0]] = (_native(arr[f"p{i}"]).reshape(-1),
                                     np.full(e.count, first[i], dtype=np.int64))
                    else:
                        out[p[0]] = _native(arr[f"p{i}"])
                return out
        return self._walk(e, keep)

    def _take(self, e: _Element, dt: np.dtype[Any]) -> NDArray[Any]:
        need = e.count * dt.itemsize
        if self.pos + need > len(self.data):
            raise _FormatError(f"truncated data: element {e.name!r} needs {need} bytes, "
                               f"{len(self.data) - self.pos} left")
        arr = np.frombuffer(self.data, dtype=dt, count=e.count, offset=self.pos)
        self.pos += need
        return arr

    def _count(self, code: str, at: int) -> int:
        size = np.dtype(code).itemsize
        if at + size > len(self.data):
            raise _FormatError("truncated data inside a list property")
        value = int.from_bytes(self.data[at:at + size], "little" if self.endian == "<" else "big",
                               signed=code[0] == "i")
        if value < 0:
            raise _FormatError(f"negative list length {value}")
        return value

    def _lengths_at(self, e: _Element, at: int) -> dict[int, int]:
        lengths = {}
        for i, p in enumerate(e.props):
            if len(p) == 2:
                at += np.dtype(p[1]).itemsize
            else:
                k = self._count(p[2], at)
                lengths[i] = k
                at += np.dtype(p[2]).itemsize + k * np.dtype(p[1]).itemsize
                if at > len(self.data):
                    raise _FormatError(f"truncated data: a list of {k} items in element {e.name!r}")
        return lengths

    def _walk(self, e: _Element, keep: bool) -> dict[str, Any]:
        """Records of mixed list lengths: one Python pass finds where each starts."""
        n = e.count
        layout = [(np.dtype(p[1]).itemsize, np.dtype(p[2]).itemsize if len(p) == 3 else 0, p[2] if len(p) == 3 else "")
                  for p in e.props]
        offsets = np.empty((len(layout), n), dtype=np.int64)  # where each property's data starts
        lengths = np.zeros((len(layout), n), dtype=np.int64)
        data, at = self.data, self.pos
        list_at = [j for j, (_, csize, _) in enumerate(layout) if csize]
        if len(list_at) == 1:
            # One list per record (the usual face element): the loop only reads
            # the lengths; every offset then follows from a cumulative sum.
            j0 = list_at[0]
            isize, csize, ccode = layout[j0]
            pre = sum(sz for sz, _, _ in layout[:j0])
            fixed = sum(sz for sz, _, _ in layout) - isize + csize  # record bytes besides the items
            ks = self._list_lengths(e, at, pre, fixed, isize, ccode)
            sizes = fixed + ks * isize
            rec = at + np.cumsum(sizes) - sizes
            at = int(rec[-1] + sizes[-1])
            shift = 0
            for j, (sz, cs, _) in enumerate(layout):
                if j == j0:
                    offsets[j] = rec + shift + csize
                    lengths[j] = ks
                    shift += csize
                else:
                    offsets[j] = rec + shift + (ks * isize if j > j0 else 0)
                    shift += sz
        else:
            for r in range(n):
                for j, (isize, csize, ccode) in enumerate(layout):
                    if csize:
                        k = self._count(ccode, at)
                        lengths[j, r] = k
                        offsets[j, r] = at + csize
                        at += csize + k * isize
                    else:
                        offsets[j, r] = at
                        at += isize
                if at > len(data):
                    raise _FormatError(f"truncated data in element {e.name!r} (record {r} of {n})")
        self.pos = at
        if not keep:
            return {}
        out: dict[str, Any] = {}
        for j, p in enumerate(e.props):
            dt = self._dt(p[1])
            if len(p) == 2:
                out[p[0]] = _native(self._gather(offsets[j], dt))
            else:
                ln = lengths[j]
                total = int(ln.sum())
                first = np.repeat(offsets[j] - (np.cumsum(ln) - ln) * dt.itemsize, ln)
                pos = first + np.arange(total) * dt.itemsize
                out[p[0]] = (_native(self._gather(pos, dt)), ln.copy())
        return out

    def _list_lengths(self, e: _Element, at: int, pre: int, fixed: int, isize: int, ccode: str) -> NDArray[Any]:
        data, n = self.data, e.count
        ks = [0] * n
        r = 0
        try:
            if ccode == "u1":
                at += pre
                for r in range(n):
                    k = data[at]
                    ks[r] = k
                    at += fixed + k * isize
                at -= pre
            else:
                unpack = struct.Struct(self.endian + np.dtype(ccode).char).unpack_from
                for r in range(n):
                    k = unpack(data, at + pre)[0]
                    if k < 0:
                        raise _FormatError(f"negative list length {k}")
                    ks[r] = k
                    at += fixed + k * isize
        except (IndexError, struct.error):
            raise _FormatError(f"truncated data in element {e.name!r} (record {r} of {n})") from None
        if at > len(data):
            raise _FormatError(f"truncated data in element {e.name!r} (record {n - 1} of {n})")
        return np.asarray(ks, dtype=np.int64)

    def _gather(self, pos: NDArray[Any], dt: np.dtype[Any]) -> NDArray[Any]:
        idx = pos[:, None] + np.arange(dt.itemsize)
        return np.ascontiguousarray(self.buf[idx]).view(dt).reshape(-1)


class _AsciiBody:
    """Walks the whitespace-separated tokens of an ASCII PLY body."""

    def __init__(self, body: bytes):
        self.tokens = body.split()
        self.pos = 0

    def _convert(self, toks: Any, code: str, what: str) -> NDArray[Any]:
        dt = np.dtype(code)
        try:
            a = np.array(toks, dtype="S")
            if dt.kind == "f":
                return a.astype(np.float64).astype(dt)
            v = a.astype(np.int64)
        except (ValueError, OverflowError):
            bad = next((t for t in toks if not _is_number(t, dt.kind)), toks[0] if len(toks) else b"")
            raise _FormatError(f"bad number {bad.decode(errors='replace')!r} in {what}") from None
        info = np.iinfo(dt)
        if v.size and (v.min() < info.min or v.max() > info.max):
            raise _FormatError(f"value out of range for {dt} in {what}")
        return v.astype(dt)

    def check_end(self) -> None:
        """Refuse values after the last element: the header's counts would be smaller than the file's."""
        if self.pos < len(self.tokens):
            raise _FormatError(f"{len(self.tokens) - self.pos} values after the last element: the header's "
                               "element counts are smaller than the file's data")

    def element(self, e: _Element, keep: bool) -> dict[str, Any]:
        toks, n = self.tokens, e.count
        if any(len(p) == 3 for p in e.props) and n * len(e.props) > len(toks) - self.pos:
            raise _FormatError(f"truncated data: element {e.name!r} announces {n} records, "
                               f"more than the {len(toks) - self.pos} values left can hold")
        lists = [p for p in e.props if len(p) == 3]
        if not lists:
            width = len(e.props)
            need = n * width
            if self.pos + need > len(toks):
                raise _FormatError(f"truncated data: element {e.name!r} needs {need} values, "
                                   f"{len(toks) - self.pos} left")
            block = toks[self.pos:self.pos + need]
            self.pos += need
            if not keep:
                return {}
            out: dict[str, Any] = {}
            for i, p in enumerate(e.props):
                out[p[0]] = self._convert(block[i::width], p[1], f"element {e.name!r} property {p[0]!r}")
            return out
        if n == 0:
            return {p[0]: (np.zeros(0, p[1]), np.zeros(0, np.int64)) for p in lists}
        fast = self._same_lengths(e, keep)
        if fast is not None:
            return fast
        # One pass over records to find list lengths (records may differ).
        offsets = np.empty((len(e.props), n), dtype=np.int64)
        lengths = np.zeros((len(e.props), n), dtype=np.int64)
        at = self.pos
        try:
            for r in range(n):
                for j, p in enumerate(e.props):
                    if len(p) == 3:
                        k = int(toks[at])
                        if k < 0:
                            raise _FormatError(f"negative list length {k} in element {e.name!r}")
                        if k > len(toks) - at:
                            raise IndexError(k)
                        lengths[j, r] = k
                        offsets[j, r] = at + 1
                        at += 1 + k
                    else:
                        offsets[j, r] = at
                        at += 1
        except IndexError:
            raise _FormatError(f"truncated data in element {e.name!r} (record {r} of {n})") from None
        except ValueError:
            raise _FormatError(f"bad list length {toks[at].decode(errors='replace')!r} "
                               f"in element {e.name!r} (record {r})") from None
        if at > len(toks):
            raise _FormatError(f"truncated data in element {e.name!r} (record {n - 1} of {n})")
        self.pos = at
        if not keep:
            return {}
        arr = np.array(toks[offsets.min():at], dtype="S")
        base = offsets.min()
        out = {}
        for j, p in enumerate(e.props):
            what = f"element {e.name!r} property {p[0]!r}"
            if len(p) == 2:
                out[p[0]] = self._convert(arr[offsets[j] - base], p[1], what)
            else:
                ln = lengths[j]
                first = np.repeat(offsets[j] - base - (np.cumsum(ln) - ln), ln)
                idx = first + np.arange(int(ln.sum()))
                out[p[0]] = (self._convert(arr[idx], p[1], what), ln.copy())
        return out


    def _same_lengths(self, e: _Element, keep: bool) -> dict[str, Any] | None:
        """Fast path: every record has the list lengths of the first one, else None."""
        toks, n, at = self.tokens, e.count, self.pos
        widths: list[int] = []
        cols: list[tuple[int, int | None]] = []
        k: int | None
        try:
            for p in e.props:
                if len(p) == 3:
                    k = int(toks[at])
                    if k < 0 or k > len(toks) - at:
                        return None
                    cols.append((sum(widths), k))
                    widths.append(1 + k)
                    at += 1 + k
                else:
                    cols.append((sum(widths), None))
                    widths.append(1)
                    at += 1
        except (IndexError, ValueError):
            return None
        width = sum(widths)
        if self.pos + n * width > len(toks):
            return None
        block = np.array(toks[self.pos:self.pos + n * width], dtype="S").reshape(n, width)
        for (start, k), p in zip(cols, e.props):
            if k is not None:
                try:
                    if not (block[:, start].astype(np.int64) == k).all():
                        return None
                except (ValueError, OverflowError):   # the record-by-record path names the problem
                    return None
        self.pos += n * width
        if not keep:
            return {}
        out: dict[str, Any] = {}
        for (start, k), p in zip(cols, e.props):
            what = f"element {e.name!r} property {p[0]!r}"
            if k is None:
                out[p[0]] = self._convert(block[:, start], p[1], what)
            else:
                vals = self._convert(block[:, start + 1:start + 1 + k].reshape(-1), p[1], what)
                out[p[0]] = (vals, np.full(n, k, dtype=np.int64))
        return out


def _is_number(tok: bytes, kind: str) -> bool:
    try:
        float(tok) if kind == "f" else int(tok)
        return True
    except (ValueError, OverflowError):
        return False


def _decode(data: bytes) -> str:
    """Text of an OBJ or OFF file; a UTF-8 byte-order mark is dropped."""
    return data.decode("utf-8-sig", errors="replace")


def _indices(flat: list[str]) -> NDArray[Any]:
    """Face index tokens as int64; a token that is no whole number, or beyond int64, is refused."""
    try:
        return np.array(flat, dtype=np.int64) if flat else np.zeros(0, np.int64)
    except (ValueError, OverflowError):
        bad = next((t for t in flat if not _is_number(t.encode(), "i") or abs(int(t)) >= 2 ** 63), flat[0])
        raise _FormatError(f"bad face index {bad!r} (not a whole number, or out of range)") from None


def _read_obj(data: bytes) -> _Parts:
    text = _decode(data)
    vlines: list[str] = []
    flines: list[str] = []
    fbase: list[int] = []
    fnumber: list[int] = []
    for number, line in enumerate(text.splitlines(), 1):
        line = line.split("#", 1)[0]  # a trailing comment
        if line[:2] == "v " or line[:2] == "v\t":
            vlines.append(line)
        elif line[:2] == "f " or line[:2] == "f\t":
            flines.append(line)
            fbase.append(len(vlines))
            fnumber.append(number)
    if not vlines:
        raise _FormatError("no vertex ('v') lines")
    rows = [ln.split() for ln in vlines]
    try:
        if all(len(r) == 4 for r in rows):
            vertices = np.array([r[1:] for r in rows], dtype=np.float64)
        else:
            bad = next((r for r in rows if len(r) < 4), None)
            if bad is not None:
                raise _FormatError(f"vertex line {' '.join(bad)!r} has fewer than 3 coordinates")
            vertices = np.array([r[1:4] for r in rows], dtype=np.float64)
    except ValueError:
        bad = next(r for r in rows if not all(_is_number(t.encode(), "f") for t in r[1:4]))
        raise _FormatError(f"bad vertex line {' '.join(bad)!r}") from None
    sizes = np.empty(len(flines), dtype=np.int64)
    flat: list[str] = []
    for i, line in enumerate(flines):
        toks = line.split()[1:]
        sizes[i] = len(toks)
        flat.extend(t.split("/", 1)[0] for t in toks)
    if sizes.size and sizes.min() < 3:
        i = int(np.argmin(sizes))
        raise _FormatError(f"face on line {fnumber[i]} has {int(sizes[i])} corners, at least 3 needed")
    idx = _indices(flat)
    if (idx == 0).any():
        i = int(np.searchsorted(np.cumsum(sizes), int(np.flatnonzero(idx == 0)[0]), side="right"))
        raise _FormatError(f"face index 0 on line {fnumber[i]} (OBJ indices start at 1)")
    base = np.repeat(np.asarray(fbase, dtype=np.int64), sizes)
    corners = np.where(idx > 0, idx - 1, base + idx)  # negative: relative to the vertices so far
    if corners.size and corners.min() < 0:
        j = int(np.flatnonzero(corners < 0)[0])
        i = int(np.searchsorted(np.cumsum(sizes), j, side="right"))
        raise _FormatError(f"face index {int(idx[j])} on line {fnumber[i]} reaches before the first vertex "
                           f"({fbase[i]} vertices defined so far)")
    return vertices, corners, sizes, {}


def _read_off(data: bytes) -> _Parts:
    text = _decode(data)
    lines = []
    for line in text.splitlines():
        line = line.split("#", 1)[0].strip()
        if line:
            lines.append(line)
    if not lines:
        raise _FormatError("empty OFF file")
    words = lines[0].split()
    i = 1  # the line after the counts
    if words[0].upper().endswith("OFF"):
        if words[0].upper() not in ("OFF", "COFF", "NOFF", "CNOFF", "NCOFF", "STOFF"):
            raise _FormatError(f"unsupported OFF variant {words[0]!r}")
        words = words[1:]
        if not words:  # counts on their own line
            if len(lines) < 2:
                raise _FormatError("OFF file has no vertex/face counts")
            words = lines[1].split()
            i = 2
    try:
        nv, nf = int(words[0]), int(words[1])
    except (ValueError, IndexError):
        raise _FormatError(f"bad OFF counts line {' '.join(words)!r}") from None
    if nv < 0 or nf < 0:
        raise _FormatError(f"negative OFF counts {nv} {nf}")
    if len(lines) < i + nv + nf:
        raise _FormatError(f"truncated data: {nv} vertices and {nf} faces announced, "
                           f"{len(lines) - i} lines present")
    vrows = [ln.split()[:3] for ln in lines[i:i + nv]]
    try:
        vertices = np.array(vrows, dtype=np.float64).reshape(nv, 3)
    except ValueError:
        bad = next(r for r in vrows if len(r) < 3 or not all(_is_number(t.encode(), "f") for t in r))
        raise _FormatError(f"bad vertex line {' '.join(bad)!r}") from None
    sizes = np.empty(nf, dtype=np.int64)
    flat: list[str] = []
    for j, line in enumerate(lines[i + nv:i + nv + nf]):
        toks = line.split()
        try:
            k = int(toks[0])
        except ValueError:
            raise _FormatError(f"bad face line {line!r}") from None
        if k < 3 or len(toks) < 1 + k:
            raise _FormatError(f"face {j} line {line!r} needs at least 3 corners and k indices")
        sizes[j] = k
        flat.extend(toks[1:1 + k])  # trailing colour tokens are ignored
    return vertices, _indices(flat), sizes, {}


# ---------------------------------------------------------------- writing

def write_ply(path: str | os.PathLike[str], vertices: ArrayLike, *, corners: ArrayLike | None = None,
              sizes: ArrayLike | None = None, faces: ArrayLike | None = None,
              properties: Mapping[str, ArrayLike] | None = None, binary: bool = True) -> None:
    """Write a PLY file atomically (:mod:`engine.common.atomic`); arguments as :func:`ply_chunks`."""
    chunks = ply_chunks(vertices, corners=corners, sizes=sizes, faces=faces, properties=properties,
                        binary=binary)
    with atomic_write(path) as fh:
        for chunk in chunks:
            fh.write(chunk)


def ply_chunks(vertices: ArrayLike, *, corners: ArrayLike | None = None, sizes: ArrayLike | None = None,
               faces: ArrayLike | None = None, properties: Mapping[str, ArrayLike] | None = None,
               binary: bool = True) -> list[bytes]:
    """A PLY file's bytes, in pieces to write one after another.

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
        body = _binary_body(columns, c, s, count_type, index_type)
    else:
        body = _ascii_body(columns, c, s)
    return [head, *body]


def _property_columns(name: Any, value: ArrayLike, n: int) -> list[tuple[str, NDArray[Any]]]:
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
    return [(cname, np.ascontiguousarray(col, dtype=col.dtype.newbyteorder("<"))) for cname, col in cols]


def _binary_body(columns: list[tuple[str, NDArray[Any]]], c: NDArray[Any], s: NDArray[Any], count_type: str,
                 index_type: str) -> list[bytes]:
    dt = np.dtype([(cname, col.dtype.newbyteorder("<")) for cname, col in columns])
    block = np.empty(len(columns[0][1]), dtype=dt)
    for cname, col in columns:
        block[cname] = col
    out = [block.tobytes()]
    if s.size:
        cdt = np.dtype("<u1" if count_type == "uchar" else "<u4")
        idt = np.dtype("<i4" if index_type == "int" else "<u4")
        csize, isize = cdt.itemsize, idt.itemsize
        record = csize + s * isize
        rec_start = np.cumsum(record) - record
        buf = np.empty(int(record.sum()), dtype=np.uint8)
        buf[rec_start[:, None] + np.arange(csize)] = s.astype(cdt).view(np.uint8).reshape(-1, csize)
        starts = np.cumsum(s) - s
        dest = np.repeat(rec_start + csize - starts * isize, s) + np.arange(len(c)) * isize
        buf[dest[:, None] + np.arange(isize)] = c.astype(idt).view(np.uint8).reshape(-1, isize)
        out.append(buf.tobytes())
    return out


def _ascii_body(columns: list[tuple[str, NDArray[Any]]], c: NDArray[Any], s: NDArray[Any]) -> list[bytes]:
    fmts, lists = [], []
    for _, col in columns:
        if col.dtype.kind == "f":
            fmts.append("%.9g" if col.dtype.itemsize == 4 else "%.17g")
            lists.append(col.astype(np.float64).tolist())
        else:
            fmts.append("%d")
            lists.append(col.astype(np.int64).tolist())
    row = " ".join(fmts)
    out = ["".join([row % r + "\n" for r in zip(*lists)])]
    if s.size and (s == s[0]).all():
        k = int(s[0])
        rows = np.column_stack([s, c.reshape(-1, k)]).tolist()
        face = " ".join(["%d"] * (k + 1)) + "\n"
        out.append("".join([face % tuple(r) for r in rows]))
    elif s.size:
        cl, ends = c.tolist(), np.cumsum(s).tolist()
        out.append("".join([f"{b - a} " + " ".join(map(str, cl[a:b])) + "\n"
                            for a, b in zip([0] + ends[:-1], ends)]))
    return [o.encode("ascii") for o in out]


