"""The simplex mesh: validated points and cells, boundary facets and tags.

A :class:`Mesh` holds triangles in 2D or tetrahedra in 3D.  Construction
validates everything a compiled kernel will later trust (shapes, dtypes,
index ranges, finite coordinates, non-degenerate cells, every vertex used),
and re-orients negatively oriented cells so that every cell has a positive
Jacobian determinant.  Arrays are stored C-contiguous and read-only: points
as float64, cells as int32 (int64 only for meshes beyond 2**31 vertices).
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numba as nb
import numpy as np

from .compilation import by_size
from .errors import MeshError
from .regions import DEFAULT_REGION, as_region_ids, interfaces as _interfaces
from .topology import facet_topology, index_dtype

__all__ = ["Mesh", "MeshQuality", "remove_unreferenced_vertices", "merge_duplicate_vertices",
           "DEGENERACY_TOLERANCE", "COINCIDENCE_TOLERANCE"]

#: a cell is degenerate when |volume| <= tol * (longest edge)**d.
DEGENERACY_TOLERANCE = 1e-12
#: two vertices coincide when their distance is <= tol * the shortest edge at either.
COINCIDENCE_TOLERANCE = 1e-10


@nb.njit(cache=True, inline="always")
def _cell_volume_and_longest(points, cells, c):
    """Signed volume of cell ``c`` and the square of its longest edge."""
    d = points.shape[1]
    longest = 0.0
    for i in range(d + 1):
        for j in range(i + 1, d + 1):
            s = 0.0
            for r in range(d):
                t = points[cells[c, j], r] - points[cells[c, i], r]
                s += t * t
            if s > longest:
                longest = s
    p0 = cells[c, 0]
    if d == 2:
        ax = points[cells[c, 1], 0] - points[p0, 0]
        ay = points[cells[c, 1], 1] - points[p0, 1]
        bx = points[cells[c, 2], 0] - points[p0, 0]
        by = points[cells[c, 2], 1] - points[p0, 1]
        return 0.5 * (ax * by - ay * bx), longest
    a0 = points[cells[c, 1], 0] - points[p0, 0]
    a1 = points[cells[c, 1], 1] - points[p0, 1]
    a2 = points[cells[c, 1], 2] - points[p0, 2]
    b0 = points[cells[c, 2], 0] - points[p0, 0]
    b1 = points[cells[c, 2], 1] - points[p0, 1]
    b2 = points[cells[c, 2], 2] - points[p0, 2]
    c0 = points[cells[c, 3], 0] - points[p0, 0]
    c1 = points[cells[c, 3], 1] - points[p0, 1]
    c2 = points[cells[c, 3], 2] - points[p0, 2]
    return (a0 * (b1 * c2 - b2 * c1) - a1 * (b0 * c2 - b2 * c0)
            + a2 * (b0 * c1 - b1 * c0)) / 6.0, longest


@nb.njit(cache=True, parallel=True)
def _geometry(points, cells, volume, scale):
    """Signed volume and longest edge of every cell."""
    for c in nb.prange(cells.shape[0]):
        vol, longest = _cell_volume_and_longest(points, cells, c)
        volume[c] = vol
        scale[c] = np.sqrt(longest)


@nb.njit(cache=True, parallel=True)
def _shape_quality(points, cells, volume, out):
    """Mean-ratio quality: 1 for the equilateral simplex, -> 0 when flat."""
    m = cells.shape[0]
    d = points.shape[1]
    for c in nb.prange(m):
        s = 0.0
        for i in range(d + 1):
            for j in range(i + 1, d + 1):
                for r in range(d):
                    t = points[cells[c, j], r] - points[cells[c, i], r]
                    s += t * t
        v = abs(volume[c])
        if d == 2:
            out[c] = 4.0 * np.sqrt(3.0) * v / s
        else:
            out[c] = 12.0 * (3.0 * v) ** (2.0 / 3.0) / s


@nb.njit(cache=True)
def _check_cells(cells, n_vertices):
    """First cell with an index out of range (code 1) or a repeated vertex (2)."""
    first = -1
    code = 0
    count = 0
    m, k = cells.shape
    for c in range(m):
        bad = 0
        for i in range(k):
            v = cells[c, i]
            if v < 0 or v >= n_vertices:
                bad = 1
                break
            for j in range(i):
                if cells[c, j] == v:
                    bad = 2
        if bad:
            count += 1
            if first < 0:
                first = c
                code = bad
    return first, code, count


@nb.njit(cache=True, parallel=True)
def _copy_check_cells(src, n_vertices, out, codes, used):
    """Copy ``src`` into ``out`` (both (m, k); may be the same array), code
    each cell (0 fine, 1 an index out of range, 2 a repeated vertex) and mark
    the vertices in use.  Returns the number of bad cells.

    Every write to ``used`` stores the same value 1, so the marks do not
    depend on the order of the threads.
    """
    m, k = src.shape
    bad_cells = 0
    for c in nb.prange(m):
        bad = 0
        for i in range(k):
            v = src[c, i]
            if v < 0 or v >= n_vertices:
                bad = 1
                break
            for j in range(i):
                if src[c, j] == v:
                    bad = 2
        codes[c] = bad
        if bad == 0:
            for i in range(k):
                v = src[c, i]
                out[c, i] = v
                used[v] = 1
        bad_cells += 1 if bad else 0
    return bad_cells


@nb.njit(cache=True, parallel=True)
def _validate_cells(src, points, n_vertices, tol, out, codes, used, volume):
    """The whole cell check in one pass: copy ``src`` into ``out`` (both (m, k);
    may be the same array), code each cell (0 fine, 1 an index out of range, 2
    a repeated vertex, 3 degenerate: |volume| <= tol * (longest edge)**d), mark
    the vertices in use, store |signed volume| (the signed volume of a
    degenerate cell) and swap the last two vertices of a negatively oriented
    cell.  A cell with a bad index never reads ``points``.

    Returns the numbers of cells with a bad index, degenerate and re-oriented
    cells.  Every write to ``used`` stores the same value 1, so the marks do
    not depend on the order of the threads.
    """
    m, k = src.shape
    d = k - 1
    n_bad = 0
    n_degenerate = 0
    n_negative = 0
    for c in nb.prange(m):
        bad = 0
        for i in range(k):
            v = src[c, i]
            if v < 0 or v >= n_vertices:
                bad = 1
                break
            for j in range(i):
                if src[c, j] == v:
                    bad = 2
        degenerate = False
        negative = False
        if bad == 0:
            for i in range(k):
                v = src[c, i]
                out[c, i] = v
                used[v] = 1
            vol, longest = _cell_volume_and_longest(points, out, c)
            scale = np.sqrt(longest)
            degenerate = abs(vol) <= tol * scale**d
            if degenerate:
                bad = 3
                volume[c] = vol
            elif vol < 0:
                negative = True
                t = out[c, d - 1]
                out[c, d - 1] = out[c, d]
                out[c, d] = t
                volume[c] = -vol
            else:
                volume[c] = vol
        codes[c] = bad
        n_bad += 1 if (bad == 1 or bad == 2) else 0
        n_degenerate += 1 if degenerate else 0
        n_negative += 1 if negative else 0
    return n_bad, n_degenerate, n_negative


def _refuse_duplicates(cells):
    """Raise for two cells with one vertex set (named), if there are any.

    Called where duplicates are the likely cause: a duplicate pair shares every
    facet, so each of its facets is shared by three or more cells (non-manifold)
    or by just the pair, which then lies on one side of it (a fold).
    """
    dup = _duplicate_cells(cells)
    if dup is not None:
        (i, j), count = dup
        raise MeshError(
            f"mesh: cells {i} and {j} have the same vertices {sorted(cells[i].tolist())} "
            f"(cells repeating an earlier one: {count}); a duplicate cell counts its "
            "volume twice. Remove the repeated cells")


def _duplicate_cells(cells):
    """``((i, j), count)``: the first cell ``j`` whose vertex set repeats an
    earlier cell ``i``, and how many cells repeat an earlier one; ``None`` when
    every cell is distinct."""
    s = np.sort(cells, axis=1).astype(np.uint64)
    # one 64-bit key per vertex set (wrapping arithmetic): equal sets give equal
    # keys; the few cells sharing a key are then compared row by row
    key = np.zeros(s.shape[0], dtype=np.uint64)
    for j in range(s.shape[1]):
        key = key * np.uint64(0x9E3779B97F4A7C15) + s[:, j]
    order = np.argsort(key, kind="stable")
    ks = key[order]
    eq = ks[1:] == ks[:-1]
    if not eq.any():
        return None
    shared = np.zeros(ks.shape[0], dtype=bool)
    shared[1:] |= eq
    shared[:-1] |= eq
    idx = np.sort(order[shared])
    _, first, inverse = np.unique(s[idx], axis=0, return_index=True, return_inverse=True)
    inverse = inverse.ravel()
    later = np.flatnonzero(np.arange(idx.size) != first[inverse])
    if later.size == 0:
        return None
    t = int(later[0])
    return (int(idx[first[inverse[t]]]), int(idx[t])), int(later.size)


@nb.njit(cache=True)
def _cell_components(cells, n_vertices, labels):
    """Connected components through shared vertices: a union-find on the
    vertices (roots are the smallest vertex of their set, path halving), then
    components numbered in the order of their first cell.  Serial, so the
    labels are the same for any thread count."""
    parent = np.arange(n_vertices)
    m, k = cells.shape
    for c in range(m):
        a = cells[c, 0]
        while parent[a] != a:
            parent[a] = parent[parent[a]]
            a = parent[a]
        for j in range(1, k):
            b = cells[c, j]
            while parent[b] != b:
                parent[b] = parent[parent[b]]
                b = parent[b]
            if a < b:
                parent[b] = a
            elif b < a:
                parent[a] = b
                a = b
    # parent[v] <= v, so one ascending pass leaves every vertex on its root
    for v in range(n_vertices):
        parent[v] = parent[parent[v]]
    rank = np.full(n_vertices, -1, dtype=np.int64)
    count = 0
    for c in range(m):
        r = parent[cells[c, 0]]
        if rank[r] < 0:
            rank[r] = count
            count += 1
        labels[c] = rank[r]
    return count


@dataclass(frozen=True)
class MeshQuality:
    """Summary of cell sizes and shapes (see :meth:`Mesh.quality`).

    ``min_shape_quality`` is the mean-ratio measure: 1 for an equilateral
    triangle / regular tetrahedron, tending to 0 for flat cells.
    """

    n_vertices: int
    n_cells: int
    n_boundary_facets: int
    n_reoriented: int
    min_volume: float
    max_volume: float
    volume_ratio: float
    min_shape_quality: float
    mean_shape_quality: float
    max_shape_quality: float


def _as_points(points):
    try:
        p = np.asarray(points)
    except Exception as exc:  # ragged lists and the like
        raise MeshError(f"mesh points: cannot be read as an array ({exc})") from None
    if p.ndim != 2 or p.shape[1] not in (2, 3):
        raise MeshError(
            f"mesh points must have shape (n_vertices, 2) or (n_vertices, 3), got {p.shape}"
        )
    if not (np.issubdtype(p.dtype, np.floating) or np.issubdtype(p.dtype, np.integer)):
        raise MeshError(f"mesh points must be real numbers, got dtype {p.dtype}")
    p = np.ascontiguousarray(p, dtype=np.float64)
    if isinstance(points, np.ndarray) and np.may_share_memory(p, points):
        # the mesh freezes its arrays once validated; the caller's own stays
        # writeable, and changing it later cannot change the checked mesh
        p = p.copy()
    bad = ~np.isfinite(p).all(axis=1)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise MeshError(
            f"mesh points: vertex {i} has a non-finite coordinate {p[i].tolist()} "
            f"({int(bad.sum())} such vertices); fix the coordinates"
        )
    return p


def _planar(points, cells):
    """Triangles given with a third coordinate that is zero everywhere (as mesh files
    store 2D meshes) become 2D points; a non-zero z is refused (no surface meshes)."""
    if points.shape[1] != 3:
        return points
    try:
        shape = np.shape(cells)
    except Exception:  # ragged: _cells_and_use names it
        return points
    if len(shape) != 2 or shape[1] != 3:
        return points
    extent = float(np.ptp(points[:, :2], axis=0).max()) if points.shape[0] > 1 else 1.0
    z = np.abs(points[:, 2])
    if z.size and z.max() > 1e-12 * max(extent, np.finfo(float).tiny):
        i = int(np.argmax(z))
        raise MeshError(
            f"mesh points: triangles with z != 0 (vertex {i} has z = {float(points[i, 2])!r}); "
            "galerkit solves 2D problems in the plane z = 0 and does not solve on surfaces "
            "in 3D. Give the points a zero z column, or drop the z coordinate")
    return np.ascontiguousarray(points[:, :2])


#: plural of each cell type, for messages
CELL_TYPE_PLURAL = {"triangle": "triangles", "tetrahedron": "tetrahedra"}


def _as_cells(cells, n_vertices, dim):
    return _cells_and_use(cells, n_vertices, dim)[0]


def _cells_and_use(cells, n_vertices, dim):
    return _checked_copy(_cells_input(cells, n_vertices, dim), n_vertices, dim)


def _cells_input(cells, n_vertices, dim):
    """The cell table as a C-contiguous integer array of the right shape
    (shape, dtype and huge unsigned values checked; ranges not yet)."""
    try:
        c = np.asarray(cells)
    except Exception as exc:
        raise MeshError(f"mesh cells: cannot be read as an array ({exc})") from None
    if c.ndim != 2 or c.shape[1] != dim + 1:
        kind = "triangles (m, 3)" if dim == 2 else "tetrahedra (m, 4)"
        raise MeshError(
            f"mesh cells must be {kind} for {dim}D points, got shape {c.shape}"
        )
    if c.shape[0] == 0:
        raise MeshError("mesh cells: the mesh has no cells")
    if not np.issubdtype(c.dtype, np.integer):
        raise MeshError(
            f"mesh cells must be an integer array (vertex indices), got dtype {c.dtype}; "
            "convert with cells.astype(np.int64) if the values are whole numbers"
        )
    c = np.ascontiguousarray(c)
    if c.dtype.kind == "u" and c.dtype.itemsize >= 8:
        big = (c > np.iinfo(np.int64).max).any(axis=1)
        if big.any():
            i = int(np.flatnonzero(big)[0])
            raise MeshError(
                f"mesh cells: cell {i} has vertex indices {c[i].tolist()} outside "
                f"0..{n_vertices - 1} ({int(big.sum())} such cells)"
            )
        c = c.astype(np.int64)
    return c


def _copy_target(c, n_vertices):
    """``(src, out)``: ``c`` in the index dtype and a fresh array for the copy
    (the same one when the conversion already made a fresh array); an index
    that the conversion would wrap is refused first."""
    idt = index_dtype(n_vertices)
    if c.dtype != idt:
        # out-of-range values must not wrap in the conversion: check in numpy
        bad = ((c < 0) | (c >= n_vertices)).any(axis=1)
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise MeshError(
                f"mesh cells: cell {i} has vertex indices {c[i].tolist()} outside "
                f"0..{n_vertices - 1} ({int(bad.sum())} such cells)"
            )
        src = np.ascontiguousarray(c, dtype=idt)
        out = src if src is not c and not np.shares_memory(src, c) else np.empty_like(src)
    else:
        src = c
        out = np.empty(c.shape, dtype=idt)
    return src, out


def _bad_index_error(c, codes, count, n_vertices, dim):
    """The error for the first cell of ``codes`` 1 (index out of range) or 2
    (repeated vertex), naming it."""
    i = int(np.flatnonzero((codes == 1) | (codes == 2))[0])
    if codes[i] == 1:
        return MeshError(
            f"mesh cells: cell {i} has vertex indices {c[i].tolist()} outside "
            f"0..{n_vertices - 1} ({int(count)} such cells)"
        )
    return MeshError(
        f"mesh cells: cell {i} repeats a vertex {c[i].tolist()} "
        f"({int(count)} such cells); each cell needs {dim + 1} distinct vertices"
    )


def _checked_copy(c, n_vertices, dim):
    """A fresh C-contiguous copy of the cell table in the index dtype, and
    whether each vertex is used (uint8); raises for an index out of range or a
    repeated vertex, naming the first such cell."""
    src, out = _copy_target(c, n_vertices)
    codes = np.empty(c.shape[0], dtype=np.uint8)
    used = np.zeros(n_vertices, dtype=np.uint8)
    count = _copy_check_cells(src, n_vertices, out, codes, used)
    if count:
        raise _bad_index_error(c, codes, count, n_vertices, dim)
    return out, used


def remove_unreferenced_vertices(points, cells):
    """Drop vertices that no cell uses.

    ``points`` and ``cells`` are validated as in :class:`Mesh` (shapes,
    dtypes, finite coordinates, indices in range), so a bad index raises
    :class:`~galerkit.errors.MeshError` rather than picking a wrong vertex.

    Returns
    -------
    points : ndarray, shape (n_used, d)
    cells : ndarray, shape (m, d + 1), renumbered
    old_to_new : ndarray, shape (n,), int64, -1 for dropped vertices
    """
    # validate first: a cell index out of range would be an IndexError (or,
    # with a negative index, a silently wrong vertex) below
    points = _as_points(points)
    cells = _as_cells(cells, points.shape[0], points.shape[1])
    used = np.zeros(points.shape[0], dtype=bool)
    used[cells.ravel()] = True
    old_to_new = np.full(points.shape[0], -1, dtype=np.int64)
    old_to_new[used] = np.arange(int(used.sum()))
    return points[used], old_to_new[cells], old_to_new


@nb.njit(cache=True)
def _shortest_edges(points, cells, h):
    """``h[v]``: length of the shortest edge at vertex ``v`` (a minimum: the
    same whatever the order)."""
    m, k = cells.shape
    d = points.shape[1]
    for v in range(h.shape[0]):
        h[v] = np.inf
    for c in range(m):
        for i in range(k):
            a = cells[c, i]
            for j in range(i + 1, k):
                b = cells[c, j]
                s = 0.0
                for r in range(d):
                    t = points[a, r] - points[b, r]
                    s += t * t
                length = np.sqrt(s)
                if length < h[a]:
                    h[a] = length
                if length < h[b]:
                    h[b] = length


def _coincident_pairs(points, cells, tolerance):
    """Pairs ``(i, j)``, ``i < j``, of distinct vertices closer than ``tolerance``
    times the shorter of their shortest edges (an array of shape (p, 2), sorted).

    Vertices are binned on a grid of the largest tolerance, twice (the second
    grid shifted by half a bin), and compared inside each bin.
    """
    h = np.empty(points.shape[0])
    _shortest_edges(points, cells, h)
    tol = tolerance * h
    q = float(tol.max())
    if not np.isfinite(q) or q <= 0.0:
        return np.empty((0, 2), dtype=np.int64)
    scale = np.abs(points).max() + 1.0
    if q < scale * 1e-15:  # below round-off of the coordinates: exact repeats only
        q = scale * 1e-15
    found = []
    for shift in (0.0, 0.5):
        key = np.floor(points / q + shift).astype(np.int64)
        order = np.lexsort(key.T[::-1])
        ks = key[order]
        same = (ks[1:] == ks[:-1]).all(axis=1)
        if not same.any():
            continue
        # runs of one bin: compare every member with the run's later members
        starts = np.flatnonzero(np.concatenate([[True], ~same]))
        ends = np.concatenate([starts[1:], [order.size]])
        for a, b in zip(starts[ends - starts > 1], ends[ends - starts > 1]):
            members = order[a:b]
            for x in range(members.size):
                for y in range(x + 1, members.size):
                    i, j = int(members[x]), int(members[y])
                    d = float(np.sqrt(((points[i] - points[j]) ** 2).sum()))
                    if d <= min(tol[i], tol[j]):
                        found.append((min(i, j), max(i, j)))
    if not found:
        return np.empty((0, 2), dtype=np.int64)
    return np.unique(np.array(found, dtype=np.int64), axis=0)


def merge_duplicate_vertices(points, cells, *, tolerance=None):
    """Merge vertices that lie at the same place into one vertex.

    A mesh whose parts were generated separately, or a file with nodes
    repeated along an interface, can hold two vertex ids at one point: the
    cells on either side are then not connected, and the domain is cut
    apart there.  :class:`Mesh` refuses such vertices; this function joins
    them (each group keeps its smallest id's coordinates) and drops the ids
    no cell uses any more.

    Parameters
    ----------
    points : array_like, shape (n, d)
    cells : array_like, shape (m, d + 1), integer
    tolerance : float, optional
        Relative to the shortest edge at either vertex (default
        ``COINCIDENCE_TOLERANCE``).

    Returns
    -------
    points : ndarray, shape (n_merged, d)
    cells : ndarray, shape (m, d + 1)
    old_to_new : ndarray, shape (n,), int64 (-1 for a vertex no cell used)

    Examples
    --------
    >>> pts = [[0, 0], [1, 0], [0, 1], [1, 0], [1, 1], [0, 1]]
    >>> p, c, old_to_new = merge_duplicate_vertices(pts, [[0, 1, 2], [3, 4, 5]])
    >>> len(p), c.tolist()
    (4, [[0, 1, 2], [1, 3, 2]])
    """
    p = _as_points(points)
    c = _as_cells(cells, p.shape[0], p.shape[1])
    tol = COINCIDENCE_TOLERANCE if tolerance is None else float(tolerance)
    if not (np.isfinite(tol) and 0 <= tol < 0.5):
        raise MeshError(f"merge_duplicate_vertices: tolerance must be in [0, 0.5), got {tolerance!r}")
    pairs = _coincident_pairs(p, c, tol)
    target = np.arange(p.shape[0])
    # join each pair's groups to the smallest id (few pairs: plain loops)
    for i, j in pairs.tolist():
        while target[i] != i:
            i = int(target[i])
        while target[j] != j:
            j = int(target[j])
        if i != j:
            target[max(i, j)] = min(i, j)
    for v in range(target.size):  # target[v] <= v: one pass reaches the roots
        target[v] = target[target[v]]
    merged = target[c]
    pts, new_cells, old_to_new = remove_unreferenced_vertices(p, merged)
    # a vertex that was merged away maps to its group's representative
    old_to_new = old_to_new[target]
    return pts, new_cells, old_to_new


class Mesh:
    """A validated triangle (2D) or tetrahedron (3D) mesh.

    Parameters
    ----------
    points : array_like, shape (n_vertices, d), d in {2, 3}
        Vertex coordinates (converted to float64).  Triangles given with a z
        column that is zero everywhere (as mesh files store 2D meshes) are 2D.
    cells : array_like, shape (n_cells, d + 1), integer
        Vertex indices of each cell.  Negatively oriented cells are
        re-oriented (two vertices swapped) and counted in ``n_reoriented``.
    facet_groups : dict, optional
        ``name -> boundary facet ids`` to start with.  Every mesh has the group
        ``"boundary"`` (all boundary facets) unless this dict gives its own
        ``"boundary"``, as a mesh read from a file has.
    regions : array_like (n_cells,), callable or dict, optional
        Cell regions (materials); see :meth:`set_regions`.  Without them the
        mesh has the one region ``"domain"`` (id 0).
    region_names : dict name -> id or list of names, optional
        Names of the region ids (see :meth:`set_regions`).
    check_coincident : bool, default True
        Refuse distinct vertices at one place (see
        :func:`merge_duplicate_vertices`).  The generators and
        :func:`~galerkit.refine_uniform` pass False: their vertices are
        distinct by construction.

    Raises
    ------
    MeshError
        Wrong shape or dtype, an index out of range, a non-finite coordinate,
        a cell repeating a vertex, two cells with the same vertex set (both
        named), a degenerate cell (|volume| below
        ``DEGENERACY_TOLERANCE * longest_edge**d``), a vertex no cell uses
        (remove them with :func:`remove_unreferenced_vertices`), two distinct
        vertices at one place (merge them with
        :func:`merge_duplicate_vertices`, or read a mesh file with
        ``read_mesh(path, merge_duplicates=True)``), a facet
        shared by more than two cells, two cells on the same side of their
        shared facet (a folded mesh: an inverted cell overlapping its
        neighbour), or ``facet_groups`` that is not a dict of valid ids.  The
        message names the first offending vertex or cell.

    Examples
    --------
    >>> m = Mesh([[0, 0], [1, 0], [0, 1], [1, 1]], [[0, 1, 2], [1, 3, 2]])
    >>> m.dim, m.cell_type, m.n_cells, float(m.cell_volumes.sum())
    (2, 'triangle', 2, 1.0)
    >>> m.boundary_facets.shape
    (4, 2)
    >>> sorted(m.facet_groups), len(m.facet_groups["boundary"])
    (['boundary'], 4)
    """

    def __init__(self, points, cells, *, facet_groups=None, check_coincident=True, regions=None,
                 region_names=None):
        p = _planar(_as_points(points), cells)
        n, d = p.shape
        c_in = _cells_input(cells, n, d)
        src, c = _copy_target(c_in, n)
        # indices, copy, used vertices, volumes, degeneracy and orientation: one pass
        used = np.zeros(n, dtype=np.uint8)
        codes = np.empty(c.shape[0], dtype=np.uint8)
        vol = np.empty(c.shape[0])
        n_bad, n_degenerate, n_negative = by_size(_validate_cells, c.size)(
            src, p, n, DEGENERACY_TOLERANCE, c, codes, used, vol)
        del src
        if n_bad:
            raise _bad_index_error(c_in, codes, n_bad, n, d)
        del c_in
        if facet_groups is not None and not hasattr(facet_groups, "items"):
            raise MeshError(
                f"mesh facet_groups must be a dict of name -> boundary facet ids, got "
                f"{type(facet_groups).__name__}")
        if not used.all():
            unused = np.flatnonzero(used == 0)
            raise MeshError(
                f"mesh: vertex {int(unused[0])} belongs to no cell ({unused.size} such "
                "vertices); they would make the matrices singular. Remove them with "
                "galerkit.mesh.remove_unreferenced_vertices(points, cells)"
            )
        del used
        if n_degenerate:
            i = int(np.flatnonzero(codes == 3)[0])
            scale = np.sqrt(max(float(((p[c[i, a]] - p[c[i, b]]) ** 2).sum())
                                for a in range(d + 1) for b in range(a + 1, d + 1)))
            raise MeshError(
                f"mesh: cell {i} (vertices {c[i].tolist()}) is degenerate: volume "
                f"{vol[i]:.3e} for longest edge {scale:.3e} "
                f"({int(n_degenerate)} such cells); remove or repair them"
            )
        del codes
        if check_coincident:
            pairs = _coincident_pairs(p, c, COINCIDENCE_TOLERANCE)
            if pairs.size:
                shown = ", ".join(f"{i} and {j}" for i, j in pairs[:3].tolist())
                raise MeshError(
                    f"mesh: vertices {shown} lie at the same place ({len(pairs)} such pairs, "
                    f"closer than {COINCIDENCE_TOLERANCE:g} x the shortest edge there) but "
                    "are distinct vertices, which cuts the domain apart between their cells. "
                    "Merge them with galerkit.mesh.merge_duplicate_vertices(points, cells) "
                    "and build the mesh from its result; for a mesh file, read it with "
                    "galerkit.bindings.files.read_mesh(path, merge_duplicates=True) (in a "
                    "problem file: merge_duplicates = true under [mesh])")
        self.n_reoriented = int(n_negative)
        p.flags.writeable = False
        c.flags.writeable = False
        vol.flags.writeable = False
        self.points = p
        self.cells = c
        self.cell_volumes = vol
        self.facet_groups = {}
        if regions is None:
            # what set_regions makes of all zeros and {DEFAULT_REGION: 0}, without its passes
            ids = np.zeros(c.shape[0], dtype=np.int32)
            ids.flags.writeable = False
            self.regions = ids
            self.region_names = {DEFAULT_REGION: 0}
        else:
            self.set_regions(regions, region_names)
        # hierarchy, filled in by refine_uniform
        self.parent = None
        self.parent_cells = None
        self.vertex_parents = None
        self.refinement_cells = None
        _ = self._facet_topology  # validates manifoldness
        if facet_groups:
            for name, ids in facet_groups.items():
                self.set_facet_tag(name, ids)
        if "boundary" not in self.facet_groups:
            self.set_facet_tag("boundary", np.arange(self.boundary_facets.shape[0]))

    # -- basic properties ----------------------------------------------------
    @property
    def dim(self) -> int:
        return self.points.shape[1]

    @property
    def cell_type(self) -> str:
        return "triangle" if self.dim == 2 else "tetrahedron"

    @property
    def n_cells(self) -> int:
        return self.cells.shape[0]

    @property
    def n_vertices(self) -> int:
        return self.points.shape[0]

    def __repr__(self) -> str:
        reg = "" if len(self.region_names) == 1 else f", regions {list(self.region_names)}"
        return (f"Mesh({self.n_vertices} vertices, {self.n_cells} "
                f"{CELL_TYPE_PLURAL[self.cell_type]}, "
                f"tags {sorted(self.facet_groups)}{reg})")

    # -- topology -------------------------------------------------------------
    @cached_property
    def _facet_topology(self):
        top = facet_topology(self.cells, self.n_vertices)
        if top["shared"]:
            _refuse_duplicates(self.cells)
            verts, owners = top["shared_example"]
            raise MeshError(
                f"mesh: facet with vertices {verts} is shared by {len(owners)} "
                "cells (non-manifold); each facet may belong to one or two cells"
            )
        if top["folded"]:
            _refuse_duplicates(self.cells)
            verts, owners = top["folded_example"]
            raise MeshError(
                f"mesh: cells {owners[0]} and {owners[1]} lie on the same side of their "
                f"shared facet with vertices {verts} ({top['folded']} such facets): "
                "the mesh folds over itself (an inverted cell overlaps its neighbour, which "
                "re-orienting cannot repair); move the vertices so that cells do not overlap"
            )
        facets, fcell, flocal = top["facets"], top["facet_cells"], top["facet_local"]
        for a in (facets, fcell, flocal):
            a.flags.writeable = False
        return facets, fcell, flocal, top["n_facets"]

    @property
    def boundary_facets(self) -> np.ndarray:
        """Boundary facets, shape (k, d): sorted vertex ids of each facet."""
        return self._facet_topology[0]

    @property
    def boundary_facet_cells(self) -> np.ndarray:
        """Cell owning each boundary facet, shape (k,)."""
        return self._facet_topology[1]

    @property
    def boundary_facet_local(self) -> np.ndarray:
        """Local facet index (opposite local vertex) of each boundary facet, (k,)."""
        return self._facet_topology[2]

    @property
    def n_facets(self) -> int:
        """Number of distinct facets, interior and boundary."""
        return self._facet_topology[3]

    def facet_midpoints(self, facet_ids=None) -> np.ndarray:
        """Midpoints of boundary facets, shape (dim, k)."""
        f = self.boundary_facets if facet_ids is None else self.boundary_facets[facet_ids]
        return np.ascontiguousarray(self.points[f].mean(axis=1).T)

    # -- tags -------------------------------------------------------------------
    def set_facet_tag(self, name: str, facet_ids) -> np.ndarray:
        """Tag boundary facets by id (indices into ``boundary_facets``).

        Raises
        ------
        MeshError
            A name that is not a non-empty string, ids that are not a 1D integer
            array, an id outside ``0 .. len(boundary_facets) - 1``, or no ids at
            all (an empty tag is refused: a condition on it would do nothing).
        """
        if not isinstance(name, str) or not name:
            raise MeshError(f"facet tag names must be non-empty strings, got {name!r}")
        try:
            ids = np.asarray(facet_ids)
        except Exception as exc:  # ragged lists and the like
            raise MeshError(f"facet tag {name!r}: ids cannot be read as an array ({exc})") from None
        if ids.ndim != 1 or not (np.issubdtype(ids.dtype, np.integer) or ids.size == 0):
            raise MeshError(f"facet tag {name!r}: ids must be a 1D integer array")
        k = self.boundary_facets.shape[0]
        if ids.size == 0:
            raise MeshError(
                f"facet tag {name!r}: no facet ids given; a tag must name at least one "
                "boundary facet (a condition on an empty tag would silently do nothing). "
                "Check the selection, or leave the tag out"
            )
        if ids.min() < 0 or ids.max() >= k:
            bad = int(ids[(ids < 0) | (ids >= k)][0])
            raise MeshError(
                f"facet tag {name!r}: facet id {bad} is outside 0..{k - 1} "
                "(ids index mesh.boundary_facets)"
            )
        if ids.size > 1 and not (ids[1:] > ids[:-1]).all():
            ids = np.unique(ids)  # strictly increasing ids are unique and sorted already
        ids = ids.astype(np.int64)  # a copy: the caller's array stays the caller's
        ids.flags.writeable = False
        self.facet_groups[name] = ids
        return ids

    def tag_boundary(self, name: str, predicate) -> np.ndarray:
        """Tag the boundary facets whose midpoints satisfy ``predicate``.

        Parameters
        ----------
        name : str
            Tag name; an existing tag of that name is replaced.
        predicate : callable
            ``predicate(x)`` with ``x`` of shape (dim, k), the facet midpoints,
            returns a boolean mask of shape (k,).

        Returns
        -------
        ndarray of int64
            The tagged facet ids.

        Raises
        ------
        MeshError
            If the predicate returns the wrong shape or selects no facet.

        Examples
        --------
        >>> from galerkit import structured_triangles
        >>> m = structured_triangles(4, 4)
        >>> len(m.tag_boundary("outlet", lambda x: x[0] > 1 - 1e-12))
        4
        """
        x = self.facet_midpoints()
        try:
            mask = np.asarray(predicate(x))
        except Exception as exc:
            raise MeshError(
                f"tag_boundary({name!r}): the predicate failed on the facet midpoints of "
                f"shape {x.shape}: {type(exc).__name__}: {exc}"
            ) from exc
        if mask.shape != (x.shape[1],) or mask.dtype != bool:
            raise MeshError(
                f"tag_boundary({name!r}): the predicate must return a boolean array of "
                f"shape ({x.shape[1]},), got dtype {mask.dtype} shape {mask.shape}"
            )
        if not mask.any():
            raise MeshError(
                f"tag_boundary({name!r}): the predicate selects no boundary facet; "
                "check it against mesh.facet_midpoints() (allow a tolerance)"
            )
        return self.set_facet_tag(name, np.flatnonzero(mask))

    def tagged_facets(self, tag: str) -> np.ndarray:
        """Facet ids of ``tag``; a clear error naming the known tags if missing."""
        if not isinstance(tag, str) or tag not in self.facet_groups:
            raise MeshError(
                f"mesh has no facet tag {tag!r}; known tags: {sorted(self.facet_groups)}"
            )
        return self.facet_groups[tag]

    # -- regions -----------------------------------------------------------------
    def set_regions(self, regions, names=None):
        """Give every cell a region (material) id, with names.

        Parameters
        ----------
        regions : array_like (n_cells,) of integers >= 0, callable, or dict
            The ids; or ``regions(x)`` of the cell centroids ``x`` (dim,
            n_cells) returning them; or ``{name: predicate(x) -> bool mask}``
            (cells selected by no predicate form the region ``"domain"``).
        names : dict name -> id, or list of names (name i for id i), optional
            An id without a name is named by its number (``"3"``).

        Sets ``regions`` (int32, read-only) and ``region_names`` (``name ->
        id`` of the ids in use); see :mod:`galerkit.regions`.

        Examples
        --------
        >>> from galerkit import structured_triangles
        >>> m = structured_triangles(4, 1)
        >>> m.set_regions(lambda x: (x[0] > 0.5).astype(int), ["steel", "foam"])
        >>> m.regions.tolist(), m.region_names
        ([0, 0, 0, 0, 1, 1, 1, 1], {'steel': 0, 'foam': 1})
        """
        ids, table = as_region_ids(self, regions, names)
        self.regions = ids
        self.region_names = table
        self.__dict__.pop("interfaces", None)

    @cached_property
    def interfaces(self):
        """Interior facets between regions: ``"a/b" -> Interface`` (see
        :func:`galerkit.regions.interfaces`), usable for flux output."""
        return _interfaces(self)

    # -- connectivity ----------------------------------------------------------
    def connected_components(self):
        """Connected components of the mesh.

        Two cells are connected when they share a vertex (continuous Lagrange
        elements couple them through that vertex's dof).  The components are
        found by a union-find over the vertices (each cell joins its
        vertices), compiled and serial.

        Returns
        -------
        count : int
            Number of components (1 for a connected mesh).
        labels : ndarray, shape (n_cells,), int64, read-only
            Component of each cell, numbered ``0 .. count - 1`` in the order of
            the first cell of each component.

        Examples
        --------
        >>> m = Mesh([[0, 0], [1, 0], [0, 1], [5, 0], [6, 0], [5, 1]],
        ...          [[0, 1, 2], [3, 4, 5]])
        >>> count, labels = m.connected_components()
        >>> count, labels.tolist()
        (2, [0, 1])
        """
        return self._components

    @cached_property
    def _components(self):
        labels = np.empty(self.n_cells, dtype=np.int64)
        count = by_size(_cell_components, self.cells.size)(self.cells, self.n_vertices, labels)
        labels.flags.writeable = False
        return int(count), labels

    # -- quality ---------------------------------------------------------------
    def cell_quality(self) -> np.ndarray:
        """Mean-ratio shape quality of every cell, shape (n_cells,), in (0, 1]."""
        q = np.empty(self.n_cells)
        _shape_quality(self.points, self.cells, self.cell_volumes, q)
        return q

    def quality(self) -> MeshQuality:
        """Counts, volume range and shape-quality range of the mesh."""
        q = self.cell_quality()
        v = self.cell_volumes
        return MeshQuality(
            n_vertices=self.n_vertices,
            n_cells=self.n_cells,
            n_boundary_facets=int(self.boundary_facets.shape[0]),
            n_reoriented=self.n_reoriented,
            min_volume=float(v.min()),
            max_volume=float(v.max()),
            volume_ratio=float(v.max() / v.min()),
            min_shape_quality=float(q.min()),
            mean_shape_quality=float(q.mean()),
            max_shape_quality=float(q.max()),
        )
