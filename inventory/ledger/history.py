"""``inventory history`` aggregated: by pile, by material or by month, with a total row.

Each row's sigma keeps the errors that piles and months share (see
:mod:`inventory.stock.totals`): a month's row is the total over its piles; a pile's or a
material's row, and every total row, is the variance over the whole span taken from the
surveys at its ends and every movement between them.

Examples
--------
>>> import pandas as pd
>>> rows = pd.DataFrame({"period": ["2026-01"], "pile_id": ["A"], "material": ["coal"],
...     "opening_t": [100.0], "receipts_t": [50.0], "dispatches_t": [0.0], "transfers_in_t": [0.0],
...     "transfers_out_t": [0.0], "book_t": [150.0], "book_sigma_t": [3.0], "survey_t": [154.0],
...     "survey_sigma_t": [4.0], "variance_t": [4.0], "variance_sigma_t": [5.0],
...     "significant": [False], "out_of_tolerance": [False], "adjustment_t": [4.0],
...     "after_survey_net_t": [0.0], "closing_t": [154.0], "reason_code": ["WITHIN_SIGMA"]})
>>> by = aggregate_history(rows, "pile")
>>> by[["pile_id", "variance_t", "variance_sigma_t"]].values.tolist()
[['A', 4.0, 5.0], ['Total', 4.0, 5.0]]
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Mapping

import numpy as np
import pandas as pd

from inventory.stock.totals import MONTH_TOTAL_COLUMNS, span_variance, month_totals

__all__ = ["BY_CHOICES", "TOTAL_LABEL", "aggregate_history", "reason_summary", "by_columns"]

#: What ``history --by`` groups on.
BY_CHOICES = ("pile", "material", "month")

#: Label of the total row in the key column.
TOTAL_LABEL = "Total"

_SPAN_OUT = ["first_period", "last_period", "months", "piles", "start_t", "end_t", "net_movement_t",
             "variance_t", "variance_sigma_t", "monthly_variance_t", "adjustment_t"]
_COUNTS = ["significant_count", "out_of_tolerance_count", "reason_codes"]


def by_columns(by: str, sites: bool = False) -> list[str]:
    """Columns of :func:`aggregate_history` for ``by`` (``sites``: rows of a shared ledger,
    where a pile is named by its site and its id)."""
    if by == "month":
        return MONTH_TOTAL_COLUMNS + _COUNTS
    if by == "pile":
        return (["site_id"] if sites else []) + ["pile_id", "material"] + _SPAN_OUT + _COUNTS
    if by == "material":
        return ["material"] + _SPAN_OUT + _COUNTS
    raise ValueError(f"by must be one of {', '.join(BY_CHOICES)}, not {by!r}")


def reason_summary(codes) -> str:
    """``CODE xN`` for each reason code, most frequent first (ties by name); blanks skipped.

    >>> reason_summary(["WITHIN_TOL", None, "UNEXPLAINED", "WITHIN_TOL"])
    'WITHIN_TOL x2; UNEXPLAINED x1'
    """
    count = Counter(str(c) for c in codes if c is not None and c == c and str(c).strip())
    return "; ".join(f"{c} x{n}" for c, n in sorted(count.items(), key=lambda kv: (-kv[1], kv[0])))


def _truthy(s: pd.Series) -> int:
    return int(sum(1 for v in s if v is not None and v == v and bool(v)))


def _counts(g: pd.DataFrame) -> dict:
    return {
        "significant_count": _truthy(g["significant"]) if "significant" in g else 0,
        "out_of_tolerance_count": _truthy(g["out_of_tolerance"]) if "out_of_tolerance" in g else 0,
        "reason_codes": reason_summary(g["reason_code"]) if "reason_code" in g else "",
    }


def aggregate_history(
    rows: pd.DataFrame, by: str, before: pd.DataFrame | None = None,
    density_sd: Mapping[str, float] | None = None, adjust_to: str = "survey",
) -> pd.DataFrame:
    """Group ledger history rows by pile, material or month, with a total row last.

    Parameters
    ----------
    rows : DataFrame
        Adopted rows of :meth:`inventory.ledger.store.Ledger.history` (one per pile and month).
    by : {"pile", "material", "month"}
    before : DataFrame, optional
        The adopted rows of the month before the first period: their surveys start the span.
    density_sd : mapping of material -> t/m3, optional
        The materials' density standard deviation (shared by all piles of a material).
    adjust_to : str
        The site's ``[reconcile] adjust_to`` (how an opening carries the previous survey).

    Returns
    -------
    DataFrame
        :func:`by_columns` of ``by``; the last row is the total of the selection
        (``TOTAL_LABEL`` in the key column).
    """
    sites = rows is not None and "site_id" in rows.columns
    cols = by_columns(by, sites)
    if rows is None or rows.empty:
        return pd.DataFrame(columns=cols)
    if "status" in rows:
        rows = rows[rows["status"] == "adopted"]
    rows = rows.reset_index(drop=True)
    kw = {"density_sd": density_sd, "adjust_to": adjust_to}
    out: list[dict] = []
    if by == "month":
        months = month_totals(rows, before, **kw)
        for rec in months.to_dict("records"):
            rec.update(_counts(rows[rows["period"] == rec["period"]]))
            out.append(rec)
        span = span_variance(rows, before, **kw)
        total = {c: np.nan for c in MONTH_TOTAL_COLUMNS}
        piles = rows[["site_id", "pile_id"]] if sites else rows[["pile_id"]]
        total.update(period=TOTAL_LABEL, piles=int(len(piles.drop_duplicates())),
                     variance_t=span["variance_t"], variance_sigma_t=span["variance_sigma_t"],
                     adjustment_t=span["adjustment_t"])
        total.update(_counts(rows))
        out.append(total)
    else:
        key = "pile_id" if by == "pile" else "material"
        keys = ["site_id", key] if sites and by == "pile" else [key]
        for value, g in rows.groupby(keys, sort=True, dropna=False):
            rec = dict(zip(keys, value))
            if by == "pile":
                rec["material"] = g["material"].iloc[-1]
            rec.update(span_variance(g, before, **kw))
            rec.update(_counts(g))
            out.append(rec)
        rec = {key: TOTAL_LABEL}
        if by == "pile":
            rec["material"] = ""
            if sites:
                rec["site_id"] = ""
        rec.update(span_variance(rows, before, **kw))
        rec.update(_counts(rows))
        out.append(rec)
    return pd.DataFrame(out, columns=cols)
