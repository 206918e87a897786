"""Thread-parallel sparse kernels: CSR mat-vec, fused CG updates, SpGEMM, transpose.

These are the building blocks of the native multigrid (:mod:`galerkit.multigrid`)
and its CG loop.  Every kernel is a numba function on validated arrays (the
callers check shapes and dtypes), parallel over rows with ``prange``, and
**deterministic**: the result is bitwise the same for any number of threads.

* Row-wise kernels (mat-vec, residual, SpGEMM) compute each output row in a
  fixed order of its own; the rows are independent, so the thread split does
  not matter.
* Reductions (dot products) sum fixed blocks of ``BLOCK`` entries in parallel
  and then add the block sums in block order on one thread: the summation
  order depends on the vector length only.
* The transpose places the entries of each output row in ascending order of
  the input row, whatever the split.

Index conventions (what the callers pass): ``indptr`` int64, ``indices``
int32, values float64, every row's column indices in range.  The transpose
returns sorted rows; SpGEMM returns each row in a fixed order of its own.

Functions whose name ends in ``_into`` write into an output array given by
the caller; no kernel allocates per row.
"""

from __future__ import annotations

import numba as nb
import numpy as np

from .compilation import by_size

__all__ = [
    "BLOCK",
    "dot",
    "matvec_into",
    "residual_into",
    "matvec_add_into",
    "cg_update",
    "xpby_into",
    "transpose",
    "spgemm",
]

#: Entries per block of the fixed-order reductions.
BLOCK = 4096


@nb.njit(cache=True, parallel=True)
def dot(x, y):
    """``x . y`` summed in fixed blocks (bitwise the same for any thread count)."""
    n = x.shape[0]
    nb_ = (n + BLOCK - 1) // BLOCK
    part = np.empty(nb_)
    for b in nb.prange(nb_):
        lo = b * BLOCK
        hi = min(lo + BLOCK, n)
        s = 0.0
        for i in range(lo, hi):
            s += x[i] * y[i]
        part[b] = s
    total = 0.0
    for b in range(nb_):
        total += part[b]
    return total


@nb.njit(cache=True, parallel=True)
def matvec_into(indptr, indices, data, x, out):
    """``out = A @ x`` for CSR ``A``."""
    n = indptr.shape[0] - 1
    for i in nb.prange(n):
        s = 0.0
        for k in range(indptr[i], indptr[i + 1]):
            s += data[k] * x[indices[k]]
        out[i] = s


@nb.njit(cache=True, parallel=True)
def residual_into(indptr, indices, data, x, b, out):
    """``out = b - A @ x`` (``out`` may be ``b``, never ``x``)."""
    n = indptr.shape[0] - 1
    for i in nb.prange(n):
        s = 0.0
        for k in range(indptr[i], indptr[i + 1]):
            s += data[k] * x[indices[k]]
        out[i] = b[i] - s


@nb.njit(cache=True, parallel=True)
def matvec_add_into(indptr, indices, data, x, out):
    """``out += A @ x`` (``out`` never ``x``)."""
    n = indptr.shape[0] - 1
    for i in nb.prange(n):
        s = 0.0
        for k in range(indptr[i], indptr[i + 1]):
            s += data[k] * x[indices[k]]
        out[i] += s


@nb.njit(cache=True, parallel=True)
def cg_update(alpha, p, q, x, r):
    """``x += alpha p``, ``r -= alpha q`` and return ``r . r`` (one pass, fixed blocks)."""
    n = x.shape[0]
    nb_ = (n + BLOCK - 1) // BLOCK
    part = np.empty(nb_)
    for b in nb.prange(nb_):
        lo = b * BLOCK
        hi = min(lo + BLOCK, n)
        s = 0.0
        for i in range(lo, hi):
            x[i] += alpha * p[i]
            ri = r[i] - alpha * q[i]
            r[i] = ri
            s += ri * ri
        part[b] = s
    total = 0.0
    for b in range(nb_):
        total += part[b]
    return total


@nb.njit(cache=True, parallel=True)
def xpby_into(z, beta, p):
    """``p = z + beta p``."""
    for i in nb.prange(p.shape[0]):
        p[i] = z[i] + beta * p[i]


def transpose(indptr, indices, data, n_cols):
    """CSR of the transpose of the ``(n_rows, n_cols)`` CSR matrix.

    Returns ``(indptr_t, indices_t, data_t)``: int64, int32, float64; the
    entries of each row of the transpose in ascending order of the original
    row (so the result does not depend on the number of blocks).  Parallel
    over blocks of rows, one per thread: each block counts its columns, a
    prefix sum gives every block its slot in every output row.
    """
    nblk = max(1, min(nb.get_num_threads(), indptr.shape[0] - 1))
    return by_size(_transpose, indices.shape[0])(indptr, indices, data, n_cols, nblk)


@nb.njit(cache=True, parallel=True)
def _transpose(indptr, indices, data, n_cols, nblk):
    n = indptr.shape[0] - 1
    nnz = indptr[n]
    bsize = (n + nblk - 1) // nblk
    counts = np.zeros((nblk, n_cols + 1), dtype=np.int64)
    for b in nb.prange(nblk):
        for i in range(b * bsize, min((b + 1) * bsize, n)):
            for k in range(indptr[i], indptr[i + 1]):
                counts[b, indices[k]] += 1
    indptr_t = np.zeros(n_cols + 1, dtype=np.int64)
    for j in range(n_cols):
        indptr_t[j + 1] = indptr_t[j]
        for b in range(nblk):
            indptr_t[j + 1] += counts[b, j]
    # counts[b, j] becomes the first slot of block b in output row j
    for j in nb.prange(n_cols):
        pos = indptr_t[j]
        for b in range(nblk):
            c = counts[b, j]
            counts[b, j] = pos
            pos += c
    indices_t = np.empty(nnz, dtype=np.int32)
    data_t = np.empty(nnz, dtype=np.float64)
    for b in nb.prange(nblk):
        for i in range(b * bsize, min((b + 1) * bsize, n)):
            for k in range(indptr[i], indptr[i + 1]):
                j = indices[k]
                slot = counts[b, j]
                indices_t[slot] = i
                data_t[slot] = data[k]
                counts[b, j] = slot + 1
    return indptr_t, indices_t, data_t


def _chunks(n):
    """Row chunks of the SpGEMM kernels: a few per thread (each has a marker array)."""
    return max(1, min(n, 4 * nb.get_num_threads()))


def spgemm(a_ptr, a_ind, a_val, b_ptr, b_ind, b_val, n_cols):
    """``C = A @ B`` as ``(indptr, indices, values)``.

    Two passes over chunks of rows, a few per thread, each chunk with a
    marker array of ``n_cols`` entries (one allocation per chunk, none per
    row): a count of every row's distinct columns, then one pass that writes
    each row's columns and values together (the marker holds the slot of each
    column in the current row).  The columns of a row are in the order of
    their first appearance (A's row order, then B's), not sorted: no kernel
    here needs sorted rows, and sorting would cost more than the product.
    Each entry sums its products in the order of A's row, then B's row; rows
    are independent, so the result is the same for any thread count.
    """
    nchunk = _chunks(a_ptr.shape[0] - 1)
    work = a_ind.shape[0] + b_ind.shape[0]
    c_ptr = by_size(_spgemm_count, work)(a_ptr, a_ind, b_ptr, b_ind, n_cols, nchunk)
    c_ind = np.empty(c_ptr[-1], dtype=np.int32)
    c_val = np.empty(c_ptr[-1], dtype=np.float64)
    by_size(_spgemm_fill, work)(a_ptr, a_ind, a_val, b_ptr, b_ind, b_val, c_ptr, c_ind, c_val,
                                n_cols, nchunk)
    return c_ptr, c_ind, c_val


@nb.njit(cache=True, parallel=True)
def _spgemm_count(a_ptr, a_ind, b_ptr, b_ind, n_cols, nchunk):
    """Row pointer of ``C = A @ B``: the distinct columns of every row, counted."""
    n = a_ptr.shape[0] - 1
    csize = (n + nchunk - 1) // nchunk
    counts = np.zeros(n + 1, dtype=np.int64)
    for c in nb.prange(nchunk):
        mark = np.full(max(n_cols, 1), -1, dtype=np.int32)
        for i in range(c * csize, min((c + 1) * csize, n)):
            m = 0
            for ka in range(a_ptr[i], a_ptr[i + 1]):
                j = a_ind[ka]
                for kb in range(b_ptr[j], b_ptr[j + 1]):
                    col = b_ind[kb]
                    if mark[col] != i:
                        mark[col] = i
                        m += 1
            counts[i + 1] = m
    c_ptr = np.empty(n + 1, dtype=np.int64)
    c_ptr[0] = 0
    for i in range(n):
        c_ptr[i + 1] = c_ptr[i] + counts[i + 1]
    return c_ptr


@nb.njit(cache=True, parallel=True)
def _spgemm_fill(a_ptr, a_ind, a_val, b_ptr, b_ind, b_val, c_ptr, c_ind, c_val, n_cols,
                 nchunk):
    """Columns and values of ``C = A @ B`` in one pass (slots grow with the row)."""
    n = a_ptr.shape[0] - 1
    csize = (n + nchunk - 1) // nchunk
    for c in nb.prange(nchunk):
        slot = np.full(max(n_cols, 1), -1, dtype=np.int64)
        for i in range(c * csize, min((c + 1) * csize, n)):
            start = c_ptr[i]
            m = start
            for ka in range(a_ptr[i], a_ptr[i + 1]):
                j = a_ind[ka]
                av = a_val[ka]
                for kb in range(b_ptr[j], b_ptr[j + 1]):
                    col = b_ind[kb]
                    k = slot[col]
                    if k < start:
                        # first product of this column in row i: slots of
                        # earlier rows of the chunk are all below ``start``
                        slot[col] = m
                        c_ind[m] = col
                        c_val[m] = 0.0 + av * b_val[kb]
                        m += 1
                    else:
                        c_val[k] += av * b_val[kb]
