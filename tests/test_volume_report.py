"""``inventory volumes SITE --date``: end to end through the command line, outputs read back
(CSV, workbook, GeoPackage through pyogrio and GDAL's ogrinfo), a pile planted outside every
footprint of a scanned test site, and bad input refused with nothing written."""

from __future__ import annotations

import contextlib
import io
import json
import math
import re
import shutil
import subprocess
import warnings

import laspy
import numpy as np
import pandas as pd
import pyproj
import pytest

from inventory.cli import main
from inventory.export.volumes import VOLUME_REPORT_COLUMNS
from inventory.model.results import PILE_COLUMNS, VOLUME_SIGMA_COLUMNS

DATE = "2026-10-31"
Z95 = 1.959963984540054  # two-sided 95 % normal quantile (scipy.stats.norm.ppf(0.975))


def _cached(survey_cache):
    """The sample site's survey from the session's one run (see conftest ``survey_cache``),
    without the classified cloud when the caller asks for none, as the real step."""
    import dataclasses

    def survey(site, date, out_dir=None, progress=None, **kw):
        res = survey_cache(site, date, out_dir=out_dir, progress=progress, **kw)
        if not kw.get("write_classified", True) and res.classified_path is not None:
            res.classified_path.unlink()
            res = dataclasses.replace(res, classified_path=None)
        return res

    return survey


@pytest.fixture(scope="module")
def report(tmp_path_factory, sample_site_path, survey_cache):
    """``inventory volumes`` run once on a copy of the sample site (survey from the cache)."""
    import inventory.survey.measure as sm

    if not (sample_site_path / "site.toml").is_file():
        pytest.skip("sample_site/ has not been generated yet")
    site = tmp_path_factory.mktemp("volumes") / "sample_site"
    shutil.copytree(sample_site_path, site, ignore=shutil.ignore_patterns("closes", "ledger.sqlite*", "volumes"))
    with pytest.MonkeyPatch.context() as mp, warnings.catch_warnings():
        mp.setattr(sm, "measure_survey", _cached(survey_cache))
        warnings.simplefilter("ignore")
        out = io.StringIO()
        with contextlib.redirect_stdout(out):
            code = main(["volumes", str(site), "--date", DATE, "-q"])
    assert code == 0
    return site, site / "volumes" / DATE, out.getvalue()


@pytest.mark.slow
def test_the_folder_holds_every_output_and_nothing_else_is_written(report):
    site, folder, out = report
    names = sorted(p.name for p in folder.iterdir())
    assert names == sorted([
        f"volumes-{DATE}.csv", f"volumes-{DATE}.xlsx", f"volumes-{DATE}.gpkg", f"unassigned-{DATE}.csv",
        f"thickness-{DATE}.tif", f"surface-{DATE}.tif", f"coverage-{DATE}.tif", "run.json",
    ])
    # no books, no ledger, no close, no staging folder left
    assert not (site / "ledger.sqlite").exists() and not (site / "closes").exists()
    assert [p.name for p in (site / "volumes").iterdir()] == [DATE]
    assert "volumes of 7 piles" in out and str(folder / f"volumes-{DATE}.csv") in out


@pytest.mark.slow
def test_csv_has_every_column_and_the_close_figures(report, sample_chain):
    site, folder, _ = report
    t = pd.read_csv(folder / f"volumes-{DATE}.csv")
    assert list(t.columns) == VOLUME_REPORT_COLUMNS
    vols = sample_chain.volumes(DATE).set_index("pile_id").loc[t["pile_id"]]
    # the numbers are the close's volume step's, to the last digit the CSV keeps
    for col in ["area_m2", "scanned_fraction", "volume_m3", "volume_tin_m3", "volume_sigma_m3",
                *VOLUME_SIGMA_COLUMNS, "survey_t", "survey_sigma_t"]:
        np.testing.assert_allclose(t[col].to_numpy(), vols[col].to_numpy(), rtol=1e-14, err_msg=col)
    # the parts add in quadrature to the total; the interval is 1.96 sigma either side
    parts = np.sqrt(sum(t[c] ** 2 for c in VOLUME_SIGMA_COLUMNS))
    np.testing.assert_allclose(parts, t["volume_sigma_m3"], rtol=1e-12)
    np.testing.assert_allclose(t["volume_ci95_m3"], Z95 * t["volume_sigma_m3"], rtol=1e-12)
    np.testing.assert_allclose(t["volume_low95_m3"], t["volume_m3"] - t["volume_ci95_m3"], rtol=1e-12)
    np.testing.assert_allclose(t["volume_high95_m3"], t["volume_m3"] + t["volume_ci95_m3"], rtol=1e-12)
    # tonnes at the density of materials.csv
    mats = pd.read_csv(site / "materials.csv").set_index("material")["bulk_density_t_m3"]
    np.testing.assert_allclose(t["survey_t"], t["volume_m3"] * mats.loc[t["material"]].to_numpy(), rtol=1e-12)
    # every pile's true volume (simulator) lies within a few of its stated 95 % intervals
    truth = next(s for s in sample_chain.truth["surveys"] if s["date"] == DATE)["piles"]
    for row in t.itertuples():
        assert abs(row.volume_m3 - truth[row.pile_id]["volume_m3"]) < 3 * row.volume_ci95_m3, row.pile_id
    un = pd.read_csv(folder / f"unassigned-{DATE}.csv")
    assert un.empty and {"region_id", "pile_id", "volume_m3", "volume_sigma_m3", "edge_cut_length_m"} <= set(un.columns)


@pytest.mark.slow
def test_workbook_reads_back_the_csv(report):
    from openpyxl import load_workbook

    _, folder, _ = report
    t = pd.read_csv(folder / f"volumes-{DATE}.csv")
    wb = load_workbook(folder / f"volumes-{DATE}.xlsx")
    assert wb.sheetnames == ["Volumes", "Totals", "Unassigned stock", "Columns", "About"]
    rows = list(wb["Volumes"].iter_rows(values_only=True))
    assert list(rows[0]) == VOLUME_REPORT_COLUMNS
    assert len(rows) == 1 + len(t)
    for got, want in zip(rows[1:], t.itertuples(index=False)):
        for col, g, w in zip(VOLUME_REPORT_COLUMNS, got, want):
            if isinstance(w, float) and math.isnan(w):
                assert g is None, col
            elif isinstance(w, (float, np.floating)):
                assert g == pytest.approx(w, rel=1e-15), col
            else:
                assert str(g) == str(w), col
    assert wb["Volumes"]["F2"].number_format.endswith('"m³"')  # volume_m3 carries its unit
    assert wb["Unassigned stock"]["A2"].value == "No stock found outside the footprints."
    meaning = {r[0]: r for r in wb["Columns"].iter_rows(min_row=2, values_only=True)}
    assert meaning["sigma_interpolated_m3"][2] == "m3" and "interpolat" in meaning["sigma_interpolated_m3"][3]
    about = {r[0]: r[1] for r in wb["About"].iter_rows(values_only=True) if r[0]}
    assert about["survey date"] == DATE


@pytest.mark.slow
def test_workbook_totals_count_shared_errors_once(report):
    """The Totals sheet's site row against the piles' covariance matrix built from the CSV
    (JCGM 100:2008, GUM 5.2: var(sum) = 1' C 1): one material's density part
    (volume x density sd) and the floor raster's part (sigma_base_m3 x density) are one error
    over their piles, correlation 1; the rest of each pile's sigma is its own."""
    from openpyxl import load_workbook

    _, folder, _ = report
    t = pd.read_csv(folder / f"volumes-{DATE}.csv")
    t = t[t["survey_t"].notna()].reset_index(drop=True)
    ws = load_workbook(folder / f"volumes-{DATE}.xlsx")["Totals"]
    rows = list(ws.iter_rows(values_only=True))
    header = list(rows[0])
    site = dict(zip(header, next(r for r in rows[1:] if r[0] == "site (all materials)")))
    d = (t["volume_m3"] * t["density_sd_t_m3"]).to_numpy()
    floor = t["base_method"].str.startswith("floor").to_numpy()
    g = np.where(floor, t["sigma_base_m3"] * t["density_t_m3"], 0.0)
    s = t["survey_sigma_t"].to_numpy()
    mats = t["material"].to_numpy()
    cov = np.diag(s ** 2 - d ** 2 - g ** 2)
    cov += np.where(mats[:, None] == mats[None, :], np.outer(d, d), 0.0)
    cov += np.outer(g, g)
    n = np.ones(len(t))
    assert site["survey_sigma_t"] == pytest.approx(float(np.sqrt(n @ cov @ n)), rel=1e-9)
    assert site["survey_t"] == pytest.approx(t["survey_t"].sum(), rel=1e-12)
    quad = float(np.sqrt((s ** 2).sum()))
    assert site["survey_sigma_quadrature_t"] == pytest.approx(quad, rel=1e-12)
    assert site["survey_sigma_t"] > quad  # piles of one material share its density error
    assert ws.cell(row=2, column=header.index("survey_sigma_t") + 1).number_format.endswith('"t"')
    assert any(isinstance(r[0], str) and r[0].startswith("A total's 1 sigma is not") for r in rows)


@pytest.mark.slow
def test_geopackage_layers_read_back(report):
    import pyogrio

    _, folder, _ = report
    gpkg = folder / f"volumes-{DATE}.gpkg"
    t = pd.read_csv(folder / f"volumes-{DATE}.csv")
    assert [n for n, _ in pyogrio.list_layers(gpkg)] == ["piles", "unassigned_stock"]
    piles = pyogrio.read_dataframe(gpkg, layer="piles")
    assert len(piles) == 7 and set(piles["survey_date"]) == {DATE}
    piles = piles.set_index("pile_id").loc[t["pile_id"]]
    for col in ("volume_m3", "volume_sigma_m3", *VOLUME_SIGMA_COLUMNS, "survey_t"):
        np.testing.assert_allclose(piles[col].to_numpy(), t[col].to_numpy(), rtol=1e-14, err_msg=col)
    assert pyogrio.read_info(gpkg, layer="unassigned_stock")["features"] == 0
    # every field described with its unit (GeoPackage schema extension, gpkg_data_columns)
    import sqlite3

    con = sqlite3.connect(gpkg)
    titles = dict(con.execute("SELECT column_name, title FROM gpkg_data_columns WHERE table_name = 'piles'"))
    described = {r[0] for r in con.execute("SELECT column_name FROM gpkg_data_columns WHERE table_name = "
                                           "'unassigned_stock'")}
    con.close()
    assert titles["sigma_random_m3"] == "Volume uncertainty, random [m3]"
    assert titles["survey_t"] == "Survey stock [t]"
    assert set(VOLUME_REPORT_COLUMNS) <= set(titles)
    assert {"region_id", "volume_m3", "centre_x_m", "next_to"} <= described
    if shutil.which("ogrinfo") is None:
        pytest.skip("ogrinfo (Debian gdal-bin) not installed")
    # GDAL's own reader: feature count, CRS and real-typed sigma parts
    proc = subprocess.run(["ogrinfo", "-so", str(gpkg), "piles"], capture_output=True, text=True, timeout=60)
    assert proc.returncode == 0, proc.stderr
    assert "Warning" not in proc.stderr and "ERROR" not in proc.stderr, proc.stderr
    assert re.search(r"Feature Count: 7\b", proc.stdout)
    assert 'ID["EPSG",25832]' in proc.stdout
    for col in VOLUME_SIGMA_COLUMNS:
        assert re.search(rf"^{col}: Real", proc.stdout, re.MULTILINE), col


@pytest.mark.slow
def test_run_json_names_inputs_and_totals(report):
    site, folder, _ = report
    run = json.loads((folder / "run.json").read_text())
    assert run["command"] == "volumes" and run["survey_date"] == DATE
    assert {"site.toml", "piles.gpkg", "materials.csv"} <= set(run["inputs"])
    assert any(k.startswith(f"surveys/{DATE}/") for k in run["inputs"])
    t = pd.read_csv(folder / f"volumes-{DATE}.csv")
    assert run["totals"]["volume_m3"] == pytest.approx(t["volume_m3"].sum(), rel=1e-12)
    assert run["totals"]["unassigned_m3"] == 0.0
    assert run["parameters"]["unassigned"] == {"min_thickness_m": 0.3, "min_area_m2": 4.0}


@pytest.mark.slow
def test_a_second_run_replaces_the_folder(report, survey_cache, monkeypatch, capsys):
    import inventory.survey.measure as sm

    monkeypatch.setattr(sm, "measure_survey", _cached(survey_cache))
    site, folder, _ = report
    (folder / "stray.txt").write_text("from before")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main(["volumes", str(site), "--date", DATE, "-q"]) == 0
    assert not (folder / "stray.txt").exists()
    assert [p.name for p in (site / "volumes").iterdir()] == [DATE]


# ----------------------------------------------------------------------------- bad input
def _nothing_written(site):
    return not (site / "volumes").exists() and not (site / "ledger.sqlite").exists()


@pytest.mark.parametrize("date, words", [
    ("2026-10-30", "no survey dated 2026-10-30 (survey folders: 2026-10-31)"),
    ("2026-10-32", "'2026-10-32' is not a date YYYY-MM-DD"),
    ("31.10.2026", "'31.10.2026' is not a date YYYY-MM-DD"),
])
def test_bad_date_is_refused_with_nothing_written(good_site, capsys, date, words):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        code = main(["volumes", str(good_site), "--date", date])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2
    assert len(err) == 1 and err[0].startswith("error: ") and words in err[0], err
    assert _nothing_written(good_site)


def test_a_site_without_surveys_is_refused(good_site, capsys):
    shutil.rmtree(good_site / "surveys")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        code = main(["volumes", str(good_site), "--date", DATE])
    err = capsys.readouterr().err
    assert code == 2
    assert f"surveys/{DATE}" in err and "no survey dated" in err and "(survey folders: none)" in err
    assert _nothing_written(good_site)


def test_a_run_that_fails_midway_leaves_nothing(good_site, monkeypatch, capsys):
    import inventory.survey.measure as sm

    def broken(*args, **kw):
        raise OSError("disk full")

    monkeypatch.setattr(sm, "measure_survey", broken)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        code = main(["volumes", str(good_site), "--date", DATE])
    assert code == 1 and "disk full" in capsys.readouterr().err
    assert _nothing_written(good_site)


def test_a_survey_folder_without_clouds_is_refused(good_site, capsys):
    (good_site / "surveys" / DATE / "a.laz").unlink()
    (good_site / "surveys" / DATE / "stations.csv").unlink()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        code = main(["volumes", str(good_site), "--date", DATE])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2
    assert err == [f"error: {good_site.name}/surveys/{DATE}: no point cloud file (.las, .laz, .copc.laz, .e57, .ply, .xyz, .txt) "
                   "in the survey folder"], err
    assert _nothing_written(good_site)


def test_an_output_path_that_is_a_file_is_refused(good_site, capsys):
    (good_site / "volumes").mkdir()
    (good_site / "volumes" / DATE).write_text("not a folder")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        code = main(["volumes", str(good_site), "--date", DATE])
    assert code == 2
    assert "is not a folder" in capsys.readouterr().err
    assert sorted(p.name for p in (good_site / "volumes").iterdir()) == [DATE]


# ----------------------------------------------------------------------------- a planted pile
def _scan(path, cones, *, spacing=0.2, seed=5):
    """A LAS 1.4 cloud of a level yard at 10 m (x 499975..500075, y 5699975..5700035) with
    right cones (x, y, r, h) on it, one point per ``spacing`` square, 5 mm of noise."""
    xs = np.arange(499975.0, 500075.0, spacing) + spacing / 2
    ys = np.arange(5699975.0, 5700035.0, spacing) + spacing / 2
    x, y = (a.ravel() for a in np.meshgrid(xs, ys))
    z = np.full(x.shape, 10.0)
    for cx, cy, r, h in cones:
        z += np.clip(h * (1.0 - np.hypot(x - cx, y - cy) / r), 0.0, None)
    z += np.random.default_rng(seed).normal(0.0, 0.005, z.shape)
    header = laspy.LasHeader(point_format=6, version="1.4")
    header.add_crs(pyproj.CRS("EPSG:25832"))
    header.scales = [0.001] * 3
    header.offsets = [500000.0, 5700000.0, 0.0]
    las = laspy.LasData(header)
    las.x, las.y, las.z = x, y, z
    las.write(path)


def test_a_pile_planted_outside_every_footprint_is_reported(good_site, capsys):
    # pile A (toe base) and B (level:10) in their footprints (r 10 m), and an unregistered
    # cone r 6 m, h 3 m at (500060, 5700020), clear of both
    _scan(good_site / "surveys" / DATE / "a.laz",
          [(500000.0, 5700000.0, 7.0, 3.5), (500030.0, 5700000.0, 7.0, 3.0), (500060.0, 5700020.0, 6.0, 3.0)])
    code = main(["volumes", str(good_site), "--date", DATE, "-q"])
    err = capsys.readouterr().err
    assert code == 0, err
    folder = good_site / "volumes" / DATE
    un = pd.read_csv(folder / f"unassigned-{DATE}.csv")
    assert un["region_id"].tolist() == ["U1"]
    # right circular cone V = pi r^2 h / 3 (handbook formula; from memory)
    cone = math.pi * 36 * 3.0 / 3.0
    assert un.loc[0, "volume_m3"] == pytest.approx(cone, rel=0.02)
    assert (un.loc[0, "centre_x_m"], un.loc[0, "centre_y_m"]) == pytest.approx((500060.0, 5700020.0), abs=0.5)
    assert un.loc[0, "volume_sigma_m3"] > 0 and un.loc[0, "volume_ci95_m3"] == pytest.approx(
        Z95 * un.loc[0, "volume_sigma_m3"], rel=1e-9)
    assert re.search(r"^warning: stock outside every footprint: U1 at \(50006\d\.\d, 57000\d\d\.\d\), 11\d\.\d m3 "
                     r"\+/- \d+\.\d m3 \(95 %\)", err, re.MULTILINE), err
    # the registered piles are measured in their footprints, not reported again
    t = pd.read_csv(folder / f"volumes-{DATE}.csv").set_index("pile_id")
    assert t.loc["A", "volume_m3"] == pytest.approx(math.pi * 49 * 3.5 / 3, rel=0.02)
    assert t.loc["B", "volume_m3"] == pytest.approx(math.pi * 49 * 3.0 / 3, rel=0.02)
    import pyogrio

    layer = pyogrio.read_dataframe(folder / f"volumes-{DATE}.gpkg", layer="unassigned_stock")
    assert layer["region_id"].tolist() == ["U1"]
    assert layer.geometry.iloc[0].contains(__import__("shapely").Point(500060.0, 5700020.0).buffer(5.5))
    assert layer.loc[0, "volume_m3"] == pytest.approx(un.loc[0, "volume_m3"], rel=1e-14)


def test_the_close_piles_table_carries_the_sigma_parts():
    i = PILE_COLUMNS.index("volume_sigma_m3")
    assert PILE_COLUMNS[i + 1:i + 5] == VOLUME_SIGMA_COLUMNS


# ----------------------------------------------------------------------------- in the close
@pytest.mark.slow
def test_a_close_reports_the_stock_beyond_a_footprint_drawn_too_small(sample_copy, survey_cache, monkeypatch):
    """FE2's footprint redrawn at half its cone's toe radius: the close flags FE2 ``edge_cut``
    and reports the rest of the cone as unassigned stock in every output."""
    import geopandas as gpd
    import pyogrio
    import shapely
    from openpyxl import load_workbook

    from inventory.close import close_period

    monkeypatch.setattr("inventory.survey.measure.measure_survey", survey_cache)
    truth = json.loads((sample_copy / "truth.json").read_text())
    ox, oy, _ = truth["site"]["local_origin_in_site_crs"]
    shape = next(s for s in truth["surveys"] if s["date"] == "2026-09-30")["piles"]["FE2"]
    cx, cy = ox + shape["shape"]["centre_local"][0], oy + shape["shape"]["centre_local"][1]
    r_toe = shape["shape"]["toe_radius_m"]
    piles = gpd.read_file(sample_copy / "piles.gpkg", layer="piles")
    piles.loc[piles["pile_id"] == "FE2", "geometry"] = shapely.Point(cx, cy).buffer(r_toe / 2, quad_segs=32)
    piles.to_file(sample_copy / "piles.gpkg", layer="piles", engine="pyogrio")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        closed = close_period(sample_copy, "2026-09")
    res = closed.result
    regions = res.unassigned_stock
    assert len(regions) == 1
    u = regions.iloc[0]
    assert u["next_to"] == "FE2" and "touches_footprint" in u["flags"]
    # a cone cut at half its toe radius keeps half its volume outside (V/2: the part inside
    # is a cylinder r/2 x h/2 and a cone r/2 x h/2, pi r^2 h / 6 together)
    assert u["volume_m3"] == pytest.approx(shape["volume_m3"] / 2, rel=0.01)
    assert abs(u["volume_m3"] - shape["volume_m3"] / 2) < 2 * u["volume_ci95_m3"]
    assert (u["centre_x_m"], u["centre_y_m"]) == pytest.approx((cx, cy), abs=1.0)
    fe2 = res.piles.set_index("pile_id").loc["FE2"]
    assert "edge_cut" in fe2["flags"]
    assert not any("edge_cut" in str(f) for f in res.piles.loc[res.piles["pile_id"] != "FE2", "flags"])
    shown = [str(w.message) for w in caught]
    assert any(m.startswith("stock outside every footprint: U1") for m in shown), shown
    assert any(m.startswith("pile FE2: the footprint edge cuts through material") for m in shown), shown
    # the layer, the sheet and the report
    layer = pyogrio.read_dataframe(closed.files["layers"], layer="unassigned_stock")
    assert layer["region_id"].tolist() == ["U1"] and set(layer["period"]) == {"2026-09"}
    assert layer.loc[0, "volume_m3"] == pytest.approx(u["volume_m3"], rel=1e-15)
    piles_layer = pyogrio.read_dataframe(closed.files["layers"], layer="piles", read_geometry=False)
    for col in VOLUME_SIGMA_COLUMNS:
        assert piles_layer[col].notna().all() and (piles_layer[col] >= 0).all(), col
    wb = load_workbook(closed.files["workbook"])
    rows = list(wb["Unassigned stock"].iter_rows(values_only=True))
    head = list(rows[0])
    got = {(r[head.index("region_id")], r[head.index("pile_id")]) for r in rows[1:]}
    assert got == {("U1", None), (None, "FE2")}
    assert "sigma_interpolated_m3" in [c.value for c in wb["Piles"][1]]
    html = closed.files["report"].read_text()
    assert "<h2>Stock outside the footprints</h2>" in html and ">U1<" in html and ">FE2<" in html
