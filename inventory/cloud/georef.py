"""Placing a scanner's own-frame cloud in the site CRS from the station pose.

Convention (the site-folder contract, stations.csv)
---------------------------------------------------
``p_site = R @ p_scanner + (x, y, z)`` with ``R = Rz(yaw) @ Ry(pitch) @ Rx(roll)``:
right-handed axes, angles in degrees, active rotations, yaw counter-clockwise from site
east seen from above. This equals scipy's
``Rotation.from_euler("ZYX", [yaw, pitch, roll], degrees=True).as_matrix()`` (intrinsic
z-y'-x'' rotations), which the tests use as the reference.

Scanner-frame coordinates are metres; the pose translation is in the site CRS (metres).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from ..errors import InputError

__all__ = ["StationPose", "rotation_matrix", "poses_from_stations", "POSE_COLUMNS"]

POSE_COLUMNS = ("x", "y", "z", "roll_deg", "pitch_deg", "yaw_deg")


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


def _blank(v: Any) -> bool:
    if v is None:
        return True
    if isinstance(v, str):
        return v.strip() == ""
    try:
        return bool(np.isnan(v))
    except TypeError:
        return False


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
        line = int(row.get("line", i + 2)) if not _blank(row.get("line")) else i + 2
        name = str(row.get("file", "")).strip()
        if not name:
            raise InputError(path, "file name is blank", line=line, field="file")
        blanks = [c for c in POSE_COLUMNS if _blank(row.get(c))]
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
