"""Specification of the reference Lagrange elements (galerkit.elements).

The SymPy reference basis is built here independently of Silvester's product
formula used by the kernel: the nodal basis of P_k is the solution of the
Vandermonde system of the monomials x^a y^b (z^c), a + b + c <= k, at the
element's nodes, solved in exact rational arithmetic (reference: SymPy; the
nodal-basis definition is common practice, e.g. Ciarlet, The Finite Element
Method for Elliptic Problems, 1978, section 2.2).
"""

from __future__ import annotations

import itertools
from functools import lru_cache
from math import comb

import numpy as np
import pytest
import sympy as sp
from sympy.polys.matrices import DomainMatrix

from galerkit.elements import (
    REFERENCE_EDGES,
    REFERENCE_FACES,
    REFERENCE_FACETS,
    LagrangeElement,
    lagrange_element,
)
from galerkit.errors import InputError

CASES = [(d, k) for d in (2, 3) for k in (1, 2, 3, 4)]
IDS = [f"P{k}-{d}D" for d, k in CASES]


def random_simplex_points(rng, dim, n):
    """Uniform random points strictly inside the reference simplex, (n, dim)."""
    lam = rng.dirichlet(np.ones(dim + 1), size=n)
    return np.ascontiguousarray(lam[:, 1:])


@lru_cache(maxsize=None)
def sympy_basis(dim, degree):
    """Nodal basis and its gradients as SymPy polynomials (Vandermonde solve).

    Returns (symbols, basis, gradients) with basis[j] the polynomial equal to
    1 at node j and 0 at the others, gradients[j][r] = d basis[j] / d x_r.
    """
    el = lagrange_element(dim, degree)
    X = sp.symbols(f"x0:{dim}")
    E = [e for e in itertools.product(range(degree + 1), repeat=dim) if sum(e) <= degree]
    # nodes in exact arithmetic, from the barycentric multi-indices
    nodes = [[sp.Rational(int(a), degree) for a in row[1:]] for row in el.multi_indices]
    V = sp.Matrix([[sp.prod([n[r] ** e[r] for r in range(dim)]) for e in E] for n in nodes])
    Vinv = DomainMatrix.from_Matrix(V).convert_to(sp.QQ).inv().to_Matrix()
    monomials = sp.Matrix([sp.prod([X[r] ** e[r] for r in range(dim)]) for e in E])
    basis = [sp.Poly(sp.expand((Vinv[:, j].T * monomials)[0]), *X) for j in range(len(E))]
    grads = [[b.diff(x) for x in X] for b in basis]
    return X, basis, grads


RATIONAL_POINTS = {
    2: [(sp.Rational(1, 7), sp.Rational(2, 9)), (sp.Rational(3, 5), sp.Rational(1, 4)),
        (sp.Rational(1, 3), sp.Rational(1, 3)), (sp.Rational(0), sp.Rational(5, 11))],
    3: [(sp.Rational(1, 7), sp.Rational(2, 9), sp.Rational(1, 5)),
        (sp.Rational(3, 5), sp.Rational(1, 8), sp.Rational(1, 6)),
        (sp.Rational(1, 4), sp.Rational(1, 4), sp.Rational(1, 4)),
        (sp.Rational(0), sp.Rational(5, 11), sp.Rational(2, 13))],
}


def _eval(poly, point):
    return float(poly.eval(dict(zip(poly.gens, point)))) if poly.gens else float(poly)


# -- counts and node layout -------------------------------------------------------
@pytest.mark.parametrize("dim,degree", CASES, ids=IDS)
def test_number_of_basis_functions_is_binomial_k_plus_d_over_d(dim, degree):
    el = lagrange_element(dim, degree)
    assert el.n_local == comb(degree + dim, dim)  # dim P_k (common practice)
    assert el.nodes.shape == (el.n_local, dim)
    assert el.multi_indices.shape == (el.n_local, dim + 1)
    assert np.all(el.multi_indices.sum(axis=1) == degree)
    assert len({tuple(a) for a in el.multi_indices.tolist()}) == el.n_local


@pytest.mark.parametrize("dim,degree", CASES, ids=IDS)
def test_nodes_are_equispaced_at_multi_index_over_degree(dim, degree):
    el = lagrange_element(dim, degree)
    np.testing.assert_allclose(el.nodes, el.multi_indices[:, 1:] / degree, rtol=0, atol=1e-15)


@pytest.mark.parametrize("dim,degree", CASES, ids=IDS)
def test_local_node_order_is_vertices_then_edges_then_faces_then_interior(dim, degree):
    el = lagrange_element(dim, degree)
    verts = np.vstack([np.zeros(dim), np.eye(dim)])
    np.testing.assert_array_equal(el.nodes[: dim + 1], verts)
    owners = [tuple(o) for o in el.node_entity.tolist()]
    assert owners == sorted(owners), "nodes must be grouped by entity dimension, then id"
    entities = {0: [(i,) for i in range(dim + 1)], 1: list(REFERENCE_EDGES[dim]),
                dim: [tuple(range(dim + 1))]}
    if dim == 3:
        entities[2] = list(REFERENCE_FACES[3])
    for node, (edim, eid) in enumerate(owners):
        ev = entities[edim][eid]
        a = el.multi_indices[node]
        # the node is interior to its entity: positive exactly on its vertices
        assert set(np.flatnonzero(a).tolist()) == set(ev)
    # within one entity, the multi-indices restricted to its vertices ascend
    for edim, ents in entities.items():
        for eid, ev in enumerate(ents):
            rows = [n for n, o in enumerate(owners) if o == (edim, eid)]
            restricted = [tuple(el.multi_indices[n, list(ev)]) for n in rows]
            assert restricted == sorted(restricted)


# -- nodal basis properties -----------------------------------------------------------
@pytest.mark.parametrize("dim,degree", CASES, ids=IDS)
def test_basis_is_a_partition_of_unity(dim, degree):
    rng = np.random.default_rng(10 * dim + degree)
    p = random_simplex_points(rng, dim, 50)
    phi = lagrange_element(dim, degree).tabulate(p)
    np.testing.assert_allclose(phi.sum(axis=1), 1.0, rtol=0, atol=1e-13)


@pytest.mark.parametrize("dim,degree", CASES, ids=IDS)
def test_basis_is_one_at_its_own_node_and_zero_at_the_others(dim, degree):
    el = lagrange_element(dim, degree)
    phi = el.tabulate(el.nodes)
    np.testing.assert_allclose(phi, np.eye(el.n_local), rtol=0, atol=1e-13)


@pytest.mark.parametrize("dim,degree", CASES, ids=IDS)
def test_gradients_sum_to_zero(dim, degree):
    rng = np.random.default_rng(20 * dim + degree)
    p = random_simplex_points(rng, dim, 50)
    g = lagrange_element(dim, degree).tabulate_gradients(p)
    assert g.shape == (50, comb(degree + dim, dim), dim)
    scale = np.abs(g).max()
    np.testing.assert_allclose(g.sum(axis=1), 0.0, rtol=0, atol=1e-13 * scale)


@pytest.mark.parametrize("dim,degree", CASES, ids=IDS)
def test_gradients_agree_with_central_differences_of_values(dim, degree):
    # a self-consistency check between tabulate and tabulate_gradients;
    # central differences of a polynomial of degree <= 4 have error O(h^2)
    el = lagrange_element(dim, degree)
    rng = np.random.default_rng(30 * dim + degree)
    p = 0.2 + 0.5 * random_simplex_points(rng, dim, 10)
    h = 1e-5
    g = el.tabulate_gradients(p)
    for r in range(dim):
        e = np.zeros(dim)
        e[r] = h
        fd = (el.tabulate(p + e) - el.tabulate(p - e)) / (2 * h)
        np.testing.assert_allclose(g[:, :, r], fd, rtol=0, atol=1e-6 * max(1.0, np.abs(g).max()))


@pytest.mark.parametrize("dim,degree", CASES, ids=IDS)
def test_values_match_the_sympy_vandermonde_basis(dim, degree):
    # reference: SymPy (exact rational Vandermonde solve, see module docstring)
    el = lagrange_element(dim, degree)
    _, basis, _ = sympy_basis(dim, degree)
    pts = RATIONAL_POINTS[dim]
    got = el.tabulate(np.array([[float(c) for c in p] for p in pts]))
    want = np.array([[_eval(b, p) for b in basis] for p in pts])
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-12)


@pytest.mark.parametrize("dim,degree", CASES, ids=IDS)
def test_gradients_match_the_differentiated_sympy_basis(dim, degree):
    # reference: SymPy (symbolic derivatives of the Vandermonde basis)
    el = lagrange_element(dim, degree)
    _, _, grads = sympy_basis(dim, degree)
    pts = RATIONAL_POINTS[dim]
    got = el.tabulate_gradients(np.array([[float(c) for c in p] for p in pts]))
    want = np.array([[[_eval(g, p) for g in gj] for gj in grads] for p in pts])
    scale = max(1.0, np.abs(want).max())
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-12 * scale)


@pytest.mark.parametrize("dim,degree", CASES, ids=IDS)
def test_basis_functions_off_a_facet_vanish_on_that_facet(dim, degree):
    el = lagrange_element(dim, degree)
    rng = np.random.default_rng(40 * dim + degree)
    assert el.facet_nodes.shape == (dim + 1, comb(degree + dim - 1, dim - 1))
    for i in range(dim + 1):
        # random points on facet i: barycentric coordinate i equal to zero
        lam = rng.dirichlet(np.ones(dim), size=20)
        lam = np.insert(lam, i, 0.0, axis=1)
        phi = el.tabulate(lam[:, 1:])
        off = np.setdiff1d(np.arange(el.n_local), el.facet_nodes[i])
        np.testing.assert_allclose(phi[:, off], 0.0, rtol=0, atol=1e-13)
        # and the facet's own functions are a partition of unity there
        np.testing.assert_allclose(phi[:, el.facet_nodes[i]].sum(axis=1), 1.0, atol=1e-13)
        # facet i is opposite vertex i: its nodes are those with alpha_i == 0
        np.testing.assert_array_equal(
            el.facet_nodes[i], np.flatnonzero(el.multi_indices[:, i] == 0)
        )
        assert i not in el.facet_nodes[i]
        assert set(REFERENCE_FACETS[dim][i]) <= set(el.facet_nodes[i].tolist())


def test_lagrange_element_is_cached_and_is_a_lagrange_element():
    assert lagrange_element(3, 2) is lagrange_element(3, 2)
    assert isinstance(lagrange_element(2, 1), LagrangeElement)


# -- bad input ---------------------------------------------------------------------
@pytest.mark.parametrize("dim", [1, 4, 0, 2.0, "3"])
def test_unsupported_dimension_raises_input_error(dim):
    with pytest.raises(InputError, match="dim"):
        LagrangeElement(dim, 1)


@pytest.mark.parametrize("degree", [0, 5, -1, 1.5, 2.0, True, "2"])
def test_unsupported_degree_raises_input_error_listing_the_choices(degree):
    with pytest.raises(InputError, match=r"degree .* not supported"):
        LagrangeElement(2, degree)


def test_reference_points_of_the_wrong_shape_raise_input_error():
    el = lagrange_element(3, 2)
    with pytest.raises(InputError, match=r"shape \(n_points, 3\)"):
        el.tabulate(np.zeros((4, 2)))
    with pytest.raises(InputError, match="shape"):
        el.tabulate_gradients(np.zeros(3))


def test_non_finite_reference_points_raise_input_error():
    el = lagrange_element(2, 3)
    with pytest.raises(InputError, match="NaN"):
        el.tabulate(np.array([[0.1, np.nan]]))
    with pytest.raises(InputError, match="NaN"):
        el.tabulate_gradients(np.array([[np.inf, 0.1]]))
