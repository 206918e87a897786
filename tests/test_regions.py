"""Cell regions: ids and names, generators, refinement, interfaces, per-region
coefficients."""

import numpy as np
import pytest

from galerkit import (Assembler, Discretization, Mesh, PoissonProblem, refine_uniform,
                      structured_tetrahedra, structured_triangles)
from galerkit.errors import InputError, MeshError
from galerkit.regions import region_coefficient, region_summary


def left_half(x):
    return x[0] < 0.5


def test_a_mesh_without_regions_has_the_one_region_domain():
    m = structured_triangles(2, 2)
    assert m.region_names == {"domain": 0}
    assert m.regions.dtype == np.int32 and not m.regions.any()
    assert m.interfaces == {}
    assert not m.regions.flags.writeable


def test_predicates_name_regions_and_the_rest_is_domain():
    m = structured_triangles(4, 2, regions={"steel": left_half})
    assert m.region_names == {"domain": 0, "steel": 1}
    c = m.points[m.cells].mean(axis=1)
    assert np.array_equal(m.regions, (c[:, 0] < 0.5).astype(np.int32))
    # cell counts and volumes per region: half of the unit square each
    assert region_summary(m) == [("domain", 0, 8, pytest.approx(0.5)),
                                 ("steel", 1, 8, pytest.approx(0.5))]


def test_ids_by_callable_with_names_and_unnamed_ids_by_number():
    m = structured_triangles(3, 1)
    m.set_regions(lambda x: np.floor(3 * x[0]).astype(int), {"a": 0, "c": 2})
    assert m.region_names == {"a": 0, "1": 1, "c": 2}


@pytest.mark.parametrize("regions, names, match", [
    (lambda x: -np.ones(x.shape[1], dtype=int), None, "region id -1"),
    (lambda x: np.zeros(3, dtype=int), None, "one region id per cell"),
    (lambda x: np.full(x.shape[1], 0.5), None, "not a whole number"),
    (lambda x: np.zeros(x.shape[1], dtype=int), ["default"], "reserved"),
    (lambda x: np.zeros(x.shape[1], dtype=int), {"a": 0, "b": 0}, "named both"),
    ({"a": lambda x: x[0] < 0.6, "b": lambda x: x[0] > 0.4}, None, "selected by both"),
    ({"a": lambda x: x[0] > 5}, None, "selects no cell"),
    ({"a": lambda x: x[0]}, None, "boolean array"),
])
def test_bad_regions_are_refused_with_a_named_cause(regions, names, match):
    with pytest.raises(MeshError, match=match):
        structured_triangles(4, 2, regions=regions, region_names=names)


def test_mesh_constructor_takes_regions():
    m = Mesh([[0, 0], [1, 0], [0, 1], [1, 1]], [[0, 1, 2], [1, 3, 2]], regions=[0, 1],
             region_names=["steel", "foam"])
    assert m.region_names == {"steel": 0, "foam": 1}
    assert list(m.interfaces) == ["steel/foam"]
    assert m.interfaces["steel/foam"].facets.tolist() == [[1, 2]]


def test_refinement_keeps_each_child_in_its_parents_region():
    m = structured_tetrahedra(2, 2, 2, regions={"top": lambda x: x[2] > 0.5})
    f = refine_uniform(refine_uniform(m))
    assert f.region_names == m.region_names
    c = f.points[f.cells].mean(axis=1)
    assert np.array_equal(f.regions, (c[:, 2] > 0.5).astype(np.int32))
    # the interface z = 0.5 of the unit cube: 2 triangles per square, 8 x 8 squares
    itf = f.interfaces["domain/top"]
    assert len(itf) == 2 * 8 * 8
    mid = f.points[itf.facets].mean(axis=1)
    assert np.allclose(mid[:, 2], 0.5)
    assert (f.regions[itf.cells[:, 0]] == 0).all() and (f.regions[itf.cells[:, 1]] == 1).all()


def test_interfaces_2d_count_and_sides():
    m = structured_triangles(4, 3, regions={"steel": left_half})
    itf = m.interfaces["domain/steel"]
    assert len(itf) == 3  # the line x = 0.5 crosses 3 rows of squares
    assert np.allclose(m.points[itf.facets][:, :, 0], 0.5)


def test_region_dict_stiffness_equals_per_cell_values():
    m = structured_triangles(6, 4, regions={"steel": left_half})
    asm = Assembler(Discretization(m, 2))
    per_cell = np.where(m.regions == 1, 50.0, 0.04)
    K = asm.stiffness(per_cell).toarray()
    assert np.array_equal(asm.stiffness({"steel": 50.0, "domain": 0.04}).toarray(), K)
    assert np.array_equal(asm.stiffness({1: 50.0, "default": 0.04}).toarray(), K)
    # a tensor in one region, a number in the other
    Kt = asm.stiffness({"steel": 50.0 * np.eye(2), "domain": 0.04}).toarray()
    assert np.abs(Kt - K).max() <= 1e-14 * np.abs(K).max()
    # a callable region sees only its own cells' points
    seen = []

    def kappa(x):
        seen.append(x.copy())
        return np.full(x.shape[1], 50.0)

    Kc = asm.stiffness({"steel": kappa, "domain": 0.04}).toarray()
    assert np.abs(Kc - K).max() <= 1e-13 * np.abs(K).max()
    assert all((x[0] <= 0.5 + 1e-12).all() for x in seen)


def test_region_source_equals_the_same_field_by_formula():
    m = structured_triangles(6, 4, regions={"steel": left_half})
    asm = Assembler(Discretization(m, 2))
    b = asm.load({"steel": lambda x: 3.0 * x[1], "domain": 2.0})
    ref = asm.load(lambda x: np.where(x[0] < 0.5, 3.0 * x[1], 2.0))
    assert np.abs(b - ref).max() <= 1e-15


@pytest.mark.parametrize("table, match", [
    ({"steel": 1.0}, "no value for region.*'domain'"),
    ({"steel": 1.0, "wood": 2.0, "domain": 1.0}, "no region 'wood'"),
    ({"steel": "hot", "domain": 1.0}, r"conductivity\['steel'\]: expected"),
    ({"steel": float("nan"), "domain": 1.0}, "not finite"),
    ({}, "empty per-region table"),
])
def test_uncovered_or_unknown_regions_are_named(table, match):
    m = structured_triangles(4, 2, regions={"steel": left_half})
    with pytest.raises(InputError, match=match):
        PoissonProblem(m, conductivity=table, dirichlet={"xmin": 0.0})


def test_region_values_are_validated_per_cell():
    m = structured_triangles(4, 2, regions={"steel": left_half})
    with pytest.raises(InputError, match="non-positive value -1.0 in cell"):
        Assembler(Discretization(m, 1)).stiffness({"steel": -1.0, "domain": 1.0})


def test_region_coefficient_follows_a_refined_mesh():
    m = structured_triangles(4, 2, regions={"steel": left_half})
    c = region_coefficient(m, {"steel": 50.0, "domain": 1.0}, "conductivity")
    f = refine_uniform(m)
    K = Assembler(Discretization(f, 1)).stiffness(c).toarray()
    ref = Assembler(Discretization(f, 1)).stiffness(np.where(f.regions == 1, 50.0, 1.0))
    assert np.array_equal(K, ref.toarray())


def test_region_energy_uses_the_region_conductivity():
    # energy of u = x on the unit square with kappa 50 on x < 1/2 and 2 elsewhere:
    # integral kappa |grad u|^2 = 50/2 + 2/2 = 26 (exact arithmetic)
    from galerkit import energy_error
    m = structured_triangles(4, 2, regions={"steel": left_half})
    disc = Discretization(m, 1)
    u = m.points[:, 0].copy()
    e = energy_error(disc, u, exact_gradient=lambda x: np.zeros_like(x),
                     conductivity={"steel": 50.0, "domain": 2.0})
    assert e == pytest.approx(np.sqrt(26.0), rel=1e-13)
