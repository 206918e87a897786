"""Specification of the solver benchmark (galerkit.bindings.command.bench).

Exact facts only: the table's bookkeeping (minimum <= median, one row per size and
method, CSV equal to the rows), an estimate made on the whole system when it is no
larger than the pilot, and the direct solver's pilot factor count against SciPy's own
SuperLU on the same submatrix (SciPy is the reference).  Timings are never asserted.
"""

import csv
import io

import numpy as np
import pytest

from galerkit.bindings.command.bench import BenchTable, bench, estimate_method, growth_factors
from galerkit.bindings.files.plots import PNG_SIGNATURE
from galerkit.errors import InputError


def test_bench_returns_a_table_with_markdown_csv_and_a_time_plot(tmp_path):
    table = bench(generate="square", sizes=[4, 8], methods=["direct", "cg"], repeat=2)
    assert isinstance(table, BenchTable)
    assert [(r["size"], r["method"]) for r in table.rows] == [
        (4, "direct"), (4, "cg"), (8, "direct"), (8, "cg")]
    # unknowns of the unit square, P1, u = 0 on the boundary: (n - 1)^2 (counted by hand)
    assert [r["unknowns"] for r in table.rows] == [9, 9, 49, 49]
    for r in table.rows:
        assert r["runs"] == 2 and r["converged"]
        assert r["setup_min"] <= r["setup_median"] and r["solve_min"] <= r["solve_median"]
        assert r["peak_mb"] > r["base_mb"] > 0
    md = table.to_markdown(["unknowns", "method", "iterations"])
    assert md.splitlines()[0] == "| unknowns | method | iterations |" and "| 49 | cg |" in md
    rows = list(csv.DictReader(io.StringIO(table.to_csv())))
    assert len(rows) == 4 and float(rows[3]["l2_error"]) == pytest.approx(
        table.rows[3]["l2_error"], rel=1e-15)
    png = table.plot(tmp_path / "t.png")
    assert png.read_bytes()[:8] == PNG_SIGNATURE


def test_an_estimate_on_a_system_no_larger_than_the_pilot_is_a_measurement():
    import galerkit as gk
    from galerkit.boundary import DirichletElimination

    disc = gk.Discretization(gk.structured_triangles(6, 6), 1)
    A = gk.Assembler(disc).stiffness(1.0)
    Af = DirichletElimination(A, disc.boundary_dofs()).reduce_matrix(A)
    est = estimate_method("cg", Af, 2)
    assert est["basis"] == "measured on the whole system" and est["iterations"] >= 1


def test_the_direct_pilot_counts_the_factors_scipy_makes_of_the_same_patch():
    # reference: SciPy's splu with the same options on the same principal submatrix
    import scipy.sparse as sp
    import scipy.sparse.linalg as spla

    import galerkit as gk
    from galerkit.bindings.command.bench import _pilot_indices
    from galerkit.boundary import DirichletElimination

    disc = gk.Discretization(gk.structured_tetrahedra(6, 6, 6), 1)
    A = gk.Assembler(disc).stiffness(1.0)
    Af = DirichletElimination(A, disc.boundary_dofs()).reduce_matrix(A)
    idx = _pilot_indices(Af, 60)
    sub = Af[idx, :][:, idx]
    lu = spla.splu(sp.csc_matrix(sub), permc_spec="MMD_AT_PLUS_A", diag_pivot_thresh=0.0,
                   options={"SymmetricMode": True})
    est = estimate_method("direct", Af, 3, pilot=60)
    n, m = Af.shape[0], 60
    expected_mb = 12.0 * (lu.L.nnz + lu.U.nnz) * (n / m) ** (4 / 3) / 2**20
    assert est["mb"] >= expected_mb * (1 - 1e-12)
    assert "pilot on 60 of" in est["basis"]
    assert np.isfinite(est["seconds"]) and est["seconds"] > 0


def test_bad_bench_arguments_are_refused():
    with pytest.raises(InputError, match="give a problem file or --generate"):
        bench()
    with pytest.raises(InputError, match="repeat must be an integer 1..100"):
        bench(generate="square", repeat=0)
    with pytest.raises(InputError, match="'nope' is not a registered solver"):
        bench(generate="square", sizes=[2], methods=["nope"])
    with pytest.raises(InputError, match="--solvers-module 'no_such_module_here'"):
        bench(generate="square", sizes=[2], solvers_module=["no_such_module_here"])


def test_growth_laws_are_the_textbook_exponents():
    # nested dissection: fill n log n (2D) and n^(4/3) (3D), work n^1.5 and n^2 (George
    # 1973; Lipton, Rose & Tarjan 1979); CG iterations ~ h^-1 ~ n^(1/d) (condition
    # number ~ h^-2, Brenner & Scott 2008); multigrid iterations bounded
    n, m = 8.0e5, 2.0e4
    t2, i2, m2 = growth_factors("direct", 2, n, m)
    assert (t2, i2) == pytest.approx((40 ** 1.5, 1.0)) and m2 == pytest.approx(
        40 * np.log(n) / np.log(m))
    t3, _, m3 = growth_factors("direct", 3, n, m)
    assert (t3, m3) == pytest.approx((40 ** 2, 40 ** (4 / 3)))
    assert growth_factors("cg", 3, n, m) == pytest.approx((40 ** (4 / 3), 40 ** (1 / 3), 40))
    assert growth_factors("cg-amg", 2, n, m) == pytest.approx((40, 1, 40))
    assert growth_factors("someone-elses", 2, n, m) == growth_factors("cg", 2, n, m)
