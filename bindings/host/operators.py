"""Operator adapters: the P1 stiffness operator without a stored matrix.

:class:`MatrixFreeStiffness` is a :class:`scipy.sparse.linalg.LinearOperator`
that applies ``y = K x`` cell by cell, recomputing each P1 cell matrix from
the coordinates (closed form, the kernel's ``_p1_cofactors``) on every
application.  It plugs into SciPy's Krylov solvers (``cg``, ``minres``,
``gmres``) and into anything that takes a LinearOperator.

Race-free parallel scheme (the Assembler's, see :mod:`galerkit.assembly`):
the rows are split into one contiguous range per thread; cells are sorted by
their smallest vertex and each range visits the window of sorted cells that
can touch it, adding only into the rows it owns.  No atomics, no colouring,
and every ``y[i]`` is summed in the same (cell) order whatever the thread
count, so results are bitwise reproducible.  A cell straddling two ranges is
computed by both threads.

Memory: besides the mesh arrays (shared with the caller when ``copy=False``),
the operator keeps the cell order (one index per cell), the row ranges and a
Dirichlet mask (one byte per vertex) -- against ``12 nnz + 4 n`` bytes of an
assembled CSR matrix (``benchmarks/time_loop.py`` measures both).

Dirichlet rows: with ``dirichlet_dofs`` the operator is ``[[K_ff, 0], [0, I]]``
in the original numbering -- the eliminated matrix with identity rows kept in
place -- which is symmetric positive definite, as CG needs.
"""

from __future__ import annotations

import numba as nb
import numpy as np
from scipy.sparse.linalg import LinearOperator

from galerkit.assembly import _cell_order, _chunk_cells, _p1_cofactors
from galerkit.errors import InputError

from .embed import _array, _cell_values, _check_cells_array, _check_points

__all__ = ["MatrixFreeStiffness"]


@nb.njit(cache=True, parallel=True)
def _p1_apply(points, cells, order, chunk_rows, chunk_cells, kappa, fixed, x, y):
    """y = K x for P1 (rows/columns with fixed[i] != 0 act as identity / are dropped).

    Per cell, with C_a = det(J) grad(lambda_a) (the kernel's cofactor rows):
    y_a += kappa / (d! |det J|) * C_a . q,  q = sum_b C_b x_b  -- the cell's flux,
    2 k d multiplications instead of the k**2 d of a cell matrix times x.
    """
    d = points.shape[1]
    k = d + 1
    fact = 2.0 if d == 2 else 6.0
    nch = chunk_rows.shape[0] - 1
    for t in nb.prange(nch):
        G = np.empty((4, 3))
        lo = chunk_rows[t]
        hi = chunk_rows[t + 1]
        for i in range(lo, hi):
            y[i] = 0.0
        for p in range(chunk_cells[t, 0], chunk_cells[t, 1]):
            c = order[p]
            det = _p1_cofactors(points, cells, c, G)
            scale = kappa[c if kappa.shape[0] > 1 else 0, 0] / (fact * abs(det))
            q0 = 0.0  # scalars, not an array: kept in registers
            q1 = 0.0
            q2 = 0.0
            for b in range(k):
                col = cells[c, b]
                xb = 0.0 if fixed[col] else x[col]
                q0 += G[b, 0] * xb
                q1 += G[b, 1] * xb
                if d == 3:
                    q2 += G[b, 2] * xb
            for a in range(k):
                row = cells[c, a]
                if row >= lo and row < hi and not fixed[row]:
                    s = G[a, 0] * q0 + G[a, 1] * q1
                    if d == 3:
                        s += G[a, 2] * q2
                    y[row] += scale * s
        for i in range(lo, hi):
            if fixed[i]:
                y[i] = x[i]


class MatrixFreeStiffness(LinearOperator):
    """Matrix-free P1 stiffness ``K`` of ``integral(kappa grad u . grad v)``.

    Parameters
    ----------
    points : ndarray, shape (n_vertices, d), float64, C-contiguous
    cells : ndarray, shape (n_cells, d + 1), int32 or int64, C-contiguous
    conductivity : float or ndarray (n_cells,) float64
        Positive constant or per-cell values.
    dirichlet_dofs : array_like of int, optional
        Vertices whose rows and columns are replaced by the identity.
    copy : bool
        True (default): keep private read-only copies of the arrays, so the
        host may change or free its own.  False: keep (read-only views of)
        the host's arrays, no copy -- the host must then not modify them
        while the operator is in use (they were validated on construction,
        and the kernel trusts them).

    Attributes
    ----------
    shape : (n_vertices, n_vertices)
    dtype : float64

    Notes
    -----
    Ownership: ``matvec`` returns a new array; :meth:`apply` writes into a
    caller-owned ``out``.  Thread safety: one parallel numba kernel per
    application; concurrent applications are safe with distinct outputs
    (threading layer "omp" or "tbb", as for the assembly).

    Examples
    --------
    >>> import numpy as np
    >>> points = np.array([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0], [1.0, 1.0]])
    >>> cells = np.array([[0, 1, 2], [1, 3, 2]], dtype=np.int32)
    >>> K = MatrixFreeStiffness(points, cells)
    >>> K.shape, float(abs(K @ np.ones(4)).max())
    ((4, 4), 0.0)
    >>> (K @ np.array([0.0, 1.0, 0.0, 1.0])).tolist()  # x is linear: K x is the flux
    [-0.5, 0.5, -0.5, 0.5]
    """

    def __init__(self, points, cells, conductivity=1.0, *, dirichlet_dofs=None, copy=True):
        where = "MatrixFreeStiffness"
        nv = points.shape[0] if isinstance(points, np.ndarray) and points.ndim == 2 else None
        c, nv = _check_cells_array(cells, where, nv)
        d = c.shape[1] - 1
        p = _check_points(points, where, nv, d, c)
        kappa = _cell_values(conductivity, c.shape[0], "conductivity", where, True)
        if copy:
            p, c, kappa = (np.array(a, order="C", copy=True) for a in (p, c, kappa))
            for a in (p, c, kappa):
                a.flags.writeable = False
        else:
            c = c.view()
            c.flags.writeable = False
        fixed = np.zeros(nv, dtype=np.uint8)
        if dirichlet_dofs is not None:
            dd = np.asarray(dirichlet_dofs)
            if dd.ndim != 1 or not (np.issubdtype(dd.dtype, np.integer) or dd.size == 0):
                raise InputError(f"{where}: dirichlet_dofs must be a 1-D integer array, got "
                                 f"dtype {dd.dtype} shape {dd.shape}")
            if dd.size and (dd.min() < 0 or dd.max() >= nv):
                bad = int(dd[(dd < 0) | (dd >= nv)][0])
                raise InputError(f"{where}: Dirichlet dof {bad} is outside 0..{nv - 1}")
            fixed[dd.astype(np.int64)] = 1
        self.points, self.cells, self.kappa, self.fixed = p, c, kappa, fixed
        self.order = _cell_order(c, nv)
        nch = nb.get_num_threads()
        rows = np.linspace(0, nv, nch + 1).astype(np.int64)
        self.chunk_rows = rows
        self.chunk_cells = _chunk_cells(c, self.order, rows)
        super().__init__(dtype=np.float64, shape=(nv, nv))

    def apply(self, x, out=None):
        """``out = K x``.

        Parameters
        ----------
        x : ndarray, shape (n,), float64 (other real dtypes are converted)
        out : ndarray, shape (n,), float64, C-contiguous, writeable, optional
            Written in place (must not overlap ``x``).

        Returns
        -------
        ndarray, shape (n,)
        """
        n = self.shape[0]
        x = np.asarray(x)
        if x.dtype.kind not in "iuf":
            raise InputError(f"MatrixFreeStiffness: x has dtype {x.dtype}; expected a real "
                             f"array of shape ({n},), float64")
        x = np.ascontiguousarray(x.reshape(-1), dtype=np.float64)
        if x.shape != (n,):
            raise InputError(f"MatrixFreeStiffness: x has {x.size} entries; expected ({n},)")
        if out is None:
            out = np.empty(n)
        else:
            out = _array(out, "out", "MatrixFreeStiffness.apply", (np.float64,), (n,),
                         writeable=True)
            if np.may_share_memory(out, x):
                raise InputError("MatrixFreeStiffness.apply: out overlaps x; pass a separate "
                                 "array")
        _p1_apply(self.points, self.cells, self.order, self.chunk_rows, self.chunk_cells,
                  self.kappa, self.fixed, x, out)
        return out

    def _matvec(self, x):
        return self.apply(x)

    def _rmatvec(self, x):
        return self.apply(x)  # symmetric

    def _adjoint(self):
        return self

    def memory_bytes(self, include_mesh=False):
        """Bytes kept by the operator (the mesh arrays only with ``include_mesh``)."""
        own = {"cell_order": self.order.nbytes, "dirichlet_mask": self.fixed.nbytes,
               "row_ranges": self.chunk_rows.nbytes + self.chunk_cells.nbytes,
               "conductivity": self.kappa.nbytes}
        if include_mesh:
            own.update(points=self.points.nbytes, cells=self.cells.nbytes)
        return own
