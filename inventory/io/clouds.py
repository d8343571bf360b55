"""Streamed reading of point cloud files, and writing of LAS 1.4 / LAZ through laspy.

:func:`open_cloud` picks the reader by the file's ending: LAS 1.2-1.4, LAZ and COPC through
laspy (here), E57 (:mod:`inventory.io.e57`), PLY (:mod:`inventory.io.ply`) and delimited text
(:mod:`inventory.io.xyz`). Every reader has ``count``, ``crs``, ``crs_source``, ``mins``,
``maxs``, ``has_colour`` and ``chunks()``.

Points travel between steps as numpy structured arrays with PDAL's dimension names
(:data:`POINT_DTYPE`), so the same arrays can be handed to PDAL's Python bindings or to our
own pipeline runner. A LAS/LAZ file's extra bytes dimensions (:class:`ExtraDim`) follow as
further columns of its chunks (:func:`points_dtype`), which :class:`CloudWriter` writes back.
A reader never holds more than one chunk of a file in memory.

COPC files are LAZ 1.4 files with an octree index; read sequentially they are plain LAZ,
which is all the survey step needs (COPC 1.0 specification, section 1).

Examples
--------
>>> import tempfile, pathlib
>>> pts = empty_points(3)
>>> pts["X"], pts["Y"], pts["Z"] = [500000.0, 500001.0, 500002.0], [5.7e6, 5.7e6, 5.7e6], [3.5, 4.25, 5.0]
>>> with tempfile.TemporaryDirectory() as d:
...     path = write_cloud(pathlib.Path(d) / "three.laz", pts, "EPSG:32633")
...     with open_cloud(path, chunk_size=2) as cloud:
...         print(cloud.crs.to_epsg(), [float(chunk["Z"].max()) for chunk in cloud.chunks()])
32633 [4.25, 5.0]
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterator

import laspy
import numpy as np
from pyproj import CRS

from inventory._version import __version__
from inventory.errors import CRSError, InputError, RunError
from inventory.io.atomic import atomic_path
from inventory.io.cloudcheck import size_problem
from inventory.io.crs import parse_crs
from inventory.io.records import scale_into, unpack_bits_into

__all__ = ["POINT_DTYPE", "DEFAULT_CHUNK", "CLOUD_SUFFIXES", "LAS_SUFFIXES", "CRS_SIDECAR", "CloudReader", "CloudWriter",
           "ExtraDim", "extra_dims_of", "las_header", "las_record", "merge_extra_dims", "points_dtype", "conform_points", "open_cloud",
           "read_cloud", "write_cloud", "read_crs", "empty_points", "has_colour", "sidecar_crs"]

#: File endings of LAS, LAZ and COPC (which ends in .copc.laz) files.
LAS_SUFFIXES = (".las", ".laz")
#: Every file ending :func:`open_cloud` reads.
CLOUD_SUFFIXES = LAS_SUFFIXES + (".e57", ".ply", ".xyz", ".txt")
#: A PLY or text cloud's CRS: ``<name>.prj`` beside it, else this file for the whole folder
#: (WKT or an authority code such as ``EPSG:25832``).
CRS_SIDECAR = "crs.prj"

#: Points per chunk when streaming: 58 MB of POINT_DTYPE (58 bytes a point, more by the
#: bytes of a file's extra dimensions, :class:`ExtraDim`).
DEFAULT_CHUNK = 1_000_000

#: Points a LAS/LAZ reader decodes in one call (:meth:`CloudReader.chunks` fills a chunk in
#: calls of this many). laspy's parallel LAZ decoder (lazrs) decodes the LAZ chunks of one
#: call (50,000 points each by default) side by side and holds the interpreter lock until
#: the call returns: four LAZ chunks a call keep two cores busy and hold the lock for tens
#: of milliseconds, not for a whole chunk of :data:`DEFAULT_CHUNK` points, so that another
#: thread waiting for it (the survey step's spill) goes on between calls. Measured on the
#: issue 17 bench file (CHANGELOG): 16,384 points a call lose the parallel decoding.
DECODE_STEP = 200_000

#: One point as it travels through the survey step. Names are PDAL's dimension names
#: (PDAL Dimension.json); ``StationRange`` is ours: metres from the scanner origin for
#: clouds given in a scanner's own frame, NaN where the station is unknown.
#: ``ScanAngleRank`` is in degrees, as PDAL gives it for every LAS point format.
POINT_DTYPE = np.dtype([
    ("X", "f8"), ("Y", "f8"), ("Z", "f8"),
    ("Intensity", "u2"),
    ("ReturnNumber", "u1"), ("NumberOfReturns", "u1"),
    ("Classification", "u1"),
    ("GpsTime", "f8"),
    ("PointSourceId", "u2"),
    ("StationRange", "f8"),
    ("Red", "u2"), ("Green", "u2"), ("Blue", "u2"),
    ("ScanAngleRank", "f4"),
    ("UserData", "u1"),
])

#: laspy attribute for each PDAL dimension we carry as it is stored (StationRange is not
#: stored in LAS; the scan angle is converted, see :data:`SCAN_ANGLE_STEP`).
_LAS_FIELDS = {
    "Intensity": "intensity",
    "ReturnNumber": "return_number",
    "NumberOfReturns": "number_of_returns",
    "Classification": "classification",
    "GpsTime": "gps_time",
    "PointSourceId": "point_source_id",
    "Red": "red",
    "Green": "green",
    "Blue": "blue",
    "UserData": "user_data",
}

#: Degrees per unit of the LAS 1.4 ``scan_angle`` of point formats 6-10 (LAS 1.4 R15
#: section 2.6.2); formats 0-5 store whole degrees in ``scan_angle_rank``.
SCAN_ANGLE_STEP = 0.006

#: Colour dimensions: a cloud that has them is written in point format 7, else 6.
COLOUR = ("Red", "Green", "Blue")


def has_colour(point_format: laspy.PointFormat) -> bool:
    """Whether a LAS point format stores red, green and blue."""
    return "red" in set(point_format.dimension_names)


#: Written coordinates are stored as integers of 1 mm (LAS 1.4 R15 section 2.4 scale factors;
#: 1 mm is far below the 5-10 mm ranging noise of survey scanners: common practice).
WRITE_SCALE = 0.001

#: The header's "Generating Software" (LAS 1.4 R15 section 2.4: 32 characters at most).
GENERATING_SOFTWARE = f"inventory {__version__}"[:32]
#: The header's "System Identifier": the spec's value for data not from one hardware system.
SYSTEM_IDENTIFIER = "OTHER"


@dataclass(frozen=True)
class ExtraDim:
    """One extra bytes dimension of a LAS 1.4 file (its Extra Bytes VLR record, LAS 1.4 R15
    section 2.5, Table 24), carried as a column of the points beside :data:`POINT_DTYPE`.

    Values travel as they are stored (the raw integers of a scaled dimension), so they are
    written back bit for bit with the same scale and offset; a pipeline's range on such a
    dimension compares stored values, with the built-in runner and with PDAL alike.

    Attributes
    ----------
    name : str
        The name in the file (at most 32 characters).
    type : str
        Numpy type of one element as stored (``"u2"``, ``"f4"``, ``"i1"``, ...).
    count : int
        Elements per point (1; 2 or 3 for the array types).
    description : str
    scales, offsets : tuple of float or None
        Per element, when the record declares them.
    no_data : tuple or None
        The stored value that means "no data", per element, when declared.
    column : str
        The points' field name: ``name``, unless that is already a dimension of
        :data:`POINT_DTYPE` (case-insensitive, as pipelines look dimensions up), then
        ``"Extra" + name`` (laspy's ``extrabytes.las`` has an extra ``Intensity``).
    """

    name: str
    type: str
    count: int = 1
    description: str = ""
    scales: "tuple[float, ...] | None" = None
    offsets: "tuple[float, ...] | None" = None
    no_data: "tuple[float, ...] | None" = None
    column: str = ""

    def __post_init__(self) -> None:
        if not self.column:
            taken = {n.lower() for n in POINT_DTYPE.names}
            column = self.name if self.name.lower() not in taken else "Extra" + self.name
            object.__setattr__(self, "column", column)

    @property
    def field(self) -> tuple:
        """The numpy field of this dimension in a points array."""
        return (self.column, self.type) if self.count == 1 else (self.column, self.type, (self.count,))

    @property
    def definition(self) -> tuple:
        """What must agree for two files' dimensions of one name to be the same dimension."""
        return (self.name, np.dtype(self.type).str, self.count, self.scales, self.offsets)

    @property
    def fill(self) -> np.ndarray:
        """The value given to points of a file that lacks this dimension: the declared
        no-data value, else 0 (one value per element)."""
        values = self.no_data if self.no_data is not None else (0,) * self.count
        return np.asarray(values, dtype=self.type)

    @property
    def nbytes(self) -> int:
        """Bytes per point."""
        return np.dtype(self.type).itemsize * self.count

    def params(self) -> laspy.ExtraBytesParams:
        """laspy's description of this dimension, to add to a header."""
        kind = self.type if self.count == 1 else f"{self.count}{self.type}"
        return laspy.ExtraBytesParams(self.name, kind, self.description,
                                      offsets=None if self.offsets is None else np.asarray(self.offsets),
                                      scales=None if self.scales is None else np.asarray(self.scales),
                                      no_data=None if self.no_data is None else np.asarray(self.no_data))


def _as_tuple(values: Any) -> "tuple | None":
    if values is None:
        return None
    return tuple(v.item() if hasattr(v, "item") else v for v in np.atleast_1d(np.asarray(values)))


def extra_dims_of(header: laspy.LasHeader) -> tuple[ExtraDim, ...]:
    """The extra bytes dimensions a LAS header declares, in record order.

    Bytes past the point format that no Extra Bytes VLR describes (LAS 1.4 R15 data type 0,
    "undocumented extra bytes") have no name or type and are not returned.
    """
    # laspy (2.7) leaves the no-data value out of the dimensions it reads from a file: take
    # it from the Extra Bytes VLR's own records
    no_data: dict[str, Any] = {}
    for vlr in header.vlrs:
        if isinstance(vlr, laspy.vlrs.known.ExtraBytesVlr):
            for rec in vlr.extra_bytes_structs:
                if rec.data_type != 0:
                    no_data[rec.name.rstrip(b"\0").decode("ascii", "replace")] = rec.no_data
    out = []
    for d in header.point_format.extra_dimensions:
        if d.dtype is None:
            continue
        nd = d.no_data if d.no_data is not None else no_data.get(d.name)
        out.append(ExtraDim(d.name, d.dtype.base.str.lstrip("<>|="), int(d.num_elements), str(d.description or ""),
                            _as_tuple(d.scales), _as_tuple(d.offsets), _as_tuple(nd)))
    return tuple(out)


def merge_extra_dims(files: "list[tuple[Any, tuple[ExtraDim, ...]]]") -> tuple[tuple[ExtraDim, ...], list[str]]:
    """The union of several files' extra dimensions, in order of first appearance, and the
    problems found (one text each).

    A name whose files disagree on type, element count, scale or offset is dropped (its
    stored values cannot share one column), and so is one whose column name would repeat
    another's; a file lacking a kept dimension is named too (its points get
    :attr:`ExtraDim.fill`).

    Parameters
    ----------
    files : list of (path, dims)
    """
    first: dict[str, ExtraDim] = {}
    clash: dict[str, list[str]] = {}
    for path, dims in files:
        for d in dims:
            if d.name not in first:
                first[d.name] = d
            elif first[d.name].definition != d.definition:
                clash.setdefault(d.name, []).append(str(path))
    problems = [f"extra dimension {name!r} is stored differently in {', '.join(where)} than in the first "
                f"file that has it (type, elements, scale or offset): not carried" for name, where in clash.items()]
    kept: list[ExtraDim] = []
    columns = {n.lower() for n in POINT_DTYPE.names}
    for name, d in first.items():
        if name in clash:
            continue
        if d.column.lower() in columns:
            problems.append(f"extra dimension {name!r} would be carried as {d.column!r}, which another "
                            f"dimension already is: not carried")
            continue
        columns.add(d.column.lower())
        kept.append(d)
    for path, dims in files:
        names = {d.name for d in dims}
        missing = [d for d in kept if d.name not in names]
        if missing and len(files) > 1:
            problems.append(f"{path} has no extra dimension " + ", ".join(
                f"{d.name!r} (its points get {'the no-data value ' if d.no_data is not None else ''}"
                f"{', '.join(str(v) for v in d.fill.tolist())})" for d in missing))
    return tuple(kept), problems


def points_dtype(extra: "tuple[ExtraDim, ...] | list[ExtraDim]" = ()) -> np.dtype:
    """:data:`POINT_DTYPE` followed by a column for each extra dimension."""
    if not extra:
        return POINT_DTYPE
    return np.dtype(POINT_DTYPE.descr + [d.field for d in extra])


def empty_points(n: int = 0, extra: "tuple[ExtraDim, ...] | list[ExtraDim]" = ()) -> np.ndarray:
    """A zeroed structured array of ``n`` points with NaN StationRange (and a column for
    each of the ``extra`` dimensions, holding its :attr:`ExtraDim.fill`)."""
    pts = np.zeros(n, dtype=points_dtype(extra))
    pts["StationRange"] = np.nan
    for d in extra:
        if d.fill.any():
            pts[d.column] = d.fill if d.count > 1 else d.fill[0]
    return pts


def conform_points(points: np.ndarray, extra: "tuple[ExtraDim, ...] | list[ExtraDim]") -> np.ndarray:
    """``points`` with exactly the columns of :func:`points_dtype` ``(extra)``: columns it
    lacks get their dimension's fill value, columns not asked for are left out. The same
    array when it has them already."""
    dtype = points_dtype(extra)
    if points.dtype == dtype:
        return points
    out = empty_points(len(points), extra)
    for name in dtype.names:
        if name in (points.dtype.names or ()):
            out[name] = points[name]
    return out


def read_crs(header: laspy.LasHeader, path: "str | Path" = "") -> tuple[CRS | None, str | None]:
    """The CRS stored in a LAS header and where it came from (``"wkt"`` or ``"geotiff"``).

    Returns ``(None, None)`` when the file carries no CRS. A CRS record that cannot be
    parsed is an :class:`~inventory.errors.CRSError` naming the file.
    """
    records = list(header.vlrs) + list(getattr(header, "evlrs", None) or [])
    has_wkt = any(isinstance(v, laspy.vlrs.known.WktCoordinateSystemVlr) for v in records)
    has_geokeys = any(isinstance(v, laspy.vlrs.known.GeoKeyDirectoryVlr) for v in records)
    if not (has_wkt or has_geokeys):
        return None, None
    try:
        crs = header.parse_crs(prefer_wkt=True)
    except Exception as err:  # laspy raises several types for broken CRS records
        raise CRSError(path, f"the coordinate system record cannot be read ({err})",
                       field="crs") from err
    if crs is None:
        return None, None
    return crs, ("wkt" if has_wkt else "geotiff")


class CloudReader:
    """A point cloud file open for streaming; use through :func:`open_cloud`.

    Attributes
    ----------
    path : Path
    count : int
        Number of point records in the header.
    crs : pyproj.CRS or None
        From the file's WKT record, else its GeoTIFF keys, else ``default_crs``.
    crs_source : str or None
        ``"wkt"``, ``"geotiff"``, ``"default"`` or ``None``.
    mins, maxs : ndarray
        Header bounds (x, y, z) in file units.
    extra_dims : tuple of ExtraDim
        The file's extra bytes dimensions; each is a column of the chunks.
    """

    def __init__(self, path: "str | Path", *, chunk_size: int = DEFAULT_CHUNK,
                 default_crs: "CRS | str | None" = None) -> None:
        self.path = Path(path)
        self.chunk_size = int(chunk_size)
        try:
            self._reader = laspy.open(self.path)
        except FileNotFoundError as err:
            raise InputError(self.path, "file not found") from err
        except Exception as err:  # laspy.errors.LaspyException and friends
            raise InputError(self.path, f"not a readable LAS/LAZ file ({err})") from err
        self.header = self._reader.header
        self.count = int(self.header.point_count)
        try:
            problem = size_problem(self.path, self.header)
        except OSError as err:
            problem = f"cannot be read ({err})"
        if problem is not None:
            self._reader.close()
            raise InputError(self.path, problem)
        self.has_colour = has_colour(self.header.point_format)
        self.extra_dims = extra_dims_of(self.header)
        self.mins = np.asarray(self.header.mins, float)
        self.maxs = np.asarray(self.header.maxs, float)
        crs, source = read_crs(self.header, self.path)
        if crs is None and default_crs is not None:
            crs, source = parse_crs(default_crs, where=str(self.path)), "default"
        self.crs, self.crs_source = crs, source
        self.read = 0

    def __enter__(self) -> "CloudReader":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        self._reader.close()

    def _fill_plan(self, rec: Any, names: set) -> tuple[list, list, list]:
        """How a chunk is filled from laspy's records (of ``rec``'s point format): the
        columns copied from a record field, the bit fields unpacked (column, field, mask)
        and the dimensions left to laspy (none for the LAS point formats)."""
        src = rec.array.dtype.names
        subs = getattr(rec, "sub_fields_dict", {})
        copies = [(d.column, d.name) for d in self.extra_dims]
        bits, rest = [], []
        for dim, attr in _LAS_FIELDS.items():
            if attr not in names:
                continue
            if attr in subs and rec.array.dtype[subs[attr][0]].kind == "u" and POINT_DTYPE[dim] == np.uint8:
                composed, sub = subs[attr]
                bits.append((dim, composed, int(sub.mask)))
            elif attr in src:
                copies.append((dim, attr))
            else:
                rest.append((dim, attr))
        return copies, bits, rest

    def _fill(self, rec: Any, plan: tuple[list, list, list], names: set, out: np.ndarray) -> None:
        """Fill ``out`` (as many points as ``rec``) from laspy's records by ``plan``."""
        copies, bits, rest = plan
        arr = rec.array
        for i, c in enumerate("XYZ"):       # laspy's rec.x, without its temporaries
            scale_into(arr[c], float(rec.scales[i]), float(rec.offsets[i]), out[c])
        for column, field in copies:
            out[column] = arr[field]
        for column, field, mask in bits:
            unpack_bits_into(arr[field], mask, out[column])
        for dim, attr in rest:
            out[dim] = np.asarray(rec[attr])
        if "scan_angle" in names:
            out["ScanAngleRank"] = np.asarray(rec["scan_angle"]) * SCAN_ANGLE_STEP
        elif "scan_angle_rank" in names:
            out["ScanAngleRank"] = np.asarray(rec["scan_angle_rank"])

    def chunks(self) -> Iterator[np.ndarray]:
        """Yield the points as :data:`POINT_DTYPE` arrays of at most ``chunk_size``, with a
        column for each of :attr:`extra_dims` (the stored values).

        Each chunk is decoded :data:`DECODE_STEP` points at a time into its array: the LAZ
        decoder holds the interpreter lock while it runs, so shorter calls let another thread
        (the survey step's spill, :class:`~inventory.survey.tiles.SpillThread`) go on between
        them. The chunks are the same whatever the step."""
        names = set(self.header.point_format.dimension_names)
        plan = None
        step = max(1, min(self.chunk_size, DECODE_STEP))
        try:
            while True:
                size = min(self.chunk_size, self.count - self.read)
                if size <= 0:
                    break
                out = empty_points(size, self.extra_dims)
                filled = 0
                while filled < size:
                    rec = self._reader.read_points(min(step, size - filled))
                    n = len(rec)
                    if n == 0:
                        break
                    if plan is None:
                        plan = self._fill_plan(rec, names)
                    self._fill(rec, plan, names, out[filled:filled + n])
                    filled += n
                if filled == 0:
                    break
                self.read += filled
                yield out if filled == size else out[:filled]
                if filled < size:
                    break
        except (laspy.errors.LaspyException, OSError, ValueError, RuntimeError) as err:
            # RuntimeError: the LAZ decoder's own errors (lazrs.LazrsError) on damaged data
            raise InputError(self.path, f"truncated or damaged: decoding failed after {self.read:,} of "
                                        f"{self.count:,} points ({err})") from err
        if self.read != self.count:
            raise InputError(self.path, f"truncated or damaged: the header says {self.count:,} points "
                                        f"but only {self.read:,} could be read")


def sidecar_crs(path: "str | Path") -> tuple[CRS | None, Path | None]:
    """The CRS given beside a file that cannot carry one (PLY, text): ``<name>.prj``, else
    ``crs.prj`` in its folder; ``(None, None)`` when neither exists."""
    path = Path(path)
    for candidate in (path.with_suffix(".prj"), path.parent / CRS_SIDECAR):
        if candidate.is_file():
            try:
                text = candidate.read_text("utf-8-sig").strip()
            except UnicodeDecodeError as err:
                raise CRSError(candidate, "not UTF-8 text (a .prj file holds the CRS as WKT text)",
                               field="crs") from err
            except OSError as err:
                raise CRSError(candidate, f"cannot be read ({err})", field="crs") from err
            return parse_crs(text, where=str(candidate)), candidate
    return None, None


def open_cloud(path: "str | Path", *, chunk_size: int = DEFAULT_CHUNK,
               default_crs: "CRS | str | None" = None, poses: "dict | None" = None) -> "CloudReader | Any":
    """Open a point cloud file for streaming: LAS, LAZ, COPC, E57, PLY or delimited text.

    Parameters
    ----------
    path : path-like
    chunk_size : int
        Points per chunk yielded by the reader's ``chunks()``.
    default_crs : CRS or str, optional
        Used when the file carries no CRS (the site's ``[survey] default_crs``); a PLY or
        text file takes its CRS from :func:`sidecar_crs` first.
    poses : dict, optional
        E57 only: ``{scan index (0-based): (R (3, 3), t (3,))}`` replacing the file's poses.
    """
    suffix = Path(path).suffix.lower()
    if suffix == ".e57":
        from inventory.io.e57 import E57Reader

        return E57Reader(path, chunk_size=chunk_size, default_crs=default_crs, poses=poses)
    if suffix in (".ply", ".xyz", ".txt"):
        from inventory.io.ply import PlyReader
        from inventory.io.xyz import TextCloudReader

        crs, source = sidecar_crs(path)
        where = source.name if source is not None else None
        if crs is None and default_crs is not None:
            crs, where = parse_crs(default_crs, where=str(path)), "default"
        kind = PlyReader if suffix == ".ply" else TextCloudReader
        return kind(path, chunk_size=chunk_size, crs=crs, crs_source=where)
    if poses:
        raise ValueError("scan poses are for E57 files only")
    return CloudReader(path, chunk_size=chunk_size, default_crs=default_crs)


def read_cloud(path: "str | Path", **kw: object) -> tuple[np.ndarray, CRS | None]:
    """Read a whole file into one array (for small files and tests); a LAS/LAZ file's extra
    dimensions are columns of it (the reader's ``extra_dims``)."""
    with open_cloud(path, **kw) as cloud:  # type: ignore[arg-type]
        parts = list(cloud.chunks())
        return (np.concatenate(parts) if parts else empty_points(0, getattr(cloud, "extra_dims", ()))), cloud.crs


def las_header(*, crs: "CRS | str | None", offset: tuple[float, float, float], scale: float = WRITE_SCALE,
               point_format: int = 6, extra_dims: "tuple[ExtraDim, ...] | list[ExtraDim]" = ()) -> laspy.LasHeader:
    """The LAS 1.4 header the classified cloud and :class:`CloudWriter` write: point format
    ``point_format``, coordinates stored at ``scale`` from ``offset``, our generating software
    and system identifier, the CRS as a record (when given) and the ``extra_dims`` as extra
    bytes dimensions."""
    header = laspy.LasHeader(point_format=point_format, version="1.4")
    header.scales = np.array([scale] * 3)
    header.offsets = np.asarray(offset, float)
    header.generating_software = GENERATING_SOFTWARE
    header.system_identifier = SYSTEM_IDENTIFIER
    if crs is not None:
        header.add_crs(parse_crs(crs))
    if extra_dims:
        header.add_extra_dims([d.params() for d in extra_dims])
    return header


def las_record(points: np.ndarray, header: laspy.LasHeader,
               extra_dims: "tuple[ExtraDim, ...] | list[ExtraDim]" = ()) -> laspy.ScaleAwarePointRecord:
    """Points (:data:`POINT_DTYPE` and the columns of ``extra_dims``) as a laspy record of
    ``header``'s point format, scales and offsets: the dimensions of :data:`_LAS_FIELDS` as
    they are, the scan angle in steps of :data:`SCAN_ANGLE_STEP` (format 6 and up) or whole
    degrees, and each extra dimension's column as stored (its fill value where the points
    lack the column)."""
    rec = laspy.ScaleAwarePointRecord.zeros(len(points), header=header)
    rec.x, rec.y, rec.z = points["X"], points["Y"], points["Z"]
    names = set(header.point_format.dimension_names)
    for dim, attr in _LAS_FIELDS.items():
        if dim in points.dtype.names and attr in names:
            rec[attr] = points[dim]
    if "ScanAngleRank" in points.dtype.names:
        angle = points["ScanAngleRank"].astype(np.float64)
        if "scan_angle" in names:
            rec["scan_angle"] = np.round(angle / SCAN_ANGLE_STEP).astype(np.int16)
        elif "scan_angle_rank" in names:
            rec["scan_angle_rank"] = np.round(angle).astype(np.int8)
    for d in extra_dims:
        if d.column in points.dtype.names:
            rec.array[d.name] = points[d.column]
        elif d.fill.any():
            rec.array[d.name] = d.fill if d.count > 1 else d.fill[0]
    return rec


class CloudWriter:
    """Write points to a LAZ (or LAS) file chunk by chunk, LAS 1.4 point format 6 (7 to keep
    colour), with the ``extra_dims`` given as extra bytes dimensions (their columns of the
    points are written as stored values under the dimensions' own names, types,
    descriptions, scales, offsets and no-data values).

    The file appears under its name only when the writer closes without error (temporary
    file + rename). ``offset`` fixes the integer origin; pass the survey grid's lower-left
    corner so that every chunk can be stored at :data:`WRITE_SCALE`.
    """

    def __init__(self, path: "str | Path", *, crs: "CRS | str | None", offset: tuple[float, float, float],
                 scale: float = WRITE_SCALE, point_format: int = 6,
                 extra_dims: "tuple[ExtraDim, ...] | list[ExtraDim]" = ()) -> None:
        self.path = Path(path)
        self.extra_dims = tuple(extra_dims)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self.header = las_header(crs=crs, offset=offset, scale=scale, point_format=point_format,
                                 extra_dims=self.extra_dims)
        compress = self.path.suffix.lower() == ".laz"
        # The file is written chunk by chunk across calls, so the atomic_path block is
        # entered here and left in close(): leaving it cleanly renames the file into place,
        # leaving it with an error removes the temporary file.
        self._target = atomic_path(self.path)
        self._tmp = self._target.__enter__()
        try:
            self._writer = laspy.open(self._tmp, mode="w", header=self.header, do_compress=compress)
        except BaseException as err:
            self._target.__exit__(type(err), err, err.__traceback__)
            raise
        self.written = 0

    def write(self, points: np.ndarray) -> None:
        """Append a :data:`POINT_DTYPE` array."""
        if len(points) == 0:
            return
        rec = las_record(points, self.header, self.extra_dims)
        self._writer.write_points(rec)
        self.written += len(points)

    def close(self, ok: bool = True) -> None:
        """Finish the file: renamed into place when ``ok``, else removed."""
        try:
            self._writer.close()
        except BaseException as err:
            self._target.__exit__(type(err), err, err.__traceback__)
            raise
        if ok:
            self._target.__exit__(None, None, None)
        else:
            stop = RunError(f"{self.path}: writing abandoned")
            self._target.__exit__(RunError, stop, None)

    def __enter__(self) -> "CloudWriter":
        return self

    def __exit__(self, exc_type: object, *exc: object) -> None:
        self.close(ok=exc_type is None)


def write_cloud(path: "str | Path", points: np.ndarray, crs: "CRS | str | None" = None,
                offset: tuple[float, float, float] | None = None, point_format: int | None = None,
                extra_dims: "tuple[ExtraDim, ...] | list[ExtraDim]" = ()) -> Path:
    """Write one array of points to ``path`` (LAZ when the name ends in ``.laz``); point
    format 7 when any point has a colour, else 6, unless ``point_format`` is given; the
    ``extra_dims`` as extra bytes dimensions (see :class:`CloudWriter`)."""
    if offset is None:
        if len(points):
            offset = tuple(np.floor(np.array([points["X"].min(), points["Y"].min(),
                                              points["Z"].min()])))
        else:
            offset = (0.0, 0.0, 0.0)
    if point_format is None:
        coloured = len(points) and all(c in points.dtype.names for c in COLOUR) and \
            any(points[c].any() for c in COLOUR)
        point_format = 7 if coloured else 6
    with CloudWriter(path, crs=crs, offset=offset, point_format=point_format, extra_dims=extra_dims) as w:
        w.write(points)
    return Path(path)
