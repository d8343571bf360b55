"""Least-squares similarity transforms between a survey's own frame and the site CRS.

Two models, as surveyors register a scanner's project frame on control points:

``"7-parameter"``
    ``p_site = s * R @ p + t``: three translations, three rotations, one scale (the 3-D
    similarity or Helmert transformation). Fitted in closed form by the weighted
    Umeyama/Horn solution (S. Umeyama, "Least-squares estimation of transformation
    parameters between two point patterns", IEEE TPAMI 13(4), 1991), which minimises
    ``sum w_i |q_i - (s R p_i + t)|^2`` exactly.
``"4+1"``
    Horizontal rotation about the vertical, horizontal translation and scale (the 2-D
    Helmert transformation, four parameters) plus one vertical shift: ``(E, N) = s R(theta)
    (x, y) + (tE, tN)``, ``h = z + th``. For a survey frame already levelled (every
    terrestrial scanner with a compensator), so heights are not scaled or tilted.

Weights are ``1 / sigma^2`` per point. Residuals are ``site - transformed`` per point.

Examples
--------
>>> p = np.array([[0.0, 0, 0], [10, 0, 0], [0, 10, 0], [0, 0, 5]])
>>> q = p @ np.array([[0.0, 1, 0], [-1, 0, 0], [0, 0, 1]]) + [500000.0, 5700000.0, 12.0]
>>> fit = fit_similarity(p, q)
>>> round(fit.scale, 9), np.round(fit.translation, 6).tolist()
(1.0, [500000.0, 5700000.0, 12.0])
>>> round(fit.yaw_deg, 6)   # (1, 0, 0) went to (0, 1, 0): east turned to north
90.0
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

__all__ = ["MODELS", "Similarity", "fit_similarity", "collinear_spread"]

#: The transform models a site may choose (site.toml ``[survey] control_model``).
MODELS = ("7-parameter", "4+1")


@dataclass(frozen=True, eq=False)
class Similarity:
    """``p_site = matrix @ p + translation``.

    Attributes
    ----------
    model : str
        ``"7-parameter"`` or ``"4+1"``.
    rotation : (3, 3) ndarray
        Proper rotation (for ``"4+1"`` a rotation about the vertical only).
    scale : float
        Applied to all three axes (``"7-parameter"``) or to the horizontal only (``"4+1"``).
    translation : (3,) ndarray
    """

    model: str
    rotation: np.ndarray
    scale: float
    translation: np.ndarray
    extra: dict = field(default_factory=dict)

    @property
    def matrix(self) -> np.ndarray:
        """The linear part: ``s R``, or for ``"4+1"`` ``s R`` horizontally and 1 vertically."""
        m = self.scale * np.asarray(self.rotation, float)
        if self.model == "4+1":
            m[2, :] = [0.0, 0.0, 1.0]
            m[:, 2] = [0.0, 0.0, 1.0]
        return m

    def apply(self, x: Any, y: Any, z: Any) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Site coordinates of survey-frame points (arrays of any equal shape)."""
        m, t = self.matrix, self.translation
        x, y, z = (np.asarray(v, float) for v in (x, y, z))
        return (m[0, 0] * x + m[0, 1] * y + m[0, 2] * z + t[0],
                m[1, 0] * x + m[1, 1] * y + m[1, 2] * z + t[1],
                m[2, 0] * x + m[2, 1] * y + m[2, 2] * z + t[2])

    def apply_xyz(self, p: Any) -> np.ndarray:
        """``(n, 3)`` survey-frame points to the site."""
        p = np.asarray(p, float).reshape(-1, 3)
        return p @ self.matrix.T + self.translation

    @property
    def yaw_deg(self) -> float:
        """Rotation about the vertical, degrees counter-clockwise (site convention
        ``R = Rz(yaw) Ry(pitch) Rx(roll)``)."""
        return self._euler()[0]

    @property
    def pitch_deg(self) -> float:
        return self._euler()[1]

    @property
    def roll_deg(self) -> float:
        return self._euler()[2]

    def _euler(self) -> tuple[float, float, float]:
        from scipy.spatial.transform import Rotation

        yaw, pitch, roll = Rotation.from_matrix(self.rotation).as_euler("ZYX", degrees=True)
        return float(yaw), float(pitch), float(roll)

    def as_dict(self) -> dict[str, Any]:
        """The parameters, for the run manifest."""
        return {"model": self.model, "scale": float(self.scale), "scale_ppm": (float(self.scale) - 1.0) * 1e6,
                "roll_deg": self.roll_deg, "pitch_deg": self.pitch_deg, "yaw_deg": self.yaw_deg,
                "translation_m": [float(v) for v in self.translation]}


def collinear_spread(p: Any, w: Any = None) -> tuple[float, float]:
    """The weighted RMS spread of points along their main axis and across it (metres):
    ``(along, across)``; ``across`` near zero means the points lie on one line."""
    p = np.asarray(p, float).reshape(-1, 3)
    w = np.ones(len(p)) if w is None else np.asarray(w, float)
    w = w / w.sum()
    c = p - w @ p
    cov = (c * w[:, None]).T @ c
    ev = np.sort(np.linalg.eigvalsh(cov))[::-1]
    ev = np.clip(ev, 0.0, None)
    return math.sqrt(ev[0]), math.sqrt(ev[1])


def fit_similarity(p: Any, q: Any, weights: Any = None, model: str = "7-parameter") -> Similarity:
    """Least-squares similarity transform taking survey-frame points ``p`` to site points ``q``.

    Parameters
    ----------
    p, q : (n, 3) array
        The same points in the survey frame and in the site CRS.
    weights : (n,) array, optional
        Relative weights, e.g. ``1 / sigma^2``; equal by default.
    model : "7-parameter" or "4+1"

    Returns
    -------
    Similarity

    Raises
    ------
    ValueError
        For fewer than 3 points, non-positive weights, an unknown model, or points whose
        geometry cannot fix the transform (all on one line for the 7-parameter model, all
        at one horizontal position for 4+1).
    """
    p = np.asarray(p, float).reshape(-1, 3)
    q = np.asarray(q, float).reshape(-1, 3)
    if len(p) != len(q):
        raise ValueError(f"{len(p)} survey-frame points but {len(q)} site points")
    if len(p) < 3:
        raise ValueError(f"{len(p)} points; at least 3 are needed")
    if model not in MODELS:
        raise ValueError(f"unknown model {model!r}; one of {', '.join(MODELS)}")
    w = np.ones(len(p)) if weights is None else np.asarray(weights, float).reshape(-1)
    if len(w) != len(p) or not np.all(np.isfinite(w)) or np.any(w <= 0):
        raise ValueError("weights must be positive and finite, one per point")
    w = w / w.sum()
    mp, mq = w @ p, w @ q
    P, Q = p - mp, q - mq  # centred: site coordinates of 1e6 m lose nothing here
    if model == "4+1":
        den = float(w @ (P[:, 0] ** 2 + P[:, 1] ** 2))
        if den <= 1e-12:
            raise ValueError("the points share one horizontal position; the horizontal rotation and "
                             "scale are undetermined")
        a = float(w @ (P[:, 0] * Q[:, 0] + P[:, 1] * Q[:, 1])) / den
        b = float(w @ (P[:, 0] * Q[:, 1] - P[:, 1] * Q[:, 0])) / den
        s = math.hypot(a, b)
        c, sn = a / s, b / s
        rot = np.array([[c, -sn, 0.0], [sn, c, 0.0], [0.0, 0.0, 1.0]])
        t = np.empty(3)
        t[:2] = mq[:2] - s * rot[:2, :2] @ mp[:2]
        t[2] = mq[2] - mp[2]
        return Similarity(model, rot, s, t)
    along, across = collinear_spread(p, w)
    if across <= 1e-6 * max(along, 1.0):
        raise ValueError("the points lie on one line; the rotation about it is undetermined")
    cov = (Q * w[:, None]).T @ P           # sum w q p^T
    u, d, vt = np.linalg.svd(cov)
    sgn = np.eye(3)
    if np.linalg.det(u) * np.linalg.det(vt) < 0:
        sgn[2, 2] = -1.0                   # a reflection is not a rotation (Umeyama eq. 39)
    rot = u @ sgn @ vt
    var_p = float(w @ (P ** 2).sum(axis=1))
    s = float(np.trace(np.diag(d) @ sgn)) / var_p
    t = mq - s * rot @ mp
    return Similarity(model, rot, s, t)
