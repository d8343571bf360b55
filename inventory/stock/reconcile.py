"""Survey stock against book stock: variance, significance, tolerance, scale diagnostics, journal.

Sign convention (:data:`SIGN_CONVENTION`): variance = survey - book; a positive adjustment
increases book stock. Per pile and per material the variance is tested against k sigma
(significance) and against the material's tolerance; its sigma counts once the errors that
an opening that was an earlier survey shares with this survey (the table density, a fixed
base). Belt-scale biases are estimated by weighted least squares over this month's piles
and over the pooled history; the journal gives each adjustment a reason code.

The variance and its sigma, the shared terms and the scale diagnostics:
docs/uncertainty.md.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass, field
from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd

from inventory.stock.metrology import belt_mpe_fraction
from inventory.site.load import JournalConfig, Material, ReconcileConfig, Scale
from inventory.stock.book import BookResult
from inventory.stock.totals import close_sigmas, close_site_totals
from inventory.model.results import JOURNAL_COLUMNS, LINE_COLUMNS, PILE_COLUMNS, POSTING_COLUMNS, SCALE_COLUMNS
from inventory.model.texts import REASON_CODES, SIGN_CONVENTION

__all__ = [
    "CHANGE_COLUMNS",
    "MATERIAL_COLUMNS",
    "BIAS_ROW_COLUMNS",
    "REASON_CODES",
    "SIGN_CONVENTION",
    "Reconciliation",
    "ReconcileSettings",
    "reconcile",
    "value_lines",
    "ADJUST_POLICIES",
]

#: Adjustment policies (site.toml ``[reconcile] adjust``): which piles' adjustments are
#: posted; the others are listed in the journal with status "hold".
ADJUST_POLICIES = ("all", "significant", "out_of_tolerance")

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

#: Bases that are the same surface in every survey (a surveyed floor raster, a level): their
#: error is common to this survey and to an opening that was an earlier survey.
FIXED_BASES = ("floor", "level")

#: A pile whose residual in the bias fit exceeds this many of its own sigmas is left out of the
#: fit (an unrecorded transfer or a wrong density there must not be read as a scale bias).
#: 3 sigma: common practice for outlier rejection.
REJECT_Z = 3.0

#: A variance pairs with a significant opposite one as the other side of a suspected
#: transfer only if it leans that way by at least this many of its own sigmas (our choice:
#: one sigma keeps a pile whose variance is noise around zero out of a pair, and lets a
#: poorly scanned receiving pile in).
PAIR_PARTNER_MIN_Z = 1.0

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
    adjust: str = "all"
    hold_unexplained: bool = True


@dataclass
class Reconciliation:
    """The reconciliation of one close.

    Attributes
    ----------
    piles : DataFrame
        :data:`inventory.model.results.PILE_COLUMNS` (survey-side columns passed through from the
        survey table when present, NaN otherwise).
    materials : DataFrame
        :data:`MATERIAL_COLUMNS`.
    change : DataFrame or None
        :data:`CHANGE_COLUMNS` when a previous survey was given.
    scale_diagnostics : DataFrame
        :data:`inventory.model.results.SCALE_COLUMNS`.
    journal : DataFrame
        :data:`inventory.model.results.JOURNAL_COLUMNS`, one line per surveyed pile with a non-zero
        posted adjustment (what the ledger keeps).
    lines : DataFrame
        :data:`inventory.model.results.LINE_COLUMNS`: the journal as lines to post or hold
        (adjustments, proposed transfers and their residuals), before values and codes
        (:func:`value_lines`).
    bias_rows : DataFrame
        :data:`BIAS_ROW_COLUMNS` of this month, to be kept and passed back as ``history``.
    site_totals : DataFrame
        The site's totals with their sigmas (:func:`inventory.stock.totals.close_site_totals`).
    """

    piles: pd.DataFrame
    materials: pd.DataFrame
    change: pd.DataFrame | None
    scale_diagnostics: pd.DataFrame
    journal: pd.DataFrame
    bias_rows: pd.DataFrame
    settings: ReconcileSettings
    lines: pd.DataFrame = field(default_factory=lambda: pd.DataFrame(columns=LINE_COLUMNS))
    sign_convention: str = SIGN_CONVENTION
    reason_codes: dict = field(default_factory=lambda: dict(REASON_CODES))
    #: The site's totals (:data:`inventory.stock.totals.SITE_TOTAL_COLUMNS`, one row), their
    #: sigmas with shared errors counted once.
    site_totals: pd.DataFrame | None = None


def _settings(config: ReconcileSettings | ReconcileConfig | None) -> ReconcileSettings:
    if config is None:
        s = ReconcileSettings()
    else:
        s = ReconcileSettings(
            significance_k=float(config.significance_k),
            default_tolerance_pct=float(config.default_tolerance_pct),
            adjust_to=str(config.adjust_to),
            adjust=str(getattr(config, "adjust", "all")),
            hold_unexplained=bool(getattr(config, "hold_unexplained", True)),
        )
    if s.adjust_to not in ("survey", "midpoint"):
        raise ValueError(f"adjust_to must be 'survey' or 'midpoint', not {s.adjust_to!r}")
    if s.adjust not in ADJUST_POLICIES:
        raise ValueError(f"adjust must be one of {', '.join(ADJUST_POLICIES)}, not {s.adjust!r}")
    if not s.significance_k > 0:
        raise ValueError("significance_k must be > 0")
    return s


def _material_info(materials: Mapping[str, Material] | None) -> dict[str, dict]:
    """{material: {tolerance_pct, density_sd_t_m3}} from the site's materials."""
    return {
        str(k): {"tolerance_pct": m.tolerance_pct, "density_sd_t_m3": m.density_sd_t_m3}
        for k, m in (materials or {}).items()
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
    materials: Mapping[str, Material] | None = None,
    config: ReconcileSettings | ReconcileConfig | None = None,
    previous: pd.DataFrame | None = None,
    history: pd.DataFrame | None = None,
    period: str = "",
    scales: Mapping[str, Scale] | None = None,
) -> Reconciliation:
    """Compare survey stock with book stock and propose the adjustment journal.

    Parameters
    ----------
    survey : DataFrame
        ``pile_id``, ``survey_t``, ``survey_sigma_t``; optional ``material`` and any other
        :data:`~inventory.model.results.PILE_COLUMNS` (volume, density, ...) which are passed
        through. With ``volume_m3`` and the material's ``density_sd_t_m3`` the density part of
        the survey sigma is treated as common to all piles of a material in the per-material
        totals.
    book : BookResult
        From :func:`inventory.stock.book.book_stock` at the survey instant.
    materials : mapping of str to Material, optional
        The site's materials: ``tolerance_pct`` (None = site default) and ``density_sd_t_m3``.
    config : ReconcileSettings or the site's ReconcileConfig, optional
        ``significance_k``, ``default_tolerance_pct``, ``adjust_to`` (defaults when None).
    previous : DataFrame, optional
        The previous survey: ``pile_id``, ``survey_t``, optional ``survey_sigma_t`` and
        ``after_survey_net_t`` (tonnes booked between that survey and this period's opening;
        0 when the opening is the previous survey itself).
    history : DataFrame, optional
        :data:`BIAS_ROW_COLUMNS` rows of earlier months (``Ledger.scale_fit_history``): a
        second scale-bias fit pools them with this month's, reported beside this month's
        own (``history_bias_pct``).
    period : str
        Label of this month for ``bias_rows``.
    scales : mapping of str to Scale, optional
        The site's scales; needed to judge a bias against the scale's class MPE.

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
    for c in ("opening_density_sigma_t", "opening_base_sigma_t"):
        if c not in p:
            p[c] = 0.0
        p[c] = p[c].astype(float).fillna(0.0)
    p["_d_survey"] = _density_part(p, info)
    p["_g_survey"] = _base_part(p)
    p["base_sigma_t"] = p["_g_survey"].where(surveyed)
    p["variance_sigma_t"] = _variance_sigma(p, p["book_sigma_t"])
    p["significant"] = surveyed & (p["variance_t"].abs() > k * p["variance_sigma_t"])
    tol = p["material"].map(lambda m: _num(info.get(m, {}).get("tolerance_pct")))
    p["tolerance_pct"] = tol.where(tol.notna() & (tol > 0), cfg.default_tolerance_pct).astype(float)
    p["out_of_tolerance"] = surveyed & (p["variance_t"].abs() > p["tolerance_pct"] / 100.0 * B.abs())

    diag, fitted, bias_rows = _scale_diagnostics(p, book, scales, history, k, period)
    reason, detail, flags, partner = _reasons(p, fitted, diag, k)
    # the volume step's flags (low_scan, unfilled_gap, below_base, ...) are kept after
    # reconciliation's own
    survey_flags = [_flag_list(v) for v in p["flags"]] if "flags" in p else [[] for _ in range(len(p))]
    for i, f in enumerate(survey_flags):
        if LOW_SCAN_FLAG in f:
            detail[i] += _low_scan_note(p.loc[i, "scanned_fraction"] if "scanned_fraction" in p else np.nan)
    p["reason_code"] = reason
    p["reason"] = detail
    factor = 1.0 if cfg.adjust_to == "survey" else 0.5
    lines = _journal_lines(p, reason, partner, cfg, factor)
    p["adjustment_t"] = _posted(p, lines)
    p["closing_t"] = B + p["adjustment_t"] + p["after_survey_net_t"]
    for c in PILE_COLUMNS:
        if c not in p:
            p[c] = np.nan
    all_flags = []
    for r, own, extra in zip(p.itertuples(), survey_flags, flags):
        f = []
        if r.out_of_tolerance:
            f.append("out_of_tolerance")
        if r.significant:
            f.append("significant")
        if not np.isfinite(r.survey_t):
            f.append("not_surveyed")
        if r.book_t < 0:
            f.append("negative_book")
        f += _flag_list(extra) + own
        all_flags.append(";".join(dict.fromkeys(f)))
    p["flags"] = all_flags
    piles_out = p[PILE_COLUMNS + ["reason_code", "reason"]].copy()

    journal = p[surveyed & (p["adjustment_t"] != 0)][["pile_id", "material", "adjustment_t", "reason_code", "reason"]]
    journal = journal.reset_index(drop=True)[JOURNAL_COLUMNS]
    materials_out = _per_material(p, book, info, k, factor)
    site_out = close_site_totals(p, book.scale_load)
    change = None if previous is None else _change(p, previous, k, info)
    return Reconciliation(
        piles=piles_out, materials=materials_out, change=change, scale_diagnostics=diag,
        journal=journal, bias_rows=bias_rows, settings=cfg, site_totals=site_out, lines=lines,
    )


# ----------------------------------------------------------------------------- journal lines


def _admitted(policy: str, significant: bool, out_of_tolerance: bool) -> bool:
    """Whether the adjustment policy posts a line of this significance and tolerance."""
    if policy == "significant":
        return bool(significant)
    if policy == "out_of_tolerance":
        return bool(out_of_tolerance)
    return True


_HELD_WHY = {
    "significant": "held: within k sigma, and the policy posts only variances beyond k sigma",
    "out_of_tolerance": "held: within tolerance, and the policy posts only variances beyond tolerance",
}


def _journal_lines(p: pd.DataFrame, reason: list, partner: dict, cfg: ReconcileSettings,
                   factor: float) -> pd.DataFrame:
    """The journal as lines (:data:`LINE_COLUMNS`), each with status "post" or "hold".

    One adjustment line per surveyed pile with a variance; a suspected transfer pair instead
    gives one proposed transfer line (from the pile short to the pile over, the pair's
    transfer estimate) plus one residual line per pile (its variance less the transfer).
    Quantities are ``factor`` x the variance (1 to survey, 1/2 to the midpoint). A line is
    held when the policy (``cfg.adjust``) does not post it, or when it is UNEXPLAINED and
    ``cfg.hold_unexplained``.
    """
    k = cfg.significance_k
    rows: list[dict] = []
    done: set[int] = set()

    def add(pile, to_pile, material, qty, code, text, post, why):
        if not np.isfinite(qty) or qty == 0:
            return
        rows.append({"pile_id": pile, "to_pile_id": to_pile, "material": material, "quantity_t": float(qty),
                     "reason_code": code, "reason": text if post else f"{text}; {why}",
                     "status": "post" if post else "hold"})

    for i in range(len(p)):
        if i in done or not np.isfinite(p.loc[i, "survey_t"]):
            continue
        pid, mat, v = p.loc[i, "pile_id"], p.loc[i, "material"], float(p.loc[i, "variance_t"])
        if i not in partner:
            code = reason[i]
            if code == "UNEXPLAINED" and cfg.hold_unexplained:
                post, why = False, "held: investigate before posting (hold_unexplained)"
            else:
                post = _admitted(cfg.adjust, p.loc[i, "significant"], p.loc[i, "out_of_tolerance"])
                why = _HELD_WHY.get(cfg.adjust, "")
            add(pid, None, mat, factor * v, code, p.loc[i, "reason"], post, why)
            continue
        j, t, st = partner[i]
        done |= {i, j}
        src, dst = (i, j) if v < 0 else (j, i)
        s_id, d_id = p.loc[src, "pile_id"], p.loc[dst, "pile_id"]
        oot = bool(p.loc[src, "out_of_tolerance"] or p.loc[dst, "out_of_tolerance"])
        add(s_id, d_id, mat, factor * t, "TRANSFER",
            f"proposed transfer of {t:.1f} t (+/- {st:.1f} t) from {s_id} to {d_id}: the two variances "
            "mirror each other; book it as a transfer once confirmed",
            _admitted(cfg.adjust, True, oot), _HELD_WHY.get(cfg.adjust, ""))
        for q, sign in ((src, 1.0), (dst, -1.0)):
            vq = float(p.loc[q, "variance_t"])
            r = vq + sign * t
            sig_q = float(p.loc[q, "variance_sigma_t"])
            tol_q = p.loc[q, "tolerance_pct"] / 100.0 * abs(p.loc[q, "book_t"])
            sig_r, oot_r = abs(r) > k * sig_q, abs(r) > tol_q
            within = f"within {k:g} sigma ({k * sig_q:.1f} t)" if not sig_r else f"beyond {k:g} sigma ({k * sig_q:.1f} t)"
            add(p.loc[q, "pile_id"], None, p.loc[q, "material"], factor * r, "TRANSFER_RESIDUAL",
                f"variance {vq:+.1f} t less the proposed transfer of {t:.1f} t leaves {r:+.1f} t, {within}",
                _admitted(cfg.adjust, sig_r, oot_r), _HELD_WHY.get(cfg.adjust, ""))
    out = pd.DataFrame(rows, columns=[c for c in LINE_COLUMNS if c != "line"])
    out.insert(0, "line", np.arange(1, len(out) + 1))
    return out[LINE_COLUMNS]


def _posted(p: pd.DataFrame, lines: pd.DataFrame) -> pd.Series:
    """Each pile's posted adjustment, tonnes: the sum of its posted lines (a transfer line
    takes its quantity off ``pile_id`` and puts it on ``to_pile_id``)."""
    adj = pd.Series(0.0, index=p["pile_id"].to_numpy())
    for r in lines[lines["status"] == "post"].itertuples():
        if r.to_pile_id is not None and not pd.isna(r.to_pile_id):
            adj[r.pile_id] -= r.quantity_t
            adj[r.to_pile_id] += r.quantity_t
        else:
            adj[r.pile_id] += r.quantity_t
    return pd.Series(adj.to_numpy(), index=p.index)


def value_lines(lines: pd.DataFrame, materials: Mapping[str, Material] | None = None,
                journal: JournalConfig | None = None) -> pd.DataFrame:
    """The journal lines with unit, value, currency, account and location codes.

    Parameters
    ----------
    lines : DataFrame
        :data:`LINE_COLUMNS` (``Reconciliation.lines``).
    materials : mapping of str to Material, optional
        ``unit_cost`` per material (value = quantity x unit cost; empty when unknown).
    journal : JournalConfig, optional
        site.toml ``[journal]``: currency, account code by material, location code by pile.

    Returns
    -------
    DataFrame
        :data:`POSTING_COLUMNS` less ``period``, ``posting_date`` and ``close_id``, which the
        exporter adds once the ledger has reserved the close.
    """
    cfg = journal or JournalConfig()
    out = pd.DataFrame(lines).copy()
    cost = {str(k): (np.nan if m.unit_cost is None else float(m.unit_cost)) for k, m in (materials or {}).items()}
    out["unit"] = "t"
    out["unit_cost"] = out["material"].map(lambda m: cost.get(str(m), np.nan)).astype(float)
    out["value"] = out["quantity_t"].astype(float) * out["unit_cost"]
    out["currency"] = cfg.currency
    out["account"] = out["material"].map(lambda m: cfg.accounts.get(str(m)))
    out["location"] = out["pile_id"].map(lambda x: cfg.locations.get(str(x)))
    out["to_location"] = out["to_pile_id"].map(
        lambda x: None if x is None or pd.isna(x) else cfg.locations.get(str(x)))
    return out[[c for c in POSTING_COLUMNS if c not in ("period", "posting_date", "close_id")]]


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


def _base_part(df: pd.DataFrame) -> pd.Series:
    """The part of each survey sigma due to a fixed base, tonnes (0 for a toe base).

    A surveyed floor raster or a level is the same surface in every survey, so its error
    (``sigma_base_m3`` of :func:`inventory.volume.measure.measure_piles`, the floor survey's stated
    sigma over the footprint) is the same error in this survey and in an opening that was
    an earlier survey: it cancels in the variance instead of adding twice. A toe plane is
    fitted anew to each survey's ring and counts as independent. Taken from a
    ``base_sigma_t`` column when the table has one, else ``sigma_base_m3`` x ``density_t_m3``
    for the bases in :data:`FIXED_BASES`; never more than the survey sigma.
    """
    sigma = df["survey_sigma_t"].astype(float).fillna(0.0) if "survey_sigma_t" in df else pd.Series(0.0, index=df.index)
    if "base_sigma_t" in df:
        g = pd.to_numeric(df["base_sigma_t"], errors="coerce")
    elif {"sigma_base_m3", "base_method", "density_t_m3"} <= set(df.columns):
        fixed = df["base_method"].astype(str).str.split(":").str[0].isin(FIXED_BASES)
        g = (pd.to_numeric(df["sigma_base_m3"], errors="coerce")
             * pd.to_numeric(df["density_t_m3"], errors="coerce")).where(fixed, 0.0)
    else:
        g = pd.Series(0.0, index=df.index)
    return np.minimum(g.fillna(0.0).abs(), sigma)


def _shared_sigma(sigma_a: pd.Series, sigma_b: pd.Series, parts: list[tuple[pd.Series, pd.Series]]) -> pd.Series:
    """sigma of a - b when ``parts`` [(part in a, part in b), ...] are one error in both.

    Each shared error enters as (part_a - part_b); the rest of each sigma is independent.
    """
    a_ind = sigma_a.astype(float).fillna(0.0) ** 2
    b_ind = sigma_b.astype(float).fillna(0.0) ** 2
    common = 0.0
    for pa, pb in parts:
        a_ind = a_ind - pa ** 2
        b_ind = b_ind - pb ** 2
        common = common + (pa - pb) ** 2
    return np.sqrt(np.clip(a_ind, 0.0, None) + np.clip(b_ind, 0.0, None) + common)


def _variance_sigma(p: pd.DataFrame, book_sigma: pd.Series) -> pd.Series:
    """sigma of survey - book, with the density and fixed-base errors shared by survey and opening.

    When the opening is an adopted survey figure, the same table density erred in both, and
    a floor raster or level base is the same surface in both: each part enters as (this
    survey's - the opening's) instead of in quadrature twice. Everything else (volume
    errors, scale errors, the rest of the opening) is independent.
    """
    return _shared_sigma(p["survey_sigma_t"], book_sigma, [
        (p["_d_survey"], p["opening_density_sigma_t"]), (p["_g_survey"], p["opening_base_sigma_t"])])


def _noise_sigma(p: pd.DataFrame, book: BookResult) -> pd.Series:
    """Per pile sigma of the variance without the belt scales' own class terms."""
    sl = book.scale_load
    other = sl[sl["kind"] != "belt"].groupby("pile_id")["sigma_t"].apply(lambda s: float(np.sum(np.square(s))))
    book_wo_belts = np.sqrt(p["opening_sigma_t"] ** 2 + p["pile_id"].map(other).fillna(0.0))
    return _variance_sigma(p, book_wo_belts)


def _scale_diagnostics(
    p: pd.DataFrame, book: BookResult, scales: Mapping[str, Scale] | None, history: pd.DataFrame | None,
    k: float, period: str,
) -> tuple[pd.DataFrame, pd.Series, pd.DataFrame]:
    """Weighted least-squares belt-scale biases; fitted variance per pile; this month's rows.

    Two fits per scale: this month's piles alone (a scale that went wrong this month), and,
    when ``history`` has rows of earlier months, those pooled with this month's (a bias too
    small to see in one month but there all along). A scale is named when either fit finds a
    bias beyond k sigma and beyond its in-service MPE with at least :data:`MIN_PILE_MONTHS`
    pile-months behind it. The pooled fit assumes one constant bias over the months pooled,
    so a scale that changed this month shows in this month's fit first.
    """
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
    fitted = pd.Series(0.0, index=p.index)
    past = pd.DataFrame(columns=BIAS_ROW_COLUMNS)
    if history is not None and len(history):
        past = pd.DataFrame(history)[BIAS_ROW_COLUMNS]
        past = past[past["period"].astype(str) != str(period)]
    scale_ids = sorted(x for x in now["scale_id"].dropna().unique())
    if not scale_ids:
        return pd.DataFrame(columns=SCALE_COLUMNS), fitted, now
    month = _BiasFit(now, scale_ids)
    pooled = _BiasFit(pd.concat([past, now], ignore_index=True), scale_ids) if len(past) else None
    earlier = _BiasFit(past, scale_ids) if len(past) else None

    out = []
    for j, sid in enumerate(scale_ids):
        mpe = float("nan")
        s_obj = (scales or {}).get(sid)
        if s_obj is not None:
            try:
                mpe = belt_mpe_fraction(s_obj.accuracy_class, s_obj.in_service)
            except ValueError:
                mpe = float("nan")
        m = month.scale(j, k, mpe)
        piles_fed, tonnes = m["piles"], m["tonnes"]
        same_sign = _same_sign_note(p, piles_fed)
        if m["n_used"] < MIN_PILE_MONTHS:
            why = (f"only {m['n_used']} pile-month(s) left once outliers were set aside" if m["excluded"]
                   else "it fed one pile this month")
            msg = (f"belt scale {sid}: {why}; {100 * m['beta']:+.2f} % this month cannot be told from an "
                   "error on that pile")
        elif m["flagged"]:
            msg = (f"belt scale {sid} appears to read {100 * m['beta']:+.2f} % (+/- {100 * m['sigma']:.2f} %) "
                   f"this month, beyond its in-service MPE of {100 * mpe:.2f} %: have it checked and "
                   f"recalibrated ({m['n_used']} pile(s); {same_sign})")
        elif m["significant"]:
            msg = (f"belt scale {sid} reads {100 * m['beta']:+.2f} % (+/- {100 * m['sigma']:.2f} %) this month, "
                   f"significant but within its MPE of {100 * mpe:.2f} % ({m['n_used']} pile(s))")
        else:
            msg = (f"no significant bias on belt scale {sid} this month: {100 * m['beta']:+.2f} % "
                   f"(+/- {100 * m['sigma']:.2f} %) ({m['n_used']} pile(s))")
        if m["excluded"]:
            msg += "; set aside as outliers: " + ", ".join(m["excluded"])
        h = pooled.scale(j, k, mpe) if pooled is not None else None
        flagged = m["flagged"]
        changed = _changed_this_month(m, earlier.scale(j, k, mpe) if earlier is not None else None, k)
        if h is not None and h["months"] > 1:
            basis = f"{h['n_used']} pile-month(s) over {h['months']} months"
            if h["flagged"] and not m["flagged"] and changed is not None:
                # the pooled fit's one constant bias does not hold: this month's rows and the
                # earlier months' disagree, and this month's alone could not name it
                e, z = changed
                h = dict(h, flagged=False)
                msg += (f". Over the last {h['months']} months the fit reads {100 * h['beta']:+.2f} % "
                        f"(+/- {100 * h['sigma']:.2f} %), but the earlier months alone read "
                        f"{100 * e['beta']:+.2f} % (+/- {100 * e['sigma']:.2f} %), {z:.1f} sigma from this "
                        "month's: no constant bias over the months (a change this month, or an error on "
                        f"a pile), not named ({basis})")
            elif h["flagged"] and not m["flagged"]:
                msg += (f". Over the last {h['months']} months it appears to read {100 * h['beta']:+.2f} % "
                        f"(+/- {100 * h['sigma']:.2f} %), beyond its in-service MPE of {100 * mpe:.2f} %: "
                        f"have it checked and recalibrated ({basis})")
            else:
                msg += (f". Over the last {h['months']} months: {100 * h['beta']:+.2f} % "
                        f"(+/- {100 * h['sigma']:.2f} %) ({basis})")
            if h["excluded"]:
                msg += "; set aside as outliers: " + ", ".join(h["excluded"])
            flagged = flagged or h["flagged"]
        out.append({"scale_id": sid, "piles": ",".join(piles_fed), "tonnes": tonnes, "bias_pct": 100 * m["beta"],
                    "bias_sigma_pct": 100 * m["sigma"],
                    "history_bias_pct": 100 * h["beta"] if h is not None and h["months"] > 1 else np.nan,
                    "history_bias_sigma_pct": 100 * h["sigma"] if h is not None and h["months"] > 1 else np.nan,
                    "history_months": h["months"] if h is not None else 1,
                    "flagged": bool(flagged), "message": msg})
        # the part of this month's variance the named scale explains: this month's estimate
        # when this month names it, else the pooled one
        use = m if m["flagged"] else (h if h is not None and h["flagged"] else None)
        if use is not None:
            for pid, x in month.rows_now(j):
                fitted[p.index[p["pile_id"] == pid]] += x * use["b"]
    return pd.DataFrame(out, columns=SCALE_COLUMNS), fitted, now


class _BiasFit:
    """One weighted least-squares fit of belt-scale biases over (period, pile) rows.

    Design: one row per (period, pile), one column per belt scale; v = X b with X = -T (the
    signed tonnes each scale put on the pile's book). Gross outliers (standardised residual
    > :data:`REJECT_Z`) are left out one at a time, worst first; never more than half the
    rows, never a row whose scale would be left with no data, and at least 2 degrees of
    freedom are kept for the fit's own sigma.
    """

    def __init__(self, rows: pd.DataFrame, scale_ids: list[str]) -> None:
        rows = rows.assign(period=rows["period"].astype(str))
        keys = rows[["period", "pile_id"]].drop_duplicates().reset_index(drop=True)
        key_index = {kk: i for i, kk in enumerate(zip(keys["period"], keys["pile_id"]))}
        X = np.zeros((len(keys), len(scale_ids)))
        v = np.zeros(len(keys))
        sig = np.zeros(len(keys))
        for r in rows.itertuples():
            i = key_index[(r.period, r.pile_id)]
            v[i], sig[i] = r.variance_t, max(float(r.noise_sigma_t), _SIGMA_FLOOR_T)
            if r.scale_id is not None and not pd.isna(r.scale_id) and r.scale_id in scale_ids:
                X[i, scale_ids.index(r.scale_id)] -= r.signed_t
        use = np.isfinite(v)
        excluded: list[int] = []
        protected: set[int] = set()
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
        self.keys, self.X, self.b, self.cov, self.use, self.excluded = keys, X, b, cov, use, excluded
        self.last = str(rows["period"].iloc[-1]) if len(rows) else ""

    def scale(self, j: int, k: float, mpe: float) -> dict:
        """Estimate of scale column ``j``: b (book inflation per recorded tonne), beta (the
        scale's reading error, beta = b / (1 - b): a scale reading (1 + beta) x the true mass
        inflates the book by beta / (1 + beta) per recorded tonne), their sigmas, and whether
        it is named."""
        col = self.X[:, j] != 0
        now = (self.keys["period"] == self.last).to_numpy()
        fb = float(self.b[j])
        sfb = float(np.sqrt(self.cov[j, j])) if np.isfinite(self.cov[j, j]) else float("nan")
        beta, sigma = fb / (1.0 - fb), sfb / (1.0 - fb) ** 2
        n_used = int(col[self.use].sum())
        significant = bool(np.isfinite(sigma) and abs(beta) > k * sigma)
        beyond = bool(np.isfinite(mpe) and abs(beta) > mpe)
        months = int(self.keys.loc[col, "period"].nunique())
        excl = [i for i in self.excluded if self.X[i, j] != 0]
        return {
            "b": fb, "beta": beta, "sigma": sigma, "n_used": n_used, "months": months,
            "significant": significant, "flagged": bool(significant and beyond and n_used >= MIN_PILE_MONTHS),
            "piles": sorted(set(self.keys.loc[col & now, "pile_id"])),
            "tonnes": float(np.abs(self.X[col & now, j]).sum()),
            "excluded": sorted({str(self.keys.loc[i, "pile_id"]) + (f" ({self.keys.loc[i, 'period']})" if months > 1 else "")
                                for i in excl}),
        }

    def rows_now(self, j: int) -> list[tuple[str, float]]:
        """(pile, X) of the latest period's rows that scale ``j`` fed."""
        now = (self.keys["period"] == self.last).to_numpy()
        return [(str(self.keys.loc[i, "pile_id"]), float(self.X[i, j])) for i in np.where(now & (self.X[:, j] != 0))[0]]


def _changed_this_month(m: dict, e: "dict | None", k: float) -> "tuple[dict, float] | None":
    """The earlier months' estimate ``e`` of a scale and how many combined sigmas it lies
    from this month's ``m``, when more than ``k`` (``None`` otherwise, or when either has
    no finite sigma): the pooled fit assumes one constant bias, which such a gap refutes."""
    if e is None:
        return None
    s = math.hypot(m["sigma"], e["sigma"])
    if not (math.isfinite(s) and s > 0):
        return None
    z = abs(m["beta"] - e["beta"]) / s
    return (e, z) if z > k else None


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


#: The volume step's flag for a pile whose footprint is mostly unscanned (its surface
#: interpolated over what the scanner missed or the classifier removed).
LOW_SCAN_FLAG = "low_scan"


def _flag_list(value: Any) -> list[str]:
    """A ``;``-separated flags text as a list (missing or empty: no flags)."""
    if not isinstance(value, str):
        return []
    return [f for f in value.split(";") if f]


def _low_scan_note(scanned_fraction: Any) -> str:
    """What the reason of a low-scan pile adds: its figure rests on interpolation."""
    share = _num(scanned_fraction)
    scanned = f"only {share * 100:.0f} % of the footprint scanned" if np.isfinite(share) else "footprint mostly unscanned"
    return (f"; low scan: {scanned}, the rest interpolated, so the variance may come from the "
            "unscanned part: check the survey's coverage before posting")


def _reasons(p: pd.DataFrame, fitted: pd.Series, diag: pd.DataFrame, k: float) -> tuple[list, list, list, dict]:
    """Reason code, reason text and extra flags per pile, in REASON_CODES order, and the
    suspected transfer pairs (row -> (partner row, transfer estimate t, its sigma))."""
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
    # Pairs of opposite variances of one material that cancel within k sigma: at least one
    # significant, the other leaning the mirror way by PAIR_PARTNER_MIN_Z of its own sigma
    # (a poorly scanned pile can hide the receiving side of a transfer in its own sigma).
    # The transfer is estimated from both by weighted least squares: t = sum(w_i |v_i|) /
    # sum(w_i), w = 1/sigma^2, sigma_t = 1/sqrt(sum w); the pair needs |t| > k sigma_t.
    cand = [i for i in range(n) if np.isfinite(p.loc[i, "survey_t"]) and not (
        p.loc[i, "pile_id"] in scale_of and abs(residual[i]) <= k * sig[i])]
    pairs = []
    for i, j in itertools.combinations(cand, 2):
        if p.loc[i, "material"] != p.loc[j, "material"] or np.sign(residual[i]) == np.sign(residual[j]):
            continue
        if not (p.loc[i, "significant"] or p.loc[j, "significant"]):
            continue
        si, sj = max(sig[i], 1e-12), max(sig[j], 1e-12)
        if min(abs(residual[i]) / si, abs(residual[j]) / sj) < PAIR_PARTNER_MIN_Z:
            continue
        s = np.hypot(si, sj)
        w = np.array([si ** -2, sj ** -2])
        t = float(np.sum(w * np.abs([residual[i], residual[j]])) / w.sum())
        st = float(1.0 / np.sqrt(w.sum()))
        if abs(residual[i] + residual[j]) <= k * s and t > k * st:
            pairs.append((abs(residual[i] + residual[j]) / s, i, j, t, st))
    partner: dict[int, tuple[int, float, float]] = {}
    for _, i, j, t, st in sorted(pairs):
        if i not in partner and j not in partner:
            partner[i], partner[j] = (j, t, st), (i, t, st)
    for i in range(n):
        pid = p.loc[i, "pile_id"]
        v = p.loc[i, "variance_t"]
        if not np.isfinite(p.loc[i, "survey_t"]):
            code[i] = "NOT_SURVEYED"
            text[i] = REASON_CODES["NOT_SURVEYED"]
        elif pid in scale_of and abs(residual[i]) <= k * sig[i] and abs(fitted[i]) >= 0.5 * abs(v):
            code[i] = "SCALE_BIAS"
            text[i] = f"belt scale {', '.join(scale_of[pid])} explains {fitted[i]:+.1f} t of the {v:+.1f} t variance"
            flags[i] = "scale:" + ",".join(scale_of[pid])
        elif i in partner:
            j, t, st = partner[i]
            other = p.loc[j, "pile_id"]
            code[i] = "TRANSFER_SUSPECT"
            own = f"variance {v:+.1f} t" + (f" ({residual[i]:+.1f} t net of scale bias)" if fitted[i] != 0 else "")
            theirs = f"{residual[j]:+.1f} t"
            src, dst = (pid, other) if v < 0 else (other, pid)
            text[i] = (f"{own} mirrors {theirs} on pile {other}: suspected unrecorded transfer of about "
                       f"{t:.0f} t (+/- {st:.0f} t) from {src} to {dst}")
            if not p.loc[i, "significant"]:
                text[i] += f" ({v:+.1f} t alone is within {k:g} sigma, {k * sig[i]:.1f} t)"
            flags[i] = f"pair:{other}"
        elif not p.loc[i, "significant"]:
            code[i] = "WITHIN_SIGMA"
            text[i] = f"variance {v:+.1f} t is within {k:g} sigma ({k * sig[i]:.1f} t)"
            if p.loc[i, "out_of_tolerance"]:
                text[i] += " although out of tolerance: the measurement is too uncertain to judge this pile"
        elif not p.loc[i, "out_of_tolerance"]:
            code[i] = "WITHIN_TOL"
            text[i] = (f"variance {v:+.1f} t ({p.loc[i, 'variance_pct']:+.2f} %) within the "
                       f"{p.loc[i, 'tolerance_pct']:g} % tolerance")
        else:
            code[i] = "UNEXPLAINED"
            text[i] = (f"variance {v:+.1f} t ({p.loc[i, 'variance_pct']:+.2f} %) beyond the {p.loc[i, 'tolerance_pct']:g} % "
                       f"tolerance and {abs(v) / max(sig[i], 1e-12):.1f} sigma: investigate before posting")
    return code, text, flags, partner


# ----------------------------------------------------------------------------- aggregates


def _per_material(p: pd.DataFrame, book: BookResult, info: dict, k: float, factor: float) -> pd.DataFrame:  # noqa: C901
    """Totals per material with correlations handled: one scale's error is common to all the
    piles it weighed for (linear within a scale, quadrature across scales); one material's
    density error is common to all its piles; the floor raster's error to all piles on it."""
    sl = book.scale_load.merge(p[["pile_id", "material"]], on="pile_id", how="left")
    rows = []
    for mat, g in p.groupby("material", sort=True, dropna=False):
        sv = g[g["survey_t"].notna()]
        # density: one error for all piles of the material, in this survey and in any opening
        # that was an adopted survey; the floor raster: one error under all its piles, in
        # both; a level: one error per pile, in both (inventory.stock.totals)
        s_survey, s_book, s_v = close_sigmas(sv, sl)
        S, Bk = float(sv["survey_t"].sum()), float(sv["book_t"].sum())
        v = S - Bk
        tol = _num(info.get(mat, {}).get("tolerance_pct"))
        tol = tol if np.isfinite(tol) and tol > 0 else float(g["tolerance_pct"].iloc[0])
        rows.append({
            "material": mat, "piles": len(g), "survey_t": S, "survey_sigma_t": s_survey, "book_t": Bk,
            "book_sigma_t": s_book, "variance_t": v, "variance_pct": 100 * v / Bk if Bk > 0 else np.nan,
            "variance_sigma_t": s_v, "significant": bool(abs(v) > k * s_v), "tolerance_pct": tol,
            "out_of_tolerance": bool(abs(v) > tol / 100 * abs(Bk)),
            "adjustment_t": float(sv["adjustment_t"].sum()),
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
    prev["previous_g_t"] = _base_part(prev)
    m = p.merge(prev[["pile_id", "previous_survey_t", "previous_sigma_t", "previous_after_t", "previous_d_t",
                      "previous_g_t"]], on="pile_id", how="inner")
    m["measured_change_t"] = m["survey_t"] - m["previous_survey_t"]
    m["net_movement_t"] = m["previous_after_t"].fillna(0.0) + (m["book_t"] - m["opening_t"])
    m["difference_t"] = m["measured_change_t"] - m["net_movement_t"]
    movement_var = np.clip(m["book_sigma_t"] ** 2 - m["opening_sigma_t"] ** 2, 0.0, None)
    # the table density and a fixed base erred alike in both surveys: their parts subtract
    surveys = _shared_sigma(m["survey_sigma_t"], m["previous_sigma_t"],
                            [(m["_d_survey"], m["previous_d_t"]), (m["_g_survey"], m["previous_g_t"])])
    m["difference_sigma_t"] = np.sqrt(surveys ** 2 + movement_var)
    m["significant"] = m["difference_t"].abs() > k * m["difference_sigma_t"]
    gap = m["variance_t"] - m["difference_t"]
    m["opening_gap_t"] = gap.where(gap.abs() > 1e-9, 0.0)  # rounding dust when opening = previous survey
    return m[CHANGE_COLUMNS].sort_values("pile_id").reset_index(drop=True)
