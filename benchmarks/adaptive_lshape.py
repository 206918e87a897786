"""Adaptive against uniform P1 on the L-shaped domain: dofs to reach a relative bound.

u = r^(2/3) sin(2 theta/3) (Strang & Fix 1973): Neumann data on the outer sides, zero
Dirichlet on the two edges at the re-entrant corner.  The adaptive run (gk.adapt,
Doerfler 0.5) stops at bound <= rel_tol * energy norm; the uniform dofs for the same
bound are extrapolated from a fit bound = C N^s on uniform meshes (s near -1/3).
Prints the level table and the ratio, and the seconds per phase of the last level.

    .venv/bin/python benchmarks/adaptive_lshape.py --rel-tol 1e-2
"""

import argparse
import time

import numpy as np

import galerkit as gk


def flux(x):
    r = np.maximum(np.hypot(x[0], x[1]), 1e-300)
    t = np.mod(np.arctan2(x[1], x[0]), 2 * np.pi)
    c = 2 / 3 * r ** (-1 / 3)
    gx, gy = -c * np.sin(t / 3), c * np.cos(t / 3)
    nx = np.where(np.abs(x[0]) > 1 - 1e-9, np.sign(x[0]), 0.0)
    ny = np.where((nx == 0) & (np.abs(x[1]) > 1 - 1e-9), np.sign(x[1]), 0.0)
    return gx * nx + gy * ny


def problem(n):
    mesh = gk.l_shaped_triangles(n)
    mesh.tag_boundary("outer", lambda x: (np.abs(np.abs(x[0]) - 1) < 1e-9)
                      | (np.abs(np.abs(x[1]) - 1) < 1e-9))
    mesh.tag_boundary("corner", lambda x: (np.abs(x[0]) < 1e-9) | (np.abs(x[1]) < 1e-9))
    return gk.PoissonProblem(mesh, neumann={"outer": flux}, dirichlet={"corner": 0.0})


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rel-tol", type=float, default=1e-3)
    ap.add_argument("--max-dofs", type=int, default=2_000_000)
    ap.add_argument("--uniform", type=int, nargs="+", default=[8, 16, 32, 64])
    args = ap.parse_args()
    t0 = time.perf_counter()
    run = gk.adapt(problem(2), relative_tol=args.rel_tol, max_dofs=args.max_dofs, max_levels=200)
    print(run.table.to_markdown())
    print(f"stopped: {run.stopped} after {time.perf_counter() - t0:.1f} s")
    last = run.estimates[-1]
    target = args.rel_tol * last.energy_norm
    pts = []
    for n in args.uniform:
        sol = problem(n).solve()
        pts.append((sol.disc.n_dofs, gk.estimate_error(sol).bound))
    N, B = np.array(pts).T
    s, logc = np.polyfit(np.log(N), np.log(B), 1)
    n_uniform = float(np.exp((np.log(target) - logc) / s))
    n_adapt = run.table.rows[-1]["n_dofs"]
    print(f"uniform: bound ~ N^{s:.3f}; bound {target:.3e} needs about {n_uniform:.3g} dofs; "
          f"adaptive: {n_adapt} dofs (ratio {n_uniform / n_adapt:.0f})")


if __name__ == "__main__":
    main()
