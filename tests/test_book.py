"""Book stock at the survey instant: each rule with hand-computed numbers.

All records are built as DataFrames and checked by ``Movements.checked`` (the site loader's
job is parsing files; this module takes its tables). Expected values are worked out by hand in
the comments beside them.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from inventory.errors import InputErrors, InputWarning
from inventory.model.period import Period
from inventory.model.results import MOVEMENT_COLUMNS
from inventory.site.load import Movements, Scale
from inventory.stock.book import book_stock
from inventory.stock.metrology import (
    BELT_MPE_PCT_INITIAL,
    IN_SERVICE_FACTOR,
    belt_mpe_fraction,
    weighbridge_mpe_t,
)

T = pd.Timestamp
SQRT3 = math.sqrt(3.0)


def scales() -> dict[str, Scale]:
    return {
        "WB1": Scale(id="WB1", kind="weighbridge", accuracy_class="III", scale_interval_kg=20.0),
        "B1": Scale(id="B1", kind="belt", direction="in", accuracy_class="1"),
        "R1": Scale(id="R1", kind="belt", direction="out", accuracy_class="0.5"),
    }


def piles(*ids: str) -> pd.DataFrame:
    return pd.DataFrame({"pile_id": list(ids), "material": "coal"})


def balances(tonnes: dict[str, float]) -> pd.DataFrame:
    return pd.DataFrame({"pile_id": list(tonnes), "tonnes": list(tonnes.values())})


def tickets(rows: list[tuple]) -> pd.DataFrame:
    cols = ["ticket", "time", "direction", "pile_id", "gross_t", "tare_t", "vehicle"]
    df = pd.DataFrame(rows, columns=cols)
    df["time"] = pd.to_datetime(df["time"], utc=True, format="ISO8601")
    df["material"] = "coal"
    return df


def intervals(rows: list[tuple], cols: list[str]) -> pd.DataFrame:
    df = pd.DataFrame(rows, columns=cols)
    for c in ("start", "end", "time"):
        if c in df:
            df[c] = pd.to_datetime(df[c], utc=True, format="ISO8601")
    return df


def moves(wb=None, belts=None, routing=None, transfers=None) -> Movements:
    return Movements.checked("2026-10", wb, belts, routing, transfers, scales=scales(), pile_ids=["A", "B"],
                             materials=["coal"])


END = T("2026-10-31T23:00Z")
START = T("2026-09-30T22:00Z")


# --------------------------------------------------------------------- metrology constants


def test_belt_mpe_classes_and_in_service_doubling():
    # OIML R 50-1:2014 Table 1 (from memory): 0.10 / 0.25 / 0.5 / 1.0 % at initial
    # verification; in service twice that.
    assert BELT_MPE_PCT_INITIAL == {"0.2": 0.10, "0.5": 0.25, "1": 0.5, "2": 1.0}
    assert IN_SERVICE_FACTOR == 2.0
    assert belt_mpe_fraction("1", in_service=True) == pytest.approx(0.01)
    assert belt_mpe_fraction("0.2", in_service=False) == pytest.approx(0.001)
    with pytest.raises(ValueError, match="OIML R 50"):
        belt_mpe_fraction("III")


def test_weighbridge_mpe_steps_class_iii():
    # OIML R 76-1 Table 6 class III (from memory): 0.5 e up to 500 e, 1 e to 2000 e, 1.5 e to
    # 10000 e. e = 20 kg: 500 e = 10 t, 2000 e = 40 t. Boundaries belong to the lower range.
    got = weighbridge_mpe_t([5.0, 10.0, 10.02, 40.0, 40.02, 60.0], "III", 20.0, in_service=False)
    np.testing.assert_allclose(got, [0.010, 0.010, 0.020, 0.020, 0.030, 0.030])
    # in service: twice
    np.testing.assert_allclose(weighbridge_mpe_t([45.0], "III", 20.0, in_service=True), [0.060])


# --------------------------------------------------------------------- balances and cut-off


def test_book_at_survey_and_roll_forward_hand_numbers():
    wb = tickets([
        ("1", "2026-10-05T10:00+02:00", "in", "A", 45.0, 15.0, "X"),   # +30 t before survey
        ("2", "2026-10-06T10:00Z", "out", "A", 35.0, 15.0, "Y"),       # -20 t before survey
        ("3", "2026-10-20T10:00Z", "in", "A", 40.0, 15.0, "Z"),        # +25 t after survey
        ("4", "2026-11-02T10:00Z", "in", "A", 40.0, 15.0, "Z"),        # next period: not counted
    ])
    tr = intervals([("A", "B", "2026-10-08T00:00Z", 7.5, "wo-1")], ["from_pile", "to_pile", "time", "tonnes", "reference"])
    r = book_stock(moves(wb, transfers=tr), balances({"A": 1000.0, "B": 50.0}), T("2026-10-15T12:00+02:00"), scales(),
                   piles("A", "B"), END, START)
    a = r.piles.set_index("pile_id").loc["A"]
    b = r.piles.set_index("pile_id").loc["B"]
    # A: 1000 + 30 - 20 - 7.5 = 1002.5 at survey; +25 after it -> 1027.5 at period end
    assert a.receipts_t == pytest.approx(30.0)
    assert a.dispatches_t == pytest.approx(20.0)
    assert a.transfers_out_t == pytest.approx(7.5)
    assert a.book_t == pytest.approx(1002.5)
    assert a.after_survey_net_t == pytest.approx(25.0)
    assert a.book_end_t == pytest.approx(1027.5)
    assert b.book_t == pytest.approx(57.5)
    m = r.movements
    assert list(m.columns) == MOVEMENT_COLUMNS
    late = m[m["reference"] == "4"].iloc[0]
    assert not late.counted and "next period" in late.note
    assert str(m["time"].dt.tz) == "UTC"


def test_survey_after_period_end_rolls_back():
    # survey on 2 Nov: a receipt on 1 Nov (after the period end, before the survey) is in the
    # book at survey and rolled back out of the period-end figure.
    wb = tickets([("1", "2026-11-01T08:00Z", "in", "A", 40.0, 15.0, "Z")])
    r = book_stock(moves(wb), balances({"A": 100.0}), T("2026-11-02T12:00Z"), scales(), piles("A"), END, START)
    a = r.piles.iloc[0]
    assert a.book_t == pytest.approx(125.0)
    assert a.after_survey_net_t == pytest.approx(-25.0)
    assert a.book_end_t == pytest.approx(100.0)


def test_record_at_the_survey_instant_is_before_it_whatever_its_offset():
    # 14:00+02:00 is 12:00Z: "at or before the survey instant" counts it in the book at survey
    wb = tickets([("1", "2026-10-15T14:00+02:00", "in", "A", 40.0, 15.0, "Z")])
    r = book_stock(moves(wb), balances({"A": 0.0}), T("2026-10-15T12:00Z"), scales(), piles("A"), END, START)
    assert r.movements["before_survey"].iloc[0]
    assert r.piles["book_t"].iloc[0] == pytest.approx(25.0)


def test_opening_as_of_excludes_records_already_in_it():
    opening = pd.DataFrame({"pile_id": ["A"], "tonnes": [500.0], "as_of": [T("2026-10-03T00:00Z")]})
    wb = tickets([
        ("1", "2026-10-02T10:00Z", "in", "A", 40.0, 15.0, "Z"),  # before as_of: already in opening
        ("2", "2026-10-04T10:00Z", "in", "A", 40.0, 15.0, "Z"),
    ])
    r = book_stock(moves(wb), opening, T("2026-10-15T12:00Z"), scales(), piles("A"), END)
    assert r.piles["book_t"].iloc[0] == pytest.approx(525.0)
    first = r.movements.set_index("reference").loc["1"]
    assert not first.counted and "opening" in first.note


def test_period_bounds_respect_site_time_zone_and_dst():
    # Europe/Berlin: CEST (UTC+2) on 1 Oct, CET (UTC+1) on 1 Nov (EU summer time ends on the
    # last Sunday of October - Directive 2000/84/EC).
    s, e = Period.parse("2026-10").bounds("Europe/Berlin")
    assert s == T("2026-09-30T22:00Z") and e == T("2026-10-31T23:00Z")
    s, e = Period.parse("2026-12").bounds("UTC")
    assert s == T("2026-12-01T00:00Z") and e == T("2027-01-01T00:00Z")


def test_naive_times_are_refused_with_line_and_field():
    wb = tickets([("1", "2026-10-05T10:00Z", "in", "A", 40.0, 15.0, "Z")])
    wb["time"] = wb["time"].dt.tz_localize(None).astype(object).astype(str)
    with pytest.raises(InputErrors) as err:
        moves(wb)
    assert [str(p) for p in err.value.problems] == [
        "weighbridge.csv line 2: time: '2026-10-05 10:00:00' has no UTC offset (write e.g. 2026-10-05 10:00:00+01:00)"]
    with pytest.raises(ValueError, match="UTC offset"):
        book_stock(moves(), None, pd.Timestamp("2026-10-15T12:00"), scales(), piles("A"), END, START)


# --------------------------------------------------------------------- checks on the records


def test_bad_records_are_listed_with_file_line_field():
    wb = tickets([
        ("1", "2026-10-05T10:00Z", "in", "A", 15.0, 45.0, "X"),    # tare > gross
        ("2", "2026-10-05T11:00Z", "sideways", "A", 45.0, 15.0, "X"),
        ("3", "2026-10-05T12:00Z", "in", "Q", 45.0, 15.0, "X"),    # unknown pile
    ])
    wb["net_t"] = [np.nan, 30.0, 29.0]                              # line 4: net != gross - tare
    routing = intervals([("B1", "A", "2026-10-01T00:00Z", "2026-10-10T00:00Z"),
                         ("B1", "B", "2026-10-09T00:00Z", "2026-10-20T00:00Z")],  # overlaps line 2
                        ["scale_id", "pile_id", "start", "end"])
    with pytest.raises(InputErrors) as err:
        moves(wb, routing=routing)
    assert sorted((p.path, p.where, p.field) for p in err.value.problems) == [
        ("routing.csv", 3, "start"),
        ("weighbridge.csv", 2, "tare_t"),
        ("weighbridge.csv", 3, "direction"),
        ("weighbridge.csv", 4, "net_t"),
        ("weighbridge.csv", 4, "pile_id"),
    ]
    text = str(err.value)
    assert "weighbridge.csv line 2: tare_t: tare 45 t is above gross 15 t" in text
    assert "weighbridge.csv line 4: net_t: net 29 t is not gross 45 - tare 15 = 30.000 t" in text
    assert "routing.csv line 3: start: window of belt 'B1' overlaps line 2" in text


def test_book_refuses_movements_checked_against_other_piles():
    wb = tickets([("1", "2026-10-05T10:00Z", "in", "B", 40.0, 15.0, "Z")])
    with pytest.raises(ValueError, match=r"name scale\(s\) or pile\(s\) not given here \(B\)"):
        book_stock(moves(wb), None, T("2026-10-15T12:00Z"), scales(), piles("A"), END, START)


def test_opening_is_checked_by_the_opening_rule():
    opening = pd.DataFrame({"pile_id": ["A", "A", "Q"], "tonnes": [1.0, float("nan"), 2.0]})
    with pytest.raises(InputErrors) as err:
        book_stock(moves(), opening, T("2026-10-15T12:00Z"), scales(), piles("A"), END, START)
    assert [str(p) for p in err.value.problems] == [
        "opening balances line 3: tonnes: value is missing",
        "opening balances line 3: pile_id: pile 'A' has more than one opening balance (also line 2)",
        "opening balances line 4: pile_id: unknown pile 'Q' (not in piles.gpkg)",
    ]


# --------------------------------------------------------------------- duplicates


def test_exact_duplicate_counted_once_and_listed():
    wb = tickets([
        ("7", "2026-10-05T10:00Z", "in", "A", 45.0, 15.0, "X"),
        ("7", "2026-10-05T10:00Z", "in", "A", 45.0, 15.0, "X"),
    ])
    with pytest.warns(InputWarning, match="weighbridge.csv line 3: ticket: ticket '7' repeats line 2; it will be counted once"):
        mv = moves(wb)
    r = book_stock(mv, None, T("2026-10-15T12:00Z"), scales(), piles("A"), END, START)
    assert r.piles["receipts_t"].iloc[0] == pytest.approx(30.0)   # not 60
    d = r.duplicates
    assert list(d["kind"]) == ["exact"] and d["reference"].iloc[0] == "7"
    assert r.movements["counted"].tolist() == [True, False]


def test_suspected_duplicate_is_counted_and_listed_only_inside_the_window():
    wb = tickets([
        ("10", "2026-10-05T10:00Z", "in", "A", 45.0, 15.0, "X"),
        ("11", "2026-10-05T10:06Z", "in", "A", 45.0, 15.0, "X"),   # same truck, same weights, 6 min
        ("12", "2026-10-05T10:40Z", "in", "A", 45.0, 15.0, "X"),   # 34 min after 11: outside 10 min
        ("13", "2026-10-05T10:07Z", "in", "A", 45.0, 15.0, "Y"),   # another truck
        ("14", "2026-10-05T10:08Z", "in", "A", 45.2, 15.0, "X"),   # other gross
    ])
    r = book_stock(moves(wb), None, T("2026-10-15T12:00Z"), scales(), piles("A"), END, START, duplicate_window_min=10)
    assert r.piles["receipts_t"].iloc[0] == pytest.approx(4 * 30.0 + 30.2)  # all counted
    d = r.duplicates
    assert d[["reference", "kind"]].values.tolist() == [["11", "suspected"]]
    assert "repeats ticket 10" in d["detail"].iloc[0]


# --------------------------------------------------------------------- belt scales


def test_belt_interval_split_across_routing_change_and_survey():
    # 120 t from 10:00 to 12:00; routing switches A -> B at 11:30; survey at 11:00.
    # A gets 90 t (75 % of the time): 60 t before the survey, 30 t after; B gets 30 t after.
    belts = intervals([("B1", "2026-10-10T10:00Z", "2026-10-10T12:00Z", 120.0)], ["scale_id", "start", "end", "tonnes"])
    routing = intervals([("B1", "A", "2026-10-01T00:00Z", "2026-10-10T11:30Z"),
                         ("B1", "B", "2026-10-10T11:30Z", "2026-11-01T00:00Z")], ["scale_id", "pile_id", "start", "end"])
    r = book_stock(moves(belts=belts, routing=routing), None, T("2026-10-10T11:00Z"), scales(), piles("A", "B"), END, START)
    s = r.belt_split
    assert s[["pile_id", "share", "tonnes", "before_survey"]].values.tolist() == [
        ["A", 0.5, 60.0, True], ["A", 0.25, 30.0, False], ["B", 0.25, 30.0, False]]
    p = r.piles.set_index("pile_id")
    assert p.loc["A", "book_t"] == pytest.approx(60.0)
    assert p.loc["A", "after_survey_net_t"] == pytest.approx(30.0)
    assert p.loc["B", "after_survey_net_t"] == pytest.approx(30.0)


def test_reclaim_belt_dispatches_and_unrouted_tonnes_are_named():
    # R1 reclaims; its routing covers only the first half of the interval: 40 of 80 t go to
    # no pile, with a warning naming the line.
    belts = intervals([("R1", "2026-10-10T10:00Z", "2026-10-10T12:00Z", 80.0)], ["scale_id", "start", "end", "tonnes"])
    routing = intervals([("R1", "A", "2026-10-10T09:00Z", "2026-10-10T11:00Z")], ["scale_id", "pile_id", "start", "end"])
    with pytest.warns(InputWarning, match="belt_scales.csv line 2: 40.000 t of belt R1"):
        r = book_stock(moves(belts=belts, routing=routing), balances({"A": 500.0}), T("2026-10-15T00:00Z"), scales(), piles("A"), END, START)
    assert r.piles["dispatches_t"].iloc[0] == pytest.approx(40.0)
    assert r.piles["book_t"].iloc[0] == pytest.approx(460.0)
    unrouted = r.belt_split[r.belt_split["pile_id"].isna()]
    assert unrouted["tonnes"].sum() == pytest.approx(40.0) and not unrouted["counted"].any()


# --------------------------------------------------------------------- uncertainty


def test_book_sigma_linear_within_scale_quadrature_across_scales():
    # Weighbridge WB1 class III, e = 20 kg, in service (MPE doubled):
    #   ticket 1 gross 45 t = 2250 e -> 1.5 e x 2 = 60 kg; tare 15 t = 750 e -> 1 e x 2 = 40 kg
    #   ticket 2 gross 35 t = 1750 e -> 40 kg; tare 15 t -> 40 kg
    #   bound over both (same instrument, linear): 0.10 + 0.08 = 0.18 t
    # Belt B1 class 1 in service: 1 % of 60 t = 0.60 t.
    # sigma = sqrt((0.18/sqrt3)^2 + (0.60/sqrt3)^2) = 0.3617 t
    wb = tickets([
        ("1", "2026-10-05T10:00Z", "in", "A", 45.0, 15.0, "X"),
        ("2", "2026-10-06T10:00Z", "out", "A", 35.0, 15.0, "Y"),
    ])
    belts = intervals([("B1", "2026-10-10T10:00Z", "2026-10-10T11:00Z", 60.0)], ["scale_id", "start", "end", "tonnes"])
    routing = intervals([("B1", "A", "2026-10-01T00:00Z", "2026-11-01T00:00Z")], ["scale_id", "pile_id", "start", "end"])
    r = book_stock(moves(wb, belts, routing), balances({"A": 1000.0}), T("2026-10-15T00:00Z"), scales(), piles("A"), END, START)
    load = r.scale_load.set_index("scale_id")
    assert load.loc["WB1", "mpe_bound_t"] == pytest.approx(0.18)
    assert load.loc["WB1", "weighed_t"] == pytest.approx(50.0)
    assert load.loc["B1", "mpe_bound_t"] == pytest.approx(0.60)
    expected = math.hypot(0.18 / SQRT3, 0.60 / SQRT3)
    assert r.piles["book_sigma_t"].iloc[0] == pytest.approx(expected, rel=1e-12)


def test_opening_sigma_adds_in_quadrature():
    opening = pd.DataFrame({"pile_id": ["A"], "tonnes": [1000.0], "sigma_t": [3.0]})
    belts = intervals([("B1", "2026-10-10T10:00Z", "2026-10-10T11:00Z", 692.8203230275509)],
                      ["scale_id", "start", "end", "tonnes"])
    routing = intervals([("B1", "A", "2026-10-01T00:00Z", "2026-11-01T00:00Z")], ["scale_id", "pile_id", "start", "end"])
    # belt bound 1 % x 692.82 t = 6.9282 t -> sigma 4.0 t; with opening 3.0 t: 5.0 t
    r = book_stock(moves(belts=belts, routing=routing), opening, T("2026-10-15T00:00Z"), scales(), piles("A"), END, START)
    assert r.piles["book_sigma_t"].iloc[0] == pytest.approx(5.0, rel=1e-9)


def test_belt_interval_spanning_the_period_end_is_cut_there():
    # 60 t from 22:30Z to 23:30Z on 31 Oct; the period ends 23:00Z (midnight in Berlin):
    # 30 t roll the survey figure forward, 30 t belong to November (not counted).
    belts = intervals([("B1", "2026-10-31T22:30Z", "2026-10-31T23:30Z", 60.0)], ["scale_id", "start", "end", "tonnes"])
    routing = intervals([("B1", "A", "2026-10-01T00:00Z", "2026-11-02T00:00Z")], ["scale_id", "pile_id", "start", "end"])
    r = book_stock(moves(belts=belts, routing=routing), balances({"A": 100.0}), T("2026-10-31T12:00Z"), scales(), piles("A"), END, START)
    a = r.piles.iloc[0]
    assert a.book_t == pytest.approx(100.0) and a.after_survey_net_t == pytest.approx(30.0)
    m = r.movements
    assert m["counted"].tolist() == [True, False]
    assert "next period" in m["note"].iloc[1]
    assert m["note"].iloc[0].startswith("0.5 of 60 t (22:30Z-23:00Z")
