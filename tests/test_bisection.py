"""Newest-vertex bisection (galerkit.bisection).

Sources: Mitchell (1989) and Binev, Dahmen & DeVore (2004) for the rule and
its closure; Sewell (1972) / Mitchell (1989): bisecting an isosceles right
triangle at its hypotenuse gives two triangles similar to it, so a mesh of
such triangles keeps its 45 degree minimum angle under any sequence of
bisections; conformity and nesting are checked from their definitions.
"""

import numpy as np
import pytest

import galerkit as gk
from galerkit.errors import InputError, UnsupportedError


def _refine_sequence(mesh, steps, seed=0):
    rng = np.random.default_rng(seed)
    meshes = [mesh]
    for it in range(steps):
        c = meshes[-1].points[meshes[-1].cells].mean(axis=1)
        if it % 2:
            marked = np.flatnonzero(np.hypot(c[:, 0], c[:, 1]) < 0.25)
        else:
            marked = rng.choice(meshes[-1].n_cells, 4, replace=False)
        meshes.append(gk.refine_marked(meshes[-1], marked))
    return meshes


def _on_boundary_of_lshape(x):
    ax, ay = np.abs(x[0]), np.abs(x[1])
    outer = (np.abs(ax - 1) < 1e-12) | (np.abs(ay - 1) < 1e-12)
    corner = ((np.abs(x[1]) < 1e-12) & (x[0] >= -1e-12)) | ((np.abs(x[0]) < 1e-12) & (x[1] <= 1e-12))
    return outer | corner


def test_refinement_is_conforming_nested_and_keeps_tags_and_angles():
    meshes = _refine_sequence(gk.l_shaped_triangles(2), 10)
    coarse_len = {}
    for k, (a, b) in enumerate(zip(meshes[:-1], meshes[1:])):
        # conforming: no hanging vertex, so every boundary facet of the fine mesh lies on
        # the domain boundary (a hanging vertex would leave interior facets with one cell)
        assert _on_boundary_of_lshape(b.facet_midpoints()).all(), k
        # nested: children tile their parent (volumes add up, vertices inside the parent)
        vol = np.bincount(b.parent_cells, weights=b.cell_volumes, minlength=a.n_cells)
        assert np.allclose(vol, a.cell_volumes, rtol=1e-13, atol=0)
        P = a.points[a.cells[b.parent_cells]]
        T = np.stack([P[:, 1] - P[:, 0], P[:, 2] - P[:, 0]], axis=2)
        for j in range(3):
            lam = np.linalg.solve(T, (b.points[b.cells[:, j]] - P[:, 0])[:, :, None])[:, :, 0]
            assert (lam > -1e-12).all() and (lam.sum(axis=1) < 1 + 1e-12).all()
        # old vertices keep their numbers and places; new ones are edge midpoints
        assert np.array_equal(b.points[:a.n_vertices], a.points)
        vp = b.vertex_parents[a.n_vertices:]
        assert np.allclose(b.points[a.n_vertices:], a.points[vp].mean(axis=1))
        # tags: same total length, child facets inside the parent's tag
        for name in a.facet_groups:
            def length(m, ids):
                f = m.boundary_facets[ids]
                return np.linalg.norm(m.points[f[:, 0]] - m.points[f[:, 1]], axis=1).sum()
            la, lb = length(a, a.facet_groups[name]), length(b, b.facet_groups[name])
            assert lb == pytest.approx(la, rel=1e-13), name
            coarse_len[name] = lb
        # isosceles right triangles stay similar (Mitchell 1989): 45 degrees
        assert gk.min_angles(b).min() == pytest.approx(45.0, abs=1e-9)
    assert meshes[-1].n_cells > 4 * meshes[0].n_cells
    assert coarse_len["reentrant"] == pytest.approx(2.0)


def test_marked_cells_are_bisected_and_unmarked_far_cells_are_kept():
    mesh = gk.structured_triangles(8, 8)
    fine = gk.refine_marked(mesh, [0])
    children = np.bincount(fine.parent_cells, minlength=mesh.n_cells)
    assert children[0] >= 2
    assert (children == 1).sum() >= mesh.n_cells - 6  # closure stays local
    mask = np.zeros(mesh.n_cells, dtype=bool)
    mask[[3, 7]] = True
    assert np.array_equal(gk.refine_marked(mesh, mask).cells,
                          gk.refine_marked(mesh, [7, 3]).cells)
    # refining everything twice by bisection halves every area twice
    two = gk.refine_marked(gk.refine_marked(mesh, np.ones(mesh.n_cells, bool)),
                           np.ones(2 * mesh.n_cells, bool))
    assert two.n_cells == 4 * mesh.n_cells
    assert np.allclose(two.cell_volumes, mesh.cell_volumes[0] / 4)


def test_min_angles_of_known_triangles():
    # equilateral: 60 degrees; right isosceles: 45; 30-60-90 triangle: 30 (elementary)
    m = gk.Mesh([[0, 0], [1, 0], [0.5, np.sqrt(3) / 2], [0, -1], [np.sqrt(3), 0]],
                [[0, 1, 2], [0, 3, 1], [1, 3, 4]])
    a = gk.min_angles(m)
    assert a[0] == pytest.approx(60.0) and a[1] == pytest.approx(45.0)
    # regular-ish check in 3D: a cube's Kuhn tetrahedra have dihedral angles 45..90
    t = gk.min_angles(gk.structured_tetrahedra(1, 1, 1))
    assert t.min() == pytest.approx(45.0) and (t <= 90 + 1e-9).all()


def test_bad_marks_are_refused():
    mesh = gk.structured_triangles(2, 2)
    with pytest.raises(InputError, match="outside"):
        gk.refine_marked(mesh, [99])
    with pytest.raises(InputError, match="mask"):
        gk.refine_marked(mesh, np.ones(3, bool))
    with pytest.raises(InputError, match="cell ids"):
        gk.refine_marked(mesh, [0.5])
    assert gk.refine_marked(mesh, []).n_cells == mesh.n_cells


def test_cell_regions_follow_the_parent_cell():
    mesh = gk.structured_triangles(4, 4)
    mesh.set_regions(lambda x: (x[0] > 0.5).astype(int), ["left_part", "right_part"])
    fine = gk.refine_marked(mesh, [0, 5, 17])
    assert np.array_equal(fine.regions, mesh.regions[fine.parent_cells])
    assert fine.region_names == mesh.region_names
