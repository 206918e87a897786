"""Problem files: a Poisson/diffusion problem described in TOML.

A problem file names a mesh (a file, or one of the built-in generators), the
element degree, the conductivity, the source, the boundary conditions by
facet tag, the solver, the outputs and, optionally, an exact solution to
measure the error against.  Coefficients are short formulas of the
coordinates ``x``, ``y``, ``z`` read by
:func:`galerkit.bindings.command.expressions.compile_expression` (never run as Python).
The schema is documented in docs/problem-files.md; in short::

    title = "..."                      # optional
    [constants]   name = number, ...   # usable in every formula
    [mesh]        file = "part.msh" | generator = "square" | "box" | "l-shape",
                  cells, lower, upper, refine, merge_duplicates (files only),
                  regions = { name = "condition", ... } (generators only; a file
                  brings its cell groups as regions)
    [discretization]  degree = 1..4
    [material]    conductivity = number | "formula" | [[kxx, kxy], [kxy, kyy]]
                  | { region = one of those, ..., default = ... }
    [source]      value = number | "formula" | { region = number | "formula", ... }
    [[boundary]]  tag = "name", kind = "dirichlet" (u) | "neumann" (inflow)
                  | "robin" (exchange, u_outside); untagged facets:
                  homogeneous Neumann
    [solver]      method = "auto" | registered name, rtol, maxiter
    [output]      folder, name, vtu, plot, mesh_overlay, units, length_unit,
                  fluxes = ["group" | "a/b", ...], gradient_flux, probes = [[x, y], ...],
                  slices = ["x=0.5", ...] (3D), isolines = N (2D)
    [exact]       solution = "formula", gradient = ["d/dx", "d/dy", ...]
    [adapt]       tol, relative_tol, max_dofs, max_levels, bulk (adaptive P1 on
                  triangles, driven by the guaranteed error bound)

:func:`load_problem` reads and checks the whole file -- including reading the
mesh, compiling every formula and checking every tag -- so that every mistake
surfaces before anything is solved, as an :class:`~galerkit.errors.InputError`
whose message names the file, the line where it can be found, the key path
(``boundary[2].kind``; entries of ``[[boundary]]`` count from 1), what is
wrong and what to write instead.  Unknown keys are named together with the
valid ones.

Examples
--------
>>> import os, tempfile
>>> folder = tempfile.mkdtemp()
>>> path = os.path.join(folder, "plate.toml")
>>> with open(path, "w") as f:
...     _ = f.write('''
... [mesh]
... generator = "square"
... cells = [8, 8]
... [source]
... value = "2*pi^2*sin(pi*x)*sin(pi*y)"
... [[boundary]]
... tag = "boundary"
... kind = "dirichlet"
... u = 0
... [exact]
... solution = "sin(pi*x)*sin(pi*y)"
... ''')
>>> spec = load_problem(path)
>>> problem, options = spec.build()
>>> options.degree, options.method, sorted(problem.dirichlet)
(1, 'auto', ['boundary'])
>>> sol = problem.solve(options.degree, options.method, options.rtol)
>>> from galerkit import l2_error
>>> l2_error(sol.disc, sol.u, options.exact) < 0.05
True
"""

from __future__ import annotations

import difflib
import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

try:  # Python 3.11+
    import tomllib
except ModuleNotFoundError:  # pragma: no cover - Python 3.10
    import tomli as tomllib

from galerkit.errors import InputError

from .expressions import Expression, compile_expression

__all__ = ["load_problem", "parse_problem", "ProblemSpec", "RunOptions", "BoundaryEntry",
           "SECTIONS", "BOUNDARY_KINDS", "GENERATORS"]

#: The top-level keys and sections, and the keys each section accepts.
SECTIONS = {
    "title": None,
    "constants": None,  # any names
    "mesh": ("file", "generator", "cells", "lower", "upper", "refine", "merge_duplicates",
             "regions"),
    "discretization": ("degree",),
    "material": ("conductivity",),
    "source": ("value",),
    "boundary": ("tag", "kind", "u", "inflow", "exchange", "u_outside"),
    "solver": ("method", "rtol", "maxiter"),
    "output": ("folder", "name", "vtu", "plot", "mesh_overlay", "units", "length_unit",
               "fluxes", "gradient_flux", "probes", "slices", "isolines", "error_bound"),
    "exact": ("solution", "gradient"),
    "adapt": ("tol", "relative_tol", "max_dofs", "max_levels", "bulk"),
}

#: ``kind -> (value keys, meaning)`` of the boundary conditions.
#: ``n`` is the outward unit normal; facets in no entry get homogeneous Neumann
#: (conductivity * du/dn = 0: no flux through them).
BOUNDARY_KINDS = {
    "dirichlet": (("u",), "u = u, the prescribed value"),
    "neumann": (("inflow",), "conductivity * du/dn = inflow, the flux into the domain "
                "through the facet (n the outward normal)"),
    "robin": (("exchange", "u_outside"),
              "conductivity * du/dn = exchange * (u_outside - u), an exchange with the "
              "outside proportional to the difference"),
}

#: mesh file suffixes whose files name other files (XDMF's HDF5 data): refused
#: under ``stay_in_folder``, which cannot follow them
_NAMES_OTHER_FILES = (".xdmf", ".xmf")

#: ``generator -> (dimension, default cells)`` of the built-in meshes.
GENERATORS = {"square": (2, 16), "box": (3, 8), "l-shape": (2, 8)}

#: ``[output] error_bound = "auto"`` computes the bound of a solve on a tetrahedral
#: mesh up to this many cells: the 3D patch problems cost about 20 us per cell on
#: the reference machine (4 s for 162,000 tetrahedra against a 0.2 s solve).
BOUND_AUTO_TETRAHEDRA = 100_000
#: the same for P2-P4 on tetrahedra: the RT_k patch problems cost about 0.5 ms per
#: cell for P2 (2.1 s for 3,072 tetrahedra against a 0.1-0.5 s solve), more for P3-P4
BOUND_AUTO_TETRAHEDRA_PK = 5_000


# ----------------------------------------------------------------------------
# results
# ----------------------------------------------------------------------------
@dataclass
class BoundaryEntry:
    """One ``[[boundary]]`` entry, checked.

    ``values`` maps the kind's value keys to a float or a compiled
    :class:`~galerkit.bindings.command.expressions.Expression`.
    """

    index: int  # counts from 1, as in messages
    tag: str
    kind: str
    values: dict


@dataclass
class RunOptions:
    """What to do with a problem, beside the problem itself.

    Attributes
    ----------
    degree : int
    method : str
        ``"auto"`` or a registered solver name.
    rtol : float
    maxiter : int or None
    folder : pathlib.Path
        Output folder (relative paths in the file start at the file's folder;
        the default is ``galerkit-out`` in the current folder).
    stem : str
        Base name of the output files (the problem file's name without suffix).
    name : str
        Name of the field in the outputs.
    vtu, plot, mesh_overlay : bool
    units, length_unit : str
    title : str
    exact : callable or None
        Exact solution, ``exact(x)`` with ``x`` (dim, n) -> (n,).
    exact_gradient : callable or None
        ``exact_gradient(x)`` -> (dim, n).
    fluxes : list of str or None
        Facet groups and region interfaces (``"a/b"``) whose heat flow the
        report gives; None: every group with a condition.
    gradient_flux : bool
        Also report the gradient flux beside the consistent one.
    probes : ndarray (n, dim) or None
        Points whose values the report and ``<stem>-probes.csv`` give.
    slices : list of (axis, value) or None
        Planes of the 3D pictures (default: the three mid-planes).
    isolines : int
        Contour lines on the 2D picture (0: none).
    error_bound : str
        ``"auto"`` (the default: the bound of every solve the estimator covers,
        on tetrahedral meshes up to :data:`BOUND_AUTO_TETRAHEDRA` cells for P1 and
        :data:`BOUND_AUTO_TETRAHEDRA_PK` for P2-P4, where it costs more than the
        solve), ``"on"`` or ``"off"``.
    adapt : dict or None
        The ``[adapt]`` section as keyword arguments of :func:`galerkit.adapt`
        (``tol``, ``relative_tol``, ``max_dofs``, ``max_levels``, ``bulk``);
        None: one solve on the given mesh.
    """

    degree: int = 1
    method: str = "auto"
    rtol: float = 1e-10
    maxiter: int | None = None
    folder: Path = Path("galerkit-out")
    stem: str = "solution"
    name: str = "u"
    vtu: bool = True
    plot: bool = False
    mesh_overlay: bool = False
    units: str = ""
    length_unit: str = ""
    title: str = ""
    exact: Any = None
    exact_gradient: Any = None
    fluxes: Any = None
    gradient_flux: bool = False
    probes: Any = None
    slices: Any = None
    isolines: int = 0
    error_bound: str = "auto"
    adapt: Any = None


@dataclass
class ProblemSpec:
    """A checked problem file; :meth:`build` turns it into a problem.

    Attributes
    ----------
    source : str
        Where it came from (the file path, or a description).
    data : dict
        The raw TOML table.
    mesh : Mesh
        The mesh, read or generated (and refined) at load time.
    mesh_description : str
        One line for reports, e.g. ``"generator square, 16 x 16 cells"``.
    conductivity, source_term :
        Numbers, compiled expressions, or a constant tensor (ndarray).
    boundary : list of BoundaryEntry
    options : RunOptions
    constants : dict
    """

    source: str
    data: dict
    mesh: Any
    mesh_description: str
    conductivity: Any
    source_term: Any
    boundary: list
    options: RunOptions
    constants: dict = field(default_factory=dict)

    def build(self):
        """The :class:`~galerkit.PoissonProblem` and the :class:`RunOptions`.

        Returns
        -------
        (PoissonProblem, RunOptions)
            A new problem each call (on the same mesh); the options are a
            copy, free to change (for example from command-line flags).
        """
        from dataclasses import replace

        from galerkit.problem import PoissonProblem

        dirichlet, neumann, robin = {}, {}, {}
        for e in self.boundary:
            v = {k: _kernel_value(x) for k, x in e.values.items()}
            if e.kind == "dirichlet":
                dirichlet[e.tag] = v["u"]
            elif e.kind == "neumann":
                neumann[e.tag] = v["inflow"]
            else:
                robin[e.tag] = (v["exchange"], v["u_outside"])
        problem = PoissonProblem(self.mesh, conductivity=_kernel_value(self.conductivity),
                                 source=_kernel_value(self.source_term), dirichlet=dirichlet,
                                 neumann=neumann, robin=robin)
        return problem, replace(self.options)


def _kernel_value(v):
    """Constants go to the kernel as floats (cheaper paths), formulas as callables;
    a per-region table value by value."""
    if isinstance(v, dict):
        return {k: _kernel_value(x) for k, x in v.items()}
    if isinstance(v, Expression) and v.is_constant:
        return v.value
    return v


# ----------------------------------------------------------------------------
# reading
# ----------------------------------------------------------------------------
def load_problem(path, *, stay_in_folder=False) -> ProblemSpec:
    """Read, check and prepare a problem file.

    Parameters
    ----------
    path : str or path-like
        A TOML file in the schema of this module (docs/problem-files.md).
    stay_in_folder : bool, default False
        Refuse a ``[mesh] file`` or ``[output] folder`` that resolves (after
        symbolic links, ``..`` and absolute paths) outside the problem file's
        folder, before the mesh is read, and refuse ``.xdmf`` meshes (they name
        further files): for services that run problem files they do not trust
        (the command-line flag ``--stay-in-folder``).

    Returns
    -------
    ProblemSpec

    Raises
    ------
    InputError
        A missing or unreadable file, a TOML syntax error (with the line, the
        column and a caret), an unknown section or key (with the valid ones),
        a value of the wrong type or out of range (with the key path), a bad
        formula (with the caret of the expression reader), an unreadable mesh
        file, a boundary tag the mesh does not have (with the tags it has), or,
        with ``stay_in_folder``, a mesh file or output folder outside the
        problem file's folder (with the key and the resolved path).
    """
    p = Path(path)
    if not p.exists():
        raise InputError(f"problem file {str(p)!r} does not exist; check the path")
    if p.is_dir():
        raise InputError(f"problem file {str(p)!r} is a folder; pass a .toml file")
    try:
        raw = p.read_bytes()
    except OSError as exc:
        raise InputError(f"problem file {str(p)!r} cannot be read: {exc.strerror or exc}") \
            from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        col = exc.start - (raw.rfind(b"\n", 0, exc.start) + 1) + 1
        raise InputError(f"problem file {str(p)!r}, line {line}, column {col}: byte "
                         f"0x{raw[exc.start]:02x} is not UTF-8 text; save the file as "
                         "UTF-8") from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(_toml_message(str(p), text, exc)) from None
    except RecursionError:
        raise InputError(f"problem file {str(p)!r}: arrays or tables are nested too deeply "
                         "to read; a problem file needs at most a few levels") from None
    try:
        return parse_problem(data, source=str(p), base=p.parent, text=text, stem=p.stem,
                             stay_in_folder=stay_in_folder)
    except RecursionError:
        raise InputError(f"problem file {str(p)!r}: a value is nested too deeply to check; a "
                         "problem file needs at most a few levels") from None


def _toml_message(where: str, text: str, exc) -> str:
    msg = str(exc)
    m = re.search(r"\(at line (\d+), column (\d+)\)", msg)
    if m is None:
        head = msg.replace(" (at end of document)", "")
        return (f"problem file {where!r}: TOML syntax error at the end of the file: {head}; "
                "check for an unclosed bracket or string")
    line, col = int(m.group(1)), int(m.group(2))
    head = msg[: m.start()].rstrip()
    lines = text.splitlines()
    shown = lines[line - 1] if 0 < line <= len(lines) else ""
    caret = " " * (max(col, 1) - 1) + "^"
    return (f"problem file {where!r}, line {line}, column {col}: TOML syntax error: {head}\n"
            f"    {shown}\n    {caret}\n"
            "write key = value pairs, strings in double quotes (formulas too: "
            "value = \"sin(pi*x)\"), and section names in [brackets]")


class _Reader:
    """Checks one problem table; every message names source, line and key path."""

    def __init__(self, source: str, text: str | None):
        self.source = source
        self.lines = text.splitlines() if text is not None else None
        self.confine_to = None  # the folder paths must stay in (stay_in_folder), or None

    def inside(self, path: Path, key: tuple, what: str) -> None:
        """With ``stay_in_folder``, refuse ``path`` unless it resolves inside the folder."""
        if self.confine_to is None:
            return
        try:
            folder = self.confine_to.resolve()
            resolved = path.resolve()  # follows symbolic links, removes ".."
        except (OSError, RuntimeError):  # a loop of symbolic links
            self.fail(key, f"the {what} {str(path)!r} cannot be resolved (a loop of "
                      "symbolic links?), so --stay-in-folder cannot tell where it leads",
                      f"name a {what} inside the problem file's folder without links")
        if resolved == folder or resolved.is_relative_to(folder):
            return
        self.fail(key, f"the {what} resolves to {str(resolved)!r}, outside the problem "
                  f"file's folder {str(folder)!r} (refused under --stay-in-folder)",
                  f"put the {what} in that folder or below it and name it by a relative "
                  "path without '..' or links that lead out")

    # -- locations -----------------------------------------------------------
    def line_of(self, path: tuple) -> int | None:
        """Best-effort line of a key path such as ("boundary", 1, "kind") (0-based index)."""
        if self.lines is None or not path:
            return None
        section, rest = path[0], list(path[1:])
        index = rest.pop(0) if rest and isinstance(rest[0], int) else None
        key = rest[0] if rest else None
        if len(path) == 1:
            top = self._top_key_line(section)
            if top is not None:
                return top
        header = None
        count = -1
        for i, line in enumerate(self.lines):
            m = re.match(r"^\[\[?\s*\"?([A-Za-z0-9_\-]+)\"?\s*\]", line.strip())
            if m and m.group(1) == section:
                count += 1
                if index is None or count == index:
                    header = i
                    break
        if header is None:  # an inline table, or a dotted key at the top
            return self._top_key_line(section)
        if key is None:
            return header + 1
        for j in range(header + 1, len(self.lines)):
            s = self.lines[j].strip()
            if s.startswith("["):
                break
            if re.match(rf"^\"?{re.escape(str(key))}\"?\s*=", s):
                return j + 1
        return header + 1

    def _top_key_line(self, key) -> int | None:
        for i, line in enumerate(self.lines or []):
            s = line.strip()
            if s.startswith("["):
                return None
            if re.match(rf"^\"?{re.escape(str(key))}\"?\s*(=|\.)", s):
                return i + 1
        return None

    def where(self, path: tuple) -> str:
        line = self.line_of(path)
        loc = f"problem file {self.source!r}" + (f", line {line}" if line else "")
        return f"{loc}: {_path_text(path)}"

    def fail(self, path: tuple, what: str, todo: str = ""):
        raise InputError(f"{self.where(path)}: {what}" + (f"; {todo}" if todo else ""))

    # -- tables and values ---------------------------------------------------------
    def table(self, value, path: tuple, allowed) -> dict:
        if not isinstance(value, dict):
            self.fail(path, f"must be a table ([{_path_text(path)}] section with key = value "
                      f"lines), got {_type_word(value)}")
        if allowed is not None:
            for k in value:
                if k not in allowed:
                    self.unknown(path + (k,), k, allowed)
        return value

    def unknown(self, path, key, allowed):
        near = difflib.get_close_matches(str(key), list(allowed), n=1)
        hint = f"did you mean {near[0]!r}? " if near else ""
        what = "section" if len(path) == 1 else "key"
        self.fail(path, f"unknown {what} {key!r}",
                  f"{hint}valid {what}s{' here' if len(path) > 1 else ''}: "
                  f"{', '.join(allowed)}")

    def integer(self, value, path, lo=None, hi=None) -> int:
        if isinstance(value, bool) or not isinstance(value, int):
            self.fail(path, f"must be an integer, got {_type_word(value)}",
                      "write a whole number without quotes, for example 2")
        if (lo is not None and value < lo) or (hi is not None and value > hi):
            rng = f"{lo} to {hi}" if hi is not None else f"at least {lo}"
            self.fail(path, f"must be {rng}, got {value}")
        return int(value)

    def number(self, value, path, positive=False) -> float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            self.fail(path, f"must be a number, got {_type_word(value)}",
                      "write a number without quotes, for example 1e-10")
        f = float(value)
        if not math.isfinite(f):
            self.fail(path, f"must be finite, got {f}")
        if positive and f <= 0:
            self.fail(path, f"must be positive, got {f}")
        return f

    def string(self, value, path, choices=None) -> str:
        if not isinstance(value, str):
            self.fail(path, f"must be a string, got {_type_word(value)}",
                      "put the text in double quotes")
        if choices is not None and value not in choices:
            near = difflib.get_close_matches(value, list(choices), n=1)
            hint = f"did you mean {near[0]!r}? " if near else ""
            self.fail(path, f"{value!r} is not one of the accepted values",
                      f"{hint}write one of: {', '.join(repr(c) for c in choices)}")
        return value

    def boolean(self, value, path) -> bool:
        if not isinstance(value, bool):
            self.fail(path, f"must be true or false, got {_type_word(value)}",
                      "write true or false without quotes")
        return value

    def formula(self, value, path, dim, constants) -> Expression:
        if isinstance(value, bool) or not isinstance(value, (str, int, float)):
            self.fail(path, f"must be a number or a formula in double quotes, got "
                      f"{_type_word(value)}", "for example 1.5 or \"1 + x^2\"")
        try:
            return compile_expression(value, dim=dim, name=_path_text(path), constants=constants)
        except InputError as exc:
            line = self.line_of(path)
            loc = f"problem file {self.source!r}" + (f", line {line}" if line else "")
            raise InputError(f"{loc}: {exc}") from None


def _path_text(path: tuple) -> str:
    out = ""
    for part in path:
        if isinstance(part, int):
            out += f"[{part + 1}]"
        else:
            out += ("." if out else "") + str(part)
    return out


def _type_word(v) -> str:
    if isinstance(v, bool):
        return f"true/false ({str(v).lower()})"
    if isinstance(v, int):
        return f"an integer ({v})"
    if isinstance(v, float):
        return f"a number ({v})"
    if isinstance(v, str):
        return f"a string ({v!r})"
    if isinstance(v, list):
        return "a list"
    if isinstance(v, dict):
        return "a table"
    return f"a {type(v).__name__}"


def parse_problem(data: dict, *, source: str = "<problem>", base=".", text: str | None = None,
                  stem: str = "solution", stay_in_folder: bool = False) -> ProblemSpec:
    """Check a problem given as a dict (the parsed TOML) and prepare it.

    Parameters
    ----------
    data : dict
        The problem table, as ``tomllib.loads`` returns it.
    source : str
        Named in messages (a file name).
    base : path-like
        Folder that relative paths (``mesh.file``, ``output.folder``) start from.
    text : str, optional
        The TOML text, used to give line numbers in messages.
    stem : str
        Base name of the output files.
    stay_in_folder : bool, default False
        Refuse a mesh file or output folder outside ``base``, as
        :func:`load_problem`.

    Returns
    -------
    ProblemSpec

    Raises
    ------
    InputError
        As :func:`load_problem`.
    """
    r = _Reader(source, text)
    base = Path(base)
    r.confine_to = base if stay_in_folder else None
    r.table(data, (), tuple(SECTIONS))
    if "mesh" not in data:
        raise InputError(f"problem file {source!r}: the [mesh] section is missing; add one "
                         "with file = \"part.msh\" or generator = \"square\"")
    # constants
    constants = {}
    if "constants" in data:
        r.table(data["constants"], ("constants",), None)
        for k, v in data["constants"].items():
            constants[k] = r.number(v, ("constants", k))
    title = r.string(data["title"], ("title",)) if "title" in data else ""
    mesh, description = _read_mesh_section(r, data["mesh"], base, constants)
    dim = mesh.dim
    if constants:
        try:  # the expression reader checks the names (no x, y, z, pi, functions)
            compile_expression("0", dim=dim, name="constants", constants=constants)
        except InputError as exc:
            r.fail(("constants",), str(exc).splitlines()[0].removeprefix("constants: "))
    opts = RunOptions(title=title, stem=stem)
    if "discretization" in data:
        t = r.table(data["discretization"], ("discretization",), SECTIONS["discretization"])
        if "degree" in t:
            opts.degree = r.integer(t["degree"], ("discretization", "degree"), 1, 4)
    conductivity = 1.0
    if "material" in data:
        t = r.table(data["material"], ("material",), SECTIONS["material"])
        if "conductivity" in t:
            conductivity = _per_region(
                r, t["conductivity"], ("material", "conductivity"), mesh,
                lambda v, path: _conductivity(r, v, dim, constants, path))
    source_term = 0.0
    if "source" in data:
        t = r.table(data["source"], ("source",), SECTIONS["source"])
        if "value" in t:
            source_term = _per_region(r, t["value"], ("source", "value"), mesh,
                                      lambda v, path: r.formula(v, path, dim, constants))
    boundary = _boundary_entries(r, data.get("boundary", []), mesh, dim, constants)
    if "solver" in data:
        _solver_section(r, data["solver"], opts)
    if "output" in data:
        _output_section(r, data["output"], opts, base, mesh)
    if "exact" in data:
        _exact_section(r, data["exact"], opts, dim, constants)
    if "adapt" in data:
        _adapt_section(r, data["adapt"], opts, mesh, conductivity)
    return ProblemSpec(source=source, data=data, mesh=mesh, mesh_description=description,
                       conductivity=conductivity, source_term=source_term, boundary=boundary,
                       options=opts, constants=constants)


def _read_mesh_section(r: _Reader, t, base: Path, constants=None):
    from galerkit import refine_uniform
    from galerkit.generators import l_shaped_triangles, structured_tetrahedra, \
        structured_triangles

    t = r.table(t, ("mesh",), SECTIONS["mesh"])
    has_file, has_gen = "file" in t, "generator" in t
    if has_file and "regions" in t:
        r.fail(("mesh", "regions"), "applies to generated meshes only; a mesh file brings "
               "its own regions (its cell groups)", "remove it, or use generator = ...")
    if has_file == has_gen:
        r.fail(("mesh",), "give exactly one of file and generator" if has_file else
               "neither file nor generator is given",
               "write file = \"part.msh\" (a mesh file) or generator = \"square\", \"box\" or "
               "\"l-shape\"")
    refine = r.integer(t["refine"], ("mesh", "refine"), 0, 8) if "refine" in t else 0
    if has_file:
        for k in ("cells", "lower", "upper"):
            if k in t:
                r.fail(("mesh", k), "applies to generated meshes only, not to mesh files",
                       "remove it, or use generator = ... instead of file")
        name = r.string(t["file"], ("mesh", "file"))
        fpath = Path(name)
        if not fpath.is_absolute():
            fpath = base / fpath
        r.inside(fpath, ("mesh", "file"), "mesh file")
        if r.confine_to is not None and fpath.suffix.lower() in _NAMES_OTHER_FILES:
            r.fail(("mesh", "file"), f"a {fpath.suffix} mesh names further files (its "
                   "heavy data), which --stay-in-folder cannot check",
                   "convert the mesh to .msh or .vtu")
        merge = (r.boolean(t["merge_duplicates"], ("mesh", "merge_duplicates"))
                 if "merge_duplicates" in t else False)
        from ..files.readwrite import _read_mesh

        try:
            mesh, joined = _read_mesh(fpath, merge_duplicates=merge)
        except InputError as exc:
            r.fail(("mesh", "file"), str(exc))
        description = f"file {str(fpath)}"
        if joined:
            description += (f", {joined} coincident vert{'ices' if joined > 1 else 'ex'} "
                            "joined (merge_duplicates)")
    else:
        if "merge_duplicates" in t:
            r.fail(("mesh", "merge_duplicates"), "applies to mesh files only; generated "
                   "meshes have no coincident vertices", "remove it")
        gen = r.string(t["generator"], ("mesh", "generator"), tuple(GENERATORS))
        dim, default = GENERATORS[gen]
        if gen == "l-shape":
            for k in ("lower", "upper"):
                if k in t:
                    r.fail(("mesh", k), "does not apply to the l-shape generator (the "
                           "domain is (-1, 1)^2 without the quadrant x > 0, y < 0)",
                           "remove it")
            n = r.integer(t["cells"], ("mesh", "cells"), 1, 10_000) if "cells" in t else default
            mesh = l_shaped_triangles(n)
            description = f"generator l-shape, {n} cells per unit length"
        else:
            counts = _cells(r, t.get("cells", default), dim)
            lower = _point(r, t, "lower", dim, 0.0)
            upper = _point(r, t, "upper", dim, 1.0)
            for a in range(dim):
                if not upper[a] > lower[a]:
                    r.fail(("mesh", "upper"), f"must exceed mesh.lower in every coordinate; "
                           f"coordinate {a + 1} has lower {lower[a]} and upper {upper[a]}")
            if gen == "square":
                mesh = structured_triangles(*counts, lower, upper)
            else:
                mesh = structured_tetrahedra(*counts, lower, upper)
            description = (f"generator {gen}, {' x '.join(map(str, counts))} cells on "
                           f"{list(lower)}..{list(upper)}")
    if "regions" in t:
        preds = _region_predicates(r, t["regions"], mesh.dim, constants)
        from galerkit.errors import MeshError

        try:
            mesh.set_regions(preds)
        except MeshError as exc:
            r.fail(("mesh", "regions"), str(exc))
        description += f", regions {', '.join(mesh.region_names)}"
    for _ in range(refine):
        mesh = refine_uniform(mesh)
    if refine:
        description += f", refined {refine} time{'s' if refine > 1 else ''}"
    return mesh, description


def _cells(r: _Reader, v, dim):
    path = ("mesh", "cells")
    if isinstance(v, list):
        if len(v) != dim:
            r.fail(path, f"needs {dim} counts (one per axis), got {len(v)}",
                   f"write cells = {[8] * dim} or one number for all axes")
        return [r.integer(c, path, 1, 100_000) for c in v]
    return [r.integer(v, path, 1, 100_000)] * dim


def _point(r: _Reader, t, key, dim, default):
    path = ("mesh", key)
    if key not in t:
        return [default] * dim
    v = t[key]
    if not isinstance(v, list) or len(v) != dim:
        r.fail(path, f"needs a list of {dim} numbers, got {_type_word(v)}"
               + (f" of length {len(v)}" if isinstance(v, list) else ""),
               f"for example {key} = {[default] * dim}")
    return [r.number(c, path) for c in v]


def _per_region(r: _Reader, v, path, mesh, read):
    """A value, or a table ``{region: value}`` checked against the mesh's regions."""
    if not isinstance(v, dict):
        return read(v, path)
    from galerkit.regions import DEFAULT_KEY

    known = mesh.region_names
    listing = ", ".join(repr(n) for n in known)
    out = {}
    for key, value in v.items():
        if key != DEFAULT_KEY and key not in known:
            near = difflib.get_close_matches(key, list(known), n=1)
            r.fail(path + (key,), f"the mesh has no region {key!r}",
                   (f"did you mean {near[0]!r}? " if near else "")
                   + f"its regions are {listing} (or write {DEFAULT_KEY} = ... for the rest)")
        out[key] = read(value, path + (key,))
    missing = [n for n in known if n not in out]
    if missing and DEFAULT_KEY not in out:
        r.fail(path, f"no value for region(s) {', '.join(repr(n) for n in missing)} of the "
               f"mesh (regions: {listing})",
               f"give each a value, or {DEFAULT_KEY} = ... for the rest")
    return out


def _region_predicates(r: _Reader, t, dim, constants):
    """``[mesh] regions = {name = "condition"}`` -> ``{name: predicate}``."""
    path = ("mesh", "regions")
    t = r.table(t, path, None)
    if not t:
        r.fail(path, "is empty", "write for example regions = { core = \"x < 0.5\" }")
    out = {}
    for name, cond in t.items():
        if name in ("default", "domain"):
            r.fail(path + (name,), f"{name!r} is reserved (the cells no condition selects "
                   "form the region 'domain')", "choose another name")
        if not isinstance(cond, str):
            r.fail(path + (name,), f"must be a condition in double quotes, got "
                   f"{_type_word(cond)}", "for example \"x < 0.5\"")
        expr = r.formula(cond, path + (name,), dim, constants)
        out[name] = _Condition(expr)
    return out


class _Condition:
    """``x -> bool mask``: where a compiled formula is non-zero."""

    def __init__(self, expr):
        self.expr = expr

    def __call__(self, x):
        return np.asarray(self.expr(x)) != 0

    def __repr__(self):
        return f"condition({self.expr.text})"


def _conductivity(r: _Reader, v, dim, constants, path=("material", "conductivity")):
    if isinstance(v, list):
        if len(v) != dim or not all(isinstance(row, list) and len(row) == dim for row in v):
            r.fail(path, f"as a tensor it needs {dim} rows of {dim} numbers",
                   "write a number, a formula in double quotes, or for example "
                   + ("[[1, 0], [0, 2]]" if dim == 2 else "[[1, 0, 0], [0, 1, 0], [0, 0, 2]]"))
        k = np.array([[r.number(c, path) for c in row] for row in v])
        if not np.allclose(k, k.T, rtol=1e-12, atol=0.0):
            r.fail(path, "the tensor is not symmetric", "make entry (i, j) equal entry (j, i)")
        if np.linalg.eigvalsh(k).min() <= 0:
            r.fail(path, "the tensor is not positive definite (an eigenvalue is <= 0)",
                   "a conductivity must conduct in every direction")
        return k
    expr = r.formula(v, path, dim, constants)
    if expr.is_constant and expr.value <= 0:
        r.fail(path, f"must be positive, got {expr.value}")
    return expr


def _boundary_entries(r: _Reader, entries, mesh, dim, constants):
    if isinstance(entries, dict):
        r.fail(("boundary",), "must be a list of [[boundary]] entries (double brackets), "
               "not a single [boundary] table", "write [[boundary]] above each condition")
    if not isinstance(entries, list):
        r.fail(("boundary",), f"must be a list of [[boundary]] entries, got {_type_word(entries)}")
    out = []
    seen = {}
    tags = sorted(mesh.facet_groups)
    for i, e in enumerate(entries):
        path = ("boundary", i)
        r.table(e, path, SECTIONS["boundary"])
        for k in ("tag", "kind"):
            if k not in e:
                r.fail(path, f"has no {k!r}",
                       "each [[boundary]] entry needs tag = \"...\" and kind = \"dirichlet\", "
                       "\"neumann\" or \"robin\"")
        tag = e["tag"]
        if isinstance(tag, int) and not isinstance(tag, bool):
            tag = str(tag)  # Gmsh physical ids without a name
        tag = r.string(tag, path + ("tag",))
        if tag not in mesh.facet_groups:
            near = difflib.get_close_matches(tag, tags, n=1)
            hint = f"did you mean {near[0]!r}? " if near else ""
            r.fail(path + ("tag",), f"the mesh has no facet tag {tag!r}",
                   f"{hint}its tags are: {', '.join(repr(t) for t in tags)}")
        kind = r.string(e["kind"], path + ("kind",), tuple(BOUNDARY_KINDS))
        keys, _ = BOUNDARY_KINDS[kind]
        for k in SECTIONS["boundary"][2:]:
            if k in e and k not in keys:
                r.fail(path + (k,), f"does not apply to kind {kind!r}",
                       f"kind {kind!r} takes {' and '.join(keys)}")
        values = {}
        for k in keys:
            if k not in e:
                r.fail(path, f"kind {kind!r} needs {k!r}",
                       f"add {k} = <number or formula>; kind {kind!r} means "
                       f"{BOUNDARY_KINDS[kind][1]}")
            values[k] = r.formula(e[k], path + (k,), dim, constants)
        if kind == "robin" and values["exchange"].is_constant \
                and values["exchange"].value < 0:
            r.fail(path + ("exchange",), f"must not be negative, got "
                   f"{values['exchange'].value}", "an exchange coefficient is >= 0")
        if tag in seen:
            r.fail(path + ("tag",), f"tag {tag!r} already has a condition (boundary entry "
                   f"{seen[tag] + 1})", "give each tag one condition; split the facets into "
                   "several tags in the mesher if parts need different ones")
        seen[tag] = i
        out.append(BoundaryEntry(index=i + 1, tag=tag, kind=kind, values=values))
    _refuse_overlaps(r, out, mesh)
    return out


def _same_formulas(a, b):
    """Whether two entries' value tables are the same condition (same formulas)."""
    def key(e):
        return e.value if e.is_constant else e.text.strip()
    return a.keys() == b.keys() and all(key(a[k]) == key(b[k]) for k in a)


def _refuse_overlaps(r: _Reader, entries, mesh):
    from galerkit.problem import conflicting_conditions

    clash = conflicting_conditions(mesh, [(e.kind, e.tag, e.values) for e in entries],
                                   same=_same_formulas)
    if clash is None:
        return
    i, j, count = clash
    a, b = entries[i], entries[j]
    r.fail(("boundary", b.index - 1, "tag"),
           f"tag {b.tag!r} ({b.kind}) shares {count} boundary facet(s) with tag {a.tag!r} "
           f"({a.kind}, boundary entry {a.index}), and the two conditions differ",
           "give each facet one condition: split the facets into separate tags in the "
           "mesher, or remove one of the entries")


def _solver_section(r: _Reader, t, opts: RunOptions):
    from galerkit.solvers import available_solvers

    t = r.table(t, ("solver",), SECTIONS["solver"])
    if "method" in t:
        opts.method = r.string(t["method"], ("solver", "method"),
                               ("auto", *available_solvers()))
    if "rtol" in t:
        opts.rtol = r.number(t["rtol"], ("solver", "rtol"), positive=True)
        if opts.rtol >= 1:
            r.fail(("solver", "rtol"), f"must be below 1, got {opts.rtol}",
                   "a relative tolerance such as 1e-10")
    if "maxiter" in t:
        opts.maxiter = r.integer(t["maxiter"], ("solver", "maxiter"), 1)


def _output_section(r: _Reader, t, opts: RunOptions, base: Path, mesh=None):
    t = r.table(t, ("output",), SECTIONS["output"])
    if mesh is not None:
        _output_quantities(r, t, opts, mesh)
    if "folder" in t:
        f = Path(r.string(t["folder"], ("output", "folder")))
        opts.folder = f if f.is_absolute() else base / f
        r.inside(opts.folder, ("output", "folder"), "output folder")
    if "name" in t:
        name = r.string(t["name"], ("output", "name"))
        if not re.fullmatch(r"[A-Za-z][A-Za-z0-9_\-]*", name):
            r.fail(("output", "name"), f"{name!r} is not a plain name",
                   "use letters, digits, _ and -, starting with a letter")
        opts.name = name
    for k in ("vtu", "plot", "mesh_overlay"):
        if k in t:
            setattr(opts, k, r.boolean(t[k], ("output", k)))
    for k in ("units", "length_unit"):
        if k in t:
            setattr(opts, k, r.string(t[k], ("output", k)))
    if "error_bound" in t:
        v = t["error_bound"]
        if isinstance(v, bool):
            opts.error_bound = "on" if v else "off"
        elif v == "auto":
            opts.error_bound = "auto"
        else:
            r.fail(("output", "error_bound"), f"must be true, false or \"auto\", got "
                   f"{_type_word(v) if not isinstance(v, str) else repr(v)}",
                   "true computes the bound whatever the mesh size, false never, \"auto\" "
                   f"(the default) up to {BOUND_AUTO_TETRAHEDRA} tetrahedra for P1, "
                   f"{BOUND_AUTO_TETRAHEDRA_PK} for P2-P4")


def _output_quantities(r: _Reader, t, opts: RunOptions, mesh):
    """fluxes, gradient_flux, probes, slices, isolines of ``[output]``."""
    dim = mesh.dim
    if "fluxes" in t:
        path = ("output", "fluxes")
        v = t["fluxes"]
        if not isinstance(v, list) or not v:
            r.fail(path, f"must be a non-empty list of facet group or interface names, got "
                   f"{_type_word(v)}", "for example fluxes = [\"xmin\", \"steel/foam\"]")
        names = []
        for name in v:
            name = r.string(name, path)
            if name not in mesh.facet_groups and not _is_interface(mesh, name):
                groups = ", ".join(repr(g) for g in mesh.facet_groups)
                itf = ", ".join(repr(i) for i in mesh.interfaces) or "none"
                r.fail(path, f"{name!r} is neither a facet group nor an interface of the mesh",
                       f"facet groups: {groups}; interfaces (either order): {itf}")
            names.append(name)
        opts.fluxes = names
    if "gradient_flux" in t:
        opts.gradient_flux = r.boolean(t["gradient_flux"], ("output", "gradient_flux"))
    if "probes" in t:
        path = ("output", "probes")
        v = t["probes"]
        if not isinstance(v, list) or not v or not all(
                isinstance(p, list) and len(p) == dim for p in v):
            r.fail(path, f"must be a list of points of {dim} coordinates",
                   "for example probes = [" + ", ".join(["[0.5" + ", 0.5" * (dim - 1) + "]"])
                   + "]")
        pts = np.array([[r.number(c, path) for c in p] for p in v])
        from galerkit.evaluation import locate_points

        cells, _ = locate_points(mesh, np.ascontiguousarray(pts.T))
        if (cells < 0).any():
            i = int(np.flatnonzero(cells < 0)[0])
            lo, hi = mesh.points.min(axis=0), mesh.points.max(axis=0)
            r.fail(path, f"probe {i + 1} at {pts[i].tolist()} lies outside the mesh "
                   f"(which spans {lo.tolist()} .. {hi.tolist()})",
                   "move it inside, or remove it")
        opts.probes = pts
    if "slices" in t:
        path = ("output", "slices")
        if dim != 3:
            r.fail(path, "applies to 3D meshes only", "remove it (2D pictures show the "
                   "whole field)")
        v = t["slices"]
        if not isinstance(v, list) or not v:
            r.fail(path, f"must be a non-empty list of planes, got {_type_word(v)}",
                   "for example slices = [\"x=0.5\", \"z=0.1\"]")
        from galerkit.sections import parse_plane

        planes = []
        for p in v:
            try:
                planes.append(parse_plane(r.string(p, path)))
            except InputError as exc:
                r.fail(path, str(exc))
        opts.slices = planes
    if "isolines" in t:
        if dim != 2:
            r.fail(("output", "isolines"), "applies to 2D meshes only", "remove it")
        opts.isolines = r.integer(t["isolines"], ("output", "isolines"), 0, 100)


def _is_interface(mesh, name):
    parts = name.split("/")
    return name in mesh.interfaces or (
        len(parts) == 2 and f"{parts[1]}/{parts[0]}" in mesh.interfaces)


def _exact_section(r: _Reader, t, opts: RunOptions, dim, constants):
    t = r.table(t, ("exact",), SECTIONS["exact"])
    if "solution" not in t:
        r.fail(("exact",), "has no 'solution'", "add solution = \"<formula>\"")
    opts.exact = r.formula(t["solution"], ("exact", "solution"), dim, constants)
    if "gradient" in t:
        g = t["gradient"]
        if not isinstance(g, list) or len(g) != dim:
            r.fail(("exact", "gradient"), f"needs a list of {dim} formulas (one per "
                   f"coordinate), got {_type_word(g)}" + (f" of length {len(g)}"
                                                         if isinstance(g, list) else ""),
                   "for example gradient = [\"pi*cos(pi*x)*sin(pi*y)\", "
                   "\"pi*sin(pi*x)*cos(pi*y)\"]")
        comps = [r.formula(c, ("exact", "gradient"), dim, constants) for c in g]
        opts.exact_gradient = _Gradient(comps)


class _Gradient:
    """``x -> (dim, n)`` from one compiled formula per component."""

    def __init__(self, comps):
        self.comps = comps

    def __call__(self, x):
        return np.stack([c(x) for c in self.comps])

    def __repr__(self):
        return f"gradient({', '.join(c.text for c in self.comps)})"


#: ``[adapt]`` defaults (those of :func:`galerkit.adapt`)
ADAPT_DEFAULTS = {"max_dofs": 200_000, "max_levels": 30, "bulk": 0.5}


def _adapt_section(r: _Reader, t, opts: RunOptions, mesh, conductivity):
    """``[adapt]``: tolerances, budgets and marking fraction of the adaptive loop."""
    t = r.table(t, ("adapt",), SECTIONS["adapt"])
    out = dict(ADAPT_DEFAULTS)
    for key in ("tol", "relative_tol"):
        if key in t:
            out[key] = r.number(t[key], ("adapt", key), positive=True)
    if out.get("relative_tol", 0.0) >= 1:
        r.fail(("adapt", "relative_tol"), f"must be below 1, got {out['relative_tol']}",
               "a fraction of the energy norm, for example relative_tol = 0.01 (1 %)")
    if "max_dofs" in t:
        out["max_dofs"] = r.integer(t["max_dofs"], ("adapt", "max_dofs"), 1)
    if "max_levels" in t:
        out["max_levels"] = r.integer(t["max_levels"], ("adapt", "max_levels"), 1, 1000)
    if "bulk" in t:
        out["bulk"] = r.number(t["bulk"], ("adapt", "bulk"), positive=True)
        if out["bulk"] > 1:
            r.fail(("adapt", "bulk"), f"must be at most 1, got {out['bulk']}",
                   "the fraction of the squared error bound the marked cells carry, for "
                   "example bulk = 0.5")
    if opts.degree != 1 and mesh is not None and mesh.dim == 3:
        r.fail(("adapt",), f"adaptive refinement on tetrahedra runs on P1 (the P2-P4 error "
               f"bound there is given per solve, not adapted on); discretization.degree is "
               f"{opts.degree}",
               "remove discretization.degree or set it to 1 (P2-P4 adapt on triangles)")
    values = conductivity.values() if isinstance(conductivity, dict) else (conductivity,)
    for v in values:
        if isinstance(v, Expression) and not v.is_constant:
            r.fail(("material", "conductivity"), f"the formula {v.text!r} varies inside "
                   "cells, and the error bound of [adapt] needs a conductivity constant on "
                   "each cell", "give a number or a tensor (per region, if it differs "
                   "between regions), or remove the [adapt] section")
    opts.adapt = out
