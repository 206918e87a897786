"""Affine cell maps: Jacobians, inverses, physical quadrature points.

Small numba functions shared by the assembly and functional kernels.  The
map of cell ``c`` is ``x = x_0 + J xi`` with ``J[:, j] = x_{j+1} - x_0``;
physical gradients are ``J^{-T}`` times reference gradients.
"""

from __future__ import annotations

import numba as nb
import numpy as np

from .compilation import by_size

__all__ = ["jacobian", "invert", "physical_points"]


@nb.njit(cache=True, inline="always")
def jacobian(points, cells, c, J):
    """Fill ``J`` (d, d) for cell ``c``."""
    d = points.shape[1]
    v0 = cells[c, 0]
    for j in range(d):
        vj = cells[c, j + 1]
        for i in range(d):
            J[i, j] = points[vj, i] - points[v0, i]


@nb.njit(cache=True, inline="always")
def invert(J, Jinv):
    """Write ``J^{-1}`` into ``Jinv`` and return ``det J`` (d = 2 or 3)."""
    d = J.shape[0]
    if d == 2:
        det = J[0, 0] * J[1, 1] - J[0, 1] * J[1, 0]
        Jinv[0, 0] = J[1, 1] / det
        Jinv[0, 1] = -J[0, 1] / det
        Jinv[1, 0] = -J[1, 0] / det
        Jinv[1, 1] = J[0, 0] / det
        return det
    a, b, c = J[0, 0], J[0, 1], J[0, 2]
    e, f, g = J[1, 0], J[1, 1], J[1, 2]
    h, i_, k = J[2, 0], J[2, 1], J[2, 2]
    A = f * k - g * i_
    B = g * h - e * k
    C = e * i_ - f * h
    det = a * A + b * B + c * C
    Jinv[0, 0] = A / det
    Jinv[1, 0] = B / det
    Jinv[2, 0] = C / det
    Jinv[0, 1] = (c * i_ - b * k) / det
    Jinv[1, 1] = (a * k - c * h) / det
    Jinv[2, 1] = (b * h - a * i_) / det
    Jinv[0, 2] = (b * g - c * f) / det
    Jinv[1, 2] = (c * e - a * g) / det
    Jinv[2, 2] = (a * f - b * e) / det
    return det


@nb.njit(cache=True, parallel=True)
def _physical_points(points, cells, ref, out):
    m = cells.shape[0]
    d = points.shape[1]
    nq = ref.shape[0]
    for c in nb.prange(m):
        v0 = cells[c, 0]
        for q in range(nq):
            for i in range(d):
                s = points[v0, i]
                for j in range(d):
                    s += (points[cells[c, j + 1], i] - points[v0, i]) * ref[q, j]
                out[i, c * nq + q] = s


def physical_points(points, cells, ref_points):
    """Images of reference points in every cell.

    Parameters
    ----------
    points : ndarray (n, d) float64
    cells : ndarray (m, d+1) int
    ref_points : ndarray (nq, d) float64

    Returns
    -------
    ndarray, shape (d, m * nq): point ``q`` of cell ``c`` is column ``c*nq + q``.
    """
    out = np.empty((points.shape[1], cells.shape[0] * ref_points.shape[0]))
    by_size(_physical_points, out.size)(points, cells,
                                        np.ascontiguousarray(ref_points, dtype=np.float64), out)
    return out
