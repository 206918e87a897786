"""Point location and evaluation of finite element functions.

Points are located with a k-d tree of cell centroids (SciPy's cKDTree):
the nearest centroids are candidates, and a point belongs to the first
candidate whose barycentric coordinates are all >= -tol.
"""

from __future__ import annotations

import numpy as np
from scipy.spatial import cKDTree

from .errors import InputError

__all__ = ["locate_points", "evaluate", "cell_gradients"]


def _real(a, name):
    try:
        arr = np.asarray(a)
    except Exception:  # ragged lists and the like
        arr = np.empty(0, dtype=object)
    if arr.dtype.kind not in "iuf":
        raise InputError(f"{name}: expected an array of real numbers, got dtype {arr.dtype}")
    return arr.astype(np.float64, copy=False)


def _dof_vector(disc, u, where):
    """``u`` checked against ``disc``: real, finite, shape (n_dofs,)."""
    from .dofs import Discretization

    if not isinstance(disc, Discretization):
        raise InputError(f"{where}: expected a Discretization, got {type(disc).__name__}")
    arr = _real(u, f"{where}: u")
    if arr.shape != (disc.n_dofs,):
        raise InputError(f"{where}: u must be a dof vector of shape ({disc.n_dofs},), "
                         f"got {arr.shape}")
    bad = ~np.isfinite(arr)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise InputError(f"{where}: u has a non-finite value {arr[i]} at dof {i}")
    return arr


def _barycentric(mesh, cells, x):
    """Barycentric coordinates of points x (n, d) in cells (n,)."""
    v = mesh.points[mesh.cells[cells]]  # (n, d+1, d)
    J = np.transpose(v[:, 1:] - v[:, :1], (0, 2, 1))
    xi = np.linalg.solve(J, (x - v[:, 0])[..., None])[..., 0]
    return np.concatenate([1 - xi.sum(axis=1, keepdims=True), xi], axis=1), xi


def locate_points(mesh, x, *, tol=1e-10, candidates=16):
    """Cell containing each point, or -1 when the point lies outside the mesh.

    Parameters
    ----------
    x : ndarray, shape (dim, n)
        Real, finite coordinates.

    Returns
    -------
    cells : ndarray (n,) int64
    xi : ndarray (n, dim), reference coordinates in that cell
    """
    from .mesh import Mesh

    if not isinstance(mesh, Mesh):
        raise InputError(f"locate_points: mesh must be a galerkit Mesh, got {type(mesh).__name__}")
    x = _real(x, "points")
    if x.ndim != 2 or x.shape[0] != mesh.dim:
        raise InputError(f"points must have shape ({mesh.dim}, n), got {x.shape}")
    bad = ~np.isfinite(x).all(axis=0)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise InputError(f"points: point {i} has a non-finite coordinate {x[:, i].tolist()} "
                         f"({int(bad.sum())} such points)")
    pts = np.ascontiguousarray(x.T)
    tree = getattr(mesh, "_centroid_tree", None)
    if tree is None:
        tree = cKDTree(mesh.points[mesh.cells].mean(axis=1))
        mesh._centroid_tree = tree
    n = pts.shape[0]
    found = np.full(n, -1, dtype=np.int64)
    xi_out = np.zeros((n, mesh.dim))
    kk = min(candidates, mesh.n_cells)
    _, cand = tree.query(pts, k=kk)
    cand = cand.reshape(n, kk)
    # the tree answers n_cells (no neighbour) where a distance overflows to inf (a point
    # near 1e154 or beyond): such candidates are no cell, the fallback below decides
    no_cell = cand >= mesh.n_cells
    cand[no_cell] = 0
    todo = np.arange(n)
    for j in range(kk):
        if todo.size == 0:
            break
        c = cand[todo, j]
        lam, xi = _barycentric(mesh, c, pts[todo])
        ok = (lam.min(axis=1) >= -tol) & ~no_cell[todo, j]
        found[todo[ok]] = c[ok]
        xi_out[todo[ok]] = xi[ok]
        todo = todo[~ok]
    if todo.size:  # exhaustive fallback for the few points left (meshes with slivers)
        for i in todo:
            lam, xi = _barycentric(mesh, np.arange(mesh.n_cells),
                                   np.repeat(pts[i:i + 1], mesh.n_cells, axis=0))
            ok = np.flatnonzero(lam.min(axis=1) >= -tol)
            if ok.size:
                found[i] = ok[0]
                xi_out[i] = xi[ok[0]]
    return found, xi_out


def evaluate(disc, u, x, *, outside="error"):
    """Values of the finite element function ``u`` at points ``x`` (dim, n).

    Parameters
    ----------
    outside : {"error", "nan"}
        What to do with points outside the mesh.
    """
    if outside not in ("error", "nan"):  # Fix: a misspelt option silently meant "nan"
        raise InputError(f"evaluate: outside must be 'error' or 'nan', got {outside!r}")
    u = _dof_vector(disc, u, "evaluate")
    cells, xi = locate_points(disc.mesh, x)
    bad = cells < 0
    if bad.any() and outside == "error":
        i = int(np.flatnonzero(bad)[0])
        raise InputError(
            f"evaluate: point {i} at {np.asarray(x)[:, i].tolist()} lies outside the mesh "
            f"({int(bad.sum())} such points); pass outside='nan' to get NaN there")
    out = np.full(cells.shape[0], np.nan)
    ok = ~bad
    if ok.any():
        V = disc.element.tabulate(xi[ok])
        out[ok] = np.einsum("pa,pa->p", V, u[disc.cell_dofs[cells[ok]]])
    return out


def cell_gradients(disc, u):
    """Gradient of ``u`` at every cell centroid, shape (n_cells, dim)."""
    u = _dof_vector(disc, u, "cell_gradients")
    mesh = disc.mesh
    d = mesh.dim
    centroid = np.full((1, d), 1.0 / (d + 1))
    G = disc.element.tabulate_gradients(centroid)[0]  # (k, d)
    v = mesh.points[mesh.cells]
    J = np.transpose(v[:, 1:] - v[:, :1], (0, 2, 1))  # (m, d, d)
    gref = np.einsum("ka,mk->ma", G, u[disc.cell_dofs])  # (m, d)
    # physical gradient = J^-T gref
    return np.linalg.solve(np.transpose(J, (0, 2, 1)), gref[..., None])[..., 0]
