"""Hole filling of a survey's surface grid window by window (:func:`fill_windows`), never on
the whole grid at once."""

from __future__ import annotations

import math

import numpy as np

from inventory.model.grid import Grid, Surface
from inventory.parallel import Executor, cores, executor
from inventory.survey.gridding import FillReport, enclosed_gaps, fill_holes

__all__ = ["FILL_WINDOW_CELLS", "fill_windows"]


#: Hole filling runs on windows of this many cells a side (plus a margin), never on the
#: whole survey; a grid of at most this squared cells is one window (as before windows).
FILL_WINDOW_CELLS = 512


def _fill_window(sub: Surface, max_distance_m: float, core: tuple[slice, slice], r0: int, c0: int,
                 ncols: int) -> tuple[np.ndarray, np.ndarray]:
    """One window of :func:`fill_windows`: flat indices (in the whole grid) and values of
    the cells filled in its core."""
    part, _ = fill_holes(sub, max_distance_m)
    rr, cc = np.nonzero(part.filled[core])
    return (rr + r0) * ncols + cc + c0, part.z[core][rr, cc]


def fill_windows(surface: Surface, max_distance_m: float, window: int = FILL_WINDOW_CELLS,
                 margin_reach: int = 4, ex: Executor | None = None,
                 threads: int | None = None) -> tuple[Surface, FillReport]:
    """:func:`~inventory.survey.gridding.fill_holes` window by window, with a margin.

    A grid of at most ``window`` x ``window`` cells is filled whole, exactly as
    :func:`fill_holes` does. A larger one is cut into windows of ``window`` cells, each
    filled from itself and a margin of ``margin_reach`` times the reach of the fill (the
    distance plus two cells) around it, keeping its own cells: memory is that of one
    window, not of a Delaunay triangulation of the whole survey; windows run on ``ex`` (an
    :class:`~inventory.parallel.Executor`) when it has workers, else on ``threads`` threads
    of this process (default :func:`~inventory.parallel.cores`; 1 runs them one after the other): the
    triangulation (Qhull), the distance transform and the labelling release the interpreter
    lock, and at most ``threads`` windows are in memory at once. A cell's fill then comes
    from the scanned cells within the margin around its window. Against one triangulation
    of the whole grid, what differs is the choice among equally Delaunay diagonals of
    cocircular cells (the lattice is full of them, and Qhull's choice depends on every
    input point) and triangles stretched across gaps wider than the margin (how much on the
    sample site, and the time and memory saved: CHANGELOG.md). The windows are
    fixed by the grid, so the result does not depend on how the survey was run. The
    report's enclosed gaps are found on the whole grid, as :func:`fill_holes` finds them.

    ``surface`` is consumed: its ``z`` becomes the filled surface's.
    """
    g = surface.grid
    reach = int(math.ceil(max_distance_m / g.cell)) + 2 if max_distance_m > 0 else 0
    scanned = surface.count > 0
    filled = np.zeros(g.shape, bool)
    if reach and (~scanned).any():
        if g.nrows * g.ncols <= window * window:
            wr, wc, margin = g.nrows, g.ncols, 0
        else:
            wr, wc, margin = window, window, margin_reach * reach

        def jobs():
            for r0 in range(0, g.nrows, wr):
                for c0 in range(0, g.ncols, wc):
                    r1, c1 = min(r0 + wr, g.nrows), min(c0 + wc, g.ncols)
                    if scanned[r0:r1, c0:c1].all():
                        continue
                    R0, C0 = max(r0 - margin, 0), max(c0 - margin, 0)
                    R1, C1 = min(r1 + margin, g.nrows), min(c1 + margin, g.ncols)
                    if not scanned[R0:R1, C0:C1].any():
                        continue
                    sub = Grid(g.west + C0 * g.cell, g.north - R0 * g.cell, g.cell, R1 - R0, C1 - C0, g.crs)
                    yield (Surface(sub, surface.z[R0:R1, C0:C1], surface.count[R0:R1, C0:C1],
                                   surface.sd[R0:R1, C0:C1], np.zeros(sub.shape, bool), surface.date),
                           max_distance_m, (slice(r0 - R0, r1 - R0), slice(c0 - C0, c1 - C0)), r0, c0, g.ncols)

        # (flat index, value) of each window, in window order: z changes only after every
        # window has read it
        if ex is not None and ex.kind != "serial":
            fills = [f for f in ex.map(_fill_window, jobs()) if len(f[0])]
        else:
            n = max(1, threads if threads is not None else cores())
            with executor(n, threads=True) as pool:
                fills = [f for f in pool.map(_fill_window, jobs(), window=n) if len(f[0])]
        for idx, values in fills:
            surface.z.ravel()[idx] = values
            filled.ravel()[idx] = True
        del fills
    # Enclosed gaps left empty, on the whole grid (as fill_holes finds them, without its
    # copies of the grid): a cell is empty when it was neither scanned nor filled.
    empty = ~filled
    empty &= ~scanned | ~np.isfinite(surface.z)
    gap_cells, largest = enclosed_gaps(empty)
    del empty
    out = Surface(g, surface.z, surface.count, surface.sd, filled, surface.date,
                  dict(surface.meta, max_fill_distance_m=max_distance_m))
    return out, FillReport(int(filled.sum()), gap_cells, gap_cells * g.cell_area, largest * g.cell_area)

