"""A cheap look at a point cloud file: header only, no points decoded.

Used by the site check to name unreadable files and files whose CRS cannot reach the site's,
before any long step starts.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

__all__ = ["CloudInfo", "inspect_cloud"]


@dataclass(frozen=True)
class CloudInfo:
    """Header facts of one LAS/LAZ/COPC file; ``error`` says why it could not be read."""

    path: Path
    point_count: int = 0
    bounds: tuple[tuple[float, float, float], tuple[float, float, float]] = ((0, 0, 0), (0, 0, 0))
    crs_wkt: str | None = None
    version: str = ""
    point_format: int = -1
    error: str | None = None


def inspect_cloud(path: str | Path) -> CloudInfo:
    """Read the header of a LAS/LAZ/COPC file.

    Never raises for a bad file: the reason goes into ``CloudInfo.error``.
    """
    import laspy

    path = Path(path)
    try:
        with laspy.open(path) as reader:
            header = reader.header
            try:
                crs = header.parse_crs()
            except Exception as err:  # laspy raises several types for broken CRS VLRs
                return CloudInfo(path, error=f"its CRS record cannot be parsed: {err}")
            return CloudInfo(
                path,
                point_count=int(header.point_count),
                bounds=(tuple(map(float, header.mins)), tuple(map(float, header.maxs))),
                crs_wkt=crs.to_wkt() if crs is not None else None,
                version=f"{header.version.major}.{header.version.minor}",
                point_format=int(header.point_format.id),
            )
    except (laspy.errors.LaspyException, OSError, ValueError) as err:
        return CloudInfo(path, error=str(err) or type(err).__name__)
