"""Time of the search for stock outside the footprints (``find_unassigned``) on large grids.

Usage::

    python bench/bench_unassigned.py                 # yards of 250 m, 500 m and 1 km square
    python bench/bench_unassigned.py --sizes 2000    # metres

Each yard is a 0.5 m grid graded 1 % and 0.4 %, scanned everywhere with 1 cm of scatter,
with a registered cone every 50 m (in its footprint) and an unregistered cone between every
second pair (found and measured). It prints the grid size, the regions found and the wall
time of ``find_unassigned`` with a fitted ground and with a floor raster, and the peak
resident memory of the process (``getrusage``). The machine may be shared: compare runs of one
invocation.
"""

from __future__ import annotations

import argparse
import resource
import time
import warnings

import geopandas as gpd
import numpy as np
import shapely

from inventory.model.grid import Grid, Surface
from inventory.volume.measure import BaseSurfaces
from inventory.volume.unassigned import find_unassigned


def yard(size_m: float, cell: float = 0.5):
    g = Grid(0.0, size_m, cell, int(size_m / cell), int(size_m / cell), "EPSG:25832")
    x, y = g.centers()
    ground = 10.0 + 0.01 * x + 0.004 * y
    z = ground.copy()
    feet, loose = [], 0
    for i, cx in enumerate(np.arange(25.0, size_m - 10, 50.0)):
        for j, cy in enumerate(np.arange(25.0, size_m - 10, 50.0)):
            z += np.clip(6.0 * (1 - np.hypot(x - cx, y - cy) / 10.0), 0, None)
            feet.append(shapely.Point(cx, cy).buffer(12.0))
            if (i + j) % 2 == 0 and cx + 25 < size_m:
                z += np.clip(2.0 * (1 - np.hypot(x - cx - 25, y - cy) / 4.0), 0, None)
                loose += 1
    z += np.random.default_rng(0).normal(0, 0.01, z.shape)
    s = Surface(g, z, np.full(g.shape, 4, np.int32), np.full(g.shape, 0.02), np.zeros(g.shape, bool))
    piles = gpd.GeoDataFrame({"pile_id": [f"P{k}" for k in range(len(feet))], "material": "sand",
                              "base": "toe", "density_t_m3": None}, geometry=feet, crs="EPSG:25832")
    return s, piles, ground, loose


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=float, nargs="+", default=[250.0, 500.0, 1000.0])
    args = ap.parse_args()
    warnings.simplefilter("ignore")
    for size in args.sizes:
        s, piles, ground, loose = yard(size)
        for name, base in (("fitted ground", BaseSurfaces()), ("floor raster", BaseSurfaces(floor=ground))):
            t0 = time.perf_counter()
            found = find_unassigned(s, piles, base)
            dt = time.perf_counter() - t0
            print(f"{size:6.0f} m  {s.grid.nrows}x{s.grid.ncols} cells  {len(piles)} footprints  "
                  f"{name:<13}  {len(found.regions)}/{loose} regions found  {dt:6.2f} s")
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"peak resident memory {peak:,.0f} MB")


if __name__ == "__main__":
    main()
