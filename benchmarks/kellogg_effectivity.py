"""Effectivity of the guaranteed bound on Kellogg's checkerboard, term by term.

Kellogg (1974), in the parametrisation of Morin, Nochetto & Siebert (2000): on
(-1, 1)^2, conductivity R in the first and third quadrants and 1 in the others,
u = r^gamma mu(theta) with div(K grad u) = 0, pure Neumann data K du/dn
(tests/singular_cases.py).  R = 161.45 gives gamma = 0.1, R = 1e4 gamma = 0.0127.
The error is ||K^(1/2) grad(u - u_h)|| by Green's identity (no quadrature at the
singular point).  For every mesh the script prints the bound's terms over the error
(flux, oscillation, boundary data, algebraic), the share of the flux term on the cells
that touch the cross point, and ``best``: the smallest Prager-Synge value any
equilibrated flux of the same space RT_k on the same mesh can give,
min ||K^(-1/2)(sigma + K grad u_h)|| over sigma in RT_k with the same divergence and
boundary data, over the error.  The minimiser is sigma_h + curl phi with phi in the
continuous P_(k+1) functions vanishing on the boundary (the divergence-free RT_k
fields with zero normal trace on a simply connected domain; Brezzi & Fortin 1991),
one Poisson solve with conductivity 1/kappa, so ``best`` is the mixed method's
hypercircle (Prager & Synge 1947): no vertex-patch construction of RT_k can go below
it.  To read sigma_h the script wraps the estimator's last kernel (measurement only).

    .venv/bin/python benchmarks/kellogg_effectivity.py                 # uniform
    .venv/bin/python benchmarks/kellogg_effectivity.py --adaptive 460 --every 50 --R 1e4 --best
"""

import argparse
import sys
from pathlib import Path

import numpy as np
import scipy.sparse.linalg as spla

import galerkit as gk
import galerkit.equilibration as _eq
import galerkit.estimators as _est
from galerkit.quadrature import simplex_quadrature

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from singular_cases import Kellogg, energy_error_by_green, energy_error_by_green_traces  # noqa: E402

GUESS = {161.4476387975881: 0.1, 1e4: 0.0127}
_seen = {}
_p1_terms, _pk_energy = _est._cell_terms, _eq._cell_energy


def _p1_wrap(points, cells, area, kinv, flux_h, P, T, *rest):
    _seen.update(F=P.sum(axis=1) + T)
    return _p1_terms(points, cells, area, kinv, flux_h, P, T, *rest)


def _pk_wrap(J, Kt, Kinv, detJ, uloc, dphi, w, tau, X, T, rt0, *rest):
    _seen.update(S=X.sum(axis=1) + T @ rt0)
    return _pk_energy(J, Kt, Kinv, detJ, uloc, dphi, w, tau, X, T, rt0, *rest)


_est._cell_terms, _eq._cell_energy = _p1_wrap, _pk_wrap


def problem(case, n):
    mesh = gk.structured_triangles(n, n, (-1, -1), (1, 1))
    mesh.set_regions(lambda x: (x[0] * x[1] > 0).astype(int), ["one", "R"])
    mesh.tag_boundary("all", lambda x: np.ones(x.shape[1], bool))
    return gk.PoissonProblem(mesh, conductivity={"one": 1.0, "R": case.R},
                             neumann={"all": case.flux})


def kappa_of(mesh, case):
    return np.where(mesh.regions == mesh.region_names["R"], case.R, 1.0)


def green_error(sol, case):
    mesh, disc = sol.mesh, sol.disc
    kap = kappa_of(mesh, case)
    if disc.degree == 1:
        return energy_error_by_green(mesh.points, mesh.cells, mesh.boundary_facets, kap, sol.u,
                                     case.u, case.flux)
    fc = np.asarray(mesh.boundary_facet_cells)
    fl = np.asarray(mesh.boundary_facet_local)
    xa = mesh.points[mesh.cells[fc, (fl + 1) % 3]]
    xb = mesh.points[mesh.cells[fc, (fl + 2) % 3]]
    V = np.array([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0]])
    uloc = sol.u[disc.cell_dofs[fc]]

    def trace(t):
        out = np.empty((fc.size, t.size))
        for i in range(3):
            sel = fl == i
            ref = (1 - t)[:, None] * V[(i + 1) % 3] + t[:, None] * V[(i + 2) % 3]
            out[sel] = uloc[sel] @ disc.element.tabulate(ref).T
        return out

    auh = gk.energy_error(disc, sol.u, lambda x: np.zeros_like(x), kap) ** 2
    return energy_error_by_green_traces(xa, xb, trace, auh, case.u, case.flux)


def best_flux(sol, kap):
    """(flux term of sigma_h, per-cell squares, min over sigma_h + curl phi)."""
    mesh, disc = sol.mesh, sol.disc
    k = disc.degree
    rule = simplex_quadrature(2, 2 * k + 4)
    xi, w = rule.points, rule.weights
    P = mesh.points[mesh.cells]
    J = np.stack([P[:, 1] - P[:, 0], P[:, 2] - P[:, 0]], axis=2)
    detJ = np.linalg.det(J)
    Jinv = np.linalg.inv(J)
    gref = np.einsum("cb,qbr->cqr", sol.u[disc.cell_dofs], disc.element.tabulate_gradients(xi))
    r = kap[:, None, None] * np.einsum("cqr,crs->cqs", gref, Jinv)  # K grad u_h
    if k == 1:
        x = np.einsum("ql,clj->cqj", np.column_stack([1 - xi.sum(1), xi]), P)
        r += sum(_seen["F"][:, i, None, None] * (x - P[:, i, None, :]) for i in range(3)) \
            / detJ[:, None, None]
    else:
        tau, _ = _eq._rt_values(k, xi)
        r += np.einsum("crs,cqs->cqr", J, np.einsum("ci,iqr->cqr", _seen["S"], tau)) \
            / detJ[:, None, None]
    wk = detJ[:, None] * w[None, :] / kap[:, None]
    per = (wk * (r**2).sum(2)).sum(1)
    sd = gk.Discretization(mesh, degree=k + 1)
    A = gk.Assembler(sd).stiffness(1.0 / kap).tocsr()
    dchi = np.einsum("qbr,crs->cqbs", sd.element.tabulate_gradients(xi), Jinv)
    curl = np.stack([dchi[..., 1], -dchi[..., 0]], axis=-1)
    b = np.zeros(sd.n_dofs)
    np.add.at(b, sd.cell_dofs, -np.einsum("cq,cqj,cqbj->cb", wk, r, curl))
    free = np.setdiff1d(np.arange(sd.n_dofs), sd.boundary_dofs())
    phi = np.zeros(sd.n_dofs)
    phi[free] = spla.spsolve(A[free][:, free].tocsc(), b[free])
    rr = r + np.einsum("cb,cqbj->cqj", phi[sd.cell_dofs], curl)
    return float(np.sqrt(per.sum())), per, float(np.sqrt((wk * (rr**2).sum(2)).sum()))


def row(sol, est, case, best=True):
    err = green_error(sol, case)
    mesh = sol.mesh
    out = {"dofs": sol.disc.n_dofs, "h_min": float(_est.cell_diameters(mesh).min()),
           "error": err, "bound": est.bound, "eff": est.bound / err}
    for t in ("flux", "oscillation", "boundary_data", "algebraic"):
        out[t] = est.terms[t] / err
    if best:
        gk.estimate_error(sol)  # again: the wrapped kernel keeps the last flux it saw
        flux, per, low = best_flux(sol, kappa_of(mesh, case))
        assert abs(flux - est.terms["flux"]) <= 1e-8 * flux, (flux, est.terms["flux"])
        at0 = (np.abs(mesh.points[mesh.cells]).sum(axis=2) < 1e-300).any(axis=1)
        out["cross_share"] = float(per[at0].sum() / per.sum())
        out["best"] = low / err
    return out


def print_rows(rows):
    keys = list(rows[0])
    print("| " + " | ".join(keys) + " |")
    print("|" + "---|" * len(keys))
    for r in rows:
        print("| " + " | ".join(f"{r[k]:.3g}" if isinstance(r[k], float) else str(r[k])
                                for k in keys) + " |", flush=True)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--R", type=float, nargs="*", default=[161.4476387975881, 1e4])
    ap.add_argument("--degrees", type=int, nargs="*", default=[1, 2])
    ap.add_argument("--sizes", type=int, nargs="*", default=[4, 8, 16, 32])
    ap.add_argument("--adaptive", type=int, default=0, help="levels of gk.adapt (0: uniform)")
    ap.add_argument("--every", type=int, default=10)
    ap.add_argument("--max-dofs", type=int, default=40000)
    ap.add_argument("--best", action="store_true", help="the 'best' column on adaptive levels")
    args = ap.parse_args(argv)
    for R in args.R:
        case = Kellogg(R, GUESS.get(R, 0.1))
        for k in args.degrees:
            print(f"\nR = {R:g} (gamma = {case.gamma:.4g}), P{k}, "
                  + (f"adaptive, {args.adaptive} levels" if args.adaptive else "uniform"))
            rows = []
            if args.adaptive:
                run = gk.adapt(problem(case, 4), degree=k, max_dofs=args.max_dofs,
                               max_levels=args.adaptive, rtol=1e-12)
                last = len(run.solutions) - 1
                for i, (sol, est) in enumerate(zip(run.solutions, run.estimates)):
                    if i % args.every == 0 or i == last:
                        rows.append({"level": i, **row(sol, est, case, best=args.best)})
            else:
                for n in args.sizes:
                    sol = problem(case, n).solve(degree=k, rtol=1e-12)
                    rows.append({"n": n, **row(sol, gk.estimate_error(sol), case)})
            print_rows(rows)
    return 0


if __name__ == "__main__":
    sys.exit(main())
