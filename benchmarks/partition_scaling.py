"""Partition quality for 2..64 parts, and a scaling estimate on paper.

Partitions a P1 box of tetrahedra into 2, 4, ..., 64 parts without running
that many ranks (:func:`galerkit.bindings.distributed.partition.partition_report`), prints
balance, cut facets and halo sizes, fits the halo law
``ghosts per rank = c * (dofs per rank)^(2/3)`` (surface over volume of a
compact part; common practice), and extrapolates memory per rank and
communication volume per matrix-vector product to 10^7..10^9 dofs.

    python benchmarks/partition_scaling.py [--size 60] [--bytes-per-dof 1500]

``--bytes-per-dof`` is the peak memory per dof of one rank, measured with
``benchmarks/compare_mpi.py`` (peak RSS per rank over dofs per rank).
"""

from __future__ import annotations

import argparse
import time

import numpy as np


def main(argv=None):
    import galerkit as gk
    from galerkit.bindings.distributed.partition import partition_cells, partition_report

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=int, default=60, help="cells per axis of the box")
    ap.add_argument("--bytes-per-dof", type=float, default=None,
                    help="measured peak bytes per dof of one rank (compare_mpi.py)")
    ap.add_argument("--root-bytes-per-dof", type=float, default=None,
                    help="measured extra peak bytes per global dof on rank 0, which holds "
                    "the global mesh during set-up (compare_mpi.py)")
    args = ap.parse_args(argv)
    disc = gk.Discretization(gk.structured_tetrahedra(args.size, args.size, args.size), 1)
    print(f"P1 box {args.size}^3: {disc.n_dofs} dofs, {disc.mesh.n_cells} cells\n")
    print(f"{'parts':>5s} {'cell bal':>8s} {'dof bal':>8s} {'cut facets':>10s} "
          f"{'ghosts max':>10s} {'ghost %':>8s} {'nbrs max':>8s} {'seconds':>8s}")
    per_rank, ghosts = [], []
    for p in (2, 4, 8, 16, 32, 64):
        t0 = time.perf_counter()
        rep = partition_report(disc, partition_cells(disc.mesh, p), p)
        dt = time.perf_counter() - t0
        q = rep.as_dict()
        print(f"{p:5d} {q['cell_balance']:8.3f} {q['dof_balance']:8.3f} {q['cut_facets']:10d} "
              f"{q['ghosts_max']:10d} {100 * q['ghost_fraction']:8.2f} "
              f"{q['neighbours_max']:8d} {dt:8.2f}")
        if p >= 8:  # interior parts: the 3D surface law applies
            per_rank.append(disc.n_dofs / p)
            ghosts.append(rep.ghosts.max())
    c = float(np.exp(np.mean(np.log(np.array(ghosts) / np.array(per_rank) ** (2 / 3)))))
    print(f"\nfit: ghosts per rank (largest) = {c:.2f} * (dofs per rank)^(2/3)")
    print("\nestimate on paper, P1" + (f", {args.bytes_per_dof:.0f} bytes per dof per rank"
                                       if args.bytes_per_dof else "")
          + (f", rank 0 set-up {args.root_bytes_per_dof:.0f} bytes per global dof"
             if args.root_bytes_per_dof else ""))
    print(f"{'dofs':>8s} {'ranks':>6s} {'dofs/rank':>10s} {'memory/rank':>12s} "
          f"{'rank 0 extra':>12s} {'ghosts/rank':>12s} {'halo/rank':>10s} {'halo total':>11s}")

    def gib(b):
        return f"{b / 2**30:.2f} GiB"

    for n in (1e7, 1e8, 1e9):
        for dpr in (2.5e5, 1e6):
            p = int(n / dpr)
            g = c * dpr ** (2 / 3)
            mem = gib(args.bytes_per_dof * dpr) if args.bytes_per_dof else "-"
            root = gib(args.root_bytes_per_dof * n) if args.root_bytes_per_dof else "-"
            print(f"{n:8.0e} {p:6d} {dpr:10.0f} {mem:>12s} {root:>12s} {g:12.0f} "
                  f"{8 * g / 1e6:8.2f} MB {8 * g * p / 1e6:8.1f} MB")
    print("\nhalo: bytes received per rank, and by all ranks, in one matrix-vector product "
          "(8 bytes per ghost value); a CG iteration with GAMG does several")
    return 0


if __name__ == "__main__":
    main()
