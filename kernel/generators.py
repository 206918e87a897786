"""Structured mesh generators for tests, studies and demos.

Every generator tags its boundary facets: ``"xmin"``/``"xmax"`` (x = lower /
upper), ``"ymin"``/``"ymax"`` (y), in 3D ``"zmin"``/``"zmax"`` (z), and
``"boundary"`` for all of them.  Vertices are numbered lexicographically
(x fastest), so cells come out sorted by their smallest vertex.
"""

from __future__ import annotations

import numba as nb
import numpy as np

from .compilation import by_size
from .errors import InputError, ResourceError
from .mesh import Mesh, remove_unreferenced_vertices
from .topology import index_dtype

__all__ = ["structured_triangles", "structured_tetrahedra", "l_shaped_triangles",
           "mesh_bytes_estimate"]


def mesh_bytes_estimate(n_vertices: int, n_cells: int, dim: int) -> int:
    """Peak bytes of building and validating a mesh of this size (an estimate).

    Points (8 d per vertex), the cell table twice (the caller's and the
    mesh's, int32), volumes, the facet pass's temporaries (an int32 and an
    int64 per facet occurrence, per-vertex counters), plus a quarter.
    """
    k = dim + 1
    idx = 4 if n_vertices < 2**31 - 1 else 8
    # 25 % above the sum: the measured peak of structured_tetrahedra(60, 60, 60)
    # is 98 % of the sum itself
    return int(1.25 * (n_vertices * (8 * dim + 80) + n_cells * (2 * idx * k + 8 + 12 * k)))


def check_mesh_memory(what: str, n_vertices: int, n_cells: int, dim: int, hint: str) -> None:
    """Refuse, before allocating, a mesh that would not fit in memory.

    Raises
    ------
    ResourceError
        The estimate of :func:`mesh_bytes_estimate` exceeds the memory
        available (``MemAvailable``, or ``GALERKIT_MEMORY_LIMIT_BYTES``);
        the message gives both figures and what to do.
    """
    from .solvers import memory_limit

    limit, source = memory_limit()
    need = mesh_bytes_estimate(n_vertices, n_cells, dim)
    if limit is not None and need > limit:
        raise ResourceError(
            f"{what}: {n_cells} cells and {n_vertices} vertices need an estimated "
            f"{need / 2**30:.2f} GiB ({need} bytes) to build and validate, above the limit "
            f"of {limit / 2**30:.2f} GiB ({int(limit)} bytes, {source}); {hint}, free "
            "memory, or raise GALERKIT_MEMORY_LIMIT_BYTES if the machine has more")


def _check_counts(name, counts):
    for c in counts:
        if not isinstance(c, (int, np.integer)) or c < 1:
            raise InputError(f"{name}: cell counts must be positive integers, got {counts}")


def _check_box(name, lower, upper, dim):
    lo = np.asarray(lower, dtype=np.float64)
    hi = np.asarray(upper, dtype=np.float64)
    if lo.shape != (dim,) or hi.shape != (dim,):
        raise InputError(f"{name}: lower and upper need {dim} coordinates each")
    if not (np.all(np.isfinite(lo)) and np.all(np.isfinite(hi)) and np.all(hi > lo)):
        raise InputError(f"{name}: need finite lower < upper, got {lo.tolist()} / {hi.tolist()}")
    return lo, hi


@nb.njit(cache=True, parallel=True)
def _box_sides(points, facets, lower, upper, tol, sides):
    """``sides[f]``: bit ``2 a`` when the midpoint of boundary facet ``f`` lies
    within ``tol`` of ``lower[a]``, bit ``2 a + 1`` for ``upper[a]``.  The
    midpoint is summed vertex by vertex and divided by their number, as
    ``numpy.mean`` over the facet's vertices does."""
    nf, kf = facets.shape
    dim = points.shape[1]
    for f in nb.prange(nf):
        bits = 0
        for a in range(dim):
            x = points[facets[f, 0], a]
            for j in range(1, kf):
                x += points[facets[f, j], a]
            x /= kf
            if abs(x - lower[a]) <= tol:
                bits |= 1 << (2 * a)
            if abs(x - upper[a]) <= tol:
                bits |= 1 << (2 * a + 1)
        sides[f] = bits


def _tag_box(mesh, lower, upper, spacing):
    tol = 1e-8 * float(np.min(spacing))
    names = [("xmin", "xmax"), ("ymin", "ymax"), ("zmin", "zmax")]
    sides = np.empty(mesh.boundary_facets.shape[0], dtype=np.uint8)
    by_size(_box_sides, sides.size)(mesh.points, mesh.boundary_facets,
                                    np.ascontiguousarray(lower, dtype=np.float64),
                                    np.ascontiguousarray(upper, dtype=np.float64), tol, sides)
    for axis in range(mesh.dim):
        for end, side in enumerate(names[axis]):
            ids = np.flatnonzero(sides & np.uint8(1 << (2 * axis + end)))
            if ids.size:
                mesh.set_facet_tag(side, ids)
    return mesh  # "boundary" (all of it) comes with every Mesh


def _regions(mesh, regions, names):
    if regions is not None:
        mesh.set_regions(regions, names)
    elif names is not None:
        raise InputError("region_names given without regions; pass regions= as well")


@nb.njit(cache=True, parallel=True)
def _fill_grid_points(x, y, z, pts):
    """``pts[i + nx1 * (j + ny1 * k)] = (x[i], y[j], z[k])`` (z ignored in 2D)."""
    nx1 = x.shape[0]
    ny1 = y.shape[0]
    dim = pts.shape[1]
    for r in nb.prange(ny1 * z.shape[0]):
        j = r % ny1
        k = r // ny1
        base = r * nx1
        for i in range(nx1):
            pts[base + i, 0] = x[i]
            pts[base + i, 1] = y[j]
            if dim == 3:
                pts[base + i, 2] = z[k]


def _grid_points(counts, lower, upper):
    """Vertices of the grid, x fastest: vertex ``i + (nx+1)*(j + (ny+1)*k)`` is at
    the ``i``-th, ``j``-th, ``k``-th value of ``numpy.linspace`` along each axis."""
    axes = [np.linspace(lower[a], upper[a], counts[a] + 1) for a in range(len(counts))]
    n = int(np.prod([c + 1 for c in counts]))
    pts = np.empty((n, len(counts)))
    by_size(_fill_grid_points, pts.size)(axes[0], axes[1],
                                         axes[2] if len(axes) == 3 else np.zeros(1), pts)
    return pts


@nb.njit(cache=True, parallel=True)
def _fill_grid_cells(nx, ny, nz, pattern, cells):
    """Cells of a grid of ``nx * ny * nz`` boxes: box ``i + nx * (j + ny * k)``
    with lowest vertex ``v = i + (nx+1) * (j + (ny+1) * k)`` gets the cells
    ``v + pattern[t]`` (``t`` = 0, 1, ...) at rows ``box * len(pattern) + t``."""
    per, kk = pattern.shape
    sy = nx + 1
    sz = (nx + 1) * (ny + 1)
    for r in nb.prange(ny * nz):
        j = r % ny
        k = r // ny
        for i in range(nx):
            v = i + sy * j + sz * k
            row = (i + nx * r) * per
            for t in range(per):
                for a in range(kk):
                    cells[row + t, a] = v + pattern[t, a]


def _cell_table(counts, n_vertices):
    """The cell table of the structured generators, written straight into its
    final int32 array: two triangles per square (cut along the diagonal from
    the lower-left corner), or the six Kuhn tetrahedra per box, positively
    oriented."""
    if len(counts) == 2:
        nx, ny = counts
        nz = 1
        # v00, v10, v11 and v00, v11, v01
        pattern = np.array([[0, 1, nx + 2], [0, nx + 2, nx + 1]], dtype=np.int64)
    else:
        nx, ny, nz = counts
        step = (1, nx + 1, (nx + 1) * (ny + 1))
        # the six axis orderings; odd ones get their last two vertices swapped so
        # that every tetrahedron is positively oriented
        perms = [((0, 1, 2), False), ((1, 2, 0), False), ((2, 0, 1), False),
                 ((0, 2, 1), True), ((2, 1, 0), True), ((1, 0, 2), True)]
        rows = []
        for p, odd in perms:
            a = step[p[0]]
            b = a + step[p[1]]
            c = b + step[p[2]]
            rows.append([0, a, c, b] if odd else [0, a, b, c])
        pattern = np.array(rows, dtype=np.int64)
    cells = np.empty((nx * ny * nz * pattern.shape[0], pattern.shape[1]),
                     dtype=index_dtype(n_vertices))
    by_size(_fill_grid_cells, cells.size)(nx, ny, nz, pattern, cells)
    return cells


def structured_triangles(nx, ny, lower=(0.0, 0.0), upper=(1.0, 1.0), *, regions=None,
                         region_names=None) -> Mesh:
    """Rectangle split into ``nx * ny`` squares, two triangles each.

    Every square is cut by its diagonal from the lower-left to the
    upper-right corner.

    Parameters
    ----------
    nx, ny : int
        Number of squares along x and y.
    lower, upper : sequence of 2 floats
        Opposite corners of the rectangle.
    regions, region_names : optional
        Cell regions, as in :meth:`Mesh.set_regions` (ids, a callable of the
        cell centroids, or ``{name: predicate}``).

    Returns
    -------
    Mesh
        ``(nx+1)(ny+1)`` vertices and ``2 nx ny`` triangles, tagged.

    Examples
    --------
    >>> m = structured_triangles(2, 3)
    >>> m.n_vertices, m.n_cells, len(m.facet_groups["boundary"])
    (12, 12, 10)
    """
    _check_counts("structured_triangles", (nx, ny))
    lo, hi = _check_box("structured_triangles", lower, upper, 2)
    check_mesh_memory(f"structured_triangles({nx}, {ny})", (nx + 1) * (ny + 1), 2 * nx * ny, 2,
                      "use fewer cells per axis")
    pts = _grid_points((nx, ny), lo, hi)
    cells = _cell_table((nx, ny), pts.shape[0])
    mesh = Mesh(pts, cells, check_coincident=False)  # grid points are distinct
    _regions(mesh, regions, region_names)
    return _tag_box(mesh, lo, hi, (hi - lo) / (nx, ny))


def structured_tetrahedra(nx, ny, nz, lower=(0.0, 0.0, 0.0), upper=(1.0, 1.0, 1.0), *,
                          regions=None, region_names=None) -> Mesh:
    """Box split into ``nx * ny * nz`` boxes, six conforming tetrahedra each.

    Each box is cut into the six tetrahedra around its main diagonal (Kuhn's
    subdivision, one tetrahedron per ordering of the axes); neighbouring boxes
    cut their shared face along the same diagonal, so the mesh is conforming.

    Parameters
    ----------
    nx, ny, nz : int
    lower, upper : sequence of 3 floats
    regions, region_names : optional
        Cell regions, as in :meth:`Mesh.set_regions`.

    Returns
    -------
    Mesh
        ``(nx+1)(ny+1)(nz+1)`` vertices and ``6 nx ny nz`` tetrahedra, tagged.

    Examples
    --------
    >>> m = structured_tetrahedra(2, 2, 2)
    >>> m.n_vertices, m.n_cells, round(float(m.cell_volumes.sum()), 12)
    (27, 48, 1.0)
    """
    _check_counts("structured_tetrahedra", (nx, ny, nz))
    lo, hi = _check_box("structured_tetrahedra", lower, upper, 3)
    check_mesh_memory(f"structured_tetrahedra({nx}, {ny}, {nz})",
                      (nx + 1) * (ny + 1) * (nz + 1), 6 * nx * ny * nz, 3,
                      "use fewer cells per axis")
    pts = _grid_points((nx, ny, nz), lo, hi)
    cells = _cell_table((nx, ny, nz), pts.shape[0])
    mesh = Mesh(pts, cells, check_coincident=False)  # grid points are distinct
    _regions(mesh, regions, region_names)
    return _tag_box(mesh, lo, hi, (hi - lo) / (nx, ny, nz))


def l_shaped_triangles(n, *, regions=None, region_names=None) -> Mesh:
    """The L-shaped domain (-1, 1)^2 without the quadrant x > 0, y < 0.

    Structured triangles of size ``1/n`` on each of the three unit squares.
    ``regions``/``region_names`` as in :meth:`Mesh.set_regions`.
    Tags: ``"xmin"`` (x = -1), ``"xmax"`` (x = 1), ``"ymin"`` (y = -1),
    ``"ymax"`` (y = 1), ``"reentrant"`` (the two edges meeting at the
    re-entrant corner (0, 0)) and ``"boundary"``.

    Examples
    --------
    >>> m = l_shaped_triangles(2)
    >>> round(float(m.cell_volumes.sum()), 12)
    3.0
    """
    _check_counts("l_shaped_triangles", (n,))
    check_mesh_memory(f"l_shaped_triangles({n})", (2 * n + 1) ** 2, 8 * n * n, 2,
                      "use a smaller n")
    sq = structured_triangles(2 * n, 2 * n, (-1.0, -1.0), (1.0, 1.0))
    centroid = sq.points[sq.cells].mean(axis=1)
    keep = ~((centroid[:, 0] > 0) & (centroid[:, 1] < 0))
    pts, cells, _ = remove_unreferenced_vertices(sq.points, sq.cells[keep])
    mesh = Mesh(pts, cells, check_coincident=False)
    x = mesh.facet_midpoints()
    tol = 1e-8 / n
    sides = {
        "xmin": np.abs(x[0] + 1) <= tol,
        "xmax": np.abs(x[0] - 1) <= tol,
        "ymin": np.abs(x[1] + 1) <= tol,
        "ymax": np.abs(x[1] - 1) <= tol,
    }
    sides["reentrant"] = ~(sides["xmin"] | sides["xmax"] | sides["ymin"] | sides["ymax"])
    for name, mask in sides.items():
        mesh.set_facet_tag(name, np.flatnonzero(mask))
    _regions(mesh, regions, region_names)
    return mesh
