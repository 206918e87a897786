"""Absolute values of every error functional and norm (galerkit.functionals).

References:

* SymPy's exact integrals over the unit square / cube (and its halves) of
  polynomials: the interpolant of a polynomial p of degree <= k is p itself
  (Lagrange interpolation reproduces P_k; Ciarlet 1978, sec. 2.2), so every
  functional of it is an exact polynomial integral;
* closed forms: int_{[0,1]^d} prod sin^2(pi x_r) = 2^-d and
  int |grad prod sin(pi x_r)|^2 = d pi^2 2^-d (separation of variables,
  int_0^1 sin^2 = int_0^1 cos^2 = 1/2).

Tolerances.  The default rule has degree 2k + 2 (functionals.py); every
polynomial integrand below has at most that degree (an error p - q with q of
degree k + 1; coefficients of degree 1 with gradients of degree k - 1), so
the quadrature is exact and only rounding remains: 1e-11 relative.  The sine
integrands are not polynomials: see ``sine_bound``.

Meshes are not aligned with anything special: interior vertices of the
structured meshes move randomly (those on the plane x = 1/2 stay on it, so
that a two-material conductivity split there is exact).
"""

from __future__ import annotations

from math import factorial

import numpy as np
import pytest
import sympy as sp

import reference as ref
from galerkit import (
    Discretization,
    Mesh,
    energy,
    energy_error,
    h1_norm,
    h1_seminorm,
    h1_seminorm_error,
    l2_error,
    l2_norm,
    structured_tetrahedra,
    structured_triangles,
)
from galerkit.convergence import mesh_size

X = ref.X
RTOL = 1e-11
CASES = [(d, k) for d in (2, 3) for k in (1, 2, 3, 4)]


def irregular(dim):
    """Unit square 6x6 / cube 4x4x4, interior vertices moved by up to 0.2 h."""
    n = 6 if dim == 2 else 4
    base = structured_triangles(n, n) if dim == 2 else structured_tetrahedra(n, n, n)
    rng = np.random.default_rng(40 + dim)
    p = base.points.copy()
    inner = np.all((p > 1e-12) & (p < 1 - 1e-12), axis=1)
    move = rng.uniform(-0.2 / n, 0.2 / n, p.shape)
    move[np.abs(p[:, 0] - 0.5) < 1e-12, 0] = 0.0  # stay on the plane x = 1/2
    p[inner] += move[inner]
    mesh = Mesh(p, base.cells)
    assert mesh.n_reoriented == 0
    return mesh


@pytest.fixture(scope="module", params=[2, 3])
def meshes(request):
    return request.param, irregular(request.param)


def polys(dim, k):
    """p of degree k (all coefficients non-trivial), q of degree k + 1."""
    x = X[:dim]
    lin = x[0] - 2 * x[1] + sp.Rational(1, 3) + (x[2] / 2 if dim == 3 else 0)
    p = lin ** k + x[0] ** (k - 1) * x[-1] + sp.Rational(1, 2)
    q = x[0] ** (k + 1) + x[0] * x[1] - sp.Rational(1, 4) * x[-1]
    return p, q


def box(expr, dim, x0=(0, 1)):
    """Exact integral over [x0[0], x0[1]] x [0, 1]^(dim - 1)."""
    out = sp.integrate(sp.expand(expr), (X[0], x0[0], x0[1]))
    for r in range(1, dim):
        out = sp.integrate(out, (X[r], 0, 1))
    return float(out)


def grad(expr, dim):
    return [sp.diff(expr, X[r]) for r in range(dim)]


def dot(a, T, b):
    return sum(a[r] * T[r][s] * b[s] for r in range(len(a)) for s in range(len(a)))


def close(got, want):
    assert abs(got - want) <= RTOL * abs(want), (got, want, got / want - 1)


TENSOR = {2: [[2, sp.Rational(1, 2)], [sp.Rational(1, 2), 1]],
          3: [[2, sp.Rational(1, 2), 0], [sp.Rational(1, 2), 1, sp.Rational(-1, 3)],
              [0, sp.Rational(-1, 3), 3]]}
KAPPA = 1 + X[0] + 2 * X[1]  # degree 1, positive on the domain


@pytest.mark.parametrize("k", [1, 2, 3, 4])
def test_errors_of_an_interpolated_polynomial_equal_sympy_integrals(meshes, k):
    dim, mesh = meshes
    disc = Discretization(mesh, k)
    p, q = polys(dim, k)
    u = disc.interpolate(ref.lambdify(p, dim))
    e = p - q
    ge = grad(e, dim)
    gq = ref.lambdify_gradient(q, dim)
    close(l2_error(disc, u, ref.lambdify(q, dim)), np.sqrt(box(e ** 2, dim)))
    h1 = box(dot(ge, np.eye(dim, dtype=int).tolist(), ge), dim)
    close(h1_seminorm_error(disc, u, gq), np.sqrt(h1))
    # conductivities: a number, one value per cell, a callable, a tensor (constant, per cell)
    close(energy_error(disc, u, gq, 2.5), np.sqrt(2.5 * h1))
    centroid_x = mesh.points[mesh.cells].mean(axis=1)[:, 0]
    right = centroid_x > 0.5
    two = box(sum(g * g for g in ge), dim, (0, sp.Rational(1, 2))) \
        + 4 * box(sum(g * g for g in ge), dim, (sp.Rational(1, 2), 1))
    close(energy_error(disc, u, gq, np.where(right, 4.0, 1.0)), np.sqrt(two))
    close(energy_error(disc, u, gq, ref.lambdify(KAPPA, dim)),
          np.sqrt(box(KAPPA * sum(g * g for g in ge), dim)))
    T = TENSOR[dim]
    Tf = np.array(T, dtype=float)
    close(energy_error(disc, u, gq, Tf), np.sqrt(box(dot(ge, T, ge), dim)))
    per_cell = np.where(right[:, None, None], 3.0 * Tf, Tf)
    close(energy_error(disc, u, gq, per_cell),
          np.sqrt(box(dot(ge, T, ge), dim, (0, sp.Rational(1, 2)))
                  + 3 * box(dot(ge, T, ge), dim, (sp.Rational(1, 2), 1))))
    # per-cell values: the cells of the left half sum to the integral over it
    cells = l2_error(disc, u, ref.lambdify(q, dim), per_cell=True)
    close(cells[~right].sum(), box(e ** 2, dim, (0, sp.Rational(1, 2))))
    cells = h1_seminorm_error(disc, u, gq, per_cell=True)
    close(cells[right].sum(), box(sum(g * g for g in ge), dim, (sp.Rational(1, 2), 1)))


@pytest.mark.parametrize("k", [1, 2, 3, 4])
def test_norms_and_energy_of_an_interpolated_polynomial_equal_sympy_integrals(meshes, k):
    dim, mesh = meshes
    disc = Discretization(mesh, k)
    p, _ = polys(dim, k)
    u = disc.interpolate(ref.lambdify(p, dim))
    gp = grad(p, dim)
    l2 = box(p ** 2, dim)
    h1 = box(sum(g * g for g in gp), dim)
    close(l2_norm(disc, u), np.sqrt(l2))
    close(h1_seminorm(disc, u), np.sqrt(h1))
    close(h1_norm(disc, u), np.sqrt(l2 + h1))
    # energy 1/2 int kappa |grad p|^2 - int f p; f of degree k + 2 keeps f p within 2k + 2
    f = X[0] ** 2 * X[dim - 1] ** k - X[1] + 3
    fp = box(f * p, dim)
    close(energy(disc, u, 2.0, ref.lambdify(f, dim)), h1 - fp)
    close(energy(disc, u, 2.0, -1.5), h1 + 1.5 * box(p, dim))
    close(energy(disc, u, ref.lambdify(KAPPA, dim), ref.lambdify(f, dim)),
          0.5 * box(KAPPA * sum(g * g for g in gp), dim) - fp)
    # the energy of a tensor-conductivity field, and a source given as a dof vector
    T = TENSOR[dim]
    r = X[0] * X[1] ** (k - 1) - 2
    src = disc.interpolate(ref.lambdify(r, dim))
    close(energy(disc, u, np.array(T, dtype=float), src),
          0.5 * box(dot(gp, T, gp), dim) - box(r * p, dim))


def sine_bound(dim, h, p):
    """Bound of the quadrature error for the sine integrands below.

    Each integrand is 2^-d sum over subsets S of +-prod_{r in S} cos(2 pi x_r),
    times at most d pi^2 (gradient form) -- at most (1 + d pi^2) in total
    coefficient.  An n-th directional derivative of one product is at most
    (2 pi sqrt(d))^n.  A rule exact to degree p with positive weights summing
    to |T| errs on T by at most 2 |T| max |Taylor remainder of degree p|
    <= 2 |T| (2 pi sqrt(d) h)^(p+1) / (p+1)!  (h the longest edge; Ciarlet
    1978, sec. 4.1, for the argument).  Summed over the unit domain:
    """
    return 2 * (1 + dim * np.pi ** 2) * (2 * np.pi * np.sqrt(dim) * h) ** (p + 1) \
        / factorial(p + 1)


@pytest.mark.parametrize("dim, k", CASES)
def test_zero_against_products_of_sines_gives_the_closed_forms(dim, k):
    mesh = irregular(dim)
    disc = Discretization(mesh, k)
    zero = np.zeros(disc.n_dofs)

    def s(x):
        return np.prod(np.sin(np.pi * x), axis=0)

    def gs(x):
        sn, cs = np.sin(np.pi * x), np.cos(np.pi * x)
        return np.array([np.pi * cs[r] * np.prod(np.delete(sn, r, axis=0), axis=0)
                         for r in range(dim)])

    deg = 30
    # the quadrature bound plus rounding (RTOL of the largest value, d pi^2 2^-d * 3)
    tol = sine_bound(dim, mesh_size(mesh), deg) + RTOL * 3 * dim * np.pi ** 2
    assert tol < 1e-3 * 2.0 ** -dim  # the bound is sharp enough to see a 3 % fault
    got = l2_error(disc, zero, s, quadrature_degree=deg) ** 2
    assert abs(got - 2.0 ** -dim) <= tol, (got, 2.0 ** -dim)
    want = dim * np.pi ** 2 * 2.0 ** -dim
    got = h1_seminorm_error(disc, zero, gs, quadrature_degree=deg) ** 2
    assert abs(got - want) <= tol, (got, want)
    got = energy_error(disc, zero, gs, 3.0, quadrature_degree=deg) ** 2
    assert abs(got - 3.0 * want) <= 3.0 * tol, (got, 3.0 * want)
