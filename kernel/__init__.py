"""galerkit: Lagrange finite elements on triangles and tetrahedra."""

import os as _os

import numba as _nb

# GALERKIT_CACHE_DIR: where the compiled kernels are cached (see compilation.py);
# numba reads its cache folder when each kernel module is imported, below.
if _os.environ.get("GALERKIT_CACHE_DIR") and not _os.environ.get("NUMBA_CACHE_DIR"):
    _os.environ["NUMBA_CACHE_DIR"] = _os.path.expanduser(_os.environ["GALERKIT_CACHE_DIR"])
    _nb.config.reload_config()

# Start numba's thread pool before any cached kernel is loaded: a cached serial
# function that calls a parallel one can otherwise fail to resolve the
# scheduler symbols when it is the first compiled code to run.
_nb.get_num_threads()

from .errors import *  # noqa: F401,F403
from . import compilation  # noqa: F401  (counts compile time from the first kernel on)
from .mesh import Mesh, MeshQuality, remove_unreferenced_vertices, merge_duplicate_vertices
from .generators import structured_triangles, structured_tetrahedra, l_shaped_triangles
from .quadrature import QuadratureRule, simplex_quadrature
from .elements import LagrangeElement, lagrange_element

__version__ = "0.1.0"
from .refinement import refine_uniform
from .dofs import Discretization
from .solvers import (SolveReport, solve, prepare_solver, register_solver,
                      available_solvers, choose_method)
from .assembly import Assembler
from .functionals import (l2_error, h1_seminorm_error, energy_error, l2_norm, h1_norm,
                          h1_seminorm, energy, nested_error)
from .problem import PoissonProblem, Solution
from .convergence import convergence_study, RateTable
from .estimators import ErrorEstimate, estimate_error
from .bisection import refine_marked, min_angles
from .adaptivity import adapt, AdaptiveRun, LevelTable

#: Mesh files from Python: ``galerkit.read_mesh`` and ``galerkit.write_solution`` are
#: ``galerkit.bindings.files.read_mesh`` / ``write_solution``.  This is the one place
#: where the kernel reaches into bindings (tests/test_layout.py allows exactly this):
#: a lazy attribute, so ``import galerkit`` itself never imports bindings or meshio.
_FROM_FILES = ("read_mesh", "write_solution")


def __getattr__(name):
    if name in _FROM_FILES:
        from galerkit.bindings import files
        value = getattr(files, name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'galerkit' has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(_FROM_FILES))
