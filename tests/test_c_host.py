"""Specification of the C entry points (galerkit.bindings.host.cfuncs, bindings/host/c/galerkit.h)
and of the embedded-Python C host (bindings/host/c/example_host.c).

References used below (each test names its own):

* the Assembler and the kernel functionals of this package (the cfuncs run
  the same kernels: equal to 1e-13 relative, in practice bitwise);
* the partition of unity of Lagrange bases (any FEM text): the load of a
  per-cell source f_c sums to sum_c f_c |T_c|;
* the C host checks closed-form P1 element matrices on right triangles
  (Hughes, The Finite Element Method, 2000: the 5-point stencil 4, -1 and
  the mass A/6, A/12), row sums, areas and exact norms of a linear field.

The first call of ``cfuncs.addresses()`` compiles the cfuncs (about a minute
on a small machine); afterwards they load from numba's cache in ~1 s, which
is what the C host test relies on.
"""

from __future__ import annotations

import os
import re
import shutil
import site
import subprocess
import sys
import sysconfig
from pathlib import Path

import numpy as np
import pytest

from galerkit import (Assembler, Discretization, h1_seminorm_error, l2_error,
                      structured_tetrahedra, structured_triangles)
from galerkit.bindings.host import cfuncs
from galerkit.mesh import Mesh

C_DIR = Path(__file__).resolve().parents[1] / "bindings" / "host" / "c"


def ptr(a):
    return a.ctypes.data


@pytest.fixture(scope="module")
def api():
    return {name: cfuncs.ctypes_function(name) for name in cfuncs.SIGNATURES}


def rel(a, b):
    return float(np.abs(np.asarray(a) - b).max() / max(np.abs(b).max(), 1e-300))


def host_arrays(dim, degree, seed=0):
    """A perturbed structured mesh: the Assembler and the host's int32 arrays."""
    mesh = structured_triangles(4, 3) if dim == 2 else structured_tetrahedra(2, 2, 2)
    points = np.array(mesh.points)
    inner = np.all((points > 1e-12) & (points < 1 - 1e-12), axis=1)
    rng = np.random.default_rng(seed)
    points[inner] += 0.05 * rng.uniform(-1, 1, (int(inner.sum()), dim))
    disc = Discretization(Mesh(points, mesh.cells), degree)
    cells = np.ascontiguousarray(disc.mesh.cells, dtype=np.int32)
    dofs = np.ascontiguousarray(disc.cell_dofs, dtype=np.int32)
    return Assembler(disc), points, cells, dofs


class CPattern:
    """The C symbolic phase on host-allocated arrays."""

    def __init__(self, api, n_dofs, dofs, n_chunks):
        m, k = dofs.shape
        self.n_chunks = n_chunks
        self.indptr = np.empty(n_dofs + 1, dtype=np.int32)
        self.nnz = api["galerkit_pattern_count"](n_dofs, m, k, ptr(dofs), n_chunks,
                                                 ptr(self.indptr))
        assert self.nnz > 0, cfuncs.describe_status(self.nnz)
        self.indices = np.empty(self.nnz, dtype=np.int32)
        self.order = np.empty(m, dtype=np.int32)
        self.posmap = np.empty((m, k, k), dtype=np.uint16)
        self.chunks = np.empty(3 * n_chunks + 1, dtype=np.int64)
        st = api["galerkit_pattern_fill"](n_dofs, m, k, ptr(dofs), n_chunks, ptr(self.indptr),
                                          ptr(self.indices), ptr(self.order), ptr(self.posmap),
                                          ptr(self.chunks))
        assert st == cfuncs.OK, cfuncs.describe_status(st)

    def tail(self):
        return (ptr(self.indptr), ptr(self.indices), ptr(self.order), ptr(self.posmap),
                self.n_chunks, ptr(self.chunks))


def matrix_call(fn, dim, degree, points, cells, n_dofs, dofs, values, pat, data):
    return fn(dim, degree, points.shape[0], ptr(points), cells.shape[0], ptr(cells), n_dofs,
              ptr(dofs), values.size, ptr(values), *pat.tail(), ptr(data))


def load_call(fn, dim, degree, points, cells, n_dofs, dofs, kind, source, pat, out):
    return fn(dim, degree, points.shape[0], ptr(points), cells.shape[0], ptr(cells), n_dofs,
              ptr(dofs), kind, ptr(source), ptr(pat.order), pat.n_chunks, ptr(pat.chunks),
              ptr(out))


# ----------------------------------------------------------------------------
# the header declares what the module compiles
# ----------------------------------------------------------------------------
def _normalise(text):
    return re.sub(r"\s+", " ", text).replace("( ", "(").replace(" )", ")").strip()


def test_header_declares_every_entry_point_with_the_compiled_signature():
    header = (C_DIR / "galerkit.h").read_text()
    typedefs = {m.group(2): _normalise(f"{m.group(1)} {m.group(2)}({m.group(3)})")
                for m in re.finditer(r"typedef\s+(\w+)\s+\(\*(\w+)_fn\)\s*\(([^;]*)\);", header)}
    assert sorted(typedefs) == sorted(cfuncs.SIGNATURES)
    for name, (_, proto) in cfuncs.SIGNATURES.items():
        assert typedefs[name] == _normalise(proto), name
    macros = dict(re.findall(r"#define\s+(GALERKIT_(?:OK|E_\w+))\s+(-?\d+)", header))
    assert {name: int(v) for name, v in macros.items()} == \
        {name: code for code, (name, _) in cfuncs.STATUS.items()}
    listed = re.search(r"GALERKIT_ENTRY_POINTS\(X\)(.*?)\n\n", header, re.S).group(1)
    assert sorted("galerkit_" + x for x in re.findall(r"X\((\w+)\)", listed)) == \
        sorted(cfuncs.SIGNATURES)


# ----------------------------------------------------------------------------
# ctypes calls against the Assembler
# ----------------------------------------------------------------------------
@pytest.mark.parametrize("dim,degree", [(2, 1), (2, 2), (3, 1), (3, 2)])
def test_ctypes_pattern_equals_the_assemblers(api, dim, degree):
    asm, points, cells, dofs = host_arrays(dim, degree)
    pat = CPattern(api, asm.n_dofs, dofs, n_chunks=3)
    assert np.array_equal(pat.indptr, asm.indptr) and np.array_equal(pat.indices, asm.indices)
    assert np.array_equal(pat.order, asm.order) and np.array_equal(pat.posmap, asm.posmap)
    rows = pat.chunks[:4]
    assert rows[0] == 0 and rows[-1] == asm.n_dofs and np.all(np.diff(rows) >= 0)


@pytest.mark.parametrize("dim,degree", [(2, 1), (2, 2), (3, 1), (3, 2)])
def test_ctypes_stiffness_mass_load_equal_the_assemblers(api, dim, degree):
    asm, points, cells, dofs = host_arrays(dim, degree, seed=1)
    n, m = asm.n_dofs, cells.shape[0]
    kappa = np.linspace(0.5, 2.0, m)
    for n_chunks in (1, 4):  # any number of row ranges: the same values, bitwise
        pat = CPattern(api, n, dofs, n_chunks)
        data = np.full(pat.nnz, np.nan)
        for coef in (np.array([1.7]), kappa):
            st = matrix_call(api["galerkit_stiffness"], dim, degree, points, cells, n, dofs, coef,
                             pat, data)
            assert st == cfuncs.OK
            K = asm.stiffness(coef[0] if coef.size == 1 else coef)
            assert rel(data, K.data) <= 1e-13
        st = matrix_call(api["galerkit_mass"], dim, degree, points, cells, n, dofs, kappa, pat,
                         data)
        assert st == cfuncs.OK and rel(data, asm.mass(kappa).data) <= 1e-13
        b = np.full(n, np.nan)
        f = np.cos(np.arange(n, dtype=float))
        assert load_call(api["galerkit_load"], dim, degree, points, cells, n, dofs, 2, f, pat,
                         b) == cfuncs.OK
        assert rel(b, asm.load(f)) <= 1e-13
        assert load_call(api["galerkit_load"], dim, degree, points, cells, n, dofs, 0,
                         np.array([2.0]), pat, b) == cfuncs.OK
        assert rel(b, asm.load(2.0)) <= 1e-13
        assert load_call(api["galerkit_load"], dim, degree, points, cells, n, dofs, 1, kappa,
                         pat, b) == cfuncs.OK
        # per-cell source: sum_c f_c |T_c| (partition of unity)
        vol = asm.mesh.cell_volumes
        assert abs(b.sum() - (kappa * vol).sum()) <= 1e-13 * b.sum()


@pytest.mark.parametrize("dim", [2, 3])
def test_ctypes_p1_errors_equal_the_kernel_functionals(api, dim):
    asm, points, cells, _ = host_arrays(dim, 1, seed=2)
    disc = asm.disc
    u = disc.interpolate(lambda x: np.sin(2 * x[0]) + x[1] ** 2)
    ref = disc.interpolate(lambda x: x[0] * x[1])
    out = np.zeros(1)
    args = (dim, points.shape[0], ptr(points), cells.shape[0], ptr(cells), ptr(u), ptr(ref),
            ptr(out))
    assert api["galerkit_p1_l2_error"](*args) == cfuncs.OK
    assert rel(out[0], l2_error(disc, u - ref, lambda x: 0.0 * x[0])) <= 1e-13
    assert api["galerkit_p1_h1_seminorm_error"](*args) == cfuncs.OK
    assert rel(out[0], h1_seminorm_error(disc, u - ref, lambda x: 0.0 * x)) <= 1e-13


def test_ctypes_bad_input_returns_a_status_and_leaves_outputs_alone(api):
    asm, points, cells, dofs = host_arrays(2, 1)
    n, m = asm.n_dofs, cells.shape[0]
    pat = CPattern(api, n, dofs, 2)
    one = np.ones(1)
    data = np.full(pat.nnz, -7.0)

    def stiffness(p=points, c=cells, values=one, dim=2, degree=1, nd=n):
        return matrix_call(api["galerkit_stiffness"], dim, degree, p, c, nd, c, values, pat,
                           data)

    assert stiffness(dim=4) == cfuncs.E_ARGUMENT
    assert stiffness(degree=1, nd=n + 1) == cfuncs.E_ARGUMENT
    bad = cells.copy()
    bad[3, 1] = n
    assert stiffness(c=bad) == cfuncs.E_INDEX
    p = points.copy()
    p[5, 0] = np.inf
    assert stiffness(p=p) == cfuncs.E_POINTS
    p = points.copy()
    p[cells[0, 1]] = p[cells[0, 0]]
    assert stiffness(p=p) == cfuncs.E_DEGENERATE
    assert stiffness(values=np.array([0.0])) == cfuncs.E_COEFFICIENT
    assert stiffness(values=np.full(m, np.nan)) == cfuncs.E_COEFFICIENT
    keep = pat.indices.copy()
    pat.indices[[0, 1]] = pat.indices[[1, 0]]
    assert stiffness() == cfuncs.E_PATTERN
    pat.indices[:] = keep
    pat.order[0] = pat.order[1]
    assert stiffness() == cfuncs.E_PLAN
    pat.order[:] = asm.order
    pat.posmap[2, 0, 1] += 1
    assert stiffness() == cfuncs.E_PLAN
    pat.posmap[:] = asm.posmap
    pat.chunks[pat.n_chunks + 2] = 0  # window of row range 0 ends at cell 0
    assert stiffness() == cfuncs.E_PLAN
    assert np.all(data == -7.0)  # nothing ran
    # the symbolic phase refuses bad cells and an indptr of other cells
    ip = np.empty(n + 1, dtype=np.int32)
    assert api["galerkit_pattern_count"](n, m, 3, ptr(bad), 2, ptr(ip)) == cfuncs.E_INDEX
    ip[:] = pat.indptr
    ip[1] += 1
    assert api["galerkit_pattern_fill"](n, m, 3, ptr(cells), 2, ptr(ip), ptr(pat.indices),
                                        ptr(pat.order), ptr(pat.posmap), ptr(pat.chunks)) \
        == cfuncs.E_PATTERN
    assert "degenerate" in cfuncs.describe_status(cfuncs.E_DEGENERATE)


def test_concurrent_ctypes_calls_from_host_threads_give_the_same_values(api):
    # ctypes releases the GIL: several host threads run the parallel kernel at once;
    # safe under the "omp" and "tbb" threading layers (numba documentation)
    import threading

    import numba

    asm, points, cells, _ = host_arrays(3, 1, seed=4)
    pat = CPattern(api, asm.n_dofs, cells, 2)
    kappa = np.linspace(1.0, 2.0, cells.shape[0])
    ref = np.empty(pat.nnz)
    assert matrix_call(api["galerkit_stiffness"], 3, 1, points, cells, asm.n_dofs, cells, kappa,
                       pat, ref) == cfuncs.OK
    if numba.threading_layer() not in ("omp", "tbb"):
        pytest.skip(f"threading layer {numba.threading_layer()!r} is not thread-safe")
    bad = []

    def work():
        data = np.empty(pat.nnz)
        for _ in range(10):
            data[:] = np.nan
            st = matrix_call(api["galerkit_stiffness"], 3, 1, points, cells, asm.n_dofs, cells,
                             kappa, pat, data)
            if st != cfuncs.OK or not np.array_equal(data, ref):
                bad.append(st)

    threads = [threading.Thread(target=work) for _ in range(3)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not bad and np.array_equal(ref, asm.stiffness(kappa).data)


# ----------------------------------------------------------------------------
# the C host: compiled with this interpreter's flags, run, prints PASS
# ----------------------------------------------------------------------------
def _embed_flags():
    """Compile and link flags of the running interpreter (like python3-config --embed)."""
    cv = sysconfig.get_config_var
    include = sysconfig.get_paths()["include"]
    ldversion = cv("LDVERSION") or cv("VERSION")
    # the shared library sits in LIBDIR; a static build keeps libpython*.a in LIBPL
    libdir = next((d for d in (cv("LIBDIR"), cv("LIBPL")) if d and any(
        Path(d).glob(f"libpython{ldversion}*"))), None)
    libs = (cv("LIBS") or "").split() + (cv("SYSLIBS") or "").split()
    return include, libdir, [f"-L{libdir}", f"-lpython{ldversion}", f"-Wl,-rpath,{libdir}",
                             *libs]


def test_c_host_compiles_runs_and_prints_pass(tmp_path):
    cc = (sysconfig.get_config_var("CC") or "cc").split()[0]
    cc = shutil.which(cc) or shutil.which("cc") or shutil.which("gcc")
    if cc is None:
        pytest.skip("no C compiler found (CC from sysconfig, cc, gcc): the C host is not built")
    include, libdir, ldflags = _embed_flags()
    if not (Path(include) / "Python.h").exists():
        pytest.skip(f"Python.h not found in {include}: install the Python development headers")
    if libdir is None:
        pytest.skip("no libpython in sysconfig's LIBDIR or LIBPL: this interpreter cannot be "
                    "embedded")
    cfuncs.addresses()  # compile (or load) once in this process: the host then loads the cache
    exe = tmp_path / "example_host"
    build = subprocess.run(
        [cc, "-std=c99", "-O2", "-Wall", "-Wextra", "-Werror", "-I", str(C_DIR), "-I", include,
         str(C_DIR / "example_host.c"), *ldflags, "-o", str(exe)],
        capture_output=True, text=True, timeout=300)
    assert build.returncode == 0, build.stdout + build.stderr
    env = dict(os.environ)
    env["PYTHONHOME"] = sys.base_prefix  # the standard library of this interpreter
    env["GALERKIT_SITE_DIRS"] = os.pathsep.join(site.getsitepackages())  # with its .pth files
    env.pop("PYTHONSTARTUP", None)
    run = subprocess.run([str(exe)], capture_output=True, text=True, timeout=600, env=env,
                         cwd=tmp_path)
    out = run.stdout + run.stderr
    assert run.returncode == 0, out
    lines = run.stdout.strip().splitlines()
    assert lines[-1].startswith("PASS"), out
    assert not [line for line in lines if line.startswith("FAIL")], out
    assert sum(line.startswith("ok") for line in lines) >= 40, out
