"""Solvers side by side on the same reduced systems: our multigrid against PyAMG.

Problem: -Laplace(u) = 1, u = 0 on the boundary of the unit cube (square),
reduced system after Dirichlet elimination, CG to relative residual 1e-8.
Each (case, solver) runs in its own child process, which builds the system
first, then resets the peak-RSS counter (``/proc/self/clear_refs``) so that
the peak it reports belongs to the solver's set-up + solve alone.

Solvers:

* ``cg-amg``: ours (``prepare_solver(A, "cg-amg")``; for degree >= 2 with
  the nested P1 coarse space, as ``PoissonProblem.solve`` passes it);
* ``cg-pyamg``: our CG loop preconditioned by PyAMG's V-cycle (two symmetric
  Gauss-Seidel sweeps);
* ``pyamg+scipy``: the pipeline written by hand: PyAMG's
  ``smoothed_aggregation_solver`` with its defaults and SciPy's ``cg``.

Besides the times the table gives, measured in the same process: one
mat-vec with the system matrix (``matvec ms``), the cost of one CG
iteration in mat-vecs (``it/matvec``), the stream bandwidth of a NumPy copy
of the matrix's values (``probe GB/s``), and the matrix's own bytes against
the solver's peak.

Usage::

    python benchmarks/compare_solvers.py                    # ~1M dofs per case
    python benchmarks/compare_solvers.py --scale 0.1 --cases tet-P1
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

from compare import cells_per_axis, markdown_rows  # noqa: E402

#: name: (dim, degree, cells per axis at full size)
CASES = {"tet-P1": (3, 1, 99), "tri-P1": (2, 1, 999), "tet-P2": (3, 2, 50),
         "tri-P3": (2, 3, 235)}
SOLVERS = ("cg-amg", "cg-pyamg", "pyamg+scipy")
RTOL = 1e-8


def _status_kb(key):
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(key + ":"):
                return int(line.split()[1])
    return 0


def _reset_peak():
    try:
        with open("/proc/self/clear_refs", "w") as fh:
            fh.write("5")
        return True
    except OSError:
        return False


def system(dim, degree, n):
    import galerkit as gk
    from galerkit.multigrid import p1_coarse_space

    mesh = gk.structured_tetrahedra(n, n, n) if dim == 3 else gk.structured_triangles(n, n)
    prob = gk.PoissonProblem(mesh, 1.0, 1.0, {"boundary": 0.0})
    asm = gk.Assembler(prob.discretize(degree))
    A, b, rd = prob.assemble(asm)
    elim, Af, bf, *_ = prob.constrain(asm, A, b, rd)
    coarse = p1_coarse_space(asm.disc, elim.free) if degree > 1 else None
    return Af, bf, coarse


def worker(spec):
    import numpy as np

    name, solver, n = spec.split(":")
    dim, degree, _ = CASES[name]
    # The first call in a process loads (or compiles) the kernels; do it on a
    # tiny system of the same kind so the timed run measures the solver only.
    # A tiny system would run the serial twins (compilation.by_size): ask for the
    # parallel kernels, which the timed system uses, for the warm-up.
    from galerkit import compilation

    threshold, compilation.PARALLEL_FROM = compilation.PARALLEL_FROM, 0
    wa, wb, wc = system(dim, degree, 12 if dim == 3 else 30)
    _run(solver, wa, wb, wc)
    compilation.PARALLEL_FROM = threshold
    Af, bf, coarse = system(dim, degree, int(n))
    from galerkit.sparse import matvec_into

    ptr, ind = Af.indptr.astype(np.int64), Af.indices.astype(np.int32)
    x = np.ones(Af.shape[0])
    y = np.empty_like(x)
    matvec_into(ptr, ind, Af.data, x, y)
    t_mv = min(_timed(lambda: matvec_into(ptr, ind, Af.data, x, y)) for _ in range(5))
    dst = np.empty_like(Af.data)
    t_copy = min(_timed(lambda: np.copyto(dst, Af.data)) for _ in range(5))
    del ptr, ind, x, y, dst
    matrix_bytes = Af.data.nbytes + Af.indices.nbytes + Af.indptr.nbytes
    rss0 = _status_kb("VmRSS")
    reset = _reset_peak()
    t_setup, t_solve, u, iterations, levels, coarse_nnz = _run(solver, Af, bf, coarse)
    peak_extra = (_status_kb("VmHWM") - rss0) * 1024 if reset else float("nan")
    res = float(np.linalg.norm(bf - Af @ u) / np.linalg.norm(bf))
    return {"case": name, "solver": solver, "dofs": Af.shape[0], "nnz": Af.nnz,
            "setup": t_setup, "solve": t_solve, "total": t_setup + t_solve,
            "iterations": iterations, "residual": res, "levels": levels,
            # operator complexity both ways, the same for every solver: over the
            # matrix's stored entries (PyAMG's own figure when it is given the
            # matrix as stored), and over its non-zero entries (the operator a
            # cycle applies once stored zeros are dropped, as ours does)
            "op_complexity": 1.0 + coarse_nnz / np.count_nonzero(Af.data),
            "op_complexity_stored": 1.0 + coarse_nnz / Af.nnz, "matvec_ms": 1e3 * t_mv,
            "it_per_matvec": t_solve / max(iterations, 1) / t_mv,
            "probe_gbs": 2 * Af.data.nbytes / t_copy / 1e9,
            "matrix_mb": matrix_bytes / 2**20, "peak_extra_mb": peak_extra / 2**20,
            "peak_over_matrix": peak_extra / matrix_bytes}


def _run(solver, Af, bf, coarse):
    """Set up and solve; returns (set-up s, solve s, x, iterations, levels, coarse nonzeros).

    ``coarse nonzeros``: the stored entries of every level below the finest.
    """
    if solver == "pyamg+scipy":
        import pyamg
        import scipy.sparse.linalg as spla

        t = time.perf_counter()
        ml = pyamg.smoothed_aggregation_solver(Af)
        M = ml.aspreconditioner()
        t_setup = time.perf_counter() - t
        it = [0]
        t = time.perf_counter()
        u, _ = spla.cg(Af, bf, rtol=RTOL, M=M,
                       callback=lambda xk: it.__setitem__(0, it[0] + 1))
        t_solve = time.perf_counter() - t
        iterations, levels = it[0], len(ml.levels)
        coarse_nnz = sum(lv.A.nnz for lv in ml.levels[1:])
    else:
        import galerkit as gk

        options = {"coarse_space": coarse} if (solver == "cg-amg" and coarse is not None) else {}
        t = time.perf_counter()
        prepared = gk.prepare_solver(Af, solver, **options)
        t_setup = time.perf_counter() - t
        rep = prepared.solve(bf, rtol=RTOL)
        t_solve = rep.solve_seconds
        u, iterations = rep.x, rep.iterations
        levels = rep.options["levels"]
        coarse_nnz = sum(rep.options["level_nonzeros"][1:])
    return t_setup, t_solve, u, iterations, levels, coarse_nnz


def _timed(fn):
    t = time.perf_counter()
    fn()
    return time.perf_counter() - t


COLS = ["case", "solver", "dofs", "setup", "solve", "total", "iterations", "residual",
        "levels", "op_complexity", "op_complexity_stored", "matvec_ms", "it_per_matvec", "probe_gbs", "matrix_mb",
        "peak_extra_mb", "peak_over_matrix"]


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scale", type=float, default=1.0)
    ap.add_argument("--cases", default=",".join(CASES))
    ap.add_argument("--solvers", default=",".join(SOLVERS))
    ap.add_argument("--repeat", type=int, default=1,
                    help="runs per (case, solver); the row with the best total is kept")
    ap.add_argument("--json", help="also write the rows to this file")
    ap.add_argument("--worker", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.worker:
        print(json.dumps(worker(args.worker)))
        return 0
    rows = []
    for name in args.cases.split(","):
        dim, degree, full = CASES[name]
        # tri-P3 is sized for ~500k dofs at scale 1
        n = cells_per_axis(full, dim, args.scale)
        for solver in args.solvers.split(","):
            best = None
            for _ in range(args.repeat):
                out = subprocess.run([sys.executable, __file__, "--worker",
                                      f"{name}:{solver}:{n}"],
                                     capture_output=True, text=True, check=True)
                row = json.loads(out.stdout.strip().splitlines()[-1])
                if best is None or row["total"] < best["total"]:
                    best = row
            rows.append(best)
            print(f"  {name} {solver}: total {best['total']:.3f} s, "
                  f"{best['iterations']} iterations", file=sys.stderr)
    print(markdown_rows(rows, COLS))
    by = {(r["case"], r["solver"]): r for r in rows}
    for name in args.cases.split(","):
        ours = by.get((name, "cg-amg"))
        for other in ("cg-pyamg", "pyamg+scipy"):
            if ours and (name, other) in by:
                o = by[(name, other)]
                print(f"{name}: {other} / cg-amg: set-up {o['setup'] / ours['setup']:.1f}x, "
                      f"solve {o['solve'] / ours['solve']:.1f}x, "
                      f"total {o['total'] / ours['total']:.1f}x")
    if args.json:
        with open(args.json, "w") as fh:
            json.dump(rows, fh, indent=1)
    return 0


if __name__ == "__main__":
    sys.exit(main())
