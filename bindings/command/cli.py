"""The ``galerkit`` command line.

Subcommands
-----------
``demo``       a built-in scenario (cooling plate); writes VTU and PNG
``verify``     a manufactured-solution convergence study; writes a PNG
``mesh-info``  counts, tags and quality of a mesh file
``solve``      solve a problem file (TOML, see docs/problem-files.md)
``bench``      every registered solver on one assembled system

``--quiet`` (no progress bars, no headings, no caution: the result lines only)
and ``--json`` (one JSON object on stdout) go before or after the subcommand.
Progress bars (tqdm, on stderr) appear on a terminal, and only for steps that
take more than a second.  Exit codes: 0 success, 1 a solver did not converge or a check
failed, 2 bad input (a bad file, bad TOML, a bad formula, an unknown key or
option, or a problem too large for the memory available; the message on stderr
names the problem, and with ``--json`` stdout carries it as one JSON object).
"""

from __future__ import annotations

import argparse
import json
import math
import re
import resource
import sys
import time
import warnings
from dataclasses import replace
from pathlib import Path

import numpy as np

CAUTION = (
    "Caution: these results are numerical approximations. Verify them (mesh convergence, "
    "independent checks) before use; engineering decisions rest with qualified engineers "
    "under the applicable local codes and standards."
)

#: What the memory column of ``bench`` measures.


#: control characters (C0 but newline, DEL, C1) and the bidirectional overrides:
#: a terminal would act on them, so echoed input shows them escaped
_CONTROL = re.compile("[\x00-\x09\x0b-\x1f\x7f-\x9f\u202a-\u202e\u2066-\u2069]")


def printable(text) -> str:
    r"""``text`` with every control character written as an escape (``\x1b``).

    Every line the command line prints passes here, so that a tag name, a
    title or a file name cannot send terminal escape sequences.

    Examples
    --------
    >>> printable("tag \x1b[2Jred")
    'tag \\x1b[2Jred'
    """
    return _CONTROL.sub(lambda m: m.group().encode("unicode_escape").decode("ascii"),
                        str(text))


def _peak_rss_mb() -> float:
    """Peak resident set size of this process so far, MB (Linux reports KiB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


class _Report:
    """Text output: headings and notes are dropped by --quiet, result lines are not."""

    def __init__(self, args):
        self.quiet = args.quiet
        self.silent = args.json

    def head(self, text=""):
        if not (self.quiet or self.silent):
            print(printable(text))

    def result(self, text):
        if not self.silent:
            print(printable(text))

    def caution(self):
        self.head()
        self.head(CAUTION)


def _progress(args, total, desc):
    """A tqdm bar on stderr, shown only on a terminal and after one second; None with --quiet."""
    if args.quiet:
        return None
    from tqdm import tqdm

    # disable=None: no bar when stderr is not a terminal (logs, pipes, tests)
    return tqdm(total=total, desc=desc, file=sys.stderr, delay=1.0, leave=False,
                dynamic_ncols=True, disable=None)


def _json_default(v):
    if isinstance(v, (np.integer,)):
        return int(v)
    if isinstance(v, (np.floating,)):
        return float(v)
    if isinstance(v, np.ndarray):
        return v.tolist()
    if isinstance(v, Path):
        return str(v)
    return str(v)


def _finite(v):
    """NaN and infinities become null, so the output is strict JSON."""
    if isinstance(v, dict):
        return {k: _finite(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_finite(x) for x in v]
    if isinstance(v, (float, np.floating)) and not math.isfinite(float(v)):
        return None
    return v


def _print_json(info):
    print(json.dumps(_finite(info), default=_json_default, allow_nan=False))


def _plural(cell_type: str) -> str:
    return {"tetrahedron": "tetrahedra"}.get(cell_type, cell_type + "s")


def _iterations(n) -> str:
    return f"{n} iteration" + ("" if n == 1 else "s")


def _folder(path) -> Path:
    from galerkit.errors import InputError

    p = Path(path)
    try:
        p.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"output folder {str(p)!r} cannot be created: "
                         f"{exc.strerror or exc}; pass another one with --output") from None
    return p


# -- demo ------------------------------------------------------------------------
def _demo(args) -> int:
    """Steady temperature in a battery-pack cooling plate (a scenario of our own).

    An aluminium plate 0.30 m x 0.20 m carries six cells that each dissipate
    heat into it; the edge y = 0 (``ymin``) is cooled by a coolant channel (a Robin
    condition), the other edges carry no flux (homogeneous Neumann).  All numbers are invented for the
    demonstration.
    """
    import galerkit as gk
    from galerkit.errors import InputError
    from ..files import write_solution
    from ..files.plots import plot_field

    if args.size < 3:
        raise InputError(f"demo: --size must be at least 3, got {args.size}")
    out = _folder(args.output)
    nx, ny = args.size, (2 * args.size) // 3
    compile_before = _compile_seconds()
    t_start = time.perf_counter()
    mesh = gk.structured_triangles(nx, ny, (0.0, 0.0), (0.30, 0.20))
    t_mesh = time.perf_counter() - t_start
    kappa = 160.0  # W/(m K), aluminium alloy plate (demo value)
    thickness = 0.004  # m
    # six cells of 0.07 m x 0.05 m, 12 W each, spread through the plate thickness
    q = 12.0 / (0.07 * 0.05 * thickness)  # W/m^3

    def source(x):
        on = np.zeros(x.shape[1], dtype=bool)
        for cx in (0.055, 0.15, 0.245):
            for cy in (0.06, 0.14):
                on |= (np.abs(x[0] - cx) < 0.035) & (np.abs(x[1] - cy) < 0.025)
        return np.where(on, q, 0.0)

    # coolant film coefficient 1500 W/(m^2 K) per unit plate thickness, at 25 deg C
    h_coolant, t_coolant = 1500.0 / thickness, 25.0
    problem = gk.PoissonProblem(mesh, conductivity=kappa, source=source,
                                robin={"ymin": (h_coolant, t_coolant)})
    sol = problem.solve(degree=1, method=args.method, rtol=1e-10)
    # total: mesh to solution, compilation included (the lines above it sum to it,
    # up to the set-up of the problem between them)
    total = time.perf_counter() - t_start
    seconds = _with_compile({"mesh": t_mesh, **sol.seconds}, compile_before)
    vtu = write_solution(out / "cooling_plate.vtu", sol, name="temperature")
    png = plot_field(out / "cooling_plate.png", sol, title="Cooling plate: steady temperature",
                     units="temperature [deg C]", length_unit="m")
    rep = sol.report
    info = {
        "scenario": "battery-pack cooling plate (demo data)",
        "mesh": {"cells": mesh.n_cells, "vertices": mesh.n_vertices, "cell_type": mesh.cell_type},
        "dofs": sol.disc.n_dofs,
        "degree": 1,
        "solver": rep.method,
        "iterations": rep.iterations,
        "relative_residual": rep.final_residual,
        "converged": rep.converged,
        "seconds": {**{k: round(v, 3) for k, v in seconds.items()}, "total": round(total, 3)},
        "peak_rss_mb": round(_peak_rss_mb(), 1),
        "temperature_min": float(sol.u.min()),
        "temperature_max": float(sol.u.max()),
        "outputs": [str(vtu), str(png)],
    }
    if args.json:
        _print_json({**info, "caution": CAUTION})
        return 0 if rep.converged else 1
    say = _Report(args)
    say.head("galerkit demo: steady temperature in a battery-pack cooling plate")
    say.result(f"  mesh        {mesh.n_cells} triangles, {mesh.n_vertices} vertices")
    say.result(f"  unknowns    {sol.disc.n_dofs} (P1)")
    say.result(f"  solver      {rep.method}: {_iterations(rep.iterations)}, relative residual "
               f"{rep.final_residual:.2e}, converged={rep.converged}")
    _seconds_lines(say, info["seconds"])
    say.result(f"  peak memory {info['peak_rss_mb']:.0f} MB (peak resident set size)")
    say.result(f"  temperature {info['temperature_min']:.2f} .. {info['temperature_max']:.2f} deg C")
    say.result(f"  wrote       {vtu}")
    say.result(f"  wrote       {png}")
    say.caution()
    return 0 if rep.converged else 1


# -- verify ------------------------------------------------------------------------
def _manufactured(d):
    pi = np.pi

    def exact(x):
        return np.prod(np.sin(pi * x), axis=0)

    def grad(x):
        s, c = np.sin(pi * x), np.cos(pi * x)
        out = np.empty_like(x)
        for i in range(d):
            out[i] = pi * c[i] * np.prod(np.delete(s, i, axis=0), axis=0)
        return out

    def source(x):
        return d * pi * pi * exact(x)

    return exact, grad, source


def _verify(args) -> int:
    import galerkit as gk
    from galerkit.errors import InputError
    from ..files import write_atomically
    from ..files.plots import plot_convergence
    from .problemfile import load_problem

    if args.levels < 2:
        raise InputError(f"verify: --levels must be at least 2 (an order needs two meshes), "
                         f"got {args.levels}")
    degrees = _int_list(args.degrees, "--degrees") if args.degrees else None
    for k in degrees or ():
        if k not in (1, 2, 3, 4):
            raise InputError(f"verify: --degrees: degree {k} is not one of 1, 2, 3, 4")
    method, rtol = "auto", 1e-12
    if args.problem is not None:
        if args.cell is not None or args.start_size is not None:
            raise InputError("verify: --cell and --start-size apply to the manufactured "
                             "problem; a problem file gives its own mesh")
        spec = load_problem(args.problem, stay_in_folder=args.stay_in_folder)
        problem, opts = spec.build()
        if opts.exact is None or opts.exact_gradient is None:
            raise InputError(f"verify: {args.problem}: the problem file needs an [exact] "
                             "section with solution and gradient (the errors are measured "
                             "against them)")
        exact, grad = opts.exact, opts.exact_gradient
        degrees = degrees or [opts.degree]
        method, rtol = opts.method, min(opts.rtol, 1e-10)
        folder = _folder(args.output or opts.folder)
        stem, what = opts.stem, f"{args.problem}"
        cell = spec.mesh.cell_type
    else:
        cell = args.cell or "triangle"
        d = 2 if cell == "triangle" else 3
        n = 2 if args.start_size is None else args.start_size
        if not 1 <= n <= 1000:
            raise InputError(f"verify: --start-size must be 1..1000 cells per axis, got {n}")
        degrees = degrees or [1]
        for k in degrees:
            if k * n < 2:
                raise InputError(
                    f"verify: --start-size {n} gives a first mesh without interior unknowns "
                    f"for P{k} (all its dofs lie on the boundary, where u = 0 is fixed); use "
                    f"--start-size {-(-2 // k)} or more")
        exact, grad, source = _manufactured(d)
        mesh = gk.structured_triangles(n, n) if d == 2 else gk.structured_tetrahedra(n, n, n)
        problem = gk.PoissonProblem(mesh, source=source, dirichlet={"boundary": 0.0})
        folder = _folder(args.output or "galerkit-out")
        stem, what = f"verify-{cell}", "manufactured solution prod sin(pi x_i)"
    tables, results = [], []
    for k in degrees:
        bar = _progress(args, args.levels, f"verify: P{k} levels")
        if not (args.quiet or args.json):
            print(f"verify: P{k}, {args.levels} levels ...", file=sys.stderr, flush=True)

        def progress(msg, bar=bar):
            if bar is not None:
                bar.set_postfix_str(msg)
                bar.update(1)

        try:
            table = gk.convergence_study(problem, args.levels, k, exact, grad, method=method,
                                         rtol=rtol, progress=progress)
        finally:
            if bar is not None:
                bar.close()
        l2, h1 = table.column("eoc_l2")[-1], table.column("eoc_h1")[-1]
        results.append({"degree": k, "rows": table.rows, "eoc_l2": l2, "eoc_h1": h1,
                        "pass_l2": bool(abs(l2 - (k + 1)) <= args.tolerance),
                        "pass_h1": bool(abs(h1 - k) <= args.tolerance)})
        tables.append(table)
    png = plot_convergence(folder / f"{stem}.png", tables,
                           title=f"{', '.join(f'P{k}' for k in degrees)} on {_plural(cell)}")
    csv_path = folder / f"{stem}.csv"
    text = "degree," + tables[0].to_csv().split("\n", 1)[0] + "\n" + "".join(
        "".join(f"{t.degree},{line}\n" for line in t.to_csv().strip().split("\n")[1:])
        for t in tables)
    write_atomically(csv_path, lambda tmp: Path(tmp).write_text(text))
    ok = all(r["pass_l2"] and r["pass_h1"] for r in results)
    if args.json:
        out = {"degrees": results, "plot": str(png), "csv": str(csv_path), "pass": ok,
               "caution": CAUTION}
        if len(results) == 1:  # one degree: its numbers at the top level too
            out.update({k: v for k, v in results[0].items() if k != "degree"})
        _print_json(out)
        return 0 if ok else 1
    say = _Report(args)
    say.head(f"galerkit verify: {what}, {', '.join(f'P{k}' for k in degrees)} on "
             f"{_plural(cell)}")
    for r, table in zip(results, tables):
        k = r["degree"]
        say.result(f"P{k}:")
        say.result(table.to_markdown())
        say.result(f"  L2 order {r['eoc_l2']:.2f} (theory {k + 1}): "
                   f"{'pass' if r['pass_l2'] else 'FAIL'}")
        say.result(f"  H1 order {r['eoc_h1']:.2f} (theory {k}): "
                   f"{'pass' if r['pass_h1'] else 'FAIL'}")
    say.result(f"  wrote {png}")
    say.result(f"  wrote {csv_path}")
    say.caution()
    return 0 if ok else 1


# -- mesh-info ------------------------------------------------------------------------
def tag_overlaps(mesh) -> list:
    """One line per pair of facet tags that share facets (a tag holding the whole
    boundary, such as ``boundary``, is left out: it overlaps every tag)."""
    n = mesh.boundary_facets.shape[0]
    tags = [(k, v) for k, v in mesh.facet_groups.items() if len(v) < n]
    out = []
    for i, (a, fa) in enumerate(tags):
        for b, fb in tags[i + 1:]:
            shared = int(np.intersect1d(fa, fb, assume_unique=True).size)
            if shared:
                out.append(f"tags {a!r} and {b!r} share {shared} facet(s); conditions on "
                           "both must be the same, or the problem is refused")
    return out


#: the quality quantiles ``mesh-info`` shows: (name, probability)
QUALITY_QUANTILES = (("min", 0.0), ("1%", 0.01), ("5%", 0.05), ("50%", 0.5))


def worst_cells(mesh, quality, n) -> list:
    """The ``n`` cells of lowest shape quality, worst first (ties: lower cell id first),
    each as ``{"cell", "quality", "centroid"}``."""
    n = min(max(int(n), 0), mesh.n_cells)
    if n == 0:
        return []
    ids = np.lexsort((np.arange(mesh.n_cells), quality))[:n]
    centroids = mesh.points[mesh.cells[ids]].mean(axis=1)
    return [{"cell": int(c), "quality": float(quality[c]), "centroid": [float(v) for v in x]}
            for c, x in zip(ids, centroids)]


def _mesh_info(args) -> int:
    from galerkit.regions import region_summary

    from ..files import read_mesh

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        mesh = read_mesh(args.file)
    notes = [str(w.message) for w in caught] + tag_overlaps(mesh)
    q = mesh.quality()
    quality = mesh.cell_quality()
    # quantiles by rank: each is the quality of an actual cell (numpy's "lower" method)
    quantiles = {name: float(np.quantile(quality, p, method="lower"))
                 for name, p in QUALITY_QUANTILES}
    worst = worst_cells(mesh, quality, args.worst)
    info = {"file": args.file, "cell_type": mesh.cell_type, "cells": mesh.n_cells,
            "vertices": mesh.n_vertices, "boundary_facets": int(mesh.boundary_facets.shape[0]),
            "reoriented_cells": mesh.n_reoriented,
            "tags": {k: int(len(v)) for k, v in mesh.facet_groups.items()},
            "regions": {name: {"id": i, "cells": n, "volume": vol}
                        for name, i, n, vol in region_summary(mesh)},
            "interfaces": {k: len(v) for k, v in mesh.interfaces.items()},
            "volume": float(mesh.cell_volumes.sum()),
            "min_shape_quality": q.min_shape_quality, "mean_shape_quality": q.mean_shape_quality,
            "quality_quantiles": quantiles, "worst_cells": worst, "warnings": notes}
    if args.json:
        _print_json(info)
        return 0
    say = _Report(args)
    say.result(f"{args.file}: {mesh.n_cells} {_plural(mesh.cell_type)}, {mesh.n_vertices} vertices, "
               f"{info['boundary_facets']} boundary facets, volume {info['volume']:.6g}")
    if mesh.n_reoriented:
        say.result(f"  {mesh.n_reoriented} cells were negatively oriented and re-oriented")
    for k, v in info["tags"].items():
        say.result(f"  tag {k!r}: {v} facets")
    for k, v in info["regions"].items():
        say.result(f"  region {k!r} (id {v['id']}): {v['cells']} cells, volume {v['volume']:.6g}")
    for k, v in info["interfaces"].items():
        say.result(f"  interface {k!r}: {v} interior facets")
    for n in notes:
        say.result(f"  warning: {n}")
    say.result(f"  shape quality min {q.min_shape_quality:.3f}, mean {q.mean_shape_quality:.3f}")
    say.result("  quality quantiles: " + ", ".join(f"{k} {v:.3f}" for k, v in quantiles.items()))
    if worst:
        say.result(f"  the {len(worst)} worst cells (quality, cell id, centroid):")
    for w in worst:
        at = ", ".join(f"{c:.6g}" for c in w["centroid"])
        say.result(f"    {w['quality']:.3f}  cell {w['cell']:>9d}  at ({at})")
    return 0


# -- solve ------------------------------------------------------------------------
def _check_rtol(rtol):
    from galerkit.errors import InputError

    if rtol is not None and not (math.isfinite(rtol) and 0 < rtol < 1):
        raise InputError(f"--rtol must be a number between 0 and 1, got {rtol!r}")


def _apply_overrides(args, opts):
    from galerkit.errors import InputError
    from galerkit.solvers import available_solvers

    _check_rtol(getattr(args, "rtol", None))
    method = getattr(args, "method", None)
    if method is not None and method != "auto" and method not in available_solvers():
        raise InputError(f"--method: unknown solver method {method!r}; available: "
                         f"{', '.join(available_solvers())} (or 'auto')")
    maxiter = getattr(args, "maxiter", None)
    if maxiter is not None and maxiter < 1:
        raise InputError(f"--maxiter must be at least 1, got {maxiter}")
    changes = {}
    for key in ("degree", "method", "rtol", "maxiter"):
        v = getattr(args, key, None)
        if v is not None:
            changes[key] = v
    if getattr(args, "output", None) is not None:
        changes["folder"] = Path(args.output)
    if getattr(args, "plot", False):
        changes["plot"] = True
    if getattr(args, "mesh_overlay", False):
        changes["mesh_overlay"] = True
    if getattr(args, "slice", None):
        from galerkit.sections import parse_plane

        changes["slices"] = [parse_plane(t) for t in args.slice]
    if getattr(args, "isolines", None) is not None:
        if not 0 <= args.isolines <= 100:
            raise InputError(f"--isolines must be 0 to 100, got {args.isolines}")
        changes["isolines"] = args.isolines
    return replace(opts, **changes)


def _errors(sol, opts):
    """Errors against the exact solution of the problem file, or None."""
    from galerkit.functionals import energy_error, h1_seminorm_error, l2_error

    if opts.exact is None:
        return None
    disc = sol.disc
    out = {"l2": l2_error(disc, sol.u, opts.exact),
           "max_at_nodes": float(np.abs(sol.u - disc.interpolate(opts.exact)).max())}
    if opts.exact_gradient is not None:
        out["h1_seminorm"] = h1_seminorm_error(disc, sol.u, opts.exact_gradient)
        out["energy"] = energy_error(disc, sol.u, opts.exact_gradient,
                                     sol.problem.conductivity)
    return out


def _error_line(errors) -> str:
    parts = [f"L2 {errors['l2']:.3e}"]
    if "h1_seminorm" in errors:
        parts += [f"H1 seminorm {errors['h1_seminorm']:.3e}", f"energy {errors['energy']:.3e}"]
    if "max_at_nodes" in errors:
        parts.append(f"max at nodes {errors['max_at_nodes']:.3e}")
    return "  error       " + ", ".join(parts) + " (against [exact])"


def _report_tail(say, opts, lo, hi, errors, written, notes):
    """The field range, errors, files written, notes and the caution of ``solve``."""
    unit = f" {opts.units}" if opts.units else ""
    say.result(f"  {opts.name:<12s}{lo:.6g} .. {hi:.6g}{unit}")
    if errors is not None:
        say.result(_error_line(errors))
    for p in written:
        say.result(f"  wrote       {p}")
    for n in notes:
        say.result(f"  note        {n}")
    say.caution()


def _solve(args) -> int:
    if args.engine == "petsc":
        return _solve_distributed(args)
    if args.petsc_options is not None:
        from galerkit.errors import InputError

        raise InputError("--petsc-options applies to --engine petsc only; add --engine petsc "
                         "(under mpiexec) or remove it")
    from galerkit.errors import InputError
    from ..files import write_solution
    from ..files.plots import plot_field, plot_mesh, plot_slices
    from .problemfile import BOUND_AUTO_TETRAHEDRA, BOUND_AUTO_TETRAHEDRA_PK, load_problem
    from .quantities import (bound_line, error_bound, quantity_lines, solution_quantities,
                             write_probes_csv)

    bar = _progress(args, 4, "solve")

    def step(name):
        if bar is not None:
            bar.set_postfix_str(name)
            bar.update(1)

    t0 = time.perf_counter()
    compile_before = _compile_seconds()
    run = None
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            spec = load_problem(args.problem, stay_in_folder=args.stay_in_folder)
        problem, opts = spec.build()
        opts = _apply_overrides(args, opts)
        if opts.adapt is not None and opts.degree != 1 and problem.mesh.dim == 3:
            raise InputError(f"--degree {opts.degree}: the problem file {str(args.problem)!r} "
                             "has an [adapt] section on tetrahedra, and adaptive refinement "
                             "there runs on P1; drop --degree or the [adapt] section")
        notes = [str(w.message) for w in caught] + tag_overlaps(spec.mesh)
        load_seconds = time.perf_counter() - t0
        step("assemble and solve" if opts.adapt is None else "adaptive levels")
        loop_compile = _compile_seconds()
        t1 = time.perf_counter()
        try:
            if opts.adapt is None:
                sol = problem.solve(degree=opts.degree, method=opts.method, rtol=opts.rtol,
                                    maxiter=opts.maxiter)
            else:
                run = _adapt(problem, opts)
                sol = run.solution
        except InputError as exc:  # e.g. a formula that is not finite somewhere
            raise InputError(f"problem file {str(args.problem)!r}: {exc}") from None
        loop_seconds = time.perf_counter() - t1
        loop_compile = _compile_seconds() - loop_compile
        step("errors")
        t1 = time.perf_counter()
        errors = _errors(sol, opts)
        error_seconds = time.perf_counter() - t1
        rep = sol.report
        t1 = time.perf_counter()
        energy = None if errors is None else errors.get("energy")
        if run is not None:
            est, bound = error_bound(sol, run.estimates[-1], energy)
        elif rep.converged and opts.error_bound == "off":
            est, bound = None, {"available": False,
                                "reason": "not computed ([output] error_bound = false)"}
        elif (rep.converged and opts.error_bound == "auto" and sol.mesh.dim == 3
              and sol.mesh.n_cells > (limit := BOUND_AUTO_TETRAHEDRA if sol.disc.degree == 1
                                      else BOUND_AUTO_TETRAHEDRA_PK)):
            est, bound = None, {"available": False, "reason": (
                f"not computed for {sol.mesh.n_cells:,} tetrahedra by default (above "
                f"{limit:,} it costs more than the solve"
                f"{'' if sol.disc.degree == 1 else f' for P{sol.disc.degree}'}); set "
                "[output] error_bound = true to compute it")}
        elif rep.converged:
            try:
                est, bound = error_bound(sol, None, energy)
            except InputError as exc:
                raise InputError(f"problem file {str(args.problem)!r}: {exc}") from None
        else:
            est, bound = None, {"available": False,
                                "reason": "not computed: the solver did not converge"}
        estimate_seconds = time.perf_counter() - t1
        step("write")
        outputs = []
        quantities = None
        t1 = time.perf_counter()
        if not rep.converged:
            notes.append("no files written and no fluxes: the solver did not converge")
        else:
            if opts.vtu or opts.plot:
                folder = _folder(opts.folder)
            cell_arrays = {}
            if est is not None:
                cell_arrays["error_indicator"] = lambda pc: est.indicators[pc]
            if run is not None:
                cell_arrays["refinement_level"] = lambda pc: run.cell_levels[pc]
            if opts.vtu:
                outputs.append(write_solution(folder / f"{opts.stem}.vtu", sol, name=opts.name,
                                              extra_cell_data=cell_arrays))
            if run is not None and spec.mesh.dim == 2 and (opts.vtu or opts.plot):
                outputs.append(plot_mesh(
                    folder / f"{opts.stem}-mesh.png", sol.mesh, run.cell_levels,
                    title=f"{opts.title or opts.stem}: final mesh, {sol.mesh.n_cells} "
                    f"triangles after {len(run.table.rows)} levels",
                    length_unit=opts.length_unit))
            if opts.plot and spec.mesh.dim == 2:
                label = opts.name + (f" [{opts.units}]" if opts.units else "")
                outputs.append(plot_field(folder / f"{opts.stem}.png", sol,
                                          title=opts.title or opts.stem, units=label,
                                          show_mesh=opts.mesh_overlay,
                                          length_unit=opts.length_unit,
                                          isolines=opts.isolines))
            elif opts.plot:
                outputs += plot_slices(folder / f"{opts.stem}.png", sol, opts.slices,
                                       title=opts.title or opts.stem, units=opts.units,
                                       name=opts.name, length_unit=opts.length_unit)
            quantities = solution_quantities(sol, opts)
            if quantities["probes"]:
                outputs.append(write_probes_csv(_folder(opts.folder) / f"{opts.stem}-probes.csv",
                                                quantities, opts))
        write_seconds = time.perf_counter() - t1
        step("done")
    finally:
        if bar is not None:
            bar.close()
    mesh = sol.mesh
    if run is None:
        phases = {"load": load_seconds, **sol.seconds, "errors": error_seconds,
                  "estimate": estimate_seconds, "write": write_seconds}
    else:
        phases = {"load": load_seconds, "levels": max(0.0, loop_seconds - loop_compile),
                  "errors": error_seconds, "write": write_seconds, "compile": loop_compile}
    seconds = _with_compile(phases, compile_before)
    seconds["total"] = time.perf_counter() - t0
    notes += list(sol.notes) + (bound.get("notes") or [])
    if rep.message:
        notes.append(rep.message)
    if run is not None:
        notes += _adapt_notes(run, opts.adapt)
    chosen = rep.method if opts.method != "auto" else f"{rep.method} (chosen by 'auto')"
    info = {
        "problem": str(args.problem), "title": opts.title,
        "mesh": {"source": spec.mesh_description, "cell_type": mesh.cell_type,
                 "cells": mesh.n_cells, "vertices": mesh.n_vertices,
                 "tags": {k: int(len(v)) for k, v in mesh.facet_groups.items()}},
        "degree": sol.disc.degree, "dofs": sol.disc.n_dofs,
        "solver": {"requested": opts.method, "method": rep.method,
                   "iterations": rep.iterations, "relative_residual": rep.final_residual,
                   "rtol": opts.rtol, "converged": rep.converged, "message": rep.message},
        "seconds": seconds, "peak_rss_mb": _peak_rss_mb(),
        "field": {"name": opts.name, "min": float(sol.u.min()), "max": float(sol.u.max()),
                  "units": opts.units},
        "errors": errors, "error_bound": bound,
        "outputs": [str(p) for p in outputs], "notes": notes,
        "regions": {n: i for n, i in mesh.region_names.items()},
    }
    if run is not None:
        info["adapt"] = {"settings": opts.adapt, "stopped": run.stopped,
                         "levels": run.table.rows}
    if quantities is not None:
        info.update(quantities)
    code = 0 if rep.converged else 1
    if args.json:
        _print_json({**info, "caution": CAUTION})
        return code
    say = _Report(args)
    say.head(f"galerkit solve: {opts.title or args.problem}")
    if run is not None:
        say.result(f"  initial     {spec.mesh_description}: {spec.mesh.n_cells} "
                   f"{_plural(mesh.cell_type)}, {spec.mesh.n_vertices} vertices")
        say.result(f"  adaptive    {len(run.table.rows)} levels (solve, bound, Doerfler "
                   f"marking {opts.adapt['bulk']:g}, bisection); stopped: "
                   f"{_STOPPED[run.stopped](opts.adapt)}")
        say.result(run.table.to_markdown())
        say.result(f"  final mesh  {mesh.n_cells} {_plural(mesh.cell_type)}, "
                   f"{mesh.n_vertices} vertices")
    else:
        say.result(f"  mesh        {spec.mesh_description}: {mesh.n_cells} "
                   f"{_plural(mesh.cell_type)}, {mesh.n_vertices} vertices")
    say.result(f"  unknowns    {sol.disc.n_dofs} (P{sol.disc.degree})")
    status = "converged" if rep.converged else "NOT CONVERGED"
    say.result(f"  solver      {chosen}: {_iterations(rep.iterations)}, relative residual "
               f"{rep.final_residual:.2e} (rtol {opts.rtol:g}), {status}")
    _seconds_lines(say, seconds)
    say.result(f"  peak memory {info['peak_rss_mb']:.0f} MB (peak resident set size)")
    if quantities is not None:
        for line in quantity_lines(quantities, opts):
            say.result(line)
    say.result(bound_line(bound))
    _report_tail(say, opts, info["field"]["min"], info["field"]["max"], errors,
                 [str(p) for p in outputs], notes)
    return code


#: why an adaptive run stopped, for the report
_STOPPED = {
    "tol": lambda a: f"the bound reached tol = {a['tol']:g}",
    "relative_tol": lambda a: f"the bound reached relative_tol = {a['relative_tol']:g} of the "
                              "energy norm",
    "max_dofs": lambda a: f"the next mesh would pass max_dofs = {a['max_dofs']}",
    "max_levels": lambda a: f"max_levels = {a['max_levels']} levels done",
}


def _adapt(problem, opts):
    """The adaptive loop of ``[adapt]`` (only the last level's solution is kept)."""
    import galerkit as gk
    from galerkit.errors import InputError, UnsupportedError

    try:
        return gk.adapt(problem, degree=opts.degree, method=opts.method, rtol=opts.rtol,
                        maxiter=opts.maxiter, exact_gradient=opts.exact_gradient, keep="last", **opts.adapt)
    except UnsupportedError as exc:
        raise InputError(f"[adapt]: {exc}; or remove the [adapt] section") from None


def _adapt_notes(run, settings):
    """A note when a tolerance was asked for and a budget stopped the run first."""
    asked = [k for k in ("tol", "relative_tol") if k in settings]
    if not asked or run.stopped in asked:
        return []
    return [f"the tolerance ({', '.join(f'{k} = {settings[k]:g}' for k in asked)}) was not "
            f"reached: {_STOPPED[run.stopped](settings)}; raise adapt.max_dofs or "
            "adapt.max_levels to go further"]


def _solve_distributed(args) -> int:
    """``solve --engine petsc``: every rank runs this; rank 0 alone prints."""
    import os

    from galerkit.errors import InputError
    from ..distributed.petsc_engine import _modules, _on_root, solve_distributed, write_pieces
    from .problemfile import load_problem

    MPI, _ = _modules()
    comm = MPI.COMM_WORLD
    if comm.rank != 0:  # the same errors are raised on every rank; rank 0 reports them
        sys.stdout = open(os.devnull, "w")
        sys.stderr = sys.stdout
    t0 = time.perf_counter()
    held = {}

    def load():
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            spec = load_problem(args.problem, stay_in_folder=args.stay_in_folder)
        problem, opts = spec.build()
        opts = _apply_overrides(args, opts)
        held["problem"] = problem
        return (opts, spec.mesh_description,
                [str(w.message) for w in caught] + tag_overlaps(spec.mesh))

    opts, description, notes = _on_root(comm, load)
    load_seconds = time.perf_counter() - t0
    if opts.method != "auto":
        notes.append(f"method {opts.method!r} names a serial solver and is not used by the "
                     "petsc engine; choose PETSc's with --petsc-options \"-ksp_type ... "
                     "-pc_type ...\"")
    try:
        sol = solve_distributed(None, load=lambda: held.pop("problem"), degree=opts.degree,
                                rtol=opts.rtol,
                                maxiter=opts.maxiter, petsc_options=args.petsc_options,
                                exact=opts.exact, exact_gradient=opts.exact_gradient)
    except InputError as exc:
        raise InputError(f"problem file {str(args.problem)!r}: {exc}") from None
    rep = sol.report
    notes += sol.notes
    outputs = []
    t1 = time.perf_counter()
    if not rep["converged"]:
        notes.append("no files written: the solver did not converge")
    elif opts.vtu:
        folder = _folder(opts.folder)
        comm.barrier()
        outputs.append(write_pieces(folder, opts.stem, sol, name=opts.name))
    if opts.plot:
        notes.append("plot skipped with the petsc engine: open the .pvtu file in a viewer "
                     "such as ParaView")
    write_seconds = comm.allreduce(time.perf_counter() - t1, op=MPI.MAX)
    lo, hi = sol.field_range()
    seconds = {"load": load_seconds, **sol.seconds, "write": write_seconds}
    seconds["total"] = time.perf_counter() - t0
    errors = sol.errors
    info = {
        "problem": str(args.problem), "title": opts.title, "engine": "petsc",
        "ranks": sol.size,
        "mesh": {"source": description, "cells": sol.n_cells, "vertices": sol.n_vertices},
        "degree": opts.degree, "dofs": sol.n_dofs, "rows": sol.n_global,
        "partition": sol.partition,
        "solver": {**rep},
        "seconds": seconds, "peak_rss_mb_per_rank": sol.peak_rss_mb,
        "field": {"name": opts.name, "min": lo, "max": hi, "units": opts.units},
        "errors": errors, "outputs": [str(p) for p in outputs], "notes": notes,
    }
    code = 0 if rep["converged"] else 1
    if args.json:
        _print_json({**info, "caution": CAUTION})
        return code
    say = _Report(args)
    say.head(f"galerkit solve (petsc engine, {sol.size} rank{'s' if sol.size > 1 else ''}): "
             f"{opts.title or args.problem}")
    say.result(f"  mesh        {description}: {sol.n_cells} "
               f"{_plural('triangle' if sol.disc.mesh.dim == 2 else 'tetrahedron')}, "
               f"{sol.n_vertices} vertices")
    say.result(f"  unknowns    {sol.n_dofs} (P{opts.degree}), {sol.n_global} distributed rows "
               "after Dirichlet elimination")
    if sol.partition:
        q = sol.partition
        say.result(f"  partition   coordinate bisection: cell balance {q['cell_balance']:.3f}, "
                   f"dof balance {q['dof_balance']:.3f}, at most {q['ghosts_max']} ghost "
                   "dofs per rank")
    status = "converged" if rep["converged"] else "NOT CONVERGED"
    say.result(f"  solver      PETSc {rep['ksp']} + {rep['pc']}: "
               f"{_iterations(rep['iterations'])}, relative residual {rep['residual']:.2e} "
               f"(true {rep['true_residual']:.2e}, rtol {opts.rtol:g}), {status} "
               f"({rep['reason']})")
    say.result("  seconds     per phase, on the slowest rank:")
    for k, v in seconds.items():
        say.result(f"    {k:<14s}{v:8.3f} s")
    say.result("  peak memory " + ", ".join(f"{m:.0f}" for m in sol.peak_rss_mb)
               + " MB per rank (peak resident set size)")
    pieces = f" (+ {sol.size} piece{'s' if sol.size > 1 else ''})"
    _report_tail(say, opts, lo, hi, errors, [f"{p}{pieces}" for p in outputs], notes)
    return code


# -- bench ------------------------------------------------------------------------
def _int_list(text, flag):
    from galerkit.errors import InputError

    try:
        out = [int(v) for v in text.split(",") if v.strip()]
    except ValueError:
        raise InputError(f"{flag}: give comma-separated integers, got {text!r}") from None
    if not out:
        raise InputError(f"{flag}: the list is empty")
    return out


def _bench(args) -> int:
    from galerkit.errors import InputError
    from .bench import BENCH_MEMORY_MEASURE, bench

    if args.generate is None and (args.size is not None or args.sizes is not None):
        raise InputError("bench: --size and --sizes apply to --generate only; the problem "
                         "file gives its own mesh")
    if args.size is not None and args.sizes is not None:
        raise InputError("bench: give --size or --sizes, not both")
    sizes = None
    if args.sizes is not None:
        sizes = _int_list(args.sizes, "--sizes")
    elif args.size is not None:
        sizes = [args.size]
    methods = None
    if args.methods is not None:
        methods = [m.strip() for m in args.methods.split(",") if m.strip()]
        if not methods:
            raise InputError("bench: --methods is empty; give names such as direct,cg-amg")
    modules = [m.strip() for m in (args.solvers_module or []) if m.strip()]
    _check_rtol(args.rtol)

    def progress(msg):
        if not (args.quiet or args.json):
            print(printable(msg), file=sys.stderr, flush=True)

    table = bench(args.problem, generate=args.generate, sizes=sizes, degree=args.degree,
                  methods=methods, rtol=args.rtol, maxiter=args.maxiter, repeat=args.repeat,
                  budget_seconds=args.budget_seconds, budget_mb=args.budget_mb,
                  solvers_module=modules, stay_in_folder=args.stay_in_folder,
                  progress=progress)
    if args.generate is not None:
        stem, where = f"bench-{args.generate}", f"generated {args.generate}"
    else:
        stem, where = Path(args.problem).stem, str(args.problem)
    folder = _folder(args.output or "galerkit-out")
    outputs = [table.plot_residuals(folder / f"{stem}-residuals.png",
                                    title=f"{where}: residual histories")]
    if len({r["unknowns"] for r in table.rows}) > 1:
        outputs.append(table.plot(folder / f"{stem}-times.png",
                                  title=f"{where}: time against unknowns"))
    csv_path = folder / f"{stem}-bench.csv"
    from ..files import write_atomically

    write_atomically(csv_path, lambda tmp: Path(tmp).write_text(table.to_csv()))
    outputs.append(csv_path)
    ok = table.all_converged
    if args.json:
        _print_json({"problem": where, "rows": table.rows, "skipped": table.skipped,
                     "repeat": args.repeat, "memory_measure": BENCH_MEMORY_MEASURE,
                     "outputs": [str(o) for o in outputs], "all_converged": ok,
                     "caution": CAUTION})
        return 0 if ok else 1
    say = _Report(args)
    say.head(f"galerkit bench: {where}, {args.repeat} run(s) per method, each in its own process")
    cols = ["unknowns", "method", "setup_min", "setup_median", "solve_min", "solve_median",
            "iterations", "final_residual", "peak_mb", "estimate_seconds", "estimate_mb",
            "l2_error", "h1_error", "converged"]
    say.result(table.to_markdown(cols))
    for r in table.rows:
        if r["message"]:
            say.result(f"  {r['method']}: {r['message']}")
    say.head(f"  peak_mb: {BENCH_MEMORY_MEASURE}; estimates come from a pilot run on a "
             "patch of the system (docs/bench.md)")
    for o in outputs:
        say.result(f"  wrote       {o}")
    say.caution()
    return 0 if ok else 1


# -- compilation ---------------------------------------------------------------------
def _compile_seconds() -> float:
    from galerkit.compilation import compile_seconds

    return compile_seconds()


def _with_compile(seconds, compile_before):
    """Phase seconds with every kernel compilation of this command taken out.

    ``seconds`` may already hold a ``compile`` entry (the driver's phases);
    compilation outside them (generating or reading the mesh, error norms,
    writing) is taken out of the first phase, where first-use compiles
    happen (loading or generating the mesh).  ``compile`` comes last, and only
    when something compiled.
    """
    out = {k: v for k, v in seconds.items() if k != "compile"}
    inside = float(seconds.get("compile", 0.0))
    outside = max(0.0, _compile_seconds() - compile_before - inside)
    if out and outside > 0.0:
        first = next(iter(out))
        out[first] = max(0.0, out[first] - outside)
    total = inside + outside
    if total > 0.0:
        out["compile"] = total
    return out


def _seconds_lines(say, seconds):
    for k, v in seconds.items():
        if k == "compile":
            say.result(f"  {k:<12s}{v:8.3f} s  (first run only: kernels compiled once and "
                       "cached; `galerkit warm-up` does it ahead)")
        else:
            say.result(f"  {k:<12s}{v:8.3f} s")


def _announce_compiling(args):
    """One line on stderr when the first kernel compilation of this run starts."""
    from galerkit.compilation import cache_folder, on_first_compile, start_compile_ahead

    command = getattr(args, "command", "")
    if command == "warm-up":
        return
    quiet = getattr(args, "quiet", False)

    def say():
        # demo and solve: the solver's kernels compile alongside, in a second process
        two = command in ("demo", "solve") and start_compile_ahead()
        if quiet:
            return
        print("galerkit: compiling kernels for their first use (once: later runs load them "
              f"from the cache in {cache_folder()}"
              + ("; the solver's in a second process" if two else "") + ") ...",
              file=sys.stderr, flush=True)

    on_first_compile(say)


def _warm(args) -> int:
    """Compile (or load) the common kernels now, so that later runs start warm."""
    import tempfile

    import galerkit as gk
    from galerkit.compilation import cache_folder, compile_count, compile_seconds
    from ..files import write_solution

    t0 = time.perf_counter()
    c0, n0 = compile_seconds(), compile_count()
    say = _Report(args)
    say.head(f"galerkit warm-up: compiling the common kernels into {cache_folder()}")
    runs = []
    # the last mesh of each dimension has more unknowns than cg-amg's coarsest
    # level (400), so its aggregation and Galerkin kernels are compiled too
    for dim, degrees in ((2, (1, 2, 3)), (3, (1, 2)), (2, (1,)), (3, (1,))):
        if len(degrees) == 1:
            mesh = gk.structured_triangles(32, 32) if dim == 2 else gk.structured_tetrahedra(10, 10, 10)
        else:
            mesh = gk.structured_triangles(6, 5) if dim == 2 else gk.structured_tetrahedra(3, 3, 2)
            mesh = gk.refine_uniform(mesh)
        for degree in degrees:
            for method in (("auto", "cg-amg") if len(degrees) > 1 else ("cg-amg",)):
                t = time.perf_counter()
                problem = gk.PoissonProblem(mesh, conductivity=lambda x: 1.0 + x[0] ** 2,
                                            source=lambda x: 1.0 + x[0] * x[1],
                                            dirichlet={"xmin": 0.0}, neumann={"ymax": 1.0},
                                            robin={"xmax": (2.0, 1.0)})
                sol = problem.solve(degree=degree, method=method, rtol=1e-8)
                gk.l2_error(sol.disc, sol.u, lambda x: 0 * x[0])
                gk.h1_seminorm_error(sol.disc, sol.u, lambda x: 0 * x)
                runs.append({"dim": dim, "degree": degree, "method": sol.report.method,
                             "seconds": round(time.perf_counter() - t, 3)})
                say.head(f"  {dim}D P{degree} {sol.report.method:<10s}"
                         f"{runs[-1]['seconds']:8.2f} s")
    with tempfile.TemporaryDirectory() as tmp:
        write_solution(Path(tmp) / "warm.vtu", sol)
    info = {"cache_folder": cache_folder(), "compiled": compile_count() - n0,
            "compile_seconds": round(compile_seconds() - c0, 3),
            "seconds": round(time.perf_counter() - t0, 3), "runs": runs}
    if args.json:
        _print_json(info)
        return 0
    say.result(f"  compiled    {info['compiled']} kernel signatures in "
               f"{info['compile_seconds']:.1f} s (0 when the cache was already warm)")
    say.result(f"  cache       {info['cache_folder']}")
    say.result(f"  total       {info['seconds']:.1f} s")
    return 0


# -- parser ------------------------------------------------------------------------
STAY_IN_FOLDER_HELP = ("refuse a problem file whose [mesh] file or [output] folder lies "
                       "outside the problem file's folder (after links and '..'): for "
                       "services that run problem files they do not trust; --output given "
                       "here is not checked")


def build_parser() -> argparse.ArgumentParser:
    p = _Parser(prog="galerkit", description="Lagrange finite elements for "
                                "Poisson and diffusion problems on triangles and tetrahedra.")
    p.add_argument("--quiet", action="store_true",
                   help="no progress bars or headings: print the results only")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    # the same two flags are accepted after the subcommand too
    common = _Parser(add_help=False)
    common.add_argument("--quiet", action="store_true", default=argparse.SUPPRESS,
                        help="no progress bars or headings: print the results only")
    common.add_argument("--json", action="store_true", default=argparse.SUPPRESS,
                        help="print one JSON object")
    sub = p.add_subparsers(dest="command", required=True)
    d = sub.add_parser("demo", parents=[common],
                       help="built-in cooling-plate scenario; writes VTU and PNG")
    d.add_argument("--output", default="galerkit-out", help="folder for the results")
    d.add_argument("--size", type=int, default=600, help="squares along x (default 600)")
    d.add_argument("--method", default="auto", help="solver name (default auto)")
    d.set_defaults(run=_demo)
    v = sub.add_parser("verify", parents=[common],
                       help="convergence study against an exact solution, several degrees",
                       description="Solve on uniformly refined meshes, tabulate the L2, H1 "
                       "and energy errors with their observed orders, check them against "
                       "the a priori orders k+1 (L2) and k (H1), and plot every degree on "
                       "one picture. Without a problem file: the manufactured solution "
                       "u = prod sin(pi x_i) on the unit square or cube.")
    v.add_argument("problem", nargs="?",
                   help="a problem file (.toml) with an [exact] section (solution and "
                   "gradient); its mesh is the coarsest level (default: the manufactured "
                   "problem)")
    v.add_argument("--cell", choices=["triangle", "tetrahedron"], default=None,
                   help="cells of the manufactured problem (default triangle)")
    v.add_argument("--degrees", default=None, metavar="K,K,...",
                   help="element degrees, comma-separated, e.g. 1,2,3,4 (default 1, or the "
                   "problem file's degree)")
    v.add_argument("--levels", type=int, default=5,
                   help="number of meshes: the coarsest and L-1 uniform refinements "
                   "(default 5)")
    v.add_argument("--start-size", type=int, default=None, metavar="N",
                   help="cells per axis of the first (coarsest) mesh of the manufactured "
                   "problem (default 2)")
    v.add_argument("--tolerance", type=float, default=0.1,
                   help="allowed deviation of the last observed order from the a priori "
                   "order (default 0.1)")
    v.add_argument("--output", default=None, metavar="DIR",
                   help="folder for the plot and the CSV table (default: the problem "
                   "file's [output] folder, else galerkit-out)")
    v.add_argument("--stay-in-folder", action="store_true", help=STAY_IN_FOLDER_HELP)
    v.set_defaults(run=_verify)
    m = sub.add_parser("mesh-info", parents=[common],
                       help="counts, tags and quality of a mesh file")
    m.add_argument("file", help="the mesh file (any format meshio reads, e.g. .msh, .vtu)")
    m.add_argument("--worst", type=int, default=5, metavar="N",
                   help="list the N cells of lowest shape quality with their ids and "
                        "centroids (default 5; 0 lists none)")
    m.set_defaults(run=_mesh_info)
    s = sub.add_parser("solve", parents=[common],
                       help="solve a problem file (TOML); writes VTU and, with --plot, PNG",
                       description="Solve the problem of a TOML problem file (see "
                       "docs/problem-files.md). Flags override the file.")
    s.add_argument("problem", help="the problem file (.toml)")
    s.add_argument("--degree", type=int, choices=[1, 2, 3, 4], help="element degree")
    s.add_argument("--method", help="solver name, or auto")
    s.add_argument("--rtol", type=float, help="relative residual tolerance")
    s.add_argument("--maxiter", type=int, help="iteration limit of iterative solvers")
    s.add_argument("--output", help="output folder (default: [output] folder, else "
                   "galerkit-out)")
    s.add_argument("--plot", action="store_true",
                   help="also write PNG pictures (2D: the field; 3D: slices)")
    s.add_argument("--slice", action="append", metavar="AXIS=VALUE",
                   help="a slice plane of the 3D pictures, e.g. x=0.5 (repeatable; default "
                        "the three mid-planes)")
    s.add_argument("--isolines", type=int, metavar="N", help="contour lines on the 2D picture")
    s.add_argument("--mesh-overlay", action="store_true", help="draw the mesh on the PNG")
    s.add_argument("--engine", choices=["serial", "petsc"], default="serial",
                   help="serial (default), or petsc: the distributed engine, run under "
                   "`mpiexec -n N` (needs `make mpi`); writes one VTU piece per rank and a "
                   ".pvtu index")
    s.add_argument("--petsc-options", metavar="OPTIONS",
                   help="PETSc options for --engine petsc, e.g. \"-ksp_type gmres -pc_type "
                   "jacobi\" (default: CG with PETSc's algebraic multigrid GAMG)")
    s.add_argument("--stay-in-folder", action="store_true", help=STAY_IN_FOLDER_HELP)
    s.set_defaults(run=_solve)
    b = sub.add_parser("bench", parents=[common],
                       help="compare solvers on one assembled system (estimates, budgets, "
                       "repeats)",
                       description="Assemble one system, estimate each registered solver's "
                       "time and memory from a pilot run, skip those over budget (unless "
                       "named in --methods), then run each method --repeat times, each run "
                       "in its own process; prints a table (minimum and median times, peak "
                       "memory, errors) and writes PNG plots and a CSV table "
                       "(docs/bench.md).")
    b.add_argument("problem", nargs="?", help="a problem file (.toml); or use --generate")
    b.add_argument("--generate", choices=["square", "box"],
                   help="a manufactured problem u = prod sin(pi x_i) on the unit square/cube")
    b.add_argument("--size", type=int, help="cells per axis for --generate (default 64 "
                   "square, 10 box)")
    b.add_argument("--sizes", metavar="N,N,...",
                   help="several cells-per-axis counts for --generate: a time-against-"
                   "unknowns study and plot, one line per method")
    b.add_argument("--degree", type=int, choices=[1, 2, 3, 4], help="element degree")
    b.add_argument("--methods", help="comma-separated solver names; these run even over "
                   "budget (default: every registered solver within the budgets)")
    b.add_argument("--repeat", type=int, default=1, metavar="N",
                   help="runs per method, each in a fresh process; the table gives the "
                   "minimum and the median (default 1)")
    b.add_argument("--budget-seconds", type=float, default=None, metavar="S",
                   help="skip a method whose estimated seconds per run exceed S (default 60)")
    b.add_argument("--budget-mb", type=float, default=None, metavar="MB",
                   help="skip a method whose estimated memory exceeds MB (default: half "
                   "the available memory)")
    b.add_argument("--solvers-module", action="append", metavar="MODULE",
                   help="import MODULE (repeatable), which registers solvers with "
                   "galerkit.register_solver; entry points of the group "
                   "'galerkit.solvers' are loaded too")
    b.add_argument("--rtol", type=float, help="relative residual tolerance")
    b.add_argument("--maxiter", type=int, help="iteration limit of iterative solvers")
    b.add_argument("--output", help="folder for the plots and the CSV (default galerkit-out)")
    b.add_argument("--stay-in-folder", action="store_true", help=STAY_IN_FOLDER_HELP)
    b.set_defaults(run=_bench)
    w = sub.add_parser("warm-up", parents=[common],
                       help="compile the common kernels ahead of time (once per install)",
                       description="Compile (or load from the cache) the kernels of common "
                       "runs: 2D P1-P3 and 3D P1-P2 solves with every kind of condition, "
                       "both default solvers, error norms and a VTU write. Prints where the "
                       "cache lives (GALERKIT_CACHE_DIR moves it).")
    w.set_defaults(run=_warm)
    return p


class _UsageError(Exception):
    """A command-line usage error (raised instead of argparse's exit)."""


class _Parser(argparse.ArgumentParser):
    def error(self, message):
        raise _UsageError(f"{self.prog}: {message} (see {self.prog} --help)")


#: the ``"error"`` field of the JSON error object, by what went wrong
ERROR_KINDS = {
    "usage": "bad command line",
    "input": "bad input",
    "memory": "not enough memory",
    "solver": "solver failure",
}


def main(argv=None) -> int:
    from galerkit.errors import InputError, ResourceError, SolverError

    argv = sys.argv[1:] if argv is None else list(argv)
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except _UsageError as exc:
        return _fail(argparse.Namespace(json="--json" in argv), "usage", exc, 2)
    _announce_compiling(args)
    try:
        return args.run(args)
    except BrokenPipeError:  # e.g. `galerkit mesh-info f.msh | head`
        import os

        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0
    except InputError as exc:
        return _fail(args, "input", exc, 2)
    except ResourceError as exc:
        # the problem as given does not fit this machine: the input must change
        return _fail(args, "memory", exc, 2)
    except MemoryError:
        return _fail(args, "memory", ResourceError(
            f"galerkit {args.command}: ran out of memory; the problem is too large for this "
            "machine: use a coarser mesh, fewer refinements, a smaller size or a lower "
            "degree"), 2)
    except RecursionError:
        return _fail(args, "input", InputError(
            f"galerkit {args.command}: the input is nested too deeply to read (deeply "
            "nested TOML arrays or tables, or a formula); flatten it"), 2)
    except SolverError as exc:
        return _fail(args, "solver", exc, 1)


def _fail(args, kind, exc, code):
    """Report an error as one line on stderr, and as one JSON object on stdout with --json."""
    label = {"usage": "usage error", "input": "error", "memory": "not enough memory",
             "solver": "solver error"}[kind]
    message = printable(" ".join(str(exc).split()) if kind == "usage" else str(exc))
    print(f"galerkit: {label}: {message}", file=sys.stderr)
    if getattr(args, "json", False):
        print(json.dumps({"error": ERROR_KINDS[kind], "message": message,
                          "exception": type(exc).__name__ if kind != "usage" else "UsageError",
                          "exit_code": code}))
    return code


if __name__ == "__main__":
    sys.exit(main())
