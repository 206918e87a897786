"""Files: meshes in, results and pictures out.

:mod:`.readwrite` reads meshes (``read_mesh``) and writes solutions
(``write_solution``, atomic writes, the ``.pvtu`` index); :mod:`.plots` draws
PNG pictures.  The public names of :mod:`.readwrite` are re-exported here, so
``galerkit.bindings.files.read_mesh`` is the reader.
"""

from .readwrite import (STALE_SECONDS, TAG_ARRAY_PREFIX, SampledSolution, atomic_path,
                        default_refinements, read_mesh, sample_solution, write_atomically,
                        write_parallel_index, write_solution, xml_name)

__all__ = ["STALE_SECONDS", "TAG_ARRAY_PREFIX", "SampledSolution", "atomic_path",
           "default_refinements", "read_mesh", "sample_solution", "write_atomically",
           "write_parallel_index", "write_solution", "xml_name"]
