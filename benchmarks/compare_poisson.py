"""End-to-end P1 Poisson, ours beside the pipeline a user writes by hand.

Problem: -Laplace(u) = 1 on the unit cube (or square), u = 0 on the boundary,
P1 elements, CG to relative residual 1e-8.  In one run, each in its own child
process (so peak RSS belongs to it alone):

* **ours**: ``PoissonProblem(...).solve(1, method="cg-amg", rtol=1e-8)``,
  seconds per phase (mesh: the first call in the process, numba's cache load
  included; mesh_warm: the same mesh again with its connected components;
  discretize, assemble, constrain, solver setup,
  solve; ``compile`` apart when a kernel was compiled), ``reconstrain`` (the
  matrix and lifting reduced again in place, as in a time loop), iterations,
  peak RSS and peak RSS per dof (``bytes_per_dof``, the whole process);
* **by hand**: the vectorised NumPy COO assembly (``compare.coo_assembly``),
  Dirichlet rows and columns removed by SciPy fancy indexing, a PyAMG
  smoothed-aggregation hierarchy with PyAMG's defaults, and SciPy's ``cg``
  preconditioned by it.

Each child runs its pipeline twice (``--runs``): the first run is what a user's
fresh process sees (the ratios use it); the second, ``run 2``, reuses memory the
process already touched.  ``sys`` is the run's system CPU seconds: on a virtual
machine that backs guest memory lazily, the first touch of fresh pages costs up
to ~3 s per GB there (measured on the 2-core development machine: a 400 MB
``np.ones`` took 1.08 s in a fresh process, 0.03 s once the memory had been
used), so the gap between the two runs is mostly page population, not compute.

A second table puts each of our phases beside the memory-bandwidth probe
(a NumPy copy of a 256 MB array in the same process, as ``compare.py``
does): ``floor MB`` is the least memory traffic the phase's inputs and
outputs need (each array it must read or write touched once), ``floor s``
that traffic at the probe's rate, ``x floor`` the measured time over it.
The floors per phase:

* mesh: the points and cells written, then read once (validation);
* discretize is left out: the P1 numbering is the cells themselves;
* assemble: the matrix (values, column indices, row pointers) and the load
  vector written, points and cells read;
* constrain: the matrix read, the reduced matrix written;
* solver_setup: the reduced matrix read, the hierarchy written;
* solve: per iteration, the reduced matrix once (the CG product) and each
  level's operator ``2 * smoother degree + 1`` times (smoothing and the
  residual), transfers and vectors left out.

Usage::

    python benchmarks/compare_poisson.py              # ~1M dofs, 3D and 2D
    python benchmarks/compare_poisson.py --scale 0.1
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

from compare import cells_per_axis, markdown_rows, peak_rss_bytes  # noqa: E402

CASES = {"3D": (3, 99), "2D": (2, 999), "3D-274k": (3, 64)}
PROBE_BYTES = 256 * 2**20


def _mesh(dim, n):
    import galerkit as gk

    return gk.structured_tetrahedra(n, n, n) if dim == 3 else gk.structured_triangles(n, n)


def run_ours(dim, n):
    import numpy as np

    import galerkit as gk
    import galerkit.boundary  # noqa: F401

    t = time.perf_counter()
    mesh = _mesh(dim, n)
    t_mesh = time.perf_counter() - t
    sol = gk.PoissonProblem(mesh, 1.0, 1.0, {"boundary": 0.0}).solve(1, method="cg-amg",
                                                                     rtol=1e-8)
    total = t_mesh + sum(sol.seconds.values())
    rss = peak_rss_bytes()  # before the extra matrices below
    # re-constraining in place (a time loop's step): matrix and lifting in one pass
    elim = gk.boundary.DirichletElimination(sol.assembler.stiffness(1.0), sol.disc.boundary_dofs())
    A = sol.assembler.stiffness(1.0)
    Af, _ = elim.reduce(A, np.ones(A.shape[0]), 0.0)
    t = time.perf_counter()
    elim.reduce(A, np.ones(A.shape[0]), 0.0, out=Af)
    t_re = time.perf_counter() - t
    # the mesh set-up again, warm (numba's cache loaded by the first), with the
    # connected components the constrain phase asks for
    del elim
    t = time.perf_counter()
    again = _mesh(dim, n)
    again.connected_components()
    t_mesh_warm = time.perf_counter() - t
    del again
    opts = sol.report.options
    csr = A.data.nbytes + A.indices.nbytes + A.indptr.nbytes
    red = Af.data.nbytes + Af.indices.nbytes + Af.indptr.nbytes
    geo = mesh.points.nbytes + mesh.cells.nbytes
    levels = sum((2 * opts.get("smoother_degree", 2) + 1) * (12 * nnz + 8 * m)
                 for m, nnz in zip(opts["level_sizes"], opts["level_nonzeros"]))
    floors = {"mesh": 2 * geo,
              "assemble": csr + 8 * A.shape[0] + geo, "constrain": csr + red,
              "solver_setup": red + opts["hierarchy_bytes"],
              "solve": sol.report.iterations * (red + levels)}
    src = np.ones(PROBE_BYTES // 8)
    dst = np.empty_like(src)
    t_copy = min(_timed(lambda: np.copyto(dst, src)) for _ in range(5))
    probe = 2 * src.nbytes / t_copy
    phases = {"mesh": t_mesh, **sol.seconds}
    traffic = [{"phase": k, "seconds": phases[k], "floor_mb": b / 2**20, "floor_s": b / probe,
                "x_floor": phases[k] / (b / probe)} for k, b in floors.items() if k in phases]
    return {"pipeline": "ours", "dofs": sol.disc.n_dofs, "mesh": t_mesh, "mesh_warm": t_mesh_warm,
            **sol.seconds,
            "probe_gbs": probe / 1e9, "traffic": traffic,
            "reconstrain": t_re, "peak_rss_mb": rss / 2**20, "bytes_per_dof": rss / sol.disc.n_dofs,
            "total": total, "iterations": sol.report.iterations,
            "residual": sol.report.final_residual, "u_max": float(sol.u.max())}


def _timed(fn):
    t = time.perf_counter()
    fn()
    return time.perf_counter() - t


def run_by_hand(dim, n):
    import numpy as np
    import pyamg
    import scipy.sparse.linalg as spla

    import galerkit as gk
    from compare import coo_assembly

    t = time.perf_counter()
    mesh = _mesh(dim, n)
    t_mesh = time.perf_counter() - t
    t = time.perf_counter()
    disc = gk.Discretization(mesh, 1)
    t_disc = time.perf_counter() - t
    t = time.perf_counter()
    K = coo_assembly(disc, "stiffness")
    b = coo_assembly(disc, "mass") @ np.ones(disc.n_dofs)
    t_asm = time.perf_counter() - t
    t = time.perf_counter()
    fixed = disc.boundary_dofs()
    free = np.setdiff1d(np.arange(disc.n_dofs), fixed)
    Kf = K[free][:, free].tocsr()
    bf = b[free]
    t_con = time.perf_counter() - t
    t = time.perf_counter()
    ml = pyamg.smoothed_aggregation_solver(Kf)
    M = ml.aspreconditioner()
    t_setup = time.perf_counter() - t
    it = [0]
    t = time.perf_counter()
    x, info = spla.cg(Kf, bf, rtol=1e-8, M=M, callback=lambda xk: it.__setitem__(0, it[0] + 1))
    t_solve = time.perf_counter() - t
    res = float(np.linalg.norm(bf - Kf @ x) / np.linalg.norm(bf))
    total = t_mesh + t_disc + t_asm + t_con + t_setup + t_solve
    return {"pipeline": "by hand", "dofs": disc.n_dofs, "mesh": t_mesh, "discretize": t_disc,
            "assemble": t_asm, "constrain": t_con, "solver_setup": t_setup, "solve": t_solve,
            "total": total, "iterations": it[0], "residual": res, "u_max": float(x.max())}


def worker(spec):
    import resource

    name, pipeline, n, runs = spec.split(":")
    dim = CASES[name][0]
    for run in range(int(runs)):
        before = resource.getrusage(resource.RUSAGE_SELF).ru_stime
        row = (run_ours if pipeline == "ours" else run_by_hand)(dim, int(n))
        # system CPU seconds of the run: on a machine whose memory is backed lazily
        # (a virtual machine), first touches of fresh pages are most of it
        row["sys"] = resource.getrusage(resource.RUSAGE_SELF).ru_stime - before
        row["case"] = name
        if run:
            row["pipeline"] += f", run {run + 1}"
        row.setdefault("peak_rss_mb", peak_rss_bytes() / 2**20)
        row.setdefault("bytes_per_dof", row["peak_rss_mb"] * 2**20 / row["dofs"])
        print(json.dumps(row), flush=True)


COLS = ["case", "pipeline", "dofs", "mesh", "mesh_warm", "discretize", "assemble", "constrain",
        "reconstrain", "solver_setup", "solve", "compile", "total", "sys", "iterations",
        "residual", "peak_rss_mb", "bytes_per_dof"]


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scale", type=float, default=1.0)
    ap.add_argument("--cases", default=",".join(CASES))
    ap.add_argument("--skip-by-hand", action="store_true")
    ap.add_argument("--runs", type=int, default=2,
                    help="pipeline runs per child process (the second reuses the memory the "
                         "first touched; the ratios use the first)")
    ap.add_argument("--worker", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.worker:
        worker(args.worker)
        return 0
    rows = []
    for name in args.cases.split(","):
        dim, full = CASES[name]
        n = cells_per_axis(full, dim, args.scale)
        for pipeline in ("ours",) + (() if args.skip_by_hand else ("by hand",)):
            out = subprocess.run([sys.executable, __file__, "--worker",
                                  f"{name}:{pipeline}:{n}:{max(1, args.runs)}"],
                                 capture_output=True, text=True, check=True)
            rows += [json.loads(line) for line in out.stdout.splitlines()
                     if line.startswith("{")]
    print(markdown_rows(rows, COLS))
    for r in rows:
        if "traffic" in r and r["pipeline"] == "ours":
            print(f"\n{r['case']}, ours, phase by phase against the probe's "
                  f"{r['probe_gbs']:.1f} GB/s:\n")
            print(markdown_rows(r["traffic"], ["phase", "seconds", "floor_mb", "floor_s",
                                               "x_floor"]))
    by = {(r["case"], r["pipeline"]): r for r in rows}
    for name in args.cases.split(","):
        if (name, "by hand") in by:
            a, h = by[(name, "ours")], by[(name, "by hand")]
            print(f"{name}: by hand / ours total {h['total'] / a['total']:.1f}x, assembly "
                  f"{h['assemble'] / a['assemble']:.1f}x, peak RSS {h['peak_rss_mb']:.0f} vs "
                  f"{a['peak_rss_mb']:.0f} MB")
            if (name, "ours, run 2") in by and (name, "by hand, run 2") in by:
                a2, h2 = by[(name, "ours, run 2")], by[(name, "by hand, run 2")]
                print(f"{name}, second runs: by hand / ours total "
                      f"{h2['total'] / a2['total']:.1f}x")
    return 0


if __name__ == "__main__":
    sys.exit(main())
