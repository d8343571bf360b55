"""More damaged inputs, as a user of the command line meets them: pile register fields of the
wrong kind (a number as pile id, no base, text as density, heights on the footprints, spaces
around an id), a site.toml that cannot be read, a floor raster that is empty, not a raster or
cut short, a processing pipeline that is not JSON or names an unknown stage, a movement table
that is a folder, a stations.csv refused whole, and a ``survey --out`` that cannot be written.

Each refused case runs through :func:`inventory.cli.main`: exit 2, one ``error:`` line naming
the file (or option), the feature, line or block, and the field, no traceback, and the site
folder byte-identical.
"""

from __future__ import annotations

import math
import warnings
from pathlib import Path

import geopandas as gpd
import numpy as np
import pyproj
import pytest
import shapely
from shapely.geometry import Point

from inventory.cli import main
from inventory.site.load import load_site

P = "error: site/piles.gpkg"


def rewrite_piles(site: Path, **columns) -> None:
    """The small site's two piles with some columns replaced (lists of two values)."""
    data = {"pile_id": ["A", "B"], "material": ["coal", "salt"], "base": ["toe", "level:10"],
            "density_t_m3": [np.nan, np.nan]}
    data.update(columns)
    geometry = data.pop("geometry", [Point(500000, 5700000).buffer(10), Point(500030, 5700000).buffer(10)])
    frame = gpd.GeoDataFrame(data, geometry=geometry, crs="EPSG:25832")
    (site / "piles.gpkg").unlink()
    frame.to_file(site / "piles.gpkg", layer="piles", engine="pyogrio")


def errors(err: str) -> list[str]:
    return [line for line in err.splitlines() if line.startswith("error: ")]


# ----------------------------------------------------------------------------- piles.gpkg fields
@pytest.mark.parametrize("columns, expected", [
    # a NULL base used to stop the check with an AttributeError
    ({"base": [None, "level:10"]},
     f"{P} feature 1 (pile A): base: value is missing (floor, toe or level:<z in metres>)"),
    # a text density used to stop the check with a ValueError
    ({"density_t_m3": ["1,2", None]}, f"{P} feature 1 (pile A): density_t_m3: '1,2' is not a number"),
    ({"density_t_m3": [math.inf, np.nan]}, f"{P} feature 1 (pile A): density_t_m3: inf is not a finite number"),
    ({"material": ["coal", None]}, f"{P} feature 2 (pile B): material: value is missing"),
])
def test_pile_fields_of_the_wrong_kind(good_site, capsys, refused_once, columns, expected):
    rewrite_piles(good_site, **columns)
    assert refused_once(good_site, capsys) == expected


def test_numeric_pile_ids_are_named_once_each_not_in_every_table(good_site, capsys):
    """An Integer pile_id field: each feature is named, and the tables' rows are not all
    reported again as naming unknown piles (before: 'value is missing' on each feature and
    an 'unknown pile' error on every ticket)."""
    rewrite_piles(good_site, pile_id=[1, 2])
    assert main(["check", str(good_site)]) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err
    assert errors(err) == [
        f"{P} feature 1: pile_id: 1 is a number; the field must be text (String), as the tables' pile ids are",
        f"{P} feature 2: pile_id: 2 is a number; the field must be text (String), as the tables' pile ids are",
    ]


def test_spaces_around_a_pile_id_are_dropped_with_a_warning(good_site, capsys):
    rewrite_piles(good_site, pile_id=["A ", "B"])
    assert main(["check", str(good_site)]) == 0
    err = capsys.readouterr().err
    assert ("warning: site/piles.gpkg feature 1 (pile A ): pile_id: pile id 'A ' has spaces around it; read as 'A'"
            in err.splitlines())
    assert "unknown pile" not in err


def test_footprints_with_heights_close_like_flat_ones(good_site, capsys):
    """Footprints drawn with Z (PolygonZ): a warning, and the close runs (before: the check
    passed and the close failed writing the report's map, after the whole survey)."""
    flat = [Point(500000, 5700000).buffer(10), Point(500030, 5700000).buffer(10)]
    rewrite_piles(good_site, geometry=list(shapely.force_3d(flat, 12.5)))
    assert main(["check", str(good_site)]) == 0
    assert ("warning: site/piles.gpkg layer piles: geometry: 2 footprint(s) carry heights (Z); only their x and y "
            "are used") in capsys.readouterr().err.splitlines()
    assert main(["close", str(good_site), "--period", "2026-10", "-q"]) == 0
    assert "Traceback" not in capsys.readouterr().err
    assert (good_site / "closes" / "2026-10" / "report-2026-10.html").is_file()


def test_null_footprint(good_site, capsys, refused_once):
    """A NULL geometry stopped the check with an AttributeError (an empty one was named)."""
    rewrite_piles(good_site, geometry=[None, Point(500030, 5700000).buffer(10)])
    assert refused_once(good_site, capsys) == f"{P} feature 1 (pile A): geometry: no geometry (NULL)"


def test_piles_layer_without_geometry(good_site, capsys, refused_once):
    """An attribute table named 'piles' stopped the check with an AttributeError."""
    import pandas as pd
    import pyogrio

    (good_site / "piles.gpkg").unlink()
    pyogrio.write_dataframe(pd.DataFrame({"pile_id": ["A", "B"], "material": ["coal", "salt"],
                                          "base": ["toe", "level:10"]}),
                            good_site / "piles.gpkg", layer="piles", driver="GPKG")
    assert refused_once(good_site, capsys) == (
        f"{P} layer piles: geometry: the layer has no geometry column (footprints are polygons)")


def test_footprint_smaller_than_a_grid_cell_is_a_warning(good_site, capsys):
    """A 10 m circle drawn in kilometres (radius 0.01): before, nothing was said and the close
    found about -100 % of the pile's book stock."""
    rewrite_piles(good_site, geometry=[Point(500000, 5700000).buffer(0.01), Point(500030, 5700000).buffer(10)])
    assert main(["check", str(good_site)]) == 0
    area = Point(500000, 5700000).buffer(0.01).area   # shapely's 32-gon, a little under pi r2
    assert (f"warning: site/piles.gpkg pile A: geometry: footprint of {area:.3g} m2 is smaller than one grid cell "
            "(0.25 m2 at [grid] cell_size_m = 0.5): its volume is next to nothing (drawn in other units?)"
            ) in capsys.readouterr().err.splitlines()


# ----------------------------------------------------------------------------- site.toml unreadable
def test_site_toml_that_cannot_be_read(good_site, capsys, monkeypatch):
    """No read permission (simulated: the tests may run as root, who reads every file)."""
    real = Path.read_bytes

    def denied(self):
        if self.name == "site.toml":
            raise PermissionError(13, "Permission denied", str(self))
        return real(self)

    monkeypatch.setattr(Path, "read_bytes", denied)
    assert main(["check", str(good_site)]) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err and "the run failed" not in err
    assert errors(err) == ["error: site/site.toml: cannot be read (Permission denied)"]


# ----------------------------------------------------------------------------- base/floor.tif
@pytest.fixture
def floor(good_site) -> Path:
    """A valid floor raster under the small site: 256 rows x 512 columns of 0.2 m, two
    256 x 256 tiles, uncompressed (so that cutting the file removes the second tile)."""
    import rasterio
    from rasterio.transform import from_origin

    path = good_site / "base" / "floor.tif"
    path.parent.mkdir()
    with rasterio.open(path, "w", driver="GTiff", width=512, height=256, count=1, dtype="float32",
                       crs="EPSG:25832", transform=from_origin(499980.0, 5700020.0, 0.2, 0.2),
                       tiled=True, blockxsize=256, blockysize=256) as dst:
        dst.write(np.full((256, 512), 9.5, dtype="float32"), 1)
    return path


def test_intact_floor_raster_passes(good_site, floor, capsys):
    assert main(["check", str(good_site)]) == 0


@pytest.mark.parametrize("damage, expected", [
    (b"", "error: site/base/floor.tif: floor_raster: cannot be opened as a GeoTIFF ('floor.tif' not recognized "
          "as being in a supported file format.)"),
    (b"not a raster\n", "error: site/base/floor.tif: floor_raster: cannot be opened as a GeoTIFF ('floor.tif' not "
                        "recognized as being in a supported file format.)"),
])
def test_floor_raster_that_is_not_one(good_site, floor, capsys, refused_once, damage, expected):
    """Before: the check passed, and the close refused the file only after the survey."""
    floor.write_bytes(damage)
    assert refused_once(good_site, capsys) == expected


def test_floor_raster_cut_short_names_the_block(good_site, floor, capsys, refused_once):
    data = floor.read_bytes()
    floor.write_bytes(data[: len(data) - 200_000])   # the second tile's 262,144 bytes cut short
    line = refused_once(good_site, capsys)
    assert line.startswith("error: site/base/floor.tif block 0,1 (rows 0-255): floor_raster: cut short or "
                           "damaged: cannot be read (floor.tif, band 1: "), line


def test_close_refuses_a_damaged_floor_before_the_survey(good_site, floor, capsys, refused_once, monkeypatch):
    from inventory import close

    surveyed = []
    monkeypatch.setattr(close, "_survey", lambda *a, **k: surveyed.append(a))
    floor.write_bytes(b"")
    line = refused_once(good_site, capsys, ["close", str(good_site), "--period", "2026-10"])
    assert line.startswith("error: site/base/floor.tif: floor_raster: cannot be opened as a GeoTIFF"), line
    assert surveyed == []


# ----------------------------------------------------------------------------- pipeline JSON
def with_pipeline(site: Path, text: str) -> Path:
    (site / "pipe.json").write_text(text)
    toml = site / "site.toml"
    toml.write_text(toml.read_text() + '\n[survey]\npipeline = "pipe.json"\n')
    return site / "pipe.json"


def test_check_passes_a_valid_pipeline(good_site, capsys):
    with_pipeline(good_site, '[{"type": "filters.range", "limits": "Z[0:100]"}, {"type": "inventory.slope_ground"}]')
    assert main(["check", str(good_site)]) == 0


@pytest.mark.parametrize("text, why", [
    ('{"pipeline": [ {"type": "filters.range", "limits": "Z[0:9]"}, ]}',
     "not valid JSON at line 1, column 63: Expecting value"),
    ("", "not valid JSON at line 1, column 1: Expecting value"),
    ("42", "the pipeline must be a non-empty list of stages"),
    ('[{"type": "filters.outlyer"}]', "stage 1: unknown stage type 'filters.outlyer'; this runner knows: "
     "filters.assign, filters.crop, filters.csf, filters.elm, filters.outlier, filters.range, "
     "filters.reprojection, inventory.slope_ground, inventory.voxel_thin, readers.copc, readers.las, writers.las"),
    ('[{"type": "filters.range", "limit": "Z[0:9]"}]',
     "stage 1 (filters.range): unknown option(s) limit; known: limits"),
    # option values: before, found only when the stage ran, after every cloud was read
    ('[{"type": "filters.outlier", "mean_k": "eight"}]',
     "stage 1 (filters.outlier): option 'mean_k' must be a number, got 'eight'"),
    ('[{"type": "filters.outlier", "mean_k": 8.5}]', "stage 1 (filters.outlier): option 'mean_k' must be a whole "
     "number, got 8.5"),
    ('[{"type": "filters.csf", "smooth": "yes"}]', "stage 1 (filters.csf): option 'smooth' must be true or false, "
     "got 'yes'"),
    ('[{"type": "filters.elm", "class": 300}]', "stage 1 (filters.elm): option 'class' must be a class 0-255, got 300"),
    ('[{"type": "filters.range", "limits": "Z[0:"}]', "stage 1 (filters.range): range 'Z[0:' is not of the form "
     "Name[lower:upper] (brackets [ ] inclusive, ( ) exclusive, ! negates)"),
    ('[{"type": "inventory.slope_ground", "max_slope_deg": null}]', "stage 1 (inventory.slope_ground): option "
     "'max_slope_deg' must be a number, got None"),
])
def test_check_refuses_a_broken_pipeline(good_site, capsys, refused_once, text, why):
    """Before: the check said ok and only the survey step refused the file."""
    pipe = with_pipeline(good_site, text)
    assert refused_once(good_site, capsys) == f"error: {pipe}: {why}"


# ----------------------------------------------------------------------------- tables
def test_movement_table_that_is_a_folder(good_site, capsys, refused_once):
    """Before: a folder named weighbridge.csv was taken for a month without tickets."""
    table = good_site / "movements" / "2026-10" / "weighbridge.csv"
    table.unlink()
    table.mkdir()
    assert refused_once(good_site, capsys) == (
        "error: site/movements/2026-10/weighbridge.csv: cannot be read (Is a directory)")


def test_opening_that_is_a_folder(good_site, capsys, refused_once):
    (good_site / "opening.csv").unlink()
    (good_site / "opening.csv").mkdir()
    assert refused_once(good_site, capsys) == "error: site/opening.csv: cannot be read (Is a directory)"


def test_belt_total_given_twice(good_site, capsys, refused_once):
    """Before: both copies were booked (500 t counted as 1,000 t) without a word."""
    belts = good_site / "movements" / "2026-10" / "belt_scales.csv"
    belts.write_text(belts.read_text() + "B1,2026-10-01T00:00:00+02:00,2026-10-02T00:00:00+02:00,500\n")
    assert refused_once(good_site, capsys) == (
        "error: site/movements/2026-10/belt_scales.csv line 3: start: interval of belt 'B1' overlaps line 2: it "
        "starts at 2026-09-30T22:00:00+00:00, before that interval ends at 2026-10-01T22:00:00+00:00 (its tonnes "
        "would be counted twice)")


def test_belt_intervals_end_to_end_are_accepted(good_site, capsys):
    belts = good_site / "movements" / "2026-10" / "belt_scales.csv"
    belts.write_text(belts.read_text() + "B1,2026-10-02T00:00:00+02:00,2026-10-03T00:00:00+02:00,450\n")
    assert main(["check", str(good_site)]) == 0


def test_transfer_entered_twice(good_site, capsys, refused_once):
    """Before: the pasted copy moved the 30 t a second time."""
    transfers = good_site / "movements" / "2026-10" / "transfers.csv"
    transfers.write_text(transfers.read_text() + "A,B,2026-10-10T10:00:00+02:00,30,WO-1\n")
    assert refused_once(good_site, capsys) == (
        "error: site/movements/2026-10/transfers.csv line 3: time: the transfer repeats line 2 (same piles, time, "
        "tonnes and reference): it would be counted twice")


def test_two_loads_of_one_work_order_are_accepted(good_site, capsys):
    transfers = good_site / "movements" / "2026-10" / "transfers.csv"
    transfers.write_text(transfers.read_text() + "A,B,2026-10-10T11:00:00+02:00,30,WO-1\n")
    assert main(["check", str(good_site)]) == 0


def test_equal_transfers_without_reference_are_accepted(good_site, capsys):
    """Times given by date and no reference: two equal loads on one day may both be real."""
    transfers = good_site / "movements" / "2026-10" / "transfers.csv"
    transfers.write_text("from_pile,to_pile,time,tonnes,reference\n" + "A,B,2026-10-10T00:00:00+02:00,30,\n" * 2)
    assert main(["check", str(good_site)]) == 0


def as_workbook(csv_path: Path, name: str) -> None:
    import pandas as pd

    pd.read_csv(csv_path, dtype=str).to_excel(csv_path.with_name(name), index=False)


@pytest.mark.parametrize("table, saved_as", [
    ("movements/2026-10/weighbridge.csv", "weighbridge.xlsx"),
    ("movements/2026-10/belt_scales.csv", "belt_scales.xlsx"),
    ("opening.csv", "opening.xlsx"),
])
def test_table_saved_as_a_workbook_instead_of_csv(good_site, capsys, refused_once, table, saved_as):
    """Before: the check passed with the month's tickets (or the opening balances) missing."""
    path = good_site / table
    as_workbook(path, saved_as)
    path.unlink()
    shown = str(Path("site") / table).replace(path.name, saved_as)
    assert refused_once(good_site, capsys) == (
        f"error: {shown}: not read: the tool reads {path.name} (comma-separated text, that name in lower case); "
        f"save or rename it as {path.name}")


def test_table_named_in_capitals(good_site, capsys, refused_once):
    folder = good_site / "movements" / "2026-10"
    (folder / "weighbridge.csv").rename(folder / "Weighbridge.CSV")
    assert refused_once(good_site, capsys) == (
        "error: site/movements/2026-10/Weighbridge.CSV: not read: the tool reads weighbridge.csv (comma-separated "
        "text, that name in lower case); save or rename it as weighbridge.csv")


@pytest.mark.parametrize("name, expected", [
    ("Stations.csv", "stations.csv"),
    ("control.xlsx", "control.csv"),   # not opened: the name alone is refused
    ("trajectory.CSV", "trajectory.csv"),
])
def test_survey_table_under_another_name(good_site, capsys, refused_once, name, expected):
    """Before: not read, the survey's files placed without their poses or control."""
    survey = good_site / "surveys" / "2026-10-31"
    if expected == "stations.csv":
        (survey / "stations.csv").rename(survey / name)
    else:
        (survey / name).write_text("x")
    assert refused_once(good_site, capsys) == (
        f"error: site/surveys/2026-10-31/{name}: not read: the tool reads {expected} (comma-separated text, that "
        f"name in lower case); save or rename it as {expected}")


def test_workbook_beside_its_csv_is_a_warning(good_site, capsys):
    as_workbook(good_site / "movements" / "2026-10" / "weighbridge.csv", "weighbridge.xlsx")
    assert main(["check", str(good_site)]) == 0
    assert ("warning: site/movements/2026-10/weighbridge.xlsx: ignored: the tool reads weighbridge.csv in this "
            "folder") in capsys.readouterr().err.splitlines()


def station_cloud(good_site: Path, x: str) -> Path:
    """A cloud of 50 points in the scanner's own frame in the October survey, placed by a
    stations.csv pose at ``x`` (text as written), with [survey] default_crs set; returns
    the survey folder."""
    import laspy

    survey = good_site / "surveys" / "2026-10-31"
    header = laspy.LasHeader(point_format=6, version="1.4")
    header.scales, header.offsets = [0.001] * 3, [0.0, 0.0, 0.0]
    las = laspy.LasData(header)
    rng = np.random.default_rng(3)
    las.x, las.y, las.z = rng.uniform(-15, 45, 50), rng.uniform(-15, 15, 50), rng.uniform(0, 5, 50)
    las.write(survey / "a.laz")
    (survey / "stations.csv").write_text(
        "file,station_id,time,x,y,z,roll_deg,pitch_deg,yaw_deg\n"
        f"a.laz,S1,2026-10-31T15:00:00+01:00,{x},5700000,10,0,0,0\n")
    toml = good_site / "site.toml"
    toml.write_text(toml.read_text() + '\n[survey]\ndefault_crs = "EPSG:25832"\n')
    return survey


def test_stations_refused_whole_is_the_only_error(good_site, capsys, refused_once):
    """A cloud in the scanner's own frame, placed by its stations.csv pose; stations.csv then
    emptied. Before: a second error followed, about the survey's extent computed from the
    cloud's own coordinates (taken in [survey] default_crs) as if they were the site's."""
    survey = station_cloud(good_site, "500000")
    assert main(["check", str(good_site)]) == 0   # placed by its pose, the cloud covers the piles
    capsys.readouterr()
    (survey / "stations.csv").write_bytes(b"")
    assert refused_once(good_site, capsys) == (
        "error: site/surveys/2026-10-31/stations.csv line 1: the file is empty (expected a header line)")


def test_stations_pose_refused_is_the_only_error(good_site, capsys, refused_once):
    """A pose value refused on its cell: before, a second error followed about the extent."""
    station_cloud(good_site, "inf")
    assert refused_once(good_site, capsys) == (
        "error: site/surveys/2026-10-31/stations.csv line 2: x: 'inf' is not a finite number")


# ----------------------------------------------------------------------------- clouds without points
def empty_cloud(path: Path) -> None:
    import laspy

    header = laspy.LasHeader(point_format=6, version="1.4")
    header.add_crs(pyproj.CRS("EPSG:25832"))
    laspy.LasData(header).write(path)


def test_cloud_without_points_beside_others_is_left_out(good_site, capsys):
    """Before: its header's empty box at 0,0 stretched the survey to a grid of about a
    million GB, refused by check and close."""
    empty_cloud(good_site / "surveys" / "2026-10-31" / "b.laz")
    assert main(["check", str(good_site)]) == 0
    err = capsys.readouterr().err
    assert "warning: site/surveys/2026-10-31/b.laz: holds no point: left out of the survey" in err.splitlines()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        site = load_site(good_site)
    assert [p.name for p in site.surveys["2026-10-31"].files] == ["a.laz"]


def test_survey_whose_only_cloud_has_no_points(good_site, capsys, refused_once):
    survey = good_site / "surveys" / "2026-10-31"
    (survey / "a.laz").unlink()
    empty_cloud(survey / "a.laz")
    assert refused_once(good_site, capsys) == (
        "error: site/surveys/2026-10-31: no point in any point cloud file of the survey folder")


# ----------------------------------------------------------------------------- survey --out
def test_survey_out_that_is_a_file(good_site, capsys, refused_once):
    target = good_site / "afile"
    target.write_text("x")
    argv = ["survey", str(good_site), "--date", "2026-10-31", "--out", str(target)]
    assert refused_once(good_site, capsys, argv) == (
        f"error: {target}: --out: is a file, not a folder; the survey's outputs go into a folder of this name")


def test_survey_out_under_a_file(good_site, capsys, refused_once):
    target = good_site / "afile"
    target.write_text("x")
    argv = ["survey", str(good_site), "--date", "2026-10-31", "--out", str(target / "x")]
    assert refused_once(good_site, capsys, argv) == (
        f"error: {target}: --out: is a file, not a folder; {target / 'x'} cannot be made under it")


def test_survey_out_in_a_folder_without_write_permission(good_site, tmp_path, capsys, refused_once, monkeypatch):
    """(Simulated: the tests may run as root, who writes everywhere.)"""
    import os

    locked = tmp_path / "locked"
    locked.mkdir()
    real = os.access
    monkeypatch.setattr(os, "access", lambda path, mode, **kw: Path(path) != locked and real(path, mode, **kw))
    argv = ["survey", str(good_site), "--date", "2026-10-31", "--out", str(locked / "out")]
    assert refused_once(good_site, capsys, argv) == (
        f"error: {locked}: --out: is not a writable folder; the survey's outputs cannot be written there")
    assert list(locked.iterdir()) == []


# ----------------------------------------------------------------------------- ledger
def test_ledger_name_taken_by_a_folder(good_site, capsys, refused_once):
    """Before: exit 1, 'cannot open the ledger: unable to open database file'."""
    (good_site / "ledger.sqlite").mkdir()
    line = refused_once(good_site, capsys, ["close", str(good_site), "--period", "2026-10"])
    assert line == (f"error: {good_site / 'ledger.sqlite'}: is a folder, not a ledger file; move it away (a close "
                    "creates the file)")
    assert not (good_site / "closes" / "2026-10").exists()
