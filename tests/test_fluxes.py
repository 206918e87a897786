"""Boundary and interface heat flow, heat balance, region statistics, probes."""

import numpy as np
import pytest

from galerkit import (PoissonProblem, merge_duplicate_vertices, structured_tetrahedra,
                      structured_triangles)
from galerkit.errors import InputError, MeshError
from galerkit.mesh import Mesh

# Composite wall (Incropera & DeWitt, Fundamentals of Heat and Mass Transfer, ch. 3,
# conduction through a plane composite wall): layers of thickness L1, L2 and
# conductivities k1, k2 in series between T1 and T2 carry the heat flux
# q = (T1 - T2) / (L1/k1 + L2/k2) per unit area, and the temperature is
# piecewise linear, so P1 on a mesh fitting the interface is exact.
L1, L2, K1, K2, T1, T2 = 0.4, 0.6, 50.0, 2.0, 100.0, 20.0
Q_WALL = (T1 - T2) / (L1 / K1 + L2 / K2)


def wall_exact(x):
    t_mid = T1 - Q_WALL * L1 / K1
    return np.where(x[0] <= L1, T1 - Q_WALL * x[0] / K1, t_mid - Q_WALL * (x[0] - L1) / K2)


def wall_problem(mesh):
    return PoissonProblem(mesh, conductivity={"steel": K1, "foam": K2},
                          dirichlet={"xmin": T1, "xmax": T2})


def regions_wall(mesh):
    mesh.set_regions(lambda x: (x[0] > L1).astype(int), ["steel", "foam"])
    return mesh


@pytest.mark.parametrize("dim", [2, 3])
def test_composite_wall_flux_equals_the_series_resistance_formula(dim):
    mesh = regions_wall(structured_triangles(10, 3) if dim == 2 else
                        structured_tetrahedra(5, 2, 2))
    sol = wall_problem(mesh).solve(method="direct")
    # P1 is exact: nodal values equal the piecewise linear profile
    assert np.abs(sol.u - wall_exact(mesh.points.T)).max() <= 1e-11 * T1
    area = 1.0
    for method in ("consistent", "gradient"):
        q_in = sol.boundary_flux("xmin", method)
        q_out = sol.boundary_flux("xmax", method)
        assert q_in == pytest.approx(Q_WALL * area, rel=1e-12)
        assert q_out == pytest.approx(-Q_WALL * area, rel=1e-12)
        assert sol.interface_flux("steel/foam", method) == pytest.approx(Q_WALL, rel=1e-12)
        assert sol.interface_flux("foam/steel", method) == pytest.approx(-Q_WALL, rel=1e-12)
    assert sol.boundary_flux("ymax") == 0.0


def test_region_statistics_of_the_composite_wall():
    mesh = regions_wall(structured_triangles(10, 3))
    sol = PoissonProblem(mesh, conductivity={"steel": K1, "foam": K2},
                         source={"steel": 0.0, "foam": 0.0},
                         dirichlet={"xmin": T1, "xmax": T2}).solve(method="direct")
    steel, foam = sol.region_statistics()
    assert (steel.name, steel.n_cells, foam.name, foam.n_cells) == ("steel", 24, "foam", 36)
    assert steel.volume == pytest.approx(L1, rel=1e-14) and foam.volume == pytest.approx(L2)
    # linear in each layer: the mean is the value at the layer's middle
    assert steel.u_mean == pytest.approx(float(wall_exact(np.array([[L1 / 2]]))[0]), rel=1e-12)
    assert foam.u_mean == pytest.approx(float(wall_exact(np.array([[L1 + L2 / 2]]))[0]),
                                        rel=1e-12)
    assert steel.u_max == pytest.approx(T1) and foam.u_min == pytest.approx(T2)
    assert steel.source == 0.0


def test_region_source_integrals():
    # source 3 on x < 0.4 and 2 + y on the rest of the unit square:
    # integrals 3 * 0.4 = 1.2 and 0.6 * (2 + 1/2) = 1.5 (exact arithmetic)
    mesh = regions_wall(structured_triangles(10, 4))
    sol = PoissonProblem(mesh, source={"steel": 3.0, "foam": lambda x: 2 + x[1]},
                         dirichlet={"xmin": 0.0}).solve(degree=2, method="direct")
    steel, foam = sol.region_statistics()
    assert steel.source == pytest.approx(1.2, rel=1e-13)
    assert foam.source == pytest.approx(1.5, rel=1e-13)


def annulus(n, r1, r2, quarter=True):
    """Quarter annulus r1 < r < r2, 0 < theta < pi/2 from a mapped rectangle;
    tags 'inner', 'outer', and the two straight sides."""
    m = structured_triangles(n, 2 * n, (r1, 0.0), (r2, np.pi / 2))
    r, t = m.points[:, 0], m.points[:, 1]
    mesh = Mesh(np.stack([r * np.cos(t), r * np.sin(t)], axis=1), m.cells)
    x = mesh.facet_midpoints()
    rr = np.hypot(x[0], x[1])
    mesh.tag_boundary("inner", lambda x: np.hypot(x[0], x[1]) < (r1 + (r2 - r1) / (2 * n)))
    mesh.tag_boundary("outer", lambda x: np.hypot(x[0], x[1]) > (r2 - (r2 - r1) / (2 * n)))
    del rr
    return mesh


def test_hollow_cylinder_flux_converges_at_the_expected_rates():
    # Hollow cylinder (Incropera & DeWitt, ch. 3, radial conduction): heat per unit
    # length 2 pi k (T1 - T2) / ln(r2/r1); a quarter of it through the quarter.
    r1, r2, k = 1.0, 2.0, 3.0
    exact = 2 * np.pi * k * (T1 - T2) / np.log(r2 / r1) / 4
    errs = {"consistent": [], "gradient": []}
    for n in (4, 8, 16, 32):
        sol = PoissonProblem(annulus(n, r1, r2), conductivity=k,
                             dirichlet={"inner": T1, "outer": T2}).solve(method="direct")
        for method in errs:
            errs[method].append(abs(sol.boundary_flux("inner", method) - exact) / exact)
    rate = {m: np.log2(np.array(e[:-1]) / np.array(e[1:])) for m, e in errs.items()}
    assert rate["consistent"][-1] == pytest.approx(2.0, abs=0.15)
    assert rate["gradient"][-1] == pytest.approx(1.0, abs=0.15)
    assert errs["consistent"][-1] < 1e-3


@pytest.mark.parametrize("degree", [1, 2, 3])
def test_consistent_fluxes_of_all_tags_sum_to_minus_the_source(degree):
    # integral of f = 1 + x y over the unit square = 1 + 1/4 (exact), and the load
    # integrates it exactly for every degree here; steady state: the heat entering
    # through the boundary balances the heat made inside.
    mesh = structured_triangles(8, 6)
    sol = PoissonProblem(
        mesh, conductivity=lambda x: 1 + x[0] ** 2, source=lambda x: 1 + x[0] * x[1],
        dirichlet={"xmin": lambda x: x[1]}, neumann={"ymax": lambda x: np.sin(x[0])},
        robin={"xmax": (3.0, lambda x: 2 + x[1])}).solve(degree=degree, method="direct")
    total = sum(sol.boundary_flux(t) for t in ("xmin", "ymax", "xmax", "ymin"))
    assert abs(total + 1.25) <= 1e-12
    hb = sol.heat_balance()
    assert hb.source == pytest.approx(1.25, rel=1e-14)
    assert abs(hb.imbalance) <= 1e-12 and hb.relative <= 1e-13
    assert set(hb.flows) == {"xmin", "ymax", "xmax"}
    # the Neumann flux is the given one: integral of sin x over (0, 1) = 1 - cos 1,
    # by the facet rule of degree 2k + 1
    assert sol.boundary_flux("ymax") == pytest.approx(1 - np.cos(1.0), rel=1e-6)
    assert sol.boundary_flux("ymin") == 0.0


def test_balance_with_regions_and_two_dirichlet_tags_in_3d():
    mesh = structured_tetrahedra(2, 2, 4, regions={"core": lambda x: x[2] < 0.5})
    sol = PoissonProblem(mesh, conductivity={"core": 5.0, "domain": np.diag([1.0, 2.0, 3.0])},
                         source={"core": lambda x: 1 + x[0], "domain": 2.0},
                         dirichlet={"zmin": 0.0, "zmax": 1.0},
                         robin={"xmin": (2.0, 0.5)}).solve(degree=2, method="direct")
    # integral of the source: (1 + 1/2) / 2 + 2 / 2 = 1.75 (exact)
    hb = sol.heat_balance()
    assert hb.source == pytest.approx(1.75, rel=1e-13)
    assert abs(hb.imbalance) <= 1e-12
    assert sol.boundary_flux("boundary") == pytest.approx(-1.75, rel=1e-12)
    # the heat leaving the core through the interface is what it makes plus what
    # enters it through its own boundary facets (its balance), and the heat
    # entering the rest of the box through the interface is the same amount
    from galerkit.fluxes import facet_fluxes
    core = mesh.regions[mesh.boundary_facet_cells] == mesh.region_names["core"]
    stats = {r.name: r for r in sol.region_statistics()}
    leaving = sol.interface_flux("core/domain")
    assert leaving == pytest.approx(stats["core"].source + facet_fluxes(sol)[core].sum(),
                                    rel=1e-12)
    assert sol.interface_flux("domain/core") == pytest.approx(-leaving, rel=1e-12)
    assert stats["core"].source == pytest.approx(0.75, rel=1e-13)
    # the gradient flux differs by the discretisation error only
    assert sol.interface_flux("core/domain", "gradient") == pytest.approx(leaving, rel=1e-2)


def test_flux_errors_name_the_cause():
    sol = PoissonProblem(structured_triangles(2, 2), dirichlet={"xmin": 0.0}).solve()
    with pytest.raises(MeshError, match="no facet tag 'inlet'"):
        sol.boundary_flux("inlet")
    with pytest.raises(InputError, match="flux method"):
        sol.boundary_flux("xmin", "average")
    with pytest.raises(InputError, match="no interface 'a/b'.*none"):
        sol.interface_flux("a/b")


def test_probes_at_vertices_equal_the_nodal_values_and_outside_is_named():
    mesh = structured_triangles(4, 4)
    sol = PoissonProblem(mesh, source=1.0, dirichlet={"boundary": 0.0}).solve(degree=2)
    pts = mesh.points[[0, 7, 12]].T
    vals = sol.evaluate(pts)
    assert np.array_equal(vals, sol.u[sol.disc.vertex_dofs[[0, 7, 12]]]) or \
        np.abs(vals - sol.u[sol.disc.vertex_dofs[[0, 7, 12]]]).max() <= 1e-15
    with pytest.raises(InputError, match=r"point 1 at \[2.0, 0.5\] lies outside the mesh"):
        sol.evaluate(np.array([[0.5, 2.0], [0.5, 0.5]]))


def test_merged_annulus_full_circle():
    # full annulus: the seam theta = 0 = 2 pi joined; the flux through the inner
    # circle approaches 2 pi k (T1 - T2) / ln(r2/r1) (Incropera & DeWitt, ch. 3)
    n = 16
    m = structured_triangles(n, 8 * n, (1.0, 0.0), (2.0, 2 * np.pi))
    r, t = m.points[:, 0], m.points[:, 1]
    p, c, _ = merge_duplicate_vertices(np.stack([r * np.cos(t), r * np.sin(t)], axis=1),
                                       m.cells)
    mesh = Mesh(p, c)
    mesh.tag_boundary("inner", lambda x: np.hypot(x[0], x[1]) < 1.01)
    mesh.tag_boundary("outer", lambda x: np.hypot(x[0], x[1]) > 1.99)
    sol = PoissonProblem(mesh, dirichlet={"inner": 1.0, "outer": 0.0}).solve(method="direct")
    exact = 2 * np.pi / np.log(2.0)
    assert sol.boundary_flux("inner") == pytest.approx(exact, rel=2e-3)
    assert sol.boundary_flux("outer") == pytest.approx(-sol.boundary_flux("inner"), rel=1e-12)
