"""A cheap look at a point cloud file: header only, no points decoded (for LAS/LAZ/COPC;
E57, PLY and text files have no header bounds, so their coordinates are read once).

Used by the site check to name unreadable files and files whose CRS cannot reach the site's,
before any long step starts. :func:`size_problem` also compares what the header promises
with what the file holds, so a truncated or damaged file is named here rather than failing
half-way through a survey: for LAS, the point records between the start of point data and
the file's end (or its first extended VLR); for LAZ, the chunk table that the compressor
writes after the points (LAZ specification 1.4 R1, "chunk table"), whose offset is the first
8 bytes of the point data and whose entries give every chunk's compressed size.
:func:`header_problem` refuses scale factors, offsets and bounds that cannot place the points.
Before any reader opens a LAS/LAZ file, the fixed fields of its header (signature, version,
header size, offset to the points, number of VLRs) are checked against the file's size, so a
file of random bytes or one cut inside its header is named at once instead of having the
reader loop over billions of records.
"""

from __future__ import annotations

import math
import struct
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from inventory.errors import Problem

__all__ = ["CloudInfo", "header_problem", "inspect_cloud", "size_problem"]

#: ``chunk_size`` of a LAZ file whose chunks hold varying numbers of points (LAZ 1.4 R1).
_VARIABLE_CHUNKS = 0xFFFFFFFF


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
    #: The error as a :class:`~inventory.errors.Problem` when the reader gave one: the file it
    #: is in (a ``.prj`` beside the cloud, say), the line or vertex and the field.
    problem: Any = None


def _las_problem(header: Any, size: int) -> str | None:
    """Uncompressed points: the header's count against the bytes between the start of the
    point data and the end of the file, or what follows the points in the same file (LAS 1.3
    internal waveform packets, LAS 1.4 extended VLRs)."""
    start = int(header.offset_to_point_data)
    record = int(header.point_format.size)
    count = int(header.point_count)
    end = size
    following = [int(getattr(header, "start_of_waveform_data_packet_record", 0) or 0)]
    if int(getattr(header, "number_of_evlrs", 0) or 0) > 0:
        following.append(int(header.start_of_first_evlr or 0))
    for at in following:
        if at >= start:
            end = min(end, at)
    held = max(end - start, 0) // record
    if held < count:
        return (f"truncated or damaged: the header says {count:,} points ({start + count * record:,} bytes "
                f"with the header) but the file has {size:,} bytes, room for {held:,} points")
    if held > count:
        return (f"damaged header: the header says {count:,} points but the file holds {held:,} "
                f"point records")
    return None


def _laz_problem(header: Any, path: Path, size: int) -> str | None:
    """Compressed points: the chunk table must lie inside the file and account for every
    compressed byte and for the header's point count."""
    start = int(header.offset_to_point_data)
    count = int(header.point_count)
    try:
        vlr = header.vlrs[header.vlrs.index("LasZipVlr")]
    except (ValueError, KeyError, IndexError):
        return "damaged: compressed points but no LASzip record describing them"
    with open(path, "rb") as f:
        f.seek(start)
        raw = f.read(8)
        if len(raw) < 8:
            return (f"truncated: the file ends at byte {size:,}, before its compressed points "
                    f"(which start at byte {start:,})")
        table_at = struct.unpack("<q", raw)[0]
        if table_at == -1:
            return None  # no chunk table written (a streamed file): nothing cheap to compare
        if table_at < start + 8 or table_at + 8 > size:
            return (f"truncated or damaged: its chunk table should start at byte {table_at:,} but the file "
                    f"has {size:,} bytes")
        try:
            import lazrs
        except ImportError:
            return None
        f.seek(start)
        try:
            laz_vlr = lazrs.LazVlr(vlr.record_data)
            table = lazrs.read_chunk_table(f, laz_vlr)
        except (lazrs.LazrsError, OSError, ValueError) as err:
            return f"truncated or damaged: its chunk table cannot be read ({err})"
    compressed = sum(int(b) for _, b in table)
    if start + 8 + compressed != table_at:
        return (f"damaged: its chunks hold {compressed:,} bytes of points but the chunk table says "
                f"{table_at - start - 8:,}")
    chunk = int(laz_vlr.chunk_size())
    if chunk == _VARIABLE_CHUNKS:
        low = high = sum(int(n) for n, _ in table)
    else:
        low, high = (len(table) - 1) * chunk + 1, len(table) * chunk
    if count == 0 and not table:
        return None
    if not low <= count <= high:
        held = f"{low:,}" if low == high else f"between {low:,} and {high:,}"
        return f"damaged header: the header says {count:,} points but the file's chunks hold {held}"
    return None


def size_problem(path: str | Path, header: Any) -> str | None:
    """Why the file cannot hold the points its header promises, or ``None``.

    ``header`` is the file's ``laspy.LasHeader``. Reads no point, only the file size and,
    for LAZ, the chunk table (a few bytes per 50,000 points).
    """
    path = Path(path)
    size = path.stat().st_size
    if header.are_points_compressed:
        return _laz_problem(header, path, size)
    return _las_problem(header, size)


def header_problem(header: Any) -> tuple[str, str] | None:
    """``(field, why)`` when a LAS header's scale factors, offsets or bounds could not place
    its points, or ``None``. Coordinates are ``stored * scale + offset`` (ASPRS LAS 1.4 R15,
    public header block): a scale of 0 puts every point on the offset, a non-finite scale or
    offset makes every coordinate NaN, and the survey's grid is sized from the bounds."""
    for axis, scale, offset in zip("xyz", header.scales, header.offsets):
        scale, offset = float(scale), float(offset)
        if not math.isfinite(scale) or scale == 0:
            return f"{axis}_scale_factor", f"scale factor {scale} in the header: every {axis} would be " + (
                f"{offset}" if scale == 0 else "NaN")
        if not math.isfinite(offset):
            return f"{axis}_offset", f"offset {offset} in the header: every {axis} would be NaN"
    for axis, low, high in zip("xyz", header.mins, header.maxs):
        low, high = float(low), float(high)
        if not (math.isfinite(low) and math.isfinite(high)):
            return f"min_{axis}", f"bounds {low}..{high} in the header are not finite"
        if low > high:
            return f"min_{axis}", f"minimum {low} in the header is above the maximum {high}"
    if int(header.point_count) > 0 and not any(map(float, [*header.mins, *header.maxs])):
        return "min_x", (f"the header's bounds are all 0 although it holds {int(header.point_count):,} points "
                         "(its writer did not fill them in): rewrite the file with its bounds")
    return None


def _inspect_other(path: Path, poses: "dict | None") -> CloudInfo:
    """E57, PLY and text files: their reader's count, CRS and bounds. E57 bounds are the
    scans' boxes through their poses (``poses`` replacing the file's), PLY and text bounds
    are measured; either costs one pass over the coordinates."""
    from inventory.errors import InputError
    from inventory.io.clouds import open_cloud

    try:
        with open_cloud(path, poses=poses) as reader:
            lo, hi = reader.bounds
            crs = reader.crs
            return CloudInfo(path, point_count=int(reader.count),
                             bounds=(tuple(map(float, lo)), tuple(map(float, hi))),
                             crs_wkt=crs.to_wkt() if crs is not None else None,
                             version=path.suffix.lower().lstrip("."))
    except InputError as err:
        return CloudInfo(path, error=err.why, problem=err.problem)
    except OSError as err:
        return CloudInfo(path, error=str(err) or type(err).__name__)


#: Bytes of the smallest LAS public header block (LAS 1.0-1.2; ASPRS LAS 1.4 R15, table 3 has 375).
_LAS_HEADER_BYTES = 227

#: Bytes of a variable-length record's header (ASPRS LAS 1.4 R15, table 15).
_VLR_HEADER_BYTES = 54


def _raw_header_problem(path: Path, size: int) -> str | None:
    """Why the fixed part of a LAS header cannot be a real one, read from its bytes before
    any reader trusts it, or ``None``. A damaged header's VLR count or point-data offset would
    otherwise have the reader loop over billions of records or allocate gigabytes.

    Fields at their offsets in the public header block (ASPRS LAS 1.4 R15, table 3): the
    signature "LASF" at 0, version major and minor at 24 and 25, header size at 94 (uint16),
    offset to point data at 96 (uint32), number of VLRs at 100 (uint32); a VLR header is 54
    bytes.
    """
    with open(path, "rb") as f:
        raw = f.read(_LAS_HEADER_BYTES)
    if raw[:4] != b"LASF":
        return f"not a LAS/LAZ file: it starts with {raw[:4]!r}, not the signature 'LASF'"
    major, minor = raw[24], raw[25]
    if major != 1 or minor > 4:
        return f"damaged header: version {major}.{minor} (LAS files are 1.0 to 1.4)"
    header_size, = struct.unpack_from("<H", raw, 94)
    start, vlrs = struct.unpack_from("<II", raw, 96)
    if header_size < _LAS_HEADER_BYTES:
        return f"damaged header: header size {header_size} bytes, below the {_LAS_HEADER_BYTES} of any LAS header"
    if start < header_size:
        return f"damaged header: the points start at byte {start:,}, inside the {header_size}-byte header"
    if size < start:
        return (f"truncated: the file ends at byte {size:,}, inside its header records (the points should "
                f"start at byte {start:,})")
    if vlrs * _VLR_HEADER_BYTES > start - header_size:
        return (f"damaged header: {vlrs:,} variable-length records cannot fit in the {start - header_size:,} "
                "bytes between the header and the points")
    return None


def _shortened(text: str, keep: int = 240) -> str:
    """``text`` cut in the middle to about ``keep`` characters (a reader's message may quote a
    whole WKT definition; its head and its reason at the end are what the user needs)."""
    if len(text) <= keep:
        return text
    return f"{text[: keep // 2]} ... {text[-keep // 2:]}"


def inspect_cloud(path: str | Path, poses: "dict | None" = None) -> CloudInfo:
    """Read the header of a LAS/LAZ/COPC file, or look over an E57, PLY or text file.

    Never raises for a bad file: the reason goes into ``CloudInfo.error``, including a file
    too short for the points its header promises (:func:`size_problem`). ``poses`` are an
    E57 file's scan poses given in stations.csv (see :func:`inventory.io.clouds.open_cloud`).
    """
    import laspy

    path = Path(path)
    if path.suffix.lower() not in (".las", ".laz"):
        return _inspect_other(path, poses)
    try:
        size = path.stat().st_size
    except OSError as err:
        return CloudInfo(path, error=str(err) or type(err).__name__)
    if size < _LAS_HEADER_BYTES:
        # laspy's own words for these ("Source is empty", "File is to small ...") do not say
        # that the copy was cut short
        return CloudInfo(path, error="the file is empty (0 bytes)" if size == 0 else
                         f"truncated: the file has {size:,} bytes, fewer than the {_LAS_HEADER_BYTES} bytes of "
                         "the smallest LAS header")
    # a cut inside the header's records (a CRS or LASzip record read short) is named as the
    # cut, not as the record it happened to split
    bad = _raw_header_problem(path, size)
    if bad is not None:
        return CloudInfo(path, error=bad)
    try:
        with laspy.open(path) as reader:
            header = reader.header
            try:
                crs = header.parse_crs()
            except Exception as err:  # laspy raises several types for broken CRS VLRs
                return CloudInfo(path, error=f"its CRS record cannot be parsed: {_shortened(str(err))}")
            problem = size_problem(path, header)
            if problem is not None:
                return CloudInfo(path, point_count=int(header.point_count), error=problem)
            bad = header_problem(header)
            if bad is not None:
                return CloudInfo(path, point_count=int(header.point_count), error=bad[1],
                                 problem=Problem(str(path), None, bad[0], bad[1]))
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
