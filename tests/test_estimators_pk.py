"""The guaranteed energy-error bound for P2-P4 on triangles (galerkit.equilibration).

Sources: Prager & Synge (1947) -- an equilibrated flux bounds the energy error from
above; Braess, Pillwein & Schoeberl (2009) and Ern & Vohralik (2015, SIAM J. Numer.
Anal. 53) -- the RT_k vertex-patch construction, effectivities close to 1 and robust in
the degree; Payne & Weinberger (1960) -- the Poincare constant h/pi; Irons & Razzaque
(1972) -- the patch test; Roache (2002) -- manufactured solutions (SymPy); Strang & Fix
(1973) and Kellogg (1974) -- the singular solutions of tests/singular_cases.py; Binev,
Dahmen & DeVore (2004) and Stevenson (2007) -- optimal rates of adaptive refinement.
"""

import numpy as np
import pytest
import sympy as sp

import galerkit as gk

from reference import lambdify, lambdify_gradient
from singular_cases import Kellogg, energy_error_by_green_traces, lshape_flux, lshape_grad, lshape_u

x0, x1 = sp.symbols("x0 x1")


def _sin_problem(n):
    u = sp.sin(sp.pi * x0) * sp.sin(sp.pi * x1)
    f = -(sp.diff(u, x0, 2) + sp.diff(u, x1, 2))
    mesh = gk.structured_triangles(n, n)
    return (gk.PoissonProblem(mesh, source=lambdify(f, 2), dirichlet={"boundary": 0.0}),
            lambdify_gradient(u, 2))


def _green_error(sol, u, flux, kappa=1.0):
    """Energy error by Green's identity (u harmonic in K, flux K du/dn on the boundary)."""
    mesh, disc = sol.mesh, sol.disc
    fc = np.asarray(mesh.boundary_facet_cells)
    fl = np.asarray(mesh.boundary_facet_local)
    cells = mesh.cells
    xa = mesh.points[cells[fc, (fl + 1) % 3]]
    xb = mesh.points[cells[fc, (fl + 2) % 3]]
    V = [np.array([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0]])[j] for j in range(3)]
    uloc = sol.u[disc.cell_dofs[fc]]

    def trace(t):
        out = np.empty((fc.size, t.size))
        for i in range(3):
            sel = fl == i
            ref = (1 - t)[:, None] * V[(i + 1) % 3] + t[:, None] * V[(i + 2) % 3]
            out[sel] = uloc[sel] @ disc.element.tabulate(ref).T
        return out

    zero = lambda x: np.zeros_like(x)  # noqa: E731
    auh = gk.energy_error(disc, sol.u, zero, kappa) ** 2
    return energy_error_by_green_traces(xa, xb, trace, auh, u, flux)


@pytest.mark.parametrize("degree,sizes", [(2, (2, 4, 8, 16)), (3, (2, 4, 8)), (4, (2, 4))])
def test_pk_bound_is_above_the_error_of_a_smooth_solution_with_effectivity_below_1_5(degree, sizes):
    # manufactured solution (Roache 2002, SymPy); Prager & Synge 1947: bound >= error on
    # every level; Ern & Vohralik 2015: effectivities near 1 for every degree
    effs = []
    for n in sizes:
        problem, grad = _sin_problem(n)
        est = gk.estimate_error(problem.solve(degree=degree, rtol=1e-12), exact_gradient=grad)
        assert est.guaranteed and est.bound >= est.error, (degree, n, est)
        effs.append(est.effectivity)
    assert 1.0 < effs[-1] <= 1.5, effs
    assert effs[-1] < effs[0]


def _mixed_problem(n, tensor):
    # Dirichlet on the left (u(0, y) = 1 + y, in the space), Neumann right and bottom,
    # Robin on top; a full SPD tensor or a scalar conductivity (SymPy)
    u = sp.exp(x0) * (1 + x1) + x0**2 * sp.sin(2 * x1)
    K = sp.Matrix([[2, sp.Rational(1, 2)], [sp.Rational(1, 2), 1]]) if tensor else sp.eye(2) * 3
    grad = sp.Matrix([sp.diff(u, x0), sp.diff(u, x1)])
    flux = K * grad
    f = -(sp.diff(flux[0], x0) + sp.diff(flux[1], x1))
    alpha = 2.0
    mesh = gk.structured_triangles(n, n)
    mesh.tag_boundary("w", lambda x: x[0] < 1e-12)
    mesh.tag_boundary("e", lambda x: x[0] > 1 - 1e-12)
    mesh.tag_boundary("s", lambda x: x[1] < 1e-12)
    mesh.tag_boundary("n", lambda x: x[1] > 1 - 1e-12)
    uext = u + flux[1] / alpha  # K du/dn = alpha (u_ext - u) on y = 1
    problem = gk.PoissonProblem(
        mesh, conductivity=np.array(K, dtype=float) if tensor else 3.0, source=lambdify(f, 2),
        dirichlet={"w": lambdify(u, 2)},
        neumann={"e": lambdify(flux[0], 2), "s": lambdify(-flux[1], 2)},
        robin={"n": (alpha, lambdify(uext, 2))})
    return problem, lambdify_gradient(u, 2)


@pytest.mark.parametrize("degree", [2, 3])
@pytest.mark.parametrize("tensor", [False, True])
def test_pk_bound_is_above_the_error_of_a_mixed_condition_problem(degree, tensor):
    # Dirichlet + Neumann + Robin, scalar and tensor conductivity (manufactured, SymPy)
    effs = []
    for n in (2, 4, 8):
        problem, grad = _mixed_problem(n, tensor)
        est = gk.estimate_error(problem.solve(degree=degree, rtol=1e-12), exact_gradient=grad)
        assert est.guaranteed and est.bound >= est.error, (n, est)
        assert est.terms["boundary_data"] > 0
        effs.append(est.effectivity)
    assert effs[-1] <= 1.5, effs


def _lshape(n):
    mesh = gk.l_shaped_triangles(n)
    mesh.tag_boundary("outer", lambda x: (np.abs(np.abs(x[0]) - 1) < 1e-9)
                      | (np.abs(np.abs(x[1]) - 1) < 1e-9))
    mesh.tag_boundary("corner", lambda x: (np.abs(x[0]) < 1e-9) | (np.abs(x[1]) < 1e-9))
    return gk.PoissonProblem(mesh, neumann={"outer": lshape_flux}, dirichlet={"corner": 0.0})


@pytest.mark.parametrize("degree", [2, 3])
def test_pk_bound_is_above_the_error_of_the_lshape_singularity(degree):
    # u = r^(2/3) sin(2 theta/3) (Strang & Fix 1973); the error by Green's identity
    for n in (2, 4, 8):
        sol = _lshape(n).solve(degree=degree, rtol=1e-12)
        est = gk.estimate_error(sol)
        err = _green_error(sol, lshape_u, lshape_flux)
        assert est.guaranteed and est.bound >= err and est.bound / err <= 3.0, \
            (n, est.bound, err)


@pytest.mark.parametrize("R,guess", [(161.4476387975881, 0.1), (1e4, 0.0127)])
def test_pk_bound_is_above_the_error_of_the_kellogg_checkerboard(R, guess):
    # Kellogg 1974: conductivity jump R across the axes; pure Neumann data K du/dn
    case = Kellogg(R, guess)
    for n in (4, 8):
        mesh = gk.structured_triangles(n, n, (-1, -1), (1, 1))
        kap = case.kappa_at(mesh.points[mesh.cells].mean(axis=1).T)
        mesh.tag_boundary("all", lambda x: np.ones(x.shape[1], bool))
        sol = gk.PoissonProblem(mesh, conductivity=kap, neumann={"all": case.flux}).solve(
            degree=2, rtol=1e-12)
        est = gk.estimate_error(sol)
        err = _green_error(sol, case.u, case.flux, kap)
        assert est.guaranteed and est.bound >= err, (n, est.bound, err)


@pytest.mark.parametrize("degree", [2, 3])
def test_pk_patch_test_polynomial_solution_gives_a_zero_bound(degree):
    # Irons & Razzaque 1972: P_k reproduces a u of degree k exactly, so the flux misfit,
    # the oscillation and every residual vanish; Dirichlet left, Neumann elsewhere
    K = np.array([[2.0, 0.3], [0.3, 0.7]])
    us = x0**degree - 2 * x0 * x1**(degree - 1) + x1 + 1
    gr = sp.Matrix([sp.diff(us, x0), sp.diff(us, x1)])
    fl = sp.Matrix(K) * gr
    f = -(sp.diff(fl[0], x0) + sp.diff(fl[1], x1))
    mesh = gk.structured_triangles(4, 3)
    mesh.tag_boundary("w", lambda x: x[0] < 1e-12)
    mesh.tag_boundary("e", lambda x: x[0] > 1 - 1e-12)
    mesh.tag_boundary("s", lambda x: x[1] < 1e-12)
    mesh.tag_boundary("n", lambda x: x[1] > 1 - 1e-12)
    sol = gk.PoissonProblem(
        mesh, conductivity=K, source=lambdify(f, 2), dirichlet={"w": lambdify(us, 2)},
        neumann={"e": lambdify(fl[0], 2), "s": lambdify(-fl[1], 2), "n": lambdify(fl[1], 2)}
    ).solve(degree=degree, method="direct" if "direct" in gk.available_solvers() else "auto",
            rtol=1e-14)
    est = gk.estimate_error(sol)
    scale = est.energy_norm
    assert est.bound < 1e-9 * scale and est.residual_estimate < 1e-8 * scale, est


def test_pk_bound_survives_a_loose_iterative_solve():
    # the residual of an inexact solve is routed to the Dirichlet boundary (Prager &
    # Synge 1947 for the vector actually returned)
    problem, grad = _sin_problem(8)
    tight = gk.estimate_error(problem.solve(degree=2, method="cg", rtol=1e-12),
                              exact_gradient=grad)
    loose = gk.estimate_error(problem.solve(degree=2, method="cg", rtol=1e-2),
                              exact_gradient=grad)
    assert loose.bound >= loose.error
    assert loose.terms["algebraic"] > 100 * tight.terms["algebraic"]


def test_pk_residual_estimator_has_the_element_laplacian():
    # Verfuerth 2013: eta_R^2 = sum h_K^2 ||f + div grad u_h||_K^2 + flux jumps + Neumann
    # misfits.  u_h = x^2 / 2 (P2 reproduces it: it solves -u'' = -1 with its own end
    # values); read against f = 0 its element residual is div grad u_h = 1 on every cell,
    # its gradient (x, 0) has no normal jumps and no flux through y = 0, 1, so on the
    # 2 x 2 square (8 cells, h_K^2 = 1/2, |K| = 1/8) eta_R = sqrt(8 / 16) (closed form)
    mesh = gk.structured_triangles(2, 2)
    mesh.tag_boundary("ends", lambda x: (x[0] < 1e-12) | (x[0] > 1 - 1e-12))
    ends = {"ends": lambda x: x[0] ** 2 / 2}
    sol = gk.PoissonProblem(mesh, source=-1.0, dirichlet=ends).solve(degree=2, rtol=1e-14)
    assert np.allclose(sol.u, sol.disc.dof_points[:, 0] ** 2 / 2, atol=1e-12)
    sol.problem = gk.PoissonProblem(mesh, source=0.0, dirichlet=ends)
    est = gk.estimate_error(sol)
    assert est.residual_estimate == pytest.approx(np.sqrt(0.5), rel=1e-10)
    assert est.bound > 0


@pytest.mark.parametrize("kappa", [(2.0, 7.0), (7.0, 2.0)])
@pytest.mark.parametrize("degree", [1, 2, 3])
def test_pk_residual_estimator_flux_jump_weight_equals_its_closed_form(degree, kappa):
    # Verfuerth 2013; Bernardi & Verfuerth 2000 (Numer. Math. 85) for the weight of a
    # jumping conductivity: each interior edge E adds h_E / kappa_E ||[K grad u_h . n]||_E^2,
    # kappa_E the larger conductivity of its two cells (half on each side).  Two cells
    # meeting on the edge x = 0, 0 <= y <= 1/2 (h_E = 1/2, cell diameters 1.52 and 1.04),
    # conductivities kappa_l | kappa_r, and u_h the interpolant of a harmonic u that P_k
    # reproduces (linear for P1): no element residual, Dirichlet data u on the west
    # facets, exact Neumann data K du/dn on the east ones, so the jump term alone remains,
    # with [K grad u . n] = (kappa_l - kappa_r) du/dx(0, y), integrated here by SymPy.
    kl, kr = kappa
    y = sp.symbols("y")
    us = x0 + 2 * x1 + 1 if degree == 1 else x0**2 - x1**2 + 3 * x0 * x1 + x0
    assert sp.simplify(sp.diff(us, x0, 2) + sp.diff(us, x1, 2)) == 0
    hE = sp.Rational(1, 2)
    jump = (sp.Rational(kl) - sp.Rational(kr)) * sp.diff(us, x0).subs({x0: 0, x1: y})
    expected = float(sp.sqrt(hE / max(sp.Rational(kl), sp.Rational(kr))
                             * sp.integrate(jump**2, (y, 0, hE))))
    mesh = gk.Mesh([[0, 0], [0, 0.5], [-1.5, 0.25], [1.0, 0.2]], [[0, 1, 2], [0, 3, 1]])
    mesh.tag_boundary("west", lambda x: x[0] < -1e-12)
    mesh.tag_boundary("east", lambda x: x[0] > 1e-12)
    grad = lambdify_gradient(us, 2)

    def east_flux(x):  # kappa_r du/dn on the facets (0,0)-(1,0.2) and (1,0.2)-(0,0.5)
        low = np.abs(x[1] - 0.2 * x[0]) < 1e-9
        n = np.where(low, np.array([[0.2], [-1.0]]) / np.hypot(0.2, 1.0),
                     np.array([[0.3], [1.0]]) / np.hypot(0.3, 1.0))
        return kr * (grad(x) * n).sum(axis=0)

    sol = gk.PoissonProblem(mesh, conductivity=np.array([kl, kr]),
                            dirichlet={"west": lambdify(us, 2)},
                            neumann={"east": east_flux}).solve(degree=degree, rtol=1e-14)
    sol.u = sol.disc.interpolate(lambdify(us, 2))
    est = gk.estimate_error(sol)
    assert est.residual_estimate == pytest.approx(expected, rel=1e-10), (expected, est)


def test_pk_bound_is_the_same_bits_for_one_and_two_threads():
    # patch problems per vertex in fixed chunks, cells independent (DEVELOPERS.md)
    import numba

    if numba.config.NUMBA_NUM_THREADS < 2:
        pytest.skip("needs two numba threads")
    problem, _ = _sin_problem(8)
    sol = problem.solve(degree=3)
    saved = numba.get_num_threads()
    try:
        out = []
        for t in (1, 2):
            numba.set_num_threads(t)
            e = gk.estimate_error(sol)
            out.append((e.bound, e.indicators.tobytes(), e.residual_indicators.tobytes()))
    finally:
        numba.set_num_threads(saved)
    assert out[0] == out[1]


@pytest.mark.parametrize("degree", [2, 3])
def test_pk_oscillation_term_equals_its_closed_form(degree):
    # Payne & Weinberger 1960: h_K / pi ||f - Pi_k f||_K with Pi_k the L2 projection onto
    # P_k; on the two triangles of the unit square (h = sqrt 2 on both) the projection of
    # f = x^(k+1) + x y^k by exact rational integrals in SymPy (an independent construction)
    X, Y = sp.symbols("X Y")
    f = X ** (degree + 1) + X * Y**degree
    basis = [X**a * Y**b for d in range(degree + 1) for a in range(d + 1) for b in [d - a]]
    total = 0
    for lo, hi in ((0, 1 - X), (1 - X, 1)):  # below and above the diagonal x + y = 1

        def integral(g):
            return sp.integrate(sp.integrate(g, (Y, lo, hi)), (X, 0, 1))

        G = sp.Matrix([[integral(p * q) for q in basis] for p in basis])
        c = G.LUsolve(sp.Matrix([integral(f * p) for p in basis]))
        proj = sum(ci * p for ci, p in zip(c, basis))
        total += integral(sp.expand((f - proj) ** 2))
    osc = float(sp.sqrt(total))
    mesh = gk.Mesh([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0], [1.0, 1.0]], [[0, 1, 2], [1, 3, 2]])
    sol = gk.PoissonProblem(mesh, source=lambdify(f.subs({X: x0, Y: x1}), 2),
                            dirichlet={"boundary": 0.0}).solve(degree=degree)
    est = gk.estimate_error(sol)
    assert est.terms["oscillation"] == pytest.approx(np.sqrt(2) / np.pi * osc, rel=1e-9)


def _rate(n, b, last):
    """Least-squares slope of log b against log n over the last ``last`` points."""
    return float(np.polyfit(np.log(n[-last:]), np.log(b[-last:]), 1)[0])


@pytest.mark.slow
def test_pk_adaptive_p2_on_the_lshape_reaches_the_optimal_rate_and_uniform_stays_at_one_third():
    # Binev, Dahmen & DeVore 2004; Stevenson 2007: Doerfler marking with newest-vertex
    # bisection reaches the best rate N^(-k/2) = N^(-1) for P2 despite the corner singularity
    # r^(2/3) (Strang & Fix 1973), where uniform refinement gives h^(2/3) = N^(-1/3)
    run = gk.adapt(_lshape(2), degree=2, max_dofs=15000, max_levels=60)
    n = np.array(run.table.column("n_dofs"), float)
    b = np.array(run.table.column("bound"))
    assert abs(_rate(n, b, 6) + 1.0) < 0.05, _rate(n, b, 6)
    sizes, bounds = [], []
    for cells in (4, 8, 16, 32):
        sol = _lshape(cells).solve(degree=2)
        sizes.append(sol.disc.n_dofs)
        bounds.append(gk.estimate_error(sol).bound)
    rate = _rate(np.array(sizes, float), np.array(bounds), 3)
    assert abs(rate + 1 / 3) < 0.05, rate


def _kellogg(case, n=4):
    mesh = gk.structured_triangles(n, n, (-1, -1), (1, 1))
    mesh.set_regions(lambda x: (x[0] * x[1] > 0).astype(int), ["one", "R"])
    mesh.tag_boundary("all", lambda x: np.ones(x.shape[1], bool))
    return gk.PoissonProblem(mesh, conductivity={"one": 1.0, "R": case.R},
                             neumann={"all": case.flux})


@pytest.mark.parametrize("degree", [1, 2])
def test_pk_minimised_flux_stays_above_the_error_and_below_the_patch_flux(degree):
    # Prager & Synge 1947: sigma_h + curl phi is equilibrated for every phi in P_(k+1)
    # vanishing on the boundary, so the minimised bound is still above the error (by
    # Green's identity, Kellogg 1974 at R = 1e4) and never above the patch bound; on the
    # smooth Dirichlet problem (manufactured, SymPy) too
    case = Kellogg(1e4, 0.0127)
    sol = _kellogg(case, 8).solve(degree=degree, rtol=1e-12)
    patch = gk.estimate_error(sol)
    low = gk.estimate_error(sol, minimise_flux=True)
    kap = np.where(sol.mesh.regions == sol.mesh.region_names["R"], case.R, 1.0)
    err = _green_error(sol, case.u, case.flux, kap)
    assert low.guaranteed and err <= low.bound < 0.9 * patch.bound, (err, low.bound, patch.bound)
    assert np.sqrt((low.indicators**2).sum()) == pytest.approx(low.bound, rel=1e-12)
    problem, grad = _sin_problem(8)
    sol = problem.solve(degree=degree, rtol=1e-12)
    a = gk.estimate_error(sol, exact_gradient=grad)
    b = gk.estimate_error(sol, exact_gradient=grad, minimise_flux=True)
    assert a.error <= b.bound <= a.bound, (a, b)


@pytest.mark.parametrize("degree", [1, pytest.param(2, marks=pytest.mark.slow)])
def test_pk_minimised_flux_meets_effectivity_3_on_the_adaptive_kellogg_checkerboard(degree):
    # Kellogg 1974 at R = 1e4 (gamma = 0.0127): the vertex-patch flux stays 5-8 times the
    # error over hundreds of adaptive levels (the cross point is not quasi-monotone,
    # Petzoldt 2002); minimised over curl phi it falls below 3 once the mesh is graded
    # (docs/error-bounds-and-adaptivity.md); the bound stays above the error throughout
    case = Kellogg(1e4, 0.0127)
    run = gk.adapt(_kellogg(case), degree=degree, max_dofs=8000, max_levels=28,
                   rtol=1e-12, minimise_flux=True)
    effs = []
    for sol, est in zip(run.solutions, run.estimates):
        m = sol.mesh
        kap = np.where(m.regions == m.region_names["R"], case.R, 1.0)
        err = _green_error(sol, case.u, case.flux, kap)
        assert est.guaranteed and est.bound >= err, (m.n_cells, est.bound, err)
        effs.append(est.bound / err)
    assert effs[-1] <= 3.0, effs[::10]
