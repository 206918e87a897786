"""Time loop of the heat equation, matrix-free vs assembled products, embedding overheads.

Run:  .venv/bin/python benchmarks/time_loop.py [--n 96] [--dim 2] [--steps 20]
                                               [--rebuild-every 10] [--reps 20]

Sections (seconds are wall-clock medians or means on this machine; they go
here, never into the tests):

1. Heat equation, backward Euler on the unit square (cube), u = 0 on the
   boundary, source f = 1, a conductivity that changes every step:

       (M + dt K(kappa_n)) u_{n+1} = M u_n + dt b

   The pattern, the mass matrix, the load vector and the Dirichlet
   elimination are built once; every step re-assembles K in place (out=),
   forms S = M + dt K in place on the shared pattern, reduces it in place and
   solves with CG + a smoothed-aggregation AMG hierarchy that is built once
   and rebuilt every N steps (N = 1 means every step).  Seconds per step for
   each phase are printed, and the true residual of every solve is checked
   against the *current* matrix.
2. y = K x: the matrix-free operator (bindings/host/operators.py) against the
   assembled CSR matrix (SciPy's product), with the bytes each keeps, and
   the memory bandwidth measured in the same run (a NumPy copy) as the
   yardstick.
3. Embedding overheads: the array-level API (bindings/host/embed.py, which
   validates each call) and the C entry point called through ctypes, against
   Assembler.stiffness(out=).
"""

from __future__ import annotations

import argparse
import time

import numba
import numpy as np

from galerkit import (Assembler, Discretization, prepare_solver, structured_tetrahedra,
                      structured_triangles)
from galerkit.boundary import DirichletElimination
from galerkit.bindings.host import cfuncs, embed
from galerkit.bindings.host.operators import MatrixFreeStiffness


def median_time(fn, reps):
    fn()  # warm (compilation, caches)
    ts = []
    for _ in range(reps):
        t0 = time.perf_counter()
        fn()
        ts.append(time.perf_counter() - t0)
    return float(np.median(ts))


def bandwidth_bytes_per_s(n_bytes=1 << 27, reps=5):
    """STREAM-like copy a[:] = b: 2 * n_bytes moved per copy."""
    a = np.empty(n_bytes // 8)
    b = np.ones(n_bytes // 8)
    t = median_time(lambda: np.copyto(a, b), reps)
    return 2 * n_bytes / t


def mesh_of(dim, n):
    return structured_triangles(n, n) if dim == 2 else structured_tetrahedra(n, n, n)


# ----------------------------------------------------------------------------
# 1. heat equation time loop
# ----------------------------------------------------------------------------
def heat_loop(dim, n, steps, rebuild_every, dt=1e-3):
    mesh = mesh_of(dim, n)
    disc = Discretization(mesh, 1)
    t0 = time.perf_counter()
    asm = Assembler(disc)
    t_pattern = time.perf_counter() - t0
    centroid_x = mesh.points[mesh.cells].mean(axis=1)[:, 0]
    kappa = np.empty(mesh.n_cells)

    def conductivity(t):  # positive, changes every step
        np.multiply(centroid_x, 0.5 * (1.0 + np.sin(40.0 * t)), out=kappa)
        np.add(kappa, 1.0, out=kappa)
        return kappa

    t0 = time.perf_counter()
    M = asm.mass()
    K = asm.stiffness(conductivity(0.0))
    b = asm.load(1.0)
    S = asm.mass()  # a third matrix on the same pattern, overwritten below
    np.multiply(K.data, dt, out=S.data)
    S.data += M.data
    fixed = disc.boundary_dofs()
    elim = DirichletElimination(S, fixed)
    Sf = elim.reduce_matrix(S)
    t_setup = time.perf_counter() - t0
    u = np.zeros(disc.n_dofs)
    zeros = np.zeros(fixed.size)
    phases = {k: [] for k in ("coefficient", "assemble K (out=)", "S = M + dt K", "reduce",
                              "AMG set-up", "solve", "expand")}
    iterations = []
    worst_residual = 0.0
    solver = None
    for step in range(steps):
        t = (step + 1) * dt
        clock = time.perf_counter()

        def lap(name):
            nonlocal clock
            now = time.perf_counter()
            phases[name].append(now - clock)
            clock = now

        conductivity(t)
        lap("coefficient")
        asm.stiffness(kappa, out=K)
        lap("assemble K (out=)")
        np.multiply(K.data, dt, out=S.data)
        S.data += M.data
        lap("S = M + dt K")
        elim.reduce_matrix(S, out=Sf)
        rf = elim.reduce_rhs(S, M @ u + dt * b, zeros)
        lap("reduce")
        if solver is None:
            solver = prepare_solver(Sf, "cg-amg")  # holds Sf itself: sees later in-place updates
        elif step % rebuild_every == 0:
            solver.refresh(Sf)  # numeric only: same aggregates, new coarse operators
        lap("AMG set-up")
        report = solver.solve(rf, x0=u[elim.free], rtol=1e-10)
        lap("solve")
        u = elim.expand(report.x, zeros)
        lap("expand")
        res = np.linalg.norm(Sf @ report.x - rf) / np.linalg.norm(rf)  # against the current Sf
        worst_residual = max(worst_residual, res)
        iterations.append(report.iterations)
        if not report.converged:
            raise SystemExit(f"step {step}: not converged: {report.message}")
    return {"n_dofs": disc.n_dofs, "n_cells": mesh.n_cells, "nnz": asm.nnz,
            "pattern": t_pattern, "setup": t_setup, "phases": phases,
            "iterations": iterations, "worst_residual": worst_residual,
            "u_max": float(u.max())}


def print_heat(result, rebuild_every):
    ph = result["phases"]
    steps = len(result["iterations"])
    print(f"  rebuild AMG every {rebuild_every} step(s): {steps} steps, CG iterations per step "
          f"min {min(result['iterations'])} max {max(result['iterations'])}, worst true "
          f"residual {result['worst_residual']:.1e}, max u {result['u_max']:.4e}")
    total = 0.0
    for name, ts in ph.items():
        ts = np.array(ts)
        warm = ts[1:] if ts.size > 1 else ts
        total += warm.mean()
        print(f"    {name:<22s} first {ts[0] * 1e3:9.3f} ms   warm mean {warm.mean() * 1e3:9.3f} ms")
    print(f"    {'per step (warm)':<22s}                     {total * 1e3:9.3f} ms")


# ----------------------------------------------------------------------------
# 2. matrix-free vs assembled y = K x
# ----------------------------------------------------------------------------
def matvec_section(dim, n, reps, bandwidth):
    mesh = mesh_of(dim, n)
    asm = Assembler(Discretization(mesh, 1))
    kappa = 1.0 + mesh.points[mesh.cells].mean(axis=1)[:, 0]
    K = asm.stiffness(kappa)
    points, cells = np.array(mesh.points), np.array(mesh.cells)
    t0 = time.perf_counter()
    op = MatrixFreeStiffness(points, cells, kappa, copy=False)
    t_build = time.perf_counter() - t0
    x = np.random.default_rng(1).standard_normal(mesh.n_vertices)
    y = np.empty_like(x)
    t_csr = median_time(lambda: K @ x, reps)
    t_free = median_time(lambda: op.apply(x, out=y), reps)
    rel = np.abs(op.apply(x) - K @ x).max() / np.abs(K @ x).max()
    csr_bytes = K.data.nbytes + K.indices.nbytes + K.indptr.nbytes
    own = sum(op.memory_bytes().values())
    mesh_bytes = points.nbytes + cells.nbytes
    moved = csr_bytes + 2 * x.nbytes  # one pass over the matrix, read x, write y
    print(f"  {mesh.n_vertices} dofs, {mesh.n_cells} cells, nnz {K.nnz}; "
          f"max rel. difference {rel:.1e}")
    print(f"    assembled CSR (SciPy)  {t_csr * 1e3:8.3f} ms per product; keeps {csr_bytes / 1e6:8.3f} MB;"
          f" {moved / t_csr / 1e9:6.2f} GB/s = {moved / t_csr / bandwidth:5.2f} x copy bandwidth")
    print(f"    matrix-free (numba)    {t_free * 1e3:8.3f} ms per product; keeps {own / 1e6:8.3f} MB"
          f" (+ mesh {mesh_bytes / 1e6:.3f} MB, shared with the host); set-up {t_build * 1e3:.2f} ms")
    print(f"    ratio matrix-free / CSR time {t_free / t_csr:5.2f}, memory "
          f"{own / csr_bytes:5.3f} (own) {(own + mesh_bytes) / csr_bytes:5.3f} (with mesh)")


# ----------------------------------------------------------------------------
# 3. embedding overheads
# ----------------------------------------------------------------------------
def embedding_section(dim, n, reps):
    mesh = mesh_of(dim, n)
    asm = Assembler(Discretization(mesh, 1))
    points = np.array(mesh.points)
    cells = np.ascontiguousarray(mesh.cells, dtype=np.int32)
    kappa = 1.0 + mesh.points[mesh.cells].mean(axis=1)[:, 0]
    K = asm.stiffness(kappa)
    t_asm = median_time(lambda: asm.stiffness(kappa, out=K), reps)
    t0 = time.perf_counter()
    indptr, indices, plan = embed.pattern(cells)
    t_pattern = time.perf_counter() - t0
    data = np.empty(plan["nnz"])
    t_embed = median_time(lambda: embed.stiffness(points, plan, data, kappa), reps)
    loose = {k: (np.array(v) if isinstance(v, np.ndarray) else v) for k, v in plan.items()}
    t_check = median_time(lambda: embed.check_plan(loose), reps)  # writeable: full check
    # the C entry point through ctypes, on int32 / uint16 arrays of its own pattern
    f = {name: cfuncs.ctypes_function(name) for name in
         ("galerkit_pattern_count", "galerkit_pattern_fill", "galerkit_stiffness")}
    m, nv, k, nch = mesh.n_cells, mesh.n_vertices, dim + 1, cfuncs.num_threads()
    ip = np.empty(nv + 1, dtype=np.int32)
    nnz = f["galerkit_pattern_count"](nv, m, k, cells.ctypes.data, nch, ip.ctypes.data)
    ix = np.empty(nnz, dtype=np.int32)
    order = np.empty(m, dtype=np.int32)
    pm = np.empty((m, k, k), dtype=np.uint16)
    cp = np.empty(3 * nch + 1, dtype=np.int64)
    f["galerkit_pattern_fill"](nv, m, k, cells.ctypes.data, nch, ip.ctypes.data, ix.ctypes.data,
                               order.ctypes.data, pm.ctypes.data, cp.ctypes.data)
    cdata = np.empty(nnz)
    args = (dim, 1, nv, points.ctypes.data, m, cells.ctypes.data, nv, cells.ctypes.data, m,
            kappa.ctypes.data, ip.ctypes.data, ix.ctypes.data, order.ctypes.data, pm.ctypes.data,
            nch, cp.ctypes.data, cdata.ctypes.data)
    t_c = median_time(lambda: f["galerkit_stiffness"](*args), reps)
    same = np.array_equal(data, K.data) and np.array_equal(cdata, K.data)
    print(f"  {nv} dofs, {m} cells; results bitwise equal to the Assembler's: {same}")
    print(f"    Assembler.stiffness(out=)        {t_asm * 1e3:8.3f} ms")
    print(f"    embed.stiffness (checked plan)   {t_embed * 1e3:8.3f} ms  ({t_embed / t_asm:4.2f} x)")
    print(f"    embed.check_plan, full check     {t_check * 1e3:8.3f} ms  (writeable plan: every call)")
    print(f"    C galerkit_stiffness via ctypes  {t_c * 1e3:8.3f} ms  ({t_c / t_asm:4.2f} x; checks "
          "pattern and plan every call)")
    print(f"    embed.pattern (symbolic phase)   {t_pattern * 1e3:8.3f} ms")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--n", type=int, default=96, help="cells per side (default 96)")
    ap.add_argument("--dim", type=int, default=2, choices=(2, 3))
    ap.add_argument("--steps", type=int, default=20)
    ap.add_argument("--rebuild-every", type=int, default=10)
    ap.add_argument("--reps", type=int, default=20)
    args = ap.parse_args(argv)
    print(f"numba {numba.__version__}, {numba.get_num_threads()} threads "
          f"(layer {numba.threading_layer() if hasattr(numba, 'threading_layer') else '?'})")
    bw = bandwidth_bytes_per_s()
    print(f"memory bandwidth (NumPy copy): {bw / 1e9:.2f} GB/s")

    print(f"\n1. heat equation, backward Euler, P1, dim {args.dim}, n = {args.n}")
    for every in (1, args.rebuild_every):
        r = heat_loop(args.dim, args.n, args.steps, every)
        if every == 1:
            print(f"  {r['n_dofs']} dofs, {r['n_cells']} cells, nnz {r['nnz']}; pattern "
                  f"{r['pattern'] * 1e3:.2f} ms, initial M, K, b, elimination "
                  f"{r['setup'] * 1e3:.2f} ms")
        print_heat(r, every)

    print(f"\n2. y = K x, dim {args.dim}, n = {args.n}")
    matvec_section(args.dim, args.n, args.reps, bw)

    print(f"\n3. embedding overheads, dim {args.dim}, n = {args.n}")
    embedding_section(args.dim, args.n, args.reps)


if __name__ == "__main__":
    main()
