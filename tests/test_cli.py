"""Specification of the command line (galerkit.bindings.command.cli).

End-to-end runs of every subcommand in a subprocess on small problems, and
the exit codes and messages of bad input (in-process through ``main``, which
is what the console script calls).  Exit codes: 0 success, 1 no convergence
or a failed check, 2 bad input.  PNG files are recognised by their signature
(PNG specification, section 5.2); VTU files are read back with meshio.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
from pathlib import Path

import meshio
import numpy as np
import pytest

from galerkit.bindings.command.cli import CAUTION, main
from galerkit.bindings.files.plots import PNG_SIGNATURE

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"
SCRIPT = Path(sys.executable).with_name("galerkit")


def run(*args, cwd=None):
    """Run the command line in a subprocess; (exit code, stdout, stderr)."""
    cmd = [str(SCRIPT)] if SCRIPT.exists() else [sys.executable, "-m", "galerkit.bindings.command.cli"]
    p = subprocess.run(cmd + [str(a) for a in args], capture_output=True, text=True, cwd=cwd,
                       timeout=600)
    return p.returncode, p.stdout, p.stderr


def is_png(path) -> bool:
    data = Path(path).read_bytes()
    return len(data) > 1000 and data[:8] == PNG_SIGNATURE


SQUARE = """
title = "manufactured solution on the unit square"
[mesh]
generator = "square"
cells = [8, 8]
[discretization]
degree = 2
[source]
value = "2*pi^2*sin(pi*x)*sin(pi*y)"
[[boundary]]
tag = "boundary"
kind = "dirichlet"
u = 0
[exact]
solution = "sin(pi*x)*sin(pi*y)"
gradient = ["pi*cos(pi*x)*sin(pi*y)", "pi*sin(pi*x)*cos(pi*y)"]
[output]
units = "K"
"""


@pytest.fixture()
def square(tmp_path):
    path = tmp_path / "square.toml"
    path.write_text(SQUARE)
    return path


# ----------------------------------------------------------------------------
# end to end, one subprocess per subcommand
# ----------------------------------------------------------------------------
def test_demo_runs_and_writes_a_vtu_and_a_png(tmp_path):
    code, out, err = run("--json", "demo", "--size", 40, "--output", tmp_path)
    assert code == 0, err
    info = json.loads(out)
    assert info["converged"] and info["caution"] == CAUTION
    vtu, png = (Path(p) for p in info["outputs"])
    assert is_png(png)
    back = meshio.read(vtu)
    t = back.point_data["temperature"]
    assert t.min() == pytest.approx(info["temperature_min"]) and t.max() > t.min() > 25.0


def test_verify_reports_the_a_priori_orders(tmp_path):
    # source: orders k+1 in L2 and k in H1 (Brenner & Scott, 2008)
    code, out, err = run("verify", "--levels", 3, "--degrees", "1,2", "--output", tmp_path,
                         "--json")
    assert code == 0, err
    info = json.loads(out)  # strict JSON: the first row's order is null, not NaN
    p1, p2 = info["degrees"]
    assert p1["rows"][0]["eoc_l2"] is None
    assert p1["eoc_l2"] == pytest.approx(2.0, abs=0.1) and p1["pass_h1"]
    assert p2["eoc_l2"] == pytest.approx(3.0, abs=0.1) and p2["eoc_h1"] == pytest.approx(
        2.0, abs=0.1)
    assert info["plot"] == str(tmp_path / "verify-triangle.png") and is_png(info["plot"])
    csv_rows = (tmp_path / "verify-triangle.csv").read_text().strip().split("\n")
    assert csv_rows[0].startswith("degree,level,h") and len(csv_rows) == 1 + 2 * 3


def test_verify_takes_a_problem_file_with_an_exact_solution(tmp_path, square):
    # the file's manufactured solution sin(pi x) sin(pi y): P2 orders 3 and 2 (Brenner &
    # Scott 2008); output into the file's [output] folder unless --output names one
    code, out, err = run("--json", "verify", square, "--levels", 3, "--output",
                         tmp_path / "v")
    assert code == 0, err
    info = json.loads(out)
    assert [d["degree"] for d in info["degrees"]] == [2]  # the file's degree
    assert info["eoc_l2"] == pytest.approx(3.0, abs=0.15)
    assert is_png(tmp_path / "v" / "square.png")
    no_exact = tmp_path / "plain.toml"
    no_exact.write_text('[mesh]\ngenerator = "square"\n[[boundary]]\ntag = "boundary"\n'
                        'kind = "dirichlet"\nu = 0\n')
    code, out, err = run("verify", no_exact)
    assert code == 2 and "needs an [exact] section" in err


def test_mesh_info_counts_the_tags_of_the_example_mesh():
    code, out, err = run("mesh-info", EXAMPLES / "pipe-wall.msh", "--json")
    assert code == 0, err
    info = json.loads(out)
    # examples/make_pipe_mesh.py: 64 segments around, 8 layers: 2 * 64 * 8 triangles
    assert info["cells"] == 1024 and info["tags"] == {"pipe": 64, "air": 64, "boundary": 128}


def test_solve_2d_example_writes_vtu_and_png_and_reports_the_error(tmp_path):
    code, out, err = run("solve", EXAMPLES / "pipe-wall.toml", "--output", tmp_path)
    assert code == 0, err
    for word in ("mesh", "unknowns", "solver", "assemble", "peak memory", "error", "L2",
                 "wrote", CAUTION):
        assert word in out
    assert is_png(tmp_path / "pipe-wall.png")
    back = meshio.read(tmp_path / "pipe-wall.vtu")
    t = back.point_data["temperature"]
    assert t.max() == pytest.approx(150.0, abs=1e-9)  # the fixed pipe temperature
    assert (back.point_data["tag_pipe"] == 1).sum() == 64 * 2  # P2: 64 edges, refined


def test_solve_3d_example_json_has_errors_and_draws_slices(tmp_path):
    code, out, err = run("--json", "solve", EXAMPLES / "block-3d.toml", "--output", tmp_path,
                         "--plot")
    assert code == 0, err
    info = json.loads(out)
    assert info["solver"]["converged"] and info["solver"]["method"] == "cg-amg"
    assert info["degree"] == 2 and info["dofs"] == 9 ** 3
    assert 0 < info["errors"]["l2"] < 0.02 and info["errors"]["energy"] > 0
    assert [Path(p).name for p in info["outputs"]] == [
        "block-3d.vtu", "block-3d-slice-x0.5.png", "block-3d-slice-y0.5.png",
        "block-3d-slice-z0.5.png"]
    assert all(is_png(p) for p in info["outputs"][1:])
    assert set(info["seconds"]) >= {"load", "assemble", "solver_setup", "solve", "write"}


def test_solve_vtu_equals_the_solution_and_the_flags_override_the_file(tmp_path, square):
    code, out, err = run("solve", square, "--degree", 1, "--method", "cg", "--rtol", 1e-12,
                         "--output", tmp_path / "res", "--plot", "--json")
    assert code == 0, err
    info = json.loads(out)
    assert info["degree"] == 1 and info["solver"]["method"] == "cg"
    back = meshio.read(tmp_path / "res" / "square.vtu")
    # P1 on 8 x 8: vertex values within the nodal error of the exact solution
    x, y = back.points[:, 0], back.points[:, 1]
    exact = np.sin(np.pi * x) * np.sin(np.pi * y)
    assert np.abs(back.point_data["u"] - exact).max() == pytest.approx(
        info["errors"]["max_at_nodes"], rel=1e-9)
    assert is_png(tmp_path / "res" / "square.png")


def test_bench_generated_runs_every_solver_and_draws_the_residuals(tmp_path):
    from galerkit.solvers import available_solvers

    code, out, err = run("bench", "--generate", "square", "--size", 8, "--output", tmp_path)
    assert code == 0, err
    for m in available_solvers():
        assert f"| {m} |" in out
    assert "VmHWM" in out and "l2_error" in out
    assert "estimating" in err and "run 1 of 1" in err  # progress lines on stderr
    assert is_png(tmp_path / "bench-square-residuals.png")
    assert (tmp_path / "bench-square-bench.csv").read_text().startswith("size,unknowns,")


def test_bench_problem_file_json_solves_one_system_with_each_method(tmp_path, square):
    code, out, err = run("--json", "bench", square, "--methods", "direct,cg-jacobi",
                         "--output", tmp_path)
    assert code == 0, err
    info = json.loads(out)
    rows = {r["method"]: r for r in info["rows"]}
    assert list(rows) == ["direct", "cg-jacobi"]
    # same system, both converged: the same discrete solution, so the same error
    assert rows["direct"]["l2_error"] == pytest.approx(rows["cg-jacobi"]["l2_error"], rel=1e-6)
    assert rows["direct"]["iterations"] == 1 and rows["cg-jacobi"]["iterations"] > 1
    assert all(r["final_residual"] <= 1e-10 for r in rows.values())
    assert all(is_png(o) for o in info["outputs"] if o.endswith(".png"))


HOG = """
import numpy as np
import galerkit as gk

class Hog:
    # prepares by touching 300 MB, then solves with the direct solver
    def __init__(self, A):
        self.keep = np.ones(300 * 2**20 // 8)
        self.inner = gk.prepare_solver(A, "direct")

    def solve(self, b, x0=None, rtol=1e-10, maxiter=None, callback=None):
        return self.inner.solve(b, rtol=rtol)

gk.register_solver("hog", Hog, overwrite=True)
"""


def test_bench_reaches_a_registered_solver_and_measures_its_own_peak(tmp_path, square):
    # each run in its own process: the 300 MB the solver's set-up holds must show in
    # that run's peak (VmHWM), beyond the process's base before the set-up
    (tmp_path / "hogsolvers.py").write_text(HOG)
    code, out, err = run("--json", "bench", square, "--methods", "hog,direct",
                         "--solvers-module", "hogsolvers", "--repeat", 2, "--output",
                         tmp_path / "b", cwd=tmp_path)
    assert code == 0, err
    rows = {r["method"]: r for r in json.loads(out)["rows"]}
    hog, direct = rows["hog"], rows["direct"]
    assert hog["runs"] == 2 and hog["setup_min"] <= hog["setup_median"]
    assert hog["peak_mb"] - hog["base_mb"] >= 300
    assert direct["peak_mb"] - direct["base_mb"] < 100
    assert hog["l2_error"] == pytest.approx(direct["l2_error"], rel=1e-9)


def test_bench_skips_methods_over_budget_with_a_reason_unless_named(tmp_path, capsys):
    # a budget of 1e-9 s: every estimate exceeds it
    assert main(["--json", "bench", "--generate", "square", "--size", "8",
                 "--budget-seconds", "1e-9", "--output", str(tmp_path)]) == 0
    info = json.loads(capsys.readouterr().out)
    assert info["rows"] == [] and info["skipped"]
    assert all("budget 1e-09 s" in s["reason"] and "--methods" in s["reason"]
               for s in info["skipped"])
    assert main(["--json", "bench", "--generate", "square", "--size", "8", "--methods",
                 "direct", "--budget-seconds", "1e-9", "--output", str(tmp_path)]) == 0
    info = json.loads(capsys.readouterr().out)
    assert [r["method"] for r in info["rows"]] == ["direct"] and not info["skipped"]


# ----------------------------------------------------------------------------
# exit codes and messages (in-process)
# ----------------------------------------------------------------------------
def fails_with_2(argv, capsys, *needles):
    code = main([str(a) for a in argv])
    err = capsys.readouterr().err
    assert code == 2, err
    assert err.startswith("galerkit: error: ")
    for n in needles:
        assert n in err, err
    return err


def problem_with_mesh(tmp_path, mesh_name):
    path = tmp_path / "p.toml"
    path.write_text(f'[mesh]\nfile = "{mesh_name}"\n')
    return path


def test_missing_mesh_file_exits_2(tmp_path, capsys):
    fails_with_2(["mesh-info", tmp_path / "none.msh"], capsys, "none.msh", "does not exist")
    fails_with_2(["solve", problem_with_mesh(tmp_path, "none.msh")], capsys, "p.toml', line 2",
                 "mesh.file", "does not exist")


def test_corrupt_mesh_file_exits_2(tmp_path, capsys):
    (tmp_path / "bad.msh").write_bytes(bytes(range(256)) * 8)
    fails_with_2(["mesh-info", tmp_path / "bad.msh"], capsys, "bad.msh", "could not be read")
    fails_with_2(["solve", problem_with_mesh(tmp_path, "bad.msh")], capsys, "could not be read")


def test_quad_mesh_exits_2(tmp_path, capsys):
    pts = np.array([[0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0.0]])
    meshio.write(str(tmp_path / "q.vtu"), meshio.Mesh(pts, [("quad", np.array([[0, 1, 2, 3]]))]))
    fails_with_2(["solve", problem_with_mesh(tmp_path, "q.vtu")], capsys, "quadrilaterals")


def test_mixed_dimension_mesh_exits_2(tmp_path, capsys):
    pts = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1], [3, 3, 3], [4, 3, 3],
                    [3, 4, 3]], dtype=float)
    meshio.write(str(tmp_path / "m.vtu"),
                 meshio.Mesh(pts, [("tetra", np.array([[0, 1, 2, 3]])),
                                   ("triangle", np.array([[4, 5, 6]]))],
                             cell_data={"gmsh:physical": [np.array([1]), np.array([2])]}))
    fails_with_2(["mesh-info", tmp_path / "m.vtu"], capsys, "mixed dimensions")


@pytest.mark.parametrize("text,needles", [
    ("[mesh\ngenerator = 'square'\n", ["line 1", "TOML syntax error"]),
    ("[mesh]\ngenerator = 'square'\nsize = 3\n", ["mesh.size: unknown key 'size'",
                                                 "valid keys here"]),
    ("[mesh]\ngenerator = 'square'\n[source]\nvalue = '1 +* x'\n", ["source.value", "^"]),
    ("[mesh]\ngenerator = 'square'\n[discretization]\ndegree = 1.5\n",
     ["discretization.degree: must be an integer"]),
    ("[mesh]\ngenerator = 'square'\n[[boundary]]\ntag = 'inlet'\nkind = 'dirichlet'\nu = 1\n",
     ["boundary[1].tag: the mesh has no facet tag 'inlet'", "its tags are"]),
    ("[mesh]\ngenerator = 'square'\n[source]\nvalue = \"__import__('os')\"\n",
     ["source.value", "^"]),
])
def test_bad_problem_files_exit_2_naming_the_problem(tmp_path, capsys, text, needles):
    path = tmp_path / "bad.toml"
    path.write_text(text)
    fails_with_2(["solve", path], capsys, "bad.toml", *needles)
    fails_with_2(["bench", path, "--methods", "cg"], capsys, "bad.toml", *needles)


def test_bad_options_exit_2(tmp_path, capsys, square):
    fails_with_2(["solve", square, "--method", "nosuch", "--output", tmp_path], capsys,
                 "unknown solver method 'nosuch'")
    fails_with_2(["solve", square, "--rtol", "2"], capsys, "--rtol must be")
    fails_with_2(["bench", square, "--methods", "direct,lu"], capsys, "'lu' is not a registered")
    fails_with_2(["bench"], capsys, "give a problem file or --generate")
    fails_with_2(["solve", tmp_path / "none.toml"], capsys, "none.toml' does not exist")


def test_argparse_mistakes_exit_2(capsys):
    assert main(["solve"]) == 2
    err = capsys.readouterr().err
    assert err.startswith("galerkit: usage error: ") and err.count("\n") == 1


def test_no_convergence_exits_1_and_writes_no_files(tmp_path, capsys, square):
    code = main(["solve", str(square), "--method", "cg", "--maxiter", "2",
                 "--output", str(tmp_path / "out")])
    out = capsys.readouterr().out
    assert code == 1
    assert "NOT CONVERGED" in out and "no files written" in out
    assert not (tmp_path / "out" / "square.vtu").exists()


def test_bench_exits_1_when_a_method_does_not_converge(tmp_path, capsys, square):
    code = main(["--json", "bench", str(square), "--methods", "cg,direct", "--maxiter", "3",
                 "--output", str(tmp_path)])
    info = json.loads(capsys.readouterr().out)
    assert code == 1 and not info["all_converged"]
    assert [r["converged"] for r in info["rows"]] == [False, True]


def test_flags_after_the_subcommand_and_quiet_output(tmp_path, capsys, square):
    assert main(["solve", str(square), "--output", str(tmp_path), "--quiet"]) == 0
    cap = capsys.readouterr()
    assert "L2" in cap.out and CAUTION not in cap.out and "galerkit solve" not in cap.out
    assert cap.err == ""  # no progress bars
    assert main(["solve", str(square), "--output", str(tmp_path), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["caution"] == CAUTION


# -- the petsc engine's flags, without MPI ----------------------------------------
def test_petsc_engine_without_petsc4py_says_how_to_install_it(tmp_path):
    code = ("import sys; sys.modules['petsc4py'] = None; sys.modules['mpi4py'] = None; "
            "from galerkit.bindings.command.cli import main; "
            f"sys.exit(main(['solve', {str(EXAMPLES / 'block-3d.toml')!r}, '--engine', "
            f"'petsc', '--output', {str(tmp_path)!r}]))")
    p = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                       timeout=600)
    assert p.returncode == 2
    assert "needs mpi4py and petsc4py" in p.stderr and "make mpi" in p.stderr
    assert list(tmp_path.iterdir()) == []


def test_petsc_options_without_the_petsc_engine_are_refused(tmp_path):
    code, out, err = run("solve", EXAMPLES / "block-3d.toml", "--petsc-options",
                         "-ksp_type cg", "--output", tmp_path)
    assert code == 2
    assert "--petsc-options applies to --engine petsc only" in err


# ----------------------------------------------------------------------------
# one line on stderr, one JSON object on stdout: never a traceback
# ----------------------------------------------------------------------------
@pytest.mark.parametrize("argv,needle", [
    (["--json", "solve"], "the following arguments are required: problem"),
    (["solve", "p.toml", "--degree", "9", "--json"], "argument --degree: invalid choice: 9"),
    (["--json", "frobnicate"], "invalid choice: 'frobnicate'"),
])
def test_usage_errors_under_json_give_one_json_object(argv, needle, capsys):
    assert main(argv) == 2
    cap = capsys.readouterr()
    obj = json.loads(cap.out)
    assert obj["error"] == "bad command line" and obj["exit_code"] == 2
    assert needle in obj["message"]
    assert cap.err.count("\n") == 1 and cap.err.startswith("galerkit: usage error: ")


def test_the_json_error_object_names_the_kind_of_error(tmp_path, capsys):
    assert main(["--json", "mesh-info", str(tmp_path / "none.msh")]) == 2
    obj = json.loads(capsys.readouterr().out)
    assert obj["error"] == "bad input" and obj["exception"] == "InputError"


def test_memory_and_recursion_errors_exit_2_with_one_line(monkeypatch, capsys, tmp_path):
    from galerkit.bindings.command import cli

    def exhausted(args):
        raise MemoryError

    monkeypatch.setattr(cli, "_verify", exhausted)
    assert main(["--json", "verify"]) == 2
    cap = capsys.readouterr()
    assert json.loads(cap.out)["error"] == "not enough memory"
    assert cap.err.startswith("galerkit: not enough memory: galerkit verify: ran out of memory")
    deep = tmp_path / "deep.toml"
    deep.write_text('[mesh]\ngenerator = "square"\n[source]\nvalue = ' + "[" * 50000
                    + "]" * 50000 + "\n")
    fails_with_2(["solve", deep], capsys, "nested too deeply")


def test_control_characters_of_the_input_are_echoed_escaped(tmp_path, capsys):
    path = tmp_path / "esc.toml"
    path.write_text('title = "\\u001b[2Jred\\u009b"\n[mesh]\ngenerator = "square"\ncells = 2\n'
                    '[output]\nvtu = false\n[[boundary]]\ntag = "xmin"\nkind = "dirichlet"\n'
                    'u = 0\n')
    assert main(["solve", str(path)]) == 0
    out = capsys.readouterr().out
    assert "\x1b" not in out and "\x9b" not in out
    assert "galerkit solve: \\x1b[2Jred\\x9b" in out
    bad = tmp_path / "bad\x1b[2J.msh"
    assert main(["mesh-info", str(bad)]) == 2
    err = capsys.readouterr().err
    assert "\x1b" not in err and "\\x1b[2J" in err


def test_overlapping_tags_are_noted_by_mesh_info_and_by_solve(tmp_path, capsys):
    # groups 11 (x = 0) and 12 (x = 0 and y = 0) share the 3 facets of x = 0
    import galerkit as gk

    mesh = gk.structured_triangles(3, 3)
    f = np.asarray(mesh.boundary_facets)
    x0 = [i for i, e in enumerate(f) if (mesh.points[e, 0] == 0).all()]
    y0 = [i for i, e in enumerate(f) if (mesh.points[e, 1] == 0).all()]
    lines = np.vstack([f[x0], f[x0], f[y0]])
    ids = np.array([11] * len(x0) + [12] * (len(x0) + len(y0)))
    pts = np.column_stack([mesh.points, np.zeros(mesh.n_vertices)])
    meshio.write(tmp_path / "m.msh", meshio.Mesh(
        pts, [("line", lines), ("triangle", np.asarray(mesh.cells))],
        cell_data={"gmsh:physical": [ids, np.ones(mesh.n_cells, dtype=int)],
                   "gmsh:geometrical": [ids, np.ones(mesh.n_cells, dtype=int)]}),
        file_format="gmsh22", binary=False)
    note = "tags '11' and '12' share 3 facet(s)"
    assert main(["mesh-info", str(tmp_path / "m.msh")]) == 0
    assert note in capsys.readouterr().out
    problem = tmp_path / "p.toml"
    problem.write_text('[mesh]\nfile = "m.msh"\n[output]\nvtu = false\n[[boundary]]\n'
                       'tag = "11"\nkind = "dirichlet"\nu = 0\n')
    assert main(["--json", "solve", str(problem)]) == 0
    assert any(note in n for n in json.loads(capsys.readouterr().out)["notes"])


def test_verify_on_tetrahedra_p1_starts_from_a_mesh_with_interior_unknowns(tmp_path, capsys):
    # a priori orders 2 (L2) and 1 (H1) for P1 (Brenner & Scott 2008)
    assert main(["--json", "verify", "--cell", "tetrahedron", "--degrees", "1", "--levels", "4",
                 "--output", str(tmp_path)]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["pass_l2"] and out["pass_h1"] and out["rows"][0]["n_dofs"] == 27  # 3^3 vertices
    fails_with_2(["verify", "--start-size", "1", "--degrees", "1"], capsys,
                 "--start-size 1 gives a first mesh without interior unknowns", "--start-size 2")
    assert main(["--json", "verify", "--start-size", "3", "--levels", "2",
                 "--output", str(tmp_path / "w")]) in (0, 1)
    assert json.loads(capsys.readouterr().out)["rows"][0]["n_dofs"] == 16  # 4 x 4 vertices


def test_stay_in_folder_refuses_outputs_and_meshes_outside_with_exit_2(tmp_path, capsys):
    job = tmp_path / "job"
    job.mkdir()
    (job / "p.toml").write_text(SQUARE.replace('units = "K"', 'folder = "../elsewhere"'))
    for command in ("solve", "bench"):
        err = fails_with_2([command, job / "p.toml", "--stay-in-folder"], capsys,
                           "p.toml', line 18: output.folder: the output folder resolves to "
                           f"'{(tmp_path / 'elsewhere').resolve()}', outside the problem "
                           f"file's folder '{job.resolve()}'", "--stay-in-folder")
        assert len(err.strip().splitlines()) == 1, err
    assert not (tmp_path / "elsewhere").exists()  # nothing was written
    code = main(["--json", "solve", str(job / "p.toml"), "--stay-in-folder"])
    out = json.loads(capsys.readouterr().out)
    assert code == 2 and out["error"] == "bad input" and "output.folder" in out["message"]
    # a mesh file outside (through a link that looks local) is refused before it is read
    (job / "m.toml").write_text('[mesh]\nfile = "link.msh"\n')
    (job / "link.msh").symlink_to(EXAMPLES / "pipe-wall.msh")
    fails_with_2(["solve", job / "m.toml", "--stay-in-folder"], capsys,
                 "line 2: mesh.file: the mesh file resolves to "
                 f"'{(EXAMPLES / 'pipe-wall.msh').resolve()}'")


def test_stay_in_folder_lets_a_problem_inside_its_folder_run(tmp_path, capsys):
    (tmp_path / "p.toml").write_text(SQUARE.replace('units = "K"', 'folder = "results"'))
    assert main(["--quiet", "solve", str(tmp_path / "p.toml"), "--stay-in-folder"]) == 0
    assert (tmp_path / "results" / "p.vtu").exists()


def _mean_ratio_triangle(p):
    """Mean-ratio quality of a triangle, 4 sqrt(3) area / (sum of squared edges):
    1 for the equilateral triangle (Bank & Smith, "Mesh smoothing using a posteriori
    error estimates", SIAM J. Numer. Anal. 34, 1997; computed here independently)."""
    a, b, c = p
    area = 0.5 * abs((b[0] - a[0]) * (c[1] - a[1]) - (b[1] - a[1]) * (c[0] - a[0]))
    edges = sum(float(np.sum((u - v) ** 2)) for u, v in ((a, b), (b, c), (c, a)))
    return 4.0 * np.sqrt(3.0) * area / edges


def test_mesh_info_gives_quality_quantiles_and_the_worst_cells_with_ids_and_places(tmp_path,
                                                                                    capsys):
    import galerkit as gk

    mesh = gk.structured_triangles(4, 4)
    pts = np.array(mesh.points)
    centre = int(np.flatnonzero((np.abs(pts - 0.5) < 1e-12).all(axis=1))[0])
    pts[centre] = (0.68, 0.61)  # squeezes the cells around the centre vertex
    cells = np.asarray(mesh.cells)
    meshio.write(tmp_path / "m.vtu", meshio.Mesh(np.column_stack([pts, np.zeros(len(pts))]),
                                                 [("triangle", cells)]))
    expected = np.array([_mean_ratio_triangle(pts[c]) for c in cells])
    assert main(["--json", "mesh-info", str(tmp_path / "m.vtu"), "--worst", "3"]) == 0
    info = json.loads(capsys.readouterr().out)
    # quantiles by rank (the 'lower' rule): the value of the cell at floor(p (n - 1))
    ranked = np.sort(expected)
    for name, p in (("min", 0.0), ("1%", 0.01), ("5%", 0.05), ("50%", 0.5)):
        assert info["quality_quantiles"][name] == pytest.approx(
            ranked[int(np.floor(p * (len(ranked) - 1)))], rel=1e-12)
    worst = info["worst_cells"]
    assert [w["cell"] for w in worst] == np.argsort(expected, kind="stable")[:3].tolist()
    assert all(centre in cells[w["cell"]] for w in worst)
    for w in worst:
        assert w["quality"] == pytest.approx(expected[w["cell"]], rel=1e-12)
        assert w["centroid"] == pytest.approx(pts[cells[w["cell"]]].mean(axis=0).tolist())
    assert "quality_histogram" not in info
    assert main(["mesh-info", str(tmp_path / "m.vtu"), "--worst", "2"]) == 0
    out = capsys.readouterr().out
    assert "quality quantiles: min" in out and "the 2 worst cells" in out
    assert f"cell {worst[0]['cell']:>9d}" in out


def _actions(parser, path=()):
    import argparse

    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            for name, sub in action.choices.items():
                yield from _actions(sub, path + (name,))
        elif not isinstance(action, argparse._HelpAction):
            yield path, action


def test_every_flag_of_every_command_has_help_text():
    from galerkit.bindings.command.cli import build_parser

    found = list(_actions(build_parser()))
    assert {p[0] for p, _ in found if p} >= {"demo", "verify", "mesh-info", "solve", "bench",
                                              "warm-up"}
    empty = [(" ".join(p), a.option_strings or a.dest) for p, a in found
             if not (a.help and a.help.strip()) and a.help is not argparse.SUPPRESS]
    assert empty == []


# ----------------------------------------------------------------------------
# error bound and [adapt]
# ----------------------------------------------------------------------------
LSHAPE_ADAPT = """
title = "L-shape, adaptive"
[mesh]
generator = "l-shape"
cells = 2
[source]
value = 1
[[boundary]]
tag = "boundary"
kind = "dirichlet"
u = 0
[adapt]
relative_tol = 0.08
max_dofs = 20000
"""


def test_adaptive_solve_writes_levels_indicators_and_a_mesh_picture(tmp_path):
    path = tmp_path / "ell.toml"
    path.write_text(LSHAPE_ADAPT)
    code, out, err = run("--json", "solve", path, "--output", tmp_path / "res")
    assert code == 0, err
    info = json.loads(out)
    levels, bound = info["adapt"]["levels"], info["error_bound"]
    assert info["adapt"]["stopped"] == "relative_tol" and len(levels) > 3
    assert bound["available"] and bound["guaranteed"]
    assert bound["bound"] <= 0.08 * bound["energy_norm"] == pytest.approx(
        0.08 * bound["bound"] / bound["relative"])
    assert levels[-1]["n_dofs"] == info["dofs"] and levels[-1]["bound"] == bound["bound"]
    back = meshio.read(tmp_path / "res" / "ell.vtu")
    eta = back.cell_data["error_indicator"][0]
    level = back.cell_data["refinement_level"][0]
    assert eta.shape == level.shape == (info["mesh"]["cells"],)
    assert np.sqrt((eta ** 2).sum()) == pytest.approx(bound["bound"], rel=1e-12)
    # independent of our refinement code: every bisection halves a cell exactly, and the
    # initial L-shape mesh of 2 cells per unit length has cells of area 1/8 (3 / 24 cells)
    p = back.points[:, :2][back.cells_dict["triangle"]]
    e1, e2 = p[:, 1] - p[:, 0], p[:, 2] - p[:, 0]
    area = 0.5 * np.abs(e1[:, 0] * e2[:, 1] - e1[:, 1] * e2[:, 0])
    assert np.allclose(area * 2.0 ** level, 1 / 8, rtol=1e-9)
    assert level.min() >= 0 and level.max() > level.min()
    assert is_png(tmp_path / "res" / "ell-mesh.png")
    assert [Path(p).name for p in info["outputs"]] == ["ell.vtu", "ell-mesh.png"]
    code, text, err = run("solve", path, "--output", tmp_path / "res")
    assert code == 0, err
    assert "| level | n_cells | n_dofs | bound |" in text and "stopped: the bound reached" in text
    assert "error bound " in text and "(guaranteed" in text


def test_solve_prints_the_bound_above_the_exact_error_for_p1_and_p2(tmp_path, square):
    code, out, err = run("--json", "solve", square, "--degree", 1, "--output", tmp_path)
    assert code == 0, err
    info = json.loads(out)
    b = info["error_bound"]
    # Prager & Synge (1947): an equilibrated flux bounds the energy error from above
    assert b["available"] and b["bound"] >= info["errors"]["energy"]
    assert 1.0 <= b["effectivity"] < 1.5
    assert "error_indicator" in meshio.read(tmp_path / "square.vtu").cell_data
    code, out, err = run("--json", "solve", square, "--output", tmp_path)  # the file's P2
    assert code == 0, err
    info = json.loads(out)
    b = info["error_bound"]
    # the RT_2 patch flux (Ern & Vohralik 2015): above the error, effectivity near 1
    assert b["available"] and b["bound"] >= info["errors"]["energy"]
    assert 1.0 <= b["effectivity"] < 1.5
    assert "error_indicator" in meshio.read(tmp_path / "square.vtu").cell_data


def test_adapt_with_a_higher_degree_flag_or_data_the_bound_cannot_take_exits_2(tmp_path, capsys):
    path = tmp_path / "box.toml"
    path.write_text(BOX_ADAPT)
    assert main(["solve", str(path), "--degree", "2", "--output", str(tmp_path)]) == 2
    assert "has an [adapt] section on tetrahedra, and adaptive refinement" in \
        capsys.readouterr().err
    path = tmp_path / "ell.toml"
    path.write_text(LSHAPE_ADAPT.replace("u = 0", "u = \"x*x\""))
    assert main(["solve", str(path), "--output", str(tmp_path)]) == 2
    err = capsys.readouterr().err
    assert "[adapt]: estimate_error: dirichlet['boundary'] is not affine" in err
    assert "or remove the [adapt] section" in err


BOX_ADAPT = """
title = "box, adaptive"
[mesh]
generator = "box"
cells = 2
[source]
value = 1
[[boundary]]
tag = "boundary"
kind = "dirichlet"
u = 0
[adapt]
max_levels = 3
"""


def test_adaptive_solve_on_tetrahedra_halves_cells_and_writes_no_picture(tmp_path):
    path = tmp_path / "box.toml"
    path.write_text(BOX_ADAPT)
    code, out, err = run("--json", "solve", path, "--output", tmp_path / "res")
    assert code == 0, err
    info = json.loads(out)
    assert len(info["adapt"]["levels"]) == 3 and info["error_bound"]["guaranteed"]
    back = meshio.read(tmp_path / "res" / "box.vtu")
    level = back.cell_data["refinement_level"][0]
    # independent of our bisection: each bisection halves a tetrahedron exactly, and the
    # initial box of 2 x 2 x 2 cubes of 6 tetrahedra has cells of volume 1/48
    p = back.points[back.cells_dict["tetra"]]
    vol = np.abs(np.linalg.det(p[:, 1:] - p[:, :1])) / 6.0
    assert np.allclose(vol * 2.0 ** level, 1 / 48, rtol=1e-9) and level.max() > 0
    assert [Path(p).name for p in info["outputs"]] == ["box.vtu"]


def test_the_error_bound_switch_leaves_the_bound_out(tmp_path):
    path = tmp_path / "off.toml"
    path.write_text(BOX_ADAPT.split("[adapt]")[0] + "[output]\nerror_bound = false\n")
    code, out, err = run("--json", "solve", path, "--output", tmp_path / "res")
    assert code == 0, err
    info = json.loads(out)
    assert info["error_bound"] == {"available": False,
                                   "reason": "not computed ([output] error_bound = false)"}
    assert "error_indicator" not in meshio.read(tmp_path / "res" / "off.vtu").cell_data
    code, text, err = run("solve", path.with_name("off.toml"), "--output", tmp_path / "res")
    assert "  error bound not computed ([output] error_bound = false)" in text.splitlines()


def test_the_bound_is_left_out_by_default_on_large_tetrahedral_meshes(tmp_path, monkeypatch,
                                                                      capsys):
    from galerkit.bindings.command import problemfile

    monkeypatch.setattr(problemfile, "BOUND_AUTO_TETRAHEDRA", 40)   # in this process
    path = tmp_path / "big.toml"
    path.write_text(BOX_ADAPT.split("[adapt]")[0])   # 48 tetrahedra
    assert main(["--json", "solve", str(path), "--output", str(tmp_path / "res")]) == 0
    reason = json.loads(capsys.readouterr().out)["error_bound"]["reason"]
    assert reason.startswith("not computed for 48 tetrahedra by default (above 40")
    path.write_text(BOX_ADAPT.split("[adapt]")[0] + "[output]\nerror_bound = true\n")
    assert main(["--json", "solve", str(path), "--output", str(tmp_path / "res")]) == 0
    assert json.loads(capsys.readouterr().out)["error_bound"]["available"]
