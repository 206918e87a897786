"""Write examples/layered-pipe.msh: a steel pipe in two layers of insulation.

The cross-section of a steel pipe (wall from r = 45 mm to 50 mm) wrapped in
mineral wool (50 mm to 80 mm) and an outer foam layer (80 mm to 100 mm),
meshed with a structured polar grid (96 segments around, rings through each
layer) and stored in Gmsh format 2.2 with named physical groups:

* surfaces (cell regions): ``"steel"``, ``"wool"``, ``"foam"``;
* lines (facet groups): ``"bore"`` (the inner circle), ``"outside"`` (the
  outer circle).

Run ``python examples/make_layered_pipe_mesh.py`` to write it again; it needs
only NumPy and meshio.  The circles are polygons, so a solution on this mesh
carries a geometry error of the order of 1 - cos(pi / 96), about 0.05 %.
"""

from pathlib import Path

import meshio
import numpy as np

#: (name, inner radius, outer radius, rings) of each layer, inside out (m)
LAYERS = (("steel", 0.045, 0.050, 2), ("wool", 0.050, 0.080, 8), ("foam", 0.080, 0.100, 6))
N_AROUND = 96


def layered_pipe_mesh(layers=LAYERS, n_around=N_AROUND):
    radii = [layers[0][1]]
    ring_layer = []
    for k, (_, r0, r1, rings) in enumerate(layers):
        radii += list(np.linspace(r0, r1, rings + 1)[1:])
        ring_layer += [k] * rings
    r = np.array(radii)
    t = 2 * np.pi * np.arange(n_around) / n_around
    rr, tt = np.meshgrid(r, t, indexing="ij")  # (ring, angle)
    points = np.column_stack([(rr * np.cos(tt)).ravel(), (rr * np.sin(tt)).ravel(),
                              np.zeros(rr.size)])

    def vid(j, i):
        return j * n_around + (i % n_around)

    tris, group = [], []
    for j, k in enumerate(ring_layer):
        for i in range(n_around):
            a, b, c, d = vid(j, i), vid(j, i + 1), vid(j + 1, i + 1), vid(j + 1, i)
            tris += [(a, c, b), (a, d, c)]  # counter-clockwise
            group += [10 + k, 10 + k]
    n = len(ring_layer)
    inner = [(vid(0, i), vid(0, i + 1)) for i in range(n_around)]
    outer = [(vid(n, i), vid(n, i + 1)) for i in range(n_around)]
    cells = [("line", np.array(inner + outer)), ("triangle", np.array(tris))]
    physical = [np.array([1] * n_around + [2] * n_around), np.array(group)]
    field = {"bore": np.array([1, 1]), "outside": np.array([2, 1])}
    for k, (name, *_) in enumerate(layers):
        field[name] = np.array([10 + k, 2])
    return meshio.Mesh(points, cells,
                       cell_data={"gmsh:physical": physical, "gmsh:geometrical": physical},
                       field_data=field)


if __name__ == "__main__":
    target = Path(__file__).with_name("layered-pipe.msh")
    meshio.write(target, layered_pipe_mesh(), file_format="gmsh22", binary=False)
    print(f"wrote {target}")
