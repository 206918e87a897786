"""Adaptive refinement: solve -> estimate -> mark (Doerfler) -> refine.

:func:`adapt` repeats, from the problem's mesh: solve (P1), the guaranteed
bound of :func:`~galerkit.estimate_error`, Doerfler's bulk marking (W.
Doerfler, "A convergent adaptive algorithm for Poisson's equation", SIAM J.
Numer. Anal. 33, 1996: the fewest cells whose squared indicators reach
``bulk`` times the total), and newest-vertex bisection
(:func:`~galerkit.refine_marked`; tetrahedra: tagged bisection, the bound of
:mod:`galerkit.estimators3d`).  It stops when the bound reaches the
tolerance (absolute ``tol``, or ``relative_tol`` times the energy norm of the
solution), or when the next mesh would pass ``max_dofs``, or after
``max_levels`` levels.  Compiled kernels are reused from level to level; the
matrices change size, so each level sets its solver up anew.
"""

from __future__ import annotations

import csv
import io
import math
import time
from dataclasses import dataclass, field

import numpy as np

from .bisection import min_angles, refine_marked
from .errors import InputError, UnsupportedError
from .estimators import estimate_error
from .problem import PoissonProblem
from .regions import RegionCoefficient

__all__ = ["adapt", "AdaptiveRun", "LevelTable", "doerfler_marking", "cell_levels"]


def doerfler_marking(indicators, bulk=0.5):
    """Fewest cells whose squared indicators sum to at least ``bulk`` of the total.

    Examples
    --------
    >>> doerfler_marking(np.array([3.0, 1.0, 2.0]), 0.5).tolist()
    [0]
    """
    eta2 = np.asarray(indicators, dtype=np.float64).ravel() ** 2
    n = eta2.size
    total = float(eta2.sum())
    if not math.isfinite(total):
        bad = int(np.flatnonzero(~np.isfinite(eta2))[0]) if not np.isfinite(eta2).all() else -1
        where = f"cell {bad}" if bad >= 0 else "their sum of squares overflows"
        raise InputError(f"doerfler_marking: the indicators are not finite ({where}); "
                         "check the estimate they come from")
    if total <= 0:
        return np.zeros(0, dtype=np.int64)
    target = bulk * total * (1 - 1e-14)
    # the marked cells are the first k of the stable descending order.  A histogram of
    # the values by their top 16 bits (exponent and 4 mantissa bits: for values >= 0 the
    # order of the bit patterns is the order of the values) bounds them from below with
    # a margin far above rounding; only the cells above that bound are sorted: the same
    # prefix of the order, the same partial sums, the same k
    bits = eta2.view(np.int64) >> 48
    from_top = np.cumsum(np.bincount(bits, weights=eta2, minlength=1 << 15)[::-1])
    i = int(np.searchsorted(from_top, target * (1 + 1e-9)))
    cand = np.flatnonzero(bits >= from_top.size - 1 - i) if i < from_top.size else None
    for cand in ((cand, np.arange(n)) if cand is not None else (np.arange(n),)):
        order = cand[np.argsort(-eta2[cand], kind="stable")]
        csum = np.cumsum(eta2[order])
        if cand.size == n or csum[-1] >= target:
            k = int(np.searchsorted(csum, target)) + 1
            return np.sort(order[:min(k, n)])
    raise AssertionError("unreachable: the last candidate set is every cell")


@dataclass
class LevelTable:
    """One row per level of an adaptive run; ``rows`` is a list of dicts."""

    rows: list = field(default_factory=list)

    COLUMNS = ("level", "n_cells", "n_dofs", "bound", "residual_estimate", "error",
               "effectivity", "min_angle", "solve_s", "estimate_s", "mark_s", "refine_s")

    def column(self, name):
        return np.array([np.nan if r[name] is None else r[name] for r in self.rows],
                        dtype=float)

    def to_markdown(self) -> str:
        """A markdown table; columns empty on every row (error and effectivity without
        an exact solution) are left out."""
        cols = [c for c in self.COLUMNS if any(r[c] is not None for r in self.rows)]
        lines = ["| " + " | ".join(cols) + " |",
                 "|" + "|".join("---:" for _ in cols) + "|"]
        for r in self.rows:
            cells = []
            for c in cols:
                v = r[c]
                if v is None:
                    cells.append("")
                elif c in ("level", "n_cells", "n_dofs"):
                    cells.append(str(int(v)))
                elif c.endswith("_s") or c in ("effectivity", "min_angle"):
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

    def plot(self, path=None):
        """Bound, residual estimate and error against the dofs (log-log); a matplotlib
        figure, saved to ``path`` when given."""
        import matplotlib
        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
        fig, ax = plt.subplots(figsize=(5, 4))
        n = self.column("n_dofs")
        for name in ("bound", "residual_estimate", "error"):
            y = self.column(name)
            if np.isfinite(y).any():
                ax.loglog(n, y, "o-", label=name.replace("_", " "))
        ax.set_xlabel("degrees of freedom")
        ax.set_ylabel("energy error")
        ax.legend()
        ax.grid(True, which="both", alpha=0.3)
        fig.tight_layout()
        if path is not None:
            fig.savefig(path, dpi=120)
        return fig


@dataclass
class AdaptiveRun:
    """Result of :func:`adapt`: ``solutions``, ``estimates`` and ``meshes`` per level,
    the ``table`` (:class:`LevelTable`), why it stopped (``stopped``) and the
    refinement level of every cell of the last mesh (``cell_levels``: how many
    bisections lie between it and its cell of the initial mesh, int32)."""

    solutions: list
    estimates: list
    table: LevelTable
    stopped: str
    cell_levels: np.ndarray = None

    @property
    def meshes(self):
        return [s.mesh for s in self.solutions]

    @property
    def solution(self):
        return self.solutions[-1]


def adapt(problem, degree=1, tol=None, *, relative_tol=None, max_dofs=200_000, bulk=0.5,
          max_levels=30, exact_gradient=None, method="auto", rtol=1e-10, maxiter=None,
          keep="all", minimise_flux=False):
    """Adaptive solve driven by the guaranteed error bound.

    Parameters
    ----------
    problem : PoissonProblem
    degree : int
        1 to 4 on triangles (the bound of :func:`estimate_error` covers P1-P4 there),
        1 on tetrahedra.
    tol : float, optional
        Stop when ``bound <= tol``.
    relative_tol : float, optional
        Stop when ``bound <= relative_tol * ||K^(1/2) grad u_h||``.
    max_dofs : int
        Stop before a level whose mesh would have more dofs than this.
    bulk : float in (0, 1]
        Doerfler's marking fraction.
    max_levels : int
    exact_gradient : callable, optional
        Adds the exact error and the effectivity to every row.
    method, rtol, maxiter
        Passed to :meth:`PoissonProblem.solve`.
    keep : "all" or "last"
        Keep every level's solution (default) or only the last one.
    minimise_flux : bool
        Passed to :func:`estimate_error` (triangles: the flux term minimised over
        divergence-free corrections, one extra solve per level).

    Returns
    -------
    AdaptiveRun

    Raises
    ------
    InputError
        Bad parameters.
    UnsupportedError
        Degree above 1 on tetrahedra, data that cannot follow the mesh (a
        source given as a dof vector, per-facet arrays of boundary data).

    Examples
    --------
    >>> from galerkit import l_shaped_triangles
    >>> run = adapt(PoissonProblem(l_shaped_triangles(2), source=1.0,
    ...                            dirichlet={"boundary": 0.0}), max_levels=4)
    >>> len(run.solutions), run.stopped
    (4, 'max_levels')
    >>> bool(run.table.column("bound")[-1] < run.table.column("bound")[0])
    True
    """
    if not isinstance(problem, PoissonProblem):
        raise InputError(f"adapt: expected a PoissonProblem, got {type(problem).__name__}")
    if isinstance(degree, bool) or not isinstance(degree, (int, np.integer)) \
            or degree not in (1, 2, 3, 4):
        raise InputError(f"adapt: degree must be 1, 2, 3 or 4, got {degree!r}")
    if degree != 1 and problem.mesh.dim == 3:
        raise UnsupportedError(f"adapt: degree {degree!r} on tetrahedra: the adaptive loop on "
                               "tetrahedra is implemented for P1 only (estimate_error gives "
                               "the P2-P4 bound of one solve there); use degree=1 (P2-P4 "
                               "adapt on triangles)")
    degree = int(degree)
    for name, v, lo in (("bulk", bulk, 0.0), ("tol", tol, 0.0), ("relative_tol", relative_tol, 0.0)):
        if v is not None and (isinstance(v, bool) or not isinstance(v, (int, float))
                              or not math.isfinite(v) or v <= lo):
            raise InputError(f"adapt: {name} must be a positive number, got {v!r}")
    if bulk > 1:
        raise InputError(f"adapt: bulk must be in (0, 1], got {bulk!r}")
    for name, v in (("max_dofs", max_dofs), ("max_levels", max_levels)):
        if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < 1:
            raise InputError(f"adapt: {name} must be a positive integer, got {v!r}")
    if keep not in ("all", "last"):
        raise InputError(f"adapt: keep must be 'all' or 'last', got {keep!r}")
    solutions, estimates = [], []
    table = LevelTable()
    current = problem
    stopped = "max_levels"
    levels = np.zeros(problem.mesh.n_cells, dtype=np.int32)
    for level in range(max_levels):
        t0 = time.perf_counter()
        sol = current.solve(degree=degree, method=method, rtol=rtol, maxiter=maxiter)
        t1 = time.perf_counter()
        est = estimate_error(sol, exact_gradient=exact_gradient, minimise_flux=minimise_flux)
        t2 = time.perf_counter()
        row = {"level": level, "n_cells": sol.mesh.n_cells, "n_dofs": sol.disc.n_dofs,
               "bound": est.bound, "residual_estimate": est.residual_estimate,
               "error": est.error, "effectivity": est.effectivity,
               "min_angle": float(min_angles(sol.mesh).min()),
               "solve_s": t1 - t0, "estimate_s": t2 - t1, "mark_s": None, "refine_s": None}
        table.rows.append(row)
        if keep == "last":
            solutions[:] = [sol]
            estimates[:] = [est]
        else:
            solutions.append(sol)
            estimates.append(est)
        if tol is not None and est.bound <= tol:
            stopped = "tol"
            break
        if relative_tol is not None and est.bound <= relative_tol * est.energy_norm:
            stopped = "relative_tol"
            break
        if level == max_levels - 1:
            break
        t3 = time.perf_counter()
        marked = doerfler_marking(est.indicators, bulk)
        t4 = time.perf_counter()
        fine = refine_marked(sol.mesh, marked)
        t5 = time.perf_counter()
        row["mark_s"], row["refine_s"] = t4 - t3, t5 - t4
        if _n_dofs(fine, degree) > max_dofs:
            stopped = "max_dofs"
            break
        levels = cell_levels(sol.mesh, fine, levels)
        current = _carry_problem(current, fine)
    return AdaptiveRun(solutions=solutions, estimates=estimates, table=table, stopped=stopped,
                       cell_levels=levels)


def _n_dofs(mesh, degree):
    """Dofs of a continuous P_k space on a triangle mesh (P1 on any mesh): vertices,
    k - 1 per edge, (k - 1)(k - 2) / 2 per cell (3 m = 2 E - E_boundary)."""
    if degree == 1:
        return mesh.n_vertices
    n_edges = (3 * mesh.n_cells + len(mesh.boundary_facets)) // 2
    return (mesh.n_vertices + (degree - 1) * n_edges
            + (degree - 1) * (degree - 2) // 2 * mesh.n_cells)


def cell_levels(coarse, fine, coarse_levels):
    """Refinement levels of the cells of ``fine`` (from :func:`refine_marked`): the level
    of the parent plus the bisections in between, ``log2`` of the area ratio (a
    bisection halves the area exactly: 1 for a cell bisected once, 2 for the
    grandchildren of a cell whose other edges the closure split too).

    Examples
    --------
    >>> from galerkit import structured_triangles, refine_marked
    >>> m = structured_triangles(1, 1)
    >>> f = refine_marked(m, [0])
    >>> sorted(cell_levels(m, f, np.zeros(2, np.int32)).tolist())
    [1, 1, 1, 1]
    """
    ratio = coarse.cell_volumes[fine.parent_cells] / fine.cell_volumes
    return (np.asarray(coarse_levels)[fine.parent_cells]
            + np.rint(np.log2(ratio)).astype(np.int32)).astype(np.int32)


def _carry(value, coarse, fine, name):
    if isinstance(value, RegionCoefficient):
        names = {i: n for n, i in coarse.region_names.items()}
        return {names.get(i, i): v for i, v in value.by_id.items()}
    if callable(value) or np.ndim(value) == 0:
        return value
    arr = np.asarray(value)
    if arr.shape[:1] == (coarse.n_cells,) and arr.ndim in (1, 3):
        return arr[fine.parent_cells]
    if arr.shape == (coarse.dim, coarse.dim):
        return arr
    raise UnsupportedError(f"adapt: {name} of shape {arr.shape} cannot follow the refined mesh; "
                           "give it as a number, a callable, per cell or per region")


def _carry_problem(problem, fine):
    coarse = problem.mesh

    def boundary(table, kind):
        out = {}
        for tag, v in table.items():
            parts = v if kind == "robin" else (v,)
            for p in parts:
                if not callable(p) and np.ndim(p) != 0:
                    raise UnsupportedError(
                        f"adapt: {kind}[{tag!r}] is an array per facet, which cannot follow the "
                        "refined mesh; give a number or a callable")
            out[tag] = v
        return out

    src = problem.source
    if not isinstance(src, RegionCoefficient) and np.ndim(src) == 1 and \
            np.shape(src) != (coarse.n_cells,):
        raise UnsupportedError("adapt: a source given as a dof vector cannot follow the refined "
                               "mesh; give a number, a callable, per cell or per region")
    return PoissonProblem(fine, conductivity=_carry(problem.conductivity, coarse, fine,
                                                    "conductivity"),
                          source=_carry(src, coarse, fine, "source"),
                          dirichlet=boundary(problem.dirichlet, "dirichlet"),
                          neumann=boundary(problem.neumann, "neumann"),
                          robin=boundary(problem.robin, "robin"))
