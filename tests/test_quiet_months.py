"""Quiet months close like any other: a month with no belt-scale records (a site with only a
weighbridge), a month with no movements folder at all, and a month with only transfers.

Each is a copy of the sample site with September's movements cut down; the close must go
through with exit 0, write the workbook, layers and report, and give the books the
movements that are left (no receipts where nothing moved). Odd but valid texts from the
user (a pile id matplotlib could read as mathematics) close the same way.
"""

from __future__ import annotations

import csv
import shutil
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest

from inventory.cli import main
from inventory.export import write_layers, write_manifest, write_report, write_workbook
from inventory.export.layers import read_piles_layer
from inventory.ledger.store import Ledger
from inventory.model.results import JOURNAL_COLUMNS, MOVEMENT_COLUMNS, SCALE_COLUMNS

PERIOD = "2026-09"


def _opening(site: Path) -> dict[str, float]:
    return pd.read_csv(site / "opening.csv").set_index("pile_id")["tonnes"].to_dict()


def _close(site: Path, survey_cache, monkeypatch, capsys) -> tuple[pd.DataFrame, Path, str]:
    monkeypatch.setattr("inventory.survey.measure.measure_survey", survey_cache)
    code = main(["close", str(site), "--period", PERIOD, "--quiet"])
    err = capsys.readouterr().err
    assert code == 0, err
    folder = site / "closes" / PERIOD
    for name in (f"variance-{PERIOD}.xlsx", f"piles-{PERIOD}.gpkg", f"report-{PERIOD}.html", "run.json"):
        assert (folder / name).is_file(), name
    with Ledger(site / "ledger.sqlite") as led:
        piles = led.adopted(PERIOD).set_index("pile_id").sort_index()
    assert len(piles) == 7
    # the layer holds the ledger's figures
    layer = read_piles_layer(folder / f"piles-{PERIOD}.gpkg").set_index("pile_id").sort_index()
    assert layer["book_t"].to_list() == piles["book_t"].to_list()
    return piles, folder, err


def _sheet_rows(path: Path, sheet: str) -> list[dict]:
    from openpyxl import load_workbook

    ws = load_workbook(path)[sheet]
    rows = list(ws.iter_rows(values_only=True))
    header = rows[0]
    out = []
    for row in rows[1:]:
        if row[0] is None:  # the blank line before the totals
            break
        out.append(dict(zip(header, row)))
    return out


@pytest.mark.slow
def test_month_without_movements_folder_closes_with_no_receipts(sample_copy, survey_cache, monkeypatch, capsys):
    shutil.rmtree(sample_copy / "movements" / PERIOD)
    piles, folder, _ = _close(sample_copy, survey_cache, monkeypatch, capsys)
    opening = _opening(sample_copy)
    for col in ("receipts_t", "dispatches_t", "transfers_in_t", "transfers_out_t", "after_survey_net_t"):
        assert piles[col].to_list() == [0.0] * 7, col
    # nothing moved: the book at the survey is the opening balance
    assert piles["book_t"].to_dict() == pytest.approx(opening)
    assert _sheet_rows(folder / f"variance-{PERIOD}.xlsx", "Movements") == []
    report = (folder / f"report-{PERIOD}.html").read_text(encoding="utf-8")
    assert "No movements this period." in report


@pytest.mark.slow
def test_weighbridge_only_month_closes(sample_copy, survey_cache, monkeypatch, capsys):
    mv = sample_copy / "movements" / PERIOD
    (mv / "belt_scales.csv").unlink()
    (mv / "routing.csv").unlink()
    piles, folder, _ = _close(sample_copy, survey_cache, monkeypatch, capsys)
    rows = _sheet_rows(folder / f"variance-{PERIOD}.xlsx", "Movements")
    kinds = {r["kind"] for r in rows}
    assert kinds == {"weighbridge", "transfer"}
    # receipts are the counted weighbridge tickets into each pile up to the survey, and
    # nothing else
    tickets = pd.DataFrame([r for r in rows if r["kind"] == "weighbridge" and r["counted"]
                            and r["before_survey"]])
    into = tickets[tickets["tonnes"] > 0].groupby("pile_id")["tonnes"].sum()
    assert piles["receipts_t"].to_dict() == pytest.approx(into.reindex(piles.index, fill_value=0.0).to_dict())
    assert (piles["receipts_t"] > 0).any()
    # no belt-scale rows in the scale diagnostics either
    scales = _sheet_rows(folder / f"variance-{PERIOD}.xlsx", "Scales")
    assert not any(str(r["scale_id"]).startswith("BC") and (r["tonnes"] or 0) > 0 for r in scales)


@pytest.mark.slow
def test_transfers_only_month_closes(sample_copy, survey_cache, monkeypatch, capsys):
    mv = sample_copy / "movements" / PERIOD
    for name in ("belt_scales.csv", "routing.csv", "weighbridge.csv"):
        (mv / name).unlink()
    piles, folder, _ = _close(sample_copy, survey_cache, monkeypatch, capsys)
    opening = _opening(sample_copy)
    assert piles["receipts_t"].to_list() == [0.0] * 7
    assert piles["dispatches_t"].to_list() == [0.0] * 7
    moved = 420.0 + 380.0 + 350.0  # the three September transfers FE2 -> FE1 in transfers.csv
    assert piles.loc["FE1", "transfers_in_t"] == pytest.approx(moved)
    assert piles.loc["FE2", "transfers_out_t"] == pytest.approx(moved)
    assert piles.loc["FE1", "book_t"] == pytest.approx(opening["FE1"] + moved)
    assert piles.loc["FE2", "book_t"] == pytest.approx(opening["FE2"] - moved)
    assert piles.loc["C1", "book_t"] == pytest.approx(opening["C1"])
    rows = _sheet_rows(folder / f"variance-{PERIOD}.xlsx", "Movements")
    assert [r["kind"] for r in rows] == ["transfer"] * 6  # each transfer: out of one pile, into another
    report = (folder / f"report-{PERIOD}.html").read_text(encoding="utf-8")
    assert "<td>transfer</td>" in report


def test_writers_take_a_close_with_empty_tables(make_close_result, tmp_path, pile_rows):
    """Every writer on a close where nothing moved, nothing was adjusted, no scale weighed,
    the further tables are empty (a datetime column with no rows, a table with no columns)
    and one pile has no book, so no variance % and no decision."""
    result = make_close_result()
    result.movements = pd.DataFrame(columns=MOVEMENT_COLUMNS)
    result.journal = pd.DataFrame(columns=JOURNAL_COLUMNS)
    result.scale_diagnostics = pd.DataFrame(columns=SCALE_COLUMNS)
    result.duplicates = pd.DataFrame()
    result.coverage_gaps = gpd.GeoDataFrame({"pile_id": [], "area_m2": []}, geometry=[], crs=result.crs)
    result.tables = {
        "Belt split": pd.DataFrame({"start": pd.Series(dtype="datetime64[ns, UTC]"),
                                    "piles": pd.Series(dtype=object)}),
        "Measured change": pd.DataFrame(),
    }
    p = result.piles
    for col in ("significant", "out_of_tolerance"):
        p[col] = p[col].astype(object)
    p.loc[0, ["opening_t", "receipts_t", "dispatches_t", "book_t"]] = 0.0
    p.loc[0, ["variance_pct", "significant", "out_of_tolerance"]] = [np.nan, None, None]
    write_workbook(result, tmp_path / "v.xlsx")
    write_layers(result, tmp_path / "p.gpkg")
    write_report(result, tmp_path / "r.html")
    write_manifest(result, tmp_path / "run.json")
    assert _sheet_rows(tmp_path / "v.xlsx", "Movements") == []
    assert _sheet_rows(tmp_path / "v.xlsx", "Belt split") == []
    assert pile_rows.workbook(tmp_path / "v.xlsx", 3) == pile_rows.frame(p)
    layer = read_piles_layer(tmp_path / "p.gpkg")
    assert layer["book_t"].to_list() == p["book_t"].to_list()
    assert pd.isna(layer.loc[0, "out_of_tolerance"])
    report = (tmp_path / "r.html").read_text(encoding="utf-8")
    assert "No movements this period." in report and "No adjustments this period." in report


@pytest.mark.slow
def test_pile_id_that_looks_like_mathtext_closes(sample_copy, survey_cache, monkeypatch, capsys):
    odd = "$x^2$"
    piles = gpd.read_file(sample_copy / "piles.gpkg", layer="piles")
    piles.loc[piles["pile_id"] == "S1", "pile_id"] = odd
    piles.to_file(sample_copy / "piles.gpkg", layer="piles", engine="pyogrio")
    for path in [sample_copy / "opening.csv", *sorted((sample_copy / "movements").glob("*/*.csv"))]:
        with open(path, newline="") as fh:
            rows = [[odd if cell == "S1" else cell for cell in row] for row in csv.reader(fh)]
        with open(path, "w", newline="") as fh:
            csv.writer(fh, lineterminator="\n").writerows(rows)
    closed, folder, _ = _close(sample_copy, survey_cache, monkeypatch, capsys)
    assert odd in closed.index and "S1" not in closed.index
    report = (folder / f"report-{PERIOD}.html").read_text(encoding="utf-8")
    assert f"<td>{odd}</td>" in report


@pytest.mark.slow
def test_close_warns_only_about_its_own_period(sample_copy, survey_cache, monkeypatch, capsys):
    """The sample's October weighbridge repeats a ticket: closing September says nothing of
    it, closing October says it once, and ``inventory check`` reports it whatever the month."""
    repeat = "movements/2026-10/weighbridge.csv line 381: ticket: ticket '018546' repeats line 377"
    assert main(["check", str(sample_copy)]) == 0
    assert capsys.readouterr().err.count(repeat) == 1
    _, _, err = _close(sample_copy, survey_cache, monkeypatch, capsys)
    assert "movements/2026-10" not in err
    assert main(["close", str(sample_copy), "--period", "2026-10", "--quiet"]) == 0
    assert capsys.readouterr().err.count(repeat) == 1


def test_load_site_for_a_period_issues_only_that_periods_movement_warnings(good_site):
    import warnings

    from inventory.errors import InputWarning
    from inventory.site.load import load_site

    sep = good_site / "movements" / "2026-09"
    sep.mkdir()
    ticket = "T9,2026-09-02T08:00:00+02:00,in,coal,A,40.0,15.0,25.0,XY1\n"
    (sep / "weighbridge.csv").write_text(
        "ticket,time,direction,material,pile_id,gross_t,tare_t,net_t,vehicle\n" + ticket + ticket)

    repeat = ("site/movements/2026-09/weighbridge.csv line 3: ticket: ticket 'T9' repeats line 2; "
              "it will be counted once")

    def issued(**kw) -> list[str]:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            site = load_site(good_site, **kw)
        assert [str(p) for p in site.warnings] == [repeat]
        return [str(w.message) for w in caught if issubclass(w.category, InputWarning)]

    assert issued() == issued(period="2026-09") == [repeat]
    assert issued(period="2026-10") == []
