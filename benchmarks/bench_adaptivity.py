"""asv benchmarks of one adaptive level beyond the solve: estimate, mark, refine.

P1 on the L-shaped domain (unit source, u = 0 on the boundary), about one million
dofs at ``GALERKIT_BENCH_SCALE=1`` (``l_shaped_triangles(577)``); the solve is timed
beside them, since the target is estimate + mark + refine <= solve per level.
``benchmarks/estimate_speed.py`` prints the same figures with the estimate's phases
(and, with ``--before REV``, against an older estimator in the same process).
"""

from __future__ import annotations

import math

import galerkit as gk
from galerkit.adaptivity import doerfler_marking

try:
    from .bench_assembly import scale
except ImportError:  # run as a plain module
    from bench_assembly import scale


def _problem():
    n = max(4, round(math.sqrt(1_000_000 * scale() / 3)))
    return gk.PoissonProblem(gk.l_shaped_triangles(n), source=1.0,
                             dirichlet={"boundary": 0.0})


class AdaptiveLevel:
    """Solve, estimate_error, doerfler_marking and refine_marked on one mesh."""

    timeout = 900
    number = 1
    repeat = (1, 3, 60.0)

    def setup(self):
        self.problem = _problem()
        self.solution = self.problem.solve()
        self.estimate = gk.estimate_error(self.solution)
        self.marked = doerfler_marking(self.estimate.indicators, 0.5)

    def time_solve(self):
        self.problem.solve()

    def time_estimate(self):
        gk.estimate_error(self.solution)

    def time_mark(self):
        doerfler_marking(self.estimate.indicators, 0.5)

    def time_refine(self):
        gk.refine_marked(self.solution.mesh, self.marked)

    def peakmem_estimate(self):
        gk.estimate_error(self.solution)
