"""Quadrature rules on the reference simplex.

The reference simplex in dimension ``d`` has the vertices ``0, e_1, ..., e_d``
(the interval [0, 1], the triangle (0,0)-(1,0)-(0,1), the tetrahedron
(0,0,0)-(1,0,0)-(0,1,0)-(0,0,1)); its volume is ``1/d!``.

Two kinds of rule live here, both with positive weights and points strictly
inside the simplex:

* classical symmetric rules for low degrees (cheaper), kept in one table,
  ``CLASSICAL_RULES``, keyed by ``(dim, degree)``;
* collapsed-coordinate Gauss--Jacobi products (Stroud's conical product rule,
  Stroud 1971, ch. 2.7) exact to any requested degree, built from
  :func:`scipy.special.roots_jacobi`.

:func:`simplex_quadrature` picks the cheapest rule exact for the degree asked.
Adding a classical rule is one entry in ``CLASSICAL_RULES`` (the tests then
check it against the exact monomial integrals automatically).
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache
from math import factorial

import numpy as np
from scipy.special import roots_jacobi

from .errors import InputError

__all__ = [
    "QuadratureRule",
    "simplex_quadrature",
    "gauss_jacobi_rule",
    "CLASSICAL_RULES",
    "MAX_DEGREE",
]

MAX_DEGREE = 40


@dataclass(frozen=True)
class QuadratureRule:
    """Points and weights on the reference simplex.

    Attributes
    ----------
    dim : int
        Dimension of the simplex (1, 2 or 3).
    degree : int
        Polynomials of total degree up to ``degree`` are integrated exactly.
    points : ndarray, shape (n_points, dim), float64
        Reference coordinates, strictly inside the simplex.
    weights : ndarray, shape (n_points,), float64
        Positive weights summing to the simplex volume ``1/dim!``.
    name : str
        Where the rule comes from.
    """

    dim: int
    degree: int
    points: np.ndarray
    weights: np.ndarray
    name: str

    @property
    def n_points(self) -> int:
        return self.weights.shape[0]


def _symmetric_rule(weight_orbits, volume):
    """Expand barycentric orbits of a symmetric rule on the simplex.

    ``weight_orbits`` is a list of ``(w, barycentric point)``: every distinct
    permutation of the point gets the weight ``w`` (weights are relative to
    volume 1 and are scaled to the reference volume ``volume``).
    """
    pts, wts = [], []
    for w, bary in weight_orbits:
        for p in sorted(set(_permutations(bary))):
            pts.append(p[1:])
            wts.append(w * volume)
    return np.array(pts, dtype=np.float64), np.array(wts, dtype=np.float64)


def _sym_tri(weight_orbits):
    return _symmetric_rule(weight_orbits, 0.5)


def _sym_tet(weight_orbits):
    return _symmetric_rule(weight_orbits, 1.0 / 6.0)


def _permutations(t):
    import itertools

    return itertools.permutations(t)


def _radon7():
    # Radon's 7-point degree-5 rule on the triangle (Stroud 1971, T2:5-1;
    # values recalled from memory, checked by the monomial tests).
    s15 = np.sqrt(15.0)
    a1 = (6.0 - s15) / 21.0
    a2 = (6.0 + s15) / 21.0
    w1 = (155.0 - s15) / 1200.0
    w2 = (155.0 + s15) / 1200.0
    return _sym_tri(
        [
            (9.0 / 40.0, (1 / 3, 1 / 3, 1 / 3)),
            (w1, (a1, a1, 1 - 2 * a1)),
            (w2, (a2, a2, 1 - 2 * a2)),
        ]
    )


def _tet4():
    # 4-point degree-2 rule on the tetrahedron (Stroud 1971, T3:2-1;
    # recalled from memory, checked by the monomial tests).
    a = (5.0 - np.sqrt(5.0)) / 20.0
    return _sym_tet([(0.25, (a, a, a, 1 - 3 * a))])


#: (dim, degree) -> zero-argument function returning (points, weights).
CLASSICAL_RULES = {
    (1, 1): lambda: (np.array([[0.5]]), np.array([1.0])),
    (2, 1): lambda: (np.array([[1 / 3, 1 / 3]]), np.array([0.5])),
    # Interior 3-point rule at barycentric (2/3, 1/6, 1/6), degree 2 (Strang & Fix
    # 1973, table 4.1; recalled from memory, checked by the monomial tests).
    (2, 2): lambda: _sym_tri([(1 / 3, (2 / 3, 1 / 6, 1 / 6))]),
    (2, 5): _radon7,
    (3, 1): lambda: (np.array([[0.25, 0.25, 0.25]]), np.array([1 / 6])),
    (3, 2): _tet4,
}


def _gauss_jacobi_1d(n, alpha):
    """n-point Gauss--Jacobi rule on [0, 1] for the weight (1 - t)^alpha."""
    x, w = roots_jacobi(n, alpha, 0.0)
    t = (x + 1.0) / 2.0
    w = w / 2.0 ** (alpha + 1.0)
    return t, w


# typed=True: an untyped cache treats (2, 2.0) as the key (2, 2) and would
# return a cached rule without running _check on the float degree.
@lru_cache(maxsize=None, typed=True)
def gauss_jacobi_rule(dim: int, degree: int) -> QuadratureRule:
    """Collapsed-coordinate Gauss--Jacobi rule exact to ``degree``.

    Stroud's conical product (Stroud 1971): the simplex is the image of the
    unit cube under the Duffy collapse; the Jacobian factors become Jacobi
    weights, so ``ceil((degree + 1) / 2)`` points per direction suffice.

    Parameters
    ----------
    dim : int
        1, 2 or 3.
    degree : int
        Requested exactness degree, ``0 <= degree <= MAX_DEGREE``.

    Returns
    -------
    QuadratureRule
        With ``n**dim`` points.

    Examples
    --------
    >>> r = gauss_jacobi_rule(2, 3)
    >>> r.n_points, round(float(r.weights.sum()), 15)
    (4, 0.5)
    """
    _check(dim, degree)
    n = max(1, (degree + 2) // 2)
    if dim == 1:
        t, w = _gauss_jacobi_1d(n, 0.0)
        pts, wts = t[:, None], w
    elif dim == 2:
        # x = s (1 - t) ... collapse: x1 = u, x2 = v (1 - u); dA = (1 - u) du dv
        u, wu = _gauss_jacobi_1d(n, 1.0)
        v, wv = _gauss_jacobi_1d(n, 0.0)
        U, V = np.meshgrid(u, v, indexing="ij")
        W = np.outer(wu, wv)
        pts = np.stack([U.ravel(), (V * (1.0 - U)).ravel()], axis=1)
        wts = W.ravel()
    else:
        u, wu = _gauss_jacobi_1d(n, 2.0)
        v, wv = _gauss_jacobi_1d(n, 1.0)
        s, ws = _gauss_jacobi_1d(n, 0.0)
        U, V, S = np.meshgrid(u, v, s, indexing="ij")
        W = wu[:, None, None] * wv[None, :, None] * ws[None, None, :]
        x1 = U
        x2 = V * (1.0 - U)
        x3 = S * (1.0 - U) * (1.0 - V)
        pts = np.stack([x1.ravel(), x2.ravel(), x3.ravel()], axis=1)
        wts = W.ravel()
    return QuadratureRule(
        dim, degree, np.ascontiguousarray(pts), np.ascontiguousarray(wts),
        f"Gauss-Jacobi conical product, {n} points per direction",
    )


def _check(dim, degree):
    # integers only: 2.0 and True compare equal to 2 and 1 and would slip
    # through a plain ``in`` test or range test.
    def _is_int(v):
        return isinstance(v, (int, np.integer)) and not isinstance(v, (bool, np.bool_))

    if not _is_int(dim) or dim not in (1, 2, 3):
        raise InputError(f"quadrature: dim must be 1, 2 or 3, got {dim!r}")
    if not _is_int(degree) or degree < 0 or degree > MAX_DEGREE:
        raise InputError(
            f"quadrature: degree must be an integer in 0..{MAX_DEGREE}, got {degree!r}"
        )


@lru_cache(maxsize=None, typed=True)  # typed: see gauss_jacobi_rule
def simplex_quadrature(dim: int, degree: int) -> QuadratureRule:
    """The cheapest rule here that is exact for polynomials of ``degree``.

    Parameters
    ----------
    dim : int
        Dimension of the reference simplex: 1, 2 or 3.
    degree : int
        Total polynomial degree to integrate exactly (0..MAX_DEGREE).

    Returns
    -------
    QuadratureRule

    Raises
    ------
    InputError
        For a dimension or degree out of range.

    Examples
    --------
    >>> rule = simplex_quadrature(3, 2)
    >>> rule.n_points, rule.name.split()[0]
    (4, 'classical')
    >>> float(simplex_quadrature(2, 7).weights.sum())
    0.5
    """
    _check(dim, degree)
    best = None
    for (d, p), make in CLASSICAL_RULES.items():
        if d == dim and p >= max(degree, 1):
            pts, wts = make()
            if best is None or len(wts) < best[1].shape[0] or (
                len(wts) == best[1].shape[0] and p < best[2]
            ):
                best = (pts, wts, p)
    gj = gauss_jacobi_rule(dim, degree)
    if best is not None and best[1].shape[0] <= gj.n_points:
        pts, wts, p = best
        return QuadratureRule(
            dim, p, np.ascontiguousarray(pts, dtype=np.float64),
            np.ascontiguousarray(wts, dtype=np.float64),
            f"classical symmetric rule of degree {p}",
        )
    return gj
