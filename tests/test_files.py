"""Specification of mesh files in and result files out (galerkit.bindings.files).

Mesh files are written at test time with meshio (the reference reader/writer
of these formats); the tag names and facet counts they must give back are
counted by hand on structured grids.  Result files are read back with meshio
and compared with the solution evaluated independently (point location in
galerkit.evaluation, or the dof values at coinciding nodes).  The patch test
(Irons & Razzaque, 1972) gives an exactly known gradient.
"""

from __future__ import annotations

import os
import warnings

import meshio
import numpy as np
import pytest

import galerkit as gk
from galerkit.bindings.files import (TAG_ARRAY_PREFIX, read_mesh, sample_solution,
                                     write_solution)
from galerkit.errors import InputError, MeshError

# ----------------------------------------------------------------------------
# helpers: meshes with Gmsh physical groups, written by meshio
# ----------------------------------------------------------------------------
SIDE_IDS = {"xmin": 11, "xmax": 12, "ymin": 13, "ymax": 13}  # top+bottom: one group
NAMES = {"inlet": [11, 1], "outlet": [12, 1], "plate": [1, 2]}  # 13 has no name


def square_with_groups(n=4):
    """n x n square: line blocks per side (geometrical ids 1..4) and the triangles.

    Returns the meshio Mesh; points have a zero z column (as Gmsh writes 2D).
    """
    m = gk.structured_triangles(n, n)
    pts = np.column_stack([m.points, np.zeros(m.n_vertices)])
    cells, phys, geo = [], [], []
    dim_tags = np.tile([2, 1], (m.n_vertices, 1))  # interior nodes: the surface
    for k, side in enumerate(("xmin", "xmax", "ymin", "ymax")):
        f = m.boundary_facets[m.facet_groups[side]]
        cells.append(("line", f))
        phys.append(np.full(len(f), SIDE_IDS[side]))
        geo.append(np.full(len(f), k + 1))
        dim_tags[f.ravel()] = [1, k + 1]
    cells.append(("triangle", np.asarray(m.cells)))
    phys.append(np.full(m.n_cells, 1))
    geo.append(np.full(m.n_cells, 1))
    return meshio.Mesh(pts, cells, cell_data={"gmsh:physical": phys, "gmsh:geometrical": geo},
                       field_data={k: np.array(v) for k, v in NAMES.items()},
                       point_data={"gmsh:dim_tags": dim_tags})


def write_msh(path, mesh, fmt, binary=False):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        meshio.write(str(path), mesh, file_format=fmt, binary=binary)
    return path


@pytest.mark.parametrize("fmt,binary", [("gmsh22", False), ("gmsh22", True),
                                        ("gmsh", False), ("gmsh", True)])
def test_gmsh_physical_groups_come_back_as_named_tags_with_hand_counted_facets(tmp_path, fmt,
                                                                             binary):
    # source: meshio writes Gmsh 2.2 ("gmsh22") and 4.1 ("gmsh") files; counts by hand:
    # 4 edges per side of a 4 x 4 square, 16 in all.
    path = write_msh(tmp_path / "square.msh", square_with_groups(4), fmt, binary)
    mesh = read_mesh(path)
    assert mesh.dim == 2 and mesh.n_cells == 32
    counts = {k: len(v) for k, v in mesh.facet_groups.items()}
    assert counts == {"inlet": 4, "outlet": 4, "13": 8, "boundary": 16}
    x = mesh.facet_midpoints()
    assert np.allclose(x[0, mesh.facet_groups["inlet"]], 0.0)
    assert np.allclose(x[0, mesh.facet_groups["outlet"]], 1.0)
    assert np.allclose(np.sort(np.unique(x[1, mesh.facet_groups["13"]])), [0.0, 1.0])


def test_tetrahedra_take_their_tags_from_triangles_of_the_file(tmp_path):
    # source: counted by hand, 2 x 2 squares x 2 triangles = 8 triangles per face of a
    # 2 x 2 x 2 box; meshio writes the file (Gmsh 2.2).
    m = gk.structured_tetrahedra(2, 2, 2)
    floor = m.boundary_facets[m.facet_groups["zmin"]]  # z = 0
    others = m.boundary_facets[np.setdiff1d(m.facet_groups["boundary"], m.facet_groups["zmin"])]
    cells = [("triangle", floor), ("triangle", others), ("line", np.array([[0, 1]])),
             ("vertex", np.array([[0]])), ("tetra", np.asarray(m.cells))]
    phys = [np.full(len(floor), 5), np.full(len(others), 6), np.array([9]), np.array([9]),
            np.full(m.n_cells, 1)]
    mm = meshio.Mesh(m.points, cells, cell_data={"gmsh:physical": phys, "gmsh:geometrical": phys},
                     field_data={"floor": np.array([5, 2]), "edge": np.array([9, 1])})
    mesh = read_mesh(write_msh(tmp_path / "box.msh", mm, "gmsh22"))
    assert mesh.dim == 3
    assert {k: len(v) for k, v in mesh.facet_groups.items()} == {"floor": 8, "6": 40,
                                                               "boundary": 48}


def test_vtu_with_integer_ids_gives_tags_named_by_id(tmp_path):
    # VTU has no names for the groups: the ids become the tag names
    mm = square_with_groups(3)
    mm.point_data = {}
    mm.field_data = {}
    path = tmp_path / "square.vtu"
    meshio.write(str(path), mm)
    mesh = read_mesh(path)
    assert {k: len(v) for k, v in mesh.facet_groups.items()} == {"11": 3, "12": 3, "13": 6,
                                                               "boundary": 12}


XDMF = """<?xml version="1.0"?>
<Xdmf Version="3.0"><Domain><Grid Name="mesh" GridType="Uniform">
<Topology TopologyType="Triangle" NumberOfElements="2">
<DataItem Dimensions="2 3" NumberType="Int" Format="XML">0 1 2 0 2 3</DataItem></Topology>
<Geometry GeometryType="XYZ">
<DataItem Dimensions="4 3" Format="XML">0 0 0 1 0 0 1 1 0 0 1 0</DataItem></Geometry>
</Grid></Domain></Xdmf>
"""


def test_xdmf_without_tags_gets_the_boundary_tag_and_drops_the_zero_z_column(tmp_path):
    # source: the XDMF 3 XML layout meshio reads (written by hand, inline XML data)
    pytest.importorskip("h5py", reason="meshio's XDMF reader imports h5py for every file")
    path = tmp_path / "square.xdmf"
    path.write_text(XDMF)
    mesh = read_mesh(path)
    assert mesh.dim == 2 and mesh.n_cells == 2
    assert sorted(mesh.facet_groups) == ["boundary"]
    assert len(mesh.facet_groups["boundary"]) == 4
    assert mesh.cell_volumes.sum() == pytest.approx(1.0, rel=1e-14)


def test_xdmf_without_h5py_says_which_package_is_missing(tmp_path, monkeypatch):
    import builtins

    real_import = builtins.__import__

    def no_h5py(name, *args, **kwargs):
        if name == "h5py":
            raise ModuleNotFoundError("No module named 'h5py'", name="h5py")
        return real_import(name, *args, **kwargs)

    monkeypatch.setattr(builtins, "__import__", no_h5py)
    path = tmp_path / "square.xdmf"
    path.write_text(XDMF)
    with pytest.raises(InputError, match=r"square\.xdmf.*needs the Python package 'h5py'"):
        read_mesh(path)


def test_a_group_named_boundary_in_the_file_is_kept(tmp_path):
    mm = square_with_groups(2)
    mm.field_data = {"boundary": np.array([11, 1])}
    mesh = read_mesh(write_msh(tmp_path / "b.msh", mm, "gmsh22"))
    assert len(mesh.facet_groups["boundary"]) == 2  # the file's group, not the whole boundary


def test_interface_facets_are_left_out_of_their_tag_with_a_warning(tmp_path):
    m = gk.structured_triangles(2, 2)
    pts = np.column_stack([m.points, np.zeros(m.n_vertices)])
    # the vertical interior line x = 0.5 (vertices 1-4-7 of the 3 x 3 grid)
    interface = np.array([[1, 4], [4, 7]])
    left = m.boundary_facets[m.facet_groups["xmin"]]
    mm = meshio.Mesh(pts, [("line", interface), ("line", left), ("triangle", np.asarray(m.cells))],
                     cell_data={"gmsh:physical": [np.full(2, 3), np.full(2, 4), np.ones(8, int)]},
                     field_data={"middle": np.array([3, 1]), "wall": np.array([4, 1])})
    path = write_msh(tmp_path / "i.msh", mm, "gmsh22")
    with pytest.warns(UserWarning, match="'middle'.*inside the domain"):
        mesh = read_mesh(path)
    assert "middle" not in mesh.facet_groups and len(mesh.facet_groups["wall"]) == 2


# ----------------------------------------------------------------------------
# bad files
# ----------------------------------------------------------------------------
def test_missing_file_is_named(tmp_path):
    with pytest.raises(InputError, match=r"nothere\.msh' does not exist"):
        read_mesh(tmp_path / "nothere.msh")


def test_empty_file_is_named(tmp_path):
    (tmp_path / "e.msh").write_bytes(b"")
    with pytest.raises(InputError, match=r"e\.msh' is empty"):
        read_mesh(tmp_path / "e.msh")


@pytest.mark.parametrize("suffix", [".msh", ".vtu", ".xdmf"])
def test_corrupt_bytes_are_reported_as_a_damaged_file(tmp_path, suffix):
    path = tmp_path / f"junk{suffix}"
    path.write_bytes(np.random.default_rng(7).integers(0, 256, 2000, dtype=np.uint8).tobytes())
    with pytest.raises(InputError, match=rf"junk\{suffix}' could not be read"):
        read_mesh(path)


def test_truncated_gmsh_file_is_reported(tmp_path):
    path = write_msh(tmp_path / "t.msh", square_with_groups(3), "gmsh22")
    text = path.read_text()
    path.write_text(text[: len(text) // 2])
    with pytest.raises(InputError, match="could not be read"):
        read_mesh(path)


def test_unknown_suffix_names_the_formats(tmp_path):
    (tmp_path / "mesh.abc").write_text("hello")
    with pytest.raises(InputError, match=r"suffix '\.abc'.*\.msh, \.vtu or \.xdmf"):
        read_mesh(tmp_path / "mesh.abc")


def test_quadrilaterals_are_refused_by_name(tmp_path):
    pts = np.array([[0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0.0]])
    path = tmp_path / "q.vtu"
    meshio.write(str(path), meshio.Mesh(pts, [("quad", np.array([[0, 1, 2, 3]]))]))
    with pytest.raises(InputError, match="quadrilaterals .*triangles and tetrahedra only"):
        read_mesh(path)


def test_hexahedra_are_refused_by_name(tmp_path):
    pts = np.array([[i, j, k] for k in (0, 1) for j in (0, 1) for i in (0, 1)], dtype=float)
    path = tmp_path / "h.msh"
    write_msh(path, meshio.Mesh(pts, [("hexahedron", np.array([[0, 1, 3, 2, 4, 5, 7, 6]]))]),
              "gmsh22")
    with pytest.raises(InputError, match="hexahedra"):
        read_mesh(path)


def test_mixed_dimensions_are_refused(tmp_path):
    # a tetrahedron and a triangle that is not one of its faces
    pts = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1], [5, 5, 5], [6, 5, 5],
                    [5, 6, 5]], dtype=float)
    mm = meshio.Mesh(pts, [("tetra", np.array([[0, 1, 2, 3]])),
                           ("triangle", np.array([[4, 5, 6]]))],
                     cell_data={"gmsh:physical": [np.array([1]), np.array([2])]})
    path = tmp_path / "mixed.vtu"
    meshio.write(str(path), mm)
    with pytest.raises(InputError, match="mixed dimensions: 1 triangles are not facets"):
        read_mesh(path)


def test_triangles_off_the_plane_are_refused(tmp_path):
    pts = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0.5]])
    path = tmp_path / "s.vtu"
    meshio.write(str(path), meshio.Mesh(pts, [("triangle", np.array([[0, 1, 2]]))]))
    with pytest.raises(InputError, match="z != 0"):
        read_mesh(path)


def test_curved_cells_are_refused(tmp_path):
    pts = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [.5, 0, 0], [.5, .5, 0], [0, .5, 0]])
    path = tmp_path / "c.vtu"
    meshio.write(str(path), meshio.Mesh(pts, [("triangle6", np.array([[0, 1, 2, 3, 4, 5]]))]))
    with pytest.raises(InputError, match="second-order"):
        read_mesh(path)


def test_degenerate_cell_error_names_the_file(tmp_path):
    pts = np.array([[0, 0, 0], [1, 0, 0], [2, 0, 0.0]])
    path = tmp_path / "flat.vtu"
    meshio.write(str(path), meshio.Mesh(pts, [("triangle", np.array([[0, 1, 2]]))]))
    with pytest.raises(MeshError, match=r"flat\.vtu.*degenerate"):
        read_mesh(path)


# ----------------------------------------------------------------------------
# writing
# ----------------------------------------------------------------------------
def solved(degree, mesh=None, exact=None, kappa=1.0):
    mesh = mesh or gk.structured_triangles(4, 4)
    exact = exact or (lambda x: np.sin(np.pi * x[0]) * x[1])
    p = gk.PoissonProblem(mesh, conductivity=kappa, source=lambda x: np.pi ** 2 * exact(x),
                          dirichlet={"boundary": exact})
    return p.solve(degree=degree)


def test_p1_vtu_read_back_equals_the_solution_bit_for_bit(tmp_path):
    sol = solved(1)
    back = meshio.read(write_solution(tmp_path / "p1.vtu", sol, name="temperature"))
    assert np.array_equal(back.points[:, :2], sol.mesh.points)
    assert np.array_equal(back.cells_dict["triangle"], sol.mesh.cells)
    assert np.array_equal(back.point_data["temperature"], sol.u)


def test_p2_vtu_holds_the_dof_values_on_the_once_refined_mesh(tmp_path):
    # For P2 the vertices of the once-refined mesh are exactly the dof nodes.
    sol = solved(2)
    back = meshio.read(write_solution(tmp_path / "p2.vtu", sol))
    assert back.points.shape[0] == sol.disc.n_dofs
    from scipy.spatial import cKDTree

    dist, idx = cKDTree(sol.disc.dof_points).query(back.points[:, :2])
    assert dist.max() < 1e-14
    assert np.allclose(back.point_data["u"], sol.u[idx], rtol=0, atol=1e-13)


@pytest.mark.parametrize("degree,refinements", [(3, 2), (4, 2)])
def test_higher_degree_vtu_agrees_with_point_evaluation(tmp_path, degree, refinements):
    sol = solved(degree, gk.structured_triangles(2, 2))
    s = sample_solution(sol)
    assert s.refinements == refinements
    back = meshio.read(write_solution(tmp_path / "pk.vtu", sol))
    ref = sol.evaluate(np.ascontiguousarray(back.points[:, :2].T))
    assert np.allclose(back.point_data["u"], ref, rtol=0, atol=1e-12)


def test_patch_test_gradient_and_flux_are_exact_in_3d(tmp_path):
    # source: patch test (Irons & Razzaque 1972): a linear u is reproduced exactly
    mesh = gk.structured_tetrahedra(2, 2, 2)
    lin = lambda x: 1 + 2 * x[0] + 3 * x[1] - x[2]  # noqa: E731
    p = gk.PoissonProblem(mesh, conductivity=2.5, source=0.0, dirichlet={"boundary": lin})
    sol = p.solve(degree=2)
    back = meshio.read(write_solution(tmp_path / "lin.vtu", sol))
    g = back.cell_data["grad_u"][0]
    assert np.allclose(g, [2, 3, -1], rtol=0, atol=1e-10)
    assert np.allclose(back.cell_data["flux"][0], -2.5 * g, rtol=0, atol=1e-12)
    assert np.allclose(back.cell_data["conductivity"][0], 2.5)
    assert back.cells_dict["tetra"].shape[0] == 8 * mesh.n_cells
    assert np.array_equal(np.bincount(back.cell_data["parent_cell"][0]), np.full(mesh.n_cells, 8))


def test_tag_arrays_mark_exactly_the_vertices_of_the_tagged_facets(tmp_path):
    sol = solved(1)
    back = meshio.read(write_solution(tmp_path / "t.vtu", sol))
    left = back.point_data[TAG_ARRAY_PREFIX + "xmin"]
    assert left.dtype == np.uint8
    assert np.array_equal(left == 1, back.points[:, 0] == 0.0)
    assert back.point_data[TAG_ARRAY_PREFIX + "boundary"].sum() == 16


def test_callable_conductivity_is_written_at_the_cell_centroids(tmp_path):
    kappa = lambda x: 1.0 + x[0]  # noqa: E731
    sol = solved(1, kappa=kappa)
    back = meshio.read(write_solution(tmp_path / "k.vtu", sol))
    c = sol.mesh.points[sol.mesh.cells].mean(axis=1)
    assert np.allclose(back.cell_data["conductivity"][0], 1.0 + c[:, 0], rtol=1e-14)


def test_tensor_conductivity_gives_a_tensor_array_and_the_tensor_flux(tmp_path):
    K = np.array([[2.0, 0.5], [0.5, 1.0]])
    sol = solved(1, kappa=K)
    back = meshio.read(write_solution(tmp_path / "K.vtu", sol))
    t = back.cell_data["conductivity_tensor"][0].reshape(-1, 3, 3)
    assert np.allclose(t[:, :2, :2], K)
    g = back.cell_data["grad_u"][0][:, :2]
    assert np.allclose(back.cell_data["flux"][0][:, :2], -g @ K.T, rtol=1e-13, atol=1e-13)


def test_writing_leaves_no_temporary_file_and_replaces_the_target(tmp_path):
    sol = solved(1)
    target = tmp_path / "u.vtu"
    target.write_text("old")
    write_solution(target, sol)
    assert sorted(os.listdir(tmp_path)) == ["u.vtu"]
    assert meshio.read(target).points.shape[0] == sol.mesh.n_vertices


def test_writing_into_a_missing_folder_is_an_input_error_and_writes_nothing(tmp_path):
    sol = solved(1)
    with pytest.raises(InputError, match="cannot write"):
        write_solution(tmp_path / "nofolder" / "u.vtu", sol)
    assert os.listdir(tmp_path) == []


# ----------------------------------------------------------------------------
# names with XML-special characters
# ----------------------------------------------------------------------------
ODD_TAGS = ["a<b", "x&y", 'say "hi"', "it's", "1 > 0", "tab\there"]


def _odd_tagged_solution():
    mesh = gk.structured_triangles(4, 4)
    for i, name in enumerate(ODD_TAGS):
        mesh.set_facet_tag(name, [i])
    return gk.PoissonProblem(mesh, source=1.0, dirichlet={"boundary": 0.0}).solve()


def test_tag_and_field_names_with_xml_special_characters_read_back_with_meshio(tmp_path):
    # read-back by meshio's VTU reader (an independent XML parser, ElementTree)
    sol = _odd_tagged_solution()
    path = write_solution(tmp_path / "odd.vtu", sol, name="T<&>",
                          extra_cell_data={'w"x': lambda parent: parent * 1.0})
    back = meshio.read(path)
    np.testing.assert_array_equal(back.point_data["T<&>"], sol.u)
    for i, name in enumerate(ODD_TAGS):
        member = back.point_data[TAG_ARRAY_PREFIX + name]
        expected = np.zeros(sol.mesh.n_vertices, dtype=np.uint8)
        expected[sol.mesh.boundary_facets[i]] = 1
        np.testing.assert_array_equal(member, expected)
    assert "grad_T<&>" in back.cell_data and 'w"x' in back.cell_data


def test_characters_xml_cannot_hold_become_question_marks():
    from galerkit.bindings.files import xml_name

    assert xml_name("a\x1b[31mb\x00") == "a?[31mb?"
    assert xml_name("line\nnext") == "line&#10;next"


def test_parallel_index_escapes_names_and_piece_paths(tmp_path):
    import xml.etree.ElementTree as ET

    from galerkit.bindings.files import write_parallel_index

    sol = _odd_tagged_solution()
    folder = tmp_path / "a&b<c>"
    folder.mkdir()
    piece = write_solution(folder / "p0.vtu", sol, name="u&v")
    index = write_parallel_index(tmp_path / "all.pvtu", [piece])
    root = ET.parse(index).getroot()  # Python's XML 1.0 parser
    names = {a.get("Name") for a in root.iter("PDataArray")}
    assert {"u&v", *(TAG_ARRAY_PREFIX + t for t in ODD_TAGS)} <= names
    assert [p.get("Source") for p in root.iter("Piece")] == ["a&b<c>/p0.vtu"]


# ----------------------------------------------------------------------------
# what reading and writing must not do
# ----------------------------------------------------------------------------
@pytest.mark.parametrize("suffix", [".msh", ".vtu", ".stl", ".node", ".mesh"])  # .stl, .node: quoted it
def test_a_reader_error_does_not_quote_the_file_content(tmp_path, suffix):
    path = tmp_path / f"notes{suffix}"
    path.write_text("password=hunter2 token-7f3a\nsecond line of a private file\n")
    with pytest.raises(InputError) as info:
        read_mesh(path)
    msg = str(info.value)
    assert "hunter2" not in msg and "token-7f3a" not in msg and "private" not in msg
    assert str(path) in msg or path.name in msg


def test_stale_temporary_files_of_the_same_target_are_removed_at_the_next_write(tmp_path):
    import time

    sol = solved(1)
    old = tmp_path / ".u.abcd1234.vtu"      # left by a killed write two hours ago
    young = tmp_path / ".u.young_12.vtu"    # maybe a write running right now
    other = tmp_path / ".v.abcd1234.vtu"    # another target's
    mine = tmp_path / ".u.notes.vtu"        # not a name the writer makes
    for f in (old, young, other, mine):
        f.write_text("partial")
    two_hours_ago = time.time() - 7200
    for f in (old, other, mine):
        os.utime(f, (two_hours_ago, two_hours_ago))
    write_solution(tmp_path / "u.vtu", sol)
    assert sorted(os.listdir(tmp_path)) == sorted(["u.vtu", young.name, other.name, mine.name])


@pytest.mark.parametrize("fmt", ["gmsh22"])  # meshio writes 4.1 only with entity data
def test_a_gmsh_file_without_physical_groups_gets_only_the_boundary_tag(tmp_path, fmt):
    # meshio writes gmsh:physical = 0 for elements outside every physical group
    mesh = gk.structured_triangles(3, 3)
    facets = mesh.boundary_facets
    cells = [("line", np.asarray(facets)), ("triangle", np.asarray(mesh.cells))]
    zeros = [np.zeros(len(facets), dtype=np.int32), np.zeros(mesh.n_cells, dtype=np.int32)]
    path = tmp_path / "plain.msh"
    meshio.write(path, meshio.Mesh(np.column_stack([mesh.points, np.zeros(mesh.n_vertices)]),
                                   cells, cell_data={"gmsh:physical": zeros,
                                                     "gmsh:geometrical": zeros}),
                 file_format=fmt, binary=False)
    back = read_mesh(path)
    assert sorted(back.facet_groups) == ["boundary"]
    assert len(back.facet_groups["boundary"]) == 12
