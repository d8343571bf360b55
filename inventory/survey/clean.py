"""Cleaning steps: range gates, statistical outliers, extended local minimum.

Each function follows the PDAL stage of the same job, with its option names and semantics,
so that a pipeline gives the same answer with PDAL or with our runner:

* :func:`parse_limits` / :func:`limits_mask`: ``filters.range`` limits such as
  ``"Z[0:50],Classification![7:7]"``. Ranges on one dimension are OR-ed, different
  dimensions AND-ed; NaN fails a plain range and passes a negated one (PDAL
  ``DimRange::valuePasses``).
* :func:`statistical_outliers`: ``filters.outlier`` with ``method: statistical``, the
  statistical outlier removal of Rusu et al. 2008 (Robotics and Autonomous Systems 56:927):
  mean distance of each point to its ``mean_k`` nearest neighbours; outlier when that mean
  is at least the global mean + ``multiplier`` x standard deviation.
* :func:`elm_low_points`: ``filters.elm``, the Extended Local Minimum of Chen et al. 2012
  (ISPRS J. 72:121) as PDAL applies it: within each cell, walk up from the lowest point and
  mark a point as noise while the gap to the next point above is at least ``threshold``.
* :func:`voxel_thin` (ours, stage ``inventory.voxel_thin``): at most ``max_points`` points
  per voxel, the lowest and the highest always among them.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np

from inventory.errors import PipelineError

__all__ = ["DimRange", "parse_limits", "limits_mask", "statistical_outliers", "elm_low_points",
           "find_dimension", "spatial_order", "voxel_thin"]

_RANGE_RE = re.compile(
    r"^\s*(?P<name>[A-Za-z_][A-Za-z0-9_]*)\s*(?P<neg>!)?\s*(?P<lo_br>[\[(])\s*(?P<lo>[^:\s]*)\s*:"
    r"\s*(?P<hi>[^\])\s]*)\s*(?P<hi_br>[\])])\s*$")


@dataclass(frozen=True)
class DimRange:
    """One PDAL range such as ``Z[0:10)`` or ``Classification![7:7]``."""

    name: str
    lower: float
    upper: float
    lower_inclusive: bool = True
    upper_inclusive: bool = True
    negate: bool = False

    def passes(self, v: np.ndarray) -> np.ndarray:
        v = np.asarray(v, float)
        with np.errstate(invalid="ignore"):
            fail = np.isnan(v)
            fail |= (v < self.lower) if self.lower_inclusive else (v <= self.lower)
            fail |= (v > self.upper) if self.upper_inclusive else (v >= self.upper)
        return fail if self.negate else ~fail


def _bound(text: str, default: float, what: str, spec: str) -> float:
    if text == "":
        return default
    try:
        return float(text)
    except ValueError as err:
        raise PipelineError(f"range {spec!r}: {what} bound {text!r} is not a number") from err


def parse_limits(limits: "str | list[str]") -> list[DimRange]:
    """Parse PDAL ``limits`` text (comma-separated, or a list) into ranges.

    Examples
    --------
    >>> parse_limits("Z[0:10),Classification![7:7]")[1]
    DimRange(name='Classification', lower=7.0, upper=7.0, lower_inclusive=True, upper_inclusive=True, negate=True)
    """
    items = limits if isinstance(limits, list) else _split_ranges(str(limits))
    out = []
    for spec in items:
        m = _RANGE_RE.match(spec)
        if not m:
            raise PipelineError(f"range {spec!r} is not of the form Name[lower:upper] "
                                "(brackets [ ] inclusive, ( ) exclusive, ! negates)")
        out.append(DimRange(
            m["name"],
            _bound(m["lo"], -np.inf, "lower", spec), _bound(m["hi"], np.inf, "upper", spec),
            m["lo_br"] == "[", m["hi_br"] == "]", m["neg"] == "!"))
    if not out:
        raise PipelineError("filters.range needs at least one range in 'limits'")
    return out


def _split_ranges(text: str) -> list[str]:
    # Commas separate ranges but never appear inside brackets.
    parts, depth, cur = [], 0, ""
    for ch in text:
        if ch in "[(":
            depth += 1
        elif ch in "])":
            depth -= 1
        if ch == "," and depth == 0:
            parts.append(cur)
            cur = ""
        else:
            cur += ch
    if cur.strip():
        parts.append(cur)
    return [p.strip() for p in parts if p.strip()]


def find_dimension(points: np.ndarray, name: str) -> str:
    """The field of ``points`` named ``name`` (case-insensitive, as PDAL looks dimensions up)."""
    for field in points.dtype.names or ():
        if field.lower() == name.lower():
            return field
    raise PipelineError(f"dimension {name!r} is not in the point cloud "
                        f"(have: {', '.join(points.dtype.names or ())})")


def limits_mask(points: np.ndarray, ranges: list[DimRange]) -> np.ndarray:
    """Points that pass ``ranges`` with PDAL's OR-within / AND-across-dimensions rule."""
    by_dim: dict[str, np.ndarray] = {}
    for r in ranges:
        field = find_dimension(points, r.name)
        ok = r.passes(points[field])
        by_dim[field] = by_dim[field] | ok if field in by_dim else ok
    mask = np.ones(len(points), bool)
    for ok in by_dim.values():
        mask &= ok
    return mask


def spatial_order(x: np.ndarray, y: np.ndarray, cell: float = 1.0) -> np.ndarray:
    """Permutation listing points block by block along a Z-order (Morton) curve of ``cell`` blocks.

    Neighbour queries run faster on points that are near in memory when
    they are near in space (timings in CHANGELOG.md).

    Examples
    --------
    >>> spatial_order(np.array([1.5, 0.5, 0.5, 1.5]), np.array([1.5, 1.5, 0.5, 0.5])).tolist()
    [2, 3, 1, 0]
    """
    if len(x) == 0:
        return np.zeros(0, np.int64)
    ix = np.floor((x - x.min()) / cell).astype(np.uint64)
    iy = np.floor((y - y.min()) / cell).astype(np.uint64)
    key = np.zeros(len(x), np.uint64)
    one = np.uint64(1)
    for bit in range(21):   # 2^21 blocks a side
        b = np.uint64(bit)
        key |= ((ix >> b) & one) << np.uint64(2 * bit)
        key |= ((iy >> b) & one) << np.uint64(2 * bit + 1)
    return np.argsort(key, kind="stable")


def statistical_outliers(xyz: np.ndarray, mean_k: int = 8, multiplier: float = 2.0) -> np.ndarray:
    """Mask of outliers by statistical outlier removal (Rusu et al. 2008; PDAL semantics).

    The mean distance of each point to its ``mean_k`` nearest neighbours (the point itself
    not counted); a point is an outlier when its mean is at least the mean of all means +
    ``multiplier`` x their standard deviation. Neighbours are found in :func:`spatial_order`
    (the distances, hence the result, do not depend on the order), with the threads of
    :func:`inventory.parallel.job_threads`.

    Parameters
    ----------
    xyz : ndarray (n, 3)
    mean_k : int
        Neighbours whose mean distance is used (PDAL default 8).
    multiplier : float
        Standard deviations above the mean distance that make an outlier (PDAL default 2.0).
    """
    from inventory.survey.kernels import CellIndex, knn3_mean

    n = len(xyz)
    if n <= mean_k:
        return np.zeros(n, bool)
    order = spatial_order(xyz[:, 0], xyz[:, 1])
    x, y, z = (np.ascontiguousarray(xyz[:, i], dtype=np.float64) for i in range(3))
    # the point itself is left out (PDAL asks for k + 1 and drops the first, itself)
    mean_d = np.empty(n)
    mean_d[order] = knn3_mean(CellIndex(x, y, k=2 * mean_k), x, y, z, order, mean_k)   # back in input order
    threshold = mean_d.mean() + multiplier * mean_d.std(ddof=1)
    return mean_d >= threshold


def elm_low_points(x: np.ndarray, y: np.ndarray, z: np.ndarray, cell: float = 10.0,
                   threshold: float = 1.0) -> np.ndarray:
    """Mask of low points by the Extended Local Minimum (Chen et al. 2012; PDAL semantics)."""
    n = len(z)
    out = np.zeros(n, bool)
    if n < 2:
        return out
    col = np.floor((x - x.min()) / cell).astype(np.int64)
    row = np.floor((y - y.min()) / cell).astype(np.int64)
    key = row * (col.max() + 1) + col
    order = np.lexsort((z, key))
    ks, zs = key[order], z[order]
    same_next = np.zeros(n, bool)
    same_next[:-1] = ks[1:] == ks[:-1]
    gap_big = np.zeros(n, bool)
    gap_big[:-1] = (zs[1:] - zs[:-1]) >= threshold
    gap_big &= same_next                      # the top point of a cell is never marked
    # A point is noise while every gap from the bottom of its cell up to it is big.
    small = (~gap_big).astype(np.int64)
    cs = np.cumsum(small)
    start = np.ones(n, bool)
    start[1:] = ks[1:] != ks[:-1]
    before = np.where(start, cs - small, 0)
    before = np.maximum.accumulate(np.where(start, before, -1))
    noise_sorted = (cs - before) == 0
    out[order] = noise_sorted
    return out


def voxel_thin(x: np.ndarray, y: np.ndarray, z: np.ndarray, cell: float = 0.05, max_points: int = 4) -> np.ndarray:
    """Mask of the points kept by voxel thinning: at most ``max_points`` per voxel.

    Voxels are cubes of ``cell`` on a lattice anchored at the coordinate origin, so a
    voxel is thinned the same way whichever tile or job sees it. In a voxel of m >
    ``max_points`` points, those at the evenly spaced ranks ``round(j (m - 1) /
    (max_points - 1))``, j = 0 .. max_points - 1, of the voxel's points ordered by height
    (then x, y) are kept: the lowest and the highest always (the surface and the top of
    what stands on it), and which points are kept does not depend on their order in the
    input.

    Examples
    --------
    >>> z = np.array([0.01, 0.02, 0.03, 0.04, 0.0, 0.3])
    >>> voxel_thin(np.full(6, 0.01), np.full(6, 0.01), z, cell=0.05, max_points=2).tolist()
    [False, False, False, True, True, True]
    """
    n = len(z)
    if max_points < 2:
        raise PipelineError(f"inventory.voxel_thin: max_points must be at least 2, got {max_points}")
    if not cell > 0:
        raise PipelineError(f"inventory.voxel_thin: cell must be positive, got {cell}")
    keep = np.ones(n, bool)
    if n <= max_points:
        return keep
    ix, iy, iz = (np.floor(v / cell).astype(np.int64) for v in (x, y, z))
    ix -= ix.min()
    iy -= iy.min()
    iz -= iz.min()
    key = (ix * (int(iy.max()) + 1) + iy) * (int(iz.max()) + 1) + iz
    order = np.lexsort((y, x, z, key))
    ks = key[order]
    start = np.ones(n, bool)
    start[1:] = ks[1:] != ks[:-1]
    first = np.flatnonzero(start)
    size = np.diff(np.append(first, n))
    m = np.repeat(size, size)                       # points in each point's voxel
    rank = np.arange(n) - np.repeat(first, size)    # its rank in the voxel by height
    # kept ranks j (m - 1) / (max_points - 1), rounded: rank r is one when the nearest
    # multiple of the step lands on it
    k = max_points - 1
    j = np.rint(rank * k / np.maximum(m - 1, 1))
    hit = np.rint(j * (m - 1) / k) == rank
    keep[order] = (m <= max_points) | hit
    return keep
