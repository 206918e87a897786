"""Specification of the partition and the distributed numbering, on one process.

No MPI here: the distributed engine's set-up (:func:`prepare_parts`) and each
rank's assembly (:func:`assemble_part`) are plain functions, so the sum of
every part's reduced system is checked against the serial reduced system
directly.  The only outside facts used are of the trade: a global matrix is
the sum of its cell contributions, and Dirichlet lifting is linear in them
(common practice; Hughes, The Finite Element Method, 2000, ch. 1-2).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp

import galerkit as gk
from galerkit.boundary import DirichletElimination
from galerkit.bindings.distributed.partition import (coordinate_bisection, dof_layout, local_part,
                                         partition_cells, partition_report)
from galerkit.bindings.distributed.petsc_engine import (_local_mesh, _local_to_part, assemble_part,
                                            constrain_part, mean_sums, neumann_sums,
                                            parse_petsc_options, prepare_parts,
                                            shift_to_zero_mean)
from galerkit.errors import InputError, ProblemError

import mpi_cases


# -- cells ------------------------------------------------------------------------
@pytest.mark.parametrize("n_parts", [1, 2, 3, 5, 7, 8, 13, 64])
def test_bisection_balances_cells_within_one_per_level(n_parts):
    mesh = gk.structured_tetrahedra(6, 5, 4)
    parts = partition_cells(mesh, n_parts)
    counts = np.bincount(parts, minlength=n_parts)
    assert counts.size == n_parts and counts.sum() == mesh.n_cells
    levels = int(np.ceil(np.log2(n_parts))) if n_parts > 1 else 0
    assert counts.max() - counts.min() <= max(levels, 0) + 1


def test_bisection_splits_a_line_into_contiguous_pieces():
    x = np.column_stack([np.random.default_rng(3).permutation(30).astype(float), np.zeros(30)])
    parts = coordinate_bisection(x, 3)
    for p in range(3):
        xs = x[parts == p, 0]
        assert xs.max() - xs.min() == xs.size - 1  # consecutive integers


def test_bisection_refuses_more_parts_than_cells():
    with pytest.raises(InputError, match="cannot split a mesh of 2 cells into 3 parts"):
        partition_cells(gk.Mesh([[0, 0], [1, 0], [0, 1], [1, 1]], [[0, 1, 2], [1, 3, 2]]), 3)


# -- dofs -------------------------------------------------------------------------
@pytest.mark.parametrize("dim,degree,n_parts", [(2, 1, 3), (2, 3, 4), (3, 1, 5), (3, 2, 3)])
def test_every_dof_has_one_owner_among_the_parts_touching_it(dim, degree, n_parts):
    mesh = gk.structured_triangles(9, 7) if dim == 2 else gk.structured_tetrahedra(4, 3, 3)
    disc = gk.Discretization(mesh, degree)
    parts = partition_cells(mesh, n_parts)
    fixed = disc.boundary_dofs("xmin")
    lay = dof_layout(disc, parts, n_parts, fixed)
    touching = [set() for _ in range(disc.n_dofs)]
    for c, row in enumerate(disc.cell_dofs):
        for i in row:
            touching[i].add(int(parts[c]))
    assert all(int(lay.owner[i]) in touching[i] for i in range(disc.n_dofs))
    # distributed rows: a permutation of 0..N-1 over the free dofs, each in its owner's range
    free = np.flatnonzero(~lay.fixed)
    assert np.array_equal(np.sort(lay.global_index[free]), np.arange(free.size))
    assert (lay.global_index[fixed] == -1).all()
    g, o = lay.global_index[free], lay.owner[free]
    assert ((lay.offsets[o] <= g) & (g < lay.offsets[o + 1])).all()
    # the parts' owned dofs cover every dof exactly once
    seen = np.zeros(disc.n_dofs, dtype=int)
    for r in range(n_parts):
        part = local_part(disc, lay, r)
        seen[part.dofs[part.owned]] += 1
        assert part.n_ghosts == int((~part.owned).sum())
    assert (seen == 1).all()


@pytest.mark.parametrize("dim,degree", [(2, 1), (2, 2), (2, 4), (3, 1), (3, 2), (3, 3)])
def test_rank_meshes_number_their_dofs_like_the_global_numbering(dim, degree):
    # the orientation rule of Discretization uses sorted global vertex numbers;
    # a rank's mesh keeps the vertex order, so its own numbering maps onto the
    # global one (_local_to_part raises otherwise)
    mesh = gk.structured_triangles(7, 6) if dim == 2 else gk.structured_tetrahedra(3, 3, 2)
    disc = gk.Discretization(mesh, degree)
    lay = dof_layout(disc, partition_cells(mesh, 3), 3)
    for r in range(3):
        part = local_part(disc, lay, r)
        local_mesh = _local_mesh(part, dim)
        ldisc = gk.Discretization(local_mesh, degree)
        l2p = _local_to_part(ldisc, part)
        np.testing.assert_allclose(ldisc.dof_points, disc.dof_points[part.dofs[l2p]], atol=0)
        # each tagged facet of the rank is the same vertex set as globally
        for tag, ids in local_mesh.facet_groups.items():
            local_sets = np.sort(part.vertices[local_mesh.boundary_facets[ids]], axis=1)
            gids = mesh.facet_groups[tag]
            mine = lay.parts[mesh.boundary_facet_cells[gids]] == r
            global_sets = np.sort(mesh.boundary_facets[gids[mine]], axis=1)
            assert sorted(map(tuple, local_sets)) == sorted(map(tuple, global_sets))


def _serial_reduced(problem, degree):
    """The serial engine's reduced system (PoissonProblem.solve's steps, without solving)."""
    disc = gk.Discretization(problem.mesh, degree)
    asm = gk.Assembler(disc)
    elim, Af, bf, _, _, _ = problem.constrain(asm, *problem.assemble(asm))
    return disc, elim, Af, bf


def _parts_systems(problem, degree, n_parts):
    """Every part's reduced system, the ranks' sums done by hand."""
    header, payloads = prepare_parts(problem, degree, n_parts)
    payloads = list(payloads)
    systems = [assemble_part(part, data, header["dim"], degree) for part, data in payloads]
    totals = sum(neumann_sums(s) for s in systems) if header["floating"] else None
    return header, payloads, [constrain_part(s, totals) for s in systems]


@pytest.mark.parametrize("name", mpi_cases.CASES)
@pytest.mark.parametrize("n_parts", [1, 2, 3, 7])
def test_sum_of_the_parts_systems_is_the_serial_system(name, n_parts):
    problem, degree, exact, grad = mpi_cases.case(name)
    header, payloads, systems = _parts_systems(problem, degree, n_parts)
    N = header["n_global"]
    rows, cols, vals = [], [], []
    b = np.zeros(N)
    for s in systems:
        counts = np.diff(s.A.indptr)
        rows.append(np.repeat(s.rows, counts))
        cols.append(s.rows[s.A.indices])
        vals.append(s.A.data)
        np.add.at(b, s.rows, s.b)
        assert s.rows.min() >= 0 and s.rows.max() < N
    A = sp.coo_array((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))),
                     shape=(N, N)).tocsr()
    disc, elim, Af, bf = _serial_reduced(problem, degree)
    # serial free dof elim.free[i] has distributed row p[i]
    lay_rows = np.full(disc.n_dofs, -1)
    for part, _ in payloads:
        lay_rows[part.dofs] = part.global_index
    p = lay_rows[elim.free]
    assert np.array_equal(np.sort(p), np.arange(N))
    P = sp.csr_array((np.ones(N), (p, np.arange(N))), shape=(N, N))
    serial_A = (P @ Af @ P.T).tocsr()
    scale = abs(Af).max()
    assert abs(A - serial_A).max() <= 1e-13 * scale
    serial_b = np.empty(N)
    serial_b[p] = bf
    np.testing.assert_allclose(b, serial_b, rtol=0, atol=1e-13 * np.abs(bf).max())


def test_parts_shift_a_pure_neumann_solution_to_the_serial_zero_mean():
    problem, degree, _, _ = mpi_cases.case("pure-neumann")
    serial = problem.solve(degree=degree, method="direct")
    _, _, systems = _parts_systems(problem, degree, 3)
    # give every part the serial solution plus a constant: the shift removes it
    us = []
    for s in systems:
        glob = s.part.dofs[s.l2p]
        us.append(serial.u[glob] + 0.75)
    totals = sum(mean_sums(s, u) for s, u in zip(systems, us))
    for s, u in zip(systems, us):
        shift_to_zero_mean(s, u, totals)
        np.testing.assert_allclose(u, serial.u[s.part.dofs[s.l2p]], rtol=0, atol=1e-13)


def test_incompatible_pure_neumann_data_are_refused_by_the_parts():
    mesh = gk.structured_triangles(6, 6)
    problem = gk.PoissonProblem(mesh, source=1.0, neumann={"xmin": 0.25})
    with pytest.raises(ProblemError, match="incompatible data.*must vanish"):
        _parts_systems(problem, 1, 2)


def test_partition_report_of_a_box_counts_the_interface():
    # a 2-part bisection of an n^3 box of tetrahedra cuts it across one axis
    # through the middle: (n+1)^2 interface vertices, each a ghost of exactly
    # one side, and 2 n^2 cut facets (two triangles per square of the cut
    # plane); counting on the structured grid (common practice)
    n = 8
    disc = gk.Discretization(gk.structured_tetrahedra(n, n, n), 1)
    rep = partition_report(disc, partition_cells(disc.mesh, 2), 2)
    assert rep.cells.tolist() == [3 * n**3, 3 * n**3]
    assert rep.ghosts.sum() == (n + 1) ** 2
    assert rep.cut_facets == 2 * n * n
    assert rep.neighbours.tolist() == [1, 1]
    assert rep.owned.sum() == disc.n_dofs


@pytest.mark.parametrize("n_parts", [2, 4, 8, 16, 32, 64])
def test_partition_report_for_many_parts_without_running_them(n_parts):
    disc = gk.Discretization(gk.structured_tetrahedra(16, 16, 16), 1)
    rep = partition_report(disc, partition_cells(disc.mesh, n_parts), n_parts)
    assert rep.cell_balance <= 1.0 + n_parts / disc.mesh.n_cells * 8
    # owned dofs follow the cells up to the shared interface dofs, which are
    # split between the parts: at 64 parts of this box (77 dofs a part) the
    # interface is a third of a part (measured 1.26)
    assert rep.dof_balance < 1.0 + 1.5 * rep.ghosts.max() / rep.owned.mean()
    assert 0 < rep.cut_facets < rep.n_interior_facets
    assert (rep.ghosts > 0).all() and (rep.neighbours >= 1).all()
    # while parts are large against their surface (here up to 16 parts of
    # this 4913-dof box), the halo is smaller than the part
    if n_parts <= 16:
        assert rep.ghosts.max() < rep.owned.min()


# -- inputs -----------------------------------------------------------------------
def test_prepare_refuses_coefficients_that_cannot_be_sent():
    mesh = gk.structured_triangles(4, 4)
    problem = gk.PoissonProblem(mesh, source=lambda x: x[0], dirichlet={"boundary": 0.0})
    with pytest.raises(InputError, match="cannot be pickled.*module-level functions"):
        prepare_parts(problem, 1, 2)


def test_prepare_cuts_per_cell_conductivity_to_each_part():
    mesh = gk.structured_triangles(6, 6)
    kappa = 1.0 + np.arange(mesh.n_cells, dtype=float)
    problem = gk.PoissonProblem(mesh, conductivity=kappa, dirichlet={"boundary": 1.0})
    _, payloads = prepare_parts(problem, 1, 3)
    for part, data in list(payloads):
        np.testing.assert_array_equal(data["conductivity"], kappa[part.cells])


@pytest.mark.parametrize("text,message", [
    ("ksp_type gmres", "is not an option name"),
    ("-ksp_type 'gmres", "No closing quotation"),
])
def test_petsc_options_are_checked(text, message):
    with pytest.raises(InputError, match=message):
        parse_petsc_options(text)
