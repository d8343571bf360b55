"""Colours and classes the outputs draw with, defined once so the report and the styles agree.

The HTML report colours each pile by its variance in % of book; the styles written beside
the GeoPackage and the rasters (OGC Styled Layer Descriptor files) and the legend PNG use
the same classes and colours, taken from here, so a GIS renders the piles as the report
does.

Variance classes
    Five classes of equal width over ``[-span, +span]`` (:func:`variance_span`: the largest
    ``|variance %|`` or tolerance of the close, rounded up to a whole percent, at least 1),
    coloured by a diverging scheme of our own: deficit (survey below book) in slate blue,
    surplus in rust, the class around zero in pale stone. A class holds its lower bound and
    not its upper one; the outer two are open-ended, so an edited value beyond the span still
    gets the outer colour. A pile with no variance is drawn in :data:`NO_VALUE_COLOR`.
Thickness ramp
    A sequential ramp of our own from pale sand (0 m) to dark umber (the thickest cell,
    :func:`ramp_top`).
Change ramp
    The variance scheme stretched over ``[-span, +span]`` metres: material removed in blue,
    added in rust (change is later minus earlier), no change in pale stone.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Iterable

import numpy as np

__all__ = [
    "CHANGE_COLORS",
    "COVERAGE_GAP_COLOR",
    "NO_VALUE_COLOR",
    "OUTLINE_OTHER",
    "OUTLINE_OUT_OF_TOLERANCE",
    "OUT_OF_TOLERANCE_COLOR",
    "PILE_FILL_OPACITY",
    "SIGNIFICANT_COLOR",
    "SURVEY_EXTENT_COLOR",
    "THICKNESS_COLORS",
    "UNASSIGNED_STOCK_COLOR",
    "VARIANCE_COLORS",
    "ColourClass",
    "class_of",
    "ramp_stops",
    "ramp_top",
    "variance_classes",
    "variance_span",
]

#: The diverging scheme for variance %, one colour per class: deficit -> neutral -> surplus.
VARIANCE_COLORS = ("#24466b", "#5f86a8", "#eae6dc", "#c98a5a", "#8c3b1c")
#: Fill of a pile whose variance is not known (no survey figure or no book stock).
NO_VALUE_COLOR = "#bbbbbb"
#: Row colours of the report's pile table (and the outline emphasis of the styles).
OUT_OF_TOLERANCE_COLOR = "#f2c4b8"
SIGNIFICANT_COLOR = "#f7e3ae"
#: Fill opacity of the pile polygons over the relief, and their outlines: thick and solid
#: for a pile out of tolerance, thin and dashed otherwise (widths in points, dashes in
#: points on, off).
PILE_FILL_OPACITY = 0.65
OUTLINE_OUT_OF_TOLERANCE = (2.2, None)
OUTLINE_OTHER = (0.8, (4.0, 2.0))
#: Outline of the unscanned areas (coverage gaps) and of the survey extent.
COVERAGE_GAP_COLOR = "#6a1b9a"
SURVEY_EXTENT_COLOR = "#3b3b3b"
#: Outline of stock found outside every footprint (``unassigned_stock``): it needs a decision.
UNASSIGNED_STOCK_COLOR = "#c0182a"
#: Sequential ramp for thickness above base, 0 m first.
THICKNESS_COLORS = ("#f3ecd8", "#dcc591", "#b98f55", "#82592f", "#4a3019")
#: Diverging ramp for surface change, most removed first (the variance scheme).
CHANGE_COLORS = VARIANCE_COLORS


@dataclass(frozen=True)
class ColourClass:
    """One class of a classed map: ``lower <= value < upper`` (``None``: open-ended)."""

    lower: float | None
    upper: float | None
    colour: str
    label: str

    def holds(self, value: float) -> bool:
        """True when ``value`` falls in this class (NaN falls in none)."""
        if value is None or not math.isfinite(value):
            return False
        return (self.lower is None or value >= self.lower) and (self.upper is None or value < self.upper)


def _finite(values: Iterable) -> np.ndarray:
    """The finite numbers among ``values`` (missing, NA and text left out)."""
    out = []
    for v in np.ravel(np.asarray(list(values), dtype=object)):
        try:
            f = float(v)
        except (TypeError, ValueError):
            continue
        if math.isfinite(f):
            out.append(f)
    return np.asarray(out, dtype=float)


def variance_span(variance_pct: Iterable, tolerance_pct: Iterable = ()) -> float:
    """Half-width of the variance classes, in %: the largest ``|variance %|`` or tolerance,
    rounded up to a whole percent; at least 1.

    >>> variance_span([-2.4, 0.5], [3.0])
    3.0
    >>> variance_span([float("nan")])
    1.0
    """
    values = np.abs(np.concatenate([_finite(variance_pct), _finite(tolerance_pct), [1.0]]))
    return float(math.ceil(float(values.max()) - 1e-9))


def _fmt(v: float) -> str:
    text = f"{v:+.2f}".rstrip("0").rstrip(".")
    return "0" if text in ("+0", "-0") else text


def variance_classes(span: float) -> tuple[ColourClass, ...]:
    """The five variance classes over ``[-span, +span]`` % with their colours and labels.

    >>> [(c.lower, c.upper) for c in variance_classes(5.0)]
    [(None, -3.0), (-3.0, -1.0), (-1.0, 1.0), (1.0, 3.0), (3.0, None)]
    """
    if not (span > 0 and math.isfinite(span)):
        raise ValueError(f"variance span must be a positive number, not {span!r}")
    edges = [round(span * f, 6) for f in (-0.6, -0.2, 0.2, 0.6)]
    bounds = [None, *edges, None]
    labels = [
        f"below {_fmt(edges[0])} % (deficit)",
        f"{_fmt(edges[0])} to {_fmt(edges[1])} %",
        f"{_fmt(edges[1])} to {_fmt(edges[2])} % (near book)",
        f"{_fmt(edges[2])} to {_fmt(edges[3])} %",
        f"{_fmt(edges[3])} % and above (surplus)",
    ]
    return tuple(ColourClass(bounds[i], bounds[i + 1], VARIANCE_COLORS[i], labels[i]) for i in range(5))


def class_of(value: float, classes: Iterable[ColourClass]) -> ColourClass | None:
    """The class ``value`` falls in, or ``None`` for a missing value."""
    for c in classes:
        if c.holds(value):
            return c
    return None


def ramp_top(values, step: float = 0.5) -> float:
    """The top of a ramp for ``values``: the largest finite ``|value|`` rounded up to
    ``step``, at least ``step``.

    >>> ramp_top([0.2, -1.26, float("nan")])
    1.5
    """
    arr = np.abs(np.asarray(values, dtype=float))
    arr = arr[np.isfinite(arr)]
    top = float(arr.max()) if arr.size else 0.0
    return max(step, step * math.ceil(top / step - 1e-9))


def ramp_stops(colours: Iterable[str], low: float, high: float) -> list[tuple[float, str]]:
    """Colours spread evenly from ``low`` to ``high``: (value, colour), lowest first.

    >>> ramp_stops(("#000000", "#777777", "#ffffff"), -2.0, 2.0)
    [(-2.0, '#000000'), (0.0, '#777777'), (2.0, '#ffffff')]
    """
    colours = list(colours)
    n = len(colours)
    return [(round(low + (high - low) * i / (n - 1), 6), colours[i]) for i in range(n)]
