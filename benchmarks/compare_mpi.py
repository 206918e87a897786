"""Strong scaling of the petsc engine (1 and 2 ranks) next to the serial engine.

One problem: -lap u = 1 on the unit cube, u = 0 on the boundary, P1 on a
structured box of (size+1)^3 vertices (size 99: 10^6 dofs), rtol 1e-8.
Each run is its own process, so peak memory is per run (per rank for the
petsc engine).  Prints one table: seconds per phase and peak resident set
size, and the ratio of each run's total to the serial total.

    python benchmarks/compare_mpi.py                 # 10^6 dofs, 1 and 2 ranks
    python benchmarks/compare_mpi.py --size 40 --ranks 1,2,3
    python benchmarks/compare_mpi.py --repeat 3      # best of 3 runs (timings vary)

Needs ``make mpi``.  Close other work first: the machine has 2 cores, and
2 ranks use both.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))


def _problem(size):
    import galerkit as gk

    mesh = gk.structured_tetrahedra(size, size, size)
    return gk.PoissonProblem(mesh, source=1.0, dirichlet={"boundary": 0.0})


def _rss_mb():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def serial(size):
    t0 = time.perf_counter()
    problem = _problem(size)
    mesh_s = time.perf_counter() - t0
    sol = problem.solve(degree=1, method="cg-amg", rtol=1e-8)
    sec = {"mesh": mesh_s, **sol.seconds}
    sec["total"] = time.perf_counter() - t0
    return {"engine": "serial (cg-amg)", "ranks": 1, "dofs": sol.disc.n_dofs,
            "iterations": sol.report.iterations, "seconds": sec, "peak_rss_mb": [_rss_mb()]}


def worker(size):
    from mpi4py import MPI

    from galerkit.bindings.distributed.petsc_engine import solve_distributed

    comm = MPI.COMM_WORLD
    t0 = time.perf_counter()
    mesh_s = [0.0]

    def load():  # on rank 0, with every core while the other ranks wait
        t = time.perf_counter()
        problem = _problem(size)
        mesh_s[0] = time.perf_counter() - t
        return problem

    # through load=, so that rank 0 frees the global mesh once the parts are cut
    sol = solve_distributed(None, 1, rtol=1e-8, load=load)
    mesh_s = comm.bcast(mesh_s[0], root=0)
    sec = {"mesh": mesh_s, **sol.seconds}
    sec["partition"] -= mesh_s
    sec["total"] = comm.allreduce(time.perf_counter() - t0, op=MPI.MAX)
    if comm.rank == 0:
        print(json.dumps({"engine": f"petsc ({sol.report['ksp']} + {sol.report['pc']})",
                          "ranks": sol.size, "dofs": sol.n_dofs,
                          "iterations": sol.report["iterations"], "seconds": sec,
                          "peak_rss_mb": sol.peak_rss_mb, "partition": sol.partition}))


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=int, default=99)
    ap.add_argument("--ranks", default="1,2")
    ap.add_argument("--repeat", type=int, default=1,
                    help="runs of each engine; the one with the smallest total is shown")
    ap.add_argument("--worker", action="store_true", help=argparse.SUPPRESS)
    ap.add_argument("--serial", action="store_true", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.worker:
        return worker(args.size)
    if args.serial:
        print(json.dumps(serial(args.size)))
        return 0
    mpiexec = shutil.which("mpiexec")
    if mpiexec is None:
        sys.exit("compare_mpi: mpiexec not found; run `make mpi` first")
    me = [sys.executable, os.path.join(HERE, "compare_mpi.py"), "--size", str(args.size)]
    def best(cmd):
        tries = []
        for _ in range(max(1, args.repeat)):
            out = subprocess.run(cmd, check=True, capture_output=True, text=True).stdout
            tries.append(json.loads(out.strip().splitlines()[-1]))
        return min(tries, key=lambda r: r["seconds"]["total"])

    runs = [best(me + ["--serial"])]
    for n in [int(r) for r in args.ranks.split(",")]:
        runs.append(best([mpiexec, "-n", str(n)] + me + ["--worker"]))
    phases = []
    for r in runs:
        phases += [k for k in r["seconds"] if k not in phases and k != "total"]
    phases.append("total")
    print(f"unit cube, P1, {runs[0]['dofs']} dofs, rtol 1e-8, {os.cpu_count()} cores, "
          f"best of {max(1, args.repeat)} run(s) by total\n")
    head = f"{'phase':<14s}" + "".join(f"{r['engine'][:18] + ' x' + str(r['ranks']):>24s}"
                                        for r in runs)
    print(head)
    for k in phases:
        print(f"{k:<14s}" + "".join(
            f"{r['seconds'][k]:>22.2f} s" if k in r["seconds"] else f"{'-':>24s}"
            for r in runs))
    print(f"{'iterations':<14s}" + "".join(f"{r['iterations']:>24d}" for r in runs))
    print(f"{'peak RSS/rank':<14s}" + "".join(
        f"{'/'.join(f'{m:.0f}' for m in r['peak_rss_mb']) + ' MB':>24s}" for r in runs))
    base = runs[0]["seconds"]["total"]
    print(f"{'serial/total':<14s}" + "".join(f"{base / r['seconds']['total']:>23.2f}x"
                                            for r in runs))
    for r in runs[1:]:
        if r.get("partition"):
            q = r["partition"]
            print(f"\n{r['ranks']} ranks: cell balance {q['cell_balance']:.3f}, dof balance "
                  f"{q['dof_balance']:.3f}, ghost dofs "
                  f"{q['ghosts_total']} ({100 * q['ghost_fraction']:.2f}% of dofs)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
