"""C-callable entry points: numba ``cfunc`` s for host codes written in C, C++ or Fortran.

Each function here is a native function with a plain C signature (declared
in ``bindings/host/c/galerkit.h``); :func:`addresses` returns their addresses, so
a host that embeds Python (``Py_Initialize``) -- or Python itself, through
``ctypes`` -- calls them directly on its own arrays, with no Python objects
involved.  The bodies call the numba kernels of :mod:`galerkit.assembly` and
:mod:`galerkit.functionals` (the same code the :class:`~galerkit.Assembler`
runs), so results equal the Assembler's.

Design (symbolic and numeric phases, as in the kernel)
------------------------------------------------------
1. ``galerkit_pattern_count`` fills ``indptr`` (n_dofs + 1) and returns
   ``nnz``; the caller allocates ``indices`` (nnz), ``cell_order``
   (n_cells), ``position_map`` (n_cells * n_local**2, uint16) and
   ``chunk_plan`` (3 * n_chunks + 1, int64);
2. ``galerkit_pattern_fill`` fills them: the sorted CSR column indices, the
   scatter plan (cells sorted by smallest dof, the offset of every local
   entry inside its row) and ``n_chunks`` row ranges with the window of
   ordered cells each range visits (``n_chunks``: the number of row ranges
   run in parallel; :func:`num_threads` is a good value);
3. ``galerkit_stiffness`` / ``galerkit_mass`` / ``galerkit_load`` write the
   values into the caller's ``data`` (nnz) / ``out`` (n_dofs) arrays, every
   time coefficients or coordinates change;
4. ``galerkit_p1_l2_error`` / ``galerkit_p1_h1_seminorm_error``: the error of
   a nodal P1 field against nodal reference data (the difference of the two
   interpolants, integrated exactly).

Conventions: indices are 0-based ``int32_t`` (meshes below 2**31 dofs and
entries), arrays row-major; degree 1..4 (the generic degree needs the cell
-> dof table in galerkit's local node order, e.g. ``plan["cell_dofs"]`` of
:func:`galerkit.bindings.host.embed.pattern`; for degree 1 ``cell_dofs`` is not
read and the cells are the dofs).

Validation: every call checks counts, index ranges (cells, dofs, pattern,
cell order, position map, row ranges), finiteness and non-degenerate cells
before a kernel runs, and returns a negative status instead of running on bad
input (:data:`STATUS`, :func:`describe_status`).  What it cannot check is the
length of the caller's buffers: they must have the sizes documented.

Ownership: the caller allocates and frees every array; nothing is retained
between calls (temporaries are allocated and freed inside a call).  Thread
safety: no global state; concurrent calls on distinct output arrays are safe
when numba's threading layer is ``"omp"`` or ``"tbb"``; under
``"workqueue"`` call from one thread at a time.  The calling thread need not
hold the GIL.

Examples
--------
>>> import ctypes, numpy as np
>>> count = ctypes_function("galerkit_pattern_count")
>>> cells = np.array([[0, 1, 2], [1, 3, 2]], dtype=np.int32)
>>> indptr = np.empty(5, dtype=np.int32)
>>> count(4, 2, 3, cells.ctypes.data, 1, indptr.ctypes.data), indptr.tolist()
(14, [0, 3, 7, 11, 14])
>>> describe_status(-4)
'a cell is degenerate (zero or tiny volume for its edge lengths): repair or remove it'
"""

from __future__ import annotations

import ctypes
import hashlib
import importlib
from functools import lru_cache

import numba as nb
import numpy as np
from numba import carray, cfunc
from numba import types as T

# Cached cfuncs that call parallel kernels link against the threading layer's
# symbols when they are loaded; start the threads before any cfunc is built.
nb.get_num_threads()

from galerkit.assembly import (_cell_order, _chunk_cells, _generic_matrix,  # noqa: E402
                               _generic_vector, _p1_stiffness, _pattern_count, _pattern_fill,
                               _position_map)
from galerkit.elements import lagrange_element  # noqa: E402
from galerkit.functionals import _H1, _L2, BLOCK_CELLS, _cell_integrals  # noqa: E402
from galerkit.mesh import DEGENERACY_TOLERANCE, _check_cells  # noqa: E402
from galerkit.quadrature import simplex_quadrature  # noqa: E402
from galerkit.topology import _incidence_kernel  # noqa: E402

from .embed import (N_LOCAL, _first_degenerate, _first_nonfinite,  # noqa: E402
                    _first_not_positive, _pattern_status, _plan_status, reference_tables)

__all__ = ["addresses", "ctypes_function", "describe_status", "num_threads", "SIGNATURES",
           "STATUS"]

# ----------------------------------------------------------------------------
# status codes (mirrored in galerkit.h)
# ----------------------------------------------------------------------------
OK = 0
E_ARGUMENT = -1
E_INDEX = -2
E_POINTS = -3
E_DEGENERATE = -4
E_COEFFICIENT = -5
E_PATTERN = -6
E_PLAN = -7
E_SIZE = -8
E_FIELD = -9

#: status -> (C macro name, what it means and what to do)
STATUS = {
    OK: ("GALERKIT_OK", "success"),
    E_ARGUMENT: ("GALERKIT_E_ARGUMENT",
                 "a count or option is out of range (dim 2|3, degree 1..4, n_local matching, "
                 "counts > 0, n_values 1 or n_cells, source_kind 0|1|2, degree 1 needs "
                 "n_dofs == n_vertices): fix the call"),
    E_INDEX: ("GALERKIT_E_INDEX",
              "a cell or cell_dofs entry is outside 0..n-1 or a cell repeats an index: "
              "indices are 0-based rows of points / dofs"),
    E_POINTS: ("GALERKIT_E_POINTS", "a point coordinate is not finite: fix the coordinates"),
    E_DEGENERATE: ("GALERKIT_E_DEGENERATE",
                   "a cell is degenerate (zero or tiny volume for its edge lengths): repair or "
                   "remove it"),
    E_COEFFICIENT: ("GALERKIT_E_COEFFICIENT",
                    "a coefficient is not finite (or a conductivity not > 0): fix the values"),
    E_PATTERN: ("GALERKIT_E_PATTERN",
                "indptr/indices are not the pattern of these cells (indptr not from "
                "galerkit_pattern_count, rows unsorted or out of range): rebuild it"),
    E_PLAN: ("GALERKIT_E_PLAN",
             "cell_order / position_map / chunk_plan do not match the pattern and cells: pass "
             "them unchanged from galerkit_pattern_fill"),
    E_SIZE: ("GALERKIT_E_SIZE",
             "the pattern does not fit: more than 2**31-1 entries or a row longer than 65536 "
             "(uint16 position map); split the mesh or use the Python API"),
    E_FIELD: ("GALERKIT_E_FIELD", "a field value (u or u_reference) is not finite"),
}


def describe_status(code):
    """What a status returned by a cfunc means and what to do, as text."""
    entry = STATUS.get(int(code))
    return entry[1] if entry else f"unknown status {code}"


def num_threads():
    """numba's thread count: a good ``n_chunks`` for the pattern calls."""
    return nb.get_num_threads()


# ----------------------------------------------------------------------------
# reference tables, frozen into the compiled code (constant per-cell coefficients)
# ----------------------------------------------------------------------------
def _flat_tables(key):
    parts, offsets = [], [0]
    for dim in (2, 3):
        for degree in (1, 2, 3, 4):
            a = reference_tables(dim, degree)[key].ravel()
            parts.append(a)
            offsets.append(offsets[-1] + a.size)
    return np.ascontiguousarray(np.concatenate(parts)), np.array(offsets, dtype=np.int64)


_STIFF, _STIFF_AT = _flat_tables("stiffness")
_MASS, _MASS_AT = _flat_tables("mass")
_LOAD, _LOAD_AT = _flat_tables("load")
_LOAD_DOF, _LOAD_DOF_AT = _flat_tables("load_dof")
_NLOCAL = np.array([N_LOCAL[2], N_LOCAL[3]], dtype=np.int64)


def _p1_rule(dim):
    rule = simplex_quadrature(dim, 4)  # the functionals' default 2k + 2 for k = 1
    el = lagrange_element(dim, 1)
    return (np.ascontiguousarray(el.tabulate(rule.points)),
            np.ascontiguousarray(el.tabulate_gradients(rule.points)),
            np.ascontiguousarray(rule.weights))


_V2, _DV2, _W2 = _p1_rule(2)
_V3, _DV3, _W3 = _p1_rule(3)


# ----------------------------------------------------------------------------
# helpers (plain njit functions called from the cfuncs)
# ----------------------------------------------------------------------------
@nb.njit(cache=True)
def _table(flat, at, idx, shape):
    out = np.empty(shape)
    f = out.reshape(out.size)
    start = at[idx]
    for i in range(f.shape[0]):
        f[i] = flat[start + i]
    return out


@nb.njit(cache=True)
def _counts_status(dim, degree, n_vertices, n_cells, n_dofs, n_chunks):
    if dim != 2 and dim != 3:
        return E_ARGUMENT
    if degree < 1 or degree > 4 or n_vertices < 1 or n_cells < 1 or n_dofs < 1 or n_chunks < 1:
        return E_ARGUMENT
    if degree == 1 and n_dofs != n_vertices:
        return E_ARGUMENT
    return OK


@nb.njit(cache=True)
def _mesh_status(points, cells, dofs, n_dofs):
    if _first_nonfinite(points) >= 0:
        return E_POINTS
    first, code, count = _check_cells(cells, points.shape[0])
    if first >= 0:
        return E_INDEX
    first, code, count = _check_cells(dofs, n_dofs)
    if first >= 0:
        return E_INDEX
    if _first_degenerate(points, cells, DEGENERACY_TOLERANCE) >= 0:
        return E_DEGENERATE
    return OK


@nb.njit(cache=True)
def _unpack_chunks(plan, n_chunks):
    rows = np.empty(n_chunks + 1, dtype=np.int64)
    windows = np.empty((n_chunks, 2), dtype=np.int64)
    for t in range(n_chunks + 1):
        rows[t] = plan[t]
    for t in range(n_chunks):
        windows[t, 0] = plan[n_chunks + 1 + 2 * t]
        windows[t, 1] = plan[n_chunks + 2 + 2 * t]
    return rows, windows


@nb.njit(cache=True)
def _incidence(dofs, n_dofs):
    m, k = dofs.shape
    offsets = np.zeros(n_dofs + 1, dtype=np.int64)
    items = np.empty(m * k, dtype=np.int32)
    _incidence_kernel(dofs, n_dofs, offsets, items)
    return offsets, items


@nb.njit(cache=True)
def _row_counts(dofs, n_dofs, n_chunks):
    offsets, items = _incidence(dofs, n_dofs)
    n_blocks = max(1, min(n_dofs, 4 * n_chunks))
    row_nnz = np.empty(n_dofs, dtype=np.int64)
    _pattern_count(dofs, offsets, items, n_blocks, row_nnz)
    return row_nnz


@nb.njit(cache=True)
def _pattern_arguments_bad(stamp, n_dofs, n_cells, n_chunks, n_local):
    return stamp < 0 or n_dofs < 1 or n_cells < 1 or n_chunks < 1 or n_local < 3 \
        or n_local > 35


@nb.njit(cache=True)
def _checked_row_counts(D, n_dofs, n_chunks):
    """(E_INDEX, empty) for a cell with a bad or repeated dof, else (OK, entries per row)."""
    first, code, count = _check_cells(D, n_dofs)
    if first >= 0:
        return E_INDEX, np.empty(0, dtype=np.int64)
    return OK, _row_counts(D, n_dofs, n_chunks)


@nb.njit(cache=True)
def _matrix_checks(P, C, D, n_dofs, IP, IX, O, PM, rows, windows, scatter):
    st = _mesh_status(P, C, D, n_dofs)
    if st != OK:
        return st
    if scatter:
        code, at = _pattern_status(IP, IX, n_dofs)
        if code:
            return E_PATTERN
    code, at = _plan_status(D, n_dofs, IP, IX, O, PM, rows, windows, scatter)
    if code:
        return E_PLAN
    return OK


# ----------------------------------------------------------------------------
# C signatures
# ----------------------------------------------------------------------------
i32, i64, f64 = T.int32, T.int64, T.float64
pi32, pi64, pf64, pu16 = T.CPointer(T.int32), T.CPointer(T.int64), T.CPointer(T.float64), \
    T.CPointer(T.uint16)

_MATRIX_ARGS = (i32, i32, i32, pf64, i32, pi32, i32, pi32, i32, pf64, pi32, pi32, pi32, pu16,
                i32, pi64, pf64)
_MATRIX_C = ("(int32_t dim, int32_t degree, int32_t n_vertices, const double *points, "
             "int32_t n_cells, const int32_t *cells, int32_t n_dofs, const int32_t *cell_dofs, "
             "int32_t n_values, const double *{coef}, const int32_t *indptr, "
             "const int32_t *indices, const int32_t *cell_order, const uint16_t *position_map, "
             "int32_t n_chunks, const int64_t *chunk_plan, double *data)")
_ERROR_ARGS = (i32, i32, pf64, i32, pi32, pf64, pf64, pf64)
_ERROR_C = ("(int32_t dim, int32_t n_vertices, const double *points, int32_t n_cells, "
            "const int32_t *cells, const double *u, const double *u_reference, "
            "double *result)")

#: name -> (numba signature, C prototype)
SIGNATURES = {
    "galerkit_pattern_count": (
        i64(i32, i32, i32, pi32, i32, pi32),
        "int64_t galerkit_pattern_count(int32_t n_dofs, int32_t n_cells, int32_t n_local, "
        "const int32_t *cell_dofs, int32_t n_chunks, int32_t *indptr)"),
    "galerkit_pattern_fill": (
        i32(i32, i32, i32, pi32, i32, pi32, pi32, pi32, pu16, pi64),
        "int32_t galerkit_pattern_fill(int32_t n_dofs, int32_t n_cells, int32_t n_local, "
        "const int32_t *cell_dofs, int32_t n_chunks, const int32_t *indptr, int32_t *indices, "
        "int32_t *cell_order, uint16_t *position_map, int64_t *chunk_plan)"),
    "galerkit_stiffness": (i32(*_MATRIX_ARGS),
                           "int32_t galerkit_stiffness" + _MATRIX_C.format(coef="conductivity")),
    "galerkit_mass": (i32(*_MATRIX_ARGS),
                      "int32_t galerkit_mass" + _MATRIX_C.format(coef="coefficient")),
    "galerkit_load": (
        i32(i32, i32, i32, pf64, i32, pi32, i32, pi32, i32, pf64, pi32, i32, pi64, pf64),
        "int32_t galerkit_load(int32_t dim, int32_t degree, int32_t n_vertices, "
        "const double *points, int32_t n_cells, const int32_t *cells, int32_t n_dofs, "
        "const int32_t *cell_dofs, int32_t source_kind, const double *source, "
        "const int32_t *cell_order, int32_t n_chunks, const int64_t *chunk_plan, double *out)"),
    "galerkit_p1_l2_error": (i32(*_ERROR_ARGS), "int32_t galerkit_p1_l2_error" + _ERROR_C),
    "galerkit_p1_h1_seminorm_error": (i32(*_ERROR_ARGS),
                                      "int32_t galerkit_p1_h1_seminorm_error" + _ERROR_C),
}


def _kernel_stamp():
    """An integer fingerprint of the kernel sources the cfuncs call into.

    numba's on-disk cache tracks only the source file of the cfunc itself;
    the fingerprint is a closure constant of every cfunc, so a change in a
    kernel module gives a new cache entry instead of stale machine code.
    """
    h = hashlib.sha256()
    for name in ("assembly", "functionals", "geometry", "mesh", "topology", "elements",
                 "quadrature", "bindings.host.embed"):
        module = importlib.import_module(f"galerkit.{name}")
        with open(module.__file__, "rb") as f:
            h.update(f.read())
    return int(h.hexdigest()[:12], 16)


def _build(stamp):
    """Compile (or load from numba's cache) every cfunc; returns name -> cfunc."""

    def sig(name):
        return SIGNATURES[name][0]

    @cfunc(sig("galerkit_pattern_count"), cache=True)
    def pattern_count(n_dofs, n_cells, n_local, cell_dofs, n_chunks, indptr):
        if _pattern_arguments_bad(stamp, n_dofs, n_cells, n_chunks, n_local):
            return E_ARGUMENT
        D = carray(cell_dofs, (n_cells, n_local))
        IP = carray(indptr, (n_dofs + 1,))
        err, row_nnz = _checked_row_counts(D, n_dofs, n_chunks)
        if err != OK:
            return err
        total = 0
        IP[0] = 0
        for i in range(n_dofs):
            if row_nnz[i] > 65536:
                return E_SIZE
            total += row_nnz[i]
            if total > 2147483647:
                return E_SIZE
            IP[i + 1] = total
        return total

    @cfunc(sig("galerkit_pattern_fill"), cache=True)
    def pattern_fill(n_dofs, n_cells, n_local, cell_dofs, n_chunks, indptr, indices, cell_order,
                     position_map, chunk_plan):
        if _pattern_arguments_bad(stamp, n_dofs, n_cells, n_chunks, n_local):
            return E_ARGUMENT
        D = carray(cell_dofs, (n_cells, n_local))
        IP = carray(indptr, (n_dofs + 1,))
        err, row_nnz = _checked_row_counts(D, n_dofs, n_chunks)
        if err != OK:
            return err
        if IP[0] != 0:
            return E_PATTERN
        for i in range(n_dofs):
            if row_nnz[i] > 65536:
                return E_SIZE
            if IP[i + 1] - IP[i] != row_nnz[i]:
                return E_PATTERN
        nnz = IP[n_dofs]
        IX = carray(indices, (nnz,))
        O = carray(cell_order, (n_cells,))
        PM = carray(position_map, (n_cells, n_local, n_local))
        CP = carray(chunk_plan, (3 * n_chunks + 1,))
        offsets, items = _incidence(D, n_dofs)
        n_blocks = max(1, min(n_dofs, 4 * n_chunks))
        _pattern_fill(D, offsets, items, n_blocks, IP, IX)
        order = _cell_order(D, n_dofs)
        for p in range(n_cells):
            O[p] = order[p]
        _position_map(D, O, IP, IX, PM)
        # row ranges with equal numbers of entries (the Assembler's rule)
        rows = np.empty(n_chunks + 1, dtype=np.int64)
        for t in range(n_chunks + 1):
            rows[t] = np.searchsorted(IP, nnz * (t / n_chunks))
        rows[0] = 0
        rows[n_chunks] = n_dofs
        for t in range(n_chunks):
            if rows[t + 1] < rows[t]:
                rows[t + 1] = rows[t]
        windows = _chunk_cells(D, O, rows)
        for t in range(n_chunks + 1):
            CP[t] = rows[t]
        for t in range(n_chunks):
            CP[n_chunks + 1 + 2 * t] = windows[t, 0]
            CP[n_chunks + 2 + 2 * t] = windows[t, 1]
        return OK

    def matrix(op):
        name = "galerkit_stiffness" if op == 0 else "galerkit_mass"

        @cfunc(sig(name), cache=True)
        def assemble(dim, degree, n_vertices, points, n_cells, cells, n_dofs, cell_dofs,
                     n_values, values, indptr, indices, cell_order, position_map, n_chunks,
                     chunk_plan, data):
            st = _counts_status(dim, degree, n_vertices, n_cells, n_dofs, n_chunks)
            if stamp < 0 or st != OK:
                return E_ARGUMENT
            if n_values != 1 and n_values != n_cells:
                return E_ARGUMENT
            idx = (dim - 2) * 4 + degree - 1
            k = _NLOCAL[dim - 2, degree - 1]
            P = carray(points, (n_vertices, dim))
            C = carray(cells, (n_cells, dim + 1))
            D = C if degree == 1 else carray(cell_dofs, (n_cells, k))
            IP = carray(indptr, (n_dofs + 1,))
            nnz = IP[n_dofs]
            if nnz < 0:
                return E_PATTERN
            IX = carray(indices, (nnz,))
            O = carray(cell_order, (n_cells,))
            PM = carray(position_map, (n_cells, k, k))
            rows, windows = _unpack_chunks(carray(chunk_plan, (3 * n_chunks + 1,)), n_chunks)
            st = _matrix_checks(P, C, D, n_dofs, IP, IX, O, PM, rows, windows, True)
            if st != OK:
                return st
            V = carray(values, (n_values, 1))
            if _first_nonfinite(V) >= 0:
                return E_COEFFICIENT
            if op == 0 and _first_not_positive(V.reshape(n_values)) >= 0:
                return E_COEFFICIENT
            out = carray(data, (nnz,))
            tensor = np.zeros((0, dim, dim))
            if op == 0 and degree == 1:
                _p1_stiffness(P, C, O, PM, IP, rows, windows, V, tensor, out)
            elif op == 0:
                R = _table(_STIFF, _STIFF_AT, idx, (1, (dim * (dim + 1)) // 2, k, k))
                _generic_matrix(P, C, D, O, PM, IP, rows, windows, 0, R, V, tensor, out)
            else:
                R = _table(_MASS, _MASS_AT, idx, (1, 1, k, k))
                _generic_matrix(P, C, D, O, PM, IP, rows, windows, 1, R, V, tensor, out)
            return OK

        return assemble

    @cfunc(sig("galerkit_load"), cache=True)
    def load(dim, degree, n_vertices, points, n_cells, cells, n_dofs, cell_dofs, source_kind,
             source, cell_order, n_chunks, chunk_plan, out):
        st = _counts_status(dim, degree, n_vertices, n_cells, n_dofs, n_chunks)
        if stamp < 0 or st != OK or source_kind < 0 or source_kind > 2:
            return E_ARGUMENT
        idx = (dim - 2) * 4 + degree - 1
        k = _NLOCAL[dim - 2, degree - 1]
        P = carray(points, (n_vertices, dim))
        C = carray(cells, (n_cells, dim + 1))
        D = C if degree == 1 else carray(cell_dofs, (n_cells, k))
        O = carray(cell_order, (n_cells,))
        rows, windows = _unpack_chunks(carray(chunk_plan, (3 * n_chunks + 1,)), n_chunks)
        st = _matrix_checks(P, C, D, n_dofs, np.zeros(1, dtype=np.int32),
                            np.zeros(1, dtype=np.int32), O, np.zeros((1, 1, 1), dtype=np.uint16),
                            rows, windows, False)
        if st != OK:
            return st
        n_src = 1 if source_kind == 0 else (n_cells if source_kind == 1 else n_dofs)
        S = carray(source, (n_src,))
        if _first_nonfinite(S) >= 0:
            return E_COEFFICIENT
        b = carray(out, (n_dofs,))
        if source_kind == 2:
            R = _table(_LOAD_DOF, _LOAD_DOF_AT, idx, (k, k))
            _generic_vector(P, C, D, O, rows, windows, 1, R, np.zeros((1, 1)), S, b)
        else:
            R = _table(_LOAD, _LOAD_AT, idx, (1, k))
            _generic_vector(P, C, D, O, rows, windows, 0, R, S.reshape(n_src, 1), np.zeros(1), b)
        return OK

    def error(mode):
        name = "galerkit_p1_l2_error" if mode == _L2 else "galerkit_p1_h1_seminorm_error"

        @cfunc(sig(name), cache=True)
        def p1_error(dim, n_vertices, points, n_cells, cells, u, u_reference, result):
            if stamp < 0 or (dim != 2 and dim != 3) or n_vertices < 1 or n_cells < 1:
                return E_ARGUMENT
            P = carray(points, (n_vertices, dim))
            C = carray(cells, (n_cells, dim + 1))
            st = _mesh_status(P, C, C, n_vertices)
            if st != OK:
                return st
            U = carray(u, (n_vertices,))
            Uref = carray(u_reference, (n_vertices,))
            if _first_nonfinite(U) >= 0 or _first_nonfinite(Uref) >= 0:
                return E_FIELD
            diff = U - Uref
            if dim == 2:
                V, dV, W = _V2, _DV2, _W2
            else:
                V, dV, W = _V3, _DV3, _W3
            nq = W.shape[0]
            total = 0.0
            for first in range(0, n_cells, BLOCK_CELLS):
                nb_ = min(n_cells, first + BLOCK_CELLS) - first
                cell_values = np.empty(nb_)
                _cell_integrals(P, C, C, first, diff, V, dV, W, np.zeros((nb_, nq)),
                                np.zeros((dim, nb_ * nq)), np.ones((1, 1)),
                                np.zeros((0, dim, dim)), np.zeros((1, 1)), mode, cell_values)
                for i in range(nb_):  # cell order: independent of the thread count
                    total += cell_values[i]
            R = carray(result, (1,))
            R[0] = np.sqrt(max(total, 0.0))
            return OK

        return p1_error

    return {
        "galerkit_pattern_count": pattern_count,
        "galerkit_pattern_fill": pattern_fill,
        "galerkit_stiffness": matrix(0),
        "galerkit_mass": matrix(1),
        "galerkit_load": load,
        "galerkit_p1_l2_error": error(_L2),
        "galerkit_p1_h1_seminorm_error": error(_H1),
    }


@lru_cache(maxsize=None)
def _compiled():
    return _build(_kernel_stamp())


def addresses():
    """``{name: address}`` of every C entry point, as Python ints.

    The first call compiles the cfuncs (tens of seconds) or loads them from
    numba's on-disk cache (about a second); later calls are free.  A C host
    reads the dict through the C API (``PyDict_GetItemString`` +
    ``PyLong_AsVoidPtr``) and casts each address to the function pointer
    type of ``galerkit.h``.  The addresses stay valid while this interpreter
    lives.

    Returns
    -------
    dict of str -> int
    """
    return {name: int(f.address) for name, f in _compiled().items()}


def ctypes_function(name):
    """A ``ctypes`` function for the entry point ``name`` (pointers as ``c_void_p``).

    Pass arrays as ``arr.ctypes.data``; the caller keeps them alive during
    the call.  Example in the module docstring.
    """
    if name not in SIGNATURES:
        from galerkit.errors import InputError

        raise InputError(f"ctypes_function: unknown entry point {name!r}; known: "
                         f"{sorted(SIGNATURES)}")
    nsig = SIGNATURES[name][0]

    def ctype(t):
        if isinstance(t, T.CPointer):
            return ctypes.c_void_p
        return {T.int32: ctypes.c_int32, T.int64: ctypes.c_int64, T.float64: ctypes.c_double}[t]

    proto = ctypes.CFUNCTYPE(ctype(nsig.return_type), *[ctype(a) for a in nsig.args])
    return proto(addresses()[name])
