"""The invented demo terminal: its pad, piles, machines and scanner stations at two surveys.

Oxbow Reach is a bulk terminal of our own invention (no real place, company or person). Its
paved pad, 240 m by 150 m, falls gently to the south and east (a drainage cross-fall), and holds
seven open stockpiles of four materials:

====  ==================  =====================================================  ======
pile  material            shape                                                  base
====  ==================  =====================================================  ======
C1    coal                conical pile, trucked out                              toe
C2    coal                windrow with conical ends under the stacker's boom     floor
FE1   iron ore            windrow with a reclaimed face cut into its east end,   toe
                          the loader parked on its flank
FE2   iron ore            conical pile, trucked in                               toe
L1    crushed limestone   conical pile whose toe touches L2's                    floor
L2    crushed limestone   conical pile whose toe touches L1's                    floor
S1    rock salt           pushed into a three-walled bay, flat top               floor
====  ==================  =====================================================  ======

Machines and structures that are not stock: the stacker (rail portal, tower, boom over C2,
counter-jib), the elevated conveyor gallery on its trestles, the loader on FE1's flank, a truck
on the pad, the bay walls and a lighting-mast platform that carries one scanner station.

Local coordinates (metres, x east, y north) are offset by :data:`SITE_ORIGIN` into the site CRS
(EPSG:25832, invented coordinates).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Callable, ClassVar

import numpy as np

from inventory._demo.shapes import BayPile, Cone, Shape, Windrow
from inventory._demo.simulate import (
    KIND_MACHINE,
    KIND_STRUCTURE,
    KIND_VEHICLE,
    Box,
    Cylinder,
    DustCloud,
    Scene,
    Sphere,
    Station,
)

__all__ = [
    "SITE_NAME",
    "SITE_CRS",
    "SITE_TIMEZONE",
    "SITE_ORIGIN",
    "PAD_BOUNDS",
    "MaterialSpec",
    "MATERIALS",
    "PileSpec",
    "PILES",
    "SurveySpec",
    "SURVEYS",
    "pad_height",
    "TrueScene",
    "Terminal",
    "terminal_at",
]

SITE_NAME = "Oxbow Reach Bulk Terminal (invented demo site)"
SITE_CRS = "EPSG:25832"
SITE_TIMEZONE = "Europe/Berlin"
#: Site CRS coordinates of the local origin (invented; a round point in UTM zone 32N).
SITE_ORIGIN = (486300.0, 5734200.0, 0.0)
#: Local extent of the paved pad (xmin, ymin, xmax, ymax).
PAD_BOUNDS = (0.0, 0.0, 240.0, 150.0)

# The pad: a plane at 3.60 m at its centre falling 1.1 % to the south and rising 0.4 % to the
# east (a gentle cross-fall towards a drain along the south edge).
_PAD_Z0 = 3.60
_PAD_CENTRE = (120.0, 75.0)
_PAD_SLOPE_X = 0.004
_PAD_SLOPE_Y = 0.011


def pad_height(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Height of the paved pad (metres, site vertical datum) at local ``(x, y)``."""
    return _PAD_Z0 + _PAD_SLOPE_X * (np.asarray(x) - _PAD_CENTRE[0]) + _PAD_SLOPE_Y * (np.asarray(y) - _PAD_CENTRE[1])


# Reflectivity of the pad and of machines at the scanner's near-infrared wavelength (invented
# but plausible values: weathered concrete about 0.3, painted steel 0.3-0.5).
PAD_REFLECTIVITY = 0.30
STEEL_REFLECTIVITY = 0.35
CONCRETE_WALL_REFLECTIVITY = 0.40
LOADER_REFLECTIVITY = 0.50
TRUCK_REFLECTIVITY = 0.30


@dataclass(frozen=True)
class MaterialSpec:
    """A material as it truly is, and as the site's material table states it.

    ``density_t_m3`` is the true loose bulk density; ``table_density_t_m3`` what materials.csv
    says (equal except for a planted fault). Densities lie in the CEMA ranges quoted in the
    project references (coal 0.72-0.88, iron ore 2.0-3.2, crushed limestone 1.36-1.52, rock salt
    about 1.15-1.35 t/m3). Repose angles likewise (coal 35-38, iron ore about 35, limestone
    about 38, salt about 32 degrees). Reflectivity at the scanner's wavelength is invented but
    ordered as in practice: coal darkest, salt brightest.
    """

    name: str
    density_t_m3: float
    table_density_t_m3: float
    density_sd_t_m3: float
    moisture_pct: float
    tolerance_pct: float
    repose_deg: float
    reflectivity: float


MATERIALS: dict[str, MaterialSpec] = {
    m.name: m
    for m in (
        MaterialSpec("coal", 0.85, 0.85, 0.03, 9.0, 3.0, 37.0, 0.085),
        MaterialSpec("iron ore", 2.40, 2.40, 0.08, 6.0, 2.5, 35.0, 0.15),
        MaterialSpec("crushed limestone", 1.45, 1.45, 0.04, 3.0, 3.0, 38.0, 0.55),
        # Planted fault: the table's rock salt density is 4 % low (1.25 x 0.96 = 1.20).
        MaterialSpec("rock salt", 1.25, 1.20, 0.04, 2.0, 3.0, 32.0, 0.70),
    )
}


@dataclass(frozen=True)
class PileSpec:
    """One pile of the register: id, material, base kind and a sentence saying what it is."""

    pile_id: str
    material: str
    base: str
    description: str


PILES: tuple[PileSpec, ...] = (
    PileSpec("C1", "coal", "toe", "conical coal pile, trucked out"),
    PileSpec("C2", "coal", "floor", "coal windrow with conical ends, stacker boom over it"),
    PileSpec("FE1", "iron ore", "toe", "iron ore windrow with a reclaimed face, loader on its flank"),
    PileSpec("FE2", "iron ore", "toe", "conical iron ore pile, trucked in"),
    PileSpec("L1", "crushed limestone", "floor", "conical limestone pile, toe touching L2"),
    PileSpec("L2", "crushed limestone", "floor", "conical limestone pile, toe touching L1"),
    PileSpec("S1", "rock salt", "floor", "rock salt in a three-walled bay"),
)

# L1 and L2 touch at one point on the line y = 42, x = 100 (a cell corner of the 0.5 m grid)
# at both surveys: their centres sit one radius either side of it.
_TOUCH = (100.0, 42.0)
# The salt bay: inner faces at x = 160 and 184, back wall inner face at y = 8, open to the north.
_BAY_X0, _BAY_W, _BAY_Y0, _BAY_OPEN_Y = 160.0, 24.0, 8.0, 30.0
_BAY_WALL_T, _BAY_WALL_H = 0.6, 4.5
# The conveyor gallery, x 106 .. 108.5, y 58 .. 146, underside 6.5 m and roof 9.0 m above the pad.
_GALLERY = (106.0, 58.0, 108.5, 146.0)
_GALLERY_UNDERSIDE, _GALLERY_ROOF = 6.5, 9.0
_MAST = (172.0, 42.0)
_MAST_SIZE, _MAST_H = 2.4, 10.0
_INSTRUMENT_HEIGHT = 1.6  # scanner optical centre above its stand (common practice ~1.5-1.8 m)


def _pile_shapes(k: int) -> dict[str, Shape]:
    """The true pile shapes at survey ``k`` (0 = first, 1 = second)."""
    rep = {p.pile_id: MATERIALS[p.material].repose_deg for p in PILES}
    r_l1 = (14.0, 13.0)[k]
    r_l2 = (12.0, 13.5)[k]
    return {
        "C1": Cone(28.0, 72.0, (12.0, 10.5)[k], rep["C1"]),
        "C2": Windrow(52.0, 104.0, 0.0, (26.0, 34.0)[k], 10.0, rep["C2"]),
        "FE1": Windrow(130.0, 104.0, 0.0, 36.0, 12.0, rep["FE1"], face_s=(34.0, 26.0)[k], face_deg=60.0),
        "FE2": Cone(200.0, 104.0, (10.0, 11.0)[k], rep["FE2"]),
        "L1": Cone(_TOUCH[0] - r_l1, _TOUCH[1], r_l1, rep["L1"]),
        "L2": Cone(_TOUCH[0] + r_l2, _TOUCH[1], r_l2, rep["L2"]),
        "S1": BayPile(_BAY_X0, _BAY_Y0, _BAY_W, (18.0, 16.0)[k], (4.0, 3.5)[k], rep["S1"]),
    }


@dataclass(frozen=True)
class SurveySpec:
    """One survey: its date, the local start time of the first station and the stations."""

    date: str
    utc_offset: str
    start_local: str
    stations: tuple[Station, ...]
    georeferenced: str  # station whose file is written in the site CRS


def _stations(k: int) -> tuple[Station, ...]:
    """Scanner set-ups of survey ``k``; tripods move a little between surveys, yaw is arbitrary."""
    jitter = ((0.0, 0.0), (0.6, -0.4))[k]

    def tripod(sid, x, y, yaw, pitch, roll, **kw):
        x, y = x + jitter[0], y + jitter[1]
        return Station(sid, x, y, round(float(pad_height(x, y)) + 0.6 + _INSTRUMENT_HEIGHT, 3), yaw, pitch, roll, **kw)

    gx = 0.5 * (_GALLERY[0] + _GALLERY[2])
    gallery_roof = round(float(pad_height(gx, 102.0)) + _GALLERY_ROOF, 3)
    mast_top = round(float(pad_height(*_MAST)) + _MAST_H, 3)
    yaw = (
        (17.0, 212.5, 95.0, 301.0, 48.0, 160.0, 250.0, 122.0, 77.5, 5.5, 281.0, 140.0, 33.0, 199.0, 64.0),
        (133.0, 4.0, 271.5, 66.0, 190.0, 345.0, 12.0, 203.0, 318.0, 87.0, 150.5, 260.0, 111.0, 42.0, 222.0),
    )[k]
    tilt = (
        (0.04, -0.03), (-0.02, 0.05), (0.0, 0.0), (0.03, 0.02), (-0.05, 0.01), (0.02, -0.04), (0.0, 0.0),
        (0.01, 0.03), (-0.03, -0.02), (0.02, 0.02), (-0.04, 0.0), (0.0, -0.03), (0.05, -0.01), (-0.01, 0.04),
        (0.03, -0.02),
    )
    # 0.4 degree steps: 21 cm between points at 30 m. Tripods look down to -20 degrees (a
    # blind circle of about 6 m radius), the elevated stations to -35 and -40 degrees.
    step = dict(az_step_deg=0.4, el_step_deg=0.4)
    low = dict(el_min_deg=-20.0, **step)
    return (
        tripod("ST1", 10.0, 55.0, yaw[0], *tilt[0], **low),
        tripod("ST2", 42.0, 86.0, yaw[1], *tilt[1], **low),
        tripod("ST3", 75.0, 86.0, yaw[2], *tilt[2], **low),
        Station("ST4", gx, 70.0, gallery_roof + _INSTRUMENT_HEIGHT, yaw[3], *tilt[3], el_min_deg=-35.0, **step),
        tripod("ST5", 140.0, 84.0, yaw[4], *tilt[4], **low),
        tripod("ST6", 185.0, 78.0, yaw[5], *tilt[5], **low),
        Station("ST7", _MAST[0], _MAST[1], mast_top + _INSTRUMENT_HEIGHT, yaw[6], *tilt[6], el_min_deg=-40.0, **step),
        tripod("ST8", 180.0, 128.0, yaw[7], *tilt[7], **low),
        tripod("ST9", 62.0, 123.0, yaw[8], *tilt[8], **low),
        tripod("ST10", 100.0, 16.0, yaw[9], *tilt[9], **low),
        tripod("ST11", 140.0, 130.0, yaw[10], *tilt[10], **low),
        tripod("ST12", 8.0, 90.0, yaw[11], *tilt[11], **low),
        tripod("ST13", 222.0, 96.0, yaw[12], *tilt[12], **low),
        tripod("ST14", 95.0, 121.0, yaw[13], *tilt[13], **low),
        tripod("ST15", 46.0, 62.0, yaw[14], *tilt[14], **low),
    )


SURVEYS: tuple[SurveySpec, ...] = (
    SurveySpec("2026-09-30", "+02:00", "12:15", _stations(0), "ST6"),
    SurveySpec("2026-10-31", "+01:00", "12:10", _stations(1), "ST6"),
)


@dataclass
class TrueScene:
    """The whole true scene of a site at one survey: its piles on the bare ground, and what
    is not stock (machines, vehicles, structures as solids; dust; birds).

    A site's scene names, as class attributes, its piles (``PILES``), their materials
    (``MATERIALS``), the bare ground (``ground``, a function of x and y) and the ground's
    reflectivity (``GROUND_REFLECTIVITY``).
    """

    survey: SurveySpec
    shapes: dict[str, Shape]
    objects: list[dict] = field(default_factory=list)
    solids: list = field(default_factory=list)
    dust: list[DustCloud] = field(default_factory=list)
    birds: list[Sphere] = field(default_factory=list)

    PILES: ClassVar[tuple[PileSpec, ...]] = ()
    MATERIALS: ClassVar[dict[str, MaterialSpec]] = {}
    GROUND_REFLECTIVITY: ClassVar[float] = 0.0
    ground: ClassVar[Callable[[np.ndarray, np.ndarray], np.ndarray]]

    @property
    def pile_ids(self) -> list[str]:
        return [p.pile_id for p in self.PILES]

    def thicknesses(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """Thickness of every pile above the ground, shape ``(n_piles, *x.shape)``."""
        x = np.asarray(x, float)
        y = np.asarray(y, float)
        out = np.zeros((len(self.PILES),) + x.shape)
        for i, p in enumerate(self.PILES):
            shape = self.shapes[p.pile_id]
            x0, y0, x1, y1 = shape.bbox()
            near = (x >= x0 - 0.01) & (x <= x1 + 0.01) & (y >= y0 - 0.01) & (y <= y1 + 0.01)
            if near.any():
                out[i][near] = shape.thickness(x[near], y[near])
        return out

    def height(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """The true surface: ground plus piles (piles never overlap, so thicknesses add)."""
        return self.ground(x, y) + self.thicknesses(x, y).sum(axis=0)

    def surface_info(self, x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        t = self.thicknesses(x, y)
        best = t.argmax(axis=0)
        pile = np.where(t.max(axis=0) > 1e-9, best + 1, 0)
        refl = np.array([self.GROUND_REFLECTIVITY] + [self.MATERIALS[p.material].reflectivity for p in self.PILES])
        return pile, refl[pile]

    def scene(self) -> Scene:
        return Scene(self.height, self.surface_info, self.solids, self.dust, self.birds)

    def add(self, name: str, kind: int, solids: list) -> None:
        """An object of ``kind`` made of ``solids`` (boxes, cylinders), numbered in order."""
        oid = len(self.objects) + 1
        self.objects.append({"id": oid, "name": name, "kind": kind})
        for s in solids:
            if isinstance(s, Box):
                self.solids.append(Box(s.center, s.half, s.rotation, kind=kind, object_id=oid,
                                       reflectivity=s.reflectivity))
            else:
                self.solids.append(Cylinder(s.center, s.radius, s.half_length, s.rotation, kind=kind, object_id=oid,
                                            reflectivity=s.reflectivity))


class Terminal(TrueScene):
    """The demo terminal at one survey: its piles on the pad (:func:`pad_height`)."""

    PILES = PILES
    MATERIALS = MATERIALS
    GROUND_REFLECTIVITY = PAD_REFLECTIVITY
    ground = staticmethod(pad_height)


def terminal_at(k: int, rng: np.random.Generator) -> Terminal:
    """The terminal at survey ``k`` with its machines, dust and birds (birds drawn from ``rng``)."""
    t = Terminal(SURVEYS[k], _pile_shapes(k))

    # Stacker on its rails north of C2, boom slewed south over the windrow.
    sx = (80.0, 88.0)[k]
    sy = 120.5
    z0 = float(pad_height(sx, sy))
    boom_pivot = np.array([sx, sy, z0 + 12.0])
    boom_dir = -90.0
    luff = 4.0  # boom nose down, degrees
    rot = Box.standing(0, 0, 0, (1, 1, 1), boom_dir, tilt_deg=luff).rotation
    boom_len, jib_len = 26.0, 9.0
    boom_c = boom_pivot + rot @ np.array([boom_len / 2, 0, 0])
    jib_c = boom_pivot + rot @ np.array([-jib_len / 2, 0, 0.3])
    cw_c = boom_pivot + rot @ np.array([-jib_len + 1.2, 0, -0.6])
    t.add("stacker", KIND_MACHINE, [
        Box.standing(sx, sy, z0, (9.0, 6.0, 2.6), 0.0, reflectivity=STEEL_REFLECTIVITY),
        Box.standing(sx, sy, z0 + 2.6, (3.0, 3.0, 9.4), 0.0, reflectivity=STEEL_REFLECTIVITY),
        Box(tuple(boom_c), (boom_len / 2, 0.8, 0.7), rot, reflectivity=STEEL_REFLECTIVITY),
        Box(tuple(jib_c), (jib_len / 2, 0.8, 0.5), rot, reflectivity=STEEL_REFLECTIVITY),
        Box(tuple(cw_c), (1.2, 1.5, 1.5), rot, reflectivity=STEEL_REFLECTIVITY),
    ])

    # Conveyor gallery on trestles (a horizontal box at a fixed height above the pad's midpoint).
    gx0, gy0, gx1, gy1 = _GALLERY
    gz = float(pad_height(0.5 * (gx0 + gx1), 0.5 * (gy0 + gy1)))
    boxes = [Box(((gx0 + gx1) / 2, (gy0 + gy1) / 2, gz + (_GALLERY_UNDERSIDE + _GALLERY_ROOF) / 2),
                 ((gx1 - gx0) / 2, (gy1 - gy0) / 2, (_GALLERY_ROOF - _GALLERY_UNDERSIDE) / 2),
                 reflectivity=STEEL_REFLECTIVITY)]
    for ty in np.arange(62.0, gy1, 16.0):
        bottom = float(pad_height(0.5 * (gx0 + gx1), ty))
        boxes.append(Box.standing(0.5 * (gx0 + gx1), ty, bottom, (0.5, gx1 - gx0, gz + _GALLERY_UNDERSIDE - bottom), 90.0,
                                  reflectivity=STEEL_REFLECTIVITY))
    t.add("conveyor gallery", KIND_MACHINE, boxes)

    # Wheel loader parked on FE1's north flank near the reclaim face, rolled with the slope.
    lx, ly = (156.0, 150.0)[k], 114.0
    lz = float(t.height(np.array([lx]), np.array([ly]))[0]) - 0.5
    roll = -14.0
    lrot = Box.standing(0, 0, 0, (1, 1, 1), 0.0, roll_deg=roll).rotation

    def on_loader(dx, dz, size):
        c = np.array([lx, ly, lz]) + lrot @ np.array([dx, 0.0, dz + size[2] / 2])
        return Box(tuple(c), (size[0] / 2, size[1] / 2, size[2] / 2), lrot, reflectivity=LOADER_REFLECTIVITY)

    t.add("wheel loader", KIND_VEHICLE, [
        on_loader(0.0, 0.0, (6.5, 2.6, 2.2)),
        on_loader(-1.6, 2.2, (1.8, 1.8, 1.5)),
        on_loader(4.0, 0.1, (1.3, 3.0, 1.2)),
    ])

    # A truck with a tipper trailer on the pad.
    tx, ty, th = ((140.0, 30.0, 200.0), (60.0, 40.0, 75.0))[k]
    a = math.radians(th)
    fwd = np.array([math.cos(a), math.sin(a)])
    cab = np.array([tx, ty]) + 6.5 * fwd
    t.add("truck", KIND_VEHICLE, [
        Box.standing(cab[0], cab[1], float(pad_height(*cab)) + 0.4, (5.6, 2.5, 2.9), th, reflectivity=TRUCK_REFLECTIVITY),
        Box.standing(tx, ty, float(pad_height(tx, ty)) + 0.9, (9.5, 2.55, 2.5), th, reflectivity=TRUCK_REFLECTIVITY),
    ])

    # Three-walled bay around S1 (concrete; bottoms at the pad's lowest point under each wall).
    def wall(x0, y0, x1, y1):
        bottom = float(min(pad_height(x0, y0), pad_height(x1, y1), pad_height(x0, y1), pad_height(x1, y0)))
        return Box.standing((x0 + x1) / 2, (y0 + y1) / 2, bottom, (x1 - x0, y1 - y0, _BAY_WALL_H + 0.2), 0.0,
                            reflectivity=CONCRETE_WALL_REFLECTIVITY)

    bx1 = _BAY_X0 + _BAY_W
    t.add("salt bay walls", KIND_STRUCTURE, [
        wall(_BAY_X0 - _BAY_WALL_T, _BAY_Y0 - _BAY_WALL_T, bx1 + _BAY_WALL_T, _BAY_Y0),
        wall(_BAY_X0 - _BAY_WALL_T, _BAY_Y0, _BAY_X0, _BAY_OPEN_Y),
        wall(bx1, _BAY_Y0, bx1 + _BAY_WALL_T, _BAY_OPEN_Y),
    ])
    mz = float(pad_height(*_MAST))
    t.add("lighting mast platform", KIND_STRUCTURE, [
        Box.standing(_MAST[0], _MAST[1], mz - 0.3, (_MAST_SIZE, _MAST_SIZE, _MAST_H + 0.3), 0.0,
                     reflectivity=STEEL_REFLECTIVITY),
    ])

    # Dust: one cloud at FE1's reclaim face, one behind the truck.
    fe1 = t.shapes["FE1"]
    face_x = fe1.x0 + fe1.face_s + 2.0
    t.dust.append(DustCloud((face_x, 104.0, float(pad_height(face_x, 104.0)) + 3.0), 3.0, 0.05))
    back = np.array([tx, ty]) - 9.0 * fwd
    t.dust.append(DustCloud((back[0], back[1], float(pad_height(*back)) + 2.0), 2.5, 0.04))

    # Birds: a loose flock of gulls over the yard.
    n_birds = 18
    bxy = rng.uniform([20.0, 20.0], [220.0, 130.0], size=(n_birds, 2))
    bz = pad_height(bxy[:, 0], bxy[:, 1]) + rng.uniform(5.0, 25.0, n_birds)
    br = rng.uniform(0.12, 0.22, n_birds)
    t.birds.extend(Sphere((float(x), float(y), float(z)), float(r)) for (x, y), z, r in zip(bxy, bz, br))
    return t
