"""A posteriori error estimates: a guaranteed energy-error bound and the residual estimator.

For ``-div(K grad u) = f`` with Dirichlet, Neumann (``K du/dn = g``) and Robin
(``K du/dn = alpha (u_ext - u)``) data and a P1 solution ``u_h`` on triangles
(tetrahedra: below),
:func:`estimate_error` returns

* ``bound``: a computable upper bound of the energy error
  ``||K^(1/2) grad(u - u_h)||``, built from an equilibrated flux (Prager &
  Synge 1947): a lowest-order Raviart--Thomas field ``sigma_h`` with
  ``div sigma_h`` equal to the cell means of ``f`` and ``sigma_h . n`` equal to
  the facet means of ``-g`` on Neumann/Robin facets.  ``sigma_h`` is the sum of
  local fluxes on vertex patches (Braess & Schoeberl 2008; Ern & Vohralik
  2015): on the patch of vertex ``a``, the Raviart--Thomas field closest (in
  the ``K^-1`` norm) to ``-Pi_a K grad u_h`` -- the field with half the fluxes
  of ``-K grad u_h`` through the edges at ``a`` -- among those with zero flux
  through the patch boundary and the hat-weighted residual
  ``(f, psi_a)_K - (K grad u_h, grad psi_a)_K`` as divergence on each cell.
  The halves sum to ``-K grad u_h``, so a solution that P1 reproduces gives a
  zero bound (the patch test).  In 2D the
  patch problem of a vertex is solved exactly by one sweep around the vertex
  plus the minimisation over the one free circulation (when there is one).
  Then, cell by cell,

      eta_K = ||K^(-1/2)(sigma_h + K grad u_h)||_K                    (flux)
            + h_K / pi * lambda_K^(-1/2) ||f - Pi_0 f||_K              (oscillation)
            + sum over Neumann/Robin facets F of K of
              C_F lambda_K^(-1/2) ||g - Pi_0 g||_F                      (boundary data)

  with ``lambda_K`` the smallest eigenvalue of K on the cell, ``h_K`` the
  cell diameter, ``h_K / pi`` the Poincare constant of a convex cell (Payne &
  Weinberger 1960), and ``C_F = h_K (|F| / |K| (1/pi**2 + 2/(d pi)))**(1/2)``
  the constant of the trace inequality for mean-free functions (from the
  divergence theorem applied to ``v**2 (x - x_F)``, ``x_F`` the vertex
  opposite F, and the Poincare inequality above).  ``bound**2 = sum eta_K**2``.
  For Robin facets ``g = alpha (u_ext - u_h)``; the bound then also bounds the
  Robin energy norm ``(||K^(1/2) grad e||**2 + ||alpha^(1/2) e||_R**2)**(1/2)``.

* the algebraic and quadrature residual: the patch problems need the
  Galerkin equations to hold exactly, which an iterative solve (or a load
  integrated by a coarser quadrature than ours) does not give.  The residual
  of each patch is taken out of it and carried, as a Raviart--Thomas flux
  along a spanning tree of the cells, to a Dirichlet facet (where the flux is
  free).  The routed flux is part of ``sigma_h``, so the bound stays
  guaranteed whatever the solver tolerance; its size is reported as the term
  ``"algebraic"``.

* ``residual_estimate``: the classical residual estimator (Babuska &
  Rheinboldt 1978; Verfuerth 2013), element residuals ``h_K**2 / lambda_K
  ||f||_K**2`` and flux jumps ``h_E / (2 lambda_E) ||[K grad u_h . n]||_E**2``
  (``g - K grad u_h . n`` on Neumann/Robin facets), with constants set to 1:
  an indicator, not a bound.

When the bound is guaranteed
----------------------------
``estimate.guaranteed`` is True, and ``bound >= ||K^(1/2) grad(u - u_h)||``
holds for the exact solution ``u``, when all of the following hold (up to
floating-point round-off):

* P1-P4 elements on triangles (P2-P4: :mod:`galerkit.equilibration`, below),
  conductivity constant on each cell (a number, one value per cell or per
  region, or a (2, 2) / (n_cells, 2, 2) SPD tensor);
* Dirichlet data in the discrete space (a number, a dof vector, or a callable
  that is a polynomial of the solution's degree along every Dirichlet facet --
  affine for P1 -- checked);
* the source ``f`` and boundary data integrated exactly by the quadrature of
  degree ``quadrature_degree`` (default 10; exact for polynomial data up to
  that degree, constants and dof vectors); for other callables the difference
  of two quadratures is reported as ``terms["quadrature_gap"]`` and is not
  part of the bound;
* every part of the mesh without a Dirichlet facet is pure Neumann with
  compatible data, or the residual left there (``terms["unrouted"]``) is at
  round-off level; otherwise ``guaranteed`` is False and a note says why.

Tetrahedra: the same construction and the same conditions, read with
tetrahedra for triangles and faces for edges (:mod:`galerkit.estimators3d`:
the 3D patch problems are small mixed systems solved exactly per vertex).

P2-P4 on triangles: the same bound with a flux of degree k, sigma_h in RT_k
(divergence in P_k), from the vertex-patch mixed problems of Ern & Vohralik
(2015) and Braess, Pillwein & Schoeberl (2009) (:mod:`galerkit.equilibration`):
``Pi_0`` reads ``Pi_k`` in the oscillation and boundary-data terms, the
residual estimator has the element residual ``f + div(K grad u_h)``; the same
routing of the algebraic residual, the same notes and the same conditions.

P2-P4 on tetrahedra: the same bound again, RT_k fluxes on tetrahedra
(:mod:`galerkit.equilibration3d`: face moments in the face coordinates ordered by
the global vertex numbers, patch problems condensed onto the faces shared inside
each patch), with the 3D trace constant, under the same conditions.

Other cases (conductivity varying inside cells, Dirichlet data outside the
discrete space) raise :class:`~galerkit.errors.UnsupportedError`.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field

import numba as nb
import numpy as np

from .coefficients import evaluate_callable, scalar_values, tensor_values
from .errors import InputError, UnsupportedError
from .quadrature import simplex_quadrature
from .regions import RegionCoefficient
from .topology import enumerate_entities

__all__ = ["ErrorEstimate", "estimate_error", "cell_diameters"]

#: 1D Gauss--Legendre points on [0, 1] for facet integrals (exact to degree 19)
_GL_T, _GL_W = np.polynomial.legendre.leggauss(10)
_GL_T = 0.5 * (_GL_T + 1.0)
_GL_W = 0.5 * _GL_W

_INTERIOR, _DIRICHLET, _FLUX = 0, 1, 2


@dataclass
class ErrorEstimate:
    """An a posteriori estimate of the energy error of one solution.

    Attributes
    ----------
    bound : float
        Guaranteed upper bound of ``||K^(1/2) grad(u - u_h)||`` (see the module
        docstring for when it is guaranteed; ``guaranteed`` says it).
    indicators : ndarray (n_cells,)
        ``eta_K`` of every cell; ``bound = sqrt(sum(indicators**2))``.
    residual_estimate : float
        The classical residual estimator (constants 1), for comparison.
    residual_indicators : ndarray (n_cells,)
    terms : dict
        ``"flux"``, ``"oscillation"``, ``"boundary_data"`` (each the root of the
        sum of squares of its per-cell part), ``"algebraic"`` (the norm of the
        routed residual flux, included in ``"flux"``), ``"unrouted"`` and
        ``"quadrature_gap"`` (named, not in the bound).
    energy_norm : float
        ``||K^(1/2) grad u_h||``.
    guaranteed : bool
    error, effectivity : float or None
        The exact energy error and ``bound / error`` when an exact gradient was
        given.
    notes : list of str
    seconds : float
    phase_seconds : dict
        Seconds of the phases (source, cells, topology, boundary, patches, route,
        indicators, exact_error), for profiling.
    """

    bound: float
    indicators: np.ndarray
    residual_estimate: float
    residual_indicators: np.ndarray
    terms: dict
    energy_norm: float
    guaranteed: bool
    error: float | None = None
    effectivity: float | None = None
    residual_effectivity: float | None = None
    notes: list = field(default_factory=list)
    seconds: float = 0.0
    phase_seconds: dict = field(default_factory=dict)

    def __repr__(self) -> str:
        eff = "" if self.effectivity is None else f", effectivity {self.effectivity:.3f}"
        return (f"ErrorEstimate(bound {self.bound:.4e}{eff}, residual estimate "
                f"{self.residual_estimate:.4e}, guaranteed {self.guaranteed})")


class _Clock:
    """``clock(name)`` adds the seconds since the previous call to ``phases[name]``."""

    def __init__(self, t0):
        self.t = t0
        self.phases = {}

    def __call__(self, name):
        t = time.perf_counter()
        self.phases[name] = self.phases.get(name, 0.0) + t - self.t
        self.t = t


def cell_diameters(mesh) -> np.ndarray:
    """Longest edge of every cell, shape (n_cells,)."""
    P = mesh.points[mesh.cells]
    d = mesh.dim
    h = np.zeros(mesh.n_cells)
    for i in range(d + 1):
        for j in range(i + 1, d + 1):
            h = np.maximum(h, np.sqrt(((P[:, i] - P[:, j]) ** 2).sum(axis=1)))
    return h


# -- compiled kernels ---------------------------------------------------------------
@nb.njit(cache=True)
def _patches(cells, n):
    """Vertex patches by a counting sort: ``vcell[vptr[v]:vptr[v+1]]`` are the cells at
    vertex ``v`` (ascending), ``vloc`` the local number of ``v`` in each."""
    m = cells.shape[0]
    vptr = np.zeros(n + 1, np.int64)
    for c in range(m):
        for l in range(3):
            vptr[cells[c, l] + 1] += 1
    for v in range(n):
        vptr[v + 1] += vptr[v]
    fill = vptr[:-1].copy()
    vcell = np.empty(3 * m, np.int64)
    vloc = np.empty(3 * m, np.int64)
    for c in range(m):
        for l in range(3):
            v = cells[c, l]
            p = fill[v]
            vcell[p] = c
            vloc[p] = l
            fill[v] = p + 1
    return vptr, vcell, vloc


@nb.njit(cache=True, parallel=True)
def _cell_neighbors(cells, vptr, vcell, out):
    """``out[c, i]``: the cell across the facet opposite local vertex ``i`` of ``c``
    (the other cell of the patch of one end that holds the other end), -1 on the
    boundary."""
    m = cells.shape[0]
    for c in nb.prange(m):
        for i in range(3):
            a = cells[c, (i + 1) % 3]
            b = cells[c, (i + 2) % 3]
            out[c, i] = -1
            for p in range(vptr[a], vptr[a + 1]):
                c2 = vcell[p]
                if c2 != c and (cells[c2, 0] == b or cells[c2, 1] == b or cells[c2, 2] == b):
                    out[c, i] = c2
                    break


@nb.njit(cache=True, parallel=True)
def _cell_fields(points, cells, area, kscal, ktens, u, fmom, kinv, lam_min, flux_h, draw,
                 hcell, energy, stiff_abs):
    """Per cell: K^-1, the smallest eigenvalue of K, K grad u_h, the hat-weighted
    residual ``draw = fmom - (K grad u_h, grad l_a)``, the diameter, the energy
    ``(K grad u_h, grad u_h)_K`` and the size of the stiffness terms.  K is
    ``ktens[c]`` (or ``ktens[0]``) when ``ktens`` has rows, else ``kscal[c]`` (or
    ``kscal[0]``) times the identity."""
    m = cells.shape[0]
    for c in nb.prange(m):
        if ktens.shape[0] > 0:
            t = c if ktens.shape[0] > 1 else c - c  # (a prange index is unsigned)
            k00 = ktens[t, 0, 0]
            k01 = ktens[t, 0, 1]
            k10 = ktens[t, 1, 0]
            k11 = ktens[t, 1, 1]
            det = k00 * k11 - k01 * k10
            kinv[c, 0, 0] = k11 / det
            kinv[c, 0, 1] = -k01 / det
            kinv[c, 1, 0] = -k10 / det
            kinv[c, 1, 1] = k00 / det
            hm = 0.5 * (k00 + k11)
            hd = 0.5 * (k00 - k11)
            ko = 0.5 * (k01 + k10)
            lam_min[c] = hm - math.sqrt(hd * hd + ko * ko)
        else:
            s = kscal[c] if kscal.shape[0] > 1 else kscal[0]
            k00 = s
            k01 = 0.0
            k10 = 0.0
            k11 = s
            kinv[c, 0, 0] = 1.0 / s
            kinv[c, 0, 1] = 0.0
            kinv[c, 1, 0] = 0.0
            kinv[c, 1, 1] = 1.0 / s
            lam_min[c] = s
        A2 = 2.0 * area[c]
        gx = 0.0
        gy = 0.0
        g0x = 0.0
        g0y = 0.0
        g1x = 0.0
        g1y = 0.0
        g2x = 0.0
        g2y = 0.0
        h2 = 0.0
        for i in range(3):
            p = cells[c, (i + 1) % 3]
            q = cells[c, (i + 2) % 3]
            ex = points[q, 0] - points[p, 0]
            ey = points[q, 1] - points[p, 1]
            h2 = max(h2, ex * ex + ey * ey)
            lx = -ey / A2
            ly = ex / A2
            ui = u[cells[c, i]]
            gx += ui * lx
            gy += ui * ly
            if i == 0:
                g0x, g0y = lx, ly
            elif i == 1:
                g1x, g1y = lx, ly
            else:
                g2x, g2y = lx, ly
        fx = k00 * gx + k01 * gy
        fy = k10 * gx + k11 * gy
        flux_h[c, 0] = fx
        flux_h[c, 1] = fy
        energy[c] = area[c] * (fx * gx + fy * gy)
        hcell[c] = math.sqrt(h2)
        s0 = area[c] * (fx * g0x + fy * g0y)
        s1 = area[c] * (fx * g1x + fy * g1y)
        s2 = area[c] * (fx * g2x + fy * g2y)
        draw[c, 0] = fmom[c, 0] - s0
        draw[c, 1] = fmom[c, 1] - s1
        draw[c, 2] = fmom[c, 2] - s2
        stiff_abs[c] = abs(s0) + abs(s1) + abs(s2)


@nb.njit(cache=True, inline="always")
def _rt_energy(points, cells, c, area, F0, F1, F2, fx, fy, kinv):
    """``||K^-1/2 (sigma + (fx, fy))||_c**2`` for the RT0 field of outward facet fluxes
    F0, F1, F2 on cell c (edge-midpoint rule, exact for the quadratic integrand)."""
    sx = points[cells[c, 0], 0] + points[cells[c, 1], 0] + points[cells[c, 2], 0]
    sy = points[cells[c, 0], 1] + points[cells[c, 1], 1] + points[cells[c, 2], 1]
    A2 = 2.0 * area[c]
    out = 0.0
    for q in range(3):
        mx = 0.5 * (sx - points[cells[c, q], 0])
        my = 0.5 * (sy - points[cells[c, q], 1])
        wx = 0.0
        wy = 0.0
        for i in range(3):
            Fi = F0 if i == 0 else (F1 if i == 1 else F2)
            wx += Fi * (mx - points[cells[c, i], 0]) / A2
            wy += Fi * (my - points[cells[c, i], 1]) / A2
        wx += fx
        wy += fy
        out += area[c] / 3.0 * (wx * (kinv[c, 0, 0] * wx + kinv[c, 0, 1] * wy)
                                + wy * (kinv[c, 1, 0] * wx + kinv[c, 1, 1] * wy))
    return out


@nb.njit(cache=True, parallel=True)
def _cell_terms(points, cells, area, kinv, flux_h, P, T, neighbors, lam_min, hcell, osc,
                fnorm2, bosc, bres, fmom, corr, amount, bkind, gout, eta, parts, dev):
    """Per cell, from the patch fluxes ``P`` and the routed flux ``T``: the
    indicator ``eta`` and ``parts[c] = (flux**2, algebraic**2, oscillation,
    residual indicator)``; ``dev[c] = (divergence miss, largest flux jump across a
    facet, largest miss of the boundary data, largest |flux|)``, the checks of the
    equilibrated flux."""
    m = cells.shape[0]
    for c in nb.prange(m):
        F0 = P[c, 0, 0] + P[c, 1, 0] + P[c, 2, 0] + T[c, 0]
        F1 = P[c, 0, 1] + P[c, 1, 1] + P[c, 2, 1] + T[c, 1]
        F2 = P[c, 0, 2] + P[c, 1, 2] + P[c, 2, 2] + T[c, 2]
        ef2 = max(_rt_energy(points, cells, c, area, F0, F1, F2, flux_h[c, 0], flux_h[c, 1],
                             kinv), 0.0)
        ea2 = max(_rt_energy(points, cells, c, area, T[c, 0], T[c, 1], T[c, 2], 0.0, 0.0,
                             kinv), 0.0)
        lam = lam_min[c]
        eo = hcell[c] / math.pi * osc[c] / math.sqrt(lam)
        eta[c] = math.sqrt(ef2) + eo + bosc[c]
        # residual estimator: flux jumps h_F / (2 lambda_F) ||[K grad u_h . n]||_F**2
        jumps = 0.0
        jmax = 0.0
        miss = 0.0
        for i in range(3):
            Fi = F0 if i == 0 else (F1 if i == 1 else F2)
            nb_ = neighbors[c, i]
            if nb_ >= 0:
                xa0 = points[cells[c, (i + 1) % 3], 0]
                xa1 = points[cells[c, (i + 1) % 3], 1]
                tx = points[cells[c, (i + 2) % 3], 0] - xa0
                ty = points[cells[c, (i + 2) % 3], 1] - xa1
                hF = math.sqrt(tx * tx + ty * ty)
                nx = ty / hF
                ny = -tx / hF
                dot = (xa0 - points[cells[c, i], 0]) * nx + (xa1 - points[cells[c, i], 1]) * ny
                sgn = 1.0 if dot > 0 else (-1.0 if dot < 0 else 0.0)
                mine = (flux_h[c, 0] * nx + flux_h[c, 1] * ny) * sgn
                other = (flux_h[nb_, 0] * nx + flux_h[nb_, 1] * ny) * sgn
                lamF = max(lam, lam_min[nb_])
                jumps += hF * hF * (mine - other) ** 2 / (2 * lamF)
                for j in range(3):
                    if neighbors[nb_, j] == c:
                        Fj = P[nb_, 0, j] + P[nb_, 1, j] + P[nb_, 2, j] + T[nb_, j]
                        jmax = max(jmax, abs(Fi + Fj))
            elif bkind[c, i] == 2:
                miss = max(miss, abs(Fi - (gout[c, i, 0] + gout[c, i, 1] + gout[c, i, 2])))
        parts[c, 0] = ef2
        parts[c, 1] = ea2
        parts[c, 2] = eo
        parts[c, 3] = math.sqrt(hcell[c] ** 2 / lam * fnorm2[c] + jumps + bres[c])
        dev[c, 0] = abs(F0 + F1 + F2 - (fmom[c, 0] + fmom[c, 1] + fmom[c, 2]
                                         - (corr[c, 0] + corr[c, 1] + corr[c, 2])
                                         + amount[c]))
        dev[c, 1] = jmax
        dev[c, 2] = miss
        dev[c, 3] = max(abs(F0), abs(F1), abs(F2))


@nb.njit(cache=True, parallel=True)
def _patch_fluxes(points, cells, area, kinv, flux_h, vptr, vcell, vloc, draw, bkind, gout,
                  P, corr):
    """Local equilibrated fluxes on every vertex patch (2D, lowest order).

    ``draw[c, l]``: target integral of the divergence of the patch flux of
    local vertex ``l`` over cell ``c`` (hat-weighted residual).  ``bkind[c, i]``:
    0 interior facet, 1 Dirichlet (free flux), 2 prescribed flux; ``gout[c, i, l]``
    the prescribed outward flux of patch ``l`` through boundary facet ``i``.
    Writes ``P[c, l, i]``: outward flux of patch ``l`` through facet ``i`` of ``c``,
    and ``corr[c, l]``: the part of ``draw`` taken out to make the patch solvable.
    Each (c, l) belongs to one vertex, so the writes never collide; the vertices are
    taken in fixed chunks, each with its own scratch arrays (no allocation per vertex).
    """
    n = vptr.shape[0] - 1
    kmax = 0
    for a in range(n):
        kmax = max(kmax, vptr[a + 1] - vptr[a])
    nchunk = min(n, 1024)
    for ch in nb.prange(nchunk):
        nxt = np.empty(kmax, np.int64)
        has_prev = np.empty(kmax, np.bool_)
        done = np.empty(kmax, np.bool_)
        order = np.empty(kmax, np.int64)
        cum = np.empty(kmax)
        for a in range(ch * n // nchunk, (ch + 1) * n // nchunk):
            s0 = vptr[a]
            k = vptr[a + 1] - s0
            for p in range(k):
                nxt[p] = -1
                has_prev[p] = False
                done[p] = False
            for p in range(k):
                c = vcell[s0 + p]
                la = vloc[s0 + p]
                cc = cells[c, (la + 2) % 3]
                for q in range(k):
                    c2 = vcell[s0 + q]
                    l2 = vloc[s0 + q]
                    if q != p and cells[c2, (l2 + 1) % 3] == cc:
                        nxt[p] = q
                        has_prev[q] = True
                        break
            for phase in range(2):
                for p0 in range(k):
                    if done[p0] or (phase == 0 and has_prev[p0]):
                        continue
                    m = 0
                    p = p0
                    while p >= 0 and not done[p]:
                        order[m] = p
                        m += 1
                        done[p] = True
                        p = nxt[p]
                    loop = phase == 1
                    _solve_chain(points, cells, area, kinv, flux_h, vcell, vloc, s0, order, m,
                                 loop, draw, bkind, gout, P, corr, cum)


@nb.njit(cache=True, inline="always")
def _edge_flux(points, cells, c, i, v):
    """Outward flux of the constant vector ``v[c]`` through the edge opposite local
    vertex ``i`` of the (positively oriented) triangle ``c``."""
    p = cells[c, (i + 1) % 3]
    q = cells[c, (i + 2) % 3]
    dx = points[q, 0] - points[p, 0]
    dy = points[q, 1] - points[p, 1]
    return v[c, 0] * dy - v[c, 1] * dx


@nb.njit(cache=True)
def _solve_chain(points, cells, area, kinv, flux_h, vcell, vloc, s0, order, m, loop, draw,
                 bkind, gout, P, corr, cum):
    c0 = vcell[s0 + order[0]]
    l0 = vloc[s0 + order[0]]
    cn = vcell[s0 + order[m - 1]]
    ln = vloc[s0 + order[m - 1]]
    kind0 = 0
    kindn = 0
    g0 = 0.0
    gn = 0.0
    if not loop:
        kind0 = bkind[c0, (l0 + 2) % 3]
        kindn = bkind[cn, (ln + 1) % 3]
        if kind0 == 2:
            g0 = gout[c0, (l0 + 2) % 3, l0]
        if kindn == 2:
            gn = gout[cn, (ln + 1) % 3, ln]
    dsum = 0.0
    asum = 0.0
    for j in range(m):
        c = vcell[s0 + order[j]]
        dsum += draw[c, vloc[s0 + order[j]]]
        asum += area[c]
    compat = loop or (kind0 == 2 and kindn == 2)
    r = 0.0
    if compat:
        r = dsum - g0 - gn if not loop else dsum
    run = 0.0
    for j in range(m):
        c = vcell[s0 + order[j]]
        la = vloc[s0 + order[j]]
        cj = r * area[c] / asum
        corr[c, la] = cj
        run += draw[c, la] - cj
        cum[j] = run
    free = False
    t0 = 0.0
    if loop:
        free = True
    elif kind0 == 2:
        t0 = -g0
    elif kindn == 2:
        t0 = gn - cum[m - 1]
    else:
        free = True
    if free:
        # minimise sum_j ||K^-1/2 (Pi_a K grad u_h + tau_j)||^2 over t0, with
        # tau_j = (t0 + cum_j) phi_out - (t0 + cum_{j-1}) phi_in and Pi_a K grad u_h the
        # Raviart-Thomas field with half the fluxes of K grad u_h through the two edges
        # at the vertex (these halves sum to K grad u_h over the three vertices);
        # edge-midpoint rule (exact for the quadratic integrand)
        aa = 0.0
        bb = 0.0
        for j in range(m):
            c = vcell[s0 + order[j]]
            la = vloc[s0 + order[j]]
            io = (la + 1) % 3
            ii = (la + 2) % 3
            cin = cum[j - 1] if j > 0 else (cum[m - 1] if loop else 0.0)
            A = area[c]
            sx = points[cells[c, 0], 0] + points[cells[c, 1], 0] + points[cells[c, 2], 0]
            sy = points[cells[c, 0], 1] + points[cells[c, 1], 1] + points[cells[c, 2], 1]
            # half the outward flux of K grad u_h through each edge at the vertex
            # (edge opposite i runs from x_{i+1} to x_{i+2}; outward normal (dy, -dx))
            q_o = 0.5 * _edge_flux(points, cells, c, io, flux_h)
            q_i = 0.5 * _edge_flux(points, cells, c, ii, flux_h)
            for q in range(3):
                mx = 0.5 * (sx - points[cells[c, q], 0])
                my = 0.5 * (sy - points[cells[c, q], 1])
                pox = (mx - points[cells[c, io], 0]) / (2.0 * A)
                poy = (my - points[cells[c, io], 1]) / (2.0 * A)
                pix = (mx - points[cells[c, ii], 0]) / (2.0 * A)
                piy = (my - points[cells[c, ii], 1]) / (2.0 * A)
                zx = pox - pix
                zy = poy - piy
                wx = q_o * pox + q_i * pix + cum[j] * pox - cin * pix
                wy = q_o * poy + q_i * piy + cum[j] * poy - cin * piy
                kzx = kinv[c, 0, 0] * zx + kinv[c, 0, 1] * zy
                kzy = kinv[c, 1, 0] * zx + kinv[c, 1, 1] * zy
                aa += A / 3.0 * (kzx * zx + kzy * zy)
                bb += A / 3.0 * (kzx * wx + kzy * wy)
        t0 = -bb / aa
    for j in range(m):
        c = vcell[s0 + order[j]]
        la = vloc[s0 + order[j]]
        cin = cum[j - 1] if j > 0 else (cum[m - 1] if loop else 0.0)
        P[c, la, la] = 0.0
        P[c, la, (la + 1) % 3] = t0 + cum[j]
        P[c, la, (la + 2) % 3] = -(t0 + cin)


@nb.njit(cache=True)
def _bfs(neighbors, parent, order, head, tail):
    k = neighbors.shape[1]
    while head < tail:
        c = order[head]
        head += 1
        for i in range(k):
            nb_ = neighbors[c, i]
            if nb_ >= 0 and parent[nb_] == -2:
                parent[nb_] = c
                order[tail] = nb_
                tail += 1
    return tail


@nb.njit(cache=True)
def _route(neighbors, bkind, amount, area, T, parent, order, n_floating):
    """Carry ``amount[c]`` (an integral of divergence per cell) along a spanning
    tree of the cells (breadth first from the cells with a Dirichlet facet) to
    the Dirichlet facets: fluxes ``T[c, i]`` (outward through facet ``i``) with
    ``sum_i T[c, i] = amount[c]`` and opposite values on the two sides of every
    facet.  A part of the mesh that no Dirichlet facet reaches keeps its total:
    its mean is taken out of ``amount`` (modified in place) and the absolute
    totals are returned; ``n_floating[0]`` counts such parts."""
    m = neighbors.shape[0]
    k = neighbors.shape[1]
    for c in range(m):
        parent[c] = -2  # unvisited
    tail = 0
    for c in range(m):
        for i in range(k):
            if bkind[c, i] == 1:
                parent[c] = -1  # root: its flux leaves through a Dirichlet facet
                order[tail] = c
                tail += 1
                break
    tail = _bfs(neighbors, parent, order, 0, tail)
    unrouted = 0.0
    scan = 0
    while tail < m:
        while parent[scan] != -2:
            scan += 1
        first = tail
        parent[scan] = -3  # root of a part without Dirichlet facets
        order[tail] = scan
        tail = _bfs(neighbors, parent, order, tail, tail + 1)
        tot = 0.0
        asum = 0.0
        for j in range(first, tail):
            tot += amount[order[j]]
            asum += area[order[j]]
        for j in range(first, tail):
            amount[order[j]] -= tot * area[order[j]] / asum
        unrouted += abs(tot)
        n_floating[0] += 1
    X = amount.copy()
    for j in range(m - 1, -1, -1):
        c = order[j]
        pc = parent[c]
        if pc == -1:
            for i in range(k):
                if bkind[c, i] == 1:
                    T[c, i] += X[c]
                    break
        elif pc >= 0:
            for i in range(k):
                if neighbors[c, i] == pc:
                    T[c, i] += X[c]
                    break
            for i in range(k):
                if neighbors[pc, i] == c:
                    T[pc, i] -= X[c]
                    break
            X[pc] += X[c]
    return unrouted


@nb.njit(cache=True, parallel=True)
def _source_kernel(fv, w2, lam, area, fmom, osc, fnorm2, integral):
    """From the source values ``fv`` (m, nq) or (m, 1) (constant on the cell) at the
    points of a rule of weights ``w2`` (summing to 1) and barycentric coordinates
    ``lam`` (nq, 3): ``fmom[c, l] = int_c f l_l``, ``osc[c] = ||f - mean_c f||_c``,
    ``fnorm2[c] = ||f||_c**2`` and ``integral[c] = int_c f``."""
    m = area.shape[0]
    nq = lam.shape[0]
    for c in nb.prange(m):
        A = area[c]
        if fv.shape[1] == 1:
            f = fv[c, 0] if fv.shape[0] > 1 else fv[0, 0]
            fmom[c, 0] = f * A / 3.0
            fmom[c, 1] = f * A / 3.0
            fmom[c, 2] = f * A / 3.0
            osc[c] = 0.0
            fnorm2[c] = f * f * A
            integral[c] = f * A
            continue
        s = 0.0
        s2 = 0.0
        m0 = 0.0
        m1 = 0.0
        m2 = 0.0
        for q in range(nq):
            wf = A * w2[q] * fv[c, q]
            s += wf
            s2 += wf * fv[c, q]
            m0 += wf * lam[q, 0]
            m1 += wf * lam[q, 1]
            m2 += wf * lam[q, 2]
        mean = s / A
        d2 = 0.0
        for q in range(nq):
            d = fv[c, q] - mean
            d2 += A * w2[q] * d * d
        fmom[c, 0] = m0
        fmom[c, 1] = m1
        fmom[c, 2] = m2
        osc[c] = math.sqrt(max(d2, 0.0))
        fnorm2[c] = s2
        integral[c] = s


# -- the estimator ------------------------------------------------------------------
def estimate_error(solution, *, exact_gradient=None, quadrature_degree=10,
                   minimise_flux=False) -> ErrorEstimate:
    """Guaranteed energy-error bound and residual estimate of a solution.

    Parameters
    ----------
    solution : Solution
        From :meth:`PoissonProblem.solve` (P1-P4 on triangles and tetrahedra).
    exact_gradient : callable, optional
        ``exact_gradient(x)`` with x (d, n) -> (d, n); then ``error`` and
        ``effectivity`` (bound / error) are filled in.
    quadrature_degree : int
        Degree of the cell rule for the source (the facet rule is 10-point
        Gauss--Legendre, exact to degree 19).
    minimise_flux : bool
        Triangles: also minimise the flux term over the divergence-free corrections
        ``curl phi`` of the patch flux (:mod:`galerkit.flux_minimisation`; one extra
        Poisson solve of degree k + 1).  Still guaranteed, never larger; it pays
        where vertex patches cannot carry the flux (a checkerboard conductivity on
        graded meshes).

    Returns
    -------
    ErrorEstimate

    Raises
    ------
    UnsupportedError
        A conductivity given as a callable
        (varying inside cells), Dirichlet data not a polynomial of the
        solution's degree along a Dirichlet facet (not affine for P1).
    InputError
        Not a solution, a bad exact gradient or quadrature degree.

    Notes
    -----
    See the module docstring (:mod:`galerkit.estimators`) for the construction
    and the precise conditions under which ``bound`` is guaranteed.

    Examples
    --------
    >>> import numpy as np
    >>> from galerkit import PoissonProblem, structured_triangles
    >>> mesh = structured_triangles(8, 8)
    >>> u = lambda x: np.sin(np.pi * x[0]) * np.sin(np.pi * x[1])
    >>> grad = lambda x: np.pi * np.array([np.cos(np.pi * x[0]) * np.sin(np.pi * x[1]),
    ...                                    np.sin(np.pi * x[0]) * np.cos(np.pi * x[1])])
    >>> f = lambda x: 2 * np.pi**2 * u(x)
    >>> sol = PoissonProblem(mesh, source=f, dirichlet={"boundary": 0.0}).solve()
    >>> est = estimate_error(sol, exact_gradient=grad)
    >>> est.guaranteed, est.bound >= est.error, 1.0 < est.effectivity < 1.5
    (True, True, True)
    >>> est2 = estimate_error(PoissonProblem(mesh, source=f, dirichlet={"boundary": 0.0})
    ...                       .solve(degree=2), exact_gradient=grad)
    >>> est2.guaranteed, est2.bound >= est2.error, 1.0 < est2.effectivity < 1.1
    (True, True, True)
    """
    t_start = time.perf_counter()
    disc = getattr(solution, "disc", None)
    problem = getattr(solution, "problem", None)
    if disc is None or problem is None or not hasattr(solution, "u"):
        raise InputError(f"estimate_error: expected a Solution (from PoissonProblem.solve), got "
                         f"{type(solution).__name__}")
    mesh = disc.mesh
    if isinstance(quadrature_degree, bool) or not isinstance(quadrature_degree, (int, np.integer)) \
            or not 2 <= quadrature_degree <= 20:
        raise InputError(f"estimate_error: quadrature_degree must be an integer in 2..20, got "
                         f"{quadrature_degree!r}")
    kappa = problem.conductivity
    if callable(kappa) or (isinstance(kappa, RegionCoefficient) and kappa.has_callable):
        raise UnsupportedError(
            "estimate_error: the conductivity is a callable (it may vary inside cells); the "
            "bound needs a conductivity constant on each cell: give one value per cell "
            "(an array of shape (n_cells,)) or a tensor per cell")
    u = np.asarray(solution.u, dtype=np.float64)
    if u.shape != (disc.n_dofs,) or not np.isfinite(u).all():
        raise InputError(f"estimate_error: the solution vector has shape {u.shape} or non-finite "
                         f"values; expected {disc.n_dofs} finite values")
    if not isinstance(minimise_flux, (bool, np.bool_)):
        raise InputError(f"estimate_error: minimise_flux must be True or False, got "
                         f"{minimise_flux!r}")
    if minimise_flux and mesh.dim == 3:
        raise UnsupportedError("estimate_error: minimise_flux is implemented on triangles only; "
                               "leave it False on tetrahedra")
    if mesh.dim == 3 and disc.degree == 1:
        from .estimators3d import estimate_error_tetrahedra
        return estimate_error_tetrahedra(solution, exact_gradient, quadrature_degree, t_start)
    clock = _Clock(t_start)
    if disc.degree > 1:
        helpers = {"conductivity_arrays": _conductivity_arrays, "cell_diameters": cell_diameters,
                   "patches": _patches, "cell_neighbors": _cell_neighbors, "route": _route,
                   "facet_values": _facet_values}
        if mesh.dim == 3:
            from .equilibration3d import estimate_error_pk_tetrahedra
            r = estimate_error_pk_tetrahedra(solution, u, quadrature_degree, clock, helpers)
        else:
            from .equilibration import estimate_error_pk
            r = estimate_error_pk(solution, u, quadrature_degree, clock, helpers)
        clock("indicators")
        if minimise_flux:
            from .flux_minimisation import minimise_flux_term
            rule = simplex_quadrature(2, 2 * disc.degree + 2)
            ef2, _ = minimise_flux_term(mesh, disc.degree, r["residual_at"](rule.points),
                                        rule.points, rule.weights, r["J"], r["Kinv"])
            if ef2.sum() < r["ef2"].sum():
                r["eta"] = np.sqrt(ef2) + r["eo"] + r["bosc"]
                r["ef2"] = ef2
            clock("minimise_flux")
        return _close(r["eta"], r["res_ind"], r["ef2"], r["ea2"], r["eo"], r["bosc"],
                      float(np.sqrt(max(r["energy"].sum(), 0.0))), r["unrouted"],
                      r["n_floating"], r["scale"], r["gap"], problem, disc, u, kappa,
                      exact_gradient, quadrature_degree, clock, t_start)
    m = mesh.n_cells
    pts = np.ascontiguousarray(mesh.points, dtype=np.float64)
    cells = np.ascontiguousarray(mesh.cells)
    area = np.ascontiguousarray(mesh.cell_volumes, dtype=np.float64)
    kscal, ktens = _conductivity_arrays(kappa, m)

    # cell moments of the source and its oscillation
    fmom, osc, fnorm2, gap = _source_moments(problem.source, disc, pts, area, cells,
                                             quadrature_degree)
    clock("source")
    # per cell: K^-1, lambda_min(K), K grad u_h, draw = (f, l_a) - (K grad u_h, grad l_a)_K
    kinv = np.empty((m, 2, 2))
    lam_min = np.empty(m)
    flux_h = np.empty((m, 2))
    draw = np.empty((m, 3))
    h = np.empty(m)
    energy = np.empty(m)
    stiff_abs = np.empty(m)
    _cell_fields(pts, cells, area, kscal, ktens, u, fmom, kinv, lam_min, flux_h, draw, h,
                 energy, stiff_abs)
    energy_norm = float(np.sqrt(max(energy.sum(), 0.0)))
    clock("cells")
    vptr, vcell, vloc = _patches(cells, mesh.n_vertices)
    neighbors = np.empty((m, 3), dtype=np.int64)
    _cell_neighbors(cells, vptr, vcell, neighbors)
    clock("topology")

    # boundary facets: kinds and prescribed outward fluxes
    bkind = np.where(neighbors < 0, _FLUX, _INTERIOR).astype(np.int8)
    gout = np.zeros((m, 3, 3))
    bosc = np.zeros(m)  # sum over flux facets of C_F ||g - Pi_0 g||_F
    bres = np.zeros(m)  # residual estimator: h_F ||g - K grad u_h . n||_F^2
    fcell = np.asarray(mesh.boundary_facet_cells, dtype=np.int64)
    floc = np.asarray(mesh.boundary_facet_local, dtype=np.int64)
    nbf = fcell.size
    dirichlet = np.zeros(nbf, dtype=bool)
    for tag, value in problem.dirichlet.items():
        ids = mesh.tagged_facets(tag)
        dirichlet[ids] = True
        _check_dirichlet(tag, value, disc, mesh, ids)
    bkind[fcell[dirichlet], floc[dirichlet]] = _DIRICHLET
    # g at the Gauss points of every boundary facet (flux into the domain)
    a_loc = (floc + 1) % 3
    b_loc = (floc + 2) % 3
    xa = pts[cells[fcell, a_loc]]
    xb = pts[cells[fcell, b_loc]]
    gq = np.zeros((nbf, _GL_T.size))
    for tag, flux in problem.neumann.items():
        ids = mesh.tagged_facets(tag)
        gq[ids] += _facet_values(flux, ids, xa, xb, f"neumann[{tag!r}]")
    for tag, (alpha, uext) in problem.robin.items():
        ids = mesh.tagged_facets(tag)
        av = _facet_values(alpha, ids, xa, xb, f"robin[{tag!r}] alpha")
        uv = _facet_values(uext, ids, xa, xb, f"robin[{tag!r}] u_ext")
        uh = (1 - _GL_T)[None, :] * u[cells[fcell[ids], a_loc[ids]]][:, None] \
            + _GL_T[None, :] * u[cells[fcell[ids], b_loc[ids]]][:, None]
        gq[ids] += av * (uv - uh)
    flen = np.sqrt(((xb - xa) ** 2).sum(axis=1))
    fl = ~dirichlet
    sel = np.flatnonzero(fl)
    mom_a = flen * (gq * ((1 - _GL_T) * _GL_W)[None, :]).sum(axis=1)
    mom_b = flen * (gq * (_GL_T * _GL_W)[None, :]).sum(axis=1)
    gout[fcell[sel], floc[sel], a_loc[sel]] = -mom_a[sel]
    gout[fcell[sel], floc[sel], b_loc[sel]] = -mom_b[sel]
    gmean = (gq * _GL_W[None, :]).sum(axis=1)
    goscn = np.sqrt(flen * (((gq - gmean[:, None]) ** 2) * _GL_W[None, :]).sum(axis=1))
    c_trace = h[fcell] * np.sqrt(flen / area[fcell] * (1 / math.pi**2 + 1 / math.pi))
    np.add.at(bosc, fcell[sel], (c_trace * goscn / np.sqrt(lam_min[fcell]))[sel])
    nflux = _outward_normal_flux(flux_h[fcell], xa, xb, pts[cells[fcell, floc]])
    resq = flen * (((gq - nflux[:, None]) ** 2) * _GL_W[None, :]).sum(axis=1)
    np.add.at(bres, fcell[sel], (flen * resq / lam_min[fcell])[sel])
    clock("boundary")

    # patch problems
    P = np.empty((m, 3, 3))
    corr = np.empty((m, 3))
    _patch_fluxes(pts, cells, area, kinv, flux_h, vptr, vcell, vloc, draw, bkind, gout, P, corr)
    clock("patches")
    # route the residual taken out of the patches
    amount = np.ascontiguousarray(corr.sum(axis=1))
    T = np.zeros((m, 3))
    parent = np.empty(m, dtype=np.int64)
    order = np.empty(m, dtype=np.int64)
    n_floating = np.zeros(1, dtype=np.int64)
    unrouted = _route(neighbors, bkind, amount, area, T, parent, order, n_floating)
    clock("route")
    # indicators, the residual estimator and the checks of the flux, cell by cell
    eta = np.empty(m)
    parts = np.empty((m, 4))
    dev = np.empty((m, 4))
    _cell_terms(pts, cells, area, kinv, flux_h, P, T, neighbors, lam_min, h, osc, fnorm2, bosc,
                bres, fmom, corr, amount, bkind, gout, eta, parts, dev)
    _check_flux(dev, fmom)
    res_ind = np.ascontiguousarray(parts[:, 3])
    clock("indicators")
    if minimise_flux:
        from .flux_minimisation import minimise_flux_term
        ef2 = _minimised_p1(mesh, pts, cells, P, T, flux_h, kinv, minimise_flux_term)
        if ef2.sum() < parts[:, 0].sum():
            parts[:, 0] = ef2
            eta = np.sqrt(ef2) + parts[:, 2] + bosc
        clock("minimise_flux")

    scale = float(np.abs(fmom).sum() + np.abs(mom_a[sel]).sum() + np.abs(mom_b[sel]).sum()
                  + stiff_abs.sum()) or 1.0
    return _close(eta, res_ind, parts[:, 0], parts[:, 1], parts[:, 2], bosc, energy_norm,
                  unrouted, int(n_floating[0]), scale, gap, problem, disc, u, kappa,
                  exact_gradient, quadrature_degree, clock, t_start)


def _close(eta, res_ind, flux2, alg2, osc, bosc, energy_norm, unrouted, n_floating, scale, gap,
           problem, disc, u, kappa, exact_gradient, quadrature_degree, clock, t_start):
    """The closing step shared by P1 and P_k (P_k also on tetrahedra): the bound from the
    cell indicators, the notes on unrouted residuals and quadrature, the exact error."""
    notes = []
    bound = float(np.sqrt((eta**2).sum()))
    residual = float(np.sqrt((res_ind**2).sum()))
    scale = scale or 1.0
    guaranteed = True
    if n_floating and unrouted > 1e-12 * scale:
        if problem.robin or problem.dirichlet:
            guaranteed = False
            notes.append(
                f"{int(n_floating)} mesh part(s) that no Dirichlet facet reaches keep a "
                f"residual of {unrouted:.3e} (algebraic or quadrature residual of a part "
                "anchored by Robin terms or by a vertex only); the bound holds for the exactly "
                "solved system only: solve with a tighter rtol")
    if gap > 1e-10 * max(scale, 1e-300):
        notes.append(f"source quadrature: two rules differ by {gap:.3e} in the cell integrals "
                     "(a non-polynomial source); raise quadrature_degree if this matters")
    est = ErrorEstimate(
        bound=bound, indicators=eta, residual_estimate=residual, residual_indicators=res_ind,
        terms={"flux": float(np.sqrt(flux2.sum())),
               "oscillation": float(np.sqrt((osc ** 2).sum())),
               "boundary_data": float(np.sqrt((bosc**2).sum())),
               "algebraic": float(np.sqrt(alg2.sum())),
               "unrouted": float(unrouted), "quadrature_gap": float(gap)},
        energy_norm=energy_norm, guaranteed=guaranteed, notes=notes)
    if not (np.isfinite(bound) and np.isfinite(residual)):
        raise InputError("estimate_error: the estimate is not finite (non-finite data or "
                         "solution); check the source and boundary data")
    if exact_gradient is not None:
        from .functionals import energy_error
        err = energy_error(disc, u, exact_gradient, kappa, quadrature_degree=quadrature_degree)
        est.error = err
        est.effectivity = bound / err if err > 0 else math.inf
        est.residual_effectivity = residual / err if err > 0 else math.inf
        clock("exact_error")
    est.seconds = time.perf_counter() - t_start
    est.phase_seconds = clock.phases
    return est


# -- helpers --------------------------------------------------------------------------
def _minimised_p1(mesh, pts, cells, P, T, flux_h, kinv, minimise_flux_term):
    """The flux term of the P1 bound minimised over ``curl phi``, phi in P2: the RT0
    field of outward facet fluxes F_i is ``sum_i F_i (x - x_i) / (2 |K|)``."""
    F = P.sum(axis=1) + T
    rule = simplex_quadrature(2, 4)
    xi = rule.points
    X = pts[cells]  # (m, 3, 2)
    J = np.stack([X[:, 1] - X[:, 0], X[:, 2] - X[:, 0]], axis=2)
    detJ = J[:, 0, 0] * J[:, 1, 1] - J[:, 0, 1] * J[:, 1, 0]
    lam = np.column_stack([1 - xi.sum(axis=1), xi])
    x = np.einsum("ql,clj->cqj", lam, X)
    r = sum(F[:, i, None, None] * (x - X[:, i, None, :]) for i in range(3)) / detJ[:, None, None]
    r = r + flux_h[:, None, :]
    ef2, _ = minimise_flux_term(mesh, 1, r, xi, rule.weights, J, kinv)
    return ef2


def _conductivity_arrays(kappa, m):
    """``(kscal, ktens)`` for :func:`_cell_fields`: a scalar conductivity as ``kscal``
    ((1,) or (m,); ``ktens`` empty), a tensor as ``ktens`` ((1, 2, 2) or (m, 2, 2))."""
    t = tensor_values(kappa, m, 2, "conductivity")
    if t is not None:
        t = np.ascontiguousarray(np.asarray(t, dtype=np.float64).reshape(-1, 2, 2))
        return np.zeros(1), t
    v = scalar_values(kappa, m, "conductivity", positive=True)
    return np.ascontiguousarray(v[:, 0], dtype=np.float64), np.zeros((0, 2, 2))


def _source_moments(source, disc, pts, area, cells, degree):
    """``fmom[c, l] = int_c f l_l``, ``osc[c] = ||f - mean_c f||_c``, ``||f||_c**2`` and
    the largest difference of the cell integrals between rules of ``degree`` and
    ``degree + 2``.  A source constant on each cell (a number, per-cell or per-region
    numbers) has the closed forms ``f |c| / 3``, 0 and ``f**2 |c|``; other sources are
    evaluated at the points of the rule."""
    m = cells.shape[0]
    X = None

    def values(rule):
        nonlocal X
        lam = np.column_stack([1 - rule.points.sum(axis=1), rule.points])  # (nq, 3)
        if np.ndim(source) == 1 and np.shape(source) == (disc.n_dofs,):
            fv = np.asarray(source, dtype=np.float64)[cells] @ lam.T  # (m, nq)
        else:
            nq = rule.n_points

            def points():
                nonlocal X
                if X is None:
                    X = pts[cells]  # (m, 3, 2)
                return np.einsum("ql,clj->jcq", lam, X).reshape(2, -1)

            fv = scalar_values(source, m, "source", points=points, point_shape=(m, nq))
        return np.ascontiguousarray(lam), np.ascontiguousarray(fv, dtype=np.float64)

    rule = simplex_quadrature(2, degree)
    lam, fv = values(rule)
    fmom = np.empty((m, 3))
    osc = np.empty(m)
    fnorm2 = np.empty(m)
    integral = np.empty(m)
    _source_kernel(fv, np.ascontiguousarray(2 * rule.weights), lam, area, fmom, osc, fnorm2,
                   integral)
    gap = 0.0
    if callable(source) or (isinstance(source, RegionCoefficient) and source.has_callable):
        rule2 = simplex_quadrature(2, min(degree + 2, 20) if degree < 20 else degree - 2)
        lam2, fv2 = values(rule2)
        integral2 = np.empty(m)
        _source_kernel(fv2, np.ascontiguousarray(2 * rule2.weights), lam2, area,
                       np.empty((m, 3)), np.empty(m), np.empty(m), integral2)
        gap = float(np.abs(integral2 - integral).sum())
    return fmom, osc, fnorm2, gap


def _facet_values(value, ids, xa, xb, name):
    """Values of boundary data at the Gauss points of the facets ``ids``: (len(ids), nq)."""
    nq = _GL_T.size
    if callable(value):
        x = (xa[ids][:, None, :] * (1 - _GL_T)[None, :, None]
             + xb[ids][:, None, :] * _GL_T[None, :, None])  # (k, nq, 2)
        v = evaluate_callable(value, np.ascontiguousarray(x.reshape(-1, 2).T), name)
        v = np.asarray(v, dtype=np.float64).reshape(len(ids), nq)
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


def _check_dirichlet(tag, value, disc, mesh, ids):
    """Dirichlet data must lie in the discrete space (affine along each facet)."""
    if not callable(value):
        return  # numbers and dof vectors are in the space
    f = mesh.boundary_facets[ids]
    xa, xb = mesh.points[f[:, 0]], mesh.points[f[:, 1]]
    t = np.array([0.0, 0.25, 0.5, 0.75, 1.0])
    x = xa[:, None, :] * (1 - t)[None, :, None] + xb[:, None, :] * t[None, :, None]
    g = np.asarray(evaluate_callable(value, np.ascontiguousarray(x.reshape(-1, 2).T),
                                     f"dirichlet[{tag!r}]"), dtype=np.float64).reshape(len(ids), 5)
    lin = g[:, :1] * (1 - t)[None, :] + g[:, 4:] * t[None, :]
    dev = np.abs(g - lin).max(axis=1)
    tol = 1e-10 * max(float(np.abs(g).max()), 1e-300)
    if (dev > tol).any():
        i = int(np.argmax(dev))
        raise UnsupportedError(
            f"estimate_error: dirichlet[{tag!r}] is not affine along boundary facet "
            f"{int(ids[i])} (deviation {dev[i]:.3e} from its P1 interpolant): Dirichlet data "
            "outside the discrete space add a lifting term that is not implemented. Give the "
            "condition as Neumann data (K du/dn) there, or use data affine per facet")


def _outward_normal_flux(flux, xa, xb, xopp):
    """``flux . n`` on the facet (xa, xb) with n pointing away from xopp."""
    t = xb - xa
    n = np.column_stack([t[:, 1], -t[:, 0]]) / np.sqrt((t**2).sum(axis=1))[:, None]
    sgn = np.sign(((xa - xopp) * n).sum(axis=1))
    return (flux * n).sum(axis=1) * sgn


def _check_flux(dev, fmom):
    """The flux must balance the source cell by cell, be conforming, and meet the
    boundary data (checks of what the compiled kernels returned; ``dev`` from
    :func:`_cell_terms`)."""
    scale = max(float(dev[:, 3].max(initial=0.0)), float(np.abs(fmom).max(initial=0.0)), 1e-300)
    bad = dev[:, :3] > 1e-8 * scale
    if not bad.any():
        return
    if bad[:, 0].any():
        c = int(np.argmax(dev[:, 0]))
        raise RuntimeError(f"estimate_error: the equilibrated flux misses the source on cell "
                           f"{c} by {dev[c, 0]:.3e}; internal error, please report with the mesh")
    if bad[:, 1].any():
        c = int(np.argmax(dev[:, 1]))
        raise RuntimeError(f"estimate_error: the equilibrated flux is not conforming across a "
                           f"facet of cell {c} (jump {dev[c, 1]:.3e}); internal error, please "
                           "report with the mesh")
    c = int(np.argmax(dev[:, 2]))
    raise RuntimeError(f"estimate_error: the equilibrated flux misses the boundary data on a "
                       f"facet of cell {c} by {dev[c, 2]:.3e}; internal error")
