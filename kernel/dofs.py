"""Global degree-of-freedom numbering for continuous Lagrange elements.

:class:`Discretization` numbers the dofs of P1..P4 on a mesh.  Each dof
belongs to one mesh entity (vertex, edge, face, cell interior); neighbouring
cells agree on the dofs of a shared edge or face through an orientation rule:
an interior node of an entity is identified by its barycentric multi-index on
the entity's vertices *sorted by global vertex number*, and the entity's dofs
are numbered in ascending lexicographic order of those multi-indices.

Ordering (cache-friendly, and the identity for P1): dofs are grouped by the
smallest global vertex of their entity.  For vertex ``v`` in mesh order come
its vertex dof, then the dofs of the edges, faces and cells whose smallest
vertex is ``v`` (each group in entity order).  So dof numbers follow the
vertex numbering of the mesh: a mesh numbered with locality (the generators,
or any bandwidth-reducing order) gives matrices with the same locality, and
for P1 dof ``i`` is vertex ``i``.
"""

from __future__ import annotations

import itertools

import numpy as np

from .coefficients import _real_array
from .elements import SUPPORTED_DEGREES, interior_tuples, lagrange_element
from .errors import InputError
from .mesh import CELL_TYPE_PLURAL, Mesh
from .topology import enumerate_entities, index_dtype

__all__ = ["Discretization"]


class Discretization:
    """Continuous Lagrange dofs of one degree on a mesh.

    Parameters
    ----------
    mesh : Mesh
    degree : int
        1 to 4.

    Attributes
    ----------
    mesh : Mesh
    degree : int
    element : LagrangeElement
    n_dofs : int
    cell_dofs : ndarray, shape (n_cells, n_local), int32 (int64 beyond 2**31)
        Global dof of each local node, local nodes in the element's order.
    dof_points : ndarray, shape (n_dofs, dim), float64
        Coordinates of the dof nodes.
    vertex_dofs : ndarray, shape (n_vertices,)
        Dof sitting at each mesh vertex.

    Examples
    --------
    >>> from galerkit import structured_triangles
    >>> disc = Discretization(structured_triangles(2, 2), 2)
    >>> disc.n_dofs, disc.cell_dofs.shape
    (25, (8, 6))
    >>> u = disc.interpolate(lambda x: x[0] * x[1])
    >>> float(u.max())
    1.0
    """

    def __init__(self, mesh: Mesh, degree: int = 1):
        if not isinstance(mesh, Mesh):
            raise InputError(f"Discretization: mesh must be a galerkit Mesh, got {type(mesh).__name__}")
        if isinstance(degree, bool) or not isinstance(degree, (int, np.integer)) \
                or degree not in SUPPORTED_DEGREES:
            raise InputError(
                f"Discretization: degree {degree!r} is not supported; choose one of "
                f"{SUPPORTED_DEGREES}")
        self.mesh = mesh
        self.element = lagrange_element(mesh.dim, int(degree))
        self.degree = int(degree)
        if degree == 1:
            self.n_dofs = mesh.n_vertices
            self.cell_dofs = mesh.cells
            self.dof_points = mesh.points
            self.vertex_dofs = np.arange(mesh.n_vertices, dtype=mesh.cells.dtype)
        else:
            self._number()
        for a in (self.cell_dofs, self.dof_points, self.vertex_dofs):
            a.flags.writeable = False

    def __repr__(self) -> str:
        return (f"Discretization(P{self.degree} on {self.mesh.n_cells} "
                f"{CELL_TYPE_PLURAL[self.mesh.cell_type]}, "
                f"{self.n_dofs} dofs)")

    @property
    def n_local(self) -> int:
        return self.element.n_local

    # -- numbering -------------------------------------------------------------
    def _number(self):
        mesh, el, k = self.mesh, self.element, self.degree
        d = mesh.dim
        cells = mesh.cells
        n, m = mesh.n_vertices, mesh.n_cells
        # entity tables for dimensions 1 .. d-1; the cell interior is its own
        tables = {}
        for edim in range(1, d):
            if el.n_entity_nodes[edim] == 0:
                continue
            local = np.array(el.entity_vertices[edim], dtype=np.int64)
            ent, cell_ent, _, _ = enumerate_entities(cells, local, n)
            tables[edim] = (ent, cell_ent)
        n_int = el.n_entity_nodes[d]
        # dofs per smallest vertex, then each entity's first dof
        per_vertex = np.ones(n, dtype=np.int64)
        for edim, (ent, _) in tables.items():
            per_vertex += el.n_entity_nodes[edim] * np.bincount(ent[:, 0], minlength=n)
        cell_min = cells.min(axis=1)
        if n_int:
            per_vertex += n_int * np.bincount(cell_min, minlength=n)
        start = np.zeros(n + 1, dtype=np.int64)
        np.cumsum(per_vertex, out=start[1:])
        n_dofs = int(start[-1])
        idt = index_dtype(n_dofs)
        cursor = start[:-1] + 1  # after each vertex dof
        first_dof = {}
        for edim, (ent, _) in tables.items():
            a = ent[:, 0].astype(np.int64)
            rank = np.arange(len(a)) - np.searchsorted(a, a)  # entities sorted by a
            first_dof[edim] = cursor[a] + el.n_entity_nodes[edim] * rank
            cursor = cursor + el.n_entity_nodes[edim] * np.bincount(a, minlength=n)
        if n_int:
            order = np.argsort(cell_min, kind="stable")
            rank = np.empty(m, dtype=np.int64)
            srt = cell_min[order]
            rank[order] = np.arange(m) - np.searchsorted(srt, srt)
            first_dof["cell"] = cursor[cell_min] + n_int * rank

        cell_dofs = np.empty((m, el.n_local), dtype=idt)
        points = np.empty((n_dofs, d))
        points[start[:-1]] = mesh.points
        cell_dofs[:, : d + 1] = start[:-1][cells]
        for node in range(d + 1, el.n_local):
            edim, eid = el.node_entity[node]
            verts = el.entity_vertices[edim][eid]
            alpha = el.multi_indices[node, list(verts)]
            if edim == d:
                cell_dofs[:, node] = first_dof["cell"] + _rank(alpha, k)
                continue
            ent, cell_ent = tables[edim]
            gv = cells[:, list(verts)]
            perm = np.argsort(gv, axis=1, kind="stable")
            code = _perm_code(perm)
            table = np.full(code.max() + 1, -1, dtype=np.int64)
            for p in itertools.permutations(range(len(verts))):
                c = _perm_code(np.array([p]))[0]
                if c < len(table):
                    table[c] = _rank(alpha[list(p)], k)
            cell_dofs[:, node] = first_dof[edim][cell_ent[:, eid]] + table[code]
        # node coordinates, entity by entity, summing over sorted vertices
        for edim, (ent, _) in tables.items():
            tuples = np.array(interior_tuples(edim + 1, k), dtype=np.float64)
            for r, t in enumerate(tuples):
                x = np.zeros((len(ent), d))
                for j in range(edim + 1):
                    x += (t[j] / k) * mesh.points[ent[:, j]]
                points[first_dof[edim] + r] = x
        if n_int:
            for r, t in enumerate(interior_tuples(d + 1, k)):
                x = np.zeros((m, d))
                for j in range(d + 1):
                    x += (t[j] / k) * mesh.points[cells[:, j]]
                points[first_dof["cell"] + r] = x
        self.n_dofs = n_dofs
        self.cell_dofs = cell_dofs
        self.dof_points = points
        self.vertex_dofs = start[:-1].astype(idt)

    # -- queries ----------------------------------------------------------------
    def boundary_dofs(self, tag=None) -> np.ndarray:
        """Sorted dofs on the closure of the tagged boundary facets.

        Parameters
        ----------
        tag : str or sequence of str, optional
            Facet tag name(s); ``None`` means the whole boundary.

        Returns
        -------
        ndarray of int64
        """
        mesh = self.mesh
        if tag is None:
            ids = np.arange(mesh.boundary_facets.shape[0])
        elif isinstance(tag, str):
            ids = mesh.tagged_facets(tag)
        else:
            try:
                tags = list(tag)
            except TypeError:
                raise InputError(
                    f"boundary_dofs: tag must be a tag name, a list of names or None, got "
                    f"{type(tag).__name__}") from None
            if not tags:
                raise InputError("boundary_dofs: empty list of tags; pass None for the whole boundary")
            ids = np.unique(np.concatenate([mesh.tagged_facets(t) for t in tags]))
        cells = mesh.boundary_facet_cells[ids]
        local = self.element.facet_nodes[mesh.boundary_facet_local[ids]]
        dofs = np.take_along_axis(self.cell_dofs[cells], local, axis=1)
        return np.unique(dofs).astype(np.int64)

    def interpolate(self, func) -> np.ndarray:
        """Nodal interpolant of ``func``: its values at the dof points.

        Parameters
        ----------
        func : callable or float
            ``func(x)`` with ``x`` of shape (dim, n_dofs) returns shape (n_dofs,).

        Returns
        -------
        ndarray, shape (n_dofs,), float64

        Raises
        ------
        InputError
            Wrong shape returned, or non-finite values (the first dof named).
        """
        if np.isscalar(func):
            # np.isscalar is also True for str and complex: report those as
            # InputError rather than letting float() raise a bare error.
            try:
                val = float(func)
            except (TypeError, ValueError):
                raise InputError(
                    f"interpolate: expected a callable or a real number, got {func!r}"
                ) from None
            if not np.isfinite(val):
                raise InputError(f"interpolate: the constant {func!r} is not finite")
            return np.full(self.n_dofs, val)
        if not callable(func):
            raise InputError(f"interpolate: expected a callable or a number, got {type(func).__name__}")
        x = np.ascontiguousarray(self.dof_points.T)
        try:
            v = func(x)
        except InputError:
            raise
        except Exception as exc:
            raise InputError(
                f"interpolate: the function failed on points of shape {x.shape}: "
                f"{type(exc).__name__}: {exc}. It must take x of shape (dim, n) and return "
                "shape (n,)"
            ) from exc
        v = _real_array(v, "interpolate: the function returned")
        if v.shape != (self.n_dofs,):
            v = np.broadcast_to(v, (self.n_dofs,)) if v.ndim == 0 else v
        if v.shape != (self.n_dofs,):
            raise InputError(
                f"interpolate: the function returned shape {v.shape}, expected ({self.n_dofs},) "
                "for x of shape (dim, n_points)"
            )
        bad = ~np.isfinite(v)
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise InputError(
                f"interpolate: non-finite value {v[i]} at dof {i}, x = {self.dof_points[i].tolist()}"
            )
        return np.array(v, dtype=np.float64)


def _perm_code(perm):
    """Integer code of each row permutation (rows of length 2 or 3)."""
    code = np.zeros(perm.shape[0], dtype=np.int64)
    for j in range(perm.shape[1]):
        code = code * perm.shape[1] + perm[:, j]
    return code


def _rank(beta, k):
    """Position of the tuple ``beta`` among the entity's interior tuples."""
    return interior_tuples(len(beta), k).index(tuple(int(b) for b in beta))
