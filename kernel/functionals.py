"""Norms, errors and the energy functional of finite element functions.

Every functional is a sum over cells of a quadrature of degree ``2k + 2``
by default (enough to integrate the error of a degree-k approximation of a
smooth function accurately).  The cell sums run in one numba-parallel kernel;
per-cell values are then added in cell order, so results do not depend on
the thread count.  Exact solutions are evaluated in blocks of cells, so the
memory stays bounded on large meshes.

Callables follow the convention: ``exact(x)`` with ``x`` of shape
(dim, n) returns (n,); ``exact_gradient(x)`` returns (dim, n).
"""

from __future__ import annotations

import numba as nb
import numpy as np

from .regions import RegionCoefficient, region_coefficient
from .coefficients import _real_array, _validate, evaluate_callable, scalar_values, tensor_values
from .dofs import Discretization
from .errors import InputError
from .geometry import invert, jacobian, physical_points
from .quadrature import simplex_quadrature

__all__ = [
    "l2_error", "h1_seminorm_error", "energy_error", "l2_norm", "h1_seminorm", "h1_norm",
    "energy", "nested_error", "prolongate",
]

BLOCK_CELLS = 1 << 16

# kernel modes
_L2, _H1, _ENERGY, _FUNCTIONAL = 0, 1, 2, 3


@nb.njit(cache=True, parallel=True)
def _cell_integrals(points, cells, dofs, first, u, V, dV, w, ex, exg, kappa, tensor,
                    src, mode, out):
    d = points.shape[1]
    nq, k = V.shape
    nb_cells = out.shape[0]
    for ib in nb.prange(nb_cells):
        zero = ib - ib  # same integer type as the parallel index
        c = first + ib
        J = np.empty((d, d))
        Jinv = np.empty((d, d))
        grad = np.empty(d)
        e = np.empty(d)
        jacobian(points, cells, c, J)
        det = abs(invert(J, Jinv))
        kci = zero
        if kappa.shape[0] > 1:
            kci = ib
        sci = zero
        if src.shape[0] > 1:
            sci = ib
        tci = zero
        if tensor.shape[0] > 1:
            tci = ib
        kqs = 1 if kappa.shape[1] > 1 else 0
        sqs = 1 if src.shape[1] > 1 else 0
        acc = 0.0
        for q in range(nq):
            uh = 0.0
            for a in range(k):
                uh += V[q, a] * u[dofs[c, a]]
            if mode == _L2:
                t = uh - ex[ib, q]
                acc += w[q] * t * t
                continue
            for r in range(d):
                s = 0.0
                for a in range(k):
                    gr = 0.0
                    for j in range(d):
                        gr += Jinv[j, r] * dV[q, a, j]
                    s += gr * u[dofs[c, a]]
                grad[r] = s
            kq = kappa[kci, q * kqs]
            if mode == _FUNCTIONAL:
                for r in range(d):
                    e[r] = grad[r]
            else:
                for r in range(d):
                    e[r] = grad[r] - exg[r, ib * nq + q]
            s = 0.0
            if mode != _H1 and tensor.shape[0] > 0:
                for r in range(d):
                    for j in range(d):
                        s += e[r] * tensor[tci, r, j] * e[j]
            else:
                for r in range(d):
                    s += e[r] * e[r]
            if mode == _H1:
                acc += w[q] * s
            elif mode == _ENERGY:
                acc += w[q] * kq * s
            else:
                fq = src[sci, q * sqs]
                acc += w[q] * (0.5 * kq * s - fq * uh)
        out[ib] = det * acc


def _check_u(disc, u, name="u"):
    if not isinstance(disc, Discretization):
        raise InputError(f"expected a Discretization, got {type(disc).__name__}")
    try:
        arr = np.asarray(u)
    except Exception:  # ragged lists and the like
        arr = np.empty(0, dtype=object)
    if arr.shape != (disc.n_dofs,):
        raise InputError(f"{name}: expected a dof vector of shape ({disc.n_dofs},), got {arr.shape}")
    if arr.dtype.kind not in "iuf":
        raise InputError(f"{name}: expected real numbers (float64), got dtype {arr.dtype}")
    arr = np.ascontiguousarray(arr, dtype=np.float64)
    bad = ~np.isfinite(arr)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise InputError(f"{name}: non-finite value {arr[i]} at dof {i}")
    return arr


def _integrate(disc, u, mode, exact=None, exact_gradient=None, conductivity=1.0,
               source=0.0, quadrature_degree=None):
    u = _check_u(disc, u)
    mesh = disc.mesh
    d, m = mesh.dim, mesh.n_cells
    if quadrature_degree is not None and (
            isinstance(quadrature_degree, bool)
            or not isinstance(quadrature_degree, (int, np.integer)) or quadrature_degree < 0):
        raise InputError(f"quadrature_degree must be a non-negative integer or None, got "
                         f"{quadrature_degree!r}")
    deg = 2 * disc.degree + 2 if quadrature_degree is None else int(quadrature_degree)
    rule = simplex_quadrature(d, deg)
    nq = rule.n_points
    conductivity = region_coefficient(mesh, conductivity, "conductivity")
    source = region_coefficient(mesh, source, "source", allow_tensor=False)
    V = disc.element.tabulate(rule.points)
    dV = disc.element.tabulate_gradients(rule.points)
    tensor = tensor_values(conductivity, m, d, "conductivity")
    if tensor is None:
        tensor = np.zeros((0, d, d))
        need_kappa = mode in (_ENERGY, _FUNCTIONAL)
        kappa_val = conductivity if need_kappa else 1.0
    else:
        kappa_val = 1.0
    if not callable(kappa_val) and np.ndim(kappa_val) and np.shape(kappa_val) != (m,):
        # Fix: a per-cell array was sliced block by block, so a too long array
        # passed silently and gave a wrong number
        raise InputError(
            f"conductivity: array of shape {np.shape(kappa_val)} given; expected a number, "
            f"one value per cell ({m},), a callable or a ({d}, {d}) / ({m}, {d}, {d}) tensor")
    source_dofs = None
    if mode == _FUNCTIONAL and not isinstance(source, RegionCoefficient) and np.ndim(source):
        source_dofs = _check_u(disc, source, "source (a dof vector)")
    total = np.empty(m)
    for first in range(0, m, BLOCK_CELLS):
        last = min(m, first + BLOCK_CELLS)
        cells_b = mesh.cells[first:last]
        nb_ = last - first
        x = None

        def pts():
            nonlocal x
            if x is None:
                x = physical_points(mesh.points, cells_b, rule.points)
            return x

        ex = np.zeros((1, 1))
        exg = np.zeros((d, 1))
        if mode == _L2 and exact is not None:
            ex = evaluate_callable(exact, pts(), "exact").reshape(nb_, nq)
            # Fix: a NaN of the exact solution gave a NaN error, not a message
            _validate(ex, "exact", False, pts(), "cell", offset=first)
        if mode in (_H1, _ENERGY) and exact_gradient is not None:
            xx = pts()
            try:
                g = _real_array(exact_gradient(xx), "exact_gradient returned")
            except InputError:
                raise
            except Exception as exc:
                raise InputError(f"exact_gradient failed on points of shape {xx.shape}: {exc}") from exc
            if g.shape != (d, xx.shape[1]):
                raise InputError(
                    f"exact_gradient returned shape {g.shape}; expected ({d}, {xx.shape[1]})")
            if not np.isfinite(g).all():
                raise InputError("exact_gradient returned non-finite values")
            exg = np.ascontiguousarray(g)
        if mode in (_H1, _ENERGY) and exact_gradient is None:
            exg = np.zeros((d, nb_ * nq))
        if mode == _L2 and exact is None:
            ex = np.zeros((nb_, nq))
        # Fix: cells are named by their mesh number (block offset added)
        kappa = scalar_values(kappa_val, nb_, "conductivity", positive=True, points=pts,
                              point_shape=(nb_, nq), first_item=first) if not np.ndim(kappa_val) \
            else scalar_values(np.asarray(kappa_val)[first:last], nb_, "conductivity",
                               positive=True, first_item=first)
        src = np.zeros((1, 1))
        if mode == _FUNCTIONAL:
            if not isinstance(source, RegionCoefficient) and np.ndim(source):  # a dof vector: its interpolant at the quadrature points
                src = np.ascontiguousarray(source_dofs[disc.cell_dofs[first:last]] @ V.T)
            else:
                src = scalar_values(source, nb_, "source", points=pts, point_shape=(nb_, nq),
                                    first_item=first)
        # cells are indexed from `first`; coefficient arrays are block-local
        out = np.empty(nb_)
        _cell_integrals(mesh.points, mesh.cells, disc.cell_dofs, first, u, V, dV, rule.weights,
                        ex, exg, kappa, tensor if tensor.shape[0] <= 1 else tensor[first:last],
                        src, mode, out)
        total[first:last] = out
    return total


def l2_error(disc, u, exact, *, quadrature_degree=None, per_cell=False):
    """``||u_h - exact||_{L2}``.

    Parameters
    ----------
    disc : Discretization
    u : ndarray (n_dofs,)
    exact : callable, ``exact(x)`` with x (dim, n) -> (n,)
    quadrature_degree : int, optional (default 2k + 2)
    per_cell : bool
        Return the squared error of every cell instead.

    Returns
    -------
    float (or ndarray (n_cells,) of squared cell errors)

    Examples
    --------
    >>> from galerkit import structured_triangles, Discretization
    >>> disc = Discretization(structured_triangles(4, 4), 1)
    >>> u = disc.interpolate(lambda x: x[0] + x[1])
    >>> l2_error(disc, u, lambda x: x[0] + x[1]) < 1e-14
    True
    """
    t = _integrate(disc, u, _L2, exact=exact, quadrature_degree=quadrature_degree)
    return t if per_cell else float(np.sqrt(max(t.sum(), 0.0)))


def h1_seminorm_error(disc, u, exact_gradient, *, quadrature_degree=None, per_cell=False):
    """``|u_h - exact|_{H1} = ||grad u_h - exact_gradient||_{L2}``."""
    t = _integrate(disc, u, _H1, exact_gradient=exact_gradient, quadrature_degree=quadrature_degree)
    return t if per_cell else float(np.sqrt(max(t.sum(), 0.0)))


def energy_error(disc, u, exact_gradient, conductivity=1.0, *, quadrature_degree=None,
                 per_cell=False):
    """``(integral of (g_h - g) . K (g_h - g))^(1/2)``, g the gradient, K the conductivity."""
    t = _integrate(disc, u, _ENERGY, exact_gradient=exact_gradient, conductivity=conductivity,
                   quadrature_degree=quadrature_degree)
    return t if per_cell else float(np.sqrt(max(t.sum(), 0.0)))


def l2_norm(disc, u, *, quadrature_degree=None):
    """``||u_h||_{L2}``."""
    return float(np.sqrt(_integrate(disc, u, _L2, quadrature_degree=quadrature_degree).sum()))


def h1_seminorm(disc, u, *, quadrature_degree=None):
    """``|u_h|_{H1} = ||grad u_h||_{L2}``."""
    return float(np.sqrt(_integrate(disc, u, _H1, quadrature_degree=quadrature_degree).sum()))


def h1_norm(disc, u, *, quadrature_degree=None):
    """``(||u_h||^2_{L2} + |u_h|^2_{H1})^(1/2)``."""
    return float(np.hypot(l2_norm(disc, u, quadrature_degree=quadrature_degree),
                          h1_seminorm(disc, u, quadrature_degree=quadrature_degree)))


def energy(disc, u, conductivity=1.0, source=0.0, *, quadrature_degree=None):
    """The energy functional ``1/2 a(u_h, u_h) - (f, u_h)``.

    ``source`` is a number, a callable, or a dof vector (its interpolant).

    Its discrete minimiser is the Galerkin solution (homogeneous natural
    boundary terms are not included).
    """
    return float(_integrate(disc, u, _FUNCTIONAL, conductivity=conductivity, source=source,
                            quadrature_degree=quadrature_degree).sum())


# -- nested meshes: errors without an exact solution ---------------------------------
def prolongate(coarse: Discretization, u, fine: Discretization) -> np.ndarray:
    """Interpolate a coarse function onto a uniformly refined discretization.

    ``fine.mesh`` must descend from ``coarse.mesh`` by :func:`refine_uniform`
    (one or more times), with the same degree: the coarse space is then a
    subspace of the fine one and the result represents the same function.
    """
    u = _check_u(coarse, u)
    mesh = fine.mesh
    anc = np.arange(mesh.n_cells)
    m = mesh
    while m is not coarse.mesh:
        if m.parent is None:
            raise InputError("prolongate: the fine mesh does not descend from the coarse mesh "
                             "by refine_uniform")
        anc = m.parent_cells[anc]
        m = m.parent
    cm = coarse.mesh
    x = fine.dof_points[fine.cell_dofs]  # (mf, k, d)
    x0 = cm.points[cm.cells[anc, 0]]
    J = np.stack([cm.points[cm.cells[anc, j + 1]] - x0 for j in range(cm.dim)], axis=2)
    xi = np.linalg.solve(J[:, None], (x - x0[:, None, :])[..., None])[..., 0]
    V = coarse.element.tabulate(np.clip(xi.reshape(-1, cm.dim), 0.0, 1.0))
    V = V.reshape(x.shape[0], x.shape[1], -1)
    vals = np.einsum("fka,fa->fk", V, u[coarse.cell_dofs[anc]])
    out = np.empty(fine.n_dofs)
    out[fine.cell_dofs.ravel()] = vals.ravel()
    return out


def nested_error(coarse, u_coarse, fine, u_fine, norm="l2"):
    """Error of a coarse solution measured against a fine one (no exact solution).

    Parameters
    ----------
    norm : {"l2", "h1"}
        "h1" is the H1 seminorm.
    """
    diff = prolongate(coarse, u_coarse, fine) - _check_u(fine, u_fine, "u_fine")
    if norm == "l2":
        return l2_norm(fine, diff)
    if norm == "h1":
        return h1_seminorm(fine, diff)
    raise InputError(f"nested_error: norm must be 'l2' or 'h1', got {norm!r}")
