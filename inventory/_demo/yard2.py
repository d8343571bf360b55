"""A second invented yard, laid out unlike the sample site, to judge the survey step on.

Wrenfold Aggregate Yard is a yard of our own invention (no real place, company or person). It
exists so that the classifier and the volume step are judged on a yard they were not tuned on:

* The ground is not a plane. It rises 1.5 % to the east and falls 1 % to the north, rolls
  gently (12 cm waves some 60 m long), has a shallow swale (35 cm deep, about 12 m wide)
  running under the large flat-topped pile, and meets a natural embankment along its west
  edge (a 29 degree bank rising 4.5 m).
* Six piles of four materials with repose angles from 32 to 40 degrees:

  ====  ======================  ==============================================  =====
  pile  material                shape                                           base
  ====  ======================  ==============================================  =====
  W1    gravel 8/16             windrow with conical ends, ridge 30 deg north   floor
                                of east; a haul truck parked at its south toe
  K1    washed sand             irregular plan: three (later four) overlapping  floor
                                cones; dust at its working face
  C3    crushed granite 0/32    small cone, about 300 m3                        toe
  F1    gravel 8/16             large flat-topped pile over the swale, a dozer  floor
                                standing on its top
  B1    washed sand             pushed against a 3 m retaining wall, flat top   floor
  R1    asphalt planings        dark conical pile                               toe
  ====  ======================  ==============================================  =====

* Not stock: the haul truck, the dozer on F1, a parked car, a pitched-roof shed, a light pole,
  a line of concrete barriers, the retaining wall; dust at K1's face and beside the truck; a
  few birds.
* Ten tripod stations (instrument 1.7 m above the ground, looking down to -20 degrees) placed
  so that some flanks are seen from one side only or not at all.

Two surveys a month apart (:data:`SURVEYS`); between them W1 was shortened, K1 grew a fourth
heap, C3 grew, F1 was cut down, B1 was drawn down and R1 shrank.

``write_yard2_site(dest, seed)`` writes it as a site folder the tool reads (``site.toml``,
``materials.csv``, ``piles.gpkg``, ``base/floor.tif``, ``surveys/<date>/*.laz`` and
``stations.csv``) with the truth beside it (``truth.json``, ``truth/labels-<date>.npz``,
``truth/surface-<date>.tif``) in the sample site's formats, so that
:mod:`inventory._demo.quality` and ``bench/bench_quality.py --site`` measure it unchanged. It
has no books (no movements, no opening balances): it is for the survey and volume steps only.
"""

from __future__ import annotations

import json
import math
import os
from datetime import date, datetime, timedelta
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np

from inventory._demo.sample import (
    _GPS_EPOCH,
    _GPS_LEAP_S,
    _UTC,
    FINE_CELL_M,
    TOOL_CELL_M,
    _cell_means,
    _csv,
    _iso,
    _shape_record,
    _write_folder,
    _write_laz,
    _write_npz,
    _write_piles,
    _write_text,
    _write_tif,
)
from inventory._demo.scenario import MaterialSpec, PileSpec, SurveySpec, TrueScene
from inventory._demo.shapes import Cone, ConeGroup, Plateau, Shape, Windrow
from inventory._demo.simulate import (
    KIND_NAMES,
    KIND_STRUCTURE,
    KIND_VEHICLE,
    Box,
    Cylinder,
    DustCloud,
    ScannerModel,
    Sphere,
    Station,
    max_range_for,
    scan,
    station_rotation,
    to_station_frame,
)

__all__ = ["YARD2_SEED", "SITE_NAME", "PILES", "SURVEYS", "ground_height", "Yard", "yard_at", "write_yard2_site"]

YARD2_SEED = 20270430
SITE_NAME = "Wrenfold Aggregate Yard (invented test yard)"
SITE_CRS = "EPSG:25833"
SITE_TIMEZONE = "Europe/Berlin"
#: Site CRS coordinates of the local origin (invented; a round point in UTM zone 33N).
SITE_ORIGIN = (412000.0, 5810000.0, 0.0)
#: Local extent of the yard (xmin, ymin, xmax, ymax).
PAD_BOUNDS = (0.0, 0.0, 200.0, 150.0)
GROUND_REFLECTIVITY = 0.25
STEEL_REFLECTIVITY = 0.35
CONCRETE_REFLECTIVITY = 0.40
PAINT_REFLECTIVITY = 0.50
INSTRUMENT_HEIGHT = 1.7  # optical centre above the ground (common practice 1.5-1.8 m)
STATION_INTERVAL_MIN = 12
FOOTPRINT_MARGIN_M = 1.0

# The ground (module docstring): two-way fall, long gentle waves, a swale along the line
# x = 125 + 0.3 (y - 75), an embankment rising west of x = 14 at 0.55 (29 deg) up to 4.5 m.
_Z0, _SLOPE_X, _SLOPE_Y = 12.0, 0.015, -0.010
_WAVE_AMP, _WAVE_LX, _WAVE_LY = 0.12, 70.0, 55.0
_SWALE_DEPTH, _SWALE_SIGMA = 0.35, 5.0
_BANK_TOE_X, _BANK_SLOPE, _BANK_RISE = 14.0, 0.55, 4.5


def ground_height(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Height of the bare ground (metres) at local ``(x, y)``."""
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    z = _Z0 + _SLOPE_X * (x - 100.0) + _SLOPE_Y * (y - 75.0)
    z = z + _WAVE_AMP * np.sin(2 * np.pi * x / _WAVE_LX) * np.cos(2 * np.pi * y / _WAVE_LY)
    z = z - _SWALE_DEPTH * np.exp(-((x - 125.0 - 0.3 * (y - 75.0)) ** 2) / (2 * _SWALE_SIGMA**2))
    return z + np.clip((_BANK_TOE_X - x) * _BANK_SLOPE, 0.0, _BANK_RISE)


MATERIALS: dict[str, MaterialSpec] = {
    # Loose bulk densities and repose angles in the usual handbook ranges for these materials
    # (common practice); reflectivities invented but ordered as in practice (planings darkest).
    m.name: m
    for m in (
        MaterialSpec("gravel 8/16", 1.60, 1.60, 0.05, 3.0, 3.0, 36.0, 0.35),
        MaterialSpec("washed sand", 1.55, 1.55, 0.05, 6.0, 3.0, 32.0, 0.45),
        MaterialSpec("crushed granite 0/32", 1.75, 1.75, 0.05, 2.0, 3.0, 40.0, 0.40),
        MaterialSpec("asphalt planings", 1.45, 1.45, 0.05, 2.0, 4.0, 34.0, 0.10),
    )
}

PILES: tuple[PileSpec, ...] = (
    PileSpec("W1", "gravel 8/16", "floor", "gravel windrow turned 30 degrees, haul truck at its toe"),
    PileSpec("K1", "washed sand", "floor", "sand pile of irregular plan (overlapping heaps), dust at its face"),
    PileSpec("C3", "crushed granite 0/32", "toe", "small granite cone"),
    PileSpec("F1", "gravel 8/16", "floor", "flat-topped gravel pile over the swale, dozer on its top"),
    PileSpec("B1", "washed sand", "floor", "sand pushed against a 3 m retaining wall"),
    PileSpec("R1", "asphalt planings", "toe", "conical pile of dark asphalt planings"),
)

# The retaining wall behind B1: inner face at x = 186, from y = 15 to 75, 0.5 m thick.
_WALL_X, _WALL_Y0, _WALL_Y1, _WALL_T, _WALL_H = 186.0, 15.0, 75.0, 0.5, 3.0


def _pile_shapes(k: int) -> dict[str, Shape]:
    rep = {p.pile_id: MATERIALS[p.material].repose_deg for p in PILES}
    heaps = [Cone(62.0, 100.0, 11.0, rep["K1"]), Cone(76.0, 107.0, 9.0, rep["K1"]), Cone(71.0, 91.0, 8.0, rep["K1"])]
    if k == 1:
        heaps.append(Cone(53.0, 110.0, 7.0, rep["K1"]))
    return {
        "W1": Windrow(30.0, 22.0, 30.0, (40.0, 32.0)[k], 9.0, rep["W1"]),
        "K1": ConeGroup(tuple(heaps)),
        "C3": Cone(118.0, 128.0, (7.0, 7.6)[k], rep["C3"]),
        "F1": Plateau(132.0, 62.0, 0.0, 30.0, 12.0, 10.0, (6.0, 5.2)[k], rep["F1"]),
        "B1": Plateau(_WALL_X, 45.0, 90.0, 30.0, 8.0, 5.0, (2.7, 2.3)[k], rep["B1"], wall=True),
        "R1": Cone(160.0, 118.0, (10.0, 9.0)[k], rep["R1"]),
    }


def _stations(k: int) -> tuple[Station, ...]:
    """Ten tripods; they move a little between the surveys, yaw and tilt arbitrary."""
    jitter = ((0.0, 0.0), (-0.7, 0.5))[k]
    places = ((20.0, 60.0), (45.0, 72.0), (97.0, 82.0), (92.0, 35.0), (165.0, 88.0), (168.0, 30.0),
              (138.0, 142.0), (70.0, 140.0), (125.0, 25.0), (192.0, 100.0))
    yaw = ((23.0, 301.5, 144.0, 77.0, 210.0, 9.5, 266.0, 130.0, 345.0, 58.0),
           (188.0, 42.0, 315.5, 99.0, 7.0, 251.0, 163.0, 280.0, 36.0, 122.5))[k]
    tilt = ((0.03, -0.02), (-0.04, 0.01), (0.0, 0.05), (0.02, 0.02), (-0.01, -0.03), (0.05, 0.0),
            (0.0, -0.02), (-0.03, 0.04), (0.01, 0.01), (-0.02, -0.05))
    out = []
    for i, ((x, y), a, (p, r)) in enumerate(zip(places, yaw, tilt)):
        x, y = x + jitter[0], y + jitter[1]
        z = round(float(ground_height(x, y)) + INSTRUMENT_HEIGHT, 3)
        out.append(Station(f"T{i + 1}", x, y, z, a, p, r, az_step_deg=0.3, el_step_deg=0.3, el_min_deg=-20.0))
    return tuple(out)


SURVEYS: tuple[SurveySpec, ...] = (
    SurveySpec("2027-03-31", "+02:00", "09:40", _stations(0), "T5"),
    SurveySpec("2027-04-30", "+02:00", "10:05", _stations(1), "T5"),
)


class Yard(TrueScene):
    """The second yard at one survey: its piles on the undulating ground (:func:`ground_height`)."""

    PILES = PILES
    MATERIALS = MATERIALS
    GROUND_REFLECTIVITY = GROUND_REFLECTIVITY
    ground = staticmethod(ground_height)


def _z(yard: Yard, x: float, y: float) -> float:
    return float(yard.height(np.array([x]), np.array([y]))[0])


def yard_at(k: int, rng: np.random.Generator) -> Yard:
    """The yard at survey ``k`` with its machines, structures, dust and birds (birds from ``rng``)."""
    y = Yard(SURVEYS[k], _pile_shapes(k))

    # A rigid haul truck parked 4 m off W1's south-east toe, heading along the ridge.
    w1 = y.shapes["W1"]
    a = math.radians(w1.azimuth_deg)
    u, v = np.array([math.cos(a), math.sin(a)]), np.array([-math.sin(a), math.cos(a)])
    c = np.array([w1.x0, w1.y0]) + 16.0 * u - (w1.w + 4.0) * v
    cab = c + 4.6 * u
    zt = float(ground_height(*c))
    y.add("haul truck", KIND_VEHICLE, [
        Box.standing(c[0], c[1], zt + 1.3, (7.2, 5.2, 2.6), w1.azimuth_deg, reflectivity=PAINT_REFLECTIVITY),
        Box.standing(cab[0], cab[1], zt + 0.9, (2.0, 5.0, 3.4), w1.azimuth_deg, reflectivity=PAINT_REFLECTIVITY),
        Box.standing(c[0], c[1], zt + 0.4, (9.0, 3.0, 0.9), w1.azimuth_deg, reflectivity=STEEL_REFLECTIVITY),
    ])

    # A dozer standing on F1's flat top, blade down towards its north-east edge.
    dx, dy, head = 140.0, 64.0, 35.0
    zd = _z(y, dx, dy)
    h = math.radians(head)
    fwd, side = np.array([math.cos(h), math.sin(h)]), np.array([-math.sin(h), math.cos(h)])
    tl, tr = np.array([dx, dy]) + 1.25 * side, np.array([dx, dy]) - 1.25 * side
    blade = np.array([dx, dy]) + 2.9 * fwd
    y.add("dozer", KIND_VEHICLE, [
        Box.standing(tl[0], tl[1], zd, (4.2, 0.6, 0.8), head, reflectivity=STEEL_REFLECTIVITY),
        Box.standing(tr[0], tr[1], zd, (4.2, 0.6, 0.8), head, reflectivity=STEEL_REFLECTIVITY),
        Box.standing(dx, dy, zd + 0.8, (4.0, 2.5, 1.1), head, reflectivity=PAINT_REFLECTIVITY),
        Box.standing(dx - 0.8 * fwd[0], dy - 0.8 * fwd[1], zd + 1.9, (1.7, 1.7, 1.5), head,
                     reflectivity=PAINT_REFLECTIVITY),
        Box.standing(blade[0], blade[1], zd + 0.05, (0.4, 3.6, 1.2), head, reflectivity=STEEL_REFLECTIVITY),
    ])

    # A car parked by the shed.
    cx, cy = 48.0, 133.0
    zc = float(ground_height(cx, cy))
    y.add("car", KIND_VEHICLE, [
        Box.standing(cx, cy, zc + 0.25, (4.5, 1.8, 0.8), 0.0, reflectivity=PAINT_REFLECTIVITY),
        Box.standing(cx - 0.3, cy, zc + 1.05, (2.4, 1.6, 0.5), 0.0, reflectivity=PAINT_REFLECTIVITY),
    ])

    # A shed of 12 m by 8 m, eaves 3.5 m, a 20 degree pitched roof (ridge along x).
    sx, sy, sl, sw, eave, pitch = 30.0, 138.0, 12.0, 8.0, 3.5, 20.0
    zs = float(ground_height(np.array([sx - sl / 2, sx + sl / 2]), np.array([sy, sy])).min())
    zs_top = float(ground_height(np.array([sx - sl / 2, sx + sl / 2]), np.array([sy - sw / 2, sy + sw / 2])).max())
    half_run = sw / 2.0 + 0.3
    slab = half_run / math.cos(math.radians(pitch))
    rise = (sw / 2.0) * math.tan(math.radians(pitch))
    roof = []
    for sign in (1.0, -1.0):
        rot = station_rotation(0.0, 0.0, -sign * pitch)
        centre = (sx, sy + sign * half_run / 2.0, zs_top + eave + rise - 0.5 * half_run * math.tan(math.radians(pitch)))
        roof.append(Box(centre, (sl / 2.0 + 0.3, slab / 2.0, 0.1), rot, reflectivity=STEEL_REFLECTIVITY))
    y.add("shed", KIND_STRUCTURE, [
        Box.standing(sx, sy, zs - 0.2, (sl, sw, zs_top - zs + eave + 0.2), 0.0, reflectivity=CONCRETE_REFLECTIVITY),
        *roof,
    ])

    # A 14 m light pole with its lamp head.
    px, py = 100.0, 22.0
    zp = float(ground_height(px, py))
    y.add("light pole", KIND_STRUCTURE, [
        Cylinder((px, py, zp + 7.0), 0.15, 7.0, reflectivity=STEEL_REFLECTIVITY),
        Box.standing(px + 0.5, py, zp + 14.0, (1.4, 0.6, 0.3), 0.0, reflectivity=STEEL_REFLECTIVITY),
    ])

    # A line of concrete barriers (3.8 m units, 0.6 m wide, 0.8 m high, 0.2 m gaps) along x = 96.
    barriers = []
    for yb in np.arange(100.0, 140.0, 4.0):
        zb = float(ground_height(96.0, yb + 1.9))
        barriers.append(Box.standing(96.0, yb + 1.9, zb - 0.05, (3.8, 0.6, 0.85), 90.0,
                                     reflectivity=CONCRETE_REFLECTIVITY))
    y.add("barrier line", KIND_STRUCTURE, barriers)

    # The retaining wall behind B1: top level, 3 m above the highest ground along it.
    ys = np.linspace(_WALL_Y0, _WALL_Y1, 61)
    g = ground_height(np.full_like(ys, _WALL_X), ys)
    bottom, top = float(g.min()) - 0.3, float(g.max()) + _WALL_H
    y.add("retaining wall", KIND_STRUCTURE, [
        Box.standing(_WALL_X + _WALL_T / 2, (_WALL_Y0 + _WALL_Y1) / 2, bottom,
                     (_WALL_T, _WALL_Y1 - _WALL_Y0, top - bottom),
                     0.0, reflectivity=CONCRETE_REFLECTIVITY),
    ])

    # Dust: at K1's working face (east side) and beside the truck.
    y.dust.append(DustCloud((88.0, 101.0, float(ground_height(88.0, 101.0)) + 2.5), 3.0, 0.05))
    back = c - 8.0 * u
    y.dust.append(DustCloud((float(back[0]), float(back[1]), zt + 2.0), 2.5, 0.04))

    n_birds = 10
    bxy = rng.uniform([20.0, 20.0], [190.0, 140.0], size=(n_birds, 2))
    bz = ground_height(bxy[:, 0], bxy[:, 1]) + rng.uniform(5.0, 25.0, n_birds)
    br = rng.uniform(0.12, 0.22, n_birds)
    y.birds.extend(Sphere((float(a), float(b), float(z)), float(r)) for (a, b), z, r in zip(bxy, bz, br))
    return y


def _footprints(yards: list[Yard]) -> dict:
    """Union of both surveys' toe outlines plus a margin; B1's stops at the wall's face."""
    from shapely.geometry import box

    out = {}
    for p in PILES:
        geom = yards[0].shapes[p.pile_id].outline().union(yards[1].shapes[p.pile_id].outline())
        geom = geom.buffer(FOOTPRINT_MARGIN_M, quad_segs=32)
        if p.pile_id == "B1":
            geom = geom.intersection(box(-1e3, -1e3, _WALL_X, 1e3))
        out[p.pile_id] = geom
    return out


def _grid() -> tuple[float, float, int, int]:
    x0, y0, x1, y1 = PAD_BOUNDS
    return x0, y1, int(round((y1 - y0) / TOOL_CELL_M)), int(round((x1 - x0) / TOOL_CELL_M))


def _shape_truth(shape: Shape) -> dict:
    if isinstance(shape, ConeGroup):
        return {"type": "cone_group", "cones": [_shape_record(c) for c in shape.cones],
                "volume_note": "midpoint integration on a 0.01 m grid (no closed form)"}
    if isinstance(shape, Plateau):
        return {"type": "plateau_against_wall" if shape.wall else "plateau", "centre_local": [shape.cx, shape.cy],
                "azimuth_deg": shape.azimuth_deg, "core_length_m": shape.length, "core_breadth_m": shape.breadth,
                "reach_m": shape.reach, "top_m": shape.top, "repose_deg": shape.repose_deg}
    return _shape_record(shape)


def write_yard2_site(dest: "str | os.PathLike", seed: int = YARD2_SEED, *, overwrite: bool = False) -> Path:
    """Write the second invented yard into ``dest`` (built beside it, renamed into place).

    Parameters
    ----------
    dest : path
        Folder to create; must not exist or be empty unless ``overwrite``.
    seed : int
        Seed of every random draw (scan noise, dropouts, dust, ghosts, birds).
    overwrite : bool
        Replace an existing folder.

    Returns
    -------
    Path
        ``dest``.
    """
    return _write_folder(dest, lambda tmp: _build(tmp, seed), "the yard", ".yard2-", overwrite)


def _build(root: Path, seed: int) -> None:
    tz = ZoneInfo(SITE_TIMEZONE)
    model = ScannerModel()
    yards = [yard_at(k, np.random.default_rng([seed, 1, k])) for k in range(len(SURVEYS))]
    _write_text(root / "site.toml", "\n".join([
        "# The second invented yard (inventory._demo.yard2): survey and volume steps only, no books.",
        f'name = "{SITE_NAME}"', f'crs = "{SITE_CRS}"', f'timezone = "{SITE_TIMEZONE}"', "",
        "[grid]", f"cell_size_m = {TOOL_CELL_M}", "max_fill_distance_m = 3.0", 'statistic = "mean"', "",
        "[survey]", f'default_crs = "{SITE_CRS}"', 'default_time = "12:00"', "",
        "[base]", 'floor_raster = "base/floor.tif"', "floor_sigma_m = 0.03", "toe_ring_m = 3.0", "",
    ]))
    _csv(root / "materials.csv", ["material", "bulk_density_t_m3", "density_sd_t_m3", "moisture_pct", "tolerance_pct"],
         [[m.name, f"{m.table_density_t_m3:.3f}", f"{m.density_sd_t_m3:.3f}", f"{m.moisture_pct:.1f}",
           f"{m.tolerance_pct:.1f}"] for m in MATERIALS.values()])
    footprints = _footprints(yards)
    _write_piles(root / "piles.gpkg", footprints, PILES, SITE_CRS, SITE_ORIGIN)
    west, north, nrows, ncols = _grid()
    xc = west + (np.arange(ncols) + 0.5) * TOOL_CELL_M
    yc = north - (np.arange(nrows) + 0.5) * TOOL_CELL_M
    sw, sn = west + SITE_ORIGIN[0], north + SITE_ORIGIN[1]
    _write_tif(root / "base" / "floor.tif", ground_height(*np.meshgrid(xc, yc)), sw, sn, TOOL_CELL_M, SITE_CRS)

    truth: dict = {
        "about": "True answers of the second invented yard; read by tests and benches only, never by the tool.",
        "generator": {"function": "inventory._demo.yard2.write_yard2_site", "seed": seed, "truth_format": 1},
        "site": {"name": SITE_NAME, "crs": SITE_CRS, "timezone": SITE_TIMEZONE,
                 "local_origin_in_site_crs": list(SITE_ORIGIN), "pad": {"bounds_local": list(PAD_BOUNDS)}},
        "materials": {m.name: {"density_t_m3": m.density_t_m3, "repose_deg": m.repose_deg,
                               "reflectivity": m.reflectivity,
                               "max_range_m": round(float(max_range_for(m.reflectivity, model)), 2)}
                      for m in MATERIALS.values()},
        "piles": [{"index": i + 1, "pile_id": p.pile_id, "material": p.material, "base": p.base,
                   "description": p.description} for i, p in enumerate(PILES)],
        "label_codes": {"kind": {str(k): v for k, v in KIND_NAMES.items()},
                        "pile": "1-based index into 'piles' (0 = not a pile point)",
                        "object": "id into the survey's 'objects' for solids, 1-based dust cloud / bird number"},
        "volume_method": {"volume_m3": "analytic above the true ground (cone group: 0.01 m midpoint integration)",
                          "volume_fine_m3": f"midpoint integration of the true thickness on a {FINE_CELL_M} m grid"},
    }
    surveys = []
    for k, (spec, yard) in enumerate(zip(SURVEYS, yards)):
        day = date.fromisoformat(spec.date)
        hh, mm = map(int, spec.start_local.split(":"))
        t0 = datetime(day.year, day.month, day.day, hh, mm, tzinfo=tz)
        folder = root / "surveys" / spec.date
        rows, labels, files = [], {}, {}
        totals = np.zeros(len(KIND_NAMES), np.int64)
        scene = yard.scene()
        start = t0
        for i, st in enumerate(spec.stations):
            start = t0 + timedelta(minutes=STATION_INTERVAL_MIN * i)
            res = scan(scene, st, model, np.random.default_rng([seed, 2, k, i]))
            geo = st.station_id == spec.georeferenced
            xyz = res.xyz + np.array(SITE_ORIGIN) if geo else to_station_frame(res.xyz, st)
            gps0 = (start.astimezone(_UTC) - _GPS_EPOCH).total_seconds() + _GPS_LEAP_S - 1e9
            name = f"{st.station_id}.laz"
            _write_laz(folder / name, xyz, res, gps0, i + 1, geo, day, SITE_CRS, SITE_ORIGIN)
            labels[f"{st.station_id}_kind"] = res.kind.astype(np.uint8)
            labels[f"{st.station_id}_pile"] = res.pile.astype(np.uint8)
            labels[f"{st.station_id}_object"] = res.object_id.astype(np.uint8)
            counts = np.bincount(res.kind, minlength=len(KIND_NAMES))
            totals += counts
            files[name] = {"station_id": st.station_id, "points": int(len(res)), "georeferenced": geo,
                           "origin_site": [st.x + SITE_ORIGIN[0], st.y + SITE_ORIGIN[1], st.z],
                           "counts": {KIND_NAMES[c]: int(n) for c, n in enumerate(counts)}}
            pose = [None] * 6 if geo else [f"{st.x + SITE_ORIGIN[0]:.3f}", f"{st.y + SITE_ORIGIN[1]:.3f}",
                                           f"{st.z:.3f}", f"{st.roll_deg:g}", f"{st.pitch_deg:g}", f"{st.yaw_deg:g}"]
            rows.append([name, st.station_id, _iso(start, tz), *pose])
        _csv(folder / "stations.csv", ["file", "station_id", "time", "x", "y", "z", "roll_deg", "pitch_deg", "yaw_deg"],
             rows)
        _write_npz(root / "truth" / f"labels-{spec.date}.npz", labels)
        zmean, vfine = _cell_means(yard.thicknesses, ground_height, len(PILES), west, north, nrows, ncols)
        _write_tif(root / "truth" / f"surface-{spec.date}.tif", zmean, sw, sn, TOOL_CELL_M, SITE_CRS)
        piles = {}
        for p, vf in zip(PILES, vfine):
            shape = yard.shapes[p.pile_id]
            v = shape.volume()
            piles[p.pile_id] = {"volume_m3": round(v, 4), "volume_fine_m3": round(float(vf), 4),
                                "tonnes": round(v * MATERIALS[p.material].density_t_m3, 4),
                                "shape": _shape_truth(shape)}
        surveys.append({
            "date": spec.date, "instant": _iso(start, tz), "piles": piles, "files": files,
            "counts": {KIND_NAMES[c]: int(n) for c, n in enumerate(totals)},
            "objects": yard.objects,
            "dust_clouds": [{"centre_local": list(d.center), "radius_m": d.radius} for d in yard.dust],
            "birds": len(yard.birds),
            "surface": f"truth/surface-{spec.date}.tif", "labels": f"truth/labels-{spec.date}.npz",
        })
    truth["surveys"] = surveys
    _write_text(root / "truth.json", json.dumps(truth, indent=1, ensure_ascii=True) + "\n")
