"""Checks on where a survey lies and what its surface grid would cost, from header boxes only.

The surface grid of a survey covers at most the box of its files' headers placed in the site
CRS (:attr:`inventory.site.load.SurveyRef.extent`), cut into cells of ``[grid] cell_size_m``.
A cloud delivered in the wrong coordinates (a hundred kilometres off) or a tiny cell over a
large box asks for a grid of many gigabytes; the survey step would only run out of memory
after reading every point. :func:`grid_size_problem` says so before anything is read, and
:func:`survey_extent_problems` (called by the site check) also names a survey whose box misses
every pile footprint.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import TYPE_CHECKING

from inventory.errors import Problem
from inventory.model.grid import Grid

if TYPE_CHECKING:
    import geopandas as gpd

    from inventory.site.load import SurveyRef

__all__ = ["BYTES_PER_CELL", "MAX_GRID_BYTES", "grid_bytes", "grid_size_problem", "survey_extent_problems"]

#: Memory one surface cell takes through a close: the gridding step's elevation, count,
#: spread, top, bottom and object layers and the filled mask (45 bytes), the filled copy of
#: the surface (21), the volume step's thickness, base and change rasters (8 each) and the
#: labels and masks of the object and gap searches; rounded up.
BYTES_PER_CELL = 100

#: The largest surface grid a close may ask for, in bytes of :data:`BYTES_PER_CELL`:
#: 80 million cells, a 4 km x 5 km yard at 0.5 m cells.
MAX_GRID_BYTES = 8_000_000_000


def grid_bytes(extent: tuple[float, float, float, float], cell: float) -> tuple[Grid, int]:
    """The snapped grid over ``extent`` (no array allocated) and the memory it would take."""
    grid = Grid.snapped(*extent, cell=float(cell))
    return grid, grid.nrows * grid.ncols * BYTES_PER_CELL


def _gb(n: float) -> str:
    return f"{n / 1e9:,.1f} GB"


def grid_size_problem(extent: tuple[float, float, float, float], cell: float,
                      limit: int = MAX_GRID_BYTES) -> str | None:
    """Why the surface grid over ``extent`` at ``cell`` metres is too large, or ``None``."""
    grid, need = grid_bytes(extent, cell)
    if need <= limit:
        return None
    x0, y0, x1, y1 = extent
    return (f"the surface grid over this survey's extent ({x1 - x0:,.0f} m x {y1 - y0:,.0f} m) at "
            f"{cell:g} m cells would be {grid.ncols:,} x {grid.nrows:,} = {grid.nrows * grid.ncols:,} cells, "
            f"about {_gb(need)} of memory, above the limit of {_gb(limit)} "
            f"(inventory.site.extent.MAX_GRID_BYTES); check the clouds' coordinates and "
            f"[grid] cell_size_m in site.toml")


def survey_extent_problems(surveys: dict[str, SurveyRef], piles: gpd.GeoDataFrame, cell: float,
                           display: Callable[..., str], limit: int = MAX_GRID_BYTES) -> list[Problem]:
    """Every survey whose surface grid would be too large, or whose box misses every pile.

    ``display`` turns a path into the text shown (the loader's ``rel``).
    """
    from shapely.geometry import box

    problems = []
    geoms = [g for g in piles.geometry if g is not None and not g.is_empty]
    for date, ref in surveys.items():
        if ref.extent is None:
            continue
        where = display(ref.folder)
        # a cell size that is not positive is the schema's error, reported on its own
        why = grid_size_problem(ref.extent, cell, limit) if cell > 0 else None
        if why is not None:
            problems.append(Problem(where, None, "extent", why))
        if geoms:
            area = box(*ref.extent)
            if not any(area.intersects(g) for g in geoms):
                gap = min(area.distance(g) for g in geoms)
                x0, y0, x1, y1 = ref.extent
                problems.append(Problem(
                    where, None, "extent",
                    f"survey {date} covers no pile: its files span x {x0:,.1f}..{x1:,.1f}, y {y0:,.1f}..{y1:,.1f} "
                    f"in the site CRS, {gap:,.1f} m from the nearest pile footprint; check the clouds' CRS, "
                    "station poses or trajectory"))
    return problems
