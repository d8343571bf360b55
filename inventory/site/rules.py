"""The row rules of the movement tables and the opening balances, written once.

The site loader runs these rules on the tables it reads (so ``inventory check`` reports every
row that book stock could not use), and :meth:`inventory.site.load.Movements.checked` runs the
same rules on tables built by hand (tests, a notebook). Book stock trusts what comes out.

Each ``check_*`` function takes a table as :func:`inventory.io.tables.read_table` returns it
(or a hand-built DataFrame with the same columns) and returns the normalised table - times in
UTC, numbers as floats, ``net_t`` computed from gross and tare, ``scale_id`` resolved, ``line``
and ``source`` present - together with the :class:`~inventory.errors.Problem` list. A problem
names the file (the row's ``source``), the line (the header is line 1) and the field. Rows with
errors stay in the returned table; a caller that finds an error-severity problem must not use
the table.

The rules:

weighbridge
    direction is ``in`` or ``out``; gross and tare are positive; tare is not above gross; a
    printed net equals gross - tare within :data:`NET_ROUNDING_T`; the scale is a weighbridge
    of ``site.toml`` (a blank scale id means the site's only weighbridge); gross is not above
    the weighbridge's ``max_capacity_t`` (without one, not above :data:`MAX_TICKET_GROSS_T`);
    a repeated ticket id with the same content is a warning (counted once), with other content
    an error.
belt_scales
    a known belt scale with a direction; the interval ends after it starts; the intervals of
    one belt do not overlap (a total would be counted twice); tonnes >= 0 and not more than
    :data:`MAX_BELT_RATE_T_H` over the interval; with the folder's month named, the interval
    starts in it and ends at most a day after it.
routing
    a known belt scale; a known pile; the window ends after it starts; the windows of one belt
    do not overlap (a belt feeds one pile at a time).
transfers
    known piles; not from a pile to itself; tonnes > 0 and not above :data:`MAX_PILE_T`; no
    row with a reference repeats another (same piles, time, tonnes and reference).
opening
    a known pile; tonnes a number, not above :data:`MAX_PILE_T`; at most one balance per pile.
every table
    required columns and values present; piles and materials known; every time carries a UTC
    offset; a ticket, transfer or belt interval falls (starts) in the month of its
    ``movements/<YYYY-MM>/`` folder (in the site's time zone), when the caller names the month.
"""

from __future__ import annotations

from collections.abc import Callable, Collection, Mapping
from datetime import datetime
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from inventory.errors import Problem
from inventory.io.tables import is_blank, parse_time, table_schema
from inventory.model.period import Period

if TYPE_CHECKING:
    from inventory.site.load import Scale

__all__ = [
    "MAX_BELT_RATE_T_H",
    "MAX_PILE_T",
    "MAX_TICKET_GROSS_T",
    "MOVEMENT_TABLES",
    "NET_ROUNDING_T",
    "check_belt_scales",
    "check_movements",
    "check_opening",
    "check_routing",
    "check_transfers",
    "check_weighbridge",
]

#: How far a ticket's printed net may differ from its printed gross - tare, tonnes. Tickets
#: carry tonnes to two decimals (10 kg, the print resolution the weighbridge table's contract
#: states); an indicator that rounds gross, tare and net each from its own reading can leave
#: the printed net one such step from gross - tare (40.004 -> 40.00 and 15.006 -> 15.01 print
#: a net of 25.00 against 24.99), never more. A bigger difference is a keyed or edited figure.
NET_ROUNDING_T = 0.01

#: The heaviest gross a weighbridge ticket may carry when site.toml gives the weighbridge no
#: ``max_capacity_t``, tonnes: above it a figure is a keying or unit error, not a vehicle. The
#: heaviest loads weighed on one platform are ultra-class mine haul trucks, a little over
#: 600 t gross (from memory: Caterpillar 797F, 623 t), and heavy-haul rail wagons, under
#: 200 t; road weighbridges are built for 60 to 100 t (common practice). A site that weighs
#: more in one ticket (a whole train in motion) states its weighbridge's capacity.
MAX_TICKET_GROSS_T = 1000.0

#: The highest rate a belt-scale total may stand for, tonnes per hour (its tonnes over its
#: interval): above it the figure is a keying, unit or date error, not a belt. The largest
#: overland and mine conveyors carry some 10,000 to 40,000 t/h (from memory: bucket-wheel
#: excavator and iron-ore port conveyors), so 100,000 t/h is beyond any one belt.
MAX_BELT_RATE_T_H = 100_000.0

#: The most tonnes one opening balance or one transfer may carry: more than any stockpile
#: holds (from memory: the largest long-term ore stockpiles hold some hundreds of millions of
#: tonnes), so a larger figure is a keying or unit error (kilograms for tonnes, a pasted id).
MAX_PILE_T = 1e9

#: How long after the end of its folder's month a belt-scale interval may end: a shift or a
#: day's total that runs over midnight at the month's end (common practice: shift and daily
#: totals), never longer.
_BELT_OVERRUN = pd.Timedelta(days=1)

#: The movement tables of one period, in the order they are checked and reported.
MOVEMENT_TABLES = ("weighbridge", "belt_scales", "routing", "transfers")

#: Optional columns each table gets (as missing values) when a hand-built frame leaves them out.
_OPTIONAL = {
    "weighbridge": ("net_t", "vehicle", "scale_id"),
    "belt_scales": (),
    "routing": (),
    "transfers": ("reference",),
    "opening": ("as_of",),
}
#: Required columns of the opening balances. opening.csv also requires ``as_of`` (its table
#: schema, checked when the file is read); an opening carried over from the ledger has none.
_OPENING_REQUIRED = ("pile_id", "tonnes")
_OPENING_SIGMAS = ("sigma_t", "density_sigma_t", "base_sigma_t")


# ----------------------------------------------------------------------------- helpers
class _Rows:
    """One table being checked: the working copy, its provenance and the problems found."""

    def __init__(self, frame: pd.DataFrame | None, name: str, path: str, required: Collection[str]) -> None:
        self.problems: list[Problem] = []
        columns = list(table_schema(name).names) if name != "opening" else list(_OPENING_REQUIRED)
        if frame is None:
            frame = pd.DataFrame({c: pd.Series(dtype=object) for c in columns})
        df = pd.DataFrame(frame).reset_index(drop=True).copy()
        if "source" not in df.columns:
            df["source"] = path
        df["source"] = df["source"].where(df["source"].notna(), path).astype(str)
        if "line" not in df.columns:
            df["line"] = np.arange(2, len(df) + 2)  # header = line 1, as a CSV file counts
        df["line"] = pd.to_numeric(df["line"]).astype("int64")
        self.path = str(df["source"].iloc[0]) if len(df) else path
        # A required value that is absent is reported once here; the rules below skip it.
        self.absent: dict[str, pd.Series] = {}
        for col in required:
            if col not in df.columns:
                self.problems.append(Problem(self.path, 1, col, "required column is missing"))
                df[col] = None
                self.absent[col] = pd.Series(True, index=df.index)
                continue
            self.absent[col] = _blank(df[col])
        for col in _OPTIONAL[name]:
            if col not in df.columns:
                df[col] = None
        self.df = df
        for col in required:
            if col in frame.columns:
                self.flag(self.absent[col], col, lambda r: "value is missing")

    def flag(self, mask: pd.Series, fieldname: str, why: Callable[[Any], str], severity: str = "error") -> None:
        """Record a problem for every row where ``mask`` holds; ``why(row)`` says what is wrong."""
        if not mask.any():
            return
        for r in self.df[mask].itertuples():
            self.problems.append(Problem(str(r.source), int(r.line), fieldname, why(r), severity))

    def result(self) -> tuple[pd.DataFrame, list[Problem]]:
        """The normalised table and its problems in file and line order."""
        return self.df, sorted(self.problems, key=lambda p: (p.path, p.where if isinstance(p.where, int) else 0))

    def given(self, col: str) -> pd.Series:
        """True where a required value is present (it may still be wrong)."""
        return ~self.absent[col]

    def text(self, col: str) -> None:
        """Strings with surrounding blanks removed; missing values become None."""
        s = self.df[col]
        self.df[col] = pd.Series([None if b else str(v).strip() for v, b in zip(s, _blank(s))], index=s.index)

    def number(self, col: str) -> pd.Series:
        """The column as floats; a value that is given but is not a finite number is a problem.

        Returns True where there is no usable number (missing or not a number)."""
        raw = self.df[col]
        out = pd.to_numeric(raw, errors="coerce").astype(float)
        unusable = ~np.isfinite(out)
        self.flag(unusable & ~_blank(raw), col, lambda r: f"{raw[r.Index]!r} is not a number")
        self.df[col] = out
        return unusable

    def times(self, col: str) -> None:
        """The column as UTC timestamps; a time without a UTC offset is a problem."""
        s = self.df[col]
        if isinstance(s.dtype, pd.DatetimeTZDtype):
            self.df[col] = s.dt.tz_convert("UTC")
            return
        out: list[Any] = []
        why: dict[int, str] = {}
        for i, v, b in zip(s.index, s, _blank(s)):
            try:
                out.append(pd.NaT if b else _utc(v))
            except ValueError as err:
                why[i] = str(err)
                out.append(pd.NaT)
        self.flag(s.index.isin(list(why)), col, lambda r: why[r.Index])
        self.df[col] = pd.Series(pd.to_datetime(out, utc=True), index=s.index, dtype="datetime64[ns, UTC]")

    def known(self, col: str, values: set[str] | None, what: str, register: str) -> None:
        if values is None:
            return
        s = self.df[col]
        self.flag(s.notna() & ~s.isin(values), col, lambda r: f"unknown {what} {getattr(r, col)!r} (not in {register})")

    def in_period(self, col: str, period: Period | str | None, timezone: Any, what: str) -> None:
        """A time outside the month of its folder belongs to another month's books."""
        if period is None or timezone is None:
            return
        month = Period.parse(str(period))
        start, end = month.bounds(timezone)
        s = self.df[col]
        outside = s.notna() & ((s < start) | (s >= end))

        def why(r: Any) -> str:
            local = getattr(r, col).tz_convert(timezone)
            owner = Period.of(local)
            return (f"{local.isoformat()} falls in {owner}, not in {month} of its folder; "
                    f"the {what} belongs in movements/{owner}/")
        self.flag(outside, col, why)

    def end_after_start(self, what: str) -> None:
        df = self.df
        self.flag(df["start"].notna() & df["end"].notna() & (df["end"] <= df["start"]), "end",
                  lambda r: f"{what} ends ({r.end.isoformat()}) at or before it starts ({r.start.isoformat()})")

    def no_overlap(self, what: str, why: str) -> None:
        """Within one belt (``scale_id``), a row that starts before an earlier row has ended
        overlaps it (compared with the longest-running earlier row); flagged on ``start``."""
        df = self.df
        timed = df[df["start"].notna() & df["end"].notna() & self.given("scale_id")]
        for sid, group in timed.groupby("scale_id", sort=True):
            prev = None
            for r in group.sort_values(["start", "end", "line"], kind="mergesort").itertuples():
                if prev is not None and r.start < prev.end:
                    self.flag(df.index == r.Index, "start",
                              lambda r, sid=sid, prev=prev: f"{what} of belt {sid!r} overlaps line {prev.line}: it "
                              f"starts at {r.start.isoformat()}, before that {what} ends at {prev.end.isoformat()} "
                              f"({why})")
                if prev is None or r.end > prev.end:
                    prev = r

    def belt_scale(self, scales: Mapping[str, Scale]) -> None:
        s = self.df["scale_id"]
        kind = s.map(lambda v: scales[v].kind if v in scales else None)
        self.flag(s.notna() & kind.isna(), "scale_id",
                  lambda r: f"unknown belt scale {r.scale_id!r} (not in site.toml [[scales]])")
        self.flag(kind.notna() & (kind != "belt"), "scale_id",
                  lambda r: f"{r.scale_id!r} is a {scales[r.scale_id].kind} in site.toml [[scales]], not a belt scale")


def _above_any_pile(tonnes: float) -> str:
    return (f"{tonnes:g} t is above {MAX_PILE_T:g} t, more than any stockpile holds "
            "(a keying or unit error?)")


def _blank(s: pd.Series) -> pd.Series:
    """True where a value is missing: None, NaN, NaT or a blank string."""
    return pd.Series([is_blank(v) for v in s], index=s.index, dtype=bool)


def _utc(value: Any) -> pd.Timestamp:
    if isinstance(value, str):
        return pd.Timestamp(parse_time(value))
    if isinstance(value, (datetime, np.datetime64)):
        ts = pd.Timestamp(value)
        if ts.tzinfo is None:
            raise ValueError(f"'{ts.isoformat()}' has no UTC offset (give every time with its offset, e.g. +01:00)")
        return ts.tz_convert("UTC")
    raise ValueError(f"{value!r} is not a date-time")


def _ids(values: Collection[str] | None) -> set[str] | None:
    if isinstance(values, pd.DataFrame):
        # iterating a frame gives its column names, which would pass for an empty register
        raise TypeError("pass the ids themselves (e.g. piles['pile_id']), not a DataFrame")
    # set() of a Series takes its values (``in`` on a Series would test its index)
    return None if values is None else {str(v) for v in values}


# ----------------------------------------------------------------------------- the tables
def check_weighbridge(
    frame: pd.DataFrame | None,
    *,
    scales: Mapping[str, Scale],
    pile_ids: Collection[str] | None,
    materials: Collection[str] | None,
    path: str = "weighbridge.csv",
    period: Period | str | None = None,
    timezone: Any = None,
) -> tuple[pd.DataFrame, list[Problem]]:
    """Check weighbridge tickets; return them normalised (UTC ``time``, computed ``net_t``,
    resolved ``scale_id``) and the problems found.

    ``pile_ids`` / ``materials`` of None skip that check (the register itself failed to load
    and is reported on its own); ``path`` names the file for rows without a ``source``.
    ``period`` and ``timezone`` (both or neither) name the month the tickets must fall in.
    """
    t = _Rows(frame, "weighbridge", path, table_schema("weighbridge").required)
    piles, mats = _ids(pile_ids), _ids(materials)
    df = t.df
    for col in ("ticket", "direction", "material", "pile_id", "vehicle", "scale_id"):
        t.text(col)
    t.times("time")
    t.in_period("time", period, timezone, "ticket")
    t.flag(t.given("direction") & ~df["direction"].isin(["in", "out"]), "direction",
           lambda r: f"{r.direction!r} is not one of in, out")
    t.known("pile_id", piles, "pile", "piles.gpkg")
    t.known("material", mats, "material", "materials.csv")
    unusable = t.number("gross_t") | t.number("tare_t")
    no_net = t.number("net_t")
    for col in ("gross_t", "tare_t"):
        t.flag(df[col] <= 0, col, lambda r, col=col: f"{getattr(r, col):g} must be greater than 0")
        unusable |= df[col] <= 0
    printed, computed = df["net_t"], df["gross_t"] - df["tare_t"]
    over = ~unusable & (df["tare_t"] > df["gross_t"])
    t.flag(over, "tare_t", lambda r: f"tare {r.tare_t:g} t is above gross {r.gross_t:g} t")
    # compared to the gram, so that binary rounding of gross - tare cannot decide
    off = np.round((printed - computed).abs(), 6)
    t.flag(~unusable & ~over & ~no_net & (off > NET_ROUNDING_T), "net_t",
           lambda r: f"net {r.net_t:g} t is not gross {r.gross_t:g} - tare {r.tare_t:g} = {computed[r.Index]:.3f} t "
                     f"(off by {off[r.Index]:g} t; rounding explains at most {NET_ROUNDING_T:g} t)")
    df["net_t"] = computed

    # A blank scale id is the site's weighbridge when it has exactly one.
    bridges = sorted(k for k, s in scales.items() if s.kind == "weighbridge")
    blank = df["scale_id"].isna()
    if len(bridges) == 1:
        df["scale_id"] = pd.Series([bridges[0] if b else v for v, b in zip(df["scale_id"], blank)], index=df.index)
    else:
        t.flag(blank, "scale_id", lambda r: f"value is missing and the site has {len(bridges)} weighbridges "
                                            "(it may be left out only when there is one)")
    kind = df["scale_id"].map(lambda v: scales[v].kind if v in scales else None)
    t.flag(df["scale_id"].notna() & kind.isna(), "scale_id",
           lambda r: f"unknown weighbridge {r.scale_id!r} (not in site.toml [[scales]])")
    t.flag(kind.notna() & (kind != "weighbridge"), "scale_id",
           lambda r: f"{r.scale_id!r} is a {scales[r.scale_id].kind} scale in site.toml [[scales]], not a weighbridge")
    _within_capacity(t, scales, kind == "weighbridge", unusable)

    # A repeated ticket id with the same content is a double entry the books must list (book
    # stock counts it once); with different content nobody can tell which copy is real.
    repeated = t.given("ticket") & df["ticket"].duplicated(keep=False)
    first: dict[str, tuple] = {}
    for r in df[repeated].itertuples() if repeated.any() else ():
        key = (r.time, r.direction, r.pile_id, round(r.gross_t, 3), round(r.tare_t, 3))
        if r.ticket not in first:
            first[r.ticket] = (r.source, r.line, key)
            continue
        src0, line0, key0 = first[r.ticket]
        where = f"line {line0}" if src0 == r.source else f"{src0} line {line0}"
        same = key0 == key
        t.flag(df.index == r.Index, "ticket",
               lambda r, where=where, same=same: f"ticket {r.ticket!r} repeats {where}"
               + ("; it will be counted once" if same else " with different content"),
               "warning" if same else "error")
    return t.result()


def _within_capacity(t: _Rows, scales: Mapping[str, Scale], bridge: pd.Series, unusable: pd.Series) -> None:
    """Gross is not above the weighbridge's stated capacity, or the absurd without one."""
    df = t.df
    cap = pd.Series([getattr(scales[v], "max_capacity_t", None) if b else None
                     for v, b in zip(df["scale_id"], bridge)], index=df.index, dtype=object)
    stated = cap.notna()
    limit = cap.where(stated, MAX_TICKET_GROSS_T).astype(float)
    t.flag(~unusable & stated & (df["gross_t"] > limit), "gross_t",
           lambda r: f"gross {r.gross_t:g} t is above the capacity {cap[r.Index]:g} t of weighbridge "
                     f"{r.scale_id!r} (site.toml [[scales]] max_capacity_t)")
    t.flag(~unusable & ~stated & (df["gross_t"] > limit), "gross_t",
           lambda r: f"gross {r.gross_t:g} t is above {MAX_TICKET_GROSS_T:g} t, more than any vehicle a "
                     "weighbridge weighs (a keying or unit error?); a weighbridge built for more states "
                     "its max_capacity_t in site.toml [[scales]]")


def check_belt_scales(
    frame: pd.DataFrame | None, *, scales: Mapping[str, Scale], path: str = "belt_scales.csv",
    period: Period | str | None = None, timezone: Any = None,
) -> tuple[pd.DataFrame, list[Problem]]:
    """Check belt-scale interval totals; return them normalised (UTC times) and the problems.
    ``period`` and ``timezone`` name the month the intervals must start in."""
    t = _Rows(frame, "belt_scales", path, table_schema("belt_scales").required)
    df = t.df
    t.text("scale_id")
    t.times("start")
    t.times("end")
    t.belt_scale(scales)
    # a belt total is signed by its scale's direction: without one it cannot be booked (named
    # once per scale, at its first interval)
    unsigned = df["scale_id"].map(lambda v: v in scales and scales[v].kind == "belt"
                                  and scales[v].direction not in ("in", "out")).astype(bool)
    count = df.loc[unsigned, "scale_id"].value_counts()
    t.flag(unsigned & ~df["scale_id"].duplicated(), "scale_id",
           lambda r: f"belt scale {r.scale_id!r} has no direction (in|out) in site.toml; "
                     f"its {count[r.scale_id]} interval(s) cannot be booked")
    t.end_after_start("interval")
    # a total exported twice, or shift totals beside hourly ones, would book the same
    # tonnes twice
    t.no_overlap("interval", "its tonnes would be counted twice")
    t.in_period("start", period, timezone, "interval")
    if period is not None and timezone is not None:
        month_end = Period.parse(str(period)).bounds(timezone)[1]
        late = df["end"].notna() & (df["end"] > month_end + _BELT_OVERRUN)
        t.flag(late, "end", lambda r: f"{r.end.tz_convert(timezone).isoformat()} is more than a day after the end "
                                      f"of {period} of its folder (a date error? an interval's total is booked "
                                      "by the share of its duration, so most of it would be lost)")
    bad = t.number("tonnes")
    t.flag(~bad & (df["tonnes"] < 0), "tonnes",
           lambda r: f"{r.tonnes:g} t is below the minimum 0 (a belt total cannot be negative)")
    hours = (df["end"] - df["start"]).dt.total_seconds() / 3600.0
    fast = ~bad & (hours > 0) & (df["tonnes"] > MAX_BELT_RATE_T_H * hours)
    t.flag(fast, "tonnes", lambda r: f"{r.tonnes:g} t in {hours[r.Index]:g} h is "
                                     f"{r.tonnes / hours[r.Index]:,.0f} t/h, above {MAX_BELT_RATE_T_H:,.0f} t/h, "
                                     "more than any belt carries (a keying, unit or date error?)")
    return t.result()


def check_routing(
    frame: pd.DataFrame | None,
    *,
    scales: Mapping[str, Scale],
    pile_ids: Collection[str] | None,
    path: str = "routing.csv",
) -> tuple[pd.DataFrame, list[Problem]]:
    """Check belt routing windows; return them normalised (UTC times) and the problems."""
    t = _Rows(frame, "routing", path, table_schema("routing").required)
    t.text("scale_id")
    t.text("pile_id")
    t.times("start")
    t.times("end")
    t.belt_scale(scales)
    t.known("pile_id", _ids(pile_ids), "pile", "piles.gpkg")
    t.end_after_start("window")
    t.no_overlap("window", "a belt feeds one pile at a time")
    return t.result()


def check_transfers(
    frame: pd.DataFrame | None, *, pile_ids: Collection[str] | None, path: str = "transfers.csv",
    period: Period | str | None = None, timezone: Any = None,
) -> tuple[pd.DataFrame, list[Problem]]:
    """Check pile-to-pile transfers; return them normalised (UTC time) and the problems.
    ``period`` and ``timezone`` name the month the transfers must fall in."""
    t = _Rows(frame, "transfers", path, table_schema("transfers").required)
    df = t.df
    for col in ("from_pile", "to_pile", "reference"):
        t.text(col)
    t.times("time")
    t.in_period("time", period, timezone, "transfer")
    piles = _ids(pile_ids)
    t.known("from_pile", piles, "pile", "piles.gpkg")
    t.known("to_pile", piles, "pile", "piles.gpkg")
    t.flag(t.given("from_pile") & (df["from_pile"] == df["to_pile"]), "to_pile",
           lambda r: f"transfer from pile {r.from_pile!r} to itself")
    bad = t.number("tonnes")
    t.flag(~bad & (df["tonnes"] <= 0), "tonnes", lambda r: f"{r.tonnes:g} must be greater than 0 (a transfer moves stock)")
    t.flag(~bad & (df["tonnes"] > MAX_PILE_T), "tonnes", lambda r: _above_any_pile(r.tonnes))
    # the same transfer entered twice (a pasted row) would move the tonnes twice; without a
    # reference two equal transfers on one day (times given by date) may both be real
    key = ["from_pile", "to_pile", "time", "tonnes", "reference"]
    copies = df.duplicated(key, keep="first") & df["time"].notna() & ~bad & ~_blank(df["reference"])
    if copies.any():
        first = df.groupby(key, dropna=False, sort=False)["line"].transform("min")
        t.flag(copies, "time", lambda r: f"the transfer repeats line {first[r.Index]} "
                                         "(same piles, time, tonnes and reference): it would be counted twice")
    return t.result()


def check_movements(
    weighbridge: pd.DataFrame | None = None,
    belt_scales: pd.DataFrame | None = None,
    routing: pd.DataFrame | None = None,
    transfers: pd.DataFrame | None = None,
    *,
    scales: Mapping[str, Scale],
    pile_ids: Collection[str] | None,
    materials: Collection[str] | None,
    folder: str | None = None,
    period: Period | str | None = None,
    timezone: Any = None,
) -> tuple[dict[str, pd.DataFrame], list[Problem]]:
    """All four tables of one period: ``{name: normalised table}`` and every problem.

    A table given as None has no records. ``folder`` names the files of rows without a
    ``source`` column (``<folder>/weighbridge.csv``, ...). With ``period`` (the folder's
    month) and ``timezone`` (the site's), a ticket, transfer or belt interval dated in another
    month is an error naming the month it belongs to.
    """
    def where(name: str) -> str:
        return f"{folder}/{name}.csv" if folder else f"{name}.csv"

    piles, mats = _ids(pile_ids), _ids(materials)
    out: dict[str, pd.DataFrame] = {}
    problems: list[Problem] = []
    checks = (
        ("weighbridge", lambda: check_weighbridge(weighbridge, scales=scales, pile_ids=piles, materials=mats,
                                                  path=where("weighbridge"), period=period, timezone=timezone)),
        ("belt_scales", lambda: check_belt_scales(belt_scales, scales=scales, path=where("belt_scales"),
                                                  period=period, timezone=timezone)),
        ("routing", lambda: check_routing(routing, scales=scales, pile_ids=piles, path=where("routing"))),
        ("transfers", lambda: check_transfers(transfers, pile_ids=piles, path=where("transfers"),
                                              period=period, timezone=timezone)),
    )
    for name, check in checks:
        out[name], found = check()
        problems += found
    return out, problems


def check_opening(
    frame: pd.DataFrame | None, *, pile_ids: Collection[str] | None, path: str = "opening.csv"
) -> tuple[pd.DataFrame, list[Problem]]:
    """Check opening balances; return ``pile_id``, ``tonnes``, ``sigma_t``,
    ``density_sigma_t``, ``base_sigma_t`` (0 where not given), ``as_of`` (UTC, NaT where not
    given), ``line``, ``source`` and the problems found."""
    # as_of is optional here (a balance carried over from the ledger has none; opening.csv
    # must have it, which its table schema says), but a column of them leaves none out
    given_as_of = frame is not None and "as_of" in frame.columns
    t = _Rows(frame, "opening", path, (*_OPENING_REQUIRED, "as_of") if given_as_of else _OPENING_REQUIRED)
    df = t.df
    t.text("pile_id")
    t.known("pile_id", _ids(pile_ids), "pile", "piles.gpkg")
    bad = t.number("tonnes")
    t.flag(~bad & (df["tonnes"] > MAX_PILE_T), "tonnes", lambda r: _above_any_pile(r.tonnes))
    for col in _OPENING_SIGMAS:
        df[col] = pd.to_numeric(df[col], errors="coerce").fillna(0.0).astype(float) if col in df else 0.0
    t.times("as_of")
    named = t.given("pile_id")
    first_line = df[named].drop_duplicates("pile_id").set_index("pile_id")["line"]
    t.flag(named & df["pile_id"].duplicated(), "pile_id",
           lambda r: f"pile {r.pile_id!r} has more than one opening balance (also line {first_line[r.pile_id]})")
    frame, problems = t.result()
    return frame[["pile_id", "tonnes", *_OPENING_SIGMAS, "as_of", "line", "source"]], problems
