"""Determinism: the same input gives the same bits, run after run and whatever
the number of numba threads.

The assembler owns row ranges per thread and sums every entry over its cells
in one fixed cell order (DEVELOPERS.md), the topology kernels bucket in fixed
chunks, and the direct solver factorises the same matrix the same way, so
matrices, load vectors, dof numberings and direct solutions must agree bit
for bit between 1 and 2 threads and between two runs.  ``"cg-amg"`` is
checked for two runs with the same thread count.

Every comparison is on raw bytes (``ndarray.tobytes``), never a tolerance.
"""

from __future__ import annotations

import numba
import numpy as np
import pytest

import galerkit as gk
from galerkit.boundary import DirichletElimination

TWO_THREADS = numba.config.NUMBA_NUM_THREADS >= 2


@pytest.fixture
def threads():
    """Set numba's thread count inside a test; restored afterwards."""
    saved = numba.get_num_threads()
    yield numba.set_num_threads
    numba.set_num_threads(saved)


def _mesh(dim):
    """An irregular mesh: refined, then interior vertices moved (fixed seed)."""
    base = gk.structured_triangles(5, 4) if dim == 2 else gk.structured_tetrahedra(2, 2, 2)
    m = gk.refine_uniform(base)
    rng = np.random.default_rng(7)
    p = m.points.copy()
    inner = np.all((p > 1e-9) & (p < 1 - 1e-9), axis=1)
    h = 0.5 / (4 if dim == 2 else 2)
    p[inner] += 0.15 * h * rng.uniform(-1, 1, size=(int(inner.sum()), dim))
    mesh = gk.Mesh(p, m.cells)
    for name, ids in m.facet_groups.items():
        mesh.set_facet_tag(name, ids)
    return mesh


def _kappa(x):
    return 1.0 + x[0] ** 2 + 0.5 * np.sin(3 * x[1])


def _everything(dim, k):
    """Build mesh, dofs and operators from scratch; return their bytes."""
    mesh = _mesh(dim)
    disc = gk.Discretization(mesh, k)
    asm = gk.Assembler(disc)
    tensor = np.diag(np.arange(1.0, dim + 1)) + 0.1
    K = asm.stiffness()
    out = {
        "boundary facets": mesh.boundary_facets,
        "cell dofs": disc.cell_dofs,
        "indptr": asm.indptr,
        "indices": asm.indices,
        "position map": asm.posmap,
        "stiffness": K.data,
        "stiffness kappa(x)": asm.stiffness(_kappa).data,
        "stiffness tensor": asm.stiffness(tensor).data,
        "mass": asm.mass().data,
        "mass c(x)": asm.mass(_kappa).data,
        "load f(x)": asm.load(lambda x: np.exp(x[0]) * x[1]),
        "load dofs": asm.load(disc.interpolate(_kappa)),
        "boundary mass": asm.boundary_mass("xmin", _kappa).data,
        "boundary load": asm.boundary_load("ymax", _kappa),
    }
    elim = DirichletElimination(K, disc.boundary_dofs("boundary"))
    Af, bf = elim.reduce(K, asm.load(1.0), np.zeros(elim.dofs.size))
    out["direct solution"] = gk.solve(Af, bf, method="direct").x
    return {key: np.ascontiguousarray(v).tobytes() for key, v in out.items()}


CASES = [(2, 1), (2, 2), (3, 1), (3, 2)]


@pytest.mark.parametrize("dim,k", CASES)
def test_two_runs_give_identical_bits(dim, k):
    first, second = _everything(dim, k), _everything(dim, k)
    assert [key for key in first if first[key] != second[key]] == []


@pytest.mark.skipif(not TWO_THREADS, reason="numba has a single thread on this machine")
@pytest.mark.parametrize("dim,k", CASES)
def test_one_and_two_threads_give_identical_bits(dim, k, threads):
    threads(1)
    one = _everything(dim, k)
    threads(2)
    two = _everything(dim, k)
    assert [key for key in one if one[key] != two[key]] == []


def _poisson(dim, method):
    mesh = _mesh(dim)
    problem = gk.PoissonProblem(mesh, conductivity=_kappa, source=lambda x: 1 + x[0],
                                dirichlet={"xmin": 0.0}, neumann={"ymax": 0.5},
                                robin={"xmax": (2.0, 1.0)})
    sol = problem.solve(degree=2, method=method, rtol=1e-10)
    assert sol.report.converged and sol.report.method == method
    return sol.u.tobytes(), sol.report.iterations


@pytest.mark.skipif(not TWO_THREADS, reason="numba has a single thread on this machine")
@pytest.mark.parametrize("dim", [2, 3])
def test_poisson_direct_solution_is_identical_for_1_and_2_threads_and_two_runs(dim, threads):
    threads(1)
    one = _poisson(dim, "direct")
    threads(2)
    two = _poisson(dim, "direct")
    again = _poisson(dim, "direct")
    assert one == two == again


@pytest.mark.parametrize("dim", [2, 3])
def test_poisson_cg_amg_solution_is_identical_for_two_runs(dim):
    first = _poisson(dim, "cg-amg")
    second = _poisson(dim, "cg-amg")
    assert first == second
    assert first[1] > 0  # a real iteration, not a trivial zero solve


def test_pure_neumann_zero_mean_solution_is_identical_for_two_runs():
    mesh = gk.structured_triangles(8, 8)

    def source(x):
        return 2 * np.pi**2 * np.cos(np.pi * x[0]) * np.cos(np.pi * x[1])

    a = gk.PoissonProblem(mesh, source=source).solve(degree=2, method="direct").u
    b = gk.PoissonProblem(mesh, source=source).solve(degree=2, method="direct").u
    assert a.tobytes() == b.tobytes()


def test_cg_amg_set_up_leaves_the_callers_random_state_alone():
    # the set-up seeds NumPy's global generator for PyAMG and restores it after
    A = gk.Assembler(gk.Discretization(gk.structured_triangles(6, 6), 1)).stiffness()
    A = A + 1e-3 * gk.Assembler(gk.Discretization(gk.structured_triangles(6, 6), 1)).mass()
    np.random.seed(123)
    expected = np.random.rand(4)
    np.random.seed(123)
    gk.prepare_solver(A, "cg-amg")
    assert np.random.rand(4).tobytes() == expected.tobytes()


@pytest.mark.parametrize("dim,k", CASES)
def test_any_number_of_row_ranges_gives_identical_bits(dim, k):
    # The property the 1-vs-2-thread tests check, on any machine: each thread owns
    # one row range, so the bits must not depend on how the rows are split.  The
    # split is forced here (1, 3 and 7 ranges) whatever the number of threads.
    from galerkit.assembly import chunk_plan

    disc = gk.Discretization(_mesh(dim), k)
    tensor = np.diag(np.arange(1.0, dim + 1)) + 0.1
    results = []
    for n_ranges in (1, 3, 7):
        asm = gk.Assembler(disc)
        asm._chunks[numba.get_num_threads()] = chunk_plan(disc.cell_dofs, asm.order,
                                                          asm.indptr, n_ranges)
        assert asm._chunk_plan()[0].shape == (n_ranges + 1,)
        results.append([asm.stiffness().data.tobytes(), asm.stiffness(_kappa).data.tobytes(),
                        asm.stiffness(tensor).data.tobytes(), asm.mass(_kappa).data.tobytes(),
                        asm.load(lambda x: np.exp(x[0]) * x[1]).tobytes()])
    assert results[0] == results[1] == results[2]


@pytest.mark.parametrize("dim,k", CASES)
def test_serial_twins_give_the_bits_of_the_parallel_kernels(dim, k, monkeypatch):
    # Below GALERKIT_PARALLEL_FROM entries a kernel runs as its serial twin (the same
    # source compiled without parallel=True, cheaper to compile); the suite runs the
    # parallel kernels (tests/conftest.py), so here both run on the same input.
    from galerkit import compilation

    monkeypatch.setattr(compilation, "PARALLEL_FROM", 0)
    parallel = _everything(dim, k) | {"cg-amg": _poisson(dim, "cg-amg")[0]}
    monkeypatch.setattr(compilation, "PARALLEL_FROM", 1 << 62)
    serial = _everything(dim, k) | {"cg-amg": _poisson(dim, "cg-amg")[0]}
    assert [key for key in parallel if parallel[key] != serial[key]] == []
    twins = [compilation._twins[kern] for kern in compilation._twins]
    assert twins and all(not t.targetoptions.get("parallel") for t in twins)
    assert any(t.signatures for t in twins)


def test_a_kernel_below_the_threshold_runs_as_its_serial_twin(monkeypatch):
    from galerkit import compilation, generators

    kernel = generators._fill_grid_points
    monkeypatch.setattr(compilation, "PARALLEL_FROM", 10)
    twin = compilation.by_size(kernel, 9)
    assert twin is compilation.serial_twin(kernel) and twin is not kernel
    assert twin.py_func.__qualname__ == "_fill_grid_points_serial"
    assert twin.py_func.__code__ is kernel.py_func.__code__
    expected = kernel is compilation.by_size(kernel, 10)
    assert expected == (numba.get_num_threads() > 1)
