"""Cost of one adaptive level beyond the solve: estimate, mark, refine, against the solve.

P1 on the L-shaped domain (unit source, u = 0 on the boundary) at about ``--dofs``
unknowns, or with ``--dim 3`` on the unit cube cut into tetrahedra
(``structured_tetrahedra``, same data); every kernel is compiled first on a small mesh,
so the times are warm.
Prints the solve's phases, the estimate's phases (``ErrorEstimate.phase_seconds``),
Doerfler marking and newest-vertex bisection, and the ratio (estimate + mark + refine) /
solve.  With ``--before REV`` the estimator of git revision REV (its
``kernel/estimators.py``, in 3D its ``kernel/estimators3d.py``) runs on the same
solution in the same process: the ratio of the two and the difference of their bounds
are printed too.  The peak resident set size of the process ends the report.

    .venv/bin/python benchmarks/estimate_speed.py --dofs 1000000 --before 81898b5
    .venv/bin/python benchmarks/estimate_speed.py --dim 3 --dofs 300000 --before 5aeb757
"""

import argparse
import importlib.util
import math
import os
import resource
import subprocess
import sys
import tempfile
import time

import numpy as np

import galerkit as gk
from galerkit.adaptivity import doerfler_marking


def load_before(rev, dim=2):
    """The estimator module of git revision ``rev``, imported beside the current one."""
    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    name = "estimators.py" if dim == 2 else "estimators3d.py"
    text = subprocess.run(["git", "show", f"{rev}:kernel/{name}"], cwd=root,
                          check=True, capture_output=True, text=True).stdout
    folder = tempfile.mkdtemp(prefix="estimators-before-")
    path = os.path.join(folder, "estimators_before.py")
    with open(path, "w") as f:
        f.write(text)
    spec = importlib.util.spec_from_file_location("galerkit._estimators_before", path)
    mod = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = mod
    spec.loader.exec_module(mod)
    return mod


def problem(n, source, dim=2):
    mesh = gk.l_shaped_triangles(n) if dim == 2 else gk.structured_tetrahedra(n, n, n)
    return gk.PoissonProblem(mesh, source=source, dirichlet={"boundary": 0.0})


def before_estimate(before, sol, dim):
    if dim == 2:
        return before.estimate_error(sol)
    return before.estimate_error_tetrahedra(sol, None, 4, time.perf_counter())


def best(f, repeat):
    out, t = None, math.inf
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = f()
        t = min(t, time.perf_counter() - t0)
    return out, t


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--dofs", type=int, default=None,
                    help="about this many unknowns (default 1,000,000 in 2D, 300,000 in 3D)")
    ap.add_argument("--dim", type=int, choices=[2, 3], default=2)
    ap.add_argument("--before", metavar="REV", help="also time the estimator of this revision")
    ap.add_argument("--repeat", type=int, default=2)
    ap.add_argument("--refine-share", type=float, default=None, metavar="S",
                    help="also refine the share S of the cells with the largest indicators "
                    "(Doerfler 0.5 marks few cells of a uniform mesh; later levels mark more)")
    ap.add_argument("--source", choices=["constant", "formula"], default="constant",
                    help="unit source, or 1 + sin(3x) cos(2y) (evaluated at the points of "
                    "the rule: the formula's own cost comes in)")
    args = ap.parse_args()
    source = 1.0 if args.source == "constant" else (
        lambda x: 1.0 + np.sin(3 * x[0]) * np.cos(2 * x[1]))
    dim = args.dim
    dofs = args.dofs or (1_000_000 if dim == 2 else 300_000)
    before = load_before(args.before, dim) if args.before else None
    # warm up every kernel on a small mesh
    small = problem(8 if dim == 2 else 4, source, dim).solve()
    est = gk.estimate_error(small)
    gk.refine_marked(small.mesh, doerfler_marking(est.indicators))
    if before is not None:
        before_estimate(before, small, dim)
    if dim == 2:
        n = max(2, round(math.sqrt(dofs / 3)))
    else:
        n = max(2, round(dofs ** (1 / 3)) - 1)
    pb = problem(n, source, dim)
    sol, t_solve = best(lambda: pb.solve(), args.repeat)
    print(f"{'L-shape' if dim == 2 else 'cube'} n={n}: {sol.disc.n_dofs} dofs, "
          f"{sol.mesh.n_cells} cells, "
          f"{os.environ.get('NUMBA_NUM_THREADS', 'all')} threads")
    print(f"solve      {t_solve:8.3f} s  " + ", ".join(
        f"{k} {v:.3f}" for k, v in sol.seconds.items()))
    est, t_est = best(lambda: gk.estimate_error(sol), args.repeat)
    print(f"estimate   {t_est:8.3f} s  " + ", ".join(
        f"{k} {v:.3f}" for k, v in est.phase_seconds.items()))
    marked, t_mark = best(lambda: doerfler_marking(est.indicators, 0.5), args.repeat)
    print(f"mark       {t_mark:8.3f} s  ({marked.size} cells)")
    fine, t_ref = best(lambda: gk.refine_marked(sol.mesh, marked), args.repeat)
    print(f"refine     {t_ref:8.3f} s  ({fine.n_cells} cells)")
    if args.refine_share:
        k = int(args.refine_share * sol.mesh.n_cells)
        top = np.sort(np.argsort(-est.indicators, kind="stable")[:k])
        fine2, t_ref2 = best(lambda: gk.refine_marked(sol.mesh, top), args.repeat)
        print(f"refine     {t_ref2:8.3f} s  ({k} cells marked, {fine2.n_cells} cells)")
        t_ref = max(t_ref, t_ref2)
    print(f"(estimate + mark + refine) / solve = {(t_est + t_mark + t_ref) / t_solve:.2f}; "
          f"estimate / solve = {t_est / t_solve:.2f}")
    if before is not None:
        old, t_old = best(lambda: before_estimate(before, sol, dim), args.repeat)
        print(f"estimate of {args.before}: {t_old:.3f} s = {t_old / t_solve:.2f} x the solve; "
              f"speed-up {t_old / t_est:.1f}x; bounds {old.bound:.12e} / {est.bound:.12e} "
              f"(relative difference {abs(old.bound - est.bound) / old.bound:.1e}); "
              f"largest indicator difference "
              f"{np.abs(old.indicators - est.indicators).max() / est.indicators.max():.1e}")
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"peak resident set size {peak:.0f} MiB "
          f"({peak * 2**20 / sol.disc.n_dofs:.0f} bytes per dof)")


if __name__ == "__main__":
    main()
