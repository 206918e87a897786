"""Specification of the linear-solver registry (galerkit.solvers).

Test matrices are built here, independently of the kernel, with scipy.sparse:
the 2D 5-point and 3D 7-point finite-difference Laplacians (Kronecker sums of
the 1D second-difference matrix tridiag(-1, 2, -1), which is SPD; reference:
common practice, e.g. LeVeque, Finite Difference Methods for Ordinary and
Partial Differential Equations, 2007, ch. 3) and a random sparse SPD matrix.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from galerkit.errors import InputError, ResourceError, SolverError
from galerkit.solvers import (
    AUTO_DIRECT_LIMITS,
    SolveReport,
    available_solvers,
    choose_method,
    prepare_solver,
    register_solver,
    solve,
    solver_description,
    unregister_solver,
)

BUILT_INS = ["cg", "cg-amg", "cg-jacobi", "cg-pyamg", "direct"]
CG_METHODS = ["cg", "cg-jacobi", "cg-amg", "cg-pyamg"]


# ---------------------------------------------------------------- matrices


def second_difference(m: int) -> sp.csr_array:
    """1D tridiag(-1, 2, -1) of size m (Dirichlet second difference)."""
    e = np.ones(m)
    return sp.diags_array([-e[1:], 2 * e, -e[1:]], offsets=[-1, 0, 1], format="csr")


def laplacian_2d(m: int) -> sp.csr_array:
    """5-point Laplacian on an m x m interior grid: L (x) I + I (x) L."""
    L, eye = second_difference(m), sp.identity(m, format="csr")
    return sp.csr_array(sp.kron(L, eye) + sp.kron(eye, L))


def laplacian_3d(m: int) -> sp.csr_array:
    """7-point Laplacian on an m x m x m interior grid."""
    L, eye = second_difference(m), sp.identity(m, format="csr")
    return sp.csr_array(
        sp.kron(sp.kron(L, eye), eye)
        + sp.kron(sp.kron(eye, L), eye)
        + sp.kron(sp.kron(eye, eye), L)
    )


def random_spd(n: int, seed: int = 7) -> sp.csr_array:
    """R R^T + I for a random sparse R: symmetric, eigenvalues >= 1."""
    rng = np.random.default_rng(seed)
    R = sp.random_array((n, n), density=0.02, rng=rng, format="csr")
    return sp.csr_array(R @ R.T + sp.identity(n))


PROBLEMS = {
    "laplacian-2d": lambda: laplacian_2d(24),
    "laplacian-3d": lambda: laplacian_3d(10),
    "random-spd": lambda: random_spd(400),
}


def load_vector(n: int, seed: int = 3) -> np.ndarray:
    return np.random.default_rng(seed).standard_normal(n)


def relative_error(x: np.ndarray, ref: np.ndarray) -> float:
    return float(np.linalg.norm(x - ref) / np.linalg.norm(ref))


@pytest.fixture
def scratch_names():
    """Names registered during a test, removed afterwards."""
    names: list[str] = []
    yield names
    for name in names:
        if name in available_solvers():
            unregister_solver(name)


# ---------------------------------------------------------------- accuracy


@pytest.mark.parametrize("problem", sorted(PROBLEMS))
@pytest.mark.parametrize("method", available_solvers())
def test_every_registered_solver_agrees_with_scipy_spsolve(method, problem):
    A = PROBLEMS[problem]()
    b = load_vector(A.shape[0])
    reference = spla.spsolve(sp.csc_array(A), b)  # reference: SciPy spsolve
    report = solve(A, b, method=method, rtol=1e-12)
    assert isinstance(report, SolveReport)
    assert report.converged, report.message
    assert report.message == ""
    assert report.method == method
    assert report.x.dtype == np.float64 and report.x.shape == b.shape
    assert relative_error(report.x, reference) <= 1e-8


def test_built_ins_are_registered_with_descriptions():
    assert set(BUILT_INS) <= set(available_solvers())
    assert available_solvers() == sorted(available_solvers())
    for name in BUILT_INS:
        assert solver_description(name)


# ---------------------------------------------------------------- residual history


@pytest.mark.parametrize("method", CG_METHODS)
def test_cg_residual_history_starts_at_one_and_ends_below_rtol(method):
    # large enough for every method to iterate (the native multigrid solves a
    # system of at most 400 unknowns exactly on its coarsest level)
    A = laplacian_2d(40)
    b = load_vector(A.shape[0])
    rtol = 1e-9
    report = solve(A, b, method=method, rtol=rtol)
    res = report.residuals
    assert report.converged
    assert res.dtype == np.float64
    assert res[0] == 1.0  # x0 = None: r0 = b
    assert res[-1] <= rtol
    assert report.final_residual == res[-1]
    assert report.iterations == len(res) - 1 >= 1
    # the last entry is the true residual, recomputed independently here
    true = np.linalg.norm(b - A @ report.x) / np.linalg.norm(b)
    assert report.final_residual == pytest.approx(true, rel=1e-6)
    # CG residual norms may oscillate (only the A-norm error decreases
    # monotonically; Saad 2003, ch. 6), but the best residual seen must
    # improve from each fifth of the history to the next
    assert len(res) >= 5
    blocks = np.array_split(res, 5)
    best = [float(blk.min()) for blk in blocks]
    assert all(later < earlier for earlier, later in zip(best, best[1:]))


def test_direct_reports_one_iteration_and_its_true_residual():
    A = laplacian_3d(8)
    b = load_vector(A.shape[0])
    report = solve(A, b, method="direct")
    assert report.iterations == 1
    assert report.residuals.shape == (1,)
    true = np.linalg.norm(b - A @ report.x) / np.linalg.norm(b)
    assert report.final_residual == pytest.approx(true, rel=1e-6, abs=1e-18)
    assert report.final_residual <= 1e-12


@pytest.mark.parametrize("method", BUILT_INS)
def test_zero_right_hand_side_gives_zero_solution_at_once(method):
    A = laplacian_2d(8)
    x0 = np.ones(A.shape[0])
    report = solve(A, np.zeros(A.shape[0]), method=method, x0=x0)
    assert report.converged
    assert np.array_equal(report.x, np.zeros(A.shape[0]))
    assert report.final_residual == 0.0
    if method != "direct":
        assert report.iterations == 0


def test_exact_initial_guess_needs_no_iteration():
    A = laplacian_2d(10)
    x_exact = load_vector(A.shape[0])
    report = solve(A, A @ x_exact, method="cg", x0=x_exact)
    assert report.converged and report.iterations == 0
    assert report.final_residual <= 1e-14


def test_callback_sees_every_iterate():
    A = laplacian_2d(12)
    b = load_vector(A.shape[0])
    seen: list[np.ndarray] = []
    report = solve(A, b, method="cg-jacobi", callback=seen.append)
    assert len(seen) == report.iterations
    np.testing.assert_array_equal(seen[-1], report.x)
    assert seen[0] is not seen[-1]  # copies, not the live iterate


# ---------------------------------------------------------------- preconditioning, reuse


def test_amg_preconditioning_cuts_iterations_on_64x64_laplacian():
    # multigrid-preconditioned CG needs a nearly grid-independent number of
    # iterations, plain CG grows like the grid size (Saad, Iterative Methods
    # for Sparse Linear Systems, 2003, ch. 13; Briggs, Henson & McCormick, A
    # Multigrid Tutorial, 2000).  Those sources give the behaviour, not the
    # numbers: the ceiling 30 and the floor 60 for plain CG are measured values
    # with headroom; the gap between the two is the claim the sources support.
    A = laplacian_2d(64)
    b = np.ones(A.shape[0])
    plain = solve(A, b, method="cg", rtol=1e-8)
    amg = solve(A, b, method="cg-amg", rtol=1e-8)
    assert plain.converged and amg.converged
    assert amg.iterations < 30
    assert plain.iterations > 60
    assert amg.options["levels"] >= 2
    assert amg.options["operator_complexity"] >= 1.0


def test_jacobi_undoes_a_bad_diagonal_scaling():
    # on S = D A D, Jacobi-preconditioned CG is CG on the unit-diagonal
    # matrix, so the scaling D costs it nothing while plain CG suffers
    # (reference: Saad, Iterative Methods for Sparse Linear Systems, 2003, ch. 10)
    A = laplacian_2d(16)
    n = A.shape[0]
    d = 10.0 ** np.random.default_rng(5).uniform(-2, 2, n)
    S = sp.csr_array(sp.diags_array(d) @ A @ sp.diags_array(d))
    b = load_vector(n)
    on_a = solve(A, b / 4.0, method="cg", rtol=1e-8)
    jacobi = solve(S, d * b, method="cg-jacobi", rtol=1e-8)
    plain = solve(S, d * b, method="cg", rtol=1e-8, maxiter=4 * on_a.iterations)
    assert jacobi.converged
    assert jacobi.iterations <= 2 * on_a.iterations
    assert plain.converged is False or plain.iterations > 2 * jacobi.iterations


def test_amg_options_reach_pyamg():
    A = laplacian_2d(30)
    report = solve(A, np.ones(A.shape[0]), method="cg-pyamg", amg_options={"max_levels": 2})
    assert report.converged
    assert report.options["levels"] == 2
    # the options used: the caller's, over the documented defaults
    from galerkit.solvers import DEFAULT_AMG_OPTIONS
    assert report.options["amg_options"] == {**DEFAULT_AMG_OPTIONS, "max_levels": 2}


def test_amg_option_key_unknown_to_pyamg_is_named():
    A = laplacian_2d(8)
    with pytest.raises(InputError, match="levels_please"):
        prepare_solver(A, "cg-pyamg", amg_options={"levels_please": 3})


@pytest.mark.parametrize("inner", ["direct", "cg-amg"])
def test_prepared_solver_sets_up_once_for_many_right_hand_sides(inner, scratch_names):
    calls = {"n": 0}

    def counting_factory(A):
        calls["n"] += 1
        return prepare_solver(A, inner)

    name = f"counting-{inner}"
    register_solver(name, counting_factory, description="counts set-ups")
    scratch_names.append(name)

    A = laplacian_2d(20)
    prepared = prepare_solver(A, name)
    b1, b2 = load_vector(A.shape[0], seed=1), load_vector(A.shape[0], seed=2)
    r1, r2 = prepared.solve(b1), prepared.solve(b2)
    assert calls["n"] == 1
    for b, report in ((b1, r1), (b2, r2)):
        reference = spla.spsolve(sp.csc_array(A), b)  # reference: SciPy spsolve
        assert report.converged
        assert relative_error(report.x, reference) <= 1e-8
        assert report.method == name
    assert r1.setup_seconds == r2.setup_seconds == prepared.setup_seconds >= 0.0


# ---------------------------------------------------------------- failure is reported


@pytest.mark.parametrize("method", CG_METHODS)
def test_too_few_iterations_reports_not_converged_with_count(method):
    A = laplacian_2d(30)
    b = load_vector(A.shape[0])
    report = solve(A, b, method=method, maxiter=2)
    assert report.converged is False
    assert report.iterations == 2
    assert len(report.residuals) == 3
    assert "2 iterations" in report.message
    assert "1.0e-10" in report.message  # the tolerance
    assert f"{report.final_residual:.3e}" in report.message  # the achieved residual


@pytest.mark.parametrize("method", CG_METHODS)
def test_indefinite_matrix_is_reported_not_spd(method):
    # tridiag(-1, 2, -1) - 1.5 I: positive diagonal 0.5, eigenvalues
    # 2 - 2 cos(k pi / (m+1)) - 1.5 of both signs; the lowest mode
    # sin(k pi i / (m+1)), k = 1, has a negative eigenvalue, so p0 = b gives
    # p0.A p0 < 0 (reference: closed-form eigenpairs of the second
    # difference matrix, LeVeque 2007, ch. 2)
    m = 40
    A = sp.csr_array(second_difference(m) - 1.5 * sp.identity(m))
    b = np.sin(np.pi * np.arange(1, m + 1) / (m + 1))
    report = solve(A, b, method=method)
    assert report.converged is False
    assert "not symmetric positive definite" in report.message
    assert np.all(np.isfinite(report.x))


def test_jacobi_refuses_nonpositive_diagonal_naming_the_row():
    A = laplacian_2d(5).tolil()
    A[7, 7] = -1.0
    with pytest.raises(InputError, match="row 7"):
        prepare_solver(sp.csr_array(A), "cg-jacobi")


# ---------------------------------------------------------------- registry


def test_registered_solver_is_listed_and_usable(scratch_names):
    def scaled_jacobi(A, *, passes=1):
        return prepare_solver(A, "cg-jacobi")

    register_solver("my-jacobi", scaled_jacobi, description="Jacobi-preconditioned CG again")
    scratch_names.append("my-jacobi")
    assert "my-jacobi" in available_solvers()
    assert solver_description("my-jacobi") == "Jacobi-preconditioned CG again"
    A = laplacian_2d(10)
    b = load_vector(A.shape[0])
    report = solve(A, b, method="my-jacobi", passes=2)
    assert report.converged and report.method == "my-jacobi"
    reference = spla.spsolve(sp.csc_array(A), b)  # reference: SciPy spsolve
    assert relative_error(report.x, reference) <= 1e-8
    # an option the factory does not name is refused and named
    with pytest.raises(InputError, match="'sweeps'.*passes"):
        solve(A, b, method="my-jacobi", sweeps=2)


def test_duplicate_registration_raises_unless_overwrite(scratch_names):
    register_solver("twice", lambda A: prepare_solver(A, "cg"))
    scratch_names.append("twice")
    with pytest.raises(InputError, match="'twice'.*already registered"):
        register_solver("twice", lambda A: prepare_solver(A, "cg"))
    register_solver("twice", lambda A: prepare_solver(A, "direct"), overwrite=True)
    with pytest.raises(InputError, match="already registered"):
        register_solver("direct", lambda A: prepare_solver(A, "cg"))


def test_unknown_method_is_named_with_the_available_ones():
    A = laplacian_2d(4)
    with pytest.raises(InputError) as info:
        solve(A, np.ones(A.shape[0]), method="gauss-seidel-please")
    text = str(info.value)
    assert "gauss-seidel-please" in text
    for name in BUILT_INS:
        assert name in text


@pytest.mark.parametrize("method", BUILT_INS)
def test_unknown_option_of_a_built_in_is_named(method):
    A = laplacian_2d(4)
    with pytest.raises(InputError, match="'tolerance_mode'"):
        prepare_solver(A, method, tolerance_mode="strict")


def test_auto_resolves_to_a_registered_name():
    A = laplacian_2d(12)
    report = solve(A, np.ones(A.shape[0]), dim=2, degree=1)
    assert report.method == choose_method(A.shape[0], 2, 1) == "direct"
    assert report.converged


# ---------------------------------------------------------------- bad input


def test_non_square_matrix_is_refused_with_its_shape():
    A = sp.random_array((5, 4), density=0.5, rng=0, format="csr")
    with pytest.raises(InputError, match=r"square.*\(5, 4\)"):
        solve(A, np.ones(5))


def test_dense_matrix_is_refused():
    with pytest.raises(InputError, match="sparse.*ndarray"):
        solve(np.eye(3), np.ones(3))


def test_complex_matrix_is_refused_naming_the_dtype():
    A = sp.csr_array(laplacian_2d(3).astype(np.complex128))
    with pytest.raises(InputError, match="complex128"):
        prepare_solver(A, "cg")


def test_non_finite_matrix_entry_is_located():
    A = laplacian_2d(4).tolil()
    A[2, 3] = np.inf
    with pytest.raises(InputError, match=r"row 2, column 3"):
        prepare_solver(sp.csr_array(A), "direct")


def test_integer_matrix_is_converted_to_float64():
    A = sp.csr_array(laplacian_2d(6).astype(np.int64))
    report = solve(A, np.ones(A.shape[0]), method="cg")
    assert report.converged
    assert A.dtype == np.int64  # the caller's matrix is untouched


def test_wrong_length_right_hand_side_is_refused_with_shapes():
    A = laplacian_2d(4)
    with pytest.raises(InputError, match=r"shape \(16,\).*\(15,\)"):
        solve(A, np.ones(15))


def test_nan_in_right_hand_side_names_the_first_index():
    A = laplacian_2d(4)
    b = np.ones(16)
    b[[5, 9]] = np.nan
    with pytest.raises(InputError, match=r"index 5"):
        solve(A, b, method="cg")


def test_bad_tolerance_is_refused():
    A = laplacian_2d(3)
    with pytest.raises(InputError, match="rtol"):
        solve(A, np.ones(9), rtol=-1.0)
    with pytest.raises(InputError, match="maxiter"):
        solve(A, np.ones(9), method="cg", maxiter=1.5)


def test_input_errors_are_value_errors():
    # galerkit.errors: InputError derives from ValueError, so callers that
    # already catch ValueError keep working
    with pytest.raises(ValueError):
        solve(np.eye(2), np.ones(2))


# ---------------------------------------------------------------- memory guard


def test_direct_refuses_factorisation_beyond_memory_limit():
    A = laplacian_3d(6)
    with pytest.raises(ResourceError) as info:
        prepare_solver(A, "direct", memory_limit_bytes=1000)
    text = str(info.value)
    assert "cg-amg" in text
    assert "MiB" in text  # the estimate and the limit are stated
    assert isinstance(info.value, RuntimeError)


def test_direct_memory_estimate_is_reported_when_it_fits():
    A = laplacian_3d(6)
    report = solve(A, np.ones(A.shape[0]), method="direct", memory_limit_bytes=1e12)
    assert report.converged
    assert report.options["memory_limit_bytes"] == 1e12
    # the crude model must not under-estimate the real factors of a 3D
    # Laplacian: at least 12 bytes (8 value + 4 index) per stored entry of
    # L + U as SuperLU reports them (common practice for CSC storage)
    assert report.options["estimated_factor_bytes"] >= 12 * report.options["factor_nonzeros"]


# ---------------------------------------------------------------- the auto rule


@pytest.mark.parametrize(
    "dim, degree, small, large",
    [
        (2, 1, 200_000, 200_001),
        (2, 2, 100_000, 100_001),
        (3, 1, 40_000, 40_001),
        (3, 3, 13_333, 13_334),
        (None, 1, 40_000, 40_001),  # unknown dimension counts as 3D
        (1, 1, 2_000_000, 2_000_001),
    ],
)
def test_choose_method_follows_the_documented_table(dim, degree, small, large):
    assert choose_method(small, dim, degree) == "direct"
    assert choose_method(large, dim, degree) == "cg-amg"
    assert choose_method(10, dim, degree) == "direct"
    assert choose_method(10**8, dim, degree) == "cg-amg"


def test_choose_method_table_constants_match_the_docstring():
    assert AUTO_DIRECT_LIMITS == {1: 2_000_000, 2: 200_000, 3: 40_000, None: 40_000}


@pytest.mark.parametrize("kwargs", [{"dim": 4}, {"degree": 0}, {"n": -1}])
def test_choose_method_refuses_out_of_range_arguments(kwargs):
    args = {"n": 100, **kwargs}
    with pytest.raises(InputError):
        choose_method(**args)


# ---------------------------------------------------------------- every report is checked


def _reporting(x_of, residual_of, converged=True):
    """A solver whose report gives ``x_of(A, b)`` and claims ``residual_of(A, b, x)``."""
    class Backend:
        def __init__(self, A):
            self.A = A

        def solve(self, b, x0=None, rtol=1e-10, maxiter=None, callback=None):
            x = x_of(self.A, b)
            return SolveReport(x=x, converged=converged, iterations=1,
                               residuals=np.array([1.0, residual_of(self.A, b, x)]))
    return Backend


def _true(A, b, x):
    return float(np.linalg.norm(b - A @ x) / np.linalg.norm(b))


def test_an_honest_registered_solver_passes_the_report_check(scratch_names):
    # SciPy's spsolve as the reference solver, reporting its true residual
    A, b = laplacian_2d(12), load_vector(144)
    register_solver("honest", _reporting(lambda A, b: spla.spsolve(A.tocsc(), b), _true))
    scratch_names.append("honest")
    rep = solve(A, b, method="honest")
    assert rep.converged and rep.final_residual < 1e-12


@pytest.mark.parametrize("x_of,residual_of,match", [
    (lambda A, b: np.full(b.size, np.nan), lambda A, b, x: 1e-12,
     r"x with 144 non-finite entries \(first x\[0\] = nan\) and converged=True"),
    (lambda A, b: np.zeros(b.size + 2), lambda A, b, x: 1e-12,
     r"x of shape \(146,\), dtype float64; it must be a real array of shape \(144,\)"),
    (lambda A, b: np.zeros(b.size), lambda A, b, x: 1e-12,
     r"claimed relative residual 1\.000e-12 .* \|\|b - A x\|\| / \|\|b\|\| = 1\.000e\+00"),
    # a factor 20 off: refused; the true residual of this x is 0.05
    (lambda A, b: 0.95 * spla.spsolve(A.tocsc(), b), lambda A, b, x: 0.05 / 20,
     r"claimed relative residual 2\.500e-03"),
])
def test_a_solver_report_that_cannot_be_right_is_a_solver_error(scratch_names, x_of,
                                                                 residual_of, match):
    register_solver("liar", _reporting(x_of, residual_of))
    scratch_names.append("liar")
    with pytest.raises(SolverError, match=match):
        solve(laplacian_2d(12), load_vector(144), method="liar")


def test_a_claimed_residual_within_a_factor_10_is_accepted(scratch_names):
    x_of = lambda A, b: 0.95 * spla.spsolve(A.tocsc(), b)  # noqa: E731
    register_solver("roughly", _reporting(x_of, lambda A, b, x: _true(A, b, x) / 5,
                                          converged=False))
    scratch_names.append("roughly")
    rep = solve(laplacian_2d(12), load_vector(144), method="roughly")
    assert np.isclose(rep.final_residual * 5, 0.05, rtol=1e-10)
