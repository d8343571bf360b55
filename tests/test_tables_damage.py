"""Damaged tables: every table the site folder holds, generated valid from its schema and then
broken (cells dropped, repeated or added, stray quotes, other delimiters, random bytes,
truncation, other encodings, an empty file, a header alone, very long lines).

Whatever the damage, reading gives a table or problems naming the file, and the site loader
(with the row rules) gives a site or ``InputError``/``InputErrors``: never another exception.
"""

from __future__ import annotations

import csv
import io
import warnings
from datetime import datetime, timedelta, timezone
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from inventory.errors import InputError, InputErrors, Problem
from inventory.io.tables import read_table, table_schema
from inventory.site.load import load_site

#: Where each table lives in the ``good_site`` fixture.
PLACES = {
    "materials": "materials.csv",
    "opening": "opening.csv",
    "weighbridge": "movements/2026-10/weighbridge.csv",
    "belt_scales": "movements/2026-10/belt_scales.csv",
    "routing": "movements/2026-10/routing.csv",
    "transfers": "movements/2026-10/transfers.csv",
    "stations": "surveys/2026-10-31/stations.csv",
    "trajectory": "surveys/2026-10-31/trajectory.csv",
}
#: Tables the loader reads with ``empty_ok`` (no records this month is legal).
MOVEMENTS = {"weighbridge", "belt_scales", "routing", "transfers"}

#: Values of the small site, so that a generated table is mostly valid against it too.
KNOWN = {
    "pile_id": ["A", "B"], "from_pile": ["A", "B"], "to_pile": ["B", "A"],
    "material": ["coal", "salt"], "file": ["a.laz"], "machine": ["M1"],
}
SCALE = {"weighbridge": ["WB1"], "belt_scales": ["B1"], "routing": ["B1"]}
# any text a person might type into a cell, not blank, without line breaks
TEXT = st.text(st.characters(blacklist_categories=("Cs",), blacklist_characters="\r\n\x00"), min_size=1, max_size=12).filter(str.strip)
OFFSETS = [timezone(timedelta(hours=h)) for h in (-5, 0, 1, 2, 9)]


def _number(cons: dict) -> st.SearchStrategy[str]:
    low = cons.get("minimum", cons.get("exclusiveMinimum", -1e6))
    high = cons.get("maximum", cons.get("exclusiveMaximum", 1e6))
    floats = st.floats(low, high, allow_nan=False, allow_infinity=False,
                       exclude_min="exclusiveMinimum" in cons, exclude_max="exclusiveMaximum" in cons)
    return floats.map(repr)  # exact, so a value at a bound stays inside it


def _cell(table: str, field: dict, row: int) -> st.SearchStrategy[str]:
    name, kind, cons = field["name"], field["type"], field.get("constraints", {})
    if kind == "number":
        value = _number(cons)
    elif kind == "integer":
        value = st.integers(-1000, 1000).map(str)
    elif kind == "datetime":
        value = st.builds(lambda t, z: t.replace(tzinfo=z).isoformat(timespec="seconds"),
                          st.datetimes(datetime(2026, 9, 1), datetime(2026, 11, 30)), st.sampled_from(OFFSETS))
    elif "enum" in cons:
        value = st.sampled_from(cons["enum"])
    elif name == "scale_id":
        value = st.sampled_from(SCALE.get(table, ["WB1", "B1"]))
    elif name in KNOWN:
        value = st.sampled_from(KNOWN[name])
    else:
        value = TEXT
    if cons.get("unique"):
        value = value.map(lambda v, row=row: f"{v}{row}")
    if not cons.get("required"):
        value = st.one_of(st.just(""), value)
    return value


@st.composite
def valid_table(draw, table: str) -> str:
    """A table in the schema's columns (sometimes reordered), written by ``csv.writer``."""
    fields = list(table_schema(table).fields)
    if draw(st.booleans()):
        fields = draw(st.permutations(fields))
    rows = [[f["name"] for f in fields]]
    for row in range(draw(st.integers(1, 6))):
        rows.append([draw(_cell(table, f, row)) for f in fields])
    out = io.StringIO(newline="")
    csv.writer(out, lineterminator=draw(st.sampled_from(["\n", "\r\n"]))).writerows(rows)
    return out.getvalue()


DAMAGES = [
    "drop_cell", "repeat_cell", "insert_cell", "stray_quote", "delimiter", "decimal_comma",
    "random_bytes", "truncate", "encoding", "empty", "header_only", "long_line", "blank_lines",
    "bom", "line_ends", "repeat_header_name",
]


def _damage(data, text: str) -> bytes:
    """Break ``text`` in one of the ways of :data:`DAMAGES`; return the file's bytes."""
    how = data.draw(st.sampled_from(DAMAGES), label="damage")
    lines = text.splitlines(keepends=True)
    pick = data.draw(st.integers(0, len(lines) - 1), label="line")
    cells = lines[pick].rstrip("\r\n").split(",")
    end = lines[pick][len(lines[pick].rstrip("\r\n")):]
    at = data.draw(st.integers(0, len(cells) - 1), label="cell")
    if how == "drop_cell":
        del cells[at]
    elif how == "repeat_cell":
        cells.insert(at, cells[at])
    elif how == "insert_cell":
        cells.insert(at, data.draw(TEXT, label="new cell"))
    elif how == "repeat_header_name":
        lines[0] = lines[0].rstrip("\r\n") + "," + lines[0].split(",")[0].strip() + "\n"
    elif how == "long_line":
        quote = data.draw(st.sampled_from(["", '"']), label="quote")
        cells[at] = quote + "x" * data.draw(st.sampled_from([5_000, 200_000]), label="length") + quote
    if how in ("drop_cell", "repeat_cell", "insert_cell", "long_line"):
        lines[pick] = ",".join(cells) + end
    text = "".join(lines)
    if how == "stray_quote":
        i = data.draw(st.integers(0, len(text)), label="quote at")
        text = text[:i] + '"' + text[i:]
    elif how == "delimiter":
        text = text.replace(",", data.draw(st.sampled_from([";", "\t", "|"]), label="delimiter"))
    elif how == "decimal_comma":
        text = text.replace(".", ",")
    elif how == "header_only":
        text = lines[0]
    elif how == "empty":
        text = ""
    elif how == "blank_lines":
        text = text + data.draw(st.sampled_from(["\n\n", ",,,\n", " \n", "\r\n\r\n,\n"]), label="blank")
    elif how == "line_ends":
        text = text.replace("\r\n", "\n").replace("\n", data.draw(st.sampled_from(["\r", "\r\n", "\n\r"]), label="eol"))
    raw = text.encode("utf-8")
    if how == "random_bytes":
        i = data.draw(st.integers(0, len(raw)), label="bytes at")
        raw = raw[:i] + data.draw(st.binary(min_size=1, max_size=16), label="bytes") + raw[i:]
    elif how == "truncate":
        raw = raw[: data.draw(st.integers(0, len(raw)), label="cut at")]
    elif how == "encoding":
        codec = data.draw(st.sampled_from(["latin-1", "cp1252", "utf-16", "utf-16-le", "utf-32"]), label="codec")
        raw = (text + "°Öé\n").encode(codec, errors="replace")
    elif how == "bom":
        raw = b"\xef\xbb\xbf" + raw
    return raw


def _read(path: Path, table: str, display: str) -> list[Problem]:
    problems: list[Problem] = []
    frame = read_table(path, table_schema(table), problems, display=display, empty_ok=table in MOVEMENTS)
    assert all(isinstance(p, Problem) and p.path == display for p in problems), problems
    assert list(frame.columns) == table_schema(table).names + ["line", "source"]
    assert all(isinstance(n, int) and n >= 2 for n in frame["line"])
    return [p for p in problems if p.severity == "error"]


def _read_damaged(folder: Path, data, table: str) -> None:
    path = folder / f"{table}.csv"
    text = data.draw(valid_table(table), label="table")
    path.write_bytes(text.encode("utf-8"))
    if table != "trajectory":  # a generated trajectory need not be valid row by row
        assert _read(path, table, "t.csv") == [], text
    path.write_bytes(_damage(data, text))
    _read(path, table, "t.csv")


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_read_table_gives_a_table_or_problems_naming_the_file(tmp_path, data):
    _read_damaged(tmp_path, data, data.draw(st.sampled_from(sorted(PLACES)), label="which table"))


@pytest.mark.slow
@pytest.mark.parametrize("table", sorted(PLACES))
@settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_read_table_gives_a_table_or_problems_for_each_table(tmp_path, table, data):
    _read_damaged(tmp_path, data, table)


def _load_damaged(site: Path, data, table: str) -> None:
    path = site / PLACES[table]
    before = path.read_bytes() if path.is_file() else None
    path.write_bytes(_damage(data, data.draw(valid_table(table), label="table")))
    try:
        errors = _read(path, table, "t.csv")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            try:
                load_site(site)
                loaded = []
            except (InputError, InputErrors) as err:
                loaded = [err.problem] if isinstance(err, InputError) else err.problems
        assert all(isinstance(p, Problem) for p in loaded)
        if errors:  # what reading found, the loader reports against the same file
            shown = f"{site.name}/{PLACES[table]}"
            assert any(p.path == shown and p.severity == "error" for p in loaded), (errors, loaded)
    finally:
        if before is None:
            path.unlink()
        else:
            path.write_bytes(before)


@settings(max_examples=15, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_site_loader_gives_a_site_or_input_errors(good_site, data):
    _load_damaged(good_site, data, data.draw(st.sampled_from(sorted(PLACES)), label="which table"))


@pytest.mark.slow
@pytest.mark.parametrize("table", sorted(PLACES))
@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_site_loader_gives_a_site_or_input_errors_for_each_table(good_site, table, data):
    _load_damaged(good_site, data, table)
