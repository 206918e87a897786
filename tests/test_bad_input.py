"""Bad input: every public entry point refuses it with a named galerkit error.

The cases themselves live in ``tests/bad_input_cases.py`` (a script too).
Here they run in this process (class and message checks) and in two
subprocesses, with numba's bounds checking on and off, which must agree:
a case whose bad index reached a compiled kernel would raise ``IndexError``
under ``NUMBA_BOUNDSCHECK=1`` and a wrong number or a crash without it.

Further down: the mesh checks that name two cells, connected components and
the pure-Neumann constraint per component, singular boundary data, the
memory guards, non-convergence reported through ``PoissonProblem``, and
atomic output files.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numba
import numpy as np
import pytest

import galerkit as gk
from galerkit import errors
from galerkit.assembly import estimate_memory
from galerkit.errors import GalerkitError, InputError, MeshError, ProblemError, ResourceError

sys.path.insert(0, str(Path(__file__).parent))
import bad_input_cases  # noqa: E402

HERE = Path(__file__).parent
SCRIPT = HERE / "bad_input_cases.py"


# ----------------------------------------------------------------------------
# the suite, in process
# ----------------------------------------------------------------------------
@pytest.mark.parametrize("name,category,expected,fn", bad_input_cases.CASES,
                         ids=[c[0] for c in bad_input_cases.CASES])
def test_bad_input_case_raises_its_named_galerkit_error(name, category, expected, fn):
    cls, message = bad_input_cases.run_case(fn)
    assert cls == expected, f"{name}: got {cls}: {message}"
    assert issubclass(getattr(errors, cls), GalerkitError)
    assert len(message) > 20  # says what was wrong, not just a class name


def test_case_names_are_unique_and_the_table_has_one_row_per_case():
    names = [c[0] for c in bad_input_cases.CASES]
    assert len(names) == len(set(names))
    results = [(n, cat, e, e, "msg") for n, cat, e, _ in bad_input_cases.CASES]
    assert bad_input_cases.markdown(results).count("\n") == len(names) + 1


# ----------------------------------------------------------------------------
# the suite, in subprocesses with and without bounds checking
# ----------------------------------------------------------------------------
def _boundscheck_cache_dir():
    """A numba cache only for bounds-checked code, kept between runs (compiling
    every kernel afresh costs about a minute) and named after a hash of the
    package sources: numba's cache does not notice edits to helpers in other
    files (DEVELOPERS.md), a new hash does."""
    digest = hashlib.sha1(f"{numba.__version__} {sys.version} opt0".encode())
    root = HERE.parent
    for folder in ("kernel", "bindings"):
        for f in sorted((root / folder).rglob("*.py")):
            digest.update(str(f.relative_to(root)).encode() + f.read_bytes())
    path = Path(tempfile.gettempdir()) / f"galerkit-boundscheck-cache-{digest.hexdigest()[:16]}"
    path.mkdir(exist_ok=True)
    for old in path.parent.glob("galerkit-boundscheck-cache-*"):  # caches of old sources
        if old != path and time.time() - old.stat().st_mtime > 86400:
            shutil.rmtree(old, ignore_errors=True)
    return path


def _start(boundscheck):
    env = dict(os.environ)
    env["NUMBA_BOUNDSCHECK"] = "1" if boundscheck else "0"
    if boundscheck:
        # cached kernels compiled without bounds checks must not be reused; no
        # LLVM optimisation: the checks are the same, compiling is a quarter faster
        env["NUMBA_CACHE_DIR"] = str(_boundscheck_cache_dir())
        env["NUMBA_OPT"] = "0"
    return subprocess.Popen([sys.executable, str(SCRIPT)], cwd=HERE.parent, env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _finish(proc, label):
    out, err = proc.communicate(timeout=900)
    last = [line for line in err.splitlines() if line.startswith("case: ")][-1:]
    assert proc.returncode == 0, (
        f"{label}: the bad-input script exited with {proc.returncode} "
        f"(negative: killed by a signal, e.g. a segfault) during {last}; stderr tail: "
        f"{err[-2000:]}")
    return [tuple(r) for r in json.loads(out)]


def test_bad_input_suite_gives_the_same_named_errors_with_and_without_boundscheck():
    on, off = _start(True), _start(False)  # in parallel: 2 cores
    with_checks = _finish(on, "NUMBA_BOUNDSCHECK=1")
    without = _finish(off, "NUMBA_BOUNDSCHECK=0")
    assert with_checks == without
    expected = [(c[0], c[2]) for c in bad_input_cases.CASES]
    assert without == expected
    assert all(issubclass(getattr(errors, cls), GalerkitError) for _, cls in without)


def test_the_bounds_checked_subprocess_does_check_bounds():
    # control for the comparison above: a kernel called directly with an index
    # out of range (what validation prevents) raises IndexError there
    env = dict(os.environ, NUMBA_BOUNDSCHECK="1", NUMBA_OPT="0",
               NUMBA_CACHE_DIR=str(_boundscheck_cache_dir()))
    code = ("import numpy as np\n"
            "from galerkit.topology import incidence\n"
            "try:\n"
            "    incidence(np.array([[0, 5]], dtype=np.int64), 2)\n"
            "except IndexError:\n"
            "    print('IndexError')\n")
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True,
                         timeout=600)
    assert out.stdout.strip() == "IndexError", out.stderr[-2000:]


# ----------------------------------------------------------------------------
# meshes
# ----------------------------------------------------------------------------
SQUARE = np.array([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0], [1.0, 1.0]])


def test_duplicate_cells_are_refused_naming_both_cells():
    mesh = gk.structured_triangles(3, 3)
    cells = np.vstack([mesh.cells, mesh.cells[[4]][:, ::-1], mesh.cells[[11]][:, [1, 2, 0]]])
    with pytest.raises(MeshError, match=r"cells 4 and 18 have the same vertices .*: 2\)"):
        gk.Mesh(mesh.points, cells)


def test_duplicate_tetrahedra_in_another_vertex_order_are_refused():
    mesh = gk.structured_tetrahedra(2, 2, 2)
    cells = np.vstack([mesh.cells, mesh.cells[[30]][:, [3, 1, 0, 2]]])
    with pytest.raises(MeshError, match=rf"cells 30 and {mesh.n_cells} have the same vertices"):
        gk.Mesh(mesh.points, cells)


def test_inverted_cell_overlapping_its_neighbour_is_refused_naming_both_cells():
    mesh = gk.structured_triangles(4, 4)
    p = mesh.points.copy()
    # vertex 6 (interior, at (0.25, 0.25)) pushed past its neighbours' edges
    assert np.allclose(p[6], [0.25, 0.25])
    p[6] = [0.6, 0.6]
    with pytest.raises(MeshError, match=r"cells \d+ and \d+ lie on the same side .* folds"):
        gk.Mesh(p, mesh.cells)


def test_inverted_tetrahedron_overlapping_its_neighbour_is_refused_naming_both_cells():
    mesh = gk.structured_tetrahedra(3, 3, 3)
    p = mesh.points.copy()
    # vertex 21 (interior, at (1/3, 1/3, 1/3)) pushed out of the polytope of its cells
    assert np.allclose(p[21], [1 / 3, 1 / 3, 1 / 3])
    p[21] = [0.9, 0.1, 0.5]
    with pytest.raises(MeshError, match=r"cells 0 and 7 lie on the same side of their shared "
                                        r"facet with vertices \[1, 5, 21\] \(16 such facets\)"):
        gk.Mesh(p, mesh.cells)


def test_consistently_reoriented_cells_are_accepted_and_counted():
    # common practice: a cell listed clockwise is re-oriented, not refused
    mesh = gk.Mesh(SQUARE, [[0, 2, 1], [1, 3, 2]])
    assert mesh.n_reoriented == 1
    assert np.isclose(mesh.cell_volumes.sum(), 1.0, rtol=1e-15)


def test_unreferenced_vertices_are_refused_and_the_helper_removes_them():
    points = np.vstack([SQUARE[:2], [[9.0, 9.0]], SQUARE[2:]])
    cells = np.array([[0, 1, 3], [1, 4, 3]])
    with pytest.raises(MeshError, match=r"vertex 2 belongs to no cell.*remove_unreferenced"):
        gk.Mesh(points, cells)
    p, c, old_to_new = gk.remove_unreferenced_vertices(points, cells)
    assert old_to_new.tolist() == [0, 1, -1, 2, 3]
    mesh = gk.Mesh(p, c)
    np.testing.assert_array_equal(mesh.points, SQUARE)
    assert np.isclose(mesh.cell_volumes.sum(), 1.0, rtol=1e-15)


def test_empty_facet_tag_is_refused_with_what_to_do():
    mesh = gk.structured_triangles(2, 2)
    with pytest.raises(MeshError, match=r"'outlet': no facet ids given.*leave the tag out"):
        mesh.set_facet_tag("outlet", np.array([], dtype=np.int64))
    with pytest.raises(MeshError, match="no facet ids"):
        gk.Mesh(mesh.points, mesh.cells, facet_groups={"outlet": []})
    assert "outlet" not in mesh.facet_groups


def _two_squares(n=4, gap=2.0):
    a = gk.structured_triangles(n, n)
    mesh = gk.Mesh(np.vstack([a.points, a.points + [gap, 0.0]]),
                   np.vstack([a.cells, a.cells + a.n_vertices]))
    mesh.tag_boundary("left square", lambda x: x[0] < 1.5)
    mesh.tag_boundary("right square", lambda x: x[0] > 1.5)
    return mesh


def test_connected_components_of_two_disjoint_squares():
    mesh = _two_squares(3)
    count, labels = mesh.connected_components()
    assert count == 2
    assert labels.tolist() == [0] * 18 + [1] * 18
    assert not labels.flags.writeable


def test_cells_meeting_at_one_vertex_form_one_component():
    # a "bow tie": continuous elements couple the two triangles through the vertex
    mesh = gk.Mesh([[0, 0], [1, 0], [0, 1], [-1, 0], [0, -1]], [[0, 1, 2], [0, 3, 4]])
    assert mesh.connected_components()[0] == 1


@pytest.mark.parametrize("make", [lambda: gk.structured_tetrahedra(2, 3, 2),
                                  lambda: gk.l_shaped_triangles(4),
                                  lambda: gk.refine_uniform(gk.structured_triangles(3, 2))])
def test_generated_meshes_are_connected(make):
    count, labels = make().connected_components()
    assert count == 1 and labels.max() == 0


# ----------------------------------------------------------------------------
# pure Neumann per component, singular boundary data
# ----------------------------------------------------------------------------
def _cosine(x):
    # u = cos(pi x) cos(pi y): zero normal derivative on the sides of unit squares
    # shifted by whole multiples of 2 (period 2), and zero mean on each square
    return np.cos(np.pi * x[0]) * np.cos(np.pi * x[1])


def test_pure_neumann_on_two_disjoint_squares_fixes_a_zero_mean_in_each():
    # manufactured solution (Roache 2002): -lap u = 2 pi^2 u, u as above
    mesh = _two_squares(8)
    sol = gk.PoissonProblem(mesh, source=lambda x: 2 * np.pi**2 * _cosine(x)).solve(
        degree=2, method="direct")
    assert sol.report.converged
    assert "2 component(s)" in sol.notes[0]
    w = sol.assembler.load(1.0)
    dof_label = np.empty(sol.disc.n_dofs, dtype=np.int64)
    dof_label[sol.disc.cell_dofs] = mesh.connected_components()[1][:, None]
    for k in (0, 1):
        sel = dof_label == k
        assert abs(w[sel] @ sol.u[sel]) < 1e-12  # zero mean in each square
    # a priori P2 L2 error on h = 1/8 (Brenner & Scott 2008): well below 1e-3
    assert gk.l2_error(sol.disc, sol.u, _cosine) < 1e-3


def test_dirichlet_on_one_square_leaves_the_other_pure_neumann():
    mesh = _two_squares(8)
    sol = gk.PoissonProblem(mesh, source=lambda x: 2 * np.pi**2 * _cosine(x),
                            dirichlet={"left square": _cosine}).solve(degree=2, method="direct")
    assert sol.report.converged
    assert "1 of 2 mesh components" in sol.notes[0]
    assert gk.l2_error(sol.disc, sol.u, _cosine) < 1e-3


def test_incompatible_data_on_the_floating_square_names_its_component():
    mesh = _two_squares(4)
    with pytest.raises(ProblemError, match=r"component 1 \(of 2.*= 1\.0+e\+00"):
        gk.PoissonProblem(mesh, source=1.0, dirichlet={"left square": 0.0}).solve()


def test_robin_coefficient_zero_everywhere_is_treated_as_pure_neumann():
    mesh = gk.structured_triangles(8, 8)
    with pytest.raises(ProblemError, match="incompatible"):
        gk.PoissonProblem(mesh, source=1.0, robin={"boundary": (0.0, 5.0)}).solve()
    sol = gk.PoissonProblem(mesh, source=lambda x: 2 * np.pi**2 * _cosine(x),
                            robin={"boundary": (0.0, 5.0)}).solve(degree=2)
    assert sol.report.converged and "pure Neumann" in sol.notes[0]
    assert gk.l2_error(sol.disc, sol.u, _cosine) < 1e-3


def test_negative_robin_coefficient_at_a_point_names_the_facet():
    mesh = gk.structured_triangles(4, 4)
    problem = gk.PoissonProblem(mesh, robin={"xmin": (lambda x: x[1] - 0.6, 0.0)})
    with pytest.raises(ProblemError, match=r"robin\['xmin'\].*negative value .* facet \d+ .*x ="):
        problem.solve()


# ----------------------------------------------------------------------------
# coefficients: the first offending cell is named
# ----------------------------------------------------------------------------
def test_indefinite_tensor_in_one_cell_names_that_cell():
    asm = gk.Assembler(gk.Discretization(gk.structured_triangles(3, 3), 2))
    t = np.tile(np.eye(2), (asm.mesh.n_cells, 1, 1))
    t[11] = [[1.0, 2.0], [2.0, 1.0]]  # eigenvalues 3 and -1
    t[14] = [[1.0, 0.0], [0.0, -1.0]]
    with pytest.raises(InputError, match=r"tensor of cell 11 is not positive definite .*-1\.0"):
        asm.stiffness(t)


def test_source_nan_at_a_quadrature_point_names_the_cell_and_the_point():
    mesh = gk.structured_triangles(4, 4)
    asm = gk.Assembler(gk.Discretization(mesh, 1))
    centroid = mesh.points[mesh.cells].mean(axis=1)
    first = int(np.flatnonzero((centroid[:, 0] > 0.5) & (centroid[:, 1] > 0.5))[0])
    with pytest.raises(InputError, match=rf"source: non-finite value .* in cell {first} .*x = "):
        asm.load(lambda x: np.where((x[0] > 0.5) & (x[1] > 0.5), np.nan, 1.0))


def test_functionals_name_the_mesh_cell_beyond_the_first_block(monkeypatch):
    # the error functionals work in blocks of cells: the message still counts
    # cells from the start of the mesh
    from galerkit import functionals

    monkeypatch.setattr(functionals, "BLOCK_CELLS", 8)
    disc = gk.Discretization(gk.structured_triangles(4, 4), 1)
    kappa = np.ones(disc.mesh.n_cells)
    kappa[20] = -1.0
    with pytest.raises(InputError, match=r"non-positive value -1\.0 in cell 20 "):
        gk.energy_error(disc, np.zeros(disc.n_dofs), lambda x: 0 * x, conductivity=kappa)
    centroid = disc.mesh.points[disc.mesh.cells].mean(axis=1)
    first = int(np.flatnonzero(centroid[:, 1] > 0.75)[0])
    assert first >= 8
    with pytest.raises(InputError, match=rf"exact: non-finite value nan in cell {first} "):
        gk.l2_error(disc, np.zeros(disc.n_dofs), lambda x: np.where(x[1] > 0.75, np.nan, 0.0))


# ----------------------------------------------------------------------------
# solvers through PoissonProblem
# ----------------------------------------------------------------------------
def test_non_convergence_is_reported_with_iterations_and_residual():
    mesh = gk.structured_triangles(16, 16)
    sol = gk.PoissonProblem(mesh, source=1.0, dirichlet={"boundary": 0.0}).solve(
        method="cg", maxiter=3)
    rep = sol.report
    assert not rep.converged and rep.iterations == 3
    assert rep.final_residual > 1e-10
    assert "not converged after 3 iterations" in rep.message
    assert f"{rep.final_residual:.3e}" in rep.message


def test_direct_refuses_factors_beyond_the_limit_and_suggests_cg_amg():
    mesh = gk.structured_tetrahedra(4, 4, 4)
    problem = gk.PoissonProblem(mesh, source=1.0, dirichlet={"boundary": 0.0})
    with pytest.raises(ResourceError, match=r"estimated at [\d.]+ MiB .* limit of .*'cg-amg'"):
        problem.solve(method="direct", memory_limit_bytes=10_000)
    assert problem.solve(method="cg-amg").report.converged


def test_direct_uses_the_memory_limit_variable(monkeypatch):
    asm = gk.Assembler(gk.Discretization(gk.structured_triangles(8, 8), 2))
    A = asm.stiffness() + asm.mass()
    monkeypatch.setenv("GALERKIT_MEMORY_LIMIT_BYTES", "20000")
    with pytest.raises(ResourceError, match=r"\(GALERKIT_MEMORY_LIMIT_BYTES=20000\)"):
        gk.solve(A, np.ones(asm.n_dofs), method="direct")
    # an explicit option still wins over the variable
    assert gk.solve(A, np.ones(asm.n_dofs), method="direct",
                    memory_limit_bytes=1e9).converged


# ----------------------------------------------------------------------------
# the assembler's memory estimate
# ----------------------------------------------------------------------------
@pytest.mark.parametrize("dim,k", [(2, 1), (2, 3), (3, 1), (3, 2)])
def test_memory_estimate_bounds_what_the_assembler_allocates(dim, k):
    mesh = gk.structured_triangles(6, 5) if dim == 2 else gk.structured_tetrahedra(3, 2, 2)
    disc = gk.Discretization(mesh, k)
    est = estimate_memory(disc)
    asm = gk.Assembler(disc)
    held = asm.memory_bytes()
    assert est["nnz_bound"] >= asm.nnz
    assert est["pattern"] >= held["indptr"] + held["indices"]
    assert est["position_map"] >= held["position_map"]
    assert est["total"] >= sum(held.values()) + asm.stiffness().data.nbytes


def test_assembler_refuses_before_allocating_naming_estimate_and_limit(monkeypatch):
    disc = gk.Discretization(gk.structured_tetrahedra(3, 3, 3), 2)
    est = estimate_memory(disc)["total"]
    monkeypatch.setenv("GALERKIT_MEMORY_LIMIT_BYTES", str(est // 2))

    def no_allocation(self):
        raise AssertionError("the pattern was built before the memory check")

    monkeypatch.setattr(gk.Assembler, "_build_pattern", no_allocation)
    with pytest.raises(ResourceError) as info:
        gk.Assembler(disc)
    msg = str(info.value)
    assert f"estimated {est / 2**20:.1f} MiB ({est} bytes)" in msg
    limit = est // 2
    assert f"limit of {limit / 2**20:.1f} MiB ({limit} bytes, GALERKIT_MEMORY_LIMIT_BYTES=" in msg
    assert "coarser mesh or a lower degree" in msg


def test_assembler_fits_under_a_limit_just_above_its_estimate(monkeypatch):
    disc = gk.Discretization(gk.structured_tetrahedra(3, 3, 3), 2)
    monkeypatch.setenv("GALERKIT_MEMORY_LIMIT_BYTES", str(estimate_memory(disc)["total"] + 1))
    assert gk.Assembler(disc).stiffness().shape == (disc.n_dofs, disc.n_dofs)


@pytest.mark.parametrize("value", ["lots", "-5", "0", "nan"])
def test_a_bad_memory_limit_variable_is_named(monkeypatch, value):
    monkeypatch.setenv("GALERKIT_MEMORY_LIMIT_BYTES", value)
    with pytest.raises(InputError, match=r"GALERKIT_MEMORY_LIMIT_BYTES=.* not a number of bytes"):
        gk.Assembler(gk.Discretization(gk.structured_triangles(2, 2), 1))


# ----------------------------------------------------------------------------
# atomic output files
# ----------------------------------------------------------------------------
@pytest.fixture(scope="module")
def small_solution():
    return gk.PoissonProblem(gk.structured_triangles(4, 4), source=1.0,
                             dirichlet={"boundary": 0.0}).solve()


def _write_part_then_fail(error):
    from galerkit.bindings.files import readwrite

    real = readwrite.write_vtu

    def failing(path, *args, **kwargs):
        real(path, *args, **kwargs)
        data = Path(path).read_bytes()
        Path(path).write_bytes(data[: len(data) // 3])  # a third of the file, then failure
        raise error
    return failing


@pytest.mark.parametrize("error,raised", [
    (OSError(28, "No space left on device"), InputError),
    (RuntimeError("writer crashed"), RuntimeError),
])
def test_failed_write_keeps_the_old_file_and_leaves_no_temporary(tmp_path, monkeypatch,
                                                                 small_solution, error, raised):
    import meshio
    from galerkit.bindings.files import readwrite, write_solution

    target = tmp_path / "u.vtu"
    write_solution(target, small_solution)
    good = target.read_bytes()
    monkeypatch.setattr(readwrite, "write_vtu", _write_part_then_fail(error))
    with pytest.raises(raised):
        write_solution(target, small_solution, name="other")
    assert target.read_bytes() == good
    assert sorted(p.name for p in tmp_path.iterdir()) == ["u.vtu"]
    monkeypatch.undo()
    back = meshio.read(target)
    np.testing.assert_array_equal(back.point_data["u"], small_solution.u)


def test_failed_first_write_leaves_no_file_at_all(tmp_path, monkeypatch, small_solution):
    from galerkit.bindings.files import readwrite, write_solution

    monkeypatch.setattr(readwrite, "write_vtu", _write_part_then_fail(OSError(5, "I/O error")))
    with pytest.raises(InputError, match="cannot write"):
        write_solution(tmp_path / "new.vtu", small_solution)
    assert list(tmp_path.iterdir()) == []


def test_the_documented_table_lists_every_case():
    doc = (HERE.parent / "docs" / "bad-input.md").read_text(encoding="utf-8")
    missing = [c[0] for c in bad_input_cases.CASES if f"| {c[0]} | `{c[2]}` |" not in doc]
    assert missing == [], "regenerate with: python tests/bad_input_cases.py --markdown"
