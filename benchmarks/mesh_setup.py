"""Where the time of mesh set-up goes, step by step, at about a million vertices.

Mesh set-up is what a structured generator does (vertex grid, cell table,
validation of the cells, volumes and orientation, the facet pass, regions,
the side tags) plus the mesh work the solve path triggers later (the
connected components, the boundary dofs from the tagged facets).  Each step
is timed by wrapping the functions that carry it (inclusive seconds, best of
``--repeat`` after one untimed warm-up run, so the numba cache is loaded);
``generator arrays`` is what the generator spends outside the named steps.

A memory-bandwidth probe (``numpy.copyto`` of the cell table's size, best of
``--repeat``) gives the floor each step is compared with: ``x probe`` is the
step's seconds over the seconds of one copy of the cell table (read + write).

``--source DIR`` imports galerkit from another checkout's ``kernel/`` folder
(e.g. an exported earlier commit), so two versions can be compared side by
side, each in its own process::

    git archive <commit> kernel | tar -x -C /tmp/before
    python benchmarks/mesh_setup.py --source /tmp/before --json before.json
    python benchmarks/mesh_setup.py --json after.json --against before.json
"""

from __future__ import annotations

import argparse
import importlib.util
import json
import os
import sys
import time

#: name -> (dimension, cells per axis): about 1M vertices each
CASES = {"3D": (3, 99), "2D": (2, 999)}

#: (module, attribute, step name): the functions wrapped and timed
STEPS = [
    ("generators", "check_mesh_memory", "memory guard"),
    ("generators", "_grid_points", "vertex grid"),
    ("generators", "_cell_table", "cell table"),
    ("mesh", "_as_points", "points: validate"),
    ("mesh", "_planar", "points: planar"),
    ("mesh", "_cells_and_use", "cells: check + copy"),
    ("mesh", "_orient_cells", "volumes + orientation"),
    ("mesh", "_validate_cells", "cells: one pass"),
    ("mesh", "facet_topology", "facet pass"),
    ("mesh", "boundary_topology", "facet pass"),
    ("mesh", "as_region_ids", "regions"),
    ("generators", "_tag_box", "side tags"),
    ("mesh", "Mesh.set_facet_tag", "set_facet_tag"),
    ("mesh", "Mesh.facet_midpoints", "facet midpoints"),
]


def load_galerkit(source):
    """Import ``source/kernel`` as the package ``galerkit`` (before anything else)."""
    kernel = os.path.join(os.path.abspath(source), "kernel")
    spec = importlib.util.spec_from_file_location(
        "galerkit", os.path.join(kernel, "__init__.py"), submodule_search_locations=[kernel])
    mod = importlib.util.module_from_spec(spec)
    sys.modules["galerkit"] = mod
    spec.loader.exec_module(mod)
    return mod


#: the clock: wall seconds, or with ``--cpu`` the CPU seconds of all threads of the
#: process (steadier on a loaded machine; a parallel step counts every thread's time)
CLOCK = [time.perf_counter]


class Timer:
    def __init__(self):
        self.seconds = {}

    def wrap(self, owner, attr, name):
        fn = getattr(owner, attr)

        def timed(*args, **kwargs):
            t = CLOCK[0]()
            try:
                return fn(*args, **kwargs)
            finally:
                self.seconds[name] = self.seconds.get(name, 0.0) + CLOCK[0]() - t

        setattr(owner, attr, timed)


def instrument(gk, timer):
    import importlib

    for modname, attr, name in STEPS:
        mod = importlib.import_module(f"galerkit.{modname}")
        owner = mod
        if "." in attr:
            cls, attr = attr.split(".")
            owner = getattr(mod, cls)
        if hasattr(owner, attr):
            timer.wrap(owner, attr, name)


def run_case(gk, dim, n):
    timer = Timer()
    instrument(gk, timer)
    t = CLOCK[0]()
    mesh = gk.structured_tetrahedra(n, n, n) if dim == 3 else gk.structured_triangles(n, n)
    total = CLOCK[0]() - t
    named = sum(v for k, v in timer.seconds.items()
                if k not in ("set_facet_tag", "facet midpoints"))
    row = dict(timer.seconds)
    row["generator arrays"] = total - named
    row["generator total"] = total
    t = CLOCK[0]()
    mesh.connected_components()
    row["components (solve)"] = CLOCK[0]() - t
    disc = gk.Discretization(mesh, 1)
    t = CLOCK[0]()
    disc.boundary_dofs()
    row["boundary dofs (solve)"] = CLOCK[0]() - t
    row["set-up total"] = total + row["components (solve)"] + row["boundary dofs (solve)"]
    return row, mesh


def probe(mesh, repeat):
    import numpy as np

    src = np.array(mesh.cells)
    dst = np.empty_like(src)
    best = float("inf")
    for _ in range(repeat):
        t = CLOCK[0]()
        np.copyto(dst, src)
        best = min(best, CLOCK[0]() - t)
    return best, 2 * src.nbytes / best / 1e9


def fingerprint(mesh):
    """A digest of everything mesh set-up produces (compared between versions)."""
    import hashlib

    import numpy as np

    h = hashlib.sha256()
    for a in (mesh.points, mesh.cells, mesh.cell_volumes, mesh.boundary_facets,
              mesh.boundary_facet_cells, mesh.boundary_facet_local, mesh.regions,
              mesh.connected_components()[1]):
        h.update(np.ascontiguousarray(a).tobytes())
    for name in sorted(mesh.facet_groups):
        h.update(name.encode())
        h.update(np.ascontiguousarray(mesh.facet_groups[name]).tobytes())
    h.update(str((mesh.n_facets, mesh.n_reoriented)).encode())
    return h.hexdigest()[:16]


def _shuffled(points, cells, seed):
    """The same mesh with vertices renumbered, cells permuted and each cell's
    vertices in a random order (half the cells negatively oriented)."""
    import numpy as np

    rng = np.random.default_rng(seed)
    new = rng.permutation(points.shape[0])
    pts = np.empty_like(points)
    pts[new] = points
    c = new[cells][rng.permutation(cells.shape[0])]
    return pts, np.ascontiguousarray(np.take_along_axis(
        c, np.argsort(rng.random(c.shape), axis=1), axis=1))


def output_meshes(gk):
    """name -> callable building a mesh (or raising): the meshes whose set-up
    results are compared between two versions (``--outputs``)."""
    import numpy as np
    from scipy.spatial import Delaunay

    rng = np.random.default_rng(7)
    p2 = rng.random((3000, 2))
    p3 = rng.random((800, 3))
    t2 = Delaunay(p2).simplices
    t3 = Delaunay(p3).simplices
    sq = gk.structured_triangles(1, 1)
    # many cells around one vertex (a bucket of hundreds of facets)
    a = np.linspace(0, 2 * np.pi, 301)[:-1]
    fan_p = np.vstack([[0.0, 0.0], np.c_[np.cos(a), np.sin(a)]])
    fan_t = np.c_[np.zeros(300, int), 1 + np.arange(300), 1 + (np.arange(300) + 1) % 300]
    a = np.linspace(0, 2 * np.pi, 201)[:-1]
    cone_p = np.vstack([[0.0, 0.0, 0.0], [0.0, 0.0, 1.0], np.c_[np.cos(a), np.sin(a), 0 * a]])
    cone_t = np.c_[np.zeros(200, int), np.ones(200, int), 2 + np.arange(200),
                   2 + (np.arange(200) + 1) % 200]
    cases = {
        "tri 7x5": lambda: gk.structured_triangles(7, 5),
        "tri 60x41": lambda: gk.structured_triangles(60, 41, (-1, 2), (3, 2.5)),
        "tet 4x3x5": lambda: gk.structured_tetrahedra(4, 3, 5),
        "tet 13x12x11": lambda: gk.structured_tetrahedra(13, 12, 11, (0, 0, -1), (2, 1, 1)),
        "l-shape 9": lambda: gk.l_shaped_triangles(9),
        "refined tet": lambda: gk.refine_uniform(gk.structured_tetrahedra(3, 2, 3)),
        "refined tri": lambda: gk.refine_uniform(gk.refine_uniform(gk.structured_triangles(5, 4))),
        "fan 300": lambda: gk.Mesh(fan_p, fan_t),
        "cone 3D 200": lambda: gk.Mesh(cone_p, cone_t),
        "bad: fan folded": lambda: gk.Mesh(np.vstack([fan_p, [[0.5, 0.01]]]),
                                           np.vstack([fan_t, [[0, 1, 301]]])),
        "regions": lambda: gk.structured_tetrahedra(
            6, 6, 6, regions=lambda x: (x[0] > 0.5).astype(int)),
        "delaunay 2D": lambda: gk.Mesh(p2, t2),
        "delaunay 3D": lambda: gk.Mesh(p3, t3),
        "delaunay 2D shuffled": lambda: gk.Mesh(*_shuffled(p2, t2, 1)),
        "delaunay 3D shuffled": lambda: gk.Mesh(*_shuffled(p3, t3, 2)),
        "tet shuffled": lambda: gk.Mesh(*_shuffled(
            gk.structured_tetrahedra(5, 4, 3).points, gk.structured_tetrahedra(5, 4, 3).cells, 3)),
        "bad: duplicate cell": lambda: gk.Mesh(p2, np.concatenate([t2, t2[5:6]])),
        "bad: duplicate cell 3D": lambda: gk.Mesh(p3, np.concatenate([t3[:40], t3[10:11, ::-1],
                                                                      t3[40:]])),
        "bad: three on a facet": lambda: gk.Mesh([[0, 0], [1, 0], [0, 1], [1, 1], [-1, -1]],
                                                 [[0, 1, 2], [1, 3, 2], [1, 2, 4]]),
        "bad: folded": lambda: gk.Mesh([[0, 0], [1, 0], [0, 1], [0.4, 0.4]],
                                       [[0, 1, 2], [1, 2, 3]]),
        "bad: degenerate": lambda: gk.Mesh([[0, 0], [1, 0], [2, 0], [0, 1]],
                                           [[0, 1, 2], [0, 1, 3]]),
        "bad: unused vertex": lambda: gk.Mesh(np.vstack([sq.points, [[5, 5]]]), sq.cells),
        "bad: out of range": lambda: gk.Mesh(sq.points, [[0, 1, 2], [1, 3, 4]]),
        "bad: negative index": lambda: gk.Mesh(sq.points, [[0, 1, 2], [1, 3, -1]]),
        "bad: repeated vertex": lambda: gk.Mesh(sq.points, [[0, 1, 2], [1, 3, 3]]),
        "bad: int64 out of range": lambda: gk.Mesh(sq.points, np.array([[0, 1, 2], [1, 3, 2**40]])),
        "bad: uint64": lambda: gk.Mesh(sq.points, np.array([[0, 1, 2], [1, 3, 2**63]],
                                                           dtype=np.uint64)),
        "bad: non-finite": lambda: gk.Mesh([[0, 0], [1, np.nan], [0, 1]], [[0, 1, 2]]),
        "bad: coincident": lambda: gk.Mesh([[0, 0], [1, 0], [0, 1], [1, 0], [1, 1]],
                                           [[0, 1, 2], [3, 4, 2]]),
        "bad: float cells": lambda: gk.Mesh(sq.points, sq.cells.astype(float)),
    }
    return cases


def outputs(source):
    """Digest of each mesh of :func:`output_meshes`, or its error message."""
    gk = load_galerkit(source) if source else __import__("galerkit")
    res = {}
    for name, make in output_meshes(gk).items():
        try:
            res[name] = fingerprint(make())
        except Exception as exc:  # the message is what is compared
            res[name] = f"{type(exc).__name__}: {exc}"
    return res


def measure(source, cases, scale, repeat):
    gk = load_galerkit(source) if source else __import__("galerkit")
    import numba

    out = {"source": source or "this checkout", "threads": numba.get_num_threads(),
           "clock": CLOCK[0].__name__, "cases": {}}
    for name in cases:
        dim, full = CASES[name]
        n = max(2, int(round((full + 1) * scale ** (1.0 / dim))) - 1)
        best = {}
        run_case(gk, dim, max(2, n // 8))  # untimed: numba cache load
        for _ in range(repeat):
            row, mesh = run_case(gk, dim, n)
            for k, v in row.items():
                best[k] = min(best.get(k, float("inf")), v)
        t_probe, gbs = probe(mesh, repeat)
        best["probe (cell table copy)"] = t_probe
        out["cases"][name] = {"n": n, "vertices": mesh.n_vertices, "cells": mesh.n_cells,
                              "gbs": gbs, "seconds": best, "digest": fingerprint(mesh)}
        del mesh
    return out


def table(after, before=None):
    lines = []
    for name, case in after["cases"].items():
        old = before["cases"].get(name) if before else None
        lines.append(f"\n{name}: {case['vertices']} vertices, {case['cells']} cells, "
                     f"{after['threads']} threads, {after.get('clock', 'perf_counter')}, probe {case['gbs']:.1f} GB/s, "
                     f"digest {case['digest']}"
                     + (f" (before: {old['digest']}, "
                        f"{'same' if old['digest'] == case['digest'] else 'DIFFERENT'})"
                        if old else ""))
        tp = case["seconds"]["probe (cell table copy)"]
        head = "| step | s | x probe |" + (" before s | before/after |" if old else "")
        lines += [head, "|---" * (head.count("|") - 1) + "|"]
        keys = list(case["seconds"])
        if old:
            keys += [k for k in old["seconds"] if k not in keys]
        for k in keys:
            s = case["seconds"].get(k)
            cells = [k, f"{s:.4f}" if s is not None else "-",
                     f"{s / tp:.1f}" if s is not None else "-"]
            if old:
                b = old["seconds"].get(k)
                cells += [f"{b:.4f}" if b is not None else "-",
                          f"{b / s:.1f}" if (b is not None and s) else "-"]
            lines.append("| " + " | ".join(cells) + " |")
    return "\n".join(lines)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--source", help="checkout whose kernel/ to import as galerkit")
    ap.add_argument("--cases", default=",".join(CASES))
    ap.add_argument("--scale", type=float, default=1.0)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--json", help="write the measurements here")
    ap.add_argument("--against", help="a --json file of another version, for the ratio")
    ap.add_argument("--cpu", action="store_true",
                    help="CPU seconds of the process (all threads) instead of wall seconds")
    ap.add_argument("--outputs", action="store_true",
                    help="digests (or error messages) of small meshes, not timings")
    args = ap.parse_args(argv)
    if args.cpu:
        CLOCK[0] = time.process_time
    if args.outputs:
        res = outputs(args.source)
        if args.json:
            with open(args.json, "w") as f:
                json.dump(res, f, indent=1)
        if args.against:
            with open(args.against) as f:
                before = json.load(f)
            diff = [k for k in res if before.get(k) != res[k]]
            for k in res:
                print(f"{'same' if k not in diff else 'DIFFERENT'}: {k}: {res[k][:100]}")
            print(f"{len(res) - len(diff)} of {len(res)} the same")
            return 1 if diff else 0
        print(json.dumps(res, indent=1))
        return 0
    res = measure(args.source, args.cases.split(","), args.scale, args.repeat)
    if args.json:
        with open(args.json, "w") as f:
            json.dump(res, f, indent=1)
    before = None
    if args.against:
        with open(args.against) as f:
            before = json.load(f)
    print(table(res, before))
    return 0


if __name__ == "__main__":
    sys.exit(main())
