"""The site grid: one raster geometry that every survey, base and output shares.

Rows run north to south (row 0 is the northern edge), columns west to east, as in
GeoTIFF. The grid origin is snapped to a whole multiple of the cell size so that two
surveys of the same site line up cell for cell and can be differenced without resampling.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from affine import Affine

__all__ = ["Grid", "Surface"]


@dataclass(frozen=True)
class Grid:
    """A north-up grid of square cells.

    Parameters
    ----------
    west, north : float
        Coordinates of the outer corner of cell (0, 0), in site CRS units (metres).
    cell : float
        Cell edge length in metres.
    nrows, ncols : int
        Grid shape.
    crs : str
        The site CRS as given in site.toml (e.g. ``"EPSG:32633"``).

    Examples
    --------
    >>> g = Grid.snapped(1003.2, 2001.1, 1010.0, 2004.9, cell=0.5, crs="EPSG:32633")
    >>> (g.west, g.north, g.nrows, g.ncols)
    (1003.0, 2005.0, 8, 15)

    ``xmax`` = 1010.0 lies on a cell edge; cells hold their western edge, so a point there
    falls in column 14, the fifteenth:

    >>> g.index([1010.0], [2003.0])
    (array([4]), array([14]), array([ True]))
    """

    west: float
    north: float
    cell: float
    nrows: int
    ncols: int
    crs: str = ""

    @classmethod
    def snapped(
        cls, xmin: float, ymin: float, xmax: float, ymax: float, *, cell: float, crs: str = ""
    ) -> "Grid":
        """The smallest grid aligned on multiples of ``cell`` whose cells hold every point of the box.

        A cell holds its western and northern edges (:meth:`index`), so the grid reaches
        strictly east of ``xmax`` and strictly south of ``ymin``.
        """
        if not cell > 0:
            raise ValueError(f"cell size must be positive, got {cell}")
        west = math.floor(xmin / cell) * cell
        south = (math.ceil(ymin / cell) - 1) * cell
        east = (math.floor(xmax / cell) + 1) * cell
        north = (math.floor(ymax / cell) + 1) * cell
        ncols = int(round((east - west) / cell))
        nrows = int(round((north - south) / cell))
        return cls(float(west), float(north), float(cell), nrows, ncols, crs)

    @property
    def shape(self) -> tuple[int, int]:
        return (self.nrows, self.ncols)

    @property
    def east(self) -> float:
        return self.west + self.ncols * self.cell

    @property
    def south(self) -> float:
        return self.north - self.nrows * self.cell

    @property
    def bounds(self) -> tuple[float, float, float, float]:
        """(xmin, ymin, xmax, ymax)."""
        return (self.west, self.south, self.east, self.north)

    @property
    def cell_area(self) -> float:
        return self.cell * self.cell

    @property
    def transform(self) -> Affine:
        """The GeoTIFF affine transform (rasterio convention)."""
        return Affine(self.cell, 0.0, self.west, 0.0, -self.cell, self.north)

    def centers(self) -> tuple[np.ndarray, np.ndarray]:
        """Cell-centre coordinates as two (nrows, ncols) arrays ``(x, y)``."""
        return self.window_centers(slice(0, self.nrows), slice(0, self.ncols))

    def window_centers(self, rows: slice, cols: slice) -> tuple[np.ndarray, np.ndarray]:
        """Cell-centre coordinates of the cells ``rows, cols`` (slices with start and stop)
        as two arrays ``(x, y)`` of the window's shape."""
        xs = self.west + (np.arange(cols.start, cols.stop) + 0.5) * self.cell
        ys = self.north - (np.arange(rows.start, rows.stop) + 0.5) * self.cell
        return np.meshgrid(xs, ys)

    def index(self, x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Row and column of each point and a mask of points inside the grid."""
        col = np.floor((np.asarray(x) - self.west) / self.cell).astype(np.int64)
        row = np.floor((self.north - np.asarray(y)) / self.cell).astype(np.int64)
        inside = (row >= 0) & (row < self.nrows) & (col >= 0) & (col < self.ncols)
        return row, col, inside

    def window(self, xmin: float, ymin: float, xmax: float, ymax: float) -> tuple[slice, slice]:
        """Row and column slices of the cells that touch a box (clipped to the grid)."""
        c0 = max(int(math.floor((xmin - self.west) / self.cell)), 0)
        c1 = min(int(math.ceil((xmax - self.west) / self.cell)), self.ncols)
        r0 = max(int(math.floor((self.north - ymax) / self.cell)), 0)
        r1 = min(int(math.ceil((self.north - ymin) / self.cell)), self.nrows)
        return slice(r0, max(r1, r0)), slice(c0, max(c1, c0))

    def aligned_with(self, other: "Grid") -> bool:
        """True when both grids share cell size and their origins differ by whole cells."""
        if abs(self.cell - other.cell) > 1e-9:
            return False
        dx = (self.west - other.west) / self.cell
        dy = (self.north - other.north) / self.cell
        return abs(dx - round(dx)) < 1e-6 and abs(dy - round(dy)) < 1e-6


@dataclass
class Surface:
    """A gridded surface of one survey (the terrain with the piles on it).

    Attributes
    ----------
    grid : Grid
    z : ndarray of float64, (nrows, ncols)
        Surface elevation in metres; NaN where there is no data and nothing was filled.
    count : ndarray of int32
        Surface (ground-class) points that fell in each cell; 0 for unscanned cells.
    sd : ndarray of float64
        Standard deviation of the point elevations in each cell about the cell statistic
        (metres); NaN where fewer than two points.
    filled : ndarray of bool
        True where ``z`` was interpolated into an unscanned cell.
    date : str
        Survey date, ``YYYY-MM-DD``.
    """

    grid: Grid
    z: np.ndarray
    count: np.ndarray
    sd: np.ndarray
    filled: np.ndarray
    date: str = ""
    meta: dict = field(default_factory=dict)

    def __post_init__(self) -> None:
        for name in ("z", "count", "sd", "filled"):
            arr = getattr(self, name)
            if arr.shape != self.grid.shape:
                raise ValueError(f"Surface.{name} has shape {arr.shape}, grid is {self.grid.shape}")

    @property
    def scanned(self) -> np.ndarray:
        """Cells with at least one surface point."""
        return self.count > 0

#: Scanned patches of at most this many cells, touching no other scanned cell, are not
#: used to fill the gap around them (:func:`lone_patches`).
LONE_PATCH_CELLS = 3
#: ... unless more than this share of the scanned cells within :data:`LONE_WINDOW_CELLS`
#: of it (a square of 2 x 5 + 1 cells, 5.5 m at 0.5 m cells, in which the face and the
#: pad around a dust return in a shadow hold most of the scanned cells) are lone too: the
#: scan there is sparser than the grid, not a stray return on a scanned surface. Set on
#: planted piles scanned at 0.7 returns per m2 (tests/test_planted_more.py): 0.5 and 10
#: cells left the lower flanks, whose windows hold the densely scanned ground, 1-2 % short.
LONE_SPARSE_SHARE = 0.3
LONE_WINDOW_CELLS = 5


def lone_patches(scanned: np.ndarray, max_cells: int = LONE_PATCH_CELLS) -> np.ndarray:
    """Scanned cells in patches of at most ``max_cells`` cells that touch no other scanned
    cell (8-neighbours).

    A scanner sees real ground in scan lines: consecutive returns fall in neighbouring
    cells, so even sparse far ground forms long chains of cells. A patch of one to three
    cells alone in unscanned ground is a return the classifier let through (dust, a bird,
    the top of an object) as often as it is ground, and a triangulation through it lifts
    the filled cells around it (docs/classifier.md). Not where more than
    :data:`LONE_SPARSE_SHARE` of the scanned cells within :data:`LONE_WINDOW_CELLS` are
    lone: a survey sparser than the grid's cell (an airborne one at 0.7 returns per m2 on
    0.5 m cells) scans the surface itself in lone cells, and leaving them out filled
    planted piles from the ground around them, 4-9 % short.
    """
    from scipy import ndimage

    labels, n = ndimage.label(scanned, structure=np.ones((3, 3), bool))
    if n == 0:
        return np.zeros(scanned.shape, bool)
    sizes = np.bincount(labels.ravel(), minlength=n + 1)
    sizes[0] = max_cells + 1
    lone = sizes[labels] <= max_cells
    if not lone.any():
        return lone
    # Where the points lie farther apart than a cell (a sparse airborne survey on a fine
    # grid) the scan itself is patches of one cell: most scanned cells around are lone,
    # and they are the surface, not strays on it.
    w = 2 * LONE_WINDOW_CELLS + 1
    share = ndimage.uniform_filter(lone.astype(float), w, mode="constant")
    among = ndimage.uniform_filter(scanned.astype(float), w, mode="constant")
    with np.errstate(invalid="ignore", divide="ignore"):
        sparse = share > LONE_SPARSE_SHARE * among
    return lone & ~sparse
