"""The site grid: every point of the box it was snapped to falls in one of its cells."""

from __future__ import annotations

import numpy as np
from hypothesis import given
from hypothesis import strategies as st

from inventory.model.grid import Grid

_coord = st.floats(-1e5, 1e5, allow_nan=False).map(lambda v: round(v, 3))


@given(_coord, _coord, st.floats(0, 500).map(lambda v: round(v, 3)), st.floats(0, 500).map(lambda v: round(v, 3)),
       st.sampled_from([0.25, 0.5, 1.0, 2.0]))
def test_box_corners_fall_inside(x0, y0, w, h, cell):
    g = Grid.snapped(x0, y0, x0 + w, y0 + h, cell=cell)
    xs = np.array([x0, x0 + w, x0, x0 + w])
    ys = np.array([y0, y0, y0 + h, y0 + h])
    rows, cols, inside = g.index(xs, ys)
    assert inside.all(), (g, rows, cols)
    assert g.west % cell == 0 and g.north % cell == 0


def test_edges_on_cell_edges_are_held():
    # xmax and ymin exactly on cell edges: the box's south-east corner is a point of the grid
    g = Grid.snapped(0.0, 0.0, 1.0, 1.0, cell=0.5)
    rows, cols, inside = g.index([0.0, 1.0], [0.0, 0.0])
    assert inside.all()
    assert (g.west, g.south, g.east, g.north) == (0.0, -0.5, 1.5, 1.5)
