"""The VTU writer (galerkit.bindings.files.vtu) against the VTK XML format.

Source: the VTK file-format documentation ("VTK File Formats", XML formats,
UnstructuredGrid; Kitware): compressed binary arrays are a header of UInt64 words
(number of blocks, uncompressed block size, size of the last block, compressed size
of each block) and the zlib-compressed blocks, base64-encoded apart.  Files are read
back with meshio, the reference reader of the project, and one array is decoded by
hand from that description with Python's base64 and zlib.
"""

from __future__ import annotations

import base64
import xml.etree.ElementTree as ET
import zlib

import meshio
import numpy as np
import pytest

from galerkit.bindings.files.vtu import BLOCK_BYTES, write_vtu


def _tets(n):
    rng = np.random.default_rng(7)
    pts = rng.random((n, 3))
    cells = rng.integers(0, n, size=(2 * n, 4)).astype(np.int64)
    return pts, cells


def test_arrays_of_every_kind_read_back_exactly_with_meshio(tmp_path):
    pts, cells = _tets(20000)  # connectivity > 8 blocks of 32 KiB: the pooled path
    m = cells.shape[0]
    point_data = {"u": np.sin(pts[:, 0]), "tag_wall": (pts[:, 1] > 0.5).astype(np.uint8)}
    cell_data = {"flux": np.cos(pts[cells[:, 0]]), "region": np.arange(m, dtype=np.int32) % 3,
                 "parent_cell": np.arange(m, dtype=np.int64),
                 "tensor": np.arange(9 * m, dtype=np.float64).reshape(m, 9)}
    f = write_vtu(tmp_path / "a.vtu", pts, "tetra", cells, point_data, cell_data)
    back = meshio.read(f)
    assert np.array_equal(back.points, pts)
    assert back.cells[0].type == "tetra" and np.array_equal(back.cells[0].data, cells)
    for k, v in point_data.items():
        assert back.point_data[k].dtype == v.dtype and np.array_equal(back.point_data[k], v)
    for k, v in cell_data.items():
        got = back.cell_data[k][0]
        assert got.dtype == v.dtype and np.array_equal(got, v), k


def _decode(da, dtype):
    """A compressed binary DataArray decoded by hand from the format description."""
    text = da.text.strip()
    # the header: 3 + n UInt64 words; its base64 text is 4 characters per 3 bytes
    n_blocks = int(np.frombuffer(base64.b64decode(text[:16])[:8], dtype="<u8")[0])
    head_chars = 4 * -(-8 * (3 + n_blocks) // 3)
    header = np.frombuffer(base64.b64decode(text[:head_chars]), dtype="<u8")
    data = base64.b64decode(text[head_chars:])
    assert len(data) == int(header[3:].sum())
    raw, pos = b"", 0
    for size in header[3:]:
        raw += zlib.decompress(data[pos:pos + int(size)])
        pos += int(size)
    assert len(raw) == (n_blocks - 1) * int(header[1]) + int(header[2])
    return header, np.frombuffer(raw, dtype=dtype)


def test_an_array_decodes_by_hand_from_the_format_description(tmp_path):
    pts = np.column_stack([np.linspace(0, 1, 6000), np.zeros(6000), np.zeros(6000)])
    cells = np.array([[0, 1, 2], [2, 3, 4]])
    u = np.linspace(-1.0, 1.0, 6000) ** 3  # 48,000 bytes: two blocks, a short last one
    f = write_vtu(tmp_path / "b.vtu", pts, "triangle", cells, {"u": u})
    root = ET.parse(f).getroot()
    assert root.get("type") == "UnstructuredGrid" and root.get("header_type") == "UInt64"
    assert root.get("compressor") == "vtkZLibDataCompressor"
    assert root.get("byte_order") == "LittleEndian"
    piece = root.find("UnstructuredGrid/Piece")
    assert piece.get("NumberOfPoints") == "6000" and piece.get("NumberOfCells") == "2"
    da = piece.find("PointData/DataArray[@Name='u']")
    assert da.get("type") == "Float64" and da.get("format") == "binary"
    header, got = _decode(da, "<f8")
    assert header[0] == 2 and header[1] == BLOCK_BYTES and header[2] == u.nbytes - BLOCK_BYTES
    assert np.array_equal(got, u)
    _, off = _decode(piece.find("Cells/DataArray[@Name='offsets']"), "<i4")
    assert off.tolist() == [3, 6]  # the end of each cell in the connectivity
    _, types = _decode(piece.find("Cells/DataArray[@Name='types']"), "u1")
    assert types.tolist() == [5, 5]  # VTK_TRIANGLE (VTK documentation)
    assert meshio.read(f).cells[0].type == "triangle"


def test_an_empty_array_is_one_empty_block(tmp_path):
    # meshio cannot read a mesh without cells, so this one is decoded by hand
    f = write_vtu(tmp_path / "c.vtu", np.zeros((3, 3)), "triangle",
                  np.zeros((0, 3), dtype=np.int64), {"u": np.ones(3)}, {"k": np.zeros(0)})
    piece = ET.parse(f).getroot().find("UnstructuredGrid/Piece")
    assert piece.get("NumberOfCells") == "0"
    header, got = _decode(piece.find("CellData/DataArray[@Name='k']"), "<f8")
    assert header[:3].tolist() == [1, BLOCK_BYTES, 0] and got.size == 0
    assert np.array_equal(_decode(piece.find("PointData/DataArray[@Name='u']"), "<f8")[1],
                          np.ones(3))


@pytest.mark.parametrize("kw, match", [
    (dict(points=np.zeros((4, 2))), "points must have shape"),
    (dict(cell_type="quad"), "cell type 'quad'"),
    (dict(cells=np.zeros((2, 4), dtype=int)), "triangle cells need 3"),
    (dict(point_data={"u": np.zeros(3)}), "point array 'u' has shape"),
    (dict(cell_data={"c": np.zeros((2, 2), dtype=np.complex128)}), "array 'c' has dtype"),
])
def test_wrong_input_is_named(tmp_path, kw, match):
    args = dict(points=np.zeros((4, 3)), cell_type="triangle",
                cells=np.array([[0, 1, 2], [1, 2, 3]]), point_data=None, cell_data=None)
    args.update(kw)
    with pytest.raises((ValueError, TypeError), match=match):
        write_vtu(tmp_path / "d.vtu", **args)
