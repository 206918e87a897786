"""asv benchmarks of the solvers on the reduced Poisson system.

-Laplace(u) = 1 on the unit square / cube, u = 0 on the boundary, Dirichlet
dofs eliminated, CG to relative residual 1e-8.  Sizes as in
``bench_assembly`` (about one million dofs at ``GALERKIT_BENCH_SCALE=1``),
plus ``tri-P3`` (structured_triangles(235, 235): ~500k dofs).

``cg-amg`` is ours (for degree >= 2 with the nested P1 coarse space, as
``PoissonProblem.solve`` passes it); ``cg-pyamg`` is PyAMG's V-cycle in our
CG loop.  ``benchmarks/compare_solvers.py`` prints the same comparison side
by side with ratios, each row in its own process.
"""

from __future__ import annotations

import galerkit as gk

try:
    from .bench_assembly import CASES as _ASSEMBLY_CASES, scale
    from .compare import cells_per_axis
    from .compare_solvers import system
except ImportError:  # run as a plain module
    from bench_assembly import CASES as _ASSEMBLY_CASES, scale
    from compare import cells_per_axis
    from compare_solvers import system

CASES = dict(_ASSEMBLY_CASES, **{"tri-P3": (2, 3, 235)})
RTOL = 1e-8


def reduced_system(case):
    dim, degree, full = CASES[case]
    return system(dim, degree, cells_per_axis(full, dim, scale()))


class Solvers:
    """Set-up (hierarchy) and solve of cg-amg and cg-pyamg."""

    params = (list(CASES), ["cg-amg", "cg-pyamg"])
    param_names = ["case", "solver"]
    timeout = 900
    number = 1
    repeat = (1, 3, 60.0)

    def setup(self, case, solver):
        self.A, self.b, coarse = reduced_system(case)
        self.options = {"coarse_space": coarse} if solver == "cg-amg" and coarse is not None \
            else {}
        self.prepared = gk.prepare_solver(self.A, solver, **self.options)

    def time_setup(self, case, solver):
        gk.prepare_solver(self.A, solver, **self.options)

    def time_solve(self, case, solver):
        self.prepared.solve(self.b, rtol=RTOL)

    def peakmem_setup_and_solve(self, case, solver):
        gk.prepare_solver(self.A, solver, **self.options).solve(self.b, rtol=RTOL)

    def track_iterations(self, case, solver):
        return self.prepared.solve(self.b, rtol=RTOL).iterations

    def track_operator_complexity(self, case, solver):
        return self.prepared.solve(self.b, rtol=RTOL).options["operator_complexity"]


class Refresh:
    """cg-amg's numeric-only refresh against a new set-up, same pattern (time loops)."""

    params = ["tet-P1", "tri-P1"]
    param_names = ["case"]
    timeout = 600
    number = 1
    repeat = (1, 3, 60.0)

    def setup(self, case):
        self.A, self.b, _ = reduced_system(case)
        self.prepared = gk.prepare_solver(self.A, "cg-amg")

    def time_refresh(self, case):
        self.prepared.refresh(self.A)

    def time_new_setup(self, case):
        gk.prepare_solver(self.A, "cg-amg")
