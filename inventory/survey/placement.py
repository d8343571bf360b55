"""Placing a survey's clouds in the site CRS: one :class:`Placement` per cloud file.

A cloud arrives in one of three ways, each a :class:`Placement` that
:func:`survey_placements` makes once per file: already in a CRS and reprojected to the site
CRS (:class:`CrsPlacement`), in a scanner's own frame with a station pose from
``stations.csv`` (:class:`StationPlacement`), or in a moving scanner's own frame with the
pose at each point's time from ``trajectory.csv`` (:class:`TrajectoryPlacement`,
:func:`georeference`).

:func:`poses_from_stations` turns the rows of ``stations.csv`` into station poses
(``p_site = R @ p_scanner + (x, y, z)``, ``R = Rz(yaw) @ Ry(pitch) @ Rx(roll)``);
:func:`georeference` places each point of a moving scanner with the pose at its own time.

The conventions (axes, angles, time base): docs/surveys.md.
"""

from __future__ import annotations

import math
import warnings
from abc import ABC, abstractmethod
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping

import numpy as np
from pyproj import CRS

from inventory.errors import CRSError, InputError, InputWarning
from inventory.io.clouds import open_cloud
from inventory.io.crs import Reprojector, TransformerCache
from inventory.io.tables import is_blank
from inventory.model.pose import (
    DEFAULT_MAX_GAP_S,
    Trajectory,
    euler_rotation,
    rotation_matrix,
)
from inventory.site.load import Site, SurveyRef
from inventory.site.trajectory import read_trajectories

__all__ = ["POSE_COLUMNS", "CrsPlacement", "Placement", "StationPlacement", "StationPose", "TrajectoryPlacement",
           "georeference", "poses_from_stations", "survey_placements"]

POSE_COLUMNS = ("x", "y", "z", "roll_deg", "pitch_deg", "yaw_deg")


@dataclass(frozen=True)
class StationPose:
    """Where a scanner stood and how it was turned."""

    station_id: str
    x: float
    y: float
    z: float
    roll_deg: float = 0.0
    pitch_deg: float = 0.0
    yaw_deg: float = 0.0

    @property
    def matrix(self) -> np.ndarray:
        return rotation_matrix(self.roll_deg, self.pitch_deg, self.yaw_deg)

    @property
    def origin(self) -> np.ndarray:
        return np.array([self.x, self.y, self.z])

    def apply(self, x: np.ndarray, y: np.ndarray, z: np.ndarray
              ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Site coordinates of scanner-frame points, and their range from the scanner (m)."""
        p = np.vstack([np.asarray(x, float), np.asarray(y, float), np.asarray(z, float)])
        rng = np.sqrt((p * p).sum(axis=0))
        q = self.matrix @ p
        return q[0] + self.x, q[1] + self.y, q[2] + self.z, rng

    def box_in_site(self, mins: np.ndarray, maxs: np.ndarray) -> tuple[float, float, float, float]:
        """Site (xmin, ymin, xmax, ymax) of a scanner-frame bounding box (its 8 corners)."""
        corners = np.array([[a, b, c] for a in (mins[0], maxs[0]) for b in (mins[1], maxs[1])
                            for c in (mins[2], maxs[2])]).T
        q = self.matrix @ corners
        return (float(q[0].min() + self.x), float(q[1].min() + self.y),
                float(q[0].max() + self.x), float(q[1].max() + self.y))


def poses_from_stations(stations: Any, path: "str | Path" = "stations.csv"
                        ) -> dict[str, StationPose | None]:
    """Pose per cloud file name from a stations table (a DataFrame or list of mappings).

    A row whose pose columns are all blank maps to ``None`` (the file is already
    georeferenced). A row with some but not all pose columns is an
    :class:`~inventory.errors.InputError` naming the line and the first blank field.
    """
    rows: list[Mapping[str, Any]]
    if hasattr(stations, "to_dict"):
        rows = stations.to_dict("records")
    else:
        rows = list(stations)
    out: dict[str, StationPose | None] = {}
    for i, row in enumerate(rows):
        line = int(row.get("line", i + 2)) if not is_blank(row.get("line")) else i + 2
        name = str(row.get("file", "")).strip()
        if not name:
            raise InputError(path, "file name is blank", line=line, field="file")
        blanks = [c for c in POSE_COLUMNS if is_blank(row.get(c))]
        if len(blanks) == len(POSE_COLUMNS):
            out[name] = None
            continue
        if blanks:
            raise InputError(path, "pose is incomplete: give all of x, y, z, roll_deg, pitch_deg, "
                             "yaw_deg or none of them", line=line, field=blanks[0])
        vals = {}
        for c in POSE_COLUMNS:
            try:
                vals[c] = float(row[c])
            except (TypeError, ValueError) as err:
                raise InputError(path, f"not a number: {row[c]!r}", line=line, field=c) from err
            if not math.isfinite(vals[c]):
                raise InputError(path, f"not a finite number: {row[c]!r}", line=line, field=c)
        out[name] = StationPose(str(row.get("station_id", "") or name), **vals)
    return out


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


class Placement(ABC):
    """How the points of one cloud file reach the site CRS.

    Made once per file (:func:`survey_placements`); :meth:`place` is then given the file's
    chunks in order, and :meth:`warning` tells, after the last one, about points that could
    not be placed.

    Attributes
    ----------
    path : Path
        The cloud file.
    outside_span, in_gap : int
        Points of the file not placed so far: outside a trajectory's time span, inside its
        gaps (a moving scanner's file only; zero for the others).
    """

    outside_span: int = 0
    in_gap: int = 0

    def __init__(self, path: Path) -> None:
        self.path = path

    @abstractmethod
    def box(self, mins: np.ndarray, maxs: np.ndarray) -> tuple[float, float, float, float]:
        """Site (xmin, ymin, xmax, ymax) around the file's header box ``mins``, ``maxs``."""

    @abstractmethod
    def place(self, chunk: np.ndarray) -> np.ndarray:
        """A chunk of the file's points (:data:`~inventory.io.clouds.POINT_DTYPE`) in the site
        CRS; may change ``chunk`` itself and leaves out points it cannot place."""

    def warning(self) -> InputWarning | None:
        """What to report about the file's points not placed; ``None`` when all were."""
        return None


class CrsPlacement(Placement):
    """A cloud in a CRS of its own (its header's or ``[survey] default_crs``), reprojected
    to the site CRS; one transformer per pair of CRS, shared through ``cache``."""

    def __init__(self, path: Path, crs: CRS, site_crs: CRS, cache: TransformerCache) -> None:
        super().__init__(path)
        self.crs = crs
        self._site_crs = site_crs
        self._cache = cache

    @property
    def reprojector(self) -> Reprojector:
        return self._cache.get(self.crs, self._site_crs)

    def box(self, mins: np.ndarray, maxs: np.ndarray) -> tuple[float, float, float, float]:
        return self.reprojector.bounds(mins[0], mins[1], maxs[0], maxs[1])

    def place(self, chunk: np.ndarray) -> np.ndarray:
        reproject = self.reprojector
        if not reproject.is_identity:
            chunk["X"], chunk["Y"], chunk["Z"] = reproject(chunk["X"], chunk["Y"], chunk["Z"])
        return chunk


class StationPlacement(Placement):
    """A static scanner's cloud in its own frame, placed by its station pose; each point's
    ``StationRange`` becomes its range from the scanner."""

    def __init__(self, path: Path, pose: StationPose) -> None:
        super().__init__(path)
        self.pose = pose

    def box(self, mins: np.ndarray, maxs: np.ndarray) -> tuple[float, float, float, float]:
        return self.pose.box_in_site(mins, maxs)

    def place(self, chunk: np.ndarray) -> np.ndarray:
        chunk["X"], chunk["Y"], chunk["Z"], chunk["StationRange"] = self.pose.apply(chunk["X"], chunk["Y"], chunk["Z"])
        return chunk


class TrajectoryPlacement(Placement):
    """A moving scanner's cloud in its own frame, each point placed with the pose at its own
    GPS time (:func:`georeference`); points outside the trajectory's span or in its gaps
    longer than ``max_gap_s`` are left out, counted, and reported once for the file by
    :meth:`warning`."""

    def __init__(self, path: Path, trajectory: Trajectory, max_gap_s: float = DEFAULT_MAX_GAP_S) -> None:
        super().__init__(path)
        self.trajectory = trajectory
        self.max_gap_s = max_gap_s
        self.points = 0
        self.kept = 0

    def box(self, mins: np.ndarray, maxs: np.ndarray) -> tuple[float, float, float, float]:
        return self.trajectory.extent(mins, maxs)

    def place(self, chunk: np.ndarray) -> np.ndarray:
        own = np.column_stack([chunk["X"], chunk["Y"], chunk["Z"]])
        xyz, keep, c = georeference(own, chunk["GpsTime"], self.trajectory, max_gap_s=self.max_gap_s,
                                    warn=False, source=self.path.name)
        self.points += c["points"]
        self.kept += c["kept"]
        self.outside_span += c["outside_span"]
        self.in_gap += c["in_gap"]
        chunk = chunk[keep]
        chunk["StationRange"] = np.sqrt((own[keep] ** 2).sum(axis=1))
        chunk["X"], chunk["Y"], chunk["Z"] = xyz[:, 0], xyz[:, 1], xyz[:, 2]
        return chunk

    def warning(self) -> InputWarning | None:
        traj = self.trajectory
        parts = []
        if self.outside_span:
            t0, t1 = traj.span
            parts.append(f"{self.outside_span:,} lie outside the time span of {traj.source or 'the trajectory'} "
                         f"({t0:.3f} to {t1:.3f} s) and were rejected")
        if self.in_gap:
            g = traj.gaps(self.max_gap_s)
            parts.append(f"{self.in_gap:,} fall in {len(g)} gap(s) longer than {self.max_gap_s:g} s "
                         f"(first {g[0, 0]:.3f} to {g[0, 1]:.3f} s) and were dropped")
        if not parts:
            return None
        if not self.kept:
            parts.append("none was placed: are the cloud and the trajectory in the same GPS time base "
                         "(week seconds or adjusted standard)?")
        return InputWarning(f"{self.path}: of {self.points:,} points, " + "; ".join(parts))


def survey_placements(site: Site, ref: SurveyRef, site_crs: CRS, cache: TransformerCache) -> list[Placement]:
    """The :class:`Placement` of each cloud file of a survey, in the order of ``ref.files``.

    A file with a pose in ``stations.csv`` is a static scanner's; else the trajectory of
    ``trajectory.csv`` named for the file, or the table's one trajectory for every file that
    ``stations.csv`` does not list (as the site check does), makes it a moving scanner's;
    else it is placed from its own CRS or ``[survey] default_crs``, and a file with neither
    is a :class:`~inventory.errors.CRSError`.
    """
    poses: dict[str, StationPose | None] = {}
    if getattr(ref, "stations", None) is not None:
        poses = poses_from_stations(ref.stations, Path(ref.folder) / "stations.csv")
    default = getattr(site.config.survey, "default_crs", None)
    max_gap_s = float(getattr(site.config.survey, "trajectory_max_gap_s", DEFAULT_MAX_GAP_S))
    trajectories: dict[str | None, Trajectory] = {}
    trajectory_csv = Path(ref.folder) / "trajectory.csv"
    if trajectory_csv.is_file():
        trajectories = read_trajectories(trajectory_csv, getattr(site.config, "machines", None) or {})
    listed = set(ref.stations["file"]) if getattr(ref, "stations", None) is not None else set()
    out: list[Placement] = []
    for path in ref.files:
        path = Path(path)
        pose = poses.get(path.name)
        if pose is not None:
            out.append(StationPlacement(path, pose))
            continue
        moving = trajectories.get(path.name) or (trajectories.get(None) if path.name not in listed else None)
        if moving is not None:
            out.append(TrajectoryPlacement(path, moving, max_gap_s))
            continue
        with open_cloud(path, default_crs=default) as cloud:
            crs = cloud.crs
        if crs is None:
            raise CRSError(path, "the file carries no CRS, has no pose in stations.csv, and site.toml "
                           "has no [survey] default_crs", field="crs")
        out.append(CrsPlacement(path, crs, site_crs, cache))
    return out
