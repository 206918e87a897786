"""Regions and flow quantities through the ways in and out: mesh files with volume
groups, problem-file tables, the solve report, probes, VTU, slice pictures."""

import json

import meshio
import numpy as np
import pytest

from galerkit import structured_tetrahedra, structured_triangles
from galerkit.bindings.command.cli import main
from galerkit.bindings.command.problemfile import load_problem
from galerkit.bindings.files import read_mesh, write_solution
from galerkit.bindings.files.plots import PNG_SIGNATURE, plot_slices
from galerkit.errors import InputError
from galerkit.problem import PoissonProblem

# Composite wall (Incropera & DeWitt, Fundamentals of Heat and Mass Transfer, ch. 3):
# two layers in series carry q = (T1 - T2) / (L1/k1 + L2/k2) per unit area.
L1, L2, K1, K2, T1, T2 = 0.4, 0.6, 50.0, 2.0, 100.0, 20.0
Q_WALL = (T1 - T2) / (L1 / K1 + L2 / K2)


def wall_file(tmp_path, dim):
    """A Gmsh 2.2 file of the unit square / cube with volume groups 'steel' (x < 0.4)
    and 'foam', and facet groups 'hot' (x = 0) and 'cold' (x = 1)."""
    m = structured_triangles(10, 3) if dim == 2 else structured_tetrahedra(5, 2, 2)
    c = m.points[m.cells].mean(axis=1)
    body = np.where(c[:, 0] < L1, 5, 6)
    f = m.boundary_facets
    mid = m.points[f].mean(axis=1)
    side = np.where(mid[:, 0] < 1e-12, 1, np.where(mid[:, 0] > 1 - 1e-12, 2, 0))
    keep = side > 0
    facet_type, cell_type = ("line", "triangle") if dim == 2 else ("triangle", "tetra")
    pts = m.points if dim == 3 else np.column_stack([m.points, np.zeros(m.n_vertices)])
    phys = [side[keep], body]
    out = meshio.Mesh(pts, [(facet_type, f[keep]), (cell_type, m.cells)],
                      cell_data={"gmsh:physical": phys, "gmsh:geometrical": phys},
                      field_data={"hot": np.array([1, dim - 1]), "cold": np.array([2, dim - 1]),
                                  "steel": np.array([5, dim]), "foam": np.array([6, dim])})
    path = tmp_path / f"wall{dim}.msh"
    meshio.write(path, out, file_format="gmsh22", binary=False)
    return path


@pytest.mark.parametrize("dim", [2, 3])
def test_composite_wall_from_a_mesh_file_with_volume_groups(tmp_path, dim):
    mesh = read_mesh(wall_file(tmp_path, dim))
    assert mesh.region_names == {"steel": 5, "foam": 6}
    assert list(mesh.interfaces) == ["steel/foam"]
    sol = PoissonProblem(mesh, conductivity={"steel": K1, "foam": K2},
                         dirichlet={"hot": T1, "cold": T2}).solve(method="direct")
    q = sol.boundary_flux("hot")
    assert abs(q - Q_WALL) <= 1e-12 * Q_WALL
    assert abs(sol.boundary_flux("cold") + Q_WALL) <= 1e-12 * Q_WALL
    assert abs(sol.interface_flux("steel/foam") - Q_WALL) <= 1e-12 * Q_WALL


WALL_TOML = """
[mesh]
file = "{file}"
[material]
conductivity = {{ steel = {k1}, foam = {k2} }}
[[boundary]]
tag = "hot"
kind = "dirichlet"
u = {t1}
[[boundary]]
tag = "cold"
kind = "dirichlet"
u = {t2}
[output]
fluxes = ["hot", "cold", "steel/foam"]
gradient_flux = true
probes = [{probes}]
"""


@pytest.mark.parametrize("dim", [2, 3])
def test_solve_reports_fluxes_balance_regions_and_probes(tmp_path, dim, capsys):
    f = wall_file(tmp_path, dim)
    probes = "[0.2, 0.5]" if dim == 2 else "[0.2, 0.5, 0.5], [0.0, 0.0, 0.0]"
    (tmp_path / "wall.toml").write_text(WALL_TOML.format(
        file=f.name, k1=K1, k2=K2, t1=T1, t2=T2, probes=probes))
    code = main(["--json", "solve", str(tmp_path / "wall.toml"), "--method", "direct",
                 "--output", str(tmp_path / "out")])
    assert code == 0
    info = json.loads(capsys.readouterr().out)
    flux = {e["name"]: e for e in info["fluxes"]}
    assert flux["hot"]["consistent"] == pytest.approx(Q_WALL, rel=1e-12)
    assert flux["cold"]["gradient"] == pytest.approx(-Q_WALL, rel=1e-12)
    assert flux["steel/foam"]["consistent"] == pytest.approx(Q_WALL, rel=1e-12)
    assert abs(info["balance"]["imbalance"]) <= 1e-10
    assert [r["name"] for r in info["regions"]] == ["steel", "foam"]
    # the exact profile at x = 0.2: T1 - q x / k1
    assert info["probes"][0]["value"] == pytest.approx(T1 - Q_WALL * 0.2 / K1, rel=1e-12)
    if dim == 3:  # a probe at a vertex equals the nodal value there (T1 on x = 0)
        assert info["probes"][1]["value"] == pytest.approx(T1, rel=1e-14)
    csv = (tmp_path / "out" / "wall-probes.csv").read_text().splitlines()
    assert csv[0] == ("x,y,u" if dim == 2 else "x,y,z,u") and len(csv) == 1 + dim - 1
    # and the text report names them
    assert main(["solve", str(tmp_path / "wall.toml"), "--method", "direct",
                 "--output", str(tmp_path / "out")]) == 0
    text = capsys.readouterr().out
    assert "flux        'hot'" in text and "balance" in text and "region      'foam'" in text


def _problem(tmp_path, text):
    p = tmp_path / "p.toml"
    p.write_text(text)
    return load_problem(p)


SQUARE_REGIONS = """
[mesh]
generator = "square"
cells = [8, 4]
regions = {{ core = "x < 0.5 and y < 0.5" }}
[source]
value = {value}
[[boundary]]
tag = "boundary"
kind = "dirichlet"
u = 0
{extra}
"""


def test_region_source_table_equals_the_formula_with_if(tmp_path):
    # the same field two ways: a table per region and one formula with `if`;
    # the loads agree to round-off (both integrate the same values)
    table = _problem(tmp_path, SQUARE_REGIONS.format(
        value='{ core = "1 + x*y", domain = 3 }', extra=""))
    formula = _problem(tmp_path, SQUARE_REGIONS.format(
        value='"(1 + x*y) if (x < 0.5 and y < 0.5) else 3"', extra=""))
    from galerkit import Assembler, Discretization
    asm = Assembler(Discretization(table.mesh, 2))
    b1 = asm.load(table.build()[0].source)
    b2 = asm.load(formula.build()[0].source)
    assert np.abs(b1 - b2).max() <= 1e-15 * np.abs(b2).max()
    assert table.mesh.region_names == {"domain": 0, "core": 1}


@pytest.mark.parametrize("value, extra, match", [
    ('{ core = 1 }', "", r"no value for region\(s\) 'domain'"),
    ('{ core = 1, wood = 2, domain = 0 }', "", "no region 'wood'"),
    ('1', "[output]\nprobes = [[2.0, 0.5]]", "probe 1 at \\[2.0, 0.5\\] lies outside"),
    ('1', "[output]\nfluxes = [\"inlet\"]", "'inlet' is neither a facet group"),
    ('1', "[output]\nslices = [\"x=0.5\"]", "3D meshes only"),
])
def test_problem_file_region_and_output_errors_are_named(tmp_path, value, extra, match):
    with pytest.raises(InputError, match=match):
        _problem(tmp_path, SQUARE_REGIONS.format(value=value, extra=extra))


def test_vtu_carries_region_ids(tmp_path):
    mesh = structured_triangles(4, 2, regions={"steel": lambda x: x[0] < 0.5})
    sol = PoissonProblem(mesh, {"steel": 5.0, "domain": 1.0},
                         dirichlet={"xmin": 0.0}, source=1.0).solve(degree=2)
    back = meshio.read(write_solution(tmp_path / "u.vtu", sol))
    reg = back.cell_data["region"][0]
    parent = back.cell_data["parent_cell"][0]
    assert np.array_equal(reg, mesh.regions[parent])
    assert np.array_equal(back.cell_data["conductivity"][0], np.where(reg == 1, 5.0, 1.0))


def test_mesh_info_lists_regions_and_interfaces(tmp_path, capsys):
    f = wall_file(tmp_path, 3)
    assert main(["--json", "mesh-info", str(f)]) == 0
    info = json.loads(capsys.readouterr().out)
    assert info["regions"]["steel"]["cells"] == 6 * 2 * 2 * 2
    assert info["regions"]["foam"]["volume"] == pytest.approx(L2, rel=1e-12)
    assert info["interfaces"] == {"steel/foam": 2 * 2 * 2}


def test_slice_pictures_show_the_field(tmp_path):
    import matplotlib.image as mpimg

    mesh = structured_tetrahedra(4, 4, 4)
    sol = PoissonProblem(mesh, dirichlet={"xmin": 0.0, "xmax": 1.0}).solve()
    paths = plot_slices(tmp_path / "t.png", sol, units="K", name="temperature")
    assert [p.name for p in paths] == ["t-slice-x0.5.png", "t-slice-y0.5.png",
                                       "t-slice-z0.5.png"]
    for p in paths:
        assert p.read_bytes()[:8] == PNG_SIGNATURE
    # the y = 0.5 slice shows u = x from 0 to 1: many distinct colours, dark and light
    img = mpimg.imread(paths[1])[..., :3]
    colours = np.unique((img * 255).astype(np.uint8).reshape(-1, 3), axis=0)
    assert len(colours) > 50
    lum = img.mean(axis=2)
    assert lum.min() < 0.1 and lum.max() > 0.9
    with pytest.raises(InputError, match="misses the mesh"):
        plot_slices(tmp_path / "t.png", sol, ["z=3"])
