"""Placing the points of a moving scanner with the pose at each point's own instant.

Rotations in the site convention (``R = Rz(yaw) @ Ry(pitch) @ Rx(roll)``, degrees),
trajectories of a scanner's body or of a rail-mounted machine's axes (:class:`Trajectory`,
:class:`Machine`, :func:`machine_poses`) interpolated at each point's time (position
linearly, orientation by Slerp), and conversions between UTC and adjusted standard GPS time.

The direct-georeferencing equation, the conventions, the time base and the time checks:
docs/surveys.md.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone
from typing import Any

import numpy as np
from scipy.spatial.transform import Rotation, Slerp


__all__ = [
    "DEFAULT_MAX_GAP_S", "MAX_TURN_PER_SAMPLE_DEG", "GPS_EPOCH", "GPS_UTC_LEAP_S", "LEAP_VALID_FROM",
    "ADJUSTED_GPS_OFFSET_S", "GPS_WEEK_S", "POSE_FIELDS", "AXIS_FIELDS", "MACHINE_AXES_KEYS",
    "Machine", "Trajectory", "adjusted_gps_time", "euler_rotation", "machine_poses", "rotation_matrix",
    "utc_from_adjusted_gps",
]

#: A trajectory interval longer than this is a logging dropout, not a sampling step, and is
#: not bridged by interpolation. Machine encoders and GNSS/INS log at 10-200 Hz, so a second
#: without a sample means data were lost (our choice; common practice is 10x the log period).
DEFAULT_MAX_GAP_S = 1.0

#: Slerp takes the shorter way between two orientations, so a turn of more than 180 degrees
#: between samples is silently misread; more than 90 degrees is refused as too coarse
#: (our choice: half the ambiguity limit).
MAX_TURN_PER_SAMPLE_DEG = 90.0

#: GPS time starts at 1980-01-06 00:00:00 UTC (IS-GPS-200, section 20.3.3.5.2.4; from memory).
GPS_EPOCH = datetime(1980, 1, 6, tzinfo=timezone.utc)
#: GPS time runs ahead of UTC by the leap seconds since 1980: 18 s since 2017-01-01 (IERS
#: Bulletin C; no leap second announced since, from memory). Earlier instants are refused.
GPS_UTC_LEAP_S = 18
LEAP_VALID_FROM = datetime(2017, 1, 1, tzinfo=timezone.utc)
#: Adjusted standard GPS time = standard GPS time - 1e9 s (ASPRS LAS 1.4 R15, Global Encoding).
ADJUSTED_GPS_OFFSET_S = 1.0e9
#: GPS week-time LAS files count seconds from the start of the GPS week (Sunday 00:00 GPS).
GPS_WEEK_S = 7 * 86400

POSE_FIELDS = ("x", "y", "z", "roll_deg", "pitch_deg", "yaw_deg")
AXIS_FIELDS = ("travel_m", "slew_deg", "luff_deg")


def adjusted_gps_time(utc: datetime) -> float:
    """Adjusted standard GPS time (s) of a UTC instant from 2017-01-01 on.

    Examples
    --------
    >>> adjusted_gps_time(datetime(2019, 4, 6, 23, 59, 42, tzinfo=timezone.utc))  # GPS week 2048
    238630400.0
    """
    if utc.tzinfo is None:
        raise ValueError("the instant has no UTC offset")
    if utc < LEAP_VALID_FROM:
        raise ValueError(f"{utc.isoformat()} is before 2017-01-01; the leap-second count is not known here")
    return (utc - GPS_EPOCH).total_seconds() + GPS_UTC_LEAP_S - ADJUSTED_GPS_OFFSET_S


def utc_from_adjusted_gps(seconds: float) -> datetime:
    """The UTC instant of an adjusted standard GPS time (inverse of :func:`adjusted_gps_time`).

    Examples
    --------
    >>> utc_from_adjusted_gps(238630400.0).isoformat()
    '2019-04-06T23:59:42+00:00'
    """
    utc = GPS_EPOCH + timedelta(seconds=float(seconds) + ADJUSTED_GPS_OFFSET_S - GPS_UTC_LEAP_S)
    if utc < LEAP_VALID_FROM:
        raise ValueError(f"{seconds} s is before 2017-01-01 (or not adjusted standard GPS time)")
    return utc


def euler_rotation(roll_deg: Any, pitch_deg: Any, yaw_deg: Any) -> Rotation:
    """``Rz(yaw) @ Ry(pitch) @ Rx(roll)`` (degrees) as a scipy Rotation; arrays give a stack.

    Examples
    --------
    >>> np.round(euler_rotation(0, 0, 90).apply([1.0, 0.0, 0.0]), 12)   # east turns to north
    array([0., 1., 0.])
    """
    angles = np.stack(np.broadcast_arrays(np.asarray(yaw_deg, float), np.asarray(pitch_deg, float),
                                          np.asarray(roll_deg, float)), axis=-1)
    return Rotation.from_euler("ZYX", angles, degrees=True)


def rotation_matrix(roll_deg: float, pitch_deg: float, yaw_deg: float) -> np.ndarray:
    """``Rz(yaw) @ Ry(pitch) @ Rx(roll)`` for angles in degrees.

    Examples
    --------
    >>> np.round(rotation_matrix(0, 0, 90) @ [1.0, 0.0, 0.0], 12)   # east turns to north
    array([0., 1., 0.])
    """
    r, p, y = (math.radians(a) for a in (roll_deg, pitch_deg, yaw_deg))
    cr, sr, cp, sp, cy, sy = math.cos(r), math.sin(r), math.cos(p), math.sin(p), math.cos(y), math.sin(y)
    rx = np.array([[1, 0, 0], [0, cr, -sr], [0, sr, cr]])
    ry = np.array([[cp, 0, sp], [0, 1, 0], [-sp, 0, cp]])
    rz = np.array([[cy, -sy, 0], [sy, cy, 0], [0, 0, 1]])
    return rz @ ry @ rx
#: The rail-and-boom geometry; all or none (a machine with its own GNSS/INS pose needs only
#: the scanner's lever arm and boresight).
MACHINE_AXES_KEYS = ("rail_origin", "rail_azimuth_deg", "pivot_height_m", "boom_length_m")


# --------------------------------------------------------------------------------- machines


@dataclass(frozen=True, eq=False)
class Machine:
    """Geometry of a rail-mounted machine with a slewing, luffing boom and a scanner on it.

    The body frame is the boom tip: origin ``boom_length_m`` along the boom from the luff
    pivot, x along the boom outwards, y to its left, z completing a right-handed frame (up
    when the boom is level).

    Attributes
    ----------
    id : str
    rail_origin : (3,) ndarray
        Site x, y, z of the slew axis at rail level where ``travel_m`` is zero.
    rail_azimuth_deg : float
        Direction of positive travel, degrees counter-clockwise from site east.
    pivot_height_m : float
        Height of the luff pivot above ``rail_origin``.
    pivot_offset_m : float
        Horizontal distance from the slew axis to the luff pivot, along the boom (often 0-5 m).
    boom_length_m : float
        Luff pivot to the boom tip (the body origin).
    scanner_lever_arm_m : (3,) ndarray
        Scanner origin in the boom-tip frame.
    boresight_deg : (3,) ndarray
        ``[roll, pitch, yaw]`` of the scanner frame in the boom-tip frame.

    A machine that logs its own pose (GNSS/INS) gives only the lever arm and boresight,
    measured in the frame of that pose; the boom geometry is then ``None``.
    """

    id: str
    rail_origin: np.ndarray | None = None
    rail_azimuth_deg: float | None = None
    pivot_height_m: float | None = None
    boom_length_m: float | None = None
    pivot_offset_m: float = 0.0
    scanner_lever_arm_m: np.ndarray = field(default_factory=lambda: np.zeros(3))
    boresight_deg: np.ndarray = field(default_factory=lambda: np.zeros(3))

    @property
    def has_boom(self) -> bool:
        """Whether the rail-and-boom geometry is given (needed for machine axes)."""
        return all(getattr(self, k) is not None for k in MACHINE_AXES_KEYS)


def machine_poses(machine: Machine, travel_m: Any, slew_deg: Any, luff_deg: Any
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Boom-tip pose ``(xyz (n, 3), roll_deg, pitch_deg, yaw_deg)`` from machine axes.

    The boom points at heading ``rail_azimuth_deg + slew_deg`` and rises at ``luff_deg``, so
    the tip frame has yaw = heading, pitch = -luff (``Ry`` with a positive angle turns x
    downwards) and roll = 0.
    """
    if not machine.has_boom:
        raise ValueError(f"machine {machine.id!r} has no boom geometry ({', '.join(MACHINE_AXES_KEYS)})")
    s, sl, lu = np.broadcast_arrays(np.asarray(travel_m, float), np.asarray(slew_deg, float),
                                    np.asarray(luff_deg, float))
    az = math.radians(machine.rail_azimuth_deg)
    heading = machine.rail_azimuth_deg + sl
    h, e = np.radians(heading), np.radians(lu)
    reach = machine.pivot_offset_m + machine.boom_length_m * np.cos(e)
    xyz = np.stack([
        machine.rail_origin[0] + s * math.cos(az) + reach * np.cos(h),
        machine.rail_origin[1] + s * math.sin(az) + reach * np.sin(h),
        machine.rail_origin[2] + machine.pivot_height_m + machine.boom_length_m * np.sin(e),
    ], axis=-1)
    return xyz, np.zeros_like(lu), -lu, heading


# ------------------------------------------------------------------------------- trajectory


@dataclass(frozen=True, eq=False)
class Trajectory:
    """A body's pose over time: samples at ``gps_time`` (strictly increasing, at least two).

    Attributes
    ----------
    gps_time : (m,) ndarray
    position : (m, 3) ndarray
        Body origin in the site CRS.
    rotation : scipy Rotation of m
        Body frame to site frame.
    lever_arm : (3,) ndarray
        Scanner origin in the body frame (zero when the poses are the scanner's own).
    boresight_deg : (3,) ndarray
        ``[roll, pitch, yaw]`` of the scanner in the body frame.
    source : str
        Where the samples came from, for messages.
    machine : str or None
    """

    gps_time: np.ndarray
    position: np.ndarray
    rotation: Rotation
    lever_arm: np.ndarray = field(default_factory=lambda: np.zeros(3))
    boresight_deg: np.ndarray = field(default_factory=lambda: np.zeros(3))
    source: str = ""
    machine: str | None = None

    def __post_init__(self) -> None:
        t = np.asarray(self.gps_time, float)
        if t.ndim != 1 or len(t) < 2:
            raise ValueError("a trajectory needs at least two samples")
        if not np.all(np.diff(t) > 0):
            raise ValueError("trajectory times must be strictly increasing")
        if np.shape(self.position) != (len(t), 3) or len(self.rotation) != len(t):
            raise ValueError("position must be (m, 3) and rotation of m, with m = len(gps_time)")
        object.__setattr__(self, "gps_time", t)
        object.__setattr__(self, "position", np.asarray(self.position, float))
        object.__setattr__(self, "lever_arm", np.asarray(self.lever_arm, float).reshape(3))
        object.__setattr__(self, "boresight_deg", np.asarray(self.boresight_deg, float).reshape(3))
        # Slerp on times relative to the first sample: adjusted GPS times are ~1e8 s.
        object.__setattr__(self, "_slerp", Slerp(t - t[0], self.rotation))

    @classmethod
    def from_poses(cls, gps_time: Any, xyz: Any, roll_deg: Any, pitch_deg: Any, yaw_deg: Any,
                   **kw: Any) -> "Trajectory":
        """From pose columns (angles in degrees, the site convention; scalars are broadcast)."""
        t = np.asarray(gps_time, float)
        angles = [np.broadcast_to(np.asarray(a, float), t.shape) for a in (roll_deg, pitch_deg, yaw_deg)]
        return cls(t, np.asarray(xyz, float), euler_rotation(*angles), **kw)

    @classmethod
    def from_machine_axes(cls, gps_time: Any, machine: Machine, travel_m: Any, slew_deg: Any,
                          luff_deg: Any, **kw: Any) -> "Trajectory":
        """Boom-tip poses from machine axes, with the machine's lever arm and boresight."""
        xyz, roll, pitch, yaw = machine_poses(machine, travel_m, slew_deg, luff_deg)
        kw.setdefault("lever_arm", machine.scanner_lever_arm_m)
        kw.setdefault("boresight_deg", machine.boresight_deg)
        kw.setdefault("machine", machine.id)
        return cls.from_poses(gps_time, xyz, roll, pitch, yaw, **kw)

    @property
    def span(self) -> tuple[float, float]:
        """First and last sample time."""
        return float(self.gps_time[0]), float(self.gps_time[-1])

    def gaps(self, max_gap_s: float = DEFAULT_MAX_GAP_S) -> np.ndarray:
        """``(k, 2)`` start and end times of the intervals longer than ``max_gap_s``."""
        dt = np.diff(self.gps_time)
        i = np.nonzero(dt > max_gap_s)[0]
        return np.stack([self.gps_time[i], self.gps_time[i + 1]], axis=1)

    def extent(self, mins: Any, maxs: Any) -> tuple[float, float, float, float]:
        """Site ``(xmin, ymin, xmax, ymax)`` of a scanner-frame bounding box placed at every
        sample (its 8 corners through lever arm, boresight and pose): the area a cloud with
        those header bounds can cover. Between samples the corners move by the interpolation,
        so at sparse samples the true extent can exceed this by a little."""
        lo, hi = np.asarray(mins, float), np.asarray(maxs, float)
        corners = np.array([[a, b, c] for a in (lo[0], hi[0]) for b in (lo[1], hi[1]) for c in (lo[2], hi[2])])
        body = euler_rotation(*self.boresight_deg).apply(corners) + self.lever_arm
        m = len(self.gps_time)
        placed = self.rotation[np.repeat(np.arange(m), 8)].apply(np.tile(body, (m, 1)))
        placed += np.repeat(self.position, 8, axis=0)
        return (float(placed[:, 0].min()), float(placed[:, 1].min()),
                float(placed[:, 0].max()), float(placed[:, 1].max()))

    def poses_at(self, t: Any) -> tuple[Rotation, np.ndarray]:
        """Body orientation (Slerp) and position (linear) at times ``t`` inside the span.

        Returns a scipy Rotation stack and an ``(n, 3)`` array. Raises ``ValueError`` for a
        time outside the span; :func:`georeference` masks those first.
        """
        t = np.atleast_1d(np.asarray(t, float))
        t0, t1 = self.span
        if t.size and (t.min() < t0 or t.max() > t1):
            raise ValueError(f"times outside the trajectory span [{t0}, {t1}]")
        rot = self._slerp(t - t0)  # type: ignore[attr-defined]
        pos = np.stack([np.interp(t, self.gps_time, self.position[:, k]) for k in range(3)], axis=1)
        return rot, pos
