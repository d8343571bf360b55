"""Extra bytes dimensions (LAS 1.4 R15 section 2.5, the Extra Bytes VLR) of the input clouds
are carried into the classified cloud with their names, types, descriptions, scales,
offsets and no-data values, on the tests' small valid site."""

from __future__ import annotations

import warnings

import laspy
import numpy as np
import pyproj
import pytest

DATE = "2026-10-31"

#: (name, laspy type, description, scales, offsets, no_data)
AMPLITUDE = ("Amplitude", "u2", "echo amplitude", [0.01], [-20.0], [65535])
DEVIATION = ("Deviation", "f4", "pulse shape deviation", None, None, None)
ECHO = ("Echo", "3i1", "three signed bytes", None, None, None)
REFLECTANCE = ("Reflectance", "f4", "reflectance dB", None, None, None)


def _cloud(path, dims, n_side=60, seed=3, x0=0.0):
    """A LAS 1.4 point format 6 cloud over the small site's piles with the extra dimensions
    ``dims``, random stored values for each, and a unique GPS time per point (to match
    points between input and output)."""
    rng = np.random.default_rng(seed)
    gx, gy = np.meshgrid(np.linspace(0, 30, n_side), np.linspace(0, 30, n_side))
    n = gx.size
    header = laspy.LasHeader(point_format=6, version="1.4")
    header.add_crs(pyproj.CRS("EPSG:25832"))
    header.scales = [0.001] * 3
    header.offsets = [500000.0, 5700000.0, 0.0]
    header.add_extra_dims([laspy.ExtraBytesParams(name, kind, text, offsets=offsets, scales=scales,
                                                  no_data=no_data)
                           for name, kind, text, scales, offsets, no_data in dims])
    las = laspy.LasData(header)
    las.x = 499985.0 + x0 + gx.ravel() + rng.uniform(-0.05, 0.05, n)
    las.y = 5699985.0 + gy.ravel() + rng.uniform(-0.05, 0.05, n)
    las.z = 10.0 + 0.02 * gx.ravel() + rng.uniform(-0.01, 0.01, n)
    las.gps_time = seed * 1e6 + rng.permutation(n) + rng.uniform(0.0, 0.5, n)
    las.return_number = np.ones(n, np.uint8)
    las.number_of_returns = np.ones(n, np.uint8)
    for name, kind, *_ in dims:
        field = las.points.array.dtype[name]
        base = field.base
        shape = (n,) + field.shape
        if base.kind == "f":
            las.points.array[name] = rng.normal(0, 10, shape).astype(base)
        else:
            info = np.iinfo(base)
            las.points.array[name] = rng.integers(info.min, min(info.max, 60000), shape, dtype=base,
                                                  endpoint=True)
    las.write(path)
    return laspy.read(path)


def _measure(site_root, out, **kw):
    from inventory.site.load import load_site
    from inventory.survey.measure import measure_survey

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        result = measure_survey(load_site(site_root), DATE, out_dir=out, **kw)
    return result, [str(w.message) for w in caught]


def _match(given, out):
    """Index into ``given`` of each point of ``out``, by GPS time (unique per point)."""
    order = np.argsort(np.asarray(given.gps_time))
    t = np.asarray(given.gps_time)[order]
    pos = np.searchsorted(t, np.asarray(out.gps_time))
    assert (pos < len(t)).all()
    np.testing.assert_array_equal(t[pos], np.asarray(out.gps_time))
    return order[pos]


def _info(las, name):
    return las.header.point_format.dimension_by_name(name)


def _no_data(las, name):
    """A dimension's no-data value from the file's Extra Bytes VLR (laspy's dimension info
    read from a file does not hold it)."""
    vlr = las.header.vlrs.get("ExtraBytesVlr")[0]
    rec = next(r for r in vlr.extra_bytes_structs if r.name.rstrip(b"\0").decode() == name)
    return None if rec.no_data is None else rec.no_data.tolist()


def test_extra_dimensions_reach_the_classified_cloud(good_site, tmp_path):
    given = _cloud(good_site / "surveys" / DATE / "a.laz", [AMPLITUDE, DEVIATION, ECHO])
    result, _ = _measure(good_site, tmp_path / "out")
    out = laspy.read(result.classified_path)
    assert len(out.points) > 0.9 * len(given.points)
    assert [d.name for d in out.header.point_format.extra_dimensions] == ["Amplitude", "Deviation", "Echo"]
    for name in ("Amplitude", "Deviation", "Echo"):
        a, b = _info(given, name), _info(out, name)
        assert (b.kind, b.num_bits, b.num_elements, b.description) == (a.kind, a.num_bits, a.num_elements,
                                                                       a.description), name
        assert out.points.array.dtype[name] == given.points.array.dtype[name]
    amp = _info(out, "Amplitude")
    assert amp.scales.tolist() == [0.01] and amp.offsets.tolist() == [-20.0]
    assert _no_data(out, "Amplitude") == [65535] and _no_data(given, "Amplitude") == [65535]
    assert _info(out, "Deviation").scales is None and _no_data(out, "Deviation") is None
    j = _match(given, out)
    assert len(np.unique(j)) == len(j)
    for name in ("Amplitude", "Deviation", "Echo"):
        # stored values bit for bit, and (scaled) values as laspy gives them
        np.testing.assert_array_equal(out.points.array[name], given.points.array[name][j], err_msg=name)
        np.testing.assert_array_equal(np.asarray(out[name]), np.asarray(given[name])[j], err_msg=name)
    assert np.asarray(out["Echo"]).shape == (len(out.points), 3)
    # the scaled dimension reads back as stored * 0.01 - 20 (LAS 1.4 R15 Table 24: scale, offset)
    np.testing.assert_allclose(np.asarray(out["Amplitude"])[:5],
                               out.points.array["Amplitude"][:5] * 0.01 - 20.0)


def test_files_with_different_extra_dimensions_give_their_union(good_site, tmp_path):
    folder = good_site / "surveys" / DATE
    a = _cloud(folder / "a.laz", [AMPLITUDE, DEVIATION], seed=3)
    b = _cloud(folder / "b.laz", [REFLECTANCE, DEVIATION], seed=5, x0=30.0)
    result, messages = _measure(good_site, tmp_path / "out")
    out = laspy.read(result.classified_path)
    assert [d.name for d in out.header.point_format.extra_dimensions] == ["Amplitude", "Deviation", "Reflectance"]
    t = np.asarray(out.gps_time)
    from_a, from_b = t < 4e6, t >= 5e6       # the files' GPS times: seed * 1e6 + up to 3,600
    assert from_a.sum() > 1000 and from_b.sum() > 1000 and (from_a | from_b).all()
    arr = out.points.array
    # a's own values, and 0 for the Reflectance it lacks (no no-data value declared)
    ja = _match(a, out[from_a])
    np.testing.assert_array_equal(arr["Amplitude"][from_a], a.points.array["Amplitude"][ja])
    np.testing.assert_array_equal(arr["Deviation"][from_a], a.points.array["Deviation"][ja])
    assert (arr["Reflectance"][from_a] == 0).all()
    # b's own values, and Amplitude's declared no-data value 65535 where b has none
    jb = _match(b, out[from_b])
    np.testing.assert_array_equal(arr["Reflectance"][from_b], b.points.array["Reflectance"][jb])
    np.testing.assert_array_equal(arr["Deviation"][from_b], b.points.array["Deviation"][jb])
    assert (arr["Amplitude"][from_b] == 65535).all()
    lacking = [m for m in messages if "has no extra dimension" in m]
    assert len(lacking) == 2
    assert any("a.laz" in m and "'Reflectance'" in m and "0" in m for m in lacking)
    assert any("b.laz" in m and "'Amplitude'" in m and "no-data value 65535" in m for m in lacking)


def test_a_dimension_stored_differently_is_named_and_left_out(good_site, tmp_path):
    folder = good_site / "surveys" / DATE
    _cloud(folder / "a.laz", [AMPLITUDE, DEVIATION], seed=3)
    _cloud(folder / "b.laz", [("Amplitude", "f4", "echo amplitude", None, None, None), DEVIATION],
           seed=5, x0=30.0)
    result, messages = _measure(good_site, tmp_path / "out")
    out = laspy.read(result.classified_path)
    assert [d.name for d in out.header.point_format.extra_dimensions] == ["Deviation"]
    assert any("'Amplitude'" in m and "b.laz" in m and "not carried" in m for m in messages)


@pytest.mark.slow
def test_serial_threaded_and_dask_runs_write_the_same_extra_dimensions(good_site, tmp_path):
    folder = good_site / "surveys" / DATE
    _cloud(folder / "a.laz", [AMPLITUDE, ECHO], seed=3)
    _cloud(folder / "b.laz", [DEVIATION], seed=5, x0=30.0)
    # 10 m tiles, each a block, and no job budget: one job per tile holding points
    runs = [_measure(good_site, tmp_path / name, tile_size_m=10.0, buffer_m=5.0, job_points=0, **kw)[0]
            for name, kw in (("serial", {}), ("threads", {"workers": 2, "threads": True}),
                             ("dask", {"workers": 2}))]
    ref = laspy.read(runs[0].classified_path)
    assert len(ref.points) > 1000 and runs[0].jobs > 4
    for other in runs[1:]:
        las = laspy.read(other.classified_path)
        assert las.points.array.dtype == ref.points.array.dtype
        np.testing.assert_array_equal(las.points.array, ref.points.array)


def test_laspy_sample_extrabytes_round_trips(laspy_data, tmp_path):
    # extrabytes.las from the laspy source distribution's tests/data (laspy 2.x): LAS 1.4
    # point format 3 with five extra dimensions, among them arrays (3 x uint16 "Colors",
    # 7 x uint8 "Reserved", 2 x int8 "Flags") and an "Intensity" whose name is a standard
    # dimension's, carried as the column ExtraIntensity.
    from inventory.io.clouds import CloudWriter, open_cloud

    src = laspy_data / "extrabytes.las"
    given = laspy.read(src)
    names = [d.name for d in given.header.point_format.extra_dimensions]
    assert names == ["Colors", "Reserved", "Flags", "Intensity", "Time"]
    with open_cloud(src, chunk_size=400) as cloud:
        extra = cloud.extra_dims
        assert [d.column for d in extra] == ["Colors", "Reserved", "Flags", "ExtraIntensity", "Time"]
        offset = tuple(np.floor(cloud.mins))
        with CloudWriter(tmp_path / "copy.laz", crs=None, offset=offset, extra_dims=extra) as w:
            for chunk in cloud.chunks():
                assert chunk["ExtraIntensity"].dtype == np.uint32
                w.write(chunk)
    out = laspy.read(tmp_path / "copy.laz")
    assert [d.name for d in out.header.point_format.extra_dimensions] == names
    for name in names:
        a, b = _info(given, name), _info(out, name)
        assert (b.kind, b.num_bits, b.num_elements, b.description) == (a.kind, a.num_bits, a.num_elements,
                                                                       a.description), name
        np.testing.assert_array_equal(out.points.array[name], given.points.array[name], err_msg=name)
    # the standard intensity is its own dimension beside the extra one
    np.testing.assert_array_equal(np.asarray(out.intensity), np.asarray(given.intensity))


def test_merge_keeps_first_appearance_order_and_fills():
    from inventory.io.clouds import ExtraDim, conform_points, empty_points, merge_extra_dims

    amp = ExtraDim("Amplitude", "u2", scales=(0.01,), offsets=(-20.0,), no_data=(65535,))
    dev = ExtraDim("Deviation", "f4")
    dims, problems = merge_extra_dims([("a.laz", (dev,)), ("b.laz", (amp, dev))])
    assert [d.name for d in dims] == ["Deviation", "Amplitude"]
    assert problems == ["a.laz has no extra dimension 'Amplitude' (its points get the no-data value 65535)"]
    pts = empty_points(2, (dev,))
    pts["Deviation"] = [1.5, -2.5]
    both = conform_points(pts, dims)
    assert both["Deviation"].tolist() == [1.5, -2.5] and both["Amplitude"].tolist() == [65535, 65535]
    # 58 bytes of POINT_DTYPE, then 4 + 2 for the two extra dimensions
    assert both.dtype.itemsize == 58 + dev.nbytes + amp.nbytes == 64


def test_pipeline_stages_keep_and_filter_on_extra_columns():
    from inventory.io.clouds import ExtraDim, empty_points
    from inventory.survey.pipeline import Pipeline

    dims = (ExtraDim("Deviation", "u2"), ExtraDim("Echo", "i1", 3))
    pts = empty_points(6, dims)
    pts["X"], pts["Y"], pts["Z"] = np.arange(6.0), np.arange(6.0), 1.0
    pts["Deviation"] = [0, 3, 9, 4, 12, 1]
    pts["Echo"] = np.arange(18).reshape(6, 3)
    pipe = Pipeline.from_json('[{"type": "filters.range", "limits": "Deviation[0:5]"},'
                              ' {"type": "filters.crop", "bounds": "([0.5, 10], [0.5, 10])"},'
                              ' {"type": "filters.assign", "assignment": "Classification[:]=2"}]')
    out, _ = pipe.run(pts, "EPSG:25832", engine="builtin")
    assert out.dtype == pts.dtype
    # Deviation 0, 3, 4, 1 pass the range; the crop then drops the point at x = 0
    assert out["X"].tolist() == [1.0, 3.0, 5.0]
    assert out["Deviation"].tolist() == [3, 4, 1]
    assert out["Echo"].tolist() == [[3, 4, 5], [9, 10, 11], [15, 16, 17]]
    assert (out["Classification"] == 2).all()
