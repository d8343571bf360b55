"""A small synthetic close (three cones on a flat yard, EPSG:25832) for the ledger and exporters.

The exporters only copy and present the figures of a close, so their tests need a
CloseResult whose tables are consistent with each other (variance = survey - book, the
footprints cover the piles, the surface shows the piles), not real survey numbers.
``make_close_result`` builds one; the tests here check that the fake itself is consistent,
so that the exporter tests compare against something sound.
"""

from __future__ import annotations

from datetime import datetime, timezone

import numpy as np
import pandas as pd
import pytest

from inventory.model.grid import Grid, Surface
from inventory.model.results import (
    JOURNAL_COLUMNS,
    MOVEMENT_COLUMNS,
    PILE_COLUMNS,
    SCALE_COLUMNS,
    CloseResult,
)

CRS = "EPSG:25832"  # ETRS89 / UTM 32N, metres
X0, Y0 = 500000.0, 5700000.0
CELL = 0.5
YARD_Z = 100.0
# (pile_id, material, centre dx, centre dy, radius m, height m, density t/m3, moisture)
_CONES = [
    ("P-COAL-1", "coal", 14.0, 20.0, 9.0, 4.0, 0.80, 0.08),
    ("P-COAL-2", "coal", 36.0, 20.0, 8.0, 3.5, 0.80, 0.08),
    ("P-LIME-1", "limestone", 56.0, 18.0, 6.0, 3.0, 1.45, 0.02),
]
_TOLERANCE_PCT = {"coal": 3.0, "limestone": 2.0}  # common practice (2-5 %)
K_SIGNIFICANCE = 2.0


def _surface(period_index: int) -> tuple[Surface, np.ndarray, np.ndarray]:
    grid = Grid.snapped(X0, Y0, X0 + 66.0, Y0 + 40.0, cell=CELL, crs=CRS)
    x, y = grid.centers()
    z = np.full(grid.shape, YARD_Z)
    grow = 1.0 + 0.05 * period_index  # the piles grow a little from month to month
    for _, _, dx, dy, r, h, _, _ in _CONES:
        d = np.hypot(x - (X0 + dx), y - (Y0 + dy))
        z = z + np.clip(h * grow * (1.0 - d / r), 0.0, None)
    count = np.full(grid.shape, 4, dtype=np.int32)
    sd = np.full(grid.shape, 0.02)
    filled = np.zeros(grid.shape, dtype=bool)
    # an unscanned patch on the second pile, filled by interpolation
    r0, c0 = grid.index(np.array([X0 + 38.0]), np.array([Y0 + 22.0]))[:2]
    count[r0[0]:r0[0] + 4, c0[0]:c0[0] + 4] = 0
    sd[r0[0]:r0[0] + 4, c0[0]:c0[0] + 4] = np.nan
    filled[r0[0]:r0[0] + 4, c0[0]:c0[0] + 4] = True
    # a corner the scanner never saw and nothing filled
    z[:6, :8] = np.nan
    count[:6, :8] = 0
    sd[:6, :8] = np.nan
    surface = Surface(grid, z, count, sd, filled, date=f"2026-0{period_index + 1}-28")
    thickness = z - YARD_Z
    thickness[~(thickness > 0)] = np.nan
    return surface, thickness, (r0[0], c0[0])


def make_close_result(period: str = "2026-01", opening: dict[str, float] | None = None,
                      period_index: int = 0) -> CloseResult:
    """A consistent three-pile close; ``opening`` overrides the opening tonnes per pile."""
    import geopandas as gpd
    from shapely.geometry import Point, box

    surface, thickness, (r0, c0) = _surface(period_index)
    grid = surface.grid
    x, y = grid.centers()
    rows, foots = [], []
    rng = np.random.default_rng(7 + period_index)
    for i, (pid, mat, dx, dy, r, h, dens, moist) in enumerate(_CONES):
        foot = Point(X0 + dx, Y0 + dy).buffer(r + 1.0, quad_segs=16)
        foots.append(foot)
        inside = np.hypot(x - (X0 + dx), y - (Y0 + dy)) <= r + 1.0
        vol = float(np.nansum(np.where(inside, thickness, 0.0)) * grid.cell_area)
        vol_sigma = 0.005 * vol
        survey_t = vol * dens
        survey_sigma = float(np.hypot(vol_sigma * dens, vol * 0.01 * dens))
        open_t = (opening or {}).get(pid, round(survey_t * 0.9, 1))
        receipts = round(float(rng.uniform(200, 400)), 2)
        dispatches = round(float(rng.uniform(100, 300)), 2)
        t_in = 25.0 if i == 1 else 0.0
        t_out = 25.0 if i == 0 else 0.0
        # book chosen so the three piles land in three cases: within, significant, out
        target_pct = [0.8, -2.8, 6.5][i] * (1 if period_index == 0 else -0.5)
        book = survey_t / (1.0 + target_pct / 100.0)
        dispatches = open_t + receipts + t_in - t_out - book
        book = open_t + receipts - dispatches + t_in - t_out
        book_sigma = 0.002 * (receipts + abs(dispatches))
        var = survey_t - book
        var_sigma = float(np.hypot(survey_sigma, book_sigma))
        pct = 100.0 * var / book
        tol = _TOLERANCE_PCT[mat]
        oot = abs(pct) > tol
        adj = var if oot else 0.0
        after = -12.5 if i == 2 else 0.0
        scanned = float(np.mean((surface.count[inside] > 0)))
        rows.append({
            "pile_id": pid, "material": mat, "base_method": "level:100.0",
            "area_m2": foot.area, "scanned_fraction": scanned,
            "volume_m3": vol, "volume_sigma_m3": vol_sigma,
            "volume_tin_m3": np.nan if i == 1 else vol * 1.002, "below_base_m3": 0.0,
            "density_t_m3": dens, "survey_t": survey_t, "survey_dry_t": survey_t * (1 - moist),
            "survey_sigma_t": survey_sigma, "opening_t": open_t, "receipts_t": receipts,
            "dispatches_t": dispatches, "transfers_in_t": t_in, "transfers_out_t": t_out,
            "book_t": book, "book_sigma_t": book_sigma, "variance_t": var,
            "variance_pct": pct, "variance_sigma_t": var_sigma,
            "significant": bool(abs(var) > K_SIGNIFICANCE * var_sigma),
            "tolerance_pct": tol, "out_of_tolerance": bool(oot), "adjustment_t": adj,
            "after_survey_net_t": after, "closing_t": book + adj + after,
            "flags": "coverage_filled" if i == 1 else "",
        })
    piles = pd.DataFrame(rows, columns=PILE_COLUMNS)
    footprints = gpd.GeoDataFrame({"pile_id": [r["pile_id"] for r in rows]},
                                  geometry=foots, crs=CRS)
    t0 = pd.Timestamp(f"{period}-03T06:30:00Z")
    mv = []
    for k in range(6):
        pid = _CONES[k % 3][0]
        mv.append({
            "kind": "weighbridge", "reference": f"T{1000 + k}",
            "time": t0 + pd.Timedelta(days=3 * k, hours=k), "pile_id": pid,
            "tonnes": (1 if k % 2 == 0 else -1) * (30.0 + k), "scale_id": "WB1",
            "counted": k != 5, "before_survey": k < 5,
            "note": "=duplicate of T1004" if k == 5 else "", "source": "weighbridge.csv",
            "line": k + 2,
        })
    mv.append({"kind": "belt", "reference": "BS-IN 2026-01-10/2026-01-11",
               "time": t0 + pd.Timedelta(days=7), "pile_id": "P-COAL-1", "tonnes": 412.75,
               "scale_id": "BS-IN", "counted": True, "before_survey": True, "note": "",
               "source": "belt_scales.csv", "line": 2})
    mv.append({"kind": "transfer", "reference": "TR-1", "time": t0 + pd.Timedelta(days=9),
               "pile_id": "P-COAL-1", "tonnes": -25.0, "scale_id": None, "counted": True,
               "before_survey": True, "note": "", "source": "transfers.csv", "line": 2})
    movements = pd.DataFrame(mv, columns=MOVEMENT_COLUMNS)
    journal = pd.DataFrame(
        [{"pile_id": r["pile_id"], "material": r["material"], "adjustment_t": r["adjustment_t"],
          "reason_code": "SV-OOT", "reason": "survey variance out of tolerance"}
         for r in rows if r["out_of_tolerance"]], columns=JOURNAL_COLUMNS)
    scales = pd.DataFrame([
        {"scale_id": "BS-IN", "piles": "P-COAL-1, P-COAL-2", "tonnes": 812.5, "bias_pct": 1.1,
         "bias_sigma_pct": 0.4, "flagged": True, "message": "shared bias on the piles it fed"},
        {"scale_id": "WB1", "piles": "P-COAL-1, P-COAL-2, P-LIME-1", "tonnes": 190.0,
         "bias_pct": -0.1, "bias_sigma_pct": 0.3, "flagged": False, "message": ""},
    ], columns=SCALE_COLUMNS)
    duplicates = pd.DataFrame([{"reference": "T1005", "kind": "exact",
                                "detail": "same vehicle, tonnes and pile as T1004 within 10 min"}])
    gap_cells = box(grid.west + c0 * CELL, grid.north - (r0 + 4) * CELL,
                    grid.west + (c0 + 4) * CELL, grid.north - r0 * CELL)
    coverage_gaps = gpd.GeoDataFrame({"pile_id": ["P-COAL-2"], "area_m2": [gap_cells.area]},
                                     geometry=[gap_cells], crs=CRS)
    extent = box(grid.west + 8 * CELL, grid.south, grid.east, grid.north).union(
        box(grid.west, grid.south, grid.east, grid.north - 6 * CELL))
    survey_extent = gpd.GeoDataFrame({"survey_date": [surface.date], "points": [123456]},
                                     geometry=[extent], crs=CRS)
    change = None
    prev = None
    if period_index > 0:
        previous, _, _ = _surface(period_index - 1)
        change = surface.z - previous.z
        prev = previous.date
    instant = datetime(2026, period_index + 1, 28, 11, 0, tzinfo=timezone.utc)
    return CloseResult(
        site_name="Test yard", period=period, crs=CRS, timezone="Europe/Berlin",
        survey_date=surface.date, survey_instant=instant, previous_survey_date=prev,
        piles=piles, footprints=footprints, movements=movements, journal=journal,
        scale_diagnostics=scales, duplicates=duplicates, surface=surface,
        thickness=thickness, change=change, coverage_gaps=coverage_gaps,
        survey_extent=survey_extent,
        run={"inputs": {"surveys/2026-01-28/scan.laz": "a" * 64, "piles.gpkg": "b" * 64},
             "parameters": {"grid": {"cell_size_m": CELL}, "significance_k": K_SIGNIFICANCE},
             "timings": {"survey": 1.25, "volumes": 0.5, "book": 0.1, "reconcile": 0.05}},
    )


@pytest.fixture
def close_result() -> CloseResult:
    return make_close_result()


def test_fake_is_consistent(close_result):
    p = close_result.piles
    # the identities the results module states
    np.testing.assert_allclose(p.variance_t, p.survey_t - p.book_t, rtol=0, atol=1e-9)
    book = p.opening_t + p.receipts_t - p.dispatches_t + p.transfers_in_t - p.transfers_out_t
    np.testing.assert_allclose(p.book_t, book, atol=1e-9)
    # one pile in each of the three cases the exporters colour
    assert list(p.out_of_tolerance) == [False, False, True]
    assert list(p.significant) == [False, True, True]


def test_fake_volumes_near_the_cone_formula(close_result):
    # cone V = pi r^2 h / 3 (handbook formula); the grid sum is within a few percent at 0.5 m
    for (_, _, _, _, r, h, _, _), v in zip(_CONES, close_result.piles.volume_m3):
        assert v == pytest.approx(np.pi * r * r * h / 3.0, rel=0.03)
