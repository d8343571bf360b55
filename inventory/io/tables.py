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

__all__ = ["TableSchema", "read_table", "table_schema", "parse_time"]

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
    return t.astimezone(timezone.utc)


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


def _decode(path: Path, display: str, problems: list[Problem]) -> str | None:
    raw = path.read_bytes()
    if raw.startswith(b"\xef\xbb\xbf"):  # a byte-order mark, as spreadsheet programs write it
        raw = raw[3:]
    try:
        return raw.decode("utf-8")
    except UnicodeDecodeError as err:
        line = raw[: err.start].count(b"\n") + 1
        problems.append(Problem(display, line, None, f"not UTF-8 text (byte 0x{raw[err.start]:02x}); save the file as UTF-8"))
        return None


def read_table(
    path: Path, schema: TableSchema, problems: list[Problem], *, display: str | None = None
) -> pd.DataFrame:
    """Read one CSV against its schema, appending every problem found to ``problems``.

    Returns a DataFrame with the schema's columns (missing optional ones as empty), typed
    values (times as tz-aware UTC ``Timestamp``), and two extra columns: ``line`` (the CSV
    line number, header = 1) and ``source`` (``display``). Rows with errors are left out.
    """
    display = display or str(path)
    columns = schema.names + ["line", "source"]
    empty = pd.DataFrame({c: pd.Series(dtype=object) for c in columns})
    text = _decode(path, display, problems)
    if text is None:
        return empty
    reader = csv.reader(io.StringIO(text, newline=""))
    try:
        header = next(reader)
    except StopIteration:
        problems.append(Problem(display, 1, None, "the file is empty (expected a header line)"))
        return empty
    header = [h.strip() for h in header]
    known = set(schema.names)
    for name in schema.required:
        if name not in header:
            problems.append(Problem(display, 1, name, "required column is missing"))
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
    for record in reader:
        line = reader.line_num
        if not any(cell.strip() for cell in record):
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
    if not rows and not any(p.path == display and p.severity == "error" for p in problems):
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
