"""Observed orders of convergence that the quick suite does not reach (slow).

Every case runs at least three levels of uniform refinement and checks the
order between the last two, to within 0.1 of the theory:

* smooth solutions: O(h^{k+1}) in L2 and O(h^k) in H1 and energy (Brenner &
  Scott, The Mathematical Theory of Finite Element Methods, 2008, Thm 5.4.8
  and sec. 5.7 for Neumann data; Ciarlet 1978, Thm 3.2.2), with the method
  of manufactured solutions (Roache, Verification and Validation in
  Computational Science and Engineering, 2002): the source and boundary data
  are derived from a chosen u with SymPy, -div(K grad u) = f;
* the L-shaped domain, u = r^{2/3} sin(2 theta/3) in H^{1+2/3-eps}: H1 order
  2/3 (Strang & Fix 1973, ch. 8) and, by the duality argument of Aubin and
  Nitsche on a domain whose dual problem has the same regularity, L2 order
  2 * 2/3 = 4/3 (Brenner & Scott 2008, sec. 5.4 for the argument; Grisvard,
  Elliptic Problems in Nonsmooth Domains, 1985, for the regularity).

The 0.1 band is the issue's requirement; the theory gives the limit, not the
band: the levels are chosen fine enough that the pre-asymptotic drift is
below it.  These runs take minutes: ``pytest -m slow`` (``.ci/run``).
"""

from __future__ import annotations

import numpy as np
import pytest
import sympy as sp

import reference as ref
from galerkit import (
    PoissonProblem,
    convergence_study,
    l_shaped_triangles,
    structured_tetrahedra,
    structured_triangles,
)

pytestmark = pytest.mark.slow

X = ref.X


def manufactured(u, dim, kappa=1, tensor=None):
    """u, grad u, f = -div(kappa K grad u) and the flux kappa K grad u as callables."""
    x = X[:dim]
    K = sp.eye(dim) if tensor is None else sp.Matrix(tensor)
    g = sp.Matrix([sp.diff(u, v) for v in x])
    flux = kappa * (K * g)
    f = -sum(sp.diff(flux[r], x[r]) for r in range(dim))
    return dict(u=ref.lambdify(u, dim), grad=ref.lambdify_gradient(u, dim),
                f=ref.lambdify(sp.simplify(f), dim),
                flux=[ref.lambdify(flux[r], dim) for r in range(dim)],
                kappa=ref.lambdify(kappa, dim) if kappa != 1 else 1.0)


def check(table, degree, energy=True):
    eoc_l2, eoc_h1 = table.column("eoc_l2")[-1], table.column("eoc_h1")[-1]
    assert len(table.rows) >= 3
    assert abs(eoc_l2 - (degree + 1)) <= 0.1, table.to_markdown()
    assert abs(eoc_h1 - degree) <= 0.1, table.to_markdown()
    if energy:
        assert abs(table.column("eoc_energy")[-1] - degree) <= 0.1, table.to_markdown()


U2 = sp.exp(X[0] / 2) * sp.sin(X[1] + sp.Rational(1, 3)) + X[0] * X[1] ** 2
U3 = sp.exp(X[0] / 2) * sp.sin(X[1] + sp.Rational(1, 3)) * sp.cos(X[2] / 2) + X[0] * X[2]


def square(n):
    return structured_triangles(n, n)


def cube(n):
    return structured_tetrahedra(n, n, n)


# ------------------------------------------------------------------ Dirichlet, high degree
@pytest.mark.parametrize("dim, degree, n0, levels", [(2, 4, 2, 3), (3, 3, 1, 3), (3, 4, 1, 3)])
def test_dirichlet_rates_of_high_degrees(dim, degree, n0, levels):
    m = manufactured(U2 if dim == 2 else U3, dim)
    mesh = square(n0) if dim == 2 else cube(n0)
    prob = PoissonProblem(mesh, 1.0, m["f"], {"boundary": m["u"]})
    check(convergence_study(prob, levels, degree, m["u"], m["grad"], method="direct"), degree)


# ------------------------------------------------------------------ Neumann and Robin
def _faces(mesh, dim):
    """Tag the faces x = 1 ("flux_face") and the others ("others")."""
    mesh.tag_boundary("flux_face", lambda x: x[0] > 1 - 1e-12)
    mesh.tag_boundary("others", lambda x: x[0] < 1 - 1e-12)
    return mesh


@pytest.mark.parametrize("dim, degree, n0, levels", [
    (2, 3, 2, 3), (2, 4, 2, 3), (3, 1, 2, 4), (3, 2, 1, 4)])
@pytest.mark.parametrize("kind", ["neumann", "robin"])
def test_neumann_and_robin_rates(dim, degree, n0, levels, kind):
    # flux into the domain through x = 1 (outward normal +x): kappa du/dx;
    # Robin kappa du/dn = alpha (u_ext - u) with u_ext = u + kappa du/dn / alpha
    kappa, alpha = 2, 3.0
    m = manufactured(U2 if dim == 2 else U3, dim, kappa=kappa)
    mesh = _faces(square(n0) if dim == 2 else cube(n0), dim)
    q = m["flux"][0]
    if kind == "neumann":
        prob = PoissonProblem(mesh, float(kappa), m["f"], {"others": m["u"]},
                              neumann={"flux_face": q})
    else:
        prob = PoissonProblem(mesh, float(kappa), m["f"], {"others": m["u"]},
                              robin={"flux_face": (alpha, lambda x: m["u"](x) + q(x) / alpha)})
    check(convergence_study(prob, levels, degree, m["u"], m["grad"], method="direct"), degree)


# ------------------------------------------------------------------ coefficients
@pytest.mark.parametrize("dim, degree, n0, levels", [(2, 1, 4, 4), (2, 2, 2, 4), (3, 1, 2, 4),
                                                     (3, 2, 1, 4)])
@pytest.mark.parametrize("kind", ["variable", "tensor"])
def test_variable_and_tensor_conductivity_rates(dim, degree, n0, levels, kind):
    if kind == "variable":
        kappa = 1 + X[0] ** 2 + sp.sin(X[1]) / 2
        m = manufactured(U2 if dim == 2 else U3, dim, kappa=kappa)
        cond = m["kappa"]
    else:
        T = [[2, sp.Rational(1, 2)], [sp.Rational(1, 2), 1]] if dim == 2 else \
            [[2, sp.Rational(1, 2), 0], [sp.Rational(1, 2), 1, sp.Rational(-1, 3)],
             [0, sp.Rational(-1, 3), 3]]
        m = manufactured(U2 if dim == 2 else U3, dim, tensor=T)
        cond = np.array(T, dtype=float)
    mesh = square(n0) if dim == 2 else cube(n0)
    prob = PoissonProblem(mesh, cond, m["f"], {"boundary": m["u"]})
    check(convergence_study(prob, levels, degree, m["u"], m["grad"], method="direct"), degree)


# ------------------------------------------------------------------ pure Neumann, 3D
@pytest.mark.parametrize("degree, n0, levels", [(1, 2, 5), (2, 1, 5)])
def test_pure_neumann_rates_in_3d(degree, n0, levels):
    # u = cos(pi x) cos(pi y) cos(pi z): zero mean, du/dn = 0 on the cube's boundary,
    # -laplace u = 3 pi^2 u; unique up to a constant, fixed by the zero mean
    u = sp.cos(sp.pi * X[0]) * sp.cos(sp.pi * X[1]) * sp.cos(sp.pi * X[2])
    m = manufactured(u, 3)
    prob = PoissonProblem(cube(n0), 1.0, m["f"])
    check(convergence_study(prob, levels, degree, m["u"], m["grad"], method="cg-amg"), degree)


# ------------------------------------------------------------------ L-shaped domain
def test_l_shaped_domain_l2_rate_is_four_thirds_beside_h1_two_thirds():
    def corner(x):
        r = np.hypot(x[0], x[1])
        th = np.mod(np.arctan2(x[1], x[0]), 2 * np.pi)
        return r ** (2 / 3) * np.sin(2 * th / 3)

    def corner_gradient(x):
        r = np.maximum(np.hypot(x[0], x[1]), 1e-300)
        th = np.mod(np.arctan2(x[1], x[0]), 2 * np.pi)
        ur = (2 / 3) * r ** (-1 / 3) * np.sin(2 * th / 3)
        ut = (2 / 3) * r ** (-1 / 3) * np.cos(2 * th / 3)
        return np.array([ur * np.cos(th) - ut * np.sin(th), ur * np.sin(th) + ut * np.cos(th)])

    prob = PoissonProblem(l_shaped_triangles(2), 1.0, 0.0, {"boundary": corner})
    table = convergence_study(prob, 6, 1, corner, corner_gradient, method="direct")
    assert abs(table.column("eoc_l2")[-1] - 4 / 3) <= 0.1, table.to_markdown()
    assert abs(table.column("eoc_h1")[-1] - 2 / 3) <= 0.1, table.to_markdown()
