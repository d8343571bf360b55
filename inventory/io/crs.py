"""Coordinate reference systems of point clouds and their move into the site CRS.

Horizontal coordinates go through one :class:`pyproj.Transformer` per input CRS, built
once with ``always_xy=True`` so that x is always easting (or longitude) whatever axis order
the EPSG definition declares. Heights are scaled by the ratio of the vertical units: a
cloud in US survey feet comes out in metres when the site is in metres.

Vertical unit rule
------------------
* A compound CRS (horizontal + vertical) or a 3D CRS gives z its own unit.
* Otherwise z is taken to be in the horizontal linear unit of a projected CRS (how LAS
  files without a vertical CRS are written in practice, e.g. the laspy sample
  ``autzen_trim.laz``: Oregon Lambert in feet with elevations in feet; common practice).
* Geographic 2D CRSs have no linear unit; z is taken to be metres.

A change of vertical datum (two different vertical CRSs) is refused with a
:class:`~inventory.errors.CRSError` rather than done half right: geoid models are not
part of this tool.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from pyproj import CRS, Transformer
from pyproj.exceptions import CRSError as _ProjCRSError

from inventory.errors import CRSError

__all__ = [
    "US_SURVEY_FOOT_M",
    "INTERNATIONAL_FOOT_M",
    "parse_crs",
    "horizontal_crs",
    "vertical_unit_factor",
    "horizontal_unit_factor",
    "Reprojector",
    "TransformerCache",
]

#: US survey foot in metres, exactly 1200/3937 (US Federal Register 1959 notice; NIST SP 811).
US_SURVEY_FOOT_M = 1200.0 / 3937.0
#: International foot in metres, exactly 0.3048 (same 1959 notice).
INTERNATIONAL_FOOT_M = 0.3048


def parse_crs(text: "str | CRS", *, where: str = "", field: str = "crs") -> CRS:
    """A :class:`pyproj.CRS` from an EPSG code, WKT or PROJ string.

    Raises :class:`~inventory.errors.CRSError` naming ``where`` and ``field`` when the text
    is not a CRS pyproj knows.
    """
    if isinstance(text, CRS):
        return text
    try:
        return CRS.from_user_input(text)
    except (_ProjCRSError, TypeError, ValueError) as err:
        raise CRSError(where or "<crs>", f"not a known coordinate reference system: {text!r} ({err})",
                       field=field) from err


def horizontal_crs(crs: CRS) -> CRS:
    """The horizontal part of a CRS (the first component of a compound CRS)."""
    if crs.is_compound:
        return crs.sub_crs_list[0]
    return crs


def _vertical_crs(crs: CRS) -> CRS | None:
    if crs.is_compound:
        for sub in crs.sub_crs_list[1:]:
            if sub.is_vertical:
                return sub
    if crs.is_vertical:
        return crs
    return None


def horizontal_unit_factor(crs: CRS) -> float | None:
    """Metres per horizontal unit of a projected CRS, ``None`` for geographic ones."""
    h = horizontal_crs(crs)
    if h.is_geographic:
        return None
    for axis in h.axis_info:
        if axis.direction in ("east", "north", "west", "south"):
            return float(axis.unit_conversion_factor)
    return float(h.axis_info[0].unit_conversion_factor)


def vertical_unit_factor(crs: CRS) -> float:
    """Metres per unit of z in a cloud stored in ``crs`` (see the module docstring)."""
    v = _vertical_crs(crs)
    if v is not None:
        return float(v.axis_info[0].unit_conversion_factor)
    for axis in crs.axis_info:  # a 3D CRS carries an "up" axis
        if axis.direction == "up":
            return float(axis.unit_conversion_factor)
    f = horizontal_unit_factor(crs)
    return 1.0 if f is None else f


@dataclass
class Reprojector:
    """Moves x, y, z arrays from one CRS into another (see the module docstring).

    Build through :class:`TransformerCache` so that each input CRS gets one transformer.
    """

    src: CRS
    dst: CRS
    _transformer: Transformer | None
    z_scale: float

    @classmethod
    def build(cls, src: CRS, dst: CRS) -> "Reprojector":
        vs, vd = _vertical_crs(src), _vertical_crs(dst)
        if vs is not None and vd is not None and not vs.equals(vd, ignore_axis_order=True):
            if vs.datum is None or vd.datum is None or vs.datum.name != vd.datum.name:
                raise CRSError("<crs>", f"vertical datum change from {vs.name!r} to {vd.name!r} "
                               "is not supported; deliver clouds in the site's vertical datum",
                               field="crs")
        hs, hd = horizontal_crs(src), horizontal_crs(dst)
        transformer = None
        if not hs.equals(hd, ignore_axis_order=True):
            try:
                transformer = Transformer.from_crs(hs, hd, always_xy=True)
            except _ProjCRSError as err:  # pragma: no cover - pyproj finds a path for any pair
                raise CRSError("<crs>", f"no transformation from {hs.name} to {hd.name}",
                               field="crs") from err
        z_scale = vertical_unit_factor(src) / vertical_unit_factor(dst)
        return cls(src, dst, transformer, z_scale)

    @property
    def is_identity(self) -> bool:
        return self._transformer is None and self.z_scale == 1.0

    def __call__(self, x: np.ndarray, y: np.ndarray, z: np.ndarray
                 ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        if self._transformer is not None:
            x, y = self._transformer.transform(np.asarray(x, float), np.asarray(y, float))
            if not (np.all(np.isfinite(x)) and np.all(np.isfinite(y))):
                raise CRSError("<crs>", f"coordinates outside the area of {self.dst.name}",
                               field="crs")
        z = np.asarray(z, float) * self.z_scale if self.z_scale != 1.0 else np.asarray(z, float)
        return np.asarray(x, float), np.asarray(y, float), z

    def bounds(self, xmin: float, ymin: float, xmax: float, ymax: float) -> tuple[float, float, float, float]:
        """Bounds of a box after transformation (edges densified, 21 points each)."""
        if self._transformer is None:
            return (xmin, ymin, xmax, ymax)
        return tuple(self._transformer.transform_bounds(xmin, ymin, xmax, ymax, densify_pts=21))


class TransformerCache:
    """One :class:`Reprojector` per (input CRS, output CRS) pair for the length of a run.

    Examples
    --------
    >>> cache = TransformerCache()
    >>> r = cache.get("EPSG:2264", "EPSG:32119")
    >>> r is cache.get("EPSG:2264", "EPSG:32119")
    True
    """

    def __init__(self) -> None:
        self._cache: dict[tuple[str, str], Reprojector] = {}

    def get(self, src: "CRS | str", dst: "CRS | str") -> Reprojector:
        s, d = parse_crs(src), parse_crs(dst)
        key = (s.to_wkt(), d.to_wkt())
        if key not in self._cache:
            self._cache[key] = Reprojector.build(s, d)
        return self._cache[key]

    def __len__(self) -> int:
        return len(self._cache)
