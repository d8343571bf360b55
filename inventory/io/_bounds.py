"""What the readers of clouds without a header box (PLY, text, E57) share."""

from __future__ import annotations

import numpy as np

__all__ = ["BoxFromBounds"]


class BoxFromBounds:
    """``mins`` and ``maxs`` (as a LAS header gives them) from a reader's ``bounds``
    property, the (mins, maxs) pair it finds by reading its points."""

    bounds: tuple[np.ndarray, np.ndarray]

    @property
    def mins(self) -> np.ndarray:
        return self.bounds[0]

    @property
    def maxs(self) -> np.ndarray:
        return self.bounds[1]
