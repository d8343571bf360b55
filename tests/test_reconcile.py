"""Reconciliation rules with hand-computed numbers: variance, significance, tolerance,
per-material totals, measured change vs net movement, scale-bias fit, journal."""

from __future__ import annotations

import math

import pandas as pd
import pytest

from inventory.errors import InputErrors
from inventory.site.load import Material, Movements, ReconcileConfig, Scale
from inventory.stock.book import book_stock, opening_from_close
from inventory.stock.reconcile import REASON_CODES, SIGN_CONVENTION, ReconcileSettings, reconcile
from inventory.model.results import JOURNAL_COLUMNS, PILE_COLUMNS, SCALE_COLUMNS

T = pd.Timestamp
SQRT3 = math.sqrt(3.0)
START, END = T("2026-09-30T22:00Z"), T("2026-10-31T23:00Z")
AT = T("2026-10-31T12:00Z")
SCALES = {
    "B1": Scale(id="B1", kind="belt", direction="in", accuracy_class="1"),
    "R1": Scale(id="R1", kind="belt", direction="out", accuracy_class="1"),
}


def material(name: str, density_sd_t_m3: float, tolerance_pct: float | None) -> Material:
    # bulk density and moisture play no part in reconcile
    return Material(name, bulk_density_t_m3=1.0, density_sd_t_m3=density_sd_t_m3, moisture_pct=0.0,
                    tolerance_pct=tolerance_pct)


MATERIALS = {"coal": material("coal", 0.05, 3.0), "ore": material("ore", 0.1, None)}


def belt_moves(pile_ids, belts: list[dict] | None = None, routes: list[dict] | None = None) -> Movements:
    return Movements.checked("2026-10", belt_scales=pd.DataFrame(belts) if belts else None,
                             routing=pd.DataFrame(routes) if routes else None, scales=SCALES, pile_ids=pile_ids,
                             materials=MATERIALS)


def book_from(opening: dict, belt_t: dict | None = None, sigma: dict | None = None, materials: dict | None = None,
              scale: str = "B1", after: dict | None = None):
    """Book with the given openings; belt `scale` delivers belt_t[p] tonnes to pile p, one day
    per pile, before the survey; `after` adds belt tonnes after the survey."""
    piles = sorted(opening)
    op = pd.DataFrame({"pile_id": piles, "tonnes": [opening[p] for p in piles],
                       "sigma_t": [(sigma or {}).get(p, 0.0) for p in piles]})
    rows, routes = [], []
    day = T("2026-10-02T00:00Z")
    for p, t in list((belt_t or {}).items()) + [(p, t) for p, t in (after or {}).items()]:
        is_after = p in (after or {}) and (belt_t or {}).get(p) != t
        start = T("2026-10-31T13:00Z") if is_after else day
        rows.append({"scale_id": scale, "start": start, "end": start + pd.Timedelta(hours=1), "tonnes": t})
        routes.append({"scale_id": scale, "pile_id": p, "start": start, "end": start + pd.Timedelta(hours=1)})
        day += pd.Timedelta(days=1)
    mv = belt_moves(piles, rows, routes)
    pile_tab = pd.DataFrame({"pile_id": piles, "material": [(materials or {}).get(p, "coal") for p in piles]})
    return book_stock(mv, op, AT, SCALES, pile_tab, END, START)


def survey_of(values: dict, sigma: dict | float = 0.0, **extra) -> pd.DataFrame:
    piles = sorted(values)
    df = pd.DataFrame({"pile_id": piles, "survey_t": [values[p] for p in piles]})
    df["survey_sigma_t"] = [sigma[p] for p in piles] if isinstance(sigma, dict) else sigma
    for k, v in extra.items():
        df[k] = [v[p] for p in piles]
    return df


def test_variance_significance_tolerance_flags_and_reasons():
    # book 1000 t, book sigma 3 t (opening); survey sigma 4 t -> variance sigma 5 t, k = 2 -> 10 t;
    # coal tolerance 3 % -> 30 t.
    book = book_from({"A": 1000.0, "B": 1000.0, "C": 1000.0}, sigma={"A": 3.0, "B": 3.0, "C": 3.0})
    sv = survey_of({"A": 1040.0, "B": 1008.0, "C": 975.0}, 4.0)
    r = reconcile(sv, book, MATERIALS, ReconcileSettings(significance_k=2.0))
    p = r.piles.set_index("pile_id")
    assert list(r.piles.columns[: len(PILE_COLUMNS)]) == PILE_COLUMNS
    assert p.loc["A", "variance_t"] == pytest.approx(40.0)
    assert p.loc["A", "variance_pct"] == pytest.approx(4.0)
    assert p.loc["A", "variance_sigma_t"] == pytest.approx(5.0)
    # A: 40 t > 10 t significant, > 30 t out of tolerance
    assert p.loc["A", "significant"] and p.loc["A", "out_of_tolerance"]
    assert p.loc["A", "reason_code"] == "UNEXPLAINED"
    # B: 8 t < 10 t not significant, within tolerance
    assert not p.loc["B", "significant"] and not p.loc["B", "out_of_tolerance"]
    assert p.loc["B", "reason_code"] == "WITHIN_SIGMA"
    # C: -25 t significant, within 30 t
    assert p.loc["C", "significant"] and not p.loc["C", "out_of_tolerance"]
    assert p.loc["C", "reason_code"] == "WITHIN_TOL"
    assert "significant" in p.loc["A", "flags"] and "out_of_tolerance" in p.loc["A", "flags"]


def test_volume_flags_are_kept_beside_reconciliation_flags():
    # A: out of tolerance with the volume step's low_scan and unfilled_gap flags; B: quiet
    # except for below_base; C: no volume flags at all (same numbers as the test above)
    book = book_from({"A": 1000.0, "B": 1000.0, "C": 1000.0}, sigma={"A": 3.0, "B": 3.0, "C": 3.0})
    sv = survey_of({"A": 1040.0, "B": 1008.0, "C": 975.0}, 4.0,
                   flags={"A": "low_scan;unfilled_gap", "B": "below_base", "C": ""},
                   scanned_fraction={"A": 0.42, "B": 0.97, "C": 1.0})
    p = reconcile(sv, book, MATERIALS, ReconcileSettings(significance_k=2.0)).piles.set_index("pile_id")
    assert p.loc["A", "flags"] == "out_of_tolerance;significant;low_scan;unfilled_gap"
    assert p.loc["B", "flags"] == "below_base"
    assert p.loc["C", "flags"] == "significant"
    # the low-scan pile's reason says its variance rests on interpolation
    assert p.loc["A", "reason_code"] == "UNEXPLAINED"
    assert "low scan: only 42 % of the footprint scanned" in p.loc["A", "reason"]
    assert "low scan" not in p.loc["B", "reason"] and "low scan" not in p.loc["C", "reason"]


def test_default_tolerance_applies_to_materials_without_one():
    book = book_from({"X": 1000.0}, materials={"X": "ore"})
    r = reconcile(survey_of({"X": 1025.0}), book, MATERIALS, ReconcileSettings(default_tolerance_pct=2.0))
    x = r.piles.iloc[0]
    assert x.tolerance_pct == 2.0 and x.out_of_tolerance          # 25 t > 2 % of 1000 t
    r = reconcile(survey_of({"X": 1025.0}), book, MATERIALS, ReconcileConfig(default_tolerance_pct=3.0))
    assert not r.piles.iloc[0].out_of_tolerance


def test_adjustment_closing_and_journal_to_survey_and_to_midpoint():
    # survey 11:00... after the survey the belt delivers 50 t: closing = adopted + 50
    book = book_from({"A": 1000.0, "B": 400.0}, after={"A": 50.0})
    sv = survey_of({"A": 1040.0})                                  # B not surveyed
    # A's +40 t (4 %) is beyond the 3 % tolerance with no explanation: held by default
    held = reconcile(sv, book, MATERIALS, ReconcileSettings(adjust_to="survey"))
    h = held.piles.set_index("pile_id")
    assert h.loc["A", "reason_code"] == "UNEXPLAINED"
    assert h.loc["A", "adjustment_t"] == 0.0 and h.loc["A", "closing_t"] == pytest.approx(1050.0)
    assert held.journal.empty
    assert held.lines[["pile_id", "quantity_t", "status"]].values.tolist() == [["A", 40.0, "hold"]]
    assert "investigate before posting" in held.lines["reason"].iloc[0]
    r = reconcile(sv, book, MATERIALS, ReconcileSettings(adjust_to="survey", hold_unexplained=False))
    p = r.piles.set_index("pile_id")
    assert p.loc["A", "after_survey_net_t"] == pytest.approx(50.0)
    assert p.loc["A", "adjustment_t"] == pytest.approx(40.0)
    assert p.loc["A", "closing_t"] == pytest.approx(1090.0)        # 1000 + 40 + 50
    assert p.loc["B", "adjustment_t"] == 0.0 and p.loc["B", "closing_t"] == pytest.approx(400.0)
    assert p.loc["B", "reason_code"] == "NOT_SURVEYED"
    assert list(r.journal.columns) == JOURNAL_COLUMNS
    assert r.journal[["pile_id", "adjustment_t"]].values.tolist() == [["A", 40.0]]
    assert r.journal["reason_code"].isin(REASON_CODES).all()
    assert "positive increases" in SIGN_CONVENTION
    mid = reconcile(sv, book, MATERIALS, ReconcileSettings(adjust_to="midpoint", hold_unexplained=False)
                    ).piles.set_index("pile_id")
    assert mid.loc["A", "adjustment_t"] == pytest.approx(20.0)
    assert mid.loc["A", "closing_t"] == pytest.approx(1070.0)
    with pytest.raises(ValueError, match="adjust_to"):
        reconcile(sv, book, MATERIALS, ReconcileSettings(adjust_to="book"))


def test_per_material_totals_handle_correlated_errors():
    # Two coal piles fed by belt B1 (class 1 in service, MPE 1 %): 600 t and 300 t.
    # Book sigma per pile: 6/sqrt3 and 3/sqrt3; one scale -> linear: 9/sqrt3 = 5.196 t.
    # Survey: sigma 60 and 30 t, of which density (sd 0.05 t/m3 x 1000 / 500 m3) 50 and 25 t.
    # Density common to the material: sqrt((60^2-50^2) + (30^2-25^2) + (50+25)^2) = sqrt(7000).
    book = book_from({"A": 0.0, "B": 0.0}, belt_t={"A": 600.0, "B": 300.0})
    sv = survey_of({"A": 640.0, "B": 310.0}, {"A": 60.0, "B": 30.0}, volume_m3={"A": 1000.0, "B": 500.0})
    r = reconcile(sv, book, MATERIALS)
    m = r.materials.set_index("material").loc["coal"]
    assert m.book_t == pytest.approx(900.0) and m.survey_t == pytest.approx(950.0)
    assert m.variance_t == pytest.approx(50.0)
    assert m.variance_pct == pytest.approx(100 * 50 / 900)
    assert m.book_sigma_t == pytest.approx(9.0 / SQRT3)
    assert m.survey_sigma_t == pytest.approx(math.sqrt(7000.0))
    assert m.variance_sigma_t == pytest.approx(math.sqrt(7000.0 + 27.0))
    assert not m.significant                                       # 50 < 2 x 83.8
    assert m.out_of_tolerance                                      # 50 > 3 % of 900 = 27


def test_measured_change_vs_net_movement_separates_opening_error():
    # Previous survey 900 t; 20 t booked between it and the opening; opening balance 950 t
    # (30 t more than the previous survey rolled forward: an opening error). This month the
    # belt delivers 100 t; survey 1010 t.
    book = book_from({"A": 950.0}, belt_t={"A": 100.0})
    sv = survey_of({"A": 1010.0}, 2.0)
    prev = pd.DataFrame({"pile_id": ["A"], "survey_t": [900.0], "survey_sigma_t": [2.0], "after_survey_net_t": [20.0]})
    r = reconcile(sv, book, MATERIALS, previous=prev)
    c = r.change.iloc[0]
    assert c.measured_change_t == pytest.approx(110.0)             # 1010 - 900
    assert c.net_movement_t == pytest.approx(120.0)                # 20 + 100
    assert c.difference_t == pytest.approx(-10.0)
    assert c.opening_gap_t == pytest.approx(-30.0)                 # 920 - 950
    assert r.piles.iloc[0].variance_t == pytest.approx(-40.0)      # = difference + opening gap
    # sigma: surveys 2 and 2, belt 1 % of 100 t / sqrt3 = 0.577 t
    assert c.difference_sigma_t == pytest.approx(math.sqrt(4 + 4 + (1.0 / SQRT3) ** 2))
    assert c.significant                                           # 10 > 2 x 2.89


def _planted(beta: float, T: dict) -> dict:
    """Variance of a pile fed T recorded tonnes by a scale reading (1 + beta) x true."""
    return {p: -beta / (1 + beta) * t for p, t in T.items()}


def test_scale_bias_exact_fit_is_named():
    # B1 reads 2 % high. Piles P1-P3 fed 1000, 2000, 3000 t; P4 fed by nothing.
    # Fit: b = sum T(-v) / sum T^2 = 0.02/1.02 exactly -> beta = 2.00 %. Residuals 0, so
    # sigma_b = survey sigma / sqrt(sum T^2) = 1 / sqrt(14e6), beta sigma = that / (1 - b)^2.
    T_ = {"P1": 1000.0, "P2": 2000.0, "P3": 3000.0}
    opening = {"P1": 5000.0, "P2": 5000.0, "P3": 5000.0, "P4": 5000.0}
    book = book_from(opening, belt_t=T_)
    v = _planted(0.02, T_)
    sv = survey_of({p: opening[p] + T_.get(p, 0.0) + v.get(p, 0.0) for p in opening}, 1.0)
    r = reconcile(sv, book, MATERIALS, scales=SCALES, period="2026-10")
    d = r.scale_diagnostics.set_index("scale_id").loc["B1"]
    assert list(r.scale_diagnostics.columns) == SCALE_COLUMNS
    assert d.bias_pct == pytest.approx(2.0, abs=1e-9)
    b = 0.02 / 1.02
    assert d.bias_sigma_pct == pytest.approx(100 * (1 / math.sqrt(14e6)) / (1 - b) ** 2, rel=1e-6)
    assert d.flagged and "B1" in d.message and "+2.00 %" in d.message
    assert d.piles == "P1,P2,P3" and d.tonnes == pytest.approx(6000.0)
    p = r.piles.set_index("pile_id")
    assert (p.loc[["P1", "P2", "P3"], "reason_code"] == "SCALE_BIAS").all()
    assert "scale:B1" in p.loc["P3", "flags"]


def test_scale_bias_within_class_mpe_is_not_named():
    # 0.5 % high on a class 1 scale (in-service MPE 1 %): significant with these sigmas, not named
    T_ = {"P1": 10000.0, "P2": 20000.0, "P3": 30000.0}
    opening = {p: 0.0 for p in T_}
    book = book_from(opening, belt_t=T_)
    v = _planted(0.005, T_)
    r = reconcile(survey_of({p: T_[p] + v[p] for p in T_}, 1.0), book, MATERIALS, scales=SCALES)
    d = r.scale_diagnostics.iloc[0]
    assert d.bias_pct == pytest.approx(0.5, abs=1e-9)
    assert not d.flagged and "within its MPE" in d.message


def test_reclaim_scale_reading_high_shows_as_stock_over():
    # R1 reclaims and reads 2 % high: dispatches overstated, survey above book (v > 0).
    T_ = {"P1": 1000.0, "P2": 3000.0}
    opening = {"P1": 5000.0, "P2": 5000.0}
    book = book_from(opening, belt_t=T_, scale="R1")
    v = {p: +0.02 / 1.02 * t for p, t in T_.items()}
    sv = survey_of({p: opening[p] - T_[p] + v[p] for p in T_}, 1.0)
    r = reconcile(sv, book, MATERIALS, scales=SCALES)
    d = r.scale_diagnostics.set_index("scale_id").loc["R1"]
    assert d.bias_pct == pytest.approx(2.0, abs=1e-9) and d.flagged


def test_outlier_pile_is_left_out_of_the_fit_and_paired_as_a_transfer():
    # P1-P3 as above with a 2 % bias; P4 also fed (1500 t) but 300 t were moved into it from P5
    # without a record: P4 +300 t over its bias share, P5 -300 t. With P4 in, the fit gives
    # b = -0.0077 (hand: sum T(-v) / sum T^2 = (280000 - 405000*...) < 0); P4's residual is the
    # worst (> 3 sigma) so it is left out and b returns to 2 %.
    T_ = {"P1": 1000.0, "P2": 2000.0, "P3": 3000.0, "P4": 1500.0}
    opening = {"P1": 5000.0, "P2": 5000.0, "P3": 5000.0, "P4": 5000.0, "P5": 5000.0}
    book = book_from(opening, belt_t=T_)
    v = _planted(0.02, T_)
    v["P4"] += 300.0
    v["P5"] = -300.0
    sv = survey_of({p: opening[p] + T_.get(p, 0.0) + v[p] for p in opening}, 1.0)
    r = reconcile(sv, book, MATERIALS, scales=SCALES)
    d = r.scale_diagnostics.iloc[0]
    assert d.bias_pct == pytest.approx(2.0, abs=1e-9) and d.flagged
    assert "set aside as outliers: P4" in d.message
    p = r.piles.set_index("pile_id")
    assert p.loc["P4", "reason_code"] == "TRANSFER_SUSPECT" and p.loc["P5", "reason_code"] == "TRANSFER_SUSPECT"
    assert "pair:P5" in p.loc["P4", "flags"] and "pair:P4" in p.loc["P5", "flags"]
    assert (p.loc[["P1", "P2", "P3"], "reason_code"] == "SCALE_BIAS").all()


def test_a_poorly_scanned_receiver_still_pairs_and_noise_does_not():
    # A: -400 t +/- 30 t (significant). B: +450 t +/- 250 t (1.8 sigma: not significant alone,
    # but leaning the mirror way by more than one sigma). Sum +50 t within 2 x hypot(30, 250).
    # Joint estimate (WLS): w = 1/900, 1/62500 -> t = (400/900 + 450/62500) / (1/900 + 1/62500)
    # = 400.71 t, sigma 1/sqrt(1/900 + 1/62500) = 29.79 t.
    sig = {"A": 30.0, "B": 250.0, "C": 250.0}
    book = book_from({"A": 5000.0, "B": 5000.0, "C": 5000.0})
    r = reconcile(survey_of({"A": 4600.0, "B": 5450.0, "C": 5000.0}, sig), book, MATERIALS)
    p = r.piles.set_index("pile_id")
    assert p.loc["A", "significant"] and not p.loc["B", "significant"]
    assert p.loc["A", "reason_code"] == p.loc["B", "reason_code"] == "TRANSFER_SUSPECT"
    assert "about 401 t (+/- 30 t) from A to B" in p.loc["B", "reason"]
    assert "alone is within 2 sigma" in p.loc["B", "reason"]
    # one proposed transfer line A -> B of t, and each pile's residual: A -400 + 400.71 =
    # +0.71 t, B +450 - 400.71 = +49.29 t; posted together they give back each variance
    t = (400 / 900 + 450 / 62500) / (1 / 900 + 1 / 62500)
    lines = r.lines.set_index("line")
    assert lines["reason_code"].tolist() == ["TRANSFER", "TRANSFER_RESIDUAL", "TRANSFER_RESIDUAL"]
    assert lines.loc[1, ["pile_id", "to_pile_id"]].tolist() == ["A", "B"]
    assert lines.loc[1, "quantity_t"] == pytest.approx(t, rel=1e-12)
    assert lines.loc[2, "quantity_t"] == pytest.approx(t - 400, rel=1e-9)
    assert lines.loc[3, "quantity_t"] == pytest.approx(450 - t, rel=1e-12)
    assert (lines["status"] == "post").all()
    assert p.loc["A", "adjustment_t"] == pytest.approx(-400.0) and p.loc["B", "adjustment_t"] == pytest.approx(450.0)
    # policy "significant": the transfer (beyond k sigma by construction) is posted, the
    # residuals (0.71 t within 60 t, 49.29 t within 500 t) are held
    r = reconcile(survey_of({"A": 4600.0, "B": 5450.0, "C": 5000.0}, sig), book, MATERIALS,
                  ReconcileSettings(adjust="significant"))
    assert r.lines["status"].tolist() == ["post", "hold", "hold"]
    p2 = r.piles.set_index("pile_id")
    assert p2.loc["A", "adjustment_t"] == pytest.approx(-t) and p2.loc["B", "adjustment_t"] == pytest.approx(t)
    assert p2.loc["B", "closing_t"] == pytest.approx(5000 + t)
    assert r.journal.set_index("pile_id")["adjustment_t"].sum() == pytest.approx(0.0, abs=1e-9)
    # C's +20 t on 250 t is noise (0.08 sigma): it does not become A's partner
    r = reconcile(survey_of({"A": 4600.0, "B": 5000.0, "C": 5020.0}, sig), book, MATERIALS)
    p = r.piles.set_index("pile_id")
    assert p.loc["A", "reason_code"] == "UNEXPLAINED"
    assert p.loc["C", "reason_code"] == "WITHIN_SIGMA"


def test_adjustment_policies_post_some_lines_and_hold_the_rest():
    # book 1000 t each, survey sigma 4 t, k = 2 (8 t), coal tolerance 3 % (30 t):
    # A +5 t (within sigma), B +20 t (significant, within tolerance), C -50 t (unexplained)
    book = book_from({"A": 1000.0, "B": 1000.0, "C": 1000.0})
    sv = survey_of({"A": 1005.0, "B": 1020.0, "C": 950.0}, 4.0)

    def run(**kw):
        r = reconcile(sv, book, MATERIALS, ReconcileSettings(**kw))
        return dict(zip(r.lines["pile_id"], r.lines["status"])), r.piles.set_index("pile_id")

    status, p = run()
    assert status == {"A": "post", "B": "post", "C": "hold"}
    assert p["adjustment_t"].tolist() == [5.0, 20.0, 0.0]
    status, p = run(adjust="significant")
    assert status == {"A": "hold", "B": "post", "C": "hold"}
    assert p["closing_t"].tolist() == [1000.0, 1020.0, 1000.0]
    status, p = run(adjust="out_of_tolerance", hold_unexplained=False)
    assert status == {"A": "hold", "B": "hold", "C": "post"}
    assert p["adjustment_t"].tolist() == [0.0, 0.0, -50.0]
    with pytest.raises(ValueError, match="adjust must be one of"):
        run(adjust="some")


def test_lines_are_valued_and_coded():
    from inventory.site.load import JournalConfig
    from inventory.stock.reconcile import value_lines

    book = book_from({"A": 1000.0, "B": 1000.0}, materials={"A": "coal", "B": "ore"})
    r = reconcile(survey_of({"A": 1005.0, "B": 990.0}, 4.0), book, MATERIALS)
    mats = dict(MATERIALS, coal=Material("coal", 1.0, 0.05, 0.0, 3.0, unit_cost=80.0))
    v = value_lines(r.lines, mats, JournalConfig(currency="EUR", accounts={"coal": "1400"},
                                                  locations={"A": "Y-A"})).set_index("pile_id")
    assert v.loc["A", "value"] == 400.0 and v.loc["A", "currency"] == "EUR"     # 5 t x 80
    assert v.loc["A", "account"] == "1400" and v.loc["A", "location"] == "Y-A"
    assert math.isnan(v.loc["B", "value"]) and pd.isna(v.loc["B", "account"])    # ore has no cost
    assert v.loc["B", "unit"] == "t" and v.loc["B", "quantity_t"] == -10.0


def test_opposite_variances_of_different_materials_are_not_paired():
    book = book_from({"A": 1000.0, "B": 1000.0}, materials={"A": "coal", "B": "ore"})
    r = reconcile(survey_of({"A": 1100.0, "B": 900.0}, 1.0), book, MATERIALS)
    assert set(r.piles["reason_code"]) == {"UNEXPLAINED"}


def test_history_over_months_makes_a_bias_nameable():
    # One pile per month fed 2000 t by B1 reading 1.5 % high, noise sigma 20 t.
    # This month alone: one pile -> cannot be named.
    # With three earlier months of the same: sigma_b = 20 / sqrt(4 x 2000^2) = 0.5 %
    # (x 1/(1-b)^2 = 1.0302 -> 0.515 %), and 1.5 % > 2 x 0.515 % and > MPE 1 %: named.
    v = -0.015 / 1.015 * 2000.0
    book = book_from({"P1": 4000.0}, belt_t={"P1": 2000.0})
    sv = survey_of({"P1": 6000.0 + v}, 20.0)
    alone = reconcile(sv, book, MATERIALS, scales=SCALES, period="2026-10")
    d = alone.scale_diagnostics.iloc[0]
    assert d.bias_pct == pytest.approx(1.5, abs=1e-9) and not d.flagged
    assert "cannot be told" in d.message
    history = pd.DataFrame({
        "period": ["2026-07", "2026-08", "2026-09"], "pile_id": ["P1"] * 3, "scale_id": ["B1"] * 3,
        "signed_t": [2000.0] * 3, "variance_t": [v] * 3, "noise_sigma_t": [20.0] * 3,
    })
    pooled = reconcile(sv, book, MATERIALS, scales=SCALES, period="2026-10", history=history)
    d = pooled.scale_diagnostics.iloc[0]
    b = 0.015 / 1.015
    # this month's own figure is unchanged; the pooled one sits beside it
    assert d.bias_pct == pytest.approx(1.5, abs=1e-9) and d.bias_sigma_pct == alone.scale_diagnostics.iloc[0].bias_sigma_pct
    assert d.history_bias_pct == pytest.approx(1.5, abs=1e-9) and d.history_months == 4
    assert d.history_bias_sigma_pct == pytest.approx(0.5 / (1 - b) ** 2, rel=1e-9)
    assert d.flagged and "Over the last 4 months it appears to read +1.50 %" in d.message
    assert "4 pile-month(s) over 4 months" in d.message
    p = pooled.piles.set_index("pile_id")
    assert p.loc["P1", "reason_code"] == "SCALE_BIAS"
    # this month's rows come back for the next close
    assert pooled.bias_rows[["pile_id", "scale_id", "signed_t"]].values.tolist() == [["P1", "B1", 2000.0]]


def test_a_bias_new_this_month_is_named_from_this_month_not_diluted_by_history():
    # B1 read true for three months (variances 0 +/- 20 t on 2000 t), then 2 % high this month on
    # two piles of 2000 t each, noise 20 t: this month alone b = 0.02/1.02, sigma
    # 20 / sqrt(2 x 2000^2) = 0.707 % -> 2.83 sigma, beyond MPE 1 %: named from this month.
    # Pooled over the four months it would read about 1 %: reported beside it, not instead.
    T_ = {"P1": 2000.0, "P2": 2000.0}
    book = book_from({"P1": 4000.0, "P2": 4000.0}, belt_t=T_)
    v = _planted(0.02, T_)
    sv = survey_of({p: 6000.0 + v[p] for p in T_}, 20.0)
    history = pd.DataFrame({
        "period": [m for m in ("2026-07", "2026-08", "2026-09") for _ in T_], "pile_id": list(T_) * 3,
        "scale_id": ["B1"] * 6, "signed_t": [2000.0] * 6, "variance_t": [0.0] * 6, "noise_sigma_t": [20.0] * 6,
    })
    r = reconcile(sv, book, MATERIALS, scales=SCALES, period="2026-10", history=history)
    d = r.scale_diagnostics.iloc[0]
    b = 0.02 / 1.02
    assert d.bias_pct == pytest.approx(2.0, abs=1e-9)
    assert d.bias_sigma_pct == pytest.approx(100 * 20 / math.sqrt(2 * 2000.0 ** 2) / (1 - b) ** 2, rel=1e-9)
    # pooled: b_pooled = sum T(-v) / sum T^2 = (2 x 2000 x 2000 b) / (8 x 2000^2) = b / 4
    bp = b / 4
    assert d.history_bias_pct == pytest.approx(100 * bp / (1 - bp), rel=1e-9)
    assert d.flagged and "appears to read +2.00 %" in d.message and "this month" in d.message
    p = r.piles.set_index("pile_id")
    assert (p.loc[["P1", "P2"], "reason_code"] == "SCALE_BIAS").all()


def test_a_month_the_history_contradicts_names_no_pooled_bias():
    # B1 delivers 4000 t to P1 and 2000 t to P2; Q1-Q3 take no belt. Last month every pile
    # closed near its book (P1 +2 +/- 300 t, P2 -4 +/- 60 t). This month 420 t went from P2
    # to P1 unrecorded: P1 +420 t, P2 -420 t (survey sigma 80 t and 25 t). No bias of B1
    # explains opposite variances on two piles it feeds alike: this month's fit sets P1
    # aside and cannot name B1 from P2 alone. The pooled fit, which assumes one constant
    # bias over both months, set aside P1 this month and P2 last month and read P2's -420 t
    # as B1 reading about 26 % high. The earlier month alone reads +0.2 %, 7.7 sigma from
    # this month's figure: no constant bias, none named, and the pair explains both piles.
    T_ = {"P1": 4000.0, "P2": 2000.0}
    opening = {"P1": 6000.0, "P2": 3000.0, "Q1": 1000.0, "Q2": 1000.0, "Q3": 1000.0}
    book = book_from(opening, belt_t=T_)
    sv = survey_of({"P1": 10000.0 + 420.0, "P2": 5000.0 - 420.0, "Q1": 1003.0, "Q2": 996.0, "Q3": 1001.0},
                   {"P1": 80.0, "P2": 25.0, "Q1": 15.0, "Q2": 15.0, "Q3": 15.0})
    history = pd.DataFrame({
        "period": ["2026-09"] * 5, "pile_id": ["P1", "P2", "Q1", "Q2", "Q3"],
        "scale_id": ["B1", "B1", None, None, None], "signed_t": [4000.0, 2000.0, 0.0, 0.0, 0.0],
        "variance_t": [2.0, -4.0, -3.0, 5.0, 1.0], "noise_sigma_t": [300.0, 60.0, 40.0, 40.0, 40.0],
    })
    r = reconcile(sv, book, MATERIALS, scales=SCALES, period="2026-10", history=history)
    d = r.scale_diagnostics.iloc[0]
    assert not d.flagged
    assert "the earlier months alone read +0.17 %" in d.message and "7.7 sigma" in d.message
    assert "not named" in d.message
    p = r.piles.set_index("pile_id")
    assert (p.loc[["P1", "P2"], "reason_code"] == "TRANSFER_SUSPECT").all()
    assert (p.loc[["Q1", "Q2", "Q3"], "reason_code"] == "WITHIN_SIGMA").all()


def test_birge_ratio_inflates_sigma_when_scatter_exceeds_stated_sigmas():
    # Equal T = 1000 t on 4 piles, variances -10 +/- 2 t, stated sigma 1 t (scatter within the
    # 3-sigma outlier limit): b = mean(-v)/1000 = 0.01; residuals (v + 10) = [-2, 2, -2, 2] t;
    # chi2 = 16, dof 3; sigma_b = 1/sqrt(4e6) x sqrt(16/3) = 1.155e-3 (before the beta
    # conversion 1/(1-b)^2).
    T_ = {f"P{i}": 1000.0 for i in range(4)}
    book = book_from({p: 0.0 for p in T_}, belt_t=T_)
    v = dict(zip(T_, [-12.0, -8.0, -12.0, -8.0]))
    r = reconcile(survey_of({p: 1000.0 + v[p] for p in T_}, 1.0), book, MATERIALS, scales=SCALES)
    d = r.scale_diagnostics.iloc[0]
    b = 0.01
    assert d.bias_pct == pytest.approx(100 * b / (1 - b), rel=1e-9)
    assert d.bias_sigma_pct == pytest.approx(100 * math.sqrt(16 / 3) / 2000.0 / (1 - b) ** 2, rel=1e-9)
    assert "set aside" not in d.message


def test_density_error_shared_with_an_adopted_opening_is_not_counted_twice():
    # Previous close adopted its survey: 1000 t from 1000 m3 at 1.0 t/m3, density sd 0.04 ->
    # density part 40 t, volume part 30 t, survey sigma 50 t.
    # This month: 1100 m3 -> density part 44 t, volume part 30 t, survey sigma sqrt(900 + 1936).
    # Book: opening 1000 t + 100 t on B1 (class 1 in service: bound 1 t, sigma 1/sqrt3).
    # Variance sigma = sqrt(30^2 + (30^2 + 1/3) + (44 - 40)^2) = sqrt(1816.33) = 42.62 t
    # (independent treatment would give sqrt(2836 + 2500.33) = 73.05 t).
    mats = {"coal": material("coal", 0.04, 3.0)}
    adopted = pd.DataFrame({"pile_id": ["A"], "material": ["coal"], "closing_t": [1000.0], "survey_t": [1000.0],
                            "survey_sigma_t": [50.0], "book_sigma_t": [9.0], "volume_m3": [1000.0]})
    opening = opening_from_close(adopted, mats, "survey")
    assert opening[["tonnes", "sigma_t", "density_sigma_t"]].values.tolist() == [[1000.0, 50.0, 40.0]]
    rows = [{"scale_id": "B1", "start": T("2026-10-02T00:00Z"), "end": T("2026-10-02T01:00Z"), "tonnes": 100.0}]
    routes = [{"scale_id": "B1", "pile_id": "A", "start": T("2026-10-01T00:00Z"), "end": T("2026-11-01T00:00Z")}]
    book = book_stock(belt_moves(["A"], rows, routes), opening, AT, SCALES,
                      pd.DataFrame({"pile_id": ["A"], "material": ["coal"]}), END, START)
    sv = survey_of({"A": 1100.0}, math.sqrt(900 + 44.0 ** 2), volume_m3={"A": 1100.0})
    r = reconcile(sv, book, mats)
    assert r.piles.iloc[0].variance_sigma_t == pytest.approx(math.sqrt(900 + 900 + 1 / 3 + 16), rel=1e-9)
    # midpoint: half the survey error and half the book error carried over
    mid = opening_from_close(adopted, mats, "midpoint").iloc[0]
    assert mid.sigma_t == pytest.approx(math.hypot(25.0, 4.5)) and mid.density_sigma_t == pytest.approx(20.0)
    # a held adjustment (closing = book) carries the book's error only, not the survey's
    held = adopted.assign(closing_t=[960.0], book_t=[960.0], variance_t=[40.0], adjustment_t=[0.0])
    o = opening_from_close(held, mats, "survey").iloc[0]
    assert (o.tonnes, o.sigma_t, o.density_sigma_t) == (960.0, 9.0, 0.0)
    posted = adopted.assign(book_t=[960.0], variance_t=[40.0], adjustment_t=[40.0])
    assert opening_from_close(posted, mats, "midpoint").iloc[0].sigma_t == 50.0  # what was done wins


def test_floor_base_error_shared_with_an_adopted_opening_cancels():
    # Previous close adopted its survey of a pile on a surveyed floor: 1000 t at 1.0 t/m3,
    # survey sigma 50 t = sqrt(40^2 density + 20^2 floor + 22.36^2 rest). The floor raster's
    # error (20 t) is the same surface next month. This month 1100 m3: density 44 t, floor
    # 21 t (material over slightly more of the floor), rest 30 t. Book adds 100 t on B1
    # (sigma 1/sqrt3). Variance sigma = sqrt(30^2 + 22.36^2 + 1/3 + (44-40)^2 + (21-20)^2).
    # A toe base is fitted anew each survey: nothing shared, 21 t enters twice in quadrature.
    mats = {"coal": material("coal", 0.04, 3.0)}
    rest_prev = math.sqrt(50.0 ** 2 - 40.0 ** 2 - 20.0 ** 2)
    adopted = pd.DataFrame({"pile_id": ["A"], "material": ["coal"], "closing_t": [1000.0], "survey_t": [1000.0],
                            "survey_sigma_t": [50.0], "base_sigma_t": [20.0], "book_sigma_t": [9.0],
                            "volume_m3": [1000.0]})
    opening = opening_from_close(adopted, mats, "survey")
    assert opening[["sigma_t", "density_sigma_t", "base_sigma_t"]].values.tolist() == [[50.0, 40.0, 20.0]]
    rows = [{"scale_id": "B1", "start": T("2026-10-02T00:00Z"), "end": T("2026-10-02T01:00Z"), "tonnes": 100.0}]
    routes = [{"scale_id": "B1", "pile_id": "A", "start": T("2026-10-01T00:00Z"), "end": T("2026-11-01T00:00Z")}]
    book = book_stock(belt_moves(["A"], rows, routes), opening, AT, SCALES,
                      pd.DataFrame({"pile_id": ["A"], "material": ["coal"]}), END, START)
    assert book.piles.iloc[0].opening_base_sigma_t == 20.0
    sigma_now = math.sqrt(30.0 ** 2 + 44.0 ** 2 + 21.0 ** 2)
    common = dict(volume_m3={"A": 1100.0}, sigma_base_m3={"A": 21.0}, density_t_m3={"A": 1.0})
    floor = reconcile(survey_of({"A": 1100.0}, sigma_now, base_method={"A": "floor"}, **common), book, mats)
    expected = math.sqrt(30.0 ** 2 + rest_prev ** 2 + 1 / 3 + 4.0 ** 2 + 1.0 ** 2)
    assert floor.piles.iloc[0].variance_sigma_t == pytest.approx(expected, rel=1e-9)
    assert floor.piles.iloc[0].base_sigma_t == pytest.approx(21.0)
    toe = reconcile(survey_of({"A": 1100.0}, sigma_now, base_method={"A": "toe"}, **common), book, mats)
    # the toe survey's 21 t is independent; the opening's floor part (20 t) then has no partner
    expected_toe = math.sqrt(30.0 ** 2 + 21.0 ** 2 + rest_prev ** 2 + 20.0 ** 2 + 1 / 3 + 4.0 ** 2)
    assert toe.piles.iloc[0].variance_sigma_t == pytest.approx(expected_toe, rel=1e-9)
    assert toe.piles.iloc[0].base_sigma_t == 0.0


def test_ledger_opening_without_a_closing_is_refused_naming_the_pile():
    # The ledger keeps no closing for a pile it could not close; opening_from_close carries
    # that as a missing tonnage and book stock refuses it rather than open the pile at 0 t.
    adopted = pd.DataFrame({"pile_id": ["A", "B"], "material": ["coal", "coal"], "closing_t": [10.0, None]})
    opening = opening_from_close(adopted, MATERIALS, "survey")
    piles = pd.DataFrame({"pile_id": ["A", "B"], "material": ["coal", "coal"]})
    with pytest.raises(InputErrors) as err:
        book_stock(belt_moves(["A", "B"]), opening, AT, SCALES, piles, END, START)
    assert [str(p) for p in err.value.problems] == ["opening balances line 3: tonnes: value is missing"]


def test_totals_agree_and_row_order_does_not_matter():
    book = book_from({"A": 1000.0, "B": 500.0, "C": 800.0}, belt_t={"A": 300.0, "B": 200.0},
                     materials={"A": "coal", "B": "coal", "C": "ore"})
    sv = survey_of({"A": 1290.0, "B": 712.0, "C": 790.0}, {"A": 20.0, "B": 15.0, "C": 30.0})
    r = reconcile(sv, book, MATERIALS, scales=SCALES)
    m = r.materials.set_index("material")
    p = r.piles.set_index("pile_id")
    assert m.loc["coal", "variance_t"] == pytest.approx(p.loc[["A", "B"], "variance_t"].sum())
    assert m.loc["coal", "adjustment_t"] == pytest.approx(r.journal.set_index("pile_id").loc[["A", "B"], "adjustment_t"].sum())
    assert m.loc["ore", "variance_t"] == pytest.approx(-10.0)
    shuffled = reconcile(sv.iloc[::-1].reset_index(drop=True), book, MATERIALS, scales=SCALES)
    pd.testing.assert_frame_equal(r.piles, shuffled.piles)
    pd.testing.assert_frame_equal(r.scale_diagnostics, shuffled.scale_diagnostics)
