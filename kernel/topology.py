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

from .compilation import by_size

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


# -- facets of a cell table, from the cells around each vertex -------------------------
#
# A facet of a simplex is the cell minus one vertex.  With the cell's vertices
# sorted (s_0 < ... < s_d), the facet without s_p has smallest vertex s_1 when
# p = 0 and s_0 otherwise: the facets whose smallest vertex is v all belong to
# the cells whose smallest or second smallest vertex is v.  One counting pass
# lists those cells for every vertex (two entries per cell); each vertex then
# sorts its few facets (the other vertices as one integer key) in a small
# per-thread buffer and classifies them.  No table of all facets is built.
# The side of the cell seen from the facet (sorted facet vertices, then the
# opposite vertex) is the parity of the sort times (-1)**(d - p): the two
# cells of an interior facet must have opposite sides (positively oriented
# cells), or the mesh folds.

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


@nb.njit(cache=True, inline="always")
def _two_smallest(cells, c):
    """The smallest and the second smallest vertex of cell ``c``."""
    a = cells[c, 0]
    b = cells[c, 1]
    if b < a:
        a, b = b, a
    for j in range(2, cells.shape[1]):
        v = cells[c, j]
        if v < a:
            b = a
            a = v
        elif v < b:
            b = v
    return a, b


@nb.njit(cache=True, parallel=True)
def _facet_incidence(cells, n_vertices, n_chunks, offsets, items):
    """For every vertex ``v``, the cells whose smallest or second smallest
    vertex is ``v``: ``items[offsets[v]:offsets[v + 1]]``, in ascending cell
    order whatever the number of chunks (chunks are contiguous cell ranges and
    fill their slots of each list in cell order)."""
    m = cells.shape[0]
    per = (m + n_chunks - 1) // n_chunks
    counts = np.zeros((n_chunks, n_vertices), dtype=np.int64)
    for t in nb.prange(n_chunks):
        for c in range(t * per, min(m, (t + 1) * per)):
            a, b = _two_smallest(cells, c)
            counts[t, a] += 1
            counts[t, b] += 1
    running = 0
    for v in range(n_vertices):
        offsets[v] = running
        for t in range(n_chunks):
            cnt = counts[t, v]
            counts[t, v] = running
            running += cnt
    offsets[n_vertices] = running
    for t in nb.prange(n_chunks):
        for c in range(t * per, min(m, (t + 1) * per)):
            a, b = _two_smallest(cells, c)
            pos = counts[t, a]
            items[pos] = c
            counts[t, a] = pos + 1
            pos = counts[t, b]
            items[pos] = c
            counts[t, b] = pos + 1


@nb.njit(cache=True)
def _sort_pairs(keys, occ, n, tmp_keys, tmp_occ):
    """Sort ``keys[:n]`` (with ``occ``) by key, stably: insertion sort for the
    usual few entries; for a large bucket (a vertex in very many cells) runs of
    32 sorted so, then merged bottom-up through ``tmp_keys`` / ``tmp_occ``, so
    no bucket costs quadratic time.  Written out in one function rather than
    ``numpy.argsort`` (which compiles several times longer) or helpers (which
    numba would also compile for the literal run bounds)."""
    run = max(n, 1) if n <= 48 else 32
    for lo in range(0, n, run):
        hi = min(lo + run, n)
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
    width = run
    while width < n:
        for lo in range(0, n, 2 * width):
            mid = min(lo + width, n)
            hi = min(lo + 2 * width, n)
            i = lo
            j = mid
            for o in range(lo, hi):
                if j >= hi or (i < mid and not keys[j] < keys[i]):
                    tmp_keys[o] = keys[i]
                    tmp_occ[o] = occ[i]
                    i += 1
                else:
                    tmp_keys[o] = keys[j]
                    tmp_occ[o] = occ[j]
                    j += 1
        for i in range(n):
            keys[i] = tmp_keys[i]
            occ[i] = tmp_occ[i]
        width *= 2


@nb.njit(cache=True)
def _facet_bucket(cells, offsets, items, v, s, perm, keys, occ, tmp_keys, tmp_occ):
    """The facets whose smallest vertex is ``v``, sorted by key: ``keys[i]`` the
    other vertices as one integer, ``occ[i] = 2 * (c * (d + 1) + e) + side``
    (``e``: the local vertex of cell ``c`` the facet is opposite to).
    Returns their number."""
    k = cells.shape[1]
    d = k - 1
    nv = offsets.shape[0] - 1
    n = np.int64(0)  # not the literal 0: _sort_pairs would compile for Literal[int](0) too
    for i in range(offsets[v], offsets[v + 1]):
        c = items[i]
        odd = _sort_cell(cells, c, s, perm)
        p_lo = 1 if s[0] == v else 0
        p_hi = k if s[0] == v else 1
        for p in range(p_lo, p_hi):
            key = 0
            for j in range(1 if p > 0 else 2, k):
                if j != p:
                    key = key * nv + s[j]
            keys[n] = key
            occ[n] = 2 * (c * k + perm[p]) + ((odd + d - p) & 1)
            n += 1
    _sort_pairs(keys, occ, n, tmp_keys, tmp_occ)
    return n


@nb.njit(cache=True, inline="always")
def _cswap(a, pa, b, pb):
    """One compare-exchange of a sorting network, with the positions; the last
    value is 1 when it swapped."""
    if b < a:
        return b, pb, a, pa, 1
    return a, pa, b, pb, 0


@nb.njit(cache=True, inline="always")
def _hash_add(table, count, side0, same, claimed, n, key, side, mask):
    """Count one occurrence of facet ``key`` (seen from ``side``) in the open
    addressing table of one bucket; returns the number of distinct keys."""
    h = (key ^ (key >> 17) ^ (key >> 31)) & mask
    while table[h] != key and table[h] >= 0:
        h = (h + 1) & mask
    if table[h] < 0:
        table[h] = key
        count[h] = 1
        side0[h] = side
        same[h] = 0
        claimed[n] = h
        return n + 1
    count[h] += 1
    same[h] = 1 if side == side0[h] else 0
    return n


@nb.njit(cache=True, parallel=True)
def _facet_count(cells, offsets, items, n_chunks, table_size, n_unique, n_boundary, defects):
    """Classify the facets of every vertex's bucket.

    Per vertex ``v``: the number of distinct facets and of boundary facets
    (one cell) with smallest vertex ``v``, and ``defects[v]`` (bit 0: a facet
    shared by more than two cells, bit 1: a folded facet, two cells on the
    same side).  Returns the counts of both defects.  Each bucket's facets are
    counted in a small hash table (``table_size``, a power of two at least
    twice the largest bucket): the counts do not depend on any order.
    """
    nv = offsets.shape[0] - 1
    per = (nv + n_chunks - 1) // n_chunks
    found = np.zeros((n_chunks, 2), dtype=np.int64)
    for t in nb.prange(n_chunks):
        _count_range(cells, offsets, items, t * per, min(nv, (t + 1) * per), table_size,
                     n_unique, n_boundary, defects, found[t])
    return found[:, 0].sum(), found[:, 1].sum()


@nb.njit(cache=True)
def _count_range(cells, offsets, items, v_lo, v_hi, table_size, n_unique, n_boundary, defects,
                 found):
    """:func:`_facet_count` for the vertices ``v_lo .. v_hi - 1``; adds the
    numbers of shared and of folded facets to ``found[0]``, ``found[1]``."""
    nv = offsets.shape[0] - 1
    k = cells.shape[1]
    mask = table_size - 1
    table = np.full(table_size, -1, dtype=np.int64)
    count = np.zeros(table_size, dtype=np.int32)
    side0 = np.zeros(table_size, dtype=np.int8)
    same = np.zeros(table_size, dtype=np.int8)
    claimed = np.empty(table_size, dtype=np.int64)
    if True:
        for v in range(v_lo, v_hi):
            n = 0
            for i in range(offsets[v], offsets[v + 1]):
                c = items[i]
                # the cell's vertices sorted by a network; odd: the parity of the sort.
                # The facet without the p-th smallest vertex sees the cell from side
                # (odd + d - p) & 1; its key is its vertices other than v.
                if k == 4:
                    a0, q0, a1, q1, x1 = _cswap(cells[c, 0], 0, cells[c, 1], 1)
                    a2, q2, a3, q3, x2 = _cswap(cells[c, 2], 2, cells[c, 3], 3)
                    a0, q0, a2, q2, x3 = _cswap(a0, q0, a2, q2)
                    a1, q1, a3, q3, x4 = _cswap(a1, q1, a3, q3)
                    a1, q1, a2, q2, x5 = _cswap(a1, q1, a2, q2)
                    odd = x1 ^ x2 ^ x3 ^ x4 ^ x5
                    if a0 == v:
                        n = _hash_add(table, count, side0, same, claimed, n,
                                      a2 * nv + a3, odd ^ 0, mask)
                        n = _hash_add(table, count, side0, same, claimed, n,
                                      a1 * nv + a3, odd ^ 1, mask)
                        n = _hash_add(table, count, side0, same, claimed, n,
                                      a1 * nv + a2, odd, mask)
                    else:
                        n = _hash_add(table, count, side0, same, claimed, n,
                                      a2 * nv + a3, odd ^ 1, mask)
                else:
                    a0, q0, a1, q1, x1 = _cswap(cells[c, 0], 0, cells[c, 1], 1)
                    a1, q1, a2, q2, x2 = _cswap(a1, q1, cells[c, 2], 2)
                    a0, q0, a1, q1, x3 = _cswap(a0, q0, a1, q1)
                    odd = x1 ^ x2 ^ x3
                    if a0 == v:
                        n = _hash_add(table, count, side0, same, claimed, n, a2, odd ^ 1,
                                      mask)
                        n = _hash_add(table, count, side0, same, claimed, n, a1, odd, mask)
                    else:
                        n = _hash_add(table, count, side0, same, claimed, n, a2, odd, mask)
            bnd = 0
            shared_here = 0
            fold_here = 0
            for j in range(n):
                h = claimed[j]
                cnt = count[h]
                if cnt == 1:
                    bnd += 1
                elif cnt == 2:
                    fold_here += same[h]
                else:
                    shared_here += 1
                table[h] = -1
            n_unique[v] = n
            n_boundary[v] = bnd
            defects[v] = (1 if shared_here else 0) + (2 if fold_here else 0)
            found[0] += shared_here
            found[1] += fold_here


@nb.njit(cache=True, parallel=True)
def _facet_fill(cells, offsets, items, verts, start, n_chunks, max_bucket, facets,
                facet_cells, facet_local):
    """The boundary facets of the vertices ``verts`` (sorted vertex ids), their
    cells and local indices, from position ``start[i]`` for ``verts[i]``: in
    lexicographic order of the facets when ``verts`` ascends."""
    nv = offsets.shape[0] - 1
    k = cells.shape[1]
    d = k - 1
    nw = verts.shape[0]
    per = (nw + n_chunks - 1) // n_chunks
    for t in nb.prange(n_chunks):
        s = np.empty(k, dtype=np.int64)
        perm = np.empty(k, dtype=np.int64)
        keys = np.empty(max_bucket, dtype=np.int64)
        occ = np.empty(max_bucket, dtype=np.int64)
        tmp_keys = np.empty(max_bucket, dtype=np.int64)
        tmp_occ = np.empty(max_bucket, dtype=np.int64)
        for w in range(t * per, min(nw, (t + 1) * per)):
            v = verts[w]
            n = _facet_bucket(cells, offsets, items, v, s, perm, keys, occ, tmp_keys, tmp_occ)
            out = start[w]
            i = 0
            while i < n:
                j = i + 1
                while j < n and keys[j] == keys[i]:
                    j += 1
                if j - i == 1:
                    o = occ[i] >> 1
                    facets[out, 0] = v
                    key = keys[i]
                    for r in range(d - 1, 0, -1):
                        facets[out, r] = key % nv
                        key //= nv
                    facet_cells[out] = o // k
                    facet_local[out] = o % k
                    out += 1
                i = j


def _defect_example(cells, offsets, items, v, max_bucket, shared):
    """``(vertices, cells)`` of the first facet of vertex ``v``'s bucket that is
    shared by more than two cells (``shared``) or folded."""
    k = cells.shape[1]
    bufs = [np.empty(max_bucket, dtype=np.int64) for _ in range(4)]
    n = _facet_bucket(cells, offsets, items, v, np.empty(k, dtype=np.int64),
                      np.empty(k, dtype=np.int64), *bufs)
    keys, occ = bufs[0][:n], bufs[1][:n]
    i = 0
    while i < n:
        j = i + 1
        while j < n and keys[j] == keys[i]:
            j += 1
        if (j - i > 2) if shared else (j - i == 2 and (occ[i] & 1) == (occ[i + 1] & 1)):
            owners = sorted(int(o) >> 1 for o in occ[i:j])
            c, e = divmod(owners[0], k)
            verts = sorted(int(x) for x in np.delete(cells[c], e))
            return verts, [o // k for o in owners]
        i = j
    raise AssertionError("no defective facet in the bucket that reported one")


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
    threads = nb.get_num_threads()
    offsets = np.empty(n_vertices + 1, dtype=np.int64)
    items = np.empty(2 * m, dtype=index_dtype(m))
    by_size(_facet_incidence, cells.size)(cells, n_vertices, max(1, min(threads, m)), offsets,
                                          items)
    # a facet per cell where v is the second smallest vertex, d where it is the smallest
    max_bucket = max(1, int(np.diff(offsets).max()) * (k - 1))
    n_unique = np.empty(n_vertices, dtype=np.int64)
    n_bnd = np.empty(n_vertices, dtype=np.int64)
    defects = np.empty(n_vertices, dtype=np.uint8)
    # more chunks than threads: buckets differ in cost (the results do not depend on it)
    chunks = max(1, min(8 * threads, n_vertices))
    table_size = 16
    while table_size < 2 * max_bucket:
        table_size *= 2
    n_shared, n_fold = by_size(_facet_count, cells.size)(cells, offsets, items, chunks, table_size,
                                                         n_unique, n_bnd, defects)
    out = {"n_facets": int(n_unique.sum()), "shared": int(n_shared), "folded": int(n_fold)}
    for name, bit in (("shared", 1), ("folded", 2)):
        if out[name]:
            v = int(np.flatnonzero(defects & bit)[0])
            out[name + "_example"] = _defect_example(cells, offsets, items, v, max_bucket,
                                                     name == "shared")
    verts = np.flatnonzero(n_bnd).astype(np.int64)
    counts = n_bnd[verts]
    start = np.zeros(verts.size, dtype=np.int64)
    np.cumsum(counts[:-1], out=start[1:])
    nb_total = int(counts.sum())
    facets = np.empty((nb_total, k - 1), dtype=cells.dtype)
    facet_cells = np.empty(nb_total, dtype=index_dtype(m))
    facet_local = np.empty(nb_total, dtype=np.int8)
    if verts.size:
        by_size(_facet_fill, cells.size)(cells, offsets, items, verts, start,
                                         max(1, min(8 * threads, verts.size)), max_bucket,
                                         facets, facet_cells, facet_local)
    out.update(facets=facets, facet_cells=facet_cells, facet_local=facet_local)
    return out
