"""Specification of the mesh (galerkit.mesh) and the mesh generators.

Geometry and topology checks use independent facts: domain volumes, the
Euler characteristic of a disc / ball (common practice), boundary facet counts
of structured grids (counted by hand), and the mean-ratio shape quality that
is 1 for the equilateral triangle and the regular tetrahedron (common
practice, e.g. Liu & Joe, BIT 34, 1994; value from memory).
"""

from __future__ import annotations

import numpy as np
import pytest

from galerkit import (
    Mesh,
    l_shaped_triangles,
    refine_uniform,
    structured_tetrahedra,
    structured_triangles,
)
from galerkit.elements import REFERENCE_EDGES, REFERENCE_FACES, REFERENCE_FACETS
from galerkit.errors import InputError, MeshError
from galerkit.mesh import remove_unreferenced_vertices
from galerkit.topology import enumerate_entities


def signed_volumes(points, cells):
    """Signed cell volumes, computed with numpy determinants (independent)."""
    p = np.asarray(points, dtype=np.float64)
    c = np.asarray(cells)
    d = p.shape[1]
    J = p[c[:, 1:]] - p[c[:, :1]]  # (m, d, d): rows are edge vectors
    fact = 2.0 if d == 2 else 6.0
    return np.linalg.det(J) / fact


def n_entities(mesh, local):
    ent, _, _, _ = enumerate_entities(mesh.cells, np.array(local), mesh.n_vertices)
    return ent.shape[0]


def euler_characteristic(mesh):
    V, C = mesh.n_vertices, mesh.n_cells
    E = n_entities(mesh, REFERENCE_EDGES[mesh.dim])
    if mesh.dim == 2:
        return V - E + C
    F = n_entities(mesh, REFERENCE_FACES[3])
    return V - E + F - C


MESHES = {
    "square 3x2": (lambda: structured_triangles(3, 2), 1.0),
    "rectangle 4x3 on [-1,2]x[0,0.5]": (
        lambda: structured_triangles(4, 3, (-1.0, 0.0), (2.0, 0.5)), 1.5),
    "L-shape n=2": (lambda: l_shaped_triangles(2), 3.0),
    "cube 2x2x2": (lambda: structured_tetrahedra(2, 2, 2), 1.0),
    "box 2x1x3 on [0,2]x[0,1]x[0,3]": (
        lambda: structured_tetrahedra(2, 1, 3, (0, 0, 0), (2.0, 1.0, 3.0)), 6.0),
}


# -- generated meshes: geometry and topology ---------------------------------------
@pytest.mark.parametrize("name", list(MESHES))
def test_generated_mesh_volume_equals_the_domain_volume(name):
    make, volume = MESHES[name]
    mesh = make()
    assert abs(mesh.cell_volumes.sum() - volume) <= 1e-13 * volume
    np.testing.assert_allclose(signed_volumes(mesh.points, mesh.cells), mesh.cell_volumes,
                               rtol=1e-12)
    assert mesh.n_reoriented == 0  # the generators emit positively oriented cells


@pytest.mark.parametrize("name", list(MESHES))
def test_refined_mesh_volume_equals_the_domain_volume(name):
    make, volume = MESHES[name]
    fine = refine_uniform(make())
    assert abs(fine.cell_volumes.sum() - volume) <= 1e-13 * volume
    assert np.all(signed_volumes(fine.points, fine.cells) > 0)


@pytest.mark.parametrize("name", list(MESHES))
def test_euler_characteristic_of_a_disc_or_ball_is_one(name):
    # V - E + F = 1 for a triangulated disc, V - E + F - T = 1 for a ball
    # (common practice: Euler-Poincare formula)
    mesh = MESHES[name][0]()
    assert euler_characteristic(mesh) == 1
    assert euler_characteristic(refine_uniform(mesh)) == 1


@pytest.mark.parametrize("nx,ny", [(1, 1), (3, 2), (5, 4)])
def test_structured_triangles_have_2_nx_ny_cells_and_2_nx_plus_ny_boundary_edges(nx, ny):
    mesh = structured_triangles(nx, ny)
    assert mesh.n_vertices == (nx + 1) * (ny + 1)
    assert mesh.n_cells == 2 * nx * ny
    assert mesh.boundary_facets.shape == (2 * (nx + ny), 2)
    assert mesh.n_facets == n_entities(mesh, REFERENCE_EDGES[2])


@pytest.mark.parametrize("nx,ny,nz", [(1, 1, 1), (2, 3, 1), (2, 2, 3)])
def test_structured_tetrahedra_have_6_nx_ny_nz_cells_and_4_sum_boundary_triangles(nx, ny, nz):
    mesh = structured_tetrahedra(nx, ny, nz)
    assert mesh.n_vertices == (nx + 1) * (ny + 1) * (nz + 1)
    assert mesh.n_cells == 6 * nx * ny * nz
    assert mesh.boundary_facets.shape == (4 * (nx * ny + ny * nz + nx * nz), 3)
    assert mesh.n_facets == n_entities(mesh, REFERENCE_FACES[3])


@pytest.mark.parametrize("name", list(MESHES))
def test_boundary_facets_are_the_facets_of_their_cells_opposite_the_local_vertex(name):
    mesh = MESHES[name][0]()
    d = mesh.dim
    local = np.array(REFERENCE_FACETS[d])
    verts = np.sort(mesh.cells[mesh.boundary_facet_cells[:, None],
                               local[mesh.boundary_facet_local]], axis=1)
    np.testing.assert_array_equal(verts, mesh.boundary_facets)
    # every facet appears once
    assert len({tuple(f) for f in mesh.boundary_facets.tolist()}) == len(mesh.boundary_facets)


def _numpy_facets(cells):
    """Every facet occurrence by plain NumPy (sort all of them, group equal rows):
    the boundary facets (one cell) in lexicographic order with their cell and
    opposite local vertex, the number of distinct facets and the largest
    multiplicity; independent of galerkit.topology."""
    m, k = cells.shape
    occ = np.sort(np.stack([np.delete(cells, e, axis=1) for e in range(k)], axis=1), axis=2)
    flat = occ.reshape(m * k, k - 1)
    uniq, first, counts = np.unique(flat, axis=0, return_index=True, return_counts=True)
    once = counts == 1
    return uniq[once], first[once] // k, first[once] % k, len(uniq), int(counts.max())


def _random_meshes():
    from scipy.spatial import Delaunay  # SciPy's Qhull triangulation: an outside mesh source

    rng = np.random.default_rng(3)
    out = []
    for dim, n in ((2, 400), (3, 150)):
        p = rng.random((n, dim))
        t = Delaunay(p).simplices
        # renumber the vertices, permute the cells, shuffle each cell's vertices
        new = rng.permutation(n)
        q = np.empty_like(p)
        q[new] = p
        c = new[t][rng.permutation(len(t))]
        c = np.take_along_axis(c, np.argsort(rng.random(c.shape), axis=1), axis=1)
        out.append(Mesh(q, c))
    # a fan of 300 triangles and a ring of 200 tetrahedra around one edge: buckets of
    # hundreds of facets at one vertex
    a = np.linspace(0, 2 * np.pi, 301)[:-1]
    fan = np.c_[np.zeros(300, int), 1 + np.arange(300), 1 + (np.arange(300) + 1) % 300]
    out.append(Mesh(np.vstack([[0.0, 0.0], np.c_[np.cos(a), np.sin(a)]]), fan[:, ::-1]))
    a = np.linspace(0, 2 * np.pi, 201)[:-1]
    ring = np.c_[np.zeros(200, int), np.ones(200, int), 2 + np.arange(200),
                 2 + (np.arange(200) + 1) % 200]
    out.append(Mesh(np.vstack([[0.0, 0.0, 0.0], [0.0, 0.0, 1.0],
                               np.c_[np.cos(a), np.sin(a), 0 * a]]), ring))
    return out


@pytest.mark.parametrize("which", range(4))
def test_boundary_facets_equal_a_numpy_count_of_all_facet_occurrences(which):
    mesh = _random_meshes()[which]
    facets, cells, local, n_facets, most = _numpy_facets(mesh.cells)
    assert most == 2
    np.testing.assert_array_equal(mesh.boundary_facets, facets)
    np.testing.assert_array_equal(mesh.boundary_facet_cells, cells)
    np.testing.assert_array_equal(mesh.boundary_facet_local, local)
    assert mesh.n_facets == n_facets


def _box_tag_sizes(counts):
    if len(counts) == 2:
        nx, ny = counts
        return {"xmin": ny, "xmax": ny, "ymin": nx, "ymax": nx}
    nx, ny, nz = counts
    return {"xmin": 2 * ny * nz, "xmax": 2 * ny * nz, "ymin": 2 * nx * nz,
            "ymax": 2 * nx * nz, "zmin": 2 * nx * ny, "zmax": 2 * nx * ny}


@pytest.mark.parametrize("counts", [(3, 2), (2, 3, 1)])
def test_side_tags_have_the_right_sizes_and_lie_on_their_side(counts):
    lower = (-1.0, 0.5, 2.0)[: len(counts)]
    upper = (1.0, 2.0, 2.5)[: len(counts)]
    if len(counts) == 2:
        mesh = structured_triangles(*counts, lower, upper)
    else:
        mesh = structured_tetrahedra(*counts, lower, upper)
    sizes = _box_tag_sizes(counts)
    sides = [("xmin", "xmax"), ("ymin", "ymax"), ("zmin", "zmax")]
    for axis in range(mesh.dim):
        for name, value in zip(sides[axis], (lower[axis], upper[axis])):
            ids = mesh.facet_groups[name]
            assert len(ids) == sizes[name], name
            x = mesh.points[mesh.boundary_facets[ids]]  # (k, d, dim)
            np.testing.assert_allclose(x[..., axis], value, rtol=0, atol=1e-14)


@pytest.mark.parametrize("name", list(MESHES))
def test_side_tags_partition_the_boundary_and_boundary_tag_covers_it(name):
    mesh = MESHES[name][0]()
    k = mesh.boundary_facets.shape[0]
    np.testing.assert_array_equal(mesh.facet_groups["boundary"], np.arange(k))
    sides = [t for t in mesh.facet_groups if t != "boundary"]
    ids = np.concatenate([mesh.facet_groups[t] for t in sides])
    assert len(ids) == k, "side tags overlap or miss facets"
    np.testing.assert_array_equal(np.sort(ids), np.arange(k))


def test_l_shape_tags_include_the_two_reentrant_edges_meeting_at_the_origin():
    n = 3
    mesh = l_shaped_triangles(n)
    sizes = {"xmin": 2 * n, "xmax": n, "ymin": n, "ymax": 2 * n, "reentrant": 2 * n}
    assert {t: len(mesh.facet_groups[t]) for t in sizes} == sizes
    x = mesh.points[mesh.boundary_facets[mesh.facet_groups["reentrant"]]]
    on_x0 = np.all(np.abs(x[..., 0]) < 1e-14, axis=1) & np.all(x[..., 1] <= 1e-14, axis=1)
    on_y0 = np.all(np.abs(x[..., 1]) < 1e-14, axis=1) & np.all(x[..., 0] >= -1e-14, axis=1)
    assert np.all(on_x0 | on_y0)
    assert on_x0.sum() == n and on_y0.sum() == n


def test_tag_boundary_selects_facets_whose_midpoints_satisfy_the_predicate():
    mesh = structured_triangles(4, 3)
    ids = mesh.tag_boundary("outlet", lambda x: x[0] > 1 - 1e-12)
    assert len(ids) == 3
    np.testing.assert_array_equal(mesh.facet_groups["outlet"], ids)
    np.testing.assert_allclose(mesh.facet_midpoints(ids)[0], 1.0)
    np.testing.assert_array_equal(ids, mesh.facet_groups["xmax"])
    # replacing a tag of the same name
    ids2 = mesh.tag_boundary("outlet", lambda x: (x[0] > 1 - 1e-12) & (x[1] < 0.6))
    assert len(ids2) == 2 and len(mesh.tagged_facets("outlet")) == 2


def test_tag_boundary_with_a_bad_predicate_raises_mesh_error():
    mesh = structured_triangles(2, 2)
    with pytest.raises(MeshError, match="boolean array of shape"):
        mesh.tag_boundary("x", lambda x: x[0])
    with pytest.raises(MeshError, match="boolean array of shape"):
        mesh.tag_boundary("x", lambda x: np.ones(3, dtype=bool))
    with pytest.raises(MeshError, match="selects no boundary facet"):
        mesh.tag_boundary("x", lambda x: x[0] > 2)


def test_facet_tag_errors_name_the_tag_and_the_bad_id():
    mesh = structured_triangles(2, 2)
    with pytest.raises(MeshError, match=r"facet id 8 is outside 0\.\.7"):
        mesh.set_facet_tag("bad", [0, 8])
    with pytest.raises(MeshError, match=r"no facet tag 'nope'.*known tags"):
        mesh.tagged_facets("nope")
    with pytest.raises(MeshError, match="non-empty"):
        mesh.set_facet_tag("", [0])


def test_generators_write_the_cell_tables_counted_by_hand():
    # by hand: vertices numbered x fastest; squares cut from lower-left to upper-right;
    # the unit cube's six Kuhn tetrahedra around the diagonal 0 -> 7, one per axis order
    tri = structured_triangles(2, 1)
    np.testing.assert_array_equal(tri.cells, [[0, 1, 4], [0, 4, 3], [1, 2, 5], [1, 5, 4]])
    np.testing.assert_array_equal(tri.points, [[0, 0], [0.5, 0], [1, 0], [0, 1], [0.5, 1],
                                               [1, 1]])
    tet = structured_tetrahedra(1, 1, 1)
    np.testing.assert_array_equal(tet.cells, [[0, 1, 3, 7], [0, 2, 6, 7], [0, 4, 5, 7],
                                              [0, 1, 7, 5], [0, 4, 7, 6], [0, 2, 7, 3]])
    assert tri.n_reoriented == 0 and tet.n_reoriented == 0
    box = structured_tetrahedra(2, 3, 2)
    assert box.points[2 + 3 * (1 + 4 * 1)].tolist() == [1.0, 1 / 3, 0.5]
    # box (i, j, k) = (1, 2, 1) is box 1 + 2 * (2 + 3 * 1) = 11; its lowest vertex
    # is 1 + 3 * (2 + 4 * 1) = 19
    assert box.cells[6 * 11].tolist() == [19, 20, 23, 35]


def test_facet_tags_are_sorted_unique_copies_whatever_the_ids_given():
    mesh = structured_triangles(2, 2)
    given = np.array([5, 1, 5, 3])
    assert mesh.set_facet_tag("a", given).tolist() == [1, 3, 5]
    inc = np.array([0, 2, 7])
    ids = mesh.set_facet_tag("b", inc)
    assert ids.tolist() == [0, 2, 7] and not np.shares_memory(ids, inc)
    assert mesh.set_facet_tag("c", [4, 4]).tolist() == [4]


def test_connected_components_equal_scipy_csgraph():
    # reference: scipy.sparse.csgraph.connected_components of the vertex graph whose
    # edges join the vertices of each cell; labels renumbered by first cell
    import scipy.sparse as sp
    from scipy.sparse.csgraph import connected_components

    rng = np.random.default_rng(5)
    pieces = [structured_triangles(4, 3), structured_triangles(2, 2, (5, 0), (6, 1)),
              structured_triangles(3, 1, (0, 5), (3, 6))]
    pts = np.vstack([p.points for p in pieces])
    offs = np.cumsum([0] + [p.n_vertices for p in pieces])
    cells = np.vstack([p.cells + o for p, o in zip(pieces, offs)])
    new = rng.permutation(len(pts))  # vertex numbers mixed across the pieces
    q = np.empty_like(pts)
    q[new] = pts
    cells = new[cells][rng.permutation(len(cells))]
    mesh = Mesh(q, cells)
    rows = np.repeat(mesh.cells[:, :1], 2, axis=1).ravel()
    graph = sp.coo_array((np.ones(rows.size), (rows, mesh.cells[:, 1:].ravel())),
                         shape=(len(q), len(q)))
    n, vertex_label = connected_components(graph, directed=False)
    cell_label = vertex_label[mesh.cells[:, 0]]
    _, first = np.unique(cell_label, return_index=True)
    order = np.argsort(np.argsort(first))  # component -> rank of its first cell
    count, labels = mesh.connected_components()
    assert count == n == 3
    np.testing.assert_array_equal(labels, order[cell_label])
    count, labels = structured_tetrahedra(3, 2, 2).connected_components()
    assert count == 1 and not labels.any()


def test_mesh_arrays_are_read_only_float64_points_and_int32_cells():
    mesh = structured_tetrahedra(1, 1, 1)
    assert mesh.points.dtype == np.float64 and mesh.cells.dtype == np.int32
    assert mesh.points.flags.c_contiguous and mesh.cells.flags.c_contiguous
    for a in (mesh.points, mesh.cells, mesh.cell_volumes, mesh.boundary_facets):
        assert not a.flags.writeable


def test_the_callers_arrays_stay_writeable_and_cannot_change_the_mesh():
    points = np.array([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0], [1.0, 1.0]])
    cells = np.array([[0, 1, 2], [1, 3, 2]], dtype=np.int32)
    mesh = Mesh(points, cells)
    assert points.flags.writeable and cells.flags.writeable
    points[3] = [5.0, 5.0]
    cells[1] = [0, 0, 0]
    assert mesh.points[3].tolist() == [1.0, 1.0] and mesh.cells[1].tolist() == [1, 3, 2]
    assert mesh.cell_volumes.sum() == pytest.approx(1.0, abs=1e-15)


# -- bad input ---------------------------------------------------------------------
SQ_POINTS = np.array([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0], [1.0, 1.0], [2.0, 0.5]])
SQ_CELLS = np.array([[0, 1, 2], [1, 3, 2], [1, 4, 3]])


def test_the_reference_square_is_valid():
    mesh = Mesh(SQ_POINTS, SQ_CELLS)
    assert mesh.n_cells == 3 and mesh.n_reoriented == 0


def test_mesh_error_is_an_input_error_and_a_value_error():
    assert issubclass(MeshError, InputError) and issubclass(MeshError, ValueError)


def test_index_out_of_range_names_the_first_offending_cell():
    cells = SQ_CELLS.copy()
    cells[1, 2] = 7
    cells[2, 0] = 99
    with pytest.raises(MeshError, match=r"cell 1 has vertex indices \[1, 3, 7\] outside "
                                        r"0\.\.4 \(2 such cells\)"):
        Mesh(SQ_POINTS, cells)


def test_negative_index_names_the_first_offending_cell():
    cells = SQ_CELLS.copy()
    cells[2, 1] = -1
    with pytest.raises(MeshError, match=r"cell 2 has vertex indices \[1, -1, 3\] outside"):
        Mesh(SQ_POINTS, cells)


@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
def test_non_finite_coordinate_names_the_first_offending_vertex(bad):
    pts = SQ_POINTS.copy()
    pts[3, 1] = bad
    pts[4, 0] = np.nan
    with pytest.raises(MeshError, match=r"vertex 3 has a non-finite coordinate.*\(2 such vertices\)"):
        Mesh(pts, SQ_CELLS)


def test_degenerate_cell_names_the_first_offending_cell():
    pts = np.vstack([SQ_POINTS, [[3.0, 1.0]]])
    cells = np.vstack([SQ_CELLS, [[4, 5, 3]]])
    pts[5] = 2 * pts[4] - pts[3]  # collinear with vertices 3 and 4: zero area
    with pytest.raises(MeshError, match=r"cell 3 \(vertices \[4, 5, 3\]\) is degenerate"):
        Mesh(pts, cells)


def test_degenerate_tetrahedron_is_rejected():
    pts = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0.3, 0.3, 0.0]])
    with pytest.raises(MeshError, match=r"cell 0 .* is degenerate"):
        Mesh(pts, [[0, 1, 2, 3]])


@pytest.mark.parametrize(
    "cells,pattern",
    [
        (np.array([[0, 1, 2, 3]]), r"triangles \(m, 3\) for 2D points, got shape \(1, 4\)"),
        (np.array([0, 1, 2]), r"got shape \(3,\)"),
        (np.zeros((0, 3), dtype=np.int64), "no cells"),
    ],
)
def test_cells_of_the_wrong_shape_raise_mesh_error(cells, pattern):
    with pytest.raises(MeshError, match=pattern):
        Mesh(SQ_POINTS, cells)


def test_float_cells_raise_mesh_error_suggesting_a_conversion():
    with pytest.raises(MeshError, match=r"integer array.*astype"):
        Mesh(SQ_POINTS, SQ_CELLS.astype(np.float64))


@pytest.mark.parametrize("points", [np.arange(5.0), np.zeros((5, 1)), np.zeros((5, 4))])
def test_points_that_are_not_2d_or_3d_raise_mesh_error(points):
    with pytest.raises(MeshError, match=r"shape \(n_vertices, 2\) or \(n_vertices, 3\)"):
        Mesh(points, SQ_CELLS)


def test_unreferenced_vertex_names_the_vertex_and_the_fix():
    pts = np.vstack([SQ_POINTS, [[5.0, 5.0]]])
    with pytest.raises(MeshError, match=r"vertex 5 belongs to no cell.*remove_unreferenced_vertices"):
        Mesh(pts, SQ_CELLS)
    p2, c2, old_to_new = remove_unreferenced_vertices(pts, SQ_CELLS)
    assert Mesh(p2, c2).n_vertices == 5 and old_to_new[5] == -1


def test_repeated_vertex_in_a_cell_names_the_cell():
    cells = SQ_CELLS.copy()
    cells[1] = [1, 3, 1]
    with pytest.raises(MeshError, match=r"cell 1 repeats a vertex \[1, 3, 1\]"):
        Mesh(SQ_POINTS, cells)


def test_three_triangles_sharing_one_edge_are_non_manifold():
    pts = np.array([[0.0, 0.0], [1.0, 0.0], [0.5, 1.0], [0.5, -1.0], [0.2, 2.0]])
    cells = np.array([[0, 1, 2], [1, 0, 3], [0, 1, 4]])
    with pytest.raises(MeshError, match=r"facet with vertices \[0, 1\] is shared by 3 cells"):
        Mesh(pts, cells)


# -- orientation --------------------------------------------------------------------
@pytest.mark.parametrize("make", [lambda: structured_triangles(3, 3),
                                  lambda: structured_tetrahedra(2, 2, 1)])
def test_negatively_oriented_cells_are_reoriented_and_counted(make):
    ref = make()
    cells = np.array(ref.cells)
    flip = np.zeros(len(cells), dtype=bool)
    flip[::3] = True
    cells[flip, 0], cells[flip, 1] = cells[flip, 1].copy(), cells[flip, 0].copy()
    assert np.all(signed_volumes(ref.points, cells)[flip] < 0)
    mesh = Mesh(ref.points, cells)
    assert mesh.n_reoriented == int(flip.sum())
    assert mesh.quality().n_reoriented == int(flip.sum())
    assert np.all(mesh.cell_volumes > 0)
    # the stored cells are really re-oriented, not just given |volume|
    np.testing.assert_allclose(signed_volumes(mesh.points, mesh.cells), mesh.cell_volumes,
                               rtol=1e-12)
    # same cells as vertex sets, same geometry
    np.testing.assert_array_equal(np.sort(mesh.cells, axis=1), np.sort(ref.cells, axis=1))
    assert abs(mesh.cell_volumes.sum() - ref.cell_volumes.sum()) <= 1e-14
    np.testing.assert_array_equal(mesh.boundary_facets, ref.boundary_facets)


# -- quality ---------------------------------------------------------------------------
def test_equilateral_triangle_has_shape_quality_one():
    pts = [[0.0, 0.0], [1.0, 0.0], [0.5, np.sqrt(3) / 2]]
    q = Mesh(pts, [[0, 1, 2]]).quality()
    assert abs(q.min_shape_quality - 1.0) <= 1e-14
    assert abs(q.max_shape_quality - 1.0) <= 1e-14


def test_regular_tetrahedron_has_shape_quality_one():
    pts = [[1, 1, 1], [1, -1, -1], [-1, 1, -1], [-1, -1, 1]]
    q = Mesh(pts, [[0, 1, 2, 3]]).quality()
    assert q.n_reoriented in (0, 1)
    assert abs(q.min_shape_quality - 1.0) <= 1e-14


@pytest.mark.parametrize(
    "pts,cells",
    [
        ([[0.0, 0.0], [1.0, 0.0], [0.5, 0.01]], [[0, 1, 2]]),
        ([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0.3, 0.3, 0.01]], [[0, 1, 2, 3]]),
    ],
    ids=["triangle", "tetrahedron"],
)
def test_flat_cell_has_shape_quality_below_one_tenth(pts, cells):
    q = Mesh(pts, cells).cell_quality()
    assert 0 < q[0] < 0.1


def test_quality_summary_counts_and_ranges():
    mesh = structured_triangles(2, 3)
    q = mesh.quality()
    assert (q.n_vertices, q.n_cells, q.n_boundary_facets) == (12, 12, 10)
    assert abs(q.min_volume - 1 / 12) <= 1e-15 and abs(q.max_volume - 1 / 12) <= 1e-15
    assert abs(q.volume_ratio - 1.0) <= 1e-12
    # right isosceles triangle: 4 sqrt(3) A / sum l^2 = sqrt(3)/2 (scale free)
    mesh = structured_triangles(2, 2)
    np.testing.assert_allclose(mesh.cell_quality(), np.sqrt(3) / 2, rtol=1e-14)
    q = mesh.quality()
    assert q.min_shape_quality <= q.mean_shape_quality <= q.max_shape_quality <= 1.0


# ----------------------------------------------------------------------------
# a mesh from arrays is as complete as a mesh from a file
# ----------------------------------------------------------------------------
def test_a_mesh_from_arrays_has_the_boundary_group_of_all_boundary_facets():
    # the unit square in two triangles: 4 boundary edges (counted by hand)
    m = Mesh([[0, 0], [1, 0], [0, 1], [1, 1]], [[0, 1, 2], [1, 3, 2]])
    assert list(m.facet_groups) == ["boundary"]
    np.testing.assert_array_equal(m.facet_groups["boundary"], np.arange(4))
    own = Mesh([[0, 0], [1, 0], [0, 1], [1, 1]], [[0, 1, 2], [1, 3, 2]],
               facet_groups={"boundary": [0, 1]})
    np.testing.assert_array_equal(own.facet_groups["boundary"], [0, 1])  # a given one stays


def test_a_poisson_problem_on_a_mesh_from_arrays_uses_its_boundary_group():
    # patch test (Irons & Razzaque 1972): u = 1 + 2x - y is harmonic and linear, so
    # P1 with u on the boundary reproduces it exactly at every node
    import galerkit as gk

    mesh = refine_uniform(Mesh([[0, 0], [1, 0], [0, 1], [1, 1]], [[0, 1, 2], [1, 3, 2]]))
    exact = lambda x: 1 + 2 * x[0] - x[1]  # noqa: E731
    sol = gk.PoissonProblem(mesh, dirichlet={"boundary": exact}).solve(degree=1)
    np.testing.assert_allclose(sol.u, exact(mesh.points.T), rtol=0, atol=1e-13)


def test_2d_points_with_a_zero_z_column_are_a_2d_mesh():
    pts = np.array([[0, 0], [1, 0], [0, 1], [1, 1]], dtype=float)
    cells = [[0, 1, 2], [1, 3, 2]]
    flat = Mesh(np.column_stack([pts, np.zeros(4)]), cells)
    assert flat.dim == 2 and flat.cell_type == "triangle"
    np.testing.assert_array_equal(flat.points, pts)
    assert float(flat.cell_volumes.sum()) == 1.0
    with pytest.raises(MeshError, match=r"triangles with z != 0 \(vertex 3 has z = 0\.5\)"):
        Mesh(np.column_stack([pts, [0, 0, 0, 0.5]]), cells)
    # tetrahedra keep their three coordinates
    tet = Mesh([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]], [[0, 1, 2, 3]])
    assert tet.dim == 3 and tet.cell_volumes[0] == pytest.approx(1 / 6, rel=1e-15)


def test_plural_of_tetrahedron_in_descriptions():
    import galerkit as gk

    m = structured_tetrahedra(1, 1, 1)
    assert "6 tetrahedra" in repr(m) and "tetrahedrons" not in repr(m)
    assert "6 tetrahedra" in repr(gk.Discretization(m, 1))
