"""The ways in and out of galerkit, one subpackage per kind of outside.

- :mod:`galerkit.bindings.command`: people (the ``galerkit`` command, problem
  files, coefficient formulas);
- :mod:`galerkit.bindings.files`: files (meshes in, results and pictures out);
- :mod:`galerkit.bindings.host`: host codes (array-level API, C entry points,
  operator adapters, ``c/``);
- :mod:`galerkit.bindings.distributed`: MPI ranks (partitioning, the PETSc engine).

Imports point one way: bindings import the kernel (``galerkit``), never the
reverse.  Between subpackages only these seams exist (``tests/test_layout.py``
checks them): ``command`` uses ``files`` and ``distributed``; ``distributed``
uses ``files`` to write its pieces; ``files`` and ``host`` use the kernel only.
"""
