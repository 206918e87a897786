"""Side-by-side timing of the assembler against a vectorised NumPy/SciPy baseline.

Prints one table.  For each case (a mesh and a degree) and each operator
(stiffness, mass) it measures, in one run and on the same mesh:

* mesh generation + Discretization, and the Assembler's symbolic phase;
* our numeric phase: the first call in a fresh process (numba cache load
  included) and the warm call (best of ``--repeat``), and in-place
  re-assembly with a new per-cell coefficient into the same matrix;
* the plain vectorised NumPy/SciPy COO idiom: element matrices for all cells
  by ``numpy.einsum`` (reference-matrix form, exact for affine cells), then
  ``scipy.sparse.coo_array(...).tocsr()``;
* a memory-bandwidth probe: a NumPy copy of an array the size of the element
  data (``n_cells * k * k`` float64), best of ``--repeat``;
* ratios (COO / ours, ours / probe), peak RSS, and the bytes of the CSR
  matrix and of the scatter plan (``Assembler.memory_bytes()``).

Each case runs in its own child process, so "first call" is a real cold
start and the peak resident set size belongs to that case alone.

Usage::

    python benchmarks/compare.py                 # full size, ~1M dofs per case
    python benchmarks/compare.py --scale 0.1     # a tenth of the dofs
    python benchmarks/compare.py --cases tet-P2,tri-P1
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time

#: name -> (dimension, degree, cells per axis at full size): ~1M dofs each
CASES = {
    "tri-P1": (2, 1, 999),   # 1000^2 vertices
    "tet-P1": (3, 1, 99),    # 100^3 vertices
    "tet-P2": (3, 2, 50),    # 101^3 dofs
}


def cells_per_axis(full, dim, scale):
    """Cells per axis so that the dof count is about ``scale`` of the full one."""
    return max(2, int(round((full + 1) * scale ** (1.0 / dim))) - 1)


def markdown_rows(rows, cols):
    """A plain markdown table of ``rows`` (dicts): floats to 3 digits, a missing key blank."""
    lines = ["| " + " | ".join(cols) + " |", "|" + "|".join("---" for _ in cols) + "|"]
    for r in rows:
        cells = []
        for c in cols:
            v = r.get(c, "")
            cells.append(f"{v:.3g}" if isinstance(v, float) else str(v))
        lines.append("| " + " | ".join(cells) + " |")
    return "\n".join(lines)


def peak_rss_bytes():
    # ru_maxrss is in KiB on Linux, bytes on macOS
    r = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return r if sys.platform == "darwin" else r * 1024


def best_of(fn, repeat):
    best = float("inf")
    out = None
    for _ in range(repeat):
        t = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t)
    return best, out


# ----------------------------------------------------------------------------
# the NumPy/SciPy baseline
# ----------------------------------------------------------------------------
def coo_assembly(disc, op):
    """Vectorised NumPy/SciPy assembly (einsum element matrices, COO -> CSR).

    Affine cells: K_e = sum_{r,s} C_rs(e) S_rs with C = |det J| J^-1 J^-T and
    the reference tables S_rs[a, b] = int d_r phi_a d_s phi_b; M_e = |det J| M_ref.
    """
    import numpy as np
    import scipy.sparse as sp

    from galerkit import simplex_quadrature

    mesh, el = disc.mesh, disc.element
    d, k = mesh.dim, disc.degree
    P = mesh.points[mesh.cells]
    J = np.transpose(P[:, 1:] - P[:, :1], (0, 2, 1))
    det = np.abs(np.linalg.det(J))
    if op == "stiffness":
        rule = simplex_quadrature(d, max(2 * k - 2, 0))
        G = el.tabulate_gradients(rule.points)
        S = np.einsum("q,qar,qbs->rsab", rule.weights, G, G, optimize=True)
        Jinv = np.linalg.inv(J)
        C = np.einsum("c,cri,csi->crs", det, Jinv, Jinv, optimize=True)
        E = np.einsum("crs,rsab->cab", C, S, optimize=True)
    else:
        rule = simplex_quadrature(d, 2 * k)
        V = el.tabulate(rule.points)
        Mref = np.einsum("q,qa,qb->ab", rule.weights, V, V)
        E = det[:, None, None] * Mref
    dofs = disc.cell_dofs
    n_local = dofs.shape[1]
    rows = np.repeat(dofs, n_local, axis=1).ravel()
    cols = np.tile(dofs, (1, n_local)).ravel()
    n = disc.n_dofs
    return sp.coo_array((E.ravel(), (rows, cols)), shape=(n, n)).tocsr()


# ----------------------------------------------------------------------------
# one case, in a child process
# ----------------------------------------------------------------------------
def run_case(name, scale, repeat, coo_repeat):
    t0 = time.perf_counter()
    import numba
    import numpy as np

    import galerkit as gk

    t_import = time.perf_counter() - t0
    dim, degree, full = CASES[name]
    n = cells_per_axis(full, dim, scale)
    t = time.perf_counter()
    mesh = gk.structured_triangles(n, n) if dim == 2 else gk.structured_tetrahedra(n, n, n)
    disc = gk.Discretization(mesh, degree)
    t_mesh = time.perf_counter() - t
    t = time.perf_counter()
    asm = gk.Assembler(disc)
    t_sym = time.perf_counter() - t
    mem = asm.memory_bytes()
    plan = mem["cell_order"] + mem["position_map"]
    rng = np.random.default_rng(0)
    kappa = rng.uniform(1.0, 2.0, mesh.n_cells)
    rows = []
    for op in ("stiffness", "mass"):
        fn = getattr(asm, op)
        t = time.perf_counter()
        A = fn()
        t_first = time.perf_counter() - t
        t_warm, A = best_of(fn, repeat)
        t_inplace, _ = best_of(lambda: fn(kappa, out=A), repeat)
        csr = A.data.nbytes + A.indices.nbytes + A.indptr.nbytes
        rows.append(dict(case=name, op=op, n=n, n_dofs=disc.n_dofs, n_cells=mesh.n_cells,
                         nnz=int(A.nnz), t_mesh=t_mesh, t_sym=t_sym, t_first=t_first,
                         t_warm=t_warm, t_inplace=t_inplace, csr_bytes=csr, plan_bytes=plan))
    rss_ours = peak_rss_bytes()
    # bandwidth probe: copy an array of the element-data size
    k_loc = disc.n_local
    src = np.ones(mesh.n_cells * k_loc * k_loc)
    dst = np.empty_like(src)
    t_probe, _ = best_of(lambda: np.copyto(dst, src), repeat)
    gbs = 2 * src.nbytes / t_probe / 1e9  # bytes read + written
    del src, dst
    for row in rows:
        t_coo, B = best_of(lambda: coo_assembly(disc, row["op"]), coo_repeat)
        # the baseline must agree with us, or the comparison means nothing
        A = getattr(asm, row["op"])()
        err = float(abs(A - B).max() / abs(B).max())
        del B
        row.update(t_coo=t_coo, t_probe=t_probe, gbs=gbs, coo_rel_diff=err,
                   rss_ours=rss_ours, rss_all=peak_rss_bytes(), threads=numba.get_num_threads(),
                   t_import=t_import)
    return rows


# ----------------------------------------------------------------------------
# table
# ----------------------------------------------------------------------------
COLUMNS = [
    ("case", "case", "{}"),
    ("op", "op", "{}"),
    ("n_dofs", "dofs", "{:,}"),
    ("nnz", "nnz", "{:,}"),
    ("t_mesh", "mesh+disc s", "{:.3f}"),
    ("t_sym", "symbolic s", "{:.3f}"),
    ("t_first", "first s", "{:.3f}"),
    ("t_warm", "warm s", "{:.4f}"),
    ("t_inplace", "in-place s", "{:.4f}"),
    ("t_coo", "COO s", "{:.3f}"),
    ("t_probe", "probe s", "{:.4f}"),
    ("gbs", "probe GB/s", "{:.1f}"),
    ("r_coo", "COO/ours", "{:.1f}"),
    ("r_probe", "ours/probe", "{:.1f}"),
    ("csr_mb", "CSR MB", "{:.1f}"),
    ("plan_mb", "plan MB", "{:.1f}"),
    ("rss_ours_mb", "RSS ours MB", "{:.0f}"),
    ("rss_all_mb", "RSS +COO MB", "{:.0f}"),
    ("coo_rel_diff", "max rel diff", "{:.1e}"),
]


def table(rows):
    for r in rows:
        r["r_coo"] = r["t_coo"] / r["t_warm"]
        r["r_probe"] = r["t_warm"] / r["t_probe"]
        r["csr_mb"] = r["csr_bytes"] / 2**20
        r["plan_mb"] = r["plan_bytes"] / 2**20
        r["rss_ours_mb"] = r["rss_ours"] / 2**20
        r["rss_all_mb"] = r["rss_all"] / 2**20
    cells = [[h for _, h, _ in COLUMNS]]
    cells += [[fmt.format(r[key]) for key, _, fmt in COLUMNS] for r in rows]
    widths = [max(len(c[j]) for c in cells) for j in range(len(COLUMNS))]
    lines = []
    for i, c in enumerate(cells):
        lines.append("| " + " | ".join(v.rjust(w) if j > 1 else v.ljust(w)
                                       for j, (v, w) in enumerate(zip(c, widths))) + " |")
        if i == 0:
            lines.append("|" + "|".join("-" * (w + 2) for w in widths) + "|")
    return "\n".join(lines)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scale", type=float, default=1.0,
                    help="fraction of the full (~1M dof) size, e.g. 0.1 for a quick run")
    ap.add_argument("--cases", default=",".join(CASES),
                    help=f"comma-separated subset of {', '.join(CASES)}")
    ap.add_argument("--repeat", type=int, default=3, help="best of this many (ours, probe)")
    ap.add_argument("--coo-repeat", type=int, default=1,
                    help="best of this many for the NumPy/SciPy baseline")
    ap.add_argument("--json", metavar="FILE", help="also write the raw rows as JSON")
    ap.add_argument("--worker", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if not 0 < args.scale <= 4:
        ap.error("--scale must be in (0, 4]")
    if args.repeat < 1 or args.coo_repeat < 1:
        ap.error("--repeat and --coo-repeat must be >= 1")
    if args.worker:
        json.dump(run_case(args.worker, args.scale, args.repeat, args.coo_repeat), sys.stdout)
        return 0
    names = [c.strip() for c in args.cases.split(",") if c.strip()]
    unknown = sorted(set(names) - set(CASES))
    if unknown:
        ap.error(f"unknown case(s) {unknown}; choose from {list(CASES)}")
    rows = []
    t0 = time.perf_counter()
    for name in names:
        cmd = [sys.executable, os.path.abspath(__file__), "--worker", name,
               "--scale", repr(args.scale), "--repeat", str(args.repeat),
               "--coo-repeat", str(args.coo_repeat)]
        res = subprocess.run(cmd, capture_output=True, text=True)
        if res.returncode != 0:
            sys.stderr.write(res.stderr)
            print(f"case {name} failed (exit {res.returncode})", file=sys.stderr)
            return 1
        rows += json.loads(res.stdout)
    total = time.perf_counter() - t0
    threads = rows[0]["threads"] if rows else "?"
    print(f"galerkit assembly vs NumPy/SciPy COO | scale {args.scale:g} | numba threads "
          f"{threads} | {os.cpu_count()} CPUs | best of {args.repeat} (COO best of "
          f"{args.coo_repeat}) | total {total:.0f} s")
    print(table(rows))
    if args.json:
        with open(args.json, "w") as fh:
            json.dump(rows, fh, indent=1)
    return 0


if __name__ == "__main__":
    sys.exit(main())
