"""One survey's point clouds -> a classified cloud and the stockpile surface grid.

``measure_survey(site, date)`` is what ``inventory survey SITE --date D`` runs: it reads and
places every cloud file of ``surveys/<date>/``, spills the points to disk by tiles of the
site grid counting them per block, makes each tile a classification job (a tile with
too many points is cut into jobs of whole blocks by those counts), cleans and classifies each job with a buffer of neighbouring points through the
pipeline (serially, on threads or on Dask: :mod:`inventory.parallel`), grids each job's
surface inside the job, takes out surface cells lying on objects, fills holes window by
window and writes ``surface-<date>.tif``, ``coverage-<date>.tif`` and
``classified-<date>.laz``.

The steps, tiles and jobs, memory and hole filling: docs/surveys.md.
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
from pyproj import CRS

from inventory.errors import (
    CoverageWarning,
    CRSError,
    InputError,
    InputWarning,
    PipelineError,
)
from inventory.io.clouds import DEFAULT_CHUNK, ExtraDim, conform_points, merge_extra_dims, points_dtype
from inventory.io.lazparts import LasLayout, LazPartWriter
from inventory.io.crs import TransformerCache, horizontal_unit_factor, parse_crs
from inventory.io.rasters import write_coverage, write_surface
from inventory.model.classes import (
    CLASS_NAMES,
    GROUND,
    HIGH_NOISE,
    LOW_NOISE,
    OVERHEAD_STRUCTURE,
    UNCLASSIFIED,
)
from inventory.model.grid import Grid, Surface
from inventory.parallel import Executor, executor, release_free_memory
from inventory.site.extent import grid_size_problem
from inventory.site.load import Site, SurveyRef
from inventory.survey.fill import fill_windows
from inventory.survey.gridding import FillReport
from inventory.survey.pipeline import Pipeline, load_pipeline, pdal_available
from inventory.site.control import Registration
from inventory.survey.placement import ControlPlacement, Placement, survey_placements
from inventory.survey.tiles import (JOB_POINTS, SpillThread, TileSpill, block_cells_for, grid_tiles, plan_jobs,
                                    run_jobs)

__all__ = ["SurveyResult", "measure_survey", "measure_surveys", "DEFAULT_TILE_M", "DEFAULT_BUFFER_M", "JOB_POINTS"]

#: Edge in metres of the tiles the points are spilled by (one file each); a job reads the
#: tiles its rectangle and buffer overlap, and blocks (the unit of the job plan, about
#: :data:`~inventory.survey.tiles.BLOCK_M`) divide a tile. 200 m rather than 100 m: fewer
#: points are classified twice as buffers (measured in CHANGELOG.md).
DEFAULT_TILE_M = 200.0
#: Neighbouring points around a job: wider than the reach of every stage of the default
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
    #: The survey's fit to its control points (control.csv), when it has them.
    registration: Registration | None = None
    #: Points dropped by voxel thinning (stage ``inventory.voxel_thin``), not in points_kept.
    points_thinned: int = 0
    #: Classification jobs the survey was cut into (:func:`~inventory.survey.tiles.plan_jobs`).
    jobs: int = 0

    @property
    def written(self) -> list[Path]:
        return [p for p in (self.surface_path, self.coverage_path, self.classified_path) if p is not None]

    def format_summary(self) -> str:
        """One line: points read, thinned (when a pipeline thins), kept, per class, cells and
        coverage, and the control-point fit when the survey was registered by one."""
        s = self.surface
        cells = s.grid.nrows * s.grid.ncols
        scanned = int(s.scanned.sum())
        order = (GROUND, UNCLASSIFIED, OVERHEAD_STRUCTURE, LOW_NOISE, HIGH_NOISE)
        parts = [f"{CLASS_NAMES.get(c, c)} {self.class_counts.get(c, 0):,}" for c in order]
        parts += [f"class {c} {n:,}" for c, n in sorted(self.class_counts.items()) if c not in order]
        thinned = f"{self.points_thinned:,} thinned, " if self.points_thinned else ""
        return (f"survey {self.date}: {self.points_read:,} points read, {thinned}{self.points_kept:,} kept "
                f"({', '.join(parts)}); {cells:,} cells of {s.grid.cell:g} m, "
                f"{scanned / cells:.1%} scanned, {self.fill.filled_cells:,} filled, "
                f"{self.fill.gap_area_m2:,.1f} m2 of enclosed gaps left empty"
                + (f"; trajectory: {self.points_outside_span:,} points outside its time span rejected, "
                   f"{self.points_in_gap:,} in its gaps dropped"
                   if self.points_outside_span or self.points_in_gap else "")
                + (f"; registered by {self.registration.summary()}" if self.registration is not None else ""))


def _survey_ref(site: Site, date: str) -> SurveyRef:
    surveys = getattr(site, "surveys", {}) or {}
    if date not in surveys:
        have = ", ".join(sorted(surveys)) or "none"
        raise InputError(Path(site.root) / "surveys" / date, f"no survey folder for {date} (surveys: {have})",
                         field="date")
    return surveys[date]


def _pipeline_for(site: Site, pipeline: "Pipeline | str | Path | None") -> Pipeline:
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


def _site_crs(site: Site) -> CRS:
    """The site CRS, which must be projected in metres."""
    site_crs = parse_crs(site.crs, where=str(Path(site.root) / "site.toml"), field="crs")
    if horizontal_unit_factor(site_crs) != 1.0:
        raise CRSError(Path(site.root) / "site.toml", f"site CRS {site.crs} is not projected in metres",
                       field="crs")
    return site_crs


def _extent(placements: list[Placement]) -> tuple[float, float, float, float]:
    """Site (xmin, ymin, xmax, ymax) of every file's header box, placed."""
    b = np.asarray([p.extent() for p in placements], float)
    return float(b[:, 0].min()), float(b[:, 1].min()), float(b[:, 2].max()), float(b[:, 3].max())


@dataclass
class _Read:
    """What :func:`_read_into_spill` read: points in the files, points outside the grid, and a
    moving scanner's points not placed (outside its trajectory's span, in its gaps)."""

    points: int = 0
    outside: int = 0
    outside_span: int = 0
    in_gap: int = 0
    #: Some file stores colour (the classified cloud then keeps it: point format 7).
    colour: bool = False
    #: The extra bytes dimensions carried (the union over the files, :func:`merge_extra_dims`).
    extra_dims: tuple[ExtraDim, ...] = ()


def _rate(done: int, total: int, seconds: float) -> str:
    """Progress text: points done of the total, share, and points per second over ``seconds``.

    >>> _rate(500, 2000, 2.0)
    '500 of 2,000 points (25%), 250 points/s'
    """
    rate = f", {done / seconds:,.0f} points/s" if seconds > 0 else ""
    return f"{done:,} of {total:,} points ({done / max(total, 1):.0%}){rate}"


def _read_into_spill(placements: list[Placement], spill: TileSpill, chunk_size: int, say: Progress) -> _Read:
    """Read every file in chunks, place each chunk in the site CRS and spill it by tiles;
    every point keeps the dimensions it was read with (colour, point source id, scan angle,
    user data, ...), and the extra bytes dimensions of the files (their union: a file
    lacking one gives its points the dimension's no-data value, else 0) become columns of
    the spilled points (``spill.dtype``). A file with points not placed, and every extra
    dimension lacking or not carried, is reported in an :class:`~inventory.errors.InputWarning`.

    The reading, placing and warnings happen in this thread; each chunk is spilled on a
    thread of its own (:class:`~inventory.survey.tiles.SpillThread`) while the next one is
    read, in order, so the spill files are those of spilling chunk after chunk here. An
    error of either is raised here as it was raised, once the spill thread has ended."""
    total = 0
    files = []
    for p in placements:
        with p.open() as cloud:
            total += cloud.count
            files.append((p.path, tuple(getattr(cloud, "extra_dims", ()))))
    read = _Read()
    read.extra_dims, problems = merge_extra_dims(files)
    for problem in problems:
        warnings.warn(InputWarning(problem), stacklevel=3)
    spill.dtype = points_dtype(read.extra_dims)
    t0 = time.perf_counter()
    with SpillThread(spill) as behind:
        for p in placements:
            with p.open(chunk_size) as cloud:
                read.colour = read.colour or cloud.has_colour
                for chunk in cloud.chunks():
                    n_chunk = len(chunk)
                    behind.add(conform_points(p.place(chunk), read.extra_dims))
                    del chunk
                    read.points += n_chunk
                    say(f"reading {p.path.name}: {_rate(read.points, total, time.perf_counter() - t0)}")
            unplaced = p.warning()
            if unplaced is not None:
                warnings.warn(unplaced, stacklevel=3)   # attributed to the caller of measure_survey
            read.outside_span += p.outside_span
            read.in_gap += p.in_gap
        read.outside = behind.close()
    return read


@dataclass
class _Classified:
    """What :func:`_classify_jobs` gave: points per class, points kept, the box of the
    surface points, each job's cells (:class:`~inventory.survey.tiles.TileCells`) in a
    file, points thinned and the number of jobs."""

    counts: dict[int, int]
    kept: int
    ground_box: list[float]
    cell_files: list[Path]
    thinned: int = 0
    jobs: int = 0


def _classify_jobs(ex: Executor, spill: TileSpill, buffer_m: float, job_points: int, pipe: Pipeline,
                   site_crs: CRS, engine: str, statistic: str, classified_path: Path | None, say: Progress,
                   colour: bool = False, extra_dims: tuple[ExtraDim, ...] = ()) -> _Classified:
    """Plan the jobs (:func:`~inventory.survey.tiles.plan_jobs`: the tiles, cut to at most
    ``job_points`` points each with their buffer, a single block excepted), classify and grid them
    (:func:`~inventory.survey.tiles.run_jobs`) in plan order, writing the classified cloud
    to ``classified_path`` when given (LAS 1.4 point format 7 when ``colour``, else 6, with
    the ``extra_dims`` as extra bytes dimensions).

    Each job counts its classes, takes its surface box, saves its cells and compresses its
    points into LAZ chunks where it runs (on the workers when there are any); this process
    adds up the counts and appends each job's chunks to the file
    (:class:`~inventory.io.lazparts.LazPartWriter`), in plan order."""
    out = _Classified({}, 0, [math.inf, math.inf, -math.inf, -math.inf], [])
    writer = layout = None
    if classified_path is not None:
        grid = spill.grid
        layout = LasLayout(point_format=7 if colour else 6,
                           offset=(grid.west, grid.south, math.floor(spill.zmin) if spill.counts else 0.0),
                           extra_dims=tuple(extra_dims))
        writer = LazPartWriter(classified_path, crs=site_crs, layout=layout)
    jobs = plan_jobs(spill, buffer_m, job_points)
    out.jobs = len(jobs)
    total = sum(spill.counts.values())
    done = 0
    t0 = time.perf_counter()
    try:
        for i, res in enumerate(run_jobs(ex, spill, jobs, buffer_m, pipe, site_crs, engine, statistic, layout)):
            out.thinned += res.thinned
            for c, n in res.counts.items():
                out.counts[c] = out.counts.get(c, 0) + n
            out.kept += res.kept
            if res.ground_box is not None:
                box, g = out.ground_box, res.ground_box
                out.ground_box = [min(box[0], g[0]), min(box[1], g[1]), max(box[2], g[2]), max(box[3], g[3])]
            if res.cells is not None:
                out.cell_files.append(res.cells)
            if res.part is not None:
                if writer is not None:
                    writer.append(res.part)
                if res.part.path is not None:
                    res.part.path.unlink()
            done += jobs[i].points
            say(f"classifying: job {i + 1} of {len(jobs)}, {_rate(done, total, time.perf_counter() - t0)}")
    except BaseException:
        if writer is not None:
            writer.close(ok=False)
        raise
    if writer is not None:
        writer.close()
    return out


#: The surface grid reaches this far beyond a footprint that runs off the surface's box
#: (m): cells 1 m and more outside every footprint are the pile's floor to the volume
#: step's interpolation (``inventory.volume.measure``), and one more cell.
FOOTPRINT_SURROUND_M = 2.0


def _reach_footprints(box: list[float], piles: Any) -> list[float]:
    """``box`` (xmin, ymin, xmax, ymax) widened to every footprint it touches, and
    :data:`FOOTPRINT_SURROUND_M` around it: a pile at the edge of a survey, the cloud
    ending on its flank, gets unscanned cells over the rest of its footprint, which the
    volume step fills and counts as a gap (interpolated, with its uncertainty), instead
    of a footprint running off the grid, whose part beyond holds nothing. A footprint the
    box does not touch (a pile another survey covers) leaves it as it is."""
    if piles is None or not len(piles):
        return box
    import shapely

    geoms = np.asarray(piles.geometry.values)
    ok = np.array([g is not None and not shapely.is_empty(g) for g in geoms], bool)
    if not ok.any():
        return box
    b = shapely.bounds(geoms[ok])
    touch = (b[:, 0] <= box[2]) & (b[:, 2] >= box[0]) & (b[:, 1] <= box[3]) & (b[:, 3] >= box[1])
    if not touch.any():
        return box
    b = b[touch]
    m = FOOTPRINT_SURROUND_M
    return [min(box[0], float(b[:, 0].min()) - m), min(box[1], float(b[:, 1].min()) - m),
            max(box[2], float(b[:, 2].max()) + m), max(box[3], float(b[:, 3].max()) + m)]


def _grid_surface(spill: TileSpill, classified: _Classified, site: Site, date: str) -> Surface:
    """The surface grid, unfilled, put together from the jobs' cells.

    The surface grid covers the surface points only: far returns (ghosts, distant
    buildings) widen the files' header boxes but not the grid. Its origin is snapped to the
    cell size, so it lines up with every other survey of the site, and its jobs' edges fall
    on cell edges (what the median statistic needs).
    """
    box = classified.ground_box
    if not math.isfinite(box[0]):
        # the clouds gave nothing to measure (a handful of points, heights no surface has):
        # bad input, named on the survey folder with what the classifier made of its points
        seen = ", ".join(f"{n:,} {CLASS_NAMES.get(c, f'class {c}')}"
                         for c, n in sorted(classified.counts.items()) if n) or "none kept"
        raise InputError(_survey_ref(site, date).folder,
                         f"no point of the survey was classified as surface ({seen}): too few points, "
                         "or heights no stockpile surface has; check the clouds")
    box = _reach_footprints(box, getattr(site, "piles", None))
    grid_cfg = site.config.grid
    sgrid = Grid.snapped(*box, cell=float(grid_cfg.cell_size_m), crs=site.crs)
    return grid_tiles(spill.grid, classified.cell_files, sgrid, grid_cfg.statistic, date)


def _write_rasters(surface: Surface, out_dir: "str | Path | None", date: str) -> tuple[Path | None, Path | None]:
    """``surface-<date>.tif`` and ``coverage-<date>.tif`` in ``out_dir`` (nothing when ``None``)."""
    if out_dir is None:
        return None, None
    return (write_surface(surface, Path(out_dir) / f"surface-{date}.tif"),
            write_coverage(surface, Path(out_dir) / f"coverage-{date}.tif"))


def measure_survey(site: Site, date: str, out_dir: "str | Path | None" = None,
                   progress: Progress | None = None, *, pipeline: "Pipeline | str | Path | None" = None,
                   engine: str = "auto", tile_size_m: float = DEFAULT_TILE_M,
                   buffer_m: float = DEFAULT_BUFFER_M, job_points: int = JOB_POINTS,
                   chunk_size: int = DEFAULT_CHUNK,
                   workers: int | None = None, scheduler: str | None = None, threads: bool = False,
                   write_classified: bool = True) -> SurveyResult:
    """Turn one survey's point clouds into a classified cloud and a surface grid.

    Parameters
    ----------
    site : Site
        A loaded site (:func:`inventory.site.load.load_site`); uses ``root``, ``crs``,
        ``config.grid``, ``config.survey`` and ``surveys[date]`` (``folder``, ``files``,
        ``stations``), and ``vertical_reference`` when it has one (stated in the surface
        raster; without it the default of :func:`~inventory.io.rasters.write_surface`).
    date : str
        Survey date ``YYYY-MM-DD`` (a folder under ``surveys/``).
    out_dir : path, optional
        Where the GeoTIFFs and the classified LAZ go; nothing is written when ``None``.
    progress : callable, optional
        Called with a short text as long steps advance.
    pipeline : Pipeline or path, optional
        Overrides ``[survey] pipeline`` and the packaged default.
    engine : "auto" | "pdal" | "builtin"
    tile_size_m : float
        Edge of the tiles the points are spilled to disk by (one file each); each tile is
        a classification job unless it holds more than ``job_points``. Points are counted
        per block, the divisor of a tile nearest :data:`~inventory.survey.tiles.BLOCK_M`
        (a block is a tile when the tile is smaller); a tile is cut into whole blocks.
    buffer_m : float
        The neighbouring points each job sees around its own: points within this distance
        of its rectangle.
    job_points : int
        Points a job may hold with its buffer (:data:`~inventory.survey.tiles.JOB_POINTS`);
        a tile over it is cut into smaller jobs, a block alone is a job whatever its count,
        so 0 makes every block with points a job. The memory of a running job follows it.
    chunk_size : int
        Points per read chunk.
    workers, scheduler, threads : optional
        Classify jobs on a local Dask cluster of ``workers`` processes (a pool of
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
    site_crs = _site_crs(site)
    grid_cfg = site.config.grid
    cell = float(grid_cfg.cell_size_m)
    placements = survey_placements(site, ref, site_crs, TransformerCache())
    extent = _extent(placements)
    too_large = grid_size_problem(extent, cell)
    if too_large is not None:   # before any point is read, not out of memory after all of them
        raise InputError(ref.folder, too_large, field="extent")
    grid = Grid.snapped(*extent, cell=cell, crs=site.crs)
    tile_cells = max(1, int(round(tile_size_m / cell)))
    if not buffer_m >= 0:
        raise ValueError(f"buffer_m must be 0 or more, got {buffer_m}")
    if job_points < 0:
        raise ValueError(f"job_points must be 0 or more, got {job_points}")
    classified_path = Path(out_dir) / f"classified-{date}.laz" if out_dir is not None and write_classified else None

    # One executor for the jobs and the fill windows (a local cluster starts while reading).
    with executor(workers, scheduler, threads=threads) as ex:
        tmp = Path(tempfile.mkdtemp(prefix=f"survey-{date}-"))
        try:
            spill = TileSpill(grid, tile_cells, tmp, block_cells=block_cells_for(tile_cells, cell))
            read = _read_into_spill(placements, spill, chunk_size, say)
            timings["read"] = time.perf_counter() - t_start

            t0 = time.perf_counter()
            classified = _classify_jobs(ex, spill, buffer_m, job_points, pipe, site_crs, used_engine,
                                        grid_cfg.statistic, classified_path, say, colour=read.colour,
                                        extra_dims=read.extra_dims)
            timings["classify"] = time.perf_counter() - t0
            release_free_memory()   # what the jobs' threads freed, before the surface grid

            t0 = time.perf_counter()
            say("gridding the surface and filling holes")
            raw = _grid_surface(spill, classified, site, date)
        finally:
            shutil.rmtree(tmp, ignore_errors=True)

        surface, fill = fill_windows(raw, float(grid_cfg.max_fill_distance_m), ex=ex)
        del raw
    surface.meta.update(points_read=read.points, points_kept=classified.kept, engine=used_engine,
                        pipeline=pipe.source,
                        vertical_reference=getattr(site, "vertical_reference", None))
    if fill.gap_cells:
        warnings.warn(CoverageWarning(f"survey {date}: {fill.gap_area_m2:.1f} m2 of enclosed gaps wider than "
                                      f"{grid_cfg.max_fill_distance_m} m from any scan left as nodata "
                                      f"(largest {fill.largest_gap_m2:.1f} m2)"), stacklevel=2)
    surface_path, coverage_path = _write_rasters(surface, out_dir, date)
    timings["grid"] = time.perf_counter() - t0
    timings["total"] = time.perf_counter() - t_start
    return SurveyResult(date, surface, classified_path, surface_path, coverage_path, classified.counts, read.points,
                        classified.kept, read.outside, fill, [p.path for p in placements], used_engine, timings,
                        read.outside_span, read.in_gap,
                        registration=next((p.registration for p in placements if isinstance(p, ControlPlacement)), None),
                        points_thinned=classified.thinned, jobs=classified.jobs)


def _survey_job(site: Site, date: str, out_dir: "str | Path | None",
                kw: dict[str, Any]) -> tuple[SurveyResult, list[warnings.WarningMessage]]:
    """One survey as a job of :func:`measure_surveys`: its result and the warnings it raised
    (a worker process cannot show them; the caller raises them again)."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        result = measure_survey(site, date, out_dir, **kw)
    return result, [w for w in caught]


def measure_surveys(site: Site, dates: "list[str]", out_dirs: "list[str | Path | None] | None" = None,
                    progress: Progress | None = None, *, workers: int | None = None,
                    scheduler: str | None = None, threads: bool = False,
                    **kw: Any) -> list[SurveyResult]:
    """Several surveys of a site, each as :func:`measure_survey`, in the order of ``dates``.

    Surveys share nothing, so with ``workers`` or ``scheduler`` they run side by side (one
    survey per worker, its jobs serially within it) on an executor of
    :mod:`inventory.parallel`; a single survey runs its jobs on the workers instead.
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
        ``tile_size_m``, ``job_points``, ...).
    """
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
