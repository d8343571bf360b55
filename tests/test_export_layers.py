"""GeoPackage layers: every pile figure as attributes, CRS set, read back by GDAL's ogrinfo."""

from __future__ import annotations

import math
import re
import shutil
import sqlite3
import subprocess

import numpy as np
import pytest

from inventory.export.layers import (
    CLOSE_COLUMNS,
    COMMON_COLUMNS,
    LAYER_NAMES,
    read_piles_layer,
    write_layers,
)
from inventory.ledger.store import Ledger
from inventory.model.results import PILE_COLUMNS


@pytest.fixture
def result(make_close_result):
    return make_close_result("2026-01")


@pytest.fixture
def gpkg(result, tmp_path):
    return write_layers(result, tmp_path / "piles-2026-01.gpkg")


def _equal(e, g):
    if isinstance(e, (float, np.floating)) and math.isnan(e):
        return g is None or (isinstance(g, float) and math.isnan(g))
    if isinstance(e, (bool, np.bool_)):
        return bool(g) is bool(e) and g in (0, 1, True, False)
    if e == "" and g is None:
        return True
    return e == g


def test_layers_crs_and_counts(gpkg, result):
    import pyogrio
    from pyproj import CRS as ProjCRS

    names = [n for n, _ in pyogrio.list_layers(gpkg)]
    assert names == list(LAYER_NAMES)
    for name, expected in (("piles", len(result.piles)),
                           ("coverage_gaps", len(result.coverage_gaps)),
                           ("survey_extent", len(result.survey_extent))):
        info = pyogrio.read_info(gpkg, layer=name)
        assert info["features"] == expected, name
        assert ProjCRS.from_user_input(info["crs"]).to_epsg() == 25832, name
        assert info["geometry_type"] == "MultiPolygon", name


def test_pile_attributes_are_the_close_figures_exactly(gpkg, result):
    df = read_piles_layer(gpkg)
    assert list(df.columns) == PILE_COLUMNS + COMMON_COLUMNS
    for exp, got in zip(result.piles[PILE_COLUMNS].itertuples(index=False),
                        df[PILE_COLUMNS].itertuples(index=False)):
        for col, e, g in zip(PILE_COLUMNS, exp, got):
            assert _equal(e, g), (col, e, g)


def test_layers_agree_with_the_ledger(result, tmp_path):
    with Ledger(tmp_path / "ledger.sqlite") as led:
        led.record_close(result, {"piles.gpkg": "c" * 64}, "0.1.0")
        stored = led.adopted("2026-01")
    df = read_piles_layer(write_layers(result, tmp_path / "p.gpkg"))
    for col in PILE_COLUMNS:
        for e, g in zip(stored[col].tolist(), df[col].tolist()):
            if e is None:
                assert g is None or (isinstance(g, float) and math.isnan(g)) or g == "", col
            else:
                assert _equal(e, g), (col, e, g)


def test_geometry_is_the_footprint(gpkg, result):
    import geopandas as gpd

    back = gpd.read_file(gpkg, layer="piles")
    for pid, geom in zip(result.footprints.pile_id, result.footprints.geometry):
        got = back.loc[back.pile_id == pid, "geometry"].iloc[0]
        # shapely: symmetric difference of identical shapes has zero area
        assert got.symmetric_difference(geom).area == pytest.approx(0.0, abs=1e-6)
    gaps = gpd.read_file(gpkg, layer="coverage_gaps")
    assert gaps.area.sum() == pytest.approx(result.coverage_gaps.area.sum())


def test_is_a_valid_geopackage(gpkg):
    # OGC GeoPackage 12-128: application_id 0x47504B47 ("GPKG"), the two core tables,
    # and an SQLite file that passes its own integrity check
    con = sqlite3.connect(gpkg)
    try:
        assert con.execute("PRAGMA application_id").fetchone()[0] == 0x47504B47
        tables = {r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type='table'")}
        assert {"gpkg_spatial_ref_sys", "gpkg_contents"} <= tables
        assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        srs = {r[0] for r in con.execute("SELECT srs_id FROM gpkg_contents")}
        assert srs == {25832}
    finally:
        con.close()


def test_empty_coverage_gaps_still_make_a_layer(result, tmp_path):
    import pyogrio

    result.coverage_gaps = result.coverage_gaps.iloc[0:0]
    path = write_layers(result, tmp_path / "p.gpkg")
    assert pyogrio.read_info(path, layer="coverage_gaps")["features"] == 0


def test_crs_mismatch_is_refused(result, tmp_path):
    from inventory.errors import CRSError

    result.coverage_gaps = result.coverage_gaps.to_crs("EPSG:4326")
    with pytest.raises(CRSError, match="differs from the site CRS"):
        write_layers(result, tmp_path / "p.gpkg")
    assert not list(tmp_path.iterdir())


def test_missing_footprint_is_named(result, tmp_path):
    result.footprints = result.footprints.iloc[:2]
    with pytest.raises(ValueError, match="P-LIME-1"):
        write_layers(result, tmp_path / "p.gpkg")


@pytest.mark.tools
def test_ogrinfo_reads_the_layers(gpkg, result):
    if not shutil.which("ogrinfo"):
        pytest.skip("ogrinfo (Debian gdal-bin) not installed; `make tools` installs it when root")
    for name, n in (("piles", len(result.piles)), ("coverage_gaps", len(result.coverage_gaps)),
                    ("survey_extent", len(result.survey_extent))):
        proc = subprocess.run(["ogrinfo", "-so", str(gpkg), name], capture_output=True,
                              text=True, timeout=60)
        assert proc.returncode == 0, proc.stderr
        assert "Warning" not in proc.stderr and "ERROR" not in proc.stderr, proc.stderr
        assert re.search(rf"Feature Count: {n}\b", proc.stdout), (name, proc.stdout)
        assert 'ID["EPSG",25832]' in proc.stdout, name
        assert "Geometry: Multi Polygon" in proc.stdout
    # every attribute column is there, with real types
    proc = subprocess.run(["ogrinfo", "-so", str(gpkg), "piles"], capture_output=True, text=True,
                          timeout=60)
    for col in PILE_COLUMNS:
        assert re.search(rf"^{col}: ", proc.stdout, re.MULTILINE), col
    assert re.search(r"^variance_t: Real", proc.stdout, re.MULTILINE)
    # a value as GDAL's own reader prints it
    proc = subprocess.run(["ogrinfo", "-q", str(gpkg), "piles", "-where",
                           "pile_id = 'P-LIME-1'"], capture_output=True, text=True, timeout=60)
    m = re.search(r"out_of_tolerance \((?:Integer|Integer\(Boolean\))\) = (\d)", proc.stdout)
    assert m and m.group(1) == "1", proc.stdout


def test_undecided_flag_stays_empty(result, tmp_path):
    """A significance that could not be decided (NaN) is NULL, never a True."""
    res = result
    res.piles["significant"] = res.piles["significant"].astype(object)
    res.piles.loc[0, "significant"] = float("nan")
    proc_path = write_layers(res, tmp_path / "p.gpkg")
    df = read_piles_layer(proc_path)
    first = df.loc[df.pile_id == "P-COAL-1", "significant"].iloc[0]
    assert first is None or (isinstance(first, float) and math.isnan(first))
    assert bool(df.loc[df.pile_id == "P-LIME-1", "significant"].iloc[0]) is True


def _sql(path, query, args=()):
    con = sqlite3.connect(path)
    try:
        return con.execute(query, args).fetchall()
    finally:
        con.close()


def test_every_feature_carries_period_and_survey_date(gpkg, result):
    import pyogrio

    for name in LAYER_NAMES:
        df = pyogrio.read_dataframe(gpkg, layer=name, read_geometry=False)
        if name == "unassigned_stock" and result.unassigned_stock is None:
            assert len(df) == 0  # the fake close did not look: an empty layer
            continue
        assert len(df) > 0, name
        assert set(df["period"]) == {"2026-01"}, name
        assert set(df["survey_date"]) == {result.survey_date}, name


def test_a_recorded_close_puts_its_id_on_every_feature(result, tmp_path):
    import dataclasses

    import pyogrio

    recorded = dataclasses.replace(result, close_id=12, closed_utc="2026-02-03T07:00:00+00:00",
                                   vertical_reference="DHHN2016 (NHN), metres")
    path = write_layers(recorded, tmp_path / "piles-2026-01.gpkg")
    for name in LAYER_NAMES:
        df = pyogrio.read_dataframe(path, layer=name, read_geometry=False)
        assert list(df.columns[-4:]) == COMMON_COLUMNS + CLOSE_COLUMNS, name
        if not len(df):   # unassigned_stock is empty in this close: the columns are there
            continue
        assert set(df["close_id"]) == {12}, name
        assert set(df["closed_utc"]) == {"2026-02-03T07:00:00+00:00"}, name
    assert list(read_piles_layer(path).columns) == PILE_COLUMNS + COMMON_COLUMNS + CLOSE_COLUMNS
    described = _sql(path, "SELECT column_name, title FROM gpkg_data_columns WHERE table_name = "
                           "'survey_extent' AND column_name IN ('close_id', 'closed_utc') ORDER BY 1")
    assert described == [("close_id", "Ledger close"), ("closed_utc", "Closed (UTC)")]
    for name, text in _sql(path, "SELECT table_name, description FROM gpkg_contents"):
        assert text.endswith("Heights: DHHN2016 (NHN), metres. Ledger close 12, recorded "
                             "2026-02-03T07:00:00+00:00."), (name, text)


def test_layer_descriptions_name_period_and_survey(gpkg, result):
    rows = dict(_sql(gpkg, "SELECT table_name, description FROM gpkg_contents"))
    assert set(rows) == set(LAYER_NAMES)
    for name, text in rows.items():
        assert "2026-01" in text and result.survey_date in text, (name, text)
        # the default vertical reference; no close id for a close not recorded
        assert text.endswith("Heights: as surveyed, metres."), (name, text)
    assert rows["piles"].startswith("Stock piles closed for 2026-01")
    assert "Unscanned" in rows["coverage_gaps"]


def test_data_columns_describe_every_field_with_units(gpkg):
    # OGC GeoPackage 1.3, annex F.9 (schema extension): gpkg_data_columns, registered in
    # gpkg_extensions for both of its tables with extension_name gpkg_schema, scope read-write
    ext = _sql(gpkg, "SELECT table_name, column_name, definition, scope FROM gpkg_extensions "
                     "WHERE extension_name = 'gpkg_schema' ORDER BY table_name")
    assert ext == [
        ("gpkg_data_column_constraints", None, "http://www.geopackage.org/spec/#extension_schema",
         "read-write"),
        ("gpkg_data_columns", None, "http://www.geopackage.org/spec/#extension_schema",
         "read-write"),
    ]
    for layer in LAYER_NAMES:
        columns = [r[1] for r in _sql(gpkg, f'PRAGMA table_info("{layer}")') if not r[5]]
        described = {r[0]: r[1:] for r in _sql(
            gpkg, "SELECT column_name, title, description FROM gpkg_data_columns "
                  "WHERE table_name = ?", (layer,))}
        assert sorted(described) == sorted(columns), layer
        for col, (title, description) in described.items():
            assert title and description and len(description) > 15, (layer, col)
            for ending, unit in (("_t_m3", "tonnes per cubic metre"), ("_t", "tonnes"),
                                 ("_m3", "cubic metres"), ("_m2", "square metres"),
                                 ("_pct", "percent"), ("_m", "metres")):
                if col.endswith(ending):
                    assert f"Unit: {unit}" in description, (layer, col, description)
                    break
            else:
                assert "Unit:" not in description, (layer, col, description)
    (title, description), = _sql(gpkg, "SELECT title, description FROM gpkg_data_columns "
                                       "WHERE table_name = 'piles' AND column_name = 'variance_t'")
    assert title == "Variance [t]"
    assert description.startswith("Survey stock minus book stock")
    assert description.endswith("Unit: tonnes (t).")
    (density,), = _sql(gpkg, "SELECT description FROM gpkg_data_columns "
                             "WHERE column_name = 'density_t_m3'")
    assert density.endswith("Unit: tonnes per cubic metre (t/m3).")
    assert ("piles", "period") in _sql(gpkg, "SELECT table_name, column_name FROM gpkg_data_columns")
    # the metadata leaves the file a valid SQLite database
    assert _sql(gpkg, "PRAGMA integrity_check") == [("ok",)]


@pytest.mark.tools
def test_ogrinfo_reads_the_descriptions(gpkg):
    if not shutil.which("ogrinfo"):
        pytest.skip("ogrinfo (Debian gdal-bin) not installed; `make tools` installs it when root")
    proc = subprocess.run(["ogrinfo", "-so", str(gpkg), "piles"], capture_output=True, text=True,
                          timeout=60, check=False)
    assert proc.returncode == 0, proc.stderr
    assert "Warning" not in proc.stderr and "ERROR" not in proc.stderr, proc.stderr
    # GDAL's GPKG driver reports gpkg_contents.description as the layer's DESCRIPTION
    assert "DESCRIPTION=Stock piles closed for 2026-01" in proc.stdout
    proc = subprocess.run(["ogrinfo", "-json", "-so", str(gpkg), "piles"], capture_output=True,
                          text=True, timeout=60, check=False)
    if proc.returncode != 0 and "-json" in (proc.stdout + proc.stderr):
        pytest.skip("this ogrinfo has no -json (GDAL < 3.7); data columns checked through SQLite")
    import json

    fields = {f["name"]: f for f in json.loads(proc.stdout)["layers"][0]["fields"]}
    # GDAL >= 3.7 reads gpkg_data_columns name as the alternative name, description as comment
    assert fields["variance_t"]["alternativeName"] == "Variance [t]"
    assert fields["variance_t"]["comment"].endswith("Unit: tonnes (t).")
