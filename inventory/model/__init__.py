"""Plain data shared by every layer: the grid and surface, poses and trajectories, ASPRS
classes, the month of a close, the result tables of a close. Nothing here reads or writes a file."""

from inventory.model.grid import Grid, Surface
from inventory.model.period import Period
from inventory.model.results import CloseResult

__all__ = ["CloseResult", "Grid", "Period", "Surface"]
