"""The demo terminal's books: true flows between surveys and the records a site would keep.

True flows are generated so that, pile by pile, the true tonnes moved between the two survey
instants equal the true change in stock (true volume change times true bulk density) exactly.
The records are what the weighing instruments printed: weighbridge tickets (gross and tare to
the scale interval e = 20 kg), hourly belt-scale totals, a routing table of which belt fed or
drew which pile when, and pile-to-pile transfers. Scale noise is realistic and small; four
faults are planted in the second month (see :data:`FAULTS`).

Operating pattern (invented): trucks weigh between 06:00 and 21:00, belts run in whole hours
between 06:00 and 22:00 local time; on a survey day nothing moves from 12:00 until 15:30 (the
yard is frozen for the scan), and some movements happen after the scan so cut-off matters.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone
from zoneinfo import ZoneInfo

import numpy as np

__all__ = [
    "Ticket",
    "BeltHour",
    "Route",
    "Transfer",
    "Books",
    "BELTS",
    "WEIGHBRIDGE",
    "FAULTS",
    "make_books",
]

UTC = timezone.utc

#: Weighbridge verification scale interval e (OIML R 76 class III), tonnes.
WEIGHBRIDGE_E_T = 0.020
WEIGHBRIDGE = {"id": "WB1", "kind": "weighbridge", "accuracy_class": "III", "scale_interval_kg": 20, "in_service": True}

#: Belt scales: id, direction, OIML R 50 class, nominal rate t/h, true calibration bias
#: (fraction; within the class's in-service limit: 0.5 % for class 0.5, 1 % for class 1).
BELTS = {
    "BC1": {"direction": "in", "accuracy_class": "0.5", "rate_t_h": 350.0, "bias": 0.0010, "feeds": "coal from the ship unloader"},
    "BC2": {"direction": "in", "accuracy_class": "0.5", "rate_t_h": 300.0, "bias": 0.0005, "feeds": "crushed limestone from the rail unloader"},
    "BC3": {"direction": "out", "accuracy_class": "1", "rate_t_h": 400.0, "bias": -0.0015, "feeds": "iron ore reclaim to the barge loader"},
}
#: Random error of one hourly belt total (fraction, 1 sigma).
BELT_HOURLY_SD = 0.002
#: Random error of one weighing before rounding to e (tonnes, 1 sigma).
WEIGHING_SD_T = 0.008

#: The planted faults (all in the second period, 2026-10).
FAULTS = {
    "belt_bias": {"scale_id": "BC2", "period": "2026-10", "reads_high_pct": 1.5},
    "duplicate_ticket": {"pile_id": "C1", "period": "2026-10"},
    "missing_transfer": {"from_pile": "FE2", "to_pile": "FE1", "tonnes": 420.0, "period": "2026-10"},
    "density_low": {"material": "rock salt", "pile_id": "S1", "low_pct": 4.0},
}

# Which channels each pile has. Truck rates are trucks per day; nets in tonnes.
_PILE_CHANNELS = {
    "C1": {"belt": ("BC1", +1), "trucks": {"out": 3.0}},
    "C2": {"belt": ("BC1", +1), "trucks": {"out": 5.0}},
    "FE1": {"belt": ("BC3", -1), "trucks": {"in": 2.0}},
    "FE2": {"belt": ("BC3", -1), "trucks": {"in": 4.0}},
    "L1": {"belt": ("BC2", +1), "trucks": {"out": 5.0}},
    "L2": {"belt": ("BC2", +1), "trucks": {"out": 4.0}},
    "S1": {"belt": None, "trucks": {"in": 2.0, "out": 3.0}},
}
_TRUCK_NET = {"coal": (22.0, 26.0), "iron ore": (26.0, 29.0), "crushed limestone": (25.0, 29.0), "rock salt": (24.0, 28.0)}
# Opening stock on 1 September relative to the true stock at the first survey.
_OPENING_FRACTION = {"C1": 1.30, "C2": 0.80, "FE1": 1.15, "FE2": 0.90, "L1": 0.95, "L2": 1.20, "S1": 0.70}
# Recorded transfers (window, from, to, tonnes) and the one never recorded.
_TRANSFERS = [
    (0, "FE2", "FE1", 350.0), (0, "FE2", "FE1", 420.0), (0, "FE2", "FE1", 380.0),
    (1, "FE2", "FE1", 400.0), (1, "FE2", "FE1", 360.0), (1, "L2", "L1", 260.0),
]
_FLEET = 16
#: Minutes before the same truck crosses the weighbridge again (load, haul, tip, return).
_ROUND_TRIP_MIN = 50


@dataclass
class Ticket:
    ticket: str
    time: datetime
    direction: str
    material: str
    pile_id: str
    gross_t: float
    tare_t: float
    vehicle: str
    true_net_t: float

    @property
    def net_t(self) -> float:
        return round(self.gross_t - self.tare_t, 2)


@dataclass
class BeltHour:
    scale_id: str
    pile_id: str
    start: datetime
    end: datetime
    true_t: float
    recorded_t: float
    fault_t: float = 0.0  # part of recorded_t that the planted bias added


@dataclass
class Route:
    scale_id: str
    pile_id: str
    start: datetime
    end: datetime


@dataclass
class Transfer:
    from_pile: str
    to_pile: str
    time: datetime
    tonnes: float
    reference: str
    recorded: bool = True


@dataclass
class Books:
    """Everything generated: records, truth of flows, opening balances."""

    tickets: list[Ticket]
    duplicate_of: str
    belts: list[BeltHour]
    routes: list[Route]
    transfers: list[Transfer]
    opening_t: dict[str, float]
    opening_as_of: datetime
    true_net_t: dict[str, list[float]]  # per pile, net true flow in windows 0, 1, 2
    windows: list[tuple[datetime, datetime]]
    faults: dict = field(default_factory=dict)


def _allowed_spans(start: datetime, end: datetime, tz: ZoneInfo, freeze: list[tuple[datetime, datetime]],
                   hours: tuple[int, int]) -> list[tuple[datetime, datetime]]:
    """Operating time between ``start`` and ``end`` (UTC), minus the survey freezes."""
    spans = []
    day = start.astimezone(tz).date()
    while True:
        open_ = datetime(day.year, day.month, day.day, hours[0], tzinfo=tz).astimezone(UTC)
        close = datetime(day.year, day.month, day.day, hours[1], tzinfo=tz).astimezone(UTC)
        if open_ >= end:
            break
        a, b = max(open_, start), min(close, end)
        pieces = [(a, b)] if a < b else []
        for f0, f1 in freeze:
            nxt = []
            for p0, p1 in pieces:
                if p1 <= f0 or p0 >= f1:
                    nxt.append((p0, p1))
                    continue
                if p0 < f0:
                    nxt.append((p0, f0))
                if p1 > f1:
                    nxt.append((f1, p1))
            pieces = nxt
        spans.extend(pieces)
        day = day + timedelta(days=1)
    return spans


def _sample_times(spans, n: int, rng: np.random.Generator) -> list[datetime]:
    lengths = np.array([(b - a).total_seconds() for a, b in spans])
    cum = np.concatenate([[0.0], np.cumsum(lengths)])
    u = np.sort(rng.random(n)) * cum[-1]
    out = []
    for v in u:
        i = min(int(np.searchsorted(cum, v, side="right")) - 1, len(spans) - 1)
        t = spans[i][0] + timedelta(seconds=int(v - cum[i]))
        out.append(t)
    return out


def _hour_slots(spans) -> list[datetime]:
    """Whole clock hours (UTC starts) that lie wholly inside the spans."""
    slots = []
    for a, b in spans:
        t = a.replace(minute=0, second=0, microsecond=0)
        if t < a:
            t += timedelta(hours=1)
        while t + timedelta(hours=1) <= b:
            slots.append(t)
            t += timedelta(hours=1)
    return slots


def _place_campaigns(slots: list[datetime], campaigns: list[tuple[str, int]], taken: set, rng) -> list[tuple[str, list[datetime]]]:
    """Put campaigns of consecutive free hours on one belt; ``taken`` holds used slots."""
    placed = []
    slot_set = set(slots)
    for pile, n in campaigns:
        starts = [
            s for s in slots
            if all((s + timedelta(hours=h)) in slot_set and (s + timedelta(hours=h)) not in taken for h in range(n))
        ]
        if not starts:
            raise RuntimeError(f"no room for a {n} h belt campaign to {pile}")
        s = starts[int(rng.integers(len(starts)))]
        hours = [s + timedelta(hours=h) for h in range(n)]
        taken.update(hours)
        placed.append((pile, hours))
    return placed


def _belt_jobs(belt_need: dict, w: int, sid: str, rate: float, rng) -> list[tuple[str, int]]:
    """Campaigns (pile, hours) that belt ``sid`` must run in window ``w``, 3 to 8 hours each."""
    jobs = []
    for (ww, p), need in belt_need.items():
        if ww != w or _PILE_CHANNELS[p]["belt"][0] != sid or need <= 0:
            continue
        hours = max(1, int(round(need / rate)))
        while hours > 0:
            n = min(hours, int(rng.integers(3, 9)))
            jobs.append((p, n))
            hours -= n
    return jobs


def _first_evening(jobs: list[tuple[str, int]], pile: str, evening: list[datetime], taken: set):
    """Move the first campaign of ``pile`` to the given evening slots (what does not fit stays)."""
    mine = [j for j in jobs if j[0] == pile]
    if not evening or not mine:
        return []
    jobs.remove(mine[0])
    n = min(mine[0][1], len(evening))
    hours = evening[:n]
    taken.update(hours)
    if mine[0][1] > n:
        jobs.append((pile, mine[0][1] - n))
    return [(pile, hours)]


def _round_e(x: np.ndarray) -> np.ndarray:
    return np.round(np.round(np.asarray(x) / WEIGHBRIDGE_E_T) * WEIGHBRIDGE_E_T, 2)


def make_books(
    true_tonnes: list[dict[str, float]],
    instants: list[datetime],
    materials: dict[str, str],
    tz: ZoneInfo,
    rng: np.random.Generator,
) -> Books:
    """Generate true flows and records for September and October 2026.

    Parameters
    ----------
    true_tonnes : two dicts pile -> true tonnes at the first and second survey
    instants : the two survey instants (UTC)
    materials : pile -> material name
    tz : the site time zone
    rng : the random source
    """
    piles = list(true_tonnes[0])
    start = datetime(2026, 9, 1, tzinfo=tz).astimezone(UTC)
    end = datetime(2026, 11, 1, tzinfo=tz).astimezone(UTC)
    windows = [(start, instants[0]), (instants[0], instants[1]), (instants[1], end)]
    freeze = []
    for inst in instants:
        d = inst.astimezone(tz).date()
        freeze.append((datetime(d.year, d.month, d.day, 12, tzinfo=tz).astimezone(UTC),
                       datetime(d.year, d.month, d.day, 15, 30, tzinfo=tz).astimezone(UTC)))
    truck_spans = [_allowed_spans(a, b, tz, freeze, (6, 21)) for a, b in windows]
    belt_spans = [_allowed_spans(a, b, tz, freeze, (6, 22)) for a, b in windows]
    days = [sum((b - a).total_seconds() for a, b in sp) / (15 * 3600.0) for sp in truck_spans]

    fleet_tare = np.round(rng.uniform(14.2, 16.8, _FLEET), 2)
    opening_true = {p: true_tonnes[0][p] * _OPENING_FRACTION[p] for p in piles}
    targets = [
        {p: true_tonnes[0][p] - opening_true[p] for p in piles},
        {p: true_tonnes[1][p] - true_tonnes[0][p] for p in piles},
        None,
    ]

    transfers: list[Transfer] = []
    for w, a, b, t in _TRANSFERS:
        (when,) = _sample_times(truck_spans[w], 1, rng)
        transfers.append(Transfer(a, b, when, t, ""))
    f = FAULTS["missing_transfer"]
    oct_spans = [s for s in truck_spans[1] if s[0].astimezone(tz).month == 10]
    (when,) = _sample_times(oct_spans, 1, rng)
    transfers.append(Transfer(f["from_pile"], f["to_pile"], when, f["tonnes"], "", recorded=False))
    transfers.sort(key=lambda x: x.time)
    for i, tr in enumerate(transfers):
        tr.reference = f"WO-{tr.time.astimezone(tz):%y%m}-{i + 1:02d}"

    truck_flows: list[tuple[int, str, str, float]] = []  # window, pile, direction, true net
    belt_need: dict[tuple[int, str], float] = {}
    for w in range(3):
        for p in piles:
            ch = _PILE_CHANNELS[p]
            lo, hi = _TRUCK_NET[materials[p]]
            if w < 2:
                nets = {d: list(rng.uniform(lo, hi, int(round(rate * days[w] * rng.uniform(0.9, 1.1)))))
                        for d, rate in ch["trucks"].items()}
            else:  # the evening after the second survey: a couple of trucks only
                nets = {d: list(rng.uniform(lo, hi, int(rng.integers(0, 3)))) for d in ch["trucks"]}
            moved = sum(t.tonnes * ((t.to_pile == p) - (t.from_pile == p)) for t in transfers
                        if windows[w][0] <= t.time < windows[w][1])
            truck_net = sum(nets.get("in", [])) - sum(nets.get("out", []))
            if ch["belt"] is not None:
                sid, sign = ch["belt"]
                if targets[w] is None:
                    need = float(rng.uniform(0.5, 2.0) * BELTS[sid]["rate_t_h"]) if p in ("C2", "L2", "FE1") else 0.0
                else:
                    need = sign * (targets[w][p] - truck_net - moved)
                if need < 0:
                    raise RuntimeError(f"pile {p} window {w}: belt would have to run backwards ({need:.0f} t)")
                belt_need[(w, p)] = need
            elif targets[w] is not None:
                # Trucks only: as many trucks in as the change needs, then scale the nets of one
                # direction slightly so the window balances exactly.
                need_in = targets[w][p] - moved + sum(nets.get("out", []))
                n_in = max(1, int(round(need_in / (0.5 * (lo + hi)))))
                nets["in"] = list(rng.uniform(lo, hi, n_in))
                truck_net = sum(nets["in"]) - sum(nets.get("out", []))
                resid = targets[w][p] - truck_net - moved
                d = "in" if resid > 0 else "out"
                total = sum(nets[d])
                scale = (total + abs(resid)) / total
                if not 0.85 < scale < 1.15:
                    raise RuntimeError(f"pile {p} window {w}: truck nets would change by {scale:.2f}")
                nets[d] = [n * scale for n in nets[d]]
            for d, values in nets.items():
                truck_flows.extend((w, p, d, float(v)) for v in values)

    # Belt campaigns: consecutive hours on one belt, one pile at a time.
    belts: list[BeltHour] = []
    routes: list[Route] = []
    for sid, spec in BELTS.items():
        taken: set = set()
        for w in range(3):
            slots = _hour_slots(belt_spans[w])
            jobs = _belt_jobs(belt_need, w, sid, spec["rate_t_h"], rng)
            placed = []
            if w == 1 and sid == "BC1":
                # After the first survey the stacker tops up C2 that same evening (cut-off matters).
                day = instants[0].astimezone(tz).date()
                placed = _first_evening(jobs, "C2", [s for s in slots if s.astimezone(tz).date() == day], taken)
            order = rng.permutation(len(jobs))
            placed += _place_campaigns(slots, [jobs[i] for i in order], taken, rng)
            by_pile: dict[str, list[list[datetime]]] = {}
            for p, hours in placed:
                by_pile.setdefault(p, []).append(hours)
            for p, camps in by_pile.items():
                n_h = sum(len(c) for c in camps)
                weights = rng.uniform(0.85, 1.15, n_h)
                tonnes = belt_need[(w, p)] * weights / weights.sum()
                i = 0
                for hours in camps:
                    routes.append(Route(sid, p, hours[0], hours[-1] + timedelta(hours=1)))
                    for h in hours:
                        belts.append(BeltHour(sid, p, h, h + timedelta(hours=1), float(tonnes[i]), 0.0))
                        i += 1
    # Recorded totals: calibration bias, hourly noise, the planted bias in October on BC2.
    belts.sort(key=lambda b: (b.scale_id, b.start))
    fb = FAULTS["belt_bias"]
    for b in belts:
        noise = BELT_HOURLY_SD * float(rng.standard_normal())
        bias = BELTS[b.scale_id]["bias"]
        fault = fb["reads_high_pct"] / 100.0 if (b.scale_id == fb["scale_id"] and b.start.astimezone(tz).month == 10) else 0.0
        b.recorded_t = round(b.true_t * (1.0 + bias + noise + fault), 1)
        b.fault_t = b.true_t * fault
    routes.sort(key=lambda r: (r.scale_id, r.start))

    # Weighbridge tickets in time order.
    times = []
    for w in range(3):
        rows = [tf for tf in truck_flows if tf[0] == w]
        when = _sample_times(truck_spans[w], len(rows), rng)
        order = rng.permutation(len(rows))
        times.extend(zip(when, [rows[i] for i in order]))
    times.sort(key=lambda x: x[0])
    tickets: list[Ticket] = []
    free_at = [start] * _FLEET  # a truck is back at the weighbridge one round trip later
    for i, (when, (w, p, d, net)) in enumerate(times):
        ready = [j for j in range(_FLEET) if free_at[j] <= when]
        v = int(ready[int(rng.integers(len(ready)))]) if ready else int(np.argmin(free_at))
        free_at[v] = when + timedelta(minutes=_ROUND_TRIP_MIN)
        tare = fleet_tare[v] + rng.normal(0.0, 0.05)
        gross = tare + net
        g_rec, t_rec = _round_e([gross + rng.normal(0.0, WEIGHING_SD_T), tare + rng.normal(0.0, WEIGHING_SD_T)])
        tickets.append(Ticket(f"{17301 + i:06d}", when, d, materials[p], p, float(g_rec), float(t_rec),
                              f"FL-{v + 1:02d}", net))
    # Planted fault: one October out-ticket of C1 exported twice.
    fd = FAULTS["duplicate_ticket"]
    cands = [i for i, t in enumerate(tickets)
             if t.pile_id == fd["pile_id"] and t.direction == "out" and t.time.astimezone(tz).month == 10
             and windows[1][0] <= t.time < windows[1][1]]
    dup = cands[len(cands) // 2]

    opening_as_of = start
    true_net = {p: [0.0, 0.0, 0.0] for p in piles}
    for w, p, d, net in truck_flows:
        true_net[p][w] += net if d == "in" else -net
    for b in belts:
        w = next(i for i, (a, e) in enumerate(windows) if a <= b.start < e)
        true_net[b.pile_id][w] += b.true_t * (1 if BELTS[b.scale_id]["direction"] == "in" else -1)
    for t in transfers:
        w = next(i for i, (a, e) in enumerate(windows) if a <= t.time < e)
        true_net[t.from_pile][w] -= t.tonnes
        true_net[t.to_pile][w] += t.tonnes
    for p in piles:
        for w in (0, 1):
            if abs(true_net[p][w] - targets[w][p]) > 1e-6:
                raise RuntimeError(f"pile {p} window {w}: flows {true_net[p][w]:.3f} t != change {targets[w][p]:.3f} t")
    return Books(
        tickets=tickets,
        duplicate_of=tickets[dup].ticket,
        belts=belts,
        routes=routes,
        transfers=transfers,
        opening_t={p: round(opening_true[p], 1) for p in piles},
        opening_as_of=opening_as_of,
        true_net_t=true_net,
        windows=windows,
        faults={"duplicate_index": dup},
    )
