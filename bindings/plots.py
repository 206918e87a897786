"""PNG pictures: 2D fields and convergence plots (matplotlib, no screen needed)."""

from __future__ import annotations

import os

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from .files import atomic_path  # noqa: E402

__all__ = ["plot_field", "plot_convergence"]


def _save(fig, path):
    tmp = atomic_path(path)
    try:
        fig.savefig(tmp, dpi=120, bbox_inches="tight")
        os.chmod(tmp, 0o644)
        os.replace(tmp, path)
    finally:
        plt.close(fig)
        if os.path.exists(tmp):
            os.unlink(tmp)


def plot_field(path, solution, *, title="", units="", show_mesh=False, length_unit=""):
    """Tripcolor picture of a 2D solution (vertex values) with a colour bar."""
    mesh = solution.disc.mesh
    if mesh.dim != 2:
        raise ValueError("plot_field draws 2D solutions only")
    u = solution.u[solution.disc.vertex_dofs]
    fig, ax = plt.subplots(figsize=(7, 5))
    tpc = ax.tripcolor(mesh.points[:, 0], mesh.points[:, 1], mesh.cells, u, shading="gouraud",
                       cmap="inferno")
    if show_mesh:
        ax.triplot(mesh.points[:, 0], mesh.points[:, 1], mesh.cells, lw=0.2, color="w", alpha=0.5)
    cb = fig.colorbar(tpc, ax=ax)
    if units:
        cb.set_label(units)
    ax.set_aspect("equal")
    ax.set_xlabel(f"x{' [' + length_unit + ']' if length_unit else ''}")
    ax.set_ylabel(f"y{' [' + length_unit + ']' if length_unit else ''}")
    ax.set_title(title)
    _save(fig, path)
    return path


def plot_convergence(path, table, *, title=""):
    """Log-log error versus h with the reference slopes k+1 (L2) and k (H1)."""
    h = table.column("h")
    k = table.degree
    fig, ax = plt.subplots(figsize=(6, 4.5))
    for col, label, rate in (("l2_error", "L2 error", k + 1), ("h1_error", "H1 seminorm error", k)):
        e = table.column(col)
        ok = np.isfinite(e) & (e > 0)
        if not ok.any():
            continue
        line, = ax.loglog(h[ok], e[ok], "o-", label=label)
        ref = e[ok][-1] * (h[ok] / h[ok][-1]) ** rate
        ax.loglog(h[ok], ref, "--", color=line.get_color(), alpha=0.6, label=f"slope {rate}")
    ax.set_xlabel("h (longest edge)")
    ax.set_ylabel("error")
    ax.grid(True, which="both", alpha=0.3)
    ax.legend()
    ax.set_title(title or f"P{k} convergence")
    _save(fig, path)
    return path
