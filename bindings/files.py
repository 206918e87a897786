"""Mesh files in (meshio) and result files out (VTU), written atomically."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

import numpy as np

from galerkit.errors import InputError
from galerkit.mesh import Mesh

__all__ = ["read_mesh", "write_solution", "atomic_path"]

_CELL_OF_DIM = {2: "triangle", 3: "tetra"}
_FACET_OF_DIM = {2: "line", 3: "triangle"}
_UNSUPPORTED = {"quad", "hexahedron", "wedge", "pyramid", "quad8", "hexahedron20",
                "triangle6", "tetra10", "quad9", "hexahedron27"}


def read_mesh(path) -> Mesh:
    """Read a triangle or tetrahedron mesh with meshio (Gmsh .msh, VTU, XDMF, ...).

    Facet tags come from lower-dimensional cells carrying ``gmsh:physical``
    ids (named through the file's field data where it has names); a file
    without them gets the single tag ``"boundary"``.  2D meshes stored with a
    zero z column are accepted.

    Raises
    ------
    InputError
        Missing or unreadable file, unsupported cell types, mixed dimensions.
    """
    import meshio

    p = Path(path)
    if not p.is_file():
        raise InputError(f"mesh file {str(p)!r} does not exist")
    try:
        m = meshio.read(str(p))
    except Exception as exc:
        raise InputError(f"mesh file {str(p)!r} could not be read: {type(exc).__name__}: {exc}") from None
    types = {b.type for b in m.cells}
    bad = types & _UNSUPPORTED
    if bad:
        raise InputError(
            f"mesh file {str(p)!r} has cells of type {sorted(bad)}; galerkit supports linear "
            "triangles and tetrahedra only (convert quadrilaterals/hexahedra in your mesher)")
    dim = 3 if "tetra" in types else 2 if "triangle" in types else None
    if dim is None:
        raise InputError(f"mesh file {str(p)!r} has no triangles or tetrahedra (found {sorted(types)})")
    pts = np.asarray(m.points, dtype=np.float64)
    if dim == 2 and pts.shape[1] == 3:
        if np.abs(pts[:, 2]).max() > 0:
            raise InputError(f"mesh file {str(p)!r}: triangles with non-zero z coordinates "
                             "(a surface in 3D) are not supported")
        pts = pts[:, :2]
    cells = np.concatenate([b.data for b in m.cells if b.type == _CELL_OF_DIM[dim]])
    used = np.unique(cells)
    old_to_new = np.full(pts.shape[0], -1, dtype=np.int64)
    old_to_new[used] = np.arange(used.size)
    mesh = Mesh(pts[used], old_to_new[cells])
    # facet tags
    names = {}
    for name, (tag_id, tag_dim) in (m.field_data or {}).items():
        names[(int(tag_dim), int(tag_id))] = name
    phys = (m.cell_data or {}).get("gmsh:physical")
    tagged = False
    if phys is not None:
        facet_key = {tuple(f): i for i, f in enumerate(mesh.boundary_facets.tolist())}
        groups = {}
        for block, ids in zip(m.cells, phys):
            if block.type != _FACET_OF_DIM[dim]:
                continue
            for verts, tid in zip(old_to_new[block.data], np.asarray(ids)):
                key = tuple(sorted(int(v) for v in verts))
                if key in facet_key:
                    name = names.get((dim - 1, int(tid)), str(int(tid)))
                    groups.setdefault(name, []).append(facet_key[key])
        for name, ids in groups.items():
            mesh.set_facet_tag(name, np.array(ids, dtype=np.int64))
            tagged = True
    mesh.set_facet_tag("boundary", np.arange(mesh.boundary_facets.shape[0]))
    return mesh


def atomic_path(path):
    """A temporary sibling of ``path`` (same suffix) to write and then rename."""
    p = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{p.stem}.", suffix=p.suffix, dir=p.parent or ".")
    os.close(fd)
    return Path(tmp)


def write_solution(path, solution, *, name="u", conductivity=None):
    """Write a solution as VTU: the field, cell gradients and fluxes, conductivity.

    P1 fields are written at the vertices.  For P2..P4 the field is
    sub-sampled at the mesh vertices (the dofs at the vertices), and the
    cell-wise gradient is written at the centroids; refine the mesh for a
    finer picture.  The file appears atomically (temporary file, then rename).
    """
    import meshio

    disc = solution.disc
    mesh = disc.mesh
    pts = mesh.points if mesh.dim == 3 else np.column_stack([mesh.points, np.zeros(mesh.n_vertices)])
    u = solution.u[disc.vertex_dofs]
    grad = solution.cell_gradients()
    kappa = solution.problem.conductivity if conductivity is None else conductivity
    kappa_cells = _cell_scalar(kappa, mesh)
    flux = -grad * kappa_cells[:, None] if kappa_cells is not None else -grad
    g3 = np.zeros((mesh.n_cells, 3))
    g3[:, : mesh.dim] = grad
    f3 = np.zeros((mesh.n_cells, 3))
    f3[:, : mesh.dim] = flux
    cell_data = {f"grad_{name}": [g3], "flux": [f3]}
    if kappa_cells is not None:
        cell_data["conductivity"] = [kappa_cells]
    out = meshio.Mesh(pts, [(_CELL_OF_DIM[mesh.dim], mesh.cells)], point_data={name: u},
                      cell_data=cell_data)
    p = Path(path)
    tmp = atomic_path(p)
    try:
        meshio.write(str(tmp), out)
        os.chmod(tmp, 0o644)
        os.replace(tmp, p)
    finally:
        if tmp.exists():
            tmp.unlink()
    return p


def _cell_scalar(kappa, mesh):
    if callable(kappa):
        c = mesh.points[mesh.cells].mean(axis=1).T
        return np.asarray(kappa(np.ascontiguousarray(c)), dtype=np.float64)
    a = np.asarray(kappa, dtype=np.float64)
    if a.ndim == 0:
        return np.full(mesh.n_cells, float(a))
    if a.shape == (mesh.n_cells,):
        return a
    return None  # tensors: not written as a scalar
