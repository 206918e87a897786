"""Heat flow through boundaries and interfaces, heat balance, region statistics.

The flux through a set of facets is ``integral of kappa grad(u) . n ds`` with
``n`` the outward normal of the domain (of the region, for an interface):
positive where heat enters (``u`` rises outward), so the heat leaving is its
negative.  Two ways to compute it:

* ``"consistent"`` (the default): from the Galerkin residual of the system
  before the Dirichlet dofs are removed (T. J. R. Hughes, *The Finite Element
  Method*, 2000, sec. 4.4 on the consistent, residual-based flux; also
  Hughes, Engel, Mazzei & Larson, J. Comput. Phys. 163, 2000).  At a Dirichlet
  dof ``i`` the residual ``r_i = (A u - b)_i`` of the full system (stiffness
  and Robin matrix, source, Neumann and Robin loads) equals
  ``integral over the Dirichlet boundary of kappa du/dn phi_i``; it is shared
  among the Dirichlet facets at dof ``i`` in proportion to their measure.
  On a Neumann facet the flux is the given ``integral q``, on a Robin facet
  ``integral alpha (u_ext - u_h)``, on an insulated facet zero.  Summed over
  the whole boundary the fluxes equal ``-integral f`` up to round-off and the
  solver's residual, and they converge one order faster than the gradient
  flux.
* ``"gradient"``: ``kappa grad(u_h) . n`` of the cell at each facet,
  integrated by quadrature; its error is of the order of the gradient's.

Interfaces (interior facets between two regions, :mod:`galerkit.regions`)
use the same construction on the region's own residual: stiffness and load
of the region's cells only, less its natural boundary terms, shared among
its interface and Dirichlet facets.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .coefficients import evaluate_callable
from .elements import REFERENCE_FACETS
from .errors import InputError, ProblemError
from .quadrature import simplex_quadrature
from .regions import RegionCoefficient, region_coefficient

__all__ = ["FLUX_METHODS", "boundary_flux", "interface_flux", "facet_fluxes", "HeatBalance",
           "heat_balance", "RegionStatistics", "region_statistics"]

FLUX_METHODS = ("consistent", "gradient")


class _Facets:
    """Quadrature on facets given as (cell, local facet) pairs."""

    def __init__(self, disc, cells, local, degree):
        mesh = disc.mesh
        d = mesh.dim
        self.disc, self.cells, self.local = disc, np.asarray(cells, np.int64), np.asarray(local, np.int64)
        rule = simplex_quadrature(d - 1, max(int(degree), 0))
        self.w = rule.weights / rule.weights.sum()
        verts = np.vstack([np.zeros(d), np.eye(d)])
        fl = np.array(REFERENCE_FACETS[d], dtype=np.int64)
        Xf = np.array([verts[fl[f]][0] + rule.points @ (verts[fl[f]][1:] - verts[fl[f]][0])
                       for f in range(d + 1)])  # (d+1, nq, d) reference points
        el = disc.element
        self._V = np.array([el.tabulate(Xf[f]) for f in range(d + 1)])  # (d+1, nq, k)
        self._G = np.array([el.tabulate_gradients(Xf[f]) for f in range(d + 1)])  # (d+1,nq,k,d)
        v = mesh.points[mesh.cells[self.cells]]  # (n, d+1, d)
        J = np.transpose(v[:, 1:] - v[:, :1], (0, 2, 1))  # (n, d, d), columns x_j - x_0
        self.Jinv_t = np.linalg.inv(np.transpose(J, (0, 2, 1)))  # J^-T
        # grad lambda_j = J^-T e_j (j >= 1), grad lambda_0 = -sum; n = -grad l_f / |.|
        gl = np.concatenate([-self.Jinv_t.sum(axis=2, keepdims=True), self.Jinv_t], axis=2)
        g = gl[np.arange(self.cells.size), :, self.local]  # (n, d)
        norm = np.linalg.norm(g, axis=1)
        self.normal = -g / norm[:, None]
        vol = np.abs(np.linalg.det(J)) / (2.0 if d == 2 else 6.0)
        self.measure = d * vol * norm
        self.x = v[:, 0][:, None, :] + np.einsum("nij,nqj->nqi", J, Xf[self.local])  # (n,nq,d)
        self.V = self._V[self.local]  # (n, nq, k)
        self.cell_dofs = disc.cell_dofs[self.cells]  # (n, k)
        self.facet_nodes = el.facet_nodes[self.local]  # (n, nfn)

    @property
    def n(self):
        return self.cells.size

    def points(self):
        d = self.x.shape[2]
        return np.ascontiguousarray(self.x.reshape(-1, d).T)

    def integrate(self, values):
        """``integral over each facet`` of values (n, nq) -> (n,)."""
        return self.measure * (values @ self.w)

    def u(self, u):
        return np.einsum("nqa,na->nq", self.V, u[self.cell_dofs])

    def grad(self, u):
        G = self._G[self.local]  # (n, nq, k, d)
        gref = np.einsum("nqad,na->nqd", G, u[self.cell_dofs])
        return np.einsum("nij,nqj->nqi", self.Jinv_t, gref)

    def data(self, value, name, positions=None):
        """A number, per-facet array (indexed by ``positions``) or callable -> (n, nq)."""
        nq = self.w.size
        if callable(value):
            return evaluate_callable(value, self.points(), name).reshape(self.n, nq)
        a = np.asarray(value, dtype=np.float64)
        if a.ndim == 0:
            return np.full((self.n, nq), float(a))
        if a.ndim == 1 and positions is not None:
            return np.repeat(a[positions][:, None], nq, axis=1)
        raise InputError(f"{name}: cannot evaluate a value of shape {a.shape} on facets")


def _kappa_flux(kappa, mesh, fac, grad):
    """``kappa grad u . n`` at the facet points, (n, nq)."""
    d = mesh.dim
    n = fac.normal[:, None, :]
    kappa = region_coefficient(mesh, kappa, "conductivity")
    if isinstance(kappa, RegionCoefficient):
        if kappa.has_tensor:
            T = kappa.tensors(d)[fac.cells]
            return np.einsum("nqi,nij,nj->nq", grad, T, fac.normal)
        out = np.empty(grad.shape[:2])
        reg = mesh.regions[fac.cells]
        for i, v in kappa.by_id.items():
            sel = np.flatnonzero(reg == i)
            if sel.size == 0:
                continue
            if callable(v):
                xs = np.ascontiguousarray(fac.x[sel].reshape(-1, d).T)
                k = evaluate_callable(v, xs, "conductivity").reshape(sel.size, -1)
            else:
                k = float(v)
            out[sel] = k * (grad[sel] * n[sel]).sum(axis=2)
        return out
    if callable(kappa):
        k = evaluate_callable(kappa, fac.points(), "conductivity").reshape(fac.n, -1)
        return k * (grad * n).sum(axis=2)
    a = np.asarray(kappa, dtype=np.float64)
    if a.ndim == 0:
        return float(a) * (grad * n).sum(axis=2)
    if a.shape == (mesh.n_cells,):
        return a[fac.cells][:, None] * (grad * n).sum(axis=2)
    if a.shape == (d, d):
        return np.einsum("nqi,ij,nj->nq", grad, a, fac.normal)
    if a.shape == (mesh.n_cells, d, d):
        return np.einsum("nqi,nij,nj->nq", grad, a[fac.cells], fac.normal)
    raise InputError(f"conductivity of shape {a.shape} cannot be evaluated on facets")


def _check_method(method):
    if method not in FLUX_METHODS:
        raise InputError(f"flux method must be one of {FLUX_METHODS}, got {method!r}")


def _conditions(problem):
    """Per boundary facet: kind (0 insulated, 1 Dirichlet, 2 Neumann, 3 Robin),
    the tag and the facet's position in that tag's ids."""
    mesh = problem.mesh
    k = mesh.boundary_facets.shape[0]
    kind = np.zeros(k, dtype=np.int8)
    tag_of = np.full(k, -1, dtype=np.int64)
    tags = []
    for code, table in ((1, problem.dirichlet), (2, problem.neumann), (3, problem.robin)):
        for tag in table:
            ids = mesh.tagged_facets(tag)
            fresh = ids[kind[ids] == 0]  # two tags on one facet carry the same condition
            kind[fresh] = code
            tag_of[fresh] = len(tags)
            tags.append(tag)
    return kind, tag_of, tags


class _FluxData:
    """What the consistent fluxes of one solution need, computed once."""

    def __init__(self, sol):
        self.sol = sol
        problem, asm, disc = sol.problem, sol.assembler, sol.disc
        mesh = disc.mesh
        A, b, _ = problem.assemble(asm)
        self.residual = A @ sol.u - b
        self.kind, self.tag_of, self.tags = _conditions(problem)
        # the rule of the assembled facet loads for callable data (degree 2k + 1),
        # so that the natural fluxes sum to exactly what the residual holds
        self.degree = 2 * disc.degree + 1
        self.source = asm.load(problem.source)
        self.boundary = _Facets(disc, mesh.boundary_facet_cells, mesh.boundary_facet_local,
                                self.degree)

    def natural(self, fac, facet_ids):
        """Natural (Neumann, Robin) flux of boundary facets ``facet_ids`` per
        quadrature point, (n, nq); zero on Dirichlet and insulated facets."""
        problem, mesh = self.sol.problem, self.sol.mesh
        out = np.zeros((fac.n, fac.w.size))
        kind, tag_of = self.kind[facet_ids], self.tag_of[facet_ids]
        uq = None
        for t, tag in enumerate(self.tags):
            sel = np.flatnonzero(tag_of == t)
            if sel.size == 0 or kind[sel[0]] == 1:
                continue
            sub = _subset(fac, sel)
            pos = np.searchsorted(mesh.tagged_facets(tag), facet_ids[sel])
            if kind[sel[0]] == 2:
                out[sel] = sub.data(problem.neumann[tag], f"neumann[{tag!r}]", pos)
            else:
                alpha, uext = problem.robin[tag]
                if uq is None:
                    uq = fac.u(self.sol.u)
                a = sub.data(alpha, f"robin[{tag!r}] alpha", pos)
                g = sub.data(uext, f"robin[{tag!r}] u_ext", pos)
                out[sel] = a * (g - uq[sel])
        return out

    @property
    def consistent(self):
        """Consistent flux of every boundary facet, (n_boundary_facets,)."""
        if getattr(self, "_consistent", None) is None:
            fac = self.boundary
            ids = np.arange(fac.n)
            flux = fac.integrate(self.natural(fac, ids))
            dir_ids = np.flatnonzero(self.kind == 1)
            if dir_ids.size:
                flux[dir_ids] = _shared(self.residual, _subset(fac, dir_ids),
                                        np.ones(dir_ids.size, dtype=bool), self.sol.disc.n_dofs)
            self._consistent = flux
        return self._consistent


def _subset(fac, sel):
    sub = object.__new__(_Facets)
    sub.disc = fac.disc
    for name in ("cells", "local", "Jinv_t", "normal", "measure", "x", "V", "cell_dofs",
                 "facet_nodes"):
        setattr(sub, name, getattr(fac, name)[sel])
    sub.w, sub._V, sub._G = fac.w, fac._V, fac._G
    return sub


def _shared(rem, fac, wanted, n_dofs):
    """Flux of facets: at each dof of a facet, the remainder ``rem`` shared among
    all facets of ``fac`` at that dof in proportion to their measure; returns
    the flux of the facets where ``wanted`` is set."""
    dofs = np.take_along_axis(fac.cell_dofs, fac.facet_nodes, axis=1)  # (n, nfn)
    W = np.zeros(n_dofs)
    np.add.at(W, dofs, np.repeat(fac.measure[:, None], dofs.shape[1], axis=1))
    share = rem[dofs] / W[dofs]  # per unit measure
    return (fac.measure[wanted] * share[wanted].sum(axis=1))


def _data(sol):
    d = sol.__dict__.get("_flux_data")
    if d is None or d.sol.u is not sol.u:
        d = _FluxData(sol)
        sol.__dict__["_flux_data"] = d
    return d


def facet_fluxes(sol, method="consistent"):
    """Flux ``integral kappa grad u . n ds`` of every boundary facet, (n_boundary_facets,)."""
    _check_method(method)
    data = _data(sol)
    if method == "consistent":
        return data.consistent.copy()
    fac = data.boundary
    return fac.integrate(_kappa_flux(sol.problem.conductivity, sol.mesh, fac, fac.grad(sol.u)))


def boundary_flux(sol, tag, method="consistent"):
    """Flux through the facets of ``tag``: ``integral kappa grad u . n ds``.

    Parameters
    ----------
    sol : Solution
    tag : str
        A facet tag of the mesh.
    method : {"consistent", "gradient"}

    Returns
    -------
    float
        Positive where heat enters the domain (the outward normal derivative
        of ``u`` is positive); the heat leaving through ``tag`` is its negative.

    Raises
    ------
    MeshError
        An unknown tag (the message lists the known ones).
    ProblemError
        A result that is not finite.
    """
    ids = sol.mesh.tagged_facets(tag)
    value = float(facet_fluxes(sol, method)[ids].sum())
    if not np.isfinite(value):
        raise ProblemError(f"boundary flux through {tag!r} is not finite ({value})")
    return value


def interface_flux(sol, name, method="consistent"):
    """Flux from region ``a`` into region ``b`` through the interface ``"a/b"``.

    ``integral kappa_a grad u_a . n_a ds`` with ``n_a`` the normal out of
    ``a``, taken with the sign of heat *leaving* ``a``: the value is
    ``-integral kappa grad u . n_a``, positive when heat flows from ``a`` to
    ``b``.  ``name`` is a key ``"a/b"`` of ``mesh.interfaces``, or ``"b/a"``
    for the flow from ``b`` into ``a``.

    Raises
    ------
    InputError
        An unknown interface (the message lists the known ones).
    """
    _check_method(method)
    mesh, disc = sol.mesh, sol.disc
    itf, side = _find_interface(mesh, name)
    data = _data(sol)
    a = itf.regions[side]
    fac = _Facets(disc, itf.cells[:, side], itf.local[:, side], data.degree)
    if method == "gradient":
        q = _kappa_flux(sol.problem.conductivity, mesh, fac, fac.grad(sol.u))
        return -float(fac.integrate(q).sum())
    # the region's own residual: stiffness and load of its cells only
    problem, asm = sol.problem, sol.assembler
    kappa = problem.conductivity
    K = asm.stiffness(_doubled_on(mesh, kappa, a))
    K.data -= asm.stiffness(kappa).data  # = the stiffness of region a's cells
    src = region_coefficient(mesh, problem.source, "source", allow_tensor=False)
    f_a = _only_on(mesh, src, a)
    rem = K @ sol.u - asm.load(f_a)
    # less the natural terms of region a's boundary facets (their flux is known)
    bnd = data.boundary
    own = np.flatnonzero(mesh.regions[mesh.boundary_facet_cells] == a)
    sub = _subset(bnd, own)
    nat = data.natural(sub, own)  # (n, nq)
    Vn = np.einsum("nq,nqa->na", nat * sub.w[None, :], sub.V) * sub.measure[:, None]
    np.subtract.at(rem, sub.cell_dofs, Vn)
    # shared among the facets of a whose flux is unknown: its interfaces and
    # its Dirichlet facets
    parts = [fac]
    for other in mesh.interfaces.values():
        if other is itf or a not in other.regions:
            continue
        s_ = 0 if other.regions[0] == a else 1
        parts.append(_Facets(disc, other.cells[:, s_], other.local[:, s_], 1))
    dir_own = own[data.kind[own] == 1]
    if dir_own.size:
        parts.append(_subset(bnd, dir_own))
    joined = _join(parts)
    wanted = np.zeros(joined.n, dtype=bool)
    wanted[:fac.n] = True
    return -float(_shared(rem, joined, wanted, disc.n_dofs).sum())


def _find_interface(mesh, name):
    """The interface named ``"a/b"`` (or ``"b/a"``) and the side of its first region."""
    if isinstance(name, str):
        if name in mesh.interfaces:
            return mesh.interfaces[name], 0
        parts = name.split("/")
        if len(parts) == 2 and f"{parts[1]}/{parts[0]}" in mesh.interfaces:
            return mesh.interfaces[f"{parts[1]}/{parts[0]}"], 1
    raise InputError(f"the mesh has no interface {name!r}; its interfaces are "
                     f"{sorted(mesh.interfaces) or 'none (one region)'} (either order)")


def _join(parts):
    if len(parts) == 1:
        return parts[0]
    out = object.__new__(_Facets)
    out.disc = parts[0].disc
    for name in ("cells", "local", "measure", "cell_dofs", "facet_nodes"):
        setattr(out, name, np.concatenate([getattr(p, name) for p in parts]))
    return out


def _doubled_on(mesh, kappa, a):
    k = region_coefficient(mesh, kappa, "conductivity")
    if not isinstance(k, RegionCoefficient):
        arr = None if callable(k) else np.asarray(k, dtype=np.float64)
        if arr is not None and arr.ndim >= 1 and arr.shape[0] == mesh.n_cells:
            scale = np.where(mesh.regions == a, 2.0, 1.0)
            return arr * scale.reshape((-1,) + (1,) * (arr.ndim - 1))
        k = region_coefficient(mesh, {"default": k}, "conductivity")
    by_id = dict(k.by_id)
    v = by_id[a]
    by_id[a] = (lambda x, v=v: 2.0 * np.asarray(v(x), dtype=np.float64)) if callable(v) \
        else 2.0 * np.asarray(v, dtype=np.float64)
    return RegionCoefficient(mesh, by_id, "conductivity")


def _only_on(mesh, src, a):
    if isinstance(src, RegionCoefficient):
        by_id = {i: (v if i == a else 0.0) for i, v in src.by_id.items()}
    else:
        if not callable(src) and np.ndim(src):
            raise InputError("interface_flux: a source given as a dof vector cannot be split "
                             "by region; give it as a number, a callable or per region")
        by_id = {i: (src if i == a else 0.0) for i in mesh.region_names.values()}
    return RegionCoefficient(mesh, by_id, "source")


@dataclass
class HeatBalance:
    """Sources against boundary flows.

    ``source`` is ``integral f``; ``flows[tag]`` the consistent flux of each
    tag that carries a condition (positive in); ``boundary`` the sum over
    every boundary facet (insulated ones contribute 0); ``imbalance`` =
    ``source + boundary`` (zero in a steady state, up to round-off and the
    solver's residual), ``relative`` its size against the largest term.
    """

    source: float
    flows: dict = field(default_factory=dict)
    boundary: float = 0.0
    imbalance: float = 0.0
    relative: float = 0.0


def heat_balance(sol):
    """:class:`HeatBalance` of a solution, from the consistent fluxes."""
    data = _data(sol)
    flux = data.consistent
    source = float(data.source.sum())
    flows = {tag: float(flux[sol.mesh.tagged_facets(tag)].sum()) for tag in data.tags}
    total = float(flux.sum())
    imbalance = source + total
    scale = max(abs(source), float(np.abs(flux).sum()), np.finfo(float).tiny)
    return HeatBalance(source, flows, total, imbalance, abs(imbalance) / scale)


@dataclass
class RegionStatistics:
    """Per region: cell count, volume, min/max of u over its dofs, mean of u
    (``integral u / volume``), and the integral of the source over it."""

    name: str
    id: int
    n_cells: int
    volume: float
    u_min: float
    u_max: float
    u_mean: float
    source: float


def region_statistics(sol):
    """``[RegionStatistics, ...]`` in the order of the region ids."""
    mesh, disc, asm = sol.mesh, sol.disc, sol.assembler
    src = region_coefficient(mesh, sol.problem.source, "source", allow_tensor=False)
    out = []
    counts = np.bincount(mesh.regions, minlength=max(mesh.region_names.values()) + 1)
    for name, i in sorted(mesh.region_names.items(), key=lambda t: t[1]):
        ind = RegionCoefficient(mesh, {j: (1.0 if j == i else 0.0)
                                       for j in mesh.region_names.values()}, "indicator")
        w = asm.load(ind)
        vol = float(w.sum())
        dofs = np.unique(disc.cell_dofs[mesh.regions == i])
        u = sol.u[dofs]
        try:
            s = float(asm.load(_only_on(mesh, src, i)).sum())
        except InputError:  # a source given as a dof vector is not split by region
            s = float("nan")
        out.append(RegionStatistics(name, i, int(counts[i]), vol, float(u.min()),
                                    float(u.max()), float(w @ sol.u) / vol, s))
    return out
