"""The one-call Poisson/diffusion driver.

Solves ``-div(kappa grad u) = f`` in the domain with, per facet tag,

* Dirichlet ``u = g``;
* Neumann ``kappa du/dn = q`` (``q`` the flux *into* the domain through the
  facet, n the outward normal; adds ``+ integral(q v)``);
* Robin ``kappa du/dn = alpha (u_ext - u)`` given as ``(alpha, u_ext)``
  (adds ``alpha`` times the facet mass to the matrix and
  ``alpha u_ext`` to the load) -- for example convective cooling with heat
  transfer coefficient alpha and ambient temperature u_ext.

Untagged boundary gets the homogeneous Neumann condition (no flux).  Two
conditions on tags that share facets are refused (:func:`conflicting_conditions`) unless they are the
same condition (same kind, same value); tags that meet only at a vertex or an
edge of a facet are fine, and where Dirichlet tags share such dofs the tag
given later wins.  A connected component of the mesh without
Dirichlet dofs and without Robin facets of alpha > 0 is pure Neumann: its
data must be compatible (``integral f + integral q = 0`` over that
component), and its free constant is fixed by a zero mean over it.  Robin
coefficients must be finite and >= 0.
"""

from __future__ import annotations

import math
import numbers
import time
from dataclasses import dataclass, field

import numpy as np

from .assembly import Assembler
from .boundary import DirichletElimination, dirichlet_values
from .compilation import PhaseSeconds
from .dofs import Discretization
from .errors import InputError, ProblemError
from . import fluxes
from .evaluation import cell_gradients, evaluate
from .mesh import Mesh
from .multigrid import p1_coarse_space
from .regions import RegionCoefficient, region_coefficient
from .solvers import SolveReport, choose_method, prepare_solver

__all__ = ["PoissonProblem", "Solution", "conflicting_conditions"]


@dataclass
class Solution:
    """A solved problem: the dof vector and everything needed to use it.

    Attributes
    ----------
    u : ndarray (n_dofs,)
    disc : Discretization
    report : SolveReport
    seconds : dict
        Wall seconds per phase: discretize, assemble, constrain,
        solver_setup, solve; and ``compile``, the kernel compilation of a
        first run (taken out of the phases), only when something compiled.
    assembler : Assembler
    problem : PoissonProblem
    """

    u: np.ndarray
    disc: Discretization
    report: SolveReport
    seconds: dict
    assembler: Assembler
    problem: "PoissonProblem"
    notes: list = field(default_factory=list)

    @property
    def mesh(self) -> Mesh:
        return self.disc.mesh

    def evaluate(self, points, *, outside="error"):
        """Values at points of shape (dim, n); see :func:`galerkit.evaluation.evaluate`."""
        return evaluate(self.disc, self.u, points, outside=outside)

    def cell_gradients(self):
        """Gradient of the solution at each cell centroid, (n_cells, dim)."""
        return cell_gradients(self.disc, self.u)

    def boundary_flux(self, tag, method="consistent"):
        """Flux ``integral kappa grad u . n ds`` through a facet tag (positive
        in); ``method`` "consistent" (residual-based) or "gradient".  See
        :func:`galerkit.fluxes.boundary_flux`."""
        return fluxes.boundary_flux(self, tag, method)

    def interface_flux(self, name, method="consistent"):
        """Heat flowing from region a into region b through ``mesh.interfaces``
        entry ``"a/b"``; see :func:`galerkit.fluxes.interface_flux`."""
        return fluxes.interface_flux(self, name, method)

    def heat_balance(self):
        """Sources, boundary flows and the imbalance (:class:`galerkit.fluxes.HeatBalance`)."""
        return fluxes.heat_balance(self)

    def region_statistics(self):
        """Min, max, mean of u and the source integral per cell region
        (:class:`galerkit.fluxes.RegionStatistics` list)."""
        return fluxes.region_statistics(self)


class PoissonProblem:
    """``-div(kappa grad u) = f`` with Dirichlet, Neumann and Robin data by tag.

    Parameters
    ----------
    mesh : Mesh
    conductivity : float, ndarray (n_cells,), callable, SPD tensor (d, d) / (n_cells, d, d),
        or a dict ``{region: value}`` of those per cell region (key a region
        name or id of ``mesh.region_names``; ``"default"`` covers the regions
        not named; a region without a value is an error naming it)
    source : float, callable, dof array, or a dict ``{region: number or callable}``
    dirichlet : dict, ``tag -> value`` (number, callable, or dof array)
    neumann : dict, ``tag -> flux`` (number or callable; flux into the domain)
    robin : dict, ``tag -> (alpha, u_ext)``

    Examples
    --------
    >>> from galerkit import structured_triangles
    >>> mesh = structured_triangles(8, 8)
    >>> sol = PoissonProblem(mesh, source=1.0, dirichlet={"boundary": 0.0}).solve(degree=2)
    >>> sol.report.converged, round(float(sol.u.max()), 3)
    (True, 0.074)
    """

    def __init__(self, mesh, conductivity=1.0, source=0.0, dirichlet=None, neumann=None,
                 robin=None):
        if not isinstance(mesh, Mesh):
            raise InputError(f"PoissonProblem: mesh must be a galerkit Mesh, got {type(mesh).__name__}")
        self.mesh = mesh
        # per-region dicts are checked here (every region covered) and bound to the mesh
        self.conductivity = region_coefficient(mesh, conductivity, "conductivity")
        self.source = region_coefficient(mesh, source, "source", allow_tensor=False)
        for kind, table in (("dirichlet", dirichlet), ("neumann", neumann), ("robin", robin)):
            if table is not None and not hasattr(table, "items"):
                raise ProblemError(
                    f"PoissonProblem: {kind} must be a dict of facet tag -> value, got "
                    f"{type(table).__name__}")
        self.dirichlet = dict(dirichlet or {})
        self.neumann = dict(neumann or {})
        self.robin = dict(robin or {})
        for kind, table in (("dirichlet", self.dirichlet), ("neumann", self.neumann),
                            ("robin", self.robin)):
            for tag in table:
                if not isinstance(tag, str) or tag not in mesh.facet_groups:
                    raise ProblemError(
                        f"{kind} condition on tag {tag!r}, but the mesh has no such facet tag; "
                        f"known tags: {sorted(mesh.facet_groups)}")
        for tag, value in self.robin.items():
            if not (isinstance(value, (tuple, list)) and len(value) == 2):
                raise ProblemError(f"robin[{tag!r}] must be a pair (alpha, u_ext), got {value!r}")
            alpha = value[0]
            if isinstance(alpha, numbers.Real) and not isinstance(alpha, bool) and not (
                    math.isfinite(alpha) and alpha >= 0):
                raise ProblemError(
                    f"robin[{tag!r}]: the heat transfer coefficient alpha = {alpha!r} must be "
                    "finite and >= 0 (a negative alpha makes the problem unstable)")
        conditions = [(kind, tag, value)
                      for kind, table in (("dirichlet", self.dirichlet),
                                          ("neumann", self.neumann), ("robin", self.robin))
                      for tag, value in table.items()]
        clash = conflicting_conditions(mesh, conditions)
        if clash is not None:
            i, j, count = clash
            (ka, ta, _), (kb, tb, _) = conditions[i], conditions[j]
            raise ProblemError(
                f"{ka}[{ta!r}] and {kb}[{tb!r}]: tags {ta!r} and {tb!r} share {count} "
                "boundary facet(s) and the two conditions differ, so the result would "
                "depend on which one is applied last. Give each facet one condition: tag "
                "the facets of each condition separately (Mesh.tag_boundary) or drop one")

    def discretize(self, degree=1):
        return Discretization(self.mesh, degree)

    def solve(self, degree=1, method="auto", rtol=1e-10, maxiter=None, *, assembler=None,
              **solver_options) -> Solution:
        """Assemble, constrain and solve.

        Parameters
        ----------
        degree : int
            Lagrange degree 1..4.
        method : str
            A registered solver name or "auto" (see :func:`galerkit.solvers.choose_method`).
        rtol : float
            Relative residual tolerance of iterative solvers.
        assembler : Assembler, optional
            Reuse the symbolic phase of an earlier solve on the same discretization.

        Returns
        -------
        Solution

        Raises
        ------
        ProblemError
            Incompatible data in a part of the mesh without Dirichlet or Robin
            terms (pure Neumann: integral of source + boundary flux != 0 in a
            connected component), a negative or non-finite Robin coefficient,
            an assembler of another mesh.

        Notes
        -----
        Each connected component of the mesh (:meth:`Mesh.connected_components`)
        that has no Dirichlet dof and no Robin facet with alpha > 0 is a
        pure-Neumann component: its data must balance, and its free constant is
        fixed by a zero mean over that component.
        """
        if assembler is not None and not isinstance(assembler, Assembler):
            raise InputError(
                f"PoissonProblem.solve: assembler must be an Assembler, got "
                f"{type(assembler).__name__}")
        if assembler is not None and assembler.mesh is not self.mesh:
            raise ProblemError(
                "PoissonProblem.solve: the assembler was built for another mesh; build it "
                "from a Discretization of this problem's mesh")
        sec = PhaseSeconds()  # compilation (first run only) counted apart, as "compile"
        t0 = time.perf_counter()
        if assembler is None:
            disc = self.discretize(degree)
            sec["discretize"] = time.perf_counter() - t0
            t0 = time.perf_counter()
            asm = Assembler(disc)
        else:
            asm = assembler
            disc = asm.disc
            sec["discretize"] = 0.0
        A, b, robin_diagonal = self.assemble(asm)
        sec["assemble"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        elim, Af, bf, fixed_vals, comps, notes = self.constrain(asm, A, b, robin_diagonal)
        del A, b, robin_diagonal  # the full system is not needed again: free it for the set-up
        check_scales(Af, bf, fixed_vals)
        sec["constrain"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        solver_options = _p_multigrid_options(disc, elim, Af.shape[0], method, solver_options)
        solver = prepare_solver(Af, method, dim=self.mesh.dim, degree=disc.degree, **solver_options)
        sec["solver_setup"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        rep = solver.solve(bf, rtol=rtol, maxiter=maxiter)
        sec["solve"] = time.perf_counter() - t0
        u = elim.expand(rep.x, fixed_vals)
        if comps:
            u = self._zero_mean(asm, u, comps)
        return Solution(u=u, disc=disc, report=rep, seconds=sec, assembler=asm, problem=self,
                        notes=notes)

    def constrain(self, asm, A, b, robin_diagonal):
        """Remove the Dirichlet dofs and fix pure-Neumann components: the reduced system.

        Parameters
        ----------
        asm : Assembler
        A, b, robin_diagonal
            As returned by :meth:`assemble`; ``b`` is balanced in place on
            pure-Neumann components.

        Returns
        -------
        elim : DirichletElimination
        Af, bf : the reduced matrix and right-hand side
        fixed_values : ndarray
            Values of the eliminated dofs (for ``elim.expand``).
        components : list of ndarray
            Dofs of each pure-Neumann component (shift them to zero mean
            after the solve); empty when there are none.
        notes : list of str
        """
        notes = []
        fixed_dofs, fixed_vals = self._dirichlet(asm.disc)
        # components without Dirichlet dofs or Robin terms are pure Neumann
        n_comp, cell_label = self.mesh.connected_components()
        if n_comp == 1:
            dof_label = np.zeros(asm.n_dofs, dtype=np.int64)
        else:
            dof_label = np.empty(asm.n_dofs, dtype=np.int64)
            dof_label[asm.disc.cell_dofs] = cell_label[:, None]
        anchored = np.zeros(n_comp, dtype=bool)
        anchored[dof_label[fixed_dofs]] = True
        anchored[dof_label[robin_diagonal > 0]] = True
        floating = np.flatnonzero(~anchored)
        pure_neumann = floating.size > 0
        if pure_neumann:
            pins, comps = self._neumann_constraint(asm, b, dof_label, floating)
            fixed_dofs = np.concatenate([fixed_dofs, pins])
            fixed_vals = np.concatenate([fixed_vals, np.zeros(pins.size)])
            if floating.size == n_comp:
                notes.append(f"pure Neumann problem: {n_comp} component(s), each fixed by "
                             "zero mean")
            else:
                notes.append(f"{floating.size} of {n_comp} mesh components have no Dirichlet "
                             "or Robin condition (pure Neumann there): each fixed by zero mean")
        elim = DirichletElimination(A, fixed_dofs)
        Af, bf = elim.reduce(A, b, fixed_vals)
        return elim, Af, bf, fixed_vals, (comps if pure_neumann else []), notes

    def assemble(self, asm):
        """Stiffness (with the Robin terms) and load (with the Neumann and Robin terms).

        Parameters
        ----------
        asm : Assembler
            Of a discretization of this problem's mesh.

        Returns
        -------
        A : csr_array (n_dofs, n_dofs)
        b : ndarray (n_dofs,)
        robin_diagonal : ndarray (n_dofs,)
            Diagonal of the Robin boundary mass (positive on the dofs that a
            Robin term with alpha > 0 anchors).

        Raises
        ------
        ProblemError
            A Robin coefficient that is negative or not finite.
        """
        A = asm.stiffness(self.conductivity)
        b = asm.load(self.source)
        for tag, flux in self.neumann.items():
            b += asm.boundary_load(tag, flux)
        robin_diagonal = np.zeros(asm.n_dofs)
        for tag, (alpha, uext) in self.robin.items():
            try:
                Bm = asm.boundary_mass(tag, alpha, nonnegative=True)
            except ProblemError:
                raise
            except InputError as exc:
                raise ProblemError(f"robin[{tag!r}] heat transfer coefficient alpha: {exc}; "
                                   "alpha must be finite and >= 0") from None
            A.data += Bm.data
            robin_diagonal += Bm.diagonal()
            if callable(alpha) or callable(uext):
                prod = _product(alpha, uext)
            else:
                prod = float(alpha) * float(uext) if np.ndim(alpha) == 0 and np.ndim(uext) == 0 \
                    else np.asarray(alpha) * np.asarray(uext)
            b += asm.boundary_load(tag, prod)
        return A, b, robin_diagonal

    # -- helpers -------------------------------------------------------------
    def _dirichlet(self, disc):
        value_of = np.zeros(disc.n_dofs)
        mask = np.zeros(disc.n_dofs, dtype=bool)
        for tag, value in self.dirichlet.items():
            dofs = disc.boundary_dofs(tag)
            value_of[dofs] = dirichlet_values(disc, value, dofs, f"dirichlet[{tag!r}]")
            mask[dofs] = True
        dofs = np.flatnonzero(mask)
        return dofs, value_of[dofs]

    def _neumann_constraint(self, asm, b, dof_label, floating):
        # Fix: the assembled load integrates callable data by quadrature, so
        # sum(b) differs from integral f + integral q by the quadrature error even
        # for exactly compatible data (f = 2 pi^2 cos(pi x) cos(pi y) on an 8x8
        # unit square was refused at relative 1.2e-5).  Integrate the data again
        # with 4 more degrees: the gap between the two sums estimates the
        # quadrature error, and only an accurate integral beyond it (plus
        # round-off) is incompatible.  Accepted data are then balanced exactly
        # (the imbalance removed as a constant source) so that the pinned
        # system solves every equation.
        # One constraint per floating component of the mesh
        # (Mesh.connected_components), none for the anchored ones.
        n_comp = int(dof_label.max()) + 1 if dof_label.size else 0
        b_acc = self._accurate_load(asm)
        w = asm.load(1.0)  # integral of each basis function
        by_label = np.argsort(dof_label, kind="stable")
        bounds = np.searchsorted(dof_label[by_label], np.arange(n_comp + 1))
        pins = np.empty(floating.size, dtype=np.int64)
        members_of = []
        for i, k in enumerate(floating):
            members = by_label[bounds[k]:bounds[k + 1]]  # ascending dofs (stable sort)
            members_of.append(members)
            total = float(b[members].sum())  # = integral f + integral q (partition of unity)
            f_int = total if b_acc is None else float(b_acc[members].sum())
            check_compatibility(total, f_int, float(np.abs(b[members]).sum()), int(k), n_comp)
            b[members] -= total * w[members] / float(w[members].sum())
            pins[i] = members[0]
        return pins, members_of

    def _accurate_load(self, asm):
        """Load of the data with 4 more quadrature degrees; None when all data are
        constants or arrays (then the assembled load is already exact)."""
        varying = callable(self.source) or (isinstance(self.source, RegionCoefficient)
                                            and self.source.has_callable)
        if not varying and not any(callable(q) for q in self.neumann.values()):
            return None
        k = asm.disc.degree
        b = asm.load(self.source, quadrature_degree=asm.quadrature_degree + 4)
        for tag, flux in self.neumann.items():
            deg = (2 * k + 1 if callable(flux) else k) + 4  # boundary_load's default + 4
            b += asm.boundary_load(tag, flux, quadrature_degree=deg)
        return b

    @staticmethod
    def _zero_mean(asm, u, comps):
        w = asm.load(1.0)  # integral of each basis function
        for sel in comps:
            u[sel] -= float(w[sel] @ u[sel]) / float(w[sel].sum())
        return u


#: a solution estimated beyond this would overflow double precision (1.8e308)
SOLUTION_LIMIT = 1e300


def check_scales(Af, bf, fixed_values):
    """Refuse data whose solution would over- or underflow double precision.

    The reduced system ``Af u = bf`` of a stiffness matrix has a solution of
    size at most about ``max|bf| / min diag(Af)`` times the number of
    unknowns (a crude bound, exact in order for the discrete Laplacian:
    ``f h**d / (kappa h**(d - 2))`` times ``(L / h)**2``), plus the Dirichlet
    values.  Beyond :data:`SOLUTION_LIMIT` the solve would give infinities.

    Raises
    ------
    ProblemError
        A non-finite matrix or load (a coefficient, source, flux or Dirichlet
        value so large that the assembly or the Dirichlet lifting overflowed),
        a stiffness diagonal that underflows, or an estimated solution beyond
        1e300; the message names the sizes and says to rescale the units.
    """
    todo = ("rescale the units of the source, fluxes, Dirichlet values or conductivity "
            "(for example kW instead of W, or a reference temperature)")
    big = float(np.abs(fixed_values).max()) if fixed_values.size else 0.0
    if not np.isfinite(Af.data).all() or not np.isfinite(bf).all():
        raise ProblemError(
            "the assembled system overflows double precision (a matrix or load entry is "
            "infinite) although every coefficient is finite: the data are too large "
            f"(largest Dirichlet value {big:.3e}); " + todo)
    if bf.size == 0:
        return
    diag = Af.diagonal()
    dmin = float(diag.min())
    bmax = float(np.abs(bf).max())
    if not dmin >= np.finfo(np.float64).tiny:
        raise ProblemError(
            f"the smallest stiffness diagonal entry is {dmin:.3e}, below the smallest normal "
            "double (2.2e-308): the conductivity is too small for this mesh; " + todo)
    est = bmax / dmin * bf.size if bmax else 0.0
    if not est <= SOLUTION_LIMIT:
        raise ProblemError(
            f"the solution would overflow double precision: max |load| {bmax:.3e} over the "
            f"smallest stiffness diagonal {dmin:.3e}, times {bf.size} unknowns, estimates "
            f"it at {est:.3e} (limit {SOLUTION_LIMIT:g}): the source, fluxes or Dirichlet "
            f"values (largest {big:.3e}) are too large for the conductivity; " + todo)


def _same_value(a, b):
    if a is b:
        return True
    if isinstance(a, (tuple, list)) and isinstance(b, (tuple, list)):
        return len(a) == len(b) and all(_same_value(x, y) for x, y in zip(a, b))
    if callable(a) or callable(b):
        return False
    try:
        a_arr, b_arr = np.asarray(a), np.asarray(b)
        return a_arr.shape == b_arr.shape and bool(np.array_equal(a_arr, b_arr))
    except Exception:  # noqa: BLE001 - values that cannot be compared are different
        return False


def conflicting_conditions(mesh, conditions, same=_same_value):
    """The first pair of different conditions whose tags share boundary facets.

    Parameters
    ----------
    mesh : Mesh
    conditions : list of (kind, tag, value)
        ``kind`` is for example ``"dirichlet"``; ``tag`` is a facet tag of
        ``mesh``.
    same : callable, optional
        ``same(value_a, value_b)``: whether two values of one kind are the same
        condition (default: the same object, or equal numbers or arrays).

    Returns
    -------
    (i, j, shared_facet_count) or None
        Positions in ``conditions``, ``i < j``.

    Examples
    --------
    >>> from galerkit import structured_triangles
    >>> m = structured_triangles(4, 4)
    >>> conflicting_conditions(m, [("dirichlet", "xmin", 1.0),
    ...                            ("dirichlet", "boundary", 0.0)])
    (0, 1, 4)
    >>> conflicting_conditions(m, [("dirichlet", "xmin", 0.0),
    ...                            ("dirichlet", "boundary", 0.0)]) is None
    True
    """
    ids = [mesh.tagged_facets(tag) for _, tag, _ in conditions]
    for i in range(len(conditions)):
        for j in range(i + 1, len(conditions)):
            (ka, _, va), (kb, _, vb) = conditions[i], conditions[j]
            if ka == kb and same(va, vb):
                continue
            count = int(np.intersect1d(ids[i], ids[j], assume_unique=True).size)
            if count:
                return i, j, count
    return None


def check_compatibility(total, accurate, scale, component, n_components):
    """Refuse pure-Neumann data that do not balance.

    Parameters
    ----------
    total : float
        Sum of the assembled load over the component (integral of source
        plus boundary flux by the assembler's quadrature).
    accurate : float
        The same with 4 more quadrature degrees (``total`` for exact data).
    scale : float
        Sum of the absolute load entries (or a bound above it).
    component, n_components : int
        Named in the message.

    Raises
    ------
    ProblemError
        ``|accurate| > 1e-8 * scale + |total - accurate|``: the integral is
        non-zero beyond round-off and the quadrature error.
    """
    scale = scale or 1.0
    if abs(accurate) > 1e-8 * scale + abs(total - accurate):
        raise ProblemError(
            "pure Neumann problem with incompatible data"
            + (f" in mesh component {component} (of {n_components}; it has no Dirichlet or "
               "Robin condition)" if n_components > 1 else "")
            + f": integral of source + boundary flux = {accurate:.6e} (relative "
            f"{abs(accurate) / scale:.2e}); it must vanish. Add a Dirichlet or Robin "
            "condition, or balance the source and the fluxes")


def _p_multigrid_options(disc, elim, n, method, options):
    """Options with the nested P1 coarse space when the native multigrid solves P_k, k >= 2.

    ``method`` "auto" is resolved as :func:`prepare_solver` will resolve it;
    a ``coarse_space`` given by the caller is kept.
    """
    name = choose_method(n, disc.mesh.dim, disc.degree) if method == "auto" else method
    if name != "cg-amg" or disc.degree < 2 or "coarse_space" in options:
        return options
    coarse = p1_coarse_space(disc, elim.free)
    if not 0 < coarse.shape[1] < n:
        return options
    return {**options, "coarse_space": coarse}


def _product(alpha, uext):
    def f(x):
        a = alpha(x) if callable(alpha) else alpha
        g = uext(x) if callable(uext) else uext
        return np.asarray(a, dtype=np.float64) * np.asarray(g, dtype=np.float64)
    return f
