"""PNG pictures: 2D fields, convergence plots, residual histories.

matplotlib with the Agg backend (no screen needed).  Every picture is
written atomically (a temporary sibling, then a rename).
"""

from __future__ import annotations

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
from matplotlib.ticker import MaxNLocator  # noqa: E402
import numpy as np  # noqa: E402

from galerkit.errors import InputError  # noqa: E402

from .readwrite import sample_solution, write_atomically  # noqa: E402

__all__ = ["plot_field", "plot_convergence", "plot_residuals", "plot_times", "PNG_SIGNATURE"]

#: The first eight bytes of every PNG file (PNG specification, section 5.2).
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def _save(fig, path):
    try:
        return write_atomically(path, lambda tmp: fig.savefig(tmp, dpi=120, bbox_inches="tight",
                                                              format="png"))
    finally:
        plt.close(fig)


def plot_field(path, solution, *, title="", units="", show_mesh=False, length_unit="",
               refinements=None):
    """Colour picture (tripcolor) of a 2D solution with a colour bar.

    Parameters
    ----------
    path : str or path-like
        Target ``.png``.
    solution : Solution
        A 2D solution.  P2 and higher are drawn on the refined P1 mesh of
        :func:`galerkit.bindings.files.sample_solution` (values exact at its
        vertices, linear in between).
    title : str
    units : str
        Label of the colour bar, for example ``"temperature [K]"``.
    show_mesh : bool
        Draw the edges of the computational mesh on top.
    length_unit : str
        Unit of the axes, for example ``"m"``.
    refinements : int, optional
        Override the refinements of the drawing mesh.

    Returns
    -------
    pathlib.Path

    Raises
    ------
    InputError
        For a 3D solution.
    """
    mesh = solution.disc.mesh
    if mesh.dim != 2:
        raise InputError("plot_field draws 2D solutions only; open the VTU file of a 3D "
                         "solution in a viewer such as ParaView")
    s = sample_solution(solution, refinements)
    fine = s.mesh
    fig, ax = plt.subplots(figsize=(7, 5))
    tpc = ax.tripcolor(fine.points[:, 0], fine.points[:, 1], fine.cells, s.values,
                       shading="gouraud", cmap="inferno")
    if show_mesh:
        ax.triplot(mesh.points[:, 0], mesh.points[:, 1], mesh.cells, lw=0.3, color="w",
                   alpha=0.6)
    cb = fig.colorbar(tpc, ax=ax)
    if units:
        cb.set_label(units)
    ax.set_aspect("equal")
    ax.xaxis.set_major_locator(MaxNLocator(nbins=5))
    ax.yaxis.set_major_locator(MaxNLocator(nbins=6))
    ax.set_xlabel(f"x{' [' + length_unit + ']' if length_unit else ''}")
    ax.set_ylabel(f"y{' [' + length_unit + ']' if length_unit else ''}")
    ax.set_title(title)
    return _save(fig, path)


def plot_convergence(path, tables, *, title=""):
    """Log-log error versus h with the reference slopes k+1 (L2) and k (H1).

    ``tables``: one RateTable, or several (one per degree) drawn on one plot.
    """
    if not isinstance(tables, (list, tuple)):
        tables = [tables]
    fig, ax = plt.subplots(figsize=(6.5, 4.8))
    for table in tables:
        h = table.column("h")
        k = table.degree
        for col, label, rate, mark in (("l2_error", "L2", k + 1, "o-"),
                                       ("h1_error", "H1", k, "s-")):
            e = table.column(col)
            ok = np.isfinite(e) & (e > 0)
            if not ok.any():
                continue
            line, = ax.loglog(h[ok], e[ok], mark, ms=4, label=f"P{k} {label} error")
            ref = e[ok][-1] * (h[ok] / h[ok][-1]) ** rate
            ax.loglog(h[ok], ref, "--", color=line.get_color(), alpha=0.5, lw=1,
                      label=f"slope {rate}")
    ax.set_xlabel("h (longest edge)")
    ax.set_ylabel("error")
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=7, ncol=2 if len(tables) > 1 else 1)
    degrees = ", ".join(f"P{t.degree}" for t in tables)
    ax.set_title(title or f"{degrees} convergence")
    return _save(fig, path)


def plot_times(path, lines, *, title=""):
    """Seconds against unknowns (log-log), one line per method, each point labelled
    with its iteration count.

    ``lines``: ``method -> [(unknowns, seconds, iterations), ...]``.
    """
    fig, ax = plt.subplots(figsize=(6.5, 4.8))
    for method, pts in lines.items():
        pts = sorted(p for p in pts if p[1] is not None and p[1] > 0)
        if not pts:
            continue
        n = [p[0] for p in pts]
        s = [p[1] for p in pts]
        line, = ax.loglog(n, s, "o-", label=method)
        for x, y, it in pts:
            if it is not None:
                ax.annotate(f"{int(it)} it", (x, y), textcoords="offset points", xytext=(4, 4),
                            fontsize=7, color=line.get_color())
    ax.set_xlabel("unknowns")
    ax.set_ylabel("set-up + solve seconds (minimum of the runs)")
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=8)
    ax.set_title(title or "time against unknowns")
    return _save(fig, path)


def plot_residuals(path, histories, *, title="", rtol=None):
    """Relative residual against iteration, one line per solver (semilogy).

    Parameters
    ----------
    path : str or path-like
    histories : dict
        ``method -> residuals`` (1D arrays of relative residual norms, entry
        0 the initial guess).  A single-entry history (a direct solver) is
        drawn as one marker at iteration 1.
    title : str
    rtol : float, optional
        Draws the tolerance as a horizontal line.

    Returns
    -------
    pathlib.Path
    """
    fig, ax = plt.subplots(figsize=(6.5, 4.5))
    floor = np.finfo(float).tiny
    for method, res in histories.items():
        r = np.maximum(np.asarray(res, dtype=np.float64), floor)
        if r.size == 0:
            continue
        if r.size == 1:
            ax.semilogy([1], r, "s", ms=7, label=f"{method} (1 step)")
        else:
            ax.semilogy(np.arange(r.size), r, "-", lw=1.4, label=f"{method} ({r.size - 1} it.)")
    if rtol is not None:
        ax.axhline(rtol, color="grey", ls=":", lw=1, label=f"rtol {rtol:g}")
    ax.set_xlabel("iteration")
    ax.set_ylabel("relative residual ||b - A x|| / ||b||")
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=8)
    ax.set_title(title or "residual histories")
    return _save(fig, path)
