"""Reading CSV tables against their table schema.

The schemas in ``inventory/site/schemas/*.table.json`` follow a subset of the Frictionless Table Schema
specification: field ``name``, ``type`` (``string``, ``number``, ``integer``, ``datetime``),
``description`` and ``constraints`` (``required``, ``unique``, ``enum``, ``minimum``,
``maximum``, plus ``exclusiveMinimum`` and ``exclusiveMaximum``, which are ours). A
``datetime`` must be ISO 8601 *with* a UTC offset: a time without one is ambiguous for a
site that closes its books across a daylight-saving change.

Every problem names the file, the line (the header is line 1) and the field.
"""

from __future__ import annotations

import csv
import io
import json
import math
from dataclasses import dataclass
from datetime import datetime, timezone
from functools import lru_cache
from importlib import resources
from pathlib import Path
from typing import Any

import pandas as pd

from inventory.errors import Problem

__all__ = ["TableSchema", "is_blank", "read_table", "table_schema", "parse_time"]

#: The years a time may fall in: the range of pandas' nanosecond timestamps, whole years.
_FIRST_YEAR, _LAST_YEAR = pd.Timestamp.min.year + 1, pd.Timestamp.max.year - 1


@dataclass(frozen=True)
class TableSchema:
    """One table's schema: its fields in order and the primary key."""

    name: str
    fields: tuple[dict, ...]
    primary_key: tuple[str, ...] = ()

    @property
    def required(self) -> list[str]:
        return [f["name"] for f in self.fields if f.get("constraints", {}).get("required")]

    @property
    def names(self) -> list[str]:
        return [f["name"] for f in self.fields]


@lru_cache(maxsize=None)
def is_blank(value: Any) -> bool:
    """Whether a cell holds no value: None, NaN, NaT, ``pd.NA`` or blank text.

    >>> [is_blank(v) for v in (None, float("nan"), pd.NaT, "  ", "", 0, "A1")]
    [True, True, True, True, True, False, False]
    """
    if value is None:
        return True
    if isinstance(value, str):
        return value.strip() == ""
    try:
        return bool(pd.isna(value))
    except (TypeError, ValueError):
        return False


def table_schema(name: str) -> TableSchema:
    """The packaged schema ``inventory/site/schemas/<name>.table.json``."""
    text = resources.files("inventory").joinpath("site", "schemas", f"{name}.table.json").read_text("utf-8")
    doc = json.loads(text)
    return TableSchema(name, tuple(doc["fields"]), tuple(doc.get("primaryKey", ())))


def parse_time(text: str) -> datetime:
    """Parse an ISO 8601 time that carries a UTC offset; return it in UTC.

    Raises ``ValueError`` with a reason a user can act on.

    >>> parse_time("2026-10-31T16:00:00+01:00").isoformat()
    '2026-10-31T15:00:00+00:00'
    """
    value = text.strip()
    if value.endswith(("Z", "z")):
        value = value[:-1] + "+00:00"
    try:
        t = datetime.fromisoformat(value)
    except ValueError:
        raise ValueError(f"'{text}' is not an ISO 8601 date-time") from None
    if t.tzinfo is None or t.utcoffset() is None:
        raise ValueError(f"'{text}' has no UTC offset (write e.g. {value}+01:00)")
    try:
        utc = t.astimezone(timezone.utc)
    except OverflowError:
        raise ValueError(f"'{text}' is outside the dates a time can hold") from None
    if not _FIRST_YEAR <= utc.year <= _LAST_YEAR:
        raise ValueError(f"'{text}' is outside the years {_FIRST_YEAR}-{_LAST_YEAR}")
    return utc


def _convert(value: str, ftype: str) -> Any:
    if ftype == "string":
        return value
    if ftype == "number":
        try:
            number = float(value)
        except ValueError:
            raise ValueError(f"'{value}' is not a number") from None
        if not math.isfinite(number):
            raise ValueError(f"'{value}' is not a finite number")
        return number
    if ftype == "integer":
        try:
            return int(value)
        except ValueError:
            raise ValueError(f"'{value}' is not a whole number") from None
    if ftype == "datetime":
        return parse_time(value)
    raise ValueError(f"unknown field type {ftype!r} in schema")


def _check_constraints(value: Any, cons: dict) -> str | None:
    if "enum" in cons and value not in cons["enum"]:
        return f"'{value}' is not one of {', '.join(map(str, cons['enum']))}"
    if "minimum" in cons and value < cons["minimum"]:
        return f"{value:g} is below the minimum {cons['minimum']:g}"
    if "exclusiveMinimum" in cons and value <= cons["exclusiveMinimum"]:
        return f"{value:g} must be greater than {cons['exclusiveMinimum']:g}"
    if "maximum" in cons and value > cons["maximum"]:
        return f"{value:g} is above the maximum {cons['maximum']:g}"
    if "exclusiveMaximum" in cons and value >= cons["exclusiveMaximum"]:
        return f"{value:g} must be less than {cons['exclusiveMaximum']:g}"
    return None


#: Byte-order marks of encodings other than UTF-8, as a spreadsheet program may save a table.
_OTHER_BOMS = (
    (b"\xff\xfe\x00\x00", "UTF-32"),
    (b"\x00\x00\xfe\xff", "UTF-32"),
    (b"\xff\xfe", "UTF-16"),
    (b"\xfe\xff", "UTF-16"),
)


def _decode(path: Path, display: str, problems: list[Problem]) -> str | None:
    try:
        raw = path.read_bytes()
    except OSError as err:
        problems.append(Problem(display, None, None, f"cannot be read ({err.strerror or err})"))
        return None
    if raw.startswith(b"\xef\xbb\xbf"):  # a byte-order mark, as spreadsheet programs write it
        raw = raw[3:]
    for bom, name in _OTHER_BOMS:
        if raw.startswith(bom):
            problems.append(Problem(display, None, None, f"{name} text (it starts with a {name} byte-order mark); save the file as UTF-8"))
            return None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as err:
        line = raw[: err.start].count(b"\n") + 1
        problems.append(Problem(display, line, None, f"not UTF-8 text (byte 0x{raw[err.start]:02x}); save the file as UTF-8"))
        return None
    if "\x00" in text:
        at = text.index("\x00")
        problems.append(Problem(display, text.count("\n", 0, at) + 1, None,
                                "holds a NUL byte: not a text file, or UTF-16 text; save the file as UTF-8"))
        return None
    return text


def _open_quote_line(lines: list[str], start: int, stop: int) -> int | None:
    """The line (1-based) of a quote still open at the end of line ``stop``, reading a
    record from the start of line ``start``; None when no quote is open there.

    Follows the CSV quoting rules: a quote at the start of a value opens it, a doubled
    quote inside is a quote, a single one closes it.
    """
    opened: int | None = None
    at_start = True
    for number in range(start, min(stop, len(lines)) + 1):
        text = lines[number - 1]
        i = 0
        while i < len(text):
            c = text[i]
            if opened is not None:
                if c == '"':
                    if text[i + 1 : i + 2] == '"':
                        i += 1
                    else:
                        opened = None
            elif c == '"' and at_start:
                opened = number
            at_start = opened is None and c in ",\r\n"
            i += 1
    return opened


#: Separators a spreadsheet or database export may use instead of ',', as the message names them.
_OTHER_SEPARATORS = ((";", "';'"), ("\t", "tabs"), ("|", "'|'"))


def _header_problems(
    header: list[str], raw_header: str, schema: TableSchema, display: str, problems: list[Problem]
) -> bool:
    """Check the header line; append its problems and return True when the rows can be read."""
    known = set(schema.names)
    for sep, shown in _OTHER_SEPARATORS:
        if sep not in raw_header:
            continue
        names = [h.strip() for h in raw_header.split(sep)]
        if set(schema.required) <= set(names) and all(n in known for n in names if n):
            problems.append(Problem(
                display, 1, None,
                f"the file seems to use {shown} between values; the tool needs ',' between values "
                "(and '.' for decimals): save it as comma-separated CSV",
            ))
            return False
    ok = True
    first: dict[str, int] = {}
    for position, name in enumerate(header, start=1):
        if not name:
            continue
        if name in first:
            problems.append(Problem(display, 1, name, f"the column appears twice (columns {first[name]} and {position})"))
            ok = False
        else:
            first[name] = position
    return ok


def _records(text: str, display: str, problems: list[Problem]):
    """Yield ``(line, cells)`` for each record of ``text``, ``cells`` None for a record
    that cannot be read; quote errors become problems.

    A record whose quoted value runs over a line break is a problem (no value of these
    tables holds one: it is a quote opened by mistake), as is a quote never closed.
    """
    lines = io.StringIO(text, newline="").readlines()  # split as the reader splits
    reader = csv.reader(io.StringIO(text, newline=""), strict=True)
    start = 1
    while True:
        try:
            record = next(reader)
        except StopIteration:
            return
        except csv.Error as err:
            line = reader.line_num
            opened = _open_quote_line(lines, start, line)
            if "expected after" in str(err):
                problems.append(Problem(display, line, None,
                                        "text after the closing quote of a value (a stray '\"'?); "
                                        "a quoted value ends at its closing quote, and a quote inside one is doubled"))
            elif "field limit" in str(err) and opened is None:
                problems.append(Problem(display, line, None,
                                        f"a value is longer than {csv.field_size_limit()} characters"))
            elif "field limit" in str(err):
                problems.append(Problem(display, opened, None,
                                        f"the quote opened on this line is not closed within {csv.field_size_limit()} "
                                        "characters (a stray '\"'?)"))
            else:
                problems.append(Problem(display, opened or start, None,
                                        "the quote opened on this line is never closed (a stray '\"'?), "
                                        "so every row after it would be read into one value"))
            return
        end = reader.line_num
        if end > start and any("\n" in cell or "\r" in cell for cell in record):
            opened = _open_quote_line(lines, start, end - 1) or start
            problems.append(Problem(
                display, opened, None,
                f"the quote opened on this line closes only on line {end}, so lines {opened}-{end} would be "
                "read as one value (a stray '\"'?); a value cannot hold a line break",
            ))
            yield end, None
        else:
            yield end, record
        start = end + 1


def read_table(
    path: Path, schema: TableSchema, problems: list[Problem], *, display: str | None = None,
    empty_ok: bool = False,
) -> pd.DataFrame:
    """Read one CSV against its schema, appending every problem found to ``problems``.

    Returns a DataFrame with the schema's columns (missing optional ones as empty), typed
    values (times as tz-aware UTC ``Timestamp``), and two extra columns: ``line`` (the CSV
    line number, header = 1) and ``source`` (``display``). Rows with errors are left out.
    A file with a header and no rows is a problem unless ``empty_ok`` (a table with no
    records this month), when it reads as an empty table.

    A row with more or fewer cells than the header, a quote never closed or closed only
    lines later, a header naming a column twice, and a file that is not UTF-8 are problems
    too; a UTF-8 byte-order mark is accepted.
    """
    display = display or str(path)
    columns = schema.names + ["line", "source"]
    empty = pd.DataFrame({c: pd.Series(dtype=object) for c in columns})
    text = _decode(path, display, problems)
    if text is None:
        return empty
    records = _records(text, display, problems)
    try:
        _, header = next(records)
    except StopIteration:
        header = None
    if header is None:
        if not any(p.path == display and p.severity == "error" for p in problems):
            problems.append(Problem(display, 1, None, "the file is empty (expected a header line)"))
        return empty
    header = [h.strip() for h in header]
    raw_header = io.StringIO(text, newline="").readline()
    if not _header_problems(header, raw_header, schema, display, problems):
        return empty
    if raw_header.strip().lower().startswith("sep="):
        # a spreadsheet program's hint line above the header (Excel writes "sep=,")
        problems.append(Problem(display, 1, None, f"the first line is a spreadsheet's separator hint "
                                                  f"({raw_header.strip()!r}), not the header; delete that line"))
        return empty
    known = set(schema.names)
    for name in schema.required:
        if name not in header:
            alike = [h for h in header if h.strip().lower().replace(" ", "_") == name and h != name]
            hint = f" (there is a column {alike[0]!r}: column names are lower case, words joined by '_')" if alike else ""
            problems.append(Problem(display, 1, name, "required column is missing" + hint))
    for name in header:
        if name and name not in known:
            problems.append(Problem(display, 1, name, "unknown column (ignored)", "warning"))
    if any(name not in header for name in schema.required):
        return empty
    index = {name: header.index(name) for name in schema.names if name in header}
    fields = {f["name"]: f for f in schema.fields}
    rows: list[dict] = []
    seen: dict[str, dict[Any, int]] = {
        f["name"]: {} for f in schema.fields if f.get("constraints", {}).get("unique")
    }
    for line, record in records:
        if record is None:
            continue
        if not any(cell.strip() for cell in record):
            continue
        if len(record) != len(header):
            hint = " (decimal commas? the tool needs ',' between values and '.' for decimals)" if len(record) > len(header) else ""
            problems.append(Problem(display, line, None,
                                    f"the row has {len(record)} cells, the header {len(header)}{hint}"))
            continue
        row: dict[str, Any] = {"line": line, "source": display}
        ok = True
        for name, field in fields.items():
            cons = field.get("constraints", {})
            cell = record[index[name]].strip() if name in index and index[name] < len(record) else ""
            if cell == "":
                if cons.get("required"):
                    problems.append(Problem(display, line, name, "value is missing"))
                    ok = False
                row[name] = None
                continue
            try:
                value = _convert(cell, field["type"])
            except ValueError as err:
                problems.append(Problem(display, line, name, str(err)))
                ok = False
                continue
            why = _check_constraints(value, cons)
            if why:
                problems.append(Problem(display, line, name, why))
                ok = False
                continue
            if name in seen:
                if value in seen[name]:
                    problems.append(
                        Problem(display, line, name, f"'{value}' repeats line {seen[name][value]}")
                    )
                    ok = False
                    continue
                seen[name][value] = line
            row[name] = value
        if ok:
            rows.append(row)
    if not rows and not empty_ok and not any(p.path == display and p.severity == "error" for p in problems):
        problems.append(Problem(display, 2, None, "the table has a header but no rows"))
    if not rows:
        return empty
    frame = pd.DataFrame(rows, columns=columns)
    for field in schema.fields:
        if field["type"] == "datetime":
            frame[field["name"]] = pd.to_datetime(frame[field["name"]], utc=True)
        elif field["type"] == "number":
            frame[field["name"]] = frame[field["name"]].astype(float)
    return frame
