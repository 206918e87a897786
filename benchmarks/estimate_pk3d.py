"""Cost of the P2-P4 error bound on tetrahedra against the solve (warm kernels).

Kuhn cubes of ``n**3`` boxes, ``u = sin(pi x) sin(pi y) sin(pi z)`` with its source as
a NumPy callable, ``u = 0`` on the boundary.  Every kernel is compiled first on the
one-box mesh; then, per size, the solve (``rtol=1e-12``) and the estimate are timed
``--repeat`` times (best of) and printed with the estimate's phases, the ratio
estimate / solve and the effectivity.

    .venv/bin/python benchmarks/estimate_pk3d.py --degree 2 --sizes 4 8
"""

import argparse
import time

import numpy as np

import galerkit as gk


def _u(x):
    return np.sin(np.pi * x[0]) * np.sin(np.pi * x[1]) * np.sin(np.pi * x[2])


def _f(x):
    return 3 * np.pi**2 * _u(x)


def _grad(x):
    s = np.sin(np.pi * x)
    c = np.cos(np.pi * x)
    return np.pi * np.array([c[0] * s[1] * s[2], s[0] * c[1] * s[2], s[0] * s[1] * c[2]])


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--degree", type=int, default=2)
    ap.add_argument("--sizes", type=int, nargs="+", default=[4, 8])
    ap.add_argument("--repeat", type=int, default=2)
    args = ap.parse_args()
    warm = gk.PoissonProblem(gk.structured_tetrahedra(1, 1, 1), source=_f,
                             dirichlet={"boundary": 0.0}).solve(degree=args.degree)
    gk.estimate_error(warm, exact_gradient=_grad)
    print(f"P{args.degree} on Kuhn cubes, best of {args.repeat}")
    print("| n | cells | dofs | solve s | estimate s | ratio | effectivity | patches s |")
    print("|---|---|---|---|---|---|---|---|")
    for n in args.sizes:
        problem = gk.PoissonProblem(gk.structured_tetrahedra(n, n, n), source=_f,
                                    dirichlet={"boundary": 0.0})
        ts, te = [], []
        for _ in range(args.repeat):
            t0 = time.perf_counter()
            sol = problem.solve(degree=args.degree, rtol=1e-12)
            ts.append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            est = gk.estimate_error(sol)
            te.append(time.perf_counter() - t0)
        eff = est.bound / gk.energy_error(sol.disc, sol.u, _grad)
        print(f"| {n} | {sol.mesh.n_cells} | {sol.disc.n_dofs} | {min(ts):.3f} | "
              f"{min(te):.3f} | {min(te) / min(ts):.1f} | {eff:.4f} | "
              f"{est.phase_seconds.get('patches', float('nan')):.3f} |")
        print("   phases:", {k: round(v, 3) for k, v in est.phase_seconds.items()})


if __name__ == "__main__":
    main()
