"""Write examples/pipe-wall.msh: the cross-section of a pipe's insulation layer.

An annulus between r = 0.05 m (the pipe) and r = 0.10 m (the outer surface),
meshed with a structured polar grid (64 segments around, 8 layers through the
wall) and stored in Gmsh format 2.2 with named physical groups:

* ``"pipe"``  (lines on the inner circle),
* ``"air"``   (lines on the outer circle),
* ``"insulation"`` (the triangles).

Run ``python examples/make_pipe_mesh.py`` to write it again; it needs only
NumPy and meshio.  The circles are polygons, so a solution on this mesh
carries a geometry error of the order of r (1 - cos(pi / 64)), about 0.1 %.
"""

from pathlib import Path

import meshio
import numpy as np

R_INNER, R_OUTER = 0.05, 0.10
N_AROUND, N_LAYERS = 64, 8


def pipe_mesh(n_around=N_AROUND, n_layers=N_LAYERS):
    r = np.linspace(R_INNER, R_OUTER, n_layers + 1)
    t = 2 * np.pi * np.arange(n_around) / n_around
    rr, tt = np.meshgrid(r, t, indexing="ij")  # (layer, angle)
    points = np.column_stack([(rr * np.cos(tt)).ravel(), (rr * np.sin(tt)).ravel(),
                              np.zeros(rr.size)])

    def vid(j, i):
        return j * n_around + (i % n_around)

    tris = []
    for j in range(n_layers):
        for i in range(n_around):
            a, b, c, d = vid(j, i), vid(j, i + 1), vid(j + 1, i + 1), vid(j + 1, i)
            tris += [(a, c, b), (a, d, c)]  # counter-clockwise
    inner = [(vid(0, i), vid(0, i + 1)) for i in range(n_around)]
    outer = [(vid(n_layers, i), vid(n_layers, i + 1)) for i in range(n_around)]
    cells = [("line", np.array(inner + outer)), ("triangle", np.array(tris))]
    physical = [np.array([1] * n_around + [2] * n_around), np.full(len(tris), 3)]
    return meshio.Mesh(points, cells,
                       cell_data={"gmsh:physical": physical, "gmsh:geometrical": physical},
                       field_data={"pipe": np.array([1, 1]), "air": np.array([2, 1]),
                                   "insulation": np.array([3, 2])})


if __name__ == "__main__":
    target = Path(__file__).with_name("pipe-wall.msh")
    meshio.write(target, pipe_mesh(), file_format="gmsh22", binary=False)
    print(f"wrote {target}")
