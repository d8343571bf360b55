"""A terrestrial laser scanner simulator: rays over a heightfield and solid shapes.

The scanner turns about its vertical axis and sweeps a fan of rays at fixed elevation steps, so
each station's cloud has what real static scans have: the shadows behind piles and machines,
point density that falls with range, dense rings on flat ground near the tripod, returns lost
beyond the range that the target's reflectivity allows, range noise, dust and bird returns and a
few long-range ghosts.

How the rays are cast (vectorised, no per-ray Python loop):

* Terrain (a heightfield ``z = height(x, y)``, the pad with the piles on it). All rays of one
  azimuth lie in one vertical half-plane, so the terrain is sampled once along that half-plane
  at a fine horizontal step. The elevation angle from the scanner to each sample,
  ``phi(r) = atan((z(r) - z0) / r)``, is turned into its running maximum; a ray of elevation
  ``e`` first meets the terrain at the first sample where that running maximum reaches ``e``
  (``searchsorted``), which handles occlusion exactly at the sampling step. The crossing is then
  refined by bisection on the true heightfield, so every terrain point lies on the surface.
* Solids (oriented boxes, finite cylinders; machines, walls, galleries): analytic ray-box and
  ray-cylinder intersection for every ray; the nearest of terrain and solids wins.
* Dust clouds and birds: ray-sphere intersection in front of the hit.

The ray pattern is a levelled grid of azimuth and elevation steps (a dual-axis compensator
keeps it level); the points are then written in the scanner's own, slightly tilted frame by the
caller (see :func:`to_station_frame`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Callable, Protocol, Sequence

import numpy as np

__all__ = [
    "KIND_PAD",
    "KIND_PILE",
    "KIND_STRUCTURE",
    "KIND_MACHINE",
    "KIND_VEHICLE",
    "KIND_DUST",
    "KIND_BIRD",
    "KIND_GHOST",
    "KIND_NAMES",
    "Box",
    "Cylinder",
    "Sphere",
    "DustCloud",
    "Scene",
    "Station",
    "ScannerModel",
    "ScanResult",
    "scan",
    "raster_scene",
    "station_rotation",
    "to_station_frame",
    "max_range_for",
]

# Per-point truth labels (uint8), written beside the clouds for the tests only.
KIND_PAD = 0  #: the paved pad (ground that is not stock)
KIND_PILE = 1  #: the surface of a stockpile
KIND_STRUCTURE = 2  #: fixed structures: bay walls, a mast platform
KIND_MACHINE = 3  #: the stacker and the conveyor gallery
KIND_VEHICLE = 4  #: the loader and the truck
KIND_DUST = 5  #: returns from a dust cloud in the air
KIND_BIRD = 6  #: returns from a bird
KIND_GHOST = 7  #: long-range ghost (range ambiguity / multipath)
KIND_NAMES = {
    KIND_PAD: "pad",
    KIND_PILE: "pile",
    KIND_STRUCTURE: "structure",
    KIND_MACHINE: "machine",
    KIND_VEHICLE: "vehicle",
    KIND_DUST: "dust",
    KIND_BIRD: "bird",
    KIND_GHOST: "ghost",
}

_NO_HIT = np.inf


class Solid(Protocol):
    kind: int
    object_id: int
    reflectivity: float

    def intersect(self, origin: np.ndarray, dirs: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Ray parameter of the first hit (inf for a miss) and the unit normal there."""


def _rot_z(deg: float) -> np.ndarray:
    a = math.radians(deg)
    c, s = math.cos(a), math.sin(a)
    return np.array([[c, -s, 0.0], [s, c, 0.0], [0.0, 0.0, 1.0]])


def _rot_y(deg: float) -> np.ndarray:
    a = math.radians(deg)
    c, s = math.cos(a), math.sin(a)
    return np.array([[c, 0.0, s], [0.0, 1.0, 0.0], [-s, 0.0, c]])


def _rot_x(deg: float) -> np.ndarray:
    a = math.radians(deg)
    c, s = math.cos(a), math.sin(a)
    return np.array([[1.0, 0.0, 0.0], [0.0, c, -s], [0.0, s, c]])


def station_rotation(yaw_deg: float, pitch_deg: float = 0.0, roll_deg: float = 0.0) -> np.ndarray:
    """``R = Rz(yaw) Ry(pitch) Rx(roll)`` as in the site contract (scanner frame to site frame)."""
    return _rot_z(yaw_deg) @ _rot_y(pitch_deg) @ _rot_x(roll_deg)


@dataclass(frozen=True)
class Box:
    """An oriented box: centre, half extents along its own axes, and its heading/tilt.

    ``rotation`` maps the box's axes to the scene frame (columns are the box axes).
    """

    center: tuple[float, float, float]
    half: tuple[float, float, float]
    rotation: np.ndarray = field(default_factory=lambda: np.eye(3))
    kind: int = KIND_MACHINE
    object_id: int = 0
    reflectivity: float = 0.35

    @classmethod
    def standing(
        cls,
        x: float,
        y: float,
        z_bottom: float,
        size: tuple[float, float, float],
        heading_deg: float = 0.0,
        *,
        tilt_deg: float = 0.0,
        roll_deg: float = 0.0,
        **kw,
    ) -> "Box":
        """A box whose bottom face centre is at ``(x, y, z_bottom)``, long side along ``heading``."""
        rot = station_rotation(heading_deg, tilt_deg, roll_deg)
        centre = np.array([x, y, z_bottom]) + rot @ np.array([0.0, 0.0, size[2] / 2.0])
        return cls(tuple(centre), (size[0] / 2.0, size[1] / 2.0, size[2] / 2.0), rot, **kw)

    def intersect(self, origin: np.ndarray, dirs: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        rot = np.asarray(self.rotation)
        o = rot.T @ (np.asarray(origin, float) - np.asarray(self.center))
        d = dirs @ rot
        half = np.asarray(self.half)
        with np.errstate(divide="ignore", invalid="ignore"):
            t1 = (-half - o) / d
            t2 = (half - o) / d
        tmin = np.minimum(t1, t2)
        tmax = np.maximum(t1, t2)
        tmin = np.where(np.isnan(tmin), -np.inf, tmin)
        tmax = np.where(np.isnan(tmax), np.inf, tmax)
        axis = np.argmax(tmin, axis=1)
        tnear = tmin[np.arange(len(d)), axis]
        tfar = tmax.min(axis=1)
        hit = (tnear <= tfar) & (tnear > 0.0)
        t = np.where(hit, tnear, _NO_HIT)
        n_local = np.zeros_like(d)
        n_local[np.arange(len(d)), axis] = -np.sign(d[np.arange(len(d)), axis])
        return t, n_local @ rot.T


@dataclass(frozen=True)
class Cylinder:
    """A finite solid cylinder: centre, radius, half length along its axis ``rotation[:, 2]``."""

    center: tuple[float, float, float]
    radius: float
    half_length: float
    rotation: np.ndarray = field(default_factory=lambda: np.eye(3))
    kind: int = KIND_MACHINE
    object_id: int = 0
    reflectivity: float = 0.35

    def intersect(self, origin: np.ndarray, dirs: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        rot = np.asarray(self.rotation)
        o = rot.T @ (np.asarray(origin, float) - np.asarray(self.center))
        d = dirs @ rot
        a = d[:, 0] ** 2 + d[:, 1] ** 2
        b = 2.0 * (o[0] * d[:, 0] + o[1] * d[:, 1])
        c = o[0] ** 2 + o[1] ** 2 - self.radius**2
        disc = b * b - 4.0 * a * c
        with np.errstate(divide="ignore", invalid="ignore"):
            t_side = (-b - np.sqrt(np.where(disc >= 0, disc, np.nan))) / (2.0 * a)
        z_side = o[2] + t_side * d[:, 2]
        ok_side = (disc >= 0) & (a > 1e-15) & (t_side > 0) & (np.abs(z_side) <= self.half_length)
        t_side = np.where(ok_side, t_side, np.inf)
        with np.errstate(divide="ignore", invalid="ignore"):
            cap_z = np.where(d[:, 2] > 0, -self.half_length, self.half_length)
            t_cap = (cap_z - o[2]) / d[:, 2]
        xc = o[0] + t_cap * d[:, 0]
        yc = o[1] + t_cap * d[:, 1]
        ok_cap = np.isfinite(t_cap) & (t_cap > 0) & (xc**2 + yc**2 <= self.radius**2)
        t_cap = np.where(ok_cap, t_cap, np.inf)
        t = np.minimum(t_side, t_cap)
        side = t_side <= t_cap
        p = o + np.where(np.isfinite(t), t, 0.0)[:, None] * d
        n_local = np.where(
            side[:, None],
            np.stack([p[:, 0], p[:, 1], np.zeros(len(d))], axis=1) / self.radius,
            np.stack([np.zeros(len(d)), np.zeros(len(d)), np.sign(-d[:, 2])], axis=1),
        )
        return np.where(np.isfinite(t), t, _NO_HIT), n_local @ rot.T


@dataclass(frozen=True)
class Sphere:
    """A small sphere (a bird)."""

    center: tuple[float, float, float]
    radius: float
    kind: int = KIND_BIRD
    object_id: int = 0
    reflectivity: float = 0.3


@dataclass(frozen=True)
class DustCloud:
    """A spherical cloud of airborne dust.

    A ray crossing ``L`` metres of the cloud returns from the dust with probability
    ``1 - exp(-density_per_m * L)`` at a uniformly drawn point of its path inside the cloud.
    """

    center: tuple[float, float, float]
    radius: float
    density_per_m: float = 0.05
    reflectivity: float = 0.12


def _sphere_chord(center, radius, origin, dirs) -> tuple[np.ndarray, np.ndarray]:
    oc = np.asarray(origin, float) - np.asarray(center, float)
    b = dirs @ oc
    c = oc @ oc - radius**2
    disc = b * b - c
    root = np.sqrt(np.where(disc > 0, disc, 0.0))
    t0 = np.where(disc > 0, -b - root, np.inf)
    t1 = np.where(disc > 0, -b + root, -np.inf)
    return t0, t1


@dataclass
class Scene:
    """What a scanner can see.

    Parameters
    ----------
    height : callable ``(x, y) -> z``
        The true terrain surface (pad and piles), vectorised over arrays.
    surface_info : callable ``(x, y) -> (pile, reflectivity)``
        For terrain points: 1-based pile index (0 on the pad) as integers and the reflectivity.
    solids : sequence of Box / Cylinder
    dust : sequence of DustCloud
    birds : sequence of Sphere
    """

    height: Callable[[np.ndarray, np.ndarray], np.ndarray]
    surface_info: Callable[[np.ndarray, np.ndarray], tuple[np.ndarray, np.ndarray]]
    solids: Sequence[Solid] = ()
    dust: Sequence[DustCloud] = ()
    birds: Sequence[Sphere] = ()


def raster_scene(
    z: np.ndarray,
    west: float,
    north: float,
    cell: float,
    *,
    pile: np.ndarray | None = None,
    reflectivity: float | np.ndarray = 0.3,
    solids: Sequence[Solid] = (),
    dust: Sequence[DustCloud] = (),
    birds: Sequence[Sphere] = (),
) -> Scene:
    """A scene whose terrain is a north-up raster, interpolated bilinearly between cell centres.

    Parameters
    ----------
    z : (nrows, ncols) array
        Heights at cell centres; row 0 is the northern edge (GeoTIFF order). Outside the raster
        the edge values continue.
    west, north, cell : float
        Outer corner of cell (0, 0) and the cell size (scene units, metres).
    pile : (nrows, ncols) int array, optional
        1-based pile index per cell (0 = ground), taken from the nearest cell.
    reflectivity : float or (nrows, ncols) array
        Reflectivity per cell (nearest cell) or one value.
    solids, dust, birds : as in :class:`Scene`

    Examples
    --------
    >>> import numpy as np
    >>> z = np.add.outer(-np.arange(4.0), np.arange(5.0)) * 0.1    # a plane rising east and north
    >>> sc = raster_scene(z, west=0.0, north=4.0, cell=1.0)
    >>> float(np.round(sc.height(np.array([2.5]), np.array([1.5]))[0], 6))
    0.0
    """
    z = np.asarray(z, dtype=float)
    nrows, ncols = z.shape
    pile_arr = np.zeros(z.shape, dtype=int) if pile is None else np.asarray(pile, dtype=int)
    refl_arr = np.broadcast_to(np.asarray(reflectivity, dtype=float), z.shape)

    def frac_index(x, y):
        fx = np.clip((np.asarray(x) - west) / cell - 0.5, 0.0, ncols - 1.0)
        fy = np.clip((north - np.asarray(y)) / cell - 0.5, 0.0, nrows - 1.0)
        return fx, fy

    def height(x, y):
        fx, fy = frac_index(x, y)
        c0 = np.minimum(np.floor(fx).astype(int), max(ncols - 2, 0))
        r0 = np.minimum(np.floor(fy).astype(int), max(nrows - 2, 0))
        c1 = np.minimum(c0 + 1, ncols - 1)
        r1 = np.minimum(r0 + 1, nrows - 1)
        tx, ty = fx - c0, fy - r0
        top = z[r0, c0] * (1 - tx) + z[r0, c1] * tx
        bottom = z[r1, c0] * (1 - tx) + z[r1, c1] * tx
        return top * (1 - ty) + bottom * ty

    def info(x, y):
        fx, fy = frac_index(x, y)
        r = np.rint(fy).astype(int)
        c = np.rint(fx).astype(int)
        return pile_arr[r, c], refl_arr[r, c]

    return Scene(height, info, solids, dust, birds)


@dataclass(frozen=True)
class Station:
    """A scanner set up at ``(x, y, z)`` (the optical centre) with its heading and tilt.

    The ray pattern starts at azimuth ``yaw_deg`` and steps ``az_step_deg`` round a full turn;
    elevations step ``el_step_deg`` from ``el_min_deg`` to ``el_max_deg``. ``profile_range_m`` is
    how far the terrain is looked at; nothing farther can return.
    """

    station_id: str
    x: float
    y: float
    z: float
    yaw_deg: float = 0.0
    pitch_deg: float = 0.0
    roll_deg: float = 0.0
    az_step_deg: float = 0.3
    el_step_deg: float = 0.3
    el_min_deg: float = -50.0
    el_max_deg: float = 40.0
    profile_range_m: float = 100.0
    scan_seconds: float = 300.0

    @property
    def origin(self) -> np.ndarray:
        return np.array([self.x, self.y, self.z], dtype=float)

    def azimuths_deg(self) -> np.ndarray:
        n = int(round(360.0 / self.az_step_deg))
        return self.yaw_deg + np.arange(n) * self.az_step_deg

    def elevations_deg(self) -> np.ndarray:
        n = int(math.floor((self.el_max_deg - self.el_min_deg) / self.el_step_deg + 1e-9)) + 1
        return self.el_min_deg + np.arange(n) * self.el_step_deg


# Industrial-class scanners reach about 80 m on bright targets and about 30 m on dark coal
# (common practice, from the issue brief). The lidar equation for an extended diffuse target
# gives received power ~ reflectivity * cos(incidence) / range^2, so the range at which the
# signal drops to the detection threshold scales with sqrt(reflectivity): 80 m at 0.6 and
# 80 * sqrt(0.085 / 0.6) = 30 m at coal's 0.085.
MAX_RANGE_BRIGHT_M = 80.0
BRIGHT_REFLECTIVITY = 0.6


def max_range_for(reflectivity: float | np.ndarray, model: "ScannerModel | None" = None) -> np.ndarray:
    """Range at normal incidence beyond which a target of this reflectivity is not detected."""
    m = model or ScannerModel()
    return m.max_range_m * np.sqrt(np.asarray(reflectivity, float) / m.reference_reflectivity)


@dataclass(frozen=True)
class ScannerModel:
    """The scanner's error and detection model.

    ``range_sd_near_m`` at zero range growing linearly to ``range_sd_far_m`` at the target's
    maximum range (1-3 cm, common practice for industrial scanners). Detection falls off
    smoothly around the maximum range, which shrinks at grazing incidence as
    ``cos(incidence) ** incidence_exponent`` (rough bulk surfaces scatter more evenly than a
    Lambertian plate, hence the small exponent). ``limit_range=False`` turns range loss and
    dropouts off (a perfect scanner for reference checks).
    """

    range_sd_near_m: float = 0.010
    range_sd_far_m: float = 0.025
    max_range_m: float = MAX_RANGE_BRIGHT_M
    reference_reflectivity: float = BRIGHT_REFLECTIVITY
    incidence_exponent: float = 0.25
    dropout_width: float = 0.03
    limit_range: bool = True
    min_range_m: float = 0.6
    ghost_rate: float = 2.5e-4
    ghost_range_m: tuple[float, float] = (110.0, 420.0)


@dataclass
class ScanResult:
    """The points of one station, in the scene frame, with per-point truth labels.

    ``kind`` uses the ``KIND_*`` codes; ``pile`` is the 1-based pile index for ``KIND_PILE``
    points (0 otherwise); ``object_id`` names the solid, dust cloud or bird (0 for terrain);
    ``true_range_m`` is the noise-free range; ``time_s`` seconds since the scan started.
    """

    xyz: np.ndarray
    range_m: np.ndarray
    true_range_m: np.ndarray
    intensity: np.ndarray
    kind: np.ndarray
    pile: np.ndarray
    object_id: np.ndarray
    time_s: np.ndarray
    column: np.ndarray
    row: np.ndarray

    def __len__(self) -> int:
        return len(self.range_m)


def _terrain_first_hit(
    scene: Scene, origin: np.ndarray, az: np.ndarray, el: np.ndarray, r_max: float, dr: float, iters: int
) -> np.ndarray:
    """Slant range of the first terrain hit for every (azimuth, elevation) ray, inf if none."""
    nr = int(math.ceil(r_max / dr))
    r = (np.arange(nr) + 1) * dr
    tan_el = np.tan(el)
    out = np.full((len(az), len(el)), np.inf)
    chunk = max(1, 400_000 // nr)
    for a0 in range(0, len(az), chunk):
        a = az[a0 : a0 + chunk]
        ca, sa = np.cos(a)[:, None], np.sin(a)[:, None]
        z = scene.height(origin[0] + r[None, :] * ca, origin[1] + r[None, :] * sa)
        phi = np.arctan2(z - origin[2], r[None, :])
        run = np.maximum.accumulate(phi, axis=1)
        # One sorted row per azimuth: offset rows so one searchsorted serves them all.
        offset = 10.0 * np.arange(len(a))[:, None]
        idx = np.searchsorted((run + offset).ravel(), (el[None, :] + offset).ravel(), side="left")
        idx = idx.reshape(len(a), len(el)) - nr * np.arange(len(a))[:, None]
        hit = idx < nr
        ka, ke = np.nonzero(hit)
        j = idx[ka, ke]
        lo = np.where(j > 0, r[np.maximum(j - 1, 0)], 0.0)
        hi = r[j]
        cak, sak, tk = ca[ka, 0], sa[ka, 0], tan_el[ke]
        for _ in range(iters):
            mid = 0.5 * (lo + hi)
            above = origin[2] + mid * tk > scene.height(origin[0] + mid * cak, origin[1] + mid * sak)
            lo = np.where(above, mid, lo)
            hi = np.where(above, hi, mid)
        rr = 0.5 * (lo + hi)
        out[a0 + ka, ke] = rr / np.cos(el[ke])
    return out


def _bounding_radius(solid) -> float:
    if isinstance(solid, Box):
        return float(np.linalg.norm(solid.half))
    if isinstance(solid, Cylinder):
        return float(math.hypot(solid.radius, solid.half_length))
    return math.inf


def _in_cone(origin: np.ndarray, dirs: np.ndarray, center: np.ndarray, radius: float) -> np.ndarray:
    """Indices of the rays that can meet a sphere (a cheap cull before exact intersection)."""
    v = center - origin
    dist = float(np.linalg.norm(v))
    if not math.isfinite(radius) or dist <= radius * 1.001:
        return np.arange(len(dirs))
    cos_half = math.sqrt(1.0 - (radius / dist) ** 2)
    return np.nonzero(dirs @ (v / dist) >= cos_half - 1e-9)[0]


def _terrain_normal(scene: Scene, x: np.ndarray, y: np.ndarray, eps: float = 0.02) -> np.ndarray:
    hx = (scene.height(x + eps, y) - scene.height(x - eps, y)) / (2 * eps)
    hy = (scene.height(x, y + eps) - scene.height(x, y - eps)) / (2 * eps)
    n = np.stack([-hx, -hy, np.ones_like(hx)], axis=1)
    return n / np.linalg.norm(n, axis=1, keepdims=True)


def scan(
    scene: Scene,
    station: Station,
    model: ScannerModel | None = None,
    rng: np.random.Generator | None = None,
    *,
    profile_step_m: float = 0.05,
    bisection_steps: int = 16,
) -> ScanResult:
    """Scan ``scene`` from ``station``.

    Parameters
    ----------
    scene : Scene
    station : Station
    model : ScannerModel, optional
        Noise and detection model; the default is the industrial-scanner model.
    rng : numpy.random.Generator, optional
        Source of all randomness (noise, dropouts, dust, ghosts); default seed 0.
    profile_step_m : float
        Horizontal sampling step of the terrain along each azimuth (occlusion resolution).
    bisection_steps : int
        Refinement steps of each terrain crossing (final error ``profile_step_m / 2**steps``).

    Returns
    -------
    ScanResult
        Points in scan order (azimuth column by column, elevations upwards), scene frame.

    Examples
    --------
    >>> import numpy as np
    >>> flat = Scene(height=lambda x, y: np.zeros(np.shape(x)),
    ...              surface_info=lambda x, y: (np.zeros(np.shape(x), int), np.full(np.shape(x), 0.3)))
    >>> st = Station("A", 0.0, 0.0, 2.0, az_step_deg=10, el_step_deg=5, el_min_deg=-60, el_max_deg=0)
    >>> res = scan(flat, st, ScannerModel(limit_range=False, range_sd_near_m=0, range_sd_far_m=0, ghost_rate=0))
    >>> bool(np.allclose(res.xyz[:, 2], 0.0, atol=1e-6))
    True
    """
    model = model or ScannerModel()
    rng = rng if rng is not None else np.random.default_rng(0)
    origin = station.origin
    az = np.radians(station.azimuths_deg())
    el = np.radians(station.elevations_deg())
    n_az, n_el = len(az), len(el)

    t_terrain = _terrain_first_hit(scene, origin, az, el, station.profile_range_m, profile_step_m, bisection_steps)

    # All rays, column-major in scan order: index = k_az * n_el + i_el.
    col = np.repeat(np.arange(n_az), n_el)
    row = np.tile(np.arange(n_el), n_az)
    ce = np.cos(el)[row]
    dirs = np.stack([ce * np.cos(az)[col], ce * np.sin(az)[col], np.sin(el)[row]], axis=1)
    t_hit = t_terrain.ravel()
    kind = np.full(len(t_hit), KIND_PAD, dtype=np.uint8)
    obj = np.zeros(len(t_hit), dtype=np.uint8)
    refl = np.zeros(len(t_hit))
    normal = np.zeros((len(t_hit), 3))
    solid_hit = np.zeros(len(t_hit), dtype=bool)
    for solid in scene.solids:
        cand = _in_cone(origin, dirs, np.asarray(solid.center, float), _bounding_radius(solid))
        t, n = solid.intersect(origin, dirs[cand])
        closer = t < t_hit[cand]
        sel = cand[closer]
        t_hit[sel] = t[closer]
        kind[sel] = solid.kind
        obj[sel] = solid.object_id
        refl[sel] = solid.reflectivity
        normal[sel] = n[closer]
        solid_hit[sel] = True

    terrain = np.isfinite(t_hit) & ~solid_hit
    p_terrain = origin + t_hit[terrain, None] * dirs[terrain]
    pile = np.zeros(len(t_hit), dtype=np.uint8)
    pid, rho = scene.surface_info(p_terrain[:, 0], p_terrain[:, 1])
    pile[terrain] = np.asarray(pid, dtype=np.uint8)
    kind[terrain] = np.where(pile[terrain] > 0, KIND_PILE, KIND_PAD)
    refl[terrain] = rho
    normal[terrain] = _terrain_normal(scene, p_terrain[:, 0], p_terrain[:, 1])

    # Dust in front of the hit: the first cloud that returns wins.
    for i, cloud in enumerate(scene.dust):
        near = _in_cone(origin, dirs, np.asarray(cloud.center, float), cloud.radius)
        t0, t1 = _sphere_chord(cloud.center, cloud.radius, origin, dirs[near])
        t0 = np.maximum(t0, 0.0)
        t1 = np.minimum(t1, t_hit[near])
        length = np.clip(t1 - t0, 0.0, None)
        inside = np.nonzero(length > 0)[0]
        if len(inside) == 0:
            continue
        p_ret = 1.0 - np.exp(-cloud.density_per_m * length[inside])
        hit = inside[rng.random(len(inside)) < p_ret]
        ret = near[hit]
        t_d = t0[hit] + rng.random(len(hit)) * length[hit]
        t_hit[ret] = t_d
        kind[ret] = KIND_DUST
        obj[ret] = i + 1
        pile[ret] = 0
        refl[ret] = cloud.reflectivity
        normal[ret] = -dirs[ret]
    for i, bird in enumerate(scene.birds):
        near = _in_cone(origin, dirs, np.asarray(bird.center, float), bird.radius)
        t0, _ = _sphere_chord(bird.center, bird.radius, origin, dirs[near])
        closer = (t0 > 0) & (t0 < t_hit[near])
        sel = near[closer]
        t_hit[sel] = t0[closer]
        kind[sel] = KIND_BIRD
        obj[sel] = i + 1
        pile[sel] = 0
        refl[sel] = bird.reflectivity
        p = origin + t0[closer, None] * dirs[sel]
        normal[sel] = (p - np.asarray(bird.center)) / bird.radius

    finite = np.isfinite(t_hit)
    cos_inc = np.ones(len(t_hit))
    cos_inc[finite] = np.abs(np.einsum("ij,ij->i", dirs[finite], normal[finite]))
    r_eff = max_range_for(np.maximum(refl, 1e-3), model) * np.maximum(cos_inc, 0.02) ** model.incidence_exponent
    keep = finite & (t_hit >= model.min_range_m)
    if model.limit_range:
        # Detection probability falls smoothly from 1 to 0 around the effective maximum range.
        width = model.dropout_width * r_eff
        with np.errstate(over="ignore"):
            p_det = 1.0 / (1.0 + np.exp((t_hit - r_eff) / width))
        keep &= rng.random(len(t_hit)) < np.where(finite, p_det, 0.0)

    # Long-range ghosts on rays that found nothing.
    sky = ~finite
    ghost = sky & (rng.random(len(t_hit)) < model.ghost_rate)
    g_lo, g_hi = model.ghost_range_m
    t_hit[ghost] = g_lo + rng.random(int(ghost.sum())) * (g_hi - g_lo)
    kind[ghost] = KIND_GHOST
    refl[ghost] = 0.05
    cos_inc[ghost] = 1.0
    r_eff[ghost] = g_hi
    keep |= ghost

    idx = np.nonzero(keep)[0]
    t_true = t_hit[idx]
    frac = np.clip(t_true / r_eff[idx], 0.0, 1.0)
    sd = model.range_sd_near_m + (model.range_sd_far_m - model.range_sd_near_m) * frac
    t_meas = t_true + sd * rng.standard_normal(len(idx))
    xyz = origin + t_meas[:, None] * dirs[idx]
    # Raw intensity: brighter for reflective targets at normal incidence, fading with range.
    raw = refl[idx] * np.sqrt(cos_inc[idx]) * (1.0 - 0.6 * frac)
    intensity = np.clip(raw * 60000.0 * (1.0 + 0.03 * rng.standard_normal(len(idx))), 1, 65535).astype(np.uint16)
    time_s = (col[idx] + row[idx] / n_el) * (station.scan_seconds / n_az)
    return ScanResult(
        xyz=xyz,
        range_m=t_meas,
        true_range_m=t_true,
        intensity=intensity,
        kind=kind[idx],
        pile=pile[idx],
        object_id=obj[idx],
        time_s=time_s,
        column=col[idx],
        row=row[idx],
    )


def to_station_frame(xyz: np.ndarray, station: Station) -> np.ndarray:
    """Scene points in the scanner's own frame.

    The inverse of ``p_site = R p_scanner + (x, y, z)`` with ``R`` from :func:`station_rotation`.
    """
    rot = station_rotation(station.yaw_deg, station.pitch_deg, station.roll_deg)
    return (np.asarray(xyz) - station.origin) @ rot
