"""Reference Lagrange elements of degree 1 to 4 on the triangle and tetrahedron.

Nodes are equispaced: the node with barycentric multi-index ``alpha``
(``alpha_i >= 0``, ``sum(alpha) = k``) sits at barycentric coordinates
``alpha / k``.  The basis is Silvester's closed form (Silvester 1969,
"Higher-order polynomial triangular finite elements for potential problems")

    phi_alpha(lambda) = prod_i R_{alpha_i}(lambda_i),
    R_m(s) = prod_{j=0}^{m-1} (k s - j) / (j + 1),

a product of univariate factors in the barycentric coordinates.  It needs no
Vandermonde inversion, so its accuracy does not degrade with the degree
(the well-conditioned construction the design asks for).

Local node order (fixed; the dof numbering and the assembler rely on it):
vertices 0..d, then the interior nodes of each edge in ``REFERENCE_EDGES``
order, then of each face in ``REFERENCE_FACES`` order (3D), then the cell
interior.  Within one entity the interior multi-indices, restricted to the
entity's vertices, come in ascending lexicographic order.  Facet ``i`` is the
one opposite vertex ``i``.

The reference simplex has vertices ``0, e_1, ..., e_d``; barycentric
coordinates are ``lambda_0 = 1 - sum(x)``, ``lambda_i = x_i``.
"""

from __future__ import annotations

import itertools
from functools import lru_cache

import numpy as np

from .errors import InputError

__all__ = [
    "LagrangeElement",
    "lagrange_element",
    "SUPPORTED_DEGREES",
    "REFERENCE_EDGES",
    "REFERENCE_FACES",
    "REFERENCE_FACETS",
]

SUPPORTED_DEGREES = (1, 2, 3, 4)

#: local edges (vertex pairs); in 2D edge i is opposite vertex i.
REFERENCE_EDGES = {
    2: ((1, 2), (0, 2), (0, 1)),
    3: ((0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3)),
}
#: local faces of the tetrahedron; face i is opposite vertex i.
REFERENCE_FACES = {3: ((1, 2, 3), (0, 2, 3), (0, 1, 3), (0, 1, 2))}
#: local facets (dimension d-1), facet i opposite vertex i.
REFERENCE_FACETS = {2: REFERENCE_EDGES[2], 3: REFERENCE_FACES[3]}


def interior_tuples(n_vertices: int, degree: int):
    """Tuples of ``n_vertices`` positive integers summing to ``degree``.

    These are the interior nodes of an entity with that many vertices, in
    ascending lexicographic order.
    """
    out = [t for t in itertools.product(range(1, degree + 1), repeat=n_vertices)
           if sum(t) == degree]
    return sorted(out)


class LagrangeElement:
    """Continuous Lagrange element of degree ``degree`` on the reference simplex.

    Parameters
    ----------
    dim : int
        2 (triangle) or 3 (tetrahedron).
    degree : int
        Polynomial degree, one of ``SUPPORTED_DEGREES``.

    Attributes
    ----------
    n_local : int
        Number of basis functions, ``binom(degree + dim, dim)``.
    multi_indices : ndarray, shape (n_local, dim + 1), int64
        Barycentric multi-index of each node.
    nodes : ndarray, shape (n_local, dim), float64
        Reference coordinates of the nodes.
    node_entity : ndarray, shape (n_local, 2), int64
        ``(entity dimension, local entity index)`` owning each node
        (dimension 0 vertex, 1 edge, 2 face, ``dim`` the cell).
    entity_vertices : dict
        ``entity dimension -> tuple of local vertex tuples``.
    facet_nodes : ndarray, shape (dim + 1, n_facet_nodes), int64
        Local nodes lying on facet ``i`` (those with ``alpha_i == 0``).

    Examples
    --------
    >>> el = lagrange_element(2, 2)
    >>> el.n_local, el.nodes[3].tolist()
    (6, [0.5, 0.5])
    >>> float(el.tabulate(np.array([[0.2, 0.3]])).sum())
    1.0
    """

    def __init__(self, dim: int, degree: int):
        # integers only: 2.0 and True pass a plain ``in`` test (2.0 == 2,
        # True == 1) and then fail later with a bare TypeError or a bool degree.
        def _is_int(v):
            return isinstance(v, (int, np.integer)) and not isinstance(v, (bool, np.bool_))

        if not _is_int(dim) or dim not in (2, 3):
            raise InputError(f"Lagrange element: dim must be 2 or 3, got {dim!r}")
        if not _is_int(degree) or degree not in SUPPORTED_DEGREES:
            raise InputError(
                f"Lagrange element: degree {degree!r} is not supported; "
                f"choose one of {SUPPORTED_DEGREES}"
            )
        self.dim = dim
        self.degree = degree
        k = degree
        entity_vertices = {0: tuple((i,) for i in range(dim + 1)), 1: REFERENCE_EDGES[dim]}
        if dim == 3:
            entity_vertices[2] = REFERENCE_FACES[3]
        entity_vertices[dim] = (tuple(range(dim + 1)),)
        self.entity_vertices = entity_vertices
        alphas, owner = [], []
        for edim in range(dim + 1):
            for eid, verts in enumerate(entity_vertices[edim]):
                for t in interior_tuples(len(verts), k):
                    a = [0] * (dim + 1)
                    for v, tv in zip(verts, t):
                        a[v] = tv
                    alphas.append(a)
                    owner.append((edim, eid))
        self.multi_indices = np.array(alphas, dtype=np.int64)
        self.node_entity = np.array(owner, dtype=np.int64)
        self.n_local = len(alphas)
        self.nodes = np.ascontiguousarray(self.multi_indices[:, 1:] / k, dtype=np.float64)
        self.facet_nodes = np.array(
            [np.flatnonzero(self.multi_indices[:, i] == 0) for i in range(dim + 1)],
            dtype=np.int64,
        )
        self.n_entity_nodes = {e: len(interior_tuples(len(v[0]), k))
                               for e, v in entity_vertices.items()}

    def __repr__(self) -> str:
        shape = "triangle" if self.dim == 2 else "tetrahedron"
        return f"LagrangeElement(P{self.degree} on the {shape}, {self.n_local} nodes)"

    # -- tabulation ---------------------------------------------------------
    def _check_points(self, points):
        p = np.asarray(points, dtype=np.float64)
        if p.ndim != 2 or p.shape[1] != self.dim:
            raise InputError(
                f"{self!r}: reference points must have shape (n_points, {self.dim}), "
                f"got {p.shape}"
            )
        if not np.all(np.isfinite(p)):
            raise InputError(f"{self!r}: reference points contain NaN or inf")
        return p

    def _factors(self, p):
        """R_m(lambda_i) and R'_m(lambda_i): shape (n, dim+1, k+1) each."""
        k = self.degree
        lam = np.concatenate([1.0 - p.sum(axis=1, keepdims=True), p], axis=1)
        n = lam.shape[0]
        R = np.ones((n, self.dim + 1, k + 1))
        dR = np.zeros((n, self.dim + 1, k + 1))
        for m in range(1, k + 1):
            f = (k * lam - (m - 1)) / m  # factor j = m - 1
            R[:, :, m] = R[:, :, m - 1] * f
            dR[:, :, m] = dR[:, :, m - 1] * f + R[:, :, m - 1] * (k / m)
        return R, dR

    def tabulate(self, points) -> np.ndarray:
        """Basis values at reference points.

        Parameters
        ----------
        points : array_like, shape (n_points, dim)

        Returns
        -------
        ndarray, shape (n_points, n_local), float64
        """
        p = self._check_points(points)
        R, _ = self._factors(p)
        out = np.ones((p.shape[0], self.n_local))
        for i in range(self.dim + 1):
            out *= R[:, i, self.multi_indices[:, i]]
        return out

    def tabulate_gradients(self, points) -> np.ndarray:
        """Reference gradients of the basis at reference points.

        Parameters
        ----------
        points : array_like, shape (n_points, dim)

        Returns
        -------
        ndarray, shape (n_points, n_local, dim), float64
            ``out[q, a, r] = d phi_a / d x_r`` at point ``q``.
        """
        p = self._check_points(points)
        R, dR = self._factors(p)
        A = self.multi_indices
        vals = [R[:, i, A[:, i]] for i in range(self.dim + 1)]
        dl = np.empty((p.shape[0], self.n_local, self.dim + 1))
        for i in range(self.dim + 1):
            g = dR[:, i, A[:, i]]
            for j in range(self.dim + 1):
                if j != i:
                    g = g * vals[j]
            dl[:, :, i] = g
        return np.ascontiguousarray(dl[:, :, 1:] - dl[:, :, :1])


@lru_cache(maxsize=None, typed=True)  # typed: (2, 2.0) must not hit the (2, 2) entry
def lagrange_element(dim: int, degree: int) -> LagrangeElement:
    """Cached :class:`LagrangeElement` (elements are immutable)."""
    return LagrangeElement(dim, degree)
