"""Streamed reading of PLY point clouds (binary little/big endian and ASCII), as
photogrammetry and point-cloud tools export them.

The PLY format (Greg Turk, "The PLY Polygon File Format", 1994; the format of the
Stanford 3D Scanning Repository): a text header of ``element`` and ``property`` lines up
to ``end_header``, then the elements in order. Points are the ``vertex`` element's
``x``, ``y``, ``z``; ``intensity`` and colour (``red``/``green``/``blue``, also
``r``/``g``/``b`` and ``diffuse_*``) are kept when present. Integer colour and intensity are
spread over LAS's 16 bits by their type's range (``uchar`` 0-255 times 257, ``ushort`` as it
is); float colour is taken as 0-1; float intensity is taken as a LAS 16-bit value (rounded
and clipped). Faces and other elements after the vertices are ignored.

A PLY file has no CRS: the caller gives one (see :func:`inventory.io.clouds.open_cloud`).
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path
from typing import Iterator

import numpy as np
from pyproj import CRS

from inventory.errors import InputError
from inventory.io._bounds import BoxFromBounds

__all__ = ["PlyReader", "PLY_SUFFIXES"]

PLY_SUFFIXES = (".ply",)

_TYPES = {
    "char": "i1", "int8": "i1", "uchar": "u1", "uint8": "u1",
    "short": "i2", "int16": "i2", "ushort": "u2", "uint16": "u2",
    "int": "i4", "int32": "i4", "uint": "u4", "uint32": "u4",
    "float": "f4", "float32": "f4", "double": "f8", "float64": "f8",
}
_COLOUR_NAMES = {"Red": ("red", "r", "diffuse_red"), "Green": ("green", "g", "diffuse_green"),
                 "Blue": ("blue", "b", "diffuse_blue")}
_INTENSITY_NAMES = ("intensity", "scalar_intensity", "i")
#: Header lines read at most before ``end_header`` (a header is a few dozen lines).
_MAX_HEADER_LINES = 10_000


@dataclass
class _Element:
    name: str
    count: int
    properties: list  # (name, numpy type) or (name, None) for a list property


def _header(path: Path) -> tuple[str, list[_Element], int]:
    """``(format, elements, offset of the data)``."""
    try:
        f = open(path, "rb")
    except FileNotFoundError as err:
        raise InputError(path, "file not found") from err
    with f:
        first = f.readline()
        if first.strip() != b"ply":
            raise InputError(path, "not a PLY file (it does not start with 'ply')")
        fmt = None
        elements: list[_Element] = []
        for n in range(2, _MAX_HEADER_LINES):
            raw = f.readline()
            if not raw:
                raise InputError(path, "truncated PLY header (no end_header)")
            words = raw.decode("ascii", "replace").split()
            if not words or words[0] in ("comment", "obj_info"):
                continue
            if words[0] == "end_header":
                break
            if words[0] == "format" and len(words) >= 2:
                fmt = words[1]
            elif words[0] == "element" and len(words) == 3:
                try:
                    count = int(words[2])
                except ValueError as err:
                    raise InputError(path, f"bad element count {words[2]!r}", line=n, field="element") from err
                if count < 0:
                    raise InputError(path, f"negative element count {count}", line=n, field="element")
                elements.append(_Element(words[1], count, []))
            elif words[0] == "property" and elements:
                if len(words) == 5 and words[1] == "list":
                    elements[-1].properties.append((words[4], None))
                elif len(words) == 3 and words[1] in _TYPES:
                    elements[-1].properties.append((words[2], _TYPES[words[1]]))
                else:
                    raise InputError(path, f"unknown property {' '.join(words[1:])!r}", line=n, field="property")
            else:
                raise InputError(path, f"not a PLY header line: {' '.join(words)!r}", line=n)
        else:
            raise InputError(path, "PLY header too long (no end_header)")
        offset = f.tell()
    if fmt not in ("ascii", "binary_little_endian", "binary_big_endian"):
        raise InputError(path, f"unknown PLY format {fmt!r}")
    return fmt, elements, offset


class PlyReader(BoxFromBounds):
    """A PLY file open for streaming; use through :func:`inventory.io.clouds.open_cloud`.

    Attributes
    ----------
    path : Path
    count : int
        Vertices in the header.
    crs : pyproj.CRS or None
        As given by the caller.
    crs_source : str or None
    has_colour : bool
    """

    def __init__(self, path: "str | Path", *, chunk_size: int = 1_000_000, crs: "CRS | None" = None,
                 crs_source: str | None = None) -> None:
        self.path = Path(path)
        self.chunk_size = int(chunk_size)
        self.crs, self.crs_source = crs, crs_source
        self.format, elements, self._offset = _header(self.path)
        names = [e.name for e in elements]
        if "vertex" not in names:
            raise InputError(self.path, "PLY file with no vertex element")
        at = names.index("vertex")
        vertex = elements[at]
        props = dict(vertex.properties)
        missing = [c for c in "xyz" if c not in props]
        if missing:
            raise InputError(self.path, f"PLY vertices have no {missing[0]!r} property")
        if any(t is None for _, t in vertex.properties):
            raise InputError(self.path, "PLY vertices with a list property cannot be read as points")
        self.count = vertex.count
        if self.count == 0:
            raise InputError(self.path, "no point in the file (the header says 0 vertices)")
        self._props = vertex.properties
        self._before = elements[:at]
        # nothing may follow the last element: extra data means a wrong count or a damaged file
        self._last = at == len(elements) - 1
        order = ">" if self.format == "binary_big_endian" else "<"
        self._dtype = np.dtype([(n, order + t) for n, t in vertex.properties])
        self._intensity = next((n for n in _INTENSITY_NAMES if n in props), None)
        self._colour = {}
        for dim, options in _COLOUR_NAMES.items():
            found = next((n for n in options if n in props), None)
            if found is not None:
                self._colour[dim] = found
        self.has_colour = len(self._colour) == 3
        if self.format != "ascii":
            skip = 0
            for e in self._before:
                if any(t is None for _, t in e.properties):
                    raise InputError(self.path, f"PLY element {e.name!r} with list properties comes before "
                                                "the vertices; cannot be skipped")
                skip += e.count * np.dtype([(n, t) for n, t in e.properties]).itemsize
            self._data_at = self._offset + skip
            need = self._data_at + self.count * self._dtype.itemsize
            size = self.path.stat().st_size
            if size < need:
                held = max(size - self._data_at, 0) // self._dtype.itemsize
                raise InputError(self.path, f"truncated: the header says {self.count:,} vertices but the file has "
                                            f"room for {held:,}")
            if self._last and size > need:
                extra = size - need
                raise InputError(self.path, f"the header says {self.count:,} vertices but {extra:,} byte(s) follow "
                                            "them: the vertex count is wrong or the file is damaged")
        self.read = 0

    def __enter__(self) -> "PlyReader":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        pass  # every read opens and closes the file itself

    def _records(self) -> Iterator[np.ndarray]:
        if self.format != "ascii":
            with open(self.path, "rb") as f:
                f.seek(self._data_at)
                left = self.count
                while left > 0:
                    n = min(self.chunk_size, left)
                    rec = np.fromfile(f, dtype=self._dtype, count=n)
                    if len(rec) < n:
                        raise InputError(self.path, f"truncated: only {self.read + len(rec):,} of {self.count:,} "
                                                    "vertices could be read")
                    self._finite(rec, done=self.count - left)
                    left -= n
                    yield rec
            return
        yield from self._ascii_records()

    def _ascii_records(self) -> Iterator[np.ndarray]:
        with open(self.path, "rb") as f:
            f.seek(self._offset)
            line = _header_lines(self.path, self._offset)
            for e in self._before:        # one line per element record
                for _ in range(e.count):
                    f.readline()
                    line += 1
            left = self.count
            width = len(self._props)
            while left > 0:
                n = min(self.chunk_size, left)
                rows = []
                for _ in range(n):
                    raw = f.readline()
                    line += 1
                    if not raw:
                        raise InputError(self.path, f"truncated: the header says {self.count:,} vertices but the file "
                                                    f"ends after {self.count - left + len(rows):,}", line=line)
                    words = raw.split()
                    if len(words) != width:
                        raise InputError(self.path, f"expected {width} values, found {len(words)}", line=line,
                                         field="columns")
                    rows.append(words)
                try:
                    values = np.array(rows, dtype=float)
                except ValueError:
                    first = line - len(rows) + 1
                    for k, words in enumerate(rows):
                        for w in words:
                            try:
                                float(w)
                            except ValueError:
                                raise InputError(self.path, f"not a number: {w.decode('ascii', 'replace')!r}",
                                                 line=first + k) from None
                    raise
                rec = np.empty(n, self._dtype)
                for k, (name, _) in enumerate(self._props):
                    rec[name] = values[:, k]
                left -= n
                self._finite(rec, done=self.count - left - n, first_line=line - n + 1)
                yield rec
            if self._last:
                for raw in f:
                    line += 1
                    if raw.strip():
                        raise InputError(self.path, f"the header says {self.count:,} vertices but more data "
                                                    "follows them: the vertex count is wrong or the file is damaged",
                                         line=line)

    def _finite(self, rec: np.ndarray, *, done: int, first_line: int | None = None) -> None:
        """Refuse a NaN or infinite coordinate, naming its line (ASCII) or vertex (binary)."""
        for name in "xyz":
            bad = ~np.isfinite(rec[name].astype(float))
            if bad.any():
                k = int(np.argmax(bad))
                if first_line is not None:
                    raise InputError(self.path, "a coordinate is not a finite number", line=first_line + k,
                                     field=name)
                raise InputError(self.path, "a coordinate is not a finite number", feature=f"vertex {done + k + 1}",
                                 field=name)

    def chunks(self) -> Iterator[np.ndarray]:
        """Yield the vertices as :data:`~inventory.io.clouds.POINT_DTYPE` arrays."""
        from inventory.io.clouds import empty_points

        for rec in self._records():
            out = empty_points(len(rec))
            out["X"], out["Y"], out["Z"] = rec["x"], rec["y"], rec["z"]
            if self._intensity is not None:
                out["Intensity"] = _to16(rec[self._intensity], float_is_fraction=False)
            for dim, name in self._colour.items():
                out[dim] = _to16(rec[name], float_is_fraction=True)
            out["ReturnNumber"] = out["NumberOfReturns"] = 1
            self.read += len(rec)
            yield out

    @property
    def bounds(self) -> tuple[np.ndarray, np.ndarray]:
        st = self.path.stat()
        return _bounds(str(self.path.resolve()), st.st_mtime_ns, st.st_size, self.chunk_size)


def _header_lines(path: Path, offset: int) -> int:
    with open(path, "rb") as f:
        return f.read(offset).count(b"\n")


def _to16(values: np.ndarray, *, float_is_fraction: bool) -> np.ndarray:
    """Integer types spread over 16 bits by their range; floats as a 0-1 fraction or as
    16-bit values."""
    kind = values.dtype
    if kind.kind in "ui" and kind.itemsize == 1:
        v = np.clip(values.astype(np.int32), 0, 255) * 257
    elif kind.kind == "f":
        v = np.rint(values.astype(float) * (65535 if float_is_fraction else 1))
    else:
        v = values.astype(np.int64)
    return np.clip(v, 0, 65535).astype(np.uint16)


@lru_cache(maxsize=64)
def _bounds(path: str, mtime_ns: int, size: int, chunk_size: int) -> tuple[np.ndarray, np.ndarray]:
    lo, hi = np.full(3, np.inf), np.full(3, -np.inf)
    reader = PlyReader(path, chunk_size=chunk_size)
    for rec in reader._records():
        xyz = np.column_stack([rec["x"], rec["y"], rec["z"]]).astype(float)
        if len(xyz):
            lo, hi = np.minimum(lo, xyz.min(axis=0)), np.maximum(hi, xyz.max(axis=0))
    if not np.all(np.isfinite(lo)):
        lo = hi = np.zeros(3)
    return lo, hi
