"""Convergence studies: errors and observed orders over uniform refinements.

The observed order of convergence between levels i-1 and i is
``EOC = log(e_{i-1} / e_i) / log(h_{i-1} / h_i)``.  A priori rates for
smooth solutions: ``k + 1`` in L2 and ``k`` in H1 and energy (Brenner &
Scott 2008, Ciarlet 1978).
"""

from __future__ import annotations

import csv
import io
import time
from dataclasses import dataclass, field

import numpy as np

from .errors import InputError
from .functionals import energy_error, h1_seminorm_error, l2_error, nested_error
from .refinement import refine_uniform

__all__ = ["convergence_study", "RateTable", "mesh_size"]


def mesh_size(mesh) -> float:
    """The longest edge of the mesh (``h``)."""
    from .mesh import _geometry

    vol = np.empty(mesh.n_cells)
    scale = np.empty(mesh.n_cells)
    _geometry(mesh.points, mesh.cells, vol, scale)
    return float(scale.max())


@dataclass
class RateTable:
    """Rows of a convergence study; ``rows`` is a list of dicts."""

    degree: int
    rows: list = field(default_factory=list)

    COLUMNS = ("level", "h", "n_dofs", "l2_error", "h1_error", "energy_error",
               "eoc_l2", "eoc_h1", "eoc_energy", "iterations", "seconds")

    def column(self, name):
        return np.array([r[name] for r in self.rows], dtype=float)

    def to_markdown(self) -> str:
        head = "| " + " | ".join(self.COLUMNS) + " |"
        sep = "|" + "|".join("---:" for _ in self.COLUMNS) + "|"
        lines = [head, sep]
        for r in self.rows:
            cells = []
            for c in self.COLUMNS:
                v = r[c]
                if v is None or (isinstance(v, float) and np.isnan(v)):
                    cells.append("")
                elif c in ("level", "n_dofs", "iterations"):
                    cells.append(str(int(v)))
                elif c.startswith("eoc"):
                    cells.append(f"{v:.2f}")
                elif c == "seconds":
                    cells.append(f"{v:.2f}")
                else:
                    cells.append(f"{v:.3e}")
            lines.append("| " + " | ".join(cells) + " |")
        return "\n".join(lines)

    def to_csv(self) -> str:
        buf = io.StringIO()
        w = csv.DictWriter(buf, fieldnames=self.COLUMNS, lineterminator="\n")
        w.writeheader()
        for r in self.rows:
            w.writerow({c: ("" if r[c] is None else r[c]) for c in self.COLUMNS})
        return buf.getvalue()


def _eoc(e, h):
    out = [np.nan]
    for i in range(1, len(e)):
        if e[i] is None or e[i - 1] is None or e[i] <= 0 or e[i - 1] <= 0:
            out.append(np.nan)
        else:
            out.append(float(np.log(e[i - 1] / e[i]) / np.log(h[i - 1] / h[i])))
    return out


def convergence_study(make_problem, levels, degree=1, exact=None, exact_gradient=None, *,
                      mesh=None, method="auto", rtol=1e-12, progress=None):
    """Solve on successive uniform refinements and tabulate errors and orders.

    Parameters
    ----------
    make_problem : PoissonProblem or callable
        A problem whose mesh is the coarsest level (its coefficients and
        boundary data must be callables or constants), or a callable
        ``make_problem(mesh)`` returning the problem on a mesh, together with
        ``mesh=`` the coarsest mesh.
    levels : int
        Number of meshes: the coarsest and ``levels - 1`` uniform refinements.
    degree : int
    exact, exact_gradient : callable, optional
        Exact solution and gradient.  Without them, each level's L2 and H1
        errors are measured against the finest solution (nested meshes).
    mesh : Mesh, optional
        The coarsest mesh, with a callable ``make_problem``.
    method, rtol : solver choice and tolerance.
    progress : callable, optional
        Called with a one-line message after each level.

    Returns
    -------
    RateTable
    """
    from .problem import PoissonProblem

    if isinstance(make_problem, PoissonProblem):
        base = make_problem

        def make_problem(mesh, base=base):
            return PoissonProblem(mesh, base.conductivity, base.source, base.dirichlet,
                                  base.neumann, base.robin)

        mesh = base.mesh
    elif callable(make_problem):
        if mesh is None:
            raise InputError("convergence_study: with a callable make_problem, pass the "
                             "coarsest mesh as mesh=")
    else:
        raise InputError("convergence_study: make_problem must be a PoissonProblem or a callable")
    if not isinstance(levels, (int, np.integer)) or levels < 1:
        raise InputError(f"convergence_study: levels must be a positive integer, got {levels!r}")
    sols, hs, secs = [], [], []
    for lev in range(levels):
        t0 = time.perf_counter()
        prob = make_problem(mesh)
        sol = prob.solve(degree=degree, method=method, rtol=rtol)
        secs.append(time.perf_counter() - t0)
        sols.append(sol)
        hs.append(mesh_size(mesh))
        if progress:
            progress(f"level {lev}: {sol.disc.n_dofs} dofs, {secs[-1]:.2f} s")
        if lev + 1 < levels:
            mesh = refine_uniform(mesh)
    table = RateTable(degree=degree)
    l2, h1, en = [], [], []
    for i, sol in enumerate(sols):
        kappa = sol.problem.conductivity
        if exact is not None:
            l2.append(l2_error(sol.disc, sol.u, exact))
        elif i < len(sols) - 1:
            l2.append(nested_error(sol.disc, sol.u, sols[-1].disc, sols[-1].u, "l2"))
        else:
            l2.append(None)
        if exact_gradient is not None:
            h1.append(h1_seminorm_error(sol.disc, sol.u, exact_gradient))
            en.append(energy_error(sol.disc, sol.u, exact_gradient, kappa))
        elif i < len(sols) - 1:
            h1.append(nested_error(sol.disc, sol.u, sols[-1].disc, sols[-1].u, "h1"))
            en.append(None)
        else:
            h1.append(None)
            en.append(None)
    for i, sol in enumerate(sols):
        table.rows.append(dict(level=i, h=hs[i], n_dofs=sol.disc.n_dofs, l2_error=l2[i],
                               h1_error=h1[i], energy_error=en[i], eoc_l2=_eoc(l2, hs)[i],
                               eoc_h1=_eoc(h1, hs)[i], eoc_energy=_eoc(en, hs)[i],
                               iterations=sol.report.iterations, seconds=secs[i]))
    return table
