"""The surface grid of a survey: points -> per-cell statistic, coverage, hole filling.

:class:`SurfaceAccumulator` grids points chunk by chunk (memory is the grid, not the cloud)
and takes out surface cells lying on an object (:func:`object_cells`); :func:`fill_holes`
fills unscanned cells by linear interpolation up to ``max_fill_distance_m``, seeded by every
scanned cell but lone patches (:func:`~inventory.model.grid.lone_patches`).

Gridding and hole filling: docs/surveys.md; the object and lone-patch rules:
docs/classifier.md.

The surface and coverage GeoTIFFs are written by :mod:`inventory.io.rasters`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from inventory.errors import RunError
from inventory.model.grid import LONE_PATCH_CELLS, Grid, Surface, lone_patches

__all__ = [
    "STATISTICS",
    "SurfaceAccumulator",
    "FillReport",
    "fill_holes",
    "enclosed_gaps",
    "fill_corners",
    "lattice_rim",
    "object_cells",
    "grid_points",
]

#: Cell statistics of surface points (site.toml ``[grid] statistic``).
STATISTICS = ("mean", "median", "max")
#: Surface points of a cell count as lying on an object when an object return of the same
#: cell is lower than this above them (metres; :meth:`SurfaceAccumulator.object_cells`).
#: Half a metre: the height of one 0.5 m cell of a 45 deg slope, so a pile point left
#: unclassified beside surface points of the same cell also empties it (a filled cell
#: then), while a gallery or a boom metres above the ground does not.
OBJECT_CLEARANCE_M = 0.5
#: Largest patch of surface cells taken as the top of an object: a road vehicle's plan
#: area, 2.55 m x 16.5 m (EU Directive 96/53/EC maximum width and articulated length).
OBJECT_TOP_MAX_M2 = 2.55 * 16.5
#: How far around a patch of surface cells (metres in plan, at least one cell) the object
#: returns below it are looked for when judging whether it is an object's top: a machine's
#: cab or roof stands back from, or overhangs, the sides of the body under it by up to about
#: a metre (the cab of a wheel loader or a truck is narrower than its body; common
#: practice), so the returns of its sides may lie a cell or two beside the roof's cells.
OBJECT_SIDE_REACH_M = 1.0


def _side_reach_cells(cell_area_m2: float) -> int:
    """:data:`OBJECT_SIDE_REACH_M` in whole cells of a grid, at least one."""
    return max(1, int(math.ceil(OBJECT_SIDE_REACH_M / math.sqrt(cell_area_m2) - 1e-9)))



class SurfaceAccumulator:
    """Per-cell statistic, count and spread of points on a grid, fed chunk by chunk.

    Examples
    --------
    >>> g = Grid(0.0, 2.0, 1.0, 2, 2, "EPSG:32633")
    >>> acc = SurfaceAccumulator(g)
    >>> acc.add(np.array([0.5, 0.5, 1.5]), np.array([1.5, 1.5, 0.5]), np.array([1.0, 3.0, 5.0]))
    3
    >>> s = acc.result()
    >>> s.z.tolist(), s.count.tolist()
    ([[2.0, nan], [nan, 5.0]], [[2, 0], [0, 1]])
    """

    def __init__(self, grid: Grid, statistic: str = "mean") -> None:
        if statistic not in STATISTICS:
            raise ValueError(f"statistic must be one of {STATISTICS}, got {statistic!r}")
        self.grid = grid
        self.statistic = statistic
        n = grid.nrows * grid.ncols
        self._n = np.zeros(n, np.int64)
        self._s1 = np.zeros(n)          # sum of (z - z0)
        self._s2 = np.zeros(n)          # sum of (z - z0)^2
        self._stat = np.full(n, np.nan) # max or median (mean comes from the sums)
        self._top = np.full(n, -np.inf) # highest surface point of each cell
        self._bottom = np.full(n, np.inf)  # lowest surface point of each cell
        self._low_object = np.full(n, np.inf)  # lowest object return of each cell (add_objects)
        self._z0: float | None = None   # reference height; keeps the sums well conditioned
        self.outside = 0

    def add(self, x: np.ndarray, y: np.ndarray, z: np.ndarray) -> int:
        """Add points; returns how many fell inside the grid."""
        x, y, z = (np.asarray(a, float) for a in (x, y, z))
        row, col, inside = self.grid.index(x, y)
        self.outside += int((~inside).sum())
        if not inside.any():
            return 0
        k = (row * self.grid.ncols + col)[inside]
        z = z[inside]
        if self._z0 is None:
            self._z0 = float(np.mean(z))
        dz = z - self._z0
        size = self._n.size
        if self.statistic == "median":
            cells = np.unique(k)
            if (self._n[cells] > 0).any():
                raise RunError("median gridding needs all points of a cell in one call; "
                               "a cell was fed twice (tiles must end on cell edges)")
            order = np.lexsort((z, k))
            ks, zs = k[order], z[order]
            starts = np.flatnonzero(np.r_[True, ks[1:] != ks[:-1]])
            counts = np.diff(np.r_[starts, len(ks)])
            lo = zs[starts + (counts - 1) // 2]
            hi = zs[starts + counts // 2]
            self._stat[ks[starts]] = 0.5 * (lo + hi)
        elif self.statistic == "max":
            cur = np.where(np.isnan(self._stat), -np.inf, self._stat)
            np.maximum.at(cur, k, z)
            self._stat = np.where(np.isinf(cur), np.nan, cur)
        self._n += np.bincount(k, minlength=size)
        self._s1 += np.bincount(k, dz, minlength=size)
        self._s2 += np.bincount(k, dz * dz, minlength=size)
        np.maximum.at(self._top, k, z)
        np.minimum.at(self._bottom, k, z)
        return int(inside.sum())

    def add_objects(self, x: np.ndarray, y: np.ndarray, z: np.ndarray) -> int:
        """Add returns of objects (not surface, not noise: ASPRS 1 unclassified, 19 overhead
        structure, ...), chunk by chunk, in any order with :meth:`add`.

        Only the lowest object return of each cell is kept. A cell whose surface points are
        not clear of it is taken as covered by an object (see :meth:`result`). Returns how
        many fell inside the grid.
        """
        x, y, z = (np.asarray(a, float) for a in (x, y, z))
        row, col, inside = self.grid.index(x, y)
        if inside.any():
            np.minimum.at(self._low_object, (row * self.grid.ncols + col)[inside], z[inside])
        return int(inside.sum())

    def object_cells(self) -> np.ndarray:
        """Cells whose surface points lie on an object (:func:`object_cells` of what was
        fed); all False when no object return was added."""
        shape = self.grid.shape
        return object_cells(self._n.reshape(shape) > 0, self._top.reshape(shape), self._bottom.reshape(shape),
                            self._low_object.reshape(shape), self.grid.cell_area)

    def extremes(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Per cell (nrows, ncols): highest and lowest surface point, lowest object return
        (-inf / +inf / +inf where none), for :func:`object_cells` over several grids."""
        shape = self.grid.shape
        return self._top.reshape(shape), self._bottom.reshape(shape), self._low_object.reshape(shape)

    def result(self, date: str = "") -> Surface:
        """The surface so far (no hole filling).

        Cells covered by an object (:meth:`object_cells`; only when :meth:`add_objects` was
        fed) are left empty: count 0, no elevation, so hole filling treats them as
        unscanned. ``meta["object_cells"]`` says how many.
        """
        return self._result(date, self.object_cells().ravel())

    def result_without_objects(self, date: str = "") -> Surface:
        """:meth:`result` with no cell taken out for objects (the caller applies
        :func:`object_cells` itself, e.g. over the whole survey when it grids tile by tile)."""
        return self._result(date, np.zeros(self._n.size, bool))

    def _result(self, date: str, covered: np.ndarray) -> Surface:
        n = np.where(covered, 0, self._n)
        z0 = self._z0 or 0.0
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = self._s1 / n
            m = mean + z0 if self.statistic == "mean" else self._stat
            dm = m - z0
            # spread about the cell statistic: E[(z - m)^2] = E[dz^2] - 2 dm E[dz] + dm^2
            var = self._s2 / n - 2 * dm * mean + dm * dm
            sd = np.where(n >= 2, np.sqrt(np.maximum(var, 0.0)), np.nan)
        z = np.where(n > 0, m, np.nan)
        shape = self.grid.shape
        return Surface(self.grid, z.reshape(shape), n.astype(np.int32).reshape(shape), sd.reshape(shape),
                       np.zeros(shape, bool), date,
                       {"statistic": self.statistic, "object_cells": int(covered.sum())})


def object_cells(has: np.ndarray, top: "np.ndarray | None", bottom: np.ndarray, low_object: np.ndarray,
                 cell_area_m2: float, band_rows: int = 1024, near_object: "np.ndarray | None" = None
                 ) -> np.ndarray:
    """Cells whose surface points lie on an object, by the object returns around them.

    A laser return cannot come from below an opaque ground surface. So:

    * a cell with an object return lower than, or less than :data:`OBJECT_CLEARANCE_M`
      above, its highest surface point holds "surface" points on the object (single
      returns on a wall top, a vehicle roof) or right at its foot, where the
      classifier's split is least reliable;
    * a patch of scanned cells cut off from the rest of the surface (8-neighbours,
      once the cells of the first rule are taken out), of at most :data:`OBJECT_TOP_MAX_M2`,
      with object returns within :data:`OBJECT_SIDE_REACH_M` around it (in whole cells, at
      least one) more than :data:`OBJECT_CLEARANCE_M` below its lowest surface point, is
      the top of the object those returns come from (the roof of a loader whose sides were
      scanned down to the ground; its cab may stand back from the body's sides);
    * a lone patch (at most :data:`~inventory.model.grid.LONE_PATCH_CELLS` cells, touching
      no other surface cell once the cells of the first rule are taken out) with an object
      return within that reach lower than :data:`OBJECT_CLEARANCE_M` above its lowest
      surface point is a piece of that object (a return on a gallery's underside whose
      neighbours at the same height were called object, with no ground seen below it).

    Overhead structure well above the ground (a gallery, a stacker boom) leaves the
    cells under it alone.

    Parameters
    ----------
    has : bool array
        Cells with surface points.
    top, bottom : float arrays
        Highest and lowest surface point of each cell (``top`` may be None when
        ``near_object`` is given).
    low_object : float array
        Lowest object return of each cell (+inf where none).
    cell_area_m2 : float
    band_rows : int
        The grid is judged in bands of this many rows, each with a margin of rows around
        it wider than any patch of :data:`OBJECT_TOP_MAX_M2` and its ring can reach (a patch
        of n cells spans at most n rows), so that the temporary arrays are those of one band,
        not of the whole grid. A patch that meets both the band and the edge of its margin
        has more cells in the band than a top may have, so it is judged large, as on the
        whole grid: the answer is the one of the whole grid at once.
    near_object : bool array, optional
        ``low_object < top + OBJECT_CLEARANCE_M`` worked out beforehand (piece by piece, so
        that the whole grid of ``top`` need not be held).

    Returns
    -------
    bool array, the shape of ``has``.
    """
    nrow = has.shape[0]
    # rows a small patch and its ring span
    reach = int(OBJECT_TOP_MAX_M2 // cell_area_m2) + 1 + _side_reach_cells(cell_area_m2)
    if near_object is None:
        with np.errstate(invalid="ignore"):
            near_object = low_object < top + OBJECT_CLEARANCE_M
    if nrow <= band_rows + 2 * reach:
        return _object_cells(has, near_object, bottom, low_object, cell_area_m2)
    out = np.zeros(has.shape, bool)
    for r0 in range(0, nrow, band_rows):
        r1 = min(r0 + band_rows, nrow)
        a, b = max(r0 - reach, 0), min(r1 + reach, nrow)
        part = _object_cells(has[a:b], near_object[a:b], bottom[a:b], low_object[a:b], cell_area_m2)
        out[r0:r1] = part[r0 - a:r1 - a]
    return out


def _object_cells(has: np.ndarray, near_object: np.ndarray, bottom: np.ndarray, low_object: np.ndarray,
                  cell_area_m2: float) -> np.ndarray:
    """:func:`object_cells` of one band of rows (or of the whole grid)."""
    from scipy import ndimage

    covered = has & near_object
    if not np.isfinite(low_object).any():
        return covered
    labels, n = ndimage.label(has & ~covered, structure=np.ones((3, 3), bool))
    if n == 0:
        return covered
    ids = np.arange(1, n + 1)
    sizes = np.bincount(labels.ravel(), minlength=n + 1)[1:]
    small = ids[sizes * cell_area_m2 <= OBJECT_TOP_MAX_M2]
    if small.size:
        side = 2 * _side_reach_cells(cell_area_m2) + 1
        around = ndimage.minimum_filter(low_object, size=side, mode="constant", cval=np.inf)
        lowest = ndimage.minimum(bottom, labels, small)
        below = ndimage.minimum(around, labels, small)
        lowest, below = np.asarray(lowest), np.asarray(below)
        # a lone patch among object returns at its own level is a piece of that object
        lone = sizes[small - 1] <= LONE_PATCH_CELLS
        on_top = small[(below < lowest - OBJECT_CLEARANCE_M) | (lone & (below < lowest + OBJECT_CLEARANCE_M))]
        if on_top.size:
            covered |= np.isin(labels, on_top)
    return covered


def grid_points(grid: Grid, x: np.ndarray, y: np.ndarray, z: np.ndarray, statistic: str = "mean",
                date: str = "") -> Surface:
    """Grid one array of points (convenience over :class:`SurfaceAccumulator`)."""
    acc = SurfaceAccumulator(grid, statistic)
    acc.add(x, y, z)
    return acc.result(date)


@dataclass(frozen=True)
class FillReport:
    """What hole filling did: cells filled, and enclosed gaps left as nodata."""

    filled_cells: int
    gap_cells: int
    gap_area_m2: float
    largest_gap_m2: float

    def __str__(self) -> str:
        return (f"{self.filled_cells} cells filled, {self.gap_cells} cells "
                f"({self.gap_area_m2:.1f} m2) of enclosed gaps left empty")





def fill_holes(surface: Surface, max_distance_m: float) -> tuple[Surface, FillReport]:
    """Fill unscanned cells whose nearest scanned cell is at most ``max_distance_m`` away.

    Linear interpolation over the Delaunay triangulation of scanned cell centres (scipy
    ``griddata``; only the scanned cells that can be corners of a triangle holding a hole's
    cell are triangulated, which holds the same triangles: :func:`fill_corners`); cells
    outside that triangulation are not extrapolated. Lone patches of scanned cells
    (:func:`lone_patches`) keep their own elevation but are neither corners of the
    triangulation nor count as data for the distance: a gap's value comes from its rim.
    Gaps that stay empty and are enclosed by data (not connected to the grid edge) are
    reported.
    """
    from scipy import ndimage

    g = surface.grid
    scanned = np.isfinite(surface.z) & (surface.count > 0)
    seeds = scanned & ~lone_patches(scanned)
    z = surface.z.copy()
    filled = np.zeros(g.shape, bool)
    if seeds.any() and (~scanned).any() and max_distance_m > 0:
        dist = ndimage.distance_transform_edt(~seeds) * g.cell
        target = ~scanned & (dist <= max_distance_m + 1e-9)
        if target.any():
            # scanned cells near a target are all the triangulation needs
            reach = int(math.ceil(max_distance_m / g.cell)) + 2
            near = ndimage.binary_dilation(target, iterations=reach) & seeds
            if near.sum() >= 3:
                try:
                    zt = _linear_on_lattice(fill_corners(seeds, near), target, surface.z)
                except Exception:  # QhullError, ValueError: the corners on one line, or fewer than 3
                    zt = np.full(int(target.sum()), np.nan)
                ok = np.isfinite(zt)
                idx = np.flatnonzero(target.ravel())[ok]
                z.ravel()[idx] = zt[ok]
                filled.ravel()[idx] = True
    gap_cells, largest = enclosed_gaps(~scanned & ~filled)
    out = Surface(g, z, surface.count, surface.sd, filled, surface.date,
                  dict(surface.meta, max_fill_distance_m=max_distance_m))
    return out, FillReport(int(filled.sum()), gap_cells, gap_cells * g.cell_area, largest * g.cell_area)


#: Cells counted at a time by :func:`enclosed_gaps`.
_COUNT_PIECE = 1 << 22


def enclosed_gaps(empty: np.ndarray) -> tuple[int, int]:
    """Cells of the ``empty`` patches (4-connected) that do not touch the grid's edge, in all
    and in the largest such patch: the enclosed gaps of :class:`FillReport`."""
    from scipy import ndimage

    labels, n = ndimage.label(empty)
    if not n:
        return 0, 0
    edge = np.unique(np.r_[labels[0], labels[-1], labels[:, 0], labels[:, -1]])
    flat = labels.ravel()
    sizes = np.zeros(n + 1, np.int64)
    for a in range(0, len(flat), _COUNT_PIECE):   # bincount takes a 64-bit copy of what it counts
        sizes += np.bincount(flat[a:a + _COUNT_PIECE], minlength=n + 1)
    enclosed = np.setdiff1d(np.arange(1, n + 1), edge)
    if not enclosed.size:
        return 0, 0
    return int(sizes[enclosed].sum()), int(sizes[enclosed].max())


#: Triangles whose bounding box holds at most this many lattice points list them all.
_SMALL_TRIANGLE = 64


def lattice_rim(cells: np.ndarray) -> np.ndarray:
    """The ``cells`` with at least one of their 4 edge neighbours not among them or off the
    grid."""
    from scipy import ndimage

    return cells & ~ndimage.binary_erosion(cells, border_value=0)


def fill_corners(seeds: np.ndarray, near: np.ndarray) -> np.ndarray:
    """The cells of ``near`` that can be corners of a Delaunay triangle of ``near`` holding
    a target of :func:`fill_holes`: those on the rim of the seeds (:func:`lattice_rim`), a
    fraction of them. A triangulation of these holds the same triangles around the targets.

    Cells are points of the integer lattice; the targets are the unscanned cells within the
    fill distance (at least one cell) of a seed, and ``near`` the seeds within ``reach`` (at
    least one) steps of a target. Let T be a Delaunay triangle of ``near`` holding a target
    t (inside or on an edge, so strictly inside T's circumcircle). (1) The open circumdisc
    holds no seed: the grid's lattice points inside an open disc are joined by 4-neighbour
    paths inside it and the grid (its rows are intervals, nested towards its centre row),
    and on a path from t to a seed, the cell before the first seed is unscanned (a lone
    patch touches no seed) and one cell from a seed, hence a target, which puts that seed in
    ``near``, strictly inside the circumcircle. (2) T has circumradius R >= 1: four lattice
    points in a closed disc of radius < 1 are the corners of one unit square, and no three
    of them hold the fourth. (3) From a corner v, the unit step d within 45 degrees of the
    direction to the circumcentre c ends strictly inside the circle,
    |v+d-c|^2 - R^2 = 1 - 2 d.(c-v) <= 1 - sqrt(2) R < 0, so v+d is off the grid or no seed
    by (1): v is a rim cell of the seeds. T, empty of ``near``, is empty of this subset too
    and Delaunay there, and a target outside every triangle of ``near`` is outside the
    subset's hull too.

    What can differ is the choice among equally Delaunay triangles of cocircular cells (the
    lattice is full of them: the two diagonals of a one-cell hole between four scanned
    neighbours, the corners of a rectangular gap): Qhull makes it from every input point, so
    a target on such a tie may take the other triangle, as it may between fill windows
    (:func:`~inventory.survey.fill.fill_windows`).
    """
    return near & lattice_rim(seeds)


def _linear_on_lattice(cells: np.ndarray, target: np.ndarray, z: np.ndarray) -> np.ndarray:
    """Linear interpolation of ``z`` at the ``target`` cells over a Delaunay triangulation
    of the ``cells``, as ``scipy.interpolate.griddata(method="linear")``; targets outside
    every triangle get NaN, as from griddata (:func:`_lattice_triangle_at`)."""
    ncol = cells.shape[1]
    corners = _lattice_triangle_at(cells, target)
    out = np.full(len(corners), np.nan)
    ok = corners[:, 0] >= 0
    tr, tc = np.divmod(np.flatnonzero(target.ravel())[ok], ncol)
    vr, vc = np.divmod(corners[ok], ncol)
    px, py = tc.astype(float), -tr.astype(float)
    vx, vy = vc.astype(float), -vr.astype(float)
    a, b = vx[:, 0] - vx[:, 2], vx[:, 1] - vx[:, 2]
    c, d = vy[:, 0] - vy[:, 2], vy[:, 1] - vy[:, 2]
    det = a * d - b * c
    dx, dy = px - vx[:, 2], py - vy[:, 2]
    c0 = (d * dx - b * dy) / det
    c1 = (a * dy - c * dx) / det
    zv = z.ravel()[corners[ok]]
    out[ok] = c0 * zv[:, 0] + c1 * zv[:, 1] + (1.0 - c0 - c1) * zv[:, 2]
    return out


def _lattice_triangle_at(cells: np.ndarray, target: np.ndarray) -> np.ndarray:
    """The corners (flat cell indices, one row per ``target`` cell in row-major order;
    -1 where none) of the triangle of a Delaunay triangulation of the ``cells`` that holds
    each target.

    Cells are points of the integer lattice (column, -row). Triangulating there, not at
    projected coordinates of 10^5-10^6 m, matters: Qhull then loses no cell as
    "coplanar", as it does at site coordinates on a regular grid. Targets are located
    without scipy's walk, whose set-up inverts every triangle's matrix (slow; timings in
    CHANGELOG.md): each triangle lists the lattice points of its
    bounding box and keeps the targets inside it by exact integer orientation tests
    (edges included: the value on a shared edge is the same from both sides).
    """
    from scipy.spatial import Delaunay

    nrow, ncol = cells.shape
    flat = np.flatnonzero(cells.ravel())
    vr, vc = np.divmod(flat, ncol)
    tri = Delaunay(np.column_stack([vc, -vr]).astype(float))
    simp = tri.simplices
    u, v = vc[simp].astype(np.int64), -vr[simp].astype(np.int64)
    area2 = (u[:, 1] - u[:, 0]) * (v[:, 2] - v[:, 0]) - (v[:, 1] - v[:, 0]) * (u[:, 2] - u[:, 0])
    umin, umax, vmin, vmax = u.min(1), u.max(1), v.min(1), v.max(1)
    nbox = (umax - umin + 1) * (vmax - vmin + 1)
    found = np.full(cells.shape, -1, np.int64)

    def inside(t: np.ndarray, pu: np.ndarray, pv: np.ndarray) -> np.ndarray:
        sign = np.sign(area2[t])
        ok = sign != 0
        for a, b in ((0, 1), (1, 2), (2, 0)):
            ok &= ((u[t, b] - u[t, a]) * (pv - v[t, a]) - (v[t, b] - v[t, a]) * (pu - u[t, a])) * sign >= 0
        return ok

    # A triangle within a 2 x 2 box of cells holds no lattice point but its own corners,
    # which are scanned cells: most triangles, skipped.
    small = np.flatnonzero((nbox > 4) & (nbox <= _SMALL_TRIANGLE))
    if len(small):
        counts = nbox[small]
        t = np.repeat(small, counts)
        k = np.arange(int(counts.sum())) - np.repeat(np.cumsum(counts) - counts, counts)
        width = (umax - umin + 1)[t]
        pu, pv = umin[t] + k % width, vmin[t] + k // width
        keep = target[-pv, pu]
        t, pu, pv = t[keep], pu[keep], pv[keep]
        hit = inside(t, pu, pv)
        found[-pv[hit], pu[hit]] = t[hit]
    big = np.flatnonzero(nbox > _SMALL_TRIANGLE)
    rest = np.flatnonzero((found < 0).ravel() & target.ravel())
    if len(big) and len(rest):
        # each target left is tested against the large triangles whose bounding boxes
        # overlap its block of the lattice (compiled); on an edge shared by two of them
        # it takes the later one
        from inventory.survey.kernels import lattice_triangles

        rr, rc = np.divmod(rest, ncol)
        lattice_triangles(big, u, v, area2, umin, umax, vmin, vmax, rc.astype(np.int64), -rr.astype(np.int64),
                          found, 32)
    s = found[target]
    out = np.full((len(s), 3), -1, np.int64)
    out[s >= 0] = flat[simp[s[s >= 0]]]
    return out
