"""Points moved as whole records: structured arrays filled, picked and joined byte for byte.

numpy copies a structured array (``pts[mask]``, ``pts[index]``, ``np.concatenate``, a
column assignment) field by field; the same records viewed as one ``void`` item each are
copied whole, several times faster, into the same bytes. :func:`select` and
:func:`concat` do that. :class:`RecordFill` fills an array of points from a LAS record
array in one compiled pass (numba): every point starts as a template record (the fill
values of :func:`~inventory.io.clouds.empty_points`), the dimensions stored as they travel
are copied as bytes, the bit fields unpacked (``(byte & mask) >> shift``, as laspy does),
and the coordinates scaled (``stored * scale + offset``, laspy's arithmetic, so the same
float64 values).
"""

from __future__ import annotations

import numpy as np
from numba import njit

__all__ = ["RecordFill", "byte_rows", "concat", "records", "select"]


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
def _fill(src, out, template, copies, bits):  # pragma: no cover - compiled
    n, w = out.shape
    for i in range(n):
        for k in range(w):
            out[i, k] = template[k]
        for j in range(copies.shape[0]):
            s = copies[j, 0]
            d = copies[j, 1]
            for b in range(copies[j, 2]):
                out[i, d + b] = src[i, s + b]
        for j in range(bits.shape[0]):
            out[i, bits[j, 3]] = (src[i, bits[j, 0]] & bits[j, 1]) >> bits[j, 2]


@njit(cache=True, nogil=True)
def _scale(stored, scale, offset, out):  # pragma: no cover - compiled
    for i in range(stored.size):
        out[i] = stored[i] * scale + offset


class RecordFill:
    """A plan to fill points of dtype ``dtype`` from LAS records of dtype ``src``.

    Parameters
    ----------
    src : numpy dtype
        The LAS records' dtype (laspy's ``rec.array.dtype``).
    dtype : numpy dtype
        The points' dtype.
    template : ndarray
        One record of ``dtype``: the value of every field not filled.
    fields : dict
        Points' field -> record field stored as it travels (copied when the two dtypes
        agree, else assigned by numpy after the pass).
    bit_fields : dict
        Points' field -> (record field of one byte, mask): ``(byte & mask) >> lowest bit``.
    coords : dict
        Points' float64 field -> (record field, scale, offset).
    """

    def __init__(self, src: np.dtype, dtype: np.dtype, template: np.ndarray, fields: "dict[str, str]",
                 bit_fields: "dict[str, tuple[str, int]]", coords: "dict[str, tuple[str, float, float]]") -> None:
        self.dtype = np.dtype(dtype)
        self.template = byte_rows(np.asarray(template, self.dtype).reshape(1))[0].copy()
        copies, bits, self.assign = [], [], []
        for dst, name in fields.items():
            s_dt, s_off = src.fields[name][:2]
            d_dt, d_off = self.dtype.fields[dst][:2]
            if s_dt == d_dt:
                copies.append((s_off, d_off, d_dt.itemsize))
            else:
                self.assign.append((dst, name))
        for dst, (name, mask) in bit_fields.items():
            s_dt, s_off = src.fields[name][:2]
            d_dt, d_off = self.dtype.fields[dst][:2]
            if s_dt.itemsize == 1 and s_dt.kind == "u" and d_dt == np.dtype("u1") and 0 < mask < 256:
                bits.append((s_off, mask, (mask & -mask).bit_length() - 1, d_off))
            else:
                self.assign.append((dst, (name, mask)))
        self.copies = np.array(copies, np.int64).reshape(-1, 3)
        self.bits = np.array(bits, np.int64).reshape(-1, 4)
        self.coords = coords

    def __call__(self, rec: np.ndarray) -> np.ndarray:
        """Points of :attr:`dtype` from the LAS record array ``rec``."""
        out = np.empty(len(rec), self.dtype)
        _fill(byte_rows(rec), byte_rows(out), self.template, self.copies, self.bits)
        for dst, (name, scale, offset) in self.coords.items():
            _scale(rec[name], float(scale), float(offset), out[dst])
        for dst, name in self.assign:
            if isinstance(name, tuple):
                field, mask = name
                out[dst] = (rec[field] & rec.dtype[field].type(mask)) >> ((mask & -mask).bit_length() - 1)
            else:
                out[dst] = rec[name]
        return out
