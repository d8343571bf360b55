"""A survey's points spilled by tiles of the site grid, and the jobs that classify and grid them.

:class:`TileSpill` keeps one raw file of points per square tile of the grid (edges on cell
edges) and counts the points of every block (a square of cells, a divisor of the tile)
as they are spilled. :func:`plan_jobs` makes each tile a job, and cuts a tile whose points
and buffer of neighbouring points exceed a budget (:data:`JOB_POINTS`) into rectangles of
whole blocks that fit it, so that a dense tile (tens of millions of points of a terrestrial
scan) does not make one job of unbounded memory. A job (:func:`classify_job`) reads its own
points and the points within a buffer around it from the tiles it overlaps
(:func:`job_points`), runs the pipeline, keeps its own points and grids them on its own
cells (:func:`grid_tile`: a cell lies in one job). :func:`classify_job_to_file` finishes a
job where it runs (its classes counted, its surface box, its cells saved and its points
compressed into LAZ chunks in the spill folder) and sends back a small :class:`JobResult`;
:func:`run_jobs` runs the jobs on an :class:`~inventory.parallel.Executor` and gives their
results back in plan order, and :func:`grid_tiles` pastes the jobs' cells into the surface
grid.

The plan depends on the points alone (their counts per block), never on how the jobs run,
so serial, threaded and Dask runs classify the same points together and write the same
files.
"""

from __future__ import annotations

import math
import mmap
import os
import threading
from collections import OrderedDict
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Iterator

import numpy as np
from pyproj import CRS

from inventory.io.clouds import POINT_DTYPE
from inventory.io.lazparts import LasLayout, LazPart, encode_part
from inventory.io.records import byte_rows, concat, select
from inventory.model.classes import GROUND, HIGH_NOISE, LOW_NOISE
from inventory.model.grid import Grid, Surface
from inventory.parallel import Executor
from inventory.survey.gridding import OBJECT_CLEARANCE_M, SurfaceAccumulator, object_cells
from inventory.survey.pipeline import Pipeline
from inventory.survey.spillkernels import scatter_rows, split_rows, tile_keys

__all__ = ["BLOCK_M", "JOBS_IN_FLIGHT", "JOB_POINTS", "Job", "JobResult", "SpillThread", "TileCells", "TileSpill",
           "block_cells_for",
           "classify_job", "classify_job_to_file", "grid_tile", "grid_tiles", "job_points", "plan_jobs",
           "run_jobs"]

#: Points a classification job may hold, its own and its buffer's (estimated from the
#: counts per block): the unit of memory of the survey step. The classifier needs about
#: 1 KB per point of a job, so a job of this many points takes about 1 GB while it runs
#: (one per worker). A tile over it is cut into smaller jobs; a single block is a job
#: whatever its count.
JOB_POINTS = 1_000_000

#: Tile files a spill keeps open at most within :meth:`TileSpill.kept_open` (well under the
#: usual limits of open files per process: 256 on macOS, 1,024 on Linux).
OPEN_TILES = 64

#: Edge of a block in metres (rounded to a divisor of the tile; :func:`block_cells_for`):
#: points are counted per block while they are spilled, and jobs are made of whole blocks.
BLOCK_M = 25.0


def block_cells_for(tile_cells: int, cell: float, block_m: float = BLOCK_M) -> int:
    """Cells along a block's edge: the divisor of ``tile_cells`` nearest ``block_m`` metres
    (by ratio), so that a block lies in one tile.

    >>> block_cells_for(200, 0.5), block_cells_for(80, 0.5), block_cells_for(101, 0.5)
    (50, 40, 101)
    """
    want = max(block_m / cell, 1.0)
    divisors = [d for d in range(1, tile_cells + 1) if tile_cells % d == 0]
    return min(divisors, key=lambda d: (abs(math.log(d / want)), -d))


class TileSpill:
    """Points spilled to one raw file per tile of the grid, counted per block.

    Every record is of :attr:`dtype`: :data:`~inventory.io.clouds.POINT_DTYPE`, followed by a
    column for each extra bytes dimension the survey carries (set before the first
    :meth:`add`; a survey without extra dimensions spills POINT_DTYPE alone).
    :attr:`blocks` holds the points of every block of ``block_cells`` x ``block_cells``
    cells (default a tile), the input of :func:`plan_jobs`; it stays in the process that
    spills (a spill sent to a worker leaves it behind)."""

    def __init__(self, grid: Grid, tile_cells: int, folder: Path, dtype: np.dtype = POINT_DTYPE,
                 block_cells: int | None = None) -> None:
        self.grid = grid
        self.dtype = np.dtype(dtype)
        self.tc = tile_cells
        self.nty = math.ceil(grid.nrows / tile_cells)
        self.ntx = math.ceil(grid.ncols / tile_cells)
        self.bc = block_cells or tile_cells
        if tile_cells % self.bc:
            raise ValueError(f"a block of {self.bc} cells does not divide a tile of {tile_cells} cells")
        self.blocks: np.ndarray | None = np.zeros((math.ceil(grid.nrows / self.bc), math.ceil(grid.ncols / self.bc)),
                                                  np.int64)
        self.folder = folder
        self.counts: dict[int, int] = {}
        self.zmin = math.inf
        #: Tile files kept open between calls of :meth:`add` inside :meth:`kept_open`.
        self._open: "OrderedDict[int, int] | None" = None

    def __getstate__(self) -> dict:
        state = self.__dict__.copy()
        state["blocks"] = None      # the plan is made where the points were spilled; jobs need no counts
        state["_open"] = None
        return state

    @contextmanager
    def kept_open(self, most: int = OPEN_TILES) -> Iterator[None]:
        """Within the block, :meth:`add` keeps up to ``most`` tile files open between calls
        (those written last) instead of opening and closing a file for every tile of every
        chunk: the bytes are the same, and a spill on a thread of its own
        (:class:`SpillThread`) waits for the interpreter lock once a tile, for the write,
        not three times. Every file is closed when the block is left."""
        self._open, self._most = OrderedDict(), max(1, most)
        try:
            yield
        finally:
            fds, self._open = self._open, None
            for fd in fds.values():
                os.close(fd)

    def path(self, tile: int) -> Path:
        return self.folder / f"tile_{tile}.bin"

    def add(self, pts: np.ndarray) -> int:
        """Spill points (of :attr:`dtype`) and count them per block; returns how many fell
        outside the grid.

        Each tile's points are appended to its file in their order in ``pts``; the records
        are grouped by a compiled counting sort of their tiles that moves each as one row of
        bytes (:mod:`inventory.survey.spillkernels`)."""
        if pts.dtype != self.dtype:
            raise ValueError(f"points of dtype {pts.dtype} spilled to tiles of dtype {self.dtype}")
        g = self.grid
        tile_counts = np.zeros(self.nty * self.ntx, np.int64)
        key, outside = tile_keys(pts["X"], pts["Y"], float(g.west), float(g.north), float(g.cell), g.nrows, g.ncols,
                                 self.tc, self.ntx, self.bc, tile_counts, self.blocks)
        if outside == len(pts):
            return int(outside)
        z = pts["Z"] if not outside else pts["Z"][key >= 0]
        self.zmin = min(self.zmin, float(z.min()))
        starts = np.zeros_like(tile_counts)
        np.cumsum(tile_counts[:-1], out=starts[1:])
        rows = byte_rows(pts)
        out = np.empty((len(pts) - outside, rows.shape[1]), np.uint8)
        scatter_rows(rows, key, starts, out)
        for t in np.flatnonzero(tile_counts):
            a, b = starts[t], starts[t] + tile_counts[t]
            t = int(t)
            if self._open is None:
                _append(self.path(t), out[a:b])
            else:
                _write_all(self._fd(t), out[a:b])
            self.counts[t] = self.counts.get(t, 0) + int(b - a)
        return int(outside)

    def _fd(self, tile: int) -> int:
        """The open file of ``tile`` (within :meth:`kept_open`), the least recently written
        one closed when more than the limit would be open."""
        fds = self._open
        fd = fds.pop(tile, None)
        if fd is None:
            if len(fds) >= self._most:
                os.close(fds.pop(next(iter(fds))))
            fd = os.open(self.path(tile), _APPEND, 0o666)
        fds[tile] = fd
        return fd


#: Flags of a tile file opened for appending (binary on Windows).
_APPEND = os.O_WRONLY | os.O_APPEND | os.O_CREAT | getattr(os, "O_BINARY", 0)


def _append(path: Path, rows: np.ndarray) -> None:
    """Append ``rows`` (C-contiguous bytes) to the file at ``path``, created if need be.

    Three system calls (open, write, close), each releasing the interpreter lock, where a
    Python file and ``ndarray.tofile`` make more than a dozen: a spill running beside the
    reader (:class:`SpillThread`) waits for the lock once for each."""
    fd = os.open(path, _APPEND, 0o666)
    try:
        _write_all(fd, rows)
    finally:
        os.close(fd)


def _write_all(fd: int, rows: np.ndarray) -> None:
    """Write ``rows`` (C-contiguous bytes) to ``fd``, whatever each write takes."""
    view = memoryview(rows).cast("B")
    while view:
        view = view[os.write(fd, view):]


class SpillThread:
    """:meth:`TileSpill.add` on a thread of its own, one chunk behind the caller, so that the
    next chunk is read and placed while the last one is spilled.

    The chunks are spilled one at a time in the order given, by one thread, so the spill
    files are those of calling :meth:`TileSpill.add` in a loop. :meth:`add` hands a chunk
    over and returns at once, after waiting for the chunk before it to be spilled (at most
    one chunk is spilling while the caller holds the next). The chunk must not change after
    it is handed over (the readers give a new array for every chunk). An error of the
    spill is raised again in the caller's thread, unchanged, by the next :meth:`add` or by
    :meth:`close`; after an error the thread spills nothing more. Use as a context manager:
    leaving the block waits for the thread to end, whatever happened, and :attr:`outside`
    then holds the points outside the grid. The spill's own attributes (``counts``,
    ``blocks``, ``zmin``) are complete once :meth:`close` has returned.

    The compiled kernels of :meth:`TileSpill.add` run without holding the interpreter lock
    and the file writes release it, so the spilling overlaps the reading in earnest; the
    thread keeps the tile files open while it runs (:meth:`TileSpill.kept_open`), so that
    it waits for the lock once a tile and chunk.
    """

    def __init__(self, spill: TileSpill) -> None:
        self.spill = spill
        self.outside = 0
        self._error: BaseException | None = None
        self._chunk: np.ndarray | None = None
        self._done = True                       # no chunk waiting or spilling
        self._closing = False
        self._cond = threading.Condition()
        self._thread = threading.Thread(target=self._run, name="tile-spill", daemon=True)
        self._thread.start()

    def _run(self) -> None:
        try:
            with self.spill.kept_open():        # closed before the thread ends
                self._loop()
        except BaseException as err:            # closing a tile file failed
            if self._error is None:
                self._error = err

    def _loop(self) -> None:
        while True:
            with self._cond:
                while self._chunk is None and not self._closing:
                    self._cond.wait()
                if self._chunk is None:         # closing and nothing left
                    return
                pts = self._chunk
                self._chunk = None
            try:
                if self._error is None:
                    self.outside += self.spill.add(pts)
            except BaseException as err:        # raised again in the caller's thread
                self._error = err
            finally:
                del pts
                with self._cond:
                    self._done = True
                    self._cond.notify_all()

    def _wait(self) -> None:
        """Until the chunk handed over last is spilled; raise the spill's error, if any."""
        with self._cond:
            while not self._done:
                self._cond.wait()
        if self._error is not None:
            raise self._error

    def add(self, pts: np.ndarray) -> None:
        """Hand a chunk over to be spilled, once the chunk before it is."""
        self._wait()
        if self._closing:
            raise ValueError("points added to a closed SpillThread")
        with self._cond:
            self._chunk = pts
            self._done = False
            self._cond.notify_all()

    def close(self) -> int:
        """Wait for every chunk to be spilled and the thread to end; raise the spill's error,
        if any. Returns how many points fell outside the grid."""
        self._stop()
        if self._error is not None:
            raise self._error
        return self.outside

    def _stop(self) -> None:
        with self._cond:
            self._closing = True
            self._cond.notify_all()
        self._thread.join()

    def __enter__(self) -> "SpillThread":
        return self

    def __exit__(self, exc_type: object, *exc: object) -> None:
        if exc_type is None:
            self.close()
        else:                                   # the caller's error wins; the thread still ends
            with self._cond:
                self._chunk = None              # a chunk not yet taken is not spilled
            self._stop()


@dataclass(frozen=True)
class Job:
    """One classification job: rows ``r0:r1`` and columns ``c0:c1`` of the spill grid (whole
    blocks, clipped to the grid), the points in those cells (its own) and the estimate of
    the points in its buffer that :func:`plan_jobs` judged it by."""

    r0: int
    c0: int
    r1: int
    c1: int
    points: int
    buffer_points: int

    @property
    def name(self) -> str:
        """``<r0>_<c0>``: jobs never overlap, so this names a job's files in the spill folder."""
        return f"{self.r0}_{self.c0}"

    def holds(self, row: np.ndarray, col: np.ndarray) -> np.ndarray:
        """Which cells (rows, columns of the spill grid) are the job's own."""
        return (row >= self.r0) & (row < self.r1) & (col >= self.c0) & (col < self.c1)


def _ring_weights(lo: int, hi: int, n: int, reach: float) -> tuple[int, int, np.ndarray]:
    """Blocks ``a:b`` of an axis of ``n`` blocks around blocks ``lo:hi``, with the share of
    each within ``reach`` blocks of them (1 inside, the overlap outside)."""
    w = math.ceil(reach)
    a, b = max(lo - w, 0), min(hi + w, n)
    idx = np.arange(a, b)
    d = np.maximum(lo - idx, idx - (hi - 1))        # blocks away from lo:hi; <= 0 inside
    return a, b, np.clip(reach - (d - 1), 0.0, 1.0)


def plan_jobs(spill: TileSpill, buffer_m: float, budget: int = JOB_POINTS) -> list[Job]:
    """Cut the spill grid into jobs of whole blocks by the points counted per block.

    Each tile holding points, in tile order, is one job when its points and the points of
    its buffer (``buffer_m`` around it, counted from the blocks it overlaps, a partly
    overlapped block pro rata) are at most ``budget``. A tile over the budget is cut: a
    rectangle of blocks is shrunk to its blocks holding points, becomes a job when it fits
    the budget or is one block, and is otherwise cut across its longer side in the middle,
    each half judged the same way (west before east, north before south). The plan depends
    on the counts alone. Tiles are not merged into larger jobs: the classifier takes
    longer per point in larger jobs, which ate the time saved on buffers (CHANGELOG).
    """
    counts = spill.blocks
    if counts is None:
        raise ValueError("plan_jobs needs the spill's block counts (a spill sent to a worker has none)")
    g, bc = spill.grid, spill.bc
    reach = buffer_m / (bc * g.cell)
    nby, nbx = counts.shape
    cum = np.zeros((nby + 1, nbx + 1), np.int64)
    cum[1:, 1:] = counts.cumsum(0).cumsum(1)
    jobs: list[Job] = []

    def visit(r0: int, c0: int, r1: int, c1: int, shrink: bool = True) -> None:
        if shrink:
            sub = counts[r0:r1, c0:c1]
            rows, cols = np.flatnonzero(sub.any(axis=1)), np.flatnonzero(sub.any(axis=0))
            if not len(rows):
                return
            r0, r1, c0, c1 = r0 + rows[0], r0 + rows[-1] + 1, c0 + cols[0], c0 + cols[-1] + 1
        own = int(cum[r1, c1] - cum[r0, c1] - cum[r1, c0] + cum[r0, c0])
        a, b, wr = _ring_weights(r0, r1, nby, reach)
        c, d, wc = _ring_weights(c0, c1, nbx, reach)
        ring = round(float(wr @ counts[a:b, c:d] @ wc)) - own
        if own + ring <= budget or (r1 - r0 == 1 and c1 - c0 == 1):
            jobs.append(Job(int(r0) * bc, int(c0) * bc, min(int(r1) * bc, g.nrows), min(int(c1) * bc, g.ncols),
                            own, ring))
        elif c1 - c0 >= r1 - r0:
            m = c0 + (c1 - c0) // 2
            visit(r0, c0, r1, m)
            visit(r0, m, r1, c1)
        else:
            m = r0 + (r1 - r0) // 2
            visit(r0, c0, m, c1)
            visit(m, c0, r1, c1)

    k = spill.tc // bc          # blocks along a tile
    for tile in sorted(spill.counts):
        ty, tx = divmod(tile, spill.ntx)
        # a whole tile that fits is its own job, rectangle and buffer as the tile's
        visit(ty * k, tx * k, min((ty + 1) * k, nby), min((tx + 1) * k, nbx), shrink=False)
    return jobs


#: Points read at a time from a tile's spill file (about 60 MB without extra dimensions).
_BLOCK = 1_000_000


def job_points(spill: TileSpill, job: Job, buffer_m: float) -> np.ndarray:
    """A job's own points (those in its cells) followed by the points within ``buffer_m``
    of its rectangle, each part tile by tile in tile order and in spill order within a tile.

    Tile files are read in chunks of :data:`_BLOCK` points, each mapped in memory (no copy
    of the file's bytes), so a job holds its own and its buffer's points and one chunk,
    never the whole tiles it overlaps. A chunk's own and buffer points are picked out in
    one compiled pass (:func:`~inventory.survey.spillkernels.split_rows`) and copied as
    whole records (:func:`~inventory.io.records.select`), not field by field.
    """
    g, tc = spill.grid, spill.tc
    c = g.cell
    x0, x1 = g.west + job.c0 * c, g.west + job.c1 * c
    y0, y1 = g.north - job.r1 * c, g.north - job.r0 * c
    bx0, bx1, by0, by1 = x0 - buffer_m, x1 + buffer_m, y0 - buffer_m, y1 + buffer_m
    rows, cols = g.window(bx0, by0, bx1, by1)
    own, extra = [], []
    for ty in range(rows.start // tc, (rows.stop - 1) // tc + 1):
        for tx in range(cols.start // tc, (cols.stop - 1) // tc + 1):
            tile = ty * spill.ntx + tx
            if tile not in spill.counts:
                continue
            tr0, tc0 = ty * tc, tx * tc
            inside = job.r0 <= tr0 and tr0 + tc <= job.r1 and job.c0 <= tc0 and tc0 + tc <= job.c1
            apart = tr0 >= job.r1 or tr0 + tc <= job.r0 or tc0 >= job.c1 or tc0 + tc <= job.c0
            for pts in _mapped_chunks(spill.path(tile), spill.dtype):
                if inside:
                    own.append(pts)
                    continue
                mine, near = split_rows(pts["X"], pts["Y"], not apart, float(g.west), float(g.north), float(c),
                                        job.r0, job.r1, job.c0, job.c1, float(bx0), float(bx1), float(by0),
                                        float(by1))
                if len(mine):
                    own.append(pts if len(mine) == len(pts) else select(pts, mine))
                if len(near):
                    extra.append(pts if len(near) == len(pts) else select(pts, near))
                del pts, mine, near         # a chunk's mapping goes as soon as nothing holds it
    return concat(own + extra, spill.dtype)


def _mapped_chunks(path: Path, dtype: np.dtype) -> Iterator[np.ndarray]:
    """The records of a spill file, :data:`_BLOCK` at a time, as read-only arrays on a
    memory map of their bytes (no copy; a chunk's mapping goes with the last array on it)."""
    with open(path, "rb") as f:
        n = os.fstat(f.fileno()).st_size // dtype.itemsize
        for start in range(0, n, _BLOCK):
            count = min(_BLOCK, n - start)
            a = start * dtype.itemsize
            base = a - a % mmap.ALLOCATIONGRANULARITY
            mm = mmap.mmap(f.fileno(), a + count * dtype.itemsize - base, offset=base, access=mmap.ACCESS_READ)
            chunk = np.frombuffer(mm, dtype, count, offset=a - base)
            del mm
            yield chunk
            del chunk


def classify_job(spill: TileSpill, job: Job, buffer_m: float, pipeline: Pipeline, crs: CRS | str,
                 engine: str, statistic: str) -> tuple[np.ndarray, TileCells | None, int]:
    """A job's own points, classified with the points of its buffer around them, its cells
    gridded (:func:`grid_tile`), and how many of its own points voxel thinning dropped."""
    pts = job_points(spill, job, buffer_m)
    stats: dict = {}
    out, _ = pipeline.run(pts, crs, engine=engine, stats=stats, consume=True)   # read for this job alone
    del pts
    row, col, _ = spill.grid.index(out["X"], out["Y"])
    out = select(out, job.holds(row, col))
    txy = stats.get("thinned_xy")
    thinned = 0
    if txy is not None and len(txy):
        thinned = int(job.holds(*spill.grid.index(txy[:, 0], txy[:, 1])[:2]).sum())
    return out, grid_tile(spill.grid, out, statistic), thinned


@dataclass
class TileCells:
    """One job's cells (a tile's, as they once were), rows ``r0:r0 + shape[0]`` and columns
    ``c0:c0 + shape[1]`` of the spill grid: the surface statistic, count and spread of its surface points (no cell
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


def grid_tile(g: Grid, pts: np.ndarray, statistic: str) -> TileCells | None:
    """Grid one classified job's own surface points and object returns (not surface, not
    noise) on its cells of the spill grid ``g``; ``None`` when it has neither.

    A cell belongs to one job (a job is a rectangle of cells), so a job's cells are
    complete: this runs inside the job, on the workers when there are any.
    """
    cls = pts["Classification"]
    ground = cls == GROUND
    objects = ~np.isin(cls, (GROUND, LOW_NOISE, HIGH_NOISE))
    if not ground.any() and not objects.any():
        return None
    row, col, _ = g.index(pts["X"], pts["Y"])
    r0, c0 = int(row.min()), int(col.min())
    r1, c1 = int(row.max()) + 1, int(col.max()) + 1
    # The job's cells on a grid of unit cells at the origin: cell centres land in the
    # cells already found, whatever the rounding of projected coordinates.
    acc = SurfaceAccumulator(Grid(0.0, 0.0, 1.0, r1 - r0, c1 - c0, g.crs), statistic)
    if ground.any():
        acc.add(col[ground] - c0 + 0.5, -(row[ground] - r0 + 0.5), pts["Z"][ground])
    if objects.any():
        acc.add_objects(col[objects] - c0 + 0.5, -(row[objects] - r0 + 0.5), pts["Z"][objects])
    part = acc.result_without_objects()
    top, bottom, low_object = acc.extremes()
    return TileCells(r0, c0, part.z, part.count, part.sd, top, bottom, low_object)


@dataclass
class JobResult:
    """What a classified job (:func:`classify_job_to_file`) sends back: small things only.

    Attributes
    ----------
    kept : int
        The job's own points after the pipeline.
    counts : dict[int, int]
        Its points per ASPRS class.
    ground_box : tuple of float or None
        x min, y min, x max, y max of its surface points (``None`` when it has none).
    cells : Path or None
        Its cells (:class:`TileCells`) saved in the spill folder, ``None`` when it has
        neither surface points nor object returns.
    thinned : int
        Its own points voxel thinning dropped.
    part : LazPart or None
        Its points compressed into complete LAZ chunks in the spill folder, with the header
        statistics of them (:func:`~inventory.io.lazparts.encode_part`), when a classified
        cloud is written.
    """

    kept: int
    counts: dict[int, int]
    ground_box: tuple[float, float, float, float] | None
    cells: Path | None
    thinned: int
    part: LazPart | None = None


def run_jobs(ex: Executor, spill: TileSpill, jobs: list[Job], buffer_m: float, pipe: Pipeline, crs: CRS,
             engine: str, statistic: str, layout: LasLayout | None = None) -> Iterator[JobResult]:
    """Classified jobs (:func:`classify_job_to_file`) in the order of ``jobs``, however
    ``ex`` (an :class:`~inventory.parallel.Executor`) runs them.

    Every way runs the same job function, which leaves the job's cells and, with a
    ``layout``, its points compressed in LAZ chunks in the spill folder and sends back a
    :class:`JobResult`: no job's points travel back, and the process that writes the
    classified cloud only appends the chunks in plan order (so that every way writes the
    same file). A CRS travels to worker processes as WKT. The results are that small, so
    more jobs may wait finished than there are workers: a large job then holds up neither
    worker.
    """
    wkt = crs.to_wkt() if ex.kind == "dask" else crs
    yield from ex.map(classify_job_to_file, ((spill, j, buffer_m, pipe, wkt, engine, statistic, layout)
                                             for j in jobs), window=JOBS_IN_FLIGHT * max(ex.workers, 1))


#: Jobs submitted to each worker and not yet taken back (see :func:`run_jobs`).
JOBS_IN_FLIGHT = 4


def classify_job_to_file(spill: TileSpill, job: Job, buffer_m: float, pipeline: Pipeline, crs: CRS | str,
                         engine: str, statistic: str, layout: LasLayout | None = None) -> JobResult:
    """:func:`classify_job`, finished where it runs: the points counted per class, the box of
    the surface points taken, the cells saved to ``cells_<job name>.npz`` and, with a
    ``layout``, the points compressed to ``classified_<job name>.bin`` (complete LAZ chunks,
    :func:`~inventory.io.lazparts.encode_part`), all in the spill folder."""
    out, cells, thinned = classify_job(spill, job, buffer_m, pipeline, crs, engine, statistic)
    cls = out["Classification"]
    tally = np.bincount(cls, minlength=256)
    counts = {int(c): int(tally[c]) for c in np.flatnonzero(tally)}
    g = out[cls == GROUND]
    box = None
    if len(g):
        box = (float(g["X"].min()), float(g["Y"].min()), float(g["X"].max()), float(g["Y"].max()))
    del g
    cells_path = cells.save(spill.folder / f"cells_{job.name}.npz") if cells is not None else None
    part = None
    if layout is not None:
        part = encode_part(out, layout, spill.folder / f"classified_{job.name}.bin")
    return JobResult(len(out), counts, box, cells_path, thinned, part)


def grid_tiles(g: Grid, cell_files: list[Path], sgrid: Grid, statistic: str, date: str) -> Surface:
    """The surface grid ``sgrid`` put together from the jobs' cells (:class:`TileCells`
    saved in ``cell_files``, gridded on the spill grid ``g`` by each job).

    ``sgrid`` is ``g`` shifted by whole cells; each job's block is shifted into it and
    clipped (object returns beyond the surface's extent have no cell to judge). Memory is
    the output grid plus one job's cells, never per-cell sums of the whole survey. The
    cells are read twice: first what :func:`~inventory.survey.gridding.object_cells` needs
    over the whole grid (the lowest surface point and the lowest object return of every
    cell; the first object rule, an object return less than ``OBJECT_CLEARANCE_M`` above a
    cell's highest surface point, is judged job by job, cell by cell), so that a vehicle or
    a wall on a job's edge is judged as it would be in one piece; then, with those grids
    let go, the surface statistic, count and spread, the cells on objects left empty. The
    grids of the two reads are never held at once.
    """
    roff = int(round((g.north - sgrid.north) / g.cell))
    coff = int(round((sgrid.west - g.west) / g.cell))

    def blocks(names: tuple[str, ...]) -> Iterator[tuple[tuple[slice, slice], dict[str, np.ndarray]]]:
        # each job's block clipped to sgrid: where it goes, and the named arrays of it
        for path in cell_files:
            with np.load(path) as f:
                r0, c0 = int(f["r0"]) - roff, int(f["c0"]) - coff
                count = f["count"]
                r1, c1 = r0 + count.shape[0], c0 + count.shape[1]
                R0, C0 = max(r0, 0), max(c0, 0)
                R1, C1 = min(r1, sgrid.nrows), min(c1, sgrid.ncols)
                if R0 >= R1 or C0 >= C1:
                    continue
                src = (slice(R0 - r0, R1 - r0), slice(C0 - c0, C1 - c0))
                yield (slice(R0, R1), slice(C0, C1)), {n: (count if n == "count" else f[n])[src] for n in names}

    # jobs' cell blocks never overlap (jobs are rectangles of cells that never overlap)
    has = np.zeros(sgrid.shape, bool)
    near_object = np.zeros(sgrid.shape, bool)
    bottom = np.full(sgrid.shape, np.inf)
    low_object = np.full(sgrid.shape, np.inf)
    for dst, t in blocks(("count", "top", "bottom", "low_object")):
        has[dst] = t["count"] > 0
        bottom[dst], low_object[dst] = t["bottom"], t["low_object"]
        near_object[dst] = t["low_object"] < t["top"] + OBJECT_CLEARANCE_M
    covered = object_cells(has, None, bottom, low_object, sgrid.cell_area, near_object=near_object)
    # cells an object stands in (a wall, a vehicle): the volume step does not fill a pile's
    # gap across them (inventory.volume.measure, OBJECT_SEEN)
    seen = np.isfinite(low_object)
    del has, near_object, bottom, low_object

    z = np.full(sgrid.shape, np.nan)
    count = np.zeros(sgrid.shape, np.int32)
    sd = np.full(sgrid.shape, np.nan)
    for dst, t in blocks(("z", "count", "sd")):
        have = (t["count"] > 0) & ~covered[dst]
        z[dst][have] = t["z"][have]
        count[dst][have] = t["count"][have]
        sd[dst][have] = t["sd"][have]
    return Surface(sgrid, z, count, sd, np.zeros(sgrid.shape, bool), date,
                   {"statistic": statistic, "object_cells": int(covered.sum()), "object_seen": seen})

