"""Dirichlet conditions by symmetric elimination, and constant-fixing.

Dirichlet dofs ``d`` with values ``g`` are removed from the system by
lifting: ``A_ff u_f = b_f - A_fd g``; the full vector is restored as
``u[f] = u_f, u[d] = g``.  The reduced matrix stays symmetric positive
definite, so every solver in the registry applies.

:class:`DirichletElimination` computes the reduced sparsity pattern once
(numba), so that a new matrix on the same pattern (a new conductivity, a new
time step) is reduced in place without new allocation.
"""

from __future__ import annotations

import numba as nb
import numpy as np
import scipy.sparse as sp

from .compilation import by_size
from .errors import InputError
from .topology import index_dtype
from .solvers import _check_csr_structure

__all__ = ["DirichletElimination", "dirichlet_values"]


@nb.njit(cache=True, parallel=True)
def _reduced_pattern(indptr, indices, new_index, free, rptr, rind):
    """Row lengths (first call, ``rind`` empty) or columns (second call) of
    ``A_ff``; each free row is walked by one thread, in column order.  The
    exact construction, used when the predicted lengths of
    :func:`_predicted_lengths` do not hold (a pattern that is not
    structurally symmetric)."""
    n_free = free.shape[0]
    if rind.shape[0] == 0:
        for r in nb.prange(n_free):
            i = free[r]
            cnt = 0
            for j in range(indptr[i], indptr[i + 1]):
                if new_index[indices[j]] >= 0:
                    cnt += 1
            rptr[r + 1] = cnt
        return
    for r in nb.prange(n_free):
        i = free[r]
        pos = rptr[r]
        for j in range(indptr[i], indptr[i + 1]):
            cnew = new_index[indices[j]]
            if cnew >= 0:
                rind[pos] = cnew
                pos += 1


@nb.njit(cache=True)
def _predicted_lengths(indptr, indices, dofs, new_index, free, rptr):
    """Row lengths of ``A_ff`` from the Dirichlet rows alone.

    For a structurally symmetric pattern, the Dirichlet columns of a free row
    ``i`` are the Dirichlet rows that hold column ``i``: walking only those
    rows (a boundary's worth of entries) counts them, and the length of the
    reduced row is the full length minus that count.  :func:`_reduce` checks
    every row against it while it writes the columns; a pattern for which the
    prediction fails falls back to :func:`_reduced_pattern`.
    """
    n_free = free.shape[0]
    for r in range(n_free):
        i = free[r]
        rptr[r + 1] = indptr[i + 1] - indptr[i]
    for d in dofs:
        for j in range(indptr[d], indptr[d + 1]):
            r = new_index[indices[j]]
            if r >= 0:
                rptr[r + 1] -= 1
    for r in range(n_free):
        rptr[r + 1] += rptr[r]


@nb.njit(cache=True, parallel=True)
def _reduce(indptr, indices, data, new_index, free, rptr, out, rind, lift, b, g_full, rhs):
    """``A_ff`` values into ``out`` and, when ``lift``, ``b_f - A_fd g`` into ``rhs``.

    One walk over the stored entries of every row: free rows copy their free
    columns in order (the reduced pattern; into ``rind`` too when it is not
    empty, the first reduction) and sum their Dirichlet columns times ``g``
    in column order (fixed order: the same bits for any thread count).

    Returns ``(bad, wrong)``: the number of non-finite entries of ``A`` (all
    rows), and the number of free rows whose free columns do not fill their
    slots of ``rptr`` exactly (only checked while ``rind`` is written; then
    nothing written is valid, and the caller rebuilds the exact pattern).
    """
    n = indptr.shape[0] - 1
    write = out.shape[0] > 0
    columns = rind.shape[0] > 0
    bad = 0
    wrong = 0
    for i in nb.prange(n):
        r = new_index[i]
        if r < 0:
            for j in range(indptr[i], indptr[i + 1]):
                if not np.isfinite(data[j]):
                    bad += 1
            continue
        pos = rptr[r]
        end = rptr[r + 1]
        s = b[i] if lift else 0.0
        for j in range(indptr[i], indptr[i + 1]):
            a = data[j]
            if not np.isfinite(a):
                bad += 1
            c = indices[j]
            cnew = new_index[c]
            if cnew >= 0:
                if columns:
                    if pos < end:
                        rind[pos] = cnew
                        out[pos] = a
                    pos += 1
                elif write:
                    out[pos] = a
                    pos += 1
            elif lift:
                s -= a * g_full[c]
        if columns and pos != end:
            wrong += 1
        if lift:
            rhs[r] = s
    return bad, wrong


class DirichletElimination:
    """Remove Dirichlet dofs from matrices and right-hand sides on one pattern.

    Parameters
    ----------
    A : csr_array
        A matrix on the pattern (for example the stiffness matrix).
    dofs : ndarray of int
        Dirichlet dofs (any order, duplicates allowed).

    Examples
    --------
    >>> import numpy as np, scipy.sparse as sp
    >>> A = sp.csr_array(np.array([[2., -1, 0], [-1, 2, -1], [0, -1, 2]]))
    >>> elim = DirichletElimination(A, np.array([0]))
    >>> Af, bf = elim.reduce(A, np.zeros(3), np.array([1.0]))
    >>> Af.toarray().tolist(), bf.tolist()
    ([[2.0, -1.0], [-1.0, 2.0]], [1.0, 0.0])
    """

    def __init__(self, A, dofs):
        if not sp.issparse(A) or A.ndim != 2 or A.shape[0] != A.shape[1]:
            raise InputError(
                "DirichletElimination: A must be a square SciPy sparse matrix, got "
                f"{type(A).__name__} of shape {getattr(A, 'shape', None)}")
        _check_csr_structure(A, "DirichletElimination")
        A = sp.csr_array(A)
        n = A.shape[0]
        # Fix: remember the dofs in the order given, so that values given in
        # that order (the documented "any order") land on the right dofs; the
        # sorted unique order was silently assumed before.
        try:
            given = np.asarray(dofs)
        except Exception:  # ragged lists and the like
            given = np.empty(0, dtype=object)
        if given.size and given.dtype.kind not in "iu":
            raise InputError(
                f"DirichletElimination: dofs must be integers (dof indices), got dtype "
                f"{given.dtype}; a fractional index would be truncated to a wrong dof")
        given = given.astype(np.int64).ravel()
        dofs = np.unique(given)
        if dofs.size and (dofs[0] < 0 or dofs[-1] >= n):
            bad = int(dofs[0] if dofs[0] < 0 else dofs[-1])
            raise InputError(
                f"DirichletElimination: Dirichlet dof {bad} is outside 0..{n - 1} (the rows of "
                f"A); Dirichlet dofs must lie in 0..{n - 1}, got the range "
                f"{dofs[[0, -1]].tolist()}")
        self.n = n
        self.dofs = dofs
        self._given = given
        idt = index_dtype(n)
        new_index = np.zeros(n, dtype=idt)
        new_index[dofs] = -1
        free = np.flatnonzero(new_index == 0).astype(idt)
        new_index[free] = np.arange(free.size, dtype=idt)
        for arr in (dofs, free, new_index):
            arr.flags.writeable = False
        self.free = free
        self.new_index = new_index
        self._indptr, self._indices = A.indptr, A.indices
        # the reduced pattern's row lengths, predicted from the Dirichlet rows
        # (exact for a structurally symmetric pattern); the columns are written
        # by the first reduction, which checks every row against the prediction
        rptr = np.zeros(free.size + 1, dtype=np.int64)
        _predicted_lengths(A.indptr, A.indices, dofs, new_index, free, rptr)
        self._pdt = A.indices.dtype
        self._set_lengths(rptr)
        self._rind = None
        self._no_rhs = np.empty(0)
        if self._nnz == 0:
            self._exact_pattern()

    def _set_lengths(self, rptr):
        self._rptr = rptr
        self._nnz = int(rptr[-1])
        if self._pdt.itemsize < 8 and self._nnz >= 2**31:
            self._pdt = np.dtype(np.int64)

    def _store_pattern(self, rind):
        rptr = self._rptr
        self._indptr_out = rptr.astype(self._pdt) if self._pdt != rptr.dtype else rptr
        self._rind = rind
        for arr in (self._indptr_out, rind):
            arr.flags.writeable = False

    def _exact_pattern(self):
        """The reduced pattern by counting (when the prediction does not hold)."""
        rptr = np.zeros(self.free.size + 1, dtype=np.int64)
        kernel = by_size(_reduced_pattern, self._indices.size)
        kernel(self._indptr, self._indices, self.new_index, self.free, rptr,
               np.empty(0, self._pdt))
        np.cumsum(rptr, out=rptr)
        self._set_lengths(rptr)
        rind = np.empty(self._nnz, dtype=self._pdt)
        kernel(self._indptr, self._indices, self.new_index, self.free, rptr, rind)
        self._store_pattern(rind)

    @property
    def reduced_indptr(self):
        """Row pointer of the reduced matrix (read-only, shared by every result)."""
        if self._rind is None:
            self._exact_pattern()
        return self._indptr_out

    @property
    def reduced_indices(self):
        """Column indices of the reduced matrix (read-only, shared by every result)."""
        if self._rind is None:
            self._exact_pattern()
        return self._rind

    @property
    def nnz(self) -> int:
        """Stored entries of the reduced matrix."""
        if self._rind is None:
            self._exact_pattern()
        return self._nnz

    def memory_bytes(self) -> int:
        """Bytes held by the elimination (maps and the reduced pattern)."""
        held = [self.dofs, self.free, self.new_index, self._rptr]
        if self._rind is not None:
            held += [self._rind] + ([self._indptr_out] if self._indptr_out is not self._rptr else [])
        return int(sum(a.nbytes for a in held))

    @property
    def n_free(self) -> int:
        return self.free.size

    def _check(self, A):
        # Fix: compare the column indices too (and require CSR); a matrix with
        # the same row lengths but other columns passed before and was reduced
        # to garbage.
        if not (sp.issparse(A) and A.format == "csr") or A.shape != (self.n, self.n) or not (
                (A.indptr is self._indptr or np.array_equal(A.indptr, self._indptr))
                and (A.indices is self._indices or np.array_equal(A.indices, self._indices))):
            raise InputError("DirichletElimination: the matrix is not on the pattern it was built for")
        # the kernels read A.data at every stored position
        if A.data.ndim != 1 or A.data.shape[0] < int(self._indptr[-1]) \
                or A.data.dtype.kind not in "iuf":
            raise InputError(
                f"DirichletElimination: the matrix data must be real with "
                f"{int(self._indptr[-1])} entries, got {A.data.dtype} of shape {A.data.shape}")

    def _full_values(self, values):
        """Dirichlet values as a full vector (zero on free dofs).

        ``values``: a number, one value per dof in the order the dofs were
        given, or one per sorted unique Dirichlet dof (``self.dofs``).
        """
        g_full = np.zeros(self.n)
        try:
            v = np.asarray(values)
        except Exception:
            v = np.empty(0, dtype=object)
        if v.dtype.kind not in "iufb":
            raise InputError(
                f"DirichletElimination: Dirichlet values must be real numbers, got dtype {v.dtype}")
        v = v.astype(np.float64)
        bad = ~np.isfinite(v)
        if bad.any():
            i = int(np.flatnonzero(bad.ravel())[0])
            raise InputError(
                f"DirichletElimination: non-finite Dirichlet value {float(v.ravel()[i])!r} "
                f"(value {i}); check the boundary data")
        if v.ndim == 0 or v.shape == (self._given.size,):
            g_full[self._given] = v
        elif v.shape == (self.dofs.size,):
            g_full[self.dofs] = v
        else:
            raise InputError(
                f"DirichletElimination: expected {self._given.size} Dirichlet values (one per "
                f"dof given), got shape {v.shape}")
        return g_full

    def _run(self, A, out, b=None, g_full=None, rhs=None, rind=None):
        """One pass of the numeric kernel; refuses non-finite entries of ``A``.

        Returns the number of rows that did not fit the predicted pattern
        (only counted while ``rind`` is written)."""
        data = A.data if A.data.dtype == np.float64 else A.data.astype(np.float64)
        lift = rhs is not None
        if not lift:
            b = g_full = rhs = self._no_rhs
        if rind is None:
            rind = self._no_rhs.astype(self._pdt)
        bad, wrong = by_size(_reduce, self._indices.size)(
            self._indptr, self._indices, data, self.new_index, self.free, self._rptr, out, rind,
            lift, b, g_full, rhs)
        if bad:
            k = int(np.flatnonzero(~np.isfinite(data[:int(self._indptr[-1])]))[0])
            row = int(np.searchsorted(self._indptr, k, side="right") - 1)
            raise InputError(
                f"DirichletElimination: the matrix has a non-finite entry "
                f"{float(data[k])!r} in row {row} ({int(bad)} such entries); check the "
                "coefficients that produced it")
        return wrong

    def _new_values(self, A, b=None, g_full=None, rhs=None):
        """The reduced values in a new array (the first call writes the pattern too)."""
        if self._rind is not None:
            data = np.empty(self._nnz)
            self._run(A, data, b, g_full, rhs)
            return data
        data = np.empty(self._nnz)
        rind = np.empty(self._nnz, dtype=self._pdt)
        if self._run(A, data, b, g_full, rhs, rind) == 0:
            self._store_pattern(rind)
            return data
        del data, rind  # not structurally symmetric: count the pattern exactly
        self._exact_pattern()
        data = np.empty(self._nnz)
        self._run(A, data, b, g_full, rhs)
        return data

    def _new_matrix(self, data):
        R = sp.csr_array((data, self.reduced_indices, self.reduced_indptr),
                         shape=(self.n_free, self.n_free), copy=False)
        R.has_sorted_indices = True
        return R

    def _check_out(self, out):
        # Fix: validate out= before the kernel writes into it (a too small
        # data array was written past its end)
        if not (sp.issparse(out) and out.format == "csr" and out.shape == (self.n_free, self.n_free)
                and out.data.dtype == np.float64 and out.data.flags.c_contiguous
                and out.data.flags.writeable and out.data.shape == (self._nnz,)
                and (out.indptr is self.reduced_indptr
                     or np.array_equal(out.indptr, self.reduced_indptr))
                and (out.indices is self.reduced_indices
                     or np.array_equal(out.indices, self.reduced_indices))):
            raise InputError("DirichletElimination: out= must be a matrix returned earlier by "
                             "reduce_matrix of this elimination (same reduced pattern, float64 data)")

    def reduce_matrix(self, A, out=None):
        """``A_ff`` as a CSR array (in place into ``out`` when given).

        The result shares the reduced pattern (``reduced_indptr``,
        ``reduced_indices``, read-only) with every other matrix of this
        elimination; in place, nothing is allocated.
        """
        self._check(A)
        if out is None:
            return self._new_matrix(self._new_values(A))
        self._check_out(out)
        self._run(A, out.data)
        return out

    def _rhs_inputs(self, b, values):
        g_full = self._full_values(values)
        try:
            b = np.asarray(b)
        except Exception:  # ragged lists and the like
            b = np.empty(0, dtype=object)
        if b.dtype.kind not in "iuf":
            raise InputError(f"DirichletElimination: rhs must be real numbers, got dtype {b.dtype}")
        b = np.ascontiguousarray(b, dtype=np.float64)
        if b.shape != (self.n,):  # Fix: the kernel read past the end of a short b
            raise InputError(f"DirichletElimination: rhs must have shape ({self.n},), got {b.shape}")
        return b, g_full

    def reduce_rhs(self, A, b, values):
        """``b_f - A_fd g`` for Dirichlet values ``g`` (one per Dirichlet dof)."""
        self._check(A)
        b, g_full = self._rhs_inputs(b, values)
        rhs = np.empty(self.n_free)
        self._run(A, self._no_rhs, b, g_full, rhs)  # an empty out: the values are not written
        return rhs

    def reduce(self, A, b, values, *, out=None):
        """Both, in one pass over ``A``: ``(A_ff, b_f - A_fd g)``.

        With ``out`` (a matrix from an earlier ``reduce``/``reduce_matrix`` of
        this elimination) the matrix is re-reduced in place: every stored
        entry of ``A`` is read once and nothing but the right-hand side is
        allocated.
        """
        self._check(A)
        b, g_full = self._rhs_inputs(b, values)
        rhs = np.empty(self.n_free)
        if out is None:
            return self._new_matrix(self._new_values(A, b, g_full, rhs)), rhs
        self._check_out(out)
        self._run(A, out.data, b, g_full, rhs)
        return out, rhs

    def expand(self, u_free, values):
        """The full vector from the free part and the Dirichlet values."""
        u = self._full_values(values)  # values in the order the dofs were given
        uf = np.asarray(u_free)
        if uf.shape != (self.n_free,) or uf.dtype.kind not in "iuf":
            raise InputError(
                f"DirichletElimination.expand: u_free must be a real array of shape "
                f"({self.n_free},), got {uf.dtype} of shape {uf.shape}")
        u[self.free] = uf
        return u


def dirichlet_values(disc, value, dofs, name="dirichlet"):
    """Values at Dirichlet ``dofs`` from a scalar, a callable or a dof array."""
    from .coefficients import evaluate_callable

    if callable(value):
        x = np.ascontiguousarray(disc.dof_points[dofs].T)
        v = evaluate_callable(value, x, name)
    else:
        try:
            arr = np.asarray(value)
        except Exception:
            arr = np.empty(0, dtype=object)
        if arr.dtype.kind not in "iufb":
            raise InputError(
                f"{name}: expected a number, a callable or a dof array of shape "
                f"({disc.n_dofs},), got {type(value).__name__} (dtype {arr.dtype})")
        arr = arr.astype(np.float64)
        if arr.ndim == 0:
            v = np.full(dofs.size, float(arr))
        elif arr.shape == (disc.n_dofs,):
            v = arr[dofs]
        else:
            raise InputError(
                f"{name}: expected a number, a callable or a dof array of shape "
                f"({disc.n_dofs},), got shape {arr.shape}"
            )
    bad = ~np.isfinite(v)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise InputError(f"{name}: non-finite value {v[i]} at dof {int(dofs[i])}")
    return v
