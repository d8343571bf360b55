"""Ground classification for stockyards: the terrain with the piles on it is "ground".

:func:`slope_ground` (pipeline stage ``inventory.slope_ground``) keeps every point that lies
on the slope-limited lower envelope of the cloud (after Vosselman 2000), with region rules
for reclaim faces and for the flat tops of objects, and sorts the rest into overhead
structure (19), other (1) and noise (18, 7). :func:`csf_ground` wraps the
``cloth-simulation-filter`` package (Zhang et al. 2016) with PDAL ``filters.csf`` option
names for airborne, natural-terrain data.

The rules and why, the classes written and the known limits: docs/classifier.md.
"""

from __future__ import annotations

import contextlib
import math
import os
import sys
from dataclasses import dataclass, replace

import numpy as np

from inventory.errors import PipelineError
from inventory.model.classes import GROUND, HIGH_NOISE, LOW_NOISE, OVERHEAD_STRUCTURE, UNCLASSIFIED
from inventory.survey.kernels import (CellIndex, below_tests, cell_lowest, cell_stats, chamfer_passes,
                                      chamfer_passes_blocked, envelope_at, faces_over, fewer_within, floor_cells,
                                      has_company, knn3_mean, member_rows, min_envelope, outvoted, overhead_layers,
                                      plan_knn)

__all__ = ["SlopeGroundParams", "PlanTable", "plan_table", "slope_ground", "slope_envelope", "csf_ground"]

# Chamfer steps (row, col) used to propagate the envelope: 8 neighbours plus the 8 knight
# moves; the largest distance error of this mask is under 3 % (Borgefors 1986, CVGIP 34:344,
# from memory), so the effective slope limit is max_slope to about max_slope + 1 degree.
_STEPS = [(dr, dc) for dr in (-2, -1, 0, 1, 2) for dc in (-2, -1, 0, 1, 2)
          if (dr, dc) != (0, 0) and (abs(dr) < 2 and abs(dc) < 2 or abs(dr) + abs(dc) == 3)]


@dataclass(frozen=True)
class SlopeGroundParams:
    """Options of :func:`slope_ground` (also the options of stage ``inventory.slope_ground``)."""

    max_slope_deg: float = 50.0   # above the steepest repose angle, about 40 deg (common practice, from memory)
    tolerance: float = 0.10       # m; ranging noise of survey scanners is 2-25 mm (common practice)
    cell: float = 0.25            # m; seed grid
    window: float = 12.0          # m; how far around a surface island to look for the ground below it
    overhead_gap: float = 2.0     # m of empty space below a layer to call it overhead
    face_slope_deg: float = 70.0  # reclaim faces cut by loaders stand up to about this (common practice)
    face_attached: float = 0.5    # share of a steep patch's surroundings that must continue it
    max_top_area: float = 400.0   # m2; walled flat tops up to this size are objects, not ground
    # m; how far from a wall a point may be held above the envelope by the ground beyond
    # that wall (_behind_walls): a pile leaning on a wall is cut by the pad behind it out
    # to its height above that pad over tan(max_slope), 3.8 m for 4.5 m at 50 degrees;
    # bay and bunker walls stand up to about 6 m (common practice). 0: no wall rule.
    wall_reach: float = 5.0

    def __post_init__(self) -> None:
        if not 0 < self.max_slope_deg < 90:
            raise PipelineError(f"max_slope_deg must be between 0 and 90, got {self.max_slope_deg}")
        if not 0 < self.face_slope_deg < 90:
            raise PipelineError(f"face_slope_deg must be between 0 and 90, got {self.face_slope_deg}")
        if not self.wall_reach >= 0:
            raise PipelineError(f"wall_reach must be 0 or more, got {self.wall_reach}")
        if not 0 <= self.face_attached <= 1:
            raise PipelineError(f"face_attached must be between 0 and 1, got {self.face_attached}")
        for name in ("tolerance", "cell", "window", "overhead_gap"):
            if not getattr(self, name) > 0:
                raise PipelineError(f"{name} must be positive, got {getattr(self, name)}")


def slope_envelope(x: np.ndarray, y: np.ndarray, z: np.ndarray, params: SlopeGroundParams,
                   qx: np.ndarray | None = None, qy: np.ndarray | None = None) -> np.ndarray:
    """The slope-limited lower envelope E of the points (x, y, z) at query points.

    Query points default to the input points; queries outside the seeds' grid get +inf.
    """
    qx = x if qx is None else qx
    qy = y if qy is None else qy
    if len(z) == 0:
        return np.full(len(qx), np.inf)
    return _EnvelopeGrid(x, y, z, params).at(qx, qy)


class _EnvelopeGrid:
    """The propagated seed grid of :func:`slope_envelope`, built once, queried many times."""

    def __init__(self, x: np.ndarray, y: np.ndarray, z: np.ndarray, params: SlopeGroundParams) -> None:
        t = self.t = math.tan(math.radians(params.max_slope_deg))
        c = self.c = params.cell
        x0, y0 = self.x0, self.y0 = x.min() - c, y.min() - c
        ncol = self.ncol = int((x.max() - x0) // c) + 2
        nrow = self.nrow = int((y.max() - y0) // c) + 2
        col = floor_cells(np.ascontiguousarray(x, dtype=np.float64), float(x0), float(c))
        row = floor_cells(np.ascontiguousarray(y, dtype=np.float64), float(y0), float(c))
        key = self.key = row * ncol + col
        low = cell_lowest(key, np.ascontiguousarray(z, dtype=np.float64), nrow * ncol)
        skey = np.flatnonzero(low >= 0)
        seeds = low[skey]

        g = np.full(nrow * ncol, np.inf)
        g[skey] = z[seeds]
        g = g.reshape(nrow, ncol)
        # Anchor of each cell: its lowest point, or the cell centre for empty cells.
        ax = (x0 + (np.arange(ncol) + 0.5) * c)[None, :].repeat(nrow, 0).ravel()
        ay = (y0 + (np.arange(nrow) + 0.5) * c)[:, None].repeat(ncol, 1).ravel()
        ax[skey], ay[skey] = x[seeds], y[seeds]
        self.ax, self.ay = ax, ay
        self.seeds = g        # the lowest point of each cell (inf where none), unpropagated
        self.g = _chamfer_min(g, t * c).ravel()

    def blocked(self, block: np.ndarray) -> np.ndarray:
        """The seeds propagated on paths that never enter a ``block`` cell (a flat grid
        for :meth:`at`'s ``gf``)."""
        g = self.seeds.copy()
        chamfer_passes_blocked(g, float(self.t * self.c), np.ascontiguousarray(block.reshape(g.shape)))
        return g.ravel()

    def at(self, qx: np.ndarray, qy: np.ndarray, gf: "np.ndarray | None" = None) -> np.ndarray:
        """The envelope at query points: the seeds of the 3 x 3 cells around each, exactly
        (of the propagated grid ``gf``, default the whole grid's)."""
        gf = self.g if gf is None else gf
        ax, ay, t, c, nrow, ncol = self.ax, self.ay, self.t, self.c, self.nrow, self.ncol
        qcol = np.floor((qx - self.x0) / c).astype(np.int64)
        qrow = np.floor((qy - self.y0) / c).astype(np.int64)
        e = np.full(len(qx), np.inf)
        if len(qx) and qcol.min() >= 1 and qcol.max() <= ncol - 2 and qrow.min() >= 1 and qrow.max() <= nrow - 2:
            # every 3 x 3 block inside the grid (always so for the seeds' own points: the
            # grid has a border of one cell)
            return envelope_at(qx, qy, self.x0, self.y0, c, ncol, gf, ax, ay, t)
        for dr in (-1, 0, 1):
            for dc in (-1, 0, 1):
                r, cc = qrow + dr, qcol + dc
                ok = (r >= 0) & (r < nrow) & (cc >= 0) & (cc < ncol)
                k = (r * ncol + cc)[ok]
                cand = gf[k] + t * np.hypot(qx[ok] - ax[k], qy[ok] - ay[k])
                e[ok] = np.minimum(e[ok], cand)
        return e


#: A point held up by a wall lies at least this far below the wall's top (m; well over
#: ``tolerance`` and ranging noise): a flat top level with a wall's is the wall's top, or
#: a roof level with its own sides'.
WALL_CLEARANCE_M = 0.25


def _behind_walls(x: np.ndarray, y: np.ndarray, z: np.ndarray, h: np.ndarray, e_local: np.ndarray,
                  env: _EnvelopeGrid, params: SlopeGroundParams) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Points above the envelope only because of lower ground beyond a wall that stands
    above them (a pile heaped against a bay wall, the pad behind the wall scanned to its
    foot): their numbers among the points of ``env``, their envelope without the wall,
    and which points of ``env`` lie in the wall's cells.

    A wall is a cell of the envelope's grid whose points span more than
    ``overhead_gap / 2`` in height (no pile surface rises that much within one cell, even
    a reclaim face at ``face_slope_deg``), widened by a cell so that no chamfer step jumps
    it. The seeds are propagated again on paths that never enter a wall; a point outside
    the wall's cells, above the envelope by more than ``tolerance``, is surface after all
    when it lies on this second envelope (and on its nearest points' envelope, as before)
    and at least :data:`WALL_CLEARANCE_M` below the top of a wall within ``wall_reach``
    (0: no such rule; the bare-earth pipeline ``terrain.json`` has none: the cells of
    trees and buildings span more than a metre too, and a bare-earth filter must not keep
    what stands beside them). A machine's roof is the top of its own sides and stays above
    the envelope, the low edge of its side lies in its wall's cells; what else the second
    envelope lets through is left to the region rules, as any flat top is.
    """
    from scipy import ndimage

    none = np.zeros(0, np.int64), np.zeros(0), np.zeros(len(z), bool)
    cand = np.isfinite(h) & (h > params.tolerance)
    if params.wall_reach <= 0 or not cand.any():
        return none
    shape = (env.nrow, env.ncol)
    z64 = np.ascontiguousarray(z, dtype=np.float64)
    n, _, lo, hi = cell_stats(env.key, z64, np.ones(len(z), bool), shape[0] * shape[1])
    tall = ((n > 1) & (hi - lo > params.overhead_gap / 2)).reshape(shape)
    if not tall.any():
        return none
    in_wall = tall.ravel()[env.key]
    reach = int(math.ceil(params.wall_reach / env.c))
    wall_top = ndimage.maximum_filter(np.where(tall, hi.reshape(shape), -np.inf), size=2 * reach + 1,
                                      mode="constant", cval=-np.inf).ravel()
    cand &= z64 <= wall_top[env.key] - WALL_CLEARANCE_M
    if not cand.any():
        return none[0], none[1], in_wall
    block = ndimage.binary_dilation(tall, structure=np.ones((3, 3), bool)).ravel()
    # a point in the wall's cells or beside them is the wall's own (a machine's side down
    # to its lowest edge) and is left to the first envelope
    cand &= ~block[env.key]
    if not cand.any():
        return none[0], none[1], in_wall
    gf = env.blocked(block)
    gf[block] = np.inf          # the wall's cells pass nothing on, not even their own seed
    rows = np.flatnonzero(cand)
    e2 = np.minimum(env.at(x[rows], y[rows], gf), e_local[rows])
    ok = z64[rows] - e2 <= params.tolerance
    return rows[ok], e2[ok], in_wall


def _local_envelope(x: np.ndarray, y: np.ndarray, z: np.ndarray, params: SlopeGroundParams,
                    k: int = 16, knn: "tuple[np.ndarray, np.ndarray] | None" = None) -> np.ndarray:
    """The envelope over each point's ``k`` nearest neighbours in plan, at exact distances.

    The grid envelope only sees the lowest point of each cell; on a wall, the points just
    below a point in plan are what show it is a wall. ``knn``: (neighbours, rows), the
    ``k`` nearest and the point itself of the points ``rows`` (numbers in x, y, z), as
    :meth:`_PlanNeighbours.within` gives them; the envelope is then of those rows only.
    """
    n = len(z)
    if n < 2:
        return np.full(n if knn is None else len(knn[1]), np.inf)
    if knn is None:
        knn = plan_knn(CellIndex(x, y, k=k + 1), x, y, min(k + 1, n), dist=False), np.arange(n)
    nb, rows = knn
    t = math.tan(math.radians(params.max_slope_deg))
    return min_envelope(nb, rows, np.ascontiguousarray(x, dtype=np.float64), np.ascontiguousarray(y, dtype=np.float64),
                        np.ascontiguousarray(z, dtype=np.float64), t)


class _PlanNeighbours:
    """Nearest neighbours in plan of every point, and from them of any subset's points.

    One query of the ``K`` nearest points of the whole cloud answers "the k nearest
    members of a subset" (k <= K) for a subset member whenever its first k neighbours are
    all members, which is nearly every point (the subsets leave out a few noise points);
    the others are asked again, of the subset's own cell index. Saves a query per subset.
    Queries run on a grid of cells (:class:`~inventory.survey.kernels.CellIndex`). Only
    the neighbours' numbers are kept (int32); their distances are worked out again from
    the coordinates where they are used, to the same bits, at a quarter of the memory.
    """

    K = 17

    def __init__(self, x: np.ndarray, y: np.ndarray) -> None:
        self.x, self.y = x, y
        n = len(x)
        self.nb = None
        #: the cell index of every point, kept: the subsets' indexes are cut from it
        self.index = CellIndex(x, y, k=self.K)
        if n >= 2:
            self.nb = plan_knn(self.index, x, y, min(self.K, n), dist=False)

    def within(self, members: np.ndarray, k: int, rows: "np.ndarray | None" = None,
               earlier: "tuple[np.ndarray, np.ndarray] | None" = None) -> np.ndarray:
        """Numbers (within the subset, int32; -1: fewer members than asked) of each
        member's k nearest members, the member itself among them.

        ``rows`` (a mask, members only) limits the answer to those members' rows.
        ``earlier``: the mask and the answer (all rows, k columns) of an earlier call for
        a superset of ``members``. A member whose k nearest there are all members has
        the same k nearest here (a nearer member would have been among them), and only
        the other rows are asked again: far fewer than the rows beside a point outside
        ``members``, when the two subsets differ by a few points.
        """
        idx = np.flatnonzero(members)
        sel = idx if rows is None else np.flatnonzero(rows & members)
        k = min(k, len(idx))
        pos = (np.cumsum(members) - 1).astype(np.int64)
        if k < 2 or self.nb is None or k > self.nb.shape[1]:
            nb = plan_knn(self.index.subset(members), self.x[sel], self.y[sel], max(k, 1), dist=False)
            return np.where(nb >= 0, np.take(pos, nb), -1).astype(np.int32)
        if len(idx) == len(members):
            if rows is None:
                return self.nb[:, :k]
            return np.take(self.nb[:, :k], sel, axis=0)
        if (earlier is not None and earlier[1].shape[1] == k and len(earlier[0]) == len(members)
                and not (members & ~earlier[0]).any()):
            # rows whose k nearest in the superset are all members are answered
            before = earlier[0]
            nn, mixed = member_rows(earlier[1], (np.cumsum(before) - 1)[sel], members, pos, k,
                                    numbers=np.flatnonzero(before))
        else:
            # rows whose k nearest are all members are answered; the others asked again
            nn, mixed = member_rows(self.nb, sel, members, pos, k)
        mixed = np.flatnonzero(mixed)
        if len(mixed):
            q = sel[mixed]
            nb = plan_knn(self.index.subset(members), self.x[q], self.y[q], k, dist=False)
            nn[mixed] = np.take(pos, nb)
        return nn


@dataclass(frozen=True)
class PlanTable:
    """Points in :func:`~inventory.survey.clean.spatial_order` (``order``) and their
    nearest neighbours in plan in that order (``plan``): what :func:`slope_ground` asks
    first, made once per job and shared with the outlier filter before it
    (:func:`~inventory.survey.clean.statistical_outliers`)."""

    order: np.ndarray
    plan: "_PlanNeighbours"


def plan_table(x: np.ndarray, y: np.ndarray) -> PlanTable:
    """:class:`PlanTable` of the points (x, y)."""
    from inventory.survey.clean import spatial_order

    order = spatial_order(x, y)
    return PlanTable(order, _PlanNeighbours(x[order], y[order]))


def _region_cells(x: np.ndarray, y: np.ndarray, c: float) -> tuple[np.ndarray, np.ndarray, tuple[int, int]]:
    """Row and column of each point on the region rules' grid of cell ``c`` (origin at the
    points' lowest x and y), and the grid's shape."""
    x = np.ascontiguousarray(x, dtype=np.float64)
    y = np.ascontiguousarray(y, dtype=np.float64)
    col = floor_cells(x, float(x.min()), float(c))   # (x - x.min()) // c
    row = floor_cells(y, float(y.min()), float(c))
    return row, col, (int(row.max()) + 1, int(col.max()) + 1)


def _attached_faces(x: np.ndarray, y: np.ndarray, z: np.ndarray, ground: np.ndarray,
                    params: SlopeGroundParams, knn: "tuple[np.ndarray, np.ndarray] | None" = None
                    ) -> np.ndarray:
    """Points kept only by the steeper ``face_slope_deg`` bound that belong to the surface.

    ``knn``: the 16 nearest points in plan (and the point itself) of the points not in
    ``ground``, in their order, as :meth:`_PlanNeighbours.within` gives them (numbers).

    Candidates lie on the envelope of ``face_slope_deg`` but not of ``max_slope_deg``:
    reclaim faces cut by a loader and the pile top behind them, but also the middle of a
    machine's flat roof and the feet of walls. Candidate points are rasterised on cells of
    ``2 * cell`` and joined into patches of 8-connected cells whose lowest points differ by
    no more than the face slope allows over one cell. A patch that rises at least
    ``overhead_gap`` (a face, not the strip along the foot of a wall) is accepted when at
    least ``face_attached`` of the scanned cells around it hold surface points that
    continue it: their height range meets the patch's range beside them within tolerance
    plus ``max_slope_deg`` over one cell. A cut pile top is surrounded by the pile it was cut
    from; a roof is surrounded by its own edges, which are not surface.
    """
    from scipy import ndimage

    steep = replace(params, max_slope_deg=params.face_slope_deg)
    other = ~ground     # only these can become candidates: the envelope at them alone
    e = slope_envelope(x, y, z, steep, qx=x[other], qy=y[other])
    local = (_local_envelope(x, y, z, steep)[other] if knn is None
             else _local_envelope(x, y, z, steep, knn=(knn, np.flatnonzero(other))))
    cand = np.zeros(len(z), bool)
    cand[other] = z[other] - np.minimum(e, local) <= params.tolerance
    out = np.zeros(len(z), bool)
    if not cand.any():
        return out
    c = 2 * params.cell
    row, col, shape = _region_cells(x, y, c)

    size = shape[0] * shape[1]
    k = row * shape[1] + col
    z64 = np.ascontiguousarray(z, dtype=np.float64)

    def extremes(sel: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        # lowest and highest z of the points ``sel`` per cell, NaN in cells without one
        _, _, lo, hi = cell_stats(k, z64, sel, size)
        return tuple(np.where(np.isinf(g), np.nan, g).reshape(shape) for g in (lo, hi))

    # A patch continues the surface where its lowest points meet the highest surface
    # points of the cell beside it: the foot of a reclaim face meets the pad, the edge of
    # the cut top meets the flank. The underside of a truck body or a roof does not.
    zc, zc_top = extremes(cand)
    zg_lo, zg_hi = extremes(ground)
    has_g = np.isfinite(zg_lo)
    occupied = (np.bincount(k, minlength=size) > 0).reshape(shape)
    labels, n = _continuous_patches(zc, params.tolerance + math.tan(math.radians(params.face_slope_deg)) * c)
    reach = params.tolerance + math.tan(math.radians(params.max_slope_deg)) * c
    accepted = np.zeros(n + 1, bool)
    box = np.ones((3, 3), bool)
    for i, sl in enumerate(ndimage.find_objects(labels), start=1):
        if sl is None:
            continue
        sl = tuple(slice(max(s.start - 1, 0), s.stop + 1) for s in sl)
        comp = labels[sl] == i
        if zc_top[sl][comp].max() - zc[sl][comp].min() < params.overhead_gap:
            continue   # a strip along the foot of a wall, not a face up to a top
        ring = ndimage.binary_dilation(comp, structure=box) & ~comp
        # heights the patch reaches next to each cell, against the surface heights in it
        nb_lo = ndimage.grey_erosion(np.where(comp, zc[sl], np.inf), footprint=box, mode="constant",
                                     cval=np.inf)
        nb_hi = ndimage.grey_dilation(np.where(comp, zc_top[sl], -np.inf), footprint=box, mode="constant",
                                      cval=-np.inf)
        with np.errstate(invalid="ignore"):
            ok = ring & has_g[sl] & (zg_lo[sl] <= nb_hi + reach) & (zg_hi[sl] >= nb_lo - reach)
        seen = (ring & occupied[sl]).sum()   # unscanned cells around it count neither way
        if seen and ok.sum() >= params.face_attached * seen:
            accepted[i] = True
    out[cand] = accepted[labels[row[cand], col[cand]]]
    return out


def _continuous_patches(zc: np.ndarray, step: float, faces: "tuple[np.ndarray, np.ndarray, float] | None" = None
                        ) -> tuple[np.ndarray, int]:
    """Label 8-connected cells with finite ``zc`` where neighbours differ by at most ``step``.

    ``faces`` = (lowest, highest, margin): heights of the other (not surface) points of each
    cell; two cells are then not joined where such a point of either lies between their
    heights, more than ``margin`` from both: the step between them is an object's face.
    """
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    nr, nc = zc.shape
    idx = np.arange(nr * nc).reshape(nr, nc)
    ok = np.isfinite(zc)
    rows, cols = [], []
    for dr, dc in ((0, 1), (1, 0), (1, 1), (1, -1)):
        a = (slice(0, nr - dr), slice(max(-dc, 0), nc - max(dc, 0)))
        b = (slice(dr, nr), slice(max(dc, 0), nc + min(dc, 0)))
        with np.errstate(invalid="ignore"):
            link = ok[a] & ok[b] & (np.abs(zc[a] - zc[b]) <= step)
            if faces is not None:
                o_lo, o_hi, m = faces
                lo = np.fmin(zc[a], zc[b]) + m
                hi = np.fmax(zc[a], zc[b]) - m
                for o in (a, b):
                    link &= ~((o_lo[o] < hi) & (o_hi[o] > lo))
        rows.append(idx[a][link])
        cols.append(idx[b][link])
    r, c_ = np.concatenate(rows), np.concatenate(cols)
    graph = coo_matrix((np.ones(len(r), bool), (r, c_)), shape=(nr * nc, nr * nc))
    _, comp = connected_components(graph, directed=False)
    labels = np.zeros(nr * nc, np.int64)
    uniq, inv = np.unique(comp[ok.ravel()], return_inverse=True)
    labels[ok.ravel()] = inv + 1
    return labels.reshape(nr, nc), len(uniq)


def _walled_tops(x: np.ndarray, y: np.ndarray, z: np.ndarray, ground: np.ndarray,
                 params: SlopeGroundParams) -> np.ndarray:
    """Ground points on the flat top of an object with walls (a machine roof, a wall top).

    The envelope lets a flat top through once it is farther than ``height / tan(max_slope)``
    from every wall foot. Such a top is an island: surface cells (cells of ``2 * cell``)
    joined only where neighbours continue each other in height (a step no steeper than
    ``face_slope_deg``, and no point that is not surface in either cell lying between the
    two heights by more than ``tolerance``: that is a wall's face), cut off from the rest by
    its walls or by a drop. An island of at most ``max_top_area`` m2 is not surface when

    * the surface cells around it are all lower than it by more than ``tolerance``
      (it is cut off by faces or steps going down from it), or
    * it stands more than ``overhead_gap`` / 2 above the lowest point within ``window`` of
      it and has at least four scanned cells around it, or at least one and no surface
      beside it at its level.

    A pile is never such an island: its flanks continue into the pad.
    """
    from scipy import ndimage

    out = np.zeros(len(z), bool)
    if not ground.any() or ground.all():
        return out
    c = 2 * params.cell
    row, col, shape = _region_cells(x, y, c)
    k = row * shape[1] + col
    size = shape[0] * shape[1]
    # per cell: the surface points' count, sum and lowest; the other points' count and range
    z64 = np.ascontiguousarray(z, dtype=np.float64)
    n_g, sum_g, lo_g, _ = cell_stats(k, z64, ground, size)
    n_o, _, o_lo, o_hi = cell_stats(k, z64, ~ground, size)
    has_g = (n_g > 0).reshape(shape)
    has_o = (n_o > 0).reshape(shape) & ~has_g
    with np.errstate(invalid="ignore", divide="ignore"):
        zg = (sum_g / n_g).reshape(shape)    # mean height of the surface points (NaN: none)
    zlow = np.minimum(lo_g, o_lo).reshape(shape)    # the lowest point of the cell
    margin = int(math.ceil(params.window / c))
    step = params.tolerance + math.tan(math.radians(max(params.face_slope_deg, params.max_slope_deg))) * c
    faces = (o_lo.reshape(shape), o_hi.reshape(shape), params.tolerance)
    labels, n = _continuous_patches(np.where(has_g, zg, np.nan), step, faces)
    if n < 2:
        return out
    areas = np.bincount(labels.ravel(), minlength=n + 1) * c * c
    drop = np.zeros(n + 1, bool)
    for i, sl in enumerate(ndimage.find_objects(labels), start=1):
        if areas[i] > params.max_top_area:
            continue
        sl = tuple(slice(max(s.start - 1, 0), s.stop + 1) for s in sl)
        comp = labels[sl] == i
        ring = ndimage.binary_dilation(comp, structure=np.ones((3, 3), bool)) & ~comp
        # around a top: its walls (non-surface points) or a drop to surface below it;
        # unscanned cells count neither way
        walls = ring & (has_o[sl] | has_g[sl])
        if not walls.any():
            continue
        # surface beside it: none at its level means it is cut off by a face or a step
        # that goes down from it on every side where there is surface
        beside = ring & has_g[sl]
        with np.errstate(invalid="ignore"):
            level = (beside & (zg[sl] >= np.nanmin(zg[sl][comp]) - params.tolerance)).any()
        if not level and beside.any():
            drop[i] = True
            continue
        if walls.sum() < 4 and level:
            continue
        around = tuple(slice(max(a.start - margin, 0), a.stop + margin) for a in sl)
        if np.nanmedian(zg[sl][comp]) - zlow[around].min() > params.overhead_gap / 2:
            drop[i] = True
    if drop.any():
        out[ground] = drop[labels[row[ground], col[ground]]]
    return out


def _chamfer_min(g: np.ndarray, weight: float) -> np.ndarray:
    """Lower envelope ``min_n (g_n + weight * d_n)`` over the whole grid, d the 16-neighbour
    chamfer distance in cells.

    Two raster passes, down the rows and back up (Borgefors 1986, sequential algorithm, from
    memory): a shortest chamfer path never turns back across rows, so each pass finalises a
    row from the one or two rows before it (diagonal and knight steps) and then along the row
    itself, where the running minimum of ``g - weight * col`` (and mirrored) is the exact
    left and right propagation. Equal, to rounding, to iterating the 16 steps to convergence.
    """
    g = np.array(g, dtype=float)   # a copy
    nrow, ncol = g.shape
    if nrow == 0 or ncol == 0:
        return g
    chamfer_passes(g, float(weight))   # compiled, the operations of the numpy form in its order
    return g


def _spikes(x: np.ndarray, y: np.ndarray, z: np.ndarray, ground: np.ndarray,
            params: SlopeGroundParams, walls: "np.ndarray | None" = None) -> np.ndarray:
    """Surface points in cells that stand above other surface more than a face could.

    On cells of ``2 * cell`` holding surface points (their mean height), a cell is a spike
    when it stands more than ``3 * tolerance`` above ``z_n + tan(face_slope) * d`` for
    another surface cell n at chamfer distance d: no reclaim face, let alone a flank,
    rises that fast. Sparse returns from wall tops, gallery roofs, machine decks and the
    platform a scanner stands on, which got through the point rules, end here.

    ``walls`` (points of walls, :func:`_behind_walls`): the cells holding them, widened by
    a cell, pass nothing on and count as no one's neighbour, so that the pad behind a wall
    does not make spikes of the pile leaning on it.
    """
    out = np.zeros(len(z), bool)
    if not ground.any():
        return out
    c = 2 * params.cell
    t = math.tan(math.radians(max(params.face_slope_deg, params.max_slope_deg)))
    row, col, shape = _region_cells(x, y, c)
    k = row * shape[1] + col
    size = shape[0] * shape[1]
    n, total, _, _ = cell_stats(k, np.ascontiguousarray(z, dtype=np.float64), ground, size)
    with np.errstate(invalid="ignore", divide="ignore"):
        zm = (total / n).reshape(shape)
    zf = np.where(np.isfinite(zm), zm, np.inf)
    if walls is not None and walls.any():
        from scipy import ndimage

        block = np.bincount(k[walls], minlength=size).reshape(shape) > 0
        block = ndimage.binary_dilation(block, structure=np.ones((3, 3), bool))
        env = zf.copy()
        chamfer_passes_blocked(env, float(t * c), block)
        env[block] = np.inf     # no one's neighbour
    else:
        env = _chamfer_min(zf, t * c)
    # the envelope from the neighbours alone: one more step from each neighbour
    low = np.full(shape, np.inf)
    for dr, dc, w in [(dr, dc, t * c * math.hypot(dr, dc)) for dr, dc in _STEPS]:
        low[max(dr, 0):shape[0] + min(dr, 0), max(dc, 0):shape[1] + min(dc, 0)] = np.minimum(
            low[max(dr, 0):shape[0] + min(dr, 0), max(dc, 0):shape[1] + min(dc, 0)],
            env[max(-dr, 0):shape[0] + min(-dr, 0), max(-dc, 0):shape[1] + min(-dc, 0)] + w)
    with np.errstate(invalid="ignore"):
        spike = np.isfinite(zm) & (zm - low > 3 * params.tolerance)
    out[ground] = spike.ravel()[k[ground]]
    return out


def _overhead(x: np.ndarray, y: np.ndarray, z: np.ndarray, h: np.ndarray, cell: float,
              gap: float) -> np.ndarray:
    """Points in a layer of their column with at least ``gap`` of empty space below it.

    Columns are cells of ``cell`` (from the lowest x and y), their points ordered by height;
    a layer starts at a gap of at least ``gap`` to the point below. Space below the bottom
    of a layer: the gap to the layer beneath, or for the lowest layer of a column its height
    ``h`` above the ground envelope (nothing seen below it). Compiled:
    :func:`inventory.survey.kernels.overhead_layers`.
    """
    if len(z) == 0:
        return np.zeros(0, bool)
    return overhead_layers(*(np.ascontiguousarray(v, dtype=np.float64) for v in (x, y, z, h)), float(cell),
                           float(gap))


#: Distance (m) within which a return must have another to be judged at all.
ISOLATION_M = 2.0


def _isolated(x: np.ndarray, y: np.ndarray, z: np.ndarray, use: np.ndarray,
              near: "dict | None" = None, index: "CellIndex | None" = None) -> np.ndarray:
    """Points with no other point within :data:`ISOLATION_M` in 3D.

    ``near`` may hold the nearest points in plan of a superset of ``use`` (``idx``, ``nb``,
    ``x``, ``y``, ``z`` from :func:`_below_neighbours`): a point with a member of ``use``
    among them closer than :data:`ISOLATION_M` in 3D is not isolated; only the others are
    queried in 3D, on ``index`` (a cell index of all the points (x, y), cut to ``use``
    without sorting again) when given, else on an index of ``use`` built here.
    """
    out = np.zeros(len(z), bool)
    idx = np.flatnonzero(use)
    if len(idx) < 2:
        out[idx] = True
        return out
    xyz = np.column_stack([x[idx], y[idx], z[idx]])
    if near is None or len(near["idx"]) < 2:
        d1 = knn3_mean(CellIndex(xyz[:, 0], xyz[:, 1], k=8), xyz[:, 0], xyz[:, 1], xyz[:, 2], np.arange(len(idx)), 1)
        out[idx[d1 > ISOLATION_M]] = True
        return out
    sup, nb = near["idx"], near["nb"]
    member = use[sup]
    rest = np.flatnonzero(member)
    rest = rest[~has_company(nb, rest, near["x"], near["y"], near["z"], member, ISOLATION_M)]
    if len(rest):
        short = (np.cumsum(member) - 1)[rest]    # positions in idx
        if index is not None and index.n == len(z):
            # the same nearest distance, the search on the cells already sorted
            q = idx[short]
            d2 = knn3_mean(index.subset(use), x, y, np.ascontiguousarray(z, dtype=np.float64), q, 1)
        else:
            d2 = knn3_mean(CellIndex(xyz[:, 0], xyz[:, 1], k=8), xyz[:, 0], xyz[:, 1], xyz[:, 2], short, 1)
        out[idx[short[d2 > ISOLATION_M]]] = True
    return out


def _below_neighbours(x: np.ndarray, y: np.ndarray, z: np.ndarray, use: np.ndarray,
                      params: SlopeGroundParams, plan: "_PlanNeighbours | None" = None,
                      near3: "dict | None" = None) -> np.ndarray:
    """Points under the surface around them (multipath returns), by two tests.

    With ``reach(d) = tan(max_slope) * d + tolerance`` for a neighbour at distance d in plan:

    * plan test: of the 16 nearest points in plan within 1 m, leaving out those more than
      ``overhead_gap`` above the reach (a boom, a gallery), at least four remain and 90 %
      of them lie above the reach. Catches points up to about ``overhead_gap`` under a
      surface.
    * isolation test: at least half of the 16 nearest points in plan lie above the reach
      (at any height) and fewer than three points lie within 1 m in 3D (no surface at
      the point's own level). Catches deeper points; ground under a boom or a gallery
      passes because the ground beside it is within 1 m.
    """
    idx = np.flatnonzero(use)
    out = np.zeros(len(z), bool)
    k2 = 16
    if len(idx) <= k2:
        return out
    t = math.tan(math.radians(params.max_slope_deg))
    xs, ys, zs = (np.ascontiguousarray(v[idx], dtype=np.float64) for v in (x, y, z))

    if plan is None:
        plan = _PlanNeighbours(x, y)
    index = plan.index
    nn = plan.within(use, k2 + 1)
    nb = nn[:, 1:]
    # the plan test and the first half of the isolation test, point by point
    plan, deep = below_tests(nb, np.arange(len(idx)), xs, ys, zs, t, params.tolerance, params.overhead_gap, k2)

    # Deeper points: above-reach neighbours in plan (any height) and almost no points
    # within 1 m in 3D, i.e. no surface at the point's own level.
    if near3 is not None:   # handed on to _isolated, and the whole table to the caller
        near3.update(idx=idx, nb=nb, x=xs, y=ys, z=zs, use=use, table=nn)
    # "Fewer than three other points within r in 3D" is "fewer than four members within r,
    # the point itself included": one count answers both radii, asked only for the points
    # that pass the plan tests (a few per cent).
    cand = np.flatnonzero(plan | deep)
    if len(cand):
        # A point with company within 0.5 m (the foot of a wall, ground under a gallery)
        # is part of something, not a stray return.
        alone_half, alone_1m = fewer_within(index.subset(use), x, y, z, idx[cand], 4, 0.5, 1.0)
        deep[cand] &= alone_1m
        plan[cand] &= alone_half
    out[idx[plan | deep]] = True
    return out


def slope_ground(x: np.ndarray, y: np.ndarray, z: np.ndarray, classification: np.ndarray,
                 ignore: np.ndarray, params: SlopeGroundParams = SlopeGroundParams(),
                 neighbours: "PlanTable | None" = None) -> tuple[np.ndarray, np.ndarray]:
    """Classify a stockyard cloud (see the module docstring).

    Parameters
    ----------
    x, y, z : ndarray
    classification : ndarray of uint8
        Current classes; ignored points keep theirs except 7 -> 18 above the envelope.
    ignore : ndarray of bool
        Points that are neither seeds nor classified (typically noise, class 7).
    params : SlopeGroundParams
    neighbours : PlanTable, optional
        :func:`plan_table` of the same x and y, when an earlier stage made it.

    Returns
    -------
    classes : ndarray of uint8
        New classification for every point.
    height : ndarray of float
        Height above the slope-limited envelope (NaN where it could not be computed).
    """
    # Neighbour queries run faster on points that are near in memory when they are near in
    # space; the stage works in that order and answers in the caller's.
    if neighbours is None:
        neighbours = plan_table(x, y)
    order = neighbours.order
    cls, height = _slope_ground(x[order], y[order], z[order], classification[order], ignore[order], params,
                                neighbours.plan)
    out_cls = np.empty_like(cls)
    out_h = np.empty_like(height)
    out_cls[order] = cls
    out_h[order] = height
    return out_cls, out_h


#: Surface points around a noise point that :func:`_within_surface_cone` fits its plane to.
RESCUE_NEIGHBOURS = 8
#: Rounds of :func:`_within_surface_cone` at most, each judging the rest with the points
#: rescued before it among the surface: where most of a flank's returns were taken for
#: noise (0.36 returns per m2) each round climbs about one point spacing up it from the
#: toe; the rounds stop as soon as one rescues nothing (one or two on a dense survey).
RESCUE_ROUNDS = 16
#: How far above its neighbours' plane (times their mean distance in plan) a rescued point
#: may lie: a convex flank's bulge over its chords.
RESCUE_BULGE = 0.1


def _within_surface_cone(x: np.ndarray, y: np.ndarray, z: np.ndarray, top: np.ndarray,
                         query: np.ndarray, params: SlopeGroundParams, index: "CellIndex | None" = None
                         ) -> np.ndarray:
    """Which noise points ``query``, lying under the envelope of the rest, are surface all
    the same: the surface around them continues through them.

    Of the :data:`RESCUE_NEIGHBOURS` nearest surface points in plan (the points
    ``top``), the nearest lies within
    :data:`ISOLATION_M`, none stands higher or lower than the point by more than a slope
    of ``max_slope_deg`` climbs over the distance between them, plus ``tolerance`` (the
    point would lower the envelope only where the rule lets a surface go, and it lies on
    the envelope of those neighbours), and the point lies under their least-squares
    plane by no more than ``tolerance`` and twice their own scatter about it, nor above
    it by more than that and :data:`RESCUE_BULGE` times their mean distance (a cone's
    flank curves over its chords; a return well above the surface around it is something
    standing on it, as a loader's return 0.7 m over the pad at a reclaim face was).

    Such a point is the lowest return of a flank too sparsely sampled to hold another
    point below it within the steeper cone: a 35 degree flank scanned from the air at
    under one return per m2, whose lowest return in a 2 m cell ``filters.elm`` takes for
    low noise (the next one up lies more than its 1 m threshold higher). A point on a
    flank lies under the envelope of the others, the deeper the sparser the points. A
    multipath return or a pit under the surface lies under the slope cone of the surface
    above it, or under the plane of the surface around it (a shadow's rim), and stays
    noise.

    ``index``: a cell index of all the points (x, y), cut here to ``top`` without sorting
    again (else an index of ``top`` is built). Neighbours at equal distances are taken in
    the order of their point numbers.
    """
    k = RESCUE_NEIGHBOURS
    out = np.zeros(len(query), bool)
    if len(top) < k or not len(query):
        return out
    qx, qy, qz = x[query], y[query], z[query]
    qxc, qyc = np.ascontiguousarray(qx, dtype=np.float64), np.ascontiguousarray(qy, dtype=np.float64)
    if index is not None and index.n == len(x):
        member = np.zeros(len(x), bool)
        member[top] = True
        xt, yt, zt = x, y, z      # the neighbours' numbers are the points' own
        nb = plan_knn(index.subset(member), qxc, qyc, k, dist=False)
    else:
        # in the order of the point numbers, so that ties fall as with an index of all
        top = np.sort(top)
        xt, yt, zt = (np.ascontiguousarray(v[top], dtype=np.float64) for v in (x, y, z))
        nb = plan_knn(CellIndex(xt, yt, k=k), qxc, qyc, k, dist=False)
    ok = (nb >= 0).all(axis=1)
    nb = np.where(nb >= 0, nb, 0)
    dx, dy, dz = xt[nb] - qx[:, None], yt[nb] - qy[:, None], zt[nb] - qz[:, None]
    t = math.tan(math.radians(params.max_slope_deg))
    dist = np.hypot(dx, dy)
    ok &= (np.abs(dz) <= t * dist + params.tolerance).all(axis=1)
    ok &= dist.min(axis=1) <= ISOLATION_M
    # the neighbours' plane at the point: least squares in coordinates centred on it
    a = np.stack([np.ones_like(dx), dx, dy], axis=2)
    ata = np.einsum("nki,nkj->nij", a, a)
    atb = np.einsum("nki,nk->ni", a, dz)
    well = ok & (np.abs(np.linalg.det(ata)) > 1e-9)
    coef = np.zeros((len(query), 3))
    if well.any():
        coef[well] = np.linalg.solve(ata[well], atb[well][:, :, None])[:, :, 0]
    # the neighbours' own scatter about their plane (a curved flank's, its noise)
    spread = np.sqrt(np.sum((dz - np.einsum("nki,ni->nk", a, coef)) ** 2, axis=1) / (k - 3))
    # above the plane by no more than a flank's curvature over the chords between its
    # neighbours (a tenth of their mean distance, a cone of 2 m radius and more) allows: a
    # return well above the surface around it is something standing on it
    lift = params.tolerance + 2.0 * spread + RESCUE_BULGE * dist.mean(axis=1)
    out[well] = (coef[well, 0] <= params.tolerance + 2.0 * spread[well]) & (coef[well, 0] >= -lift[well])
    return out


def _slope_ground(x: np.ndarray, y: np.ndarray, z: np.ndarray, classification: np.ndarray,
                  ignore: np.ndarray, params: SlopeGroundParams, plan: "_PlanNeighbours"
                  ) -> tuple[np.ndarray, np.ndarray]:
    """:func:`slope_ground` on points in :func:`~inventory.survey.clean.spatial_order`, with
    their neighbours in plan."""
    out = classification.astype(np.uint8).copy()
    # Points below the slope cone of most of their neighbours cannot be surface (nothing
    # that gravity built is that steep underneath); they join the ignored noise and are
    # judged again below against the envelope of the rest.
    # One plan-view neighbour query (``plan``) serves the three subsets that need one.
    near: dict = {}
    low = _below_neighbours(x, y, z, ~ignore, params, plan, near)
    out[low] = LOW_NOISE
    # A return with no other return within ISOLATION_M is nobody's surface (range
    # ambiguity ghosts, birds far out); alone it would be its own envelope.
    alone = _isolated(x, y, z, ~ignore & ~low, near or None, plan.index)
    out[alone] = HIGH_NOISE
    classification = out.copy()
    ignore = ignore | low | alone
    use = ~ignore
    height = np.full(len(z), np.nan)
    if not use.any():
        return out, height
    # the 17 nearest of the points left, from those of the points before (a superset)
    knn_use = plan.within(use, 17, earlier=(near["use"], near["table"]) if "table" in near else None)
    near.clear()    # its table of neighbours (4 bytes x 17 a point) is not needed again
    xu, yu, zu = x[use], y[use], z[use]
    envelope = _EnvelopeGrid(xu, yu, zu, params)   # built once: points and noise query it
    e_local = _local_envelope(xu, yu, zu, params, knn=(knn_use, np.arange(len(zu))))
    del knn_use
    e = np.minimum(envelope.at(xu, yu), e_local)
    walled, e_walled, in_wall = _behind_walls(xu, yu, zu, zu - e, e_local, envelope, params)
    e[walled] = e_walled
    height[use] = zu - e
    behind = np.zeros(len(z), bool)
    behind[np.flatnonzero(use)[walled]] = True
    walls = np.zeros(len(z), bool)
    walls[np.flatnonzero(use)[in_wall]] = True
    # Noise points are judged against the envelope of the rest: those on it are surface
    # after all and take part in the region rules below.
    noise = ignore & (classification == LOW_NOISE)
    rescued = np.zeros(len(z), bool)
    under = np.zeros(0, np.int64)
    if noise.any():
        en = envelope.at(x[noise], y[noise])
        hn = z[noise] - en
        height[noise] = np.where(np.isfinite(hn), hn, np.nan)
        high = np.isfinite(hn) & (hn > params.tolerance)
        sub = out[noise]
        sub[high] = HIGH_NOISE
        out[noise] = sub
        rescued[np.flatnonzero(noise)[np.isfinite(hn) & (np.abs(hn) <= params.tolerance)]] = True
        # deeper under the envelope: judged after the region rules (below)
        under = np.flatnonzero(noise)[np.isfinite(hn) & (hn < -params.tolerance)]
    judged = use | rescued
    xs, ys, zs, hs = x[judged], y[judged], z[judged], height[judged]
    ground = (hs <= params.tolerance) | rescued[judged] | behind[judged]
    ground &= ~_walled_tops(xs, ys, zs, ground, params)
    if params.face_slope_deg > params.max_slope_deg:
        rows = judged.copy()
        rows[judged] = ~ground
        ground |= _attached_faces(xs, ys, zs, ground, params, knn=plan.within(judged, 17, rows))
    spikes = _spikes(xs, ys, zs, ground, params)
    if behind.any():
        # a point held up by a wall is judged without the surface behind that wall
        spikes &= ~(behind[judged] & ~_spikes(xs, ys, zs, ground, params, walls=walls[judged]))
    ground &= ~spikes
    over = _overhead(xs, ys, zs, hs, params.cell * 2, params.overhead_gap)
    cls = np.where(ground, GROUND, np.where(over, OVERHEAD_STRUCTURE, UNCLASSIFIED)).astype(np.uint8)
    # rescued points are surface or, if a region rule took them out, stay noise
    cls[rescued[judged] & ~ground] = LOW_NOISE
    out[judged] = cls
    # Noise points deeper under the envelope are surface where the surface the region
    # rules left continues through them (they lie under it: no object's top), judged
    # again with those rescued among the surface (a sparse flank whose lowest returns
    # were taken for noise wholesale) while any is; after the region rules, so that they
    # change none of those rules' islands and patches.
    top = np.flatnonzero(out == GROUND)
    for _ in range(RESCUE_ROUNDS):
        if not len(under):
            break
        ok = _within_surface_cone(x, y, z, top, under, params, plan.index)
        if not ok.any():
            break
        out[under[ok]] = GROUND
        top = np.concatenate([top, under[ok]])
        under = under[~ok]
    out[_outvoted(z, out, plan, params)] = UNCLASSIFIED
    out[_face_feet(x, y, z, out, plan, params)] = UNCLASSIFIED
    return out, height


#: Classes of the objects' returns in :func:`_outvoted`.
_OBJECTS = np.zeros(256, np.bool_)
_OBJECTS[[UNCLASSIFIED, OVERHEAD_STRUCTURE]] = True
#: An outvoted surface point has at least this many objects' returns at its height among its
#: 16 nearest in plan ...
OUTVOTED_LEAST = 4
#: ... and this many times one more than surface points there.
OUTVOTED_RATIO = 2.0


def _outvoted(z: np.ndarray, cls: np.ndarray, plan: "_PlanNeighbours", params: SlopeGroundParams) -> np.ndarray:
    """Surface points whose neighbours at their own height are mostly objects' returns.

    Of a point's 16 nearest in plan, those within ``tolerance`` of its height lie on the
    same surface as it. Where at least :data:`OUTVOTED_LEAST` of them are objects' returns
    (other, overhead) and they outnumber the surface points among them by
    :data:`OUTVOTED_RATIO` to one more, the point is an object's return too: a lone return
    on a wall's top or a machine's roof that the envelope let through (beside a pile heaped
    against a wall, the wall's top stands within the slope limit of the pile's edge), which
    alone would give its cell the object's height. A point on a pad or a pile has surface
    points around it at its height; one at an object's foot has the pad.
    """
    out = np.zeros(len(z), bool)
    if plan.nb is None:
        return out
    rows = np.flatnonzero(cls == GROUND)
    out[rows[outvoted(plan.nb, rows, z, cls, GROUND, _OBJECTS, params.tolerance, OUTVOTED_LEAST,
                      OUTVOTED_RATIO)]] = True
    return out


#: Plan distances (m) of :func:`_face_feet`: objects' returns over a point within the
#: first, surface below or above it within the second.
FACE_OVER_M = 0.5
FACE_AROUND_M = 1.0
#: Objects' returns over a point that make it a face's foot (:func:`_face_feet`) ...
FACE_OVER_LEAST = 2
#: ... and the most cells around it (within FACE_AROUND_M) with surface higher than it.
FACE_HIGHER_MOST = 2
#: Objects' returns over a point at most this far (m, mean plan offset) are its own face's.
FACE_PLANE_M = 0.1


def _face_feet(x: np.ndarray, y: np.ndarray, z: np.ndarray, cls: np.ndarray, plan: "_PlanNeighbours",
               params: SlopeGroundParams) -> np.ndarray:
    """Surface points on the low part of an object's side, above the ground in front of it.

    Among a surface point's 16 nearest in plan, at least :data:`FACE_OVER_LEAST` objects'
    returns (1, 19) within :data:`FACE_OVER_M` rise over it (more than ``tolerance`` and
    less than ``overhead_gap`` higher: a face going up from it, not a boom high above);
    on cells of ``cell`` within :data:`FACE_AROUND_M` of its cell, surface lies lower than
    it by more than ``tolerance`` on the side away from those returns (the pad in front of
    the side, not the pad behind a wall that a pile leans on; any side when they stand
    within :data:`FACE_PLANE_M` of it, on its own plane), or no surface at all lies
    straight away from them (within 60 degrees of the way away; surface points with such
    returns over them, the same face's other feet, do not count: the pad in front was not
    returned, too grazing from a far station or hidden); and at most
    :data:`FACE_HIGHER_MOST` cells hold surface higher than it (other lowest returns of the
    same vehicle's sides, not a flank). Such a point is the lowest return of a vehicle's
    side or a chassis edge over ground hidden under it: the pad in front is lower or
    unseen, the object rises over it, and no surface continues upward from it. The slope
    envelope lets it through when the pad in front is farther than its height over
    ``tan(max_slope)``. A pile's toe has its flank rising beside it, a pad point at a
    wall's foot has the pad in front of it at its own height (where nothing was returned
    in front of it, it leaves the surface class: a point of pad lost, no object's height
    given to the grid), a crest under a stacker boom has the boom more than
    ``overhead_gap`` above it.
    """
    out = np.zeros(len(z), bool)
    nb = plan.nb
    if nb is None:
        return out
    ground = cls == GROUND
    rows = np.flatnonzero(ground)
    if not len(rows) or not _OBJECTS[cls].any():
        return out
    tol = params.tolerance
    # objects' returns over each point, and the way to them (their mean plan offset)
    n_over, fx, fy = faces_over(nb, rows, x, y, z, cls, _OBJECTS, FACE_OVER_M, tol, params.overhead_gap)
    faced = n_over >= FACE_OVER_LEAST
    rows, fx, fy = rows[faced], fx[faced], fy[faced]
    if not len(rows):
        return out
    # the surface around, on cells of ``cell`` (a face's own returns fill a point's nearest
    # in plan, so the pad in front is looked for on a grid): the lowest and highest surface
    # within FACE_AROUND_M, and where surface with no face over it lies (not the returns of
    # the object's own feet)
    row, col, shape = _region_cells(x, y, params.cell)
    k = row * shape[1] + col
    zf = np.ascontiguousarray(z, dtype=np.float64)
    _, _, lo, hi = cell_stats(k, zf, ground, shape[0] * shape[1])
    plain = ground.copy()
    plain[rows] = False
    cnt, _, _, _ = cell_stats(k, zf, plain, shape[0] * shape[1])
    reach = int(math.ceil(FACE_AROUND_M / params.cell))
    zr = z[rows]
    # around the point: the lower surface must lie away from the face (the pad in front of
    # a vehicle's side, not the pad behind a wall the point's pile leans on), or nothing
    # be scanned straight away from it (the pad in front hidden or out of the scanners'
    # reach: the point ends the scan there, under an object); cells holding surface higher
    # than the point: a flank rising beside it fills many, other lowest returns of the same
    # vehicle's sides a few
    lo2 = np.pad(lo.reshape(shape), reach, constant_values=np.inf)
    hi2 = np.pad(hi.reshape(shape), reach, constant_values=-np.inf)
    has2 = np.pad(cnt.reshape(shape) > 0, reach, constant_values=False)
    offs = np.arange(2 * reach + 1)
    vx, vy = (offs[None, :] - reach)[None] * 1.0, (offs[:, None] - reach)[None] * 1.0
    vn = np.hypot(vx, vy)
    ring = (vn * params.cell <= FACE_AROUND_M) & (vn > 0)
    feet = np.zeros(len(rows), bool)
    for a in range(0, len(rows), 4096):
        b = slice(a, a + 4096)
        r, c = row[rows[b]], col[rows[b]]
        win = (r[:, None, None] + offs[:, None], c[:, None, None] + offs[None, :])
        zb = zr[b, None, None]
        fn = np.hypot(fx[b], fy[b])[:, None, None]
        dot = vx * fx[b, None, None] + vy * fy[b, None, None]
        # a face right over the point (its side's own plane) has no way to it: any side
        # will do; straight away: within 60 degrees of the way away from the face
        plane = fn < FACE_PLANE_M
        away = (dot < 0.25 * vn * fn) | plane
        straight = ((dot < -0.5 * vn * fn) | plane) & ring
        lower_away = ((lo2[win] < zb - tol) & away).any(axis=(1, 2))
        bare = ~(has2[win] & straight).any(axis=(1, 2))
        higher = (hi2[win] > zb + tol).sum(axis=(1, 2))
        feet[b] = (lower_away | bare) & (higher <= FACE_HIGHER_MOST)
    out[rows[feet]] = True
    return out


@contextlib.contextmanager
def _quiet_stdout():
    # The CSF library prints its progress with C++ iostreams on file descriptor 1.
    try:
        fd = sys.stdout.fileno()
    except (AttributeError, OSError, ValueError):
        yield
        return
    sys.stdout.flush()
    saved = os.dup(fd)
    try:
        with open(os.devnull, "w") as devnull:
            os.dup2(devnull.fileno(), fd)
            yield
    finally:
        os.dup2(saved, fd)
        os.close(saved)


def csf_ground(xyz: np.ndarray, *, resolution: float = 1.0, rigidness: int = 3, step: float = 0.65,
               threshold: float = 0.5, smooth: bool = True, iterations: int = 500) -> np.ndarray:
    """Ground mask by the Cloth Simulation Filter (Zhang et al. 2016, Remote Sensing 8:501).

    Option names and defaults are PDAL ``filters.csf``'s (``resolution`` = cloth_resolution,
    ``step`` = time_step, ``threshold`` = class_threshold, ``smooth`` = bSloopSmooth).
    """
    try:
        import CSF  # the cloth-simulation-filter package
    except ImportError as err:  # pragma: no cover - a declared dependency
        raise PipelineError("filters.csf needs the 'cloth-simulation-filter' package") from err
    if len(xyz) == 0:
        return np.zeros(0, bool)
    if rigidness not in (1, 2, 3):
        raise PipelineError(f"filters.csf rigidness must be 1, 2 or 3, got {rigidness}")
    csf = CSF.CSF()
    csf.params.bSloopSmooth = bool(smooth)
    csf.params.cloth_resolution = float(resolution)
    csf.params.rigidness = int(rigidness)
    csf.params.time_step = float(step)
    csf.params.class_threshold = float(threshold)
    csf.params.interations = int(iterations)
    # CSF works in single precision internally; centre the cloud to keep millimetres.
    centre = xyz.min(axis=0)
    csf.setPointCloud(np.ascontiguousarray(xyz - centre, dtype=np.float64))
    ground, other = CSF.VecInt(), CSF.VecInt()
    with _quiet_stdout():
        csf.do_filtering(ground, other, False)
    mask = np.zeros(len(xyz), bool)
    mask[np.asarray(ground, dtype=np.int64)] = True
    return mask
