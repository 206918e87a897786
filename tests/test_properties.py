"""Property tests (hypothesis): invariants on random valid meshes, and only
galerkit errors for random invalid input.

Valid meshes: structured meshes with randomly moved interior vertices, and
Delaunay meshes of random points (``scipy.spatial.Delaunay``) with slivers
dropped.  On every one the assembled operators keep the invariants any
finite element text states (e.g. Hughes 2000, ch. 3): the stiffness matrix
is symmetric, annihilates constants (zero row sums) and gives ``|a|**2 |D|``
as the energy of a linear field ``a . x``; the mass matrix and the load of 1
integrate to the volume ``|D|``.

Invalid input: random index arrays with entries out of range, NaN
coordinates, wrong shapes and dtypes, and random Python objects, passed to
the public entry points, raise only :class:`~galerkit.errors.GalerkitError`
subclasses -- never ``IndexError``, ``TypeError`` or a crash.  The fuzzers at
the end mutate valid coefficient formulas, mesh files and problem files.

Examples are few (``max_examples`` small, no deadline): the machine is small
and shared.
"""

from __future__ import annotations

import shutil
import tempfile
import warnings
from pathlib import Path

import numpy as np
import pytest
import scipy.sparse as sp
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from scipy.spatial import Delaunay

import galerkit as gk
from galerkit.boundary import DirichletElimination
from galerkit.errors import GalerkitError, InputError, MeshError
from galerkit.evaluation import evaluate

FEW = settings(max_examples=20, deadline=None,
               suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])
SOME = settings(max_examples=30, deadline=None,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])


# ----------------------------------------------------------------------------
# random valid meshes
# ----------------------------------------------------------------------------
def _signed_volumes(points, cells):
    """Independent numpy volumes: det of the edge vectors / d!."""
    d = points.shape[1]
    e = points[cells[:, 1:]] - points[cells[:, :1]]
    return np.linalg.det(e) / (2.0 if d == 2 else 6.0)


@st.composite
def perturbed_structured(draw):
    """Unit square / cube mesh with interior vertices moved up to 0.2 h: volume 1."""
    dim = draw(st.sampled_from([2, 3]))
    if dim == 2:
        counts = draw(st.tuples(st.integers(1, 6), st.integers(1, 6)))
        base = gk.structured_triangles(*counts)
    else:
        counts = draw(st.tuples(st.integers(1, 3), st.integers(1, 3), st.integers(1, 3)))
        base = gk.structured_tetrahedra(*counts)
    amp = draw(st.floats(0.0, 0.2))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    h = 1.0 / np.array(counts, dtype=float)
    p = base.points.copy()
    inner = np.all((p > 1e-9) & (p < 1 - 1e-9), axis=1)
    p[inner] += amp * h * rng.uniform(-1.0, 1.0, size=(int(inner.sum()), dim))
    try:
        mesh = gk.Mesh(p, base.cells)
    except MeshError:  # a moved vertex made a cell flat or folded the mesh
        assume(False)
    return mesh, 1.0


@st.composite
def delaunay_mesh(draw):
    """Delaunay mesh of the box corners plus random points; slivers dropped."""
    dim = draw(st.sampled_from([2, 3]))
    n = draw(st.integers(0, 20 if dim == 2 else 12))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    corners = np.array(np.meshgrid(*[[0.0, 1.0]] * dim, indexing="ij")).reshape(dim, -1).T
    pts = np.vstack([corners, rng.uniform(0.0, 1.0, size=(n, dim))])
    cells = Delaunay(pts).simplices
    vol = _signed_volumes(pts, cells)
    longest = np.max([np.linalg.norm(pts[cells[:, i]] - pts[cells[:, j]], axis=1)
                      for i in range(dim + 1) for j in range(i)], axis=0)
    keep = np.abs(vol) > 1e-3 * longest**dim  # 3D Delaunay makes slivers: drop them
    assume(keep.any())
    p, c, _ = gk.remove_unreferenced_vertices(pts, cells[keep])
    try:
        mesh = gk.Mesh(p, c)
    except MeshError:
        assume(False)
    return mesh, float(np.abs(vol[keep]).sum())


meshes = st.one_of(perturbed_structured(), delaunay_mesh())


@FEW
@given(mesh_volume=meshes, k=st.integers(1, 3))
def test_assembly_invariants_hold_on_random_valid_meshes(mesh_volume, k):
    mesh, volume = mesh_volume
    assert np.isclose(mesh.cell_volumes.sum(), volume, rtol=1e-12)
    disc = gk.Discretization(mesh, k)
    asm = gk.Assembler(disc)
    K = asm.stiffness()
    M = asm.mass()
    ones = np.ones(disc.n_dofs)
    scale = float(np.abs(K.data).max())
    # symmetric: each pair (i, j), (j, i) sums the same cell values in the same order
    assert abs(K - K.T).max() == 0.0
    assert abs(M - M.T).max() == 0.0
    # constants are in the kernel: zero row sums (round-off only)
    assert np.abs(K @ ones).max() <= 1e-12 * scale * disc.n_local
    # mass and load of 1 integrate the volume
    assert np.isclose(ones @ (M @ ones), volume, rtol=1e-12)
    assert np.isclose(asm.load(1.0).sum(), volume, rtol=1e-12)
    # energy of a linear field a . x + c is |a|^2 |D| (its gradient is constant)
    a = np.array([0.7, -1.3, 0.4][: mesh.dim])
    u = disc.interpolate(lambda x: a @ x + 2.0)
    assert np.isclose(u @ (K @ u), (a @ a) * volume, rtol=1e-10)
    # positive semi-definite: no random vector has negative energy beyond round-off
    v = np.random.default_rng(k).standard_normal(disc.n_dofs)
    assert v @ (K @ v) >= -1e-12 * scale * (v @ v)


@FEW
@given(mesh_volume=meshes)
def test_tensor_conductivity_scales_the_linear_field_energy(mesh_volume):
    # energy of a . x with a constant SPD tensor T is a.T.a |D|
    mesh, volume = mesh_volume
    d = mesh.dim
    T = np.diag(np.arange(1.0, d + 1)) + 0.25 * (np.ones((d, d)) - np.eye(d))
    disc = gk.Discretization(mesh, 2)
    a = np.array([1.0, 2.0, -0.5][:d])
    u = disc.interpolate(lambda x: a @ x)
    K = gk.Assembler(disc).stiffness(T)
    assert np.isclose(u @ (K @ u), a @ T @ a * volume, rtol=1e-10)


# ----------------------------------------------------------------------------
# random invalid inputs raise only galerkit errors
# ----------------------------------------------------------------------------
def _only_galerkit_errors(call, *args, **kwargs):
    """Run the call; a GalerkitError is fine, anything else fails the test."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            return call(*args, **kwargs)
        except GalerkitError:
            return None


DTYPES = st.sampled_from([np.int8, np.uint8, np.int32, np.uint32, np.int64, np.uint64,
                          np.float32, np.float64, np.complex128, np.bool_, "<U2"])
SHAPES = hnp.array_shapes(min_dims=0, max_dims=3, min_side=0, max_side=5)
random_arrays = st.one_of(
    hnp.arrays(dtype=DTYPES, shape=SHAPES),
    hnp.arrays(dtype=np.float64, shape=SHAPES, elements=st.floats(allow_nan=True,
                                                                   allow_infinity=True)),
)
random_objects = st.one_of(
    st.none(), st.booleans(), st.integers(-10**20, 10**20), st.floats(), st.text(max_size=4),
    st.complex_numbers(), st.lists(st.integers(-3, 30), max_size=6),
    st.lists(st.lists(st.floats(-2, 2), max_size=4), max_size=4),
    st.dictionaries(st.text(max_size=3), st.integers(), max_size=2),
    st.tuples(st.integers(), st.text(max_size=2)), st.just(object()), st.just(np.eye),
    random_arrays,
)


@SOME
@given(n=st.integers(3, 12), m=st.integers(1, 6), data=st.data())
def test_random_cell_tables_raise_only_mesh_errors(n, m, data):
    dim = data.draw(st.sampled_from([2, 3]))
    points = np.random.default_rng(n * m).uniform(size=(n, dim))
    cells = data.draw(hnp.arrays(np.int64, (m, dim + 1), elements=st.integers(-3, n + 3)))
    mesh = _only_galerkit_errors(gk.Mesh, points, cells)
    if mesh is not None:  # a lucky valid table: a valid mesh
        assert (mesh.cell_volumes > 0).all()
        assert mesh.cells.min() >= 0 and mesh.cells.max() < n


@SOME
@given(points=hnp.arrays(np.float64, (6, 2), elements=st.floats(-1e3, 1e3) | st.just(np.nan)))
def test_points_with_nans_raise_only_mesh_errors(points):
    cells = np.array([[0, 1, 2], [3, 4, 5]])
    mesh = _only_galerkit_errors(gk.Mesh, points, cells)
    if mesh is not None:
        assert np.isfinite(mesh.points).all()


@SOME
@given(points=random_objects, cells=random_objects)
def test_random_mesh_arguments_raise_only_galerkit_errors(points, cells):
    _only_galerkit_errors(gk.Mesh, points, cells)
    _only_galerkit_errors(gk.Mesh, np.eye(3)[:, :2], cells)
    _only_galerkit_errors(gk.Mesh, points, [[0, 1, 2]])
    _only_galerkit_errors(gk.remove_unreferenced_vertices, points, cells)


@pytest.fixture(scope="module")
def setting():
    mesh = gk.structured_triangles(3, 3)
    disc = gk.Discretization(mesh, 2)
    asm = gk.Assembler(disc)
    K = asm.stiffness()
    return mesh, disc, asm, K


@settings(max_examples=40, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(obj=random_objects)
def test_random_arguments_to_public_entry_points_raise_only_galerkit_errors(setting, obj):
    mesh, disc, asm, K = setting
    fresh = gk.structured_triangles(2, 2)
    calls = [
        lambda: gk.Mesh(mesh.points, mesh.cells, facet_groups=obj),
        lambda: fresh.set_facet_tag("x", obj),
        lambda: fresh.set_facet_tag(obj, [0]),
        lambda: mesh.tagged_facets(obj),
        lambda: gk.Discretization(mesh, obj),
        lambda: disc.interpolate(obj),
        lambda: disc.boundary_dofs(obj),
        lambda: gk.Assembler(disc, quadrature_degree=obj),
        lambda: asm.stiffness(obj),
        lambda: asm.stiffness(lambda x: obj),
        lambda: asm.stiffness(out=obj),
        lambda: asm.mass(obj),
        lambda: asm.load(obj),
        lambda: asm.load(1.0, out=obj),
        lambda: asm.boundary_load("xmin", obj),
        lambda: asm.boundary_mass("xmin", obj),
        lambda: asm.boundary_load(obj, 1.0),
        lambda: DirichletElimination(K, obj),
        lambda: DirichletElimination(obj, [0]),
        lambda: DirichletElimination(K, [0]).reduce(K, obj, [0.0]),
        lambda: DirichletElimination(K, [0]).reduce(K, np.zeros(disc.n_dofs), obj),
        lambda: gk.solve(K + asm.mass(), obj, method="cg"),
        lambda: gk.solve(obj, np.ones(3)),
        lambda: gk.solve(K + asm.mass(), np.ones(disc.n_dofs), method=obj),
        lambda: gk.solve(K + asm.mass(), np.ones(disc.n_dofs), rtol=obj),
        lambda: evaluate(disc, np.zeros(disc.n_dofs), obj),
        lambda: evaluate(disc, obj, np.full((2, 1), 0.5)),
        lambda: gk.l2_error(disc, obj, lambda x: x[0]),
        lambda: gk.l2_error(disc, np.zeros(disc.n_dofs), obj),
        lambda: gk.energy_error(disc, np.zeros(disc.n_dofs), lambda x: 0 * x,
                                conductivity=obj),
        lambda: gk.PoissonProblem(mesh, conductivity=obj, dirichlet={"boundary": 0.0}).solve(),
        lambda: gk.PoissonProblem(mesh, source=obj, dirichlet={"boundary": 0.0}).solve(),
        lambda: gk.PoissonProblem(mesh, dirichlet={"boundary": obj}).solve(),
        lambda: gk.PoissonProblem(mesh, dirichlet=obj),
        lambda: gk.PoissonProblem(mesh, robin={"xmin": (obj, 1.0)}).solve(),
        lambda: gk.PoissonProblem(mesh, dirichlet={"boundary": 0.0}).solve(degree=obj),
    ]
    for call in calls:
        _only_galerkit_errors(call)


@SOME
@given(dofs=hnp.arrays(np.int64, st.integers(0, 6), elements=st.integers(-20, 40)),
       values=hnp.arrays(np.float64, st.integers(0, 7), elements=st.floats(allow_nan=True)))
def test_random_dirichlet_dofs_and_values_raise_only_galerkit_errors(dofs, values):
    K = sp.csr_array(sp.diags([-1.0, 2.0, -1.0], [-1, 0, 1], shape=(30, 30)))
    elim = _only_galerkit_errors(DirichletElimination, K, dofs)
    if elim is not None:
        out = _only_galerkit_errors(elim.reduce, K, np.ones(30), values)
        if out is not None:
            assert np.isfinite(out[1]).all()


# ----------------------------------------------------------------------------
# fuzzing the coefficient formulas (galerkit.bindings.command.expressions)
# ----------------------------------------------------------------------------
FORMULAS = [
    "1 + 0.5*sin(pi*x)*y^2",
    "k0 if x < 0.5 else 2*k0",
    "exp(-(x^2 + y^2)/0.1)",
    "sqrt(x^2 + y^2) + log(1 + x)",
    "max(x, y) - min(x, 0.3)",
    "2^3^2 - x",
    "-2*x*pi*cos(pi*x)*sin(pi*y)",
]
CHARS = list("0123456789.+-*/^()<>=,xyzepi kfsqrt") + ["**", "if", "else", "and", "1e308"]


@st.composite
def mutated_formula(draw):
    text = draw(st.sampled_from(FORMULAS))
    for _ in range(draw(st.integers(1, 3))):
        i = draw(st.integers(0, len(text)))
        op = draw(st.sampled_from(["delete", "insert", "replace", "duplicate"]))
        piece = draw(st.sampled_from(CHARS))
        if op == "delete":
            text = text[:i] + text[i + 1:]
        elif op == "insert":
            text = text[:i] + piece + text[i:]
        elif op == "replace":
            text = text[:i] + piece + text[i + 1:]
        else:
            j = draw(st.integers(i, min(len(text), i + 6)))
            text = text[:j] + text[i:j] + text[j:]
    return text


@settings(max_examples=100, deadline=None)
@given(text=mutated_formula())
def test_mutated_formulas_compile_or_raise_input_error(text):
    from galerkit.bindings.command.expressions import compile_expression

    x = np.array([[0.1, 0.5, 0.9], [0.2, 0.4, 0.8]])
    try:
        f = compile_expression(text, dim=2, name="source", constants={"k0": 1.5})
    except InputError:
        return
    try:
        v = f(x)
    except InputError:  # e.g. log of a negative number at one point
        return
    assert v.shape == (3,) and v.dtype == np.float64 and np.isfinite(v).all()


# ----------------------------------------------------------------------------
# fuzzing the mesh reader (galerkit.bindings.files.read_mesh)
# ----------------------------------------------------------------------------
@pytest.fixture(scope="module")
def mesh_files():
    import meshio

    folder = Path(tempfile.mkdtemp(prefix="galerkit-fuzz-"))
    m = gk.structured_triangles(2, 2)
    mm = meshio.Mesh(m.points, [("line", m.boundary_facets.astype(np.int64)),
                                ("triangle", m.cells.astype(np.int64))],
                     cell_data={"gmsh:physical": [np.full(len(m.boundary_facets), 3),
                                                  np.ones(m.n_cells, dtype=int)],
                                "gmsh:geometrical": [np.ones(len(m.boundary_facets), dtype=int),
                                                     np.ones(m.n_cells, dtype=int)]},
                     field_data={"wall": np.array([3, 1])})
    files = {}
    meshio.write(folder / "good.msh", mm, file_format="gmsh22", binary=False)
    files["msh"] = (folder / "good.msh").read_bytes()
    t = gk.structured_tetrahedra(1, 1, 1)
    meshio.write(folder / "good.vtu", meshio.Mesh(t.points, [("tetra", t.cells.astype(np.int64))]))
    files["vtu"] = (folder / "good.vtu").read_bytes()
    triangles = [("triangle", m.cells.astype(np.int64))]
    meshio.write(folder / "ascii.vtu", meshio.Mesh(m.points, triangles), binary=False)
    files["ascii.vtu"] = (folder / "ascii.vtu").read_bytes()
    yield folder, files
    shutil.rmtree(folder, ignore_errors=True)


@st.composite
def mutated_bytes(draw, data: bytes):
    b = bytearray(data)
    op = draw(st.sampled_from(["truncate", "flip", "digit", "delete"]))
    if op == "truncate":
        return bytes(b[: draw(st.integers(0, len(b) - 1))])
    for _ in range(draw(st.integers(1, 4))):
        i = draw(st.integers(0, len(b) - 1))
        if op == "flip":
            b[i] ^= draw(st.integers(1, 255))
        elif op == "digit":
            b[i] = draw(st.sampled_from(b"0123456789 -\n"))
        else:
            del b[i]
    return bytes(b)


@settings(max_examples=80, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(data=st.data())
def test_damaged_mesh_files_give_input_error_or_a_valid_mesh(mesh_files, data):
    from galerkit.bindings.files import read_mesh

    folder, files = mesh_files
    kind = data.draw(st.sampled_from(sorted(files)))
    damaged = data.draw(mutated_bytes(files[kind]))
    path = folder / f"damaged.{kind.split('.')[-1]}"
    path.write_bytes(damaged)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            mesh = read_mesh(path)
        except InputError:  # MeshError is an InputError too
            return
    assert isinstance(mesh, gk.Mesh)
    assert (mesh.cell_volumes > 0).all() and "boundary" in mesh.facet_groups


# ----------------------------------------------------------------------------
# fuzzing problem files (galerkit.bindings.command.problemfile.load_problem)
# ----------------------------------------------------------------------------
EXAMPLES = Path(__file__).parent.parent / "examples"


@pytest.fixture(scope="module")
def problem_files():
    problemfile = pytest.importorskip("galerkit.bindings.command.problemfile")
    if not hasattr(problemfile, "load_problem"):
        pytest.skip("galerkit.bindings.command.problemfile has no load_problem")
    folder = Path(tempfile.mkdtemp(prefix="galerkit-toml-fuzz-"))
    texts = {}
    for p in sorted(EXAMPLES.glob("*.toml")):
        texts[p.name] = p.read_text(encoding="utf-8")
    for p in EXAMPLES.glob("*.msh"):
        shutil.copy(p, folder / p.name)
    if not texts:
        pytest.skip("no example problem files")
    yield problemfile.load_problem, folder, texts
    shutil.rmtree(folder, ignore_errors=True)


@st.composite
def mutated_toml(draw, text):
    lines = text.split("\n")
    op = draw(st.sampled_from(["delete line", "duplicate line", "swap lines", "truncate",
                               "delete char", "replace char"]))
    i = draw(st.integers(0, len(lines) - 1))
    if op == "delete line":
        del lines[i]
    elif op == "duplicate line":
        lines.insert(i, lines[i])
    elif op == "swap lines":
        j = draw(st.integers(0, len(lines) - 1))
        lines[i], lines[j] = lines[j], lines[i]
    elif op == "truncate":
        return text[: draw(st.integers(0, len(text)))]
    else:
        line = lines[i]
        c = draw(st.integers(0, max(len(line) - 1, 0)))
        # no digit is ever added, so no mutation asks for a huge mesh
        new = "" if op == "delete char" else draw(st.sampled_from(list("=[]{}\"'#.,-_ xa\t")))
        lines[i] = line[:c] + new + line[c + 1:]
    return "\n".join(lines)


@settings(max_examples=60, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(data=st.data())
def test_damaged_problem_files_give_input_error_or_a_problem(problem_files, data):
    load_problem, folder, texts = problem_files
    name = data.draw(st.sampled_from(sorted(texts)))
    text = data.draw(mutated_toml(texts[name]))
    path = folder / name
    path.write_text(text, encoding="utf-8")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            spec = load_problem(path)
        except GalerkitError:
            return
    assert spec is not None
