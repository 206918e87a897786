"""The ``galerkit`` command line.

Subcommands: ``demo`` (a built-in scenario), ``verify`` (a manufactured-
solution convergence study) and ``mesh-info`` (counts, tags and quality of a
mesh file).  Exit codes: 0 success, 1 a solver did not converge or a check
failed, 2 bad input.
"""

from __future__ import annotations

import argparse
import json
import resource
import sys
import time
from pathlib import Path

import numpy as np

CAUTION = (
    "Caution: these results are numerical approximations. Verify them (mesh convergence, "
    "independent checks) before use; engineering decisions rest with qualified engineers "
    "under the applicable local codes and standards."
)


def _peak_rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def _say(args, text=""):
    if not args.quiet:
        print(text)


# -- demo ------------------------------------------------------------------------
def _demo(args) -> int:
    """Steady temperature in a battery-pack cooling plate (a scenario of our own).

    An aluminium plate 0.30 m x 0.20 m carries six cells that each dissipate
    heat into it; the bottom edge is cooled by a coolant channel (convective,
    Robin), the other edges are insulated.  All numbers are invented for the
    demonstration.
    """
    import galerkit as gk
    from .files import write_solution
    from .plots import plot_field

    out = Path(args.output)
    out.mkdir(parents=True, exist_ok=True)
    nx, ny = args.size, (2 * args.size) // 3
    mesh = gk.structured_triangles(nx, ny, (0.0, 0.0), (0.30, 0.20))
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
                                robin={"bottom": (h_coolant, t_coolant)})
    t0 = time.perf_counter()
    sol = problem.solve(degree=1, method=args.method, rtol=1e-10)
    total = time.perf_counter() - t0
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
        "seconds": {**{k: round(v, 3) for k, v in sol.seconds.items()}, "total": round(total, 3)},
        "peak_rss_mb": round(_peak_rss_mb(), 1),
        "temperature_min": float(sol.u.min()),
        "temperature_max": float(sol.u.max()),
        "outputs": [str(vtu), str(png)],
    }
    if args.json:
        print(json.dumps({**info, "caution": CAUTION}))
    else:
        _say(args, "galerkit demo: steady temperature in a battery-pack cooling plate")
        _say(args, f"  mesh        {mesh.n_cells} triangles, {mesh.n_vertices} vertices")
        _say(args, f"  unknowns    {sol.disc.n_dofs} (P1)")
        _say(args, f"  solver      {rep.method}: {rep.iterations} iterations, relative residual "
                   f"{rep.final_residual:.2e}, converged={rep.converged}")
        for k, v in info["seconds"].items():
            _say(args, f"  {k:<12s}{v:8.3f} s")
        _say(args, f"  peak memory {info['peak_rss_mb']:.0f} MB")
        _say(args, f"  temperature {info['temperature_min']:.2f} .. {info['temperature_max']:.2f} deg C")
        _say(args, f"  wrote       {vtu}")
        _say(args, f"  wrote       {png}")
        _say(args)
        _say(args, CAUTION)
    return 0 if rep.converged else 1


# -- verify ------------------------------------------------------------------------
def _verify(args) -> int:
    import galerkit as gk
    from .plots import plot_convergence

    pi = np.pi
    d = 2 if args.cell == "triangle" else 3
    k = args.degree

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

    mesh = gk.structured_triangles(2, 2) if d == 2 else gk.structured_tetrahedra(1, 1, 1)
    problem = gk.PoissonProblem(mesh, source=source, dirichlet={"boundary": 0.0})
    progress = None if args.quiet else (lambda msg: print("  " + msg, file=sys.stderr))
    table = gk.convergence_study(problem, args.levels, k, exact, grad, progress=progress)
    l2 = table.column("eoc_l2")[-1]
    h1 = table.column("eoc_h1")[-1]
    ok_l2 = abs(l2 - (k + 1)) <= args.tolerance
    ok_h1 = abs(h1 - k) <= args.tolerance
    png = Path(args.output)
    plot_convergence(png, table, title=f"P{k} on {args.cell}s: u = prod sin(pi x_i)")
    if args.json:
        print(json.dumps({"rows": table.rows, "eoc_l2": l2, "eoc_h1": h1, "pass_l2": ok_l2,
                          "pass_h1": ok_h1, "plot": str(png), "caution": CAUTION}))
    else:
        _say(args, f"galerkit verify: manufactured solution prod sin(pi x_i), P{k} on {args.cell}s")
        _say(args, table.to_markdown())
        _say(args, f"  L2 order {l2:.2f} (theory {k + 1}): {'pass' if ok_l2 else 'FAIL'}")
        _say(args, f"  H1 order {h1:.2f} (theory {k}): {'pass' if ok_h1 else 'FAIL'}")
        _say(args, f"  wrote {png}")
        _say(args)
        _say(args, CAUTION)
    return 0 if (ok_l2 and ok_h1) else 1


# -- mesh-info ------------------------------------------------------------------------
def _mesh_info(args) -> int:
    from .files import read_mesh

    mesh = read_mesh(args.file)
    q = mesh.quality()
    hist, edges = np.histogram(mesh.cell_quality(), bins=10, range=(0.0, 1.0))
    info = {"file": args.file, "cell_type": mesh.cell_type, "cells": mesh.n_cells,
            "vertices": mesh.n_vertices, "boundary_facets": int(mesh.boundary_facets.shape[0]),
            "reoriented_cells": mesh.n_reoriented,
            "tags": {k: int(len(v)) for k, v in mesh.facet_tags.items()},
            "volume": float(mesh.cell_volumes.sum()),
            "min_shape_quality": q.min_shape_quality, "mean_shape_quality": q.mean_shape_quality,
            "quality_histogram": hist.tolist()}
    if args.json:
        print(json.dumps(info))
        return 0
    _say(args, f"{args.file}: {mesh.n_cells} {mesh.cell_type}s, {mesh.n_vertices} vertices, "
               f"{info['boundary_facets']} boundary facets, volume {info['volume']:.6g}")
    if mesh.n_reoriented:
        _say(args, f"  {mesh.n_reoriented} cells were negatively oriented and re-oriented")
    for k, v in info["tags"].items():
        _say(args, f"  tag {k!r}: {v} facets")
    _say(args, f"  shape quality min {q.min_shape_quality:.3f}, mean {q.mean_shape_quality:.3f}")
    top = max(hist.max(), 1)
    for count, lo in zip(hist, edges[:-1]):
        _say(args, f"  {lo:3.1f}-{lo + 0.1:3.1f} {count:9d} " + "#" * int(40 * count / top))
    return 0


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="galerkit", description="Lagrange finite elements for "
                                "Poisson and diffusion problems on triangles and tetrahedra.")
    p.add_argument("--quiet", action="store_true", help="print only results")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    sub = p.add_subparsers(dest="command", required=True)
    d = sub.add_parser("demo", help="built-in cooling-plate scenario; writes VTU and PNG")
    d.add_argument("--output", default="galerkit-out", help="folder for the results")
    d.add_argument("--size", type=int, default=600, help="squares along x (default 600)")
    d.add_argument("--method", default="auto", help="solver name (default auto)")
    d.set_defaults(run=_demo)
    v = sub.add_parser("verify", help="manufactured-solution convergence study")
    v.add_argument("--cell", choices=["triangle", "tetrahedron"], default="triangle")
    v.add_argument("--degree", type=int, default=1)
    v.add_argument("--levels", type=int, default=5)
    v.add_argument("--tolerance", type=float, default=0.1, help="allowed order deviation")
    v.add_argument("--output", default="galerkit-verify.png", help="PNG of error versus h")
    v.set_defaults(run=_verify)
    m = sub.add_parser("mesh-info", help="counts, tags and quality of a mesh file")
    m.add_argument("file")
    m.set_defaults(run=_mesh_info)
    return p


def main(argv=None) -> int:
    from galerkit.errors import InputError, SolverError

    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return args.run(args)
    except InputError as exc:
        print(f"galerkit: error: {exc}", file=sys.stderr)
        return 2
    except SolverError as exc:
        print(f"galerkit: solver error: {exc}", file=sys.stderr)
        return 1


if __name__ == "__main__":
    sys.exit(main())
