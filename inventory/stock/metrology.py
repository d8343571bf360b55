"""Maximum permissible errors of weighing instruments, and how we turn them into a sigma.

The numbers here come from the OIML International Recommendations for the two kinds of
instrument whose records make up a bulk site's books. They were written down from memory of
the editions named beside them and have not been re-read against the published text: check
them against the edition your national metrology service enforces before relying on them
(local legal metrology rules take precedence over anything in this module).

Two modelling choices live here too, so that book.py and reconcile.py use one rule:

* A maximum permissible error (MPE) is a *bound*, not a standard deviation. We treat the
  error of a verified instrument as equally likely anywhere inside +/-MPE (a rectangular
  distribution), whose standard deviation is MPE / sqrt(3) - JCGM 100:2008 (GUM) 4.3.7
  (from memory). That is the usual Type B evaluation when all one knows is a bound.
* The error of one instrument over a month is mostly systematic (its calibration is off by
  the same fraction all month), so within one instrument the bounds of its weighings add
  *linearly*; different instruments are calibrated independently, so their sigmas add in
  *quadrature*. See :func:`inventory.stock.book.book_stock` for where that is applied.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = [
    "BELT_MPE_PCT_INITIAL",
    "IN_SERVICE_FACTOR",
    "NAWI_MPE_STEPS",
    "RECTANGULAR_SIGMA_PER_BOUND",
    "belt_mpe_fraction",
    "weighbridge_mpe_t",
]

#: Belt weighers (continuous totalising automatic weighing instruments), OIML R 50-1:2014
#: clause 2.2 Table 1 (from memory): maximum permissible error on the totalised load, percent,
#: at initial verification, by accuracy class. The class scheme 0.2 / 0.5 / 1 / 2 is
#: confirmed; the exact table values are recalled, not re-read.
BELT_MPE_PCT_INITIAL: dict[str, float] = {"0.2": 0.10, "0.5": 0.25, "1": 0.5, "2": 1.0}

#: In-service MPE is twice the initial-verification MPE: OIML R 50-1:2014 (belt weighers) and
#: OIML R 76-1:2006 clause 3.5.2 (non-automatic instruments), both from memory.
IN_SERVICE_FACTOR = 2.0

#: Non-automatic weighing instruments (weighbridges), OIML R 76-1:2006 clause 3.5.1 Table 6
#: (from memory; the class III rows also appear in UK SI 1995/1907 Schedule 2): MPE at initial
#: verification in verification scale intervals e, by load m expressed in e. Each entry is a
#: list of (upper bound of the load range in e, MPE in e); loads beyond the last bound (above
#: the instrument's capacity) keep the last MPE.
NAWI_MPE_STEPS: dict[str, list[tuple[float, float]]] = {
    "I": [(50_000, 0.5), (200_000, 1.0), (math.inf, 1.5)],
    "II": [(5_000, 0.5), (20_000, 1.0), (100_000, 1.5)],
    "III": [(500, 0.5), (2_000, 1.0), (10_000, 1.5)],
    "IIII": [(50, 0.5), (200, 1.0), (1_000, 1.5)],
}

#: sigma = bound / sqrt(3) for a rectangular distribution of half-width `bound`,
#: JCGM 100:2008 (GUM) 4.3.7 (from memory).
RECTANGULAR_SIGMA_PER_BOUND = 1.0 / math.sqrt(3.0)


def belt_mpe_fraction(accuracy_class: str, in_service: bool = True) -> float:
    """MPE of a belt weigher on its totalised load, as a fraction of that load.

    Parameters
    ----------
    accuracy_class : str
        OIML R 50 accuracy class, one of ``"0.2"``, ``"0.5"``, ``"1"``, ``"2"``.
    in_service : bool
        True for the in-service MPE (twice the initial-verification one).

    Returns
    -------
    float
        e.g. 0.01 for class 1 in service.

    Examples
    --------
    >>> belt_mpe_fraction("0.5", in_service=False)
    0.0025
    """
    key = str(accuracy_class).strip()
    if key not in BELT_MPE_PCT_INITIAL:
        raise ValueError(
            f"belt weigher accuracy class {accuracy_class!r} is not an OIML R 50 class "
            f"({', '.join(BELT_MPE_PCT_INITIAL)})"
        )
    factor = IN_SERVICE_FACTOR if in_service else 1.0
    return BELT_MPE_PCT_INITIAL[key] * factor / 100.0


def weighbridge_mpe_t(
    load_t: np.ndarray | float, accuracy_class: str, scale_interval_kg: float, in_service: bool = True
) -> np.ndarray:
    """MPE of one weighing on a non-automatic instrument, tonnes, by load.

    Parameters
    ----------
    load_t : array_like
        Load on the instrument for each weighing (a gross or a tare), tonnes.
    accuracy_class : str
        OIML R 76 accuracy class ``"I"``, ``"II"``, ``"III"`` or ``"IIII"``.
    scale_interval_kg : float
        Verification scale interval e, kilograms.
    in_service : bool
        True for the in-service MPE (twice the initial-verification one).

    Returns
    -------
    numpy.ndarray
        MPE per weighing, tonnes (positive).

    Examples
    --------
    >>> weighbridge_mpe_t([5.0, 30.0, 45.0], "III", 20.0, in_service=False)
    array([0.01, 0.02, 0.03])
    """
    key = str(accuracy_class).strip()
    if key not in NAWI_MPE_STEPS:
        raise ValueError(
            f"weighbridge accuracy class {accuracy_class!r} is not an OIML R 76 class "
            f"({', '.join(NAWI_MPE_STEPS)})"
        )
    if not (scale_interval_kg and scale_interval_kg > 0):
        raise ValueError("a weighbridge needs its verification scale interval e (scale_interval_kg > 0)")
    e_t = float(scale_interval_kg) / 1000.0
    m_e = np.abs(np.asarray(load_t, dtype=float)) / e_t
    bounds = np.array([b for b, _ in NAWI_MPE_STEPS[key]])
    steps = np.array([s for _, s in NAWI_MPE_STEPS[key]])
    # Ranges are "0 <= m <= b1", "b1 < m <= b2", ...: searchsorted(side="left") puts m == b1
    # in the first range, as the table reads.
    idx = np.minimum(np.searchsorted(bounds, m_e, side="left"), len(steps) - 1)
    factor = IN_SERVICE_FACTOR if in_service else 1.0
    return steps[idx] * e_t * factor
