"""Problems solved by the distributed engine in the tests, and the MPI driver.

Imported by ``tests/test_distributed.py`` (the serial reference) and run as

    mpiexec -n N python tests/mpi_cases.py OUTPUT_FOLDER

which solves every case on N ranks with the petsc engine and writes, on rank
0, ``OUTPUT_FOLDER/CASE.npz`` with the gathered solution (serial dof
numbering), the errors, the report and the ownership checks.

Functions are module-level so that they pickle (the engine sends the
coefficients to the ranks by pickling).

Manufactured solutions (method of manufactured solutions, Roache 2002):
``u = sin(pi x) exp(y)`` in 2D, ``-lap u = (pi^2 - 1) u``; ``u = sin(pi x)
sin(pi y) exp(z)`` in 3D, ``-lap u = (2 pi^2 - 1) u``; ``u = cos(pi x) cos(pi y)``
with zero normal derivative and zero mean on the unit square, ``-lap u = 2 pi^2
u`` (pure Neumann); derivatives by hand,
checked by SymPy in ``test_distributed.py``.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np

import galerkit as gk

PI = np.pi


def exact_2d(x):
    return np.sin(PI * x[0]) * np.exp(x[1])


def grad_2d(x):
    e = np.exp(x[1])
    return np.array([PI * np.cos(PI * x[0]) * e, np.sin(PI * x[0]) * e])


def source_2d(x):
    return (PI**2 - 1.0) * exact_2d(x)


def exact_3d(x):
    return np.sin(PI * x[0]) * np.sin(PI * x[1]) * np.exp(x[2])


def grad_3d(x):
    e = np.exp(x[2])
    return np.array([PI * np.cos(PI * x[0]) * np.sin(PI * x[1]) * e,
                     PI * np.sin(PI * x[0]) * np.cos(PI * x[1]) * e,
                     np.sin(PI * x[0]) * np.sin(PI * x[1]) * e])


def source_3d(x):
    return (2 * PI**2 - 1.0) * exact_3d(x)


def exact_neumann(x):
    return np.cos(PI * x[0]) * np.cos(PI * x[1])


def grad_neumann(x):
    return np.array([-PI * np.sin(PI * x[0]) * np.cos(PI * x[1]),
                     -PI * np.cos(PI * x[0]) * np.sin(PI * x[1])])


def source_neumann(x):
    return 2 * PI**2 * exact_neumann(x)


def conductivity_mixed(x):
    return 1.0 + x[0] + 0.5 * x[1]


def robin_ambient(x):
    return 1.0 + 0.25 * x[1]


def case(name):
    """(problem, degree, exact, exact_gradient) of a named case."""
    if name == "square-p1":
        mesh = gk.structured_triangles(24, 24)
        return (gk.PoissonProblem(mesh, source=source_2d, dirichlet={"boundary": exact_2d}),
                1, exact_2d, grad_2d)
    if name == "square-p2":
        mesh = gk.structured_triangles(10, 10)
        return (gk.PoissonProblem(mesh, source=source_2d, dirichlet={"boundary": exact_2d}),
                2, exact_2d, grad_2d)
    if name == "cube-p1":
        mesh = gk.structured_tetrahedra(8, 8, 8)
        return (gk.PoissonProblem(mesh, source=source_3d, dirichlet={"boundary": exact_3d}),
                1, exact_3d, grad_3d)
    if name == "cube-p2":
        mesh = gk.structured_tetrahedra(4, 4, 4)
        return (gk.PoissonProblem(mesh, source=source_3d, dirichlet={"boundary": exact_3d}),
                2, exact_3d, grad_3d)
    if name == "mixed-conditions":
        # Dirichlet, Neumann and Robin terms and a varying conductivity: the
        # comparison is with the serial engine on the same problem
        mesh = gk.structured_triangles(20, 16)
        problem = gk.PoissonProblem(mesh, conductivity=conductivity_mixed, source=1.0,
                                    dirichlet={"xmin": 0.0}, neumann={"ymax": 0.5},
                                    robin={"xmax": (2.0, robin_ambient)})
        return problem, 2, None, None
    if name == "pure-neumann":
        # du/dn = 0 on the whole boundary and zero mean: the free constant is
        # fixed by the mean, as in serial
        mesh = gk.structured_triangles(16, 16)
        return gk.PoissonProblem(mesh, source=source_neumann), 2, exact_neumann, grad_neumann
    raise KeyError(name)


CASES = ("square-p1", "square-p2", "cube-p1", "cube-p2", "mixed-conditions", "pure-neumann")


def run_all(folder):
    from mpi4py import MPI

    from galerkit.bindings.distributed.petsc_engine import solve_distributed, write_pieces

    comm = MPI.COMM_WORLD
    folder = Path(folder)
    for name in CASES:
        problem, degree, exact, grad = case(name) if comm.rank == 0 else (None, 1, None, None)
        degree = comm.bcast(degree, root=0)
        sol = solve_distributed(problem if comm.rank == 0 else None, degree, rtol=1e-12,
                                exact=exact, exact_gradient=grad)
        u = sol.gather()
        # ownership: every dof of the ranks owned once (gather checks it too),
        # and every ghost value equal to its owner's
        owned_total = comm.allreduce(int(sol.owned.sum()))
        ghost_ids = sol.global_dofs[~sol.owned]
        ghost_vals = sol.u[~sol.owned]
        gathered = comm.gather((ghost_ids, ghost_vals), root=0)
        # the piece folder does not exist yet: write_pieces creates it
        index = write_pieces(folder / name / "pieces", name, sol)
        if comm.rank == 0:
            ghost_gap = max([float(np.abs(u[i] - v).max()) if len(i) else 0.0
                             for i, v in gathered] or [0.0])
            np.savez(folder / f"{name}.npz", u=u, owned_total=owned_total,
                     ghost_gap=ghost_gap, n_dofs=sol.n_dofs,
                     ghosts=np.array([len(i) for i, _ in gathered]),
                     report=json.dumps(sol.report), errors=json.dumps(sol.errors),
                     partition=json.dumps(sol.partition), index=str(index))


if __name__ == "__main__":
    run_all(sys.argv[1])
