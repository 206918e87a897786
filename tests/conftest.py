"""Suite-wide settings, applied before galerkit is imported.

``GALERKIT_PARALLEL_FROM=0``: kernels that have a serial twin for small problems
(``galerkit.compilation.by_size``) run their parallel version in every test, so
the thread-count and determinism checks see the parallel code whatever the size
of their meshes; ``tests/test_determinism.py`` checks the twins against it.
"""

import os

os.environ.setdefault("GALERKIT_PARALLEL_FROM", "0")
