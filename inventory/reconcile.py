"""Survey stock against book stock: variance, significance, tolerance, scale diagnostics, journal.

Sign convention (written into the workbook as :data:`SIGN_CONVENTION`): variance = survey -
book. A positive variance means more on the ground than in the books (a gain); a positive
adjustment increases book stock.

Per pile p, with survey tonnes S and its 1-sigma s_S, book tonnes B and its 1-sigma s_B
(both at the survey instant):

* variance v = S - B, variance % = 100 v / B (undefined when B <= 0);
* sigma of the variance s_v = sqrt(s_S^2 + s_B^2) - survey and book come from independent
  measurements;
* *significant* when |v| > k s_v (k = ``significance_k``, 2 by default: about 95 % for a
  normal error);
* *out of tolerance* when |v| > tol% x |B| (the material's ``tolerance_pct``, else the site
  default). Both flags are shown; they answer different questions (is the difference real? is
  it too big to accept?).
* adjustment = v (``adjust_to = "survey"``) or v / 2 (``"midpoint"``: book moved half-way),
  closing at period end = B + adjustment + movements after the survey (cut-off roll-forward).

Scale diagnostics: a belt scale reading a fraction b high inflates the book of every pile it
fed by b x T (T = tonnes it delivered, negative for a reclaim belt), so v_p = -sum_s b_s T_ps
+ e_p. The biases b are estimated by weighted least squares over piles (and over earlier
months when their rows are given), weights 1 / (the pile's variance sigma without the belt
scales' own class terms)^2, with outlier piles (standardised residual > :data:`REJECT_Z`)
left out one at a time. A scale is named when |b| > k sigma_b and |b| exceeds its in-service
MPE.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass, field
from typing import Any, Mapping

import numpy as np
import pandas as pd

from ._metrology import belt_mpe_fraction
from .book import BookResult
from .results import JOURNAL_COLUMNS, PILE_COLUMNS, SCALE_COLUMNS

__all__ = [
    "CHANGE_COLUMNS",
    "MATERIAL_COLUMNS",
    "BIAS_ROW_COLUMNS",
    "REASON_CODES",
    "SIGN_CONVENTION",
    "Reconciliation",
    "ReconcileSettings",
    "reconcile",
]

#: Written into the workbook beside the journal.
SIGN_CONVENTION = (
    "variance = survey - book: positive means more stock on the ground than in the books. "
    "adjustment_t is posted to book stock: positive increases it (stock gain), negative "
    "decreases it (stock loss). closing_t = book at survey + adjustment + movements between "
    "the survey and the period end."
)

#: Reason codes of the adjustment journal (our own naming), checked in this order.
REASON_CODES: dict[str, str] = {
    "NOT_SURVEYED": "no survey figure for the pile: book carried forward unadjusted",
    "SCALE_BIAS": "at least half of it explained by the estimated bias of a named belt scale, the rest "
                  "within k sigma: have the scale checked",
    "WITHIN_SIGMA": "variance within k sigma of zero: inside the combined uncertainty of survey and book",
    "TRANSFER_SUSPECT": "mirrors an opposite variance on another pile of the same material: "
                        "suspected unrecorded transfer",
    "WITHIN_TOL": "significant but within the material's tolerance: routine stock adjustment",
    "UNEXPLAINED": "significant and out of tolerance with no explanation found: investigate before posting",
}

#: Per-material table.
MATERIAL_COLUMNS = [
    "material", "piles", "survey_t", "survey_sigma_t", "book_t", "book_sigma_t", "variance_t",
    "variance_pct", "variance_sigma_t", "significant", "tolerance_pct", "out_of_tolerance",
    "adjustment_t",
]

#: Measured change between two surveys against the net movement booked between them. The
#: variance splits into ``difference_t`` (this month's measurement and movement error) plus
#: ``opening_gap_t`` (the opening balance differs from the previous survey rolled forward).
CHANGE_COLUMNS = [
    "pile_id", "material", "previous_survey_t", "survey_t", "measured_change_t", "net_movement_t",
    "difference_t", "difference_sigma_t", "significant", "opening_gap_t",
]

#: Rows kept for scale diagnostics of later months (one per pile and belt scale; a pile fed
#: by no belt has scale_id None so it still counts in the fit).
BIAS_ROW_COLUMNS = ["period", "pile_id", "scale_id", "signed_t", "variance_t", "noise_sigma_t"]

#: A pile whose residual in the bias fit exceeds this many of its own sigmas is left out of the
#: fit (an unrecorded transfer or a wrong density there must not be read as a scale bias).
#: 3 sigma: common practice for outlier rejection.
REJECT_Z = 3.0

#: A scale bias is only named when at least this many pile-months bear on it: with one pile,
#: a scale bias cannot be told from an error on that pile.
MIN_PILE_MONTHS = 2

#: Floor on a pile's sigma in the bias fit, tonnes, so that a pile with no stated uncertainty
#: does not get infinite weight.
_SIGMA_FLOOR_T = 1e-6


@dataclass
class ReconcileSettings:
    """The ``[reconcile]`` section of site.toml that this module uses."""

    significance_k: float = 2.0
    default_tolerance_pct: float = 3.0
    adjust_to: str = "survey"


@dataclass
class Reconciliation:
    """The reconciliation of one close.

    Attributes
    ----------
    piles : DataFrame
        :data:`inventory.results.PILE_COLUMNS` (survey-side columns passed through from the
        survey table when present, NaN otherwise).
    materials : DataFrame
        :data:`MATERIAL_COLUMNS`.
    change : DataFrame or None
        :data:`CHANGE_COLUMNS` when a previous survey was given.
    scale_diagnostics : DataFrame
        :data:`inventory.results.SCALE_COLUMNS`.
    journal : DataFrame
        :data:`inventory.results.JOURNAL_COLUMNS`, one line per surveyed pile with a non-zero
        adjustment.
    bias_rows : DataFrame
        :data:`BIAS_ROW_COLUMNS` of this month, to be kept and passed back as ``history``.
    """

    piles: pd.DataFrame
    materials: pd.DataFrame
    change: pd.DataFrame | None
    scale_diagnostics: pd.DataFrame
    journal: pd.DataFrame
    bias_rows: pd.DataFrame
    settings: ReconcileSettings
    sign_convention: str = SIGN_CONVENTION
    reason_codes: dict = field(default_factory=lambda: dict(REASON_CODES))


def _get(obj: Any, name: str, default: Any = None) -> Any:
    if obj is None:
        return default
    if isinstance(obj, Mapping):
        return obj.get(name, default)
    return getattr(obj, name, default)


def _settings(config: Any) -> ReconcileSettings:
    if isinstance(config, ReconcileSettings):
        return config
    s = ReconcileSettings(
        significance_k=float(_get(config, "significance_k", 2.0)),
        default_tolerance_pct=float(_get(config, "default_tolerance_pct", 3.0)),
        adjust_to=str(_get(config, "adjust_to", "survey")),
    )
    if s.adjust_to not in ("survey", "midpoint"):
        raise ValueError(f"adjust_to must be 'survey' or 'midpoint', not {s.adjust_to!r}")
    if not s.significance_k > 0:
        raise ValueError("significance_k must be > 0")
    return s


def _material_info(materials: Any) -> dict[str, dict]:
    """{material: {tolerance_pct, density_sd_t_m3}} from a dict of Material or a DataFrame."""
    if materials is None:
        return {}
    if isinstance(materials, pd.DataFrame):
        return {
            str(r["material"]): {"tolerance_pct": r.get("tolerance_pct"), "density_sd_t_m3": r.get("density_sd_t_m3")}
            for _, r in materials.iterrows()
        }
    return {
        str(k): {"tolerance_pct": _get(m, "tolerance_pct"), "density_sd_t_m3": _get(m, "density_sd_t_m3")}
        for k, m in materials.items()
    }


def _num(v: Any) -> float:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return float("nan")
    return f


def reconcile(
    survey: pd.DataFrame,
    book: BookResult,
    materials: Any = None,
    config: Any = None,
    previous: pd.DataFrame | None = None,
    history: pd.DataFrame | None = None,
    period: str = "",
    scales: Mapping[str, Any] | None = None,
) -> Reconciliation:
    """Compare survey stock with book stock and propose the adjustment journal.

    Parameters
    ----------
    survey : DataFrame
        ``pile_id``, ``survey_t``, ``survey_sigma_t``; optional ``material`` and any other
        :data:`~inventory.results.PILE_COLUMNS` (volume, density, ...) which are passed
        through. With ``volume_m3`` and the material's ``density_sd_t_m3`` the density part of
        the survey sigma is treated as common to all piles of a material in the per-material
        totals.
    book : BookResult
        From :func:`inventory.book.book_stock` at the survey instant.
    materials : mapping or DataFrame, optional
        Per material ``tolerance_pct`` (None = site default) and ``density_sd_t_m3``.
    config : ReconcileSettings or site ``ReconcileConfig`` or dict, optional
        ``significance_k``, ``default_tolerance_pct``, ``adjust_to``.
    previous : DataFrame, optional
        The previous survey: ``pile_id``, ``survey_t``, optional ``survey_sigma_t`` and
        ``after_survey_net_t`` (tonnes booked between that survey and this period's opening;
        0 when the opening is the previous survey itself).
    history : DataFrame, optional
        :data:`BIAS_ROW_COLUMNS` rows of earlier months, pooled into the scale-bias fit.
    period : str
        Label of this month for ``bias_rows``.
    scales : mapping, optional
        ``{scale_id: Scale}``; needed to judge a bias against the scale's class MPE.

    Returns
    -------
    Reconciliation
    """
    cfg = _settings(config)
    k = cfg.significance_k
    info = _material_info(materials)
    bp = book.piles.copy()
    sv = pd.DataFrame(survey).copy()
    sv["pile_id"] = sv["pile_id"].astype(str)
    if "survey_sigma_t" not in sv:
        sv["survey_sigma_t"] = 0.0
    p = bp.merge(sv, on="pile_id", how="outer", suffixes=("_book", ""))
    if "material_book" in p:
        p["material"] = p["material"].where(p["material"].notna(), p["material_book"])
        p = p.drop(columns="material_book")
    for c in ("opening_t", "receipts_t", "dispatches_t", "transfers_in_t", "transfers_out_t",
              "book_t", "book_sigma_t", "after_survey_net_t", "opening_sigma_t"):
        p[c] = p[c].astype(float).fillna(0.0)  # a pile only the survey knows has no book yet
    p = p.sort_values("pile_id").reset_index(drop=True)
    S, B = p["survey_t"].astype(float), p["book_t"]
    surveyed = S.notna()
    p["variance_t"] = S - B
    p["variance_pct"] = np.where(B > 0, 100.0 * p["variance_t"] / B.where(B > 0), np.nan)
    if "opening_density_sigma_t" not in p:
        p["opening_density_sigma_t"] = 0.0
    p["opening_density_sigma_t"] = p["opening_density_sigma_t"].astype(float).fillna(0.0)
    p["_d_survey"] = _density_part(p, info)
    p["variance_sigma_t"] = _variance_sigma(p, p["book_sigma_t"])
    p["significant"] = surveyed & (p["variance_t"].abs() > k * p["variance_sigma_t"])
    tol = p["material"].map(lambda m: _num(info.get(m, {}).get("tolerance_pct")))
    p["tolerance_pct"] = tol.where(tol.notna() & (tol > 0), cfg.default_tolerance_pct).astype(float)
    p["out_of_tolerance"] = surveyed & (p["variance_t"].abs() > p["tolerance_pct"] / 100.0 * B.abs())

    diag, fitted, bias_rows = _scale_diagnostics(p, book, scales, history, k, period)
    reason, detail, flags = _reasons(p, fitted, diag, k)
    factor = 1.0 if cfg.adjust_to == "survey" else 0.5
    p["adjustment_t"] = np.where(surveyed, factor * p["variance_t"].fillna(0.0), 0.0)
    p["closing_t"] = B + p["adjustment_t"] + p["after_survey_net_t"]
    p["flags"] = flags
    p["reason_code"] = reason
    p["reason"] = detail
    for c in PILE_COLUMNS:
        if c not in p:
            p[c] = np.nan
    base_flags = []
    for r in p.itertuples():
        f = [] if not r.flags else [r.flags]
        if r.book_t < 0:
            f.insert(0, "negative_book")
        if not np.isfinite(r.survey_t):
            f.insert(0, "not_surveyed")
        if r.significant:
            f.insert(0, "significant")
        if r.out_of_tolerance:
            f.insert(0, "out_of_tolerance")
        base_flags.append(";".join(f))
    p["flags"] = base_flags
    piles_out = p[PILE_COLUMNS + ["reason_code", "reason"]].copy()

    journal = p[surveyed & (p["adjustment_t"] != 0)][["pile_id", "material", "adjustment_t", "reason_code", "reason"]]
    journal = journal.reset_index(drop=True)[JOURNAL_COLUMNS]
    materials_out = _per_material(p, book, info, k, factor)
    change = None if previous is None else _change(p, previous, k, info)
    return Reconciliation(
        piles=piles_out, materials=materials_out, change=change, scale_diagnostics=diag,
        journal=journal, bias_rows=bias_rows, settings=cfg,
    )


# ----------------------------------------------------------------------------- diagnostics


def _density_part(df: pd.DataFrame, info: dict) -> pd.Series:
    """The part of each survey sigma due to the bulk density (volume x density sd), tonnes.

    Taken from a ``density_sigma_t`` column when the survey table has one, else from
    ``volume_m3`` and its ``density_sd_t_m3`` column, else the material's
    ``density_sd_t_m3``; 0 when none is known (the whole
    survey sigma is then treated as independent of everything else).
    """
    sigma = df["survey_sigma_t"].astype(float).fillna(0.0) if "survey_sigma_t" in df else pd.Series(0.0, index=df.index)
    if "density_sigma_t" in df:
        d = pd.to_numeric(df["density_sigma_t"], errors="coerce")
    elif "volume_m3" in df and "density_sd_t_m3" in df:
        # the survey table's own density sd (a pile override may carry its own)
        d = pd.to_numeric(df["volume_m3"], errors="coerce") * pd.to_numeric(df["density_sd_t_m3"], errors="coerce")
    elif "volume_m3" in df and "material" in df:
        sd = df["material"].map(lambda m: _num(info.get(m, {}).get("density_sd_t_m3")))
        d = pd.to_numeric(df["volume_m3"], errors="coerce") * sd
    else:
        d = pd.Series(0.0, index=df.index)
    return np.minimum(d.fillna(0.0).abs(), sigma)


def _variance_sigma(p: pd.DataFrame, book_sigma: pd.Series) -> pd.Series:
    """sigma of survey - book, with the density error shared by survey and opening.

    When the opening is an adopted survey figure, the same table density erred in both: its
    part enters as (d_survey - d_opening) instead of in quadrature twice. Everything else
    (volume errors, scale errors, the rest of the opening) is independent.
    """
    s_ind = np.clip(p["survey_sigma_t"].astype(float).fillna(0.0) ** 2 - p["_d_survey"] ** 2, 0.0, None)
    b_ind = np.clip(book_sigma ** 2 - p["opening_density_sigma_t"] ** 2, 0.0, None)
    return np.sqrt(s_ind + b_ind + (p["_d_survey"] - p["opening_density_sigma_t"]) ** 2)


def _noise_sigma(p: pd.DataFrame, book: BookResult) -> pd.Series:
    """Per pile sigma of the variance without the belt scales' own class terms."""
    sl = book.scale_load
    other = sl[sl["kind"] != "belt"].groupby("pile_id")["sigma_t"].apply(lambda s: float(np.sum(np.square(s))))
    book_wo_belts = np.sqrt(p["opening_sigma_t"] ** 2 + p["pile_id"].map(other).fillna(0.0))
    return _variance_sigma(p, book_wo_belts)


def _scale_diagnostics(
    p: pd.DataFrame, book: BookResult, scales: Mapping[str, Any] | None, history: pd.DataFrame | None,
    k: float, period: str,
) -> tuple[pd.DataFrame, pd.Series, pd.DataFrame]:
    """Weighted least-squares belt-scale biases; fitted variance per pile; this month's rows."""
    sl = book.scale_load
    belts = sl[sl["kind"] == "belt"]
    noise = _noise_sigma(p, book)
    ok = p["survey_t"].notna()
    rows = []
    for pid, v, s in zip(p.loc[ok, "pile_id"], p.loc[ok, "variance_t"], noise[ok]):
        fed = belts[belts["pile_id"] == pid]
        if fed.empty:
            rows.append({"period": period, "pile_id": pid, "scale_id": None, "signed_t": 0.0,
                         "variance_t": v, "noise_sigma_t": s})
        for r in fed.itertuples():
            rows.append({"period": period, "pile_id": pid, "scale_id": r.scale_id, "signed_t": r.signed_t,
                         "variance_t": v, "noise_sigma_t": s})
    now = pd.DataFrame(rows, columns=BIAS_ROW_COLUMNS)
    pooled = now if history is None or len(history) == 0 else pd.concat([pd.DataFrame(history)[BIAS_ROW_COLUMNS], now], ignore_index=True)
    fitted = pd.Series(0.0, index=p.index)
    scale_ids = sorted(x for x in pooled["scale_id"].dropna().unique())
    if not scale_ids:
        return pd.DataFrame(columns=SCALE_COLUMNS), fitted, now

    # design: one row per (period, pile), one column per belt scale; v = X b, X = -T
    pooled = pooled.assign(period=pooled["period"].astype(str))
    keys = pooled[["period", "pile_id"]].drop_duplicates().reset_index(drop=True)
    key_index = {kk: i for i, kk in enumerate(zip(keys["period"], keys["pile_id"]))}
    X = np.zeros((len(keys), len(scale_ids)))
    v = np.zeros(len(keys))
    sig = np.zeros(len(keys))
    for r in pooled.itertuples():
        i = key_index[(r.period, r.pile_id)]
        v[i], sig[i] = r.variance_t, max(float(r.noise_sigma_t), _SIGMA_FLOOR_T)
        if r.scale_id is not None and not pd.isna(r.scale_id):
            X[i, scale_ids.index(r.scale_id)] -= r.signed_t
    use = np.isfinite(v)
    excluded: list[int] = []
    protected: set[int] = set()
    # Leave out gross outliers one at a time (worst first), judged against their stated
    # sigma; never more than half the rows, never a row whose scale would be left with no
    # data, and keep at least 2 degrees of freedom for the fit's own sigma.
    max_reject = int(use.sum()) // 2
    while True:
        b, cov, resid = _wls(X[use], v[use], sig[use])
        z = np.zeros(len(v))
        z[use] = np.abs(resid) / sig[use]
        z[list(protected)] = 0.0
        worst = int(np.argmax(z))
        dof_after = int(use.sum()) - 1 - np.linalg.matrix_rank(X[use]) if use.any() else 0
        if z[worst] <= REJECT_Z or len(excluded) >= max_reject or dof_after < 2:
            break
        trial = use.copy()
        trial[worst] = False
        if np.any(np.all(X[trial] == 0, axis=0) & np.any(X[use] != 0, axis=0)):
            protected.add(worst)
            continue
        use = trial
        excluded.append(worst)

    out = []
    this_period = keys["period"] == str(period)
    for j, sid in enumerate(scale_ids):
        col = X[:, j] != 0
        piles_fed = sorted(set(keys.loc[col & this_period.to_numpy(), "pile_id"]))
        tonnes = float(np.abs(X[col & this_period.to_numpy(), j]).sum())
        # b is the book's inflation per recorded tonne; a scale reading (1 + beta) x the true
        # mass inflates it by beta / (1 + beta) per recorded tonne, so beta = b / (1 - b).
        fb = float(b[j])
        sfb = float(np.sqrt(cov[j, j])) if np.isfinite(cov[j, j]) else float("nan")
        bj = fb / (1.0 - fb)
        sj = sfb / (1.0 - fb) ** 2
        mpe = float("nan")
        s_obj = (scales or {}).get(sid)
        if s_obj is not None:
            try:
                mpe = belt_mpe_fraction(_get(s_obj, "accuracy_class"), bool(_get(s_obj, "in_service", True)))
            except ValueError:
                mpe = float("nan")
        significant = np.isfinite(sj) and abs(bj) > k * sj
        beyond = np.isfinite(mpe) and abs(bj) > mpe
        n_used = int(col[use].sum())
        flagged = bool(significant and beyond and n_used >= MIN_PILE_MONTHS)
        months = keys.loc[col, "period"].nunique()
        basis = f"{n_used} pile-month(s)" + (f" over {months} months" if months > 1 else "")
        same_sign = _same_sign_note(p, piles_fed)
        excluded_here = [i for i in excluded if X[i, j] != 0]
        if n_used < MIN_PILE_MONTHS:
            why = (f"only {n_used} pile-month(s) left once outliers were set aside" if excluded_here
                   else "it fed one pile this month and there is no history")
            msg = (f"belt scale {sid}: {why}; {100 * bj:+.2f} % cannot be told from an error on that pile")
        elif flagged:
            msg = (f"belt scale {sid} appears to read {100 * bj:+.2f} % (+/- {100 * sj:.2f} %), beyond its "
                   f"in-service MPE of {100 * mpe:.2f} %: have it checked and recalibrated ({basis}; {same_sign})")
        elif significant:
            msg = (f"belt scale {sid} reads {100 * bj:+.2f} % (+/- {100 * sj:.2f} %), significant but within "
                   f"its MPE of {100 * mpe:.2f} % ({basis})")
        else:
            msg = f"no significant bias on belt scale {sid}: {100 * bj:+.2f} % (+/- {100 * sj:.2f} %) ({basis})"
        if excluded_here:
            left_out = sorted({f"{keys.loc[i, 'pile_id']}" + (f" ({keys.loc[i, 'period']})" if months > 1 else "")
                               for i in excluded_here})
            msg += "; set aside as outliers: " + ", ".join(left_out)
        out.append({"scale_id": sid, "piles": ",".join(piles_fed), "tonnes": tonnes, "bias_pct": 100 * bj,
                    "bias_sigma_pct": 100 * sj, "flagged": flagged, "message": msg})
        if flagged:
            # the part of this month's variance the flagged scale explains
            rows_now = np.where(this_period.to_numpy())[0]
            for i in rows_now:
                if X[i, j] != 0:
                    fitted[p.index[p["pile_id"] == keys.loc[i, "pile_id"]]] += X[i, j] * fb
    return pd.DataFrame(out, columns=SCALE_COLUMNS), fitted, now


def _same_sign_note(p: pd.DataFrame, piles_fed: list[str]) -> str:
    v = p.set_index("pile_id").loc[piles_fed, "variance_t"] if piles_fed else pd.Series(dtype=float)
    neg, pos = int((v < 0).sum()), int((v > 0).sum())
    return f"{neg} of its {len(v)} piles short, {pos} over"


def _wls(X: np.ndarray, v: np.ndarray, sig: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Weighted least squares with the covariance scaled up by the Birge ratio when the
    scatter exceeds the stated sigmas (never down: the stated sigmas are a floor)."""
    n, m = X.shape
    w = 1.0 / sig
    A, y = X * w[:, None], v * w
    b, *_ = np.linalg.lstsq(A, y, rcond=None)
    resid = v - X @ b
    AtA = A.T @ A
    cov = np.linalg.pinv(AtA)
    # columns the data cannot estimate get an infinite sigma
    dead = np.diag(AtA) == 0
    cov[dead, dead] = np.inf
    dof = n - np.linalg.matrix_rank(A)
    if dof > 0:
        chi2 = float(np.sum((resid * w) ** 2))
        cov = cov * max(1.0, chi2 / dof)
    return b, cov, resid


def _reasons(p: pd.DataFrame, fitted: pd.Series, diag: pd.DataFrame, k: float) -> tuple[list, list, list]:
    """Reason code, reason text and extra flags per pile, in REASON_CODES order."""
    n = len(p)
    code = [""] * n
    text = [""] * n
    flags = [""] * n
    flagged = diag[diag["flagged"]] if len(diag) else diag
    scale_of: dict[str, list[str]] = {}
    for r in flagged.itertuples():
        for pid in str(r.piles).split(","):
            scale_of.setdefault(pid, []).append(r.scale_id)
    residual = p["variance_t"] - fitted
    sig = p["variance_sigma_t"]
    # pairs of opposite significant variances of one material that cancel within k sigma
    cand = [i for i in range(n) if p.loc[i, "significant"] and not (
        p.loc[i, "pile_id"] in scale_of and abs(residual[i]) <= k * sig[i])]
    pairs = []
    for i, j in itertools.combinations(cand, 2):
        if p.loc[i, "material"] != p.loc[j, "material"] or np.sign(residual[i]) == np.sign(residual[j]):
            continue
        s = np.hypot(sig[i], sig[j])
        if abs(residual[i] + residual[j]) <= k * s:
            pairs.append((abs(residual[i] + residual[j]) / max(s, 1e-12), i, j))
    partner: dict[int, int] = {}
    for _, i, j in sorted(pairs):
        if i not in partner and j not in partner:
            partner[i], partner[j] = j, i
    for i in range(n):
        pid = p.loc[i, "pile_id"]
        v = p.loc[i, "variance_t"]
        if not np.isfinite(p.loc[i, "survey_t"]):
            code[i] = "NOT_SURVEYED"
            text[i] = REASON_CODES["NOT_SURVEYED"]
        elif pid in scale_of and abs(residual[i]) <= k * sig[i] and abs(fitted[i]) >= 0.5 * abs(v):
            code[i] = "SCALE_BIAS"
            text[i] = f"{fitted[i]:+.1f} t of {v:+.1f} t explained by belt scale {', '.join(scale_of[pid])}"
            flags[i] = "scale:" + ",".join(scale_of[pid])
        elif not p.loc[i, "significant"]:
            code[i] = "WITHIN_SIGMA"
            text[i] = f"{v:+.1f} t is within {k:g} sigma ({k * sig[i]:.1f} t)"
            if p.loc[i, "out_of_tolerance"]:
                text[i] += " although out of tolerance: the measurement is too uncertain to judge this pile"
        elif i in partner:
            other = p.loc[partner[i], "pile_id"]
            code[i] = "TRANSFER_SUSPECT"
            own = f"{v:+.1f} t" + (f" ({residual[i]:+.1f} t net of scale bias)" if fitted[i] != 0 else "")
            j = partner[i]
            theirs = f"{residual[j]:+.1f} t"
            text[i] = (f"{own} mirrors {theirs} on pile {other}: "
                       f"suspected unrecorded transfer {'to' if v < 0 else 'from'} {other}")
            flags[i] = f"pair:{other}"
        elif not p.loc[i, "out_of_tolerance"]:
            code[i] = "WITHIN_TOL"
            text[i] = f"{v:+.1f} t ({p.loc[i, 'variance_pct']:+.2f} %) within the {p.loc[i, 'tolerance_pct']:g} % tolerance"
        else:
            code[i] = "UNEXPLAINED"
            text[i] = (f"{v:+.1f} t ({p.loc[i, 'variance_pct']:+.2f} %) beyond the {p.loc[i, 'tolerance_pct']:g} % "
                       f"tolerance and {abs(v) / max(sig[i], 1e-12):.1f} sigma: investigate before posting")
    return code, text, flags


# ----------------------------------------------------------------------------- aggregates


def _per_material(p: pd.DataFrame, book: BookResult, info: dict, k: float, factor: float) -> pd.DataFrame:  # noqa: C901
    """Totals per material with correlations handled: one scale's error is common to all the
    piles it weighed for (linear within a scale, quadrature across scales); one material's
    density error is common to all its piles."""
    sl = book.scale_load.merge(p[["pile_id", "material"]], on="pile_id", how="left")
    rows = []
    for mat, g in p.groupby("material", sort=True, dropna=False):
        sv = g[g["survey_t"].notna()]
        sigma_S = sv["survey_sigma_t"].astype(float).fillna(0.0)
        d_S, d_O = sv["_d_survey"], sv["opening_density_sigma_t"]
        s_ind = float(np.clip(sigma_S ** 2 - d_S ** 2, 0.0, None).sum())
        # density: one error for all piles of the material, in this survey and in any opening
        # that was an adopted survey
        s_survey = float(np.sqrt(s_ind + d_S.sum() ** 2))
        per_scale = sl[sl["pile_id"].isin(sv["pile_id"])].groupby("scale_id")["sigma_t"].sum()
        o_ind = float(np.clip(sv["opening_sigma_t"] ** 2 - d_O ** 2, 0.0, None).sum())
        s_book = float(np.sqrt((per_scale ** 2).sum() + o_ind + d_O.sum() ** 2))
        s_v_val = float(np.sqrt(s_ind + (per_scale ** 2).sum() + o_ind + (d_S.sum() - d_O.sum()) ** 2))
        S, Bk = float(sv["survey_t"].sum()), float(sv["book_t"].sum())
        v = S - Bk
        s_v = s_v_val
        tol = _num(info.get(mat, {}).get("tolerance_pct"))
        tol = tol if np.isfinite(tol) and tol > 0 else float(g["tolerance_pct"].iloc[0])
        rows.append({
            "material": mat, "piles": len(g), "survey_t": S, "survey_sigma_t": s_survey, "book_t": Bk,
            "book_sigma_t": s_book, "variance_t": v, "variance_pct": 100 * v / Bk if Bk > 0 else np.nan,
            "variance_sigma_t": s_v, "significant": bool(abs(v) > k * s_v), "tolerance_pct": tol,
            "out_of_tolerance": bool(abs(v) > tol / 100 * abs(Bk)), "adjustment_t": factor * v,
        })
    return pd.DataFrame(rows, columns=MATERIAL_COLUMNS)


def _change(p: pd.DataFrame, previous: pd.DataFrame, k: float, info: dict) -> pd.DataFrame:
    """Measured change between two surveys vs the net movement booked between them.

    net movement = (movements from the previous survey to this opening) + (book - opening);
    the opening balance drops out, so a difference here is measurement (or movement) error,
    while ``opening_gap_t`` = variance - difference is the opening balance's own error.
    """
    prev = pd.DataFrame(previous).copy()
    prev["pile_id"] = prev["pile_id"].astype(str)
    prev = prev.rename(columns={"survey_t": "previous_survey_t", "survey_sigma_t": "previous_sigma_t",
                                "after_survey_net_t": "previous_after_t"}).drop(columns=["material"], errors="ignore")
    for c in ("previous_sigma_t", "previous_after_t"):
        if c not in prev:
            prev[c] = 0.0
    prev["material"] = prev["pile_id"].map(dict(zip(p["pile_id"], p["material"])))
    prev["survey_sigma_t"] = prev["previous_sigma_t"]
    prev["previous_d_t"] = _density_part(prev, info)
    m = p.merge(prev[["pile_id", "previous_survey_t", "previous_sigma_t", "previous_after_t", "previous_d_t"]],
                on="pile_id", how="inner")
    m["measured_change_t"] = m["survey_t"] - m["previous_survey_t"]
    m["net_movement_t"] = m["previous_after_t"].fillna(0.0) + (m["book_t"] - m["opening_t"])
    m["difference_t"] = m["measured_change_t"] - m["net_movement_t"]
    movement_var = np.clip(m["book_sigma_t"] ** 2 - m["opening_sigma_t"] ** 2, 0.0, None)
    # the table density erred alike in both surveys: its parts subtract
    now_ind = np.clip(m["survey_sigma_t"].astype(float).fillna(0.0) ** 2 - m["_d_survey"] ** 2, 0.0, None)
    prev_ind = np.clip(m["previous_sigma_t"].astype(float).fillna(0.0) ** 2 - m["previous_d_t"] ** 2, 0.0, None)
    m["difference_sigma_t"] = np.sqrt(now_ind + prev_ind + (m["_d_survey"] - m["previous_d_t"]) ** 2 + movement_var)
    m["significant"] = m["difference_t"].abs() > k * m["difference_sigma_t"]
    gap = m["variance_t"] - m["difference_t"]
    m["opening_gap_t"] = gap.where(gap.abs() > 1e-9, 0.0)  # rounding dust when opening = previous survey
    return m[CHANGE_COLUMNS].sort_values("pile_id").reset_index(drop=True)
