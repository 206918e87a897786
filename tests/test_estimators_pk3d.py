"""The guaranteed energy-error bound for P2-P4 on tetrahedra (galerkit.equilibration3d).

Sources: Prager & Synge (1947) -- an equilibrated flux bounds the energy error from
above; Braess, Pillwein & Schoeberl (2009) and Ern & Vohralik (2015, SIAM J. Numer.
Anal. 53) -- the RT_k vertex-patch construction, effectivities close to 1; Raviart &
Thomas (1977) and Nedelec (1980) -- RT_k = P_k^3 + x P~_k, dimension
(k+1)(k+2)(k+4)/2, unisolvent for face moments against P_k and interior moments
against P_{k-1}^3; Payne & Weinberger (1960) -- the Poincare constant h/pi; Irons &
Razzaque (1972) -- the patch test; Roache (2002) -- manufactured solutions (SymPy);
Strang & Fix (1973) -- the corner singularity r^(2/3) sin(2 theta/3).
"""

import math

import numpy as np
import pytest
import scipy.integrate
import sympy as sp

import galerkit as gk

from reference import lambdify, lambdify_gradient
from singular_cases import lshape_flux, lshape_u

X3 = sp.symbols("x0 x1 x2")
x0, x1, x2 = X3


def _sin_problem(n):
    u = sp.sin(sp.pi * x0) * sp.sin(sp.pi * x1) * sp.sin(sp.pi * x2)
    f = -sum(sp.diff(u, v, 2) for v in X3)
    mesh = gk.structured_tetrahedra(n, n, n)
    return (gk.PoissonProblem(mesh, source=lambdify(f, 3), dirichlet={"boundary": 0.0}),
            lambdify_gradient(u, 3))


@pytest.mark.parametrize("degree,sizes", [(2, (1, 2, 4)), (3, (1, 2)), (4, (1, 2))])
def test_pk3d_bound_is_above_the_error_of_a_smooth_solution_with_effectivity_below_1_5(
        degree, sizes):
    # manufactured solution (Roache 2002, SymPy); Prager & Synge 1947: bound >= error on
    # every level; Ern & Vohralik 2015: effectivities tend to 1 (P2 n = 4: 1.062,
    # P3 n = 2: 1.19, P4 n = 2: 1.17 measured)
    effs = []
    for n in sizes:
        problem, grad = _sin_problem(n)
        est = gk.estimate_error(problem.solve(degree=degree, rtol=1e-12), exact_gradient=grad)
        assert est.guaranteed and est.bound >= est.error, (degree, n, est)
        effs.append(est.effectivity)
    assert 1.0 < effs[-1] <= 1.5, effs
    assert effs[-1] < effs[0]


@pytest.mark.parametrize("degree", [2, 3])
def test_pk3d_patch_test_polynomial_solution_gives_a_zero_bound(degree):
    # Irons & Razzaque 1972: P_k reproduces a u of degree k exactly, so the flux misfit,
    # the oscillation and every residual vanish; a full SPD tensor, Dirichlet on x = 0
    # (polynomial data), Neumann on the five other sides
    K = np.array([[2.0, 0.3, 0.1], [0.3, 0.7, 0.2], [0.1, 0.2, 1.5]])
    us = x0**degree - 2 * x0 * x1 ** (degree - 1) + x2**degree + x1 * x2 + 1
    gr = sp.Matrix([sp.diff(us, v) for v in X3])
    fl = sp.Matrix(K) * gr
    f = -sum(sp.diff(fl[i], X3[i]) for i in range(3))
    mesh = gk.structured_tetrahedra(2, 2, 2)
    neumann = {"xmax": lambdify(fl[0], 3), "ymin": lambdify(-fl[1], 3),
               "ymax": lambdify(fl[1], 3), "zmin": lambdify(-fl[2], 3),
               "zmax": lambdify(fl[2], 3)}
    sol = gk.PoissonProblem(mesh, conductivity=K, source=lambdify(f, 3),
                            dirichlet={"xmin": lambdify(us, 3)}, neumann=neumann).solve(
        degree=degree, rtol=1e-14)
    est = gk.estimate_error(sol)
    scale = est.energy_norm
    assert scale > 1.0
    assert est.guaranteed and est.bound < 1e-9 * scale and est.residual_estimate < 1e-8 * scale, est


def _mixed_problem(n, tensor):
    # Dirichlet on x = 0 (u(0, y, z) = 1 + y + z, in the space), Neumann on x = 1, y = 0,
    # z = 0 and z = 1, Robin on y = 1; a full SPD tensor or a scalar (SymPy)
    u = sp.exp(x0) * (1 + x1 + x2) + x0**2 * sp.sin(2 * x1) * sp.cos(x2)
    K = (sp.Matrix([[2, sp.Rational(1, 2), 0], [sp.Rational(1, 2), 1, sp.Rational(1, 4)],
                    [0, sp.Rational(1, 4), sp.Rational(3, 2)]]) if tensor else sp.eye(3) * 3)
    grad = sp.Matrix([sp.diff(u, v) for v in X3])
    flux = K * grad
    f = -sum(sp.diff(flux[i], X3[i]) for i in range(3))
    alpha = 2.0
    mesh = gk.structured_tetrahedra(n, n, n)
    uext = u + flux[1] / alpha  # K du/dn = alpha (u_ext - u) on y = 1
    problem = gk.PoissonProblem(
        mesh, conductivity=np.array(K, dtype=float) if tensor else 3.0, source=lambdify(f, 3),
        dirichlet={"xmin": lambdify(u, 3)},
        neumann={"xmax": lambdify(flux[0], 3), "ymin": lambdify(-flux[1], 3),
                 "zmin": lambdify(-flux[2], 3), "zmax": lambdify(flux[2], 3)},
        robin={"ymax": (alpha, lambdify(uext, 3))})
    return problem, lambdify_gradient(u, 3)


@pytest.mark.parametrize("tensor", [False, True])
def test_pk3d_bound_is_above_the_error_of_a_mixed_condition_problem(tensor):
    # Dirichlet + Neumann + Robin, scalar and tensor conductivity (manufactured, SymPy);
    # the boundary-data oscillation is a named, nonzero part of the bound
    effs = []
    for n in (1, 2, 4):
        problem, grad = _mixed_problem(n, tensor)
        est = gk.estimate_error(problem.solve(degree=2, rtol=1e-12), exact_gradient=grad)
        assert est.guaranteed and est.bound >= est.error, (n, est)
        assert est.terms["boundary_data"] > 0
        effs.append(est.effectivity)
    assert effs[-1] <= 1.5, effs


def test_pk3d_bound_with_a_per_cell_conductivity_jump():
    # u = v(x) sin(pi y) sin(pi z) with v = x (K = 1, x < 1/2) and v = 1/2 + (x - 1/2)/2
    # (K = 2, x > 1/2): u and K du/dx continuous at x = 1/2, so u solves
    # -div(K grad u) = 2 pi^2 K v sin sin (closed form); Neumann K du/dx = sin sin on x = 1
    def v(x):
        return np.where(x < 0.5, x, 0.5 + (x - 0.5) / 2)

    def grad(x):
        s1, s2 = np.sin(np.pi * x[1]), np.sin(np.pi * x[2])
        dv = np.where(x[0] < 0.5, 1.0, 0.5)
        return np.array([dv * s1 * s2, np.pi * v(x[0]) * np.cos(np.pi * x[1]) * s2,
                         np.pi * v(x[0]) * s1 * np.cos(np.pi * x[2])])

    def source(x):
        kx = np.where(x[0] < 0.5, 1.0, 2.0)
        return 2 * np.pi**2 * kx * v(x[0]) * np.sin(np.pi * x[1]) * np.sin(np.pi * x[2])

    for n in (2, 4):
        mesh = gk.structured_tetrahedra(n, n, n)
        kap = np.where(mesh.points[mesh.cells].mean(axis=1)[:, 0] < 0.5, 1.0, 2.0)
        sol = gk.PoissonProblem(
            mesh, conductivity=kap, source=source,
            dirichlet={s: 0.0 for s in ("xmin", "ymin", "ymax", "zmin", "zmax")},
            neumann={"xmax": lambda x: np.sin(np.pi * x[1]) * np.sin(np.pi * x[2])}).solve(
            degree=2, rtol=1e-12)
        est = gk.estimate_error(sol, exact_gradient=grad)
        assert est.guaranteed and est.bound >= est.error and est.effectivity < 1.6, (n, est)


def _lshape_prism(n):
    """(-1, 1)^2 without the quadrant x > 0, y < 0, times (0, 1): three Kuhn boxes joined
    at their common faces (the same diagonals on both sides, so conforming)."""
    parts = [((-1, 0, 0), (0, 1, 1)), ((-1, -1, 0), (0, 0, 1)), ((0, 0, 0), (1, 1, 1))]
    pts, cells, off = [], [], 0
    for lo, hi in parts:
        m = gk.structured_tetrahedra(n, n, n, lo, hi)
        pts.append(m.points)
        cells.append(m.cells + off)
        off += m.points.shape[0]
    p, c, _ = gk.merge_duplicate_vertices(np.vstack(pts), np.vstack(cells))
    mesh = gk.Mesh(p, c)
    mesh.tag_boundary("corner", lambda x: ((np.abs(x[0]) < 1e-9) & (x[1] < 1e-9))
                      | ((np.abs(x[1]) < 1e-9) & (x[0] > -1e-9)))
    mesh.tag_boundary("outer", lambda x: (np.abs(np.abs(x[0]) - 1) < 1e-9)
                      | (np.abs(np.abs(x[1]) - 1) < 1e-9))
    mesh.tag_boundary("ends", lambda x: (x[2] < 1e-9) | (x[2] > 1 - 1e-9))
    return mesh


def _lshape_energy():
    """a(u, u) of u = r^(2/3) sin(2 theta/3) on the prism of height 1: by Green's
    identity (u harmonic, u = 0 on the re-entrant sides, du/dz = 0) the integral of
    u du/dn over the six outer sides of the L, by SciPy's adaptive quadrature."""
    sides = [((1, 0), (1, 1)), ((1, 1), (-1, 1)), ((-1, 1), (-1, -1)), ((-1, -1), (0, -1))]
    total = 0.0
    for a, b in sides:
        a, b = np.array(a, float), np.array(b, float)
        L = float(np.hypot(*(b - a)))

        def g(t, a=a, b=b):
            x = (a + t * (b - a))[:, None]
            return float(lshape_u(x)[0] * lshape_flux(x)[0])

        kinks = [s for s in (0.5,) if L > 1.5]  # the square's corners inside a side
        total += L * scipy.integrate.quad(g, 0.0, 1.0, points=kinks or None, epsabs=1e-14,
                                          epsrel=1e-13, limit=200)[0]
    return total


@pytest.mark.parametrize("degree", [2, 3])
def test_pk3d_bound_is_above_the_error_of_the_lshape_prism_singularity(degree):
    # u = r^(2/3) sin(2 theta/3) (Strang & Fix 1973) on the L-shaped prism (non-convex);
    # true error by Galerkin orthogonality: ||grad(u - u_h)||^2 = a(u, u) - a(u_h, u_h)
    # (u_h the Galerkin projection with the exact zero Dirichlet data on the re-entrant
    # faces), a(u, u) by Green's identity and SciPy quadrature (_lshape_energy)
    auu = _lshape_energy()
    zero = lambda x: np.zeros_like(x)  # noqa: E731
    for n in (1, 2):
        mesh = _lshape_prism(n)
        sol = gk.PoissonProblem(mesh, neumann={"outer": lambda x: lshape_flux(x[:2]), "ends": 0.0},
                                dirichlet={"corner": 0.0}).solve(degree=degree, rtol=1e-13)
        est = gk.estimate_error(sol)
        auh = gk.energy_error(sol.disc, sol.u, zero) ** 2
        err = math.sqrt(auu - auh)
        assert est.guaranteed and est.bound >= err and est.bound / err <= 3.0, \
            (n, est.bound, err)


def test_pk3d_lshape_energy_of_the_reference_matches_the_two_dimensional_closed_form():
    # the Green-identity energy of _lshape_energy against an independent area integral:
    # |grad u|^2 = (4/9) r^(-2/3) in polar coordinates, integrated over the three unit
    # squares by SciPy's dblquad (polar form avoids the singular corner)
    def dens(r, t):
        return (4.0 / 9.0) * r ** (-2.0 / 3.0) * r

    def rmax(t):
        return 1.0 / max(abs(math.cos(t)), abs(math.sin(t)))

    tot = 0.0
    for lo, hi in ((0, math.pi / 4), (math.pi / 4, 3 * math.pi / 4),
                   (3 * math.pi / 4, 5 * math.pi / 4), (5 * math.pi / 4, 3 * math.pi / 2)):
        tot += scipy.integrate.dblquad(dens, lo, hi, 0.0, rmax, epsabs=1e-13, epsrel=1e-12)[0]
    assert _lshape_energy() == pytest.approx(tot, rel=1e-9)


def test_pk3d_bound_survives_a_loose_iterative_solve():
    # the residual of an inexact solve is routed to the Dirichlet boundary (Prager &
    # Synge 1947 for the vector actually returned)
    problem, grad = _sin_problem(4)  # n = 4: the centre vertex's patch has no boundary face
    tight = gk.estimate_error(problem.solve(degree=2, method="cg", rtol=1e-12),
                              exact_gradient=grad)
    loose = gk.estimate_error(problem.solve(degree=2, method="cg", rtol=1e-2),
                              exact_gradient=grad)
    assert loose.guaranteed and loose.bound >= loose.error
    assert loose.terms["algebraic"] > 100 * tight.terms["algebraic"]


def test_pk3d_oscillation_term_equals_its_closed_form():
    # f = x^3 (degree 3, not in P2): ||f - Pi_2 f||_K per cell against exact SymPy
    # integrals of the L2 projection on one reference-shaped cell (Stroud 1971 rules)
    mesh = gk.Mesh(np.array([[0.0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]]),
                   np.array([[0, 1, 2, 3]]))
    mesh.tag_boundary("base", lambda x: x[2] < 1e-12)
    sol = gk.PoissonProblem(mesh, source=lambda x: x[0] ** 3,
                            dirichlet={"base": 0.0}).solve(degree=2)
    est = gk.estimate_error(sol)
    mons = [x0**a * x1**b * x2**c for a in range(3) for b in range(3) for c in range(3)
            if a + b + c <= 2]

    def integral(g):
        return sp.integrate(g, (x2, 0, 1 - x0 - x1), (x1, 0, 1 - x0), (x0, 0, 1))

    Gm = sp.Matrix([[integral(p * q) for q in mons] for p in mons])
    rhs = sp.Matrix([integral(x0**3 * p) for p in mons])
    coef = Gm.LUsolve(rhs)
    proj = sum(c * p for c, p in zip(coef, mons))
    osc = math.sqrt(float(integral((x0**3 - proj) ** 2)))
    h = math.sqrt(2.0)
    assert est.terms["oscillation"] == pytest.approx(h / math.pi * osc, rel=1e-10)


def test_pk3d_boundary_data_term_equals_its_closed_form():
    # g = y^3 on the face z = 0 of the unit tetrahedron (not in P2 there):
    # C_F ||g - Pi_2 g||_F with C_F = h (|F| / |K| (1/pi^2 + 2/(3 pi)))^(1/2) (the trace
    # inequality of galerkit.estimators, d = 3), the projection by exact SymPy integrals
    mesh = gk.Mesh(np.array([[0.0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]]),
                   np.array([[0, 1, 2, 3]]))
    mesh.tag_boundary("west", lambda x: x[0] < 1e-12)
    mesh.tag_boundary("base", lambda x: x[2] < 1e-12)
    sol = gk.PoissonProblem(mesh, source=0.0, dirichlet={"west": 0.0},
                            neumann={"base": lambda x: x[1] ** 3}).solve(degree=2)
    est = gk.estimate_error(sol)
    mons = [x0**a * x1**b for a in range(3) for b in range(3) if a + b <= 2]

    def integral(g):
        return sp.integrate(g, (x1, 0, 1 - x0), (x0, 0, 1))

    Gm = sp.Matrix([[integral(p * q) for q in mons] for p in mons])
    coef = Gm.LUsolve(sp.Matrix([integral(x1**3 * p) for p in mons]))
    proj = sum(c * p for c, p in zip(coef, mons))
    gosc = math.sqrt(float(integral((x1**3 - proj) ** 2)))
    c_f = math.sqrt(2.0) * math.sqrt(0.5 / (1 / 6) * (1 / math.pi**2 + 2 / (3 * math.pi)))
    assert est.terms["boundary_data"] == pytest.approx(c_f * gosc, rel=1e-10)
    assert est.terms["oscillation"] == 0.0


def test_pk3d_bound_does_not_depend_on_the_vertex_numbering():
    # the same mesh with its vertices renumbered at random and each cell's vertices
    # listed in a random order: faces then meet with every order of their vertices
    # (the six face tables), and the bound is the same number (a property of the
    # construction; the conical rules are not symmetric, so the data are polynomial)
    from galerkit.equilibration3d import _face_perms

    rng = np.random.default_rng(7)
    base = gk.structured_tetrahedra(2, 2, 2)
    new = rng.permutation(base.n_vertices)
    pts = np.empty_like(base.points)
    pts[new] = base.points
    cells = new[base.cells]
    cells = np.take_along_axis(cells, rng.permuted(np.tile(np.arange(4), (len(cells), 1)),
                                                   axis=1), axis=1)
    other = gk.Mesh(pts, cells)
    perm, _ = _face_perms(np.ascontiguousarray(other.cells, dtype=np.int64))
    assert len(np.unique(perm)) == 6
    f = 1 + x0 - 2 * x2  # linear: every rule here (load, estimator) integrates it exactly
    out = []
    for mesh in (base, other):
        mesh.tag_boundary("side", lambda x: x[2] < 1e-12)
        sol = gk.PoissonProblem(mesh, source=lambdify(f, 3),
                                dirichlet={"side": 0.0}).solve(degree=2, rtol=1e-13)
        out.append(gk.estimate_error(sol))
    a, b = out
    assert a.guaranteed and b.guaranteed and a.bound > 0
    assert b.bound == pytest.approx(a.bound, rel=1e-9)
    assert b.residual_estimate == pytest.approx(a.residual_estimate, rel=1e-9)


def test_pk3d_vertex_batches_give_the_same_bits(monkeypatch):
    # the cell blocks are computed per batch of vertices (BLOCK_BYTES); a batch per
    # vertex gives the same result bit for bit
    from galerkit import equilibration3d

    problem, _ = _sin_problem(2)
    sol = problem.solve(degree=3)
    a = gk.estimate_error(sol)
    monkeypatch.setattr(equilibration3d, "BLOCK_BYTES", 1)
    b = gk.estimate_error(sol)
    assert a.bound == b.bound and a.indicators.tobytes() == b.indicators.tobytes()


def test_pk3d_bound_is_the_same_bits_for_one_and_two_threads():
    # patch problems per vertex in fixed chunks, cells independent (DEVELOPERS.md)
    import numba

    if numba.config.NUMBA_NUM_THREADS < 2:
        pytest.skip("needs two numba threads")
    problem, _ = _sin_problem(3)
    sol = problem.solve(degree=2)
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


def test_pk3d_dirichlet_data_outside_the_space_is_refused_with_its_facet():
    mesh = gk.structured_tetrahedra(1, 1, 1)
    sol = gk.PoissonProblem(mesh, source=1.0,
                            dirichlet={"boundary": lambda x: x[0] ** 3}).solve(degree=2)
    with pytest.raises(gk.UnsupportedError, match="not a polynomial of degree 2"):
        gk.estimate_error(sol)
    ok = gk.PoissonProblem(mesh, source=1.0,
                           dirichlet={"boundary": lambda x: x[0] ** 3}).solve(degree=3)
    assert gk.estimate_error(ok).guaranteed


# -- the reference RT_k tables against exact SymPy integrals ----------------------------
def _sym_basis(k):
    s = [v - sp.Rational(1, 4) for v in X3]
    mons = [(a, b, c) for d in range(k + 1) for a in range(d, -1, -1)
            for b in range(d - a, -1, -1) for c in [d - a - b]]

    def mono(e):
        return s[0] ** e[0] * s[1] ** e[1] * s[2] ** e[2]

    basis = []
    for r in range(3):
        for e in mons:
            v = [sp.Integer(0)] * 3
            v[r] = mono(e)
            basis.append(v)
    for e in mons:
        if sum(e) == k:
            basis.append([s[i] * mono(e) for i in range(3)])
    return basis, [mono(e) for e in mons]


def _tet_integral(g):
    """Exact integral over the unit tetrahedron: int x^a y^b z^c = a! b! c! / (a+b+c+3)!
    (Stroud 1971), term by term."""
    if g == 0:
        return sp.Integer(0)
    return sum(c * sp.factorial(a) * sp.factorial(b) * sp.factorial(d)
               / sp.factorial(a + b + d + 3) for (a, b, d), c in sp.Poly(g, *X3).terms())


def _tri_integral(g, t1, t2):
    """Exact integral over the unit triangle: int s^a t^b = a! b! / (a+b+2)! (Stroud)."""
    if g == 0:
        return sp.Integer(0)
    return sum(c * sp.factorial(a) * sp.factorial(b) / sp.factorial(a + b + 2)
               for (a, b), c in sp.Poly(g, t1, t2).terms())


@pytest.mark.parametrize("k", [2, 3])
def test_pk3d_rt_reference_tables_equal_exact_sympy_moments_and_are_unisolvent(k):
    from galerkit.equilibration3d import _FACES, _PERMS, rt_reference_3d

    ref = rt_reference_3d(k)
    basis, cellmons = _sym_basis(k)
    nb_ = (k + 1) * (k + 2) * (k + 4) // 2  # Nedelec 1980: dim RT_k on a tetrahedron
    assert len(basis) == nb_ == ref["nb"]
    V = [sp.Matrix([0, 0, 0]), sp.Matrix([1, 0, 0]), sp.Matrix([0, 1, 0]),
         sp.Matrix([0, 0, 1])]
    t1, t2 = sp.symbols("t1 t2")
    fmons = [(a, d - a) for d in range(k + 1) for a in range(d, -1, -1)]
    rows = []
    for i in range(4):
        for p in ([0, 3] if k == 3 else range(6)):  # k = 3: two orders, every 5th field
            vs = [_FACES[i][j] for j in _PERMS[p]]
            P0, P1, P2 = V[vs[0]], V[vs[1]], V[vs[2]]
            x = P0 + t1 * (P1 - P0) + t2 * (P2 - P0)  # mu_1 = t1, mu_2 = t2 on the face
            nvec = (P1 - P0).cross(P2 - P0)  # |nvec| dt1 dt2 = dS
            if (nvec.dot(V[i] - P0)) > 0:
                nvec = -nvec  # outward
            sub = dict(zip(X3, list(x)))
            sel = list(range(nb_)) if (k == 2 and p == 0) else list(range(0, nb_, 5))
            tns = {bi: sp.expand(sum(basis[bi][r].subs(sub) * nvec[r] for r in range(3)))
                   for bi in sel}
            for j, (a, b) in enumerate(fmons):
                for bi in sel:
                    val = _tri_integral(sp.expand(tns[bi] * t1**a * t2**b), t1, t2)
                    assert float(val) == pytest.approx(ref["E"][i, p, j, bi], abs=1e-12), \
                        (i, p, j, bi)
            if p == 0 and k == 2:
                rows.append([[_tri_integral(sp.expand(tns[bi] * t1**a * t2**b), t1, t2)
                              for bi in range(nb_)] for a, b in fmons])
    if k == 2:
        # divergence moments and cell-monomial integrals
        for j, q in enumerate(cellmons):
            assert float(_tet_integral(sp.expand(q))) == pytest.approx(ref["qint"][j], abs=1e-14)
            for bi in range(nb_):
                dv = sum(sp.diff(basis[bi][r], X3[r]) for r in range(3))
                assert float(_tet_integral(sp.expand(dv * q))) == pytest.approx(ref["D"][j, bi], abs=1e-13)
        # unisolvence: face moments against P_k and interior moments against P_{k-1}^3
        # determine an RT_k field (Nedelec 1980): the exact moment matrix is invertible
        inner = [[_tet_integral(sp.expand(basis[bi][r] * q)) for bi in range(nb_)]
                 for r in range(3) for q in cellmons[: (k) * (k + 1) * (k + 2) // 6]]
        M = sp.Matrix([row for face in rows for row in face] + inner)
        from sympy.polys.matrices import DomainMatrix

        assert M.shape == (nb_, nb_)
        assert DomainMatrix.from_Matrix(M).convert_to(sp.QQ).rank() == nb_  # exact rationals
    # the lowest-order fields: unit outward flux through face i only, constant divergence
    for i in range(4):
        for f in range(4):
            flux = ref["E"][f, 0, 0] @ ref["rt0"][i]
            assert flux == pytest.approx(1.0 if f == i else 0.0, abs=1e-12)
        div = ref["D"] @ ref["rt0"][i]
        assert np.allclose(div, 6.0 * ref["qint"], atol=1e-12)
