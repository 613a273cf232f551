"""Mesh files: PLY round trips, hand-written PLY/OBJ/OFF, bad files, reference meshes.

PLY layout as described by Greg Turk, "The PLY Polygon File Format" (from
memory): header lines, then the elements in header order; binary scalars are
packed with no padding in the declared byte order; a list is its count
followed by the items.
"""

import os

import numpy as np
import pytest

from engine.intake import files as meshio
from engine.intake.files import MeshData, read_mesh, write_ply
from tests import refdata

# The numpy dtypes PLY has a type for, and the PLY name each is written as (Turk, from memory).
DTYPES = [(np.int8, "char"), (np.uint8, "uchar"), (np.int16, "short"), (np.uint16, "ushort"),
          (np.int32, "int"), (np.uint32, "uint"), (np.float32, "float"), (np.float64, "double")]


def hard_values(dtype, n, rng):
    """Values that stress a round trip: extremes, signed zero, subnormals, long mantissas."""
    dt = np.dtype(dtype)
    if dt.kind == "f":
        fi = np.finfo(dt)
        special = np.array([0.0, -0.0, fi.max, -fi.max, fi.tiny, fi.smallest_subnormal,
                            1 / 3, np.pi, -1e-7, 12345.678], dtype=dt)
        rest = (rng.standard_normal(n) * 10.0 ** rng.integers(-20, 20, n)).astype(dt)
    else:
        ii = np.iinfo(dt)
        special = np.array([ii.min, ii.max, 0, 1], dtype=dt)
        rest = rng.integers(ii.min, int(ii.max) + 1, n, dtype=dt)
    out = np.concatenate([special, rest])[:n]
    return out


def same_bits(a, b):
    return a.dtype == b.dtype and a.shape == b.shape and a.tobytes() == b.tobytes()


def polygon_mesh(rng, n=40):
    v = rng.standard_normal((n, 3)) * 10.0 ** rng.integers(-8, 8, (n, 1))
    sizes = np.array([3, 4, 5, 3, 4, 9, 3, 300])  # mixed sizes, one above 255 (count type uint)
    corners = np.concatenate([rng.choice(n, s, replace=s > n) for s in sizes])
    return v, corners, sizes


@pytest.mark.parametrize("binary", [True, False])
def test_ply_round_trip_is_bit_exact(tmp_path, binary):
    rng = np.random.default_rng(1)
    v, c, s = polygon_mesh(rng)
    n = len(v)
    props = {
        "color": rng.integers(0, 256, (n, 4), dtype=np.uint8),  # red green blue alpha
        "normal": rng.standard_normal((n, 3)).astype(np.float32),
        "weight": hard_values(np.float32, n, rng),
        "height": hard_values(np.float64, n, rng),
        "label": hard_values(np.int32, n, rng),
        "flags": hard_values(np.int8, n, rng),
    }
    path = tmp_path / "mesh.ply"
    write_ply(path, v, corners=c, sizes=s, properties=props, binary=binary)
    head = path.read_bytes().split(b"end_header")[0].decode()
    assert ("format binary_little_endian 1.0" if binary else "format ascii 1.0") in head
    for line in ["property double x", "property uchar red", "property uchar alpha", "property float nx",
                 "property float weight", "property double height", "property int label", "property char flags",
                 "element face 8", "property list uint int vertex_indices"]:
        assert line in head
    m = read_mesh(path)
    assert same_bits(m.vertices, v)
    assert np.array_equal(m.corners, c) and np.array_equal(m.sizes, s)
    assert m.corners.dtype == np.int64 and m.sizes.dtype == np.int64
    assert sorted(m.properties) == sorted(props)
    for k, a in props.items():
        assert same_bits(m.properties[k], a), k
    # Writing what was read gives the same file.
    again = tmp_path / "again.ply"
    write_ply(again, m.vertices, corners=m.corners, sizes=m.sizes, properties=m.properties, binary=binary)
    assert again.read_bytes() == path.read_bytes()


@pytest.mark.parametrize("binary", [True, False])
@pytest.mark.parametrize("dtype, ply_name", DTYPES)
def test_every_property_dtype_round_trips(tmp_path, dtype, ply_name, binary):
    rng = np.random.default_rng(2)
    v = rng.random((64, 3))
    values = hard_values(dtype, 64, rng)
    path = tmp_path / "p.ply"
    write_ply(path, v, faces=[[0, 1, 2], [2, 3, 0]], properties={"value": values}, binary=binary)
    assert f"property {ply_name} value\n".encode() in path.read_bytes()
    m = read_mesh(path)
    assert same_bits(m.properties["value"], values)
    assert m.triangles().tolist() == [[0, 1, 2], [2, 3, 0]]


@pytest.mark.parametrize("binary", [True, False])
def test_rgb_colour_float_colour_and_triangles(tmp_path, binary):
    rng = np.random.default_rng(3)
    v = rng.random((5, 3))
    rgb = rng.integers(0, 256, (5, 3), dtype=np.uint8)
    path = tmp_path / "c.ply"
    write_ply(path, v, faces=[[0, 1, 2], [0, 2, 3]], properties={"color": rgb}, binary=binary)
    m = read_mesh(path)
    assert same_bits(m.properties["color"], rgb)
    assert m.sizes.tolist() == [3, 3]
    fcol = rng.random((5, 4)).astype(np.float32)
    write_ply(path, v, properties={"color": fcol}, binary=binary)  # a point cloud: no face element
    m = read_mesh(path)
    assert b"element face" not in path.read_bytes()
    assert same_bits(m.properties["color"], fcol) and m.sizes.size == 0 and m.corners.size == 0


def ply_bytes(fmt, header_elements, body):
    head = f"ply\nformat {fmt} 1.0\ncomment hand written\n" + header_elements + "end_header\n"
    return head.encode() + body


@pytest.mark.parametrize("endian", ["<", ">"])
def test_binary_ply_with_extra_elements_and_face_properties(tmp_path, endian):
    # Element order: vertex (with a double property and an ushort), an unrelated
    # element with a list, faces named vertex_index with properties around the list
    # (mixed sizes: the record-by-record path), then a trailing element.
    fmt = {"<": "binary_little_endian", ">": "binary_big_endian"}[endian]
    header = ("element vertex 4\nproperty float x\nproperty float y\nproperty float z\n"
              "property double quality\nproperty ushort id\n"
              "element material 2\nproperty list uchar uchar name\nproperty int flag\n"
              "element face 2\nproperty int group\nproperty list uchar uint vertex_index\nproperty float gloss\n"
              "element edge 1\nproperty int vertex1\nproperty int vertex2\n")
    vt = np.dtype([("x", endian + "f4"), ("y", endian + "f4"), ("z", endian + "f4"),
                   ("q", endian + "f8"), ("id", endian + "u2")])
    vert = np.zeros(4, vt)
    xyz = np.array([[0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0.5]], np.float32)
    vert["x"], vert["y"], vert["z"] = xyz.T
    vert["q"] = [0.1, 0.2, 0.3, 0.4]
    vert["id"] = [7, 65535, 0, 300]
    i4, u4, f4 = endian + "i4", endian + "u4", endian + "f4"
    body = vert.tobytes()
    body += bytes([3]) + b"abc" + np.array(1, i4).tobytes() + bytes([1]) + b"z" + np.array(2, i4).tobytes()
    body += np.array(5, i4).tobytes() + bytes([4]) + np.array([0, 1, 2, 3], u4).tobytes() + np.array(0.5, f4).tobytes()
    body += np.array(6, i4).tobytes() + bytes([3]) + np.array([3, 2, 1], u4).tobytes() + np.array(0.25, f4).tobytes()
    body += np.array([0, 1], i4).tobytes()
    path = tmp_path / "x.ply"
    path.write_bytes(ply_bytes(fmt, header, body))
    m = read_mesh(path)
    assert same_bits(m.vertices, xyz.astype(np.float64))
    assert m.corners.tolist() == [0, 1, 2, 3, 3, 2, 1] and m.sizes.tolist() == [4, 3]
    assert sorted(m.properties) == ["id", "quality"]
    assert m.properties["quality"].tolist() == [0.1, 0.2, 0.3, 0.4]
    assert m.properties["id"].dtype == np.uint16 and m.properties["id"].tolist() == [7, 65535, 0, 300]
    assert m.properties["id"].dtype.isnative
    # The same file as ASCII.
    text = ("0 0 0 0.1 7\n1 0 0 0.2 65535\n1 1 0 0.3 0\n0 1 0.5 0.4 300\n"
            "3 97 98 99 1\n1 122 2\n5 4 0 1 2 3 0.5\n6 3 3 2 1 0.25\n0 1\n")
    path.write_bytes(ply_bytes("ascii", header, text.encode()))
    a = read_mesh(path)
    assert same_bits(a.vertices, m.vertices) and np.array_equal(a.corners, m.corners)
    assert np.array_equal(a.sizes, m.sizes)
    assert all(same_bits(a.properties[k], m.properties[k]) for k in m.properties)


@pytest.mark.parametrize("endian", ["<", ">"])
@pytest.mark.parametrize("two_lists", [False, True])
def test_binary_faces_with_wide_counts_and_two_lists(tmp_path, endian, two_lists):
    # Face lists counted by a ushort, optionally followed by a second list
    # (texture coordinates per corner, as some exporters write them).
    fmt = {"<": "binary_little_endian", ">": "binary_big_endian"}[endian]
    header = ("element vertex 5\nproperty double x\nproperty double y\nproperty double z\n"
              "element face 3\nproperty list ushort int vertex_indices\n"
              + ("property list uchar float texcoord\n" if two_lists else ""))
    body = np.arange(15, dtype=endian + "f8").tobytes()
    faces = [[0, 1, 2], [1, 2, 3, 4], [4, 3, 2, 1, 0]]
    for f in faces:
        body += np.array(len(f), endian + "u2").tobytes() + np.array(f, endian + "i4").tobytes()
        if two_lists:
            body += bytes([2 * len(f)]) + np.zeros(2 * len(f), endian + "f4").tobytes()
    path = tmp_path / "w.ply"
    path.write_bytes(ply_bytes(fmt, header, body))
    m = read_mesh(path)
    assert m.vertices.ravel().tolist() == list(range(15))
    assert m.corners.tolist() == sum(faces, []) and m.sizes.tolist() == [3, 4, 5]
    path.write_bytes(ply_bytes(fmt, header, body[:-3]))
    with pytest.raises(ValueError, match=r"w\.ply: truncated data in element 'face' \(record 2 of 3\)"):
        read_mesh(path)


def test_non_ascii_header(tmp_path):
    path = tmp_path / "h.ply"
    path.write_bytes(b"ply\nformat ascii 1.0\ncomment caf\xe9\nend_header\n")
    with pytest.raises(ValueError, match=r"h\.ply: PLY header is not ASCII text"):
        read_mesh(path)


def test_binary_faces_of_one_size_with_properties(tmp_path):
    # Fast path (every list the same length) with a scalar after the list.
    header = ("element vertex 3\nproperty double x\nproperty double y\nproperty double z\n"
              "element face 2\nproperty list uchar int vertex_indices\nproperty uchar red\n")
    body = np.eye(3).tobytes()
    rec = np.dtype([("k", "u1"), ("i", "<i4", (3,)), ("r", "u1")])
    faces = np.array([(3, [0, 1, 2], 9), (3, [2, 1, 0], 8)], rec)
    path = tmp_path / "f.ply"
    path.write_bytes(ply_bytes("binary_little_endian", header, body + faces.tobytes()))
    m = read_mesh(path)
    assert m.corners.tolist() == [0, 1, 2, 2, 1, 0] and m.sizes.tolist() == [3, 3]
    assert np.array_equal(m.vertices, np.eye(3))


def test_ascii_ply_with_crlf_and_comments(tmp_path):
    text = ("ply\r\nformat ascii 1.0\r\ncomment made by hand\r\nobj_info nothing\r\nelement vertex 3\r\n"
            "property float x\r\nproperty float y\r\nproperty float z\r\nproperty uchar red\r\n"
            "property uchar green\r\nproperty uchar blue\r\nelement face 1\r\n"
            "property list uchar int vertex_indices\r\nend_header\r\n"
            "0 0 0 255 0 0\r\n1 0 0 0 255 0\r\n0 1 0 0 0 255\r\n3 0 1 2\r\n")
    path = tmp_path / "a.ply"
    path.write_bytes(text.encode())
    m = read_mesh(path)
    assert m.properties["color"].dtype == np.uint8
    assert m.properties["color"].tolist() == [[255, 0, 0], [0, 255, 0], [0, 0, 255]]
    assert m.corners.tolist() == [0, 1, 2]


def test_obj_parsing(tmp_path):
    text = """# a comment
mtllib scene.mtl
o thing
v 0 0 0
v 1.0 0 0 1.0
v 1 1 0 0.5 0.5 0.5
vt 0 0
vn 0 0 1
g side
usemtl red
f 1/1/1 2/1/1 3/1/1
v 0 1 0
f -4//1 -2//1 -1//1
s off
f 1 2 3 4
l 1 2
"""
    path = tmp_path / "m.obj"
    path.write_text(text)
    m = read_mesh(path)
    assert m.vertices.tolist() == [[0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0]]
    # Negative indices count back from the last vertex defined so far: -4 -2 -1 -> 1 3 4 (1-based).
    assert m.corners.tolist() == [0, 1, 2, 0, 2, 3, 0, 1, 2, 3]
    assert m.sizes.tolist() == [3, 3, 4]
    assert m.properties == {}
    assert m.triangles().shape == (4, 3)


def test_off_parsing(tmp_path):
    path = tmp_path / "m.off"
    # Counts on the keyword line, comments, per-face colour tokens.
    path.write_text("OFF 4 2 0\n# corners\n0 0 0\n1 0 0\n1 1 0\n0 1 0\n"
                    "3 0 1 2 255 0 0\n4 0 1 2 3 0.5 0.5 0.5 1.0\n")
    m = read_mesh(path)
    assert m.vertices.shape == (4, 3) and m.vertices[2].tolist() == [1, 1, 0]
    assert m.corners.tolist() == [0, 1, 2, 0, 1, 2, 3] and m.sizes.tolist() == [3, 4]
    # Counts on their own line, vertex colours (COFF), blank lines.
    path.write_text("COFF\n\n3 1 3\n0 0 0 1 0 0 1\n1 0 0 0 1 0 1\n0 1 0 0 0 1 1\n3 2 1 0\n")
    m = read_mesh(path)
    assert m.vertices.tolist() == [[0, 0, 0], [1, 0, 0], [0, 1, 0]] and m.corners.tolist() == [2, 1, 0]
    # No keyword at all (it is optional in the Geomview format, from memory).
    path.write_text("3 1 0\n0 0 0\n1 0 0\n0 1 0\n3 0 1 2\n")
    assert read_mesh(path).sizes.tolist() == [3]


# ---------------------------------------------------------------- bad files

def good_binary_ply(tmp_path):
    path = tmp_path / "good.ply"
    write_ply(path, np.random.default_rng(4).random((10, 3)), faces=[[0, 1, 2], [3, 4, 5], [6, 7, 8]])
    return path


def test_truncated_binary_ply(tmp_path):
    data = good_binary_ply(tmp_path).read_bytes()
    cut = tmp_path / "cut.ply"
    cut.write_bytes(data[:-5])  # inside the last face
    with pytest.raises(ValueError, match=r"cut\.ply: truncated data in element 'face' \(record 2 of 3\)"):
        read_mesh(cut)
    cut.write_bytes(data[:data.index(b"end_header") + 11 + 100])  # inside the vertex block
    with pytest.raises(ValueError, match=r"cut\.ply: truncated data: element 'vertex' needs 240 bytes, 100 left"):
        read_mesh(cut)


def test_truncated_ascii_ply(tmp_path):
    path = tmp_path / "t.ply"
    write_ply(path, np.eye(3), faces=[[0, 1, 2]], binary=False)
    text = path.read_bytes()
    path.write_bytes(text[:-4])
    with pytest.raises(ValueError, match=r"t\.ply: truncated data in element 'face'"):
        read_mesh(path)
    path.write_bytes(text.split(b"end_header\n")[0] + b"end_header\n0 0 0\n1 0\n")
    with pytest.raises(ValueError, match=r"t\.ply: truncated data: element 'vertex' needs 9 values, 5 left"):
        read_mesh(path)


PLY_HEAD = "element vertex 3\nproperty float x\nproperty float y\nproperty float z\n"


@pytest.mark.parametrize("content, message", [
    (b"\x00\x01garbage\xff" * 10, "not a PLY file"),
    (b"ply\nformat ascii 1.0\nelement vertex 1\nproperty float x\n", "PLY header has no 'end_header' line"),
    (ply_bytes("ascii", "", b""), "PLY file has no vertex element"),
    (b"ply\nelement vertex 0\nend_header\n", "PLY header has no format line"),
    (b"ply\nformat binary_middle_endian 1.0\nend_header\n", "unsupported PLY format line"),
    (ply_bytes("ascii", "element vertex 1\nproperty int64 x\n", b"0\n"),
     r"unsupported property type 'int64' \(header line 5\)"),
    (ply_bytes("ascii", "element vertex 1\nproperty list float int x\n", b"0\n"), "list count type 'float'"),
    (ply_bytes("ascii", "element vertex 1\nproperty float\n", b"0\n"), "bad property line"),
    (ply_bytes("ascii", "element vertex many\n", b""), "bad element line"),
    (ply_bytes("ascii", "property float x\n", b""), "property before any element"),
    (ply_bytes("ascii", "frobnicate 3\n", b""), "unexpected PLY header line 'frobnicate 3'"),
    (ply_bytes("ascii", "element vertex 1\nproperty float x\nproperty float y\n", b"0 0\n"),
     "vertex element has no z property"),
    (ply_bytes("ascii", PLY_HEAD + "element face 1\nproperty list uchar int vertex_indices\n",
               b"0 0 0\n1 0 0\n0 1 0\n3 0 1 9\n"), "face index 9 out of range for 3 vertices"),
    (ply_bytes("ascii", PLY_HEAD + "element face 1\nproperty list uchar int vertex_indices\n",
               b"0 0 0\n1 0 0\n0 1 0\n2 0 1\n"), "face 0 has 2 corners, at least 3 needed"),
    (ply_bytes("ascii", PLY_HEAD + "element face 1\nproperty list uchar int corners\n",
               b"0 0 0\n1 0 0\n0 1 0\n3 0 1 2\n"), "face element has no vertex_indices"),
    (ply_bytes("ascii", PLY_HEAD + "element face 1\nproperty list uchar float vertex_indices\n",
               b"0 0 0\n1 0 0\n0 1 0\n3 0 1 2\n"), "face vertex indices have a floating-point type"),
    (ply_bytes("ascii", PLY_HEAD, b"0 0 0\n1 zero 0\n0 1 0\n"), "bad number 'zero' in element 'vertex' property 'y'"),
    (ply_bytes("ascii", PLY_HEAD, b"0 0 0\n1 nan 0\n0 1 0\n"), r"vertex 1 has a non-finite coordinate"),
    (ply_bytes("ascii", PLY_HEAD + "property uchar red\n", b"0 0 0 1\n1 0 0 256\n0 1 0 3\n"),
     "value out of range for uint8 in element 'vertex' property 'red'"),
    (ply_bytes("ascii", PLY_HEAD + "element face 1\nproperty list uchar int vertex_indices\n",
               b"0 0 0\n1 0 0\n0 1 0\nthree 0 1 2\n"), "bad list length 'three' in element 'face'"),
    (ply_bytes("ascii", PLY_HEAD + "element face 1\nproperty list char int vertex_indices\n",
               b"0 0 0\n1 0 0\n0 1 0\n-3 0 1 2\n"), "negative list length -3"),
    (ply_bytes("binary_little_endian", PLY_HEAD + "element face 1\nproperty list char int vertex_indices\n",
               np.zeros(9, np.float32).tobytes() + b"\xfd" + bytes(12)), "negative list length -3"),
])
def test_bad_ply_files(tmp_path, content, message):
    path = tmp_path / "bad.ply"
    path.write_bytes(content)
    with pytest.raises(ValueError, match=r"bad\.ply: " + message):
        read_mesh(path)


@pytest.mark.parametrize("name, content, message", [
    ("m.stl", "solid x", r"m\.stl: unknown mesh format '\.stl' \(expected \.ply, \.obj or \.off\)"),
    ("m.obj", "\x00\x17 not a mesh", r"m\.obj: no vertex \('v'\) lines"),
    ("m.obj", "v 0 0\nf 1 1 1\n", "has fewer than 3 coordinates"),
    ("m.obj", "v 0 0 x\nf 1 1 1\n", "bad vertex line 'v 0 0 x'"),
    ("m.obj", "v 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2\n", "face on line 4 has 2 corners"),
    ("m.obj", "v 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 0\n", r"face index 0 on line 4 \(OBJ indices start at 1\)"),
    ("m.obj", "v 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 a\n", "bad face index 'a'"),
    ("m.obj", "v 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 4\n", "face index 3 out of range for 3 vertices"),
    ("m.obj", "v 0 0 0\nf -1 -2 -3\nv 1 0 0\nv 0 1 0\n", r"face index -2 on line 2 reaches before the first vertex \(1 vertices defined so far\)"),
    ("m.off", "", "empty OFF file"),
    ("m.off", "OFF\n", "OFF file has no vertex/face counts"),
    ("m.off", "OFF\nthree 1 0\n", "bad OFF counts line 'three 1 0'"),
    ("m.off", "OFF -3 1 0\n", "negative OFF counts -3 1"),
    ("m.off", "4OFF\n3 1 0\n", "unsupported OFF variant '4OFF'"),
    ("m.off", "OFF\n3 1 0\n0 0 0\n1 0 0\n", r"truncated data: 3 vertices and 1 faces announced, 2 lines present"),
    ("m.off", "OFF\n3 1 0\n0 0 0\n1 0\n0 1 0\n3 0 1 2\n", "bad vertex line '1 0'"),
    ("m.off", "OFF\n3 1 0\n0 0 0\n1 0 0\n0 1 0\n3 0 1\n", "face 0 line '3 0 1' needs at least 3 corners"),
    ("m.off", "OFF\n3 1 0\n0 0 0\n1 0 0\n0 1 0\nx 0 1\n", "bad face line 'x 0 1'"),
    ("m.off", "OFF\n3 1 0\n0 0 0\n1 0 0\n0 1 0\n3 0 1 y\n", "bad face index 'y'"),
    ("m.off", "OFF\n3 1 0\n0 0 0\n1 0 0\n0 1 0\n3 0 1 3\n", "face index 3 out of range for 3 vertices"),
])
def test_bad_obj_off_files(tmp_path, name, content, message):
    path = tmp_path / name
    path.write_bytes(content.encode())
    with pytest.raises(ValueError, match=message):
        read_mesh(path)


def test_missing_file_is_an_os_error(tmp_path):
    with pytest.raises(OSError):
        read_mesh(tmp_path / "nothing.ply")


# ---------------------------------------------------------------- writing: errors and atomicity

@pytest.mark.parametrize("kwargs, message", [
    (dict(properties={"label": np.arange(4)}), "property 'label' has dtype int64, which PLY cannot store"),
    (dict(properties={"w": np.ones(3, np.float32)}), r"property 'w' must have shape \(4,\), got \(3,\)"),
    (dict(properties={"color": np.ones((4, 2), np.uint8)}), r"property 'color' must have shape \(4, 3\) or \(4, 4\)"),
    (dict(properties={"normal": np.ones((4, 4))}), r"property 'normal' must have shape \(4, 3\), got \(4, 4\)"),
    (dict(properties={"w": np.array([0, np.nan, 0, 0])}), "property 'w' has non-finite values"),
    (dict(properties={"my weight": np.ones(4)}), "property name 'my weight' must be non-empty ASCII without spaces"),
    (dict(properties={"flag": np.ones(4, bool)}), "property 'flag' has dtype bool"),
    (dict(properties={"red": np.ones(4, np.uint8), "color": np.ones((4, 3), np.uint8)}),
     r"property names clash: \['red'\]"),
    (dict(properties={"x": np.ones(4)}), r"property names clash: \['x'\]"),
    (dict(faces=[[0, 1, 2]], corners=[0, 1, 2], sizes=[3]), "give either faces or corners and sizes, not both"),
    (dict(corners=[0, 1, 2]), "polygons need both corners and sizes"),
    (dict(faces=[[0, 1, 2, 3]]), r"faces must have shape \(m, 3\) \(triangles\), got \(1, 4\)"),
    (dict(faces=[[0, 1, 4]]), r"corners index 4 out of range for 4 vertices \(polygon 0\)"),
    (dict(corners=[0, 1, 2, 3], sizes=[3]), "polygon sizes add up to 3 corners but 4 corners were given"),
])
def test_write_errors_leave_the_old_file(tmp_path, kwargs, message):
    path = tmp_path / "keep.ply"
    path.write_bytes(b"old content")
    with pytest.raises(ValueError, match=message):
        write_ply(path, np.eye(4, 3), **kwargs)
    assert path.read_bytes() == b"old content"
    assert os.listdir(tmp_path) == ["keep.ply"]


def test_write_rejects_bad_vertices(tmp_path):
    with pytest.raises(ValueError, match=r"vertex 1 has a non-finite coordinate"):
        write_ply(tmp_path / "v.ply", [[0, 0, 0], [np.inf, 0, 0], [0, 1, 0]])
    with pytest.raises(ValueError, match=r"vertices must have shape \(n, 3\), got \(3,\)"):
        write_ply(tmp_path / "v.ply", [0, 0, 0])
    assert not list(tmp_path.iterdir())


def test_failed_write_is_atomic(tmp_path, monkeypatch):
    path = tmp_path / "keep.ply"
    path.write_bytes(b"old content")

    def broken(fd):
        raise OSError("disk full")

    monkeypatch.setattr(os, "fsync", broken)  # the write goes through engine.common.atomic
    with pytest.raises(OSError, match="disk full"):
        write_ply(path, np.eye(3), faces=[[0, 1, 2]])
    assert path.read_bytes() == b"old content"
    assert os.listdir(tmp_path) == ["keep.ply"]  # the temporary file is gone too


def test_meshdata_is_frozen():
    m = MeshData(np.eye(3), np.arange(3), np.array([3]))
    with pytest.raises(AttributeError):
        m.vertices = np.zeros((3, 3))
    assert m.properties == {} and m.triangles().tolist() == [[0, 1, 2]]


# ---------------------------------------------------------------- reference meshes

@pytest.mark.refdata
def test_raw_scan_bunny_binary_ply_matches_libigl():
    import igl  # reference library, test environment only
    path = refdata.path("bunny_raw_scan")
    m = read_mesh(path)
    v, f = igl.read_triangle_mesh(str(path))
    # libigl reads the float32 coordinates into float64: the same values exactly.
    assert np.array_equal(m.vertices, v) and np.array_equal(m.triangles(), f)
    assert m.vertices.shape == (50000, 3) and len(m.sizes) == 99785


@pytest.mark.refdata
def test_cow_off_and_obj_share_faces(tmp_path):
    # docs/platform.md: the CGAL cow.off and pymeshlab's cow.obj have the same faces.
    off = read_mesh(refdata.path("cow_cgal"))
    obj = read_mesh(refdata.path("cow_pymeshlab"))
    assert off.vertices.shape == obj.vertices.shape == (2904, 3)
    assert np.array_equal(off.corners, obj.corners) and np.array_equal(off.sizes, obj.sizes)
    import igl  # reference library, test environment only
    v, f = igl.read_triangle_mesh(str(refdata.path("cow_pymeshlab")))
    assert np.array_equal(obj.vertices, v) and np.array_equal(obj.triangles(), f)
    # And through our own writer and reader, both encodings.
    for binary in (True, False):
        write_ply(tmp_path / "cow.ply", off.vertices, corners=off.corners, sizes=off.sizes, binary=binary)
        back = read_mesh(tmp_path / "cow.ply")
        assert same_bits(back.vertices, off.vertices) and np.array_equal(back.corners, off.corners)


# ---------------------------------------------------------------- files that once gave tracebacks or lost data

FACE = "element face 1\nproperty list uchar int vertex_indices\n"
TRI = b"0 0 0\n1 0 0\n0 1 0\n"


def _read(tmp_path, name, content):
    path = tmp_path / name
    path.write_bytes(content)
    return read_mesh(path)


def test_list_property_of_vertices_is_skipped(tmp_path):
    # PLY allows list properties in any element (Turk 1994, from memory); a
    # per-vertex list (neighbour indices here) cannot be carried, the rest is read.
    head = PLY_HEAD + "property list uchar int neighbours\nproperty uchar quality\n" + FACE
    for fmt, body in [("ascii", b"0 0 0 2 1 2 7\n1 0 0 1 0 8\n0 1 0 0 9\n3 0 1 2\n"),
                      ("binary_little_endian",
                       b"".join(np.array(xyz, "<f4").tobytes() + bytes([len(nb)]) + np.array(nb, "<i4").tobytes()
                                + bytes([q]) for xyz, nb, q in [((0, 0, 0), (1, 2), 7), ((1, 0, 0), (0,), 8),
                                                                ((0, 1, 0), (), 9)])
                       + bytes([3]) + np.array([0, 1, 2], "<i4").tobytes())]:
        m = _read(tmp_path, "lv.ply", ply_bytes(fmt, head, body))
        assert m.vertices.tolist() == [[0, 0, 0], [1, 0, 0], [0, 1, 0]] and m.corners.tolist() == [0, 1, 2]
        assert set(m.properties) == {"quality"} and m.properties["quality"].tolist() == [7, 8, 9]


@pytest.mark.parametrize("name, content", [
    ("a.obj", b"v 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 99999999999999999999999\n"),
    ("a.off", b"OFF\n3 1 0\n0 0 0\n1 0 0\n0 1 0\n3 0 1 99999999999999999999999\n"),
])
def test_huge_face_indices_are_refused(tmp_path, name, content):
    with pytest.raises(ValueError, match="bad face index '99999999999999999999999'"):
        _read(tmp_path, name, content)


@pytest.mark.parametrize("content, message", [
    (ply_bytes("ascii", PLY_HEAD + FACE, TRI + b"99999999999999999999999 0 1 2\n"), "truncated data"),
    (ply_bytes("binary_little_endian", PLY_HEAD + "element face 1\nproperty list uint int vertex_indices\n",
               np.zeros(9, np.float32).tobytes() + np.array([4000000000], "<u4").tobytes() + bytes(12)),
     "truncated data: a list of 4000000000 items"),
    (ply_bytes("ascii", PLY_HEAD + "element face 99999999999999\nproperty list uchar int vertex_indices\n",
               TRI + b"3 0 1 2\n"), "announces 99999999999999 records"),
    (ply_bytes("ascii", PLY_HEAD + "element face 1\nproperty int vertex_indices\n", TRI + b"2\n"),
     "'vertex_indices' is a single number"),
    (ply_bytes("ascii", PLY_HEAD + FACE, TRI + b"3 0 1 2\n3 0 2 1\n"),
     "4 values after the last element: the header's element counts are smaller"),
    (ply_bytes("binary_little_endian", PLY_HEAD + FACE,
               np.zeros(9, np.float32).tobytes() + (bytes([3]) + np.array([0, 1, 2], "<i4").tobytes()) * 2),
     "13 bytes after the last element"),
])
def test_bad_counts_are_one_clear_error(tmp_path, content, message):
    with pytest.raises(ValueError, match=message):
        _read(tmp_path, "c.ply", content)


def test_text_details_that_were_misread(tmp_path):
    # A UTF-8 byte-order mark (Unicode standard, from memory) does not hide the first vertex.
    m = _read(tmp_path, "bom.obj", b"\xef\xbb\xbfv 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 3\n")
    assert len(m.vertices) == 3 and m.corners.tolist() == [0, 1, 2]
    # '#' starts a comment anywhere on an OBJ line (common practice)
    m = _read(tmp_path, "c.obj", b"v 0 0 0 # origin\nv 1 0 0\nv 0 1 0\nf 1 2 3 # a face\n")
    assert m.corners.tolist() == [0, 1, 2]
    # a comment that mentions end_header does not end the header
    m = _read(tmp_path, "eh.ply", ply_bytes("ascii", "comment see end_header\n" + PLY_HEAD + FACE, TRI + b"3 0 1 2\n"))
    assert m.corners.tolist() == [0, 1, 2]
    m = _read(tmp_path, "bom.ply", b"\xef\xbb\xbf" + ply_bytes("ascii", PLY_HEAD + FACE, TRI + b"3 0 1 2\n"))
    assert len(m.vertices) == 3


def test_scalar_property_named_color_round_trips(tmp_path):
    m = _read(tmp_path, "s.ply", ply_bytes("ascii", PLY_HEAD + "property float color\n" + FACE,
                                           b"0 0 0 0.25\n1 0 0 0.5\n0 1 0 1\n3 0 1 2\n"))
    assert m.properties["color"].tolist() == [0.25, 0.5, 1.0]
    write_ply(tmp_path / "o.ply", m.vertices, corners=m.corners, sizes=m.sizes, properties=m.properties)
    assert read_mesh(tmp_path / "o.ply").properties["color"].tolist() == [0.25, 0.5, 1.0]
