"""The sample site's planted faults, found by book stock and reconciliation.

The demo (inventory/demo, sample_site/truth.json) plants four faults in October 2026: belt
scale BC2 reads 1.5 % high, one weighbridge ticket is exported twice, a 420 t transfer FE2 ->
FE1 was never recorded, and materials.csv states the rock salt density 4 % low. These tests
run the two closes the way the tool does (September from opening.csv; October from
September's adopted closing) and check that each fault shows where it should.

Survey side: the scan-to-volume chain is tested elsewhere; here the survey tonnes are the
true pile volumes from truth.json times the *table* bulk density (materials.csv, which is how
the density fault enters), with a 1-sigma volume uncertainty of :data:`VOLUME_SIGMA_FRACTION`
of the volume plus the table's density sd - so these tests check book and reconcile, not
the scanner.
"""

from __future__ import annotations

import json
import warnings
from pathlib import Path
from types import SimpleNamespace as NS

import numpy as np
import pandas as pd
import pytest

SITE = Path(__file__).resolve().parents[1] / "sample_site"
TRUTH = SITE / "truth.json"

pytestmark = pytest.mark.skipif(
    not TRUTH.is_file(), reason="sample_site/truth.json is missing: write the demo site first (inventory sample)"
)

#: Assumed 1-sigma volume uncertainty of a survey, fraction of the volume. Terrestrial scans
#: of well-covered piles: published comparisons put scan volumes within 0.1 % of each other
#: (Kovanic et al. 2021) and LiDAR stockpile volumes within 1-3 % (Purdue JTRP report 1832);
#: 0.5 % sits between the two (an assumption of this test, not a measured figure).
VOLUME_SIGMA_FRACTION = 0.005


@pytest.fixture(scope="module")
def truth() -> dict:
    return json.loads(TRUTH.read_text())


@pytest.fixture(scope="module")
def site():
    from inventory.site import load_site

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the loader warns about the repeated ticket: that is the fault
        return load_site(SITE)


def _survey(site, truth: dict, k: int) -> pd.DataFrame:
    piles = truth["surveys"][k]["piles"]
    rows = []
    for pid, mat in zip(site.piles["pile_id"], site.piles["material"]):
        m = site.materials[mat]
        v = piles[pid]["volume_m3"]
        rho = m.bulk_density_t_m3
        rows.append({
            "pile_id": pid, "material": mat, "volume_m3": v, "density_t_m3": rho, "survey_t": v * rho,
            "survey_sigma_t": float(np.hypot(rho * VOLUME_SIGMA_FRACTION * v, v * m.density_sd_t_m3)),
        })
    return pd.DataFrame(rows)


@pytest.fixture(scope="module")
def closes(site, truth):
    from inventory.book import book_stock, opening_from_close, period_bounds
    from inventory.reconcile import reconcile

    cfg = site.config.reconcile
    piles = site.piles[["pile_id", "material"]]
    out = {}
    s9, e9 = period_bounds("2026-09", site.timezone)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        b9 = book_stock(site.movements_for("2026-09"), site.opening, site.surveys["2026-09-30"].instant,
                        site.scales, piles, e9, s9, duplicate_window_min=cfg.duplicate_window_min)
    r9 = reconcile(_survey(site, truth, 0), b9, site.materials, cfg, period="2026-09", scales=site.scales)
    out["2026-09"] = (b9, r9)
    s10, e10 = period_bounds("2026-10", site.timezone)
    opening = opening_from_close(r9.piles, site.materials, cfg.adjust_to)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        b10 = book_stock(site.movements_for("2026-10"), opening, site.surveys["2026-10-31"].instant,
                         site.scales, piles, e10, s10, duplicate_window_min=cfg.duplicate_window_min)
    previous = r9.piles[["pile_id", "survey_t", "survey_sigma_t", "after_survey_net_t", "volume_m3"]]
    r10 = reconcile(_survey(site, truth, 1), b10, site.materials, cfg, previous=previous, period="2026-10",
                    scales=site.scales)
    out["2026-10"] = (b10, r10)
    return out


def test_book_at_each_survey_matches_the_demo_books(site, truth):
    # truth.json's book_at_survey_t is the demo's own roll of its records from opening.csv
    # (each ticket id once): an independent computation of the same rule.
    from inventory.book import book_stock, period_bounds

    both = NS(**{n: pd.concat([getattr(site.movements_for(p), n) for p in ("2026-09", "2026-10")], ignore_index=True)
                 for n in ("weighbridge", "belt_scales", "routing", "transfers")})
    s9, _ = period_bounds("2026-09", site.timezone)
    _, e10 = period_bounds("2026-10", site.timezone)
    for k, date in enumerate(("2026-09-30", "2026-10-31")):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            b = book_stock(both, site.opening, site.surveys[date].instant, site.scales, site.piles[["pile_id", "material"]],
                           e10, s9)
        got = b.piles.set_index("pile_id")["book_t"]
        want = pd.Series(truth["books"]["book_at_survey_t"][k]["book_t"])
        np.testing.assert_allclose(got[want.index], want, atol=0.006)


def test_duplicate_ticket_is_counted_once_and_listed(closes, truth):
    fault = truth["faults"]["duplicate_ticket"]
    book, rec = closes["2026-10"]
    d = book.duplicates
    exact = d[d["kind"] == "exact"]
    assert exact["reference"].tolist() == [fault["ticket"]]
    rows = book.movements[book.movements["reference"] == fault["ticket"]]
    assert len(rows) == 2 and rows["counted"].sum() == 1
    # counted twice it would put C1 24 t short; counted once C1's variance is book noise
    c1 = rec.piles.set_index("pile_id").loc[fault["pile_id"]]
    assert abs(c1.variance_t) < fault["net_t"] / 2
    assert not c1.significant


def test_density_error_shows_on_its_pile_and_nowhere_else(closes, truth):
    # September: opening.csv is true stock, so S1's variance is the density error itself.
    fault = truth["faults"]["density_low"]
    _, rec = closes["2026-09"]
    p = rec.piles.set_index("pile_id")
    assert p.loc[fault["pile_id"], "variance_pct"] == pytest.approx(-fault["low_pct"], abs=0.5)
    others = p.drop(index=fault["pile_id"])
    assert (others["variance_pct"].abs() < 1.0).all(), others["variance_pct"]
    assert p.loc[fault["pile_id"], "out_of_tolerance"] and not others["out_of_tolerance"].any()
    m = rec.materials.set_index("material")
    assert m.loc[fault["material"], "variance_pct"] == pytest.approx(-fault["low_pct"], abs=0.5)
    # October: the opening is September's adopted survey, made with the same wrong density, so
    # the error shows only on the change of stock: (1.20/1.25 - 1) x (true2 - true1).
    _, rec10 = closes["2026-10"]
    t = [s["piles"][fault["pile_id"]]["tonnes"] for s in truth["surveys"]]
    ratio = fault["table_density_t_m3"] / fault["true_density_t_m3"] - 1
    v10 = rec10.piles.set_index("pile_id").loc[fault["pile_id"], "variance_t"]
    assert v10 == pytest.approx(ratio * (t[1] - t[0]), abs=3.0)


def test_unrecorded_transfer_is_a_pair_of_opposite_significant_variances(closes, truth):
    fault = truth["faults"]["missing_transfer"]
    src, dst, tonnes = fault["from_pile"], fault["to_pile"], fault["tonnes"]
    _, rec = closes["2026-10"]
    p = rec.piles.set_index("pile_id")
    assert p.loc[src, "significant"] and p.loc[dst, "significant"]
    assert p.loc[src, "variance_t"] < 0 < p.loc[dst, "variance_t"]
    for pile in (src, dst):
        assert abs(p.loc[pile, "variance_t"]) == pytest.approx(tonnes, abs=2 * p.loc[pile, "variance_sigma_t"])
        assert p.loc[pile, "reason_code"] == "TRANSFER_SUSPECT"
    assert f"pair:{dst}" in p.loc[src, "flags"] and f"pair:{src}" in p.loc[dst, "flags"]
    # the change table says the same without the opening balance
    c = rec.change.set_index("pile_id")
    assert c.loc[src, "significant"] and c.loc[dst, "significant"]
    # and no other pile is paired
    assert set(p.index[p["reason_code"] == "TRANSFER_SUSPECT"]) == {src, dst}


def test_belt_scale_bias_is_named_and_estimated(closes, truth):
    fault = truth["faults"]["belt_bias"]
    _, rec = closes["2026-10"]
    d = rec.scale_diagnostics.set_index("scale_id")
    assert d.index[d["flagged"]].tolist() == [fault["scale_id"]]
    assert d.loc[fault["scale_id"], "bias_pct"] == pytest.approx(fault["reads_high_pct"], abs=0.5)
    assert fault["scale_id"] in d.loc[fault["scale_id"], "message"]
    # September has no planted bias: nothing named
    _, rec9 = closes["2026-09"]
    assert not rec9.scale_diagnostics["flagged"].any()


def test_journal_brings_book_to_survey_with_reasons(closes):
    _, rec = closes["2026-10"]
    p = rec.piles.set_index("pile_id")
    j = rec.journal.set_index("pile_id")
    np.testing.assert_allclose(j["adjustment_t"], (p["survey_t"] - p["book_t"])[j.index])
    np.testing.assert_allclose(p["closing_t"], p["survey_t"] + p["after_survey_net_t"])
    assert set(j["reason_code"]) <= set(rec.reason_codes)
