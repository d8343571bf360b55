"""A scanner on a stacker boom that scans while the machine slews, luffs and travels.

The demo's third kind of survey: a 3D scanner head mounted at the boom tip turns about its own
vertical axis and sweeps a fan of elevations, while the machine moves along a smooth, known
path. Every ray leaves from the scanner's pose at the ray's own instant, so the cloud written
in the scanner's frame can only be placed correctly with the trajectory
(:mod:`inventory.model.pose`); placed with one constant pose it is smeared.

Rays are cast against the terrain heightfield only (pad and piles, the ``height`` callable of
:class:`inventory._demo.simulate.Scene`): each ray has its own origin, which the static-station
caster does not support. Solids (the machine itself, walls) are not seen by this scanner.

Ray casting is sphere tracing on a heightfield: with surface slopes at most ``s``, a point of
the ray a height ``g`` above the surface is at least ``g / sqrt(1 + s**2)`` from it, so the
ray can advance that far without passing through the surface; it stops within ``tol`` of it
(J. C. Hart, "Sphere tracing", The Visual Computer 12, 1996; from memory).

Written files (see :func:`write_machine_survey`): ``<name>.laz`` with the points in the scanner
frame and their adjusted standard GPS time, and ``trajectory.csv`` in the survey folder.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Callable

import laspy
import numpy as np
import pandas as pd

from inventory.io.atomic import atomic_path
from inventory.model.pose import (
    Machine,
    Trajectory,
    adjusted_gps_time,
    euler_rotation,
    machine_poses,
    utc_from_adjusted_gps,
)

__all__ = [
    "MachineMotion",
    "ScannerHead",
    "MachineScan",
    "cast_rays",
    "simulate_machine_scan",
    "write_machine_survey",
    "demo_stacker",
    "demo_motion",
    "write_demo_machine_survey",
]

Height = Callable[[np.ndarray, np.ndarray], np.ndarray]


@dataclass(frozen=True)
class MachineMotion:
    """Machine axes moving from a start to an end value over ``duration_s``.

    Each axis follows a cosine ramp (zero speed at both ends, peak acceleration mid-ramp), the
    way drives accelerate and brake.
    """

    duration_s: float
    travel_m: tuple[float, float] = (0.0, 0.0)
    slew_deg: tuple[float, float] = (0.0, 0.0)
    luff_deg: tuple[float, float] = (0.0, 0.0)

    def axes_at(self, t: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """``(travel_m, slew_deg, luff_deg)`` at seconds ``t`` since the start."""
        u = np.clip(np.asarray(t, float) / self.duration_s, 0.0, 1.0)
        ramp = 0.5 * (1.0 - np.cos(math.pi * u))
        return tuple(a + (b - a) * ramp for a, b in (self.travel_m, self.slew_deg, self.luff_deg))  # type: ignore[return-value]


@dataclass(frozen=True)
class ScannerHead:
    """A 3D scanner head: turns ``turn_deg`` about its z axis over the scan, one elevation
    fan (``el_min_deg`` to ``el_max_deg`` in ``el_step_deg``) per ``az_step_deg``."""

    turn_deg: float = 360.0
    az_step_deg: float = 0.5
    el_min_deg: float = -85.0
    el_max_deg: float = -15.0
    el_step_deg: float = 0.5

    def pattern(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Azimuth, elevation (degrees) and scan fraction in [0, 1) of every ray, in scan order."""
        n_az = int(round(self.turn_deg / self.az_step_deg))
        n_el = int(math.floor((self.el_max_deg - self.el_min_deg) / self.el_step_deg + 1e-9)) + 1
        col = np.repeat(np.arange(n_az), n_el)
        row = np.tile(np.arange(n_el), n_az)
        frac = (col + row / n_el) / n_az
        return col * self.az_step_deg, self.el_min_deg + row * self.el_step_deg, frac


@dataclass
class MachineScan:
    """One simulated machine scan.

    ``points`` are in the scanner frame (metres), ``gps_time`` adjusted standard GPS time (s),
    ``true_xyz`` the noise-free hits in the site CRS, ``range_m`` the measured ranges;
    ``samples`` the logged axes (``gps_time, travel_m, slew_deg, luff_deg``) at the trajectory
    rate; ``machine`` the geometry used.
    """

    points: np.ndarray
    gps_time: np.ndarray
    true_xyz: np.ndarray
    range_m: np.ndarray
    samples: pd.DataFrame
    machine: Machine
    start_utc: datetime

    def trajectory(self) -> Trajectory:
        """The logged samples as a boom-tip trajectory with the machine's lever arm and boresight."""
        s = self.samples
        return Trajectory.from_machine_axes(s["gps_time"].to_numpy(), self.machine, s["travel_m"].to_numpy(),
                                            s["slew_deg"].to_numpy(), s["luff_deg"].to_numpy())


def cast_rays(height: Height, origins: np.ndarray, dirs: np.ndarray, *, max_slope: float,
              max_range_m: float, tol_m: float = 1e-4, max_steps: int = 2000) -> np.ndarray:
    """Distance along each unit ray to its first terrain hit, ``inf`` for none.

    ``height`` must be vectorised. Where its slope is steeper than ``max_slope`` (rise over
    run) a ray may step into the terrain; the crossing is then found by bisection, but a
    feature thinner than one step may be missed. A ray starting below the terrain returns 0.
    """
    origins = np.asarray(origins, float)
    dirs = np.asarray(dirs, float)
    origins, dirs = np.broadcast_arrays(origins, dirs)
    n = len(dirs)
    t = np.zeros(n)
    hit = np.full(n, np.inf)
    k = 1.0 / math.sqrt(1.0 + max_slope * max_slope)
    above_t = np.zeros(n)  # the last ray parameter known to lie above the terrain
    active = np.arange(n)
    # Rays that stepped into terrain steeper than max_slope; bracketed, then bisected below.
    under_idx: list[np.ndarray] = []
    under_t: list[np.ndarray] = []
    for _ in range(max_steps):
        if len(active) == 0:
            break
        ta = t[active]
        p = origins[active] + ta[:, None] * dirs[active]
        gap = p[:, 2] - height(p[:, 0], p[:, 1])
        done = np.abs(gap) < tol_m
        hit[active[done]] = ta[done]
        below = gap <= -tol_m
        under_idx.append(active[below])
        under_t.append(ta[below])
        up = gap > 0
        above_t[active[up]] = ta[up]
        t[active] = ta + gap * k
        alive = ~done & up & (t[active] <= max_range_m)
        active = active[alive]
    if under_idx:
        idx = np.concatenate(under_idx)
        lo, hi = above_t[idx], np.concatenate(under_t)
        for _ in range(40):
            mid = 0.5 * (lo + hi)
            p = origins[idx] + mid[:, None] * dirs[idx]
            above = p[:, 2] > height(p[:, 0], p[:, 1])
            lo = np.where(above, mid, lo)
            hi = np.where(above, hi, mid)
        hit[idx] = 0.5 * (lo + hi)
    return hit


def simulate_machine_scan(height: Height, machine: Machine, motion: MachineMotion,
                          head: ScannerHead | None = None, *, start_utc: datetime,
                          max_slope: float, range_sd_m: float = 0.01, max_range_m: float = 60.0,
                          min_range_m: float = 0.6, trajectory_rate_hz: float = 10.0,
                          rng: np.random.Generator | None = None) -> MachineScan:
    """Scan ``height`` from the scanner at the boom tip of ``machine`` moving by ``motion``.

    Parameters
    ----------
    height : callable ``(x, y) -> z``
        The terrain in the site CRS, vectorised.
    machine : Machine
        Geometry, lever arm and boresight of the scanner.
    motion : MachineMotion
        The true (continuous) axes; every ray uses the pose at its own instant.
    head : ScannerHead, optional
    start_utc : datetime
        Instant of the first ray (tz-aware, 2017 or later).
    max_slope : float
        Steepest terrain slope (rise over run), for the ray caster.
    range_sd_m : float
        Gaussian range noise, 1 sigma (1-3 cm is common practice for industrial scanners).
    max_range_m, min_range_m : float
        Hits farther or nearer are not returned.
    trajectory_rate_hz : float
        Logging rate of the machine axes written to ``samples``.
    rng : numpy.random.Generator, optional
        Default seed 0.
    """
    head = head or ScannerHead()
    rng = rng if rng is not None else np.random.default_rng(0)
    t0 = adjusted_gps_time(start_utc)
    az, el, frac = head.pattern()
    dt = frac * motion.duration_s
    travel, slew, luff = motion.axes_at(dt)
    tip, roll, pitch, yaw = machine_poses(machine, travel, slew, luff)
    body = euler_rotation(roll, pitch, yaw)
    bore = euler_rotation(*machine.boresight_deg)
    a, e = np.radians(az), np.radians(el)
    d_scanner = np.stack([np.cos(e) * np.cos(a), np.cos(e) * np.sin(a), np.sin(e)], axis=1)
    origins = body.apply(np.tile(machine.scanner_lever_arm_m, (len(az), 1))) + tip
    dirs = body.apply(bore.apply(d_scanner))
    t_hit = cast_rays(height, origins, dirs, max_slope=max_slope, max_range_m=max_range_m)
    ok = np.isfinite(t_hit) & (t_hit >= min_range_m)
    rng_true = t_hit[ok]
    rng_meas = rng_true + range_sd_m * rng.standard_normal(len(rng_true))
    sample_t = np.arange(0.0, motion.duration_s + 1e-9, 1.0 / trajectory_rate_hz)
    if sample_t[-1] < motion.duration_s:
        sample_t = np.append(sample_t, motion.duration_s)
    s_travel, s_slew, s_luff = motion.axes_at(sample_t)
    samples = pd.DataFrame({"gps_time": t0 + sample_t, "travel_m": s_travel, "slew_deg": s_slew,
                            "luff_deg": s_luff})
    return MachineScan(
        points=rng_meas[:, None] * d_scanner[ok],
        gps_time=t0 + dt[ok],
        true_xyz=origins[ok] + rng_true[:, None] * dirs[ok],
        range_m=rng_meas,
        samples=samples,
        machine=machine,
        start_utc=start_utc,
    )


def _iso(gps_time: np.ndarray) -> list[str]:
    return [utc_from_adjusted_gps(float(t)).isoformat(timespec="milliseconds") for t in gps_time]


def _write_las(path: Path, points: np.ndarray, gps_time: np.ndarray, range_m: np.ndarray,
               start_utc: datetime) -> None:
    header = laspy.LasHeader(point_format=6, version="1.4")
    # Fixed header texts and the scan's own date (laspy would write today's date and its
    # version), so the same scan gives the same bytes.
    header.creation_date = start_utc.astimezone(timezone.utc).date()
    header.generating_software = "inventory sample (simulated)"
    header.system_identifier = "simulated machine-mounted scanner"
    header.scales = np.array([0.001, 0.001, 0.001])  # 1 mm, below the ranging noise (common practice)
    header.offsets = np.zeros(3)
    # Global encoding bit 0: GPS times are adjusted standard GPS time (ASPRS LAS 1.4 R15).
    header.global_encoding.gps_time_type = laspy.header.GpsTimeType.STANDARD
    las = laspy.LasData(header)
    las.x, las.y, las.z = points[:, 0], points[:, 1], points[:, 2]
    las.gps_time = gps_time
    # Intensity fading with range, only so that the file looks like a scan.
    las.intensity = np.clip(40000.0 * (1.0 - range_m / 120.0), 1, 65535).astype(np.uint16)
    las.return_number = np.ones(len(points), np.uint8)
    las.number_of_returns = np.ones(len(points), np.uint8)
    # Written to an open file, laspy compresses only when asked: a .laz must hold LAZ data.
    with atomic_path(path) as tmp, open(tmp, "wb+") as out:
        las.write(out, do_compress=path.suffix.lower() == ".laz")


def _write_csv(path: Path, frame: pd.DataFrame) -> None:
    with atomic_path(path) as tmp:
        frame.to_csv(tmp, index=False, float_format="%.6f")


def write_machine_survey(folder: str | Path, scan: MachineScan, *, name: str = "machine_scan.laz",
                         variant: str = "pose") -> tuple[Path, Path]:
    """Write the scan's cloud (scanner frame) and ``trajectory.csv`` into a survey folder.

    ``variant="pose"`` writes the scanner's own pose (lever arm and boresight folded in), which
    needs nothing in ``site.toml``; ``variant="axes"`` writes the machine axes and its id, which
    needs ``[machines.<id>]`` there. Returns the two paths.
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    cloud = folder / name
    _write_las(cloud, scan.points, scan.gps_time, scan.range_m, scan.start_utc)
    s = scan.samples
    t = s["gps_time"].to_numpy()
    table = pd.DataFrame({"file": [name] * len(s)})
    if variant == "axes":
        table["machine"] = scan.machine.id
    table["gps_time"] = t
    table["time"] = _iso(t)
    if variant == "axes":
        table["travel_m"], table["slew_deg"], table["luff_deg"] = s["travel_m"], s["slew_deg"], s["luff_deg"]
    elif variant == "pose":
        traj = scan.trajectory()
        rot = traj.rotation * euler_rotation(*scan.machine.boresight_deg)
        xyz = traj.rotation.apply(np.tile(scan.machine.scanner_lever_arm_m, (len(t), 1))) + traj.position
        yaw, pitch, roll = rot.as_euler("ZYX", degrees=True).T
        table["x"], table["y"], table["z"] = xyz[:, 0], xyz[:, 1], xyz[:, 2]
        table["roll_deg"], table["pitch_deg"], table["yaw_deg"] = roll, pitch, yaw
    else:
        raise ValueError(f"variant must be 'pose' or 'axes', not {variant!r}")
    path = folder / "trajectory.csv"
    _write_csv(path, table)
    return cloud, path



# ------------------------------------------------------------------------ the demo terminal

#: The demo stacker as :func:`inventory._demo.scenario.terminal_at` places it (local frame):
#: rails along local x at y = 120.5, slew axis at x = 80 (survey 0) or 88 (survey 1), luff
#: pivot 12 m above the pad, 26 m boom whose nose is 4 degrees down, pointing south.
_STACKER_RAIL_Y = 120.5
_STACKER_X = (80.0, 88.0)
_STACKER_PIVOT_H = 12.0
_STACKER_BOOM_M = 26.0
_STACKER_LUFF_DEG = -4.0
_STACKER_SLEW_DEG = -90.0

#: The demo machine scan: one head turn in 60 s while the boom slews 60 degrees onto its
#: parked heading over C2, travels 6 m and luffs 2 degrees.
DEMO_MOTION_SECONDS = 60.0


def demo_stacker(k: int) -> Machine:
    """The demo stacker (site CRS) at survey ``k``, with a scanner hung 1 m under its boom tip.

    Its travel axis is the local x coordinate of the slew axis; the scanner's boresight
    levels it for the parked luff and adds a small mounting error (0.3, 0.4, 0.8 degrees).
    """
    from inventory._demo.scenario import SITE_ORIGIN, pad_height

    z0 = float(pad_height(_STACKER_X[k], _STACKER_RAIL_Y))
    return Machine(
        id="stacker",
        rail_origin=np.array([SITE_ORIGIN[0], SITE_ORIGIN[1] + _STACKER_RAIL_Y, z0]),
        rail_azimuth_deg=0.0,
        pivot_height_m=_STACKER_PIVOT_H,
        boom_length_m=_STACKER_BOOM_M,
        scanner_lever_arm_m=np.array([0.0, 0.0, -1.0]),
        boresight_deg=np.array([0.3, _STACKER_LUFF_DEG + 0.4, 0.8]),
    )


def demo_motion(k: int) -> MachineMotion:
    """Axes of the demo machine scan at survey ``k``: ends parked as the static scans see it."""
    x = _STACKER_X[k]
    return MachineMotion(DEMO_MOTION_SECONDS, travel_m=(x - 6.0, x),
                         slew_deg=(_STACKER_SLEW_DEG - 60.0, _STACKER_SLEW_DEG),
                         luff_deg=(_STACKER_LUFF_DEG + 2.0, _STACKER_LUFF_DEG))



def write_demo_machine_survey(folder: str | Path, terminal, k: int, start_utc: datetime, *, seed: int = 0,
                              variant: str = "pose", log_delay_s: float = 0.0) -> MachineScan:
    """Scan the demo terminal from the stacker boom at survey ``k`` and write it to ``folder``.

    Writes ``machine_scan.laz`` (scanner frame, adjusted standard GPS time) and
    ``trajectory.csv`` (see :func:`write_machine_survey`). ``terminal`` is
    :func:`inventory._demo.scenario.terminal_at`'s result; only its terrain (pad and piles) is
    scanned. Finish the scan before the static stations start: the boom ends parked where
    they see it. Returns the scan (its ``true_xyz`` and ``samples`` are the truth).

    ``log_delay_s`` starts the machine's log that long after the scanner's first ray (a
    logger switched on late): the points before the first logged sample cannot be placed, and
    the returned scan's ``samples`` are the logged ones.
    """
    from inventory._demo.scenario import SITE_ORIGIN

    ox, oy = SITE_ORIGIN[0], SITE_ORIGIN[1]

    def height(x: np.ndarray, y: np.ndarray) -> np.ndarray:
        return terminal.height(np.asarray(x) - ox, np.asarray(y) - oy)

    machine = demo_stacker(k)
    scan = simulate_machine_scan(
        height, machine, demo_motion(k), ScannerHead(el_min_deg=-85.0, el_max_deg=-12.0), start_utc=start_utc,
        max_slope=1.0, range_sd_m=0.012, max_range_m=45.0, rng=np.random.default_rng([seed, 9, k]))
    if log_delay_s > 0:
        t0 = adjusted_gps_time(start_utc)
        logged = scan.samples[scan.samples["gps_time"] >= t0 + log_delay_s - 1e-6].reset_index(drop=True)
        scan = dataclasses.replace(scan, samples=logged)
    write_machine_survey(folder, scan, variant=variant)
    return scan
