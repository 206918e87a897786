"""Specification of problem files (galerkit.bindings.command.problemfile).

A problem file in our own TOML schema becomes a PoissonProblem and run
options; every mistake is an InputError naming the file, the line, the key
path and what to write.  The example files in examples/ are checked against
sources outside the project: SymPy (that each manufactured source is
-div(kappa grad u) of its exact solution, and that the closed-form pipe-wall
temperature satisfies its boundary conditions), the a priori L2 rate k+1
(Brenner & Scott, 2008) and the closed-form radial conduction solution
(Incropera & DeWitt, Fundamentals of Heat and Mass Transfer, ch. 3).
"""

from __future__ import annotations

import os
import re
from pathlib import Path

import numpy as np
import pytest

import galerkit as gk
from galerkit.bindings.command.expressions import Expression
from galerkit.bindings.command.problemfile import (BOUNDARY_KINDS, SECTIONS, load_problem,
                                           parse_problem)
from galerkit.errors import InputError

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"

BASE = """
[mesh]
generator = "square"
cells = [4, 4]
"""


def write(tmp_path, text, name="p.toml"):
    path = tmp_path / name
    path.write_text(text)
    return path


def error_of(tmp_path, text) -> str:
    with pytest.raises(InputError) as info:
        load_problem(write(tmp_path, text))
    return str(info.value)


# ----------------------------------------------------------------------------
# what a file becomes
# ----------------------------------------------------------------------------
def test_each_boundary_kind_maps_to_its_condition(tmp_path):
    spec = load_problem(write(tmp_path, BASE + """
[[boundary]]
tag = "xmin"
kind = "dirichlet"
u = "1 + y"
[[boundary]]
tag = "xmax"
kind = "neumann"
inflow = 2.5
[[boundary]]
tag = "ymax"
kind = "robin"
exchange = 10
u_outside = "20 + x"
"""))
    problem, opts = spec.build()
    assert isinstance(problem, gk.PoissonProblem)
    assert set(problem.dirichlet) == {"xmin"} and callable(problem.dirichlet["xmin"])
    assert problem.neumann == {"xmax": 2.5}  # constants reach the kernel as floats
    exchange, u_outside = problem.robin["ymax"]
    assert exchange == 10.0 and isinstance(u_outside, Expression)
    assert opts.degree == 1 and opts.method == "auto" and opts.rtol == 1e-10
    assert [e.kind for e in spec.boundary] == ["dirichlet", "neumann", "robin"]


def test_defaults_and_every_option(tmp_path):
    spec = load_problem(write(tmp_path, """
title = "all options"
[constants]
k0 = 3.0
[mesh]
generator = "box"
cells = 2
lower = [0, 0, 0]
upper = [2, 1, 1]
refine = 1
[discretization]
degree = 3
[material]
conductivity = "k0 * (1 + z)"
[source]
value = "k0"
[solver]
method = "cg-amg"
rtol = 1e-8
maxiter = 50
[output]
folder = "results"
name = "potential"
vtu = false
plot = true
mesh_overlay = true
units = "V"
length_unit = "mm"
""", name="all.toml"))
    opts = spec.options
    assert spec.mesh.dim == 3 and spec.mesh.n_cells == 6 * 8 * 8  # 2^3 boxes, refined once
    assert float(spec.mesh.cell_volumes.sum()) == pytest.approx(2.0, rel=1e-13)
    assert (opts.degree, opts.method, opts.rtol, opts.maxiter) == (3, "cg-amg", 1e-8, 50)
    assert opts.folder == tmp_path / "results"  # relative to the problem file
    assert (opts.name, opts.vtu, opts.plot, opts.mesh_overlay) == ("potential", False, True, True)
    assert (opts.units, opts.length_unit, opts.title, opts.stem) == ("V", "mm", "all options",
                                                                     "all")
    assert spec.source_term.value == 3.0
    x = np.array([[0.0], [0.0], [1.0]])
    assert spec.conductivity(x).tolist() == [6.0]


def test_mesh_file_path_starts_at_the_problem_file_folder(tmp_path):
    import meshio

    m = gk.structured_triangles(2, 2)
    (tmp_path / "meshes").mkdir()
    meshio.write(str(tmp_path / "meshes" / "sq.vtu"),
                 meshio.Mesh(m.points, [("triangle", np.asarray(m.cells))]))
    spec = load_problem(write(tmp_path, '[mesh]\nfile = "meshes/sq.vtu"\n'))
    assert spec.mesh.n_cells == 8 and sorted(spec.mesh.facet_groups) == ["boundary"]


def test_integer_tags_name_unnamed_gmsh_groups(tmp_path):
    import meshio

    m = gk.structured_triangles(2, 2)
    f = m.boundary_facets[m.facet_groups["xmin"]]
    meshio.write(str(tmp_path / "g.msh"),
                 meshio.Mesh(m.points, [("line", f), ("triangle", np.asarray(m.cells))],
                             cell_data={"gmsh:physical": [np.full(2, 7), np.ones(8, int)],
                                        "gmsh:geometrical": [np.full(2, 1), np.ones(8, int)]}),
                 file_format="gmsh22")
    spec = load_problem(write(tmp_path, '[mesh]\nfile = "g.msh"\n[[boundary]]\ntag = 7\n'
                              'kind = "dirichlet"\nu = 0\n'))
    assert spec.boundary[0].tag == "7"


def test_tensor_conductivity_is_accepted(tmp_path):
    spec = load_problem(write(tmp_path, BASE + "[material]\nconductivity = [[2, 0.5], [0.5, 1]]\n"))
    assert np.array_equal(spec.conductivity, [[2, 0.5], [0.5, 1]])


def test_parse_problem_takes_a_dict_without_a_file():
    spec = parse_problem({"mesh": {"generator": "l-shape", "cells": 2},
                          "source": {"value": 1}}, source="<test>")
    assert spec.mesh.n_cells == 3 * 2 * 2 * 2
    problem, _ = spec.build()
    assert problem.source == 1.0


# ----------------------------------------------------------------------------
# mistakes: each named with file, line, key path and what to do
# ----------------------------------------------------------------------------
def test_toml_syntax_error_gives_line_column_and_a_caret(tmp_path):
    msg = error_of(tmp_path, BASE + "[source]\nvalue = sin(pi*x)\n")
    assert "p.toml', line 6, column 9: TOML syntax error" in msg
    shown, caret = msg.splitlines()[1:3]
    assert shown.strip() == "value = sin(pi*x)"
    assert caret.index("^") == shown.index("sin")
    assert "double quotes" in msg


def test_unknown_section_is_named_with_the_valid_ones(tmp_path):
    msg = error_of(tmp_path, BASE + "[solvers]\nmethod = 'cg'\n")
    assert "line 5: solvers: unknown section 'solvers'" in msg
    assert "did you mean 'solver'?" in msg
    assert ", ".join(SECTIONS) in msg


def test_unknown_key_is_named_with_the_valid_keys_and_its_line(tmp_path):
    msg = error_of(tmp_path, BASE + "[solver]\nmethod = 'cg'\ntolerance = 1e-8\n")
    assert "line 7: solver.tolerance: unknown key 'tolerance'" in msg
    assert "valid keys here: method, rtol, maxiter" in msg


def test_unknown_key_in_the_second_boundary_entry_points_at_its_line(tmp_path):
    msg = error_of(tmp_path, BASE + """
[[boundary]]
tag = "xmin"
kind = "dirichlet"
u = 0

[[boundary]]
tag = "xmax"
kind = "neumann"
inflw = 1
""")
    assert "line 14: boundary[2].inflw: unknown key 'inflw'" in msg
    assert "did you mean 'inflow'?" in msg


def test_bad_expression_keeps_the_caret_of_the_expression_reader(tmp_path):
    msg = error_of(tmp_path, BASE + '[source]\nvalue = "2*x + sin(y"\n')
    lines = msg.splitlines()
    assert lines[0].startswith(f"problem file '{tmp_path / 'p.toml'}', line 6: source.value: ")
    assert lines[1].strip() == "2*x + sin(y" and lines[2].strip() == "^"


def test_expression_using_z_in_2d_is_refused_with_a_caret(tmp_path):
    msg = error_of(tmp_path, BASE + '[material]\nconductivity = "1 + z"\n')
    assert "material.conductivity: coordinate 'z' is not available in dimension 2" in msg
    assert msg.splitlines()[2].index("^") == msg.splitlines()[1].index("z")


def test_python_code_in_a_formula_is_refused_and_never_run(tmp_path, monkeypatch):
    ran = []
    monkeypatch.setattr(os, "system", lambda *a: ran.append(a))
    msg = error_of(tmp_path, BASE + """[source]\nvalue = "__import__('os').system('echo hi')"\n""")
    assert "source.value" in msg and "^" in msg
    assert ran == []


@pytest.mark.parametrize("text,expected", [
    ("[discretization]\ndegree = \"2\"\n",
     "discretization.degree: must be an integer, got a string ('2')"),
    ("[discretization]\ndegree = 5\n", "discretization.degree: must be 1 to 4, got 5"),
    ("[solver]\nrtol = \"small\"\n", "solver.rtol: must be a number, got a string"),
    ("[solver]\nrtol = 2.0\n", "solver.rtol: must be below 1"),
    ("[solver]\nmaxiter = true\n", "solver.maxiter: must be an integer, got true/false"),
    ("[output]\nplot = \"yes\"\n", "output.plot: must be true or false, got a string ('yes')"),
    ("[output]\nname = \"my field\"\n", "output.name: 'my field' is not a plain name"),
    ("[source]\nvalue = [1, 2]\n", "source.value: must be a number or a formula"),
    ("[material]\nconductivity = -1\n", "material.conductivity: must be positive"),
    ("[material]\nconductivity = [[1, 2], [0, 1]]\n", "the tensor is not symmetric"),
    ("[material]\nconductivity = [[1, 2], [2, 1]]\n", "not positive definite"),
    ("[solver]\nmethod = \"cgg\"\n", "'cgg' is not one of the accepted values; did you mean 'cg'?"),
    ("[exact]\nsolution = \"x\"\ngradient = [\"1\"]\n", "exact.gradient: needs a list of 2 formulas"),
    ("[exact]\ngradient = [\"1\", \"0\"]\n", "exact: has no 'solution'"),
    ("[constants]\nx = 1\n", "constant name 'x' would hide the coordinate x"),
    ("[constants]\nk = \"one\"\n", "constants.k: must be a number, got a string"),
])
def test_wrong_types_and_values_are_named_with_the_key_path(tmp_path, text, expected):
    assert expected in error_of(tmp_path, BASE + text)


def test_a_top_level_key_of_the_wrong_type_is_named_with_its_line(tmp_path):
    msg = error_of(tmp_path, "# comment\ntitle = 3\n" + BASE)
    assert "line 2: title: must be a string, got an integer (3)" in msg


@pytest.mark.parametrize("text,expected", [
    ("[[boundary]]\ntag = \"xmn\"\nkind = \"dirichlet\"\nu = 0\n",
     "boundary[1].tag: the mesh has no facet tag 'xmn'; did you mean 'xmin'? its tags are: "
     "'boundary', 'xmax', 'xmin', 'ymax', 'ymin'"),
    ("[[boundary]]\ntag = \"xmin\"\nkind = \"fixed\"\nu = 0\n",
     "boundary[1].kind: 'fixed' is not one of the accepted values"),
    ("[[boundary]]\ntag = \"xmin\"\nkind = \"dirichet\"\nu = 0\n",
     "did you mean 'dirichlet'?"),
    ("[[boundary]]\ntag = \"xmin\"\nkind = \"robin\"\nexchange = 1\n",
     "boundary[1]: kind 'robin' needs 'u_outside'"),
    ("[[boundary]]\ntag = \"xmin\"\nkind = \"dirichlet\"\ninflow = 1\n",
     "boundary[1].inflow: does not apply to kind 'dirichlet'"),
    ("[[boundary]]\ntag = \"xmin\"\nkind = \"dirichlet\"\nvalue = 1\n",
     "boundary[1].value: "),
    ("[[boundary]]\nkind = \"dirichlet\"\nu = 1\n", "boundary[1]: has no 'tag'"),
    ("[[boundary]]\ntag = \"xmin\"\nkind = \"dirichlet\"\nu = 0\n"
     "[[boundary]]\ntag = \"xmin\"\nkind = \"neumann\"\ninflow = 0\n",
     "boundary[2].tag: tag 'xmin' already has a condition (boundary entry 1)"),
    ("[[boundary]]\ntag = \"ymax\"\nkind = \"robin\"\nexchange = -1\nu_outside = 0\n",
     "boundary[1].exchange: must not be negative"),
    ("[boundary]\ntag = \"xmin\"\n", "not a single [boundary] table"),
])
def test_boundary_mistakes_are_named(tmp_path, text, expected):
    assert expected in error_of(tmp_path, BASE + text)


@pytest.mark.parametrize("mesh,expected", [
    ('generator = "square"\nfile = "a.msh"\n', "give exactly one of file and generator"),
    ("cells = 3\n", "neither file nor generator is given"),
    ('generator = "l-shape"\nlower = [0, 0]\n', "does not apply to the l-shape generator"),
    ('generator = "square"\ncells = [2, 2, 2]\n', "mesh.cells: needs 2 counts"),
    ('generator = "square"\nlower = [1, 0]\nupper = [1, 1]\n', "must exceed mesh.lower"),
    ('generator = "sphere"\n', "'sphere' is not one of the accepted values"),
    ('file = "missing.msh"\n', "mesh.file: mesh file"),
    ('file = "a.msh"\ncells = 2\n', "mesh.cells: applies to generated meshes only"),
    ('generator = "square"\nmerge_duplicates = true\n',
     "mesh.merge_duplicates: applies to mesh files only"),
    ('file = "a.msh"\nmerge_duplicates = "yes"\n', "mesh.merge_duplicates: must be true or false"),
])
def test_mesh_section_mistakes_are_named(tmp_path, mesh, expected):
    assert expected in error_of(tmp_path, "[mesh]\n" + mesh)


def test_missing_mesh_section_says_what_to_add(tmp_path):
    assert "the [mesh] section is missing" in error_of(tmp_path, "[source]\nvalue = 1\n")


def test_a_file_that_is_not_utf8_is_named(tmp_path):
    path = tmp_path / "latin.toml"
    path.write_bytes(b"title = \"caf\xe9\"\n")
    with pytest.raises(InputError, match="line 1, column 13: byte 0xe9 is not UTF-8"):
        load_problem(path)


def test_a_missing_problem_file_is_named(tmp_path):
    with pytest.raises(InputError, match="nope.toml' does not exist"):
        load_problem(tmp_path / "nope.toml")


def test_boundary_kinds_document_their_value_keys():
    assert {k: v[0] for k, v in BOUNDARY_KINDS.items()} == {
        "dirichlet": ("u",), "neumann": ("inflow",), "robin": ("exchange", "u_outside")}


# ----------------------------------------------------------------------------
# the example files
# ----------------------------------------------------------------------------
def sympy_of(text, constants=None):
    import sympy as sp

    x, y, z = sp.symbols("x y z")
    names = {"x": x, "y": y, "z": z, "pi": sp.pi, "e": sp.E, "sin": sp.sin, "cos": sp.cos,
             "exp": sp.exp, "log": sp.log, "sqrt": sp.sqrt}
    names.update({k: sp.Float(v) for k, v in (constants or {}).items()})
    return sp.sympify(str(text).replace("^", "**"), locals=names), (x, y, z)


@pytest.mark.parametrize("name", ["wall-corner-2d.toml", "block-3d.toml", "pipe-wall.toml",
                                  "lshape-adaptive.toml"])
def test_every_example_loads(name):
    spec = load_problem(EXAMPLES / name)
    assert spec.boundary and spec.mesh.n_cells > 0


def test_block_example_source_is_minus_div_kappa_grad_of_its_exact_solution():
    # source: SymPy differentiates the exact solution of the example
    import sympy as sp
    from galerkit.bindings.command.problemfile import tomllib

    data = tomllib.loads((EXAMPLES / "block-3d.toml").read_text())
    u, (x, y, z) = sympy_of(data["exact"]["solution"])
    k, _ = sympy_of(data["material"]["conductivity"])
    f, _ = sympy_of(data["source"]["value"])
    div = sum(sp.diff(k * sp.diff(u, v), v) for v in (x, y, z))
    assert sp.simplify(-div - f) == 0
    for g, v in zip(data["exact"]["gradient"], (x, y, z)):
        assert sp.simplify(sympy_of(g)[0] - sp.diff(u, v)) == 0
    by_tag = {b["tag"]: b for b in data["boundary"]}
    assert sp.simplify(sympy_of(by_tag["zmax"]["inflow"])[0]
                       - (k * sp.diff(u, z)).subs(z, 1)) == 0  # outward normal +z at z = 1
    assert sp.simplify(sympy_of(by_tag["zmin"]["u"])[0] - u.subs(z, 0)) == 0


def test_lshape_example_is_the_corner_singularity_and_its_flux():
    # source: u = r^(2/3) sin(2 theta/3), theta in [0, 3 pi/2] (Strang & Fix, An Analysis
    # of the Finite Element Method, 1973), written here in closed form with NumPy
    spec = load_problem(EXAMPLES / "lshape-adaptive.toml")
    problem, opts = spec.build()
    rng = np.random.default_rng(1)
    x = rng.uniform(-1, 1, (2, 400))
    x = x[:, ~((x[0] > 0) & (x[1] < 0))]  # the L-shape leaves out the quadrant x > 0, y < 0
    r, t = np.hypot(x[0], x[1]), np.mod(np.arctan2(x[1], x[0]), 2 * np.pi)
    assert np.allclose(opts.exact(x), r ** (2 / 3) * np.sin(2 * t / 3), rtol=1e-12)
    grad = 2 / 3 * r ** (-1 / 3) * np.array([-np.sin(t / 3), np.cos(t / 3)])
    assert np.allclose(opts.exact_gradient(x), grad, rtol=1e-12)
    s = np.linspace(0.01, 0.99, 7)
    sides = {"xmin": (np.array([-np.ones(7), 2 * s - 1]), (-1, 0)),
             "xmax": (np.array([np.ones(7), s]), (1, 0)),
             "ymin": (np.array([-s, -np.ones(7)]), (0, -1)),
             "ymax": (np.array([2 * s - 1, np.ones(7)]), (0, 1))}
    for tag, (pts, n) in sides.items():  # inflow = grad u . n, n the outward normal
        r, t = np.hypot(pts[0], pts[1]), np.mod(np.arctan2(pts[1], pts[0]), 2 * np.pi)
        g = 2 / 3 * r ** (-1 / 3) * np.array([-np.sin(t / 3), np.cos(t / 3)])
        assert np.allclose(problem.neumann[tag](pts), n[0] * g[0] + n[1] * g[1], rtol=1e-12)
    assert problem.dirichlet == {"reentrant": 0.0} and opts.adapt["relative_tol"] == 0.02


def test_block_example_converges_at_the_a_priori_l2_rate():
    # source: a priori rate k+1 in L2 for smooth solutions (Brenner & Scott, 2008)
    spec = load_problem(EXAMPLES / "block-3d.toml")
    problem, opts = spec.build()
    table = gk.convergence_study(problem, 2, opts.degree, opts.exact, opts.exact_gradient)
    assert table.column("eoc_l2")[-1] == pytest.approx(opts.degree + 1, abs=0.35)
    assert table.column("eoc_h1")[-1] == pytest.approx(opts.degree, abs=0.35)


def test_pipe_wall_exact_solution_satisfies_its_conditions():
    # source: SymPy; radial conduction with a convective outer surface (Incropera & DeWitt)
    import sympy as sp
    from galerkit.bindings.command.problemfile import tomllib

    data = tomllib.loads((EXAMPLES / "pipe-wall.toml").read_text())
    c = data["constants"]
    u, (x, y, _) = sympy_of(data["exact"]["solution"], c)
    r = sp.symbols("r", positive=True)
    ur = u.subs({x: r, y: 0})
    assert sp.simplify(sp.diff(u, x, 2) + sp.diff(u, y, 2)) == 0  # Laplace, no source
    assert float(ur.subs(r, c["ri"])) == pytest.approx(c["Tpipe"], rel=1e-12)
    robin = -c["k"] * sp.diff(ur, r) - c["h"] * (ur - c["Tair"])
    assert abs(float(robin.subs(r, c["ro"]))) < 1e-9


def test_pipe_wall_example_agrees_with_the_closed_form_to_half_a_percent():
    # source: closed-form radial conduction (Incropera & DeWitt, ch. 3); the mesh's
    # polygonal circles add a geometry error of about 0.1 % (examples/make_pipe_mesh.py)
    spec = load_problem(EXAMPLES / "pipe-wall.toml")
    problem, opts = spec.build()
    sol = problem.solve(opts.degree, opts.method, opts.rtol)
    c = spec.constants
    nodal = np.abs(sol.u - sol.disc.interpolate(opts.exact)).max()
    assert nodal < 0.005 * (c["Tpipe"] - c["Tair"])


def test_example_files_name_the_schema_document():
    for f in EXAMPLES.glob("*.toml"):
        assert re.search(r"schema: docs/problem-files\.md", f.read_text()), f


def test_the_documented_example_is_a_valid_problem_file():
    from galerkit.bindings.command.problemfile import tomllib

    doc = (EXAMPLES.parent / "docs" / "problem-files.md").read_text()
    section = doc[doc.index("## A complete example"):]
    block = re.search(r"```toml\n(.*?)```", section, re.S).group(1)
    spec = parse_problem(tomllib.loads(block), source="docs/problem-files.md", base=EXAMPLES,
                         text=block)
    assert [e.kind for e in spec.boundary] == ["dirichlet", "robin"]
    assert spec.options.exact_gradient is not None


def test_the_example_mesh_is_what_its_script_writes():
    import importlib.util

    from galerkit.bindings.files import read_mesh

    spec = importlib.util.spec_from_file_location("make_pipe_mesh", EXAMPLES / "make_pipe_mesh.py")
    script = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(script)
    fresh = script.pipe_mesh()
    mesh = read_mesh(EXAMPLES / "pipe-wall.msh")
    assert np.allclose(mesh.points, fresh.points[:, :2], rtol=0, atol=1e-15)
    assert np.array_equal(mesh.cells, fresh.cells_dict["triangle"])
    # the annulus between r = 0.05 and 0.10: area of the inscribed polygons (64 sides)
    polygon = 0.5 * 64 * np.sin(2 * np.pi / 64) * (0.10**2 - 0.05**2)
    assert float(mesh.cell_volumes.sum()) == pytest.approx(polygon, rel=1e-12)


def test_entries_on_overlapping_tags_are_refused_naming_both_entries_and_the_count(tmp_path):
    msg = error_of(tmp_path, BASE + '[[boundary]]\ntag = "boundary"\nkind = "dirichlet"\nu = 0\n'
                   '[[boundary]]\ntag = "xmin"\nkind = "neumann"\ninflow = 1\n')
    assert re.search(r"line 10: boundary\[2\]\.tag: tag 'xmin' \(neumann\) shares 4 boundary "
                     r"facet\(s\) with tag 'boundary' \(dirichlet, boundary entry 1\)", msg), msg
    # the same fixed value twice is one condition
    spec = load_problem(write(tmp_path, BASE + '[[boundary]]\ntag = "boundary"\nkind = "dirichlet"\n'
                              'u = "0"\n[[boundary]]\ntag = "xmin"\nkind = "dirichlet"\n'
                              'u = 0\n', name="same.toml"))
    assert [e.tag for e in spec.boundary] == ["boundary", "xmin"]


# ----------------------------------------------------------------------------
# stay_in_folder (--stay-in-folder): meshes and outputs inside the file's folder
# ----------------------------------------------------------------------------
def _sq_vtu(path):
    import meshio

    m = gk.structured_triangles(2, 2)
    path.parent.mkdir(parents=True, exist_ok=True)
    meshio.write(str(path), meshio.Mesh(m.points, [("triangle", np.asarray(m.cells))]))


@pytest.fixture
def job(tmp_path):
    """A problem folder ``job`` beside a folder ``other``; meshes in both."""
    (tmp_path / "job").mkdir()
    _sq_vtu(tmp_path / "job" / "meshes" / "in.vtu")
    _sq_vtu(tmp_path / "other" / "out.vtu")
    return tmp_path / "job"


@pytest.mark.parametrize("mesh_file", ["../other/out.vtu", "{other}/out.vtu",
                                       "meshes/../../other/out.vtu", "outlink/out.vtu",
                                       "sneaky.vtu"])
def test_stay_in_folder_refuses_a_mesh_file_outside_the_problem_folder(job, mesh_file):
    other = (job.parent / "other").resolve()
    (job / "outlink").symlink_to(other, target_is_directory=True)
    (job / "sneaky.vtu").symlink_to(other / "out.vtu")
    text = f'[mesh]\nfile = "{mesh_file.format(other=other)}"\n'
    path = write(job, text)
    assert load_problem(path).mesh.n_cells == 8  # accepted without the flag
    with pytest.raises(InputError) as info:
        load_problem(path, stay_in_folder=True)
    msg = str(info.value)
    assert "line 2: mesh.file: the mesh file resolves to " \
        f"'{other / 'out.vtu'}', outside the problem file's folder '{job.resolve()}'" in msg
    assert "--stay-in-folder" in msg and "put the mesh file in that folder" in msg


@pytest.mark.parametrize("folder", ["..", "../other/res", "{other}", "outlink/res", "/tmp"])
def test_stay_in_folder_refuses_an_output_folder_outside_the_problem_folder(job, folder):
    other = (job.parent / "other").resolve()
    (job / "outlink").symlink_to(other, target_is_directory=True)
    text = BASE + f'[output]\nfolder = "{folder.format(other=other)}"\n'
    path = write(job, text)
    load_problem(path)  # accepted without the flag
    with pytest.raises(InputError) as info:
        load_problem(path, stay_in_folder=True)
    msg = str(info.value)
    assert "line 6: output.folder: the output folder resolves to '" in msg, msg
    assert f"outside the problem file's folder '{job.resolve()}'" in msg


def test_stay_in_folder_accepts_paths_inside_the_problem_folder(job):
    (job / "inlink").symlink_to(job / "meshes", target_is_directory=True)
    for mesh_file, folder in [("meshes/in.vtu", "."), ("inlink/in.vtu", "res/a/../b"),
                              (f"{job.resolve()}/meshes/in.vtu", f"{job.resolve()}/res")]:
        spec = load_problem(write(job, f'[mesh]\nfile = "{mesh_file}"\n[output]\n'
                                       f'folder = "{folder}"\n'), stay_in_folder=True)
        assert spec.mesh.n_cells == 8
        assert spec.options.folder.resolve().is_relative_to(job.resolve())


def test_stay_in_folder_refuses_xdmf_meshes_which_name_further_files(job):
    path = write(job, '[mesh]\nfile = "meshes/in.xdmf"\n')
    with pytest.raises(InputError, match=r"mesh\.file: a \.xdmf mesh names further files.*"
                       r"convert the mesh to \.msh or \.vtu"):
        load_problem(path, stay_in_folder=True)


def test_stay_in_folder_names_a_loop_of_links(job):
    (job / "loop").symlink_to(job / "loop")
    with pytest.raises(InputError, match=r"mesh\.file: the mesh file '.*loop/x\.vtu' cannot be "
                       r"resolved \(a loop of symbolic links\?\)"):
        load_problem(write(job, '[mesh]\nfile = "loop/x.vtu"\n'), stay_in_folder=True)


# ----------------------------------------------------------------------------
# [adapt]
# ----------------------------------------------------------------------------
def test_adapt_section_becomes_the_keyword_arguments_of_adapt(tmp_path):
    spec = load_problem(write(tmp_path, BASE + """
[adapt]
relative_tol = 0.01
tol = 1e-3
max_dofs = 5000
max_levels = 12
bulk = 0.3
"""))
    assert spec.build()[1].adapt == {"relative_tol": 0.01, "tol": 1e-3, "max_dofs": 5000,
                                     "max_levels": 12, "bulk": 0.3}
    spec = load_problem(write(tmp_path, BASE + "[adapt]\n"))
    assert spec.options.adapt == {"max_dofs": 200_000, "max_levels": 30, "bulk": 0.5}
    assert load_problem(write(tmp_path, BASE)).options.adapt is None


@pytest.mark.parametrize("text,expected", [
    ("[adapt]\nrel_tol = 0.1\n", "adapt.rel_tol: unknown key 'rel_tol'; did you mean "
     "'relative_tol'? valid keys here: tol, relative_tol, max_dofs, max_levels, bulk"),
    ("[adapt]\ntol = \"small\"\n", "adapt.tol: must be a number, got a string ('small')"),
    ("[adapt]\ntol = 0\n", "adapt.tol: must be positive, got 0.0"),
    ("[adapt]\nrelative_tol = 2\n", "adapt.relative_tol: must be below 1, got 2.0"),
    ("[adapt]\nmax_dofs = 1.5e4\n", "adapt.max_dofs: must be an integer, got a number"),
    ("[adapt]\nmax_levels = 0\n", "adapt.max_levels: must be 1 to 1000, got 0"),
    ("[adapt]\nbulk = 1.5\n", "adapt.bulk: must be at most 1, got 1.5"),
    ("[adapt]\nbulk = true\n", "adapt.bulk: must be a number, got true/false"),
    ("adapt = 1\n", "adapt: must be a table"),
    ("[material]\nconductivity = \"1 + x\"\n[adapt]\n",
     "material.conductivity: the formula '1 + x' varies inside cells"),
])
def test_adapt_mistakes_are_named_with_file_line_key_and_what_to_do(tmp_path, text, expected):
    if text.startswith("adapt ="):
        msg = error_of(tmp_path, text + BASE)
    else:
        msg = error_of(tmp_path, BASE + text)
    assert "p.toml" in msg and expected in msg, msg
    if "[adapt]" in text and "unknown" not in expected:
        assert ", line " in msg


def test_adapt_takes_p2_on_triangles_and_refuses_it_on_tetrahedra(tmp_path):
    spec = load_problem(write(tmp_path, BASE + "[discretization]\ndegree = 2\n[adapt]\n"))
    assert spec.options.degree == 2 and spec.options.adapt is not None
    msg = error_of(tmp_path, "[mesh]\ngenerator = \"box\"\ncells = 2\n[discretization]\n"
                   "degree = 2\n[adapt]\n")
    assert "adapt: adaptive refinement on tetrahedra runs on P1" in msg and ", line " in msg


def test_adapt_on_tetrahedra_is_accepted(tmp_path):
    spec = load_problem(write(tmp_path, "[mesh]\ngenerator = \"box\"\ncells = 2\n"
                              "[adapt]\nmax_levels = 2\n"))
    assert spec.options.adapt["max_levels"] == 2


@pytest.mark.parametrize("text, expected", [
    ("true", "on"), ("false", "off"), ('"auto"', "auto")])
def test_error_bound_switch_is_read(tmp_path, text, expected):
    spec = load_problem(write(tmp_path, BASE + f"[output]\nerror_bound = {text}\n"))
    assert spec.options.error_bound == expected


@pytest.mark.parametrize("text", ['"yes"', "1"])
def test_a_wrong_error_bound_switch_is_named(tmp_path, text):
    msg = error_of(tmp_path, BASE + f"[output]\nerror_bound = {text}\n")
    assert "output.error_bound: must be true, false or \"auto\"" in msg, msg


def test_adapt_accepts_conductivity_constant_per_region(tmp_path):
    spec = load_problem(write(tmp_path, """
[mesh]
generator = "square"
cells = 4
regions = { core = "x < 0.5" }
[material]
conductivity = { core = 10, default = "2*3" }
[adapt]
"""))
    assert spec.options.adapt is not None
