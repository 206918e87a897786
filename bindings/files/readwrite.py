"""Mesh files in (meshio) and result files out (VTU), written atomically.

Reading
-------
:func:`read_mesh` reads any format meshio reads that holds linear triangles
or tetrahedra; the formats we test are Gmsh ``.msh`` (versions 2.2 and 4.1,
text and binary), VTU and XDMF (meshio needs the ``h5py`` package for every
XDMF file, even one with inline XML data; without it the error says so).  The cells of the highest dimension (triangles
in 2D, tetrahedra in 3D) become the mesh; cells one dimension lower (lines in
2D, triangles in 3D) are facets and carry the boundary tags:

* the tag of a facet is its Gmsh physical group: the group's *name* where the
  file names it (``$PhysicalNames``, meshio's ``field_data``), otherwise the
  group's integer id written as a string (``"7"``); id 0 (what a Gmsh file
  without physical groups gives every element) is no group and no tag;
* files without Gmsh physical groups may carry the ids in a cell-data array
  named ``medit:ref`` or ``CellEntityIds``; those are used in that order;
* a file without facet tags gets one tag, ``"boundary"``, holding every
  boundary facet.  A file with tags also gets ``"boundary"`` (the whole
  boundary), unless one of its groups already has that name.

The physical groups of the cells themselves (surfaces in 2D, volumes in 3D)
become the mesh's cell regions (``mesh.regions``, ``mesh.region_names``), by
name where the file names them, by number otherwise; a file without them
gives the one region ``"domain"``.  Points, vertices (0-dimensional cells)
and, in 3D, lines are ignored.  A tagged facet that lies inside the domain
(an interface between two regions) cannot carry a boundary condition: it is
left out of its tag, with a warning; the interfaces between regions are
``mesh.interfaces`` (usable for flux output).  Unused points are
dropped.  2D meshes stored with a zero z column are accepted.

Writing
-------
:func:`write_solution` writes a :class:`~galerkit.problem.Solution` as one
VTU file; see its docstring for the arrays.  Both writers here and the PNG
writers in :mod:`galerkit.bindings.files.plots` write a temporary file next to the
target and rename it (:func:`atomic_path` then :func:`os.replace`), so a
reader never sees half a file.
"""

from __future__ import annotations

import contextlib
import io
import math
import os
import re
import tempfile
import time
import warnings
from pathlib import Path
from xml.sax.saxutils import escape as _xml_escape

import numpy as np

from galerkit.elements import REFERENCE_FACETS
from galerkit.errors import InputError, MeshError
from galerkit.mesh import Mesh, merge_duplicate_vertices
from galerkit.refinement import refine_uniform

from .vtu import write_vtu

__all__ = ["read_mesh", "write_solution", "atomic_path", "write_atomically", "xml_name",
           "sample_solution", "SampledSolution", "TAG_ARRAY_PREFIX"]

_CELL_OF_DIM = {2: "triangle", 3: "tetra"}
_FACET_OF_DIM = {2: "line", 3: "triangle"}
#: cell types meshio may return that galerkit refuses, with what to do instead
_REFUSED = {
    "quad": "quadrilaterals", "quad8": "quadrilaterals", "quad9": "quadrilaterals",
    "hexahedron": "hexahedra", "hexahedron20": "hexahedra", "hexahedron24": "hexahedra",
    "hexahedron27": "hexahedra", "wedge": "prisms (wedges)", "wedge15": "prisms (wedges)",
    "wedge18": "prisms (wedges)", "pyramid": "pyramids", "pyramid13": "pyramids",
    "pyramid14": "pyramids", "polygon": "polygons", "polyhedron": "polyhedra",
}
_CURVED = {"line3", "triangle6", "triangle7", "triangle10", "tetra10", "tetra20", "line4"}
_IGNORED = {"vertex"}
#: cell-data names tried for facet ids when the file has no Gmsh physical groups
_OTHER_TAG_KEYS = ("medit:ref", "CellEntityIds")
#: point-data name prefix of the tag-membership arrays in written VTU files
TAG_ARRAY_PREFIX = "tag_"


# ----------------------------------------------------------------------------
# reading
# ----------------------------------------------------------------------------
def read_mesh(path, *, merge_duplicates=False) -> Mesh:
    """Read a triangle or tetrahedron mesh with meshio (Gmsh .msh, VTU, XDMF, ...).

    Parameters
    ----------
    path : str or path-like
        The mesh file; the format follows from the suffix (meshio's rules).
    merge_duplicates : bool, default False
        Join distinct vertices that lie at the same place (a file with nodes
        repeated along an interface) with
        :func:`galerkit.mesh.merge_duplicate_vertices` before the mesh is
        built; facet tags follow the joined vertices.  Without it such a file
        is refused (``MeshError``), since its cells would not be connected
        there.

    Returns
    -------
    Mesh
        With facet tags from the file's physical groups (by name where named,
        by integer id otherwise) and ``"boundary"``; see the module
        documentation for the rules.

    Raises
    ------
    InputError
        The file is missing, a folder, empty, of an unknown format or cannot
        be parsed (corrupt); it has quadrilaterals, hexahedra or other cells
        galerkit does not support, curved (second-order) cells, no triangles
        or tetrahedra, triangles off the plane z = 0, or lower-dimensional
        cells that are not facets of the mesh (mixed dimensions).  Every
        message starts with the file name.
    MeshError
        The cells themselves are invalid (degenerate, non-manifold, distinct
        vertices at one place without ``merge_duplicates``, ...); the message
        starts with the file name.

    Warns
    -----
    UserWarning
        When tagged facets lie inside the domain and are dropped from their tag.

    Examples
    --------
    >>> import meshio, numpy as np, tempfile, os
    >>> pts = np.array([[0., 0.], [1., 0.], [1., 1.], [0., 1.]])
    >>> cells = [("line", np.array([[0, 1]])), ("triangle", np.array([[0, 1, 2], [0, 2, 3]]))]
    >>> f = os.path.join(tempfile.mkdtemp(), "square.msh")
    >>> meshio.write(f, meshio.Mesh(pts, cells,
    ...     cell_data={"gmsh:physical": [np.array([3]), np.array([1, 1])],
    ...                "gmsh:geometrical": [np.array([1]), np.array([1, 1])]},
    ...     field_data={"floor": np.array([3, 1])}), file_format="gmsh22")
    >>> mesh = read_mesh(f)
    >>> sorted(mesh.facet_groups), len(mesh.facet_groups["floor"])
    (['boundary', 'floor'], 1)
    """
    return _read_mesh(path, merge_duplicates)[0]


def _read_mesh(path, merge_duplicates=False):
    """:func:`read_mesh`, and the number of vertices joined by ``merge_duplicates``."""
    import meshio

    p = Path(path)
    where = f"mesh file {str(p)!r}"
    if not p.exists():
        raise InputError(f"{where} does not exist; check the path (relative paths start "
                         f"from {os.getcwd()!r})")
    if p.is_dir():
        raise InputError(f"{where} is a folder, not a mesh file")
    if p.stat().st_size == 0:
        raise InputError(f"{where} is empty (0 bytes); write the mesh again")
    chatter = io.StringIO()  # meshio prints (and may exit) on some damaged files
    try:
        with warnings.catch_warnings(), contextlib.redirect_stdout(chatter), \
                contextlib.redirect_stderr(chatter):
            warnings.simplefilter("ignore")
            m = meshio.read(str(p))
    except SystemExit:
        # meshio's own words are not quoted: they may hold lines of the file
        raise InputError(
            f"{where} could not be read; it looks damaged or is not in the format its "
            f"suffix {p.suffix!r} says (meshio gave up on it). Export the mesh again from "
            "your mesher") from None
    except ModuleNotFoundError as exc:
        raise InputError(
            f"{where}: reading this format needs the Python package {exc.name!r}, which is "
            f"not installed (meshio imports it for every {p.suffix} file); install it "
            f"(pip install {exc.name}) or convert the mesh to .msh or .vtu") from None
    except Exception as exc:  # meshio raises many kinds for a damaged file
        text = str(exc).strip() or type(exc).__name__
        if "nknown file format" in text or "deduce file format" in text:
            raise InputError(
                f"{where}: meshio does not know the format of suffix {p.suffix!r}; use a "
                "Gmsh .msh, .vtu or .xdmf file (or another format meshio reads)") from None
        # only the kind of failure: the text of a reader's exception may quote the file
        raise InputError(
            f"{where} could not be read; it looks damaged or is not in the format its "
            f"suffix {p.suffix!r} says (the reader raised {type(exc).__name__}). Export the "
            "mesh again from your mesher") from None
    return _mesh_from_meshio(m, where, merge_duplicates)


def _mesh_from_meshio(m, where: str, merge_duplicates=False):
    """The Mesh of a meshio mesh, and the number of vertices joined."""
    types = [b.type for b in m.cells]
    refused = sorted({_REFUSED[t] for t in types if t in _REFUSED})
    if refused:
        counts = ", ".join(f"{sum(len(b.data) for b in m.cells if b.type == t)} {t}"
                           for t in sorted({t for t in types if t in _REFUSED}))
        raise InputError(
            f"{where} holds {' and '.join(refused)} ({counts}); galerkit solves on "
            "linear triangles and tetrahedra only. Ask your mesher for a simplex mesh "
            "(in Gmsh: no recombination), or split each cell into simplices")
    curved = sorted({t for t in types if t in _CURVED})
    if curved:
        raise InputError(
            f"{where} holds second-order (curved) cells {curved}; galerkit reads linear "
            "cells only and raises the degree itself (solve with a higher degree). "
            "Export a first-order mesh (in Gmsh: element order 1)")
    unknown = sorted({t for t in types if t not in _IGNORED and t not in
                      ("line", "triangle", "tetra")})
    if unknown:
        raise InputError(f"{where} holds cells of type {unknown}, which galerkit does not "
                         "support; it needs linear triangles (2D) or tetrahedra (3D)")
    dim = 3 if "tetra" in types else 2 if "triangle" in types else None
    if dim is None:
        found = sorted(set(types)) or "no cells at all"
        raise InputError(f"{where} has no triangles or tetrahedra (found {found}); "
                         "galerkit needs a 2D triangle or a 3D tetrahedron mesh")
    pts = np.asarray(m.points)
    if pts.ndim != 2 or pts.shape[0] == 0 or pts.shape[1] not in (2, 3):
        raise InputError(f"{where}: the points have shape {pts.shape}; expected "
                         "(n, 2) or (n, 3)")
    if pts.dtype.kind not in "iuf":
        raise InputError(f"{where}: the point coordinates are not real numbers ({pts.dtype})")
    pts = np.asarray(pts, dtype=np.float64)
    if not np.isfinite(pts).all():
        i = int(np.flatnonzero(~np.isfinite(pts).all(axis=1))[0])
        raise InputError(f"{where}: point {i} has a non-finite coordinate {pts[i].tolist()}")
    if dim == 3 and pts.shape[1] != 3:
        raise InputError(f"{where}: tetrahedra need three coordinates, the points have "
                         f"{pts.shape[1]}")
    if dim == 2 and pts.shape[1] == 3:
        extent = float(np.ptp(pts[:, :2], axis=0).max()) if pts.shape[0] > 1 else 1.0
        z = np.abs(pts[:, 2])
        if z.max() > 1e-12 * max(extent, np.finfo(float).tiny):
            i = int(np.argmax(z))
            raise InputError(
                f"{where}: triangles with z != 0 (point {i} has z = {pts[i, 2]!r}); galerkit "
                "solves 2D problems in the plane z = 0 and does not solve on surfaces in "
                "3D. Give the mesh a zero z column, or drop the z coordinate")
        pts = pts[:, :2]
    cell_blocks = [np.asarray(b.data) for b in m.cells if b.type == _CELL_OF_DIM[dim]]
    cells = np.concatenate(cell_blocks).astype(np.int64)
    if cells.size and (cells.min() < 0 or cells.max() >= pts.shape[0]):
        raise InputError(f"{where}: a cell refers to a point outside 0..{pts.shape[0] - 1}; "
                         "the file is damaged")
    used = np.unique(cells)
    old_to_new = np.full(pts.shape[0], -1, dtype=np.int64)
    old_to_new[used] = np.arange(used.size)
    pts, cells = pts[used], old_to_new[cells]
    joined = 0
    try:
        if merge_duplicates:
            pts, cells, merged = merge_duplicate_vertices(pts, cells)
            joined = used.size - pts.shape[0]
            old_to_new[used] = merged  # file point -> vertex of the joined mesh
        regions, region_names = _cell_regions(m, dim, where)
        mesh = Mesh(pts, cells, regions=regions, region_names=region_names)
    except MeshError as exc:
        raise MeshError(f"{where}: {exc} (cell and vertex numbers count the "
                        f"{_CELL_OF_DIM[dim]} cells of the file from 0, and the vertices "
                        "after unused points were dropped)") from None
    _read_tags(m, mesh, dim, old_to_new, where)  # a group named "boundary" replaces Mesh's own
    return mesh, joined


def _tag_key(data):
    return "gmsh:physical" if "gmsh:physical" in data else next(
        (k for k in _OTHER_TAG_KEYS if k in data), None)


def _group_names(m):
    """``(dimension, id) -> name`` of the file's named physical groups."""
    names = {}
    for name, value in (m.field_data or {}).items():
        v = np.asarray(value).ravel()
        if v.size >= 2:
            names[(int(v[1]), int(v[0]))] = str(name)
    return names


def _cell_regions(m, dim, where):
    """Region ids of the cells (in file order) and their names, from the physical
    groups of full dimension; ``(None, None)`` when the file has none."""
    data = m.cell_data or {}
    key = _tag_key(data)
    if key is None:
        return None, None
    ids = []
    for block, block_ids in zip(m.cells, data[key]):
        if block.type != _CELL_OF_DIM[dim]:
            continue
        t = np.asarray(block_ids).ravel()
        if t.shape[0] != len(block.data) or t.dtype.kind not in "iuf":
            raise InputError(f"{where}: the {key!r} data of a {block.type} block does not "
                             "hold one integer per cell; the file is damaged")
        ids.append(t.astype(np.int64))
    ids = np.concatenate(ids)
    if not ids.any():  # no groups of cells (meshio gives 0 then)
        return None, None
    if ids.min() < 0:
        raise InputError(f"{where}: a cell has the negative group id {int(ids.min())}; "
                         "region ids must be >= 0")
    names = _group_names(m)
    table = {}
    for i in np.unique(ids).tolist():
        name = names.get((dim, i), str(i))
        if name == "default":
            raise InputError(f"{where}: the cell group {i} is named 'default', which "
                             "problem files reserve for the regions not named; rename it")
        table[name] = i
    return ids, table


def _match_rows(rows, table):
    """Index in ``table`` of every row of ``rows`` (-1 where absent); rows of ints."""
    if rows.shape[0] == 0:
        return np.zeros(0, dtype=np.int64)
    both = np.concatenate([table, rows]).astype(np.int64)
    _, inverse = np.unique(both, axis=0, return_inverse=True)
    inverse = inverse.ravel()
    where = np.full(int(inverse.max()) + 1, -1, dtype=np.int64)
    where[inverse[: table.shape[0]]] = np.arange(table.shape[0])
    return where[inverse[table.shape[0]:]]


def _read_tags(m, mesh: Mesh, dim: int, old_to_new, where: str) -> None:
    data = m.cell_data or {}
    key = _tag_key(data)
    if key is None:
        return
    names = _group_names(m)
    facet_type = _FACET_OF_DIM[dim]
    verts, ids = [], []
    for block, block_ids in zip(m.cells, data[key]):
        if block.type != facet_type:
            continue
        b = np.asarray(block.data, dtype=np.int64)
        t = np.asarray(block_ids).ravel()
        if t.shape[0] != b.shape[0] or t.dtype.kind not in "iuf":
            raise InputError(f"{where}: the {key!r} data of a {facet_type} block does not "
                             "hold one integer per cell; the file is damaged")
        verts.append(b)
        ids.append(t.astype(np.int64))
    if not verts:
        return
    verts = np.concatenate(verts)
    ids = np.concatenate(ids)
    if key == "gmsh:physical":
        # Gmsh numbers physical groups from 1; 0 is what meshio gives elements
        # of a file without physical groups: no group, no tag
        keep = ids != 0
        verts, ids = verts[keep], ids[keep]
        if not verts.size:
            return
    if verts.min() < 0 or verts.max() >= old_to_new.shape[0]:
        raise InputError(f"{where}: a {facet_type} refers to a point that does not exist; "
                         "the file is damaged")
    local = old_to_new[verts]
    off_mesh = (local < 0).any(axis=1)
    local = np.sort(local, axis=1)
    facet = np.full(local.shape[0], -1, dtype=np.int64)
    ok = ~off_mesh
    facet[ok] = _match_rows(local[ok], mesh.boundary_facets)
    loose = np.flatnonzero(facet < 0)
    if loose.size:
        # inside the domain (an interface) or not part of the mesh at all?
        ref = np.array(REFERENCE_FACETS[dim])
        all_facets = np.sort(mesh.cells[:, ref].reshape(-1, dim).astype(np.int64), axis=1)
        inside = np.zeros(loose.size, dtype=bool)
        cand = ~off_mesh[loose]
        inside[cand] = _match_rows(local[loose[cand]], all_facets) >= 0
        stray = loose[~inside]
        if stray.size:
            i = int(stray[0])
            kind = {2: "line segments", 3: "triangles"}[dim]
            raise InputError(
                f"{where}: mixed dimensions: {stray.size} {kind} are not facets of the "
                f"{mesh.cell_type} mesh (the first joins file points "
                f"{verts[i].tolist()}). A {dim}D mesh may hold {kind} only as facets of "
                "its cells; remove the extra cells, or mesh the lower-dimensional part "
                "separately")
        for tid in np.unique(ids[loose]):
            label = names.get((dim - 1, int(tid)), str(int(tid)))
            warnings.warn(
                f"{where}: {int(np.sum(ids[loose] == tid))} facets of group {label!r} lie "
                "inside the domain (an interface); only boundary facets can carry "
                "boundary conditions, so they are left out of that tag", stacklevel=3)
    for tid in np.unique(ids):
        label = names.get((dim - 1, int(tid)), str(int(tid)))
        sel = facet[(ids == tid) & (facet >= 0)]
        if sel.size:
            mesh.set_facet_tag(label, sel)


# ----------------------------------------------------------------------------
# writing
# ----------------------------------------------------------------------------
#: characters XML 1.0 cannot hold even escaped (C0 controls but tab, newline and
#: carriage return; lone surrogates; U+FFFE, U+FFFF): replaced by "?" in names
_NOT_XML = re.compile("[\x00-\x08\x0b\x0c\x0e-\x1f\ud800-\udfff\ufffe\uffff]")
#: escapes inside a double-quoted XML attribute; tab, newline and carriage
#: return as references, since a parser turns them into spaces otherwise
_XML_ATTRIBUTE = {'"': "&quot;", "'": "&apos;", "\t": "&#9;", "\n": "&#10;", "\r": "&#13;"}


def xml_name(name) -> str:
    """``name`` as the text of an XML attribute: ``& < > " '`` escaped.

    meshio's VTU writer puts array names into ``Name="..."`` as they are, so
    every name galerkit writes (field, tags, extra arrays) passes through here;
    a reader gives back the original name.  Characters that XML cannot hold
    at all become ``"?"``.

    Examples
    --------
    >>> xml_name('a<b & "c"')
    'a&lt;b &amp; &quot;c&quot;'
    """
    return _xml_escape(_NOT_XML.sub("?", str(name)), _XML_ATTRIBUTE)


#: a temporary sibling older than this is left over from a killed write
STALE_SECONDS = 3600.0


def _remove_stale_siblings(p: Path) -> None:
    """Remove temporary siblings of ``p`` left by killed writes (older than an hour).

    Only names of the exact form :func:`atomic_path` makes (``.<stem>.`` +
    8 characters of :func:`tempfile.mkstemp` + ``<suffix>``) are touched;
    a younger one may belong to a write still running in another process.
    """
    pattern = re.compile(re.escape(f".{p.stem}.") + r"[A-Za-z0-9_]{8}" + re.escape(p.suffix))
    now = time.time()
    try:
        entries = list(os.scandir(p.parent or "."))
    except OSError:
        return
    for entry in entries:
        if not pattern.fullmatch(entry.name):
            continue
        try:
            if entry.is_file(follow_symlinks=False) and \
                    now - entry.stat(follow_symlinks=False).st_mtime > STALE_SECONDS:
                os.unlink(entry.path)
        except OSError:
            pass


def atomic_path(path):
    """A temporary sibling of ``path`` (same suffix) to write and then rename.

    Stale siblings of earlier, killed writes of the same target are removed
    first (see :data:`STALE_SECONDS`).
    """
    p = Path(path)
    _remove_stale_siblings(p)
    fd, tmp = tempfile.mkstemp(prefix=f".{p.stem}.", suffix=p.suffix, dir=p.parent or ".")
    os.close(fd)
    return Path(tmp)


def write_atomically(path, write):
    """Call ``write(tmp_path)`` on a temporary sibling, then rename it to ``path``.

    The temporary file is removed when ``write`` fails; the target is then
    untouched.  The file gets permissions 0o644.

    Raises
    ------
    InputError
        When the folder does not exist or is not writable (the message names it).
    """
    p = Path(path)
    try:
        tmp = atomic_path(p)
    except OSError as exc:
        raise InputError(f"cannot write {str(p)!r}: {exc.strerror or exc}; check that the "
                         "folder exists and is writable") from None
    try:
        write(tmp)
        os.chmod(tmp, 0o644)
        os.replace(tmp, p)
    except OSError as exc:
        raise InputError(f"cannot write {str(p)!r}: {exc.strerror or exc}") from None
    finally:
        if tmp.exists():
            tmp.unlink()
    return p


class SampledSolution:
    """A solution drawn on a P1 mesh (see :func:`sample_solution`).

    Attributes
    ----------
    mesh : Mesh
        The output mesh: the computational mesh, or its uniform refinement.
    values : ndarray (mesh.n_vertices,)
        The solution at the vertices of ``mesh`` (exact values of the finite
        element function there, no averaging).
    gradients : ndarray (mesh.n_cells, dim)
        The gradient at each cell centroid of ``mesh``.
    parent_cells : ndarray (mesh.n_cells,)
        The computational cell each output cell lies in.
    refinements : int
        How many times the computational mesh was refined.
    """

    def __init__(self, mesh, values, gradients, parent_cells, refinements):
        self.mesh = mesh
        self.values = values
        self.gradients = gradients
        self.parent_cells = parent_cells
        self.refinements = refinements


def default_refinements(degree: int) -> int:
    """Refinements for the output mesh: ``ceil(log2(degree))`` (P1 0, P2 1, P3/P4 2)."""
    return 0 if degree <= 1 else int(math.ceil(math.log2(degree)))


def sample_solution(solution, refinements=None, *, block=1 << 16) -> SampledSolution:
    """Sub-sample a solution onto a uniformly refined P1 mesh.

    The computational mesh is refined ``refinements`` times with
    :func:`galerkit.refine_uniform` (default :func:`default_refinements`:
    none for P1, once for P2 -- whose nodes are then exactly the vertices --,
    twice for P3 and P4 -- for P4 again exactly its nodes).  The solution is
    evaluated at every vertex of the refined mesh through the parent map: the
    reference coordinates of the vertex in its computational cell, then that
    cell's Lagrange basis (no point search).  Gradients are evaluated the
    same way at the refined cell centroids.

    Parameters
    ----------
    solution : Solution
    refinements : int, optional
    block : int
        Vertices or cells per evaluation block (bounds temporary memory).

    Returns
    -------
    SampledSolution

    Examples
    --------
    >>> import numpy as np, galerkit as gk
    >>> exact = lambda x: x[0] ** 2
    >>> p = gk.PoissonProblem(gk.structured_triangles(2, 2), source=-2.0,
    ...                       dirichlet={"boundary": exact})
    >>> s = sample_solution(p.solve(degree=2))
    >>> s.refinements, s.mesh.n_vertices
    (1, 25)
    >>> bool(np.allclose(s.values, exact(s.mesh.points.T)))
    True
    """
    disc = solution.disc
    mesh = disc.mesh
    u = np.asarray(solution.u, dtype=np.float64)
    n_ref = default_refinements(disc.degree) if refinements is None else int(refinements)
    if n_ref < 0:
        raise InputError(f"sample_solution: refinements must be >= 0, got {refinements!r}")
    if n_ref == 0 and disc.degree == 1:
        return SampledSolution(mesh, u[disc.vertex_dofs], solution.cell_gradients(),
                               np.arange(mesh.n_cells), 0)
    fine = mesh
    for _ in range(n_ref):
        fine = refine_uniform(fine)
    anc = np.arange(fine.n_cells)
    m = fine
    while m is not mesh:
        anc = m.parent_cells[anc]
        m = m.parent
    d = mesh.dim
    # one owning fine cell per fine vertex (first occurrence: deterministic)
    _, first = np.unique(fine.cells.ravel(), return_index=True)
    owner = anc[first // (d + 1)]
    values = np.empty(fine.n_vertices)
    for lo in range(0, fine.n_vertices, block):
        hi = min(fine.n_vertices, lo + block)
        c = owner[lo:hi]
        xi, _ = _reference_coordinates(mesh, c, fine.points[lo:hi])
        V = disc.element.tabulate(xi)
        values[lo:hi] = np.einsum("pa,pa->p", V, u[disc.cell_dofs[c]])
    grads = np.empty((fine.n_cells, d))
    for lo in range(0, fine.n_cells, block):
        hi = min(fine.n_cells, lo + block)
        c = anc[lo:hi]
        centroid = fine.points[fine.cells[lo:hi]].mean(axis=1)
        xi, J = _reference_coordinates(mesh, c, centroid)
        G = disc.element.tabulate_gradients(xi)  # (n, k, d)
        gref = np.einsum("pkr,pk->pr", G, u[disc.cell_dofs[c]])
        grads[lo:hi] = np.linalg.solve(np.transpose(J, (0, 2, 1)), gref[..., None])[..., 0]
    return SampledSolution(fine, values, grads, anc, n_ref)


def _reference_coordinates(mesh, cells, x):
    """Reference coordinates (n, d) of points x (n, d) in the given cells, and J."""
    v = mesh.points[mesh.cells[cells]]  # (n, d+1, d)
    J = np.transpose(v[:, 1:] - v[:, :1], (0, 2, 1))  # columns: edges from vertex 0
    xi = np.linalg.solve(J, (x - v[:, 0])[..., None])[..., 0]
    # the points lie in their cells: clip rounding below 0 / above 1
    return np.clip(xi, 0.0, 1.0), J


def write_solution(path, solution, *, name="u", conductivity=None, refinements=None,
                   extra_cell_data=None, tags=None):
    """Write a solution as one VTU file (atomically).

    Parameters
    ----------
    path : str or path-like
        Target ``.vtu`` file; its folder must exist.
    solution : Solution
    name : str
        Name of the field (for example ``"temperature"``).
    conductivity : optional
        Overrides ``solution.problem.conductivity`` (same forms).
    refinements : int, optional
        Output-mesh refinements; default as :func:`sample_solution` (P1: the
        computational mesh itself; P2: refined once; P3, P4: twice).
    extra_cell_data : dict, optional
        ``name -> f(parent_cells)``: more cell arrays, computed from the
        computational cell of each output cell (``f`` returns shape
        ``(n_output_cells,)``).
    tags : list of str, optional
        Facet tags to write as ``tag_<tag>`` arrays (default: the mesh's);
        a name the mesh lacks gets an array of zeros (so that the pieces of
        a distributed solution hold the same arrays).

    Returns
    -------
    pathlib.Path

    Notes
    -----
    The file holds the output mesh (linear triangles or tetrahedra; 2D points
    get z = 0) with

    ============================  =========  ====================================
    array                         where      meaning
    ============================  =========  ====================================
    ``<name>``                    points     the solution at the vertices
    ``tag_<tag>``                 points     uint8, 1 on the vertices of the
                                             facets of that tag, else 0 (one
                                             array per facet tag)
    ``grad_<name>``               cells      gradient at the cell centroid (3
                                             components; z = 0 in 2D)
    ``flux``                      cells      ``-conductivity * gradient`` there
    ``conductivity``              cells      at the centroid (scalar
                                             conductivities)
    ``conductivity_tensor``       cells      9 components, row by row (tensors)
    ``parent_cell``               cells      the computational cell each output
                                             cell lies in
    ``region``                    cells      int32, the cell region id (names:
                                             ``mesh.region_names``)
    ============================  =========  ====================================

    For P2 and higher the solution is sub-sampled onto the refined P1 mesh
    (values exact at its vertices, see :func:`sample_solution`), so the
    picture shows the curvature inside each computational cell; for P2 and
    P4 those vertices are exactly the dof nodes.

    Examples
    --------
    >>> import tempfile, os, meshio, numpy as np, galerkit as gk
    >>> sol = gk.PoissonProblem(gk.structured_triangles(3, 3), source=1.0,
    ...                         dirichlet={"boundary": 0.0}).solve()
    >>> f = write_solution(os.path.join(tempfile.mkdtemp(), "u.vtu"), sol)
    >>> back = meshio.read(f)
    >>> bool(np.allclose(back.point_data["u"], sol.u)), sorted(back.cell_data)[:2]
    (True, ['conductivity', 'flux'])
    """

    s = sample_solution(solution, refinements)
    mesh = s.mesh
    d = mesh.dim
    pts = mesh.points if d == 3 else np.column_stack([mesh.points, np.zeros(mesh.n_vertices)])
    kappa = solution.problem.conductivity if conductivity is None else conductivity
    scalar, tensor = _cell_conductivity(kappa, mesh, s.parent_cells, solution.disc.mesh.n_cells)
    grad = s.gradients
    if tensor is not None:
        flux = -np.einsum("mij,mj->mi", tensor, grad)
    else:
        flux = -grad * scalar[:, None]
    g3 = np.zeros((mesh.n_cells, 3))
    g3[:, :d] = grad
    f3 = np.zeros((mesh.n_cells, 3))
    f3[:, :d] = flux
    cell_data = {xml_name(f"grad_{name}"): [g3], "flux": [f3],
                 "parent_cell": [np.asarray(s.parent_cells, dtype=np.int64)],
                 "region": [np.asarray(solution.disc.mesh.regions[s.parent_cells],
                                       dtype=np.int32)]}
    if tensor is not None:
        t9 = np.zeros((mesh.n_cells, 3, 3))
        t9[:, :d, :d] = tensor
        cell_data["conductivity_tensor"] = [t9.reshape(-1, 9)]
    else:
        cell_data["conductivity"] = [scalar]
    for key, f in (extra_cell_data or {}).items():
        cell_data[xml_name(key)] = [np.asarray(f(np.asarray(s.parent_cells)))]
    point_data = {xml_name(name): np.asarray(s.values, dtype=np.float64)}
    for tag in (mesh.facet_groups if tags is None else tags):
        member = np.zeros(mesh.n_vertices, dtype=np.uint8)
        if tag in mesh.facet_groups:
            member[mesh.boundary_facets[mesh.facet_groups[tag]].ravel()] = 1
        point_data[xml_name(TAG_ARRAY_PREFIX + tag)] = member
    cell_data = {k: v[0] for k, v in cell_data.items()}
    return write_atomically(path, lambda tmp: write_vtu(tmp, pts, _CELL_OF_DIM[d], mesh.cells,
                                                        point_data, cell_data))


def _cell_conductivity(kappa, mesh, parent_cells, n_parent):
    """(scalar (m,), None) or (None, tensor (m, d, d)) at the output cells."""
    from galerkit.regions import RegionCoefficient

    d = mesh.dim
    m = mesh.n_cells
    if isinstance(kappa, dict):
        raise InputError("write_solution: give a per-region conductivity through the "
                         "problem (PoissonProblem binds it to the mesh's regions)")
    if isinstance(kappa, RegionCoefficient):
        if kappa.has_tensor:
            return None, kappa.tensors(d)[parent_cells]
        reg = kappa.regions[parent_cells]
        out = np.empty(m)
        c = np.ascontiguousarray(mesh.points[mesh.cells].mean(axis=1).T)
        for i, v in kappa.by_id.items():
            sel = reg == i
            if not sel.any():
                continue
            out[sel] = np.asarray(v(np.ascontiguousarray(c[:, sel])), dtype=np.float64) \
                if callable(v) else float(v)
        return out, None
    if callable(kappa):
        c = np.ascontiguousarray(mesh.points[mesh.cells].mean(axis=1).T)
        v = np.asarray(kappa(c), dtype=np.float64)
        if v.ndim == 0:
            v = np.full(m, float(v))
        return v.reshape(m), None
    a = np.asarray(kappa, dtype=np.float64)
    if a.ndim == 0:
        return np.full(m, float(a)), None
    if a.shape == (n_parent,):
        return a[parent_cells], None
    if a.shape == (d, d):
        return None, np.broadcast_to(a, (m, d, d))
    if a.shape == (n_parent, d, d):
        return None, a[parent_cells]
    raise InputError(f"write_solution: conductivity of shape {a.shape} is not a number, a "
                     f"per-cell array ({n_parent},) or a tensor ({d}, {d}) / ({n_parent}, "
                     f"{d}, {d})")


def write_parallel_index(path, pieces):
    """Write the VTK parallel index (``.pvtu``) of VTU pieces written by ranks.

    The arrays and their types are read from the header of the first piece;
    every piece must hold the same arrays (true for pieces of one solution).
    ParaView opens the index as one data set.

    Parameters
    ----------
    path : path-like
        The ``.pvtu`` file; the pieces are named relative to its folder.
    pieces : list of path-like
        The ``.vtu`` files, which must exist.

    Returns
    -------
    pathlib.Path

    Raises
    ------
    InputError
        A missing piece, or pieces with different arrays.
    """
    import xml.etree.ElementTree as ET

    path = Path(path)
    sections = None
    for piece in pieces:
        piece = Path(piece)
        if not piece.exists():
            raise InputError(f"write_parallel_index: piece {str(piece)!r} does not exist")
        found = {"PointData": [], "CellData": [], "Points": []}
        try:
            for _, el in ET.iterparse(piece, events=("end",)):
                if el.tag in found:
                    found[el.tag] = [(a.get("type"), a.get("Name"),
                                      a.get("NumberOfComponents", "1"))
                                     for a in el.findall("DataArray")]
                elif el.tag == "Piece":
                    break
        except ET.ParseError as exc:
            raise InputError(f"write_parallel_index: piece {str(piece)!r} is not VTU XML "
                             f"({exc})") from None
        if sections is None:
            sections = found
        elif found != sections:
            raise InputError(f"write_parallel_index: piece {str(piece)!r} holds other arrays "
                             f"than {str(pieces[0])!r}; pieces of one data set must match")

    def arrays(kind):
        return "".join(
            f'      <PDataArray type="{xml_name(t)}"' + (f' Name="{xml_name(n)}"' if n else "")
            + f' NumberOfComponents="{xml_name(c)}"/>\n' for t, n, c in sections[kind])

    rel = [os.path.relpath(Path(p), path.parent) for p in pieces]
    text = ('<?xml version="1.0"?>\n'
            '<VTKFile type="PUnstructuredGrid" version="0.1" byte_order="LittleEndian">\n'
            '  <PUnstructuredGrid GhostLevel="0">\n'
            '    <PPointData>\n' + arrays("PointData") + '    </PPointData>\n'
            '    <PCellData>\n' + arrays("CellData") + '    </PCellData>\n'
            '    <PPoints>\n' + arrays("Points") + '    </PPoints>\n'
            + "".join(f'    <Piece Source="{xml_name(r)}"/>\n' for r in rel)
            + '  </PUnstructuredGrid>\n</VTKFile>\n')
    return write_atomically(path, lambda tmp: Path(tmp).write_text(text, encoding="utf-8"))
