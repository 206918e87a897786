"""Uniform refinement with a parent map and a vertex hierarchy.

Triangles split 1 -> 4 at their edge midpoints.  Tetrahedra split 1 -> 8 by
Bey's rule (J. Bey, "Tetrahedral grid refinement", Computing 55, 1995): with
the parent's vertex order x0..x3 and edge midpoints x_ij, the children are

    (x0,  x01, x02, x03)   (x01, x1,  x12, x13)
    (x02, x12, x2,  x23)   (x03, x13, x23, x3 )
    (x01, x02, x03, x13)   (x01, x02, x12, x13)
    (x02, x03, x13, x23)   (x02, x12, x13, x23)

which cuts the inner octahedron along the diagonal x02-x13 and keeps the
number of congruence classes bounded, so shape quality does not decay under
repeated refinement.  Children of cell ``c`` are cells ``8c .. 8c+7``
(``4c .. 4c+3`` in 2D).

Fine vertices are numbered lexicographically by their coordinates (x
fastest, then y, then z).  Appending the midpoints after the old vertices
would put neighbours far apart in the numbering; the sweep order keeps the
matrices banded, which the assembler's row ranges and aggregation-based
multigrid both rely on (for generated boxes it reproduces the generators'
order).  ``vertex_parents`` records the hierarchy whatever the numbering.
"""

from __future__ import annotations

import numpy as np

from .elements import REFERENCE_EDGES
from .errors import InputError
from .generators import check_mesh_memory
from .mesh import Mesh
from .topology import enumerate_entities

__all__ = ["refine_uniform"]

# children as indices into [v0, .., vd, m_e0, m_e1, ...] (edge order of
# REFERENCE_EDGES): 2D edges (1,2),(0,2),(0,1) -> 3, 4, 5
_TRI_CHILDREN = np.array([[0, 5, 4], [5, 1, 3], [4, 3, 2], [5, 3, 4]])
# 3D edges (0,1)=4 (0,2)=5 (0,3)=6 (1,2)=7 (1,3)=8 (2,3)=9
_TET_CHILDREN = np.array([
    [0, 4, 5, 6], [4, 1, 7, 8], [5, 7, 2, 9], [6, 8, 9, 3],
    [4, 5, 6, 8], [4, 5, 7, 8], [5, 6, 8, 9], [5, 7, 8, 9],
])


def refine_uniform(mesh: Mesh) -> Mesh:
    """Refine every cell uniformly (1 -> 4 triangles, 1 -> 8 tetrahedra).

    Parameters
    ----------
    mesh : Mesh

    Returns
    -------
    Mesh
        The refined mesh, with facet tags carried over to child facets, each
        child in its parent's region (``regions``, ``region_names``), and
        the hierarchy attached: ``parent`` (the coarse mesh), ``parent_cells``
        (child cell -> parent cell, shape (m_fine,)), and ``vertex_parents``
        (shape (n_fine, 2): the two coarse vertices whose midpoint a vertex
        is; an old vertex ``v`` has ``(v, v)``).

    Examples
    --------
    >>> from galerkit import structured_triangles
    >>> fine = refine_uniform(structured_triangles(2, 2))
    >>> fine.n_cells, fine.n_vertices, len(fine.facet_groups["xmin"])
    (32, 25, 4)
    """
    if not isinstance(mesh, Mesh):
        raise InputError(
            f"refine_uniform: expected a galerkit Mesh, got {type(mesh).__name__}; build one "
            "with Mesh(points, cells) or a generator")
    d = mesh.dim
    _check_refinement_memory(mesh)
    # Bey's rule needs the vertex order it produced itself, not the order after
    # Mesh re-oriented a child: keep that order beside the mesh.
    cells = mesh.refinement_cells
    if cells is None:
        cells = mesh.cells
    n = mesh.n_vertices
    edges, cell_edges, _, _ = enumerate_entities(cells, np.array(REFERENCE_EDGES[d]), n)
    midpoints = 0.5 * (mesh.points[edges[:, 0]] + mesh.points[edges[:, 1]])
    points = np.concatenate([mesh.points, midpoints])
    local = np.concatenate([cells, cell_edges.astype(cells.dtype) + n], axis=1)
    pattern = _TRI_CHILDREN if d == 2 else _TET_CHILDREN
    n_children = pattern.shape[0]
    children = local[:, pattern].reshape(-1, d + 1)
    parents = np.concatenate([np.stack([np.arange(n)] * 2, axis=1), edges.astype(np.int64)])
    # renumber: sweep order by coordinates (last key of lexsort is the primary one)
    order = np.lexsort(tuple(points[:, j] for j in range(d)))
    new_id = np.empty_like(order)
    new_id[order] = np.arange(order.size)
    points = np.ascontiguousarray(points[order])
    parents = np.ascontiguousarray(parents[order])
    children = new_id[children].astype(cells.dtype)
    # midpoints of distinct edges of a valid (unfolded) mesh are distinct points
    fine = Mesh(points, children, check_coincident=False,
                regions=np.repeat(mesh.regions, n_children), region_names=mesh.region_names)
    fine.parent = mesh
    fine.parent_cells = np.repeat(np.arange(mesh.n_cells), n_children)
    fine.vertex_parents = parents
    fine.refinement_cells = children
    for a in (fine.parent_cells, fine.vertex_parents, fine.refinement_cells):
        a.flags.writeable = False
    if mesh.facet_groups:
        _carry_tags(mesh, fine, parents, n_children)
    return fine


def _check_refinement_memory(mesh):
    """Refuse a refinement whose fine mesh would not fit, before allocating it.

    The fine mesh has 2**d times the cells and about 2**d times the vertices;
    the coarse edge enumeration (an int32 and an int64 per cell edge, the
    cell-edge table) comes on top while the fine mesh is built.
    """
    d = mesh.dim
    n_edges_local = 3 if d == 2 else 6
    extra = mesh.n_cells * n_edges_local * 16
    fine_cells = mesh.n_cells * 2**d
    fine_vertices = mesh.n_vertices * 2**d
    check_mesh_memory(
        f"refine_uniform (mesh of {mesh.n_cells} cells)",
        fine_vertices + extra // (8 * d + 80), fine_cells, d,
        "refine fewer times or start from a coarser mesh")


def _carry_tags(coarse: Mesh, fine: Mesh, vertex_parents, n_children):
    d = coarse.dim
    pcell = fine.boundary_facet_cells // n_children
    pverts = coarse.cells[pcell]  # same vertex sets as the refinement order  # (k, d+1)
    fparents = vertex_parents[fine.boundary_facets].reshape(len(pcell), -1)  # (k, 2d)
    # the parent facet is opposite the parent vertex absent from the union
    present = (pverts[:, :, None] == fparents[:, None, :]).any(axis=2)  # (k, d+1)
    missing = np.argmin(present, axis=1)
    key_fine = pcell.astype(np.int64) * (d + 1) + missing
    key_coarse = coarse.boundary_facet_cells.astype(np.int64) * (d + 1) + coarse.boundary_facet_local
    order = np.argsort(key_coarse)
    pos = np.searchsorted(key_coarse[order], key_fine)
    coarse_facet = order[pos]
    if not np.array_equal(key_coarse[coarse_facet], key_fine):
        raise RuntimeError("refine_uniform: a child boundary facet has no parent boundary "
                           "facet (internal error; please report with the mesh)")
    in_tag = np.zeros(coarse.boundary_facets.shape[0], dtype=bool)
    for name, ids in coarse.facet_groups.items():
        in_tag[:] = False
        in_tag[ids] = True
        sel = np.flatnonzero(in_tag[coarse_facet])
        fine.set_facet_tag(name, sel)
