"""asv benchmarks of mesh set-up, dof numbering and assembly.

Sizes: about one million dofs per case at full size.  The environment
variable ``GALERKIT_BENCH_SCALE`` (default 1) scales the number of dofs,
e.g. ``GALERKIT_BENCH_SCALE=0.01`` for a smoke run.

Cases: ``tri-P1`` (structured_triangles(999, 999)), ``tet-P1``
(structured_tetrahedra(99, 99, 99)), ``tet-P2`` (structured_tetrahedra(50, 50, 50)).
"""

from __future__ import annotations

import os

import numpy as np

import galerkit as gk

#: name -> (dimension, degree, cells per axis at full size)
CASES = {
    "tri-P1": (2, 1, 999),
    "tet-P1": (3, 1, 99),
    "tet-P2": (3, 2, 50),
}
CASE_NAMES = list(CASES)


def scale():
    try:
        s = float(os.environ.get("GALERKIT_BENCH_SCALE", "1"))
    except ValueError:
        raise ValueError("GALERKIT_BENCH_SCALE must be a number, e.g. 0.01") from None
    if not 0 < s <= 4:
        raise ValueError(f"GALERKIT_BENCH_SCALE must be in (0, 4], got {s}")
    return s


def build_mesh(case):
    dim, _, full = CASES[case]
    n = max(2, int(round((full + 1) * scale() ** (1.0 / dim))) - 1)
    return gk.structured_triangles(n, n) if dim == 2 else gk.structured_tetrahedra(n, n, n)


def build_disc(case):
    return gk.Discretization(build_mesh(case), CASES[case][1])


class MeshAndDofs:
    """Mesh generation (with validation and boundary tagging) and dof numbering."""

    params = CASE_NAMES
    param_names = ["case"]
    timeout = 600
    number = 1
    repeat = (1, 3, 60.0)

    def setup(self, case):
        self.mesh = build_mesh(case)

    def time_mesh(self, case):
        build_mesh(case)

    def time_discretization(self, case):
        # a fresh mesh copy is not needed: Discretization does not modify it
        gk.Discretization(self.mesh, CASES[case][1])

    def peakmem_mesh_and_discretization(self, case):
        build_disc(case)


class MeshSetUp:
    """Mesh set-up warm (numba's cache loaded in setup), step by step: the whole
    generator (validation, facet pass, tags), the facet pass alone, and the
    connected components the solve path asks for (see benchmarks/mesh_setup.py
    for the per-step table)."""

    params = ["tri-P1", "tet-P1"]
    param_names = ["case"]
    timeout = 600
    number = 1
    repeat = (2, 5, 60.0)

    def setup(self, case):
        self.mesh = build_mesh(case)

    def time_generator(self, case):
        build_mesh(case)

    def time_facet_pass(self, case):
        from galerkit.topology import facet_topology

        facet_topology(self.mesh.cells, self.mesh.n_vertices)

    def time_components(self, case):
        type(self.mesh)._components.func(self.mesh)  # uncached

    def peakmem_generator(self, case):
        build_mesh(case)


class SymbolicPhase:
    """Assembler construction: CSR pattern, cell order, position map."""

    params = CASE_NAMES
    param_names = ["case"]
    timeout = 600
    number = 1
    repeat = (1, 3, 60.0)

    def setup(self, case):
        self.disc = build_disc(case)
        gk.Assembler(self.disc)  # numba cache load outside the timing

    def time_assembler(self, case):
        gk.Assembler(self.disc)

    def peakmem_assembler(self, case):
        gk.Assembler(self.disc)

    def track_plan_bytes(self, case):
        m = gk.Assembler(self.disc).memory_bytes()
        return m["cell_order"] + m["position_map"]

    track_plan_bytes.unit = "bytes"

    def track_pattern_bytes(self, case):
        m = gk.Assembler(self.disc).memory_bytes()
        return m["indptr"] + m["indices"]

    track_pattern_bytes.unit = "bytes"


class NumericPhase:
    """Stiffness and mass values: fresh matrix, and in-place re-assembly."""

    params = (CASE_NAMES, ["stiffness", "mass"])
    param_names = ["case", "operator"]
    timeout = 600
    number = 1
    repeat = (2, 5, 60.0)

    def setup(self, case, operator):
        self.asm = gk.Assembler(build_disc(case))
        self.op = getattr(self.asm, operator)
        self.A = self.op()  # warm: compiled kernels loaded, chunk plan built
        self.coef = np.random.default_rng(0).uniform(1.0, 2.0, self.asm.mesh.n_cells)

    def time_fresh(self, case, operator):
        self.op()

    def time_in_place(self, case, operator):
        self.op(self.coef, out=self.A)

    def time_callable_coefficient(self, case, operator):
        self.op(lambda x: 1.0 + x[0] * x[1])

    def peakmem_fresh(self, case, operator):
        self.op()


class LoadVector:
    """Load vectors: constant, callable and dof-vector sources."""

    params = CASE_NAMES
    param_names = ["case"]
    timeout = 600
    number = 1
    repeat = (2, 5, 60.0)

    def setup(self, case):
        self.asm = gk.Assembler(build_disc(case))
        self.u = np.ones(self.asm.n_dofs)
        self.b = self.asm.load(1.0)
        self.asm.load(self.u, out=self.b)

    def time_constant(self, case):
        self.asm.load(1.0, out=self.b)

    def time_callable(self, case):
        self.asm.load(lambda x: np.sin(x[0]), out=self.b)

    def time_dof_vector(self, case):
        self.asm.load(self.u, out=self.b)


class PartitionSetUp:
    """Rank 0's set-up of the petsc engine, without MPI: parts cut for 2 and 8 ranks."""

    params = (["tet-P1", "tet-P2"], [2, 8])
    param_names = ["case", "parts"]
    timeout = 600

    def setup(self, case, parts):
        mesh = build_mesh(case)
        self.problem = gk.PoissonProblem(mesh, source=1.0, dirichlet={"boundary": 0.0})
        self.degree = CASES[case][1]

    def time_prepare_parts(self, case, parts):
        from galerkit.bindings.distributed.petsc_engine import prepare_parts

        for _ in prepare_parts(self.problem, self.degree, parts)[1]:  # cut every part
            pass

    def peakmem_prepare_parts(self, case, parts):
        from galerkit.bindings.distributed.petsc_engine import prepare_parts

        for _ in prepare_parts(self.problem, self.degree, parts)[1]:  # cut every part
            pass
