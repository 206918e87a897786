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
3D the patch problem is a small mixed system (face fluxes and one multiplier
per cell), solved exactly by a dense LU factorisation per vertex.  The
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
from .estimators import (ErrorEstimate, _DIRICHLET, _FLUX, _INTERIOR, _check_equilibrium,
                         _route, cell_diameters)
from .regions import RegionCoefficient
from .quadrature import simplex_quadrature
from .topology import enumerate_entities

__all__ = ["estimate_error_tetrahedra"]

_FACES = np.array([[1, 2, 3], [0, 2, 3], [0, 1, 3], [0, 1, 2]])  # face i: opposite vertex i


# -- compiled kernel ------------------------------------------------------------------
@nb.njit(cache=True, parallel=True)
def _patch_fluxes_3d(cells, vol, M, qf, fid, bkind, draw, gout, vptr, vcell, vloc, P, corr):
    """Local equilibrated fluxes on every vertex patch (3D, lowest order).

    ``M[c]``: the (4, 4) Raviart--Thomas mass matrix of cell ``c`` in the ``K^-1``
    product (basis of unit outward face fluxes); ``qf[c, i]``: outward flux of
    ``K grad u_h`` through face ``i``; ``fid[c, i]``: global face id; ``bkind``,
    ``draw``, ``gout`` as in 2D.  Writes ``P[c, l, i]`` (outward flux of patch ``l``
    through face ``i`` of ``c``) and ``corr[c, l]``; each (c, l) belongs to one
    vertex, so the writes never collide.
    """
    n = vptr.shape[0] - 1
    for a in nb.prange(n):
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
    J = np.stack([X[:, i] - X[:, 0] for i in (1, 2, 3)], axis=2)  # columns x_i - x_0
    Jinv = np.linalg.inv(J)
    glam = np.empty((m, 4, 3))
    glam[:, 1:] = Jinv
    glam[:, 0] = -Jinv.sum(axis=1)
    K = _conductivity_tensor_3d(problem.conductivity, m)
    kinv = np.ascontiguousarray(np.linalg.inv(K))
    lam_min = np.linalg.eigvalsh(K)[:, 0]
    grad_uh = np.einsum("ci,cij->cj", u[cells], glam)
    flux_h = np.ascontiguousarray(np.einsum("cij,cj->ci", K, grad_uh))
    energy_norm = float(np.sqrt(max((vol * (flux_h * grad_uh).sum(axis=1)).sum(), 0.0)))
    h = cell_diameters(mesh)

    fmom, osc, fnorm2, gap = _source_moments_3d(problem.source, disc, X, vol, cells,
                                                quadrature_degree)
    stiff = vol[:, None] * np.einsum("ci,cli->cl", flux_h, glam)
    draw = np.ascontiguousarray(fmom - stiff)
    # outward flux of K grad u_h through face i: n_i |F_i| = -3 |K| grad l_i
    qf = np.ascontiguousarray(-3.0 * vol[:, None] * np.einsum("ci,cli->cl", flux_h, glam))
    Mrt = _rt_mass(X, vol, kinv)

    _, fid, _, _ = enumerate_entities(cells, _FACES, mesh.n_vertices)
    fid = np.ascontiguousarray(fid, dtype=np.int64)
    neighbors = _neighbors_from_faces(fid)
    bkind = np.where(neighbors < 0, _FLUX, _INTERIOR).astype(np.int8)
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

    vptr, vcell, vloc = _vertex_patches_3d(cells, mesh.n_vertices)
    P = np.zeros((m, 4, 4))
    corr = np.zeros((m, 4))
    _patch_fluxes_3d(cells, vol, Mrt, qf, fid, bkind, draw, gout, vptr, vcell, vloc, P, corr)
    amount = np.ascontiguousarray(corr.sum(axis=1))
    T = np.zeros((m, 4))
    parent = np.empty(m, dtype=np.int64)
    order = np.empty(m, dtype=np.int64)
    n_floating = np.zeros(1, dtype=np.int64)
    unrouted = _route(neighbors, bkind, amount, vol, T, parent, order, n_floating)
    F = P.sum(axis=1) + T
    _check_equilibrium(F, fmom, amount, corr, neighbors, bkind, gout)

    eta_flux = np.sqrt(np.maximum(_rt_misfit_3d(X, vol, F, flux_h, kinv), 0.0))
    eta_alg = np.sqrt(np.maximum(_rt_misfit_3d(X, vol, T, np.zeros_like(flux_h), kinv), 0.0))
    eta_osc = h / math.pi * osc / np.sqrt(lam_min)
    eta = eta_flux + eta_osc + bosc
    bound = float(np.sqrt((eta**2).sum()))

    jumps = _flux_jumps_3d(qf, fid, neighbors, lam_min, X)
    res_ind = np.sqrt(h**2 / lam_min * fnorm2 + jumps + bres)
    residual = float(np.sqrt((res_ind**2).sum()))

    scale = float(np.abs(fmom).sum() + np.abs(gout).sum() + np.abs(stiff).sum()) or 1.0
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
        terms={"flux": float(np.sqrt((eta_flux**2).sum())),
               "oscillation": float(np.sqrt((eta_osc**2).sum())),
               "boundary_data": float(np.sqrt((bosc**2).sum())),
               "algebraic": float(np.sqrt((eta_alg**2).sum())),
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
    est.seconds = time.perf_counter() - t_start
    return est


# -- helpers --------------------------------------------------------------------------
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


def _rt_mass(X, vol, kinv):
    """``M[c, i, j] = int_c phi_i . K^-1 phi_j`` with ``phi_i = (x - x_i) / (3 |c|)``:
    exact, from ``int l_k l_l = |c| (1 + delta_kl) / 20`` (Stroud 1971)."""
    xbar = X.mean(axis=1)
    D = xbar[:, None, :] - X  # (m, 4, 3): xbar - x_i
    E = X[:, None, :, :] - X[:, :, None, :]  # E[c, i, k] = x_k - x_i
    t1 = 16 * np.einsum("cia,cab,cjb->cij", D, kinv, D)
    t2 = np.einsum("cika,cab,cjkb->cij", E, kinv, E)
    return np.ascontiguousarray((t1 + t2) / (180.0 * vol[:, None, None]))


def _rt_misfit_3d(X, vol, F, flux_h, kinv):
    """``||K^-1/2 (sigma + flux_h)||_c**2`` for the RT0 field of outward face fluxes F:
    ``int w.A w = |c|/20 (sum_k w_k.A w_k + (sum_k w_k).A(sum_k w_k))`` for affine w
    with vertex values w_k (exact simplex integrals, Stroud 1971)."""
    W = np.zeros_like(X)  # w at the vertices
    for i in range(4):
        W += F[:, i, None, None] * (X - X[:, i, None, :]) / (3 * vol[:, None, None])
    W += flux_h[:, None, :]
    s = W.sum(axis=1)
    return vol / 20 * (np.einsum("cka,cab,ckb->c", W, kinv, W)
                       + np.einsum("ca,cab,cb->c", s, kinv, s))


def _neighbors_from_faces(fid):
    m = fid.shape[0]
    flat = fid.ravel()
    order = np.argsort(flat, kind="stable")
    sf = flat[order]
    nb_ = np.full(4 * m, -1, dtype=np.int64)
    same = np.flatnonzero(sf[1:] == sf[:-1])
    a, b = order[same], order[same + 1]
    nb_[a] = b // 4
    nb_[b] = a // 4
    return np.ascontiguousarray(nb_.reshape(m, 4))


def _vertex_patches_3d(cells, n):
    flat = cells.ravel().astype(np.int64)
    order = np.argsort(flat, kind="stable")
    vptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(np.bincount(flat, minlength=n), out=vptr[1:])
    return vptr, np.ascontiguousarray(order // 4), np.ascontiguousarray(order % 4)


def _face_diameters(FX):
    return np.max([np.linalg.norm(FX[:, i] - FX[:, j], axis=1)
                   for i, j in ((0, 1), (0, 2), (1, 2))], axis=0)


def _flux_jumps_3d(qf, fid, neighbors, lam_min, X):
    """Per cell: sum over interior faces of h_F / (2 lambda_F) ||[K grad u_h . n]||_F**2."""
    m = qf.shape[0]
    out = np.zeros(m)
    for i in range(4):
        nb_ = neighbors[:, i]
        inner = np.flatnonzero(nb_ >= 0)
        other = nb_[inner]
        back = np.argmax(fid[other] == fid[inner, i][:, None], axis=1)
        FX = X[inner][:, _FACES[i]]
        area = 0.5 * np.linalg.norm(np.cross(FX[:, 1] - FX[:, 0], FX[:, 2] - FX[:, 0]), axis=1)
        jump = (qf[inner, i] + qf[other, back]) / area  # outward fluxes of both sides
        lamF = np.maximum(lam_min[inner], lam_min[other])
        out[inner] += _face_diameters(FX) * area * jump**2 / (2 * lamF)
    return out


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
