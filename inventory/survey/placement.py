"""Placing a survey's clouds in the site CRS: one :class:`Placement` per cloud file.

A cloud arrives in one of three ways, each a :class:`Placement` that
:func:`survey_placements` makes once per file: already in a CRS and reprojected to the site
CRS (:class:`CrsPlacement`), in a scanner's own frame with a station pose from
``stations.csv`` (:class:`StationPlacement`), or in a moving scanner's own frame with the
pose at each point's time from ``trajectory.csv`` (:class:`TrajectoryPlacement`,
:func:`georeference`). An E57 file's scans are placed by their own poses, or by poses that
``stations.csv`` gives them (:class:`E57Placement`). A survey with ``control.csv`` is in a
frame of its own: each file is placed in that frame as above (a file with no pose as it is,
:class:`FramePlacement`) and then moved by the survey's fitted similarity transform
(:class:`ControlPlacement`, :mod:`inventory.site.control`).

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
from inventory.io.clouds import CRS_SIDECAR, DEFAULT_CHUNK, open_cloud
from inventory.io.crs import Reprojector, TransformerCache, parse_crs
from inventory.io.records import select
from inventory.io.tables import is_blank
from inventory.model.pose import (
    DEFAULT_MAX_GAP_S,
    Trajectory,
    euler_rotation,
    rotation_matrix,
)
from inventory.site.control import CONTROL_FILE, DEFAULT_CONTROL_RMS_MAX_M, Registration, read_control
from inventory.site.load import Site, SurveyRef
from inventory.site.trajectory import read_trajectories

__all__ = ["POSE_COLUMNS", "ControlPlacement", "CrsPlacement", "E57Placement", "FramePlacement", "Placement", "StationPlacement", "StationPose", "TrajectoryPlacement",
           "georeference", "poses_from_stations", "scan_poses_from_stations", "survey_placements",
           "survey_registration"]

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
        if not is_blank(row.get("scan")):
            continue  # one scan of an E57 file: scan_poses_from_stations
        blanks = [c for c in POSE_COLUMNS if is_blank(row.get(c))]
        if len(blanks) == len(POSE_COLUMNS):
            out[name] = None
            continue
        if blanks:
            raise InputError(path, "pose is incomplete: give all of x, y, z, roll_deg, pitch_deg, "
                             "yaw_deg or none of them", line=line, field=blanks[0])
        out[name] = StationPose(str(row.get("station_id", "") or name), **_pose_values(row, path, line))
    return out


def _pose_values(row: Mapping[str, Any], path: "str | Path", line: int) -> dict[str, float]:
    vals = {}
    for c in POSE_COLUMNS:
        try:
            vals[c] = float(row[c])
        except (TypeError, ValueError) as err:
            raise InputError(path, f"not a number: {row[c]!r}", line=line, field=c) from err
        if not math.isfinite(vals[c]):
            raise InputError(path, f"not a finite number: {row[c]!r}", line=line, field=c)
    return vals


def scan_poses_from_stations(stations: Any, path: "str | Path" = "stations.csv"
                             ) -> dict[str, dict[str, tuple[StationPose, int]]]:
    """The poses that ``stations.csv`` gives to single scans of E57 files (rows with a
    ``scan``: the scan's 1-based number or its name): ``{file: {scan: (pose, line)}}``.

    A scan row must give the whole pose (its file's own pose is what a blank would mean).
    """
    rows = stations.to_dict("records") if hasattr(stations, "to_dict") else list(stations)
    out: dict[str, dict[str, tuple[StationPose, int]]] = {}
    for i, row in enumerate(rows):
        if is_blank(row.get("scan")):
            continue
        line = int(row.get("line", i + 2)) if not is_blank(row.get("line")) else i + 2
        name = str(row.get("file", "")).strip()
        scan = str(row["scan"]).strip()
        blanks = [c for c in POSE_COLUMNS if is_blank(row.get(c))]
        if blanks:
            raise InputError(path, f"scan {scan!r} of {name}: a scan row replaces the scan's pose and needs all "
                             "of x, y, z, roll_deg, pitch_deg, yaw_deg", line=line, field=blanks[0])
        pose = StationPose(str(row.get("station_id", "") or scan), **_pose_values(row, path, line))
        out.setdefault(name, {})[scan] = (pose, line)
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

    def open(self, chunk_size: int = DEFAULT_CHUNK) -> Any:
        """The file open for streaming (see :func:`~inventory.io.clouds.open_cloud`)."""
        return open_cloud(self.path, chunk_size=chunk_size)

    def extent(self) -> tuple[float, float, float, float]:
        """Site (xmin, ymin, xmax, ymax) the file's points can reach."""
        with self.open() as cloud:
            return self.box(cloud.mins, cloud.maxs)

    def zrange(self) -> tuple[float, float]:
        """Lowest and highest height the placed points can have (for a registration's box)."""
        with self.open() as cloud:
            return float(cloud.mins[2]), float(cloud.maxs[2])


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

    def zrange(self) -> tuple[float, float]:
        with self.open() as cloud:
            lo, hi = cloud.mins, cloud.maxs
        corners = np.array([[a, b, c] for a in (lo[0], hi[0]) for b in (lo[1], hi[1]) for c in (lo[2], hi[2])]).T
        z = (self.pose.matrix @ corners)[2] + self.pose.z
        return float(z.min()), float(z.max())


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
        if not keep.all():
            chunk = select(chunk, keep)     # whole records, not field by field
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


class FramePlacement(Placement):
    """A cloud already in the survey's own frame (a survey registered by control points):
    its coordinates are taken as they are, for :class:`ControlPlacement` to move."""

    def box(self, mins: np.ndarray, maxs: np.ndarray) -> tuple[float, float, float, float]:
        return float(mins[0]), float(mins[1]), float(maxs[0]), float(maxs[1])

    def place(self, chunk: np.ndarray) -> np.ndarray:
        return chunk


class E57Placement(Placement):
    """An E57 file: each scan placed by its pose (the file's, or the one ``stations.csv``
    gives it), then from the file's frame to the site: reprojected from ``crs`` (the file's
    ``coordinateMetadata`` or ``[survey] default_crs``), or taken as the survey frame
    (``crs=None``, for :class:`ControlPlacement`). Scans whose pose came from stations.csv
    are in the site CRS (or the survey frame) already."""

    def __init__(self, path: Path, scan_poses: "dict[str, tuple[StationPose, int]]", crs: CRS | None,
                 site_crs: CRS | None = None, cache: TransformerCache | None = None,
                 stations_csv: "Path | None" = None) -> None:
        super().__init__(path)
        self.scan_poses = scan_poses
        self.crs = crs
        self._site_crs = site_crs
        self._cache = cache
        self._stations_csv = stations_csv
        self._given: dict[int, tuple[np.ndarray, np.ndarray]] | None = None

    def given_poses(self) -> dict[int, tuple[np.ndarray, np.ndarray]]:
        """``{scan index: (R, t)}`` from stations.csv, scans named by number or name."""
        if self._given is None:
            from inventory.io.e57 import E57Reader

            with E57Reader(self.path) as reader:
                count = len(reader.scans)
                names = sorted(s.name for s in reader.scans if s.name)
                found = {key: reader.scan_index(key) for key in self.scan_poses}
            given = {}
            where = self._stations_csv or "stations.csv"
            for key, (pose, line) in self.scan_poses.items():
                idx = found[key]
                if idx is None and key == "":
                    raise InputError(where, f"{self.path.name} holds {count} scans: give each pose a scan "
                                     "(number or name)", line=line, field="scan")
                if idx is None:
                    raise InputError(where, f"{self.path.name} has no scan {key!r} (it holds {count}: numbers "
                                     f"1-{count} or names {', '.join(names) or 'none'})", line=line, field="scan")
                given[idx] = (pose.matrix, pose.origin)
            self._given = given
        return self._given

    def open(self, chunk_size: int = DEFAULT_CHUNK) -> Any:
        return open_cloud(self.path, chunk_size=chunk_size, poses=self.given_poses())

    @property
    def reprojector(self) -> Reprojector | None:
        if self.crs is None or self._cache is None:
            return None
        return self._cache.get(self.crs, self._site_crs)

    def _scan_boxes(self) -> list[tuple[int, np.ndarray, np.ndarray]]:
        """Each scan's placed box corners: ``(index, lo, hi)`` in the file's frame (or the
        site's, for scans posed by stations.csv)."""
        out = []
        with self.open() as reader:
            for s, (lo, hi) in zip(reader.scans, reader.local_bounds()):
                if not np.all(np.isfinite(lo)):
                    continue
                rot, t = reader.pose(s.index)
                corners = np.array([[a, b, c] for a in (lo[0], hi[0]) for b in (lo[1], hi[1]) for c in (lo[2], hi[2])])
                placed = corners @ rot.T + t
                out.append((s.index, placed.min(axis=0), placed.max(axis=0)))
        return out

    def extent(self) -> tuple[float, float, float, float]:
        boxes = []
        given = self.given_poses()
        reproject = self.reprojector
        for idx, lo, hi in self._scan_boxes():
            if reproject is None or idx in given or reproject.is_identity:
                boxes.append((lo[0], lo[1], hi[0], hi[1]))
            else:
                boxes.append(reproject.bounds(lo[0], lo[1], hi[0], hi[1]))
        if not boxes:
            return 0.0, 0.0, 0.0, 0.0
        b = np.asarray(boxes, float)
        return float(b[:, 0].min()), float(b[:, 1].min()), float(b[:, 2].max()), float(b[:, 3].max())

    def box(self, mins: np.ndarray, maxs: np.ndarray) -> tuple[float, float, float, float]:
        return self.extent()

    def zrange(self) -> tuple[float, float]:
        boxes = self._scan_boxes()
        if not boxes:
            return 0.0, 0.0
        return float(min(b[1][2] for b in boxes)), float(max(b[2][2] for b in boxes))

    def place(self, chunk: np.ndarray) -> np.ndarray:
        reproject = self.reprojector
        if reproject is None or reproject.is_identity or not len(chunk):
            return chunk
        if int(chunk["PointSourceId"][0]) - 1 in self.given_poses():
            return chunk  # a reader's chunk holds one scan's points; this scan is posed in the site
        chunk["X"], chunk["Y"], chunk["Z"] = reproject(chunk["X"], chunk["Y"], chunk["Z"])
        return chunk


class ControlPlacement(Placement):
    """A cloud of a survey registered by control points: placed in the survey's own frame
    by ``inner``, then moved to the site by the survey's fitted similarity transform."""

    def __init__(self, inner: Placement, registration: Registration) -> None:
        super().__init__(inner.path)
        self.inner = inner
        self.registration = registration

    def open(self, chunk_size: int = DEFAULT_CHUNK) -> Any:
        return self.inner.open(chunk_size)

    def _moved_box(self, box: tuple[float, float, float, float], z: tuple[float, float]
                   ) -> tuple[float, float, float, float]:
        corners = np.array([[a, b, c] for a in (box[0], box[2]) for b in (box[1], box[3]) for c in z])
        q = self.registration.transform.apply_xyz(corners)
        return float(q[:, 0].min()), float(q[:, 1].min()), float(q[:, 0].max()), float(q[:, 1].max())

    def extent(self) -> tuple[float, float, float, float]:
        return self._moved_box(self.inner.extent(), self.inner.zrange())

    def box(self, mins: np.ndarray, maxs: np.ndarray) -> tuple[float, float, float, float]:
        return self._moved_box(self.inner.box(mins, maxs), self.inner.zrange())

    def zrange(self) -> tuple[float, float]:
        box = self.inner.extent()
        z = self.inner.zrange()
        corners = np.array([[a, b, c] for a in (box[0], box[2]) for b in (box[1], box[3]) for c in z])
        q = self.registration.transform.apply_xyz(corners)
        return float(q[:, 2].min()), float(q[:, 2].max())

    def place(self, chunk: np.ndarray) -> np.ndarray:
        chunk = self.inner.place(chunk)
        chunk["X"], chunk["Y"], chunk["Z"] = self.registration.transform.apply(chunk["X"], chunk["Y"], chunk["Z"])
        return chunk

    def warning(self) -> InputWarning | None:
        return self.inner.warning()

    @property
    def outside_span(self) -> int:  # type: ignore[override]
        return self.inner.outside_span

    @property
    def in_gap(self) -> int:  # type: ignore[override]
        return self.inner.in_gap


def survey_registration(site: Site, ref: SurveyRef) -> Registration | None:
    """The survey's fit to its ``control.csv`` (as the site loader made it, else read now);
    ``None`` when the survey has no control points. Raises
    :class:`~inventory.errors.InputError` for control that cannot be used."""
    existing = getattr(ref, "control", None)
    if existing is not None:
        return existing
    path = Path(ref.folder) / CONTROL_FILE
    if not path.is_file():
        return None
    survey = site.config.survey
    return read_control(path, model=getattr(survey, "control_model", "7-parameter"),
                        tolerance_m=float(getattr(survey, "control_rms_max_m", DEFAULT_CONTROL_RMS_MAX_M)))


def _no_crs(path: Path) -> CRSError:
    if path.suffix.lower() in (".ply", ".xyz", ".txt"):
        return CRSError(path, f"a {path.suffix.lower().lstrip('.').upper()} file carries no CRS: give it in "
                        f"{path.with_suffix('.prj').name} or {CRS_SIDECAR} beside it (WKT or e.g. EPSG:25832), "
                        "a pose in stations.csv, control points in control.csv, or [survey] default_crs in site.toml",
                        field="crs")
    return CRSError(path, "the file carries no CRS, has no pose in stations.csv, and site.toml "
                    "has no [survey] default_crs", field="crs")


def survey_placements(site: Site, ref: SurveyRef, site_crs: CRS, cache: TransformerCache) -> list[Placement]:
    """The :class:`Placement` of each cloud file of a survey, in the order of ``ref.files``.

    A file with a pose in ``stations.csv`` is a static scanner's; else the trajectory of
    ``trajectory.csv`` named for the file, or the table's one trajectory for every file that
    ``stations.csv`` does not list (as the site check does), makes it a moving scanner's;
    else it is placed from its own CRS or ``[survey] default_crs``, and a file with neither
    is a :class:`~inventory.errors.CRSError`. An E57 file's scans are placed by their poses
    (:class:`E57Placement`). A survey with ``control.csv`` has every file's placement
    followed by its fitted transform (:class:`ControlPlacement`); its files need no CRS.
    """
    registration = survey_registration(site, ref)
    stations_csv = Path(ref.folder) / "stations.csv"
    scan_poses: dict[str, dict[str, tuple[StationPose, int]]] = {}
    if getattr(ref, "stations", None) is not None:
        scan_poses = scan_poses_from_stations(ref.stations, stations_csv)
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
        inner = _placement(path, poses, scan_poses, trajectories, listed, registration is not None, default,
                           site_crs, cache, max_gap_s, stations_csv)
        out.append(ControlPlacement(inner, registration) if registration is not None else inner)
    return out


def _placement(path: Path, poses: dict, scan_poses: dict, trajectories: dict, listed: set, registered: bool,
               default: Any, site_crs: CRS, cache: TransformerCache, max_gap_s: float,
               stations_csv: Path) -> Placement:
    """One file's placement to the site CRS, or to the survey frame when ``registered``."""
    if path.suffix.lower() == ".e57":
        given = dict(scan_poses.get(path.name, {}))
        pose = poses.get(path.name)
        if pose is not None:   # a whole-file pose row: the file's one scan
            given[""] = (pose, 0)
        placement = E57Placement(path, given, None, site_crs, cache, stations_csv)
        if registered:
            return placement
        with placement.open() as reader:
            crs = reader.crs if reader.crs is not None else (parse_crs(default, where=str(path)) if default else None)
            unposed = [s for s in reader.scans if s.index not in placement.given_poses()]
        if crs is None and unposed:
            raise CRSError(path, "the E57 file's frame has no CRS (coordinateMetadata), site.toml has no "
                           "[survey] default_crs and the survey has no control.csv", field="crs")
        placement.crs = crs
        return placement
    pose = poses.get(path.name)
    if pose is not None:
        return StationPlacement(path, pose)
    moving = trajectories.get(path.name) or (trajectories.get(None) if path.name not in listed else None)
    if moving is not None:
        return TrajectoryPlacement(path, moving, max_gap_s)
    if registered:
        return FramePlacement(path)
    with open_cloud(path, default_crs=default) as cloud:
        crs = cloud.crs
    if crs is None:
        raise _no_crs(path)
    return CrsPlacement(path, crs, site_crs, cache)
