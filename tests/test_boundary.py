"""Specification of Dirichlet elimination (galerkit.boundary).

Reference: SciPy sparse fancy indexing, ``A[free][:, free]`` and
``b[free] - A[free][:, fixed] @ g`` (the lifting of inhomogeneous Dirichlet
values, common practice), computed independently of the numba kernels under
test.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from galerkit import Assembler, Discretization, structured_tetrahedra, structured_triangles
from galerkit.boundary import DirichletElimination, dirichlet_values
from galerkit.errors import InputError


def stiffness(dim, degree, n=3):
    mesh = structured_triangles(n, n) if dim == 2 else structured_tetrahedra(n, n, n)
    asm = Assembler(Discretization(mesh, degree))
    return asm, asm.stiffness(lambda x: 1.0 + x[0])


def reference(A, fixed, g, b):
    """(A_ff, b_f - A_fd g) by SciPy fancy indexing; fixed sorted and unique."""
    free = np.setdiff1d(np.arange(A.shape[0]), fixed)
    A = sp.csr_array(A)
    return A[free][:, free], b[free] - A[free][:, fixed] @ g, free


@pytest.mark.parametrize("dim, degree", [(2, 1), (2, 2), (3, 1), (3, 2)])
def test_reduce_matches_scipy_fancy_indexing(dim, degree):
    # SciPy fancy indexing as the reference
    asm, A = stiffness(dim, degree)
    fixed = asm.disc.boundary_dofs(["xmin", "ymax"])
    rng = np.random.default_rng(dim * 10 + degree)
    g = rng.standard_normal(fixed.size)
    b = rng.standard_normal(A.shape[0])
    elim = DirichletElimination(A, fixed)
    Af, bf = elim.reduce(A, b, g)
    Rf, rb, free = reference(A, fixed, g, b)
    np.testing.assert_array_equal(elim.free, free)
    assert Af.shape == (free.size, free.size) and elim.n_free == free.size
    assert Af.has_sorted_indices
    assert abs(Af - Rf).max() == 0.0  # a gather: bit for bit
    np.testing.assert_allclose(bf, rb, rtol=1e-13, atol=1e-13 * np.abs(rb).max())
    # the reduced stiffness is symmetric positive definite (NumPy eigvalsh)
    dense = Af.toarray()
    assert np.array_equal(dense, dense.T)
    assert np.linalg.eigvalsh(dense).min() > 0


def test_dofs_in_any_order_with_duplicates():
    # SciPy fancy indexing as the reference; values follow the order the dofs were given
    asm, A = stiffness(2, 2)
    fixed = asm.disc.boundary_dofs("xmax")
    rng = np.random.default_rng(0)
    shuffled = rng.permutation(fixed)
    g_by_dof = dict(zip(fixed.tolist(), rng.standard_normal(fixed.size)))
    b = rng.standard_normal(A.shape[0])
    Rf, rb, free = reference(A, fixed, np.array([g_by_dof[d] for d in fixed]), b)

    elim = DirichletElimination(A, shuffled)
    values = np.array([g_by_dof[d] for d in shuffled.tolist()])
    np.testing.assert_array_equal(elim.dofs, fixed)
    np.testing.assert_allclose(elim.reduce_rhs(A, b, values), rb, rtol=1e-13, atol=1e-13)
    # with duplicates, values may come one per dof given ...
    dup = np.concatenate([shuffled, shuffled[:3]])
    elim = DirichletElimination(A, dup)
    v_dup = np.array([g_by_dof[d] for d in dup.tolist()])
    np.testing.assert_allclose(elim.reduce_rhs(A, b, v_dup), rb, rtol=1e-13, atol=1e-13)
    # ... or one per sorted unique dof (elim.dofs)
    v_sorted = np.array([g_by_dof[d] for d in elim.dofs.tolist()])
    np.testing.assert_allclose(elim.reduce_rhs(A, b, v_sorted), rb, rtol=1e-13, atol=1e-13)
    assert abs(elim.reduce_matrix(A) - Rf).max() == 0.0


def test_expand_restores_the_full_vector():
    asm, A = stiffness(2, 2)
    fixed = asm.disc.boundary_dofs()
    rng = np.random.default_rng(1)
    u = rng.standard_normal(A.shape[0])
    elim = DirichletElimination(A, fixed)
    np.testing.assert_array_equal(elim.expand(u[elim.free], u[fixed]), u)
    # a scalar value goes to every Dirichlet dof
    w = elim.expand(u[elim.free], 2.5)
    assert np.all(w[fixed] == 2.5) and np.array_equal(w[elim.free], u[elim.free])
    # solve the reduced system: every free equation of the full system holds,
    # and the Dirichlet values are attained (common practice: lifting)
    b = asm.load(1.0)
    g = asm.disc.interpolate(lambda x: x[0] * x[1])[fixed]
    Af, bf = elim.reduce(A, b, g)
    x = elim.expand(spla.spsolve(Af.tocsc(), bf), g)
    assert np.array_equal(x[fixed], g)
    assert np.abs((A @ x - b)[elim.free]).max() <= 1e-12


def test_rereduction_in_place_shares_memory():
    asm, A = stiffness(2, 2)
    fixed = asm.disc.boundary_dofs("ymin")
    elim = DirichletElimination(A, fixed)
    R = elim.reduce_matrix(A)
    data = R.data
    # a new conductivity on the same pattern, re-assembled in place too
    A2 = asm.stiffness(lambda x: 3.0 + x[1] ** 2, out=A)
    R2 = elim.reduce_matrix(A2, out=R)
    assert R2 is R and R2.data is data
    assert np.shares_memory(R2.indptr, elim.reduced_indptr)
    assert np.shares_memory(R2.indices, elim.reduced_indices)
    Rf, _, _ = reference(A2, fixed, np.zeros(fixed.size), np.zeros(A.shape[0]))
    assert abs(R2 - Rf).max() == 0.0  # SciPy fancy indexing as the reference


def test_no_dirichlet_dofs_is_the_identity_and_all_dofs_leave_nothing():
    asm, A = stiffness(2, 1)
    b = np.arange(A.shape[0], dtype=float)
    elim = DirichletElimination(A, np.array([], dtype=np.int64))
    Af, bf = elim.reduce(A, b, np.array([]))
    assert abs(Af - A).max() == 0.0 and np.array_equal(bf, b)
    elim = DirichletElimination(A, np.arange(A.shape[0]))
    Af, bf = elim.reduce(A, b, b)
    assert Af.shape == (0, 0) and bf.shape == (0,)
    np.testing.assert_array_equal(elim.expand(np.array([]), b), b)


def test_wrong_pattern_raises():
    asm, A = stiffness(2, 2)
    elim = DirichletElimination(A, asm.disc.boundary_dofs("xmin"))
    # another mesh: other shape
    _, other = stiffness(2, 2, n=4)
    with pytest.raises(InputError, match="pattern"):
        elim.reduce_matrix(other)
    # same shape, fewer stored entries (explicit zeros removed)
    pruned = A.copy()
    pruned.data[np.abs(pruned.data) < 1e-14] = 0.0
    pruned.eliminate_zeros()
    assert pruned.nnz < A.nnz
    with pytest.raises(InputError, match="pattern"):
        elim.reduce_matrix(pruned)
    # same row lengths (indptr), other columns
    shifted = sp.csr_array((A.data.copy(), (A.indices + 1) % A.shape[1], A.indptr.copy()),
                           shape=A.shape)
    with pytest.raises(InputError, match="pattern"):
        elim.reduce_matrix(shifted)
    with pytest.raises(InputError, match="pattern"):
        elim.reduce_rhs(shifted, np.zeros(A.shape[0]), 0.0)
    # not CSR
    with pytest.raises(InputError, match="pattern"):
        elim.reduce_matrix(A.tocsc())
    # out= of another pattern, or too small
    R = elim.reduce_matrix(A)
    with pytest.raises(InputError, match="out="):
        elim.reduce_matrix(A, out=sp.csr_array(R.toarray()[:-1, :-1]))
    foreign = DirichletElimination(A, asm.disc.boundary_dofs("ymin")).reduce_matrix(A)
    assert foreign.shape == R.shape  # same size, other pattern
    with pytest.raises(InputError, match="out="):
        elim.reduce_matrix(A, out=foreign)


def test_bad_sizes_raise():
    asm, A = stiffness(2, 1)
    n = A.shape[0]
    with pytest.raises(InputError, match="Dirichlet dofs"):
        DirichletElimination(A, [0, n])
    with pytest.raises(InputError, match="Dirichlet dofs"):
        DirichletElimination(A, [-1])
    elim = DirichletElimination(A, [0, 3])
    with pytest.raises(InputError, match="rhs"):
        elim.reduce_rhs(A, np.zeros(n - 1), [1.0, 2.0])
    with pytest.raises(InputError, match="Dirichlet values"):
        elim.reduce_rhs(A, np.zeros(n), [1.0, 2.0, 3.0])


def test_dirichlet_values_from_number_callable_and_dof_array():
    disc = Discretization(structured_triangles(3, 3), 2)
    dofs = disc.boundary_dofs("ymax")
    np.testing.assert_array_equal(dirichlet_values(disc, 2.0, dofs), np.full(dofs.size, 2.0))
    x = disc.dof_points[dofs]
    np.testing.assert_allclose(dirichlet_values(disc, lambda p: p[0] - p[1], dofs),
                               x[:, 0] - x[:, 1], rtol=0, atol=0)
    full = np.arange(disc.n_dofs, dtype=float)
    np.testing.assert_array_equal(dirichlet_values(disc, full, dofs), full[dofs])
    with pytest.raises(InputError, match="shape"):
        dirichlet_values(disc, np.zeros(3), dofs)
    with pytest.raises(InputError, match="non-finite"):
        dirichlet_values(disc, lambda p: np.where(p[0] > 0.5, np.nan, 0.0), dofs)


@pytest.mark.parametrize("first", ["reduce", "reduce_matrix", "pattern"])
def test_non_symmetric_patterns_reduce_like_scipy(first):
    # SciPy fancy indexing as the reference.  The reduced pattern's row lengths
    # are predicted from the Dirichlet rows, which holds for structurally
    # symmetric patterns only: here entries are added to free rows only (and
    # removed from one Dirichlet row), so the prediction fails in both
    # directions and the exact counting must take over.
    rng = np.random.default_rng(7)
    n = 60
    A = sp.random(n, n, density=0.12, random_state=rng, format="lil") + sp.eye(n, format="lil")
    fixed = np.array([3, 10, 11, 40, 59])
    A[5, 10] = 2.5   # a free row with an extra Dirichlet column
    A[10, :] = 0.0   # a Dirichlet row without its columns
    A[10, 10] = 1.0
    A = sp.csr_array(A)
    assert abs(A - A.T).max() > 0  # not symmetric, also not structurally
    b = rng.standard_normal(n)
    g = rng.standard_normal(fixed.size)
    elim = DirichletElimination(A, fixed)
    if first == "pattern":
        assert elim.reduced_indices.size == elim.nnz
    if first == "reduce_matrix":
        R = elim.reduce_matrix(A)
        bf = elim.reduce_rhs(A, b, g)
    else:
        R, bf = elim.reduce(A, b, g)
    Rref, bref, _ = reference(A, fixed, g, b)
    assert R.nnz == Rref.nnz
    assert abs(R - Rref).max() == 0.0
    assert np.abs(bf - bref).max() <= 1e-14 * max(1.0, np.abs(bref).max())
    R2, _ = elim.reduce(A * 2.0, b, g, out=R)
    assert R2 is R and abs(R - 2.0 * Rref).max() == 0.0
