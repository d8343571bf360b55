"""Points moved as whole records, and the compiled loops that fill a reader's chunks.

numpy copies a structured array (``pts[mask]``, ``pts[index]``, ``np.concatenate``)
field by field; the same records viewed as one ``void`` item each are copied whole, several
times faster, into the same bytes. :func:`select` and :func:`concat` do that.

:func:`scale_into` and :func:`unpack_bits_into` (numba) write a LAS record's scaled
coordinates and bit fields straight into a column of the points, with laspy's arithmetic
(``stored * scale + offset``; ``(byte & mask) >> lowest set bit``) and without the
temporary arrays of laspy's views.
"""

from __future__ import annotations

import numpy as np
from numba import njit

__all__ = ["byte_rows", "concat", "records", "scale_into", "select", "unpack_bits_into"]


def records(pts: np.ndarray) -> np.ndarray:
    """``pts`` viewed as one ``void`` item per record (no copy)."""
    return pts.view(np.dtype((np.void, pts.dtype.itemsize)))


def byte_rows(pts: np.ndarray) -> np.ndarray:
    """The records of ``pts`` as rows of bytes, shape (n, itemsize) (a view when ``pts`` is
    contiguous, else of a contiguous copy)."""
    pts = np.ascontiguousarray(pts)
    return pts.view(np.uint8).reshape(len(pts), pts.dtype.itemsize)


def select(pts: np.ndarray, which: np.ndarray) -> np.ndarray:
    """``pts[which]`` (a mask or indexes), copied as whole records."""
    return records(pts)[which].view(pts.dtype)


def concat(parts: "list[np.ndarray]", dtype: np.dtype) -> np.ndarray:
    """``np.concatenate(parts)`` of arrays of ``dtype``, copied as whole records; an empty
    array of ``dtype`` when there are no parts."""
    if not parts:
        return np.zeros(0, dtype)
    return np.concatenate([records(p) for p in parts]).view(dtype)


@njit(cache=True, nogil=True)
def scale_into(stored, scale, offset, out):  # pragma: no cover - compiled
    """``out[:] = stored * scale + offset`` (float64 arithmetic, as numpy and laspy do it)."""
    for i in range(stored.size):
        out[i] = stored[i] * scale + offset


@njit(cache=True, nogil=True)
def _unpack(src, mask, shift, out):  # pragma: no cover - compiled
    for i in range(src.size):
        out[i] = (src[i] & mask) >> shift


def unpack_bits_into(src: np.ndarray, mask: int, out: np.ndarray) -> None:
    """``out[:] = (src & mask) >> s``, ``s`` the lowest bit set in ``mask``: a bit field of
    the unsigned integers ``src`` (laspy's sub-fields of a LAS record)."""
    _unpack(src, mask, (mask & -mask).bit_length() - 1, out)
