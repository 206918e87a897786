"""Specification of the array-level API (galerkit.bindings.host.embed) and the matrix-free
operator (galerkit.bindings.host.operators).

References used below (each test names its own):

* the Assembler and the kernel functionals of this package, which the
  array-level API must reproduce (same kernels: equality to 1e-13 relative,
  in practice bitwise);
* the partition of unity of Lagrange bases (any FEM text, e.g. Brenner &
  Scott 2008): stiffness rows sum to zero, the load of f = 1 sums to the
  volume, so a per-cell source f_c gives sum_c f_c |T_c|;
* SciPy: the assembled product ``K @ x`` (scipy.sparse), ``spsolve`` and
  ``scipy.sparse.linalg.cg`` for the matrix-free operator.
"""

from __future__ import annotations

import numba
import numpy as np
import pytest
import scipy.sparse.linalg as spla

from galerkit import (Assembler, Discretization, h1_seminorm_error, l2_error,
                      structured_tetrahedra, structured_triangles)
from galerkit.bindings.host import embed
from galerkit.bindings.host.operators import MatrixFreeStiffness
from galerkit.errors import InputError


def host_mesh(dim, n=None, seed=None):
    """A galerkit mesh plus the host's own writeable copies of its arrays."""
    mesh = structured_triangles(n or 5, n or 4) if dim == 2 else \
        structured_tetrahedra(n or 2, n or 2, n or 3)
    points = np.array(mesh.points)
    if seed is not None:  # move interior vertices: cells of different shapes
        rng = np.random.default_rng(seed)
        inner = np.all((points > 1e-12) & (points < 1 - 1e-12), axis=1)
        points[inner] += 0.1 / (n or 4) * rng.uniform(-1, 1, (int(inner.sum()), dim))
    return mesh, points, np.array(mesh.cells)


def rel(a, b):
    a, b = np.asarray(a), np.asarray(b)
    return float(np.abs(a - b).max() / max(np.abs(b).max(), 1e-300))


def galerkit_mesh(points, cells):
    from galerkit import Mesh
    return Mesh(points, cells)


# ----------------------------------------------------------------------------
# symbolic phase
# ----------------------------------------------------------------------------
@pytest.mark.parametrize("dim,degree", [(2, 1), (2, 3), (3, 1), (3, 2)])
def test_pattern_and_plan_equal_the_assemblers(dim, degree):
    # reference: the Assembler's symbolic phase on the same cells
    mesh, points, cells = host_mesh(dim)
    asm = Assembler(Discretization(mesh, degree))
    indptr, indices, plan = embed.pattern(cells, degree, points=points)
    assert np.array_equal(indptr, asm.indptr) and np.array_equal(indices, asm.indices)
    assert indptr.dtype == np.int32 and indices.dtype == np.int32
    assert np.array_equal(plan["cell_order"], asm.order)
    assert np.array_equal(plan["position_map"], asm.posmap)
    assert plan["position_map"].dtype == np.uint8
    assert plan["nnz"] == asm.nnz and plan["n_dofs"] == asm.n_dofs
    assert all(not v.flags.writeable for v in plan.values() if isinstance(v, np.ndarray))
    if degree > 1:
        assert np.array_equal(plan["cell_dofs"], asm.disc.cell_dofs)


def test_pattern_copies_the_cells_so_the_host_may_reuse_its_array():
    mesh, points, cells = host_mesh(2)
    _, _, plan = embed.pattern(cells)
    assert not np.shares_memory(plan["cells"], cells)
    cells[:] = 0  # the host recycles its buffer: the plan is unaffected
    K = embed.stiffness(points, plan, np.empty(plan["nnz"]))
    assert rel(K, Assembler(Discretization(mesh, 1)).stiffness().data) == 0.0


# ----------------------------------------------------------------------------
# numeric phase against the Assembler
# ----------------------------------------------------------------------------
@pytest.mark.parametrize("dim,degree", [(2, 1), (2, 2), (3, 1), (3, 2)])
def test_stiffness_mass_load_equal_the_assemblers(dim, degree):
    mesh, points, cells = host_mesh(dim, seed=3)
    asm = Assembler(Discretization(galerkit_mesh(points, cells), degree))
    _, _, plan = embed.pattern(cells, degree, points=points)
    m, n = plan["n_cells"], plan["n_dofs"]
    data = np.full(plan["nnz"], np.nan)  # every entry must be written
    kappa = np.linspace(0.5, 3.0, m)
    tensor = np.array([[2.0, 0.3, 0.1], [0.3, 1.5, 0.2], [0.1, 0.2, 1.0]])[:dim, :dim].copy()
    for coef in (1.0, 2.5, kappa, tensor):
        embed.stiffness(points, plan, data, coef)
        assert rel(data, asm.stiffness(coef).data) <= 1e-13
    embed.mass(points, plan, data, kappa)
    assert rel(data, asm.mass(kappa).data) <= 1e-13
    b = np.full(n, np.nan)
    f = np.sin(np.arange(n, dtype=float))
    assert rel(embed.load(points, plan, b, f), asm.load(f)) <= 1e-13
    assert rel(embed.load(points, plan, b, 1.5), asm.load(1.5)) <= 1e-13
    # per-cell source: partition of unity gives sum_c f_c |T_c| (any FEM text)
    embed.load(points, plan, b, kappa, kind="cell")
    assert abs(b.sum() - (kappa * asm.mesh.cell_volumes).sum()) <= 1e-13 * b.sum()


def test_results_do_not_depend_on_the_thread_count_of_the_plan():
    # the Assembler's guarantee (fixed summation order) carries over: a plan built
    # under 1 thread and one built under 2 give bitwise equal matrices
    mesh, points, cells = host_mesh(3, seed=5)
    saved = numba.get_num_threads()
    try:
        plans = []
        for t in sorted({1, min(2, numba.config.NUMBA_NUM_THREADS)}):
            numba.set_num_threads(t)
            plans.append(embed.pattern(cells)[2])
        numba.set_num_threads(saved)
        values = [embed.stiffness(points, p, np.empty(p["nnz"]), 1.7).copy() for p in plans]
    finally:
        numba.set_num_threads(saved)
    assert all(np.array_equal(values[0], v) for v in values)


# ----------------------------------------------------------------------------
# zero copy
# ----------------------------------------------------------------------------
def test_kernels_write_into_the_callers_buffers():
    mesh, points, cells = host_mesh(2)
    _, _, plan = embed.pattern(cells)
    data = np.empty(plan["nnz"])
    out = np.empty(plan["n_dofs"])
    assert embed.stiffness(points, plan, data) is data
    assert embed.mass(points, plan, data) is data
    assert embed.load(points, plan, out, 1.0) is out
    A = embed.as_csr(plan, data)
    assert np.shares_memory(A.data, data) and np.shares_memory(A.indices, plan["indices"])
    assert np.shares_memory(A.indptr, plan["indptr"])


def test_host_inputs_reach_the_kernels_without_copies():
    # the arrays the entry points hand to the numba kernels share the host's memory
    mesh, points, cells = host_mesh(2)
    _, _, plan = embed.pattern(cells)
    p = embed._check_points(points, "t", plan["n_vertices"], 2, plan["cells"])
    assert np.shares_memory(p, points) and not p.flags.writeable
    assert points.flags.writeable  # the host's own flags are untouched
    kappa = np.linspace(1, 2, plan["n_cells"])
    assert np.shares_memory(embed._cell_values(kappa, plan["n_cells"], "k", "t", True), kappa)
    tensor = np.tile(np.eye(2), (plan["n_cells"], 1, 1))
    data = np.empty(plan["nnz"])
    embed.stiffness(points, plan, data, tensor)  # a tensor per cell is accepted in place
    assert rel(data, embed.stiffness(points, plan, np.empty(plan["nnz"]), 1.0)) <= 1e-13
    # coordinates are read at each call, not cached: moving the mesh changes the mass
    M1 = embed.mass(points, plan, np.empty(plan["nnz"])).sum()
    points *= 2.0
    M2 = embed.mass(points, plan, np.empty(plan["nnz"])).sum()
    assert abs(M2 - 4.0 * M1) <= 1e-13 * M2


# ----------------------------------------------------------------------------
# bad input: dtype, layout, shape, index, finiteness
# ----------------------------------------------------------------------------
def test_wrong_dtype_or_layout_is_refused_naming_the_expected_one():
    mesh, points, cells = host_mesh(2)
    _, _, plan = embed.pattern(cells)
    data = np.empty(plan["nnz"])
    with pytest.raises(InputError, match=r"points has dtype float32; expected a C-contiguous "
                                         r"float64 array of shape \(30, 2\)"):
        embed.stiffness(points.astype(np.float32), plan, data)
    with pytest.raises(InputError, match="points is not C-contiguous"):
        embed.stiffness(np.asfortranarray(points), plan, data)
    with pytest.raises(InputError, match="must be a C-contiguous float64 array.*got list"):
        embed.stiffness(points.tolist(), plan, data)
    with pytest.raises(InputError, match="data has dtype float32"):
        embed.stiffness(points, plan, data.astype(np.float32))
    with pytest.raises(InputError, match=r"data has shape \(3,\)"):
        embed.stiffness(points, plan, np.empty(3))
    with pytest.raises(InputError, match="data is not C-contiguous"):
        embed.stiffness(points, plan, np.empty(2 * plan["nnz"])[::2])
    ro = np.empty(plan["nnz"])
    ro.flags.writeable = False
    with pytest.raises(InputError, match="data is read-only"):
        embed.stiffness(points, plan, ro)
    with pytest.raises(InputError, match="cells has dtype int16; expected a C-contiguous int32 "
                                         "or int64 array"):
        embed.pattern(cells.astype(np.int16))
    with pytest.raises(InputError, match="conductivity has dtype float32"):
        embed.stiffness(points, plan, data, np.ones(plan["n_cells"], dtype=np.float32))
    with pytest.raises(InputError, match="u has dtype int64"):
        embed.l2_error(points, cells, np.zeros(plan["n_dofs"], dtype=np.int64), np.zeros(30))


def test_bad_values_and_indices_are_refused_naming_where():
    mesh, points, cells = host_mesh(2)
    _, _, plan = embed.pattern(cells)
    data = np.empty(plan["nnz"])
    bad = cells.copy()
    bad[7, 1] = 99
    with pytest.raises(InputError, match=r"cell 7 has vertex indices \[.*99.*\] outside 0\.\.29"):
        embed.pattern(bad, points=points)
    bad = cells.copy()
    bad[4, 2] = bad[4, 0]
    with pytest.raises(InputError, match="cell 4 repeats a vertex"):
        embed.pattern(bad)
    p = points.copy()
    p[11, 1] = np.nan
    with pytest.raises(InputError, match="vertex 11 has a non-finite coordinate"):
        embed.mass(p, plan, data)
    p = points.copy()
    p[cells[3, 0]] = p[cells[3, 1]]  # collapse cell 3 (and its neighbours)
    with pytest.raises(InputError, match=r"cell \d+ .* is degenerate"):
        embed.stiffness(p, plan, data)
    kappa = np.ones(plan["n_cells"])
    kappa[5] = -1.0
    with pytest.raises(InputError, match="non-positive value -1.0 in cell 5"):
        embed.stiffness(points, plan, data, kappa)
    kappa[5] = np.inf
    with pytest.raises(InputError, match="non-finite value inf in cell 5"):
        embed.mass(points, plan, data, kappa)
    with pytest.raises(InputError, match="not positive definite"):
        embed.stiffness(points, plan, data, -np.eye(2))
    with pytest.raises(InputError, match="overlaps points"):
        embed.load(points, plan, points.reshape(-1)[:30], 1.0)
    with pytest.raises(InputError, match="degree 2 needs points="):
        embed.pattern(cells, 2)
    u = np.zeros(plan["n_dofs"])
    with pytest.raises(InputError, match="out of range 0..29 for u of length 30"):
        embed.l2_error(points, cells, u, np.zeros(30),
                       cell_dofs=np.full((plan["n_cells"], 3), 30, dtype=np.int32))


def test_ambiguous_source_array_needs_kind():
    # a rectangle with two interior vertices: 6 vertices and 6 cells, so a per-cell and a
    # per-dof source array have the same shape
    points = np.array([[0, 0], [3, 0], [3, 2], [0, 2], [1, 1], [2, 1]], dtype=float)
    cells = np.array([[0, 1, 4], [1, 5, 4], [1, 2, 5], [2, 3, 5], [3, 4, 5], [3, 0, 4]],
                     dtype=np.int32)
    _, _, plan = embed.pattern(cells, points=points)
    assert plan["n_cells"] == plan["n_dofs"] == 6
    assert abs(embed.mass(points, plan, np.empty(plan["nnz"])).sum() - 6.0) <= 1e-14
    out = np.empty(6)
    with pytest.raises(InputError, match="say kind='cell' or kind='dof'"):
        embed.load(points, plan, out, np.ones(6))
    a = embed.load(points, plan, out, np.ones(6), kind="dof").copy()
    b = embed.load(points, plan, out, np.ones(6), kind="cell").copy()
    assert rel(a, b) <= 1e-15 and abs(a.sum() - 6.0) <= 1e-14  # f = 1 either way


def test_a_tampered_plan_is_refused():
    mesh, points, cells = host_mesh(2)
    _, _, plan = embed.pattern(cells)
    data = np.empty(plan["nnz"])
    loose = {k: (np.array(v) if isinstance(v, np.ndarray) else v) for k, v in plan.items()}
    embed.stiffness(points, loose, data)  # a writeable copy is fine ... but checked every call
    loose["position_map"][3, 1, 2] = 40
    with pytest.raises(InputError, match="position_map does not point at the columns"):
        embed.stiffness(points, loose, data)
    loose["position_map"][:] = plan["position_map"]
    loose["cell_order"][0] = loose["cell_order"][1]
    with pytest.raises(InputError, match="cell_order is not a permutation"):
        embed.mass(points, loose, data)
    loose["cell_order"][:] = plan["cell_order"]
    loose["chunk_cells"][0, 1] = 0
    with pytest.raises(InputError, match="chunk_rows / chunk_cells do not cover"):
        embed.load(points, loose, np.empty(plan["n_dofs"]), 1.0)
    loose["chunk_cells"][:] = plan["chunk_cells"]
    loose["indices"][[0, 1]] = loose["indices"][[1, 0]]
    with pytest.raises(InputError, match="CSR pattern invalid at row 0"):
        embed.stiffness(points, loose, data)
    # a remembered (read-only) plan made writeable again is checked again
    _, _, plan = embed.pattern(cells)
    embed.stiffness(points, plan, data)
    plan["position_map"].flags.writeable = True
    plan["position_map"][0, 0, 0] = 200
    with pytest.raises(InputError, match="position_map does not point"):
        embed.stiffness(points, plan, data)
    del loose["indices"]
    with pytest.raises(InputError, match=r"missing keys \['indices'\]"):
        embed.stiffness(points, loose, data)


# ----------------------------------------------------------------------------
# functionals
# ----------------------------------------------------------------------------
@pytest.mark.parametrize("dim,degree", [(2, 1), (2, 2), (3, 1)])
def test_functionals_equal_the_kernel_functionals(dim, degree):
    mesh, points, cells = host_mesh(dim, seed=2)
    disc = Discretization(galerkit_mesh(points, cells), degree)
    _, _, plan = embed.pattern(cells, degree, points=points)
    u = disc.interpolate(lambda x: np.sin(x[0]) * np.exp(x[1]))
    exact = lambda x: np.sin(x[0]) * np.exp(x[1]) + 0.1 * x[0] ** 3  # noqa: E731
    grad = lambda x: np.array([np.cos(x[0]) * np.exp(x[1]) + 0.3 * x[0] ** 2,  # noqa: E731
                               np.sin(x[0]) * np.exp(x[1])] + ([0 * x[0]] if dim == 3 else []))
    dofs = None if degree == 1 else plan["cell_dofs"]
    c = plan["cells"]
    assert rel(embed.l2_error(points, c, u, exact, cell_dofs=dofs), l2_error(disc, u, exact)) \
        <= 1e-13
    assert rel(embed.h1_seminorm_error(points, c, u, grad, cell_dofs=dofs),
               h1_seminorm_error(disc, u, grad)) <= 1e-13
    ref = disc.interpolate(lambda x: x[0] * x[1])
    zero = lambda x: 0.0 * x[0]  # noqa: E731
    assert rel(embed.l2_error(points, c, u, ref, cell_dofs=dofs),
               l2_error(disc, u - ref, zero)) <= 1e-13
    assert rel(embed.h1_seminorm_error(points, c, u, ref, cell_dofs=dofs),
               h1_seminorm_error(disc, u - ref, lambda x: 0.0 * x)) <= 1e-13


# ----------------------------------------------------------------------------
# matrix-free operator
# ----------------------------------------------------------------------------
@pytest.mark.parametrize("dim", [2, 3])
def test_matrix_free_product_equals_assembled_product(dim):
    # reference: SciPy's CSR product with the Assembler's matrix
    mesh, points, cells = host_mesh(dim, n=4, seed=1)
    asm = Assembler(Discretization(galerkit_mesh(points, cells), 1))
    kappa = np.linspace(0.5, 2.0, mesh.n_cells)
    x = np.random.default_rng(0).standard_normal(mesh.n_vertices)
    for coef in (1.0, kappa):
        K = asm.stiffness(coef)
        op = MatrixFreeStiffness(points, cells, coef)
        assert rel(op @ x, K @ x) <= 1e-12
        assert rel(op.T @ x, K @ x) <= 1e-12
        X = np.stack([x, 2 * x], axis=1)
        assert rel(op @ X, K @ X) <= 1e-12
    out = np.empty(mesh.n_vertices)
    assert op.apply(x, out=out) is out


def test_matrix_free_operator_with_dirichlet_rows_solves_with_scipy_cg():
    # reference: the eliminated system K_ff u_f = b_f solved by scipy.sparse.linalg.spsolve
    mesh, points, cells = host_mesh(2, n=8, seed=4)
    disc = Discretization(galerkit_mesh(points, cells), 1)
    asm = Assembler(disc)
    kappa = 1.0 + points[cells].mean(axis=1)[:, 0]
    K = asm.stiffness(kappa)
    b = asm.load(1.0)
    fixed = disc.boundary_dofs()
    free = np.setdiff1d(np.arange(disc.n_dofs), fixed)
    b[fixed] = 0.0
    op = MatrixFreeStiffness(points, cells, kappa, dirichlet_dofs=fixed)
    x = np.random.default_rng(2).standard_normal(disc.n_dofs)
    expect = x.copy()
    expect[free] = K[free][:, free] @ x[free]
    assert rel(op @ x, expect) <= 1e-12  # [[K_ff, 0], [0, I]]
    u_ref = np.zeros(disc.n_dofs)
    u_ref[free] = spla.spsolve(K[free][:, free].tocsc(), b[free])
    u, info = spla.cg(op, b, rtol=1e-12, maxiter=2000)
    assert info == 0
    assert rel(u, u_ref) <= 1e-9


def test_matrix_free_bitwise_independent_of_thread_count_and_copy_mode():
    mesh, points, cells = host_mesh(3, n=3, seed=6)
    x = np.random.default_rng(3).standard_normal(mesh.n_vertices)
    saved = numba.get_num_threads()
    try:
        ys = []
        for t in sorted({1, min(2, numba.config.NUMBA_NUM_THREADS)}):
            numba.set_num_threads(t)
            for copy in (True, False):
                ys.append(MatrixFreeStiffness(points, cells, 1.3, copy=copy) @ x)
    finally:
        numba.set_num_threads(saved)
    assert all(np.array_equal(ys[0], y) for y in ys)
    shared = MatrixFreeStiffness(points, cells, copy=False)
    assert np.shares_memory(shared.points, points) and np.shares_memory(shared.cells, cells)
    own = MatrixFreeStiffness(points, cells)
    assert not np.shares_memory(own.points, points)


def test_matrix_free_bad_input():
    mesh, points, cells = host_mesh(2)
    with pytest.raises(InputError, match="points has dtype float32"):
        MatrixFreeStiffness(points.astype(np.float32), cells)
    # an empty list of Dirichlet dofs is no Dirichlet dof: K 1 = 0 (rows sum to zero)
    assert np.abs(MatrixFreeStiffness(points, cells, dirichlet_dofs=[]) @ np.ones(30)).max() \
        <= 1e-15
    with pytest.raises(InputError, match="Dirichlet dof 99 is outside 0..29"):
        MatrixFreeStiffness(points, cells, dirichlet_dofs=[0, 99])
    with pytest.raises(InputError, match="non-positive value"):
        MatrixFreeStiffness(points, cells, -np.ones(mesh.n_cells))
    op = MatrixFreeStiffness(points, cells)
    with pytest.raises(InputError, match="x has dtype complex128"):
        op.apply(np.ones(30, dtype=complex))
    with pytest.raises(InputError, match=r"x has 29 entries; expected \(30,\)"):
        op.apply(np.ones(29))
    x = np.ones(30)
    with pytest.raises(InputError, match="out overlaps x"):
        op.apply(x, out=x)


def test_a_p2_vector_without_cell_dofs_is_refused_and_with_them_gives_the_small_error():
    # u = x^2 + y is in P2: its interpolant's L2 error is round-off (common practice)
    from galerkit import structured_triangles

    mesh = structured_triangles(6, 6)
    disc = Discretization(mesh, 2)
    exact = lambda x: x[0] ** 2 + x[1]  # noqa: E731
    u = disc.interpolate(exact)
    p, c = np.ascontiguousarray(mesh.points), np.ascontiguousarray(mesh.cells)
    assert embed.l2_error(p, c, u, exact, cell_dofs=np.ascontiguousarray(disc.cell_dofs)) < 1e-13
    with pytest.raises(InputError, match=rf"u has {disc.n_dofs} values but the mesh has "
                                         rf"{mesh.n_vertices} vertices.*cell_dofs"):
        embed.l2_error(p, c, u, exact)
    with pytest.raises(InputError, match=r"dof \d+ belongs to no cell"):
        embed.h1_seminorm_error(p, c, np.append(u, 0.0), lambda x: np.stack([2 * x[0], 1 + 0 * x[1]]),
                                cell_dofs=np.ascontiguousarray(disc.cell_dofs))


def test_one_based_cells_are_refused_with_the_numbering_hint():
    cells = np.array([[0, 1, 2], [1, 3, 2]], dtype=np.int32)
    with pytest.raises(InputError, match=r"vertex 0 belongs to no cell .*numbering from 1"):
        embed.pattern(cells + 1)
    points = np.array([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0], [1.0, 1.0]])
    with pytest.raises(InputError, match=r"outside 0\.\.3 .*numbering from 1"):
        embed.pattern(cells + 1, points=points)
    with pytest.raises(InputError, match=r"vertex 4 belongs to no cell"):
        embed.pattern(cells, n_vertices=5)
    assert embed.pattern(cells)[2]["n_dofs"] == 4
