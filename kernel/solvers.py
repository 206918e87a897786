"""Linear solvers for symmetric positive definite (SPD) sparse systems.

The systems are stiffness matrices after Dirichlet elimination: SciPy sparse,
square, real, symmetric and positive definite.  Solvers live in one registry,
looked up by name; adding one is one factory function and one
:func:`register_solver` line.

A *factory* is called as ``factory(A, **options)`` with a validated CSR
float64 matrix and returns an object with a method
``solve(b, x0=None, rtol=1e-10, maxiter=None, callback=None)`` that returns a
:class:`SolveReport`.  :func:`prepare_solver` runs the factory once (the
expensive set-up: a factorisation, a multigrid hierarchy) and hands back a
:class:`PreparedSolver` to reuse for every right-hand side; :func:`solve` is
the one-call path.

Built-in solvers
----------------
==============  ============================================================
name            method
==============  ============================================================
``direct``      sparse LU (SciPy ``splu``, SuperLU) with a fill-reducing
                ordering; factorised once in set-up, reused for every b
``cg``          conjugate gradients, no preconditioner
``cg-jacobi``   conjugate gradients preconditioned by the inverse diagonal
``cg-amg``      conjugate gradients preconditioned by one V-cycle of our own
                smoothed-aggregation multigrid (:mod:`galerkit.multigrid`;
                p-multigrid through the nested P1 space for degree >= 2);
                hierarchy built once in set-up, CG loop in compiled code
``cg-pyamg``    conjugate gradients preconditioned by one V-cycle of PyAMG's
                smoothed aggregation: the reference to compare ``cg-amg`` with
==============  ============================================================

``cg``, ``cg-jacobi`` and ``cg-pyamg`` share one preconditioned CG loop in
Python; ``cg-amg`` runs the same algorithm compiled (and falls back to the
Python loop when a ``callback`` is given).  The loop stops when the
residual of the CG recurrence satisfies ``||r_k|| <= rtol * ||b||`` and then
checks the true residual ``b - A x_k`` (restarting from it a few times when
rounding made the two drift apart); the last entry of the residual history is
always the true relative residual.  Non-convergence and breakdown
(``p.Ap <= 0``: the matrix is not SPD) are reported in the
:class:`SolveReport`, never raised.

The ``"auto"`` rule
-------------------
:func:`choose_method` picks ``"direct"`` while the system is small enough that
the fill of the sparse LU factors stays cheap, and ``"cg-amg"`` beyond.  Fill
grows much faster in 3D than in 2D, and with the element degree (more
couplings per row), so the threshold depends on both (``degree`` defaults to
1; an unknown dimension is treated as 3D, the conservative case):

=============  =====================================
dimension      ``"direct"`` when
=============  =====================================
1              ``n <= 2_000_000 / degree``
2              ``n <= 200_000 / degree``
3 or unknown   ``n <= 40_000 / degree``
=============  =====================================

otherwise ``"cg-amg"``.  The numbers are rules of thumb for one workstation
(a few seconds of factorisation and well under a gigabyte of factors), not
measured optima.

Memory guard of ``"direct"``
----------------------------
Before factorising, ``"direct"`` estimates the memory of the LU factors with
a crude 3D-like fill model (with a nested-dissection ordering the fill of a 3D
grid matrix grows like ``n**(4/3)``; Lipton, Rose & Tarjan, Generalized nested
dissection, 1979, recalled from memory; minimum-degree orderings behave
similarly up to a constant)::

    nnz(L + U) ~ max(2 * nnz(A), 2 * (nnz(A) / n) * n**(4/3))
    bytes      ~ 16 * nnz(L + U)        (8 value + 4 index + working space)

and raises :class:`~galerkit.errors.ResourceError` when that exceeds the limit:
the option ``memory_limit_bytes`` when given, else the environment variable
``GALERKIT_MEMORY_LIMIT_BYTES`` when set, else the memory currently
available (``MemAvailable`` of ``/proc/meminfo``, else the physical memory
from ``os.sysconf``; no check when neither can be read); see
:func:`memory_limit`, which the assembler's estimate uses too.  For 2D matrices the
model overestimates (2D fill grows like ``n log n``), so a large 2D system may
be refused although it would fit; pass a larger ``memory_limit_bytes`` to try.
"""

from __future__ import annotations

import inspect
import math
import numbers
import os
import time
from dataclasses import dataclass, field, replace
from typing import Any, Callable

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from .errors import GalerkitError, InputError, ResourceError, SolverError

__all__ = [
    "SolveReport",
    "PreparedSolver",
    "register_solver",
    "available_solvers",
    "solver_description",
    "unregister_solver",
    "prepare_solver",
    "solve",
    "check_report",
    "choose_method",
    "AUTO_DIRECT_LIMITS",
    "MEMORY_LIMIT_VARIABLE",
    "memory_limit",
]

#: ``"auto"`` picks ``"direct"`` when ``n <= AUTO_DIRECT_LIMITS[dim] / degree``.
#: The key ``None`` (unknown dimension) uses the 3D value.
AUTO_DIRECT_LIMITS = {1: 2_000_000, 2: 200_000, 3: 40_000, None: 40_000}

#: Fill-reducing column orderings SuperLU accepts (``permc_spec`` of ``splu``).
_ORDERINGS = ("MMD_AT_PLUS_A", "MMD_ATA", "COLAMD", "NATURAL")

#: Restarts from the true residual when the CG recurrence drifted from it.
_MAX_TRUE_RESIDUAL_RESTARTS = 3


# --------------------------------------------------------------------------
# report
# --------------------------------------------------------------------------


@dataclass
class SolveReport:
    """The outcome of one linear solve.

    Attributes
    ----------
    x : ndarray, shape (n,), float64
        The computed solution.
    converged : bool
        True when the final true relative residual is ``<= rtol`` (and no
        breakdown happened).
    iterations : int
        CG iterations taken; 1 for ``"direct"``; 0 when ``b == 0``.
    residuals : ndarray, shape (iterations + 1,), float64
        Relative residual norms ``||b - A x_k|| / ||b||``; entry 0 belongs to
        the initial guess (1.0 for ``x0=None``).  CG methods record the
        recurrence residual and replace the last entry by the true residual.
        ``"direct"`` has a single entry: the true relative residual.
        ``b == 0`` gives ``[0.0]``.
    setup_seconds : float
        Wall time of the set-up (factory call) of the prepared solver, shared
        by every report of that solver.
    solve_seconds : float
        Wall time of this solve.
    method : str
        The registry name actually used (never ``"auto"``).
    options : dict
        The options used: set-up options with their defaults filled in, the
        tolerance and iteration limit, and facts of the set-up (for
        ``"cg-amg"`` the levels and operator complexity of the hierarchy).
    message : str
        Empty when converged; otherwise what happened and what to try.
    """

    x: np.ndarray
    converged: bool
    iterations: int
    residuals: np.ndarray
    setup_seconds: float = 0.0
    solve_seconds: float = 0.0
    method: str = ""
    options: dict = field(default_factory=dict)
    message: str = ""

    @property
    def final_residual(self) -> float:
        """The last relative residual norm, ``residuals[-1]`` (a float)."""
        return float(self.residuals[-1])


# --------------------------------------------------------------------------
# registry
# --------------------------------------------------------------------------


@dataclass(frozen=True)
class _Entry:
    factory: Callable[..., Any]
    description: str


_REGISTRY: dict[str, _Entry] = {}


def register_solver(
    name: str,
    factory: Callable[..., Any],
    *,
    description: str = "",
    overwrite: bool = False,
) -> None:
    """Add a linear solver to the registry under ``name``.

    Parameters
    ----------
    name : str
        Registry name, a non-empty string other than ``"auto"``.
    factory : callable
        Called as ``factory(A, **options)`` with a validated square CSR
        float64 matrix ``A``; returns an object with a method
        ``solve(b, x0=None, rtol=1e-10, maxiter=None, callback=None)`` that
        returns a :class:`SolveReport`.  When the factory takes no
        ``**kwargs``, options it does not name are refused with an
        :class:`~galerkit.errors.InputError` before it is called.
    description : str, optional
        One line shown by :func:`solver_description`.
    overwrite : bool, optional
        Replace an existing entry of the same name (default False).

    Raises
    ------
    InputError
        If ``name`` is not a non-empty string, is ``"auto"``, is already
        registered and ``overwrite`` is False, or ``factory`` is not callable.

    Examples
    --------
    A prepared solver is itself a valid solver object, so a factory may wrap
    an existing method:

    >>> from galerkit.solvers import (register_solver, unregister_solver,
    ...                               available_solvers, prepare_solver)
    >>> register_solver("lu-again", lambda A: prepare_solver(A, "direct"),
    ...                 description="the direct solver under a second name")
    >>> "lu-again" in available_solvers()
    True
    >>> unregister_solver("lu-again")
    """
    if not isinstance(name, str) or not name.strip():
        raise InputError(
            f"register_solver: the name must be a non-empty string, got {name!r}; "
            "pass a plain name such as 'my-solver'"
        )
    if name == "auto":
        raise InputError(
            "register_solver: 'auto' is reserved for the automatic choice "
            "(see choose_method); pick another name"
        )
    if not callable(factory):
        raise InputError(
            f"register_solver: the factory for {name!r} must be callable as "
            f"factory(A, **options), got {type(factory).__name__}"
        )
    if name in _REGISTRY and not overwrite:
        raise InputError(
            f"register_solver: a solver named {name!r} is already registered; "
            "pass overwrite=True to replace it, or choose another name"
        )
    _REGISTRY[name] = _Entry(factory=factory, description=str(description))


def unregister_solver(name: str) -> None:
    """Remove a solver from the registry (built-ins included).

    Parameters
    ----------
    name : str
        A registered name.

    Raises
    ------
    InputError
        If ``name`` is not registered.

    Examples
    --------
    >>> from galerkit.solvers import register_solver, unregister_solver, solve
    >>> register_solver("scratch", lambda A: prepare_solver(A, "cg"))
    >>> unregister_solver("scratch")
    >>> "scratch" in available_solvers()
    False
    """
    _lookup(name, "unregister_solver")
    del _REGISTRY[name]


def available_solvers() -> list[str]:
    """Sorted names of the registered solvers.

    Returns
    -------
    list of str
        The names accepted by ``method=`` (besides ``"auto"``).

    Examples
    --------
    >>> from galerkit.solvers import available_solvers
    >>> [m for m in available_solvers() if m in ("cg", "cg-amg", "cg-jacobi", "direct")]
    ['cg', 'cg-amg', 'cg-jacobi', 'direct']
    """
    return sorted(_REGISTRY)


def solver_description(name: str) -> str:
    """The one-line description a solver was registered with.

    Parameters
    ----------
    name : str
        A registered name.

    Returns
    -------
    str
        Its description (may be empty).

    Raises
    ------
    InputError
        If ``name`` is not registered.

    Examples
    --------
    >>> from galerkit.solvers import solver_description
    >>> solver_description("cg").startswith("conjugate gradients")
    True
    """
    return _lookup(name, "solver_description").description


def _lookup(name: Any, where: str) -> _Entry:
    entry = _REGISTRY.get(name) if isinstance(name, str) else None
    if entry is None:
        raise InputError(
            f"{where}: unknown solver method {name!r}; available: "
            f"{', '.join(available_solvers())} (or 'auto'); "
            "add new ones with register_solver"
        )
    return entry


# --------------------------------------------------------------------------
# the auto rule
# --------------------------------------------------------------------------


def choose_method(n: int, dim: int | None = None, degree: int | None = None) -> str:
    """The registry name ``method="auto"`` resolves to.

    ``"direct"`` when ``n <= AUTO_DIRECT_LIMITS[dim] / degree`` (the table in
    the module docstring: 2D 200 000, 3D or unknown 40 000, 1D 2 000 000,
    each divided by the degree), else ``"cg-amg"``.

    Parameters
    ----------
    n : int
        Number of unknowns, ``n >= 0``.
    dim : {1, 2, 3, None}, optional
        Spatial dimension of the mesh; None (unknown) counts as 3.
    degree : int, optional
        Lagrange element degree, ``>= 1`` (default 1).

    Returns
    -------
    str
        ``"direct"`` or ``"cg-amg"``.

    Raises
    ------
    InputError
        If ``n``, ``dim`` or ``degree`` is out of range.

    Examples
    --------
    >>> from galerkit.solvers import choose_method
    >>> choose_method(10_000, dim=2), choose_method(1_000_000, dim=2)
    ('direct', 'cg-amg')
    >>> choose_method(30_000, dim=3, degree=2)
    'cg-amg'
    """
    if isinstance(n, bool) or not isinstance(n, numbers.Integral) or n < 0:
        raise InputError(f"choose_method: n must be an integer >= 0, got {n!r}")
    if dim is not None and (isinstance(dim, bool) or dim not in (1, 2, 3)):
        raise InputError(f"choose_method: dim must be 1, 2, 3 or None, got {dim!r}")
    if degree is None:
        degree = 1
    if isinstance(degree, bool) or not isinstance(degree, numbers.Integral) or degree < 1:
        raise InputError(
            f"choose_method: degree must be an integer >= 1 (or None for 1), got {degree!r}"
        )
    limit = AUTO_DIRECT_LIMITS[None if dim is None else int(dim)] / int(degree)
    return "direct" if n <= limit else "cg-amg"


# --------------------------------------------------------------------------
# validation
# --------------------------------------------------------------------------


def _validate_matrix(A: Any, where: str) -> sp.sparray | sp.spmatrix:
    """Square, real, finite SciPy sparse matrix as CSR float64 (no copy if already)."""
    if not sp.issparse(A):
        shape = getattr(A, "shape", None)
        raise InputError(
            f"{where}: A must be a SciPy sparse matrix, got {type(A).__name__}"
            + (f" of shape {shape}" if shape is not None else "")
            + "; convert it with scipy.sparse.csr_array(A)"
        )
    if A.ndim != 2 or A.shape[0] != A.shape[1]:
        raise InputError(
            f"{where}: A must be square, got shape {A.shape}; a stiffness "
            "matrix after Dirichlet elimination has as many rows as columns"
        )
    if A.shape[0] == 0:
        raise InputError(f"{where}: A has shape {A.shape}: there is nothing to solve")
    if A.dtype.kind not in "iuf":
        raise InputError(
            f"{where}: A has dtype {A.dtype}; the solvers need real entries "
            "(float64); complex and non-numeric matrices are not supported"
        )
    _check_csr_structure(A, where)
    A = A.tocsr()
    if A.dtype != np.float64:
        A = A.astype(np.float64)
    bad = np.flatnonzero(~np.isfinite(A.data))
    if bad.size:
        k = int(bad[0])
        row = int(np.searchsorted(A.indptr, k, side="right") - 1)
        col = int(A.indices[k])
        raise InputError(
            f"{where}: A has {bad.size} non-finite entries, the first at "
            f"(row {row}, column {col}) = {float(A.data[k])!r}; check the coefficients "
            "and the assembly that produced A"
        )
    return A


def _check_csr_structure(A: Any, where: str) -> None:
    """Refuse a CSR/CSC/COO matrix whose arrays are inconsistent.

    SciPy checks the structure when a matrix is built, not when its arrays are
    replaced or edited later; compiled code (SciPy's conversions and products,
    SuperLU, our kernels) then reads out of bounds.  Checks: lengths; for
    CSR/CSC ``indptr`` from 0, non-decreasing and ending inside ``indices``;
    every index inside the shape.  Other formats are converted by SciPy as is.
    """
    fmt = getattr(A, "format", "")
    problem = ""
    if fmt in ("csr", "csc"):
        n_major, n_minor = A.shape if fmt == "csr" else A.shape[::-1]
        major = "row" if fmt == "csr" else "column"
        indptr, indices, data = A.indptr, A.indices, A.data
        if indptr.ndim != 1 or indptr.shape[0] != n_major + 1 or indptr.dtype.kind not in "iu":
            problem = (f"indptr has shape {indptr.shape} and dtype {indptr.dtype}, expected "
                       f"({n_major + 1},) integers")
        elif indices.ndim != 1 or indices.dtype.kind not in "iu" or data.ndim != 1 \
                or data.shape[0] != indices.shape[0]:
            problem = (f"indices (shape {indices.shape}, dtype {indices.dtype}) and data "
                       f"(shape {data.shape}) must be 1-D of one length, indices integers")
        elif indptr[0] != 0 or indptr[-1] > indices.shape[0] or (np.diff(indptr) < 0).any():
            problem = (f"indptr must start at 0, never decrease and end at most at "
                       f"{indices.shape[0]} (got start {indptr[0]}, end {indptr[-1]})")
        else:
            used = indices[: int(indptr[-1])]
            bad = np.flatnonzero((used < 0) | (used >= n_minor))
            if bad.size:
                k = int(bad[0])
                at = int(np.searchsorted(indptr, k, side="right") - 1)
                problem = (f"{major} {at} has an index {int(used[k])} outside "
                           f"0..{n_minor - 1} ({bad.size} such entries)")
    elif fmt == "coo":
        coords = getattr(A, "coords", None) or (A.row, A.col)
        for axis, (idx, size) in enumerate(zip(coords, A.shape)):
            if idx.shape != A.data.shape or (idx.size and (idx.min() < 0 or idx.max() >= size)):
                problem = (f"the {('row', 'column')[axis]} indices do not match the data or "
                           f"leave 0..{size - 1}")
                break
    if problem:
        raise InputError(
            f"{where}: A is not a consistent {fmt.upper()} matrix: {problem}; were its arrays "
            "changed after it was built? Rebuild it with scipy.sparse.csr_array(...)"
        )


def _validate_vector(v: Any, n: int, name: str, where: str) -> np.ndarray:
    """1-D finite float64 array of length n."""
    if sp.issparse(v):
        raise InputError(
            f"{where}: {name} must be a dense 1-D array of length {n}, got a "
            f"sparse matrix of shape {v.shape}; pass {name}.toarray().ravel()"
        )
    try:
        arr = np.asarray(v)
    except Exception:  # ragged lists and the like
        arr = np.empty(0, dtype=object)
    if arr.dtype.kind not in "iuf":
        raise InputError(
            f"{where}: {name} has dtype {arr.dtype}; it must be a real array of "
            f"length {n} (float64)"
        )
    if arr.shape != (n,):
        hint = f"; pass {name}.ravel()" if arr.size == n else ""
        raise InputError(
            f"{where}: {name} must have shape ({n},) to match A of shape "
            f"({n}, {n}), got shape {arr.shape}{hint}"
        )
    arr = np.ascontiguousarray(arr, dtype=np.float64)
    bad = np.flatnonzero(~np.isfinite(arr))
    if bad.size:
        i = int(bad[0])
        raise InputError(
            f"{where}: {name} has {bad.size} non-finite entries, the first at "
            f"index {i} ({name}[{i}] = {float(arr[i])!r}); check the load vector and "
            "boundary data"
        )
    return arr


def _validate_solve_args(rtol: Any, maxiter: Any, callback: Any, where: str) -> tuple:
    if isinstance(rtol, bool) or not isinstance(rtol, numbers.Real) or not (
        math.isfinite(rtol) and rtol > 0
    ):
        raise InputError(f"{where}: rtol must be a finite number > 0, got {rtol!r}")
    if maxiter is not None and (
        isinstance(maxiter, bool) or not isinstance(maxiter, numbers.Integral) or maxiter < 0
    ):
        raise InputError(
            f"{where}: maxiter must be an integer >= 0 or None (the method's "
            f"default), got {maxiter!r}"
        )
    if callback is not None and not callable(callback):
        raise InputError(
            f"{where}: callback must be callable as callback(xk) or None, got "
            f"{type(callback).__name__}"
        )
    return float(rtol), (None if maxiter is None else int(maxiter))


def _check_options(name: str, factory: Callable, options: dict, where: str) -> None:
    """Refuse options the factory does not name (unless it takes **kwargs)."""
    try:
        params = list(inspect.signature(factory).parameters.values())
    except (TypeError, ValueError):  # signature not introspectable: let it decide
        return
    if any(p.kind is p.VAR_KEYWORD for p in params):
        return
    valid = [
        p.name
        for p in params[1:]
        if p.kind in (p.POSITIONAL_OR_KEYWORD, p.KEYWORD_ONLY)
    ]
    unknown = [k for k in options if k not in valid]
    if unknown:
        raise InputError(
            f"{where}: option {unknown[0]!r} is not known to solver {name!r}; "
            f"valid options: {', '.join(valid) if valid else '(none)'}"
        )


# --------------------------------------------------------------------------
# prepared solver, one-call path
# --------------------------------------------------------------------------


class PreparedSolver:
    """A solver set up for one matrix, reusable for many right-hand sides.

    Made by :func:`prepare_solver`; do not construct directly.

    Attributes
    ----------
    method : str
        The registry name used (never ``"auto"``).
    n : int
        Number of unknowns.
    setup_seconds : float
        Wall time of the set-up; copied into every report.
    options : dict
        The set-up options as passed.
    """

    def __init__(self, method: str, n: int, backend: Any, setup_seconds: float, options: dict,
                 factory: Callable[..., Any] | None = None, pattern: tuple | None = None,
                 matrix: Any = None):
        self.method = method
        self.n = n
        self.setup_seconds = setup_seconds
        self.options = dict(options)
        self._backend = backend
        self._factory = factory
        self._pattern = pattern
        self._matrix = matrix  # for the check of every report (check_report)

    def __repr__(self) -> str:
        return (
            f"PreparedSolver(method={self.method!r}, n={self.n}, "
            f"setup_seconds={self.setup_seconds:.3g})"
        )

    def solve(
        self,
        b: Any,
        x0: Any = None,
        rtol: float = 1e-10,
        maxiter: int | None = None,
        callback: Callable[[np.ndarray], Any] | None = None,
    ) -> SolveReport:
        """Solve ``A x = b`` with the prepared set-up.

        Parameters
        ----------
        b : array_like, shape (n,)
            Right-hand side, real and finite.
        x0 : array_like, shape (n,), optional
            Initial guess (iterative methods; ``"direct"`` ignores it).
        rtol : float, optional
            Relative residual tolerance, ``||b - A x|| <= rtol * ||b||``.
        maxiter : int, optional
            Iteration limit; None takes the method's default.
        callback : callable, optional
            ``callback(xk)`` after each iteration with a copy of the iterate
            (``"direct"`` calls it once with the solution).

        Returns
        -------
        SolveReport
            With ``method`` and ``setup_seconds`` of this prepared solver.

        Raises
        ------
        InputError
            If ``b`` or ``x0`` has the wrong shape or non-finite entries, or
            ``rtol``, ``maxiter`` or ``callback`` is invalid.
        SolverError
            If a registered solver returns something other than a
            :class:`SolveReport`, or a report that fails :func:`check_report`
            (an ``x`` of the wrong shape or not finite, a claimed residual
            that ``||b - A x||`` contradicts).

        Examples
        --------
        >>> import numpy as np, scipy.sparse as sp
        >>> from galerkit.solvers import prepare_solver
        >>> A = sp.diags([-1.0, 2.0, -1.0], [-1, 0, 1], shape=(5, 5), format="csr")
        >>> lu = prepare_solver(A, "direct")
        >>> r1, r2 = lu.solve(np.ones(5)), lu.solve(np.arange(5.0))
        >>> r1.converged and r2.converged, r1.setup_seconds == r2.setup_seconds
        (True, True)
        """
        where = f"solve with {self.method!r}"
        b = _validate_vector(b, self.n, "b", where)
        with np.errstate(over="ignore"):
            bnorm = float(np.linalg.norm(b))
        if not math.isfinite(bnorm):
            raise InputError(
                f"{where}: b has entries up to {float(np.abs(b).max()):.3e}, so its norm "
                "overflows double precision and no residual can be measured; rescale the "
                "system (another unit for the data)")
        if x0 is not None:
            x0 = _validate_vector(x0, self.n, "x0", where)
        rtol, maxiter = _validate_solve_args(rtol, maxiter, callback, where)
        t0 = time.perf_counter()
        report = self._backend.solve(b, x0=x0, rtol=rtol, maxiter=maxiter, callback=callback)
        elapsed = time.perf_counter() - t0
        if not isinstance(report, SolveReport):
            raise SolverError(
                f"{where}: the registered solver returned {type(report).__name__}, "
                "not a SolveReport; fix its solve() method"
            )
        if self._matrix is not None:
            check_report(report, self._matrix, b, where)
        return replace(
            report,
            method=self.method,
            setup_seconds=self.setup_seconds,
            solve_seconds=elapsed,
        )


    def refresh(self, A: Any) -> bool:
        """Take new matrix values with the same sparsity pattern (time loops).

        Methods with a numeric-only path use it: ``"cg-amg"`` keeps its
        aggregates and recomputes prolongators, coarse operators and the
        coarsest factor.  Other methods repeat their whole set-up with the
        options they were prepared with.  ``setup_seconds`` becomes the time
        of this refresh.

        Parameters
        ----------
        A : scipy.sparse matrix, shape (n, n)
            The new matrix: the same shape and the same stored pattern
            (``indptr``, ``indices``) as the prepared one, e.g. re-assembled
            with ``out=``.

        Returns
        -------
        bool
            True when the numeric-only path was used, False when the set-up
            was repeated.

        Raises
        ------
        InputError
            If ``A`` is invalid or its shape or pattern differs (prepare a new
            solver for a new pattern).

        Examples
        --------
        >>> import numpy as np, scipy.sparse as sp
        >>> from galerkit.solvers import prepare_solver
        >>> A = sp.diags([-1.0, 2.0, -1.0], [-1, 0, 1], shape=(900, 900), format="csr")
        >>> amg = prepare_solver(A, "cg-amg")
        >>> A2 = A.copy(); A2.data *= 3.0
        >>> amg.refresh(A2)
        True
        >>> bool(np.allclose(3.0 * amg.solve(np.ones(900)).x, prepare_solver(A).solve(np.ones(900)).x))
        True
        """
        where = f"refresh of solver {self.method!r}"
        A = _validate_matrix(A, where)
        if A.shape != (self.n, self.n):
            raise InputError(
                f"{where}: the new matrix has shape {A.shape}, the prepared one "
                f"({self.n}, {self.n}); prepare a new solver for a new system")
        old = self._pattern
        if old is not None and not (
                (A.indptr is old[0] or np.array_equal(A.indptr, old[0]))
                and (A.indices is old[1] or np.array_equal(A.indices, old[1]))):
            raise InputError(
                f"{where}: the new matrix has another sparsity pattern than the prepared "
                "one (indptr/indices differ); refresh is for new values on the same pattern: "
                "prepare a new solver instead")
        t0 = time.perf_counter()
        hook = getattr(self._backend, "refresh", None)
        numeric_only = bool(callable(hook) and hook(A))
        if not numeric_only:
            self._backend = self._factory(A, **self.options)
        self._pattern = (A.indptr, A.indices)
        if self._matrix is not None:
            self._matrix = A
        self.setup_seconds = time.perf_counter() - t0
        return numeric_only


def prepare_solver(
    A: Any,
    method: str = "auto",
    *,
    dim: int | None = None,
    degree: int | None = None,
    **options: Any,
) -> PreparedSolver:
    """Validate ``A`` and set up a solver once, for many right-hand sides.

    Parameters
    ----------
    A : scipy.sparse matrix or array, shape (n, n)
        SPD system matrix, real and finite; converted to CSR float64 when
        it is not already (the caller's matrix is never modified).
    method : str, optional
        A name from :func:`available_solvers`, or ``"auto"`` (default) for
        :func:`choose_method`.
    dim, degree : int, optional
        Mesh dimension and element degree, used only by ``"auto"``.
    **options
        Set-up options of the method, e.g. ``memory_limit_bytes`` and
        ``ordering`` for ``"direct"``, ``theta``, ``max_coarse``, ``coarse_space``, ... for ``"cg-amg"``, ``amg_options`` for ``"cg-pyamg"``.

    Returns
    -------
    PreparedSolver
        Holds the set-up (factors, hierarchy) and its wall time.

    Raises
    ------
    InputError
        If ``A`` is not a square real finite SciPy sparse matrix, the method
        is unknown, or an option is not known to the method.
    ResourceError
        If the estimated memory of the set-up exceeds what is available.
    SolverError
        If the set-up fails (for example a singular matrix in ``"direct"``).

    Examples
    --------
    >>> import numpy as np, scipy.sparse as sp
    >>> from galerkit.solvers import prepare_solver
    >>> A = sp.diags([-1.0, 2.0, -1.0], [-1, 0, 1], shape=(50, 50), format="csr")
    >>> amg = prepare_solver(A, "cg-amg")
    >>> amg.method, amg.solve(np.ones(50)).converged
    ('cg-amg', True)
    >>> prepare_solver(A).method
    'direct'
    """
    where = "prepare_solver"
    A = _validate_matrix(A, where)
    n = A.shape[0]
    auto = isinstance(method, str) and method == "auto"
    name = choose_method(n, dim, degree) if auto else method
    entry = _lookup(name, where)
    if auto:
        where = f"prepare_solver (method 'auto' chose {name!r} for n={n})"
    _check_options(name, entry.factory, options, where)
    t0 = time.perf_counter()
    try:
        backend = entry.factory(A, **options)
    except GalerkitError:
        raise
    except MemoryError as exc:
        raise ResourceError(
            f"{where}: set-up of solver {name!r} for n={n} ran out of memory; "
            "try 'cg-amg', which needs far less memory than a factorisation"
        ) from exc
    except Exception as exc:
        raise SolverError(
            f"{where}: set-up of solver {name!r} for a {n}x{n} matrix with "
            f"{A.nnz} stored entries failed: {type(exc).__name__}: {exc}; check "
            "that A is SPD, or try another method"
        ) from exc
    setup = time.perf_counter() - t0
    if not callable(getattr(backend, "solve", None)):
        raise SolverError(
            f"{where}: the factory of solver {name!r} returned "
            f"{type(backend).__name__}, which has no solve() method"
        )
    return PreparedSolver(name, n, backend, setup, options, factory=entry.factory,
                          pattern=(A.indptr, A.indices), matrix=A)


#: relative residuals below this are round-off for :func:`check_report`
RESIDUAL_FLOOR = 1e-12


def check_report(report: SolveReport, A: Any, b: np.ndarray, where: str) -> None:
    """Refuse a solver's report that cannot be right.

    Every report of every solver (built-in or registered) passes here:

    * ``x`` is a real array of shape ``(n,)`` with finite entries;
    * ``residuals`` is a non-empty 1D array whose last entry (the claimed
      relative residual) is a finite number >= 0;
    * the claimed relative residual and the true one, ``||b - A x|| / ||b||``,
      agree within a factor 10 (both counted as at least ``RESIDUAL_FLOOR``,
      1e-12, the round-off level of the residual itself); skipped when
      ``b == 0``.

    Raises
    ------
    SolverError
        Naming the check that failed and the solver (``where``): its report
        is wrong, not the input.
    """
    x = report.x
    n = A.shape[0]
    if not isinstance(x, np.ndarray) or x.shape != (n,) or x.dtype.kind not in "iuf":
        raise SolverError(
            f"{where}: the solver reported x of "
            + (f"shape {x.shape}, dtype {x.dtype}" if isinstance(x, np.ndarray)
               else f"type {type(x).__name__}")
            + f"; it must be a real array of shape ({n},). Fix the solver's solve()")
    bad = ~np.isfinite(x)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise SolverError(
            f"{where}: the solver reported x with {int(bad.sum())} non-finite entries (first "
            f"x[{i}] = {x[i]}) and converged={report.converged}; the solution cannot be "
            "used. Try another method ('direct' or 'cg-amg'), or fix the solver")
    res = np.asarray(report.residuals)
    if res.ndim != 1 or res.size == 0 or res.dtype.kind not in "iuf" \
            or not (np.isfinite(res[-1]) and res[-1] >= 0):
        raise SolverError(
            f"{where}: the solver reported residuals {res!r:.80}; it must be a non-empty "
            "1D array ending with the relative residual (a finite number >= 0). Fix the "
            "solver's solve()")
    bnorm = float(np.linalg.norm(b))
    if bnorm == 0.0:
        return
    true = float(np.linalg.norm(b - A @ x.astype(np.float64, copy=False))) / bnorm
    claimed = float(res[-1])
    t, c = max(true, RESIDUAL_FLOOR), max(claimed, RESIDUAL_FLOOR)
    if t > 10.0 * c or c > 10.0 * t:
        raise SolverError(
            f"{where}: the solver claimed relative residual {claimed:.3e} "
            f"(converged={report.converged}), but ||b - A x|| / ||b|| = {true:.3e} for its "
            "x: more than a factor 10 apart, so the report cannot be trusted. Try another "
            "method ('direct' or 'cg-amg'), or fix the solver's residual")


def solve(
    A: Any,
    b: Any,
    method: str = "auto",
    rtol: float = 1e-10,
    maxiter: int | None = None,
    x0: Any = None,
    *,
    dim: int | None = None,
    degree: int | None = None,
    callback: Callable[[np.ndarray], Any] | None = None,
    **options: Any,
) -> SolveReport:
    """Solve the SPD system ``A x = b`` in one call.

    Same as ``prepare_solver(A, method, dim=dim, degree=degree,
    **options).solve(b, x0, rtol, maxiter, callback)``; keep a
    :func:`prepare_solver` object instead when several right-hand sides share
    ``A``.

    Parameters
    ----------
    A : scipy.sparse matrix or array, shape (n, n)
        SPD matrix, real and finite.
    b : array_like, shape (n,)
        Right-hand side, real and finite.
    method : str, optional
        Registry name or ``"auto"`` (default, see :func:`choose_method`).
    rtol : float, optional
        Relative residual tolerance (default 1e-10).
    maxiter : int, optional
        Iteration limit; None takes the method's default (``max(1000, n)``
        for ``"cg"`` and ``"cg-jacobi"``, 500 for ``"cg-amg"`` and ``"cg-pyamg"``).
    x0 : array_like, shape (n,), optional
        Initial guess for iterative methods.
    dim, degree : int, optional
        Used only by ``"auto"``.
    callback : callable, optional
        ``callback(xk)`` after each iteration.
    **options
        Set-up options of the method.

    Returns
    -------
    SolveReport
        Solution, convergence flag, residual history, timings.

    Raises
    ------
    InputError
        Invalid ``A``, ``b``, ``x0``, method, option or tolerance; a
        non-finite ``b`` is reported with its first bad index.
    ResourceError
        If ``"direct"`` would need more memory than is available.
    SolverError
        If the set-up fails.

    Examples
    --------
    >>> import numpy as np, scipy.sparse as sp
    >>> from galerkit.solvers import solve
    >>> A = sp.diags([-1.0, 2.0, -1.0], [-1, 0, 1], shape=(4, 4), format="csr")
    >>> rep = solve(A, np.array([1.0, 0.0, 0.0, 1.0]), method="cg")
    >>> rep.converged, rep.iterations, np.round(rep.x, 12).tolist()
    (True, 2, [1.0, 1.0, 1.0, 1.0])
    """
    return prepare_solver(A, method, dim=dim, degree=degree, **options).solve(
        b, x0=x0, rtol=rtol, maxiter=maxiter, callback=callback
    )


# --------------------------------------------------------------------------
# the preconditioned conjugate gradient loop (shared by the CG methods)
# --------------------------------------------------------------------------


def _pcg(
    A: Any,
    b: np.ndarray,
    x0: np.ndarray | None,
    rtol: float,
    maxiter: int,
    precondition: Callable[[np.ndarray], np.ndarray] | None,
    callback: Callable[[np.ndarray], Any] | None,
) -> tuple[np.ndarray, list[float], int, str]:
    """Preconditioned CG (Hestenes & Stiefel 1952; Saad 2003, ch. 9).

    Returns ``(x, history, iterations, breakdown)`` where ``history`` holds
    relative residual norms (the last one true) and ``breakdown`` is empty
    unless a curvature ``p.Ap`` or ``r.z`` was not positive.
    """
    n = b.shape[0]
    bnorm = float(np.linalg.norm(b))
    if bnorm == 0.0:
        return np.zeros(n), [0.0], 0, ""
    if x0 is None:
        x = np.zeros(n)
        r = b.copy()
    else:
        x = x0.copy()
        r = b - A @ x
    target = rtol * bnorm
    rnorm = float(np.linalg.norm(r))
    history = [rnorm / bnorm]
    apply = precondition if precondition is not None else (lambda v: v)

    z = apply(r)
    rz = float(r @ z)
    p = np.array(z, dtype=np.float64, copy=True)
    k = 0
    restarts = 0
    breakdown = ""
    true_checked = False
    while True:
        if rnorm <= target:
            r_true = b - A @ x
            tnorm = float(np.linalg.norm(r_true))
            history[-1] = tnorm / bnorm
            true_checked = True
            if tnorm <= target or k >= maxiter or restarts >= _MAX_TRUE_RESIDUAL_RESTARTS:
                break
            # rounding made the recurrence drift: restart from the true residual
            restarts += 1
            true_checked = False
            r, rnorm = r_true, tnorm
            z = apply(r)
            rz = float(r @ z)
            p = np.array(z, dtype=np.float64, copy=True)
        if k >= maxiter:
            break
        if not rz > 0.0:
            breakdown = (
                f"at iteration {k + 1} the preconditioned residual gave r.z = {rz:.3e}, "
                "not > 0, so the preconditioner or the matrix is not symmetric "
                "positive definite (SPD)"
            )
            break
        q = A @ p
        pq = float(p @ q)
        if not pq > 0.0:
            breakdown = (
                f"at iteration {k + 1} the search direction gave p.Ap = {pq:.3e}, "
                "not > 0, so the matrix is not symmetric positive definite (SPD)"
            )
            break
        alpha = rz / pq
        x += alpha * p
        r -= alpha * q
        k += 1
        true_checked = False
        rnorm = float(np.linalg.norm(r))
        history.append(rnorm / bnorm)
        if callback is not None:
            callback(x.copy())
        if rnorm <= target:
            continue
        z = apply(r)
        rz_new = float(r @ z)
        beta = rz_new / rz
        rz = rz_new
        p *= beta
        p += z
    if not true_checked:
        history[-1] = float(np.linalg.norm(b - A @ x)) / bnorm
    return x, history, k, breakdown


class _CGSolver:
    """Backend of the CG methods: a matrix, a preconditioner, a default maxiter."""

    def __init__(self, A, method, precondition, default_maxiter, options):
        self.A = A
        self.method = method
        self.precondition = precondition
        self.default_maxiter = default_maxiter
        self.options = options

    def solve(self, b, x0=None, rtol=1e-10, maxiter=None, callback=None):
        if maxiter is None:
            maxiter = self.default_maxiter
        t0 = time.perf_counter()
        x, history, k, breakdown = _pcg(
            self.A, b, x0, rtol, maxiter, self.precondition, callback
        )
        return _cg_report(self.method, x, history, k, breakdown, rtol, maxiter,
                          time.perf_counter() - t0, self.options)


def _cg_report(method, x, history, k, breakdown, rtol, maxiter, elapsed, options):
    """The SolveReport of a CG run, with the message of a breakdown or non-convergence."""
    final = history[-1]
    converged = not breakdown and final <= rtol
    if breakdown:
        message = (
            f"{method}: {breakdown}; stopped after {k} iterations with "
            f"relative residual {final:.3e} (tolerance rtol={rtol:.1e}). Check "
            "that Dirichlet conditions were applied and the stiffness matrix "
            "has the right sign, or use 'direct' for a symmetric indefinite matrix"
        )
    elif not converged:
        others = [m for m in ("cg-amg", "direct") if m != method]
        message = (
            f"{method}: not converged after {k} iterations: relative "
            f"residual {final:.3e} is above the tolerance rtol={rtol:.1e}. "
            f"Try a larger maxiter (was {maxiter}), a looser rtol, or "
            f"{' or '.join(repr(m) for m in others)}"
        )
    else:
        message = ""
    return SolveReport(
        x=x,
        converged=bool(converged),
        iterations=int(k),
        residuals=np.asarray(history, dtype=np.float64),
        solve_seconds=elapsed,
        method=method,
        options={**options, "rtol": rtol, "maxiter": maxiter},
        message=message,
    )


# --------------------------------------------------------------------------
# built-in: direct
# --------------------------------------------------------------------------


def _estimate_lu_bytes(n: int, nnz: int) -> float:
    """Crude 3D-like estimate of the LU factor memory (see module docstring)."""
    per_row = nnz / n
    fill = max(2.0 * nnz, 2.0 * per_row * float(n) ** (4.0 / 3.0))
    return 16.0 * fill


#: Environment variable that, when set, replaces the available memory (bytes) in
#: every memory guard: the assembler's pattern estimate and the "direct" factors.
MEMORY_LIMIT_VARIABLE = "GALERKIT_MEMORY_LIMIT_BYTES"


def memory_limit() -> tuple[float | None, str]:
    """The memory limit of the guards, in bytes, and where it comes from.

    Returns
    -------
    limit : float or None
        ``GALERKIT_MEMORY_LIMIT_BYTES`` when set, else the memory available
        now (``MemAvailable``, else the physical memory); None when neither
        can be read (then nothing is checked).
    source : str
        For messages: the variable and its value, or "available memory".

    Raises
    ------
    InputError
        If the variable is set to something other than a number > 0.
    """
    text = os.environ.get(MEMORY_LIMIT_VARIABLE, "").strip()
    if text:
        try:
            value = float(text)
        except ValueError:
            value = float("nan")
        if not (math.isfinite(value) and value > 0):
            raise InputError(
                f"environment variable {MEMORY_LIMIT_VARIABLE}={text!r} is not a number of "
                "bytes > 0; set it to, e.g., 8e9, or unset it to use the available memory"
            )
        return value, f"{MEMORY_LIMIT_VARIABLE}={text}"
    return _available_memory_bytes(), "available memory"


def _available_memory_bytes() -> int | None:
    """MemAvailable from /proc/meminfo, else physical memory, else None."""
    try:
        with open("/proc/meminfo", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    try:
        return int(os.sysconf("SC_PHYS_PAGES")) * int(os.sysconf("SC_PAGE_SIZE"))
    except (AttributeError, OSError, ValueError):
        return None


class _DirectSolver:
    """Backend of "direct": SuperLU factors reused for every right-hand side."""

    def __init__(self, A, lu, options):
        self.A = A
        self.lu = lu
        self.options = options

    def solve(self, b, x0=None, rtol=1e-10, maxiter=None, callback=None):
        t0 = time.perf_counter()
        bnorm = float(np.linalg.norm(b))
        if bnorm == 0.0:
            x = np.zeros(b.shape[0])
            rel = 0.0
        else:
            x = np.asarray(self.lu.solve(b), dtype=np.float64)
            rel = float(np.linalg.norm(b - self.A @ x)) / bnorm
        if callback is not None:
            callback(x.copy())
        elapsed = time.perf_counter() - t0
        converged = bool(np.isfinite(rel) and rel <= rtol)
        message = "" if converged else (
            f"direct: after 1 iteration (LU factorisation and triangular solves) "
            f"the relative residual {rel:.3e} is above the tolerance "
            f"rtol={rtol:.1e}; the matrix may be nearly singular or badly "
            "conditioned: check the Dirichlet conditions, or loosen rtol"
        )
        return SolveReport(
            x=x,
            converged=converged,
            iterations=1,
            residuals=np.array([rel]),
            solve_seconds=elapsed,
            method="direct",
            options={**self.options, "rtol": rtol, "maxiter": maxiter},
            message=message,
        )


def _direct(A, *, ordering: str = "MMD_AT_PLUS_A", memory_limit_bytes: float | None = None):
    """Sparse LU with diagonal pivoting in symmetric mode (suits SPD matrices).

    ``ordering`` is SuperLU's column ordering; ``"MMD_AT_PLUS_A"`` (minimum
    degree on the pattern of A + A^T) is the fill-reducing choice for
    symmetric matrices.  Diagonal pivots (``diag_pivot_thresh=0`` with
    ``SymmetricMode``) keep that symmetric ordering and are stable for SPD
    matrices.
    """
    where = "solver 'direct'"
    if ordering not in _ORDERINGS:
        raise InputError(
            f"{where}: option ordering={ordering!r} is not known; valid: "
            f"{', '.join(_ORDERINGS)} ('MMD_AT_PLUS_A' suits symmetric matrices)"
        )
    if memory_limit_bytes is not None and (
        isinstance(memory_limit_bytes, bool)
        or not isinstance(memory_limit_bytes, numbers.Real)
        or not memory_limit_bytes > 0
    ):
        raise InputError(
            f"{where}: option memory_limit_bytes must be a number > 0 or None "
            f"(available memory), got {memory_limit_bytes!r}"
        )
    n, nnz = A.shape[0], A.nnz
    estimate = _estimate_lu_bytes(n, nnz)
    if memory_limit_bytes is not None:
        limit, source = memory_limit_bytes, "memory_limit_bytes"
    else:
        limit, source = memory_limit()
    if limit is not None and estimate > limit:
        raise ResourceError(
            f"{where}: the LU factors of this {n}x{n} matrix with {nnz} stored "
            f"entries are estimated at {estimate / 2**20:.1f} MiB (3D-like fill "
            f"model), above the limit of {limit / 2**20:.1f} MiB ({source}); use "
            "method 'cg-amg' instead, or raise memory_limit_bytes if the matrix "
            "comes from a 2D mesh (its fill is smaller)"
        )
    try:
        lu = spla.splu(
            sp.csc_matrix(A),
            permc_spec=ordering,
            diag_pivot_thresh=0.0,
            options={"SymmetricMode": True},
        )
    except RuntimeError as exc:
        raise SolverError(
            f"{where}: LU factorisation of the {n}x{n} matrix failed ({exc}); "
            "a singular matrix usually means missing Dirichlet conditions "
            "(pure Neumann problem) or an unused dof"
        ) from exc
    options = {
        "ordering": ordering,
        "memory_limit_bytes": limit,
        "estimated_factor_bytes": estimate,
        "factor_nonzeros": int(lu.L.nnz + lu.U.nnz),
    }
    return _DirectSolver(A, lu, options)


register_solver(
    "direct", _direct,
    description="sparse LU (SuperLU, minimum-degree ordering on A+A^T), factorised once",
)


# --------------------------------------------------------------------------
# built-ins: the CG family
# --------------------------------------------------------------------------


def _cg(A):
    """Conjugate gradients without preconditioner; default maxiter max(1000, n)."""
    n = A.shape[0]
    return _CGSolver(A, "cg", None, max(1000, n), {})


register_solver(
    "cg", _cg,
    description="conjugate gradients, no preconditioner",
)


def _cg_jacobi(A):
    """CG preconditioned by the inverse diagonal; default maxiter max(1000, n)."""
    diag = A.diagonal()
    bad = np.flatnonzero(~(diag > 0.0))
    if bad.size:
        i = int(bad[0])
        raise InputError(
            f"solver 'cg-jacobi': diagonal entry of row {i} is {float(diag[i])!r} "
            f"({bad.size} rows have a diagonal <= 0); an SPD matrix has a "
            "positive diagonal: check the assembly and Dirichlet elimination"
        )
    inv_diag = 1.0 / diag
    n = A.shape[0]
    return _CGSolver(A, "cg-jacobi", lambda r: inv_diag * r, max(1000, n), {})


register_solver(
    "cg-jacobi", _cg_jacobi,
    description="conjugate gradients preconditioned by the inverse diagonal (Jacobi)",
)


def _amg_option_names() -> list[str]:
    """Keywords pyamg.smoothed_aggregation_solver accepts (its own and the hierarchy's)."""
    import pyamg

    names = [
        p.name
        for p in inspect.signature(pyamg.smoothed_aggregation_solver).parameters.values()
        if p.kind in (p.POSITIONAL_OR_KEYWORD, p.KEYWORD_ONLY) and p.name != "A"
    ]
    names += [
        p.name
        for p in inspect.signature(pyamg.MultilevelSolver.__init__).parameters.values()
        if p.kind in (p.POSITIONAL_OR_KEYWORD, p.KEYWORD_ONLY)
        and p.name not in ("self", "levels")
    ]
    return names


#: PyAMG keywords used unless amg_options overrides them: two symmetric
#: Gauss-Seidel sweeps before and after each coarse-grid correction.  With
#: PyAMG's single sweep the CG iteration count grew by 4 per uniform
#: refinement of the unit cube (4, 8, 11, 14 from 4^3 cells); with two, by
#: 2-3 (3, 5, 8, 11), measured on P1 Poisson at rtol 1e-10.
DEFAULT_AMG_OPTIONS = {
    "presmoother": ("gauss_seidel", {"sweep": "symmetric", "iterations": 2}),
    "postsmoother": ("gauss_seidel", {"sweep": "symmetric", "iterations": 2}),
}


#: Seed of NumPy's global generator while PyAMG builds a hierarchy (it draws
#: random start vectors), so that "cg-amg" is bitwise reproducible.
AMG_SEED = 0


def _cg_pyamg(A, *, amg_options: dict | None = None):
    """CG preconditioned by one smoothed-aggregation V-cycle of PyAMG.

    Kept beside the native ``"cg-amg"`` so that the two can be compared on
    the same system (``galerkit bench``).

    ``amg_options`` is passed unchanged as keywords to
    ``pyamg.smoothed_aggregation_solver`` (for example ``max_levels``,
    ``max_coarse``, ``strength``, ``smooth``, ``presmoother``,
    ``postsmoother``, ``coarse_solver``); keep the smoothers symmetric so that
    the V-cycle stays an SPD preconditioner.  Default maxiter 500.  The
    hierarchy is built with NumPy's global generator seeded with ``AMG_SEED``
    (the caller's generator state is restored), so set-up and solves are
    bitwise reproducible.
    """
    import pyamg

    where = "solver 'cg-pyamg'"
    if amg_options is None:
        amg_options = {}
    if not isinstance(amg_options, dict):
        raise InputError(
            f"{where}: option amg_options must be a dict of keywords for "
            f"pyamg.smoothed_aggregation_solver, got {type(amg_options).__name__}"
        )
    valid = _amg_option_names()
    unknown = [k for k in amg_options if k not in valid]
    if unknown:
        raise InputError(
            f"{where}: amg_options key {unknown[0]!r} is not accepted by "
            f"pyamg.smoothed_aggregation_solver; valid keys: {', '.join(valid)}"
        )
    # Explicit zeros of the pattern (right angles give zero couplings) would count
    # as connections when aggregating: build the hierarchy from a pruned copy.
    pruned = A
    if A.nnz and not np.all(A.data):
        pruned = A.copy()
        pruned.eliminate_zeros()
    keywords = {**DEFAULT_AMG_OPTIONS, **amg_options}
    # Fix: PyAMG estimates spectral radii (prolongation smoothing) from a random
    # start vector of NumPy's global generator, so two set-ups of one matrix gave
    # different hierarchies and solutions differing in the last bits.  PyAMG's own
    # advice for reproducibility is a fixed seed; the caller's state is restored.
    state = np.random.get_state()
    np.random.seed(AMG_SEED)
    try:
        hierarchy = pyamg.smoothed_aggregation_solver(pruned, **keywords)
    except (TypeError, ValueError) as exc:
        raise InputError(
            f"{where}: pyamg.smoothed_aggregation_solver refused amg_options="
            f"{amg_options!r}: {exc}; see the PyAMG documentation of that function"
        ) from exc
    finally:
        np.random.set_state(state)
    cycle = hierarchy.aspreconditioner(cycle="V")
    options = {
        "amg_options": dict(keywords),
        "levels": len(hierarchy.levels),
        "level_nonzeros": [int(lv.A.nnz) for lv in hierarchy.levels],
        "operator_complexity": float(hierarchy.operator_complexity()),
    }
    backend = _CGSolver(A, "cg-pyamg", cycle.matvec, 500, options)
    backend.hierarchy = hierarchy
    return backend


register_solver(
    "cg-pyamg", _cg_pyamg,
    description="conjugate gradients preconditioned by PyAMG's smoothed-aggregation V-cycle",
)


# --------------------------------------------------------------------------
# built-in: the native multigrid (galerkit.multigrid)
# --------------------------------------------------------------------------


class _MultigridSolver:
    """Backend of "cg-amg": a hierarchy and the compiled CG loop."""

    def __init__(self, hierarchy, options):
        self.h = hierarchy
        self.options = options

    def _system(self):
        fine = self.h._levels[0]
        return fine.ptr, fine.ind, fine.val

    def solve(self, b, x0=None, rtol=1e-10, maxiter=None, callback=None):
        if maxiter is None:
            maxiter = 500
        t0 = time.perf_counter()
        ptr, ind, val = self._system()
        if callback is None:
            x, history, k, status = self.h.pcg(ptr, ind, val, b, x0, rtol, maxiter,
                                               _MAX_TRUE_RESIDUAL_RESTARTS)
            breakdown = ""
            if status == 1:
                breakdown = ("the preconditioned residual gave r.z <= 0, so the matrix is not "
                             "symmetric positive definite (SPD)")
            elif status == 2:
                breakdown = ("the search direction gave p.Ap <= 0, so the matrix is not "
                             "symmetric positive definite (SPD)")
        else:  # a Python callback per iteration: the shared loop, the same V-cycle
            A = sp.csr_array((val, ind, ptr), shape=(self.h.n, self.h.n))
            x, history, k, breakdown = _pcg(A, b, x0, rtol, maxiter, self.h.apply, callback)
        return _cg_report("cg-amg", x, history, k, breakdown, rtol, maxiter,
                          time.perf_counter() - t0, self.options)

    def refresh(self, A):
        """New values with the same pattern: keep the aggregates (see Hierarchy.refresh)."""
        done = self.h.refresh(A)
        if done:
            self.options = {**self.options, **_hierarchy_facts(self.h)}
        return done


def _hierarchy_facts(h):
    return {
        "levels": len(h.levels),
        "level_sizes": [lv["n"] for lv in h.levels],
        "level_nonzeros": [lv["nnz"] for lv in h.levels],
        "operator_complexity": float(h.operator_complexity),
        "grid_complexity": float(h.grid_complexity),
        "hierarchy_bytes": int(h.memory_bytes()),
        "setup_phases": dict(h.setup_phases),
        "coarsest": h.coarsest,
        "first_aggregate_radius": h.first_aggregate_radius,
    }


def _cg_amg(A, *, coarse_space=None, theta=None, max_coarse=None, max_levels=None,
            smoother_degree=None, smoother_lower=None, fine_smoother_degree=None,
            aggregate_radius=None):
    """CG preconditioned by one V-cycle of galerkit's smoothed-aggregation multigrid.

    See :mod:`galerkit.multigrid` for the method.  Options (None takes the
    default of :data:`galerkit.multigrid.DEFAULTS`): ``theta`` strength
    threshold, ``max_coarse`` size of the dense coarsest level,
    ``max_levels``, ``smoother_degree`` and ``smoother_lower`` (Chebyshev
    degree and interval), ``coarse_space`` a P_k -> P1 interpolation for
    p-multigrid (with ``fine_smoother_degree`` on the P_k level),
    ``aggregate_radius`` 1, 2 or "auto" (first aggregation level; the
    report's ``first_aggregate_radius`` says which was used).
    Default maxiter 500.
    """
    from . import multigrid

    given = {"theta": theta, "max_coarse": max_coarse, "max_levels": max_levels,
             "smoother_degree": smoother_degree, "smoother_lower": smoother_lower,
             "fine_smoother_degree": fine_smoother_degree, "aggregate_radius": aggregate_radius}
    settings = {k: (multigrid.DEFAULTS[k] if v is None else v) for k, v in given.items()}
    h = multigrid.build_hierarchy(A, coarse_space=coarse_space, **settings)
    options = {**settings, "p_multigrid": coarse_space is not None,
               "method": "smoothed aggregation (Vanek, Mandel & Brezina 1996), "
                         "Chebyshev smoother in the l1-scaled operator, V-cycle",
               **_hierarchy_facts(h)}
    return _MultigridSolver(h, options)


register_solver(
    "cg-amg", _cg_amg,
    description="conjugate gradients preconditioned by galerkit's smoothed-aggregation "
                "multigrid V-cycle (compiled, thread-parallel)",
)
