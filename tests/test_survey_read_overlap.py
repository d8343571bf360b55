"""The survey step's read phase with the spilling on a thread of its own (issue 17).

``_read_into_spill`` reads, places and conforms each chunk in the caller's thread and hands
it to a :class:`~inventory.survey.tiles.SpillThread`, which spills it while the next chunk is
read. The straight loop it replaced (spill each chunk before reading the next) is kept here
as the reference: the spill files, counts, block counts, lowest height and points outside
must be the same, errors of a later chunk must reach the caller as they were raised, with no
thread left running, and warnings and progress stay in the caller's thread.
"""

from __future__ import annotations

import threading
import warnings
from pathlib import Path

import numpy as np
import pytest
from pyproj import CRS

from inventory.errors import InputError, InputWarning
from inventory.io import clouds
from inventory.io.clouds import (ExtraDim, conform_points, empty_points, merge_extra_dims, open_cloud,
                                 points_dtype, write_cloud)
from inventory.io.crs import TransformerCache
from inventory.model.grid import Grid
from inventory.survey.measure import _read_into_spill
from inventory.survey.placement import CrsPlacement
from inventory.survey.tiles import SpillThread, TileSpill

EPSG = "EPSG:25832"
CELL = 0.5
EXTRA = (ExtraDim("Reflectance", "f4"),)


def cloud(path: Path, n: int, seed: int, extra: tuple = ()) -> Path:
    """``n`` points over a 120 m x 90 m yard (some outside the grid of :func:`spill_for`)."""
    rng = np.random.default_rng(seed)
    pts = empty_points(n, extra)
    pts["X"] = 500000.0 + rng.uniform(-10, 120, n)
    pts["Y"] = 5700000.0 + rng.uniform(-10, 90, n)
    pts["Z"] = 10.0 + rng.uniform(0, 8, n)
    pts["Intensity"] = rng.integers(0, 65535, n)
    pts["GpsTime"] = np.sort(rng.uniform(0, 100, n))
    for d in extra:
        pts[d.column] = rng.normal(0, 1, n).astype(d.type)
    return write_cloud(path, pts, EPSG, extra_dims=extra)


def placements(paths: list[Path]) -> list[CrsPlacement]:
    crs, cache = CRS(EPSG), TransformerCache()
    return [CrsPlacement(p, crs, crs, cache) for p in paths]


def spill_for(folder: Path) -> TileSpill:
    """Tiles of 20 m (blocks of 10 m) over 100 m x 80 m: points beyond it are outside. The
    snapped grid reaches past the box's east and north edges: 201 columns, 162 rows from
    north 5,700,080.5, so 6 x 5 tiles."""
    folder.mkdir()
    grid = Grid.snapped(500000.0, 5700000.0, 500100.0, 5700080.0, cell=CELL, crs=EPSG)
    return TileSpill(grid, 40, folder, block_cells=20)


def straight_read(places: list, spill: TileSpill, chunk_size: int) -> tuple[int, int]:
    """The read phase as it was: each chunk placed, conformed and spilled before the next is
    read. Returns points read and points outside the grid."""
    files = []
    for p in places:
        with p.open() as c:
            files.append((p.path, c.extra_dims))
    extra, _ = merge_extra_dims(files)
    spill.dtype = points_dtype(extra)
    points = outside = 0
    for p in places:
        with p.open(chunk_size) as c:
            for chunk in c.chunks():
                points += len(chunk)
                outside += spill.add(conform_points(p.place(chunk), extra))
    return points, outside


def spill_state(spill: TileSpill) -> tuple:
    files = {t: spill.path(t).read_bytes() for t in sorted(spill.counts)}
    return files, dict(spill.counts), spill.blocks.copy(), spill.zmin, spill.dtype


def spill_threads() -> list[threading.Thread]:
    return [t for t in threading.enumerate() if t.name == "tile-spill"]


@pytest.fixture
def two_files(tmp_path):
    """Two LAZ files, the first with an extra bytes dimension the second lacks."""
    return [cloud(tmp_path / "a.laz", 23_000, 1, EXTRA), cloud(tmp_path / "b.laz", 17_500, 2)]


@pytest.mark.parametrize("chunk_size, step", [(1_000, 300), (4_000, 65_536), (50_000, 4_096)])
def test_overlapped_read_spills_the_files_of_the_straight_loop(tmp_path, two_files, monkeypatch,
                                                                chunk_size, step):
    monkeypatch.setattr(clouds, "DECODE_STEP", step)
    ref = spill_for(tmp_path / "ref")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        points, outside = straight_read(placements(two_files), ref, chunk_size)
    spill = spill_for(tmp_path / "new")
    said = []
    with pytest.warns(InputWarning, match="b.laz has no extra dimension 'Reflectance'"):
        read = _read_into_spill(placements(two_files), spill, chunk_size,
                                lambda text: said.append((text, threading.current_thread())))
    assert (read.points, read.outside) == (points, outside) == (40_500, read.outside)
    assert 0 < read.outside < read.points
    new, old = spill_state(spill), spill_state(ref)
    assert new[0] == old[0]                       # every tile's file, byte for byte
    assert new[1] == old[1] and new[3] == old[3] and new[4] == old[4]
    np.testing.assert_array_equal(new[2], old[2])
    assert sum(new[1].values()) == read.points - read.outside
    # one progress line per chunk, from the caller's thread
    chunks = -(-23_000 // chunk_size) + -(-17_500 // chunk_size)
    assert len(said) == chunks
    assert all(th is threading.current_thread() for _, th in said)
    assert said[-1][0].startswith("reading b.laz: 40,500 of 40,500 points (100%)")
    assert spill_threads() == []


def test_chunks_decoded_in_short_calls_are_the_chunks_of_one_call(two_files, monkeypatch):
    """A chunk filled in calls of DECODE_STEP points is the chunk decoded in one call."""
    def chunks(step: int, size: int) -> list[np.ndarray]:
        monkeypatch.setattr(clouds, "DECODE_STEP", step)
        with open_cloud(two_files[0], chunk_size=size) as c:
            return list(c.chunks())

    for size in (999, 7_000, 23_000, 100_000):
        one, short = chunks(10**9, size), chunks(333, size)
        assert [len(c) for c in one] == [len(c) for c in short]
        assert all(a.tobytes() == b.tobytes() for a, b in zip(one, short))
    assert sum(len(c) for c in short) == 23_000


def test_a_reader_error_in_a_later_chunk_reaches_the_caller(tmp_path, monkeypatch):
    """A LAS file shorter than its header (simulated past the cheap size check) fails after
    its last chunk; the message is the straight loop's and no spill thread is left."""
    path = cloud(tmp_path / "short.las", 1_000, 3)
    with open_cloud(path) as c:
        record, start = c.header.point_format.size, c.header.offset_to_point_data
    path.write_bytes(path.read_bytes()[:start + 700 * record])
    monkeypatch.setattr(clouds, "size_problem", lambda path, header: None)
    with pytest.raises(InputError) as ref:
        straight_read(placements([path]), spill_for(tmp_path / "ref"), 300)
    with pytest.raises(InputError) as caught:
        _read_into_spill(placements([path]), spill_for(tmp_path / "new"), 300, lambda text: None)
    assert str(caught.value) == str(ref.value)
    assert caught.value.why == "truncated or damaged: the header says 1,000 points but only 700 could be read"
    assert spill_threads() == []


class FailingPlacement(CrsPlacement):
    """Places chunks until the ``fail_at``-th, which is refused."""

    def __init__(self, *a, fail_at: int) -> None:
        super().__init__(*a)
        self.fail_at, self.calls = fail_at, 0

    def place(self, chunk: np.ndarray) -> np.ndarray:
        self.calls += 1
        if self.calls == self.fail_at:
            raise InputError(self.path, "a point cannot be placed", line=self.calls, field="X")
        return super().place(chunk)


def test_a_placement_error_in_a_later_chunk_reaches_the_caller(tmp_path, two_files):
    crs = CRS(EPSG)
    place = FailingPlacement(two_files[1], crs, crs, TransformerCache(), fail_at=4)
    spill = spill_for(tmp_path / "s")
    with pytest.raises(InputError) as caught:
        _read_into_spill([place], spill, 2_000, lambda text: None)
    assert str(caught.value) == f"{two_files[1]} line 4: X: a point cannot be placed"
    assert spill_threads() == []
    assert sum(spill.counts.values()) <= 3 * 2_000     # nothing after the refused chunk


def test_a_spill_error_in_a_later_chunk_reaches_the_caller_as_it_was_raised(tmp_path, two_files, monkeypatch):
    calls = []
    boom = OSError(28, "No space left on device")
    add = TileSpill.add

    def failing_add(self, pts):
        calls.append(len(pts))
        if len(calls) == 3:
            raise boom
        return add(self, pts)

    monkeypatch.setattr(TileSpill, "add", failing_add)
    spill = spill_for(tmp_path / "s")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with pytest.raises(OSError) as caught:
            _read_into_spill(placements(two_files), spill, 2_000, lambda text: None)
    assert caught.value is boom
    assert len(calls) == 3                      # nothing spilled after the failure
    assert spill_threads() == []


def test_spill_thread_outside_count_and_use_after_close(tmp_path):
    spill = spill_for(tmp_path / "s")
    pts = empty_points(4)
    pts["X"] = [500001.0, 500050.0, 499990.0, 500099.0]
    pts["Y"] = [5700001.0, 5700040.0, 5700001.0, 5700200.0]
    with SpillThread(spill) as behind:
        behind.add(pts)
        behind.add(pts[:1].copy())
        assert behind.close() == 2
    # (1, 1) m from the box's corner: row 159, column 2, tile row 3, tile column 0 -> tile 18,
    # twice; (50, 40) m: row 81, column 100, tile (2, 2) -> tile 14
    assert spill.counts == {18: 2, 14: 1}
    with pytest.raises(ValueError, match="closed SpillThread"):
        behind.add(pts)
    assert spill_threads() == []


def test_tile_files_kept_open_hold_the_bytes_of_files_opened_each_time(tmp_path, two_files):
    """Within ``kept_open`` the spill keeps at most ``most`` tile files open (the least
    recently written closed first) and writes the same bytes; all are closed after."""
    import os

    def chunks():
        with open_cloud(two_files[1], chunk_size=1_500) as c:
            yield from c.chunks()

    ref = spill_for(tmp_path / "ref")
    for pts in chunks():
        ref.add(pts)
    spill = spill_for(tmp_path / "kept")
    before = len(os.listdir("/proc/self/fd")) if Path("/proc/self/fd").is_dir() else None
    with spill.kept_open(most=3):
        for pts in chunks():
            spill.add(pts)
            assert 1 <= len(spill._open) <= 3
        assert len(ref.counts) > 3                  # more tiles than files kept open
    assert spill._open is None
    if before is not None:
        assert len(os.listdir("/proc/self/fd")) == before
    assert spill_state(spill)[0] == spill_state(ref)[0] and spill.counts == ref.counts
