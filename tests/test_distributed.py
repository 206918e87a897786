"""Specification of the distributed engine: mpiexec with 1, 2 and 3 ranks.

The reference is galerkit's own serial engine (verified against outside
sources in test_problem.py): the distributed solution must equal the serial
one to 1e-8 relative and give the same L2, H1 and energy errors.  The
manufactured solutions of ``mpi_cases.py`` are checked here with SymPy
(the reference library for symbolic derivatives).

These tests need mpi4py, petsc4py and an ``mpiexec`` (``make mpi``).  Without
them they are skipped -- unless ``GALERKIT_REQUIRE_MPI=1`` is set, as
``.ci/run`` does, and then a missing piece fails the suite.  Three ranks on
this 2-core machine are oversubscribed on purpose.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pytest

import galerkit as gk
from galerkit.bindings.distributed.petsc_engine import petsc_available

import mpi_cases

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
MPIEXEC = shutil.which("mpiexec")
REQUIRED = os.environ.get("GALERKIT_REQUIRE_MPI") == "1"
RANKS = (1, 2, 3)


def _require():
    missing = [what for what, ok in (("mpi4py and petsc4py", petsc_available()),
                                     ("mpiexec", MPIEXEC is not None)) if not ok]
    if missing:
        msg = f"the distributed engine needs {' and '.join(missing)}: run `make mpi`"
        if REQUIRED:
            pytest.fail(msg + " (GALERKIT_REQUIRE_MPI=1 is set)")
        pytest.skip(msg)


def _mpiexec(n, args, cwd=ROOT, timeout=900):
    _require()
    env = {**os.environ, "PYTHONUNBUFFERED": "1"}
    env.pop("NUMBA_NUM_THREADS", None)
    cmd = [MPIEXEC, "-n", str(n)] + [str(a) for a in args]
    p = subprocess.run(cmd, capture_output=True, text=True, cwd=cwd, env=env, timeout=timeout)
    return p.returncode, p.stdout, p.stderr


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """Every case of mpi_cases.py solved on 1, 2 and 3 ranks (one mpiexec each)."""
    _require()
    out = {}
    for n in RANKS:
        folder = tmp_path_factory.mktemp(f"ranks{n}")
        code, stdout, stderr = _mpiexec(n, [sys.executable, HERE / "mpi_cases.py", folder])
        assert code == 0, f"mpiexec -n {n} failed:\n{stdout}\n{stderr}"
        out[n] = folder
    return out


@pytest.fixture(scope="module")
def serial():
    """Serial solutions (direct solver) and errors of every case."""
    from galerkit.functionals import energy_error, h1_seminorm_error, l2_error

    ref = {}
    for name in mpi_cases.CASES:
        problem, degree, exact, grad = mpi_cases.case(name)
        sol = problem.solve(degree=degree, method="direct")
        errors = None
        if exact is not None:
            errors = {"l2": l2_error(sol.disc, sol.u, exact),
                      "h1_seminorm": h1_seminorm_error(sol.disc, sol.u, grad),
                      "energy": energy_error(sol.disc, sol.u, grad, problem.conductivity)}
        ref[name] = (sol, errors)
    return ref


def _load(runs, n, name):
    z = np.load(runs[n] / f"{name}.npz")
    return {k: z[k] for k in z.files}


def test_manufactured_solutions_satisfy_their_equations():
    sympy = pytest.importorskip("sympy")
    x, y, z = sympy.symbols("x y z")
    u2 = sympy.sin(sympy.pi * x) * sympy.exp(y)
    u3 = sympy.sin(sympy.pi * x) * sympy.sin(sympy.pi * y) * sympy.exp(z)
    pts = np.array([[0.3, 0.7, 0.2], [0.9, 0.1, 0.6]]).T
    for u, syms, f, g, dim in ((u2, (x, y), mpi_cases.source_2d, mpi_cases.grad_2d, 2),
                               (u3, (x, y, z), mpi_cases.source_3d, mpi_cases.grad_3d, 3)):
        lap = -sum(sympy.diff(u, s, 2) for s in syms)
        fl = sympy.lambdify(syms, lap, "numpy")
        gl = [sympy.lambdify(syms, sympy.diff(u, s), "numpy") for s in syms]
        p = pts[:dim]
        np.testing.assert_allclose(f(p), fl(*p), rtol=1e-13)
        np.testing.assert_allclose(g(p), np.array([gi(*p) for gi in gl]), rtol=1e-13)


@pytest.mark.parametrize("n", RANKS)
@pytest.mark.parametrize("name", mpi_cases.CASES)
def test_distributed_solution_equals_the_serial_one(runs, serial, n, name):
    r = _load(runs, n, name)
    sol, errors = serial[name]
    u = r["u"]
    assert u.shape == sol.u.shape
    assert np.linalg.norm(u - sol.u) <= 1e-8 * np.linalg.norm(sol.u)
    report = json.loads(str(r["report"]))
    assert report["converged"] and report["true_residual"] <= 1e-11
    assert report["ksp"] == "cg" and report["pc"] == "gamg"
    if errors is not None:
        dist = json.loads(str(r["errors"]))
        for key in ("l2", "h1_seminorm", "energy"):
            assert dist[key] == pytest.approx(errors[key], rel=1e-7), key


@pytest.mark.parametrize("n", RANKS)
@pytest.mark.parametrize("name", mpi_cases.CASES)
def test_every_dof_has_one_owner_and_ghosts_carry_the_owners_value(runs, n, name):
    r = _load(runs, n, name)
    assert int(r["owned_total"]) == int(r["n_dofs"])
    assert float(r["ghost_gap"]) == 0.0
    ghosts = r["ghosts"]
    assert ghosts.size == n
    assert (ghosts > 0).all() if n > 1 else ghosts.tolist() == [0]


@pytest.mark.parametrize("n", (2, 3))
@pytest.mark.parametrize("name", ["square-p1", "cube-p1"])
def test_pieces_and_parallel_index_hold_the_solution(runs, n, name):
    from scipy.spatial import cKDTree
    import meshio

    r = _load(runs, n, name)
    index = Path(str(r["index"]))
    root = ET.parse(index).getroot()
    assert root.get("type") == "PUnstructuredGrid"
    sources = [p.get("Source") for p in root.iter("Piece")]
    assert len(sources) == n
    names = {a.get("Name") for a in root.find("PUnstructuredGrid/PPointData")}
    assert {"u", "tag_boundary"} <= names
    problem, _, _, _ = mpi_cases.case(name)
    mesh = problem.mesh
    tree = cKDTree(np.column_stack([mesh.points, np.zeros((mesh.n_vertices, 3 - mesh.dim))]))
    total_cells, ranks_seen = 0, set()
    for src in sources:
        piece = meshio.read(index.parent / src)
        total_cells += sum(len(b.data) for b in piece.cells)
        ranks_seen |= set(np.unique(piece.cell_data["rank"][0]).tolist())
        dist, nearest = tree.query(piece.points)
        assert dist.max() < 1e-12
        np.testing.assert_allclose(piece.point_data["u"], r["u"][nearest], rtol=0, atol=1e-14)
    assert total_cells == mesh.n_cells
    assert ranks_seen == set(range(n))


def _cli(n, *args, cwd=ROOT):
    return _mpiexec(n, [sys.executable, "-m", "galerkit.bindings.command.cli", *args], cwd=cwd)


def test_command_line_runs_a_problem_file_on_two_ranks(tmp_path):
    serial = subprocess.run([sys.executable, "-m", "galerkit.bindings.command.cli", "solve",
                             ROOT / "examples" / "block-3d.toml", "--json", "--output",
                             tmp_path / "serial"], capture_output=True, text=True, cwd=ROOT)
    assert serial.returncode == 0, serial.stderr
    s = json.loads(serial.stdout)
    code, out, err = _cli(2, "solve", ROOT / "examples" / "block-3d.toml", "--engine", "petsc",
                          "--json", "--output", tmp_path / "petsc")
    assert code == 0, err
    d = json.loads(out)  # one JSON object: rank 1 prints nothing
    assert d["ranks"] == 2 and d["dofs"] == s["dofs"]
    assert d["solver"]["converged"]
    for key in ("min", "max"):
        assert d["field"][key] == pytest.approx(s["field"][key], rel=1e-8, abs=1e-12)
    for key in ("l2", "h1_seminorm", "energy"):
        assert d["errors"][key] == pytest.approx(s["errors"][key], rel=1e-6)
    assert set(d["seconds"]) >= {"partition", "assemble", "solver_setup", "solve"}
    assert len(d["peak_rss_mb_per_rank"]) == 2
    assert Path(d["outputs"][0]).suffix == ".pvtu" and Path(d["outputs"][0]).exists()
    assert "engineering decisions rest with qualified engineers" in d["caution"]


def test_command_line_text_report_and_petsc_options(tmp_path):
    code, out, err = _cli(2, "solve", ROOT / "examples" / "block-3d.toml", "--engine", "petsc",
                          "--petsc-options", "-ksp_type gmres -pc_type jacobi",
                          "--output", tmp_path)
    assert code == 0, err
    assert "PETSc gmres + jacobi" in out and "converged" in out
    assert out.count("galerkit solve (petsc engine, 2 ranks)") == 1
    assert "numerical approximations" in out


def test_command_line_bad_problem_is_reported_once_and_exits_2(tmp_path):
    # pure Neumann with a source and no flux: the data do not balance
    f = tmp_path / "floating.toml"
    f.write_text('[mesh]\ngenerator = "square"\ncells = 4\n[source]\nvalue = 1\n')
    code, out, err = _cli(2, "solve", f, "--engine", "petsc")
    assert code == 2
    assert err.count("pure Neumann problem with incompatible data") == 1, err


def test_command_line_pure_neumann_file_matches_the_serial_engine(tmp_path):
    f = tmp_path / "balanced.toml"
    f.write_text('[mesh]\ngenerator = "square"\ncells = 6\n[[boundary]]\ntag = "xmin"\n'
                 'kind = "neumann"\ninflow = 1\n[[boundary]]\ntag = "xmax"\nkind = "neumann"\n'
                 'inflow = -1\n')
    serial = subprocess.run([sys.executable, "-m", "galerkit.bindings.command.cli", "solve", f,
                             "--json", "--output", tmp_path / "s"], capture_output=True,
                            text=True, cwd=ROOT)
    assert serial.returncode == 0, serial.stderr
    s = json.loads(serial.stdout)
    code, out, err = _cli(3, "solve", f, "--engine", "petsc", "--json", "--output",
                          tmp_path / "p")
    assert code == 0, err
    d = json.loads(out)
    for key in ("min", "max"):
        assert d["field"][key] == pytest.approx(s["field"][key], rel=1e-8)
    assert any("fixed by zero mean" in n for n in d["notes"])


def test_an_error_on_one_rank_only_stops_every_rank(tmp_path):
    # sqrt(x - 0.5) is not finite on the cells with x < 0.5 only: the rank
    # holding them fails in its assembly, the other would not; both must stop
    f = tmp_path / "half.toml"
    f.write_text('[mesh]\ngenerator = "square"\ncells = 8\n[source]\nvalue = "sqrt(x - 0.5)"\n'
                 '[[boundary]]\ntag = "boundary"\nkind = "dirichlet"\nu = 0\n')
    code, out, err = _cli(2, "solve", f, "--engine", "petsc", "--output", tmp_path / "out")
    assert code == 2
    assert err.count("the value is not finite") == 1, err
    assert not (tmp_path / "out").exists() or list((tmp_path / "out").iterdir()) == []


@pytest.mark.parametrize("name", ["square-p2", "cube-p1"])
def test_vtk_reads_the_parallel_index_as_one_data_set(runs, name):
    # VTK's own reader of the parallel format (vtkXMLPUnstructuredGridReader,
    # the reader ParaView uses for .pvtu) is the reference for the file format
    try:
        from vtkmodules.util.numpy_support import vtk_to_numpy
        from vtkmodules.vtkIOXML import vtkXMLPUnstructuredGridReader
    except ImportError:
        if REQUIRED:
            pytest.fail("vtk is missing: `make mpi` installs it (extra mpi-test)")
        pytest.skip("vtk is not installed (`make mpi` installs it)")
    from scipy.spatial import cKDTree

    r = _load(runs, 2, name)
    reader = vtkXMLPUnstructuredGridReader()
    reader.SetFileName(str(r["index"]))
    reader.Update()
    grid = reader.GetOutput()
    problem, degree, _, _ = mpi_cases.case(name)
    mesh = problem.mesh
    # P1: the computational cells; P2: each refined once (4 or 8 children)
    children = 1 if degree == 1 else 2 ** mesh.dim
    assert grid.GetNumberOfCells() == mesh.n_cells * children
    ranks = vtk_to_numpy(grid.GetCellData().GetArray("rank"))
    assert sorted(set(ranks.tolist())) == [0, 1]
    pts = vtk_to_numpy(grid.GetPoints().GetData())
    u = vtk_to_numpy(grid.GetPointData().GetArray("u"))
    disc = gk.Discretization(mesh, degree)
    nodes = np.column_stack([disc.dof_points, np.zeros((disc.n_dofs, 3 - mesh.dim))])
    dist, nearest = cKDTree(nodes).query(pts)
    # P1 and P2 output points are dof nodes (P2 refined once: its nodes exactly)
    assert dist.max() < 1e-12
    np.testing.assert_allclose(u, r["u"][nearest], rtol=0, atol=1e-13)


def test_bad_arguments_are_refused_on_every_rank(tmp_path):
    script = tmp_path / "bad_rtol.py"
    script.write_text(
        "from mpi4py import MPI\n"
        "import galerkit as gk\n"
        "from galerkit.bindings.distributed.petsc_engine import solve_distributed\n"
        "rank = MPI.COMM_WORLD.rank\n"
        "p = gk.PoissonProblem(gk.structured_triangles(4, 4), dirichlet={'boundary': 0.0}) "
        "if rank == 0 else None\n"
        "import sys\n"
        "with open(sys.argv[1] + f'/rank{rank}.txt', 'w') as out:\n"
        "    for kw in ({'rtol': 2.0}, {'maxiter': 0}):\n"
        "        try:\n"
        "            solve_distributed(p, **kw)\n"
        "        except gk.InputError as exc:\n"
        "            print(list(kw)[0], str(exc), file=out)\n")
    code, out, err = _mpiexec(2, [sys.executable, script, tmp_path])
    assert code == 0, err
    for rank in (0, 1):
        lines = (tmp_path / f"rank{rank}.txt").read_text().splitlines()
        assert [line.split()[0] for line in lines] == ["rtol", "maxiter"]
        assert "rtol must be a number in (0, 1)" in lines[0]
        assert "maxiter must be an integer >= 1" in lines[1]
