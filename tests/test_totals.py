"""Totals with shared errors and the variance over a span of months, against a Monte Carlo
of the same error model (numpy, seeded).

The model (the one the close states its sigmas from, docs/uncertainty.md): a survey's error
is an independent part, a density part (volume x the material's density error: one draw per
material, the same in every survey) and, for a pile on the floor raster, a floor part (one
draw for the raster, the same under every pile and in every survey); each month's booked
movements of a pile err independently; the opening of a month is the previous survey
(adjust_to = survey).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from inventory.stock.totals import budget_sigma, month_totals, pile_error_parts, span_variance

DENSITY_SD = {"coal": 0.03, "limestone": 0.05}
DENSITY = {"coal": 0.85, "limestone": 1.45}
# pile, material, base, start tonnes
PILES = [("A", "coal", "floor"), ("B", "coal", "toe"), ("C", "limestone", "floor")]
MONTHS = ["2026-01", "2026-02", "2026-03", "2026-04"]  # the first is the month before the span
N_DRAWS = 40000


def _scenario():
    """True stock, movements and stated error parts per pile and month (deterministic)."""
    rng = np.random.default_rng(11)
    sc = {}
    for pid, mat, base in PILES:
        n = len(MONTHS)
        moves = np.round(rng.uniform(-300, 500, n), 1)            # opening -> survey, booked = true
        after = np.round(rng.uniform(-40, 40, n), 1)              # survey -> month end, exact
        moves[0] = 0.0
        true = np.empty(n)
        true[0] = rng.uniform(2000, 4000)
        for m in range(1, n):
            true[m] = true[m - 1] + after[m - 1] + moves[m]
        vol = true / DENSITY[mat]
        sc[pid] = {
            "material": mat, "base": base, "true": true, "moves": moves, "after": after, "vol": vol,
            "u": rng.uniform(15, 40, n),                         # independent survey part, t
            "d": vol * DENSITY_SD[mat],                          # density part, t
            "g": rng.uniform(10, 25, n) if base == "floor" else np.zeros(n),  # floor part, t
            "m": rng.uniform(3, 12, n),                          # movement error, t
        }
    return sc


def _draw(sc, rng, n):
    """Monte Carlo draws of every survey and every booked movement: arrays (n, months)."""
    z_density = {m: rng.standard_normal(n) for m in DENSITY_SD}
    z_floor = rng.standard_normal(n)
    out = {}
    for pid, p in sc.items():
        k = len(MONTHS)
        err = (rng.standard_normal((n, k)) * p["u"] + z_density[p["material"]][:, None] * p["d"]
               + z_floor[:, None] * p["g"])
        out[pid] = {"S": p["true"] + err,
                    "M": p["moves"] + rng.standard_normal((n, k)) * p["m"]}
    return out


def _ledger_rows(sc, draw, i):
    """Ledger rows (as ``Ledger.history(all_columns=True)`` gives them) of draw ``i``, with
    every stated sigma as reconcile computes it."""
    rows = []
    for pid, p in sc.items():
        S, M = draw[pid]["S"][i], draw[pid]["M"][i]
        sig_s = np.sqrt(p["u"] ** 2 + p["d"] ** 2 + p["g"] ** 2)
        closing = S[0] + p["after"][0]
        for m, period in enumerate(MONTHS):
            row = {"period": period, "pile_id": pid, "material": p["material"], "site_name": "yard",
                   "base_method": p["base"], "volume_m3": p["vol"][m], "survey_t": S[m],
                   "survey_sigma_t": sig_s[m], "base_sigma_t": p["g"][m],
                   "after_survey_net_t": p["after"][m]}
            if m == 0:
                row.update(opening_t=np.nan, book_t=np.nan, book_sigma_t=np.nan,
                           variance_t=np.nan, variance_sigma_t=np.nan, adjustment_t=0.0,
                           closing_t=closing)
            else:
                opening = closing
                book = opening + M[m]
                ind_o2 = sig_s[m - 1] ** 2 - p["d"][m - 1] ** 2 - p["g"][m - 1] ** 2
                var_sig = np.sqrt(p["u"][m] ** 2 + ind_o2 + p["m"][m] ** 2
                                  + (p["d"][m] - p["d"][m - 1]) ** 2 + (p["g"][m] - p["g"][m - 1]) ** 2)
                closing = S[m] + p["after"][m]
                row.update(opening_t=opening, book_t=book, book_sigma_t=np.hypot(sig_s[m - 1], p["m"][m]),
                           variance_t=S[m] - book, variance_sigma_t=var_sig,
                           adjustment_t=S[m] - book, closing_t=closing)
            rows.append(row)
    df = pd.DataFrame(rows)
    return df[df["period"] != MONTHS[0]].reset_index(drop=True), df[df["period"] == MONTHS[0]].reset_index(drop=True)


@pytest.fixture(scope="module")
def mc():
    sc = _scenario()
    draw = _draw(sc, np.random.default_rng(20261204), N_DRAWS)
    return sc, draw


def _span_value(sc, draw, piles):
    """The span variance per draw: last survey - survey before the span - booked movements."""
    tot = 0.0
    for pid in piles:
        p = sc[pid]
        n = p["after"][:-1].sum() + draw[pid]["M"][:, 1:].sum(axis=1)
        tot = tot + draw[pid]["S"][:, -1] - draw[pid]["S"][:, 0] - n
    return tot


def test_budget_sigma_adds_shared_parts_linearly():
    # GUM 5.2: correlation 1 -> linear sum, 0 -> quadrature
    assert budget_sigma([(None, 3.0), (None, 4.0), ("k", 1.0), ("k", 2.0)]) == pytest.approx(np.sqrt(9 + 16 + 9))
    assert budget_sigma([("a", 3.0), ("b", -3.0), ("a", -3.0)]) == pytest.approx(3.0)


def test_error_parts_split_the_survey_sigma():
    rows = pd.DataFrame({"pile_id": ["A", "B"], "material": ["coal", "coal"], "survey_sigma_t": [50.0, 20.0],
                         "volume_m3": [1000.0, 1000.0], "base_method": ["floor", "toe"],
                         "base_sigma_t": [14.0, 0.0], "site_name": ["y", "y"]})
    parts = pile_error_parts(rows, {"coal": 0.03})
    assert parts["density_t"].tolist() == pytest.approx([30.0, 20.0])  # capped at the sigma
    assert parts["floor_t"].tolist() == pytest.approx([14.0, 0.0])
    assert parts["ind_t"].tolist() == pytest.approx([np.sqrt(2500 - 900 - 196), 0.0])
    assert parts["floor_key"].tolist() == [("floor", "y"), None]
    assert parts["density_key"].iloc[0] == parts["density_key"].iloc[1]


@pytest.mark.parametrize("piles", [["A"], ["B"], ["A", "B", "C"]])
def test_span_variance_matches_a_monte_carlo_of_the_same_model(mc, piles):
    sc, draw = mc
    value = _span_value(sc, draw, piles)
    rows, before = _ledger_rows(sc, draw, 0)
    rows, before = rows[rows["pile_id"].isin(piles)], before[before["pile_id"].isin(piles)]
    got = span_variance(rows, before, density_sd=DENSITY_SD)
    # the estimator is what the Monte Carlo draws, and the sum of the months' variances
    assert got["variance_t"] == pytest.approx(value[0], abs=1e-6)
    assert got["monthly_variance_t"] == pytest.approx(value[0], abs=1e-6)
    mc_sd = float(np.std(value))
    # 40000 draws: the sample sd is within about 0.4 % (1 sigma) of the model's
    assert got["variance_sigma_t"] == pytest.approx(mc_sd, rel=0.02)
    # adding the months' sigmas in quadrature counts the surveys in between twice
    naive = float(np.sqrt((rows["variance_sigma_t"] ** 2).sum()))
    assert naive > 1.2 * mc_sd


def test_span_without_a_survey_before_starts_from_the_opening(mc):
    sc, draw = mc
    rows, before = _ledger_rows(sc, draw, 0)
    first = rows[rows["period"] == MONTHS[1]]
    got = span_variance(rows[rows["pile_id"] == "A"], None, density_sd=DENSITY_SD)
    a = rows[rows["pile_id"] == "A"]
    assert got["start_t"] == pytest.approx(float(first[first["pile_id"] == "A"]["opening_t"].iloc[0]))
    assert got["variance_t"] == pytest.approx(a["variance_t"].sum(), abs=1e-6)
    # the opening's whole error (here the survey before) plus the month's movements
    p = sc["A"]
    s0 = np.sqrt(p["u"][0] ** 2 + p["d"][0] ** 2 + p["g"][0] ** 2)
    assert got["variance_sigma_t"] > budget_sigma([(None, p["u"][-1])])
    assert got["variance_sigma_t"] == pytest.approx(np.sqrt(
        s0 ** 2 + p["m"][1] ** 2 + (p["m"][2:] ** 2).sum() + p["u"][-1] ** 2 + p["d"][-1] ** 2 + p["g"][-1] ** 2))


def test_month_totals_match_a_monte_carlo_of_the_same_model(mc):
    sc, draw = mc
    rows, before = _ledger_rows(sc, draw, 0)
    tot = month_totals(rows, before, density_sd=DENSITY_SD)
    assert tot["period"].tolist() == MONTHS[1:]
    for k, period in enumerate(MONTHS[1:], start=1):
        value = 0.0
        for pid, p in sc.items():
            opening = draw[pid]["S"][:, k - 1] + p["after"][k - 1]
            value = value + draw[pid]["S"][:, k] - opening - draw[pid]["M"][:, k]
        row = tot[tot["period"] == period].iloc[0]
        assert row["variance_t"] == pytest.approx(value[0], abs=1e-6)
        assert row["variance_sigma_t"] == pytest.approx(float(np.std(value)), rel=0.02)


def _close_frame():
    """Three surveyed piles of a first close (openings from opening.csv, sigma 5 t each)."""
    return pd.DataFrame({
        "pile_id": ["A", "B", "C"], "material": ["coal", "coal", "ore"],
        "base_method": ["floor", "floor", "level:100.0"],
        "survey_t": [1000.0, 800.0, 600.0], "book_t": [990.0, 810.0, 590.0], "adjustment_t": [10.0, -10.0, 10.0],
        "survey_sigma_t": [50.0, 40.0, 30.0], "_d_survey": [30.0, 20.0, 12.0], "_g_survey": [20.0, 10.0, 0.0],
        "opening_sigma_t": [5.0, 5.0, 5.0], "opening_density_sigma_t": [0.0] * 3, "opening_base_sigma_t": [0.0] * 3,
    })


def test_site_totals_share_density_floor_and_scale_errors():
    from inventory.stock.totals import close_site_totals

    scale_load = pd.DataFrame({"pile_id": ["A", "B", "C"], "scale_id": ["BC1", "BC1", "WB1"],
                               "sigma_t": [3.0, 2.0, 1.0]})
    tot = close_site_totals(_close_frame(), scale_load).iloc[0]
    # worked by hand: independent survey parts 1200 + 1100 + 756; coal density (30 + 20)^2;
    # ore density 12^2; one floor raster under A and B (20 + 10)^2; the level base of C is 0
    assert tot["survey_sigma_t"] == pytest.approx(np.sqrt(3056 + 2500 + 144 + 900))
    # openings 3 x 5^2; belt BC1 (3 + 2)^2 linear over its piles; WB1 1^2
    assert tot["book_sigma_t"] == pytest.approx(np.sqrt(75 + 25 + 1))
    assert tot["variance_sigma_t"] == pytest.approx(np.sqrt(3056 + 2500 + 144 + 900 + 75 + 25 + 1))
    assert tot["variance_t"] == pytest.approx(10.0) and tot["piles"] == 3


def test_report_headline_shows_the_site_total_sigmas(close_result):
    import dataclasses

    from inventory.export.report import report_html
    from inventory.stock.totals import close_site_totals

    frame = _close_frame()
    res = dataclasses.replace(close_result, tables={**close_result.tables,
                                                    "Site totals": close_site_totals(frame, None)})
    page = report_html(res)
    want = np.sqrt(3056 + 2500 + 144 + 900 + 75)
    assert "Variance, 1 sigma (t; shared density, floor and scale errors counted once)" in page
    assert f"{want:,.2f}" in page


def test_survey_totals_share_density_and_floor_errors():
    """The volumes command's totals, worked by hand. Survey sigma of a pile:
    sqrt((density x volume sigma)^2 + (volume x density sd)^2), as the volume step forms it.
    A (coal, floor): 1000 m3 +/- 10 (base 6), 1.0 +/- 0.02 t/m3: sigma^2 = 100 + 400, own part
    500 - 20^2 - 6^2 = 64. B (coal, floor): 500 m3 +/- 5 (base 3): 25 + 100, own 125 - 100 - 9 = 16.
    C (ore, level): 200 m3 +/- 4, 2.0 +/- 0.05 t/m3: 64 + 100, own 64 (a level is the pile's own)."""
    from inventory.stock.totals import survey_totals

    table = pd.DataFrame({
        "pile_id": ["A", "B", "C"], "material": ["coal", "coal", "ore"],
        "base_method": ["floor", "floor", "level:100.0"],
        "volume_m3": [1000.0, 500.0, 200.0], "volume_sigma_m3": [10.0, 5.0, 4.0],
        "sigma_base_m3": [6.0, 3.0, 1.0], "density_t_m3": [1.0, 1.0, 2.0],
        "density_sd_t_m3": [0.02, 0.02, 0.05],
    })
    table["survey_t"] = table["volume_m3"] * table["density_t_m3"]
    table["survey_sigma_t"] = np.hypot(table["density_t_m3"] * table["volume_sigma_m3"],
                                       table["volume_m3"] * table["density_sd_t_m3"])
    got = survey_totals(table).set_index("material")
    assert list(got.index) == ["coal", "ore", ""]
    # coal: own 64 + 16, density (20 + 10)^2, floor (6 + 3)^2
    assert got.at["coal", "survey_sigma_t"] == pytest.approx(np.sqrt(64 + 16 + 900 + 81), rel=1e-12)
    assert got.at["coal", "volume_sigma_m3"] == pytest.approx(np.sqrt(64 + 16 + 81), rel=1e-12)
    assert got.at["ore", "survey_sigma_t"] == pytest.approx(np.sqrt(164), rel=1e-12)
    # site: 64 + 16 + 64 + coal 900 + ore 100 + floor 81 = 1225
    assert got.at["", "survey_sigma_t"] == pytest.approx(35.0, rel=1e-12)
    assert got.at["", "volume_sigma_m3"] == pytest.approx(np.sqrt(64 + 16 + 16 + 81), rel=1e-12)
    assert got.at["", "survey_sigma_quadrature_t"] == pytest.approx(np.sqrt(500 + 125 + 164), rel=1e-12)
    assert got.at["", "survey_t"] == 1900.0 and got.at["", "volume_m3"] == 1700.0 and got.at["", "piles"] == 3
    # a pile with no density counts in the volumes only
    table.loc[2, ["survey_t", "survey_sigma_t"]] = np.nan
    got = survey_totals(table).set_index("material")
    assert got.at["", "survey_t"] == 1500.0 and np.isnan(got.at["ore", "survey_t"])
    assert got.at["", "survey_sigma_t"] == pytest.approx(np.sqrt(64 + 16 + 900 + 81), rel=1e-12)
