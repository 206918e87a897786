"""Equilibrated fluxes of degree k on triangles: the vertex-patch mixed problems.

For a P_k solution ``u_h`` (k = 2, 3, 4) of ``-div(K grad u) = f`` on triangles,
:func:`estimate_error_pk` builds a flux ``sigma_h`` in the Raviart--Thomas
space RT_k (divergence in P_k) as a sum of local fluxes on vertex patches
(Braess, Pillwein & Schoeberl 2009; Ern & Vohralik 2015, SIAM J. Numer. Anal.
53): on the patch of vertex ``a`` with hat function ``psi_a``,

    sigma_a = argmin ||K^(-1/2)(tau + psi_a K grad u_h)||  over tau in RT_k(patch)
    with  div tau = Pi_k(psi_a f - K grad psi_a . grad u_h)  on each cell,
          tau . n = Pi_k(-psi_a g)  on Neumann/Robin facets,
          tau . n = 0  on the rest of the patch boundary (free on Dirichlet facets),

and ``sigma_h = sum_a sigma_a``, so ``div sigma_h = Pi_k f`` and
``sigma_h . n = -Pi_k g``.  Each patch problem is a small saddle-point system,
solved exactly by the Schur complement of the multipliers (cell blocks of the
mass matrix by Cholesky, the multiplier system by Cholesky), vertex by vertex in
one compiled parallel kernel; every vertex writes only its own slots, so the
result is the same for any thread count.  The RT_k fields are written cell by
cell in a broken basis (Piola images of a reference basis, ``P_k^2 + x P~_k``
in coordinates centred at the reference centroid); normal continuity and the
boundary data are imposed as moments against shifted Legendre polynomials of
degree <= k on each edge (the normal trace of RT_k on an edge is a polynomial
of degree k, so the moments make it continuous).  The residual that an
iterative solve or a quadrature leaves in the compatible patches is taken out
and routed along a spanning tree of the cells to Dirichlet facets as a lowest
order field, as for P1 (:mod:`galerkit.estimators`).

The bound and its terms are those of the P1 estimator with ``Pi_0`` replaced by
``Pi_k`` (cell oscillation ``h_K / pi ||f - Pi_k f||``, boundary-data
oscillation ``||g - Pi_k g||_F``); the residual estimator has the element
residual ``f + div(K grad u_h)`` (the Laplacian of u_h on each cell, weighted by
K) and the jumps of ``K grad u_h . n`` integrated along the edges.
"""

from __future__ import annotations

import math

import numba as nb
import numpy as np

from .coefficients import evaluate_callable, scalar_values
from .errors import InputError, UnsupportedError
from .quadrature import simplex_quadrature
from .regions import RegionCoefficient

__all__ = ["estimate_error_pk", "rt_reference"]

#: 1D Gauss--Legendre points on [0, 1] for edge integrals (exact to degree 19)
_GL_T, _GL_W = np.polynomial.legendre.leggauss(10)
_GL_T = 0.5 * (_GL_T + 1.0)
_GL_W = 0.5 * _GL_W
_REF_V = np.array([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0]])
_INTERIOR, _DIRICHLET, _FLUX = 0, 1, 2


# -- reference data ---------------------------------------------------------------
def _monomials(k):
    return [(a, b) for d in range(k + 1) for a in range(d, -1, -1) for b in [d - a]]


def _pk_values(k, xi):
    """P_k monomials in centred coordinates at reference points xi (n, 2): (nk, n)."""
    s = xi[:, 0] - 1.0 / 3.0
    t = xi[:, 1] - 1.0 / 3.0
    return np.array([s**a * t**b for a, b in _monomials(k)])


def _rt_values(k, xi):
    """Reference RT_k basis at xi (n, 2): values (nb, n, 2) and divergences (nb, n).
    Basis: (m, 0), (0, m) for the monomials m of degree <= k, and (s p, t p) for
    the monomials p of degree exactly k (s, t centred coordinates)."""
    s = xi[:, 0] - 1.0 / 3.0
    t = xi[:, 1] - 1.0 / 3.0
    vals, divs = [], []
    zero = np.zeros_like(s)
    for a, b in _monomials(k):
        vals.append(np.stack([s**a * t**b, zero], axis=1))
        divs.append(a * s ** max(a - 1, 0) * t**b if a else zero.copy())
    for a, b in _monomials(k):
        vals.append(np.stack([zero, s**a * t**b], axis=1))
        divs.append(b * s**a * t ** max(b - 1, 0) if b else zero.copy())
    for a in range(k, -1, -1):
        p = s**a * t ** (k - a)
        vals.append(np.stack([s * p, t * p], axis=1))
        divs.append((k + 2) * p)
    return np.array(vals), np.array(divs)


def _legendre01(k, t):
    """Shifted Legendre polynomials L_0..L_k on [0, 1] at t: (k+1, n)."""
    x = 2.0 * t - 1.0
    out = np.empty((k + 1, t.size))
    out[0] = 1.0
    if k >= 1:
        out[1] = x
    for j in range(1, k):
        out[j + 1] = ((2 * j + 1) * x * out[j] - j * out[j - 1]) / (j + 1)
    return out


def _edge_points(i, t):
    """Reference points of the edge opposite vertex i, from V_{i+1} to V_{i+2}."""
    return (1 - t)[:, None] * _REF_V[(i + 1) % 3] + t[:, None] * _REF_V[(i + 2) % 3]


def rt_reference(k):
    """Reference tables of RT_k on the unit triangle (vertices (0,0), (1,0), (0,1)).

    Returns a dict with ``nb`` (basis size ``(k+1)(k+3)``), ``nk`` (size of P_k),
    ``D`` (nk, nb) divergence moments ``int div tau_i q_j``, ``E`` (3, k+1, nb) outward
    normal moments ``int_e tau_i . n L_j`` on the edge opposite each vertex,
    ``qint`` (nk,) integrals of the monomials, ``rt0`` (3, nb) coefficients of the
    lowest-order field with unit outward flux through edge i, and quadrature-point
    tables for a rule of a given degree (filled by :func:`_cell_tables`).
    """
    nb_ = (k + 1) * (k + 3)
    nk = (k + 1) * (k + 2) // 2
    rule = simplex_quadrature(2, 2 * k + 2)
    xi, w = rule.points, rule.weights
    V, dV = _rt_values(k, xi)
    Q = _pk_values(k, xi)
    D = np.einsum("q,iq,jq->ji", w, dV, Q)
    qint = Q @ w
    L = _legendre01(k, _GL_T)
    E = np.empty((3, k + 1, nb_))
    normals = np.array([[1.0, 1.0], [-1.0, 0.0], [0.0, -1.0]])
    lengths = np.array([math.sqrt(2.0), 1.0, 1.0])
    normals = normals / np.sqrt((normals**2).sum(axis=1))[:, None]
    for i in range(3):
        Ve, _ = _rt_values(k, _edge_points(i, _GL_T))
        flux = np.einsum("ige,e->ig", Ve, normals[i])
        E[i] = lengths[i] * np.einsum("g,ig,jg->ji", _GL_W, flux, L)
    # the lowest-order field xi - V_i (unit flux through edge i): least squares fit
    A = V.transpose(1, 2, 0).reshape(-1, nb_)
    rt0 = np.empty((3, nb_))
    for i in range(3):
        target = (xi - _REF_V[i]).reshape(-1)
        rt0[i] = np.linalg.lstsq(A, target, rcond=None)[0]
    return {"nb": nb_, "nk": nk, "D": np.ascontiguousarray(D), "E": np.ascontiguousarray(E),
            "qint": np.ascontiguousarray(qint), "rt0": np.ascontiguousarray(rt0)}


# -- compiled kernels ---------------------------------------------------------------
@nb.njit(cache=True)
def _chol(A, n):
    """In-place Cholesky of the leading n x n block of A (lower factor).  A pivot
    below 1e-13 of the largest diagonal entry marks a dependent row: the row and
    column are zeroed and the pivot set to 1 (its unknown becomes 0)."""
    dmax = 0.0
    for i in range(n):
        dmax = max(dmax, abs(A[i, i]))
    tiny = 1e-13 * dmax if dmax > 0 else 1e-300
    for j in range(n):
        s = A[j, j]
        for p in range(j):
            s -= A[j, p] * A[j, p]
        if s <= tiny:
            A[j, j] = 1.0
            for i in range(j + 1, n):
                A[i, j] = 0.0
            for p in range(j):
                A[j, p] = 0.0
            continue
        d = math.sqrt(s)
        A[j, j] = d
        for i in range(j + 1, n):
            s = A[i, j]
            for p in range(j):
                s -= A[i, p] * A[j, p]
            A[i, j] = s / d


@nb.njit(cache=True)
def _chol_solve(L, n, x):
    """Solve (L L^T) y = x in place (x of length >= n)."""
    for i in range(n):
        s = x[i]
        for p in range(i):
            s -= L[i, p] * x[p]
        x[i] = s / L[i, i]
    for i in range(n - 1, -1, -1):
        s = x[i]
        for p in range(i + 1, n):
            s -= L[p, i] * x[p]
        x[i] = s / L[i, i]


@nb.njit(cache=True, parallel=True)
def _patch_solve(cells, neighbors, bkind, vptr, vcell, vloc, G, detJ, bvec, tgt, gmom,
                 R, D, E, qint, X, corr):
    """Solve the RT_k mixed problem of every vertex patch.

    Per cell c: ``G[c] = J^T K^-1 J``, ``detJ[c]``, ``bvec[c, l]`` (the linear term of
    the energy for the patch of local vertex l), ``tgt[c, l]`` (divergence moments),
    ``gmom[c, i, l]`` (prescribed outward normal moments on flux facet i).
    Reference: ``R[r, s]`` (nb, nb) products of basis components, ``D``, ``E``, ``qint``.
    Writes ``X[c, l]`` (coefficients of the patch flux of local vertex l on c) and
    ``corr[c, l]`` (the integral of divergence taken out to make the patch solvable).
    """
    n = vptr.shape[0] - 1
    nbas = D.shape[1]
    nk = D.shape[0]
    ne = E.shape[1]
    kmax = 0
    for a in range(n):
        kmax = max(kmax, vptr[a + 1] - vptr[a])
    nrmax = nk + 3 * ne
    ncmax = kmax * nk + 3 * kmax * ne
    nchunk = min(n, 256)
    for ch in nb.prange(nchunk):
        Lm = np.empty((kmax, nbas, nbas))
        Cp = np.empty((kmax, nrmax, nbas))
        rl = np.empty((kmax, nrmax), np.int64)
        nr = np.empty(kmax, np.int64)
        Y = np.empty((nbas, nrmax))
        z = np.empty(nbas)
        S = np.empty((ncmax, ncmax))
        rhs = np.empty(ncmax)
        active = np.empty(ncmax, np.bool_)
        erow = np.empty((kmax, 3), np.int64)
        eflip = np.empty((kmax, 3), np.bool_)
        cc = np.empty(kmax, np.int64)
        ll = np.empty(kmax, np.int64)
        cr = np.empty(kmax)
        for a in range(ch * n // nchunk, (ch + 1) * n // nchunk):
            s0 = vptr[a]
            k = vptr[a + 1] - s0
            for p in range(k):
                cc[p] = vcell[s0 + p]
                ll[p] = vloc[s0 + p]
            # rows: divergence rows first, then edge rows
            nrow = k * nk
            free = False
            for p in range(k):
                for i in range(3):
                    erow[p, i] = -2
            for p in range(k):
                c = cc[p]
                for i in range(3):
                    if erow[p, i] != -2:
                        continue
                    o = neighbors[c, i]
                    if o < 0:
                        if bkind[c, i] == 1:
                            erow[p, i] = -1
                            free = True
                        else:
                            erow[p, i] = nrow
                            eflip[p, i] = False
                            nrow += ne
                        continue
                    q = -1
                    for p2 in range(k):
                        if cc[p2] == o:
                            q = p2
                            break
                    erow[p, i] = nrow
                    eflip[p, i] = False
                    if q >= 0:
                        for i2 in range(3):
                            if neighbors[o, i2] == c:
                                erow[q, i2] = nrow
                                eflip[q, i2] = cells[c, (i + 1) % 3] != cells[o, (i2 + 1) % 3]
                    nrow += ne
            for r in range(nrow):
                rhs[r] = 0.0
                active[r] = True
                for r2 in range(nrow):
                    S[r, r2] = 0.0
            # compatibility: without a free facet, take the residual out by area
            tot = 0.0
            asum = 0.0
            for p in range(k):
                c = cc[p]
                tot += tgt[c, ll[p], 0]
                asum += detJ[c]
                for i in range(3):
                    if neighbors[c, i] < 0 and erow[p, i] >= 0:
                        tot -= gmom[c, i, ll[p], 0]
            for p in range(k):
                cr[p] = tot * detJ[cc[p]] / asum if not free else 0.0
                corr[cc[p], ll[p]] = cr[p]
            if not free:
                active[0] = False
            # divergence and boundary right-hand sides
            for p in range(k):
                c = cc[p]
                for j in range(nk):
                    rhs[p * nk + j] = tgt[c, ll[p], j] - cr[p] * qint[j] / qint[0]
                for i in range(3):
                    if neighbors[c, i] < 0 and erow[p, i] >= 0:
                        for j in range(ne):
                            rhs[erow[p, i] + j] = gmom[c, i, ll[p], j]
            # cell blocks: M = (sum G_rs R_rs) / detJ, constraint rows of the cell
            for p in range(k):
                c = cc[p]
                for i in range(nbas):
                    for j in range(nbas):
                        Lm[p, i, j] = (G[c, 0, 0] * R[0, 0, i, j] + G[c, 0, 1] * R[0, 1, i, j]
                                       + G[c, 1, 0] * R[1, 0, i, j]
                                       + G[c, 1, 1] * R[1, 1, i, j]) / detJ[c]
                _chol(Lm[p], nbas)
                m_ = 0
                for j in range(nk):
                    rl[p, m_] = p * nk + j
                    for i in range(nbas):
                        Cp[p, m_, i] = D[j, i]
                    m_ += 1
                for e in range(3):
                    r0 = erow[p, e]
                    if r0 < 0:
                        continue
                    for j in range(ne):
                        sg = -1.0 if (eflip[p, e] and j % 2 == 1) else 1.0
                        rl[p, m_] = r0 + j
                        for i in range(nbas):
                            Cp[p, m_, i] = sg * E[e, j, i]
                        m_ += 1
                nr[p] = m_
                # Y = M^-1 C_p^T; S += C_p Y; rhs += C_p M^-1 b
                for u in range(m_):
                    for i in range(nbas):
                        z[i] = Cp[p, u, i]
                    _chol_solve(Lm[p], nbas, z)
                    for i in range(nbas):
                        Y[i, u] = z[i]
                for u in range(m_):
                    for v in range(m_):
                        s = 0.0
                        for i in range(nbas):
                            s += Cp[p, u, i] * Y[i, v]
                        S[rl[p, u], rl[p, v]] += s
                for i in range(nbas):
                    z[i] = bvec[c, ll[p], i]
                _chol_solve(Lm[p], nbas, z)
                for u in range(m_):
                    s = 0.0
                    for i in range(nbas):
                        s += Cp[p, u, i] * z[i]
                    rhs[rl[p, u]] += s
            for r in range(nrow):
                if not active[r]:
                    for r2 in range(nrow):
                        S[r, r2] = 0.0
                        S[r2, r] = 0.0
                    S[r, r] = 1.0
                    rhs[r] = 0.0
            _chol(S, nrow)
            _chol_solve(S, nrow, rhs)
            # x_p = M_p^-1 (C_p^T lambda - b_p)
            for p in range(k):
                c = cc[p]
                for i in range(nbas):
                    s = -bvec[c, ll[p], i]
                    for u in range(nr[p]):
                        s += Cp[p, u, i] * rhs[rl[p, u]]
                    z[i] = s
                _chol_solve(Lm[p], nbas, z)
                for i in range(nbas):
                    X[c, ll[p], i] = z[i]


@nb.njit(cache=True, parallel=True)
def _cell_energy(J, Kt, Kinv, detJ, uloc, dphi, w, tau, X, T, rt0, D, E, qint, tgt, corr,
                 amount, ef2, ea2, emom, divmiss):
    """Per cell: ``ef2 = ||K^-1/2(sigma_h + K grad u_h)||**2``, ``ea2`` the same of the
    routed field alone, ``emom[c, i, j]`` normal moments of sigma_h on edge i and the
    largest miss of its divergence moments."""
    m = J.shape[0]
    nbas = D.shape[1]
    nk = D.shape[0]
    ne = E.shape[1]
    nq = w.shape[0]
    nloc = uloc.shape[1]
    for c in nb.prange(m):
        # sigma_h on c: the three patch fluxes plus the routed lowest-order field
        # (coefficients summed on the fly: no allocation per cell)
        # inverse transpose of J
        a00 = J[c, 0, 0]
        a01 = J[c, 0, 1]
        a10 = J[c, 1, 0]
        a11 = J[c, 1, 1]
        dj = detJ[c]
        e1 = 0.0
        e2 = 0.0
        for q in range(nq):
            tx = 0.0
            ty = 0.0
            ux = 0.0
            uy = 0.0
            for i in range(nbas):
                sti = T[c, 0] * rt0[0, i] + T[c, 1] * rt0[1, i] + T[c, 2] * rt0[2, i]
                si = X[c, 0, i] + X[c, 1, i] + X[c, 2, i] + sti
                tx += si * tau[i, q, 0]
                ty += si * tau[i, q, 1]
                ux += sti * tau[i, q, 0]
                uy += sti * tau[i, q, 1]
            sx = (a00 * tx + a01 * ty) / dj
            sy = (a10 * tx + a11 * ty) / dj
            ax = (a00 * ux + a01 * uy) / dj
            ay = (a10 * ux + a11 * uy) / dj
            gx_ = 0.0
            gy_ = 0.0
            for b in range(nloc):
                gx_ += uloc[c, b] * dphi[q, b, 0]
                gy_ += uloc[c, b] * dphi[q, b, 1]
            # grad u = J^-T grad_ref u
            gx = (a11 * gx_ - a10 * gy_) / dj
            gy = (-a01 * gx_ + a00 * gy_) / dj
            wx = sx + Kt[c, 0, 0] * gx + Kt[c, 0, 1] * gy
            wy = sy + Kt[c, 1, 0] * gx + Kt[c, 1, 1] * gy
            e1 += w[q] * dj * (wx * (Kinv[c, 0, 0] * wx + Kinv[c, 0, 1] * wy)
                               + wy * (Kinv[c, 1, 0] * wx + Kinv[c, 1, 1] * wy))
            e2 += w[q] * dj * (ax * (Kinv[c, 0, 0] * ax + Kinv[c, 0, 1] * ay)
                               + ay * (Kinv[c, 1, 0] * ax + Kinv[c, 1, 1] * ay))
        ef2[c] = max(e1, 0.0)
        ea2[c] = max(e2, 0.0)
        for i in range(3):
            for j in range(ne):
                v = 0.0
                for b in range(nbas):
                    v += E[i, j, b] * (X[c, 0, b] + X[c, 1, b] + X[c, 2, b] + T[c, 0] * rt0[0, b]
                                       + T[c, 1] * rt0[1, b] + T[c, 2] * rt0[2, b])
                emom[c, i, j] = v
        dm = 0.0
        csum = corr[c, 0] + corr[c, 1] + corr[c, 2]
        for j in range(nk):
            v = 0.0
            for b in range(nbas):
                v += D[j, b] * (X[c, 0, b] + X[c, 1, b] + X[c, 2, b] + T[c, 0] * rt0[0, b]
                                + T[c, 1] * rt0[1, b] + T[c, 2] * rt0[2, b])
            want = tgt[c, 0, j] + tgt[c, 1, j] + tgt[c, 2, j] + (amount[c] - csum) * qint[j] / qint[0]
            dm = max(dm, abs(v - want))
        divmiss[c] = dm


# -- the estimator --------------------------------------------------------------------
def _source_at(source, disc, cells, pts, xi, Vq):
    """Values of the source at the reference points xi of every cell: (m, nq)."""
    m = cells.shape[0]
    nq = xi.shape[0]
    if not isinstance(source, RegionCoefficient) and np.ndim(source) == 1 \
            and np.shape(source) == (disc.n_dofs,):
        return np.ascontiguousarray(np.asarray(source, dtype=np.float64)[disc.cell_dofs] @ Vq.T)
    lam = np.column_stack([1 - xi.sum(axis=1), xi])
    dim = xi.shape[1]

    def points():
        X = pts[cells]
        return np.matmul(lam, X).transpose(2, 0, 1).reshape(dim, -1)

    fv = scalar_values(source, m, "source", points=points, point_shape=(m, nq))
    fv = np.asarray(fv, dtype=np.float64)
    return np.ascontiguousarray(np.broadcast_to(fv.reshape(fv.shape[0], -1), (m, nq)))


def _monomials_nd(k, dim):
    """Exponent tuples of the monomials of degree <= k in ``dim`` variables, graded,
    each degree in decreasing lexicographic order (``_monomials`` for dim = 2)."""
    def exact(d, n):
        if n == 1:
            return [(d,)]
        return [(a,) + rest for a in range(d, -1, -1) for rest in exact(d - a, n - 1)]
    return [t for d in range(k + 1) for t in exact(d, dim)]


def _hessian_table(el, xi):
    """Exact reference Hessians of the basis at xi: (nq, nloc, d, d), from the
    gradients fitted by monomials of degree k-1 (exact: they are such polynomials);
    triangles and tetrahedra."""
    k = el.degree
    dim = xi.shape[1]
    probe = simplex_quadrature(dim, 2 * k).points
    dphi = el.tabulate_gradients(probe)  # (np, nloc, d)
    mons = _monomials_nd(k - 1, dim)
    A = np.array([np.prod([probe[:, r] ** e[r] for r in range(dim)], axis=0)
                  for e in mons]).T  # (np, nm)
    coef = np.linalg.lstsq(A, dphi.reshape(probe.shape[0], -1), rcond=None)[0]
    coef = coef.reshape(len(mons), el.n_local, dim)  # d phi / d x_r as sum of monomials
    H = np.zeros((xi.shape[0], el.n_local, dim, dim))
    for mi, e in enumerate(mons):
        for t in range(dim):
            if e[t] == 0:
                continue
            d = e[t] * np.prod([xi[:, r] ** (e[r] - (r == t)) for r in range(dim)], axis=0)
            for r in range(dim):
                H[:, :, r, t] += d[:, None] * coef[mi, :, r][None, :]
    return H


def estimate_error_pk(solution, u, quadrature_degree, clock, helpers):
    """The bound for a P_k (k >= 2) solution on triangles; called by
    :func:`galerkit.estimate_error` after its checks.  ``helpers`` is a dict of the
    P1 module's shared functions (conductivity arrays, route, facet values, the
    Dirichlet check).  Returns the pieces of the estimate for the common closing
    step."""
    disc, problem = solution.disc, solution.problem
    mesh = disc.mesh
    el = disc.element
    k = disc.degree
    m = mesh.n_cells
    pts = np.ascontiguousarray(mesh.points, dtype=np.float64)
    cells = np.ascontiguousarray(mesh.cells).astype(np.int64)
    area = np.ascontiguousarray(mesh.cell_volumes, dtype=np.float64)
    kscal, ktens = helpers["conductivity_arrays"](problem.conductivity, m)
    if ktens.shape[0] > 0:
        Kt = np.ascontiguousarray(np.broadcast_to(ktens, (m, 2, 2)))
    else:
        Kt = np.zeros((m, 2, 2))
        s = np.broadcast_to(kscal, (m,))
        Kt[:, 0, 0] = s
        Kt[:, 1, 1] = s
    Kinv = np.ascontiguousarray(np.linalg.inv(Kt))
    lam_min = np.linalg.eigvalsh(0.5 * (Kt + Kt.transpose(0, 2, 1)))[:, 0]
    x0 = pts[cells[:, 0]]
    J = np.ascontiguousarray(np.stack([pts[cells[:, 1]] - x0, pts[cells[:, 2]] - x0], axis=2))
    detJ = J[:, 0, 0] * J[:, 1, 1] - J[:, 0, 1] * J[:, 1, 0]
    if not (detJ > 0).all():
        c = int(np.argmin(detJ))
        raise InputError(f"estimate_error: cell {c} is not positively oriented (det J "
                         f"{detJ[c]:.3e}); build the mesh through galerkit.Mesh")
    Jinv = np.linalg.inv(J)
    h = helpers["cell_diameters"](mesh)
    ref = rt_reference(k)
    nbas, nk = ref["nb"], ref["nk"]
    # one cell rule for the source and all cell integrals
    rule = simplex_quadrature(2, min(20, max(quadrature_degree + k + 1, 2 * k + 2)))
    xi, w = rule.points, np.ascontiguousarray(rule.weights)
    tau, divtau = _rt_values(k, xi)
    tau = np.ascontiguousarray(tau)
    Q = _pk_values(k, xi)  # (nk, nq)
    lamq = np.column_stack([1 - xi.sum(axis=1), xi])  # (nq, 3)
    Vq = el.tabulate(xi)
    dphi = np.ascontiguousarray(el.tabulate_gradients(xi))  # (nq, nloc, 2)
    uloc = np.ascontiguousarray(u[disc.cell_dofs])
    fv = _source_at(problem.source, disc, cells, pts, xi, Vq)
    clock("source")

    # every cell quantity is a matrix product of the local dofs (or the source values)
    # with a reference table, then a small per-cell contraction
    nloc, nq = el.n_local, xi.shape[0]
    Hm = Jinv @ Kt @ Jinv.transpose(0, 2, 1)  # J^-1 K J^-T: (K grad v . grad w) in ref terms
    # divergence targets: int (l_l f - K grad l_l . grad u_h) q_j
    Wf = np.einsum("q,ql,jq->qlj", w, lamq, Q).reshape(nq, -1)
    t1 = detJ[:, None, None] * (fv @ Wf).reshape(m, 3, nk)
    Wg = np.einsum("q,jq,qbs->bjs", w, Q, dphi).reshape(nloc, -1)
    Vg = (uloc @ Wg).reshape(m, nk, 2)  # int q_j grad_ref u_h
    gl_ref = np.array([[-1.0, -1.0], [1.0, 0.0], [0.0, 1.0]])
    glH = np.einsum("lr,crs->cls", gl_ref, Hm)
    t2 = detJ[:, None, None] * (glH @ Vg.transpose(0, 2, 1))
    tgt = np.ascontiguousarray(t1 - t2)
    # linear term of the patch energies: int tau_i . l_l grad_ref u_h
    Wb = np.einsum("q,ql,iqr,qbr->bli", w, lamq, tau, dphi).reshape(nloc, -1)
    bvec = np.ascontiguousarray((uloc @ Wb).reshape(m, 3, nbas))
    G = np.ascontiguousarray(J.transpose(0, 2, 1) @ Kinv @ J)
    R = np.ascontiguousarray(np.einsum("q,iqr,jqs->rsij", w, tau, tau))
    # energy of u_h: sum_rs Hm_rs u^T S_rs u with the reference tables S_rs
    S = np.einsum("q,qar,qbs->rsab", w, dphi, dphi)
    energy = detJ * sum(Hm[:, r, t] * np.einsum("ca,ab,cb->c", uloc, S[r, t], uloc,
                                               optimize=True)
                        for r in range(2) for t in range(2))
    # the cell oscillation of f against its P_k projection
    Gq = (Q * w) @ Q.T
    fmomk = (fv * w) @ Q.T  # (m, nk) reference moments of f
    proj = np.linalg.solve(Gq, fmomk.T).T @ Q  # (m, nq): Pi_k f at the points
    osc = np.sqrt(np.maximum(detJ * (((fv - proj) ** 2) @ w), 0.0))
    # element residual f + div(K grad u_h) = f + sum_rs Hm_rs d_rs u_h (reference Hessian)
    Href = _hessian_table(el, xi)  # (nq, nloc, 2, 2)
    Hu = (uloc @ Href.transpose(1, 0, 2, 3).reshape(nloc, -1)).reshape(m, nq, 4)
    elres = fv + (Hu @ Hm.reshape(m, 4, 1))[:, :, 0]
    elres2 = detJ * ((elres**2) @ w)
    clock("cells")

    vptr, vcell, vloc = helpers["patches"](cells, mesh.n_vertices)
    neighbors = np.empty((m, 3), dtype=np.int64)
    helpers["cell_neighbors"](cells, vptr, vcell, neighbors)
    clock("topology")

    # boundary facets
    bkind = np.where(neighbors < 0, _FLUX, _INTERIOR).astype(np.int8)
    fcell = np.asarray(mesh.boundary_facet_cells, dtype=np.int64)
    floc = np.asarray(mesh.boundary_facet_local, dtype=np.int64)
    nbf = fcell.size
    dirichlet = np.zeros(nbf, dtype=bool)
    for tag, value in problem.dirichlet.items():
        ids = mesh.tagged_facets(tag)
        dirichlet[ids] = True
        _check_dirichlet_pk(tag, value, mesh, ids, k)
    bkind[fcell[dirichlet], floc[dirichlet]] = _DIRICHLET
    a_loc = (floc + 1) % 3
    b_loc = (floc + 2) % 3
    xa = pts[cells[fcell, a_loc]]
    xb = pts[cells[fcell, b_loc]]
    # u_h and K grad u_h . n at the Gauss points of each boundary facet
    uq = np.empty((nbf, _GL_T.size))
    nflux = np.empty((nbf, _GL_T.size))
    tvec = xb - xa
    flen = np.sqrt((tvec**2).sum(axis=1))
    nrm = np.column_stack([tvec[:, 1], -tvec[:, 0]]) / flen[:, None]  # outward (ccw cells)
    for i in range(3):
        sel = np.flatnonzero(floc == i)
        if not sel.size:
            continue
        pe = _edge_points(i, _GL_T)
        uq[sel] = uloc[fcell[sel]] @ el.tabulate(pe).T
        nflux[sel] = _normal_flux(uloc[fcell[sel]], el.tabulate_gradients(pe), Jinv[fcell[sel]],
                                  Kt[fcell[sel]], nrm[sel])
    gq = np.zeros((nbf, _GL_T.size))
    for tag, flux in problem.neumann.items():
        ids = mesh.tagged_facets(tag)
        gq[ids] += helpers["facet_values"](flux, ids, xa, xb, f"neumann[{tag!r}]")
    for tag, (alpha, uext) in problem.robin.items():
        ids = mesh.tagged_facets(tag)
        av = helpers["facet_values"](alpha, ids, xa, xb, f"robin[{tag!r}] alpha")
        uv = helpers["facet_values"](uext, ids, xa, xb, f"robin[{tag!r}] u_ext")
        gq[ids] += av * (uv - uq[ids])
    L = _legendre01(k, _GL_T)  # (k+1, ng)
    fl = np.flatnonzero(~dirichlet)
    gmom = np.zeros((m, 3, 3, k + 1))
    # prescribed outward moments -int_F psi_a g L_j for the two vertices of the facet
    ma = -flen[:, None] * np.einsum("g,fg,jg->fj", _GL_W * (1 - _GL_T), gq, L)
    mb = -flen[:, None] * np.einsum("g,fg,jg->fj", _GL_W * _GL_T, gq, L)
    gmom[fcell[fl], floc[fl], a_loc[fl]] = ma[fl]
    gmom[fcell[fl], floc[fl], b_loc[fl]] = mb[fl]
    coef = (2 * np.arange(k + 1) + 1)[None, :] * np.einsum("g,fg,jg->fj", _GL_W, gq, L)
    gproj = coef @ L
    goscn = np.sqrt(flen * (((gq - gproj) ** 2) * _GL_W[None, :]).sum(axis=1))
    c_trace = h[fcell] * np.sqrt(flen / area[fcell] * (1 / math.pi**2 + 1 / math.pi))
    bosc = np.zeros(m)
    np.add.at(bosc, fcell[fl], (c_trace * goscn / np.sqrt(lam_min[fcell]))[fl])
    resq = flen * (((gq - nflux) ** 2) * _GL_W[None, :]).sum(axis=1)
    bres = np.zeros(m)
    np.add.at(bres, fcell[fl], (flen * resq / lam_min[fcell])[fl])
    clock("boundary")

    X = np.empty((m, 3, nbas))
    corr = np.empty((m, 3))
    _patch_solve(cells, neighbors, bkind, vptr, vcell, vloc, G, np.ascontiguousarray(detJ),
                 bvec, tgt, np.ascontiguousarray(gmom), R, ref["D"], ref["E"], ref["qint"],
                 X, corr)
    clock("patches")
    amount = np.ascontiguousarray(corr.sum(axis=1))
    T = np.zeros((m, 3))
    parent = np.empty(m, dtype=np.int64)
    order = np.empty(m, dtype=np.int64)
    n_floating = np.zeros(1, dtype=np.int64)
    unrouted = helpers["route"](neighbors, bkind, amount, area, T, parent, order, n_floating)
    clock("route")

    ef2 = np.empty(m)
    ea2 = np.empty(m)
    emom = np.empty((m, 3, k + 1))
    divmiss = np.empty(m)
    _cell_energy(J, Kt, Kinv, np.ascontiguousarray(detJ), uloc, dphi, w, tau, X, T, ref["rt0"],
                 ref["D"], ref["E"], ref["qint"], tgt, corr, amount, ef2, ea2, emom, divmiss)
    _check_flux_pk(emom, divmiss, neighbors, cells, bkind, gmom, tgt)
    eo = h / math.pi * osc / np.sqrt(lam_min)
    eta = np.sqrt(ef2) + eo + bosc
    # residual estimator: jumps of K grad u_h . n along interior edges
    jumps = np.zeros(m)
    for i in range(3):
        pe = _edge_points(i, _GL_T)
        pa = pts[cells[:, (i + 1) % 3]]
        pb = pts[cells[:, (i + 2) % 3]]
        tv = pb - pa
        he = np.sqrt((tv**2).sum(axis=1))
        nv = np.column_stack([tv[:, 1], -tv[:, 0]]) / he[:, None]
        if i == 0:
            qn = np.empty((3, m, _GL_T.size))
            hE = np.empty((3, m))
        qn[i] = _normal_flux(uloc, el.tabulate_gradients(pe), Jinv, Kt, nv)
        hE[i] = he
    ci, ii = np.nonzero(neighbors >= 0)
    other = neighbors[ci, ii]
    back = np.argmax(neighbors[other] == ci[:, None], axis=1)
    same = cells[ci, (ii + 1) % 3] == cells[other, (back + 1) % 3]
    qo = qn[back, other]
    qo = np.where(same[:, None], qo, qo[:, ::-1])
    jump2 = ((qn[ii, ci] + qo) ** 2 * _GL_W[None, :]).sum(axis=1)
    lamF = np.maximum(lam_min[ci], lam_min[other])
    np.add.at(jumps, ci, hE[ii, ci] ** 2 * jump2 / (2 * lamF))
    res_ind = np.ascontiguousarray(np.sqrt(h**2 / lam_min * elres2 + jumps + bres))
    fscale = float(np.abs(tgt).sum() + np.abs(gmom).sum())
    scoef = X.sum(axis=1) + T @ ref["rt0"]  # coefficients of sigma_h per cell

    def residual_at(xq):
        """``sigma_h + K grad u_h`` at reference points xq of every cell: (m, nq, 2)."""
        tq, _ = _rt_values(k, xq)
        sig = np.einsum("crs,cqs->cqr", J, np.einsum("ci,iqr->cqr", scoef, tq))
        sig /= detJ[:, None, None]
        gref = np.einsum("cb,qbr->cqr", uloc, el.tabulate_gradients(xq))
        return sig + np.einsum("cij,cqj->cqi", Kt, np.einsum("cqr,crs->cqs", gref, Jinv))

    return {"residual_at": residual_at, "J": J, "Kinv": Kinv,
            "eta": eta, "res_ind": res_ind, "ef2": ef2, "ea2": ea2, "eo": eo, "bosc": bosc,
            "energy": energy, "unrouted": unrouted, "n_floating": int(n_floating[0]),
            "scale": fscale, "gap": _quadrature_gap(problem.source, disc, cells, pts, xi, w,
                                                    detJ, fv, quadrature_degree, k)}


def _normal_flux(uloc, dphi_e, Jinv, Kt, nrm):
    """``K grad u_h . n`` at the points of an edge (a face): dphi_e (ng, nloc, d)
    reference gradients there, nrm (m, d) the unit normals; returns (m, ng)."""
    m, nloc = uloc.shape
    ng = dphi_e.shape[0]
    gr = (uloc @ dphi_e.transpose(1, 0, 2).reshape(nloc, -1)).reshape(m, ng, dphi_e.shape[2])
    gx = gr @ Jinv  # grad u_h = J^-T grad_ref u_h
    kn = (Kt.transpose(0, 2, 1) @ nrm[:, :, None])[:, :, 0]  # K^T n
    return (gx * kn[:, None, :]).sum(axis=2)


def _quadrature_gap(source, disc, cells, pts, xi, w, detJ, fv, degree, k):
    """Largest total difference of the cell integrals of f between this rule and one
    two degrees higher (callable sources only)."""
    if not (callable(source) or (isinstance(source, RegionCoefficient) and source.has_callable)):
        return 0.0
    d2 = min(20, max(degree + k + 1, 2 * k + 2) + 2)
    rule2 = simplex_quadrature(xi.shape[1], d2)
    fv2 = _source_at(source, disc, cells, pts, rule2.points, disc.element.tabulate(rule2.points))
    i1 = detJ * (fv @ w)
    i2 = detJ * (fv2 @ rule2.weights)
    return float(np.abs(i2 - i1).sum())


def _check_dirichlet_pk(tag, value, mesh, ids, k):
    """Dirichlet data must lie in the discrete space: a polynomial of degree <= k
    along each facet (then the interpolant is the data)."""
    if not callable(value):
        return
    f = mesh.boundary_facets[ids]
    xa, xb = mesh.points[f[:, 0]], mesh.points[f[:, 1]]
    t = np.linspace(0.0, 1.0, 2 * k + 3)
    x = xa[:, None, :] * (1 - t)[None, :, None] + xb[:, None, :] * t[None, :, None]
    g = np.asarray(evaluate_callable(value, np.ascontiguousarray(x.reshape(-1, 2).T),
                                     f"dirichlet[{tag!r}]"), dtype=np.float64).reshape(len(ids), -1)
    V = np.vander(t, k + 1)
    fit = V @ np.linalg.lstsq(V, g.T, rcond=None)[0]
    dev = np.abs(g - fit.T).max(axis=1)
    tol = 1e-10 * max(float(np.abs(g).max()), 1e-300)
    if (dev > tol).any():
        i = int(np.argmax(dev))
        raise UnsupportedError(
            f"estimate_error: dirichlet[{tag!r}] is not a polynomial of degree {k} along "
            f"boundary facet {int(ids[i])} (deviation {dev[i]:.3e} from its P{k} fit): "
            "Dirichlet data outside the discrete space add a lifting term that is not "
            "implemented. Give the condition as Neumann data (K du/dn) there, or use data "
            f"polynomial of degree <= {k} per facet")


def _check_flux_pk(emom, divmiss, neighbors, cells, bkind, gmom, tgt):
    """The flux must meet its divergence moments, be conforming and meet the boundary
    data (checks of what the compiled kernels returned)."""
    scale = max(float(np.abs(emom).max(initial=0.0)), float(np.abs(tgt).max(initial=0.0)),
                1e-300)
    tol = 1e-8 * scale
    if (divmiss > tol).any():
        c = int(np.argmax(divmiss))
        raise RuntimeError(f"estimate_error: the equilibrated flux misses the source on cell "
                           f"{c} by {divmiss[c]:.3e}; internal error, please report with the mesh")
    ci, ii = np.nonzero(neighbors >= 0)
    other = neighbors[ci, ii]
    back = np.argmax(neighbors[other] == ci[:, None], axis=1)
    same = cells[ci, (ii + 1) % 3] == cells[other, (back + 1) % 3]
    ne = emom.shape[2]
    sg = np.where(same[:, None], 1.0, (-1.0) ** np.arange(ne)[None, :])
    jump = np.abs(emom[ci, ii] + sg * emom[other, back]).max(axis=1) if ci.size else np.zeros(0)
    if (jump > tol).any():
        j = int(np.argmax(jump))
        raise RuntimeError(f"estimate_error: the equilibrated flux is not conforming across the "
                           f"facet between cells {int(ci[j])} and {int(other[j])} (jump "
                           f"{jump[j]:.3e}); internal error, please report with the mesh")
    miss = np.where((bkind == _FLUX)[:, :, None], np.abs(emom - gmom.sum(axis=2)), 0.0)
    if (miss > tol).any():
        c, i, _ = np.unravel_index(int(np.argmax(miss)), miss.shape)
        raise RuntimeError(f"estimate_error: the equilibrated flux misses the boundary data on "
                           f"facet {i} of cell {c} by {miss[c, i].max():.3e}; internal error")
