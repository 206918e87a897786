"""Sparse stiffness, mass and load operators: symbolic and numeric phases.

:class:`Assembler` computes once per discretization (the *symbolic phase*):

* the CSR sparsity pattern (sorted column indices; int32 where it fits);
* the *cell order*: cells sorted (stably) by their smallest dof;
* the *position map*: for each cell in that order and each local pair
  (a, b), the offset of column ``dof[b]`` inside row ``dof[a]`` (uint8 when
  every row has at most 256 entries, else uint16/uint32) -- ``k**2`` bytes
  per cell for uint8, a quarter of an int32 scatter map.

The *numeric phase* (every call) runs one numba kernel that computes each
cell matrix on the fly and adds it to the CSR data with one store per entry.

Parallel scatter without atomics: the rows are split into one contiguous
range per thread; each thread walks the cells (in cell order) that touch its
range and adds only the rows it owns.  Every matrix entry is therefore the
sum of its cell contributions in cell order, whatever the number of threads:
results are bitwise identical for any thread count.  A cell whose dofs
straddle two ranges is computed by both threads (with a locality-preserving
numbering this is a thin layer of cells).

Kernels: a closed-form P1 path, and one generic path for every degree and
dimension, driven by tabulated reference data ``R[q, t, a, b]``: the local
matrix is ``sum_{q,t} g_t(cell, q) R[q, t, a, b]`` where ``g`` holds the
geometric/coefficient factors (``|det J| kappa_q (J^-1 K J^-T)_{rs}`` for the
stiffness, pairs ``r <= s``; ``|det J| c_q`` for the mass).  With constant
per-cell coefficients ``R`` is integrated exactly once (one "point").
"""

from __future__ import annotations

import math
from functools import lru_cache

import numba as nb
import numpy as np
import scipy.sparse as sp

from .coefficients import scalar_values, tensor_values
from .compilation import by_size
from .regions import RegionCoefficient, region_coefficient
from .dofs import Discretization
from .elements import REFERENCE_FACETS, lagrange_element
from .errors import InputError, MeshError, ResourceError
from .geometry import invert, jacobian, physical_points
from .quadrature import simplex_quadrature
from .topology import incidence, index_dtype

__all__ = ["Assembler", "estimate_memory"]


# ----------------------------------------------------------------------------
# symbolic phase kernels
# ----------------------------------------------------------------------------
@nb.njit(cache=True)
def _cell_order(dofs, n_dofs):
    """Cells sorted stably by smallest dof (counting sort)."""
    m, k = dofs.shape
    counts = np.zeros(n_dofs + 1, dtype=np.int64)
    low = np.empty(m, dtype=np.int64)
    for c in range(m):
        lo = dofs[c, 0]
        for a in range(1, k):
            if dofs[c, a] < lo:
                lo = dofs[c, a]
        low[c] = lo
        counts[lo + 1] += 1
    for i in range(n_dofs):
        counts[i + 1] += counts[i]
    order = np.empty(m, dtype=dofs.dtype)
    for c in range(m):
        order[counts[low[c]]] = c
        counts[low[c]] += 1
    return order


@nb.njit(cache=True, parallel=True)
def _pattern_count(dofs, offsets, items, n_blocks, row_nnz):
    n = offsets.shape[0] - 1
    k = dofs.shape[1]
    per = (n + n_blocks - 1) // n_blocks
    for blk in nb.prange(n_blocks):
        marker = np.full(n, -1, dtype=np.int64)
        for i in range(blk * per, min(n, (blk + 1) * per)):
            cnt = 0
            for j in range(offsets[i], offsets[i + 1]):
                c = items[j]
                for b in range(k):
                    col = dofs[c, b]
                    if marker[col] != i:
                        marker[col] = i
                        cnt += 1
            row_nnz[i] = cnt


@nb.njit(cache=True)
def _sort_range(a, lo, hi):
    """Sort ``a[lo:hi]`` in place: insertion sort for short rows, heapsort else.

    Hand-written rather than ``np.sort``: numba's quicksort adds about 4 s of
    compilation to the first run, for rows that are nearly always short.  One
    function (no sift helper called with a literal 0, which numba would compile
    as a second specialisation)."""
    n = hi - lo
    if n <= 64:
        for s in range(lo + 1, hi):
            v = a[s]
            t = s - 1
            while t >= lo and a[t] > v:
                a[t + 1] = a[t]
                t -= 1
            a[t + 1] = v
        return
    start = n // 2
    end = n
    while end > 1:
        if start > 0:  # build the heap
            start -= 1
            root = start
        else:  # move the largest to the end, restore the heap in front of it
            end -= 1
            v = a[lo]
            a[lo] = a[lo + end]
            a[lo + end] = v
            root = 0
        v = a[lo + root]
        while True:
            child = 2 * root + 1
            if child >= end:
                break
            if child + 1 < end and a[lo + child + 1] > a[lo + child]:
                child += 1
            if a[lo + child] <= v:
                break
            a[lo + root] = a[lo + child]
            root = child
        a[lo + root] = v


@nb.njit(cache=True, parallel=True)
def _pattern_fill(dofs, offsets, items, n_blocks, indptr, indices):
    n = offsets.shape[0] - 1
    k = dofs.shape[1]
    per = (n + n_blocks - 1) // n_blocks
    for blk in nb.prange(n_blocks):
        marker = np.full(n, -1, dtype=np.int64)
        for i in range(blk * per, min(n, (blk + 1) * per)):
            pos = indptr[i]
            for j in range(offsets[i], offsets[i + 1]):
                c = items[j]
                for b in range(k):
                    col = dofs[c, b]
                    if marker[col] != i:
                        marker[col] = i
                        indices[pos] = col
                        pos += 1
            _sort_range(indices, indptr[i], indptr[i + 1])


@nb.njit(cache=True, inline="always")
def _find(indices, lo, hi, col):
    while lo < hi:
        mid = (lo + hi) >> 1
        if indices[mid] < col:
            lo = mid + 1
        else:
            hi = mid
    return lo


@nb.njit(cache=True, parallel=True)
def _position_map(dofs, order, indptr, indices, posmap):
    m, k = dofs.shape
    for p in nb.prange(m):
        c = order[p]
        for a in range(k):
            row = dofs[c, a]
            lo = indptr[row]
            hi = indptr[row + 1]
            for b in range(k):
                posmap[p, a, b] = _find(indices, lo, hi, dofs[c, b]) - lo


@nb.njit(cache=True)
def _chunk_cells(dofs, order, chunk_rows):
    """Per row range, the window of ordered cells that can touch it."""
    m, k = dofs.shape
    nch = chunk_rows.shape[0] - 1
    out = np.empty((nch, 2), dtype=np.int64)
    for t in range(nch):
        out[t, 0] = m
        out[t, 1] = 0
    running_max = -1
    for p in range(m):
        c = order[p]
        lo = dofs[c, 0]
        hi = dofs[c, 0]
        for a in range(1, k):
            v = dofs[c, a]
            if v < lo:
                lo = v
            if v > hi:
                hi = v
        if hi > running_max:
            running_max = hi
        for t in range(nch):
            # cells are sorted by lo; a window starts at the first cell whose
            # running max reaches the range and ends after the last cell whose
            # lo is inside it
            if running_max >= chunk_rows[t] and out[t, 0] == m:
                out[t, 0] = p
            if lo < chunk_rows[t + 1]:
                out[t, 1] = p + 1
    for t in range(nch):
        if out[t, 0] > out[t, 1]:
            out[t, 0] = out[t, 1]
    return out


# ----------------------------------------------------------------------------
# numeric phase kernels
# ----------------------------------------------------------------------------
@nb.njit(cache=True, inline="always")
def _scatter(Kloc, k, dofs, c, p, lo, hi, indptr, posmap, data):
    for a in range(k):
        row = dofs[c, a]
        if row < lo or row >= hi:
            continue
        base = indptr[row]
        for b in range(a):
            data[base + posmap[p, a, b]] += Kloc[b, a]
        for b in range(a, k):
            data[base + posmap[p, a, b]] += Kloc[a, b]


@nb.njit(cache=True, inline="always")
def _p1_cofactors_2d(points, cells, c, G):
    """Rows of ``G`` = det(J) * grad(lambda_a) for a P1 triangle; returns det(J)."""
    v0 = cells[c, 0]
    x0 = points[v0, 0]
    y0 = points[v0, 1]
    a = points[cells[c, 1], 0] - x0
    e = points[cells[c, 1], 1] - y0
    b = points[cells[c, 2], 0] - x0
    f = points[cells[c, 2], 1] - y0
    G[1, 0] = f
    G[1, 1] = -b
    G[2, 0] = -e
    G[2, 1] = a
    G[0, 0] = -(f - e)
    G[0, 1] = -(a - b)
    return a * f - b * e


@nb.njit(cache=True, inline="always")
def _p1_cofactors_3d(points, cells, c, G):
    """Rows of ``G`` = det(J) * grad(lambda_a) for a P1 tetrahedron; returns det(J)."""
    v0 = cells[c, 0]
    x0 = points[v0, 0]
    y0 = points[v0, 1]
    z0 = points[v0, 2]
    v1 = cells[c, 1]
    v2 = cells[c, 2]
    v3 = cells[c, 3]
    a = points[v1, 0] - x0
    e = points[v1, 1] - y0
    h = points[v1, 2] - z0
    b = points[v2, 0] - x0
    f = points[v2, 1] - y0
    i = points[v2, 2] - z0
    cc = points[v3, 0] - x0
    g = points[v3, 1] - y0
    k = points[v3, 2] - z0
    # J = [[a, b, cc], [e, f, g], [h, i, k]]; grad lambda_j = row j-1 of J^-1
    G[1, 0] = f * k - g * i
    G[1, 1] = cc * i - b * k
    G[1, 2] = b * g - cc * f
    G[2, 0] = g * h - e * k
    G[2, 1] = a * k - cc * h
    G[2, 2] = cc * e - a * g
    G[3, 0] = e * i - f * h
    G[3, 1] = b * h - a * i
    G[3, 2] = a * f - b * e
    for r in range(3):
        G[0, r] = -(G[1, r] + G[2, r] + G[3, r])
    return a * G[1, 0] + b * G[2, 0] + cc * G[3, 0]


@nb.njit(cache=True)
def _p1_cofactors(points, cells, c, G):
    """Rows of ``G`` = det(J) * grad(lambda_a) for a P1 cell; returns det(J)."""
    if points.shape[1] == 2:
        return _p1_cofactors_2d(points, cells, c, G)
    return _p1_cofactors_3d(points, cells, c, G)


@nb.njit(cache=True, inline="always")
def _zero_rows(data, indptr, lo, hi):
    for i in range(indptr[lo], indptr[hi]):
        data[i] = 0.0


@nb.njit(cache=True, inline="always")
def _p1_range(points, cells, order, posmap, indptr, lo, hi, p0, p1, kappa, tensor,
              data, d):
    """One row range of the P1 stiffness matrix.

    ``d`` is a literal at each call site, so the small loops below have
    constant trip counts and unroll (2.3x faster than a run-time dimension,
    measured on 6M tetrahedra)."""
    k = d + 1
    fact = 2.0 if d == 2 else 6.0
    G = np.empty((4, 3))
    KG = np.empty((4, 3))
    Kloc = np.empty((4, 4))
    _zero_rows(data, indptr, lo, hi)
    for p in range(p0, p1):
        c = order[p]
        if d == 2:
            det = _p1_cofactors_2d(points, cells, c, G)
        else:
            det = _p1_cofactors_3d(points, cells, c, G)
        scale = kappa[c if kappa.shape[0] > 1 else 0, 0] / (fact * abs(det))
        if tensor.shape[0] > 0:
            ti = c if tensor.shape[0] > 1 else 0
            for a in range(k):
                for r in range(d):
                    s = 0.0
                    for q in range(d):
                        s += tensor[ti, r, q] * G[a, q]
                    KG[a, r] = s
            for a in range(k):
                for b in range(a, k):
                    s = 0.0
                    for r in range(d):
                        s += G[a, r] * KG[b, r]
                    Kloc[a, b] = scale * s
        else:
            for a in range(k):
                for b in range(a, k):
                    s = 0.0
                    for r in range(d):
                        s += G[a, r] * G[b, r]
                    Kloc[a, b] = scale * s
        _scatter(Kloc, k, cells, c, p, lo, hi, indptr, posmap, data)


@nb.njit(cache=True, parallel=True)
def _p1_stiffness_2d(points, cells, order, posmap, indptr, chunk_rows, chunk_cells,
                     kappa, tensor, data):
    """Closed-form P1 stiffness on triangles (any FEM text, e.g. Hughes 2000, ch. 3):
    K_ab = kappa |T| grad(lambda_a) . K grad(lambda_b)
         = kappa (C_a . K C_b) / (d! |det J|), C = cofactor rows.

    One kernel per dimension: a run compiles only its own (a kernel holding
    both took 16 s to compile against about 4 s for one)."""
    nch = chunk_rows.shape[0] - 1
    for t in nb.prange(nch):
        _p1_range(points, cells, order, posmap, indptr, chunk_rows[t], chunk_rows[t + 1],
                  chunk_cells[t, 0], chunk_cells[t, 1], kappa, tensor, data, 2)


@nb.njit(cache=True, parallel=True)
def _p1_stiffness_3d(points, cells, order, posmap, indptr, chunk_rows, chunk_cells,
                     kappa, tensor, data):
    """Closed-form P1 stiffness on tetrahedra (as :func:`_p1_stiffness_2d`)."""
    nch = chunk_rows.shape[0] - 1
    for t in nb.prange(nch):
        _p1_range(points, cells, order, posmap, indptr, chunk_rows[t], chunk_rows[t + 1],
                  chunk_cells[t, 0], chunk_cells[t, 1], kappa, tensor, data, 3)


@nb.njit(cache=True)
def _p1_stiffness(points, cells, order, posmap, indptr, chunk_rows, chunk_cells,
                  kappa, tensor, data):
    """Closed-form P1 stiffness, either dimension (for compiled callers)."""
    if points.shape[1] == 3:
        _p1_stiffness_3d(points, cells, order, posmap, indptr, chunk_rows, chunk_cells,
                         kappa, tensor, data)
    else:
        _p1_stiffness_2d(points, cells, order, posmap, indptr, chunk_rows, chunk_cells,
                         kappa, tensor, data)


def p1_stiffness_kernel(dim):
    """The compiled P1 stiffness kernel of dimension ``dim`` (2 or 3)."""
    return _p1_stiffness_3d if dim == 3 else _p1_stiffness_2d


@nb.njit(cache=True, parallel=True)
def _generic_matrix(points, vcells, dofs, order, posmap, indptr, chunk_rows,
                    chunk_cells, op, R, coef, tensor, data):
    """Generic cell matrices: sum_{q,t} g_t(c, q) R[q, t] (op 0 stiffness, 1 mass)."""
    d = points.shape[1]
    nq, nt, k, _ = R.shape
    nch = chunk_rows.shape[0] - 1
    for t in nb.prange(nch):
        J = np.empty((d, d))
        Jinv = np.empty((d, d))
        C = np.empty((d, d))
        g = np.empty(nt)
        Kloc = np.empty((k, k))
        lo = chunk_rows[t]
        hi = chunk_rows[t + 1]
        _zero_rows(data, indptr, lo, hi)
        for p in range(chunk_cells[t, 0], chunk_cells[t, 1]):
            c = order[p]
            jacobian(points, vcells, c, J)
            det = abs(invert(J, Jinv))
            if op == 0:
                # C = |det J| J^-1 K J^-T
                ti = c if tensor.shape[0] > 1 else 0
                for r in range(d):
                    for s in range(d):
                        acc = 0.0
                        for i in range(d):
                            if tensor.shape[0] > 0:
                                for j in range(d):
                                    acc += Jinv[r, i] * tensor[ti, i, j] * Jinv[s, j]
                            else:
                                acc += Jinv[r, i] * Jinv[s, i]
                        C[r, s] = det * acc
                tt = 0
                for r in range(d):
                    for s in range(r, d):
                        g[tt] = C[r, s]
                        tt += 1
            else:
                g[0] = det
            for a in range(k):
                for b in range(a, k):
                    Kloc[a, b] = 0.0
            ci = c if coef.shape[0] > 1 else 0
            for q in range(nq):
                w = coef[ci, q]
                for tt in range(nt):
                    f = w * g[tt]
                    for a in range(k):
                        for b in range(a, k):
                            Kloc[a, b] += f * R[q, tt, a, b]
            _scatter(Kloc, k, dofs, c, p, lo, hi, indptr, posmap, data)


@nb.njit(cache=True, parallel=True)
def _generic_vector(points, vcells, dofs, order, chunk_rows, chunk_cells, mode, R,
                    coef, fvals, out):
    """Load vectors. mode 0: |det J| sum_q coef[c, q] R[q, a]; mode 1: |det J| (R @ f_local)."""
    d = points.shape[1]
    k = dofs.shape[1]
    nch = chunk_rows.shape[0] - 1
    for t in nb.prange(nch):
        J = np.empty((d, d))
        Jinv = np.empty((d, d))
        bloc = np.empty(k)
        lo = chunk_rows[t]
        hi = chunk_rows[t + 1]
        for i in range(lo, hi):
            out[i] = 0.0
        for p in range(chunk_cells[t, 0], chunk_cells[t, 1]):
            c = order[p]
            jacobian(points, vcells, c, J)
            det = abs(invert(J, Jinv))
            if mode == 0:
                ci = c if coef.shape[0] > 1 else 0
                for a in range(k):
                    s = 0.0
                    for q in range(R.shape[0]):
                        s += coef[ci, q] * R[q, a]
                    bloc[a] = det * s
            else:
                for a in range(k):
                    s = 0.0
                    for b in range(k):
                        s += R[a, b] * fvals[dofs[c, b]]
                    bloc[a] = det * s
            for a in range(k):
                row = dofs[c, a]
                if row >= lo and row < hi:
                    out[row] += bloc[a]


@nb.njit(cache=True)
def _facet_measure(points, vcells, c, f, facet_local):
    d = points.shape[1]
    v0 = vcells[c, facet_local[f, 0]]
    v1 = vcells[c, facet_local[f, 1]]
    if d == 2:
        a = points[v1, 0] - points[v0, 0]
        b = points[v1, 1] - points[v0, 1]
        return np.sqrt(a * a + b * b)
    v2 = vcells[c, facet_local[f, 2]]
    a0 = points[v1, 0] - points[v0, 0]
    a1 = points[v1, 1] - points[v0, 1]
    a2 = points[v1, 2] - points[v0, 2]
    b0 = points[v2, 0] - points[v0, 0]
    b1 = points[v2, 1] - points[v0, 1]
    b2 = points[v2, 2] - points[v0, 2]
    x = a1 * b2 - a2 * b1
    y = a2 * b0 - a0 * b2
    z = a0 * b1 - a1 * b0
    return 0.5 * np.sqrt(x * x + y * y + z * z)


@nb.njit(cache=True)
def _boundary_matrix(points, vcells, dofs, fcells, flocal, facet_local, ref_measure,
                     R, coef, indptr, indices, data):
    """Facet matrices sum_q |F|/|F_ref| coef[f, q] R[local facet, q] (serial)."""
    nf = fcells.shape[0]
    k = dofs.shape[1]
    nq = R.shape[1]
    for i in range(nf):
        c = fcells[i]
        f = flocal[i]
        s = _facet_measure(points, vcells, c, f, facet_local) / ref_measure
        ci = i if coef.shape[0] > 1 else 0
        for a in range(k):
            row = dofs[c, a]
            lo = indptr[row]
            hi = indptr[row + 1]
            for b in range(k):
                v = 0.0
                for q in range(nq):
                    v += coef[ci, q] * R[f, q, a, b]
                if v != 0.0:
                    data[_find(indices, lo, hi, dofs[c, b])] += s * v


@nb.njit(cache=True)
def _boundary_vector(points, vcells, dofs, fcells, flocal, facet_local, ref_measure,
                     R, coef, out):
    nf = fcells.shape[0]
    k = dofs.shape[1]
    nq = R.shape[1]
    for i in range(nf):
        c = fcells[i]
        f = flocal[i]
        s = _facet_measure(points, vcells, c, f, facet_local) / ref_measure
        ci = i if coef.shape[0] > 1 else 0
        for a in range(k):
            v = 0.0
            for q in range(nq):
                v += coef[ci, q] * R[f, q, a]
            out[dofs[c, a]] += s * v


# ----------------------------------------------------------------------------
# memory estimate of the symbolic phase
# ----------------------------------------------------------------------------
def estimate_memory(disc: Discretization) -> dict:
    """Upper estimate of the bytes an :class:`Assembler` and one matrix need.

    Computed before anything is allocated, from counts only: the number of
    stored entries is bounded by ``min(n_cells * k**2, n_dofs**2)`` (every
    cell adds at most ``k**2`` entries, ``k`` local dofs); the position-map
    entry size follows from the largest number of cells at one dof.

    Returns
    -------
    dict
        ``nnz_bound`` and the bytes of ``incidence`` (temporary dof -> cells
        lists), ``pattern`` (indptr + indices), ``cell_order``,
        ``position_map``, ``matrix`` (one float64 data array) and ``total``.
    """
    dofs = disc.cell_dofs
    m, k = dofs.shape
    n = disc.n_dofs
    nnz = min(m * k * k, n * n)
    isz = np.dtype(index_dtype(max(nnz, n))).itemsize
    valence = int(np.bincount(np.asarray(dofs).ravel(), minlength=n).max()) if m else 0
    longest = min(n, valence * k)
    psz = 1 if longest <= 256 else (2 if longest <= 65536 else 4)
    est = {
        "nnz_bound": int(nnz),
        "incidence": 8 * (n + 1) + m * k * np.dtype(index_dtype(m)).itemsize + 8 * n,
        "pattern": isz * (n + 1 + nnz),
        "cell_order": m * dofs.dtype.itemsize,
        "position_map": m * k * k * psz,
        "matrix": 8 * nnz,
    }
    est["total"] = int(sum(v for key, v in est.items() if key != "nnz_bound"))
    return est


#: products of up to 2 * dim lengths appear in the element computations (Jacobian
#: cofactors squared over the volume, J^T J): volume**2 and extent**(2 dim) must
#: stay inside double precision, with a margin of 1e8 from its limits
GEOMETRY_LIMITS = (1e-300, 1e300)


def check_geometry_scale(mesh):
    """Refuse coordinates whose scale would under- or overflow in the element computations.

    Raises
    ------
    MeshError
        When the squared volume of the smallest cell falls below 1e-300, or
        the extent of the mesh to the power ``2 dim`` exceeds 1e300 (for
        example coordinates near 1e-160 or 1e150 in 2D).
    """
    d = mesh.dim
    lo, hi = GEOMETRY_LIMITS
    vmin = float(mesh.cell_volumes.min())
    if not vmin * vmin >= lo:
        c = int(np.argmin(mesh.cell_volumes))
        raise MeshError(
            f"mesh: cell {c} has volume {vmin:.3e}: lengths this small underflow double "
            f"precision in the element computations (squared volume below {lo:g}); "
            "rescale the coordinates (another length unit)")
    extent = float((mesh.points.max(axis=0) - mesh.points.min(axis=0)).max())
    if not (math.isfinite(extent) and 2 * d * math.log10(extent) <= math.log10(hi)):
        raise MeshError(
            f"mesh: extent {extent:.3e} (largest coordinate {np.abs(mesh.points).max():.3e}) "
            f"overflows double precision in the element computations (extent**{2 * d} above "
            f"{hi:g}); rescale the coordinates (another length unit)")


def _check_quadrature_degree(value, where):
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 0:
        raise InputError(
            f"{where}: quadrature_degree must be a non-negative integer (or None for the "
            f"default), got {value!r}"
        )
    return int(value)


# ----------------------------------------------------------------------------
# symbolic phase, as plain functions (the Assembler and bindings.host.embed use them)
# ----------------------------------------------------------------------------
def symbolic_phase(dofs, n_dofs):
    """CSR pattern, cell order and position map of a validated cell -> dof table.

    Parameters
    ----------
    dofs : ndarray (m, k), int32/int64, entries in 0 .. n_dofs - 1 (validated)
    n_dofs : int

    Returns
    -------
    indptr, indices : ndarray, int32 where nnz < 2**31 (sorted columns)
    order : ndarray (m,), cells sorted stably by smallest dof
    posmap : ndarray (m, k, k), uint8/uint16/uint32 offsets within rows
    """
    offsets, items = incidence(dofs, n_dofs)
    n_blocks = max(1, min(n_dofs, 4 * nb.get_num_threads()))
    row_nnz = np.empty(n_dofs, dtype=np.int64)
    work = dofs.size * dofs.shape[1]  # entries of the position map
    by_size(_pattern_count, work)(dofs, offsets, items, n_blocks, row_nnz)
    nnz = int(row_nnz.sum())
    idt = index_dtype(max(nnz, n_dofs))
    indptr = np.zeros(n_dofs + 1, dtype=idt)
    np.cumsum(row_nnz, out=indptr[1:])
    indices = np.empty(nnz, dtype=idt)
    by_size(_pattern_fill, work)(dofs, offsets, items, n_blocks, indptr, indices)
    del offsets, items
    order = _cell_order(dofs, n_dofs)
    longest = int(row_nnz.max())
    pdt = np.uint8 if longest <= 256 else (np.uint16 if longest <= 65536 else np.uint32)
    posmap = np.empty((dofs.shape[0], dofs.shape[1], dofs.shape[1]), dtype=pdt)
    by_size(_position_map, work)(dofs, order, indptr, indices, posmap)
    return indptr, indices, order, posmap


def chunk_plan(dofs, order, indptr, n_chunks):
    """Row ranges with equal numbers of stored entries, and their cell windows.

    Returns
    -------
    rows : ndarray (n_chunks + 1,), int64
    windows : ndarray (n_chunks, 2), int64, ranges of positions in ``order``
    """
    n = indptr.shape[0] - 1
    targets = np.linspace(0, int(indptr[-1]), n_chunks + 1)
    rows = np.searchsorted(indptr, targets).astype(np.int64)
    rows[0], rows[-1] = 0, n
    rows = np.maximum.accumulate(rows)
    return rows, _chunk_cells(dofs, order, rows)


# ----------------------------------------------------------------------------
# reference tables (cached, read-only; shared with bindings.host.embed)
# ----------------------------------------------------------------------------
def _frozen(a):
    a = np.ascontiguousarray(a)
    a.flags.writeable = False
    return a


@lru_cache(maxsize=None)
def stiffness_table(dim, degree, rule_degree):
    """``R[q, t, a, b] = w_q d_r phi_a d_s phi_b (+ the (s, r) term)``, pairs r <= s."""
    el = lagrange_element(dim, degree)
    rule = simplex_quadrature(dim, rule_degree)
    G = el.tabulate_gradients(rule.points)  # (nq, k, d)
    pairs = [(r, s) for r in range(dim) for s in range(r, dim)]
    R = np.empty((rule.n_points, len(pairs), el.n_local, el.n_local))
    for t, (r, s) in enumerate(pairs):
        S = np.einsum("q,qa,qb->qab", rule.weights, G[:, :, r], G[:, :, s])
        R[:, t] = S if r == s else S + S.transpose(0, 2, 1)
    return _frozen(R)


@lru_cache(maxsize=None)
def mass_table(dim, degree, rule_degree):
    """``R[q, 0, a, b] = w_q phi_a phi_b``."""
    el = lagrange_element(dim, degree)
    rule = simplex_quadrature(dim, rule_degree)
    V = el.tabulate(rule.points)
    return _frozen(np.einsum("q,qa,qb->qab", rule.weights, V, V)[:, None])


@lru_cache(maxsize=None)
def mass_reference(dim, degree):
    """The exact reference mass matrix (k, k)."""
    rule = simplex_quadrature(dim, 2 * degree)
    V = lagrange_element(dim, degree).tabulate(rule.points)
    return _frozen(np.einsum("q,qa,qb->ab", rule.weights, V, V))


@lru_cache(maxsize=None)
def load_table(dim, degree, rule_degree):
    """``R[q, a] = w_q phi_a``."""
    rule = simplex_quadrature(dim, rule_degree)
    return _frozen(rule.weights[:, None] * lagrange_element(dim, degree).tabulate(rule.points))


# ----------------------------------------------------------------------------
# the Assembler
# ----------------------------------------------------------------------------
class Assembler:
    """Stiffness, mass, load and facet operators of one discretization.

    The sparsity pattern and scatter plan are computed once, on construction;
    every operator call is one parallel numba kernel writing into CSR data.

    Parameters
    ----------
    disc : Discretization
    quadrature_degree : int, optional
        Degree of the cell quadrature used for callable coefficients
        (default ``2k + 1``).  Constant and per-cell coefficients are
        integrated exactly (degree ``2k - 2`` stiffness, ``2k`` mass).

    Attributes
    ----------
    indptr, indices : ndarray (int32 where nnz < 2**31)
        The shared, read-only CSR pattern of every matrix returned.
    nnz : int

    Raises
    ------
    InputError
        ``disc`` is not a Discretization, or a bad ``quadrature_degree``.
    ResourceError
        The estimate of :func:`estimate_memory` (pattern, position map and
        one matrix) exceeds the memory available -- ``MemAvailable`` of
        ``/proc/meminfo``, or the environment variable
        ``GALERKIT_MEMORY_LIMIT_BYTES`` when set -- checked before the
        pattern is built.

    Examples
    --------
    >>> from galerkit import structured_triangles, Discretization
    >>> asm = Assembler(Discretization(structured_triangles(4, 4), 1))
    >>> K = asm.stiffness()
    >>> K.shape, bool(abs(K.sum(axis=1)).max() < 1e-12)
    ((25, 25), True)
    >>> round(float(asm.mass().sum()), 12)
    1.0
    """

    def __init__(self, disc: Discretization, quadrature_degree=None):
        if not isinstance(disc, Discretization):
            raise InputError(
                f"Assembler: expected a Discretization, got {type(disc).__name__}; "
                "build one with Discretization(mesh, degree)"
            )
        self.disc = disc
        self.mesh = disc.mesh
        k = disc.degree
        if quadrature_degree is None:
            quadrature_degree = 2 * k + 1
        if not isinstance(quadrature_degree, (int, np.integer)) or quadrature_degree < 0:
            raise InputError(
                f"Assembler: quadrature_degree must be a non-negative integer, got {quadrature_degree!r}"
            )
        self.quadrature_degree = int(quadrature_degree)
        check_geometry_scale(self.mesh)
        self._check_memory()
        self._build_pattern()
        self._chunks = {}

    # -- symbolic phase --------------------------------------------------------
    def _check_memory(self):
        from .solvers import memory_limit

        limit, source = memory_limit()
        if limit is None:
            return
        est = estimate_memory(self.disc)
        if est["total"] > limit:
            disc = self.disc
            raise ResourceError(
                f"Assembler: P{disc.degree} on {self.mesh.n_cells} cells ({disc.n_dofs} dofs) "
                f"needs an estimated {est['total'] / 2**20:.1f} MiB ({est['total']} bytes) for "
                f"the sparsity pattern, position map and one matrix (at most "
                f"{est['nnz_bound']} stored entries), above the limit of "
                f"{limit / 2**20:.1f} MiB ({int(limit)} bytes, {source}); use a coarser mesh or "
                "a lower degree, free memory, or raise GALERKIT_MEMORY_LIMIT_BYTES if the "
                "machine has more"
            )

    def _build_pattern(self):
        indptr, indices, order, posmap = symbolic_phase(self.disc.cell_dofs, self.disc.n_dofs)
        for a in (indptr, indices, order, posmap):
            a.flags.writeable = False
        self.indptr, self.indices, self.order, self.posmap = indptr, indices, order, posmap
        self.nnz = int(indices.shape[0])

    def _chunk_plan(self):
        nch = nb.get_num_threads()
        if nch not in self._chunks:
            self._chunks[nch] = chunk_plan(self.disc.cell_dofs, self.order, self.indptr, nch)
        return self._chunks[nch]

    @property
    def n_dofs(self) -> int:
        return self.disc.n_dofs

    def memory_bytes(self) -> dict:
        """Bytes held by the pattern and the scatter plan."""
        return {
            "indptr": self.indptr.nbytes,
            "indices": self.indices.nbytes,
            "cell_order": self.order.nbytes,
            "position_map": self.posmap.nbytes,
        }

    # -- helpers -----------------------------------------------------------------
    def _refuse_aliasing(self, target, method, inputs):
        """Refuse an ``out=`` array that shares memory with an input or with the
        assembler's own arrays: the kernels write it while they read those."""
        own = {"the mesh points": self.mesh.points, "the mesh cells": self.mesh.cells,
               "the dof table": self.disc.cell_dofs, "the sparsity pattern": self.indices,
               "the row pointers": self.indptr}
        for label, a in [*inputs.items(), *own.items()]:
            if isinstance(a, np.ndarray) and np.may_share_memory(target, a):
                raise InputError(
                    f"Assembler.{method}: out= shares memory with {label}; the result would "
                    f"be written while {label} is read (a wrong result). Pass a separate "
                    "array as out=, or a copy of the input")

    def _new_matrix(self, out, zero=False, method="stiffness", inputs=None):
        n = self.n_dofs
        if out is None:
            data = np.empty(self.nnz) if not zero else np.zeros(self.nnz)
        else:
            if not isinstance(out, (sp.csr_array, sp.csr_matrix)) or out.shape != (n, n):
                raise InputError(
                    "out= must be a CSR matrix returned earlier by this Assembler "
                    f"(shape ({n}, {n})), got {type(out).__name__} {getattr(out, 'shape', '')}"
                )
            if not (out.indices is self.indices or (
                    out.indices.shape == self.indices.shape and out.indptr.shape == self.indptr.shape
                    and np.array_equal(out.indptr, self.indptr)
                    and np.array_equal(out.indices, self.indices))):
                raise InputError(
                    "out=: the matrix does not have this Assembler's sparsity pattern "
                    "(was it modified, e.g. by eliminate_zeros, or built by another Assembler?)"
                )
            if out.data.dtype != np.float64 or not out.data.flags.c_contiguous \
                    or not out.data.flags.writeable or out.data.shape != (self.nnz,):
                what = ("read-only" if not out.data.flags.writeable else
                        "not contiguous" if not out.data.flags.c_contiguous else "")
                raise InputError(
                    f"out=: the matrix data must be a writeable contiguous float64 array of "
                    f"shape ({self.nnz},), got {out.data.dtype} of shape {out.data.shape}"
                    + (f" ({what})" if what else ""))
            data = out.data
            self._refuse_aliasing(data, method, inputs or {})
            if zero:
                data[:] = 0.0
        return data, out

    def _wrap(self, data, out):
        if out is not None:
            return out
        n = self.n_dofs
        A = sp.csr_array((data, self.indices, self.indptr), shape=(n, n), copy=False)
        A.has_sorted_indices = True
        A.has_canonical_format = True
        return A

    def _new_vector(self, out, zero=False, method="load", inputs=None):
        n = self.n_dofs
        if out is None:
            return np.zeros(n) if zero else np.empty(n)
        if not isinstance(out, np.ndarray) or out.shape != (n,) or out.dtype != np.float64 \
                or not out.flags.c_contiguous or not out.flags.writeable:
            raise InputError(f"out= must be a writeable contiguous float64 array of shape ({n},)")
        self._refuse_aliasing(out, method, inputs or {})
        if zero:
            out[:] = 0.0
        return out

    def _rule(self, degree):
        return simplex_quadrature(self.mesh.dim, _check_quadrature_degree(degree, "Assembler"))

    def _cell_coefficient(self, value, name, positive, degree):
        """(values, rule) for a scalar coefficient: rule None when constant."""
        m = self.mesh.n_cells
        if callable(value) or (isinstance(value, RegionCoefficient) and value.has_callable):
            rule = self._rule(degree)
            vals = scalar_values(
                value, m, name, positive=positive,
                points=lambda: physical_points(self.mesh.points, self.mesh.cells, rule.points),
                point_shape=(m, rule.n_points))
            return vals, rule
        return scalar_values(value, m, name, positive=positive), None

    # -- operators -----------------------------------------------------------------
    def stiffness(self, conductivity=1.0, *, out=None, quadrature_degree=None):
        """Stiffness matrix of ``integral(kappa grad u . grad v)``.

        Parameters
        ----------
        conductivity : float, ndarray (n_cells,), callable, ndarray (d, d) or (n_cells, d, d)
            Positive scalar, per-cell values, a callable ``kappa(x)`` with ``x``
            of shape (dim, n) (integrated with degree ``quadrature_degree``), or
            a symmetric positive definite tensor, constant or per cell.
        out : csr_array, optional
            A matrix returned earlier by this Assembler: re-assembled in place.
        quadrature_degree : int, optional
            Overrides the Assembler's degree for a callable conductivity.

        Returns
        -------
        scipy.sparse.csr_array, shape (n_dofs, n_dofs), float64

        Raises
        ------
        InputError
            Non-finite or non-positive conductivity (first cell named), a tensor
            that is not SPD, wrong shapes.
        """
        disc, mesh = self.disc, self.mesh
        d, k = mesh.dim, disc.degree
        conductivity = region_coefficient(mesh, conductivity, "conductivity")
        tensor = tensor_values(conductivity, mesh.n_cells, d, "conductivity")
        if tensor is not None:
            kappa = np.ones((1, 1))
            rule = None
        else:
            deg = self.quadrature_degree if quadrature_degree is None else \
                _check_quadrature_degree(quadrature_degree, "stiffness")
            kappa, rule = self._cell_coefficient(conductivity, "conductivity", True, deg)
            tensor = np.zeros((0, d, d))
        data, out = self._new_matrix(out, method="stiffness",
                                     inputs={"conductivity": conductivity})
        rows, cells = self._chunk_plan()
        if k == 1:
            if rule is not None:  # gradients are constant: average kappa per cell
                kappa = np.ascontiguousarray(
                    (kappa @ rule.weights)[:, None] / rule.weights.sum())
            by_size(p1_stiffness_kernel(d), self.posmap.size)(
                mesh.points, mesh.cells, self.order, self.posmap, self.indptr, rows, cells,
                kappa, tensor, data)
        else:
            if rule is None:
                R = stiffness_table(d, k, max(2 * k - 2, 0)).sum(axis=0, keepdims=True)
            else:
                R = stiffness_table(d, k, rule.degree)
            by_size(_generic_matrix, self.posmap.size)(
                mesh.points, mesh.cells, disc.cell_dofs, self.order, self.posmap, self.indptr,
                rows, cells, 0, R, kappa, tensor, data)
        return self._wrap(data, out)

    def mass(self, coefficient=1.0, *, out=None, quadrature_degree=None):
        """Mass matrix of ``integral(c u v)``.

        Parameters
        ----------
        coefficient : float, ndarray (n_cells,) or callable
            Any finite values (a reaction or capacity coefficient).
        out : csr_array, optional
            Re-assemble in place into a matrix returned earlier.
        quadrature_degree : int, optional
            For a callable coefficient (default the Assembler's).

        Returns
        -------
        scipy.sparse.csr_array, shape (n_dofs, n_dofs), float64
        """
        disc, mesh = self.disc, self.mesh
        k = disc.degree
        coefficient = region_coefficient(mesh, coefficient, "mass coefficient",
                                         allow_tensor=False)
        deg = self.quadrature_degree if quadrature_degree is None else \
            _check_quadrature_degree(quadrature_degree, "mass")
        coef, rule = self._cell_coefficient(coefficient, "mass coefficient", False, deg)
        if rule is None:
            R = np.ascontiguousarray(mass_table(mesh.dim, k, 2 * k).sum(axis=0, keepdims=True))
        else:
            R = mass_table(mesh.dim, k, rule.degree)
        data, out = self._new_matrix(out, method="mass", inputs={"the coefficient": coefficient})
        rows, cells = self._chunk_plan()
        by_size(_generic_matrix, self.posmap.size)(
            mesh.points, mesh.cells, disc.cell_dofs, self.order, self.posmap, self.indptr, rows,
            cells, 1, R, coef, np.zeros((0, mesh.dim, mesh.dim)), data)
        return self._wrap(data, out)

    def load(self, source, *, out=None, quadrature_degree=None):
        """Load vector of ``integral(f v)``.

        Parameters
        ----------
        source : float, callable, or ndarray (n_dofs,)
            A constant, a callable ``f(x)`` (quadrature of degree
            ``quadrature_degree``), or a dof vector: the load of its finite
            element interpolant (exactly ``M @ f``).
        out : ndarray (n_dofs,), optional

        Returns
        -------
        ndarray, shape (n_dofs,), float64
        """
        disc, mesh = self.disc, self.mesh
        k = disc.degree
        source = region_coefficient(mesh, source, "source", allow_tensor=False)
        b = self._new_vector(out, method="load", inputs={"source": source})
        rows, cells = self._chunk_plan()
        arr = None
        if not callable(source) and not isinstance(source, RegionCoefficient):
            try:
                arr = np.asarray(source)
            except Exception:  # ragged lists and the like
                arr = np.empty((0, 0), dtype=object)
        if arr is not None and arr.ndim == 1 and arr.shape == (disc.n_dofs,):
            if arr.dtype.kind not in "iuf":
                raise InputError(
                    f"source: dof vector of dtype {arr.dtype}; it must hold real numbers "
                    "(float64)")
            f = np.ascontiguousarray(arr, dtype=np.float64)
            bad = ~np.isfinite(f)
            if bad.any():
                i = int(np.flatnonzero(bad)[0])
                raise InputError(f"source: dof vector has a non-finite value {f[i]} at dof {i}")
            Mref = mass_reference(mesh.dim, k)
            by_size(_generic_vector, self.posmap.size)(
                mesh.points, mesh.cells, disc.cell_dofs, self.order, rows, cells, 1, Mref,
                np.zeros((1, 1)), f, b)
            return b
        if arr is not None and arr.ndim >= 1:
            # per-cell source values are refused: with n_cells == n_dofs they could not
            # be told from a dof vector, and a silent misreading is a wrong answer
            raise InputError(
                f"source: array of shape {arr.shape}; expected a dof vector of shape "
                f"({disc.n_dofs},), a number or a callable (for piecewise-constant sources "
                "use a callable of x)"
            )
        deg = self.quadrature_degree if quadrature_degree is None else \
            _check_quadrature_degree(quadrature_degree, "load")
        coef, rule = self._cell_coefficient(source, "source", False, deg)
        if rule is None:
            R = np.ascontiguousarray(load_table(mesh.dim, k, k).sum(axis=0, keepdims=True))
        else:
            R = load_table(mesh.dim, k, rule.degree)
        by_size(_generic_vector, self.posmap.size)(
            mesh.points, mesh.cells, disc.cell_dofs, self.order, rows, cells, 0, R, coef,
            np.zeros(1), b)
        return b

    # -- facet terms ----------------------------------------------------------------
    def _facet_setup(self, tag, value, name, degree, nonnegative=False):
        mesh, disc = self.mesh, self.disc
        d = mesh.dim
        ids = mesh.tagged_facets(tag)
        fcells = np.ascontiguousarray(mesh.boundary_facet_cells[ids])
        flocal = np.ascontiguousarray(mesh.boundary_facet_local[ids])
        frule = simplex_quadrature(d - 1, _check_quadrature_degree(degree, f"{name} on {tag!r}"))
        facet_local = np.array(REFERENCE_FACETS[d], dtype=np.int64)
        # reference cell coordinates of the facet points, for each local facet
        verts = np.vstack([np.zeros(d), np.eye(d)])
        Xf = []
        for f in range(d + 1):
            v = verts[facet_local[f]]
            Xf.append(v[0] + frule.points @ (v[1:] - v[0]))
        Xf = np.array(Xf)  # (d+1, nq, d)
        ref_measure = 1.0 if d == 2 else 0.5

        def pts():
            # physical points of every tagged facet's quadrature points
            cells = mesh.cells[fcells]
            x0 = mesh.points[cells[:, 0]]
            J = np.stack([mesh.points[cells[:, j + 1]] - x0 for j in range(d)], axis=2)
            X = np.einsum("fij,fqj->fqi", J, Xf[flocal]) + x0[:, None, :]
            return np.ascontiguousarray(X.reshape(-1, d).T)

        coef = scalar_values(value, len(ids), f"{name} on {tag!r}", points=pts,
                             point_shape=(len(ids), frule.n_points), unit="facet",
                             nonnegative=nonnegative)
        if coef.shape[1] == 1 and frule.n_points > 1:
            coef = np.ascontiguousarray(np.repeat(coef, frule.n_points, axis=1))
        V = np.array([disc.element.tabulate(Xf[f]) for f in range(d + 1)])  # (d+1, nq, k)
        return fcells, flocal, facet_local, ref_measure, frule, V, coef

    def boundary_mass(self, tag, coefficient=1.0, *, out=None, quadrature_degree=None,
                      nonnegative=False):
        """Facet mass matrix ``integral over tag of (alpha u v)`` (Robin term).

        Parameters
        ----------
        tag : str
            Facet tag of the mesh.
        coefficient : float, ndarray (n_tagged_facets,) or callable
        out : csr_array, optional
        nonnegative : bool
            Refuse negative coefficient values (a Robin heat transfer
            coefficient), naming the first offending facet.

        Returns
        -------
        scipy.sparse.csr_array on the full pattern, shape (n_dofs, n_dofs)
        """
        k = self.disc.degree
        deg = (2 * k + 1 if callable(coefficient) else 2 * k) if quadrature_degree is None \
            else quadrature_degree
        fcells, flocal, facet_local, refm, frule, V, coef = self._facet_setup(
            tag, coefficient, "boundary coefficient", deg, nonnegative=nonnegative)
        R = np.einsum("q,fqa,fqb->fqab", frule.weights, V, V)
        R = np.ascontiguousarray(0.5 * (R + R.transpose(0, 1, 3, 2)))  # exactly symmetric
        data, out = self._new_matrix(out, zero=True, method="boundary_mass",
                                     inputs={"the coefficient": coefficient})
        _boundary_matrix(self.mesh.points, self.mesh.cells, self.disc.cell_dofs, fcells, flocal,
                         facet_local, refm, R, coef, self.indptr, self.indices, data)
        return self._wrap(data, out)

    def boundary_load(self, tag, flux=1.0, *, out=None, quadrature_degree=None):
        """Facet load vector ``integral over tag of (g v)`` (Neumann/Robin data).

        Parameters
        ----------
        tag : str
        flux : float, ndarray (n_tagged_facets,) or callable
            The prescribed flux ``g`` into the domain, entering the weak form
            as ``+ integral(g v)``.
        out : ndarray (n_dofs,), optional

        Returns
        -------
        ndarray, shape (n_dofs,)
        """
        k = self.disc.degree
        deg = (2 * k + 1 if callable(flux) else k) if quadrature_degree is None \
            else quadrature_degree
        fcells, flocal, facet_local, refm, frule, V, coef = self._facet_setup(
            tag, flux, "boundary flux", deg)
        R = np.ascontiguousarray(frule.weights[None, :, None] * V)
        b = self._new_vector(out, zero=True, method="boundary_load", inputs={"flux": flux})
        _boundary_vector(self.mesh.points, self.mesh.cells, self.disc.cell_dofs, fcells, flocal,
                         facet_local, refm, R, coef, b)
        return b
