"""Registration of a survey to the site by control points (``surveys/<date>/control.csv``).

Each row gives one control point in the survey's own frame (``x, y, z``: what the clouds,
after their own poses, are in) and in the site CRS (``e, n, h``), with an optional
``sigma_m``. :func:`read_control` fits the transform that site.toml chooses
(``[survey] control_model``: ``"7-parameter"`` or ``"4+1"``, :mod:`inventory.model.similarity`),
weighted by ``1 / sigma^2``, and refuses a survey whose control cannot be trusted: fewer
than 3 usable points, points that cannot fix the transform, or a 3-D RMS residual above
``[survey] control_rms_max_m`` (default 0.05 m).

Examples
--------
>>> import tempfile, pathlib
>>> rows = ["point_id,x,y,z,e,n,h", "A,0,0,0,500000,5700000,10", "B,100,0,0,500100,5700000,10",
...         "C,0,100,1,500000,5700100,11", "D,100,100,0,500100,5700100,10.01"]
>>> with tempfile.TemporaryDirectory() as d:
...     path = pathlib.Path(d) / "control.csv"
...     _ = path.write_text("\\n".join(rows) + "\\n")
...     reg = read_control(path, model="4+1")
>>> reg.summary()
'control.csv: 4+1 fit on 4 points, RMS 0.004 m (largest D 0.008 m)'
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from inventory.errors import InputError, InputErrors, Problem
from inventory.io.tables import read_table, table_schema
from inventory.model.similarity import MODELS, Similarity, fit_similarity

__all__ = ["CONTROL_FILE", "DEFAULT_CONTROL_RMS_MAX_M", "MIN_CONTROL_POINTS", "Registration", "read_control"]

CONTROL_FILE = "control.csv"
#: Largest 3-D RMS residual accepted by default: 5 cm, the order of the target-centring and
#: scan-registration errors of terrestrial surveys (common practice); site.toml may change it.
DEFAULT_CONTROL_RMS_MAX_M = 0.05
#: Three points fix a similarity transform and leave redundancy to check it (two would fit
#: exactly and prove nothing).
MIN_CONTROL_POINTS = 3
#: Largest departure of the fitted scale from 1 accepted: 1 %. A registration's true scale
#: differs from 1 by parts per million to a few hundred ppm (instrument and map-projection
#: scale, common practice); a scale far off says the two sides are in different units
#: (millimetres, feet) or that points are swapped.
MAX_SCALE_DEPARTURE = 0.01
#: Two control points closer than this in the survey frame are one mark entered twice.
SAME_MARK_M = 0.001


@dataclass(frozen=True, eq=False)
class Registration:
    """A survey's fitted transform to the site and how well its control points agree.

    Attributes
    ----------
    source : Path
        The control.csv file.
    transform : Similarity
    point_ids : list of str
    survey_xyz, site_xyz : (n, 3) ndarray
    residuals : (n, 3) ndarray
        Site minus transformed survey coordinates (dE, dN, dh), metres.
    rms_m : float
        Root mean square of the 3-D residual lengths.
    tolerance_m : float
    """

    source: Path
    transform: Similarity
    point_ids: list
    survey_xyz: np.ndarray
    site_xyz: np.ndarray
    residuals: np.ndarray
    rms_m: float
    tolerance_m: float

    @property
    def lengths(self) -> np.ndarray:
        """3-D residual length per point."""
        return np.sqrt((self.residuals ** 2).sum(axis=1))

    @property
    def worst(self) -> tuple[str, float]:
        i = int(np.argmax(self.lengths))
        return str(self.point_ids[i]), float(self.lengths[i])

    def summary(self) -> str:
        """One line: model, points, RMS and the largest residual."""
        pid, worst = self.worst
        return (f"{self.source.name}: {self.transform.model} fit on {len(self.point_ids)} points, "
                f"RMS {self.rms_m:.3f} m (largest {pid} {worst:.3f} m)")

    def as_dict(self) -> dict[str, Any]:
        """For the run manifest: the parameters, the RMS and each point's residual."""
        return {
            "source": str(self.source),
            **self.transform.as_dict(),
            "rms_m": float(self.rms_m),
            "tolerance_m": float(self.tolerance_m),
            "points": [{"point_id": str(pid), "de_m": float(r[0]), "dn_m": float(r[1]), "dh_m": float(r[2]),
                        "residual_m": float(n)}
                       for pid, r, n in zip(self.point_ids, self.residuals, self.lengths)],
        }


def _weights(sigma: np.ndarray) -> np.ndarray:
    """``1 / sigma^2`` scaled by the median sigma (the fit depends only on the ratios); a
    blank sigma takes the median of the given ones (all equal when none)."""
    given = np.isfinite(sigma)
    if not given.any():
        return np.ones(len(sigma))
    median = np.median(sigma[given])
    s = np.where(given, sigma, median)
    with np.errstate(over="ignore", divide="ignore", under="ignore"):
        return (median / s) ** 2


def read_control(path: "str | Path", *, model: str = "7-parameter",
                 tolerance_m: float = DEFAULT_CONTROL_RMS_MAX_M, display: str | None = None,
                 problems: "list[Problem] | None" = None) -> Registration | None:
    """Read ``control.csv``, fit the transform and check it.

    Parameters
    ----------
    path : path-like
    model : "7-parameter" or "4+1"
    tolerance_m : float
        Largest accepted 3-D RMS residual.
    display : str, optional
        The file's name in messages (default ``path``).
    problems : list, optional
        Collect every problem here and return ``None`` on failure (the site check);
        without it the problems are raised.

    Returns
    -------
    Registration

    Raises
    ------
    InputError
        Fewer than 3 usable points, a geometry that cannot fix the transform, or an RMS
        above ``tolerance_m`` (one line naming the file, with the worst point).
    InputErrors
        Rows that break the table's rules.
    """
    path = Path(path)
    shown = display or str(path)
    if model not in MODELS:
        raise ValueError(f"unknown control model {model!r}")
    own: list[Problem] = []
    frame = read_table(path, table_schema("control"), own, display=shown)
    errors = [p for p in own if p.severity == "error"]

    def fail(why: str, fieldname: str | None = None) -> None:
        err = InputError(shown, why, field=fieldname)
        if problems is None:
            raise err
        problems.append(err.problem)

    def fail_at(row: int, fieldname: str, why: str) -> None:
        err = InputError(shown, why, line=int(frame["line"].iloc[row]), field=fieldname)
        if problems is None:
            raise err
        problems.append(err.problem)

    if problems is not None:
        problems.extend(own)
    elif errors:
        raise InputErrors(own)
    if errors:
        return None
    if len(frame) < MIN_CONTROL_POINTS:
        fail(f"{len(frame)} usable control point(s); at least {MIN_CONTROL_POINTS} are needed to register the survey")
        return None
    p = frame[["x", "y", "z"]].to_numpy(float)
    q = frame[["e", "n", "h"]].to_numpy(float)
    sigma = frame["sigma_m"].to_numpy(float) if "sigma_m" in frame else np.full(len(frame), np.nan)
    for j in range(1, len(p)):
        same = np.flatnonzero(np.linalg.norm(p[:j] - p[j], axis=1) < SAME_MARK_M)
        if len(same):
            i = int(same[0])
            fail_at(j, "x, y, z", f"{frame['point_id'].iloc[j]} is at the survey-frame position of "
                                  f"{frame['point_id'].iloc[i]} (line {int(frame['line'].iloc[i])}): one mark "
                                  "entered twice")
            return None
    weights = _weights(sigma)
    bad = ~(np.isfinite(weights) & (weights > 0))
    if bad.any():
        j = int(np.argmax(bad))
        fail_at(j, "sigma_m", f"{sigma[j]:g} m is too far from the other points' sigma "
                              f"(median {np.nanmedian(sigma):g} m) to weight the fit")
        return None
    try:
        fit = fit_similarity(p, q, weights, model)
    except ValueError as err:
        fail(f"the control points cannot fix a {model} transform: {err}", "x, y, z")
        return None
    if not abs(fit.scale - 1.0) <= MAX_SCALE_DEPARTURE:
        fail(f"the fitted scale is {fit.scale:.6g}, not near 1 (at most {MAX_SCALE_DEPARTURE:.0%} off): the "
             "survey-frame x, y, z and the site e, n, h are in different units (millimetres, feet?) or "
             "columns are swapped", "x, y, z, e, n, h")
        return None
    residuals = q - fit.apply_xyz(p)
    rms = float(np.sqrt((residuals ** 2).sum(axis=1).mean()))
    reg = Registration(path, fit, [str(v) for v in frame["point_id"]], p, q, residuals, rms, float(tolerance_m))
    if not rms <= tolerance_m:
        pid, worst = reg.worst
        k = int(np.argmax(reg.lengths))
        fail_at(k, "e, n, h", f"control points disagree: {model} fit RMS {rms:.3f} m exceeds the tolerance {tolerance_m:.3f} m "
             f"([survey] control_rms_max_m); largest residual at {pid}: {worst:.3f} m")
        return None
    return reg
