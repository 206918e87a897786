"""Local refinement: conforming newest-vertex bisection of triangles.

Every triangle carries a labelling ``(v0; v1, v2)``: ``v0`` is its newest
vertex and ``v1 v2`` its refinement edge (W. F. Mitchell, "A comparison of
adaptive refinement techniques for elliptic problems", ACM TOMS 15, 1989;
P. Binev, W. Dahmen & R. DeVore, "Adaptive finite element methods with
convergence rates", Numer. Math. 97, 2004).  Bisecting it at the midpoint
``m`` of ``v1 v2`` gives ``(m; v0, v1)`` and ``(m; v2, v0)``: the new vertex is
the newest one of both children, and the edges of the parent other than the
refinement edge become the children's refinement edges.

:func:`refine_marked` marks the refinement edges of the marked cells, then
closes the marking (a cell with any marked edge gets its refinement edge
marked, repeated until nothing changes -- the marked set only grows, so this
ends), and splits every cell by its marked edges: 2, 3 or 4 children.  Each
coarse edge is split in all its cells or in none, so the result is conforming
(no hanging vertices) whatever the labelling; newest-vertex bisection
produces at most four similarity classes per initial triangle, so angles stay
bounded below (Sewell 1972; Mitchell 1989).  An initial mesh is labelled by
its longest edges (Mitchell 1989); the labelling lives in
``Mesh.refinement_cells`` (the :class:`~galerkit.Mesh` may swap two vertices
to orient a cell, which leaves ``v0`` and the refinement edge unchanged).

Tetrahedra are bisected by the tagged rule of Maubach (1995) and Stevenson
(2008), with the same closure (:mod:`galerkit.bisection3d`).
"""

from __future__ import annotations

import numpy as np

from .errors import InputError, UnsupportedError
from .mesh import Mesh
from .topology import enumerate_entities

__all__ = ["refine_marked", "min_angles", "newest_vertex_labels"]

# local edges of a labelled triangle (v0; v1, v2): 0 = (v1, v2) the refinement
# edge, 1 = (v0, v1), 2 = (v2, v0)
_EDGES = np.array([[1, 2], [0, 1], [2, 0]])


def newest_vertex_labels(mesh: Mesh) -> np.ndarray:
    """The labelled cells ``(v0; v1, v2)``: ``mesh.refinement_cells`` when present (a
    mesh made by refinement), else each cell rotated so that its longest edge is
    ``v1 v2``."""
    if mesh.refinement_cells is not None:
        return np.asarray(mesh.refinement_cells)
    c = mesh.cells
    P = mesh.points[c]
    opp = np.stack([((P[:, (i + 1) % 3] - P[:, (i + 2) % 3]) ** 2).sum(axis=1)
                    for i in range(3)], axis=1)
    first = np.argmax(opp, axis=1)  # the vertex opposite the longest edge
    rows = np.arange(c.shape[0])[:, None]
    return np.ascontiguousarray(c[rows, (first[:, None] + np.arange(3)[None, :]) % 3])


def refine_marked(mesh: Mesh, marked) -> Mesh:
    """Refine the marked cells by newest-vertex bisection, with closure.

    Parameters
    ----------
    mesh : Mesh
        A triangle or tetrahedron mesh (tetrahedra: tagged bisection, see
        :mod:`galerkit.bisection3d`).
    marked : array_like
        Cell ids (integers) or a boolean mask of shape (n_cells,).  Each marked
        cell is bisected at least once (its refinement edge is split); cells
        around it are bisected as far as conformity needs.

    Returns
    -------
    Mesh
        The refined, conforming mesh.  Facet groups follow the child facets, cell regions the parent cell;
        ``parent`` (the coarse mesh), ``parent_cells`` (child -> parent cell),
        ``vertex_parents`` ((n_fine, 2): the coarse edge whose midpoint a new
        vertex is; ``(v, v)`` for an old vertex, which keeps its number; for
        tetrahedra the edge may join vertices made in the same call, with
        smaller numbers) and ``refinement_cells`` (the labelling; tetrahedra
        also ``refinement_tags`` and ``labelling``, the initial rule) are attached.

    Raises
    ------
    InputError
        Marks that are not cell ids or a mask of the right shape.
    UnsupportedError
        A tetrahedral mesh whose initial labelling is not admissible (the closure
        does not end; see :mod:`galerkit.bisection3d`).

    Examples
    --------
    >>> from galerkit import structured_triangles
    >>> fine = refine_marked(structured_triangles(2, 2), [0])
    >>> fine.n_cells, len(fine.facet_groups["xmin"]) >= 2
    (10, True)
    """
    if not isinstance(mesh, Mesh):
        raise InputError(f"refine_marked: expected a galerkit Mesh, got {type(mesh).__name__}")
    m = mesh.n_cells
    mask = _marked_mask(marked, m)
    if mesh.dim == 3:
        return _refine_marked_tetrahedra(mesh, mask)
    lab = newest_vertex_labels(mesh)
    n = mesh.n_vertices
    edges, cell_edges, _, _ = enumerate_entities(lab, _EDGES, n)
    cell_edges = cell_edges.astype(np.int64)
    ne = edges.shape[0]
    emark = np.zeros(ne, dtype=bool)
    emark[cell_edges[mask, 0]] = True
    while True:  # closure: a cell with a marked edge has its refinement edge marked
        need = emark[cell_edges].any(axis=1) & ~emark[cell_edges[:, 0]]
        if not need.any():
            break
        emark[cell_edges[need, 0]] = True
    new_edges = np.flatnonzero(emark)
    mid = np.full(ne, -1, dtype=np.int64)
    mid[new_edges] = n + np.arange(new_edges.size)
    points = np.concatenate([mesh.points, 0.5 * (mesh.points[edges[new_edges, 0]]
                                                 + mesh.points[edges[new_edges, 1]])])
    vparents = np.concatenate([np.stack([np.arange(n)] * 2, axis=1),
                               edges[new_edges].astype(np.int64)])
    v0, v1, v2 = (lab[:, i].astype(np.int64) for i in range(3))
    me, ma, mb = (mid[cell_edges[:, i]] for i in range(3))  # midpoints of edges 0, 1, 2
    split = emark[cell_edges[:, 0]]
    s1 = emark[cell_edges[:, 1]]
    s2 = emark[cell_edges[:, 2]]
    children = []
    parents = []

    def add(sel, tri):
        idx = np.flatnonzero(sel)
        children.append(np.stack([t[idx] for t in tri], axis=1))
        parents.append(idx)

    add(~split, (v0, v1, v2))
    # first bisection (m; v0, v1) and (m; v2, v0), then their refinement edges
    add(split & ~s1, (me, v0, v1))
    add(split & s1, (ma, me, v0))
    add(split & s1, (ma, v1, me))
    add(split & ~s2, (me, v2, v0))
    add(split & s2, (mb, me, v2))
    add(split & s2, (mb, v0, me))
    cells = np.concatenate(children)
    parent_cells = np.concatenate(parents)
    order = np.argsort(parent_cells, kind="stable")  # children next to their parent
    cells = np.ascontiguousarray(cells[order])
    parent_cells = np.ascontiguousarray(parent_cells[order])
    idt = mesh.cells.dtype if points.shape[0] < np.iinfo(mesh.cells.dtype).max else np.int64
    cells = cells.astype(idt)
    fine = Mesh(points, cells, check_coincident=False)
    fine.parent = mesh
    fine.parent_cells = parent_cells
    fine.vertex_parents = vparents
    fine.refinement_cells = cells
    for a in (fine.parent_cells, fine.vertex_parents, fine.refinement_cells):
        a.flags.writeable = False
    _carry_facet_tags(mesh, fine, vparents, n)
    _carry_cell_data(mesh, fine, parent_cells)
    return fine


def _refine_marked_tetrahedra(mesh, mask):
    from .bisection3d import refine_tetrahedra
    points, lab, tags, parent_cells, vparents, origin, rule = refine_tetrahedra(mesh, mask)
    idt = mesh.cells.dtype if points.shape[0] < np.iinfo(mesh.cells.dtype).max else np.int64
    fine = Mesh(points, lab.astype(idt), check_coincident=False)
    fine.parent = mesh
    fine.parent_cells = parent_cells
    fine.vertex_parents = vparents
    fine.refinement_cells = lab.astype(idt)
    fine.refinement_tags = tags
    fine.labelling = rule if rule != "carried" else getattr(mesh, "labelling", rule)
    for a in (fine.parent_cells, fine.vertex_parents, fine.refinement_cells,
              fine.refinement_tags):
        a.flags.writeable = False
    if mesh.facet_groups:
        # the coarse facet of each fine boundary facet, through its (cell, local face)
        fc = np.asarray(fine.boundary_facet_cells, dtype=np.int64)
        missing = np.asarray(fine.cells, dtype=np.int64)[fc, fine.boundary_facet_local]
        j = np.argmax(lab[fc] == missing[:, None], axis=1)
        cid = origin[fc, j]
        if (cid < 0).any():
            raise RuntimeError("refine_marked: a fine boundary facet has no coarse boundary "
                               "facet (internal error; please report with the mesh)")
        inside = np.zeros(mesh.boundary_facets.shape[0], dtype=bool)
        for name, ids in mesh.facet_groups.items():
            inside[:] = False
            inside[ids] = True
            fine.set_facet_tag(name, np.flatnonzero(inside[cid]))
    _carry_cell_data(mesh, fine, parent_cells)
    return fine


def _marked_mask(marked, m):
    try:
        a = np.asarray(marked)
    except Exception as exc:  # noqa: BLE001
        raise InputError(f"refine_marked: marks cannot be read as an array ({exc})") from None
    if a.dtype == bool:
        if a.shape != (m,):
            raise InputError(f"refine_marked: a boolean mask must have shape ({m},), got "
                             f"{a.shape}")
        return a
    if a.size == 0:
        return np.zeros(m, dtype=bool)
    if a.ndim != 1 or not np.issubdtype(a.dtype, np.integer):
        raise InputError(f"refine_marked: marks must be cell ids (1D integers) or a boolean "
                         f"mask of shape ({m},), got dtype {a.dtype} shape {a.shape}")
    bad = (a < 0) | (a >= m)
    if bad.any():
        raise InputError(f"refine_marked: cell id {int(a[bad][0])} is outside 0..{m - 1}")
    mask = np.zeros(m, dtype=bool)
    mask[a] = True
    return mask


def _facet_key(f, n):
    f = np.sort(np.asarray(f, dtype=np.int64), axis=1)
    return f[:, 0] * (n + 1) + f[:, 1]


def _carry_facet_tags(coarse, fine, vparents, n):
    if not coarse.facet_groups:
        return
    ff = np.asarray(fine.boundary_facets, dtype=np.int64)
    # the coarse edge of each fine boundary facet: through its new vertex, if any
    a, b = ff[:, 0], ff[:, 1]
    pa = np.where(a >= n, vparents[a, 0], a)
    pb = np.where(a >= n, vparents[a, 1], b)
    pa = np.where((a < n) & (b >= n), vparents[b, 0], pa)
    pb = np.where((a < n) & (b >= n), vparents[b, 1], pb)
    key = _facet_key(np.stack([pa, pb], axis=1), n)
    ckey = _facet_key(coarse.boundary_facets, n)
    order = np.argsort(ckey)
    pos = np.searchsorted(ckey[order], key)
    pos = np.minimum(pos, ckey.size - 1)
    cid = order[pos]
    if not np.array_equal(ckey[cid], key):
        raise RuntimeError("refine_marked: a fine boundary facet has no coarse boundary facet "
                           "(internal error; please report with the mesh)")
    inside = np.zeros(coarse.boundary_facets.shape[0], dtype=bool)
    for name, ids in coarse.facet_groups.items():
        inside[:] = False
        inside[ids] = True
        fine.set_facet_tag(name, np.flatnonzero(inside[cid]))


def _carry_cell_data(coarse, fine, parent_cells):
    """Cell regions follow the parent cell."""
    regions = getattr(coarse, "regions", None)
    if isinstance(regions, np.ndarray) and regions.shape == (coarse.n_cells,):
        names = getattr(coarse, "region_names", None)
        fine.set_regions(np.asarray(regions)[parent_cells], dict(names) if names else None)


def min_angles(mesh: Mesh) -> np.ndarray:
    """Smallest angle of every cell in degrees, shape (n_cells,).

    Triangles: the smallest interior angle; tetrahedra: the smallest dihedral
    angle between two faces.

    Examples
    --------
    >>> from galerkit import structured_triangles
    >>> round(float(min_angles(structured_triangles(2, 2)).min()), 6)
    45.0
    """
    if not isinstance(mesh, Mesh):
        raise InputError(f"min_angles: expected a galerkit Mesh, got {type(mesh).__name__}")
    P = mesh.points[mesh.cells]
    if mesh.dim == 2:
        out = np.full(mesh.n_cells, 180.0)
        for i in range(3):
            u = P[:, (i + 1) % 3] - P[:, i]
            v = P[:, (i + 2) % 3] - P[:, i]
            cos = (u * v).sum(axis=1) / np.sqrt((u * u).sum(axis=1) * (v * v).sum(axis=1))
            out = np.minimum(out, np.degrees(np.arccos(np.clip(cos, -1, 1))))
        return out
    # dihedral angle along edge (i, j) between the faces opposite k and l
    out = np.full(mesh.n_cells, 180.0)
    normals = []
    for k in range(4):
        f = [i for i in range(4) if i != k]
        nrm = np.cross(P[:, f[1]] - P[:, f[0]], P[:, f[2]] - P[:, f[0]])
        side = ((P[:, k] - P[:, f[0]]) * nrm).sum(axis=1)
        nrm = nrm * -np.sign(side)[:, None]  # outward
        normals.append(nrm / np.linalg.norm(nrm, axis=1)[:, None])
    for k in range(4):
        for ll in range(k + 1, 4):
            cos = -(normals[k] * normals[ll]).sum(axis=1)
            out = np.minimum(out, np.degrees(np.arccos(np.clip(cos, -1, 1))))
    return out
