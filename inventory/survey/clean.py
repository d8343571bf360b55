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

from typing import Any

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
    they are near in space (timings in CHANGELOG.md). Block numbers count from the lowest x
    and y; the key interleaves their lowest 21 bits (2^21 blocks a side), x in the even
    bits; equal keys keep the input order (a compiled radix sort,
    :func:`inventory.survey.kernels.morton_order`).

    Examples
    --------
    >>> spatial_order(np.array([1.5, 0.5, 0.5, 1.5]), np.array([1.5, 1.5, 0.5, 0.5])).tolist()
    [2, 3, 1, 0]
    """
    from inventory.survey.kernels import morton_order

    return morton_order(np.ascontiguousarray(x, dtype=np.float64), np.ascontiguousarray(y, dtype=np.float64),
                        float(cell))


def statistical_outliers(xyz: np.ndarray, mean_k: int = 8, multiplier: float = 2.0,
                         plan: "np.ndarray | None" = None, plan_index: "Any | None" = None,
                         order: "np.ndarray | None" = None) -> np.ndarray:
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
    plan : ndarray (n, K) of int, optional
        The K nearest points in plan of each point, points numbered in
        ``spatial_order(x, y)`` (:func:`~inventory.survey.kernels.plan_knn` with
        ``dist=False``, as the surface stage asks it): a point's neighbours in 3D are taken
        from its row where the row holds them all (most points: see
        :func:`~inventory.survey.kernels.knn3_mean_from_plan`), and searched for the rest.
        The result is the same, bit for bit.
    plan_index : CellIndex, optional
        The cell index the table was searched on (its points in that order): the rest are
        searched on it.
    order : ndarray of int, optional
        ``spatial_order(x, y)`` of the points when the caller has it (the table's).
    """
    from inventory.survey.kernels import CellIndex, knn3_mean, knn3_mean_from_plan

    n = len(xyz)
    if n <= mean_k:
        return np.zeros(n, bool)
    if order is None:
        order = spatial_order(xyz[:, 0], xyz[:, 1])
    x, y, z = (np.ascontiguousarray(xyz[:, i], dtype=np.float64) for i in range(3))
    # the point itself is left out (PDAL asks for k + 1 and drops the first, itself)
    mean_d = np.empty(n)
    if plan is not None and len(plan) == n and plan.shape[1] > mean_k:
        xo, yo, zo = x[order], y[order], z[order]
        mo, short = knn3_mean_from_plan(plan, xo, yo, zo, mean_k)
        rest = np.flatnonzero(short)
        if len(rest):
            index = plan_index if plan_index is not None else CellIndex(xo, yo, k=2 * mean_k)
            mo[rest] = knn3_mean(index, xo, yo, zo, rest, mean_k)
        mean_d[order] = mo
    else:
        mean_d[order] = knn3_mean(CellIndex(x, y, k=2 * mean_k), x, y, z, order, mean_k)   # back in input order
    threshold = mean_d.mean() + multiplier * mean_d.std(ddof=1)
    return mean_d >= threshold


def elm_low_points(x: np.ndarray, y: np.ndarray, z: np.ndarray, cell: float = 10.0,
                   threshold: float = 1.0) -> np.ndarray:
    """Mask of low points by the Extended Local Minimum (Chen et al. 2012; PDAL semantics).

    Cells of ``cell`` from the lowest x and y; in each, the points ordered by height (equal
    heights in input order) are marked from the lowest up while the gap to the next is at
    least ``threshold``; the top point of a cell never is. Compiled:
    :func:`inventory.survey.kernels.elm_noise`.
    """
    from inventory.survey.kernels import elm_noise

    n = len(z)
    if n < 2:
        return np.zeros(n, bool)
    return elm_noise(*(np.ascontiguousarray(v, dtype=np.float64) for v in (x, y, z)), float(cell), float(threshold))


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
