"""Ways to lower the operator complexity of ``cg-amg`` on P1 systems, measured side by side.

Each variant replaces one set-up step of :mod:`galerkit.multigrid` for the
duration of one build (the module's functions are swapped and restored), so
the rest of the hierarchy, the V-cycle and the compiled CG loop are ours as
they stand.  The replacements are prototypes in NumPy/SciPy: their set-up seconds
include that overhead, the operator
complexity and iteration counts are what a compiled version would give.

Variants:

* ``base``: the solver as it is;
* ``trunc-E``: truncation of the smoothed prolongator, every level: entries
  ``|p_ij| < E max_j |p_ij|`` dropped, the row rescaled to its old row sum
  (Stüben, "A review of algebraic multigrid", J. Comput. Appl. Math. 128,
  2001, interpolation truncation); ``trunc0-E``: the same on the first
  level only;
* ``pmax0-K``: the first level's prolongator rows keep their ``K`` largest
  entries (the same paper's second form of truncation), rescaled likewise;
* ``aggagg-s2``: aggregates of aggregates on the first level (the tentative
  coarse operator ``P0^T A P0`` aggregated again with the same rule), the
  prolongator smoothed twice, as larger aggregates need (Vaněk, Mandel &
  Brezina, Computing 56, 1996);
* ``radius2``: first-level aggregates of radius 2 in the strong graph (the
  root, its strong neighbours and their untouched strong neighbours; pass 2
  and 3 as before): ``aggregate_radius=2``, compiled; ``auto`` the default
  rule (radius 2 where the tentative coarse pattern exceeds 8 entries per
  row: on tetrahedra, not on triangles); ``base`` is ``aggregate_radius=1``;
* ``...-d3``: the same with Chebyshev degree 3 on the finest level.

Not in the table because they cannot change it here: the filtered matrix
``A^F`` of Vaněk, Mandel & Brezina (1996) to smooth the prolongator equals A
on these meshes (every non-zero off-diagonal entry of the structured P1
matrices is the same number, printed at start, so either all couplings are
strong or none); a cheaper coarse-level smoother changes times, not the
operator complexity.

Usage::

    python benchmarks/aggregation_variants.py --case 3d     # 1M dofs, one process
    python benchmarks/aggregation_variants.py --case 2d --scale 0.1
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time

import numba as nb
import numpy as np
import scipy.sparse as sp

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

import galerkit.multigrid as mg  # noqa: E402
from compare_solvers import system  # noqa: E402

_P = mg._smoothed_prolongator
_AGG = mg._aggregate


class _Once:
    """Apply ``first`` on the first call of a build, ``rest`` afterwards."""

    def __init__(self, first, rest):
        self.first, self.rest, self.used = first, rest, False

    def __call__(self, *a):
        f = self.rest if self.used else self.first
        self.used = True
        return f(*a)


def _csr_triplet(Q):
    Q = sp.csr_matrix(Q)
    Q.sort_indices()
    return (np.ascontiguousarray(Q.indptr, np.int64), np.ascontiguousarray(Q.indices, np.int32),
            np.ascontiguousarray(Q.data, np.float64))


def _rescaled(p_ptr, p_ind, p_val, n_agg, keep):
    n = p_ptr.shape[0] - 1
    rows = np.repeat(np.arange(n), np.diff(p_ptr))
    s_all = np.bincount(rows, p_val, n)
    s_keep = np.bincount(rows[keep], p_val[keep], n)
    scale = np.divide(s_all, s_keep, out=np.ones(n), where=s_keep != 0)
    return _csr_triplet(sp.csr_matrix((p_val[keep] * scale[rows[keep]],
                                       (rows[keep], p_ind[keep])), shape=(n, n_agg)))


def truncated(eps):
    def prolongator(indptr, indices, data, l1, omega, agg, n_agg):
        p_ptr, p_ind, p_val = _P(indptr, indices, data, l1, omega, agg, n_agg)
        rows = np.repeat(np.arange(p_ptr.shape[0] - 1), np.diff(p_ptr))
        a = np.abs(p_val)
        rmax = np.maximum.reduceat(a, p_ptr[:-1])
        return _rescaled(p_ptr, p_ind, p_val, n_agg, a >= eps * rmax[rows])
    return prolongator


def largest(kmax):
    def prolongator(indptr, indices, data, l1, omega, agg, n_agg):
        p_ptr, p_ind, p_val = _P(indptr, indices, data, l1, omega, agg, n_agg)
        rows = np.repeat(np.arange(p_ptr.shape[0] - 1), np.diff(p_ptr))
        order = np.lexsort((np.arange(p_val.size), -np.abs(p_val), rows))
        rank = np.empty(p_val.size, np.int64)
        rank[order] = np.arange(p_val.size) - p_ptr[rows[order]]
        return _rescaled(p_ptr, p_ind, p_val, n_agg, rank < kmax)
    return prolongator


def smoothed_twice(indptr, indices, data, l1, omega, agg, n_agg):
    p_ptr, p_ind, p_val = _P(indptr, indices, data, l1, omega, agg, n_agg)
    n = indptr.shape[0] - 1
    A = sp.csr_matrix((data, indices, indptr), shape=(n, n))
    P = sp.csr_matrix((p_val, p_ind, p_ptr), shape=(n, n_agg))
    return _csr_triplet(P - sp.diags(omega / l1) @ (A @ P))


def aggregates_of_aggregates(indptr, indices, data, diag, theta, radius):
    a0, n0 = _AGG(indptr, indices, data, diag, theta, radius)
    n = indptr.shape[0] - 1
    A = sp.csr_matrix((data, indices, indptr), shape=(n, n))
    P0 = sp.csr_matrix((np.ones(n), (np.arange(n), a0)), shape=(n, n0))
    Ac = sp.csr_matrix(P0.T @ A @ P0)
    Ac.sort_indices()
    a1, n1 = _AGG(Ac.indptr.astype(np.int64), Ac.indices.astype(np.int32), Ac.data,
                  Ac.diagonal().copy(), theta, radius)
    return a1[a0].astype(np.int32), n1


#: name: (prolongator factory or None, aggregation factory or None, finest degree or None,
#:        aggregate_radius)
VARIANTS = {
    "base": (None, None, None, 1),
    "trunc-0.2": (lambda: truncated(0.2), None, None, 1),
    "trunc-0.26": (lambda: truncated(0.26), None, None, 1),
    "trunc0-0.26": (lambda: _Once(truncated(0.26), _P), None, None, 1),
    "trunc0-0.26-d3": (lambda: _Once(truncated(0.26), _P), None, 3, 1),
    "pmax0-3": (lambda: _Once(largest(3), _P), None, None, 1),
    "aggagg-s2": (lambda: _Once(smoothed_twice, _P),
                  lambda: _Once(aggregates_of_aggregates, _AGG), None, 1),
    "aggagg-s2-d3": (lambda: _Once(smoothed_twice, _P),
                     lambda: _Once(aggregates_of_aggregates, _AGG), 3, 1),
    "radius2": (None, None, None, 2),
    "radius2-d3": (None, None, 3, 2),
    "auto": (None, None, None, "auto"),
}


def run(A, b, name, reps=2):
    make_p, make_agg, fine_degree, radius = VARIANTS[name]
    ptr, ind = A.indptr.astype(np.int64), A.indices.astype(np.int32)
    times = []
    try:
        for _ in range(reps):
            mg._smoothed_prolongator = make_p() if make_p else _P
            mg._aggregate = make_agg() if make_agg else _AGG
            t = time.perf_counter()
            h = mg.build_hierarchy(A, aggregate_radius=radius)
            if fine_degree:
                h._levels[0].degree = fine_degree
                h._pack()
            t_setup = time.perf_counter() - t
            t = time.perf_counter()
            x, _, k, status = h.pcg(ptr, ind, A.data, b, None, 1e-8, 500, 5)
            times.append((t_setup, time.perf_counter() - t))
    finally:
        mg._smoothed_prolongator, mg._aggregate = _P, _AGG
    res = float(np.linalg.norm(b - A @ x) / np.linalg.norm(b))
    lv = h.levels
    return {"variant": name, "op_complexity": round(h.operator_complexity, 3),
            "iterations": k, "setup_s": [round(s, 3) for s, _ in times],
            "solve_s": [round(s, 3) for _, s in times], "level1_rows": lv[1]["n"],
            "level1_entries_per_row": round(lv[1]["nnz"] / lv[1]["n"], 1),
            "residual": res, "status": status}


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--case", choices=("3d", "2d"), default="3d")
    ap.add_argument("--scale", type=float, default=1.0)
    ap.add_argument("--variants", default=",".join(VARIANTS))
    args = ap.parse_args(argv)
    dim = 3 if args.case == "3d" else 2
    names = args.variants.split(",")
    unknown = sorted(set(names) - set(VARIANTS))
    if unknown:
        ap.error(f"unknown variants {unknown}; choose from {sorted(VARIANTS)}")
    n = max(4, round((99 if dim == 3 else 999) * args.scale ** (1.0 / dim)))
    wa, wb, _ = system(dim, 1, 12 if dim == 3 else 30)   # loads / compiles the kernels
    for name in names:
        run(wa, wb, name, reps=1)
    rows = np.repeat(np.arange(wa.shape[0]), np.diff(wa.indptr))
    off = wa.data[(wa.data != 0) & (rows != wa.indices)]
    A, b, _ = system(dim, 1, n)
    print(json.dumps({"case": args.case, "dofs": A.shape[0], "nonzeros": int(np.count_nonzero(A.data)),
                      "distinct_offdiagonal_nonzeros": np.unique(np.round(off, 12)).tolist(),
                      "threads": nb.get_num_threads(), "load": os.getloadavg()}), flush=True)
    for name in names:
        print(json.dumps(run(A, b, name)), flush=True)


if __name__ == "__main__":
    main()
