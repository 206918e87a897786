"""The distributed engine: one problem assembled and solved on MPI ranks through PETSc.

galerkit does what PETSc does not do for us -- partition the mesh, number the
dofs across ranks, assemble each rank's cells with the same numba kernels as
in serial -- and hands PETSc a distributed (MPIAIJ) matrix and vector through
COO preallocation.  PETSc solves (CG with its algebraic multigrid GAMG by
default; any KSP and PC named through PETSc's own options).

Flow (every rank runs :func:`solve_distributed`; SPMD)
------------------------------------------------------
1. Rank 0 holds the problem (its global mesh), numbers the global dofs
   (:class:`~galerkit.Discretization`), finds the Dirichlet dofs and values,
   partitions the cells (:mod:`galerkit.bindings.distributed.partition`) and sends each
   rank its :class:`~galerkit.bindings.distributed.partition.LocalPart` and the
   problem's data (coefficients pickled; per-cell and per-dof arrays cut to
   the rank's cells and dofs), one part at a time.
2. Each rank builds its own :class:`~galerkit.Mesh` and
   :class:`~galerkit.Discretization` from its cells, checks that their dof
   numbering maps onto the global one, and assembles its cells with an
   :class:`~galerkit.Assembler` (:meth:`galerkit.PoissonProblem.assemble`).
3. Dirichlet dofs are removed by lifting on each rank's local matrix (the
   global lifting is the sum of the local ones), as in serial.
4. The reduced local matrix and load go to PETSc with global row numbers
   (``MatSetPreallocationCOO`` / ``MatSetValuesCOO`` with ADD, and
   ``VecSetValues`` with ADD); PETSc sums the contributions of the ranks.
5. KSP solves; the solution comes back to every rank's owned and ghost dofs
   through a PETSc scatter; errors are summed per rank and reduced once.

Requires ``mpi4py`` and ``petsc4py`` (``make mpi``, the extra ``galerkit[mpi]``).
Every error is raised on every rank (collectively), so a bad input never
leaves ranks waiting.
"""

from __future__ import annotations

import os
import pickle
import resource
import sys
import time
from contextlib import contextmanager
from dataclasses import dataclass, field

import numpy as np

from galerkit.errors import GalerkitError, InputError, ProblemError, SolverError

__all__ = ["solve_distributed", "DistributedSolution", "petsc_available", "DEFAULT_KSP",
           "DEFAULT_PC", "parse_petsc_options"]

#: message tag of the parts that rank 0 sends
_PART_TAG = 7301

#: Krylov method and preconditioner used unless PETSc options name others.
DEFAULT_KSP = "cg"
DEFAULT_PC = "gamg"


def petsc_available() -> bool:
    """True when mpi4py and petsc4py can be imported."""
    try:
        import mpi4py  # noqa: F401
        import petsc4py  # noqa: F401
    except ImportError:
        return False
    return True


def _modules():
    try:
        from mpi4py import MPI
        import petsc4py
    except ImportError as exc:
        raise InputError(
            f"the petsc engine needs mpi4py and petsc4py ({exc}); install them with "
            "`make mpi` (builds PETSc from source, about 25 minutes on 2 cores the first "
            "time), or run without --engine petsc") from None
    if not petsc4py.__dict__.get("_galerkit_init"):
        # keep the command line's own flags out of PETSc's option database
        petsc4py.init([sys.argv[0] if sys.argv else "galerkit"])
        petsc4py._galerkit_init = True
    from petsc4py import PETSc
    return MPI, PETSc


def parse_petsc_options(text: str) -> list:
    """Split ``"-ksp_type gmres -pc_type jacobi -ksp_monitor"`` into (key, value) pairs.

    A token that starts with ``-`` followed by a letter is a key; the next
    token is its value unless it is a key too.

    Examples
    --------
    >>> parse_petsc_options("-ksp_type gmres -ksp_monitor -ksp_rtol 1e-9 -x -1")
    [('ksp_type', 'gmres'), ('ksp_monitor', None), ('ksp_rtol', '1e-9'), ('x', '-1')]
    """
    import shlex

    if not isinstance(text, str):
        raise InputError(f"PETSc options must be a string, got {type(text).__name__}")
    try:
        tokens = shlex.split(text)
    except ValueError as exc:
        raise InputError(f"PETSc options {text!r}: {exc}; close the quotes") from None
    pairs, i = [], 0
    while i < len(tokens):
        t = tokens[i]
        if not (t.startswith("-") and len(t) > 1 and (t[1].isalpha() or t[1] == "_")):
            raise InputError(f"PETSc options: {t!r} (token {i + 1} of {text!r}) is not an "
                             "option name; write them as -name [value], e.g. "
                             "\"-ksp_type gmres -pc_type jacobi\"")
        key = t[1:]
        value = None
        if i + 1 < len(tokens):
            nxt = tokens[i + 1]
            is_key = nxt.startswith("-") and len(nxt) > 1 and (nxt[1].isalpha() or nxt[1] == "_")
            if not is_key:
                value = nxt
                i += 1
        pairs.append((key, value))
        i += 1
    return pairs


# ----------------------------------------------------------------------------
# collective errors
# ----------------------------------------------------------------------------
def _quiet_barrier(comm, poll=0.002):
    """A barrier that sleeps while it waits.

    MPI implementations spin in blocking calls: a rank waiting in one for
    rank 0's serial set-up would take a core from it.
    """
    req = comm.Ibarrier()
    while not req.Test():
        time.sleep(poll)


def _quiet_recv(comm, source, tag, poll=0.002):
    """``comm.recv`` that sleeps until the message has arrived."""
    while not comm.Iprobe(source=source, tag=tag):
        time.sleep(poll)
    return comm.recv(source=source, tag=tag)


@contextmanager
def _root_threads(comm):
    """Rank 0 uses every numba thread while the other ranks wait for it."""
    import numba

    if comm.rank != 0 or comm.size == 1:
        yield
        return
    mine = numba.get_num_threads()
    numba.set_num_threads(_NODE_THREADS.get("all", mine))
    try:
        yield
    finally:
        numba.set_num_threads(mine)


@contextmanager
def _together(comm, what):
    """Run a block on every rank; if it fails on any, raise that error on all."""
    err = None
    try:
        yield
    except Exception as exc:  # noqa: BLE001 - re-raised below, on every rank
        err = exc
    _quiet_barrier(comm)
    errors = comm.allgather(None if err is None else _portable(err, comm.rank, what))
    first = next((e for e in errors if e is not None), None)
    if first is not None:
        if err is not None and first is errors[comm.rank] and isinstance(err, GalerkitError):
            raise err  # this rank's own error, with its traceback
        raise first


def _portable(exc, rank, what):
    """The exception itself when it is a galerkit error that pickles, else a SolverError."""
    if isinstance(exc, GalerkitError):
        try:
            pickle.dumps(exc)
            return exc
        except Exception:  # noqa: BLE001
            pass
    return SolverError(f"rank {rank}, {what}: {type(exc).__name__}: {exc}")


def _on_root(comm, fn):
    """``fn()`` on rank 0 (with every numba thread), its result broadcast; an error in it
    raised on every rank."""
    result = None
    _numba_threads(comm)
    with _together(comm, "root"):
        if comm.rank == 0:
            with _root_threads(comm):
                result = fn()
    return comm.bcast(result, root=0)


# ----------------------------------------------------------------------------
# results
# ----------------------------------------------------------------------------
@dataclass
class DistributedSolution:
    """What :func:`solve_distributed` returns on every rank.

    Attributes
    ----------
    rank, size : int
    part : LocalPart
        This rank's cells and dofs.
    disc : Discretization
        This rank's discretization (of its own mesh ``disc.mesh``).
    u : ndarray (disc.n_dofs,)
        The solution at this rank's dofs, owned and ghost.
    owned : ndarray (disc.n_dofs,), bool
    global_dofs : ndarray (disc.n_dofs,), int64
        Serial (global) dof number of each local dof.
    report : dict
        ``ksp``, ``pc``, ``iterations``, ``residual`` (PETSc's final residual
        norm, relative to the right-hand side), ``true_residual``
        (``||b - A x|| / ||b||`` computed afterwards), ``converged``,
        ``reason``, ``rtol``.
    seconds : dict
        Per phase, the largest over the ranks.
    peak_rss_mb : list of float
        Peak resident set size of each rank.
    errors : dict or None
        ``l2``, ``h1_seminorm``, ``energy`` against the exact solution given.
    n_dofs : int
        Serial dofs (Dirichlet included); ``n_global`` distributed rows.
    """

    rank: int
    size: int
    part: object
    disc: object
    u: np.ndarray
    owned: np.ndarray
    global_dofs: np.ndarray
    report: dict
    seconds: dict
    peak_rss_mb: list
    errors: dict | None
    n_dofs: int
    n_global: int
    problem: object = None
    partition: dict = field(default_factory=dict)
    n_cells: int = 0
    n_vertices: int = 0
    tags: list = field(default_factory=list)
    notes: list = field(default_factory=list)
    _comm: object = None

    def field_range(self):
        """(min, max) of the solution over all ranks."""
        from mpi4py import MPI

        lo = self._comm.allreduce(float(self.u.min()), op=MPI.MIN)
        hi = self._comm.allreduce(float(self.u.max()), op=MPI.MAX)
        return lo, hi

    def gather(self):
        """The whole solution in serial dof numbering on rank 0 (None on the others)."""
        pieces = self._comm.gather((self.global_dofs[self.owned], self.u[self.owned]), root=0)
        if self.rank != 0:
            return None
        u = np.empty(self.n_dofs)
        seen = np.zeros(self.n_dofs, dtype=np.int64)
        for ids, vals in pieces:
            u[ids] = vals
            seen[ids] += 1
        if not (seen == 1).all():
            bad = int(np.flatnonzero(seen != 1)[0])
            raise SolverError(f"gather: dof {bad} is owned by {int(seen[bad])} ranks; every dof "
                              "must have exactly one owner")
        return u


# ----------------------------------------------------------------------------
# the problem's data, cut per rank
# ----------------------------------------------------------------------------
def _cut(value, n_cells, n_dofs, cells, dofs, name):
    """Per-cell and per-dof arrays restricted to a rank; per-region values to the
    rank's regions (``{id: value}``); other values unchanged."""
    from galerkit.regions import RegionCoefficient

    if isinstance(value, RegionCoefficient):
        present = set(np.unique(value.regions[cells]).tolist())
        return {i: v for i, v in value.by_id.items() if i in present}
    if callable(value) or value is None:
        return value
    a = np.asarray(value)
    if a.ndim == 0:
        return value
    if a.shape[0] == n_cells and a.ndim in (1, 3):
        return np.ascontiguousarray(a[cells])
    if a.ndim == 1 and a.shape[0] == n_dofs and n_dofs != n_cells:
        return np.ascontiguousarray(a[dofs])
    if a.ndim == 2:  # a constant tensor
        return value
    raise InputError(f"the petsc engine: {name} has shape {a.shape}; give a number, a "
                     f"callable, a constant tensor, a per-cell array ({n_cells},) or a "
                     f"per-dof array ({n_dofs},)")


def _check_problem_data(problem, n_dofs):
    """Refuse, before anything is sent, data that cannot be cut or pickled."""
    m = problem.mesh.n_cells
    none = np.zeros(0, dtype=np.int64)
    sendable = {}
    for name in ("conductivity", "source"):
        value = getattr(problem, name)
        _cut(value, m, n_dofs, none, none, name)  # shape check only
        if not isinstance(value, np.ndarray):
            sendable[name] = getattr(value, "by_id", value)  # per region: the values only
    for kind in ("neumann", "robin"):
        for t, v in getattr(problem, kind).items():
            for x in (v if kind == "robin" else (v,)):
                if not callable(x) and np.ndim(x) > 0:
                    raise InputError(f"the petsc engine: {kind}[{t!r}] must be a number or a "
                                     "callable (arrays over facets are not distributed)")
        sendable[kind] = getattr(problem, kind)
    try:
        pickle.dumps(sendable)
    except Exception as exc:  # noqa: BLE001
        raise InputError(
            f"the petsc engine sends the problem's coefficients to the ranks by pickling, "
            f"and one cannot be pickled ({type(exc).__name__}: {exc}); use module-level "
            "functions or problem-file formulas instead of lambdas and closures") from None


def _problem_data(problem, n_dofs, part):
    """The problem's data cut to one part (checked by :func:`_check_problem_data`)."""
    m = problem.mesh.n_cells
    c, d = part.cells, part.dofs
    return {
        "conductivity": _cut(problem.conductivity, m, n_dofs, c, d, "conductivity"),
        "source": _cut(problem.source, m, n_dofs, c, d, "source"),
        "neumann": {t: v for t, v in problem.neumann.items() if t in part.facet_groups},
        "robin": {t: v for t, v in problem.robin.items() if t in part.facet_groups},
    }


def _floating_components(problem, disc, fixed_dofs):
    """Mesh components without Dirichlet dofs or Robin facets, and the component of each dof.

    The same rule as the serial engine: such a component is pure Neumann;
    its data must balance and its free constant is fixed by a zero mean.
    """
    mesh = problem.mesh
    n_comp, label = mesh.connected_components()
    anchored = np.zeros(n_comp, dtype=bool)
    dof_label = np.empty(disc.n_dofs, dtype=np.int32)
    dof_label[disc.cell_dofs] = label[:, None]
    anchored[dof_label[fixed_dofs]] = True
    for tag, (alpha, _) in problem.robin.items():
        if np.ndim(alpha) == 0 and not callable(alpha) and float(alpha) == 0.0:
            continue  # a zero coefficient anchors nothing
        anchored[label[mesh.boundary_facet_cells[mesh.tagged_facets(tag)]]] = True
    return np.flatnonzero(~anchored), dof_label


# ----------------------------------------------------------------------------
# the solve
# ----------------------------------------------------------------------------
#: numba threads: "all" while rank 0 works alone, "rank" otherwise (set once)
_NODE_THREADS: dict = {}


def _numba_threads(comm):
    """One node's cores shared by the ranks on it, unless NUMBA_NUM_THREADS is set."""
    import numba
    from mpi4py import MPI

    if "rank" not in _NODE_THREADS:
        if "NUMBA_NUM_THREADS" in os.environ:
            _NODE_THREADS["rank"] = _NODE_THREADS["all"] = numba.get_num_threads()
        else:
            node = comm.Split_type(MPI.COMM_TYPE_SHARED)
            size = node.size
            node.Free()
            cores = min(os.cpu_count() or 1, numba.config.NUMBA_NUM_THREADS)
            _NODE_THREADS["all"] = cores
            _NODE_THREADS["rank"] = max(1, cores // size)
    numba.set_num_threads(_NODE_THREADS["rank"])
    return _NODE_THREADS["rank"]


def _local_mesh(part, dim):
    from galerkit import Mesh
    from galerkit.elements import REFERENCE_FACETS

    mesh = Mesh(part.points, part.local_cells, regions=part.regions,
                region_names=part.region_names if part.regions is not None else None)
    # the rank's own boundary includes the cuts between ranks: only the global
    # groups (part.facet_groups, "boundary" among them) name facets here
    del mesh.facet_groups["boundary"]
    if part.points.shape[1] != dim:
        raise SolverError("local mesh of another dimension")
    nf = len(REFERENCE_FACETS[dim])
    keys = mesh.boundary_facet_cells.astype(np.int64) * nf + mesh.boundary_facet_local
    order = np.argsort(keys, kind="stable")
    for tag, pairs in part.facet_groups.items():
        want = pairs[:, 0] * nf + pairs[:, 1]
        pos = np.searchsorted(keys[order], want)
        ok = (pos < keys.size) & (keys[order][np.minimum(pos, keys.size - 1)] == want)
        if not ok.all():
            raise SolverError(f"rank {part.rank}: a facet of tag {tag!r} is not on the "
                              "boundary of the rank's mesh (partition inconsistent)")
        mesh.set_facet_tag(tag, order[pos])
    return mesh


def _local_to_part(disc, part):
    """Index into ``part.dofs`` of every dof of the rank's own discretization."""
    l2p = np.full(disc.n_dofs, -1, dtype=np.int64)
    l2p[disc.cell_dofs] = part.local_cell_dofs
    if (l2p < 0).any() or disc.n_dofs != part.dofs.size \
            or not np.array_equal(l2p[disc.cell_dofs], part.local_cell_dofs) \
            or np.unique(l2p).size != l2p.size:
        raise SolverError(
            f"rank {part.rank}: the dof numbering of the rank's mesh does not map onto the "
            "global numbering (the orientation rule disagrees); this is a bug, please report "
            "it with the mesh")
    return l2p


def prepare_parts(problem, degree, n_parts, *, exact=None, exact_gradient=None):
    """Rank 0's set-up: global numbering, Dirichlet data, partition, one payload per part.

    No MPI: the tests call it for any number of parts.

    Returns
    -------
    header : dict
        What every rank needs (dimension, sizes, tag names, partition quality,
        the exact solution).
    payloads : iterator of (LocalPart, dict)
        Part by part (0, 1, ...), its cells and dofs and the problem's data
        cut to it; made one at a time, so that rank 0 can send each and free
        it before cutting the next.  Everything that can be refused is
        checked before this returns.
    """
    from galerkit import Discretization, PoissonProblem

    from .partition import dof_layout, local_part, partition_cells, partition_report

    if not isinstance(problem, PoissonProblem):
        raise InputError(f"solve_distributed: problem must be a PoissonProblem on rank 0, got "
                         f"{type(problem).__name__}")
    disc = Discretization(problem.mesh, degree)
    _check_problem_data(problem, disc.n_dofs)
    try:
        pickle.dumps((exact, exact_gradient))
    except Exception as exc:  # noqa: BLE001
        raise InputError(f"solve_distributed: the exact solution cannot be pickled ({exc}); "
                         "use a module-level function") from None
    fixed_dofs, fixed_vals = problem._dirichlet(disc)
    floating, dof_label = _floating_components(problem, disc, fixed_dofs)
    if floating.size:
        # pure Neumann components: pin the smallest dof of each to 0, as in serial
        _, first = np.unique(dof_label, return_index=True)
        pins = first[floating]
        fixed_dofs = np.concatenate([fixed_dofs, pins])
        fixed_vals = np.concatenate([fixed_vals, np.zeros(pins.size)])
    values = np.zeros(disc.n_dofs)
    values[fixed_dofs] = fixed_vals
    parts = partition_cells(problem.mesh, n_parts)
    layout = dof_layout(disc, parts, n_parts, fixed_dofs)
    quality = (partition_report(disc, parts, n_parts, cut_facets=False,
                                layout=layout).as_dict() if n_parts > 1 else {})
    n_comp = int(dof_label.max()) + 1
    header = {"dim": problem.mesh.dim, "n_dofs": disc.n_dofs,
              "n_cells": problem.mesh.n_cells, "n_vertices": problem.mesh.n_vertices,
              "tags": list(problem.mesh.facet_groups),
              "n_global": layout.n_global, "partition": quality,
              "floating": int(floating.size), "components": n_comp,
              "exact": (exact, exact_gradient)}

    def payloads():
        for r in range(n_parts):
            part = local_part(disc, layout, r, values)
            data = _problem_data(problem, disc.n_dofs, part)
            data["floating"] = floating
            data["components"] = n_comp
            data["dof_component"] = dof_label[part.dofs] if floating.size else None
            yield part, data

    return header, payloads()


@dataclass
class LocalSystem:
    """One rank's share of the system.

    After :func:`assemble_part`: ``A_full`` and ``b_full`` over the rank's
    dofs (its cells' contributions only).  After :func:`constrain_part`:
    ``A`` (CSR) and ``b`` over the rank's free dofs in the order
    ``free``, ``rows`` their distributed rows.  The distributed system
    is the sum over the ranks of ``A`` and ``b`` at those rows.
    """

    part: object
    data: dict
    mesh: object
    disc: object
    l2p: np.ndarray
    problem: object
    A_full: object = None
    b_full: np.ndarray = None
    weights: np.ndarray = None
    accurate: np.ndarray = None
    component: np.ndarray = None
    free: np.ndarray = None
    fixed: np.ndarray = None
    fixed_values: np.ndarray = None
    rows: np.ndarray = None
    A: object = None
    b: np.ndarray = None

    def expand(self, u_free):
        """Values at all the rank's dofs from those at its free dofs."""
        u = np.empty(self.disc.n_dofs)
        u[self.fixed] = self.fixed_values
        u[self.free] = u_free
        return u


def assemble_part(part, data, dim, degree, *, seconds=None) -> LocalSystem:
    """One rank's mesh, discretization and assembly of its cells (no MPI)."""
    from galerkit import Assembler, Discretization, PoissonProblem

    sec = {} if seconds is None else seconds
    t0 = time.perf_counter()
    mesh = _local_mesh(part, dim)
    disc = Discretization(mesh, degree)
    l2p = _local_to_part(disc, part)
    problem = PoissonProblem(mesh, conductivity=data["conductivity"], source=data["source"],
                             neumann=data["neumann"], robin=data["robin"])
    sec["local_mesh"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    asm = Assembler(disc)
    A, b, _ = problem.assemble(asm)
    s = LocalSystem(part=part, data=data, mesh=mesh, disc=disc, l2p=l2p, problem=problem,
                    A_full=A, b_full=b)
    if len(data["floating"]):
        s.weights = asm.load(1.0)  # integral of each basis function (this rank's cells)
        s.accurate = problem._accurate_load(asm)
        s.component = data["dof_component"][l2p]
    sec["assemble"] = time.perf_counter() - t0
    return s


def neumann_sums(system: LocalSystem) -> np.ndarray:
    """Per pure-Neumann component: this rank's sums of load, accurate load, |load|, weights.

    Summed over the ranks they are the serial engine's integrals of source
    plus boundary flux (``|load|`` summed per rank bounds the serial scale
    from above).  Shape (n_floating, 4).
    """
    floating = system.data["floating"]
    out = np.zeros((len(floating), 4))
    for j, k in enumerate(floating):
        sel = system.component == k
        b = system.b_full[sel]
        out[j] = (b.sum(), (system.accurate[sel].sum() if system.accurate is not None
                            else b.sum()), np.abs(b).sum(), system.weights[sel].sum())
    return out


def constrain_part(system: LocalSystem, totals=None, *, seconds=None) -> LocalSystem:
    """Balance pure-Neumann data (with the ranks' ``totals`` of :func:`neumann_sums`)
    and remove the Dirichlet dofs by lifting (no MPI)."""
    from galerkit.boundary import DirichletElimination
    from galerkit.problem import check_compatibility

    sec = {} if seconds is None else seconds
    t0 = time.perf_counter()
    part, b = system.part, system.b_full
    floating = system.data["floating"]
    n_comp = system.data["components"]
    for j, k in enumerate(floating):
        total, f_int, scale, weight = totals[j]
        check_compatibility(total, f_int, scale, int(k), n_comp)
        sel = system.component == k
        b[sel] -= total * system.weights[sel] / weight
    fixed_local = np.flatnonzero(part.fixed[system.l2p])
    fixed_vals = part.fixed_values[system.l2p][fixed_local]
    elim = DirichletElimination(system.A_full, fixed_local)
    system.A, system.b = elim.reduce(system.A_full, b, fixed_vals)
    system.rows = part.global_index[system.l2p][elim.free]
    if (system.rows < 0).any():
        raise SolverError(f"rank {part.rank}: a free dof has no distributed row")
    # keep what expand() needs, not the elimination's maps (~16 bytes per entry)
    system.free, system.fixed, system.fixed_values = elim.free, fixed_local, fixed_vals
    system.A_full = system.b_full = None
    sec["constrain"] = time.perf_counter() - t0
    return system


def mean_sums(system: LocalSystem, u) -> np.ndarray:
    """Per pure-Neumann component: this rank's sums of weight * u and weight, (n, 2)."""
    floating = system.data["floating"]
    out = np.zeros((len(floating), 2))
    for j, k in enumerate(floating):
        sel = system.component == k
        out[j] = (float(system.weights[sel] @ u[sel]), float(system.weights[sel].sum()))
    return out


def shift_to_zero_mean(system: LocalSystem, u, totals):
    """Subtract each pure-Neumann component's mean (``totals`` of :func:`mean_sums`)."""
    for j, k in enumerate(system.data["floating"]):
        u[system.component == k] -= totals[j, 0] / totals[j, 1]
    return u


def solve_distributed(problem=None, degree=1, *, rtol=1e-10, maxiter=None, petsc_options=None,
                      exact=None, exact_gradient=None, comm=None, load=None):
    """Solve a :class:`~galerkit.PoissonProblem` on all ranks of ``comm`` with PETSc.

    Call it on every rank (``mpiexec -n N python script.py``).

    Parameters
    ----------
    problem : PoissonProblem
        On rank 0 (ignored elsewhere; pass None there to save memory).
    degree : int
    rtol : float
        Relative tolerance on the unpreconditioned residual ``||b - A x|| / ||b||``.
    maxiter : int, optional
    petsc_options : str, optional
        PETSc options, e.g. ``"-ksp_type gmres -pc_type jacobi"``; the
        environment variable ``PETSC_OPTIONS`` is read by PETSc as well.
    exact, exact_gradient : callable, optional
        Exact solution and its gradient: L2, H1 and energy errors are
        computed in parallel.
    comm : mpi4py communicator, default ``MPI.COMM_WORLD``
    load : callable, optional
        Called on rank 0 instead of giving ``problem``: returns the problem
        (errors in it are raised on every rank).  The global mesh is then
        freed once the parts are cut, before the assembly.

    Returns
    -------
    DistributedSolution

    Raises
    ------
    InputError, ProblemError
        Bad problem data (on every rank), an unpicklable coefficient,
        incompatible pure-Neumann data, missing petsc4py.
    SolverError
        PETSc failed (the reason is in the message).
    """
    from galerkit.functionals import energy_error, h1_seminorm_error, l2_error

    MPI, PETSc = _modules()
    comm = MPI.COMM_WORLD if comm is None else comm
    rank, size = comm.rank, comm.size
    sec = {}
    threads = _numba_threads(comm)

    # -- 1. rank 0: global numbering, Dirichlet data, partition ------------------
    t0 = time.perf_counter()
    payloads = header = None
    with _together(comm, "set-up"):
        if rank == 0:
            with _root_threads(comm):
                if not (isinstance(rtol, (int, float)) and 0 < rtol < 1):
                    raise InputError(f"solve_distributed: rtol must be a number in (0, 1), got "
                                     f"{rtol!r}")
                if maxiter is not None and not (isinstance(maxiter, (int, np.integer))
                                                and maxiter >= 1):
                    raise InputError(f"solve_distributed: maxiter must be an integer >= 1, got "
                                     f"{maxiter!r}")
                if load is not None:
                    problem = load()
                if petsc_options is not None:
                    parse_petsc_options(petsc_options)
                header, payloads = prepare_parts(problem, degree, size, exact=exact,
                                                 exact_gradient=exact_gradient)
    problem = load = None  # with ``load``, the parts generator holds the last reference
    sec["partition"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    header = comm.bcast(header, root=0)
    if rank == 0:  # one part at a time: cut, send, free
        with _root_threads(comm):
            for r, payload in enumerate(payloads):
                if r == 0:
                    part, data = payload
                else:
                    comm.send(payload, dest=r, tag=_PART_TAG)
                del payload
    else:
        part, data = _quiet_recv(comm, 0, _PART_TAG)
    payloads = None  # the global mesh and numbering are freed here
    exact, exact_gradient = header["exact"]
    sec["distribute"] = time.perf_counter() - t0

    # -- 2. each rank: its mesh, discretization, cells assembled, Dirichlet lifted -
    with _together(comm, "local assembly"):
        system = assemble_part(part, data, header["dim"], degree, seconds=sec)
    totals = None
    if header["floating"]:
        with _together(comm, "pure Neumann sums"):
            mine = neumann_sums(system)
        totals = comm.allreduce(mine, op=MPI.SUM)
    with _together(comm, "constrain"):
        constrain_part(system, totals, seconds=sec)
    disc, l2p = system.disc, system.l2p
    Af, bf, rows_of_free, fixed_vals = system.A, system.b, system.rows, system.fixed_values

    # -- 3. PETSc matrix and vector by COO, summed over ranks --------------------
    t0 = time.perf_counter()
    lo, hi = part.row_range
    N = header["n_global"]
    ix = PETSc.IntType
    with _together(comm, "PETSc insertion"):
        counts = np.diff(Af.indptr)
        coo_rows = np.repeat(rows_of_free, counts).astype(ix)
        coo_cols = rows_of_free[Af.indices].astype(ix)
        M = PETSc.Mat().create(comm=comm)
        M.setSizes(((hi - lo, N), (hi - lo, N)))
        M.setType(PETSc.Mat.Type.AIJ)
        M.setPreallocationCOO(coo_rows, coo_cols)
        del coo_rows, coo_cols
        M.setValuesCOO(np.ascontiguousarray(Af.data, dtype=PETSc.ScalarType),
                       addv=PETSc.InsertMode.ADD_VALUES)
        M.assemble()
        M.setOption(PETSc.Mat.Option.SYMMETRIC, True)
        M.setOption(PETSc.Mat.Option.SPD, True)
        rhs = M.createVecLeft()
        rhs.set(0.0)
        rhs.setValues(rows_of_free.astype(ix), bf, addv=PETSc.InsertMode.ADD_VALUES)
        rhs.assemblyBegin()
        rhs.assemblyEnd()
        x = M.createVecRight()
        x.set(0.0)
    del Af, bf
    system.A = system.b = None
    sec["petsc_insert"] = time.perf_counter() - t0

    # -- 4. KSP ----------------------------------------------------------------------
    t0 = time.perf_counter()
    with _together(comm, "solver set-up"):
        opts = PETSc.Options()
        given = parse_petsc_options(petsc_options or "")
        for key, value in given:
            opts.setValue(key, "" if value is None else value)
        ksp = PETSc.KSP().create(comm=comm)
        ksp.setOperators(M)
        ksp.setType(DEFAULT_KSP)
        ksp.getPC().setType(DEFAULT_PC)
        ksp.setTolerances(rtol=rtol, atol=0.0,
                          max_it=int(maxiter) if maxiter is not None else 10_000)
        ksp.setFromOptions()
        if ksp.getType() == "cg" and not opts.hasName("ksp_norm_type"):
            # the serial engine's measure: ||b - A x|| / ||b||
            ksp.setNormType(PETSc.KSP.NormType.UNPRECONDITIONED)
        for key, _ in given:  # options of this solve only
            opts.delValue(key)
        ksp.setUp()
    sec["solver_setup"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    with _together(comm, "solve"):
        ksp.solve(rhs, x)
    sec["solve"] = time.perf_counter() - t0
    reason = int(ksp.getConvergedReason())
    bnorm = rhs.norm()
    r = rhs.duplicate()
    M.mult(x, r)
    r.aypx(-1.0, rhs)  # r = rhs - M x
    true_res = r.norm() / bnorm if bnorm > 0 else r.norm()
    report = {"ksp": ksp.getType(), "pc": ksp.getPC().getType(),
              "iterations": int(ksp.getIterationNumber()),
              "residual": float(ksp.getResidualNorm() / bnorm if bnorm > 0 else
                                ksp.getResidualNorm()),
              "true_residual": float(true_res), "converged": reason > 0,
              "reason": _reason_name(PETSc, reason), "rtol": rtol,
              "ranks": size, "numba_threads_per_rank": threads}

    # -- 5. owned + ghost values back on each rank; errors -----------------------------
    t0 = time.perf_counter()
    with _together(comm, "ghost update"):
        local = PETSc.Vec().createSeq(rows_of_free.size, comm=PETSc.COMM_SELF)
        iset = PETSc.IS().createGeneral(rows_of_free.astype(ix), comm=PETSc.COMM_SELF)
        scatter = PETSc.Scatter().create(x, iset, local, None)
        scatter.scatter(x, local, PETSc.InsertMode.INSERT_VALUES, PETSc.ScatterMode.FORWARD)
        u = system.expand(local.getArray())
        for obj in (scatter, iset, local, r):
            obj.destroy()
    notes = []
    if header["floating"]:
        u = shift_to_zero_mean(system, u, comm.allreduce(mean_sums(system, u), op=MPI.SUM))
        n, m = header["floating"], header["components"]
        notes.append(f"pure Neumann problem: {m} component(s), each fixed by zero mean"
                     if n == m else f"{n} of {m} mesh components have no Dirichlet or Robin "
                     "condition (pure Neumann there): each fixed by zero mean")
    sec["ghost_update"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    errors = None
    if exact is not None:
        with _together(comm, "errors"):
            sums = [float(l2_error(disc, u, exact, per_cell=True).sum())]
            if exact_gradient is not None:
                sums.append(float(h1_seminorm_error(disc, u, exact_gradient,
                                                    per_cell=True).sum()))
                sums.append(float(energy_error(disc, u, exact_gradient,
                                               data["conductivity"], per_cell=True).sum()))
        total = comm.allreduce(np.array(sums), op=MPI.SUM)
        errors = {"l2": float(np.sqrt(max(total[0], 0.0)))}
        if exact_gradient is not None:
            errors["h1_seminorm"] = float(np.sqrt(max(total[1], 0.0)))
            errors["energy"] = float(np.sqrt(max(total[2], 0.0)))
    sec["errors"] = time.perf_counter() - t0
    for obj in (ksp, M, rhs, x):
        obj.destroy()
    seconds = {k: comm.allreduce(v, op=MPI.MAX) for k, v in sec.items()}
    rss = comm.allgather(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0)
    return DistributedSolution(
        rank=rank, size=size, part=part, disc=disc, u=u, owned=part.owned[l2p],
        global_dofs=part.dofs[l2p], report=report, seconds=seconds, peak_rss_mb=rss,
        errors=errors, n_dofs=header["n_dofs"], n_global=N, problem=system.problem,
        partition=header["partition"], n_cells=header["n_cells"],
        n_vertices=header["n_vertices"], tags=header["tags"], notes=notes, _comm=comm)


def _reason_name(PETSc, reason: int) -> str:
    for name, value in vars(PETSc.KSP.ConvergedReason).items():
        if not name.startswith("_") and value == reason and name.isupper():
            return name
    return str(reason)


# ----------------------------------------------------------------------------
# output: one VTU piece per rank and the parallel index (.pvtu)
# ----------------------------------------------------------------------------
def write_pieces(folder, stem, sol: DistributedSolution, *, name="u"):
    """Each rank writes ``stem_pRANK.vtu``; rank 0 writes ``stem.pvtu`` listing them.

    ``folder`` is created (with its parents) when it does not exist, as the
    command line's ``--output`` folder is.

    Returns
    -------
    pathlib.Path
        The ``.pvtu`` file (on every rank).
    """
    from pathlib import Path

    from galerkit.problem import Solution

    from ..files.readwrite import write_parallel_index, write_solution

    folder = Path(folder)
    comm = sol._comm
    piece = folder / f"{stem}_p{sol.rank}.vtu"
    local = Solution(u=sol.u, disc=sol.disc, report=None, seconds={}, assembler=None,
                     problem=sol.problem)
    with _together(comm, "create the output folder"):
        if sol.rank == 0:
            try:
                folder.mkdir(parents=True, exist_ok=True)
            except OSError as exc:
                raise InputError(f"cannot create the output folder {str(folder)!r}: "
                                 f"{exc.strerror or exc}; choose a writable place") from None
    with _together(comm, "write pieces"):
        write_solution(piece, local, name=name, tags=sol.tags, extra_cell_data={
            "rank": lambda parent: np.full(parent.size, sol.rank, dtype=np.int32),
            "global_cell": lambda parent: sol.part.cells[parent]})
    index = folder / f"{stem}.pvtu"
    with _together(comm, "write index"):
        if sol.rank == 0:
            write_parallel_index(index, [folder / f"{stem}_p{r}.vtu" for r in range(sol.size)])
    return index
