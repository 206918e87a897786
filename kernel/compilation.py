"""Compilation accounting: how long numba spent compiling, and where its cache lives.

Every kernel is compiled the first time it runs with a new signature and then
cached on disk (``cache=True``), so only a first run pays for compilation.
This module listens to numba's ``numba:compile`` events (fired only when a
kernel is really compiled, not when it is loaded from the cache) and adds up
the outermost compiles, so a phase can report its own time without them.

Cache location (numba's rules): beside the sources in ``__pycache__`` when that
folder is writable (an editable or user install); otherwise -- a read-only
install, a system site-packages -- numba falls back to a user-wide folder
(``$XDG_CACHE_HOME/numba`` or ``~/.cache/numba`` on Linux).  Set
``GALERKIT_CACHE_DIR`` (before importing galerkit) to put galerkit's kernels in
a folder of your choice, or ``NUMBA_CACHE_DIR`` for every numba program.  A
cache entry is keyed on the source file's path and modification time, so an
upgraded install recompiles once.  ``galerkit warm-up`` compiles the common
kernels ahead of time.

Compiling ahead (:func:`start_compile_ahead`): numba compiles on one core.  When
a command starts compiling, the command line starts a second process that
compiles the solver's kernels (``cg-amg``: multigrid and sparse kernels, the same
signatures, see :func:`galerkit.multigrid.compile_solver_kernels`) into the same
cache while this process compiles the mesh and assembly kernels;
:func:`wait_for_compile_ahead`, called before the solver set-up, waits for it and
counts the wait as compile time.  ``GALERKIT_COMPILE_AHEAD=0`` turns it off.
The second process works in two stages: first every kernel a solve needs (the
serial twins of the solve loop included), then the parallel solve loop, which alone
compiles for about 7 s and saves a fraction of a second per solve.  It reports the
end of the first stage on its output, and the wait ends there.  While a second
process runs, a kernel called through ``by_size(kernel, work, cached_only=True)``
runs in parallel only once it is compiled or in the cache; until then its serial
twin runs (the same bits).  At exit the second process is stopped unless it is in
its second stage: then it finishes that compile (seconds) and stops by itself, so
the next run finds the parallel loop in the cache.

Serial twins (:func:`by_size`): a ``parallel=True`` kernel compiles two to six
times slower than the same loops compiled serially (numba's parfor passes), and on
a small problem its threads save less than that costs.  A kernel called through
``by_size(kernel, work)`` runs as itself when ``work`` (the array entries the call
reads or writes: cells x vertices per cell, cells x local matrix entries,
non-zeros) reaches :data:`PARALLEL_FROM` and numba has more than one thread;
otherwise it runs as its serial twin: the same source compiled without
``parallel`` (``prange`` runs as ``range``), cached under its own name
(``<name>_serial``).  The kernels are deterministic for any thread count, so the
twin returns the same bits.  ``GALERKIT_PARALLEL_FROM`` sets the threshold
(0: always the parallel kernel, as the test suite runs).
"""

from __future__ import annotations

import atexit
import os
import subprocess
import sys
import time
import types

import numba as _nb
from numba.core.dispatcher import Dispatcher as _Dispatcher

from numba.core import config as _config
from numba.core import event as _event

__all__ = ["compile_seconds", "PhaseSeconds", "cache_folder", "on_first_compile",
           "start_compile_ahead", "wait_for_compile_ahead", "by_size", "serial_twin",
           "PARALLEL_FROM"]

_state = {"seconds": 0.0, "depth": 0, "start": 0.0, "count": 0, "announce": None}


class _Listener(_event.Listener):
    def on_start(self, event):
        if _state["depth"] == 0:
            _state["start"] = time.perf_counter()
            _state["count"] += 1
            announce = _state["announce"]
            if announce is not None:
                _state["announce"] = None  # once per process
                announce()
        _state["depth"] += 1

    def on_end(self, event):
        _state["depth"] -= 1
        if _state["depth"] == 0:
            _state["seconds"] += time.perf_counter() - _state["start"]


_event.register("numba:compile", _Listener())


def compile_seconds() -> float:
    """Seconds this process has spent compiling kernels so far (outermost compiles)."""
    return _state["seconds"]


def compile_count() -> int:
    """Number of outermost compilations so far (kernels and signatures)."""
    return _state["count"]


def on_first_compile(callback) -> None:
    """Call ``callback()`` once, when the next kernel compilation starts (None: never)."""
    _state["announce"] = callback


def _parallel_from() -> int:
    text = os.environ.get("GALERKIT_PARALLEL_FROM", "5000000")
    try:
        value = int(text)
    except ValueError:
        raise ValueError(f"GALERKIT_PARALLEL_FROM must be a whole number of array entries "
                         f"(0: always parallel), got {text!r}") from None
    if value < 0:
        raise ValueError(f"GALERKIT_PARALLEL_FROM must be >= 0, got {value}")
    return value


#: work (array entries per call) from which a kernel called through :func:`by_size`
#: runs in parallel; below it, its serial twin runs (``GALERKIT_PARALLEL_FROM``)
PARALLEL_FROM = _parallel_from()

_twins = {}


def _is_parallel(kernel, _seen=None):
    """Whether ``kernel`` or a kernel it calls by global name is ``parallel=True``."""
    if kernel.targetoptions.get("parallel"):
        return True
    seen = set() if _seen is None else _seen
    seen.add(kernel)
    f = kernel.py_func
    return any(isinstance(obj, _Dispatcher) and obj not in seen and _is_parallel(obj, seen)
               for name in f.__code__.co_names for obj in [f.__globals__.get(name)])


def serial_twin(kernel):
    """The serial twin of a ``parallel=True`` kernel (made once, compiled on first use).

    A serial kernel that calls parallel ones gets a twin that calls their twins.

    The same code object and globals under the name ``<name>_serial``, so numba
    caches it apart from the parallel kernel; every other option (``cache``,
    ``fastmath``, ``error_model``, ...) is kept.  A kernel without a cache (made
    at run time) gets a twin without one.
    """
    twin = _twins.get(kernel)
    if twin is None:
        f = kernel.py_func
        # the kernels it calls by global name, twinned too where they (or what
        # they call) are parallel; the globals are a copy taken now
        names = {name: serial_twin(obj) for name in f.__code__.co_names
                 for obj in [f.__globals__.get(name)]
                 if isinstance(obj, _Dispatcher) and _is_parallel(obj)}
        globs = dict(f.__globals__, **names) if names else f.__globals__
        g = types.FunctionType(f.__code__, globs, f.__name__ + "_serial",
                               f.__defaults__, f.__closure__)
        g.__qualname__ = f.__qualname__ + "_serial"
        g.__module__ = f.__module__
        g.__doc__ = f.__doc__
        g.__kwdefaults__ = f.__kwdefaults__
        options = {k: v for k, v in kernel.targetoptions.items()
                   if k not in ("parallel", "nopython")}
        # ``cache`` is the dispatcher's, not a target option
        cached = type(getattr(kernel, "_cache", None)).__name__ not in ("NullCache", "NoneType")
        twin = _nb.njit(cache=cached, **options)(g)
        _twins[kernel] = twin
    return twin


def by_size(kernel, work, *, cached_only=False):
    """``kernel`` when ``work`` >= :data:`PARALLEL_FROM` and numba has several threads,
    else its serial twin (same results, bit for bit; see the module notes).

    ``cached_only``: while a second process compiles ahead (the command line),
    the parallel kernel is chosen only once it is compiled or cached; until then
    the serial twin runs, so the run does not wait for a long compile that the
    second process does for the next run.
    """
    if not _is_parallel(kernel):
        return kernel
    if work >= PARALLEL_FROM and _nb.get_num_threads() > 1:
        if cached_only and _ahead["proc"] and not is_ready(kernel):
            return serial_twin(kernel)
        return kernel
    return serial_twin(kernel)


def is_ready(kernel) -> bool:
    """Whether ``kernel`` has a compiled signature in this process or an entry in
    its on-disk cache (then a call loads it instead of compiling)."""
    if kernel.overloads:
        return True
    try:
        # numba's cache index: empty when missing or stale (source changed)
        return bool(kernel._cache._cache_file._load_index())
    except Exception:  # no cache, or numba's internals changed: assume not ready
        return False


_ahead = {"proc": None, "closed": False, "staged": False}

#: the second process's program (kernel module only: it never imports bindings)
_AHEAD_CODE = ("from galerkit.multigrid import compile_solver_kernels; "
               "compile_solver_kernels(report_stage=True)")

#: the line the second process prints when its first stage is done
STAGE_LINE = "galerkit-compile-ahead: solve kernels ready"


def start_compile_ahead() -> bool:
    """Start compiling the solver's kernels in a second process (once per process).

    Returns False (and starts nothing) when one was started already, when the
    solver set-up has begun (:func:`wait_for_compile_ahead` was called), when
    ``GALERKIT_COMPILE_AHEAD=0``, on a single core, or when no process can be
    started.  The process writes into this process's cache folder; it is
    stopped when this process exits.
    """
    if _ahead["proc"] is not None or _ahead["closed"] \
            or os.environ.get("GALERKIT_COMPILE_AHEAD", "1") == "0":
        return False
    if (os.cpu_count() or 1) < 2:
        return False
    env = dict(os.environ)
    if _config.CACHE_DIR:
        env["NUMBA_CACHE_DIR"] = str(_config.CACHE_DIR)
    try:
        _ahead["proc"] = subprocess.Popen([sys.executable, "-c", _AHEAD_CODE], env=env,
                                          stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
                                          stderr=subprocess.DEVNULL, text=True)
    except OSError:
        _ahead["proc"] = False
        return False
    atexit.register(_stop_ahead)
    return True


def wait_for_compile_ahead(timeout: float = 900.0) -> float:
    """Wait for the first stage of the process of :func:`start_compile_ahead`, if one
    runs (or for its end, when it reports no stage); seconds waited.

    The wait is compilation (the other process compiles what this one is about
    to run), so it is added to :func:`compile_seconds`.  Past ``timeout`` this
    process goes on and compiles what it still needs itself.
    """
    proc = _ahead["proc"]
    # from here on this process compiles the solver's kernels itself: a second
    # process started later would only repeat that work, and one is waited for once
    if _ahead["closed"]:
        return 0.0
    _ahead["closed"] = True
    if not proc or proc.poll() is not None or _state["depth"] > 0:
        return 0.0
    t0 = time.perf_counter()
    if proc.stdout is None:  # a process that reports no stage: wait for its end
        try:
            proc.wait(timeout)
        except subprocess.TimeoutExpired:
            pass
    else:
        import select
        while time.perf_counter() - t0 < timeout:
            ready, _, _ = select.select([proc.stdout], [], [], timeout)
            if not ready:
                break
            line = proc.stdout.readline()
            if not line:  # the process ended
                break
            if line.strip() == STAGE_LINE:
                _ahead["staged"] = True
                break
    waited = time.perf_counter() - t0
    _state["seconds"] += waited
    return waited


def report_stage() -> None:
    """In the second process: say that the first stage is done (see the module notes)."""
    print(STAGE_LINE, flush=True)


def _stop_ahead():
    proc = _ahead["proc"]
    if proc and proc.poll() is None and _ahead["staged"]:
        # in its second stage: let it finish that compile for the next run; it
        # prints nothing more and stops by itself
        return
    if proc and proc.poll() is None:
        proc.terminate()
        try:
            proc.wait(5)
        except subprocess.TimeoutExpired:
            proc.kill()


class PhaseSeconds(dict):
    """Seconds per phase with compilation counted apart.

    Assign the wall time of each phase as it ends (``sec["assemble"] = t``):
    the compile seconds spent since the previous assignment are subtracted
    and added to a ``"compile"`` entry, kept last and present only when a
    kernel was compiled.  The values still sum to the wall time.
    """

    def __init__(self):
        super().__init__()
        self._mark = compile_seconds()

    def __setitem__(self, key, wall):
        now = compile_seconds()
        spent = now - self._mark
        self._mark = now
        if key == "compile" or spent <= 0.0:
            super().__setitem__(key, wall)
            return
        super().__setitem__(key, max(0.0, wall - spent))
        total = self.pop("compile", 0.0) + spent
        super().__setitem__("compile", total)


def cache_folder() -> str:
    """Where numba keeps galerkit's compiled kernels (see the module notes)."""
    return _cache_folder_for(os.path.dirname(os.path.abspath(__file__)))


def _cache_folder_for(source_folder) -> str:
    """numba's cache folder for kernels whose sources lie in ``source_folder``.

    ``NUMBA_CACHE_DIR`` when set; else ``__pycache__`` beside the sources when it
    can be created and written; else the user-wide folder numba falls back to
    (it keeps a subfolder per source folder below it).
    """
    if _config.CACHE_DIR:
        return str(_config.CACHE_DIR)
    pycache = os.path.join(str(source_folder), "__pycache__")
    try:
        os.makedirs(pycache, exist_ok=True)
        probe = os.path.join(pycache, f".write-probe-{os.getpid()}")
        with open(probe, "w"):
            pass
        os.remove(probe)
        return pycache
    except OSError:
        base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
        return os.path.join(base, "numba")
