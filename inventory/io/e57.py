"""Streamed reading of E57 files (ASTM E2807), the exchange format of terrestrial scanners.

Read through libE57Format's Python bindings (pye57). An E57 file holds several scans
(``/data3D``), each in its own frame with a pose (a unit quaternion ``w, x, y, z`` and a
translation) that maps the scan's frame to the file's frame: ``p_file = R(q) p_scan + t``.
For every scan this reader takes

- cartesian coordinates, or spherical ones (range, azimuth, elevation: ``x = r cos(el)
  cos(az)``, ``y = r cos(el) sin(az)``, ``z = r sin(el)``) when the scan has no cartesian
  ones;
- the invalid-point flag of the coordinates used (``cartesianInvalidState`` or
  ``sphericalInvalidState``: 0 valid, 1 direction only, 2 no return): only valid points
  are kept;
- intensity, brought to LAS's 16-bit range with the scan's ``intensityLimits`` (else the
  limits of the intensity field itself): ``I16 = round(65535 (I - min) / (max - min))``;
- colour, the same way with ``colorLimits`` (8-bit 0-255 becomes 0-65535, as LAS stores it);
- ``returnIndex`` / ``returnCount`` as LAS return number (1-based) and number of returns;
- ``timeStamp`` (seconds after the scan's ``acquisitionStart``, GPS time) as adjusted standard
  GPS time, the LAS 1.4 time base, when the scan gives its start; ``isIntensityInvalid``,
  ``isColorInvalid`` and ``isTimeStampInvalid`` blank the value (0, or NaN for time).

Points come out in :data:`~inventory.io.clouds.POINT_DTYPE` chunks of at most
``chunk_size``, one scan at a time (``PointSourceId`` is the scan's 1-based index;
``StationRange`` its range from the scan's origin), so a file of any size is streamed.
A pose given by the caller for a scan (from ``stations.csv``) replaces the file's; a scan
with neither is refused, as its frame is unknown.

A file's bounds are measured from its points (one extra pass of the coordinates, kept per
file for the run): writers disagree on the frame of ``cartesianBounds``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import datetime
from functools import lru_cache
from pathlib import Path
from typing import Any, Iterator, Mapping

import numpy as np
from pyproj import CRS

from inventory.errors import InputError
from inventory.io._bounds import BoxFromBounds
from inventory.io.crs import parse_crs
from inventory.model.pose import ADJUSTED_GPS_OFFSET_S, utc_from_adjusted_gps

__all__ = ["E57Reader", "E57Scan", "E57_SUFFIXES"]

E57_SUFFIXES = (".e57",)

#: Largest value of a LAS 16-bit intensity or colour channel (ASPRS LAS 1.4 R15, table 7).
LAS_16BIT_MAX = 65535

_CARTESIAN = ("cartesianX", "cartesianY", "cartesianZ")
_SPHERICAL = ("sphericalRange", "sphericalAzimuth", "sphericalElevation")
_COLOURS = (("colorRed", "Red"), ("colorGreen", "Green"), ("colorBlue", "Blue"))


def _libe57() -> Any:
    try:
        from pye57 import libe57
    except ImportError as err:  # a core dependency; named in case an install lost it
        raise ImportError("reading E57 files needs pye57 (pip install pye57)") from err
    return libe57


@dataclass
class E57Scan:
    """One scan of an E57 file.

    Attributes
    ----------
    index : int
        0-based position in ``/data3D``.
    name : str
    count : int
        Point records, invalid ones included.
    rotation : (3, 3) ndarray or None
        From the scan's pose quaternion; ``None`` when the scan has no pose.
    translation : (3,) ndarray or None
    fields : tuple of str
    """

    index: int
    name: str
    count: int
    rotation: np.ndarray | None
    translation: np.ndarray | None
    fields: tuple
    intensity_limits: tuple[float, float] | None
    colour_limits: dict
    #: ``acquisitionStart`` / ``acquisitionEnd`` as GPS seconds since 1980-01-06 (E57
    #: DateTime); ``None`` when absent or zero (writers that fill in nothing write 0).
    acquisition_start: float | None = None
    acquisition_end: float | None = None

    @property
    def label(self) -> str:
        return f"scan {self.index + 1}" + (f" {self.name!r}" if self.name else "")

    @property
    def spherical(self) -> bool:
        return not all(f in self.fields for f in _CARTESIAN)


def _value(node: Any, *path: str) -> Any:
    """The value at ``path`` below a structure node, ``None`` when it is not there."""
    if not node.isDefined("/".join(path)):
        return None
    for key in path:
        node = node[key]
    return node.value() if hasattr(node, "value") else node


def _field_limits(proto: Any, name: str) -> tuple[float, float] | None:
    """A prototype field's declared minimum and maximum (meaningful for integer fields
    and for float fields whose writer bounded them)."""
    lib = _libe57()
    if not proto.isDefined(name):
        return None
    node = proto.get(name)
    for kind in ("IntegerNode", "ScaledIntegerNode", "FloatNode"):
        try:
            typed = getattr(lib, kind)(node)
        except Exception:  # not of this kind: libE57 refuses the downcast
            continue
        lo, hi = float(typed.minimum()), float(typed.maximum())
        if kind == "ScaledIntegerNode":
            lo, hi = lo * typed.scale() + typed.offset(), hi * typed.scale() + typed.offset()
        if kind == "FloatNode" and max(abs(lo), abs(hi)) > 1e30:
            return None  # unbounded float field: no limits declared
        return lo, hi
    return None


def _scan(index: int, node: Any) -> E57Scan:
    lib = _libe57()
    scan = lib.StructureNode(node)
    points = lib.CompressedVectorNode(scan.get("points"))
    proto = lib.StructureNode(points.prototype())
    fields = tuple(proto.get(i).elementName() for i in range(proto.childCount()))
    rotation = translation = None
    if scan.isDefined("pose"):
        q = [_value(scan, "pose", "rotation", k) for k in "wxyz"]
        t = [_value(scan, "pose", "translation", k) for k in "xyz"]
        q = [1.0, 0.0, 0.0, 0.0] if any(v is None for v in q) else [float(v) for v in q]
        t = [0.0, 0.0, 0.0] if any(v is None for v in t) else [float(v) for v in t]
        if not all(math.isfinite(v) for v in q + t) or math.sqrt(sum(v * v for v in q)) < 1e-9:
            raise ValueError(f"scan {index + 1}: its pose is not a rotation quaternion and a translation "
                             f"({q}, {t})")
        rotation = _quaternion_matrix(q)
        translation = np.asarray(t, float)
    limits = None
    lo, hi = _value(scan, "intensityLimits", "intensityMinimum"), _value(scan, "intensityLimits", "intensityMaximum")
    if lo is not None and hi is not None:
        limits = (float(lo), float(hi))
    elif "intensity" in fields:
        limits = _field_limits(proto, "intensity")
    colour = {}
    for e57_name, _ in _COLOURS:
        if e57_name not in fields:
            continue
        key = e57_name[len("color"):]
        lo, hi = _value(scan, "colorLimits", f"color{key}Minimum"), _value(scan, "colorLimits", f"color{key}Maximum")
        colour[e57_name] = (float(lo), float(hi)) if lo is not None and hi is not None else \
            (_field_limits(proto, e57_name) or (0.0, 255.0))
    name = _value(scan, "name")
    times = []
    for key in ("acquisitionStart", "acquisitionEnd"):
        t = _value(scan, key, "dateTimeValue")
        times.append(float(t) if t is not None and float(t) > 0 else None)
    return E57Scan(index, str(name or ""), int(points.childCount()), rotation, translation, fields, limits, colour,
                   times[0], times[1])


def _quaternion_matrix(q: list[float]) -> np.ndarray:
    """Rotation matrix of a quaternion ``[w, x, y, z]`` (normalised first)."""
    w, x, y, z = np.asarray(q, float) / math.sqrt(sum(v * v for v in q))
    return np.array([
        [1 - 2 * (y * y + z * z), 2 * (x * y - w * z), 2 * (x * z + w * y)],
        [2 * (x * y + w * z), 1 - 2 * (x * x + z * z), 2 * (y * z - w * x)],
        [2 * (x * z - w * y), 2 * (y * z + w * x), 1 - 2 * (x * x + y * y)],
    ])


def _scale16(values: np.ndarray, limits: tuple[float, float] | None) -> np.ndarray:
    """Values spread over ``limits`` as LAS 16-bit integers (clipped)."""
    if limits is None:
        lo, hi = 0.0, 1.0
    else:
        lo, hi = limits
    span = hi - lo
    if not span > 0:
        return np.zeros(len(values), np.uint16)
    out = np.rint((np.asarray(values, float) - lo) * (LAS_16BIT_MAX / span))
    return np.clip(out, 0, LAS_16BIT_MAX).astype(np.uint16)


class E57Reader(BoxFromBounds):
    """An E57 file open for streaming; use through :func:`inventory.io.clouds.open_cloud`.

    Attributes
    ----------
    path : Path
    count : int
        Point records of all scans (invalid ones included).
    scans : list of E57Scan
    crs : pyproj.CRS or None
        From the file's ``coordinateMetadata`` when pyproj reads it as a CRS, else
        ``default_crs``.
    crs_source : str or None
        ``"e57"``, ``"default"`` or ``None``.
    has_colour : bool
    read, invalid : int
        Point records read so far, and those left out as invalid.
    """

    def __init__(self, path: "str | Path", *, chunk_size: int = 1_000_000,
                 default_crs: "CRS | str | None" = None,
                 poses: "Mapping[int, tuple[Any, Any]] | None" = None) -> None:
        self.path = Path(path)
        self.chunk_size = int(chunk_size)
        self.poses = {int(k): (np.asarray(r, float).reshape(3, 3), np.asarray(t, float).reshape(3))
                      for k, (r, t) in (poses or {}).items()}
        if not self.path.is_file():
            raise InputError(self.path, "file not found")
        lib = _libe57()
        try:
            self._file = lib.ImageFile(str(self.path), "r")
        except Exception as err:  # libE57's E57Exception, and RuntimeError from the bindings
            raise InputError(self.path, f"not a readable E57 file, truncated or damaged ({_why(err)})") from err
        try:
            root = self._file.root()
            if not root.isDefined("data3D"):
                raise InputError(self.path, "an E57 file with no scan (/data3D missing)")
            data3d = lib.VectorNode(root.get("data3D"))
            self.scans = [_scan(i, data3d.get(i)) for i in range(data3d.childCount())]
            meta = _value(root, "coordinateMetadata")
        except InputError:
            self.close()
            raise
        except Exception as err:
            self.close()
            raise InputError(self.path, f"damaged E57 structure ({_why(err)})") from err
        if not self.scans:
            self.close()
            raise InputError(self.path, "an E57 file with no scan (/data3D is empty)")
        for i in self.poses:
            if not 0 <= i < len(self.scans):
                self.close()
                raise InputError(self.path, f"a pose is given for scan {i + 1} but the file has "
                                            f"{len(self.scans)} scan(s)")
        for s in self.scans:
            if s.spherical and not all(f in s.fields for f in _SPHERICAL):
                self.close()
                raise InputError(self.path, f"{s.label} has neither cartesian nor spherical coordinates")
        self.count = sum(s.count for s in self.scans)
        crs, source = None, None
        if isinstance(meta, str) and meta.strip():
            try:
                crs, source = CRS.from_user_input(meta.strip()), "e57"
            except Exception:  # free text, not a CRS: the file says nothing usable
                crs = None
        if crs is None and default_crs is not None:
            crs, source = parse_crs(default_crs, where=str(self.path)), "default"
        self.crs, self.crs_source = crs, source
        self.has_colour = any(s.colour_limits for s in self.scans)
        self.read = 0
        self.invalid = 0

    # -- poses and bounds
    def pose(self, index: int) -> tuple[np.ndarray, np.ndarray]:
        """``(R, t)`` placing scan ``index`` (0-based): the caller's pose, else the file's."""
        if index in self.poses:
            return self.poses[index]
        s = self.scans[index]
        if s.rotation is None:
            raise InputError(self.path, f"{s.label} has no pose (ASTM E2807 data3D pose); give it one in "
                                        f"stations.csv (file {self.path.name}, scan {index + 1})", field="pose")
        return s.rotation, s.translation

    def scan_index(self, key: str) -> int | None:
        """The 0-based index of the scan named by ``key``: its 1-based number or its name
        (blank: the file's only scan); ``None`` when no scan answers to it."""
        key = str(key).strip()
        if key == "":
            return 0 if len(self.scans) == 1 else None
        if key.isdigit() and 1 <= int(key) <= len(self.scans):
            return int(key) - 1
        return next((s.index for s in self.scans if s.name == key), None)

    def acquired_utc(self) -> "datetime | None":
        """When the last scan ended (else started), in UTC; ``None`` when the file does not say
        or says a time before 2017 (whose leap seconds are not known here)."""
        times = [s.acquisition_end or s.acquisition_start for s in self.scans]
        times = [t for t in times if t]
        if not times:
            return None
        try:
            return utc_from_adjusted_gps(max(times) - ADJUSTED_GPS_OFFSET_S)
        except ValueError:
            return None

    def missing_poses(self) -> list[E57Scan]:
        """The scans with no pose in the file and none given by the caller."""
        return [s for s in self.scans if s.rotation is None and s.index not in self.poses]

    def local_bounds(self) -> list[tuple[np.ndarray, np.ndarray]]:
        """Each scan's ``(mins, maxs)`` in its own frame, measured from its valid points."""
        st = self.path.stat()
        return _local_bounds(str(self.path.resolve()), st.st_mtime_ns, st.st_size, self.chunk_size)

    @property
    def bounds(self) -> tuple[np.ndarray, np.ndarray]:
        """``(mins, maxs)`` of the placed points' box: each scan's own box through its pose."""
        lo, hi = np.full(3, np.inf), np.full(3, -np.inf)
        for s, (smin, smax) in zip(self.scans, self.local_bounds()):
            if not np.all(np.isfinite(smin)):
                continue  # no valid point
            rot, t = self.pose(s.index)
            corners = np.array([[a, b, c] for a in (smin[0], smax[0]) for b in (smin[1], smax[1])
                                for c in (smin[2], smax[2])])
            placed = corners @ rot.T + t
            lo, hi = np.minimum(lo, placed.min(axis=0)), np.maximum(hi, placed.max(axis=0))
        if not np.all(np.isfinite(lo)):
            # a box at 0, 0 would stand for nothing and mislead the survey's extent
            raise InputError(self.path, "no point in the file" if self.count == 0 else
                             f"no valid point in the file ({self.count:,} point(s), each flagged invalid or not "
                             "a finite number)")
        return lo, hi

    # -- points
    def __enter__(self) -> "E57Reader":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        f = getattr(self, "_file", None)
        if f is not None:
            try:
                f.close()
            except Exception:  # closing a file that failed half-way must not hide the first error
                pass
            self._file = None

    def chunks(self) -> Iterator[np.ndarray]:
        """Yield every scan's valid points, placed by its pose, in :data:`POINT_DTYPE` chunks."""
        for s in self.scans:
            rot, t = self.pose(s.index)
            for raw in self._scan_arrays(s, with_attributes=True):
                yield self._points(s, raw, rot, t)
        if self.read != self.count:
            raise InputError(self.path, f"truncated or damaged: the file lists {self.count:,} points "
                                        f"but only {self.read:,} could be read")

    def _scan_arrays(self, s: E57Scan, with_attributes: bool) -> Iterator[dict[str, np.ndarray]]:
        """Raw field arrays of scan ``s``, ``chunk_size`` records at a time (invalid ones
        included, coordinates in the scan's frame)."""
        lib = _libe57()
        coords = _SPHERICAL if s.spherical else _CARTESIAN
        names: list[tuple[str, str]] = [(f, "d") for f in coords]
        state = "sphericalInvalidState" if s.spherical else "cartesianInvalidState"
        if state in s.fields:
            names.append((state, "b"))
        if with_attributes:
            for f in ("intensity", "colorRed", "colorGreen", "colorBlue", "timeStamp"):
                if f in s.fields:
                    names.append((f, "d"))
            for f in ("isIntensityInvalid", "isColorInvalid", "isTimeStampInvalid"):
                if f in s.fields:
                    names.append((f, "b"))
            for f in ("returnIndex", "returnCount"):
                if f in s.fields:
                    names.append((f, "q"))
        cap = max(1, min(self.chunk_size, s.count))
        arrays = {f: np.empty(cap, dtype) for f, dtype in names}
        scan_node = lib.StructureNode(lib.VectorNode(self._file.root().get("data3D")).get(s.index))
        points = lib.CompressedVectorNode(scan_node.get("points"))
        bufs = lib.VectorSourceDestBuffer()
        for f, _ in names:
            bufs.append(lib.SourceDestBuffer(self._file, f, arrays[f], cap, True, True))
        reader = None
        done = 0
        try:
            reader = points.reader(bufs)
            while done < s.count:
                n = int(reader.read())
                if n == 0:
                    break
                done += n
                self.read += n
                yield {f: a[:n].copy() for f, a in arrays.items()}
        except InputError:
            raise
        except Exception as err:  # libE57: bad checksum, bad packet, read past the end
            raise InputError(self.path, f"truncated or damaged: {s.label} could not be read after "
                                        f"{done:,} of {s.count:,} points ({_why(err)})") from err
        finally:
            if reader is not None:
                try:
                    reader.close()
                except Exception:  # a reader that failed may refuse to close; the error is raised above
                    pass

    @staticmethod
    def _xyz(s: E57Scan, raw: dict[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
        """Valid points' scan-frame coordinates ``(n, 3)`` and the validity mask."""
        state = "sphericalInvalidState" if s.spherical else "cartesianInvalidState"
        if s.spherical:
            r, az, el = raw["sphericalRange"], raw["sphericalAzimuth"], raw["sphericalElevation"]
            xyz = np.column_stack([r * np.cos(el) * np.cos(az), r * np.cos(el) * np.sin(az), r * np.sin(el)])
        else:
            xyz = np.column_stack([raw["cartesianX"], raw["cartesianY"], raw["cartesianZ"]])
        valid = raw[state] == 0 if state in raw else np.ones(len(xyz), bool)
        valid &= np.all(np.isfinite(xyz), axis=1)
        return xyz[valid], valid

    def _points(self, s: E57Scan, raw: dict[str, np.ndarray], rot: np.ndarray, t: np.ndarray) -> np.ndarray:
        from inventory.io.clouds import empty_points

        xyz, valid = self._xyz(s, raw)
        self.invalid += int((~valid).sum())
        out = empty_points(len(xyz))
        placed = xyz @ rot.T + t
        out["X"], out["Y"], out["Z"] = placed[:, 0], placed[:, 1], placed[:, 2]
        out["StationRange"] = np.sqrt((xyz * xyz).sum(axis=1))
        out["PointSourceId"] = s.index + 1
        if "intensity" in raw:
            out["Intensity"] = _scale16(raw["intensity"][valid], s.intensity_limits)
            if "isIntensityInvalid" in raw:
                out["Intensity"][raw["isIntensityInvalid"][valid] != 0] = 0
        for e57_name, dim in _COLOURS:
            if e57_name in raw:
                out[dim] = _scale16(raw[e57_name][valid], s.colour_limits[e57_name])
                if "isColorInvalid" in raw:
                    out[dim][raw["isColorInvalid"][valid] != 0] = 0
        if "timeStamp" in raw and s.acquisition_start is not None:
            # seconds since the scan's start (ASTM E2807), as adjusted standard GPS time (LAS 1.4)
            gps = raw["timeStamp"][valid] + (s.acquisition_start - ADJUSTED_GPS_OFFSET_S)
            if "isTimeStampInvalid" in raw:
                gps[raw["isTimeStampInvalid"][valid] != 0] = np.nan
            out["GpsTime"] = gps
        out["ReturnNumber"] = raw["returnIndex"][valid] + 1 if "returnIndex" in raw else 1
        out["NumberOfReturns"] = raw["returnCount"][valid] if "returnCount" in raw else 1
        return out


def _why(err: Exception) -> str:
    text = str(err).strip().splitlines()
    return text[0] if text else type(err).__name__


@lru_cache(maxsize=64)
def _local_bounds(path: str, mtime_ns: int, size: int, chunk_size: int) -> list[tuple[np.ndarray, np.ndarray]]:
    """Per-scan bounds of a file version (cached: the site check, the survey's extent and
    its reading each ask)."""
    with E57Reader(path, chunk_size=chunk_size) as reader:
        out = []
        for s in reader.scans:
            lo, hi = np.full(3, np.inf), np.full(3, -np.inf)
            for raw in reader._scan_arrays(s, with_attributes=False):
                xyz, _ = reader._xyz(s, raw)
                if len(xyz):
                    lo, hi = np.minimum(lo, xyz.min(axis=0)), np.maximum(hi, xyz.max(axis=0))
            out.append((lo, hi))
        return out
