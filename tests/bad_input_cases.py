"""The bad-input suite: one public call with one bad argument per case.

Every case builds a small valid setting (a mesh, a discretization, an
assembler, a matrix), then passes one bad argument to a public entry point.
Each must raise its named galerkit error (a subclass of
``galerkit.errors.GalerkitError``) *before* any compiled kernel sees the bad
value: an out-of-range index in numba code is a silent wrong number or a
crash, never an exception.

Run as a script it prints, as JSON, the list of ``[case, exception class
name]`` in case order (``"no error"`` when nothing was raised).  The test
``tests/test_bad_input.py`` runs it twice in subprocesses, with
``NUMBA_BOUNDSCHECK=1`` (in its own ``NUMBA_CACHE_DIR``) and without, and
compares the two lists: a case that reached a kernel with a bad index would
raise ``IndexError`` under bounds checking and something else (or crash)
without it.

::

    python tests/bad_input_cases.py              # JSON list on stdout
    python tests/bad_input_cases.py --messages   # JSON with the messages too
    python tests/bad_input_cases.py --markdown   # the table in docs/bad-input.md

The name of the case being run is written to stderr first, so a crash names it.
"""

from __future__ import annotations

import contextlib
import json
import os
import sys
import tempfile
import warnings

import numpy as np
import scipy.sparse as sp

import galerkit as gk
from galerkit.boundary import DirichletElimination
from galerkit.evaluation import cell_gradients, evaluate, locate_points
from galerkit.mesh import remove_unreferenced_vertices

#: (name, category, expected exception class name, callable)
CASES: list[tuple[str, str, str, object]] = []


def case(name, category, expected):
    def register(fn):
        CASES.append((name, category, expected, fn))
        return fn
    return register


# ----------------------------------------------------------------------------
# small valid settings, built once (lazily, so that listing cases is cheap)
# ----------------------------------------------------------------------------
_cache: dict = {}


def _get(key, make):
    if key not in _cache:
        _cache[key] = make()
    return _cache[key]


def mesh2():
    return _get("mesh2", lambda: gk.structured_triangles(3, 3))


def mesh3():
    return _get("mesh3", lambda: gk.structured_tetrahedra(2, 2, 2))


def disc(dim=2, k=1):
    return _get(("disc", dim, k), lambda: gk.Discretization(mesh2() if dim == 2 else mesh3(), k))


def asm(dim=2, k=1):
    return _get(("asm", dim, k), lambda: gk.Assembler(disc(dim, k)))


def stiff(dim=2, k=1):
    return _get(("K", dim, k), lambda: asm(dim, k).stiffness())


def two_squares():
    """Two disjoint unit squares side by side (x in [0, 1] and [2, 3])."""
    def make():
        a = gk.structured_triangles(2, 2)
        pts = np.vstack([a.points, a.points + [2.0, 0.0]])
        cells = np.vstack([a.cells, a.cells + a.n_vertices])
        m = gk.Mesh(pts, cells)
        m.tag_boundary("left square", lambda x: x[0] < 1.5)
        m.tag_boundary("right square", lambda x: x[0] > 1.5)
        return m
    return _get("two", make)


SQUARE = np.array([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0], [1.0, 1.0]])
SQUARE_CELLS = np.array([[0, 1, 2], [1, 3, 2]])
TET = np.array([[0.0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]])


@contextlib.contextmanager
def env(name, value):
    old = os.environ.get(name)
    os.environ[name] = value
    try:
        yield
    finally:
        if old is None:
            del os.environ[name]
        else:
            os.environ[name] = old


# ----------------------------------------------------------------------------
# meshes
# ----------------------------------------------------------------------------
M = "mesh"


@case("points of shape (n, 4)", M, "MeshError")
def _():
    gk.Mesh(np.zeros((4, 4)), SQUARE_CELLS)


@case("points given as text", M, "MeshError")
def _():
    gk.Mesh(np.array([["a", "b"]] * 4), SQUARE_CELLS)


@case("complex coordinates", M, "MeshError")
def _():
    gk.Mesh(SQUARE * (1 + 1j), SQUARE_CELLS)


@case("ragged point list", M, "MeshError")
def _():
    gk.Mesh([[0, 0], [1, 0, 0], [0, 1], [1, 1]], SQUARE_CELLS)


@case("NaN coordinate", M, "MeshError")
def _():
    p = SQUARE.copy()
    p[2, 1] = np.nan
    gk.Mesh(p, SQUARE_CELLS)


@case("infinite coordinate", M, "MeshError")
def _():
    p = SQUARE.copy()
    p[3, 0] = np.inf
    gk.Mesh(p, SQUARE_CELLS)


@case("float cell indices", M, "MeshError")
def _():
    gk.Mesh(SQUARE, SQUARE_CELLS.astype(float))


@case("boolean cell table", M, "MeshError")
def _():
    gk.Mesh(SQUARE, SQUARE_CELLS.astype(bool))


@case("cells of the wrong width", M, "MeshError")
def _():
    gk.Mesh(SQUARE, np.array([[0, 1, 2, 3]]))


@case("no cells", M, "MeshError")
def _():
    gk.Mesh(SQUARE, np.zeros((0, 3), dtype=np.int64))


@case("vertex index too large", M, "MeshError")
def _():
    gk.Mesh(SQUARE, np.array([[0, 1, 2], [1, 4, 2]]))


@case("negative vertex index", M, "MeshError")
def _():
    gk.Mesh(SQUARE, np.array([[0, 1, 2], [1, -1, 2]]))


@case("vertex index beyond 2**31", M, "MeshError")
def _():
    gk.Mesh(SQUARE, np.array([[0, 1, 2], [1, 2**40, 2]], dtype=np.int64))


@case("uint64 index beyond int64", M, "MeshError")
def _():
    gk.Mesh(SQUARE, np.array([[0, 1, 2], [1, 2**64 - 1, 2]], dtype=np.uint64))


@case("cell repeating a vertex", M, "MeshError")
def _():
    gk.Mesh(SQUARE, np.array([[0, 1, 2], [1, 3, 3]]))


@case("degenerate (collinear) triangle", M, "MeshError")
def _():
    gk.Mesh([[0, 0], [1, 0], [2, 0], [0, 1]], [[0, 1, 2], [0, 1, 3]])


@case("degenerate (flat) tetrahedron", M, "MeshError")
def _():
    gk.Mesh(np.vstack([TET, [[1.0, 1.0, 0.0]]]), [[0, 1, 2, 3], [0, 1, 2, 4]])


@case("duplicate cells", M, "MeshError")
def _():
    gk.Mesh(SQUARE, np.array([[0, 1, 2], [1, 3, 2], [2, 3, 1]]))


@case("two distinct vertices at one place (the domain cut apart there)", M, "MeshError")
def _():
    gk.Mesh([[0, 0], [1, 0], [0, 1], [1, 0], [1, 1], [0, 1]], [[0, 1, 2], [3, 4, 5]])


@case("folded mesh (inverted cell)", M, "MeshError")
def _():
    # vertex 3 pulled across the edge 1-2: the second cell overlaps the first
    gk.Mesh([[0, 0], [1, 0], [0, 1], [0.2, 0.2]], SQUARE_CELLS)


@case("unreferenced vertex", M, "MeshError")
def _():
    gk.Mesh(np.vstack([SQUARE, [[5.0, 5.0]]]), SQUARE_CELLS)


@case("non-manifold edge (three triangles)", M, "MeshError")
def _():
    gk.Mesh([[0, 0], [1, 0], [0.5, 1], [0.5, -1], [0.6, 2]], [[0, 1, 2], [0, 1, 3], [0, 1, 4]])


@case("non-manifold face (three tetrahedra)", M, "MeshError")
def _():
    gk.Mesh(np.vstack([TET, [[0.3, 0.3, -1.0], [0.2, 0.2, 2.0]]]),
            [[0, 1, 2, 3], [0, 1, 2, 4], [0, 1, 2, 5]])


@case("facet_groups not a dict", M, "MeshError")
def _():
    gk.Mesh(SQUARE, SQUARE_CELLS, facet_groups=["xmin"])


@case("facet tag with no facets", M, "MeshError")
def _():
    gk.structured_triangles(2, 2).set_facet_tag("inlet", [])


@case("facet tag id out of range", M, "MeshError")
def _():
    gk.structured_triangles(2, 2).set_facet_tag("inlet", [0, 99])


@case("facet tag ids as floats", M, "MeshError")
def _():
    gk.structured_triangles(2, 2).set_facet_tag("inlet", [0.0, 1.5])


@case("facet tag name not a string", M, "MeshError")
def _():
    gk.structured_triangles(2, 2).set_facet_tag(3, [0])


@case("unknown facet tag", M, "MeshError")
def _():
    mesh2().tagged_facets("inlet")


@case("tag_boundary selecting nothing", M, "MeshError")
def _():
    gk.structured_triangles(2, 2).tag_boundary("far", lambda x: x[0] > 5)


@case("tag_boundary predicate of the wrong shape", M, "MeshError")
def _():
    gk.structured_triangles(2, 2).tag_boundary("xmin", lambda x: x[0] < 0.1 + 0 * x)


@case("remove_unreferenced_vertices with an index out of range", M, "MeshError")
def _():
    remove_unreferenced_vertices(SQUARE, np.array([[0, 1, 7]]))


# ----------------------------------------------------------------------------
# discretization
# ----------------------------------------------------------------------------
D = "discretization"


@case("Discretization of something that is not a Mesh", D, "InputError")
def _():
    gk.Discretization(SQUARE, 1)


@case("degree 0", D, "InputError")
def _():
    gk.Discretization(mesh2(), 0)


@case("degree 5", D, "InputError")
def _():
    gk.Discretization(mesh2(), 5)


@case("interpolate: callable returning the wrong shape", D, "InputError")
def _():
    disc().interpolate(lambda x: x)


@case("interpolate: callable returning NaN", D, "InputError")
def _():
    disc().interpolate(lambda x: np.where(x[0] > 0.5, np.nan, 0.0))


@case("interpolate: callable raising", D, "InputError")
def _():
    disc().interpolate(lambda x: 1 / 0)


@case("boundary_dofs of an unknown tag", D, "MeshError")
def _():
    disc().boundary_dofs("inlet")


# ----------------------------------------------------------------------------
# assembly and coefficients
# ----------------------------------------------------------------------------
A = "assembly and coefficients"


@case("Assembler of something that is not a Discretization", A, "InputError")
def _():
    gk.Assembler(mesh2())


@case("negative quadrature degree", A, "InputError")
def _():
    gk.Assembler(disc(), quadrature_degree=-1)


@case("estimated memory above GALERKIT_MEMORY_LIMIT_BYTES", A, "ResourceError")
def _():
    with env("GALERKIT_MEMORY_LIMIT_BYTES", "1000"):
        gk.Assembler(disc(2, 2))


@case("GALERKIT_MEMORY_LIMIT_BYTES not a number", A, "InputError")
def _():
    with env("GALERKIT_MEMORY_LIMIT_BYTES", "lots"):
        gk.Assembler(disc())


@case("zero conductivity", A, "InputError")
def _():
    asm().stiffness(0.0)


@case("negative conductivity in one cell", A, "InputError")
def _():
    kappa = np.ones(mesh2().n_cells)
    kappa[7] = -1.0
    asm().stiffness(kappa)


@case("NaN conductivity at a quadrature point", A, "InputError")
def _():
    asm(2, 2).stiffness(lambda x: np.where(x[0] > 0.9, np.nan, 1.0))


@case("infinite conductivity", A, "InputError")
def _():
    asm().stiffness(np.inf)


@case("conductivity per cell of the wrong length", A, "InputError")
def _():
    asm().stiffness(np.ones(mesh2().n_cells + 1))


@case("non-symmetric conductivity tensor", A, "InputError")
def _():
    asm().stiffness(np.array([[1.0, 0.5], [0.0, 1.0]]))


@case("indefinite conductivity tensor", A, "InputError")
def _():
    asm(3, 1).stiffness(np.diag([1.0, -1.0, 1.0]))


@case("NaN in a per-cell tensor", A, "InputError")
def _():
    t = np.tile(np.eye(2), (mesh2().n_cells, 1, 1))
    t[5, 0, 1] = t[5, 1, 0] = np.nan
    asm().stiffness(t)


@case("complex conductivity tensor", A, "InputError")
def _():
    asm().stiffness(np.eye(2) * (1 + 1j))


@case("conductivity as text", A, "InputError")
def _():
    asm().stiffness("1.0")


@case("ragged conductivity tensor", A, "InputError")
def _():
    asm().stiffness([[1.0, 0.0], [0.0]])


@case("conductivity callable returning the wrong shape", A, "InputError")
def _():
    asm(2, 2).stiffness(lambda x: np.ones(3))


@case("conductivity callable raising", A, "InputError")
def _():
    asm(2, 2).stiffness(lambda x: x[5])


@case("out= matrix from another assembler", A, "InputError")
def _():
    asm(2, 1).stiffness(out=stiff(2, 2))


@case("out= matrix whose data array was replaced by a shorter one", A, "InputError")
def _():
    K = asm().stiffness()
    K.data = np.zeros(3)
    asm().stiffness(out=K)


@case("out= matrix with read-only data", A, "InputError")
def _():
    K = asm().stiffness()
    K.data.flags.writeable = False
    asm().stiffness(out=K)


@case("NaN mass coefficient", A, "InputError")
def _():
    asm().mass(np.nan)


@case("source with an infinite value", A, "InputError")
def _():
    asm().load(lambda x: np.where(x[0] > 0.5, np.inf, 1.0))


@case("source dof vector with NaN", A, "InputError")
def _():
    f = np.zeros(disc().n_dofs)
    f[3] = np.nan
    asm().load(f)


@case("source dof vector of complex numbers", A, "InputError")
def _():
    asm().load(np.ones(disc().n_dofs) * 1j)


@case("source array of the wrong length", A, "InputError")
def _():
    asm().load(np.ones(disc().n_dofs + 2))


@case("load out= of the wrong shape", A, "InputError")
def _():
    asm().load(1.0, out=np.empty(3))


@case("load out= the dof-vector source itself", A, "InputError")
def _():
    b = np.linspace(0.0, 1.0, asm(2, 2).n_dofs)
    asm(2, 2).load(b, out=b)


@case("mass coefficient read from the out= matrix's own data", A, "InputError")
def _():
    M = asm().mass()
    M.data[:] = 1.0
    asm().mass(M.data[:mesh2().n_cells], out=M)


@case("boundary_load flux read from the out= vector", A, "InputError")
def _():
    b = np.zeros(asm().n_dofs)
    asm().boundary_load("xmin", b[:len(mesh2().tagged_facets("xmin"))], out=b)


@case("per-cell conductivity read from the out= matrix's own data", A, "InputError")
def _():
    K = asm().stiffness()
    K.data[:] = 1.0  # a valid conductivity, read from the matrix being written
    asm().stiffness(K.data[:mesh2().n_cells], out=K)


@case("boundary_load on an unknown tag", A, "MeshError")
def _():
    asm().boundary_load("inlet", 1.0)


@case("NaN boundary flux", A, "InputError")
def _():
    asm().boundary_load("xmin", np.nan)


@case("boundary_mass per-facet array of the wrong length", A, "InputError")
def _():
    asm().boundary_mass("xmin", np.ones(99))


@case("fractional quadrature degree", A, "InputError")
def _():
    asm().boundary_load("xmin", lambda x: x[0], quadrature_degree=2.5)


# ----------------------------------------------------------------------------
# Dirichlet elimination
# ----------------------------------------------------------------------------
B = "Dirichlet elimination"


@case("Dirichlet dof out of range", B, "InputError")
def _():
    DirichletElimination(stiff(), [0, disc().n_dofs])


@case("negative Dirichlet dof", B, "InputError")
def _():
    DirichletElimination(stiff(), [-1])


@case("fractional Dirichlet dofs", B, "InputError")
def _():
    DirichletElimination(stiff(), [0.5, 2.0])


@case("non-square matrix", B, "InputError")
def _():
    A = sp.csr_array((np.ones(2), np.array([0, 9]), np.array([0, 1, 2])), shape=(2, 10))
    DirichletElimination(A, [0])


@case("matrix with a column index changed out of range", B, "InputError")
def _():
    K = stiff().copy()
    K.indices[4] = 10**6
    DirichletElimination(K, [0])


@case("reduce a matrix whose data array was shortened", B, "InputError")
def _():
    K = stiff().copy()
    elim = DirichletElimination(K, [0])
    K.data = K.data[:5]
    elim.reduce_matrix(K)


@case("right-hand side too short", B, "InputError")
def _():
    elim = DirichletElimination(stiff(), [0])
    elim.reduce_rhs(stiff(), np.zeros(3), [0.0])


@case("NaN Dirichlet value", B, "InputError")
def _():
    elim = DirichletElimination(stiff(), [0, 1])
    elim.reduce_rhs(stiff(), np.zeros(disc().n_dofs), [0.0, np.nan])


@case("wrong number of Dirichlet values", B, "InputError")
def _():
    elim = DirichletElimination(stiff(), [0, 1])
    elim.reduce_rhs(stiff(), np.zeros(disc().n_dofs), [0.0, 1.0, 2.0])


@case("expand with a free vector of the wrong length", B, "InputError")
def _():
    DirichletElimination(stiff(), [0]).expand(np.zeros(2), [0.0])


# ----------------------------------------------------------------------------
# solvers
# ----------------------------------------------------------------------------
S = "solvers"


def _spd(n=20):
    return sp.diags([-1.0, 2.0, -1.0], [-1, 0, 1], shape=(n, n), format="csr")


@case("dense matrix", S, "InputError")
def _():
    gk.solve(np.eye(3), np.ones(3))


@case("non-square sparse matrix", S, "InputError")
def _():
    gk.solve(sp.csr_array(np.ones((2, 3))), np.ones(2))


@case("NaN matrix entry", S, "InputError")
def _():
    A = _spd()
    A.data[3] = np.nan
    gk.solve(A, np.ones(20))


@case("CSR matrix with a column index changed out of range", S, "InputError")
def _():
    A = _spd()
    A.indices[2] = 10**6
    gk.solve(A, np.ones(20), method="cg")


@case("CSR matrix with a non-monotone indptr", S, "InputError")
def _():
    A = _spd()
    A.indptr[3] = A.indptr[5] + 1
    gk.solve(A, np.ones(20), method="direct")


@case("right-hand side of the wrong length", S, "InputError")
def _():
    gk.solve(_spd(), np.ones(19))


@case("NaN right-hand side", S, "InputError")
def _():
    b = np.ones(20)
    b[4] = np.nan
    gk.solve(_spd(), b)


@case("zero tolerance", S, "InputError")
def _():
    gk.solve(_spd(), np.ones(20), rtol=0.0)


@case("negative maxiter", S, "InputError")
def _():
    gk.solve(_spd(), np.ones(20), method="cg", maxiter=-1)


@case("unknown solver method", S, "InputError")
def _():
    gk.solve(_spd(), np.ones(20), method="gmres-ilu")


@case("option unknown to the solver", S, "InputError")
def _():
    gk.solve(_spd(), np.ones(20), method="cg", preconditioner="ilu")


@case("direct factors beyond the memory limit", S, "ResourceError")
def _():
    gk.solve(_spd(), np.ones(20), method="direct", memory_limit_bytes=100)


@case("cg-jacobi on a zero diagonal", S, "InputError")
def _():
    A = _spd().tolil()
    A[3, 3] = 0.0
    gk.solve(sp.csr_array(A), np.ones(20), method="cg-jacobi")


def _lying_solver(make_x, residual):
    """Solve with a registered solver whose report says "converged" with
    ``make_x(n)`` as x and ``residual`` as the claimed relative residual."""
    class Liar:
        def __init__(self, A):
            self.n = A.shape[0]

        def solve(self, b, x0=None, rtol=1e-10, maxiter=None, callback=None):
            return gk.SolveReport(x=make_x(self.n), converged=True, iterations=1,
                                  residuals=np.array([1.0, residual]))
    from galerkit.solvers import unregister_solver

    gk.register_solver("claims-success", Liar, overwrite=True)
    try:
        gk.solve(_spd(), np.ones(20), method="claims-success")
    finally:
        unregister_solver("claims-success")


@case("right-hand side whose norm overflows", S, "InputError")
def _():
    gk.solve(_spd(), np.full(20, 1e300), method="cg")


@case("registered solver: converged with an all-NaN x", S, "SolverError")
def _():
    _lying_solver(lambda n: np.full(n, np.nan), 1e-12)


@case("registered solver: converged with an x of the wrong length", S, "SolverError")
def _():
    _lying_solver(lambda n: np.zeros(n - 1), 1e-12)


@case("registered solver: claimed residual contradicted by b - A x", S, "SolverError")
def _():
    _lying_solver(lambda n: np.zeros(n), 1e-12)


# ----------------------------------------------------------------------------
# the problem driver
# ----------------------------------------------------------------------------
P = "problem (PoissonProblem)"


@case("problem on something that is not a Mesh", P, "InputError")
def _():
    gk.PoissonProblem(SQUARE)


@case("Dirichlet condition on an unknown tag", P, "ProblemError")
def _():
    gk.PoissonProblem(mesh2(), dirichlet={"inlet": 0.0})


@case("boundary conditions not a dict", P, "ProblemError")
def _():
    gk.PoissonProblem(mesh2(), dirichlet=[("xmin", 0.0)])


@case("Robin data not a pair", P, "ProblemError")
def _():
    gk.PoissonProblem(mesh2(), robin={"xmin": 1.0})


@case("negative Robin coefficient", P, "ProblemError")
def _():
    gk.PoissonProblem(mesh2(), robin={"xmin": (-2.0, 0.0)})


@case("Robin coefficient negative at a quadrature point", P, "ProblemError")
def _():
    gk.PoissonProblem(mesh2(), robin={"xmin": (lambda x: x[1] - 0.5, 0.0)}).solve()


@case("NaN Robin coefficient", P, "ProblemError")
def _():
    gk.PoissonProblem(mesh2(), robin={"xmin": (np.nan, 0.0)})


@case("pure Neumann with incompatible data", P, "ProblemError")
def _():
    gk.PoissonProblem(mesh2(), source=1.0, neumann={"xmin": 0.5}).solve()


@case("Robin coefficient zero everywhere, incompatible data", P, "ProblemError")
def _():
    gk.PoissonProblem(mesh2(), source=1.0, robin={"boundary": (0.0, 20.0)}).solve()


@case("two disjoint squares, Dirichlet on one, incompatible source on the other", P,
      "ProblemError")
def _():
    gk.PoissonProblem(two_squares(), source=1.0, dirichlet={"left square": 0.0}).solve()


@case("NaN source", P, "InputError")
def _():
    gk.PoissonProblem(mesh2(), source=np.nan, dirichlet={"boundary": 0.0}).solve()


@case("Dirichlet value NaN at one dof", P, "InputError")
def _():
    gk.PoissonProblem(mesh2(), dirichlet={"boundary": lambda x: np.where(x[0] > 0.9, np.nan, 0)}
                      ).solve()


@case("assembler of another mesh", P, "ProblemError")
def _():
    gk.PoissonProblem(two_squares(), dirichlet={"left square": 0.0,
                                                "right square": 0.0}).solve(assembler=asm())


@case("degree 7", P, "InputError")
def _():
    gk.PoissonProblem(mesh2(), dirichlet={"boundary": 0.0}).solve(degree=7)


@case("conductivity 1e-320 (subnormal)", P, "InputError")
def _():
    gk.PoissonProblem(mesh2(), conductivity=1e-320, source=1.0,
                      dirichlet={"boundary": 0.0}).solve()


@case("conductivity 1e-300 with source 1e300 (solution overflows)", P, "ProblemError")
def _():
    gk.PoissonProblem(mesh2(), conductivity=1e-300, source=1e300,
                      dirichlet={"boundary": 0.0}).solve()


@case("Dirichlet values near 1e308 (lifting overflows)", P, "ProblemError")
def _():
    gk.PoissonProblem(mesh2(), dirichlet={"xmin": 1e308, "xmax": -1e308}).solve()


@case("coordinates near 1e-160 (cell volumes underflow)", P, "MeshError")
def _():
    m = gk.Mesh(mesh2().points * 1e-160, mesh2().cells)
    m.tag_boundary("all", lambda x: np.ones(x.shape[1], dtype=bool))
    gk.PoissonProblem(m, source=1.0, dirichlet={"all": 0.0}).solve()


@case("coordinates near 1e150 (lengths overflow)", P, "MeshError")
def _():
    gk.Assembler(gk.Discretization(gk.Mesh(mesh2().points * 1e150, mesh2().cells), 1))


@case("two Dirichlet values on overlapping tags (xmin inside boundary)", P, "ProblemError")
def _():
    gk.PoissonProblem(mesh2(), dirichlet={"xmin": 1.0, "boundary": 0.0})


@case("a Neumann condition on a tag inside a Dirichlet tag", P, "ProblemError")
def _():
    gk.PoissonProblem(mesh2(), dirichlet={"boundary": 0.0}, neumann={"xmin": 2.0})


# ----------------------------------------------------------------------------
# functionals and evaluation
# ----------------------------------------------------------------------------
F = "functionals and evaluation"


@case("l2_error: dof vector of the wrong length", F, "InputError")
def _():
    gk.l2_error(disc(), np.zeros(3), lambda x: x[0])


@case("l2_error: NaN in the dof vector", F, "InputError")
def _():
    u = np.zeros(disc().n_dofs)
    u[0] = np.nan
    gk.l2_error(disc(), u, lambda x: x[0])


@case("l2_error: complex dof vector", F, "InputError")
def _():
    gk.l2_error(disc(), np.zeros(disc().n_dofs) * 1j, lambda x: x[0])


@case("l2_error: exact solution of the wrong shape", F, "InputError")
def _():
    gk.l2_error(disc(), np.zeros(disc().n_dofs), lambda x: x)


@case("h1_seminorm_error: gradient of the wrong shape", F, "InputError")
def _():
    gk.h1_seminorm_error(disc(), np.zeros(disc().n_dofs), lambda x: x[0])


@case("energy_error: conductivity array too long", F, "InputError")
def _():
    gk.energy_error(disc(), np.zeros(disc().n_dofs), lambda x: 0 * x,
                    conductivity=np.ones(mesh2().n_cells + 5))


@case("quadrature degree as text", F, "InputError")
def _():
    gk.l2_error(disc(), np.zeros(disc().n_dofs), lambda x: x[0], quadrature_degree="9")


@case("nested_error: unknown norm", F, "InputError")
def _():
    gk.nested_error(disc(), np.zeros(disc().n_dofs), disc(), np.zeros(disc().n_dofs), norm="max")


@case("evaluate: point outside the mesh", F, "InputError")
def _():
    evaluate(disc(), np.zeros(disc().n_dofs), np.array([[2.0], [0.5]]))


@case("evaluate: NaN point", F, "InputError")
def _():
    evaluate(disc(), np.zeros(disc().n_dofs), np.array([[np.nan], [0.5]]))


@case("evaluate: points of the wrong dimension", F, "InputError")
def _():
    evaluate(disc(), np.zeros(disc().n_dofs), np.zeros((3, 2)))


@case("evaluate: dof vector too short", F, "InputError")
def _():
    evaluate(disc(), np.zeros(3), np.array([[0.5], [0.5]]))


@case("cell_gradients: dof vector too short", F, "InputError")
def _():
    cell_gradients(disc(), np.zeros(3))


@case("locate_points on something that is not a Mesh", F, "InputError")
def _():
    locate_points(SQUARE, np.zeros((2, 1)))


# ----------------------------------------------------------------------------
# mesh files (galerkit.bindings.files.read_mesh)
# ----------------------------------------------------------------------------
R = "mesh files (read_mesh)"


def _file(name, content: bytes):
    folder = _get("folder", tempfile.mkdtemp)
    path = os.path.join(folder, name)
    with open(path, "wb") as fh:
        fh.write(content)
    return path


def _read(path):
    from galerkit.bindings.files import read_mesh

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return read_mesh(path)


@case("missing mesh file", R, "InputError")
def _():
    _read(os.path.join(_get("folder", tempfile.mkdtemp), "absent.msh"))


@case("empty mesh file", R, "InputError")
def _():
    _read(_file("empty.msh", b""))


@case("random bytes as .msh", R, "InputError")
def _():
    _read(_file("noise.msh", bytes(np.random.default_rng(1).integers(0, 256, 600, dtype=np.uint8))))


@case("truncated .vtu", R, "InputError")
def _():
    import meshio

    path = _file("whole.vtu", b"")
    meshio.write(path, meshio.Mesh(SQUARE, [("triangle", SQUARE_CELLS)]))
    data = open(path, "rb").read()
    _read(_file("cut.vtu", data[: len(data) // 2]))


@case("unknown file suffix", R, "InputError")
def _():
    _read(_file("mesh.xyz123", b"1 2 3\n"))


@case("mesh file whose cells are duplicated", R, "MeshError")
def _():
    import meshio

    path = _file("twice.vtu", b"")
    meshio.write(path, meshio.Mesh(SQUARE, [("triangle", np.vstack([SQUARE_CELLS] * 2))]))
    _read(path)


@case("mesh file with nodes repeated along an edge (read without merge_duplicates)", R,
      "MeshError")
def _():
    import meshio

    path = _file("repeated.vtu", b"")
    pts = np.array([[0, 0], [1, 0], [0, 1], [1, 0], [1, 1], [0, 1]], dtype=float)
    meshio.write(path, meshio.Mesh(pts, [("triangle", np.array([[0, 1, 2], [3, 4, 5]]))]))
    _read(path)


# ----------------------------------------------------------------------------
# embedding entry points (galerkit.bindings.host.embed)
# ----------------------------------------------------------------------------
E = "embedding (bindings.host.embed)"


def _plan():
    from galerkit.bindings.host import embed

    return _get("plan", lambda: embed.pattern(np.ascontiguousarray(mesh2().cells))[2])


@case("embed.pattern: 1-based cells (a Fortran host)", E, "InputError")
def _():
    from galerkit.bindings.host import embed

    embed.pattern(np.ascontiguousarray(mesh2().cells) + 1)


@case("embed.pattern: 1-based cells with points (index n_vertices)", E, "InputError")
def _():
    from galerkit.bindings.host import embed

    embed.pattern(np.ascontiguousarray(mesh2().cells) + 1, points=np.ascontiguousarray(
        mesh2().points))


@case("embed.l2_error: a P2 vector without cell_dofs", E, "InputError")
def _():
    from galerkit.bindings.host import embed

    d2 = disc(2, 2)
    embed.l2_error(np.ascontiguousarray(mesh2().points), np.ascontiguousarray(mesh2().cells),
                   np.zeros(d2.n_dofs), lambda x: x[0])


@case("embed.h1_seminorm_error: u longer than the dofs of cell_dofs", E, "InputError")
def _():
    from galerkit.bindings.host import embed

    d2 = disc(2, 2)
    embed.h1_seminorm_error(np.ascontiguousarray(mesh2().points),
                            np.ascontiguousarray(d2.mesh.cells), np.zeros(d2.n_dofs + 5),
                            lambda x: 0 * x, cell_dofs=np.ascontiguousarray(d2.cell_dofs))


@case("embed.pattern: vertex index out of range", E, "InputError")
def _():
    from galerkit.bindings.host import embed

    cells = np.array(mesh2().cells, dtype=np.int32)
    cells[3, 1] = 10**6
    embed.pattern(cells, n_vertices=mesh2().n_vertices)


@case("embed.stiffness: data array too short", E, "InputError")
def _():
    from galerkit.bindings.host import embed

    embed.stiffness(np.ascontiguousarray(mesh2().points), _plan(), np.empty(5))


@case("embed.stiffness: float32 points", E, "InputError")
def _():
    from galerkit.bindings.host import embed

    embed.stiffness(mesh2().points.astype(np.float32), _plan(), np.empty(_plan()["nnz"]))


@case("embed.stiffness: plan with a tampered position map", E, "InputError")
def _():
    from galerkit.bindings.host import embed

    plan = dict(_plan())
    pm = plan["position_map"].copy()
    pm[0, 0, 0] = 200
    plan["position_map"] = pm
    embed.stiffness(np.ascontiguousarray(mesh2().points), plan, np.empty(plan["nnz"]))



# ----------------------------------------------------------------------------
# the distributed engine's set-up (no MPI needed)
# ----------------------------------------------------------------------------
X = "distributed set-up (bindings.distributed.partition, petsc_engine)"


@case("partition_cells: more parts than cells", X, "InputError")
def _():
    from galerkit.bindings.distributed.partition import partition_cells

    partition_cells(mesh2(), mesh2().n_cells + 1)


@case("dof_layout: parts of the wrong length", X, "InputError")
def _():
    from galerkit.bindings.distributed.partition import dof_layout

    dof_layout(disc(), np.zeros(3, dtype=np.int32), 2)


@case("dof_layout: part number out of range", X, "InputError")
def _():
    from galerkit.bindings.distributed.partition import dof_layout

    parts = np.zeros(mesh2().n_cells, dtype=np.int32)
    parts[4] = 7
    dof_layout(disc(), parts, 2)


@case("dof_layout: a part without cells", X, "InputError")
def _():
    from galerkit.bindings.distributed.partition import dof_layout

    dof_layout(disc(), np.zeros(mesh2().n_cells, dtype=np.int32), 2)


@case("petsc engine: incompatible pure Neumann data", X, "ProblemError")
def _():
    from galerkit.bindings.distributed.petsc_engine import assemble_part, constrain_part, neumann_sums, \
        prepare_parts

    header, payloads = prepare_parts(gk.PoissonProblem(mesh2(), source=1.0), 1, 1)
    system = assemble_part(*next(payloads), header["dim"], 1)
    constrain_part(system, neumann_sums(system))


@case("petsc engine: a lambda as coefficient (cannot be sent to ranks)", X, "InputError")
def _():
    from galerkit.bindings.distributed.petsc_engine import prepare_parts

    prepare_parts(gk.PoissonProblem(mesh2(), source=lambda x: x[0],
                                    dirichlet={"boundary": 0.0}), 1, 2)


@case("petsc engine: PETSc options without a leading dash", X, "InputError")
def _():
    from galerkit.bindings.distributed.petsc_engine import parse_petsc_options

    parse_petsc_options("ksp_type cg")


# ----------------------------------------------------------------------------
# problem files and the command line
# ----------------------------------------------------------------------------
C = "problem files and command line"


def _problem(extra=""):
    import tomllib

    from galerkit.bindings.command.problemfile import parse_problem

    text = '[mesh]\ngenerator = "square"\ncells = 3\n' + extra
    return parse_problem(tomllib.loads(text), source="case.toml", text=text)


@case("problem file: a dirichlet entry and a neumann entry on overlapping tags", C, "InputError")
def _():
    _problem('[[boundary]]\ntag = "boundary"\nkind = "dirichlet"\nu = 0\n'
             '[[boundary]]\ntag = "ymax"\nkind = "neumann"\ninflow = 1\n')


@case("problem file: [mesh] merge_duplicates with a generator", C, "InputError")
def _():
    _problem("merge_duplicates = true\n")


@case("problem file: [adapt] bulk above 1", C, "InputError")
def _():
    _problem("[adapt]\nbulk = 1.5\n")


@case("problem file: [adapt] with a conductivity formula varying inside cells", C, "InputError")
def _():
    _problem('[material]\nconductivity = "1 + x"\n[adapt]\n')


def _job_folder():
    """A problem file's folder ``job`` inside the temporary folder."""
    job = os.path.join(_get("folder", tempfile.mkdtemp), "job")
    os.makedirs(job, exist_ok=True)
    return job


def _confined(text):
    import tomllib

    from galerkit.bindings.command.problemfile import parse_problem

    return parse_problem(tomllib.loads(text), source="job/case.toml", text=text,
                         base=_job_folder(), stay_in_folder=True)


@case("problem file under stay_in_folder (--stay-in-folder): output folder '../results'", C,
      "InputError")
def _():
    _confined('[mesh]\ngenerator = "square"\ncells = 3\n[output]\nfolder = "../results"\n')


@case("problem file under stay_in_folder: a mesh file that is a link to a file outside", C,
      "InputError")
def _():
    link = os.path.join(_job_folder(), "linked.msh")
    if not os.path.lexists(link):
        os.symlink(_file("outside.msh", b""), link)
    _confined('[mesh]\nfile = "linked.msh"\n')


# ----------------------------------------------------------------------------
# running
# ----------------------------------------------------------------------------
def run_case(fn):
    """(exception class name, message) of one case; ``("no error", "")`` if none."""
    try:
        fn()
    except Exception as exc:  # noqa: BLE001 - the suite records whatever happens
        return type(exc).__name__, str(exc)
    return "no error", ""


def run_all(echo=False):
    out = []
    for name, category, expected, fn in CASES:
        if echo:
            print(f"case: {name}", file=sys.stderr, flush=True)
        cls, msg = run_case(fn)
        out.append((name, category, expected, cls, msg))
    return out


def markdown(results):
    """The table in docs/bad-input.md: one row per case."""
    rows = ["| input class | bad input | you get | example message |",
            "|---|---|---|---|"]
    for name, category, _, cls, msg in results:
        text = " ".join(msg.split())
        if "folder" in _cache:  # temporary file names vary from run to run
            text = text.replace(_cache["folder"] + os.sep, "")
        text = text.replace(os.getcwd(), ".")
        if len(text) > 220:
            text = text[:217] + "..."
        text = text.replace("|", "\\|")
        rows.append(f"| {category} | {name} | `{cls}` | {text} |")
    return "\n".join(rows)


def main(argv=None):
    argv = sys.argv[1:] if argv is None else argv
    warnings.simplefilter("ignore")
    results = run_all(echo=True)
    if "--markdown" in argv:
        print(markdown(results))
    elif "--messages" in argv:
        print(json.dumps([[r[0], r[3], r[4]] for r in results], indent=1))
    else:
        print(json.dumps([[r[0], r[3]] for r in results]))
    return 0


if __name__ == "__main__":
    sys.exit(main())
