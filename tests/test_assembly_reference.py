"""Element and assembled matrices of P1-P4 against an independent construction.

Reference (tests/reference.py, no galerkit code): the nodal Lagrange basis on
the *physical* cell from the monomial Vandermonde system in exact rationals
(Ciarlet 1978, sec. 2.2), integrated exactly with the simplex monomial
formula int_T lambda^alpha = d! |T| alpha! / (|alpha| + d)! (Stroud 1971).
galerkit builds its basis on the reference cell (Silvester's products) and
integrates with its own quadrature, so agreement checks both.

Tolerances: with constant coefficients galerkit integrates exactly (degree
2k - 2 stiffness, 2k mass); with the polynomial coefficients below the
default rules (degree 2k + 1 cell, 2k + 1 facet for callables) are exact too,
so only rounding remains: 1e-12 of the largest entry (a few hundred
operations of relative error 1.1e-16 each, with room).

Local node order is not compared: nodes are matched by physical position.
"""

from __future__ import annotations

import numpy as np
import pytest
import sympy as sp

import reference as ref
from galerkit import Assembler, Discretization, Mesh

X = ref.X

# non-reference cells, no edge parallel to an axis, rational vertices
TRI = (("1/3", "1/5"), ("2", "1/2"), ("1/2", "7/4"))
TET = (("1/3", "1/5", "0"), ("2", "1/2", "1/7"), ("1/2", "7/4", "1/3"), ("1/4", "1/3", "3/2"))
# a second cell on the facet of vertices 1, 2 (3D: 1, 2, 3), on the other side
TRI2 = TRI[1:] + (("9/4", "2"),)
TET2 = TET[1:] + (("2", "2", "9/5"),)
TENSOR = {2: [[2, sp.Rational(1, 3)], [sp.Rational(1, 3), 1]],
          3: [[2, sp.Rational(1, 3), 0], [sp.Rational(1, 3), 1, sp.Rational(-1, 4)],
              [0, sp.Rational(-1, 4), 3]]}
CASES = [(d, k) for d in (2, 3) for k in (1, 2, 3, 4)]


def cell_mesh(verts_list):
    pts, cells = [], []
    for verts in verts_list:
        row = []
        for v in verts:
            p = tuple(float(sp.Rational(c)) for c in v)
            if p not in pts:
                pts.append(p)
            row.append(pts.index(p))
        cells.append(row)
    return Mesh(np.array(pts), np.array(cells))


def rational(verts):
    return ref.rational_points([[sp.Rational(c) for c in v] for v in verts])


def assert_close(got, want):
    scale = np.abs(want).max()
    assert np.abs(got - want).max() <= 1e-12 * scale, np.abs(got - want).max() / scale


def perm(disc, nodes):
    return ref.match_nodes(disc.dof_points, nodes)


def dense(A, p):
    return A.toarray()[np.ix_(p, p)]


def kappa1(x):  # the callables below are the SymPy polynomials, in galerkit's convention
    return 1.0 + x[0] + 2.0 * x[1]


KAPPA1 = 1 + X[0] + 2 * X[1]


@pytest.mark.parametrize("dim, k", CASES)
def test_element_stiffness_mass_load_equal_exact_integrals_of_an_independent_basis(dim, k):
    verts = TRI if dim == 2 else TET
    mesh = cell_mesh([verts])
    disc = Discretization(mesh, k)
    asm = Assembler(disc)
    V = rational(verts)
    # constant coefficients and a constant tensor
    nodes, K, M, b = ref.element_matrices(V, k)
    p = perm(disc, nodes)
    assert_close(dense(asm.stiffness(), p), K)
    assert_close(dense(asm.stiffness(np.array([2.5])), p), 2.5 * K)  # one value per cell
    assert_close(dense(asm.mass(), p), M)
    assert_close(asm.load(1.0)[p], b)
    _, Kt, _, _ = ref.element_matrices(V, k, tensor=TENSOR[dim])
    T = np.array(TENSOR[dim], dtype=float)
    assert_close(dense(asm.stiffness(T), p), Kt)
    assert_close(dense(asm.stiffness(T[None]), p), Kt)  # one tensor per cell
    # polynomial coefficients given as callables: kappa and c of degree 1, f of degree k + 1
    f = X[0] ** (k + 1) - 3 * X[0] * X[1] + sp.Rational(1, 2)
    _, Kc, Mc, bc = ref.element_matrices(V, k, mass_coefficient=KAPPA1, source=f,
                                         conductivity=KAPPA1)
    f_call = ref.lambdify(f, dim)
    assert_close(dense(asm.stiffness(kappa1), p), Kc)
    assert_close(dense(asm.mass(kappa1), p), Mc)
    assert_close(asm.load(f_call)[p], bc)
    # the load of a dof vector is M times it
    w = np.cos(np.arange(disc.n_dofs, dtype=float))
    assert_close(asm.load(w)[p], M @ w[p])


@pytest.mark.parametrize("dim, k", CASES)
def test_facet_mass_and_load_equal_exact_surface_integrals(dim, k):
    verts = TRI if dim == 2 else TET
    mesh = cell_mesh([verts])
    facet = (1, 2) if dim == 2 else (1, 2, 3)
    vid = sorted(mesh.cells[0][list(facet)].tolist())
    fid = [i for i, f in enumerate(mesh.boundary_facets) if sorted(f.tolist()) == vid]
    mesh.set_facet_tag("far", fid)
    disc = Discretization(mesh, k)
    asm = Assembler(disc)
    V = rational(verts)
    nodes, B, g = ref.facet_matrices(V, k, facet)
    p = perm(disc, nodes)
    assert_close(dense(asm.boundary_mass("far", 3.0), p), 3.0 * B)
    assert_close(asm.boundary_load("far", -2.0)[p], -2.0 * g)
    _, Bc, gc = ref.facet_matrices(V, k, facet, coefficient=KAPPA1)
    assert_close(dense(asm.boundary_mass("far", kappa1), p), Bc)
    assert_close(asm.boundary_load("far", kappa1)[p], gc)


@pytest.mark.parametrize("dim, k", [(2, 3), (2, 4), (3, 2), (3, 3)])
def test_two_cell_matrices_are_the_sums_of_the_element_matrices(dim, k):
    # assembly is the sum of the element matrices over shared nodes (any FEM text,
    # e.g. Hughes 2000, ch. 1): checks the dof numbering of shared edges/faces too
    cells = [TRI, TRI2] if dim == 2 else [TET, TET2]
    mesh = cell_mesh(cells)
    disc = Discretization(mesh, k)
    asm = Assembler(disc)
    pts = disc.dof_points
    Kw, Mw = np.zeros((disc.n_dofs,) * 2), np.zeros((disc.n_dofs,) * 2)
    T = np.array(TENSOR[dim], dtype=float)
    scale = (1.0, 3.0)  # one tensor per cell: T on the first, 3 T on the second
    for verts, c in zip(cells, scale):
        nodes, K, M, _ = ref.element_matrices(rational(verts), k, tensor=TENSOR[dim])
        p = ref.match_nodes(pts, nodes)
        Kw[np.ix_(p, p)] += c * K
        Mw[np.ix_(p, p)] += M
    assert_close(asm.stiffness(np.array([c * T for c in scale])).toarray(), Kw)
    assert_close(asm.mass().toarray(), Mw)
