"""Memory guards of the generators and of refine_uniform: refuse before allocating."""

from __future__ import annotations

import numpy as np
import pytest

import galerkit as gk
from galerkit.errors import InputError, ResourceError
from galerkit.generators import mesh_bytes_estimate


@pytest.mark.parametrize("make", [lambda: gk.structured_tetrahedra(20, 20, 20),
                                  lambda: gk.structured_triangles(100, 100),
                                  lambda: gk.l_shaped_triangles(50)])
def test_generators_refuse_a_mesh_above_the_memory_limit_with_the_figures(make, monkeypatch):
    monkeypatch.setenv("GALERKIT_MEMORY_LIMIT_BYTES", "100000")
    with pytest.raises(ResourceError, match=r"need an estimated .* bytes.*GALERKIT_MEMORY_LIMIT"):
        make()


def test_refine_uniform_refuses_a_fine_mesh_above_the_limit(monkeypatch):
    coarse = gk.structured_tetrahedra(4, 4, 4)
    need = mesh_bytes_estimate(coarse.n_vertices * 8, coarse.n_cells * 8, 3)
    monkeypatch.setenv("GALERKIT_MEMORY_LIMIT_BYTES", str(need // 2))
    with pytest.raises(ResourceError, match="refine fewer times"):
        gk.refine_uniform(coarse)
    monkeypatch.setenv("GALERKIT_MEMORY_LIMIT_BYTES", str(need * 4))
    assert gk.refine_uniform(coarse).n_cells == 8 * coarse.n_cells


def test_refine_uniform_of_an_array_is_an_input_error():
    with pytest.raises(InputError, match="expected a galerkit Mesh, got ndarray"):
        gk.refine_uniform(np.zeros((3, 2)))


def test_the_estimate_covers_the_arrays_the_mesh_keeps():
    m = gk.structured_tetrahedra(6, 5, 4)
    kept = m.points.nbytes + m.cells.nbytes + m.cell_volumes.nbytes
    assert mesh_bytes_estimate(m.n_vertices, m.n_cells, 3) > 2 * kept
