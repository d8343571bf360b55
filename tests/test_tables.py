"""Reading CSV tables (inventory/io/tables.py): rows that do not fit their header, quote
errors, repeated column names, header-only tables and encodings. Each bad file is refused
with a message naming file, line and why, and the site folder is left as it was."""

from __future__ import annotations

import hashlib
from pathlib import Path

import pytest

from inventory.cli import main
from inventory.io.tables import parse_time, read_table, table_schema
from inventory.site.load import check_site, load_site

MV = "movements/2026-10"


def tree_digest(root: Path) -> dict[str, str]:
    return {
        str(p.relative_to(root)): hashlib.sha256(p.read_bytes()).hexdigest() if p.is_file() else "dir"
        for p in sorted(root.rglob("*"))
    }


def refused(site: Path, capsys, *commands: str) -> list[str]:
    """Run ``inventory check`` (and ``close`` when asked) on ``site``; each must exit 2 and
    leave the folder byte-identical. Returns the error lines of the check."""
    before = tree_digest(site)
    assert main(["check", str(site)]) == 2
    lines = [line[len("error: "):] for line in capsys.readouterr().err.splitlines() if line.startswith("error: ")]
    for command in commands:
        assert main([command, str(site), "--period", "2026-10", "--quiet"]) == 2
        capsys.readouterr()
    assert tree_digest(site) == before
    return lines


def read(path: Path, name: str, **kw):
    problems: list = []
    frame = read_table(path, table_schema(name), problems, display=path.name, **kw)
    return frame, [str(p) for p in problems if p.severity == "error"]


# --- rows that do not fit their header ------------------------------------------------------
def test_decimal_commas_give_a_row_too_many_cells(good_site, capsys):
    # 2,40 t/m3 and 0,08 written with decimal commas: nine cells under five column names
    path = good_site / "materials.csv"
    path.write_text(path.read_text() + "gravel,2,40,0,08,5,0,3,0\n")
    errors = refused(good_site, capsys, "close")
    assert errors == [
        ("site/materials.csv line 4: the row has 9 cells, the header 5 "
        "(decimal commas? the tool needs ',' between values and '.' for decimals)")
    ]
    assert not (good_site / "closes").exists() and not (good_site / "ledger.sqlite").exists()


def test_row_with_too_few_cells(good_site, capsys):
    path = good_site / MV / "weighbridge.csv"
    path.write_text(path.read_text().replace("in,coal,A,40.0,15.0,25.0,XY1", "in,coal,A,40.0,25.0,XY1"))
    assert refused(good_site, capsys) == [f"site/{MV}/weighbridge.csv line 2: the row has 8 cells, the header 9"]


def test_semicolon_delimited_file_gets_a_hint(good_site, capsys):
    path = good_site / "materials.csv"
    path.write_text(
        "material;bulk_density_t_m3;density_sd_t_m3;moisture_pct;tolerance_pct\n"
        "coal;0,85;0,03;8;3\nsalt;1,25;0,04;2;2\n"
    )
    errors = refused(good_site, capsys)
    assert errors[0] == (
        "site/materials.csv line 1: the file seems to use ';' between values; the tool needs ',' between "
        "values (and '.' for decimals): save it as comma-separated CSV"
    )
    # the materials are unknown to the piles, which says nothing new about materials.csv
    assert [e for e in errors if e.startswith("site/materials.csv")] == errors[:1]


def test_semicolons_inside_values_are_not_taken_for_a_delimiter(tmp_path):
    path = tmp_path / "transfers.csv"
    path.write_text("from_pile,to_pile,time,tonnes,reference\nA,B,2026-10-10T10:00:00+02:00,30,WO-1;WO-2\n")
    frame, errors = read(path, "transfers")
    assert errors == []
    assert list(frame["reference"]) == ["WO-1;WO-2"]


# --- quotes --------------------------------------------------------------------------------
def test_unterminated_quote_in_weighbridge_is_an_error(sample_copy, capsys):
    path = sample_copy / MV / "weighbridge.csv"
    lines = path.read_text().splitlines(keepends=True)
    assert lines[99].endswith(",FL-01,WB1\n")  # test set-up: line 100 of the file
    lines[99] = lines[99].replace(",FL-01,", ',"FL-01,')
    path.write_text("".join(lines))
    errors = refused(sample_copy, capsys)
    assert errors == [
        (f"sample_site/{MV}/weighbridge.csv line 100: the quote opened on this line is never closed "
        "(a stray '\"'?), so every row after it would be read into one value")
    ]


def test_quote_closed_lines_later_is_an_error(good_site, capsys):
    path = good_site / MV / "weighbridge.csv"
    path.write_text(path.read_text().replace(",XY1", ',"XY1').replace(",XY2", ',XY2"'))
    assert refused(good_site, capsys) == [
        (f"site/{MV}/weighbridge.csv line 2: the quote opened on this line closes only on line 3, so lines 2-3 "
        "would be read as one value (a stray '\"'?); a value cannot hold a line break")
    ]


def test_text_after_a_closing_quote_is_an_error(tmp_path):
    path = tmp_path / "transfers.csv"
    path.write_text('from_pile,to_pile,time,tonnes,reference\nA,B,2026-10-10T10:00:00+02:00,30,"WO"-1\n')
    frame, errors = read(path, "transfers")
    assert errors == [
        ("transfers.csv line 2: text after the closing quote of a value (a stray '\"'?); a quoted value ends "
        "at its closing quote, and a quote inside one is doubled")
    ]
    assert frame.empty


def test_quoted_values_and_doubled_quotes_still_read(tmp_path):
    path = tmp_path / "transfers.csv"
    path.write_text(
        'from_pile,to_pile,time,tonnes,reference\n'
        '"A","B",2026-10-10T10:00:00+02:00,"30","WO ""1"", shift 2"\n'
        'B,A,2026-10-11T10:00:00+02:00,5,\n'
    )
    frame, errors = read(path, "transfers")
    assert errors == []
    assert frame["reference"].iloc[0] == 'WO "1", shift 2'
    assert frame["reference"].isna().iloc[1]
    assert list(frame["tonnes"]) == [30.0, 5.0]
    assert list(frame["line"]) == [2, 3]


def test_quote_opened_in_a_later_line_of_a_row_is_named(tmp_path):
    path = tmp_path / "transfers.csv"
    path.write_text(
        "from_pile,to_pile,time,tonnes,reference\n"
        "A,B,2026-10-10T10:00:00+02:00,30,WO-1\n"
        'A,B,2026-10-11T10:00:00+02:00,30,"WO-2\n'
        "A,B,2026-10-12T10:00:00+02:00,30,WO-3\n"
    )
    _, errors = read(path, "transfers")
    assert errors == [
        ("transfers.csv line 3: the quote opened on this line is never closed (a stray '\"'?), "
        "so every row after it would be read into one value")
    ]


# --- the header ----------------------------------------------------------------------------
def test_column_named_twice(good_site, capsys):
    path = good_site / MV / "weighbridge.csv"
    text = path.read_text()
    path.write_text(text.replace(",vehicle\n", ",gross_t\n", 1))
    assert refused(good_site, capsys) == [
        f"site/{MV}/weighbridge.csv line 1: gross_t: the column appears twice (columns 6 and 9)"
    ]


# --- tables without records ----------------------------------------------------------------
@pytest.mark.parametrize("name", ["weighbridge", "belt_scales", "routing", "transfers"])
def test_header_only_movement_table_is_an_empty_table(good_site, name):
    path = good_site / MV / f"{name}.csv"
    path.write_text(path.read_text().splitlines()[0] + "\n")
    report = check_site(good_site)
    assert [str(p) for p in report.errors] == []
    movements = report.site.movements["2026-10"]
    assert len(getattr(movements, name)) == 0
    assert movements.record_count == {"weighbridge": 3, "belt_scales": 4, "routing": 4, "transfers": 4}[name]


def test_header_only_materials_is_still_an_error(good_site):
    (good_site / "materials.csv").write_text("material,bulk_density_t_m3,density_sd_t_m3,moisture_pct\n")
    assert "site/materials.csv line 2: the table has a header but no rows" in [str(p) for p in check_site(good_site).errors]


@pytest.mark.slow
def test_month_with_header_only_belt_scales_closes(good_site, capsys):
    path = good_site / MV / "belt_scales.csv"
    path.write_text("scale_id,start,end,tonnes\n")
    assert main(["close", str(good_site), "--period", "2026-10", "--quiet"]) == 0
    assert (good_site / "closes" / "2026-10").is_dir()
    assert main(["history", str(good_site)]) == 0
    assert "2026-10" in capsys.readouterr().out


def test_empty_file_is_an_error(tmp_path):
    path = tmp_path / "routing.csv"
    path.write_bytes(b"")
    frame, errors = read(path, "routing", empty_ok=True)
    assert errors == ["routing.csv line 1: the file is empty (expected a header line)"]
    assert frame.empty


# --- encodings -----------------------------------------------------------------------------
def test_latin1_degree_sign_names_line_and_byte(good_site, capsys):
    path = good_site / MV / "transfers.csv"
    path.write_bytes(path.read_bytes().replace(b"WO-1", "WO-1 3°".encode("latin-1")))
    assert refused(good_site, capsys) == [f"site/{MV}/transfers.csv line 2: not UTF-8 text (byte 0xb0); save the file as UTF-8"]


def test_utf16_with_bom_is_named(good_site, capsys):
    path = good_site / "materials.csv"
    path.write_bytes(path.read_text().encode("utf-16"))  # Python writes the BOM first
    assert path.read_bytes()[:2] == b"\xff\xfe"
    errors = refused(good_site, capsys)
    assert errors[0] == "site/materials.csv: UTF-16 text (it starts with a UTF-16 byte-order mark); save the file as UTF-8"


def test_utf16_without_bom_is_named(tmp_path):
    path = tmp_path / "routing.csv"
    path.write_bytes("scale_id,pile_id,start,end\n".encode("utf-16-le"))
    _, errors = read(path, "routing")
    assert errors == ["routing.csv line 1: holds a NUL byte: not a text file, or UTF-16 text; save the file as UTF-8"]


def test_utf8_bom_is_accepted(good_site):
    path = good_site / "materials.csv"
    path.write_bytes(b"\xef\xbb\xbf" + "material,bulk_density_t_m3,density_sd_t_m3,moisture_pct,tolerance_pct\n"
                     "coal,0.85,0.03,8,3\nsalt,1.25,0.04,2,2\nÖl-Schiefer,1.9,0.05,4,\n".encode())
    site = load_site(good_site)
    assert sorted(site.materials) == ["coal", "salt", "Öl-Schiefer"]
    assert site.materials["coal"].bulk_density_t_m3 == 0.85


# --- times a timestamp cannot hold ---------------------------------------------------------
def test_time_outside_the_years_a_timestamp_holds(good_site, capsys):
    path = good_site / MV / "transfers.csv"
    path.write_text(path.read_text().replace("2026-10-10T10:00", "0226-10-10T10:00"))
    assert refused(good_site, capsys) == [
        f"site/{MV}/transfers.csv line 2: time: '0226-10-10T10:00:00+02:00' is outside the years 1678-2261"
    ]


def test_first_day_of_the_calendar_with_an_offset_is_a_value_error():
    with pytest.raises(ValueError, match="outside the dates a time can hold"):
        parse_time("0001-01-01T00:30:00+01:00")


def test_station_file_name_too_long_for_the_system(good_site, capsys):
    # a name longer than the file system allows made the existence check itself fail
    path = good_site / "surveys/2026-10-31/stations.csv"
    name = "x" * 5000
    path.write_text(path.read_text().replace("a.laz,S1", f"{name},S1"))
    errors = refused(good_site, capsys)
    assert f"site/surveys/2026-10-31/stations.csv line 2: file: no file '{name}' in site/surveys/2026-10-31" in errors


def test_value_longer_than_csv_allows(good_site, capsys):
    # a 200,000-character material name: over the csv module's field size limit
    path = good_site / "materials.csv"
    path.write_text(path.read_text() + "x" * 200_000 + ",1.0,0.1,1,\n")
    errors = refused(good_site, capsys)
    assert "site/materials.csv line 4: a value is longer than 131072 characters" in errors
