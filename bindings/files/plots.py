"""PNG pictures: 2D fields (optional isolines), 3D slices, convergence plots, residual histories.

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

__all__ = ["plot_field", "plot_mesh", "plot_slices", "plot_convergence", "plot_residuals", "plot_times",
           "PNG_SIGNATURE", "default_slices", "slice_path"]

#: The first eight bytes of every PNG file (PNG specification, section 5.2).
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def _save(fig, path):
    try:
        return write_atomically(path, lambda tmp: fig.savefig(tmp, dpi=120, bbox_inches="tight",
                                                              format="png"))
    finally:
        plt.close(fig)


def plot_field(path, solution, *, title="", units="", show_mesh=False, length_unit="",
               refinements=None, isolines=0):
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
    isolines : int
        Number of contour lines drawn on top (0: none).

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
    if isolines and float(np.ptp(s.values)) > 0:
        ax.tricontour(fine.points[:, 0], fine.points[:, 1], fine.cells, s.values,
                      levels=int(isolines), colors="k", linewidths=0.6)
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


#: above this many cells :func:`plot_mesh` leaves the edges out (they would
#: cover the picture) and the colours alone show the grading
MESH_EDGES_UP_TO = 30_000


def plot_mesh(path, mesh, levels=None, *, title="", length_unit=""):
    """Picture of a 2D mesh: its edges, each cell coloured by its refinement level,
    and (with levels) a zoom on the finest cells beside it.

    Parameters
    ----------
    path : str or path-like
        Target ``.png``.
    mesh : Mesh
        A triangle mesh.
    levels : array_like (n_cells,), optional
        Refinement level of every cell (:attr:`galerkit.AdaptiveRun.cell_levels`);
        without it the cells are white and there is no zoom.
    title, length_unit : str

    Returns
    -------
    pathlib.Path

    Raises
    ------
    InputError
        A 3D mesh, or levels of the wrong shape.
    """
    if mesh.dim != 2:
        raise InputError("plot_mesh draws triangle meshes only; open the VTU file of a 3D "
                         "mesh in a viewer such as ParaView")
    x, y = mesh.points[:, 0], mesh.points[:, 1]
    if levels is not None:
        levels = np.asarray(levels)
        if levels.shape != (mesh.n_cells,):
            raise InputError(f"plot_mesh: levels of shape {levels.shape}; expected one per "
                             f"cell ({mesh.n_cells},)")
    zoom = levels is not None and int(np.ptp(levels)) > 0
    fig, axes = plt.subplots(1, 2 if zoom else 1, figsize=(12 if zoom else 7, 5.5),
                             squeeze=False)
    axes = axes[0]
    tpc = None
    for k, ax in enumerate(axes):
        if levels is not None:
            lo, hi = int(levels.min()), int(levels.max())
            cmap = plt.get_cmap("viridis", hi - lo + 1)
            tpc = ax.tripcolor(x, y, mesh.cells, facecolors=levels.astype(float), cmap=cmap,
                               vmin=lo - 0.5, vmax=hi + 0.5, edgecolors="none")
        shown = mesh.n_cells
        if k == 1:  # a box around the cells of the six finest levels
            fine = mesh.cells[levels >= levels.max() - 5].ravel()
            x0, x1, y0, y1 = x[fine].min(), x[fine].max(), y[fine].min(), y[fine].max()
            half = 0.6 * max(x1 - x0, y1 - y0, 1e-300)
            cx, cy = 0.5 * (x0 + x1), 0.5 * (y0 + y1)
            ax.set_xlim(cx - half, cx + half)
            ax.set_ylim(cy - half, cy + half)
            cen = mesh.points[mesh.cells].mean(axis=1)
            shown = int(((np.abs(cen[:, 0] - cx) < half) & (np.abs(cen[:, 1] - cy) < half)).sum())
            ax.set_title(f"zoom: {2 * half:.3g} wide around the finest cells")
        if shown <= MESH_EDGES_UP_TO:
            lw = 0.6 if shown < 1000 else (0.3 if shown < 5000 else 0.12)
            ax.triplot(x, y, mesh.cells, lw=lw, color="k", alpha=0.6)
        ax.set_aspect("equal")
        ax.xaxis.set_major_locator(MaxNLocator(nbins=4))
        ax.yaxis.set_major_locator(MaxNLocator(nbins=5))
        ax.set_xlabel(f"x{' [' + length_unit + ']' if length_unit else ''}")
        ax.set_ylabel(f"y{' [' + length_unit + ']' if length_unit else ''}")
    heading = title or f"{mesh.n_cells} triangles, {mesh.n_vertices} vertices"
    if zoom:
        axes[0].set_title("whole mesh")
        fig.suptitle(heading)
    else:
        axes[0].set_title(heading)
    if tpc is not None:
        cb = fig.colorbar(tpc, ax=list(axes), ticks=MaxNLocator(integer=True, nbins=8))
        cb.set_label("refinement level (bisections)")
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


def default_slices(mesh):
    """The three mid-planes of the mesh's bounding box: ``[(axis, value), ...]``."""
    lo, hi = mesh.points.min(axis=0), mesh.points.max(axis=0)
    return [(a, float(0.5 * (lo[a] + hi[a]))) for a in range(3)]


def slice_path(path, axis, value):
    """``<stem>-slice-x0.5.png`` beside ``path`` for the plane x = 0.5."""
    from pathlib import Path

    p = Path(path)
    return p.with_name(f"{p.stem}-slice-{'xyz'[axis]}{value:g}{p.suffix or '.png'}")


def plot_slices(path, solution, planes=None, *, title="", units="", name="u",
                length_unit=""):
    """PNG pictures of a 3D solution on plane sections, one file per plane.

    Parameters
    ----------
    path : str or path-like
        Base name: the plane x = 0.5 goes to ``<stem>-slice-x0.5.png``.
    solution : Solution
        A 3D solution.
    planes : list of (axis, value) or "x=0.5" texts, optional
        Default: the three mid-planes of the bounding box.
    title : str
    units : str
        Units of the field, on the colour bar beside ``name``.
    name : str
        The field's name, on the colour bar.
    length_unit : str

    Returns
    -------
    list of pathlib.Path

    Raises
    ------
    InputError
        A 2D solution, a plane text that is not AXIS=VALUE, a plane that misses
        the mesh (the message gives the mesh's extent along that axis).
    """
    from galerkit.sections import AXES, parse_plane, plane_section

    mesh = solution.disc.mesh
    if mesh.dim != 3:
        raise InputError("plot_slices draws 3D solutions; use plot_field in 2D")
    planes = default_slices(mesh) if not planes else [
        parse_plane(p) if isinstance(p, str) else (int(p[0]), float(p[1])) for p in planes]
    sections = []
    for axis, value in planes:
        sec = plane_section(solution.disc, solution.u, axis, value)
        if sec.triangles.shape[0] == 0:
            lo, hi = mesh.points[:, axis].min(), mesh.points[:, axis].max()
            raise InputError(f"slice {AXES[axis]}={value:g} misses the mesh, which spans "
                             f"{AXES[axis]} = {lo:g} .. {hi:g}; choose a plane inside")
        sections.append(sec)
    # one colour scale for every slice: the field's range over all of them
    vmin = min(float(s.values.min()) for s in sections)
    vmax = max(float(s.values.max()) for s in sections)
    if vmax <= vmin:
        vmax = vmin + (abs(vmin) or 1.0) * 1e-12
    label = name + (f" [{units}]" if units else "")
    unit = f" [{length_unit}]" if length_unit else ""
    out = []
    for sec in sections:
        fig, ax = plt.subplots(figsize=(7, 5))
        tpc = ax.tripcolor(sec.points[:, 0], sec.points[:, 1], sec.triangles, sec.values,
                           shading="gouraud", cmap="inferno", vmin=vmin, vmax=vmax)
        if sec.outline.size:
            from matplotlib.collections import LineCollection
            ax.add_collection(LineCollection(sec.outline, colors="k", linewidths=0.8))
        cb = fig.colorbar(tpc, ax=ax)
        cb.set_label(label)
        a, b = sec.in_plane_axes
        ax.set_aspect("equal")
        ax.set_xlabel(a + unit)
        ax.set_ylabel(b + unit)
        ax.set_title((title + ": " if title else "") + f"slice {sec.label}")
        out.append(_save(fig, slice_path(path, sec.axis, sec.value)))
    return out
