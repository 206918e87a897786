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

__all__ = ["incidence", "enumerate_entities", "index_dtype"]


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


@nb.njit(cache=True, parallel=True)
def _sort_and_count(offsets, occ, keys, n_unique):
    nv = offsets.shape[0] - 1
    for v in nb.prange(nv):
        lo = offsets[v]
        hi = offsets[v + 1]
        # insertion sort of the bucket by key, stable (buckets are small: the
        # entities whose smallest vertex is v)
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
