"""Serial, threaded and distributed survey runs give identical rasters, clouds and volumes.

Issue 8: jobs are classified alone and stitched on the global grid, so how they are run
must not change a single number. The distributed run is a real ``dask.distributed``
LocalCluster of two worker processes (the jobs and the pipeline are pickled to them).
"""

from __future__ import annotations

import dataclasses
import platform
import threading
import types
import warnings

import geopandas as gpd
import laspy
import numpy as np
import pytest
from shapely.geometry import box

from inventory.io.clouds import write_cloud
from inventory._demo.synthetic import make_yard
from inventory.parallel import executor, job_threads
from inventory.survey.measure import measure_survey
from inventory.volume.measure import measure_piles

DATE = "2026-10-31"
CRS = "EPSG:25832"


def _square(v):
    return v * v


def test_executor_keeps_input_order_in_every_mode():
    for ex in (executor(), executor(2, threads=True)):
        with ex:
            assert list(ex.map(_square, ((i,) for i in range(7)), window=2)) == [i * i for i in range(7)]
    with pytest.raises(ValueError, match="workers must be 0 or more"):
        executor(-1)


def _where(i, meet=None):
    if meet is not None:
        meet.wait()     # returns only when another job waits too: two jobs run at once
    return i, threading.current_thread().name, job_threads()


def _fail_at_three(i):
    if i == 3:
        raise ValueError(f"job {i} failed")
    return i


def test_default_executor_runs_jobs_side_by_side_on_the_cores(monkeypatch):
    import inventory.parallel as par

    monkeypatch.setattr(par, "cores", lambda: 4)
    meet = threading.Barrier(2, timeout=30)
    with executor() as ex:
        out = list(ex.map(_where, ((i, meet if i < 2 else None) for i in range(9))))
    assert [i for i, _, _ in out] == list(range(9))          # in the order of the inputs
    names = {name for _, name, _ in out}
    assert all(n.startswith("inventory-job") for n in names) and 1 < len(names) <= 4
    assert {t for _, _, t in out} == {1}                      # 4 cores shared by 4 jobs
    # a lone job runs here, its own loops on every core
    with executor(0) as ex:
        assert list(ex.map(_where, [(7,)])) == [(7, threading.current_thread().name, -1)]
    # --workers 1: one job at a time, here
    with executor(1) as ex:
        assert {name for _, name, _ in ex.map(_where, ((i,) for i in range(3)))} == {threading.current_thread().name}
    before = set(threading.enumerate())
    with executor() as ex, pytest.raises(ValueError, match="job 3 failed"):
        list(ex.map(_fail_at_three, ((i,) for i in range(12))))
    assert not [t for t in set(threading.enumerate()) - before if t.name.startswith("inventory-job")]


@pytest.fixture(scope="module")
def small_site(tmp_path_factory):
    root = tmp_path_factory.mktemp("scale")
    folder = root / "surveys" / DATE
    folder.mkdir(parents=True)
    yard = make_yard(density=8.0, pad_density=2.0, seed=3)   # ~30,000 points, 110 m x 80 m
    write_cloud(folder / "yard.laz", yard.points, CRS)
    grid = types.SimpleNamespace(cell_size_m=0.5, max_fill_distance_m=3.0, statistic="mean")
    site = types.SimpleNamespace(
        root=root, crs=CRS,
        config=types.SimpleNamespace(grid=grid, survey=types.SimpleNamespace(default_crs=None, pipeline=None)),
        surveys={DATE: types.SimpleNamespace(folder=folder, files=[folder / "yard.laz"], stations=None)})
    return yard, site, root


def _run(site, out, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        # 40 m tiles (20 m blocks), six of them, and jobs of at most 15,000 points with their
        # buffer, so that the runs really split the work and a tile is cut
        return measure_survey(site, DATE, out_dir=out, tile_size_m=40.0, buffer_m=15.0, job_points=15_000, **kw)


def _volume(result, yard):
    x0, y0 = yard.origin
    level = float(np.floor(yard.points["Z"].min()))
    piles = gpd.GeoDataFrame({"pile_id": ["all"], "material": ["m"], "base": [f"level:{level}"],
                              "density_t_m3": [None]},
                             geometry=[box(x0 + 20, y0 + 20, x0 + 60, y0 + 60)], crs=CRS)
    mats = {"m": types.SimpleNamespace(bulk_density_t_m3=1.6, density_sd_t_m3=0.05, moisture_pct=5.0)}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return measure_piles(result.surface, piles, mats).iloc[0]


@pytest.mark.slow
def test_serial_threads_and_two_worker_processes_agree(small_site, tmp_path):
    yard, site, root = small_site
    serial = _run(site, tmp_path / "serial", workers=1)          # one job at a time
    side_by_side = _run(site, tmp_path / "default")               # the default: jobs on every core
    threaded = _run(site, tmp_path / "threads", workers=2, threads=True)
    messages: list[str] = []
    distributed = _run(site, tmp_path / "dask", workers=2, progress=messages.append)
    assert any(m.startswith("reading yard.laz") for m in messages)
    # six tiles, at least one of them over the budget and cut
    assert serial.jobs == threaded.jobs == distributed.jobs > 6
    assert any(m.startswith(f"classifying: job {serial.jobs} of {serial.jobs}") for m in messages)
    ref_las = laspy.read(serial.classified_path)
    v0 = _volume(serial, yard)
    assert v0.volume_m3 > 0
    for other in (side_by_side, threaded, distributed):
        a, b = serial.surface, other.surface
        assert a.grid == b.grid
        np.testing.assert_array_equal(a.z, b.z)
        np.testing.assert_array_equal(a.count, b.count)
        np.testing.assert_array_equal(a.filled, b.filled)
        assert other.class_counts == serial.class_counts and other.points_kept == serial.points_kept
        # every way appends the jobs' own LAZ chunks in plan order: the same file, byte for byte
        assert other.classified_path.read_bytes() == serial.classified_path.read_bytes()
        las = laspy.read(other.classified_path)
        for dim in ("X", "Y", "Z", "classification"):
            np.testing.assert_array_equal(np.asarray(las[dim]), np.asarray(ref_las[dim]))
        assert _volume(other, yard).volume_m3 == v0.volume_m3


@pytest.mark.slow
def test_thinning_is_counted_and_the_same_on_threads(small_site, tmp_path, repo_root):
    import json

    yard, site, root = small_site
    doc = json.loads((repo_root / "inventory" / "survey" / "pipelines" / "stockpile-thin.json").read_text())
    for stage in doc["pipeline"]:
        if stage["type"] == "inventory.voxel_thin":
            stage.update(cell=0.5, max_points=2)   # coarse enough to thin this sparse yard
    pipe = tmp_path / "thin.json"
    pipe.write_text(json.dumps(doc))
    serial = _run(site, tmp_path / "serial", pipeline=pipe)
    threaded = _run(site, tmp_path / "threads", pipeline=pipe, workers=2, threads=True)
    # no StationRange in the file: the range gates keep every point, thinning alone drops
    assert serial.points_thinned > 0.1 * serial.points_read
    assert serial.points_kept + serial.points_thinned == serial.points_read == len(yard.points)
    assert f"{serial.points_thinned:,} thinned" in serial.format_summary()
    np.testing.assert_array_equal(serial.surface.z, threaded.surface.z)
    assert threaded.points_thinned == serial.points_thinned and threaded.class_counts == serial.class_counts


def _two_survey_site(root, density=6.0):
    dates = ["2026-09-30", "2026-10-31"]
    refs = {}
    for seed, date in zip((4, 5), dates):
        folder = root / "surveys" / date
        folder.mkdir(parents=True)
        write_cloud(folder / "yard.laz", make_yard(density=density, pad_density=density / 4, seed=seed).points, CRS)
        refs[date] = types.SimpleNamespace(folder=folder, files=[folder / "yard.laz"], stations=None)
    grid = types.SimpleNamespace(cell_size_m=0.5, max_fill_distance_m=3.0, statistic="mean")
    site = types.SimpleNamespace(
        root=root, crs=CRS,
        config=types.SimpleNamespace(grid=grid, survey=types.SimpleNamespace(default_crs=None, pipeline=None)),
        surveys=refs)
    return site, dates


def test_two_surveys_side_by_side_on_two_worker_processes(tmp_path):
    # Independent surveys run one per Dask worker process; each gives what a serial run of
    # it gives, file for file, and the results come back in the order of the dates.
    from inventory.survey.measure import measure_surveys

    site, dates = _two_survey_site(tmp_path / "site")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        serial = measure_surveys(site, dates, [tmp_path / "serial" / d for d in dates], tile_size_m=40.0,
                                 job_points=15_000)
        both = measure_surveys(site, dates, [tmp_path / "dask" / d for d in dates], workers=2, tile_size_m=40.0,
                               job_points=15_000)
    assert [r.date for r in both] == dates
    assert not np.array_equal(serial[0].surface.count, serial[1].surface.count)   # two different surveys
    for a, b in zip(serial, both):
        assert a.surface.grid == b.surface.grid
        np.testing.assert_array_equal(a.surface.z, b.surface.z)
        np.testing.assert_array_equal(a.surface.filled, b.surface.filled)
        assert a.class_counts == b.class_counts
        for name in ("surface", "coverage"):
            assert (a.surface_path.parent / f"{name}-{a.date}.tif").read_bytes() == \
                (b.surface_path.parent / f"{name}-{b.date}.tif").read_bytes()
        la, lb = laspy.read(a.classified_path), laspy.read(b.classified_path)
        for dim in ("X", "Y", "Z", "classification"):
            np.testing.assert_array_equal(np.asarray(la[dim]), np.asarray(lb[dim]))
    with pytest.raises(ValueError, match="given twice"):
        measure_surveys(site, [dates[0], dates[0]])


def test_fill_by_windows_matches_whole_grid_fill_on_a_plane():
    # Holes filled window by window (here 64 cells, so many windows and holes across their
    # edges) against fill_holes on the whole grid: on a plane, linear interpolation gives
    # the plane in any triangle (a linear function is reproduced exactly: from memory), so
    # the values agree to rounding and the filled cells and gap report exactly.
    from inventory.model.grid import Grid, Surface
    from inventory.survey.gridding import fill_holes
    from inventory.survey.fill import fill_windows

    rng = np.random.default_rng(2)
    g = Grid(500000.0, 6000300.0, 0.5, 300, 340, CRS)
    rows, cols = np.mgrid[0:300, 0:340]
    z = 100.0 + 0.03 * cols - 0.02 * rows
    count = np.ones(g.shape, np.int32)
    for r, c in rng.integers(0, 300, size=(60, 2)):         # holes of radius 1-4 cells
        count[(rows - r) ** 2 + (cols - c) ** 2 <= rng.integers(1, 5) ** 2] = 0
    count[100:140, 200:260] = 0                              # one gap wider than the fill distance
    surface = Surface(g, np.where(count > 0, z, np.nan), count, np.full(g.shape, np.nan),
                      np.zeros(g.shape, bool), DATE, {"statistic": "mean"})
    whole, whole_report = fill_holes(surface, 2.0)
    # a grid of at most window x window cells is filled whole: exactly fill_holes
    one, one_report = fill_windows(dataclasses.replace(surface, z=surface.z.copy()), 2.0, window=340)
    assert one_report == whole_report
    np.testing.assert_array_equal(one.z, whole.z)
    np.testing.assert_array_equal(one.filled, whole.filled)
    windowed, report = fill_windows(dataclasses.replace(surface, z=surface.z.copy()), 2.0, window=64)
    assert report == whole_report and report.filled_cells > 500 and report.gap_cells > 0
    np.testing.assert_array_equal(windowed.filled, whole.filled)
    np.testing.assert_allclose(windowed.z[windowed.filled], z[windowed.filled], rtol=0, atol=1e-9)
    np.testing.assert_array_equal(windowed.count, surface.count)
    assert windowed.meta["max_fill_distance_m"] == 2.0


def test_cli_survey_takes_several_dates_or_all(tmp_path, monkeypatch, capsys):
    import inventory.site.load
    from inventory.cli import build_parser, main

    args = build_parser().parse_args(["survey", "S", "--date", "2026-09-30", "--date", "2026-10-31"])
    assert args.date == ["2026-09-30", "2026-10-31"] and not args.all
    with pytest.raises(SystemExit):
        build_parser().parse_args(["survey", "S", "--date", "2026-09-30", "--all"])   # one or the other
    site, dates = _two_survey_site(tmp_path / "site", density=2.0)
    monkeypatch.setattr(inventory.site.load, "load_site", lambda root: site)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main(["survey", str(site.root), "--all", "--out", str(tmp_path / "out"), "-q"]) == 0
    out = capsys.readouterr().out
    assert out.index("survey 2026-09-30:") < out.index("survey 2026-10-31:")
    for d in dates:
        assert (tmp_path / "out" / d / f"surface-{d}.tif").is_file()
        assert (tmp_path / "out" / d / f"classified-{d}.laz").is_file()


def _holey_surface(seed, shape, waves, unscanned, hole):
    """A maker of fresh wavy surface grids with ``unscanned`` of the cells empty at random
    and the block ``hole`` empty (fill_windows consumes its surface)."""
    from inventory.model.grid import Grid, Surface

    rng = np.random.default_rng(seed)
    g = Grid(500000.0, 6000300.0, 0.5, shape[0], shape[1], CRS)
    rows, cols = np.mgrid[0:shape[0], 0:shape[1]]
    z = 100.0 + np.sin(cols / waves[0]) + np.cos(rows / waves[1])
    count = (rng.random(g.shape) > unscanned).astype(np.int32)
    count[hole] = 0

    def surface():
        return Surface(g, np.where(count > 0, z, np.nan), count.copy(), np.full(g.shape, np.nan),
                       np.zeros(g.shape, bool), DATE, {})
    return surface


def test_fill_windows_on_two_worker_processes_match_serial():
    # The fill windows of a large grid run as jobs; on a two-process LocalCluster they give
    # the serial answer cell for cell.
    from inventory.survey.fill import fill_windows

    surface = _holey_surface(8, (200, 230), (9.0, 7.0), 0.15, (slice(50, 70), slice(100, 140)))

    serial, r1 = fill_windows(surface(), 2.0, window=64)
    with executor(2) as ex:
        assert ex.kind == "dask"
        both, r2 = fill_windows(surface(), 2.0, window=64, ex=ex)
    assert r1 == r2 and r1.filled_cells > 1000
    np.testing.assert_array_equal(serial.z, both.z)
    np.testing.assert_array_equal(serial.filled, both.filled)


@pytest.mark.skipif(platform.libc_ver()[0] != "glibc", reason="malloc_trim is glibc's")
def test_memory_freed_on_job_threads_is_handed_back_on_glibc():
    import inventory.parallel as par

    pins = []

    def job():
        # many small blocks (under the mmap threshold: they come from this thread's arena),
        # then one that stays alive above them, as a job's result does: the arena cannot
        # shrink from its top, so the freed blocks stay in the process
        blocks = [bytearray(4096) for _ in range(50_000)]
        pins.append(bytearray(4096))
        del blocks

    def rss_mb():
        with open("/proc/self/status") as f:
            return next(int(line.split()[1]) for line in f if line.startswith("VmRSS")) / 1024

    t = threading.Thread(target=job)
    t.start()
    t.join()
    kept = rss_mb()
    par.release_free_memory()
    assert callable(par._trim)            # glibc's malloc_trim found
    # about 200 MB were freed in the thread's arena; they go back (glibc malloc_trim(3))
    assert rss_mb() < kept - 100


def test_fill_windows_on_threads_of_this_process_match_one_thread():
    # Without workers the windows run on threads of this process (Qhull and scipy.ndimage
    # release the interpreter lock); the fills are put in place in window order, so the
    # surface is the one of a single thread, cell for cell.
    from inventory.survey.fill import fill_windows

    surface = _holey_surface(9, (260, 250), (11.0, 5.0), 0.2, (slice(120, 150), slice(30, 90)))

    one, r1 = fill_windows(surface(), 2.0, window=64, threads=1)
    with executor(None) as ex:
        assert ex.kind == "serial"
        many, r3 = fill_windows(surface(), 2.0, window=64, ex=ex, threads=3)
    assert r1 == r3 and r1.filled_cells > 1000 and r1.gap_cells > 0
    np.testing.assert_array_equal(one.z, many.z)
    np.testing.assert_array_equal(one.filled, many.filled)


@pytest.mark.skipif(platform.libc_ver()[0] != "glibc", reason="mallopt is glibc's (glibc mallopt(3))")
def test_dask_workers_tune_their_allocator_and_this_process_does_not():
    # A Dask worker starts with glibc mapping every block above its mmap threshold afresh
    # and trimming its heap above 64 KiB, so each job's large arrays came as new zeroed
    # pages; the executor's workers set mallopt(3) M_MMAP_THRESHOLD, M_TRIM_THRESHOLD and
    # M_TOP_PAD before their first job (measured on the 10 M bench survey: one worker
    # 70 -> 43 s, two 42 -> 26 s, CHANGELOG.md; speed is the bench's to show, not a test's)
    import inventory.parallel as par

    with executor(2) as ex:     # (one worker runs in this process: two are a Dask cluster)
        assert list(ex.map(_worker_tuned, [(), ()])) == [True, True]
    assert par._tuned is False   # jobs on this process's threads are left as they were


def _worker_tuned():
    import inventory.parallel

    return inventory.parallel._tuned
