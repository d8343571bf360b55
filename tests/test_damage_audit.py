"""Damaged inputs found by an audit that ran the command line over hundreds of variants of a
site, each with one thing broken; every case here was a traceback, a vague message or a
silent wrong result before its fix. Each asserts the one error line: file, line and field."""

from __future__ import annotations

from pathlib import Path

import pytest

BELTS = "movements/2026-10/belt_scales.csv"
TRANSFERS = "movements/2026-10/transfers.csv"


def _cell(path: Path, row: int, column: str, value: str) -> None:
    """Set one cell of a small comma-separated table (``row`` 1 is the first record)."""
    lines = path.read_text().splitlines()
    header = lines[0].split(",")
    cells = lines[row].split(",")
    cells[header.index(column)] = value
    lines[row] = ",".join(cells)
    path.write_text("\n".join(lines) + "\n")


# ----------------------------------------------------------------------------- tables
@pytest.mark.parametrize("table", ["materials.csv", "opening.csv", BELTS])
@pytest.mark.parametrize("sep, shown", [("\t", "tabs"), ("|", "'|'")])
def test_table_with_another_separator_is_named(good_site, capsys, refused_once, table, sep, shown):
    path = good_site / table
    path.write_text(path.read_text().replace(",", sep))
    line = refused_once(good_site, capsys)
    assert line == (f"error: site/{table} line 1: the file seems to use {shown} between values; the tool "
                    "needs ',' between values (and '.' for decimals): save it as comma-separated CSV")


def test_belt_total_faster_than_any_belt(good_site, capsys, refused_once):
    # the small site's belt interval is 24 h long
    _cell(good_site / BELTS, 1, "tonnes", "1e15")
    line = refused_once(good_site, capsys)
    assert line.startswith(f"error: site/{BELTS} line 2: tonnes: 1e+15 t in 24 h is ")
    assert "above 100,000 t/h, more than any belt carries" in line


def test_belt_total_at_a_real_belt_rate_is_accepted(good_site, capsys):
    from inventory.cli import main

    _cell(good_site / BELTS, 1, "tonnes", "480000")  # 20,000 t/h over 24 h: a big belt
    assert main(["check", str(good_site)]) == 0, capsys.readouterr().err


def test_belt_interval_ending_years_later(good_site, capsys, refused_once):
    # before: accepted, and the close booked 500 t x (days to the survey / five years)
    _cell(good_site / BELTS, 1, "end", "2031-10-02T08:00:00+02:00")
    line = refused_once(good_site, capsys)
    assert line.startswith(f"error: site/{BELTS} line 2: end: 2031-10-02T08:00:00+02:00 is more than a day "
                           "after the end of 2026-10 of its folder")


def test_belt_interval_over_the_months_end_is_accepted(good_site, capsys):
    from inventory.cli import main

    path = good_site / BELTS
    path.write_text(path.read_text() + "B1,2026-10-31T22:00:00+01:00,2026-11-01T06:00:00+01:00,120\n")
    assert main(["check", str(good_site)]) == 0, capsys.readouterr().err


def test_belt_interval_starting_in_another_month(good_site, capsys, refused_once):
    _cell(good_site / BELTS, 1, "start", "2026-09-20T00:00:00+02:00")
    line = refused_once(good_site, capsys)
    assert line == (f"error: site/{BELTS} line 2: start: 2026-09-20T00:00:00+02:00 falls in 2026-09, not in "
                    "2026-10 of its folder; the interval belongs in movements/2026-09/")


@pytest.mark.parametrize("table, column", [("opening.csv", "tonnes"), (TRANSFERS, "tonnes")])
def test_tonnes_above_any_stockpile(good_site, capsys, refused_once, table, column):
    _cell(good_site / table, 1, column, "1e15")
    line = refused_once(good_site, capsys)
    assert line == (f"error: site/{table} line 2: {column}: 1e+15 t is above 1e+09 t, more than any "
                    "stockpile holds (a keying or unit error?)")


def test_density_sigma_as_large_as_the_density(good_site, capsys, refused_once):
    _cell(good_site / "materials.csv", 1, "density_sd_t_m3", "0.9")   # coal: 0.85 t/m3
    line = refused_once(good_site, capsys)
    assert line == ("error: site/materials.csv line 2: density_sd_t_m3: 0.9 t/m3 is not below the bulk density "
                    "0.85 t/m3 (columns swapped? a density's one-sigma is a few per cent of it)")


def test_pile_without_an_opening_balance_is_a_warning(good_site, capsys):
    from inventory.cli import main

    path = good_site / "opening.csv"
    path.write_text("".join(line for line in path.read_text().splitlines(True) if not line.startswith("B,")))
    assert main(["check", str(good_site)]) == 0
    assert ("warning: site/opening.csv: pile_id: pile 'B' has no opening balance: a close that opens from "
            "opening.csv opens it at 0 t") in capsys.readouterr().err.splitlines()


def test_no_opening_and_no_ledger_is_a_warning(good_site, capsys):
    from inventory.cli import main

    (good_site / "opening.csv").unlink()
    assert main(["check", str(good_site)]) == 0
    warned = ("warning: site/opening.csv: no opening.csv and no ledger.sqlite: the first close has no opening "
              "balances and will be refused")
    assert warned in capsys.readouterr().err.splitlines()
    (good_site / "ledger.sqlite").write_bytes(b"")   # a ledger to open from: nothing to warn of
    assert main(["check", str(good_site)]) == 0
    assert warned not in capsys.readouterr().err.splitlines()


# ----------------------------------------------------------------------------- survey times
@pytest.mark.parametrize("time, shown", [("2031-10-02T08:00:00+02:00", "2031-10-02T08:00:00+02:00"),
                                          ("2026-03-01T15:00:00+01:00", "2026-03-01T15:00:00+01:00")])
def test_scan_time_far_from_the_folders_date(good_site, capsys, refused_once, time, shown):
    # before: a warning, and the close cut its books at that instant
    stations = good_site / "surveys/2026-10-31/stations.csv"
    stations.write_text(stations.read_text().replace("2026-10-31T15:00:00+01:00", time))
    line = refused_once(good_site, capsys)
    assert line == (f"error: site/surveys/2026-10-31/stations.csv line 2: time: {shown} is more than a day from "
                    "the folder's date 2026-10-31 (a date error? the latest scan time is the survey instant, "
                    "which decides the movements booked before it)")


def test_scan_time_the_day_after_is_a_warning(good_site, capsys):
    from inventory.cli import main

    stations = good_site / "surveys/2026-10-31/stations.csv"
    stations.write_text(stations.read_text().replace("2026-10-31T15:00:00+01:00", "2026-11-01T01:00:00+01:00"))
    assert main(["check", str(good_site)]) == 0
    assert ("warning: site/surveys/2026-10-31/stations.csv: time: scan times fall on 2026-11-01, not on the "
            "folder's date 2026-10-31") in capsys.readouterr().err.splitlines()


# ----------------------------------------------------------------------------- point clouds
CLOUD = "surveys/2026-10-31/a.laz"


def _patched(path: Path, at: int, fmt: str, *values) -> None:
    import struct

    data = bytearray(path.read_bytes())
    struct.pack_into(fmt, data, at, *values)
    path.write_bytes(bytes(data))


@pytest.mark.parametrize("at, fmt, values, why", [
    # offsets of the LAS public header block (ASPRS LAS 1.4 R15, table 3)
    (100, "<I", (0xFFFFFFFF,), "damaged header: 4,294,967,295 variable-length records cannot fit in the "),
    (24, "<BB", (23, 203), "damaged header: version 23.203 (LAS files are 1.0 to 1.4)"),
    (94, "<H", (100,), "damaged header: header size 100 bytes, below the 227 of any LAS header"),
    (96, "<I", (0xFFFFFF00,), "truncated: the file ends at byte "),
])
def test_header_fields_that_cannot_be_real(good_site, capsys, at, fmt, values, why):
    # before: a header of random bytes had the reader loop over its VLR count, growing past
    # 2 GB of memory without an end
    from inventory.cli import main

    _patched(good_site / CLOUD, at, fmt, *values)
    assert main(["check", str(good_site)]) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err
    assert f"error: site/{CLOUD}: unreadable point cloud ({why}" in err, err


def test_random_bytes_after_the_signature(good_site, capsys):
    import numpy as np

    from inventory.cli import main

    rng = np.random.default_rng(7)
    (good_site / CLOUD).write_bytes(b"LASF" + rng.bytes(3000))
    assert main(["check", str(good_site)]) == 2
    err = capsys.readouterr().err
    assert f"error: site/{CLOUD}: unreadable point cloud (damaged header: " in err, err


@pytest.mark.parametrize("cut, why", [
    (0, "the file is empty (0 bytes)"),
    (100, "truncated: the file has 100 bytes, fewer than the 227 bytes of the smallest LAS header"),
    (300, "truncated: the file ends at byte 300, inside its header records (the points should start at byte "),
])
def test_cloud_cut_inside_its_header(good_site, capsys, cut, why):
    # before: laspy's "Source is empty", "File is to small to be a valid LAS", or a CRS or
    # LASzip record "cannot be parsed" with the whole WKT quoted
    from inventory.cli import main

    path = good_site / CLOUD
    path.write_bytes(path.read_bytes()[:cut])
    assert main(["check", str(good_site)]) == 2
    err = capsys.readouterr().err
    assert f"error: site/{CLOUD}: unreadable point cloud ({why}" in err, err


def test_a_file_that_is_not_las_under_a_laz_name(good_site, capsys):
    from inventory.cli import main

    (good_site / CLOUD).write_bytes(b"ply\nformat ascii 1.0\n" + b"0" * 400)
    assert main(["check", str(good_site)]) == 2
    err = capsys.readouterr().err
    assert (f"error: site/{CLOUD}: unreadable point cloud (not a LAS/LAZ file: it starts with b'ply\\n', not the "
            "signature 'LASF')") in err, err


def test_survey_of_ten_points_is_bad_input_and_leaves_the_site_as_it_was(good_site, capsys, write_tiny_cloud):
    # before: exit 1, "the run failed"-style "survey 2026-10-31: no point was classified as
    # surface" naming no file, and an empty closes/ folder left behind
    from inventory.cli import main

    write_tiny_cloud(good_site / CLOUD, n=10)
    before = sorted(p.relative_to(good_site) for p in good_site.rglob("*"))
    assert main(["close", str(good_site), "--period", "2026-10", "-q"]) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err
    lines = [line for line in err.splitlines() if line.startswith("error: ")]
    assert len(lines) == 1, lines
    assert lines[0].startswith(f"error: {good_site / 'surveys/2026-10-31'}: no point of the survey was classified "
                               "as surface (")
    assert lines[0].endswith("): too few points, or heights no stockpile surface has; check the clouds")
    assert sorted(p.relative_to(good_site) for p in good_site.rglob("*")) == before


# ----------------------------------------------------------------------------- base/floor.tif
def _floor_site(site: Path, *, west: float = 499980.0, crs: str | None = "EPSG:25832", nodata=None,
                fill: float = 9.5, nan_west_of: float | None = None) -> Path:
    """Pile B on base floor, over a 0.5 m floor raster 100 m x 50 m from ``west``."""
    import geopandas as gpd
    import numpy as np
    import rasterio
    from rasterio.transform import from_origin

    piles = gpd.read_file(site / "piles.gpkg", layer="piles")
    piles.loc[piles["pile_id"] == "B", "base"] = "floor"
    piles.to_file(site / "piles.gpkg", layer="piles", engine="pyogrio")
    values = np.full((100, 200), fill, dtype="float32")
    if nan_west_of is not None:
        values[:, : int((nan_west_of - west) / 0.5)] = np.nan
    path = site / "base" / "floor.tif"
    path.parent.mkdir(exist_ok=True)
    with rasterio.open(path, "w", driver="GTiff", width=200, height=100, count=1, dtype="float32", crs=crs,
                       transform=from_origin(west, 5700025.0, 0.5, 0.5), nodata=nodata) as dst:
        dst.write(values, 1)
    return path


def test_floor_under_every_floor_pile_passes(good_site, capsys):
    from inventory.cli import main

    _floor_site(good_site)
    assert main(["check", str(good_site)]) == 0, capsys.readouterr().err


@pytest.mark.parametrize("kwargs, covers", [
    # before: each passed the check, and the close left pile B without a volume, out of the
    # survey total, "0 significant, 0 out of tolerance" (the sample site: 12,283 t of 21,638 t)
    (dict(west=549980.0), "x 549,980.0..550,080.0, y 5,699,975.0..5,700,025.0 in EPSG:25832"),
    (dict(fill=-9999.0, nodata=-9999.0), "x 499,980.0..500,080.0, y 5,699,975.0..5,700,025.0 in EPSG:25832"),
    (dict(crs="EPSG:4326"), "x 499,980.0..500,080.0, y 5,699,975.0..5,700,025.0 in EPSG:4326"),
], ids=["elsewhere", "all-nodata", "wrong-crs-label"])
def test_floor_raster_with_no_height_under_a_floor_pile(good_site, capsys, refused_once, kwargs, covers):
    _floor_site(good_site, **kwargs)
    line = refused_once(good_site, capsys)
    assert line == ("error: site/base/floor.tif: floor_raster: no floor height under pile B, whose base is "
                    f"floor: the raster covers {covers} (nodata there, another place, or a wrong CRS?)")


def test_floor_raster_under_part_of_a_pile_is_a_warning(good_site, capsys):
    from inventory.cli import main

    _floor_site(good_site, nan_west_of=500030.0)   # pile B is a 10 m circle about x 500,030
    assert main(["check", str(good_site)]) == 0
    warned = [line for line in capsys.readouterr().err.splitlines() if "floor heights under" in line]
    assert len(warned) == 1, warned
    percent = int(warned[0].split("floor heights under ")[1].split(" %")[0])
    assert 45 <= percent <= 60, warned   # the east half, cells touching the circle counted
    assert warned[0].endswith(" % of pile B only; the rest is taken from the nearest floor height")


def test_floor_raster_without_crs_is_a_warning_of_the_check(good_site, capsys):
    from inventory.cli import main

    _floor_site(good_site, crs=None)
    assert main(["check", str(good_site)]) == 0
    assert ("warning: site/base/floor.tif: floor_raster: the raster has no CRS; taken as the site's EPSG:25832"
            in capsys.readouterr().err.splitlines())


# ----------------------------------------------------------------------------- the site's own files
@pytest.mark.parametrize("name", ["site.toml", "materials.csv", "piles.gpkg"])
def test_a_folder_in_place_of_a_site_file(good_site, capsys, refused_once, name):
    # before: "file not found", although something of that name is there
    (good_site / name).unlink()
    (good_site / name).mkdir()
    assert refused_once(good_site, capsys) == f"error: site/{name}: is a folder, not a file"


def test_spreadsheet_separator_hint_above_the_header(good_site, capsys, refused_once):
    # before: "material: required column is missing", the hint line read as the header
    path = good_site / "materials.csv"
    path.write_text("sep=,\n" + path.read_text())
    assert refused_once(good_site, capsys) == ("error: site/materials.csv line 1: the first line is a spreadsheet's "
                                               "separator hint ('sep=,'), not the header; delete that line")


def test_column_named_in_another_style(good_site, capsys, refused_once):
    path = good_site / "opening.csv"
    path.write_text(path.read_text().replace("pile_id,", "Pile ID,", 1))
    assert refused_once(good_site, capsys) == (
        "error: site/opening.csv line 1: pile_id: required column is missing (there is a column 'Pile ID': "
        "column names are lower case, words joined by '_')")


# ----------------------------------------------------------------------------- a stopped close
@pytest.mark.slow
def test_close_stopped_by_sigterm_leaves_no_staging_folder(good_site, repo_root):
    # before: SIGTERM killed the process where it stood, leaving closes/.2026-10.partial-*
    # with the survey's rasters and cloud in it (cleared, with a warning, by the next close)
    import os
    import signal
    import subprocess
    import sys
    import time

    env = dict(os.environ, PYTHONPATH=str(repo_root))
    proc = subprocess.Popen([sys.executable, "-m", "inventory", "close", str(good_site), "--period", "2026-10",
                             "-q"], env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    closes = good_site / "closes"
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline and proc.poll() is None:
        if closes.is_dir() and any(p.name.startswith(".2026-10.partial-") for p in closes.iterdir()):
            break
        time.sleep(0.02)
    assert proc.poll() is None, "the close ended before it was stopped"
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 1, err
    assert err.strip().splitlines()[-1] == "terminated"
    assert "Traceback" not in err
    assert not closes.exists()                      # a first close: the site as it was
    assert not (good_site / "ledger.sqlite").exists()


# ----------------------------------------------------------------------------- the ledger
def test_ledger_held_by_another_writer_names_the_likely_cause(make_close_result, tmp_path, monkeypatch):
    # before: "cannot start a transaction: database is locked" and nothing more
    import sqlite3

    from inventory.errors import LedgerError
    from inventory.ledger import store
    from inventory.ledger.store import Ledger

    path = tmp_path / "ledger.sqlite"
    with Ledger(path) as led:
        led.record_close(make_close_result("2026-01"), {}, "0.1.0", who="a")
    before = path.read_bytes()
    monkeypatch.setattr(store, "BUSY_TIMEOUT_S", 0.2)
    holder = sqlite3.connect(path, isolation_level=None)
    holder.execute("BEGIN EXCLUSIVE")
    try:
        with Ledger(path) as led, pytest.raises(LedgerError) as caught:
            led.record_close(make_close_result("2026-02"), {}, "0.1.0", who="b")
    finally:
        holder.execute("ROLLBACK")
        holder.close()
    assert str(caught.value) == (
        f"{path}: cannot start a transaction: database is locked (another program has held a write transaction "
        "on it for over 0.2 s: another close of this site, or a database tool with changes not committed); "
        "nothing was written, run it again when that ends")
    assert path.read_bytes() == before
    with Ledger(path) as led:
        assert led.closes()["period"].tolist() == ["2026-01"]


@pytest.mark.parametrize("ledger_bytes", [b"", None], ids=["cut-to-0-bytes", "deleted"])
def test_emptied_ledger_beside_published_outputs_is_refused(good_site, capsys, refused_once, monkeypatch,
                                                            ledger_bytes):
    # before: a ledger cut to 0 bytes (or deleted) read as a new one, and the close started
    # the books again from opening.csv beside the outputs of the closes it had lost
    from inventory import close

    surveyed = []
    monkeypatch.setattr(close, "_survey", lambda *a, **k: surveyed.append(a))
    folder = good_site / "closes" / "2026-09"
    folder.mkdir(parents=True)
    (folder / "run.json").write_text('{"close_id": 4}')
    if ledger_bytes is not None:
        (good_site / "ledger.sqlite").write_bytes(ledger_bytes)
    line = refused_once(good_site, capsys, ["close", str(good_site), "--period", "2026-10"])
    assert line == (f"error: {good_site / 'ledger.sqlite'}: the ledger holds no close, but closes/2026-09/run.json "
                    "holds the outputs of ledger close 4: the ledger was emptied or replaced; restore it from a "
                    "backup (or move closes/ away to start the books again)")
    assert surveyed == []


def test_ledger_with_a_damaged_page_is_named_when_opened(good_site, make_close_result, capsys, refused_once):
    # before: the first page read, and a later query failed as "the run failed: DatabaseError:
    # database disk image is malformed", naming no file
    import sqlite3

    from inventory.ledger.store import Ledger

    path = good_site / "ledger.sqlite"
    with Ledger(path) as led:
        led.record_close(make_close_result("2026-09"), {}, "0.1.0", who="a")
    con = sqlite3.connect(path)
    con.execute("PRAGMA wal_checkpoint(TRUNCATE)")   # every page in the file itself
    page = con.execute("PRAGMA page_size").fetchone()[0]
    con.close()
    data = bytearray(path.read_bytes())
    assert len(data) >= 4 * page
    data[2 * page: 3 * page] = bytes(range(256)) * (page // 256)   # the third page overwritten
    path.write_bytes(bytes(data))
    line = refused_once(good_site, capsys, ["history", str(good_site)])
    assert line == (f"error: {path}: a damaged SQLite ledger (database disk image is malformed); restore it "
                    "from a backup")


@pytest.mark.parametrize("column, value, limit", [("yaw_deg", "1e300", "above the maximum 720"),
                                                  ("roll_deg", "-400", "below the minimum -180"),
                                                  ("pitch_deg", "181", "above the maximum 180")])
def test_station_angle_no_pose_has(good_site, capsys, refused_once, column, value, limit):
    # before: a yaw of 1e300 degrees was accepted (its remainder of a turn is noise)
    stations = good_site / "surveys/2026-10-31/stations.csv"
    pose = {"x": "500000", "y": "5700000", "z": "12", "roll_deg": "0", "pitch_deg": "0", "yaw_deg": "10"}
    pose[column] = value
    stations.write_text(stations.read_text().replace(",,,,,,", "," + ",".join(pose.values())))
    line = refused_once(good_site, capsys)
    number = f"{float(value):g}"
    assert line == f"error: site/surveys/2026-10-31/stations.csv line 2: {column}: {number} is {limit}"


def test_movement_table_that_is_a_broken_link(good_site, capsys, refused_once):
    # before: a link that leads nowhere read as no table: the month's tickets silently none
    path = good_site / "movements/2026-10/weighbridge.csv"
    path.unlink()
    path.symlink_to("weighbridge-export.csv")
    line = refused_once(good_site, capsys)
    assert line == "error: site/movements/2026-10/weighbridge.csv: cannot be read (No such file or directory)"


def test_site_file_that_is_a_broken_link(good_site, capsys, refused_once):
    path = good_site / "materials.csv"
    path.unlink()
    path.symlink_to("materials-2026.csv")
    assert refused_once(good_site, capsys) == ("error: site/materials.csv: a link to 'materials-2026.csv', which "
                                               "leads to no file")


def test_movements_folder_of_no_real_month(good_site, capsys, refused_once):
    # before: a warning, and the folder's movements were left out of every close
    (good_site / "movements/2026-10").rename(good_site / "movements/2026-13")
    assert refused_once(good_site, capsys) == ("error: site/movements/2026-13: folder name is not a real month "
                                               "(YYYY-MM, month 01-12)")


def test_ticket_of_another_material_than_its_pile_is_a_warning_of_the_check(good_site, capsys):
    # before: check said nothing; only the close warned
    import warnings

    from inventory.cli import main
    from inventory.site.load import load_site

    _cell(good_site / "movements/2026-10/weighbridge.csv", 1, "material", "salt")   # into pile A of coal
    assert main(["check", str(good_site)]) == 0
    assert ("warning: site/movements/2026-10/weighbridge.csv line 2: material: ticket T1 carries 'salt' into "
            "pile A of 'coal'") in capsys.readouterr().err.splitlines()
    with warnings.catch_warnings(record=True) as caught:   # a close's load leaves it to the book step
        warnings.simplefilter("always")
        load_site(good_site, "2026-10")
    assert not [w for w in caught if "carries 'salt'" in str(w.message)]


def test_opening_dated_in_a_month_without_a_survey_is_a_warning_of_the_check(good_site, capsys):
    # before: check passed without a word, and the close refused the line
    from inventory.cli import main

    path = good_site / "opening.csv"
    path.write_text(path.read_text().replace("B,500,2026-10-01T00:00:00+02:00", "B,500,2031-10-02T08:00:00+02:00"))
    assert main(["check", str(good_site)]) == 0
    assert ("warning: site/opening.csv line 3: as_of: dated in 2031-10, a month without a survey: with no ledger, "
            "a close opens from opening.csv only in the month its balances are dated (surveyed: 2026-10)"
            ) in capsys.readouterr().err.splitlines()


# ----------------------------------------------------------------------------- what a close writes, seen by check
@pytest.mark.parametrize("damage, expected", [
    (lambda site: (site / "ledger.sqlite").write_bytes(b"SQLite? no " * 500),
     "ledger.sqlite: not a readable SQLite ledger (file is not a database); restore it from a backup"),
    (lambda site: (site / "ledger.sqlite").mkdir(),
     "ledger.sqlite: is a folder, not a ledger file; move it away (a close creates the file)"),
    (lambda site: (site / "closes").write_text("x"),
     "closes: is not a folder; the close keeps its outputs in the folder closes/"),
    (lambda site: ((site / "closes").mkdir(), (site / "closes" / "2026-10").write_text("x")),
     "closes/2026-10: is not a folder; the outputs of 2026-10 go into a folder of this name: move it away"),
], ids=["ledger-not-sqlite", "ledger-folder", "closes-file", "period-file"])
def test_check_names_what_a_close_would_refuse_to_write_into(good_site, capsys, refused_once, damage, expected):
    # before: check passed, and the close refused it
    damage(good_site)
    assert refused_once(good_site, capsys) == f"error: {good_site}/{expected}"


def test_check_reads_a_good_ledger_without_writing_beside_it(good_site, make_close_result, capsys):
    import sqlite3

    from inventory.cli import main
    from inventory.ledger.store import Ledger

    path = good_site / "ledger.sqlite"
    with Ledger(path) as led:
        led.record_close(make_close_result("2026-09"), {}, "0.1.0", who="a")
    con = sqlite3.connect(path)
    con.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    con.close()
    for side in ("ledger.sqlite-wal", "ledger.sqlite-shm"):
        (good_site / side).unlink(missing_ok=True)
    before = path.read_bytes()
    assert main(["check", str(good_site)]) == 0, capsys.readouterr().err
    assert path.read_bytes() == before
    assert sorted(p.name for p in good_site.glob("ledger.sqlite*")) == ["ledger.sqlite"]


@pytest.mark.parametrize("ledger_bytes", [b"", None], ids=["cut-to-0-bytes", "deleted"])
def test_history_of_an_emptied_ledger_beside_published_outputs_is_refused(good_site, capsys, refused_once,
                                                                        ledger_bytes):
    # before: an empty history, as if the site had never closed a month
    folder = good_site / "closes" / "2026-09"
    folder.mkdir(parents=True)
    (folder / "run.json").write_text('{"close_id": 4}')
    if ledger_bytes is not None:
        (good_site / "ledger.sqlite").write_bytes(ledger_bytes)
    line = refused_once(good_site, capsys, ["history", str(good_site)])
    assert line.startswith(f"error: {good_site / 'ledger.sqlite'}: the ledger holds no close, but "
                           "closes/2026-09/run.json holds the outputs of ledger close 4")
