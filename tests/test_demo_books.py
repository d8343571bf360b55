"""The demo books generator keeps its promises for any seed, not only the committed one."""

from __future__ import annotations

from datetime import datetime, timedelta, timezone
from zoneinfo import ZoneInfo

import numpy as np
import pytest

from inventory._demo import books
from inventory._demo.scenario import MATERIALS, PILES, terminal_at

TZ = ZoneInfo("Europe/Berlin")
UTC = timezone.utc
INSTANTS = [datetime(2026, 9, 30, 14, 35, tzinfo=TZ).astimezone(UTC), datetime(2026, 10, 31, 14, 30, tzinfo=TZ).astimezone(UTC)]


@pytest.fixture(scope="module")
def true_tonnes() -> list[dict[str, float]]:
    out = []
    for k in (0, 1):
        shapes = terminal_at(k, np.random.default_rng(0)).shapes
        out.append({p.pile_id: shapes[p.pile_id].volume() * MATERIALS[p.material].density_t_m3 for p in PILES})
    return out


@pytest.mark.parametrize("seed", [0, 1, 2, 7, 11])
def test_books_balance_and_carry_the_planted_faults(true_tonnes, seed):
    materials = {p.pile_id: p.material for p in PILES}
    bk = books.make_books(true_tonnes, INSTANTS, materials, TZ, np.random.default_rng([seed, 3]))

    # True flows between the surveys equal the true change (make_books also checks this).
    for pid in materials:
        assert bk.true_net_t[pid][1] == pytest.approx(true_tonnes[1][pid] - true_tonnes[0][pid], abs=1e-6)

    # Weighbridge: gross and tare on the 20 kg scale interval (OIML R 76 class III, e = 20 kg).
    for t in bk.tickets:
        for w in (t.gross_t, t.tare_t):
            assert abs(w / 0.02 - round(w / 0.02)) < 1e-6
        assert t.gross_t > t.tare_t
    # A truck is never weighed twice within its round trip.
    last: dict[str, datetime] = {}
    for t in sorted(bk.tickets, key=lambda t: t.time):
        if t.vehicle in last:
            assert t.time - last[t.vehicle] >= timedelta(minutes=50)
        last[t.vehicle] = t.time

    # Nothing moves while the yard is frozen for a scan (12:00-15:30 local on survey days).
    times = [t.time for t in bk.tickets] + [b.start for b in bk.belts] + [b.end - timedelta(seconds=1) for b in bk.belts]
    times += [t.time for t in bk.transfers]
    for inst in INSTANTS:
        day = inst.astimezone(TZ).date()
        lo = datetime(day.year, day.month, day.day, 12, tzinfo=TZ)
        hi = datetime(day.year, day.month, day.day, 15, 30, tzinfo=TZ)
        assert not any(lo <= x < hi for x in times)

    # Belts: every hour inside a routing window of the same belt and pile; windows never overlap.
    for b in bk.belts:
        assert any(r.scale_id == b.scale_id and r.pile_id == b.pile_id and r.start <= b.start and b.end <= r.end
                   for r in bk.routes)
    for sid in books.BELTS:
        wins = sorted((r.start, r.end) for r in bk.routes if r.scale_id == sid)
        assert all(a[1] <= b[0] for a, b in zip(wins, wins[1:]))

    # The planted belt bias: BC2 reads 1.5 % high in October only.
    oct_bc2 = [b for b in bk.belts if b.scale_id == "BC2" and b.start.astimezone(TZ).month == 10]
    sep_bc2 = [b for b in bk.belts if b.scale_id == "BC2" and b.start.astimezone(TZ).month == 9]
    ratio_oct = sum(b.recorded_t for b in oct_bc2) / sum(b.true_t for b in oct_bc2)
    ratio_sep = sum(b.recorded_t for b in sep_bc2) / sum(b.true_t for b in sep_bc2)
    assert ratio_oct - ratio_sep == pytest.approx(0.015, abs=0.002)

    # The duplicate is an October out-ticket of C1; the missing transfer is never recorded.
    dup = bk.tickets[bk.faults["duplicate_index"]]
    assert dup.pile_id == "C1" and dup.direction == "out" and dup.time.astimezone(TZ).month == 10
    missing = [t for t in bk.transfers if not t.recorded]
    assert len(missing) == 1 and (missing[0].from_pile, missing[0].to_pile, missing[0].tonnes) == ("FE2", "FE1", 420.0)
    assert INSTANTS[0] < missing[0].time < INSTANTS[1]
