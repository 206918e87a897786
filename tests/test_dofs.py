"""Specification of the global dof numbering (galerkit.dofs.Discretization).

Meshes are structured meshes whose interior vertices are moved at random by up
to 0.2 h (seeded), so that no two cells are alike; a second family also
relabels the vertices at random and shuffles the vertex order inside every
cell, so that neighbouring cells see a shared edge or face in every possible
orientation.  The checks are geometric and do not depend on the numbering
rule: dofs sit at the affine images of the reference nodes, the interpolant
of a polynomial of degree k is exact, and a finite element function is
continuous across every interior facet.
"""

from __future__ import annotations

from math import comb

import numpy as np
import pytest

from galerkit import Discretization, Mesh, structured_tetrahedra, structured_triangles
from galerkit.elements import REFERENCE_EDGES, REFERENCE_FACES, REFERENCE_FACETS
from galerkit.errors import InputError
from galerkit.topology import enumerate_entities

DEGREES = (1, 2, 3, 4)


def perturbed(dim, n, seed, shuffle=False):
    """Structured mesh on the unit square / cube, interior vertices moved by
    up to 0.2 h in each coordinate; optionally relabelled and shuffled."""
    ref = structured_triangles(n, n) if dim == 2 else structured_tetrahedra(n, n, n)
    rng = np.random.default_rng(seed)
    h = 1.0 / n
    pts = np.array(ref.points)
    interior = np.all((pts > 1e-12) & (pts < 1 - 1e-12), axis=1)
    pts[interior] += rng.uniform(-0.2 * h, 0.2 * h, size=(int(interior.sum()), dim))
    cells = np.array(ref.cells, dtype=np.int64)
    if not shuffle:
        return Mesh(pts, cells, facet_groups=dict(ref.facet_groups))
    relabel = rng.permutation(len(pts))  # old vertex -> new vertex
    new_pts = np.empty_like(pts)
    new_pts[relabel] = pts
    cells = relabel[cells]
    cells = np.take_along_axis(cells, rng.permuted(np.tile(np.arange(dim + 1), (len(cells), 1)),
                                                   axis=1), axis=1)
    cells = cells[rng.permutation(len(cells))]
    mesh = Mesh(new_pts, cells)
    _tag_sides(mesh)
    return mesh


def _tag_sides(mesh):
    names = [("xmin", "xmax"), ("ymin", "ymax"), ("zmin", "zmax")]
    for axis in range(mesh.dim):
        for name, value in zip(names[axis], (0.0, 1.0)):
            mesh.tag_boundary(name, lambda x, a=axis, v=value: np.abs(x[a] - v) < 1e-12)


MESHES = {
    (2, False): lambda: perturbed(2, 3, seed=1),
    (2, True): lambda: perturbed(2, 3, seed=2, shuffle=True),
    (3, False): lambda: perturbed(3, 3, seed=3),
    (3, True): lambda: perturbed(3, 2, seed=4, shuffle=True),
}
CASES = [(d, s, k) for (d, s) in MESHES for k in DEGREES]
IDS = [f"P{k}-{d}D-{'shuffled' if s else 'perturbed'}" for d, s, k in CASES]
_cache = {}


def mesh_of(dim, shuffle):
    if (dim, shuffle) not in _cache:
        _cache[(dim, shuffle)] = MESHES[(dim, shuffle)]()
    return _cache[(dim, shuffle)]


def disc_of(dim, shuffle, degree):
    key = (dim, shuffle, degree)
    if key not in _cache:
        _cache[key] = Discretization(mesh_of(dim, shuffle), degree)
    return _cache[key]


def affine_maps(mesh):
    """x0 (m, d) and J (m, d, d) with x = x0 + J xi on every cell."""
    x = mesh.points[mesh.cells]
    return x[:, 0], np.swapaxes(x[:, 1:] - x[:, :1], 1, 2)


def polynomial(dim, degree, seed):
    """A random polynomial of total degree `degree` (all monomials present)."""
    import itertools

    rng = np.random.default_rng(seed)
    E = [e for e in itertools.product(range(degree + 1), repeat=dim) if sum(e) <= degree]
    coef = rng.uniform(-1, 1, size=len(E))

    def f(x):  # x (dim, n)
        return sum(c * np.prod([x[r] ** e[r] for r in range(dim)], axis=0)
                   for c, e in zip(coef, E))

    return f


def random_reference_points(rng, dim, n):
    return rng.dirichlet(np.ones(dim + 1), size=n)[:, 1:]


# -- counts ---------------------------------------------------------------------------
@pytest.mark.parametrize("dim,shuffle,degree", CASES, ids=IDS)
def test_number_of_dofs_is_the_entity_count_formula(dim, shuffle, degree):
    # V + (k-1) E + C(k-1,2) F + C(k-1,3) T  (common practice)
    mesh = mesh_of(dim, shuffle)
    disc = disc_of(dim, shuffle, degree)
    n = mesh.n_vertices
    E = len(enumerate_entities(mesh.cells, np.array(REFERENCE_EDGES[dim]), n)[0])
    k = degree
    if dim == 2:
        expected = n + (k - 1) * E + comb(k - 1, 2) * mesh.n_cells
    else:
        F = len(enumerate_entities(mesh.cells, np.array(REFERENCE_FACES[3]), n)[0])
        expected = n + (k - 1) * E + comb(k - 1, 2) * F + comb(k - 1, 3) * mesh.n_cells
    assert disc.n_dofs == expected
    assert disc.cell_dofs.shape == (mesh.n_cells, comb(k + dim, dim))
    assert disc.dof_points.shape == (expected, dim)


@pytest.mark.parametrize("dim,shuffle,degree", CASES, ids=IDS)
def test_every_dof_is_used_and_no_cell_repeats_a_dof(dim, shuffle, degree):
    disc = disc_of(dim, shuffle, degree)
    np.testing.assert_array_equal(np.unique(disc.cell_dofs), np.arange(disc.n_dofs))
    srt = np.sort(disc.cell_dofs, axis=1)
    assert np.all(srt[:, 1:] != srt[:, :-1])


@pytest.mark.parametrize("dim,shuffle,degree", CASES, ids=IDS)
def test_dof_points_distinct(dim, shuffle, degree):
    disc = disc_of(dim, shuffle, degree)
    keys = np.round(disc.dof_points, 9)
    assert len(np.unique(keys, axis=0)) == disc.n_dofs


# -- geometry of the numbering ----------------------------------------------------------
@pytest.mark.parametrize("dim,shuffle,degree", CASES, ids=IDS)
def test_dof_points_of_each_cell_are_the_affine_images_of_the_reference_nodes(dim, shuffle, degree):
    # shared dofs of neighbouring cells therefore sit where both cells put them
    disc = disc_of(dim, shuffle, degree)
    x0, J = affine_maps(disc.mesh)
    mapped = x0[:, None, :] + np.einsum("mij,aj->mai", J, disc.element.nodes)
    np.testing.assert_allclose(disc.dof_points[disc.cell_dofs], mapped, rtol=0, atol=1e-14)


@pytest.mark.parametrize("dim,shuffle", list(MESHES), ids=[f"{d}D-{s}" for d, s in MESHES])
def test_p1_numbering_is_the_identity_on_vertices(dim, shuffle):
    mesh = mesh_of(dim, shuffle)
    disc = disc_of(dim, shuffle, 1)
    assert disc.n_dofs == mesh.n_vertices
    np.testing.assert_array_equal(disc.cell_dofs, mesh.cells)
    np.testing.assert_array_equal(disc.dof_points, mesh.points)
    np.testing.assert_array_equal(disc.vertex_dofs, np.arange(mesh.n_vertices))


@pytest.mark.parametrize("dim,shuffle,degree", CASES, ids=IDS)
def test_vertex_dofs_sit_at_the_vertices_and_are_the_first_local_dofs(dim, shuffle, degree):
    mesh = mesh_of(dim, shuffle)
    disc = disc_of(dim, shuffle, degree)
    np.testing.assert_array_equal(disc.dof_points[disc.vertex_dofs], mesh.points)
    np.testing.assert_array_equal(disc.cell_dofs[:, : dim + 1], disc.vertex_dofs[mesh.cells])


# -- interpolation ------------------------------------------------------------------------
def _evaluate(disc, u, cells, xi):
    """Value of the FE function u on cells at reference points xi (per cell)."""
    phi = disc.element.tabulate(xi)  # (n, n_local)
    return np.einsum("na,na->n", phi, u[disc.cell_dofs[cells]])


@pytest.mark.parametrize("dim,shuffle,degree", CASES, ids=IDS)
def test_interpolating_a_polynomial_of_the_element_degree_is_exact_inside_every_cell(
        dim, shuffle, degree):
    disc = disc_of(dim, shuffle, degree)
    f = polynomial(dim, degree, seed=degree)
    u = disc.interpolate(f)
    np.testing.assert_allclose(u, f(disc.dof_points.T), rtol=0, atol=0)
    rng = np.random.default_rng(100 + degree)
    m = disc.mesh.n_cells
    per_cell = 3
    cells = np.repeat(np.arange(m), per_cell)
    xi = random_reference_points(rng, dim, m * per_cell)
    x0, J = affine_maps(disc.mesh)
    x = x0[cells] + np.einsum("nij,nj->ni", J[cells], xi)
    want = f(x.T)
    got = _evaluate(disc, u, cells, xi)
    scale = np.abs(want).max()
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-12 * scale)


@pytest.mark.parametrize("dim,shuffle,degree", CASES, ids=IDS)
def test_interpolating_one_degree_too_high_is_not_exact(dim, shuffle, degree):
    # guards the exactness test above: x^(k+1) is not in P_k
    disc = disc_of(dim, shuffle, degree)
    f = lambda x: x[0] ** (degree + 1)  # noqa: E731
    u = disc.interpolate(f)
    rng = np.random.default_rng(7)
    cells = np.arange(disc.mesh.n_cells)
    xi = random_reference_points(rng, dim, len(cells))
    x0, J = affine_maps(disc.mesh)
    x = x0 + np.einsum("nij,nj->ni", J, xi)
    assert np.abs(_evaluate(disc, u, cells, xi) - f(x.T)).max() > 1e-8


@pytest.mark.parametrize("dim,shuffle,degree", CASES, ids=IDS)
def test_finite_element_functions_are_continuous_across_interior_facets(dim, shuffle, degree):
    disc = disc_of(dim, shuffle, degree)
    mesh = disc.mesh
    local = np.array(REFERENCE_FACETS[dim])
    facets, cell_facets, mult, _ = enumerate_entities(mesh.cells, local, mesh.n_vertices)
    interior = np.flatnonzero(mult == 2)
    # the two cells of each interior facet
    owner = np.full((len(facets), 2), -1)
    flat = cell_facets.ravel()
    cells_of = np.repeat(np.arange(mesh.n_cells), local.shape[0])
    order = np.argsort(flat, kind="stable")
    starts = np.searchsorted(flat[order], np.arange(len(facets)))
    owner[:, 0] = cells_of[order[starts]]
    second = np.minimum(starts + 1, len(flat) - 1)
    owner[interior, 1] = cells_of[order[second[interior]]]
    assert np.all(owner[interior, 0] != owner[interior, 1])
    rng = np.random.default_rng(200 + degree)
    u = rng.uniform(-1, 1, disc.n_dofs)  # an arbitrary FE function
    per_facet = 3
    f = np.repeat(interior, per_facet)
    lam = rng.dirichlet(np.ones(dim), size=len(f))
    x = np.einsum("nj,nji->ni", lam, mesh.points[facets[f]])  # random points on facets
    x0, J = affine_maps(mesh)
    values = []
    for side in range(2):
        c = owner[f, side]
        xi = np.linalg.solve(J[c], (x - x0[c])[..., None])[..., 0]
        bary = np.concatenate([1 - xi.sum(axis=1, keepdims=True), xi], axis=1)
        # the point is on the cell's boundary: one barycentric coordinate ~ 0
        assert np.all(np.abs(bary).min(axis=1) < 1e-12) and bary.min() > -1e-12
        values.append(_evaluate(disc, u, c, xi))
    np.testing.assert_allclose(values[0], values[1], rtol=0, atol=1e-12)


# -- boundary dofs -------------------------------------------------------------------------
SIDES = {"xmin": (0, 0.0), "xmax": (0, 1.0), "ymin": (1, 0.0), "ymax": (1, 1.0),
         "zmin": (2, 0.0), "zmax": (2, 1.0)}


@pytest.mark.parametrize("dim,shuffle,degree", CASES, ids=IDS)
def test_boundary_dofs_of_a_side_are_exactly_the_dofs_on_that_side(dim, shuffle, degree):
    disc = disc_of(dim, shuffle, degree)
    x = disc.dof_points
    names = [n for n, (axis, _) in SIDES.items() if axis < dim]
    for name in names:
        axis, value = SIDES[name]
        want = np.flatnonzero(np.abs(x[:, axis] - value) < 1e-12)
        got = disc.boundary_dofs(name)
        assert got.dtype == np.int64
        np.testing.assert_array_equal(got, want, err_msg=name)
    on_boundary = np.flatnonzero(np.any((x < 1e-12) | (x > 1 - 1e-12), axis=1))
    np.testing.assert_array_equal(disc.boundary_dofs(), on_boundary)
    # a list of tags gives the union
    both = disc.boundary_dofs(["xmin", "ymin"])
    union = np.union1d(disc.boundary_dofs("xmin"), disc.boundary_dofs("ymin"))
    np.testing.assert_array_equal(both, union)
    # count on one side: the dofs of a P_k (d-1)-simplex mesh; for a
    # straight side of a 2D square with n edges that is k n + 1
    if dim == 2:
        n_edges = len(disc.mesh.facet_groups["xmin"])
        assert len(disc.boundary_dofs("xmin")) == degree * n_edges + 1


def test_boundary_dofs_with_an_unknown_tag_raise_naming_the_known_tags():
    disc = disc_of(2, False, 2)
    with pytest.raises(InputError, match=r"no facet tag 'inlet'.*known tags"):
        disc.boundary_dofs("inlet")


# -- bad input ---------------------------------------------------------------------------
def test_interpolate_with_the_wrong_return_shape_raises_input_error():
    disc = disc_of(2, False, 2)
    with pytest.raises(InputError, match=rf"returned shape \(2, {disc.n_dofs}\), expected "
                                         rf"\({disc.n_dofs},\)"):
        disc.interpolate(lambda x: x)
    with pytest.raises(InputError, match="returned shape"):
        disc.interpolate(lambda x: x[0][:-1])


def test_interpolate_with_a_nan_value_names_the_first_bad_dof():
    disc = disc_of(3, True, 3)
    target = disc.n_dofs // 2
    p = disc.dof_points[target]

    def f(x):
        out = np.ones(x.shape[1])
        out[np.all(np.abs(x.T - p) < 1e-14, axis=1)] = np.nan
        out[-1] = np.inf
        return out

    first = min(target, disc.n_dofs - 1)
    with pytest.raises(InputError, match=rf"non-finite value nan at dof {first}\b"):
        disc.interpolate(f)


def test_interpolate_accepts_constants_and_rejects_non_finite_or_non_callable():
    disc = disc_of(2, False, 3)
    np.testing.assert_array_equal(disc.interpolate(2.5), np.full(disc.n_dofs, 2.5))
    np.testing.assert_array_equal(disc.interpolate(lambda x: 4.0), np.full(disc.n_dofs, 4.0))
    with pytest.raises(InputError, match="not finite"):
        disc.interpolate(np.nan)
    with pytest.raises(InputError, match="callable"):
        disc.interpolate(object())
    with pytest.raises(InputError, match="real number"):
        disc.interpolate("x")
    with pytest.raises(InputError, match="real number"):
        disc.interpolate(1j)


def test_discretization_rejects_a_non_mesh_and_an_unsupported_degree():
    with pytest.raises(InputError, match="galerkit Mesh"):
        Discretization(np.zeros((3, 2)), 1)
    with pytest.raises(InputError, match="not supported"):
        Discretization(mesh_of(2, False), 5)


def test_discretization_arrays_are_read_only():
    disc = disc_of(3, False, 2)
    for a in (disc.cell_dofs, disc.dof_points, disc.vertex_dofs):
        assert not a.flags.writeable
