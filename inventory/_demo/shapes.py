"""Analytic stockpile shapes: thickness above the pad and exact volume.

Every shape gives its thickness ``t(x, y) >= 0`` above the pad it stands on (a pile on a gently
sloping pad is the same solid as on a level one, sheared by the pad; its volume above the pad is
the integral of ``t``). The volume formulas are the handbook ones for cone, windrow with conical
ends, a windrow whose end was cut by a steep reclaim face, a pile pushed into a three-walled
bay, and a flat-topped pile on a rounded-rectangle plan (whole, or halved by a retaining wall);
a pile of irregular plan (overlapping cones, :class:`ConeGroup`) has no closed formula and is
integrated numerically. Each formula is checked in the tests against midpoint integration of ``t`` on a grid at
least ten times finer than the tool's default cell.

Coordinates are local metres of the demo site (x east, y north).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["Cone", "Windrow", "BayPile", "ConeGroup", "Plateau", "Shape"]


def _tan(deg: float) -> float:
    return math.tan(math.radians(deg))


@dataclass(frozen=True)
class Cone:
    """A conical pile of toe radius ``r`` at the angle of repose ``repose_deg``.

    Volume ``pi r^2 h / 3`` with ``h = r tan(repose)`` (handbook cone).
    """

    cx: float
    cy: float
    r: float
    repose_deg: float

    @property
    def height(self) -> float:
        return self.r * _tan(self.repose_deg)

    def thickness(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        d = np.hypot(np.asarray(x) - self.cx, np.asarray(y) - self.cy)
        return np.clip(self.height * (1.0 - d / self.r), 0.0, None)

    def volume(self) -> float:
        return math.pi * self.r**2 * self.height / 3.0

    def bbox(self) -> tuple[float, float, float, float]:
        return (self.cx - self.r, self.cy - self.r, self.cx + self.r, self.cy + self.r)

    def outline(self):
        from shapely.geometry import Point

        return Point(self.cx, self.cy).buffer(self.r, quad_segs=64)


@dataclass(frozen=True)
class Windrow:
    """A long pile of triangular section with conical ends, optionally cut by a reclaim face.

    The ridge runs from ``(x0, y0)`` for ``length`` metres along ``azimuth_deg`` (counter-clockwise
    from east). Half-width at the toe ``w``, height ``h = w tan(repose)``.
    ``face_s`` (metres along the ridge from its start) places the toe of a steep reclaim face
    that cuts away everything beyond it at ``face_deg``; ``None`` leaves both conical ends.

    Volume without a face: ``L w h + pi w^2 h / 3`` (prism plus two half cones).
    With a face whose whole slope lies on the straight part, the far half cone and the prism
    beyond the face toe are gone and the slice of the prism under the face keeps
    ``(2/3) w h^2 / tan(face)`` (the section below height c is ``w h - w (h - c)^2 / h``,
    integrated over ``c`` from 0 to ``h`` with ``ds = dc / tan(face)``).
    """

    x0: float
    y0: float
    azimuth_deg: float
    length: float
    w: float
    repose_deg: float
    face_s: float | None = None
    face_deg: float = 60.0

    @property
    def height(self) -> float:
        return self.w * _tan(self.repose_deg)

    def _local(self, x, y) -> tuple[np.ndarray, np.ndarray]:
        a = math.radians(self.azimuth_deg)
        dx = np.asarray(x) - self.x0
        dy = np.asarray(y) - self.y0
        s = dx * math.cos(a) + dy * math.sin(a)
        n = -dx * math.sin(a) + dy * math.cos(a)
        return s, n

    def thickness(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        s, n = self._local(x, y)
        along = np.where(s < 0.0, -s, np.where(s > self.length, s - self.length, 0.0))
        d = np.hypot(along, n)
        t = np.clip(self.height * (1.0 - d / self.w), 0.0, None)
        if self.face_s is not None:
            t = np.minimum(t, np.clip(_tan(self.face_deg) * (self.face_s - s), 0.0, None))
        return t

    def volume(self) -> float:
        h, w, L = self.height, self.w, self.length
        if self.face_s is None:
            return L * w * h + math.pi * w**2 * h / 3.0
        run = h / _tan(self.face_deg)
        if not (run <= self.face_s <= L):
            raise ValueError("the reclaim face must lie wholly on the straight part of the windrow")
        return w * h * (self.face_s - run) + (2.0 / 3.0) * w * h**2 / _tan(self.face_deg) + math.pi * w**2 * h / 6.0

    def _corners(self) -> np.ndarray:
        a = math.radians(self.azimuth_deg)
        u = np.array([math.cos(a), math.sin(a)])
        v = np.array([-math.sin(a), math.cos(a)])
        s_end = self.length + self.w if self.face_s is None else self.face_s
        pts = [(-self.w, -self.w), (s_end, -self.w), (s_end, self.w), (-self.w, self.w)]
        return np.array([[self.x0, self.y0] + s * u + n * v for s, n in pts])

    def bbox(self) -> tuple[float, float, float, float]:
        c = self._corners()
        return (float(c[:, 0].min()), float(c[:, 1].min()), float(c[:, 0].max()), float(c[:, 1].max()))

    def outline(self):
        from shapely.geometry import LineString, box
        from shapely import affinity

        a = math.radians(self.azimuth_deg)
        ridge = LineString([(self.x0, self.y0), (self.x0 + self.length * math.cos(a), self.y0 + self.length * math.sin(a))])
        shape = ridge.buffer(self.w, quad_segs=64)
        if self.face_s is not None:
            cut = box(-self.w - 1.0, -self.w - 1.0, self.face_s, self.w + 1.0)
            cut = affinity.rotate(cut, self.azimuth_deg, origin=(0, 0))
            cut = affinity.translate(cut, self.x0, self.y0)
            shape = shape.intersection(cut)
        return shape


@dataclass(frozen=True)
class BayPile:
    """A pile pushed against the back and side walls of a three-walled bay.

    The bay's inner faces span ``x0 .. x0 + width`` and its back wall's inner face is at
    ``y_back``; the bay opens towards +y. The pile has a flat top ``top`` metres above the pad
    and a front face at the angle of repose whose toe is ``depth`` metres from the back wall.
    Section area ``H (D - H / tan a) + H^2 / (2 tan a)`` times the bay width.
    """

    x0: float
    y_back: float
    width: float
    depth: float
    top: float
    repose_deg: float

    def thickness(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        x = np.asarray(x)
        y = np.asarray(y)
        v = y - self.y_back
        inside = (x >= self.x0) & (x <= self.x0 + self.width) & (v >= 0.0)
        t = np.minimum(self.top, (self.depth - v) * _tan(self.repose_deg))
        return np.where(inside, np.clip(t, 0.0, None), 0.0)

    def volume(self) -> float:
        run = self.top / _tan(self.repose_deg)
        if run > self.depth:
            raise ValueError("bay pile too shallow for its top height")
        return self.width * (self.top * (self.depth - run) + self.top * run / 2.0)

    def bbox(self) -> tuple[float, float, float, float]:
        return (self.x0, self.y_back, self.x0 + self.width, self.y_back + self.depth)

    def outline(self):
        from shapely.geometry import box

        return box(*self.bbox())


@dataclass(frozen=True)
class ConeGroup:
    """A pile of irregular plan: overlapping cones of one material, the surface their maximum.

    What a loader leaves after tipping several heaps side by side. The volume has no closed
    form (the cones' intersections are hyperbolic curves); :meth:`volume` integrates the
    thickness by the midpoint rule on a ``step`` metre grid over the bounding box.
    """

    cones: tuple[Cone, ...]

    @property
    def repose_deg(self) -> float:
        return self.cones[0].repose_deg

    @property
    def height(self) -> float:
        return max(c.height for c in self.cones)

    def thickness(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        t = self.cones[0].thickness(x, y)
        for c in self.cones[1:]:
            t = np.maximum(t, c.thickness(x, y))
        return t

    def volume(self, step: float = 0.01) -> float:
        x0, y0, x1, y1 = self.bbox()
        xs = x0 + (np.arange(int(math.ceil((x1 - x0) / step))) + 0.5) * step
        total = 0.0
        for y in y0 + (np.arange(int(math.ceil((y1 - y0) / step))) + 0.5) * step:
            total += float(self.thickness(xs, np.full_like(xs, y)).sum())
        return total * step * step

    def bbox(self) -> tuple[float, float, float, float]:
        b = np.array([c.bbox() for c in self.cones])
        return (float(b[:, 0].min()), float(b[:, 1].min()), float(b[:, 2].max()), float(b[:, 3].max()))

    def outline(self):
        from shapely.ops import unary_union

        return unary_union([c.outline() for c in self.cones])


@dataclass(frozen=True)
class Plateau:
    """A flat-topped pile on a rounded-rectangle plan, optionally halved by a retaining wall.

    The core rectangle (``length`` along ``azimuth_deg`` by ``breadth``, centred on
    ``(cx, cy)``) is grown by ``reach`` metres to the toe; the sides rise at the angle of repose
    from the toe and are cut off at ``top`` metres. With ``k = tan(repose)`` and ``s`` the
    distance outside the core, the thickness is ``min(top, k (reach - s))``; the area within
    ``s`` of a rectangle is ``L B + 2 (L + B) s + pi s^2`` (Steiner's formula for a convex
    set), so integrating layer by layer from ``s1 = reach - top / k`` to ``reach``::

        V = k [L B (reach - s1) + (L + B) (reach^2 - s1^2) + pi (reach^3 - s1^3) / 3]

    ``wall=True`` keeps only the left half (``n >= 0`` across the long axis, looking along the
    azimuth): a pile pushed against a wall on the long axis, of volume ``V / 2``.
    """

    cx: float
    cy: float
    azimuth_deg: float
    length: float
    breadth: float
    reach: float
    top: float
    repose_deg: float
    wall: bool = False

    @property
    def height(self) -> float:
        return self.top

    def _local(self, x, y) -> tuple[np.ndarray, np.ndarray]:
        a = math.radians(self.azimuth_deg)
        dx = np.asarray(x) - self.cx
        dy = np.asarray(y) - self.cy
        return dx * math.cos(a) + dy * math.sin(a), -dx * math.sin(a) + dy * math.cos(a)

    def thickness(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        s, n = self._local(x, y)
        ds = np.clip(np.abs(s) - self.length / 2.0, 0.0, None)
        dn = np.clip(np.abs(n) - self.breadth / 2.0, 0.0, None)
        t = np.clip(np.minimum(self.top, _tan(self.repose_deg) * (self.reach - np.hypot(ds, dn))), 0.0, None)
        return np.where(n >= 0.0, t, 0.0) if self.wall else t

    def volume(self) -> float:
        k = _tan(self.repose_deg)
        r, s1 = self.reach, self.reach - self.top / k
        if s1 < 0.0:
            raise ValueError("plateau too low a reach for its top height")
        L, B = self.length, self.breadth
        v = k * (L * B * (r - s1) + (L + B) * (r**2 - s1**2) + math.pi * (r**3 - s1**3) / 3.0)
        return v / 2.0 if self.wall else v

    def _corners(self) -> np.ndarray:
        a = math.radians(self.azimuth_deg)
        u = np.array([math.cos(a), math.sin(a)])
        v = np.array([-math.sin(a), math.cos(a)])
        hs, hn = self.length / 2.0 + self.reach, self.breadth / 2.0 + self.reach
        n0 = 0.0 if self.wall else -hn
        return np.array([[self.cx, self.cy] + s * u + n * v for s, n in ((-hs, n0), (hs, n0), (hs, hn), (-hs, hn))])

    def bbox(self) -> tuple[float, float, float, float]:
        c = self._corners()
        return (float(c[:, 0].min()), float(c[:, 1].min()), float(c[:, 0].max()), float(c[:, 1].max()))

    def outline(self):
        from shapely import affinity
        from shapely.geometry import Polygon, box

        core = box(-self.length / 2.0, -self.breadth / 2.0, self.length / 2.0, self.breadth / 2.0)
        shape = core.buffer(self.reach, quad_segs=64)
        if self.wall:
            shape = shape.intersection(box(-1e4, 0.0, 1e4, 1e4))
        shape = affinity.rotate(shape, self.azimuth_deg, origin=(0, 0))
        return affinity.translate(shape, self.cx, self.cy) if isinstance(shape, Polygon) else shape


Shape = Cone | Windrow | BayPile | ConeGroup | Plateau
