"""Cell regions: a material (or zone) number per cell, with names.

A mesh carries one region id per cell (``mesh.regions``, int32, >= 0) and a
name for every id in use (``mesh.region_names``, ``name -> id``).  A mesh
built without regions has the one region ``"domain"`` (id 0).  Regions come
from the generators' ``regions=`` argument, :meth:`Mesh.set_regions`, the
cell groups of a mesh file, and are carried by :func:`refine_uniform`.

Coefficients (conductivity, source, mass coefficient) may be given per
region as a dict ``{region: value}``, where a key is a region name or id and
the optional key ``"default"`` covers every region not named.  A value is a
number, a callable ``f(x)``, or (for conductivities) a (d, d) tensor.
:func:`region_coefficient` turns such a dict into a
:class:`RegionCoefficient`, which the coefficient normalisers
(:mod:`galerkit.coefficients`) evaluate region by region.

Interfaces are the interior facets between cells of different regions,
grouped by the pair of regions (:func:`interfaces`).
"""

from __future__ import annotations

import numbers

import numpy as np

from .errors import InputError, MeshError

__all__ = ["DEFAULT_REGION", "DEFAULT_KEY", "RegionCoefficient", "region_coefficient",
           "as_region_ids", "Interface", "interfaces", "region_summary"]

#: the name of the single region of a mesh built without regions
DEFAULT_REGION = "domain"
#: the key of a per-region dict that covers every region not named
DEFAULT_KEY = "default"


def as_region_ids(mesh, regions, names=None):
    """Validated region ids (int32, (n_cells,)) and names (``name -> id``).

    Parameters
    ----------
    mesh : Mesh
    regions : array_like (n_cells,) of integers >= 0, callable, or dict
        Region id of every cell; or a callable ``regions(x)`` of the cell
        centroids ``x`` (dim, n_cells) returning those ids; or a dict
        ``{name: predicate}``, each ``predicate(x)`` of the centroids
        returning a boolean mask (a cell selected by two predicates is an
        error; cells selected by none form the region ``"domain"``, id 0,
        and the named regions get ids 1, 2, ... in the dict's order).
    names : dict name -> id, or sequence of names (name i for id i), optional
        Names of the ids; an id without a name is named by its number
        (``"3"``).

    Raises
    ------
    MeshError
        Wrong shape or dtype, a negative id, a name that is not a non-empty
        string or is ``"default"``, two names for one id, a predicate that
        fails or selects a cell twice.
    """
    m = mesh.n_cells
    centroids = None

    def x():
        nonlocal centroids
        if centroids is None:
            centroids = np.ascontiguousarray(mesh.points[mesh.cells].mean(axis=1).T)
        return centroids

    if hasattr(regions, "items"):
        if names is not None:
            raise MeshError("regions: give names either as the keys of a dict of predicates "
                            "or in names=, not both")
        ids = np.zeros(m, dtype=np.int64)
        taken = np.zeros(m, dtype=bool)
        names = {}
        for k, (name, pred) in enumerate(regions.items(), start=1):
            mask = _call(pred, x(), f"regions[{name!r}]")
            if mask.dtype != bool or mask.shape != (m,):
                raise MeshError(f"regions[{name!r}]: the predicate must return a boolean array "
                                f"of shape ({m},) for the cell centroids, got dtype "
                                f"{mask.dtype} shape {mask.shape}")
            both = mask & taken
            if both.any():
                c = int(np.flatnonzero(both)[0])
                other = next(n for n, i in names.items() if i == ids[c])
                raise MeshError(
                    f"regions: cell {c} (centroid {x()[:, c].tolist()}) is selected by both "
                    f"{other!r} and {name!r} ({int(both.sum())} such cells); make the "
                    "predicates exclusive")
            if not mask.any():
                raise MeshError(f"regions[{name!r}]: the predicate selects no cell; check it "
                                "against the cell centroids (allow a tolerance)")
            ids[mask] = k
            taken |= mask
            names[name] = k
        if not taken.all():
            names = {DEFAULT_REGION: 0, **names}
        return _checked(ids, names, m)
    if callable(regions):
        ids = _call(regions, x(), "regions")
    else:
        try:
            ids = np.asarray(regions)
        except Exception as exc:  # ragged lists and the like
            raise MeshError(f"regions: cannot be read as an array ({exc})") from None
    return _checked(ids, names, m)


def _call(func, x, what):
    try:
        return np.asarray(func(x))
    except Exception as exc:
        raise MeshError(f"{what}: the callable failed on the cell centroids of shape {x.shape}: "
                        f"{type(exc).__name__}: {exc}") from exc


def _checked(ids, names, m):
    if ids.shape != (m,):
        raise MeshError(f"regions: expected one region id per cell, shape ({m},), got {ids.shape}")
    if ids.dtype.kind == "f":
        if not (np.isfinite(ids).all() and (ids == np.round(ids)).all()):
            c = int(np.flatnonzero(~np.isfinite(ids) | (ids != np.round(ids)))[0])
            raise MeshError(f"regions: cell {c} has region id {ids[c]!r}, not a whole number")
    elif ids.dtype.kind not in "iub":
        raise MeshError(f"regions: region ids must be integers, got dtype {ids.dtype}")
    if ids.size and (ids.min() < 0 or ids.max() >= 2**31 - 1):
        c = int(np.flatnonzero((ids < 0) | (ids >= 2**31 - 1))[0])
        raise MeshError(f"regions: cell {c} has region id {ids[c]}; ids must be in 0..2**31-2")
    out = np.ascontiguousarray(ids, dtype=np.int32)
    used = np.unique(out).tolist()
    if names is None:
        names = {}
    elif not hasattr(names, "items"):
        try:
            names = {n: i for i, n in enumerate(names)}
        except TypeError:
            raise MeshError(f"regions: names must be a dict name -> id or a list of names, got "
                            f"{type(names).__name__}") from None
    table = {}
    for name, i in names.items():
        if not isinstance(name, str) or not name:
            raise MeshError(f"regions: region names must be non-empty strings, got {name!r}")
        if name == DEFAULT_KEY:
            raise MeshError(f"regions: {DEFAULT_KEY!r} is reserved (the key of a per-region "
                            "dict that covers the regions not named); choose another name")
        if isinstance(i, bool) or not isinstance(i, numbers.Integral) or i < 0:
            raise MeshError(f"regions: the id of region {name!r} must be an integer >= 0, "
                            f"got {i!r}")
        i = int(i)
        if i in table.values():
            other = next(n for n, j in table.items() if j == i)
            raise MeshError(f"regions: id {i} is named both {other!r} and {name!r}")
        table[name] = i
    # only the ids in use are regions; an unnamed one is named by its number
    result = {}
    by_id = {i: n for n, i in table.items()}
    for i in used:
        name = by_id.get(i, str(i))
        if name in result:
            raise MeshError(f"regions: the name {name!r} is used for ids {result[name]} and {i}")
        result[name] = i
    out.flags.writeable = False
    return out, result


def region_summary(mesh):
    """``[(name, id, cell count, volume), ...]`` in the order of the ids."""
    counts = np.bincount(mesh.regions)
    volumes = np.bincount(mesh.regions, weights=mesh.cell_volumes)
    return [(name, i, int(counts[i]), float(volumes[i]))
            for name, i in sorted(mesh.region_names.items(), key=lambda t: t[1])]


def _key_to_id(mesh, key, where):
    names = mesh.region_names
    if isinstance(key, str):
        if key in names:
            return names[key]
    elif isinstance(key, numbers.Integral) and not isinstance(key, bool):
        if int(key) in names.values():
            return int(key)
    raise InputError(
        f"{where}: the mesh has no region {key!r}; its regions are "
        f"{_listing(mesh)} (give a value for each, or a {DEFAULT_KEY!r} entry)")


def _listing(mesh):
    return ", ".join(f"{n!r} (id {i})" for n, i in sorted(mesh.region_names.items(),
                                                             key=lambda t: t[1]))


class RegionCoefficient:
    """A coefficient given region by region, bound to one mesh's regions.

    Built by :func:`region_coefficient`.  ``values[i]`` is the value of the
    cells of region id ``i`` (a number, a callable or a (d, d) tensor).
    """

    def __init__(self, mesh, by_id, name):
        self.mesh = mesh
        self.by_id = by_id
        self.name = name
        self.regions = mesh.regions

    @property
    def has_callable(self):
        return any(callable(v) for v in self.by_id.values())

    @property
    def has_tensor(self):
        return any(np.ndim(v) >= 2 for v in self.by_id.values() if not callable(v))

    def __repr__(self):
        names = {i: n for n, i in self.mesh.region_names.items()}
        return ("RegionCoefficient(" + ", ".join(f"{names[i]}={v!r}" for i, v in
                                                 self.by_id.items()) + ")")

    def cell_values(self, n_items, first_item, points, point_shape):
        """Values of cells ``first_item .. first_item + n_items - 1``.

        Returns shape (n_items, 1) when every region's value is a number, else
        (n_items, nq) with the callables evaluated at ``points()`` (dim,
        n_items * nq) of their own cells only.
        """
        from .coefficients import evaluate_callable

        reg = self.regions[first_item:first_item + n_items]
        if not self.has_callable:
            table = np.zeros(max(self.by_id) + 1)
            for i, v in self.by_id.items():
                table[i] = float(v)
            return table[reg].reshape(n_items, 1)
        nq = point_shape[1]
        out = np.empty((n_items, nq))
        x = None
        for i, v in self.by_id.items():
            sel = np.flatnonzero(reg == i)
            if sel.size == 0:
                continue
            if callable(v):
                if x is None:
                    x = points().reshape(-1, n_items, nq)
                xs = np.ascontiguousarray(x[:, sel, :].reshape(x.shape[0], -1))
                name = f"{self.name} of region {self._name_of(i)!r}"
                out[sel] = evaluate_callable(v, xs, name).reshape(sel.size, nq)
            else:
                out[sel] = float(v)
        return out

    def tensors(self, dim):
        """Per-cell tensors (n_cells, dim, dim); numbers become multiples of I."""
        if self.has_callable:
            raise InputError(
                f"{self.name}: a per-region tensor cannot be combined with callables in other "
                "regions; give those regions numbers or (d, d) tensors")
        table = np.zeros((max(self.by_id) + 1, dim, dim))
        for i, v in self.by_id.items():
            a = np.asarray(v, dtype=np.float64)
            if a.ndim == 0:
                table[i] = float(a) * np.eye(dim)
            elif a.shape == (dim, dim):
                table[i] = a
            else:
                raise InputError(f"{self.name} of region {self._name_of(i)!r}: tensor of shape "
                                 f"{a.shape}; expected ({dim}, {dim})")
        return np.ascontiguousarray(table[self.regions])

    def _name_of(self, i):
        return next(n for n, j in self.mesh.region_names.items() if j == i)


def region_coefficient(mesh, value, name, *, allow_tensor=True):
    """``value`` as a :class:`RegionCoefficient` of ``mesh`` if it is a dict, else unchanged.

    Parameters
    ----------
    mesh : Mesh
    value : dict ``{region name or id: value}`` (optional key ``"default"``) or anything else
    name : str
        For messages ("conductivity", "source").
    allow_tensor : bool
        Whether (d, d) tensor values are allowed.

    Raises
    ------
    InputError
        A key that is no region of the mesh, a region with no value and no
        ``"default"`` (the message names it), a value that is not a number,
        a callable or (where allowed) a tensor, two keys for one region.

    Examples
    --------
    >>> from galerkit import structured_triangles
    >>> m = structured_triangles(2, 1, regions={"steel": lambda x: x[0] < 0.5})
    >>> sorted(m.region_names.items(), key=lambda t: t[1])
    [('domain', 0), ('steel', 1)]
    >>> c = region_coefficient(m, {"steel": 50.0, "default": 0.04}, "conductivity")
    >>> c.cell_values(m.n_cells, 0, None, None).ravel().tolist()
    [50.0, 50.0, 0.04, 0.04]
    """
    if isinstance(value, RegionCoefficient):
        if value.mesh is mesh or (value.regions.shape == mesh.regions.shape
                                  and np.array_equal(value.regions, mesh.regions)):
            return value
        # another mesh with the same region ids (a refined mesh, a part of a
        # partitioned one): the values of the ids it has
        present = set(mesh.region_names.values())
        by_id = {i: v for i, v in value.by_id.items() if i in present}
        missing = sorted(present - set(by_id))
        if missing:
            raise InputError(f"{name}: no value for region id(s) {missing} of this mesh "
                             f"(regions: {_listing(mesh)})")
        return RegionCoefficient(mesh, by_id, name)
    if not isinstance(value, dict):
        return value
    if not value:
        raise InputError(f"{name}: empty per-region table; give a value for each region "
                         f"({_listing(mesh)}) or a {DEFAULT_KEY!r} entry")
    by_id = {}
    default = None
    for key, v in value.items():
        where = f"{name}[{key!r}]"
        _check_value(v, where, allow_tensor, mesh.dim)
        if key == DEFAULT_KEY:
            default = v
            continue
        i = _key_to_id(mesh, key, name)
        if i in by_id:
            raise InputError(f"{name}: region id {i} is given twice (by name and by id)")
        by_id[i] = v
    missing = [(n, i) for n, i in mesh.region_names.items() if i not in by_id]
    if missing:
        if default is None:
            shown = ", ".join(f"{n!r}" for n, _ in missing)
            raise InputError(
                f"{name}: no value for region(s) {shown} of the mesh (regions: {_listing(mesh)}); "
                f"give each a value, or a {DEFAULT_KEY!r} entry for the rest")
        for _, i in missing:
            by_id[i] = default
    return RegionCoefficient(mesh, dict(sorted(by_id.items())), name)


def _check_value(v, where, allow_tensor, dim):
    if callable(v):
        return
    if isinstance(v, (bool, np.bool_)):
        raise InputError(f"{where}: expected a number or a callable, got a bool")
    if isinstance(v, numbers.Real):
        if not np.isfinite(float(v)):
            raise InputError(f"{where}: the value {v!r} is not finite")
        return
    try:
        a = np.asarray(v, dtype=np.float64)
    except (TypeError, ValueError):
        a = None
    if a is not None and a.ndim == 0:
        return
    if allow_tensor and a is not None and a.shape == (dim, dim):
        return
    what = f"a number, a callable or a ({dim}, {dim}) tensor" if allow_tensor else \
        "a number or a callable"
    raise InputError(f"{where}: expected {what}, got {type(v).__name__}"
                     + (f" of shape {a.shape}" if a is not None else ""))


class Interface:
    """Interior facets between two regions.

    Attributes
    ----------
    name : str
        ``"a/b"`` with the region names, ``a`` of the smaller id.
    regions : (int, int)
        The ids ``(a, b)``.
    facets : ndarray (k, dim)
        Sorted vertex ids of each facet.
    cells : ndarray (k, 2)
        The cell on the ``a`` side and the cell on the ``b`` side.
    local : ndarray (k, 2)
        The facet's local index (opposite local vertex) in each of them.
    """

    def __init__(self, name, regions, facets, cells, local):
        self.name, self.regions = name, regions
        self.facets, self.cells, self.local = facets, cells, local
        for a in (facets, cells, local):
            a.flags.writeable = False

    def __len__(self):
        return self.facets.shape[0]

    def __repr__(self):
        return f"Interface({self.name!r}, {len(self)} facets)"


def interfaces(mesh):
    """Interior facets between cells of different regions, by region pair.

    Returns
    -------
    dict ``name -> Interface``, names ``"a/b"`` (``a`` the region of the
    smaller id), in the order of the id pairs.
    """
    reg = mesh.regions
    if mesh.region_names and len(mesh.region_names) == 1:
        return {}
    d = mesh.dim
    cells = mesh.cells.astype(np.int64)
    m = cells.shape[0]
    # every (cell, local facet): sorted vertex triple as one int64 key pair
    loc = np.arange(d + 1)
    fv = np.stack([np.delete(cells, f, axis=1) for f in loc], axis=1)  # (m, d+1, d)
    fv = np.sort(fv, axis=2).reshape(-1, d)
    owner = np.repeat(np.arange(m), d + 1)
    local = np.tile(loc, m)
    # facets shared by two cells are the equal neighbours in lexicographic order
    order = np.lexsort(tuple(fv[:, j] for j in range(d - 1, -1, -1)))
    fs = fv[order]
    same = (fs[1:] == fs[:-1]).all(axis=1)
    i = np.flatnonzero(same)
    a, b = order[i], order[i + 1]
    ca, cb = owner[a], owner[b]
    ra, rb = reg[ca], reg[cb]
    diff = ra != rb
    a, b, ca, cb, ra, rb = a[diff], b[diff], ca[diff], cb[diff], ra[diff], rb[diff]
    swap = ra > rb
    a, b = np.where(swap, b, a), np.where(swap, a, b)
    ca, cb = np.where(swap, cb, ca), np.where(swap, ca, cb)
    ra, rb = np.where(swap, rb, ra), np.where(swap, ra, rb)
    names = {i: n for n, i in mesh.region_names.items()}
    out = {}
    for pa, pb in sorted(set(zip(ra.tolist(), rb.tolist()))):
        sel = np.flatnonzero((ra == pa) & (rb == pb))
        name = f"{names[pa]}/{names[pb]}"
        out[name] = Interface(
            name, (pa, pb), np.ascontiguousarray(fv[a[sel]].astype(mesh.cells.dtype)),
            np.ascontiguousarray(np.stack([ca[sel], cb[sel]], axis=1)),
            np.ascontiguousarray(np.stack([local[a[sel]], local[b[sel]]], axis=1)))
    return out
