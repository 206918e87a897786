"""Specification of the reference-simplex quadrature rules (galerkit.quadrature).

The reference values are the exact monomial integrals over the unit simplex
with vertices 0, e_1, ..., e_d,

    int x^a y^b z^c = a! b! c! / (a + b + c + d)!,

(Stroud, Approximate Calculation of Multiple Integrals, 1971, section 2.7;
the Dirichlet integral).  They are computed here in exact rational arithmetic
and rounded once to float64.
"""

from __future__ import annotations

import itertools
from fractions import Fraction
from math import factorial

import numpy as np
import pytest

from galerkit.errors import InputError
from galerkit.quadrature import (
    CLASSICAL_RULES,
    MAX_DEGREE,
    QuadratureRule,
    gauss_jacobi_rule,
    simplex_quadrature,
)

DIMS = (1, 2, 3)
DEGREES = tuple(range(0, 13))
RTOL = 1e-13


def exponents(dim, degree):
    """All exponent tuples of total degree <= degree, shape (n, dim)."""
    return np.array(
        [e for e in itertools.product(range(degree + 1), repeat=dim) if sum(e) <= degree],
        dtype=np.int64,
    )


def exact_monomial_integral(e):
    """a! b! c! / (a + b + c + d)!  (Stroud 1971), as an exact fraction."""
    num = 1
    for a in e:
        num *= factorial(int(a))
    return Fraction(num, factorial(int(sum(e)) + len(e)))


def assert_exact_to(points, weights, dim, degree):
    points = np.asarray(points, dtype=np.float64)
    weights = np.asarray(weights, dtype=np.float64)
    E = exponents(dim, degree)
    # values[q, j] = prod_r x_r(q) ** E[j, r]
    values = np.prod(points[:, None, :] ** E[None, :, :], axis=2)
    approx = weights @ values
    exact = np.array([float(exact_monomial_integral(e)) for e in E])
    rel = np.abs(approx - exact) / exact
    worst = int(np.argmax(rel))
    assert rel[worst] <= RTOL, (
        f"dim {dim}: monomial with exponents {E[worst].tolist()} integrates to "
        f"{approx[worst]!r}, exact {exact[worst]!r} (relative error {rel[worst]:.2e})"
    )


def assert_valid_rule(points, weights, dim):
    points = np.asarray(points, dtype=np.float64)
    weights = np.asarray(weights, dtype=np.float64)
    assert points.ndim == 2 and points.shape[1] == dim
    assert weights.shape == (points.shape[0],)
    assert np.all(weights > 0.0), "weights must be positive"
    # strictly inside: every barycentric coordinate positive
    bary = np.concatenate([1.0 - points.sum(axis=1, keepdims=True), points], axis=1)
    assert np.all(bary > 0.0), "a point lies on or outside the reference simplex"
    # the weights integrate the constant 1: the simplex volume 1/d!
    assert abs(weights.sum() - 1.0 / factorial(dim)) <= 1e-15


# -- simplex_quadrature ---------------------------------------------------------
@pytest.mark.parametrize("dim", DIMS)
@pytest.mark.parametrize("degree", DEGREES)
def test_simplex_quadrature_integrates_every_monomial_of_its_degree_exactly(dim, degree):
    rule = simplex_quadrature(dim, degree)
    assert isinstance(rule, QuadratureRule)
    assert rule.dim == dim
    assert rule.degree >= degree
    # exact up to the degree the rule claims, which covers the degree asked
    assert_exact_to(rule.points, rule.weights, dim, rule.degree)


@pytest.mark.parametrize("dim", DIMS)
@pytest.mark.parametrize("degree", DEGREES)
def test_simplex_quadrature_has_positive_weights_and_interior_points(dim, degree):
    rule = simplex_quadrature(dim, degree)
    assert_valid_rule(rule.points, rule.weights, dim)
    assert rule.n_points == rule.weights.shape[0]


@pytest.mark.parametrize("dim", DIMS)
@pytest.mark.parametrize("degree", DEGREES)
def test_simplex_quadrature_is_never_larger_than_the_gauss_jacobi_rule(dim, degree):
    # "cheapest rule here": never more points than the conical product rule
    assert simplex_quadrature(dim, degree).n_points <= gauss_jacobi_rule(dim, degree).n_points


# -- gauss_jacobi_rule ----------------------------------------------------------
@pytest.mark.parametrize("dim", DIMS)
@pytest.mark.parametrize("degree", DEGREES)
def test_gauss_jacobi_rule_integrates_every_monomial_of_its_degree_exactly(dim, degree):
    rule = gauss_jacobi_rule(dim, degree)
    assert rule.dim == dim and rule.degree == degree
    assert_exact_to(rule.points, rule.weights, dim, degree)


@pytest.mark.parametrize("dim", DIMS)
@pytest.mark.parametrize("degree", DEGREES)
def test_gauss_jacobi_rule_has_positive_weights_and_interior_points(dim, degree):
    rule = gauss_jacobi_rule(dim, degree)
    assert_valid_rule(rule.points, rule.weights, dim)
    # ceil((degree + 1) / 2) points per direction (Stroud 1971, conical product)
    n = max(1, -(-(degree + 1) // 2))
    assert rule.n_points == n**dim


@pytest.mark.parametrize("dim", DIMS)
def test_gauss_jacobi_rule_is_not_exact_one_degree_beyond_its_points(dim):
    # With n points per direction the 1D Gauss-Jacobi factor is exact to
    # degree 2n - 1 and no further; x_1^(2n) is therefore not integrated
    # exactly.  This guards the exactness test above against a rule so large
    # that it would pass any degree.
    degree = 5  # n = 3 points per direction, exact to 5
    rule = gauss_jacobi_rule(dim, degree)
    e = [0] * dim
    e[0] = 6
    approx = float(rule.weights @ rule.points[:, 0] ** 6)
    exact = float(exact_monomial_integral(e))
    assert abs(approx - exact) / exact > 1e-8


# -- CLASSICAL_RULES --------------------------------------------------------------
CLASSICAL = sorted(CLASSICAL_RULES)


@pytest.mark.parametrize("key", CLASSICAL, ids=[f"dim{d}-deg{p}" for d, p in CLASSICAL])
def test_classical_rule_integrates_every_monomial_of_its_degree_exactly(key):
    dim, degree = key
    points, weights = CLASSICAL_RULES[key]()
    assert_exact_to(points, weights, dim, degree)


@pytest.mark.parametrize("key", CLASSICAL, ids=[f"dim{d}-deg{p}" for d, p in CLASSICAL])
def test_classical_rule_has_positive_weights_and_interior_points(key):
    dim, _ = key
    points, weights = CLASSICAL_RULES[key]()
    assert_valid_rule(points, weights, dim)


@pytest.mark.parametrize("key", CLASSICAL, ids=[f"dim{d}-deg{p}" for d, p in CLASSICAL])
def test_classical_rule_points_are_distinct(key):
    points, _ = CLASSICAL_RULES[key]()
    points = np.asarray(points)
    diff = np.abs(points[:, None, :] - points[None, :, :]).max(axis=2)
    np.fill_diagonal(diff, np.inf)
    assert diff.min() > 1e-8


def test_known_point_counts_of_the_classical_rules():
    # Radon's 7-point degree-5 triangle rule and the 4-point degree-2
    # tetrahedron rule (Stroud 1971, T2:5-1 and T3:2-1; counts from memory)
    assert len(CLASSICAL_RULES[(2, 5)]()[1]) == 7
    assert len(CLASSICAL_RULES[(3, 2)]()[1]) == 4
    assert simplex_quadrature(2, 5).n_points == 7
    assert simplex_quadrature(3, 2).n_points == 4


# -- bad input ----------------------------------------------------------------------
@pytest.mark.parametrize("make", [simplex_quadrature, gauss_jacobi_rule])
@pytest.mark.parametrize("dim", [0, 4, -1, 2.5, 2.0, True, "2"])
def test_bad_dimension_raises_input_error_naming_dim(make, dim):
    with pytest.raises(InputError, match="dim"):
        make(dim, 2)


@pytest.mark.parametrize("make", [simplex_quadrature, gauss_jacobi_rule])
@pytest.mark.parametrize("degree", [-1, MAX_DEGREE + 1, 2.0, 1.5, True, "3", None])
def test_bad_degree_raises_input_error_naming_degree(make, degree):
    with pytest.raises(InputError, match="degree"):
        make(2, degree)


def test_input_error_is_a_value_error():
    with pytest.raises(ValueError):
        simplex_quadrature(5, 1)


def test_highest_supported_degree_is_accepted():
    rule = gauss_jacobi_rule(1, MAX_DEGREE)
    assert_valid_rule(rule.points, rule.weights, 1)
