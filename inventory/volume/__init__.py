"""Pile volumes: footprint weights, base surfaces, grid and TIN volume, uncertainty, tonnes."""

from inventory.volume.measure import BaseSurfaces, measure_piles

__all__ = ["BaseSurfaces", "measure_piles"]
