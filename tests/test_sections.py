"""Plane sections of tetrahedral meshes (the 3D pictures draw them)."""

import numpy as np
import pytest

from galerkit import Discretization, structured_tetrahedra, structured_triangles
from galerkit.errors import InputError
from galerkit.sections import parse_plane, plane_section


def areas(sec):
    P = sec.points[sec.triangles]
    return 0.5 * np.abs((P[:, 1, 0] - P[:, 0, 0]) * (P[:, 2, 1] - P[:, 0, 1])
                        - (P[:, 1, 1] - P[:, 0, 1]) * (P[:, 2, 0] - P[:, 0, 0]))


def in_space(sec):
    X = np.zeros((3, len(sec.points)))
    X[sec.axis] = sec.value
    k = [a for a in range(3) if a != sec.axis]
    X[k[0]], X[k[1]] = sec.points[:, 0], sec.points[:, 1]
    return X


MESH = structured_tetrahedra(4, 3, 5, upper=(2.0, 1.0, 1.0))


@pytest.mark.parametrize("axis, value, area, perimeter", [
    # the box (0, 2) x (0, 1) x (0, 1): sections are rectangles (plain geometry)
    (0, 1.0, 1.0, 4.0), (1, 0.37, 2.0, 6.0), (2, 0.5, 2.0, 6.0),
    (2, 0.0, 2.0, 6.0), (2, 1.0, 2.0, 6.0), (0, 2.0, 1.0, 4.0),
])
def test_sections_of_a_box_cover_the_rectangle_once(axis, value, area, perimeter):
    disc = Discretization(MESH, 1)
    sec = plane_section(disc, disc.interpolate(lambda x: x[0]), axis, value)
    assert areas(sec).sum() == pytest.approx(area, rel=1e-12)
    assert (areas(sec) > 0).all()
    seg = sec.outline[:, 1] - sec.outline[:, 0]
    assert np.hypot(seg[:, 0], seg[:, 1]).sum() == pytest.approx(perimeter, rel=1e-12)


def test_section_values_are_the_functions_values():
    # a P2 function reproduces a quadratic exactly, so its values on the section do
    def f(x):
        return x[0] + 2 * x[1] - x[2] ** 2

    disc = Discretization(MESH, 2)
    sec = plane_section(disc, disc.interpolate(f), "y", 0.37)
    assert np.abs(sec.values - f(in_space(sec))).max() <= 1e-13


def test_a_plane_outside_gives_an_empty_section():
    disc = Discretization(MESH, 1)
    sec = plane_section(disc, np.zeros(disc.n_dofs), 0, 5.0)
    assert sec.triangles.shape == (0, 3) and sec.outline.shape == (0, 2, 2)


@pytest.mark.parametrize("text", ["x", "w=1", "x=abc", "y=nan", 3])
def test_bad_plane_text_is_named(text):
    with pytest.raises(InputError, match="slice plane"):
        parse_plane(text)


def test_plane_text():
    assert parse_plane("x=0.5") == (0, 0.5) and parse_plane(" Z = -1e-3") == (2, -0.001)


def test_sections_need_a_3d_mesh():
    disc = Discretization(structured_triangles(2, 2), 1)
    with pytest.raises(InputError, match="tetrahedral"):
        plane_section(disc, np.zeros(disc.n_dofs), 0, 0.5)
