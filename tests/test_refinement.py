"""Specification of uniform refinement (galerkit.refinement).

Tetrahedra are split by Bey's rule, whose children fall into a bounded number
of congruence classes, so the shape quality does not decay under repeated
refinement (J. Bey, "Tetrahedral grid refinement", Computing 55, 1995);
triangles are split at the edge midpoints into four similar triangles
(common practice).
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
from galerkit.elements import REFERENCE_EDGES, REFERENCE_FACETS
from galerkit.topology import enumerate_entities


def refine(mesh, times):
    for _ in range(times):
        mesh = refine_uniform(mesh)
    return mesh


def facet_measures(mesh, ids=None):
    """Length (2D) or area (3D) of boundary facets, computed with numpy."""
    f = mesh.boundary_facets if ids is None else mesh.boundary_facets[ids]
    x = mesh.points[f]
    if mesh.dim == 2:
        return np.linalg.norm(x[:, 1] - x[:, 0], axis=1)
    return 0.5 * np.linalg.norm(np.cross(x[:, 1] - x[:, 0], x[:, 2] - x[:, 0]), axis=1)


def barycentric(vertices, x):
    """Barycentric coordinates of points x (k, d) in simplices vertices (k, d+1, d)."""
    T = np.swapaxes(vertices[:, 1:] - vertices[:, :1], 1, 2)  # (k, d, d)
    lam = np.linalg.solve(T, (x - vertices[:, 0])[..., None])[..., 0]
    return np.concatenate([1.0 - lam.sum(axis=1, keepdims=True), lam], axis=1)


def random_tetrahedron_mesh():
    rng = np.random.default_rng(7)
    pts = rng.random((4, 3))
    return Mesh(pts, [[0, 1, 2, 3]])


COARSE = {
    "triangles 2x2": lambda: structured_triangles(2, 2),
    "L-shape n=1": lambda: l_shaped_triangles(1),
    "tetrahedra 1x2x1": lambda: structured_tetrahedra(1, 2, 1),
    "one random tetrahedron": random_tetrahedron_mesh,
}


# -- shape quality ---------------------------------------------------------------------
def test_four_bey_refinements_of_a_cube_keep_min_quality_above_half_the_start():
    # Bey 1995: bounded number of congruence classes, so quality stays bounded
    mesh = structured_tetrahedra(2, 2, 2)
    q0 = mesh.quality().min_shape_quality
    for level in range(4):
        mesh = refine_uniform(mesh)
        assert mesh.quality().min_shape_quality > 0.5 * q0, f"level {level + 1}"
    assert mesh.n_cells == 48 * 8**4


def n_shapes(mesh):
    """Distinct tetrahedron shapes up to similarity, identified by the sorted
    squared edge lengths scaled to the longest (may merge distinct shapes with
    equal edge multisets, so it never over-counts)."""
    e = np.array(REFERENCE_EDGES[3])
    x = mesh.points[mesh.cells]
    l2 = np.sort(((x[:, e[:, 0]] - x[:, e[:, 1]]) ** 2).sum(axis=2), axis=1)
    l2 = l2 / l2[:, -1:]
    return len(np.unique(np.round(l2, 8), axis=0))


@pytest.mark.parametrize("name", ["tetrahedra 1x2x1", "one random tetrahedron"])
def test_repeated_bey_refinement_produces_at_most_three_shapes_per_coarse_shape(name):
    # Bey 1995: the descendants of one tetrahedron, at every level, fall into
    # at most three similarity classes.  Refining in the vertex order Mesh
    # stores after re-orientation instead of the refinement order breaks
    # this (the count then grows 3, 7, 17, ...).
    mesh = COARSE[name]()
    per_coarse = n_shapes(mesh)
    levels = []
    for _ in range(3):
        mesh = refine_uniform(mesh)
        levels.append(n_shapes(mesh))
    assert max(levels) <= 3 * per_coarse, levels
    assert levels[-1] == levels[0], levels


def test_bey_refinement_keeps_the_min_quality_of_the_first_level():
    # same similarity classes at every level -> the same minimum mean ratio
    mesh = random_tetrahedron_mesh()
    q0 = mesh.quality().min_shape_quality
    mesh = refine_uniform(mesh)
    q1 = mesh.quality().min_shape_quality
    fine = refine(mesh, 3)
    assert abs(fine.quality().min_shape_quality - q1) <= 1e-10
    assert q1 > 0.5 * q0


@pytest.mark.parametrize("name", ["triangles 2x2", "L-shape n=1"])
def test_triangle_refinement_keeps_min_quality_above_half_the_start(name):
    mesh = COARSE[name]()
    q0 = mesh.quality().min_shape_quality
    fine = refine(mesh, 4)
    # midpoint subdivision gives four triangles similar to the parent
    assert abs(fine.quality().min_shape_quality - q0) <= 1e-12
    assert fine.quality().min_shape_quality > 0.5 * q0


# -- hierarchy -----------------------------------------------------------------------------
@pytest.mark.parametrize("name", list(COARSE))
def test_each_child_has_a_parent_with_2_to_the_d_times_its_volume_containing_its_centroid(name):
    coarse = refine_uniform(COARSE[name]())  # start from a refined mesh: two levels
    fine = refine_uniform(coarse)
    d = fine.dim
    n_children = 2**d
    assert fine.parent is coarse
    assert fine.n_cells == n_children * coarse.n_cells
    pc = np.asarray(fine.parent_cells)
    np.testing.assert_array_equal(pc, np.repeat(np.arange(coarse.n_cells), n_children))
    np.testing.assert_allclose(coarse.cell_volumes[pc], n_children * fine.cell_volumes,
                               rtol=1e-12)
    centroid = fine.points[fine.cells].mean(axis=1)
    lam = barycentric(coarse.points[coarse.cells[pc]], centroid)
    assert lam.min() > 1e-3, "a child's centroid lies outside its parent"
    # children tile the parent
    sums = np.bincount(pc, weights=fine.cell_volumes, minlength=coarse.n_cells)
    np.testing.assert_allclose(sums, coarse.cell_volumes, rtol=1e-12)


@pytest.mark.parametrize("name", list(COARSE))
def test_new_vertices_are_midpoints_of_their_two_parent_vertices(name):
    coarse = refine_uniform(COARSE[name]())
    fine = refine_uniform(coarse)
    vp = np.asarray(fine.vertex_parents)
    n = coarse.n_vertices
    assert vp.shape == (fine.n_vertices, 2)
    # old vertices carry (v, v): each coarse vertex appears exactly once, at its place
    kept = vp[:, 0] == vp[:, 1]
    assert kept.sum() == n
    np.testing.assert_array_equal(np.sort(vp[kept, 0]), np.arange(n))
    np.testing.assert_array_equal(fine.points[kept], coarse.points[vp[kept, 0]])
    new = vp[~kept]
    assert np.all(new[:, 0] != new[:, 1])
    np.testing.assert_allclose(
        fine.points[~kept], 0.5 * (coarse.points[new[:, 0]] + coarse.points[new[:, 1]]),
        rtol=0, atol=1e-15,
    )
    # one new vertex per coarse edge, each coarse edge once
    edges, _, _, _ = enumerate_entities(coarse.cells, np.array(REFERENCE_EDGES[coarse.dim]),
                                        coarse.n_vertices)
    assert fine.n_vertices == n + len(edges)
    pairs = np.sort(new, axis=1)
    np.testing.assert_array_equal(pairs[np.lexsort(pairs.T[::-1])], edges)


# -- conformity -----------------------------------------------------------------------------
@pytest.mark.parametrize("name", list(COARSE))
def test_refined_mesh_is_conforming(name):
    mesh = COARSE[name]()
    d = mesh.dim
    for _ in range(2):
        fine = refine_uniform(mesh)
        local = np.array(REFERENCE_FACETS[d])
        _, _, mult, _ = enumerate_entities(fine.cells, local, fine.n_vertices)
        assert set(np.unique(mult).tolist()) <= {1, 2}
        # every boundary facet splits into 2^(d-1) boundary facets; so no
        # hanging vertex and no interior facet counted once
        assert fine.boundary_facets.shape[0] == 2 ** (d - 1) * mesh.boundary_facets.shape[0]
        n_interior = int((mult == 2).sum())
        # each cell has d + 1 facets: (d+1) m = n_boundary + 2 n_interior
        assert (d + 1) * fine.n_cells == int((mult == 1).sum()) + 2 * n_interior
        # the refined boundary has the same measure
        assert abs(facet_measures(fine).sum() - facet_measures(mesh).sum()) <= 1e-12
        mesh = fine


# -- facet tags -------------------------------------------------------------------------------
def _check_tags_carried(coarse, fine):
    d = coarse.dim
    vp = np.asarray(fine.vertex_parents)
    assert set(fine.facet_groups) == set(coarse.facet_groups)
    for tag, cids in coarse.facet_groups.items():
        fids = fine.facet_groups[tag]
        assert len(fids) == 2 ** (d - 1) * len(cids), tag
        # every child facet lies on a parent facet of the same tag: its
        # vertices' parents are vertices of that facet, and its centroid has
        # non-negative barycentric coordinates on it
        parent_sets = [set(vp[fine.boundary_facets[f]].ravel().tolist()) for f in fids]
        coarse_sets = {frozenset(coarse.boundary_facets[c].tolist()): c for c in cids}
        for f, ps in zip(fids, parent_sets):
            hits = [c for s, c in coarse_sets.items() if ps <= s]
            assert len(hits) == 1, f"tag {tag!r}: child facet {f} lies on no tagged parent facet"
            cverts = coarse.points[coarse.boundary_facets[hits[0]]]
            x = fine.points[fine.boundary_facets[f]].mean(axis=0)
            # least squares barycentric coordinates of x on the parent facet
            A = np.vstack([cverts.T, np.ones(d)])
            lam, *_ = np.linalg.lstsq(A, np.append(x, 1.0), rcond=None)
            assert np.allclose(A @ lam, np.append(x, 1.0), atol=1e-13)
            assert lam.min() > 1e-3
        # the tagged measure is preserved
        assert abs(facet_measures(fine, fids).sum() - facet_measures(coarse, cids).sum()) \
            <= 1e-13 * max(1.0, facet_measures(coarse, cids).sum())


@pytest.mark.parametrize("name", list(COARSE))
def test_facet_groups_carry_over_to_the_child_facets(name):
    coarse = COARSE[name]()
    coarse.tag_boundary("custom", lambda x: x[0] + 0.3 * x[1] > np.median(x[0] + 0.3 * x[1]))
    for _ in range(3):
        fine = refine_uniform(coarse)
        _check_tags_carried(coarse, fine)
        coarse = fine


def test_refining_a_mesh_from_arrays_gives_the_boundary_group_of_the_fine_mesh():
    mesh = Mesh([[0, 0], [1, 0], [0, 1]], [[0, 1, 2]])
    fine = refine_uniform(mesh)
    assert list(fine.facet_groups) == ["boundary"]
    np.testing.assert_array_equal(fine.facet_groups["boundary"], np.arange(6))  # 3 edges x 2
    assert fine.n_cells == 4 and fine.n_vertices == 6


def test_hierarchy_arrays_are_read_only():
    fine = refine_uniform(structured_triangles(1, 1))
    for a in (fine.parent_cells, fine.vertex_parents, fine.refinement_cells):
        assert not a.flags.writeable
