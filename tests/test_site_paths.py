"""site.toml and the paths of the site folder: a value the schema refuses is reported, never
converted; files named in site.toml exist and stay inside the site folder (unless site.toml
allows otherwise); paths resolve against the site folder however it was given; and a refused
input is reported once, without a misleading cascade after it."""

from __future__ import annotations

import hashlib
import os
from pathlib import Path

import geopandas as gpd
import numpy as np
import pytest

from inventory.cli import main
from inventory.site.load import MAX_TOML_DEPTH, check_site, load_site

OUTSIDE = "inputs stay inside the site folder unless site.toml sets [paths] allow_outside = true"


def digest(root: Path) -> dict[str, str]:
    """Every file under ``root`` (links not followed) by content hash."""
    out = {}
    for p in sorted(root.rglob("*")):
        if p.is_symlink():
            out[str(p.relative_to(root))] = "link to " + os.readlink(p)
        elif p.is_file():
            out[str(p.relative_to(root))] = hashlib.sha256(p.read_bytes()).hexdigest()
    return out


def refused(site: Path, capsys) -> list[str]:
    """``inventory check`` on ``site``: exits 2, leaves the folder as it was; its error lines."""
    before = digest(site.parent)
    assert main(["check", str(site)]) == 2
    assert digest(site.parent) == before
    return [line.removeprefix("error: ") for line in capsys.readouterr().err.splitlines()
            if line.startswith("error: ")]


def add_toml(site: Path, text: str) -> None:
    """Append ``text`` after a blank line: on the small site, its first line is line 20."""
    with open(site / "site.toml", "a") as f:
        f.write("\n" + text)


# --- case 1: a wrong type in site.toml is a problem, not a crash --------------------------
@pytest.mark.parametrize(("toml", "key", "why"), [
    ('[grid]\ncell_size_m = "half"', "grid.cell_size_m", "'half' is not of type 'number'"),
    ("[reconcile]\nsignificance_k = true", "reconcile.significance_k", "True is not of type 'number'"),
    ("[base]\nfloor_sigma_m = { a = 1 }", "base.floor_sigma_m", "{'a': 1} is not of type 'number'"),
    ("[survey]\ntrajectory_max_gap_s = [1, 2]", "survey.trajectory_max_gap_s", "[1, 2] is not of type 'number'"),
    ('[survey]\ndefault_time = "25:00"', "survey.default_time", "'25:00' does not match"),
    ("[reconcile]\nadjust_to = 3", "reconcile.adjust_to", "3 is not one of ['survey', 'midpoint']"),
    ("machines = 5", "machines", "5 is not of type 'object'"),
    ("scales = 5", "scales", "5 is not of type 'array'"),
    ("grid = 2", "grid", "2 is not of type 'object'"),
])
def test_a_wrong_type_in_site_toml_names_the_key(good_site, capsys, toml, key, why):
    text = (good_site / "site.toml").read_text()
    if toml.startswith("[grid]"):
        text = text.replace("[grid]\ncell_size_m = 0.5\n", "")
    elif toml.startswith("grid ="):
        text = text.replace("[grid]\ncell_size_m = 0.5\n", "").replace('timezone = "Europe/Berlin"\n',
                                                                         'timezone = "Europe/Berlin"\n' + toml + "\n")
        toml = ""
    elif toml.startswith(("machines", "scales")):
        text = text.replace('timezone = "Europe/Berlin"\n', 'timezone = "Europe/Berlin"\n' + toml + "\n")
        text = text.split("[[scales]]")[0] if toml.startswith("scales") else text
        toml = ""
    written = text + "\n" + toml + "\n"
    (good_site / "site.toml").write_text(written)
    # the message names the line that sets the key
    line = next(n for n, t in enumerate(written.splitlines(), 1) if t.startswith(key.split(".")[-1] + " ="))
    errors = refused(good_site, capsys)
    named = [e for e in errors if e.startswith("site/site.toml")]
    assert len(named) == 1 and named[0].startswith(f"site/site.toml line {line}: {key}: {why}"), errors
    if key != "scales":  # without scales, tickets also name their unknown scales
        assert len(errors) == 1, errors


def test_a_table_as_a_scale_id_is_reported_not_hashed(good_site, capsys):
    add_toml(good_site, '[[scales]]\nid = { a = 1 }\nkind = "belt"\ndirection = "in"\naccuracy_class = "1"\n')
    assert refused(good_site, capsys) == ["site/site.toml line 21: scales.2.id: {'a': 1} is not of type 'string'"]


def test_a_refused_scale_key_does_not_make_its_tickets_unknown(good_site, capsys):
    text = (good_site / "site.toml").read_text().replace("scale_interval_kg = 20", 'scale_interval_kg = "twenty"')
    (good_site / "site.toml").write_text(text)
    assert refused(good_site, capsys) == [
        "site/site.toml line 12: scales.0.scale_interval_kg: 'twenty' is not of type 'number'"]


# --- case 2: deep nesting ------------------------------------------------------------------
def test_deeply_nested_arrays_are_refused(good_site, capsys):
    add_toml(good_site, "deep = " + "[" * 5000 + "]" * 5000)
    errors = refused(good_site, capsys)
    assert errors == [f"site/site.toml: tables or arrays nested too deeply to read (at most {MAX_TOML_DEPTH} levels)"]


def test_deeply_nested_tables_are_refused(good_site, capsys):
    add_toml(good_site, "[" + ".".join(["t"] * 3000) + "]\nx = 1")
    assert refused(good_site, capsys) == [
        f"site/site.toml: t: tables or arrays nested 3001 levels deep (at most {MAX_TOML_DEPTH})"]


def test_nesting_the_schema_uses_is_accepted(good_site):
    add_toml(good_site, "[machines.stacker1]\nscanner_lever_arm_m = [0.1, 0.0, 0.5]\n")
    assert check_site(good_site).errors == []


# --- case 3: files named in site.toml, and paths outside the site folder -------------------
def write_floor(path: Path) -> None:
    """A small valid floor GeoTIFF (the check reads every block of it)."""
    import rasterio
    from rasterio.transform import from_origin

    with rasterio.open(path, "w", driver="GTiff", width=8, height=8, count=1, dtype="float32",
                       crs="EPSG:25832", transform=from_origin(499980.0, 5700020.0, 10.0, 10.0)) as dst:
        dst.write(np.full((8, 8), 9.5, dtype="float32"), 1)


def test_a_floor_raster_that_does_not_exist_names_key_and_path(good_site, capsys):
    add_toml(good_site, '[base]\nfloor_raster = "base/flor.tif"\n')
    assert refused(good_site, capsys) == [
        "site/site.toml line 21: base.floor_raster: no file 'base/flor.tif' (paths are relative to the site folder)"]


def test_a_floor_raster_name_too_long_for_the_file_system_is_not_found(good_site, capsys):
    name = "a" * 300 + ".tif"  # longer than a file name may be (255 bytes on common file systems)
    add_toml(good_site, f'[base]\nfloor_raster = "{name}"\n')
    assert refused(good_site, capsys) == [
        f"site/site.toml line 21: base.floor_raster: no file '{name}' (paths are relative to the site folder)"]


def test_an_absolute_floor_raster_outside_the_site_is_refused(good_site, tmp_path, capsys):
    elsewhere = tmp_path / "elsewhere.tif"
    elsewhere.write_bytes(b"not read")
    add_toml(good_site, f'[base]\nfloor_raster = "{elsewhere}"\n')
    assert refused(good_site, capsys) == [
        f"site/site.toml line 21: base.floor_raster: '{elsewhere}' is outside the site folder (refused; {OUTSIDE})"]


def test_an_absolute_floor_raster_inside_the_site_is_used(good_site):
    (good_site / "base").mkdir()
    write_floor(good_site / "base" / "floor.tif")
    add_toml(good_site, f'[base]\nfloor_raster = "{good_site / "base" / "floor.tif"}"\n')
    site = load_site(good_site)
    assert site.config.base.floor_raster == site.root / "base" / "floor.tif"


def test_allow_outside_lets_a_floor_raster_outside_be_used(good_site, tmp_path):
    elsewhere = tmp_path / "site_survey_office" / "floor.tif"
    elsewhere.parent.mkdir()
    write_floor(elsewhere)
    add_toml(good_site, '[paths]\nallow_outside = true\n\n[base]\nfloor_raster = "../site_survey_office/floor.tif"\n')
    site = load_site(good_site)
    assert site.config.base.floor_raster.resolve() == elsewhere.resolve()


def test_allow_outside_must_be_a_boolean(good_site, capsys):
    add_toml(good_site, '[paths]\nallow_outside = "yes"\n')
    assert refused(good_site, capsys) == ["site/site.toml line 21: paths.allow_outside: 'yes' is not of type 'boolean'"]


def test_a_pipeline_outside_the_site_is_refused(good_site, capsys):
    (good_site.parent / "p.json").write_text("[]")
    add_toml(good_site, '[survey]\npipeline = "../p.json"\n')
    assert refused(good_site, capsys) == [
        f"site/site.toml line 21: survey.pipeline: '../p.json' is outside the site folder (refused; {OUTSIDE})"]


def test_a_station_file_outside_the_site_is_refused(good_site, capsys):
    stations = good_site / "surveys/2026-10-31/stations.csv"
    stations.write_text(stations.read_text() + "../../../outside.laz,S2,2026-10-31T15:00:00+01:00,,,,,,\n")
    (good_site.parent / "outside.laz").write_bytes(b"")
    assert refused(good_site, capsys) == [
        f"site/surveys/2026-10-31/stations.csv line 3: file: '../../../outside.laz' is outside the site folder "
        f"(refused; {OUTSIDE})"]


def test_a_linked_csv_outside_the_site_is_refused_without_echoing_it(good_site, tmp_path, capsys):
    secret = tmp_path / "secret.csv"
    secret.write_text("ticket,time\nsecret-line-41,hunter2\n")
    wb = good_site / "movements/2026-10/weighbridge.csv"
    wb.unlink()
    wb.symlink_to(secret)
    before = digest(good_site.parent)
    assert main(["check", str(good_site)]) == 2
    assert digest(good_site.parent) == before
    err = capsys.readouterr().err
    assert "secret-line-41" not in err and "hunter2" not in err
    assert f"error: site/movements/2026-10/weighbridge.csv: links to a file outside the site folder (refused; {OUTSIDE})" in err


def test_a_linked_cloud_outside_the_site_is_refused(good_site, tmp_path, capsys):
    target = tmp_path / "b.laz"
    (good_site / "surveys/2026-10-31/a.laz").rename(target)
    (good_site / "surveys/2026-10-31/a.laz").symlink_to(target)
    errors = refused(good_site, capsys)
    assert f"site/surveys/2026-10-31/a.laz: links to a file outside the site folder (refused; {OUTSIDE})" in errors


# --- case 4: a relative site path ------------------------------------------------------------
def test_paths_resolve_against_a_site_given_relative(good_site, monkeypatch):
    (good_site / "terrain.json").write_text('{"pipeline": [{"type": "filters.range", "limits": "Z[-100:1000]"}]}')
    add_toml(good_site, '[survey]\npipeline = "terrain.json"\n')
    monkeypatch.chdir(good_site.parent)
    site = load_site(Path("site"))
    assert site.config.survey.pipeline == good_site / "terrain.json"
    assert site.config.survey.pipeline.is_file()
    from inventory.survey.measure import _pipeline_for

    # the survey step joins the configured path to the site folder again: no doubled folder
    assert Path(_pipeline_for(site, None).source) == good_site / "terrain.json"


def test_messages_show_a_relative_site_as_given(good_site, monkeypatch, capsys):
    (good_site / "materials.csv").unlink()
    monkeypatch.chdir(good_site)
    assert main(["check", "."]) == 2
    assert "error: materials.csv: file not found" in capsys.readouterr().err


# --- case 5: a station time without an offset ----------------------------------------------
def test_a_station_time_without_offset_is_one_error_and_no_warning(good_site, capsys):
    stations = good_site / "surveys/2026-10-31/stations.csv"
    stations.write_text(stations.read_text().replace("15:00:00+01:00", "15:00:00"))
    report = check_site(good_site)
    assert [str(p) for p in report.errors] == [
        "site/surveys/2026-10-31/stations.csv line 2: time: '2026-10-31T15:00:00' has no UTC offset "
        "(write e.g. 2026-10-31T15:00:00+01:00)"]
    assert report.warnings == []


def test_a_survey_without_stations_csv_still_warns(good_site):
    (good_site / "surveys/2026-10-31/stations.csv").unlink()
    assert [str(p) for p in check_site(good_site).warnings] == [
        "site/surveys/2026-10-31: time: no stations.csv times; survey instant taken as 12:00 local"]


# --- case 6: piles.gpkg in another CRS -----------------------------------------------------
def test_piles_in_another_crs_are_reprojected_with_a_warning(good_site):
    piles = gpd.read_file(good_site / "piles.gpkg", layer="piles")
    expected = piles.geometry.area.tolist()
    # pyproj / geopandas do the transform both ways; the round trip is the reference
    piles.to_crs("EPSG:4326").to_file(good_site / "piles.gpkg", layer="piles", engine="pyogrio")
    report = check_site(good_site)
    assert report.errors == []
    assert [str(p) for p in report.warnings] == [
        "site/piles.gpkg layer piles: footprints are in 'WGS 84', not the site CRS EPSG:25832 "
        "(ETRS89 / UTM zone 32N); reprojected to EPSG:25832"]
    site = report.site
    assert site.piles.crs.to_epsg() == 25832
    assert site.piles.geometry.area.tolist() == pytest.approx(expected, rel=1e-6)


def test_piles_in_a_crs_with_no_transform_are_refused(good_site, capsys):
    piles = gpd.read_file(good_site / "piles.gpkg", layer="piles")
    # a Mars CRS (IAU 2015): PROJ knows no transform to an Earth CRS
    piles.set_crs("IAU_2015:49900", allow_override=True).to_file(good_site / "piles.gpkg", layer="piles",
                                                                  engine="pyogrio")
    errors = refused(good_site, capsys)
    assert len(errors) == 1, errors
    assert errors[0].startswith("site/piles.gpkg layer piles: CRS 'Mars (2015) - Sphere / Ocentric' differs from "
                                "the site's 'ETRS89 / UTM zone 32N' and no transform is known"), errors


# --- case 9: cascades ----------------------------------------------------------------------
def test_a_refused_material_row_is_not_unknown_afterwards(good_site, capsys):
    materials = good_site / "materials.csv"
    materials.write_text(materials.read_text().replace("coal,0.85", "coal,-0.85"))
    assert refused(good_site, capsys) == ["site/materials.csv line 2: bulk_density_t_m3: -0.85 must be greater than 0"]


def test_a_material_missing_from_the_table_is_still_unknown(good_site, capsys):
    materials = good_site / "materials.csv"
    materials.write_text(materials.read_text().replace("coal,0.85", "coal,-0.85").replace("salt,", "rock,"))
    errors = refused(good_site, capsys)
    assert "site/materials.csv line 2: bulk_density_t_m3: -0.85 must be greater than 0" in errors
    assert "site/movements/2026-10/weighbridge.csv line 3: material: unknown material 'salt' (not in materials.csv)" in errors
    assert not any("'coal'" in e for e in errors), errors


def test_check_on_a_missing_site_folder_names_it_as_given(tmp_path, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)
    assert main(["check", "tmp/site"]) == 2
    err = capsys.readouterr().err
    assert "error: tmp/site: the site folder does not exist" in err
    assert "site.toml" not in err
    assert not (tmp_path / "tmp").exists()


def test_check_on_site_toml_says_to_give_the_folder(good_site, capsys):
    assert main(["check", str(good_site / "site.toml")]) == 2
    assert (f"error: {good_site / 'site.toml'}: is a file, not a site folder (give the folder that holds site.toml)"
            in capsys.readouterr().err)


def test_a_default_floor_raster_linked_outside_is_refused(good_site, tmp_path, capsys):
    elsewhere = tmp_path / "floor.tif"
    elsewhere.write_bytes(b"not read")
    (good_site / "base").mkdir()
    (good_site / "base" / "floor.tif").symlink_to(elsewhere)
    assert refused(good_site, capsys) == [
        f"site/site.toml: base.floor_raster: 'base/floor.tif' is outside the site folder (refused; {OUTSIDE})"]
