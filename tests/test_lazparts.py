"""A LAZ file written from parts compressed in the jobs (issue 17) reads back as the one
:class:`CloudWriter` writes from the same points.

Each part is compressed into complete LASzip chunks of variable size (LAS 1.4 R15 and the
LASzip VLR's chunk size 0xFFFFFFFF meaning variable-size chunks, LASzip specification
"chunk table"); the file's chunk boundaries therefore differ from a CloudWriter file's
(fixed 50,000), but every decoded point record, the header's counts, bounds and returns,
and every VLR other than the LASzip one must be the same.
"""

from __future__ import annotations

import laspy
import numpy as np
import pytest

from inventory.errors import RunError
from inventory.io.clouds import CloudWriter, ExtraDim, empty_points, open_cloud, read_cloud
from inventory.io.lazparts import CHUNK_POINTS, LasLayout, LazPartWriter, encode_part
from inventory.parallel import _in_job

CRS = "EPSG:25832"
EXTRA = (ExtraDim("Amplitude", "u2", description="echo amplitude", no_data=(0,)),
         ExtraDim("Deviation", "i2", description="pulse shape", scales=(0.01,), offsets=(0.0,)))
OFFSET = (500_000.0, 5_700_000.0, 100.0)


def _points(n, seed=1, extra=EXTRA):
    rng = np.random.default_rng(seed)
    pts = empty_points(n, extra)
    pts["X"] = OFFSET[0] + rng.uniform(0, 200, n)
    pts["Y"] = OFFSET[1] + rng.uniform(0, 150, n)
    pts["Z"] = OFFSET[2] + rng.normal(10, 3, n)
    pts["Intensity"] = rng.integers(0, 4000, n)
    pts["NumberOfReturns"] = rng.integers(1, 4, n)
    pts["ReturnNumber"] = np.minimum(rng.integers(1, 4, n), pts["NumberOfReturns"])
    pts["Classification"] = rng.choice([1, 2, 6, 7, 18], n)
    pts["GpsTime"] = np.sort(rng.uniform(1e8, 1e8 + 600, n))
    pts["PointSourceId"] = 3
    pts["ScanAngleRank"] = rng.uniform(-40, 40, n).astype("f4")
    pts["UserData"] = rng.integers(0, 255, n)
    for c in ("Red", "Green", "Blue"):
        pts[c] = rng.integers(0, 65535, n)
    if extra:
        pts["Amplitude"] = rng.integers(0, 900, n)
        pts["Deviation"] = rng.integers(-500, 500, n)
    return pts


def _both(tmp_path, pts, splits, point_format=7, extra=EXTRA, chunk_points=CHUNK_POINTS):
    """The same points written by CloudWriter (one write per part) and from parts."""
    ref = tmp_path / "ref.laz"
    bounds = list(zip(splits[:-1], splits[1:]))
    with CloudWriter(ref, crs=CRS, offset=OFFSET, point_format=point_format, extra_dims=extra) as w:
        for a, b in bounds:
            w.write(pts[a:b])
    layout = LasLayout(point_format, OFFSET, extra_dims=extra)
    parts = [encode_part(pts[a:b], layout, tmp_path / f"part{a}.bin", chunk_points) for a, b in bounds]
    new = tmp_path / "new.laz"
    with LazPartWriter(new, crs=CRS, layout=layout) as w:
        for part in parts:
            w.append(part)
    return ref, new, parts, w


def _same_files(ref, new):
    a, b = laspy.read(ref), laspy.read(new)
    assert a.points.array.dtype == b.points.array.dtype
    np.testing.assert_array_equal(a.points.array, b.points.array)
    ha, hb = a.header, b.header
    for key in ("point_count", "version", "point_format", "generating_software", "system_identifier",
                "creation_date", "uuid", "file_source_id"):
        assert getattr(ha, key) == getattr(hb, key), key
    for key in ("scales", "offsets", "mins", "maxs", "number_of_points_by_return"):
        np.testing.assert_array_equal(getattr(ha, key), getattr(hb, key), err_msg=key)
    assert ha.global_encoding.value == hb.global_encoding.value
    assert ha.offset_to_point_data == hb.offset_to_point_data
    kept = [v for v in ha.vlrs if type(v).__name__ != "LasZipVlr"]
    assert [type(v) for v in kept] == [type(v) for v in hb.vlrs if type(v).__name__ != "LasZipVlr"]
    for va, vb in zip(kept, [v for v in hb.vlrs if type(v).__name__ != "LasZipVlr"]):
        assert va.record_data_bytes() == vb.record_data_bytes(), type(va).__name__
    return a, b


def test_parts_read_back_as_the_cloud_writer_writes_them(tmp_path):
    pts = _points(23_457)
    # parts of uneven sizes, one of a single point, one empty; small chunks so parts hold several
    ref, new, parts, w = _both(tmp_path, pts, [0, 7000, 7001, 7001, 20000, 23_457], chunk_points=3000)
    a, b = _same_files(ref, new)
    assert a.header.parse_crs() == b.header.parse_crs()
    assert b.header.parse_crs().to_epsg() == 25832
    assert b.header.point_format.id == 7 and b.header.are_points_compressed
    # the extra bytes dimensions' statistics (laspy keeps min and max in their records) agree
    assert [d.name for d in b.header.point_format.extra_dimensions] == ["Amplitude", "Deviation"]
    back, crs = read_cloud(new)
    old = read_cloud(ref)[0]
    assert back.dtype == old.dtype
    for col in back.dtype.names:      # StationRange is not stored: NaN in both
        np.testing.assert_array_equal(back[col], old[col], err_msg=col)
    for col in ("X", "Y", "Z"):
        np.testing.assert_allclose(back[col], pts[col], atol=0.0005 + 1e-9)   # stored to 1 mm
    for col in ("Classification", "Intensity", "ReturnNumber", "Red", "Amplitude", "Deviation"):
        np.testing.assert_array_equal(back[col], pts[col])
    assert w.written == len(pts) == sum(p.count for p in parts)


def test_every_part_is_cut_into_full_chunks_and_one_shorter(tmp_path):
    pts = _points(2 * CHUNK_POINTS + 20_000 + 777, extra=())
    ref, new, parts, w = _both(tmp_path, pts, [0, 2 * CHUNK_POINTS + 20_000, len(pts)], point_format=6, extra=())
    assert [n for n, _ in parts[0].chunks] == [CHUNK_POINTS, CHUNK_POINTS, 20_000]
    assert [n for n, _ in parts[1].chunks] == [777]
    assert w.chunks == parts[0].chunks + parts[1].chunks
    _same_files(ref, new)
    with laspy.open(new) as f:
        vlr = f.header.vlrs[f.header.vlrs.index("LasZipVlr")]
    # LASzip VLR: chunk size 0xFFFFFFFF marks variable-size chunks (LASzip specification)
    import lazrs

    laz_vlr = lazrs.LazVlr(vlr.record_data)
    assert laz_vlr.uses_variable_size_chunks() and laz_vlr.chunk_size() == 0xFFFFFFFF
    with open(new, "rb") as f:
        f.seek(laspy.read(new).header.offset_to_point_data)
        assert lazrs.read_chunk_table(f, laz_vlr) == w.chunks
    with open_cloud(new) as cloud:      # the chunk table accounts for the header's count
        assert cloud.count == len(pts)


def test_streamed_and_selective_reading(tmp_path):
    pts = _points(9_000)
    ref, new, _, _ = _both(tmp_path, pts, [0, 4000, 9000], chunk_points=1500)
    full = laspy.read(ref).points.array
    for size in (1, 999, 4321, 20_000):
        with laspy.open(new) as f:
            got = np.concatenate([c.array for c in f.chunk_iterator(size)])
        np.testing.assert_array_equal(got, full)
    with open_cloud(new, chunk_size=2500) as cloud:
        assert [len(c) for c in cloud.chunks()] == [2500, 2500, 2500, 1500]
    sel = laspy.DecompressionSelection
    for selection in (sel.base(), sel.XY_RETURNS_CHANNEL | sel.Z | sel.CLASSIFICATION):
        part = laspy.read(new, decompression_selection=selection)
        whole = laspy.read(ref)
        dims = ["X", "Y", "return_number"] + (["Z", "classification"] if selection & sel.Z else [])
        for dim in dims:
            np.testing.assert_array_equal(np.asarray(part[dim]), np.asarray(whole[dim]), err_msg=dim)


def test_a_file_of_no_points(tmp_path):
    layout = LasLayout(6, OFFSET)
    empty = encode_part(empty_points(0), layout, tmp_path / "none.bin")
    assert empty.path is None and empty.count == 0 and not (tmp_path / "none.bin").exists()
    with CloudWriter(tmp_path / "ref.laz", crs=CRS, offset=OFFSET) as w:
        w.write(empty_points(0))
    with LazPartWriter(tmp_path / "new.laz", crs=CRS, layout=layout) as w:
        w.append(empty)
    a, b = _same_files(tmp_path / "ref.laz", tmp_path / "new.laz")
    assert b.header.point_count == 0 and list(b.header.mins) == [0.0, 0.0, 0.0]
    pts, crs = read_cloud(tmp_path / "new.laz")
    assert len(pts) == 0 and crs.to_epsg() == 25832


def test_compression_on_one_thread_or_many_gives_the_same_bytes(tmp_path):
    pts = _points(12_000)
    layout = LasLayout(7, OFFSET, extra_dims=EXTRA)
    many = encode_part(pts, layout, tmp_path / "many.bin", 2000)
    one = _in_job(1, encode_part, pts, layout, tmp_path / "one.bin", 2000)   # as beside other workers
    assert many.chunks == one.chunks and len(many.chunks) == 6
    assert (tmp_path / "many.bin").read_bytes() == (tmp_path / "one.bin").read_bytes()


def test_an_abandoned_or_broken_file_is_never_left(tmp_path):
    layout = LasLayout(6, OFFSET)
    part = encode_part(_points(500, extra=()), layout, tmp_path / "p.bin")
    with pytest.raises(KeyError):
        with LazPartWriter(tmp_path / "out.laz", crs=CRS, layout=layout) as w:
            w.append(part)
            raise KeyError("stop")
    assert not (tmp_path / "out.laz").exists()
    with open(part.path, "ab") as f:       # a part that is not what its table says
        f.write(b"\0")
    with pytest.raises(RunError, match="does not hold"):
        with LazPartWriter(tmp_path / "out.laz", crs=CRS, layout=layout) as w:
            w.append(part)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["p.bin"]
    with pytest.raises(ValueError, match="LAZ"):
        LazPartWriter(tmp_path / "out.las", crs=CRS, layout=layout)
