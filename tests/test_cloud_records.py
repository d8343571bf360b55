"""Points moved as whole records (issue 17): a reader's chunks filled from laspy's records
with compiled loops (coordinates scaled, bit fields unpacked), and ``select`` / ``concat``,
against the numpy and laspy code they replaced (kept here as the reference): the same bytes
out.
"""

from __future__ import annotations

import laspy
import numpy as np
import pytest

from inventory.io.clouds import _LAS_FIELDS, SCAN_ANGLE_STEP, ExtraDim, empty_points, open_cloud, points_dtype
from inventory.io.records import concat, select

EXTRA = [
    laspy.ExtraBytesParams("Reflectance", "f4", "reflectance"),
    laspy.ExtraBytesParams("Deviation", "u2", "scaled", scales=np.array([0.01]), offsets=np.array([1.0])),
    laspy.ExtraBytesParams("Triple", "3i1", "an array dimension"),
    laspy.ExtraBytesParams("Intensity", "u1", "a second intensity", no_data=np.array([7])),
]


def reference_chunks(path, chunk_size):
    """``CloudReader.chunks`` as it was: a zeroed array filled field by field from laspy."""
    with open_cloud(path, chunk_size=chunk_size) as cloud:
        names = set(cloud.header.point_format.dimension_names)
        for rec in cloud._reader.chunk_iterator(chunk_size):
            out = empty_points(len(rec), cloud.extra_dims)
            for d in cloud.extra_dims:
                out[d.column] = rec.array[d.name]
            out["X"], out["Y"], out["Z"] = rec.x, rec.y, rec.z
            for dim, attr in _LAS_FIELDS.items():
                if attr in names:
                    out[dim] = np.asarray(rec[attr])
            if "scan_angle" in names:
                out["ScanAngleRank"] = np.asarray(rec["scan_angle"]) * SCAN_ANGLE_STEP
            elif "scan_angle_rank" in names:
                out["ScanAngleRank"] = np.asarray(rec["scan_angle_rank"])
            yield out


def _random_cloud(path, point_format, extra, n=5000, seed=0):
    """A LAS file of ``point_format`` whose records are random bytes (every bit field, flag,
    GPS time, colour and extra dimension) but for coordinates kept near an origin."""
    rng = np.random.default_rng(seed + point_format)
    version = "1.4" if point_format >= 6 or extra else "1.2"
    header = laspy.LasHeader(point_format=point_format, version=version)
    header.scales = [0.001, 0.002, 0.0005]
    header.offsets = [500000.0, 5700000.0, -12.5]
    if extra:
        header.add_extra_dims(extra)
    las = laspy.LasData(header)
    arr = las.points.array
    raw = rng.integers(0, 256, n * arr.dtype.itemsize, dtype=np.uint8).view(arr.dtype)
    las.points = laspy.ScaleAwarePointRecord(raw.copy(), header.point_format, header.scales, header.offsets)
    for c in "XYZ":
        las.points.array[c] = rng.integers(-2_000_000, 2_000_000, n, dtype=np.int32)
    las.write(path)
    return path


@pytest.mark.parametrize("point_format", [0, 1, 3, 6, 7, 8])
@pytest.mark.parametrize("suffix", [".las", ".laz"])
def test_chunks_are_the_reference_s(tmp_path, point_format, suffix):
    extra = EXTRA if point_format in (1, 7) else []
    path = _random_cloud(tmp_path / f"pf{point_format}{suffix}", point_format, extra)
    with open_cloud(path, chunk_size=1234) as cloud:
        got = list(cloud.chunks())
        assert len(cloud.extra_dims) == len(extra)
    want = list(reference_chunks(path, 1234))
    assert [len(c) for c in got] == [len(c) for c in want] == [1234] * 4 + [64]
    for g, w in zip(got, want):
        assert g.dtype == w.dtype
        assert g.tobytes() == w.tobytes()
    pts = np.concatenate(got)
    # the file's values really vary: the comparison is not one of zeros
    for dim, attr in _LAS_FIELDS.items():
        if attr in laspy.PointFormat(point_format).dimension_names:
            assert len(np.unique(pts[dim])) > 1, dim
    assert np.isnan(pts["StationRange"]).all()
    if extra:
        assert {"Reflectance", "Deviation", "Triple", "ExtraIntensity"} <= set(pts.dtype.names)


def test_select_and_concat_are_numpy_s():
    rng = np.random.default_rng(5)
    dtype = points_dtype((ExtraDim("Deviation", "u2", 3), ExtraDim("Reflectance", "f4")))
    pts = rng.integers(0, 256, 1000 * dtype.itemsize, dtype=np.uint8).view(dtype)
    mask = rng.random(1000) < 0.4
    index = rng.permutation(1000)[:300]
    assert select(pts, mask).dtype == dtype
    assert select(pts, mask).tobytes() == pts[mask].tobytes()
    assert select(pts, index).tobytes() == pts[index].tobytes()
    parts = [pts[:10], pts[10:10], pts[500:]]
    assert concat(parts, dtype).tobytes() == np.concatenate(parts).tobytes()
    assert concat([], dtype).dtype == dtype and len(concat([], dtype)) == 0
