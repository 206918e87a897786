"""Specification of the stiffness, mass, load and facet operators (galerkit.assembly).

References used below (each test names its own):

* closed-form P1 element matrices: Hughes, The Finite Element Method, 2000
  (triangle stiffness (1/4A)(b_i b_j + c_i c_j), mass (A/12)(1 + delta_ij);
  tetrahedron mass (V/20)(1 + delta_ij));
* exact integrals of polynomials over the reference simplex and the unit
  square / cube: SymPy, in rational arithmetic (the helper is cross-checked
  against sympy.integrate and against Stroud's monomial formula
  a!b!c!/(a+b+c+d)!, Stroud, Approximate Calculation of Multiple
  Integrals, 1971);
* an independent vectorised NumPy/SciPy assembly written in this file
  (element matrices by numpy.einsum over all cells, scipy.sparse COO -> CSR);
* Laplacian eigenvalues on the unit square / cube, pi^2 (m^2 + n^2 [+ l^2])
  with homogeneous Dirichlet data (any PDE text), and the Rayleigh-Ritz
  upper-bound property of conforming Galerkin eigenvalues (Strang & Fix,
  An Analysis of the Finite Element Method, 1973, ch. 6).
"""

from __future__ import annotations

from functools import lru_cache

import numba
import numpy as np
import pytest
import scipy.linalg as sla
import scipy.sparse as sps
import scipy.sparse.linalg as spla
import sympy as sy

from galerkit import (
    Assembler,
    Discretization,
    Mesh,
    simplex_quadrature,
    structured_tetrahedra,
    structured_triangles,
)
from galerkit.errors import InputError

# ----------------------------------------------------------------------------
# helpers
# ----------------------------------------------------------------------------
SX = sy.symbols("x0:3")


def small_mesh(dim, n=None):
    if dim == 2:
        n = n or 4
        return structured_triangles(n, n)
    n = n or 2
    return structured_tetrahedra(n, n, n)


def perturbed_mesh(dim, n, seed, amplitude=0.15):
    """Structured mesh of the unit square/cube, interior vertices moved.

    Each interior vertex moves by up to ``amplitude * h`` per coordinate
    (uniform, seeded), which keeps every cell positively oriented.
    """
    base = small_mesh(dim, n)
    rng = np.random.default_rng(seed)
    p = base.points.copy()
    interior = np.all((p > 1e-12) & (p < 1 - 1e-12), axis=1)
    p[interior] += amplitude / n * rng.uniform(-1, 1, size=(int(interior.sum()), dim))
    mesh = Mesh(p, base.cells)
    assert mesh.n_reoriented == 0
    return mesh


@lru_cache(maxsize=None)
def _monomial_simplex_integral(exponents):
    """sympy.integrate of x0^a x1^b (x2^c) over the reference simplex."""
    dim = len(exponents)
    mono = sy.Mul(*[SX[r] ** e for r, e in enumerate(exponents)])
    limits = [(SX[r], 0, 1 - sum(SX[:r])) for r in reversed(range(dim))]
    return sy.integrate(mono, *limits)


def simplex_integral(expr, dim):
    """Exact integral of a polynomial over the reference simplex (SymPy).

    By linearity: the polynomial's rational coefficients times the exact
    integrals of its monomials (sympy.integrate, cached).
    """
    poly = sy.Poly(sy.expand(expr), *SX[:dim])
    return sum((c * _monomial_simplex_integral(m) for m, c in poly.terms()), sy.Integer(0))


@lru_cache(maxsize=None)
def _monomial_box_integral(exponents):
    """sympy.integrate of a monomial over the unit square / cube."""
    mono = sy.Mul(*[SX[r] ** e for r, e in enumerate(exponents)])
    return sy.integrate(mono, *[(SX[r], 0, 1) for r in range(len(exponents))])


def box_integral(expr, dim):
    """Exact integral of a polynomial over the unit square / cube (SymPy)."""
    poly = sy.Poly(sy.expand(expr), *SX[:dim])
    return sum((c * _monomial_box_integral(m) for m, c in poly.terms()), sy.Integer(0))


def sym_gradient(f, dim):
    return [sy.diff(f, SX[r]) for r in range(dim)]


@lru_cache(maxsize=None)
def sympy_p2_basis(dim):
    """P2 basis on the reference simplex in barycentric form, built here:
    lambda_i (2 lambda_i - 1) at vertex i, 4 lambda_i lambda_j at the
    midpoint of edge (i, j) (Hughes 2000, ch. 3; common practice), in the
    element's node order, read from its barycentric multi-indices."""
    from galerkit import lagrange_element

    el = lagrange_element(dim, 2)
    lam = [1 - sum(SX[:dim])] + list(SX[:dim])
    basis = []
    for alpha in el.multi_indices:
        nz = np.flatnonzero(alpha)
        if len(nz) == 1:
            i = nz[0]
            basis.append(sy.expand(lam[i] * (2 * lam[i] - 1)))
        else:
            i, j = nz
            basis.append(sy.expand(4 * lam[i] * lam[j]))
    return basis


def reference_matrices(disc, rule_degree=None, conductivity=None, coefficient=None):
    """Stiffness and mass by the plain vectorised NumPy/SciPy COO idiom.

    Element matrices for all cells at once with numpy.einsum from the
    element's tabulated values/gradients and a quadrature rule, then
    scipy.sparse.coo_array((values, (rows, cols))).tocsr() (common practice).
    ``conductivity`` / ``coefficient``: optional per-cell arrays.
    """
    mesh, el = disc.mesh, disc.element
    d, k = mesh.dim, disc.degree
    rule = simplex_quadrature(d, 2 * k if rule_degree is None else rule_degree)
    P = mesh.points[mesh.cells]                     # (m, d+1, d)
    J = np.transpose(P[:, 1:] - P[:, :1], (0, 2, 1))  # J[c, i, j] = x_{j+1,i} - x_{0,i}
    det = np.abs(np.linalg.det(J))
    Jinv = np.linalg.inv(J)
    G = el.tabulate_gradients(rule.points)          # (q, a, r)
    V = el.tabulate(rule.points)                    # (q, a)
    phys = np.einsum("csi,qas->cqai", Jinv, G)      # J^-T grad_ref
    kap = np.ones(mesh.n_cells) if conductivity is None else conductivity
    cof = np.ones(mesh.n_cells) if coefficient is None else coefficient
    Ke = np.einsum("q,c,cqai,cqbi->cab", rule.weights, det * kap, phys, phys)
    Me = np.einsum("q,c,qa,qb->cab", rule.weights, det * cof, V, V)
    dofs = disc.cell_dofs.astype(np.int64)
    n = disc.n_dofs
    rows = np.repeat(dofs, dofs.shape[1], axis=1).ravel()
    cols = np.tile(dofs, (1, dofs.shape[1])).ravel()
    K = sps.coo_array((Ke.ravel(), (rows, cols)), shape=(n, n)).tocsr()
    M = sps.coo_array((Me.ravel(), (rows, cols)), shape=(n, n)).tocsr()
    return K, M


def rel_diff(A, B):
    return abs(A - B).max() / abs(B).max()


# polynomials written with + * ** only, so they work on NumPy arrays x[r] and
# on SymPy symbols alike
POLY = {
    (2, 1): lambda x: 1 + 2 * x[0] - 3 * x[1],
    (2, 2): lambda x: x[0] ** 2 - x[0] * x[1] + 2 * x[1] ** 2 + x[0],
    (2, 3): lambda x: x[0] ** 3 - 2 * x[0] * x[1] ** 2 + x[1] ** 3 + x[0] * x[1],
    (3, 1): lambda x: 1 + x[0] - 2 * x[1] + 3 * x[2],
    (3, 2): lambda x: x[0] ** 2 + x[1] * x[2] - x[2] ** 2 + x[0],
    (3, 3): lambda x: x[0] * x[1] * x[2] + x[0] ** 3 - x[1] ** 2 * x[2] + x[2],
}
# a degree-2 conductivity, >= 1 on the unit square / cube
KAPPA = {
    2: lambda x: 1 + x[0] ** 2 + x[0] * x[1],
    3: lambda x: 1 + x[0] ** 2 + x[1] * x[2],
}
DK = [(d, k) for d in (2, 3) for k in (1, 2, 3)]
DK_IDS = [f"P{k}-{d}D" for d, k in DK]


def test_simplex_integral_helper_matches_sympy_integrate_and_stroud():
    # SymPy integrate over the triangle, and Stroud 1971: a!b!c!/(a+b+c+d)!
    x, y, z = SX
    e = x**2 * y + 3 * x * y**2 - y
    assert simplex_integral(e, 2) == sy.integrate(e, (y, 0, 1 - x), (x, 0, 1))
    e3 = x**2 * y * z + 2 * z**3 - x
    assert box_integral(e3, 3) == sy.integrate(e3, (x, 0, 1), (y, 0, 1), (z, 0, 1))
    for a, b, c in [(0, 0, 0), (2, 1, 0), (1, 1, 3)]:
        stroud = sy.Rational(sy.factorial(a) * sy.factorial(b) * sy.factorial(c),
                             sy.factorial(a + b + c + 3))
        assert simplex_integral(x**a * y**b * z**c, 3) == stroud


# ----------------------------------------------------------------------------
# 1. single-cell element matrices
# ----------------------------------------------------------------------------
def one_cell(rng, dim):
    while True:
        p = rng.uniform(-1, 2, size=(dim + 1, dim))
        J = p[1:] - p[0]
        if abs(np.linalg.det(J)) > 0.1:  # keep it well shaped
            return Mesh(p, [list(range(dim + 1))])


@pytest.mark.parametrize("seed", range(5))
def test_p1_triangle_element_matrices_closed_form(seed):
    # Hughes 2000: K_ij = (b_i b_j + c_i c_j) / (4A), M_ij = A/12 (1 + delta_ij),
    # b_i = y_j - y_k, c_i = x_k - x_j, (i, j, k) cyclic
    mesh = one_cell(np.random.default_rng(seed), 2)
    asm = Assembler(Discretization(mesh, 1))
    x, y = mesh.points[:, 0], mesh.points[:, 1]
    A = 0.5 * abs((x[1] - x[0]) * (y[2] - y[0]) - (x[2] - x[0]) * (y[1] - y[0]))
    cyc = [(1, 2), (2, 0), (0, 1)]
    b = np.array([y[j] - y[k] for j, k in cyc])
    c = np.array([x[k] - x[j] for j, k in cyc])
    K_ref = (np.outer(b, b) + np.outer(c, c)) / (4 * A)
    M_ref = A / 12 * (np.ones((3, 3)) + np.eye(3))
    K = asm.stiffness().toarray()
    M = asm.mass().toarray()
    np.testing.assert_allclose(K, K_ref, rtol=1e-13, atol=1e-13 * abs(K_ref).max())
    np.testing.assert_allclose(M, M_ref, rtol=1e-13, atol=0)
    # a scalar conductivity scales the matrix
    np.testing.assert_allclose(asm.stiffness(2.5).toarray(), 2.5 * K_ref,
                               rtol=1e-13, atol=1e-13 * abs(K_ref).max())


@pytest.mark.parametrize("seed", range(5))
def test_p1_tetrahedron_element_matrices_closed_form(seed):
    # Hughes 2000: M_ij = V/20 (1 + delta_ij); K_ij = V grad(l_i) . grad(l_j),
    # the barycentric gradients from inverting [1 x y z] (numpy.linalg.inv)
    mesh = one_cell(np.random.default_rng(100 + seed), 3)
    asm = Assembler(Discretization(mesh, 1))
    C = np.hstack([np.ones((4, 1)), mesh.points])  # row i: (1, x_i, y_i, z_i)
    grads = np.linalg.inv(C)[1:, :]               # column i: grad lambda_i
    V = abs(np.linalg.det(C)) / 6
    K_ref = V * grads.T @ grads
    M_ref = V / 20 * (np.ones((4, 4)) + np.eye(4))
    np.testing.assert_allclose(asm.stiffness().toarray(), K_ref, rtol=1e-12,
                               atol=1e-13 * abs(K_ref).max())
    np.testing.assert_allclose(asm.mass().toarray(), M_ref, rtol=1e-13, atol=0)


@pytest.mark.parametrize("dim", [2, 3])
def test_p2_reference_element_matrices_match_exact_sympy(dim):
    # exact rational integration of the P2 basis over the reference simplex
    # (SymPy; basis lambda_i(2 lambda_i - 1), 4 lambda_i lambda_j)
    verts = np.vstack([np.zeros(dim), np.eye(dim)])
    disc = Discretization(Mesh(verts, [list(range(dim + 1))]), 2)
    basis = sympy_p2_basis(dim)
    n = len(basis)
    loc = disc.cell_dofs[0]
    # the SymPy basis is nodal at the element's dof points: the ordering matches
    for a in range(n):
        at_nodes = [float(basis[a].subs(dict(zip(SX, disc.dof_points[loc[b]]))))
                    for b in range(n)]
        np.testing.assert_allclose(at_nodes, np.eye(n)[a], atol=1e-15)
    grads = [sym_gradient(f, dim) for f in basis]
    K_ref = np.zeros((n, n))
    M_ref = np.zeros((n, n))
    for a in range(n):
        for b in range(a, n):
            K_ref[a, b] = K_ref[b, a] = float(simplex_integral(
                sum(ga * gb for ga, gb in zip(grads[a], grads[b])), dim))
            M_ref[a, b] = M_ref[b, a] = float(simplex_integral(basis[a] * basis[b], dim))
    asm = Assembler(disc)
    K = asm.stiffness().toarray()[np.ix_(loc, loc)]
    M = asm.mass().toarray()[np.ix_(loc, loc)]
    np.testing.assert_allclose(K, K_ref, rtol=0, atol=1e-13)
    np.testing.assert_allclose(M, M_ref, rtol=0, atol=1e-13)


# ----------------------------------------------------------------------------
# 2. global identities
# ----------------------------------------------------------------------------
@pytest.mark.parametrize("dim,k", DK, ids=DK_IDS)
def test_stiffness_rows_sum_to_zero_and_mass_sums_to_volume(dim, k):
    # constants are in the kernel of K; 1^T M 1 = |domain| (exact integration)
    mesh = perturbed_mesh(dim, 3 if dim == 2 else 2, seed=k)
    asm = Assembler(Discretization(mesh, k))
    K = asm.stiffness()
    assert abs(K @ np.ones(asm.n_dofs)).max() <= 1e-12 * abs(K).max()
    assert abs(asm.mass().sum() - 1.0) <= 1e-13
    assert abs(asm.mass(3.0).sum() - 3.0) <= 1e-13


@pytest.mark.parametrize("dim,k", DK, ids=DK_IDS)
def test_mass_with_callable_coefficient_integrates_it(dim, k):
    # 1^T M(c) 1 = int c and p^T M(c) p = int c p^2, exact values by SymPy
    c = (lambda x: 2 + x[0] * x[1] - x[1] ** 2) if dim == 2 else (
        lambda x: 2 + x[0] * x[2] - x[1] ** 2)
    c1 = lambda x: 1 + x[0] - 0.5 * x[dim - 1]  # degree 1: c p^2 has degree 2k+1
    mesh = small_mesh(dim, 3 if dim == 2 else 2)
    disc = Discretization(mesh, k)
    asm = Assembler(disc)
    one = np.ones(disc.n_dofs)
    assert abs(one @ asm.mass(c) @ one - float(box_integral(c(SX), dim))) <= 1e-13
    p = disc.interpolate(POLY[dim, k])
    exact = float(box_integral(c1(SX) * POLY[dim, k](SX) ** 2, dim))
    assert abs(p @ asm.mass(c1) @ p - exact) <= 1e-12 * abs(exact)


@pytest.mark.parametrize("dim,k", DK, ids=DK_IDS)
def test_energy_of_polynomial_with_variable_conductivity(dim, k):
    # p^T K(kappa) p = int kappa |grad p|^2 for p of degree k (reproduced
    # exactly by P_k) and kappa of degree 2: exact value by SymPy
    mesh = small_mesh(dim, 3 if dim == 2 else 2)
    disc = Discretization(mesh, k)
    asm = Assembler(disc)
    p_sym = POLY[dim, k](SX)
    grad = sym_gradient(p_sym, dim)
    exact = float(box_integral(KAPPA[dim](SX) * sum(g * g for g in grad), dim))
    p = disc.interpolate(POLY[dim, k])
    assert abs(p @ asm.stiffness(KAPPA[dim]) @ p - exact) <= 1e-12 * exact
    # and with kappa = 1
    exact1 = float(box_integral(sum(g * g for g in grad), dim))
    assert abs(p @ asm.stiffness() @ p - exact1) <= 1e-12 * exact1


@pytest.mark.parametrize("dim,k", [(2, 1), (3, 1), (2, 2), (3, 2)])
def test_tensor_conductivity_energy(dim, k):
    # p^T K(T) p = int grad p . T grad p (exact value by SymPy), constant and
    # per-cell SPD tensors
    T = np.array([[2.0, 0.5], [0.5, 1.0]]) if dim == 2 else np.array(
        [[2.0, 0.3, -0.2], [0.3, 1.5, 0.4], [-0.2, 0.4, 1.0]])
    mesh = small_mesh(dim, 3 if dim == 2 else 2)
    disc = Discretization(mesh, k)
    asm = Assembler(disc)
    p_sym = POLY[dim, k](SX)
    g = sy.Matrix(sym_gradient(p_sym, dim))
    exact = float(box_integral((g.T * sy.Matrix(T.tolist()) * g)[0], dim))
    p = disc.interpolate(POLY[dim, k])
    assert abs(p @ asm.stiffness(T) @ p - exact) <= 1e-12 * exact
    # per-cell tensors: all equal to T gives the same matrix
    Tc = np.repeat(T[None], mesh.n_cells, axis=0)
    assert rel_diff(asm.stiffness(Tc), asm.stiffness(T)) <= 1e-14
    # T = 3 I equals the scalar conductivity 3
    assert rel_diff(asm.stiffness(3.0 * np.eye(dim)), asm.stiffness(3.0)) <= 1e-14


@pytest.mark.parametrize("dim,k", DK, ids=DK_IDS)
def test_stiffness_symmetric_psd_with_one_zero_eigenvalue(dim, k):
    # without boundary conditions the kernel of K is the constants: exactly
    # one zero eigenvalue (scipy.linalg.eigh), the rest positive; M is SPD
    mesh = perturbed_mesh(dim, 3 if dim == 2 else 2, seed=10 + k)
    asm = Assembler(Discretization(mesh, k))
    K = asm.stiffness().toarray()
    M = asm.mass().toarray()
    assert np.array_equal(K, K.T)
    assert np.array_equal(M, M.T)
    w = sla.eigh(K, eigvals_only=True)
    tol = 1e-10 * w[-1]
    assert abs(w[0]) <= tol
    assert w[1] > 1e3 * tol
    assert sla.eigh(M, eigvals_only=True)[0] > 0


# ----------------------------------------------------------------------------
# 3. agreement with an independent NumPy/SciPy COO assembly
# ----------------------------------------------------------------------------
@pytest.mark.parametrize("dim,k", [(2, 1), (2, 2), (3, 1), (3, 2)])
def test_matches_vectorised_coo_reference_on_perturbed_mesh(dim, k):
    mesh = perturbed_mesh(dim, 6 if dim == 2 else 3, seed=7 * dim + k)
    disc = Discretization(mesh, k)
    asm = Assembler(disc)
    K_ref, M_ref = reference_matrices(disc)
    K, M = asm.stiffness(), asm.mass()
    assert rel_diff(K, K_ref) <= 1e-12
    assert rel_diff(M, M_ref) <= 1e-12
    # same stored pattern as the COO reference (all cell couplings, no more)
    assert K.nnz == K_ref.nnz
    # per-cell coefficients
    rng = np.random.default_rng(3)
    kap = rng.uniform(0.5, 2.0, mesh.n_cells)
    cof = rng.uniform(-1.0, 2.0, mesh.n_cells)
    K_ref, M_ref = reference_matrices(disc, conductivity=kap, coefficient=cof)
    assert rel_diff(asm.stiffness(kap), K_ref) <= 1e-12
    assert rel_diff(asm.mass(cof), M_ref) <= 1e-12


@pytest.mark.parametrize("dim,k", [(2, 1), (2, 3), (3, 1), (3, 2)])
def test_matches_coo_reference_with_shuffled_numbering(dim, k):
    # vertices and cells in random order: no locality for the row-range
    # scatter to rely on; values and thread independence must not change
    base = small_mesh(dim, 5 if dim == 2 else 3)
    rng = np.random.default_rng(50 + k)
    perm = rng.permutation(base.n_vertices)
    cells = np.argsort(perm)[base.cells][rng.permutation(base.n_cells)]
    mesh = Mesh(base.points[perm], cells)
    disc = Discretization(mesh, k)
    asm = Assembler(disc)
    K_ref, M_ref = reference_matrices(disc)
    assert rel_diff(asm.stiffness(), K_ref) <= 1e-12
    assert rel_diff(asm.mass(), M_ref) <= 1e-12
    if numba.config.NUMBA_NUM_THREADS >= 2:
        saved = numba.get_num_threads()
        try:
            numba.set_num_threads(1)
            one = [asm.stiffness().data.tobytes(), asm.mass().data.tobytes()]
            numba.set_num_threads(2)
            two = [asm.stiffness().data.tobytes(), asm.mass().data.tobytes()]
        finally:
            numba.set_num_threads(saved)
        assert one == two


def test_p4_tetrahedra_long_rows_match_coo_reference():
    # P4 rows exceed 256 entries here: the wider position-map type is used
    disc = Discretization(structured_tetrahedra(3, 3, 3), 4)
    asm = Assembler(disc)
    assert np.diff(asm.indptr).max() > 256
    # the pattern is declared canonical to SciPy (sorted, unique columns in every
    # row); rows this long go through the heapsort branch, so check it row by row
    rows = np.repeat(np.arange(disc.n_dofs), np.diff(asm.indptr))
    step = np.diff(asm.indices.astype(np.int64))
    same_row = rows[1:] == rows[:-1]
    assert np.all(step[same_row] > 0)
    K_ref, M_ref = reference_matrices(disc)
    assert rel_diff(asm.stiffness(), K_ref) <= 1e-12
    assert rel_diff(asm.mass(), M_ref) <= 1e-12


# ----------------------------------------------------------------------------
# 4. Dirichlet Laplacian eigenvalues
# ----------------------------------------------------------------------------
def dirichlet_eigenvalues(mesh, k, n_eig):
    disc = Discretization(mesh, k)
    asm = Assembler(disc)
    keep = np.setdiff1d(np.arange(disc.n_dofs), disc.boundary_dofs())
    K = asm.stiffness()[keep][:, keep]
    M = asm.mass()[keep][:, keep]
    w = spla.eigsh(K.tocsc(), k=n_eig, M=M.tocsc(), sigma=0.0, which="LM",
                   return_eigenvectors=False)
    return np.sort(w)


def test_dirichlet_eigenvalues_unit_square_p2():
    # Laplacian eigenvalues on the unit square: pi^2 (m^2 + n^2) (any PDE text)
    exact = np.pi**2 * np.array([2, 5, 5, 8])
    w = dirichlet_eigenvalues(structured_triangles(12, 12), 2, 4)
    np.testing.assert_allclose(w, exact, rtol=1e-3)
    assert np.all(w >= exact)  # Rayleigh-Ritz upper bounds (Strang & Fix 1973)


def test_dirichlet_eigenvalues_unit_cube_p2():
    # unit cube: pi^2 (l^2 + m^2 + n^2) = 3 pi^2, then 6 pi^2 (triple)
    exact = np.pi**2 * np.array([3, 6, 6, 6])
    w = dirichlet_eigenvalues(structured_tetrahedra(10, 10, 10), 2, 4)
    np.testing.assert_allclose(w[:3], exact[:3], rtol=1e-3)
    # the mesh splits the triple eigenvalue; its largest copy is the least
    # accurate one on this mesh
    np.testing.assert_allclose(w[3], exact[3], rtol=2e-3)
    assert np.all(w >= exact)  # Rayleigh-Ritz upper bounds (Strang & Fix 1973)


# ----------------------------------------------------------------------------
# 5. load vectors and facet terms
# ----------------------------------------------------------------------------
@pytest.mark.parametrize("dim,k", DK, ids=DK_IDS)
def test_load_vectors(dim, k):
    mesh = perturbed_mesh(dim, 3 if dim == 2 else 2, seed=20 + k)
    disc = Discretization(mesh, k)
    asm = Assembler(disc)
    # constant source: the basis is a partition of unity, so sum = |domain|
    assert abs(asm.load(1.0).sum() - 1.0) <= 1e-13
    assert abs(asm.load(2.5).sum() - 2.5) <= 1e-13
    # dof vector: the load of the interpolant is exactly M u
    u = np.random.default_rng(k).standard_normal(disc.n_dofs)
    M = asm.mass()
    assert abs(asm.load(u) - M @ u).max() <= 1e-13 * abs(M @ u).max()


@pytest.mark.parametrize("dim,k", DK, ids=DK_IDS)
def test_load_of_polynomial_source(dim, k):
    # f of degree k+1, p of degree k: p^T b(f) = int f p, 1^T b(f) = int f,
    # exact values by SymPy (the default quadrature degree 2k+1 is exact here)
    f = POLY[dim, min(k + 1, 3)]
    mesh = small_mesh(dim, 3 if dim == 2 else 2)
    disc = Discretization(mesh, k)
    asm = Assembler(disc)
    b = asm.load(f)
    assert abs(b.sum() - float(box_integral(f(SX), dim))) <= 1e-13
    p = disc.interpolate(POLY[dim, k])
    exact = float(box_integral(f(SX) * POLY[dim, k](SX), dim))
    assert abs(p @ b - exact) <= 1e-12 * abs(exact)


@pytest.mark.parametrize("dim,k", [(2, 1), (2, 2), (3, 1), (3, 2)])
def test_load_entries_match_high_degree_reference_quadrature(dim, k):
    # b_i = int f phi_i, by a degree-10 reference quadrature done here with
    # NumPy (f is smooth, not polynomial: both sides converge, and the
    # assembler's own degree is raised to 10 to compare like with like)
    f = lambda x: np.exp(x[0]) * np.cos(2 * x[1])
    mesh = perturbed_mesh(dim, 3 if dim == 2 else 2, seed=30 + k)
    disc = Discretization(mesh, k)
    rule = simplex_quadrature(dim, 10)
    P = mesh.points[mesh.cells]
    J = np.transpose(P[:, 1:] - P[:, :1], (0, 2, 1))
    det = np.abs(np.linalg.det(J))
    X = P[:, :1] + np.einsum("cij,qj->cqi", J, rule.points)   # (m, q, d)
    fx = f(np.moveaxis(X, 2, 0))                                # (m, q)
    be = np.einsum("q,c,cq,qa->ca", rule.weights, det, fx, disc.element.tabulate(rule.points))
    ref = np.bincount(disc.cell_dofs.ravel(), weights=be.ravel(), minlength=disc.n_dofs)
    b = Assembler(disc, quadrature_degree=10).load(f)
    assert abs(b - ref).max() <= 1e-13 * abs(ref).max()
    # with the default degree the values still agree to quadrature accuracy
    b_default = Assembler(disc).load(f)
    assert abs(b_default - ref).max() <= 1e-3 * abs(ref).max()


@pytest.mark.parametrize("dim,k", [(2, 1), (2, 2), (3, 1), (3, 2)])
def test_boundary_mass_and_load_integrate_over_tagged_facets(dim, k):
    # sum of the facet mass matrix = |tagged boundary|; sum of the facet
    # load = int_tag g (exact values by SymPy on the face y = 1)
    mesh = small_mesh(dim, 3 if dim == 2 else 2)
    asm = Assembler(Discretization(mesh, k))
    assert abs(asm.boundary_mass("ymax").sum() - 1.0) <= 1e-13
    assert abs(asm.boundary_mass("boundary").sum() - 2.0 * dim) <= 1e-13
    assert abs(asm.boundary_mass("xmin", 2.0).sum() - 2.0) <= 1e-13
    g = (lambda x: 1 + x[0] ** 2 * x[1]) if dim == 2 else (
        lambda x: 1 + x[0] ** 2 * x[1] + x[2])
    on_top = g([SX[0], 1, SX[2]] if dim == 3 else [SX[0], 1])
    other = [(SX[0], 0, 1)] + ([(SX[2], 0, 1)] if dim == 3 else [])
    exact = float(sy.integrate(sy.expand(on_top), *other))
    assert abs(asm.boundary_load("ymax", g).sum() - exact) <= 1e-13
    assert abs(asm.boundary_load("ymax", 3.0).sum() - 3.0) <= 1e-13
    # the facet mass applied to the interpolant of g integrates it too
    disc = asm.disc
    one = np.ones(disc.n_dofs)
    gl = lambda x: 1 + x[0] - 0.5 * x[dim - 1]  # linear: interpolated exactly
    exact_l = float(sy.integrate(sy.expand(gl([SX[0], 1, SX[2]][:dim])), *other))
    assert abs(one @ asm.boundary_mass("ymax") @ disc.interpolate(gl) - exact_l) <= 1e-13
    # a facet mass is symmetric (to rounding) and only touches dofs on the
    # tagged facets
    B = asm.boundary_mass("ymax")
    assert abs(B - B.T).max() <= 1e-15 * abs(B).max()
    on = disc.boundary_dofs("ymax")
    touched = np.unique(B.tocoo().coords[0][B.tocoo().data != 0])
    assert set(touched.tolist()) <= set(on.tolist())


# ----------------------------------------------------------------------------
# 6. in-place re-assembly
# ----------------------------------------------------------------------------
@pytest.mark.parametrize("dim,k", [(2, 1), (2, 2), (3, 1), (3, 2)])
def test_out_reassembles_in_place(dim, k):
    mesh = small_mesh(dim)
    asm = Assembler(Discretization(mesh, k))
    kap = np.linspace(1.0, 3.0, mesh.n_cells)
    K = asm.stiffness()
    buf = K.data
    K2 = asm.stiffness(kap, out=K)
    assert K2 is K
    assert np.shares_memory(K2.data, buf)
    assert np.array_equal(K2.toarray(), asm.stiffness(kap).toarray())
    M = asm.mass()
    M2 = asm.mass(KAPPA[dim], out=M)
    assert M2 is M and np.shares_memory(M2.data, M.data)
    assert np.array_equal(M2.toarray(), asm.mass(KAPPA[dim]).toarray())
    # mass into a stiffness matrix of the same Assembler: same pattern, allowed
    assert np.array_equal(asm.mass(out=K).toarray(), asm.mass().toarray())
    B = asm.boundary_mass("ymax")
    B2 = asm.boundary_mass("ymax", 5.0, out=B)
    assert B2 is B
    assert np.array_equal(B2.toarray(), asm.boundary_mass("ymax", 5.0).toarray())
    b = np.full(asm.n_dofs, np.nan)
    b2 = asm.load(KAPPA[dim], out=b)
    assert b2 is b and np.array_equal(b, asm.load(KAPPA[dim]))
    g = np.full(asm.n_dofs, 7.0)  # out= for a facet load starts from zero
    assert asm.boundary_load("ymax", 2.0, out=g) is g
    assert np.array_equal(g, asm.boundary_load("ymax", 2.0))


def test_out_rejects_foreign_or_modified_matrices():
    mesh = small_mesh(2)
    asm = Assembler(Discretization(mesh, 1))
    other = Assembler(Discretization(small_mesh(2, 5), 1))
    p2 = Assembler(Discretization(mesh, 2))
    K = asm.stiffness()
    with pytest.raises(InputError, match="out="):
        asm.stiffness(out=other.stiffness())        # wrong shape
    with pytest.raises(InputError, match="out="):
        asm.stiffness(out=K.toarray())              # not a sparse matrix
    with pytest.raises(InputError, match="out="):
        asm.mass(out=p2.mass())                     # another Assembler
    pruned = asm.boundary_mass("ymax").copy()
    pruned.eliminate_zeros()                        # pattern changed
    assert pruned.nnz < asm.nnz
    with pytest.raises(InputError, match="sparsity pattern"):
        asm.boundary_mass("ymax", out=pruned)
    single = sps.csr_array((K.data.astype(np.float32), K.indices, K.indptr), shape=K.shape)
    with pytest.raises(InputError, match="float64"):
        asm.stiffness(out=single)
    with pytest.raises(InputError, match="out="):
        asm.load(1.0, out=np.zeros(asm.n_dofs + 1))
    with pytest.raises(InputError, match="out="):
        asm.load(1.0, out=np.zeros(asm.n_dofs, dtype=np.int64))
    with pytest.raises(InputError, match="out="):
        asm.boundary_load("ymax", out=[0.0] * asm.n_dofs)


# ----------------------------------------------------------------------------
# 7. determinism
# ----------------------------------------------------------------------------
def _products(asm, dim):
    kap = KAPPA[dim]
    return [asm.stiffness().data, asm.stiffness(kap).data, asm.mass().data,
            asm.mass(kap).data, asm.load(kap), asm.load(1.0)]


@pytest.mark.parametrize("dim,k", [(2, 1), (2, 2), (3, 1), (3, 2)])
def test_bitwise_identical_for_any_thread_count(dim, k):
    max_threads = numba.config.NUMBA_NUM_THREADS
    if max_threads < 2:
        pytest.skip("numba has a single thread on this machine")
    mesh = perturbed_mesh(dim, 16 if dim == 2 else 5, seed=40 + k)
    asm = Assembler(Discretization(mesh, k))
    saved = numba.get_num_threads()
    results = {}
    try:
        for t in sorted({1, 2, min(3, max_threads), max_threads}):
            numba.set_num_threads(t)
            results[t] = [a.tobytes() for a in _products(asm, dim)]
            # a second run with the same thread count is identical too
            assert results[t] == [a.tobytes() for a in _products(asm, dim)]
    finally:
        numba.set_num_threads(saved)
    first = results[1]
    for t, r in results.items():
        assert r == first, f"{t} threads differ from 1 thread"


# ----------------------------------------------------------------------------
# 8. bad coefficients
# ----------------------------------------------------------------------------
@pytest.fixture(scope="module")
def asm2():
    return Assembler(Discretization(small_mesh(2), 2))


def test_nan_conductivity_rejected(asm2):
    m = asm2.mesh.n_cells
    with pytest.raises(InputError, match="non-finite"):
        asm2.stiffness(np.nan)
    kap = np.ones(m)
    kap[4] = np.nan
    with pytest.raises(InputError, match="cell 4"):
        asm2.stiffness(kap)
    with pytest.raises(InputError, match="non-finite"):
        asm2.stiffness(lambda x: np.where(x[0] > 0.5, np.nan, 1.0))
    with pytest.raises(InputError, match="non-finite"):
        asm2.mass(np.inf)
    with pytest.raises(InputError, match="non-finite"):
        asm2.load(lambda x: np.where(x[1] < 0.5, 1.0, np.inf))


@pytest.mark.parametrize("value", [0.0, -1.0])
def test_nonpositive_conductivity_names_first_cell(asm2, value):
    m = asm2.mesh.n_cells
    with pytest.raises(InputError, match="non-positive"):
        asm2.stiffness(value)
    kap = np.ones(m)
    kap[[7, 11]] = value
    with pytest.raises(InputError, match=r"in cell 7 \(2 such values\)"):
        asm2.stiffness(kap)
    # a callable negative in the cells touching x > 0.75 only: the message
    # names the first such cell and the point
    cells = asm2.mesh.cells
    centroid_x = asm2.mesh.points[cells, 0].max(axis=1)
    first = int(np.flatnonzero(centroid_x > 0.75)[0])
    with pytest.raises(InputError, match=rf"in cell {first} .*at x ="):
        asm2.stiffness(lambda x: np.where(x[0] > 0.75, value, 1.0))


def test_bad_tensors_rejected(asm2):
    m = asm2.mesh.n_cells
    with pytest.raises(InputError, match="not symmetric"):
        asm2.stiffness(np.array([[1.0, 0.5], [0.0, 1.0]]))
    with pytest.raises(InputError, match="not positive definite"):
        asm2.stiffness(np.array([[1.0, 2.0], [2.0, 1.0]]))
    T = np.repeat(np.eye(2)[None], m, axis=0)
    T[3] = [[1.0, 0.0], [0.0, -1.0]]
    with pytest.raises(InputError, match="cell 3"):
        asm2.stiffness(T)
    T[3] = np.nan
    with pytest.raises(InputError, match="cell 3"):
        asm2.stiffness(T)
    with pytest.raises(InputError, match="tensor of shape"):
        asm2.stiffness(np.eye(3))
    with pytest.raises(InputError, match="tensor of shape"):
        asm2.stiffness(np.ones((m + 1, 2, 2)))


def test_wrong_shape_coefficients_rejected(asm2):
    m = asm2.mesh.n_cells
    n = asm2.n_dofs
    assert n != m and n != m + 1
    with pytest.raises(InputError, match="shape"):
        asm2.stiffness(np.ones(m + 1))
    with pytest.raises(InputError, match="shape"):
        asm2.mass(np.ones((m, 2)))
    with pytest.raises(InputError, match="shape"):
        asm2.load(np.ones(m + 1))
    with pytest.raises(InputError, match="shape"):
        asm2.boundary_load("ymax", np.ones(2))
    with pytest.raises(InputError):
        asm2.stiffness("1.0")
    with pytest.raises(InputError):
        asm2.mass(True)


def test_callable_with_wrong_output_rejected(asm2):
    with pytest.raises(InputError, match="returned shape"):
        asm2.stiffness(lambda x: np.ones((2, x.shape[1])))
    with pytest.raises(InputError, match="returned shape"):
        asm2.mass(lambda x: x[0][:-1])
    with pytest.raises(InputError, match="returned shape"):
        asm2.load(lambda x: x)
    with pytest.raises(InputError, match="returned shape"):
        asm2.boundary_mass("ymax", lambda x: x[0][:1])
    with pytest.raises(InputError, match="callable failed"):
        asm2.stiffness(lambda x: x[5])


def test_out_aliasing_an_input_is_refused_and_a_separate_out_gives_the_fresh_result():
    import galerkit as gk
    from galerkit.errors import InputError

    asm = gk.Assembler(gk.Discretization(gk.structured_triangles(3, 3), 2))
    f = np.linspace(0.0, 1.0, asm.n_dofs)
    fresh = asm.load(f)
    with pytest.raises(InputError, match=r"Assembler\.load: out= shares memory with source"):
        asm.load(f, out=f)
    np.testing.assert_array_equal(f, np.linspace(0.0, 1.0, asm.n_dofs))  # untouched
    out = np.empty(asm.n_dofs)
    np.testing.assert_array_equal(asm.load(f, out=out), fresh)
    K = asm.stiffness()
    K.data[:] = 1.0  # a valid conductivity, read from the matrix being written
    with pytest.raises(InputError, match=r"Assembler\.stiffness: out= shares memory with "
                                         r"conductivity"):
        asm.stiffness(K.data[:asm.mesh.n_cells], out=K)
    with pytest.raises(InputError, match=r"Assembler\.boundary_mass: out= shares memory"):
        asm.boundary_mass("xmin", K.data[:len(asm.mesh.tagged_facets("xmin"))], out=K)
