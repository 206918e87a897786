"""The guaranteed energy-error bound and the residual estimator on tetrahedra (P1).

The construction is the one of :mod:`galerkit.estimators` in 3D: an
equilibrated lowest-order Raviart--Thomas flux ``sigma_h`` (Prager & Synge
1947), the sum over the vertices ``a`` of local fluxes on the vertex patches
(Braess & Schoeberl 2008; Ern & Vohralik 2015).  On the patch of ``a`` the
local flux is the Raviart--Thomas field closest, in the ``K^-1`` norm, to
``-Pi_a K grad u_h`` -- the field with a third of the fluxes of
``-K grad u_h`` through the faces at ``a`` (the thirds of the three vertices
of a face sum to the whole, so a solution that P1 reproduces gives a zero
bound) -- among the fields with zero flux through the faces opposite ``a``,
the facet moments ``-(g, psi_a)_F`` of the Neumann/Robin data on boundary
faces, a free flux on Dirichlet faces, and the hat-weighted residual
``(f, psi_a)_K - (K grad u_h, grad psi_a)_K`` as divergence on each cell.  In
3D the patch problem is a small constrained minimisation over the face fluxes,
solved exactly by a null-space method: a spanning tree of the patch cells,
grown from its Dirichlet faces, gives a flux with the required divergence,
every face off the tree closes a divergence-free cycle, and a small SPD
system (Cholesky) picks the best combination of cycles.  A vertex whose
system is not numerically positive definite is solved by the mixed system
(face fluxes and one multiplier per cell, dense LU) instead.  The
residual of an inexact solve is taken out of the patches without a Dirichlet
face and carried along a spanning tree of the cells to a Dirichlet facet,
as in 2D.  Then, cell by cell,

    eta_K = ||K^(-1/2)(sigma_h + K grad u_h)||_K                      (flux)
          + h_K / pi * lambda_K^(-1/2) ||f - Pi_0 f||_K                (oscillation)
          + sum over Neumann/Robin faces F of K of
            C_F lambda_K^(-1/2) ||g - Pi_0 g||_F                        (boundary data)

with ``C_F = h_K (|F| / |K| (1/pi**2 + 2/(3 pi)))**(1/2)`` (the trace
inequality of :mod:`galerkit.estimators` with d = 3) and ``bound**2 = sum
eta_K**2``.  The residual estimator has element residuals
``h_K**2 / lambda_K ||f||_K**2`` and face jumps
``h_F / (2 lambda_F) ||[K grad u_h . n]||_F**2`` (``h_F`` the face diameter;
``g - K grad u_h . n`` on Neumann/Robin faces, not halved).

The bound is guaranteed under the conditions of :mod:`galerkit.estimators`,
read with tetrahedra for triangles: P1, conductivity constant on each cell
(number, per cell, per region, (3, 3) or per-cell SPD tensor), Dirichlet data
affine on every Dirichlet face (checked), source and boundary data integrated
exactly by the cell rule of degree ``quadrature_degree`` and the facet rule
of the same degree (else ``quadrature_gap`` is named, not bounded), and every
part of the mesh without a Dirichlet face pure Neumann with compatible data
or a residual there at round-off level.
"""

from __future__ import annotations

import math
import time

import numba as nb
import numpy as np

from .coefficients import evaluate_callable, scalar_values, tensor_values
from .errors import InputError, UnsupportedError
from .estimators import (ErrorEstimate, _Clock, _DIRICHLET, _FLUX, _INTERIOR,
                         _route)
from .regions import RegionCoefficient
from .quadrature import simplex_quadrature
from .topology import enumerate_entities

__all__ = ["estimate_error_tetrahedra"]

_FACES = np.array([[1, 2, 3], [0, 2, 3], [0, 1, 3], [0, 1, 2]])  # face i: opposite vertex i
_FORCE_MIXED = False  # tests: every patch by the mixed system (the null-space method's check)


# -- compiled kernels -------------------------------------------------------------------
_CHUNK = 64  # vertices per block of the patch kernel: fixed, so no result depends on threads
_CELL_CHUNK = 1024  # cells per block of the cell kernels (work arrays once per block)


@nb.njit(cache=True)
def _inv3(A, out):
    """``out = A^-1`` for a (3, 3) matrix, by the adjugate."""
    c00 = A[1, 1] * A[2, 2] - A[1, 2] * A[2, 1]
    c01 = A[1, 2] * A[2, 0] - A[1, 0] * A[2, 2]
    c02 = A[1, 0] * A[2, 1] - A[1, 1] * A[2, 0]
    det = A[0, 0] * c00 + A[0, 1] * c01 + A[0, 2] * c02
    r = 1.0 / det
    out[0, 0] = c00 * r
    out[1, 0] = c01 * r
    out[2, 0] = c02 * r
    out[0, 1] = (A[0, 2] * A[2, 1] - A[0, 1] * A[2, 2]) * r
    out[1, 1] = (A[0, 0] * A[2, 2] - A[0, 2] * A[2, 0]) * r
    out[2, 1] = (A[0, 1] * A[2, 0] - A[0, 0] * A[2, 1]) * r
    out[0, 2] = (A[0, 1] * A[1, 2] - A[0, 2] * A[1, 1]) * r
    out[1, 2] = (A[0, 2] * A[1, 0] - A[0, 0] * A[1, 2]) * r
    out[2, 2] = (A[0, 0] * A[1, 1] - A[0, 1] * A[1, 0]) * r


@nb.njit(cache=True)
def _rt_mass_cell(X, vol, kinv, M, D, AE):
    """``M[i, j] = int_c phi_i . K^-1 phi_j`` with ``phi_i = (x - x_i) / (3 |c|)``: exact,
    from ``int l_k l_l = |c| (1 + delta_kl) / 20`` (Stroud 1971):
    ``(16 D_i.A D_j + sum_k E_ik.A E_jk) / (180 |c|)``, ``D_i = xbar - x_i``,
    ``E_ik = x_k - x_i``; ``D`` (4, 3) and ``AE`` (4, 4, 3) are work arrays."""
    for i in range(4):
        for a in range(3):
            D[i, a] = 0.25 * (X[0, a] + X[1, a] + X[2, a] + X[3, a]) - X[i, a]
    for i in range(4):  # AE[i, k] = A E_ik
        for k in range(4):
            for a in range(3):
                s = 0.0
                for b in range(3):
                    s += kinv[a, b] * (X[k, b] - X[i, b])
                AE[i, k, a] = s
    for i in range(4):
        for j in range(i, 4):
            t1 = 0.0
            for a in range(3):
                s = 0.0
                for b in range(3):
                    s += kinv[a, b] * D[j, b]
                t1 += D[i, a] * s
            t2 = 0.0
            for k in range(4):
                for a in range(3):
                    t2 += (X[k, a] - X[i, a]) * AE[j, k, a]
            M[i, j] = M[j, i] = (16.0 * t1 + t2) / (180.0 * vol)


@nb.njit(cache=True, parallel=True)
def _rt_mass(X, vol, kinv):
    """:func:`_rt_mass_cell` on every cell: shape (m, 4, 4)."""
    m = X.shape[0]
    M = np.empty((m, 4, 4))
    for b in nb.prange((m + _CELL_CHUNK - 1) // _CELL_CHUNK):
        D = np.empty((4, 3))
        AE = np.empty((4, 4, 3))
        for c in range(b * _CELL_CHUNK, min(m, (b + 1) * _CELL_CHUNK)):
            _rt_mass_cell(X[c], vol[c], kinv[c], M[c], D, AE)
    return M


@nb.njit(cache=True)
def _rt_misfit_cell(X, vol, F, q, A, W):
    """``||A^1/2 (sigma + q)||_c**2`` for the RT0 field of outward face fluxes F:
    ``int w.A w = |c|/20 (sum_k w_k.A w_k + (sum_k w_k).A(sum_k w_k))`` for affine w
    with vertex values w_k (exact simplex integrals, Stroud 1971); ``W`` (4, 3) work.
    ``sigma(x_k) = sum_i F_i (x_k - x_i) / (3 |c|) = (S x_k - G) / (3 |c|)`` with
    ``S = sum_i F_i`` and ``G = sum_i F_i x_i``."""
    S = F[0] + F[1] + F[2] + F[3]
    r = 1.0 / (3.0 * vol)
    for a in range(3):
        G = F[0] * X[0, a] + F[1] * X[1, a] + F[2] * X[2, a] + F[3] * X[3, a]
        for k in range(4):
            W[k, a] = q[a] + (S * X[k, a] - G) * r
    acc = 0.0
    for k in range(5):
        for a in range(3):
            wa = W[0, a] + W[1, a] + W[2, a] + W[3, a] if k == 4 else W[k, a]
            for b in range(3):
                wb = W[0, b] + W[1, b] + W[2, b] + W[3, b] if k == 4 else W[k, b]
                acc += wa * A[a, b] * wb
    return vol / 20.0 * acc


@nb.njit(cache=True, parallel=True)
def _cell_data_3d(X, K, ucell, vol, kinv, lam_min, h, grad_uh, flux_h, stiff, M):
    """Per cell: ``K^-1``, the smallest diagonal entry of K (its smallest eigenvalue when
    K is diagonal; the caller takes LAPACK's otherwise), the longest edge, ``grad u_h``,
    ``K grad u_h``, ``stiff[c, l] = (K grad u_h, grad l_l)_c`` and the Raviart--Thomas
    mass matrix.  The barycentric gradients are the rows of ``J^-1``,
    ``J = [x_1 - x_0, x_2 - x_0, x_3 - x_0]``, and ``grad l_0 = -sum of the others``."""
    m = X.shape[0]
    for blk in nb.prange((m + _CELL_CHUNK - 1) // _CELL_CHUNK):
        J = np.empty((3, 3))
        Ji = np.empty((3, 3))
        gl = np.empty((4, 3))
        D = np.empty((4, 3))
        AE = np.empty((4, 4, 3))
        for c in range(blk * _CELL_CHUNK, min(m, (blk + 1) * _CELL_CHUNK)):
            Xc = X[c]
            for a in range(3):
                for i in range(3):
                    J[a, i] = Xc[i + 1, a] - Xc[0, a]
            _inv3(J, Ji)
            for a in range(3):
                gl[0, a] = -(Ji[0, a] + Ji[1, a] + Ji[2, a])
                for i in range(3):
                    gl[i + 1, a] = Ji[i, a]
            Kc = K[c]
            _inv3(Kc, kinv[c])
            lam_min[c] = min(Kc[0, 0], min(Kc[1, 1], Kc[2, 2]))
            hh = 0.0
            for i in range(4):
                for j in range(i + 1, 4):
                    d = 0.0
                    for a in range(3):
                        d += (Xc[i, a] - Xc[j, a]) ** 2
                    hh = max(hh, math.sqrt(d))
            h[c] = hh
            for a in range(3):
                s = 0.0
                for i in range(4):
                    s += ucell[c, i] * gl[i, a]
                grad_uh[c, a] = s
            for a in range(3):
                s = 0.0
                for b in range(3):
                    s += Kc[a, b] * grad_uh[c, b]
                flux_h[c, a] = s
            for l in range(4):
                s = 0.0
                for a in range(3):
                    s += flux_h[c, a] * gl[l, a]
                stiff[c, l] = vol[c] * s
            _rt_mass_cell(Xc, vol[c], kinv[c], M[c], D, AE)


@nb.njit(cache=True, parallel=True)
def _cell_terms_3d(X, vol, kinv, flux_h, qf, P, T, fid, neighbors, lam_min, hcell, osc,
                   fnorm2, bosc, bres, fmom, corr, amount, bkind, gout, eta, res_ind, sums,
                   dev, where):
    """Per cell, from the patch fluxes ``P`` and the routed flux ``T`` (outward face
    fluxes; the equilibrated flux is ``F = sum_l P[c, l] + T[c]``): the indicator
    ``eta`` and the residual indicator ``res_ind``, whose jumps are
    ``h_F / (2 lambda_F) ||[K grad u_h . n]||_F**2`` over the interior faces (``qf``:
    outward fluxes of ``K grad u_h``).  Per block ``b`` of ``_CELL_CHUNK`` cells:
    ``sums[b] = (flux**2, algebraic**2, oscillation**2)`` summed over its cells, and
    the checks of the flux, ``dev[b] = (divergence miss, flux jump across a face,
    miss of the boundary data, |F| and |fmom|)`` at their largest, ``where[b, j]`` the cell of
    ``dev[b, j]`` (for the jump ``4 * cell + face``)."""
    m = X.shape[0]
    for b in nb.prange((m + _CELL_CHUNK - 1) // _CELL_CHUNK):
        s_f = 0.0
        s_a = 0.0
        s_o = 0.0
        for j in range(4):
            dev[b, j] = 0.0
            where[b, j] = -1
        W = np.empty((4, 3))
        F = np.empty(4)
        Tc = np.empty(4)
        zero = np.zeros(3)
        for c in range(b * _CELL_CHUNK, min(m, (b + 1) * _CELL_CHUNK)):
            for i in range(4):
                F[i] = P[c, 0, i] + P[c, 1, i] + P[c, 2, i] + P[c, 3, i] + T[c, i]
                Tc[i] = T[c, i]
            ef2 = max(_rt_misfit_cell(X[c], vol[c], F, flux_h[c], kinv[c], W), 0.0)
            ea2 = max(_rt_misfit_cell(X[c], vol[c], Tc, zero, kinv[c], W), 0.0)
            lam = lam_min[c]
            eo = hcell[c] / math.pi * osc[c] / math.sqrt(lam)
            eta[c] = math.sqrt(ef2) + eo + bosc[c]
            acc = 0.0
            jmax = 0.0
            jface = 4 * c
            miss = 0.0
            for i in range(4):
                o = neighbors[c, i]
                if o < 0:
                    if bkind[c, i] == _FLUX:
                        miss = max(miss, abs(F[i] - (gout[c, i, 0] + gout[c, i, 1]
                                                     + gout[c, i, 2] + gout[c, i, 3])))
                    continue
                back = 0
                for t in range(4):
                    if fid[o, t] == fid[c, i]:
                        back = t
                        break
                Fo = P[o, 0, back] + P[o, 1, back] + P[o, 2, back] + P[o, 3, back] + T[o, back]
                if abs(F[i] + Fo) > jmax:
                    jmax = abs(F[i] + Fo)
                    jface = 4 * c + i
                v0, v1, v2 = (1, 2, 3) if i == 0 else ((0, 2, 3) if i == 1 else
                                                       ((0, 1, 3) if i == 2 else (0, 1, 2)))
                ax = X[c, v1, 0] - X[c, v0, 0]
                ay = X[c, v1, 1] - X[c, v0, 1]
                az = X[c, v1, 2] - X[c, v0, 2]
                bx = X[c, v2, 0] - X[c, v0, 0]
                by = X[c, v2, 1] - X[c, v0, 1]
                bz = X[c, v2, 2] - X[c, v0, 2]
                ex = X[c, v2, 0] - X[c, v1, 0]
                ey = X[c, v2, 1] - X[c, v1, 1]
                ez = X[c, v2, 2] - X[c, v1, 2]
                cx = ay * bz - az * by
                cy = az * bx - ax * bz
                cz = ax * by - ay * bx
                area = 0.5 * math.sqrt(cx * cx + cy * cy + cz * cz)
                hF = max(math.sqrt(ax * ax + ay * ay + az * az),
                         max(math.sqrt(bx * bx + by * by + bz * bz),
                             math.sqrt(ex * ex + ey * ey + ez * ez)))
                jump = (qf[c, i] + qf[o, back]) / area  # outward fluxes of both sides
                lamF = max(lam, lam_min[o])
                acc += hF * area * jump**2 / (2 * lamF)
            s_f += ef2
            s_a += ea2
            s_o += eo * eo
            res_ind[c] = math.sqrt(hcell[c] ** 2 / lam * fnorm2[c] + acc + bres[c])
            div = abs(F[0] + F[1] + F[2] + F[3]
                      - (fmom[c, 0] + fmom[c, 1] + fmom[c, 2] + fmom[c, 3]
                         - (corr[c, 0] + corr[c, 1] + corr[c, 2] + corr[c, 3])
                         + amount[c]))
            fmax = max(max(abs(F[0]), abs(F[1])), max(abs(F[2]), abs(F[3])))
            for i in range(4):
                fmax = max(fmax, abs(fmom[c, i]))
            for j in range(4):
                d = div if j == 0 else (jmax if j == 1 else (miss if j == 2 else fmax))
                if d > dev[b, j]:
                    dev[b, j] = d
                    where[b, j] = jface if j == 1 else c
        sums[b, 0] = s_f
        sums[b, 1] = s_a
        sums[b, 2] = s_o


@nb.njit(cache=True)
def _patch_position(vcell, s0, k, c):
    """Index of cell ``c`` in the ascending ``vcell[s0:s0 + k]`` (bisection)."""
    lo = 0
    hi = k - 1
    while lo < hi:
        mid = (lo + hi) // 2
        if vcell[s0 + mid] < c:
            lo = mid + 1
        else:
            hi = mid
    return lo


@nb.njit(cache=True, parallel=True)
def _patch_fluxes_3d(vol, M, qf, fid, neighbors, bkind, draw, gout, vptr, vcell, vloc,
                     P, corr, flagged):
    """Local equilibrated fluxes on every vertex patch (3D, lowest order), by a
    null-space method: a graph whose nodes are the patch cells (and one "ground" node
    for the Dirichlet faces) and whose edges are the free faces.  A spanning tree,
    grown from the ground and then from the first cell of each floating component,
    carries the hat-weighted residual of every cell to the root (a particular
    solution of the divergence constraint); every face off the tree closes one
    cycle, a divergence-free field, and the fluxes closest to the target in the
    ``M`` norm are the particular solution plus the combination of cycles that a
    small SPD system (Cholesky) gives.  The minimiser is the one of the mixed
    system of :func:`_patch_fluxes_mixed_3d`; a vertex whose reduced system is not
    numerically positive definite is left to that one (``flagged[a] = 1``).

    ``M[c]``: the (4, 4) Raviart--Thomas mass matrix of cell ``c`` in the ``K^-1``
    product (basis of unit outward face fluxes); ``qf[c, i]``: outward flux of
    ``K grad u_h`` through face ``i``; ``fid``, ``neighbors``: face ids and the cell
    across each face; ``bkind``, ``draw``, ``gout`` as in 2D.  Writes ``P[c, l, i]``
    (outward flux of patch ``l`` through face ``i`` of ``c``) and ``corr[c, l]``; each
    (c, l) belongs to one vertex, so the writes never collide.  Work arrays are made
    once per block of ``_CHUNK`` vertices.
    """
    n = vptr.shape[0] - 1
    kmax = 1
    for a in range(n):
        kmax = max(kmax, vptr[a + 1] - vptr[a])
    F3 = 3 * kmax
    for blk in nb.prange((n + _CHUNK - 1) // _CHUNK):
        ftype = np.empty(F3, np.int64)      # 0 free interior, 1 free Dirichlet, 2 fixed
        fval = np.empty(F3)                 # fixed value (owner's outward flux)
        fown = np.empty(F3, np.int64)       # owner (first) cell of the face, other cell
        foth = np.empty(F3, np.int64)
        pf = np.empty((kmax, 3), np.int64)  # local face of (patch cell, slot)
        ps = np.empty((kmax, 3))            # orientation: +1 owner, -1 other side
        pl = np.empty((kmax, 3), np.int64)  # local face index i in the cell
        par = np.empty(kmax, np.int64)      # slot of the tree face to the parent, -1 root
        comp = np.empty(kmax, np.int64)     # -1 anchored, else first cell of the component
        order = np.empty(kmax, np.int64)    # breadth-first order
        d = np.empty(kmax)
        tot = np.empty(kmax)
        vs = np.empty(kmax)
        tree = np.empty(F3, np.bool_)
        y = np.empty(F3)
        w = np.empty(F3)
        col = np.empty(F3, np.int64)        # column of each cycle face, -1 otherwise
        Z = np.empty((F3, F3))              # Z[f, j]: flux of cycle j through face f
        R = np.empty((F3, F3))
        g = np.empty(F3)
        v = np.empty(3)
        act = np.empty(F3, np.int64)
        MZ = np.empty((3, F3))
        for a in range(blk * _CHUNK, min(n, (blk + 1) * _CHUNK)):
            s0 = vptr[a]
            k = vptr[a + 1] - s0
            # local faces: owned by the first patch cell that meets them
            nf = 0
            for p in range(k):
                c = vcell[s0 + p]
                la = vloc[s0 + p]
                j = 0
                for i in range(4):
                    if i == la:
                        continue
                    o = neighbors[c, i]
                    q = -1 if o < 0 else _patch_position(vcell, s0, k, o)
                    if q < 0 or q > p:
                        f = nf
                        nf += 1
                        fown[f] = p
                        foth[f] = q
                        ps[p, j] = 1.0
                        fval[f] = 0.0
                        if bkind[c, i] == 1:
                            ftype[f] = 1
                        elif bkind[c, i] == 2:
                            ftype[f] = 2
                            fval[f] = gout[c, i, la]
                        else:
                            ftype[f] = 0
                    else:
                        f = -1
                        for jj in range(3):
                            if neighbors[o, pl[q, jj]] == c and fid[o, pl[q, jj]] == fid[c, i]:
                                f = pf[q, jj]
                        ps[p, j] = -1.0
                    pf[p, j] = f
                    pl[p, j] = i
                    j += 1
            # spanning forest: from the ground through the Dirichlet faces, then from
            # the first unreached cell of each floating component
            for p in range(k):
                par[p] = -2
            for f in range(nf):
                tree[f] = False
            no = 0
            for p in range(k):
                for j in range(3):
                    if ftype[pf[p, j]] == 1 and par[p] == -2:
                        par[p] = j
                        comp[p] = -1
                        tree[pf[p, j]] = True
                        order[no] = p
                        no += 1
            head = 0
            start = 0
            while True:
                while head < no:
                    p = order[head]
                    head += 1
                    for j in range(3):
                        f = pf[p, j]
                        if ftype[f] != 0:
                            continue
                        q = foth[f] if fown[f] == p else fown[f]
                        if par[q] == -2:
                            for jj in range(3):
                                if pf[q, jj] == f:
                                    par[q] = jj
                            comp[q] = comp[p]
                            tree[f] = True
                            order[no] = q
                            no += 1
                while start < k and par[start] != -2:
                    start += 1
                if start == k:
                    break
                par[start] = -1
                comp[start] = start
                order[no] = start
                no += 1
            # residual of every cell; floating components take theirs out (by volume)
            for p in range(k):
                d[p] = draw[vcell[s0 + p], vloc[s0 + p]]
                tot[p] = 0.0
                vs[p] = 0.0
            for p in range(k):
                r = comp[p]
                if r >= 0:
                    tot[r] += d[p]
                    vs[r] += vol[vcell[s0 + p]]
                    for j in range(3):
                        if ftype[pf[p, j]] == 2:
                            tot[r] -= ps[p, j] * fval[pf[p, j]]
            for p in range(k):
                r = comp[p]
                cj = 0.0
                if r >= 0:
                    cj = tot[r] * vol[vcell[s0 + p]] / vs[r]
                    d[p] -= cj
                corr[vcell[s0 + p], vloc[s0 + p]] = cj
            # particular solution: leaves first, each cell's balance through its tree face
            for f in range(nf):
                y[f] = fval[f]
            for t in range(no - 1, -1, -1):
                p = order[t]
                jp = par[p]
                if jp < 0:
                    continue
                s = d[p]
                for j in range(3):
                    if j != jp:
                        s -= ps[p, j] * y[pf[p, j]]
                y[pf[p, jp]] = ps[p, jp] * s
            # cycles: unit flux through a free face off the tree, closed through the tree
            nz = 0
            for f in range(nf):
                col[f] = -1
                if ftype[f] != 2 and not tree[f]:
                    col[f] = nz
                    nz += 1
            if nz > 0:
                for f in range(nf):
                    for jz in range(nz):
                        Z[f, jz] = 0.0
                for f in range(nf):
                    jz = col[f]
                    if jz < 0:
                        continue
                    Z[f, jz] = 1.0
                    for t in range(no - 1, -1, -1):
                        p = order[t]
                        jp = par[p]
                        if jp < 0:
                            continue
                        s = 0.0
                        for j in range(3):
                            if j != jp:
                                s -= ps[p, j] * Z[pf[p, j], jz]
                        Z[pf[p, jp], jz] = ps[p, jp] * s
                # reduced system R z = -Z^T (A y + b): A = sum_p S_p^T M_p S_p, and
                # b = sum_p S_p^T M_p t_p with the target t_p = a third of qf
                for f in range(nf):
                    w[f] = 0.0
                for i1 in range(nz):  # the lower triangle: all that Cholesky reads
                    for i2 in range(i1 + 1):
                        R[i1, i2] = 0.0
                for p in range(k):
                    c = vcell[s0 + p]
                    for j in range(3):
                        v[j] = ps[p, j] * y[pf[p, j]] + qf[c, pl[p, j]] / 3.0
                    for j in range(3):
                        acc = 0.0
                        for jj in range(3):
                            acc += M[c, pl[p, j], pl[p, jj]] * v[jj]
                        w[pf[p, j]] += ps[p, j] * acc
                    na = 0
                    for jz in range(nz):
                        if Z[pf[p, 0], jz] != 0.0 or Z[pf[p, 1], jz] != 0.0 \
                                or Z[pf[p, 2], jz] != 0.0:
                            act[na] = jz
                            na += 1
                    for j in range(3):
                        for t in range(na):
                            acc = 0.0
                            for jj in range(3):
                                acc += M[c, pl[p, j], pl[p, jj]] * ps[p, jj] \
                                    * Z[pf[p, jj], act[t]]
                            MZ[j, t] = acc
                    for t1 in range(na):  # act ascends: t2 <= t1 is the lower triangle
                        for t2 in range(t1 + 1):
                            acc = 0.0
                            for j in range(3):
                                acc += ps[p, j] * Z[pf[p, j], act[t1]] * MZ[j, t2]
                            R[act[t1], act[t2]] += acc
                for jz in range(nz):
                    acc = 0.0
                    for f in range(nf):
                        acc += Z[f, jz] * w[f]
                    g[jz] = -acc
                # Cholesky R = L L^T in place (lower triangle), then the two solves
                ok = True
                for i1 in range(nz):
                    s = R[i1, i1]
                    dia = s
                    for t in range(i1):
                        s -= R[i1, t] * R[i1, t]
                    if not s > 1e-12 * dia:
                        ok = False
                        break
                    lii = math.sqrt(s)
                    R[i1, i1] = lii
                    for i2 in range(i1 + 1, nz):
                        s2 = R[i2, i1]
                        for t in range(i1):
                            s2 -= R[i2, t] * R[i1, t]
                        R[i2, i1] = s2 / lii
                if not ok:
                    flagged[a] = 1
                    continue
                for i1 in range(nz):
                    s = g[i1]
                    for t in range(i1):
                        s -= R[i1, t] * g[t]
                    g[i1] = s / R[i1, i1]
                for i1 in range(nz - 1, -1, -1):
                    s = g[i1]
                    for t in range(i1 + 1, nz):
                        s -= R[t, i1] * g[t]
                    g[i1] = s / R[i1, i1]
                for f in range(nf):
                    if ftype[f] != 2:
                        acc = 0.0
                        for jz in range(nz):
                            acc += Z[f, jz] * g[jz]
                        y[f] += acc
            for p in range(k):
                c = vcell[s0 + p]
                la = vloc[s0 + p]
                P[c, la, la] = 0.0
                for j in range(3):
                    P[c, la, pl[p, j]] = ps[p, j] * y[pf[p, j]]


@nb.njit(cache=True, parallel=True)
def _patch_fluxes_mixed_3d(vol, M, qf, fid, bkind, draw, gout, vptr, vcell, vloc, P, corr,
                           verts):
    """Local equilibrated fluxes on the patches of the vertices ``verts`` (3D, lowest
    order), by the mixed system (face fluxes and one multiplier per cell, dense LU):
    the fallback of :func:`_patch_fluxes_3d`, and its check in the tests.

    ``M[c]``: the (4, 4) Raviart--Thomas mass matrix of cell ``c`` in the ``K^-1``
    product (basis of unit outward face fluxes); ``qf[c, i]``: outward flux of
    ``K grad u_h`` through face ``i``; ``fid[c, i]``: global face id; ``bkind``,
    ``draw``, ``gout`` as in 2D.  Writes ``P[c, l, i]`` (outward flux of patch ``l``
    through face ``i`` of ``c``) and ``corr[c, l]``; each (c, l) belongs to one
    vertex, so the writes never collide.
    """
    for iv in nb.prange(verts.size):
        a = verts[iv]
        s0 = vptr[a]
        k = vptr[a + 1] - s0
        nmax = 3 * k
        lf = np.empty(nmax, np.int64)       # global id of each local face
        ftype = np.empty(nmax, np.int64)    # 0 free interior, 1 free Dirichlet, 2 fixed
        fval = np.zeros(nmax)               # fixed value (owner's outward flux)
        pf = np.empty((k, 3), np.int64)     # local face of (patch cell, slot)
        ps = np.empty((k, 3))               # orientation: +1 owner, -1 other side
        pl = np.empty((k, 3), np.int64)     # local face index i in the cell
        nf = 0
        for p in range(k):
            c = vcell[s0 + p]
            la = vloc[s0 + p]
            j = 0
            for i in range(4):
                if i == la:
                    continue
                g = fid[c, i]
                f = -1
                for t in range(nf):
                    if lf[t] == g:
                        f = t
                        break
                if f < 0:
                    f = nf
                    lf[nf] = g
                    nf += 1
                    ps[p, j] = 1.0
                    if bkind[c, i] == 1:
                        ftype[f] = 1
                    elif bkind[c, i] == 2:
                        ftype[f] = 2
                        fval[f] = gout[c, i, la]
                    else:
                        ftype[f] = 0
                else:
                    ps[p, j] = -1.0
                pf[p, j] = f
                pl[p, j] = i
                j += 1
        # components of the patch through shared faces (union by smallest label)
        comp = np.arange(k)
        changed = True
        while changed:
            changed = False
            for p in range(k):
                for j in range(3):
                    f = pf[p, j]
                    for q in range(k):
                        if q == p:
                            continue
                        for jj in range(3):
                            if pf[q, jj] == f and comp[q] != comp[p]:
                                lo = min(comp[q], comp[p])
                                comp[q] = lo
                                comp[p] = lo
                                changed = True
        # per component: a free Dirichlet face? else take the residual out (by volume)
        anchored = np.zeros(k, np.bool_)
        for p in range(k):
            for j in range(3):
                if ftype[pf[p, j]] == 1:
                    anchored[comp[p]] = True
        d = np.empty(k)
        for p in range(k):
            d[p] = draw[vcell[s0 + p], vloc[s0 + p]]
        for r in range(k):
            if comp[r] != r or anchored[r]:
                continue
            tot = 0.0
            vs = 0.0
            for p in range(k):
                if comp[p] == r:
                    tot += d[p]
                    vs += vol[vcell[s0 + p]]
                    for j in range(3):
                        if ftype[pf[p, j]] == 2:
                            tot -= ps[p, j] * fval[pf[p, j]]
            for p in range(k):
                if comp[p] == r:
                    cj = tot * vol[vcell[s0 + p]] / vs
                    corr[vcell[s0 + p], vloc[s0 + p]] = cj
                    d[p] -= cj
        for p in range(k):
            if anchored[comp[p]]:
                corr[vcell[s0 + p], vloc[s0 + p]] = 0.0
        # free unknowns and kept constraints (one row dropped per floating component)
        uidx = np.full(nf, -1, np.int64)
        nu = 0
        for f in range(nf):
            if ftype[f] != 2:
                uidx[f] = nu
                nu += 1
        ridx = np.full(k, -1, np.int64)
        nr = 0
        for p in range(k):
            if not anchored[comp[p]] and comp[p] == p:
                continue  # the first cell of a floating component: its row is implied
            ridx[p] = nr
            nr += 1
        y = np.zeros(nf)
        for f in range(nf):
            if ftype[f] == 2:
                y[f] = fval[f]
        if nu > 0:
            sz = nu + nr
            A = np.zeros((sz, sz))
            rhs = np.zeros(sz)
            for p in range(k):
                c = vcell[s0 + p]
                # objective sum_p (s_p + t_p)^T M_p (s_p + t_p), s_p = sign * y
                for j in range(3):
                    fj = pf[p, j]
                    sj = ps[p, j]
                    ij = pl[p, j]
                    uj = uidx[fj]
                    if uj < 0:
                        continue
                    acc = 0.0
                    for jj in range(3):
                        fk = pf[p, jj]
                        sk = ps[p, jj]
                        ik = pl[p, jj]
                        mjk = M[c, ij, ik]
                        acc += mjk * qf[c, ik] / 3.0
                        uk = uidx[fk]
                        if uk >= 0:
                            A[uj, uk] += sj * sk * mjk
                        else:
                            acc += mjk * sk * y[fk]
                    rhs[uj] -= sj * acc
                # divergence row: sum_j s_pj = d_p
                r = ridx[p]
                if r >= 0:
                    rr = nu + r
                    rhs[rr] = d[p]
                    for j in range(3):
                        uj = uidx[pf[p, j]]
                        if uj >= 0:
                            A[rr, uj] += ps[p, j]
                            A[uj, rr] += ps[p, j]
                        else:
                            rhs[rr] -= ps[p, j] * y[pf[p, j]]
            sol = np.linalg.solve(A, rhs)
            for f in range(nf):
                if uidx[f] >= 0:
                    y[f] = sol[uidx[f]]
        for p in range(k):
            c = vcell[s0 + p]
            la = vloc[s0 + p]
            P[c, la, la] = 0.0
            for j in range(3):
                P[c, la, pl[p, j]] = ps[p, j] * y[pf[p, j]]


# -- the estimator ----------------------------------------------------------------------
def estimate_error_tetrahedra(solution, exact_gradient, quadrature_degree, t_start):
    """:func:`galerkit.estimate_error` for P1 on tetrahedra (validated arguments)."""
    clock = _Clock(t_start)
    disc = solution.disc
    problem = solution.problem
    mesh = disc.mesh
    notes = []
    u = np.asarray(solution.u, dtype=np.float64)
    m = mesh.n_cells
    pts = np.asarray(mesh.points, dtype=np.float64)
    cells = np.ascontiguousarray(mesh.cells)
    X = pts[cells]  # (m, 4, 3)
    vol = np.ascontiguousarray(mesh.cell_volumes, dtype=np.float64)
    K = _conductivity_tensor_3d(problem.conductivity, m)
    kinv = np.empty((m, 3, 3))
    lam_min = np.empty(m)
    h = np.empty(m)
    grad_uh = np.empty((m, 3))
    flux_h = np.empty((m, 3))
    stiff = np.empty((m, 4))
    Mrt = np.empty((m, 4, 4))
    _cell_data_3d(X, K, np.ascontiguousarray(u[cells]), vol, kinv, lam_min, h, grad_uh, flux_h,
                  stiff, Mrt)
    if (K[:, 0, 1] != 0).any() or (K[:, 0, 2] != 0).any() or (K[:, 1, 2] != 0).any():
        lam_min = np.linalg.eigvalsh(K)[:, 0]
    del K
    energy_norm = float(np.sqrt(max((vol * (flux_h * grad_uh).sum(axis=1)).sum(), 0.0)))
    clock("cells")

    fmom, osc, fnorm2, gap = _source_moments_3d(problem.source, disc, X, vol, cells,
                                                quadrature_degree)
    clock("source")
    draw = np.ascontiguousarray(fmom - stiff)
    # outward flux of K grad u_h through face i: n_i |F_i| = -3 |K| grad l_i
    qf = -3.0 * stiff

    _, fid, _, _ = enumerate_entities(cells, _FACES, mesh.n_vertices)
    fid = np.ascontiguousarray(fid, dtype=np.int64)
    neighbors = _neighbors_from_faces(fid)
    bkind = np.where(neighbors < 0, _FLUX, _INTERIOR).astype(np.int8)
    clock("topology")
    gout = np.zeros((m, 4, 4))
    bosc = np.zeros(m)
    bres = np.zeros(m)
    fcell = np.asarray(mesh.boundary_facet_cells, dtype=np.int64)
    floc = np.asarray(mesh.boundary_facet_local, dtype=np.int64)
    nbf = fcell.size
    dirichlet = np.zeros(nbf, dtype=bool)
    for tag, value in problem.dirichlet.items():
        ids = mesh.tagged_facets(tag)
        dirichlet[ids] = True
        _check_dirichlet_3d(tag, value, mesh, ids)
    bkind[fcell[dirichlet], floc[dirichlet]] = _DIRICHLET
    # facet rule on the reference triangle; local vertices of each facet
    frule = simplex_quadrature(2, quadrature_degree)
    fl3 = np.column_stack([1 - frule.points.sum(axis=1), frule.points])  # (nq, 3)
    fw = 2.0 * frule.weights  # sums to 1: multiply by the facet area
    vloc_f = _FACES[floc]  # (nbf, 3) local vertices of each facet
    fverts = cells[fcell[:, None], vloc_f]
    FX = pts[fverts]  # (nbf, 3, 3)
    xq = np.einsum("qk,fkj->fqj", fl3, FX)  # (nbf, nq, 3)
    farea = 0.5 * np.linalg.norm(np.cross(FX[:, 1] - FX[:, 0], FX[:, 2] - FX[:, 0]), axis=1)
    gq = np.zeros((nbf, fl3.shape[0]))
    for tag, flux in problem.neumann.items():
        ids = mesh.tagged_facets(tag)
        gq[ids] += _facet_values_3d(flux, ids, xq, f"neumann[{tag!r}]")
    for tag, (alpha, uext) in problem.robin.items():
        ids = mesh.tagged_facets(tag)
        av = _facet_values_3d(alpha, ids, xq, f"robin[{tag!r}] alpha")
        uv = _facet_values_3d(uext, ids, xq, f"robin[{tag!r}] u_ext")
        uh = u[fverts[ids]] @ fl3.T  # (k, nq)
        gq[ids] += av * (uv - uh)
    sel = np.flatnonzero(~dirichlet)
    mom = farea[:, None] * np.einsum("fq,qk->fk", gq * fw[None, :], fl3)  # (nbf, 3)
    for t in range(3):
        gout[fcell[sel], floc[sel], vloc_f[sel, t]] = -mom[sel, t]
    gmean = (gq * fw[None, :]).sum(axis=1)
    goscn = np.sqrt(farea * (((gq - gmean[:, None]) ** 2) * fw[None, :]).sum(axis=1))
    c_trace = h[fcell] * np.sqrt(farea / vol[fcell] * (1 / math.pi**2 + 2 / (3 * math.pi)))
    np.add.at(bosc, fcell[sel], (c_trace * goscn / np.sqrt(lam_min[fcell]))[sel])
    nflux = qf[fcell, floc] / farea  # K grad u_h . n (outward)
    hF = _face_diameters(FX)
    resq = farea * (((gq - nflux[:, None]) ** 2) * fw[None, :]).sum(axis=1)
    np.add.at(bres, fcell[sel], (hF * resq / lam_min[fcell])[sel])
    clock("boundary")

    vptr, vcell, vloc = _vertex_patches_3d(cells, mesh.n_vertices)
    P = np.zeros((m, 4, 4))
    corr = np.zeros((m, 4))
    flagged = np.zeros(mesh.n_vertices, dtype=np.int8)
    if _FORCE_MIXED:
        flagged[:] = 1
    else:
        _patch_fluxes_3d(vol, Mrt, qf, fid, neighbors, bkind, draw, gout, vptr, vcell, vloc,
                         P, corr, flagged)
    verts = np.flatnonzero(flagged).astype(np.int64)
    if verts.size:
        _patch_fluxes_mixed_3d(vol, Mrt, qf, fid, bkind, draw, gout, vptr, vcell, vloc, P,
                               corr, verts)
    clock("patches")
    amount = np.ascontiguousarray(corr.sum(axis=1))
    T = np.zeros((m, 4))
    parent = np.empty(m, dtype=np.int64)
    order = np.empty(m, dtype=np.int64)
    n_floating = np.zeros(1, dtype=np.int64)
    unrouted = _route(neighbors, bkind, amount, vol, T, parent, order, n_floating)
    del parent, order
    clock("route")

    eta = np.empty(m)
    res_ind = np.empty(m)
    nblk = (m + _CELL_CHUNK - 1) // _CELL_CHUNK
    sums = np.empty((nblk, 3))
    dev = np.empty((nblk, 4))
    where = np.empty((nblk, 4), dtype=np.int64)
    _cell_terms_3d(X, vol, kinv, flux_h, qf, P, T, fid, neighbors, lam_min, h, osc, fnorm2,
                   bosc, bres, fmom, corr, amount, bkind, gout, eta, res_ind, sums, dev, where)
    _check_flux_blocks(dev, where, neighbors)
    bound = float(np.sqrt((eta**2).sum()))
    residual = float(np.sqrt((res_ind**2).sum()))
    sums = sums.sum(axis=0)
    clock("indicators")

    # |gout| summed through its only non-zero entries, the boundary moments (an (m, 4, 4)
    # temporary would cost more than the indicators, in fresh pages)
    scale = float(np.abs(fmom).sum() + np.abs(mom[sel]).sum() + np.abs(stiff).sum()) or 1.0
    guaranteed = True
    if n_floating[0] and unrouted > 1e-12 * scale:
        if problem.robin or problem.dirichlet:
            guaranteed = False
            notes.append(
                f"{int(n_floating[0])} mesh part(s) that no Dirichlet facet reaches keep a "
                f"residual of {unrouted:.3e} (algebraic or quadrature residual of a part "
                "anchored by Robin terms or by a vertex or edge only); the bound holds for the "
                "exactly solved system only: solve with a tighter rtol")
    if gap > 1e-10 * max(scale, 1e-300):
        notes.append(f"source quadrature: two rules differ by {gap:.3e} in the cell integrals "
                     "(a non-polynomial source); raise quadrature_degree if this matters")
    est = ErrorEstimate(
        bound=bound, indicators=eta, residual_estimate=residual, residual_indicators=res_ind,
        terms={"flux": float(np.sqrt(sums[0])),
               "oscillation": float(np.sqrt(sums[2])),
               "boundary_data": float(np.sqrt((bosc**2).sum())),
               "algebraic": float(np.sqrt(sums[1])),
               "unrouted": float(unrouted), "quadrature_gap": float(gap)},
        energy_norm=energy_norm, guaranteed=guaranteed, notes=notes)
    if not (np.isfinite(bound) and np.isfinite(residual)):
        raise InputError("estimate_error: the estimate is not finite (non-finite data or "
                         "solution); check the source and boundary data")
    if exact_gradient is not None:
        from .functionals import energy_error
        err = energy_error(disc, u, exact_gradient, problem.conductivity,
                           quadrature_degree=quadrature_degree)
        est.error = err
        est.effectivity = bound / err if err > 0 else math.inf
        est.residual_effectivity = residual / err if err > 0 else math.inf
        clock("exact_error")
    est.seconds = time.perf_counter() - t_start
    est.phase_seconds = clock.phases
    return est


# -- helpers --------------------------------------------------------------------------
def _check_flux_blocks(dev, where, neighbors):
    """The flux must balance the source cell by cell, be conforming, and meet the
    boundary data (checks of what the compiled kernels returned; ``dev`` and ``where``
    from :func:`_cell_terms_3d`)."""
    scale = max(float(dev[:, 3].max(initial=0.0)), 1e-300)
    worst = dev[:, :3].max(axis=0, initial=0.0)
    if not (worst > 1e-8 * scale).any():
        return
    j = int(np.argmax(worst > 1e-8 * scale))
    c = int(where[int(np.argmax(dev[:, j])), j])
    if j == 1:
        c, i = divmod(c, 4)
    what = ("misses the source on cell {c} by {d:.3e}; internal error, please report with "
            "the mesh",
            "is not conforming across the face between cells {c} and {o} (jump {d:.3e}); "
            "internal error, please report with the mesh",
            "misses the boundary data on a face of cell {c} by {d:.3e}; internal error")[j]
    raise RuntimeError("estimate_error: the equilibrated flux " + what.format(
        c=c, o=int(neighbors[c, i]) if j == 1 else -1, d=worst[j]))


def _conductivity_tensor_3d(kappa, m):
    t = tensor_values(kappa, m, 3, "conductivity")
    if t is not None:
        return np.ascontiguousarray(np.broadcast_to(t, (m, 3, 3)), dtype=np.float64)
    v = scalar_values(kappa, m, "conductivity", positive=True)
    v = np.broadcast_to(v[:, 0], (m,)) if v.shape[0] > 1 else np.full(m, float(v[0, 0]))
    K = np.zeros((m, 3, 3))
    for i in range(3):
        K[:, i, i] = v
    return K


def _source_moments_3d(source, disc, X, vol, cells, degree):
    """``fmom[c, l] = int_c f l_l``, ``osc[c] = ||f - mean_c f||_c``, ``||f||_c**2`` and
    the largest difference of the cell integrals between rules of ``degree`` and
    ``degree + 2`` (3D form of ``estimators._source_moments``)."""
    m = cells.shape[0]
    if not callable(source) and not isinstance(source, RegionCoefficient) \
            and np.ndim(source) == 0:  # a constant: closed forms (Stroud 1971)
        f = float(source)
        return (np.ascontiguousarray(np.repeat((f * vol / 4)[:, None], 4, axis=1)),
                np.zeros(m), f * f * vol, 0.0)

    def values(rule):
        lam = np.column_stack([1 - rule.points.sum(axis=1), rule.points])  # (nq, 4)
        if np.ndim(source) == 1 and np.shape(source) == (disc.n_dofs,):
            fv = np.asarray(source, dtype=np.float64)[cells] @ lam.T
        else:
            nq = rule.n_points
            fv = scalar_values(source, m, "source",
                               points=lambda: np.matmul(lam, X).transpose(2, 0, 1).reshape(3, -1),
                               point_shape=(m, nq))
            fv = np.broadcast_to(fv, (m, nq)) if fv.shape[1] == nq else \
                np.broadcast_to(fv[:, :1], (m, nq))
        return lam, fv

    rule = simplex_quadrature(3, degree)
    lam, fv = values(rule)
    w = 6 * vol[:, None] * rule.weights[None, :]  # the reference tetrahedron has volume 1/6
    fmom = np.ascontiguousarray((w * fv) @ lam)
    mean = (w * fv).sum(axis=1) / vol
    osc = np.sqrt(np.maximum((w * (fv - mean[:, None]) ** 2).sum(axis=1), 0.0))
    fnorm2 = (w * fv**2).sum(axis=1)
    gap = 0.0
    if callable(source) or (isinstance(source, RegionCoefficient) and source.has_callable):
        rule2 = simplex_quadrature(3, min(degree + 2, 20) if degree < 20 else degree - 2)
        _, fv2 = values(rule2)
        w2 = 6 * vol[:, None] * rule2.weights[None, :]
        gap = float(np.abs((w2 * fv2).sum(axis=1) - (w * fv).sum(axis=1)).sum())
    return fmom, osc, fnorm2, gap


def _neighbors_from_faces(fid):
    """The cell across each face ``(m, 4)`` (-1 on the boundary), from the face ids."""
    nb_ = np.empty(fid.shape, dtype=np.int64)
    _pair_faces(fid, int(fid.max()) + 1 if fid.size else 0, nb_)
    return nb_


@nb.njit(cache=True)
def _pair_faces(fid, n_faces, nb_):
    # the first cell to meet a face waits for the second (a face is in one or two cells)
    first = np.full(n_faces, -1, dtype=np.int64)
    m = fid.shape[0]
    for c in range(m):
        for i in range(4):
            nb_[c, i] = -1
            f = fid[c, i]
            o = first[f]
            if o < 0:
                first[f] = 4 * c + i
            else:
                nb_[o // 4, o % 4] = c
                nb_[c, i] = o // 4


def _vertex_patches_3d(cells, n):
    """The cells around each vertex: ``vcell[vptr[a]:vptr[a + 1]]`` ascending, with the
    local index ``vloc`` of ``a`` in each."""
    vptr = np.empty(n + 1, dtype=np.int64)
    vcell = np.empty(cells.size, dtype=np.int64)
    vloc = np.empty(cells.size, dtype=np.int64)
    _vertex_patch_fill(cells, vptr, vcell, vloc)
    return vptr, vcell, vloc


@nb.njit(cache=True)
def _vertex_patch_fill(cells, vptr, vcell, vloc):
    # a counting sort of the (cell, local vertex) pairs by vertex, stable in the cell
    n = vptr.size - 1
    vptr[:] = 0
    m, k = cells.shape
    for c in range(m):
        for i in range(k):
            vptr[cells[c, i] + 1] += 1
    for a in range(n):
        vptr[a + 1] += vptr[a]
    fill = vptr[:n].copy()
    for c in range(m):
        for i in range(k):
            a = cells[c, i]
            vcell[fill[a]] = c
            vloc[fill[a]] = i
            fill[a] += 1


def _face_diameters(FX):
    return np.max([np.linalg.norm(FX[:, i] - FX[:, j], axis=1)
                   for i, j in ((0, 1), (0, 2), (1, 2))], axis=0)


def _facet_values_3d(value, ids, xq, name):
    """Values of boundary data at the quadrature points of the facets ``ids``."""
    nq = xq.shape[1]
    if callable(value):
        x = np.ascontiguousarray(xq[ids].reshape(-1, 3).T)
        v = np.asarray(evaluate_callable(value, x, name), dtype=np.float64).reshape(len(ids), nq)
    else:
        arr = np.asarray(value, dtype=np.float64)
        if arr.ndim == 0:
            v = np.full((len(ids), nq), float(arr))
        elif arr.shape == (len(ids),):
            v = np.repeat(arr[:, None], nq, axis=1)
        else:
            raise InputError(f"{name}: array of shape {arr.shape}; expected a number, one value "
                             f"per tagged facet ({len(ids)},) or a callable")
    if not np.isfinite(v).all():
        raise InputError(f"{name}: non-finite boundary value")
    return v


def _check_dirichlet_3d(tag, value, mesh, ids):
    """Dirichlet data must lie in the discrete space (affine on each facet)."""
    if not callable(value):
        return
    f = mesh.boundary_facets[ids]
    FX = mesh.points[f]  # (k, 3, 3)
    lam = np.array([[1, 0, 0], [0, 1, 0], [0, 0, 1], [0.5, 0.5, 0], [0, 0.5, 0.5],
                    [0.5, 0, 0.5], [1 / 3, 1 / 3, 1 / 3], [0.6, 0.3, 0.1]])
    x = np.einsum("pk,fkj->fpj", lam, FX)
    g = np.asarray(evaluate_callable(value, np.ascontiguousarray(x.reshape(-1, 3).T),
                                     f"dirichlet[{tag!r}]"), dtype=np.float64)
    g = g.reshape(len(ids), lam.shape[0])
    lin = g[:, :3] @ lam.T
    dev = np.abs(g - lin).max(axis=1)
    tol = 1e-10 * max(float(np.abs(g).max()), 1e-300)
    if (dev > tol).any():
        i = int(np.argmax(dev))
        raise UnsupportedError(
            f"estimate_error: dirichlet[{tag!r}] is not affine on boundary facet "
            f"{int(ids[i])} (deviation {dev[i]:.3e} from its P1 interpolant): Dirichlet data "
            "outside the discrete space add a lifting term that is not implemented. Give the "
            "condition as Neumann data (K du/dn) there, or use data affine per facet")
