"""Book stock per pile at the survey instant, from the month's movement records.

Book stock = opening + receipts - dispatches + transfers in - transfers out up to the survey
instant (cut-off), with the movements between the survey and the period end summed
separately (``after_survey_net_t``). Belt-scale totals are split over the routing windows in
proportion to time (:attr:`BookResult.belt_split`); the book's sigma comes from each
instrument's accuracy class (:mod:`inventory.stock.metrology`). All instants are compared as
UTC; input times may carry any UTC offset but must carry one.

The book formula, the belt split and how instrument errors add: docs/uncertainty.md.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from datetime import datetime
from collections.abc import Iterable, Mapping
from typing import Any

import numpy as np
import pandas as pd

from inventory.errors import InputErrors, InputWarning
from inventory.model.results import MOVEMENT_COLUMNS
from inventory.site.load import Material, Movements, Scale
from inventory.site.rules import check_opening
from inventory.stock.metrology import (
    RECTANGULAR_SIGMA_PER_BOUND,
    belt_mpe_fraction,
    weighbridge_mpe_t,
)

__all__ = [
    "BOOK_PILE_COLUMNS",
    "BELT_SPLIT_COLUMNS",
    "DUPLICATE_COLUMNS",
    "SCALE_LOAD_COLUMNS",
    "BookResult",
    "book_stock",
    "opening_from_close",
]

#: Columns of :attr:`BookResult.piles`. Receipts, dispatches and transfers are positive
#: tonnes counted after the opening instant and at or before the survey instant.
BOOK_PILE_COLUMNS = [
    "pile_id", "material", "opening_t", "opening_sigma_t", "opening_density_sigma_t",
    "opening_base_sigma_t", "receipts_t", "dispatches_t", "transfers_in_t", "transfers_out_t",
    "book_t", "book_sigma_t",
    "after_survey_net_t", "book_end_t",
]

#: Columns of :attr:`BookResult.belt_split`: one row per piece of a belt-scale interval.
#: ``share`` is the piece's fraction of its interval's duration (and so of its tonnes).
BELT_SPLIT_COLUMNS = [
    "scale_id", "interval", "interval_t", "pile_id", "start", "end", "share", "tonnes",
    "counted", "before_survey", "note", "source", "line",
]

#: Columns of :attr:`BookResult.duplicates` (the first three are the contract's).
DUPLICATE_COLUMNS = ["reference", "kind", "detail", "pile_id", "tonnes", "counted", "lines"]

#: Columns of :attr:`BookResult.scale_load`: what each instrument weighed for each pile up to
#: the survey instant, its MPE bound (linear sum over weighings) and the 1-sigma that gives.
SCALE_LOAD_COLUMNS = [
    "pile_id", "scale_id", "kind", "signed_t", "weighed_t", "mpe_bound_t", "sigma_t",
]

#: Two tickets "have the same weights" when gross and tare agree to this, tonnes (1 kg: finer
#: than any weighbridge division, so only a reprint or a re-keyed ticket matches).
SAME_WEIGHT_T = 0.001

_NS_PER_MIN = 60 * 10**9


@dataclass
class BookResult:
    """Book stock per pile at one instant, with every record that made it.

    Attributes
    ----------
    piles : pandas.DataFrame
        :data:`BOOK_PILE_COLUMNS`, one row per pile, sorted by pile id.
    movements : pandas.DataFrame
        :data:`inventory.model.results.MOVEMENT_COLUMNS`: every record (belt intervals as their
        split pieces, transfers as two rows), signed tonnes, ``counted`` and
        ``before_survey`` flags and a note saying why a record was not counted.
    belt_split : pandas.DataFrame
        :data:`BELT_SPLIT_COLUMNS`.
    duplicates : pandas.DataFrame
        :data:`DUPLICATE_COLUMNS`: exact duplicates (same ticket id; counted once) and
        suspected duplicates (same vehicle and weights within the window under another id;
        counted, listed for checking).
    scale_load : pandas.DataFrame
        :data:`SCALE_LOAD_COLUMNS`.
    at, period_start, period_end : pandas.Timestamp
        Survey instant, opening instant (may be ``None``) and period end, UTC.
    messages : list of str
        Things a controller should read (unrouted belt tonnes, material mismatches).
    """

    piles: pd.DataFrame
    movements: pd.DataFrame
    belt_split: pd.DataFrame
    duplicates: pd.DataFrame
    scale_load: pd.DataFrame
    at: pd.Timestamp
    period_start: pd.Timestamp | None
    period_end: pd.Timestamp
    messages: list[str] = field(default_factory=list)


# ----------------------------------------------------------------------------- helpers


def opening_from_close(
    adopted: pd.DataFrame, materials: Mapping[str, Material] | None = None, adjust_to: str = "survey"
) -> pd.DataFrame:
    """Opening balances (with their uncertainty) from the previous close's adopted pile table.

    The opening is the previous closing_t. When that closing was set from a survey, the
    survey's error is now in the book: ``sigma_t`` carries it, ``density_sigma_t`` the part
    of it due to the bulk density (volume x density sd), which is the *same* error as this
    month's survey density error when the same table density is used, and ``base_sigma_t``
    the part due to a fixed base (a surveyed floor or a level, the same surface every month:
    the previous close's ``base_sigma_t``) - reconcile subtracts each of these from this
    month's instead of adding them. With ``adjust_to = "midpoint"`` the closing was
    (survey + book) / 2, so half the survey error and half the book error carry over. A pile
    whose adjustment was held (closing = book) carries its book error only: the share of the
    variance posted is read from ``adjustment_t / variance_t`` when both columns are there.

    Parameters
    ----------
    adopted : DataFrame
        PILE_COLUMNS of the previous close (``pile_id``, ``closing_t``, ``survey_t``,
        ``survey_sigma_t``, ``book_sigma_t``, ``volume_m3``, ``material`` as available).
    materials : mapping of str to Material, optional
        The site's materials (their ``density_sd_t_m3``).
    adjust_to : str
        The previous close's ``adjust_to``.

    Returns
    -------
    DataFrame
        ``pile_id``, ``tonnes``, ``sigma_t``, ``density_sigma_t``, ``base_sigma_t``.
    """
    a = pd.DataFrame(adopted).copy()
    col = lambda c: pd.to_numeric(a[c], errors="coerce") if c in a else pd.Series(np.nan, index=a.index)  # noqa: E731
    # the share of the variance that was posted: 1 (to survey), 1/2 (midpoint), 0 for a held
    # line, in between when only part of a transfer pair was posted; from adjustment / variance
    # when both are known, else from adjust_to
    f = pd.Series(1.0 if adjust_to == "survey" else 0.5, index=a.index)
    share = col("adjustment_t") / col("variance_t").where(col("variance_t") != 0)
    f = share.clip(0.0, 1.0).where(share.notna(), f).to_numpy()
    surveyed = col("survey_t").notna()
    s_sig, b_sig = col("survey_sigma_t").fillna(0.0), col("book_sigma_t").fillna(0.0)
    sd = pd.Series(np.nan, index=a.index)
    if materials is not None and "material" in a:
        table = {str(k): m.density_sd_t_m3 for k, m in materials.items()}
        sd = a["material"].astype(str).map(table).astype(float)
    dens = (col("volume_m3") * sd).fillna(0.0)
    sigma = np.where(surveyed, np.sqrt((f * s_sig) ** 2 + ((1 - f) * b_sig) ** 2), b_sig)
    return pd.DataFrame({
        "pile_id": a["pile_id"].astype(str), "tonnes": col("closing_t"),
        "sigma_t": sigma, "density_sigma_t": np.where(surveyed, f * dens, 0.0),
        # a ledger written before base_sigma_t was kept has NULL there: no shared part known
        "base_sigma_t": np.where(surveyed, f * col("base_sigma_t").fillna(0.0), 0.0),
    })


def _utc_instant(value: datetime | pd.Timestamp, name: str) -> pd.Timestamp:
    ts = pd.Timestamp(value)
    if ts.tzinfo is None:
        raise ValueError(f"{name} {value!r} has no UTC offset; every instant must carry one")
    return ts.tz_convert("UTC")


def _ns(s: pd.Series | pd.Timestamp) -> np.ndarray | int:
    """UTC nanoseconds since the epoch (int64) of tz-aware timestamps."""
    if isinstance(s, pd.Timestamp):
        return int(s.tz_convert("UTC").as_unit("ns").value)
    naive = s.dt.tz_convert("UTC").dt.tz_localize(None).dt.as_unit("ns")
    return np.asarray(naive, dtype="datetime64[ns]").view("int64")


def _utc_index(v: Any) -> pd.DatetimeIndex:
    return pd.DatetimeIndex(pd.to_datetime(np.asarray(v, dtype="int64"), unit="ns", utc=True))


def _from_ns(v: np.ndarray) -> pd.Series:
    return pd.Series(pd.to_datetime(np.asarray(v, dtype="int64"), unit="ns", utc=True))


def _pile_table(piles: pd.DataFrame) -> pd.DataFrame:
    out = pd.DataFrame({"pile_id": piles["pile_id"].astype(str), "material": piles["material"].astype(object).values})
    return out.drop_duplicates("pile_id").sort_values("pile_id").reset_index(drop=True)


def _opening_table(opening: pd.DataFrame | None, known: set[str]) -> pd.DataFrame:
    """pile_id, tonnes, the sigmas and start (UTC or NaT), checked by the site's opening rule.

    The opening is checked here, not trusted: it comes from opening.csv (checked when the site
    was loaded) or from the ledger's previous close, which no loader has seen.
    """
    frame, problems = check_opening(opening, pile_ids=known, path="opening balances")
    if any(p.severity == "error" for p in problems):
        raise InputErrors(problems)
    return frame.rename(columns={"as_of": "start"})[
        ["pile_id", "tonnes", "sigma_t", "density_sigma_t", "base_sigma_t", "start"]
    ]


def _same_site(movements: Movements, scales: Mapping[str, Scale], known: set[str]) -> None:
    """Refuse movements that were checked against another site's scales or piles."""
    used_scales = set(movements.weighbridge["scale_id"].dropna()) | set(movements.belt_scales["scale_id"].dropna()) \
        | set(movements.routing["scale_id"].dropna())
    used_piles = (set(movements.weighbridge["pile_id"].dropna()) | set(movements.routing["pile_id"].dropna())
                  | set(movements.transfers["from_pile"].dropna()) | set(movements.transfers["to_pile"].dropna()))
    lost = sorted(used_scales - set(scales)) + sorted(used_piles - known)
    if lost:
        raise ValueError(
            f"the movements of {movements.period} name scale(s) or pile(s) not given here ({', '.join(lost)}): "
            "they were checked against another site"
        )


# ----------------------------------------------------------------------------- duplicates


def _find_duplicates(wb: pd.DataFrame, window_min: float) -> tuple[pd.Series, pd.Series, pd.DataFrame]:
    """Counted flag and note per ticket, and the duplicates table.

    Which copy of a repeated ticket id is counted is decided by the record's content
    (time, weights, pile), not by file order, so reordering records changes nothing.
    """
    counted = pd.Series(True, index=wb.index)
    note = pd.Series("", index=wb.index, dtype=object)
    rows: list[dict] = []
    if wb.empty:
        return counted, note, pd.DataFrame(columns=DUPLICATE_COLUMNS)
    key = wb.assign(kt=_ns(wb["time"]), kv=wb["vehicle"].astype(str))
    order = key.sort_values(["ticket", "kt", "gross_t", "tare_t", "pile_id", "direction", "kv", "source", "line"], kind="mergesort")
    repeated = order["ticket"].duplicated(keep="first")
    for ticket, grp in order[order["ticket"].duplicated(keep=False)].groupby("ticket", sort=True):
        kept = grp.index[0]
        differ = [
            c for c in ("time", "direction", "pile_id", "gross_t", "tare_t", "vehicle")
            if grp[c].astype(str).nunique() > 1
        ]
        lines = ", ".join(f"{s} line {int(ln)}" for s, ln in zip(grp["source"], grp["line"]))
        detail = f"ticket {ticket} appears {len(grp)} times ({lines}); counted once (line {int(grp.loc[kept, 'line'])})"
        if differ:
            detail += "; the copies differ in " + ", ".join(differ)
        rows.append({
            "reference": ticket, "kind": "exact", "detail": detail, "pile_id": grp.loc[kept, "pile_id"],
            "tonnes": float(grp.loc[kept, "net_t"]), "counted": 1, "lines": lines,
        })
    counted[repeated[repeated].index] = False
    note[repeated[repeated].index] = "duplicate ticket id: not counted"

    # Suspected: the same vehicle with the same gross and tare within the window, under
    # another ticket id - a reprint or a re-keyed ticket. Counted (it may be a genuine
    # second load of an identical truck), listed for the weighbridge clerk to confirm.
    live = key[counted & key["vehicle"].notna() & (key["kv"].str.strip() != "")].copy()
    live["kg"] = np.round(live["gross_t"] / SAME_WEIGHT_T).astype("int64")
    live["kr"] = np.round(live["tare_t"] / SAME_WEIGHT_T).astype("int64")
    live["ki"] = live.index
    pairs = live.merge(live, on=["kv", "kg", "kr"], suffixes=("_a", "_b"))
    later = (pairs["kt_b"] > pairs["kt_a"]) | ((pairs["kt_b"] == pairs["kt_a"]) & (pairs["ticket_b"] > pairs["ticket_a"]))
    pairs = pairs[later & (pairs["ticket_a"] != pairs["ticket_b"])]
    pairs = pairs[(pairs["kt_b"] - pairs["kt_a"]) <= window_min * _NS_PER_MIN]
    for p in pairs.sort_values(["ticket_b", "ticket_a"]).itertuples():
        minutes = (p.kt_b - p.kt_a) / _NS_PER_MIN
        detail = (
            f"ticket {p.ticket_b} repeats ticket {p.ticket_a}: vehicle {p.kv}, gross {p.gross_t_a:g} t, "
            f"tare {p.tare_t_a:g} t, {minutes:.0f} min later; counted - confirm it was a second load"
        )
        rows.append({
            "reference": p.ticket_b, "kind": "suspected", "detail": detail, "pile_id": p.pile_id_b,
            "tonnes": float(p.net_t_b), "counted": 2, "lines": f"{p.source_a} line {int(p.line_a)}, {p.source_b} line {int(p.line_b)}",
        })
        note[p.ki_b] = (note[p.ki_b] + "; " if note[p.ki_b] else "") + f"suspected duplicate of ticket {p.ticket_a}"
    dups = pd.DataFrame(rows, columns=DUPLICATE_COLUMNS)
    if not dups.empty:
        dups["counted"] = dups["counted"].map({1: "once", 2: "yes"})
    return counted, note, dups


# ----------------------------------------------------------------------------- belt split


def _split_belts(
    belts: pd.DataFrame, routing: pd.DataFrame, cuts: Iterable[int]
) -> tuple[pd.DataFrame, list[str]]:
    """Spread each belt interval over its routing windows and cut it at the given instants.

    Returns pieces with scale_id, pile_id (None when no window covers that time), lo, hi (ns),
    share, tonnes, interval bounds and provenance.
    """
    messages: list[str] = []
    cols = ["scale_id", "pile_id", "lo", "hi", "share", "tonnes", "a", "b", "T", "source", "line"]
    if belts.empty:
        return pd.DataFrame(columns=cols), messages
    b = belts.assign(a=_ns(belts["start"]), b=_ns(belts["end"]), T=belts["tonnes"].astype(float))
    b = b[["scale_id", "a", "b", "T", "source", "line"]].reset_index(names="_k")
    r = routing.assign(ws=_ns(routing["start"]), we=_ns(routing["end"]))[["scale_id", "pile_id", "ws", "we"]] if not routing.empty else pd.DataFrame(columns=["scale_id", "pile_id", "ws", "we"])
    m = b.merge(r, on="scale_id", how="inner")
    m["lo"] = np.maximum(m["a"].to_numpy("int64"), m["ws"].to_numpy("int64")) if len(m) else []
    m["hi"] = np.minimum(m["b"].to_numpy("int64"), m["we"].to_numpy("int64")) if len(m) else []
    pieces = m[m["hi"] > m["lo"]][["_k", "scale_id", "pile_id", "lo", "hi", "a", "b", "T", "source", "line"]]

    # Time of each interval that no routing window covers: those tonnes belong to no pile.
    covered = (pieces["hi"] - pieces["lo"]).groupby(pieces["_k"]).sum().reindex(b["_k"], fill_value=0).to_numpy()
    gap = (b["b"] - b["a"]).to_numpy() - covered
    unrouted = b[gap > 0].copy()
    if len(unrouted):
        unrouted["pile_id"] = None
        unrouted["lo"] = unrouted["a"]
        unrouted["hi"] = unrouted["a"] + gap[gap > 0]  # a duration, placed at the interval start
        pieces = pd.concat([pieces, unrouted[pieces.columns]], ignore_index=True)
        for u, g in zip(unrouted.itertuples(), gap[gap > 0]):
            t = u.T * g / (u.b - u.a)
            messages.append(
                f"{u.source} line {int(u.line)}: {t:.3f} t of belt {u.scale_id} fall outside every routing "
                f"window and are booked to no pile"
            )

    # Cut routed pieces at the survey instant, the period end and opening instants so that
    # each piece lies wholly on one side of every cut-off.
    routed = pieces[pieces["pile_id"].notna()]
    rest = pieces[pieces["pile_id"].isna()]
    for c in sorted(set(int(x) for x in cuts)):
        spans = (routed["lo"] < c) & (routed["hi"] > c)
        if spans.any():
            left = routed[spans].assign(hi=c)
            right = routed[spans].assign(lo=c)
            routed = pd.concat([routed[~spans], left, right], ignore_index=True)
    pieces = pd.concat([routed, rest], ignore_index=True)
    pieces["share"] = (pieces["hi"] - pieces["lo"]) / (pieces["b"] - pieces["a"])
    pieces["tonnes"] = pieces["T"] * pieces["share"]
    return pieces[cols].reset_index(drop=True), messages


# ----------------------------------------------------------------------------- main


def book_stock(
    movements: Movements,
    opening: pd.DataFrame | None,
    at: datetime | pd.Timestamp,
    scales: Mapping[str, Scale],
    piles: pd.DataFrame,
    period_end: datetime | pd.Timestamp,
    period_start: datetime | pd.Timestamp | None = None,
    duplicate_window_min: float = 10.0,
) -> BookResult:
    """Book stock per pile at the survey instant, and what moved after it.

    Parameters
    ----------
    movements : Movements
        The records, checked by :mod:`inventory.site.rules` (as the site loader returns them,
        or from :meth:`Movements.checked <inventory.site.load.Movements.checked>`); they are
        not checked again here.
    opening : DataFrame or None
        Opening book stock: ``pile_id`` and ``tonnes``, optional ``as_of`` (the instant the
        balance holds at; records at or before it are already in it), ``sigma_t`` (its
        1-sigma, added in quadrature), ``density_sigma_t`` (the part of that sigma due to the
        bulk density, when the opening is an adopted survey figure; it is common with this
        survey's density error, see :func:`opening_from_close`) and ``base_sigma_t``
        (likewise the part due to a fixed base, common with this survey's base error). Piles
        without one open at 0 t. Checked by the site's opening rule
        (:func:`inventory.site.rules.check_opening`).
    at : datetime
        Survey instant (tz-aware). Records at or before it are in the book at survey.
    scales : mapping of str to Scale
        The site's scales, those the movements were checked against.
    piles : DataFrame
        The site's piles: ``pile_id`` and ``material``.
    period_end : datetime
        End of the period (tz-aware); records after it belong to the next period.
    period_start : datetime, optional
        Instant of the opening balance when ``opening`` carries no ``as_of``; records at or
        before it are not counted.
    duplicate_window_min : float
        Tickets of one vehicle with equal weights within this many minutes are suspected
        duplicates.

    Returns
    -------
    BookResult

    Raises
    ------
    InputErrors
        When an opening balance breaks the opening rule (unknown pile, tonnes not a number,
        a pile opened twice, a time without a UTC offset).
    ValueError
        When an instant has no UTC offset, or the movements name a scale or pile not given.
    """
    at_ts = _utc_instant(at, "survey instant")
    end_ts = _utc_instant(period_end, "period end")
    start_ts = None if period_start is None else _utc_instant(period_start, "period start")
    pile_tab = _pile_table(piles)
    known = set(pile_tab["pile_id"])
    _same_site(movements, scales, known)
    open_tab = _opening_table(opening, known)
    wb = movements.weighbridge.reset_index(drop=True)
    belts = movements.belt_scales.reset_index(drop=True)
    routing = movements.routing.reset_index(drop=True)
    tr = movements.transfers.reset_index(drop=True)

    # Opening instant per pile: its own as_of, else the period start, else no lower bound.
    start_ns = {p: (_ns(start_ts) if start_ts is not None else None) for p in known}
    for r in open_tab.itertuples():
        if pd.notna(r.start):
            start_ns[r.pile_id] = _ns(r.start)
    at_ns, end_ns = _ns(at_ts), _ns(end_ts)
    messages: list[str] = []

    wmov, dups, wb_msgs = _weighbridge_movements(wb, pile_tab, scales, duplicate_window_min)
    cuts = [at_ns, end_ns] + [v for v in start_ns.values() if v is not None]
    pieces, bmov, belt_msgs = _belt_movements(belts, routing, scales, cuts)
    tmov = _transfer_movements(tr)
    messages += wb_msgs + belt_msgs

    mov = pd.concat([m for m in (wmov, bmov, tmov) if len(m)], ignore_index=True) if (len(wmov) + len(bmov) + len(tmov)) else pd.DataFrame(
        columns=["kind", "reference", "t_ns", "pile_id", "tonnes", "scale_id", "dup_ok", "note", "source", "line", "bound"])
    mov["t_ns"] = mov["t_ns"].astype("int64")
    mov["tonnes"] = mov["tonnes"].astype(float)
    mov["bound"] = mov["bound"].astype(float)

    # --- cut-off: opening instant < t <= max(survey, period end) is counted
    lowest = np.iinfo("int64").min
    pstart = np.array([start_ns.get(p) if isinstance(p, str) and start_ns.get(p) is not None else lowest
                       for p in mov["pile_id"]], dtype="int64")
    t = mov["t_ns"].to_numpy("int64")
    before_open = t <= pstart
    after_end = t > max(at_ns, end_ns)
    counted_all = mov["dup_ok"].to_numpy(bool) & ~before_open & ~after_end
    notes = mov["note"].astype(str).to_numpy(dtype=object)
    notes = np.where(mov["dup_ok"].to_numpy(bool) & before_open, _join(notes, "at or before the opening balance: already in it"), notes)
    notes = np.where(mov["dup_ok"].to_numpy(bool) & after_end, _join(notes, "after the period end and the survey: next period"), notes)
    mov["counted"] = counted_all
    mov["before_survey"] = t <= at_ns
    mov["note"] = notes

    piles_out = _pile_balances(pile_tab, open_tab, mov, at_ns, end_ns)
    scale_load = _scale_load(mov, scales)
    sig = scale_load.groupby("pile_id")["sigma_t"].apply(lambda s: float(np.sqrt(np.sum(np.square(s)))))
    piles_out["book_sigma_t"] = np.sqrt(
        piles_out["pile_id"].map(sig).fillna(0.0) ** 2 + piles_out["opening_sigma_t"] ** 2
    )

    movements_out = mov.assign(time=_utc_index(mov["t_ns"]))
    movements_out = movements_out.sort_values(["t_ns", "kind", "reference", "pile_id", "tonnes"], kind="mergesort")
    movements_out = movements_out[MOVEMENT_COLUMNS].reset_index(drop=True)

    split = pieces.assign(
        interval_t=pieces["T"].astype(float),
        start=_utc_index(pieces["lo"]),
        end=_utc_index(pieces["hi"]),
        counted=counted_all[(mov["kind"] == "belt").to_numpy()],
        before_survey=pieces["hi"].astype("int64") <= at_ns,
    )
    split = split.sort_values(["scale_id", "interval", "start", "pile_id"], kind="mergesort")[BELT_SPLIT_COLUMNS].reset_index(drop=True)
    for msg in messages:
        warnings.warn(msg, InputWarning, stacklevel=2)
    return BookResult(
        piles=piles_out[BOOK_PILE_COLUMNS], movements=movements_out, belt_split=split, duplicates=dups,
        scale_load=scale_load, at=at_ts, period_start=start_ts, period_end=end_ts, messages=messages,
    )


def _weighbridge_movements(
    wb: pd.DataFrame, pile_tab: pd.DataFrame, scales: Mapping[str, Scale], window_min: float
) -> tuple[pd.DataFrame, pd.DataFrame, list[str]]:
    """One signed movement per ticket with its MPE bound; the duplicates table; messages."""
    messages: list[str] = []
    counted, note, dups = _find_duplicates(wb, window_min)
    mat_of = dict(zip(pile_tab["pile_id"], pile_tab["material"]))
    if "material" in wb and pile_tab["material"].notna().any():
        mism = wb["material"].notna() & (wb["material"].astype(str) != wb["pile_id"].map(mat_of).astype(str))
        for r in wb[mism].itertuples():
            text = f"ticket {r.ticket} carries material {r.material!r} into pile {r.pile_id} of {mat_of.get(r.pile_id)!r}"
            note[r.Index] = (note[r.Index] + "; " if note[r.Index] else "") + text
            messages.append(f"{r.source} line {int(r.line)}: {text}")
    bound = np.zeros(len(wb))
    for sid, idx in wb.groupby("scale_id").groups.items():
        s = scales[sid]
        cls, e, ins = s.accuracy_class, s.scale_interval_kg, s.in_service
        g = wb.loc[idx]
        # a net is the difference of two weighings: its bound is the sum of theirs
        bound[wb.index.get_indexer(idx)] = (
            weighbridge_mpe_t(g["gross_t"].to_numpy(), cls, e, ins) + weighbridge_mpe_t(g["tare_t"].to_numpy(), cls, e, ins)
        )
    mov = pd.DataFrame({
        "kind": "weighbridge", "reference": wb["ticket"], "t_ns": _ns(wb["time"]) if len(wb) else np.array([], "int64"),
        "pile_id": wb["pile_id"], "tonnes": np.where(wb["direction"] == "in", 1.0, -1.0) * wb["net_t"],
        "scale_id": wb["scale_id"], "dup_ok": counted, "note": note, "source": wb["source"], "line": wb["line"],
        "bound": bound,
    })
    return mov, dups, messages


def _belt_movements(
    belts: pd.DataFrame, routing: pd.DataFrame, scales: Mapping[str, Scale], cuts: list[int]
) -> tuple[pd.DataFrame, pd.DataFrame, list[str]]:
    """Belt pieces (see :func:`_split_belts`) as signed movements with their MPE bound."""
    pieces, messages = _split_belts(belts, routing, cuts)
    sign = pieces["scale_id"].map(lambda s: 1.0 if scales[s].direction == "in" else -1.0).astype(float)
    frac = pieces["scale_id"].map(
        lambda s: belt_mpe_fraction(scales[s].accuracy_class, scales[s].in_service)
    ).astype(float)
    pieces["interval"] = [f"{_from_ns([a])[0].isoformat()}/{_from_ns([b])[0].isoformat()}"
                          for a, b in zip(pieces["a"], pieces["b"])]
    # show the split where an interval was shared out (routing change or cut-off)
    shared = [f"{sh:.4g} of {tt:g} t ({_hhmm(lo)}-{_hhmm(hi)} of the interval)" if sh < 1.0 else ""
              for sh, tt, lo, hi in zip(pieces["share"], pieces["T"], pieces["lo"], pieces["hi"])]
    pieces["note"] = np.where(pieces["pile_id"].isna(), "no routing window: booked to no pile", shared) if len(pieces) else []
    mov = pd.DataFrame({
        "kind": "belt", "reference": [f"{s} {i}" for s, i in zip(pieces["scale_id"], pieces["interval"])],
        "t_ns": pieces["hi"].astype("int64"), "pile_id": pieces["pile_id"],
        "tonnes": sign * pieces["tonnes"].astype(float), "scale_id": pieces["scale_id"],
        "dup_ok": pieces["pile_id"].notna(), "note": pieces["note"],
        "source": pieces["source"], "line": pieces["line"], "bound": frac * pieces["tonnes"].astype(float),
    })
    return pieces, mov, messages


def _transfer_movements(tr: pd.DataFrame) -> pd.DataFrame:
    """One row out of the source pile and one into the destination per transfer."""
    ref = [str(x) if x is not None and not pd.isna(x) and str(x) != "" else f"transfer line {int(ln)}"
           for x, ln in zip(tr["reference"], tr["line"])]
    t_ns = _ns(tr["time"]) if len(tr) else np.array([], "int64")
    mov = pd.concat([
        pd.DataFrame({"kind": "transfer", "reference": ref, "t_ns": t_ns, "pile_id": tr["from_pile"],
                      "tonnes": -tr["tonnes"].astype(float), "note": [f"to {p}" for p in tr["to_pile"]]}),
        pd.DataFrame({"kind": "transfer", "reference": ref, "t_ns": t_ns, "pile_id": tr["to_pile"],
                      "tonnes": tr["tonnes"].astype(float), "note": [f"from {p}" for p in tr["from_pile"]]}),
    ], ignore_index=True)
    mov["scale_id"] = None
    mov["dup_ok"] = True
    mov["source"] = list(tr["source"]) * 2
    mov["line"] = list(tr["line"]) * 2
    # A transfer is not weighed by an instrument of the books' (it is moved by loader or
    # dozer and recorded from a work order), so it adds no scale uncertainty.
    mov["bound"] = 0.0
    return mov


def _hhmm(ns: int) -> str:
    return pd.Timestamp(int(ns), unit="ns", tz="UTC").strftime("%H:%MZ")


def _join(notes: np.ndarray, text: str) -> np.ndarray:
    return np.array([f"{n}; {text}" if n else text for n in notes], dtype=object)


def _pile_balances(pile_tab: pd.DataFrame, open_tab: pd.DataFrame, mov: pd.DataFrame, at_ns: int, end_ns: int) -> pd.DataFrame:
    out = pile_tab.copy()
    op = open_tab.set_index("pile_id")
    out["opening_t"] = out["pile_id"].map(op["tonnes"]).fillna(0.0).astype(float)
    out["opening_sigma_t"] = out["pile_id"].map(op["sigma_t"]).fillna(0.0).astype(float)
    out["opening_density_sigma_t"] = out["pile_id"].map(op["density_sigma_t"]).fillna(0.0).astype(float)
    out["opening_base_sigma_t"] = out["pile_id"].map(op["base_sigma_t"]).fillna(0.0).astype(float)
    c = mov[mov["counted"]]
    pre = c[c["before_survey"]]

    def total(frame: pd.DataFrame, mask: pd.Series) -> pd.Series:
        return out["pile_id"].map(frame[mask].groupby("pile_id")["tonnes"].sum()).fillna(0.0)

    weighed = pre["kind"] != "transfer"
    out["receipts_t"] = total(pre, weighed & (pre["tonnes"] > 0))
    out["dispatches_t"] = 0.0 - total(pre, weighed & (pre["tonnes"] < 0))
    out["transfers_in_t"] = total(pre, (pre["kind"] == "transfer") & (pre["tonnes"] > 0))
    out["transfers_out_t"] = 0.0 - total(pre, (pre["kind"] == "transfer") & (pre["tonnes"] < 0))
    out["book_t"] = (out["opening_t"] + out["receipts_t"] - out["dispatches_t"]
                     + out["transfers_in_t"] - out["transfers_out_t"])
    # Roll from the survey instant to the period end: forward over (at, end], or backward over
    # (end, at] when the survey was taken after the period end.
    t = c["t_ns"]
    fwd = c[(t > at_ns) & (t <= end_ns)].groupby("pile_id")["tonnes"].sum()
    back = c[(t > end_ns) & (t <= at_ns)].groupby("pile_id")["tonnes"].sum()
    out["after_survey_net_t"] = out["pile_id"].map(fwd).fillna(0.0) - out["pile_id"].map(back).fillna(0.0)
    out["book_end_t"] = out["book_t"] + out["after_survey_net_t"]
    return out


def _scale_load(mov: pd.DataFrame, scales: Mapping[str, Scale]) -> pd.DataFrame:
    m = mov[mov["counted"] & mov["before_survey"] & mov["scale_id"].notna()]
    if m.empty:
        return pd.DataFrame(columns=SCALE_LOAD_COLUMNS)
    g = m.assign(w=m["tonnes"].abs()).groupby(["pile_id", "scale_id"], sort=True)
    out = pd.DataFrame({
        "signed_t": g["tonnes"].sum(), "weighed_t": g["w"].sum(),
        # one instrument's error is the same all month: its bounds add linearly
        "mpe_bound_t": g["bound"].sum(),
    }).reset_index()
    out["kind"] = out["scale_id"].map(lambda s: scales[s].kind)
    out["sigma_t"] = out["mpe_bound_t"] * RECTANGULAR_SIGMA_PER_BOUND
    return out[SCALE_LOAD_COLUMNS]
