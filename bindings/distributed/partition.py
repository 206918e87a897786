"""Partitioning a discretization across ranks: cells, dof ownership, local maps.

Everything here is plain NumPy and numba on one process: no MPI.  The
distributed engine (:mod:`galerkit.bindings.distributed.petsc_engine`) calls it on rank 0
and sends each rank its :class:`LocalPart`; the tests and the scaling report
call it for any number of parts without running that many ranks.

The rules
---------
* **Cells** are split by recursive coordinate bisection of their centroids:
  a set of cells meant for ``k`` parts is cut across its longest bounding-box
  axis into ``floor(k/2)`` and ``ceil(k/2)`` parts' worth of cells, and so on
  (common practice; Berger & Bokhari, IEEE Trans. Computers 36, 1987).  Part
  sizes differ by at most one cell per level.
* **Ownership** of a dof shared by several parts: of the parts whose cells
  touch it, the lowest or the highest, chosen by one bit of a
  multiplicative hash of the dof number, so that each interface is shared
  about evenly (the lowest part alone would own every interface dof:
  owned-dof balance 1.24 instead of 1.09 on 64 parts of a 40^3 box of
  tetrahedra).  Every dof has exactly one owner.
* **Global numbering** (the distributed matrix's rows): the free dofs (not
  Dirichlet) ordered by owner, then by their serial number, so that each
  rank's rows are one contiguous range, as PETSc needs.  Dirichlet dofs get
  no row: they are eliminated by lifting, as in serial.
* **Local numbering** on a rank: the dofs its cells touch (owned and ghost),
  ascending in serial numbering; the rank's mesh keeps the global vertex
  order (ascending global ids), so the orientation rule of
  :class:`~galerkit.Discretization` numbers edge and face dofs of the local
  mesh consistently with the global one (checked on every rank).
"""

from __future__ import annotations

from dataclasses import dataclass

import numba as nb
import numpy as np

from galerkit.elements import REFERENCE_FACETS
from galerkit.errors import InputError
from galerkit.topology import enumerate_entities

__all__ = ["coordinate_bisection", "partition_cells", "DofLayout", "dof_layout", "LocalPart",
           "local_part", "PartitionReport", "partition_report"]


# ----------------------------------------------------------------------------
# cells
# ----------------------------------------------------------------------------
def coordinate_bisection(points, n_parts: int) -> np.ndarray:
    """Recursive coordinate bisection of points into ``n_parts`` parts.

    Parameters
    ----------
    points : ndarray, shape (n, d), float
    n_parts : int, 1 <= n_parts <= n

    Returns
    -------
    ndarray, shape (n,), int32
        Part of each point; part sizes are ``n / n_parts`` within one point
        per bisection level.

    Examples
    --------
    >>> import numpy as np
    >>> x = np.column_stack([np.arange(8.0), np.zeros(8)])
    >>> coordinate_bisection(x, 4).tolist()
    [0, 0, 1, 1, 2, 2, 3, 3]
    """
    pts = np.asarray(points, dtype=np.float64)
    if pts.ndim != 2 or not np.isfinite(pts).all():
        raise InputError("coordinate_bisection: points must be a finite (n, d) array")
    n = pts.shape[0]
    if isinstance(n_parts, bool) or not isinstance(n_parts, (int, np.integer)) \
            or not 1 <= n_parts <= max(n, 1):
        raise InputError(f"coordinate_bisection: n_parts must be an integer in 1..{n} (the "
                         f"number of cells), got {n_parts!r}")
    parts = np.zeros(n, dtype=np.int32)
    stack = [(np.arange(n), int(n_parts), 0)]
    while stack:
        idx, k, first = stack.pop()
        if k == 1:
            parts[idx] = first
            continue
        k_low = k // 2
        n_low = int(round(idx.size * k_low / k))
        sub = pts[idx]
        axis = int(np.argmax(sub.max(axis=0) - sub.min(axis=0)))
        # argpartition puts the n_low smallest coordinates first (ties broken
        # deterministically for a given input)
        sel = np.argpartition(sub[:, axis], n_low - 1) if n_low > 0 else np.arange(idx.size)
        low, high = np.sort(idx[sel[:n_low]]), np.sort(idx[sel[n_low:]])
        stack.append((high, k - k_low, first + k_low))
        stack.append((low, k_low, first))
    return parts


@nb.njit(cache=True, parallel=True)
def _centroids(points, cells, out):
    m, k = cells.shape
    d = points.shape[1]
    for c in nb.prange(m):
        for t in range(d):
            s = 0.0
            for a in range(k):
                s += points[cells[c, a], t]
            out[c, t] = s / k


def cell_centroids(mesh) -> np.ndarray:
    """Centroids of the cells, shape (n_cells, dim)."""
    out = np.empty((mesh.n_cells, mesh.dim))
    _centroids(mesh.points, mesh.cells, out)
    return out


def partition_cells(mesh, n_parts: int) -> np.ndarray:
    """Part of each cell of ``mesh`` (coordinate bisection of the centroids), int32."""
    if n_parts > mesh.n_cells:
        raise InputError(f"cannot split a mesh of {mesh.n_cells} cells into {n_parts} parts; "
                         "use fewer ranks or a finer mesh")
    return coordinate_bisection(cell_centroids(mesh), n_parts)


# ----------------------------------------------------------------------------
# dofs
# ----------------------------------------------------------------------------
@nb.njit(cache=True)
def _part_range(table, parts, n, n_parts):
    """Lowest and highest part among the cells whose ``table`` row holds each of 0..n-1."""
    lo = np.full(n, n_parts, dtype=np.int32)
    hi = np.full(n, -1, dtype=np.int32)
    m, k = table.shape
    for c in range(m):
        p = parts[c]
        for a in range(k):
            i = table[c, a]
            if p < lo[i]:
                lo[i] = p
            if p > hi[i]:
                hi[i] = p
    return lo, hi


@nb.njit(cache=True)
def _pick_owners(lo, hi):
    owner = lo.copy()
    for i in range(lo.size):
        # a bit of a multiplicative hash of the dof number (Knuth's constant)
        # picks the highest part for about half the dofs; plain parity can
        # put every interface dof of a structured mesh on one side
        h = (np.uint64(i) * np.uint64(2654435761)) & np.uint64(0xFFFFFFFF)
        if h >> np.uint64(31):  # the top bit of the 32-bit product
            owner[i] = hi[i]
    return owner


@dataclass
class DofLayout:
    """Ownership and global numbering of the dofs of a partitioned discretization.

    Attributes
    ----------
    n_parts : int
    parts : ndarray (n_cells,), int32
        Part of each cell.
    owner : ndarray (n_dofs,), int32
        Owning part of each dof (of the parts touching it, the lowest or the
        highest, by a hash bit of the dof number).
    fixed : ndarray (n_dofs,), bool
        Dirichlet dofs (no row in the distributed system).
    global_index : ndarray (n_dofs,), int64
        Row of each free dof in the distributed system, -1 for fixed dofs.
    offsets : ndarray (n_parts + 1,), int64
        Rows ``offsets[p] .. offsets[p+1]-1`` are owned by part ``p``.
    """

    n_parts: int
    parts: np.ndarray
    owner: np.ndarray
    fixed: np.ndarray
    global_index: np.ndarray
    offsets: np.ndarray

    @property
    def n_global(self) -> int:
        return int(self.offsets[-1])


def dof_layout(disc, parts, n_parts: int, fixed_dofs=None) -> DofLayout:
    """Owners and distributed row numbers of the dofs of ``disc``.

    Parameters
    ----------
    disc : Discretization
    parts : ndarray (n_cells,), integer in 0 .. n_parts-1
    n_parts : int
    fixed_dofs : ndarray of dof ids, optional
        Dirichlet dofs, which get no row.

    Returns
    -------
    DofLayout

    Examples
    --------
    >>> from galerkit import structured_triangles, Discretization
    >>> disc = Discretization(structured_triangles(4, 4), 1)
    >>> parts = partition_cells(disc.mesh, 2)
    >>> lay = dof_layout(disc, parts, 2)
    >>> lay.n_global, int((lay.owner == 0).sum()) + int((lay.owner == 1).sum())
    (25, 25)
    """
    parts = np.ascontiguousarray(parts, dtype=np.int32)
    m = disc.mesh.n_cells
    if parts.shape != (m,):
        raise InputError(f"dof_layout: parts must have shape ({m},) (one per cell), got "
                         f"{parts.shape}")
    if m and (parts.min() < 0 or parts.max() >= n_parts):
        c = int(np.flatnonzero((parts < 0) | (parts >= n_parts))[0])
        raise InputError(f"dof_layout: cell {c} has part {int(parts[c])}, outside "
                         f"0..{n_parts - 1}")
    present = np.bincount(parts, minlength=n_parts)
    if (present == 0).any():
        raise InputError(f"dof_layout: part {int(np.flatnonzero(present == 0)[0])} has no "
                         "cells; every rank needs at least one cell")
    owner = _pick_owners(*_part_range(np.ascontiguousarray(disc.cell_dofs), parts,
                                      disc.n_dofs, n_parts))
    fixed = np.zeros(disc.n_dofs, dtype=bool)
    if fixed_dofs is not None and len(fixed_dofs):
        fixed[np.asarray(fixed_dofs)] = True
    free = np.flatnonzero(~fixed)
    order = free[np.argsort(owner[free], kind="stable")]  # by owner, then serial number
    global_index = np.full(disc.n_dofs, -1, dtype=np.int64)
    global_index[order] = np.arange(order.size)
    offsets = np.zeros(n_parts + 1, dtype=np.int64)
    np.cumsum(np.bincount(owner[free], minlength=n_parts), out=offsets[1:])
    return DofLayout(n_parts=int(n_parts), parts=parts, owner=owner, fixed=fixed,
                     global_index=global_index, offsets=offsets)


@nb.njit(cache=True)
def _compact(table, rows, n):
    """Ascending distinct entries of ``table[rows]`` and the rows renumbered into them."""
    local = np.full(n, -1, dtype=np.int64)
    k = table.shape[1]
    for r in rows:
        for a in range(k):
            local[table[r, a]] = 0
    count = 0
    for i in range(n):
        if local[i] == 0:
            count += 1
    ids = np.empty(count, dtype=np.int64)
    j = 0
    for i in range(n):
        if local[i] == 0:
            ids[j] = i
            local[i] = j
            j += 1
    out = np.empty((rows.size, k), dtype=table.dtype)
    for t in range(rows.size):
        for a in range(k):
            out[t, a] = local[table[rows[t], a]]
    return ids, out


@dataclass
class LocalPart:
    """What one rank needs of the global discretization: its cells and dofs.

    Attributes
    ----------
    rank : int
    cells : ndarray, int64
        Global ids of the rank's cells, ascending.
    vertices : ndarray, int64
        Global ids of their vertices, ascending.
    points : ndarray (n_local_vertices, dim)
    local_cells : ndarray (n_local_cells, dim+1)
        The cells in local vertex numbers (same vertex order as globally).
    dofs : ndarray, int64
        Global (serial) ids of the dofs the cells touch, ascending.
    local_cell_dofs : ndarray (n_local_cells, n_local)
        The cells' dofs as indices into ``dofs``.
    owned : ndarray (len(dofs),), bool
        Dofs this rank owns (the others are ghosts).
    fixed : ndarray (len(dofs),), bool
    fixed_values : ndarray (len(dofs),)
        Dirichlet value at fixed dofs, 0 elsewhere.
    global_index : ndarray (len(dofs),), int64
        Distributed row of each dof, -1 for fixed dofs.
    row_range : (int, int)
        The distributed rows this rank owns.
    n_global : int
    facet_groups : dict
        ``tag -> (local cell, local facet)`` pairs of the rank's tagged
        boundary facets, shape (k, 2).
    """

    rank: int
    cells: np.ndarray
    vertices: np.ndarray
    points: np.ndarray
    local_cells: np.ndarray
    dofs: np.ndarray
    local_cell_dofs: np.ndarray
    owned: np.ndarray
    fixed: np.ndarray
    fixed_values: np.ndarray
    global_index: np.ndarray
    row_range: tuple
    n_global: int
    facet_groups: dict

    @property
    def n_ghosts(self) -> int:
        return int((~self.owned).sum())


def local_part(disc, layout: DofLayout, rank: int, fixed_values=None) -> LocalPart:
    """Cut the piece of ``disc`` that part ``rank`` of ``layout`` holds.

    Parameters
    ----------
    disc : Discretization
    layout : DofLayout
    rank : int
    fixed_values : ndarray (n_dofs,), optional
        Dirichlet values of the global dofs (read at the fixed ones).

    Returns
    -------
    LocalPart
    """
    mesh = disc.mesh
    cells = np.flatnonzero(layout.parts == rank)
    vertices, local_cells = _compact(mesh.cells, cells, mesh.n_vertices)
    if disc.degree == 1:  # the dofs are the vertices
        dofs, local_cell_dofs = vertices, local_cells
    else:
        dofs, local_cell_dofs = _compact(disc.cell_dofs, cells, disc.n_dofs)
    values = np.zeros(dofs.size)
    if fixed_values is not None:
        values[layout.fixed[dofs]] = np.asarray(fixed_values)[dofs[layout.fixed[dofs]]]
    tags = {}
    for name, ids in mesh.facet_groups.items():
        fc = mesh.boundary_facet_cells[ids].astype(np.int64)
        keep = layout.parts[fc] == rank
        if keep.any():
            lc = np.searchsorted(cells, fc[keep])
            tags[name] = np.column_stack([lc, mesh.boundary_facet_local[ids][keep]]).astype(
                np.int64)
    return LocalPart(
        rank=int(rank), cells=cells.astype(np.int64), vertices=vertices.astype(np.int64),
        points=np.ascontiguousarray(mesh.points[vertices]), local_cells=local_cells,
        dofs=dofs.astype(np.int64), local_cell_dofs=local_cell_dofs,
        owned=layout.owner[dofs] == rank, fixed=layout.fixed[dofs].copy(),
        fixed_values=values, global_index=layout.global_index[dofs],
        row_range=(int(layout.offsets[rank]), int(layout.offsets[rank + 1])),
        n_global=layout.n_global, facet_groups=tags)


# ----------------------------------------------------------------------------
# quality of a partition
# ----------------------------------------------------------------------------
@nb.njit(cache=True)
def _halo_counts(cell_dofs, order, starts, owner, n_parts, n_dofs):
    """Per part: dofs touched, and a (n_parts, n_parts) count of ghost dofs by owner."""
    stamp = np.full(n_dofs, -1, dtype=np.int32)
    touched = np.zeros(n_parts, dtype=np.int64)
    ghosts_by_owner = np.zeros((n_parts, n_parts), dtype=np.int64)
    k = cell_dofs.shape[1]
    for p in range(n_parts):
        for t in range(starts[p], starts[p + 1]):
            c = order[t]
            for a in range(k):
                i = cell_dofs[c, a]
                if stamp[i] != p:
                    stamp[i] = p
                    touched[p] += 1
                    if owner[i] != p:
                        ghosts_by_owner[p, owner[i]] += 1
    return touched, ghosts_by_owner


@dataclass
class PartitionReport:
    """Balance and halo of a partition.

    Attributes
    ----------
    n_parts : int
    cells : ndarray (n_parts,)
        Cells per part.
    owned : ndarray (n_parts,)
        Dofs owned per part (all dofs, Dirichlet ones included).
    ghosts : ndarray (n_parts,)
        Dofs a part touches but does not own: the values it receives in each
        matrix-vector product.
    neighbours : ndarray (n_parts,)
        Parts each part exchanges ghost values with.
    cut_facets : int
        Interior facets between cells of different parts (the edge cut of the
        cell adjacency graph).
    """

    n_parts: int
    cells: np.ndarray
    owned: np.ndarray
    ghosts: np.ndarray
    neighbours: np.ndarray
    cut_facets: int
    n_interior_facets: int

    @property
    def cell_balance(self) -> float:
        """Largest part over the mean part, in cells (1 is perfect)."""
        return float(self.cells.max() / self.cells.mean())

    @property
    def dof_balance(self) -> float:
        """Largest part over the mean part, in owned dofs."""
        return float(self.owned.max() / self.owned.mean())

    @property
    def ghost_fraction(self) -> float:
        """Total ghost dofs over total dofs."""
        return float(self.ghosts.sum() / self.owned.sum())

    def as_dict(self) -> dict:
        return {"parts": self.n_parts, "cell_balance": self.cell_balance,
                "dof_balance": self.dof_balance, "cut_facets": self.cut_facets,
                "interior_facets": self.n_interior_facets,
                "ghosts_max": int(self.ghosts.max()), "ghosts_total": int(self.ghosts.sum()),
                "ghost_fraction": self.ghost_fraction,
                "neighbours_max": int(self.neighbours.max())}


def partition_report(disc, parts, n_parts: int, *, cut_facets=True,
                     layout=None) -> PartitionReport:
    """Balance, edge cut and halo sizes of a cell partition of ``disc``.

    ``cut_facets=False`` skips the edge cut (it enumerates every facet, the
    costly part) and reports ``-1`` for it.  ``layout``: the
    :func:`dof_layout` of this partition, when the caller has it already.

    Examples
    --------
    >>> from galerkit import structured_tetrahedra, Discretization
    >>> disc = Discretization(structured_tetrahedra(4, 4, 4), 1)
    >>> rep = partition_report(disc, partition_cells(disc.mesh, 2), 2)
    >>> rep.cells.tolist(), rep.cell_balance
    ([192, 192], 1.0)
    """
    mesh = disc.mesh
    if layout is None:
        layout = dof_layout(disc, parts, n_parts)
    order = np.argsort(layout.parts, kind="stable")
    starts = np.zeros(n_parts + 1, dtype=np.int64)
    np.cumsum(np.bincount(layout.parts, minlength=n_parts), out=starts[1:])
    _, by_owner = _halo_counts(np.ascontiguousarray(disc.cell_dofs), order, starts,
                                     layout.owner, n_parts, disc.n_dofs)
    owned = np.bincount(layout.owner, minlength=n_parts)
    cut, n_interior = -1, -1
    if cut_facets:
        local = np.array(REFERENCE_FACETS[mesh.dim], dtype=np.int64)
        ent, cell_ent, mult, _ = enumerate_entities(mesh.cells, local, mesh.n_vertices)
        lo, hi = _part_range(cell_ent, layout.parts, ent.shape[0], n_parts)
        cut = int((lo != hi).sum())
        del lo, hi
        n_interior = int((mult == 2).sum())
        del ent, cell_ent, mult
    nbr = ((by_owner > 0) | (by_owner.T > 0)).sum(axis=1)
    return PartitionReport(n_parts=int(n_parts), cells=starts[1:] - starts[:-1], owned=owned,
                           ghosts=by_owner.sum(axis=1), neighbours=nbr,
                           cut_facets=int(cut), n_interior_facets=n_interior)
