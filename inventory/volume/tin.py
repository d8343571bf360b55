"""TIN volume: the independent cross-check of the grid volume.

Internal to :mod:`inventory.volume.measure`. Delaunay triangulation (scipy.spatial.Delaunay) of
the surface points inside a footprint plus the footprint outline; each triangle is a
prism between the linear surface and the base, V = A_xy (h1 + h2 + h3) / 3 when the
thickness h is positive at all three corners (TIN prism formula, plane-surveying texts).
Where a triangle crosses the base, the positive and negative parts are integrated
exactly (the zero line of a linear function cuts the triangle along a straight line).
"""

from __future__ import annotations

import numpy as np
import shapely
from scipy.spatial import Delaunay, QhullError

__all__: list[str] = []


def positive_part_integral(area: np.ndarray, h: np.ndarray) -> np.ndarray:
    """Integral of max(h, 0) over triangles where h is linear with corner values ``h``.

    ``area`` (n,), ``h`` (n, 3). With the corners sorted h1 <= h2 <= h3:
    all >= 0: A (h1 + h2 + h3) / 3; all <= 0: 0; only h3 > 0: the positive part is a
    similar triangle, A h3^3 / (3 (h3 - h1)(h3 - h2)); h2, h3 > 0 > h1: the whole integral
    plus the negative corner's part, A (h1+h2+h3)/3 + A (-h1)^3 / (3 (h2 - h1)(h3 - h1)).
    """
    h = np.sort(np.asarray(h, dtype=float), axis=1)
    h1, h2, h3 = h[:, 0], h[:, 1], h[:, 2]
    out = np.zeros(len(h))
    full = h1 >= 0
    out[full] = area[full] * (h1 + h2 + h3)[full] / 3.0
    one = (h2 <= 0) & (h3 > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        v1 = area * h3**3 / (3.0 * (h3 - h1) * (h3 - h2))
        v2 = area * ((h1 + h2 + h3) / 3.0 + (-h1) ** 3 / (3.0 * (h2 - h1) * (h3 - h1)))
    out[one] = v1[one]
    two = (h1 < 0) & (h2 > 0)
    out[two] = v2[two]
    return out


def tin_volume(
    xy: np.ndarray, h: np.ndarray, polygon: shapely.Geometry
) -> tuple[float, float, int]:
    """Fill and cut volume of the TIN through points ``xy`` (n, 2) with thickness ``h``.

    Triangles whose centroid falls outside ``polygon`` are dropped (Delaunay fills the
    convex hull; this trims concave bays of the footprint). Returns (fill, cut, triangles);
    NaN volumes when fewer than three points or a degenerate set.
    """
    ok = np.isfinite(h) & np.all(np.isfinite(xy), axis=1)
    xy, h = xy[ok], h[ok]
    if len(h) < 3:
        return float("nan"), float("nan"), 0
    origin = xy.mean(axis=0)  # centred coordinates keep Qhull well conditioned
    try:
        tri = Delaunay(xy - origin)
    except QhullError:
        return float("nan"), float("nan"), 0
    s = tri.simplices
    p = xy[s]
    cx, cy = p[:, :, 0].mean(axis=1), p[:, :, 1].mean(axis=1)
    keep = shapely.contains_xy(polygon, cx, cy)
    s, p = s[keep], p[keep]
    area = 0.5 * np.abs(
        (p[:, 1, 0] - p[:, 0, 0]) * (p[:, 2, 1] - p[:, 0, 1])
        - (p[:, 2, 0] - p[:, 0, 0]) * (p[:, 1, 1] - p[:, 0, 1])
    )
    hh = h[s]
    fill = float(np.sum(positive_part_integral(area, hh)))
    cut = float(np.sum(positive_part_integral(area, -hh)))
    return fill, cut, int(len(s))
