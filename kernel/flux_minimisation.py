"""The flux term of the bound minimised over divergence-free corrections (triangles).

The vertex-patch flux ``sigma_h`` of :mod:`galerkit.estimators` (P1) and
:mod:`galerkit.equilibration` (P2-P4) is one equilibrated field of RT_k; every
``sigma_h + curl phi`` with ``phi`` a continuous P_(k+1) function that vanishes on
the boundary is another one (``curl phi = (d phi/dy, -d phi/dx)`` lies in RT_k, has
no divergence and, since ``phi`` is constant along the boundary, no normal trace
there), so Prager & Synge (1947) bound the energy error by
``||K^(-1/2)(sigma_h + curl phi + K grad u_h)||`` for *every* such ``phi``.  The
``phi`` that minimises it solves a Poisson problem with the conductivity
``R^T K^-1 R`` (R the rotation by -90 degrees; ``1/kappa`` for a scalar one):

    (R^T K^-1 R grad phi, grad chi) = -(K^-1 r, curl chi)   for all chi,
    r = sigma_h + K grad u_h,

which is one linear solve of the size of a P_(k+1) problem.  The guarantee does not
depend on how well it is solved (any ``phi`` is admissible) and a Krylov method
started from 0 only lowers the quadratic, so the result is never above the patch
flux; it is kept only if it is lower.  On the whole domain (and with the boundary
values of ``phi`` free on Dirichlet facets and one constant per boundary part) this
minimum is the mixed method's side of the hypercircle; fixing ``phi = 0`` on the
whole boundary is a smaller admissible set, so the bound stays guaranteed for every
mesh and boundary condition.

It matters where vertex patches cannot carry the flux: a checkerboard conductivity
(Kellogg 1974), whose cross point violates the quasi-monotone distribution under
which the patch fluxes are robust in the coefficient (Petzoldt 2002), on graded
meshes (docs/error-bounds-and-adaptivity.md gives the figures).
"""

from __future__ import annotations

import numpy as np

__all__ = ["minimise_flux_term"]

_ROT = np.array([[0.0, 1.0], [-1.0, 0.0]])  # curl phi = _ROT @ grad phi


def minimise_flux_term(mesh, degree, residual, xi, w, J, Kinv, rtol=1e-6):
    """Per-cell squares of ``||K^(-1/2)(r + curl phi)||`` for the minimising ``phi``.

    Parameters
    ----------
    mesh : Mesh (triangles)
    degree : int
        The degree k of the flux space RT_k; ``phi`` is P_(k+1).
    residual : ndarray (m, nq, 2)
        ``r = sigma_h + K grad u_h`` at the reference points ``xi`` (nq, 2) of every
        cell, weights ``w`` (summing to 1/2, the reference area).
    J : ndarray (m, 2, 2)
        Jacobians of the cells (columns x1 - x0, x2 - x0), positively oriented.
    Kinv : ndarray (m, 2, 2)
        Inverse conductivity per cell.
    rtol : float
        Relative tolerance of the solve (the bound holds for any ``phi``; 1e-6 leaves
        the minimum a little higher than an exact solve would).

    Returns
    -------
    (ef2, phi) : the per-cell squares (m,) and the stream function's dof vector.
    """
    from .assembly import Assembler
    from .dofs import Discretization
    from .solvers import solve

    sd = Discretization(mesh, degree + 1)
    detJ = J[:, 0, 0] * J[:, 1, 1] - J[:, 0, 1] * J[:, 1, 0]
    Jinv = np.linalg.inv(J)
    C = np.ascontiguousarray(_ROT.T @ Kinv @ _ROT)  # (m, 2, 2): R^T K^-1 R
    A = Assembler(sd).stiffness(C).tocsr()
    # (R^T K^-1 r, grad chi) with grad chi = J^-T grad_ref chi: contract J^-1 first
    dref = sd.element.tabulate_gradients(xi)  # (nq, nb, 2)
    wq = detJ[:, None] * w[None, :]  # (m, nq)
    rk = np.einsum("ji,cqj->cqi", _ROT, np.einsum("cij,cqj->cqi", Kinv, residual))
    v = np.einsum("crs,cqs->cqr", Jinv, rk)
    loc = -np.einsum("cq,cqr,qbr->cb", wq, v, dref, optimize=True)
    b = np.zeros(sd.n_dofs)
    np.add.at(b, sd.cell_dofs, loc)
    fixed = sd.boundary_dofs()
    free = np.ones(sd.n_dofs, dtype=bool)
    free[fixed] = False
    idx = np.flatnonzero(free)
    phi = np.zeros(sd.n_dofs)
    if idx.size:
        Af = A[idx][:, idx].tocsr()
        bf = b[idx]
        if np.abs(bf).max(initial=0.0) > 0:
            phi[idx] = solve(Af, bf, rtol=rtol, dim=2, degree=degree + 1).x
    gref = np.einsum("cb,qbr->cqr", phi[sd.cell_dofs], dref, optimize=True)
    cphi = np.einsum("cqr,crs->cqs", gref, Jinv) @ _ROT.T  # R grad phi
    rr = residual + cphi
    ef2 = (wq * np.einsum("cqi,cij,cqj->cq", rr, Kinv, rr)).sum(axis=1)
    return np.maximum(ef2, 0.0), phi
