"""GeoPackage layers: every pile figure as attributes, CRS set, read back by GDAL's ogrinfo."""

from __future__ import annotations

import math
import re
import shutil
import sqlite3
import subprocess

import numpy as np
import pytest

from inventory.export.layers import LAYER_NAMES, read_piles_layer, write_layers
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
    assert list(df.columns) == PILE_COLUMNS
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
        assert re.search(rf"^{col}: ", proc.stdout, re.M), col
    assert re.search(r"^variance_t: Real", proc.stdout, re.M)
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
