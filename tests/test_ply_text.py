"""PLY (binary and ASCII) and delimited text clouds: values, colour and intensity scaling,
the CRS given beside them, and one-line refusals of bad files."""

from __future__ import annotations

import numpy as np
import pytest

from inventory.errors import CRSError, InputError
from inventory.io.clouds import open_cloud, read_cloud
from inventory.site.load import check_site, load_site
from inventory.survey.measure import measure_survey

RNG = np.random.default_rng(3)
N = 250


def _vertices():
    v = np.zeros(N, dtype=[("x", "f8"), ("y", "f8"), ("z", "f8"), ("intensity", "u2"),
                           ("red", "u1"), ("green", "u1"), ("blue", "u1")])
    v["x"] = 500000.0 + RNG.uniform(-10, 40, N)
    v["y"] = 5700000.0 + RNG.uniform(-10, 10, N)
    v["z"] = 10.0 + RNG.uniform(0, 4, N)
    v["intensity"] = RNG.integers(0, 65536, N)
    for c in ("red", "green", "blue"):
        v[c] = RNG.integers(0, 256, N)
    return v


def _ply_header(fmt: str, n: int, extra_before: str = "") -> bytes:
    return (f"ply\nformat {fmt} 1.0\ncomment written by hand for a test\n{extra_before}element vertex {n}\n"
            "property double x\nproperty double y\nproperty double z\nproperty ushort intensity\n"
            "property uchar red\nproperty uchar green\nproperty uchar blue\n"
            "element face 1\nproperty list uchar int vertex_indices\nend_header\n").encode()


def _write_ply(path, v, fmt="binary_little_endian"):
    if fmt == "ascii":
        body = "".join(f"{float(r['x'])!r} {float(r['y'])!r} {float(r['z'])!r} {r['intensity']} {r['red']} {r['green']} {r['blue']}\n"
                       for r in v).encode() + b"3 0 1 2\n"
    else:
        order = "<" if fmt == "binary_little_endian" else ">"
        body = v.astype(v.dtype.newbyteorder(order)).tobytes() + np.array([3], "u1").tobytes() + \
            np.array([0, 1, 2], order + "i4").tobytes()
    path.write_bytes(_ply_header(fmt, len(v)) + body)
    return path


@pytest.mark.parametrize("fmt", ["binary_little_endian", "binary_big_endian", "ascii"])
def test_ply_formats_read_alike(tmp_path, fmt):
    v = _vertices()
    path = _write_ply(tmp_path / "photo.ply", v, fmt)
    (tmp_path / "photo.prj").write_text("EPSG:25832\n")
    with open_cloud(path, chunk_size=100) as cloud:
        assert cloud.count == N and cloud.has_colour and cloud.crs.to_epsg() == 25832
        assert cloud.crs_source == "photo.prj"
        chunks = list(cloud.chunks())
        np.testing.assert_allclose(cloud.mins, [v["x"].min(), v["y"].min(), v["z"].min()])
    assert [len(c) for c in chunks] == [100, 100, 50]
    pts = np.concatenate(chunks)
    np.testing.assert_array_equal(pts["X"], v["x"])
    np.testing.assert_array_equal(pts["Z"], v["z"])
    np.testing.assert_array_equal(pts["Intensity"], v["intensity"])        # ushort: already 16-bit
    np.testing.assert_array_equal(pts["Red"], v["red"].astype(int) * 257)  # uchar 255 -> 65535


def test_truncated_and_broken_ply(tmp_path):
    v = _vertices()
    path = _write_ply(tmp_path / "cut.ply", v)
    data = path.read_bytes()
    path.write_bytes(data[: len(data) - 40 * 33])
    with pytest.raises(InputError) as err:
        open_cloud(path)
    assert str(err.value).startswith(f"{path}: truncated: the header says 250 vertices but the file has room for ")
    path.write_bytes(b"ply\nformat ascii 1.0\nelement vertex 2\nproperty float x\nproperty float y\nend_header\n1 2\n3 4\n")
    with pytest.raises(InputError, match="PLY vertices have no 'z' property"):
        open_cloud(path)
    path.write_bytes(b"ply\nformat ascii 1.0\nelement vertex 2\nproperty float x\nproperty float y\n"
                     b"property float z\nend_header\n1 2 3\n3 4\n")
    with pytest.raises(InputError) as err:
        read_cloud(path)
    assert str(err.value) == f"{path} line 9: columns: expected 3 values, found 2"


def test_text_clouds(tmp_path):
    v = _vertices()[:20]
    (tmp_path / "crs.prj").write_text("EPSG:25832")
    seven = tmp_path / "seven.xyz"
    seven.write_text("# exported\n" + "".join(f"{r['x']:.3f} {r['y']:.3f} {r['z']:.3f} {r['intensity']} "
                                              f"{r['red']} {r['green']} {r['blue']}\n" for r in v))
    pts, crs = read_cloud(seven)
    assert crs.to_epsg() == 25832
    np.testing.assert_allclose(pts["X"], np.round(v["x"], 3))
    np.testing.assert_array_equal(pts["Intensity"], v["intensity"])
    np.testing.assert_array_equal(pts["Blue"], v["blue"].astype(int) * 257)
    header = tmp_path / "named.txt"
    header.write_text("X,Y,Z,Red,Green,Blue\n" + "".join(f"{r['x']},{r['y']},{r['z']},{r['red']},{r['green']},"
                                                       f"{r['blue']}\n" for r in v))
    pts, _ = read_cloud(header)
    np.testing.assert_array_equal(pts["Y"], v["y"])
    assert not pts["Intensity"].any() and (pts["Green"] == v["green"].astype(int) * 257).all()
    three = tmp_path / "three.txt"
    three.write_text("1;2;3\n4;5;6\n")
    pts, _ = read_cloud(three)
    assert pts["Z"].tolist() == [3.0, 6.0]


def test_bad_text_lines_are_named(tmp_path):
    path = tmp_path / "bad.xyz"
    path.write_text("1 2 3 10 0 0 0\n1 2 3 10 300 0 0\n")
    with pytest.raises(InputError) as err:
        read_cloud(path)
    assert str(err.value) == f"{path} line 2: r: colour 300 outside 0-255 (8-bit)"
    path.write_text("1 2 3\n\n1 2 x\n")
    with pytest.raises(InputError) as err:
        read_cloud(path)
    assert str(err.value) == f"{path} line 3: z: not a number: 'x'"
    path.write_text("1 2 3 4 5\n")
    with pytest.raises(InputError, match="line 1: 5 columns; expected x y z"):
        open_cloud(path)


def test_ply_without_crs_is_refused_and_nothing_written(good_site, tmp_path):
    folder = good_site / "surveys" / "2026-10-31"
    _write_ply(folder / "drone.ply", _vertices())
    errors = [str(e) for e in check_site(good_site).errors]
    assert errors == ["site/surveys/2026-10-31/drone.ply: crs: carries no CRS: give it in drone.prj or crs.prj "
                      "beside it, a pose in stations.csv, control points in control.csv, or [survey] default_crs "
                      "in site.toml"]
    # given the CRS the site loads; without it again, the survey step refuses before writing
    (folder / "drone.prj").write_text("EPSG:25832")
    site = load_site(good_site)
    assert [p.name for p in site.surveys["2026-10-31"].files] == ["a.laz", "drone.ply"]
    (folder / "drone.prj").unlink()
    out = tmp_path / "out"
    with pytest.raises(CRSError) as err:
        measure_survey(site, "2026-10-31", out_dir=out)
    assert str(err.value).startswith(f"{folder / 'drone.ply'}: crs: a PLY file carries no CRS: give it in drone.prj")
    assert not out.exists()
