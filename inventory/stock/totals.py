"""Totals over piles and over months whose sigma counts shared errors once.

A total's error is not the piles' sigmas added in quadrature. Some errors are one error in
many figures:

- one material's bulk density (the table value) errs alike in every pile of the material and
  in every survey of it: its part of each survey sigma, ``volume x density sd``, adds
  *linearly* over the material's piles, and between two surveys of a pile only the change of
  volume carries it;
- a surveyed floor raster's error is the same under every pile measured over it and in every
  survey: its part (``base_sigma_t`` of the piles with a ``floor`` base) adds linearly over
  those piles, and cancels between two surveys of one pile.

Everything else in a pile's sigma (scan noise, interpolated gaps, a toe plane fitted anew each
survey, the pile's own weighings) is taken as independent between piles and between months.
The ledger keeps each pile's book sigma but not its split by weighing instrument, so totals
read from the ledger take the movement errors of different piles as independent (the close's
own Materials table, which has the split, adds one instrument's error linearly over its piles).

A variance over several months (:func:`span_variance`) is taken from the surveys at the ends
of the span and every movement booked between them: the surveys in between cancel
(``S_b - S_a - N``), so adding the months' sigmas in quadrature would count each of them twice.

The sum of the pieces (:func:`budget_sigma`): ``sigma^2 = sum_i u_i^2 + sum_k (sum_{i in k} s_i)^2``
for independent parts ``u_i`` and shared parts ``s_i`` grouped by their error ``k`` (JCGM
100:2008, GUM section 5.2, with correlation coefficients of 0 and 1).

Details and the check against a Monte Carlo of the same model: docs/ledger.md.
"""

from __future__ import annotations

from collections import defaultdict
from collections.abc import Hashable, Iterable, Mapping
from typing import Any

import numpy as np
import pandas as pd

__all__ = [
    "SPAN_COLUMNS", "MONTH_TOTAL_COLUMNS", "budget_sigma", "pile_error_parts", "month_totals",
    "span_variance", "opening_parts", "SITE_TOTAL_COLUMNS", "close_sigmas", "close_site_totals",
    "SURVEY_TOTAL_COLUMNS", "survey_totals",
]

#: Columns of :func:`span_variance`.
SPAN_COLUMNS = [
    "first_period", "last_period", "months", "piles", "start_t", "end_t", "net_movement_t",
    "variance_t", "variance_sigma_t", "monthly_variance_t", "adjustment_t",
]

#: Columns of :func:`month_totals`.
MONTH_TOTAL_COLUMNS = [
    "period", "piles", "book_t", "survey_t", "variance_t", "variance_pct", "variance_sigma_t",
    "adjustment_t", "closing_t",
]


def budget_sigma(parts: Iterable[tuple[Hashable | None, float]]) -> float:
    """One sigma of a sum of errors, from ``(key, part)`` pairs.

    Parts with the key ``None`` are independent; parts with the same key are one error (they
    add linearly before squaring). NaN parts count as 0.

    >>> round(budget_sigma([(None, 3.0), (None, 4.0)]), 9)
    5.0
    >>> round(budget_sigma([("coal", 3.0), ("coal", 4.0)]), 9)
    7.0
    """
    ind = 0.0
    shared: dict[Hashable, float] = defaultdict(float)
    for key, value in parts:
        v = float(value)
        if not np.isfinite(v):
            continue
        if key is None:
            ind += v * v
        else:
            shared[key] += v
    return float(np.sqrt(ind + sum(s * s for s in shared.values())))


def _col(df: pd.DataFrame, name: str, default: float = np.nan) -> pd.Series:
    if name in df:
        return pd.to_numeric(df[name], errors="coerce").astype(float)
    return pd.Series(default, index=df.index, dtype=float)


def _site(df: pd.DataFrame) -> pd.Series:
    for name in ("site_id", "site_name"):
        if name in df:
            return df[name].astype(str)
    return pd.Series("", index=df.index, dtype=object)


def pile_error_parts(rows: pd.DataFrame, density_sd: Mapping[str, float] | None = None) -> pd.DataFrame:
    """Split each pile's survey sigma into its independent, density and floor parts.

    Parameters
    ----------
    rows : DataFrame
        Pile rows (a close's pile table or ledger rows): ``pile_id``, ``material``,
        ``survey_sigma_t``, ``volume_m3``, ``base_method``, ``base_sigma_t``; a ``site_id`` or
        ``site_name`` column keeps sites apart.
    density_sd : mapping of material -> t/m3, optional
        The materials' bulk density standard deviation; without it the density part is 0
        (the whole survey sigma is then taken as independent).

    Returns
    -------
    DataFrame
        Same index: ``ind_t`` (independent part), ``density_t`` (volume x density sd),
        ``floor_t`` (the floor raster's part), ``density_key`` and ``floor_key`` (which
        error each shared part belongs to; ``None`` for a pile not on a floor raster, whose
        base part, a level or toe, is independent).
    """
    sigma = _col(rows, "survey_sigma_t").fillna(0.0).abs()
    sd = rows["material"].map(lambda m: (density_sd or {}).get(m, np.nan)) if "material" in rows \
        else pd.Series(np.nan, index=rows.index)
    d = (_col(rows, "volume_m3") * pd.to_numeric(sd, errors="coerce")).abs().fillna(0.0)
    d = np.minimum(d, sigma)
    g = np.minimum(_col(rows, "base_sigma_t").abs().fillna(0.0), sigma)
    floor = rows["base_method"].astype(str).str.split(":").str[0].eq("floor") if "base_method" in rows \
        else pd.Series(False, index=rows.index)
    site = _site(rows)
    # a level base is exact and a toe plane is fitted anew each survey: their part is the
    # pile's own, independent of everything else
    ind = np.sqrt(np.clip(sigma ** 2 - d ** 2 - np.where(floor, g, 0.0) ** 2, 0.0, None))
    material = rows["material"] if "material" in rows else pd.Series(None, index=rows.index)
    return pd.DataFrame({
        "ind_t": ind,
        "density_t": d,
        "floor_t": g.where(floor, 0.0),
        "density_key": [("density", s, m) for s, m in zip(site, material)],
        "floor_key": [("floor", s) if f else None for s, f in zip(site, floor)],
    }, index=rows.index)


def opening_parts(previous: pd.Series | Mapping[str, Any] | None, parts_prev: pd.Series | None,
                  adjust_to: str = "survey") -> tuple[float, float, float]:
    """``(sigma, density part, floor part)`` of a month's opening, from the previous month's
    adopted row, as :func:`inventory.stock.book.opening_from_close` forms it: a surveyed
    closing carries ``f`` of the survey's error (``f`` = 1 for ``adjust_to = "survey"``, 0.5
    for the midpoint) and ``1 - f`` of the book's; an unsurveyed one the book's.
    ``(nan, 0, 0)`` when there is no previous row (the opening came from opening.csv)."""
    if previous is None:
        return float("nan"), 0.0, 0.0
    f = 1.0 if adjust_to == "survey" else 0.5
    s_sig = float(previous.get("survey_sigma_t") if previous.get("survey_sigma_t") is not None else np.nan)
    b_sig = float(previous.get("book_sigma_t") if previous.get("book_sigma_t") is not None else np.nan)
    b_sig = 0.0 if not np.isfinite(b_sig) else b_sig
    surveyed = np.isfinite(float(previous.get("survey_t") if previous.get("survey_t") is not None else np.nan))
    if not surveyed:
        return b_sig, 0.0, 0.0
    s_sig = 0.0 if not np.isfinite(s_sig) else s_sig
    d = f * float(parts_prev["density_t"]) if parts_prev is not None else 0.0
    g = f * float(parts_prev["floor_t"]) if parts_prev is not None else 0.0
    return float(np.hypot(f * s_sig, (1 - f) * b_sig)), d, g


def _by_pile(rows: pd.DataFrame) -> dict[tuple[str, str], pd.DataFrame]:
    site = _site(rows)
    out: dict[tuple[str, str], pd.DataFrame] = {}
    for key, g in rows.assign(_site=site).groupby(["_site", "pile_id"], sort=True):
        out[key] = g.sort_values("period")
    return out


def month_totals(rows: pd.DataFrame, before: pd.DataFrame | None = None,
                 density_sd: Mapping[str, float] | None = None, adjust_to: str = "survey") -> pd.DataFrame:
    """Totals of each month over the piles in ``rows``, with the variance's sigma.

    Per pile, the variance's stated sigma (``variance_sigma_t``) less its density and floor
    parts is independent; the density part the survey shares with the opening (``d_S - d_O``)
    adds linearly over the material's piles, the floor part (``g_S - g_O``) over the floor's.

    Parameters
    ----------
    rows : DataFrame
        Ledger rows (``Ledger.history``): one per pile and period.
    before : DataFrame, optional
        The rows of the month before the first period (their survey is the first month's
        opening).
    density_sd, adjust_to
        As in :func:`pile_error_parts` and :func:`opening_parts`.

    Returns
    -------
    DataFrame
        :data:`MONTH_TOTAL_COLUMNS`, one row per period.
    """
    allrows = pd.concat([before, rows], ignore_index=True) if before is not None and len(before) else rows
    allrows = allrows.reset_index(drop=True)
    parts = pile_error_parts(allrows, density_sd)
    prev_of: dict[int, int] = {}
    for _, g in _by_pile(allrows).items():
        idx = list(g.index)
        for a, b in zip(idx, idx[1:]):
            prev_of[b] = a
    own = set(range(len(allrows) - len(rows), len(allrows)))
    out = []
    for period, g in allrows.loc[sorted(own)].groupby("period", sort=True):
        budget: list[tuple[Hashable | None, float]] = []
        surveyed = g[_col(g, "survey_t").notna()]
        for i in surveyed.index:
            p = prev_of.get(i)
            _, d_o, g_o = opening_parts(allrows.loc[p] if p is not None else None,
                                        parts.loc[p] if p is not None else None, adjust_to)
            d_s, g_s = parts.at[i, "density_t"], parts.at[i, "floor_t"]
            fk = parts.at[i, "floor_key"]
            sv = float(allrows.at[i, "variance_sigma_t"]) if np.isfinite(float(allrows.at[i, "variance_sigma_t"])) else 0.0
            rest = sv ** 2 - (d_s - d_o) ** 2 - (g_s - g_o if fk is not None else 0.0) ** 2
            budget.append((None, float(np.sqrt(max(rest, 0.0)))))
            budget.append((parts.at[i, "density_key"], d_s - d_o))
            if fk is not None:
                budget.append((fk, g_s - g_o))
        book = float(_col(surveyed, "book_t").sum())
        var = float(_col(surveyed, "variance_t").sum())
        out.append({
            "period": period, "piles": int(len(g)), "book_t": book,
            "survey_t": float(_col(surveyed, "survey_t").sum()), "variance_t": var,
            "variance_pct": 100.0 * var / book if book > 0 else np.nan,
            "variance_sigma_t": budget_sigma(budget) if len(surveyed) else np.nan,
            "adjustment_t": float(_col(g, "adjustment_t").fillna(0.0).sum()),
            "closing_t": float(_col(g, "closing_t").sum()),
        })
    return pd.DataFrame(out, columns=MONTH_TOTAL_COLUMNS)


def span_variance(rows: pd.DataFrame, before: pd.DataFrame | None = None,
                  density_sd: Mapping[str, float] | None = None, adjust_to: str = "survey") -> dict[str, Any]:
    """Variance over a span of months of the piles in ``rows``, from the span's end surveys.

    Per pile: ``S_end - S_start - N``, with ``S_start`` the survey of the month before the span
    (``before``; else the first month's opening balance), ``S_end`` the last survey in the
    span and ``N`` every movement booked between them (the months' ``book_t - opening_t`` and
    the ``after_survey_net_t`` between survey and month end). Its error: the two end surveys
    (density and floor parts only by their difference), every month's movements (a month's
    book sigma less its opening's), and, with no survey before the span, the opening. When
    every variance was adjusted to the survey (``adjust_to = "survey"``) it equals the sum of
    the monthly variances (``monthly_variance_t``).

    Returns
    -------
    dict
        :data:`SPAN_COLUMNS`.
    """
    rows = rows.reset_index(drop=True)
    before = before.reset_index(drop=True) if before is not None else rows.iloc[0:0]
    both = pd.concat([before, rows], ignore_index=True)
    parts = pile_error_parts(both, density_sd)
    n_before = len(before)
    budget: list[tuple[Hashable | None, float]] = []
    start_t = end_t = net = 0.0
    periods = sorted(rows["period"].unique()) if len(rows) else []
    piles = 0
    for (site, pid), g in _by_pile(rows).items():
        idx = [i + n_before for i in g.index]
        prev = both.iloc[:n_before]
        prev = prev[(_site(prev) == site) & (prev["pile_id"] == pid)]
        p0 = int(prev.index[-1]) if len(prev) else None
        sv = _col(both.loc[idx], "survey_t")
        if not sv.notna().any():
            continue
        e = int(sv[sv.notna()].index[-1])  # the last survey in the span
        span = [i for i in idx if i <= e]
        piles += 1
        booked = sum(float(both.at[i, "book_t"]) - float(both.at[i, "opening_t"]) for i in span)
        after = [float(both.at[i, "after_survey_net_t"]) for i in span[:-1]]
        start_survey = p0 is not None and np.isfinite(float(both.at[p0, "survey_t"]))
        if start_survey:
            s0 = float(both.at[p0, "survey_t"])
            after.insert(0, float(both.at[p0, "after_survey_net_t"]))
        else:
            s0 = float(both.at[span[0], "opening_t"])
        n = booked + float(np.nansum(after))
        s1 = float(both.at[e, "survey_t"])
        start_t, end_t, net = start_t + s0, end_t + s1, net + n
        # movements of each month: the book sigma less the opening's
        prev_i = p0
        for k, i in enumerate(span):
            b_sig = float(both.at[i, "book_sigma_t"])
            b_sig = b_sig if np.isfinite(b_sig) else 0.0
            o_sig, _, _ = opening_parts(both.loc[prev_i] if prev_i is not None else None,
                                        parts.loc[prev_i] if prev_i is not None else None, adjust_to)
            if k == 0 and not start_survey:
                budget.append((None, b_sig))  # the opening balance and this month's movements
            else:
                o_sig = o_sig if np.isfinite(o_sig) else 0.0
                budget.append((None, float(np.sqrt(max(b_sig ** 2 - o_sig ** 2, 0.0)))))
            prev_i = i
        budget.append((None, float(parts.at[e, "ind_t"])))
        budget.append((parts.at[e, "density_key"], float(parts.at[e, "density_t"])))
        fk = parts.at[e, "floor_key"]
        budget.append((fk, float(parts.at[e, "floor_t"])))
        if start_survey:
            budget.append((None, float(parts.at[p0, "ind_t"])))
            budget.append((parts.at[p0, "density_key"], -float(parts.at[p0, "density_t"])))
            budget.append((parts.at[p0, "floor_key"], -float(parts.at[p0, "floor_t"])))
    monthly = float(_col(rows, "variance_t").sum()) if len(rows) else 0.0
    return {
        "first_period": periods[0] if periods else None,
        "last_period": periods[-1] if periods else None,
        "months": len(periods), "piles": piles,
        "start_t": start_t if piles else np.nan, "end_t": end_t if piles else np.nan,
        "net_movement_t": net if piles else np.nan,
        "variance_t": end_t - start_t - net if piles else np.nan,
        "variance_sigma_t": budget_sigma(budget) if piles else np.nan,
        "monthly_variance_t": monthly,
        "adjustment_t": float(_col(rows, "adjustment_t").fillna(0.0).sum()) if len(rows) else 0.0,
    }


#: Columns of :func:`close_site_totals` (one row: the site's total of one close).
SITE_TOTAL_COLUMNS = [
    "piles", "survey_t", "survey_sigma_t", "book_t", "book_sigma_t", "variance_t", "variance_pct",
    "variance_sigma_t", "adjustment_t",
]


def _base_key(base_method: Any, pile_id: Any) -> tuple:
    """The error a pile's fixed-base part belongs to: the site's floor raster, or the pile's
    own level (the same in this survey and in an opening that was an earlier survey)."""
    kind = str(base_method).split(":")[0]
    return ("floor",) if kind == "floor" else ("base", str(pile_id))


def close_sigmas(sv: pd.DataFrame, scale_load: pd.DataFrame | None) -> tuple[float, float, float]:
    """Sigma of the survey total, the book total and the variance total of one close's
    surveyed piles ``sv``, shared errors counted once.

    ``sv`` has reconcile's per-pile parts: ``survey_sigma_t`` with its density part
    ``_d_survey`` and fixed-base part ``_g_survey``; ``opening_sigma_t`` with
    ``opening_density_sigma_t`` and ``opening_base_sigma_t``; ``material``, ``base_method``,
    ``pile_id``. ``scale_load`` (:data:`inventory.stock.book.SCALE_LOAD_COLUMNS`) gives each
    instrument's sigma per pile: one instrument's error adds linearly over its piles.
    The density part adds linearly over a material's piles, the floor part over every pile
    on the floor raster, and each shared part of the survey cancels against the same part
    of an opening that was an earlier survey.
    """
    survey: list[tuple[Hashable | None, float]] = []
    book: list[tuple[Hashable | None, float]] = []
    variance: list[tuple[Hashable | None, float]] = []
    base = sv["base_method"] if "base_method" in sv else pd.Series(None, index=sv.index)
    for i in sv.index:
        s = float(np.nan_to_num(sv.at[i, "survey_sigma_t"]))
        d_s, g_s = float(sv.at[i, "_d_survey"]), float(sv.at[i, "_g_survey"])
        o = float(np.nan_to_num(sv.at[i, "opening_sigma_t"]))
        d_o, g_o = float(sv.at[i, "opening_density_sigma_t"]), float(sv.at[i, "opening_base_sigma_t"])
        ind_s = float(np.sqrt(max(s * s - d_s * d_s - g_s * g_s, 0.0)))
        ind_o = float(np.sqrt(max(o * o - d_o * d_o - g_o * g_o, 0.0)))
        dk, gk = ("density", sv.at[i, "material"]), _base_key(base[i], sv.at[i, "pile_id"])
        survey += [(None, ind_s), (dk, d_s), (gk, g_s)]
        book += [(None, ind_o), (dk, d_o), (gk, g_o)]
        variance += [(None, ind_s), (None, ind_o), (dk, d_s), (dk, -d_o), (gk, g_s), (gk, -g_o)]
    if scale_load is not None and len(scale_load):
        sl = scale_load[scale_load["pile_id"].isin(sv["pile_id"])]
        for sid, sig in zip(sl["scale_id"], sl["sigma_t"]):
            book.append((("scale", sid), float(sig)))
            variance.append((("scale", sid), float(sig)))
    return budget_sigma(survey), budget_sigma(book), budget_sigma(variance)


def close_site_totals(p: pd.DataFrame, scale_load: pd.DataFrame | None) -> pd.DataFrame:
    """The site's totals of one close (surveyed piles), with their sigmas
    (:func:`close_sigmas`): :data:`SITE_TOTAL_COLUMNS`, one row."""
    sv = p[pd.to_numeric(p["survey_t"], errors="coerce").notna()]
    s_survey, s_book, s_var = close_sigmas(sv, scale_load)
    survey_t, book_t = float(sv["survey_t"].sum()), float(sv["book_t"].sum())
    v = survey_t - book_t
    return pd.DataFrame([{
        "piles": int(len(sv)), "survey_t": survey_t, "survey_sigma_t": s_survey, "book_t": book_t,
        "book_sigma_t": s_book, "variance_t": v, "variance_pct": 100 * v / book_t if book_t > 0 else np.nan,
        "variance_sigma_t": s_var, "adjustment_t": float(pd.to_numeric(sv["adjustment_t"], errors="coerce").sum())
        if "adjustment_t" in sv else np.nan,
    }], columns=SITE_TOTAL_COLUMNS)


#: Columns of :func:`survey_totals`: one row per material, then the site (``material`` empty).
SURVEY_TOTAL_COLUMNS = [
    "material", "piles", "volume_m3", "volume_sigma_m3", "survey_t", "survey_sigma_t",
    "survey_sigma_quadrature_t",
]


def survey_totals(table: pd.DataFrame) -> pd.DataFrame:
    """Volume and tonnes of one survey per material and for the site, with their sigmas,
    shared errors counted once (no books: the ``volumes`` command).

    ``table`` is a volume table (:data:`inventory.volume.measure.VOLUME_COLUMNS`):
    ``volume_m3``, ``volume_sigma_m3``, ``sigma_base_m3``, ``base_method``, ``material``,
    ``density_t_m3``, ``density_sd_t_m3``, ``survey_t``, ``survey_sigma_t``. A pile's survey
    sigma is ``sqrt((density x volume sigma)^2 + (volume x density sd)^2)``; its density part
    ``volume x density sd`` is one error over all piles of the material, and the floor
    raster's part (``sigma_base_m3``, times the density in tonnes) one error over every pile
    with a ``floor`` base; the rest is the pile's own. ``survey_sigma_quadrature_t`` is the
    piles' survey sigmas in quadrature, as if nothing were shared. Piles without a volume
    are left out; a pile without tonnes (no density) counts in the volumes only.
    """
    t = table[_col(table, "volume_m3").notna()].reset_index(drop=True)
    vol, v_sig = _col(t, "volume_m3"), _col(t, "volume_sigma_m3").fillna(0.0).abs()
    rho, rho_sd = _col(t, "density_t_m3"), _col(t, "density_sd_t_m3").fillna(0.0).abs()
    s_t, s_sig = _col(t, "survey_t"), _col(t, "survey_sigma_t").fillna(0.0).abs()
    floor = t["base_method"].astype(str).str.split(":").str[0].eq("floor") if "base_method" in t \
        else pd.Series(False, index=t.index)
    gv = np.minimum(_col(t, "sigma_base_m3").fillna(0.0).abs(), v_sig).where(floor, 0.0)
    d = np.minimum((vol * rho_sd).abs(), s_sig).where(s_t.notna(), 0.0)
    g = np.minimum(gv * rho.fillna(0.0), s_sig).where(s_t.notna(), 0.0)
    ind_v = np.sqrt(np.clip(v_sig ** 2 - gv ** 2, 0.0, None))
    ind_t = np.sqrt(np.clip(s_sig ** 2 - d ** 2 - g ** 2, 0.0, None)).where(s_t.notna(), 0.0)
    material = t["material"].astype(str) if "material" in t else pd.Series("", index=t.index)

    def row(name: str, idx: pd.Index) -> dict[str, Any]:
        v_parts: list[tuple[Hashable | None, float]] = []
        t_parts: list[tuple[Hashable | None, float]] = []
        for i in idx:
            v_parts += [(None, float(ind_v[i])), (("floor",), float(gv[i]))]
            t_parts += [(None, float(ind_t[i])), (("density", material[i]), float(d[i])),
                        (("floor",), float(g[i]))]
        tonnes = s_t[idx]
        return {
            "material": name, "piles": int(len(idx)), "volume_m3": float(vol[idx].sum()),
            "volume_sigma_m3": budget_sigma(v_parts), "survey_t": float(tonnes.sum()) if tonnes.notna().any()
            else np.nan, "survey_sigma_t": budget_sigma(t_parts) if tonnes.notna().any() else np.nan,
            "survey_sigma_quadrature_t": float(np.sqrt((s_sig[idx][tonnes.notna()] ** 2).sum()))
            if tonnes.notna().any() else np.nan,
        }

    rows = [row(m, g_.index) for m, g_ in t.groupby(material, sort=True)]
    rows.append(row("", t.index))
    return pd.DataFrame(rows, columns=SURVEY_TOTAL_COLUMNS)
