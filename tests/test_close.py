"""The month close end to end on the sample site, as a user runs it.

Two months are closed with the command line; the ledger, the workbook and the GeoPackage must
hold the same numbers; GDAL's own tools must read the layers and rasters; a second close is
refused; interrupted closes leave everything as it was.
"""

from __future__ import annotations

import hashlib
import json
import shutil
import sqlite3
import subprocess
from pathlib import Path

import pytest

from inventory.cli import main
from inventory.close import STEPS, _publish, close_period
from inventory.errors import InputError, RunError
from inventory.export.layers import read_piles_layer
from inventory.ledger.store import Ledger

pytestmark = pytest.mark.slow


def _tree(root: Path) -> dict[str, str]:
    out = {}
    for p in sorted(root.rglob("*")):
        rel = str(p.relative_to(root))
        out[rel] = hashlib.sha256(p.read_bytes()).hexdigest() if p.is_file() else "dir"
    return out


@pytest.fixture(scope="module")
def closed_site(tmp_path_factory, sample_site_path, survey_cache):
    """The sample site with 2026-09 and 2026-10 closed through the command line."""
    if not (sample_site_path / "site.toml").is_file():
        pytest.skip("sample_site/ has not been generated yet (inventory sample sample_site)")
    site = tmp_path_factory.mktemp("e2e") / "site"
    shutil.copytree(sample_site_path, site, ignore=shutil.ignore_patterns("closes", "ledger.sqlite*"))
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr("inventory.survey.measure.measure_survey", survey_cache)
        for period in ("2026-09", "2026-10"):
            assert main(["close", str(site), "--period", period, "--quiet"]) == 0
    return site


def test_two_months_agree_in_ledger_workbook_and_layers(pile_rows, closed_site):
    with Ledger(closed_site / "ledger.sqlite") as led:
        for period in ("2026-09", "2026-10"):
            adopted = led.adopted(period).sort_values("pile_id")
            folder = closed_site / "closes" / period
            ledger_rows = pile_rows.frame(adopted)
            assert len(ledger_rows) == 7
            layer = read_piles_layer(folder / f"piles-{period}.gpkg").sort_values("pile_id")
            assert pile_rows.frame(layer) == ledger_rows
            book = pile_rows.workbook(folder / f"variance-{period}.xlsx", 7)
            assert sorted(book, key=lambda r: r[0]) == ledger_rows
        hist = led.history()
    sep = hist[hist.period == "2026-09"].set_index("pile_id")
    oct_ = hist[hist.period == "2026-10"].set_index("pile_id")
    # the next period opens with the adopted closing of the last one
    assert oct_["opening_t"].to_dict() == sep["closing_t"].to_dict()


def test_every_output_is_there_and_readable_by_others(closed_site):
    folder = closed_site / "closes" / "2026-10"
    names = sorted(p.name for p in folder.iterdir())
    for expected in ("variance-2026-10.xlsx", "piles-2026-10.gpkg", "surface-2026-10-31.tif",
                     "thickness-2026-10-31.tif", "change-2026-09-30_2026-10-31.tif",
                     "classified-2026-10-31.laz", "report-2026-10.html", "run.json",
                     # styles beside the layers and rasters, and their legend
                     "piles-2026-10.piles.sld", "piles-2026-10.coverage_gaps.sld",
                     "piles-2026-10.survey_extent.sld", "piles-2026-10.unassigned_stock.sld",
                     "thickness-2026-10-31.sld",
                     "change-2026-09-30_2026-10-31.sld", "legend-2026-10.png"):
        assert expected in names
    for p in folder.iterdir():
        assert p.stat().st_mode & 0o044, f"{p.name} is not readable by the group/others"


def test_gdal_reads_layers_and_rasters(closed_site):
    # GDAL's command-line tools (Debian gdal-bin) as independent readers
    if shutil.which("ogrinfo") is None or shutil.which("gdalinfo") is None:
        pytest.skip("gdal-bin (ogrinfo, gdalinfo) is not installed; make test installs it as root")
    folder = closed_site / "closes" / "2026-10"
    out = subprocess.run(["ogrinfo", "-so", "-al", str(folder / "piles-2026-10.gpkg")],
                         capture_output=True, text=True, check=True).stdout
    assert "Layer name: piles" in out and "Feature Count: 7" in out
    assert "Layer name: survey_extent" in out and "Layer name: coverage_gaps" in out
    assert 'ID["EPSG",25832]' in out
    run = json.loads((folder / "run.json").read_text())
    close_id = run["close_id"]
    assert run["parameters"]["vertical_reference"] == "as surveyed, metres"
    for name in ("surface-2026-10-31.tif", "change-2026-09-30_2026-10-31.tif", "thickness-2026-10-31.tif"):
        info = subprocess.run(["gdalinfo", str(folder / name)], capture_output=True, text=True, check=True).stdout
        assert 'ID["EPSG",25832]' in info
        assert "NoData Value=-9999" in info
        assert "VERTICAL_REFERENCE=as surveyed, metres" in info and "Unit Type: m" in info
        # the close's own rasters say which ledger close wrote them (run.json's close_id)
        assert (f"CLOSE_ID={close_id}" in info) == (not name.startswith("surface")), name
    layers = subprocess.run(["ogrinfo", "-al", "-geom=NO", str(folder / "piles-2026-10.gpkg"), "piles"],
                            capture_output=True, text=True, check=True).stdout
    assert layers.count(f"close_id (Integer64) = {close_id}") == 7


def _raster_content(path: Path) -> tuple[str, dict, dict]:
    """A GeoTIFF's content to compare across closes: a digest of every band and overview's
    bytes, the rest of its description (georeferencing, layout, band texts, metadata) and,
    apart, the two metadata items that name the close (CLOSE_ID, CLOSED_UTC)."""
    import rasterio

    digest = hashlib.sha256()
    with rasterio.open(path) as ds:
        for band in range(1, ds.count + 1):
            digest.update(ds.read(band).tobytes())
            for factor in ds.overviews(band):
                digest.update(ds.read(band, out_shape=(ds.height // factor, ds.width // factor)).tobytes())
        tags = ds.tags()
        ids = {k: tags.pop(k, None) for k in ("CLOSE_ID", "CLOSED_UTC")}
        meta = {"profile": {k: str(v) for k, v in ds.profile.items()}, "tags": tags,
                "structure": ds.tags(ns="IMAGE_STRUCTURE"), "descriptions": ds.descriptions,
                "units": ds.units, "overviews": [ds.overviews(b) for b in range(1, ds.count + 1)],
                "band_tags": [ds.tags(b) for b in range(1, ds.count + 1)]}
    return digest.hexdigest(), meta, ids


def test_second_close_of_a_locked_period_is_refused(closed_site, capsys):
    before = _tree(closed_site / "closes")
    assert main(["close", str(closed_site), "--period", "2026-10", "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "period 2026-10 is closed and locked" in err
    assert _tree(closed_site / "closes") == before


def test_history_for_finance(closed_site, capsys):
    assert main(["history", str(closed_site), "--format", "csv"]) == 0
    lines = capsys.readouterr().out.strip().splitlines()
    assert len(lines) == 1 + 14  # header + 7 piles x 2 months
    assert main(["history", str(closed_site), "--pile", "S1", "--format", "table"]) == 0
    table = capsys.readouterr().out
    assert "2026-09" in table and "2026-10" in table and "S1" in table


def _failing(name):
    def fail(*args, **kwargs):
        raise RunError(f"simulated failure at {name}")
    return fail


def _publish_then_fail(staged, folder, aside):
    """The outputs move into place, then the close fails before the ledger commits."""
    _publish(staged, folder, aside)
    assert folder.is_dir() and not staged.exists()
    raise RunError("simulated failure after publishing")


def _commit_fails(self, state):
    # reached with the new outputs in place and the old ones set aside
    assert list((self.path.parent / "closes").glob("2026-10.superseded-*"))
    raise sqlite3.OperationalError("simulated failure of the commit")


#: Every step function of close_period made to fail, then the publication of the outputs
#: failing once they are in place, and the ledger commit failing after that.
INTERRUPTIONS = [(f"inventory.close.{name}", _failing(name)) for name in (
    "_load", "_survey", "_volumes", "_book", "_reconcile", "_write_outputs", "_write_manifest",
    "_record", "_publish",
)] + [
    ("inventory.close._publish", _publish_then_fail),
    ("inventory.ledger.store.Ledger._commit", _commit_fails),
]


def test_interrupted_close_leaves_ledger_and_outputs_as_before(closed_site, survey_cache, monkeypatch, tmp_path):
    site = tmp_path / "site"
    shutil.copytree(closed_site, site)
    with Ledger(site / "ledger.sqlite") as led:
        led.reopen("2026-10", "interruption test")
    monkeypatch.setattr("inventory.survey.measure.measure_survey", survey_cache)
    for target, failure in INTERRUPTIONS:
        rows_before = sqlite3.connect(site / "ledger.sqlite").execute("SELECT COUNT(*) FROM closes").fetchone()
        tree_before = _tree(site / "closes")
        with monkeypatch.context() as mp:
            mp.setattr(target, failure)
            with pytest.raises(Exception, match="simulated failure"):
                close_period(site, "2026-10")
        rows_after = sqlite3.connect(site / "ledger.sqlite").execute("SELECT COUNT(*) FROM closes").fetchone()
        assert rows_after == rows_before, target
        assert _tree(site / "closes") == tree_before, target
        with Ledger(site / "ledger.sqlite") as led:
            assert not led.is_locked("2026-10"), target
    # and after all that, the close goes through and gives the numbers of the first close
    first_rasters = {name: _raster_content(site / "closes" / "2026-10" / name)
                     for name in ("thickness-2026-10-31.tif", "change-2026-09-30_2026-10-31.tif")}
    figures = ["pile_id", "survey_t", "book_t", "variance_t", "variance_sigma_t", "closing_t"]
    with Ledger(site / "ledger.sqlite") as led:
        hist = led.history(include_superseded=True)
    first = hist[(hist.period == "2026-10") & (hist.status == "superseded")].sort_values("pile_id")[figures]
    done = close_period(site, "2026-10")
    with Ledger(site / "ledger.sqlite") as led:
        again = led.adopted("2026-10").sort_values("pile_id")[figures]
    assert done.close_id > 0
    assert tuple(done.timings) == STEPS
    # a rerun on the same inputs gives the same numbers (DESIGN: reproducible close)
    assert again.to_dict("records") == first.to_dict("records")
    # ... and the same rasters: every pixel, band, overview and metadata item but the close's
    # own id and time; the superseded close's folder is kept beside
    for name, (pixels, meta, ids) in first_rasters.items():
        again_pixels, again_meta, again_ids = _raster_content(site / "closes" / "2026-10" / name)
        assert again_pixels == pixels and again_meta == meta, name
        assert again_ids["CLOSE_ID"] == str(done.close_id) != ids["CLOSE_ID"], name
        assert again_ids["CLOSED_UTC"] >= ids["CLOSED_UTC"], name
    kept = [p.name for p in (site / "closes").iterdir() if p.name.startswith("2026-10.superseded-")]
    assert len(kept) == 1
    aside = site / "closes" / kept[0]
    old_run = json.loads((aside / "run.json").read_text())
    new_run = json.loads((site / "closes" / "2026-10" / "run.json").read_text())
    # the folder is named after the close it holds and says which close replaced it
    assert kept == [f"2026-10.superseded-close-{old_run['close_id']}"]
    assert old_run["superseded_by_close"] == new_run["close_id"] == done.close_id
    assert f"superseded by ledger close {done.close_id}" in (aside / "SUPERSEDED.txt").read_text()
    assert "superseded_by_close" not in new_run
    assert new_run["closed_utc"] == old_run["superseded_utc"]
    # the outputs themselves say so: the superseded workbook, report and journal...
    import pandas as pd
    from openpyxl import load_workbook

    def facts(path):
        rows = load_workbook(path)["Summary"].iter_rows(min_row=3, max_row=13, values_only=True)
        return {r[0]: r[1] for r in rows}

    mark = f"SUPERSEDED by ledger close {done.close_id} (recorded {new_run['closed_utc']})"
    assert facts(aside / "variance-2026-10.xlsx")["Status"].startswith(mark)
    assert mark in (aside / "report-2026-10.html").read_text(encoding="utf-8")
    old_journal = pd.read_csv(aside / "journal-2026-10.csv")
    assert set(old_journal["status"]) <= {f"superseded by close {done.close_id}"}
    assert set(old_journal["close_id"]) <= {old_run["close_id"]}
    # ... while the new close's outputs carry its own id and time
    new = facts(site / "closes" / "2026-10" / "variance-2026-10.xlsx")
    assert new["Ledger close"] == done.close_id and new["Closed at (UTC)"] == new_run["closed_utc"]
    new_journal = pd.read_csv(site / "closes" / "2026-10" / "journal-2026-10.csv")
    assert set(new_journal["close_id"]) <= {done.close_id} and set(new_journal["status"]) <= {"post", "hold"}


@pytest.mark.parametrize("bad", ["2026-13", "2026-1", "26-10", "2026/10", 202610])
def test_bad_period_is_an_input_error_naming_the_option(bad, tmp_path):
    with pytest.raises(InputError, match="--period") as err:
        close_period(tmp_path, bad)
    assert err.value.field == "period"
    assert not list(tmp_path.iterdir())


def test_volume_flags_reach_every_output(closed_site):
    """September's S1 is mostly interpolated (the volume step flags it low_scan): the flag is
    in the ledger, the layer, both workbook sheets and the report beside its variance."""
    from openpyxl import load_workbook

    folder = closed_site / "closes" / "2026-09"
    with Ledger(closed_site / "ledger.sqlite") as led:
        ledger_flags = led.adopted("2026-09").set_index("pile_id")["flags"].to_dict()
    s1 = ledger_flags["S1"].split(";")
    assert "low_scan" in s1 and "out_of_tolerance" in s1  # the volume step's and reconcile's
    layer = read_piles_layer(folder / "piles-2026-09.gpkg").set_index("pile_id")["flags"]
    assert layer.to_dict() == ledger_flags
    wb = load_workbook(folder / "variance-2026-09.xlsx")
    for sheet in ("Piles", "Variance"):
        rows = list(wb[sheet].iter_rows(values_only=True))
        col = rows[0].index("flags")
        in_sheet = {r[0]: r[col] or "" for r in rows[1:8]}
        assert in_sheet == ledger_flags, sheet
    report = (folder / "report-2026-09.html").read_text(encoding="utf-8")
    s1_row = next(r for r in report.split("<tr") if r.startswith(' class="oot"><td>S1</td>'))
    assert "low scan: mostly interpolated" in s1_row
