"""Adaptive refinement driven by the bound (galerkit.adaptivity).

Sources: Doerfler (1996) for the marking; Binev, Dahmen & DeVore (2004) and
Stevenson (2007): adaptive P1 reaches the optimal rate N^(-1/2) in 2D on the
L-shape, where uniform refinement is limited to N^(-1/3) by the r^(2/3)
singularity (Strang & Fix 1973); Prager & Synge (1947): bound >= error.
"""

import math

import numpy as np
import pytest

import galerkit as gk
from galerkit.adaptivity import doerfler_marking
from galerkit.errors import InputError, UnsupportedError

from singular_cases import Kellogg, energy_error_by_green, lshape_flux, lshape_grad, lshape_u


def _lshape(n=2):
    mesh = gk.l_shaped_triangles(n)
    mesh.tag_boundary("outer", lambda x: (np.abs(np.abs(x[0]) - 1) < 1e-9)
                      | (np.abs(np.abs(x[1]) - 1) < 1e-9))
    mesh.tag_boundary("corner", lambda x: (np.abs(x[0]) < 1e-9) | (np.abs(x[1]) < 1e-9))
    return gk.PoissonProblem(mesh, neumann={"outer": lshape_flux}, dirichlet={"corner": 0.0})


def test_adaptive_lshape_reaches_the_optimal_rate_and_uniform_stays_reduced():
    run = gk.adapt(_lshape(), max_dofs=12000, max_levels=40)
    assert run.stopped == "max_dofs"
    n, b = run.table.column("n_dofs"), run.table.column("bound")
    rate = np.polyfit(np.log(n[-5:]), np.log(b[-5:]), 1)[0]
    assert abs(rate + 0.5) <= 0.05, rate
    for sol, est in zip(run.solutions, run.estimates):  # guaranteed on every level
        m = sol.mesh  # the error by Green's identity
        err = energy_error_by_green(m.points, m.cells, m.boundary_facets, 1.0, sol.u, lshape_u,
                                    lshape_flux)
        assert est.bound >= err and est.bound / err <= 3.0
    assert run.table.column("min_angle").min() >= gk.min_angles(run.meshes[0]).min() - 1e-9
    uniform = []
    for k in (4, 8, 16, 32):
        sol = _lshape(k).solve()
        uniform.append((sol.disc.n_dofs, gk.estimate_error(sol).bound))
    nu, bu = np.array(uniform).T
    rate_u = np.polyfit(np.log(nu), np.log(bu), 1)[0]
    assert abs(rate_u + 1 / 3) <= 0.05, rate_u


def test_adaptive_kellogg_bound_stays_above_the_error_with_effectivity_below_3():
    case = Kellogg()
    mesh = gk.structured_triangles(4, 4, (-1, -1), (1, 1))
    mesh.set_regions(lambda x: (x[0] * x[1] > 0).astype(int), ["one", "R"])
    mesh.tag_boundary("all", lambda x: np.ones(x.shape[1], bool))
    run = gk.adapt(gk.PoissonProblem(mesh, conductivity={"one": 1.0, "R": case.R},
                                     neumann={"all": case.flux}), max_dofs=3000, max_levels=30)
    for sol, est in zip(run.solutions, run.estimates):
        m = sol.mesh
        kap = np.where(m.regions == m.region_names["R"], case.R, 1.0)
        err = energy_error_by_green(m.points, m.cells, m.boundary_facets, kap, sol.u, case.u,
                                    case.flux)
        assert est.bound >= err, (m.n_cells, est.bound, err)
    assert est.bound / err <= 3.0, est.bound / err


def test_stops_at_the_tolerance_and_the_table_prints():
    run = gk.adapt(_lshape(), relative_tol=0.2, max_levels=40)
    assert run.stopped == "relative_tol"
    last = run.estimates[-1]
    assert last.bound <= 0.2 * last.energy_norm
    assert run.estimates[-2].bound > 0.2 * run.estimates[-2].energy_norm
    md, text = run.table.to_markdown(), run.table.to_csv()
    assert md.count("\n") == len(run.solutions) + 1
    assert text.splitlines()[0].startswith("level,n_cells,n_dofs,bound")
    run2 = gk.adapt(_lshape(), tol=run.estimates[1].bound * 1.0000001, max_levels=40)
    assert run2.stopped == "tol" and len(run2.solutions) <= 2


def test_doerfler_marking_takes_the_fewest_largest_cells():
    # Doerfler 1996: smallest set with sum of squares >= bulk * total
    eta = np.array([1.0, 3.0, 2.0, 0.5])  # squares 1, 9, 4, 0.25 (total 14.25)
    assert doerfler_marking(eta, 0.5).tolist() == [1]        # 9 >= 7.125
    assert doerfler_marking(eta, 0.7).tolist() == [1, 2]     # 13 >= 9.975
    assert doerfler_marking(eta, 1.0).tolist() == [0, 1, 2, 3]


@pytest.mark.parametrize("bulk", [0.05, 0.5, 0.9, 0.999])
def test_doerfler_marking_of_many_cells_is_the_smallest_set_of_the_largest(bulk):
    # Doerfler 1996: the fewest cells whose squared indicators reach bulk * total; ties
    # at the threshold go to the lower cell numbers.  Checked from the definition with
    # Python's sorted and math.fsum, on values with many ties; the bulks need from a
    # few to nearly all cells, so the partial selection must grow its candidate set
    rng = np.random.default_rng(11)
    eta = np.round(rng.random(60_000) ** 3, 3)
    got = doerfler_marking(eta, bulk)
    e2 = eta**2
    total = math.fsum(e2)
    ranked = sorted(range(eta.size), key=lambda i: (-e2[i], i))
    assert np.array_equal(got, np.sort(ranked[:got.size]))  # the first of the ranking
    marked = math.fsum(e2[got])
    assert marked >= bulk * total * (1 - 1e-12)
    assert marked - e2[ranked[got.size - 1]] < bulk * total * (1 + 1e-12)  # none fewer


def test_doerfler_marking_refuses_indicators_that_are_not_finite():
    with pytest.raises(InputError, match="cell 2"):
        doerfler_marking(np.array([1.0, 2.0, np.nan, 3.0]))


def test_bad_parameters_are_refused():
    p = _lshape()
    with pytest.raises(InputError, match="bulk"):
        gk.adapt(p, bulk=1.5)
    with pytest.raises(InputError, match="max_dofs"):
        gk.adapt(p, max_dofs=0)
    with pytest.raises(InputError, match="degree"):
        gk.adapt(p, degree=5)
    with pytest.raises(UnsupportedError, match="tetrahedra"):
        gk.adapt(gk.PoissonProblem(gk.structured_tetrahedra(1, 1, 1), source=1.0,
                                   dirichlet={"boundary": 0.0}), degree=2)
    with pytest.raises(InputError, match="PoissonProblem"):
        gk.adapt(p.mesh)
