"""The input contract: every kind of bad input gets a message naming file, line or feature,
and field, and ``inventory check`` writes nothing."""

from __future__ import annotations

import hashlib
import os
import subprocess
import sys
from pathlib import Path

import geopandas as gpd
import pytest
from shapely.geometry import Point, Polygon

from inventory.cli import main
from inventory.errors import InputErrors
from inventory.site.load import check_site, load_site


def errors_of(site: Path) -> list[str]:
    report = check_site(site)
    return [str(p) for p in report.errors]


def warnings_of(site: Path) -> list[str]:
    return [str(p) for p in check_site(site).warnings]


def edit(path: Path, old: str, new: str) -> None:
    text = path.read_text()
    assert old in text, f"test set-up: {old!r} not in {path}"
    path.write_text(text.replace(old, new))


def test_good_site_loads(good_site):
    site = load_site(good_site)
    assert list(site.piles["pile_id"]) == ["A", "B"]
    assert site.materials["coal"].bulk_density_t_m3 == 0.85
    wb = site.movements["2026-10"].weighbridge
    assert list(wb["net_t"]) == [25.0, 24.0]
    assert list(wb["scale_id"]) == ["WB1", "WB1"]  # the one weighbridge fills the blank
    assert str(wb["time"].iloc[0]) == "2026-10-02 06:00:00+00:00"  # stored in UTC
    ref = site.surveys["2026-10-31"]
    assert ref.instant.isoformat() == "2026-10-31T14:00:00+00:00"
    assert ref.point_count == 50
    assert site.survey_for("2026-10") is ref


# --- files and columns --------------------------------------------------------------------
def test_missing_file(good_site):
    (good_site / "materials.csv").unlink()
    assert "site/materials.csv: file not found" in errors_of(good_site)


def test_missing_column(good_site):
    wb = good_site / "movements/2026-10/weighbridge.csv"
    edit(wb, "gross_t,tare_t,", "gross_t,")
    assert "site/movements/2026-10/weighbridge.csv line 1: tare_t: required column is missing" in errors_of(good_site)


def test_wrong_type(good_site):
    wb = good_site / "movements/2026-10/weighbridge.csv"
    edit(wb, "coal,A,40.0,", "coal,A,forty,")
    assert "site/movements/2026-10/weighbridge.csv line 2: gross_t: 'forty' is not a number" in errors_of(good_site)


def test_empty_table(good_site):
    (good_site / "materials.csv").write_text("material,bulk_density_t_m3,density_sd_t_m3,moisture_pct\n")
    assert "site/materials.csv line 2: the table has a header but no rows" in errors_of(good_site)


def test_negative_tonnes(good_site):
    belts = good_site / "movements/2026-10/belt_scales.csv"
    edit(belts, ",500", ",-500")
    assert "site/movements/2026-10/belt_scales.csv line 2: tonnes: -500 is below the minimum 0" in errors_of(good_site)


def test_zero_density(good_site):
    edit(good_site / "materials.csv", "coal,0.85,", "coal,0,")
    assert "site/materials.csv line 2: bulk_density_t_m3: 0 must be greater than 0" in errors_of(good_site)


def test_zero_transfer_tonnes(good_site):
    edit(good_site / "movements/2026-10/transfers.csv", ",30,", ",0,")
    assert "site/movements/2026-10/transfers.csv line 2: tonnes: 0 must be greater than 0" in errors_of(good_site)


# --- weighbridge rules --------------------------------------------------------------------
def test_tare_above_gross(good_site):
    edit(good_site / "movements/2026-10/weighbridge.csv", "40.0,15.0,25.0", "31.0,38.2,")
    assert "site/movements/2026-10/weighbridge.csv line 2: tare_t: tare 38.2 t is above gross 31 t" in errors_of(good_site)


def test_net_not_gross_minus_tare(good_site):
    edit(good_site / "movements/2026-10/weighbridge.csv", "40.0,15.0,25.0", "40.0,15.0,25.5")
    msgs = errors_of(good_site)
    assert ("site/movements/2026-10/weighbridge.csv line 2: net_t: net 25.5 t is not gross 40 - tare 15 = 25.000 t "
            "(off by 0.5 t; rounding explains at most 0.01 t)") in msgs


def test_net_within_rounding_is_accepted(good_site):
    edit(good_site / "movements/2026-10/weighbridge.csv", "40.0,15.0,25.0", "40.004,15.0,25.0")
    assert errors_of(good_site) == []


def test_duplicate_ticket_with_different_content(good_site):
    wb = good_site / "movements/2026-10/weighbridge.csv"
    wb.write_text(wb.read_text() + "T1,2026-10-02T08:00:00+02:00,in,coal,A,41.0,15.0,26.0,XY1\n")
    assert "site/movements/2026-10/weighbridge.csv line 4: ticket: ticket 'T1' repeats line 2 with different content" in errors_of(good_site)


def test_duplicate_ticket_same_content_is_a_warning(good_site):
    # issue 6: a ticket entered twice is counted once and listed, so it is not bad input
    wb = good_site / "movements/2026-10/weighbridge.csv"
    wb.write_text(wb.read_text() + "T1,2026-10-02T08:00:00+02:00,in,coal,A,40.0,15.0,25.0,XY1\n")
    assert errors_of(good_site) == []
    assert "site/movements/2026-10/weighbridge.csv line 4: ticket: ticket 'T1' repeats line 2; it will be counted once" in warnings_of(good_site)


def test_unknown_pile(good_site):
    edit(good_site / "movements/2026-10/weighbridge.csv", "coal,A,", "coal,Z9,")
    assert "site/movements/2026-10/weighbridge.csv line 2: pile_id: unknown pile 'Z9' (not in piles.gpkg)" in errors_of(good_site)


def test_unknown_material(good_site):
    edit(good_site / "movements/2026-10/weighbridge.csv", "in,coal,A", "in,coke,A")
    assert "site/movements/2026-10/weighbridge.csv line 2: material: unknown material 'coke' (not in materials.csv)" in errors_of(good_site)


def test_bad_direction(good_site):
    edit(good_site / "movements/2026-10/weighbridge.csv", "+02:00,in,coal", "+02:00,inn,coal")
    assert "site/movements/2026-10/weighbridge.csv line 2: direction: 'inn' is not one of in, out" in errors_of(good_site)


def test_time_without_offset(good_site):
    edit(good_site / "movements/2026-10/weighbridge.csv", "2026-10-02T08:00:00+02:00", "2026-10-02T08:00:00")
    msgs = errors_of(good_site)
    assert any(m.startswith("site/movements/2026-10/weighbridge.csv line 2: time: '2026-10-02T08:00:00' has no UTC offset") for m in msgs), msgs


# --- belts, routing, transfers --------------------------------------------------------------
def test_belt_interval_end_before_start(good_site):
    (good_site / "movements/2026-10/belt_scales.csv").write_text(
        "scale_id,start,end,tonnes\nB1,2026-10-02T00:00:00+02:00,2026-10-01T00:00:00+02:00,500\n"
    )
    msgs = errors_of(good_site)
    assert any(m.startswith("site/movements/2026-10/belt_scales.csv line 2: end: interval ends") for m in msgs), msgs


def test_unknown_belt_scale(good_site):
    edit(good_site / "movements/2026-10/belt_scales.csv", "\nB1,", "\nB7,")
    assert "site/movements/2026-10/belt_scales.csv line 2: scale_id: unknown belt scale 'B7' (not in site.toml [[scales]])" in errors_of(good_site)


def test_overlapping_routing_windows(good_site):
    (good_site / "movements/2026-10/routing.csv").write_text(
        "scale_id,pile_id,start,end\n"
        "B1,A,2026-10-01T00:00:00+02:00,2026-10-15T00:00:00+02:00\n"
        "B1,B,2026-10-14T00:00:00+02:00,2026-11-01T00:00:00+01:00\n"
    )
    assert ("site/movements/2026-10/routing.csv line 3: start: window of belt 'B1' overlaps line 2: it starts at "
            "2026-10-13T22:00:00+00:00, before that window ends at 2026-10-14T22:00:00+00:00 "
            "(a belt feeds one pile at a time)") in errors_of(good_site)


def test_transfer_to_itself(good_site):
    edit(good_site / "movements/2026-10/transfers.csv", "A,B,", "A,A,")
    assert "site/movements/2026-10/transfers.csv line 2: to_pile: transfer from pile 'A' to itself" in errors_of(good_site)


def test_unknown_pile_in_opening(good_site):
    edit(good_site / "opening.csv", "\nB,500", "\nQ,500")
    assert "site/opening.csv line 3: pile_id: unknown pile 'Q' (not in piles.gpkg)" in errors_of(good_site)


# --- site.toml ------------------------------------------------------------------------------
def test_unknown_crs(good_site):
    edit(good_site / "site.toml", 'crs = "EPSG:25832"', 'crs = "EPSG:999999"')
    msgs = errors_of(good_site)
    assert any(m.startswith("site/site.toml line 2: crs: unknown CRS 'EPSG:999999'") for m in msgs), msgs


def test_geographic_crs_refused_for_volumes(good_site):
    edit(good_site / "site.toml", 'crs = "EPSG:25832"', 'crs = "EPSG:4326"')
    msgs = errors_of(good_site)
    assert any(m.startswith("site/site.toml line 2: crs: EPSG:4326 (WGS 84) is not a projected CRS") for m in msgs), msgs


def test_feet_crs_refused(good_site):
    # EPSG:2994 is NAD83(HARN) / Oregon GIC Lambert in international feet (pyproj database)
    edit(good_site / "site.toml", 'crs = "EPSG:25832"', 'crs = "EPSG:2994"')
    msgs = errors_of(good_site)
    assert any("has axis unit foot; use a CRS in metres" in m for m in msgs), msgs


def test_vertical_reference_default_text_and_crs(good_site):
    toml = good_site / "site.toml"
    assert load_site(good_site).vertical_reference == "as surveyed, metres"
    original = toml.read_text()
    toml.write_text('vertical_reference = "DHHN2016 (NHN),\tmetres"\n' + original)
    assert load_site(good_site).vertical_reference == "DHHN2016 (NHN), metres"
    # a vertical CRS names itself: EPSG:7837 is "DHHN2016 height" in the EPSG database (pyproj)
    toml.write_text('vertical_crs = "EPSG:7837"\n' + original)
    assert load_site(good_site).vertical_reference == "DHHN2016 height (EPSG:7837), metres"


@pytest.mark.parametrize("line, why", [
    ('vertical_crs = "EPSG:25832"', "vertical_crs: EPSG:25832 (ETRS89 / UTM zone 32N) is not a vertical CRS"),
    # EPSG:6360 is NAVD88 height in US survey feet (pyproj database)
    ('vertical_crs = "EPSG:6360"', "vertical_crs: EPSG:6360 (NAVD88 height (ftUS)) has heights in US survey foot"),
    ('vertical_reference = ""', "vertical_reference: '' should be non-empty"),
    ('vertical_reference = 5', "vertical_reference: 5 is not of type 'string'"),
])
def test_bad_vertical_reference_is_named(good_site, line, why):
    toml = good_site / "site.toml"
    toml.write_text(line + "\n" + toml.read_text())
    msgs = errors_of(good_site)
    assert any(m.startswith(f"site/site.toml line 1: {why}") for m in msgs), msgs


def test_missing_required_key(good_site):
    edit(good_site / "site.toml", 'timezone = "Europe/Berlin"\n', "")
    assert "site/site.toml: timezone: required key is missing" in errors_of(good_site)


def test_unknown_key_in_site_toml(good_site):
    edit(good_site / "site.toml", "[grid]\n", "[grid]\ncell = 1\n")
    assert "site/site.toml line 6: grid.cell: unknown key" in errors_of(good_site)


def test_unknown_timezone(good_site):
    edit(good_site / "site.toml", "Europe/Berlin", "Europe/Atlantis")
    assert "site/site.toml line 3: timezone: unknown IANA time zone 'Europe/Atlantis'" in errors_of(good_site)


# --- pile register --------------------------------------------------------------------------
def _rewrite_piles(site: Path, geoms, ids=("A", "B"), materials=("coal", "salt"), bases=("toe", "level:10")):
    frame = gpd.GeoDataFrame(
        {"pile_id": list(ids), "material": list(materials), "base": list(bases)}, geometry=list(geoms), crs="EPSG:25832"
    )
    (site / "piles.gpkg").unlink()
    frame.to_file(site / "piles.gpkg", layer="piles", engine="pyogrio")


def test_self_intersecting_polygon(good_site):
    bowtie = Polygon([(500000, 5700000), (500010, 5700010), (500010, 5700000), (500000, 5700010)])
    _rewrite_piles(good_site, [bowtie, Point(500030, 5700000).buffer(10)])
    msgs = errors_of(good_site)
    assert any(m.startswith("site/piles.gpkg feature 1 (pile A): geometry: invalid polygon: Self-intersection") for m in msgs), msgs


def test_empty_polygon(good_site):
    _rewrite_piles(good_site, [Polygon(), Point(500030, 5700000).buffer(10)])
    assert "site/piles.gpkg feature 1 (pile A): geometry: empty geometry" in errors_of(good_site)


def test_overlapping_piles(good_site):
    _rewrite_piles(good_site, [Point(500000, 5700000).buffer(10), Point(500015, 5700000).buffer(10)])
    msgs = errors_of(good_site)
    assert any(m.startswith("site/piles.gpkg feature 2 (pile B): geometry: overlaps pile A (feature 1) by ") for m in msgs), msgs


def test_touching_toes_are_not_an_overlap(good_site):
    # two squares sharing an edge: toes that touch are normal in a yard (common practice)
    a = Polygon([(500000, 5700000), (500010, 5700000), (500010, 5700010), (500000, 5700010)])
    b = Polygon([(500010, 5700000), (500020, 5700000), (500020, 5700010), (500010, 5700010)])
    _rewrite_piles(good_site, [a, b])
    assert errors_of(good_site) == []


def test_duplicate_pile_id(good_site):
    _rewrite_piles(good_site, [Point(500000, 5700000).buffer(10), Point(500030, 5700000).buffer(10)], ids=("A", "A"))
    assert "site/piles.gpkg feature 2 (pile A): pile_id: pile id 'A' repeats feature 1" in errors_of(good_site)


def test_unknown_material_and_bad_base_on_a_pile(good_site):
    _rewrite_piles(good_site, [Point(500000, 5700000).buffer(10), Point(500030, 5700000).buffer(10)],
                   materials=("coal", "gravel"), bases=("toe", "level:ten"))
    msgs = errors_of(good_site)
    assert "site/piles.gpkg feature 2 (pile B): material: unknown material 'gravel' (not in materials.csv)" in msgs
    assert "site/piles.gpkg feature 2 (pile B): base: 'level:ten' is not floor, toe or level:<z in metres>" in msgs


def test_pile_outside_every_survey_is_a_warning(good_site):
    _rewrite_piles(good_site, [Point(500000, 5700000).buffer(10), Point(501000, 5700000).buffer(10)])
    assert errors_of(good_site) == []
    assert "site/piles.gpkg pile B: geometry: lies outside every survey's extent" in warnings_of(good_site)


# --- surveys ----------------------------------------------------------------------------------
def test_survey_with_no_readable_cloud(good_site):
    survey = good_site / "surveys/2026-10-31"
    (survey / "a.laz").write_bytes(b"this is not a point cloud")
    msgs = errors_of(good_site)
    assert any(m.startswith("site/surveys/2026-10-31/a.laz: unreadable point cloud") for m in msgs), msgs
    assert "site/surveys/2026-10-31: no readable point cloud in the survey folder" in msgs


def test_survey_folder_without_clouds(good_site):
    (good_site / "surveys/2026-11-30").mkdir()
    assert "site/surveys/2026-11-30: no point cloud file (.las, .laz, .copc.laz, .e57, .ply, .xyz, .txt) in the survey folder" in errors_of(good_site)


def test_cloud_crs_with_no_known_transform(good_site, write_tiny_cloud):
    survey = good_site / "surveys/2026-10-31"
    local = 'LOCAL_CS["yard grid",LOCAL_DATUM["yard",32767],UNIT["metre",1],AXIS["Easting",EAST],AXIS["Northing",NORTH]]'
    write_tiny_cloud(survey / "a.laz", crs=local)
    msgs = errors_of(good_site)
    assert any(m.startswith("site/surveys/2026-10-31/a.laz: crs: CRS 'yard grid' differs from the site's") and "no transform is known" in m for m in msgs), msgs


def test_cloud_without_crs_needs_a_default(good_site, write_tiny_cloud):
    survey = good_site / "surveys/2026-10-31"
    write_tiny_cloud(survey / "a.laz", crs=None)
    msgs = errors_of(good_site)
    assert any(m.startswith("site/surveys/2026-10-31/a.laz: crs: the file carries no CRS") for m in msgs), msgs
    edit(good_site / "site.toml", "[grid]\n", '[survey]\ndefault_crs = "EPSG:25832"\n\n[grid]\n')
    assert errors_of(good_site) == []


def test_cloud_in_another_known_crs_is_accepted(good_site, write_tiny_cloud):
    # EPSG:4647 is ETRS89 / UTM 32N with a zone prefix on eastings: same datum, known transform
    import laspy
    from pyproj import Transformer

    survey = good_site / "surveys/2026-10-31"
    write_tiny_cloud(survey / "a.laz", crs="EPSG:3857")
    # the same points in EPSG:3857 coordinates, so that they still cover the piles
    las = laspy.read(survey / "a.laz")
    x, y = Transformer.from_crs("EPSG:25832", "EPSG:3857", always_xy=True).transform(las.x, las.y)
    las.header.offsets = [float(x.min()), float(y.min()), 0.0]
    las.x, las.y = x, y
    las.write(survey / "a.laz")
    assert errors_of(good_site) == []


def test_partial_station_pose(good_site):
    edit(good_site / "surveys/2026-10-31/stations.csv", ",,,,,,", ",500000,5700000,,,,")
    assert "site/surveys/2026-10-31/stations.csv line 2: z: a station pose needs all of x, y, z, roll_deg, pitch_deg, yaw_deg" in errors_of(good_site)


# --- encodings ------------------------------------------------------------------------------
def test_non_utf8_csv(good_site):
    path = good_site / "movements/2026-10/transfers.csv"
    path.write_bytes(path.read_bytes().replace(b"WO-1", "WÖ-1".encode("latin-1")))
    msgs = errors_of(good_site)
    assert "site/movements/2026-10/transfers.csv line 2: not UTF-8 text (byte 0xd6); save the file as UTF-8" in msgs


def test_byte_order_mark_accepted(good_site):
    path = good_site / "materials.csv"
    path.write_bytes(b"\xef\xbb\xbf" + path.read_bytes())
    assert errors_of(good_site) == []
    assert set(load_site(good_site).materials) == {"coal", "salt"}


# --- reporting ------------------------------------------------------------------------------
def test_every_problem_is_reported_not_just_the_first(good_site):
    edit(good_site / "materials.csv", "coal,0.85,", "coal,0,")
    edit(good_site / "movements/2026-10/transfers.csv", "A,B,", "A,A,")
    edit(good_site / "movements/2026-10/weighbridge.csv", "40.0,15.0,25.0", "31.0,38.2,")
    with pytest.raises(InputErrors) as info:
        load_site(good_site)
    assert len([p for p in info.value.problems if p.severity == "error"]) >= 3


def _tree_digest(root: Path) -> dict[str, str]:
    return {
        str(p.relative_to(root)): hashlib.sha256(p.read_bytes()).hexdigest() if p.is_file() else "dir"
        for p in sorted(root.rglob("*"))
    }


def test_check_on_a_broken_site_writes_nothing(good_site, capsys):
    edit(good_site / "movements/2026-10/transfers.csv", "A,B,", "A,A,")
    before = _tree_digest(good_site.parent)
    mtimes = {p: p.stat().st_mtime_ns for p in good_site.rglob("*")}
    assert main(["check", str(good_site)]) == 2
    assert _tree_digest(good_site.parent) == before
    assert {p: p.stat().st_mtime_ns for p in good_site.rglob("*")} == mtimes


def test_cli_prints_one_line_per_problem_and_exits_2(good_site):
    edit(good_site / "movements/2026-10/transfers.csv", "A,B,", "A,A,")
    proc = subprocess.run(
        [sys.executable, "-m", "inventory", "check", str(good_site)], capture_output=True, text=True,
        env={**os.environ, "PYTHONWARNINGS": "ignore"},
    )
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr
    lines = [l for l in proc.stderr.splitlines() if l.startswith("error:")]
    assert lines == ["error: site/movements/2026-10/transfers.csv line 2: to_pile: transfer from pile 'A' to itself"]


def test_cli_check_ok_prints_summary(good_site, capsys):
    assert main(["check", str(good_site)]) == 0
    out = capsys.readouterr().out
    assert "piles     2: A (coal), B (salt)" in out
    assert "2026-10-31  1 file(s), 50 points" in out
    assert "2026-10  2 tickets, 1 belt totals, 1 routing windows, 1 transfers" in out


# --- moving-machine trajectories ------------------------------------------------------------
@pytest.fixture
def machine_survey(good_site, write_tiny_cloud):
    """``machine_survey(rows)``: the good site's survey with a cloud in a moving scanner's
    frame (no CRS) and ``trajectory.csv`` of the given rows."""
    def write(rows: str) -> Path:
        import laspy

        survey = good_site / "surveys/2026-10-31"
        write_tiny_cloud(survey / "boom.laz", crs=None)
        # in the scanner's frame: metres around the scanner, not site coordinates
        las = laspy.read(survey / "boom.laz")
        las.header.offsets = [0.0, 0.0, 0.0]
        las.x, las.y = las.x - 500000.0, las.y - 5700000.0
        las.write(survey / "boom.laz")
        (survey / "trajectory.csv").write_text("file,gps_time,x,y,z,roll_deg,pitch_deg,yaw_deg\n" + rows)
        return survey
    return write


def test_trajectory_times_must_increase(good_site, machine_survey):
    machine_survey("boom.laz,1000.0,500000,5700000,20,0,0,0\nboom.laz,999.0,500001,5700000,20,0,0,0\n")
    msgs = errors_of(good_site)
    # plain numbers in the message, not numpy's repr (np.float64(999.0)), which a damage audit found
    assert ("site/surveys/2026-10-31/trajectory.csv line 3: gps_time: 999.0 is not after 1000.0 on line 2; "
            "times must strictly increase") in msgs, msgs


def test_trajectory_places_a_cloud_without_crs(good_site, machine_survey):
    # a cloud in a scanner frame with no CRS is fine when trajectory.csv places it
    machine_survey("boom.laz,1000.0,500000,5700000,20,0,0,0\nboom.laz,1010.0,500001,5700000,20,0,0,10\n")
    assert errors_of(good_site) == []


def test_trajectory_names_a_missing_file(good_site, machine_survey):
    machine_survey("gone.laz,1000.0,500000,5700000,20,0,0,0\ngone.laz,1010.0,500001,5700000,20,0,0,10\n")
    assert "site/surveys/2026-10-31/trajectory.csv: file: no file 'gone.laz' in site/surveys/2026-10-31" in errors_of(good_site)
