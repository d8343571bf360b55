"""The one month type: parsing, neighbours and local-midnight bounds, checked against pandas."""

from __future__ import annotations

import pandas as pd
import pytest
from hypothesis import given
from hypothesis import strategies as st

from inventory.cli import build_parser
from inventory.model.period import Period


@pytest.mark.parametrize("text", ["2026-13", "2026-00", "2026-1", "26-10", "2026/10", "2026-10-01", "", " 2026-10", None, 202610])
def test_not_a_month_is_refused(text):
    with pytest.raises(ValueError, match="is not a month YYYY-MM"):
        Period.parse(text)


@given(st.integers(1900, 2200), st.integers(1, 12))
def test_neighbours_agree_with_pandas_monthly_period(year, month):
    p = Period(year, month)
    ref = pd.Period(year=year, month=month, freq="M")  # reference library
    assert Period.parse(str(p)) == p
    assert str(p) == str(ref)
    assert str(p.previous()) == str(ref - 1)
    assert str(p.next()) == str(ref + 1)
    assert p.last_day() == ref.end_time.date()
    assert p.previous() < p < p.next()


def test_bounds_follow_daylight_saving():
    # Europe/Berlin: CEST (UTC+2) until 25 Oct 2026 03:00, then CET (UTC+1) (IANA tz database).
    start, end = Period.parse("2026-10").bounds("Europe/Berlin")
    assert start == pd.Timestamp("2026-09-30T22:00Z")
    assert end == pd.Timestamp("2026-10-31T23:00Z")
    start, end = Period.parse("2026-12").bounds("UTC")
    assert (start, end) == (pd.Timestamp("2026-12-01T00:00Z"), pd.Timestamp("2027-01-01T00:00Z"))


def test_command_line_refuses_a_month_that_does_not_exist(capsys):
    with pytest.raises(SystemExit) as info:
        build_parser().parse_args(["close", "site", "--period", "2026-13"])
    assert info.value.code == 2
    assert "month 13 does not exist" in capsys.readouterr().err
