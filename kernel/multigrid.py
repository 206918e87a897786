"""Native algebraic multigrid: smoothed aggregation with a Chebyshev smoother,
p-multigrid on top for degrees 2-4, and the CG loop, all in compiled code.

Method
------
**Smoothed aggregation** (Vaněk, Mandel & Brezina, Computing 56, 1996) for
the SPD matrices of scalar diffusion:

* *strength of connection*: ``j`` is a strong neighbour of ``i`` when
  ``a_ij**2 > theta_l**2 * |a_ii a_jj|``, ``theta_l = theta * 0.5**l`` on level
  ``l`` (the paper's rule of halving per level, its ``epsilon = 0.08 * (1/2)**l``
  recalled from memory).  Our default ``theta = 0.02`` is a measured choice:
  on structured and Delaunay meshes in 2D and 3D it gave the lowest set-up +
  solve time of 0, 0.02, 0.04 and 0.08 (0.08 keeps the strong graph sparse on
  Delaunay tetrahedra, aggregates of ~8 nodes and an operator complexity of
  2.2 against 1.2; ``benchmarks/README.md``);
* *aggregation*: the paper's three passes (whole strong neighbourhoods of
  untouched nodes; remaining nodes join the neighbouring aggregate they are
  most strongly coupled to; leftovers form aggregates of their own);
* *larger first aggregates* (option ``aggregate_radius``): on the first
  aggregation level, pass 1 may take neighbourhoods of radius 2 in the
  strong graph (the aggregate grows by the root's neighbours' strong
  neighbours).  "auto" does so where radius-1 aggregates would have more
  than 7 neighbouring aggregates on average (tetrahedral meshes, never a
  planar graph), except under p-multigrid's P1 level: on the 1M-dof structured unit cube the operator
  complexity falls from 1.57 to 1.22 at 14 -> 15 CG iterations, while on
  the unit square radius 2 would cost 15 -> 17 (``benchmarks/
  aggregation_variants.py``, which also holds the rejected variants:
  prolongator truncation after Stüben 2001, aggregates of aggregates);
* *tentative prolongator* ``P0``: the constant on each aggregate (the
  near-kernel of scalar diffusion);
* *prolongator smoothing* ``P = (I - (4/3) D1^{-1} A) P0``, with ``D1`` the
  l1 row sums ``sum_j |a_ij|`` (Baker, Falgout, Kolev & Yang, SIAM J. Sci.
  Comput. 33, 2011).  ``D1 - A`` is diagonally dominant, so
  ``lambda_max(D1^{-1} A) <= 1`` is *guaranteed* and no eigenvalue estimate
  is needed; for an M-matrix row with zero sum ``D1 = 2 a_ii`` and the damping
  is the paper's ``4/3 / rho(D^{-1} A)``;
* *Galerkin coarse operators* ``A_c = P^T A P`` (row-parallel SpGEMM,
  :mod:`galerkit.sparse`);
* *coarsest level*: a dense Cholesky factorisation (at most ``max_coarse``
  unknowns), or, when coarsening stalls above that size, smoother sweeps.

**Smoother**: Chebyshev polynomials in ``D1^{-1} A`` on the interval
``[lower * lambda, lambda]`` with ``lambda = 1`` (the guaranteed bound above;
Adams, Brezina, Hu & Tuminaro, J. Comput. Phys. 188, 2003).  A polynomial in
``D1^{-1} A`` times ``D1^{-1}`` is symmetric, the same polynomial is used
before and after the coarse correction, and it reduces every error component
(``|1 - lambda q(lambda)| < 1`` on ``(0, 1]``), so the V-cycle is a symmetric
positive definite preconditioner: plain CG applies.

**p-multigrid** (degrees 2-4): the P_k space on a mesh contains P1 on the
same mesh.  The first coarse space is P1, reached by the nested
interpolation (:func:`p1_interpolation`: each P_k node takes the barycentric
coordinates of its cell's vertices); ``A_1 = I^T A_k I`` is the Galerkin
product, smoothing runs on P_k, and the aggregation hierarchy above takes
over on P1.

Determinism: every kernel is row-parallel or reduces in fixed blocks
(:mod:`galerkit.sparse`); aggregation is serial.  Set-up and solves are
bitwise the same for any number of threads.

Reuse: a :class:`Hierarchy` keeps its aggregates; :meth:`Hierarchy.refresh`
recomputes only the values (prolongators, coarse operators, Cholesky factor)
for a matrix with the same pattern, for time loops and coefficient updates.
"""

from __future__ import annotations

import math
import time

import numba as nb
import numpy as np
import scipy.sparse as sp
from numba import types as _nbt
from numba.typed import List

from . import compilation
from .compilation import by_size
from .errors import InputError
from .sparse import (_chunks, cg_update, dot, matvec_add_into, matvec_into, residual_into,
                     spgemm, transpose, xpby_into)

__all__ = ["Hierarchy", "build_hierarchy", "p1_interpolation", "p1_coarse_space", "DEFAULTS"]

#: Set-up defaults of :func:`build_hierarchy` (the options of solver "cg-amg").
DEFAULTS = {
    "theta": 0.02,          # strength threshold on level 0, halved per level
    "max_coarse": 400,      # dense Cholesky at or below this size
    "max_levels": 20,
    "smoother_degree": 2,   # Chebyshev degree (matrix-vector products per sweep)
    # lower end of the Chebyshev interval, fraction of lambda; measured on the
    # 1M-dof unit square / cube (benchmarks/compare_solvers.py): 0.12 -> 16 / 14
    # CG iterations, 0.15 -> 15 / 14, 0.18 and 0.22 -> 15 / 15
    "smoother_lower": 0.15,
    "fine_smoother_degree": 3,  # the same on a P_k level of p-multigrid (degree >= 2)
    # aggregates of the first aggregation level: radius 1 or 2 in the strong graph,
    # or "auto" (2 where radius-1 aggregates have more than AUTO_RADIUS_ENTRIES - 1
    # neighbouring aggregates on average, see build_hierarchy)
    "aggregate_radius": "auto",
}

#: "auto" radius: radius 2 on the first aggregation level when the tentative coarse
#: pattern (P0^T A P0, radius-1 aggregates) has more entries per row than this.  A
#: planar matrix graph (P1 on triangles) contracts to a planar aggregate graph, whose
#: mean degree is below 6 (Euler's formula), so 2D P1 never exceeds 7 entries per
#: row; measured 6.9 on structured triangles, 11.6 on structured tetrahedra.
AUTO_RADIUS_ENTRIES = 8.0

#: Above this size the coarsest level is not factorised densely.
_MAX_DENSE = 4000


# ----------------------------------------------------------------------------
# set-up kernels
# ----------------------------------------------------------------------------
@nb.njit(cache=True, parallel=True)
def _prune_counts(indptr, data):
    n = indptr.shape[0] - 1
    cnt = np.zeros(n + 1, dtype=np.int64)
    for i in nb.prange(n):
        c = 0
        for k in range(indptr[i], indptr[i + 1]):
            if data[k] != 0.0:
                c += 1
        cnt[i + 1] = c
    return cnt


@nb.njit(cache=True, parallel=True)
def _prune_fill(indptr, indices, data, new_ptr, new_ind, new_val):
    n = indptr.shape[0] - 1
    for i in nb.prange(n):
        m = new_ptr[i]
        for k in range(indptr[i], indptr[i + 1]):
            if data[k] != 0.0:
                new_ind[m] = indices[k]
                new_val[m] = data[k]
                m += 1


@nb.njit(cache=True, parallel=True)
def _prune_values(indptr, data, new_ptr, new_val):
    """Numeric refresh of a pruned copy: the same kept positions, new values."""
    n = indptr.shape[0] - 1
    for i in nb.prange(n):
        m = new_ptr[i]
        for k in range(indptr[i], indptr[i + 1]):
            if data[k] != 0.0:
                new_val[m] = data[k]
                m += 1


@nb.njit(cache=True, parallel=True)
def _diagonal_and_l1(indptr, indices, data, diag, l1):
    """Diagonal and l1 row sums; returns the first row with no positive diagonal, or -1."""
    n = indptr.shape[0] - 1
    bad = np.full(n, False)
    for i in nb.prange(n):
        d = 0.0
        s = 0.0
        for k in range(indptr[i], indptr[i + 1]):
            v = data[k]
            s += abs(v)
            if indices[k] == i:
                d += v
        diag[i] = d
        l1[i] = s
        bad[i] = not d > 0.0
    for i in range(n):
        if bad[i]:
            return i
    return -1


@nb.njit(cache=True)
def _aggregate(indptr, indices, data, diag, theta, radius):
    """Three-pass aggregation of Vaněk, Mandel & Brezina (1996).

    ``radius`` 1 is the paper's rule; with ``radius`` 2 a pass-1 aggregate
    also takes the untouched strong neighbours of the root's strong
    neighbours (neighbourhoods of radius 2 in the strong graph, the larger
    aggregates the paper allows for; passes 2 and 3 unchanged).
    Returns ``(agg, n_agg)``: the aggregate of every node (every node gets
    one; isolated nodes are aggregates of their own).
    """
    n = indptr.shape[0] - 1
    t2 = theta * theta
    agg = np.full(n, -1, dtype=np.int32)
    na = 0
    # pass 1: untouched nodes whose strong neighbourhood is untouched
    for i in range(n):
        if agg[i] != -1:
            continue
        free = True
        has = False
        for k in range(indptr[i], indptr[i + 1]):
            j = indices[k]
            if j != i and data[k] * data[k] > t2 * abs(diag[i] * diag[j]):
                has = True
                if agg[j] != -1:
                    free = False
                    break
        if free and has:
            agg[i] = na
            for k in range(indptr[i], indptr[i + 1]):
                j = indices[k]
                if j != i and data[k] * data[k] > t2 * abs(diag[i] * diag[j]):
                    agg[j] = na
            if radius > 1:  # the second ring: strong neighbours of the first
                for k in range(indptr[i], indptr[i + 1]):
                    j = indices[k]
                    if j == i or agg[j] != na:
                        continue
                    for kk in range(indptr[j], indptr[j + 1]):
                        m = indices[kk]
                        if agg[m] == -1 and data[kk] * data[kk] > t2 * abs(diag[j] * diag[m]):
                            agg[m] = na
            na += 1
    # pass 2: join the pass-1 aggregate of the strongest strong neighbour
    first = agg.copy()
    for i in range(n):
        if agg[i] != -1:
            continue
        best = -1
        bestv = 0.0
        for k in range(indptr[i], indptr[i + 1]):
            j = indices[k]
            if j != i and first[j] != -1:
                s = data[k] * data[k]
                if s > t2 * abs(diag[i] * diag[j]) and s > bestv:
                    bestv = s
                    best = first[j]
        if best != -1:
            agg[i] = best
    # pass 3: leftovers with their untouched strong neighbours
    for i in range(n):
        if agg[i] != -1:
            continue
        agg[i] = na
        for k in range(indptr[i], indptr[i + 1]):
            j = indices[k]
            if j != i and agg[j] == -1 and data[k] * data[k] > t2 * abs(diag[i] * diag[j]):
                agg[j] = na
        na += 1
    return agg, na


@nb.njit(cache=True)
def _aggregate_pattern_entries(indptr, indices, agg, n_agg):
    """Entries of the pattern of ``P0^T A P0`` (pairs of aggregates linked by an
    entry of A, each aggregate with itself included)."""
    n = indptr.shape[0] - 1
    start = np.zeros(n_agg + 1, dtype=np.int64)
    for i in range(n):
        start[agg[i] + 1] += 1
    for a in range(n_agg):
        start[a + 1] += start[a]
    fill = start[:-1].copy()
    nodes = np.empty(n, dtype=np.int64)
    for i in range(n):
        nodes[fill[agg[i]]] = i
        fill[agg[i]] += 1
    mark = np.full(max(n_agg, 1), -1, dtype=np.int64)
    total = 0
    for a in range(n_agg):
        mark[a] = a
        total += 1
        for p in range(start[a], start[a + 1]):
            i = nodes[p]
            for k in range(indptr[i], indptr[i + 1]):
                b = agg[indices[k]]
                if mark[b] != a:
                    mark[b] = a
                    total += 1
    return total


def _smoothed_prolongator(indptr, indices, data, l1, omega, agg, n_agg):
    """``P = (I - omega D1^{-1} A) P0`` with ``P0`` the aggregates' constants.

    Row ``i`` of ``P`` holds, for each aggregate ``J`` met in row ``i`` of
    ``A``, the sum of ``delta_ij - omega a_ij / l1_i`` over the columns ``j``
    of ``J``.  Two passes over chunks of rows (count, then columns and values
    together), neither the smoothing operator nor ``P0`` is stored; the
    columns and the summation order are those of the product of the two
    (first appearance in A's row), the same for any thread count.
    """
    nchunk = _chunks(indptr.shape[0] - 1)
    p_ptr = by_size(_prolongator_count, indices.shape[0])(indptr, indices, agg, n_agg, nchunk)
    p_ind = np.empty(p_ptr[-1], dtype=np.int32)
    p_val = np.empty(p_ptr[-1], dtype=np.float64)
    by_size(_prolongator_fill, indices.shape[0])(indptr, indices, data, l1, omega, agg, n_agg,
                                                 nchunk, p_ptr, p_ind, p_val)
    return p_ptr, p_ind, p_val


@nb.njit(cache=True, parallel=True)
def _prolongator_count(indptr, indices, agg, n_agg, nchunk):
    n = indptr.shape[0] - 1
    csize = (n + nchunk - 1) // nchunk
    counts = np.zeros(n + 1, dtype=np.int64)
    for c in nb.prange(nchunk):
        mark = np.full(max(n_agg, 1), -1, dtype=np.int32)
        for i in range(c * csize, min((c + 1) * csize, n)):
            m = 0
            for k in range(indptr[i], indptr[i + 1]):
                J = agg[indices[k]]
                if mark[J] != i:
                    mark[J] = i
                    m += 1
            counts[i + 1] = m
    p_ptr = np.empty(n + 1, dtype=np.int64)
    p_ptr[0] = 0
    for i in range(n):
        p_ptr[i + 1] = p_ptr[i] + counts[i + 1]
    return p_ptr


@nb.njit(cache=True, parallel=True)
def _prolongator_fill(indptr, indices, data, l1, omega, agg, n_agg, nchunk, p_ptr, p_ind, p_val):
    n = indptr.shape[0] - 1
    csize = (n + nchunk - 1) // nchunk
    for c in nb.prange(nchunk):
        slot = np.full(max(n_agg, 1), -1, dtype=np.int64)
        for i in range(c * csize, min((c + 1) * csize, n)):
            scale = omega / l1[i]
            start = p_ptr[i]
            m = start
            for k in range(indptr[i], indptr[i + 1]):
                v = -scale * data[k]
                if indices[k] == i:
                    v += 1.0
                J = agg[indices[k]]
                q = slot[J]
                if q < start:
                    slot[J] = m
                    p_ind[m] = J
                    p_val[m] = 0.0 + v
                    m += 1
                else:
                    p_val[q] += v


# ----------------------------------------------------------------------------
# cycle kernels
# ----------------------------------------------------------------------------
@nb.njit(cache=True, parallel=True)
def _copy_into(src, dst):
    for i in nb.prange(dst.shape[0]):
        dst[i] = src[i]


@nb.njit(cache=True, parallel=True)
def _scaled_into(dinv, r, c, d, x, zero_start):
    """``d = c * dinv * r``, then ``x = d`` (zero start) or ``x += d``."""
    for i in nb.prange(d.shape[0]):
        di = c * dinv[i] * r[i]
        d[i] = di
        if zero_start:
            x[i] = di
        else:
            x[i] += di


@nb.njit(cache=True, parallel=True)
def _subtract_product(indptr, indices, data, d, r):
    """``r -= A @ d``."""
    n = indptr.shape[0] - 1
    for i in nb.prange(n):
        s = 0.0
        for k in range(indptr[i], indptr[i + 1]):
            s += data[k] * d[indices[k]]
        r[i] -= s


@nb.njit(cache=True, parallel=True)
def _chebyshev_step(dinv, r, c1, c2, d, x):
    """``d = c1 d + c2 dinv r``; ``x += d``."""
    for i in nb.prange(d.shape[0]):
        di = c1 * d[i] + c2 * dinv[i] * r[i]
        d[i] = di
        x[i] += di


@nb.njit(cache=True)
def _chebyshev(ptr, ind, val, dinv, b, x, r, d, lo, hi, steps, zero_start, end_residual):
    """Chebyshev smoothing of ``A x = b`` preconditioned by ``dinv`` on ``[lo, hi]``.

    Saad, *Iterative Methods for Sparse Linear Systems* (2003), Algorithm
    12.1.  ``steps`` polynomial degree; with ``end_residual`` the final
    residual ``b - A x`` is left in ``r``.
    """
    theta = 0.5 * (hi + lo)
    delta = 0.5 * (hi - lo)
    sigma = theta / delta
    rho = 1.0 / sigma
    if zero_start:
        _copy_into(b, r)
    else:
        residual_into(ptr, ind, val, x, b, r)
    _scaled_into(dinv, r, 1.0 / theta, d, x, zero_start)
    for _ in range(1, steps):
        _subtract_product(ptr, ind, val, d, r)
        rho_new = 1.0 / (2.0 * sigma - rho)
        _chebyshev_step(dinv, r, rho_new * rho, 2.0 * rho_new / delta, d, x)
        rho = rho_new
    if end_residual:
        _subtract_product(ptr, ind, val, d, r)


@nb.njit(cache=True)
def _cholesky_solve(L, b, x):
    n = L.shape[0]
    for i in range(n):
        s = b[i]
        for j in range(i):
            s -= L[i, j] * x[j]
        x[i] = s / L[i, i]
    for i in range(n - 1, -1, -1):
        s = x[i]
        for j in range(i + 1, n):
            s -= L[j, i] * x[j]
        x[i] = s / L[i, i]


@nb.njit(cache=True)
def _vcycle(a_ptr, a_ind, a_val, dinv, p_ptr, p_ind, p_val, r_ptr, r_ind, r_val,
            xs, bs, rs, ds, lower, degree, chol, b0, x0):
    """One V-cycle ``x0 = B b0`` (x0 is overwritten; zero initial guess)."""
    n_lev = len(a_ptr)
    # the smoother's flags are run-time booleans: a literal True/False at each call
    # site would compile one specialisation of _chebyshev per combination
    yes = n_lev > 0
    no = not yes
    for lev in range(n_lev - 1):
        b = b0 if lev == 0 else bs[lev]
        x = x0 if lev == 0 else xs[lev]
        _chebyshev(a_ptr[lev], a_ind[lev], a_val[lev], dinv[lev], b, x, rs[lev], ds[lev],
                   lower[lev], 1.0, degree[lev], yes, yes)
        matvec_into(r_ptr[lev], r_ind[lev], r_val[lev], rs[lev], bs[lev + 1])
    c = n_lev - 1
    b = b0 if c == 0 else bs[c]
    x = x0 if c == 0 else xs[c]
    if chol.shape[0] > 0:
        _cholesky_solve(chol, b, x)
    else:
        _chebyshev(a_ptr[c], a_ind[c], a_val[c], dinv[c], b, x, rs[c], ds[c],
                   lower[c], 1.0, degree[c], yes, no)
    for lev in range(n_lev - 2, -1, -1):
        b = b0 if lev == 0 else bs[lev]
        x = x0 if lev == 0 else xs[lev]
        matvec_add_into(p_ptr[lev], p_ind[lev], p_val[lev], xs[lev + 1], x)
        _chebyshev(a_ptr[lev], a_ind[lev], a_val[lev], dinv[lev], b, x, rs[lev], ds[lev],
                   lower[lev], 1.0, degree[lev], no, no)


@nb.njit(cache=True)
def _pcg_vcycle(m_ptr, m_ind, m_val, a_ptr, a_ind, a_val, dinv, p_ptr, p_ind, p_val,
                r_ptr, r_ind, r_val, xs, bs, rs, ds, lower, degree, chol,
                b, x, zero_start, rtol, maxiter, max_restarts, history, r, z, p, q):
    """Preconditioned CG (Hestenes & Stiefel 1952; Saad 2003, Alg. 9.1), V-cycle as B.

    ``m_*`` is the system matrix.  Stops when the recurrence residual is
    ``<= rtol ||b||`` and then checks the true residual, restarting from it
    (at most ``max_restarts`` times) when rounding made the two drift apart.
    Returns ``(iterations, n_history, status)``: status 0 ok/stopped,
    1 ``r.z <= 0`` (preconditioner not SPD), 2 ``p.Ap <= 0`` (matrix not SPD);
    ``history[:n_history]`` holds relative residuals, the last one true.
    """
    bnorm = math.sqrt(dot(b, b))
    if bnorm == 0.0:
        x[:] = 0.0
        history[0] = 0.0
        return 0, 1, 0
    if zero_start:
        x[:] = 0.0
        _copy_into(b, r)
    else:
        residual_into(m_ptr, m_ind, m_val, x, b, r)
    target = rtol * bnorm
    rnorm = math.sqrt(dot(r, r))
    history[0] = rnorm / bnorm
    nh = 1
    k = 0
    restarts = 0
    status = 0
    true_checked = False
    # one call site of the V-cycle (each site is compiled into this kernel anew):
    # direction 1 restarts the search direction (p = z), 2 updates it
    # (p = z + beta p), 0 applies no preconditioner this pass
    direction = 1
    rz = 1.0  # set by the first pass (direction 1)
    while True:
        if direction != 0:
            _vcycle(a_ptr, a_ind, a_val, dinv, p_ptr, p_ind, p_val, r_ptr, r_ind, r_val,
                    xs, bs, rs, ds, lower, degree, chol, r, z)
            rz_new = dot(r, z)
            if direction == 1:
                _copy_into(z, p)
            else:
                xpby_into(z, rz_new / rz, p)
            rz = rz_new
            direction = 0
        if rnorm <= target:
            residual_into(m_ptr, m_ind, m_val, x, b, q)
            tnorm = math.sqrt(dot(q, q))
            history[nh - 1] = tnorm / bnorm
            true_checked = True
            if tnorm <= target or k >= maxiter or restarts >= max_restarts:
                break
            restarts += 1
            _copy_into(q, r)
            rnorm = tnorm
            direction = 1
            continue
        if k >= maxiter:
            break
        if not rz > 0.0:
            status = 1
            break
        matvec_into(m_ptr, m_ind, m_val, p, q)
        pq = dot(p, q)
        if not pq > 0.0:
            status = 2
            break
        alpha = rz / pq
        rnorm = math.sqrt(cg_update(alpha, p, q, x, r))
        k += 1
        true_checked = False
        history[nh] = rnorm / bnorm
        nh += 1
        if rnorm > target:
            direction = 2
    if not true_checked:
        residual_into(m_ptr, m_ind, m_val, x, b, q)
        history[nh - 1] = math.sqrt(dot(q, q)) / bnorm
    return k, nh, status


# ----------------------------------------------------------------------------
# the hierarchy
# ----------------------------------------------------------------------------
def _readonly(a):
    """A read-only view of ``a`` (no copy).

    Every array the kernels only read goes in read-only, whoever made it: numba
    compiles a read-only and a writeable argument as two signatures, so a matrix
    that arrives one way in one run and the other way in the next (pruned or
    not, a caller's frozen arrays or fresh ones) would compile the set-up and
    the cycle twice."""
    v = a.view()
    v.flags.writeable = False
    return v


def _ro3(arrays):
    return tuple(_readonly(a) for a in arrays)


def _csr_arrays(A):
    """Read-only (indptr int64, indices int32, data float64) of a CSR matrix, no copy
    when they fit."""
    return (_readonly(np.ascontiguousarray(A.indptr, dtype=np.int64)),
            _readonly(np.ascontiguousarray(A.indices, dtype=np.int32)),
            _readonly(np.ascontiguousarray(A.data, dtype=np.float64)))


def _prune(ptr, ind, val):
    """Drop stored exact zeros (right angles give zero couplings); no copy when none."""
    cnt = by_size(_prune_counts, val.shape[0])(ptr, val)
    new_ptr = np.cumsum(cnt)
    if new_ptr[-1] == val.shape[0]:
        return ptr, ind, val, False
    new_ind = np.empty(new_ptr[-1], dtype=np.int32)
    new_val = np.empty(new_ptr[-1], dtype=np.float64)
    by_size(_prune_fill, val.shape[0])(ptr, ind, val, new_ptr, new_ind, new_val)
    return _readonly(new_ptr), _readonly(new_ind), _readonly(new_val), True


#: fine-level passes of a typical solve (15 iterations, each a residual, smoothing of
#: degree 2 before and after, and the CG product): the work :func:`by_size` weighs
SOLVE_PASSES = 50


class _Level:
    __slots__ = ("ptr", "ind", "val", "diag", "l1", "dinv", "agg", "n_agg",
                 "P", "R", "lower", "degree", "n")


# -- typed lists of per-level arrays, built by cached kernels -------------------
# level data (matrices, transfers, scalings) are read-only items, work vectors writeable
_RO_I64_1D = _nbt.Array(_nbt.int64, 1, "C", readonly=True)
_RO_I32_1D = _nbt.Array(_nbt.int32, 1, "C", readonly=True)
_RO_F64_1D = _nbt.Array(_nbt.float64, 1, "C", readonly=True)
_F64_1D = _nbt.Array(_nbt.float64, 1, "C")


@nb.njit(cache=True)
def _new_i64():
    return List.empty_list(_RO_I64_1D)


@nb.njit(cache=True)
def _new_i32():
    return List.empty_list(_RO_I32_1D)


@nb.njit(cache=True)
def _new_ro_f64():
    return List.empty_list(_RO_F64_1D)


@nb.njit(cache=True)
def _new_f64():
    return List.empty_list(_F64_1D)


def _checked_push(kernel, dtype, readonly):
    def push(lst, a):
        if a.dtype != dtype or a.ndim != 1 or not a.flags.c_contiguous:
            raise TypeError(f"multigrid level array: expected C-contiguous 1-D {dtype}, "
                            f"got {a.dtype} {a.ndim}-D")
        kernel(lst, _readonly(a) if readonly else a)
    return push


@nb.njit(cache=True)
def _push_kernel(lst, a):
    lst.append(a)


_push_i64 = _checked_push(_push_kernel, np.int64, True)
_push_i32 = _checked_push(_push_kernel, np.int32, True)
_push_ro_f64 = _checked_push(_push_kernel, np.float64, True)
_push_f64 = _checked_push(_push_kernel, np.float64, False)


class Hierarchy:
    """A multigrid hierarchy for one SPD matrix, reusable across right-hand sides.

    Build it with :func:`build_hierarchy`.  ``apply(b)`` is one V-cycle;
    ``pcg(b, ...)`` runs the compiled CG loop; ``refresh(A)`` recomputes the
    values for a matrix with the same pattern.

    Attributes
    ----------
    n : int
        Unknowns of the finest level.
    levels : list of dict
        Per level: ``n`` (rows), ``nnz``, ``kind`` ("P_k" for a p-multigrid
        level, "aggregation", "coarsest") and the smoother degree.
    operator_complexity : float
        Sum of stored entries over all levels / those of the finest
        operator (after dropping its exact zeros).
    grid_complexity : float
        Sum of rows over all levels / rows of the finest level.
    setup_phases : dict
        Seconds of each set-up phase (prune, aggregate, prolongate, galerkin,
        coarsest).
    first_aggregate_radius : int or None
        The radius of the first aggregation level's aggregates (1 or 2;
        None when no level was aggregated).
    coarsest : str
        How the coarsest level is solved: a dense Cholesky factorisation, or
        smoother sweeps when it is too large or not positive definite.
    options : dict
        The set-up options used.
    """

    def __init__(self):
        self.first_aggregate_radius = None
        self._levels = []
        self.setup_phases = {}
        self.options = {}

    # -- reporting -----------------------------------------------------------
    @property
    def n(self) -> int:
        return self._levels[0].n

    @property
    def levels(self):
        out = []
        for i, lev in enumerate(self._levels):
            last = i == len(self._levels) - 1
            kind = "coarsest" if last else ("P_k -> P1" if (i == 0 and self._pk) else "aggregation")
            out.append({"n": int(lev.n), "nnz": int(lev.val.shape[0]), "kind": kind,
                        "smoother_degree": int(lev.degree)})
        return out

    @property
    def operator_complexity(self) -> float:
        return sum(lv.val.shape[0] for lv in self._levels) / self._levels[0].val.shape[0]

    @property
    def grid_complexity(self) -> float:
        return sum(lv.n for lv in self._levels) / self._levels[0].n

    def memory_bytes(self) -> int:
        """Bytes held by the hierarchy (operators, transfers, work vectors, factor)."""
        total = 0
        for i, lv in enumerate(self._levels):
            if i > 0 or self._own_fine:
                total += lv.ptr.nbytes + lv.ind.nbytes + lv.val.nbytes
            total += lv.l1.nbytes + lv.dinv.nbytes + lv.diag.nbytes + 4 * 8 * lv.n
            for T in (lv.P, lv.R):
                if T is not None:
                    total += sum(a.nbytes for a in T)
        return int(total + self._chol.nbytes)

    # -- use -----------------------------------------------------------------
    def apply(self, b):
        """One V-cycle: ``B b`` (a new array)."""
        b = np.ascontiguousarray(b, dtype=np.float64)
        x = np.empty_like(b)
        a = self._packed
        _vcycle(*a, b, x)
        return x

    def pcg(self, ptr, ind, val, b, x0, rtol, maxiter, max_restarts):
        """Compiled CG on the system ``(ptr, ind, val)`` preconditioned by the V-cycle."""
        n = b.shape[0]
        # one signature whatever the caller holds: the matrix read-only, b writeable
        ptr, ind, val = _readonly(ptr), _readonly(ind), _readonly(val)
        b = np.ascontiguousarray(b, dtype=np.float64)
        if not b.flags.writeable:
            b = b.copy()
        x = np.zeros(n) if x0 is None else np.array(x0, dtype=np.float64, copy=True)
        history = np.empty(maxiter + max_restarts + 2)
        r, z, p, q = (np.empty(n) for _ in range(4))
        # the twin that calls the serial sparse kernels below PARALLEL_FROM entries read:
        # a solve reads each fine-level entry about SOLVE_PASSES times, so systems from
        # about 100,000 non-zeros solve in parallel (a 1M-dof 2D system has 5M), once
        # the parallel loop is compiled: it compiles for ~7 s, longer than it saves in
        # a first run, so while a second process compiles it the serial twin runs
        pcg = by_size(_pcg_vcycle, SOLVE_PASSES * ind.shape[0], cached_only=True)
        k, nh, status = pcg(ptr, ind, val, *self._packed, b, x, x0 is None, float(rtol),
                            int(maxiter), int(max_restarts), history, r, z, p, q)
        return x, history[:nh].copy(), int(k), int(status)

    # -- set-up --------------------------------------------------------------
    def _pack(self):
        # typed lists are built by cached kernels (_new_*, _push): List() and
        # List.append called from Python compile numba's own list code afresh in
        # every process (about a second), cached kernels load it from the cache
        a_ptr, a_ind, a_val, dinv = _new_i64(), _new_i32(), _new_ro_f64(), _new_ro_f64()
        p_ptr, p_ind, p_val = _new_i64(), _new_i32(), _new_ro_f64()
        r_ptr, r_ind, r_val = _new_i64(), _new_i32(), _new_ro_f64()
        xs, bs, rs, ds = _new_f64(), _new_f64(), _new_f64(), _new_f64()
        for lv in self._levels:
            _push_i64(a_ptr, lv.ptr)
            _push_i32(a_ind, lv.ind)
            _push_ro_f64(a_val, lv.val)
            _push_ro_f64(dinv, lv.dinv)
            for lst in (xs, bs, rs, ds):
                _push_f64(lst, np.zeros(lv.n))
        for lv in self._levels[:-1]:
            _push_i64(p_ptr, lv.P[0])
            _push_i32(p_ind, lv.P[1])
            _push_ro_f64(p_val, lv.P[2])
            _push_i64(r_ptr, lv.R[0])
            _push_i32(r_ind, lv.R[1])
            _push_ro_f64(r_val, lv.R[2])
        if len(self._levels) == 1:  # the kernels index no transfer, but take one
            _push_i64(p_ptr, np.zeros(1, dtype=np.int64))
            _push_i64(r_ptr, np.zeros(1, dtype=np.int64))
            _push_i32(p_ind, np.zeros(0, np.int32))
            _push_i32(r_ind, np.zeros(0, np.int32))
            _push_ro_f64(p_val, np.zeros(0))
            _push_ro_f64(r_val, np.zeros(0))
        lower = np.array([lv.lower for lv in self._levels])
        degree = np.array([lv.degree for lv in self._levels], dtype=np.int64)
        self._packed = (a_ptr, a_ind, a_val, dinv, p_ptr, p_ind, p_val, r_ptr, r_ind, r_val,
                        xs, bs, rs, ds, lower, degree, self._chol)

    def refresh(self, A):
        """New values, same pattern: recompute operators, keep the aggregates.

        Parameters
        ----------
        A : csr matrix
            The same shape and pattern (indptr, indices) as the matrix the
            hierarchy was built for, validated by the caller.

        Returns
        -------
        bool
            True when refreshed in place; False when the new values put a
            non-zero where the old matrix had an exact zero (the pruned
            pattern no longer holds): then build a new hierarchy.
        """
        t0 = time.perf_counter()
        ptr, ind, val, pruned = _prune(*_csr_arrays(A))
        fine = self._levels[0]
        if ptr.shape != fine.ptr.shape or not np.array_equal(ptr, fine.ptr) \
                or not (ind is fine.ind or np.array_equal(ind, fine.ind)):
            return False
        fine.ptr, fine.ind, fine.val = ptr, ind, val
        self._own_fine = pruned
        self._values_from(0)
        self._pack()
        self.setup_phases = {"refresh": time.perf_counter() - t0}
        return True

    def _level_values(self, lv, level_index):
        bad = by_size(_diagonal_and_l1, lv.ind.shape[0])(lv.ptr, lv.ind, lv.val, lv.diag, lv.l1)
        if bad >= 0:
            where = "the matrix" if level_index == 0 else f"the level-{level_index} operator"
            raise InputError(
                f"solver 'cg-amg': row {bad} of {where} has diagonal {float(lv.diag[bad])!r}, "
                "not > 0: the matrix is not symmetric positive definite; check the "
                "assembly and the Dirichlet elimination")
        np.divide(1.0, lv.l1, out=lv.dinv)

    def _values_from(self, start):
        """Recompute transfers and coarse operators from level ``start`` down."""
        for i in range(start, len(self._levels)):
            lv = self._levels[i]
            self._level_values(lv, i)
            if i == len(self._levels) - 1:
                break
            nxt = self._levels[i + 1]
            if not (i == 0 and self._pk):
                lv.P = _ro3(_smoothed_prolongator(lv.ptr, lv.ind, lv.val, lv.l1, 4.0 / 3.0,
                                                  lv.agg, lv.n_agg))
                lv.R = _ro3(transpose(*lv.P, lv.n_agg))
            AP = _ro3(spgemm(lv.ptr, lv.ind, lv.val, *lv.P, nxt.n))
            nxt.ptr, nxt.ind, nxt.val = _ro3(spgemm(*lv.R, *AP, nxt.n))
            del AP
        self._factor_coarsest()

    def _factor_coarsest(self):
        c = self._levels[-1]
        if c.n <= _MAX_DENSE:
            dense = sp.csr_matrix((c.val, c.ind, c.ptr), shape=(c.n, c.n)).toarray()
            dense = 0.5 * (dense + dense.T)
            try:
                self._chol = np.ascontiguousarray(np.linalg.cholesky(dense))
                self.coarsest = f"dense Cholesky ({c.n} unknowns)"
            except np.linalg.LinAlgError:
                # not SPD: the cycle falls back to smoothing there and CG
                # reports the breakdown (p.Ap or r.z <= 0) in its SolveReport
                self._chol = np.zeros((0, 0))
                self.coarsest = (f"smoother only: the coarsest operator ({c.n} unknowns) is not "
                                 "positive definite, so the matrix is not SPD")
        else:
            self._chol = np.zeros((0, 0))
            self.coarsest = (f"smoother only ({c.n} unknowns: coarsening stalled above the "
                             f"dense limit {_MAX_DENSE})")


def _new_level(ptr, ind, val, n, degree, lower):
    lv = _Level()
    lv.ptr, lv.ind, lv.val, lv.n = _readonly(ptr), _readonly(ind), _readonly(val), n
    lv.diag = np.empty(n)
    lv.l1 = np.empty(n)
    lv.dinv = np.empty(n)
    lv.agg, lv.n_agg, lv.P, lv.R = None, 0, None, None
    lv.degree, lv.lower = int(degree), float(lower)
    return lv


def build_hierarchy(A, *, coarse_space=None, theta=DEFAULTS["theta"],
                    max_coarse=DEFAULTS["max_coarse"], max_levels=DEFAULTS["max_levels"],
                    smoother_degree=DEFAULTS["smoother_degree"],
                    smoother_lower=DEFAULTS["smoother_lower"],
                    fine_smoother_degree=DEFAULTS["fine_smoother_degree"],
                    aggregate_radius=DEFAULTS["aggregate_radius"]):
    """Smoothed-aggregation hierarchy (with a p-multigrid level when asked).

    Parameters
    ----------
    A : scipy.sparse csr matrix, shape (n, n), float64
        SPD, validated by the caller (finite, square).
    coarse_space : scipy.sparse matrix, shape (n, n1), optional
        A prolongation to a nested coarse space, e.g. :func:`p1_interpolation`
        restricted to the free dofs: the first coarse level is
        ``coarse_space.T @ A @ coarse_space``, smoothed with degree
        ``fine_smoother_degree``; aggregation continues below it.
    theta : float
        Strength threshold on level 0 (halved on each level), ``0 <= theta < 1``.
    max_coarse : int
        Stop coarsening at or below this many unknowns (dense Cholesky there).
    max_levels : int
        At most this many levels.
    smoother_degree : int
        Chebyshev degree: matrix-vector products per smoothing sweep.
    smoother_lower : float
        Lower end of the Chebyshev interval as a fraction of the upper bound,
        ``0 < smoother_lower < 1``.
    aggregate_radius : {1, 2, "auto"}
        Radius in the strong graph of the pass-1 aggregates of the first
        aggregation level (the levels below use 1); "auto" takes 2 when the
        radius-1 aggregates' tentative coarse pattern has more than
        :data:`AUTO_RADIUS_ENTRIES` entries per row, except below a P_k
        level (``coarse_space`` given), where it keeps 1.

    Returns
    -------
    Hierarchy

    Raises
    ------
    InputError
        An option out of range, a row without a positive diagonal, a
        ``coarse_space`` of the wrong shape.
    """
    compilation.wait_for_compile_ahead()  # a second process may be compiling our kernels
    where = "solver 'cg-amg'"
    _check_real(theta, "theta", 0.0, 1.0, where, low_open=False)
    _check_real(smoother_lower, "smoother_lower", 0.0, 1.0, where)
    for name, v, lo in (("max_coarse", max_coarse, 1), ("max_levels", max_levels, 1),
                        ("smoother_degree", smoother_degree, 1),
                        ("fine_smoother_degree", fine_smoother_degree, 1)):
        if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < lo:
            raise InputError(f"{where}: option {name} must be an integer >= {lo}, got {v!r}")
    if not (isinstance(aggregate_radius, str) and aggregate_radius == "auto") and (
            isinstance(aggregate_radius, bool)
            or not isinstance(aggregate_radius, (int, np.integer))
            or aggregate_radius not in (1, 2)):
        raise InputError(f"{where}: option aggregate_radius must be 1, 2 or \"auto\", "
                         f"got {aggregate_radius!r}")
    n = A.shape[0]
    if coarse_space is not None:
        if not sp.issparse(coarse_space) or coarse_space.ndim != 2 \
                or coarse_space.shape[0] != n or not 0 < coarse_space.shape[1] < n:
            raise InputError(
                f"{where}: option coarse_space must be a sparse matrix of shape ({n}, n1) "
                f"with 0 < n1 < {n}, got "
                f"{getattr(coarse_space, 'shape', type(coarse_space).__name__)}")
        coarse_space = sp.csr_matrix(coarse_space, dtype=np.float64)
        if not np.all(np.isfinite(coarse_space.data)):
            raise InputError(f"{where}: option coarse_space has non-finite entries")
    h = Hierarchy()
    h.options = {"theta": float(theta), "max_coarse": int(max_coarse),
                 "max_levels": int(max_levels), "smoother_degree": int(smoother_degree),
                 "smoother_lower": float(smoother_lower),
                 "fine_smoother_degree": int(fine_smoother_degree),
                 "aggregate_radius": aggregate_radius if isinstance(aggregate_radius, str)
                 else int(aggregate_radius),
                 "p_multigrid": coarse_space is not None}
    h.first_aggregate_radius = None
    phases = {"prune": 0.0, "aggregate": 0.0, "prolongate": 0.0, "galerkin": 0.0,
              "coarsest": 0.0}
    t0 = time.perf_counter()
    ptr, ind, val, pruned = _prune(*_csr_arrays(A))
    h._pruned = pruned
    h._own_fine = pruned
    h._pk = coarse_space is not None
    fine_degree = fine_smoother_degree if h._pk else smoother_degree
    lv = _new_level(ptr, ind, val, n, fine_degree, smoother_lower)
    h._levels.append(lv)
    phases["prune"] = time.perf_counter() - t0
    level = 0
    while True:
        t0 = time.perf_counter()
        h._level_values(lv, level)
        if lv.n <= max_coarse or len(h._levels) >= max_levels:
            break
        if level == 0 and h._pk:
            Pm = coarse_space
            lv.P = _csr_arrays(Pm)
            lv.R = _ro3(transpose(*lv.P, Pm.shape[1]))
            n_next = Pm.shape[1]
        else:
            first = h.first_aggregate_radius is None
            radius = 1 if not first or aggregate_radius == "auto" else int(aggregate_radius)
            agg, n_agg = _aggregate(lv.ptr, lv.ind, lv.val, lv.diag, theta * 0.5 ** level,
                                    radius)
            # not below a P_k level: the P1 level is coarse already (opc 1.10) and
            # radius 2 there cost 11 -> 14 iterations on the 1M-dof P2 cube, measured
            if first and aggregate_radius == "auto" and not h._pk and n_agg < lv.n and \
                    _aggregate_pattern_entries(lv.ptr, lv.ind, agg, n_agg) \
                    > AUTO_RADIUS_ENTRIES * n_agg:
                radius = 2
                agg, n_agg = _aggregate(lv.ptr, lv.ind, lv.val, lv.diag,
                                        theta * 0.5 ** level, radius)
            if first:
                h.first_aggregate_radius = radius
            phases["aggregate"] += time.perf_counter() - t0
            if n_agg >= lv.n or (n_agg > 0.85 * lv.n and lv.n > max_coarse):
                # coarsening stalled (e.g. a diagonal matrix): stop here
                break
            t0 = time.perf_counter()
            lv.agg, lv.n_agg = agg, n_agg
            lv.P = _ro3(_smoothed_prolongator(lv.ptr, lv.ind, lv.val, lv.l1, 4.0 / 3.0, agg,
                                              n_agg))
            lv.R = _ro3(transpose(*lv.P, n_agg))
            n_next = n_agg
            phases["prolongate"] += time.perf_counter() - t0
        t0 = time.perf_counter()
        AP = _ro3(spgemm(lv.ptr, lv.ind, lv.val, *lv.P, n_next))
        c_ptr, c_ind, c_val = spgemm(*lv.R, *AP, n_next)
        del AP
        phases["galerkin"] += time.perf_counter() - t0
        lv = _new_level(c_ptr, c_ind, c_val, n_next, smoother_degree, smoother_lower)
        h._levels.append(lv)
        level += 1
    t0 = time.perf_counter()
    h._factor_coarsest()
    phases["coarsest"] = time.perf_counter() - t0
    h._pack()
    h.setup_phases = phases
    return h


def _check_real(v, name, lo, hi, where, low_open=True):
    ok = isinstance(v, (int, float, np.floating, np.integer)) and not isinstance(v, bool) \
        and math.isfinite(v) and (v > lo if low_open else v >= lo) and v < hi
    if not ok:
        bracket = "(" if low_open else "["
        raise InputError(f"{where}: option {name} must be a number in {bracket}{lo}, {hi}), "
                         f"got {v!r}")


# ----------------------------------------------------------------------------
# p-multigrid: the nested P1 space
# ----------------------------------------------------------------------------
def p1_interpolation(disc):
    """Interpolation from P1 on the same mesh into the P_k space of ``disc``.

    Each P_k node takes the values of the P1 hat functions there: the
    barycentric coordinates of the node in its cell.  Because P1 is a
    subspace of P_k (same mesh), this is exact: ``I @ v1`` is the P_k
    representation of the P1 function ``v1``.

    Parameters
    ----------
    disc : Discretization
        Of degree >= 1 (degree 1 gives the identity).

    Returns
    -------
    scipy.sparse.csr_array, shape (disc.n_dofs, mesh.n_vertices)
        At most ``dim + 1`` entries per row, each in ``[0, 1]``; rows sum to 1.

    Examples
    --------
    >>> import numpy as np, galerkit as gk
    >>> disc = gk.Discretization(gk.structured_triangles(2, 2), 2)
    >>> I = p1_interpolation(disc)
    >>> I.shape, bool(np.allclose(I.sum(axis=1), 1.0))
    ((25, 9), True)
    """
    mesh = disc.mesh
    el = disc.element
    cd = np.asarray(disc.cell_dofs)
    # one cell per dof (the first holding it): its local node gives the row
    flat = cd.ravel()
    dofs, first = np.unique(flat, return_index=True)
    cell = first // el.n_local
    local = first % el.n_local
    lam = el.multi_indices[local] / float(disc.degree)        # (n_dofs, dim+1)
    cols = np.asarray(mesh.cells)[cell]                          # (n_dofs, dim+1)
    keep = lam != 0.0
    rows = np.broadcast_to(dofs[:, None], lam.shape)[keep]
    I = sp.csr_array((lam[keep], (rows, cols[keep])), shape=(disc.n_dofs, mesh.n_vertices))
    I.sum_duplicates()
    return I


def p1_coarse_space(disc, free):
    """:func:`p1_interpolation` restricted to a reduced system's unknowns.

    Rows: the free dofs ``free`` (the reduced system's order); columns: the
    vertices whose own dof is free.  The P1 functions kept vanish at every
    eliminated vertex; their interpolants are the coarse basis of the
    p-multigrid level.

    Parameters
    ----------
    disc : Discretization
        Of degree >= 2.
    free : ndarray of int
        Sorted free dofs of the reduced system (``DirichletElimination.free``).

    Returns
    -------
    scipy.sparse.csr_array, shape (free.size, n_free_vertices)
    """
    I = p1_interpolation(disc)
    is_free = np.zeros(disc.n_dofs, dtype=bool)
    is_free[free] = True
    vertex_free = np.flatnonzero(is_free[np.asarray(disc.vertex_dofs)])
    return sp.csr_array(I[np.asarray(free)][:, vertex_free])


def compile_solver_kernels(n: int = 30, report_stage: bool = False) -> None:
    """Compile (or load) the kernels of solver ``cg-amg`` on a small system.

    A 5-point Laplacian on an ``n`` x ``n`` grid (more unknowns than the dense
    coarsest level, so aggregation, prolongators and Galerkin products run),
    through the same entry points as any solve: every array is normalised at
    those boundaries, so the signatures are those of every ``cg-amg`` solve.
    Run by the command line's second process (galerkit.compilation) and by
    ``galerkit warm-up``.  Two stages: every kernel of a solve (the serial twins
    of the solve loop), then the parallel solve loop; ``report_stage`` prints
    the line the first process waits for between them.
    """
    from .solvers import prepare_solver

    t = sp.diags([-1.0, 2.0, -1.0], [-1, 0, 1], shape=(n, n))
    A = sp.coo_array(sp.kron(t, sp.eye(n)) + sp.kron(sp.eye(n), t))
    # stored exact zeros on the diagonal neighbours, as right angles give an
    # assembled matrix: the pruning kernels run too
    o = sp.coo_array(sp.kron(sp.diags([1.0, 1.0], [-1, 1], shape=(n, n)),
                             sp.diags([1.0, 1.0], [-1, 1], shape=(n, n))))
    A = sp.csr_array((np.concatenate([A.data, 0.0 * o.data]),
                      (np.concatenate([A.row, o.row]), np.concatenate([A.col, o.col]))),
                     shape=(n * n, n * n))
    A.sum_duplicates()
    assert A.nnz > np.count_nonzero(A.data)
    solver = prepare_solver(A, method="cg-amg")
    solver.solve(np.ones(n * n), rtol=1e-8)  # the serial twins, as small systems run
    if report_stage:
        compilation.report_stage()
    # the parallel solve loop too, as every system from about 100,000 non-zeros runs it
    threshold, compilation.PARALLEL_FROM = compilation.PARALLEL_FROM, 0
    try:
        solver.solve(np.ones(n * n), rtol=1e-8)
    finally:
        compilation.PARALLEL_FROM = threshold
