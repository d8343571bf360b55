"""The survey and volume steps on the second invented yard (inventory._demo.yard2).

The sample site is the yard the classifier and the volume step were tuned on; this one has
undulating ground, a windrow turned 30 degrees, a pile of irregular plan, a flat-topped pile
with a dozer on it, a pile against a 3 m wall, a dark pile, a truck, a car, a shed, a pole and
a barrier line. The slow test holds the steps to the bars they meet today with a margin, so
that a regression shows; the bars the tool misses on this yard are strict expected failures
with their causes (measured figures and the point-by-point causes: CHANGELOG.md).
"""

from __future__ import annotations

import json
import math
import warnings
from pathlib import Path

import numpy as np
import pytest

from inventory._demo.shapes import Cone, ConeGroup, Plateau


def _midpoint_volume(shape, step: float = 0.03) -> float:
    x0, y0, x1, y1 = shape.bbox()
    xs = np.arange(x0, x1, step) + step / 2
    ys = np.arange(y0, y1, step) + step / 2
    X, Y = np.meshgrid(xs, ys)
    return float(shape.thickness(X, Y).sum() * step * step)


@pytest.mark.parametrize("shape", [
    Plateau(10.0, -4.0, 30.0, 30.0, 12.0, 10.0, 6.0, 36.0),
    Plateau(186.0, 45.0, 90.0, 30.0, 8.0, 5.0, 2.7, 32.0, wall=True),
    Plateau(0.0, 0.0, 0.0, 0.0, 0.0, 8.0, 8.0 * math.tan(math.radians(35.0)), 35.0),  # a cone
])
def test_plateau_volume_formula_agrees_with_midpoint_integration(shape):
    # the Steiner-formula volume against the midpoint rule on a 3 cm grid (about 17 times finer
    # than the tool's cell)
    assert shape.volume() == pytest.approx(_midpoint_volume(shape), rel=2e-4)


def test_plateau_of_no_core_and_no_flat_top_is_the_handbook_cone():
    cone = Cone(0.0, 0.0, 8.0, 35.0)
    p = Plateau(0.0, 0.0, 0.0, 0.0, 0.0, 8.0, cone.height, 35.0)
    assert p.volume() == pytest.approx(cone.volume(), rel=1e-12)
    assert p.outline().area == pytest.approx(cone.outline().area, rel=1e-3)


def test_plateau_against_a_wall_is_half_the_whole_and_stops_at_the_wall():
    whole = Plateau(0.0, 0.0, 90.0, 30.0, 8.0, 5.0, 2.7, 32.0)
    half = Plateau(0.0, 0.0, 90.0, 30.0, 8.0, 5.0, 2.7, 32.0, wall=True)
    assert half.volume() == pytest.approx(whole.volume() / 2, rel=1e-12)
    # azimuth 90 (long axis north): the kept side is the west one, x <= 0
    assert half.bbox()[2] == pytest.approx(0.0, abs=1e-9)
    assert half.thickness(np.array([0.5, -0.5]), np.array([0.0, 0.0])).tolist() == [0.0, 2.7]


def test_cone_group_volume_is_the_sum_of_apart_cones_and_less_when_they_overlap():
    a, b = Cone(0.0, 0.0, 6.0, 34.0), Cone(20.0, 0.0, 5.0, 34.0)
    assert ConeGroup((a, b)).volume(step=0.02) == pytest.approx(a.volume() + b.volume(), rel=2e-4)
    near = ConeGroup((a, Cone(8.0, 0.0, 5.0, 34.0)))
    assert max(a.volume(), b.volume()) < near.volume(step=0.02) < a.volume() + b.volume()


def test_yard_piles_stay_apart_and_carry_their_materials_repose():
    from inventory._demo.yard2 import MATERIALS, PILES, SURVEYS, _footprints, yard_at

    yards = [yard_at(k, np.random.default_rng(k)) for k in range(len(SURVEYS))]
    fp = _footprints(yards)
    ids = list(fp)
    for i, a in enumerate(ids):
        for b in ids[i + 1:]:
            assert not fp[a].intersects(fp[b]), (a, b)
    for y in yards:
        for p in PILES:
            assert y.shapes[p.pile_id].repose_deg == MATERIALS[p.material].repose_deg
    assert {MATERIALS[p.material].repose_deg for p in PILES} == {32.0, 34.0, 36.0, 40.0}


# --------------------------------------------------------------------- the survey on the yard

@pytest.fixture(scope="module")
def yard2_measured(tmp_path_factory):
    """The yard written once with its default seed, each survey measured as
    bench/bench_quality.py measures it: {date: (quality, volume table, true volumes)}."""
    from inventory._demo.quality import survey_quality
    from inventory._demo.yard2 import write_yard2_site
    from inventory.site.load import load_site
    from inventory.survey.measure import measure_survey
    from inventory.volume_report import report_volumes

    root = write_yard2_site(tmp_path_factory.mktemp("yard2") / "site")
    truth = json.loads((root / "truth.json").read_text())
    out = {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        site = load_site(root)
        for s in truth["surveys"]:
            date = s["date"]
            work = tmp_path_factory.mktemp(f"survey-{date}")
            result = measure_survey(site, date, out_dir=work)
            quality = survey_quality(site, date, result)
            table = report_volumes(root, date, out=Path(work) / "volumes").table.set_index("pile_id")
            out[date] = (quality, table, {pid: p["volume_m3"] for pid, p in s["piles"].items()})
    return out


def _err(measured, date, pid) -> float:
    _, table, true = measured[date]
    return float(table.loc[pid, "volume_m3"] / true[pid] - 1.0)


def _holds(measured, date, pid) -> bool:
    _, table, true = measured[date]
    return bool(abs(table.loc[pid, "volume_m3"] - true[pid]) <= table.loc[pid, "volume_ci95_m3"])


@pytest.mark.slow
def test_yard2_classification_and_surface_hold_their_bars(yard2_measured):
    # measured (seeds default, 7): objects out 98.96-99.86 % (95.8-96.6 % before the rule on
    # the feet of vehicles' sides, 98.0-98.9 % before its "nothing scanned in front" case),
    # pile points dropped 0.02-0.06 %, RMS 1.6-1.9 cm (CHANGELOG.md)
    for date, (q, _, _) in yard2_measured.items():
        assert q.objects_out >= 0.975, date
        assert q.pile_dropped <= 0.002, date
        assert q.surface_rms_m <= 0.025, date
        assert q.cells >= 50_000, date
        # the yard has vehicles and structures but no machines: the vehicles' own counts
        # make up the objects-out share
        vehicles = [o for o in q.objects if o.kind == "vehicle"]
        assert {o.name for o in vehicles} == {"haul truck", "dozer", "car"}
        assert 1 - sum(o.surface for o in vehicles) / sum(o.points for o in vehicles) == pytest.approx(q.objects_out)
        # the dozer standing on F1's top: 0 of about 550 points surface today
        dozer = next(o for o in vehicles if o.name == "dozer")
        assert dozer.points >= 300 and dozer.surface <= 0.01 * dozer.points, date


@pytest.mark.slow
def test_yard2_vehicles_out_as_on_the_sample_site(yard2_measured):
    # The truck's chassis edge (0.35 m, 15 points a survey) over ground no station saw within
    # 1 m was surface before the face-foot rule's "nothing scanned straight away" case; the
    # car's sill, scanned in two rows 0.12 m apart over the pad, still leaks 2-15 points
    # (seed 7's second survey: 98.96 %, CHANGELOG.md)
    for date, (q, _, _) in yard2_measured.items():
        assert q.objects_out >= 0.99, date
        truck = next(o for o in q.objects if o.name == "haul truck")
        assert truck.points >= 300 and truck.surface == 0, date


# Bars each pile meets today (measured: CHANGELOG.md). R1 is dark asphalt planings that the
# scanner reaches only to about 33 m: its far flanks are interpolated, hence the loose bar.
_HOLDS = {"W1": 0.05, "K1": 0.03, "C3": 0.07, "R1": 0.25}


@pytest.mark.slow
@pytest.mark.parametrize("pid", sorted(_HOLDS))
def test_yard2_piles_within_their_bars_and_inside_the_interval(yard2_measured, pid):
    for date in yard2_measured:
        assert abs(_err(yard2_measured, date, pid)) <= _HOLDS[pid], (date, _err(yard2_measured, date, pid))
        if pid != "C3":  # C3's toe base on the rolling ground: see the next test
            assert _holds(yard2_measured, date, pid), date


@pytest.mark.slow
def test_yard2_wall_pile_first_survey(yard2_measured):
    # B1 against the wall: its top is hidden and filled against the wall; the truth is
    # inside its interval (measured -6.9 % +/- 20 %, -3.0 % with seed 7: see the test below)
    date = min(yard2_measured)
    assert _holds(yard2_measured, date, "B1")
    # its footprint ends at the wall's face: the face's returns just above the sand lie in
    # the cells beside the edge, which the footprint-cut test leaves out (it flagged B1
    # edge_cut before)
    for d, (_, table, _) in yard2_measured.items():
        assert "edge_cut" not in str(table.loc["B1", "flags"]).split(";"), d


@pytest.mark.slow
def test_yard2_hidden_flat_top_inside_its_interval_and_flagged(yard2_measured):
    # F1's flat top is above every tripod: from the flanks it may be a flat top or an apex.
    # The fill takes the flanks' envelope (+21 % / +31 %), and the interval counts the
    # volume between it and the chord (measured: +/-25 % / +/-35 %, CHANGELOG.md)
    for date, (_, table, _) in yard2_measured.items():
        assert _holds(yard2_measured, date, "F1"), date
        assert "hidden_top" in str(table.loc["F1", "flags"]).split(";"), date


@pytest.mark.slow
@pytest.mark.xfail(strict=True, reason="F1's flat top is hidden from every tripod; the gap fill extends "
                   "the flanks into a hip roof over it (+21 % / +31 %, inside the interval that counts "
                   "the hidden top); see CHANGELOG.md")
def test_yard2_flat_topped_pile_within_five_percent(yard2_measured):
    for date in yard2_measured:
        assert abs(_err(yard2_measured, date, "F1")) <= 0.05, date


@pytest.mark.slow
def test_yard2_wall_pile_second_survey_not_filled_behind_the_wall(yard2_measured):
    # B1's hidden top is filled against the wall (the survey's object cells), no longer down
    # to the floor behind it (-22 % before; measured -5.1 to -5.3 % on three seeds)
    date = max(yard2_measured)
    assert abs(_err(yard2_measured, date, "B1")) <= 0.08
    assert _holds(yard2_measured, date, "B1")


@pytest.mark.slow
@pytest.mark.xfail(strict=True, reason="B1's hidden top comes out 6.9 % low in the first survey of the "
                   "default draw: it was within 5 % (-1.2 to -3.2 %) while returns of the wall's face at the "
                   "crest's height were classed surface and held the fill up; with 200 m tiles 122 of them "
                   "near B1 are classed as the wall (the wall's points in the surface: 309 -> 202) and the "
                   "fill sags; see CHANGELOG.md")
def test_yard2_wall_pile_first_survey_within_five_percent(yard2_measured):
    assert abs(_err(yard2_measured, min(yard2_measured), "B1")) <= 0.05


@pytest.mark.slow
@pytest.mark.xfail(strict=True, reason="B1's hidden top, filled level with the crest cells against the "
                   "wall, comes out 5.1-5.3 % low in the second survey: the crest cells sit on the shadow's "
                   "edge and the fill sags toward the pile's ends; see CHANGELOG.md")
def test_yard2_wall_pile_second_survey_within_five_percent(yard2_measured):
    assert abs(_err(yard2_measured, max(yard2_measured), "B1")) <= 0.05
