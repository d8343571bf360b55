"""Placing the points of a moving scanner with the pose at each point's own instant.

A scanner on a stacker, reclaimer or ship loader measures while the machine slews, luffs and
travels. Its cloud arrives in the scanner's own frame with a GPS time per point; the pose of
the machine comes as a time series, ``surveys/<date>/trajectory.csv``. Every point is placed
with the pose interpolated at its own time (direct georeferencing):

``p_site = R_body(t) @ (B @ p_scanner + a) + T_body(t)``

with ``a`` the lever arm (the scanner origin in the body frame, metres), ``B`` the boresight
rotation (scanner frame to body frame) and ``R_body(t)``, ``T_body(t)`` the body's orientation
and position at the point's time: position interpolated linearly, orientation by spherical
linear interpolation (scipy's :class:`~scipy.spatial.transform.Slerp`). This is the usual
direct-georeferencing equation of mobile laser scanning (e.g. Glennie, "Rigorous 3D error
analysis of kinematic scanning LIDAR systems", J. Appl. Geodesy 1, 2007; from memory).

Conventions (the site contract, as for ``stations.csv``)
--------------------------------------------------------
Every rotation is ``R = Rz(yaw) @ Ry(pitch) @ Rx(roll)``: right-handed axes, angles in degrees,
active rotations, yaw counter-clockwise from site east seen from above; equal to scipy's
``Rotation.from_euler("ZYX", [yaw, pitch, roll], degrees=True)``. Boresight angles are given
as ``[roll, pitch, yaw]`` in the same convention.

Time base
---------
``gps_time`` in ``trajectory.csv`` is in the same time base as the points' LAS GPS time, so
nothing is converted: adjusted standard GPS time (GPS seconds since 1980-01-06 minus 1e9) when
the LAS global-encoding GPS-time-type bit is set (ASPRS LAS 1.4 R15, section 2.4, "Global
Encoding" bit 0), else GPS seconds of the week. A week-time scan that crosses the week
boundary (Sunday 00:00 GPS) is not supported: its times jump back. The optional ``time``
column (ISO 8601 with offset) is for people and is checked against ``gps_time``; a table with
no ``gps_time`` at all takes it from ``time`` as adjusted standard GPS time
(:func:`adjusted_gps_time`), which suits clouds whose LAS files carry that time base.

Time checks
-----------
Points before the first or after the last trajectory sample are rejected and counted. A
trajectory interval longer than ``max_gap_s`` (a logging dropout) is not bridged: the points
inside it are dropped, counted and reported with an :class:`~inventory.errors.InputWarning`.

The machine-axes variant
------------------------
Instead of a pose, a row may give a rail-mounted machine's axes (``travel_m``, ``slew_deg``,
``luff_deg``) and its ``machine`` id; the geometry comes from ``site.toml``
``[machines.<id>]`` (see :class:`Machine`) and :func:`machine_poses` turns the axes into the
pose of the boom tip. Interpolating that pose linearly between samples replaces the tip's arc
by its chord; the error is the sagitta ``L * (omega * dt)**2 / 8`` (1.5 mm for a 40 m boom
slewing 1 deg/s sampled once a second, 0.015 mm at 10 Hz), which is why machines should log at
a few hertz or more.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone
from pathlib import Path
from typing import Any, Mapping

import numpy as np
import pandas as pd
from scipy.spatial.transform import Rotation, Slerp

from .._tables import read_table, table_schema
from ..errors import InputError, InputErrors, InputWarning, Problem

__all__ = [
    "DEFAULT_MAX_GAP_S",
    "MAX_TURN_PER_SAMPLE_DEG",
    "GPS_EPOCH",
    "GPS_UTC_LEAP_S",
    "ADJUSTED_GPS_OFFSET_S",
    "GPS_WEEK_S",
    "TIME_MATCH_S",
    "Machine",
    "Trajectory",
    "euler_rotation",
    "georeference",
    "machine_poses",
    "machines_from_config",
    "read_trajectories",
    "load_trajectory",
    "trajectory_from_frame",
    "adjusted_gps_time",
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
_LEAP_VALID_FROM = datetime(2017, 1, 1, tzinfo=timezone.utc)
#: Adjusted standard GPS time = standard GPS time - 1e9 s (ASPRS LAS 1.4 R15, Global Encoding).
ADJUSTED_GPS_OFFSET_S = 1.0e9
#: GPS week-time LAS files count seconds from the start of the GPS week (Sunday 00:00 GPS).
GPS_WEEK_S = 7 * 86400

_POSE = ("x", "y", "z", "roll_deg", "pitch_deg", "yaw_deg")
_AXES = ("travel_m", "slew_deg", "luff_deg")


def adjusted_gps_time(utc: datetime) -> float:
    """Adjusted standard GPS time (s) of a UTC instant from 2017-01-01 on.

    Examples
    --------
    >>> adjusted_gps_time(datetime(2019, 4, 6, 23, 59, 42, tzinfo=timezone.utc))  # GPS week 2048
    238630400.0
    """
    if utc.tzinfo is None:
        raise ValueError("the instant has no UTC offset")
    if utc < _LEAP_VALID_FROM:
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
    if utc < _LEAP_VALID_FROM:
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
        return all(getattr(self, k) is not None for k in _MACHINE_AXES_KEYS)


_MACHINE_KEYS = {
    "rail_origin": 3, "rail_azimuth_deg": 0, "pivot_height_m": 0, "pivot_offset_m": 0,
    "boom_length_m": 0, "scanner_lever_arm_m": 3, "boresight_deg": 3,
}
#: The rail-and-boom geometry; all or none (a machine with its own GNSS/INS pose needs only
#: the scanner's lever arm and boresight).
_MACHINE_AXES_KEYS = ("rail_origin", "rail_azimuth_deg", "pivot_height_m", "boom_length_m")


def _config_number(value: Any, path: str, key: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise InputError(path, f"not a finite number: {value!r}", field=key)
    return float(value)


def machines_from_config(machines: Mapping[str, Any] | None, path: str | Path = "site.toml"
                         ) -> dict[str, Machine]:
    """Machines from the parsed ``[machines.<id>]`` tables of ``site.toml``.

    A missing or wrong key is an :class:`~inventory.errors.InputError` whose field names it,
    e.g. ``machines.stacker1.boom_length_m``.
    """
    out: dict[str, Machine] = {}
    path = str(path)
    for mid, table in (machines or {}).items():
        if not isinstance(table, Mapping):
            raise InputError(path, "must be a table", field=f"machines.{mid}")
        for key in table:
            if key not in _MACHINE_KEYS:
                raise InputError(path, "unknown key", field=f"machines.{mid}.{key}")
        if any(key in table for key in _MACHINE_AXES_KEYS):
            for key in _MACHINE_AXES_KEYS:
                if key not in table:
                    raise InputError(path, "required key is missing (the boom geometry needs all of "
                                     + ", ".join(_MACHINE_AXES_KEYS) + ")", field=f"machines.{mid}.{key}")
        vals: dict[str, Any] = {}
        for key, size in _MACHINE_KEYS.items():
            if key not in table:
                continue
            name = f"machines.{mid}.{key}"
            if size:
                seq = table[key]
                if not isinstance(seq, (list, tuple)) or len(seq) != size:
                    raise InputError(path, f"must be a list of {size} numbers", field=name)
                vals[key] = np.array([_config_number(v, path, name) for v in seq])
            else:
                vals[key] = _config_number(table[key], path, name)
        if vals.get("boom_length_m", 0.0) < 0:
            raise InputError(path, "must not be negative", field=f"machines.{mid}.boom_length_m")
        out[str(mid)] = Machine(id=str(mid), **vals)
    return out


def machine_poses(machine: Machine, travel_m: Any, slew_deg: Any, luff_deg: Any
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Boom-tip pose ``(xyz (n, 3), roll_deg, pitch_deg, yaw_deg)`` from machine axes.

    The boom points at heading ``rail_azimuth_deg + slew_deg`` and rises at ``luff_deg``, so
    the tip frame has yaw = heading, pitch = -luff (``Ry`` with a positive angle turns x
    downwards) and roll = 0.
    """
    if not machine.has_boom:
        raise ValueError(f"machine {machine.id!r} has no boom geometry ({', '.join(_MACHINE_AXES_KEYS)})")
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


def georeference(points_xyz: Any, gps_time: Any, trajectory: Trajectory, lever_arm: Any = None,
                 boresight: Any = None, max_gap_s: float = DEFAULT_MAX_GAP_S,
                 *, source: str = "", warn: bool = True) -> tuple[np.ndarray, np.ndarray, dict[str, int]]:
    """Place scanner-frame points in the site CRS with the pose at each point's own time.

    Parameters
    ----------
    points_xyz : (n, 3) array
        Points in the scanner's own frame, metres.
    gps_time : (n,) array
        Their GPS times, in the trajectory's time base.
    trajectory : Trajectory
    lever_arm : (3,) array, optional
        Scanner origin in the body frame; default the trajectory's own (zero unless it came
        from a machine).
    boresight : (3,) array, optional
        ``[roll, pitch, yaw]`` degrees of the scanner in the body frame; default the
        trajectory's own.
    max_gap_s : float
        Trajectory intervals longer than this are not bridged.
    source : str
        Name of the cloud, for the warning.
    warn : bool
        Issue the warnings below; a caller that streams a file chunk by chunk passes False
        and reports the summed ``counts`` once.

    Returns
    -------
    xyz_site : (k, 3) ndarray
        The kept points, in input order.
    keep : (n,) bool ndarray
        Which input points were kept (filter the other point attributes with it).
    counts : dict
        ``{"points": n, "kept": k, "outside_span": ..., "in_gap": ...}``.

    Warns
    -----
    InputWarning
        When points fall outside the trajectory's span or inside a gap.

    Examples
    --------
    >>> traj = Trajectory.from_poses([0.0, 1.0], [[0, 0, 0], [10, 0, 0]], 0, 0, [0, 90])
    >>> xyz, keep, counts = georeference([[1.0, 0, 0]], [0.5], traj)
    >>> np.round(xyz, 6)   # halfway: at x = 5, turned 45 degrees
    array([[5.707107, 0.707107, 0.      ]])
    """
    p = np.asarray(points_xyz, float).reshape(-1, 3)
    t = np.asarray(gps_time, float).reshape(-1)
    if len(t) != len(p):
        raise ValueError(f"{len(p)} points but {len(t)} times")
    arm = trajectory.lever_arm if lever_arm is None else np.asarray(lever_arm, float).reshape(3)
    bore = trajectory.boresight_deg if boresight is None else np.asarray(boresight, float).reshape(3)
    t0, t1 = trajectory.span
    inside = (t >= t0) & (t <= t1)  # NaN times fall outside too
    # The interval each point falls in; a point exactly on a sample is inside either way.
    idx = np.clip(np.searchsorted(trajectory.gps_time, t, side="right") - 1, 0, len(trajectory.gps_time) - 2)
    dt = trajectory.gps_time[idx + 1] - trajectory.gps_time[idx]
    on_sample = (t == trajectory.gps_time[idx]) | (t == trajectory.gps_time[idx + 1])
    in_gap = inside & (dt > max_gap_s) & ~on_sample
    keep = inside & ~in_gap
    counts = {"points": int(len(t)), "kept": int(keep.sum()), "outside_span": int((~inside).sum()),
              "in_gap": int(in_gap.sum())}
    name = source or "the cloud"
    where = trajectory.source or "the trajectory"
    if warn and counts["outside_span"]:
        hint = ""
        if not inside.any() and np.isfinite(t).any():
            # Every point outside: usually two time bases (week seconds vs adjusted standard).
            hint = (f"; the points run from {np.nanmin(t):.3f} to {np.nanmax(t):.3f} s: are the cloud and the "
                    "trajectory in the same GPS time base (week seconds or adjusted standard)?")
        warnings.warn(InputWarning(
            f"{name}: {counts['outside_span']} of {len(t)} points lie outside the time span of {where} "
            f"({t0:.3f} to {t1:.3f} s) and were rejected{hint}"), stacklevel=2)
    if warn and counts["in_gap"]:
        g = trajectory.gaps(max_gap_s)
        warnings.warn(InputWarning(
            f"{name}: {counts['in_gap']} points fall in {len(g)} gap(s) longer than {max_gap_s:g} s "
            f"in {where} (first {g[0, 0]:.3f} to {g[0, 1]:.3f} s) and were dropped"), stacklevel=2)
    rot, pos = trajectory.poses_at(t[keep])
    body = euler_rotation(*bore).apply(p[keep]) + arm
    xyz = rot.apply(body) + pos if len(body) else np.empty((0, 3))
    return xyz.reshape(-1, 3), keep, counts


# ---------------------------------------------------------------------------------- the table


def _given(v: Any) -> bool:
    return v is not None and not (isinstance(v, float) and math.isnan(v)) and not (
        isinstance(v, str) and not v.strip())


def _group_trajectory(rows: pd.DataFrame, display: str, key: str | None,
                      machines: Mapping[str, Machine], problems: list[Problem]) -> Trajectory | None:
    """One file's rows as a Trajectory, appending problems instead of raising."""
    n0 = len(problems)
    lines = rows["line"].to_numpy()
    first = int(lines[0])
    if len(rows) < 2:
        problems.append(Problem(display, first, "gps_time",
                                "a trajectory needs at least two samples" + (f" (file {key})" if key else "")))
        return None
    t = rows["gps_time"].to_numpy(float)
    bad = np.nonzero(np.diff(t) <= 0)[0]
    for i in bad[:5]:
        problems.append(Problem(display, int(lines[i + 1]), "gps_time",
                                f"{t[i + 1]!r} is not after {t[i]!r} on line {int(lines[i])}; "
                                "times must strictly increase"))
    pose_rows = rows[list(_POSE)].map(_given)
    axes_rows = rows[list(_AXES)].map(_given)
    has_pose = pose_rows.any(axis=1).to_numpy()
    has_axes = axes_rows.any(axis=1).to_numpy()
    variant = "axes" if has_axes[0] and not has_pose[0] else "pose"
    cols, other = (_AXES, _POSE) if variant == "axes" else (_POSE, _AXES)
    flags = axes_rows if variant == "axes" else pose_rows
    for j, line in enumerate(lines):
        if (has_pose[j] if variant == "axes" else has_axes[j]):
            problems.append(Problem(display, int(line), next(c for c in other if _given(rows.iloc[j][c])),
                                    f"this trajectory gives {'machine axes' if variant == 'axes' else 'poses'} "
                                    "(from its first row); give one kind per file"))
            break
        missing = [c for c in cols if not flags.iloc[j][c]]
        if missing:
            problems.append(Problem(display, int(line), missing[0], "value is missing: give all of "
                                    + ", ".join(cols)))
            break
    mids = {str(m) for m in rows["machine"] if _given(m)}
    machine = None
    if len(mids) > 1:
        problems.append(Problem(display, first, "machine", f"one trajectory names several machines: {sorted(mids)}"))
    elif mids:
        mid = mids.pop()
        blank = [int(l) for l, m in zip(lines, rows["machine"]) if not _given(m)]
        if blank:
            problems.append(Problem(display, blank[0], "machine", f"value is missing (other rows give {mid!r})"))
        machine = machines.get(mid)
        if machine is None:
            known = ", ".join(sorted(machines)) or "none"
            problems.append(Problem(display, first, "machine",
                                    f"{mid!r} is not a machine of site.toml [machines] (known: {known})"))
    elif variant == "axes":
        problems.append(Problem(display, first, "machine", "machine axes need the machine id"))
    if variant == "axes" and machine is not None and not machine.has_boom:
        problems.append(Problem(display, first, "machine",
                                f"site.toml [machines.{machine.id}] gives no boom geometry for machine axes "
                                f"({', '.join(_MACHINE_AXES_KEYS)})"))
    if len(problems) > n0:
        return None
    if variant == "axes":
        traj = Trajectory.from_machine_axes(t, machine, rows["travel_m"].to_numpy(float),
                                            rows["slew_deg"].to_numpy(float),
                                            rows["luff_deg"].to_numpy(float), source=display)
    else:
        kw: dict[str, Any] = {"source": display}
        if machine is not None:
            kw.update(lever_arm=machine.scanner_lever_arm_m, boresight_deg=machine.boresight_deg,
                      machine=machine.id)
        traj = Trajectory.from_poses(t, rows[["x", "y", "z"]].to_numpy(float), rows["roll_deg"].to_numpy(float),
                                     rows["pitch_deg"].to_numpy(float), rows["yaw_deg"].to_numpy(float), **kw)
    turn = (traj.rotation[:-1].inv() * traj.rotation[1:]).magnitude()
    big = np.nonzero(np.degrees(turn) > MAX_TURN_PER_SAMPLE_DEG)[0]
    if len(big):
        i = int(big[0])
        field_name = "slew_deg" if variant == "axes" else "yaw_deg"
        problems.append(Problem(display, int(lines[i + 1]), field_name,
                                f"turns {np.degrees(turn[i]):.1f} degrees since line {int(lines[i])}; more than "
                                f"{MAX_TURN_PER_SAMPLE_DEG:g} between samples cannot be interpolated reliably"))
        return None
    return traj


def _fill_gps_time(frame: pd.DataFrame, display: str, problems: list[Problem]) -> bool:
    """Derive ``gps_time`` from ``time`` (as adjusted standard GPS time) when no row gives it.

    Returns False (with a problem) when some rows give ``gps_time`` and others do not, or a
    needed ``time`` is missing or too early.
    """
    given = frame["gps_time"].map(_given).to_numpy()
    if given.all():
        frame["gps_time"] = frame["gps_time"].astype(float)
        return True
    lines = frame["line"].to_numpy()
    if given.any():
        j = int(np.nonzero(~given)[0][0])
        problems.append(Problem(display, int(lines[j]), "gps_time", "value is missing (other rows give gps_time)"))
        return False
    when = pd.to_datetime(frame["time"], utc=True)
    if when.isna().any():
        j = int(np.nonzero(when.isna().to_numpy())[0][0])
        problems.append(Problem(display, int(lines[j]), "gps_time", "value is missing: give gps_time or time"))
        return False
    early = (when < pd.Timestamp(_LEAP_VALID_FROM)).to_numpy()
    if early.any():
        j = int(np.nonzero(early)[0][0])
        problems.append(Problem(display, int(lines[j]), "time",
                                "before 2017-01-01: give gps_time (the leap-second count is not known here)"))
        return False
    seconds = (when - pd.Timestamp(GPS_EPOCH)).dt.total_seconds().to_numpy()
    frame["gps_time"] = seconds + GPS_UTC_LEAP_S - ADJUSTED_GPS_OFFSET_S
    return True


def trajectory_from_frame(frame: pd.DataFrame, machines: Mapping[str, Machine] | None = None,
                          *, display: str = "trajectory.csv", problems: list[Problem] | None = None
                          ) -> dict[str | None, Trajectory]:
    """Trajectories from a table with the ``trajectory.csv`` columns, one per ``file``.

    ``frame`` is what :func:`inventory._tables.read_table` returns (columns of the schema plus
    ``line``); missing columns are taken as blank. The key is the cloud file name, or
    ``None`` when the table names no file (it then serves every scanner-frame cloud of the
    survey). Problems are appended to ``problems`` when given, else raised as
    :class:`~inventory.errors.InputErrors`.
    """
    own = problems is None
    problems = [] if problems is None else problems
    frame = frame.copy()
    for name in table_schema("trajectory").names:
        if name not in frame.columns:
            frame[name] = None
    if "line" not in frame.columns:
        frame["line"] = np.arange(len(frame)) + 2
    out: dict[str | None, Trajectory] = {}
    machines = machines or {}
    if len(frame) == 0:
        problems.append(Problem(display, 2, None, "the table has a header but no rows"))
    elif _fill_gps_time(frame, display, problems):
        named = frame["file"].map(_given).to_numpy()
        if named.any() and not named.all():
            j = int(np.nonzero(~named)[0][0])
            problems.append(Problem(display, int(frame["line"].iloc[j]), "file",
                                    "value is missing (other rows name a file)"))
        else:
            keys = frame["file"].map(lambda v: str(v).strip()) if named.all() else pd.Series([None] * len(frame))
            for key in dict.fromkeys(keys):
                rows = frame[(keys == key).to_numpy()] if key is not None else frame
                traj = _group_trajectory(rows, display, key, machines, problems)
                if traj is not None:
                    out[key] = traj
    if own and any(p.severity == "error" for p in problems):
        raise InputErrors(problems)
    return out


def read_trajectories(path: str | Path, machines: Mapping[str, Machine] | None = None,
                      *, display: str | None = None, problems: list[Problem] | None = None
                      ) -> dict[str | None, Trajectory]:
    """Read and check ``trajectory.csv``; every problem names file, line and field.

    Without ``problems``, raises :class:`~inventory.errors.InputErrors` listing all problems
    and issues warnings (unknown columns, a ``time`` that does not match ``gps_time``) as
    :class:`~inventory.errors.InputWarning`. With a ``problems`` list (a site check that
    collects everything), appends to it instead and returns what could be read.
    """
    display = display or str(path)
    own = problems is None
    found: list[Problem] = []
    frame = read_table(Path(path), table_schema("trajectory"), found, display=display)
    out: dict[str | None, Trajectory] = {}
    if not any(p.severity == "error" for p in found):
        out = trajectory_from_frame(frame, machines, display=display, problems=found)
        _check_time_column(frame, display, found)
    if not own:
        problems.extend(found)  # type: ignore[union-attr]
        return out
    if any(p.severity == "error" for p in found):
        raise InputErrors(found)
    for p in found:
        warnings.warn(InputWarning(str(p)), stacklevel=2)
    return out


#: How far the ``time`` column may be from ``gps_time`` before it is reported (s): loggers
#: print times to the millisecond; a full second apart means a different clock or time base.
TIME_MATCH_S = 0.5


def _check_time_column(frame: pd.DataFrame, display: str, problems: list[Problem]) -> None:
    """Warn (once) where ``time`` matches ``gps_time`` neither as adjusted standard GPS time
    nor as GPS week seconds: the sign of a trajectory logged in another time base."""
    if "time" not in frame.columns:
        return
    for row in frame.itertuples():
        when, gps = getattr(row, "time"), getattr(row, "gps_time")
        if when is None or pd.isna(when) or gps is None or pd.isna(gps):
            continue
        when = pd.Timestamp(when).to_pydatetime()
        if when < _LEAP_VALID_FROM:
            continue
        adjusted = adjusted_gps_time(when)
        week = (adjusted + ADJUSTED_GPS_OFFSET_S) % GPS_WEEK_S
        if min(abs(gps - adjusted), abs(gps - week)) > TIME_MATCH_S:
            problems.append(Problem(
                display, int(row.line), "time",
                f"{when.isoformat()} is {adjusted:.3f} s in adjusted standard GPS time and {week:.3f} s "
                f"of its GPS week, but gps_time is {gps:.3f}; check the logger's clock and time base",
                "warning"))
            return


def load_trajectory(path: str | Path, machines: Mapping[str, Machine] | None = None,
                    file: str | None = None) -> Trajectory:
    """The one trajectory of ``trajectory.csv`` (or the one for cloud ``file``).

    Examples
    --------
    >>> traj = load_trajectory("surveys/2026-10-31/trajectory.csv")        # doctest: +SKIP
    >>> xyz, keep, counts = georeference(points, gps_time, traj)           # doctest: +SKIP
    """
    found = read_trajectories(path, machines)
    if file is not None and file in found:
        return found[file]
    if None in found:
        return found[None]
    if file is None and len(found) == 1:
        return next(iter(found.values()))
    raise InputError(path, f"no trajectory for {file!r} (the table names {sorted(k for k in found if k)})",
                     field="file")

