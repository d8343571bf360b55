"""A survey's points spilled by tiles of the site grid, and the job that classifies and grids one tile.

:class:`TileSpill` keeps one raw file of points per square tile of the grid (edges on cell
edges). A tile's job (:func:`classify_tile`) reads the tile and its neighbours' points within
a buffer (:func:`tile_job`), runs the pipeline, keeps the tile's own points and grids them
on the tile's own cells (:func:`grid_tile`: a cell lies in one tile). :func:`run_tiles` runs
the jobs on an :class:`~inventory.parallel.Executor` and gives them back in tile order, and
:func:`grid_tiles` pastes the tiles' cells into the surface grid.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Iterator

import numpy as np
from pyproj import CRS

from inventory.io.clouds import POINT_DTYPE
from inventory.model.classes import GROUND, HIGH_NOISE, LOW_NOISE
from inventory.model.grid import Grid, Surface
from inventory.parallel import Executor
from inventory.survey.gridding import SurfaceAccumulator, object_cells
from inventory.survey.pipeline import Pipeline

__all__ = ["TILES_IN_FLIGHT", "TileCells", "TileSpill", "classify_tile", "classify_tile_to_file", "grid_tile",
           "grid_tiles", "run_tiles", "tile_job"]


class TileSpill:
    """Points spilled to one raw file per tile of the grid.

    Every record is of :attr:`dtype`: :data:`~inventory.io.clouds.POINT_DTYPE`, followed by a
    column for each extra bytes dimension the survey carries (set before the first
    :meth:`add`; a survey without extra dimensions spills POINT_DTYPE alone)."""

    def __init__(self, grid: Grid, tile_cells: int, folder: Path, dtype: np.dtype = POINT_DTYPE) -> None:
        self.grid = grid
        self.dtype = np.dtype(dtype)
        self.tc = tile_cells
        self.nty = math.ceil(grid.nrows / tile_cells)
        self.ntx = math.ceil(grid.ncols / tile_cells)
        self.folder = folder
        self.counts: dict[int, int] = {}
        self.zmin = math.inf

    def tile_of(self, x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        row, col, inside = self.grid.index(x, y)
        return (row // self.tc) * self.ntx + (col // self.tc), inside

    def path(self, tile: int) -> Path:
        return self.folder / f"tile_{tile}.bin"

    def add(self, pts: np.ndarray) -> int:
        """Spill points (of :attr:`dtype`); returns how many fell outside the grid."""
        if pts.dtype != self.dtype:
            raise ValueError(f"points of dtype {pts.dtype} spilled to tiles of dtype {self.dtype}")
        tile, inside = self.tile_of(pts["X"], pts["Y"])
        pts, tile = pts[inside], tile[inside]
        if len(pts):
            self.zmin = min(self.zmin, float(pts["Z"].min()))
        order = np.argsort(tile, kind="stable")
        pts, tile = pts[order], tile[order]
        starts = np.flatnonzero(np.r_[True, tile[1:] != tile[:-1]]) if len(tile) else np.array([], int)
        ends = np.r_[starts[1:], len(tile)]
        for a, b in zip(starts, ends):
            t = int(tile[a])
            with open(self.path(t), "ab") as f:
                pts[a:b].tofile(f)
            self.counts[t] = self.counts.get(t, 0) + int(b - a)
        return int((~inside).sum())

    def box(self, tile: int) -> tuple[float, float, float, float]:
        ty, tx = divmod(tile, self.ntx)
        c = self.grid.cell
        west = self.grid.west + tx * self.tc * c
        north = self.grid.north - ty * self.tc * c
        return west, north - self.tc * c, west + self.tc * c, north

    def neighbours(self, tile: int) -> list[int]:
        ty, tx = divmod(tile, self.ntx)
        return [(ty + dy) * self.ntx + tx + dx for dy in (-1, 0, 1) for dx in (-1, 0, 1)
                if (dy or dx) and 0 <= ty + dy < self.nty and 0 <= tx + dx < self.ntx
                and ((ty + dy) * self.ntx + tx + dx) in self.counts]


def _load(path: Path, dtype: np.dtype = POINT_DTYPE) -> np.ndarray:
    return np.fromfile(path, dtype=dtype)


#: Points read at a time from a neighbouring tile's spill file (about 60 MB without extra
#: dimensions).
_BLOCK = 1_000_000


def tile_job(spill: TileSpill, tile: int, buffer_m: float) -> np.ndarray:
    """A tile's points followed by its neighbours' points within ``buffer_m`` of it.

    Neighbouring files are read in blocks of :data:`_BLOCK` points, so a tile never holds
    its neighbours whole (eight of them inside a large survey).
    """
    core = _load(spill.path(tile), spill.dtype)
    x0, y0, x1, y1 = spill.box(tile)
    extra = []
    for nb in spill.neighbours(tile):
        with open(spill.path(nb), "rb") as f:
            while True:
                pts = np.fromfile(f, dtype=spill.dtype, count=_BLOCK)
                if not len(pts):
                    break
                m = (pts["X"] >= x0 - buffer_m) & (pts["X"] < x1 + buffer_m) & \
                    (pts["Y"] >= y0 - buffer_m) & (pts["Y"] < y1 + buffer_m)
                extra.append(pts[m])
    return np.concatenate([core] + extra) if extra else core


def classify_tile(spill: TileSpill, tile: int, buffer_m: float, pipeline: Pipeline, crs: CRS | str,
                  engine: str, statistic: str) -> tuple[np.ndarray, TileCells | None, int]:
    """A tile's own points, classified with its neighbours' points around it, its cells
    gridded (:func:`grid_tile`), and how many of its own points voxel thinning dropped."""
    pts = tile_job(spill, tile, buffer_m)
    stats: dict = {}
    out, _ = pipeline.run(pts, crs, engine=engine, stats=stats)
    own, _ = spill.tile_of(out["X"], out["Y"])
    out = out[own == tile]
    txy = stats.get("thinned_xy")
    thinned = int((spill.tile_of(txy[:, 0], txy[:, 1])[0] == tile).sum()) if txy is not None and len(txy) else 0
    return out, grid_tile(spill.grid, out, statistic), thinned


@dataclass
class TileCells:
    """One tile's cells, rows ``r0:r0 + shape[0]`` and columns ``c0:c0 + shape[1]`` of the
    spill grid: the surface statistic, count and spread of its surface points (no cell
    taken out for objects), and per cell the highest and lowest surface point and the
    lowest object return (what :func:`~inventory.survey.gridding.object_cells` needs)."""

    r0: int
    c0: int
    z: np.ndarray
    count: np.ndarray
    sd: np.ndarray
    top: np.ndarray
    bottom: np.ndarray
    low_object: np.ndarray

    def save(self, path: Path) -> Path:
        np.savez(path, r0=self.r0, c0=self.c0, z=self.z, count=self.count, sd=self.sd, top=self.top,
                 bottom=self.bottom, low_object=self.low_object)
        return path

    @classmethod
    def load(cls, path: Path) -> "TileCells":
        with np.load(path) as f:
            return cls(int(f["r0"]), int(f["c0"]), f["z"], f["count"], f["sd"], f["top"], f["bottom"],
                       f["low_object"])


def grid_tile(g: Grid, pts: np.ndarray, statistic: str) -> TileCells | None:
    """Grid one classified tile's surface points and object returns (not surface, not
    noise) on its cells of the spill grid ``g``; ``None`` when it has neither.

    A cell belongs to one tile (tile edges are cell edges), so a tile's cells are
    complete: this runs inside the tile's job, on the workers when there are any.
    """
    cls = pts["Classification"]
    ground = cls == GROUND
    objects = ~np.isin(cls, (GROUND, LOW_NOISE, HIGH_NOISE))
    if not ground.any() and not objects.any():
        return None
    row, col, _ = g.index(pts["X"], pts["Y"])
    r0, c0 = int(row.min()), int(col.min())
    r1, c1 = int(row.max()) + 1, int(col.max()) + 1
    # The tile's cells on a grid of unit cells at the origin: cell centres land in the
    # cells already found, whatever the rounding of projected coordinates.
    acc = SurfaceAccumulator(Grid(0.0, 0.0, 1.0, r1 - r0, c1 - c0, g.crs), statistic)
    if ground.any():
        acc.add(col[ground] - c0 + 0.5, -(row[ground] - r0 + 0.5), pts["Z"][ground])
    if objects.any():
        acc.add_objects(col[objects] - c0 + 0.5, -(row[objects] - r0 + 0.5), pts["Z"][objects])
    part = acc.result_without_objects()
    top, bottom, low_object = acc.extremes()
    return TileCells(r0, c0, part.z, part.count, part.sd, top, bottom, low_object)


def run_tiles(ex: Executor, spill: TileSpill, tiles: list[int], buffer_m: float, pipe: Pipeline, crs: CRS,
              engine: str, statistic: str) -> Iterator[tuple[np.ndarray, TileCells | None, int]]:
    """Classified tiles and their cells (:func:`classify_tile`) in the order of ``tiles``,
    however ``ex`` (an :class:`~inventory.parallel.Executor`) runs them (so that every
    way writes the same classified cloud)."""
    if ex.kind != "dask":
        yield from ex.map(classify_tile, ((spill, t, buffer_m, pipe, crs, engine, statistic) for t in tiles))
        return
    # Worker processes leave each classified tile in the spill folder and send back its
    # name and its cells only: no tile of points is pickled through the scheduler. A CRS
    # travels as WKT. The results are that small, so more tiles may wait finished than
    # there are workers: a large tile then holds up neither worker.
    for path, cells, thinned in ex.map(classify_tile_to_file, ((spill, t, buffer_m, pipe, crs.to_wkt(), engine,
                                                                statistic) for t in tiles),
                                       window=TILES_IN_FLIGHT * ex.workers):
        pts = _load(path, spill.dtype)
        path.unlink()
        yield pts, cells, thinned


#: Tiles submitted to each Dask worker and not yet taken back (see :func:`run_tiles`).
TILES_IN_FLIGHT = 4


def classify_tile_to_file(spill: TileSpill, tile: int, buffer_m: float, pipeline: Pipeline, crs: CRS | str,
                          engine: str, statistic: str) -> tuple[Path, TileCells | None, int]:
    """:func:`classify_tile` for a worker process: the points go to ``classified_<tile>.bin``
    in the spill folder, whose path is returned with the tile's cells and thinned count."""
    out, cells, thinned = classify_tile(spill, tile, buffer_m, pipeline, crs, engine, statistic)
    path = spill.folder / f"classified_{tile}.bin"
    out.tofile(path)
    return path, cells, thinned


def grid_tiles(g: Grid, cell_files: list[Path], sgrid: Grid, statistic: str, date: str) -> Surface:
    """The surface grid ``sgrid`` put together from the tiles' cells (:class:`TileCells`
    saved in ``cell_files``, gridded on the spill grid ``g`` by each tile's job).

    ``sgrid`` is ``g`` shifted by whole cells; each tile's block is shifted into it and
    clipped (object returns beyond the surface's extent have no cell to judge). Memory is
    the output grid plus one tile's cells, never per-cell sums of the whole survey. The
    highest and lowest surface point and the lowest object return of every cell are kept
    for the whole grid (three grids more), and :func:`~inventory.survey.gridding.object_cells`
    takes out the surface cells that lie on an object over the whole grid at once, so a
    vehicle or a wall on a tile edge is judged as it would be in one piece.
    """
    roff = int(round((g.north - sgrid.north) / g.cell))
    coff = int(round((sgrid.west - g.west) / g.cell))
    z = np.full(sgrid.shape, np.nan)
    count = np.zeros(sgrid.shape, np.int32)
    sd = np.full(sgrid.shape, np.nan)
    top = np.full(sgrid.shape, -np.inf)
    bottom = np.full(sgrid.shape, np.inf)
    low_object = np.full(sgrid.shape, np.inf)
    for path in cell_files:
        t = TileCells.load(path)
        # the block's rows and columns in sgrid, clipped to it
        r0, c0 = t.r0 - roff, t.c0 - coff
        r1, c1 = r0 + t.z.shape[0], c0 + t.z.shape[1]
        R0, C0 = max(r0, 0), max(c0, 0)
        R1, C1 = min(r1, sgrid.nrows), min(c1, sgrid.ncols)
        if R0 >= R1 or C0 >= C1:
            continue
        src = (slice(R0 - r0, R1 - r0), slice(C0 - c0, C1 - c0))
        dst = (slice(R0, R1), slice(C0, C1))
        have = t.count[src] > 0
        z[dst][have] = t.z[src][have]
        count[dst][have] = t.count[src][have]
        sd[dst][have] = t.sd[src][have]
        # tiles' cell blocks never overlap (tile edges are cell edges)
        top[dst], bottom[dst], low_object[dst] = t.top[src], t.bottom[src], t.low_object[src]
    covered = object_cells(count > 0, top, bottom, low_object, sgrid.cell_area)
    del top, bottom, low_object
    z[covered] = np.nan
    count[covered] = 0
    sd[covered] = np.nan
    return Surface(sgrid, z, count, sd, np.zeros(sgrid.shape, bool), date,
                   {"statistic": statistic, "object_cells": int(covered.sum())})

