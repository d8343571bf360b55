"""One survey's point clouds -> a classified cloud and the stockpile surface grid.

``measure_survey(site, date)`` is what ``inventory survey SITE --date D`` runs:

1. **Read and place** every cloud file of ``surveys/<date>/`` in chunks: station-frame
   clouds through their pose from ``stations.csv`` (:mod:`inventory.survey.placement`), others
   from their own CRS (or ``[survey] default_crs``) into the site CRS with one transformer
   per input CRS (:mod:`inventory.io.crs`).
2. **Tile**: points are spilled to disk by square tiles of the site grid (edges on cell
   edges), so that no step holds more than one tile and its neighbours in memory.
3. **Clean and classify** each tile with a buffer of neighbouring points through the
   pipeline (``[survey] pipeline`` or ``pipelines/stockpile.json``); only the tile's own
   points are kept, so results do not depend on the tiling as long as the buffer is wider
   than the stages' reach (except through statistics taken over a whole tile: the
   threshold of ``filters.outlier`` is the mean and spread of the tile and its buffer).
   Tiles run serially, on threads or on Dask (``workers``, ``scheduler``;
   :mod:`inventory.parallel`) and come back in tile order, so every way writes the same
   files.
4. **Grid** the surface class (ASPRS 2) and the object returns of each tile inside the
   tile's own job (a cell lies in one tile: :func:`_grid_tile`), so gridding runs on the
   workers too; paste the tiles' cells into the site grid and take out surface cells lying
   on an object over the whole grid; fill holes up to ``[grid] max_fill_distance_m``
   window by window (:data:`FILL_WINDOW_CELLS` cells and a margin); write
   ``surface-<date>.tif``, ``coverage-<date>.tif`` and ``classified-<date>.laz``.

Memory is the output grid (about 21 bytes a cell, plus three grids of per-cell extremes
while they are pasted) plus a few tiles (two per worker in flight; finished Dask tiles
wait on disk) or one fill window, whatever the size of the files; ``bench/bench_survey.py``
measures it with the throughput.
"""

from __future__ import annotations

import math
import shutil
import tempfile
import time
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import numpy as np

from inventory.model.classes import (
    CLASS_NAMES,
    GROUND,
    HIGH_NOISE,
    LOW_NOISE,
    OVERHEAD_STRUCTURE,
    UNCLASSIFIED,
)
from inventory.io.crs import TransformerCache, horizontal_unit_factor, parse_crs
from inventory.survey.placement import StationPose, poses_from_stations
from inventory.io.clouds import DEFAULT_CHUNK, POINT_DTYPE, CloudWriter, open_cloud
from inventory.survey.pipeline import Pipeline, load_pipeline, pdal_available
from inventory.model.pose import DEFAULT_MAX_GAP_S, Trajectory
from inventory.survey.placement import georeference
from inventory.site.trajectory import read_trajectories
from inventory.errors import CoverageWarning, CRSError, InputError, InputWarning, PipelineError, RunError
from inventory.model.grid import Grid, Surface
from inventory.survey.gridding import (
    FillReport,
    SurfaceAccumulator,
    fill_holes,
    object_cells,
)
from inventory.io.rasters import write_coverage, write_surface

__all__ = ["SurveyResult", "measure_survey", "measure_surveys", "DEFAULT_TILE_M", "DEFAULT_BUFFER_M"]

#: Tile edge in metres: 100 m x 100 m holds about 10-50 million scanner points at most.
DEFAULT_TILE_M = 100.0
#: Neighbouring points around a tile: wider than the reach of every stage of the default
#: pipeline (slope envelope window 12 m, outlier neighbourhoods well under 1 m).
DEFAULT_BUFFER_M = 15.0

Progress = Callable[[str], None]


@dataclass
class SurveyResult:
    """What one survey produced.

    Attributes
    ----------
    date : str
    surface : Surface
        Filled surface on the site grid (``surface.filled`` marks interpolated cells).
    classified_path, surface_path, coverage_path : Path or None
    class_counts : dict[int, int]
        Points per ASPRS class in the classified cloud.
    points_read : int
        Points in the files.
    points_kept : int
        Points after range gates and crops (the classified cloud).
    fill : FillReport
    engine : str
        ``"pdal"`` or ``"builtin"``.
    """

    date: str
    surface: Surface
    classified_path: Path | None
    surface_path: Path | None
    coverage_path: Path | None
    class_counts: dict[int, int]
    points_read: int
    points_kept: int
    points_outside: int
    fill: FillReport
    files: list[Path]
    engine: str
    timings: dict[str, float] = field(default_factory=dict)
    #: Moving-scanner points not placed: outside the trajectory's time span, inside its gaps.
    points_outside_span: int = 0
    points_in_gap: int = 0

    @property
    def written(self) -> list[Path]:
        return [p for p in (self.surface_path, self.coverage_path, self.classified_path) if p is not None]

    def format_summary(self) -> str:
        """One line: points read, kept, per class, cells and coverage."""
        s = self.surface
        cells = s.grid.nrows * s.grid.ncols
        scanned = int(s.scanned.sum())
        order = (GROUND, UNCLASSIFIED, OVERHEAD_STRUCTURE, LOW_NOISE, HIGH_NOISE)
        parts = [f"{CLASS_NAMES.get(c, c)} {self.class_counts.get(c, 0):,}" for c in order]
        parts += [f"class {c} {n:,}" for c, n in sorted(self.class_counts.items()) if c not in order]
        return (f"survey {self.date}: {self.points_read:,} points read, {self.points_kept:,} kept "
                f"({', '.join(parts)}); {cells:,} cells of {s.grid.cell:g} m, "
                f"{scanned / cells:.1%} scanned, {self.fill.filled_cells:,} filled, "
                f"{self.fill.gap_area_m2:,.1f} m2 of enclosed gaps left empty"
                + (f"; trajectory: {self.points_outside_span:,} points outside its time span rejected, "
                   f"{self.points_in_gap:,} in its gaps dropped"
                   if self.points_outside_span or self.points_in_gap else ""))


@dataclass
class _Source:
    path: Path
    index: int
    pose: StationPose | None
    crs: Any  # pyproj CRS of a georeferenced file
    trajectory: Trajectory | None = None  # a moving scanner's cloud (scanner frame, per-point pose)


def _survey_ref(site: Any, date: str) -> Any:
    surveys = getattr(site, "surveys", {}) or {}
    if date not in surveys:
        have = ", ".join(sorted(surveys)) or "none"
        raise InputError(Path(site.root) / "surveys" / date, f"no survey folder for {date} (surveys: {have})",
                         field="date")
    return surveys[date]


def _pipeline_for(site: Any, pipeline: "Pipeline | str | Path | None") -> Pipeline:
    if isinstance(pipeline, Pipeline):
        p = pipeline
    elif pipeline is not None:
        p = Pipeline.from_file(pipeline)
    else:
        configured = getattr(getattr(site.config, "survey", None), "pipeline", None)
        p = load_pipeline(Path(site.root) / configured if configured is not None else None)
    if not p.filters_only:
        raise PipelineError(f"{p.source}: a survey pipeline holds filters only; the survey step reads "
                            "the survey folder and writes the classified cloud itself")
    for s in p.stages:
        if s.type == "filters.reprojection":
            raise PipelineError(f"{p.source}: stage {s.index + 1}: no filters.reprojection in a survey "
                                "pipeline; clouds are brought into the site CRS before it runs")
    return p


def _sources(site: Any, ref: Any) -> list[_Source]:
    poses: dict[str, StationPose | None] = {}
    if getattr(ref, "stations", None) is not None:
        poses = poses_from_stations(ref.stations, Path(ref.folder) / "stations.csv")
    default = getattr(site.config.survey, "default_crs", None)
    # A moving scanner's clouds: the trajectory named for the file, else the table's one
    # trajectory for every file that stations.csv does not list (as the site check does).
    trajectories: dict[str | None, Trajectory] = {}
    trajectory_csv = Path(ref.folder) / "trajectory.csv"
    if trajectory_csv.is_file():
        trajectories = read_trajectories(trajectory_csv, getattr(site.config, "machines", None) or {})
    listed = set(ref.stations["file"]) if getattr(ref, "stations", None) is not None else set()
    out = []
    for i, path in enumerate(ref.files):
        path = Path(path)
        pose = poses.get(path.name)
        crs = None
        moving = None
        if pose is None:
            moving = trajectories.get(path.name) or (trajectories.get(None) if path.name not in listed else None)
        if moving is not None:
            pass  # placed by its trajectory: no CRS needed
        elif pose is None:
            with open_cloud(path, default_crs=default) as cloud:
                crs = cloud.crs
            if crs is None:
                raise CRSError(path, "the file carries no CRS, has no pose in stations.csv, and site.toml "
                               "has no [survey] default_crs", field="crs")
        out.append(_Source(path, i, pose, crs, moving))
    return out


def _warn_trajectory(src: _Source, counts: dict[str, int], max_gap_s: float) -> None:
    """One InputWarning per moving-scanner file whose points were not all placed."""
    traj = src.trajectory
    parts = []
    if counts["outside_span"]:
        t0, t1 = traj.span
        parts.append(f"{counts['outside_span']:,} lie outside the time span of {traj.source or 'the trajectory'} "
                     f"({t0:.3f} to {t1:.3f} s) and were rejected")
    if counts["in_gap"]:
        g = traj.gaps(max_gap_s)
        parts.append(f"{counts['in_gap']:,} fall in {len(g)} gap(s) longer than {max_gap_s:g} s "
                     f"(first {g[0, 0]:.3f} to {g[0, 1]:.3f} s) and were dropped")
    if parts and not counts.get("kept"):
        parts.append("none was placed: are the cloud and the trajectory in the same GPS time base "
                     "(week seconds or adjusted standard)?")
    if parts:
        warnings.warn(InputWarning(f"{src.path}: of {counts['points']:,} points, " + "; ".join(parts)),
                      stacklevel=3)


def _extent(sources: list[_Source], site_crs: Any, cache: TransformerCache) -> tuple[float, float, float, float]:
    boxes = []
    for src in sources:
        with open_cloud(src.path) as cloud:
            mins, maxs = cloud.mins, cloud.maxs
        if src.pose is not None:
            boxes.append(src.pose.box_in_site(mins, maxs))
        elif src.trajectory is not None:
            boxes.append(src.trajectory.extent(mins, maxs))
        else:
            boxes.append(cache.get(src.crs, site_crs).bounds(mins[0], mins[1], maxs[0], maxs[1]))
    b = np.asarray(boxes, float)
    return float(b[:, 0].min()), float(b[:, 1].min()), float(b[:, 2].max()), float(b[:, 3].max())


class _TileSpill:
    """Points spilled to one raw file per tile of the grid."""

    def __init__(self, grid: Grid, tile_cells: int, folder: Path) -> None:
        self.grid = grid
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
        """Spill points; returns how many fell outside the grid."""
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


def _load(path: Path) -> np.ndarray:
    return np.fromfile(path, dtype=POINT_DTYPE)


#: Points read at a time from a neighbouring tile's spill file (about 50 MB).
_BLOCK = 1_000_000


def _tile_job(spill: _TileSpill, tile: int, buffer_m: float) -> np.ndarray:
    """A tile's points followed by its neighbours' points within ``buffer_m`` of it.

    Neighbouring files are read in blocks of :data:`_BLOCK` points, so a tile never holds
    its neighbours whole (eight of them inside a large survey).
    """
    core = _load(spill.path(tile))
    x0, y0, x1, y1 = spill.box(tile)
    extra = []
    for nb in spill.neighbours(tile):
        with open(spill.path(nb), "rb") as f:
            while True:
                pts = np.fromfile(f, dtype=POINT_DTYPE, count=_BLOCK)
                if not len(pts):
                    break
                m = (pts["X"] >= x0 - buffer_m) & (pts["X"] < x1 + buffer_m) & \
                    (pts["Y"] >= y0 - buffer_m) & (pts["Y"] < y1 + buffer_m)
                extra.append(pts[m])
    return np.concatenate([core] + extra) if extra else core


def _classify_tile(spill: _TileSpill, tile: int, buffer_m: float, pipeline: Pipeline, crs: Any,
                   engine: str, statistic: str) -> tuple[np.ndarray, "_TileCells | None"]:
    """A tile's own points, classified with its neighbours' points around it, and its cells
    gridded (:func:`_grid_tile`)."""
    pts = _tile_job(spill, tile, buffer_m)
    out, _ = pipeline.run(pts, crs, engine=engine)
    own, _ = spill.tile_of(out["X"], out["Y"])
    out = out[own == tile]
    return out, _grid_tile(spill.grid, out, statistic)


@dataclass
class _TileCells:
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
    def load(cls, path: Path) -> "_TileCells":
        with np.load(path) as f:
            return cls(int(f["r0"]), int(f["c0"]), f["z"], f["count"], f["sd"], f["top"], f["bottom"],
                       f["low_object"])


def _grid_tile(g: Grid, pts: np.ndarray, statistic: str) -> "_TileCells | None":
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
    return _TileCells(r0, c0, part.z, part.count, part.sd, top, bottom, low_object)


def measure_survey(site: Any, date: str, out_dir: "str | Path | None" = None,
                   progress: Progress | None = None, *, pipeline: "Pipeline | str | Path | None" = None,
                   engine: str = "auto", tile_size_m: float = DEFAULT_TILE_M,
                   buffer_m: float = DEFAULT_BUFFER_M, chunk_size: int = DEFAULT_CHUNK,
                   workers: int | None = None, scheduler: str | None = None, threads: bool = False,
                   write_classified: bool = True) -> SurveyResult:
    """Turn one survey's point clouds into a classified cloud and a surface grid.

    Parameters
    ----------
    site : Site
        A loaded site (:func:`inventory.site.load.load_site`); uses ``root``, ``crs``,
        ``config.grid``, ``config.survey`` and ``surveys[date]`` (``folder``, ``files``,
        ``stations``).
    date : str
        Survey date ``YYYY-MM-DD`` (a folder under ``surveys/``).
    out_dir : path, optional
        Where the GeoTIFFs and the classified LAZ go; nothing is written when ``None``.
    progress : callable, optional
        Called with a short text as long steps advance.
    pipeline : Pipeline or path, optional
        Overrides ``[survey] pipeline`` and the packaged default.
    engine : "auto" | "pdal" | "builtin"
    tile_size_m, buffer_m : float
        Processing tiles and the neighbouring points each tile sees.
    chunk_size : int
        Points per read chunk.
    workers, scheduler, threads : optional
        Classify tiles on a local Dask cluster of ``workers`` processes (a pool of
        ``workers`` threads with ``threads=True``) or on the Dask cluster at ``scheduler``
        (its workers must see this machine's temporary folder); see
        :mod:`inventory.parallel`. Every way gives the same files.
    write_classified : bool
        Write ``classified-<date>.laz`` (when ``out_dir`` is given).

    Returns
    -------
    SurveyResult
    """
    say = progress or (lambda text: None)
    t_start = time.perf_counter()
    timings: dict[str, float] = {}
    ref = _survey_ref(site, date)
    pipe = _pipeline_for(site, pipeline)
    used_engine = "pdal" if (engine == "pdal" or (engine == "auto" and pdal_available())) else "builtin"
    site_crs = parse_crs(site.crs, where=str(Path(site.root) / "site.toml"), field="crs")
    if horizontal_unit_factor(site_crs) != 1.0:
        raise CRSError(Path(site.root) / "site.toml", f"site CRS {site.crs} is not projected in metres",
                       field="crs")
    grid_cfg = site.config.grid
    cell = float(grid_cfg.cell_size_m)
    cache = TransformerCache()
    sources = _sources(site, ref)
    grid = Grid.snapped(*_extent(sources, site_crs, cache), cell=cell, crs=site.crs)
    tile_cells = max(1, int(round(tile_size_m / cell)))
    if buffer_m > tile_size_m:
        raise ValueError("buffer_m must not exceed tile_size_m (only neighbouring tiles are read)")

    from inventory.parallel import executor

    # One executor for the tiles and the fill windows (a local cluster starts while reading).
    with executor(workers, scheduler, threads=threads) as ex:
        tmp = Path(tempfile.mkdtemp(prefix=f"survey-{date}-"))
        try:
            spill = _TileSpill(grid, tile_cells, tmp)
            read = outside = 0
            total = 0
            for src in sources:
                with open_cloud(src.path) as cloud:
                    total += cloud.count
            max_gap_s = float(getattr(site.config.survey, "trajectory_max_gap_s", DEFAULT_MAX_GAP_S))
            rejected = {"outside_span": 0, "in_gap": 0}  # moving-scanner points not placed, all files
            for src in sources:
                with open_cloud(src.path, chunk_size=chunk_size) as cloud:
                    reproject = None if src.pose is not None or src.trajectory is not None else cache.get(src.crs, site_crs)
                    file_rejected = {"outside_span": 0, "in_gap": 0, "points": 0}
                    for chunk in cloud.chunks():
                        n_chunk = len(chunk)
                        if src.pose is not None:
                            chunk["X"], chunk["Y"], chunk["Z"], chunk["StationRange"] = src.pose.apply(
                                chunk["X"], chunk["Y"], chunk["Z"])
                        elif src.trajectory is not None:
                            # Each point with the pose at its own GPS time; the sums are reported
                            # once per file below, not once per chunk.
                            own = np.column_stack([chunk["X"], chunk["Y"], chunk["Z"]])
                            xyz, keep, c = georeference(own, chunk["GpsTime"], src.trajectory, max_gap_s=max_gap_s,
                                                        warn=False, source=src.path.name)
                            chunk = chunk[keep]
                            chunk["StationRange"] = np.sqrt((own[keep] ** 2).sum(axis=1))
                            chunk["X"], chunk["Y"], chunk["Z"] = xyz[:, 0], xyz[:, 1], xyz[:, 2]
                            for key in file_rejected:
                                file_rejected[key] += c[key]
                            file_rejected["kept"] = file_rejected.get("kept", 0) + c["kept"]
                        elif not reproject.is_identity:
                            chunk["X"], chunk["Y"], chunk["Z"] = reproject(chunk["X"], chunk["Y"], chunk["Z"])
                        chunk["PointSourceId"] = src.index
                        outside += spill.add(chunk)
                        read += n_chunk
                        say(f"reading {src.path.name}: {read:,} of {total:,} points ({read / max(total, 1):.0%})")
                    if src.trajectory is not None:
                        _warn_trajectory(src, file_rejected, max_gap_s)
                        rejected["outside_span"] += file_rejected["outside_span"]
                        rejected["in_gap"] += file_rejected["in_gap"]
            timings["read"] = time.perf_counter() - t_start

            t0 = time.perf_counter()
            counts: dict[int, int] = {}
            ground_box = [math.inf, math.inf, -math.inf, -math.inf]
            kept = 0
            writer = None
            classified_path = None
            if out_dir is not None and write_classified:
                classified_path = Path(out_dir) / f"classified-{date}.laz"
                writer = CloudWriter(classified_path, crs=site_crs,
                                     offset=(grid.west, grid.south, math.floor(spill.zmin) if spill.counts else 0.0))
            tiles = sorted(spill.counts)
            cell_files: list[Path] = []
            try:
                for i, (result, cells) in enumerate(_run_tiles(ex, spill, tiles, buffer_m, pipe, site_crs,
                                                                 used_engine, grid_cfg.statistic)):
                    cls = result["Classification"]
                    for c, n in zip(*np.unique(cls, return_counts=True)):
                        counts[int(c)] = counts.get(int(c), 0) + int(n)
                    kept += len(result)
                    g = result[cls == GROUND]
                    if len(g):
                        ground_box = [min(ground_box[0], g["X"].min()), min(ground_box[1], g["Y"].min()),
                                      max(ground_box[2], g["X"].max()), max(ground_box[3], g["Y"].max())]
                    if cells is not None:
                        cell_files.append(cells.save(tmp / f"cells_{tiles[i]}.npz"))
                    if writer is not None:
                        writer.write(result)
                    say(f"classifying: tile {i + 1} of {len(tiles)}")
            except BaseException:
                if writer is not None:
                    writer.close(ok=False)
                raise
            if writer is not None:
                writer.close()
            timings["classify"] = time.perf_counter() - t0

            # The surface grid covers the surface points only: far returns (ghosts, distant
            # buildings) widen the files' header boxes but not the grid. Its origin is snapped
            # to the cell size, so it lines up with every other survey of the site, and its
            # tiles' edges fall on cell edges (what the median statistic needs).
            t0 = time.perf_counter()
            say("gridding the surface and filling holes")
            if not math.isfinite(ground_box[0]):
                raise RunError(f"survey {date}: no point was classified as surface")
            sgrid = Grid.snapped(*ground_box, cell=cell, crs=site.crs)
            raw = _grid_tiles(spill.grid, cell_files, sgrid, grid_cfg.statistic, date)
        finally:
            shutil.rmtree(tmp, ignore_errors=True)

        surface, fill = _fill_windows(raw, float(grid_cfg.max_fill_distance_m), ex=ex)
        del raw
    surface.meta.update(points_read=read, points_kept=kept, engine=used_engine, pipeline=pipe.source)
    if fill.gap_cells:
        warnings.warn(CoverageWarning(f"survey {date}: {fill.gap_area_m2:.1f} m2 of enclosed gaps wider than "
                                      f"{grid_cfg.max_fill_distance_m} m from any scan left as nodata "
                                      f"(largest {fill.largest_gap_m2:.1f} m2)"), stacklevel=2)
    surface_path = coverage_path = None
    if out_dir is not None:
        surface_path = write_surface(surface, Path(out_dir) / f"surface-{date}.tif")
        coverage_path = write_coverage(surface, Path(out_dir) / f"coverage-{date}.tif")
    timings["grid"] = time.perf_counter() - t0
    timings["total"] = time.perf_counter() - t_start
    return SurveyResult(date, surface, classified_path, surface_path, coverage_path, counts, read, kept,
                        outside, fill, [s.path for s in sources], used_engine, timings,
                        rejected["outside_span"], rejected["in_gap"])


def _grid_tiles(g: Grid, cell_files: list[Path], sgrid: Grid, statistic: str, date: str) -> Surface:
    """The surface grid ``sgrid`` put together from the tiles' cells (:class:`_TileCells`
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
        t = _TileCells.load(path)
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


#: Hole filling runs on windows of this many cells a side (plus a margin), never on the
#: whole survey; a grid of at most this squared cells is one window (as before windows).
FILL_WINDOW_CELLS = 512


def _fill_window(sub: Surface, max_distance_m: float, core: tuple[slice, slice], r0: int, c0: int,
                 ncols: int) -> tuple[np.ndarray, np.ndarray]:
    """One window of :func:`_fill_windows`: flat indices (in the whole grid) and values of
    the cells filled in its core."""
    part, _ = fill_holes(sub, max_distance_m)
    rr, cc = np.nonzero(part.filled[core])
    return (rr + r0) * ncols + cc + c0, part.z[core][rr, cc]


def _fill_windows(surface: Surface, max_distance_m: float, window: int = FILL_WINDOW_CELLS,
                  margin_reach: int = 4, ex: Any = None) -> tuple[Surface, FillReport]:
    """:func:`~inventory.survey.gridding.fill_holes` window by window, with a margin.

    A grid of at most ``window`` x ``window`` cells is filled whole, exactly as
    :func:`fill_holes` does. A larger one is cut into windows of ``window`` cells, each
    filled from itself and a margin of ``margin_reach`` times the reach of the fill (the
    distance plus two cells) around it, keeping its own cells: memory is that of one
    window, not of a Delaunay triangulation of the whole survey; windows run on ``ex`` (an
    :class:`~inventory.parallel.Executor`) when given. A cell's fill then comes
    from the scanned cells within the margin around its window. Against one triangulation
    of the whole grid, what differs is the choice among equally Delaunay diagonals of
    cocircular cells (the lattice is full of them, and Qhull's choice depends on every
    input point) and triangles stretched across gaps wider than the margin. Measured on the
    sample site's surface tiled 3 x 3 (1.7 million cells, 435,000 filled): 44,554 filled
    values differ, median 1.2 mm, 99th percentile 16 cm, largest 0.63 m; 3,009 cells
    filled by the whole-grid triangulation only; a wider margin (8 or 16 times) changes
    this little. CPU 20 s against 31 s, peak memory 350 MB against 1.1 GB. The windows are
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

        # (flat index, value) of each window: z changes only after every window has read it
        runs = ex.map(_fill_window, jobs()) if ex is not None else (_fill_window(*job) for job in jobs())
        fills = [f for f in runs if len(f[0])]
        for idx, values in fills:
            surface.z.ravel()[idx] = values
            filled.ravel()[idx] = True
        del fills
    # Enclosed gaps left empty, on the whole grid: cells with a value count as covered.
    covered = surface.count.copy()
    covered[filled] = 1
    _, gaps = fill_holes(Surface(g, surface.z, covered, surface.sd, filled, surface.date), 0.0)
    del covered
    out = Surface(g, surface.z, surface.count, surface.sd, filled, surface.date,
                  dict(surface.meta, max_fill_distance_m=max_distance_m))
    return out, FillReport(int(filled.sum()), gaps.gap_cells, gaps.gap_area_m2, gaps.largest_gap_m2)


def _run_tiles(ex: Any, spill: _TileSpill, tiles: list[int], buffer_m: float, pipe: Pipeline, crs: Any,
               engine: str, statistic: str):
    """Classified tiles and their cells (:func:`_classify_tile`) in the order of ``tiles``,
    however ``ex`` (an :class:`~inventory.parallel.Executor`) runs them (so that every
    way writes the same classified cloud)."""
    if ex.kind != "dask":
        yield from ex.map(_classify_tile, ((spill, t, buffer_m, pipe, crs, engine, statistic) for t in tiles))
        return
    # Worker processes leave each classified tile in the spill folder and send back its
    # name and its cells only: no tile of points is pickled through the scheduler. A CRS
    # travels as WKT. The results are that small, so more tiles may wait finished than
    # there are workers: a large tile then holds up neither worker.
    for path, cells in ex.map(_classify_tile_to_file, ((spill, t, buffer_m, pipe, crs.to_wkt(), engine, statistic)
                                                       for t in tiles), window=TILES_IN_FLIGHT * ex.workers):
        pts = _load(path)
        path.unlink()
        yield pts, cells


#: Tiles submitted to each Dask worker and not yet taken back (see :func:`_run_tiles`).
TILES_IN_FLIGHT = 4


def _classify_tile_to_file(spill: _TileSpill, tile: int, buffer_m: float, pipeline: Pipeline, crs: Any,
                           engine: str, statistic: str) -> tuple[Path, "_TileCells | None"]:
    """:func:`_classify_tile` for a worker process: the points go to ``classified_<tile>.bin``
    in the spill folder, whose path is returned with the tile's cells."""
    out, cells = _classify_tile(spill, tile, buffer_m, pipeline, crs, engine, statistic)
    path = spill.folder / f"classified_{tile}.bin"
    out.tofile(path)
    return path, cells


def _survey_job(site: Any, date: str, out_dir: "str | Path | None",
                kw: dict[str, Any]) -> tuple[SurveyResult, list[warnings.WarningMessage]]:
    """One survey as a job of :func:`measure_surveys`: its result and the warnings it raised
    (a worker process cannot show them; the caller raises them again)."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        result = measure_survey(site, date, out_dir, **kw)
    return result, [w for w in caught]


def measure_surveys(site: Any, dates: "list[str]", out_dirs: "list[str | Path | None] | None" = None,
                    progress: Progress | None = None, *, workers: int | None = None,
                    scheduler: str | None = None, threads: bool = False,
                    **kw: Any) -> list[SurveyResult]:
    """Several surveys of a site, each as :func:`measure_survey`, in the order of ``dates``.

    Surveys share nothing, so with ``workers`` or ``scheduler`` they run side by side (one
    survey per worker, its tiles serially within it) on an executor of
    :mod:`inventory.parallel`; a single survey runs its tiles on the workers instead.
    Either way the files and results are those of serial runs. Warnings raised by a survey
    are raised again here, in the order of ``dates``.

    Parameters
    ----------
    site : Site
    dates : list of str
        Survey dates (folders under ``surveys/``), each at most once.
    out_dirs : list, optional
        Output folder of each date (``None`` writes nothing); default nothing is written.
    progress : callable, optional
        Given to each survey when they run one after the other; with several workers, one
        line per survey finished.
    workers, scheduler, threads
        As for :func:`measure_survey`.
    **kw
        Other keyword arguments of :func:`measure_survey` (``pipeline``, ``engine``,
        ``tile_size_m``, ...).
    """
    from inventory.parallel import executor

    dates = list(dates)
    if len(set(dates)) != len(dates):
        raise ValueError(f"a survey date is given twice: {dates}")
    out_dirs = list(out_dirs) if out_dirs is not None else [None] * len(dates)
    if len(out_dirs) != len(dates):
        raise ValueError("out_dirs must give one folder per date")
    for date in dates:
        _survey_ref(site, date)          # an unknown date fails before any work starts
    parallel = len(dates) > 1 and (scheduler or (workers or 0) > 1)
    if not parallel:
        return [measure_survey(site, d, o, progress, workers=workers, scheduler=scheduler, threads=threads, **kw)
                for d, o in zip(dates, out_dirs)]
    say = progress or (lambda text: None)
    results = []
    with executor(workers, scheduler, threads=threads) as ex:
        jobs = ((site, d, o, kw) for d, o in zip(dates, out_dirs))
        for i, (result, caught) in enumerate(ex.map(_survey_job, jobs, window=len(dates))):
            for w in caught:
                warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
            say(f"survey {result.date} done ({i + 1} of {len(dates)})")
            results.append(result)
    return results
