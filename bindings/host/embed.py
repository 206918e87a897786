"""Array-level entry points for host codes: plain functions on the host's arrays.

A host code that keeps its own mesh arrays (``points``, ``cells``) and its own
CSR matrices uses galerkit through a handful of functions, without building a
:class:`~galerkit.Mesh` or an :class:`~galerkit.Assembler`:

* :func:`pattern` -- the symbolic phase, once per mesh: the CSR sparsity
  pattern (``indptr``, ``indices``) and the scatter *plan*, a ``dict`` of
  plain read-only NumPy arrays (cell order, position map, row ranges) that
  the host may keep, save and pass back.  Nothing in it is opaque.
* :func:`stiffness`, :func:`mass`, :func:`load` -- the numeric phase, every
  time the coefficients (or the coordinates) change: the kernel writes into
  the host's own ``data`` / ``out`` arrays.
* :func:`l2_error`, :func:`h1_seminorm_error` -- functionals on
  ``(points, cells, u)``.
* :func:`as_csr` -- a SciPy view of the host's ``data`` on the pattern.

The numeric phase runs the very numba kernels of :mod:`galerkit.assembly` and
:mod:`galerkit.functionals`, so the results equal the Assembler's (bitwise,
for the same cell table).

Zero-copy contract
------------------
Arrays are used in place when they already have the expected dtype and
layout; otherwise the call raises :class:`~galerkit.errors.InputError` naming
the expected dtype and layout (it never converts silently, since a silent
conversion would copy on every call):

===============  ===========================================  ==============
argument         dtype / layout                               shape
===============  ===========================================  ==============
``points``       float64, C-contiguous                        (n_vertices, d)
``cells``        int32 or int64, C-contiguous                 (n_cells, d + 1)
``data``         float64, C-contiguous, writeable             (nnz,)
``out``          float64, C-contiguous, writeable             (n_dofs,)
coefficients     a number, or float64 C-contiguous arrays     (n_cells,) ...
``u``            float64, C-contiguous                        (n_dofs,)
===============  ===========================================  ==============

Validation
----------
The numba kernels trust their input, so every call validates completely
before a kernel runs: dtypes, shapes, contiguity, writeability, overlap of
outputs with inputs, index ranges, finiteness, positivity of conductivities,
and non-degenerate cells (coordinates may change between calls: a moving
mesh).  A plan's contents (pattern sorted and in range, cell order a
permutation, every position-map entry pointing at the right column, row
ranges covering every cell) are checked in full the first time a plan is
seen; a plan whose arrays are all read-only (as :func:`pattern` returns them)
is remembered and not re-checked, a plan with a writeable array is
re-checked on every call.  Do not re-enable writing on a plan's arrays.

Ownership and thread safety
---------------------------
The caller allocates and owns every array it passes; galerkit keeps no
reference to them after a call returns (only :func:`pattern` allocates: the
plan's arrays, owned by the returned dict).  Each numeric call is one
parallel numba kernel (numba's threads); the functions hold no global state
besides the read-only record of checked plans, so concurrent calls from
several host threads are safe when they write to different ``data`` / ``out``
arrays and numba's threading layer is ``"omp"`` or ``"tbb"``
(``numba.threading_layer()``); under the ``"workqueue"`` layer make one call
at a time.

Examples
--------
>>> import numpy as np
>>> from galerkit.bindings.host import embed
>>> points = np.array([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0], [1.0, 1.0]])
>>> cells = np.array([[0, 1, 2], [1, 3, 2]], dtype=np.int32)
>>> indptr, indices, plan = embed.pattern(cells)
>>> data = np.empty(plan["nnz"])
>>> K = embed.stiffness(points, plan, data)
>>> K is data, float(abs(embed.as_csr(plan, data).sum(axis=1)).max()) < 1e-15
(True, True)
>>> float(embed.mass(points, plan, np.empty(plan["nnz"])).sum())
1.0
"""

from __future__ import annotations

import weakref
from functools import lru_cache

import numba as nb
import numpy as np
import scipy.sparse as sp

from galerkit.assembly import (_generic_matrix, _generic_vector, p1_stiffness_kernel, chunk_plan,
                               load_table, mass_reference, mass_table, stiffness_table,
                               symbolic_phase)
from galerkit.coefficients import evaluate_callable, tensor_values
from galerkit.dofs import Discretization
from galerkit.elements import lagrange_element
from galerkit.errors import InputError
from galerkit.functionals import _H1, _L2, BLOCK_CELLS, _cell_integrals
from galerkit.geometry import physical_points
from galerkit.mesh import DEGENERACY_TOLERANCE, Mesh, _check_cells, _geometry
from galerkit.quadrature import simplex_quadrature
from galerkit.topology import index_dtype

# A cached serial njit function that calls a parallel one (``_first_degenerate``
# -> ``_geometry`` below) links against the threading layer when it is loaded
# from numba's cache; the threads must be started before (else a crash).
nb.get_num_threads()

__all__ = ["pattern", "stiffness", "mass", "load", "as_csr", "l2_error", "h1_seminorm_error",
           "reference_tables", "check_plan"]

#: number of local nodes of P1..P4 on the triangle (dim 2) and tetrahedron (dim 3)
N_LOCAL = {2: (3, 6, 10, 15), 3: (4, 10, 20, 35)}
_INDEX_DTYPES = (np.dtype(np.int32), np.dtype(np.int64))
_PLAN_KEYS = ("dim", "degree", "n_vertices", "n_cells", "n_dofs", "nnz", "cells", "cell_dofs",
              "indptr", "indices", "cell_order", "position_map", "chunk_rows", "chunk_cells")


# ----------------------------------------------------------------------------
# validation kernels (shared with galerkit.bindings.host.cfuncs)
# ----------------------------------------------------------------------------
@nb.njit(cache=True)
def _first_nonfinite(a):
    """First index (row for 2-D arrays) holding a non-finite value, or -1."""
    flat = a.reshape(a.size)  # callers pass C-contiguous arrays
    width = a.size // a.shape[0] if a.shape[0] > 0 else 1
    for i in range(flat.shape[0]):
        v = flat[i]
        if not (v - v == 0.0):  # NaN and +-inf
            return i // width
    return -1


@nb.njit(cache=True)
def _first_not_positive(a):
    for i in range(a.shape[0]):
        if not (a[i] > 0.0):
            return i
    return -1


@nb.njit(cache=True)
def _first_degenerate(points, cells, tol):
    """First cell with |volume| <= tol * longest_edge**d (the Mesh rule), or -1."""
    m = cells.shape[0]
    d = points.shape[1]
    vol = np.empty(m)
    scale = np.empty(m)
    _geometry(points, cells, vol, scale)
    for c in range(m):
        if not (abs(vol[c]) > tol * scale[c] ** d):
            return c
    return -1


@nb.njit(cache=True)
def _pattern_status(indptr, indices, n):
    """(0, -1) for a valid CSR pattern with sorted rows; else (1 indptr | 2 indices, row)."""
    if indptr[0] != 0:
        return 1, 0
    for i in range(n):
        if indptr[i + 1] < indptr[i] or indptr[i + 1] > indices.shape[0]:
            return 1, i
    for i in range(n):
        for j in range(indptr[i], indptr[i + 1]):
            c = indices[j]
            if c < 0 or c >= n or (j > indptr[i] and c <= indices[j - 1]):
                return 2, i
    return 0, -1


@nb.njit(cache=True)
def _order_status(order, m):
    """(0, -1) when ``order`` is a permutation of 0..m-1, else (3, position)."""
    seen = np.zeros(m, dtype=np.uint8)
    for p in range(m):
        c = order[p]
        if c < 0 or c >= m or seen[c]:
            return 3, p
        seen[c] = 1
    return 0, -1


@nb.njit(cache=True, parallel=True)
def _plan_status(dofs, n_dofs, indptr, indices, order, posmap, chunk_rows, chunk_cells, scatter):
    """Check a scatter plan against the cell -> dof table.

    Returns (0, -1), or (code, where): 3 cell order not a permutation
    (position), 4 position map entry wrong (ordered cell), 5 row ranges or
    cell windows wrong (range or ordered cell).  ``scatter`` False skips the
    position map (load vectors do not use it).  ``dofs`` must be in range.
    """
    m, k = dofs.shape
    code, where = _order_status(order, m)
    if code:
        return code, where
    nch = chunk_rows.shape[0] - 1
    if nch < 1 or chunk_rows[0] != 0 or chunk_rows[nch] != n_dofs:
        return 5, 0
    for t in range(nch):
        if chunk_rows[t + 1] < chunk_rows[t] or chunk_cells[t, 0] < 0 \
                or chunk_cells[t, 0] > chunk_cells[t, 1] or chunk_cells[t, 1] > m:
            return 5, t
    n_blocks = 64
    per = (m + n_blocks - 1) // n_blocks
    bad_code = np.zeros(n_blocks, dtype=np.int64)
    bad_at = np.zeros(n_blocks, dtype=np.int64)
    for blk in nb.prange(n_blocks):
        for p in range(blk * per, min(m, (blk + 1) * per)):
            c = order[p]
            found = 0
            for a in range(k):
                row = dofs[c, a]
                # the row range owning `row` must process ordered cell p
                t = np.searchsorted(chunk_rows, row, side="right") - 1
                if p < chunk_cells[t, 0] or p >= chunk_cells[t, 1]:
                    found = 5
                    break
                if scatter:
                    base = indptr[row]
                    length = indptr[row + 1] - base
                    for b in range(k):
                        q = posmap[p, a, b]
                        if q >= length or indices[base + q] != dofs[c, b]:
                            found = 4
                            break
                    if found:
                        break
            if found:
                bad_code[blk] = found
                bad_at[blk] = p
                break
    for blk in range(n_blocks):
        if bad_code[blk]:
            return bad_code[blk], bad_at[blk]
    return 0, -1


# ----------------------------------------------------------------------------
# argument checks
# ----------------------------------------------------------------------------
def _array(a, name, where, dtypes, shape, *, writeable=False, hint=""):
    """``a`` itself when it is an ndarray of one of ``dtypes``, C-contiguous, of ``shape``.

    ``shape`` entries may be None (any length).
    """
    dtypes = tuple(np.dtype(t) for t in dtypes)
    want = " or ".join(str(t) for t in dtypes)
    shape_txt = "(" + ", ".join("n" if s is None else str(s) for s in shape) + \
        ("," if len(shape) == 1 else "") + ")"
    layout = f"a C-contiguous {want} array of shape {shape_txt}{hint}"
    if not isinstance(a, np.ndarray):
        raise InputError(
            f"{where}: {name} must be {layout}, got {type(a).__name__}; pass a NumPy array "
            "(the array-level API works in place on the host's arrays, it does not convert)")
    if a.dtype not in dtypes:
        conv = f"np.ascontiguousarray({name}, dtype=np.{dtypes[0]})"
        raise InputError(
            f"{where}: {name} has dtype {a.dtype}; expected {layout}. Convert it once with "
            f"{conv} and keep that array: a conversion at every call would copy")
    if a.ndim != len(shape) or any(s is not None and s != t for s, t in zip(shape, a.shape)):
        raise InputError(f"{where}: {name} has shape {a.shape}; expected {layout}")
    if not a.flags.c_contiguous:
        raise InputError(
            f"{where}: {name} is not C-contiguous (row-major; got a Fortran-ordered or "
            f"strided view with strides {a.strides}); expected {layout}. Pass "
            f"np.ascontiguousarray({name}) once and keep it")
    if writeable and not a.flags.writeable:
        raise InputError(f"{where}: {name} is read-only; the kernel writes into it: pass a "
                         f"writeable {layout}")
    return a


def _readonly_view(a):
    """A read-only view of ``a`` (same memory): the kernels then share the Assembler's
    compiled specialisations (numba types differ by the read-only flag)."""
    if not a.flags.writeable:
        return a
    v = a.view()
    v.flags.writeable = False
    return v


def _check_cells_array(cells, where, n_vertices=None, dim=None):
    k = None if dim is None else dim + 1
    c = _array(cells, "cells", where, _INDEX_DTYPES, (None, k),
               hint=", d + 1 = 3 vertices per triangle or 4 per tetrahedron")
    if c.shape[1] not in (3, 4):
        raise InputError(f"{where}: cells has shape {c.shape}; expected (n_cells, 3) triangles "
                         "or (n_cells, 4) tetrahedra")
    if c.shape[0] == 0:
        raise InputError(f"{where}: cells is empty; the mesh needs at least one cell")
    if n_vertices is None:
        n_vertices = int(c.max()) + 1
    first, code, count = _check_cells(c, n_vertices)
    if first >= 0:
        i = int(first)
        if code == 1:
            one_based = int(c.min()) >= 1 and int(c.max()) == n_vertices
            raise InputError(
                f"{where}: cell {i} has vertex indices {c[i].tolist()} outside "
                f"0..{n_vertices - 1} ({int(count)} such cells); indices are 0-based rows "
                "of points" + (_ONE_BASED_HINT if one_based else ""))
        raise InputError(f"{where}: cell {i} repeats a vertex {c[i].tolist()} ({int(count)} such "
                         "cells); each cell needs distinct vertices")
    return c, n_vertices


_ONE_BASED_HINT = (" (the indices run 1..n_vertices: a host numbering from 1, as in "
                   "Fortran, must pass cells - 1)")


def _refuse_unreferenced(c, n_vertices, where, what="vertex"):
    """Every index 0..n_vertices - 1 must appear in the (validated) table ``c``."""
    used = np.bincount(c.ravel(), minlength=n_vertices)
    unused = np.flatnonzero(used == 0)
    if unused.size:
        one_based = unused[0] == 0 and int(c.min()) == 1
        raise InputError(
            f"{where}: {what} {int(unused[0])} belongs to no cell ({unused.size} such, of "
            f"{n_vertices}); it would leave an empty matrix row or a value no cell uses"
            + (" (no cell uses index 0: a host numbering from 1, as in Fortran, must pass "
               "cells - 1)" if one_based else
               "; remove unused vertices (galerkit.remove_unreferenced_vertices) or pass "
               "the matching n_vertices" if what == "vertex" else
               "; u must hold exactly one value per dof of cell_dofs (plan['n_dofs'])"))


def _check_points(points, where, n_vertices, dim, cells=None):
    p = _array(points, "points", where, (np.float64,), (n_vertices, dim))
    i = _first_nonfinite(p)
    if i >= 0:
        raise InputError(f"{where}: points: vertex {i} has a non-finite coordinate "
                         f"{p[i].tolist()}; fix the coordinates")
    p = _readonly_view(p)
    if cells is not None:
        c = _first_degenerate(p, cells, DEGENERACY_TOLERANCE)
        if c >= 0:
            raise InputError(
                f"{where}: cell {c} (vertices {cells[c].tolist()}) is degenerate for these "
                f"points (|volume| <= {DEGENERACY_TOLERANCE:g} * longest_edge**{dim}); "
                "repair or remove it")
    return p


def _check_output(out, name, where, n, inputs):
    out = _array(out, name, where, (np.float64,), (n,), writeable=True)
    for label, arr in inputs:
        if arr is not None and np.may_share_memory(out, arr):
            raise InputError(f"{where}: {name} overlaps {label} in memory; the output must be "
                             "a separate array")
    return out


_checked_plans = {}  # id(position_map) -> (weakrefs of every plan array)


def _plan_refs(plan):
    return tuple(weakref.ref(plan[key]) for key in _PLAN_KEYS if isinstance(plan[key], np.ndarray))


def _remember(plan):
    refs = _plan_refs(plan)
    key = id(plan["position_map"])
    _checked_plans[key] = refs
    weakref.finalize(plan["position_map"], _checked_plans.pop, key, None)


def _known(plan):
    refs = _checked_plans.get(id(plan["position_map"]))
    if refs is None:
        return False
    arrays = [plan[key] for key in _PLAN_KEYS if isinstance(plan[key], np.ndarray)]
    return len(refs) == len(arrays) and all(r() is a and not a.flags.writeable
                                            for r, a in zip(refs, arrays))


def check_plan(plan, where="check_plan"):
    """Validate a plan (as returned by :func:`pattern`) completely.

    Every numeric call runs this; the full content check happens once for a
    plan whose arrays are all read-only, on every call otherwise.

    Parameters
    ----------
    plan : dict
        The plan of :func:`pattern` (or the same arrays rebuilt by the host,
        for example after ``np.load``).

    Returns
    -------
    dict
        The same plan.

    Raises
    ------
    InputError
        A missing key, a wrong dtype or shape, an index out of range, a
        pattern row not sorted, a cell order that is not a permutation, a
        position-map entry that does not point at its column, or row ranges
        that miss a cell; the message names the first offending row or cell.
    """
    if not isinstance(plan, dict) or any(k not in plan for k in _PLAN_KEYS):
        missing = [k for k in _PLAN_KEYS if not isinstance(plan, dict) or k not in plan]
        raise InputError(f"{where}: plan must be the dict returned by embed.pattern(); missing "
                         f"keys {missing}")
    try:
        dim, degree = int(plan["dim"]), int(plan["degree"])
        nv, m, n, nnz = (int(plan[k]) for k in ("n_vertices", "n_cells", "n_dofs", "nnz"))
    except (TypeError, ValueError) as exc:
        raise InputError(f"{where}: plan: dim, degree and the counts must be integers ({exc})") \
            from None
    if dim not in N_LOCAL or degree not in (1, 2, 3, 4):
        raise InputError(f"{where}: plan: dim {dim} / degree {degree} not supported (dim 2 or 3, "
                         "degree 1..4)")
    k = N_LOCAL[dim][degree - 1]
    idt = (np.int32, np.int64)
    cells = _array(plan["cells"], "plan['cells']", where, idt, (m, dim + 1))
    dofs = _array(plan["cell_dofs"], "plan['cell_dofs']", where, idt, (m, k))
    indptr = _array(plan["indptr"], "plan['indptr']", where, idt, (n + 1,))
    indices = _array(plan["indices"], "plan['indices']", where, idt, (nnz,))
    order = _array(plan["cell_order"], "plan['cell_order']", where, idt, (m,))
    posmap = _array(plan["position_map"], "plan['position_map']", where,
                    (np.uint8, np.uint16, np.uint32), (m, k, k))
    rows = _array(plan["chunk_rows"], "plan['chunk_rows']", where, (np.int64,), (None,))
    windows = _array(plan["chunk_cells"], "plan['chunk_cells']", where, (np.int64,),
                     (rows.shape[0] - 1, 2))
    if degree == 1 and (dofs is not cells and not np.array_equal(dofs, cells) or n != nv):
        raise InputError(f"{where}: plan: for degree 1 cell_dofs must equal cells and n_dofs "
                         "n_vertices")
    if _known(plan):
        return plan
    for name, table, bound in (("cells", cells, nv), ("cell_dofs", dofs, n)):
        first, code, _ = _check_cells(table, bound)
        if first >= 0:
            raise InputError(f"{where}: plan['{name}']: row {int(first)} = "
                             f"{table[first].tolist()} is out of range 0..{bound - 1} or repeats "
                             "an index; rebuild the plan with embed.pattern()")
    if int(indptr[n]) != nnz:
        raise InputError(f"{where}: plan['indptr'][-1] = {int(indptr[n])} but nnz = {nnz}")
    code, at = _pattern_status(indptr, indices, n)
    if code:
        what = "indptr is not non-decreasing from 0" if code == 1 else \
            "indices are not sorted, unique and within 0..n_dofs-1"
        raise InputError(f"{where}: plan: CSR pattern invalid at row {int(at)}: {what}; rebuild "
                         "it with embed.pattern()")
    code, at = _plan_status(dofs, n, indptr, indices, order, posmap, rows, windows, True)
    if code:
        what = {3: "cell_order is not a permutation of the cells (position",
                4: "position_map does not point at the columns of ordered cell",
                5: "chunk_rows / chunk_cells do not cover (range or ordered cell"}[int(code)]
        raise InputError(f"{where}: plan invalid: {what} {int(at)}); rebuild it with "
                         "embed.pattern()")
    if all(not plan[key].flags.writeable for key in _PLAN_KEYS
           if isinstance(plan[key], np.ndarray)):
        _remember(plan)
    return plan


# ----------------------------------------------------------------------------
# symbolic phase
# ----------------------------------------------------------------------------
def _symbolic(dofs, n):
    """The Assembler's symbolic phase on a bare cell -> dof table (same functions)."""
    indptr, indices, order, posmap = symbolic_phase(dofs, n)
    rows, windows = chunk_plan(dofs, order, indptr, nb.get_num_threads())
    return indptr, indices, order, posmap, rows, windows, int(indices.shape[0])


def pattern(cells, degree=1, *, points=None, n_vertices=None):
    """Symbolic phase: CSR sparsity pattern and scatter plan of a cell table.

    Parameters
    ----------
    cells : ndarray, shape (n_cells, d + 1), int32 or int64, C-contiguous
        Vertex indices (0-based) of each triangle (d = 2) or tetrahedron
        (d = 3).  Copied into the plan (the plan must not change under the
        host's feet), so the host may reuse or free its array.
    degree : int
        Lagrange degree 1..4.
    points : ndarray, shape (n_vertices, d), float64, C-contiguous, optional
        Required for degree > 1 (the dof numbering and the dof coordinates
        are built through :class:`~galerkit.Mesh` and
        :class:`~galerkit.Discretization`, which validate the mesh; cells
        with negative orientation are re-oriented there, so use the plan's
        ``cells`` and ``cell_dofs`` afterwards).  For degree 1 it only fixes
        ``n_vertices``.
    n_vertices : int, optional
        Degree 1 without points: the number of vertices (default
        ``cells.max() + 1``).  Every vertex must belong to a cell (a vertex in
        no cell would give an empty matrix row).

    Returns
    -------
    indptr : ndarray, shape (n_dofs + 1,), int32 (int64 beyond 2**31 entries)
    indices : ndarray, shape (nnz,), same dtype; each row sorted
    plan : dict
        Plain values and read-only arrays, owned by the dict:
        ``dim, degree, n_vertices, n_cells, n_dofs, nnz`` (int);
        ``cells`` (n_cells, d+1) and ``cell_dofs`` (n_cells, n_local) int32/int64
        (the same array for degree 1); ``indptr``, ``indices`` (as returned);
        ``cell_order`` (n_cells,) -- cells sorted by their smallest dof;
        ``position_map`` (n_cells, n_local, n_local) uint8 (uint16/uint32 for
        rows beyond 256/65536 entries) -- offset of column ``dof[b]`` in row
        ``dof[a]`` for each ordered cell; ``chunk_rows`` (n_chunks + 1,) and
        ``chunk_cells`` (n_chunks, 2) int64 -- row ranges, one per numba
        thread at the time of the call, and the window of ordered cells each
        range visits; for degree > 1 also ``dof_points`` (n_dofs, d) float64
        and ``n_reoriented``.

    Raises
    ------
    InputError
        Wrong dtype, layout or shape (the expected ones named), an index out
        of range, a vertex in no cell (with a hint when the cells look
        1-based, as from a Fortran host), a cell repeating a vertex, an
        invalid mesh for degree > 1.

    Notes
    -----
    Memory of the plan: ``indices`` 4 bytes per entry, ``position_map``
    ``n_local**2`` bytes per cell, ``cells`` and ``cell_order`` 4 bytes per
    index.  Thread safety: allocates only its own arrays; safe to call
    concurrently.

    Examples
    --------
    >>> import numpy as np
    >>> cells = np.array([[0, 1, 2], [1, 3, 2]], dtype=np.int32)
    >>> indptr, indices, plan = pattern(cells)
    >>> indptr.tolist(), indices.tolist()
    ([0, 3, 7, 11, 14], [0, 1, 2, 0, 1, 2, 3, 0, 1, 2, 3, 1, 2, 3])
    >>> plan["position_map"].dtype, plan["n_dofs"], plan["nnz"]
    (dtype('uint8'), 4, 14)
    """
    where = "embed.pattern"
    if isinstance(degree, bool) or not isinstance(degree, (int, np.integer)) \
            or degree not in (1, 2, 3, 4):
        raise InputError(f"{where}: degree must be an integer 1..4, got {degree!r}")
    degree = int(degree)
    dim = None
    if isinstance(cells, np.ndarray) and cells.ndim == 2 and cells.shape[1] in (3, 4):
        dim = cells.shape[1] - 1
    if points is not None:
        if dim is None:
            _check_cells_array(cells, where)  # raises with the expected layout
        _array(points, "points", where, (np.float64,), (None, dim))
        if n_vertices is not None and n_vertices != points.shape[0]:
            raise InputError(f"{where}: n_vertices={n_vertices} but points has "
                             f"{points.shape[0]} rows; give one of them")
        n_vertices = points.shape[0]
    elif degree > 1:
        raise InputError(f"{where}: degree {degree} needs points= (the dof numbering and dof "
                         "coordinates are built on the mesh); pass the (n_vertices, d) float64 "
                         "coordinates")
    if n_vertices is not None and (isinstance(n_vertices, bool) or not isinstance(
            n_vertices, (int, np.integer)) or n_vertices < 1):
        raise InputError(f"{where}: n_vertices must be a positive integer, got {n_vertices!r}")
    c, nv = _check_cells_array(cells, where, n_vertices)
    _refuse_unreferenced(c, nv, where)
    dim = c.shape[1] - 1
    extra = {}
    if degree == 1:
        if points is not None:
            _check_points(points, where, nv, dim, c)
        vcells = np.array(c, dtype=index_dtype(nv), order="C", copy=True)
        dofs, n = vcells, nv
    else:
        disc = Discretization(Mesh(points, c), degree)
        vcells, dofs, n = disc.mesh.cells, disc.cell_dofs, disc.n_dofs
        extra = {"dof_points": disc.dof_points, "n_reoriented": disc.mesh.n_reoriented}
    indptr, indices, order, posmap, rows, windows, nnz = _symbolic(dofs, n)
    plan = {"dim": dim, "degree": degree, "n_vertices": nv, "n_cells": c.shape[0],
            "n_dofs": n, "nnz": nnz, "cells": vcells, "cell_dofs": dofs, "indptr": indptr,
            "indices": indices, "cell_order": order, "position_map": posmap,
            "chunk_rows": rows, "chunk_cells": windows, **extra}
    for value in plan.values():
        if isinstance(value, np.ndarray):
            value.flags.writeable = False
    _remember(plan)
    return indptr, indices, plan


def as_csr(plan, data):
    """A ``scipy.sparse.csr_array`` on the plan's pattern that shares ``data``.

    Parameters
    ----------
    plan : dict from :func:`pattern`
    data : ndarray, shape (nnz,), float64, C-contiguous

    Returns
    -------
    csr_array, shape (n_dofs, n_dofs)
        No copy: ``A.data`` is ``data``, ``A.indptr`` / ``A.indices`` are the
        plan's (read-only) arrays.  Owned by the caller like ``data``.
    """
    where = "embed.as_csr"
    plan = check_plan(plan, where)
    data = _array(data, "data", where, (np.float64,), (plan["nnz"],))
    n = plan["n_dofs"]
    A = sp.csr_array((data, plan["indices"], plan["indptr"]), shape=(n, n), copy=False)
    A.has_sorted_indices = True
    A.has_canonical_format = True
    return A


# ----------------------------------------------------------------------------
# reference tables (as the Assembler builds them for per-cell coefficients)
# ----------------------------------------------------------------------------
@lru_cache(maxsize=None)
def reference_tables(dim, degree):
    """Reference-cell tables of the numeric kernels, for constant per-cell coefficients.

    The same arithmetic as :class:`~galerkit.Assembler` (so results agree
    bitwise).  Read-only float64 arrays:

    ``stiffness`` (1, n_pairs, k, k): ``sum_q w_q (d_r phi_a d_s phi_b [+ (s, r)])``,
    pairs r <= s, exact degree 2k - 2; ``mass`` (1, 1, k, k), exact degree 2k;
    ``load`` (1, k): integrals of the basis (degree k); ``load_dof`` (k, k):
    the reference mass matrix used for a dof-vector source.

    Examples
    --------
    >>> t = reference_tables(2, 1)
    >>> t["mass"].shape, round(float(t["mass"].sum()), 15)
    ((1, 1, 3, 3), 0.5)
    """
    k = degree
    stiff = stiffness_table(dim, k, max(2 * k - 2, 0)).sum(axis=0, keepdims=True)
    mass = np.ascontiguousarray(mass_table(dim, k, 2 * k).sum(axis=0, keepdims=True))
    load_dof = np.array(mass_reference(dim, k))
    load = np.ascontiguousarray(load_table(dim, k, k).sum(axis=0, keepdims=True))
    out = {"stiffness": stiff, "mass": mass, "load": load, "load_dof": load_dof}
    for a in out.values():
        a.flags.writeable = False
    return out


# ----------------------------------------------------------------------------
# numeric phase
# ----------------------------------------------------------------------------
def _number(value, name, where, positive):
    if isinstance(value, np.ndarray) and value.ndim == 0:
        value = value.item()
    if isinstance(value, (bool, np.bool_)) or not np.isscalar(value) or isinstance(value, str) \
            or np.iscomplexobj(value):
        return None
    v = float(value)
    if not np.isfinite(v) or (positive and not v > 0):
        raise InputError(f"{where}: {name} = {value!r}; expected a finite "
                         f"{'positive ' if positive else ''}number")
    return np.full((1, 1), v)


def _cell_values(value, m, name, where, positive):
    """(1, 1) or (m, 1) float64 (a view of the host's array when given one)."""
    v = _number(value, name, where, positive)
    if v is not None:
        return v
    a = _array(value, name, where, (np.float64,), (m,),
               hint=" (one value per cell), or a number")
    i = _first_nonfinite(a)
    if i >= 0:
        raise InputError(f"{where}: {name}: non-finite value {float(a[i])} in cell {i}")
    if positive:
        i = _first_not_positive(a)
        if i >= 0:
            raise InputError(f"{where}: {name}: non-positive value {float(a[i])} in cell {i}; "
                             "conductivities must be > 0")
    return a.reshape(m, 1)


def _plan_inputs(plan):
    return [(f"plan['{key}']", plan[key]) for key in _PLAN_KEYS
            if isinstance(plan[key], np.ndarray)]


def _setup(points, plan, where):
    plan = check_plan(plan, where)
    p = _check_points(points, where, plan["n_vertices"], plan["dim"], plan["cells"])
    return plan, p


def stiffness(points, plan, data, conductivity=1.0):
    """Numeric phase: stiffness matrix of ``integral(kappa grad u . grad v)`` into ``data``.

    Parameters
    ----------
    points : ndarray, shape (n_vertices, d), float64, C-contiguous
        Coordinates; may change between calls (the plan is topological).
    plan : dict from :func:`pattern`
    data : ndarray, shape (nnz,), float64, C-contiguous, writeable
        Overwritten with the matrix values on the plan's pattern (CSR order).
    conductivity : float, ndarray (n_cells,) float64, ndarray (d, d) or (n_cells, d, d) float64
        Positive constant, per-cell values, or a symmetric positive definite
        tensor (constant or per cell).  Arrays are read in place.

    Returns
    -------
    ndarray
        ``data`` itself.

    Raises
    ------
    InputError
        See the module notes: dtype/layout/shape, non-finite or non-positive
        conductivity (first cell named), degenerate cells, invalid plan.

    Notes
    -----
    Ownership: the caller allocates and frees ``data``; galerkit keeps no
    reference.  Thread safety: one parallel kernel; concurrent calls are safe
    on distinct ``data`` arrays (see the module notes on threading layers).
    """
    where = "embed.stiffness"
    plan, p = _setup(points, plan, where)
    d, m, k = plan["dim"], plan["n_cells"], plan["degree"]
    tensor = None
    if isinstance(conductivity, np.ndarray) and conductivity.ndim >= 2:
        _array(conductivity, "conductivity", where, (np.float64,),
               (d, d) if conductivity.ndim == 2 else (m, d, d),
               hint=" (a symmetric positive definite tensor)")
        tensor = tensor_values(conductivity, m, d, f"{where}: conductivity")
        kappa = np.ones((1, 1))
    else:
        kappa = _cell_values(conductivity, m, "conductivity", where, True)
        tensor = np.zeros((0, d, d))
    data = _check_output(data, "data", where, plan["nnz"],
                         [("points", p), ("conductivity", kappa), ("conductivity", tensor)]
                         + _plan_inputs(plan))
    rows, windows = plan["chunk_rows"], plan["chunk_cells"]
    if k == 1:
        p1_stiffness_kernel(d)(p, plan["cells"], plan["cell_order"], plan["position_map"],
                               plan["indptr"], rows, windows, kappa, tensor, data)
    else:
        R = reference_tables(d, k)["stiffness"]
        _generic_matrix(p, plan["cells"], plan["cell_dofs"], plan["cell_order"],
                        plan["position_map"], plan["indptr"], rows, windows, 0, R, kappa, tensor,
                        data)
    return data


def mass(points, plan, data, coefficient=1.0):
    """Numeric phase: mass matrix of ``integral(c u v)`` into ``data``.

    Parameters
    ----------
    points : ndarray, shape (n_vertices, d), float64, C-contiguous
    plan : dict from :func:`pattern`
    data : ndarray, shape (nnz,), float64, C-contiguous, writeable
        Overwritten (CSR order of the plan's pattern).
    coefficient : float or ndarray (n_cells,) float64
        Any finite values (capacity, reaction).

    Returns
    -------
    ndarray
        ``data`` itself.  Ownership and thread safety as :func:`stiffness`.
    """
    where = "embed.mass"
    plan, p = _setup(points, plan, where)
    coef = _cell_values(coefficient, plan["n_cells"], "coefficient", where, False)
    data = _check_output(data, "data", where, plan["nnz"],
                         [("points", p), ("coefficient", coef)] + _plan_inputs(plan))
    R = reference_tables(plan["dim"], plan["degree"])["mass"]
    _generic_matrix(p, plan["cells"], plan["cell_dofs"], plan["cell_order"], plan["position_map"],
                    plan["indptr"], plan["chunk_rows"], plan["chunk_cells"], 1, R, coef,
                    np.zeros((0, plan["dim"], plan["dim"])), data)
    return data


def load(points, plan, out, source=1.0, *, kind=None):
    """Numeric phase: load vector of ``integral(f v)`` into ``out``.

    Parameters
    ----------
    points : ndarray, shape (n_vertices, d), float64, C-contiguous
    plan : dict from :func:`pattern`
    out : ndarray, shape (n_dofs,), float64, C-contiguous, writeable
        Overwritten.
    source : float, or ndarray (n_cells,) or (n_dofs,) float64
        A constant, per-cell values, or dof values (the load of their finite
        element interpolant, exactly ``M @ source``).
    kind : {None, "cell", "dof"}
        Needed only when ``n_cells == n_dofs`` makes the array ambiguous.

    Returns
    -------
    ndarray
        ``out`` itself.  Ownership and thread safety as :func:`stiffness`.
    """
    where = "embed.load"
    plan, p = _setup(points, plan, where)
    m, n = plan["n_cells"], plan["n_dofs"]
    if kind not in (None, "cell", "dof"):
        raise InputError(f"{where}: kind must be None, 'cell' or 'dof', got {kind!r}")
    tables = reference_tables(plan["dim"], plan["degree"])
    coef = _number(source, "source", where, False)
    if coef is None:
        length = getattr(source, "shape", (None,))[0] if getattr(source, "ndim", 0) == 1 else None
        if kind is None:
            if m == n and length == n:
                raise InputError(f"{where}: source has {n} values and the mesh has {m} cells "
                                 f"and {n} dofs; say kind='cell' or kind='dof'")
            kind = "dof" if length == n else "cell"
        if kind == "dof":
            f = _array(source, "source", where, (np.float64,), (n,),
                       hint=" (one value per dof), a number, or per-cell values")
            i = _first_nonfinite(f)
            if i >= 0:
                raise InputError(f"{where}: source: non-finite value {float(f[i])} at dof {i}")
            out = _check_output(out, "out", where, n,
                                [("points", p), ("source", f)] + _plan_inputs(plan))
            _generic_vector(p, plan["cells"], plan["cell_dofs"], plan["cell_order"],
                            plan["chunk_rows"], plan["chunk_cells"], 1, tables["load_dof"],
                            np.zeros((1, 1)), f, out)
            return out
        coef = _cell_values(source, m, "source", where, False)
    out = _check_output(out, "out", where, n,
                        [("points", p), ("source", coef)] + _plan_inputs(plan))
    _generic_vector(p, plan["cells"], plan["cell_dofs"], plan["cell_order"], plan["chunk_rows"],
                    plan["chunk_cells"], 0, tables["load"], coef, np.zeros(1), out)
    return out


# ----------------------------------------------------------------------------
# functionals
# ----------------------------------------------------------------------------
def _functional(points, cells, u, reference, cell_dofs, quadrature_degree, mode, where):
    c, nv = _check_cells_array(cells, where, points.shape[0] if isinstance(points, np.ndarray)
                               and points.ndim == 2 else None)
    d = c.shape[1] - 1
    p = _check_points(points, where, nv, d, c)
    c = _readonly_view(c)
    if cell_dofs is None:
        dofs, degree = c, 1
    else:
        dofs = _array(cell_dofs, "cell_dofs", where, _INDEX_DTYPES, (c.shape[0], None))
        if dofs.shape[1] not in N_LOCAL[d]:
            raise InputError(f"{where}: cell_dofs has {dofs.shape[1]} columns; expected one of "
                             f"{N_LOCAL[d]} (P1..P4 in {d}D)")
        degree = N_LOCAL[d].index(dofs.shape[1]) + 1
        dofs = _readonly_view(dofs)
    u = _array(u, "u", where, (np.float64,), (None,), hint=" (one value per dof)")
    n = u.shape[0]
    if cell_dofs is None and n != nv:
        raise InputError(
            f"{where}: u has {n} values but the mesh has {nv} vertices; without cell_dofs u "
            "must be a P1 vector (one value per vertex). For degree 2..4 pass "
            "cell_dofs=plan['cell_dofs'] of embed.pattern(cells, degree, points=points)")
    first, code, _ = _check_cells(dofs, n)
    if first >= 0:
        raise InputError(f"{where}: cell_dofs row {int(first)} = {dofs[first].tolist()} is out "
                         f"of range 0..{n - 1} for u of length {n}, or repeats a dof")
    if cell_dofs is not None:
        _refuse_unreferenced(dofs, n, where + f" (u of length {n}, cell_dofs)", what="dof")
    i = _first_nonfinite(u)
    if i >= 0:
        raise InputError(f"{where}: u: non-finite value {float(u[i])} at dof {i}")
    exact = None
    if callable(reference):
        exact = reference
    else:
        ref = _array(reference, "the reference", where, (np.float64,), (n,),
                     hint=" (reference dof values), or a callable")
        i = _first_nonfinite(ref)
        if i >= 0:
            raise InputError(f"{where}: reference: non-finite value {float(ref[i])} at dof {i}")
        u = u - ref  # error of the interpolants: integrate the difference against zero
    deg = 2 * degree + 2 if quadrature_degree is None else int(quadrature_degree)
    rule = simplex_quadrature(d, deg)
    el = lagrange_element(d, degree)
    V, dV, nq = el.tabulate(rule.points), el.tabulate_gradients(rule.points), rule.n_points
    m = c.shape[0]
    total = np.empty(m)
    for first in range(0, m, BLOCK_CELLS):
        last = min(m, first + BLOCK_CELLS)
        nb_ = last - first
        ex, exg = np.zeros((nb_, nq)), np.zeros((d, nb_ * nq))
        if exact is not None:
            x = physical_points(p, c[first:last], rule.points)
            if mode == _L2:
                ex = evaluate_callable(exact, x, f"{where}: exact").reshape(nb_, nq)
            else:
                try:
                    g = np.asarray(exact(x), dtype=np.float64)
                except Exception as exc:
                    raise InputError(f"{where}: exact_gradient failed on points of shape "
                                     f"{x.shape}: {exc}") from exc
                if g.shape != (d, x.shape[1]) or _first_nonfinite(g.reshape(-1)) >= 0:
                    raise InputError(f"{where}: exact_gradient returned shape {g.shape} or "
                                     f"non-finite values; expected finite ({d}, {x.shape[1]})")
                exg = np.ascontiguousarray(g)
        out = np.empty(nb_)
        _cell_integrals(p, c, dofs, first, u, V, dV, rule.weights, ex, exg, np.ones((1, 1)),
                        np.zeros((0, d, d)), np.zeros((1, 1)), mode, out)
        total[first:last] = out
    return float(np.sqrt(max(total.sum(), 0.0)))


def l2_error(points, cells, u, exact, *, cell_dofs=None, quadrature_degree=None):
    """``||u_h - exact||_{L2}`` of a field given on the host's arrays.

    Parameters
    ----------
    points : ndarray, shape (n_vertices, d), float64, C-contiguous
    cells : ndarray, shape (n_cells, d + 1), int32 or int64, C-contiguous
        For degree > 1 pass the plan's ``cells`` (local node order matters).
    u : ndarray, shape (n_dofs,), float64, C-contiguous
        Nodal values (P1: one per vertex).
    exact : callable or ndarray (n_dofs,) float64
        ``exact(x)`` with ``x`` (d, n) returning (n,); or reference dof values
        (then the error between the two interpolants, exact in quadrature).
    cell_dofs : ndarray (n_cells, n_local) int32 or int64, optional
        Degree > 1: the plan's ``cell_dofs`` (the degree follows from n_local).
    quadrature_degree : int, optional
        Default ``2k + 2``.

    Returns
    -------
    float

    Notes
    -----
    Allocates only temporaries; reads the host's arrays in place.  Safe to
    call concurrently (see the module notes on threading layers).

    Examples
    --------
    >>> import numpy as np
    >>> points = np.array([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0], [1.0, 1.0]])
    >>> cells = np.array([[0, 1, 2], [1, 3, 2]], dtype=np.int32)
    >>> round(l2_error(points, cells, np.ones(4), np.zeros(4)), 14)
    1.0
    """
    return _functional(points, cells, u, exact, cell_dofs, quadrature_degree, _L2,
                       "embed.l2_error")


def h1_seminorm_error(points, cells, u, exact_gradient, *, cell_dofs=None,
                      quadrature_degree=None):
    """``|u_h - exact|_{H1} = ||grad u_h - grad exact||_{L2}`` on the host's arrays.

    Parameters as :func:`l2_error`, except ``exact_gradient``: a callable
    ``g(x)`` with ``x`` (d, n) returning (d, n), or reference dof values
    (n_dofs,) whose interpolant's gradient is compared.

    Returns
    -------
    float

    Examples
    --------
    >>> import numpy as np
    >>> points = np.array([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0], [1.0, 1.0]])
    >>> cells = np.array([[0, 1, 2], [1, 3, 2]], dtype=np.int32)
    >>> round(h1_seminorm_error(points, cells, points[:, 0].copy(), np.zeros(4)), 14)
    1.0
    """
    return _functional(points, cells, u, exact_gradient, cell_dofs, quadrature_degree, _H1,
                       "embed.h1_seminorm_error")
