"""A small synthetic stockyard with known labels, for classifier tests and benchmarks.

Invented geometry, not a measurement: a tilted pad; a 35-degree cone and a 38-degree
flat-topped pile; a truck (body on wheels) on the pad; a loader standing on the cone's flank; a stacker boom
over the cone; a conveyor gallery on legs over the pad; three people; low and high noise.
Surfaces are sampled at random with a density per square metre of surface (walls as densely
as the ground, as a terrestrial scanner sees them), then given 5 mm Gaussian ranging noise.
Ground hidden under the truck's wheels and the loader is not sampled.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from inventory.io.clouds import empty_points

__all__ = ["Yard", "make_yard", "LABELS"]

#: Truth labels of the synthetic points.
LABELS = {"pad": 0, "pile": 1, "vehicle": 2, "machine": 3, "person": 4, "noise_low": 5, "noise_high": 6}

_ORIGIN = (500_000.0, 5_700_000.0)   # an arbitrary spot in a UTM-like projected CRS


@dataclass
class Yard:
    """The points, their truth labels and the true surface (terrain + piles)."""

    points: np.ndarray          # POINT_DTYPE
    labels: np.ndarray          # int8, LABELS values
    origin: tuple[float, float]

    def surface(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """True elevation of the terrain with the piles on it (no machines)."""
        return _surface(np.asarray(x) - self.origin[0], np.asarray(y) - self.origin[1])


def _pad(x, y):
    return 100.0 + 0.01 * x + 0.005 * y


_CONE = (30.0, 40.0, 8.0, 35.0)          # cx, cy, height, slope deg
_FLAT = (80.0, 40.0, 7.0, 38.0, 4.0)     # cx, cy, height, slope deg, top radius


def _surface(x, y):
    base = _pad(x, y)
    cx, cy, h, a = _CONE
    r = np.hypot(x - cx, y - cy)
    cone = h - r * math.tan(math.radians(a))
    fx, fy, fh, fa, ft = _FLAT
    rf = np.hypot(x - fx, y - fy)
    flat = np.minimum(fh, fh - (rf - ft) * math.tan(math.radians(fa)))
    return base + np.maximum(np.maximum(cone, flat), 0.0)


def _box_faces(rng, x0, x1, y0, y1, zb, zt, rho, bottom=False):
    """Points on the faces of an axis-aligned box; zb may be a function of (x, y)."""
    pts = []
    zbf = zb if callable(zb) else (lambda x, y: np.full(np.shape(x), float(zb)))
    # four walls: sample (position along wall, height fraction) then clip to above zb
    for (xa, ya, xb, yb) in ((x0, y0, x1, y0), (x1, y0, x1, y1), (x1, y1, x0, y1), (x0, y1, x0, y0)):
        length = math.hypot(xb - xa, yb - ya)
        n = int(rho * length * (zt - min(np.min(zbf(np.array([xa, xb]), np.array([ya, yb]))), zt - 0.1)))
        t = rng.random(n)
        x, y = xa + t * (xb - xa), ya + t * (yb - ya)
        lo = zbf(x, y)
        z = lo + rng.random(n) * (zt - lo)
        pts.append(np.column_stack([x, y, z]))
    n = int(rho * (x1 - x0) * (y1 - y0))
    x, y = x0 + rng.random(n) * (x1 - x0), y0 + rng.random(n) * (y1 - y0)
    pts.append(np.column_stack([x, y, np.full(n, zt)]))
    if bottom:
        x, y = x0 + rng.random(n) * (x1 - x0), y0 + rng.random(n) * (y1 - y0)
        pts.append(np.column_stack([x, y, zbf(x, y)]))
    return np.vstack(pts)


def make_yard(density: float = 25.0, seed: int = 0, noise_fraction: float = 0.002,
              pad_density: float = 4.0) -> Yard:
    """Build the synthetic yard (about 100,000 points at the default densities).

    ``density`` is points per square metre on piles, machines and people; the flat pad,
    mostly seen at grazing angles from far away, gets ``pad_density``.
    """
    rng = np.random.default_rng(seed)
    parts: list[tuple[np.ndarray, int]] = []

    # Ground: pad and piles, sampled over a 110 m x 80 m area, hidden ground removed below.
    area = 110.0 * 80.0
    slope_gain = 1.0 / math.cos(math.radians(36.0))
    n = int(density * area * 1.15)
    x, y = rng.random(n) * 110.0, rng.random(n) * 80.0
    z = _surface(x, y)
    on_pile = z - _pad(x, y) > 0.01
    # thin the flat pad to its own density (slopes carry more area per m2 of plan)
    keep = on_pile | (rng.random(n) < pad_density / (density * 1.15))
    keep &= ~on_pile | (rng.random(n) < min(1.0, slope_gain / 1.15))

    truck = (52.0, 54.5, 8.0, 16.0, 3.5)              # x0, x1, y0, y1, height
    # wheels (x0, x1, y0, y1), 1.0 m tall; the body rides on them 1.0 m above the pad
    wheels = [(52.0, 52.4, 8.5, 9.5), (54.1, 54.5, 8.5, 9.5), (52.0, 52.4, 14.5, 15.5),
              (54.1, 54.5, 14.5, 15.5)]
    lx0, lx1, ly0, ly1 = 34.0, 37.0, 36.5, 40.5       # loader footprint on the cone flank
    hidden = (x >= lx0) & (x <= lx1) & (y >= ly0) & (y <= ly1)
    for wx0, wx1, wy0, wy1 in wheels:
        hidden |= (x >= wx0) & (x <= wx1) & (y >= wy0) & (y <= wy1)
    keep &= ~hidden
    ground = np.column_stack([x[keep], y[keep], z[keep]])
    parts.append((ground[on_pile[keep]], LABELS["pile"]))
    parts.append((ground[~on_pile[keep]], LABELS["pad"]))

    # Truck on the pad: a body on four wheels; the pad under the body is seen between them.
    pz = _pad(53.0, 12.0)
    parts.append((_box_faces(rng, truck[0], truck[1], truck[2], truck[3], pz + 1.0, pz + truck[4],
                             density, bottom=True), LABELS["vehicle"]))
    for wx0, wx1, wy0, wy1 in wheels:
        parts.append((_box_faces(rng, wx0, wx1, wy0, wy1, lambda a, b: _pad(a, b), pz + 1.0, density),
                      LABELS["vehicle"]))
    # Loader on the cone's flank: walls rise from the flank to a flat roof 3.2 m above
    # the flank height at its centre.
    roof = float(_surface(np.array([35.5]), np.array([38.5]))[0]) + 3.2
    parts.append((_box_faces(rng, lx0, lx1, ly0, ly1, _surface, roof, density), LABELS["machine"]))
    # Stacker boom over the cone: 1.5 m wide, 1.2 m deep, underside 3 m above the apex.
    apex = _pad(30.0, 40.0) + _CONE[2]
    parts.append((_box_faces(rng, 12.0, 40.0, 39.25, 40.75, apex + 3.0, apex + 4.2, density, bottom=True),
                  LABELS["machine"]))
    # Conveyor gallery on legs over the pad: 2 m x 2 m section, underside 5 m above the pad.
    gz = _pad(30.0, 72.0) + 5.0
    parts.append((_box_faces(rng, 5.0, 60.0, 71.0, 73.0, gz, gz + 2.0, density, bottom=True),
                  LABELS["machine"]))
    for lx in (10.0, 25.0, 40.0, 55.0):
        parts.append((_box_faces(rng, lx - 0.2, lx + 0.2, 71.8, 72.2, lambda a, b: _pad(a, b), gz, density),
                      LABELS["machine"]))
    # People: vertical cylinders 0.5 m across, 1.8 m tall.
    for px, py in ((20.0, 15.0), (60.0, 60.0), (95.0, 15.0)):
        m = int(density * math.pi * 0.5 * 1.8 * 2)
        ang, hh = rng.random(m) * 2 * math.pi, rng.random(m) * 1.8
        parts.append((np.column_stack([px + 0.25 * np.cos(ang), py + 0.25 * np.sin(ang),
                                       _pad(px, py) + hh]), LABELS["person"]))

    xyz = np.vstack([p for p, _ in parts])
    lab = np.concatenate([np.full(len(p), l, np.int8) for p, l in parts])
    xyz = xyz + rng.normal(0.0, 0.005, xyz.shape)   # 5 mm ranging noise (common practice)

    # Noise: multipath returns well below the surface, dust/birds above it.
    k = int(noise_fraction * len(xyz))
    i = rng.integers(0, len(ground), k)
    low = ground[i] - np.column_stack([np.zeros(k), np.zeros(k), 1.0 + 3.0 * rng.random(k)])
    hx, hy = rng.random(k) * 110.0, rng.random(k) * 80.0
    high = np.column_stack([hx, hy, _surface(hx, hy) + 2.0 + 15.0 * rng.random(k)])
    xyz = np.vstack([xyz, low, high])
    lab = np.concatenate([lab, np.full(k, LABELS["noise_low"], np.int8), np.full(k, LABELS["noise_high"], np.int8)])

    perm = rng.permutation(len(xyz))
    xyz, lab = xyz[perm], lab[perm]
    pts = empty_points(len(xyz))
    pts["X"], pts["Y"], pts["Z"] = xyz[:, 0] + _ORIGIN[0], xyz[:, 1] + _ORIGIN[1], xyz[:, 2]
    pts["ReturnNumber"], pts["NumberOfReturns"], pts["Classification"] = 1, 1, 1
    pts["Intensity"] = rng.integers(100, 4000, len(xyz))
    return Yard(pts, lab, _ORIGIN)
