"""The committed sample site: contract, size, true answers, books and planted faults.

The true answers are checked three ways: the analytic volume formulas (handbook cone, windrow,
reclaim-face and bay sections), midpoint integration on a 0.05 m grid (10 x finer than the
tool's 0.5 m cell) and the truth surface raster minus the floor raster over each footprint.
The books are recomputed here from the CSV files with the standard ``csv`` module.
"""

from __future__ import annotations

import csv
import json
import math
import tomllib
from collections import Counter, defaultdict
from datetime import datetime
from pathlib import Path

import numpy as np
import pytest

REPO = Path(__file__).resolve().parent.parent
SITE = REPO / "sample_site"
pytestmark = pytest.mark.skipif(not (SITE / "truth.json").is_file(), reason="sample_site/ not generated yet")

#: The issue's size limit for the committed sample.
MAX_SITE_BYTES = 25_000_000


@pytest.fixture(scope="module")
def truth() -> dict:
    return json.loads((SITE / "truth.json").read_text())


def _rows(path: Path) -> list[dict]:
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def _t(text: str) -> datetime:
    return datetime.fromisoformat(text)


def _site_files() -> list[Path]:
    skip = ("closes", "ledger.sqlite")
    return [p for p in SITE.rglob("*") if p.is_file() and not any(part.startswith(skip) for part in p.relative_to(SITE).parts)]


def test_site_toml_follows_the_schema():
    import jsonschema

    schema = json.loads((REPO / "inventory" / "site" / "schemas" / "site.schema.json").read_text())
    config = tomllib.loads((SITE / "site.toml").read_text())
    jsonschema.validate(config, schema)
    kinds = Counter((s["kind"], s.get("direction")) for s in config["scales"])
    assert kinds == {("belt", "in"): 2, ("belt", "out"): 1, ("weighbridge", None): 1}


def test_site_is_small_enough_for_the_repository():
    total = sum(p.stat().st_size for p in _site_files())
    assert total < MAX_SITE_BYTES


def test_inventory_check_passes():
    from inventory.site.load import check_site

    report = check_site(SITE)
    assert report.ok, [str(p) for p in report.errors]
    # The only warning is the planted duplicate ticket.
    assert all("repeats" in str(p) for p in report.warnings)


def _analytic_volume(shape: dict) -> float:
    """Handbook volumes, written out again here from the recorded shape parameters."""
    tan = lambda deg: math.tan(math.radians(deg))  # noqa: E731
    if shape["type"] == "cone":
        r = shape["toe_radius_m"]
        return math.pi * r**2 * (r * tan(shape["repose_deg"])) / 3.0
    if shape["type"].startswith("windrow"):
        w, L = shape["toe_half_width_m"], shape["ridge_length_m"]
        h = w * tan(shape["repose_deg"])
        if shape["face_toe_along_ridge_m"] is None:
            return L * w * h + math.pi * w**2 * h / 3.0  # prism + two half cones
        s, beta = shape["face_toe_along_ridge_m"], shape["face_deg"]
        run = h / tan(beta)
        # prism up to the foot of the face slope, the wedge under the face, one half cone
        return w * h * (s - run) + (2.0 / 3.0) * w * h**2 / tan(beta) + math.pi * w**2 * h / 6.0
    if shape["type"] == "bay_pile":
        width = shape["bay_inner_x_local"][1] - shape["bay_inner_x_local"][0]
        top, depth = shape["flat_top_m"], shape["toe_distance_from_back_m"]
        run = top / tan(shape["repose_deg"])
        return width * (top * (depth - run) + 0.5 * top * run)
    raise AssertionError(shape["type"])


def test_true_volumes_formula_and_fine_integration_agree(truth):
    for survey in truth["surveys"]:
        for pid, p in survey["piles"].items():
            assert p["volume_m3"] == pytest.approx(_analytic_volume(p["shape"]), rel=1e-6)
            # Midpoint rule on 0.05 m cells: kinks at ridges and toes cost < 0.01 %.
            assert p["volume_fine_m3"] == pytest.approx(p["volume_m3"], rel=1e-4), (survey["date"], pid)


def test_truth_surface_minus_floor_over_footprints_gives_the_volumes(truth):
    import geopandas as gpd
    import rasterio
    import shapely

    piles = gpd.read_file(SITE / "piles.gpkg", layer="piles")
    with rasterio.open(SITE / "base" / "floor.tif") as src:
        floor = src.read(1).astype(float)
        transform = src.transform
        assert src.crs.to_epsg() == 25832
    rows, cols = np.indices(floor.shape)
    xs, ys = rasterio.transform.xy(transform, rows.ravel(), cols.ravel())
    xs, ys = np.asarray(xs), np.asarray(ys)
    for survey in truth["surveys"]:
        with rasterio.open(SITE / survey["surface"]) as src:
            surf = src.read(1).astype(float)
            assert src.transform == transform and src.res == (0.5, 0.5)
        thick = (surf - floor).ravel()
        for pile in piles.itertuples():
            inside = shapely.contains_xy(pile.geometry, xs, ys)
            volume = thick[inside].sum() * 0.25
            assert volume == pytest.approx(survey["piles"][pile.pile_id]["volume_m3"], rel=5e-4), pile.pile_id


def test_true_tonnes_and_true_flows_agree(truth):
    dens = {p["pile_id"]: p["density_t_m3"] for p in truth["piles"]}
    s1, s2 = truth["surveys"]
    for pid, flows in truth["books"]["true_net_t"].items():
        for s in (s1, s2):
            assert s["piles"][pid]["tonnes"] == pytest.approx(s["piles"][pid]["volume_m3"] * dens[pid], rel=1e-6)
        change = s2["piles"][pid]["tonnes"] - s1["piles"][pid]["tonnes"]
        assert flows["between_surveys"] == pytest.approx(change, abs=2e-3)


def _book_from_csv(instant: datetime) -> tuple[dict[str, float], dict[str, float]]:
    """Opening + tickets (a repeated ticket id once) + belts by routing + transfers up to ``instant``."""
    cfg = tomllib.loads((SITE / "site.toml").read_text())
    direction = {s["id"]: s.get("direction") for s in cfg["scales"]}
    book = {r["pile_id"]: float(r["tonnes"]) for r in _rows(SITE / "opening.csv")}
    moved = defaultdict(float)
    for folder in sorted((SITE / "movements").iterdir()):
        seen = set()
        for r in _rows(folder / "weighbridge.csv"):
            if r["ticket"] in seen or _t(r["time"]) > instant:
                continue
            seen.add(r["ticket"])
            net = float(r["gross_t"]) - float(r["tare_t"])
            assert net == pytest.approx(float(r["net_t"]), abs=0.005)
            book[r["pile_id"]] += net if r["direction"] == "in" else -net
            moved[r["pile_id"]] += net
        routes = [(r["scale_id"], _t(r["start"]), _t(r["end"]), r["pile_id"]) for r in _rows(folder / "routing.csv")]
        for r in _rows(folder / "belt_scales.csv"):
            start, end = _t(r["start"]), _t(r["end"])
            if end > instant:
                continue
            (pile,) = [p for sid, a, b, p in routes if sid == r["scale_id"] and a <= start and end <= b]
            sign = 1 if direction[r["scale_id"]] == "in" else -1
            book[pile] += sign * float(r["tonnes"])
            moved[pile] += float(r["tonnes"])
        for r in _rows(folder / "transfers.csv"):
            if _t(r["time"]) <= instant:
                book[r["from_pile"]] -= float(r["tonnes"])
                book[r["to_pile"]] += float(r["tonnes"])
    return book, moved


def test_books_match_truth_up_to_scale_noise_and_the_planted_faults(truth):
    faults = truth["faults"]
    planted = defaultdict(float)
    for pid, v in faults["belt_bias"]["book_effect_t"].items():
        planted[pid] += v
    for pid, v in faults["missing_transfer"]["book_effect_t"].items():
        planted[pid] += v
    for k, survey in enumerate(truth["surveys"]):
        instant = _t(survey["instant"])
        book, moved = _book_from_csv(instant)
        recorded = truth["books"]["book_at_survey_t"][k]
        for pid, value in book.items():
            assert value == pytest.approx(recorded["book_t"][pid], abs=0.02)
            true_t = survey["piles"][pid]["tonnes"]
            effect = planted[pid] if k == 1 else 0.0
            # Scale noise: belt calibration within class (<= 0.15 %) plus rounding; the opening
            # figure is rounded to 0.1 t.
            assert abs(value - true_t - effect) < 0.003 * moved[pid] + 1.0, (k, pid, value - true_t, effect)


def test_recorded_movement_between_surveys(truth):
    """Book change between the surveys from the CSVs, and what a perfect survey would show."""
    s1, s2 = (_t(s["instant"]) for s in truth["surveys"])
    b1, _ = _book_from_csv(s1)
    b2, moved = _book_from_csv(s2)
    between = truth["books"]["between_surveys"]
    effects = defaultdict(float)
    for key in ("belt_bias", "missing_transfer"):
        for pid, v in truth["faults"][key]["book_effect_t"].items():
            effects[pid] += v
    for pid in b1:
        assert b2[pid] - b1[pid] == pytest.approx(between["recorded_net_t"][pid], abs=0.05)
        noise = between["recorded_net_t"][pid] - between["true_net_t"][pid] - effects[pid]
        assert abs(noise) < 0.003 * moved[pid] + 1.0, pid


def test_planted_faults_are_in_the_files(truth):
    f = truth["faults"]
    oct_tickets = _rows(SITE / "movements" / "2026-10" / "weighbridge.csv")
    dup = [r for r in oct_tickets if r["ticket"] == f["duplicate_ticket"]["ticket"]]
    assert len(dup) == 2 and dup[0] == dup[1] and dup[0]["pile_id"] == "C1"
    assert Counter(r["ticket"] for r in oct_tickets).most_common(2)[1][1] == 1  # only that one repeats

    miss = f["missing_transfer"]
    transfers = _rows(SITE / "movements" / "2026-10" / "transfers.csv")
    assert not any(_t(r["time"]) == _t(miss["time"]) for r in transfers)
    assert miss["book_effect_t"] == {"FE2": 420.0, "FE1": -420.0}

    bias = f["belt_bias"]
    s2 = _t(truth["surveys"][1]["instant"])
    rec = sum(float(r["tonnes"]) for r in _rows(SITE / "movements" / "2026-10" / "belt_scales.csv")
              if r["scale_id"] == "BC2" and _t(r["end"]) <= s2)
    true_in = sum(bias["true_in_october_before_survey_t"].values())
    assert rec / true_in == pytest.approx(1.015, abs=0.002)
    sep = _rows(SITE / "movements" / "2026-09" / "belt_scales.csv")
    assert any(r["scale_id"] == "BC2" for r in sep)  # September's BC2 totals are clean

    salt = {r["material"]: float(r["bulk_density_t_m3"]) for r in _rows(SITE / "materials.csv")}["rock salt"]
    assert salt == pytest.approx(0.96 * truth["materials"]["rock salt"]["density_t_m3"], abs=1e-9)


def test_surveys_have_stations_poses_and_one_georeferenced_file(truth):
    import laspy

    for survey in truth["surveys"]:
        folder = SITE / "surveys" / survey["date"]
        stations = _rows(folder / "stations.csv")
        assert len(stations) >= 3
        labels = np.load(SITE / survey["labels"])
        blank = [r for r in stations if r["x"] == ""]
        assert len(blank) == 1
        for r in stations:
            with laspy.open(folder / r["file"]) as fh:
                n = fh.header.point_count
                crs = fh.header.parse_crs()
            assert n == survey["files"][r["file"]]["points"] == len(labels[f"{r['station_id']}_kind"])
            if r["x"] == "":
                assert crs is not None and crs.to_epsg() == 25832
            else:
                assert crs is None
        assert survey["instant"] == max(stations, key=lambda r: _t(r["time"]))["time"]
        total = np.zeros(8, dtype=np.int64)
        for key in labels.files:
            if key.endswith("_kind"):
                total += np.bincount(labels[key], minlength=8)
        names = truth["label_codes"]["kind"]
        assert {names[str(k)]: int(v) for k, v in enumerate(total)} == survey["counts"]
        assert survey["machine_points"] > 1000 and survey["counts"]["vehicle"] > 0
        for kind in ("dust", "bird", "ghost"):
            assert survey["counts"][kind] > 0


def test_pose_puts_every_cloud_on_the_true_surface(truth):
    """Apply the contract's pose (scipy Rotation "ZYX") and compare with the true surface."""
    import laspy
    from scipy.spatial.transform import Rotation

    from inventory._demo.scenario import terminal_at

    ox, oy, _ = truth["site"]["local_origin_in_site_crs"]
    for k, survey in enumerate(truth["surveys"]):
        terminal = terminal_at(k, np.random.default_rng(0))  # birds differ; the surface does not
        folder = SITE / "surveys" / survey["date"]
        labels = np.load(SITE / survey["labels"])
        for r in _rows(folder / "stations.csv"):
            las = laspy.read(folder / r["file"])
            p = np.stack([np.asarray(las.x), np.asarray(las.y), np.asarray(las.z)], axis=1)
            if r["x"] != "":
                rot = Rotation.from_euler("ZYX", [float(r["yaw_deg"]), float(r["pitch_deg"]), float(r["roll_deg"])],
                                          degrees=True)
                p = rot.apply(p) + [float(r["x"]), float(r["y"]), float(r["z"])]
            kind = labels[f"{r['station_id']}_kind"]
            ground = (kind == 0) | (kind == 1)
            dz = p[ground, 2] - terminal.height(p[ground, 0] - ox, p[ground, 1] - oy)
            assert abs(np.median(dz)) < 0.005, r["file"]
            assert np.sqrt(np.mean(dz**2)) < 0.05, r["file"]
            # Machines stand above the surface they sit on.
            machine = (kind >= 2) & (kind <= 4)
            if machine.any():
                above = p[machine, 2] - terminal.height(p[machine, 0] - ox, p[machine, 1] - oy)
                assert np.median(above) > 0.5


def test_pile_points_fall_inside_their_own_footprint(truth):
    """Labels and register agree: every point labelled as pile i lies in pile i's footprint."""
    import geopandas as gpd
    import laspy
    import shapely

    piles = gpd.read_file(SITE / "piles.gpkg", layer="piles").set_index("pile_id")
    index = {p["index"]: p["pile_id"] for p in truth["piles"]}
    survey = truth["surveys"][0]
    labels = np.load(SITE / survey["labels"])
    geo = [name for name, f in survey["files"].items() if f["georeferenced"]][0]
    las = laspy.read(SITE / "surveys" / survey["date"] / geo)
    pile = labels[f"{survey['files'][geo]['station_id']}_pile"]
    assert (pile > 0).sum() > 1000
    for i in np.unique(pile[pile > 0]):
        m = pile == i
        inside = shapely.contains_xy(piles.geometry[index[int(i)]], np.asarray(las.x)[m], np.asarray(las.y)[m])
        assert inside.all(), index[int(i)]


def test_some_movements_come_after_each_survey_instant(truth):
    """Cut-off: on both survey days something moves after the scan."""
    for k, survey in enumerate(truth["surveys"]):
        instant = _t(survey["instant"])
        period = survey["date"][:7]
        folder = SITE / "movements" / period
        after = [r for r in _rows(folder / "weighbridge.csv") if _t(r["time"]) > instant]
        after += [r for r in _rows(folder / "belt_scales.csv") if _t(r["start"]) >= instant]
        assert len(after) >= 2
        assert all(_t(r.get("time") or r.get("start")).date() == instant.date() for r in after)


def test_overview_picture_is_written():
    import matplotlib.image as mpimg

    img = mpimg.imread(SITE / "overview.png")
    assert img.ndim == 3 and img.shape[0] > 300 and img.shape[1] > 600
