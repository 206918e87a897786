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


def _write_cut_msh(path):
    """The cut square as a Gmsh 2.2 file with line groups ``ends`` (x = 0 and x = 1)
    and ``bottom`` (y = 0); the bottom lines right of x = 1/4 use the repeated ids."""
    meshio = pytest.importorskip("meshio")
    pts, cells, on_line = _cut_square()
    edges = np.concatenate([cells[:, [0, 1]], cells[:, [1, 2]], cells[:, [2, 0]]])
    edges = np.unique(np.sort(edges, axis=1), axis=0)
    x, y = pts[edges, 0], pts[edges, 1]
    ends = edges[((x < 1e-12) | (x > 1 - 1e-12)).all(axis=1)]
    bottom = edges[(y < 1e-12).all(axis=1)]
    assert np.isin(bottom, len(pts) - on_line.size + np.arange(on_line.size)).any()
    lines = np.concatenate([ends, bottom])
    groups = np.r_[np.full(len(ends), 1), np.full(len(bottom), 2)]
    meshio.write(path, meshio.Mesh(
        np.c_[pts, np.zeros(len(pts))], [("line", lines), ("triangle", cells)],
        cell_data={"gmsh:physical": [groups, np.full(len(cells), 3)],
                   "gmsh:geometrical": [groups, np.full(len(cells), 3)]},
        field_data={"ends": np.array([1, 1]), "ymin": np.array([2, 1]),
                    "plate": np.array([3, 2])}), file_format="gmsh22", binary=False)
    return len(pts) - on_line.size, len(ends), len(bottom)


def test_read_mesh_merge_duplicates_joins_the_file_and_its_tags_follow(tmp_path):
    from galerkit.bindings.files import read_mesh

    n_merged, n_ends, n_bottom = _write_cut_msh(tmp_path / "cut.msh")
    with pytest.raises(MeshError, match=r"same place.*read_mesh\(path, merge_duplicates=True\)"
                       r".*merge_duplicates = true under \[mesh\]"):
        read_mesh(tmp_path / "cut.msh")
    mesh = read_mesh(tmp_path / "cut.msh", merge_duplicates=True)
    assert mesh.n_vertices == n_merged and mesh.connected_components()[0] == 1
    assert len(mesh.facet_groups["ends"]) == n_ends
    assert len(mesh.facet_groups["ymin"]) == n_bottom == N
    facet_y = mesh.points[mesh.boundary_facets[mesh.facet_groups["ymin"]], 1]
    assert np.all(facet_y == 0.0)
    # -u'' = 1, u = 0 at the ends (the file's own tag): the maximum 1/8 (module docstring)
    sol = gk.PoissonProblem(mesh, 1.0, 1.0, {"ends": 0.0}).solve(1)
    assert float(sol.u.max()) == pytest.approx(0.125, abs=1e-12)


def test_problem_file_key_merge_duplicates_joins_the_mesh_file(tmp_path):
    from galerkit.bindings.command.problemfile import load_problem
    from galerkit.errors import InputError

    n_merged, _, _ = _write_cut_msh(tmp_path / "cut.msh")
    text = ('[mesh]\nfile = "cut.msh"\n{}[source]\nvalue = 1\n'
            '[[boundary]]\ntag = "ends"\nkind = "dirichlet"\nu = 0\n')
    (tmp_path / "refused.toml").write_text(text.format(""))
    with pytest.raises(InputError, match=r"line 2: mesh\.file: .*same place.*merge_duplicates"):
        load_problem(tmp_path / "refused.toml")
    (tmp_path / "joined.toml").write_text(text.format("merge_duplicates = true\n"))
    spec = load_problem(tmp_path / "joined.toml")
    assert spec.mesh.n_vertices == n_merged
    assert spec.mesh_description.endswith(f", {N + 1} coincident vertices joined "
                                          "(merge_duplicates)")
    problem, opts = spec.build()
    assert float(problem.solve(1).u.max()) == pytest.approx(0.125, abs=1e-12)
