"""Mesh files read and written in chunks: the same arrays and bytes whatever the chunk size.

Reading streams the file a chunk at a time straight into the final arrays
(engine/intake/ply_stream.py); writing formats one chunk of records at a time.
Chunk sizes here go down to one byte, so every record, list and value
straddles a chunk boundary somewhere. OBJ files are read in pieces that
end at line ends. PLY layout as described by Greg Turk,
"The PLY Polygon File Format" (1994) (from memory).
"""

import numpy as np
import pytest

from engine.intake.files import read_mesh, write_ply
from engine.intake.ply_stream import CHUNK_BYTES

CHUNKS = [1, 2, 7, 13, 64, 1000, CHUNK_BYTES]


def same_mesh(a, b):
    assert a.vertices.tobytes() == b.vertices.tobytes() and a.vertices.dtype == b.vertices.dtype
    assert np.array_equal(a.corners, b.corners) and np.array_equal(a.sizes, b.sizes)
    assert a.corners.dtype == b.corners.dtype == np.int64 and a.sizes.dtype == np.int64
    assert list(a.properties) == list(b.properties)
    for k in a.properties:
        assert a.properties[k].dtype == b.properties[k].dtype and a.properties[k].shape == b.properties[k].shape
        assert a.properties[k].tobytes() == b.properties[k].tobytes(), k


def mixed_sizes(rng, count):
    """Polygon sizes in runs: long runs of one size, alternating sizes, runs just around the
    length where reading switches from record-by-record to whole runs, and one polygon longer
    than a small chunk."""
    runs = [np.full(200, 3), np.tile([3, 4], 40), np.full(15, 4), np.full(16, 3), np.full(17, 5),
            rng.integers(3, 9, 100), np.full(1, 300), np.full(300, 4)]
    return np.concatenate(runs)[:count]


def mesh(rng, n=500, sizes=None):
    v = rng.standard_normal((n, 3)) * 10.0 ** rng.integers(-6, 6, (n, 1))
    s = sizes if sizes is not None else mixed_sizes(rng, 10**6)
    c = rng.integers(0, n, int(s.sum()))
    props = {"color": rng.integers(0, 256, (n, 3), dtype=np.uint8),
             "weight": rng.standard_normal(n).astype(np.float32),
             "label": rng.integers(-2**31, 2**31 - 1, n).astype(np.int32)}
    return v, c, s, props


@pytest.mark.parametrize("binary", [True, False])
@pytest.mark.parametrize("kind", ["mixed", "triangles"])
def test_any_chunk_size_reads_and_writes_the_same(tmp_path, binary, kind):
    rng = np.random.default_rng(11)
    sizes = None if kind == "mixed" else np.full(700, 3)
    v, c, s, props = mesh(rng, sizes=sizes)
    whole = tmp_path / "whole.ply"
    write_ply(whole, v, corners=c, sizes=s, properties=props, binary=binary)
    reference = whole.read_bytes()
    m = read_mesh(whole)
    # what was written is what was given
    assert m.vertices.tobytes() == v.tobytes()
    assert np.array_equal(m.corners, c) and np.array_equal(m.sizes, s)
    for k, a in props.items():
        assert m.properties[k].tobytes() == a.tobytes() and m.properties[k].dtype == a.dtype
    for chunk in CHUNKS:
        same_mesh(read_mesh(whole, chunk_bytes=chunk), m)
        piece = tmp_path / f"piece{chunk}.ply"
        write_ply(piece, v, corners=c, sizes=s, properties=props, binary=binary, chunk_bytes=chunk)
        assert piece.read_bytes() == reference, chunk


@pytest.mark.parametrize("binary", [True, False])
def test_damaged_files_give_the_same_error_at_every_chunk_size(tmp_path, binary):
    # Cut or extended at many places, a file reads (or fails, with one message) the same
    # way whatever the chunk size.
    rng = np.random.default_rng(12)
    v, c, s, props = mesh(rng, n=12, sizes=np.array([3, 4, 3, 5, 3, 3, 4, 4, 3]))
    path = tmp_path / "m.ply"
    write_ply(path, v, corners=c, sizes=s, properties=props, binary=binary)
    data = path.read_bytes()
    body = data.index(b"end_header") + 11
    cuts = sorted(set(range(body, len(data), max(1, (len(data) - body) // 60))) | {len(data) - 1})
    variants = [data[:cut] for cut in cuts] + [data + b"\x01\x02 7 8", data + b"\n \n"]
    for variant in variants:
        damaged = tmp_path / "d.ply"
        damaged.write_bytes(variant)
        outcomes = set()
        for chunk in (1, 3, 10, CHUNK_BYTES):
            try:
                r = read_mesh(damaged, chunk_bytes=chunk)
                outcomes.add(("read", r.vertices.tobytes(), r.corners.tobytes(), r.sizes.tobytes()))
            except ValueError as exc:
                assert "\n" not in str(exc)
                outcomes.add(("error", str(exc)))
        assert len(outcomes) == 1, (len(variant), outcomes)
        if len(variant) < len(data.rstrip()):  # cut inside a value or record
            assert next(iter(outcomes))[0] == "error"


def test_hand_written_big_endian_file_with_mixed_lists(tmp_path):
    # Big-endian records built with explicit dtypes (Turk 1994, from memory): an element
    # before the vertices, a vertex list property (skipped), faces with a property on each
    # side of the list, mixed polygon sizes.
    head = ("ply\nformat binary_big_endian 1.0\n"
            "element camera 2\nproperty list uchar short name\nproperty float focal\n"
            "element vertex 5\nproperty float x\nproperty float y\nproperty float z\n"
            "property list uchar int ring\nproperty ushort id\n"
            "element face 3\nproperty int group\nproperty list ushort uint vertex_indices\nproperty uchar flag\n"
            "end_header\n").encode()
    body = b""
    for name, focal in (([1, 2, 3], 35.0), ([], 50.0)):
        body += bytes([len(name)]) + np.array(name, ">i2").tobytes() + np.array(focal, ">f4").tobytes()
    xyz = np.array([[0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0], [0.5, 0.5, 1]], np.float32)
    rings = [[1, 3], [0], [], [0, 2, 4], [1]]
    for p, ring, ident in zip(xyz, rings, (7, 8, 65535, 0, 300)):
        body += p.astype(">f4").tobytes() + bytes([len(ring)]) + np.array(ring, ">i4").tobytes()
        body += np.array(ident, ">u2").tobytes()
    faces = [[0, 1, 2, 3], [0, 1, 4], [1, 2, 4]]
    for g, f in enumerate(faces):
        body += np.array(g, ">i4").tobytes() + np.array(len(f), ">u2").tobytes()
        body += np.array(f, ">u4").tobytes() + bytes([g])
    path = tmp_path / "hand.ply"
    path.write_bytes(head + body)
    for chunk in CHUNKS:
        m = read_mesh(path, chunk_bytes=chunk)
        assert m.vertices.tolist() == xyz.tolist()
        assert m.sizes.tolist() == [4, 3, 3] and m.corners.tolist() == [0, 1, 2, 3, 0, 1, 4, 1, 2, 4]
        assert list(m.properties) == ["id"] and m.properties["id"].dtype == np.uint16
        assert m.properties["id"].tolist() == [7, 8, 65535, 0, 300]


def test_hand_written_ascii_file_with_values_across_lines(tmp_path):
    # ASCII values are whitespace-separated; a record may wrap lines (Turk 1994, from memory).
    text = (b"ply\nformat ascii 1.0\nelement vertex 4\nproperty double x\nproperty double y\n"
            b"property double z\nproperty uchar red\nproperty uchar green\nproperty uchar blue\n"
            b"element face 2\nproperty list uchar int vertex_indices\nend_header\n"
            b"0 0 0 255 0 0\n1 0 0\t0 255 0\r\n1 1 0 0 0 255\n0 1\n0.25 1 2 3\n"
            b"4 0 1 2 3\n3\n0 2 3\n")
    path = tmp_path / "a.ply"
    path.write_bytes(text)
    for chunk in CHUNKS:
        m = read_mesh(path, chunk_bytes=chunk)
        assert m.vertices.tolist() == [[0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0.25]]
        assert m.properties["color"].tolist() == [[255, 0, 0], [0, 255, 0], [0, 0, 255], [1, 2, 3]]
        assert m.sizes.tolist() == [4, 3] and m.corners.tolist() == [0, 1, 2, 3, 0, 2, 3]


@pytest.mark.parametrize("encoding", ["Binary", "Ascii"])
def test_files_written_by_libigl_read_the_same(tmp_path, encoding):
    import igl  # reference library (libigl's PLY writer and reader), test environment only

    rng = np.random.default_rng(13)
    v = rng.standard_normal((3000, 3))
    f = rng.integers(0, 3000, (5000, 3)).astype(np.int64)
    path = tmp_path / "igl.ply"
    igl.write_triangle_mesh(str(path), v, f, getattr(igl.FileEncoding, encoding))
    ref_v, ref_f = igl.read_triangle_mesh(str(path))
    for chunk in (5, 4096, CHUNK_BYTES):
        m = read_mesh(path, chunk_bytes=chunk)
        # libigl reads its own file into float64: the same values exactly (binary: the written doubles)
        assert np.array_equal(m.vertices, ref_v) and np.array_equal(m.triangles(), ref_f)
        if encoding == "Binary":
            assert np.array_equal(m.vertices, v) and np.array_equal(m.triangles(), f)
    # and the other way round: libigl reads what we write in pieces
    write_ply(tmp_path / "ours.ply", v, faces=f, chunk_bytes=777)
    back_v, back_f = igl.read_triangle_mesh(str(tmp_path / "ours.ply"))
    assert np.array_equal(back_v, v) and np.array_equal(back_f, f)


@pytest.mark.parametrize("content, message", [
    # counts far beyond what the file can hold are refused before anything is allocated
    (b"ply\nformat binary_little_endian 1.0\nelement vertex 999999999999999\nproperty double x\n"
     b"property double y\nproperty double z\nend_header\n" + bytes(48),
     "truncated data: element 'vertex' needs 23999999999999976 bytes, 48 left"),
    (b"ply\nformat ascii 1.0\nelement vertex 999999999999999\nproperty double x\n"
     b"property double y\nproperty double z\nend_header\n0 0 0\n1 0 0\n",
     "truncated data: element 'vertex' needs 2999999999999997 values, 6 left"),
    (b"ply\nformat binary_big_endian 1.0\nelement vertex 3\nproperty float x\nproperty float y\n"
     b"property float z\nelement face 88888888888\nproperty list uchar int vertex_indices\nend_header\n"
     + bytes(36) + b"\x03" + bytes(12), "announces 88888888888 records, more than the 13 bytes left"),
])
def test_huge_counts_are_refused_at_once(tmp_path, content, message):
    path = tmp_path / "huge.ply"
    path.write_bytes(content)
    for chunk in (4, CHUNK_BYTES):
        with pytest.raises(ValueError, match=message):
            read_mesh(path, chunk_bytes=chunk)


def test_obj_in_pieces_reads_the_same(tmp_path):
    # OBJ (Wavefront, from memory): 'v' lines, 'f' lines of 1-based or negative (relative)
    # indices with v/vt/vn tokens, '#' comments; a UTF-8 byte-order mark and CRLF line ends.
    text = ("\ufeff# made by hand\r\nv 0 0 0\r\nv 1 0 0 # x\r\nv 1 1 0\r\nvt 0.5 0.5\r\nf 1/1 2/1 3/1\r\n"
            "v 0 1 0\r\nv 0.5 0.5 1\r\nf -1 -4 -3 -2\r\nf\t5//1 4//1 1//1\r\n")
    path = tmp_path / "hand.obj"
    path.write_bytes(text.encode("utf-8"))
    for chunk in CHUNKS:
        m = read_mesh(path, chunk_bytes=chunk)
        assert m.vertices.tolist() == [[0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0], [0.5, 0.5, 1]]
        assert m.sizes.tolist() == [3, 4, 3] and m.corners.tolist() == [0, 1, 2, 4, 1, 2, 3, 4, 3, 0]
    bad = tmp_path / "bad.obj"
    bad.write_bytes(b"v 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 3\n# a comment\nv 1 1 1\nf -5 1 2\n")
    for chunk in CHUNKS:
        with pytest.raises(ValueError, match=r"face index -5 on line 7 reaches before the first vertex "
                                             r"\(4 vertices defined so far\)"):
            read_mesh(bad, chunk_bytes=chunk)


def test_obj_written_by_libigl_reads_the_same(tmp_path):
    import igl  # reference library (libigl's OBJ writer and reader), test environment only

    rng = np.random.default_rng(14)
    v = rng.standard_normal((2000, 3))
    f = rng.integers(0, 2000, (3000, 3)).astype(np.int64)
    path = tmp_path / "igl.obj"
    igl.writeOBJ(str(path), v, f)
    ref_v, ref_f = igl.read_triangle_mesh(str(path))
    for chunk in (5, 4096, CHUNK_BYTES):
        m = read_mesh(path, chunk_bytes=chunk)
        assert np.array_equal(m.vertices, ref_v) and np.array_equal(m.triangles(), ref_f)


def test_writer_checks_its_arguments_before_the_first_piece():
    from engine.intake.files import ply_chunks

    # a lazy writer that checked only while writing would leave the error to the staged file
    with pytest.raises(ValueError, match="property 'w' has non-finite values"):
        ply_chunks(np.eye(3), faces=[[0, 1, 2]], properties={"w": np.array([0.0, np.inf, 1.0])})
    pieces = list(ply_chunks(np.eye(3), faces=[[0, 1, 2]], chunk_bytes=1))
    assert pieces[0].startswith(b"ply\n") and len(pieces) == 1 + 3 + 1  # header, a piece per vertex, the face


@pytest.mark.parametrize("fmt", ["ascii", "binary_little_endian"])
def test_elements_without_records_or_properties(tmp_path, fmt):
    # An element may have no properties or no records (Turk 1994, from memory): nothing to read.
    head = (f"ply\nformat {fmt} 1.0\nelement marker 4\nelement vertex 3\nproperty float x\nproperty float y\n"
            "property float z\nelement face 0\nproperty list uchar int vertex_indices\nelement edge 0\n"
            "property int a\nend_header\n").encode()
    body = b"1 0 0\n0 1 0\n0 0 1\n" if fmt == "ascii" else np.eye(3, dtype="<f4").tobytes()
    path = tmp_path / "e.ply"
    path.write_bytes(head + body)
    for chunk in (1, CHUNK_BYTES):
        m = read_mesh(path, chunk_bytes=chunk)
        assert m.vertices.tolist() == np.eye(3).tolist() and m.corners.size == 0 and m.sizes.size == 0


def test_a_write_that_fails_between_pieces_leaves_the_old_file(tmp_path, monkeypatch):
    # The pieces go straight into the staged file (engine/common/atomic.py): a failure after
    # some of them were written leaves the target as it was and no temporary file.
    import engine.intake.files as files

    def broken(columns, polygons, types, chunk):
        yield b"some records"
        raise MemoryError("no room for the next piece")

    path = tmp_path / "keep.ply"
    path.write_bytes(b"old content")
    monkeypatch.setattr(files, "binary_records", broken)
    with pytest.raises(MemoryError):
        write_ply(path, np.eye(3), faces=[[0, 1, 2]])
    assert path.read_bytes() == b"old content"
    assert [p.name for p in tmp_path.iterdir()] == ["keep.ply"]
