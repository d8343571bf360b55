"""Damaged deliveries of a survey: text (.xyz) and PLY clouds with their .prj CRS files, E57
files cut short or altered, stations.csv ``scan`` rows and control.csv.

Each case breaks one thing in the small valid site and runs ``inventory check`` through
:func:`inventory.cli.main`: exit 2, exactly one ``error:`` line naming the file, the line (or
vertex) and the field, no traceback, and the site folder byte-identical afterwards.
"""

from __future__ import annotations

from pathlib import Path

import laspy
import numpy as np
import pyproj
import pytest

from inventory.cli import main

SURVEY = Path("surveys") / "2026-10-31"
S = "site/surveys/2026-10-31"
TIME = "2026-10-31T15:00:00+01:00"
STATIONS = "file,station_id,time,x,y,z,roll_deg,pitch_deg,yaw_deg\na.laz,S1,2026-10-31T15:00:00+01:00,,,,,,\n"

# 60 points over both piles of the small site (pile A at x 500,000, pile B at x 500,030)
_rng = np.random.default_rng(2)
POINTS = np.c_[499985 + _rng.uniform(0, 60, 60), 5699985 + _rng.uniform(0, 30, 60), 10 + _rng.uniform(0, 5, 60)]
N = len(POINTS)
XYZ = "".join(f"{x:.3f} {y:.3f} {z:.3f}\n" for x, y, z in POINTS)
PRJ = pyproj.CRS("EPSG:25832").to_wkt("WKT1_ESRI")


def ply(points=POINTS, *, count: int | None = None, binary: bool = False) -> bytes:
    fmt = "binary_little_endian" if binary else "ascii"
    head = (f"ply\nformat {fmt} 1.0\nelement vertex {len(points) if count is None else count}\n"
            "property double x\nproperty double y\nproperty double z\nend_header\n").encode()
    if binary:
        return head + np.asarray(points, "<f8").tobytes()
    return head + "".join(f"{x} {y} {z}\n" for x, y, z in points).encode()


def deliver(site: Path, name: str, data: bytes | str, prj: bytes | str | None = PRJ) -> None:
    """Put a cloud file (and crs.prj) in the survey and list it in stations.csv."""
    folder = site / SURVEY
    (folder / name).write_bytes(data if isinstance(data, bytes) else data.encode())
    if prj is not None:
        (folder / "crs.prj").write_bytes(prj if isinstance(prj, bytes) else prj.encode())
    (folder / "stations.csv").write_text(STATIONS + f"{name},S2,{TIME},,,,,,\n")


def with_point(points: np.ndarray, value: float) -> np.ndarray:
    return np.r_[points, [[value, 5700000.0, 12.0]]]


HEADER_END = ply().index(b"end_header") + len(b"end_header\n")

# ----------------------------------------------------------------------------- text and PLY clouds
CLOUDS = {
    "xyz-header-alone": ("b.xyz", "x y z\n", None,
                         f"error: {S}/b.xyz line 1: no point in the file (a header line alone)"),
    "xyz-empty": ("b.xyz", "", None, f"error: {S}/b.xyz: no point in the file"),
    "xyz-text-in-z": ("b.xyz", XYZ + "1 2 abc\n", None, f"error: {S}/b.xyz line 61: z: not a number: 'abc'"),
    "xyz-nan": ("b.xyz", XYZ + "nan 2 3\n", None, f"error: {S}/b.xyz line 61: x: a coordinate is not a finite number"),
    "xyz-inf-in-y": ("b.xyz", XYZ + "1 -inf 3\n", None,
                     f"error: {S}/b.xyz line 61: y: a coordinate is not a finite number"),
    "xyz-overflow": ("b.xyz", XYZ + "1 2 1e400\n", None,
                     f"error: {S}/b.xyz line 61: z: a coordinate is not a finite number"),
    "xyz-short-line": ("b.xyz", XYZ + "1 2\n", None, f"error: {S}/b.xyz line 61: columns: expected 3 values, found 2"),
    "xyz-not-utf8": ("b.xyz", XYZ.encode() + b"1 2 \xe9\n", None, f"error: {S}/b.xyz: not a text file (not UTF-8)"),
    "xyz-header-without-z": ("b.xyz", "x y intensity\n" + XYZ, None,
                             f"error: {S}/b.xyz line 1: the header has no column 'z'"),
    "xyz-colour-above-255": ("b.xyz", "".join(f"{x} {y} {z} 300 0 0\n" for x, y, z in POINTS), None,
                             f"error: {S}/b.xyz line 1: r: colour 300 outside 0-255 (8-bit)"),
    "ply-empty": ("b.ply", b"", None, f"error: {S}/b.ply: not a PLY file (it does not start with 'ply')"),
    "ply-header-alone": ("b.ply", ply()[:HEADER_END], None,
                         f"error: {S}/b.ply line 8: truncated: the header says {N} vertices but the file ends after 0"),
    "ply-header-cut": ("b.ply", ply()[:30], None, f"error: {S}/b.ply line 3: not a PLY header line: 'element v'"),
    "ply-count-too-high": ("b.ply", ply(count=N + 5), None,
                           f"error: {S}/b.ply line 68: truncated: the header says {N + 5} vertices but the file "
                           f"ends after {N}"),
    "ply-count-too-low": ("b.ply", ply(count=N - 5), None,
                          f"error: {S}/b.ply line 63: the header says {N - 5} vertices but more data follows them: "
                          "the vertex count is wrong or the file is damaged"),
    "ply-binary-count-too-high": ("b.ply", ply(count=N + 5, binary=True), None,
                                  f"error: {S}/b.ply: truncated: the header says {N + 5} vertices but the file has "
                                  f"room for {N}"),
    "ply-binary-count-too-low": ("b.ply", ply(count=N - 5, binary=True), None,
                                 f"error: {S}/b.ply: the header says {N - 5} vertices but 120 byte(s) follow them: "
                                 "the vertex count is wrong or the file is damaged"),   # 5 x 3 doubles
    "ply-negative-count": ("b.ply", ply(count=-3), None, f"error: {S}/b.ply line 3: element: negative element count -3"),
    "ply-zero-count": ("b.ply", ply(count=0)[:HEADER_END - 1], None,
                       f"error: {S}/b.ply: no point in the file (the header says 0 vertices)"),
    "ply-binary-cut-mid-vertex": ("b.ply", ply(binary=True)[:-3], None,
                                  f"error: {S}/b.ply: truncated: the header says {N} vertices but the file has "
                                  f"room for {N - 1}"),
    "ply-short-line": ("b.ply", ply(count=N + 1) + b"1 2\n", None,
                       f"error: {S}/b.ply line 68: columns: expected 3 values, found 2"),
    "ply-nan": ("b.ply", ply(with_point(POINTS, np.nan)), None,
                f"error: {S}/b.ply line 68: x: a coordinate is not a finite number"),
    "ply-binary-inf": ("b.ply", ply(with_point(POINTS, np.inf), binary=True), None,
                       f"error: {S}/b.ply vertex 61: x: a coordinate is not a finite number"),
    "ply-text-after-vertices": ("b.ply", ply() + b"1 2 abc\n", None,
                                f"error: {S}/b.ply line 68: the header says {N} vertices but more data follows them: "
                                "the vertex count is wrong or the file is damaged"),
    "ply-unknown-type": ("b.ply", ply().replace(b"property double z", b"property quad z"), None,
                         f"error: {S}/b.ply line 6: property: unknown property 'quad z'"),
    "ply-no-z": ("b.ply", ply().replace(b"property double z\n", b""), None,
                 f"error: {S}/b.ply: PLY vertices have no 'z' property"),
    "ply-bad-format": ("b.ply", ply().replace(b"ascii", b"binary_middle_endian"), None,
                       f"error: {S}/b.ply: unknown PLY format 'binary_middle_endian'"),
}


@pytest.mark.parametrize("name, data, _, expected", CLOUDS.values(), ids=CLOUDS.keys())
def test_damaged_text_and_ply_clouds(good_site, capsys, name, data, _, expected, refused_once):
    deliver(good_site, name, data)
    assert refused_once(good_site, capsys) == expected


def test_bom_and_crlf_text_and_ply_clouds_are_read(good_site, capsys):
    deliver(good_site, "b.xyz", "\ufeff" + XYZ.replace("\n", "\r\n"))
    (good_site / SURVEY / "c.ply").write_bytes(ply().replace(b"\n", b"\r\n"))
    (good_site / SURVEY / "stations.csv").write_text(STATIONS + f"b.xyz,S2,{TIME},,,,,,\nc.ply,S3,{TIME},,,,,,\n")
    assert main(["check", str(good_site)]) == 0, capsys.readouterr().err


# ----------------------------------------------------------------------------- CRS files
PRJS = {
    "garbage": ("hello world", f"error: {S}/crs.prj: crs: not a known coordinate reference system: 'hello world' "
                               "(Invalid projection: hello world: (Internal Proj Error: proj_create: unrecognized "
                               "format / unknown name))"),
    "empty": ("", f"error: {S}/crs.prj: crs: not a known coordinate reference system: '' (Invalid projection: : "
                  "(Internal Proj Error: proj_create: unrecognized format / unknown name))"),
    "latin-1": (b'PROJCS["\xe9"]', f"error: {S}/crs.prj: crs: not UTF-8 text (a .prj file holds the CRS as WKT text)"),
    "binary": (bytes(range(256)), f"error: {S}/crs.prj: crs: not UTF-8 text (a .prj file holds the CRS as WKT text)"),
}


@pytest.mark.parametrize("prj, expected", PRJS.values(), ids=PRJS.keys())
def test_damaged_crs_files_are_named_themselves(good_site, capsys, prj, expected, refused_once):
    deliver(good_site, "b.xyz", XYZ, prj=prj)
    assert refused_once(good_site, capsys) == expected


def test_cut_crs_file(good_site, capsys, refused_once):
    deliver(good_site, "b.xyz", XYZ, prj=PRJ[:40])
    line = refused_once(good_site, capsys)
    assert line.startswith(f"error: {S}/crs.prj: crs: not a known coordinate reference system: "
                           "'PROJCS[\"ETRS_1989_UTM_Zone_32N\",GEOGCS[\"'")


def test_text_cloud_without_crs(good_site, capsys, refused_once):
    deliver(good_site, "b.xyz", XYZ, prj=None)
    assert refused_once(good_site, capsys) == (
        f"error: {S}/b.xyz: crs: carries no CRS: give it in b.prj or crs.prj beside it, a pose in stations.csv, "
        "control points in control.csv, or [survey] default_crs in site.toml")


def test_a_close_refuses_a_damaged_ply_before_writing(good_site, capsys, refused_once):
    deliver(good_site, "b.ply", ply(with_point(POINTS, np.inf), binary=True))
    line = refused_once(good_site, capsys, ["close", str(good_site), "--period", "2026-10"])
    assert line == f"error: {S}/b.ply vertex 61: x: a coordinate is not a finite number"


# ----------------------------------------------------------------------------- E57 cut and altered
@pytest.fixture(scope="module")
def e57_bytes(write_e57, tmp_path_factory) -> bytes:
    path = tmp_path_factory.mktemp("e57") / "ok.e57"
    write_e57(path, [{"xyz": POINTS, "pose": ((1, 0, 0, 0), (0, 0, 0)), "name": "s1"}],
              coordinate_metadata=pyproj.CRS("EPSG:25832").to_wkt())
    return path.read_bytes()


E57_WHY = {"read": "read() failed (ErrorReadFailed)",
           "length": "size in file header not same as actual (ErrorBadFileLength)",
           "checksum": "checksum mismatch, file is corrupted (ErrorBadChecksum)"}


def test_whole_e57_is_read(good_site, capsys, e57_bytes):
    deliver(good_site, "b.e57", e57_bytes, prj=None)
    assert main(["check", str(good_site)]) == 0, capsys.readouterr().err


# libE57Format's own reasons (pye57); a cut inside the first page fails on reading it, a later
# cut on the file length the header states
@pytest.mark.parametrize("fraction, why", [(0.01, "read"), (0.1, "read"), (0.3, "length"), (0.5, "length"),
                                           (0.9, "length"), (0.99, "length")])
def test_cut_e57(good_site, capsys, e57_bytes, fraction, why, refused_once):
    deliver(good_site, "b.e57", e57_bytes[:int(len(e57_bytes) * fraction)], prj=None)
    assert refused_once(good_site, capsys) == (
        f"error: {S}/b.e57: not a readable E57 file, truncated or damaged ({E57_WHY[why]})")


def test_e57_with_one_byte_flipped(good_site, capsys, e57_bytes, refused_once):
    k = len(e57_bytes) // 2
    deliver(good_site, "b.e57", e57_bytes[:k] + bytes([e57_bytes[k] ^ 0xFF]) + e57_bytes[k + 1:], prj=None)
    assert refused_once(good_site, capsys) == (
        f"error: {S}/b.e57: not a readable E57 file, truncated or damaged ({E57_WHY['checksum']})")


@pytest.mark.parametrize("scan, expected", [
    ({"xyz": np.zeros((0, 3))}, "no point in the file"),
    ({"xyz": POINTS, "invalid": np.full(N, 2)}, f"no valid point in the file ({N} point(s), each flagged invalid or "
                                                "not a finite number)"),
    ({"xyz": POINTS, "pose": ((0, 0, 0, 0), (0, 0, 0))},
     "damaged E57 structure (scan 1: its pose is not a rotation quaternion and a translation ([0.0, 0.0, 0.0, 0.0], "
     "[0.0, 0.0, 0.0]))"),
], ids=["no-point", "every-point-invalid", "zero-quaternion"])
def test_e57_without_usable_points_or_pose(good_site, capsys, write_e57, tmp_path, scan, expected, refused_once):
    path = write_e57(tmp_path / "b.e57", [{"pose": ((1, 0, 0, 0), (0, 0, 0)), **scan}],
                     coordinate_metadata=pyproj.CRS("EPSG:25832").to_wkt())
    deliver(good_site, "b.e57", path.read_bytes(), prj=None)
    assert refused_once(good_site, capsys) == f"error: {S}/b.e57: {expected}"


# ----------------------------------------------------------------------------- stations.csv scan rows
@pytest.fixture(scope="module")
def two_scans(write_e57, tmp_path_factory) -> bytes:
    """An E57 file of two scans ('north', 'south') in a local frame, without poses."""
    path = tmp_path_factory.mktemp("e57") / "two.e57"
    local = POINTS - [499985, 5699985, 0]
    write_e57(path, [{"xyz": local, "pose": None, "name": "north"}, {"xyz": local, "pose": None, "name": "south"}])
    return path.read_bytes()


SCAN_HEAD = "file,scan,station_id,time,x,y,z,roll_deg,pitch_deg,yaw_deg\na.laz,,S1,2026-10-31T15:00:00+01:00,,,,,,\n"
POSE = "499985,5699985,0,0,0,0"
SCANS = {
    "by-number": (f"two.e57,1,S2,{TIME},{POSE}\ntwo.e57,2,S3,{TIME},{POSE}\n", None),
    "by-name": (f"two.e57,north,S2,{TIME},{POSE}\ntwo.e57,south,S3,{TIME},{POSE}\n", None),
    "scan-0": (f"two.e57,0,S2,{TIME},{POSE}\ntwo.e57,2,S3,{TIME},{POSE}\n",
               f"error: {S}/stations.csv line 3: scan: two.e57 has no scan '0' (numbers 1-2 or names)"),
    "scan-3": (f"two.e57,1,S2,{TIME},{POSE}\ntwo.e57,3,S3,{TIME},{POSE}\n",
               f"error: {S}/stations.csv line 4: scan: two.e57 has no scan '3' (numbers 1-2 or names)"),
    "scan-fraction": (f"two.e57,1,S2,{TIME},{POSE}\ntwo.e57,1.5,S3,{TIME},{POSE}\n",
                      f"error: {S}/stations.csv line 4: scan: two.e57 has no scan '1.5' (numbers 1-2 or names)"),
    "unknown-name": (f"two.e57,1,S2,{TIME},{POSE}\ntwo.e57,west,S3,{TIME},{POSE}\n",
                     f"error: {S}/stations.csv line 4: scan: two.e57 has no scan 'west' (numbers 1-2 or names)"),
    "same-number-twice": (f"two.e57,1,S2,{TIME},{POSE}\ntwo.e57,1,S3,{TIME},{POSE}\n",
                          f"error: {S}/stations.csv line 4: scan: scan '1' of two.e57 is listed twice (first on line 3)"),
    "number-and-name-of-one-scan": (f"two.e57,1,S2,{TIME},{POSE}\ntwo.e57,north,S3,{TIME},{POSE}\n",
                                    f"error: {S}/stations.csv line 4: scan: 'north' is scan 1 of two.e57, already "
                                    "given on line 3"),
    "scan-on-a-las-file": (f"two.e57,1,S2,{TIME},{POSE}\ntwo.e57,2,S3,{TIME},{POSE}\na.laz,1,S4,{TIME},1,1,1,0,0,0\n",
                           f"error: {S}/stations.csv line 5: scan: a scan is named for E57 files only"),
    "blank-pose-no-own-pose": (f"two.e57,1,S2,{TIME},,,,,,\ntwo.e57,2,S3,{TIME},{POSE}\n",
                               f"error: {S}/two.e57: pose: scan 1 'north' has no pose (ASTM E2807 data3D pose); give "
                               "it one in stations.csv (file two.e57, scan 1)"),
    "partial-pose": (f"two.e57,1,S2,{TIME},499985,,0,0,0,0\ntwo.e57,2,S3,{TIME},{POSE}\n",
                     f"error: {S}/stations.csv line 3: y: a station pose needs all of x, y, z, roll_deg, pitch_deg, "
                     "yaw_deg"),
    "nan-pose": (f"two.e57,1,S2,{TIME},nan,5699985,0,0,0,0\ntwo.e57,2,S3,{TIME},{POSE}\n",
                 f"error: {S}/stations.csv line 3: x: 'nan' is not a finite number"),
    "one-scan-posed": (f"two.e57,1,S2,{TIME},{POSE}\n",
                       f"error: {S}/two.e57: pose: scan 2 'south' has no pose (ASTM E2807 data3D pose); give it one "
                       "in stations.csv (file two.e57, scan 2)"),
}


@pytest.mark.parametrize("rows, expected", SCANS.values(), ids=SCANS.keys())
def test_stations_scan_rows(good_site, capsys, two_scans, rows, expected, refused_once):
    (good_site / SURVEY / "two.e57").write_bytes(two_scans)
    (good_site / SURVEY / "stations.csv").write_text(SCAN_HEAD + rows)
    if expected is None:
        assert main(["check", str(good_site)]) == 0, capsys.readouterr().err
    else:
        assert refused_once(good_site, capsys) == expected


# ----------------------------------------------------------------------------- control.csv
# The survey's own frame is the site shifted by (499985, 5699985, 0): a.laz is moved there and
# control.csv registers it back.
SHIFT = (499985.0, 5699985.0, 0.0)
MARKS = [("A", 0, 0, 10), ("B", 40, 0, 10), ("C", 0, 20, 11), ("D", 40, 20, 10)]


def control(marks=MARKS, *, survey_scale: float = 1.0, site_scale: float = 1.0, head="point_id,x,y,z,e,n,h",
            extra: str = "") -> str:
    rows = [head] + [f"{p},{x * survey_scale},{y * survey_scale},{z * survey_scale},"
                     f"{(x + SHIFT[0]) * site_scale},{(y + SHIFT[1]) * site_scale},{(z + SHIFT[2]) * site_scale}{extra}"
                     for p, x, y, z in marks]
    return "\n".join(rows) + "\n"


def to_survey_frame(site: Path) -> None:
    las = laspy.read(site / SURVEY / "a.laz")
    header = laspy.LasHeader(point_format=6, version="1.4")
    header.scales, header.offsets = [0.001] * 3, [0, 0, 0]
    moved = laspy.LasData(header)
    moved.x, moved.y, moved.z = las.x - SHIFT[0], las.y - SHIFT[1], las.z
    moved.write(site / SURVEY / "a.laz")


C = f"{S}/control.csv"
SCALE_WHY = ("not near 1 (at most 1% off): the survey-frame x, y, z and the site e, n, h are in different units "
             "(millimetres, feet?) or columns are swapped")
CONTROLS = {
    "good": (control(), None),
    "bom-and-crlf": ("\ufeff" + control().replace("\n", "\r\n"), None),
    "empty": ("", f"error: {C} line 1: the file is empty (expected a header line)"),
    "header-alone": ("point_id,x,y,z,e,n,h\n", f"error: {C} line 2: the table has a header but no rows"),
    "two-points": (control(MARKS[:2]),
                   f"error: {C}: 2 usable control point(s); at least 3 are needed to register the survey"),
    "collinear": (control([("A", 0, 0, 10), ("B", 10, 0, 10), ("C", 20, 0, 10), ("D", 30, 0, 10)]),
                  f"error: {C}: x, y, z: the control points cannot fix a 7-parameter transform: the points lie on "
                  "one line; the rotation about it is undetermined"),
    "one-mark-twice": (control([("A", 0, 0, 10), ("A2", 0, 0, 10), ("B", 40, 0, 10), ("C", 0, 20, 11)]),
                       f"error: {C} line 3: x, y, z: A2 is at the survey-frame position of A (line 2): one mark "
                       "entered twice"),
    "duplicate-id": (control([("A", 0, 0, 10), ("A", 40, 0, 10), ("C", 0, 20, 11), ("D", 40, 20, 10)]),
                     f"error: {C} line 3: point_id: 'A' repeats line 2"),
    "site-in-millimetres": (control(site_scale=1000.0), f"error: {C}: x, y, z, e, n, h: the fitted scale is "
                                                        f"1000, {SCALE_WHY}"),
    "survey-in-millimetres": (control(survey_scale=1000.0), f"error: {C}: x, y, z, e, n, h: the fitted scale is "
                                                            f"0.001, {SCALE_WHY}"),
    "survey-in-feet": (control(survey_scale=1 / 0.3048), f"error: {C}: x, y, z, e, n, h: the fitted scale is "
                                                         f"0.3048, {SCALE_WHY}"),   # 1 ft = 0.3048 m exactly
    "e-and-n-swapped": ("point_id,x,y,z,e,n,h\n" + "".join(
        f"{p},{x},{y},{z},{y + SHIFT[1]},{x + SHIFT[0]},{z}\n" for p, x, y, z in MARKS),
        f"error: {C} line 3: e, n, h: control points disagree: 7-parameter fit RMS 0.500 m exceeds the tolerance "
        "0.050 m ([survey] control_rms_max_m); largest residual at B: 0.500 m"),
    "text-number": (control().replace("40.0,0.0,10.0,", "forty,0.0,10.0,", 1), f"error: {C} line 3: x: 'forty' is not a number"),
    "nan": (control().replace("40.0,0.0,10.0,", "nan,0.0,10.0,", 1), f"error: {C} line 3: x: 'nan' is not a finite number"),
    # 1e10 is beyond any coordinate on the Earth, even in millimetres (mixed units meet the scale check)
    "huge": (control().replace("40.0,0.0,10.0,", "1e300,0.0,10.0,", 1), f"error: {C} line 3: x: 1e+300 is above the "
                                                                         "maximum 1e+10"),
    "missing-column": (control(head="point_id,x,y,z,e,n,hh"), f"error: {C} line 1: h: required column is missing"),
    "sigma-zero-on-one": (control(head="point_id,x,y,z,e,n,h,sigma_m", extra=",0.01").replace(",0.01\n", ",0\n", 1),
                          f"error: {C} line 2: sigma_m: 0 must be greater than 0"),
    "sigma-far-from-the-others": (
        control(head="point_id,x,y,z,e,n,h,sigma_m", extra=",0.01").replace(",0.01\n", ",1e-300\n", 1),
        f"error: {C} line 2: sigma_m: 1e-300 m is too far from the other points' sigma (median 0.01 m) to weight "
        "the fit"),
    "latin-1": (None, f"error: {C} line 2: not UTF-8 text (byte 0xc4); save the file as UTF-8"),
    "semicolons": (control().replace(",", ";"),
                   f"error: {C} line 1: the file seems to use ';' between values; the tool needs ',' between values "
                   "(and '.' for decimals): save it as comma-separated CSV"),
}


@pytest.mark.parametrize("text, expected", CONTROLS.values(), ids=CONTROLS.keys())
def test_damaged_control(good_site, capsys, text, expected, refused_once):
    to_survey_frame(good_site)
    path = good_site / SURVEY / "control.csv"
    if text is None:
        path.write_bytes(control().replace("A,", "\xc4,").encode("latin-1"))
    else:
        path.write_text(text, encoding="utf-8", newline="")
    if expected is None:
        assert main(["check", str(good_site)]) == 0, capsys.readouterr().err
    else:
        assert refused_once(good_site, capsys) == expected


def test_a_close_refuses_control_in_other_units_before_writing(good_site, capsys, refused_once):
    to_survey_frame(good_site)
    (good_site / SURVEY / "control.csv").write_text(control(survey_scale=1 / 0.3048))
    line = refused_once(good_site, capsys, ["close", str(good_site), "--period", "2026-10"])
    assert line == f"error: {C}: x, y, z, e, n, h: the fitted scale is 0.3048, {SCALE_WHY}"
