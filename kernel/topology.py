"""Mesh topology: incidence lists and enumeration of edges, faces and facets.

Pure numba kernels on validated arrays; the callers (``mesh``, ``dofs``,
``refinement``, ``assembly``) check shapes, dtypes and index ranges first.

Entities (edges, faces) are enumerated by bucketing every cell-local
occurrence on its smallest vertex, then sorting each bucket by the remaining
vertices.  The result is ordered lexicographically by the sorted vertex
tuple, so entities that share a smallest vertex are numbered together (the
dof numbering relies on this ordering).  Cost O(m * n_local_entities) time
and one integer per occurrence of temporary memory.
"""

from __future__ import annotations

import numba as nb
import numpy as np

__all__ = ["incidence", "enumerate_entities", "facet_topology", "index_dtype"]


def index_dtype(upper: int):
    """int32 when every index below ``upper`` fits, else int64."""
    return np.int32 if upper < 2**31 - 1 else np.int64


@nb.njit(cache=True)
def _incidence_kernel(rows, n_targets, offsets, items):
    m, k = rows.shape
    for c in range(m):
        for j in range(k):
            offsets[rows[c, j] + 1] += 1
    for i in range(n_targets):
        offsets[i + 1] += offsets[i]
    fill = offsets[:-1].copy()
    for c in range(m):
        for j in range(k):
            r = rows[c, j]
            items[fill[r]] = c
            fill[r] += 1


def incidence(rows: np.ndarray, n_targets: int):
    """Transpose a cell -> target table into target -> cells (CSR).

    Parameters
    ----------
    rows : ndarray, shape (m, k), int32 or int64
        ``rows[c]`` are the targets (vertices, dofs) of cell ``c``; every entry
        in ``0 .. n_targets - 1`` (validated by the caller).
    n_targets : int

    Returns
    -------
    offsets : ndarray, shape (n_targets + 1,), int64
    items : ndarray, shape (m * k,), int32 or int64
        Cells incident to target ``i`` are ``items[offsets[i]:offsets[i+1]]``,
        in ascending cell order.
    """
    m, k = rows.shape
    offsets = np.zeros(n_targets + 1, dtype=np.int64)
    items = np.empty(m * k, dtype=index_dtype(m))
    _incidence_kernel(rows, n_targets, offsets, items)
    return offsets, items


@nb.njit(cache=True, inline="always")
def _sorted_tuple(cells, c, local, e, out):
    ev = local.shape[1]
    for j in range(ev):
        out[j] = cells[c, local[e, j]]
    for i in range(1, ev):  # insertion sort, ev <= 3
        v = out[i]
        j = i - 1
        while j >= 0 and out[j] > v:
            out[j + 1] = out[j]
            j -= 1
        out[j + 1] = v


@nb.njit(cache=True, parallel=True)
def _bucket(cells, local, n_vertices, n_chunks, offsets, occ, keys):
    """Counting sort of all occurrences by smallest vertex, chunk-parallel.

    Chunks are contiguous cell ranges, so the order inside each bucket is the
    global cell order whatever the number of chunks.
    """
    m = cells.shape[0]
    ne, ev = local.shape
    per = (m + n_chunks - 1) // n_chunks
    counts = np.zeros((n_chunks, n_vertices), dtype=np.int64)
    for t in nb.prange(n_chunks):
        tup = np.empty(ev, dtype=np.int64)
        for c in range(t * per, min(m, (t + 1) * per)):
            for e in range(ne):
                _sorted_tuple(cells, c, local, e, tup)
                counts[t, tup[0]] += 1
    running = 0
    for v in range(n_vertices):
        offsets[v] = running
        for t in range(n_chunks):
            cnt = counts[t, v]
            counts[t, v] = running
            running += cnt
    offsets[n_vertices] = running
    for t in nb.prange(n_chunks):
        tup = np.empty(ev, dtype=np.int64)
        for c in range(t * per, min(m, (t + 1) * per)):
            for e in range(ne):
                _sorted_tuple(cells, c, local, e, tup)
                # the remaining vertices as one int64 key (n_vertices < 2**31)
                key = 0
                for j in range(1, ev):
                    key = key * n_vertices + tup[j]
                pos = counts[t, tup[0]]
                occ[pos] = c * ne + e
                keys[pos] = key
                counts[t, tup[0]] = pos + 1


@nb.njit(cache=True, inline="always")
def _sort_bucket(keys, occ, lo, hi):
    """Stable insertion sort of ``keys[lo:hi]`` (with ``occ``) by key; buckets are
    small: the entities whose smallest vertex is one vertex."""
    for i in range(lo + 1, hi):
        k = keys[i]
        o = occ[i]
        j = i - 1
        while j >= lo and keys[j] > k:
            keys[j + 1] = keys[j]
            occ[j + 1] = occ[j]
            j -= 1
        keys[j + 1] = k
        occ[j + 1] = o


@nb.njit(cache=True, parallel=True)
def _sort_and_count(offsets, occ, keys, n_unique):
    nv = offsets.shape[0] - 1
    for v in nb.prange(nv):
        lo = offsets[v]
        hi = offsets[v + 1]
        _sort_bucket(keys, occ, lo, hi)
        count = 0
        for i in range(lo, hi):
            if i == lo or keys[i] != keys[i - 1]:
                count += 1
        n_unique[v + 1] = count


@nb.njit(cache=True, parallel=True)
def _assign(cells, local, offsets, occ, keys, base, entities, cell_entities,
            multiplicity, first):
    ne, ev = local.shape
    nv = offsets.shape[0] - 1
    for v in nb.prange(nv):
        t = np.empty(ev, dtype=np.int64)
        eid = base[v] - 1
        for i in range(offsets[v], offsets[v + 1]):
            o = occ[i]
            c = o // ne
            e = o % ne
            if i == offsets[v] or keys[i] != keys[i - 1]:
                eid += 1
                _sorted_tuple(cells, c, local, e, t)
                for j in range(ev):
                    entities[eid, j] = t[j]
                multiplicity[eid] = 0
                first[eid] = o
            multiplicity[eid] += 1
            if cell_entities.shape[0] > 0:
                cell_entities[c, e] = eid


def enumerate_entities(cells: np.ndarray, local: np.ndarray, n_vertices: int, *,
                       with_cell_entities: bool = True):
    """Number the distinct sub-entities (edges, faces) of a cell table.

    Parameters
    ----------
    cells : ndarray, shape (m, d + 1), int32 or int64, C-contiguous
        Validated cell -> vertex table.
    local : ndarray, shape (n_entities_per_cell, n_entity_vertices), int64
        Local vertex tuples of the entity type (for example the six edges of
        the tetrahedron).
    n_vertices : int

    Returns
    -------
    entities : ndarray, shape (E, n_entity_vertices), same dtype as cells
        Sorted vertex tuples, rows in lexicographic order.
    cell_entities : ndarray, shape (m, n_entities_per_cell)
        Global entity id of each local entity (shape (0, n) when
        ``with_cell_entities`` is False, which saves time and memory).
    multiplicity : ndarray, shape (E,), int32
        Number of cells sharing the entity (for facets: 1 boundary,
        2 interior, more is non-manifold).
    first : ndarray, shape (E,), int64
        First occurrence ``c * n_entities_per_cell + local_index``.
    """
    cells = np.ascontiguousarray(cells)
    local = np.ascontiguousarray(local, dtype=np.int64)
    m = cells.shape[0]
    ne, ev = local.shape
    if n_vertices >= 2**31:
        raise ValueError("enumerate_entities: more than 2**31 vertices are not supported")
    offsets = np.zeros(n_vertices + 1, dtype=np.int64)
    occ = np.empty(m * ne, dtype=index_dtype(m * ne))
    keys = np.empty(m * ne, dtype=np.int64)
    n_chunks = max(1, min(nb.get_num_threads(), m))
    _bucket(cells, local, n_vertices, n_chunks, offsets, occ, keys)
    n_unique = np.zeros(n_vertices + 1, dtype=np.int64)
    _sort_and_count(offsets, occ, keys, n_unique)
    base = np.cumsum(n_unique)
    n_entities = int(base[-1])
    idt = index_dtype(max(n_entities, n_vertices))
    entities = np.empty((n_entities, ev), dtype=cells.dtype)
    cell_entities = np.empty((m if with_cell_entities else 0, ne), dtype=idt)
    multiplicity = np.empty(n_entities, dtype=np.int32)
    first = np.empty(n_entities, dtype=np.int64)
    _assign(cells, local, offsets, occ, keys, base, entities, cell_entities, multiplicity, first)
    return entities, cell_entities, multiplicity, first


# -- facets of a cell table, in one counting pass ---------------------------------------
#
# A facet of a simplex is the cell minus one vertex.  With the cell's vertices
# sorted (s_0 < ... < s_d), the facet without s_p has smallest vertex s_1 when
# p = 0 and s_0 otherwise, so the bucket sizes follow from the two smallest
# vertices alone.  The side of the cell seen from the facet (sorted facet
# vertices, then the opposite vertex) is the parity of the sort times
# (-1)**(d - p): the two cells of an interior facet must have opposite sides
# (positively oriented cells), or the mesh folds.

@nb.njit(cache=True, inline="always")
def _sort_cell(cells, c, s, perm):
    """Sorted vertices of cell ``c`` into ``s``, local positions into ``perm``;
    returns the parity (0 even, 1 odd) of the sorting permutation."""
    k = cells.shape[1]
    for j in range(k):
        s[j] = cells[c, j]
        perm[j] = j
    odd = 0
    for i in range(1, k):
        v = s[i]
        q = perm[i]
        j = i - 1
        while j >= 0 and s[j] > v:
            s[j + 1] = s[j]
            perm[j + 1] = perm[j]
            j -= 1
            odd ^= 1
        s[j + 1] = v
        perm[j + 1] = q
    return odd


@nb.njit(cache=True, parallel=True)
def _facet_buckets(cells, n_vertices, n_chunks, offsets, occ, keys):
    """Every facet occurrence into the bucket of its smallest vertex.

    ``occ[pos] = 2 * (c * (d + 1) + e) + side`` (``e``: the local vertex the
    facet is opposite to), ``keys[pos]``: the facet's other vertices as one
    integer.  Chunks are contiguous cell ranges and fill their slots of each
    bucket in cell order, so every bucket lists its occurrences in cell order
    whatever the number of threads.
    """
    m, k = cells.shape
    d = k - 1
    per = (m + n_chunks - 1) // n_chunks
    counts = np.zeros((n_chunks, n_vertices), dtype=np.int64)
    for t in nb.prange(n_chunks):
        s = np.empty(k, dtype=np.int64)
        perm = np.empty(k, dtype=np.int64)
        for c in range(t * per, min(m, (t + 1) * per)):
            _sort_cell(cells, c, s, perm)
            counts[t, s[0]] += d
            counts[t, s[1]] += 1
    running = 0
    for v in range(n_vertices):
        offsets[v] = running
        for t in range(n_chunks):
            cnt = counts[t, v]
            counts[t, v] = running
            running += cnt
    offsets[n_vertices] = running
    for t in nb.prange(n_chunks):
        s = np.empty(k, dtype=np.int64)
        perm = np.empty(k, dtype=np.int64)
        for c in range(t * per, min(m, (t + 1) * per)):
            odd = _sort_cell(cells, c, s, perm)
            for p in range(k):
                first = s[1] if p == 0 else s[0]
                key = 0
                for j in range(1 if p == 0 else 0, k):
                    if j != p and s[j] != first:
                        key = key * n_vertices + s[j]
                side = (odd + d - p) & 1
                pos = counts[t, first]
                occ[pos] = 2 * (c * k + perm[p]) + side
                keys[pos] = key
                counts[t, first] = pos + 1


@nb.njit(cache=True, parallel=True)
def _facet_scan(offsets, occ, keys, n_unique, n_boundary, first_shared, first_fold):
    """Sort every bucket by key (stable) and classify its facets.

    Per vertex ``v``: the number of distinct facets and of boundary facets
    (one cell) with smallest vertex ``v``; the position of the first facet
    shared by more than two cells and of the first folded facet (-1: none).
    Returns the counts of both defects.
    """
    nv = offsets.shape[0] - 1
    n_shared = 0
    n_fold = 0
    for v in nb.prange(nv):
        lo = offsets[v]
        hi = offsets[v + 1]
        _sort_bucket(keys, occ, lo, hi)
        uniq = 0
        bnd = 0
        shared_at = -1
        fold_at = -1
        shared_here = 0
        fold_here = 0
        i = lo
        while i < hi:
            j = i + 1
            while j < hi and keys[j] == keys[i]:
                j += 1
            uniq += 1
            if j - i == 1:
                bnd += 1
            elif j - i == 2:
                if (occ[i] & 1) == (occ[i + 1] & 1):
                    fold_here += 1
                    if fold_at < 0:
                        fold_at = i
            else:
                shared_here += 1
                if shared_at < 0:
                    shared_at = i
            i = j
        n_unique[v] = uniq
        n_boundary[v] = bnd
        first_shared[v] = shared_at
        first_fold[v] = fold_at
        n_shared += shared_here
        n_fold += fold_here
    return n_shared, n_fold


@nb.njit(cache=True, parallel=True)
def _facet_fill(cells, offsets, occ, keys, start, facets, facet_cells, facet_local):
    """The boundary facets (sorted vertex ids), their cells and local indices,
    in lexicographic order of the facets."""
    nv = offsets.shape[0] - 1
    k = cells.shape[1]
    d = k - 1
    for v in nb.prange(nv):
        out = start[v]
        lo = offsets[v]
        hi = offsets[v + 1]
        i = lo
        while i < hi:
            j = i + 1
            while j < hi and keys[j] == keys[i]:
                j += 1
            if j - i == 1:
                o = occ[i] >> 1
                c = o // k
                facets[out, 0] = v
                key = keys[i]
                for r in range(d - 1, 0, -1):
                    facets[out, r] = key % nv
                    key //= nv
                facet_cells[out] = c
                facet_local[out] = o % k
                out += 1
            i = j


def facet_topology(cells: np.ndarray, n_vertices: int):
    """Boundary facets and the defects of a cell table's facets.

    Parameters
    ----------
    cells : ndarray, shape (m, d + 1), int32 or int64, C-contiguous
        Validated, positively oriented cell -> vertex table.
    n_vertices : int

    Returns
    -------
    dict with ``facets`` (k, d) sorted vertex ids of the boundary facets in
    lexicographic order, ``facet_cells`` (k,) and ``facet_local`` (k,) int8
    (the cell and the local vertex each facet is opposite to), ``n_facets``
    (distinct facets), ``shared`` / ``folded`` (counts of facets shared by
    more than two cells / by two cells on the same side), and when either is
    non-zero ``shared_example`` / ``folded_example``: ``(vertices, cells)`` of
    the first such facet.
    """
    m, k = cells.shape
    if n_vertices >= 2**31:
        raise ValueError("facet_topology: more than 2**31 vertices are not supported")
    offsets = np.zeros(n_vertices + 1, dtype=np.int64)
    occ = np.empty(m * k, dtype=index_dtype(2 * m * k))
    keys = np.empty(m * k, dtype=np.int64)
    n_chunks = max(1, min(nb.get_num_threads(), m))
    _facet_buckets(cells, n_vertices, n_chunks, offsets, occ, keys)
    n_unique = np.empty(n_vertices, dtype=np.int64)
    n_bnd = np.empty(n_vertices + 1, dtype=np.int64)
    first_shared = np.empty(n_vertices, dtype=np.int64)
    first_fold = np.empty(n_vertices, dtype=np.int64)
    n_shared, n_fold = _facet_scan(offsets, occ, keys, n_unique, n_bnd[1:], first_shared,
                                   first_fold)
    out = {"n_facets": int(n_unique.sum()), "shared": int(n_shared), "folded": int(n_fold)}
    for name, first in (("shared", first_shared), ("folded", first_fold)):
        if out[name]:
            v = int(np.flatnonzero(first >= 0)[0])
            i = int(first[v])
            j = i
            while j < offsets[v + 1] and keys[j] == keys[i]:
                j += 1
            owners = sorted(int(o) >> 1 for o in occ[i:j])
            c, e = divmod(owners[0], k)
            verts = sorted(int(x) for x in np.delete(cells[c], e))
            out[name + "_example"] = (verts, [o // k for o in owners])
    n_bnd[0] = 0
    start = np.cumsum(n_bnd)
    nb_total = int(start[-1])
    facets = np.empty((nb_total, k - 1), dtype=cells.dtype)
    facet_cells = np.empty(nb_total, dtype=index_dtype(m))
    facet_local = np.empty(nb_total, dtype=np.int8)
    _facet_fill(cells, offsets, occ, keys, start, facets, facet_cells, facet_local)
    out.update(facets=facets, facet_cells=facet_cells, facet_local=facet_local)
    return out
