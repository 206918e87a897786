"""The guaranteed energy-error bound and the residual estimator on tetrahedra.

Sources: Prager & Synge (1947) -- an equilibrated flux bounds the energy error
from above; Braess & Schoeberl (2008), Ern & Vohralik (2015) -- the vertex-patch
construction and effectivities near 1 on smooth problems; Payne & Weinberger
(1960) -- the Poincare constant h/pi of convex cells; Stroud (1971) -- exact
simplex integrals for the closed forms; Irons & Razzaque (1972) -- the patch
test; Roache (2002) -- manufactured solutions (SymPy derivatives); Verfuerth
(2013) -- the residual estimator.  The true energy error is the independent
quantity (galerkit's energy_error against the SymPy gradient, a check of its
own in tests/test_functionals_exact.py).
"""

import numba
import numpy as np
import pytest
import sympy as sp

import galerkit as gk
from galerkit.errors import UnsupportedError

from reference import X, lambdify, lambdify_gradient

PI = np.pi
x0, x1, x2 = X


def _sin_problem(n):
    u = sp.sin(sp.pi * x0) * sp.sin(sp.pi * x1) * sp.sin(sp.pi * x2)
    f = -sum(sp.diff(u, v, 2) for v in X)
    return (gk.PoissonProblem(gk.structured_tetrahedra(n, n, n), source=lambdify(f, 3),
                              dirichlet={"boundary": 0.0}), lambdify_gradient(u, 3))


def test_bound_is_above_the_error_of_a_smooth_solution_in_3d_with_effectivity_below_1_5():
    # manufactured solution (Roache 2002); Prager & Synge 1947: bound >= error.
    # Measured: effectivity 1.86, 1.48, 1.30 (n = 2, 4, 8), 1.24 at n = 12; the residual
    # estimator's effectivity stays at 6.2-6.5
    effs, reffs = [], []
    for n in (2, 4, 8):
        problem, grad = _sin_problem(n)
        est = gk.estimate_error(problem.solve(), exact_gradient=grad)
        assert est.guaranteed and est.bound >= est.error, (n, est)
        effs.append(est.effectivity)
        reffs.append(est.residual_effectivity)
    assert effs[-1] <= 1.5 and 1.0 < effs[-1] < effs[1] < effs[0], effs
    assert max(reffs) / min(reffs) < 1.2 and 1 < min(reffs), reffs


def _mixed_problem(n, kind):
    # Dirichlet on x = 0 (u there is 1 + y + z, affine), Neumann on x = 1 and y = 0,
    # Robin on the other three sides; scalar, tensor or per-region conductivity
    u = sp.exp(x0) * (1 + x1 + x2) + x0**2 * sp.sin(2 * x1) * sp.cos(x2)
    if kind == "tensor":
        K = sp.Matrix([[2, sp.Rational(1, 2), 0], [sp.Rational(1, 2), 1, sp.Rational(1, 4)],
                       [0, sp.Rational(1, 4), sp.Rational(3, 2)]])
    else:
        K = sp.eye(3) * 3
    grad = sp.Matrix([sp.diff(u, v) for v in X])
    flux = K * grad
    f = -sum(sp.diff(flux[i], X[i]) for i in range(3))
    alpha = 2.0
    mesh = gk.structured_tetrahedra(n, n, n)
    if kind == "regions":
        mesh.set_regions(lambda x: (x[2] > 0.5).astype(int), ["low", "high"])
        kappa = {"low": 3.0, "high": 3.0}
    else:
        kappa = np.array(K, dtype=float) if kind == "tensor" else 3.0
    robin = {}
    for side, normal in (("xmax", None), ("ymin", None), ("ymax", (1, 1)), ("zmin", (2, -1)),
                         ("zmax", (2, 1))):
        if normal is not None:
            i, s = normal
            robin[side] = (alpha, lambdify(u + s * flux[i] / alpha, 3))
    problem = gk.PoissonProblem(
        mesh, conductivity=kappa, source=lambdify(f, 3), dirichlet={"xmin": lambdify(u, 3)},
        neumann={"xmax": lambdify(flux[0], 3), "ymin": lambdify(-flux[1], 3)}, robin=robin)
    return problem, lambdify_gradient(u, 3)


@pytest.mark.parametrize("kind", ["scalar", "tensor", "regions"])
def test_bound_is_above_the_error_of_a_mixed_condition_problem_in_3d(kind):
    # Dirichlet + Neumann + Robin (manufactured, SymPy).  Measured effectivities, n = 2, 4, 8:
    # scalar and regions 2.09, 1.64, 1.43; tensor 2.79, 2.01, 1.64 (the boundary-data term,
    # O(h^(3/2)), is large on coarse meshes)
    effs = []
    for n in (2, 4):
        problem, grad = _mixed_problem(n, kind)
        est = gk.estimate_error(problem.solve(), exact_gradient=grad)
        assert est.guaranteed and est.bound >= est.error, (n, est)
        assert est.terms["boundary_data"] > 0
        effs.append(est.effectivity)
    assert effs[1] < effs[0] < 3.0, effs


@pytest.mark.parametrize("kind", ["tensor", "refined"])
def test_null_space_patch_solve_equals_the_mixed_system(kind, monkeypatch):
    # The patch flux is the minimiser of a convex quadratic under the divergence
    # constraint: the spanning-tree / cycle (null-space) solve and the dense LU of the
    # mixed (KKT) system must give the same minimiser (Braess & Schoeberl 2008).  Mixed
    # conditions (Dirichlet, Neumann, Robin faces in the patches), and a locally bisected
    # mesh (irregular patches, from 14 to 60+ cells)
    import galerkit.estimators3d as e3
    problem, _ = _mixed_problem(4, "tensor")
    if kind == "refined":
        mesh = problem.mesh
        for _ in range(3):
            x = mesh.points[mesh.cells].mean(axis=1)
            mesh = gk.refine_marked(mesh, np.flatnonzero(np.linalg.norm(x, axis=1) < 0.4))
        problem = gk.PoissonProblem(mesh, conductivity=problem.conductivity,
                                    source=problem.source, dirichlet=problem.dirichlet,
                                    neumann=problem.neumann, robin=problem.robin)
    sol = problem.solve(rtol=1e-12)
    a = gk.estimate_error(sol)
    monkeypatch.setattr(e3, "_FORCE_MIXED", True)
    b = gk.estimate_error(sol)
    assert a.bound == pytest.approx(b.bound, rel=1e-11)
    assert np.allclose(a.indicators, b.indicators, rtol=1e-9, atol=1e-12 * b.indicators.max())
    assert a.terms["flux"] > 0.5 * a.bound


def test_bound_survives_a_loose_iterative_solve_in_3d():
    # the residual of an inexact solve is routed to the Dirichlet boundary, so the bound
    # stays above the error of the vector actually returned (Prager & Synge 1947)
    problem, grad = _sin_problem(6)
    tight = gk.estimate_error(problem.solve(method="cg", rtol=1e-12), exact_gradient=grad)
    loose = gk.estimate_error(problem.solve(method="cg", rtol=1e-2), exact_gradient=grad)
    assert loose.guaranteed and loose.bound >= loose.error
    # (the tight solve keeps the small residual of the solver's load quadrature)
    assert loose.terms["algebraic"] > 10 * tight.terms["algebraic"]


def test_patch_test_linear_solution_gives_a_zero_bound_in_3d():
    # Irons & Razzaque 1972: P1 reproduces a linear u; Dirichlet on x = 0, Neumann
    # elsewhere, full SPD tensor: error, flux misfit and every residual vanish
    K = np.array([[2.0, 0.3, 0.1], [0.3, 0.7, 0.0], [0.1, 0.0, 1.2]])
    g = np.array([1.5, -0.5, 0.8])
    mesh = gk.structured_tetrahedra(3, 2, 2)
    q = K @ g
    neumann = {}
    for side, (i, s) in {"xmax": (0, 1), "ymin": (1, -1), "ymax": (1, 1), "zmin": (2, -1),
                         "zmax": (2, 1)}.items():
        neumann[side] = float(s * q[i])
    problem = gk.PoissonProblem(mesh, conductivity=K, dirichlet={"xmin": lambda x: 1 + g @ x},
                                neumann=neumann)
    est = gk.estimate_error(problem.solve(rtol=1e-13))
    assert est.bound < 1e-8 and est.residual_estimate < 1e-8, est


def test_oscillation_terms_equal_their_closed_forms_in_3d():
    # f = 3x + y - 2z linear: on each cell ||f - mean f||^2 = |K|/20 (sum f_i^2 - (sum f_i)^2/4)
    # (Stroud 1971), times (h_K/pi)^2 / kappa (Payne & Weinberger 1960).  Neumann g = y + z on
    # x = 1: ||g - mean g||_F^2 = |F|/12 (sum g_i^2 - (sum g_i)^2/3), times
    # C_F^2 = h_K^2 |F| / |K| (1/pi^2 + 2/(3 pi)) / kappa
    kappa = 2.5
    mesh = gk.structured_tetrahedra(2, 2, 1)
    problem = gk.PoissonProblem(mesh, conductivity=kappa,
                                source=lambda x: 3 * x[0] + x[1] - 2 * x[2],
                                dirichlet={"xmin": 0.0}, neumann={"xmax": lambda x: x[1] + x[2]})
    est = gk.estimate_error(problem.solve())
    P = mesh.points[mesh.cells]
    vol = np.abs(np.linalg.det(np.stack([P[:, i] - P[:, 0] for i in (1, 2, 3)], axis=1))) / 6
    h = np.max([np.linalg.norm(P[:, i] - P[:, j], axis=1)
                for i in range(4) for j in range(i + 1, 4)], axis=0)
    fv = P @ np.array([3.0, 1.0, -2.0])
    var = vol / 20 * ((fv**2).sum(axis=1) - fv.sum(axis=1) ** 2 / 4)
    assert est.terms["oscillation"] == pytest.approx(np.sqrt(((h / PI) ** 2 * var / kappa).sum()),
                                                     rel=1e-10)
    ids = mesh.facet_groups["xmax"]
    F = mesh.points[mesh.boundary_facets[ids]]
    area = 0.5 * np.linalg.norm(np.cross(F[:, 1] - F[:, 0], F[:, 2] - F[:, 0]), axis=1)
    gv = F[:, :, 1] + F[:, :, 2]
    gvar = area / 12 * ((gv**2).sum(axis=1) - gv.sum(axis=1) ** 2 / 3)
    c = mesh.boundary_facet_cells[ids]
    c2 = h[c] ** 2 * area / vol[c] * (1 / PI**2 + 2 / (3 * PI)) / kappa
    assert est.terms["boundary_data"] == pytest.approx(np.sqrt((c2 * gvar).sum()), rel=1e-10)


def test_residual_estimator_equals_its_closed_form_on_one_cube_in_3d():
    # Verfuerth 2013: eta^2 = sum h_K^2 ||f||^2 + (h_F / 2) ||[du/dn]||^2 on each side of an
    # interior face + h_F ||g - du/dn||^2 on Neumann faces.  One Kuhn cube (6 cells), f = 1,
    # u = 0 on x = 0, y = 0, z = 0, insulated elsewhere: the one free vertex (1, 1, 1);
    # everything below from the vertex coordinates by NumPy (closed-form P1 element
    # matrices: stiffness |K| grad l_i . grad l_j, load |K| / 4; Hughes 2000)
    mesh = gk.structured_tetrahedra(1, 1, 1)
    top = int(np.argmax(mesh.points.sum(axis=1)))
    sol = gk.PoissonProblem(mesh, source=1.0, dirichlet={"xmin": 0.0, "ymin": 0.0,
                                                          "zmin": 0.0}).solve()
    P = mesh.points[mesh.cells]
    J = np.stack([P[:, i] - P[:, 0] for i in (1, 2, 3)], axis=2)
    vol = np.abs(np.linalg.det(J)) / 6
    G = np.linalg.inv(J)
    G = np.concatenate([-G.sum(axis=1, keepdims=True), G], axis=1)  # (6, 4, 3)
    loc = np.argmax(mesh.cells == top, axis=1)
    gt = G[np.arange(6), loc]  # grad of the hat function of the free vertex
    A = (vol * (gt**2).sum(axis=1)).sum()
    ut = vol.sum() / 4 / A
    assert sol.u[top] == pytest.approx(ut, rel=1e-12)
    grad = ut * gt  # grad u_h per cell
    eta2 = sum(np.sqrt(3) ** 2 * vol)  # h_K = sqrt(3), ||1||^2 = |K|
    faces = {}
    for c in range(6):
        for i in range(4):
            f = tuple(sorted(np.delete(mesh.cells[c], i)))
            faces.setdefault(f, []).append(c)
    for f, cs in faces.items():
        x = mesh.points[list(f)]
        nrm = np.cross(x[1] - x[0], x[2] - x[0])
        area = 0.5 * np.linalg.norm(nrm)
        nrm /= np.linalg.norm(nrm)
        hF = max(np.linalg.norm(x[a] - x[b]) for a in range(3) for b in range(a + 1, 3))
        if len(cs) == 2:
            jump = (grad[cs[0]] - grad[cs[1]]) @ nrm
            eta2 += 2 * hF / 2 * jump**2 * area
        elif not (np.abs(x) < 1e-12).all(axis=0).any():  # insulated faces: g = 0
            eta2 += hF * (grad[cs[0]] @ nrm) ** 2 * area
    est = gk.estimate_error(sol)
    assert est.residual_estimate == pytest.approx(np.sqrt(eta2), rel=1e-12)


def test_indicators_are_per_cell_and_the_same_for_one_and_two_threads():
    problem, _ = _sin_problem(4)
    sol = problem.solve()
    before = numba.get_num_threads()
    try:
        numba.set_num_threads(1)
        a = gk.estimate_error(sol)
        numba.set_num_threads(min(2, numba.config.NUMBA_NUM_THREADS))
        b = gk.estimate_error(sol)
    finally:
        numba.set_num_threads(before)
    assert np.array_equal(a.indicators, b.indicators)
    assert a.indicators.shape == (sol.mesh.n_cells,)
    assert np.sqrt((a.indicators**2).sum()) == pytest.approx(a.bound, rel=1e-14)


def test_dirichlet_data_not_affine_on_a_face_is_named_in_3d():
    mesh = gk.structured_tetrahedra(2, 2, 2)
    with pytest.raises(UnsupportedError, match="not affine"):
        gk.estimate_error(gk.PoissonProblem(mesh, dirichlet={"boundary": lambda x: x[0] * x[1]})
                          .solve())


def test_raviart_thomas_mass_and_misfit_equal_a_collapsed_gauss_rule():
    # phi_i = (x - x_i) / (3 |T|) (unit outward flux through face i); int phi_i . A phi_j
    # and ||A^(1/2) (sum F_i phi_i + q)||^2 against a 6^3-point collapsed Gauss-Legendre
    # rule on the tetrahedron (Duffy map; Stroud 1971), exact for these quadratics
    from galerkit.estimators3d import _rt_mass, _rt_misfit_cell
    rng = np.random.default_rng(5)
    X = np.array([[0.1, 0.0, 0.2], [1.3, 0.2, 0.1], [0.2, 0.9, 0.3], [0.4, 0.3, 1.1]])
    B = rng.standard_normal((3, 3))
    A = B @ B.T + np.eye(3)
    vol = abs(np.linalg.det((X[1:] - X[0]).T)) / 6
    t, w = np.polynomial.legendre.leggauss(6)
    t, w = 0.5 * (t + 1), 0.5 * w
    a, b, c = np.meshgrid(t, t, t, indexing="ij")
    l1 = a.ravel()
    l2 = (b * (1 - a)).ravel()
    l3 = (c * (1 - a) * (1 - b)).ravel()
    wq = (w[:, None, None] * w[None, :, None] * w[None, None, :]
          * ((1 - a) ** 2 * (1 - b))).ravel()  # sums to 1/6
    lam = np.column_stack([1 - l1 - l2 - l3, l1, l2, l3])
    x = lam @ X  # (nq, 3)
    phi = (x[None, :, :] - X[:, None, :]) / (3 * vol)  # (4, nq, 3)
    M = 6 * vol * np.einsum("q,iqa,ab,jqb->ij", wq, phi, A, phi)
    assert np.allclose(_rt_mass(X[None], np.array([vol]), A[None])[0], M, rtol=1e-12)
    F = rng.standard_normal(4)
    q = rng.standard_normal(3)
    wv = np.einsum("i,iqa->qa", F, phi) + q
    ref = 6 * vol * np.einsum("q,qa,ab,qb->", wq, wv, A, wv)
    got = _rt_misfit_cell(X, vol, F, q, A, np.empty((4, 3)))
    assert got == pytest.approx(ref, rel=1e-12)
    # unit outward flux: the flux of phi_0 through face 0 is 1, through the others 0
    for i in range(4):
        f = [k for k in range(4) if k != i]
        nrm = np.cross(X[f[1]] - X[f[0]], X[f[2]] - X[f[0]]) / 2
        nrm *= np.sign(nrm @ (X[f[0]] - X[i]))
        assert (X[f].mean(axis=0) - X[0]) / (3 * vol) @ nrm == pytest.approx(float(i == 0))


@pytest.mark.parametrize("fault", ["divergence", "conformity"])
def test_a_flux_that_is_not_equilibrated_is_refused_naming_the_cell(monkeypatch, fault):
    # common practice: the estimator checks what its compiled kernels returned; a flux
    # that misses the source on a cell, or whose two sides of a face disagree, must stop
    # the estimate (an unequilibrated flux bounds nothing, Prager & Synge 1947)
    import galerkit.estimators3d as e3
    problem = gk.PoissonProblem(gk.structured_tetrahedra(3, 3, 3), source=1.0,
                                dirichlet={"boundary": 0.0})
    sol = problem.solve()
    route = e3._route
    cell = 40

    def broken(neighbors, bkind, amount, vol, T, *rest):
        out = route(neighbors, bkind, amount, vol, T, *rest)
        inner = np.flatnonzero(neighbors[cell] >= 0)
        T[cell, inner[0]] += 1e-3
        if fault == "conformity":  # the cell's total stays: only the faces disagree
            T[cell, inner[1]] -= 1e-3
        return out

    monkeypatch.setattr(e3, "_route", broken)
    text = (f"misses the source on cell {cell} " if fault == "divergence" else
            rf"is not conforming across the face between cells (\d+ and {cell}|{cell} and \d+) ")
    with pytest.raises(RuntimeError, match=text):
        gk.estimate_error(sol)
