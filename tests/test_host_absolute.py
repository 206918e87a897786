"""Absolute values through the host entry points (bindings.host.embed, the ctypes C functions).

The C host program (tests/test_c_host.py) checks closed forms, but it is
skipped without a compiler or the Python headers; test_embed.py and the
ctypes tests compare with the Assembler, which runs the same kernels.  Here
the same closed forms are checked on paths that always run:

* P1 on right triangles with legs h (closed-form element matrices, e.g.
  Hughes, The Finite Element Method, 2000, ch. 3: stiffness 1 at the right
  angle and 1/2 at the others, mass A/12 (1 + delta_ab)).  Assembled on the
  structured mesh: the 5-point stencil (interior K_ii = 4, -1 to the four axis
  neighbours, 0 diagonally), M_ii = h^2 / 2, M to an axis neighbour h^2 / 12;
* ||x||_L2 = 1/sqrt(3) and |x|_H1 = 1 on the unit square and cube (x is in
  P1, so the interpolant is exact, and int_0^1 x^2 = 1/3);
* P2-P3 element matrices against tests/reference.py (an independent nodal
  basis integrated exactly, see test_assembly_reference.py).

Tolerances: exact integration, rounding only (1e-13 of the largest entry).
"""

from __future__ import annotations

import numpy as np
import pytest
import sympy as sp

import reference as ref
from galerkit import structured_tetrahedra, structured_triangles
from galerkit.bindings.host import cfuncs, embed
from test_assembly_reference import TENSOR, TRI, TET, rational
from test_c_host import CPattern, load_call, matrix_call, ptr

N = 6
H = 1.0 / N


def grid():
    mesh = structured_triangles(N, N)
    return np.array(mesh.points), np.array(mesh.cells)


def vertex(points, x, y):
    return int(np.argmin(np.hypot(points[:, 0] - x, points[:, 1] - y)))


def check_stencil(points, K, M):
    i = vertex(points, 0.5, 0.5)
    right, up = vertex(points, 0.5 + H, 0.5), vertex(points, 0.5, 0.5 + H)
    diag1, diag2 = vertex(points, 0.5 + H, 0.5 + H), vertex(points, 0.5 - H, 0.5 + H)
    assert K[i, i] == pytest.approx(4.0, rel=1e-13)
    assert K[i, right] == pytest.approx(-1.0, rel=1e-13)
    assert K[i, up] == pytest.approx(-1.0, rel=1e-13)
    assert abs(K[i, diag1]) <= 1e-13 and abs(K[i, diag2]) <= 1e-13
    assert M[i, i] == pytest.approx(H * H / 2, rel=1e-13)
    assert M[i, right] == pytest.approx(H * H / 12, rel=1e-13)
    # every row of K sums to zero (constants are in the kernel), the mass sums to the area
    assert np.abs(K.sum(axis=1)).max() <= 1e-13
    assert M.sum() == pytest.approx(1.0, rel=1e-13)


def test_embed_p1_stencil_mass_load_and_norms_are_the_closed_forms():
    points, cells = grid()
    _, _, plan = embed.pattern(cells, 1, points=points)
    data = np.full(plan["nnz"], np.nan)
    embed.stiffness(points, plan, data, 1.0)
    K = embed.as_csr(plan, data.copy()).toarray()
    embed.mass(points, plan, data, 1.0)
    M = embed.as_csr(plan, data.copy()).toarray()
    check_stencil(points, K, M)
    embed.stiffness(points, plan, data, 2.5)
    assert embed.as_csr(plan, data).toarray()[vertex(points, 0.5, 0.5)].max() == \
        pytest.approx(10.0, rel=1e-13)
    b = np.full(plan["n_dofs"], np.nan)
    assert embed.load(points, plan, b, 1.0).sum() == pytest.approx(1.0, rel=1e-13)
    c = plan["cells"]
    u = np.ascontiguousarray(points[:, 0])
    zero = np.zeros_like(u)
    assert embed.l2_error(points, c, u, zero) == pytest.approx(1 / np.sqrt(3), rel=1e-13)
    assert embed.h1_seminorm_error(points, c, u, zero) == pytest.approx(1.0, rel=1e-13)


def test_embed_3d_norms_of_x_are_the_closed_forms():
    mesh = structured_tetrahedra(3, 3, 3)
    points, cells = np.array(mesh.points), np.array(mesh.cells)
    u = np.ascontiguousarray(points[:, 0])
    zero = np.zeros_like(u)
    assert embed.l2_error(points, cells, u, zero) == pytest.approx(1 / np.sqrt(3), rel=1e-13)
    assert embed.h1_seminorm_error(points, cells, u, zero) == pytest.approx(1.0, rel=1e-13)
    assert embed.l2_error(points, cells, u, lambda x: 0.0 * x[0]) == \
        pytest.approx(1 / np.sqrt(3), rel=1e-13)


@pytest.mark.parametrize("dim, degree", [(2, 2), (2, 3), (3, 2), (3, 3)])
def test_embed_element_matrices_equal_the_independent_reference(dim, degree):
    verts = TRI if dim == 2 else TET
    points = np.array([[float(sp.Rational(c)) for c in v] for v in verts])
    cells = np.arange(dim + 1)[None, :].copy()
    _, _, plan = embed.pattern(cells, degree, points=points)
    nodes, K, M, b = ref.element_matrices(rational(verts), degree, tensor=TENSOR[dim])
    p = ref.match_nodes(plan["dof_points"], nodes)
    data = np.full(plan["nnz"], np.nan)
    embed.stiffness(points, plan, data, np.array(TENSOR[dim], dtype=float))
    got = embed.as_csr(plan, data.copy()).toarray()[np.ix_(p, p)]
    assert np.abs(got - K).max() <= 1e-13 * np.abs(K).max() * 10
    embed.mass(points, plan, data, 1.0)
    got = embed.as_csr(plan, data).toarray()[np.ix_(p, p)]
    assert np.abs(got - M).max() <= 1e-13 * np.abs(M).max() * 10
    out = np.full(plan["n_dofs"], np.nan)
    assert np.abs(embed.load(points, plan, out, 1.0)[p] - b).max() <= 1e-12 * np.abs(b).max()


@pytest.fixture(scope="module")
def api():
    return {name: cfuncs.ctypes_function(name) for name in cfuncs.SIGNATURES}


def test_ctypes_p1_stencil_mass_load_and_norms_are_the_closed_forms(api):
    points, cells64 = grid()
    cells = np.ascontiguousarray(cells64, dtype=np.int32)
    n, m = points.shape[0], cells.shape[0]
    pat = CPattern(api, n, cells, 2)

    def dense(data):
        import scipy.sparse as sps
        return sps.csr_array((data, pat.indices, pat.indptr), shape=(n, n)).toarray()

    one = np.array([1.0])
    data = np.full(pat.nnz, np.nan)
    assert matrix_call(api["galerkit_stiffness"], 2, 1, points, cells, n, cells, one, pat,
                       data) == cfuncs.OK
    K = dense(data.copy())
    assert matrix_call(api["galerkit_mass"], 2, 1, points, cells, n, cells, one, pat,
                       data) == cfuncs.OK
    check_stencil(points, K, dense(data))
    b = np.full(n, np.nan)
    assert load_call(api["galerkit_load"], 2, 1, points, cells, n, cells, 0, one, pat,
                     b) == cfuncs.OK
    assert b.sum() == pytest.approx(1.0, rel=1e-13)
    u = np.ascontiguousarray(points[:, 0])
    zero = np.zeros(n)
    out = np.zeros(1)
    args = (2, n, ptr(points), m, ptr(cells), ptr(u), ptr(zero), ptr(out))
    assert api["galerkit_p1_l2_error"](*args) == cfuncs.OK
    assert out[0] == pytest.approx(1 / np.sqrt(3), rel=1e-13)
    assert api["galerkit_p1_h1_seminorm_error"](*args) == cfuncs.OK
    assert out[0] == pytest.approx(1.0, rel=1e-13)
