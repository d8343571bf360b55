"""Damaged point cloud files: a LAZ or LAS cut at some byte, a header whose point count
disagrees with the points the file holds, header scale factors, offsets or bounds that cannot
place the points. ``inventory check`` names the file from its header,
chunk table and size alone; the survey step turns a decoding failure into the same input
error; nothing is written."""

from __future__ import annotations

import hashlib
import struct
from pathlib import Path

import laspy
import numpy as np
import pytest

from inventory.cli import main
from inventory.errors import InputError
from inventory.io.cloudcheck import inspect_cloud
from inventory.io.clouds import empty_points, open_cloud, read_cloud, write_cloud

SURVEY = Path("surveys") / "2026-10-31"


def snapshot(root: Path) -> dict[str, str]:
    """Every file under ``root`` by relative path, with the SHA-256 of its bytes."""
    return {str(p.relative_to(root)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(root.rglob("*")) if p.is_file()}


def big_cloud(path: Path, n: int = 120_000) -> Path:
    """A LAZ (or LAS) over the small site's two piles with ``n`` points: three LAZ chunks of
    the compressor's 50,000 points."""
    rng = np.random.default_rng(3)
    pts = empty_points(n)
    pts["X"] = 499985.0 + rng.uniform(0, 60, n)
    pts["Y"] = 5699985.0 + rng.uniform(0, 30, n)
    pts["Z"] = 10.0 + rng.uniform(0, 5, n)
    return write_cloud(path, pts, "EPSG:25832")


def cut(path: Path, at: int) -> None:
    data = path.read_bytes()
    path.write_bytes(data[:at])


def header_of(path: Path) -> laspy.LasHeader:
    with laspy.open(path) as reader:
        return reader.header


@pytest.mark.parametrize("where", ["half", "last byte", "first chunk"])
def test_truncated_laz_is_named_by_check_and_close(good_site, capsys, where):
    cloud = big_cloud(good_site / SURVEY / "a.laz")
    size = cloud.stat().st_size
    start = header_of(cloud).offset_to_point_data
    at = {"half": size // 2, "last byte": size - 1, "first chunk": start + 100}[where]
    cut(cloud, at)
    before = snapshot(good_site)
    assert main(["check", str(good_site)]) == 2
    err = capsys.readouterr().err
    line = next(x for x in err.splitlines() if "a.laz" in x)
    assert line.startswith("error: site/surveys/2026-10-31/a.laz: unreadable point cloud (truncated")
    assert f"has {at:,} bytes" in line or "chunk table cannot be read" in line
    assert main(["close", str(good_site), "--period", "2026-10"]) == 2
    assert "site/surveys/2026-10-31/a.laz: unreadable point cloud (truncated" in capsys.readouterr().err
    assert snapshot(good_site) == before


def test_truncated_laz_names_the_chunk_table(tmp_path):
    cloud = big_cloud(tmp_path / "scan.laz")
    size = cloud.stat().st_size
    table_at = struct.unpack("<q", cloud.read_bytes()[header_of(cloud).offset_to_point_data:][:8])[0]
    cut(cloud, size // 2)
    info = inspect_cloud(cloud)
    assert info.error == (f"truncated or damaged: its chunk table should start at byte {table_at:,} "
                          f"but the file has {size // 2:,} bytes")


def test_truncated_las_names_both_counts(good_site, capsys):
    cloud = big_cloud(good_site / SURVEY / "a.las", n=1000)
    (good_site / SURVEY / "a.laz").unlink()
    (good_site / SURVEY / "stations.csv").write_text(
        (good_site / SURVEY / "stations.csv").read_text().replace("a.laz", "a.las"))
    head = header_of(cloud)
    record, start = head.point_format.size, head.offset_to_point_data
    # laspy alone reads the 900 whole records left without a word
    cut(cloud, start + 900 * record)
    with laspy.open(cloud) as reader:
        assert sum(len(c) for c in reader.chunk_iterator(400)) == 900
    before = snapshot(good_site)
    assert main(["check", str(good_site)]) == 2
    err = capsys.readouterr().err
    assert (f"error: site/surveys/2026-10-31/a.las: unreadable point cloud (truncated or damaged: the header "
            f"says 1,000 points ({start + 1000 * record:,} bytes with the header) but the file has "
            f"{start + 900 * record:,} bytes, room for 900 points)") in err
    assert main(["close", str(good_site), "--period", "2026-10"]) == 2
    assert snapshot(good_site) == before


def test_las_with_more_points_than_its_header(good_site, capsys):
    """An unfinished LAS writer leaves the header's count behind the records it appended."""
    cloud = big_cloud(good_site / SURVEY / "a.las", n=1000)
    (good_site / SURVEY / "a.laz").unlink()
    (good_site / SURVEY / "stations.csv").write_text(
        (good_site / SURVEY / "stations.csv").read_text().replace("a.laz", "a.las"))
    data = bytearray(cloud.read_bytes())
    # LAS 1.4 R15 table 3: legacy point count (uint32) at byte 107, point count (uint64) at 247
    struct.pack_into("<I", data, 107, 600)
    struct.pack_into("<Q", data, 247, 600)
    cloud.write_bytes(bytes(data))
    assert header_of(cloud).point_count == 600
    assert main(["check", str(good_site)]) == 2
    assert ("site/surveys/2026-10-31/a.las: unreadable point cloud (damaged header: the header says 600 points "
            "but the file holds 1,000 point records)") in capsys.readouterr().err


def test_laz_header_count_disagreeing_with_its_chunks(tmp_path):
    cloud = big_cloud(tmp_path / "scan.laz")
    data = bytearray(cloud.read_bytes())
    struct.pack_into("<I", data, 107, 180_000)
    struct.pack_into("<Q", data, 247, 180_000)
    cloud.write_bytes(bytes(data))
    assert inspect_cloud(cloud).error == ("damaged header: the header says 180,000 points but the file's "
                                          "chunks hold between 100,001 and 150,000")
    with pytest.raises(InputError, match="damaged header: the header says 180,000 points"):
        open_cloud(cloud)


def test_reader_turns_a_decoding_failure_into_an_input_error(tmp_path, monkeypatch):
    """A file damaged where no header, size or chunk table shows it (simulated by switching
    the cheap check off) fails in the reader with the file's name, not the decoder's error."""
    from inventory.io import clouds

    cloud = big_cloud(tmp_path / "scan.laz")
    cut(cloud, cloud.stat().st_size // 2)
    monkeypatch.setattr(clouds, "size_problem", lambda path, header: None)
    with pytest.raises(InputError) as caught:
        read_cloud(cloud, chunk_size=20_000)
    assert caught.value.path == str(cloud)
    assert caught.value.why.startswith("truncated or damaged: decoding failed after ")
    assert "of 120,000 points" in caught.value.why


def test_reader_counts_a_short_las(tmp_path, monkeypatch):
    from inventory.io import clouds

    cloud = big_cloud(tmp_path / "scan.las", n=1000)
    head = header_of(cloud)
    cut(cloud, head.offset_to_point_data + 700 * head.point_format.size)
    monkeypatch.setattr(clouds, "size_problem", lambda path, header: None)
    with pytest.raises(InputError, match="the header says 1,000 points but only 700 could be read"):
        read_cloud(cloud, chunk_size=300)


def test_measure_survey_refuses_a_file_damaged_after_loading(good_site):
    """The site was checked, then a file changed under it: the survey step names the file."""
    from inventory.site.load import load_site
    from inventory.survey.measure import measure_survey

    cloud = big_cloud(good_site / SURVEY / "a.laz")
    site = load_site(good_site)
    cut(cloud, cloud.stat().st_size // 2)
    with pytest.raises(InputError) as caught:
        measure_survey(site, "2026-10-31")
    assert caught.value.path == str(cloud)
    assert caught.value.why.startswith("truncated or damaged")


def test_survey_command_exit_code_for_a_truncated_file(good_site, capsys):
    cloud = big_cloud(good_site / SURVEY / "a.laz")
    cut(cloud, cloud.stat().st_size - 3)
    assert main(["survey", str(good_site), "--date", "2026-10-31", "--out", str(good_site.parent / "out")]) == 2
    assert "a.laz: unreadable point cloud (truncated" in capsys.readouterr().err
    assert not (good_site.parent / "out").exists()


def test_intact_files_pass(tmp_path, laspy_data):
    """No false alarm on the laspy samples: LAS 1.0-1.4, LAZ, COPC, extended VLRs, extra
    bytes, and a LAS 1.3 file with waveform packets after its points (simple1_3.las)."""
    names = sorted(p.name for p in laspy_data.iterdir() if p.suffix.lower() in (".las", ".laz"))
    assert "simple1_3.las" in names and "1_4_w_evlr.laz" in names and "simple.copc.laz" in names
    for name in names:
        info = inspect_cloud(laspy_data / name)
        assert info.error is None, (name, info.error)


# ----------------------------------------------------------------------------- header numbers
# Byte offsets in the LAS public header block (ASPRS LAS 1.4 R15, table 3): X, Y, Z scale
# factors at 131, 139, 147; offsets at 155, 163, 171; then Max X, Min X, Max Y, Min Y, Max Z,
# Min Z as doubles from 179.
def patch_header(path: Path, at: int, fmt: str, *values) -> None:
    data = bytearray(path.read_bytes())
    data[at:at + struct.calcsize(fmt)] = struct.pack(fmt, *values)
    path.write_bytes(bytes(data))


A = "error: site/surveys/2026-10-31/a.laz"


@pytest.mark.parametrize("at, fmt, values, expected", [
    # before: checked and surveyed without a word, every point of the file at x = 500000
    (131, "<d", (0.0,), f"{A}: x_scale_factor: unreadable point cloud (scale factor 0.0 in the header: every x would "
                        "be 500000.0)"),
    # before: every point of the file NaN, dropped without a word by the survey
    (163, "<d", (float("nan"),), f"{A}: y_offset: unreadable point cloud (offset nan in the header: every y would "
                                 "be NaN)"),
    (147, "<d", (float("inf"),), f"{A}: z_scale_factor: unreadable point cloud (scale factor inf in the header: "
                                 "every z would be NaN)"),
    # before: a survey grid from 0,0 to the site (about a million GB), refused naming the folder only
    (179, "<6d", (0.0,) * 6, f"{A}: min_x: unreadable point cloud (the header's bounds are all 0 although it holds "
                             "50 points (its writer did not fill them in): rewrite the file with its bounds)"),
])
def test_header_numbers_that_cannot_place_the_points(good_site, capsys, refused_once, write_tiny_cloud,
                                                     at, fmt, values, expected):
    write_tiny_cloud(good_site / SURVEY / "b.laz")   # an intact file beside: the survey stays readable
    patch_header(good_site / SURVEY / "a.laz", at, fmt, *values)
    assert refused_once(good_site, capsys) == expected
    argv = ["survey", str(good_site), "--date", "2026-10-31", "--out", str(good_site.parent / "out")]
    assert refused_once(good_site, capsys, argv) == expected
    assert not (good_site.parent / "out").exists()


def test_header_minimum_above_maximum(good_site, capsys, refused_once, write_tiny_cloud):
    write_tiny_cloud(good_site / SURVEY / "b.laz")
    path = good_site / SURVEY / "a.laz"
    header = header_of(path)
    patch_header(path, 179, "<2d", header.mins[0], header.maxs[0])   # max x and min x swapped
    assert refused_once(good_site, capsys) == (
        f"{A}: min_x: unreadable point cloud (minimum {float(header.maxs[0])} in the header is above the maximum "
        f"{float(header.mins[0])})")
