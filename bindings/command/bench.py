"""Comparing solvers on one system: estimates first, budgets, repeats, each run apart.

:func:`bench` assembles and constrains a problem once, then, for every method:

1. **estimates** its time and memory before running it, from a *pilot* run on a
   patch of the system (the first ``PILOT_UNKNOWNS`` unknowns in breadth-first
   order from unknown 0, a principal submatrix, so SPD like the whole) scaled to
   the full size by the method's growth law (``GROWTH``): the sparse direct
   solver's fill grows like ``n log n`` in 2D and ``n^(4/3)`` in 3D and its work
   like ``n^1.5`` / ``n^2`` (nested-dissection orderings: George 1973; Lipton,
   Rose & Tarjan 1979); CG without a good preconditioner needs iterations in
   proportion to ``h^-1 ~ n^(1/d)`` (the condition number of the stiffness matrix
   grows like ``h^-2``: Brenner & Scott 2008, section 9.6), multigrid a bounded
   number.  A method whose estimate exceeds ``budget_seconds`` or ``budget_mb`` is
   skipped with a one-line reason, unless it was asked for by name (``methods=``);
2. **runs** it ``repeat`` times, each run in a fresh child process, so that
   every run's peak memory is its own: the child's peak resident set size
   (``VmHWM`` of ``/proc/self/status``, which counts every allocation, compiled
   code and SuperLU's included).  Times are the set-up and solve seconds the
   solver reports; the table gives their minimum and median over the runs.
   Each child first solves a small system with the method, so imports and
   compilation are not timed.

With ``generate=`` and ``sizes=`` the same manufactured problem is benchmarked
at several sizes; :meth:`BenchTable.plot` draws time against unknowns, one line
per method, labelled with the iteration counts.

Solvers registered with :func:`galerkit.register_solver` are benchmarked too:
the child processes import the modules of ``solvers_module=`` and the entry
points of the group ``galerkit.solvers`` (``SOLVER_ENTRY_POINTS``) before they
look the method up, as the parent does.

Results are numerical approximations and timings depend on the machine and its load.
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
import tracemalloc
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from galerkit.errors import GalerkitError, InputError

__all__ = ["bench", "BenchTable", "load_solver_plugins", "estimate_method", "growth_factors",
           "SOLVER_ENTRY_POINTS", "BENCH_MEMORY_MEASURE"]

#: The entry-point group whose entries register solvers: an entry names a module
#: (registering on import) or a function called with no arguments.  In a plugin's
#: pyproject.toml: ``[project.entry-points."galerkit.solvers"] mine = "mypkg.solvers"``.
SOLVER_ENTRY_POINTS = "galerkit.solvers"

#: What the peak-memory column measures.
BENCH_MEMORY_MEASURE = (
    "peak resident set size (VmHWM) of the child process that ran the method: "
    "the interpreter, the compiled kernels and the system (base_mb, measured before "
    "the set-up) plus everything the set-up and solve allocated")

#: Unknowns of the pilot patch per dimension.
PILOT_UNKNOWNS = {2: 20000, 3: 8000}

#: ``method -> (time exponent, iteration exponent, memory law)`` of the growth with
#: the number of unknowns n (``d`` the dimension); memory laws: "linear", "fill".
GROWTH = {
    "direct": (lambda d: 1.5 if d == 2 else 2.0, lambda d: 0.0, "fill"),
    "cg": (lambda d: 1.0 + 1.0 / d, lambda d: 1.0 / d, "linear"),
    "cg-jacobi": (lambda d: 1.0 + 1.0 / d, lambda d: 1.0 / d, "linear"),
    "cg-amg": (lambda d: 1.0, lambda d: 0.0, "linear"),
    "cg-pyamg": (lambda d: 1.0, lambda d: 0.0, "linear"),
}
#: registered methods of unknown growth are assumed to grow like CG without a
#: good preconditioner (the estimate says so)
DEFAULT_GROWTH = GROWTH["cg"]

#: Bytes per stored LU entry for the direct solver's memory estimate: 12 for the
#: factors themselves (value + index), times 2.5 for SuperLU's working storage and
#: the matrix copies of the factorisation -- measured on the reference machine
#: (P1 box, 59 319 unknowns: 1424 MB of peak above the process base for 570 MB of
#: factor storage scaled from the pilot).
DIRECT_BYTES_PER_FACTOR_ENTRY = 30.0

#: Default budgets: seconds per run; memory as a fraction of the available memory.
DEFAULT_BUDGET_SECONDS = 60.0
DEFAULT_BUDGET_FRACTION = 0.5


# ----------------------------------------------------------------------------
# registered solvers from modules and entry points
# ----------------------------------------------------------------------------
def load_solver_plugins(modules=()) -> list[str]:
    """Import ``modules`` (dotted names) and load the ``galerkit.solvers`` entry points,
    so that the solvers they register are available; returns what was loaded.

    Raises
    ------
    InputError
        A module that cannot be imported or an entry point that fails, named.
    """
    import importlib
    from importlib import metadata

    loaded = []
    if modules and os.getcwd() not in sys.path and "" not in sys.path:
        sys.path.append(os.getcwd())  # a module beside the problem, as `python -m` finds it
    for name in modules or ():
        try:
            importlib.import_module(name)
        except Exception as exc:
            raise InputError(f"--solvers-module {name!r} could not be imported "
                             f"({type(exc).__name__}: {exc}); give a module on the Python "
                             "path that calls galerkit.register_solver") from None
        loaded.append(name)
    for ep in metadata.entry_points(group=SOLVER_ENTRY_POINTS):
        try:
            obj = ep.load()
            if callable(obj) and not isinstance(obj, type(sys)):
                obj()
        except Exception as exc:
            raise InputError(f"entry point {ep.name!r} = {ep.value!r} of group "
                             f"{SOLVER_ENTRY_POINTS!r} failed ({type(exc).__name__}: {exc})"
                             ) from None
        loaded.append(f"{ep.name} = {ep.value}")
    return loaded


# ----------------------------------------------------------------------------
# the table
# ----------------------------------------------------------------------------
@dataclass
class BenchTable:
    """Rows of a benchmark: one per (size, method) that ran, and the skipped ones.

    ``rows`` are dicts with the keys of ``COLUMNS``; ``skipped`` holds
    ``{"size", "unknowns", "method", "reason"}``; ``histories`` maps
    ``(size, method)`` to the residual history of the first run.
    """

    rows: list = field(default_factory=list)
    skipped: list = field(default_factory=list)
    histories: dict = field(default_factory=dict)
    rtol: float = 1e-10
    memory_measure: str = BENCH_MEMORY_MEASURE

    COLUMNS = ("size", "unknowns", "method", "runs", "setup_min", "setup_median",
               "solve_min", "solve_median", "total_min", "total_median", "iterations",
               "final_residual", "converged", "peak_mb", "base_mb", "estimate_seconds",
               "estimate_mb", "l2_error", "h1_error", "message")

    @property
    def all_converged(self) -> bool:
        return all(r["converged"] for r in self.rows)

    def methods(self) -> list:
        return list(dict.fromkeys(r["method"] for r in self.rows))

    def _text(self, c, v):
        if v is None or (isinstance(v, float) and math.isnan(v)):
            return ""
        if c in ("size", "unknowns", "runs", "iterations"):
            return str(int(v))
        if c == "converged":
            return "yes" if v else "NO"
        if c in ("final_residual", "l2_error", "h1_error"):
            return f"{v:.2e}"
        if c in ("peak_mb", "base_mb", "estimate_mb"):
            return f"{v:.0f}"
        if isinstance(v, float):
            return f"{v:.3f}"
        return str(v)

    def to_markdown(self, columns=None) -> str:
        """The rows as a Markdown table (``columns``: a subset of ``COLUMNS``), then
        one line per skipped method."""
        cols = list(columns or [c for c in self.COLUMNS if c != "message"])
        lines = ["| " + " | ".join(cols) + " |", "|" + "|".join("---" for _ in cols) + "|"]
        for r in self.rows:
            lines.append("| " + " | ".join(self._text(c, r.get(c)) for c in cols) + " |")
        for s in self.skipped:
            lines.append(f"\nskipped {s['method']} at {s['unknowns']} unknowns: {s['reason']}")
        return "\n".join(lines)

    def to_csv(self) -> str:
        """The rows as CSV text (every column of ``COLUMNS``, numbers unformatted)."""
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerow(self.COLUMNS)
        for r in self.rows:
            w.writerow(["" if r.get(c) is None else r.get(c) for c in self.COLUMNS])
        return buf.getvalue()

    def plot(self, path, *, title=""):
        """Time (set-up + solve, minimum over the runs) against unknowns, log-log, one
        line per method, each point labelled with its iteration count; a PNG."""
        from ..files.plots import plot_times

        lines = {}
        for r in self.rows:
            if r["total_min"] is None:
                continue
            lines.setdefault(r["method"], []).append((r["unknowns"], r["total_min"],
                                                      r["iterations"]))
        return plot_times(path, lines, title=title)

    def plot_residuals(self, path, *, title=""):
        """Residual histories of the first run at the largest size, one line per method."""
        from ..files.plots import plot_residuals

        if not self.rows:
            return plot_residuals(path, {}, title=title, rtol=self.rtol)
        largest = max(r["size"] for r in self.rows)
        hist = {m: h for (s, m), h in self.histories.items() if s == largest}
        return plot_residuals(path, hist, title=title, rtol=self.rtol)


# ----------------------------------------------------------------------------
# estimates
# ----------------------------------------------------------------------------
def _pilot_indices(A, m):
    from scipy.sparse.csgraph import breadth_first_order

    n = A.shape[0]
    if m >= n:
        return np.arange(n)
    seen = np.zeros(n, dtype=bool)
    order = []
    start = 0
    while len(order) < m:  # a disconnected pattern: continue from the next unseen unknown
        part = breadth_first_order(A, start, directed=False, return_predecessors=False)
        seen[part] = True
        order.extend(part.tolist())
        rest = np.flatnonzero(~seen)
        if rest.size == 0:
            break
        start = int(rest[0])
    return np.sort(np.asarray(order[:m], dtype=np.int64))


def growth_factors(method, dim, n, m):
    """Factors (time, iterations, memory) from a pilot of ``m`` unknowns to ``n``."""
    t_exp, it_exp, mem_law = GROWTH.get(method, DEFAULT_GROWTH)
    r = n / m
    if mem_law == "fill":
        mem = r * math.log(max(n, 2)) / math.log(max(m, 2)) if dim == 2 else r ** (4.0 / 3.0)
    else:
        mem = r
    return r ** t_exp(dim), r ** it_exp(dim), mem


def estimate_method(method, A, dim, *, degree=None, rtol=1e-10, maxiter=None, pilot=None):
    """Estimated seconds and MB of one set-up and solve with ``method`` on ``A``.

    A pilot run on a patch of ``pilot`` unknowns (default ``PILOT_UNKNOWNS[dim]``)
    is measured here, in this process, and scaled by the method's growth law.

    Returns
    -------
    dict
        ``seconds``, ``mb`` (memory of the set-up and solve beyond the matrix),
        ``iterations`` (estimated), ``basis`` (one line: how the numbers came about)
        and ``error`` (a message when the pilot itself failed, else "").
    """
    from galerkit.solvers import prepare_solver

    n = A.shape[0]
    m = min(n, int(pilot or PILOT_UNKNOWNS[dim]))
    idx = _pilot_indices(A, m)
    sub = A[idx, :][:, idx].tocsr() if m < n else A
    b = np.ones(m)
    try:  # a first, untimed pass: compilation for the pilot's sizes is no part of the estimate
        prepare_solver(sub, method, dim=dim, degree=degree).solve(b, rtol=rtol, maxiter=maxiter)
    except GalerkitError:
        pass  # the timed pass reports it
    tracemalloc.start()
    t0 = time.perf_counter()
    try:
        rep = prepare_solver(sub, method, dim=dim, degree=degree).solve(
            b, rtol=rtol, maxiter=maxiter)
    except GalerkitError as exc:
        return {"seconds": None, "mb": None, "iterations": None, "basis": "",
                "error": f"{type(exc).__name__} on the pilot: {exc}"}
    finally:
        seconds = time.perf_counter() - t0
        traced = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
    t_exp, _, _ = GROWTH.get(method, DEFAULT_GROWTH)
    g_time, g_iter, grow = growth_factors(method, dim, n, m)
    mem = max(float(traced), DIRECT_BYTES_PER_FACTOR_ENTRY * rep.options.get("factor_nonzeros", 0),
              float(rep.options.get("hierarchy_bytes", 0) or 0))
    law = "" if method in GROWTH else " (growth of this method unknown: assumed as plain CG)"
    basis = ("measured on the whole system" if m == n else
             f"pilot on {m} of {n} unknowns: {seconds:.3g} s, {rep.iterations} iterations,"
             f" scaled by n^{t_exp(dim):.2f} in time{law}")
    return {"seconds": seconds * g_time,
            "mb": mem * grow / 2**20,
            "iterations": int(round(max(rep.iterations, 1) * g_iter)),
            "basis": basis,
            "error": "" if rep.converged else f"the pilot did not converge: {rep.message}"}


# ----------------------------------------------------------------------------
# one run in a child process
# ----------------------------------------------------------------------------
def _status_mb(key):
    """A line of /proc/self/status in MB (Linux), or None."""
    try:
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith(key + ":"):
                    return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    return None


def _save_system(folder: Path, A, b):
    np.savez(folder / "system.npz", data=A.data, indices=A.indices, indptr=A.indptr,
             shape=np.array(A.shape), b=b)


def _load_system(folder: Path):
    import scipy.sparse as sp

    z = np.load(folder / "system.npz")
    A = sp.csr_array((z["data"], z["indices"], z["indptr"]), shape=tuple(z["shape"]))
    return A, z["b"]


def _warm_up(method, prepare_solver):
    """Set up and solve a small system with the method, so imports and compilation
    are not timed.  1000 unknowns: above cg-amg's coarsest-level size."""
    import scipy.sparse as sp

    n = 1000
    A = sp.csr_array(sp.diags([-1.0, 2.0, -1.0], [-1, 0, 1], shape=(n, n)))
    try:
        prepare_solver(A, method).solve(np.ones(n), rtol=1e-6)
    except GalerkitError:
        pass  # the real run reports it


def _child(folder: str) -> int:
    """The child process: one set-up and solve; writes result.json (and x.npy)."""
    from galerkit.solvers import prepare_solver

    folder = Path(folder)
    job = json.loads((folder / "job.json").read_text())
    out = {"message": "", "converged": False}
    try:
        load_solver_plugins(job["modules"])
        A, b = _load_system(folder)
        _warm_up(job["method"], prepare_solver)
        out["base_mb"] = _status_mb("VmRSS")
        prepared = prepare_solver(A, job["method"], dim=job["dim"], degree=job["degree"])
        rep = prepared.solve(b, rtol=job["rtol"], maxiter=job["maxiter"])
        out.update(setup_seconds=rep.setup_seconds, solve_seconds=rep.solve_seconds,
                   iterations=rep.iterations, final_residual=rep.final_residual,
                   converged=bool(rep.converged), message=rep.message)
        if job["keep_x"]:
            np.save(folder / "x.npy", rep.x)
            np.save(folder / "residuals.npy", np.asarray(rep.residuals, dtype=np.float64))
    except GalerkitError as exc:
        out["message"] = f"{type(exc).__name__}: {exc}"
    out["peak_mb"] = _status_mb("VmHWM")
    (folder / "result.json").write_text(json.dumps(out))
    return 0


def _run_child(folder: Path, job: dict, timeout):
    (folder / "job.json").write_text(json.dumps(job))
    for f in ("result.json", "x.npy", "residuals.npy"):
        (folder / f).unlink(missing_ok=True)
    env = dict(os.environ)
    env.setdefault("PYTHONHASHSEED", "0")
    cmd = [sys.executable, "-m", "galerkit.bindings.command.bench", "--child", str(folder)]
    try:
        run = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout, env=env)
    except subprocess.TimeoutExpired:
        return {"message": f"stopped after {timeout:.0f} s (4x the time budget plus 30 s)",
                "converged": False}
    res = folder / "result.json"
    if not res.exists():
        tail = (run.stderr or run.stdout).strip().splitlines()[-1:] or [""]
        why = "killed (out of memory?)" if run.returncode < 0 else f"exit code {run.returncode}"
        return {"message": f"the run's process ended without a result ({why}): {tail[0][:200]}",
                "converged": False}
    return json.loads(res.read_text())


# ----------------------------------------------------------------------------
# the systems
# ----------------------------------------------------------------------------
class _Recorder:
    """A registered 'solver' that keeps the constrained system and solves nothing."""

    def __init__(self):
        self.A = None
        self.b = None

    def factory(self, A):
        self.A = A.copy()  # the kernel's own matrix stays the kernel's
        return self

    def solve(self, b, x0=None, rtol=1e-10, maxiter=None, callback=None):
        from galerkit.solvers import SolveReport

        self.b = np.array(b, dtype=np.float64)
        return SolveReport(x=np.zeros_like(self.b), converged=True, iterations=0,
                           residuals=np.array([1.0]))


class _Replay:
    """A registered 'solver' that hands back a report computed elsewhere."""

    def __init__(self):
        self.report = None

    def factory(self, A):
        return self

    def solve(self, b, x0=None, rtol=1e-10, maxiter=None, callback=None):
        return self.report


def generated_problem(kind, size, degree=None):
    """The manufactured problem of ``bench --generate``: u = prod sin(pi x_i) on the
    unit square or cube with u = 0 on the boundary (a ProblemSpec)."""
    from .problemfile import parse_problem

    if kind not in ("square", "box"):
        raise InputError(f"bench: generate must be 'square' or 'box', got {kind!r}")
    d = 2 if kind == "square" else 3
    coords = "xyz"[:d]
    u = "*".join(f"sin(pi*{c})" for c in coords)
    grad = ["*".join((f"pi*cos(pi*{c})" if c == a else f"sin(pi*{c})") for c in coords)
            for a in coords]
    data = {"mesh": {"generator": kind, "cells": int(size)},
            "discretization": {"degree": degree or 1},
            "source": {"value": f"{d}*pi^2*{u}"},
            "boundary": [{"tag": "boundary", "kind": "dirichlet", "u": 0}],
            "exact": {"solution": u, "gradient": grad}}
    return parse_problem(data, source=f"--generate {kind} --size {size}", stem=f"bench-{kind}")


def _errors(sol, exact, gradient, kappa):
    from galerkit.functionals import h1_seminorm_error, l2_error

    out = {"l2_error": float(l2_error(sol.disc, sol.u, exact)), "h1_error": None}
    if gradient is not None:
        out["h1_error"] = float(h1_seminorm_error(sol.disc, sol.u, gradient))
    return out


# ----------------------------------------------------------------------------
# bench
# ----------------------------------------------------------------------------
def _available_mb():
    try:
        with open("/proc/meminfo") as f:
            for line in f:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    return None


def bench(problem=None, *, generate=None, sizes=None, degree=None, methods=None,
          rtol=None, maxiter=None, repeat=1, budget_seconds=None, budget_mb=None,
          solvers_module=(), exact=None, exact_gradient=None, stay_in_folder=False,
          progress=None) -> BenchTable:
    """Benchmark solvers on one system (or one problem family at several sizes).

    Parameters
    ----------
    problem : str, path or PoissonProblem, optional
        A problem file, or a problem object; or give ``generate``.
    generate : {"square", "box"}, optional
        The manufactured problem u = prod sin(pi x_i) on the unit square or cube.
    sizes : list of int, optional
        Cells per axis of the generated meshes (default 64 for the square, 10 for
        the box); several sizes give a time-against-unknowns study.
    degree : int, optional
        Element degree (default: the problem file's, else 1).
    methods : list of str, optional
        Methods to run, by registered name; the named ones run even when their
        estimate exceeds a budget.  Default: every registered solver, those over
        budget skipped.
    rtol, maxiter : solver tolerance (default: the problem file's, else 1e-10) and
        iteration limit.
    repeat : int
        Runs per method, each in its own process; the table gives the minimum and
        the median of the times.
    budget_seconds, budget_mb : float, optional
        A method whose estimated seconds per run or MB exceed these is skipped
        (defaults: ``DEFAULT_BUDGET_SECONDS``; half the available memory).
    solvers_module : list of str
        Modules to import (in this process and in every run's) that register solvers.
    exact, exact_gradient : callable, optional
        For a problem object: the exact solution and gradient, for the error columns.
    stay_in_folder : bool
        For a problem file: see :func:`~galerkit.bindings.command.problemfile.load_problem`.
    progress : callable, optional
        Called with a one-line message at the start of each phase.

    Returns
    -------
    BenchTable

    Raises
    ------
    InputError
        Bad arguments, an unknown method, a module that cannot be imported.
    """
    from galerkit.problem import PoissonProblem
    from galerkit.solvers import available_solvers, register_solver, unregister_solver

    from .problemfile import load_problem

    say = progress or (lambda msg: None)
    if (problem is None) == (generate is None):
        raise InputError("bench: give a problem file or --generate square|box (generate=), not "
                         + ("both" if problem is not None else "neither"))
    if sizes is not None and generate is None:
        raise InputError("bench: sizes apply to generated problems only; a problem gives "
                         "its own mesh")
    if not isinstance(repeat, int) or isinstance(repeat, bool) or not 1 <= repeat <= 100:
        raise InputError(f"bench: repeat must be an integer 1..100, got {repeat!r}")
    for name, v in (("budget_seconds", budget_seconds), ("budget_mb", budget_mb)):
        if v is not None and not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0):
            raise InputError(f"bench: {name} must be a number > 0, got {v!r}")
    modules = list(solvers_module or ())
    load_solver_plugins(modules)
    known = available_solvers()
    forced = methods is not None
    if forced:
        methods = [m.strip() for m in methods if m and m.strip()]
        if not methods:
            raise InputError("bench: the list of methods is empty; give names such as "
                             "direct,cg-amg")
        for m in methods:
            if m not in known:
                raise InputError(f"bench: {m!r} is not a registered solver; available: "
                                 f"{', '.join(known)} (a solver of your own: "
                                 "--solvers-module MODULE, or the entry-point group "
                                 f"{SOLVER_ENTRY_POINTS!r})")
    else:
        methods = known
    budget_seconds = float(budget_seconds or DEFAULT_BUDGET_SECONDS)
    if budget_mb is None:
        avail = _available_mb()
        budget_mb = DEFAULT_BUDGET_FRACTION * avail if avail else float("inf")
    if generate is not None:
        default = {"square": 64, "box": 10}.get(generate, 10)
        sizes = list(sizes) if sizes is not None else [default]
        for s in sizes:
            if not isinstance(s, (int, np.integer)) or isinstance(s, bool) or s < 1:
                raise InputError(f"bench: sizes must be integers >= 1, got {s!r}")
        cases = [(int(s), lambda s=s: generated_problem(generate, s, degree)) for s in sizes]
    elif isinstance(problem, PoissonProblem):
        cases = [(0, None)]
    else:
        spec = load_problem(problem, stay_in_folder=stay_in_folder)
        cases = [(0, lambda: spec)]
    table = BenchTable(rtol=1e-10)
    record_name, replay_name = "bench:record", "bench:replay"
    recorder, replay = _Recorder(), _Replay()
    register_solver(record_name, recorder.factory, overwrite=True)
    register_solver(replay_name, replay.factory, overwrite=True)
    work = Path(tempfile.mkdtemp(prefix="galerkit-bench-"))
    try:
        from galerkit.solvers import prepare_solver

        for m in methods:  # compile once here, for the pilots
            _warm_up(m, prepare_solver)
        for size, make in cases:
            if make is None:
                prob, k, tol, it = problem, degree or 1, rtol or 1e-10, maxiter
                ex, gr = exact, exact_gradient
            else:
                spec_ = make()
                prob, opts = spec_.build()
                k = degree or opts.degree
                tol = rtol or opts.rtol
                it = maxiter if maxiter is not None else opts.maxiter
                ex, gr = opts.exact, opts.exact_gradient
            table.rtol = tol
            say(f"bench: assembling{f' size {size}' if size else ''} (P{k}) ...")
            base = prob.solve(degree=k, method=record_name, rtol=tol)
            A, b = recorder.A, recorder.b
            dim = prob.mesh.dim
            n = A.shape[0]
            _save_system(work, A, b)
            for m in methods:
                say(f"bench: {n} unknowns, {m}: estimating ...")
                est = estimate_method(m, A, dim, degree=k, rtol=tol, maxiter=it)
                over = []
                if est["seconds"] is not None and est["seconds"] > budget_seconds:
                    over.append(f"{est['seconds']:.3g} s per run > budget {budget_seconds:g} s")
                if est["mb"] is not None and est["mb"] > budget_mb:
                    over.append(f"{est['mb']:.0f} MB > budget {budget_mb:.0f} MB")
                if over and not forced:
                    table.skipped.append({
                        "size": size, "unknowns": n, "method": m,
                        "reason": f"estimated {'; '.join(over)} ({est['basis']}); "
                                  f"name it in methods (--methods {m}) to run it anyway"})
                    say(f"bench: {m}: skipped, {table.skipped[-1]['reason']}")
                    continue
                runs = []
                for r in range(repeat):
                    say(f"bench: {n} unknowns, {m}: run {r + 1} of {repeat} ...")
                    job = {"method": m, "rtol": tol, "maxiter": it, "dim": dim, "degree": k,
                           "modules": modules, "keep_x": r == 0}
                    timeout = None if forced else 4 * budget_seconds + 30
                    res = _run_child(work, job, timeout)
                    if r == 0 and (work / "x.npy").exists():
                        from galerkit.solvers import SolveReport

                        x = np.load(work / "x.npy")
                        hist = np.load(work / "residuals.npy")
                        table.histories[(size, m)] = hist
                        if ex is not None:
                            replay.report = SolveReport(
                                x=x, converged=res.get("converged", False),
                                iterations=res.get("iterations", 0), residuals=hist)
                            try:
                                sol = prob.solve(assembler=base.assembler, method=replay_name,
                                                 rtol=tol)
                                res.update(_errors(sol, ex, gr, None))
                            except GalerkitError as exc:
                                res["message"] = (res.get("message") or "") + f" ({exc})"
                    runs.append(res)
                    if res.get("setup_seconds") is None:
                        break  # a failed run is not repeated
                table.rows.append(_row(size, n, m, runs, est))
    finally:
        unregister_solver(record_name)
        unregister_solver(replay_name)
        shutil.rmtree(work, ignore_errors=True)
    return table


def _row(size, n, method, runs, est):
    ok = [r for r in runs if r.get("setup_seconds") is not None]
    setup = [r["setup_seconds"] for r in ok]
    solve = [r["solve_seconds"] for r in ok]
    total = [a + b for a, b in zip(setup, solve)]

    def mn(v):
        return min(v) if v else None

    def med(v):
        return statistics.median(v) if v else None

    first = runs[0]
    peaks = [r["peak_mb"] for r in runs if r.get("peak_mb") is not None]
    bases = [r["base_mb"] for r in runs if r.get("base_mb") is not None]
    return {"size": size, "unknowns": n, "method": method, "runs": len(ok),
            "setup_min": mn(setup), "setup_median": med(setup),
            "solve_min": mn(solve), "solve_median": med(solve),
            "total_min": mn(total), "total_median": med(total),
            "iterations": first.get("iterations"), "final_residual": first.get("final_residual"),
            "converged": bool(ok) and all(r.get("converged") for r in ok),
            "peak_mb": max(peaks) if peaks else None, "base_mb": min(bases) if bases else None,
            "estimate_seconds": est["seconds"], "estimate_mb": est["mb"],
            "l2_error": first.get("l2_error"), "h1_error": first.get("h1_error"),
            "message": first.get("message", "") or est.get("error", "")}


if __name__ == "__main__":
    if len(sys.argv) == 3 and sys.argv[1] == "--child":
        sys.exit(_child(sys.argv[2]))
    sys.exit("usage: python -m galerkit.bindings.command.bench --child FOLDER "
             "(used by galerkit bench)")
