"""Describing a GeoPackage's layers and fields, once GDAL has written them.

Each layer's description goes into ``gpkg_contents``; each field's title and description,
with the unit its name carries (:mod:`inventory.model.columns`), into ``gpkg_data_columns``,
the schema extension of OGC GeoPackage 1.3 (annex F.9), registered in ``gpkg_extensions``.
"""

from __future__ import annotations

import sqlite3
from collections.abc import Mapping
from pathlib import Path

from inventory.model.columns import FIELDS, unit_of

__all__ = ["describe_layers", "field_text"]

#: The schema extension's rows in ``gpkg_extensions`` (OGC GeoPackage 1.3, F.9, table 90).
_SCHEMA_EXTENSION = "http://www.geopackage.org/spec/#extension_schema"


def field_text(column: str) -> tuple[str, str] | None:
    """(title, description) of a field, the unit in both when the name carries one; ``None``
    for a column :data:`~inventory.model.columns.FIELDS` does not describe.

    >>> field_text("volume_m3")
    ('Volume [m3]', 'Volume between the surveyed surface and the base, from the grid. Unit: cubic metres (m3).')
    """
    if column not in FIELDS:
        return None
    title, description = FIELDS[column]
    unit = unit_of(column)
    if unit is None:
        return title, description
    return f"{title} [{unit[0]}]", f"{description} Unit: {unit[1]} ({unit[0]})."


def describe_layers(path: str | Path, descriptions: Mapping[str, str], crs: str) -> None:
    """Write ``descriptions`` (layer -> text) into ``gpkg_contents`` and a title and
    description for every described field of those layers into ``gpkg_data_columns``; the
    geometry column is described as the layer's polygons in ``crs``. One transaction."""
    con = sqlite3.connect(path)
    try:
        with con:
            con.execute(
                "CREATE TABLE IF NOT EXISTS gpkg_data_columns (table_name TEXT NOT NULL, "
                "column_name TEXT NOT NULL, name TEXT, title TEXT, description TEXT, "
                "mime_type TEXT, constraint_name TEXT, "
                "CONSTRAINT pk_gdc PRIMARY KEY (table_name, column_name), "
                "CONSTRAINT gdc_tn UNIQUE (table_name, name))")
            con.execute(
                "CREATE TABLE IF NOT EXISTS gpkg_data_column_constraints (constraint_name TEXT "
                "NOT NULL, constraint_type TEXT NOT NULL, value TEXT, min NUMERIC, "
                "min_is_inclusive BOOLEAN, max NUMERIC, max_is_inclusive BOOLEAN, "
                "description TEXT, CONSTRAINT gdcc_ntv UNIQUE (constraint_name, "
                "constraint_type, value))")
            con.execute(
                "CREATE TABLE IF NOT EXISTS gpkg_extensions (table_name TEXT, column_name TEXT, "
                "extension_name TEXT NOT NULL, definition TEXT NOT NULL, scope TEXT NOT NULL, "
                "CONSTRAINT ge_tce UNIQUE (table_name, column_name, extension_name))")
            for table in ("gpkg_data_columns", "gpkg_data_column_constraints"):
                con.execute(
                    "DELETE FROM gpkg_extensions WHERE table_name = ? AND column_name IS NULL "
                    "AND extension_name = 'gpkg_schema'", (table,))
                con.execute(
                    "INSERT INTO gpkg_extensions VALUES (?, NULL, 'gpkg_schema', ?, 'read-write')",
                    (table, _SCHEMA_EXTENSION))
            for layer, text in descriptions.items():
                con.execute("UPDATE gpkg_contents SET description = ? WHERE table_name = ?",
                            (text, layer))
                geom_col = con.execute("SELECT column_name FROM gpkg_geometry_columns "
                                       "WHERE table_name = ?", (layer,)).fetchone()[0]
                for row in con.execute(f'PRAGMA table_info("{layer}")').fetchall():
                    column, is_pk = row[1], row[5]
                    if is_pk:
                        continue
                    if column == geom_col:
                        described = ("Geometry", f"{layer} polygons in the site CRS ({crs}).")
                    else:
                        described = field_text(column)
                    if described is None:
                        continue
                    title, description = described
                    con.execute("INSERT OR REPLACE INTO gpkg_data_columns (table_name, "
                                "column_name, name, title, description) VALUES (?, ?, ?, ?, ?)",
                                (layer, column, title, title, description))
    finally:
        con.close()
