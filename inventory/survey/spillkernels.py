"""Compiled kernels of the tile spill (numba, CPU only): spilling points by tile and
gathering a job's points back.

Points are moved as rows of raw bytes (a structured array viewed as ``uint8`` rows, or as
one ``void`` item per point), so no copy goes field by field. Cells are found with the
floating-point operations of :meth:`inventory.model.grid.Grid.index` (``floor((x - west) /
cell)``, ``floor((north - y) / cell)``), compared as floats, which decides every point as the
integer comparisons of the numpy code do (a NaN or an infinite coordinate lies outside).

* :func:`tile_keys`: each point's tile (-1 outside the grid), counted per tile and per
  block in the same pass.
* :func:`scatter_rows`: the points' rows grouped by tile, in tile order and in their own
  order within a tile (a stable counting sort: the order of ``np.argsort(tile,
  kind="stable")``).
* :func:`split_rows`: which points are a job's own (in its cells) and which lie in its
  buffer's box, in one pass.

:class:`~inventory.survey.tiles.TileSpill` and :func:`~inventory.survey.tiles.job_points`
use them; tests/test_survey_spill.py holds the numpy code they replaced as the reference.
"""

from __future__ import annotations

import numpy as np
from numba import njit

__all__ = ["scatter_rows", "split_rows", "tile_keys"]


@njit(cache=True, nogil=True)
def tile_keys(x, y, west, north, cell, nrows, ncols, tile_cells, ntx, block_cells,
              tile_counts, block_counts):  # pragma: no cover - compiled
    """Tile number of each point (row of tiles times ``ntx`` plus column of tiles), -1 for a
    point outside the grid; adds each inside point to ``tile_counts[tile]`` and to
    ``block_counts[row of blocks, column of blocks]``. Returns the keys and the number of
    points outside."""
    n = x.size
    key = np.empty(n, np.int64)
    outside = 0
    for i in range(n):
        c = np.floor((x[i] - west) / cell)
        r = np.floor((north - y[i]) / cell)
        if c >= 0 and c < ncols and r >= 0 and r < nrows:
            ci = np.int64(c)
            ri = np.int64(r)
            t = (ri // tile_cells) * ntx + ci // tile_cells
            key[i] = t
            tile_counts[t] += 1
            block_counts[ri // block_cells, ci // block_cells] += 1
        else:
            key[i] = -1
            outside += 1
    return key, outside


@njit(cache=True, nogil=True)
def scatter_rows(rows, key, starts, out):  # pragma: no cover - compiled
    """Copy each row of ``rows`` (bytes of one point) whose ``key`` is not negative to
    ``out``, the rows of key ``t`` from ``starts[t]`` on in their order in ``rows``."""
    pos = starts.copy()
    w = rows.shape[1]
    for i in range(key.size):
        t = key[i]
        if t < 0:
            continue
        d = pos[t]
        pos[t] = d + 1
        for k in range(w):
            out[d, k] = rows[i, k]


@njit(cache=True, nogil=True)
def split_rows(x, y, check_own, west, north, cell, r0, r1, c0, c1, bx0, bx1, by0, by1):  # pragma: no cover
    """Indexes of the points in cells ``r0:r1``, ``c0:c1`` (only when ``check_own``) and of
    the other points with ``bx0 <= x < bx1`` and ``by0 <= y < by1``, each in point order."""
    n = x.size
    own = np.empty(n, np.int64)
    near = np.empty(n, np.int64)
    no = 0
    nn = 0
    for i in range(n):
        xi = x[i]
        yi = y[i]
        if check_own:
            c = np.floor((xi - west) / cell)
            r = np.floor((north - yi) / cell)
            if r >= r0 and r < r1 and c >= c0 and c < c1:
                own[no] = i
                no += 1
                continue
        if xi >= bx0 and xi < bx1 and yi >= by0 and yi < by1:
            near[nn] = i
            nn += 1
    return own[:no], near[:nn]
