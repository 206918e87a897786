"""The exceptions galerkit raises.

Every error names what was wrong, where (cell, dof, facet, file, key) and what
to do.  All derive from :class:`GalerkitError`; each also derives from the
built-in class that fits (``ValueError`` for bad input, ``RuntimeError`` for
failures while running), so callers that already catch those keep working.

========================  ==================  ======================================
class                     built-in base       raised for
========================  ==================  ======================================
``GalerkitError``         ``Exception``       base of all below
``InputError``            ``ValueError``      bad arrays, options, coefficients
``MeshError``             ``InputError``      invalid mesh: shapes, indices, cells
``ProblemError``          ``InputError``      ill-posed problem: singular BCs, ...
``SolverError``           ``RuntimeError``    a solver that failed or cannot run
``ResourceError``         ``RuntimeError``    estimated memory beyond what exists
========================  ==================  ======================================

``UnsupportedError`` (built-in base ``NotImplementedError``) is raised for a
valid request that galerkit does not implement; it names what is missing.
"""

from __future__ import annotations

__all__ = [
    "GalerkitError",
    "InputError",
    "MeshError",
    "ProblemError",
    "SolverError",
    "ResourceError",
    "UnsupportedError",
]


class GalerkitError(Exception):
    """Base class of every error raised by galerkit."""


class InputError(GalerkitError, ValueError):
    """An argument (array, option, coefficient, file content) is invalid."""


class MeshError(InputError):
    """A mesh is invalid: wrong shapes or dtypes, bad indices, degenerate cells."""


class ProblemError(InputError):
    """A problem statement is ill-posed (for example singular boundary data)."""


class SolverError(GalerkitError, RuntimeError):
    """A linear solver failed, or cannot be set up for this matrix."""


class ResourceError(GalerkitError, RuntimeError):
    """The estimated memory of a step exceeds the memory available."""


class UnsupportedError(GalerkitError, NotImplementedError):
    """A valid request that galerkit does not implement (yet); the message names
    what is missing and what is supported instead."""
