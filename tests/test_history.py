"""``inventory history``: aggregation by pile, material and month with a total row, reason
codes, signs in every format, --output for every format, clear exit-2 errors, the chart."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from inventory.cli import main
from inventory.ledger.store import Ledger

INPUTS = {"surveys/2026-01-28/scan.laz": "1" * 64}


@pytest.fixture
def site(make_close_result, tmp_path):
    """A site folder holding only a ledger with two closed months (three piles each)."""
    root = tmp_path / "site"
    root.mkdir()
    with Ledger(root / "ledger.sqlite") as led:
        led.record_close(make_close_result("2026-01"), INPUTS, "0.1.0")
        m2 = make_close_result("2026-02", opening=led.opening_for("2026-02"), period_index=1)
        led.record_close(m2, INPUTS, "0.1.0")
        rows = led.history()
    return root, rows


def _csv(capsys, argv):
    import io

    assert main(argv) == 0
    return pd.read_csv(io.StringIO(capsys.readouterr().out))


def test_history_rows_carry_the_reason_code_of_their_journal_line(site):
    root, rows = site
    with Ledger(root / "ledger.sqlite") as led:
        journal = {(p, r.pile_id): r.reason_code for p in ("2026-01", "2026-02")
                   for r in led.journal(p).itertuples()}
    got = {(r.period, r.pile_id): r.reason_code for r in rows.itertuples()}
    assert journal and all(got[k] == v for k, v in journal.items())
    # a pile without a journal line has no code
    assert all(got[k] is None or got[k] != got[k] for k in got if k not in journal)


def test_by_month_sums_each_month_and_ends_with_a_total(site, capsys):
    root, rows = site
    out = _csv(capsys, ["history", str(root), "--by", "month", "--format", "csv"])
    assert out["period"].tolist() == ["2026-01", "2026-02", "Total"]
    for i, period in enumerate(("2026-01", "2026-02")):
        g = rows[rows["period"] == period]
        assert out.loc[i, "variance_t"] == pytest.approx(g["variance_t"].sum())
        assert out.loc[i, "book_t"] == pytest.approx(g["book_t"].sum())
        assert out.loc[i, "adjustment_t"] == pytest.approx(g["adjustment_t"].sum())
        assert out.loc[i, "out_of_tolerance_count"] == int(g["out_of_tolerance"].sum())
        # three piles, sigma no larger than all errors taken as one, no smaller than independent
        s = g["variance_sigma_t"]
        assert np.sqrt((s ** 2).sum()) - 1e-9 <= out.loc[i, "variance_sigma_t"] <= s.sum() + 1e-9
    assert out.loc[2, "adjustment_t"] == pytest.approx(rows["adjustment_t"].sum())
    assert out.loc[2, "piles"] == 3


@pytest.mark.parametrize("by, key", [("pile", "pile_id"), ("material", "material")])
def test_by_pile_and_material_cover_the_span(site, capsys, by, key):
    root, rows = site
    out = _csv(capsys, ["history", str(root), "--by", by, "--format", "csv"])
    groups = sorted(rows[key].unique())
    assert out[key].tolist() == groups + ["Total"]
    for i, g in enumerate(groups):
        sel = rows[rows[key] == g]
        assert out.loc[i, "adjustment_t"] == pytest.approx(sel["adjustment_t"].sum())
        assert out.loc[i, "monthly_variance_t"] == pytest.approx(sel["variance_t"].sum())
        assert out.loc[i, "months"] == 2 and out.loc[i, "last_period"] == "2026-02"
        # the span: last survey - start - movements booked
        assert out.loc[i, "variance_t"] == pytest.approx(
            out.loc[i, "end_t"] - out.loc[i, "start_t"] - out.loc[i, "net_movement_t"])
        assert out.loc[i, "end_t"] == pytest.approx(sel[sel["period"] == "2026-02"]["survey_t"].sum())
    assert out.iloc[-1]["adjustment_t"] == pytest.approx(rows["adjustment_t"].sum())
    assert out.iloc[-1]["end_t"] == pytest.approx(out.iloc[:-1]["end_t"].sum())


def test_table_prints_signs_for_variance_and_adjustment(site, capsys):
    root, rows = site
    assert main(["history", str(root)]) == 0
    lines = capsys.readouterr().out.splitlines()
    head = lines[0].split()
    vi, ai = head.index("variance_t"), head.index("adjustment_t")
    for line, (v, a) in zip(lines[1:], zip(rows["variance_t"], rows["adjustment_t"])):
        cells = line.split()
        # the material names here are single words, so columns split on blanks
        assert cells[vi] == f"{v:+,.1f}"
        assert cells[ai] == f"{a:+,.1f}"
    assert any(c.startswith("-") for c in (line.split()[vi] for line in lines[1:]))
    assert any(c.startswith("+") for c in (line.split()[vi] for line in lines[1:]))


@pytest.mark.parametrize("fmt", ["table", "csv", "json", "html"])
def test_output_is_honoured_for_every_format(site, capsys, tmp_path, fmt):
    root, rows = site
    dest = tmp_path / f"out.{fmt}"
    assert main(["history", str(root), "--format", fmt, "--output", str(dest)]) == 0
    said = capsys.readouterr().out
    assert said.strip() == f"wrote {len(rows)} rows to {dest}"
    text = dest.read_text(encoding="utf-8")
    if fmt == "json":
        data = json.loads(text)
        assert [d["variance_t"] for d in data] == pytest.approx(rows["variance_t"].tolist())
    elif fmt == "csv":
        assert len(text.strip().splitlines()) == 1 + len(rows)
    elif fmt == "html":
        assert "data:image/png;base64," in text and "P-COAL-1" in text
    else:
        assert "P-LIME-1" in text and "variance_t" in text


@pytest.mark.parametrize("argv, text", [
    (["--pile", "P-NOPE"], "no pile 'P-NOPE' in the ledger; the ledger has piles P-COAL-1"),
    (["--pile", "p-coal-1"], "did you mean 'P-COAL-1'?"),
    (["--material", "Coal"], "no material 'Coal' in the ledger; did you mean 'coal'?"),
    (["--format", "xlsx"], "--format xlsx needs --output FILE.xlsx"),
])
def test_unknown_pile_material_or_missing_output_exit_2(site, capsys, argv, text):
    root, _ = site
    assert main(["history", str(root), *argv]) == 2
    captured = capsys.readouterr()
    assert text in captured.err and captured.out == ""


def test_missing_site_folder_exits_2(tmp_path, capsys):
    assert main(["history", str(tmp_path / "nowhere")]) == 2
    assert "the site folder does not exist" in capsys.readouterr().err


def test_history_workbook_has_the_chart_and_the_totals(site, tmp_path, capsys):
    from openpyxl import load_workbook

    root, rows = site
    dest = tmp_path / "h.xlsx"
    assert main(["history", str(root), "--by", "material", "--format", "xlsx", "--output", str(dest)]) == 0
    wb = load_workbook(dest)
    assert wb.sheetnames == ["History", "By month", "Totals by material", "Notes"]
    charts = wb["By month"]._charts
    assert len(charts) == 1
    # one series per pile
    assert len(charts[0].series) == rows["pile_id"].nunique()
    ts = wb["Totals by material"]
    assert [c.value for c in ts[1]][:2] == ["material", "first_period"]
    assert [ts.cell(row=i, column=1).value for i in range(2, 5)] == ["coal", "limestone", "Total"]


def test_site_toml_ledger_table_is_checked(good_site, capsys):
    from inventory.site.load import check_site

    toml = good_site / "site.toml"
    base = toml.read_text(encoding="utf-8")
    toml.write_text(base + '\n[ledger]\nurl = "postgresql://ledger@db.example/stock"\nsite_id = "north"\n',
                    encoding="utf-8")
    assert check_site(good_site).ok
    toml.write_text(base + '\n[ledger]\nurl = "mysql://db.example/stock"\n', encoding="utf-8")
    report = check_site(good_site)
    assert not report.ok and any("ledger.url" in str(p) for p in report.errors)


def test_a_ledger_option_that_is_not_a_postgresql_url_exits_2(site, capsys):
    root, _ = site
    assert main(["history", str(root), "--ledger", "mysql://db/stock"]) == 2
    assert "--ledger: not a PostgreSQL URL" in capsys.readouterr().err
    assert main(["history"]) == 2
    assert "name the site folder, or a shared ledger with --ledger URL" in capsys.readouterr().err
