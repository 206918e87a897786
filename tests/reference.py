"""Independent reference constructions for the tests (exact rational arithmetic).

Nothing here imports galerkit: the Lagrange basis, the integrals and the
element matrices are built from their definitions, so that a test comparing
galerkit with them compares two independent constructions.

* The nodal Lagrange basis of degree k on a *physical* simplex with
  vertices v_0..v_d: the nodes are x_alpha = sum_i (alpha_i / k) v_i for the
  barycentric multi-indices |alpha| = k, and phi_beta is the polynomial of
  total degree <= k in the physical coordinates with phi_beta(x_alpha) =
  delta_{alpha beta} (Ciarlet, The Finite Element Method for Elliptic
  Problems, 1978, sec. 2.2: P_k is unisolvent on these nodes).  It is found
  by solving the monomial Vandermonde system exactly with SymPy rationals --
  a different construction from galerkit's product formula on the
  reference cell.
* Integrals over a simplex T of polynomials in barycentric coordinates:
  int_T lambda^alpha = d! |T| alpha! / (|alpha| + d)!  (the exact simplex
  monomial integral, Stroud, Approximate Calculation of Multiple Integrals,
  1971; on the reference simplex it reads a!b!c!/(a+b+c+d)!).  A polynomial
  in x is rewritten in barycentric coordinates by x = sum_i lambda_i v_i;
  facet integrals use the same formula in dimension d - 1.
"""

from __future__ import annotations

import itertools
from fractions import Fraction
from functools import lru_cache
from math import factorial, prod

import numpy as np
import sympy as sp

X = sp.symbols("x0:3")


def rational_points(points):
    """Vertices as tuples of Fractions ("1/3", 2, 0.5 are all exact)."""
    return tuple(tuple(Fraction(c) for c in v) for v in points)


def _poly_mul(p, q):
    out = {}
    for a, ca in p.items():
        for b, cb in q.items():
            key = tuple(i + j for i, j in zip(a, b))
            out[key] = out.get(key, 0) + ca * cb
    return out


class SimplexMoments:
    """Exact integrals of physical monomials x^e over one simplex (Stroud 1971).

    ``verts`` are n + 1 rational points in R^dim (n = dim: a cell; n = dim - 1:
    a facet).  ``moment(e)`` is the rational ``int_T x^e / |T|``; multiply by
    ``measure`` (a float: a facet's area is irrational in general).
    """

    def __init__(self, verts):
        self.verts = verts
        self.dim = len(verts[0])
        self.n = len(verts) - 1
        E = np.array([[float(verts[i + 1][r] - verts[0][r]) for r in range(self.dim)]
                      for i in range(self.n)])
        self.measure = float(np.sqrt(np.linalg.det(E @ E.T))) / factorial(self.n)
        if self.n == self.dim:  # exact for a cell: |det E| / d!
            self.measure = float(abs(_det([[verts[i + 1][r] - verts[0][r] for r in range(self.dim)]
                                           for i in range(self.n)]))) / factorial(self.n)
        # x_r = sum_i lambda_i v_i[r], as polynomials in the barycentric lambda
        unit = [tuple(int(i == j) for j in range(self.n + 1)) for i in range(self.n + 1)]
        self._coord = [{unit[i]: verts[i][r] for i in range(self.n + 1) if verts[i][r] != 0}
                       for r in range(self.dim)]
        self._powers = {}
        self._cache = {}

    def _power(self, r, p):
        key = (r, p)
        if key not in self._powers:
            if p == 0:
                self._powers[key] = {(0,) * (self.n + 1): Fraction(1)}
            else:
                self._powers[key] = _poly_mul(self._power(r, p - 1), self._coord[r])
        return self._powers[key]

    def moment(self, e):
        e = tuple(e)
        if e not in self._cache:
            poly = {(0,) * (self.n + 1): Fraction(1)}
            for r, p in enumerate(e):
                if p:
                    poly = _poly_mul(poly, self._power(r, p))
            # int_T lambda^alpha / |T| = n! alpha! / (|alpha| + n)!
            n = self.n
            self._cache[e] = sum(
                (c * Fraction(prod(factorial(a) for a in alpha) * factorial(n),
                              factorial(sum(alpha) + n)) for alpha, c in poly.items()),
                Fraction(0))
        return self._cache[e]


def _det(A):
    A = [list(map(Fraction, row)) for row in A]
    n = len(A)
    det = Fraction(1)
    for i in range(n):
        piv = next(r for r in range(i, n) if A[r][i] != 0)
        if piv != i:
            A[i], A[piv] = A[piv], A[i]
            det = -det
        det *= A[i][i]
        for r in range(i + 1, n):
            f = A[r][i] / A[i][i]
            for c in range(i, n):
                A[r][c] -= f * A[i][c]
    return det


def _inverse(A):
    """Exact inverse by Gauss-Jordan elimination on Fractions."""
    n = len(A)
    M = [list(map(Fraction, row)) + [Fraction(int(i == j)) for j in range(n)]
         for i, row in enumerate(A)]
    for i in range(n):
        piv = next(r for r in range(i, n) if M[r][i] != 0)
        M[i], M[piv] = M[piv], M[i]
        inv = 1 / M[i][i]
        M[i] = [v * inv for v in M[i]]
        for r in range(n):
            if r != i and M[r][i] != 0:
                f = M[r][i]
                M[r] = [a - f * b for a, b in zip(M[r], M[i])]
    return [row[n:] for row in M]


def _multi_indices(n_vertices, k):
    return [a for a in itertools.product(range(k + 1), repeat=n_vertices) if sum(a) == k]


def monomials(dim, k):
    """Exponents of the monomials of total degree <= k in dim variables."""
    return [e for e in itertools.product(range(k + 1), repeat=dim) if sum(e) <= k]


@lru_cache(maxsize=None)
def lagrange_basis(verts, k):
    """Nodal Lagrange basis of degree k on the physical simplex ``verts``.

    Returns
    -------
    nodes : list of tuples of Fractions (physical node positions)
    mons : list of exponent tuples
    C : list of lists of Fractions, ``C[i][j]`` the coefficient of monomial i
        in basis function j; ``sum_i C[i][j] nodes[l]^mons[i] = delta_jl``.
    """
    dim = len(verts[0])
    nodes = [tuple(sum(Fraction(a[i], k) * verts[i][r] for i in range(dim + 1))
                   for r in range(dim)) for a in _multi_indices(dim + 1, k)]
    mons = monomials(dim, k)
    V = [[prod(x[r] ** e[r] for r in range(dim)) for e in mons] for x in nodes]
    return nodes, mons, _inverse(V)


def _poly_dict(expr, dim):
    """A SymPy polynomial in X (or a number) as {exponent tuple: Fraction}."""
    p = sp.Poly(sp.sympify(expr), *X[:dim])
    return {tuple(int(v) for v in m): Fraction(int(c.p), int(c.q)) for m, c in p.terms()}


def _gram(mom, mons_a, mons_b, weight):
    """G[i][j] = int x^(a_i + b_j) * weight(x) / |T| (weight a polynomial dict)."""
    return [[sum((c * mom.moment(tuple(x + y + z for x, y, z in zip(a, b, w)))
                  for w, c in weight.items()), Fraction(0)) for b in mons_b] for a in mons_a]


def _matmul(A, B):
    return [[sum((A[i][l] * B[l][j] for l in range(len(B))), Fraction(0))
             for j in range(len(B[0]))] for i in range(len(A))]


def _transpose(A):
    return [list(r) for r in zip(*A)]


def _derivative(mons, C, r):
    """Coefficients of d/dx_r of the basis on the monomials of degree <= k - 1."""
    dim = len(mons[0])
    k = max(sum(e) for e in mons)
    low = monomials(dim, max(k - 1, 0))
    index = {e: i for i, e in enumerate(low)}
    D = [[Fraction(0)] * len(C[0]) for _ in low]
    for i, e in enumerate(mons):
        if e[r] == 0:
            continue
        f = tuple(v - (j == r) for j, v in enumerate(e))
        for j in range(len(C[0])):
            D[index[f]][j] += e[r] * C[i][j]
    return low, D


def element_matrices(verts, k, tensor=None, mass_coefficient=1, source=1, conductivity=1):
    """Exact element stiffness (constant tensor), mass and load on one simplex.

    Parameters
    ----------
    verts : tuple of rational vertex tuples (``rational_points``)
    k : degree
    tensor : (d, d) nested sequence of numbers (Fractions, ints, "1/3"), or None
    mass_coefficient, source, conductivity : SymPy polynomials in X (or numbers);
        the stiffness integrand is ``conductivity * grad phi_a . tensor grad phi_b``

    Returns
    -------
    nodes (float (n, d)), K, M (float (n, n)), b (float (n,))
    """
    dim = len(verts[0])
    nodes, mons, C = lagrange_basis(verts, k)
    mom = SimplexMoments(verts)
    vol = mom.measure
    Kt = [[Fraction(int(r == s)) for s in range(dim)] for r in range(dim)] if tensor is None \
        else [[Fraction(v) for v in row] for row in tensor]
    n = len(nodes)
    K = [[Fraction(0)] * n for _ in range(n)]
    derivs = [_derivative(mons, C, r) for r in range(dim)]
    low = derivs[0][0]
    G1 = _gram(mom, low, low, _poly_dict(conductivity, dim))
    for r in range(dim):
        left = _matmul(_transpose(derivs[r][1]), G1)
        for s in range(dim):
            if Kt[r][s] == 0:
                continue
            part = _matmul(left, derivs[s][1])
            for a in range(n):
                for b in range(n):
                    K[a][b] += Kt[r][s] * part[a][b]
    Ct = _transpose(C)
    M = _matmul(_matmul(Ct, _gram(mom, mons, mons, _poly_dict(mass_coefficient, dim))), C)
    f = _poly_dict(source, dim)
    bvec = [sum((C[i][a] * c * mom.moment(tuple(x + z for x, z in zip(mons[i], w)))
                 for i in range(len(mons)) for w, c in f.items()), Fraction(0))
            for a in range(n)]
    fl = np.vectorize(float)
    return (fl(np.array(nodes, dtype=object)), vol * fl(np.array(K, dtype=object)),
            vol * fl(np.array(M, dtype=object)), vol * fl(np.array(bvec, dtype=object)))


def facet_matrices(verts, k, facet, coefficient=1):
    """Exact facet mass ``int_F c phi_a phi_b`` and load ``int_F c phi_a``.

    ``facet`` lists the local vertex numbers (into ``verts``) of the facet.
    """
    dim = len(verts[0])
    nodes, mons, C = lagrange_basis(verts, k)
    mom = SimplexMoments(tuple(verts[i] for i in facet))
    Ct = _transpose(C)
    c = _poly_dict(coefficient, dim)
    B = _matmul(_matmul(Ct, _gram(mom, mons, mons, c)), C)
    g = _matmul(Ct, _gram(mom, mons, [(0,) * dim], c))
    fl = np.vectorize(float)
    return (fl(np.array(nodes, dtype=object)), mom.measure * fl(np.array(B, dtype=object)),
            mom.measure * fl(np.array(g, dtype=object))[:, 0])


def match_nodes(ours, theirs, tol=1e-12):
    """Permutation p with ours[p[i]] == theirs[i] (node positions, (n, d))."""
    dist = np.linalg.norm(ours[None, :, :] - theirs[:, None, :], axis=2)
    p = dist.argmin(axis=1)
    assert np.all(dist[np.arange(len(p)), p] <= tol), "node sets differ"
    assert len(set(p.tolist())) == len(p)
    return p


def integrate_box(expr, dim, lower=0, upper=1):
    """Exact integral over the box [lower, upper]^dim (SymPy)."""
    out = sp.sympify(expr)
    for r in range(dim):
        out = sp.integrate(out, (X[r], lower, upper))
    return out


def lambdify(expr, dim):
    """A galerkit-style callable ``f(x)``, x of shape (dim, n) -> (n,)."""
    f = sp.lambdify([X[:dim]], expr, "numpy")

    def call(x):
        return np.broadcast_to(np.asarray(f(list(x)), dtype=float), x.shape[1:]).copy()

    return call


def lambdify_gradient(expr, dim):
    """``grad f(x)`` of shape (dim, n) for a SymPy expression."""
    parts = [lambdify(sp.diff(expr, X[r]), dim) for r in range(dim)]

    def call(x):
        return np.array([p(x) for p in parts])

    return call
