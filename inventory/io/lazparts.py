"""A LAZ file put together from parts compressed elsewhere (in the jobs that made the points).

LASzip compresses points in chunks that are decoded independently, each listed in the
chunk table at the end of the point data by its compressed size (and, with variable-size
chunks, its point count). A LAS 1.4 file may use chunks of varying size (the LASzip VLR's
chunk size ``0xFFFFFFFF``), so a job can compress its own points into complete chunks of at
most :data:`CHUNK_POINTS` (its last one shorter) wherever it runs (:func:`encode_part`),
and the process writing the file only appends the compressed bytes in order and, at the
end, writes the chunk table and the header (:class:`LazPartWriter`).

The parts carry what the header needs (point count, points by return, bounds, the extra
bytes dimensions' minimum and maximum), gathered exactly as laspy gathers them while
writing, and the points are encoded by :func:`~inventory.io.clouds.las_record` as
:class:`~inventory.io.clouds.CloudWriter` encodes them: a file written from parts reads back
(laspy with lazrs, LASzip) with the same points, header values and records as one written
by a :class:`~inventory.io.clouds.CloudWriter`; only the chunk boundaries differ.

Examples
--------
>>> import tempfile, pathlib
>>> from inventory.io.clouds import empty_points, read_cloud
>>> pts = empty_points(3)
>>> pts["X"], pts["Y"], pts["Z"] = [500000.0, 500001.0, 500002.0], [5.7e6, 5.7e6, 5.7e6], [3.5, 4.25, 5.0]
>>> layout = LasLayout(point_format=6, offset=(500000.0, 5.7e6, 0.0))
>>> with tempfile.TemporaryDirectory() as d:
...     folder = pathlib.Path(d)
...     parts = [encode_part(pts[:2], layout, folder / "a.bin"), encode_part(pts[2:], layout, folder / "b.bin")]
...     with LazPartWriter(folder / "out.laz", crs="EPSG:32633", layout=layout) as w:
...         for part in parts:
...             w.append(part)
...     back, crs = read_cloud(folder / "out.laz")
...     print(crs.to_epsg(), back["Z"].tolist(), [n for n, _ in w.chunks])
32633 [3.5, 4.25, 5.0] [2, 1]
"""

from __future__ import annotations

import io
import shutil
import struct
from dataclasses import dataclass, field
from pathlib import Path

import laspy
import lazrs
import numpy as np
from pyproj import CRS

from inventory.errors import RunError
from inventory.io.atomic import atomic_path
from inventory.io.clouds import WRITE_SCALE, ExtraDim, las_header, las_record
from inventory.parallel import job_threads

__all__ = ["CHUNK_POINTS", "LasLayout", "LazPart", "LazPartWriter", "encode_part"]

#: Points in a full chunk of a part: LASzip's usual chunk size (its default 50,000); a
#: part's last chunk holds the rest.
CHUNK_POINTS = 50_000


@dataclass(frozen=True)
class LasLayout:
    """How points are stored in the file: LAS 1.4 point format, offset, scale and extra
    bytes dimensions (the arguments of :func:`~inventory.io.clouds.las_header` but the CRS,
    which the parts need not know). Small and picklable: it travels to the jobs."""

    point_format: int
    offset: tuple[float, float, float]
    scale: float = WRITE_SCALE
    extra_dims: tuple[ExtraDim, ...] = ()

    def header(self, crs: "CRS | str | None" = None) -> laspy.LasHeader:
        """A fresh header of this layout (statistics reset, as a laspy writer resets them)."""
        header = las_header(crs=crs, offset=self.offset, scale=self.scale, point_format=self.point_format,
                            extra_dims=self.extra_dims)
        header.partial_reset()
        return header

    def laz_vlr(self) -> "lazrs.LazVlr":
        """The LASzip VLR of this layout with variable-size chunks."""
        fmt = laspy.PointFormat(self.point_format)
        extra = sum(d.nbytes for d in self.extra_dims)
        return lazrs.LazVlr.new_for_compression(fmt.id, extra, use_variable_size_chunks=True)


def _extra_structs(header: laspy.LasHeader) -> list:
    vlrs = header.vlrs.get("ExtraBytesVlr")
    return list(vlrs[0].extra_bytes_structs) if vlrs else []


@dataclass
class LazPart:
    """One part of a LAZ file: complete compressed chunks in a file, and what the header
    needs of its points.

    Attributes
    ----------
    path : Path or None
        The chunks' compressed bytes, one after the other (``None`` for a part of no points).
    chunks : list of (int, int)
        Points and compressed bytes of each chunk, in order (the chunk table's entries).
    count : int
    by_return : ndarray
        Points of return number 1 to 15 (LAS 1.4 header).
    mins, maxs : ndarray
        x, y, z bounds as the header stores them (stored integers scaled back).
    extra_min, extra_max : list
        Per extra bytes dimension, the stored minimum and maximum as laspy tracks them in
        the Extra Bytes VLR (``None`` where the record does not keep one).
    """

    path: Path | None
    chunks: list[tuple[int, int]]
    count: int
    by_return: np.ndarray
    mins: np.ndarray
    maxs: np.ndarray
    extra_min: list = field(default_factory=list)
    extra_max: list = field(default_factory=list)

    @property
    def nbytes(self) -> int:
        """Compressed bytes of the part."""
        return sum(b for _, b in self.chunks)


def _copy(values: "np.ndarray | None") -> "np.ndarray | None":
    return None if values is None else np.array(values)


def encode_part(points: np.ndarray, layout: LasLayout, path: "str | Path",
                chunk_points: int = CHUNK_POINTS) -> LazPart:
    """Compress points into complete LAZ chunks of at most ``chunk_points`` (the last one
    shorter) written to ``path``, and gather the header's statistics of them.

    The points are encoded by :func:`~inventory.io.clouds.las_record` (the columns of
    :data:`~inventory.io.clouds.POINT_DTYPE` and of ``layout.extra_dims``). Chunks are
    compressed on several threads unless the job runs beside others
    (:func:`~inventory.parallel.job_threads` is 1); the bytes are the same either way.
    Nothing is written for no points (``path`` of the part is ``None``).
    """
    if chunk_points < 1:
        raise ValueError(f"chunk_points must be 1 or more, got {chunk_points}")
    header = layout.header()
    if not len(points):
        return LazPart(None, [], 0, np.zeros(15, np.uint64), np.zeros(3), np.zeros(3))
    rec = las_record(points, header, layout.extra_dims)
    header.grow(rec)
    raw = np.frombuffer(rec.array, np.uint8)
    size = header.point_format.size
    step = chunk_points * size
    chunks = [raw[i:i + step] for i in range(0, len(raw), step)]
    vlr = layout.laz_vlr()
    buf = io.BytesIO()
    compressor = (lazrs.LasZipCompressor if job_threads() == 1 else lazrs.ParLasZipCompressor)(buf, vlr)
    compressor.compress_chunks(chunks)
    compressor.done()
    # the compressor's stream: the offset to its chunk table, the chunks, the table
    buf.seek(0)
    # (the sequential compressor's done() lists an empty chunk after the last: left out)
    table = [(int(p), int(b)) for p, b in lazrs.read_chunk_table(buf, vlr) if p or b]
    data = buf.getbuffer()
    total = sum(b for _, b in table)
    path = Path(path)
    with open(path, "wb") as f:
        f.write(data[8:8 + total])
    del data
    structs = _extra_structs(header)
    return LazPart(path, table, len(points), np.array(header.number_of_points_by_return, np.uint64),
                   np.array(header.mins, float), np.array(header.maxs, float),
                   [_copy(s._raw_min()) for s in structs], [_copy(s._raw_max()) for s in structs])


class LazPartWriter:
    """Write a LAZ file (LAS 1.4, variable-size chunks) from :class:`LazPart` parts.

    The header and records are those of ``layout`` with ``crs``; :meth:`append` copies a
    part's chunks after the ones before; :meth:`close` writes the chunk table and the
    header with the parts' point count, points by return and bounds (0 for a file of no
    points, as laspy writes it). The file appears under its name only when the writer
    closes without error (temporary file + rename).

    Attributes
    ----------
    written : int
        Points appended so far.
    chunks : list of (int, int)
        The chunk table so far (points, bytes).
    """

    def __init__(self, path: "str | Path", *, crs: "CRS | str | None", layout: LasLayout) -> None:
        self.path = Path(path)
        if self.path.suffix.lower() != ".laz":
            raise ValueError(f"{self.path}: a file written from compressed parts is LAZ (.laz)")
        self.layout = layout
        self.header = layout.header(crs)
        self.header.are_points_compressed = True
        self._vlr = layout.laz_vlr()
        self.header.vlrs.append(laspy.vlrs.known.LasZipVlr(self._vlr.record_data()))
        self._structs = _extra_structs(self.header)
        self.written = 0
        self.chunks: list[tuple[int, int]] = []
        # written part by part across calls: the atomic_path block is entered here and
        # left in close() (renamed into place when clean, removed on error)
        self._target = atomic_path(self.path)
        self._tmp = self._target.__enter__()
        try:
            self._file = open(self._tmp, "wb")
            self.header.write_to(self._file)
            self._start = self._file.tell()
            self._file.write(struct.pack("<q", -1))     # offset to the chunk table, set in close()
        except BaseException as err:
            self._abandon(err)
            raise

    def _abandon(self, err: BaseException) -> None:
        f = getattr(self, "_file", None)
        if f is not None:
            f.close()
        self._target.__exit__(type(err), err, err.__traceback__)

    def append(self, part: LazPart) -> None:
        """Append a part's chunks and count its points into the header."""
        if not part.count:
            return
        if part.path is None or part.path.stat().st_size != part.nbytes:
            raise RunError(f"{self.path}: a compressed part ({part.path}) does not hold the {part.nbytes:,} bytes "
                           "its chunk table lists")
        with open(part.path, "rb") as src:
            shutil.copyfileobj(src, self._file, 1 << 22)
        self.chunks.extend(part.chunks)
        self.written += part.count
        h = self.header
        h.point_count += part.count
        h.number_of_points_by_return = h.number_of_points_by_return + part.by_return
        h.mins = np.minimum(h.mins, part.mins)
        h.maxs = np.maximum(h.maxs, part.maxs)
        for s, lo, hi in zip(self._structs, part.extra_min, part.extra_max):
            if lo is not None and s._raw_min() is not None:
                s._raw_min()[:] = np.minimum(s._raw_min(), lo)
            if hi is not None and s._raw_max() is not None:
                s._raw_max()[:] = np.maximum(s._raw_max(), hi)

    def close(self, ok: bool = True) -> None:
        """Finish the file: chunk table and header written and the file renamed into place
        when ``ok``, else removed."""
        if not ok:
            stop = RunError(f"{self.path}: writing abandoned")
            self._abandon(stop)
            return
        try:
            f = self._file
            table_at = f.tell()
            f.flush()
            lazrs.write_chunk_table(f, self.chunks, self._vlr)
            f.flush()
            f.seek(self._start)
            f.write(struct.pack("<q", table_at))
            if self.header.point_count == 0:
                self.header.mins = np.zeros(3)
                self.header.maxs = np.zeros(3)
            f.seek(0)
            self.header.write_to(f, ensure_same_size=True)
            f.close()
        except BaseException as err:
            self._abandon(err)
            raise
        self._target.__exit__(None, None, None)

    def __enter__(self) -> "LazPartWriter":
        return self

    def __exit__(self, exc_type: object, *exc: object) -> None:
        self.close(ok=exc_type is None)
