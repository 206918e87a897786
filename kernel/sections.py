"""Plane sections of a tetrahedral mesh and of a finite element function on it.

A plane ``x_axis = value`` cuts each tetrahedron in a triangle or a
quadrilateral (split in two triangles).  The section's vertices lie on the
cut edges; the function's values there are its exact values (the element's
basis at those points), linear in between.  A vertex exactly on the plane
counts as lying above it (below it on the mesh's lowest plane), so that a
face in the plane is drawn once.  The
section of the boundary facets (segments) gives the outline of the mesh in
the plane.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import InputError

__all__ = ["AXES", "PlaneSection", "plane_section", "parse_plane"]

AXES = ("x", "y", "z")


@dataclass
class PlaneSection:
    """A plane section.

    Attributes
    ----------
    axis : int
        0, 1, 2 for the planes x = value, y = value, z = value.
    value : float
    points : ndarray (n, 2)
        In-plane coordinates (the two other axes, in order).
    triangles : ndarray (t, 3)
        Triangles of the section (indices into ``points``).
    values : ndarray (n,)
        The function at ``points``.
    outline : ndarray (s, 2, 2)
        Segments of the section of the boundary facets.
    cells : ndarray (t,)
        The tetrahedron each triangle cuts.
    """

    axis: int
    value: float
    points: np.ndarray
    triangles: np.ndarray
    values: np.ndarray
    outline: np.ndarray
    cells: np.ndarray

    @property
    def label(self):
        return f"{AXES[self.axis]} = {self.value:g}"

    @property
    def in_plane_axes(self):
        return tuple(AXES[a] for a in range(3) if a != self.axis)


def parse_plane(text):
    """``"x=0.5"`` -> ``(0, 0.5)``; raises InputError naming the text otherwise."""
    if isinstance(text, str) and "=" in text:
        name, _, num = text.partition("=")
        name = name.strip().lower()
        try:
            value = float(num)
        except ValueError:
            value = None
        if name in AXES and value is not None and np.isfinite(value):
            return AXES.index(name), value
    raise InputError(f"slice plane {text!r}: expected AXIS=VALUE with AXIS x, y or z and a "
                     "finite number, for example x=0.5")


def plane_section(disc, u, axis, value):
    """Section of the function ``u`` (dof vector of ``disc``) by ``x_axis = value``.

    Parameters
    ----------
    disc : Discretization
        Of a tetrahedral mesh.
    u : ndarray (n_dofs,)
    axis : int or str
        0/1/2 or "x"/"y"/"z".
    value : float

    Returns
    -------
    PlaneSection
        Possibly empty (no triangles) when the plane misses the mesh.

    Examples
    --------
    >>> from galerkit import Discretization, structured_tetrahedra
    >>> disc = Discretization(structured_tetrahedra(2, 2, 2), 1)
    >>> sec = plane_section(disc, disc.interpolate(lambda x: x[0] + 2 * x[1]), "z", 0.3)
    >>> round(float(sec.values.min()), 12), round(float(sec.values.max()), 12)
    (0.0, 3.0)
    """
    from .evaluation import _dof_vector

    mesh = disc.mesh
    if mesh.dim != 3:
        raise InputError("plane_section: the mesh must be tetrahedral (3D)")
    if isinstance(axis, str):
        if axis not in AXES:
            raise InputError(f"plane_section: axis must be x, y or z, got {axis!r}")
        axis = AXES.index(axis)
    if axis not in (0, 1, 2):
        raise InputError(f"plane_section: axis must be 0, 1 or 2, got {axis!r}")
    value = float(value)
    if not np.isfinite(value):
        raise InputError(f"plane_section: the plane's position must be finite, got {value}")
    u = _dof_vector(disc, u, "plane_section")
    keep = [a for a in range(3) if a != axis]
    s = mesh.points[:, axis] - value
    # a vertex on the plane counts as above it, except on the lowest plane of the
    # mesh, where it counts as below (so that a face there is drawn too)
    above = s > 0 if value <= mesh.points[:, axis].min() else s >= 0
    cells = mesh.cells
    n_above = above[cells].sum(axis=1)
    cut = np.flatnonzero((n_above > 0) & (n_above < 4))
    ref = np.vstack([np.zeros(3), np.eye(3)])
    edges = np.array([(0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3)])
    pts, vals, tris, owner = [], [], [], []
    count = 0
    el = disc.element
    if cut.size:
        cv = cells[cut]  # (c, 4)
        up = above[cv]
        sv = s[cv]
        crosses = up[:, edges[:, 0]] != up[:, edges[:, 1]]  # (c, 6)
        for n_cut in (3, 4):
            rows = np.flatnonzero(crosses.sum(axis=1) == n_cut)
            if rows.size == 0:
                continue
            e = np.nonzero(crosses[rows])[1].reshape(rows.size, n_cut)  # edge ids
            a, b = edges[e, 0], edges[e, 1]  # (r, n_cut) local vertices
            sa = np.take_along_axis(sv[rows], a, axis=1)
            sb = np.take_along_axis(sv[rows], b, axis=1)
            t = sa / (sa - sb)
            xi = ref[a] + t[..., None] * (ref[b] - ref[a])  # (r, n_cut, 3) reference
            xa = mesh.points[np.take_along_axis(cv[rows], a, axis=1)]
            xb = mesh.points[np.take_along_axis(cv[rows], b, axis=1)]
            x = xa + t[..., None] * (xb - xa)  # (r, n_cut, 3)
            V = el.tabulate(xi.reshape(-1, 3)).reshape(rows.size, n_cut, -1)
            val = np.einsum("rpk,rk->rp", V, u[disc.cell_dofs[cut[rows]]])
            p2 = x[..., keep]
            if n_cut == 4:  # order the quadrilateral's corners around its centre
                c = p2.mean(axis=1, keepdims=True)
                ang = np.arctan2(p2[..., 1] - c[..., 1], p2[..., 0] - c[..., 0])
                o = np.argsort(ang, axis=1)
                p2 = np.take_along_axis(p2, o[..., None], axis=1)
                val = np.take_along_axis(val, o, axis=1)
            base = count + n_cut * np.arange(rows.size)[:, None]
            local = np.array([[0, 1, 2]] if n_cut == 3 else [[0, 1, 2], [0, 2, 3]])
            tris.append((base[:, None, :] + local[None]).reshape(-1, 3)
                        if n_cut == 4 else base + local)
            owner.append(np.repeat(cut[rows], local.shape[0]))
            pts.append(p2.reshape(-1, 2))
            vals.append(val.ravel())
            count += rows.size * n_cut
    outline = _outline(mesh, s, above, keep)
    if not pts:
        return PlaneSection(axis, value, np.zeros((0, 2)), np.zeros((0, 3), dtype=np.int64),
                            np.zeros(0), outline, np.zeros(0, dtype=np.int64))
    tri = np.concatenate([t.reshape(-1, 3) for t in tris]).astype(np.int64)
    p2 = np.concatenate(pts)
    owner = np.concatenate(owner)
    # cells with vertices on the plane give triangles of no area: dropped
    P = p2[tri]
    area = np.abs((P[:, 1, 0] - P[:, 0, 0]) * (P[:, 2, 1] - P[:, 0, 1])
                  - (P[:, 1, 1] - P[:, 0, 1]) * (P[:, 2, 0] - P[:, 0, 0]))
    ok = area > 1e-12 * area.max() if area.size and area.max() > 0 else area > 0
    return PlaneSection(axis, value, p2, tri[ok], np.concatenate(vals), outline, owner[ok])


def _outline(mesh, s, above, keep):
    """Segments where the plane cuts the boundary facets (triangles)."""
    f = mesh.boundary_facets
    up = above[f]
    n_up = up.sum(axis=1)
    rows = np.flatnonzero((n_up > 0) & (n_up < 3))
    if rows.size == 0:
        return np.zeros((0, 2, 2))
    fv = f[rows]
    edges = np.array([(0, 1), (0, 2), (1, 2)])
    crosses = up[rows][:, edges[:, 0]] != up[rows][:, edges[:, 1]]  # exactly two per facet
    e = np.nonzero(crosses)[1].reshape(rows.size, 2)
    a = np.take_along_axis(fv, edges[e, 0], axis=1)
    b = np.take_along_axis(fv, edges[e, 1], axis=1)
    t = s[a] / (s[a] - s[b])
    x = mesh.points[a] + t[..., None] * (mesh.points[b] - mesh.points[a])
    return np.ascontiguousarray(x[..., keep])
