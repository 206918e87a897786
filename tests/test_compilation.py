"""Compile-time accounting (galerkit.compilation) and the command line's compile line.

numba fires ``numba:compile`` events only when it really compiles a kernel (not when
it loads one from its cache); galerkit adds them up so phases report their own time.
A run that compiles prints one stderr line saying so and a separate ``compile`` line in
its report; a run whose kernels all come from the cache prints neither.  No test here
asserts a wall-clock time: only that compile time is seen, kept apart and summed.
Where numba keeps its cache and how it falls back when the sources' folder cannot be
written is numba's documented behaviour (numba docs, "Cache sharing" and
``NUMBA_CACHE_DIR``); the last test checks it on this installation.
"""

from __future__ import annotations

import os
import json
import subprocess
import sys
import textwrap
import time

import numba as nb
import numpy as np
import pytest

from galerkit import assembly, compilation
from galerkit.bindings.command.cli import main
from galerkit.compilation import PhaseSeconds, compile_count, compile_seconds

SCRIPT = os.path.join(os.path.dirname(sys.executable), "galerkit")


def _fresh_kernel():
    """A kernel no process has compiled: a new closure, not cached."""
    salt = float(np.random.default_rng().integers(1, 1 << 30))

    @nb.njit
    def kernel(x):
        s = 0.0
        for i in range(x.shape[0]):
            s += x[i] * salt
        return s

    return kernel, salt


def test_compile_events_are_counted_and_kept_out_of_the_phase():
    kernel, salt = _fresh_kernel()
    n0, s0 = compile_count(), compile_seconds()
    sec = PhaseSeconds()
    t = time.perf_counter()
    assert kernel(np.ones(3)) == 3 * salt
    wall = time.perf_counter() - t
    sec["work"] = wall
    assert compile_count() == n0 + 1
    spent = compile_seconds() - s0
    assert spent > 0.0
    assert list(sec) == ["work", "compile"]
    assert sec["compile"] == pytest.approx(spent)
    assert sec["work"] + sec["compile"] == pytest.approx(wall)
    # a second call runs the compiled code: no event, no compile entry
    sec2 = PhaseSeconds()
    kernel(np.ones(3))
    sec2["work"] = 0.5
    assert compile_count() == n0 + 1 and dict(sec2) == {"work": 0.5}


def test_forced_recompilation_shows_the_compile_line_and_a_warm_run_does_not(
        monkeypatch, capsys, tmp_path):
    args = ["demo", "--size", "12", "--method", "cg-amg", "--output", str(tmp_path)]
    # warm this process first (from the cache or by compiling)
    assert main(args) == 0
    capsys.readouterr()
    # in-process, every kernel is now loaded: no compile line, no announcement
    assert main(args) == 0
    out, err = capsys.readouterr()
    assert "compile " not in out and "compiling" not in err
    # force one kernel of the run to compile again: a new dispatcher, no cache
    fresh = nb.njit(parallel=True)(assembly._p1_stiffness_2d.py_func)
    monkeypatch.setattr(assembly, "_p1_stiffness_2d", fresh)
    assert main(args) == 0
    out, err = capsys.readouterr()
    lines = [ln for ln in out.splitlines() if ln.split()[:1] == ["compile"]]
    assert len(lines) == 1 and "first run only" in lines[0]
    assert float(lines[0].split()[1]) > 0.0
    assert err.count("galerkit: compiling kernels for their first use") == 1
    assert compilation.cache_folder() in err


def test_a_warm_process_compiles_nothing(tmp_path):
    """Two processes: the second loads every kernel of the run from the cache.

    The first may compile (cold cache); the second must print no compile line.
    Kernels that numba cannot cache (typed lists built from Python, for one)
    would compile again in every process and fail this.
    """
    cmd = [SCRIPT] if os.path.exists(SCRIPT) else [sys.executable, "-m",
                                                     "galerkit.bindings.command.cli"]
    cmd += ["demo", "--size", "24", "--method", "cg-amg", "--json"]
    for attempt in range(2):
        p = subprocess.run(cmd, capture_output=True, text=True, cwd=tmp_path, timeout=900)
        assert p.returncode == 0, p.stderr
    info = json.loads(p.stdout)
    assert "compile" not in info["seconds"], info["seconds"]
    assert "compiling" not in p.stderr


def test_cache_falls_back_to_a_user_wide_folder_when_the_sources_cannot_hold_it(tmp_path):
    """A read-only install: numba cannot create ``__pycache__`` beside the sources.

    Simulated by a plain file named ``__pycache__`` (as root, permissions would not
    stop a write).  The cached kernel must still run and be cached under
    ``$XDG_CACHE_HOME/numba``, where ``galerkit.compilation`` says it is.
    """
    pkg = tmp_path / "site" / "kernels"
    pkg.mkdir(parents=True)
    (pkg / "__pycache__").write_text("not a folder")
    (pkg / "mod.py").write_text(textwrap.dedent("""
        import numba
        @numba.njit(cache=True)
        def twice(x):
            return 2 * x
    """))
    cache = tmp_path / "user-cache"
    env = {k: v for k, v in os.environ.items()
           if k not in ("NUMBA_CACHE_DIR", "GALERKIT_CACHE_DIR")}
    env.update(XDG_CACHE_HOME=str(cache), PYTHONPATH=str(tmp_path / "site"))
    code = ("import sys, mod; from galerkit.compilation import _cache_folder_for; "
            "assert mod.twice(21) == 42; print(_cache_folder_for(sys.argv[1]))")
    p = subprocess.run([sys.executable, "-c", code, str(pkg)], capture_output=True,
                       text=True, cwd=pkg, env=env, timeout=300)
    assert p.returncode == 0, p.stderr
    assert p.stdout.strip() == str(cache / "numba")
    cached = [f for _, _, files in os.walk(cache) for f in files]
    assert any(f.startswith("mod.twice") and f.endswith(".nbi") for f in cached), cached
    assert (pkg / "__pycache__").read_text() == "not a folder"


# -- compiling ahead in a second process ---------------------------------------------
def test_waiting_for_the_second_process_counts_as_compile_time(monkeypatch):
    proc = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(0.2)"])
    monkeypatch.setitem(compilation._ahead, "proc", proc)
    monkeypatch.setitem(compilation._ahead, "closed", False)
    s0 = compile_seconds()
    sec = PhaseSeconds()
    waited = compilation.wait_for_compile_ahead()
    sec["solver_setup"] = waited
    assert proc.poll() == 0 and waited > 0.0
    assert compile_seconds() - s0 == pytest.approx(waited)
    assert sec["compile"] == pytest.approx(waited) and sec["solver_setup"] == 0.0
    assert compilation.wait_for_compile_ahead() == 0.0  # waited once: never again
    # none once the solver set-up has begun, one per process, none when turned off
    monkeypatch.setitem(compilation._ahead, "proc", None)
    assert compilation.start_compile_ahead() is False
    monkeypatch.setitem(compilation._ahead, "closed", False)
    monkeypatch.setitem(compilation._ahead, "proc", proc)
    assert compilation.start_compile_ahead() is False
    monkeypatch.setitem(compilation._ahead, "proc", None)
    monkeypatch.setenv("GALERKIT_COMPILE_AHEAD", "0")
    assert compilation.start_compile_ahead() is False


def test_the_wait_ends_at_the_first_stage_and_exit_leaves_the_second_stage_running(
        monkeypatch):
    """A second process that prints the stage line is waited for up to that line only;
    at exit it is left to finish (its second stage fills the cache for the next run),
    while one that has not reported its stage is stopped."""
    code = (f"import time; print({compilation.STAGE_LINE!r}, flush=True); time.sleep(30)")
    proc = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE, text=True)
    try:
        monkeypatch.setitem(compilation._ahead, "proc", proc)
        monkeypatch.setitem(compilation._ahead, "closed", False)
        monkeypatch.setitem(compilation._ahead, "staged", False)
        waited = compilation.wait_for_compile_ahead(timeout=60.0)
        assert 0.0 < waited < 30.0 and compilation._ahead["staged"]
        assert proc.poll() is None  # still in its second stage
        compilation._stop_ahead()
        assert proc.poll() is None  # left running
        monkeypatch.setitem(compilation._ahead, "staged", False)
        compilation._stop_ahead()  # not staged: stopped
        assert proc.wait(10) is not None
    finally:
        proc.kill()
        proc.wait()


def test_cached_only_runs_the_serial_twin_until_the_parallel_kernel_is_ready(monkeypatch):
    """While a second process compiles ahead, by_size(..., cached_only=True) picks the
    parallel kernel only once it is compiled or cached; without one it picks as before."""

    @nb.njit(parallel=True)
    def par(x):
        for i in nb.prange(x.shape[0]):
            x[i] += 1.0

    monkeypatch.setattr(compilation, "PARALLEL_FROM", 0)
    if nb.get_num_threads() < 2:
        pytest.skip("one numba thread: by_size always picks the serial twin")
    assert not compilation.is_ready(par)
    monkeypatch.setitem(compilation._ahead, "proc", None)  # earlier commands may have run one
    assert compilation.by_size(par, 10, cached_only=True) is par  # no second process
    monkeypatch.setitem(compilation._ahead, "proc", object())  # one runs
    twin = compilation.by_size(par, 10, cached_only=True)
    assert twin is compilation.serial_twin(par)
    assert compilation.by_size(par, 10) is par  # only cached_only calls wait for it
    x = np.zeros(4)
    twin(x)
    par(x)  # compiled here: ready from now on
    assert compilation.is_ready(par) and np.array_equal(x, np.full(4, 2.0))
    assert compilation.by_size(par, 10, cached_only=True) is par


_RECORD = """
import json, sys
from numba.core import event
names = []
class L(event.Listener):
    def on_start(self, ev):
        f = getattr(ev.data.get("dispatcher"), "py_func", None)
        names.append(f.__module__ + "." + f.__qualname__ if f else "?")
    def on_end(self, ev):
        pass
event.register("numba:compile", L())
import galerkit as gk
mesh = gk.structured_triangles(30, 20)
p = gk.PoissonProblem(mesh, conductivity=2.0, source=lambda x: 1.0 + x[0],
                      robin={"ymin": (3.0, 1.0)})
sol = p.solve(degree=1, method="cg-amg")
assert sol.report.converged
print(json.dumps(names))
"""


@pytest.mark.slow
def test_the_second_process_compiles_every_solver_kernel_a_poisson_solve_needs(tmp_path):
    """After compile_solver_kernels in an empty cache, a P1 solve with cg-amg compiles
    no kernel of galerkit.multigrid: the signatures are the same (arrays normalised at
    the solver's boundary), so the second process's work is used, not repeated."""
    env = {k: v for k, v in os.environ.items() if k != "GALERKIT_CACHE_DIR"}
    env.update(NUMBA_CACHE_DIR=str(tmp_path / "cache"), GALERKIT_COMPILE_AHEAD="0")
    p = subprocess.run([sys.executable, "-c", compilation._AHEAD_CODE], env=env,
                       capture_output=True, text=True, timeout=1200)
    assert p.returncode == 0, p.stderr
    p = subprocess.run([sys.executable, "-c", _RECORD], env=env, capture_output=True,
                       text=True, timeout=1200)
    assert p.returncode == 0, p.stderr
    names = json.loads(p.stdout.strip().splitlines()[-1])
    assert any(n.startswith("galerkit.assembly.") for n in names)  # the cache was cold
    assert not [n for n in names if n.startswith("galerkit.multigrid.")], names
