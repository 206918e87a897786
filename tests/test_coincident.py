"""Distinct vertices at one place: refused by Mesh, joined by merge_duplicate_vertices.

The problem: -u'' = 1 on the unit square, u = 0 on x = 0 and x = 1, insulated
top and bottom.  Its solution u = x (1 - x) / 2 depends on x only and has the
maximum 1/8 at x = 1/2 (closed form, any calculus text).  P1 on the structured
triangles reproduces it at the nodes (the 1D P1 solution of -u'' = f is exact
at the nodes: Hughes, The Finite Element Method, 2000, section 1.10).  With the
nodes of the line x = 1/4 repeated on its right, the domain is cut apart there
and the maximum moves to about 0.28125 = (3/4)**2 / 2 (the right part,
insulated at the cut).
"""

from __future__ import annotations

import numpy as np
import pytest

import galerkit as gk
from galerkit.errors import MeshError
from galerkit.mesh import merge_duplicate_vertices

N = 8


def _cut_square():
    """Structured triangles of the unit square, nodes on x = 1/4 repeated for the
    cells on its right (new ids at the end)."""
    sq = gk.structured_triangles(N, N)
    pts, cells = sq.points.copy(), sq.cells.astype(np.int64).copy()
    on_line = np.flatnonzero(np.abs(pts[:, 0] - 0.25) < 1e-12)
    copy_of = np.full(len(pts), -1)
    copy_of[on_line] = len(pts) + np.arange(on_line.size)
    right = pts[cells].mean(axis=1)[:, 0] > 0.25
    sub = cells[right]
    sub[copy_of[sub] >= 0] = copy_of[sub[copy_of[sub] >= 0]]
    cells[right] = sub
    return np.concatenate([pts, pts[on_line]]), cells, on_line


def _max_of_solution(mesh):
    mesh.tag_boundary("ends", lambda x: (x[0] < 1e-12) | (x[0] > 1 - 1e-12))
    sol = gk.PoissonProblem(mesh, 1.0, 1.0, {"ends": 0.0}).solve(1)
    return float(sol.u.max())


def test_mesh_refuses_distinct_vertices_at_one_place_and_names_them():
    pts, cells, on_line = _cut_square()
    with pytest.raises(MeshError, match="same place") as err:
        gk.Mesh(pts, cells)
    msg = str(err.value)
    assert f"{int(on_line[0])} and {len(pts) - on_line.size}" in msg
    assert f"({on_line.size} such pairs" in msg and "merge_duplicate_vertices" in msg


def test_a_cut_mesh_gives_the_wrong_maximum_so_the_check_matters():
    pts, cells, _ = _cut_square()
    mesh = gk.Mesh(pts, cells, check_coincident=False)
    assert mesh.connected_components()[0] == 2  # the two sides share no vertex
    # about 0.28125 (the cut part's closed form; P1 is not nodally exact at the cut)
    assert _max_of_solution(mesh) > 0.28


def test_merged_mesh_solves_to_the_exact_maximum_one_eighth():
    pts, cells, on_line = _cut_square()
    p, c, old_to_new = merge_duplicate_vertices(pts, cells)
    assert len(p) == len(pts) - on_line.size
    assert np.array_equal(old_to_new[len(pts) - on_line.size:], old_to_new[on_line])
    assert _max_of_solution(gk.Mesh(p, c)) == pytest.approx(0.125, abs=1e-12)


def test_msh_file_with_nodes_repeated_along_an_interior_line(tmp_path):
    meshio = pytest.importorskip("meshio")
    from galerkit.bindings.files import read_mesh

    pts, cells, _ = _cut_square()
    path = tmp_path / "cut.msh"
    meshio.write(path, meshio.Mesh(np.c_[pts, np.zeros(len(pts))], [("triangle", cells)]),
                 file_format="gmsh22", binary=False)
    with pytest.raises(MeshError, match="same place"):
        read_mesh(path)
    raw = meshio.read(path)
    p, c, _ = merge_duplicate_vertices(raw.points[:, :2], raw.cells_dict["triangle"])
    assert _max_of_solution(gk.Mesh(p, c)) == pytest.approx(0.125, abs=1e-12)


def test_nearly_coincident_vertices_count_relative_to_the_local_edge_length():
    # a tiny mesh (edges 1e-6): vertices 1e-12 apart coincide, 1e-15-scale meshes too
    s = 1e-6
    pts = np.array([[0, 0], [s, 0], [0, s], [s + 1e-17, 0], [s, s], [1e-17, s]])
    with pytest.raises(MeshError, match="same place"):
        gk.Mesh(pts, [[0, 1, 2], [3, 4, 5]])
    # the same offsets are real geometry on a mesh of edge 1e-15
    pts = np.array([[0, 0], [1e-15, 0], [0, 1e-15], [2e-15, 0], [2e-15, 1e-15]])
    gk.Mesh(pts, [[0, 1, 2], [1, 3, 4], [1, 4, 2]])
