"""Streamed reading of delimited text point clouds: ``x y z [intensity] [r g b]`` per line.

Values are separated by spaces, tabs, commas or semicolons (the first data line decides).
Lines starting with ``#`` or ``//`` and blank lines are skipped. A first line with words
is a header naming the columns (``x``, ``y``, ``z``, ``intensity`` or ``i``, ``r``/``red``,
``g``/``green``, ``b``/``blue``; others are ignored); without one, the number of columns
says what they are: 3 ``x y z``, 4 ``x y z intensity``, 6 ``x y z r g b``, 7 ``x y z
intensity r g b``. Colour is 8-bit (0-255, spread over LAS's 16 bits by times 257);
intensity is a LAS 16-bit value (0-65535). A value outside those ranges is refused with
its line, as is a line that is not numbers.

A text file has no CRS: the caller gives one (see :func:`inventory.io.clouds.open_cloud`).
"""

from __future__ import annotations

import re
from functools import lru_cache
from pathlib import Path
from typing import Iterator

import numpy as np
from pyproj import CRS

from inventory.errors import InputError
from inventory.io._bounds import BoxFromBounds

__all__ = ["TextCloudReader", "TEXT_SUFFIXES"]

TEXT_SUFFIXES = (".xyz", ".txt")

_BY_COUNT = {3: ("x", "y", "z"), 4: ("x", "y", "z", "intensity"), 6: ("x", "y", "z", "r", "g", "b"),
             7: ("x", "y", "z", "intensity", "r", "g", "b")}
_ALIASES = {"x": "x", "y": "y", "z": "z", "intensity": "intensity", "i": "intensity",
            "r": "r", "red": "r", "g": "g", "green": "g", "b": "b", "blue": "b"}
_SPLIT = {",": re.compile(r"\s*,\s*"), ";": re.compile(r"\s*;\s*"), None: re.compile(r"\s+")}
#: 8-bit colour channel maximum, and the factor that spreads it over 16 bits (255 * 257 = 65535).
_COLOUR_8BIT_MAX, _TO_16BIT = 255, 257


def _skip(line: str) -> bool:
    s = line.strip()
    return not s or s.startswith("#") or s.startswith("//")


class TextCloudReader(BoxFromBounds):
    """A delimited text cloud open for streaming; use through
    :func:`inventory.io.clouds.open_cloud`."""

    def __init__(self, path: "str | Path", *, chunk_size: int = 1_000_000, crs: "CRS | None" = None,
                 crs_source: str | None = None) -> None:
        self.path = Path(path)
        self.chunk_size = int(chunk_size)
        self.crs, self.crs_source = crs, crs_source
        try:
            f = open(self.path, encoding="utf-8-sig", errors="strict")
        except FileNotFoundError as err:
            raise InputError(self.path, "file not found") from err
        try:
            with f:
                first, number = None, 0
                for number, line in enumerate(f, start=1):
                    if not _skip(line):
                        first = line.strip()
                        break
        except UnicodeDecodeError as err:
            raise InputError(self.path, "not a text file (not UTF-8)") from err
        if first is None:
            raise InputError(self.path, "no point in the file")
        self._sep = "," if "," in first else (";" if ";" in first else None)
        words = [w for w in _SPLIT[self._sep].split(first) if w]
        self._data_from = number
        if any(not _is_number(w) for w in words):
            names = [_ALIASES.get(w.strip().lower()) for w in words]
            missing = [c for c in "xyz" if c not in names]
            if missing:
                raise InputError(self.path, f"the header has no column {missing[0]!r}", line=number)
            self._data_from = number + 1
        else:
            if len(words) not in _BY_COUNT:
                raise InputError(self.path, f"{len(words)} columns; expected x y z [intensity] [r g b] "
                                            "(3, 4, 6 or 7 columns) or a header naming them", line=number)
            names = list(_BY_COUNT[len(words)])
        self._width = len(words)
        self._cols = {n: k for k, n in enumerate(names) if n is not None}
        self.has_colour = all(c in self._cols for c in "rgb")
        st = self.path.stat()
        self.count = _count(str(self.path.resolve()), st.st_mtime_ns, st.st_size, self._data_from)
        if self.count == 0:
            raise InputError(self.path, "no point in the file (a header line alone)", line=number)
        self.read = 0

    def __enter__(self) -> "TextCloudReader":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        pass  # every read opens and closes the file itself

    def _blocks(self) -> Iterator[tuple[np.ndarray, int]]:
        """``(values (n, width), line number of the last row)`` blocks of ``chunk_size`` rows."""
        split = _SPLIT[self._sep]
        rows: list[list[str]] = []
        lines: list[int] = []
        with open(self.path, encoding="utf-8-sig") as f:
            for number, line in enumerate(f, start=1):
                if number < self._data_from or _skip(line):
                    continue
                words = [w for w in split.split(line.strip()) if w]
                if len(words) != self._width:
                    raise InputError(self.path, f"expected {self._width} values, found {len(words)}", line=number,
                                     field="columns")
                rows.append(words)
                lines.append(number)
                if len(rows) >= self.chunk_size:
                    yield self._numbers(rows, lines), lines[-1]
                    rows, lines = [], []
        if rows:
            yield self._numbers(rows, lines), lines[-1]

    def _numbers(self, rows: list[list[str]], lines: list[int]) -> np.ndarray:
        try:
            return np.array(rows, dtype=float)
        except ValueError:
            for words, number in zip(rows, lines):
                bad = next((w for w in words if not _is_number(w)), None)
                if bad is not None:
                    name = [n for n, k in sorted(self._cols.items(), key=lambda c: c[1]) if words[k] == bad]
                    raise InputError(self.path, f"not a number: {bad!r}", line=number,
                                     field=name[0] if name else None) from None
            raise

    def chunks(self) -> Iterator[np.ndarray]:
        """Yield the points as :data:`~inventory.io.clouds.POINT_DTYPE` arrays."""
        from inventory.io.clouds import empty_points

        for values, last in self._blocks():
            out = empty_points(len(values))
            xyz = values[:, [self._cols["x"], self._cols["y"], self._cols["z"]]]
            if not np.all(np.isfinite(xyz)):
                bad_rows = ~np.all(np.isfinite(xyz), axis=1)
                column = "xyz"[int(np.argmax(~np.isfinite(xyz[int(np.argmax(bad_rows))])))]
                raise InputError(self.path, "a coordinate is not a finite number",
                                 line=self._line_of(bad_rows, last, len(values)), field=column)
            out["X"], out["Y"], out["Z"] = xyz[:, 0], xyz[:, 1], xyz[:, 2]
            if "intensity" in self._cols:
                v = values[:, self._cols["intensity"]]
                bad = ~((v >= 0) & (v <= 65535))
                if bad.any():
                    raise InputError(self.path, f"intensity {v[bad][0]:g} outside 0-65535 (LAS 16-bit)",
                                     line=self._line_of(bad, last, len(values)), field="intensity")
                out["Intensity"] = np.rint(v).astype(np.uint16)
            if self.has_colour:
                for c, dim in (("r", "Red"), ("g", "Green"), ("b", "Blue")):
                    v = values[:, self._cols[c]]
                    bad = ~((v >= 0) & (v <= _COLOUR_8BIT_MAX))
                    if bad.any():
                        raise InputError(self.path, f"colour {v[bad][0]:g} outside 0-255 (8-bit)",
                                         line=self._line_of(bad, last, len(values)), field=c)
                    out[dim] = np.rint(v).astype(np.uint16) * _TO_16BIT
            out["ReturnNumber"] = out["NumberOfReturns"] = 1
            self.read += len(values)
            yield out

    def _line_of(self, bad: np.ndarray, last: int, n: int) -> int:
        """The file line of the first bad row of the block being read (counted again from
        the top: only on the way to an error)."""
        want = self.read + int(np.argmax(bad))
        rows = 0
        with open(self.path, encoding="utf-8-sig") as f:
            for number, line in enumerate(f, start=1):
                if number < self._data_from or _skip(line):
                    continue
                if rows == want:
                    return number
                rows += 1
        return last

    @property
    def bounds(self) -> tuple[np.ndarray, np.ndarray]:
        st = self.path.stat()
        return _bounds(str(self.path.resolve()), st.st_mtime_ns, st.st_size, self.chunk_size)


def _is_number(word: str) -> bool:
    try:
        float(word)
    except ValueError:
        return False
    return True


@lru_cache(maxsize=64)
def _count(path: str, mtime_ns: int, size: int, data_from: int) -> int:
    n = 0
    with open(path, encoding="utf-8-sig") as f:
        for number, line in enumerate(f, start=1):
            if number >= data_from and not _skip(line):
                n += 1
    return n


@lru_cache(maxsize=64)
def _bounds(path: str, mtime_ns: int, size: int, chunk_size: int) -> tuple[np.ndarray, np.ndarray]:
    lo, hi = np.full(3, np.inf), np.full(3, -np.inf)
    reader = TextCloudReader(path, chunk_size=chunk_size)
    for chunk in reader.chunks():
        if len(chunk):
            xyz = np.column_stack([chunk["X"], chunk["Y"], chunk["Z"]])
            lo, hi = np.minimum(lo, xyz.min(axis=0)), np.maximum(hi, xyz.max(axis=0))
    if not np.all(np.isfinite(lo)):
        lo = hi = np.zeros(3)
    return lo, hi
