"""Equilibrated fluxes of degree k on tetrahedra: the vertex-patch mixed problems.

The construction of :mod:`galerkit.equilibration` in 3D.  For a P_k solution
``u_h`` (k = 2, 3, 4) of ``-div(K grad u) = f`` on tetrahedra,
:func:`estimate_error_pk_tetrahedra` builds a flux ``sigma_h`` in the
Raviart--Thomas space RT_k (divergence in P_k) as a sum of local fluxes on the
vertex patches (Braess, Pillwein & Schoeberl 2009; Ern & Vohralik 2015, SIAM J.
Numer. Anal. 53): on the patch of vertex ``a`` with hat function ``psi_a``,

    sigma_a = argmin ||K^(-1/2)(tau + psi_a K grad u_h)||  over tau in RT_k(patch)
    with  div tau = Pi_k(psi_a f - K grad psi_a . grad u_h)  on each cell,
          tau . n = Pi_k(-psi_a g)  on Neumann/Robin faces,
          tau . n = 0  on the rest of the patch boundary (free on Dirichlet faces).

RT_k on the reference tetrahedron has the basis ``P_k^3 + x P~_k`` (``P~_k`` the
homogeneous polynomials of degree k; coordinates centred at the centroid),
``(k+1)(k+2)(k+4)/2`` fields, mapped to each cell by the contravariant Piola map
(which keeps normal moments and divergence moments).  Normal continuity and the
boundary data are imposed as moments against P_k on each face in the face's
barycentric coordinates *ordered by the global vertex numbers*, so the two cells of
a face use the same test functions (the table of each cell is one of the six
permutations of the face's vertices).

Each patch problem is a saddle-point system in the broken basis, solved exactly by
condensation: per cell, once for its four patches (``_cell_blocks_3d``), the mass
matrix (Cholesky) gives the cell's block of the multiplier Schur complement over all
its constraint rows; in a patch, the rows private to a cell (its divergence moments,
the face opposite the vertex, its boundary faces) are eliminated inside the cell,
leaving a dense system in the moments of the faces shared by two cells of the patch
(Cholesky).  One compiled parallel kernel runs over the vertices in fixed chunks
with per-chunk work arrays; every vertex writes only its own slots, so the result
is the same for any thread count.  Without a free (Dirichlet) face, the residual of
a patch (an iterative solve, a quadrature) is taken out and routed along a spanning
tree of the cells to Dirichlet facets as a lowest order field (``_route``).

The bound and its terms are those of :mod:`galerkit.equilibration`: flux misfit,
cell oscillation ``h_K / pi ||f - Pi_k f||``, boundary-data oscillation
``C_F ||g - Pi_k g||_F`` with the 3D trace constant of :mod:`galerkit.estimators3d`;
the residual estimator has the element residual ``f + div(K grad u_h)`` and the
face jumps of ``K grad u_h . n``.
"""

from __future__ import annotations

import itertools
import math

import numba as nb
import numpy as np

from .coefficients import evaluate_callable
from .equilibration import (_chol, _chol_solve, _hessian_table, _monomials_nd, _normal_flux,
                            _quadrature_gap, _source_at)
from .errors import InputError, UnsupportedError
from .estimators3d import (_FACES, _conductivity_tensor_3d, _face_diameters, _facet_values_3d,
                           _neighbors_from_faces, _vertex_patches_3d)
from .quadrature import simplex_quadrature
from .topology import enumerate_entities

__all__ = ["estimate_error_pk_tetrahedra", "rt_reference_3d"]

_REF_V = np.array([[0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]])
_REF_N = np.array([[1.0, 1.0, 1.0], [-1.0, 0.0, 0.0], [0.0, -1.0, 0.0], [0.0, 0.0, -1.0]])
_REF_N = _REF_N / np.sqrt((_REF_N**2).sum(axis=1))[:, None]  # outward unit normals
_REF_AREA = np.array([math.sqrt(3.0) / 2, 0.5, 0.5, 0.5])
_GL_REF = np.array([[-1.0, -1.0, -1.0], [1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]])
#: the six orders of the three vertices of a face (positions in ``_FACES[i]``)
_PERMS = list(itertools.permutations(range(3)))
_INTERIOR, _DIRICHLET, _FLUX = 0, 1, 2


# -- reference data ---------------------------------------------------------------
def _pk_values_3d(k, xi):
    """P_k monomials in centred coordinates at reference points xi (n, 3): (nk, n)."""
    s = xi - 0.25
    return np.array([s[:, 0] ** a * s[:, 1] ** b * s[:, 2] ** c
                     for a, b, c in _monomials_nd(k, 3)])


def _rt_values_3d(k, xi):
    """Reference RT_k basis at xi (n, 3): values (nb, n, 3) and divergences (nb, n).
    Basis: m e_r for the monomials m of degree <= k and r = 0, 1, 2, then s p for the
    monomials p of degree exactly k (s the centred coordinates)."""
    s = xi - 0.25
    zero = np.zeros(xi.shape[0])
    vals, divs = [], []

    def mono(e):
        return s[:, 0] ** e[0] * s[:, 1] ** e[1] * s[:, 2] ** e[2]

    for r in range(3):
        for e in _monomials_nd(k, 3):
            v = np.zeros((xi.shape[0], 3))
            v[:, r] = mono(e)
            vals.append(v)
            if e[r]:
                d = list(e)
                d[r] -= 1
                divs.append(e[r] * mono(d))
            else:
                divs.append(zero.copy())
    for e in _monomials_nd(k, 3):
        if sum(e) != k:
            continue
        p = mono(e)
        vals.append(s * p[:, None])
        divs.append((k + 3) * p)
    return np.array(vals), np.array(divs)


def _face_points(i, p, bary):
    """Reference points of face i at the barycentric points ``bary`` (ng, 3) of its
    vertices taken in the order ``_PERMS[p]`` (the order of their global numbers)."""
    verts = _FACES[i][list(_PERMS[p])]
    return bary @ _REF_V[verts]


def _face_tests(k, bary):
    """Face test functions: monomials mu_1^a mu_2^b (a + b <= k) of the ordered face
    barycentric coordinates at the points ``bary``: (nf, ng)."""
    return np.array([bary[:, 1] ** a * bary[:, 2] ** b for a, b in _monomials_nd(k, 2)])


def rt_reference_3d(k):
    """Reference tables of RT_k on the unit tetrahedron (vertices 0, e_x, e_y, e_z).

    Returns a dict with ``nb`` (basis size ``(k+1)(k+2)(k+4)/2``), ``nk`` (size of
    P_k), ``nf`` (size of P_k on a face), ``D`` (nk, nb) divergence moments
    ``int div tau_i q_j``, ``E`` (4, 6, nf, nb) outward normal moments
    ``int_F tau_i . n q_j`` on face i (opposite vertex i) with the face's vertices in
    the order of permutation p (:data:`_PERMS`), ``qint`` (nk,) integrals of the cell
    monomials, ``rt0`` (4, nb) coefficients of the lowest-order field ``2 (x - V_i)``
    (unit outward flux through face i, none through the others).
    """
    nb_ = (k + 1) * (k + 2) * (k + 4) // 2
    nk = (k + 1) * (k + 2) * (k + 3) // 6
    nf = (k + 1) * (k + 2) // 2
    rule = simplex_quadrature(3, 2 * k + 2)
    xi, w = rule.points, rule.weights
    V, dV = _rt_values_3d(k, xi)
    Q = _pk_values_3d(k, xi)
    D = np.einsum("q,iq,jq->ji", w, dV, Q)
    qint = Q @ w
    frule = simplex_quadrature(2, 2 * k + 2)
    bary = np.column_stack([1 - frule.points.sum(axis=1), frule.points])
    fw = 2.0 * frule.weights  # sums to 1
    qf = _face_tests(k, bary)
    E = np.empty((4, 6, nf, nb_))
    for i in range(4):
        for p in range(6):
            Ve, _ = _rt_values_3d(k, _face_points(i, p, bary))
            flux = Ve @ _REF_N[i]  # (nb, ng)
            E[i, p] = _REF_AREA[i] * np.einsum("g,ig,jg->ji", fw, flux, qf)
    A = V.transpose(1, 2, 0).reshape(-1, nb_)
    rt0 = np.empty((4, nb_))
    for i in range(4):
        rt0[i] = np.linalg.lstsq(A, (2.0 * (xi - _REF_V[i])).reshape(-1), rcond=None)[0]
    return {"nb": nb_, "nk": nk, "nf": nf, "D": np.ascontiguousarray(D),
            "E": np.ascontiguousarray(E), "qint": np.ascontiguousarray(qint),
            "rt0": np.ascontiguousarray(rt0)}


# -- compiled kernels ---------------------------------------------------------------
@nb.njit(cache=True, parallel=True)
def _cell_blocks_3d(perm, G, detJ, bvec, R, D, E, W, Sfull, MB, GB):
    """Per cell, once: with the cell's RT_k mass matrix M (K^-1 product, Cholesky) and
    its constraint rows C (the nk divergence moments, then the nf moments of each of
    the four faces): ``W = M^-1 C^T``, ``Sfull = C M^-1 C^T``, ``MB[c, l] = M^-1 b_l``
    and ``GB[c, l] = C M^-1 b_l`` for the patch of each local vertex l."""
    m = G.shape[0]
    nbas = D.shape[1]
    nk = D.shape[0]
    nf = E.shape[2]
    mf = nk + 4 * nf
    nchunk = min(m, 256)
    for ch in nb.prange(nchunk):
        Lm = np.empty((nbas, nbas))
        Cf = np.empty((mf, nbas))
        z = np.empty(nbas)
        for c in range(ch * m // nchunk, (ch + 1) * m // nchunk):
            for i in range(nbas):
                for j in range(i + 1):
                    v = 0.0
                    for s in range(3):
                        for t in range(3):
                            v += G[c, s, t] * R[s, t, i, j]
                    Lm[i, j] = v / detJ[c]
                    Lm[j, i] = Lm[i, j]
            _chol(Lm, nbas)
            for j in range(nk):
                for i in range(nbas):
                    Cf[j, i] = D[j, i]
            for f in range(4):
                pf = perm[c, f]
                for j in range(nf):
                    for i in range(nbas):
                        Cf[nk + f * nf + j, i] = E[f, pf, j, i]
            for u in range(mf):
                for i in range(nbas):
                    z[i] = Cf[u, i]
                _chol_solve(Lm, nbas, z)
                for i in range(nbas):
                    W[c, i, u] = z[i]
            for u in range(mf):
                for v in range(u + 1):
                    s_ = 0.0
                    for i in range(nbas):
                        s_ += Cf[u, i] * W[c, i, v]
                    Sfull[c, u, v] = s_
                    Sfull[c, v, u] = s_
            for l_ in range(4):
                for i in range(nbas):
                    z[i] = bvec[c, l_, i]
                _chol_solve(Lm, nbas, z)
                for i in range(nbas):
                    MB[c, l_, i] = z[i]
                for u in range(mf):
                    s_ = 0.0
                    for i in range(nbas):
                        s_ += Cf[u, i] * z[i]
                    GB[c, l_, u] = s_


@nb.njit(cache=True, parallel=True)
def _patch_solve_3d(a_lo, a_hi, neighbors, bkind, vptr, vcell, vloc, detJ, tgt, gmom, qint,
                    slot, W, Sfull, MB, GB, X, corr):
    """Solve the RT_k mixed problem of every vertex patch (tetrahedra).

    Per cell c: ``W[slot[c]]``, ``Sfull``, ``MB``, ``GB`` from :func:`_cell_blocks_3d` (for the
    cells of the vertices ``a_lo <= a < a_hi``),
    ``detJ[c]``, ``tgt[c, l]`` (divergence moments of the patch of local vertex l),
    ``gmom[c, i, l]`` (prescribed outward moments on flux face i).  The rows of each patch cell are a subset of its full rows (without the free
    Dirichlet faces and, once per component without a free face, the mean divergence
    row); the rows private to the cell are eliminated inside it (Schur complement),
    the faces shared by two patch cells form one dense system (Cholesky).  Writes
    ``X[c, l]`` (the patch flux of local vertex l on c) and ``corr[c, l]`` (the
    integral of divergence taken out to make the patch solvable).
    """
    n = a_hi - a_lo
    nbas = W.shape[1]
    nk = tgt.shape[2]
    nf = gmom.shape[3]
    kmax = 1
    for a in range(a_lo, a_hi):
        kmax = max(kmax, vptr[a + 1] - vptr[a])
    mmax = nk + 4 * nf  # constraint rows of one cell
    nhmax = ((3 * kmax) // 2 + 1) * nf  # rows of the faces shared in a patch
    nchunk = min(n, 256)
    for ch in nb.prange(nchunk):
        Sp = np.empty((mmax, mmax))
        A = np.empty((mmax, mmax))
        z = np.empty(mmax)
        r = np.empty(mmax)
        lam = np.empty(mmax)
        idx = np.empty((kmax, mmax), np.int64)  # full row of each row of a patch cell
        AB = np.empty((kmax, mmax, 3 * nf))  # A^-1 B (private rows x shared rows)
        rp = np.empty((kmax, mmax))  # A^-1 r_P
        npv = np.empty(kmax, np.int64)
        nhv = np.empty(kmax, np.int64)
        hrow = np.empty((kmax, 3 * nf), np.int64)
        fgrp = np.empty((kmax, 4), np.int64)  # -1 free, -2 private row, >= 0 shared group
        gp = np.empty(nhmax, np.int64)
        gq = np.empty(nhmax, np.int64)
        comp = np.empty(kmax, np.int64)
        free = np.empty(kmax, np.bool_)
        cr = np.empty(kmax)
        j0 = np.empty(kmax, np.int64)
        cc = np.empty(kmax, np.int64)
        ll = np.empty(kmax, np.int64)
        S = np.empty((nhmax, nhmax))
        rhs = np.empty(nhmax)
        for a in range(a_lo + ch * n // nchunk, a_lo + (ch + 1) * n // nchunk):
            s0 = vptr[a]
            k = vptr[a + 1] - s0
            for p in range(k):
                cc[p] = vcell[s0 + p]
                ll[p] = vloc[s0 + p]
                for i in range(4):
                    fgrp[p, i] = -3
            # face kinds: free (Dirichlet), private row, or shared between two cells
            ng = 0
            for p in range(k):
                c = cc[p]
                for i in range(4):
                    if fgrp[p, i] != -3:
                        continue
                    o = neighbors[c, i]
                    if o < 0:
                        fgrp[p, i] = -1 if bkind[c, i] == 1 else -2
                        continue
                    q = -1
                    if i != ll[p]:
                        for p2 in range(k):
                            if cc[p2] == o:
                                q = p2
                                break
                    if q < 0:
                        fgrp[p, i] = -2  # the face opposite a: zero flux
                        continue
                    for i2 in range(4):
                        if neighbors[o, i2] == c:
                            fgrp[q, i2] = ng
                    fgrp[p, i] = ng
                    gp[ng] = p
                    gq[ng] = q
                    ng += 1
            # components of the patch through shared faces (smallest cell label)
            for p in range(k):
                comp[p] = p
            changed = True
            while changed:
                changed = False
                for g in range(ng):
                    lo = min(comp[gp[g]], comp[gq[g]])
                    if comp[gp[g]] != lo or comp[gq[g]] != lo:
                        comp[gp[g]] = lo
                        comp[gq[g]] = lo
                        changed = True
            for p in range(k):
                free[p] = False
            for p in range(k):
                for i in range(4):
                    if fgrp[p, i] == -1:
                        free[comp[p]] = True
            # compatibility: a component without a free face gives its residual away
            for p in range(k):
                cr[p] = 0.0
                j0[p] = 0
            for root in range(k):
                if comp[root] != root or free[root]:
                    continue
                tot = 0.0
                vs = 0.0
                for p in range(k):
                    if comp[p] != root:
                        continue
                    c = cc[p]
                    tot += tgt[c, ll[p], 0]
                    vs += detJ[c]
                    for i in range(4):
                        if fgrp[p, i] == -2 and neighbors[c, i] < 0:
                            tot -= gmom[c, i, ll[p], 0]
                for p in range(k):
                    if comp[p] == root:
                        cr[p] = tot * detJ[cc[p]] / vs
                j0[root] = 1  # its mean divergence row is implied by the others
            for p in range(k):
                corr[cc[p], ll[p]] = cr[p]
            nh = ng * nf
            for u in range(nh):
                rhs[u] = 0.0
                for v in range(nh):
                    S[u, v] = 0.0
            # per cell: the Schur block of its rows, private rows eliminated
            for p in range(k):
                c = cc[p]
                la = ll[p]
                # rows: divergence, private faces, then shared faces
                u = 0
                for j in range(j0[p], nk):
                    idx[p, u] = j
                    r[u] = tgt[c, la, j] - cr[p] * qint[j] / qint[0]
                    u += 1
                for f in range(4):
                    if fgrp[p, f] != -2:
                        continue
                    bnd = neighbors[c, f] < 0
                    for j in range(nf):
                        idx[p, u] = nk + f * nf + j
                        r[u] = gmom[c, f, la, j] if bnd else 0.0
                        u += 1
                npr = u
                t = 0
                for f in range(4):
                    if fgrp[p, f] < 0:
                        continue
                    for j in range(nf):
                        idx[p, u] = nk + f * nf + j
                        r[u] = 0.0
                        hrow[p, t] = fgrp[p, f] * nf + j
                        u += 1
                        t += 1
                mrow = u
                npv[p] = npr
                nhv[p] = mrow - npr
                sc = slot[c]
                for u in range(mrow):
                    r[u] += GB[sc, la, idx[p, u]]
                    for v in range(mrow):
                        Sp[u, v] = Sfull[sc, idx[p, u], idx[p, v]]
                # eliminate the private rows: A = S_PP, AB = A^-1 S_PH, rp = A^-1 r_P
                for u in range(npr):
                    for v in range(npr):
                        A[u, v] = Sp[u, v]
                _chol(A, npr)
                nhp = mrow - npr
                for t in range(nhp):
                    for u in range(npr):
                        z[u] = Sp[u, npr + t]
                    _chol_solve(A, npr, z)
                    for u in range(npr):
                        AB[p, u, t] = z[u]
                for u in range(npr):
                    z[u] = r[u]
                _chol_solve(A, npr, z)
                for u in range(npr):
                    rp[p, u] = z[u]
                for t1 in range(nhp):
                    h1 = hrow[p, t1]
                    s_ = r[npr + t1]
                    for u in range(npr):
                        s_ -= Sp[u, npr + t1] * rp[p, u]
                    rhs[h1] += s_
                    for t2 in range(nhp):
                        s_ = Sp[npr + t1, npr + t2]
                        for u in range(npr):
                            s_ -= Sp[u, npr + t1] * AB[p, u, t2]
                        S[h1, hrow[p, t2]] += s_
            if nh > 0:
                _chol(S, nh)
                _chol_solve(S, nh, rhs)
            # back substitution: multipliers of each cell, then its flux
            for p in range(k):
                c = cc[p]
                npr = npv[p]
                nhp = nhv[p]
                for u in range(npr):
                    s_ = rp[p, u]
                    for t in range(nhp):
                        s_ -= AB[p, u, t] * rhs[hrow[p, t]]
                    lam[u] = s_
                for t in range(nhp):
                    lam[npr + t] = rhs[hrow[p, t]]
                sc = slot[c]
                for i in range(nbas):
                    s_ = -MB[sc, ll[p], i]
                    for u in range(npr + nhp):
                        s_ += W[sc, i, idx[p, u]] * lam[u]
                    X[c, ll[p], i] = s_


#: work memory of the cell blocks (``_cell_blocks_3d``) of one batch of vertices
BLOCK_BYTES = 256 * 2**20


def _patches(neighbors, bkind, perm, vptr, vcell, vloc, G, detJ, bvec, tgt, gmom, R, ref, X,
             corr):
    """The patch problems of all vertices, in batches of consecutive vertices whose
    cells' blocks fit in :data:`BLOCK_BYTES` (a cell's block is computed the same way
    in every batch that needs it, so the result does not depend on the batches)."""
    D, E, qint = ref["D"], ref["E"], ref["qint"]
    nk, nbas = D.shape
    nf = E.shape[2]
    mf = nk + 4 * nf
    cap = max(1, BLOCK_BYTES // (8 * (nbas * mf + mf * mf + 4 * nbas + 4 * mf)))
    n = vptr.shape[0] - 1
    slot = np.full(G.shape[0], -1, dtype=np.int64)
    a0 = 0
    while a0 < n:
        a1 = int(np.searchsorted(vptr, vptr[a0] + cap, side="right")) - 1
        a1 = min(max(a1, a0 + 1), n)
        cells = np.unique(vcell[vptr[a0]:vptr[a1]])
        slot[cells] = np.arange(cells.size)
        nc = cells.size
        W = np.empty((nc, nbas, mf))
        Sfull = np.empty((nc, mf, mf))
        MB = np.empty((nc, 4, nbas))
        GB = np.empty((nc, 4, mf))
        _cell_blocks_3d(np.ascontiguousarray(perm[cells]), np.ascontiguousarray(G[cells]),
                        np.ascontiguousarray(detJ[cells]), np.ascontiguousarray(bvec[cells]),
                        R, D, E, W, Sfull, MB, GB)
        _patch_solve_3d(a0, a1, neighbors, bkind, vptr, vcell, vloc, detJ, tgt, gmom, qint,
                        slot, W, Sfull, MB, GB, X, corr)
        a0 = a1


@nb.njit(cache=True, parallel=True)
def _cell_energy_3d(J, Jinv, Kt, Kinv, detJ, uloc, dphi, w, tau, X, T, rt0, D, E, perm,
                    qint, tgt, corr, amount, ef2, ea2, emom, divmiss):
    """Per cell: ``ef2 = ||K^-1/2(sigma_h + K grad u_h)||**2``, ``ea2`` the same of the
    routed field alone, ``emom[c, i, j]`` the outward normal moments of sigma_h on
    face i and ``divmiss[c]`` the largest miss of its divergence moments."""
    m = J.shape[0]
    nbas = D.shape[1]
    nk = D.shape[0]
    nf = E.shape[2]
    nq = w.shape[0]
    nloc = uloc.shape[1]
    nchunk = min(m, 256)
    for ch in nb.prange(nchunk):
        sc = np.empty(nbas)
        st = np.empty(nbas)
        for c in range(ch * m // nchunk, (ch + 1) * m // nchunk):
            for i in range(nbas):
                v = 0.0
                for l_ in range(4):
                    v += T[c, l_] * rt0[l_, i]
                st[i] = v
                sc[i] = X[c, 0, i] + X[c, 1, i] + X[c, 2, i] + X[c, 3, i] + v
            dj = detJ[c]
            e1 = 0.0
            e2 = 0.0
            for q in range(nq):
                t0 = 0.0
                t1 = 0.0
                t2 = 0.0
                a0 = 0.0
                a1 = 0.0
                a2 = 0.0
                for i in range(nbas):
                    t0 += sc[i] * tau[i, q, 0]
                    t1 += sc[i] * tau[i, q, 1]
                    t2 += sc[i] * tau[i, q, 2]
                    a0 += st[i] * tau[i, q, 0]
                    a1 += st[i] * tau[i, q, 1]
                    a2 += st[i] * tau[i, q, 2]
                g0 = 0.0
                g1 = 0.0
                g2 = 0.0
                for b in range(nloc):
                    g0 += uloc[c, b] * dphi[q, b, 0]
                    g1 += uloc[c, b] * dphi[q, b, 1]
                    g2 += uloc[c, b] * dphi[q, b, 2]
                # grad u_h = J^-T grad_ref u_h, sigma = J sigma_ref / det J (Piola)
                gx = Jinv[c, 0, 0] * g0 + Jinv[c, 1, 0] * g1 + Jinv[c, 2, 0] * g2
                gy = Jinv[c, 0, 1] * g0 + Jinv[c, 1, 1] * g1 + Jinv[c, 2, 1] * g2
                gz = Jinv[c, 0, 2] * g0 + Jinv[c, 1, 2] * g1 + Jinv[c, 2, 2] * g2
                wx = ((J[c, 0, 0] * t0 + J[c, 0, 1] * t1 + J[c, 0, 2] * t2) / dj
                      + Kt[c, 0, 0] * gx + Kt[c, 0, 1] * gy + Kt[c, 0, 2] * gz)
                wy = ((J[c, 1, 0] * t0 + J[c, 1, 1] * t1 + J[c, 1, 2] * t2) / dj
                      + Kt[c, 1, 0] * gx + Kt[c, 1, 1] * gy + Kt[c, 1, 2] * gz)
                wz = ((J[c, 2, 0] * t0 + J[c, 2, 1] * t1 + J[c, 2, 2] * t2) / dj
                      + Kt[c, 2, 0] * gx + Kt[c, 2, 1] * gy + Kt[c, 2, 2] * gz)
                ax = (J[c, 0, 0] * a0 + J[c, 0, 1] * a1 + J[c, 0, 2] * a2) / dj
                ay = (J[c, 1, 0] * a0 + J[c, 1, 1] * a1 + J[c, 1, 2] * a2) / dj
                az = (J[c, 2, 0] * a0 + J[c, 2, 1] * a1 + J[c, 2, 2] * a2) / dj
                e1 += w[q] * dj * (wx * (Kinv[c, 0, 0] * wx + Kinv[c, 0, 1] * wy
                                         + Kinv[c, 0, 2] * wz)
                                   + wy * (Kinv[c, 1, 0] * wx + Kinv[c, 1, 1] * wy
                                           + Kinv[c, 1, 2] * wz)
                                   + wz * (Kinv[c, 2, 0] * wx + Kinv[c, 2, 1] * wy
                                           + Kinv[c, 2, 2] * wz))
                e2 += w[q] * dj * (ax * (Kinv[c, 0, 0] * ax + Kinv[c, 0, 1] * ay
                                         + Kinv[c, 0, 2] * az)
                                   + ay * (Kinv[c, 1, 0] * ax + Kinv[c, 1, 1] * ay
                                           + Kinv[c, 1, 2] * az)
                                   + az * (Kinv[c, 2, 0] * ax + Kinv[c, 2, 1] * ay
                                           + Kinv[c, 2, 2] * az))
            ef2[c] = max(e1, 0.0)
            ea2[c] = max(e2, 0.0)
            for i in range(4):
                pf = perm[c, i]
                for j in range(nf):
                    v = 0.0
                    for b in range(nbas):
                        v += E[i, pf, j, b] * sc[b]
                    emom[c, i, j] = v
            dm = 0.0
            csum = corr[c, 0] + corr[c, 1] + corr[c, 2] + corr[c, 3]
            for j in range(nk):
                v = 0.0
                for b in range(nbas):
                    v += D[j, b] * sc[b]
                want = (tgt[c, 0, j] + tgt[c, 1, j] + tgt[c, 2, j] + tgt[c, 3, j]
                        + (amount[c] - csum) * qint[j] / qint[0])
                dm = max(dm, abs(v - want))
            divmiss[c] = dm


# -- the estimator --------------------------------------------------------------------
def _face_perms(cells):
    """``perm[c, i]``: the index in :data:`_PERMS` of the order of face i's vertices by
    their global numbers; ``order[c, i, t]``: the local vertex of c that is the t-th."""
    m = cells.shape[0]
    lut = np.full(27, -1, dtype=np.int64)
    for idx, p in enumerate(_PERMS):
        lut[p[0] * 9 + p[1] * 3 + p[2]] = idx
    perm = np.empty((m, 4), dtype=np.int64)
    order = np.empty((m, 4, 3), dtype=np.int64)
    for i in range(4):
        loc = _FACES[i]
        o = np.argsort(cells[:, loc], axis=1, kind="stable")
        perm[:, i] = lut[o[:, 0] * 9 + o[:, 1] * 3 + o[:, 2]]
        order[:, i] = loc[o]
    return perm, order


def estimate_error_pk_tetrahedra(solution, u, quadrature_degree, clock, helpers):
    """The bound for a P_k (k >= 2) solution on tetrahedra; called by
    :func:`galerkit.estimate_error` after its checks.  ``helpers`` is a dict of the
    P1 module's shared functions.  Returns the pieces of the estimate for the common
    closing step (``estimators._close``)."""
    disc, problem = solution.disc, solution.problem
    mesh = disc.mesh
    el = disc.element
    k = disc.degree
    m = mesh.n_cells
    pts = np.ascontiguousarray(mesh.points, dtype=np.float64)
    cells = np.ascontiguousarray(mesh.cells).astype(np.int64)
    vol = np.ascontiguousarray(mesh.cell_volumes, dtype=np.float64)
    Kt = _conductivity_tensor_3d(problem.conductivity, m)
    Kinv = np.ascontiguousarray(np.linalg.inv(Kt))
    lam_min = np.linalg.eigvalsh(0.5 * (Kt + Kt.transpose(0, 2, 1)))[:, 0]
    x0 = pts[cells[:, 0]]
    J = np.ascontiguousarray(np.stack([pts[cells[:, i]] - x0 for i in (1, 2, 3)], axis=2))
    detJ = np.ascontiguousarray(np.linalg.det(J))
    if not (detJ > 0).all():
        c = int(np.argmin(detJ))
        raise InputError(f"estimate_error: cell {c} is not positively oriented (det J "
                         f"{detJ[c]:.3e}); build the mesh through galerkit.Mesh")
    Jinv = np.ascontiguousarray(np.linalg.inv(J))
    h = helpers["cell_diameters"](mesh)
    ref = rt_reference_3d(k)
    nbas, nk, nf = ref["nb"], ref["nk"], ref["nf"]
    rule = simplex_quadrature(3, min(20, max(quadrature_degree + k + 1, 2 * k + 2)))
    xi, w = rule.points, np.ascontiguousarray(rule.weights)
    tau, _ = _rt_values_3d(k, xi)
    Q = _pk_values_3d(k, xi)  # (nk, nq)
    lamq = np.column_stack([1 - xi.sum(axis=1), xi])  # (nq, 4)
    Vq = el.tabulate(xi)
    dphi = np.ascontiguousarray(el.tabulate_gradients(xi))  # (nq, nloc, 3)
    uloc = np.ascontiguousarray(u[disc.cell_dofs])
    fv = _source_at(problem.source, disc, cells, pts, xi, Vq)
    clock("source")

    nloc, nq = el.n_local, xi.shape[0]
    Hm = Jinv @ Kt @ Jinv.transpose(0, 2, 1)  # J^-1 K J^-T
    Wf = np.einsum("q,ql,jq->qlj", w, lamq, Q).reshape(nq, -1)
    t1 = detJ[:, None, None] * (fv @ Wf).reshape(m, 4, nk)
    Wg = np.einsum("q,jq,qbs->bjs", w, Q, dphi).reshape(nloc, -1)
    Vg = (uloc @ Wg).reshape(m, nk, 3)  # int q_j grad_ref u_h
    glH = np.einsum("lr,crs->cls", _GL_REF, Hm)
    t2 = detJ[:, None, None] * (glH @ Vg.transpose(0, 2, 1))
    tgt = np.ascontiguousarray(t1 - t2)
    Wb = np.einsum("q,ql,iqr,qbr->bli", w, lamq, tau, dphi, optimize=True).reshape(nloc, -1)
    bvec = np.ascontiguousarray((uloc @ Wb).reshape(m, 4, nbas))
    G = np.ascontiguousarray(J.transpose(0, 2, 1) @ Kinv @ J)
    erule = simplex_quadrature(3, 2 * k + 2)  # the flux misfit: degree 2k + 2
    xe, we = erule.points, np.ascontiguousarray(erule.weights)
    tau_e = np.ascontiguousarray(_rt_values_3d(k, xe)[0])
    dphi_e = np.ascontiguousarray(el.tabulate_gradients(xe))
    R = np.ascontiguousarray(np.einsum("q,iqr,jqs->rsij", we, tau_e, tau_e))
    S = np.einsum("q,qar,qbs->rsab", w, dphi, dphi)
    energy = detJ * sum(Hm[:, r, t] * np.einsum("ca,ab,cb->c", uloc, S[r, t], uloc,
                                               optimize=True)
                        for r in range(3) for t in range(3))
    Gq = (Q * w) @ Q.T
    fmomk = (fv * w) @ Q.T
    proj = np.linalg.solve(Gq, fmomk.T).T @ Q
    osc = np.sqrt(np.maximum(detJ * (((fv - proj) ** 2) @ w), 0.0))
    Href = _hessian_table(el, xi)  # (nq, nloc, 3, 3)
    Hu = (uloc @ Href.transpose(1, 0, 2, 3).reshape(nloc, -1)).reshape(m, nq, 9)
    elres = fv + (Hu @ Hm.reshape(m, 9, 1))[:, :, 0]
    elres2 = detJ * ((elres**2) @ w)
    clock("cells")

    _, fid, _, _ = enumerate_entities(cells, _FACES, mesh.n_vertices)
    fid = np.ascontiguousarray(fid, dtype=np.int64)
    neighbors = _neighbors_from_faces(fid)
    vptr, vcell, vloc = _vertex_patches_3d(cells, mesh.n_vertices)
    perm, forder = _face_perms(cells)
    clock("topology")

    # faces: points in the barycentric coordinates ordered by global vertex number,
    # so that both cells of a face see the same points and test functions
    fdeg = min(20, max(quadrature_degree + k + 1, 2 * k + 2))
    frule = simplex_quadrature(2, fdeg)
    bary = np.column_stack([1 - frule.points.sum(axis=1), frule.points])  # (ng, 3)
    fw = 2.0 * frule.weights
    ngp = bary.shape[0]
    qf = _face_tests(k, bary)  # (nf, ng)
    glam = np.einsum("lr,crs->cls", _GL_REF, Jinv)  # physical gradients of barycentrics
    gnorm = np.sqrt((glam**2).sum(axis=2))
    farea_all = 3.0 * vol[:, None] * gnorm  # (m, 4)
    nrm_all = -glam / gnorm[:, :, None]  # outward unit normals
    qn = np.empty((m, 4, ngp))  # K grad u_h . n at the face points
    fcell = np.asarray(mesh.boundary_facet_cells, dtype=np.int64)
    floc = np.asarray(mesh.boundary_facet_local, dtype=np.int64)
    nbf = fcell.size
    uq = np.empty((nbf, ngp))
    bperm = perm[fcell, floc]
    for i in range(4):
        for p in range(6):
            sel = np.flatnonzero(perm[:, i] == p)
            if not sel.size:
                continue
            fp = _face_points(i, p, bary)
            qn[sel, i] = _normal_flux(uloc[sel], el.tabulate_gradients(fp), Jinv[sel], Kt[sel],
                                      nrm_all[sel, i])
            bs = np.flatnonzero((floc == i) & (bperm == p))
            if bs.size:
                uq[bs] = uloc[fcell[bs]] @ el.tabulate(fp).T
    bkind = np.where(neighbors < 0, _FLUX, _INTERIOR).astype(np.int8)
    dirichlet = np.zeros(nbf, dtype=bool)
    for tag, value in problem.dirichlet.items():
        ids = mesh.tagged_facets(tag)
        dirichlet[ids] = True
        _check_dirichlet_pk_3d(tag, value, mesh, ids, k)
    bkind[fcell[dirichlet], floc[dirichlet]] = _DIRICHLET
    border = forder[fcell, floc]  # (nbf, 3) local vertices in global order
    FX = pts[cells[fcell[:, None], border]]  # (nbf, 3, 3)
    xq = np.einsum("gt,ftj->fgj", bary, FX)
    farea = farea_all[fcell, floc]
    gq = np.zeros((nbf, ngp))
    for tag, flux in problem.neumann.items():
        ids = mesh.tagged_facets(tag)
        gq[ids] += _facet_values_3d(flux, ids, xq, f"neumann[{tag!r}]")
    for tag, (alpha, uext) in problem.robin.items():
        ids = mesh.tagged_facets(tag)
        av = _facet_values_3d(alpha, ids, xq, f"robin[{tag!r}] alpha")
        uv = _facet_values_3d(uext, ids, xq, f"robin[{tag!r}] u_ext")
        gq[ids] += av * (uv - uq[ids])
    fl = np.flatnonzero(~dirichlet)
    gmom = np.zeros((m, 4, 4, nf))
    # prescribed outward moments -int_F psi_a g q_j for the three vertices of the face
    mom = -farea[:, None, None] * np.einsum("g,gt,fg,jg->ftj", fw, bary, gq, qf)
    for t in range(3):
        gmom[fcell[fl], floc[fl], border[fl, t]] = mom[fl, t]
    Gf = (qf * fw) @ qf.T
    gproj = np.linalg.solve(Gf, ((gq * fw) @ qf.T).T).T @ qf
    goscn = np.sqrt(farea * (((gq - gproj) ** 2) * fw[None, :]).sum(axis=1))
    c_trace = h[fcell] * np.sqrt(farea / vol[fcell] * (1 / math.pi**2 + 2 / (3 * math.pi)))
    bosc = np.zeros(m)
    np.add.at(bosc, fcell[fl], (c_trace * goscn / np.sqrt(lam_min[fcell]))[fl])
    hF = _face_diameters(FX)
    resq = farea * (((gq - qn[fcell, floc]) ** 2) * fw[None, :]).sum(axis=1)
    bres = np.zeros(m)
    np.add.at(bres, fcell[fl], (hF * resq / lam_min[fcell])[fl])
    clock("boundary")

    X = np.empty((m, 4, nbas))
    corr = np.empty((m, 4))
    _patches(neighbors, bkind, perm, vptr, vcell, vloc, G, detJ, bvec, tgt,
             np.ascontiguousarray(gmom), R, ref, X, corr)
    clock("patches")
    amount = np.ascontiguousarray(corr.sum(axis=1))
    T = np.zeros((m, 4))
    parent = np.empty(m, dtype=np.int64)
    order = np.empty(m, dtype=np.int64)
    n_floating = np.zeros(1, dtype=np.int64)
    unrouted = helpers["route"](neighbors, bkind, amount, vol, T, parent, order, n_floating)
    clock("route")

    ef2 = np.empty(m)
    ea2 = np.empty(m)
    emom = np.empty((m, 4, nf))
    divmiss = np.empty(m)
    _cell_energy_3d(J, Jinv, Kt, Kinv, detJ, uloc, dphi_e, we, tau_e, X, T, ref["rt0"],
                    ref["D"], ref["E"], perm, ref["qint"], tgt, corr, amount, ef2, ea2, emom,
                    divmiss)
    _check_flux_pk_3d(emom, divmiss, neighbors, fid, bkind, gmom, tgt)
    eo = h / math.pi * osc / np.sqrt(lam_min)
    eta = np.sqrt(ef2) + eo + bosc
    # residual estimator: jumps of K grad u_h . n across interior faces
    ci, ii = np.nonzero(neighbors >= 0)
    other = neighbors[ci, ii]
    back = np.argmax(fid[other] == fid[ci, ii][:, None], axis=1)
    jump2 = farea_all[ci, ii] * (((qn[ci, ii] + qn[other, back]) ** 2) * fw[None, :]).sum(axis=1)
    FXi = pts[cells[ci[:, None], _FACES[ii]]]
    lamF = np.maximum(lam_min[ci], lam_min[other])
    jumps = np.zeros(m)
    np.add.at(jumps, ci, _face_diameters(FXi) * jump2 / (2 * lamF))
    res_ind = np.ascontiguousarray(np.sqrt(h**2 / lam_min * elres2 + jumps + bres))
    fscale = float(np.abs(tgt).sum() + np.abs(gmom).sum())
    return {"eta": eta, "res_ind": res_ind, "ef2": ef2, "ea2": ea2, "eo": eo, "bosc": bosc,
            "energy": energy, "unrouted": unrouted, "n_floating": int(n_floating[0]),
            "scale": fscale, "gap": _quadrature_gap(problem.source, disc, cells, pts, xi, w,
                                                    detJ, fv, quadrature_degree, k)}


def _check_dirichlet_pk_3d(tag, value, mesh, ids, k):
    """Dirichlet data must lie in the discrete space: a polynomial of degree <= k on
    each facet (then the interpolant is the data)."""
    if not callable(value):
        return
    FX = mesh.points[mesh.boundary_facets[ids]]  # (n, 3, 3)
    lat = [(i, j) for i in range(k + 3) for j in range(k + 3 - i)]
    mu = np.array([[1 - (i + j) / (k + 2), i / (k + 2), j / (k + 2)] for i, j in lat])
    x = np.einsum("pt,ftj->fpj", mu, FX)
    g = np.asarray(evaluate_callable(value, np.ascontiguousarray(x.reshape(-1, 3).T),
                                     f"dirichlet[{tag!r}]"), dtype=np.float64)
    g = g.reshape(len(ids), mu.shape[0])
    V = _face_tests(k, mu).T  # (np, nf)
    fit = V @ np.linalg.lstsq(V, g.T, rcond=None)[0]
    dev = np.abs(g - fit.T).max(axis=1)
    tol = 1e-10 * max(float(np.abs(g).max()), 1e-300)
    if (dev > tol).any():
        i = int(np.argmax(dev))
        raise UnsupportedError(
            f"estimate_error: dirichlet[{tag!r}] is not a polynomial of degree {k} on "
            f"boundary facet {int(ids[i])} (deviation {dev[i]:.3e} from its P{k} fit): "
            "Dirichlet data outside the discrete space add a lifting term that is not "
            "implemented. Give the condition as Neumann data (K du/dn) there, or use data "
            f"polynomial of degree <= {k} per facet")


def _check_flux_pk_3d(emom, divmiss, neighbors, fid, bkind, gmom, tgt):
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
    back = np.argmax(fid[other] == fid[ci, ii][:, None], axis=1)
    jump = np.abs(emom[ci, ii] + emom[other, back]).max(axis=1) if ci.size else np.zeros(0)
    if (jump > tol).any():
        j = int(np.argmax(jump))
        raise RuntimeError(f"estimate_error: the equilibrated flux is not conforming across the "
                           f"face between cells {int(ci[j])} and {int(other[j])} (jump "
                           f"{jump[j]:.3e}); internal error, please report with the mesh")
    miss = np.where((bkind == _FLUX)[:, :, None], np.abs(emom - gmom.sum(axis=2)), 0.0)
    if (miss > tol).any():
        c, i, _ = np.unravel_index(int(np.argmax(miss)), miss.shape)
        raise RuntimeError(f"estimate_error: the equilibrated flux misses the boundary data on "
                           f"face {i} of cell {c} by {miss[c, i].max():.3e}; internal error")
