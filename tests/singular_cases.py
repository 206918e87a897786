"""Exact solutions with corner and interface singularities, for the error-bound tests.

No galerkit import: these are independent constructions.

* L-shaped domain (-1, 1)^2 minus the quadrant x > 0, y < 0:
  ``u = r^(2/3) sin(2 theta / 3)``, harmonic, zero on the two edges at the
  re-entrant corner (Strang & Fix, *An Analysis of the Finite Element Method*,
  1973).  Its gradient in closed form: ``(2/3) r^(-1/3) (-sin(theta/3), cos(theta/3))``.
* Kellogg's checkerboard (R. B. Kellogg, "On the Poisson equation with
  intersecting interfaces", Applicable Analysis 4, 1974; the parametrisation
  of P. Morin, R. H. Nochetto & K. G. Siebert, "Data oscillation and
  convergence of adaptive FEM", SIAM J. Numer. Anal. 38, 2000):
  on (-1, 1)^2 with conductivity R in the first and third quadrants and 1 in
  the others, ``u = r^gamma mu(theta)``, ``div(K grad u) = 0``.  The
  parameters (gamma, rho, sigma) solve Kellogg's three transcendental
  equations for the given R; :func:`kellogg_parameters` solves them with
  SciPy, and the tests check the interface conditions (continuity of u and of
  the normal flux) directly.  gamma = 0.1 gives R = 161.4476387975881,
  rho = pi/4, sigma = -14.92256510455152 (the values of Morin, Nochetto &
  Siebert 2000); R = 1e4 gives gamma = 0.0127319711...
"""

from __future__ import annotations

import numpy as np

PI = np.pi


def lshape_u(x):
    r = np.hypot(x[0], x[1])
    t = np.mod(np.arctan2(x[1], x[0]), 2 * PI)
    return r ** (2 / 3) * np.sin(2 * t / 3)


def lshape_grad(x):
    r = np.maximum(np.hypot(x[0], x[1]), 1e-300)
    t = np.mod(np.arctan2(x[1], x[0]), 2 * PI)
    c = 2 / 3 * r ** (-1 / 3)
    return np.array([-c * np.sin(t / 3), c * np.cos(t / 3)])


def outward_normal_of_square(x, half=1.0, tol=1e-9):
    """Outward unit normal of the box (-half, half)^2 at boundary points x (2, n)."""
    n = np.zeros_like(x)
    n[0] = np.where(x[0] > half - tol, 1.0, np.where(x[0] < -half + tol, -1.0, 0.0))
    n[1] = np.where((n[0] == 0) & (x[1] > half - tol), 1.0,
                    np.where((n[0] == 0) & (x[1] < -half + tol), -1.0, 0.0))
    return n


def lshape_flux(x):
    """du/dn on the outer sides of the L-shape (x on |x| = 1 or |y| = 1)."""
    return (lshape_grad(x) * outward_normal_of_square(x)).sum(axis=0)


def kellogg_equations(v, R):
    g, r, s = v
    return [R + np.tan((PI / 2 - s) * g) / np.tan(r * g),
            1 / R + np.tan(r * g) / np.tan(s * g),
            R + np.tan(s * g) / np.tan((PI / 2 - r) * g)]


def kellogg_parameters(R, gamma_guess):
    """(gamma, rho, sigma) for the ratio R (SciPy fsolve), checked against Kellogg's
    admissibility ranges."""
    from scipy.optimize import fsolve
    g0 = gamma_guess
    sol, _, ier, msg = fsolve(lambda v: kellogg_equations(v, R),
                              [g0, PI / 4, -PI / (2 * g0) * (1 - g0 / 2)], full_output=True,
                              xtol=1e-15)
    g, r, s = (float(v) for v in sol)
    assert ier == 1 or max(abs(e) for e in kellogg_equations(sol, R)) < 1e-8 * R, msg
    assert 0 < g < 2 and max(0, PI * g - PI) < 2 * g * r < min(PI * g, PI)
    assert max(0, PI - PI * g) < -2 * g * s < min(PI, 2 * PI - PI * g)
    return g, r, s


class Kellogg:
    def __init__(self, R=161.4476387975881, gamma_guess=0.1):
        self.R = R
        self.gamma, self.rho, self.sigma = kellogg_parameters(R, gamma_guess)

    def _pieces(self, t):
        g, r, s = self.gamma, self.rho, self.sigma
        t = np.mod(t, 2 * PI)
        q = np.minimum((t // (PI / 2)).astype(int), 3)
        amp = np.array([np.cos((PI / 2 - s) * g), np.cos(r * g), np.cos(s * g),
                        np.cos((PI / 2 - r) * g)])[q]
        shift = np.array([PI / 2 - r, PI - s, PI + r, 3 * PI / 2 + s])[q]
        return amp, (t - shift) * g

    def u(self, x):
        r = np.hypot(x[0], x[1])
        amp, arg = self._pieces(np.arctan2(x[1], x[0]))
        return r ** self.gamma * amp * np.cos(arg)

    def grad(self, x):
        r = np.maximum(np.hypot(x[0], x[1]), 1e-300)
        t = np.arctan2(x[1], x[0])
        amp, arg = self._pieces(t)
        g = self.gamma
        ur = g * r ** (g - 1) * amp * np.cos(arg)          # du/dr
        ut = -g * r ** (g - 1) * amp * np.sin(arg)         # (1/r) du/dtheta
        return np.array([ur * np.cos(t) - ut * np.sin(t), ur * np.sin(t) + ut * np.cos(t)])

    def kappa_at(self, x):
        return np.where(x[0] * x[1] > 0, self.R, 1.0)

    def flux(self, x):
        """K du/dn on the boundary of (-1, 1)^2."""
        return self.kappa_at(x) * (self.grad(x) * outward_normal_of_square(x)).sum(axis=0)


_GT, _GW = np.polynomial.legendre.leggauss(20)
_GT = 0.5 * (_GT + 1)
_GW = 0.5 * _GW


def energy_error_by_green(points, cells, boundary_facets, kappa_cells, uh, u, flux, subdivide=8):
    """``||K^(1/2) grad(u - u_h)||`` for a P1 ``u_h`` (vertex values) and a solution
    ``u`` with ``div(K grad u) = 0`` whose boundary flux ``K du/dn`` is ``flux``
    (zero where u_h and u vanish, e.g. homogeneous Dirichlet edges).

    Green's identity gives ``a(u, v) = integral over the boundary of (K du/dn) v``
    for every v in H1, so ``||e||^2 = a(u, u) - 2 a(u, u_h) + a(u_h, u_h)``: two
    boundary integrals of smooth data (20-point Gauss-Legendre on each of
    ``subdivide`` pieces of every facet) and the cell sum of the P1 energy.  No
    quadrature at the singular point is needed.
    """
    points = np.asarray(points, float)
    X = points[cells]
    e1 = X[:, 1] - X[:, 0]
    e2 = X[:, 2] - X[:, 0]
    det = e1[:, 0] * e2[:, 1] - e1[:, 1] * e2[:, 0]
    area = 0.5 * np.abs(det)
    # gradient of the P1 function from the 2x2 system
    d1 = uh[cells[:, 1]] - uh[cells[:, 0]]
    d2 = uh[cells[:, 2]] - uh[cells[:, 0]]
    gx = (d1 * e2[:, 1] - d2 * e1[:, 1]) / det
    gy = (d2 * e1[:, 0] - d1 * e2[:, 0]) / det
    auh = float((kappa_cells * area * (gx**2 + gy**2)).sum())
    a, b = points[boundary_facets[:, 0]], points[boundary_facets[:, 1]]
    ua, ub = uh[boundary_facets[:, 0]], uh[boundary_facets[:, 1]]
    L = np.hypot(*(b - a).T)
    auu = 0.0
    auuh = 0.0
    for piece in range(subdivide):
        t = (piece + _GT) / subdivide
        x = a[:, None, :] * (1 - t)[None, :, None] + b[:, None, :] * t[None, :, None]
        xx = x.reshape(-1, 2).T
        g = flux(xx).reshape(len(L), -1)
        uu = u(xx).reshape(len(L), -1)
        vh = ua[:, None] * (1 - t)[None, :] + ub[:, None] * t[None, :]
        w = L[:, None] * _GW[None, :] / subdivide
        auu += float((w * g * uu).sum())
        auuh += float((w * g * vh).sum())
    return float(np.sqrt(max(auu - 2 * auuh + auh, 0.0)))


def energy_error_by_green_traces(xa, xb, uh_trace, auh, u, flux, subdivide=8):
    """The identity of :func:`energy_error_by_green` for a u_h of any degree:
    ``||e||^2 = a(u, u) - 2 a(u, u_h) + a(u_h, u_h)`` with the two boundary integrals
    over the facets from ``xa`` to ``xb`` ((n, 2) each) and ``uh_trace(t)`` the values
    of u_h at the parameters t in [0, 1] of every facet ((n, len(t))); ``auh`` is
    ``a(u_h, u_h)``."""
    L = np.hypot(*(xb - xa).T)
    auu = 0.0
    auuh = 0.0
    for piece in range(subdivide):
        t = (piece + _GT) / subdivide
        x = xa[:, None, :] * (1 - t)[None, :, None] + xb[:, None, :] * t[None, :, None]
        xx = x.reshape(-1, 2).T
        g = flux(xx).reshape(len(L), -1)
        uu = u(xx).reshape(len(L), -1)
        w = L[:, None] * _GW[None, :] / subdivide
        auu += float((w * g * uu).sum())
        auuh += float((w * g * uh_trace(t)).sum())
    return float(np.sqrt(max(auu - 2 * auuh + auh, 0.0)))
